"""The ``jointfmu`` command line.

Each subcommand is a pair of functions, ``_args_<name>(parser)`` to declare its arguments and
``_cmd_<name>(args) -> int`` to run it, registered in :data:`_COMMANDS`.  To add one, write the pair
and add one line to the table.  Only the public API of the package is used here.
"""
from __future__ import annotations

import argparse
import sys
import warnings
from typing import Callable, Sequence

from .. import __version__
from ..errors import JointFmuError, JointFmuWarning
from ..params import check_parameter_file, load_parameter_set

__all__ = ["main", "run"]


# --- check -------------------------------------------------------------------------------------
def _args_check(p: argparse.ArgumentParser) -> None:
    p.add_argument("files", nargs="+", metavar="FILE",
                   help="parameter file(s) (jointfmu-params/1 TOML) or discrete-joint structures "
                        "(jointfmu-lumped/1)")


def _cmd_check(args: argparse.Namespace) -> int:
    """Check parameter files (and discrete-joint structure files); exit 1 if any is invalid."""
    from ..lumped.model import check_lumped_file, is_lumped_file, load_lumped

    bad = 0
    for path in args.files:
        lumped = is_lumped_file(path)
        problems = check_lumped_file(path) if lumped else check_parameter_file(path)
        if problems:
            bad += 1
            n = len(problems)
            print(f"FAIL {path}: {n} problem{'s' if n != 1 else ''}")
            for prob in problems:
                print(f"  {prob}")
            continue
        if lumped:
            m = load_lumped(path)
            print(f"OK  {path}: {m.set_id}, discrete-joint structure: {m.n_dofs} DOFs, "
                  f"{m.n_joints} joints, {len(m.points)} points, builds "
                  f"{', '.join(m.build_labels)}")
            continue
        ps = load_parameter_set(path)
        print(f"OK  {path}: {ps.set_id}, {ps.n_modes} modes, {len(ps.points)} points, "
              f"hash {ps.short_hash()}")
    return 1 if bad else 0


# --- build, info, simulate (FMU export, see build.py) -------------------------------------------
def _args_build(p: argparse.ArgumentParser) -> None:
    p.add_argument("params", metavar="PARAMS", help="parameter file (jointfmu-params/1 TOML)")
    p.add_argument("-o", "--output", metavar="FMU",
                   help="FMU to write (default build/<name>_<build-slug>.fmu)")
    p.add_argument("--binary", choices=("auto", "native", "pythonfmu"), default=None,
                   help="the FMU's binary: jointfmu's native shell if a C compiler can build it, "
                        "else pythonfmu's (auto, the default, or $JOINTFMU_FMU_BINARY); the "
                        "native shell or an error (native); pythonfmu's (pythonfmu)")


def _cmd_build(args: argparse.Namespace) -> int:
    """Build the FMI 2.0 co-simulation FMU of a parameter file."""
    from ..fmu.build import build_fmu

    from ..physics.integrate import kernel_info

    r = build_fmu(args.params, args.output, binary=args.binary)
    print(f"built {r.path} ({r.set_id}, sha256 {r.content_hash[:12]}, "
          f"model identifier {r.model_identifier})")
    print(f"FMU binary: {_binary_text(r.binary)}")
    # The FMU's core compiles its kernel at its first load on a machine (about 10 s) into a
    # per-user cache that every FMU and process shares; doing it here keeps that out of the
    # first doStep of a simulation on this machine.
    info = kernel_info()
    if info["kernel"] == "python":
        print(f"joint kernel: plain Python, about 250x slower ({info['reason']})")
    else:
        print(f"joint kernel: compiled and cached for this machine ({info['reason']})")
        if r.binary.get("do_step") == "compiled":
            from ..physics.compiled import c_step_address

            c_step_address()    # its C entry too, compiled once for this machine
            print("doStep: in compiled code, without Python, on this machine (the native "
                  "binary calls the compiled kernel)")
    return 0


def _binary_text(binary: dict) -> str:
    if binary.get("kind") == "native":
        return f"jointfmu's native shell ({binary.get('platform')})"
    return f"pythonfmu's ({binary.get('reason', '')})"


def _args_info(p: argparse.ArgumentParser) -> None:
    p.add_argument("fmu", metavar="FMU", help="an FMU built by jointfmu")
    p.add_argument("--parameters", metavar="SSV",
                   help="show the modes with the values of this SSP 1.0 parameter-values file")


