"""Condition effects: a mixed-effects model per feature, random intercepts for batch and plate.

well value ~ treatment (reference: the negative control)
             + random intercept per batch (imaging day) + random intercept per plate within batch,
fitted by REML with statsmodels. Strictly positive features are modelled as natural logs, so an
effect reads as a ratio to the negative control.

Degrees of freedom for the t-interval follow the between-within rule: treatments vary within
plates, so their contrasts get the within-plate residual degrees of freedom
N_wells - N_plates - (N_treatments - 1).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from plateloom.columns import REFERENCE_ROLE
from plateloom.screen.model_wells import treatment_catalogue
from plateloom.screen.nested_fit import FITTERS, fit_nested, fixed_plate_fit
from plateloom.stats import bh_qvalues  # noqa: F401  (part of this module's interface)


def _codes(treatments: pd.Series) -> tuple[pd.Series, dict[str, str]]:
    """Formula-safe codes for treatment names; the reference sorts first (t0000)."""
    names = sorted(set(pd.unique(treatments)) - {REFERENCE_ROLE})
    mapping = {REFERENCE_ROLE: "t0000", **{name: f"t{i + 1:04d}" for i, name in enumerate(names)}}
    return treatments.map(mapping), mapping


def _join(*notes: str) -> str:
    return "; ".join(n for n in notes if n)


@dataclass
class _Outcome:
    """What the fit of one feature gave: coefficients and SEs by term name, variance components
    (batch, plate, residual), whether the mixed model converged, its method and the note."""

    params: pd.Series
    errors: pd.Series
    components: tuple[float, float, float]
    converged: bool
    method: str
    note: str


def _model_data(wells: pd.DataFrame, feature: str) -> tuple[pd.DataFrame, int]:
    """The wells with a finite value of ``feature`` (as y; negative controls as the reference
    treatment) and how many wells had none."""
    data = wells[["batch", "plate", "role", "treatment", "condition", "dose", "dose_unit", feature]].copy()
    data["treatment"] = np.where(data["role"] == REFERENCE_ROLE, REFERENCE_ROLE, data["treatment"])
    data["y"] = data[feature].to_numpy(float)
    finite = np.isfinite(data["y"])
    return data[finite], int((~finite).sum())


def _design_note(data: pd.DataFrame, n_not_finite: int) -> str:
    plates_per_batch = data.groupby("batch")["plate"].nunique()
    n_batches, n_plates = data["batch"].nunique(), data["plate"].nunique()
    single = plates_per_batch.index[plates_per_batch == 1]
    return _join(
        f"{n_not_finite} wells with a missing value left out" if n_not_finite else "",
        f"batch {', '.join(single)} has a single plate"
        if n_batches >= 2 and len(single) and n_plates > n_batches
        else "",
    )


def _fit_outcome(data: pd.DataFrame, mapping: dict[str, str], fitter: str, note: str) -> _Outcome:
    """The mixed model's outcome; OLS with plate fixed effects if it fails; nothing for a constant feature."""
    if np.nanstd(data["y"]) == 0:
        empty = pd.Series(dtype=float)
        return _Outcome(empty, empty, (np.nan,) * 3, False, "not fitted",
                        _join(note, "feature is constant across wells: not fitted"))  # fmt: skip
    try:
        fit = fit_nested(data, mapping, fitter)
    except RuntimeError as error:
        params, errors, residual = fixed_plate_fit(data)
        note = _join(note, f"mixed model failed ({error}); fallback used")
        return _Outcome(
            params, errors, (np.nan, np.nan, residual), False, "fallback: OLS with plate fixed effects", note
        )
    if data["batch"].nunique() < 2:
        note = _join(note, "one batch only: random intercept per plate")
    if fit.boundary:
        note = _join(note, "a variance component was estimated at zero (singular fit)")
    components = (fit.batch_variance, fit.plate_variance, fit.residual_variance)
    return _Outcome(fit.params, fit.std_errors, components, True, f"REML mixed model ({fit.method})", note)


