"""Effects over time: the endpoint model fitted per time window, a simultaneous band over the
windows of each curve, and a kinetic summary per (feature, treatment).

Each window's well values (``results/time_courses``) go through the same mixed model as the
endpoint effects (``plateloom.screen.effects``: random intercepts for batch and plate, the same
scale per feature, the same df method), so a window's interval is as honest about days and plates
as the endpoint's. The pointwise intervals hold for one window at a time; the simultaneous band
widens each to a Bonferroni level over the curve's W windows (t quantile at
1 - (1 - level) / (2 W)), so that the whole curve lies inside its band with at least the stated
probability. The area under the effect curve is fitted, not summed: each well's area under its
own time course (sum of window value x window length, wells with every window) goes through the
same model, so its interval accounts for the correlation between windows of a well.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from plateloom.columns import KEY_COLUMNS
from plateloom.screen.batch_correction import COUNT_FEATURE
from plateloom.screen.effects import fit_feature_effects
from plateloom.screen.hits import FDR_FAMILY_ROLE, HitRule, add_hit_calls
from plateloom.screen.model_wells import count_only, in_model
from plateloom.screen.window_fits import aligned_windows, shared_window_effects
from plateloom.settings import FromSchema
from plateloom.stats import bh_qvalues

WINDOW_KEYS = ("window", "window_start_min", "window_end_min", "time_origin")
BAND_METHOD = "Bonferroni over the curve's windows"


@dataclass(frozen=True)
class KineticSettings(FromSchema):
    """Effects-over-time choices from config (section ``kinetics``)."""

    SECTION = "kinetics"

    enabled: bool
    window_min: float
    features: list[str] | None
    onset_windows: int
    max_control_drift: float


@dataclass(frozen=True)
class ModelChoices:
    """The endpoint model's choices, reused per window."""

    ci_level: float = 0.95
    fitter: str = "exact"
    df_method: str = "satterthwaite"
    hit_rule: HitRule = HitRule()


def kinetic_features(configured: list[str] | None, screen_features: list[str], columns: list[str]) -> list[str]:
    """The features modelled over time: those configured, or else the screen features that the
    time courses hold (measured per cell and frame, and the cell count). Raises for a configured
    feature the time courses lack."""
    if configured is None:
        return [f for f in screen_features if f in columns]
    missing = [f for f in configured if f not in columns]
    if missing:
        raise ValueError(
            f"kinetics.features {missing} have no value per time window (only features measured per cell and "
            "frame, and cell_count, do); remove them from kinetics.features"
        )
    return list(configured)


def model_time_courses(time_courses: pd.DataFrame, features: list[str], scales: dict[str, str]) -> pd.DataFrame:
    """The time-course rows of the wells in the screen model, features on their model scale (natural
    logs for log-scale features, values <= 0 left out; the cell count as log((count x sites +
    0.5) / sites), as for the endpoint). Wells kept for the cell count only are marked ``count_only``."""
    counted = count_only(time_courses) if COUNT_FEATURE in features else pd.Series(False, index=time_courses.index)
    rows = time_courses[in_model(time_courses) | counted].copy()
    rows["count_only"] = counted[rows.index].to_numpy(bool)
    sites = rows["n_sites"].to_numpy(float) if "n_sites" in rows else np.ones(len(rows))
    sites = np.where(sites > 0, sites, 1.0)
    for feature in features:
        values = rows[feature].to_numpy(float)
        with np.errstate(divide="ignore", invalid="ignore"):
            if feature == COUNT_FEATURE and scales.get(feature) == "log":
                values = np.log((np.maximum(values, 0.0) * sites + 0.5) / sites)
            elif scales.get(feature) == "log":
                values = np.where(values > 0, np.log(values), np.nan)
        rows[feature] = values
    keep = [c for c in KEY_COLUMNS if c in rows] + ["n_sites", "count_only", *WINDOW_KEYS]
    return rows[[c for c in keep if c in rows] + features].reset_index(drop=True)