def _cmd_info(args: argparse.Namespace) -> int:
    """Print identity, modes, interface and host requirements of an FMU."""
    from ..fmu.info import format_fmu_info, read_fmu_info
    from ..fmu.ssv import read_parameter_values, with_parameter_values

    info = read_fmu_info(args.fmu)
    if args.parameters:
        values = read_parameter_values(args.parameters, info["params"])
        info = {**info, "values_from": args.parameters,
                "params": with_parameter_values(info["params"], values, args.parameters)}
    print(format_fmu_info(info))
    return 0


def _args_simulate(p: argparse.ArgumentParser) -> None:
    from ..fmu.run import DEFAULT_MAX_ROWS

    p.add_argument("model", metavar="FMU|PARAMS", help="an FMU, or a parameter file to build first")
    p.add_argument("--input", required=True, metavar="CSV",
                   help="CSV with a 'time' column [s] and input-variable columns, held between "
                        "rows; an input without a column is held at 0 (with a warning)")
    p.add_argument("--output", required=True, metavar="CSV",
                   help="CSV to write: time and all outputs, streamed row by row")
    p.add_argument("--stop-time", type=float, metavar="S", help="default: last input time")
    p.add_argument("--step", type=float, metavar="S",
                   help="communication step (default: the FMU's DefaultExperiment stepSize); "
                        "every input time is a communication point as well")
    p.add_argument("--max-rows", type=int, default=DEFAULT_MAX_ROWS, metavar="N",
                   help=f"refuse a run with more output rows (default {DEFAULT_MAX_ROWS:,}); a "
                        "run whose CSV would not fit in the output folder's free space is "
                        "refused as well")
    p.add_argument("--parameters", metavar="SSV",
                   help="SSP 1.0 parameter-values file (e.g. another build's, from export-ssv) "
                        "applied as start values; checked like 'jointfmu check'")


def _cmd_simulate(args: argparse.Namespace) -> int:
    """Run an FMU on an input CSV and write its outputs."""
    import tempfile
    from pathlib import Path

    from ..fileio import check_output_path
    from ..fmu.build import build_fmu
    from ..fmu.info import read_fmu_info
    from ..fmu.run import read_input_csv, simulate_to_csv
    from ..fmu.ssv import read_parameter_values

    check_output_path(args.output, "file", "--output")
    with tempfile.TemporaryDirectory(prefix="jointfmu_sim_") as tmp:
        model = Path(args.model)
        fmu = model if model.suffix.lower() == ".fmu" else build_fmu(model, Path(tmp) / "m.fmu").path
        info = read_fmu_info(fmu)
        start = read_parameter_values(args.parameters, info["params"]) if args.parameters else {}
        inputs = [v["name"] for v in info["variables"] if v["causality"] == "input"]
        times, columns = read_input_csv(args.input, inputs)
        r = simulate_to_csv(fmu, times, columns, args.output, stop_time=args.stop_time,
                            step=args.step, start_values=start, max_rows=args.max_rows)
    applied = f", {len(start)} parameter values from {args.parameters}" if args.parameters else ""
    print(f"wrote {r.path}: {r.n_rows} rows from 0 to {r.stop_time:g} s (step {r.step:g} s), "
          f"{len(r.columns) - 1} outputs{applied}")
    return 0


def _args_export_ssv(p: argparse.ArgumentParser) -> None:
    p.add_argument("params", metavar="PARAMS", help="parameter file (jointfmu-params/1 TOML)")
    p.add_argument("-o", "--output", metavar="SSV",
                   help="file to write (default build/<name>_<build-slug>.ssv)")


def _cmd_export_ssv(args: argparse.Namespace) -> int:
    """Write the fitted mode values as an SSP 1.0 parameter-value file."""
    from ..fmu.ssv import write_ssv

    print(f"wrote {write_ssv(args.params, args.output)}")
    return 0


