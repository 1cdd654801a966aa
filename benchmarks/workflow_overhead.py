"""Snakemake overhead for a 40-plate x 384-well screen (trivial inputs), as ratios within one run.

Builds a screen sheet of 40 plates of 384 wells (all wells analysed) whose image folder holds
empty files named for 4 sites and 2 channels per well (the start-up check reads names only),
then times (1) a dry run with every job still to do, (2) creating empty stand-ins for
every output and `--touch` recording them complete, (3) a dry run of the complete screen, and
(4) with --full, a full run of the same job graph in which every rule's script is replaced by a
stand-in that only creates its outputs: its wall time is Snakemake's overhead for the screen
(scheduling plus one script start per job). Prints job counts and times; the last line is the
ratio of the complete-screen dry run to the goal of 10 s.

    python benchmarks/workflow_overhead.py [--full]
"""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PLATES, ROWS, COLUMNS = 40, 16, 24


def _create_outputs(results: Path) -> None:
    """Empty stand-ins for every output, created in pipeline order (trivial inputs)."""
    chunks = (ROWS * COLUMNS + 47) // 48
    for p in range(PLATES):
        for channel in ("nuclear", "reporter"):
            path = results / "illumination" / f"plate=B{p:02d}" / f"{channel}.tif"
            path.parent.mkdir(parents=True, exist_ok=True)
            path.touch()
    time.sleep(1.1)
    for kind in ("cells", "tracks", "site_qc"):
        for p in range(PLATES):
            for c in range(chunks):
                (results / kind / f"plate=B{p:02d}" / f"chunk-{c:03d}").mkdir(parents=True, exist_ok=True)
    time.sleep(1.1)
    for p in range(PLATES):
        for kind in ("wells", "plate_qc", "exclusions", "edge_effects"):
            path = results / kind / f"plate=B{p:02d}" / "part-0.parquet"
            path.parent.mkdir(parents=True, exist_ok=True)
            path.touch()
        (results / "plate_notes").mkdir(exist_ok=True)
        (results / "plate_notes" / f"B{p:02d}.json").touch()
    time.sleep(1.1)
    (results / "reports" / "plates").mkdir(parents=True, exist_ok=True)
    for p in range(PLATES):
        (results / "reports" / "plates" / f"B{p:02d}.html").touch()
    screen_stages = [
        [
            "screen/model_wells.parquet",
            "screen/treatments.parquet",
            "screen/batch_variance_shares.parquet",
            "screen/batch_principal_components.parquet",
        ],
        [f"screen/effects_parts/chunk={c:03d}.parquet" for c in range(2)],
        [
            "effects.parquet",
            "effects.csv",
            "dose_response.parquet",
            "dose_response.csv",
            "screen/dose_response_points.parquet",
        ],
        ["design_check.parquet", "design_check.csv"],
        ["reports/screen.html"],
    ]
    for stage in screen_stages:
        for name in stage:
            (results / name).parent.mkdir(parents=True, exist_ok=True)
            (results / name).touch()
        time.sleep(1.1)


STAND_IN = """# Benchmark stand-in for every rule: create the outputs (and the log), compute nothing.
import os
sm = snakemake  # noqa: F821
for path in list(sm.output) + list(sm.log):
    if os.path.splitext(path)[1]:
        os.makedirs(os.path.dirname(path) or ".", exist_ok=True)
        open(path, "w").close()
    else:
        os.makedirs(path, exist_ok=True)
"""


def _use_stand_ins(work: Path) -> None:
    """Point every rule's script: at the stand-in."""
    (work / "workflow" / "scripts" / "stand_in.py").write_text(STAND_IN)
    for rules in (work / "workflow" / "rules").glob("*.smk"):
        text = re.sub(r'"\.\./scripts/\w+\.py"', '"../scripts/stand_in.py"', rules.read_text())
        rules.write_text(text)


