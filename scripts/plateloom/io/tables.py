"""Parquet output: atomic writes with provenance in the file metadata; Hive-style paths."""

from __future__ import annotations

import hashlib
import json
import os
import platform
from collections.abc import Iterator
from contextlib import contextmanager
from importlib import metadata

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

PROVENANCE_KEY = b"plateloom_provenance"
EXTRA_KEY = b"plateloom_extra"
_PACKAGES = ("plateloom", "numpy", "scipy", "scikit-image", "pandas", "pyarrow", "statsmodels", "snakemake")


def config_digest(settings: object) -> str:
    """SHA-256 of the settings as canonical JSON (sorted keys): the same settings, the same digest."""
    return hashlib.sha256(json.dumps(settings, sort_keys=True, default=str).encode()).hexdigest()


def provenance(settings: object) -> dict[str, object]:
    """What produced an output: digest of the settings used and the package versions."""
    versions = {}
    for name in _PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return {"config_sha256": config_digest(settings), "python": platform.python_version(), "packages": versions}


# A spreadsheet runs a cell that starts with one of these as a formula (OWASP, "CSV injection").
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def csv_text(table: pd.DataFrame, float_format: str = "%.6g") -> str:
    """``table`` as CSV for spreadsheets: a text cell that a spreadsheet would run as a formula
    (``=HYPERLINK(...)``, ``@SUM(...)``) is written with a leading apostrophe, as text."""
    safe = table.copy()
    for column in safe.columns:
        if pd.api.types.is_object_dtype(safe[column]) or pd.api.types.is_string_dtype(safe[column]):
            safe[column] = safe[column].map(
                lambda v: "'" + v if isinstance(v, str) and v.startswith(FORMULA_STARTS) else v
            )
    return safe.to_csv(index=False, float_format=float_format)


def temporary_path(path: str) -> str:
    """A hidden temporary file beside ``path`` (same folder, so the final rename is atomic)."""
    folder = os.path.dirname(path) or "."
    os.makedirs(folder, exist_ok=True)
    return os.path.join(folder, f".{os.path.basename(path)}.{os.getpid()}.tmp")


@contextmanager
def atomic_path(path: str) -> Iterator[str]:
    """A temporary path beside ``path`` to write to; renamed to ``path`` when the block ends
    without an error, removed when it fails (no half-written file, visible or hidden, is left)."""
    tmp = temporary_path(path)
    try:
        yield tmp
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.remove(tmp)


def hive_keys(path: str) -> list[str]:
    """The key names of the ``key=value`` folders of ``path`` (e.g. plate, chunk, well)."""
    return [part.split("=", 1)[0] for part in os.path.normpath(path).split(os.sep)[:-1] if "=" in part]


def _keys_as_partitions(table: pa.Table, path: str) -> pa.Table:
    """Columns named like a ``key=value`` folder of ``path`` stored as dictionary<int32, string>:
    the type pyarrow (and so pandas) gives a Hive partition key, so that a folder of these files
    opens as one dataset whether the key is read from the files or from the folder names."""
    for key in hive_keys(path):
        if key in table.column_names:
            column = table.column(key).cast(pa.string())
            index = table.column_names.index(key)
            table = table.set_column(
                index, key, column.dictionary_encode().cast(pa.dictionary(pa.int32(), pa.string()))
            )
    return table


def write_parquet(frame: pd.DataFrame, path: str, settings: object, extra: dict | None = None) -> None:
    """Write ``frame`` to ``path`` atomically (temporary file in the same folder, then rename).

    An interrupted write never leaves a readable partial file at ``path``. ``extra`` (JSON-able)
    is stored in the file metadata and read back by ``read_extra``. Text and categorical
    columns are dictionary-encoded, numbers are not; Snappy compression.
    """
    table = _keys_as_partitions(pa.Table.from_pandas(frame, preserve_index=False), path)
    for i, field in enumerate(table.schema):
        # one Arrow type for text, whatever pandas held it in (object or str dtype: string or
        # large_string) and for an empty text column (null), so every file of a table has one schema
        if pa.types.is_null(field.type) or pa.types.is_string(field.type):
            table = table.set_column(i, field.name, table.column(i).cast(pa.large_string()))
    meta = dict(table.schema.metadata or {})
    meta[PROVENANCE_KEY] = json.dumps(provenance(settings), sort_keys=True).encode()
    if extra is not None:
        meta[EXTRA_KEY] = json.dumps(extra, sort_keys=True).encode()
    table = table.replace_schema_metadata(meta)
    # dictionary encoding only for text and categorical columns: measurements are almost all
    # distinct, and a dictionary of them makes files larger and slower to write and read
    keys = [
        f.name
        for f in table.schema
        if pa.types.is_string(f.type) or pa.types.is_large_string(f.type) or pa.types.is_dictionary(f.type)
    ]
    with atomic_path(path) as tmp:
        pq.write_table(table, tmp, use_dictionary=keys)


def write_profile_tiff(image, path: str, description: dict) -> None:
    """Write a float32 image as a one-page TIFF atomically; ``description`` (JSON) goes in its ImageDescription."""
    import numpy as np
    import tifffile

    with atomic_path(path) as tmp:
        tifffile.imwrite(
            tmp,
            np.asarray(image, np.float32),
            photometric="minisblack",
            description=json.dumps(description, sort_keys=True),
            metadata=None,
        )


def write_bytes(data: bytes, path: str) -> None:
    """Write a binary file (an image) atomically."""
    with atomic_path(path) as tmp, open(tmp, "wb") as handle:
        handle.write(data)


def write_text(text: str, path: str) -> None:
    """Write a text file (report, CSV) atomically."""
    with atomic_path(path) as tmp, open(tmp, "w", encoding="utf-8") as handle:
        handle.write(text)


def read_provenance(path: str) -> dict[str, object]:
    """The provenance record stored in a plateloom Parquet file."""
    meta = pq.read_schema(path).metadata or {}
    return json.loads(meta[PROVENANCE_KEY])


def read_extra(path: str) -> dict:
    """The ``extra`` record stored by ``write_parquet`` (empty if none)."""
    meta = pq.read_schema(path).metadata or {}
    return json.loads(meta[EXTRA_KEY]) if EXTRA_KEY in meta else {}


def well_part_path(root: str, well: str) -> str:
    """Path of one well's table inside a Hive-style chunk folder: <root>/well=<W>/part-0.parquet."""
    return os.path.join(root, f"well={well}", "part-0.parquet")
