"""Calibration: planted corrections are recovered through the gradient engine.

The "truth" here is constructed, not produced by the code: observed log kw are made from the
predictions with a known shift or slope, observed times from them with the engine (whose
accuracy is checked against closed forms in test_gradient.py), and the calibration must
recover the planted parameters and reproduce the times.
"""

from __future__ import annotations

import numpy as np
import pytest

from retpred.calibration import (
    Calibration,
    CalibrationMap,
    blend_weights,
    coverage_warning,
    fit_calibration,
)
from retpred.errors import InputError
from retpred.gradient import build_program, elute


@pytest.fixture()
def prog():
    return build_program([0.0, 1.0, 15.0, 18.0], [0.05, 0.05, 0.95, 0.95], [0.4] * 4,
                         dead_time_min=0.6, dwell_volume_ml=0.2)


def _case(prog, n, shift=0.0, slope=1.0, noise=0.0, seed=0):
    rng = np.random.default_rng(seed)
    pred = rng.uniform(1.0, 4.5, n)
    s = rng.uniform(3.5, 6.0, n)
    pivot = np.median(pred)
    obs = np.median(pred) + shift + slope * (pred - pivot) + rng.normal(0, noise, n)
    rt = elute(obs, s, prog).rt_min
    return pred, obs, rt, s


def test_single_calibrant_is_a_shift(prog):
    pred, obs, rt, s = _case(prog, 1, shift=0.4)
    cal = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min)
    assert cal.kind == "shift"
    assert cal.apply(pred)[0] == pytest.approx(obs[0], abs=1e-12)


def test_planted_shift_recovered(prog):
    pred, obs, rt, s = _case(prog, 6, shift=-0.35)
    cal = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min)
    # the exact maps share the weight; the unchanged one (0.35 off, about 0.3 min) keeps
    # (LOO_FLOOR_MIN / its error)^2 of the exact maps' share, a few 1e-4
    assert cal.map_of("unchanged").weight < 1e-3
    np.testing.assert_allclose(cal.apply(pred), obs, atol=1e-3)
    np.testing.assert_allclose(elute(cal.apply(pred), s, prog).rt_min, rt, rtol=1e-3)
    assert cal.loo_median_abs_error_min < 1e-3


def test_planted_slope_weights_linear_and_is_recovered(prog):
    pred, obs, rt, s = _case(prog, 7, shift=0.2, slope=1.3)  # below MIN_QUADRATIC
    cal = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min)
    assert cal.kind == "blend" and {m.kind for m in cal.maps} == {"unchanged", "shift",
                                                                   "linear"}
    linear = cal.map_of("linear")
    assert linear.slope == pytest.approx(1.3, abs=1e-9)
    assert cal.loo_errors_min["linear"] < cal.loo_errors_min["shift"]
    # the exact linear map (LOO error ~0, floored) outweighs the shift by far
    assert linear.weight > 0.99
    np.testing.assert_allclose(cal.apply(pred), obs, atol=0.01 * np.ptp(obs))


def test_unchanged_map_weighs_in_only_where_the_model_already_fits(prog):
    # A candidate without parameters that is right should, on average over draws, outweigh
    # candidates that spend their parameters on noise: their estimation variance adds to the
    # same error (a mean fitted on n points predicts a new one with error variance
    # sigma^2 (1 + 1/n); textbook regression, from memory). Where the system is planted
    # 0.3 log units more retentive it must weigh almost nothing.
    def mean_weights(shift):
        w = {}
        for seed in range(40):
            pred, obs, rt, s = _case(prog, 10, shift=shift, noise=0.05, seed=seed)
            cal = fit_calibration(pred, obs, rt, lambda v, s=s: elute(v, s, prog).rt_min)
            for m in cal.maps:
                w.setdefault(m.kind, []).append(m.weight)
        return {k: float(np.mean(v)) for k, v in w.items()}

    fits = mean_weights(0.0)
    assert fits["unchanged"] == max(fits.values())
    assert mean_weights(0.3)["unchanged"] < 0.02


def test_blend_weights_are_inverse_variance():
    # w_k proportional to 1 / LOO_k^2 (inverse-variance weighting of estimators of one
    # quantity; e.g. Hartung, Knapp and Sinha, Statistical Meta-Analysis, 2008, ch. 4, from
    # memory): errors 0.1 and 0.2 min -> weights 4:1
    np.testing.assert_allclose(blend_weights([0.1, 0.2]), [0.8, 0.2], rtol=1e-12)
    w = blend_weights([0.0, 0.0, 0.3])  # exact fits share the weight, none is infinite
    assert w[0] == pytest.approx(w[1]) and 0 < w[2] < 1e-3 and w.sum() == pytest.approx(1)


