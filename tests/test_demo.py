"""``jointfmu demo --quick``: end to end on the shipped examples; every promised file exists and
shows what it should (the pages' tables against the results table, the parameter files and the
closed forms; plots drawn on; the caution); a rerun reuses the sweep; the exported linear models
are the ones ``linear.equivalent_linear`` gives at the amplitudes the sweep measured.

Pages and PNGs are read back with ``tests/page_content.py`` (PNG sizes from the IHDR chunk as the
PNG specification lays it out, ISO/IEC 15948 sec. 11.2.2).
"""
from __future__ import annotations

import json

import numpy as np
import pytest

pytest.importorskip("fmpy")
pytest.importorskip("pythonfmu")
pytest.importorskip("distributed")
pytest.importorskip("matplotlib")

import pandas as pd  # noqa: E402

from jointfmu.cli import main  # noqa: E402
from jointfmu.cli.demo import (CAUTION, example_campaigns, find_examples,  # noqa: E402
                               run_demo)
from jointfmu.errors import InputError  # noqa: E402
from jointfmu.params import load_parameter_set  # noqa: E402
from jointfmu.cosim.loads import LOAD_CASES  # noqa: E402
from page_content import ink, number, png_size, tables  # noqa: E402
from test_characterize import hand_closed_forms  # noqa: E402

