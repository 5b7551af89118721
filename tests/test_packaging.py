"""The wheel installs one import name, ``guardband``, and its demo runs from it;
``guardband.safety`` lists its modules and imports none of them.

The wheel is built from this checkout and installed with ``--no-deps`` into
a fresh virtual environment that sees the test environment's third-party
packages (numpy, scipy, ...) through a path file, but not this checkout and
not its editable install: so ``guardband demo`` there runs from the wheel's
own files, example protocols included.
"""

from __future__ import annotations

import os
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _run(argv, **kw):
    res = subprocess.run(argv, capture_output=True, text=True, timeout=600, **kw)
    assert res.returncode == 0, f"{argv}\n{res.stdout}\n{res.stderr}"
    return res


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("wheel")
    _run([sys.executable, "-m", "pip", "wheel", "--quiet", "--no-deps", "-w", str(out), str(ROOT)])
    (path,) = out.glob("guardband-*.whl")
    return path


def test_wheel_has_one_top_level_import_name(wheel):
    with zipfile.ZipFile(wheel) as zf:
        names = zf.namelist()
    tops = {n.split("/")[0] for n in names}
    assert {t for t in tops if not t.endswith(".dist-info")} == {"guardband"}
    # the example protocols and the report templates (package data), and a module
    for needed in ("guardband/protocols/tablet_blend.toml", "guardband/protocols/tablet_blend_runs.csv",
                   "guardband/protocols/dose_combination.toml", "guardband/safety/canonical.py",
                   "guardband/planner/report/templates/report.html.j2"):
        assert needed in names
    top_level = next(n for n in names if n.endswith(".dist-info/top_level.txt"))
    with zipfile.ZipFile(wheel) as zf:
        assert zf.read(top_level).decode().split() == ["guardband"]


@pytest.mark.slow
def test_demo_runs_from_the_wheel_in_a_fresh_environment(wheel, tmp_path):
    venv = tmp_path / "fresh"
    _run([sys.executable, "-m", "venv", str(venv)])
    py = venv / "bin" / "python"
    site = Path(_run([str(py), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"]).stdout.strip())
    # third-party dependencies from the test environment; its .pth files (the
    # editable install of this checkout among them) are not processed there
    (site / "deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    _run([str(py), "-m", "pip", "install", "--quiet", "--no-deps", "--no-index", str(wheel)])
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    where = _run([str(py), "-c", "import guardband, guardband.planner; print(guardband.planner.__file__)"],
                 cwd=tmp_path, env=env).stdout
    assert str(site) in where and str(ROOT) not in where
    res = _run([str(venv / "bin" / "guardband"), "demo", "--out", str(tmp_path / "demo")], cwd=tmp_path, env=env)
    assert "identical" in res.stdout + res.stderr
    assert (tmp_path / "demo" / "decisions.jsonl").exists()
    assert any((tmp_path / "demo").glob("plan-*.csv"))


def test_safety_package_lists_its_modules_and_imports_none_of_them():
    # a fresh interpreter, so that no other test has imported numpy first
    code = ("import importlib, sys, guardband.safety as s; "
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('numpy', 'scipy', 'filelock') "
            "or m.startswith('guardband.safety.'))); "
            "print(all(importlib.import_module('guardband.safety.' + n) for n in s.__all__))")
    out = _run([sys.executable, "-c", code]).stdout.split("\n")
    assert out[:2] == ["[]", "True"]
