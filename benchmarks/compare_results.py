"""Compare two results folders table by table: every Parquet file's content and the CSVs.

    python benchmarks/compare_results.py RESULTS_BEFORE RESULTS_AFTER [--float-rtol R]

Used to show that a change which should not move any number (a refactoring) leaves every
results table identical. Provenance metadata (config digest, versions) is not compared; rows
and columns are, exactly (floats bit for bit, NaN equal to NaN). A table that differs is
listed with, per differing column, the largest relative difference of its floats (or "not
numeric"); with ``--float-rtol`` a table whose floats differ by at most R and whose other
columns are equal counts as equal within rounding. Last line: the counts.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq


def _table(path: Path) -> pd.DataFrame:
    if path.suffix == ".csv":
        return pd.read_csv(path)
    return pq.read_table(path).to_pandas()


def _column_differences(left: pd.DataFrame, right: pd.DataFrame) -> dict[str, float]:
    """Per differing column: the largest relative difference of its floats (inf if not numeric or reshaped)."""
    if list(left.columns) != list(right.columns) or len(left) != len(right):
        return {"(shape or columns)": float("inf")}
    found = {}
    for column in left.columns:
        a, b = left[column], right[column]
        if a.equals(b):
            continue
        if pd.api.types.is_float_dtype(a) and pd.api.types.is_float_dtype(b):
            x, y = a.to_numpy(float), b.to_numpy(float)
            same_nan = (x != x) == (y != y)
            scale = np.maximum(np.abs(x), np.abs(y))
            with np.errstate(invalid="ignore", divide="ignore"):
                relative = np.where(scale > 0, np.abs(x - y) / scale, 0.0)
            found[column] = float(np.nanmax(relative)) if same_nan.all() else float("inf")
        else:
            found[column] = float("inf")
    return found


def compare(before: Path, after: Path, float_rtol: float = 0.0) -> tuple[int, list[str]]:
    """Number of equal tables and the descriptions of the differing or missing ones."""
    files = sorted(
        {p.relative_to(before) for p in before.rglob("*") if p.suffix in (".parquet", ".csv")}
        | {p.relative_to(after) for p in after.rglob("*") if p.suffix in (".parquet", ".csv")}
    )
    same, problems = 0, []
    for name in files:
        if not (before / name).exists() or not (after / name).exists():
            problems.append(f"{name}: only in {'after' if not (before / name).exists() else 'before'}")
            continue
        left, right = _table(before / name), _table(after / name)
        differences = _column_differences(left, right)
        if all(value <= float_rtol for value in differences.values()):
            same += 1
            continue
        listed = ", ".join(f"{c} {v:.2g}" for c, v in differences.items())
        problems.append(f"{name}: largest relative difference per column: {listed}")
    return same, problems


def main(argv: list[str]) -> int:
    float_rtol = float(argv[argv.index("--float-rtol") + 1]) if "--float-rtol" in argv else 0.0
    same, problems = compare(Path(argv[1]), Path(argv[2]), float_rtol)
    for line in problems:
        print(line)
    within = f" (floats within relative {float_rtol:g})" if float_rtol else ""
    print(f"{same} tables equal{within}, {len(problems)} differ")
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
