"""Time of a pH scan against a baseline measured in the same run.

ours     = retpred.scan.ph_scan: featurise once, the boosted solute term once, then per pH
           ionisation + column term + gradient engine + widths + pair metrics (vectorised)
baseline = for each pH: prepare() + predict_solutes() + add_pairs() on the same featurised
           analytes (the obvious loop over the single-method prediction path, no reuse)

Both run on one OpenMP/BLAS thread ("on one core"). Target (issue 6): 50 analytes x 61 pH
points in under 10 s. Featurising is timed separately (it is shared by both).

Model: the shipped default model when built, else a small model trained on every 15th
open-data system (as tests/conftest.py does), else a model fitted on random numbers with the
default hyperparameters (same tree count and size, so the same prediction cost; its times
mean nothing chemically). Analytes: a seeded sample of the open data, else the demo list
repeated.

Usage: python scripts/bench_scan.py [--n 50] [--points 61] [--repeats 3]
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import statistics
import time
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

REPO = Path(__file__).resolve().parents[1]


def open_rp_root() -> Path:
    base = os.environ.get("RETPRED_OPEN_RP")
    return Path(base) if base else REPO / ".." / "shared" / "datasets" / "open-rp"


def load_analytes(n: int) -> tuple[list[str], list[str], str]:
    path = open_rp_root() / "compounds.tsv.gz"
    if path.is_file():
        df = pd.read_csv(path, sep="\t", usecols=["name", "smiles"]).dropna()
        df = df.drop_duplicates("smiles").sample(n, random_state=2024)
        return df["smiles"].tolist(), df["name"].astype(str).tolist(), str(path.resolve())
    demo = pd.read_csv(REPO / "datasets" / "demo" / "analytes.csv")
    reps = n // len(demo) + 1
    smiles = (demo["smiles"].tolist() * reps)[:n]
    names = [f"{nm} #{i}" for i, nm in enumerate((demo["name"].tolist() * reps)[:n])]
    return smiles, names, "demo analytes repeated"


def load_any_model():
    from retpred.modelfile import default_model_path, load_model

    if default_model_path().is_file():
        return load_model(), "shipped default model"
    from retpred.opendata import find_open_data

    root = find_open_data()
    if root is not None:
        from retpred.opendata import load_systems
        from retpred.training import fit_model, load_open_training_set

        ids = {s.dataset for s in load_systems(root)[::15]}
        return fit_model(load_open_training_set(root, ids)), "small open-data model"
    return synthetic_model(), "synthetic model (random numbers, default hyperparameters)"


def synthetic_model():
    from retpred.column import class_hsm
    from retpred.model import COLUMN_TERM_NAMES, N_BITS, RetentionModel, featurise

    rng = np.random.default_rng(0)
    sol = featurise(["CCO"])
    width = sol.descriptors.shape[1] + N_BITS + 1
    model = RetentionModel(reference=class_hsm("C18"))
    from sklearn.ensemble import HistGradientBoostingRegressor
    from sklearn.linear_model import Ridge

    x = rng.normal(size=(4000, width))
    model.gbm_ = HistGradientBoostingRegressor(
        max_iter=model.gbm_max_iter, learning_rate=model.gbm_learning_rate, max_leaf_nodes=31,
        min_samples_leaf=20, random_state=0).fit(x, rng.normal(size=4000))
    z = rng.normal(size=(200, len(COLUMN_TERM_NAMES)))
    model.ridge_ = Ridge().fit(z, rng.normal(size=200) * 0.1)
    return model


def timed(fn, repeats: int) -> tuple[float, object]:
    times, out = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=50, help="analytes")
    ap.add_argument("--points", type=int, default=61, help="pH points from 2 to 8")
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()

    from retpred.method import load_method
    from retpred.model import featurise
    from retpred.predict import add_pairs, predict_solutes, prepare
    from retpred.scan import ph_scan

    method = load_method(REPO / "datasets" / "demo" / "method.toml")
    model, model_kind = load_any_model()
    smiles, names, source = load_analytes(args.n)
    ph_values = np.linspace(2.0, 8.0, args.points)

    t_feat, sol = timed(lambda: featurise(smiles), 1)

    def ours():
        return ph_scan(method, model, sol, names, ph_values)

    def baseline():
        out = []
        for ph in ph_values:
            mp = dataclasses.replace(method.mobile_phase, ph=float(ph))
            prep = prepare(dataclasses.replace(method, mobile_phase=mp), model)
            out.append(add_pairs(predict_solutes(prep, sol, names), model))
        return out

    ours()  # warm-up (imports, caches)
    t_ours, res = timed(ours, args.repeats)
    t_base, tables = timed(baseline, args.repeats)
    # the two paths must agree on the times (same model, same method)
    rt_base = np.stack([t["rt_min"].to_numpy(float) for t in tables])
    diff = np.nanmax(np.abs(rt_base - res.rt_min))

    print(f"model: {model_kind}; analytes: {len(smiles)} from {source}; "
          f"pH points: {ph_values.size} ({ph_values[0]:g}-{ph_values[-1]:g})")
    print(f"featurise (once, shared):         {t_feat:8.3f} s")
    print(f"ph_scan (ours):                   {t_ours:8.3f} s "
          f"({1e3 * t_ours / ph_values.size:.2f} ms per pH point)")
    print(f"baseline {ph_values.size} x predict_solutes+pairs: {t_base:8.3f} s")
    print(f"speed-up vs baseline:             {t_base / t_ours:8.1f} x")
    print(f"max |rt difference| vs baseline:  {diff:.2e} min")
    verdict = "PASS" if t_ours + t_feat < 10.0 else "FAIL"
    print(f"target scan + featurise < 10 s:   {verdict} ({t_ours + t_feat:.2f} s)")


if __name__ == "__main__":
    main()