def main() -> None:
    full = "--full" in sys.argv
    work = Path(tempfile.mkdtemp(prefix="plateloom-overhead-"))
    for part in ("Snakefile", "workflow", "config", "resources", "scripts"):
        source = ROOT / part
        (shutil.copytree if source.is_dir() else shutil.copy2)(source, work / part)
    wells = [f"{chr(65 + r)}{c + 1:02d}" for r in range(ROWS) for c in range(COLUMNS)]
    lines = ["well,role,condition,dose,dose_unit"]
    lines += [
        f"{w},{'negative_control' if i % 16 == 0 else 'test'},{'vehicle' if i % 16 == 0 else f'X{i % 40}'},,"
        for i, w in enumerate(wells)
    ]
    (work / "config/layouts/bench_384.csv").write_text("\n".join(lines) + "\n")
    (work / "images").mkdir()
    # empty files with the names of 4 sites x 2 channels per well: the check at start-up reads
    # names only, so every plate's folder is indexed as for a real screen (40 x 3,072 names)
    for well in wells:
        for site in range(1, 5):
            for channel in ("nuclear", "reporter"):
                (work / "images" / f"{well}_s{site}_{channel}.tif").touch()
    sheet = ["plate,batch,plate_format,layout,image_folder"]
    sheet += [f"B{p:02d},day{p // 8},384,config/layouts/bench_384.csv,images" for p in range(PLATES)]
    (work / "config/plates.csv").write_text("\n".join(sheet) + "\n")
    config = (work / "config/config.yaml").read_text().replace("chunk_wells: 24", "chunk_wells: 48")
    (work / "config/config.yaml").write_text(config)
    base = [sys.executable, "-m", "snakemake", "--cores", "2", "--scheduler", "greedy"]

    def timed(*args: str) -> tuple[float, str]:
        start = time.perf_counter()
        result = subprocess.run(base + list(args), cwd=work, capture_output=True, text=True)
        if result.returncode != 0:
            raise SystemExit(result.stderr[-3000:])
        return time.perf_counter() - start, result.stdout + result.stderr

    empty = work / "empty-workflow"
    empty.mkdir()
    (empty / "Snakefile").write_text('rule a:\n    output: "x"\n    shell: "touch {output}"\n')
    start = time.perf_counter()
    subprocess.run(base + ["-n"], cwd=empty, capture_output=True, check=True)
    startup = time.perf_counter() - start
    todo, output = timed("-n", "--quiet", "rules")
    jobs = {name: int(count) for name, count in re.findall(r"^(\w+)\s+(\d+)$", output, flags=re.M)}
    start = time.perf_counter()
    _create_outputs(work / "results")
    touch, _ = timed("--touch", "--quiet")
    touch += time.perf_counter() - start
    done, output_done = timed("-n")
    print(f"plates {PLATES}, wells {PLATES * ROWS * COLUMNS}, jobs {jobs}")
    print(f"dry run, all to do: {todo:.1f} s; touch all outputs: {touch:.1f} s; dry run, complete: {done:.1f} s")
    print(
        f"start-up of Snakemake on a one-rule workflow, same machine: {startup:.1f} s "
        f"(complete-screen dry run net of it: {done - startup:.1f} s)"
    )
    print("complete screen up to date:", "Nothing to be done" in output_done)
    if full:
        shutil.rmtree(work / "results")
        shutil.rmtree(work / ".snakemake", ignore_errors=True)
        _use_stand_ins(work)
        run, _ = timed("--quiet")
        n_jobs = jobs["total"]
        print(
            f"full run with stand-in jobs: {run:.1f} s for {n_jobs} jobs on 2 cores "
            f"({2 * run / n_jobs:.2f} core-seconds of overhead per job)"
        )
    print(f"ratio dry-run(complete) / 10 s goal: {done / 10.0:.2f}")
    shutil.rmtree(work)


if __name__ == "__main__":
    main()
