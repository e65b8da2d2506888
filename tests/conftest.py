"""Shared fixtures: the open data (skipped with a reason when absent) and small models."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from retpred.opendata import NOT_FOUND_MESSAGE, find_open_data

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "datasets" / "demo"
#: The small test model is trained on every 15th usable system in dataset order (about 20
#: systems, both modifiers, several phases and sources); chosen by position, not by results.
SMALL_TRAIN_STEP = 15


@pytest.fixture(scope="session")
def open_data() -> Path:
    root = find_open_data()
    if root is None:
        pytest.skip(NOT_FOUND_MESSAGE)
    return root


@pytest.fixture(scope="session")
def open_systems(open_data):
    from retpred.opendata import load_systems

    return load_systems(open_data)


@pytest.fixture(scope="session")
def small_training_set(open_data):
    from retpred.opendata import load_systems
    from retpred.training import load_open_training_set

    ids = {s.dataset for s in load_systems(open_data)[::SMALL_TRAIN_STEP]}
    return load_open_training_set(open_data, ids)


@pytest.fixture(scope="session")
def small_model(small_training_set):
    from retpred.training import fit_model

    model = fit_model(small_training_set, gbm_max_iter=150)
    model.residual_quantiles_ = {"zero_shot": [-0.12, 0.12], "calibrated": [-0.06, 0.06]}
    return model


@pytest.fixture(scope="session")
def shipped_model():
    from retpred.modelfile import default_model_path, load_model

    if not default_model_path().is_file():
        pytest.skip("shipped model not built (scripts/build_default_model.py)")
    return load_model()


def rng(seed=0):
    return np.random.default_rng(seed)


@pytest.fixture(scope="session")
def demo_dir() -> Path:
    return DEMO


@pytest.fixture(scope="module")
def prep(small_model, demo_dir):
    """The demo method prepared with the small test model."""
    from retpred.method import load_method
    from retpred.predict import prepare

    return prepare(load_method(demo_dir / "method.toml"), small_model)
