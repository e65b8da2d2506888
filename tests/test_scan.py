"""Method-development scans (retpred.scan) against closed forms, handbook values and practice.

Sources named beside each check value:
- Henderson-Hasselbalch and the species-weighted retention factor k = f0 k_n + (1 - f0) k_ion
  (retention-physics.md section 4): the k-vs-pH curve of a monoprotic solute is a logistic
  in pH with its inflection exactly at the pKa.
- pKa values: benzoic acid 4.20 (CRC Handbook, from memory; also
  datasets/reference/pka_reference.tsv), benzylamine 9.34 (CRC Handbook, from memory).
- Buffer pKa values (CRC Handbook, from memory); buffer range pKa +- 1 (common practice).
- LSS gradient closed form tR = (t0 / b) log10(2.3 k0 b + 1) + t0 + tD,
  b = S dphi t0 / tG (Snyder and Dolan, High-Performance Gradient Elution, 2007;
  retention-physics.md section 3).
- Darcy's law dP ~ 1 / dp^2 at constant flow; typical column pressures (common practice,
  retention-physics.md section 6); pump ratings 400 bar HPLC (common practice).
"""

from __future__ import annotations

import copy
import dataclasses
import time

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import retpred.scan as scan_module
from retpred.column import column_hsm
from retpred.errors import InputError, MethodError
from retpred.gradient import log_kw_from_rt, program_from_method
from retpred.method import Column, Gradient, Instrument, Method, MobilePhase
from retpred.model import COLUMN_TERM_NAMES, SystemContext, featurise
from retpred.predict import add_pairs, predict_solutes, prepare, system_context
from retpred.scan import (
    _best,
    _best_ramp,
    _windows_text,
    buffers_for_ph,
    describe_scan,
    gradient_time_scan,
    joint_scan_frames,
    parse_range,
    ph_gradient_scan,
    ph_scan,
    phase_ph_scan,
    plot_scan,
    pressure_report,
    retention_grid,
    robust_windows,
    scan_summary_frame,
    scan_to_frame,
    stretch_ramp,
)

pytestmark = pytest.mark.opendata  # the scans need a trained model (small_model fixture)

BENZOIC_ACID = "OC(=O)c1ccccc1"  # pKa 4.20 (CRC Handbook, from memory)
BENZYLAMINE = "NCc1ccccc1"  # pKa 9.34 (CRC Handbook, from memory)
PKA_BENZOIC = 4.20
PKA_BENZYLAMINE = 9.34
# A column rated pH 1-12.5 (hybrid particles are rated about 1-12, common practice) so the
# base's whole curve can be seen.
WIDE = Column("C18", 150.0, 4.6, 5.0, ph_min=1.0, ph_max=12.5)
FINE_PH = np.round(np.arange(1.0, 12.5 + 1e-9, 0.02), 4)


def _method(column=WIDE, program=((0.0, 20.0, 1.0),), dwell_ml=1.0, ph=7.0, flow=1.0,
            max_pressure_bar=None, organic="acetonitrile", temperature_c=30.0):
    return Method(
        column=column,
        mobile_phase=MobilePhase(organic, 0.0, 100.0, ph, temperature_c),
        gradient=Gradient(flow, program, dwell_ml),
        instrument=Instrument(max_pressure_bar),
    )


def _t0(method):
    return 0.5 * (method.column.length_mm / 10) * (method.column.inner_diameter_mm / 10) ** 2 / (
        method.gradient.flow_ml_min)  # Vm = 0.5 L dc^2 (retention-physics.md section 1)


@pytest.fixture(scope="module")
def hh_model(small_model):
    """The small model with its learned linear charge terms switched off, so that pH acts
    only through the species-weighted Henderson-Hasselbalch term (the closed-form case)."""
    m = copy.deepcopy(small_model)
    for ridge in (m.ridge_, m.companion_ridge_):  # the model's and its companion's
        if ridge is None:
            continue
        coef = ridge.coef_.copy()
        for name in ("cation", "anion", "dC*cation", "cation*anion",
                     "methanol*cation", "methanol*anion"):
            coef[COLUMN_TERM_NAMES.index(name)] = 0.0
        ridge.coef_ = coef
    return m


@pytest.fixture(scope="module")
def acid_base():
    return featurise([BENZOIC_ACID, BENZYLAMINE]), ["benzoic acid", "benzylamine"]


def _inflection(x, y):
    """pH of the steepest slope, refined by a parabola through the three points around it."""
    d = np.gradient(y, x)
    i = int(np.nanargmax(np.abs(d)))
    if 0 < i < x.size - 1:
        a, b, c = np.abs(d[i - 1 : i + 2])
        den = a - 2 * b + c
        if den != 0:
            return float(x[i] + 0.5 * (a - c) / den * (x[1] - x[0]))
    return float(x[i])


def _k(result, method):
    t0 = _t0(method)
    return (result.rt_min - t0) / t0


# --- pH: the closed-form sigmoid -----------------------------------------------------------


