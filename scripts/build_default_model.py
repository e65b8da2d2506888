"""Rebuild the shipped default model from the open data, deterministically.

    python scripts/build_default_model.py [--data PATH] [--out models/retpred-default.skops]
                                          [--folds 5] [--force]
                                          [--validate-only [--split source|dataset]]
                                          [--draws 5] [--seed 0]

``--validate-only`` is the validation benchmark: it prints the whole table (model, the
log P + calibrants baseline and the descriptor-GBM baseline, all computed in the same run)
and writes nothing. Its folds leave out whole source publications; ``--split dataset``
leaves out single systems instead (retention-physics.md section 8 allows either and
prefers the source split: with it, no other system of a left-out system's lab, compounds
or pH series is in training). The build itself always splits by source.
``--draws`` sets how many random sets of 10 calibrants each left-out system draws (the
figures are averaged over them; 5 by default, which is what the model card reports) and
``--seed`` the generator they come from. With ``--draws 20`` the 10-calibrant median is
averaged over 20 draws per system, with a quarter of the draw-to-draw variance of the
default (four times the calibrations: 13 minutes for the whole run against 8
on a quiet 2-core machine, December 2026).

Steps: load ../shared/datasets/open-rp (or --data / $RETPRED_OPEN_RP) -> invert every
observed time into log kw on its own system -> cross-validate by source publication
(grouped folds) for the prediction-interval quantiles, the neighbour error correlation and
the validation figures -> fit the final model on everything -> write the model, its
SHA-256 and the model card (models/MODEL_CARD.md) atomically.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from retpred import __version__  # noqa: E402
from retpred.evaluation import (  # noqa: E402
    analyte_risk_summary,
    calibrated_residual_quantiles,
    coelution_lists,
    coelution_pairs,
    cross_validate,
    evaluate,
    fit_analyte_risk,
    fit_pair_sd_scale,
    novel_rows,
    ph_shift_agreement,
    phi_residuals,
    rescore_pairs,
    risk_calibration_table,
    split_quantiles,
    summarise,
)
from retpred.io import atomic_output, atomic_output_path  # noqa: E402
from retpred.model import data_fingerprint, now_utc  # noqa: E402
from retpred.modelfile import DEFAULT_MODEL_NAME, MODELS_DIR, save_model, sha256_file  # noqa: E402
from retpred.opendata import find_open_data, not_found_message  # noqa: E402
from retpred.training import (  # noqa: E402
    COMPANION_SHRINK,
    MIN_RT_OVER_T0,
    fit_model,
    load_open_training_set,
)

#: Fixed subset used by the test that checks the shipped model reproduces its figures:
#: every 37th usable system in dataset order (chosen by position, not by results).
CHECK_STEP = 37


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--data", type=Path, default=None)
    ap.add_argument("--out", type=Path, default=MODELS_DIR / DEFAULT_MODEL_NAME)
    ap.add_argument("--folds", type=int, default=5)
    ap.add_argument("--force", action="store_true")
    ap.add_argument("--validate-only", action="store_true",
                    help="run the whole validation and print its table; write nothing")
    ap.add_argument("--split", choices=("source", "dataset"), default="source",
                    help="with --validate-only: leave out source publications (default) or "
                         "single systems")
    ap.add_argument("--draws", type=int, default=5,
                    help="random sets of 10 calibrants per left-out system (default 5)")
    ap.add_argument("--seed", type=int, default=0,
                    help="seed of the calibrant draws (default 0)")
    args = ap.parse_args(argv)
    if args.draws < 1:
        print(f"--draws: {args.draws} is not a positive number of draws", file=sys.stderr)
        return 2
    if args.split != "source" and not args.validate_only:
        print("--split dataset is for --validate-only; the build splits by source",
              file=sys.stderr)
        return 2
    root = find_open_data(args.data)
    if root is None:
        print(not_found_message(args.data), file=sys.stderr)
        return 2
    t_start = time.perf_counter()
    ts = load_open_training_set(root)
    print(f"training set: {ts.rt_min.size} rows and {ts.void.solute_idx.size} void rows, "
          f"{len(ts.systems)} systems, {len(np.unique(ts.groups))} sources "
          f"({time.perf_counter() - t_start:.0f} s)")
    fp = cross_validate(ts, n_folds=args.folds, split=args.split)
    table = evaluate(ts, fp, n_draws=args.draws, seed=args.seed)
    print(f"calibrant draws: {args.draws} per left-out system, seed {args.seed}")
    summary = summarise(table)
    # interval quantiles, pooled and for compounds new to training (wider; predict uses
    # them for structures outside the compound memory)
    novel = novel_rows(ts, fp)
    q_zero, q_zero_new = (list(map(float, q)) for q in
                          split_quantiles(phi_residuals(ts, fp), novel))
    q_cal, q_cal_new, rho = calibrated_residual_quantiles(ts, fp, rows=novel)
    pairs = coelution_pairs(ts, fp, tuple(q_cal), rho, calibrated=True,
                            q_phi_novel=tuple(q_cal_new))
    pairs_zero = coelution_pairs(ts, fp, tuple(q_zero), rho, calibrated=False,
                                 q_phi_novel=tuple(q_zero_new))
    # a scale of the spacing sd per regime, fitted on its left-out pairs (log-loss): one
    # shared scale over-stated calibrated risks and under-stated zero-shot ones
    sd_scale_cal = fit_pair_sd_scale(pairs)
    sd_scale_zero = fit_pair_sd_scale(pairs_zero)
    risk_table = risk_calibration_table(rescore_pairs(pairs, sd_scale_cal))
    risk_table_zero = risk_calibration_table(rescore_pairs(pairs_zero, sd_scale_zero))
    summary["pair_sd_scale_calibrated"] = sd_scale_cal
    summary["pair_sd_scale_zero_shot"] = sd_scale_zero
    # per-analyte risk (at least one partner in the list): random 20-analyte lists of the
    # left-out systems, an sd scale and a logistic recalibration per regime
    analyte_risk, analyte_tables = {}, {}
    for regime, q, q_new in (("calibrated", q_cal, q_cal_new), ("zero_shot", q_zero,
                                                                  q_zero_new)):
        lists = coelution_lists(ts, fp, tuple(q), calibrated=regime == "calibrated",
                                q_phi_novel=tuple(q_new))
        analyte_risk[regime] = list(fit_analyte_risk(lists, rho))
        scored, figures = analyte_risk_summary(lists, rho, analyte_risk[regime])
        analyte_tables[regime] = risk_calibration_table(scored)
        summary.update({f"analyte_risk_{k}_{regime}": v for k, v in figures.items()})
    ph = ph_shift_agreement(ts, fp)
    summary["ph_shift_sign_agreement"] = ph["agree_obs"]
    summary["ph_shift_n"] = ph["n_obs"]
    summary["ph_shift_sign_agreement_predicted"] = ph["agree_pred"]
    summary["ph_shift_flat_share"] = ph["flat_obs"]
    summary["ph_shift_sign_agreement_ionising"] = ph["agree_ionising"]
    summary["ph_shift_n_ionising"] = ph["n_ionising"]
    summary["ph_shift_sign_agreement_compounds"] = ph["agree_compound"]
    summary["ph_shift_n_compounds"] = ph["n_compound"]
    print(f"cross-validated ({time.perf_counter() - t_start:.0f} s)")
    print(risk_table.to_string())
    for regime, t in analyte_tables.items():
        print(f"per-analyte risk, {regime}:")
        print(t.to_string())
    if args.validate_only:
        print(json.dumps(summary, indent=1))
        print(model_card(summary, {"trained": "-", "training_data": "open-rp", "n_rows":
                                   int(ts.rt_min.size), "n_systems": len(ts.systems),
                                   "n_void_rows": int(ts.void.solute_idx.size),
                                   "training_data_sha256": "-",
                                   "validation": f"GroupKFold({args.folds}) by {args.split}; "
                                                 f"{args.draws} calibrant draws, seed {args.seed}"},
                         table, "-", time.perf_counter() - t_start))
        return 0
    model = fit_model(ts)
    summary["n_memory_compounds"] = len(model.memory_)
    summary["n_skeleton_forms"] = len(model.skeleton_memory_)
    model.residual_quantiles_ = {"zero_shot": q_zero, "calibrated": q_cal,
                                 "zero_shot_new": q_zero_new, "calibrated_new": q_cal_new,
                                 "levels": [0.05, 0.95]}
    model.residual_sd_ = {"neighbour_rho": rho, "pair_sd_scale_calibrated": sd_scale_cal,
                          "pair_sd_scale_zero_shot": sd_scale_zero,
                          "analyte_risk_calibrated": analyte_risk["calibrated"],
                          "analyte_risk_zero_shot": analyte_risk["zero_shot"]}
    model.metrics_ = summary
    raw = b"".join((root / f).read_bytes() for f in ("systems.tsv", "gradients.tsv",
                                                    "compounds.tsv.gz"))
    model.meta_ = {
        "trained": now_utc(),
        "training_data": "open-rp (derived from RepoRT, CC BY-SA 4.0)",
        "training_data_sha256": data_fingerprint(raw),
        "n_rows": int(ts.rt_min.size),
        "n_void_rows": int(ts.void.solute_idx.size),
        "n_systems": len(ts.systems),
        "validation": f"GroupKFold({args.folds}) by source publication; "
                      f"{args.draws} calibrant draws, seed {args.seed}",
    }
    # Figures on the fixed check subset, recorded for the reproduction test.
    from retpred.training import predict_rows

    check_ids = sorted({s.dataset for s in ts.systems[::CHECK_STEP]})
    check = np.isin([ts.systems[i].dataset for i in ts.system_idx], check_ids)
    if check.any():
        _, _, rt = predict_rows(model, ts, check)
        err = np.abs(rt - ts.rt_min[check])
        model.meta_["check_subset"] = {
            "datasets": check_ids,
            "n_rows": int(check.sum()),
            "median_abs_error_min": float(np.nanmedian(err)),
        }
    with atomic_output_path(args.out, force=args.force) as tmp:
        save_model(model, tmp)
    sha = sha256_file(args.out)
    with atomic_output(args.out.with_suffix(args.out.suffix + ".sha256"), force=True) as fh:
        fh.write(f"{sha}  {args.out.name}\n")
    card = model_card(summary, model.meta_, table, sha, time.perf_counter() - t_start)
    card += analyte_risk_section(analyte_tables, summary)
    card += risk_section(risk_table, risk_table_zero)
    with atomic_output(args.out.parent / "MODEL_CARD.md", force=True) as fh:
        fh.write(card)
    with atomic_output(args.out.parent / "validation.tsv", force=True) as fh:
        table.to_csv(fh, sep="\t", index=False, float_format="%.4f", lineterminator="\n")
    print(json.dumps(summary, indent=1))
    print(f"wrote {args.out} ({args.out.stat().st_size / 1e6:.1f} MB) sha256 {sha}")
    return 0


def model_card(summary: dict, meta: dict, table, sha: str, seconds: float) -> str:
    def f(k, d=1):
        v = summary.get(k, float("nan"))
        return f"{v:.{d}f}"

    def count(k):
        # Counted on the fitted model; --validate-only fits none.
        v = summary.get(k)
        return "" if v is None else f"{v} "

    spec = [
        ("zero-shot MedAE, % of last rt", "zero_medae_pct", "gbm_zero_medae_pct", None, 1),
        ("10 calibrants MedAE, % of last rt", "cal_medae_pct", "gbm_cal_medae_pct",
         "logp_cal_medae_pct", 1),
        ("zero-shot MedAE, median over source publications, %",
         "zero_medae_pct_over_sources", None, None, 2),
        ("10 calibrants MedAE, median over source publications, %",
         "cal_medae_pct_over_sources", None, "logp_cal_medae_pct_over_sources", 2),
        ("10 calibrants MAE, % of last rt", "cal_mae_pct", "gbm_cal_mae_pct",
         "logp_cal_mae_pct", 1),
        ("10 calibrants Spearman rho", "cal_spearman", "gbm_cal_spearman",
         "logp_cal_spearman", 3),
        ("10 calibrants order accuracy", "cal_order_acc", "gbm_cal_order_acc",
         "logp_cal_order_acc", 3),
        ("zero-shot MedAE on compounds new to training, %", "zero_novel_medae_pct", None,
         None, 1),
        ("10 calibrants MedAE on compounds new to training, %", "cal_novel_medae_pct", None,
         None, 1),
        ("zero-shot Spearman rho", "zero_spearman", None, None, 3),
        ("zero-shot order accuracy", "zero_order_acc", None, None, 3),
        ("zero-shot 90 % interval coverage (pooled rows)", "zero_interval_coverage_pooled",
         None, None, 3),
        ("calibrated 90 % interval coverage (pooled rows)", "cal_interval_coverage_pooled",
         None, None, 3),
        ("zero-shot 90 % interval coverage, compounds new to training",
         "zero_novel_interval_coverage_pooled", None, None, 3),
        ("calibrated 90 % interval coverage, compounds new to training",
         "cal_novel_interval_coverage_pooled", None, None, 3),
    ]
    rows = "\n".join(
        f"| {label} | {f(a, d)} | {f(b, d) if b else '-'} | {f(c, d) if c else '-'} |"
        for label, a, b, c, d in spec
    )
    return f"""# Model card: retpred default retention model

