"""A lab's own model: the shipped open-data model plus a correction learned on in-house data.

For every in-house measurement the observed ``log kw`` (exact inverse through the gradient
engine on its own method) is compared with the open-data prediction. The correction is

    log kw_lab = a + b (log kw_open - pivot) + h(solute, log kw_open)

with ``a, b`` a robust (repeated-median) line and ``h`` either a small, strongly regularised
gradient-boosting model of what is left, or the neighbour correction of
``retpred.calibration`` (each lab compound's residual shared with structurally similar
analytes by count-fingerprint Tanimoto similarity), or nothing (the shipped model, or it
shifted). The simplest candidate within 5 % of the smallest 5-fold cross-validated error
over compounds is used, and the figures are reported side by side with the shipped model's.
"""

from __future__ import annotations

import copy
import dataclasses
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from scipy.stats import siegelslopes
from sklearn.ensemble import HistGradientBoostingRegressor
from sklearn.model_selection import KFold

from retpred.calibration import neighbour_correction
from retpred.errors import InputError
from retpred.gradient import elute, log_kw_from_rt
from retpred.io import atomic_output_path, read_training_data
from retpred.method import load_method, method_summary, run_key
from retpred.model import (
    FINGERPRINT_COLUMNS,
    data_fingerprint,
    featurise,
    now_utc,
    same_column,
    solute_matrix,
)
from retpred.modelfile import default_model_path, load_model, save_model, sha256_file
from retpred.predict import prepare
from retpred.training import void_bound_log_kw

MIN_COMPOUNDS = 20
#: Loss of the lab correction's boosting (the 'lab_model' candidate): absolute error since
#: December 2026 (`scripts/bench_lab_halves.py`: median ratio 0.48 against 0.54 with squared
#: error, on the same left-out systems and halves; DEVELOPERS.md, "Lab corrections").
LAB_GBM_LOSS = "absolute_error"

#: A prediction system counts as one the lab model was trained on when its eluent and
#: column parameters are the same and its pH and temperature are within these (our choice:
#: an ionisable analyte's retention can move visibly over a few tenths of a pH unit near
#: its pKa, and retention factors change by roughly 1-2 % per degree, common practice).
LAB_PH_TOLERANCE = 0.3
LAB_TEMPERATURE_TOLERANCE_C = 5.0


def system_record(context, summary: str, key_of_run: str = "") -> dict:
    """What a lab model keeps of a training method's system (for :func:`lab_domain_note`
    and the lab standards' matching, :meth:`RetentionModel.lab_standard_offsets`)."""
    return {"organic": context.organic, "ph": float(context.ph),
            "temperature_c": float(context.temperature_c),
            "hsm": [float(v) for v in dataclasses.astuple(context.hsm)], "summary": summary,
            "run_key": key_of_run}


def lab_standards(keys: Sequence[str], system: np.ndarray, obs_lk: np.ndarray,
                  fitted_lk: np.ndarray) -> dict | None:
    """The lab's measured compounds as standards: per structure key and lab system, the
    mean of ``obs_lk - fitted_lk`` over its retained rows (replicates averaged in
    ``log kw``), so that the lab model gives a compound it was trained on its measured
    retention back, as a calibration does its standards (DEVELOPERS.md, "Measured
    standards"). Rows without a ``log kw`` (at or before the dead time) or a key are left
    out. None when no row qualifies."""
    groups: dict[tuple[str, int], list[float]] = {}
    for k, j, o, f in zip(keys, system, obs_lk, fitted_lk, strict=True):
        if k and np.isfinite(o) and np.isfinite(f):
            groups.setdefault((str(k), int(j)), []).append(float(o - f))
    if not groups:
        return None
    items = sorted(groups.items())
    return {"keys": [k for (k, _), _ in items], "systems": [j for (_, j), _ in items],
            "offsets": [float(np.mean(v)) for _, v in items]}


