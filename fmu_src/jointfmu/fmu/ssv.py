"""SSP 1.0 parameter values (``.ssv``): one FMU for every build.

Writes a parameter set's mode values as an SSP 1.0 SystemStructureParameterValues file and reads
one back (validated against the schema) to apply to an FMU or a parameter set.
"""
from __future__ import annotations

import math
import os
from functools import lru_cache
from pathlib import Path
from typing import Mapping, Sequence
from xml.etree import ElementTree as ET

from ..fileio import atomic_write, check_output_path
from ..errors import InputError, ParameterError, Problem, did_you_mean
from ..params import (MODE_VALUE_NAMES, ParameterSet, check_mode_values,
                     load_parameter_set)
from ..params.names import (STEPS_PER_PERIOD, mode_prefix, mode_value_names, mode_value_pattern,
                            parse_name)
from ..params.rules import RULES_BY_NAME
from .variables import UNITS, variable_table

from .build import default_output_path, format_real
from .bundle import jointfmu_version
from .info import read_fmu_info

__all__ = [
    "SSV_NS",
    "SSC_NS",
    "parameter_values_ssv",
    "ssp_schema",
    "ssv_document",
    "units_element",
    "write_ssv",
    "read_parameter_values",
    "with_parameter_values",
]

# ----------------------------------------------------------------------- SSP parameter values
SSV_NS = "http://ssp-standard.org/SSP1/SystemStructureParameterValues"
SSC_NS = "http://ssp-standard.org/SSP1/SystemStructureCommon"


def units_element(parent: ET.Element, tag: str, units: Mapping[str, Mapping[str, int]]
                  ) -> ET.Element:
    """Append the SSP 1.0 unit definitions (``ssc:Unit`` with its ``ssc:BaseUnit`` exponents,
    SystemStructureCommon.xsd ``TUnits``) of ``units`` to ``parent`` as element ``tag``
    (``ssv:Units`` or ``ssd:Units``), sorted by name."""
    c = f"{{{SSC_NS}}}"
    ulist = ET.SubElement(parent, tag)
    for name in sorted(units):
        u = ET.SubElement(ulist, c + "Unit", name=name)
        ET.SubElement(u, c + "BaseUnit", {k: str(e) for k, e in units[name].items()})
    return ulist


def ssv_document(name: str, description: str,
                 parameters: Sequence[tuple[str, float, str | None, str]],
                 units: Mapping[str, Mapping[str, int]], *, author: str | None = None,
                 annotation: tuple[str, str, Mapping[str, str]] | None = None) -> bytes:
    """An SSP 1.0 parameter-values document (``ssv:ParameterSet``) of Real parameters.

    Parameters
    ----------
    name, description : str
        Of the parameter set.
    parameters : sequence of (name, value, unit or None, description)
        In file order; ``unit`` None writes no ``unit`` attribute.
    units : mapping str -> mapping str -> int
        SI base-unit exponents (``ssc:BaseUnit``) of every unit named in ``parameters``.
    author : str, optional
    annotation : (type, tag, attributes), optional
        One ``ssc:Annotation`` of that type holding one element.

    Returns
    -------
    bytes
        UTF-8 XML.
    """
    ET.register_namespace("ssv", SSV_NS)
    ET.register_namespace("ssc", SSC_NS)
    v, c = f"{{{SSV_NS}}}", f"{{{SSC_NS}}}"
    root = ET.Element(v + "ParameterSet", {
        "version": "1.0", "name": name, "description": description,
        "generationTool": f"jointfmu {jointfmu_version()}",
    })
    if author:
        root.set("author", author)
    plist = ET.SubElement(root, v + "Parameters")
    used = set()
    for pname, value, unit, text in parameters:
        p = ET.SubElement(plist, v + "Parameter", name=pname, description=text)
        real = ET.SubElement(p, v + "Real", value=format_real(value))
        if unit is not None:
            real.set("unit", unit)
            used.add(unit)
    if used:
        units_element(root, v + "Units", {u: units[u] for u in used})
    if annotation is not None:
        kind, tag, attrs = annotation
        ann = ET.SubElement(ET.SubElement(root, v + "Annotations"), c + "Annotation", type=kind)
        ET.SubElement(ann, tag, dict(attrs))
    ET.indent(root)
    return ET.tostring(root, encoding="UTF-8", xml_declaration=True)


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
    parameters = [(var.name, var.start, var.unit if UNITS[var.unit] is not None else None,
                   f"{var.description} [{var.unit}]")
                  for var in variable_table(params) if var.kind == "parameter"]
    return ssv_document(
        params.set_id, f"fitted mode values of {params.set_id} "
                       f"(parameter-set sha256 {params.content_hash()})",
        parameters, {k: e for k, e in UNITS.items() if e is not None},
        author=params.provenance.fitted_by or None,
        annotation=("org.jointfmu.parameterset", "ParameterSet",
                    {"id": params.set_id, "contentHash": params.content_hash()}))


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
    check_output_path(out, "file", "output")
    with atomic_write(out, "wb") as f:
        f.write(parameter_values_ssv(params))
    return out