- Tool version: {__version__}; trained {meta['trained']}; build time {seconds / 60:.1f} min
  on this machine; SHA-256 `{sha}`.
- Training data: {meta['training_data']}: {meta['n_rows']} retention times on
  {meta['n_systems']} reversed-phase systems, and {meta.get('n_void_rows', '-')} compounds
  that eluted at or near t0 (up to {MIN_RT_OVER_T0:g} t0), kept as upper bounds on log kw. RepoRT
  collects published LC retention times with their chromatographic metadata; each dataset
  keeps its source publication (DOI in `systems.tsv`). The data and adaptations of it are
  licensed CC BY-SA 4.0; this model is derived from it and is shared under the same
  licence. Training-data SHA-256:
  `{meta['training_data_sha256']}`.
- What it predicts: LSS retention parameters (log kw, with S from 0.25 M^0.5) of a small
  molecule on a described reversed-phase system (column HSM parameters, organic modifier,
  pH, temperature); the gradient engine turns them into times.
- Not for: peptides and proteins, permanently charged polymers, normal-phase or HILIC,
  graphitic carbon, ion-pair methods. Predictions are estimates to confirm by injection.

## Validation ({meta['validation']}, {summary.get('n_systems')} left-out systems, medians)

| figure | this model | descriptor GBM baseline | log P baseline |
|---|---|---|---|
{rows}

