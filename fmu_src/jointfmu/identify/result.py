"""The outcome of a fit as files: the fitted parameter set and its ``.fit.json``.

* ``OUT.toml``: a complete ``jointfmu-params/1`` file.  From the template: points and their mode
  shapes (and test nodes), base, mode labels, base participation.  Per mode: f0, zeta and the
  joint values from the fit (or the template, where the records do not determine them).
  ``[structure] build`` from the caller; ``[provenance]`` written anew (who fitted it, when, the
  records with their SHA-256, the method, the fit quality, what came from the template).
* ``OUT.fit.json`` (format ``jointfmu-fit/1``, read by other tools: keep the shape): per mode the
  amplitude range covered, whether macro-slip was reached, each of ``f0, zeta, chi, Fs, Kt, beta``
  with its 95 % interval (or null) and its source (``"data"`` or ``"template"``), the collapse
  measure and the warnings; extra keys carry the micro-slip coefficient R, the fit quality and
  the per-record detail.

Both are written atomically; the texts are made before anything is written.

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
import os
from dataclasses import replace
from pathlib import Path

from ..analysis.linear import CAUTION  # the package's one caution text
from ..fileio import atomic_write
from ..params import ParameterSet, Provenance
from .fit import BuildFit, ModeFit

__all__ = ["FIT_FORMAT", "PARAM_NAMES", "CAUTION", "METHOD", "fitted_parameter_set",
           "fit_json", "fit_json_path", "write_fit", "file_sha256", "mode_summary"]

#: Format tag of the ``.fit.json`` file.
FIT_FORMAT = "jointfmu-fit/1"
#: The values of ``modes[].params``, in order.
PARAM_NAMES = ("f0", "zeta", "chi", "Fs", "Kt", "beta")
METHOD = ("modal filter (pseudo-inverse of the template's shapes at the sensors), mirrored "
          "zero-phase band-pass and Hilbert envelope and phase (Feldman, MSSP 8(2) 1994 and 25(3) "
          "2011), matched to simulated ring-downs of the exact modal Iwan core passed through the "
          "same processing; start from micro-slip closed forms (Segalman, J. Appl. Mech. 72(5) "
          "2005); 95 % profile-likelihood intervals")


def file_sha256(path: str | os.PathLike) -> str:
    """SHA-256 (hex) of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def fit_json_path(toml_path: str | os.PathLike) -> Path:
    """``OUT.toml`` -> ``OUT.fit.json`` (the suffix ``.toml`` replaced; appended otherwise)."""
    p = Path(toml_path)
    return p.with_name((p.name[:-5] if p.name.endswith(".toml") else p.name) + ".fit.json")


def _today() -> str:
    """Today's date (UTC), or that of ``SOURCE_DATE_EPOCH`` when set (reproducible files,
    common practice of reproducible builds)."""
    epoch = os.environ.get("SOURCE_DATE_EPOCH")
    if epoch and epoch.strip().isdigit():
        return _dt.datetime.fromtimestamp(int(epoch), _dt.timezone.utc).date().isoformat()
    return _dt.datetime.now(_dt.timezone.utc).date().isoformat()


def _g(x, digits=4) -> str:
    return f"{x:.{digits}g}"


def mode_summary(mf: ModeFit) -> str:
    """One line on what was determined for a mode and what came from the template."""
    head = f"mode {mf.index} {mf.label}: "
    if mf.kind == "template":
        return head + "not excited above the noise in any record: every value from the template"
    rng = f"records cover {_g(mf.amplitude_range[0], 3)} to {_g(mf.amplitude_range[1], 3)} m*sqrt(kg)"
    if mf.kind == "macro":
        return head + (f"macro-slip reached ({rng}): f0, zeta, chi, Fs, Kt and beta from the data")
    share = mf.params["Kt"]["value"] / (2.0 * math.pi * mf.params["f0"]["value"]) ** 2
    return head + (f"micro-slip only ({rng}): f0, zeta, chi and R from the data; the template's "
                   f"joint-stiffness share Kt/(2 pi f0)^2 = {_g(share, 3)} and beta = "
                   f"{_g(mf.params['beta']['value'], 3)} kept, Fs solved from R")


