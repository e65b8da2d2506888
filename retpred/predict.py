"""The prediction path: analytes + method -> one table row per analyte.

SMILES (or SDF molecules) -> standardised parents -> descriptors and ionisation at the
method pH -> ``log kw``, ``S`` on the method's column -> optional calibration -> gradient
engine -> peak widths (Knox/Wilke-Chang plates) -> neighbour resolution and co-elution risk.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from retpred.calibration import Calibration, SoluteTraits, coverage_warning, fit_calibration
from retpred.chemistry import ionise, log_d
from retpred.column import column_hsm, dead_time_min, plate_number
from retpred.gradient import STATUS_OK, ElutionProgram, elute, log_kw_from_rt, program_from_method
from retpred.method import Method, retention_conditions, run_key
from retpred.model import RetentionModel, Solutes, SystemContext, featurise
from retpred.peaks import (
    any_coelution_probability,
    neighbour_pairs,
    peak_sigma_min,
    recalibrate_risk,
    time_error_sd_min,
)

STATUS_OUTSIDE_DOMAIN = "outside training domain (estimate less certain)"
#: an analyte that is one of the calibrants, predicted on the calibrants' own method
STATUS_MEASURED = "measured standard"
#: the same on another method: retention from its measured log kw, time predicted
STATUS_FROM_STANDARD = "retention from measured standard"

#: Nominal coverage of the prediction interval [rt_low_min, rt_high_min].
INTERVAL_COVERAGE = 0.90

OUTPUT_COLUMNS = (
    "name", "smiles", "status", "rt_min", "rt_low_min", "rt_high_min", "elution_order",
    "peak_width_min", "resolution_next", "coelution_risk", "coelutes_with", "logp", "logd",
    "charge", "species", "log_kw", "s_lss", "standardised_smiles", "changes",
    "in_training_data",
)


def system_context(method: Method, hsm=None) -> SystemContext:
    return SystemContext(
        organic=method.mobile_phase.organic,
        ph=method.ph,
        temperature_c=method.temperature_c,
        hsm=hsm if hsm is not None else column_hsm(method.column),
    )


@dataclass
class Prepared:
    """Method-level state computed once per run."""

    method: Method
    model: RetentionModel
    context: SystemContext
    program: ElutionProgram
    calibration: Calibration | None
    t0_min: float


def prepare(method: Method, model: RetentionModel, calibration: Calibration | None = None,
            hsm=None) -> Prepared:
    t0 = method.column.dead_time_min
    if t0 is None:
        t0 = dead_time_min(method.column, method.phi_program()[2][0])
    return Prepared(
        method=method, model=model, context=system_context(method, hsm),
        program=program_from_method(method, dead_time_min=t0), calibration=calibration,
        t0_min=t0,
    )


def _quantiles(model: RetentionModel, calibrated: bool,
               known: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-row interval quantiles (phi units): those of structures new to the training data
    (``<key>_new``, wider) where ``known`` is False and the model has them, else the pooled."""
    key = "calibrated" if calibrated else "zero_shot"
    rq = model.residual_quantiles_
    q = rq.get(key) or rq.get("zero_shot") or (-0.1, 0.1)
    q_new = rq.get(f"{key}_new") or q
    lo = np.where(known, float(q[0]), float(q_new[0]))
    hi = np.where(known, float(q[1]), float(q_new[1]))
    return lo, hi


def retention(prep: Prepared, solutes: Solutes) -> tuple[np.ndarray, np.ndarray, np.ndarray,
                                                         np.ndarray]:
    """Calibrated ``(log kw, S)`` of a batch on the prepared method; which rows are measured
    standards (of the calibration, :meth:`Calibration.measured`, or of a lab model,
    :meth:`RetentionModel.lab_standard_runs`); and which of those were measured on this
    very run (their time is then the measurement itself)."""
    log_kw, s = prep.model.retention_parameters(solutes, prep.context)
    this_run = run_key(prep.method)
    measured, own_run = prep.model.lab_standard_runs(solutes, this_run)
    if prep.calibration is not None:
        traits = SoluteTraits.of(solutes, model=prep.model, keys=True)
        log_kw = prep.calibration.apply(log_kw, traits)
        cal_std = prep.calibration.measured(traits)
        # the calibration's map moves a lab standard that is not one of its own standards
        own_run = cal_std if prep.calibration.run_key == this_run else np.zeros_like(cal_std)
        measured = measured | cal_std
    return log_kw, s, measured, own_run