def _window_effects(
    windows: list[tuple[int, pd.DataFrame]],
    feature: str,
    scale: str,
    choices: ModelChoices,
    treatments: pd.DataFrame | None,
    aligned: bool,
) -> pd.DataFrame:
    """The endpoint model fitted in each time window (``windows``: (window, its rows)) of one
    feature, one row per (treatment, window) (``plateloom.screen.window_fits`` where it applies:
    the same rows, with what windows share done once)."""
    settings = (choices.ci_level, choices.fitter, choices.df_method)
    tables = shared_window_effects([part for _, part in windows], feature, scale, settings, treatments, aligned)
    if tables is None:
        level, fitter, df_method = settings
        tables = [fit_feature_effects(p, feature, scale, level, fitter, treatments, "", df_method) for _, p in windows]
    parts = []
    for (window, part), table in zip(windows, tables):
        first = part.iloc[0]
        for position, key in enumerate(WINDOW_KEYS):
            table.insert(2 + position, key, window if key == "window" else first[key])
        parts.append(table)
    return pd.concat(parts, ignore_index=True)


def add_simultaneous_band(table: pd.DataFrame, ci_level: float) -> pd.DataFrame:
    """``band_low``/``band_high``: each window's interval widened to level 1 - (1 - ci_level) / W
    (Bonferroni over the W windows with an estimate of the same feature and treatment)."""
    table = table.copy()
    finite = np.isfinite(table["estimate"].to_numpy(float)) & np.isfinite(table["std_error"].to_numpy(float))
    windows = table.assign(_finite=finite).groupby(["feature", "treatment"])["_finite"].transform("sum")
    windows = np.maximum(windows.to_numpy(float), 1.0)
    with np.errstate(invalid="ignore"):
        quantile = stats.t.ppf(1 - (1 - ci_level) / (2 * windows), table["df"].to_numpy(float))
    table["band_low"] = table["estimate"] - quantile * table["std_error"]
    table["band_high"] = table["estimate"] + quantile * table["std_error"]
    table["band_windows"] = windows.astype(np.int64)
    table["band_method"] = np.where(finite, BAND_METHOD, "")
    return table