# --- export-ssp (the system as an SSP 1.0 package, see cosim/ssp.py) ------------------------------
def _args_export_ssp(p: argparse.ArgumentParser) -> None:
    from ..cosim.loads import LOAD_CASES
    from .demo import add_system_options

    p.add_argument("params", metavar="PARAMS", help="parameter file of the build (the structure)")
    p.add_argument("--case", required=True, choices=list(LOAD_CASES), help="load case")
    p.add_argument("--controller", default="off", choices=["off", "on"],
                   help="with the active-damper FMU (on) or without it (off, the default, as "
                        "in 'jointfmu cosim')")
    p.add_argument("-o", "--output", required=True, metavar="SSP", help="the .ssp file to write")
    add_system_options(p, components=False)


def _cmd_export_ssp(args: argparse.Namespace) -> int:
    """Write the system (structure, loads and damper FMUs, connections, parameter values) as an
    SSP 1.0 package."""
    from ..cosim.ssp import export_ssp
    from .demo import CAUTION, system_settings

    r = export_ssp(args.params, args.case, args.controller == "on", args.output,
                   system_settings(args))
    print(f"wrote {r.path}: {r.set_id}, case {args.case}, controller {args.controller}; "
          f"components {', '.join(r.components)}; {len(r.connections)} connections; "
          f"{r.stop_time:g} s at a step of {r.step:g} s (SSP 1.0, checked against its schemas)")
    print(CAUTION)
    return 0


# --- cosim, sweep, demo (system co-simulation and sweeps, see cosim/, demo.py) -------------------
def _args_cosim(p: argparse.ArgumentParser) -> None:
    from .demo import add_cosim_args
    add_cosim_args(p)


def _cmd_cosim(args: argparse.Namespace) -> int:
    """One system run: load case -> tray FMU <-> active damper."""
    from .demo import cmd_cosim
    return cmd_cosim(args)


def _args_sweep(p: argparse.ArgumentParser) -> None:
    from .demo import add_sweep_args
    add_sweep_args(p)


def _cmd_sweep(args: argparse.Namespace) -> int:
    """Builds x load cases x controller on Dask; results table, reruns skip done rows."""
    from .demo import cmd_sweep
    return cmd_sweep(args)


def _args_demo(p: argparse.ArgumentParser) -> None:
    from .demo import add_demo_args
    add_demo_args(p)


def _cmd_demo(args: argparse.Namespace) -> int:
    """The whole day on the shipped example: check, build, report, sweep, linearize."""
    from .demo import cmd_demo
    return cmd_demo(args)


# --- report, linearize (characterization, see report.py and linear.py) --------------------------
def _args_report(p: argparse.ArgumentParser) -> None:
    p.add_argument("params", nargs="+", metavar="PARAMS",
                   help="parameter file(s), one per build, overlaid in this order")
    p.add_argument("-o", "--output", metavar="DIR",
                   help="report folder, replaced as a whole (default build/report)")
    p.add_argument("--runner", choices=("fmu", "core"), default="fmu",
                   help="who simulates the ring-downs: the built FMU through fmpy (default) or "
                        "the NumPy core directly (same numbers, faster)")
    p.add_argument("--quick", action="store_true",
                   help="reduced size: shorter ring-downs (Hilbert estimates above 0.2 phimax only)")


def _cmd_report(args: argparse.Namespace) -> int:
    """Write the characterization report of one or more builds."""
    from ..report.characterization import write_report

    index = write_report(args.params, args.output, runner=args.runner, quick=args.quick)
    print(f"wrote {index}")
    return 0


def _args_linearize(p: argparse.ArgumentParser) -> None:
    p.add_argument("params", metavar="PARAMS", help="parameter file (jointfmu-params/1 TOML)")
    p.add_argument("--amplitude", metavar="POINT[.x|.v|.a]=VALUE",
                   help="physical amplitude at an output point: each mode is linearized at the "
                        "modal amplitude at which it alone, harmonic at its first-harmonic "
                        "frequency, moves the point by VALUE: .x displacement in m (the default), "
                        ".v velocity in m/s, .a acceleration in m/s^2; e.g. tip=2e-4, tip.a=196")
    p.add_argument("--modal-amplitude", action="append", default=[], metavar="MODE=VALUE",
                   help="modal amplitude of one mode in m*sqrt(kg) (MODE: number from 1, label, "
                        "or 'all'); repeatable; overrides --amplitude for that mode. Modes given "
                        "neither are linearized at 0 (the low-amplitude f0 and zeta)")
    p.add_argument("--inputs", metavar="NAME,...",
                   help="inputs, comma-separated (default: every point force and the base "
                        "acceleration); see the error message for the names")
    p.add_argument("--outputs", metavar="NAME,...",
                   help="outputs, comma-separated (default: every point x, v, a and base.force)")
    p.add_argument("-o", "--output", metavar="DIR",
                   help="folder to write, replaced as a whole (default "
                        "build/linear/<name>_<build-slug>)")


