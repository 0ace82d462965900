"""FMU packaging: ``jointfmu build``, ``info`` and ``simulate``.

:func:`build_fmu` makes an FMI 2.0 co-simulation FMU of a parameter set with pythonfmu and then
completes its ``modelDescription.xml`` (units, descriptions, ModelStructure, DefaultExperiment,
the parameter-set identity), all from :func:`.variables.variable_table`.

Names.  pythonfmu imports the slave module by the name in ``resources/slavemodule.txt`` and
Python caches modules by name, so two FMUs loaded into one process with the same module name
would both run whichever was imported first.  Every build therefore gets its own model
identifier, module and class name ``Jfmu_<name>_<hash12>`` and carries the jointfmu package
under its own name ``jfmu_core_<hash12>`` (all imports inside the package are relative), with
``hash12`` from the parameter set's content hash and the bundled source.

Resources of a built FMU::

    resources/Jfmu_<name>_<hash12>.py    generated entry module (subclass of slave.JointSlave)
    resources/jfmu_core_<hash12>/        the jointfmu package under its unique name
    resources/parameters.toml            the parameter set (its content hash in the header)
    resources/jointfmu_build.json        identity: set id, content hash, versions
    resources/requirements.txt           what the host's Python needs
    resources/pythonfmu/                 pythonfmu's own runtime (added by pythonfmu)

Binary.  By default (``binary="auto"``) the FMU carries jointfmu's own FMI 2.0 binary, the
C file ``native/fmi2_shell.c`` compiled at build time with ``$CC`` (or ``cc``) against this
Python's headers: it answers fmi2SetReal of inputs and fmi2GetReal of outputs from the
simulator's buffers without calling Python, and forwards every other call to the slave as
pythonfmu's binary does.  Where it cannot be compiled (no compiler, no Python headers, not
Linux or macOS, a compile error) the FMU keeps pythonfmu's binary and the build info records
why; ``binary="native"`` makes that a :class:`BuildError`, ``binary="pythonfmu"`` always keeps
pythonfmu's binary.  The environment variable ``JOINTFMU_FMU_BINARY`` sets the default.

Every file is written atomically (temp file in the target folder, then ``os.replace``): a failed
build leaves nothing behind.
"""
from __future__ import annotations

import csv
import hashlib
import json
import math
import os
import re
import platform
import shlex
import shutil
import subprocess
import sys
import sysconfig
import tempfile
import zipfile
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Iterable, Mapping, Sequence
from xml.etree import ElementTree as ET

from ..fileio import atomic_write, publish
from ..errors import BuildError, InputError, JointFmuError, ParameterError, Problem, did_you_mean
from ..params import (MODE_VALUE_NAMES, ParameterSet, check_mode_values,
                     load_parameter_set)
from .slave import BUILD_INFO_FILE, PARAMETER_FILE
from .variables import PARAMETER_FIELDS, UNITS, variable_table

__all__ = [
    "BuildResult",
    "build_fmu",
    "fmu_names",
    "default_output_path",
    "read_fmu_info",
    "format_fmu_info",
    "run_fmu",
    "read_input_csv",
    "write_csv_atomic",
    "parameter_values_ssv",
    "write_ssv",
    "read_parameter_values",
    "with_parameter_values",
    "HOST_REQUIREMENTS",
    "HOST_OPTIONAL",
]

#: Python packages the host needs besides its interpreter (written to requirements.txt).
HOST_REQUIREMENTS = ("numpy>=1.24", "scipy>=1.10")
#: Optional: the core's compiled fast path; without it the core runs its plain-Python kernel.
HOST_OPTIONAL = ("numba>=0.58",)

_PACKAGE_DIR = Path(__file__).resolve().parent
#: jointfmu's own FMI 2.0 binary (C source), compiled into each FMU when possible.
SHELL_SOURCE = _PACKAGE_DIR / "native" / "fmi2_shell.c"
#: Allowed values of build_fmu(binary=...) (and of JOINTFMU_FMU_BINARY).
BINARY_CHOICES = ("auto", "native", "pythonfmu")
BINARY_ENV = "JOINTFMU_FMU_BINARY"


@dataclass(frozen=True)
class BuildResult:
    """What :func:`build_fmu` made.

    Attributes
    ----------
    path : Path
        The FMU file.
    model_identifier : str
        ``Jfmu_<name>_<hash12>``: model identifier, module and class name.
    core_package : str
        ``jfmu_core_<hash12>``: name of the bundled jointfmu package.
    set_id : str
        ``"<name>@<build>"`` of the parameter set.
    content_hash : str
        SHA-256 of the parameter set (:meth:`ParameterSet.content_hash`).
    binary : dict
        The FMU's binary as the build info records it: ``kind`` (``"native"`` or
        ``"pythonfmu"``), ``platform``, ``description`` and, for pythonfmu's, ``reason``.
    """

    path: Path
    model_identifier: str
    core_package: str
    set_id: str
    content_hash: str
    binary: dict = field(default_factory=dict)


# ---------------------------------------------------------------------------------- names
#: What an FMU carries of jointfmu, relative to the package folder: the parameters, the physics and
#: the slave with its variable table; nothing of the host side (build, command line, analysis,
#: co-simulation, reports).  A fixed list, not an import closure, so that a host-side import added
#: to a bundled module fails the build (:func:`_check_bundle`) instead of dragging the host in.
BUNDLE = ("__init__.py", "errors.py", "fileio.py", "params", "physics", "fmu/__init__.py",
          "fmu/slave.py", "fmu/variables.py")


def _core_files() -> list[Path]:
    """The package files an FMU carries (:data:`BUNDLE`), sorted."""
    out = []
    for item in BUNDLE:
        path = _PACKAGE_DIR / item
        out.extend(sorted(path.glob("*.py")) if path.is_dir() else [path])
    return sorted(out)


def _check_bundle(files: list[Path]) -> None:
    """Every package-relative import of a bundled module resolves inside the bundle."""
    import ast

    have = {p.relative_to(_PACKAGE_DIR).with_suffix("").as_posix() for p in files}
    have |= {h.rpartition("/")[0] for h in have if h.endswith("/__init__")}
    for p in files:
        rel = p.relative_to(_PACKAGE_DIR).with_suffix("").as_posix().split("/")
        pkg = rel[:-1]
        for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"), str(p))):
            if not (isinstance(node, ast.ImportFrom) and node.level):
                continue
            base = pkg[:len(pkg) - (node.level - 1)] if node.level > 1 else pkg
            mod = base + (node.module.split(".") if node.module else [])
            targets = (["/".join(mod + [a.name]) for a in node.names] if not node.module
                       else ["/".join(mod)])
            for tgt in targets:
                tgt = tgt or "__init__"
                if tgt not in have and tgt + "/__init__" not in have and "/".join(mod) not in have:
                    raise BuildError(f"{p.relative_to(_PACKAGE_DIR)} imports {tgt.replace('/', '.')}, "
                                     "which an FMU does not carry (fmu.build.BUNDLE)")


