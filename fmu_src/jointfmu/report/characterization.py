"""Per-build characterization reports: an HTML page with PNG plots and summary tables.

:func:`write_report` takes one or more parameter sets (builds of the same structure, usually),
rings every mode down through the FMU (or another runner, see :mod:`.characterize`), identifies
damping and frequency vs amplitude with the Hilbert transform, and writes beside them the
closed-form curves, the dissipation per cycle, hysteresis loops and the ring-down of the linear
low-amplitude model.  Builds are overlaid on the same axes.  Matplotlib is imported only here and
only when a report is written (object-oriented API with the Agg canvas: no global pyplot state).

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
from typing import Sequence

import numpy as np

from ..analysis import characterize as C
from ..analysis.runners import FmuRunner, get_runner
from ..analysis.summary import (FULL_RING_DOWNS, QUICK_RING_DOWNS, BuildSummary,
                                as_parameter_set, summarize_build)
from ..errors import InputError
from ..analysis.linear import equivalent_linear
from ..fileio import check_output_path, swap_into_place
from ..params.names import mode_name, point_name
from .figures import new_figure
from .render import Cell, Table, render_page

__all__ = ["write_report", "BuildSummary", "summarize_build", "FmuRunner", "get_runner",
           "DEFAULT_REPORT_DIR"]

#: Where ``jointfmu report`` writes by default (relative to the current folder).
DEFAULT_REPORT_DIR = Path("build") / "report"

_G = 9.80665  # m/s^2, standard gravity (ISO 80000-3), for accelerations shown in g
_TWO_PI = 2.0 * math.pi
_RATIOS = (0.1, 0.5, 1.0)  # amplitudes, relative to phimax, shown in the tables


# ------------------------------------------------------------------------------------------------
# figures (matplotlib, Agg)
# ------------------------------------------------------------------------------------------------
def _figure(nrows, ncols, w=11.0, h=7.5):
    return new_figure((w, h), nrows, ncols, layout="constrained", squeeze=False)


def _save(fig, path: Path) -> str:
    fig.savefig(path, format="png")
    return path.name


def _grid(n):
    return (1, 1) if n == 1 else (1, 2) if n == 2 else (2, 2) if n <= 4 else (math.ceil(n / 3), 3)


def _axis_spec(summaries, i):
    """x-axis for mode i: physical displacement at a common reference point when every build has
    it, else the modal amplitude."""
    lab = summaries[0].ref_points[i][0] if i < len(summaries[0].ref_points) else None
    ok = lab is not None and all(
        i < s.params.n_modes and any(p.label == lab and p.shape[i] for p in s.params.output_points)
        for s in summaries)
    if ok:
        def scale(s):
            return 1e6 * abs(next(p for p in s.params.output_points if p.label == lab).shape[i])
        return scale, f"displacement amplitude at '{lab}' [µm]"
    return (lambda s: 1e6), "modal amplitude [µm·√kg]"


def _modes_figure(summaries, draw, ylabel, fname, out: Path, *, logy=False, legend_extra=()):
    n = max(s.params.n_modes for s in summaries)
    r, c = _grid(n)
    fig, axes = _figure(r, c)
    for i in range(r * c):
        ax = axes.flat[i]
        if i >= n:
            ax.set_visible(False)
            continue
        scale, xlabel = _axis_spec(summaries, i)
        for k, s in enumerate(summaries):
            if i < s.params.n_modes:
                draw(ax, s, i, scale(s), f"C{k}")
        ax.set_xscale("log")
        if logy:
            ax.set_yscale("log")
        ax.set_xlabel(xlabel)
        ax.set_ylabel(ylabel)
        m = summaries[0].params.modes[i] if i < summaries[0].params.n_modes else None
        ax.set_title(f"mode {i + 1}" + (f" ({m.label})" if m else ""), fontsize=10)
        ax.grid(True, which="major", alpha=0.3)
    _legend(fig, axes.flat[0], summaries, legend_extra)
    return _save(fig, out / fname)


def _legend(fig, ax, summaries, extra):
    from matplotlib.lines import Line2D

    handles = [Line2D([], [], color=f"C{k}", lw=2, label=s.params.set_id)
               for k, s in enumerate(summaries)]
    handles += [Line2D([], [], color="0.3", **kw) for kw in extra]
    fig.legend(handles=handles, loc="outside lower center", ncols=min(len(handles), 4), fontsize=9,
               frameon=False)


def _marker_points(cv, est, n=28):
    """Hilbert estimates at log-spaced amplitudes over the range the record covers well (from
    0.02 phimax up: below, the mode has rung far down and numerical noise dominates)."""
    lo = max(est.amplitude.min(), 0.02 * cv.phimax)
    hi = est.amplitude.max()
    if not hi > lo:
        return np.array([]), np.array([]), np.array([])
    A = np.geomspace(lo, hi, n)
    z, f = est.at(A)
    return A, z, f


def _onset(ax, x, color):
    ax.axvline(x, color=color, ls=":", lw=1)


def _fig_damping(summaries, out):
    def draw(ax, s, i, sc, col):
        cv, est = s.curves[i], s.estimates[i]
        x = cv.amplitude * sc
        ax.plot(x, 100 * cv.zeta_rd, color=col, lw=1.8)
        ax.plot(x, 100 * cv.zeta_eq, color=col, lw=1.2, ls="--")
        A, z, _ = _marker_points(cv, est)
        ax.plot(A * sc, 100 * z, "o", ms=3.5, mfc="none", color=col)
        ax.set_ylim(bottom=0)
        _onset(ax, cv.phimax * sc, col)

    extra = ({"lw": 1.8, "label": "ring-down damping ζ_rd (closed form)"},
             {"lw": 1.2, "ls": "--", "label": "equivalent (harmonic) damping ζ_eq"},
             {"ls": "none", "marker": "o", "mfc": "none", "label": "Hilbert estimate from ring-down"},
             {"ls": ":", "label": "onset of macro-slip"})
    return _modes_figure(summaries, draw, "damping ratio [%]", "damping.png", out,
                         legend_extra=extra)


def _fig_frequency(summaries, out):
    def draw(ax, s, i, sc, col):
        cv, est = s.curves[i], s.estimates[i]
        ax.plot(cv.amplitude * sc, cv.freq_1, color=col, lw=1.8)
        A, _, f = _marker_points(cv, est)
        ax.plot(A * sc, f, "o", ms=3.5, mfc="none", color=col)
        ax.axhline(cv.f_macro, color=col, lw=0.8, ls="-.")
        _onset(ax, cv.phimax * sc, col)

    extra = ({"lw": 1.8, "label": "first-harmonic frequency (closed form)"},
             {"ls": "none", "marker": "o", "mfc": "none", "label": "Hilbert estimate from ring-down"},
             {"ls": "-.", "lw": 0.8, "label": "macro-slip frequency √Kinf/2π"},
             {"ls": ":", "label": "onset of macro-slip"})
    return _modes_figure(summaries, draw, "frequency [Hz]", "frequency.png", out, legend_extra=extra)


def _fig_dissipation(summaries, out):
    def draw(ax, s, i, sc, col):
        cv = s.curves[i]
        m = s.params.modes[i]
        ax.plot(cv.amplitude * sc, cv.dissipation, color=col, lw=1.8)
        A = cv.phimax * np.geomspace(2e-3, 2.5, 9)
        ax.plot(A * sc, C.simulated_dissipation(m, A), "s", ms=4, mfc="none", color=col)
        # micro-slip slope measured on the exact element over a decade, against 3 + chi
        a2 = cv.phimax * np.array([0.005, 0.05])
        d2 = C.simulated_dissipation(m, a2)
        slope = math.log(d2[1] / d2[0]) / math.log(10.0)
        k = int(col[1:])
        ax.text(0.98, 0.04 + 0.075 * k,
                f"{s.params.build}: measured slope {slope:.3f}, 3+χ = {3 + m.joint.chi:.2f}",
                transform=ax.transAxes, ha="right", va="bottom", fontsize=7.5, color=col,
                bbox={"fc": "white", "ec": "none", "alpha": 0.85, "pad": 0.5})
        _onset(ax, cv.phimax * sc, col)

    extra = ({"lw": 1.8, "label": "closed form (Segalman 2005)"},
             {"ls": "none", "marker": "s", "mfc": "none", "label": "exact joint element, one cycle"},
             {"ls": ":", "label": "onset of macro-slip"})
    return _modes_figure(summaries, draw, "joint dissipation per cycle [J]", "dissipation.png", out,
                         logy=True, legend_extra=extra)


def _fig_loops(s: BuildSummary, k: int, out: Path):
    n = s.params.n_modes
    r, c = _grid(n)
    fig, axes = _figure(r, c, h=7.0)
    levels = (0.3, 0.6, 1.0, 1.5)
    for i in range(r * c):
        ax = axes.flat[i]
        if i >= n:
            ax.set_visible(False)
            continue
        m = s.params.modes[i]
        pm = s.curves[i].phimax
        for j, lev in enumerate(levels):
            u, F = C.hysteresis_loop(m, lev * pm, n=300, cycles=1)
            ax.plot(1e6 * u, F, color=f"C{j}", lw=1.3, label=f"A = {lev:g} φmax")
        ax.axhline(m.joint.Fs, color="0.4", ls=":", lw=0.8)
        ax.axhline(-m.joint.Fs, color="0.4", ls=":", lw=0.8)
        ax.set_xlabel("modal displacement q [µm·√kg]")
        ax.set_ylabel("joint force [N/√kg]")
        ax.set_title(f"mode {i + 1} ({m.label}), φmax = {1e6 * pm:.3g} µm·√kg, ±Fs dotted",
                     fontsize=9)
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=7, loc="upper left")
    fig.suptitle(f"Hysteresis loops of the joints, {s.params.set_id} (exact joint element)",
                 fontsize=11)
    return _save(fig, out / f"loops_{k + 1}.png")


def _linear_ringdown(ps, rd: C.RingDown, point: str) -> np.ndarray:
    """Acceleration at ``point`` of the low-amplitude linear model (f0, zeta) after the same pulse
    as ``rd``, exact for held inputs (zero-order-hold discretization by scipy.signal)."""
    from scipy import signal

    lm = equivalent_linear(ps, np.zeros(ps.n_modes),
                           inputs=[mode_name(i + 1, "force") for i in range(ps.n_modes)],
                           outputs=[point_name(point, "a")])
    dsys = signal.StateSpace(lm.A, lm.B, lm.C, lm.D).to_discrete(rd.dt, method="zoh")
    pulse = rd.impulses / rd.dt
    # x_k: state at t_k; the pulse is held over [0, dt).  Sample k >= 1 is read after the step and
    # before the input changes (as the runners do), so sample 1 still sees the pulse through D.
    x = dsys.B @ pulse
    y = np.zeros(rd.t.size)
    y[1] = (lm.C @ x + lm.D @ pulse)[0]
    for k in range(2, rd.t.size):
        x = dsys.A @ x
        y[k] = (lm.C @ x)[0]
    return y


def _fig_ringdown(summaries, out):
    n = len(summaries)
    fig, axes = _figure(n, 2, h=2.5 * n + 0.8)
    for k, s in enumerate(summaries):
        ps, rd = s.params, s.ringdown_1
        lab = s.ref_points[0][0]
        ax, az = axes[k]
        if lab is None:
            ax.set_visible(False)
            az.set_visible(False)
            continue
        j = rd.output_labels.index(lab)
        t = rd.t[2:]  # samples 0 and 1 are taken while the pulse acts
        a_nl = rd.point_a[2:, j] / _G
        a_lin = _linear_ringdown(ps, rd, lab)[2:] / _G
        m = ps.modes[0]
        ax.plot(t, a_lin, color="0.6", lw=0.5)
        ax.plot(t, a_nl, color=f"C{k}", lw=0.5)
        ax.set_xlabel("time after the pulse [s]")
        ax.set_ylabel(f"acceleration at '{lab}' [g]")
        ax.set_title(f"{ps.set_id}: mode 1 ({m.label}) struck to ≈2 φmax", fontsize=9)
        ax.grid(True, alpha=0.3)
        T = 1.0 / m.f0
        z0 = 12 * T
        zoom = (t >= z0) & (t <= z0 + 6 * T)
        az.plot(1e3 * t[zoom], a_lin[zoom], color="0.6", lw=1.2)
        az.plot(1e3 * t[zoom], a_nl[zoom], color=f"C{k}", lw=1.2)
        az.set_xlabel("time after the pulse [ms]")
        az.set_ylabel(f"acceleration at '{lab}' [g]")
        az.set_title("periods 12 to 18: the Iwan model has decayed more and drifted in phase",
                     fontsize=9)
        az.grid(True, alpha=0.3)
    from matplotlib.lines import Line2D

    handles = [Line2D([], [], color="0.6", lw=1.2, label="linear model, low-amplitude f0 and ζ")]
    handles += [Line2D([], [], color=f"C{k}", lw=1.2,
                       label=f"Iwan model {s.params.set_id} ({s.ringdown_1.source})")
                for k, s in enumerate(summaries)]
    fig.legend(handles=handles, loc="outside lower center", ncols=2, fontsize=9, frameon=False)
    return _save(fig, out / "ringdown.png")


# ------------------------------------------------------------------------------------------------
# tables and page (laid out by templates/characterization.html)
# ------------------------------------------------------------------------------------------------
def _num(x, digits=3) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "–"
    return f"{x:.{digits}g}"


def _length(x_m: float) -> str:
    """A displacement in µm, or in mm from 1 mm up."""
    return f"{_num(1e3 * x_m)} mm" if x_m >= 1e-3 else f"{_num(1e6 * x_m)} µm"


def _params_table(s: BuildSummary, k: int) -> Table:
    rows = []
    for i, m in enumerate(s.params.modes):
        j = m.joint
        cv = s.curves[i]
        rows.append([f"{i + 1} {m.label}", _num(m.f0, 4), _num(100 * m.zeta), _num(j.Fs),
                     _num(j.Kt), _num(j.chi), _num(j.beta), _num(1e6 * cv.phimax),
                     _num(cv.f_macro, 4)])
    return Table(["mode", "f0 [Hz]", "ζ [%]", "Fs [N/√kg]", "Kt [1/s²]", "χ", "β",
                  "φmax [µm·√kg]", "f macro-slip [Hz]"], rows, id=f"parameters-{k + 1}")


def _onset_table(s: BuildSummary, k: int) -> Table:
    pts = s.params.output_points
    rows = []
    for i, m in enumerate(s.params.modes):
        cv = s.curves[i]
        w1 = _TWO_PI * float(C.mode_curves(m, np.array([cv.phimax])).freq_1[0])
        cells = [f"{i + 1} {m.label}"]
        for p in pts:
            phi = abs(p.shape[i])
            cells.append(f"{_length(phi * cv.phimax)} / {_num(w1**2 * phi * cv.phimax / _G)} g"
                         if phi else "–")
        rows.append(cells)
    return Table(["mode"] + [f"'{p.label}': x / a" for p in pts], rows, id=f"onset-{k + 1}")


def _amplitude_table(s: BuildSummary, k: int) -> Table:
    rows = []
    for i, m in enumerate(s.params.modes):
        cv = s.curves[i]
        A = cv.phimax * np.array(_RATIOS)
        at = C.mode_curves(m, A)
        z_h, _ = s.estimates[i].at(A)
        drop = 100 * (1 - at.freq_1[-1] / m.f0)
        rows.append([f"{i + 1} {m.label}"]
                    + [_num(100 * v) for v in at.zeta_rd] + [_num(100 * v) for v in at.zeta_eq]
                    + [_num(100 * v) for v in z_h] + [_num(drop)])
    r = [f"{v:g}" for v in _RATIOS]
    head = (["mode"] + [f"ζ_rd [%] at {x} φmax" for x in r] + [f"ζ_eq [%] at {x} φmax" for x in r]
            + [f"ζ Hilbert [%] at {x} φmax" for x in r] + ["frequency drop at φmax [%]"])
    return Table(head, rows, cls="wide", id=f"amplitudes-{k + 1}")


def _compare_table(summaries) -> Table:
    rows = []
    n = max(s.params.n_modes for s in summaries)
    for i in range(n):
        for k, s in enumerate(summaries):
            if i >= s.params.n_modes:
                continue
            m = s.params.modes[i]
            cv = s.curves[i]
            lab, phi = s.ref_points[i]
            at = C.mode_curves(m, np.array([0.5 * cv.phimax, cv.phimax]))
            w1 = _TWO_PI * at.freq_1[1]
            onset = (f"{_num(w1**2 * phi * cv.phimax / _G)} g at '{lab}'" if lab
                     else f"{_num(1e6 * cv.phimax)} µm·√kg (modal)")
            rows.append([f"{i + 1} {m.label}" if k == 0 else "",
                         Cell(s.params.set_id, swatch=_color(k)),
                         _num(m.f0, 4), _num(100 * at.zeta_rd[0]), onset,
                         _num(100 * (1 - at.freq_1[1] / m.f0))])
    return Table(["mode", "build", "f0 [Hz]", "ζ_rd at 0.5 φmax [%]",
                  "macro-slip onset (acceleration amplitude)", "frequency drop at onset [%]"], rows,
                 id="comparison")


def _identity_table(summaries) -> Table:
    rows = [[Cell(swatch=_color(k)), s.params.set_id, Cell(s.params.content_hash(), code=True),
             str(s.params.source), s.params.provenance.date, s.params.provenance.source_data]
            for k, s in enumerate(summaries)]
    return Table(["", "parameter set", "content hash (SHA-256)", "file", "fitted", "source data"],
                 rows, id="builds")


def _color(k):
    from matplotlib import colormaps
    from matplotlib.colors import to_hex

    return to_hex(colormaps["tab10"](k % 10))


def _page(summaries, figs, created, version) -> str:
    builds = [{"set_id": s.params.set_id, "description": s.params.description,
               "colour": _color(k), "params": _params_table(s, k), "onset": _onset_table(s, k),
               "amplitudes": _amplitude_table(s, k), "loops": figs["loops"][k]}
              for k, s in enumerate(summaries)]
    return render_page("characterization.html", builds=builds,
                       identity=_identity_table(summaries), comparison=_compare_table(summaries),
                       figures=figs, created=created, version=version,
                       runners=sorted({s.ringdown.source for s in summaries}))


def write_report(params_list: Sequence, out_dir: str | os.PathLike | None = None,
                 runner=None, *, quick: bool = False) -> Path:
    """Write the characterization report of one or more builds.

    Parameters
    ----------
    params_list : sequence of ParameterSet or path
        The builds (at least one), overlaid in this order.
    out_dir : path-like, optional
        Report folder (default ``build/report``); it is replaced as a whole.
    runner : Runner, "fmu", "core" or None
        Who simulates the ring-downs (default the FMU built from each set).
    quick : bool
        Reduced size for tests and a first look: the ring-downs of
        :data:`jointfmu.analysis.summary.QUICK_RING_DOWNS` (down to 0.2 phimax, 24 samples per
        period; the Hilbert estimates then cover 0.2..~1 phimax only).

    Returns
    -------
    Path
        ``out_dir / "index.html"``.

    Notes
    -----
    Written atomically: into a temporary folder beside ``out_dir``, which then replaces it; a
    failure leaves an existing report untouched.
    """
    from .. import __version__

    if isinstance(params_list, (str, os.PathLike)) or not hasattr(params_list, "__iter__"):
        params_list = [params_list]
    sets = [as_parameter_set(p) for p in params_list]
    if not sets:
        raise InputError("write_report: give at least one parameter set")
    target = Path(out_dir) if out_dir is not None else DEFAULT_REPORT_DIR
    check_output_path(target, "folder", "report folder")
    run = get_runner(runner, default="fmu")
    plan = QUICK_RING_DOWNS if quick else FULL_RING_DOWNS
    summaries = [summarize_build(p, run, plan=plan) for p in sets]
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent))
    os.chmod(tmp, 0o755)  # mkdtemp makes it private; a report is meant to be read
    try:
        figs = {"damping": _fig_damping(summaries, tmp), "frequency": _fig_frequency(summaries, tmp),
                "dissipation": _fig_dissipation(summaries, tmp),
                "ringdown": _fig_ringdown(summaries, tmp),
                "loops": [_fig_loops(s, k, tmp) for k, s in enumerate(summaries)]}
        created = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
        (tmp / "index.html").write_text(_page(summaries, figs, created, __version__),
                                        encoding="utf-8")
        swap_into_place(tmp, target)
        tmp = None
    finally:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)
    return target / "index.html"
