"""Analytes that are also calibrants ("measured standards").

A chromatographer who has injected a standard knows its time on that method; a prediction
for the same structure must give that time back, whatever the correction did to the rest
of the list. The reference values here are the measured times given as input (the outside
truth these tests hold the tool to) and the LSS gradient relations of
retention-physics.md sections 2-3 (through ``retpred.gradient``, a separate code path from
the calibration). The times are invented (checks of plumbing and of the round trip, not of
accuracy).
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest

from retpred.calibration import Calibration, SoluteTraits, fit_calibration
from retpred.gradient import elute, log_kw_from_rt, program_from_method
from retpred.method import Gradient, conditions_differ, retention_conditions, run_key
from retpred.model import featurise
from retpred.predict import (
    STATUS_FROM_STANDARD,
    STATUS_MEASURED,
    calibrate,
    predict_frame,
    prepare,
)

CALIBRANTS = {  # structures only; the times below are invented
    "caffeine": "Cn1cnc2c1c(=O)n(C)c(=O)n2C",
    "phenol": "Oc1ccccc1",
    "acetophenone": "CC(=O)c1ccccc1",
    "toluene": "Cc1ccccc1",
    "naphthalene": "c1ccc2ccccc2c1",
    "ibuprofen": "CC(C)Cc1ccc(cc1)[C@@H](C)C(=O)O",  # one enantiomer
}
# off the model's prediction by different amounts, so that no map takes them exactly
OFFSETS_MIN = np.array([0.35, -0.20, 0.50, -0.30, 0.25, 0.40])


@pytest.fixture(scope="module")
def calibrated(prep):
    zero = predict_frame(prep, list(CALIBRANTS.values()), list(CALIBRANTS), with_pairs=False)
    rt = zero["rt_min"].to_numpy(float) + OFFSETS_MIN
    cal = calibrate(prep, list(CALIBRANTS.values()), rt, list(CALIBRANTS))
    return dataclasses.replace(prep, calibration=cal), dict(zip(CALIBRANTS, rt, strict=True))


def test_an_analyte_that_was_a_calibrant_gets_its_measured_time(calibrated):
    prep, measured = calibrated
    # drawn differently from the calibrants (atom order, ibuprofen without stereo marks: an
    # achiral column does not tell the enantiomers apart), mixed with two new analytes
    smiles = ["c1ccccc1C", "CC(C)Cc1ccc(C(C)C(=O)O)cc1", "CCc1ccccc1", "O=C(C)c1ccccc1",
              "Oc1ccc(Cl)cc1"]
    names = ["toluene", "ibuprofen", "ethylbenzene", "acetophenone", "4-chlorophenol"]
    got = predict_frame(prep, smiles, names).set_index("name")
    for n in ("toluene", "ibuprofen", "acetophenone"):
        assert got.loc[n, "rt_min"] == pytest.approx(measured[n], abs=1e-4)
        assert got.loc[n, "rt_low_min"] == got.loc[n, "rt_high_min"] == got.loc[n, "rt_min"]
        assert got.loc[n, "status"] == STATUS_MEASURED
    # the other analytes get what the correction alone gives them
    plain = dataclasses.replace(prep, calibration=dataclasses.replace(
        prep.calibration, standard_keys=(), standard_offsets=()))
    ref = predict_frame(plain, smiles, names).set_index("name")
    for n in ("ethylbenzene", "4-chlorophenol"):
        assert got.loc[n, "rt_min"] == ref.loc[n, "rt_min"]
        assert got.loc[n, "status"] == ref.loc[n, "status"] != STATUS_MEASURED
        assert got.loc[n, "rt_high_min"] > got.loc[n, "rt_low_min"]
    # without the stored standards the calibrants are not reproduced (the offsets are real)
    assert abs(ref.loc["acetophenone", "rt_min"] - measured["acetophenone"]) > 0.02


def test_replicate_injections_are_averaged_in_retention(prep):
    smiles = list(CALIBRANTS.values()) + [CALIBRANTS["toluene"]]
    zero = predict_frame(prep, smiles, list(CALIBRANTS) + ["toluene 2"], with_pairs=False)
    rt = zero["rt_min"].to_numpy(float) + np.r_[OFFSETS_MIN, 0.0]
    rt[-1] = rt[3] + 0.2  # a second injection of toluene, 0.2 min later
    cal = calibrate(prep, smiles, rt, list(CALIBRANTS) + ["toluene 2"])
    got = predict_frame(dataclasses.replace(prep, calibration=cal), ["Cc1ccccc1"], ["t"])
    # the mean of the two log kw (LSS: the time of the mean lies between the two times)
    s = got["s_lss"].to_numpy(float)
    lk = log_kw_from_rt(np.array([rt[3], rt[-1]]), np.r_[s, s], prep.program)
    want = elute(np.array([lk.mean()]), s, prep.program).rt_min[0]
    assert got["rt_min"].iloc[0] == pytest.approx(want, abs=1e-4)
    assert rt[3] < got["rt_min"].iloc[0] < rt[-1]


def test_on_another_gradient_the_measured_retention_is_carried(calibrated):
    prep, measured = calibrated
    m = prep.method
    g = m.gradient
    slower = dataclasses.replace(m, gradient=Gradient(
        flow_ml_min=g.flow_ml_min, dwell_volume_ml=g.dwell_volume_ml,
        program=tuple((t * 2.0, b, f) for t, b, f in g.program)))
    other = prepare(slower, prep.model, prep.calibration)
    assert run_key(slower) != run_key(m)
    got = predict_frame(other, [CALIBRANTS["naphthalene"], CALIBRANTS["caffeine"]],
                        ["naphthalene", "caffeine"]).set_index("name")
    # LSS (retention-physics.md sections 2-3): log kw read off the measured time on the
    # calibration's gradient, eluted on the doubled one
    s = got["s_lss"].to_numpy(float)
    lk = log_kw_from_rt(np.array([measured["naphthalene"], measured["caffeine"]]), s,
                        prep.program)
    want = elute(lk, s, program_from_method(slower, dead_time_min=other.t0_min)).rt_min
    np.testing.assert_allclose(got["rt_min"].to_numpy(float), want, rtol=0, atol=1e-4)
    assert (got["status"] == STATUS_FROM_STANDARD).all()
    assert (got["rt_high_min"] > got["rt_low_min"]).all()  # predicted, not measured


def test_validation_calibrations_carry_no_standards(prep):
    # the open-data validation scores analytes that are never its calibrants: its traits
    # have no keys, and nothing is stored
    sol = featurise(list(CALIBRANTS.values()))
    lk, s = prep.model.retention_parameters(sol, prep.context)
    rt = elute(lk, s, prep.program).rt_min + OFFSETS_MIN
    obs = log_kw_from_rt(rt, s, prep.program)

    def rt_of(x):
        return elute(x, s, prep.program).rt_min

    plain = fit_calibration(lk, obs, rt, rt_of, traits=SoluteTraits.of(sol, model=prep.model))
    keyed = fit_calibration(lk, obs, rt, rt_of,
                            traits=SoluteTraits.of(sol, model=prep.model, keys=True))
    assert plain.standard_keys == ()
    assert len(keyed.standard_keys) == len(CALIBRANTS)
    # the same maps either way
    assert [m.weight for m in plain.maps] == [m.weight for m in keyed.maps]


def test_calibration_file_keeps_standards_and_conditions(calibrated):
    prep, _ = calibrated
    cal = prep.calibration
    back = Calibration.from_json(cal.to_json())
    assert back.standard_keys == cal.standard_keys
    assert back.standard_offsets == pytest.approx(cal.standard_offsets)
    assert back.run_key == run_key(prep.method)
    assert back.cal_log_kw == pytest.approx(cal.cal_log_kw) and len(cal.cal_s) == len(CALIBRANTS)
    assert back.conditions == json.loads(json.dumps(retention_conditions(prep.method)))
    # a format-3 file (before standards and conditions were kept) still reads, without them
    d = json.loads(cal.to_json())
    for k in ("standard_keys", "standard_offsets", "conditions", "run_key", "cal_log_kw",
              "cal_s"):
        d.pop(k)
    d["format"] = 3
    old = Calibration.from_json(json.dumps(d))
    assert old.standard_keys == () and old.condition_mismatch(prep.method) is None
    assert old.on_program(prep.program).cal_rt_range_min == old.cal_rt_range_min
    # keys and offsets of unequal length are refused
    d = json.loads(cal.to_json())
    d["standard_offsets"] = d["standard_offsets"][:-1]
    from retpred.errors import InputError

    with pytest.raises(InputError, match="inconsistent"):
        Calibration.from_json(json.dumps(d))


def test_conditions_that_change_log_kw_are_named(calibrated):
    prep, _ = calibrated
    cal = prep.calibration
    m = prep.method
    mp = m.mobile_phase
    # the gradient, flow and dwell volume change times, not log kw: no warning
    g = dataclasses.replace(m.gradient, dwell_volume_ml=1.0, flow_ml_min=0.3)
    assert cal.condition_mismatch(dataclasses.replace(m, gradient=g)) is None
    other = dataclasses.replace(m, mobile_phase=dataclasses.replace(
        mp, ph=mp.ph + 2.0, organic="methanol"))
    assert conditions_differ(cal.conditions, other) == ["organic", "ph"]
    text = cal.condition_mismatch(other)
    assert f"pH {mp.ph:g} -> {mp.ph + 2.0:g}" in text and "acetonitrile -> methanol" in text
    # within 0.05 pH units (a buffer made up to 0.1; common practice) counts as the same
    near = dataclasses.replace(m, mobile_phase=dataclasses.replace(mp, ph=mp.ph + 0.04))
    assert cal.condition_mismatch(near) is None
    # a column given by its own HSM parameters is another column than the class median;
    # the same parameters read back from a file are the same column
    from retpred.column import column_hsm

    own = dataclasses.replace(m, column=dataclasses.replace(
        m.column, hsm=dataclasses.replace(column_hsm(m.column), H=1.1)))
    assert conditions_differ(cal.conditions, own) == ["hsm"]
    fitted = json.loads(json.dumps(retention_conditions(own)))
    assert conditions_differ(fitted, own) == []


def test_calibrants_window_follows_the_program(calibrated):
    prep, measured = calibrated
    cal = prep.calibration
    # on its own method the window is the measured times
    own = cal.on_program(prep.program).cal_rt_range_min
    assert own == pytest.approx((min(measured.values()), max(measured.values())), abs=1e-4)
    # on a gradient twice as long the window is where the standards now elute: the times
    # predict gives them as analytes there
    m = prep.method
    g = m.gradient
    slower = dataclasses.replace(m, gradient=Gradient(
        flow_ml_min=g.flow_ml_min, dwell_volume_ml=g.dwell_volume_ml,
        program=tuple((t * 2.0, b, f) for t, b, f in g.program)))
    other = prepare(slower, prep.model, cal.on_program(prepare(slower, prep.model).program))
    got = predict_frame(other, list(CALIBRANTS.values()), list(CALIBRANTS))
    rt = got["rt_min"].to_numpy(float)
    assert other.calibration.cal_rt_range_min == pytest.approx((rt.min(), rt.max()), abs=1e-4)
    assert "warnings" not in got.attrs
    # the window of the calibration's own times would have called most of them outside
    from retpred.calibration import coverage_warning

    assert coverage_warning(cal, rt) is not None


def test_lab_standard_offsets_follow_the_conditions():
    """The rule for a compound a lab measured under two conditions (our choice,
    DEVELOPERS.md "Measured standards"): under one of them its offset is that system's;
    under neither, the mean of the two. Offsets and records are invented."""
    from retpred.column import class_hsm
    from retpred.model import RetentionModel, SystemContext

    hsm = class_hsm("C18")
    model = RetentionModel(reference=hsm)

    def record(ph):
        return {"organic": "acetonitrile", "ph": ph, "temperature_c": 30.0,
                "hsm": list(dataclasses.astuple(hsm)), "summary": "", "run_key": f"r{ph}"}

    model.meta_ = {"lab_systems": [record(3.0), record(7.0)]}
    sol = featurise([CALIBRANTS["phenol"], CALIBRANTS["toluene"], CALIBRANTS["caffeine"]])
    keys = sol.memory_keys
    model.lab_standards_ = {"keys": [keys[0], keys[0], keys[1]], "systems": [0, 1, 1],
                            "offsets": [0.2, -0.4, 0.1]}

    def ctx(ph):
        return SystemContext(organic="acetonitrile", ph=ph, temperature_c=30.0, hsm=hsm)

    got = model.lab_standard_offsets(sol, np.arange(3), [ctx(3.0), ctx(7.02), ctx(5.0)],
                                     np.array([0, 1, 2]))
    assert got[0] == pytest.approx(0.2)  # phenol at pH 3: the pH-3 system's
    assert got[1] == pytest.approx(0.1)  # toluene at pH 7.02 (within 0.05): its own
    assert np.isnan(got[2])  # caffeine was never measured
    mixed = model.lab_standard_offsets(sol, np.arange(2), [ctx(5.0)], np.zeros(2, dtype=int))
    assert mixed[0] == pytest.approx(-0.1)  # neither pH: the mean of 0.2 and -0.4
    assert mixed[1] == pytest.approx(0.1)  # only one system: that one
    measured, own = model.lab_standard_runs(sol, "r7.0")
    assert measured.tolist() == [True, True, False] and own.tolist() == [True, True, False]
    measured, own = model.lab_standard_runs(sol, "r3.0")
    assert own.tolist() == [True, False, False]
