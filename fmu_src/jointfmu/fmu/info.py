"""``jointfmu info``: what a built FMU holds (identity, parameter set, modes, variables, binary,
host needs), read from its archive without loading it."""
from __future__ import annotations

import json
import os
import tempfile
import zipfile
from pathlib import Path
from typing import Mapping
from xml.etree import ElementTree as ET

from ..errors import InputError
from ..params import (ParameterSet, load_parameter_set)
from .slave import BUILD_INFO_FILE, PARAMETER_FILE

__all__ = [
    "read_fmu_info",
    "format_fmu_info",
    "do_step_path",
]

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
                     "(get/set of inputs and outputs, and doStep, without Python); pythonfmu's elsewhere")
    else:
        lines.append(f"FMU binary:        pythonfmu's ({b.get('reason') or 'no reason recorded'})")
    lines.append(f"doStep:            {do_step_path(bi)}")
    lines.append("host requirements: the process must run CPython or load libpython (the FMU "
                 "binary links to no libpython and starts the interpreter if the host has not; "
                 "fmpy and other Python hosts qualify; built "
                 f"with Python {bi.get('built_with_python', '?')}), with "
                 + ", ".join(info["requirements"])
                 + (f"; optional: {', '.join(bi['host_optional'])}" if bi.get("host_optional")
                    else ""))
    return "\n".join(lines)




def do_step_path(build_info: Mapping, environ: Mapping | None = None) -> str:
    """Which way the FMU's doStep runs, from its build info, and on a host like this one.

    With jointfmu's native binary (built with the compiled step) doStep runs in the compiled
    joint kernel without Python where the host's Python has Numba; through Python otherwise
    (pythonfmu's binary, the plain-Python kernel, older builds), with the same results.
    ``environ`` (default ``os.environ``) is read for ``JOINTFMU_KERNEL`` and ``JOINTFMU_DOSTEP``;
    nothing is imported.
    """
    import importlib.metadata
    import importlib.util
    import sys

    from .native import platform_folder

    environ = os.environ if environ is None else environ
    b = build_info.get("binary") or {}
    if b.get("kind") != "native":
        return ("through Python at every step (pythonfmu's binary), which calls the compiled "
                "joint kernel where the host's Python has Numba")
    if b.get("do_step") != "compiled":
        return ("through Python at every step (a native binary from before doStep ran "
                "compiled: rebuild the FMU to have it)")
    plat = b.get("platform")
    text = (f"in compiled code, without Python, on {plat} hosts whose Python has Numba (after "
            "the first step of each step size); through Python otherwise, same results")
    built = str(build_info.get("built_with_python", "")).split(".")[:2]
    if platform_folder() != plat:
        here = f"this machine uses pythonfmu's binary (not {plat}): through Python"
    elif built and built != [str(x) for x in sys.version_info[:2]]:
        here = (f"this Python is {sys.version_info[0]}.{sys.version_info[1]}, and the native "
                f"binary refuses a host on any Python but {'.'.join(built)}")
    elif environ.get("JOINTFMU_KERNEL", "").strip().lower() == "python":
        here = "JOINTFMU_KERNEL=python is set: through Python"
    elif environ.get("JOINTFMU_DOSTEP", "").strip().lower() == "python":
        here = "JOINTFMU_DOSTEP=python is set: through Python"
    elif importlib.util.find_spec("numba") is None:
        here = "Numba is not installed: through Python"
    else:
        here = f"Numba {importlib.metadata.version('numba')} is installed: compiled"
    return f"{text}. Here: {here}"
