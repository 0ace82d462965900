"""Identification (``jointfmu fit``): interval coverage over many noise seeds, and speed.

Run::

    .venv/bin/python tests/bench/bench_fit.py [--seeds 60] [--quick]

It prints readable tables, then, as its LAST line, one JSON object.  Nothing is asserted: this is
a benchmark (timing and coverage statistics do not belong in tests).

Coverage.  One mode (100 Hz, zeta 0.2 %, Fs 20 N/sqrt(kg), Kt 20 % of omega0^2, chi -0.5,
beta 0.3, two accelerometers), three micro-slip ring-downs (impulses for 0.1, 0.3 and 0.6 of the
onset of macro-slip, 1.5 s at 5120 Hz) made once by the SciPy reference integration
(``tests/ringdowns.py``), then for every seed fresh 40 dB sensor noise and a fit.  Counted: how
often each 95 % interval (f0, zeta, chi, R) holds the truth (target 90-99 %), and the errors of
the damping and frequency curves over the covered range.

Speed.  A four-mode build (the undertorqued example as the truth, the nominal one as the
template) from six records, 2 s at 5120 Hz, four channels each (three accelerometers and the
hammer force), impulses 0.05-6 N s at one point: wall time of ``fit_build`` plus the two output
files, report excluded (target <= 30 s on the project's 2-core machine).  The machine is shared:
the load average and the process's CPU time are printed beside the wall times, and the fit runs
twice (the faster counts).
"""
from __future__ import annotations

import argparse
import json
import math
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from ringdowns import make_record, with_noise  # noqa: E402

from jointfmu import (JointParams, Mode, ParameterSet, Point, Provenance,  # noqa: E402
                      load_parameter_set)
from jointfmu.analysis.characterize import mode_curves  # noqa: E402
from jointfmu.identify.fit import fit_build  # noqa: E402
from jointfmu.identify.result import write_fit  # noqa: E402
from jointfmu.physics.iwan import joint_constants  # noqa: E402

ROOT = HERE.parents[1]
TWO_PI = 2.0 * math.pi


def coverage(n_seeds: int) -> dict:
    f0 = 100.0
    w0 = TWO_PI * f0
    truth_mode = Mode("m1", f0, 0.002, JointParams(Fs=20.0, Kt=0.2 * w0**2, chi=-0.5, beta=0.3))
    pts = (Point("hammer", "input", "+z", (0.8,)), Point("s1", "output", "+z", (1.1,)),
           Point("s2", "output", "+z", (0.6,)))
    truth = ParameterSet("bar", "T", "", Provenance(), (truth_mode,), pts)
    template = ParameterSet("bar", "NOM", "", Provenance(),
                            (Mode("m1", 98.0, 0.003, JointParams(30.0, 0.15 * w0**2, -0.4, 0.2)),),
                            pts)
    c = joint_constants(20.0, 0.2 * w0**2, -0.5, 0.3)
    t0 = time.perf_counter()
    clean = [make_record(truth, "hammer", lev * c.phimax * w0 / 0.8, duration=1.5, snr_db=None,
                         source=f"lev{k}.csv") for k, lev in enumerate((0.1, 0.3, 0.6))]
    t_gen = time.perf_counter() - t0
    true = {"f0": f0, "zeta": 0.002, "chi": -0.5, "R": c.R}
    hits = {k: 0 for k in true}
    errs = {k: [] for k in true}
    widths = {k: [] for k in true}
    dz, df, times, s2 = [], [], [], []
    for seed in range(n_seeds):
        recs = [with_noise(r, 40.0, 1000 * seed + k) for k, r in enumerate(clean)]
        t1 = time.perf_counter()
        mf = fit_build(recs, template).modes[0]
        times.append(time.perf_counter() - t1)
        s2.append(mf.chi2 / mf.dof)
        for k, tv in true.items():
            p = mf.params[k]
            lo, hi = p["interval"]
            hits[k] += lo <= tv <= hi
            errs[k].append(p["value"] / tv - 1.0 if k != "chi" else p["value"] - tv)
            widths[k].append((hi - lo) / 2.0 / abs(tv) if k != "chi" else (hi - lo) / 2.0)
        A = np.geomspace(*mf.amplitude_range, 60)
        cf, ct = mode_curves(mf.mode, A), mode_curves(truth_mode, A)
        dz.append(float(np.max(np.abs(cf.zeta_rd / ct.zeta_rd - 1))))
        df.append(float(np.max(np.abs(cf.freq_1 / ct.freq_1 - 1))))
        print(f"  seed {seed:3d}: " + "  ".join(
            f"{k} {'in ' if p_in else 'OUT'}" for k, p_in in
            ((k, mf.params[k]["interval"][0] <= true[k] <= mf.params[k]["interval"][1])
             for k in true)) + f"  chi2/dof {s2[-1]:.3f}  {times[-1]:.2f} s", flush=True)
    out = {"seeds": n_seeds, "generation_s": t_gen,
           "coverage": {k: hits[k] / n_seeds for k in true},
           "bias": {k: float(np.mean(v)) for k, v in errs.items()},
           "scatter": {k: float(np.std(v)) for k, v in errs.items()},
           "mean_half_width": {k: float(np.mean(v)) for k, v in widths.items()},
           "damping_curve_error_max": float(np.max(dz)),
           "damping_curve_error_median": float(np.median(dz)),
           "frequency_curve_error_max": float(np.max(df)),
           "chi2_per_dof_median": float(np.median(s2)),
           "fit_s_median": float(np.median(times))}
    return out


