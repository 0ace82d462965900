"""The joint kernel compiled with Numba: the same functions as :mod:`._kernel`, machine code.

Importing this module either yields a working compiled kernel or raises, so that
:func:`.integrate._select_kernel` can fall back to the plain-Python one and say why.

Why a copy of ``_kernel.py`` in a cache folder
----------------------------------------------
Numba's on-disk cache (``cache=True``) is keyed by the path and time stamp of the source file.
An FMU's resources are extracted to a new temporary folder at every load, so compiling
``_kernel.py`` where it lies would recompile (about 1.5 s) at every instantiation.  Instead the
kernel source, with a footer that applies ``numba.njit(cache=True)`` to each function, is written
once to a per-user folder keyed by the SHA-256 of that text::

    $JOINTFMU_CACHE_DIR/kernel-<hash16>/jfmu_kernel_<hash16>.py     (if the variable is set)
    $XDG_CACHE_HOME/jointfmu/... or ~/.cache/jointfmu/...            (otherwise)
    <tempdir>/jointfmu-<user>/...                                    (if neither is writable)

and imported from there; Numba keeps its cache in ``__pycache__`` beside it.  Every FMU and every
process built from the same kernel source shares that folder.  The file is created atomically
and never rewritten once in place (temp file, then a hard link that fails if another process was
first), so its time stamp, and with it Numba's cache, stays valid; Numba writes its own cache
files atomically as well.

The kernel functions' bodies are untouched: the results are bit-identical to the plain-Python
kernel (checked here on import with a short run, and by ``tests/test_kernel.py``).  ``fastmath``
stays off for that reason; ``error_model="numpy"`` only drops the ZeroDivisionError check (the
kernel divides by nothing that can be zero; a non-finite result is caught by the caller anyway).
Every top-level function of ``_kernel.py`` is compiled, so a new helper there needs no change here.

The C entry
-----------
The generated module also defines ``c_step(pointers, dims, dt)``, ``step_planned`` behind a C
signature (``int64_t (void **, const int64_t *, double)``): it rebuilds the simulator's arrays
from their data pointers and shapes (:data:`C_STEP_ARRAYS`) and calls the compiled
``step_planned``, the same machine code Python calls.  :func:`c_step_address` makes it a Numba
``cfunc`` (cached like the rest) when the FMU's native binary first asks for it
(:func:`c_step_entry`, through ``ModalSimulator.c_step_entry``), so that doStep runs without
Python.

Environment
-----------
``JOINTFMU_KERNEL=python``
    Do not compile; importing this module raises (the caller falls back and reports why).
``JOINTFMU_CACHE_DIR``
    Folder for the compiled kernel (default as above).
"""
from __future__ import annotations

import ast
import getpass
import hashlib
import importlib.util
import os
import sys
import tempfile
from pathlib import Path

import numpy as np

from . import kernel as _K
from .iwan import kernel_table

__all__ = ["NAME", "advance", "joint_move", "joint_set_virgin", "step_all", "step_planned", "undo",
           "refresh", "CACHE_FILE", "cache_dir_candidates", "bind", "compile_source", "jit_footer",
           "c_step_entry", "c_step_address"]

NAME = "numba"

#: Options of every compiled function.  ``_nrt=False``: the kernel allocates nothing, and without
#: Numba's reference-counting runtime the calls between the kernel's functions pass arrays
#: without atomic reference-count updates (88 -> 39 ns per mode-step measured here);
#: ``forceinline``: LLVM inlines the helpers into their callers (39 -> 33 ns; same compile time).
_JIT_OPTIONS = "cache=True, nogil=True, error_model='numpy', _nrt=False, forceinline=True"
#: The same without ``forceinline``, for the functions ``_kernel.COLD`` names: rarely taken
#: branches called as functions keep the hot loop small (32-33 instead of 34-48 ns measured);
#: and for ``_kernel.ENTRIES``, so that the C entry calls the machine code Python calls.
_JIT_OPTIONS_COLD = _JIT_OPTIONS.replace("forceinline=True", "forceinline=False")

