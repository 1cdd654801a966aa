"""Day-to-day (batch) correction of well values before pooling, and its diagnostics.

Values are corrected on the model scale (natural log for strictly positive features), per feature:

- ``none``: unchanged.
- ``control_location``: each batch is shifted so that its negative-control median equals the
  median of all negative controls.
- ``control_location_scale``: as above, and each batch is scaled so that its negative-control
  MAD equals the pooled within-batch negative-control MAD.
- ``combat``: empirical-Bayes location/scale adjustment across features (Johnson, Li &
  Rabinovic 2007, Biostatistics 8:118), parametric priors, with the treatment design protected
  (treatments are covariates of the standardisation, so their differences are kept).

Shifting a whole batch by a constant changes none of the within-plate contrasts the effects model
uses; the corrections matter for pooled views (dose-response, principal components) and, for the
scale-adjusting methods, for the weight of each batch.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pandas as pd

COUNT_FEATURE = "cell_count"  # nuclei per site and frame; modelled as a count (see plateloom.screen.effects)
MAX_NON_POSITIVE_SHARE = 0.01  # a declared log feature keeps its scale up to this share of values <= 0


def model_scale(
    wells: pd.DataFrame, features: list[str], log_features: set[str]
) -> tuple[pd.DataFrame, dict[str, str], dict[str, str]]:
    """Features on the scale they are modelled on, as declared by ``log_features``: natural log, or
    linear. Returns the values (same index as ``wells``), the scale per feature and a note per
    feature whose scale or values needed a decision.

    The declared scale is kept unless more than ``MAX_NON_POSITIVE_SHARE`` of a log feature's
    finite values are <= 0: then the feature is modelled on the linear scale and the note says
    why. Up to that share, those wells are left out of that feature's model, with a note. The
    cell count is a count: log((count x sites + 0.5) / sites), so an empty well stays in the model.
    """
    values = pd.DataFrame(index=wells.index)
    scales: dict[str, str] = {}
    notes: dict[str, str] = {}
    for feature in features:
        column = wells[feature].to_numpy(float)
        finite = np.isfinite(column)
        non_positive = int(np.sum(column[finite] <= 0))
        use_log = feature in log_features
        if use_log and feature == COUNT_FEATURE:
            sites = wells["n_sites"].to_numpy(float) if "n_sites" in wells else np.ones(len(wells))
            sites = np.where(sites > 0, sites, 1.0)
            values[feature] = np.log((np.maximum(column, 0.0) * sites + 0.5) / sites)
            scales[feature] = "log"
            if non_positive:
                notes[feature] = f"{non_positive} wells without cells kept as counts of 0 (log of count + 0.5)"
            continue
        if use_log and non_positive > MAX_NON_POSITIVE_SHARE * max(int(finite.sum()), 1):
            use_log = False
            notes[feature] = (
                f"declared log scale, but {non_positive} of {int(finite.sum())} wells are <= 0: modelled on the "
                "linear scale (effects are differences)"
            )
        elif use_log and non_positive:
            notes[feature] = f"{non_positive} wells with a value <= 0 left out of this log-scale feature"
        with np.errstate(divide="ignore", invalid="ignore"):
            values[feature] = np.where(column > 0, np.log(column), np.nan) if use_log else column
        scales[feature] = "log" if use_log else "linear"
    return values, scales, notes


def batches_without_controls(batch: np.ndarray, is_control: np.ndarray) -> list[str]:
    """Batches with no negative-control well (in the rows given)."""
    batch, is_control = np.asarray(batch), np.asarray(is_control, bool)
    return sorted(str(b) for b in np.unique(batch) if not np.any(is_control[batch == b]))


def align_to_controls(values: pd.DataFrame, batch: np.ndarray, is_control: np.ndarray, scale: bool) -> pd.DataFrame:
    """Shift (and, with ``scale``, rescale) each batch so its negative controls match the pooled controls.

    A batch without negative controls cannot be aligned and is left as it is
    (``batches_without_controls`` names it, for the report).
    """
    corrected = values.copy()
    batch = np.asarray(batch)
    is_control = np.asarray(is_control, bool)
    controls = values[is_control]
    pooled_centre = controls.median()
    # The target spread is the within-batch spread of the controls: pooled deviations from their own batch median.
    batch_centred = controls - controls.groupby(batch[is_control]).transform("median")
    pooled_spread = batch_centred.abs().median()
    for name in np.unique(batch):
        rows = batch == name
        batch_controls = values[rows & is_control]
        if batch_controls.empty:
            continue
        centre = batch_controls.median()
        factor = 1.0
        if scale:
            spread = (batch_controls - centre).abs().median()
            factor = (pooled_spread / spread).where(spread > 0, 1.0)
        corrected.loc[rows] = (values[rows] - centre) * factor + pooled_centre
    return corrected


def combat(
    values: np.ndarray,
    batch: np.ndarray,
    covariates: np.ndarray | None = None,
    mean_only: bool = False,
    ddof: int = 1,
    tolerance: float = 1e-4,
) -> np.ndarray:
    """Parametric empirical-Bayes ComBat (Johnson et al. 2007) of ``values`` (wells x features).

    ``covariates`` (wells x k, no intercept) is the protected design, e.g. treatment indicators.
    ``ddof=1`` uses sample variances as in the authors' R implementation (recalled from memory);
    ``ddof=0`` uses population variances. Features must have no missing values.
    """
    data = np.asarray(values, float).T  # features x wells, as in the paper
    batch_index = np.unique(np.asarray(batch), return_inverse=True)[1].ravel()
    n_batches = int(batch_index.max()) + 1
    batch_design = (batch_index[:, None] == np.arange(n_batches)[None, :]).astype(float)  # wells x batches
    design = batch_design if covariates is None else np.column_stack([batch_design, covariates])
    n_wells = data.shape[1]
    coefficients = np.linalg.solve(design.T @ design, design.T @ data.T)  # (b + k) x features
    batch_sizes = batch_design.sum(axis=0)
    grand_mean = (batch_sizes / n_wells) @ coefficients[:n_batches]
    pooled_variance = ((data - (design @ coefficients).T) ** 2).mean(axis=1)
    covariate_part = design.copy()
    covariate_part[:, :n_batches] = 0.0
    standard_mean = grand_mean[:, None] + (covariate_part @ coefficients).T
    standardised = (data - standard_mean) / np.sqrt(pooled_variance)[:, None]

    gamma_hat = np.linalg.solve(batch_design.T @ batch_design, batch_design.T @ standardised.T)  # batches x features
    gamma_star = np.empty_like(gamma_hat)
    delta_star = np.ones_like(gamma_hat)
    for k in range(n_batches):
        in_batch = standardised[:, batch_index == k]
        g_hat = gamma_hat[k]
        g_bar, t2 = g_hat.mean(), g_hat.var(ddof=ddof)
        if mean_only:
            # As in the authors' code (recalled from memory): the location posterior uses n = 1, delta = 1.
            gamma_star[k] = (t2 * g_hat + g_bar) / (t2 + 1.0)
            continue
        d_hat = in_batch.var(axis=1, ddof=ddof)
        m, s2 = d_hat.mean(), d_hat.var(ddof=ddof)
        a_prior, b_prior = (2 * s2 + m * m) / s2, (m * s2 + m**3) / s2
        prior = (g_bar, t2, a_prior, b_prior)
        gamma_star[k], delta_star[k] = _posterior(in_batch, g_hat, d_hat, prior, tolerance)
    adjusted = standardised.copy()
    for k in range(n_batches):
        columns = batch_index == k
        adjusted[:, columns] = (standardised[:, columns] - gamma_star[k][:, None]) / np.sqrt(delta_star[k])[:, None]
    return (adjusted * np.sqrt(pooled_variance)[:, None] + standard_mean).T


def _posterior(
    data: np.ndarray,
    g_hat: np.ndarray,
    d_hat: np.ndarray,
    prior: tuple[float, float, float, float],
    tolerance: float,
    max_iterations: int = 10_000,
) -> tuple[np.ndarray, np.ndarray]:
    """Iterated conditional posterior means of the batch location (gamma) and scale (delta);
    ``prior`` is (location mean, location variance, inverse-gamma a, b)."""
    g_bar, t2, a, b = prior
    n = data.shape[1]
    g_old, d_old = g_hat.copy(), d_hat.copy()
    for _ in range(max_iterations):
        g_new = (t2 * n * g_hat + d_old * g_bar) / (t2 * n + d_old)
        sum2 = ((data - g_new[:, None]) ** 2).sum(axis=1)
        d_new = (0.5 * sum2 + b) / (0.5 * n + a - 1.0)
        change = max(np.max(np.abs(g_new - g_old) / np.abs(g_old)), np.max(np.abs(d_new - d_old) / d_old))
        g_old, d_old = g_new, d_new
        if change <= tolerance:
            break
    return g_old, d_old


def _uncorrected(
    values: pd.DataFrame, batch: np.ndarray, is_control: np.ndarray, treatment: np.ndarray
) -> pd.DataFrame:
    return values.copy()


def _control_location(values: pd.DataFrame, batch: np.ndarray, is_control: np.ndarray, treatment: np.ndarray):
    return align_to_controls(values, batch, is_control, scale=False)


def _control_location_scale(values: pd.DataFrame, batch: np.ndarray, is_control: np.ndarray, treatment: np.ndarray):
    return align_to_controls(values, batch, is_control, scale=True)


def _combat(values: pd.DataFrame, batch: np.ndarray, is_control: np.ndarray, treatment: np.ndarray) -> pd.DataFrame:
    """ComBat on the complete rows, with the treatments as covariates; other rows are left as they are."""
    corrected = values.copy()
    complete = values.notna().all(axis=1).to_numpy()
    usable = [c for c in values.columns if values.loc[complete, c].std() > 0]
    if len(usable) < 2:
        raise ValueError(
            "batch_correction combat pools batch effects across features and needs at least 2 features "
            f"with spread (found {len(usable)}); use control_location instead"
        )
    codes = pd.factorize(np.asarray(treatment)[complete], sort=True)[0]
    covariates = (codes[:, None] == np.arange(1, codes.max() + 1)[None, :]).astype(float) if codes.max() > 0 else None
    corrected.loc[complete, usable] = combat(
        values.loc[complete, usable].to_numpy(), np.asarray(batch)[complete], covariates
    )
    return corrected


# The batch corrections (config screen.batch_correction), each (values, batch, is_control, treatment) -> values.
BATCH_CORRECTIONS: dict[str, Callable[[pd.DataFrame, np.ndarray, np.ndarray, np.ndarray], pd.DataFrame]] = {
    "none": _uncorrected,
    "control_location": _control_location,
    "control_location_scale": _control_location_scale,
    "combat": _combat,
}


def correct_batches(
    values: pd.DataFrame, batch: np.ndarray, is_control: np.ndarray, treatment: np.ndarray, method: str
) -> pd.DataFrame:
    """Batch-corrected model-scale values by ``method`` (a key of ``BATCH_CORRECTIONS``); a single
    batch is left as it is."""
    if method not in BATCH_CORRECTIONS:
        raise ValueError(f"unknown batch correction {method!r}; choose one of {', '.join(BATCH_CORRECTIONS)}")
    if len(np.unique(batch)) < 2:
        return values.copy()
    return BATCH_CORRECTIONS[method](values, batch, is_control, treatment)


def variance_shares(values: pd.DataFrame, batch: np.ndarray, plate: np.ndarray, treatment: np.ndarray) -> pd.DataFrame:
    """Share of the treatment-adjusted variance explained by batch, by plate within batch, and residual, per feature.

    Sequential sums of squares on residuals from treatment means: batch means of the residuals,
    then plate means around their batch mean, then what is left. Shares sum to 1.
    """
    rows = []
    frame = pd.DataFrame({"batch": np.asarray(batch), "plate": np.asarray(plate), "treatment": np.asarray(treatment)})
    for feature in values.columns:
        y = values[feature].to_numpy(float)
        ok = np.isfinite(y)
        part = frame[ok].assign(y=y[ok])
        residual = part["y"] - part.groupby("treatment")["y"].transform("mean")
        batch_mean = residual.groupby(part["batch"]).transform("mean")
        plate_mean = residual.groupby([part["batch"], part["plate"]]).transform("mean")
        total = float((residual**2).sum())
        shares = (
            np.array(
                [
                    ((batch_mean - residual.mean()) ** 2).sum(),
                    ((plate_mean - batch_mean) ** 2).sum(),
                    ((residual - plate_mean) ** 2).sum(),
                ]
            )
            / total
            if total > 0
            else np.full(3, np.nan)
        )
        rows.append(
            {"feature": feature, "batch_share": shares[0], "plate_share": shares[1], "residual_share": shares[2]}
        )
    return pd.DataFrame(rows)


def principal_components(values: pd.DataFrame, n_components: int = 2) -> tuple[np.ndarray, np.ndarray]:
    """Scores (wells x n_components) and explained variance fractions of standardised, complete features (SVD)."""
    complete = values.dropna(axis=1, how="any")
    spread = complete.std(ddof=1)
    usable = complete.loc[:, spread > 0]
    if usable.shape[1] == 0:
        return np.full((len(values), n_components), np.nan), np.full(n_components, np.nan)
    z = ((usable - usable.mean()) / usable.std(ddof=1)).to_numpy()
    u, s, vt = np.linalg.svd(z, full_matrices=False)
    signs = np.sign(vt[np.arange(len(s)), np.abs(vt).argmax(axis=1)])  # deterministic orientation
    scores = u * s * signs
    explained = s**2 / np.sum(s**2)
    k = min(n_components, len(s))
    padded = np.full((len(values), n_components), np.nan)
    padded[:, :k] = scores[:, :k]
    fractions = np.full(n_components, np.nan)
    fractions[:k] = explained[:k]
    return padded, fractions
