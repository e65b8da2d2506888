"""Training and validation on the open data (and on a lab's own data).

Every observed time becomes ``log kw`` through the gradient engine with the system's own
program (``log_kw_from_rt``); the model is fitted in that space. Validation leaves out
whole source publications (``retention-physics.md`` section 8), never rows.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from retpred.column import class_hsm
from retpred.gradient import ElutionProgram, elute, log_kw_from_rt
from retpred.model import RetentionModel, Solutes, SystemContext, featurise, s_parameter
from retpred.opendata import OpenSystem, load_compounds, load_systems

#: Observed log kw outside this window are treated as data errors (k at phi=0 of 10^-1 ..
#: 10^9 covers every small molecule on reversed phase; common practice).
LOG_KW_WINDOW = (-1.0, 9.0)
#: Rows with k below this at elution carry almost no information (eluted near t0) beyond an
#: upper bound on their log kw (:class:`VoidRows`).
MIN_RT_OVER_T0 = 1.15
#: Rows eluting before this fraction of t0 are data errors (an unretained solute elutes at t0),
#: not void rows.
VOID_MIN_RT_OVER_T0 = 0.8
#: Shrinkage of the training systems' offsets removed for the companion (:func:`fit_model`,
#: :func:`system_offsets`): a system of n rows keeps n / (n + 5) of its mean residual.
COMPANION_SHRINK = 5.0


def void_bound_log_kw(rt_min: np.ndarray, s: np.ndarray, prog: ElutionProgram) -> np.ndarray:
    """Upper bound on ``log kw`` of solutes eluting at or near t0: for ``rt_min`` in
    (``VOID_MIN_RT_OVER_T0``, ``MIN_RT_OVER_T0``] x t0, the ``log kw`` that elutes at
    ``MIN_RT_OVER_T0`` t0 with the solute's ``S`` (:func:`log_kw_from_rt`); NaN elsewhere."""
    rt = np.asarray(rt_min, dtype=float)
    t0 = prog.dead_time_min
    near = (rt <= MIN_RT_OVER_T0 * t0) & (rt > VOID_MIN_RT_OVER_T0 * t0)
    out = np.full(rt.shape, np.nan)
    if near.any():
        out[near] = log_kw_from_rt(np.full(int(near.sum()), MIN_RT_OVER_T0 * t0),
                                   np.broadcast_to(np.asarray(s, dtype=float), rt.shape)[near],
                                   prog)
    return out


@dataclass
class VoidRows:
    """Rows that eluted at or near t0 (``VOID_MIN_RT_OVER_T0`` .. ``MIN_RT_OVER_T0`` times t0):
    only an upper bound on their ``log kw`` is known, ``bound_log_kw``, the value that elutes
    at ``MIN_RT_OVER_T0`` t0 on the row's system. Dropping them would leave the model with
    the polar compounds only where they happened to be retained (a truncated sample), and it
    then predicts them retained where they are not (:func:`fit_model`)."""

    solute_idx: np.ndarray
    system_idx: np.ndarray
    bound_log_kw: np.ndarray
    #: the observed times (for drawing void calibrants: ``scripts/void_calibrants.py``)
    rt_min: np.ndarray

    def take(self, mask: np.ndarray) -> VoidRows:
        return VoidRows(solute_idx=self.solute_idx[mask], system_idx=self.system_idx[mask],
                        bound_log_kw=self.bound_log_kw[mask], rt_min=self.rt_min[mask])


@dataclass
class TrainingSet:
    """Rows of (solute index, system index, observed rt and log kw)."""

    solutes: Solutes
    systems: list[OpenSystem]
    contexts: list[SystemContext]
    solute_idx: np.ndarray
    system_idx: np.ndarray
    rt_min: np.ndarray
    log_kw: np.ndarray
    s: np.ndarray
    smiles: list[str]
    #: rows eluted at or near t0 (upper bounds), None when not collected
    void: VoidRows | None = None

    @property
    def groups(self) -> np.ndarray:
        """Source publication of each row (the validation's default grouping)."""
        return self.groups_by("source")

    def groups_by(self, split: str) -> np.ndarray:
        """Group of each row for a grouped split: its ``"source"`` publication (every
        system of a publication left out together) or its ``"dataset"`` (one system)."""
        if split == "source":
            return np.array([self.systems[i].group for i in self.system_idx])
        if split == "dataset":
            return np.array([self.systems[i].dataset for i in self.system_idx])
        raise ValueError(f"unknown split '{split}' (source or dataset)")

    def subset(self, mask: np.ndarray) -> TrainingSet:
        """The rows ``mask``; void rows follow their system (kept if any of its rows is)."""
        void = self.void
        if void is not None:
            void = void.take(np.isin(void.system_idx, np.unique(self.system_idx[mask])))
        return TrainingSet(
            solutes=self.solutes, systems=self.systems, contexts=self.contexts,
            solute_idx=self.solute_idx[mask], system_idx=self.system_idx[mask],
            rt_min=self.rt_min[mask], log_kw=self.log_kw[mask], s=self.s[mask],
            smiles=self.smiles, void=void,
        )