#: The array arguments of ``_kernel.step_planned`` after ``dt`` and ``has_base``, in order, as
#: (number of dimensions, dtype): the C entry rebuilds them from pointers and shapes.
C_STEP_ARRAYS = ((1, "float64"), (2, "int64"), (3, "float64"), (1, "float64"), (1, "float64"),
                 (2, "float64"), (2, "float64"), (2, "float64"), (2, "float64"), (3, "float64"),
                 (3, "float64"), (1, "float64"), (1, "float64"), (2, "float64"), (2, "float64"))


def _c_step_source() -> str:
    """``c_step(pointers, dims, dt)``: ``_kernel.step_planned`` behind a C signature.

    ``pointers[k]`` is the data of the k-th array of :data:`C_STEP_ARRAYS`; ``dims`` holds
    ``has_base`` and then the shape of each array in turn.  ``make_c_step`` compiles it as a
    Numba ``cfunc`` (cached like the rest), when the FMU's binary first asks for it.
    """
    lines, args, d = [], [], 1
    for k, (ndim, dtype) in enumerate(C_STEP_ARRAYS):
        shape = ", ".join(f"dims[{d + j}]" for j in range(ndim)) + ("," if ndim == 1 else "")
        lines.append(f"    a{k} = _numba.carray(pointers[{k}], ({shape}), _np.{dtype})\n")
        args.append(f"a{k}")
        d += ndim
    return ("import numpy as _np\n"
            "\n\ndef c_step(pointers, dims, dt):\n"
            + "".join(lines)
            + f"    return step_planned(dt, dims[0], {', '.join(args)})\n"
            "\n\ndef make_c_step():\n"
            "    from numba import types as _t\n"
            "    sig = _t.int64(_t.CPointer(_t.voidptr), _t.CPointer(_t.int64), _t.float64)\n"
            f"    return _numba.cfunc(sig, cache=True, error_model='numpy')(c_step)\n")


def _functions(source: str) -> list[str]:
    """Names of the top-level functions of the kernel source, in order of definition."""
    return [node.name for node in ast.parse(source).body if isinstance(node, ast.FunctionDef)]


def jit_footer(source: str, cold=(), tail: str = "") -> str:
    """The footer that compiles every top-level function of ``source`` with Numba: those named
    in ``cold`` without ``forceinline`` (rarely taken branches kept out of the hot loop); then
    ``tail``, source that uses the compiled functions (the kernel's C entry)."""
    # All functions are rebound before any is called: Numba resolves each callee as a global
    # when its caller is first compiled.
    return (
        "\n\n# ---- appended by jointfmu._compiled: the functions above, compiled by Numba ----\n"
        "import numba as _numba\n"
        + "".join(f"{name} = _numba.njit({_JIT_OPTIONS_COLD if name in cold else _JIT_OPTIONS})"
                  f"({name})\n" for name in _functions(source))
        + tail
    )


def cache_dir_candidates() -> list[Path]:
    """Folders tried, in order, for the compiled kernel."""
    out = []
    env = os.environ.get("JOINTFMU_CACHE_DIR")
    if env:
        out.append(Path(env).expanduser())
    xdg = os.environ.get("XDG_CACHE_HOME")
    out.append((Path(xdg) if xdg else Path.home() / ".cache") / "jointfmu")
    try:
        user = getpass.getuser()
    except Exception:  # noqa: BLE001 - no user name on some hosts
        user = str(os.getuid()) if hasattr(os, "getuid") else "user"
    out.append(Path(tempfile.gettempdir()) / f"jointfmu-{user}")
    return out


def _write_once(path: Path, text: bytes) -> None:
    """Create ``path`` with ``text`` atomically unless it already holds exactly ``text``."""
    try:
        if path.read_bytes() == text:
            return
        stale = True
    except FileNotFoundError:
        stale = False
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", suffix=".py", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(text)
        os.chmod(tmp, 0o644)  # mkstemp makes it private; the source is no secret
        if stale:
            os.replace(tmp, path)  # a damaged copy: replace it (Numba then recompiles)
            return
        try:
            os.link(tmp, path)  # fails if another process was first: keep its file and stamp
        except FileExistsError:
            pass
        except OSError:  # no hard links on this file system
            if not path.exists():
                os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def _place_source(source: str, stem: str, cold, tail: str) -> tuple[Path, str]:
    text = (source + jit_footer(source, cold, tail)).encode("utf-8")
    digest = hashlib.sha256(text).hexdigest()[:16]
    name = f"jfmu_{stem}_{digest}"
    errors = []
    for base in cache_dir_candidates():
        folder = base / f"{stem}-{digest}"
        try:
            folder.mkdir(parents=True, exist_ok=True)
            path = folder / f"{name}.py"
            _write_once(path, text)
            if path.read_bytes() == text:
                return path, name
            errors.append(f"{path}: content differs after writing")
        except OSError as exc:
            errors.append(f"{base}: {exc}")
    raise ImportError("no writable cache folder for the compiled kernel: " + "; ".join(errors))