def _differences(rec: dict, context) -> list[str]:
    out = []
    if rec["organic"] != context.organic:
        out.append(f"organic modifier ({context.organic}, trained with {rec['organic']})")
    if not same_column(rec, context):
        out.append("column (other HSM parameters or phase class)")
    if abs(rec["ph"] - context.ph) > LAB_PH_TOLERANCE:
        out.append(f"pH ({context.ph:g}, trained at {rec['ph']:g})")
    if abs(rec["temperature_c"] - context.temperature_c) > LAB_TEMPERATURE_TOLERANCE_C:
        out.append(f"temperature ({context.temperature_c:g} C, trained at "
                   f"{rec['temperature_c']:g} C)")
    return out


def lab_domain_note(model, context) -> str | None:
    """A note when ``model`` is a lab model and ``context`` (the prediction's system) is not
    one of the systems it was trained on: its correction is then carried to a system it
    never saw. Gradient, flow, dwell volume and column size do not count: the gradient
    engine takes them, the correction acts on ``log kw``. None for the shipped model and
    for lab models written before the systems were recorded."""
    records = (getattr(model, "meta_", None) or {}).get("lab_systems")
    if not records:
        return None
    diffs = [_differences(r, context) for r in records]
    if any(not d for d in diffs):
        return None
    nearest = min(diffs, key=len)
    return ("the lab model was trained on other conditions: this method differs in "
            + "; ".join(nearest) + ". Its correction is carried over untested; check it "
            "with a few standards (--calibrants)")


#: The shipped model unchanged or shifted are candidates too (when the lab's data show that
#: it is already as good as any correction of it). In order of complexity; the simplest
#: within ``SELECT_TOLERANCE`` of the best CV error is used (a parsimony rule in the spirit
#: of the one-standard-error rule: small CV gains of a more flexible correction do not
#: survive new compounds).
CANDIDATES = ("shipped_zero_shot", "shipped_calibrated", "lab_linear", "lab_neighbours",
              "lab_model")
SELECT_TOLERANCE = 0.05


def _fit_correction(base: np.ndarray, obs: np.ndarray, x: np.ndarray, kind: str):
    """``kind``: 'lab_linear' (line only), 'lab_model' (line + GBM), 'lab_neighbours',
    'shipped_calibrated' (shift only) or 'shipped_zero_shot' (identity)."""
    if kind == "shipped_zero_shot":
        return {"offset": 0.0, "slope": 1.0, "pivot": 0.0}, None
    if kind == "shipped_calibrated":
        return {"offset": float(np.median(obs - base)), "slope": 1.0, "pivot": 0.0}, None
    pivot = float(np.median(base))
    res = siegelslopes(obs, base) if np.ptp(base) > 0 else None
    slope = float(np.clip(res.slope, 0.5, 2.0)) if res is not None else 1.0
    offset = float(np.median(obs - slope * (base - pivot)))
    lin = {"offset": offset, "slope": slope, "pivot": pivot}
    gbm = None
    resid = obs - (offset + slope * (base - pivot))
    if kind == "lab_model":
        # absolute error, as the open-data boosting (model.GBM_LOSS): a lab file holds
        # mis-assigned peaks too (DEVELOPERS.md, "Lab corrections")
        gbm = HistGradientBoostingRegressor(
            loss=LAB_GBM_LOSS, max_iter=150, learning_rate=0.05, max_leaf_nodes=8,
            min_samples_leaf=5, l2_regularization=2.0, random_state=0,
        ).fit(np.column_stack([x, base]), resid)
    elif kind == "lab_neighbours":
        lin["neighbours"] = {"fingerprints": x[:, FINGERPRINT_COLUMNS].astype(int).tolist(),
                             "residuals": resid.tolist()}
    return lin, gbm


def _apply(lin, gbm, base, x):
    out = lin["offset"] + lin["slope"] * (base - lin["pivot"])
    if gbm is not None:
        out = out + gbm.predict(np.column_stack([x, base]))
    nb = lin.get("neighbours")
    if nb:
        out = out + neighbour_correction(x[:, FINGERPRINT_COLUMNS], np.asarray(nb["fingerprints"]),
                                         np.asarray(nb["residuals"]))
    return out