def _split_assignment(text: str, option: str, form: str) -> tuple[str, float]:
    from ..errors import InputError

    key, sep, value = text.partition("=")
    if not sep or not key.strip() or not value.strip():
        raise InputError(f"{option} {text!r}: expected {form}")
    try:
        v = float(value)
    except ValueError:
        raise InputError(f"{option} {text!r}: {value!r} is not a number; expected {form}") from None
    return key.strip(), v


def _cmd_linearize(args: argparse.Namespace) -> int:
    """Export the equivalent linear state-space model at chosen amplitudes."""
    import re
    from pathlib import Path

    import numpy as np

    from ..errors import InputError
    from ..fileio import check_output_path
    from ..analysis.linear import amplitude_vector, equivalent_linear, modal_amplitudes_at_point

    ps = load_parameter_set(args.params)
    slug = re.sub(r"[^A-Za-z0-9]+", "-", ps.build).strip("-").lower() or "build"
    out = Path(args.output) if args.output else Path("build") / "linear" / f"{ps.name}_{slug}"
    check_output_path(out, "folder", "--output")
    if args.amplitude is None and not args.modal_amplitude:
        raise InputError("give --amplitude POINT[.x|.v|.a]=VALUE or --modal-amplitude MODE=VALUE "
                         "(--modal-amplitude all=0 for the low-amplitude model)")
    amps = np.zeros(ps.n_modes)
    if args.amplitude is not None:
        key, value = _split_assignment(args.amplitude, "--amplitude", "POINT[.x|.v|.a]=VALUE, "
                                       "e.g. tip=2e-4 (m) or tip.a=196 (m/s^2)")
        point, _, qty = key.partition(".")
        amps = modal_amplitudes_at_point(ps, point, value, qty or "x")
    chosen: dict = dict(enumerate(amps, start=1))  # later keys win (amplitude_vector)
    for text in args.modal_amplitude:
        key, value = _split_assignment(text, "--modal-amplitude",
                                       "MODE=VALUE, e.g. 1=1e-4 or tray_bounce=1e-4 (m*sqrt(kg))")
        if key == "all":
            chosen = {i: value for i in range(1, ps.n_modes + 1)}
        else:
            chosen.pop(key, None)  # re-insert at the end: the last one given wins
            chosen[key] = value
    amps = amplitude_vector(ps, chosen)
    split = (lambda s: [n.strip() for n in s.split(",") if n.strip()] if s is not None else None)
    lm = equivalent_linear(ps, amps, inputs=split(args.inputs), outputs=split(args.outputs))
    lm.save(out)
    print(f"wrote {out}: {ps.set_id}, {len(lm.input_names)} inputs, {len(lm.output_names)} "
          f"outputs, {lm.A.shape[0]} states")
    for i, lab in enumerate(lm.mode_labels):
        a = lm.modal_amplitude[i]
        print(f"  mode {i + 1} {lab}: A = {a:.4g} m*sqrt(kg) ({a / lm.phimax[i]:.3g} phimax), "
              f"f = {lm.frequency[i]:.5g} Hz, zeta = {100 * lm.zeta[i]:.3g} %")
    return 0


# --- modes, virtual-test (discrete-joint structures, see lumped/) ---------------------------------
def _args_modes(p: argparse.ArgumentParser) -> None:
    p.add_argument("lumped", metavar="LUMPED.toml", help="discrete-joint structure (jointfmu-lumped/1)")
    p.add_argument("-o", "--output", metavar="TEMPLATE.toml",
                   help="write the modal-Iwan template (jointfmu-params/1) of the lowest modes")
    p.add_argument("--build", metavar="BUILD", help="a build of the file (label or id; default: "
                   "the file's own)")
    p.add_argument("--count", type=int, metavar="N", help="modes in the template (default: the "
                   "file's [modes] count, else its labels, else all)")


