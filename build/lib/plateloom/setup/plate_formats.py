"""Microplate geometry (ANSI/SLAS 4-2004 well grids) and well names."""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

WELL_PATTERN = re.compile(r"^([A-Z]{1,2})(\d{1,2})$")


@dataclass(frozen=True)
class PlateFormat:
    """A plate format: number of wells, grid shape and well pitch (centre to centre, mm)."""

    wells: int
    rows: int
    columns: int
    well_pitch_mm: float


FORMATS: dict[int, PlateFormat] = {
    96: PlateFormat(96, 8, 12, 9.0),
    384: PlateFormat(384, 16, 24, 4.5),
    1536: PlateFormat(1536, 32, 48, 2.25),
}


def plate_format(wells: int) -> PlateFormat:
    """Return the format for a plate of ``wells`` wells (96, 384 or 1536)."""
    try:
        return FORMATS[int(wells)]
    except (KeyError, ValueError):
        raise ValueError(f"unknown plate format {wells!r}; use one of {sorted(FORMATS)}") from None


def row_label(row_index: int) -> str:
    """Row letter(s) for a 0-based row index: 0 -> A, 25 -> Z, 26 -> AA (1536-well plates)."""
    if row_index < 26:
        return chr(ord("A") + row_index)
    return "A" + chr(ord("A") + row_index - 26)


def well_name(row_index: int, column_index: int) -> str:
    """Canonical well name from 0-based indices, zero-padded column: (0, 0) -> 'A01'."""
    return f"{row_label(row_index)}{column_index + 1:02d}"


def parse_well(name: str) -> tuple[int, int]:
    """0-based (row, column) of a well name such as 'A1', 'A01' or 'AF48'."""
    match = WELL_PATTERN.match(str(name).strip().upper())
    if not match:
        raise ValueError(f"{name!r} is not a well name like 'B07'")
    letters, digits = match.groups()
    row = ord(letters[-1]) - ord("A") + (26 if len(letters) == 2 else 0)
    if len(letters) == 2 and letters[0] != "A":
        raise ValueError(f"{name!r} is not a well name like 'B07'")
    return row, int(digits) - 1


def canonical_well(name: str, fmt: PlateFormat) -> str:
    """Normalise a well name ('b7' -> 'B07') and check it lies on a plate of format ``fmt``."""
    row, column = parse_well(name)
    if not (0 <= row < fmt.rows and 0 <= column < fmt.columns):
        last = well_name(fmt.rows - 1, fmt.columns - 1)
        raise ValueError(f"well {name!r} is not on a {fmt.wells}-well plate (A01..{last})")
    return well_name(row, column)


def all_wells(fmt: PlateFormat) -> list[str]:
    """Every well of a plate in row-major order."""
    return [well_name(r, c) for r in range(fmt.rows) for c in range(fmt.columns)]


def is_edge_well(name: str, fmt: PlateFormat) -> bool:
    """True for wells in the outer row or column (prone to evaporation and temperature drift)."""
    row, column = parse_well(name)
    return row in (0, fmt.rows - 1) or column in (0, fmt.columns - 1)


def well_grid(values: dict[str, float], fmt: PlateFormat) -> np.ndarray:
    """Plate-shaped array (rows x columns) of well values; NaN where a well has none."""
    grid = np.full((fmt.rows, fmt.columns), np.nan)
    for name, value in values.items():
        row, column = parse_well(name)
        grid[row, column] = value
    return grid
