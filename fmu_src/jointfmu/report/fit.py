"""The report of a fit: an HTML page (Jinja2 template ``templates/fit.html``) with PNG plots.

Per mode: damping and frequency against modal amplitude from every record (and every sensor),
the fitted model's curves with a 95 % band, its simulated ring-down of each record processed
alike, the closed-form start, and the residuals; the table of fitted values with intervals and
sources; one record held out of the fit and predicted by the model fitted without it
(:mod:`jointfmu.identify.holdout`); the caution.  Code computes numbers and figures, the template
lays them out.  Matplotlib (Agg canvas, no pyplot state) is imported only here.

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from __future__ import annotations

import math
import os
import shutil
import tempfile
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from ..analysis.characterize import mode_curves
from ..errors import InputError
from ..fileio import swap_into_place
from ..identify.closed_form import micro_mode
from ..identify.fit import BuildFit, ModeFit, fit_build
from ..identify.holdout import CLEAN, predict_record
from ..identify.process import FLOOR, impact
from ..identify.result import PARAM_NAMES, file_sha256, mode_summary
from ..params import JointParams, Mode
from .figures import new_figure
from .render import render_page

__all__ = ["write_fit_report"]
_TWO_PI = 2.0 * math.pi
_MARKERS = ("o", "s", "^", "v", "D", "P", "X", "<", ">")


def _figure(nrows, ncols, w=13.0, h=4.2):
    return new_figure((w, h), nrows, ncols, layout="constrained", squeeze=False)


def _color(k):
    from matplotlib import colormaps

    return colormaps["tab10"](k % 10)


def _thin(x, n=40):
    return x[:: max(1, x.size // n)]


def _band_modes(mf: ModeFit, n: int = 24, seed: int = 1):
    """Modes with theta drawn from the fit's covariance (Wald approximation), for the band."""
    rng = np.random.default_rng(seed)
    tm = mf.mode
    share = tm.joint.Kt / tm.omega0**2
    out = []
    if mf.cov is None or mf.theta is None:
        return out
    draws = rng.multivariate_normal(mf.theta, mf.cov, size=n, check_valid="ignore")
    for th in draws:
        try:
            if mf.kind == "micro":
                f0, zeta, chi, lnR = th
                out.append(micro_mode(f0, max(zeta, 0.0), chi, math.exp(lnR), share=share,
                                      beta=tm.joint.beta))
            else:
                f0, zeta, chi, lnFs, sh, beta = th
                out.append(Mode("m", f0, max(zeta, 0.0),
                                JointParams(math.exp(lnFs), sh * (_TWO_PI * f0) ** 2, chi,
                                            max(beta, 0.0))))
        except Exception:  # noqa: BLE001 - a draw outside the admissible range is skipped
            continue
    return out