def predict_solutes(
    prep: Prepared, solutes: Solutes, names: Sequence[str], read_errors=None
) -> pd.DataFrame:
    """Per-analyte rows (without the pair columns; see :func:`add_pairs`)."""
    n = len(solutes)
    log_kw, s, measured, own_run = retention(prep, solutes)
    el = elute(log_kw, s, prep.program)
    known = prep.model.known(solutes)
    q_lo, q_hi = _quantiles(prep.model, prep.calibration is not None, known)
    # a measured standard on the very method it was run on: its time is the measurement
    # (the interval collapses to it; its repeatability is not modelled)
    q_lo, q_hi = np.where(own_run, 0.0, q_lo), np.where(own_run, 0.0, q_hi)
    # interval: quantiles of held-out errors in elution-composition units (log kw / S)
    rt_lo = elute(log_kw + q_lo * s, s, prep.program).rt_min
    rt_hi = elute(log_kw + q_hi * s, s, prep.program).rt_min

    m = prep.method
    flow0 = m.phi_program()[2][0]
    plates = plate_number(
        m.column, flow0, np.nan_to_num(el.phi_elution, nan=0.5), m.mobile_phase.organic,
        m.temperature_c, np.nan_to_num(solutes.mw, nan=300.0),
    )
    sigma = peak_sigma_min(prep.t0_min, el.k_elution, plates)
    ion = ionise(solutes.sites, m.ph)
    logp = solutes.logp
    logd = log_d(logp, ion)

    far = prep.model.outside_domain(solutes)
    status = []
    for i in range(n):
        parts = []
        if read_errors is not None and read_errors[i]:
            parts.append(str(read_errors[i]))
        elif not solutes.usable[i]:
            parts.append(solutes.batch.status[i])
        else:
            if solutes.batch.status[i] != "ok":
                parts.append(solutes.batch.status[i])
            if own_run[i]:
                parts.append(STATUS_MEASURED)
            elif measured[i]:
                parts.append(STATUS_FROM_STANDARD)
            elif far[i]:
                parts.append(STATUS_OUTSIDE_DOMAIN)
            if el.status[i] != STATUS_OK:
                parts.append(str(el.status[i]))
        status.append("; ".join(parts) if parts else "ok")
    usable = solutes.usable & np.isfinite(el.rt_min)
    if read_errors is not None:
        usable &= np.array([not e for e in read_errors], dtype=bool)

    def mask(a):
        return np.where(usable, a, np.nan)

    return pd.DataFrame(
        {
            "name": list(names),
            "smiles": None,  # filled by caller with the input text
            "status": status,
            "rt_min": mask(el.rt_min),
            "rt_low_min": mask(rt_lo),
            "rt_high_min": mask(rt_hi),
            "elution_order": pd.array([pd.NA] * n, dtype="Int64"),
            "peak_width_min": mask(4.0 * sigma),
            "resolution_next": np.nan,
            "coelution_risk": np.nan,
            "coelutes_with": "",
            "logp": np.where(solutes.usable, logp, np.nan),
            "logd": np.where(solutes.usable, logd, np.nan),
            "charge": np.where(solutes.usable, ion.net_charge, np.nan),
            "species": np.where(solutes.usable, ion.species, ""),
            "log_kw": np.where(solutes.usable, log_kw, np.nan),
            "s_lss": np.where(solutes.usable, s, np.nan),
            "standardised_smiles": solutes.batch.smiles,
            "changes": solutes.batch.changes,
            "in_training_data": known,
        }
    )


