"""``jointfmu demo``: a systems engineer's day on the shipped example, in one command.

Steps (each is also a command of its own):

1. ``jointfmu check``      validate the three builds of the avionics tray (examples/tray_*.toml);
2. ``jointfmu build``      build their FMUs;
3. ``jointfmu report``     characterization report comparing the builds;
4. ``jointfmu sweep``      every build x load case x controller off/on through the co-simulation
   system (:mod:`.system`) on Dask (:mod:`.sweep`); ``jointfmu cosim`` is one such run;
5. ``jointfmu linearize``  equivalent-linear models for the controls team at the amplitude that
   matters: per build, the sine-equivalent modal amplitudes (sqrt(2) x RMS of each mode) of the
   load case with the largest RMS tip acceleration, controller off;
6. system page           summary tables and plots of the sweep and of the linear models
   (``system/system.html``).

The example data are invented (see examples/README.md).  A fitted model is no substitute for
qualification testing; defer to the applicable codes, standards and licensed engineering
practice.
"""
from __future__ import annotations

import argparse
import html
import json
import tempfile
import time
from contextlib import nullcontext
from importlib import resources
from dataclasses import replace
from pathlib import Path
from typing import Sequence

from ..fileio import atomic_write, check_output_path
from ..errors import InputError, ParameterError

__all__ = ["CAUTION", "EXAMPLE_FILES", "examples_folder", "find_examples", "run_demo",
           "write_system_page", "add_system_options", "system_settings", "add_cosim_args",
           "cmd_cosim", "add_sweep_args", "cmd_sweep", "add_demo_args", "cmd_demo"]

#: Printed by the demo and written on its pages.
CAUTION = ("A fitted model is no substitute for qualification testing; defer to the applicable "
           "codes, standards and licensed engineering practice.")

#: The shipped example builds, in the order they are compared.
EXAMPLE_FILES = ("tray_nominal.toml", "tray_undertorqued.toml", "tray_worn.toml")


def examples_folder() -> Path:
    """The folder of the shipped examples inside the installed package (``jointfmu/examples``).

    Found with :mod:`importlib.resources`, so it works from a wheel installed anywhere, whatever
    the current folder.  (In the source tree the top-level ``examples`` is a link to it.)

    Raises
    ------
    InputError
        When the package was installed without them or is not on the file system (a zip).
    """
    top = __package__.rpartition(".")[0]  # the jointfmu package
    folder = resources.files(top).joinpath("examples")
    if not isinstance(folder, Path) or not folder.is_dir():
        raise InputError(f"the shipped examples ({top}/examples) are not in the installed package "
                         f"at {folder}; reinstall jointfmu, or give parameter files with "
                         "--params FILE ...")
    return folder


def find_examples(folder=None) -> list[Path]:
    """Paths of the three example parameter files.

    Parameters
    ----------
    folder : path-like, optional
        Folder holding ``tray_*.toml``; default the package's own (:func:`examples_folder`).

    Raises
    ------
    InputError
        When the folder or a file is missing.
    """
    folder = examples_folder() if folder is None else Path(folder)
    files = [folder / f for f in EXAMPLE_FILES]
    missing = [str(f) for f in files if not f.is_file()]
    if missing:
        raise InputError(f"example file(s) missing: {', '.join(missing)}")
    return files


# ------------------------------------------------------------------------------ helpers
def _atomic_text(path: Path, text: str) -> Path:
    with atomic_write(path, "w") as f:
        f.write(text)
    return path


def _atomic_figure(fig, path: Path) -> Path:
    with atomic_write(path, "wb") as f:
        fig.savefig(f, format="png", dpi=100)
    return path


def system_settings(args) -> "object":
    """The :class:`.system.SystemSettings` of the options :func:`add_system_options` declared."""
    from ..cosim.system import ControllerSettings, SystemSettings

    c = ControllerSettings(gain=args.gain, tau=args.tau, force_limit=args.force_limit)
    return SystemSettings(step=args.step, duration=args.duration, seed=args.seed,
                          level=args.level, controller=c,
                          components=getattr(args, "components", "python"))


def _controller_modes(text: str) -> tuple[bool, ...]:
    table = {"off": (False,), "on": (True,), "both": (False, True)}
    if text not in table:
        raise InputError(f"--controller {text!r}: allowed are off, on, both")
    return table[text]


def _cases(names: Sequence[str] | None) -> list[str]:
    from ..cosim.system import LOAD_CASES

    if not names:
        return list(LOAD_CASES)
    bad = [n for n in names if n not in LOAD_CASES]
    if bad:
        raise InputError(f"load case(s) {', '.join(map(repr, bad))}: allowed are "
                         f"{', '.join(LOAD_CASES)}")
    return list(names)


