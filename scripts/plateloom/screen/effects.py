"""Condition effects: a mixed-effects model per feature, random intercepts for batch and plate.

well value ~ treatment (reference: the negative control)
             + random intercept per batch (imaging day) + random intercept per plate within batch,
fitted by REML (``plateloom.screen.nested_fit``). Features on the log scale are modelled as natural
logs, so an effect reads as a ratio to the negative control.

Each treatment's t-interval has its own Satterthwaite degrees of freedom: a treatment that shares
plates with negative controls gets about the within-plate residual df, one applied to whole plates
about the number of its plates (``plateloom.screen.denominator_df``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from plateloom.columns import REFERENCE_ROLE
from plateloom.screen.batch_correction import COUNT_FEATURE
from plateloom.screen.hits import HitRule, add_hit_calls
from plateloom.screen.model_wells import treatment_catalogue
from plateloom.screen.nested_fit import FITTERS, fit_nested, fixed_plate_fit, treatment_design


def treatment_codes(treatments: pd.Series) -> tuple[pd.Series, dict[str, str]]:
    """Formula-safe codes for treatment names; the reference sorts first (t0000)."""
    names = sorted(set(pd.unique(treatments)) - {REFERENCE_ROLE})
    mapping = {REFERENCE_ROLE: "t0000", **{name: f"t{i + 1:04d}" for i, name in enumerate(names)}}
    return treatments.map(mapping), mapping


def join_notes(*notes: str) -> str:
    return "; ".join(n for n in notes if n)


@dataclass
class _Outcome:
    """What the fit of one feature gave: coefficients, SEs and df by term name, how the df were
    found, variance components (batch, plate, residual), whether the mixed model converged, its
    method and the note."""

    params: pd.Series
    errors: pd.Series
    df: pd.Series
    df_method: str
    components: tuple[float, float, float]
    converged: bool
    method: str
    note: str


def model_data(wells: pd.DataFrame, feature: str) -> tuple[pd.DataFrame, int]:
    """The wells with a finite value of ``feature`` (as y; negative controls as the reference
    treatment) and how many wells had none. Wells kept for the cell count only are left out of
    every other feature without being counted as missing."""
    if "count_only" in wells.columns and feature != COUNT_FEATURE:
        wells = wells[~wells["count_only"].to_numpy(bool)]
    extra = [c for c in ("n_sites",) if c in wells.columns]
    data = wells[["batch", "plate", "role", "treatment", "condition", "dose", "dose_unit", *extra, feature]].copy()
    data["treatment"] = np.where(data["role"] == REFERENCE_ROLE, REFERENCE_ROLE, data["treatment"])
    data["y"] = data[feature].to_numpy(float)
    finite = np.isfinite(data["y"])
    return data[finite], int((~finite).sum())


def design_note(data: pd.DataFrame, n_not_finite: int) -> str:
    plates_per_batch = data.groupby("batch")["plate"].nunique()
    n_batches, n_plates = data["batch"].nunique(), data["plate"].nunique()
    single = plates_per_batch.index[plates_per_batch == 1]
    return join_notes(
        f"{n_not_finite} wells with a missing value left out" if n_not_finite else "",
        f"batch {', '.join(single)} has a single plate"
        if n_batches >= 2 and len(single) and n_plates > n_batches
        else "",
    )


COUNT_WEIGHT_ITERATIONS = 3


def count_weights(data: pd.DataFrame, mapping: dict[str, str], fitter: str) -> np.ndarray:
    """Precision weights for log cell counts: a log-linear model with overdispersion.

    A well's log count varies by s2 (biology, between wells) plus about 1 / mu from Poisson
    sampling of mu nuclei over its sites (delta method), so its weight relative to s2 is
    w = s2 / (s2 + 1 / mu). mu comes from the fitted treatment means (not the well's own count,
    which would tie the weight to the error), and s2 and the weights are iterated to agreement.
    """
    sites = data["n_sites"].to_numpy(float) if "n_sites" in data else np.ones(len(data))
    design, names = treatment_design(data["code"])
    weights = np.ones(len(data))
    for _ in range(COUNT_WEIGHT_ITERATIONS):
        fit = fit_nested(data, mapping, fitter, weights)
        expected = np.exp(design @ fit.params.reindex(names).to_numpy(float)) * sites
        biological = max(fit.residual_variance, 1e-12)
        weights = biological / (biological + 1.0 / np.maximum(expected, 0.5))
    return weights


def _fit_outcome(
    data: pd.DataFrame,
    mapping: dict[str, str],
    fitter: str,
    note: str,
    weights: np.ndarray | None = None,
    df_method: str = "satterthwaite",
) -> _Outcome:
    """The mixed model's outcome; OLS with plate fixed effects if it fails; nothing for a constant feature."""
    if np.nanstd(data["y"]) == 0:
        empty = pd.Series(dtype=float)
        return _Outcome(empty, empty, empty, "", (np.nan,) * 3, False, "not fitted",
                        join_notes(note, "feature is constant across wells: not fitted"))  # fmt: skip
    try:
        fit = fit_nested(data, mapping, fitter, weights, df_method)
    except RuntimeError as error:
        params, errors, residual, residual_df = fixed_plate_fit(data)
        note = join_notes(note, f"mixed model failed ({error}); fallback used")
        return _Outcome(
            params,
            errors,
            pd.Series(float(residual_df), index=params.index),
            "OLS residual",
            (np.nan, np.nan, residual),
            False,
            "fallback: OLS with plate fixed effects",
            note,
        )
    if data["batch"].nunique() < 2:
        note = join_notes(note, "one batch only: random intercept per plate")
    if fit.boundary:
        note = join_notes(note, "a variance component was estimated at zero (singular fit)")
    components = (fit.batch_variance, fit.plate_variance, fit.residual_variance)
    return _Outcome(
        fit.params,
        fit.std_errors,
        fit.df,
        DF_METHOD_NAMES[df_method],
        components,
        True,
        f"REML mixed model ({fit.method})",
        join_notes(note, fit.note),
    )