def _fig_mode(mf: ModeFit, names: dict, out: Path) -> str:
    fig, ax = _figure(1, 3)
    az, af, ar = ax[0]
    lo, hi = mf.amplitude_range
    A = np.geomspace(lo, hi, 48)
    cv = mode_curves(mf.mode, A)
    band = [mode_curves(m, A) for m in _band_modes(mf)]
    if band:
        zb = np.array([c.zeta_rd for c in band])
        fb = np.array([c.freq_1 for c in band])
        az.fill_between(A, np.percentile(zb, 2.5, 0), np.percentile(zb, 97.5, 0), color="0.85",
                        label="95 % band")
        af.fill_between(A, np.percentile(fb, 2.5, 0), np.percentile(fb, 97.5, 0), color="0.85")
    az.plot(A, cv.zeta_rd, "k-", lw=1.8, label="fitted model")
    af.plot(A, cv.freq_1, "k-", lw=1.8)
    if mf.start is not None:
        cs = mode_curves(mf.start.mode(), A[A < mf.start.mode().joint.phimax])
        az.plot(cs.amplitude, cs.zeta_rd, "k:", lw=1.2, label="closed-form start")
        af.plot(cs.amplitude, cs.freq_1, "k:", lw=1.2)
    for k, (s, sim) in enumerate(zip(mf.segments, mf.curves_sim)):
        col = _color(names[s.source])
        az.plot(sim.amplitude, sim.zeta, "--", color=col, lw=1.0)
        af.plot(sim.amplitude, sim.frequency, "--", color=col, lw=1.0)
        for j, (nm, c) in enumerate([("modal", s.curve)] + list(s.sensor_curves)):
            mk = _MARKERS[j % len(_MARKERS)]
            lab = f"{Path(s.source).name}" if j == 0 else None
            az.plot(_thin(c.amplitude), _thin(c.zeta), mk, color=col, ms=3.5 if j else 4.5,
                    mfc="none" if j else col, alpha=0.8, label=lab)
            af.plot(_thin(c.amplitude), _thin(c.frequency), mk, color=col, ms=3.5 if j else 4.5,
                    mfc="none" if j else col, alpha=0.8)
            zs, fs = sim.at(c.amplitude)
            ok = np.isfinite(zs) & np.isfinite(fs)
            ar.plot(_thin(c.amplitude[ok]), _thin(100 * (c.zeta[ok] / zs[ok] - 1)), mk,
                    color=col, ms=3, mfc="none" if j else col)
            ar.plot(_thin(c.amplitude[ok]), _thin(1e4 * (c.frequency[ok] / fs[ok] - 1)), mk,
                    color=col, ms=2, alpha=0.35)
    if mf.reached_macroslip:
        pm = mf.mode.joint.phimax
        for a in (az, af):
            a.axvline(pm, color="0.4", lw=0.8, ls="-.")
    for a in (az, af, ar):
        a.set_xscale("log")
        a.set_xlabel("modal displacement amplitude [m·√kg]")
        a.grid(True, which="both", alpha=0.3)
    az.set_yscale("log")
    az.set_ylabel("damping ratio ζ (ring-down)")
    af.set_ylabel("frequency [Hz]")
    ar.set_ylabel("record/fitted - 1: ζ [%], f [0.01 %] (light)")
    ar.axhline(0.0, color="k", lw=0.8)
    az.set_title(f"mode {mf.index} {mf.label}: damping")
    af.set_title("frequency")
    ar.set_title("residuals")
    az.legend(fontsize=7, loc="best")
    name = f"mode{mf.index}.png"
    fig.savefig(out / name, format="png")
    return name


def _fig_holdout(preds, rec, out: Path) -> str:
    n = len(preds)
    fig, ax = _figure(2, n, w=max(6.0, 3.3 * n), h=6.0)
    for j, p in enumerate(preds):
        a = ax[0][j]
        a.semilogy(p.t, p.amplitude_record, "o", ms=3, color="C0", label="record")
        a.semilogy(p.t, p.amplitude_model, "-", color="k", lw=1.2, label="fitted model")
        a.set_title(f"mode {p.index} {p.label}")
        a.set_xlabel("time after impact [s]")
        a.set_ylabel("envelope [m·√kg]")
        a.grid(True, which="both", alpha=0.3)
        b = ax[1][j]
        m = min(p.signal_record.size, p.signal_model.size)
        k0 = int(round(p.t[0] / rec.dt))
        span = slice(k0, min(m, k0 + int(round(8.0 / (p.frequency * rec.dt)))))
        tt = np.arange(m)[span] * rec.dt
        b.plot(tt, p.signal_record[span], color="C0", lw=0.9, label="record, processed")
        b.plot(tt, p.signal_model[span], color="k", lw=0.9, ls="--", label="fitted model")
        b.set_xlabel("time after impact [s]")
        b.grid(True, alpha=0.3)
        if j == 0:
            a.legend(fontsize=7)
            b.legend(fontsize=7)
    name = "holdout.png"
    fig.savefig(out / name, format="png")
    return name


def _fmt(x, d=5):
    return "" if x is None else f"{x:.{d}g}"


