"""Snakemake's own share of a full demo run, as a ratio within one run.

Runs the demo screen from scratch in a temporary copy with 2 cores, then compares the wall
time with the per-job times Snakemake recorded (`benchmark:` files of every rule). The last
line is the overhead ratio: 1 - (sum of job seconds) / (wall seconds x cores).

    python benchmarks/demo_run_overhead.py
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
CORES = 2
OUTPUTS = ("demo_images", "results")


def main() -> None:
    work = Path(tempfile.mkdtemp(prefix="plateloom-demo-"))
    for part in ("Snakefile", "workflow", "config", "resources", "scripts"):
        source = ROOT / part
        (shutil.copytree if source.is_dir() else shutil.copy2)(source, work / part)
    start = time.perf_counter()
    subprocess.run(
        [sys.executable, "-m", "snakemake", "--cores", str(CORES), "--scheduler", "greedy", "--quiet"],
        cwd=work,
        check=True,
        capture_output=True,
    )
    wall = time.perf_counter() - start
    tables = [
        pd.read_csv(path, sep="\t").assign(rule=path.parent.name if path.parent.name != "benchmarks" else path.stem)
        for path in (work / "results" / "benchmarks").rglob("*.tsv")
    ]
    jobs = pd.concat(tables, ignore_index=True)
    by_rule = jobs.groupby("rule")["s"].agg(["count", "sum", "max"])
    print(by_rule.to_string())
    print(
        f"jobs {len(jobs)}, wall {wall:.1f} s, job seconds {jobs['s'].sum():.1f}, "
        f"peak job RSS {jobs['max_rss'].max():.0f} MB"
    )
    print(f"overhead ratio 1 - job_s / (wall x {CORES} cores): {1 - jobs['s'].sum() / (wall * CORES):.3f}")
    images, results = (sum(f.stat().st_size for f in (work / d).rglob("*") if f.is_file()) for d in OUTPUTS)
    minutes, seconds = divmod(round(wall), 60)
    print(f"demo run (demo.size as configured): {minutes} min {seconds} s wall on {CORES} cores, "
          f"{images / 1e6:.0f} MB of demo images, {results / 1e6:.0f} MB of results")  # fmt: skip
    shutil.rmtree(work)


if __name__ == "__main__":
    main()
