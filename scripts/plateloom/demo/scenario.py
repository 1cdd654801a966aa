"""The demo scenario: reading it, its plates and its planted truth (ratios to the negative control).

Light on purpose: the parse-time plan reads the scenario for the demo plates' sizes without
importing the image simulator.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import yaml

QUANTITIES = ("area", "reporter", "speed", "nuclear", "cell_count", "coupling", "spreading", "division", "death")
WITHOUT_NUISANCE = ("coupling", "spreading", "death")


DEMO_SIZES = ("quick", "full")


def load_scenario(path: str, frames: int | None = None, image_size_px: int | None = None, size: str = "full") -> dict:
    """Read the scenario YAML. ``size`` "quick" applies its ``quick`` section (fewer frames, smaller
    fields: the default demo run), "full" keeps its own numbers; ``frames`` and ``image_size_px``
    override either (small test runs)."""
    if size not in DEMO_SIZES:
        raise ValueError(f"demo.size: {size!r} is not one of {', '.join(DEMO_SIZES)}")
    with open(path, encoding="utf-8") as handle:
        scenario = yaml.safe_load(handle)
    quick = scenario.pop("quick", {}) or {}
    if size == "quick":
        scenario.update({key: quick[key] for key in ("frames", "image_size_px", "cells_per_site") if key in quick})
    if frames:
        scenario["frames"] = int(frames)
    if image_size_px:
        scenario["image_size_px"] = int(image_size_px)
    return scenario


def demo_plates(scenario: dict) -> dict[str, str]:
    """Plate id -> batch for every plate the scenario defines."""
    return {plate: entry["batch"] for entry in scenario["batches"] for plate in entry["plates"]}


def hill_ratio(dose: float, max_ratio: float, ec50: float, hill: float) -> float:
    """Ratio to control at ``dose`` (same unit as ``ec50``): 1 + (max - 1) d^h / (d^h + EC50^h)."""
    if not dose or dose <= 0:
        return 1.0
    fraction = dose**hill / (dose**hill + ec50**hill)
    return 1.0 + (max_ratio - 1.0) * fraction


def time_course_shape(course: dict, time_min: np.ndarray) -> np.ndarray:
    """Share (0..1) of a compound's full effect at each time (minutes since the first frame).

    delayed: none until onset_min, then a linear rise over rise_min; transient: (t / peak) exp(1 -
    t / peak), full at peak_min and wearing off after it; build_up: 1 - exp(-t / time_constant_min).
    """
    t = np.asarray(time_min, float)
    shape = course["shape"]
    if shape == "delayed":
        return np.clip((t - course["onset_min"]) / course["rise_min"], 0.0, 1.0)
    if shape == "transient":
        x = t / course["peak_min"]
        return x * np.exp(1.0 - x)
    if shape == "build_up":
        return 1.0 - np.exp(-t / course["time_constant_min"])
    raise ValueError(f"unknown time-course shape {shape!r}; use delayed, transient or build_up")


def _compound(scenario: dict, condition: str) -> dict | None:
    return next((c for c in scenario["compounds"] if c["name"] == condition), None)


def reporter_course(scenario: dict, condition: str, dose: float) -> np.ndarray | None:
    """Per frame, the planted reporter ratio of a compound with a time course (None for the others)."""
    compound = _compound(scenario, condition)
    if compound is None or "time_course" not in compound:
        return None
    full = hill_ratio(dose, compound["max_ratio"]["reporter"], compound["ec50_um"], compound["hill"])
    times = np.arange(scenario["frames"]) * scenario["frame_interval_min"]
    return 1.0 + (full - 1.0) * time_course_shape(compound["time_course"], times)


def death_course(scenario: dict, condition: str, dose: float) -> np.ndarray:
    """Per frame, the planted ratio of the base death hazard: the compound's death ratio from its
    ``death_onset_min`` (0 if not given) on, 1 before and for compounds without one."""
    compound = _compound(scenario, condition) or {}
    times = np.arange(scenario["frames"]) * scenario["frame_interval_min"]
    if "death" not in compound.get("max_ratio", {}):
        return np.ones(len(times))
    full = hill_ratio(dose, compound["max_ratio"]["death"], compound["ec50_um"], compound["hill"])
    return np.where(times >= compound.get("death_onset_min", 0.0), full, 1.0)


def planted_time_courses(scenario: dict, layout: pd.DataFrame) -> pd.DataFrame:
    """The planted truth of the compounds with a time course: one row per (treatment, frame) with the
    time (min since the first frame) and the reporter ratio to the negative control."""
    rows = []
    for _, well in layout[layout["role"] == "test"].drop_duplicates("treatment").iterrows():
        course = reporter_course(scenario, well["condition"], float(well["dose"]))
        if course is not None:
            times = np.arange(len(course)) * scenario["frame_interval_min"]
            keys = {"treatment": well["treatment"], "condition": well["condition"], "dose": well["dose"]}
            rows.append(pd.DataFrame({**keys, "time_min": times, "reporter_ratio": course}))
    return pd.concat(rows, ignore_index=True) if rows else pd.DataFrame()


def treatment_ratios(scenario: dict, condition: str, dose: float) -> dict[str, float]:
    """Planted ratio to the negative control for each quantity of one treatment (a compound with a
    time course: 1, its reporter ratio is per frame, ``reporter_course``)."""
    ratios = {q: 1.0 for q in QUANTITIES}
    for compound in scenario["compounds"]:
        if compound["name"] == condition and "time_course" not in compound:
            for quantity, max_ratio in compound["max_ratio"].items():
                ratios[quantity] = hill_ratio(dose, max_ratio, compound["ec50_um"], compound["hill"])
    return ratios


def expected_fate(scenario: dict, condition: str, dose: float) -> dict[str, float]:
    """The planted fate of a treatment in expectation, on the frame grid: cells N_f with
    N_{f+1} = N_f (1 + p_division - p_death(f)) (p per frame, the planted ratios applied, no
    nuisance and no spreading), giving the division and death rates per cell-hour (events over
    cell-hours) and the growth rate (1/h: slope of log N_f against time, as the well profiles
    compute it)."""
    cell, dt = scenario["cell"], scenario["frame_interval_min"]
    ratios = treatment_ratios(scenario, condition, dose)
    p_division = cell.get("division_rate_per_frame", 0.0) * ratios["division"]
    p_death = cell["death_rate_per_frame"] * death_course(scenario, condition, dose)
    counts = np.cumprod(np.r_[1.0, 1.0 + p_division - p_death[:-1]])
    hours = counts.sum() * dt / 60.0
    times_h = np.arange(len(counts)) * dt / 60.0
    return {
        "division_rate_per_cell_h": float(p_division * counts.sum() / hours),
        "death_rate_per_cell_h": float((p_death * counts).sum() / hours),
        "growth_rate_per_h": float(np.polyfit(times_h, np.log(counts), 1)[0]),
    }


def planted_fate(scenario: dict, layout: pd.DataFrame) -> pd.DataFrame:
    """The planted fate truth per non-control treatment: division and death rate ratios to the
    negative controls, the GR value (2 ** (k / k0) - 1 from the expected growth rates) and the mode
    of action it implies (cytotoxic below 0, no growth effect at 1 within 0.05, else cytostatic)."""
    control = expected_fate(scenario, "", 0.0)
    rows = []
    treated = layout[layout["role"].isin(["test", "positive_control"])].drop_duplicates("treatment")
    for _, well in treated.iterrows():
        mine = expected_fate(scenario, well["condition"], float(well["dose"]))
        gr = 2.0 ** (mine["growth_rate_per_h"] / control["growth_rate_per_h"]) - 1.0
        mode = "cytotoxic" if gr < 0 else "no growth effect" if gr > 0.95 else "cytostatic"
        rows.append(
            {"treatment": well["treatment"], "condition": well["condition"], "dose": well["dose"]}
            | {
                "division_ratio": mine["division_rate_per_cell_h"] / control["division_rate_per_cell_h"],
                "death_ratio": mine["death_rate_per_cell_h"] / control["death_rate_per_cell_h"],
                "gr": gr,
                "mode": mode,
            }
        )
    return pd.DataFrame(rows)


def feature_of_quantity(scenario: dict) -> dict[str, str]:
    """Which well feature (column name) carries each planted quantity."""
    reporter = scenario["channels"]["reporter"]
    return {"area": "area_um2", "reporter": f"mean_intensity_{reporter}", "speed": "speed_um_per_min"}


def planted_ratios(scenario: dict, layout: pd.DataFrame) -> pd.DataFrame:
    """The planted truth: one row per (treatment, feature) with the ratio to the negative control.

    Covers every non-control treatment of the layout and the three planted quantities
    (nuclear area, reporter mean intensity, track speed); a ratio of 1 means no effect.
    """
    features = feature_of_quantity(scenario)
    return pd.DataFrame(
        [
            keys | {"feature": feature, "ratio": ratios[quantity]}
            for keys, ratios in _treated(scenario, layout)
            for quantity, feature in features.items()
        ]
    )


def _treated(scenario: dict, layout: pd.DataFrame):
    """(treatment, condition, dose) and the planted ratios of every non-control treatment of ``layout``."""
    treated = layout[layout["role"].isin(["test", "positive_control"])].drop_duplicates("treatment")
    for _, well in treated.iterrows():
        if "time_course" in (_compound(scenario, well["condition"]) or {}):
            continue  # its truth changes over time: planted_time_courses
        keys = {"treatment": well["treatment"], "condition": well["condition"], "dose": well["dose"]}
        yield keys, treatment_ratios(scenario, well["condition"], float(well["dose"]))


COLLECTIVE_READOUTS = {
    "coupling": ("phase_order_{r}", "neighbour_correlation_{r}", "coupled_link_fraction_{r}"),
    "spreading": ("spreading_index",),
}


def planted_collective(scenario: dict, layout: pd.DataFrame) -> pd.DataFrame:
    """The planted truth of the collective quantities: one row per (treatment, quantity) with the ratio
    to the negative control of neighbour coupling (1 coupled as the controls, 0 decoupled) and of the
    chance that a death spreads, and the readouts (well features) that should move with it."""
    reporter = scenario["channels"]["reporter"]
    return pd.DataFrame(
        [
            keys
            | {"quantity": quantity, "ratio": ratios[quantity], "readouts": [r.format(r=reporter) for r in readouts]}
            for keys, ratios in _treated(scenario, layout)
            for quantity, readouts in COLLECTIVE_READOUTS.items()
        ]
    )