def effects_over_time(
    rows: pd.DataFrame,
    features: list[str],
    scales: dict[str, str],
    choices: ModelChoices,
    treatments: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """Effects of every treatment on every feature in every time window (``model_time_courses``
    rows), with the simultaneous band, and BH q-values over every (feature, test treatment,
    window) with the endpoint's hit rule. Effects are in model-scale units as for the endpoint."""
    windows = [(window, part) for window, part in rows.groupby("window", sort=True)]
    aligned = aligned_windows([part for _, part in windows])
    parts = [_window_effects(windows, f, scales[f], choices, treatments, aligned) for f in features]
    table = pd.concat(parts, ignore_index=True)
    return add_simultaneous_band(add_hit_calls(table, choices.hit_rule), choices.ci_level)


def well_areas(rows: pd.DataFrame, feature: str) -> pd.DataFrame:
    """Per well: the area under its time course of ``feature`` (sum over windows of value x window
    length, model-scale units x min); NaN for a well missing a window that other wells have."""
    window_length = (rows["window_end_min"] - rows["window_start_min"]).to_numpy(float)
    keys = [c for c in KEY_COLUMNS if c in rows] + ["n_sites", "count_only"]
    per_well = rows.assign(_area=rows[feature].to_numpy(float) * window_length).groupby("plate_well", sort=False)
    complete = per_well[feature].count() == rows["window"].nunique()
    area = per_well["_area"].sum().where(complete)
    first = rows.drop_duplicates("plate_well").set_index("plate_well")[keys]
    return first.assign(**{feature: area.reindex(first.index).to_numpy(float)}).reset_index(drop=True)


def area_effects(
    rows: pd.DataFrame, features: list[str], choices: ModelChoices, treatments: pd.DataFrame | None
) -> pd.DataFrame:
    """Per (feature, treatment): the effect on the area under the time course (model-scale units x
    min), from the endpoint model fitted on the wells' areas (``well_areas``)."""
    rows = rows.assign(plate_well=rows["plate"].astype(str) + "/" + rows["well"].astype(str))
    parts = []
    for feature in features:
        wells = well_areas(rows, feature)
        table = fit_feature_effects(
            wells, feature, "linear", choices.ci_level, choices.fitter, treatments, "", choices.df_method
        )
        parts.append(table[["feature", "treatment", "estimate", "ci_low", "ci_high", "p_value", "note"]])
    table = pd.concat(parts, ignore_index=True)
    return table.rename(
        columns={"estimate": "auc", "ci_low": "auc_ci_low", "ci_high": "auc_ci_high", "p_value": "auc_p_value",
                 "note": "auc_note"}
    )  # fmt: skip


def onset_window(significant: np.ndarray, run: int) -> int:
    """Index of the first window from which ``run`` consecutive windows (or all remaining, when
    fewer remain) are significant; -1 if none."""
    n = len(significant)
    for start in range(n):
        stop = min(start + run, n)
        if significant[start] and significant[start:stop].all():
            return start
    return -1


def half_maximum_time(midpoints: np.ndarray, estimates: np.ndarray, peak: int) -> float:
    """First time (min) the effect reaches half its peak with the peak's sign, linearly
    interpolated between window midpoints (the first midpoint when the first window is already
    there); NaN without a peak."""
    if peak < 0 or not np.isfinite(estimates[peak]) or estimates[peak] == 0:
        return float("nan")
    toward = np.nan_to_num(estimates * np.sign(estimates[peak]), nan=0.0)
    half = 0.5 * toward[peak]
    reached = int(np.flatnonzero(toward[: peak + 1] >= half)[0])
    if reached == 0:
        return float(midpoints[0])
    before, after = toward[reached - 1], toward[reached]
    share = (half - before) / (after - before) if after > before else 1.0
    return float(midpoints[reached - 1] + share * (midpoints[reached] - midpoints[reached - 1]))


def significant(table: pd.DataFrame, threshold: float) -> np.ndarray:
    """Which rows are significant windows: q-value at most ``threshold`` (test treatments); p-value
    at most it for controls, which are outside the FDR family."""
    outside = table["role"].to_numpy() != FDR_FAMILY_ROLE
    return (table["q_value"].to_numpy(float) <= threshold) | (outside & (table["p_value"].to_numpy(float) <= threshold))


def _curve_summary(curve: pd.DataFrame, q_threshold: float, run: int) -> dict[str, float]:
    curve = curve.sort_values("window")
    estimates = curve["estimate"].to_numpy(float)
    midpoints = ((curve["window_start_min"] + curve["window_end_min"]) / 2).to_numpy(float)
    is_significant = significant(curve, q_threshold)
    finite = np.isfinite(estimates)
    peak = int(np.nanargmax(np.abs(np.where(finite, estimates, np.nan)))) if finite.any() else -1
    onset = onset_window(is_significant, run)
    pick = (lambda column: float(curve[column].iloc[peak])) if peak >= 0 else (lambda column: float("nan"))
    return {
        "n_windows": int(finite.sum()),
        "significant_windows": int(is_significant.sum()),
        "onset_min": float(curve["window_start_min"].iloc[onset]) if onset >= 0 else np.nan,
        "half_max_time_min": half_maximum_time(midpoints, estimates, peak),
        "peak_effect": pick("estimate"),
        "peak_ci_low": pick("ci_low"),
        "peak_ci_high": pick("ci_high"),
        "peak_time_min": float(midpoints[peak]) if peak >= 0 else np.nan,
    }


def kinetic_summary(effects: pd.DataFrame, areas: pd.DataFrame, q_threshold: float, onset_windows: int) -> pd.DataFrame:
    """Per (feature, treatment) curve: onset (``onset_window`` on windows with q at most
    ``q_threshold``; for controls, outside the FDR family, p at most it), time to half of the peak,
    peak effect with its pointwise interval and time (window midpoint), the fitted area under the
    effect curve with its interval, and BH q-values of the area over every (feature, test
    treatment)."""
    keys = ["feature", "treatment", "condition", "dose", "dose_unit", "role", "scale", "time_origin"]
    rows = [
        dict(zip(keys, key)) | _curve_summary(curve, q_threshold, onset_windows)
        for key, curve in effects.groupby(keys, sort=True, dropna=False)
    ]
    table = pd.DataFrame(rows).merge(areas, on=["feature", "treatment"], how="left")
    family = (table["role"] == FDR_FAMILY_ROLE).to_numpy() & np.isfinite(table["auc_p_value"].to_numpy(float))
    table["auc_q_value"] = np.nan
    table.loc[family, "auc_q_value"] = bh_qvalues(table.loc[family, "auc_p_value"].to_numpy(float))
    return table