def test_isocratic_k_vs_ph_is_hh_sigmoid_at_tabulated_pka(hh_model, acid_base):
    sol, names = acid_base
    method = _method()
    res = ph_scan(method, hh_model, sol, names, FINE_PH)
    k = _k(res, method)
    assert np.all(np.isfinite(k))
    for j, (pka, sign) in enumerate(((PKA_BENZOIC, -1), (PKA_BENZYLAMINE, +1))):
        kk = k[:, j]
        assert _inflection(FINE_PH, kk) == pytest.approx(pka, abs=0.3)
        # acid loses retention as pH rises, base gains it (retention-physics.md section 7)
        assert np.all(sign * np.diff(kk) >= -1e-9)
        # the normalised curve is the Henderson-Hasselbalch neutral fraction at the tabulated
        # pKa: acid f0 = 1 / (1 + 10^(pH - pKa)), base f0 = 1 / (1 + 10^(pKa - pH))
        f0 = 1.0 / (1.0 + 10.0 ** (-sign * (FINE_PH - pka)))
        norm = (kk - kk.min()) / (kk.max() - kk.min())  # (k - k_ion) / (k_n - k_ion) = f0
        np.testing.assert_allclose(norm, f0, atol=0.06)
    # the chemistry layer's assigned pKa (what the physics uses) for the report
    assert sol.sites.describe(0).startswith("aromatic carboxylic acid")


def test_gradient_ph_curve_keeps_inflection_in_k(hh_model, acid_base):
    # 5-95 % B in 20 min: times move in opposite directions; the kw recovered from the
    # predicted gradient times (exact inverse of the engine) has its inflection at the pKa.
    sol, names = acid_base
    method = _method(program=((0.0, 5.0, 1.0), (20.0, 95.0, 1.0), (25.0, 95.0, 1.0)))
    res = ph_scan(method, hh_model, sol, names, FINE_PH)
    prog = program_from_method(method)
    s = 0.25 * np.sqrt(sol.mw)  # S = 0.25 M^0.5 (Snyder and Dolan rule of thumb)
    for j, (pka, sign) in enumerate(((PKA_BENZOIC, -1), (PKA_BENZYLAMINE, +1))):
        rt = res.rt_min[:, j]
        assert np.all(np.isfinite(rt))
        assert np.all(sign * np.diff(rt) >= -1e-9)
        assert sign * (rt[-1] - rt[0]) > 0.5  # a visible move (minutes)
        kw = 10.0 ** log_kw_from_rt(rt, s[j], prog)
        assert _inflection(FINE_PH, kw) == pytest.approx(pka, abs=0.3)
        # the time curve itself is steepest on the ionised side of the pKa, within 1 unit
        # (tR is about linear in log k, whose inflection is shifted by drop/2)
        infl_rt = _inflection(FINE_PH, rt)
        assert 0.0 <= sign * (pka - infl_rt) <= 1.0


def test_trained_model_sigmoid_within_eluent_pka_shift(small_model, acid_base):
    # With the learned charge terms the apparent pKa may move as in real hydro-organic
    # eluents: carboxylic acids become weaker (pKa up, by up to about 1 unit at 20-40 %
    # acetonitrile), protonated amines slightly stronger acids (pKa down a little) (common
    # practice, from memory; retention-physics.md section 4). Direction and plateaus hold.
    sol, names = acid_base
    method = _method()
    k = _k(ph_scan(method, small_model, sol, names, FINE_PH), method)
    acid, base = k[:, 0], k[:, 1]
    assert acid[0] > 1.5 * acid[-1] and base[-1] > 1.5 * base[0]
    assert PKA_BENZOIC - 0.3 <= _inflection(FINE_PH, acid) <= PKA_BENZOIC + 1.0
    assert PKA_BENZYLAMINE - 1.0 <= _inflection(FINE_PH, base) <= PKA_BENZYLAMINE + 0.3
    for kk in (acid, base):  # sigmoid: flat ends (slope < 10 % of the steepest)
        d = np.abs(np.gradient(kk, FINE_PH))
        assert d[:10].max() < 0.1 * d.max() and d[-10:].max() < 0.1 * d.max()


def test_points_outside_column_ph_range_are_skipped(small_model, acid_base):
    sol, names = acid_base
    silica = dataclasses.replace(WIDE, ph_min=2.0, ph_max=8.0)  # silica C18 (common practice)
    res = ph_scan(_method(column=silica), small_model, sol, names, parse_range("1:10:0.5", "x"))
    assert res.values.min() >= 2.0 and res.values.max() <= 8.0
    np.testing.assert_allclose(res.skipped, [1.0, 1.5, 8.5, 9.0, 9.5, 10.0])
    assert res.rt_min.shape == (res.values.size, 2)
    assert any("outside the column's usable range" in w for w in res.warnings)


def test_unparseable_analyte_is_named_once_and_others_still_scan(small_model):
    # a broken SMILES (unclosed ring and branch) gets no parameters: it is reported by the
    # "could not be used" warning only, not again as an analyte that does not elute
    sol = featurise([BENZOIC_ACID, "C1CC(", BENZYLAMINE])
    names = ["benzoic acid", "broken", "benzylamine"]
    res = ph_scan(_method(), small_model, sol, names, parse_range("3:5:1", "x"))
    assert np.isfinite(res.rt_min[:, [0, 2]]).all() and np.isnan(res.rt_min[:, 1]).all()
    named = [w for w in res.warnings if "broken" in w]
    assert len(named) == 1 and "could not be used" in named[0]