def _source_hash() -> str:
    """SHA-256 over what decides an FMU's code: bundled modules, entry template, pythonfmu."""
    h = hashlib.sha256(_ENTRY_TEMPLATE.encode() + b"\0" + _pythonfmu_version().encode())
    for p in _core_files():
        h.update(p.relative_to(_PACKAGE_DIR).as_posix().encode() + b"\0" + p.read_bytes() + b"\0")
    if SHELL_SOURCE.is_file():
        h.update(SHELL_SOURCE.name.encode() + b"\0" + SHELL_SOURCE.read_bytes() + b"\0")
    return h.hexdigest()


def fmu_names(params: ParameterSet) -> tuple[str, str, str]:
    """Model identifier, core package name and hash12 of a build.

    ``hash12`` is the first 12 hex digits of SHA-256 over the parameter set's content hash and
    the bundled jointfmu source, so a new parameter set or a new jointfmu version gives new names.

    Returns
    -------
    (str, str, str)
        ``("Jfmu_<name>_<hash12>", "jfmu_core_<hash12>", hash12)``.
    """
    h = hashlib.sha256((params.content_hash() + ":" + _source_hash()).encode()).hexdigest()[:12]
    return f"Jfmu_{params.name}_{h}", f"jfmu_core_{h}", h


def _slug(text: str) -> str:
    s = re.sub(r"[^A-Za-z0-9]+", "-", text).strip("-").lower()
    return s or "build"


def default_output_path(params: ParameterSet, cwd: Path | None = None) -> Path:
    """``build/<name>_<build-slug>.fmu`` in the repository's ``build/`` when ``cwd`` is inside
    the jointfmu repository, else in ``./build/``."""
    cwd = Path.cwd() if cwd is None else Path(cwd)
    folder = cwd / "build"
    for d in (cwd, *cwd.parents):
        pp = d / "pyproject.toml"
        try:
            if pp.is_file() and re.search(r'^name\s*=\s*"jointfmu"', pp.read_text(), re.M):
                folder = d / "build"
                break
        except OSError:
            continue
    return folder / f"{params.name}_{_slug(params.build)}.fmu"


# ------------------------------------------------------------------------- the native binary
def _binary_choice(binary: str | None) -> str:
    """``binary`` checked, or the default: ``$JOINTFMU_FMU_BINARY``, else ``"auto"``."""
    source = "binary"
    if binary is None:
        binary, source = os.environ.get(BINARY_ENV) or "auto", f"${BINARY_ENV}"
    if binary not in BINARY_CHOICES:
        raise BuildError(f"{source} = {binary!r} is not a binary choice: allowed are "
                         + ", ".join(repr(c) for c in BINARY_CHOICES))
    return binary


def _platform_folder() -> str | None:
    """The FMI 2.0 binaries folder of this machine (sec. 2.3) where the shell can be built."""
    system = platform.system()
    if sys.maxsize <= 2 ** 32 or system not in ("Linux", "Darwin"):
        return None
    return {"Linux": "linux64", "Darwin": "darwin64"}[system]


def _compile_shell(folder: Path, ident: str) -> tuple[Path | None, str]:
    """Compile :data:`SHELL_SOURCE` into ``folder/<ident>.<ext>``.

    Returns (the library, "") or (None, why it could not be compiled).  The library links no
    libpython: the Python C API comes from the host process, as with pythonfmu's binary.
    """
    plat = _platform_folder()
    if plat is None:
        return None, (f"the native binary is built on 64-bit Linux and macOS only (this is "
                      f"{platform.system()} {platform.machine()})")
    if not SHELL_SOURCE.is_file():
        return None, f"its source {SHELL_SOURCE} is missing"
    include = sysconfig.get_paths().get("include")
    if not include or not (Path(include) / "Python.h").is_file():
        return None, f"no Python headers (Python.h) in {include!r}"
    cc = shlex.split(os.environ.get("CC") or "cc")
    if not cc or shutil.which(cc[0]) is None:
        return None, (f"no C compiler: {cc[0] if cc else '$CC'!r} not found (set $CC or "
                      "install cc)")
    ext = "dylib" if plat == "darwin64" else "so"
    out = folder / f"{ident}.{ext}"
    cmd = cc + ["-shared", "-fPIC", "-O2", "-fvisibility=hidden", f"-I{include}", "-o", str(out),
                str(SHELL_SOURCE)]
    if plat == "darwin64":
        cmd[-2:-2] = ["-undefined", "dynamic_lookup"]
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    except (OSError, subprocess.SubprocessError) as exc:
        return None, f"{' '.join(cmd[:1])} failed to run: {exc}"
    if proc.returncode != 0 or not out.is_file():
        tail = (proc.stderr or proc.stdout).strip().splitlines()[-5:]
        return None, (f"compiling {SHELL_SOURCE.name} with {' '.join(cc)} failed (exit "
                      f"{proc.returncode}): " + " | ".join(tail))
    return out, ""


def _replace_binary(zip_in: zipfile.ZipFile, item: zipfile.ZipInfo,
                    native: Path | None) -> bytes:
    """The bytes of archive member ``item``: the native library (named after the model
    identifier, as pythonfmu's binary is) in place of pythonfmu's binary for this platform,
    every other member unchanged."""
    if native is not None and item.filename == f"binaries/{_platform_folder()}/{native.name}":
        return native.read_bytes()
    return zip_in.read(item.filename)


# --------------------------------------------------------------------------------- build
_ENTRY_TEMPLATE = '''\
"""FMU entry module generated by jointfmu build {version} for parameter set {set_id!r}.

Parameter-set content hash: sha256 {content_hash}.
pythonfmu imports this module by the name in slavemodule.txt and shares modules by name inside a
process, so module, class ({ident}) and the bundled jointfmu package ({core}) carry a name of
their own.  The package is loaded from the folder beside this file with importlib.
"""
import importlib as _importlib
import importlib.util as _ilu
import sys as _sys
from pathlib import Path as _Path

_CORE = {core!r}

# pythonfmu 0.7.0 looks the slave class up (findClass in PySlaveInstance.cpp) by running this
# file again in this module's namespace at every instantiation, and then releases a reference to
# that namespace which it never took.  Give it one more reference each time, or the namespace
# is freed after a few instances in one process and the next instantiation fails or crashes.
globals().setdefault("_NAMESPACE_REFS", []).append(globals())


def _load_core():
    if _CORE in _sys.modules:
        return _sys.modules[_CORE]
    folder = _Path(__file__).resolve().parent / _CORE
    spec = _ilu.spec_from_file_location(_CORE, folder / "__init__.py",
                                        submodule_search_locations=[str(folder)])
    module = _ilu.module_from_spec(spec)
    _sys.modules[_CORE] = module
    try:
        spec.loader.exec_module(module)
    except BaseException:
        del _sys.modules[_CORE]
        raise
    return module


_load_core()
_slave = _importlib.import_module(_CORE + ".fmu.slave")


class {ident}(_slave.JointSlave):
    """Modal Iwan model {set_id!r} (jointfmu)."""
'''


