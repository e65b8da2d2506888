"""Validation protocol: metric definitions against reference implementations, co-elution
risk calibration and pH-shift direction on left-out open-data systems (RepoRT-derived,
CC BY-SA 4.0)."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy.stats import spearmanr

from retpred.evaluation import (
    FoldPredictions,
    analyte_risk_summary,
    coelution_lists,
    coelution_pairs,
    cross_validate,
    fit_analyte_risk,
    fit_pair_sd_scale,
    fold_of_rows,
    interval_hits,
    order_accuracy,
    ph_series,
    ph_shift_agreement,
    rescore_pairs,
    residual_quantiles,
    summarise,
    system_metrics,
    void_calibrant_draws,
)


def test_interval_hits_isocratic_closed_form_and_unbounded_upper_end():
    """Isocratic tR = t0 (1 + k), k = 10^(log kw - S phi) (LSS; retention-physics.md
    sections 2-3). t0 = 1 min, phi = 0.4, S = 4, log kw = 1: the interval at q = -/+0.1 phi
    units is [t0 (1 + 10^-1.0), t0 (1 + 10^-0.2)] = [1.100, 1.631] min. An upper end that
    never elutes (k above the isocratic limit) leaves the interval open upwards."""
    from retpred.gradient import build_program

    prog = build_program([0.0], [0.4], [1.0], dead_time_min=1.0, dwell_volume_ml=0.5)
    lk, s = np.full(5, 1.0), np.full(5, 4.0)
    obs = np.array([1.09, 1.11, 1.5, 1.62, 1.64])
    hits = interval_hits(obs, lk, -0.1, 0.1, s, prog)
    assert hits.tolist() == [False, True, True, True, False]
    # log kw 2.2: tR = 1 + 10^0.6 = 4.98 min; upper end log kw 6.2 -> k = 10^4.6, not eluted
    far = interval_hits(np.array([2.5, 5.0, 500.0]), np.full(3, 2.2), -0.1, 1.0,
                        np.full(3, 4.0), prog)
    assert far.tolist() == [False, True, True]  # lower end 1 + 10^0.2 = 2.58 min


def test_order_accuracy_matches_brute_force():
    rng = np.random.default_rng(5)
    obs = rng.uniform(0, 20, 60)
    pred = obs + rng.normal(0, 1.5, 60)
    good = total = 0
    for i, j in itertools.combinations(range(60), 2):
        if abs(obs[i] - obs[j]) > 0.5:
            total += 1
            good += np.sign(obs[i] - obs[j]) == np.sign(pred[i] - pred[j])
    assert order_accuracy(obs, pred) == pytest.approx(good / total)


def test_summary_gives_medians_over_systems_and_over_sources():
    """Hand values: source A has three systems at 1, 2 and 9 %, source B two at 5 and 7 %.
    Over the five systems the median is 5 %; over sources it is the median of A's median
    (2) and B's (6), 4 %. A source with many systems weighs as many systems in the first
    and once in the second (retention-physics.md section 8 reports per system)."""
    import pandas as pd

    table = pd.DataFrame({"group": ["A", "A", "A", "B", "B"],
                          "cal_medae_pct": [1.0, 2.0, 9.0, 5.0, 7.0],
                          "zero_medae_pct": [3.0, 4.0, 5.0, np.nan, 8.0]})
    out = summarise(table)
    assert out["n_systems"] == 5 and out["n_sources"] == 2
    assert out["cal_medae_pct"] == pytest.approx(5.0)
    assert out["cal_medae_pct_over_sources"] == pytest.approx(4.0)
    # B's zero-shot median skips its NaN system: median(4, 8) = 6
    assert out["zero_medae_pct_over_sources"] == pytest.approx(6.0)
    assert "logp_cal_medae_pct_over_sources" not in out


def test_system_metrics_against_scipy_and_hand_values():
    obs = np.array([1.0, 2.0, 3.0, 4.0, 10.0])
    pred = np.array([1.5, 1.8, 3.0, 4.4, 9.0])
    m = system_metrics(obs, pred)
    err = np.abs(pred - obs)  # 0.5, 0.2, 0, 0.4, 1.0
    assert m["medae_min"] == pytest.approx(0.4)
    assert m["mae_pct"] == pytest.approx(100 * err.mean() / 10.0)
    assert m["spearman"] == pytest.approx(spearmanr(obs, pred).statistic)


@pytest.fixture(scope="module")
def small_cv(small_training_set):
    return cross_validate(small_training_set, n_folds=4, with_baseline=False, gbm_max_iter=120)


@pytest.mark.opendata
@pytest.mark.parametrize("calibrated", [True, False], ids=["calibrated", "zero_shot"])
def test_coelution_risk_is_calibrated_on_left_out_systems(small_training_set, small_cv,
                                                          calibrated):
    """Pairs of every left-out system are scored with the spacing-sd scale fitted on the
    pairs of all the *other* systems of the same regime (10 calibrants, or zero-shot: the
    shipped model keeps one scale for each; cross-fitting, one system out at a time), so no
    pair is scored with a scale it helped to fit and every system is tested. The predicted
    risk must then match the observed unresolved fraction (issue 4: pairs with risk about
    0.3 are unresolved about 30 % of the time): overall within 0.025, and in every risk bin
    with at least 100 pairs within 0.05. Each system contributes at most 300 neighbour pairs
    (a fixed random draw), so that one 3,000-pair system cannot dominate. (An earlier
    design fitted on the even-numbered systems and tested on the odd: with ten systems a
    half, their base rates of unresolved pairs differed by 0.03, which no scale can match.)
    """
    import pandas as pd

    from retpred.evaluation import calibrated_residual_quantiles

    q_cal, _, rho = calibrated_residual_quantiles(small_training_set, small_cv)
    q = q_cal if calibrated else residual_quantiles(small_training_set, small_cv)
    pairs = coelution_pairs(small_training_set, small_cv, tuple(q), rho,
                            calibrated=calibrated)
    systems = pairs["dataset"].unique()
    rng = np.random.default_rng(0)
    ds = pairs["dataset"].to_numpy()
    keep = np.concatenate([rng.permutation(np.flatnonzero(ds == d))[:300] for d in systems])
    pairs = pairs.iloc[np.sort(keep)]
    assert len(systems) >= 15 and len(pairs) > 1000
    scored = []
    for d in systems:
        mine = pairs["dataset"] == d
        scored.append(rescore_pairs(pairs[mine], fit_pair_sd_scale(pairs[~mine])))
    test = pd.concat(scored)
    assert abs(test["risk"].mean() - test["unresolved"].mean()) < 0.025
    bins = np.digitize(test["risk"], [0.05, 0.1, 0.2, 0.3, 0.5, 0.7])
    big = 0
    for b in np.unique(bins):
        sel = test[bins == b]
        if len(sel) >= 100:
            big += 1
            assert abs(sel["risk"].mean() - sel["unresolved"].mean()) < 0.05, b
    assert big >= 2
    # risk must separate: pairs in the top quarter of risk are unresolved more often than
    # those in the bottom quarter (quarters, not fixed thresholds: zero-shot, a bin below
    # risk 0.05 held 70 of 2,532 pairs, too few to compare)
    risk, unres = test["risk"].to_numpy(), test["unresolved"].to_numpy()
    q1, q3 = np.quantile(risk, [0.25, 0.75])
    assert unres[risk >= q3].mean() > unres[risk <= q1].mean() + 0.03


@pytest.mark.opendata
@pytest.mark.parametrize("calibrated", [True, False], ids=["calibrated", "zero_shot"])
def test_analyte_coelution_risk_is_calibrated_on_left_out_lists(small_training_set, small_cv,
                                                                calibrated):
    """The ``coelution_risk`` column is the probability that an analyte is not resolved
    from at least one other analyte of the list. Random 20-compound lists of left-out
    systems (10 per system) are scored with the sd scale and recalibration fitted on the
    lists of the *other* systems (cross-fitting, five groups of systems), then:
    the mean risk matches the observed unresolved rate within 0.04 and every risk bin with
    at least 300 analytes within 0.1 or three standard errors, whichever is larger (this
    small set has about 20 systems, and a system's lists share compounds, so the standard
    error is the cluster-robust one with systems as clusters, 0.02-0.07 here; measured gaps
    up to 0.10, at 2.2 standard errors; the shipped model's table over 283 systems is in
    the model card), the risk beats the constant base rate of the training
    groups on log-loss, and analytes given >= 0.5 are unresolved more often than those
    given < 0.3 by over 0.15 (measured 0.21 to 0.4)."""
    import pandas as pd

    from retpred.evaluation import _log_loss, calibrated_residual_quantiles

    ts = small_training_set
    q_cal, _, rho = calibrated_residual_quantiles(ts, small_cv)
    q = q_cal if calibrated else residual_quantiles(ts, small_cv)
    lists = coelution_lists(ts, small_cv, tuple(q), calibrated=calibrated,
                            lists_per_system=10)
    systems = np.array(sorted(lists["dataset"].unique()))
    assert len(systems) >= 15 and len(lists) >= 3000
    group = {d: i % 5 for i, d in enumerate(systems)}
    g = lists["dataset"].map(group).to_numpy()
    scored, base_loss = [], []
    for k in range(5):
        train, test = lists[g != k], lists[g == k]
        params = fit_analyte_risk(train, rho, grid=np.geomspace(0.05, 2.0, 25))
        sc, _ = analyte_risk_summary(test, rho, params)
        _, fig = analyte_risk_summary(train, rho, params)
        y = sc["unresolved"].to_numpy(bool)
        base_loss.append(_log_loss(np.full(y.size, fig["base_rate"]), y) * y.size)
        scored.append(sc)
    test = pd.concat(scored)
    y = test["unresolved"].to_numpy(bool)
    risk = test["risk"].to_numpy()
    assert abs(risk.mean() - y.mean()) < 0.04
    bins = np.digitize(risk, [0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8])
    big = 0
    for b in np.unique(bins):
        sel = bins == b
        if sel.sum() >= 300:
            big += 1
            # the bin's gap and its cluster-robust standard error, systems as clusters
            e = pd.DataFrame({"s": test["dataset"].to_numpy()[sel], "e": risk[sel] - y[sel]})
            per = e.groupby("s")["e"].agg(["sum", "size"])
            gap = per["sum"].sum() / per["size"].sum()
            se = np.sqrt(((per["sum"] - gap * per["size"]) ** 2).sum()) / per["size"].sum()
            assert abs(gap) < max(0.1, 3.0 * se), (b, gap, se)
    assert big >= 3
    assert _log_loss(risk, y) < sum(base_loss) / y.size
    # and it separates: analytes given >= 0.5 are unresolved far more often than < 0.3
    assert y[risk >= 0.5].mean() - y[risk < 0.3].mean() > 0.15


@pytest.mark.opendata
def test_interval_quantiles_bracket_zero(small_training_set, small_cv):
    lo, hi = residual_quantiles(small_training_set, small_cv)
    assert lo < 0 < hi


@pytest.mark.opendata
def test_ph_shift_direction_on_left_out_ph_series(open_data, open_systems, small_training_set):
    """A pH series of the open data (one source and program, acetonitrile, pH 2, 3, 5 and 8)
    is held out as a whole (grouped folds by source). Issue 3 asks that predicted shifts
    follow observed ones (> 0.5 min) in sign for >= 80 %; this small model reaches about
    0.75 (the shipped model's figure is in the model card), so the test holds it to clearly
    better than chance (0.7), and to >= 0.85 where the model itself predicts a shift of over
    0.5 min (when it says pH matters, it is right about the direction)."""
    from retpred.training import load_open_training_set

    series = {"0266", "0268", "0270", "0272", "0274", "0276", "0278", "0284", "0286",
              "0288", "0290", "0292", "0294"}
    ids = {s.dataset for s in small_training_set.systems} | series
    ts = load_open_training_set(open_data, ids)
    fp = cross_validate(ts, n_folds=4, with_baseline=False, gbm_max_iter=120)
    r = ph_shift_agreement(ts, fp, series=[series])
    assert r["n_obs"] >= 200 and r["n_pred"] >= 200
    assert r["agree_obs"] >= 0.7, r
    assert r["agree_pred"] >= 0.85, r
    # compounds whose tabulated sites change ionisation between the two pH: the direction
    # comes from Henderson-Hasselbalch and must be right for most of them
    assert r["n_ionising"] >= 100 and r["agree_ionising"] >= 0.8, r


@pytest.mark.opendata
def test_ph_shift_direction_with_every_ph_series_source_held_out(open_data):
    """Issue 3's pH target on a full-size model that has never seen a pH series: every
    source with a pH series in the open data is held out at once (harsher than the
    left-out-source cross-validation, where the other sources' series are in training),
    the model is fitted on all other systems and predicts the series. Counted once per
    compound, from the lowest to the highest pH at which its series measured it, the
    predicted shift must follow the observed one in sign for >= 80 % of the compounds that
    move over 0.5 min (measured 0.851 on 375 compounds with the model of format 7, 0.835
    with format 6; left-out-source CV 0.86; the model of format 4, before multiply charged
    ions were described, 0.749). Over every pair of pH the figure is lower (measured 0.792;
    format 6 0.745): about a fifth of the observed shifts are of
    compounds without an ionisable group, whose shift follows the buffer change and which
    the model predicts flat. Where the tabulated sites change ionisation the direction
    comes from Henderson-Hasselbalch and must be right almost always (measured 0.975)."""
    from retpred.training import fit_model, load_open_training_set

    ts = load_open_training_set(open_data)
    series = ph_series(ts.systems)
    sources = {ts.systems[i].group for members in series for i in members}
    assert len(series) >= 8 and len(sources) >= 4
    held = np.isin(ts.groups, sorted(sources))
    model = fit_model(ts, ~held)
    log_kw = np.full(ts.rt_min.size, np.nan)
    log_kw[held] = model.retention_parameters(ts.solutes, ts.contexts,
                                              which=ts.system_idx[held],
                                              idx=ts.solute_idx[held])[0]
    fp = FoldPredictions(log_kw=log_kw, fold=np.where(held, 0, 1), baseline_frac=log_kw)
    r = ph_shift_agreement(ts, fp)
    assert r["n_compound"] >= 300 and r["agree_compound"] >= 0.80, r
    assert r["n_obs"] >= 1500 and r["agree_obs"] >= 0.72, r
    assert r["n_ionising"] >= 800 and r["agree_ionising"] >= 0.90, r


def test_pair_sd_scale_per_regime_with_fallback():
    """The co-elution risk uses the spacing-sd scale of its regime; a model that recorded a
    single scale (format 5 and before) gives it for both, a model without one 1.0. The scales
    are arbitrary test numbers; the fitted ones are checked by the cross-fit test above."""
    from retpred.column import class_hsm
    from retpred.model import RetentionModel

    m = RetentionModel(reference=class_hsm("C18"))
    assert m.pair_sd_scale(True) == m.pair_sd_scale(False) == 1.0
    m.residual_sd_ = {"pair_sd_scale": 0.3}
    assert m.pair_sd_scale(True) == m.pair_sd_scale(False) == 0.3
    m.residual_sd_ = {"pair_sd_scale_calibrated": 0.2, "pair_sd_scale_zero_shot": 0.45}
    assert (m.pair_sd_scale(True), m.pair_sd_scale(False)) == (0.2, 0.45)


def test_analyte_risk_params_per_regime_and_wiring():
    """The per-analyte risk uses the (scale, a, b) of its regime; a model without them
    gives its pair scale and the identity map. ``add_pairs`` applies them:
    risk = recalibrate_risk(any_coelution_probability(rt, width / 4, scale sd, rho), a, b)
    with sd = interval half-width / 1.645. The numbers are arbitrary test values."""
    import pandas as pd

    from retpred.column import class_hsm
    from retpred.model import RetentionModel
    from retpred.peaks import Z90, any_coelution_probability, recalibrate_risk
    from retpred.predict import add_pairs

    m = RetentionModel(reference=class_hsm("C18"))
    m.residual_sd_ = {"pair_sd_scale_calibrated": 0.2, "pair_sd_scale_zero_shot": 0.45}
    assert m.analyte_risk_params(True) == (0.2, 0.0, 1.0)
    assert m.analyte_risk_params(False) == (0.45, 0.0, 1.0)
    m.residual_sd_.update({"neighbour_rho": 0.3, "analyte_risk_calibrated": [0.6, 0.2, 0.9],
                           "analyte_risk_zero_shot": [0.3, -0.1, 0.7]})
    assert m.analyte_risk_params(True) == (0.6, 0.2, 0.9)
    table = pd.DataFrame({"name": list("abcd"), "rt_min": [2.0, 2.1, 2.4, 5.0],
                          "rt_low_min": [1.8, 1.8, 2.0, 4.9], "rt_high_min": [2.2, 2.4, 2.8, 5.1],
                          "peak_width_min": [0.08, 0.08, 0.1, 0.12]})
    sd = (table["rt_high_min"] - table["rt_low_min"]).to_numpy() / 2 / Z90
    for calibrated, (scale, a, b) in ((True, (0.6, 0.2, 0.9)), (False, (0.3, -0.1, 0.7))):
        got = add_pairs(table, m, calibrated=calibrated)["coelution_risk"].to_numpy()
        ref = recalibrate_risk(any_coelution_probability(
            table["rt_min"].to_numpy(), table["peak_width_min"].to_numpy() / 4, scale * sd,
            0.3), a, b)
        np.testing.assert_allclose(got, ref, rtol=1e-12)


def test_folds_never_split_a_group(small_training_set):
    # retention-physics.md section 8: split by dataset, better by source publication, never
    # by row. By source, every publication's systems fall in one fold; by dataset only each
    # system does, and a publication with several systems is then spread over the folds.
    ts = small_training_set
    by_source = fold_of_rows(ts, 4, "source")
    by_dataset = fold_of_rows(ts, 4, "dataset")
    assert by_source.min() == 0 and by_source.max() == 3
    for labels, fold in ((ts.groups_by("source"), by_source),
                         (ts.groups_by("dataset"), by_dataset)):
        for g in np.unique(labels):
            assert np.unique(fold[labels == g]).size == 1, g
    sources = ts.groups_by("source")
    assert any(np.unique(by_dataset[sources == g]).size > 1 for g in np.unique(sources))
    with pytest.raises(ValueError, match="unknown split"):
        ts.groups_by("row")


@pytest.mark.opendata
def test_void_calibrants_as_bounds_beat_exact_times_on_left_out_systems(small_training_set,
                                                                        small_cv):
    """Calibrants drawn from every row of a left-out system (RepoRT-derived open data),
    void rows too: where void calibrants were drawn, using them as upper bounds leaves a
    lower median error than reading their times as exact log kw, in more systems than
    not (full data, seeds 0-1: 2.79-2.80 against 2.87-2.97 %, DEVELOPERS.md "Void rows")."""
    ts = small_training_set
    void_rows = np.isin(ts.void.system_idx, np.unique(ts.system_idx))
    assert np.isfinite(small_cv.void_log_kw[void_rows]).all()
    tab = void_calibrant_draws(ts, small_cv, n_draws=4, seed=0)
    drew = tab[tab["void_drawn"] > 0]
    assert len(drew) >= 8
    # without void calibrants the two uses are the same fit
    rest = tab[tab["void_drawn"] == 0]
    np.testing.assert_allclose(rest["bounds_medae_pct"], rest["exact_medae_pct"])
    assert drew["bounds_medae_pct"].median() < drew["exact_medae_pct"].median()
    gain = drew["exact_medae_pct"] - drew["bounds_medae_pct"]
    assert (gain > 0).sum() > (gain < 0).sum()