def test_one_analyte_scan_says_there_is_no_pair(small_model):
    # one analyte: no resolution at any point, so no claim that pairs stay unresolved
    res = ph_scan(_method(), small_model, featurise([BENZOIC_ACID]), ["benzoic acid"],
                  parse_range("3:5:1", "x"))
    assert np.isfinite(res.rt_min).all() and not np.isfinite(res.min_resolution).any()
    lines = describe_scan(res)
    assert any("no pair to separate" in x for x in lines)
    assert not any("keeps every pair" in x for x in lines)


def test_fast_path_equals_model_and_prediction_path(small_model, demo_dir):
    from retpred.method import load_method

    method = load_method(demo_dir / "method.toml")
    demo = pd.read_csv(demo_dir / "analytes.csv")
    sol = featurise(demo["smiles"].tolist())
    names = demo["name"].tolist()
    ph = [2.5, 4.0, 6.9]
    ctxs = [dataclasses.replace(system_context(method), ph=p) for p in ph]
    lk, s, _ = retention_grid(small_model, sol, ctxs)
    res = ph_scan(method, small_model, sol, names, ph)
    for i, p in enumerate(ph):
        a, b = small_model.retention_parameters(sol, ctxs[i])
        np.testing.assert_allclose(lk[i], a, rtol=0, atol=1e-12)
        np.testing.assert_allclose(s, b, rtol=0, atol=1e-12)
        mp = dataclasses.replace(method.mobile_phase, ph=p)
        table = add_pairs(predict_solutes(prepare(dataclasses.replace(
            method, mobile_phase=mp), small_model), sol, names), small_model)
        np.testing.assert_allclose(res.rt_min[i], table["rt_min"].to_numpy(float), atol=1e-9)
        assert res.min_resolution[i] == pytest.approx(np.nanmin(table["resolution_next"]))


def test_fast_grid_carries_the_compound_memory(small_model, small_training_set):
    # structures of the training data have a compound-memory offset; the fast grid must add
    # it (and average the companion's terms) as the model's own path does, or every scan of
    # known compounds falls back to the slow path
    from retpred.scan import _fast_grid

    ts = small_training_set
    known = np.flatnonzero(small_model.known(ts.solutes))[:40]
    assert np.abs(small_model.memory_offsets(ts.solutes, known)).max() > 0.05
    ctxs = [dataclasses.replace(ts.contexts[0], ph=p) for p in (2.5, 4.5, 7.0)]
    grid = _fast_grid(small_model, ts.solutes, ctxs, known)
    for i, c in enumerate(ctxs):
        ref = small_model.retention_parameters(ts.solutes, c, idx=known)[0]
        np.testing.assert_allclose(grid[i, known], ref, rtol=0, atol=1e-9)


def test_scan_50_analytes_61_points_is_fast(small_model, open_data):
    # issue 6: 50 analytes x 61 pH points in under 10 s on one core (generous here: the
    # benchmark scripts/bench_scan.py measures it against a baseline)
    comp = pd.read_csv(open_data / "compounds.tsv.gz", sep="\t", usecols=["name", "smiles"])
    comp = comp.dropna().drop_duplicates("smiles").sample(50, random_state=7)
    method = _method(
        column=Column("C18", 100.0, 2.1, 1.7),
        program=((0.0, 5.0, 0.4), (10.0, 95.0, 0.4), (12.0, 95.0, 0.4)), dwell_ml=0.2)
    t = time.perf_counter()
    sol = featurise(comp["smiles"].tolist())
    res = ph_scan(method, small_model, sol, comp["name"].tolist(), parse_range("2:8:0.1", "x"))
    elapsed = time.perf_counter() - t
    assert res.rt_min.shape == (61, 50)
    assert elapsed < 10.0


# --- gradient time -------------------------------------------------------------------------


def test_stretch_ramp_rule():
    m = _method(program=((0.0, 5.0, 0.4), (0.5, 5.0, 0.4), (10.0, 95.0, 0.4), (12.0, 95.0, 0.4)))
    rows = stretch_ramp(m, 20.0).gradient.program
    # hand arithmetic: the hold stays, the ramp lasts 20 min, the wash keeps its 2 min
    assert [r[:2] for r in rows] == [(0.0, 5.0), (0.5, 5.0), (20.5, 95.0), (22.5, 95.0)]
    two_step = _method(program=((0.0, 10.0, 1.0), (5.0, 40.0, 1.0), (10.0, 90.0, 1.0)))
    rows = stretch_ramp(two_step, 20.0).gradient.program
    assert [r[:2] for r in rows] == [(0.0, 10.0), (10.0, 40.0), (20.0, 90.0)]
    with pytest.raises(MethodError):
        stretch_ramp(_method(), 10.0)  # isocratic: nothing to stretch