def build_fmu(params_path: str | os.PathLike, output: str | os.PathLike | None = None,
              *, cwd: Path | None = None, binary: str | None = None) -> BuildResult:
    """Build the FMI 2.0 co-simulation FMU of a parameter file.

    Parameters
    ----------
    params_path : path-like
        A ``jointfmu-params/1`` TOML file.
    output : path-like, optional
        The ``.fmu`` to write; default :func:`default_output_path`.  Replaced atomically.
    cwd : Path, optional
        Folder that decides the default output (default the current folder).
    binary : {"auto", "native", "pythonfmu"}, optional
        The FMU's binary: jointfmu's native shell where it can be compiled, else pythonfmu's
        (``"auto"``); the native shell or a :class:`BuildError` (``"native"``); pythonfmu's
        (``"pythonfmu"``).  Default ``$JOINTFMU_FMU_BINARY``, else ``"auto"``.

    Returns
    -------
    BuildResult

    Raises
    ------
    ParameterError
        The parameter file is invalid (nothing written).
    BuildError
        Packaging failed, ``binary`` is not allowed, or ``binary="native"`` and the shell
        cannot be compiled (nothing written, an existing ``output`` untouched).
    """
    choice = _binary_choice(binary)
    params = load_parameter_set(params_path)
    out = Path(output) if output is not None else default_output_path(params, cwd)
    if out.suffix.lower() != ".fmu":
        raise BuildError(f"output {str(out)!r} must end in '.fmu'")
    ident, core, _ = fmu_names(params)
    try:
        from pythonfmu.builder import FmuBuilder
    except ImportError as exc:  # pragma: no cover - pythonfmu is a dependency
        raise BuildError(f"building an FMU needs pythonfmu: {exc}") from exc
    if not FmuBuilder.has_binary():
        raise BuildError("pythonfmu ships no FMU binary for this platform")

    out.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix="jointfmu_build_"))
    tmp_fmu = None
    path_added = str(staging / "src")
    modules_before = set(sys.modules)
    try:
        src = staging / "src"
        src.mkdir()
        core_dir = src / core
        core_dir.mkdir()
        files = _core_files()
        _check_bundle(files)
        for f in files:
            dest = core_dir / f.relative_to(_PACKAGE_DIR)
            dest.parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(f, dest)
        native, why = None, "pythonfmu's binary was asked for (binary='pythonfmu')"
        if choice != "pythonfmu":
            cdir = staging / "native"
            cdir.mkdir()
            native, why = _compile_shell(cdir, ident)
            if native is None and choice == "native":
                raise BuildError(f"the native FMU binary cannot be built: {why}; build with "
                                 "binary='auto' or 'pythonfmu' to keep pythonfmu's binary")
        (src / PARAMETER_FILE).write_text(params.to_toml(), encoding="utf-8")
        info = _build_info(params, ident, core, native, why)
        (src / BUILD_INFO_FILE).write_text(json.dumps(info, indent=2) + "\n", encoding="utf-8")
        (src / "requirements.txt").write_text(
            "# Python packages the FMU's host interpreter needs (pip install -r requirements.txt)\n"
            + "".join(r + "\n" for r in HOST_REQUIREMENTS)
            + "# optional, the compiled fast path (much faster steps):\n"
            + "".join(f"# {r}\n" for r in HOST_OPTIONAL), encoding="utf-8")
        script = src / f"{ident}.py"
        script.write_text(_ENTRY_TEMPLATE.format(
            version=_jointfmu_version(), set_id=params.set_id, content_hash=params.content_hash(),
            ident=ident, core=core), encoding="utf-8")

        raw = staging / f"{ident}.fmu"
        FmuBuilder.build_FMU(
            script, dest=raw,
            project_files=[core_dir, src / PARAMETER_FILE, src / BUILD_INFO_FILE,
                           src / "requirements.txt"],
            canGetAndSetFMUstate=True, canSerializeFMUstate=True,
            canHandleVariableCommunicationStepSize=True, canInterpolateInputs=False,
            canBeInstantiatedOnlyOncePerProcess=False, needsExecutionTool=True)
        fd, tmp_name = tempfile.mkstemp(prefix=f".{out.name}.", suffix=".part", dir=out.parent)
        os.close(fd)
        tmp_fmu = Path(tmp_name)
        _complete_fmu(raw, tmp_fmu, params, ident, core, native)
        publish(tmp_fmu, out)
        tmp_fmu = None
    except JointFmuError:
        raise
    except Exception as exc:
        raise BuildError(f"building the FMU of {params.set_id!r} into {str(out)!r} failed: "
                         f"{type(exc).__name__}: {exc}") from exc
    finally:
        if tmp_fmu is not None:
            tmp_fmu.unlink(missing_ok=True)
        shutil.rmtree(staging, ignore_errors=True)
        # pythonfmu imported the entry module (and so the core) from the staging folder and left
        # that folder on sys.path: forget both, so that loading the built FMU in this process
        # imports it from the FMU's own resources.
        while path_added in sys.path:
            sys.path.remove(path_added)
        for name in set(sys.modules) - modules_before:
            if name == ident or name == core or name.startswith(core + "."):
                del sys.modules[name]
    return BuildResult(out, ident, core, params.set_id, params.content_hash(), info["binary"])


def _jointfmu_version() -> str:
    try:
        from importlib.metadata import version
        return version("jointfmu")
    except Exception:
        return "0+unknown"


def _pythonfmu_version() -> str:
    try:
        from pythonfmu import __version__
        return str(__version__)
    except Exception:
        return "unknown"


