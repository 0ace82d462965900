"""``jointfmu demo``: a systems engineer's day on the shipped example, in one command.

Steps (each is also a command of its own):

1. ``jointfmu check``      validate the three builds of the avionics tray (examples/tray_*.toml);
2. ``jointfmu fit``        fit each build from its shipped ring-down records
   (examples/records/<build>/, a virtual campaign on the tray's discrete-joint model) with the
   hand-written nominal file as the template: where a real day starts (``--no-fit`` skips it and
   uses the hand-written files, ``--params`` uses the files given);
3. ``jointfmu build``      build the FMUs of the fitted files;
4. ``jointfmu report``     characterization report comparing the builds;
5. ``jointfmu sweep``      every build x load case x controller off/on through the co-simulation
   system (:mod:`jointfmu.cosim.master`) on Dask (:mod:`jointfmu.cosim.sweep`); ``jointfmu
   cosim`` is one such run;
6. ``jointfmu linearize``  equivalent-linear models for the controls team at the amplitude that
   matters: per build, the sine-equivalent modal amplitudes (sqrt(2) x RMS of each mode) of the
   load case with the largest RMS tip acceleration, controller off;
7. system page           summary tables and plots of the sweep and of the linear models
   (``system/system.html``, :mod:`..report.system`).

The example data are invented (see examples/README.md).  A fitted model is no substitute for
qualification testing; defer to the applicable codes, standards and licensed engineering
practice.
"""
from __future__ import annotations

import argparse
import json
import tempfile
import time
from contextlib import nullcontext
from dataclasses import dataclass, replace
from importlib import resources
from pathlib import Path
from typing import Sequence

from ..analysis.linear import CAUTION
from ..errors import InputError, ParameterError
from ..fileio import check_output_path

__all__ = ["CAUTION", "EXAMPLE_FILES", "examples_folder", "find_examples", "run_demo",
           "add_system_options", "system_settings", "add_cosim_args", "cmd_cosim",
           "add_sweep_args", "cmd_sweep", "add_demo_args", "cmd_demo"]

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


#: The shipped ring-down campaigns: folder under ``examples/records`` -> the build's parameter file
#: (its build id and FMU name are the fitted set's).  The nominal file is every fit's template.
EXAMPLE_CAMPAIGNS = (("nominal", "tray_nominal.toml"), ("undertorqued", "tray_undertorqued.toml"),
                     ("worn", "tray_worn.toml"))
TEMPLATE_FILE = "tray_nominal.toml"


@dataclass(frozen=True)
class Campaign:
    """The records of one build and where its fitted parameter file goes.

    Attributes
    ----------
    records : tuple of Path
        Ring-down records (CSV or UFF), read against ``template``.
    template : Path
        The parameter file whose points, shapes and f0 the fit starts from.
    build : str
        The fitted set's build id.
    name : str
        File stem of the fitted set and of its FMU.
    """

    records: tuple
    template: Path
    build: str
    name: str


def example_campaigns(folder=None) -> list[Campaign]:
    """The shipped campaigns (:data:`EXAMPLE_CAMPAIGNS`), each build's records fitted against the
    hand-written nominal file, the build id taken from the build's own hand-written file.

    Raises
    ------
    InputError
        A folder, a record set or a parameter file is missing.
    """
    from ..params import load_parameter_set

    folder = examples_folder() if folder is None else Path(folder)
    template = folder / TEMPLATE_FILE
    out = []
    for sub, params_file in EXAMPLE_CAMPAIGNS:
        records = tuple(sorted((folder / "records" / sub).glob("*.csv")))
        if not records:
            raise InputError(f"no ring-down records (*.csv) in {folder / 'records' / sub}")
        build = load_parameter_set(folder / params_file).build
        out.append(Campaign(records, template, build, Path(params_file).stem))
    return out


def fit_campaign(campaign: Campaign, out_toml, report_dir=None) -> dict:
    """Fit one build from its records (a worker task of the demo): the fitted parameter file
    and its ``.fit.json`` at ``out_toml``, the fit report in ``report_dir`` when given.

    Returns
    -------
    dict
        ``toml``, ``json``, ``report`` (paths as text or None), ``set_id``, ``lines`` (what each
        mode's records determined, one line each) and ``warnings`` (their number).
    """
    from ..identify.fit import fit_build
    from ..identify.result import mode_summary, write_fit
    from ..params import load_parameter_set
    from ..records import read_record

    template = load_parameter_set(campaign.template)
    records = [read_record(r, template) for r in campaign.records]
    bf = fit_build(records, template)
    toml, jpath, ps = write_fit(bf, out_toml, campaign.build)
    report = None
    if report_dir is not None:
        from ..report.fit import write_fit_report

        report = str(write_fit_report(bf, report_dir))
    n_warn = len(bf.warnings) + sum(len(m.warnings) for m in bf.modes)
    return {"toml": str(toml), "json": str(jpath), "report": report, "set_id": ps.set_id,
            "lines": [mode_summary(m) for m in bf.modes], "warnings": n_warn}


def _fit_all(campaigns, out: Path, quick: bool, client, log) -> tuple[list[Path], dict]:
    """Step 2: every campaign fitted, on the cluster (one task per build)."""
    fit_dir = out / "fitted"
    jobs = []
    for cp in campaigns:
        report = None if quick else out / "fit" / cp.name
        jobs.append((cp, fit_dir / f"{cp.name}.toml", report))
    if client is None:
        results = [fit_campaign(*j) for j in jobs]
    else:
        futures = [client.submit(fit_campaign, *j, pure=False) for j in jobs]
        results = client.gather(futures)
    paths = {}
    for cp, r in zip(campaigns, results):
        paths[f"fitted:{cp.build}"] = Path(r["toml"])
        if r["report"]:
            paths[f"fit_report:{cp.build}"] = Path(r["report"])
        log(f"       {cp.build}: {len(cp.records)} records -> {r['toml']} "
            f"({r['warnings']} warning(s), see {Path(r['json']).name})")
        for line in r["lines"]:
            log(f"         {line}")
    return [Path(r["toml"]) for r in results], paths