def speed(quick: bool) -> dict:
    truth = load_parameter_set(ROOT / "examples" / "tray_undertorqued.toml")
    template = load_parameter_set(ROOT / "examples" / "tray_nominal.toml")
    levels = (0.05, 0.15, 0.4, 1.0, 2.5, 6.0)
    dur = 1.0 if quick else 2.0
    t0 = time.perf_counter()
    recs = [make_record(truth, "shaker", imp, duration=dur, seed=20 + k, source=f"lev{k + 1}.csv")
            for k, imp in enumerate(levels)]
    t_gen = time.perf_counter() - t0
    runs, cpus, loads = [], [], []
    fit_build(recs[:1], template)  # the compiled kernel loaded once, as in any session
    with tempfile.TemporaryDirectory() as d:
        for _ in range(2):
            loads.append(os.getloadavg()[0])
            t1, c1 = time.perf_counter(), time.process_time()
            bf = fit_build(recs, template)
            write_fit(bf, Path(d) / "fitted.toml", "SN-bench")
            runs.append(time.perf_counter() - t1)
            cpus.append(time.process_time() - c1)
    modes = []
    for mf, tm in zip(bf.modes, truth.modes):
        A = np.geomspace(*mf.amplitude_range, 60)
        cf, ct = mode_curves(mf.mode, A), mode_curves(tm, A)
        m = {"mode": mf.index, "macroslip": mf.reached_macroslip,
             "damping_err": float(np.max(np.abs(cf.zeta_rd / ct.zeta_rd - 1))),
             "freq_err": float(np.max(np.abs(cf.freq_1 / ct.freq_1 - 1))),
             "collapse": mf.collapse, "chi2_per_dof": mf.chi2 / mf.dof}
        if mf.reached_macroslip:
            m["Fs_err"] = mf.params["Fs"]["value"] / tm.joint.Fs - 1
            m["Kt_err"] = mf.params["Kt"]["value"] / tm.joint.Kt - 1
        modes.append(m)
    return {"records": len(recs), "duration_s": dur, "channels": len(recs[0].channels),
            "generation_s": t_gen, "fit_s": runs, "fit_s_best": min(runs), "fit_cpu_s": cpus,
            "load_avg": loads,
            "modes": modes}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", type=int, default=60)
    ap.add_argument("--quick", action="store_true", help="10 seeds, 1 s records for the speed")
    args = ap.parse_args()
    n = 10 if args.quick else args.seeds
    print(f"coverage: one mode, 3 records, 40 dB, {n} noise seeds")
    cov = coverage(n)
    print(f"  generation (SciPy reference) {cov['generation_s']:.1f} s, fit median "
          f"{cov['fit_s_median']:.2f} s, chi2/dof median {cov['chi2_per_dof_median']:.3f}")
    print(f"  {'':6s} {'coverage':>9s} {'bias':>11s} {'scatter':>11s} {'half-width':>11s}")
    for k in cov["coverage"]:
        print(f"  {k:6s} {100 * cov['coverage'][k]:8.1f}% {cov['bias'][k]:+11.3g} "
              f"{cov['scatter'][k]:11.3g} {cov['mean_half_width'][k]:11.3g}")
    print(f"  damping curve error: median {100 * cov['damping_curve_error_median']:.3g} %, "
          f"max {100 * cov['damping_curve_error_max']:.3g} % (target 0.5 %); frequency curve "
          f"max {100 * cov['frequency_curve_error_max']:.3g} % (target 0.02 %)")
    print("speed: four modes, six records" + (" (quick: 1 s records)" if args.quick else ""))
    sp = speed(args.quick)
    print(f"  generation {sp['generation_s']:.1f} s; fit + files "
          f"{', '.join(f'{t:.1f}' for t in sp['fit_s'])} s wall (best {sp['fit_s_best']:.1f} s, "
          f"target <= 30 s), {', '.join(f'{t:.1f}' for t in sp['fit_cpu_s'])} s CPU; load average "
          f"{', '.join(f'{x:.1f}' for x in sp['load_avg'])} (other jobs share the 2 cores)")
    for m in sp["modes"]:
        extra = (f", Fs {100 * m['Fs_err']:+.3g} %, Kt {100 * m['Kt_err']:+.3g} %"
                 if m["macroslip"] else "")
        print(f"  mode {m['mode']}: {'macro' if m['macroslip'] else 'micro'}-slip, damping "
              f"{100 * m['damping_err']:.3g} %, frequency {100 * m['freq_err']:.3g} %, collapse "
              f"{100 * m['collapse']:.3g} %, chi2/dof {m['chi2_per_dof']:.3g}{extra}")
    print(json.dumps({"coverage": cov, "speed": sp}))


if __name__ == "__main__":
    main()