def _build_info(params: ParameterSet, ident: str, core: str, native: Path | None = None,
                why: str = "") -> dict:
    plat = _platform_folder()
    if native is not None:
        binary = {"kind": "native", "platform": plat,
                  "description": "jointfmu's native FMI 2.0 shell (native/fmi2_shell.c): get/set "
                                 "of inputs and outputs without Python; pythonfmu's binary on "
                                 "other platforms"}
    else:
        binary = {"kind": "pythonfmu", "platform": plat,
                  "description": "pythonfmu's binary on every platform", "reason": why}
    return {
        "set_id": params.set_id,
        "name": params.name,
        "build": params.build,
        "content_hash": params.content_hash(),
        "model_identifier": ident,
        "core_package": core,
        "jointfmu_version": _jointfmu_version(),
        "pythonfmu_version": _pythonfmu_version(),
        "host_requirements": list(HOST_REQUIREMENTS),
        "host_optional": list(HOST_OPTIONAL),
        "built_with_python": sys.version.split()[0],
        "binary": binary,
    }


def _fmt(x: float) -> str:
    # repr round-trips every double exactly (pythonfmu writes %.16g, which does not always)
    return repr(float(x))


def _default_experiment(params: ParameterSet) -> tuple[float, float]:
    """(stopTime, stepSize): about 20 periods of the lowest mode, and a step of about a tenth of
    the highest mode's period rounded down to 1, 2 or 5 times a power of ten."""
    f = [m.f0 for m in params.modes]
    stop = 20.0 / min(f)
    step = 0.1 / max(f)

    def nice(x: float, up: bool) -> float:
        e = math.floor(math.log10(x))
        for m in ((1, 2, 5, 10) if up else (10, 5, 2, 1)):
            v = m * 10.0 ** e
            if (up and v >= x) or (not up and v <= x):
                return float(f"{v:.6g}")
        return x
    return nice(stop, True), nice(step, False)


def _complete_fmu(raw: Path, dest: Path, params: ParameterSet, ident: str, core: str,
                  native: Path | None = None) -> None:
    """Copy the pythonfmu archive ``raw`` to ``dest`` with a completed modelDescription.xml
    (and the native binary ``native`` in place of pythonfmu's for this platform)."""
    with zipfile.ZipFile(raw) as zin:
        xml = zin.read("modelDescription.xml")
        root = _complete_model_description(ET.fromstring(xml), params, ident, core)
        ET.indent(root)
        text = ET.tostring(root, encoding="UTF-8", xml_declaration=True)
        with zipfile.ZipFile(dest, "w", compression=zipfile.ZIP_DEFLATED) as zout:
            zout.writestr("modelDescription.xml", text)
            for item in zin.infolist():
                if item.filename == "modelDescription.xml" or "__pycache__" in item.filename:
                    continue
                zout.writestr(item, _replace_binary(zin, item, native),
                              compress_type=zipfile.ZIP_DEFLATED)
            if native is not None:    # a platform pythonfmu ships no binary for (macOS)
                target = f"binaries/{_platform_folder()}/{native.name}"
                if target not in zin.namelist():
                    zout.write(native, target, compress_type=zipfile.ZIP_DEFLATED)


def _complete_model_description(root: ET.Element, params: ParameterSet, ident: str,
                                core: str) -> ET.Element:
    """Units, descriptions, exact start values, ModelStructure, DefaultExperiment, identity.

    Element order follows the FMI 2.0 schema (fmi2ModelDescription.xsd): CoSimulation,
    UnitDefinitions, TypeDefinitions, LogCategories, DefaultExperiment, VendorAnnotations,
    ModelVariables, ModelStructure.
    """
    table = variable_table(params)
    cs = root.find("CoSimulation")
    if cs is None or cs.get("modelIdentifier") != ident:
        raise BuildError(f"pythonfmu wrote an unexpected model description (model identifier "
                         f"{None if cs is None else cs.get('modelIdentifier')!r}, expected {ident!r})")
    text = params.description.strip()
    root.set("description", (text + " " if text else "")
             + f"[jointfmu parameter set {params.set_id}, sha256 {params.content_hash()}]")
    root.set("generationTool", f"jointfmu {_jointfmu_version()} (PythonFMU {_pythonfmu_version()})")
    root.set("version", params.short_hash())
    root.set("variableNamingConvention", "structured")
    if params.provenance.fitted_by:
        root.set("author", params.provenance.fitted_by)

    for tag in ("UnitDefinitions", "DefaultExperiment", "VendorAnnotations", "ModelStructure"):
        for el in root.findall(tag):
            root.remove(el)
    children = list(root)
    pos = children.index(cs) + 1

    units = ET.Element("UnitDefinitions")
    for name in sorted({v.unit for v in table}):
        u = ET.SubElement(units, "Unit", name=name)
        exps = UNITS[name]
        if exps is not None:
            ET.SubElement(u, "BaseUnit", {k: str(v) for k, v in exps.items()})
    root.insert(pos, units)

    stop, step = _default_experiment(params)
    mv = root.find("ModelVariables")
    mv_pos = list(root).index(mv)
    root.insert(mv_pos, ET.Element("DefaultExperiment", startTime="0.0", stopTime=_fmt(stop),
                                   stepSize=_fmt(step)))
    va = ET.Element("VendorAnnotations")
    tool = ET.SubElement(va, "Tool", name="jointfmu")
    ET.SubElement(tool, "ParameterSet", id=params.set_id, name=params.name, build=params.build,
                  contentHash=params.content_hash(), modelIdentifier=ident, corePackage=core)
    root.insert(mv_pos + 1, va)

    scalars = mv.findall("ScalarVariable")
    if [s.get("name") for s in scalars] != [v.name for v in table]:
        raise BuildError("the slave registered other variables than the variable table lists")
    for k, (sv, var) in enumerate(zip(scalars, table)):
        if int(sv.get("valueReference")) != k:
            raise BuildError(f"{var.name}: value reference {sv.get('valueReference')} != {k}")
        sv.set("description", var.description)
        sv.set("causality", var.causality)
        sv.set("variability", var.variability)
        if var.initial is None:
            sv.attrib.pop("initial", None)
        else:
            sv.set("initial", var.initial)
        real = sv.find("Real")
        real.set("unit", var.unit)
        if var.start is None:
            real.attrib.pop("start", None)
        else:
            real.set("start", _fmt(var.start))

    # FMI 2.0 sec. 2.2.8: every output in Outputs; InitialUnknowns lists the outputs with
    # initial="approx" or "calculated" (here all of them), in value-reference order.  Outputs
    # change only inside doStep, so no output depends directly on an input (dependencies="").
    ms = ET.SubElement(root, "ModelStructure")
    outputs = ET.SubElement(ms, "Outputs")
    initial = ET.SubElement(ms, "InitialUnknowns")
    for k, var in enumerate(table):
        if var.is_output:
            ET.SubElement(outputs, "Unknown", index=str(k + 1), dependencies="")
            ET.SubElement(initial, "Unknown", index=str(k + 1))
    return root


