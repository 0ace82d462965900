"""Accuracy study of the modal core against the SciPy reference (not a test; prints a table).

For a grid of joint parameters (chi, beta), regimes (micro-slip, macro-slip) and inputs
(ring-down after a pulse, near-resonant sine, held random), the core's modal displacement error
max|q - q_ref| / max|q_ref| is measured at several steps per period, with the reference
(jointfmu.physics.reference, rtol 1e-11) on the same held inputs.  The last line is one JSON object with
the worst error per steps-per-period setting, the evidence behind DEFAULT_STEPS_PER_PERIOD.

    python tests/bench/bench_accuracy.py [--quick]
"""
from __future__ import annotations

import argparse
import json
import math

import numpy as np

from jointfmu.physics import reference
from jointfmu.physics.integrate import DEFAULT_STEPS_PER_PERIOD, ModalSimulator
from jointfmu.physics.iwan import joint_constants
from jointfmu.params import parse_parameter_set


def one_mode(f0, chi, beta, frac=0.25, zeta=0.003, Fs=1.0):
    return parse_parameter_set({
        "format": "jointfmu-params/1",
        "structure": {"name": "bench", "build": "B", "description": ""},
        "modes": [{"label": "m1", "f0": f0, "zeta": zeta,
                   "joint": {"Fs": Fs, "Kt": frac * (2 * math.pi * f0) ** 2, "chi": chi, "beta": beta}}]})


def inputs(kind, t, f0, level, Fs, seed=1):
    tt = t[:-1]
    if kind == "ringdown":
        return np.where(tt < 0.5 / f0, 6.0 * level * Fs, 0.0)
    if kind == "sine":
        return level * Fs * np.sin(2 * np.pi * 0.95 * f0 * tt) * (tt < 0.6 * t[-1])
    rng = np.random.default_rng(seed)
    return level * Fs * rng.standard_normal(tt.size) * (tt < 0.6 * t[-1])


def core(ps, t, p, spp):
    sim = ModalSimulator(ps, steps_per_period=spp)
    q = np.empty(t.size)
    q[0] = 0.0
    for k in range(t.size - 1):
        sim.set_inputs(modal_forces=[p[k]])
        sim.step(t[k + 1] - t[k])
        q[k + 1] = sim.q[0]
    return q


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer cases")
    args = ap.parse_args(argv)
    spps = [20, 30, DEFAULT_STEPS_PER_PERIOD, 64, 100]
    grid = [(-0.5, 0.2), (-0.8, 0.0), (0.0, 1.0), (-0.3, 0.5)]
    kinds = ["ringdown", "sine", "random"]
    if args.quick:
        grid, kinds = grid[:2], kinds[1:2]
    f0 = 100.0
    t = np.arange(0.0, 0.3, 1e-3)
    worst = {s: 0.0 for s in spps}
    print(f"{'chi':>6} {'beta':>5} {'input':>9} {'regime':>6} {'A/phimax':>9} " +
          " ".join(f"{'spp ' + str(int(s)):>10}" for s in spps))
    for chi, beta in grid:
        ps = one_mode(f0, chi, beta)
        j = ps.modes[0].joint
        pm = joint_constants(j.Fs, j.Kt, chi, beta).phimax
        for kind in kinds:
            for regime, level in (("micro", 0.03), ("macro", 3.0)):
                p = inputs(kind, t, f0, level, j.Fs)
                ref = reference.simulate_mode(f0, 0.003, j.Fs, j.Kt, chi, beta, t, p)["q"]
                peak = np.abs(ref).max()
                errs = []
                for s in spps:
                    e = np.abs(core(ps, t, p, s) - ref).max() / peak
                    worst[s] = max(worst[s], e)
                    errs.append(e)
                print(f"{chi:6.2f} {beta:5.2f} {kind:>9} {regime:>6} {peak / pm:9.3f} " +
                      " ".join(f"{e:10.2e}" for e in errs))
    print(json.dumps({"worst_error_by_steps_per_period": {str(int(s)): worst[s] for s in spps},
                      "default_steps_per_period": DEFAULT_STEPS_PER_PERIOD}))


if __name__ == "__main__":
    main()