Medians are over left-out systems unless a row says otherwise; a source publication with
many systems (a column or pH screen) weighs as many systems. The rows "over source
publications" take each of the {summary.get('n_sources')} sources' median system once.

pH series: counted once per compound, from the lowest to the highest pH at which its
series measured it, the predicted shift follows the observed one in sign for
{f('ph_shift_sign_agreement_compounds', 3)} of the {summary.get('ph_shift_n_compounds')}
compounds that move over 0.5 min across that span. Counted over every pair of pH of a
series (a compound measured at four pH gives six shifts), it does for
{f('ph_shift_sign_agreement', 3)} of {summary.get('ph_shift_n')} shifts over 0.5 min
({f('ph_shift_sign_agreement_predicted', 3)} where the model itself predicts a shift over
0.5 min). For {f('ph_shift_flat_share', 3)} of the observed shifts the model predicts none:
compounds without an ionisable group in the pH range, whose shift follows the change of
buffer or additive (e.g. trifluoroacetic acid against formic acid), which the model does
not describe; they count as misses. Restricted to the
{summary.get('ph_shift_n_ionising')} shifts of compounds whose neutral fraction changes by
more than 0.05 between the two pH (Henderson-Hasselbalch on the tabulated sites), the sign
is right for {f('ph_shift_sign_agreement_ionising', 3)}. Additive terms (ion-pairing acid,
buffer salt) were tried and dropped: the neutral compounds' shifts with the buffer do not
share a direction across sources, and the terms made the errors worse.