def test_blend_is_the_weighted_mean_of_its_maps():
    a = CalibrationMap(kind="shift", offset=0.3, weight=0.25)
    b = CalibrationMap(kind="linear", offset=1.0, slope=1.5, pivot=2.0, weight=0.75)
    cal = Calibration(maps=(a, b))
    x = np.array([1.0, 2.0, 3.5])
    np.testing.assert_allclose(cal.apply(x), 0.25 * (x + 0.3) + 0.75 * (1.0 + 1.5 * (x - 2)))
    assert cal.describe() == "blend of linear 0.75, shift 0.25"


def test_description_counts_maps_weighted_to_nothing():
    # a blend reported as "linear 1.00, shift 0.00" reads as if the shift took part
    def blend(**weights):
        return Calibration(maps=tuple(CalibrationMap(kind=k, offset=0.0, weight=w)
                                      for k, w in weights.items()))

    assert (blend(shift=0.004, linear=0.994, monotone=0.002).describe()
            == "linear 0.99 (2 maps below 0.01)")
    assert (blend(shift=0.003, linear=0.6, selectivity=0.397).describe()
            == "blend of linear 0.60, selectivity 0.40 (1 map below 0.01)")


def test_outlier_is_warned_and_does_not_drag_the_fit(prog):
    pred, obs, rt, s = _case(prog, 12, shift=0.1, slope=1.0, noise=0.01, seed=3)
    obs_bad = obs.copy()
    obs_bad[4] += 1.0  # one mislabelled standard
    rt_bad = elute(obs_bad, s, prog).rt_min
    cal = fit_calibration(pred, obs_bad, rt_bad, lambda v: elute(v, s, prog).rt_min,
                          names=[f"std{i}" for i in range(12)])
    assert any("std4" in w and "outlier" in w for w in cal.warnings)
    good = np.arange(12) != 4
    assert np.median(np.abs(cal.apply(pred[good]) - obs[good])) < 0.05


def test_monotone_candidate_only_with_ten(prog):
    pred, obs, rt, s = _case(prog, 9, shift=0.1)
    cal9 = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min)
    assert "monotone" not in cal9.loo_errors_min
    pred, obs, rt, s = _case(prog, 12, shift=0.1)
    cal12 = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min)
    assert "monotone" in cal12.loo_errors_min


def test_monotone_correction_keeps_order():
    """A monotone map of log kw must never swap two analytes' order (monotonicity)."""
    cal = Calibration(maps=(CalibrationMap(kind="monotone", offset=0.1, slope=1.1, pivot=2.0,
                                           knots_x=(1.0, 2.0, 3.0),
                                           knots_y=(0.0, 0.05, 0.08)),))
    x = np.linspace(0, 5, 500)
    assert np.all(np.diff(cal.apply(x)) > 0)


def test_json_round_trip_and_bad_file():
    import json

    cal = Calibration(maps=(CalibrationMap(kind="linear", offset=0.3, slope=1.2, pivot=2.5,
                                           weight=0.6),
                            CalibrationMap(kind="shift", offset=0.2, weight=0.4)),
                      n_calibrants=5, loo_median_abs_error_min=0.12,
                      loo_errors_min={"shift": 0.2}, cal_rt_range_min=(1.0, 9.0),
                      warnings=("x",))
    back = Calibration.from_json(cal.to_json())
    assert back == cal
    with pytest.raises(InputError, match="calibration"):
        Calibration.from_json("{not json", path="sys.cal")
    d = json.loads(cal.to_json())
    d["maps"][0]["kind"] = "cubic"
    with pytest.raises(InputError, match="cubic"):
        Calibration.from_json(json.dumps(d), path="sys.cal")
    d["maps"][0]["kind"], d["maps"][0]["weight"] = "linear", 0.9  # weights sum to 1.3
    with pytest.raises(InputError, match="inconsistent"):
        Calibration.from_json(json.dumps(d), path="sys.cal")
    # a quadratic map round-trips; a file of format 2 (before the quadratic kind) reads
    quad = Calibration(maps=(CalibrationMap(kind="quadratic", offset=0.3, slope=1.1,
                                            pivot=2.0, curvature=0.12,
                                            curve_range=(-1.5, 1.8)),),
                       n_calibrants=10, loo_median_abs_error_min=0.05,
                       cal_rt_range_min=(1.0, 9.0))
    assert Calibration.from_json(quad.to_json()) == quad
    d2 = json.loads(cal.to_json())
    d2["format"] = 2
    assert Calibration.from_json(json.dumps(d2)) == cal
    # a file of the single-map format 1 is refused with the way out
    with pytest.raises(InputError, match="refit it") as exc:
        Calibration.from_json('{"format": 1, "kind": "shift", "offset": 0}', path="sys.cal")
    assert exc.value.field == "format"


