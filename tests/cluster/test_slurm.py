"""The demo screen through a real single-node SLURM cluster equals a local run.

start_slurm.sh / stop_slurm.sh install Debian's slurm-wlm and munge and run the daemons on
loopback without accounting (hence the profile's squeue status command). Needs root.
"""

import os
import re
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
import yaml
from conftest import copy_workflow, run_snakemake

HERE = Path(__file__).resolve().parent


def _reduce(workdir: Path) -> None:
    path = workdir / "config" / "config.yaml"
    config = yaml.safe_load(path.read_text())
    config["demo"]["frames"] = 3
    config["chunk_wells"] = 48
    path.write_text(yaml.safe_dump(config, sort_keys=False))


@pytest.fixture(scope="module")
def slurm():
    if os.geteuid() != 0:
        pytest.skip("the single-node SLURM test installs packages and starts daemons as root")
    started = subprocess.run(["bash", str(HERE / "start_slurm.sh")], capture_output=True, text=True, timeout=900)
    assert started.returncode == 0, started.stderr[-3000:]
    yield
    subprocess.run(["bash", str(HERE / "stop_slurm.sh")], capture_output=True, text=True, timeout=120)


@pytest.mark.cluster
def test_demo_screen_through_slurm_equals_local_run(slurm, tmp_path):
    local, cluster = copy_workflow(tmp_path / "local"), copy_workflow(tmp_path / "cluster")
    for workdir in (local, cluster):
        _reduce(workdir)
    run_snakemake(local)
    command = [sys.executable, "-m", "snakemake", "--profile", "workflow/profiles/slurm", "--jobs", "4"]
    result = subprocess.run(command, cwd=cluster, capture_output=True, text=True, timeout=1800)
    assert result.returncode == 0, result.stdout[-3000:] + result.stderr[-5000:]
    output = result.stdout + result.stderr
    # every job but the local target went through sbatch: the plugin logs each SLURM job id
    slurm_ids = set(re.findall(r"SLURM jobid (\d+)", output))
    assert len(slurm_ids) >= 20, output[-3000:]
    queue = subprocess.run(
        ["squeue", "--states=all", "--noheader", "--format=%i %T"], capture_output=True, text=True
    ).stdout
    finished = {line.split()[0] for line in queue.splitlines() if line.endswith("COMPLETED")}
    assert slurm_ids <= finished
    for table in ("effects.parquet", "wells/plate=WV-D1-P1/part-0.parquet", "wells/plate=WV-D3-P2/part-0.parquet"):
        pd.testing.assert_frame_equal(
            pd.read_parquet(local / "results" / table), pd.read_parquet(cluster / "results" / table)
        )