def compile_source(source: str, stem: str, cold=(), tail: str = ""):
    """Compile every top-level function of the kernel-style ``source`` with Numba, cached.

    The source with :func:`jit_footer` appended is written once to
    ``<cache folder>/<stem>-<hash16>/jfmu_<stem>_<hash16>.py`` (see the module docstring) and
    imported from there (once per process).  The physics kernel is compiled this way; so is any
    other module of scalar loops on arrays written like it (the discrete-joint structure's step).

    Parameters
    ----------
    source : str
        Python source: imports of NumPy/math and top-level functions only.
    stem : str
        Name part of the cache folder and module, e.g. ``"kernel"``.
    cold : sequence of str
        Functions compiled without ``forceinline``.
    tail : str
        Source appended after the compiled functions, which may use them (the kernel's C
        entry, :func:`c_step_entry`).

    Returns
    -------
    (Path, module)
        The cached source file and the imported module.

    Raises
    ------
    ImportError
        ``JOINTFMU_KERNEL=python`` is set, Numba is missing, or no cache folder is writable.
    """
    if os.environ.get("JOINTFMU_KERNEL", "").strip().lower() == "python":
        raise ImportError("JOINTFMU_KERNEL=python is set")
    import numba  # noqa: F401 - fail here, with numba's own message, when it is missing

    path, name = _place_source(source, stem, tuple(cold), tail)
    mod = sys.modules.get(name)
    if mod is None:  # two FMUs in one process share one compiled kernel
        spec = importlib.util.spec_from_file_location(name, path)
        mod = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(mod)
        sys.modules[name] = mod
    return path, mod


def _load():
    return compile_source(Path(_K.__file__).read_text(encoding="utf-8"), "kernel",
                          _K.COLD + _K.ENTRIES, _c_step_source())


def _self_check(mod) -> None:
    """Compile (or load from cache) ``step_planned`` and ``refresh`` with the argument types
    the simulator uses, and compare a short run with reversals, wiping-out and macro-slip against
    the plain-Python kernel.

    Only these two are called (they contain every other function of a step); each further entry
    point called here would cost one more cache load (about 0.05 s) at every start.
    ``joint_move``, ``joint_set_virgin`` and ``undo`` compile, or load from the cache, at their
    first call; the C entry (:func:`c_step_entry`) when the FMU's binary asks for it.
    """
    n, cap = 2, 6
    # two arbitrary joints (chi = -0.5, beta = 0.2 and chi = -0.3, beta = 0); joint 0 with a
    # large merge tolerance, so that merges happen
    jc = np.vstack([kernel_table([1.0], [4.0], [-0.5], [0.2], [30.0], 1e-2),
                    kernel_table([2.0], [9.0], [-0.3], [0.0], [60.0], 0.0)])
    # coefficients of a crude explicit step are enough to exercise the code: with this force both
    # joints reverse, wipe out loops, fill the small stack (forced merges); joint 0 also merges
    # under its tolerance, joint 1 reaches macro-slip
    h = 0.01
    coef = np.zeros((n, 11))
    coef[:, 0], coef[:, 1], coef[:, 2], coef[:, 3] = 1.0, h, -0.3, 0.99
    coef[:, 4], coef[:, 5], coef[:, 10] = 0.5 * h * h, h, h
    results = []
    for kern in (_K, mod):
        js = np.zeros((n, _K.NJS))
        st = np.zeros((n, 6))
        stk = np.zeros((n, cap, 3))
        bk = np.zeros((n, cap, 3))
        for i in range(n):
            _K.joint_set_virgin(i, 0.0, jc, js)
        st[:, 5] = 0.1
        # the plan of the step size 0.02 in the second of two slots
        plan_dt = np.array([np.nan, 0.02])
        plan_nsub = np.array([[1, 1], [3, 2]], dtype=np.int64)
        plan_coef = np.stack([coef, coef])
        clock = np.zeros(2)
        # inputs: no points, the two modal forces, base acceleration; one output point
        mp = np.array([[0.5, -0.25, 1.0], [0.3, 0.1, 2.0]])
        f = np.zeros(n)
        y = np.zeros(4 * n + 3 + _K.Y_TAIL)
        st_s, js_s = np.zeros_like(st), np.zeros_like(js)
        codes = []
        for k in range(150):
            u = np.array([20.0, -40.0, 0.3]) * np.sin(0.37 * k) * np.exp(-0.02 * k)
            if k == 70:
                u[1] = np.nan    # refused, nothing changes
            codes.append(kern.step_planned(0.02, 1, plan_dt, plan_nsub, plan_coef, clock, u, mp,
                                           st, jc, js, stk, bk, f, y, st_s, js_s))
        kern.refresh(u * 0.5, mp, st, jc, js, f, y)
        results.append(np.concatenate([st.ravel(), js.ravel(), stk.ravel(), y, st_s.ravel(),
                                       clock, codes]))
    if not np.array_equal(results[0], results[1]):
        raise ImportError("the compiled kernel disagrees with the plain-Python kernel on the "
                          "self-check; not used")


