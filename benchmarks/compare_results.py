"""Compare two results folders table by table: every Parquet file's content and the CSVs.

    python benchmarks/compare_results.py RESULTS_BEFORE RESULTS_AFTER

Used to show that a change which should not move any number (a refactoring) leaves every
results table identical. Provenance metadata (config digest, versions) is not compared; rows
and columns are, exactly (floats bit for bit, NaN equal to NaN). Prints one line per differing
file and, last, the count of identical and differing files.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq


def _table(path: Path) -> pd.DataFrame:
    if path.suffix == ".csv":
        return pd.read_csv(path)
    return pq.read_table(path).to_pandas()


def compare(before: Path, after: Path) -> tuple[int, list[str]]:
    """Number of identical tables and the descriptions of the differing or missing ones."""
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
        try:
            pd.testing.assert_frame_equal(left, right, check_exact=True, check_dtype=True)
            same += 1
        except AssertionError as error:
            problems.append(f"{name}: {' '.join(str(error).split())[:300]}")
    return same, problems


def main(argv: list[str]) -> int:
    same, problems = compare(Path(argv[1]), Path(argv[2]))
    for line in problems:
        print(line)
    print(f"{same} tables identical, {len(problems)} differ")
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
