"""Shared by the benchmark scripts: the open data's training set and its cross-validation."""

from __future__ import annotations

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from retpred.evaluation import FoldPredictions, cross_validate  # noqa: E402
from retpred.opendata import find_open_data, load_systems, not_found_message  # noqa: E402
from retpred.training import TrainingSet, load_open_training_set  # noqa: E402


def open_data_cv(data: Path | None, step: int, folds: int
                 ) -> tuple[TrainingSet, FoldPredictions] | None:
    """Every ``step``-th system of the open data (all with 1) and its left-out-source
    predictions (:func:`cross_validate`, no baseline); None, after saying so on stderr,
    when the data are not found."""
    root = find_open_data(data)
    if root is None:
        print(not_found_message(data), file=sys.stderr)
        return None
    ids = {s.dataset for s in load_systems(root)[::step]} if step > 1 else None
    ts = load_open_training_set(root, ids)
    return ts, cross_validate(ts, n_folds=folds, with_baseline=False)