def context_of(system: OpenSystem) -> SystemContext:
    return SystemContext(
        organic=system.organic,
        ph=system.ph,
        temperature_c=system.temperature_c,
        hsm=system.hsm if system.hsm is not None else class_hsm(system.phase),
    )


def build_training_set(
    systems: Sequence[OpenSystem], rows: pd.DataFrame, solutes: Solutes | None = None,
    smiles_index: dict[str, int] | None = None,
) -> TrainingSet:
    """Invert every observed time of ``rows`` (dataset, smiles, rt_min) into log kw; rows
    eluted at or near t0 become :class:`VoidRows` (upper bounds)."""
    if solutes is None:
        uniq = list(dict.fromkeys(rows["smiles"].tolist()))
        solutes = featurise(uniq)
        smiles_index = {s: i for i, s in enumerate(uniq)}
    pos = {s.dataset: i for i, s in enumerate(systems)}
    sol_all, sys_all, rt_all, lk_all, s_all = [], [], [], [], []
    void_sol, void_sys, void_bound, void_rt = [], [], [], []
    for ds, grp in rows.groupby("dataset", sort=True):
        if ds not in pos:
            continue
        sysi = pos[ds]
        prog = systems[sysi].program
        sidx = np.array([smiles_index[s] for s in grp["smiles"]])
        use = solutes.usable[sidx]
        rt = grp["rt_min"].to_numpy(dtype=float)
        bound = void_bound_log_kw(rt, s_parameter(solutes.mw[sidx]), prog)
        near = use & np.isfinite(bound)
        if near.any():
            void_sol.append(sidx[near])
            void_sys.append(np.full(near.sum(), sysi))
            void_bound.append(bound[near])
            void_rt.append(rt[near])
        use &= rt > MIN_RT_OVER_T0 * prog.dead_time_min
        if not use.any():
            continue
        sidx, rt = sidx[use], rt[use]
        s = s_parameter(solutes.mw[sidx])
        lk = log_kw_from_rt(rt, s, prog)
        ok = np.isfinite(lk) & (lk > LOG_KW_WINDOW[0]) & (lk < LOG_KW_WINDOW[1])
        sol_all.append(sidx[ok])
        sys_all.append(np.full(ok.sum(), sysi))
        rt_all.append(rt[ok])
        lk_all.append(lk[ok])
        s_all.append(s[ok])
    return TrainingSet(
        solutes=solutes,
        systems=list(systems),
        contexts=[context_of(s) for s in systems],
        solute_idx=np.concatenate(sol_all),
        system_idx=np.concatenate(sys_all),
        rt_min=np.concatenate(rt_all),
        log_kw=np.concatenate(lk_all),
        s=np.concatenate(s_all),
        smiles=list(smiles_index),
        void=VoidRows(
            solute_idx=np.concatenate(void_sol) if void_sol else np.zeros(0, dtype=int),
            system_idx=np.concatenate(void_sys) if void_sys else np.zeros(0, dtype=int),
            bound_log_kw=np.concatenate(void_bound) if void_bound else np.zeros(0),
            rt_min=np.concatenate(void_rt) if void_rt else np.zeros(0),
        ),
    )


def load_open_training_set(root, datasets: set[str] | None = None) -> TrainingSet:
    systems = load_systems(root)
    if datasets is not None:
        systems = [s for s in systems if s.dataset in datasets]
    rows = load_compounds(root, {s.dataset for s in systems})
    return build_training_set(systems, rows)