def _fit_censored(base: np.ndarray, obs: np.ndarray, x: np.ndarray, upper: np.ndarray,
                  kind: str):
    """:func:`_fit_correction` on the retained rows (finite ``obs``), then, if any row has
    only an upper bound (finite ``upper``: eluted at or near t0), refitted with those rows
    at the target ``min(mu, b)``, ``mu`` the first fit's value: the same censored-regression
    step as the training data's void rows and the calibration's void standards
    (DEVELOPERS.md, "Void rows")."""
    retained = np.isfinite(obs)
    lin, gbm = _fit_correction(base[retained], obs[retained], x[retained], kind)
    void = np.isfinite(upper) & ~retained
    if kind == "shipped_zero_shot" or not void.any():
        return lin, gbm
    y = obs.copy()
    y[void] = np.minimum(_apply(lin, gbm, base[void], x[void]), upper[void])
    use = retained | void
    return _fit_correction(base[use], y[use], x[use], kind)


def select_correction(base_lk: np.ndarray, obs_lk: np.ndarray, x: np.ndarray,
                      obs_rt: np.ndarray, rt_of, n_splits: int = 5, seed: int = 0,
                      upper_lk: np.ndarray | None = None):
    """Choose the correction by ``n_splits``-fold cross-validation over compounds and fit it.

    ``obs_lk`` is NaN for compounds measured at or before the dead time: they have no
    log kw to fit, but they are measurements all the same and count in the cross-validated
    time error (a correction fitted on the retained compounds alone is biased towards more
    retention and would move the unretained ones later). ``upper_lk`` (NaN elsewhere) is the
    upper bound on ``log kw`` of compounds eluting at or near t0
    (:func:`retpred.training.void_bound_log_kw`); they enter every fit as censored rows
    (:func:`_fit_censored`). ``rt_of(log_kw, sel)`` gives the times of the rows ``sel`` on
    their own methods. The simplest candidate within ``SELECT_TOLERANCE`` of the lowest
    median |error| wins and is refitted on every compound. Returns
    ``(kind, {kind: CV median |error| min}, line, gbm)``.
    """
    upper = np.full(base_lk.size, np.nan) if upper_lk is None else np.asarray(upper_lk, float)
    folds = KFold(n_splits=n_splits, shuffle=True, random_state=seed)
    errs = {k: [] for k in CANDIDATES}
    for tr, te in folds.split(base_lk):
        for kind in CANDIDATES:
            lin, gbm = _fit_censored(base_lk[tr], obs_lk[tr], x[tr], upper[tr], kind)
            pred = _apply(lin, gbm, base_lk[te], x[te])
            errs[kind].append(np.abs(rt_of(pred, te) - obs_rt[te]))
    metrics = {k: float(np.nanmedian(np.concatenate(v))) for k, v in errs.items()}
    lowest = min(metrics.values())
    best = next(k for k in CANDIDATES if metrics[k] <= (1 + SELECT_TOLERANCE) * lowest)
    lin, gbm = _fit_censored(base_lk, obs_lk, x, upper, best)
    return best, metrics, lin, gbm