def test_gradient_time_scan_matches_lss_closed_form(small_model):
    # one linear ramp 5-95 % B from t = 0, no dwell volume, strongly retained solutes:
    # tR = (t0 / b) log10(2.3 k0 b + 1) + t0, b = S dphi t0 / tG (Snyder and Dolan 2007)
    method = _method(program=((0.0, 5.0, 1.0), (10.0, 95.0, 1.0), (40.0, 95.0, 1.0)),
                     dwell_ml=0.0, ph=3.0)
    smiles = ["CCCCc1ccccc1", "c1ccc2ccccc2c1", "Clc1ccc(Cl)cc1"]
    sol = featurise(smiles)
    tg = np.array([5.0, 10.0, 20.0, 30.0])
    res = gradient_time_scan(method, small_model, sol, smiles, tg)
    ctx = system_context(method)
    lkw, s = small_model.retention_parameters(sol, ctx)
    t0 = _t0(method)
    k0 = 10.0 ** (lkw - s * 0.05)
    for i, t in enumerate(tg):
        b = s * 0.90 * t0 / t
        expected = t0 / b * np.log10(2.3 * k0 * b + 1.0) + t0
        assert np.all(expected - t0 < t)  # elutes during the ramp (the closed form's domain)
        np.testing.assert_allclose(res.rt_min[i], expected, rtol=2e-3)
    # longer gradients: later peaks and more peak capacity (common practice)
    assert np.all(np.diff(res.rt_min, axis=0) > 0)
    assert np.all(np.diff(res.peak_capacity) > 0)
    # the best ramp: the shortest that meets the target, else the most resolving one
    ok = res.min_resolution >= res.rs_target
    if ok.any():
        assert res.best_index == np.flatnonzero(ok)[0]
        assert "the shortest run with every pair" in describe_scan(res)[0]
    else:
        assert res.best_index == int(np.nanargmax(res.min_resolution))


def test_joint_ph_gradient_scan_agrees_with_the_one_lever_scans(small_model, acid_base,
                                                                monkeypatch):
    # two code paths: the joint scan runs a pH scan per stretched ramp; gradient_time_scan
    # computes retention once at the method's pH and builds one program per ramp. At the
    # method's pH (7.0, a grid point) their times must be the same numbers.
    sol, names = acid_base
    method = _method(program=((0.0, 5.0, 1.0), (10.0, 95.0, 1.0), (14.0, 95.0, 1.0)))
    ph = parse_range("3:9:1", "--ph")
    ramps = np.array([5.0, 10.0, 20.0])
    calls = []
    real_grid = scan_module.retention_grid

    def counted(*args, **kwargs):
        calls.append(1)
        return real_grid(*args, **kwargs)

    monkeypatch.setattr(scan_module, "retention_grid", counted)
    joint = ph_gradient_scan(method, small_model, sol, names, ph, ramps)
    # retention does not depend on the ramp: one grid serves the whole map
    assert len(calls) == 1
    one = gradient_time_scan(method, small_model, sol, names, ramps)
    at7 = int(np.flatnonzero(ph == 7.0)[0])
    for i in range(ramps.size):
        np.testing.assert_allclose(joint.scans[i].rt_min[at7], one.rt_min[i], rtol=1e-9)
    # and each ramp's row is the pH scan of the stretched method, at its own best pH
    for i, ramp in enumerate(ramps):
        alone = ph_scan(stretch_ramp(method, ramp), small_model, sol, names, ph)
        row = joint.summary.iloc[i]
        assert row.best_ph == alone.best_value
        assert row.min_resolution == pytest.approx(alone.best_min_resolution)
    assert joint.summary["best"].sum() == 1
    long, per = joint_scan_frames(joint)
    assert len(long) == ramps.size * ph.size * len(names)
    assert per["best"].sum() == 1
    chosen = per[per.best].iloc[0]
    assert chosen.gradient_time_min == joint.ramps_min[joint.best_ramp_index]
    # one analyte: nothing to separate, and no setting or buffer is recommended
    lone = ph_gradient_scan(method, small_model, featurise([BENZOIC_ACID]), ["benzoic acid"],
                            ph, ramps)
    assert lone.suggestion == "fewer than two analytes elute at any setting: no pair to separate"


def test_best_ramp_is_the_shortest_run_that_resolves_all_pairs():
    # hand example: ramps 5-20 min, each at its best pH
    summary = pd.DataFrame({
        "gradient_time_min": [5.0, 10.0, 15.0, 20.0],
        "best_ph": [3.0, 3.0, 6.5, 3.0],
        "min_resolution": [1.2, 1.6, 2.4, 2.2],
        "last_rt_min": [6.0, 9.0, 12.0, 15.0],
        "ph_margin": [np.nan, 0.5, 1.0, 0.75],  # pH to the ends of the best pH's window
    })
    assert _best_ramp(summary, 1.5) == 1  # 10 min: the first to reach 1.5
    assert _best_ramp(summary, 2.0) == 2  # 15 min, not the 20 min ramp with a later peak
    assert _best_ramp(summary, 3.0) == 2  # none reaches 3: the largest smallest Rs
    # a shorter ramp that reaches the target at a single pH point (margin 0) gives way to
    # the shortest one with +/- 0.2 pH to spare
    fragile = summary.assign(ph_margin=[np.nan, 0.0, 1.0, 0.75])
    assert _best_ramp(fragile, 1.5) == 2
    # none with a margin: the shortest run at the target all the same
    assert _best_ramp(fragile.assign(ph_margin=[np.nan, 0.0, 0.1, 0.0]), 1.5) == 1