def _cmd_modes(args: argparse.Namespace) -> int:
    """Print the stuck-joint modes; write the modal-Iwan template."""
    from ..fileio import check_output_path
    from ..lumped.model import load_lumped
    from ..lumped.modes import format_modes, stuck_modes, write_template

    if args.output:
        check_output_path(args.output, "file", "--output")
    model = load_lumped(args.lumped, args.build)
    modes = stuck_modes(model)
    print(format_modes(model, modes))
    if args.output:
        print(f"wrote {write_template(model, args.output, args.count)}")
    return 0


def _number_list(text: str, option: str) -> tuple[float, ...]:
    from ..errors import InputError

    try:
        values = tuple(float(x) for x in text.split(",") if x.strip())
    except ValueError:
        raise InputError(f"{option} {text!r}: expected numbers separated by commas, "
                         "e.g. 50,200,1000") from None
    if not values:
        raise InputError(f"{option} {text!r}: expected at least one number")
    return values


def _args_virtual_test(p: argparse.ArgumentParser) -> None:
    p.add_argument("lumped", metavar="LUMPED.toml", help="discrete-joint structure (jointfmu-lumped/1)")
    p.add_argument("--impact", required=True, metavar="POINT", help="point the hammer hits "
                   "(role input or both)")
    p.add_argument("--levels", required=True, metavar="F1,F2,...",
                   help="peak impact forces in N, one record each")
    p.add_argument("--sensors", metavar="P1,P2,...", help="points sensed (default: every point "
                   "with role output or both)")
    p.add_argument("--rate", type=float, default=5120.0, metavar="HZ", help="sample rate (5120)")
    p.add_argument("--duration", type=float, default=2.0, metavar="S",
                   help="record length with the pre-trigger (2.0)")
    p.add_argument("--snr", type=float, default=40.0, metavar="DB",
                   help="signal-to-noise ratio per channel in dB, 'inf' for none (40)")
    p.add_argument("--seed", type=int, default=0, metavar="N", help="seed of the noise (0)")
    p.add_argument("--pulse", type=float, default=5e-4, metavar="S",
                   help="duration of the half-sine force pulse (0.0005)")
    p.add_argument("--pretrigger", type=float, default=0.1, metavar="S",
                   help="recorded before the impact (0.1)")
    p.add_argument("--quantity", choices=("a", "v", "x"), default="a",
                   help="what the sensors measure: acceleration (default), velocity, displacement")
    p.add_argument("--clip", type=float, metavar="RANGE",
                   help="clip the response channels at +-RANGE (their unit), as a saturated sensor")
    p.add_argument("--digits", type=int, default=7, metavar="N",
                   help="significant digits of the recorded values (7)")
    p.add_argument("--format", choices=("csv", "uff", "both"), default="both",
                   help="record files to write (both)")
    p.add_argument("--build", metavar="BUILD", help="a build of the file (label or id)")
    p.add_argument("-o", "--output", required=True, metavar="DIR", help="folder for the records")


def _cmd_virtual_test(args: argparse.Namespace) -> int:
    """Virtual hammer tests of a discrete-joint structure, written as ring-down records."""
    from ..lumped.model import load_lumped
    from ..lumped.modes import stuck_modes
    from ..fileio import check_output_path
    from ..lumped.virtual_test import VirtualTest, format_levels, run_virtual_test, write_campaign

    check_output_path(args.output, "into", "--output")
    model = load_lumped(args.lumped, args.build)
    sensors = tuple(s.strip() for s in args.sensors.split(",") if s.strip()) if args.sensors else ()
    settings = VirtualTest(impact=args.impact, levels=_number_list(args.levels, "--levels"),
                           sensors=sensors, rate=args.rate, duration=args.duration,
                           snr_db=args.snr, seed=args.seed, pulse=args.pulse,
                           pretrigger=args.pretrigger, quantity=args.quantity, clip=args.clip,
                           digits=args.digits)
    modes = stuck_modes(model)
    results = run_virtual_test(model, settings, modes)
    formats = ("csv", "uff") if args.format == "both" else (args.format,)
    paths = write_campaign(model, settings, results, args.output, formats, __version__)
    print(f"{model.set_id}: {len(results)} records, impact at {args.impact}")
    print(format_levels(model, modes, results))
    print(f"wrote {len(paths)} files to {args.output} (simulated data: no substitute for a test)")
    return 0