def test_coverage_warning():
    cal = Calibration(maps=(CalibrationMap(kind="shift", offset=0.0),),
                      cal_rt_range_min=(2.0, 6.0))
    assert coverage_warning(cal, np.array([2.5, 3.0, 5.9])) is None
    w = coverage_warning(cal, np.array([0.9, 3.0, 11.0]))
    assert w is not None and "2 analyte" in w


# --- structure-aware corrections ------------------------------------------------------------

SMILES_12 = [  # common small aromatics and drugs (structures only; no values are read off)
    "c1ccccc1", "Cc1ccccc1", "CCc1ccccc1", "Oc1ccccc1", "Nc1ccccc1", "OC(=O)c1ccccc1",
    "COc1ccccc1", "Clc1ccccc1", "CC(=O)Nc1ccc(O)cc1", "CN1C=NC2=C1C(=O)N(C)C(=O)N2C",
    "CC(C)Cc1ccc(C(C)C(=O)O)cc1", "O=C(O)c1ccccc1O",
]


@pytest.fixture(scope="module")
def traits12():
    from retpred.calibration import SoluteTraits
    from retpred.model import featurise

    return SoluteTraits.of(featurise(SMILES_12))


def test_count_tanimoto_matches_rdkit(traits12):
    # reference library: RDKit's TanimotoSimilarity on count vectors (sum min / sum max)
    from rdkit import DataStructs

    from retpred.calibration import tanimoto_counts

    fps = traits12.fingerprints
    ours = tanimoto_counts(fps, fps)
    vecs = []
    for row in fps:
        v = DataStructs.UIntSparseIntVect(fps.shape[1])
        for i, c in enumerate(row):
            if c:
                v[i] = int(c)
        vecs.append(v)
    ref = np.array([[DataStructs.TanimotoSimilarity(a, b) for b in vecs] for a in vecs])
    np.testing.assert_allclose(ours, ref, atol=1e-12)


def test_planted_selectivity_is_recovered_and_chosen(prog, traits12):
    # observed = predicted + 0.25 per log P unit - 0.4 per 100 A^2 TPSA (a more hydrophobic,
    # less polar-retentive system than the model assumed). The ridge (lambda 1) shrinks a
    # term in proportion to how little the calibrants spread in it: log P spreads widely
    # (recovered to within 25 %), TPSA/100 of these 12 only by ~0.25 (its sign is recovered).
    rng = np.random.default_rng(5)
    pred = rng.uniform(1.0, 4.5, 12)
    s = rng.uniform(3.5, 6.0, 12)
    e = traits12.selectivity_terms()
    obs = pred + 0.25 * (e[:, 0] - e[:, 0].mean()) - 0.4 * (e[:, 1] - e[:, 1].mean())
    rt = elute(obs, s, prog).rt_min
    cal = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min, traits=traits12)
    sel = cal.map_of("selectivity")
    assert sel.weight == max(m.weight for m in cal.maps)
    assert sel.sel_coef[0] == pytest.approx(0.25, rel=0.25)
    assert sel.sel_coef[1] < 0
    # without the structures the selectivity kind is not offered and cannot be applied
    plain = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min)
    assert "selectivity" not in plain.loo_errors_min
    with pytest.raises(ValueError, match="structures"):
        cal.apply(pred)
    err_sel = np.abs(elute(cal.apply(pred, traits12), s, prog).rt_min - rt)
    err_plain = np.abs(elute(plain.apply(pred), s, prog).rt_min - rt)
    assert np.median(err_sel) < 0.6 * np.median(err_plain)


