"""The system page of a co-simulation sweep: ``system.html``, its PNG plots and a summary CSV.

The figures are drawn here (:mod:`.figures`: no global pyplot state) and the numbers formatted;
``templates/system.html`` lays them out.  Every file is written atomically.  ``jointfmu demo``
writes this page after its sweep (:mod:`..cli.demo`).

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from __future__ import annotations

from pathlib import Path

from ..fileio import atomic_write
from ..params.names import point_name
from .figures import DPI, new_figure
from .render import render_page

__all__ = ["write_system_page", "SUMMARY_COLUMNS"]

#: Columns of ``system_summary.csv`` (those the table has), a small table for spreadsheets beside
#: the full Parquet table.
SUMMARY_COLUMNS = ("key", "build", "case", "controller", "duration", "tip_acc_peak_g",
                   "tip_acc_rms_g", "base_force_peak", "energy_joint", "energy_viscous",
                   "energy_input", "actuator_force_peak", "actuator_saturated", "lin_tip_acc_rms",
                   "lin_rms_diff", "lin_peak_diff", "lin_waveform_err", "wall_time")

_OFF_ON = ("tab:red", "tab:blue")  # bar colours, controller off / on


def _atomic_text(path: Path, text: str) -> Path:
    with atomic_write(path, "w") as f:
        f.write(text)
    return path


def _atomic_figure(fig, path: Path) -> Path:
    with atomic_write(path, "wb") as f:
        fig.savefig(f, format="png", dpi=DPI)
    return path


def _on_off(on) -> str:
    return "on" if on else "off"


def _fig_tip(df, builds, cases, path: Path) -> Path:
    """Tip RMS (bars) and peak (markers) per case, build and controller."""
    import numpy as np

    fig, axes = new_figure((4.2 * len(cases), 3.6), 1, len(cases), squeeze=False)
    w = 0.38
    for ax, case in zip(axes[0], cases):
        x = np.arange(len(builds))
        for j, on in enumerate((False, True)):
            sel = df[(df["case"] == case) & (df["controller"] == on)].set_index("build")
            vals = [sel["tip_acc_rms_g"].get(b, np.nan) for b in builds]
            peaks = [sel["tip_acc_peak_g"].get(b, np.nan) for b in builds]
            ax.bar(x + (j - 0.5) * w, vals, w, label=f"controller {_on_off(on)} (RMS)",
                   color=_OFF_ON[j])
            ax.plot(x + (j - 0.5) * w, peaks, "v", color="k", ms=5,
                    label="peak" if j == 0 else None)
        ax.set_xticks(x, builds, fontsize=8)
        ax.set_title(case)
        ax.set_ylabel("tip acceleration [g]")
        ax.grid(axis="y", alpha=0.3)
    axes[0][0].legend(fontsize=7)
    fig.tight_layout()
    return _atomic_figure(fig, path)


def _fig_energy(df, builds, cases, path: Path) -> Path:
    """Joint energy dissipated and peak interface force per build and case."""
    import numpy as np

    fig, axes = new_figure((10, 3.6), 1, 2)
    w = 0.38
    labels = [f"{b}\n{c}" for b in builds for c in cases]
    x = np.arange(len(labels))
    for j, on in enumerate((False, True)):
        sel = df[df["controller"] == on].set_index(["build", "case"])
        e = [sel["energy_joint"].get((b, c), np.nan) for b in builds for c in cases]
        f = [sel["base_force_peak"].get((b, c), np.nan) for b in builds for c in cases]
        axes[0].bar(x + (j - 0.5) * w, e, w, color=_OFF_ON[j], label=f"controller {_on_off(on)}")
        axes[1].bar(x + (j - 0.5) * w, f, w, color=_OFF_ON[j])
    for ax, yl in zip(axes, ("joint energy dissipated [J]", "peak interface force [N]")):
        ax.set_xticks(x, labels, fontsize=6, rotation=90)
        ax.set_ylabel(yl)
        ax.grid(axis="y", alpha=0.3)
    axes[0].legend(fontsize=7)
    fig.tight_layout()
    return _atomic_figure(fig, path)


def _fig_linear(df, path: Path) -> Path:
    """Equivalent-linear against nonlinear tip RMS, every run."""
    import numpy as np

    from ..cosim.loads import G0

    fig, ax = new_figure((4.8, 4.2))
    for on, mk in ((False, "o"), (True, "s")):
        sel = df[df["controller"] == on]
        ax.plot(sel["tip_acc_rms_g"], sel["lin_tip_acc_rms"] / G0, mk, mfc="none",
                label=f"controller {_on_off(on)}")
    lim = [0, 1.1 * float(np.nanmax(np.r_[df["tip_acc_rms_g"], df["lin_tip_acc_rms"] / G0]))]
    ax.plot(lim, lim, "k--", lw=0.8, label="equal")
    ax.set_xlabel("nonlinear (Iwan) tip RMS [g]")
    ax.set_ylabel("equivalent-linear tip RMS [g]")
    ax.legend(fontsize=7)
    ax.grid(alpha=0.3)
    fig.tight_layout()
    return _atomic_figure(fig, path)


def _fig_history(df, builds, worst_case, history_dir: Path, path: Path) -> Path:
    """Tip acceleration of the worst case over time, every build, controller off and on."""
    import pandas as pd

    from ..cosim.loads import G0

    fig, axes = new_figure((9, 2.3 * len(builds)), len(builds), 1, sharex=True, squeeze=False)
    for ax, b in zip(axes[:, 0], builds):
        for on, col in zip((False, True), _OFF_ON):
            sel = df[(df["build"] == b) & (df["case"] == worst_case) & (df["controller"] == on)]
            if not len(sel):
                continue
            hp = Path(history_dir) / str(sel.iloc[0]["history"])
            if hp.is_file():
                tip_a = point_name("tip", "a")
                h = pd.read_parquet(hp, columns=["time", tip_a])
                ax.plot(h["time"], h[tip_a] / G0, color=col, lw=0.6,
                        label=f"controller {_on_off(on)}")
        ax.set_ylabel(f"{b}\ntip a [g]", fontsize=8)
        ax.grid(alpha=0.3)
    axes[0, 0].set_title(f"{worst_case}: tip acceleration")
    axes[0, 0].legend(fontsize=7, loc="upper right")
    axes[-1, 0].set_xlabel("time [s]")
    fig.tight_layout()
    return _atomic_figure(fig, path)


def _results_rows(df) -> list[list[str]]:
    return [[str(r["build"]), str(r["case"]), _on_off(r["controller"]), f"{r['duration']:g}",
             f"{r['tip_acc_peak_g']:.2f}", f"{r['tip_acc_rms_g']:.2f}",
             f"{r['base_force_peak']:.1f}", f"{r['energy_joint']:.4f}",
             f"{r['actuator_force_peak']:.1f}", f"{100 * r['actuator_saturated']:.1f}",
             f"{100 * r['lin_rms_diff']:+.1f}", f"{100 * r['lin_peak_diff']:+.1f}"]
            for _, r in df.iterrows()]


def _benefit_rows(df, builds, cases) -> list[list[str]]:
    """Per build and case run both ways: change of tip RMS and of peak interface force [%]."""
    rows = []
    for b in builds:
        for cs in cases:
            a = df[(df["build"] == b) & (df["case"] == cs)].set_index("controller")
            if False in a.index and True in a.index:
                on, off = a.loc[True], a.loc[False]
                rows.append([b, cs, f"{100 * (on['tip_acc_rms'] / off['tip_acc_rms'] - 1):+.1f}",
                             f"{100 * (on['base_force_peak'] / off['base_force_peak'] - 1):+.1f}"])
    return rows


def _linear_rows(linear_rows) -> list[list[str]]:
    return [[str(r["build"]), str(r["case"]), str(r.get("label", "")),
             f"{float(r['modal_amplitude']):.3g}", f"{float(r['amplitude_over_phimax']):.3f}",
             f"{float(r['frequency_hz']):.2f}", f"{float(r['zeta']):.4f}", str(r["folder"])]
            for r in linear_rows or ()]


def write_system_page(table, out_dir, history_dir=None, title="System co-simulation",
                      report_href: str | None = None, linear_rows=None) -> dict:
    """Summary table and plots of a system sweep: ``system.html`` and PNGs in ``out_dir``.

    Parameters
    ----------
    table : pandas.DataFrame
        Rows of the sweep (:func:`..cosim.runs.run_case` columns).
    out_dir : path-like
    history_dir : path-like, optional
        Folder of the runs' history files, for the time-history plot.
    title : str
    report_href : str, optional
        Relative link to the characterization report of the same builds.
    linear_rows : list of dict, optional
        One per build and mode of the exported equivalent-linear models: ``build``, ``case``,
        ``folder``, ``label``, ``modal_amplitude``, ``amplitude_over_phimax``,
        ``frequency_hz``, ``zeta``.

    Returns
    -------
    dict of str to Path
        ``page``, ``summary_csv`` and each figure (``fig_tip``, ``fig_energy``, ``fig_linear``,
        and ``fig_history`` when the histories are there).
    """
    from ..cosim.controller import ControllerSettings
    from ..cosim.loads import LOAD_CASES

    out = Path(out_dir)
    df = table.sort_values(["build", "case", "controller"]).reset_index(drop=True)
    builds = list(dict.fromkeys(df["build"]))
    cases = [c for c in LOAD_CASES if c in set(df["case"])]
    paths: dict[str, Path] = {
        "fig_tip": _fig_tip(df, builds, cases, out / "system_tip_acceleration.png"),
        "fig_energy": _fig_energy(df, builds, cases, out / "system_joint_energy_force.png"),
        "fig_linear": _fig_linear(df, out / "system_linear_vs_nonlinear.png"),
    }
    # time histories of the worst case (largest tip RMS, controller off), every build
    worst_case = None
    if history_dir is not None and "history" in df:
        off = df[df["controller"] == False]  # noqa: E712
        if len(off):
            worst_case = off.loc[off["tip_acc_rms"].idxmax(), "case"]
            paths["fig_history"] = _fig_history(df, builds, worst_case, Path(history_dir),
                                                out / "system_worst_case_history.png")
    summary = df[[c for c in SUMMARY_COLUMNS if c in df]]
    paths["summary_csv"] = _atomic_text(out / "system_summary.csv", summary.to_csv(index=False))

    text = render_page(
        "system.html", title=title, report_href=report_href, controller=ControllerSettings(),
        cases=[(lc.name, lc.description) for lc in LOAD_CASES.values() if lc.name in cases],
        results=_results_rows(df), benefit=_benefit_rows(df, builds, cases),
        linear=_linear_rows(linear_rows),
        figures=[(k, p.name) for k, p in paths.items() if k.startswith("fig_")],
        worst_case=str(worst_case), summary_csv=paths["summary_csv"].name)
    paths["page"] = _atomic_text(out / "system.html", text)
    return paths