def _build_all(param_files: Sequence[Path], fmu_dir: Path) -> list[tuple[Path, Path]]:
    from ..fmu.build import build_fmu

    out = []
    for p in param_files:
        target = fmu_dir / f"{Path(p).stem}.fmu"
        r = build_fmu(p, target)
        out.append((Path(p), r.path))
    return out


def _sweep_tasks(builds, cases, controller, settings, history_dir, quick: bool):
    from ..cosim.sweep import system_tasks
    from ..cosim.system import LOAD_CASES

    if not quick or settings.duration is not None:
        return system_tasks(builds, cases, controller, settings, history_dir)
    tasks = []
    for c in cases:
        s = replace(settings, duration=LOAD_CASES[c].quick_duration)
        tasks += system_tasks(builds, [c], controller, s, history_dir)
    return tasks


# ----------------------------------------------------------------------------- cosim CLI
def add_system_options(p: argparse.ArgumentParser, components: bool = True) -> None:
    """The options of a system run (step, duration, load, controller values; with
    ``components`` also ``--components``), read back by :func:`system_settings`."""
    from ..cosim.system import ControllerSettings, SystemSettings

    d, c = SystemSettings(), ControllerSettings()
    g = p.add_argument_group("system")
    g.add_argument("--step", type=float, default=d.step, metavar="S",
                   help=f"communication step [s] (default {d.step:g})")
    g.add_argument("--duration", type=float, default=None, metavar="S",
                   help="simulated time per run [s] (default: each load case's own)")
    g.add_argument("--seed", type=int, default=d.seed, help=f"seed of the random load (default {d.seed})")
    g.add_argument("--level", type=float, default=d.level, metavar="X",
                   help="scale on the load profile (default 1)")
    g.add_argument("--gain", type=float, default=c.gain, metavar="NS_PER_M",
                   help=f"controller velocity gain [N s/m] (default {c.gain:g})")
    g.add_argument("--tau", type=float, default=c.tau, metavar="S",
                   help=f"actuator time constant [s] (default {c.tau:g})")
    g.add_argument("--force-limit", type=float, default=c.force_limit, metavar="N",
                   help=f"actuator force limit [N] (default {c.force_limit:g})")
    if not components:
        return
    g.add_argument("--components", default="python", choices=["python", "fmu"],
                   help="loads model and controller as Python components of the loop (default) "
                        "or as FMUs of their own: a system of three FMUs, same numbers")


def add_cosim_args(p: argparse.ArgumentParser) -> None:
    """Arguments of ``jointfmu cosim``."""
    from ..cosim.system import LOAD_CASES

    p.add_argument("model", metavar="FMU|PARAMS", help="an FMU, or a parameter file to build first")
    p.add_argument("--case", required=True, choices=list(LOAD_CASES), help="load case")
    p.add_argument("--controller", default="off", choices=["off", "on"],
                   help="active damper off or on (default off)")
    p.add_argument("-o", "--output", required=True, metavar="FILE",
                   help="time histories to write (.parquet or .csv)")
    add_system_options(p)


def cmd_cosim(args) -> int:
    """One system run: loads model -> tray FMU <-> controller; histories and a summary."""
    import pandas as pd

    from ..fmu.build import build_fmu
    from ..cosim.sweep import write_table
    from ..cosim.runs import run_case

    out = Path(args.output)
    if out.suffix.lower() not in (".parquet", ".csv"):
        raise InputError(f"--output {str(out)!r}: allowed suffixes are .parquet and .csv")
    check_output_path(out, "file", "--output")
    s = system_settings(args)
    model = Path(args.model)
    with tempfile.TemporaryDirectory(prefix="jointfmu_cosim_") as tmp:
        if model.suffix.lower() == ".fmu":
            fmu, params = model, None
        else:
            fmu, params = build_fmu(model, Path(tmp) / "m.fmu").path, model
        hist = Path(tmp) / "h.parquet"
        row = run_case(params, fmu, args.case, args.controller == "on", s, history_path=hist)
        write_table(pd.read_parquet(hist), out)
    print(f"{row['set_id']}  case {args.case}, controller {args.controller}, "
          f"{row['duration']:g} s at h = {row['step']:g} s ({row['wall_time']:.1f} s wall)")
    print(f"  tip acceleration   peak {row['tip_acc_peak_g']:8.2f} g   RMS {row['tip_acc_rms_g']:7.2f} g")
    print(f"  interface force    peak {row['base_force_peak']:8.1f} N")
    print(f"  joint dissipation       {row['energy_joint']:8.4f} J   (viscous {row['energy_viscous']:.4f} J)")
    print(f"  actuator force     peak {row['actuator_force_peak']:8.2f} N   "
          f"at limit {100 * row['actuator_saturated']:.1f} % of steps")
    print(f"  equivalent linear  tip RMS {row['lin_rms_diff']:+.1%}, peak {row['lin_peak_diff']:+.1%} "
          f"vs nonlinear ({row['lin_model']})")
    print(f"wrote {out}")
    print(CAUTION)
    return 0