def treatment_counts(data: pd.DataFrame) -> pd.DataFrame:
    groups = data.groupby("code")
    return pd.DataFrame(
        {
            "n_wells": groups.size(),
            "n_plates": groups["plate"].nunique(),
            "n_batches": groups["batch"].nunique(),
            "first_batch": groups["batch"].first(),
        }
    )


def row_note(count: pd.Series | None, n_batches: int, note: str) -> str:
    if count is None:
        return join_notes("all wells of this treatment were excluded or missing: no estimate", note)
    if count["n_batches"] == 1 and n_batches > 1:
        where = f"present in one batch only ({count['first_batch']}): estimated against that batch's controls"
        return join_notes(where, note)
    return note


def _estimate_columns(outcome: _Outcome, code: str | None, ci_level: float) -> dict[str, object]:
    term = f"C(code)[T.{code}]"
    estimate = float(outcome.params.get(term, np.nan)) if code else np.nan
    error = float(outcome.errors.get(term, np.nan)) if code else np.nan
    df = float(outcome.df.get(term, np.nan)) if code else np.nan
    t_value = estimate / error if error > 0 else np.nan
    t_quantile = stats.t.ppf(0.5 + ci_level / 2, df) if np.isfinite(df) else np.nan
    return {
        "estimate": estimate,
        "std_error": error,
        "df": df,
        "df_method": outcome.df_method if np.isfinite(df) else "",
        "ci_low": estimate - t_quantile * error,
        "ci_high": estimate + t_quantile * error,
        "t_value": t_value,
        "p_value": float(2 * stats.t.sf(abs(t_value), df)) if np.isfinite(t_value) else np.nan,
    }


def pooled_control_sd(y: np.ndarray, controls: np.ndarray, plates: np.ndarray) -> float:
    """Pooled within-plate SD of response ``y`` over the rows marked ``controls`` (``plates``: plate
    codes 0, 1, ... per row); NaN if not estimable."""
    y, plates = np.asarray(y, float)[controls], np.asarray(plates)[controls]
    if len(y) == 0:
        return np.nan
    sizes = np.bincount(plates)
    means = np.bincount(plates, y) / np.maximum(sizes, 1)
    dof = len(y) - np.count_nonzero(sizes)
    return float(np.sqrt(np.sum((y - means[plates]) ** 2) / dof)) if dof > 0 else np.nan


def control_well_sd(data: pd.DataFrame) -> float:
    """Pooled within-plate SD of the negative-control wells (model-scale units), NaN if not estimable."""
    plates = pd.factorize(data["plate"], sort=True)[0]
    return pooled_control_sd(data["y"].to_numpy(float), (data["treatment"] == REFERENCE_ROLE).to_numpy(), plates)


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


DF_METHOD_NAMES = {"satterthwaite": "Satterthwaite", "kenward_roger": "Kenward-Roger"}


def _fit_feature(
    data: pd.DataFrame, mapping: dict[str, str], settings: tuple[str, str], note: str, feature: str, scale: str
) -> _Outcome:
    """The outcome of one feature's fit (``settings``: fitter, df method); the cell count on the
    log scale with Poisson precision weights."""
    fitter, df_method = settings
    if feature != COUNT_FEATURE or scale != "log":
        return _fit_outcome(data, mapping, fitter, note, None, df_method)
    try:
        weights = count_weights(data, mapping, fitter)
    except RuntimeError:
        return _fit_outcome(data, mapping, fitter, note, None, df_method)
    note = join_notes(note, "cell count: log-linear model with overdispersion (Poisson precision weights)")
    return _fit_outcome(data, mapping, fitter, note, weights, df_method)


