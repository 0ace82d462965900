"""The demo system as an SSP 1.0 package (``jointfmu export-ssp``).

System Structure and Parameterization (SSP) 1.0, Modelica Association Project SSP, 2019: an
``.ssp`` file is a ZIP archive with the system description ``SystemStructure.ssd`` at its root
and the files it refers to under ``resources/``, by URIs relative to the ``.ssd`` (the schema's
documentation of ``Component/@source`` and ``ParameterBinding/@source``, whose example is
``resources/MyDemoFMU.fmu``).  The package written here holds the system that ``jointfmu cosim``
runs with ``--components fmu``:

* ``structure``: the FMU of the build (``jointfmu build``), its fitted mode values bound from
  ``resources/structure.ssv`` (the file ``jointfmu export-ssv`` writes);
* ``loads``: the table-driven loads FMU of the load case (:func:`.components.build_loads_fmu`),
  output ``base.acceleration`` -> ``structure.base.acceleration``;
* ``damper`` (with the controller on): the active-damper FMU
  (:func:`.components.build_controller_fmu`), ``structure.point.<p>.v`` -> ``damper.velocity``
  and ``damper.force`` -> ``structure.point.<p>.force``; its gain, time constant and force
  limit bound from ``resources/damper.ssv``.  With the controller off there is no damper and
  ``point.<p>.force`` keeps its start value 0, which is what ``jointfmu cosim --controller off``
  feeds the structure.

The ``.ssd`` is validated against the standard's schema ``SystemStructureDescription.xsd`` and
each ``.ssv`` against ``SystemStructureParameterValues.xsd`` (the copies shipped with fmpy)
before anything is written.  The communication step is not part of SSP 1.0 itself: it is given
in the two tool annotations known to be read (``ssc:Annotation`` of a ``type`` named after the
tool's domain; a tool skips the types it does not know):

* ``com.opensimulationplatform`` on ``DefaultExperiment``: ``osp:Algorithm/osp:FixedStepAlgorithm
  baseStepSize`` (libcosim's SSP reader, ``ssp_parser.cpp``, reads it as its master step);
* ``org.openmodelica`` on the system: ``oms:Annotations/oms:SimulationInformation/
  oms:FixedStepMaster stepSize`` (OMSimulator's command line runs a plain SSP package only with
  it, as measured for issue 12).

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from __future__ import annotations

import os
import shutil
import tempfile
import zipfile
from dataclasses import dataclass
from pathlib import Path
from xml.etree import ElementTree as ET

from ..errors import BuildError, InputError
from ..fileio import atomic_write, check_output_path
from ..params import load_parameter_set
from ..params.names import BASE_ACCELERATION, point_name
from .components import build_controller_fmu, build_loads_fmu
from .loads import LOAD_CASES
from .master import SystemSettings, system_connections

__all__ = [
    "SSD_NS",
    "OSP_NS",
    "OMS_NS",
    "SspExport",
    "system_description",
    "export_ssp",
]

#: SSP 1.0 namespace of the system structure description.
SSD_NS = "http://ssp-standard.org/SSP1/SystemStructureDescription"
#: Namespace of libcosim's (Open Simulation Platform) SSP annotations (its ``OSPAnnotations.xsd``).
OSP_NS = "http://opensimulationplatform.com/SSP/OSPAnnotations"
#: Namespace of OMSimulator's annotations, as OMSimulator writes it in its own SSP exports.
OMS_NS = "https://raw.githubusercontent.com/OpenModelica/OMSimulator/master/schema/oms.xsd"

_SSD_SCHEMA = "SystemStructureDescription.xsd"
_SSV_SCHEMA = "SystemStructureParameterValues.xsd"

#: Units of the connectors and damper parameters beyond the FMU's own table, as SI base-unit
#: exponents (``ssc:BaseUnit``, SystemStructureCommon.xsd).
_EXTRA_UNITS = {"s": {"s": 1}, "N.s/m": {"kg": 1, "s": -1}}

#: The damper FMU's interface (:mod:`.components`): name -> (kind, unit).
_DAMPER_CONNECTORS = {"velocity": ("input", "m/s"), "force": ("output", "N")}
_DAMPER_PARAMETERS = (("gain", "N.s/m", "velocity gain"), ("tau", "s", "actuator time constant"),
                      ("force_limit", "N", "actuator force limit"))


@dataclass(frozen=True)
class SspExport:
    """What :func:`export_ssp` wrote.

    Attributes
    ----------
    path : Path
        The ``.ssp`` file.
    components : tuple of str
        Component names in the system.
    connections : tuple of (str, str, str, str)
        ``(start element, start connector, end element, end connector)``.
    step, stop_time : float
        Communication step and stop time of the default experiment [s].
    set_id : str
        The build's parameter set.
    """

    path: Path
    components: tuple[str, ...]
    connections: tuple[tuple[str, str, str, str], ...]
    step: float
    stop_time: float
    set_id: str


def _units_of(name: str):
    from ..fmu.variables import UNITS

    table = {**{k: e for k, e in UNITS.items() if e is not None}, **_EXTRA_UNITS}
    return table.get(name)


def system_description(params, case: str, controller_on: bool, settings, *,
                       fmu_names=None) -> tuple[bytes, tuple, tuple]:
    """The ``SystemStructure.ssd`` of the system, validated against the SSP 1.0 schema.

    Parameters
    ----------
    params : ParameterSet
        The build (its variable table gives the structure's connectors and units).
    case : str
        Load case.
    controller_on : bool
    settings : SystemSettings
        Step, duration, controller point and values.
    fmu_names : mapping str -> str, optional
        Component -> archive path of its FMU (default ``resources/<component>.fmu``).

    Returns
    -------
    (bytes, tuple of str, tuple of (str, str, str, str))
        UTF-8 XML, component names, connections.

    Raises
    ------
    InputError
        The structure lacks the controller point's force input or velocity output.
    """
    from ..fmu.bundle import jointfmu_version
    from ..fmu.build import format_real
    from ..fmu.ssv import SSC_NS, units_element
    from ..fmu.variables import variable_table

    s = settings
    stop = s.resolved_duration(case)
    point = s.controller.point
    table = [v for v in variable_table(params) if v.causality in ("input", "output")]
    names = {v.name for v in table}
    if controller_on:
        missing = [n for n in (point_name(point, "force"), point_name(point, "v"))
                   if n not in names]
        if missing:
            raise InputError(f"controller point {point!r}: the structure of {params.set_id} has no "
                             f"{' / '.join(missing)}; its points: "
                             + ", ".join(p.label for p in params.points))
    components = ("structure", "loads") + (("damper",) if controller_on else ())
    sources = {c: f"resources/{c}.fmu" for c in components}
    sources.update(fmu_names or {})
    connections = [(c.source, c.output, c.target, c.input)
                   for c in system_connections(point, controller_on)]

    for prefix, ns in (("ssd", SSD_NS), ("ssc", SSC_NS), ("osp", OSP_NS), ("oms", OMS_NS)):
        ET.register_namespace(prefix, ns)
    d, c, o, m = (f"{{{ns}}}" for ns in (SSD_NS, SSC_NS, OSP_NS, OMS_NS))
    mode = "controller on" if controller_on else "controller off"
    caution = ("A fitted model is no substitute for qualification testing; defer to the applicable "
               "codes, standards and licensed engineering practice.")
    root = ET.Element(d + "SystemStructureDescription", {
        "version": "1.0", "name": f"{params.name}_{case}",
        "description": f"jointfmu demo system: {params.set_id} under load case {case!r}, {mode}. "
                       + caution,
        "generationTool": f"jointfmu {jointfmu_version()}"})
    system = ET.SubElement(root, d + "System", {
        "name": "system", "description": f"{LOAD_CASES[case].description}; {mode}"})
    used_units: set[str] = set()

    def connector(parent, name: str, kind: str, unit: str | None, y: float) -> None:
        el = ET.SubElement(parent, d + "Connector", name=name, kind=kind)
        real = ET.SubElement(el, c + "Real")
        if unit is not None and _units_of(unit) is not None:
            real.set("unit", unit)
            used_units.add(unit)
        ET.SubElement(el, d + "ConnectorGeometry", x="0" if kind == "input" else "1",
                      y=f"{y:.4g}")

    def spread(n: int) -> list[float]:
        return [(i + 1) / (n + 1) for i in range(n)]

    elements = ET.SubElement(system, d + "Elements")
    geometry = {"loads": (0, 40, 20, 60), "structure": (40, 20, 70, 80),
                "damper": (90, 0, 110, 20)}
    for comp in components:
        el = ET.SubElement(elements, d + "Component", {
            "name": comp, "type": "application/x-fmu-sharedlibrary", "source": sources[comp],
            "implementation": "CoSimulation"})
        conns = ET.SubElement(el, d + "Connectors")
        if comp == "structure":
            ins = [v for v in table if v.causality == "input"]
            outs = [v for v in table if v.causality == "output"]
            for v, y in zip(ins, spread(len(ins))):
                connector(conns, v.name, "input", v.unit, y)
            for v, y in zip(outs, spread(len(outs))):
                connector(conns, v.name, "output", v.unit, y)
        elif comp == "loads":
            connector(conns, BASE_ACCELERATION, "output", "m/s2", 0.5)
        else:
            for name, (kind, unit) in _DAMPER_CONNECTORS.items():
                connector(conns, name, kind, unit, 0.5)
        x1, y1, x2, y2 = geometry[comp]
        ET.SubElement(el, d + "ElementGeometry", x1=str(x1), y1=str(y1), x2=str(x2), y2=str(y2))
        if comp in ("structure", "damper"):
            # a parameter-values file, its URI relative to the .ssd (sourceBase="SSD")
            ET.SubElement(ET.SubElement(el, d + "ParameterBindings"), d + "ParameterBinding",
                          source=f"resources/{comp}.ssv")
    cl = ET.SubElement(system, d + "Connections")
    for a, ac, b, bc in connections:
        ET.SubElement(cl, d + "Connection", startElement=a, startConnector=ac, endElement=b,
                      endConnector=bc)
    step = format_real(float(s.step))
    oms = ET.SubElement(ET.SubElement(system, d + "Annotations"), c + "Annotation",
                        type="org.openmodelica")
    info = ET.SubElement(ET.SubElement(oms, m + "Annotations"), m + "SimulationInformation")
    ET.SubElement(info, m + "FixedStepMaster", description="oms-ma", stepSize=step,
                  absoluteTolerance="0.0001", relativeTolerance="0.0001")
    if used_units:
        units_element(root, d + "Units", {u: _units_of(u) for u in used_units})
    de = ET.SubElement(root, d + "DefaultExperiment", startTime="0", stopTime=format_real(stop))
    osp = ET.SubElement(ET.SubElement(de, d + "Annotations"), c + "Annotation",
                        type="com.opensimulationplatform")
    ET.SubElement(ET.SubElement(osp, o + "Algorithm"), o + "FixedStepAlgorithm",
                  baseStepSize=step)
    run = ET.SubElement(ET.SubElement(root, d + "Annotations"), c + "Annotation",
                        type="org.jointfmu.system")
    ET.SubElement(run, "SystemSettings", {
        "parameterSet": params.set_id, "contentHash": params.content_hash(), "case": case,
        "controller": "on" if controller_on else "off", "step": step,
        "duration": format_real(stop), "seed": str(int(s.seed)), "level": format_real(s.level),
        "controllerPoint": point})
    ET.indent(root)
    data = ET.tostring(root, encoding="UTF-8", xml_declaration=True)
    _validate(data, _SSD_SCHEMA, "SystemStructure.ssd")
    return data, components, tuple(connections)


def _validate(data: bytes, schema_file: str, what: str) -> None:
    """Check a document written here against an SSP 1.0 schema (a failure is a bug: said so)."""
    from lxml import etree

    from ..fmu.ssv import ssp_schema

    schema = ssp_schema(schema_file)
    if not schema.validate(etree.fromstring(data)):
        errs = "; ".join(f"line {e.line}: {e.message}" for e in list(schema.error_log)[:5])
        raise BuildError(f"jointfmu wrote a {what} that does not conform to the SSP 1.0 "
                             f"schema {schema_file} (a bug, please report it): {errs}")


def _damper_ssv(controller) -> bytes:
    from ..fmu.ssv import ssv_document

    data = ssv_document(
        "damper", "active damper of the jointfmu demo system: tau u' + u = -g v, force clipped",
        [(name, float(getattr(controller, name)), unit, f"{text} [{unit}]")
         for name, unit, text in _DAMPER_PARAMETERS],
        {unit: _units_of(unit) for _, unit, _ in _DAMPER_PARAMETERS})
    _validate(data, _SSV_SCHEMA, "damper.ssv")
    return data


def export_ssp(params_path: str | os.PathLike, case: str, controller_on: bool,
               output: str | os.PathLike, settings=None, *, binary: str | None = None
               ) -> SspExport:
    """Write the demo system of a build and load case as an SSP 1.0 package.

    Builds the structure FMU of ``params_path``, the loads FMU of ``case`` and (with the
    controller on) the damper FMU, writes their ``.ssd`` and ``.ssv`` files, checks them against
    the SSP 1.0 schemas, and writes the archive atomically (``SystemStructure.ssd`` first;
    FMUs stored as they are, they are ZIP archives already).

    Parameters
    ----------
    params_path : path-like
        Parameter file of the build.
    case : str
        Load case (a key of :data:`.loads.LOAD_CASES`).
    controller_on : bool
    output : path-like
        The ``.ssp`` file to write.
    settings : SystemSettings, optional
        Step, duration, seed, level and controller (default :class:`.master.SystemSettings`).
    binary : str, optional
        The structure FMU's binary (see :func:`.fmu.build.build_fmu`).

    Returns
    -------
    SspExport

    Raises
    ------
    InputError
        Unknown case, bad settings, a suffix other than ``.ssp``.
    OutputPathError
        ``output`` cannot be written there (checked before anything is built).
    ParameterError, BuildError
        From building the FMUs; nothing is written.
    """
    from ..fmu.build import build_fmu
    from ..fmu.ssv import parameter_values_ssv
    out = Path(output)
    if out.suffix.lower() != ".ssp":
        raise InputError(f"output {str(out)!r} must end in '.ssp'")
    if case not in LOAD_CASES:
        raise InputError(f"load case {case!r}: allowed are {', '.join(LOAD_CASES)}")
    check_output_path(out, "file", "output")
    s = settings or SystemSettings()
    params = load_parameter_set(params_path)
    ssd, components, connections = system_description(params, case, controller_on, s)
    staging = Path(tempfile.mkdtemp(prefix="jointfmu_ssp_"))
    try:
        files = {"SystemStructure.ssd": ssd}
        ssv = parameter_values_ssv(params)
        _validate(ssv, _SSV_SCHEMA, "structure.ssv")
        files["resources/structure.ssv"] = ssv
        fmus = {"structure": build_fmu(params_path, staging / "structure.fmu",
                                       binary=binary).path,
                "loads": build_loads_fmu(case, staging / "loads.fmu", s)}
        if controller_on:
            fmus["damper"] = build_controller_fmu(staging / "damper.fmu", s.controller)
            files["resources/damper.ssv"] = _damper_ssv(s.controller)
        with atomic_write(out, "wb") as f, zipfile.ZipFile(f, "w") as z:
            for name, data in files.items():
                z.writestr(name, data, compress_type=zipfile.ZIP_DEFLATED)
            for comp, path in fmus.items():
                z.write(path, f"resources/{comp}.fmu", compress_type=zipfile.ZIP_STORED)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return SspExport(out, components, connections, float(s.step), s.resolved_duration(case),
                     params.set_id)