N_BUILDS, N_CASES = 3, len(LOAD_CASES)


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo as a user runs it: the CLI, quick size, its own local Dask cluster."""
    out = tmp_path_factory.mktemp("demo")
    import contextlib
    import io

    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        rc = main(["demo", "--quick", "--out", str(out), "--no-progress"])
    return rc, out, buf.getvalue()


def test_demo_exits_zero_and_prints_summary_paths_and_caution(demo):
    rc, out, text = demo
    assert rc == 0, text
    assert CAUTION in text
    for step in ("[1/7] check", "[2/7] fit", "[3/7] build", "[4/7] report", "[5/7] sweep",
                 "[6/7] linearize", "[7/7] page"):
        assert step in text
    assert str(out / "system" / "system.html") in text
    assert str(out / "system" / "results.parquet") in text
    assert "timings:" in text
    # every ring-down of the report came from the cluster (none recomputed in this process)
    assert "ring-downs from the cluster, 0 computed here" in text


def test_builds_fitted_from_the_shipped_records(demo):
    """The day starts from the lab's records: each build fitted with the hand-written nominal
    file as template (its points and shapes kept, the build id the build's own), the fit.json
    of issue 11's format beside it, and the FMUs built from the fitted files."""
    import json
    import zipfile

    _, out, text = demo
    template = load_parameter_set(find_examples()[0])
    for name, build in (("tray_nominal", "SN-0002"), ("tray_undertorqued", "SN-0003"),
                        ("tray_worn", "SN-0002-R1")):
        fitted = load_parameter_set(out / "fitted" / f"{name}.toml")
        assert fitted.build == build and fitted.name == template.name
        assert [p.shape for p in fitted.points] == [p.shape for p in template.points]
        assert "jointfmu" in fitted.provenance.fitted_by
        doc = json.loads((out / "fitted" / f"{name}.fit.json").read_text())
        assert doc["format"] == "jointfmu-fit/1" and doc["parameter_file"] == f"{name}.toml"
        assert len(doc["records"]) == 6 and len(doc["modes"]) == fitted.n_modes
        for m, mode in zip(doc["modes"], fitted.modes):
            assert m["params"]["f0"]["source"] == "data"
            assert m["params"]["f0"]["value"] == pytest.approx(mode.f0, rel=1e-12)
        with zipfile.ZipFile(out / "fmus" / f"{name}.fmu") as z:
            info = json.loads(z.read("resources/jointfmu_build.json"))
        assert info["content_hash"] == fitted.content_hash()
        assert f"{build}: 6 records -> " in text


def test_fmus_built(demo):
    _, out, text = demo
    fmus = sorted((out / "fmus").glob("*.fmu"))
    assert [f.stem for f in fmus] == ["tray_nominal", "tray_undertorqued", "tray_worn"]
    assert all(f.stat().st_size > 10_000 for f in fmus)
    # the loads model and controller as FMUs of their own, and the three-FMU run
    system = sorted(f.stem for f in (out / "fmus" / "system").glob("*.fmu"))
    assert system == ["active_damper"] + sorted(f"loads_{c}" for c in LOAD_CASES)
    assert "as three FMUs: identical to the sweep's run" in text


def test_results_table_one_row_per_run(demo):
    _, out, _ = demo
    df = pd.read_parquet(out / "system" / "results.parquet")
    assert len(df) == N_BUILDS * N_CASES * 2
    assert df["key"].is_unique
    assert set(df["case"]) == set(LOAD_CASES)
    assert set(df["controller"]) == {False, True}
    assert set(df["build"]) == {"SN-0002", "SN-0003", "SN-0002-R1"}
    for col in ("tip_acc_peak", "tip_acc_rms", "base_force_peak", "energy_joint",
                "lin_rms_diff", "lin_tip_acc_rms"):
        assert np.all(np.isfinite(df[col])), col
    assert np.all(df["energy_joint"] > 0) and np.all(df["tip_acc_peak"] > df["tip_acc_rms"])
    # controller on lowers the tip RMS in every build and case (collocated velocity feedback
    # only removes energy, common practice)
    piv = df.pivot_table(index=["build", "case"], columns="controller", values="tip_acc_rms")
    assert np.all(piv[True] < piv[False])


def test_histories_one_file_per_run_with_all_steps(demo):
    _, out, _ = demo
    df = pd.read_parquet(out / "system" / "results.parquet")
    for _, r in df.iterrows():
        h = pd.read_parquet(out / "system" / "histories" / r["history"])
        assert len(h) == round(r["duration"] / r["step"]) + 1
        assert {"time", "base.acceleration", "actuator.force", "point.tip.a",
                "base.force", "energy.joint"} <= set(h.columns)
        assert float(h["energy.joint"].iloc[-1]) == pytest.approx(r["energy_joint"])


def _rows(page, table_id):
    head, *rows = tables(page)[table_id]
    return head, rows


def test_system_page_results_table_is_the_sweep(demo):
    """One row per run, in build/case/controller order, each value the results table's to the
    digits shown."""
    _, out, _ = demo
    page = (out / "system" / "system.html").read_text()
    df = pd.read_parquet(out / "system" / "results.parquet").sort_values(
        ["build", "case", "controller"])
    head, rows = _rows(page, "system-results")
    assert head[:3] == ["build", "case", "controller"] and len(rows) == len(df)
    # column: (results column, scale, decimals shown)
    cols = [("duration", 1, 3), ("tip_acc_peak_g", 1, 2), ("tip_acc_rms_g", 1, 2),
            ("base_force_peak", 1, 1), ("energy_joint", 1, 4), ("actuator_force_peak", 1, 1),
            ("actuator_saturated", 100, 1), ("lin_rms_diff", 100, 1), ("lin_peak_diff", 100, 1)]
    for row, (_, r) in zip(rows, df.iterrows()):
        assert row[:3] == [r["build"], r["case"], "on" if r["controller"] else "off"]
        for cell, (col, scale, dec) in zip(row[3:], cols):
            assert number(cell) == pytest.approx(scale * r[col], abs=0.51 * 10.0**-dec), (col, row)


def test_system_page_controller_benefit(demo):
    """Change with the controller on, per build and case: 100 (on/off - 1) of tip RMS and of peak
    interface force, from the results table."""
    _, out, _ = demo
    page = (out / "system" / "system.html").read_text()
    df = pd.read_parquet(out / "system" / "results.parquet")
    _, rows = _rows(page, "controller-benefit")
    assert len(rows) == N_BUILDS * N_CASES
    for b, case, tip, force in rows:
        sel = df[(df["build"] == b) & (df["case"] == case)].set_index("controller")
        for cell, col in ((tip, "tip_acc_rms"), (force, "base_force_peak")):
            want = 100 * (sel.loc[True, col] / sel.loc[False, col] - 1)
            assert number(cell) == pytest.approx(want, abs=0.051), (b, case, col)
        assert number(tip) < 0  # collocated velocity feedback only removes energy (common practice)


def test_system_page_linear_models_against_closed_forms(demo):
    """Per build and mode: amplitude, A/phimax, frequency and damping of the exported model;
    A/phimax with phimax from the (fitted) parameter file (Segalman's inverse relation), frequency
    and damping the first-harmonic closed forms at that amplitude where it is below macro-slip
    (hand_closed_forms, test_characterize.py), to the digits shown; the folder is where the
    model is."""
    _, out, _ = demo
    page = (out / "system" / "system.html").read_text()
    _, rows = _rows(page, "linear-models")
    fitted = sorted((out / "fitted").glob("*.toml"))
    sets = {load_parameter_set(f).build: load_parameter_set(f) for f in fitted}
    below = 0
    assert len(rows) == sum(ps.n_modes for ps in sets.values())
    for b, case, label, amp, ratio, freq, zeta, folder in rows:
        ps = sets[b]
        m = next(m for m in ps.modes if m.label == label)
        A = number(amp)
        hand = hand_closed_forms(m, [A / hand_closed_forms(m, [0.5])["phimax"]])
        assert number(ratio) == pytest.approx(A / hand["phimax"], abs=5e-4 + 2e-3 * number(ratio))
        if number(ratio) < 1:  # the hand forms hold below macro-slip
            below += 1
            assert number(freq) == pytest.approx(hand["f1"][0], abs=5e-3 + 1e-4 * number(freq))
            assert number(zeta) == pytest.approx(hand["zeta_eq"][0],
                                                 abs=5.1e-5 + 2e-3 * number(zeta))
        assert case in LOAD_CASES
        assert (out / "system" / folder / "metadata.json").is_file()
    assert below >= len(rows) // 2


def test_system_page_plots_and_caution(demo):
    _, out, _ = demo
    page = (out / "system" / "system.html").read_text()
    assert page.count(CAUTION) == 2 and "invented demo data" in page
    assert 'href="../report/index.html"' in page and (out / "report" / "index.html").is_file()
    for case in LOAD_CASES:
        assert case in page
    pngs = sorted((out / "system").glob("*.png"))
    assert len(pngs) == 4
    for p in pngs:
        assert f'src="{p.name}"' in page
        w, h = png_size(p)
        assert w >= 400 and h >= 300, (p.name, w, h)
        drawn, coloured = ink(p)
        assert drawn > 0.05 and coloured > 0.001, (p.name, drawn, coloured)
    csv = pd.read_csv(out / "system" / "system_summary.csv")
    assert len(csv) == N_BUILDS * N_CASES * 2


def test_report_of_the_three_builds(demo):
    """The characterization report: the three fitted builds with the files' content hashes, one
    comparison row per build and mode with the file's f0, seven PNGs drawn on, the caution."""
    _, out, _ = demo
    page = (out / "report" / "index.html").read_text()
    sets = [load_parameter_set(out / "fitted" / f"{f.stem}.toml") for f in find_examples()]
    _, rows = _rows(page, "builds")
    assert [r[1:3] for r in rows] == [[ps.set_id, ps.content_hash()] for ps in sets]
    _, rows = _rows(page, "comparison")
    assert len(rows) == sum(ps.n_modes for ps in sets)
    f0 = {(ps.set_id, m.label): m.f0 for ps in sets for m in ps.modes}
    label = None
    for r in rows:
        label = r[0].split(" ", 1)[1] if r[0] else label
        assert number(r[2]) == pytest.approx(f0[(r[1], label)], rel=5e-4)
    pngs = sorted((out / "report").glob("*.png"))
    assert [p.name for p in pngs] == ["damping.png", "dissipation.png", "frequency.png",
                                      "loops_1.png", "loops_2.png", "loops_3.png", "ringdown.png"]
    for p in pngs:
        assert f'src="{p.name}"' in page
        drawn, coloured = ink(p)
        assert drawn > 0.05 and coloured > 0.005, (p.name, drawn, coloured)
    assert page.count(CAUTION) == 2


def test_linear_models_at_the_worst_case_amplitudes(demo):
    _, out, _ = demo
    from jointfmu.analysis.linear import LinearModel, equivalent_linear

    df = pd.read_parquet(out / "system" / "results.parquet")
    for f, slug in zip(find_examples(), ("sn-0002", "sn-0003", "sn-0002-r1")):
        ps = load_parameter_set(out / "fitted" / f"{f.stem}.toml")
        off = df[(df["build"] == ps.build) & (~df["controller"])]
        worst = off.loc[off["tip_acc_rms"].idxmax()]
        amps = [worst[f"q_amp_{i}"] for i in range(1, ps.n_modes + 1)]
        d = out / "linear" / slug
        lm = LinearModel.load(d)
        ref = equivalent_linear(ps, amps)
        np.testing.assert_allclose(lm.modal_amplitude, amps, rtol=1e-12)
        np.testing.assert_array_equal(lm.A, ref.A)
        meta = json.loads((d / "metadata.json").read_text())
        assert worst["case"] in meta["origin"]
        assert lm.set_id == ps.set_id


def test_rerun_reuses_the_sweep(demo, dask_local_client):
    _, out, _ = demo
    before = pd.read_parquet(out / "system" / "results.parquet")
    res = run_demo(find_examples(), out, campaigns=example_campaigns(), quick=True,
                   client=dask_local_client, progress=False, log=lambda *a: None)
    assert res["ran"] == [] and len(res["skipped"]) == N_BUILDS * N_CASES * 2
    after = pd.read_parquet(out / "system" / "results.parquet")
    pd.testing.assert_frame_equal(before, after)   # nothing rerun, nothing rewritten


def test_demo_refuses_missing_or_duplicate_builds(tmp_path):
    with pytest.raises(InputError, match="missing"):
        find_examples(tmp_path)
    f = find_examples()[0]
    with pytest.raises(InputError, match="build names must differ"):
        run_demo([f, f], tmp_path / "d", quick=True, log=lambda *a: None)
    assert not (tmp_path / "d" / "system").exists()


def test_demo_bad_params_file_fails_cleanly(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text('format = "jointfmu-params/1"\n[structure]\nname = "x"\n')
    rc = main(["demo", "--quick", "--out", str(tmp_path / "d"), "--params", str(bad),
               "--no-progress"])
    assert rc == 1
    assert "bad.toml" in capsys.readouterr().err
    assert not (tmp_path / "d" / "fmus").exists()


@pytest.mark.parametrize("argv,match", [
    (["--scheduler", "localhost:8786"], "allowed is a Dask scheduler address"),
    (["--scheduler", "tcp://127.0.0.1:1"], "cannot reach the Dask scheduler"),
])
def test_demo_bad_scheduler_fails_before_writing(tmp_path, capsys, argv, match, monkeypatch):
    import jointfmu.cosim.sweep as sw

    real = sw.dask_client
    monkeypatch.setattr(sw, "dask_client", lambda s=None, n=2: real(s, n, timeout=1.0))
    rc = main(["demo", "--quick", "--out", str(tmp_path / "d"), "--no-progress", *argv])
    assert rc == 1
    assert match in capsys.readouterr().err
    assert not (tmp_path / "d").exists()