# --- pressure and efficiency ---------------------------------------------------------------


def test_pressure_report_worked_examples_and_particle_scaling():
    # 150 x 4.6 mm, 5 um, 1 mL/min, 50:50 water/acetonitrile, 25 C: about 45-150 bar for
    # the column (common practice; tests/test_column.py uses the same range)
    iso = _method(column=Column("C18", 150.0, 4.6, 5.0), program=((0.0, 50.0, 1.0),),
                  temperature_c=25.0)
    p = pressure_report(iso)
    assert 45.0 <= p["max_pressure_bar"] <= 150.0
    assert p["warning"] is None and p["limit_bar"] == 400.0  # HPLC pump rating (practice)
    # 50 x 2.1 mm, 1.7 um, 0.5 mL/min, 5-95 % acetonitrile: several hundred bar (practice)
    uhplc_col = Column("C18", 50.0, 2.1, 1.7)
    grad = ((0.0, 5.0, 0.5), (5.0, 95.0, 0.5), (6.0, 95.0, 0.5))
    pu = pressure_report(_method(column=uhplc_col, program=grad, dwell_ml=0.2,
                                 max_pressure_bar=1000.0))
    assert 250.0 <= pu["max_pressure_bar"] <= 1000.0
    # halving the particle size quadruples the pressure (Darcy: dP ~ 1 / dp^2)
    half = _method(column=dataclasses.replace(uhplc_col, particle_um=0.85), program=grad,
                   dwell_ml=0.2, max_pressure_bar=1000.0)
    ph_ = pressure_report(half)
    assert ph_["max_pressure_bar"] / pu["max_pressure_bar"] == pytest.approx(4.0, rel=0.01)
    assert ph_["over_limit"] and "exceeds" in ph_["warning"]


def test_scan_warns_above_instrument_limit(small_model, acid_base):
    # a 1.7 um, 150 mm column at 0.6 mL/min on a 400 bar pump: well above its rating
    sol, names = acid_base
    m = _method(column=dataclasses.replace(WIDE, inner_diameter_mm=2.1, particle_um=1.7),
                program=((0.0, 5.0, 0.6), (10.0, 95.0, 0.6)), dwell_ml=0.2,
                max_pressure_bar=400.0)
    res = ph_scan(m, small_model, sol, names, [3.0, 7.0])
    assert res.pressure["over_limit"]
    assert any("exceeds the instrument limit" in w for w in res.warnings)


# --- buffers -------------------------------------------------------------------------------


def test_buffers_for_ph():
    names = lambda ph: [o.name.split(" ")[0] for o in buffers_for_ph(ph)]  # noqa: E731
    # acetate pKa 4.76, formate 3.75, phosphate 2.15/7.20 (CRC Handbook, from memory)
    acetate = next(o for o in buffers_for_ph(4.76) if o.name.startswith("acetate"))
    assert acetate.pka == pytest.approx(4.76) and acetate.distance_ph < 1e-9
    assert "citrate" in names(4.76)  # citrate pKa2 4.76 as well (CRC Handbook, from memory)
    assert "phosphate" in names(7.0) and "formate" not in names(7.0)
    assert "ammonium" in names(9.5) and "phosphate" not in names(9.5)
    assert "trifluoroacetic" in names(2.0)  # 0.1 % TFA gives about pH 2 (common practice)
    for ph in np.arange(2.0, 11.01, 0.25):
        for o in buffers_for_ph(float(ph)):
            assert o.distance_ph <= 1.0 + 1e-9  # buffer range pKa +- 1 (common practice)
    phosphate = next(o for o in buffers_for_ph(7.0) if o.name == "phosphate")
    assert not phosphate.volatile and not phosphate.ms_compatible  # common practice
    assert all(o.ms_compatible for o in buffers_for_ph(3.75) if o.name.startswith("formate"))


# --- resolution map, phases, output --------------------------------------------------------


def test_robust_windows_hand_example():
    x = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0])
    rs = np.array([1.0, 2.0, 2.0, 1.0, 1.6, np.nan])
    assert robust_windows(x, rs, 1.5) == [(2.0, 3.0), (5.0, 5.0)]
    assert robust_windows(x, rs, 2.5) == []


