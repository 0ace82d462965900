"""Regenerate the example ring-down records, bit for bit, from the discrete-joint tray model.

    python examples/make_records.py                # every build into examples/records/<build>/
    python examples/make_records.py --build worn   # one build
    python examples/make_records.py --out DIR      # somewhere else

INVENTED DEMO DATA: virtual hammer tests of tray_lumped.toml (see README.md here), simulated by
jointfmu, not measurements.  The same jointfmu version on the same kind of machine writes the
same bytes (seeded noise; tests/test_lumped_records.py checks one record against the shipped one).
"""
from __future__ import annotations

import argparse
from pathlib import Path

HERE = Path(__file__).resolve().parent
MODEL = HERE / "tray_lumped.toml"

#: The campaign of every build: one impact point, six levels from micro-slip to macro-slip,
#: three accelerometers, 2 s at 2560 Hz (the four modes lie below 450 Hz; a modest rate keeps the
#: shipped files small), 40 dB, values to 6 significant digits.
CAMPAIGN = dict(impact="shaker", levels=(25.0, 80.0, 250.0, 800.0, 2500.0, 8000.0),
                sensors=("tip", "center", "psu_foot"), rate=2560.0, duration=2.0, snr_db=40.0,
                pretrigger=0.1, digits=6)
#: Build label -> (noise seed, record formats).
BUILDS = {"nominal": (1, ("csv", "uff")), "undertorqued": (2, ("csv",)), "worn": (3, ("csv",))}


def make(build: str, out_dir=None, levels=None, verbose: bool = False) -> list[Path]:
    """Simulate and write one build's campaign; returns the files written.

    ``levels`` (indices into the campaign's levels) makes a reduced campaign; the files of the
    levels made are the same bytes as in the full one.
    """
    from jointfmu import __version__
    from jointfmu.lumped.model import load_lumped
    from jointfmu.lumped.modes import stuck_modes
    from jointfmu.lumped.virtual_test import (VirtualTest, format_levels, run_virtual_test,
                                              write_campaign)

    seed, formats = BUILDS[build]
    model = load_lumped(MODEL, build)
    modes = stuck_modes(model)
    settings = VirtualTest(seed=seed, **CAMPAIGN)
    results = run_virtual_test(model, settings, modes, only=levels)
    out = Path(out_dir) if out_dir is not None else HERE / "records" / build
    paths = write_campaign(model, settings, results, out, formats, __version__)
    if verbose:
        print(f"{model.set_id} ({build}): {len(results)} records -> {out}")
        print(format_levels(model, modes, results))
    return paths


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--build", choices=sorted(BUILDS), help="one build (default: all)")
    ap.add_argument("--out", help="folder (default examples/records/<build>; with every build, "
                    "<out>/<build>)")
    args = ap.parse_args(argv)
    for build in ([args.build] if args.build else list(BUILDS)):
        out = None
        if args.out:
            out = Path(args.out) if args.build else Path(args.out) / build
        make(build, out, verbose=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
