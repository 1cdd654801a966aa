"""Screen sheet (one row per plate) and plate layouts (which well holds what), validated.

Every problem is reported as an :class:`InputError` naming the file, the row (1-based, as a
spreadsheet shows it, header = row 1) and the column, with the fix.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass

import numpy as np
import pandas as pd

from plateloom.columns import ROLES
from plateloom.errors import InputError
from plateloom.setup.plate_formats import canonical_well, parse_well, plate_format

BATCH_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9 _.:/+-]*$")
SHEET_COLUMNS = ("plate", "batch", "plate_format", "layout", "image_folder")
LAYOUT_COLUMNS = ("well", "role", "condition", "dose", "dose_unit")
PLATE_ID_CHARS = set("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789-_.")


@dataclass(frozen=True)
class PlateEntry:
    """One row of the screen sheet."""

    plate: str
    batch: str
    plate_format: int
    layout: str
    image_folder: str
    treatment_time_min: float | None = None  # minutes from the first frame to the treatment (optional column)


def _read_csv(path: str, what: str) -> pd.DataFrame:
    if not os.path.isfile(path):
        raise InputError(
            path, f"the {what} does not exist.", "check the path (relative to the folder you run snakemake from)."
        )
    try:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (pd.errors.ParserError, UnicodeDecodeError, pd.errors.EmptyDataError) as error:
        raise InputError(
            path, f"the {what} is not a readable CSV file ({error}).", "save it as UTF-8 CSV with a header row."
        ) from None
    frame.columns = [str(c).strip() for c in frame.columns]
    return frame.apply(lambda column: column.str.strip())


def _require_columns(frame: pd.DataFrame, required: tuple[str, ...], path: str) -> None:
    missing = [c for c in required if c not in frame.columns]
    if missing:
        raise InputError(
            path,
            f"missing column(s) {', '.join(missing)}; found {', '.join(frame.columns)}.",
            f"the header must contain {', '.join(required)}.",
        )


def load_screen_sheet(path: str) -> list[PlateEntry]:
    """Read and check the screen sheet: unique plate ids, known plate formats, files present."""
    entries, problems = check_screen_sheet(path)
    if problems:
        raise problems[0]
    return entries


def check_screen_sheet(path: str) -> tuple[list[PlateEntry], list[InputError]]:
    """The good rows of the screen sheet and every problem found (a problem row gives no entry)."""
    frame = _read_csv(path, "screen sheet")
    _require_columns(frame, SHEET_COLUMNS, path)
    if frame.empty:
        raise InputError(path, "the screen sheet has no plates.", "add one row per plate.")
    entries: list[PlateEntry] = []
    problems: list[InputError] = []
    seen: dict[str, int] = {}
    for index, row in frame.iterrows():
        try:
            entries.append(_sheet_row(row, int(index) + 2, path, seen))
        except InputError as error:
            problems.append(error)
    return entries, problems + _shared_image_folders(entries, path)


def _shared_image_folders(entries: list[PlateEntry], path: str) -> list[InputError]:
    """A problem per plate whose image folder is another plate's (its images would be counted twice)."""
    owner: dict[str, str] = {}
    problems = []
    for entry in entries:
        folder = os.path.realpath(entry.image_folder)
        if folder in owner:
            problems.append(
                InputError(
                    f"{path}, plate {entry.plate}, column image_folder",
                    f"{entry.image_folder!r} is also the image folder of plate {owner[folder]}; the same images would "
                    "be counted as two plates.",
                    "point every plate at its own folder.",
                )
            )
        owner.setdefault(folder, entry.plate)
    return problems