def test_best_ph_is_the_middle_of_the_plateau_not_its_edge():
    # hand example: Rs 2.25 at pH 2 (the scan's and column's edge) and 2.24 over pH 2.5-4;
    # all within 5 % of the top, so the middle of 2-4 is taken, not the edge (common
    # practice: work where a small pH error costs nothing)
    ph = np.arange(2.0, 6.01, 0.5)
    rs = np.array([2.25, 2.24, 2.238, 2.24, 2.243, 1.2, 0.4, 1.7, 0.7])
    run = np.full(ph.size, 10.0)
    assert ph[_best(rs, run, ph)] == 3.0
    assert _best(rs, run) == 0  # without values (gradient time): the largest Rs
    # an isolated top point more than 5 % above the plateau wins
    rs2 = rs.copy()
    rs2[7] = 2.5
    assert ph[_best(rs2, run, ph)] == 5.5
    # a skipped point (gap before pH 3.5) breaks the plateau: 2-3 and 3.5-4 are two runs;
    # their middles (2.5 and 3.5/4 at margin 0.5/0) -> pH 2.5, margin 0.5
    gaps = np.zeros(ph.size, dtype=bool)
    gaps[3] = True
    assert ph[_best(rs, run, ph, gaps)] == 2.5
    # equal margins: the larger Rs, then the shorter run
    # (two runs, 2.5-3.5 and 4.5-5.5, middles pH 3 and 5 at margin 0.5 each)
    rs3 = np.array([1.0, 2.0, 2.0, 2.0, 1.0, 2.0, 2.01, 2.0, 1.0])
    assert ph[_best(rs3, run, ph)] == 5.0
    rs3[2] = 2.01
    run3 = run.copy()
    run3[2] = 8.0
    assert ph[_best(rs3, run3, ph)] == 3.0
    # equal margins at the column's limit: the point inside it is taken over the one at
    # it, though its Rs is smaller (a two-point plateau at pH 2-2.25 of a column rated
    # 2-8; work inside the rated range, common practice, from memory)
    ph4 = np.array([2.0, 2.25, 2.5, 2.75, 3.0])
    rs4 = np.array([1.84, 1.80, 1.70, 1.73, 1.72])
    run4 = np.full(ph4.size, 10.0)
    assert ph4[_best(rs4, run4, ph4)] == 2.0  # without the limits: the larger Rs
    assert ph4[_best(rs4, run4, ph4, limits=(2.0, 8.0))] == 2.25
    # beyond PH_LIMIT_CLEARANCE the distance to the limits no longer counts (rs3 again)
    # (pH 3 is 1 unit inside, pH 5 is 3 units inside: both count as 0.5)
    assert ph[_best(rs3, run3, ph, limits=(2.0, 8.0))] == 3.0


@settings(max_examples=200, deadline=None)
@given(st.lists(st.one_of(st.floats(0.0, 5.0), st.just(float("nan"))), min_size=1,
                max_size=25))
def test_best_ph_rule_holds_for_any_resolution_map(rs_list):
    # the rule as README states it: the chosen pH is within 5 % of the largest smallest Rs
    # (0.01 at least), and no candidate lies deeper inside a run of candidates
    rs = np.array(rs_list)
    ph = np.round(2.0 + 0.25 * np.arange(rs.size), 2)
    run = np.full(rs.size, 10.0)
    i = _best(rs, run, ph)
    assert 0 <= i < rs.size
    if not np.isfinite(rs).any():
        return
    top = np.nanmax(rs)
    floor = top - max(0.01, 0.05 * top)
    good = np.isfinite(rs) & (rs >= floor)
    assert good[i]

    def depth(j):  # distance to the ends of j's run of consecutive candidates
        lo = hi = j
        while lo > 0 and good[lo - 1]:
            lo -= 1
        while hi < rs.size - 1 and good[hi + 1]:
            hi += 1
        return min(ph[j] - ph[lo], ph[hi] - ph[j])

    assert depth(i) >= max(depth(j) for j in np.flatnonzero(good)) - 1e-9


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.floats(0.0, 4.0), st.floats(1.0, 60.0)), min_size=1,
                max_size=15), st.floats(0.5, 3.0))
def test_best_ramp_rule_holds_for_any_scan(points, target):
    # README's rule: the shortest run among the points at the target; if none, the
    # largest smallest Rs (ties within 0.01: the shorter run)
    rs = np.array([p[0] for p in points])
    run = np.array([p[1] for p in points])
    i = _best(rs, run, rs_target=target)
    ok = rs >= target
    if ok.any():
        assert ok[i] and run[i] == run[ok].min()
    else:
        assert rs[i] >= rs.max() - 0.01
        assert run[i] == run[rs >= rs.max() - 0.01].min()


def test_best_gradient_time_is_the_shortest_run_that_meets_the_target():
    # common practice: the shortest ramp that resolves every pair, not the longest scanned
    tg = np.arange(5.0, 41.0, 5.0)
    rs = np.array([1.27, 1.78, 2.06, 2.24, 2.36, 2.44, 2.50, 2.55])
    run = tg * 0.6 + 4.0
    assert tg[_best(rs, run, rs_target=1.5)] == 10.0
    assert tg[_best(rs, run, rs_target=2.3)] == 25.0
    # no point reaches the target: the largest smallest Rs
    assert tg[_best(rs, run, rs_target=3.0)] == 40.0