def test_neighbour_correction_formula():
    # delta = sum w r / (sum w + kappa), w = exp((T - 1) / tau): an analyte identical to a
    # calibrant (T = 1, w = 1) with a dissimilar second calibrant (T = 0, w = e^-5)
    from retpred.calibration import NEIGHBOUR_KAPPA, NEIGHBOUR_TAU, neighbour_correction

    cal_fp = np.array([[2, 1, 0, 0], [0, 0, 3, 1]])
    r = np.array([0.3, -0.2])
    analytes = np.array([[2, 1, 0, 0], [0, 0, 0, 0]])
    got = neighbour_correction(analytes, cal_fp, r)
    w = np.array([1.0, np.exp(-1.0 / NEIGHBOUR_TAU)])
    expect0 = (w @ r) / (w.sum() + NEIGHBOUR_KAPPA)
    np.testing.assert_allclose(got[0], expect0, rtol=1e-12)
    w1 = np.exp(-1.0 / NEIGHBOUR_TAU) * np.ones(2)
    np.testing.assert_allclose(got[1], (w1 @ r) / (w1.sum() + NEIGHBOUR_KAPPA), rtol=1e-12)
    assert abs(got[1]) < 0.01 * abs(got[0])


def test_structure_aware_calibration_round_trips(prog, traits12):
    rng = np.random.default_rng(8)
    pred = rng.uniform(1.0, 4.5, 12)
    s = rng.uniform(3.5, 6.0, 12)
    obs = pred + 0.2 + rng.normal(0, 0.05, 12)
    rt = elute(obs, s, prog).rt_min
    cal = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min, traits=traits12)
    assert all(len(m.nb_residuals) == 12 for m in cal.maps) and len(cal.nb_fingerprints) == 12
    back = Calibration.from_json(cal.to_json())
    assert back == cal
    np.testing.assert_allclose(back.apply(pred, traits12), cal.apply(pred, traits12))


def test_planted_compound_factors_are_recovered_and_applied(prog):
    # observed = predicted + v_i . w for the analytes the model has factors for (a planted
    # rank-2 interaction; v, w and the traits are arbitrary test numbers, not chemistry). 40
    # of 60 analytes are calibrants, enough that the chosen map (fitted first) absorbs
    # little of a term unrelated to the prediction. The loadings must be the ridge
    # (V^T V + 0.3 I)^-1 V^T r on the map's residuals, which the test recomputes; the 20
    # left out must then get about v . w, so their error falls well below that of the same
    # calibration without factors.
    import dataclasses

    from retpred.calibration import FACTOR_RIDGE, SoluteTraits

    rng = np.random.default_rng(11)
    n = 60
    v = rng.normal(0, 1.0, (n, 2))
    v[:5] = 0.0  # structures the model has no factors for
    w_true = np.array([0.3, -0.2])
    pred = rng.uniform(1.0, 4.5, n)
    s = rng.uniform(3.5, 6.0, n)
    obs = pred + v @ w_true
    rt = elute(obs, s, prog).rt_min
    tr = SoluteTraits(logp=rng.uniform(0, 4, n), tpsa_a2=rng.uniform(20, 120, n),
                      fingerprints=np.zeros((n, 8), dtype=int), factors=v)
    cal_idx, rest = np.arange(40), np.arange(40, n)
    cal = fit_calibration(pred[cal_idx], obs[cal_idx], rt[cal_idx],
                          lambda lk: elute(lk, s[cal_idx], prog).rt_min,
                          traits=tr.take(cal_idx))
    assert cal.n_factor_calibrants == 35
    f = v[cal_idx]
    for m in cal.maps:  # each map's loadings are fitted on its own residuals
        bare = dataclasses.replace(m, factor_loadings=(), nb_residuals=())
        r = obs[cal_idx] - bare.apply(pred[cal_idx], tr.take(cal_idx))
        expect = np.linalg.solve(f.T @ f + FACTOR_RIDGE * np.eye(2), f.T @ r)
        np.testing.assert_allclose(m.factor_loadings, expect, rtol=1e-9)
        np.testing.assert_allclose(m.factor_loadings, w_true, atol=0.1)
    plain = cal.without_factors()
    err_f = np.abs(cal.apply(pred[rest], tr.take(rest)) - obs[rest])
    err_p = np.abs(plain.apply(pred[rest], tr.take(rest)) - obs[rest])
    assert np.median(err_f) < 0.5 * np.median(err_p)
    # without factors in the traits, no correction is fitted and none applied
    none = fit_calibration(pred[cal_idx], obs[cal_idx], rt[cal_idx],
                           lambda lk: elute(lk, s[cal_idx], prog).rt_min,
                           traits=dataclasses.replace(tr, factors=None).take(cal_idx))
    assert all(m.factor_loadings == () for m in none.maps) and none.factor_note() is None
    back = Calibration.from_json(cal.to_json())
    assert back == cal
    np.testing.assert_allclose(back.apply(pred, tr), cal.apply(pred, tr))