# ---------------------------------------------------------------------------------- info
def read_fmu_info(fmu_path: str | os.PathLike) -> dict:
    """Identity, modes, interface and host requirements of a jointfmu FMU.

    Returns
    -------
    dict
        Keys ``path``, ``set_id``, ``content_hash``, ``model_identifier``, ``build_info``
        (the bundled jointfmu_build.json), ``params`` (:class:`ParameterSet`), ``variables``
        (list of dicts name, causality, unit, description, start), ``requirements`` (list of
        str), ``default_experiment`` (dict).

    Raises
    ------
    InputError
        When the file is not an FMU built by jointfmu.
    """
    path = Path(fmu_path)
    try:
        with zipfile.ZipFile(path) as z:
            names = set(z.namelist())
            md = ET.fromstring(z.read("modelDescription.xml"))
            for need in (f"resources/{PARAMETER_FILE}", f"resources/{BUILD_INFO_FILE}"):
                if need not in names:
                    raise InputError(f"{str(path)!r} is an FMU but not one built by jointfmu "
                                     f"(no {need})")
            info = json.loads(z.read(f"resources/{BUILD_INFO_FILE}"))
            toml_text = z.read(f"resources/{PARAMETER_FILE}")
            req = z.read("resources/requirements.txt").decode() \
                if "resources/requirements.txt" in names else ""
    except (OSError, zipfile.BadZipFile, KeyError, ET.ParseError) as exc:
        raise InputError(f"{str(path)!r} is not a readable FMU: {exc}") from exc
    with tempfile.TemporaryDirectory(prefix="jointfmu_info_") as d:
        p = Path(d) / PARAMETER_FILE
        p.write_bytes(toml_text)
        params = load_parameter_set(p)
    variables = []
    for sv in md.iter("ScalarVariable"):
        real = sv.find("Real")
        variables.append({
            "name": sv.get("name"), "causality": sv.get("causality"),
            "unit": real.get("unit") if real is not None else None,
            "start": real.get("start") if real is not None else None,
            "description": sv.get("description", ""),
        })
    de = md.find("DefaultExperiment")
    return {
        "path": path,
        "set_id": info.get("set_id", params.set_id),
        "content_hash": info.get("content_hash"),
        "hash_ok": info.get("content_hash") == params.content_hash(),
        "model_identifier": info.get("model_identifier"),
        "build_info": info,
        "params": params,
        "variables": variables,
        "requirements": [ln.strip() for ln in req.splitlines()
                         if ln.strip() and not ln.lstrip().startswith("#")],
        "default_experiment": dict(de.attrib) if de is not None else {},
    }


def format_fmu_info(info: Mapping) -> str:
    """Human-readable text of :func:`read_fmu_info`."""
    p: ParameterSet = info["params"]
    lines = [
        f"FMU:               {info['path']}",
        f"parameter set:     {info['set_id']}",
        f"content hash:      sha256 {info['content_hash']}"
        + ("" if info["hash_ok"] else "  (DOES NOT MATCH the bundled parameters)"),
        f"model identifier:  {info['model_identifier']}",
        f"built with:        jointfmu {info['build_info'].get('jointfmu_version')}, "
        f"PythonFMU {info['build_info'].get('pythonfmu_version')}",
    ]
    if p.description:
        lines.append(f"description:       {p.description}")
    if info.get("values_from"):
        lines.append(f"mode values:       from {info['values_from']} (applied as start values "
                     "in place of the FMU's own)")
    lines.append(f"modes ({p.n_modes}):")
    lines.append(f"  {'#':>2} {'label':<12} {'f0 [Hz]':>12} {'zeta':>10} {'Fs [N/kg^0.5]':>14} "
                 f"{'Kt [1/s2]':>12} {'chi':>8} {'beta':>8}")
    for i, m in enumerate(p.modes, 1):
        j = m.joint
        lines.append(f"  {i:>2} {m.label:<12} {m.f0:>12.6g} {m.zeta:>10.4g} {j.Fs:>14.6g} "
                     f"{j.Kt:>12.6g} {j.chi:>8.4g} {j.beta:>8.4g}")

    def block(title, causality):
        vs = [v for v in info["variables"] if v["causality"] == causality]
        lines.append(f"{title} ({len(vs)}):")
        width = max((len(v["name"]) for v in vs), default=0)
        for v in vs:
            lines.append(f"  {v['name']:<{width}}  [{v['unit']}]  {v['description']}")

    block("parameters", "parameter")
    block("inputs", "input")
    block("outputs", "output")
    de = info["default_experiment"]
    if de:
        lines.append("default experiment: " + ", ".join(f"{k}={v}" for k, v in de.items()))
    bi = info["build_info"]
    b = bi.get("binary") or {"kind": "pythonfmu", "reason": "built before jointfmu had its own"}
    if b.get("kind") == "native":
        lines.append(f"FMU binary:        jointfmu's native FMI shell for {b.get('platform')} "
                     "(get/set of inputs and outputs without Python); pythonfmu's elsewhere")
    else:
        lines.append(f"FMU binary:        pythonfmu's ({b.get('reason') or 'no reason recorded'})")
    lines.append("host requirements: the process must run CPython or load libpython (the FMU "
                 "binary links to no libpython and starts the interpreter if the host has not; "
                 "fmpy and other Python hosts qualify; built "
                 f"with Python {bi.get('built_with_python', '?')}), with "
                 + ", ".join(info["requirements"])
                 + (f"; optional: {', '.join(bi['host_optional'])}" if bi.get("host_optional")
                    else ""))
    return "\n".join(lines)


