"""Growth-rate inhibition (GR) metrics (Hafner, Niepel, Chung & Sorger 2016, Nature Methods 13:521).

A treatment's GR value compares its cells' growth rate with the negative controls' over the same
assay window, so that it does not depend on how fast the cells divide on that day:

    GR(c) = 2 ** (log2(x(c) / x0) / log2(x_ctrl / x0)) - 1 = 2 ** (k(c) / k(0)) - 1

with x0 the cell count at the start of the window (treatment), x(c) and x_ctrl the counts at its
end, k the growth rates (per time). GR = 1: no effect; 0 < GR < 1: slower growth; GR = 0: no net
growth (cytostatic); GR < 0: fewer cells than at the start (cytotoxic); GR = -1 at most.

A compound's GR values over its doses are fitted with the sigmoid

    GR(c) = GR_inf + (1 - GR_inf) / (1 + (c / GEC50) ** h_GR)

from which GR50 is the dose where the curve crosses 0.5 (infinite when GR_inf >= 0.5), GRmax
the fitted value at the highest dose tested and GR_AOC the area over the curve, the mean of
1 - GR over the tested range of log10 dose (trapezoids over the tested doses' observed values).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize

GR_BOUNDS = (-1.0, 1.0)  # GR_inf lies between full killing and no effect


def gr_values(count_start, count_end, control_start, control_end) -> np.ndarray:
    """GR from cell counts at the start and end of the assay window (treated and control; any
    shapes that broadcast). NaN where a count is not positive or the controls did not grow."""
    with np.errstate(divide="ignore", invalid="ignore"):
        treated = np.log2(np.asarray(count_end, float) / np.asarray(count_start, float))
        control = np.log2(np.asarray(control_end, float) / np.asarray(control_start, float))
        ratio = np.where(control > 0, treated / control, np.nan)
    return 2.0**ratio - 1.0


def gr_from_rates(rate, control_rate) -> np.ndarray:
    """GR from growth rates (per time, natural or base-2 alike): 2 ** (k / k_control) - 1; NaN where
    the controls did not grow."""
    rate, control_rate = np.asarray(rate, float), np.asarray(control_rate, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(control_rate > 0, 2.0 ** (rate / control_rate) - 1.0, np.nan)


def gr_curve(dose, gr_inf: float, gec50: float, hill: float) -> np.ndarray:
    """The GR sigmoid at ``dose`` (same unit as ``gec50``)."""
    dose = np.asarray(dose, float)
    return gr_inf + (1.0 - gr_inf) / (1.0 + (dose / gec50) ** hill)


def gr50(gr_inf: float, gec50: float, hill: float) -> float:
    """The dose where the sigmoid crosses GR = 0.5: GEC50 ((1 - GR_inf) / (0.5 - GR_inf) - 1) ** (1 / h);
    infinite when GR_inf >= 0.5 (the curve never gets there)."""
    if gr_inf >= 0.5:
        return float("inf")
    return float(gec50 * ((1.0 - gr_inf) / (0.5 - gr_inf) - 1.0) ** (1.0 / hill))


def gr_aoc(dose, gr) -> float:
    """Area over the GR curve: the mean of 1 - GR over the tested range of log10 dose, by
    trapezoids over the tested doses (their mean GR per dose); 0 for no effect, 1 for no net growth
    at every dose. NaN with fewer than two doses."""
    dose, gr = np.asarray(dose, float), np.asarray(gr, float)
    doses = np.unique(dose[np.isfinite(gr) & (dose > 0)])
    if len(doses) < 2:
        return float("nan")
    means = np.array([np.nanmean(gr[dose == d]) for d in doses])
    x = np.log10(doses)
    heights = 1.0 - means
    area = np.sum(np.diff(x) * (heights[1:] + heights[:-1]) / 2.0)  # trapezoids (numpy >= 1.24)
    return float(area / (x[-1] - x[0]))


@dataclass(frozen=True)
class GRFit:
    """A compound's GR curve: sigmoid parameters, GR50 (dose unit), GRmax (fitted GR at the highest
    dose), GR_AOC (observed), and whether the sigmoid was fitted (else too few doses)."""

    gr_inf: float
    gec50: float
    hill: float
    gr50: float
    gr_max: float
    gr_aoc: float
    fitted: bool


def fit_gr_curve(dose, gr) -> GRFit:
    """Least-squares fit of the GR sigmoid to GR values at positive doses (GR_inf in [-1, 1], GEC50
    within 100-fold of the tested range, h_GR in [0.1, 5]); needs 3 distinct doses."""
    dose, gr = np.asarray(dose, float), np.asarray(gr, float)
    keep = np.isfinite(gr) & (dose > 0)
    dose, gr = dose[keep], gr[keep]
    aoc = gr_aoc(dose, gr)
    if len(np.unique(dose)) < 3:
        return GRFit(np.nan, np.nan, np.nan, np.nan, np.nan, aoc, False)
    low, high = float(dose.min()), float(dose.max())

    def residuals(theta: np.ndarray) -> np.ndarray:
        return gr_curve(dose, theta[0], 10.0 ** theta[1], theta[2]) - gr

    start = np.array([float(np.clip(gr[dose == high].mean(), -0.99, 0.99)), np.log10(np.sqrt(low * high)), 1.0])
    bounds = ([GR_BOUNDS[0], np.log10(low) - 2.0, 0.1], [GR_BOUNDS[1], np.log10(high) + 2.0, 5.0])
    solution = optimize.least_squares(residuals, start, bounds=bounds)
    gr_inf, gec50, hill = float(solution.x[0]), float(10.0 ** solution.x[1]), float(solution.x[2])
    top = float(gr_curve(high, gr_inf, gec50, hill))
    return GRFit(gr_inf, gec50, hill, gr50(gr_inf, gec50, hill), top, aoc, bool(solution.success))


GROWTH_MODES = ("cytotoxic", "cytostatic", "no growth effect")


def growth_mode(gr_low: float, gr_high: float) -> str:
    """A condition's mode in GR terms from the confidence interval (gr_low, gr_high) of its GR value:
    "cytotoxic" when the interval lies below 0 (fewer cells than at the start), "no growth effect"
    when it reaches 1 (growth not told apart from the controls'), else "cytostatic" (growth slowed,
    cells not shown to be lost)."""
    if not gr_low <= gr_high:
        raise ValueError(f"GR interval ({gr_low}, {gr_high}): the low end is above the high end, or NaN")
    if gr_high < 0.0:
        return "cytotoxic"
    if gr_high >= 1.0:
        return "no growth effect"
    return "cytostatic"
