"""The discrete-joint step compiled with Numba, the way the physics kernel is compiled.

The source of :mod:`jointfmu.physics.kernel` and of :mod:`.kernel` (its import of the physics
kernel's names removed: they are defined just above it) is handed to
:func:`jointfmu.physics.compiled.compile_source`, which writes it once to the per-user cache
folder keyed by its SHA-256 (``lumped-<hash16>/``) and compiles every function with the same
options as the physics kernel.  So the joints are the physics kernel's own functions, compiled
into the same machine code as the loop that calls them; nothing of the joint is copied here.

:func:`select_kernel` gives the compiled module when it loads and passes a short bit-for-bit
comparison with the plain-Python functions, else the plain-Python module :mod:`.kernel` (10-100x
slower), with a RuntimeWarning once per process that says why (none when ``JOINTFMU_KERNEL=python``
asked for it).
"""
from __future__ import annotations

import ast
import warnings
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..physics import kernel as _PK
from ..physics.iwan import kernel_table
from . import kernel as _LK

__all__ = ["select_kernel", "kernel_info", "combined_source"]

_STATE: list = []


def _top_functions(source: str) -> set[str]:
    return {n.name for n in ast.parse(source).body if isinstance(n, ast.FunctionDef)}


def combined_source() -> str:
    """The physics kernel's source followed by this package's kernel without its imports of
    ``__future__`` and of the physics kernel (the names are defined above it)."""
    phys = Path(_PK.__file__).read_text(encoding="utf-8")
    mine = Path(_LK.__file__).read_text(encoding="utf-8")
    clash = _top_functions(phys) & _top_functions(mine)
    if clash:
        raise ImportError(f"lumped kernel functions shadow physics kernel functions: {sorted(clash)}")
    lines = mine.splitlines(keepends=True)
    drop = set()
    for node in ast.parse(mine).body:
        if isinstance(node, ast.ImportFrom) and (node.module == "__future__" or
                                                 (node.level == 2 and node.module == "physics.kernel")):
            drop.update(range(node.lineno - 1, node.end_lineno))
    body = "".join(line for k, line in enumerate(lines) if k not in drop)
    return phys + "\n\n# ---- jointfmu.lumped.kernel, appended by jointfmu.lumped.compiled ----\n" + body


def _self_check_arrays():
    """A tiny coupled structure that reverses, wipes out loops, crosses the onset of macro-slip
    and reaches macro-slip within a few dozen steps (two modes, two joints, one input)."""
    from ..physics.integrate import step_coefficients

    n, nj, cap = 2, 2, 16
    omega = np.array([300.0, 900.0])
    zeta = np.array([0.01, 0.02])
    h = 2.0 * np.pi / omega[1] / 12.0
    coef = step_coefficients(omega, zeta, np.full(n, h))
    md = np.column_stack([2.0 * zeta * omega, omega**2])
    C = np.array([[0.8, -0.3], [0.2, 0.6]])
    P = np.array([[0.5, 0.4]])
    jc = kernel_table([1.0, 2.0], [3.0e4, 8.0e4], [-0.5, -0.3], [0.4, 0.0], [0.0, 0.0], 1e-3)
    js = np.zeros((nj, _PK.NJS))
    for j in range(nj):
        _PK.joint_set_virgin(j, 0.0, jc, js)
    return dict(n_sub=np.int64(3), coef=coef, md=md, C=C, P=P, fin=np.array([[40.0, 0.0, 0.0]]),
                st=np.zeros((n, 2)), jc=jc, js=js, stk=np.zeros((nj, cap, 3)),
                bk=np.zeros((nj, cap, 3)), wm=np.zeros((n, 8)), wj=np.zeros((nj, 8)),
                fw=np.zeros((1, 3)), en=np.zeros(2), peak=np.zeros(n), jstat=np.zeros((nj, 2)),
                S=np.array([[1.0, -1.0]]), out=np.zeros((60, 1)), st_saved=np.zeros((n, 2)),
                js_saved=np.zeros((nj, _PK.NJS)), en_saved=np.zeros(2))


def _run_check(kern) -> np.ndarray:
    a = _self_check_arrays()
    order = ("coef", "md", "C", "P", "fin", "st", "jc", "js", "stk", "bk", "wm", "wj", "fw", "en",
             "peak", "jstat", "S")
    args = [a[k] for k in order]
    kern.lumped_record(20, a["n_sub"], *args, np.int64(2), a["out"], a["st_saved"], a["js_saved"],
                       a["en_saved"])
    a["fin"][0, 0] = -25.0
    a["fin"][0, 1] = 3.0e5
    kern.lumped_record(40, a["n_sub"], *args, np.int64(2), a["out"][20:], a["st_saved"],
                       a["js_saved"], a["en_saved"])
    return np.concatenate([a[k].ravel() for k in ("st", "js", "stk", "en", "peak", "jstat", "out")])


def _load():
    from ..physics import compiled as pc  # raises ImportError without Numba or when disabled

    path, mod = pc.compile_source(combined_source(), "lumped", _PK.COLD + _LK.COLD)
    if not np.array_equal(_run_check(_LK), _run_check(mod)):
        raise ImportError("the compiled discrete-joint kernel disagrees with the plain-Python one "
                          "on the self-check; not used")
    return path, mod


def _loaded():
    if not _STATE:
        try:
            path, mod = _load()
            _STATE.append((mod, f"compiled kernel loaded from {path}"))
        except Exception as exc:  # noqa: BLE001 - any failure falls back, and is reported
            _STATE.append((None, f"{type(exc).__name__}: {exc}"))
    return _STATE[0]


def kernel_info() -> dict:
    """Which kernel ``"auto"`` gives in this process, and why: ``{"kernel", "reason"}``."""
    mod, reason = _loaded()
    return {"kernel": "numba" if mod is not None else "python", "reason": reason}


def select_kernel(kernel: str = "auto"):
    """``(module, name)``: the compiled module (``"numba"``) or :mod:`.kernel` (``"python"``).

    ``kernel`` is ``"auto"`` (compiled when it loads, else Python with a warning once),
    ``"compiled"`` (InputError when unavailable) or ``"python"``.
    """
    if kernel not in ("auto", "python", "compiled"):
        raise InputError(f"kernel = {kernel!r}: allowed values are 'auto', 'python', 'compiled'")
    if kernel != "python":
        mod, reason = _loaded()
        if mod is not None:
            return mod, "numba"
        if kernel == "compiled":
            raise InputError(f"kernel = 'compiled' requested but not available: {reason}")
        if len(_STATE) == 1 and "JOINTFMU_KERNEL=python" not in reason:
            _STATE.append(True)  # warned
            warnings.warn("jointfmu: discrete-joint structure with the plain-Python kernel "
                          f"(10-100x slower): {reason}", RuntimeWarning, stacklevel=3)
    return _LK, "python"