def _treatment_counts(data: pd.DataFrame) -> pd.DataFrame:
    groups = data.groupby("code")
    return pd.DataFrame(
        {
            "n_wells": groups.size(),
            "n_plates": groups["plate"].nunique(),
            "n_batches": groups["batch"].nunique(),
            "first_batch": groups["batch"].first(),
        }
    )


def _row_note(count: pd.Series | None, n_batches: int, note: str) -> str:
    if count is None:
        return _join("all wells of this treatment were excluded or missing: no estimate", note)
    if count["n_batches"] == 1 and n_batches > 1:
        where = f"present in one batch only ({count['first_batch']}): estimated against that batch's controls"
        return _join(where, note)
    return note


def _estimate_columns(outcome: _Outcome, code: str | None, df: float, t_quantile: float) -> dict[str, float]:
    term = f"C(code)[T.{code}]"
    estimate = float(outcome.params.get(term, np.nan)) if code else np.nan
    error = float(outcome.errors.get(term, np.nan)) if code else np.nan
    t_value = estimate / error if error > 0 else np.nan
    return {
        "estimate": estimate,
        "std_error": error,
        "df": float(df),
        "ci_low": estimate - t_quantile * error,
        "ci_high": estimate + t_quantile * error,
        "t_value": t_value,
        "p_value": float(2 * stats.t.sf(abs(t_value), df)) if np.isfinite(t_value) else np.nan,
    }


def _component_columns(outcome: _Outcome) -> dict[str, object]:
    batch, plate, residual = outcome.components
    total = np.nansum(outcome.components)
    return {
        "batch_variance": batch,
        "plate_variance": plate,
        "residual_variance": residual,
        "icc_batch_plate": (batch + plate) / total if total > 0 else np.nan,
        "converged": outcome.converged,
        "method": outcome.method,
    }