def fitted_parameter_set(bf: BuildFit, build: str | None = None) -> ParameterSet:
    """The fitted :class:`ParameterSet`: the template with every mode replaced and new provenance.

    Parameters
    ----------
    bf : BuildFit
    build : str, optional
        ``[structure] build`` of the fitted set (default: the template's).
    """
    t = bf.template
    build = build if build is not None else t.build
    recs = [f"{Path(r.source).name} (sha256 {_sha_or_none(r.source)})" for r in bf.records]
    quality = []
    for mf in bf.modes:
        line = mode_summary(mf)
        if mf.kind != "template":
            line += (f"; fit chi2/dof {_g(mf.chi2 / max(mf.dof, 1), 3)}"
                     + (f", collapse {_g(100 * mf.collapse, 3)} %" if mf.collapse is not None else ""))
        quality.append(line)
    notes = (f"Fitted by jointfmu fit from the template {t.source} ({t.set_id}, hash "
             f"{t.short_hash()}); kept from it: points and mode shapes, base, mode labels. Method: "
             f"{METHOD}. " + " ".join(q + "." for q in quality)
             + " Intervals and details in the .fit.json file beside this one. " + CAUTION)
    from .. import __version__

    prov = Provenance(fitted_by=f"jointfmu {__version__} (jointfmu fit)", date=_today(),
                      source_data="ring-down records: " + "; ".join(recs), notes=notes)
    modes = tuple(mf.mode for mf in bf.modes)
    return replace(t, build=build,
                   description=(f"Build {build}, fitted from {len(bf.records)} ring-down "
                                f"record(s) with the template {t.set_id}."),
                   provenance=prov, modes=modes, source="jointfmu fit")


def _sha_or_none(source: str) -> str:
    try:
        return file_sha256(source)
    except OSError:
        return "unknown"


def _num(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _param(p: dict) -> dict:
    iv = p.get("interval")
    return {"value": _num(p["value"]),
            "interval": [_num(iv[0]), _num(iv[1])] if iv is not None else None,
            "source": p["source"]}


def fit_json(bf: BuildFit, parameter_file: str) -> dict:
    """The ``jointfmu-fit/1`` document (see the module docstring)."""
    from .. import __version__

    modes = []
    for mf in bf.modes:
        m = {
            "index": mf.index,
            "label": mf.label,
            "amplitude_range": ([_num(mf.amplitude_range[0]), _num(mf.amplitude_range[1])]
                                if mf.amplitude_range is not None else None),
            "reached_macroslip": bool(mf.reached_macroslip),
            "params": {n: _param(mf.params[n]) for n in PARAM_NAMES},
            "collapse": _num(mf.collapse),
            "warnings": list(mf.warnings),
            # extra keys
            "determined": {"micro": "micro-slip", "macro": "macro-slip",
                           "template": "none"}[mf.kind],
            "micro_slip_coefficient": dict(_param(mf.params["R"]),
                                           unit="N/sqrt(kg) / (m*sqrt(kg))^(chi+2)"),
        }
        if mf.kind != "template":
            m["fit"] = {
                "chi2_per_dof": _num(mf.chi2 / max(mf.dof, 1)),
                "degrees_of_freedom": int(mf.dof),
                "interval_scale": _num(math.sqrt(mf.s2)),
                "likelihood_ratio_macroslip": _num(mf.lr_macro),
                "band_hz": [_num(mf.band.f_lo), _num(mf.band.f_hi)],
                "start_closed_form": {"f0": _num(mf.start.f0), "zeta": _num(mf.start.zeta),
                                      "chi": _num(mf.start.chi), "R": _num(mf.start.R)},
                "records": [{"file": Path(s.source).name, "quantity": s.quantity,
                             "noise": _num(s.sigma), "noise_from": s.noise_from,
                             "amplitude_range": [_num(s.amp_range[0]), _num(s.amp_range[1])],
                             "samples": int(s.idx.size)} for s in mf.segments],
            }
            m["collapse_frequency"] = _num(mf.collapse_frequency)
            m["collapse_detail"] = [{k: (_num(v) if isinstance(v, float) else v)
                                     for k, v in d.items()} for d in mf.collapse_detail]
        modes.append(m)
    return {
        "format": FIT_FORMAT,
        "parameter_file": parameter_file,
        "records": [{"file": Path(r.source).name, "sha256": _sha_or_none(r.source)}
                    for r in bf.records],
        "modes": modes,
        # extra keys
        "template": {"file": str(bf.template.source), "set_id": bf.template.set_id,
                     "content_hash": bf.template.content_hash()},
        "jointfmu_version": __version__,
        "method": METHOD,
        "warnings": list(bf.warnings),
        "caution": CAUTION,
    }


def write_fit(bf: BuildFit, out_toml: str | os.PathLike, build: str | None = None
              ) -> tuple[Path, Path, ParameterSet]:
    """Write ``OUT.toml`` and ``OUT.fit.json`` atomically; both texts are made first.

    Returns
    -------
    (Path, Path, ParameterSet)
        The two files and the fitted set.
    """
    out_toml = Path(out_toml)
    ps = fitted_parameter_set(bf, build)
    bf.params = ps
    toml_text = ps.to_toml()
    jpath = fit_json_path(out_toml)
    doc = fit_json(bf, out_toml.name)
    json_text = json.dumps(doc, indent=1, allow_nan=False) + "\n"
    with atomic_write(out_toml, "w", newline="\n") as f:
        f.write(toml_text)
    with atomic_write(jpath, "w", newline="\n") as f:
        f.write(json_text)
    return out_toml, jpath, ps