def add_pairs(table: pd.DataFrame, model: RetentionModel,
              calibrated: bool = False) -> pd.DataFrame:
    """Elution order, resolution to the next peak and co-elution risk over the whole list.

    The time-error sd of each analyte comes from its 90 % interval (half-width / 1.645);
    neighbours' errors are correlated (``rho`` measured on held-out systems), which makes
    their spacing more certain than the times themselves. ``coelution_risk`` is the
    probability that the analyte is not resolved (Rs < 1.5) from at least one other analyte
    of the list (:func:`retpred.peaks.any_coelution_probability`, recalibrated);
    ``coelutes_with`` names the neighbours whose pair risk is at least 0.5 or whose
    predicted Rs is under 1.5. ``calibrated``: the times were corrected with calibrants (the
    sd scales and the recalibration of that regime are used; all are fitted on left-out
    systems, model card).
    """
    rt = table["rt_min"].to_numpy(dtype=float)
    sigma = table["peak_width_min"].to_numpy(dtype=float) / 4.0
    rho = float(model.residual_sd_.get("neighbour_rho", 0.0))
    sd = time_error_sd_min(rt, table["rt_low_min"], table["rt_high_min"])
    pairs = neighbour_pairs(rt, sigma, table["name"].astype(str).tolist(),
                            model.pair_sd_scale(calibrated) * sd, rho=rho)
    scale, a, b = model.analyte_risk_params(calibrated)
    risk = recalibrate_risk(any_coelution_probability(rt, sigma, scale * sd, rho), a, b)
    out = table.copy()
    order = np.full(len(out), -1)
    order[pairs.order] = np.arange(1, pairs.order.size + 1)
    out["elution_order"] = pd.array(np.where(order > 0, order, 0), dtype="Int64")
    out.loc[order <= 0, "elution_order"] = pd.NA
    out["resolution_next"] = pairs.resolution_next
    out["coelution_risk"] = risk
    out["coelutes_with"] = pairs.coelutes_with
    return out


def calibrate(
    prep: Prepared, smiles: Sequence[str], rt_obs_min: np.ndarray, names: Sequence[str]
) -> Calibration:
    """Fit a :class:`Calibration` for ``prep``'s method from measured reference compounds.

    Calibrants eluting at or near t0 (:func:`retpred.training.void_bound_log_kw`) bound
    the correction from above instead of entering it as exact times."""
    from retpred.method import method_summary
    from retpred.training import void_bound_log_kw

    sol = featurise(list(smiles))
    log_kw, s = prep.model.retention_parameters(sol, prep.context)
    rt_obs = np.asarray(rt_obs_min, dtype=float)
    obs = log_kw_from_rt(rt_obs, s, prep.program)
    upper = void_bound_log_kw(rt_obs, s, prep.program)

    def rt_of(lk):
        return elute(lk, s, prep.program).rt_min

    cal = fit_calibration(
        log_kw, obs, rt_obs, rt_of, names=list(names), method_summary=method_summary(prep.method),
        traits=SoluteTraits.of(sol, model=prep.model, keys=True), upper_log_kw=upper,
    )
    kept = np.isfinite(obs) & np.isfinite(s)
    return replace(cal, model_id=prep.model.identity(),
                   conditions=retention_conditions(prep.method), run_key=run_key(prep.method),
                   cal_log_kw=tuple(float(v) for v in obs[kept]),
                   cal_s=tuple(float(v) for v in s[kept]))


def predict_frame(
    prep: Prepared, smiles: Sequence[str], names: Sequence[str] | None = None,
    with_pairs: bool = True,
) -> pd.DataFrame:
    """Library entry point: predict a list of SMILES on a prepared method."""
    smiles = list(smiles)
    names = list(names) if names is not None else [f"row {i + 1}" for i in range(len(smiles))]
    sol = featurise(smiles)
    table = predict_solutes(prep, sol, names)
    table["smiles"] = smiles
    if with_pairs:
        table = add_pairs(table, prep.model, calibrated=prep.calibration is not None)
    if prep.calibration is not None:
        w = coverage_warning(prep.calibration, table["rt_min"].to_numpy(float))
        if w:
            table.attrs["warnings"] = [w]
    return table