# --- fits in time ---------------------------------------------------------------------------

def test_time_jacobian_matches_the_isocratic_closed_form():
    # isocratic: t_R = t0 (1 + k), k = 10^(log kw - S phi), so d t_R / d log kw = t0 k ln 10
    # (retention-physics.md section 1; the engine's isocratic times are checked against
    # t0 (1 + k) in test_gradient.py)
    from retpred.calibration import time_jacobian

    t0, phi = 0.8, 0.4
    iso = build_program([0.0, 60.0], [phi, phi], [0.5, 0.5], dead_time_min=t0,
                        dwell_volume_ml=0.0)
    lk = np.array([1.5, 2.0, 2.6])
    s = np.array([3.0, 4.0, 5.0])
    k = 10 ** (lk - s * phi)
    jac = time_jacobian(lambda v: elute(v, s, iso).rt_min, lk)
    np.testing.assert_allclose(jac, t0 * k * np.log(10), rtol=1e-3)


def test_huber_line_matches_scipy_least_squares():
    # reference library: scipy.optimize.least_squares with loss="huber" minimises
    # sum rho(f^2), rho(z) = z (z <= 1), 2 sqrt(z) - 1 (z > 1): Huber's loss on
    # f = w (r - a - b x) / (c scale), the same minimiser as ours
    from scipy.optimize import least_squares

    from retpred.calibration import HUBER_C, huber_line

    rng = np.random.default_rng(4)
    x = rng.uniform(-1.5, 1.5, 15)
    w = rng.uniform(0.5, 4.0, 15)
    r = 0.2 + 0.3 * x + rng.normal(0, 0.05, 15)
    r[[2, 9]] += [0.8, -0.6]  # two gross errors
    scale = 0.1
    a, b = huber_line(x, r, w, scale)
    ref = least_squares(lambda p: w * (r - p[0] - p[1] * x) / (HUBER_C * scale), [0.0, 0.0],
                        loss="huber", f_scale=1.0, xtol=1e-14, ftol=1e-14, gtol=1e-14)
    np.testing.assert_allclose([a, b], ref.x, atol=1e-8)
    assert abs(b - 0.3) < 0.1  # the gross errors do not drag the slope


def test_time_weighted_line_follows_the_peaks_that_move(prog):
    # Planted: true log kw = predicted + 0.3 + 0.2 (pred - 3); the measured times carry an
    # equal error (sd 0.05 min) for every calibrant, and the observed log kw are computed
    # from them (exact inverse of the engine), so weakly retained calibrants near t0 get
    # large log kw errors for the same error in time. Fitted in time, the map must predict
    # new analytes' times better than the unweighted repeated-median line (40 draws of 10).
    from retpred.calibration import _fit
    from retpred.gradient import log_kw_from_rt

    rng = np.random.default_rng(2)
    err_w, err_p = [], []
    for _ in range(40):
        pred = rng.uniform(0.0, 4.5, 10)
        s = rng.uniform(3.5, 5.0, 10)
        rt = elute(pred + 0.3 + 0.2 * (pred - 3.0), s, prog).rt_min + rng.normal(0, 0.05, 10)
        obs = log_kw_from_rt(rt, s, prog)
        ok = np.isfinite(obs)

        def rt_of(v, s=s[ok]):
            return elute(v, s, prog).rt_min

        cal = fit_calibration(pred[ok], obs[ok], rt[ok], rt_of)
        x_new = rng.uniform(0.0, 4.5, 50)
        s_new = rng.uniform(3.5, 5.0, 50)
        truth = elute(x_new + 0.3 + 0.2 * (x_new - 3.0), s_new, prog).rt_min
        err_w.append(np.median(np.abs(
            elute(cal.map_of("linear").apply(x_new), s_new, prog).rt_min - truth)))
        plain = _fit("linear", pred[ok], obs[ok])
        err_p.append(np.median(np.abs(elute(plain.apply(x_new), s_new, prog).rt_min - truth)))
    # measured: 0.64 of the unweighted error with this seed (0.64-0.94 over seeds 0-5)
    assert np.median(err_w) < 0.8 * np.median(err_p), (np.median(err_w), np.median(err_p))


