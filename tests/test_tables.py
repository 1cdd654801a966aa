"""Outputs are written atomically: an interrupted write never leaves a readable partial file."""

import io
import os

import pandas as pd
import pyarrow.parquet as pq
import pytest

from plateloom.io import tables


def test_interrupted_parquet_write_leaves_the_old_file_untouched(tmp_path, monkeypatch):
    path = tmp_path / "wells.parquet"
    tables.write_parquet(pd.DataFrame({"a": [1, 2, 3]}), str(path), {"v": 1})
    before = path.read_bytes()

    def killed(table, where, **kwargs):
        with open(where, "wb") as handle:  # half a file, then the process dies
            handle.write(b"PAR1 partial")
        raise KeyboardInterrupt

    monkeypatch.setattr(pq, "write_table", killed)
    with pytest.raises(KeyboardInterrupt):
        tables.write_parquet(pd.DataFrame({"a": [9]}), str(path), {"v": 2})
    assert path.read_bytes() == before
    assert pd.read_parquet(path)["a"].tolist() == [1, 2, 3]


def test_a_write_stopped_before_the_rename_leaves_no_file_at_the_final_path(tmp_path, monkeypatch):
    path = tmp_path / "report.html"

    def no_rename(source, target):
        raise KeyboardInterrupt

    monkeypatch.setattr(os, "replace", no_rename)
    with pytest.raises(KeyboardInterrupt):
        tables.write_text("<html>complete</html>", str(path))
    assert not path.exists()
    assert list(tmp_path.iterdir()) == []  # the temporary file is removed as well


def test_a_full_disk_ends_the_job_with_one_line_naming_the_output_and_the_fix(tmp_path, monkeypatch, capsys):
    import errno

    from plateloom.io.job import run_step

    path = tmp_path / "wells" / "part-0.parquet"

    def full(table, where, **kwargs):
        with open(where, "wb") as handle:
            handle.write(b"PAR1 partial")
        raise OSError(errno.ENOSPC, "No space left on device", where)

    monkeypatch.setattr(pq, "write_table", full)
    with pytest.raises(SystemExit) as stopped:
        run_step(None, lambda: tables.write_parquet(pd.DataFrame({"a": [1]}), str(path), {}), "plate_profiles P1")
    assert stopped.value.code == 1
    message = [line for line in capsys.readouterr().err.splitlines() if " ERROR " in line]
    assert len(message) == 1
    assert "No space left on device" in message[0] and "Fix: free space on that disk" in message[0]
    assert "part-0.parquet" in message[0] and "Traceback" not in message[0]
    assert list((tmp_path / "wells").iterdir()) == []  # neither the output nor a hidden temporary file


def test_provenance_is_stored_and_read_back(tmp_path):
    path = tmp_path / "t.parquet"
    tables.write_parquet(pd.DataFrame({"a": [1]}), str(path), {"k": 1}, extra={"scales": {"a": "log"}})
    assert tables.read_provenance(str(path))["config_sha256"] == tables.config_digest({"k": 1})
    assert tables.read_extra(str(path)) == {"scales": {"a": "log"}}


def test_a_results_tree_opens_as_one_arrow_dataset(tmp_path):
    # The data contract: per-well files under Hive-style folders, keys also stored as columns, so any
    # Arrow-aware reader opens the whole tree as one dataset (pyarrow.dataset is the reference reader).
    import pyarrow.dataset as ds

    from plateloom.io.tables import well_part_path, write_parquet

    for plate, well, value in (("P1", "B02", 1.0), ("P1", "B03", 2.0), ("P2", "B02", 3.0)):
        folder = tmp_path / "cells" / f"plate={plate}" / "chunk-000"
        folder.mkdir(parents=True, exist_ok=True)
        write_parquet(
            pd.DataFrame({"plate": [plate], "well": [well], "area_um2": [value]}),
            well_part_path(str(folder), well),
            {"k": 1},
        )
    table = ds.dataset(str(tmp_path / "cells")).to_table().to_pandas().sort_values("area_um2")
    assert table[["plate", "well"]].values.tolist() == [["P1", "B02"], ["P1", "B03"], ["P2", "B02"]]


def test_csv_text_writes_spreadsheet_formulas_as_text():
    # OWASP "CSV injection": a cell starting with = + - @ is run as a formula by spreadsheets;
    # the common remedy is a leading apostrophe, which spreadsheets show as text.
    table = pd.DataFrame(
        {"condition": ['=HYPERLINK("x")', "@SUM(A1)", "+1", "-cmd", "plain", None], "estimate": [-0.5] * 6}
    )
    back = pd.read_csv(io.StringIO(tables.csv_text(table)), keep_default_na=False)
    assert back["condition"].tolist() == ['\'=HYPERLINK("x")', "'@SUM(A1)", "'+1", "'-cmd", "plain", ""]
    assert (back["estimate"] == -0.5).all()