# ------------------------------------------------------------- applying SSP parameter values
_SSV_SCHEMA = "SystemStructureParameterValues.xsd"


@lru_cache(maxsize=None)
def ssp_schema(file_name: str):
    """An SSP 1.0 schema (``SystemStructureDescription.xsd``,
    ``SystemStructureParameterValues.xsd``...) as shipped with fmpy, which keeps the standard's
    schema files together (each imports ``SystemStructureCommon.xsd`` from the same folder).

    Returns
    -------
    lxml.etree.XMLSchema
    """
    from lxml import etree
    import fmpy.ssp.ssd as ssd

    return etree.XMLSchema(file=str(Path(ssd.__file__).resolve().parent / "schema" / file_name))


def _ssv_schema():
    return ssp_schema(_SSV_SCHEMA)


def _base_parameter_set(fmu_or_params) -> ParameterSet | None:
    if fmu_or_params is None or isinstance(fmu_or_params, ParameterSet):
        return fmu_or_params
    p = Path(fmu_or_params)
    return read_fmu_info(p)["params"] if p.suffix.lower() == ".fmu" else load_parameter_set(p)


def _allowed_parameters_text(n_modes: int | None) -> str:
    return f"{mode_value_pattern(n_modes)} and {STEPS_PER_PERIOD}"


def _mode_value(name: str):
    """(1-based mode, value name) of a mode-value name such as mode[2].joint.chi, else None."""
    parsed = parse_name(name)
    if parsed is None or parsed.kind != "mode_value":
        return None
    return parsed.mode, parsed.quantity


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
    expected_root = f"{{{SSV_NS}}}ParameterSet"
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
        mode_value_names(1) + [STEPS_PER_PERIOD]

    problems: list[Problem] = []
    values: dict[str, float] = {}
    overrides: dict[tuple[int, str], float] = {}
    for p in root.iterfind(f"{{{SSV_NS}}}Parameters/{{{SSV_NS}}}Parameter"):
        name = p.get("name")
        typed = [c for c in p if isinstance(c.tag, str) and c.tag.startswith(f"{{{SSV_NS}}}")]
        kind = typed[0].tag.split("}", 1)[1] if typed else "?"
        raw = typed[0].get("value") if typed else None
        if kind != "Real":
            problems.append(Problem(src, name, raw, f"is ssv:{kind}; jointfmu parameters are "
                                                    "ssv:Real"))
            continue
        # name and unit
        m = _mode_value(name)
        if table is not None:
            var = table.get(name)
            known = var is not None
            unit = var.unit if known else None
        else:
            known = m is not None or name == STEPS_PER_PERIOD
            unit = (RULES_BY_NAME[m[1]].unit if m else "1") if known else None
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
        if name == STEPS_PER_PERIOD:
            if x < MIN_STEPS_PER_PERIOD:
                problems.append(Problem(src, name, raw, f"must be a finite number >= "
                                        f"{MIN_STEPS_PER_PERIOD:g} (default "
                                        f"{DEFAULT_STEPS_PER_PERIOD:g})"))
        else:
            overrides[m] = x

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
                problems += check_mode_values(i, "", source=src, field_prefix=mode_prefix(i), **v)
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
        m = _mode_value(name)
        if m:
            overrides[m] = x
        elif name != STEPS_PER_PERIOD:
            problems.append(Problem(source, name, x, "not a jointfmu FMU parameter; allowed: "
                                    + _allowed_parameters_text(params.n_modes)))
    if problems:
        raise ParameterError(problems)
    return params.with_mode_values(overrides, source=source)