# ------------------------------------------------------------------------------ simulate
def read_input_csv(path: str | os.PathLike, allowed: Sequence[str]) -> tuple[list[float],
                                                                              dict[str, list[float]]]:
    """Read an input CSV: a ``time`` column [s] (strictly increasing) and input columns.

    Parameters
    ----------
    path : path-like
        The CSV file (header row, comma separated).
    allowed : sequence of str
        The FMU's input variable names.

    Returns
    -------
    (list of float, dict of str -> list of float)
        Times, shape (M,), and each input column, shape (M,).

    Raises
    ------
    InputError
        Naming the file, the bad column, row or value, and what is allowed.
    """
    path = Path(path)
    allowed_text = "time, " + ", ".join(allowed) if allowed else "time"
    try:
        with open(path, newline="", encoding="utf-8") as f:
            rows = list(csv.reader(f))
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read input CSV {str(path)!r}: {exc}") from exc
    rows = [r for r in rows if r and any(c.strip() for c in r)]
    if not rows:
        raise InputError(f"input CSV {str(path)!r} is empty: it needs a header row with "
                         f"columns from: {allowed_text}")
    header = [c.strip() for c in rows[0]]
    if "time" not in header:
        raise InputError(f"input CSV {str(path)!r} has no 'time' column; allowed columns: "
                         f"{allowed_text}")
    bad = [c for c in header if c != "time" and c not in allowed]
    if bad:
        raise InputError(f"input CSV {str(path)!r}: unknown column(s) {', '.join(map(repr, bad))}; "
                         f"allowed columns: {allowed_text}")
    dup = sorted({c for c in header if header.count(c) > 1})
    if dup:
        raise InputError(f"input CSV {str(path)!r}: column(s) {', '.join(map(repr, dup))} appear "
                         "more than once")
    cols: dict[str, list[float]] = {c: [] for c in header}
    for n, row in enumerate(rows[1:], start=2):
        if len(row) != len(header):
            raise InputError(f"input CSV {str(path)!r} line {n}: {len(row)} fields, the header "
                             f"has {len(header)}")
        for c, cell in zip(header, row):
            try:
                x = float(cell)
            except ValueError:
                raise InputError(f"input CSV {str(path)!r} line {n}, column {c!r}: {cell!r} is "
                                 "not a number") from None
            if not math.isfinite(x):
                raise InputError(f"input CSV {str(path)!r} line {n}, column {c!r}: {cell!r}; "
                                 "allowed are finite numbers")
            cols[c].append(x)
    t = cols.pop("time")
    if not t:
        raise InputError(f"input CSV {str(path)!r} has a header but no data rows")
    for n in range(1, len(t)):
        if not t[n] > t[n - 1]:
            raise InputError(f"input CSV {str(path)!r} line {n + 2}: time {t[n]!r} s does not "
                             f"increase (previous {t[n - 1]!r} s); times must strictly increase")
    return t, cols


def run_fmu(fmu_path: str | os.PathLike, times: Sequence[float],
            inputs: Mapping[str, Sequence[float]], stop_time: float | None = None,
            step: float | None = None, start_values: Mapping[str, float] | None = None,
            ) -> tuple[list[str], list[list[float]]]:
    """Run a jointfmu FMU with fmpy, inputs held between the given times.

    The input value at each communication point is that of the last row with ``time <= t``
    (zero before the first row); the communication grid is ``start, start + step, ...`` with
    every input time added, so a change in an input always starts a step.

    Parameters
    ----------
    fmu_path : path-like
    times : sequence of float, shape (M,)
        Input times [s], strictly increasing.
    inputs : mapping str -> sequence of float, each shape (M,)
        Input variable name -> values.
    stop_time : float, optional
        Default the last input time, or the DefaultExperiment stopTime without inputs.
    step : float, optional
        Communication step [s]; default the DefaultExperiment stepSize.
    start_values : mapping, optional
        Parameter values to set at instantiation.

    Returns
    -------
    (list of str, list of list of float)
        Column names (``time`` then every output) and rows.

    Raises
    ------
    InputError
        Bad step or stop time.
    SimulationError
        A step failed (the FMU's log message included).
    """
    from fmpy import extract, read_model_description
    from fmpy.fmi2 import FMU2Slave

    from ..errors import SimulationError

    md = read_model_description(str(fmu_path))
    by_name = {v.name: v for v in md.modelVariables}
    de = md.defaultExperiment
    if step is None:
        step = float(de.stepSize) if de is not None and de.stepSize else 1e-3
    if not (math.isfinite(step) and step > 0):
        raise InputError(f"--step {step!r}: allowed is a finite step > 0 s")
    if stop_time is None:
        stop_time = float(times[-1]) if len(times) else float(de.stopTime if de else 1.0)
    if not (math.isfinite(stop_time) and stop_time >= 0):
        raise InputError(f"--stop-time {stop_time!r}: allowed is a finite time >= 0 s")
    for name in inputs:
        if name not in by_name or by_name[name].causality != "input":
            allowed = [v.name for v in md.modelVariables if v.causality == "input"]
            raise InputError(f"{name!r} is not an input of this FMU; inputs: {', '.join(allowed)}")
    for name in (start_values or {}):
        if name not in by_name or by_name[name].causality != "parameter":
            allowed = [v.name for v in md.modelVariables if v.causality == "parameter"]
            raise InputError(f"{name!r} is not a parameter of this FMU; parameters: "
                             f"{', '.join(allowed)}")
    outputs = [v for v in md.modelVariables if v.causality == "output"]
    in_names = list(inputs)
    in_vrs = [by_name[n].valueReference for n in in_names]
    out_vrs = [v.valueReference for v in outputs]

    n_steps = int(math.floor(stop_time / step + 1e-9))
    grid = sorted({k * step for k in range(n_steps + 1)} | {float(t) for t in times
                                                             if 0.0 < t < stop_time}
                  | {float(stop_time)})
    messages: list[str] = []

    from fmpy.fmi2 import fmi2CallbackFunctions, fmi2CallbackLoggerTYPE, \
        fmi2CallbackAllocateMemoryTYPE, fmi2CallbackFreeMemoryTYPE
    from fmpy import calloc, free

    def logger(env, instance, status, category, message):
        messages.append(message.decode("utf-8", "replace"))

    callbacks = fmi2CallbackFunctions()
    callbacks.logger = fmi2CallbackLoggerTYPE(logger)
    callbacks.allocateMemory = fmi2CallbackAllocateMemoryTYPE(calloc)
    callbacks.freeMemory = fmi2CallbackFreeMemoryTYPE(free)

    unzipdir = extract(str(fmu_path))
    fmu = FMU2Slave(guid=md.guid, unzipDirectory=unzipdir,
                    modelIdentifier=md.coSimulation.modelIdentifier, instanceName="jointfmu")
    rows: list[list[float]] = []
    try:
        fmu.instantiate(callbacks=callbacks, loggingOn=True)
        try:
            for name, value in (start_values or {}).items():
                fmu.setReal([by_name[name].valueReference], [float(value)])
            fmu.setupExperiment(startTime=0.0)
            fmu.enterInitializationMode()
            fmu.exitInitializationMode()
            row_idx = -1
            for k, t in enumerate(grid):
                while row_idx + 1 < len(times) and times[row_idx + 1] <= t + 1e-12:
                    row_idx += 1
                if in_vrs:
                    vals = [inputs[n][row_idx] if row_idx >= 0 else 0.0 for n in in_names]
                    fmu.setReal(in_vrs, vals)
                if k == 0:
                    rows.append([t] + list(fmu.getReal(out_vrs)))
                if k + 1 == len(grid):
                    break
                try:
                    fmu.doStep(currentCommunicationPoint=t, communicationStepSize=grid[k + 1] - t)
                except Exception as exc:
                    raise SimulationError(f"step at t = {t!r} s failed: "
                                          + ("; ".join(messages[-3:]) or str(exc))) from None
                rows.append([grid[k + 1]] + list(fmu.getReal(out_vrs)))
            fmu.terminate()
        finally:
            fmu.freeInstance()
    finally:
        shutil.rmtree(unzipdir, ignore_errors=True)
    return ["time"] + [v.name for v in outputs], rows


