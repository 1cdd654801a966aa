"""Plate fan-in: well profiles from ~5 million observation rows in per-well Parquet files, against
reading the same rows as CSV with pandas, in the same run.

Writes a synthetic plate of 384 wells (cells table with the columns the per-well stage writes),
once as per-well Parquet (Hive folders, written by ``write_parquet`` as the workflow writes them)
and once as per-well CSV. In a fresh process each: (a) plateloom's fan-in as the plate stage runs
it, reading only the columns the well profile needs, well folder by well folder on 2 threads, and
summarising per well (``summarise_observation_files`` + ``summarise_wells``); (b)
``pandas.read_csv`` of every CSV file (reading only, no summary). Prints rows per second of both, the peak resident
memory of (a) above its memory after imports against the in-memory size of the columns read,
and, last, the throughput ratio (a) / (b) (goal >= 5; memory goal <= 2).

    python benchmarks/fan_in.py [rows]
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from plateloom.io.tables import write_parquet
from plateloom.setup.plate_formats import plate_format, well_name
from plateloom.well.features import object_columns

WELLS = 384

PARQUET_CHILD = """
import json, sys, time
import numpy as np, pandas as pd
from plateloom.plate.streamed_summaries import summarise_observation_files
from plateloom.plate.summaries import summarise_wells

def rss(key):
    with open('/proc/self/status') as status:
        return next(int(line.split()[1]) for line in status if line.startswith(key)) / 1024

folder, layout_path = sys.argv[1], sys.argv[2]
layout = pd.read_csv(layout_path)
tracks = pd.read_parquet(sys.argv[3])
no_exclusions = pd.DataFrame({"well": [], "site": [], "frame": []})
baseline = rss("VmRSS:")
start = time.perf_counter()
summaries, counts, _ = summarise_observation_files([folder], no_exclusions, "median", threads=2)
profile = summarise_wells(counts, summaries, tracks, layout, "P1", "d1", 384)
seconds = time.perf_counter() - start
# the columns read, as one table in memory: well (category codes), site, frame, time_min, touches_border, features
rows = int(counts["observations"].sum())
read_mb = rows * (4 + 8 + 8 + 8 + 1 + 8 * summaries.shape[1]) / 2**20
print(json.dumps({"seconds": seconds, "rows": rows, "columns": 5 + summaries.shape[1],
                  "read_mb": read_mb, "baseline_mb": baseline, "peak_mb": rss("VmHWM:"), "wells": len(profile)}))
"""

CSV_CHILD = """
import glob, json, sys, time
import pandas as pd
start = time.perf_counter()
frames = [pd.read_csv(path) for path in sorted(glob.glob(sys.argv[1] + '/*.csv'))]
rows = sum(len(f) for f in frames)
print(json.dumps({"seconds": time.perf_counter() - start, "rows": rows}))
"""


def synthetic_well(rng: np.random.Generator, well: str, rows: int) -> pd.DataFrame:
    frames = 100
    per_frame = max(1, rows // frames)
    frame = np.repeat(np.arange(frames), per_frame)[:rows]
    n = len(frame)
    data = {
        "plate": "P1",
        "well": well,
        "site": 1,
        "frame": frame,
        "time_min": frame * 5.0,
        "object": np.tile(np.arange(1, per_frame + 1), frames)[:n],
        "track": np.tile(np.arange(per_frame), frames)[:n],
        "parent_track": -1,
        "touches_border": rng.random(n) < 0.05,
        "centroid_x_um": rng.uniform(0, 800, n),
        "centroid_y_um": rng.uniform(0, 800, n),
    }
    positions = ("object", "centroid_x_um", "centroid_y_um", "touches_border")
    for name in [c for c in object_columns([], [], with_cells=False) if c not in positions]:
        data[name] = rng.lognormal(3, 0.2, n)
    for channel in ("nuclear", "reporter"):
        for kind in ("mean", "integrated", "std"):
            data[f"{kind}_intensity_{channel}"] = rng.lognormal(6, 0.3, n)
    for prop in ("contrast", "homogeneity", "correlation", "asm"):
        data[f"glcm_{prop}_nuclear"] = rng.random(n)
    data["neighbours"] = rng.poisson(5, n)
    data["nearest_neighbour_um"] = rng.lognormal(2.5, 0.3, n)
    return pd.DataFrame(data)


def child(code: str, *args: str) -> dict:
    result = subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True, check=True)
    return json.loads(result.stdout.strip().splitlines()[-1])


def main() -> None:
    rows = int(float(sys.argv[1])) if len(sys.argv) > 1 else 5_000_000
    fmt = plate_format(WELLS)
    wells = [well_name(r, c) for r in range(fmt.rows) for c in range(fmt.columns)]
    rng = np.random.default_rng(1)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        parquet, csv = root / "cells" / "plate=P1" / "chunk-000", root / "csv"
        csv.mkdir(parents=True)
        for well in wells:
            table = synthetic_well(rng, well, rows // WELLS)
            (parquet / f"well={well}").mkdir(parents=True)
            write_parquet(table, str(parquet / f"well={well}" / "part-0.parquet"), {})
            table.to_csv(csv / f"{well}.csv", index=False)
        layout = pd.DataFrame(
            {
                "well": wells,
                "role": ["negative_control"] * 32 + ["test"] * (WELLS - 32),
                "condition": ["vehicle"] * 32 + [f"c{i % 20}" for i in range(WELLS - 32)],
                "dose": 0.0,
                "dose_unit": "uM",
            }
        )
        layout["treatment"] = layout["condition"]
        layout.to_csv(root / "layout.csv", index=False)
        pd.DataFrame(
            {"well": wells, "track": 0, "speed_um_per_min": 0.5, "straightness": 0.5, "touches_border": False}
        ).to_parquet(root / "tracks.parquet")
        parquet_disk = sum(p.stat().st_size for p in parquet.rglob("*.parquet")) / 2**20
        csv_disk = sum(p.stat().st_size for p in csv.glob("*.csv")) / 2**20
        fan_in = child(PARQUET_CHILD, str(parquet), str(root / "layout.csv"), str(root / "tracks.parquet"))
        reading = child(CSV_CHILD, str(csv))
    working = fan_in["peak_mb"] - fan_in["baseline_mb"]
    fan_in_rate, csv_rate = fan_in["rows"] / fan_in["seconds"], reading["rows"] / reading["seconds"]
    print(f"rows: {fan_in['rows']:,} in {WELLS} wells; Parquet {parquet_disk:.0f} MB, CSV {csv_disk:.0f} MB on disk")
    print(
        f"fan-in (Parquet, {fan_in['columns']} columns read, well profiles): {fan_in['seconds']:.1f} s, "
        f"{fan_in_rate / 1e6:.2f} M rows/s"
    )
    print(
        f"pandas.read_csv of the same rows (all columns, reading only): {reading['seconds']:.1f} s, "
        f"{csv_rate / 1e6:.2f} M rows/s"
    )
    print(
        f"memory: columns read {fan_in['read_mb']:.0f} MB as one table; working peak {working:.0f} MB "
        f"= {working / fan_in['read_mb']:.2f} x (goal <= 2)"
    )
    print(f"fan-in / CSV throughput: {fan_in_rate / csv_rate:.1f} (goal >= 5)")


if __name__ == "__main__":
    main()