def fit_feature_effects(
    wells: pd.DataFrame,
    feature: str,
    scale: str,
    ci_level: float,
    fitter: str = "statsmodels",
    treatments: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """Effects of every treatment on one feature against the pooled negative controls.

    ``wells`` holds the wells in the model with columns batch, plate, role, treatment, condition,
    dose, dose_unit and the feature already on its model scale (``scale`` is "log" for natural
    logs, else "linear"). ``treatments`` (treatment, condition, dose, dose_unit, role), if given,
    lists every treatment of the screen, so one whose wells were all excluded still gets a row
    saying so. Returns one row per non-reference treatment; the effect is in model-scale units
    (a natural-log ratio or a difference in the feature's unit).
    """
    if fitter not in FITTERS:
        raise ValueError(f"unknown fitter {fitter!r}; choose one of {', '.join(FITTERS)}")
    data, n_not_finite = _model_data(wells, feature)
    if data.empty:
        note = (
            f"no well has a value of {feature}: not fitted (collective readouts need tracks of at least "
            "collective.min_overlap_frames frames; see the README)"
        )
        return _unfitted_table(wells, treatments, feature, scale, note)
    if (data["treatment"] == REFERENCE_ROLE).sum() == 0:
        raise ValueError(
            f"feature {feature}: no negative-control wells are left in the model; "
            "check the layouts' role column and the exclusion ledger"
        )
    data["code"], mapping = _codes(data["treatment"])
    data["plate_code"] = pd.factorize(data["plate"], sort=True)[0]
    data["batch_code"] = pd.factorize(data["batch"], sort=True)[0]
    df = max(len(data) - data["plate"].nunique() - (len(mapping) - 1), 1)
    outcome = _fit_outcome(data, mapping, fitter, _design_note(data, n_not_finite))
    t_quantile = stats.t.ppf(0.5 + ci_level / 2, df)
    counts = _treatment_counts(data)
    rows = []
    for name, first in _treatment_catalogue(wells, treatments).iterrows():
        code = mapping.get(name)
        count = counts.loc[code] if code in counts.index else None
        keys = {"feature": feature, "treatment": name, **first[["condition", "dose", "dose_unit", "role"]].to_dict()}
        sizes = {k: int(count[k]) if count is not None else 0 for k in ("n_wells", "n_plates", "n_batches")}
        rows.append(
            keys
            | {"scale": scale}
            | _estimate_columns(outcome, code, df, t_quantile)
            | sizes
            | _component_columns(outcome)
            | {"note": _row_note(count, data["batch"].nunique(), outcome.note)}
        )
    return _with_ratios(pd.DataFrame(rows), scale)


def _with_ratios(table: pd.DataFrame, scale: str) -> pd.DataFrame:
    """Ratio columns (exp of estimate and interval) for log-scale features; NaN for linear ones."""
    if not table.empty:
        for column, source in (("ratio", "estimate"), ("ratio_ci_low", "ci_low"), ("ratio_ci_high", "ci_high")):
            table[column] = np.exp(table[source]) if scale == "log" else np.nan
    return table


def _unfitted_table(
    wells: pd.DataFrame, treatments: pd.DataFrame | None, feature: str, scale: str, note: str
) -> pd.DataFrame:
    """One row per treatment with no estimate and ``note`` saying why (same columns as a fitted table)."""
    catalogue = _treatment_catalogue(wells, treatments)
    nan = np.full(len(catalogue), np.nan)
    table = pd.DataFrame(
        {
            "feature": feature,
            "treatment": catalogue.index,
            "condition": catalogue["condition"].to_numpy(),
            "dose": catalogue["dose"].to_numpy(),
            "dose_unit": catalogue["dose_unit"].to_numpy(),
            "role": catalogue["role"].to_numpy(),
            "scale": scale,
            "estimate": nan,
            "std_error": nan,
            "df": nan,
            "ci_low": nan,
            "ci_high": nan,
            "t_value": nan,
            "p_value": nan,
            "n_wells": 0,
            "n_plates": 0,
            "n_batches": 0,
            "batch_variance": nan,
            "plate_variance": nan,
            "residual_variance": nan,
            "icc_batch_plate": nan,
            "converged": False,
            "method": "not fitted",
            "note": note,
        }
    )
    for column in ("ratio", "ratio_ci_low", "ratio_ci_high"):
        table[column] = nan
    return table


def _treatment_catalogue(wells: pd.DataFrame, treatments: pd.DataFrame | None) -> pd.DataFrame:
    """One row per non-reference treatment (index: treatment), from ``treatments`` or from the wells."""
    catalogue = treatment_catalogue(treatments if treatments is not None else wells)
    catalogue = catalogue[catalogue["role"] != REFERENCE_ROLE]
    return catalogue.set_index("treatment")[["condition", "dose", "dose_unit", "role"]].sort_index()


def add_hit_calls(table: pd.DataFrame, hit_q_value: float, hit_min_effect: float) -> pd.DataFrame:
    """BH q-values over all (feature, treatment) pairs with a p-value, and the hit call."""
    table = table.copy()
    table["q_value"] = bh_qvalues(table["p_value"].to_numpy())
    table["hit"] = (table["q_value"] < hit_q_value) & (table["estimate"].abs() >= hit_min_effect)
    return table


def screen_effects(
    model_wells: pd.DataFrame,
    features: list[str],
    scales: dict[str, str],
    ci_level: float,
    hit_q_value: float,
    hit_min_effect: float,
    fitter: str = "statsmodels",
    treatments: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """Effects of every treatment on every feature (model-scale values), BH q-values across all pairs, hit calls."""
    missing = [f for f in features if f not in model_wells.columns]
    if missing:
        raise ValueError(f"features {missing} are not columns of the well profiles; check screen.features in config")
    parts = [
        fit_feature_effects(model_wells, feature, scales[feature], ci_level, fitter, treatments) for feature in features
    ]
    table = pd.concat([p for p in parts if not p.empty], ignore_index=True)
    return add_hit_calls(table, hit_q_value, hit_min_effect)
