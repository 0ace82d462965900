"""Output paths that cannot be written get one line naming the path and the reason, exit 1,
nothing half-written, for every command that writes; a closed standard output ends the command
quietly.

References: POSIX (a path under a regular file fails with ENOTDIR; a folder without write
permission refuses new entries, except to the superuser), the Python documentation's "Note on
SIGPIPE" (module ``signal``) for the broken pipe.
"""
from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

pytest.importorskip("fmpy")
pytest.importorskip("pythonfmu")

from jointfmu.cli import main  # noqa: E402
from jointfmu.errors import OutputPathError  # noqa: E402
from jointfmu.fileio import check_output_path  # noqa: E402

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"
NOMINAL = EXAMPLES / "tray_nominal.toml"


@pytest.fixture(scope="module")
def nominal_fmu(example_fmus):
    return example_fmus["tray_nominal"].path  # built once per session (conftest.py)


@pytest.fixture(scope="module")
def input_csv(tmp_path_factory):
    p = tmp_path_factory.mktemp("in") / "in.csv"
    p.write_text("time,base.acceleration\n0,1\n0.001,0\n")
    return p


#: command -> argv with OUT standing for the output path under test
COMMANDS = {
    "simulate": ["simulate", "FMU", "--input", "CSV", "--output", "OUT/o.csv"],
    "export-ssv": ["export-ssv", str(NOMINAL), "-o", "OUT/v.ssv"],
    "export-ssp": ["export-ssp", str(NOMINAL), "--case", "curb_strike", "-o", "OUT/s.ssp",
                   "--duration", "0.001"],
    "linearize": ["linearize", str(NOMINAL), "--modal-amplitude", "all=0", "-o", "OUT/lin"],
    "cosim": ["cosim", "FMU", "--case", "curb_strike", "-o", "OUT/h.parquet", "--duration",
              "0.001"],
    "report": ["report", str(NOMINAL), "--runner", "core", "--quick", "-o", "OUT/rep"],
    "sweep": ["sweep", str(NOMINAL), "--loop", "--quick", "--no-progress", "--out", "OUT/sw"],
    "build": ["build", str(NOMINAL), "-o", "OUT/new/b.fmu"],
    "demo": ["demo", "--quick", "--no-progress", "--out", "OUT/d"],
    "modes": ["modes", str(EXAMPLES / "tray_lumped.toml"), "-o", "OUT/t.toml"],
    "virtual-test": ["virtual-test", str(EXAMPLES / "tray_lumped.toml"), "--impact", "shaker",
                     "--levels", "10", "--duration", "0.2", "-o", "OUT/vt"],
    # outputs are checked before any record is read, so the record here is never opened
    "fit": ["fit", "CSV", "--template", str(NOMINAL), "-o", "OUT/f.toml", "--report", "OUT/rep"],
}


def _argv(name, out, fmu, csv_path):
    return [str(out) + a[3:] if a.startswith("OUT") else
            str(fmu) if a == "FMU" else str(csv_path) if a == "CSV" else a
            for a in COMMANDS[name]]


def _listing(folder: Path):
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*"))


@pytest.mark.parametrize("name", list(COMMANDS))
def test_output_under_a_regular_file(name, tmp_path, nominal_fmu, input_csv, capsys):
    """ENOTDIR for everyone, the superuser included."""
    blocker = tmp_path / "results.txt"
    blocker.write_text("a regular file\n")
    before = _listing(tmp_path)
    assert main(_argv(name, blocker, nominal_fmu, input_csv)) == 1
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if not ln.startswith("jointfmu: warning:")]
    assert len(lines) == 1 and "Traceback" not in err, err
    assert lines[0].startswith("jointfmu: error: ")
    assert str(blocker) in lines[0] and "is a file, not a folder" in lines[0]
    assert _listing(tmp_path) == before and blocker.read_text() == "a regular file\n"


@pytest.mark.parametrize("name", list(COMMANDS))
def test_output_in_a_read_only_folder(name, tmp_path, nominal_fmu, input_csv, capsys):
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o555)
    try:
        if os.access(ro, os.W_OK):
            pytest.skip("this user may write into a read-only folder (the superuser): the "
                        "path-under-a-file test covers the case")
        assert main(_argv(name, ro, nominal_fmu, input_csv)) == 1
        err = capsys.readouterr().err
        lines = [ln for ln in err.splitlines() if not ln.startswith("jointfmu: warning:")]
        assert len(lines) == 1 and "Traceback" not in err, err
        assert str(ro) in lines[0] and "is not writable" in lines[0]
        assert list(ro.iterdir()) == []
    finally:
        ro.chmod(0o755)


@pytest.mark.parametrize("kind,make,reason", [
    ("file", "folder", "it is a folder; a file path is needed here"),
    ("folder", "file", "it is a file; a folder path is needed here"),
    ("into", "file", "it is a file; a folder path is needed here"),
])
def test_check_output_path_wrong_kind(tmp_path, kind, make, reason):
    p = tmp_path / "x"
    p.mkdir() if make == "folder" else p.write_text("")
    with pytest.raises(OutputPathError) as e:
        check_output_path(p, kind, "--output")
    assert str(e.value) == f"--output {str(p)!r}: {reason}"
    assert isinstance(e.value, OSError) and e.value.path == str(p)


@pytest.mark.parametrize("kind", ["file", "folder", "into"])
def test_check_output_path_new_folders_are_fine(tmp_path, kind):
    p = tmp_path / "a" / "b" / "c"
    assert check_output_path(p, kind) == p
    assert list(tmp_path.iterdir()) == []          # checked, nothing made


def test_os_error_left_over_is_one_line(tmp_path, monkeypatch, capsys):
    """As a last resort (a check cannot foresee a full disk) an OSError is one line: path and
    the system's reason."""
    import jointfmu.fmu.ssv as ssv

    def full_disk(*a, **k):
        raise OSError(28, "No space left on device", str(tmp_path / "v.ssv"))
    monkeypatch.setattr(ssv, "write_ssv", full_disk)
    assert main(["export-ssv", str(NOMINAL), "-o", str(tmp_path / "v.ssv")]) == 1
    err = capsys.readouterr().err
    assert err == f"jointfmu: error: {str(tmp_path / 'v.ssv')!r}: No space left on device\n"


def test_closed_stdout_is_no_traceback(tmp_path):
    """``jointfmu build ... | head -2`` with the reader gone before the first line: the build
    is done, nothing about the pipe is printed, exit code 1 (Python docs, "Note on SIGPIPE")."""
    r, w = os.pipe()
    os.close(r)                                   # the reader is gone: every write is EPIPE
    out = tmp_path / "b.fmu"
    try:
        proc = subprocess.Popen([sys.executable, "-m", "jointfmu", "build", str(NOMINAL), "-o",
                                 str(out)], stdout=w, stderr=subprocess.PIPE)
    finally:
        os.close(w)
    _, err = proc.communicate(timeout=300)
    err = err.decode()
    assert proc.returncode == 1
    assert "Traceback" not in err and "BrokenPipe" not in err, err
    assert out.is_file()
