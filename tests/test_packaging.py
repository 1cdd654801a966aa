"""A built wheel, installed non-editable in a new virtual environment, runs from outside the
checkout: scaffold, check and the documented run command on a tiny invented screen, and the
demo's config written by `plateloom demo` plans the whole demo."""

from __future__ import annotations

import os
import site
import subprocess
import sys
import time
import venv
from pathlib import Path

import pandas as pd
import pytest
from conftest import ROOT
from test_scaffold import DAY, _fill_layout, _write_plate


@pytest.fixture(scope="module")
def wheel_env(tmp_path_factory) -> Path:
    """A new virtual environment holding the wheel built from the checkout (no editable link).

    Its other packages come from the test's environment (a path file), so the test needs no
    network; plateloom itself is only the wheel's copy.
    """
    root = tmp_path_factory.mktemp("wheel")
    built = subprocess.run(
        [
            sys.executable,
            "-m",
            "pip",
            "wheel",
            "--no-deps",
            "-w",
            str(root / "dist"),
            str(ROOT),
        ],
        capture_output=True,
        text=True,
    )
    assert built.returncode == 0, built.stdout[-3000:] + built.stderr[-3000:]
    wheel = next((root / "dist").glob("plateloom-*.whl"))
    env = root / "venv"
    venv.EnvBuilder(with_pip=True).create(env)
    python = env / "bin" / "python"
    own_site = subprocess.run(
        [str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"], capture_output=True, text=True
    ).stdout.strip()
    outer = [p for p in site.getsitepackages() if os.path.isdir(p)]
    Path(own_site, "outer_packages.pth").write_text("\n".join(outer) + "\n", encoding="utf-8")
    installed = subprocess.run(
        [str(python), "-m", "pip", "install", "--no-deps", "--no-index", str(wheel)], capture_output=True, text=True
    )
    assert installed.returncode == 0, installed.stdout[-3000:] + installed.stderr[-3000:]
    return env


def _run(env: Path, *args: str, cwd: Path) -> subprocess.CompletedProcess:
    clean = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
    clean["PATH"] = f"{env / 'bin'}{os.pathsep}{clean.get('PATH', '')}"
    return subprocess.run([str(env / "bin" / args[0]), *args[1:]], cwd=cwd, capture_output=True, text=True, env=clean)


@pytest.mark.slow
def test_the_wheel_scaffolds_checks_and_runs_a_screen_outside_the_checkout(wheel_env, tmp_path):
    where = _run(
        wheel_env,
        "python",
        "-c",
        "import plateloom, plateloom.assets as a; print(plateloom.__file__, a.snakefile())",
        cwd=tmp_path,
    )
    module, snakefile = where.stdout.split()
    assert str(wheel_env) in module and str(ROOT) not in module, where.stdout + where.stderr
    assert str(wheel_env) in snakefile and Path(snakefile).is_file()
    now = time.time()
    _write_plate(tmp_path / "microscope" / "plateA", "stacks", 1, now - 2 * DAY)
    _write_plate(tmp_path / "microscope" / "plateB", "stacks", 2, now - DAY)
    scaffold = _run(wheel_env, "plateloom", "scaffold", "microscope", "--out", "myscreen", cwd=tmp_path)
    assert scaffold.returncode == 0, scaffold.stdout + scaffold.stderr
    assert "plateloom run --cores 2 --config myscreen/config.yaml" in scaffold.stdout
    _fill_layout(tmp_path / "myscreen/layouts/plate_96.csv")
    check = _run(wheel_env, "plateloom", "check", "--config", "myscreen/config.yaml", cwd=tmp_path)
    assert check.returncode == 0 and "0 error(s)." in check.stdout, check.stdout + check.stderr
    run = _run(wheel_env, "plateloom", "run", "--cores", "2", "--config", "myscreen/config.yaml", cwd=tmp_path)
    assert run.returncode == 0, run.stdout[-3000:] + run.stderr[-6000:]
    effects = pd.read_parquet(tmp_path / "myscreen/results/effects.parquet")
    assert {"LOOM-101 1 uM", "LOOM-104 1 uM"} <= set(effects["treatment"])
    assert effects["ci_low"].notna().all()
    report = (tmp_path / "myscreen/results/reports/screen.html").read_text(encoding="utf-8")
    assert "plateloom screen report" in report and "research tool" in report


@pytest.mark.slow
def test_the_wheel_plans_the_demo_from_any_folder(wheel_env, tmp_path):
    demo = _run(wheel_env, "plateloom", "demo", cwd=tmp_path)
    assert demo.returncode == 0 and (tmp_path / "config/config.yaml").is_file(), demo.stderr
    again = _run(wheel_env, "plateloom", "demo", cwd=tmp_path)
    assert again.returncode == 2 and "exists already" in again.stderr
    dry = _run(wheel_env, "plateloom", "run", "-n", "--quiet", "rules", cwd=tmp_path)
    assert dry.returncode == 0, dry.stdout[-3000:] + dry.stderr[-3000:]
    assert "make_demo_plate" in dry.stdout and "screen_report" in dry.stdout
    missing = _run(wheel_env, "plateloom", "run", "--config", "nowhere.yaml", cwd=tmp_path)
    assert missing.returncode == 2 and "plateloom demo" in missing.stderr
