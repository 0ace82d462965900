"""``jointfmu demo --quick``: end to end on the shipped examples; every promised file exists and
is non-trivial; a rerun reuses the sweep; the exported linear models are the ones
``linear.equivalent_linear`` gives at the amplitudes the sweep measured.

PNG sizes are read from the IHDR chunk as the PNG specification lays it out (ISO/IEC 15948,
sec. 11.2.2: width and height, 4-byte big-endian, after the 8-byte signature and the chunk's
length and type).
"""
from __future__ import annotations

import json
import struct
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("fmpy")
pytest.importorskip("pythonfmu")
pytest.importorskip("distributed")
pytest.importorskip("matplotlib")

import pandas as pd  # noqa: E402

from jointfmu.cli import main  # noqa: E402
from jointfmu.cli.demo import CAUTION, find_examples, run_demo  # noqa: E402
from jointfmu.errors import InputError  # noqa: E402
from jointfmu.params import load_parameter_set  # noqa: E402
from jointfmu.cosim.system import LOAD_CASES  # noqa: E402

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


def _png_size(path: Path) -> tuple[int, int]:
    data = path.read_bytes()[:24]
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def test_demo_exits_zero_and_prints_summary_paths_and_caution(demo):
    rc, out, text = demo
    assert rc == 0, text
    assert CAUTION in text
    for step in ("[1/6] check", "[2/6] build", "[3/6] report", "[4/6] sweep",
                 "[5/6] linearize", "[6/6] page"):
        assert step in text
    assert str(out / "system" / "system.html") in text
    assert str(out / "system" / "results.parquet") in text
    assert "timings:" in text
    # every ring-down of the report came from the cluster (none recomputed in this process)
    assert "ring-downs from the cluster, 0 computed here" in text


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


def test_system_page_tables_plots_and_caution(demo):
    _, out, _ = demo
    page = (out / "system" / "system.html").read_text()
    assert 'id="system-results"' in page and 'id="controller-benefit"' in page
    assert 'id="linear-models"' in page and page.count("../linear/sn-") >= 3 * 4
    assert page.count("<tr>") >= N_BUILDS * N_CASES * 2 + N_BUILDS * N_CASES
    assert CAUTION in page
    assert 'href="../report/index.html"' in page and (out / "report" / "index.html").is_file()
    for case in LOAD_CASES:
        assert case in page
    pngs = sorted((out / "system").glob("*.png"))
    assert len(pngs) == 4
    for p in pngs:
        assert p.name in page
        w, h = _png_size(p)
        assert w >= 400 and h >= 300, (p.name, w, h)
        assert p.stat().st_size > 10_000
    csv = pd.read_csv(out / "system" / "system_summary.csv")
    assert len(csv) == N_BUILDS * N_CASES * 2


def test_report_written(demo):
    _, out, _ = demo
    pages = list((out / "report").rglob("*.html"))
    assert pages and all(p.stat().st_size > 2_000 for p in pages)
    assert any(CAUTION.split(";")[0] in p.read_text() for p in pages)


def test_linear_models_at_the_worst_case_amplitudes(demo):
    _, out, _ = demo
    from jointfmu.analysis.linear import LinearModel, equivalent_linear

    df = pd.read_parquet(out / "system" / "results.parquet")
    for f, slug in zip(find_examples(), ("sn-0002", "sn-0003", "sn-0002-r1")):
        ps = load_parameter_set(f)
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
    res = run_demo(find_examples(), out, quick=True, client=dask_local_client, progress=False,
                   log=lambda *a: None)
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
