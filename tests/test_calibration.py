"""Calibration: planted corrections are recovered through the gradient engine.

The "truth" here is constructed, not produced by the code: observed log kw are made from the
predictions with a known shift or slope, observed times from them with the engine (whose
accuracy is checked against closed forms in test_gradient.py), and the calibration must
recover the planted parameters and reproduce the times.
"""

from __future__ import annotations

import numpy as np
import pytest

from retpred.calibration import Calibration, coverage_warning, fit_calibration
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
    np.testing.assert_allclose(cal.apply(pred), obs, atol=1e-9)
    np.testing.assert_allclose(elute(cal.apply(pred), s, prog).rt_min, rt, rtol=1e-9)
    assert cal.loo_median_abs_error_min < 1e-6


def test_planted_slope_chooses_linear(prog):
    pred, obs, rt, s = _case(prog, 8, shift=0.2, slope=1.3)
    cal = fit_calibration(pred, obs, rt, lambda v: elute(v, s, prog).rt_min)
    assert cal.kind == "linear"
    assert cal.slope == pytest.approx(1.3, abs=1e-9)
    assert cal.loo_errors_min["linear"] < cal.loo_errors_min["shift"]


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
    cal = Calibration(kind="monotone", offset=0.1, slope=1.1, pivot=2.0,
                      knots_x=(1.0, 2.0, 3.0), knots_y=(0.0, 0.05, 0.08))
    x = np.linspace(0, 5, 500)
    assert np.all(np.diff(cal.apply(x)) > 0)


def test_json_round_trip_and_bad_file():
    cal = Calibration(kind="linear", offset=0.3, slope=1.2, pivot=2.5, n_calibrants=5,
                      loo_median_abs_error_min=0.12, loo_errors_min={"shift": 0.2},
                      cal_rt_range_min=(1.0, 9.0), warnings=("x",))
    back = Calibration.from_json(cal.to_json())
    assert back == cal
    with pytest.raises(InputError, match="calibration"):
        Calibration.from_json("{not json", path="sys.cal")
    with pytest.raises(InputError):
        Calibration.from_json('{"format": 1, "kind": "cubic", "offset": 0}', path="sys.cal")


def test_coverage_warning():
    cal = Calibration(kind="shift", offset=0.0, cal_rt_range_min=(2.0, 6.0))
    assert coverage_warning(cal, np.array([2.5, 3.0, 5.9])) is None
    w = coverage_warning(cal, np.array([0.9, 3.0, 11.0]))
    assert w is not None and "2 analyte" in w