# --- fit (identification from ring-down records, see identify/) ----------------------------------
def _args_fit(p: argparse.ArgumentParser) -> None:
    p.add_argument("records", nargs="+", metavar="RECORD",
                   help="ring-down records, one per file: CSV (time, point.<label>.a|v|x, "
                        "point.<label>.force) or Universal File dataset 58 (.uff, .unv)")
    p.add_argument("--template", required=True, metavar="PARAMS.toml",
                   help="parameter file giving the points, mode shapes, base, mode labels and "
                        "approximate frequencies (usually the nominal build's)")
    p.add_argument("--build", metavar="ID",
                   help="build or serial id of the fitted set (default: the template's)")
    p.add_argument("-o", "--output", metavar="OUT.toml",
                   help="fitted parameter file (default build/<name>_<build>.toml); "
                        "OUT.fit.json is written beside it")
    p.add_argument("--report", metavar="DIR",
                   help="also write an HTML report with plots to DIR (replaced as a whole)")


def _cmd_fit(args: argparse.Namespace) -> int:
    """Fit a parameter set of one build from its ring-down records."""
    from pathlib import Path

    from ..fileio import check_output_path
    from ..fmu.build import default_output_path
    from ..identify.fit import fit_build
    from ..identify.result import CAUTION, fit_json_path, mode_summary, write_fit
    from ..records import read_record

    template = load_parameter_set(args.template)
    build = args.build if args.build is not None else template.build
    if args.output:
        out = Path(args.output)
    else:
        from dataclasses import replace

        out = default_output_path(replace(template, build=build)).with_suffix(".toml")
    # every output checked before the work starts; every record read and checked too
    check_output_path(out, "file", "-o/--output")
    check_output_path(fit_json_path(out), "file", "the .fit.json beside -o/--output")
    if args.report:
        check_output_path(args.report, "folder", "--report")
    records = [read_record(r, template) for r in args.records]
    bf = fit_build(records, template)
    toml_path, json_path, ps = write_fit(bf, out, build)
    print(f"fitted {ps.set_id} from {len(records)} record(s) with the template {template.set_id}")
    for w in bf.warnings:
        print(f"  warning: {w}")
    for mf in bf.modes:
        print(mode_summary(mf))
        for name in ("f0", "zeta", "chi", "Fs", "Kt", "beta"):
            p = mf.params[name]
            iv = p["interval"]
            n = _digits(p["value"], iv)
            ci = f" [{iv[0]:.{n}g}, {iv[1]:.{n}g}]" if iv is not None else ""
            print(f"    {name:5s} {p['value']:.{n}g}{ci}  ({p['source']})")
        if mf.collapse is not None:
            print(f"    collapse {100 * mf.collapse:.3g} % (spread of the records' and sensors' "
                  "damping curves about the fitted one)")
        for w in mf.warnings:
            print(f"    warning: {w}")
    if not args.build:
        print(f"note: no --build given: the fitted set keeps the template's build id {build!r}")
    print(f"wrote {toml_path} (hash {ps.short_hash()}) and {json_path}")
    if args.report:
        from ..report.fit import write_fit_report

        print(f"wrote {write_fit_report(bf, args.report)}")
    print(CAUTION)
    return 0


def _digits(value: float, interval) -> int:
    """Significant digits that tell a value and its interval's ends apart (2 digits of the
    interval's width), 4 to 12."""
    import math

    if interval is None or not interval[1] > interval[0] or value == 0:
        return 6
    return int(min(12, max(4, 2 + math.ceil(math.log10(abs(value) / (interval[1] - interval[0]))))))