def test_weighted_median_and_bounded_slope(prog):
    from retpred.calibration import SLOPE_BOUNDS, time_jacobian, time_weights, weighted_median

    v = np.array([3.0, 1.0, 7.0, 5.0, 2.0])
    assert weighted_median(v, np.ones(5)) == np.median(v)  # equal weights: the median
    # a weight over half of the total decides: 7.0 holds 6 of 10
    assert weighted_median(v, np.array([1.0, 1.0, 6.0, 1.0, 1.0])) == 7.0
    # a planted slope of 2.6 is beyond the bounds (0.5-2): the slope stops at the bound and
    # the offset is the one that leaves the time-weighted median residual at zero
    pred, obs, rt, s = _case(prog, 8, shift=0.1, slope=2.6)
    ok = np.isfinite(rt)  # the most retained may not elute within the program
    pred, obs, rt, s = pred[ok], obs[ok], rt[ok], s[ok]
    assert ok.sum() >= 5
    cal = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min)
    lin = cal.map_of("linear")
    assert lin.slope == SLOPE_BOUNDS[1]
    w = time_weights(time_jacobian(lambda v: elute(v, s, prog).rt_min, obs))
    resid = obs - lin.apply(pred)
    assert lin.offset == weighted_median(obs - 2.0 * (pred - lin.pivot), w)
    # half the weight on either side of the zero residual
    assert w[resid < -1e-12].sum() <= 0.5 * w.sum() and w[resid > 1e-12].sum() <= 0.5 * w.sum()


def test_blend_applies_to_a_grid_of_conditions_row_by_row(prog, traits12):
    # scans correct a (conditions x analytes) grid in one call: each row must get exactly
    # what the analytes get one condition at a time (structure terms along the last axis)
    import dataclasses

    rng = np.random.default_rng(9)
    pred = rng.uniform(1.0, 4.5, 12)
    s = rng.uniform(3.5, 6.0, 12)
    tr = dataclasses.replace(traits12, factors=rng.normal(0, 1, (12, 3)))
    obs = pred + 0.2 + 0.15 * (tr.logp - tr.logp.mean()) + rng.normal(0, 0.05, 12)
    rt = elute(obs, s, prog).rt_min
    cal = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min, traits=tr)
    assert {m.kind for m in cal.maps} >= {"selectivity", "monotone"}
    assert cal.nb_fingerprints and any(m.factor_loadings for m in cal.maps)
    grid = pred[None, :] + np.array([[-0.5], [0.0], [0.7]])
    whole = cal.apply(grid, tr)
    for r in range(grid.shape[0]):
        np.testing.assert_allclose(whole[r], cal.apply(grid[r], tr), rtol=0, atol=1e-12)


def test_unusable_calibrants_are_named(prog):
    # a standard without a usable structure (NaN prediction) or eluting at t0 is left out
    # and named in the warning; the others still calibrate
    pred, obs, rt, s = _case(prog, 6, shift=0.2)
    pred[1] = np.nan
    rt[4] = np.nan
    cal = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min,
                          names=[f"std{i}" for i in range(6)])
    assert cal.n_calibrants == 4
    assert any("2 calibrant(s) not usable" in w and w.endswith("std1, std4")
               for w in cal.warnings)


# Void calibrants. A standard eluting at or near t0 only says its log kw is at most the
# value that elutes at 1.15 t0 (a bound, b): the censored-regression (Tobit) view of a
# detection limit, the same rule as for the training data's void rows (DEVELOPERS.md,
# "Void rows"). Its target is min(mu, b), mu from a first fit on the retained standards.


def test_lone_void_calibrant_is_the_censored_target(prog):
    from retpred.training import void_bound_log_kw

    s, rt = np.array([4.5]), np.array([0.66])  # 1.1 t0
    b = void_bound_log_kw(rt, s, prog)[0]
    # the log kw at 1.15 t0 elutes there (engine checked against closed forms elsewhere)
    assert elute(np.array([b]), s, prog).rt_min[0] == pytest.approx(1.15 * 0.6, abs=1e-6)
    rt_of = lambda v: elute(v, s, prog).rt_min  # noqa: E731
    # predicted retained: pulled down to the bound
    pulled = fit_calibration(np.array([b + 1.0]), np.array([np.nan]), rt, rt_of,
                             upper_log_kw=np.array([b]))
    assert pulled.kind == "shift" and pulled.maps[0].offset == pytest.approx(-1.0)
    # predicted in the void already: no information, no correction
    kept = fit_calibration(np.array([b - 1.0]), np.array([np.nan]), rt, rt_of,
                           upper_log_kw=np.array([b]))
    assert kept.maps[0].offset == pytest.approx(0.0, abs=1e-12)
    assert kept.n_calibrants == 1 and "near t0" in kept.warnings[0]


