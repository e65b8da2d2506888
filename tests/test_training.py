"""Void rows: compounds of the open data that eluted at or near t0 (training.VoidRows)."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from retpred.model import s_parameter
from retpred.training import MIN_RT_OVER_T0, fit_model


def test_void_bound_is_the_isocratic_log_kw_at_the_void_limit(small_training_set):
    """A row eluting at MIN_RT_OVER_T0 t0 has k = MIN_RT_OVER_T0 - 1 (t_R = t0 (1 + k),
    the definition of the retention factor). When the first composition change reaches the
    column inlet after k V0 of eluent, the gradient front cannot catch such a peak, so its
    bound is the LSS value log kw = log10 k + S phi_0 (Snyder's linear solvent strength
    relation log k = log kw - S phi, retention-physics.md section 2)."""
    ts = small_training_set
    void = ts.void
    assert void is not None and void.solute_idx.size > 50
    k = MIN_RT_OVER_T0 - 1.0
    checked = 0
    for sysi in np.unique(void.system_idx):
        prog = ts.systems[sysi].program
        changes = np.flatnonzero(prog.phi != prog.phi[0])
        first_change_ml = prog.volume_ml[changes[0]] if changes.size else np.inf
        if first_change_ml <= 1.5 * k * prog.dead_volume_ml:  # margin over k V0
            continue
        rows = void.system_idx == sysi
        s = s_parameter(ts.solutes.mw[void.solute_idx[rows]])
        expected = np.log10(k) + s * prog.phi[0]
        np.testing.assert_allclose(void.bound_log_kw[rows], expected, atol=2e-3)
        checked += rows.sum()
    assert checked > 50


def test_void_rows_follow_their_system(small_training_set):
    ts = small_training_set
    sysi = np.bincount(ts.void.system_idx).argmax()
    sub = ts.subset(ts.system_idx == sysi)
    assert sub.void.solute_idx.size == np.sum(ts.void.system_idx == sysi) > 0
    assert np.all(sub.void.system_idx == sysi)
    none = ts.subset(ts.system_idx == -1)
    assert none.void.solute_idx.size == 0


@pytest.fixture(scope="module")
def halves(small_training_set):
    """Models fitted with and without the void rows on half of the small set's sources."""
    ts = small_training_set
    groups = ts.groups
    train = np.isin(groups, np.unique(groups)[::2])
    with_void = fit_model(ts, train, gbm_max_iter=120)
    without = fit_model(replace(ts, void=None), train, gbm_max_iter=120)
    return ts, train, with_void, without


def test_void_rows_teach_the_model_which_compounds_elute_at_t0(halves):
    """On the left-out half's systems, the model trained with void rows predicts fewer of
    the compounds observed at t0 as retained beyond the void limit (the truncation bias that
    dropping them leaves), and its error on the retained rows does not grow by more than
    a few percent."""
    ts, train, with_void, without = halves
    held = np.isin(ts.void.system_idx, np.unique(ts.system_idx[~train]))
    assert held.sum() > 50
    above = {}
    err = {}
    for name, model in (("with", with_void), ("without", without)):
        lk = model.retention_parameters(ts.solutes, ts.contexts, which=ts.void.system_idx[held],
                                        idx=ts.void.solute_idx[held])[0]
        above[name] = np.mean(lk > ts.void.bound_log_kw[held])
        main = model.retention_parameters(ts.solutes, ts.contexts, which=ts.system_idx[~train],
                                          idx=ts.solute_idx[~train])[0]
        err[name] = np.median(np.abs(main - ts.log_kw[~train]))
    assert above["with"] < above["without"] - 0.05
    assert err["with"] < 1.05 * err["without"]