# --- the table -------------------------------------------------------------------------------------
#: name -> (declare arguments, run, one-line help)
_COMMANDS: dict[str, tuple[Callable[[argparse.ArgumentParser], None],
                           Callable[[argparse.Namespace], int], str]] = {
    "check": (_args_check, _cmd_check, "check parameter files and print their content hash"),
    "build": (_args_build, _cmd_build, "build the FMI 2.0 co-simulation FMU of a parameter file"),
    "info": (_args_info, _cmd_info, "show parameter set, modes, interface and host needs of an FMU"),
    "simulate": (_args_simulate, _cmd_simulate, "run an FMU (or a parameter file) on an input CSV"),
    "cosim": (_args_cosim, _cmd_cosim, "one system run: load case -> tray FMU <-> active damper"),
    "sweep": (_args_sweep, _cmd_sweep, "builds x load cases x controller through the system, on Dask"),
    "demo": (_args_demo, _cmd_demo, "the whole day on the shipped example: check, build, report, "
                                    "sweep, linearize"),
    "export-ssv": (_args_export_ssv, _cmd_export_ssv,
                   "write the fitted mode values as an SSP 1.0 parameter-values file (.ssv)"),
    "export-ssp": (_args_export_ssp, _cmd_export_ssp,
                   "the system (structure, loads and damper FMUs) as an SSP 1.0 package (.ssp)"),
    "fit": (_args_fit, _cmd_fit, "fit a build's parameter set from its ring-down records "
                                 "(CSV or UFF 58)"),
    "report": (_args_report, _cmd_report,
               "characterization report (HTML + PNG) of one or more builds"),
    "linearize": (_args_linearize, _cmd_linearize,
                  "equivalent linear state-space model at chosen amplitudes (.npz, CSV, JSON)"),
    "modes": (_args_modes, _cmd_modes,
              "stuck-joint modes of a discrete-joint structure; write its modal-Iwan template"),
    "virtual-test": (_args_virtual_test, _cmd_virtual_test,
                     "virtual hammer tests of a discrete-joint structure, written as ring-down "
                     "records"),
}


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="jointfmu",
        description="Modal Iwan models of bolted structures as FMI 2.0 co-simulation FMUs. "
                    "A fitted model is no substitute for qualification testing.")
    parser.add_argument("--version", action="version", version=f"jointfmu {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, (declare, run, help_text) in _COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        declare(p)
        p.set_defaults(_run=run)
    return parser


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    """jointfmu's own warnings as one line on stderr; any other as Python shows it."""
    if issubclass(category, JointFmuWarning):
        print(f"jointfmu: warning: {message}", file=sys.stderr)
    else:
        print(warnings.formatwarning(message, category, filename, lineno, line),
              file=sys.stderr, end="")


def _os_error_text(exc: OSError) -> str:
    """One line for an OSError nothing else caught: the path(s), then the system's reason."""
    paths = " -> ".join(repr(str(p)) for p in (exc.filename, exc.filename2) if p is not None)
    reason = exc.strerror or str(exc)
    return f"{paths}: {reason}" if paths else reason


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code (0 ok, 1 failure, 2 usage error).

    A :class:`JointFmuError` is printed as one line; so is, as a last resort, an ``OSError``
    that no check caught first (a folder that became read-only during a run, a full disk),
    naming the path and the system's reason.  A closed standard output (``| head``) is left to
    :func:`run`.
    """
    parser = _parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as e:  # argparse: usage error (2) or --help/--version (0)
        return e.code if isinstance(e.code, int) else (0 if e.code is None else 2)
    if getattr(args, "_run", None) is None:
        parser.print_usage(sys.stderr)
        print("jointfmu: error: a command is required", file=sys.stderr)
        return 2
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("always", JointFmuWarning)
            warnings.showwarning = _show_warning
            return int(args._run(args))
    except JointFmuError as e:
        print(f"jointfmu: error: {e}", file=sys.stderr)
        return 1
    except BrokenPipeError:
        raise
    except OSError as e:
        print(f"jointfmu: error: {_os_error_text(e)}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("jointfmu: interrupted", file=sys.stderr)
        return 130


def run() -> None:
    """Console entry point: :func:`main`, then leave without interpreter teardown.

    A process that has loaded a pythonfmu FMU can abort while the interpreter tears itself down
    ("corrupted double-linked list", after all work and output are done; see DEVELOPERS.md), which
    would turn a successful run into a failed exit code.  Everything is written and flushed by
    then, so the process ends with ``os._exit`` and the command's own code.

    When the reader of standard output goes away (``jointfmu build ... | head -2``) the rest of
    the output is dropped quietly and the exit code is 1, as the Python documentation
    recommends ("Note on SIGPIPE", in the ``signal`` module): standard output is pointed at
    ``os.devnull`` so that no later flush fails again.
    """
    import logging
    import os

    try:
        code = main()
        sys.stdout.flush()
    except BrokenPipeError:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        code = 1
    logging.shutdown()
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except Exception:  # noqa: BLE001 - a closed pipe must not change the exit code
            pass
    os._exit(code)