def _hold_out_choice(records):
    """The record in the middle of the levels (by its largest response)."""
    peaks = [max(float(np.max(np.abs(c.data))) for c in r.responses) for r in records]
    order = np.argsort(peaks)
    return int(order[len(order) // 2])


def write_fit_report(bf: BuildFit, out_dir: str | os.PathLike, *, hold_out: bool = True) -> Path:
    """Write the report of a fit into ``out_dir`` (replaced as a whole, atomically).

    Parameters
    ----------
    bf : BuildFit
        With ``params`` set (:func:`jointfmu.identify.result.write_fit` sets it).
    out_dir : path-like
    hold_out : bool
        Fit again without one record and predict it (costs about one more fit).

    Returns
    -------
    Path
        ``out_dir / "index.html"``.
    """
    from .. import __version__

    target = Path(out_dir)
    if target.exists() and not target.is_dir():
        raise InputError(f"report folder {str(target)!r} exists and is not a folder")
    ps = bf.params
    if ps is None:
        raise InputError("write_fit_report: the fit has no parameter set yet (write it first)")
    names = {r.source: k for k, r in enumerate(bf.records)}
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent))
    os.chmod(tmp, 0o755)  # mkdtemp makes it private; a report is meant to be read
    try:
        modes = []
        for mf in bf.modes:
            fig = _fig_mode(mf, names, tmp) if mf.kind != "template" else None
            modes.append({
                "index": mf.index, "label": mf.label, "summary": mode_summary(mf),
                "determined": {"micro": "micro-slip", "macro": "macro-slip",
                               "template": "nothing (not excited)"}[mf.kind],
                "range": (f"{mf.amplitude_range[0]:.3g} – {mf.amplitude_range[1]:.3g}"
                          if mf.amplitude_range else "–"),
                "params": [{"value": _fmt(mf.params[n]["value"]), "source": mf.params[n]["source"],
                            "interval": (f"{mf.params[n]['interval'][0]:.5g}, "
                                         f"{mf.params[n]['interval'][1]:.5g}"
                                         if mf.params[n]["interval"] else None)}
                           for n in PARAM_NAMES],
                "collapse": f"{100 * mf.collapse:.3g} %" if mf.collapse is not None else "–",
                "chi2": f"{mf.chi2 / max(mf.dof, 1):.3g}" if mf.kind != "template" else "–",
                "warnings": mf.warnings, "figure": fig})
        holdout, note = None, ""
        if hold_out and len(bf.records) >= 2:
            k = _hold_out_choice(bf.records)
            rest = [r for j, r in enumerate(bf.records) if j != k]
            bf2 = fit_build(rest, bf.template)
            preds = predict_record(bf2, bf.records[k])
            if preds:
                holdout = {"file": Path(bf.records[k].source).name, "clean": f"{CLEAN:g}",
                           "v0_from": ("from its force channel (a true prediction)"
                                       if preds[0].v0_from == "force channel" else
                                       "fitted to the first samples of its envelope"),
                           "modes": [{"index": p.index, "label": p.label,
                                      "rms": f"{100 * p.rms_error:.3g} %",
                                      "max": f"{100 * p.max_error:.3g} %",
                                      "span": f"{p.t[0]:.3g}–{p.t[-1]:.3g} s"} for p in preds],
                           "figure": _fig_holdout(preds, bf.records[k], tmp)}
            else:
                note = "The held-out record excites no fitted mode above its noise."
        else:
            note = ("Only one record: none can be held out of the fit." if hold_out else
                    "Not requested.")
        records = []
        for r in bf.records:
            try:
                sha = file_sha256(r.source)
            except OSError:
                sha = "(not a file)"
            imp = impact(r)
            records.append({"file": Path(r.source).name, "sha256": sha,
                            "channels": ", ".join(r.names),
                            "impact": f"{imp.time:.5g} s ({imp.how})"})
        page = render_page(
            "fit.html", set_id=ps.set_id, set_hash=ps.content_hash(),
            template_id=bf.template.set_id, template_hash=bf.template.content_hash(),
            version=__version__, created=datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
            records=records, build_warnings=bf.warnings, param_names=PARAM_NAMES, modes=modes,
            holdout=holdout, holdout_note=note, floor=f"{FLOOR:g}")
        (tmp / "index.html").write_text(page, encoding="utf-8")
        swap_into_place(tmp, target)
        tmp = None
    finally:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)
    return target / "index.html"
