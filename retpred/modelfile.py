"""Model files that cannot run code when loaded.

A model file is a skops archive (a zip of JSON and numpy arrays; ``skops.io``) holding a
dict: ``meta`` (JSON text), ``model`` (the :class:`~retpred.model.RetentionModel` state as
plain values) and the two fitted estimators. Loading goes through ``skops.io.load`` with an
explicit allow-list of types, so an archive that names any other type is refused before
anything is built, and a pickle (which runs code on load) is not a zip and is refused by
its first bytes. The shipped default is also checked against its recorded SHA-256.
"""

from __future__ import annotations

import hashlib
import json
import zipfile
from pathlib import Path

import skops.io as sio

from retpred import __version__
from retpred.errors import ModelFileError
from retpred.method import HsmParameters
from retpred.model import MODEL_FORMAT, RetentionModel

MODELS_DIR = Path(__file__).resolve().parent.parent / "models"
DEFAULT_MODEL_NAME = "retpred-default.skops"

#: Types a retpred model file may contain beyond skops' own defaults (numpy, builtins and
#: scikit-learn estimators it already trusts). Anything else is refused.
ALLOWED_TYPES = (
    "sklearn.ensemble._hist_gradient_boosting.predictor.TreePredictor",
    "sklearn.ensemble._hist_gradient_boosting.binning._BinMapper",
    "sklearn.ensemble._hist_gradient_boosting.gradient_boosting.HistGradientBoostingRegressor",
    "sklearn.linear_model._ridge.Ridge",
    "sklearn._loss.loss.HalfSquaredError",
    "sklearn._loss.loss.AbsoluteError",
    "sklearn._loss.link.IdentityLink",
    "sklearn._loss.link.Interval",
    "numpy.random._generator.Generator",
    "numpy.random._pcg64.PCG64",
    "numpy.random.mtrand.RandomState",
    "builtins.slice",
)

_STATE_FIELDS = (
    "ion_drop_acid", "ion_drop_base", "ion_drop_pair", "gbm_max_iter", "gbm_learning_rate",
    "ridge_alpha", "random_state", "residual_quantiles_", "residual_sd_", "metrics_", "meta_",
    "lab_linear_", "domain_", "lab_neighbours_", "memory_", "factors_", "skeleton_memory_",
    "skeleton_factors_", "companion_memory_", "companion_skeleton_memory_", "lab_standards_",
)


def default_model_path() -> Path:
    return MODELS_DIR / DEFAULT_MODEL_NAME


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def save_model(model: RetentionModel, path: Path) -> None:
    """Write ``model`` to ``path`` (the caller makes the write atomic)."""
    state = {k: getattr(model, k) for k in _STATE_FIELDS}
    payload = {
        "meta": json.dumps(model.describe(), sort_keys=True, default=float),
        "state": json.dumps(state, sort_keys=True, default=float),
        "reference": json.dumps(model.reference.__dict__),
        "ridge": model.ridge_,
        "gbm": model.gbm_,
        "lab_gbm": model.lab_gbm_,
        "companion_ridge": model.companion_ridge_,
        "companion_gbm": model.companion_gbm_,
    }
    sio.dump(payload, path)


def load_model(path: str | Path | None = None, *, check_sha: bool = True) -> RetentionModel:
    """Load a model file safely; ``None`` loads the shipped default (SHA-256 checked).

    Raises :class:`ModelFileError` for a missing, unsafe, corrupt or incompatible file.
    """
    is_default = path is None
    p = default_model_path() if is_default else Path(path)
    if not p.is_file():
        hint = " (rebuild it with scripts/build_default_model.py)" if is_default else ""
        raise ModelFileError(f"model file not found{hint}", path=str(p))
    if is_default and check_sha:
        sha_file = p.with_suffix(p.suffix + ".sha256")
        if sha_file.is_file():
            expected = sha_file.read_text().split()[0]
            if sha256_file(p) != expected:
                raise ModelFileError(
                    "shipped model does not match its recorded SHA-256; reinstall or rebuild",
                    path=str(p),
                )
    if not zipfile.is_zipfile(p):
        raise ModelFileError(
            "not a retpred model file (pickles and other formats are refused because "
            "loading them could run code)",
            path=str(p),
        )
    try:
        untrusted = sio.get_untrusted_types(file=p)
    except Exception as exc:  # corrupt archive
        raise ModelFileError(f"unreadable model file: {exc}", path=str(p)) from None
    unexpected = sorted(set(untrusted) - set(ALLOWED_TYPES))
    if unexpected:
        raise ModelFileError(
            f"model file contains types that are not allowed: {', '.join(unexpected[:3])}",
            path=str(p),
        )
    try:
        payload = sio.load(p, trusted=list(untrusted))
        meta = json.loads(payload["meta"])
        state = json.loads(payload["state"])
        reference = HsmParameters(**json.loads(payload["reference"]))
    except Exception as exc:
        raise ModelFileError(f"corrupt model file: {type(exc).__name__}", path=str(p)) from None
    if meta.get("format") != MODEL_FORMAT:
        raise ModelFileError(
            f"model format {meta.get('format')} does not match this retpred "
            f"({__version__}, format {MODEL_FORMAT}); retrain it with this version",
            path=str(p),
        )
    from retpred.chemistry import DESCRIPTOR_NAMES

    if list(meta.get("descriptors", [])) != list(DESCRIPTOR_NAMES):
        raise ModelFileError(
            "model was trained with another descriptor set; retrain it with this version",
            path=str(p),
        )
    model = RetentionModel(reference=reference)
    for k, v in state.items():
        if k in _STATE_FIELDS:
            setattr(model, k, v)
    model.ridge_ = payload["ridge"]
    model.gbm_ = payload["gbm"]
    model.lab_gbm_ = payload.get("lab_gbm")
    model.companion_ridge_ = payload.get("companion_ridge")
    model.companion_gbm_ = payload.get("companion_gbm")
    model.meta_ = {**model.meta_, "path": str(p)}
    return model
