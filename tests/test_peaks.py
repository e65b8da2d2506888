"""Peak width, resolution and co-elution risk against equations and seeded Monte-Carlo.

Sources named beside each value:
- retention-physics.md section 6: sigma_t = t0 (1 + k_e) / sqrt(N), Rs = dt / (2 (s1 + s2)),
  Rs >= 1.5 baseline separation (common practice).
- Poppe, Paanakker and Bronckhorst, J. Chromatogr. 204 (1981) 77: gradient compression.
- The normal distribution: Monte-Carlo estimates with a seeded numpy generator.
- Probability of a union of independent events, P(any) = 1 - prod (1 - p_j) (any
  probability textbook); logistic recalibration (Platt 1999) against scipy's expit.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from retpred.peaks import (
    any_coelution_probability,
    gradient_compression_factor,
    neighbour_pairs,
    peak_sigma_min,
    recalibrate_risk,
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


def _any_brute_force(rt, sigma, sd, rho):
    """Every pair, no ranks, no reach: 1 - prod_j (1 - p_ij) with p_ij from
    unresolved_probability."""
    n = rt.size
    out = np.full(n, np.nan)
    for i in range(n):
        if not np.isfinite(rt[i]):
            continue
        keep, seen = 1.0, False
        for j in range(n):
            if j == i or not np.isfinite(rt[j]):
                continue
            s = math.sqrt(max(sd[i] ** 2 + sd[j] ** 2 - 2 * rho * sd[i] * sd[j], 0.0))
            p = float(unresolved_probability(abs(rt[j] - rt[i]), sigma[i], sigma[j], s))
            if math.isfinite(p):
                keep *= 1.0 - p
                seen = True
        out[i] = 1.0 - keep if seen else np.nan
    return out


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_any_coelution_equals_the_all_pairs_product(seed):
    """The rank-offset pass with its reach cut-off gives the product over *all* pairs
    (brute force), also with ties, NaN times and NaN sds."""
    rng = np.random.default_rng(seed)
    n = 150
    rt = np.round(rng.uniform(0.5, 10.0, n), 2)
    rt[rng.random(n) < 0.05] = np.nan
    sigma = rng.uniform(0.01, 0.06, n)
    sd = rng.uniform(0.0, 0.4, n)
    sd[rng.random(n) < 0.03] = np.nan
    got = any_coelution_probability(rt, sigma, sd, rho=0.3)
    ref = _any_brute_force(rt, sigma, sd, 0.3)
    np.testing.assert_array_equal(np.isnan(got), np.isnan(ref))
    ok = np.isfinite(ref)
    np.testing.assert_allclose(got[ok], ref[ok], rtol=1e-9, atol=1e-12)


def test_any_coelution_two_analytes_and_certain_cases():
    # two analytes: the union is the single pair probability
    p2 = any_coelution_probability(np.array([2.0, 2.2]), 0.02, np.array([0.1, 0.2]), 0.0)
    pair = unresolved_probability(0.2, 0.02, 0.02, math.sqrt(0.1 ** 2 + 0.2 ** 2))
    np.testing.assert_allclose(p2, [pair, pair], rtol=1e-12)
    # zero error sd: the indicator of any other peak within Rs 1.5 (windows 3 (s1 + s2)
    # = 0.12 min); 3.0 and 3.1 overlap, 3.3 is 0.2 away from 3.1 and alone
    ind = any_coelution_probability(np.array([3.3, 3.0, 3.1, np.nan]), 0.02, 0.0)
    assert ind[:3].tolist() == [0.0, 1.0, 1.0] and np.isnan(ind[3])
    # a single analyte has no partner
    assert np.isnan(any_coelution_probability(np.array([1.0]), 0.02, 0.1)).all()


def test_any_coelution_against_monte_carlo_of_the_true_times():
    """Four analytes with independent normal time errors: the probability of at least one
    partner within the window, from 400,000 draws of the true times. The formula treats an
    analyte's pairs as independent, which they are not (they share its own error); on this
    layout the difference is under 0.04 (measured 0.037 at most; tolerance 0.05)."""
    rng = np.random.default_rng(0)
    rt = np.array([5.0, 5.3, 5.5, 6.4])
    sigma = np.array([0.03, 0.03, 0.04, 0.05])
    sd = np.array([0.2, 0.15, 0.25, 0.1])
    true = rt + rng.normal(size=(400_000, 4)) * sd
    w = 3.0 * (sigma[:, None] + sigma[None, :])
    close = np.abs(true[:, :, None] - true[:, None, :]) < w
    close[:, np.arange(4), np.arange(4)] = False
    mc = close.any(axis=2).mean(axis=0)
    got = any_coelution_probability(rt, sigma, sd, 0.0)
    np.testing.assert_allclose(got, mc, atol=0.05)
    # the analyte far from the others: one small pair probability, nearly exact
    assert got[3] == pytest.approx(mc[3], abs=0.002)


def test_recalibrate_risk_is_platts_map():
    from scipy.special import expit

    p = np.array([0.01, 0.2, 0.5, 0.9, np.nan])
    got = recalibrate_risk(p, 0.3, 0.7)
    ref = expit(0.3 + 0.7 * np.log(p / (1 - p)))
    np.testing.assert_allclose(got[:4], ref[:4], rtol=1e-12)
    assert np.isnan(got[4])
    # the identity map leaves certain values certain
    np.testing.assert_array_equal(recalibrate_risk(np.array([0.0, 1.0]), 0.0, 1.0), [0.0, 1.0])