# ----------------------------------------------------------------------------- sweep CLI
def add_sweep_args(p: argparse.ArgumentParser) -> None:
    """Arguments of ``jointfmu sweep``."""
    from ..cosim.system import LOAD_CASES

    p.add_argument("params", nargs="+", metavar="PARAMS", help="parameter files (one per build)")
    p.add_argument("--cases", nargs="+", metavar="CASE", default=None,
                   help=f"load cases (default all: {', '.join(LOAD_CASES)})")
    p.add_argument("--controller", default="both", choices=["off", "on", "both"],
                   help="controller off, on, or both (default both)")
    p.add_argument("--out", default="build/sweep", metavar="DIR",
                   help="folder for FMUs, results.parquet and histories (default build/sweep)")
    p.add_argument("--scheduler", default=None, metavar="ADDR",
                   help="Dask scheduler address (tcp://host:8786); default a local cluster")
    p.add_argument("--workers", type=int, default=2, metavar="N",
                   help="worker processes of the local cluster (default 2)")
    p.add_argument("--loop", action="store_true", help="run in this process, no Dask")
    p.add_argument("--quick", action="store_true", help="short runs (each case's quick duration)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    add_system_options(p)


def cmd_sweep(args) -> int:
    """Builds x load cases x controller through the system, on Dask; rerun skips done rows."""
    from ..cosim.sweep import raise_failures, run_tasks

    files = [Path(p) for p in args.params]
    # every input checked before anything is written
    _check_files(files)
    cases, modes = _cases(args.cases), _controller_modes(args.controller)
    settings = system_settings(args)
    _check_scheduler(args.scheduler)
    out = check_output_path(args.out, "into", "--out")
    builds = _build_all(files, out / "fmus")
    tasks = _sweep_tasks(builds, cases, modes, settings, out / "histories", args.quick)
    res = run_tasks(tasks, out / "results.parquet", executor="loop" if args.loop else "dask",
                    scheduler=args.scheduler, n_workers=args.workers,
                    progress=not args.no_progress)
    print(f"{len(res.ran)} run(s) done, {len(res.skipped)} already in {res.path} "
          f"({res.wall_time:.1f} s)")
    print(_text_table(res.table, [t.key for t in tasks]))
    raise_failures(res)
    print(CAUTION)
    return 0


def _check_scheduler(address) -> None:
    if address is not None and (not isinstance(address, str) or "://" not in address):
        raise InputError(f"--scheduler {address!r}: allowed is a Dask scheduler address such as "
                         "tcp://host:8786")


def _check_files(files: Sequence[Path]) -> None:
    from ..params import check_parameter_file

    problems = []
    for f in files:
        problems += check_parameter_file(f)
    if problems:
        raise ParameterError(problems)


def _text_table(df, keys=None) -> str:
    if keys is not None:
        df = df[df["key"].isin(keys)]
    if len(df) == 0:
        return "(no results)"
    head = f"{'build':<12} {'case':<15} {'ctrl':<4} {'tip pk g':>9} {'tip RMS g':>9} " \
           f"{'F_if pk N':>10} {'E_joint J':>10} {'lin RMS':>8}"
    lines = [head]
    for _, r in df.sort_values(["build", "case", "controller"]).iterrows():
        lines.append(f"{r['build']:<12} {r['case']:<15} {'on' if r['controller'] else 'off':<4} "
                     f"{r['tip_acc_peak_g']:>9.2f} {r['tip_acc_rms_g']:>9.2f} "
                     f"{r['base_force_peak']:>10.1f} {r['energy_joint']:>10.4f} "
                     f"{r['lin_rms_diff']:>+8.1%}")
    return "\n".join(lines)


# ------------------------------------------------------------------------- system page
def write_system_page(table, out_dir, history_dir=None, title="System co-simulation",
                      report_href: str | None = None, linear_rows=None) -> dict:
    """Summary table and plots of a system sweep: ``system.html`` and PNGs in ``out_dir``.

    Parameters
    ----------
    table : pandas.DataFrame
        Rows of the sweep (:func:`.system.run_case` columns).
    out_dir : path-like
    history_dir : path-like, optional
        Folder of the runs' history files, for the time-history plot.
    report_href : str, optional
        Relative link to the characterization report of the same builds.
    linear_rows : list of dict, optional
        One per build and mode of the exported equivalent-linear models: ``build``, ``case``,
        ``folder``, ``label``, ``modal_amplitude``, ``amplitude_over_phimax``,
        ``frequency_hz``, ``zeta``.

    Returns
    -------
    dict of str to Path
        ``page``, ``summary_csv`` and each figure.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np
    import pandas as pd

    from ..cosim.system import G0, LOAD_CASES, ControllerSettings

    out = Path(out_dir)
    df = table.sort_values(["build", "case", "controller"]).reset_index(drop=True)
    builds = list(dict.fromkeys(df["build"]))
    cases = [c for c in LOAD_CASES if c in set(df["case"])]
    paths: dict[str, Path] = {}

    # 1. tip RMS and peak per case, build, controller
    fig, axes = plt.subplots(1, len(cases), figsize=(4.2 * len(cases), 3.6), squeeze=False)
    w = 0.38
    for ax, case in zip(axes[0], cases):
        x = np.arange(len(builds))
        for j, on in enumerate((False, True)):
            sel = df[(df["case"] == case) & (df["controller"] == on)].set_index("build")
            vals = [sel["tip_acc_rms_g"].get(b, np.nan) for b in builds]
            peaks = [sel["tip_acc_peak_g"].get(b, np.nan) for b in builds]
            ax.bar(x + (j - 0.5) * w, vals, w, label=f"controller {'on' if on else 'off'} (RMS)",
                   color=("tab:red", "tab:blue")[j])
            ax.plot(x + (j - 0.5) * w, peaks, "v", color="k", ms=5,
                    label="peak" if j == 0 else None)
        ax.set_xticks(x, builds, fontsize=8)
        ax.set_title(case)
        ax.set_ylabel("tip acceleration [g]")
        ax.grid(axis="y", alpha=0.3)
    axes[0][0].legend(fontsize=7)
    fig.tight_layout()
    paths["fig_tip"] = _atomic_figure(fig, out / "system_tip_acceleration.png")
    plt.close(fig)

    # 2. joint energy and interface force
    fig, axes = plt.subplots(1, 2, figsize=(10, 3.6))
    labels = [f"{b}\n{c}" for b in builds for c in cases]
    x = np.arange(len(labels))
    for j, on in enumerate((False, True)):
        sel = df[df["controller"] == on].set_index(["build", "case"])
        e = [sel["energy_joint"].get((b, c), np.nan) for b in builds for c in cases]
        f = [sel["base_force_peak"].get((b, c), np.nan) for b in builds for c in cases]
        axes[0].bar(x + (j - 0.5) * w, e, w, color=("tab:red", "tab:blue")[j],
                    label=f"controller {'on' if on else 'off'}")
        axes[1].bar(x + (j - 0.5) * w, f, w, color=("tab:red", "tab:blue")[j])
    for ax, yl in zip(axes, ("joint energy dissipated [J]", "peak interface force [N]")):
        ax.set_xticks(x, labels, fontsize=6, rotation=90)
        ax.set_ylabel(yl)
        ax.grid(axis="y", alpha=0.3)
    axes[0].legend(fontsize=7)
    fig.tight_layout()
    paths["fig_energy"] = _atomic_figure(fig, out / "system_joint_energy_force.png")
    plt.close(fig)

    # 3. equivalent linear vs nonlinear
    fig, ax = plt.subplots(figsize=(4.8, 4.2))
    for on, mk in ((False, "o"), (True, "s")):
        sel = df[df["controller"] == on]
        ax.plot(sel["tip_acc_rms_g"], sel["lin_tip_acc_rms"] / G0, mk, mfc="none",
                label=f"controller {'on' if on else 'off'}")
    lim = [0, 1.1 * float(np.nanmax(np.r_[df["tip_acc_rms_g"], df["lin_tip_acc_rms"] / G0]))]
    ax.plot(lim, lim, "k--", lw=0.8, label="equal")
    ax.set_xlabel("nonlinear (Iwan) tip RMS [g]")
    ax.set_ylabel("equivalent-linear tip RMS [g]")
    ax.legend(fontsize=7)
    ax.grid(alpha=0.3)
    fig.tight_layout()
    paths["fig_linear"] = _atomic_figure(fig, out / "system_linear_vs_nonlinear.png")
    plt.close(fig)

    # 4. time histories of the worst case (largest tip RMS, controller off), every build
    worst_case = None
    if history_dir is not None and "history" in df:
        off = df[df["controller"] == False]  # noqa: E712
        if len(off):
            worst_case = off.loc[off["tip_acc_rms"].idxmax(), "case"]
            fig, axes = plt.subplots(len(builds), 1, figsize=(9, 2.3 * len(builds)),
                                     sharex=True, squeeze=False)
            for ax, b in zip(axes[:, 0], builds):
                for on, col in ((False, "tab:red"), (True, "tab:blue")):
                    sel = df[(df["build"] == b) & (df["case"] == worst_case)
                             & (df["controller"] == on)]
                    if not len(sel):
                        continue
                    hp = Path(history_dir) / str(sel.iloc[0]["history"])
                    if hp.is_file():
                        h = pd.read_parquet(hp, columns=["time", "point.tip.a"])
                        ax.plot(h["time"], h["point.tip.a"] / G0, color=col, lw=0.6,
                                label=f"controller {'on' if on else 'off'}")
                ax.set_ylabel(f"{b}\ntip a [g]", fontsize=8)
                ax.grid(alpha=0.3)
            axes[0, 0].set_title(f"{worst_case}: tip acceleration")
            axes[0, 0].legend(fontsize=7, loc="upper right")
            axes[-1, 0].set_xlabel("time [s]")
            fig.tight_layout()
            paths["fig_history"] = _atomic_figure(fig, out / "system_worst_case_history.png")
            plt.close(fig)

    # summary CSV (small, for spreadsheets) beside the Parquet table
    cols = ["key", "build", "case", "controller", "duration", "tip_acc_peak_g", "tip_acc_rms_g",
            "base_force_peak", "energy_joint", "energy_viscous", "energy_input",
            "actuator_force_peak", "actuator_saturated", "lin_tip_acc_rms", "lin_rms_diff",
            "lin_peak_diff", "lin_waveform_err", "wall_time"]
    summary = df[[c for c in cols if c in df]]
    paths["summary_csv"] = _atomic_text(out / "system_summary.csv", summary.to_csv(index=False))

    # the page
    c = ControllerSettings()
    e = html.escape
    rows = []
    for _, r in df.iterrows():
        rows.append(
            "<tr>" + "".join(f"<td>{e(str(v))}</td>" for v in (
                r["build"], r["case"], "on" if r["controller"] else "off",
                f"{r['duration']:g}", f"{r['tip_acc_peak_g']:.2f}", f"{r['tip_acc_rms_g']:.2f}",
                f"{r['base_force_peak']:.1f}", f"{r['energy_joint']:.4f}",
                f"{r['actuator_force_peak']:.1f}", f"{100 * r['actuator_saturated']:.1f}",
                f"{100 * r['lin_rms_diff']:+.1f}", f"{100 * r['lin_peak_diff']:+.1f}")) + "</tr>")
    # controller benefit per build and case
    benefit = []
    for b in builds:
        for cs in cases:
            a = df[(df["build"] == b) & (df["case"] == cs)].set_index("controller")
            if False in a.index and True in a.index:
                benefit.append(f"<tr><td>{e(b)}</td><td>{e(cs)}</td><td>"
                               f"{100 * (a.loc[True, 'tip_acc_rms'] / a.loc[False, 'tip_acc_rms'] - 1):+.1f}"
                               f"</td><td>{100 * (a.loc[True, 'base_force_peak'] / a.loc[False, 'base_force_peak'] - 1):+.1f}"
                               f"</td></tr>")
    figs = "".join(f'<p><img src="{e(p.name)}" alt="{e(k)}"></p>'
                   for k, p in paths.items() if k.startswith("fig_"))
    report_link = (f'<p>Characterization of the same builds: <a href="{e(report_href)}">'
                   'report</a>.</p>' if report_href else "")
    lin_html = ""
    if linear_rows:
        lin_html = ("<h2>Equivalent-linear models for the controls team</h2>"
                    "<p>Per build, at the sine-equivalent modal amplitudes (&radic;2 &times; RMS) "
                    "of its worst load case (largest tip RMS, controller off); state space in "
                    "each folder (model.npz, A.csv..D.csv, metadata.json). Valid near that "
                    "amplitude and that kind of load only.</p>"
                    '<table id="linear-models"><tr><th>build</th><th>load case</th><th>mode</th>'
                    "<th>modal amplitude [m&radic;kg]</th><th>A / &phi;<sub>max</sub></th>"
                    "<th>frequency [Hz]</th><th>&zeta;</th><th>folder</th></tr>"
                    + "".join(
                        f"<tr><td>{e(str(r['build']))}</td><td>{e(str(r['case']))}</td>"
                        f"<td>{e(str(r.get('label', '')))}</td>"
                        f"<td>{float(r['modal_amplitude']):.3g}</td>"
                        f"<td>{float(r['amplitude_over_phimax']):.3f}</td>"
                        f"<td>{float(r['frequency_hz']):.2f}</td><td>{float(r['zeta']):.4f}</td>"
                        f"<td><code>{e(str(r['folder']))}</code></td></tr>"
                        for r in linear_rows) + "</table>")
    case_rows = "".join(f"<tr><td>{e(lc.name)}</td><td>{e(lc.description)}</td></tr>"
                        for lc in LOAD_CASES.values() if lc.name in cases)
    text = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{e(title)}</title>
<style>body{{font-family:sans-serif;max-width:1100px;margin:2em auto}}
table{{border-collapse:collapse;font-size:90%}}td,th{{border:1px solid #bbb;padding:2px 6px}}
.caution{{border:2px solid #c00;padding:0.6em;background:#fee}}</style></head><body>
<h1>{e(title)}</h1>
<p class="caution"><b>Caution.</b> {e(CAUTION)} The builds, load cases and controller are
invented demo data.</p>
{report_link}
<h2>The system</h2>
<p>Each tray build is its FMI 2.0 co-simulation FMU, stepped with fmpy in a master loop that
exchanges values every communication step with a loads model (base acceleration of the chassis
under the bracket) and an active damper at <code>{e(c.point)}</code>: force
&minus;g&middot;v from the relative velocity sensed there, first-order actuator lag, force limit
(defaults g = {c.gain:g} N s/m, &tau; = {c.tau * 1e3:g} ms, {c.force_limit:g} N).
Interface force is the force through the bolted joints onto the bracket. "lin" columns: the
equivalent-linear model at the run's own sine-equivalent modal amplitudes (&radic;2 &times; RMS),
run through the same loop; the difference is in tip RMS and peak acceleration.</p>
<table><tr><th>load case</th><th>what it is</th></tr>{case_rows}</table>
<h2>Results</h2>
<table id="system-results"><tr><th>build</th><th>case</th><th>controller</th><th>duration [s]</th>
<th>tip peak [g]</th><th>tip RMS [g]</th><th>interface force peak [N]</th>
<th>joint energy [J]</th><th>actuator peak [N]</th><th>at limit [%]</th>
<th>lin &minus; nonlin tip RMS [%]</th><th>lin &minus; nonlin tip peak [%]</th></tr>
{''.join(rows)}</table>
<h2>What the controller buys</h2>
<table id="controller-benefit"><tr><th>build</th><th>case</th><th>tip RMS change [%]</th>
<th>interface force peak change [%]</th></tr>{''.join(benefit)}</table>
{lin_html}
<h2>Plots</h2>
{figs}
<p>Worst case (largest tip RMS, controller off): {e(str(worst_case))}.
Full table: <code>results.parquet</code>; summary: <code>{e(paths['summary_csv'].name)}</code>.</p>
<p class="caution">{e(CAUTION)}</p>
</body></html>
"""
    paths["page"] = _atomic_text(out / "system.html", text)
    return paths


def _three_fmu_check(build, table, settings, quick: bool, fmu_dir: Path) -> dict:
    """Build a loads FMU per load case and the controller FMU; rerun one sweep case (first
    build, curb_strike, controller on) as a system of three FMUs and compare with the sweep."""
    from ..cosim.components import build_controller_fmu, build_loads_fmu, run_system_of_fmus
    from ..cosim.system import LOAD_CASES, summarize

    paths = {}
    per_case = {}
    for c in LOAD_CASES:
        sc = replace(settings, duration=LOAD_CASES[c].quick_duration) if quick else settings
        per_case[c] = sc
        paths[f"fmu:loads_{c}"] = build_loads_fmu(c, fmu_dir / f"loads_{c}.fmu", sc)
    paths["fmu:active_damper"] = build_controller_fmu(fmu_dir / "active_damper.fmu",
                                                      settings.controller)
    params_path, tray = build
    case = "curb_strike"
    sc = per_case[case]
    run = run_system_of_fmus(tray, paths[f"fmu:loads_{case}"], paths["fmu:active_damper"], True,
                             sc, case=case)
    got = summarize(run, sc.tip, sc.controller.point, sc.controller.force_limit)
    from ..params import load_parameter_set

    b = load_parameter_set(params_path).build
    row = table[(table["build"] == b) & (table["case"] == case) & (table["controller"])]
    if not len(row):
        return {"paths": paths, "text": "no sweep row to compare with", "equal": None}
    r = row.iloc[0]
    names = ("tip_acc_peak", "tip_acc_rms", "base_force_peak", "energy_joint",
             "actuator_force_peak")
    equal = all(got[n] == r[n] for n in names)
    text = (f"{b} {case} controller on as three FMUs: "
            + ("identical to the sweep's run" if equal else
               "DIFFERS from the sweep's run: " + ", ".join(
                   f"{n} {got[n]:.6g} vs {r[n]:.6g}" for n in names)))
    return {"paths": paths, "text": text, "equal": equal}


# ------------------------------------------------------------------------------ linear
def amplitudes_that_matter(table, params_by_build) -> dict:
    """Per build: the load case with the largest RMS tip acceleration (controller off) and its
    sine-equivalent modal amplitudes sqrt(2) RMS(q_i) [m sqrt(kg)].

    Returns
    -------
    dict of build -> dict with ``case``, ``amplitudes`` (list, shape (N,)), ``key``
    """
    out = {}
    for b, ps in params_by_build.items():
        sel = table[(table["build"] == b) & (table["controller"] == False)]  # noqa: E712
        if not len(sel):
            sel = table[table["build"] == b]
        if not len(sel):
            continue
        r = sel.loc[sel["tip_acc_rms"].idxmax()]
        out[b] = {"case": r["case"], "key": r["key"],
                  "amplitudes": [float(r[f"q_amp_{i}"]) for i in range(1, ps.n_modes + 1)]}
    return out


def export_linear(params, amplitudes, out_dir, case: str) -> tuple[Path, str]:
    """Save the equivalent-linear model of one build for the controls team.

    :func:`.linear.equivalent_linear` at ``amplitudes`` with its default inputs (point forces,
    base acceleration) and outputs (point x, v, a and the interface force), written by
    ``LinearModel.save`` (atomic folder replace); the load case it came from is noted as
    ``origin`` in its metadata.json.

    Returns
    -------
    (Path, str)
        The folder and the definition used.
    """
    from ..analysis.linear import equivalent_linear

    lm = equivalent_linear(params, amplitudes)
    lm.info["origin"] = (f"jointfmu demo: sine-equivalent modal amplitudes (sqrt(2) x RMS) of "
                         f"load case {case!r}, controller off")
    d = Path(lm.save(out_dir))
    return d, "first-harmonic (linear.equivalent_linear)"


# -------------------------------------------------------------------------------- demo
def add_demo_args(p: argparse.ArgumentParser) -> None:
    """Arguments of ``jointfmu demo``."""
    p.add_argument("--out", default="build/demo", metavar="DIR",
                   help="folder for everything the demo writes (default build/demo)")
    p.add_argument("--quick", action="store_true",
                   help="reduced size (short runs, small report): for tests and a first look")
    p.add_argument("--scheduler", default=None, metavar="ADDR",
                   help="Dask scheduler address (tcp://host:8786); default a local cluster")
    p.add_argument("--workers", type=int, default=2, metavar="N",
                   help="worker processes of the local cluster (default 2)")
    p.add_argument("--params", nargs="+", default=None, metavar="PARAMS",
                   help="parameter files instead of the shipped examples/tray_*.toml")
    p.add_argument("--no-progress", action="store_true", help="no progress bars")


def cmd_demo(args) -> int:
    """The whole day in one command (see the module docstring)."""
    files = [Path(p) for p in args.params] if args.params else find_examples()
    check_output_path(args.out, "into", "--out")
    summary = run_demo(files, args.out, quick=args.quick, scheduler=args.scheduler,
                       n_workers=args.workers, progress=not args.no_progress)
    print(summary["text"])
    return 0


def _report_step(param_sets, files, out_dir: Path, quick: bool, client, progress: bool = True):
    """Step 3: the characterization report (:func:`.report.write_report`); returns the page
    and the runner that served the ring-downs."""
    from ..report import characterization as _report
    from ..cosim.sweep import CachedRunner, prefetch_ring_downs

    # the ring-downs run in parallel on the cluster, the report is then drawn here from them
    cache = prefetch_ring_downs([str(f) for f in files], client, quick=quick,
                                progress=progress)
    runner = CachedRunner(cache)
    page = _report.write_report(list(param_sets), out_dir, runner=runner, quick=quick)
    return Path(page), runner


def run_demo(param_files: Sequence[Path], out_dir, *, quick: bool = False,
             scheduler: str | None = None, n_workers: int = 2, progress: bool = True,
             client=None, log=print) -> dict:
    """Run the demo; return what it wrote (paths) and a printable summary.

    Parameters
    ----------
    param_files : sequence of path-like
        The builds (default in the CLI: the shipped examples).
    out_dir : path-like
        Everything goes below it: ``fmus/``, ``report/``, ``system/``, ``linear/``.
    quick : bool
        Reduced size.
    scheduler : str, optional
        Dask scheduler address; default a local cluster of ``n_workers`` processes.
    client : dask.distributed.Client, optional
        Use this client (not closed); overrides ``scheduler``.
    log : callable
        Where progress lines go.

    Returns
    -------
    dict
        ``paths`` (name -> Path), ``timings`` (step -> s), ``table`` (DataFrame), ``text``
        (the printable summary), ``linear`` (build -> case and amplitudes), ``ran`` and
        ``skipped`` (sweep keys run now and found done).
    """
    from ..params import load_parameter_set
    from ..cosim.sweep import dask_client, raise_failures, run_tasks
    from ..cosim.system import SystemSettings

    out = Path(out_dir)
    t_all = time.perf_counter()
    timings: dict[str, float] = {}
    paths: dict[str, Path] = {}

    def step(name):
        timings[name] = time.perf_counter()

    def done(name):
        timings[name] = time.perf_counter() - timings[name]

    log(f"jointfmu demo -> {out}  ({'quick' if quick else 'full'} size)")
    log(CAUTION)
    # 1. check
    step("check")
    _check_scheduler(scheduler)
    files = [Path(f) for f in param_files]
    _check_files(files)
    psets = [load_parameter_set(f) for f in files]
    builds_seen = [p.build for p in psets]
    if len(set(builds_seen)) != len(builds_seen):
        raise InputError(f"parameter files {', '.join(map(str, files))}: build names must differ "
                         f"(got {builds_seen})")
    done("check")
    log(f"[1/6] check      {len(files)} parameter sets OK ({', '.join(p.set_id for p in psets)})")
    # the cluster first: an unreachable scheduler fails before anything is written
    ctx = nullcontext(client) if client is not None else dask_client(scheduler, n_workers)
    with ctx as c:
        # 2. build
        step("build")
        builds = _build_all(files, out / "fmus")
        for (_, fmu) in builds:
            paths[f"fmu:{fmu.stem}"] = fmu
        done("build")
        log(f"[2/6] build      {len(builds)} FMUs in {out / 'fmus'}")
        # 3. report
        step("report")
        page, runner = _report_step(psets, files, out / "report", quick, c, progress)
        paths["report"] = page
        log(f"[3/6] report     {page}  ({runner.hits} ring-downs from the cluster, "
            f"{runner.misses} computed here)")
        done("report")
        # 4. sweep
        step("sweep")
        settings = SystemSettings()
        sys_dir = out / "system"
        tasks = _sweep_tasks(builds, _cases(None), (False, True), settings,
                             sys_dir / "histories", quick)
        res = run_tasks(tasks, sys_dir / "results.parquet", client=c, progress=progress,
                        desc="system runs")
        raise_failures(res)
        table = res.table[res.table["key"].isin([t.key for t in tasks])]
        paths["results"] = sys_dir / "results.parquet"
        paths["histories"] = sys_dir / "histories"
        done("sweep")
        log(f"[4/6] sweep      {len(res.ran)} runs done, {len(res.skipped)} reused "
            f"-> {paths['results']}")
    # 4b. the same system as three FMUs: loads and controller FMUs to hand on, and one run
    step("three_fmus")
    three = _three_fmu_check(builds[0], table, settings, quick, out / "fmus" / "system")
    paths.update(three["paths"])
    done("three_fmus")
    log(f"[4/6] 3 FMUs     loads + controller FMUs in {out / 'fmus' / 'system'}; "
        f"{three['text']}")
    # 5. linear models
    step("linearize")
    by_build = {p.build: p for p in psets}
    amps = amplitudes_that_matter(table, by_build)
    lin_lines = []
    lin_rows = []
    for b, info in amps.items():
        ps = by_build[b]
        slug = "".join(ch if ch.isalnum() else "-" for ch in b).lower()
        d, how = export_linear(ps, info["amplitudes"], out / "linear" / slug, info["case"])
        paths[f"linear:{b}"] = d
        meta = json.loads((Path(d) / "metadata.json").read_text(encoding="utf-8"))
        for m in meta.get("modes", []):
            lin_rows.append({"build": b, "case": info["case"], "folder": f"../linear/{slug}", **m})
        lin_lines.append(f"  {b:<12} at {info['case']:<15} amplitudes "
                         + ", ".join(f"{a:.3g}" for a in info["amplitudes"]) + f" -> {d}")
    done("linearize")
    log(f"[5/6] linearize  {len(amps)} equivalent-linear models in {out / 'linear'}")
    # 6. system page
    step("page")
    pp = write_system_page(table, sys_dir, sys_dir / "histories",
                           report_href="../report/index.html",
                           linear_rows=lin_rows)
    paths.update({f"system:{k}": v for k, v in pp.items()})
    done("page")
    log(f"[6/6] page       {pp['page']}")
    total = time.perf_counter() - t_all
    text = "\n".join([
        "",
        "jointfmu demo: summary",
        _text_table(table),
        "",
        "equivalent-linear models (sine-equivalent modal amplitude sqrt(2) x RMS of the worst "
        "case, controller off) [m sqrt(kg)]:",
        *lin_lines,
        "",
        "written:",
        *[f"  {k:<28} {v}" for k, v in paths.items()],
        "",
        "timings: " + ", ".join(f"{k} {v:.1f} s" for k, v in timings.items())
        + f"; total {total:.1f} s",
        "",
        "CAUTION: " + CAUTION,
    ])
    return {"paths": paths, "timings": timings, "table": table, "text": text,
            "linear": amps, "total": total, "ran": list(res.ran), "skipped": list(res.skipped)}