def _sheet_row(row: pd.Series, line: int, path: str, seen: dict[str, int]) -> PlateEntry:
    where = f"{path}, row {line}"
    plate = row["plate"]
    if not plate or not set(plate) <= PLATE_ID_CHARS:
        raise InputError(
            where,
            f"plate id {plate!r} is empty or has characters other than letters, digits, '-', '_', '.'.",
            "use a short id such as WV-D1-P1.",
        )
    if plate in seen:
        raise InputError(
            where, f"plate id {plate!r} already used in row {seen[plate]}.", "give every plate its own id."
        )
    seen[plate] = line
    if not row["batch"]:
        raise InputError(
            where + ", column batch",
            "batch is empty.",
            "give the imaging day (e.g. 2026-11-03) or another batch label.",
        )
    if not BATCH_PATTERN.match(row["batch"]):
        # the batch reaches Snakemake's job parameters, which its --report writes into a script unescaped
        raise InputError(
            where + ", column batch",
            f"batch {row['batch']!r} has characters other than letters, digits, space and - _ . : / +.",
            "use a plain label such as 2026-11-03 or day1.",
        )
    try:
        fmt = plate_format(int(row["plate_format"]))
    except ValueError:
        raise InputError(
            where + ", column plate_format", f"{row['plate_format']!r} is not a plate format.", "use 96, 384 or 1536."
        ) from None
    if not os.path.isfile(row["layout"]):
        raise InputError(
            where + ", column layout",
            f"layout file {row['layout']!r} does not exist.",
            "check the path (relative to the folder you run snakemake from).",
        )
    if not row["image_folder"]:
        raise InputError(
            where + ", column image_folder", "image_folder is empty.", "give the folder holding this plate's images."
        )
    treated = _treatment_time(row, where)
    return PlateEntry(plate, row["batch"], fmt.wells, row["layout"], row["image_folder"], treated)


def _treatment_time(row: pd.Series, where: str) -> float | None:
    """The optional treatment_time_min of a sheet row (None when the column is absent or empty)."""
    text = row.get("treatment_time_min", "")
    if not text:
        return None
    try:
        value = float(text)
    except ValueError:
        value = float("nan")
    if not np.isfinite(value):
        raise InputError(
            where + ", column treatment_time_min",
            f"{text!r} is not a number of minutes.",
            "give the minutes from the first frame to the treatment (negative if treated before imaging), "
            "or leave it empty.",
        )
    return value


def treatment_times(entries: list[PlateEntry], path: str) -> dict[str, float] | None:
    """Treatment time (minutes since the first frame) per plate; None when no plate gives one.
    Raises when only some plates give one: time after treatment must mean the same on every plate."""
    given = {e.plate: e.treatment_time_min for e in entries if e.treatment_time_min is not None}
    if not given:
        return None
    missing = [e.plate for e in entries if e.treatment_time_min is None]
    if missing:
        raise InputError(
            path + ", column treatment_time_min",
            f"plates {', '.join(missing)} give no treatment time while others do.",
            "give treatment_time_min for every plate, or for none (time then runs from each plate's first frame).",
        )
    return given


def treatment_label(condition: str, dose: float | None, dose_unit: str) -> str:
    """The name of one treatment: condition, and dose with unit when there is one ('LOOM-101 0.3 uM')."""
    if dose is None or (isinstance(dose, float) and math.isnan(dose)):
        return condition
    return f"{condition} {dose:g} {dose_unit}"


def load_layout(path: str, wells: int) -> pd.DataFrame:
    """Read and check a plate layout for a plate of ``wells`` wells.

    Returns one row per listed well with columns well (canonical, 'B07'), role, condition,
    dose (float, NaN when none), dose_unit and treatment.
    """
    layout, problems = check_layout(path, wells)
    if problems:
        raise problems[0]
    return layout