def test_windows_text_names_single_points():
    # a window of one scan point is not a range; the text must say so, not print "2-4; 6"
    assert _windows_text([(2.0, 4.0), (6.0, 6.0)]) == "2-4 and 6 (one point)"
    assert _windows_text([(2.0, 3.0), (4.5, 5.0), (7.0, 7.0)]) == "2-3, 4.5-5 and 7 (one point)"
    assert _windows_text([(3.0, 5.0)]) == "3-5"
    assert _windows_text([]) == ""


def test_phase_scan_c18_retains_longer_and_own_hsm_column(small_model):
    # C18 retains a non-polar analyte longer than C8 (retention-physics.md section 7)
    from retpred.column import class_hsm

    smiles = ["CCCCc1ccccc1", "c1ccc2ccccc2c1", "OC(=O)c1ccccc1", "NCc1ccccc1"]
    sol = featurise(smiles)
    method = _method(column=dataclasses.replace(WIDE, ph_min=2.0, ph_max=8.0),
                     program=((0.0, 5.0, 1.0), (15.0, 95.0, 1.0), (18.0, 95.0, 1.0)))
    own = dataclasses.replace(method.column, hsm=class_hsm("C18"))  # same numbers as C18
    res = phase_ph_scan(method, small_model, sol, smiles, parse_range("2:8:0.5", "x"),
                        phases=["C18", "C8"], extra_columns={"my column": own})
    assert np.all(res.scans["C18"].rt_min[:, 0] > res.scans["C8"].rt_min[:, 0])
    np.testing.assert_allclose(res.scans["my column"].rt_min, res.scans["C18"].rt_min)
    top = res.summary.iloc[0]
    assert res.suggestion.startswith(f"{top.phase} at pH {top.best_ph:g}")
    assert ("resolves all pairs" in res.suggestion) == (top.n_unresolved == 0)


def test_frames_and_plot(small_model, acid_base, tmp_path):
    sol, names = acid_base
    res = ph_scan(_method(), small_model, sol, names, parse_range("3:9:1", "x"))
    long = scan_to_frame(res)
    assert len(long) == 7 * 2 and set(long["analyte"]) == set(names)
    summ = scan_summary_frame(res)
    assert summ["best"].sum() == 1
    for lo, hi in res.robust_windows:
        inside = summ[(summ.value >= lo) & (summ.value <= hi)]
        assert (inside.min_resolution >= 1.5).all() and inside.in_robust_window.all()
    out = tmp_path / "scan.png"
    plot_scan(res, out)
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with pytest.raises(InputError):
        plot_scan(res, out)  # exists, no force


def test_parse_range():
    assert parse_range("2:8:0.1", "--ph").size == 61
    np.testing.assert_allclose(parse_range("5:60:5", "--gradient-time"), np.arange(5, 61, 5))
    for bad in ("2:8:0", "8:2:1", "a:b:c", "2:8", ""):
        with pytest.raises(InputError, match="--ph"):
            parse_range(bad, "--ph", 0.0, 14.0)
    with pytest.raises(InputError):
        parse_range("1:15:1", "--ph", 0.0, 14.0)


def test_retention_grid_falls_back_when_model_differs(small_model, acid_base):
    # a model whose retention_parameters adds a term the fast path does not know about:
    # the self-check must notice and use the model's own (batched) call
    class Shifted(type(small_model)):
        def retention_parameters(self, solutes, ctx, which=None, idx=None):
            lk, s = super().retention_parameters(solutes, ctx, which=which, idx=idx)
            ph = ctx.ph if not isinstance(ctx, list) else np.array([c.ph for c in ctx])[which]
            return lk + 0.01 * ph, s

    shifted = Shifted(**{f.name: getattr(small_model, f.name)
                         for f in dataclasses.fields(small_model)})
    sol, _ = acid_base
    ctxs = [SystemContext("acetonitrile", p, 30.0, column_hsm(WIDE)) for p in (3.0, 5.0, 9.0)]
    lk, _, _ = retention_grid(shifted, sol, ctxs)
    for i, c in enumerate(ctxs):
        np.testing.assert_allclose(lk[i], shifted.retention_parameters(sol, c)[0], atol=1e-12)


@pytest.fixture(scope="module")
def monoprotic_reference():
    """Compounds of datasets/reference/pka_reference.tsv with a single tabulated site that
    the chemistry layer also sees as its only ionisable site, and their featurised batch."""
    ref = pd.read_csv("datasets/reference/pka_reference.tsv", sep="\t", comment="#")
    one = ref.groupby("name").filter(lambda g: len(g) == 1).reset_index(drop=True)
    sol = featurise(one["smiles"].tolist())
    keep = np.isfinite(sol.sites.pka).sum(axis=1) == 1
    return one[keep].reset_index(drop=True), sol, keep