Compound memory: for the {count('n_memory_compounds')}structures of the training
data, the model keeps the shrunken mean of their training residuals (after each system's
offset; a Huber M-estimate, so that one wrong row of a compound does not set it), keyed
by a hash of the standardised SMILES (enantiomers and their racemate share one entry,
since an achiral column retains them alike, while diastereomers keep their own;
salt forms pool with their parent); the left-out-source figures above include it (a compound
measured by other sources than the left-out one is remembered from those). A stereoisomer
that training does not hold takes the mean of those it does
({count('n_skeleton_forms')}stereo-blind forms). It is one constant per compound, so
it does not change a predicted pH or column shift.

Offset-free companion: every learned term (ridge, boosting, compound memory) is the mean of
two fits on the same rows, the model's own and a companion fitted after each training
system's mean residual (shrunk by n / (n + {COMPANION_SHRINK:g}) for a system of n rows; dead-time,
dwell-volume and batch errors that the method description cannot explain) was taken out
of its targets (`retpred/training.py`, `fit_model`; DEVELOPERS.md, "Offset-free
companion").

Calibration (the 10-calibrant figures): the predicted log kw unchanged and its shift,
linear, selectivity (log P and TPSA terms), monotone and quadratic maps, each followed by the
compound-factor correction (system loadings fitted on the calibrants the open data know;
each fold's factors from its own training systems) and a fingerprint-similarity neighbour
correction, then averaged with weights 1 / (leave-one-out error in time)^2
(`retpred/calibration.py`).

Ratio of calibrated MedAE to the descriptor baseline: {f('ratio_cal_vs_gbm_cal', 2)};
to the log P baseline: {f('ratio_cal_vs_logp_cal', 2)}. Per-system figures:
`models/validation.tsv`. Reproduce: `python scripts/build_default_model.py --force`.
"""


def _risk_md(t, unit: str = "pairs") -> str:
    lines = [f"| risk bin | {unit} | mean predicted risk | observed unresolved |",
             "|---|---|---|---|"]
    for r in t.itertuples():
        lines.append(f"| {r.risk} | {r.n_pairs} | {r.mean_risk:.3f} | "
                     f"{r.observed_unresolved:.3f} |")
    return "\n".join(lines)


def analyte_risk_section(tables: dict, summary: dict) -> str:
    def f(k):
        return f"{summary.get(k, float('nan')):.3f}"

    text = (
        "\n## Co-elution risk per analyte (left-out systems, 20-analyte lists)\n\n"
        "The `coelution_risk` column: the probability that an analyte is not resolved "
        "(Rs < 1.5) from at least one other analyte of the list. Scored on random lists of "
        "20 compounds of each left-out system (3 per system; with calibrants, the 10 "
        "calibrants are not in the lists). Observed unresolved: another analyte's measured "
        "time within Rs 1.5 with the predicted widths. Per regime, the time-error sd is "
        "scaled and the result recalibrated (logistic in logit p), fitted on these lists.\n\n"
    )
    for regime, label in (("calibrated", "With 10 calibrants"), ("zero_shot", "Zero-shot")):
        text += (f"{label}: log-loss {f(f'analyte_risk_log_loss_{regime}')} against "
                 f"{f(f'analyte_risk_log_loss_base_{regime}')} for the constant base rate "
                 f"{f(f'analyte_risk_base_rate_{regime}')}; AUC "
                 f"{f(f'analyte_risk_auc_{regime}')}.\n\n"
                 + _risk_md(tables[regime], "analytes") + "\n\n")
    return text


def risk_section(cal_table, zero_table) -> str:
    md = _risk_md
    return (
        "\n## Co-elution risk of neighbour pairs (left-out systems)\n\n"
        "Observed unresolved: measured times closer than Rs 1.5 with the predicted widths. "
        "The spacing sd is scaled by one factor per regime (with calibrants, zero-shot), "
        "fitted on that regime's pairs (log-loss). This pair risk decides which "
        "neighbours `coelutes_with` names (risk >= 0.5).\n\n"
        "With 10 calibrants:\n\n" + md(cal_table) + "\n\nZero-shot:\n\n" + md(zero_table)
        + "\n"
    )


if __name__ == "__main__":
    raise SystemExit(main())
