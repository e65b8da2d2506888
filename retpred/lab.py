"""A lab's own model: the shipped open-data model plus a correction learned on in-house data.

For every in-house measurement the observed ``log kw`` (exact inverse through the gradient
engine on its own method) is compared with the open-data prediction. The correction is

    log kw_lab = a + b (log kw_open - pivot) + h(solute, log kw_open)

with ``a, b`` a robust (repeated-median) line and ``h`` a small, strongly regularised
gradient-boosting model of what is left. Both are chosen against the shipped model by
5-fold cross-validation over compounds, and the figures are reported side by side.
"""

from __future__ import annotations

import copy
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from scipy.stats import siegelslopes
from sklearn.ensemble import HistGradientBoostingRegressor
from sklearn.model_selection import KFold

from retpred.errors import InputError
from retpred.gradient import elute, log_kw_from_rt
from retpred.io import atomic_output_path, read_training_data
from retpred.method import load_method
from retpred.model import data_fingerprint, featurise, now_utc, solute_matrix
from retpred.modelfile import default_model_path, load_model, save_model, sha256_file
from retpred.predict import prepare

MIN_COMPOUNDS = 20


def _fit_correction(base: np.ndarray, obs: np.ndarray, x: np.ndarray, with_gbm: bool):
    pivot = float(np.median(base))
    res = siegelslopes(obs, base) if np.ptp(base) > 0 else None
    slope = float(np.clip(res.slope, 0.5, 2.0)) if res is not None else 1.0
    offset = float(np.median(obs - slope * (base - pivot)))
    lin = {"offset": offset, "slope": slope, "pivot": pivot}
    gbm = None
    if with_gbm:
        resid = obs - (offset + slope * (base - pivot))
        gbm = HistGradientBoostingRegressor(
            max_iter=150, learning_rate=0.05, max_leaf_nodes=8, min_samples_leaf=5,
            l2_regularization=2.0, random_state=0,
        ).fit(np.column_stack([x, base]), resid)
    return lin, gbm


def _apply(lin, gbm, base, x):
    out = lin["offset"] + lin["slope"] * (base - lin["pivot"])
    if gbm is not None:
        out = out + gbm.predict(np.column_stack([x, base]))
    return out


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
    s = np.full(rt.size, np.nan)
    meoh = np.zeros(rt.size)
    for j, prep in enumerate(preps):
        m = which == j
        lk, ss = base.retention_parameters(sol, prep.context, idx=np.flatnonzero(m))
        base_lk[m], s[m] = lk, ss
        obs_lk[m] = log_kw_from_rt(rt[m], ss, prep.program)
        meoh[m] = 1.0 if prep.context.organic == "methanol" else 0.0
    ok = np.isfinite(base_lk) & np.isfinite(obs_lk)
    n_ok = int(ok.sum())
    if n_ok < MIN_COMPOUNDS:
        raise InputError(
            f"only {n_ok} usable compound(s); a lab model needs at least {MIN_COMPOUNDS}. "
            "With fewer standards use 'retpred calibrate' instead", path=str(data[0]))
    idx = np.flatnonzero(ok)
    x = solute_matrix(sol, idx, meoh[idx])
    b, o = base_lk[idx], obs_lk[idx]

    def rt_of(lk, sel):
        res = np.full(sel.size, np.nan)
        for j, prep in enumerate(preps):
            m = which[idx][sel] == j
            if m.any():
                res[m] = elute(lk[m], s[idx][sel][m], prep.program).rt_min
        return res

    folds = KFold(n_splits=5, shuffle=True, random_state=0)
    errs = {"shipped_zero_shot": [], "shipped_calibrated": [], "lab_linear": [], "lab_model": []}
    for tr, te in folds.split(idx):
        obs_rt = rt[idx][te]
        errs["shipped_zero_shot"].append(np.abs(rt_of(b[te], te) - obs_rt))
        shift = float(np.median(o[tr] - b[tr]))
        errs["shipped_calibrated"].append(np.abs(rt_of(b[te] + shift, te) - obs_rt))
        lin, _ = _fit_correction(b[tr], o[tr], x[tr], with_gbm=False)
        errs["lab_linear"].append(np.abs(rt_of(_apply(lin, None, b[te], x[te]), te) - obs_rt))
        lin, gbm = _fit_correction(b[tr], o[tr], x[tr], with_gbm=True)
        errs["lab_model"].append(np.abs(rt_of(_apply(lin, gbm, b[te], x[te]), te) - obs_rt))
    metrics = {k: float(np.nanmedian(np.concatenate(v))) for k, v in errs.items()}
    use_gbm = metrics["lab_model"] <= metrics["lab_linear"]
    lin, gbm = _fit_correction(b, o, x, with_gbm=use_gbm)
    lab = copy.copy(base)
    lab.lab_linear_ = lin
    lab.lab_gbm_ = gbm
    lab.meta_ = {
        **{k: v for k, v in base.meta_.items() if k != "path"},
        "lab_trained": now_utc(),
        "lab_training_files": [str(p) for p in data],
        "lab_training_sha256": data_fingerprint(*(Path(p).read_bytes() for p in data)),
        "lab_n_compounds": n_ok,
        "lab_cv_median_abs_error_min": metrics,
        "lab_correction": "linear + gradient boosting" if use_gbm else "linear",
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
        c.print(f"wrote {out}")
    return metrics