# ------------------------------------------------------------------------------ helpers
def system_settings(args) -> "object":
    """The :class:`jointfmu.cosim.master.SystemSettings` of the options
    :func:`add_system_options` declared."""
    from ..cosim.controller import ControllerSettings
    from ..cosim.master import SystemSettings

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
    from ..cosim.loads import LOAD_CASES

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
    from ..cosim.loads import LOAD_CASES

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
    from ..cosim.controller import ControllerSettings
    from ..cosim.master import SystemSettings

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
    from ..cosim.loads import LOAD_CASES

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
    from ..cosim.loads import LOAD_CASES

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


def _three_fmu_check(build, table, settings, quick: bool, fmu_dir: Path) -> dict:
    """Build a loads FMU per load case and the controller FMU; rerun one sweep case (first
    build, curb_strike, controller on) as a system of three FMUs and compare with the sweep."""
    from ..cosim.components import build_controller_fmu, build_loads_fmu, run_system_of_fmus
    from ..cosim.loads import LOAD_CASES
    from ..cosim.master import summarize

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
                   help="parameter files instead of fitting the shipped records (no fit step)")
    p.add_argument("--no-fit", action="store_true",
                   help="use the hand-written example files instead of fitting the shipped records")
    p.add_argument("--no-progress", action="store_true", help="no progress bars")


def cmd_demo(args) -> int:
    """The whole day in one command (see the module docstring)."""
    files = [Path(p) for p in args.params] if args.params else find_examples()
    campaigns = None if (args.params or args.no_fit) else example_campaigns()
    check_output_path(args.out, "into", "--out")
    summary = run_demo(files, args.out, campaigns=campaigns, quick=args.quick,
                       scheduler=args.scheduler, n_workers=args.workers,
                       progress=not args.no_progress)
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


def run_demo(param_files: Sequence[Path], out_dir, *, campaigns: Sequence[Campaign] | None = None,
             quick: bool = False,
             scheduler: str | None = None, n_workers: int = 2, progress: bool = True,
             client=None, log=print) -> dict:
    """Run the demo; return what it wrote (paths) and a printable summary.

    Parameters
    ----------
    param_files : sequence of path-like
        The builds (default in the CLI: the shipped examples): run as they are, or, with
        ``campaigns``, checked and then replaced by the sets fitted from the records.
    campaigns : sequence of Campaign, optional
        Records to fit, one build each (:func:`example_campaigns`); the fitted files
        (``fitted/<name>.toml``, with ``.fit.json``; reports in ``fit/<name>/`` unless ``quick``)
        are what the rest of the demo builds and runs.
    out_dir : path-like
        Everything goes below it: ``fitted/``, ``fit/``, ``fmus/``, ``report/``, ``system/``,
        ``linear/``.
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
    from ..cosim.master import SystemSettings
    from ..report.system import write_system_page

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
    log(f"[1/7] check      {len(files)} parameter sets OK ({', '.join(p.set_id for p in psets)})")
    # the cluster first: an unreachable scheduler fails before anything is written
    ctx = nullcontext(client) if client is not None else dask_client(scheduler, n_workers)
    with ctx as c:
        # 2. fit
        step("fit")
        if campaigns:
            log(f"[2/7] fit        {len(campaigns)} builds from their ring-down records "
                f"(template {Path(campaigns[0].template).name}):")
            files, fit_paths = _fit_all(campaigns, out, quick, c, log)
            paths.update(fit_paths)
            psets = [load_parameter_set(f) for f in files]
        else:
            log("[2/7] fit        skipped: the parameter files are used as they are")
        done("fit")
        # 3. build
        step("build")
        builds = _build_all(files, out / "fmus")
        for (_, fmu) in builds:
            paths[f"fmu:{fmu.stem}"] = fmu
        done("build")
        log(f"[3/7] build      {len(builds)} FMUs in {out / 'fmus'}")
        # 4. report
        step("report")
        page, runner = _report_step(psets, files, out / "report", quick, c, progress)
        paths["report"] = page
        log(f"[4/7] report     {page}  ({runner.hits} ring-downs from the cluster, "
            f"{runner.misses} computed here)")
        done("report")
        # 5. sweep
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
        log(f"[5/7] sweep      {len(res.ran)} runs done, {len(res.skipped)} reused "
            f"-> {paths['results']}")
    # 5b. the same system as three FMUs: loads and controller FMUs to hand on, and one run
    step("three_fmus")
    three = _three_fmu_check(builds[0], table, settings, quick, out / "fmus" / "system")
    paths.update(three["paths"])
    done("three_fmus")
    log(f"[5/7] 3 FMUs     loads + controller FMUs in {out / 'fmus' / 'system'}; "
        f"{three['text']}")
    # 6. linear models
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
    log(f"[6/7] linearize  {len(amps)} equivalent-linear models in {out / 'linear'}")
    # 7. system page
    step("page")
    pp = write_system_page(table, sys_dir, sys_dir / "histories",
                           report_href="../report/index.html",
                           linear_rows=lin_rows)
    paths.update({f"system:{k}": v for k, v in pp.items()})
    done("page")
    log(f"[7/7] page       {pp['page']}")
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