@pytest.mark.parametrize("organic", ["acetonitrile", "methanol"])
def test_trained_retention_falls_as_a_site_ionises(small_model, monoprotic_reference, organic):
    # Species-weighted retention k = f0 k_n + (1 - f0) k_ion with k_ion < k_n (the ion is
    # the more polar species; retention-physics.md section 4): as the pH rises an acid's
    # log kw must not rise and a base's must not fall. Checked for every single-site
    # compound of the pKa reference table (values from memory of standard compilations),
    # lipophilic acids included (ridge terms in the ionised fraction and in charge x log P
    # once broke this, e.g. for pentachlorophenol).
    ref, sol, keep = monoprotic_reference
    ph = np.round(np.arange(1.0, 12.5 + 1e-9, 0.1), 2)
    hsm = column_hsm(WIDE)
    contexts = [SystemContext(organic=organic, ph=float(p), temperature_c=30.0, hsm=hsm)
                for p in ph]
    log_kw = retention_grid(small_model, sol, contexts)[0][:, keep]
    acid = (ref["kind"] == "acid").to_numpy()
    assert acid.sum() >= 10 and (~acid).sum() >= 10
    # tolerance 0.01 log units over the whole curve (2 % in k, far below the model's error)
    tol = 0.01
    # an acid's log kw may not climb above its running minimum, a base's not drop below
    # its running maximum
    bad_acids = ref["name"][acid & ((log_kw - np.minimum.accumulate(log_kw, axis=0))
                                    .max(axis=0) > tol)].tolist()
    bad_bases = ref["name"][~acid & ((np.maximum.accumulate(log_kw, axis=0) - log_kw)
                                     .max(axis=0) > tol)].tolist()
    assert not bad_acids and not bad_bases, (bad_acids, bad_bases)
    # and the ionisation is felt where the site fully changes state within pH 1-12.5
    # (tabulated pKa 3-10.5): each falls/rises by more than 0.15 log units
    total = log_kw[-1] - log_kw[0]
    inside = ref["pka"].between(3.0, 10.5).to_numpy()
    assert inside.sum() >= 20
    assert np.all(total[acid & inside] < -0.15) and np.all(total[~acid & inside] > 0.15)


def test_calibrated_scan_warns_where_analytes_leave_the_calibrants_window(small_model):
    # Benzoic acid (pKa 4.20, CRC Handbook, from memory) elutes earlier as it ionises
    # (Henderson-Hasselbalch, retention-physics.md section 4). With a calibration whose
    # standards bracket its neutral time, the coverage warning (predict's 10 % rule) must
    # name only the points above about its pKa, up to the top of the scan.
    from retpred.calibration import Calibration, CalibrationMap

    method = _method(program=((0.0, 5.0, 1.0), (20.0, 95.0, 1.0), (25.0, 95.0, 1.0)), ph=2.5)
    sol = featurise([BENZOIC_ACID])
    plain = ph_scan(method, small_model, sol, ["benzoic acid"], [2.5])
    t_neutral = float(plain.rt_min[0, 0])
    cal = Calibration(maps=(CalibrationMap(kind="shift", offset=0.0),),
                      cal_rt_range_min=(t_neutral - 0.5, t_neutral + 0.5))
    ph = np.round(np.arange(2.0, 8.01, 0.25), 2)
    res = ph_scan(method, small_model, sol, ["benzoic acid"], ph, calibration=cal)
    np.testing.assert_allclose(res.rt_min[ph == 2.5, 0], t_neutral, atol=1e-9)  # identity map
    out = (res.rt_min[:, 0] < t_neutral - 0.6) | (res.rt_min[:, 0] > t_neutral + 0.6)
    assert out.any() and not out.all()
    flagged = ph[out]
    assert flagged.min() > PKA_BENZOIC - 0.5 and flagged.max() == ph.max()
    warn = [w for w in res.warnings if "calibrants cover" in w]
    assert len(warn) == 1
    assert (f"1 analyte(s) are predicted outside that window at {out.sum()} of {ph.size} pH "
            f"points (pH {flagged.min():g}-{flagged.max():g})") in warn[0]
    # inside the window at every point: no warning
    wide = dataclasses.replace(cal, cal_rt_range_min=(0.0, 60.0))
    res = ph_scan(method, small_model, sol, ["benzoic acid"], ph, calibration=wide)
    assert not any("calibrants cover" in w for w in res.warnings)
    # a ramp scan keeps log kw: judged once, on the method's own gradient
    narrow = dataclasses.replace(cal, cal_rt_range_min=(t_neutral + 2.0, t_neutral + 4.0))
    for c, expected in ((cal, False), (narrow, True)):
        res = gradient_time_scan(method, small_model, sol, ["benzoic acid"], [10.0, 20.0, 40.0],
                                 calibration=c)
        warn = [w for w in res.warnings if "calibrants cover" in w]
        assert bool(warn) == expected
        assert all("on the method's own gradient" in w for w in warn)
    # the pH x ramp map: the same points as the pH scan on the method's own gradient are
    # named, once per map, whatever the other ramps do to the times
    joint = ph_gradient_scan(method, small_model, sol, ["benzoic acid"], ph, [10.0, 40.0],
                             calibration=cal)
    for r in joint.scans:
        warn = [w for w in r.warnings if "calibrants cover" in w]
        assert warn == [f"calibrants cover {t_neutral - 0.5:.2f}-{t_neutral + 0.5:.2f} min; "
                        f"1 analyte(s) are predicted outside that window at {out.sum()} of "
                        f"{ph.size} pH points (pH {flagged.min():g}-{flagged.max():g}) on the "
                        "method's own gradient, where the correction is extrapolated"]
