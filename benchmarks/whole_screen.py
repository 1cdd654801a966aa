"""A synthetic screen of 4 plates x 96 wells x 2 sites x 20 frames of 512x512, end to end on 2 cores.

Copies the workflow to a temporary folder, turns the demo scenario into this screen (2 imaging
days x 2 plates, the demo's layout, cells per site scaled with the field area) and runs
Snakemake from scratch. From the `benchmark:` files of every job it prints the time split by
rule, the CPU of the whole run (getrusage of all child processes) over wall x 2 cores, and for
the per-well stage its CPU utilisation: CPU seconds of every job inside the stage's span
(prorated by overlap; the simulation of later plates runs beside the first plates' per-well
jobs) over span x 2 cores, the span taken from the first analyse_wells job's start to the last
one's end (output times less job durations). Last line: that utilisation (goal >= 0.85).

    python benchmarks/whole_screen.py [frames] [image_side]
"""

from __future__ import annotations

import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

ROOT = Path(__file__).resolve().parents[1]
CORES = 2


def prepare(work: Path, frames: int, side: int) -> None:
    for part in ("Snakefile", "workflow", "config", "resources", "scripts"):
        source = ROOT / part
        (shutil.copytree if source.is_dir() else shutil.copy2)(
            source, work / part, **({"ignore": shutil.ignore_patterns("__pycache__")} if source.is_dir() else {})
        )
    scenario_path = work / "resources/demo/scenario.yaml"
    scenario = yaml.safe_load(scenario_path.read_text())
    scale = (side / scenario["image_size_px"]) ** 2
    scenario.update(
        {
            "image_size_px": side,
            "frames": frames,
            "sites_per_well": 2,
            "cells_per_site": int(round(scenario["cells_per_site"] * scale)),
            "batches": [
                {"batch": "day1", "plates": ["WV-D1-P1", "WV-D1-P2"]},
                {"batch": "day2", "plates": ["WV-D2-P1", "WV-D2-P2"]},
            ],
        }
    )
    scenario_path.write_text(yaml.safe_dump(scenario, sort_keys=False))
    sheet = pd.read_csv(work / "config/plates.csv")
    sheet[sheet["plate"].isin([p for b in scenario["batches"] for p in b["plates"]])].to_csv(
        work / "config/plates.csv", index=False
    )
    config_path = work / "config/config.yaml"
    config = yaml.safe_load(config_path.read_text())
    config["screen"]["design_check"]["n_screens"] = 20
    config_path.write_text(yaml.safe_dump(config, sort_keys=False))


def main() -> None:
    frames = int(sys.argv[1]) if len(sys.argv) > 1 else 20
    side = int(sys.argv[2]) if len(sys.argv) > 2 else 512
    work = Path(tempfile.mkdtemp(prefix="plateloom-screen-"))
    prepare(work, frames, side)
    start = time.perf_counter()
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    subprocess.run(
        [sys.executable, "-m", "snakemake", "--cores", str(CORES), "--scheduler", "greedy", "--quiet"],
        cwd=work,
        check=True,
        capture_output=True,
    )
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    run_cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    rows = []
    for path in (work / "results" / "benchmarks").rglob("*.tsv"):
        table = pd.read_csv(path, sep="\t")
        rule = path.parent.name if path.parent.name != "benchmarks" else path.stem
        rows.append(table.assign(rule=rule, finished=path.stat().st_mtime))
    jobs = pd.concat(rows, ignore_index=True)
    by_rule = jobs.groupby("rule").agg(
        jobs=("s", "size"),
        seconds=("s", "sum"),
        cpu_seconds=("cpu_time", "sum"),
        longest=("s", "max"),
        peak_rss_mb=("max_rss", "max"),
    )
    by_rule["share_of_job_time"] = by_rule["seconds"] / by_rule["seconds"].sum()
    print(f"screen: 4 plates x 96 wells x 2 sites x {frames} frames of {side}x{side}; {len(jobs)} jobs")
    print(by_rule.sort_values("seconds", ascending=False).round(3).to_string())
    wells = jobs[jobs["rule"] == "analyse_wells"]
    first, last = (wells["finished"] - wells["s"]).min(), wells["finished"].max()
    span = last - first
    # Every job's CPU counts for the part of it inside the per-well span: simulation jobs of later plates
    # run beside the first plates' per-well jobs, and they keep the cores busy too.
    starts = jobs["finished"] - jobs["s"]
    inside = (np.minimum(jobs["finished"], last) - np.maximum(starts, first)).clip(lower=0)
    span_cpu = float((jobs["cpu_time"] * inside / jobs["s"].where(jobs["s"] > 0)).sum())
    print(
        f"wall {wall:.0f} s; CPU of the whole run (all processes, getrusage) {run_cpu:.0f} s "
        f"= {run_cpu / (wall * CORES):.2f} of {CORES} cores"
    )
    print(
        f"per-well stage span {span:.0f} s: CPU of its own jobs {wells['cpu_time'].sum():.0f} s "
        f"({wells['cpu_time'].sum() / (span * CORES):.2f} of {CORES} cores), of all jobs in the span {span_cpu:.0f} s"
    )
    print("(Snakemake's benchmark cpu_time is sampled while a job runs, so short jobs are under-counted)")
    print(
        f"CPU utilisation of {CORES} cores during the per-well stage, all jobs: "
        f"{span_cpu / (span * CORES):.2f} (goal >= 0.85)"
    )
    shutil.rmtree(work)


if __name__ == "__main__":
    main()
