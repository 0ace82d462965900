"""Identification against a discrete-joint truth: how well a fitted modal model predicts a
held-out ring-down, and how much of the error is the uncoupled-modes assumption itself.

Run::

    .venv/bin/python tests/bench/bench_fit_lumped.py [--build nominal] [--records DIR --template T]

Default: every build's shipped virtual campaign (``examples/records/<build>/*.csv``, made from the
discrete-joint model of the virtual-test issue) with the stuck-joint modal template written by
:mod:`jointfmu.lumped`.  Without those (that issue not yet merged) it says so and stops, unless
``--records`` and ``--template`` are given.

For each build the middle record (fourth of six) is held out.  Three envelope errors per mode,
``|ln(A_record / A_model)|`` where the record is at least 100x its noise (RMS and largest):

* **predicted**: the model fitted without the record, the record's start from its force channel
  (modal impulse = shape at the impact point x force integral): a true prediction;
* **own start**: the same model, the record's initial velocity fitted to its first samples;
* **in-sample**: the model fitted to every record including this one, its own start: the best an
  uncoupled modal Iwan model does on this record, i.e. the part of the error that is the
  uncoupled-modes assumption itself (plus noise).

The difference between "own start" and "in-sample" is what fitting without the record costs;
between "predicted" and "own start", how far the impulse maps into each mode through its shape
alone (energy exchanged between modes in the first cycles, the finite filtered pulse).  The LAST
line is one JSON object.
"""
from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]

from jointfmu import load_parameter_set  # noqa: E402
from jointfmu.identify.fit import fit_build  # noqa: E402
from jointfmu.identify.holdout import predict_record  # noqa: E402
from jointfmu.records import Record, read_record  # noqa: E402


def _template(build: str, folder: Path):
    try:
        from jointfmu.lumped.model import load_lumped
        from jointfmu.lumped.modes import write_template
    except ImportError:
        return None
    model = load_lumped(ROOT / "examples" / "tray_lumped.toml", build)
    return load_parameter_set(write_template(model, folder / f"template_{build}.toml", None))


def evaluate(files, template, hold: int = 3) -> dict:
    recs = [read_record(f, template) for f in files]
    t0 = time.perf_counter()
    full = fit_build(recs, template)
    part = fit_build(recs[:hold] + recs[hold + 1:], template)
    t_fit = time.perf_counter() - t0
    held = recs[hold]
    no_force = Record(held.time, held.responses, held.comments, held.source)
    pred = {p.index: p for p in predict_record(part, held)}
    own = {p.index: p for p in predict_record(part, no_force)}
    ins = {p.index: p for p in predict_record(full, no_force)}
    modes = []
    for mf in full.modes:
        i = mf.index
        if i not in pred or i not in own or i not in ins:
            continue
        modes.append({"mode": i, "label": mf.label, "determined": mf.kind,
                      "collapse": mf.collapse, "chi2_per_dof": mf.chi2 / max(mf.dof, 1),
                      "predicted_rms": pred[i].rms_error, "predicted_max": pred[i].max_error,
                      "own_start_rms": own[i].rms_error, "own_start_max": own[i].max_error,
                      "in_sample_rms": ins[i].rms_error, "in_sample_max": ins[i].max_error})
    return {"held_out": Path(held.source).name, "fit_s": t_fit, "modes": modes}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--build", action="append", help="build label(s) (default: every one shipped)")
    ap.add_argument("--records", help="folder of records (then --template too)")
    ap.add_argument("--template", help="template parameter file for --records")
    args = ap.parse_args()
    results = {}
    with tempfile.TemporaryDirectory() as d:
        if args.records:
            if not args.template:
                sys.exit("--records needs --template")
            cases = {Path(args.records).name: (sorted(Path(args.records).glob("*.csv")),
                                               load_parameter_set(args.template))}
        else:
            base = ROOT / "examples" / "records"
            builds = args.build or sorted(p.name for p in base.glob("*") if p.is_dir())
            if not builds:
                builds = ["nominal"]  # reported as open below when it is missing
            cases = {}
            for b in builds:
                tpl = _template(b, Path(d))
                if tpl is None or not (base / b).is_dir():
                    print("open: needs jointfmu.lumped and examples/records/ (the virtual-test "
                          "issue); give --records DIR --template FILE to run on other records")
                    print(json.dumps({"status": "open"}))
                    return
                cases[b] = (sorted((base / b).glob("*.csv")), tpl)
        for name, (files, tpl) in cases.items():
            r = evaluate(files, tpl)
            results[name] = r
            print(f"{name}: held out {r['held_out']} (fits {r['fit_s']:.1f} s)")
            print(f"  {'mode':18s} {'fit':6s} {'collapse':>8s} {'chi2/dof':>8s}   envelope error "
                  "rms/max [%]: predicted | own start | in-sample")
            for m in r["modes"]:
                print(f"  {m['mode']} {m['label']:16s} {m['determined']:6s} "
                      f"{100 * (m['collapse'] or 0):7.1f}% {m['chi2_per_dof']:8.1f}   "
                      f"{100 * m['predicted_rms']:5.1f}/{100 * m['predicted_max']:5.1f} | "
                      f"{100 * m['own_start_rms']:5.1f}/{100 * m['own_start_max']:5.1f} | "
                      f"{100 * m['in_sample_rms']:5.1f}/{100 * m['in_sample_max']:5.1f}")
    print(json.dumps(results))


if __name__ == "__main__":
    main()
