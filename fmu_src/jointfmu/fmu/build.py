"""``jointfmu build``: the FMI 2.0 co-simulation FMU of a parameter set.

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

import json
import math
import os
import re
import shutil
import sys
import tempfile
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from xml.etree import ElementTree as ET

from ..fileio import check_output_path, publish
from ..errors import BuildError, JointFmuError
from ..params import (ParameterSet, load_parameter_set)
from .slave import BUILD_INFO_FILE, PARAMETER_FILE
from .variables import DEPENDENCY_KIND, UNITS, variable_table

from .bundle import (ENTRY_TEMPLATE, HOST_OPTIONAL, HOST_REQUIREMENTS, PACKAGE_DIR, check_bundle,
                     core_files, fmu_names, jointfmu_version, pythonfmu_version)
from .native import binary_choice, compile_shell, platform_folder, replace_binary

__all__ = [
    "BuildResult",
    "build_fmu",
    "default_output_path",
    "format_real",
]

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
    choice = binary_choice(binary)
    params = load_parameter_set(params_path)
    out = Path(output) if output is not None else default_output_path(params, cwd)
    if out.suffix.lower() != ".fmu":
        raise BuildError(f"output {str(out)!r} must end in '.fmu'")
    check_output_path(out, "file", "output FMU")
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
        files = core_files()
        check_bundle(files)
        for f in files:
            dest = core_dir / f.relative_to(PACKAGE_DIR)
            dest.parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(f, dest)
        native, why = None, "pythonfmu's binary was asked for (binary='pythonfmu')"
        if choice != "pythonfmu":
            cdir = staging / "native"
            cdir.mkdir()
            native, why = compile_shell(cdir, ident)
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
        script.write_text(ENTRY_TEMPLATE.format(
            version=jointfmu_version(), set_id=params.set_id, content_hash=params.content_hash(),
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


def _build_info(params: ParameterSet, ident: str, core: str, native: Path | None = None,
                why: str = "") -> dict:
    plat = platform_folder()
    if native is not None:
        binary = {"kind": "native", "platform": plat, "do_step": "compiled",
                  "description": "jointfmu's native FMI 2.0 shell (native/fmi2_shell.c): get/set "
                                 "of inputs and outputs without Python, and doStep in the "
                                 "compiled joint kernel where the host's Python has Numba; "
                                 "pythonfmu's binary on other platforms"}
    else:
        binary = {"kind": "pythonfmu", "platform": plat, "do_step": "python",
                  "description": "pythonfmu's binary on every platform", "reason": why}
    return {
        "set_id": params.set_id,
        "name": params.name,
        "build": params.build,
        "content_hash": params.content_hash(),
        "model_identifier": ident,
        "core_package": core,
        "jointfmu_version": jointfmu_version(),
        "pythonfmu_version": pythonfmu_version(),
        "host_requirements": list(HOST_REQUIREMENTS),
        "host_optional": list(HOST_OPTIONAL),
        "built_with_python": sys.version.split()[0],
        "binary": binary,
    }


def format_real(x: float) -> str:
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
                zout.writestr(item, replace_binary(zin, item, native),
                              compress_type=zipfile.ZIP_DEFLATED)
            if native is not None:    # a platform pythonfmu ships no binary for (macOS)
                target = f"binaries/{platform_folder()}/{native.name}"
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
    root.set("generationTool", f"jointfmu {jointfmu_version()} (PythonFMU {pythonfmu_version()})")
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
    root.insert(mv_pos, ET.Element("DefaultExperiment", startTime="0.0", stopTime=format_real(stop),
                                   stepSize=format_real(step)))
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
            real.set("start", format_real(var.start))

    # FMI 2.0 sec. 2.2.8 (schema fmi2VariableDependency.xsd): every output in Outputs, with the
    # inputs it depends on directly at a communication point (indices are 1-based positions in
    # ModelVariables, ascending) and how each enters ("constant": a constant factor, allowed for
    # co-simulation outputs; see variables.DEPENDENCY_KIND).  InitialUnknowns lists the outputs
    # with initial="calculated" (all of them), in value-reference order, with no dependencies
    # attribute: in Initialization Mode they are taken to depend on every known.
    ms = ET.SubElement(root, "ModelStructure")
    outputs = ET.SubElement(ms, "Outputs")
    initial = ET.SubElement(ms, "InitialUnknowns")
    for k, var in enumerate(table):
        if var.is_output:
            if not all(table[vr].is_input for vr in var.depends_on):
                raise BuildError(f"{var.name}: dependencies {var.depends_on} must be inputs "
                                 "(FMI 2.0 sec. 2.2.8)")
            ET.SubElement(outputs, "Unknown", index=str(k + 1),
                          dependencies=" ".join(str(vr + 1) for vr in var.depends_on),
                          dependenciesKind=" ".join(DEPENDENCY_KIND for _ in var.depends_on))
            ET.SubElement(initial, "Unknown", index=str(k + 1))
    return root