def train_lab_model(
    data: Sequence[Path], methods: Sequence[Path], *, out: Path, base_model: Path | None = None,
    force: bool = False, quiet: bool = False,
):
    """Train, cross-validate and write a lab model; returns the metrics dict."""
    data, methods = list(data), list(methods)
    if len(methods) not in (1, len(data)):
        raise InputError(f"give one --method for all files or one per file "
                         f"({len(data)} files, {len(methods)} methods)", field="--method")
    out = Path(out)
    if out.resolve() == default_model_path().resolve():
        raise InputError("refusing to overwrite the shipped default model", path=str(out))
    inputs = [*data, *methods, base_model]
    base = load_model(base_model)
    if base.meta_.get("lab_trained") or base.lab_linear_ is not None:
        # its correction would be fitted on top of the first one and then stored in its
        # place (the correction acts on the open-data prediction): refuse, do not compose
        raise InputError(
            "this is already a lab model (trained " + str(base.meta_.get("lab_trained", "?"))
            + "); build a lab model from an open-data model: train again from the shipped "
            "model with all in-house files at once (several files, one --method each)",
            path=str(base_model), field="--model")
    rows_smiles, rows_rt, rows_method = [], [], []
    preps = []
    for i, path in enumerate(data):
        mpath = methods[0] if len(methods) == 1 else methods[i]
        df = read_training_data(path)
        preps.append(prepare(load_method(mpath), base))
        rows_smiles += df["smiles"].tolist()
        rows_rt += df["rt_min"].tolist()
        rows_method += [i if len(methods) > 1 else 0] * len(df)
    if len(methods) == 1:
        preps = preps[:1]
    sol = featurise(rows_smiles)
    rt = np.asarray(rows_rt, float)
    which = np.asarray(rows_method)
    base_lk = np.full(rt.size, np.nan)
    obs_lk = np.full(rt.size, np.nan)
    upper_lk = np.full(rt.size, np.nan)
    s = np.full(rt.size, np.nan)
    meoh = np.zeros(rt.size)
    for j, prep in enumerate(preps):
        m = which == j
        lk, ss = base.retention_parameters(sol, prep.context, idx=np.flatnonzero(m))
        base_lk[m], s[m] = lk, ss
        upper_lk[m] = void_bound_log_kw(rt[m], ss, prep.program)
        obs_lk[m] = np.where(np.isfinite(upper_lk[m]), np.nan,
                             log_kw_from_rt(rt[m], ss, prep.program))
        meoh[m] = 1.0 if prep.context.organic == "methanol" else 0.0
    # compounds eluting at or near t0 (a bound, not a log kw) and before it (nothing)
    # still count in the choice: see select_correction
    usable = np.isfinite(base_lk)
    n_ok = int((usable & np.isfinite(obs_lk)).sum())
    if n_ok < MIN_COMPOUNDS:
        raise InputError(
            f"only {n_ok} usable compound(s); a lab model needs at least {MIN_COMPOUNDS}. "
            "With fewer standards use 'retpred calibrate' instead", path=str(data[0]))
    idx = np.flatnonzero(usable)
    x = solute_matrix(sol, idx, meoh[idx])
    b, o = base_lk[idx], obs_lk[idx]

    def rt_of(lk, sel):
        res = np.full(sel.size, np.nan)
        for j, prep in enumerate(preps):
            m = which[idx][sel] == j
            if m.any():
                res[m] = elute(lk[m], s[idx][sel][m], prep.program).rt_min
        return res

    best, metrics, lin, gbm = select_correction(b, o, x, rt[idx], rt_of,
                                                upper_lk=upper_lk[idx])
    keys = np.asarray(sol.memory_keys, dtype=object)[idx]
    standards = lab_standards(keys, which[idx], o, _apply(lin, gbm, b, x))
    lab = copy.copy(base)
    lab.lab_standards_ = standards
    lab.lab_neighbours_ = lin.pop("neighbours", None)
    lab.lab_linear_ = lin
    lab.lab_gbm_ = gbm
    lab.meta_ = {
        **{k: v for k, v in base.meta_.items() if k != "path"},
        "lab_trained": now_utc(),
        "lab_training_files": [str(p) for p in data],
        "lab_training_sha256": data_fingerprint(*(Path(p).read_bytes() for p in data)),
        "lab_systems": [system_record(p.context, method_summary(p.method), run_key(p.method))
                        for p in preps],
        "lab_n_standards": 0 if standards is None else len(standards["keys"]),
        "lab_n_compounds": n_ok,
        "lab_n_unretained": int(np.isnan(o).sum()),
        "lab_n_near_t0": int(np.isfinite(upper_lk[idx]).sum()),
        "lab_cv_median_abs_error_min": metrics,
        "lab_correction": {"lab_linear": "linear", "lab_model": "linear + gradient boosting",
                           "lab_neighbours": "linear + neighbours",
                           "shipped_calibrated": "shift of the shipped model",
                           "shipped_zero_shot": "none (the shipped model was best)"}[best],
        "base_model_sha256": sha256_file(Path(base.meta_.get("path", default_model_path()))),
    }
    with atomic_output_path(out, force=force, inputs=inputs) as tmp:
        save_model(lab, tmp)
    if not quiet:
        from retpred.report import make_console

        c = make_console()
        c.print(f"lab model from {n_ok} compounds ({lab.meta_['lab_correction']}); "
                "5-fold cross-validated median |error| in minutes:")
        for k, v in metrics.items():
            c.print(f"  {k:<20} {v:.3f}")
        if standards:
            c.print(f"{len(standards['keys'])} compound(s) kept as measured standards: on "
                    "their own method the model gives their measured times back")
        c.print(f"wrote {out}")
    return metrics