def _with_void(prog, pred_void_above_bound):
    """Seven retained standards with a planted shift of +0.3 and three void standards
    (1.03-1.10 t0) predicted ``pred_void_above_bound`` above their bounds."""
    from retpred.gradient import log_kw_from_rt
    from retpred.training import void_bound_log_kw

    pred, obs, rt, s = _case(prog, 7, shift=0.3, seed=0)
    sv, tv = np.array([4.0, 4.5, 5.0]), np.array([0.62, 0.64, 0.66])
    b = void_bound_log_kw(tv, sv, prog)
    pv = b + np.asarray(pred_void_above_bound)
    n = pred.size
    a = dict(pred=np.r_[pred, pv], obs=np.r_[obs, log_kw_from_rt(tv, sv, prog)],
             rt=np.r_[rt, tv], s=np.r_[s, sv])
    a["up"] = np.r_[np.full(n, np.nan), b]
    a["rt_of"] = lambda v: elute(v, a["s"], prog).rt_min
    retained = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min)
    return a, pv, retained, (pred, obs)


def test_void_calibrants_predicted_in_the_void_leave_the_map_alone(prog):
    a, pv, retained, (pred, obs) = _with_void(prog, [-1.3, -1.0, -0.8])
    cens = fit_calibration(a["pred"], a["obs"], a["rt"], a["rt_of"],
                           names=[f"std{i}" for i in range(10)], upper_log_kw=a["up"])
    assert cens.n_calibrants == 10
    assert any(w.endswith("std7, std8, std9") and "near t0" in w for w in cens.warnings)
    np.testing.assert_allclose(cens.apply(pred), obs, atol=1e-3)
    np.testing.assert_allclose(cens.apply(pv), retained.apply(pv), atol=1e-3)


def test_void_calibrants_predicted_retained_pull_the_map_down(prog):
    a, pv, retained, _ = _with_void(prog, [0.3, 0.5, 0.8])
    cens = fit_calibration(a["pred"], a["obs"], a["rt"], a["rt_of"], upper_log_kw=a["up"])
    exact = fit_calibration(a["pred"], a["obs"], a["rt"], a["rt_of"])
    # below what the retained standards alone say, but not as far down as their times
    # read as exact (those lie below the bound: eluted before 1.15 t0)
    assert np.all(cens.apply(pv) < retained.apply(pv) - 0.02)
    assert np.all(cens.apply(pv) > exact.apply(pv) + 0.02)


def test_predict_calibrate_bounds_a_t0_marker(prep):
    # uracil, the usual unretained t0 marker on reversed phase (common practice), eluting a
    # little before t0 (exclusion from the pores; common practice) is used as a bound, not
    # dropped; a standard at half t0 cannot be real and is dropped
    from retpred.predict import calibrate

    t0 = prep.t0_min
    smiles = ["O=c1cc[nH]c(=O)[nH]1", "Cn1cnc2c1c(=O)n(C)c(=O)n2C", "Cc1ccccc1",
              "c1ccc2ccccc2c1", "OCC(O)CO"]
    cal = calibrate(prep, smiles, np.array([0.95 * t0, 2.0, 7.1, 7.9, 0.5 * t0]),
                    ["uracil", "caffeine", "toluene", "naphthalene", "glycerol"])
    assert cal.n_calibrants == 4
    assert any("near t0" in w and w.endswith("uracil") for w in cal.warnings)
    assert any("not usable" in w and w.endswith("glycerol") for w in cal.warnings)



def _curved_case(prog, n=12, curvature=0.15, seed=5):
    rng = np.random.default_rng(seed)
    pred = rng.uniform(1.0, 4.5, n)
    s = rng.uniform(3.5, 6.0, n)
    u = pred - np.median(pred)
    obs = pred + 0.2 + 0.1 * u + curvature * u**2
    return pred, obs, elute(obs, s, prog).rt_min, s


