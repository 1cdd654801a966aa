"""GR metrics against hand-worked examples from the published definitions (Hafner, Niepel, Chung &
Sorger 2016, Nature Methods 13:521: GR(c) = 2^(log2(x(c)/x0) / log2(x_ctrl/x0)) - 1 and the GR
sigmoid GR_inf + (1 - GR_inf) / (1 + (c/GEC50)^h)); the worked numbers below are our own
arithmetic from those formulas, not values copied from the paper; and a fit on planted curves."""

import numpy as np
import pytest

from plateloom.screen.growth_inhibition import (
    fit_gr_curve,
    gr50,
    gr_aoc,
    gr_curve,
    gr_from_rates,
    gr_values,
    growth_mode,
)


def test_gr_values_from_counts_worked_by_hand():
    # Controls go from 100 to 400 cells (two doublings) over the assay window.
    # treated 400: GR 1 (no effect); 200: one doubling, 2^(1/2) - 1 = 0.41421; 100: no net growth,
    # 2^0 - 1 = 0; 50: half the cells lost, 2^(-1/2) - 1 = -0.29289; 25: 2^(-1) - 1 = -0.5.
    gr = gr_values(100, np.array([400, 200, 100, 50, 25]), 100, 400)
    np.testing.assert_allclose(gr, [1.0, 2**0.5 - 1, 0.0, 2**-0.5 - 1, -0.5], rtol=1e-12)
    # the same from growth rates: controls k0 = ln(4)/T, treated k = ln(2)/T
    assert gr_from_rates(np.log(2), np.log(4)) == pytest.approx(2**0.5 - 1)
    # a day on which the controls grow faster gives the same GR for the same relative slowing
    assert gr_values(100, 800, 100, 6400) == pytest.approx(gr_values(100, 200, 100, 400))
    assert np.isnan(gr_values(100, 200, 100, 100))  # controls that did not grow: undefined


def test_gr50_from_the_sigmoid_worked_by_hand():
    # GR_inf 0, GEC50 1, h 1: 0.5 = 1 / (1 + c) at c = 1.
    assert gr50(0.0, 1.0, 1.0) == pytest.approx(1.0)
    # GR_inf -0.2, GEC50 2, h 2: (c/2)^2 = 1.2 / 0.7 - 1 = 0.5/0.7, c = 2 sqrt(0.5/0.7) = 1.690309.
    assert gr50(-0.2, 2.0, 2.0) == pytest.approx(2 * np.sqrt(0.5 / 0.7))
    assert gr_curve(gr50(-0.2, 2.0, 2.0), -0.2, 2.0, 2.0) == pytest.approx(0.5)
    assert gr50(0.6, 1.0, 1.0) == np.inf  # a curve that never falls to 0.5


def test_gr_aoc_worked_by_hand():
    # doses 0.1, 1, 10 with GR 1, 0.5, 0: 1 - GR = 0, 0.5, 1 over log10 dose -1, 0, 1; trapezoids
    # 0.25 + 0.75 = 1.0 over a range of 2: AOC 0.5. No effect anywhere: 0; no net growth anywhere: 1.
    assert gr_aoc([0.1, 1, 10], [1.0, 0.5, 0.0]) == pytest.approx(0.5)
    assert gr_aoc([0.1, 1, 10], [1.0, 1.0, 1.0]) == 0.0
    assert gr_aoc([0.1, 1, 10, 10], [0.0, 0.0, 0.2, -0.2]) == pytest.approx(1.0)  # replicates averaged
    assert np.isnan(gr_aoc([1.0], [0.3]))


@pytest.mark.parametrize("planted", [(-0.3, 0.5, 1.5), (0.2, 3.0, 2.0), (0.7, 0.1, 1.0)])
def test_the_fit_recovers_planted_curves(planted):
    # planted truth: a sigmoid sampled at 8 doses, 3 replicates, noise SD 0.03
    rng = np.random.default_rng(11)
    doses = np.repeat(np.logspace(-2, 2, 8), 3)
    gr = gr_curve(doses, *planted) + rng.normal(0, 0.03, len(doses))
    fit = fit_gr_curve(doses, gr)
    assert fit.fitted
    assert fit.gr_inf == pytest.approx(planted[0], abs=0.08)
    assert np.log10(fit.gec50) == pytest.approx(np.log10(planted[1]), abs=0.25)
    assert fit.gr_max == pytest.approx(gr_curve(100.0, *planted), abs=0.06)
    expected = gr50(*planted)
    if np.isfinite(expected):
        assert np.log10(fit.gr50) == pytest.approx(np.log10(expected), abs=0.2)
    else:
        assert fit.gr50 == np.inf
    assert fit_gr_curve([1, 1, 10], [0.9, 0.8, 0.5]).fitted is False  # two doses only


def test_growth_modes_from_the_gr_interval():
    assert growth_mode(-0.4, -0.1) == "cytotoxic"
    assert growth_mode(-0.1, 0.3) == "cytostatic"  # slowed, loss of cells not shown
    assert growth_mode(0.2, 0.6) == "cytostatic"
    assert growth_mode(0.8, 1.1) == "no growth effect"
    with pytest.raises(ValueError):
        growth_mode(float("nan"), 0.2)
