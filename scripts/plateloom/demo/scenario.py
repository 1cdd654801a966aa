"""The demo scenario: reading it, its plates and its planted truth (ratios to the negative control).

Light on purpose: the parse-time plan reads the scenario for the demo plates' sizes without
importing the image simulator.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import yaml

QUANTITIES = ("area", "reporter", "speed", "nuclear", "cell_count", "coupling", "spreading")
WITHOUT_NUISANCE = ("coupling", "spreading")


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
