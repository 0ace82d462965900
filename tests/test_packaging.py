"""The package as a user installs it: a wheel built from the source tree (``pip wheel --no-deps``),
installed into a fresh virtual environment, used from another folder.

The fresh environment gets no downloads: its own site-packages holds only the wheel's jointfmu,
and a ``.pth`` line appends the test environment's site-packages for the dependencies (a plain
path line: the editable jointfmu of the test environment, which needs its own ``.pth`` processed,
stays out of sight; the tests check that ``jointfmu`` is imported from the wheel).  The wheel is
built from a copy of the tree (``pyproject.toml``, ``README.md``, ``fmu_src``) in a temporary
folder, so nothing lands in the repository.
"""
from __future__ import annotations

import os
import shutil
import site
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

from jointfmu.analysis.linear import CAUTION

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "fmu_src" / "jointfmu"


def _run(cmd, cwd, env, timeout=600):
    p = subprocess.run([str(c) for c in cmd], cwd=cwd, env=env, capture_output=True, text=True,
                       timeout=timeout)
    assert p.returncode == 0, (f"{cmd}\n--- stdout\n{p.stdout[-3000:]}\n"
                               f"--- stderr\n{p.stderr[-3000:]}")
    return p.stdout


def _wheel_needs_isolation() -> bool:
    """setuptools builds wheels itself from 70.1 on; before that it needs the wheel package."""
    import importlib.util

    import setuptools

    major, minor = (int(x) for x in setuptools.__version__.split(".")[:2])
    return (major, minor) < (70, 1) and importlib.util.find_spec("wheel") is None


@pytest.fixture(scope="module")
def installed(tmp_path_factory):
    """(wheel, venv python, venv bin folder, env, an unrelated working folder)."""
    tmp = tmp_path_factory.mktemp("packaging")
    src = tmp / "src"
    src.mkdir()
    for name in ("pyproject.toml", "README.md"):
        shutil.copy2(ROOT / name, src / name)
    shutil.copytree(ROOT / "fmu_src", src / "fmu_src",
                    ignore=shutil.ignore_patterns("__pycache__", "*.egg-info", "*.pyc"))
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME")}
    isolation = [] if _wheel_needs_isolation() else ["--no-build-isolation"]
    _run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", *isolation,
          "-w", tmp / "dist", src], cwd=tmp, env=env)
    wheel = next((tmp / "dist").glob("jointfmu-*.whl"))
    venv = tmp / "venv"
    _run([sys.executable, "-m", "venv", "--without-pip", venv], cwd=tmp, env=env)
    python = venv / "bin" / "python"
    purelib = Path(_run([python, "-c", "import sysconfig; print(sysconfig.get_path('purelib'))"],
                        cwd=tmp, env=env).strip())
    (purelib / "zz_test_environment.pth").write_text(
        "\n".join(site.getsitepackages()) + "\n", encoding="utf-8")
    _run([sys.executable, "-m", "pip", "--python", python, "install", "-q", "--no-deps",
          "--no-index", wheel], cwd=tmp, env=env)
    elsewhere = tmp / "elsewhere"
    elsewhere.mkdir()
    return wheel, python, venv / "bin", env, elsewhere


def test_examples_link_points_into_the_package():
    """The top-level ``examples`` is a symlink (git keeps it as one) to the package's folder, so
    the README's ``examples/...`` paths and the installed package read the same files."""
    link = ROOT / "examples"
    assert link.is_symlink()
    assert os.readlink(link) == "fmu_src/jointfmu/examples"
    assert link.resolve() == (PACKAGE / "examples").resolve()


def test_wheel_carries_what_the_commands_need(installed):
    wheel = installed[0]
    with zipfile.ZipFile(wheel) as z:
        names = set(z.namelist())
    need = {f"jointfmu/examples/{p.relative_to(PACKAGE / 'examples').as_posix()}"
            for p in (PACKAGE / "examples").rglob("*") if p.is_file()}   # subfolders too (records/)
    need |= {f"jointfmu/report/templates/{p.name}"
             for p in (PACKAGE / "report" / "templates").glob("*.html")}
    need |= {"jointfmu/fmu/native/fmi2_shell.c"}
    assert {"jointfmu/examples/tray_nominal.toml", "jointfmu/report/templates/base.html"} <= need
    assert need <= names, sorted(need - names)
    assert not any("__pycache__" in n or n.endswith(".pyc") for n in names)


def test_installed_package_finds_its_examples_from_another_folder(installed):
    _, python, _, env, elsewhere = installed
    out = _run([python, "-c", "import jointfmu; from jointfmu.cli.demo import find_examples; "
                "print(jointfmu.__file__); print(*find_examples(), sep='\\n')"],
               cwd=elsewhere, env=env).split()
    pkg = Path(out[0]).parent
    assert pkg.parent.name == "site-packages" and str(python.parents[1]) in str(pkg)
    assert [Path(p) for p in out[1:]] == [pkg / "examples" / f"{n}.toml" for n in
                                          ("tray_nominal", "tray_undertorqued", "tray_worn")]


def test_installed_check_and_templates(installed):
    """``jointfmu check`` on the packaged examples, and the packaged templates rendered, both
    from a folder that has no examples of its own (the slow test below draws whole pages)."""
    _, python, bin_dir, env, elsewhere = installed
    files = _run([python, "-c", "from jointfmu.cli.demo import find_examples; "
                  "print(*find_examples(), sep='\\n')"], cwd=elsewhere, env=env).split()
    text = _run([bin_dir / "jointfmu", "check", *files], cwd=elsewhere, env=env)
    assert text.count("OK  ") == 3
    page = _run([python, "-c", "from jointfmu.report.render import Table, render_page as r; "
                 "print(r('characterization.html', builds=[], identity=Table([], [], id='ids'), "
                 "comparison=Table([], []), created='', version='', runners=[], figures=dict("
                 "damping='d.png', frequency='f.png', dissipation='x.png', ringdown='r.png')))"],
                cwd=elsewhere, env=env)
    assert page.count(CAUTION) == 2 and 'id="ids"' in page and 'src="r.png"' in page


@pytest.mark.slow
def test_installed_demo_runs_from_another_folder(installed, tmp_path):
    """``jointfmu demo --quick`` from the wheel, in a folder of its own: every step runs on the
    packaged examples, the pages come from the packaged templates, and (where a C compiler is)
    the FMUs carry the native shell compiled from the packaged C source."""
    import json

    from jointfmu.fmu.native import compile_shell

    _, _, bin_dir, env, _ = installed
    text = _run([bin_dir / "jointfmu", "demo", "--quick", "--out", "d", "--no-progress"],
                cwd=tmp_path, env=env, timeout=1200)
    for step in ("[1/7] check      3 parameter sets OK", "[2/7] fit", "[4/7] report",
                 "[7/7] page"):
        assert step in text
    for page in ("report/index.html", "system/system.html"):
        assert (tmp_path / "d" / page).read_text(encoding="utf-8").count(CAUTION) == 2
    with zipfile.ZipFile(tmp_path / "d" / "fmus" / "tray_nominal.fmu") as z:
        binary = json.loads(z.read("resources/jointfmu_build.json"))["binary"]
    if (compile_shell(tmp_path, "probe")[0] is not None
            and os.environ.get("JOINTFMU_FMU_BINARY", "auto") != "pythonfmu"):
        assert binary["kind"] == "native", binary
