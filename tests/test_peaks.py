"""Peak width, resolution and co-elution risk against equations and seeded Monte-Carlo.

Sources named beside each value:
- retention-physics.md section 6: sigma_t = t0 (1 + k_e) / sqrt(N), Rs = dt / (2 (s1 + s2)),
  Rs >= 1.5 baseline separation (common practice).
- Poppe, Paanakker and Bronckhorst, J. Chromatogr. 204 (1981) 77: gradient compression.
- The normal distribution: Monte-Carlo estimates with a seeded numpy generator.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from retpred.peaks import (
    gradient_compression_factor,
    neighbour_pairs,
    peak_sigma_min,
    resolution,
    simulate_chromatogram,
    time_error_sd_min,
    unresolved_probability,
)


def test_peak_sigma_isocratic_limit():
    # isocratic: sigma = tR / sqrt(N); t0 = 1 min, k = 4, N = 10,000 -> 5 / 100 = 0.05 min
    assert float(peak_sigma_min(1.0, 4.0, 10_000)) == pytest.approx(0.05, rel=1e-12)
    s = peak_sigma_min(np.array([1.0, 2.0]), np.array([4.0, 4.0]), 10_000, compression=0.8)
    np.testing.assert_allclose(s, [0.04, 0.08], rtol=1e-12)


def test_resolution_textbook_example():
    # two peaks 0.2 min apart, sigma 0.025 min each -> Rs = 0.2 / (2 * 0.05) = 2.0
    assert float(resolution(5.0, 5.2, 0.025, 0.025)) == pytest.approx(2.0, rel=1e-12)
    # same as the base-width form Rs = 2 (t2 - t1) / (w1 + w2), w = 4 sigma (textbook)
    w = 4 * 0.025
    assert float(resolution(5.0, 5.2, 0.025, 0.025)) == pytest.approx(2 * 0.2 / (2 * w))


def test_simulated_valley_at_baseline_resolution():
    # Two equal Gaussians at Rs = 1.5 are 6 sigma apart; the trace midway is
    # 2 exp(-(3 sigma)^2 / (2 sigma^2)) = 2 exp(-4.5) = 0.022 of the height (Gaussian algebra)
    sigma = 0.05
    t1, t2 = 5.0, 5.0 + 6 * sigma
    assert float(resolution(t1, t2, sigma, sigma)) == pytest.approx(1.5)
    mid = simulate_chromatogram([t1, t2], [sigma, sigma], [1.0, 1.0], np.array([5.15]))
    assert float(mid[0]) == pytest.approx(2 * math.exp(-4.5), rel=1e-9)
    # peak area h sigma sqrt(2 pi) by numerical integration; NaN rows are left out
    t = np.linspace(0, 10, 200_001)
    y = simulate_chromatogram([3.0, np.nan], [0.1, 0.1], [2.0, 5.0], t)
    assert np.trapezoid(y, t) == pytest.approx(2.0 * 0.1 * math.sqrt(2 * math.pi), rel=1e-6)


def test_gradient_compression_factor():
    # G = 1 without a gradient, -> 1 / sqrt(3) for very steep gradients (Poppe 1981)
    assert float(gradient_compression_factor(0.0)) == pytest.approx(1.0)
    assert float(gradient_compression_factor(1e6)) == pytest.approx(1 / math.sqrt(3), rel=1e-4)
    # p = 1: G^2 = (1 + 1 + 1/3) / 4 (hand arithmetic)
    assert float(gradient_compression_factor(1 / 2.3)) == pytest.approx(
        math.sqrt((7 / 3) / 4), rel=1e-12
    )
    # finite k0: p = 2.3 b k0 / (1 + k0); k0 = 1 halves p
    assert float(gradient_compression_factor(2 / 2.3, k0=1.0)) == pytest.approx(
        math.sqrt((7 / 3) / 4), rel=1e-12
    )
    g = gradient_compression_factor(np.linspace(0, 5, 50))
    assert np.all(np.diff(g) < 0)


@pytest.mark.parametrize(
    ("delta", "s1", "s2", "sd"),
    [
        (0.10, 0.02, 0.03, 0.05),
        (0.30, 0.02, 0.02, 0.10),
        (-0.05, 0.01, 0.02, 0.08),
        (0.6, 0.05, 0.05, 0.2),
    ],
)
def test_unresolved_probability_matches_monte_carlo(delta, s1, s2, sd):
    rng = np.random.default_rng(20240601)
    true_dt = rng.normal(delta, sd, size=400_000)
    rs_true = np.abs(true_dt) / (2 * (s1 + s2))
    mc = np.mean(rs_true < 1.5)
    p = float(unresolved_probability(delta, s1, s2, sd))
    assert p == pytest.approx(mc, abs=4 * math.sqrt(mc * (1 - mc) / true_dt.size) + 1e-4)


def test_unresolved_probability_limits():
    s1 = s2 = 0.02
    w = 2 * 1.5 * (s1 + s2)
    # spacing exactly at the threshold width with a small error: about one half
    assert float(unresolved_probability(w, s1, s2, 0.01)) == pytest.approx(0.5, abs=1e-6)
    # degenerate sd = 0: an indicator
    np.testing.assert_array_equal(
        unresolved_probability(np.array([0.5 * w, 1.5 * w, -0.5 * w]), s1, s2, 0.0), [1.0, 0.0, 1.0]
    )
    # symmetric in the sign of the spacing
    assert float(unresolved_probability(0.05, s1, s2, 0.07)) == pytest.approx(
        float(unresolved_probability(-0.05, s1, s2, 0.07))
    )


def test_neighbour_pairs_with_nan_rows():
    names = ["a", "b", "failed", "c", "d"]
    rt = np.array([5.0, 2.0, np.nan, 5.1, 9.0])
    sigma = np.array([0.05, 0.04, 0.05, 0.05, 0.06])
    table = neighbour_pairs(rt, sigma, names, rt_sd_min=0.0)
    np.testing.assert_array_equal(table.order, [1, 0, 3, 4])
    # Rs by hand: b->a (5.0 - 2.0) / (2 * 0.09) = 16.7; a->c 0.1 / 0.2 = 0.5; c->d 3.9 / 0.22
    np.testing.assert_allclose(
        table.resolution_next[[1, 0, 3]], [3.0 / 0.18, 0.1 / 0.2, 3.9 / 0.22], rtol=1e-12
    )
    assert np.isnan(table.resolution_next[4])  # last eluting
    assert np.isnan(table.resolution_next[2]) and np.isnan(table.coelution_risk[2])
    assert table.coelutes_with == ["c", "", "", "a", ""]
    # zero error sd: risk is the indicator of Rs < 1.5
    np.testing.assert_array_equal(table.coelution_risk[[1, 0, 3, 4]], [0.0, 1.0, 1.0, 0.0])


def test_neighbour_pairs_correlated_errors_monte_carlo():
    # pair spacing sd = sqrt(s1^2 + s2^2 - 2 rho s1 s2); check against correlated draws
    rt = np.array([4.0, 4.25])
    sigma = np.array([0.03, 0.03])
    sd = np.array([0.15, 0.10])
    rho = 0.6
    table = neighbour_pairs(rt, sigma, ["x", "y"], sd, rho=rho)
    rng = np.random.default_rng(7)
    cov = [[sd[0] ** 2, rho * sd[0] * sd[1]], [rho * sd[0] * sd[1], sd[1] ** 2]]
    err = rng.multivariate_normal([0, 0], cov, size=400_000)
    true_dt = (rt[1] + err[:, 1]) - (rt[0] + err[:, 0])
    mc = np.mean(np.abs(true_dt) < 2 * 1.5 * sigma.sum())
    assert table.coelution_risk[0] == pytest.approx(mc, abs=0.004)
    assert table.coelution_risk[1] == table.coelution_risk[0]
    # Rs = 0.25 / 0.12 = 2.08 >= 1.5, so a name is listed only if the risk reaches 0.5
    assert (table.coelutes_with[0] == "y") == (table.coelution_risk[0] >= 0.5)
    # with perfectly correlated equal errors the spacing is certain
    exact = neighbour_pairs(rt, sigma, ["x", "y"], 0.1, rho=1.0)
    assert exact.coelution_risk[0] == 0.0


def test_time_error_sd_from_a_90_percent_interval():
    """A central 90 % interval of a normal error spans +/- z sd with z = Phi^-1(0.95)
    (scipy.stats.norm as the reference). An open upper end (not eluted within the run) uses
    the lower half-width."""
    from scipy.stats import norm

    z = norm.ppf(0.95)
    sd = time_error_sd_min([5.0, 8.0, 9.0], [4.0, 6.0, 7.5], [6.0, 11.0, np.nan])
    np.testing.assert_allclose(sd, [1.0 / z, 2.5 / z, 1.5 / z], rtol=1e-12)
    # seeded Monte-Carlo: the recovered sd of normal errors from their 5/95 % quantiles
    e = np.random.default_rng(3).normal(0.0, 0.4, 200_000)
    lo, hi = np.quantile(e, [0.05, 0.95])
    assert time_error_sd_min(0.0, lo, hi) == pytest.approx(0.4, rel=0.01)