def check_layout(path: str, wells: int) -> tuple[pd.DataFrame, list[InputError]]:
    """The layout's good rows and every problem found in it (row by row, then the negative controls)."""
    fmt = plate_format(wells)
    frame = _read_csv(path, "plate layout")
    _require_columns(frame, ("well", "role"), path)
    for column in ("condition", "dose", "dose_unit"):
        if column not in frame.columns:
            frame[column] = ""
    records, problems = [], []
    seen: dict[str, int] = {}
    for index, row in frame.iterrows():
        try:
            records.append(_layout_row(row, int(index) + 2, path, fmt, seen))
        except InputError as error:
            problems.append(error)
    layout = pd.DataFrame.from_records(records, columns=["well", "role", "condition", "dose", "dose_unit", "treatment"])
    problems += mixed_dose_units(layout, path)
    if not (layout["role"] == "negative_control").any():
        problems.append(
            InputError(
                path,
                "the layout has no negative_control wells; effects are measured against them.",
                "mark the vehicle wells with role negative_control.",
            )
        )
    return layout, problems


def _layout_row(row: pd.Series, line: int, path: str, fmt, seen: dict[str, int]) -> dict:
    where = f"{path}, row {line}"
    try:
        well = canonical_well(row["well"], fmt)
    except ValueError as error:
        raise InputError(
            where + ", column well", str(error) + ".", "correct the well name or the plate_format in the screen sheet."
        ) from None
    if well in seen:
        raise InputError(
            where + ", column well", f"well {well} is listed twice (also row {seen[well]}).", "keep one row per well."
        )
    seen[well] = line
    role = row["role"]
    if role not in ROLES:
        raise InputError(where + ", column role", f"unknown role {role!r}.", f"use one of {', '.join(ROLES)}.")
    condition = row["condition"]
    if condition.strip().lower() in ROLES:
        raise InputError(
            where + ", column condition",
            f"condition {condition!r} is the name of a role; the role column says what a well is for.",
            "name what is in the well (e.g. vehicle, DMSO, the compound) and keep the role in the role column.",
        )
    if role != "empty" and not condition:
        raise InputError(
            where + ", column condition",
            f"well {well} ({role}) has no condition.",
            "name the compound, perturbation or vehicle.",
        )
    dose: float = math.nan
    if row["dose"]:
        try:
            dose = float(row["dose"])
        except ValueError:
            raise InputError(
                where + ", column dose",
                f"dose {row['dose']!r} is not a number.",
                "write the dose as a number and its unit in dose_unit.",
            ) from None
        if not math.isfinite(dose) or dose < 0:
            raise InputError(
                where + ", column dose",
                f"dose {row['dose']!r} is not a finite non-negative number.",
                "correct the dose.",
            )
        if not row["dose_unit"]:
            raise InputError(
                where + ", column dose_unit",
                f"well {well} has a dose but no unit.",
                "add the unit (e.g. uM, nM, ug/mL).",
            )
    label = treatment_label(condition, None if math.isnan(dose) else dose, row["dose_unit"]) if role != "empty" else ""
    return {
        "well": well,
        "role": role,
        "condition": condition,
        "dose": dose,
        "dose_unit": row["dose_unit"],
        "treatment": label,
    }


def mixed_dose_units(layout: pd.DataFrame, path: str) -> list[InputError]:
    """A problem per condition dosed in more than one unit (its doses would not form one series)."""
    dosed = layout[layout["dose_unit"].fillna("") != ""]
    units = dosed.groupby("condition")["dose_unit"].unique()
    return [
        InputError(
            f"{path}, column dose_unit",
            f"condition {condition!r} is dosed in {' and '.join(sorted(found))}; its doses would be split into "
            "series that are not compared.",
            f"write every dose of {condition} in one unit.",
        )
        for condition, found in units.items()
        if len(found) > 1
    ]


def analysed_wells(layout: pd.DataFrame) -> list[str]:
    """Wells that get image analysis: every listed well except role empty, in row-major order."""
    return sorted(layout.loc[layout["role"] != "empty", "well"], key=parse_well)


def chunk_wells(wells: list[str], chunk_size: int) -> list[list[str]]:
    """Split a plate's wells into consecutive chunks of at most ``chunk_size`` wells."""
    return [wells[i : i + chunk_size] for i in range(0, len(wells), chunk_size)]
