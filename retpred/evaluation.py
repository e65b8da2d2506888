"""Validation protocol (retention-physics.md section 8).

Whole source publications are left out (grouped folds, never rows). For every left-out
system: median and mean absolute error in minutes and as % of the system's last observed
time, Spearman rho, and pairwise elution-order accuracy over pairs observed more than
0.5 min apart; zero-shot and with 10 random calibrants (averaged over draws), next to two
baselines computed in the same run: log P + the same calibrants, and a pooled descriptor
gradient-boosting model (zero-shot scaled by the program length, and + calibrants).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
from scipy.stats import siegelslopes, spearmanr
from sklearn.ensemble import HistGradientBoostingRegressor
from sklearn.model_selection import GroupKFold

from retpred.calibration import SoluteTraits, fit_calibration
from retpred.chemistry import ionise
from retpred.gradient import STATUS_NOT_ELUTED, elute, log_kw_from_rt
from retpred.model import s_parameter
from retpred.training import TrainingSet, fit_model, void_bound_log_kw

ORDER_MIN_GAP_MIN = 0.5
N_CALIBRANTS = 10
MIN_SYSTEM_SIZE = 20


def order_accuracy(rt_obs: np.ndarray, rt_pred: np.ndarray, min_gap: float = ORDER_MIN_GAP_MIN):
    """Fraction of pairs (observed more than ``min_gap`` apart) predicted in the right order."""
    o = np.asarray(rt_obs, float)
    p = np.asarray(rt_pred, float)
    ok = np.isfinite(o) & np.isfinite(p)
    o, p = o[ok], p[ok]
    if o.size < 2:
        return float("nan")
    if o.size > 3000:  # subsample for very large systems (deterministic)
        idx = np.random.default_rng(0).choice(o.size, 3000, replace=False)
        o, p = o[idx], p[idx]
    do = o[:, None] - o[None, :]
    dp = p[:, None] - p[None, :]
    mask = np.triu(np.abs(do) > min_gap, 1)
    if not mask.any():
        return float("nan")
    return float(np.mean(np.sign(do[mask]) == np.sign(dp[mask])))


def system_metrics(rt_obs: np.ndarray, rt_pred: np.ndarray) -> dict:
    o = np.asarray(rt_obs, float)
    p = np.asarray(rt_pred, float)
    ok = np.isfinite(o) & np.isfinite(p)
    scale = float(np.nanmax(o)) if o.size else float("nan")
    err = np.abs(p[ok] - o[ok])
    if err.size == 0:
        return {"n": 0, "medae_min": np.nan, "mae_min": np.nan, "medae_pct": np.nan,
                "mae_pct": np.nan, "spearman": np.nan, "order_acc": np.nan,
                "coverage_pred": 0.0}
    const = ok.sum() <= 2 or np.ptp(o[ok]) == 0 or np.ptp(p[ok]) == 0
    rho = np.nan if const else spearmanr(o[ok], p[ok]).statistic
    return {
        "n": int(ok.sum()),
        "medae_min": float(np.median(err)),
        "mae_min": float(np.mean(err)),
        "medae_pct": float(100 * np.median(err) / scale),
        "mae_pct": float(100 * np.mean(err) / scale),
        "spearman": float(rho),
        "order_acc": order_accuracy(o, p),
        "coverage_pred": float(ok.mean()),
    }


def _robust_line(x: np.ndarray, y: np.ndarray):
    ok = np.isfinite(x) & np.isfinite(y)
    if ok.sum() >= 3 and np.ptp(x[ok]) > 0:
        r = siegelslopes(y[ok], x[ok])
        return r.slope, r.intercept
    return 0.0, float(np.nanmedian(y - x)) if ok.any() else 0.0


def _nan_safe(fn, values) -> float:
    """``fn`` (nanmean/nanmedian) that returns NaN quietly when every value is NaN."""
    arr = np.asarray(values, dtype=float)
    return float(fn(arr)) if np.isfinite(arr).any() else float("nan")


def _scored_systems(ts: TrainingSet):
    """(system index, row indices) of every system large enough to score."""
    for sysi in np.unique(ts.system_idx):
        m = np.flatnonzero(ts.system_idx == sysi)
        if m.size >= MIN_SYSTEM_SIZE:
            yield sysi, m


def calibrate_on(pred_lk, obs_lk, obs_rt, s, prog, pick, traits=None, upper_log_kw=None):
    """Fit the user-facing calibration on the calibrants ``pick`` of one system (``traits``:
    the system's rows' :class:`SoluteTraits`, enabling the structure-aware corrections;
    ``upper_log_kw``: the rows' void bounds, :func:`fit_calibration`)."""
    s_pick = s[pick]
    return fit_calibration(pred_lk[pick], obs_lk[pick], obs_rt[pick],
                           lambda v: elute(v, s_pick, prog).rt_min,
                           traits=None if traits is None else traits.take(pick),
                           upper_log_kw=None if upper_log_kw is None else upper_log_kw[pick])


def row_traits(ts: TrainingSet, rows: np.ndarray, fp: FoldPredictions | None = None
               ) -> SoluteTraits:
    """Traits of ``rows``, with the compound factors of each row's fold model (``fp``)."""
    tr = SoluteTraits.of(ts.solutes, ts.solute_idx[rows])
    if fp is not None and fp.factors is not None:
        tr = replace(tr, factors=fp.factors[rows])
    return tr


@dataclass
class FoldPredictions:
    log_kw: np.ndarray  # held-out predicted log kw per row
    fold: np.ndarray  # fold id per row
    baseline_frac: np.ndarray  # descriptor-GBM prediction of rt / program end
    #: compound factors per row, from the model of the row's fold (zeros where it has none)
    factors: np.ndarray | None = None
    #: held-out predicted log kw and compound factors of the void rows (``ts.void``; NaN
    #: and zeros for those of systems without retained rows, which have no fold)
    void_log_kw: np.ndarray | None = None
    void_factors: np.ndarray | None = None


def descriptor_baseline(ts: TrainingSet, train: np.ndarray, test: np.ndarray) -> np.ndarray:
    """Pooled descriptor GBM predicting rt as a fraction of the program length, fitted on
    rows ``train`` and predicting rows ``test`` (index arrays or boolean masks)."""
    ends = np.array([s.program.program_end_min for s in ts.systems])[ts.system_idx]
    y = ts.rt_min / ends
    x = np.column_stack(
        [ts.solutes.descriptors[ts.solute_idx], ts.solutes.fingerprints[ts.solute_idx]]
    )
    gbm = HistGradientBoostingRegressor(max_iter=200, learning_rate=0.08, random_state=0)
    gbm.fit(x[train], y[train])
    return gbm.predict(x[test])


def fold_of_rows(ts: TrainingSet, n_folds: int = 5, split: str = "source") -> np.ndarray:
    """Fold of every row: ``GroupKFold`` over the rows' groups (``TrainingSet.groups_by``),
    so a source publication (or, with ``split="dataset"``, a system) is never split."""
    groups = ts.groups_by(split)
    n_folds = min(n_folds, len(np.unique(groups)))
    fold = np.full(ts.rt_min.size, -1)
    for f, (_tr, te) in enumerate(GroupKFold(n_splits=n_folds).split(ts.rt_min,
                                                                       groups=groups)):
        fold[te] = f
    return fold


def cross_validate(ts: TrainingSet, n_folds: int = 5, with_baseline: bool = True,
                   split: str = "source", **params) -> FoldPredictions:
    """Held-out predictions of every row from a model fitted on the other folds
    (:func:`fold_of_rows`; by source publication unless ``split="dataset"``)."""
    fold = fold_of_rows(ts, n_folds, split)
    lk = np.full(ts.rt_min.size, np.nan)
    base = np.full(ts.rt_min.size, np.nan)
    factors = None
    void = ts.void
    n_void = 0 if void is None else void.solute_idx.size
    void_fold = np.full(n_void, -1)
    if n_void:
        fold_of_system = np.full(len(ts.systems), -1)
        fold_of_system[ts.system_idx] = fold
        void_fold = fold_of_system[void.system_idx]
    void_lk = np.full(n_void, np.nan)
    void_fac = None
    for f in range(int(fold.max()) + 1):
        tem = fold == f
        trm = ~tem
        model = fit_model(ts, trm, **params)
        lk[tem] = model.retention_parameters(
            ts.solutes, ts.contexts, which=ts.system_idx[tem], idx=ts.solute_idx[tem]
        )[0]
        fac = model.factor_matrix(ts.solutes, ts.solute_idx[tem])
        if factors is None:
            factors = np.zeros((ts.rt_min.size, fac.shape[1]))
            void_fac = np.zeros((n_void, fac.shape[1]))
        factors[tem] = fac
        vm = void_fold == f
        if vm.any():
            void_lk[vm] = model.retention_parameters(
                ts.solutes, ts.contexts, which=void.system_idx[vm], idx=void.solute_idx[vm]
            )[0]
            void_fac[vm] = model.factor_matrix(ts.solutes, void.solute_idx[vm])
        if with_baseline:
            base[tem] = descriptor_baseline(ts, trm, tem)
    return FoldPredictions(log_kw=lk, fold=fold, baseline_frac=base, factors=factors,
                           void_log_kw=void_lk, void_factors=void_fac)


def novel_rows(ts: TrainingSet, fp: FoldPredictions) -> np.ndarray:
    """True for rows whose compound no training system of their fold contained (the
    structures a model meets for the first time; the compound memory knows the rest)."""
    n_sol = len(ts.solutes)
    out = np.zeros(ts.rt_min.size, dtype=bool)
    for f in np.unique(fp.fold):
        te = fp.fold == f
        seen = np.bincount(ts.solute_idx[~te], minlength=n_sol) > 0
        out[te] = ~seen[ts.solute_idx[te]]
    return out


def split_quantiles(resid: np.ndarray, novel: np.ndarray, q=(0.05, 0.95)):
    """``(pooled, novel-only)`` quantiles of finite residuals; the novel ones fall back to
    the pooled where fewer than 200 novel residuals exist (``novel``: a boolean mask, e.g.
    :func:`novel_rows`)."""
    ok = np.isfinite(resid)
    pooled = np.quantile(resid[ok], q)
    nv = ok & novel
    return pooled, (np.quantile(resid[nv], q) if nv.sum() >= 200 else pooled)


def interval_hits(obs_rt, pred_lk, q_lo, q_hi, s, prog) -> np.ndarray:
    """Whether each observed time lies in the prediction interval [elute(lk + q_lo S),
    elute(lk + q_hi S)], as ``predict`` builds it. An upper end that would not elute within
    the run (``rt_high_min`` empty in the output) is unbounded: every observed time of the
    run lies below it."""
    lo = elute(pred_lk + q_lo * s, s, prog).rt_min
    up = elute(pred_lk + q_hi * s, s, prog)
    hi = np.where(up.status == STATUS_NOT_ELUTED, np.inf, up.rt_min)
    return (obs_rt >= lo) & (obs_rt <= hi)


def evaluate(ts: TrainingSet, fp: FoldPredictions, n_draws: int = 5, seed: int = 0,
             quantiles=(0.05, 0.95)) -> pd.DataFrame:
    """One row per left-out system with model and baseline figures."""
    rng = np.random.default_rng(seed)
    resid = phi_residuals(ts, fp)
    rows = []
    # compounds no training fold saw; their intervals use the quantiles of novel rows
    novel_all = novel_rows(ts, fp)
    cal_resid = []  # (fold, system row index, residuals in phi units) for interval coverage
    cal_cov_obs = []
    logp = ts.solutes.logp[ts.solute_idx]
    for sysi, m in _scored_systems(ts):
        system = ts.systems[sysi]
        prog = system.program
        s = ts.s[m]
        obs = ts.rt_min[m]
        f = fp.fold[m[0]]
        other = fp.fold != f
        q_seen, q_new = split_quantiles(resid[other], novel_all[other], quantiles)
        novel = novel_all[m]
        q_lo = np.where(novel, q_new[0], q_seen[0])
        q_hi = np.where(novel, q_new[1], q_seen[1])
        pred_lk = fp.log_kw[m]
        tr = row_traits(ts, m, fp)
        rt_zero = elute(pred_lk, s, prog).rt_min
        row = {"dataset": system.dataset, "group": system.group, "n": m.size,
               "phase": system.phase, "organic": system.organic, "ph": system.ph,
               "last_rt_min": float(obs.max())}
        zs = system_metrics(obs, rt_zero)
        row.update({f"zero_{k}": v for k, v in zs.items()})
        row["n_novel"] = int(novel.sum())
        if novel.sum() >= 5:
            row["zero_novel_medae_pct"] = system_metrics(obs[novel], rt_zero[novel])[
                "medae_pct"]
        inside = interval_hits(obs, pred_lk, q_lo, q_hi, s, prog)
        row["zero_interval_coverage"] = float(np.mean(inside))
        row["zero_interval_hits"] = int(inside.sum())
        row["zero_novel_interval_hits"] = int(inside[novel].sum())
        base_rt = fp.baseline_frac[m] * prog.program_end_min
        bz = system_metrics(obs, base_rt)
        row["gbm_zero_medae_pct"] = bz["medae_pct"]
        cal_stats, logp_stats, gbm_stats, novel_stats = [], [], [], []
        for _ in range(n_draws):
            pick = rng.choice(m.size, N_CALIBRANTS, replace=False)
            rest = np.setdiff1d(np.arange(m.size), pick)
            cal = calibrate_on(pred_lk, ts.log_kw[m], obs, s, prog, pick, tr)
            lk_cal = cal.apply(pred_lk[rest], tr.take(rest))
            rt_cal = elute(lk_cal, s[rest], prog).rt_min
            cal_stats.append(system_metrics(obs[rest], rt_cal))
            nv = novel[rest]
            if nv.sum() >= 5:
                # same scale as the system's other figures: % of its last observed time
                err = np.abs(rt_cal[nv] - obs[rest][nv])
                novel_stats.append(100 * np.nanmedian(err) / obs.max())
            cal_resid.append((f, len(rows), (ts.log_kw[m][rest] - lk_cal) / s[rest],
                              novel[rest]))
            cal_cov_obs.append((lk_cal, s[rest], obs[rest], prog))
            b, a = _robust_line(logp[m][pick], obs[pick])
            logp_stats.append(system_metrics(obs[rest], a + b * logp[m][rest]))
            b2, a2 = _robust_line(base_rt[pick], obs[pick])
            gbm_stats.append(system_metrics(obs[rest], a2 + b2 * base_rt[rest]))
        if novel_stats:
            row["cal_novel_medae_pct"] = float(np.mean(novel_stats))
        for prefix, stats in (("cal", cal_stats), ("logp_cal", logp_stats),
                              ("gbm_cal", gbm_stats)):
            for k in ("medae_pct", "mae_pct", "medae_min", "spearman", "order_acc"):
                row[f"{prefix}_{k}"] = _nan_safe(np.nanmean, [st[k] for st in stats])
        rows.append(row)
    # calibrated interval coverage, quantiles from the other folds' calibrated residuals
    folds = np.array([c[0] for c in cal_resid])
    fold_q = {}
    for f in np.unique(folds):
        others = [c for c, ff in zip(cal_resid, folds, strict=True) if ff != f]
        fold_q[f] = split_quantiles(np.concatenate([c[2] for c in others]),
                                    np.concatenate([c[3] for c in others]), quantiles)
    hits = np.zeros(len(rows))
    total = np.zeros(len(rows))
    novel_hits = np.zeros(len(rows))
    novel_total = np.zeros(len(rows))
    for (f, ri, _r, nv), (lk_cal, s_r, obs_r, prog) in zip(cal_resid, cal_cov_obs,
                                                            strict=True):
        q_seen, q_new = fold_q[f]
        q_lo = np.where(nv, q_new[0], q_seen[0])
        q_hi = np.where(nv, q_new[1], q_seen[1])
        inside = interval_hits(obs_r, lk_cal, q_lo, q_hi, s_r, prog)
        hits[ri] += np.sum(inside)
        total[ri] += obs_r.size
        novel_hits[ri] += np.sum(inside[nv])
        novel_total[ri] += nv.sum()
    table = pd.DataFrame(rows)
    if len(table):
        table["cal_interval_coverage"] = hits / np.maximum(total, 1)
        table["cal_interval_hits"] = hits
        table["cal_interval_n"] = total
        table["cal_novel_interval_hits"] = novel_hits
        table["cal_novel_interval_n"] = novel_total
    return table


def void_calibrant_draws(ts: TrainingSet, fp: FoldPredictions, n_draws: int = 5,
                         seed: int = 0) -> pd.DataFrame:
    """Calibrants drawn from *every* row of a left-out system, its void rows (``ts.void``)
    too, as a user's standards may include a t0 marker or a polar compound eluting in the
    initial hold; scored on the retained rows not drawn. One row per system: the median
    absolute error (% of the last retained time, :func:`system_metrics`) with the void
    calibrants used as ``exact`` times, as ``bounds`` (the rule of
    :func:`retpred.predict.calibrate`: :func:`retpred.training.void_bound_log_kw`), and,
    for reference, ``retained`` (the protocol: draws from retained rows only)."""
    void = ts.void
    if void is None or fp.void_log_kw is None:
        raise ValueError("needs a training set with void rows and their fold predictions")
    rng = np.random.default_rng(seed)
    rows = []
    for sysi, m in _scored_systems(ts):
        prog = ts.systems[sysi].program
        vm = np.flatnonzero((void.system_idx == sysi) & np.isfinite(fp.void_log_kw))
        nr = m.size
        tr = SoluteTraits.of(ts.solutes, np.r_[ts.solute_idx[m], void.solute_idx[vm]])
        if fp.factors is not None:
            tr = replace(tr, factors=np.r_[fp.factors[m], fp.void_factors[vm]])
        pred = np.r_[fp.log_kw[m], fp.void_log_kw[vm]]
        s = np.r_[ts.s[m], s_parameter(ts.solutes.mw[void.solute_idx[vm]])]
        rt = np.r_[ts.rt_min[m], void.rt_min[vm]]
        obs = np.r_[ts.log_kw[m], log_kw_from_rt(rt[nr:], s[nr:], prog)]
        upper = void_bound_log_kw(rt, s, prog)
        errs = {"exact": [], "bounds": [], "retained": []}
        drawn = []
        for _ in range(n_draws):
            pick_all = rng.choice(rt.size, N_CALIBRANTS, replace=False)
            pick_ret = rng.choice(nr, N_CALIBRANTS, replace=False)
            for mode, pick in (("exact", pick_all), ("bounds", pick_all),
                               ("retained", pick_ret)):
                rest = np.setdiff1d(np.arange(nr), pick)
                cal = calibrate_on(pred, obs, rt, s, prog, pick, tr,
                                   upper_log_kw=upper if mode == "bounds" else None)
                rt_cal = elute(cal.apply(pred[rest], tr.take(rest)), s[rest], prog).rt_min
                errs[mode].append(system_metrics(rt[rest], rt_cal)["medae_pct"])
            drawn.append(int(np.sum(pick_all >= nr)))
        rows.append({"dataset": ts.systems[sysi].dataset, "n": nr, "n_void": int(vm.size),
                     "void_drawn": float(np.mean(drawn)),
                     **{f"{k}_medae_pct": _nan_safe(np.nanmean, v) for k, v in errs.items()}})
    return pd.DataFrame(rows)


def summarise(table: pd.DataFrame) -> dict:
    """Medians over left-out systems (and, with a ``group`` column, the median over source
    publications of each source's median system: ``*_over_sources``)."""
    cols = [c for c in table.columns if c.startswith(("zero_", "cal_", "logp_cal_", "gbm_"))]
    out = {c: _nan_safe(np.nanmedian, table[c]) for c in cols
           if not c.endswith(("_hits", "_n"))}
    out["n_systems"] = int(len(table))
    if "group" in table:
        # a source publication with many systems weighs as many systems in the medians
        # above; the median over sources (each its median system) shows how much
        by_source = table.groupby("group")
        out["n_sources"] = int(by_source.ngroups)
        for c in ("zero_medae_pct", "cal_medae_pct", "logp_cal_medae_pct"):
            if c in table:
                out[f"{c}_over_sources"] = _nan_safe(np.nanmedian, by_source[c].median())
    if "zero_interval_hits" in table:
        out["zero_interval_coverage_pooled"] = float(
            table["zero_interval_hits"].sum() / table["zero_n"].sum())
    if "cal_interval_hits" in table:
        out["cal_interval_coverage_pooled"] = float(
            table["cal_interval_hits"].sum() / table["cal_interval_n"].sum())
    if "zero_novel_interval_hits" in table and table["n_novel"].sum() > 0:
        out["zero_novel_interval_coverage_pooled"] = float(
            table["zero_novel_interval_hits"].sum() / table["n_novel"].sum())
    if "cal_novel_interval_hits" in table and table["cal_novel_interval_n"].sum() > 0:
        out["cal_novel_interval_coverage_pooled"] = float(
            table["cal_novel_interval_hits"].sum() / table["cal_novel_interval_n"].sum())
    if out.get("gbm_cal_medae_pct"):
        out["ratio_cal_vs_gbm_cal"] = out["cal_medae_pct"] / out["gbm_cal_medae_pct"]
    if out.get("logp_cal_medae_pct"):
        out["ratio_cal_vs_logp_cal"] = out["cal_medae_pct"] / out["logp_cal_medae_pct"]
    return out


def phi_residuals(ts: TrainingSet, fp: FoldPredictions) -> np.ndarray:
    """Held-out error in elution-composition units, (obs - pred) log kw / S: an interval
    ``log kw + q S`` widens with S as a gradient's time error does. NaN for rows eluting at
    or before t0."""
    return (ts.log_kw - fp.log_kw) / ts.s


def residual_quantiles(ts: TrainingSet, fp: FoldPredictions, q=(0.05, 0.95)) -> list[float]:
    """Quantiles of the finite :func:`phi_residuals`."""
    r = phi_residuals(ts, fp)
    r = r[np.isfinite(r)]
    return [float(v) for v in np.quantile(r, q)]


def calibrated_residual_quantiles(ts: TrainingSet, fp: FoldPredictions, q=(0.05, 0.95),
                                  seed: int = 1, rows: np.ndarray | None = None
                                  ) -> tuple[list[float], list[float], float]:
    """log kw residual quantiles after a 10-calibrant correction on left-out systems, the
    same over the rows of the boolean mask ``rows`` (e.g. :func:`novel_rows`; pooled when
    ``rows`` is None, see :func:`split_quantiles`), and the correlation of neighbours' time
    errors (elution-order neighbours). One calibration per system serves all three."""
    rng = np.random.default_rng(seed)
    res_all, pairs_a, pairs_b, keep_all = [], [], [], []
    for sysi, m in _scored_systems(ts):
        prog = ts.systems[sysi].program
        s = ts.s[m]
        pred = fp.log_kw[m]
        pick = rng.choice(m.size, N_CALIBRANTS, replace=False)
        rest = np.setdiff1d(np.arange(m.size), pick)
        tr = row_traits(ts, m, fp)
        cal = calibrate_on(pred, ts.log_kw[m], ts.rt_min[m], s, prog, pick, tr)
        corr = cal.apply(pred[rest], tr.take(rest))
        res_all.append((ts.log_kw[m][rest] - corr) / s[rest])
        keep_all.append(np.ones(rest.size, bool) if rows is None else rows[m[rest]])
        rt_p = elute(corr, s[rest], prog).rt_min
        e = ts.rt_min[m][rest] - rt_p
        order = np.argsort(rt_p)
        e = e[order]
        ok = np.isfinite(e)
        e = e[ok]
        pairs_a.append(e[:-1])
        pairs_b.append(e[1:])
    pooled, selected = split_quantiles(np.concatenate(res_all), np.concatenate(keep_all), q)
    a, b = np.concatenate(pairs_a), np.concatenate(pairs_b)
    rho = float(np.corrcoef(a, b)[0, 1]) if a.size > 3 else 0.0
    return [float(v) for v in pooled], [float(v) for v in selected], rho


def _plates_for(system, phi_e, mw):
    from retpred.column import plate_number
    from retpred.method import Column

    col = Column(phase=system.phase, length_mm=system.length_mm,
                 inner_diameter_mm=system.inner_diameter_mm, particle_um=system.particle_um,
                 dead_time_min=system.program.dead_time_min)
    return plate_number(col, system.flow_ml_min, np.nan_to_num(phi_e, nan=0.5),
                        system.organic, system.temperature_c, np.nan_to_num(mw, nan=300.0))


def _left_out_peaks(ts: TrainingSet, fp: FoldPredictions, q_phi: tuple[float, float],
                    calibrated: bool, seed: int, q_phi_novel: tuple[float, float] | None):
    """For every scored left-out system: (system, predicted time, time-error sd (unscaled),
    peak sigma, observed time) of its compounds, as ``predict`` makes them. With
    ``calibrated``, 10 random calibrants (``seed``) correct the predictions and are left
    out of the arrays. The interval comes from the phi-space quantiles (``q_phi_novel`` for
    compounds new to the fold's training, as ``predict`` does for structures not in the
    model's memory), sd = half-width / 1.645."""
    from retpred.peaks import peak_sigma_min, time_error_sd_min

    rng = np.random.default_rng(seed)
    novel_all = novel_rows(ts, fp) if q_phi_novel is not None else None
    for sysi, m in _scored_systems(ts):
        system = ts.systems[sysi]
        prog = system.program
        s = ts.s[m]
        pred = fp.log_kw[m]
        keep = np.arange(m.size)
        if calibrated:
            pick = rng.choice(m.size, N_CALIBRANTS, replace=False)
            tr = row_traits(ts, m, fp)
            pred = calibrate_on(pred, ts.log_kw[m], ts.rt_min[m], s, prog, pick, tr).apply(
                pred, tr)
            keep = np.setdiff1d(keep, pick)
        el = elute(pred[keep], s[keep], prog)
        q0, q1 = q_phi
        if novel_all is not None:
            nv = novel_all[m][keep]
            q0, q1 = np.where(nv, q_phi_novel[0], q0), np.where(nv, q_phi_novel[1], q1)
        lo = elute(pred[keep] + q0 * s[keep], s[keep], prog).rt_min
        hi = elute(pred[keep] + q1 * s[keep], s[keep], prog).rt_min
        mw = ts.solutes.mw[ts.solute_idx[m][keep]]
        sigma = peak_sigma_min(prog.dead_time_min, el.k_elution,
                               _plates_for(system, el.phi_elution, mw))
        yield system, el.rt_min, time_error_sd_min(el.rt_min, lo, hi), sigma, ts.rt_min[m][keep]


def coelution_pairs(ts: TrainingSet, fp: FoldPredictions, q_phi: tuple[float, float],
                    rho: float, calibrated: bool = True, seed: int = 2,
                    rs_threshold: float = 1.5, q_phi_novel: tuple[float, float] | None = None
                    ) -> pd.DataFrame:
    """Predicted neighbour pairs on left-out systems with their predicted unresolved
    probability and whether the measured times were unresolved (Rs < threshold with the
    predicted peak widths). The error model is the one ``predict`` uses
    (:func:`_left_out_peaks`), neighbour correlation ``rho``."""
    from retpred.peaks import unresolved_probability

    out = []
    for system, rt, sd, sigma, obs in _left_out_peaks(ts, fp, q_phi, calibrated, seed,
                                                      q_phi_novel):
        ok = np.flatnonzero(np.isfinite(rt) & np.isfinite(sigma) & np.isfinite(sd))
        order = ok[np.argsort(rt[ok], kind="stable")]
        a, b = order[:-1], order[1:]
        pair_sd = np.sqrt(np.maximum(sd[a] ** 2 + sd[b] ** 2 - 2 * rho * sd[a] * sd[b], 0))
        p = unresolved_probability(rt[b] - rt[a], sigma[a], sigma[b], pair_sd, rs_threshold)
        w = 2 * rs_threshold * (sigma[a] + sigma[b])
        out.append(pd.DataFrame({"dataset": system.dataset, "risk": p,
                                 "unresolved": np.abs(obs[b] - obs[a]) < w,
                                 "delta_min": rt[b] - rt[a], "half_window_min": w,
                                 "pair_sd_min": pair_sd}))
    return pd.concat(out, ignore_index=True)


#: Analytes per list in :func:`coelution_lists` (a method-development list of common
#: practice is 10 to 30 analytes) and lists drawn per system.
LIST_SIZE = 20
LISTS_PER_SYSTEM = 3


def coelution_lists(ts: TrainingSet, fp: FoldPredictions, q_phi: tuple[float, float],
                    calibrated: bool = True, seed: int = 2,
                    q_phi_novel: tuple[float, float] | None = None,
                    list_size: int = LIST_SIZE, lists_per_system: int = LISTS_PER_SYSTEM
                    ) -> pd.DataFrame:
    """Random analyte lists of left-out systems, as a user would predict them: from every
    scored system (after taking out the calibrants) ``lists_per_system`` draws of
    ``list_size`` compounds with a finite prediction. One row per analyte of a list:
    ``dataset``, ``list`` (a number), ``rt_min``, ``sd_min`` (the unscaled time-error sd),
    ``sigma_min`` and ``obs_min``. Score with :func:`score_lists`."""
    rng = np.random.default_rng(seed + 1)
    out, n_lists = [], 0
    for system, rt, sd, sigma, obs in _left_out_peaks(ts, fp, q_phi, calibrated, seed,
                                                      q_phi_novel):
        ok = np.flatnonzero(np.isfinite(rt) & np.isfinite(sigma) & np.isfinite(sd)
                            & np.isfinite(obs))
        if ok.size < list_size:
            continue
        for _ in range(lists_per_system):
            pick = np.sort(rng.choice(ok, list_size, replace=False))
            out.append(pd.DataFrame({"dataset": system.dataset, "list": n_lists,
                                     "rt_min": rt[pick], "sd_min": sd[pick],
                                     "sigma_min": sigma[pick], "obs_min": obs[pick]}))
            n_lists += 1
    return pd.concat(out, ignore_index=True)


def score_lists(lists: pd.DataFrame, rho: float, params=(1.0, 0.0, 1.0),
                rs_threshold: float = 1.5) -> pd.DataFrame:
    """Per analyte of :func:`coelution_lists`: ``risk``, the predicted probability of not
    being resolved from at least one other analyte of its list (``params`` = (sd scale,
    a, b) as in :meth:`retpred.model.RetentionModel.analyte_risk_params`), and
    ``unresolved``, whether its measured time is within 2 Rs (s1 + s2) of another
    analyte's measured time (Rs < threshold with the predicted widths)."""
    from retpred.peaks import any_coelution_probability, recalibrate_risk

    scale, a, b = params
    # all lists in one vectorised pass: each list is moved along the time axis, beyond the
    # reach of any other (the pair probabilities across lists are then below 1e-18)
    rt, obs = lists["rt_min"].to_numpy(), lists["obs_min"].to_numpy()
    sigma, sd = lists["sigma_min"].to_numpy(), scale * lists["sd_min"].to_numpy()
    lo = min(np.nanmin(rt), np.nanmin(obs))
    span = max(np.nanmax(rt), np.nanmax(obs)) - lo
    gap = span + 4 * rs_threshold * np.nanmax(sigma) + 20 * np.nanmax(sd) + 1.0
    shift = lists["list"].to_numpy() * gap - lo
    risk = any_coelution_probability(rt + shift, sigma, sd, rho, rs_threshold)
    hit = any_coelution_probability(obs + shift, sigma, 0.0, 0.0, rs_threshold) > 0.5
    return pd.DataFrame({"dataset": lists["dataset"].to_numpy(),
                         "risk": recalibrate_risk(risk, a, b), "unresolved": hit})


def fit_analyte_risk(lists: pd.DataFrame, rho: float,
                     grid=None) -> tuple[float, float, float]:
    """(sd scale, a, b) of the per-analyte co-elution risk: the scale that minimises the
    log-loss of the unresolved outcome of the analytes of left-out lists, then the
    logistic recalibration ``a + b logit p`` of that risk (a one-feature logistic
    regression, unpenalised)."""
    from scipy.special import logit
    from sklearn.linear_model import LogisticRegression

    grid = PAIR_SD_SCALE_GRID if grid is None else grid
    y = None

    def loss(c):
        nonlocal y
        sc = score_lists(lists, rho, (c, 0.0, 1.0))
        y = sc["unresolved"].to_numpy(bool)
        return _log_loss(sc["risk"].to_numpy(), y)

    scale = float(min(grid, key=loss))
    sc = score_lists(lists, rho, (scale, 0.0, 1.0))
    z = logit(np.clip(sc["risk"].to_numpy(), 1e-6, 1 - 1e-6))[:, None]
    lr = LogisticRegression(C=np.inf).fit(z, sc["unresolved"].to_numpy(bool))
    return scale, float(lr.intercept_[0]), float(lr.coef_[0, 0])


def analyte_risk_summary(lists: pd.DataFrame, rho: float, params) -> tuple[pd.DataFrame, dict]:
    """:func:`score_lists` of ``lists`` with ``params`` and its figures: ``log_loss``,
    ``log_loss_base`` (the constant observed rate), ``base_rate`` and ``auc`` (probability
    that an unresolved analyte gets a higher risk than a resolved one, ties count half)."""
    from scipy.stats import rankdata

    sc = score_lists(lists, rho, params)
    p, y = sc["risk"].to_numpy(), sc["unresolved"].to_numpy(bool)
    rate = float(y.mean())
    r = rankdata(p)
    n1, n0 = int(y.sum()), int((~y).sum())
    auc = float((r[y].sum() - n1 * (n1 + 1) / 2) / (n1 * n0)) if n1 and n0 else float("nan")
    return sc, {"log_loss": _log_loss(p, y), "log_loss_base": _log_loss(np.full(y.size, rate), y),
                "base_rate": rate, "auc": auc}


def _log_loss(p: np.ndarray, y: np.ndarray) -> float:
    p = np.clip(p, 1e-4, 1 - 1e-4)
    return float(-np.mean(np.where(y, np.log(p), np.log(1 - p))))


def risk_calibration_table(pairs: pd.DataFrame, edges=(0, .05, .1, .2, .3, .4, .5, .6, .7, .8,
                                                        .9, 1.0001)) -> pd.DataFrame:
    """Mean predicted risk against the observed unresolved fraction, per risk bin."""
    bins = pd.cut(pairs["risk"], list(edges), right=False)
    g = pairs.groupby(bins, observed=True)
    return pd.DataFrame({"n_pairs": g.size(), "mean_risk": g["risk"].mean(),
                         "observed_unresolved": g["unresolved"].mean()}).reset_index()


def ph_series(systems) -> list[list[int]]:
    """Indices of systems measured on one column and program at several pH: systems of one
    source with the same phase, HSM parameters, length, modifier, program and flow, at two
    or more different pH."""
    def key(sy):
        p = sy.program
        hsm = None if sy.hsm is None else tuple(round(v, 3) for v in vars(sy.hsm).values())
        return (sy.group, sy.phase, hsm, sy.organic, round(sy.length_mm, 1),
                tuple(np.round(p.pump_time_min, 2)), tuple(np.round(p.pump_phi, 3)),
                round(float(p.pump_flow_ml_min[0]), 3))

    groups: dict = {}
    for i, sy in enumerate(systems):
        groups.setdefault(key(sy), []).append(i)
    return [m for m in groups.values() if len({systems[i].ph for i in m}) >= 2]


def ph_shift_agreement(ts: TrainingSet, fp: FoldPredictions, min_shift_min: float = 0.5,
                       series: list[set[str]] | None = None) -> dict:
    """Sign agreement of predicted and observed pH shifts across pH series of the open data.

    A series is a set of systems measured on one column and program at several pH; by
    default :func:`ph_series` (``series`` names them explicitly). For every compound on two
    systems of a series at different pH the shift (higher pH minus lower) is compared. Returns
    ``agree_obs`` (fraction right among shifts observed over ``min_shift_min``), ``n_obs``,
    ``agree_pred`` (fraction right among shifts *predicted* over it), ``n_pred`` and
    ``flat_obs`` (fraction of the observed shifts for which the model predicts no shift at
    all, under 0.01 min: compounds without an ionisable group in the pH range, whose shift
    comes from the buffer or additive change), and ``agree_ionising`` / ``n_ionising``: the
    same as ``agree_obs`` restricted to compounds whose neutral fraction (Henderson-
    Hasselbalch on the chemistry layer's sites) changes by more than 0.05 between the two pH.
    ``agree_compound`` / ``n_compound`` count compounds, not pairs of systems: each
    compound of a series once, by its shift from the lowest to the highest pH at which the
    series measured it (among compounds that move over ``min_shift_min`` across that span).
    """
    pos = {sy.dataset: i for i, sy in enumerate(ts.systems)}
    if series is None:
        members_list = ph_series(ts.systems)
    else:
        members_list = [[pos[d] for d in sorted(g) if d in pos] for g in series]
    d_obs_all, d_pred_all, d_f0_all, key_all, span_all = [], [], [], [], []
    for g, members in enumerate(members_list):
        for i in members:
            for j in members:
                if not ts.systems[i].ph < ts.systems[j].ph:
                    continue
                mi = np.flatnonzero(ts.system_idx == i)
                mj = np.flatnonzero(ts.system_idx == j)
                _, ia, ja = np.intersect1d(ts.solute_idx[mi], ts.solute_idx[mj],
                                           return_indices=True)
                ri, rj = mi[ia], mj[ja]
                d_obs_all.append(ts.rt_min[rj] - ts.rt_min[ri])
                pi = elute(fp.log_kw[ri], ts.s[ri], ts.systems[i].program).rt_min
                pj = elute(fp.log_kw[rj], ts.s[rj], ts.systems[j].program).rt_min
                d_pred_all.append(pj - pi)
                sites = ts.solutes.sites.take(ts.solute_idx[ri])
                f0 = [ionise(sites, np.full(ri.size, ts.systems[k].ph)).f_neutral for k in (i, j)]
                d_f0_all.append(np.abs(f0[1] - f0[0]))
                key_all.append(g * (ts.solutes.batch.usable.size + 1) + ts.solute_idx[ri])
                span_all.append(np.full(ri.size, ts.systems[j].ph - ts.systems[i].ph))
    nan = float("nan")
    if not d_obs_all:
        return {"agree_obs": nan, "n_obs": 0, "agree_pred": nan, "n_pred": 0,
                "flat_obs": nan, "agree_ionising": nan, "n_ionising": 0,
                "agree_compound": nan, "n_compound": 0}
    do, dp = np.concatenate(d_obs_all), np.concatenate(d_pred_all)
    ionising = np.concatenate(d_f0_all) > 0.05
    same = np.sign(do) == np.sign(dp)
    big_o, big_p = np.abs(do) > min_shift_min, np.abs(dp) > min_shift_min
    # one row per (series, compound): its widest pH span (first such pair on ties)
    keys, span = np.concatenate(key_all), np.concatenate(span_all)
    order = np.lexsort((-span, keys))
    widest = order[np.r_[True, keys[order][1:] != keys[order][:-1]]]
    widest = widest[big_o[widest]]
    return {"agree_obs": float(same[big_o].mean()) if big_o.any() else nan,
            "n_obs": int(big_o.sum()),
            "agree_pred": float(same[big_p].mean()) if big_p.any() else nan,
            "n_pred": int(big_p.sum()),
            "flat_obs": float(np.mean(np.abs(dp[big_o]) < 0.01)) if big_o.any() else nan,
            "agree_ionising": (float(same[big_o & ionising].mean()) if (big_o & ionising).any()
                               else nan),
            "n_ionising": int((big_o & ionising).sum()),
            "agree_compound": float(same[widest].mean()) if widest.size else nan,
            "n_compound": int(widest.size)}

def rescore_pairs(pairs: pd.DataFrame, scale: float) -> pd.DataFrame:
    """The same pairs with the spacing sd multiplied by ``scale``."""
    from retpred.peaks import unresolved_probability

    w = pairs["half_window_min"].to_numpy()
    risk = unresolved_probability(pairs["delta_min"].to_numpy(), w / 6.0, w / 6.0,
                                  scale * pairs["pair_sd_min"].to_numpy(), 1.5)
    return pairs.assign(risk=risk)


PAIR_SD_SCALE_GRID = np.geomspace(0.02, 2.0, 60)


def fit_pair_sd_scale(pairs: pd.DataFrame, grid=PAIR_SD_SCALE_GRID) -> float:
    """Scale of the spacing sd that minimises the log-loss of the unresolved outcome of
    left-out neighbour pairs (an empirical recalibration of the Gaussian error model)."""
    y = pairs["unresolved"].to_numpy(bool)

    def loss(c):
        return _log_loss(rescore_pairs(pairs, c)["risk"].to_numpy(), y)

    return float(min(grid, key=loss))