def c_step_entry(args):
    """``(address, pointers, dims)`` of the C entry of ``step_planned`` (see
    :meth:`.integrate.ModalSimulator.c_step_entry`) over ``args``, the arguments of
    ``step_planned`` after ``dt``: ``has_base`` and the arrays of :data:`C_STEP_ARRAYS`.

    The arrays are checked here (number of dimensions, dtype, C order, writable), since the C
    entry can check nothing.  The first call in a process compiles the entry (about 2 s) or
    loads it from the cache.
    """
    has_base, arrays = args[0], args[1:]
    if len(arrays) != len(C_STEP_ARRAYS):
        raise ValueError(f"c_step_entry: {len(arrays)} arrays, expected {len(C_STEP_ARRAYS)}")
    pointers, dims = [], [int(has_base)]
    for k, (a, (ndim, dtype)) in enumerate(zip(arrays, C_STEP_ARRAYS)):
        if not (isinstance(a, np.ndarray) and a.ndim == ndim and a.dtype == np.dtype(dtype)
                and a.flags.c_contiguous and a.flags.writeable):
            raise ValueError(f"c_step_entry: array {k} is not a writable C-ordered {ndim}-d "
                             f"{dtype} array")
        pointers.append(a.ctypes.data)
        dims.extend(int(x) for x in a.shape)
    return c_step_address(), tuple(pointers), tuple(dims)


#: The compiled C entry, made at the first call of c_step_address.
_C_STEP: list = []


def c_step_address() -> int:
    """Address of the C entry of ``step_planned`` (see :func:`c_step_entry`), compiled now
    (about 2 s, once per machine: ``jointfmu build`` does it) or loaded from the cache."""
    if not _C_STEP:
        _C_STEP.append(_mod.make_c_step())
    return _C_STEP[0].address


def bind(func, args):
    """The machine code of the compiled ``func`` for the types of ``args``, without Numba's
    per-call dispatch.

    A Numba dispatcher finds the type of every argument at every call before it runs the
    machine code: about 0.1 us per array argument here, 1.8 us for the 13 arrays of
    ``step_all``, which a co-simulation pays at every communication step.  The entry point
    returned by ``Dispatcher.compile(signature)`` (Numba's public API; compiled now, or loaded
    from the cache) runs the same machine code without it (0.9 us measured for ``step_all``;
    ``step_planned``, which the simulator calls now, takes 15 arrays).

    It converts its arguments as the signature says and checks nothing, so the caller must
    pass arrays of exactly the types of ``args`` (dtype, number of dimensions, C order,
    writable): :class:`.integrate.ModalSimulator` allocates its arrays once, in that form.
    """
    import numba

    return func.compile(tuple(numba.typeof(a) for a in args))


CACHE_FILE, _mod = _load()
_self_check(_mod)

advance = _mod.advance
joint_move = _mod.joint_move
joint_set_virgin = _mod.joint_set_virgin
step_all = _mod.step_all
step_planned = _mod.step_planned
undo = _mod.undo
refresh = _mod.refresh