def fit_model(ts: TrainingSet, mask: np.ndarray | None = None, companion: bool = True,
              **params) -> RetentionModel:
    """Fit a model on the rows of ``ts`` selected by ``mask`` (all by default).

    Rows are weighted so that every system counts about as much as sqrt of its size
    (a 7,000-compound system must not drown the 30-compound ones).

    Void rows (:class:`VoidRows`, censored from above at ``b``) enter by one step of
    imputation: a first model fitted without them predicts ``mu`` for each, the row takes
    ``min(mu, b)`` as its target (a compound predicted retained beyond the bound is pulled
    down to it; one already predicted below it keeps its prediction, no information), and
    the model is fitted again on every row. This is the zero-noise limit of the E step
    of a censored-regression (Tobit) fit; see DEVELOPERS.md, "Void rows".

    With ``companion`` (the default) a second ridge, boosting and compound memory are
    fitted on the same rows with each training system's mean residual after that model
    (:func:`system_offsets`: dead-time, dwell-volume and batch errors the description
    cannot explain, sd about 0.3 in log kw) taken out of its targets, and the model
    predicts the mean of both (:meth:`RetentionModel.set_companion`). The offsets are
    noise for the within-system order a calibration keeps, and a compound class measured
    mostly on systems with large offsets otherwise learns them; see DEVELOPERS.md,
    "Offset-free companion".
    """
    sub = ts.subset(np.ones(ts.rt_min.size, dtype=bool) if mask is None else mask)
    model = _fit_rows(ts, sub.solute_idx, sub.system_idx, sub.log_kw, params)
    solute_idx, system_idx, log_kw = sub.solute_idx, sub.system_idx, sub.log_kw
    void = sub.void
    bound = np.zeros(0)
    if void is not None and void.solute_idx.size:
        first = model.retention_parameters(ts.solutes, ts.contexts, which=void.system_idx,
                                           idx=void.solute_idx)[0]
        ok = np.isfinite(np.minimum(first, void.bound_log_kw))
        bound = void.bound_log_kw[ok]
        solute_idx = np.concatenate([solute_idx, void.solute_idx[ok]])
        system_idx = np.concatenate([system_idx, void.system_idx[ok]])
        log_kw = np.concatenate([log_kw, np.minimum(first[ok], bound)])
        model = _fit_rows(ts, solute_idx, system_idx, log_kw, params)
    if not companion:
        return model
    # the companion: targets less their system's shrunken mean residual after the model
    # (void rows: the censored target re-imputed with the model just fitted)
    n_ret = sub.log_kw.size
    pred = model.retention_parameters(ts.solutes, ts.contexts, which=system_idx,
                                      idx=solute_idx)[0]
    target = log_kw.copy()
    target[n_ret:] = np.minimum(pred[n_ret:], bound)
    offset = system_offsets(log_kw[:n_ret] - pred[:n_ret], system_idx[:n_ret],
                            len(ts.systems))
    other = _fit_rows(ts, solute_idx, system_idx, target - offset[system_idx], params)
    return model.set_companion(other)


def system_offsets(resid: np.ndarray, system_idx: np.ndarray, n_systems: int,
                   shrink: float = COMPANION_SHRINK) -> np.ndarray:
    """Each system's mean residual shrunk towards 0, ``sum r / (n + shrink)`` (the
    ridge estimate of a random system effect); NaN residuals are skipped."""
    ok = np.isfinite(resid)
    n = np.bincount(system_idx[ok], minlength=n_systems).astype(float)
    return np.bincount(system_idx[ok], resid[ok], minlength=n_systems) / (n + shrink)


def _fit_rows(ts: TrainingSet, solute_idx: np.ndarray, system_idx: np.ndarray,
              log_kw: np.ndarray, params: dict) -> RetentionModel:
    counts = np.bincount(system_idx, minlength=len(ts.systems)).astype(float)
    w = 1.0 / np.sqrt(np.maximum(counts[system_idx], 1.0))
    w *= len(w) / w.sum()
    model = RetentionModel(reference=class_hsm("C18"), **params)
    return model.fit(ts.solutes, solute_idx, ts.contexts, system_idx, log_kw, sample_weight=w)


def predict_rows(model: RetentionModel, ts: TrainingSet, mask: np.ndarray | None = None):
    """Predicted (log kw, S, rt_min) of rows of ``ts`` on their own systems."""
    sub = ts if mask is None else ts.subset(mask)
    lk, s = model.retention_parameters(
        ts.solutes, ts.contexts, which=sub.system_idx, idx=sub.solute_idx
    )
    rt = np.full(lk.size, np.nan)
    for sysi in np.unique(sub.system_idx):
        m = sub.system_idx == sysi
        rt[m] = elute(lk[m], s[m], ts.systems[sysi].program).rt_min
    return lk, s, rt