def write_csv_atomic(path: str | os.PathLike, header: Sequence[str],
                     rows: Iterable[Sequence[float]]) -> Path:
    """Write a CSV atomically (temp file beside it, then ``os.replace``); floats with repr."""
    path = Path(path)
    with atomic_write(path, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(header)
        for r in rows:
            w.writerow([repr(float(x)) for x in r])
    return path


# ----------------------------------------------------------------------- SSP parameter values
_SSV_NS = "http://ssp-standard.org/SSP1/SystemStructureParameterValues"
_SSC_NS = "http://ssp-standard.org/SSP1/SystemStructureCommon"


def parameter_values_ssv(params: ParameterSet) -> bytes:
    """The fitted mode values of a parameter set as an SSP 1.0 parameter-value file (.ssv).

    Parameter names are the FMU's parameter names (``mode[i].f0`` ... ``mode[i].joint.beta``), so
    an SSP tool can apply the file to any jointfmu FMU of the same structure.  SSP 1.0
    (SystemStructureCommon, ``TUnit``) needs a ``BaseUnit`` with integer exponents on every
    unit, so values in mass-normalized units (``Fs`` in N/kg^0.5) carry no ``unit`` attribute;
    their unit is in the parameter's description.

    Returns
    -------
    bytes
        UTF-8 XML.
    """
    ET.register_namespace("ssv", _SSV_NS)
    ET.register_namespace("ssc", _SSC_NS)
    v, c = f"{{{_SSV_NS}}}", f"{{{_SSC_NS}}}"
    root = ET.Element(v + "ParameterSet", {
        "version": "1.0", "name": params.set_id,
        "description": f"fitted mode values of {params.set_id} "
                       f"(parameter-set sha256 {params.content_hash()})",
        "generationTool": f"jointfmu {_jointfmu_version()}",
    })
    if params.provenance.fitted_by:
        root.set("author", params.provenance.fitted_by)
    plist = ET.SubElement(root, v + "Parameters")
    used = set()
    for var in variable_table(params):
        if var.kind != "parameter":
            continue
        p = ET.SubElement(plist, v + "Parameter", name=var.name,
                          description=f"{var.description} [{var.unit}]")
        real = ET.SubElement(p, v + "Real", value=_fmt(var.start))
        if UNITS[var.unit] is not None:
            real.set("unit", var.unit)
            used.add(var.unit)
    units = ET.SubElement(root, v + "Units")
    for name in sorted(used):
        u = ET.SubElement(units, c + "Unit", name=name)
        ET.SubElement(u, c + "BaseUnit", {k: str(e) for k, e in UNITS[name].items()})
    ann = ET.SubElement(ET.SubElement(root, v + "Annotations"), c + "Annotation",
                        type="org.jointfmu.parameterset")
    ET.SubElement(ann, "ParameterSet", id=params.set_id, contentHash=params.content_hash())
    ET.indent(root)
    return ET.tostring(root, encoding="UTF-8", xml_declaration=True)


def write_ssv(params_path: str | os.PathLike, output: str | os.PathLike | None = None,
              *, cwd: Path | None = None) -> Path:
    """Write :func:`parameter_values_ssv` of a parameter file atomically.

    Default output: :func:`default_output_path` with the suffix ``.ssv``.
    """
    params = load_parameter_set(params_path)
    out = Path(output) if output is not None else \
        default_output_path(params, cwd).with_suffix(".ssv")
    if out.suffix.lower() != ".ssv":
        raise InputError(f"output {str(out)!r} must end in '.ssv'")
    with atomic_write(out, "wb") as f:
        f.write(parameter_values_ssv(params))
    return out


# ------------------------------------------------------------- applying SSP parameter values
_SSV_SCHEMA = "SystemStructureParameterValues.xsd"
_MODE_PARAM_RE = re.compile(r"^mode\[([1-9][0-9]*)\]\.(?:(f0|zeta)|joint\.(Fs|Kt|chi|beta))$")


@lru_cache(maxsize=1)
def _ssv_schema():
    """The SSP 1.0 SystemStructureParameterValues schema, as shipped with fmpy (it imports
    SystemStructureCommon.xsd from the same folder)."""
    from lxml import etree
    import fmpy.ssp.ssd as ssd

    return etree.XMLSchema(file=str(Path(ssd.__file__).resolve().parent / "schema" / _SSV_SCHEMA))


def _base_parameter_set(fmu_or_params) -> ParameterSet | None:
    if fmu_or_params is None or isinstance(fmu_or_params, ParameterSet):
        return fmu_or_params
    p = Path(fmu_or_params)
    return read_fmu_info(p)["params"] if p.suffix.lower() == ".fmu" else load_parameter_set(p)


def _allowed_parameters_text(n_modes: int | None) -> str:
    fields = "mode[i].f0, mode[i].zeta, " + ", ".join(f"mode[i].joint.{f}"
                                                      for f in ("Fs", "Kt", "chi", "beta"))
    modes = f"i = 1..{n_modes}" if n_modes else "i = 1, 2, ..."
    return f"{fields} ({modes}) and steps_per_period"


def read_parameter_values(path: str | os.PathLike, fmu_or_params=None) -> dict[str, float]:
    """Read an SSP 1.0 parameter-values file (.ssv) as FMU start values, checked.

    The file is validated against the SSP 1.0 schema ``SystemStructureParameterValues.xsd``
    (the copy shipped with fmpy); then every parameter must be a ``Real`` with a finite value,
    given once, named like an FMU parameter (``mode[i].f0`` ... ``mode[i].joint.beta``,
    ``steps_per_period``), with no ``unit`` or the FMU's unit (SSP unit conversion is not
    done).  With a structure to apply them to, the names must be parameters of its FMU and the
    values are checked with :meth:`ParameterSet.with_mode_values`, so an out-of-range value gets
    the message of ``jointfmu check``.  Without one, a mode whose six values are all given is
    range-checked on its own.

    Parameters
    ----------
    path : path-like
        The ``.ssv`` file.
    fmu_or_params : path-like or ParameterSet, optional
        A jointfmu FMU (``.fmu``), a parameter file, or a parameter set: the structure the
        values will be applied to.

    Returns
    -------
    dict of str -> float
        FMU parameter name -> value, in file order (FMU units: Hz, -, N/sqrt(kg), 1/s^2).

    Raises
    ------
    InputError
        The file cannot be read, is not XML, or is not a valid SSP 1.0 parameter-values file.
    ParameterError
        Listing every bad parameter (unknown name with the allowed names and a did-you-mean,
        non-Real type, non-finite value, repeated name, other unit, out of range).
    """
    from lxml import etree

    from ..physics.integrate import DEFAULT_STEPS_PER_PERIOD, MIN_STEPS_PER_PERIOD

    path = Path(path)
    src = str(path)
    what = "an SSP 1.0 parameter-values file (.ssv)"
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read parameter-values file {src!r}: {exc}") from exc
    try:
        # no entity expansion, no network: the file may come from anywhere
        root = etree.fromstring(data, etree.XMLParser(resolve_entities=False, no_network=True))
    except etree.XMLSyntaxError as exc:
        raise InputError(f"{src!r} is not {what}: not well-formed XML ({exc})") from None
    expected_root = f"{{{_SSV_NS}}}ParameterSet"
    if root.tag != expected_root:
        raise InputError(f"{src!r} is not {what}: its root element is {root.tag!r}; allowed is "
                         f"{expected_root!r} (ssv:ParameterSet)")
    schema = _ssv_schema()
    if not schema.validate(root):
        errs = [f"line {e.line}: {e.message}" for e in schema.error_log][:5]
        raise InputError(f"{src!r} is not {what}: it does not conform to the SSP 1.0 schema "
                         f"{_SSV_SCHEMA}: " + "; ".join(errs))

    base = _base_parameter_set(fmu_or_params)
    if base is not None:
        table = {v.name: v for v in variable_table(base) if v.is_parameter}
        allowed_text = (f"not a parameter of the FMU of {base.set_id}; allowed: "
                        + _allowed_parameters_text(base.n_modes))
    else:
        table, allowed_text = None, "not a jointfmu FMU parameter; allowed: " + \
            _allowed_parameters_text(None)
    names_for_hint = list(table) if table is not None else \
        [f"mode[1].{f}" for f in ("f0", "zeta")] + \
        [f"mode[1].joint.{f}" for f in ("Fs", "Kt", "chi", "beta")] + ["steps_per_period"]

    problems: list[Problem] = []
    values: dict[str, float] = {}
    overrides: dict[tuple[int, str], float] = {}
    for p in root.iterfind(f"{{{_SSV_NS}}}Parameters/{{{_SSV_NS}}}Parameter"):
        name = p.get("name")
        typed = [c for c in p if isinstance(c.tag, str) and c.tag.startswith(f"{{{_SSV_NS}}}")]
        kind = typed[0].tag.split("}", 1)[1] if typed else "?"
        raw = typed[0].get("value") if typed else None
        if kind != "Real":
            problems.append(Problem(src, name, raw, f"is ssv:{kind}; jointfmu parameters are "
                                                    "ssv:Real"))
            continue
        # name and unit
        m = _MODE_PARAM_RE.match(name)
        field_name = (m.group(2) or m.group(3)) if m else None
        if table is not None:
            var = table.get(name)
            known = var is not None
            unit = var.unit if known else None
        else:
            known = bool(m) or name == "steps_per_period"
            unit = (PARAMETER_FIELDS[field_name][0] if m else "1") if known else None
        if not known:
            problems.append(Problem(src, name, raw, allowed_text,
                                    did_you_mean(name, names_for_hint)))
            continue
        given_unit = typed[0].get("unit")
        if given_unit is not None and given_unit != unit:
            problems.append(Problem(src, name, raw, f"unit {given_unit!r}: allowed is {unit!r} or "
                                                    "no unit (no unit conversion is done)"))
            continue
        x = float(raw)  # the schema admits xs:double only: 1.5, 1e3, INF, -INF, NaN
        if not math.isfinite(x):
            problems.append(Problem(src, name, raw, "allowed are finite numbers"))
            continue
        if name in values:
            problems.append(Problem(src, name, raw, "given more than once; allowed is one "
                                                    "value per parameter"))
            continue
        values[name] = x
        if name == "steps_per_period":
            if x < MIN_STEPS_PER_PERIOD:
                problems.append(Problem(src, name, raw, f"must be a finite number >= "
                                        f"{MIN_STEPS_PER_PERIOD:g} (default "
                                        f"{DEFAULT_STEPS_PER_PERIOD:g})"))
        else:
            overrides[(int(m.group(1)), field_name)] = x

    if base is not None and overrides:
        try:
            base.with_mode_values(overrides, source=src)
        except ParameterError as exc:
            problems += exc.problems
    elif overrides:
        per_mode: dict[int, dict[str, float]] = {}
        for (i, f), x in overrides.items():
            per_mode.setdefault(i, {})[f] = x
        for i, v in sorted(per_mode.items()):
            if set(v) == set(MODE_VALUE_NAMES):
                problems += check_mode_values(i, "", source=src, field_prefix=f"mode[{i}]", **v)
    if problems:
        raise ParameterError(problems)
    return values


def with_parameter_values(params: ParameterSet, values: Mapping[str, float],
                          source: str = "FMU parameter") -> ParameterSet:
    """The parameter set an FMU of ``params`` runs with these start values.

    Parameters
    ----------
    params : ParameterSet
        The FMU's own (bundled) parameter set.
    values : mapping str -> float
        FMU parameter name -> value, e.g. from :func:`read_parameter_values`.
        ``steps_per_period`` is a solver setting, not a parameter-set value, and is left out.
    source : str
        Names the origin of the values in error messages.

    Returns
    -------
    ParameterSet

    Raises
    ------
    ParameterError
        An unknown name or an out-of-range value (messages of ``jointfmu check``).
    """
    overrides: dict[tuple[int, str], float] = {}
    problems: list[Problem] = []
    for name, x in values.items():
        m = _MODE_PARAM_RE.match(name)
        if m:
            overrides[(int(m.group(1)), m.group(2) or m.group(3))] = x
        elif name != "steps_per_period":
            problems.append(Problem(source, name, x, "not a jointfmu FMU parameter; allowed: "
                                    + _allowed_parameters_text(params.n_modes)))
    if problems:
        raise ParameterError(problems)
    return params.with_mode_values(overrides, source=source)