def fit_feature_effects(
    wells: pd.DataFrame,
    feature: str,
    scale: str,
    ci_level: float,
    fitter: str = "exact",
    treatments: pd.DataFrame | None = None,
    scale_note: str = "",
    df_method: str = "satterthwaite",
) -> pd.DataFrame:
    """Effects of every treatment on one feature against the pooled negative controls.

    ``wells`` holds the wells in the model with columns batch, plate, role, treatment, condition,
    dose, dose_unit and the feature already on its model scale (``scale`` is "log" for natural
    logs, else "linear"). ``treatments`` (treatment, condition, dose, dose_unit, role), if given,
    lists every treatment of the screen, so one whose wells were all excluded still gets a row
    saying so; ``scale_note`` says how the feature's scale was decided. The cell count
    (``COUNT_FEATURE`` on the log scale) gets precision weights from ``count_weights``. Returns one
    row per non-reference treatment; the effect is in model-scale units (a natural-log ratio or a
    difference in the feature's unit), with its standardized size (effect / the negative-control
    well SD within plates). ``df_method``: "satterthwaite" or "kenward_roger" (adjusted SEs too).
    """
    _check_choices(fitter, df_method)
    data, n_not_finite = model_data(wells, feature)
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
    data["code"], mapping = treatment_codes(data["treatment"])
    data["plate_code"] = pd.factorize(data["plate"], sort=True)[0]
    data["batch_code"] = pd.factorize(data["batch"], sort=True)[0]
    note = join_notes(design_note(data, n_not_finite), scale_note)
    outcome = _fit_feature(data, mapping, (fitter, df_method), note, feature, scale)
    data.attrs.update(feature=feature, scale=scale)
    return with_ratios(_effect_rows(data, mapping, outcome, _treatment_catalogue(wells, treatments), ci_level), scale)


def _check_choices(fitter: str, df_method: str) -> None:
    if fitter not in FITTERS:
        raise ValueError(f"unknown fitter {fitter!r}; choose one of {', '.join(FITTERS)}")
    if df_method not in DF_METHOD_NAMES:
        raise ValueError(f"unknown df method {df_method!r}; choose one of {', '.join(DF_METHOD_NAMES)}")


def _effect_rows(
    data: pd.DataFrame, mapping: dict[str, str], outcome: _Outcome, catalogue: pd.DataFrame, ci_level: float
) -> pd.DataFrame:
    """One row per treatment of the catalogue: estimate, interval, sizes, components and note."""
    feature, scale = data.attrs["feature"], data.attrs["scale"]
    counts = treatment_counts(data)
    spread = control_well_sd(data)
    rows = []
    for name, first in catalogue.iterrows():
        code = mapping.get(name)
        count = counts.loc[code] if code in counts.index else None
        keys = {"feature": feature, "treatment": name, **first[["condition", "dose", "dose_unit", "role"]].to_dict()}
        sizes = {k: int(count[k]) if count is not None else 0 for k in ("n_wells", "n_plates", "n_batches")}
        rows.append(
            keys
            | {"scale": scale}
            | _estimate_columns(outcome, code, ci_level)
            | {"control_well_sd": spread}
            | sizes
            | _component_columns(outcome)
            | {"note": row_note(count, data["batch"].nunique(), outcome.note)}
        )
    return pd.DataFrame(rows)


def with_ratios(table: pd.DataFrame, scale: str) -> pd.DataFrame:
    """Ratio columns (exp of estimate and interval) for log-scale features; NaN for linear ones."""
    if not table.empty:
        for column, source in (("ratio", "estimate"), ("ratio_ci_low", "ci_low"), ("ratio_ci_high", "ci_high")):
            table[column] = np.exp(table[source]) if scale == "log" else np.nan
        with np.errstate(divide="ignore", invalid="ignore"):
            table["standardized_effect"] = table["estimate"] / table["control_well_sd"]
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
            "df_method": "",
            "ci_low": nan,
            "ci_high": nan,
            "t_value": nan,
            "p_value": nan,
            "control_well_sd": nan,
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
    for column in ("ratio", "ratio_ci_low", "ratio_ci_high", "standardized_effect"):
        table[column] = nan
    return table


def _treatment_catalogue(wells: pd.DataFrame, treatments: pd.DataFrame | None) -> pd.DataFrame:
    """One row per non-reference treatment (index: treatment), from ``treatments`` or from the wells."""
    catalogue = treatment_catalogue(treatments if treatments is not None else wells)
    catalogue = catalogue[catalogue["role"] != REFERENCE_ROLE]
    return catalogue.set_index("treatment")[["condition", "dose", "dose_unit", "role"]].sort_index()


def screen_effects(
    model_wells: pd.DataFrame,
    features: list[str],
    scales: dict[str, str],
    ci_level: float,
    hit_rule: HitRule,
    fitter: str = "exact",
    treatments: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """Effects of every treatment on every feature (model-scale values), BH q-values over the test
    treatments, hit calls."""
    missing = [f for f in features if f not in model_wells.columns]
    if missing:
        raise ValueError(f"features {missing} are not columns of the well profiles; check screen.features in config")
    parts = [
        fit_feature_effects(model_wells, feature, scales[feature], ci_level, fitter, treatments) for feature in features
    ]
    table = pd.concat([p for p in parts if not p.empty], ignore_index=True)
    return add_hit_calls(table, hit_rule)
