"""Gradient engine against closed-form solutions and an independent band-migration ODE.

Sources:
- Isocratic: tR = t0 (1 + k) (definition of the retention factor).
- Linear gradient, LSS: tR = (t0/b) log10(2.303 k0 b (1 - tD/(t0 k0)) + 1) + t0 + tD with
  b = S dphi t0 / tG (Snyder and Dolan, High-Performance Gradient Elution, 2007, eq. for
  linear-gradient retention with dwell; retention-physics.md section 3 quotes the form
  without the dwell-migration term, which is the k0 -> large limit). 2.3 is ln 10 rounded.
- Step gradient: piecewise isocratic migration, solved by hand below.
- Band migration ODE dz/dV = (L/V0) / (1 + k(phi_in(V - z V0 / L))) (mass balance of a
  band moving at u / (1 + k) through a column whose composition travels unretained at u):
  integrated numerically with scipy, independent of the fundamental-equation shortcut.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from retpred.gradient import (
    STATUS_AFTER_END,
    STATUS_BEFORE_GRADIENT,
    STATUS_HOLD,
    STATUS_NOT_ELUTED,
    STATUS_OK,
    build_program,
    elute,
    log_kw_from_rt,
)


def test_isocratic_is_t0_times_one_plus_k():
    t0 = 1.2
    prog = build_program([0.0], [0.4], [1.0], dead_time_min=t0, dwell_volume_ml=0.5)
    log_kw = np.array([0.5, 1.5, 2.5, 3.0])
    s = np.array([3.0, 4.0, 5.0, 6.0])
    k = 10 ** (log_kw - s * 0.4)
    res = elute(log_kw, s, prog)
    np.testing.assert_allclose(res.rt_min, t0 * (1 + k), rtol=1e-12)
    np.testing.assert_allclose(res.k_elution, k, rtol=1e-12)
    assert set(res.status) == {STATUS_OK}


def _closed_form(k0, s, dphi, t0, tg, td):
    b = s * dphi * t0 / tg
    return (t0 / b) * np.log10(math.log(10) * k0 * b * (1 - td / (t0 * k0)) + 1) + t0 + td


@pytest.mark.parametrize("td_min", [0.0, 0.5, 2.0])
def test_linear_ramp_matches_closed_form(td_min):
    t0, tg, phi0, phi1, flow = 1.0, 20.0, 0.05, 0.95, 1.0
    # program long enough that every solute elutes within the ramp
    prog = build_program(
        [0.0, tg], [phi0, phi1], [flow, flow], dead_time_min=t0, dwell_volume_ml=td_min * flow
    )
    s = np.array([3.0, 4.0, 5.0, 6.0, 8.0])
    log_kw = np.array([2.0, 2.5, 3.0, 3.6, 5.0])
    k0 = 10 ** (log_kw - s * phi0)
    expected = _closed_form(k0, s, phi1 - phi0, t0, tg, td_min)
    res = elute(log_kw, s, prog)
    assert np.all(expected < tg)
    np.testing.assert_allclose(res.rt_min, expected, rtol=1e-3 * 1e-3)  # far below 0.1 %


def test_step_gradient_piecewise_analytic():
    # 10 % organic until 5 min, then a step to 60 %; no dwell; t0 = 1 min.
    t0 = 1.0
    prog = build_program(
        [0.0, 5.0, 5.0, 30.0], [0.1, 0.1, 0.6, 0.6], [1.0] * 4, dead_time_min=t0,
        dwell_volume_ml=0.0,
    )
    log_kw, s = np.array([1.5]), np.array([4.0])
    k1 = 10 ** (1.5 - 4.0 * 0.1)  # 12.59
    k2 = 10 ** (1.5 - 4.0 * 0.6)  # 0.126
    # fraction of column travelled during the first 5 min: 5 / (t0 k1)
    frac = 5.0 / (t0 * k1)
    # remaining fraction at k2 takes (1 - frac) t0 k2 of migration time
    expected = 5.0 + (1 - frac) * t0 * k2 + t0
    res = elute(log_kw, s, prog)
    assert res.rt_min[0] == pytest.approx(expected, rel=1e-10)


def test_statuses_hold_dwell_and_after_end():
    t0 = 0.5
    prog = build_program(
        [0.0, 2.0, 10.0], [0.05, 0.05, 0.95], [0.5] * 3, dead_time_min=t0, dwell_volume_ml=1.0
    )
    # hold ends at 2 min (1 mL), the front reaches the inlet at 4 min (2 mL).
    log_kw = np.array([-0.5, 0.8, 2.0, 12.0, 40.0])
    s = np.array([3.0, 3.0, 4.0, 11.0, 30.0])
    res = elute(log_kw, s, prog)
    assert res.status[0] == STATUS_HOLD  # k0 ~ 0.22: leaves during the hold
    assert res.status[1] == STATUS_BEFORE_GRADIENT  # k0 ~ 4.4 -> about 2.7 min
    assert res.status[2] == STATUS_OK
    assert res.status[3] == STATUS_AFTER_END  # k at 95 % = 10^(1.55): elutes after 10 min
    assert res.status[4] == STATUS_NOT_ELUTED and np.isnan(res.rt_min[4])
    k0 = 10 ** (log_kw[0] - s[0] * 0.05)
    assert res.rt_min[0] == pytest.approx(t0 * (1 + k0), rel=1e-12)


def _ode_rt(log_kw, s, times, phis, flows, t0, dwell_ml, length=1.0):
    """Independent band-migration integration in volume with scipy."""
    times, phis, flows = map(np.asarray, (times, phis, flows))
    v0 = t0 * flows[0]
    # pump volume vs time on a fine grid (flow linear in time)
    tt = np.linspace(0, times[-1] * 4, 200001)
    ff = np.interp(tt, times, flows)
    vv = np.concatenate([[0.0], np.cumsum(0.5 * (ff[1:] + ff[:-1]) * np.diff(tt))])
    pump_phi = np.interp(tt, times, phis)

    def phi_in(v):
        return np.interp(v - dwell_ml, vv, pump_phi, left=phis[0])

    def rhs(v, z):
        phi = phi_in(v - z[0] * v0 / length)
        k = 10 ** (log_kw - s * phi)
        return [(length / v0) / (1 + k)]

    def out(v, z):
        return z[0] - length

    out.terminal = True
    sol = solve_ivp(rhs, (0, vv[-1]), [0.0], events=out, max_step=0.002, rtol=1e-10, atol=1e-12)
    v_r = sol.t_events[0][0]
    return float(np.interp(v_r, vv, tt))


def test_multisegment_variable_flow_matches_ode():
    times = [0.0, 1.0, 6.0, 8.0, 12.0]
    phis = [0.05, 0.05, 0.60, 0.90, 0.90]
    flows = [0.3, 0.3, 0.5, 0.5, 0.4]
    t0, dwell = 0.8, 0.25
    prog = build_program(times, phis, flows, dead_time_min=t0, dwell_volume_ml=dwell)
    log_kw = np.array([1.0, 2.0, 3.0, 4.0])
    s = np.array([3.0, 4.0, 5.0, 6.0])
    res = elute(log_kw, s, prog)
    for i in range(log_kw.size):
        ref = _ode_rt(log_kw[i], s[i], times, phis, flows, t0, dwell)
        assert res.rt_min[i] == pytest.approx(ref, rel=2e-3), i


def test_inverse_round_trip():
    prog = build_program(
        [0.0, 1.0, 15.0, 18.0], [0.02, 0.02, 0.98, 0.98], [0.4, 0.4, 0.4, 0.4],
        dead_time_min=0.6, dwell_volume_ml=0.3,
    )
    rng = np.random.default_rng(7)
    s = rng.uniform(2.5, 8.0, 200)
    log_kw = rng.uniform(0.5, 6.0, 200)
    res = elute(log_kw, s, prog)
    ok = np.isfinite(res.rt_min)
    back = log_kw_from_rt(res.rt_min[ok], s[ok], prog)
    np.testing.assert_allclose(back, log_kw[ok], atol=1e-9)


def test_more_organic_elutes_earlier_and_higher_kw_later():
    """LSS facts (retention-physics.md section 7, common practice)."""
    t0 = 1.0
    lo = build_program([0.0], [0.3], [1.0], dead_time_min=t0, dwell_volume_ml=0)
    hi = build_program([0.0], [0.5], [1.0], dead_time_min=t0, dwell_volume_ml=0)
    log_kw, s = np.array([2.0, 3.0]), np.array([4.0, 5.0])
    assert np.all(elute(log_kw, s, hi).rt_min < elute(log_kw, s, lo).rt_min)
    grad = build_program([0, 10], [0.05, 0.95], [1, 1], dead_time_min=t0, dwell_volume_ml=0.5)
    rt = elute(np.array([1.0, 2.0, 3.0]), np.array([4.0, 4.0, 4.0]), grad).rt_min
    assert np.all(np.diff(rt) > 0)


def test_outlet_composition_is_the_pump_program_delayed_by_dwell_and_dead_time():
    # constant flow 0.4 mL/min, dwell 0.2 mL (0.5 min) and t0 0.5 min: what leaves the
    # column at t is what the pump mixed at t - 1.0 min (delays: retention-physics.md
    # section 3; the ramp value by hand: 5 + 90 x (4.0 - 0.5) / 9.5 = 38.16 %)
    prog = build_program([0.0, 0.5, 10.0, 12.0], [0.05, 0.05, 0.95, 0.95], [0.4] * 4,
                         dead_time_min=0.5, dwell_volume_ml=0.2)
    t = np.array([0.0, 1.4, 5.0, 11.0, 11.5, 13.0])
    expected = np.array([0.05, 0.05, 0.05 + 0.90 * 3.5 / 9.5, 0.95, 0.95, 0.95])
    np.testing.assert_allclose(prog.phi_outlet(t), expected, atol=1e-12)
    # the ramp reaches the outlet 1.0 min after it leaves the pump at 0.5 min
    assert prog.phi_outlet(np.array([1.5]))[0] == pytest.approx(0.05)
    assert prog.phi_outlet(np.array([1.6]))[0] > 0.05