def test_planted_curvature_is_recovered_and_weighted(prog, monkeypatch):
    import retpred.calibration as cal_mod

    pred, obs, rt, s = _curved_case(prog)
    rt_of = lambda v: elute(v, s, prog).rt_min  # noqa: E731
    cal = fit_calibration(pred, obs, rt, rt_of)
    quad = cal.map_of("quadratic")
    # the ridge shrinks the curvature a little; the exact map takes nearly all the weight
    assert quad.curvature == pytest.approx(0.15, rel=0.05)
    assert quad.weight > 0.9
    assert cal.loo_errors_min["quadratic"] < cal.loo_errors_min["linear"] / 5
    np.testing.assert_allclose(elute(cal.apply(pred), s, prog).rt_min, rt, rtol=2e-3)
    # without the ridge the planted parabola comes back exactly
    monkeypatch.setattr(cal_mod, "CURVATURE_RIDGE", 0.0)
    exact = fit_calibration(pred, obs, rt, rt_of).map_of("quadratic")
    assert exact.curvature == pytest.approx(0.15, abs=1e-8)
    assert exact.slope == pytest.approx(1.1, abs=1e-8)
    # no quadratic candidate below eight calibrants
    assert "quadratic" not in fit_calibration(pred[:7], obs[:7], rt[:7], lambda v: elute(
        v, s[:7], prog).rt_min).loo_errors_min


def test_quadratic_map_is_straight_beyond_the_calibrants():
    m = CalibrationMap(kind="quadratic", offset=0.3, slope=1.1, pivot=2.0, curvature=0.2,
                       curve_range=(-1.0, 1.5))
    x = np.array([1.0, 2.0, 3.5, 5.0, 6.0, -1.0, 0.0])
    y = m.apply(x)
    # inside: the parabola; beyond either end: the line of slope 1.1 through the end point
    np.testing.assert_allclose(y[:3], 0.3 + 1.1 * (x[:3] - 2.0) + 0.2 * (x[:3] - 2.0) ** 2)
    assert y[4] - y[3] == pytest.approx(1.1)
    assert y[6] - y[5] == pytest.approx(1.1)


def test_ridge_huber_fit_matches_scipy_least_squares():
    # reference library: scipy.optimize.least_squares, loss="huber", on the scaled
    # residuals plus the ridge residuals sqrt(ridge) beta / (c scale) (inside Huber's
    # quadratic zone, so they add ridge beta^2 to the objective, as our IRLS does)
    from scipy.optimize import least_squares

    from retpred.calibration import HUBER_C, huber_fit

    rng = np.random.default_rng(7)
    u = rng.uniform(-1.5, 1.5, 14)
    w = rng.uniform(0.5, 3.0, 14)
    a_mat = np.column_stack([np.ones_like(u), u, u * u])
    r = 0.1 + 0.2 * u + 0.15 * u * u + rng.normal(0, 0.03, 14)
    r[[3, 10]] += [0.7, -0.5]
    scale, ridge = 0.1, np.array([0.0, 0.0, 0.3])
    beta = huber_fit(a_mat, r, w, scale, ridge=ridge)
    cs = HUBER_C * scale

    def resid(p):
        return np.concatenate([w * (r - a_mat @ p) / cs, np.sqrt(ridge) * p / cs])

    ref = least_squares(resid, np.zeros(3), loss="huber", f_scale=1.0, xtol=1e-14,
                        ftol=1e-14, gtol=1e-14)
    assert np.all(np.abs(np.sqrt(ridge) * ref.x / cs) < 1.0)
    np.testing.assert_allclose(beta, ref.x, atol=1e-7)



def test_strongly_curved_standards_still_give_a_monotone_map(prog):
    """A map of log kw that turned back would swap two analytes' elution order; the
    quadratic kind's curvature is bounded so that its slope stays at or above the lowest
    slope allowed (SLOPE_BOUNDS[0]) over the calibrants' span."""
    from retpred.calibration import SLOPE_BOUNDS

    pred, obs, rt, s = _curved_case(prog, curvature=1.0)  # slope 1.1 - 2 u_max: turns back
    quad = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min
                           ).map_of("quadratic")
    x = np.linspace(pred.min() - 1.0, pred.max() + 1.0, 2000)
    assert np.all(np.diff(quad.apply(x)) / np.diff(x) >= SLOPE_BOUNDS[0] - 1e-9)
    # the bound is active: the unconstrained parabola would have a negative slope there
    lo, hi = quad.curve_range
    assert min(1.1 + 2.0 * lo, 1.1 + 2.0 * hi) < 0
