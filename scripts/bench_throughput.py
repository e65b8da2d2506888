"""Throughput of the whole streamed prediction path against a floor measured in the same run,
and peak memory of a large run.

ours  = retpred.batch.stream_predict: read the CSV in chunks, standardise, descriptors,
        ionisation, model, gradient engine, widths, order and pairs, write the CSV
floor = read the same CSV + bare RDKit MolFromSmiles + Crippen.MolLogP per row

SMILES: --n unique structures of the open RP data (RETPRED_OPEN_RP, else
<repo>/../shared/datasets/open-rp/compounds.tsv.gz, column 'smiles'), seeded order.
Goals: ours takes at most 3 x the floor's time on one core; --jobs 2 near 2 x --jobs 1.

With --rows N the input is those SMILES repeated to N rows and the run happens in a child
process; its peak resident memory is read with getrusage (goal: under 1.5 GB at 1,000,000).

Model: --model PATH, else the shipped default model, else a small model trained here on a
fixed subset of the open data (every 15th system, as the tests do).

Usage: python scripts/bench_throughput.py [--n 20000] [--jobs 2] [--rows 1000000]
"""

from __future__ import annotations

import argparse
import csv
import json
import pickle
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
sys.path.insert(0, str(HERE))


def build_prep(model_path: Path | None = None):
    """(Prepared demo method, description of the model used)."""
    from retpred.method import load_method
    from retpred.modelfile import default_model_path, load_model
    from retpred.predict import prepare

    method = load_method(REPO / "datasets" / "demo" / "method.toml")
    if model_path is not None:
        return prepare(method, load_model(model_path)), str(model_path)
    if default_model_path().is_file():
        return prepare(method, load_model()), "shipped default model"
    from retpred.opendata import find_open_data, load_systems
    from retpred.training import fit_model, load_open_training_set

    root = find_open_data()
    if root is None:
        raise SystemExit("no model: give --model, build the default model or provide the "
                         "open data (RETPRED_OPEN_RP)")
    ids = {s.dataset for s in load_systems(root)[::15]}
    model = fit_model(load_open_training_set(root, ids), gbm_max_iter=150)
    model.residual_quantiles_ = {"zero_shot": [-0.12, 0.12], "calibrated": [-0.06, 0.06]}
    return prepare(method, model), "small model (every 15th open system, 150 boosting rounds)"


def save_prep(prep, where: Path) -> Path:
    """Our own prepared state for the child process (a file this script just wrote)."""
    path = Path(where) / "prep.pkl"
    with open(path, "wb") as fh:
        pickle.dump(prep, fh, protocol=pickle.HIGHEST_PROTOCOL)
    return path


def child(prep_pickle: str, analytes: str, out: str, jobs: str, chunk_size: str) -> None:
    """The command's work in a fresh process; prints one JSON line."""
    import resource

    from retpred.batch import stream_predict

    with open(prep_pickle, "rb") as fh:
        prep = pickle.load(fh)  # noqa: S301 - written by the parent process of this script
    s = stream_predict(prep, analytes, out, jobs=int(jobs), chunk_size=int(chunk_size),
                       force=True, progress=False)
    print(json.dumps({
        "n_rows": s.n_rows, "n_ok": s.n_ok, "n_failed": s.n_failed, "seconds": s.seconds,
        "self_maxrss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "out_mb": Path(out).stat().st_size / 1e6,
    }))


def write_input(path: Path, smiles: list[str], n_rows: int) -> None:
    with open(path, "w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(["name", "smiles"])
        for i in range(n_rows):
            w.writerow([f"c{i}", smiles[i % len(smiles)]])


def floor_seconds(path: Path) -> float:
    """Read the CSV and run bare MolFromSmiles + Crippen.MolLogP on every row."""
    from rdkit import Chem, rdBase
    from rdkit.Chem import Crippen

    t0 = time.perf_counter()
    with rdBase.BlockLogs(), open(path, encoding="utf-8", newline="") as fh:
        rows = csv.reader(fh)
        next(rows)
        for row in rows:
            m = Chem.MolFromSmiles(row[1])
            if m is not None:
                Crippen.MolLogP(m)
    return time.perf_counter() - t0


def ours_seconds(prep, path: Path, out: Path, jobs: int, chunk_size: int) -> float:
    from retpred.batch import stream_predict

    t0 = time.perf_counter()
    stream_predict(prep, path, out, jobs=jobs, chunk_size=chunk_size, force=True,
                   progress=False)
    return time.perf_counter() - t0


def main() -> None:
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        child(*sys.argv[2:7])
        return
    from soak import open_smiles, run_child

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=20_000, help="unique open structures")
    ap.add_argument("--jobs", type=int, default=2, help="processes for the parallel run")
    ap.add_argument("--chunk-size", type=int, default=2500)
    ap.add_argument("--rows", type=int, default=0, help="also run N rows in a child process "
                    "and report its peak memory")
    ap.add_argument("--rows-jobs", type=int, default=1, help="--jobs of the --rows run")
    ap.add_argument("--skip-throughput", action="store_true")
    ap.add_argument("--model", type=Path, default=None)
    ap.add_argument("--workdir", type=Path, default=None)
    args = ap.parse_args()

    prep, model_note = build_prep(args.model)
    smiles, origin = open_smiles(args.n)
    print(f"{len(smiles)} SMILES from {origin}; model: {model_note}", flush=True)
    with tempfile.TemporaryDirectory(dir=args.workdir) as tmp:
        tmp = Path(tmp)
        if not args.skip_throughput:
            path = tmp / "bench.csv"
            write_input(path, smiles, len(smiles))
            n = len(smiles)
            warm = tmp / "warm.csv"
            write_input(warm, smiles, 200)
            ours_seconds(prep, warm, tmp / "w.csv", 1, args.chunk_size)  # imports, tables
            f = floor_seconds(path)
            o1 = ours_seconds(prep, path, tmp / "o1.csv", 1, args.chunk_size)
            f2 = floor_seconds(path)  # again, to see load changes on a shared machine
            oj = ours_seconds(prep, path, tmp / "oj.csv", args.jobs, args.chunk_size)
            same = (tmp / "o1.csv").read_bytes() == (tmp / "oj.csv").read_bytes()
            floor = min(f, f2)
            print(f"floor (read CSV + MolFromSmiles + Crippen.MolLogP): {n / floor:8.0f} mol/s "
                  f"({f:.1f} s, again {f2:.1f} s)")
            print(f"ours, --jobs 1 (whole predict path, CSV to CSV):    {n / o1:8.0f} mol/s "
                  f"({o1:.1f} s)")
            print(f"ours, --jobs {args.jobs}:                                   "
                  f"{n / oj:8.0f} mol/s ({oj:.1f} s)")
            print(f"time ours/floor on one core: {o1 / floor:.2f} x (goal <= 3)")
            print(f"speed-up --jobs {args.jobs} / --jobs 1: {o1 / oj:.2f} (ideal {args.jobs}); "
                  f"outputs identical: {same}", flush=True)
        if args.rows:
            big = tmp / "big.csv"
            write_input(big, smiles, args.rows)
            info = run_child(save_prep(prep, tmp), big, tmp / "big_out.csv", args.rows_jobs,
                             5000)
            print(f"{args.rows} rows, --jobs {args.rows_jobs}: {info['wall_s']:.0f} s "
                  f"({args.rows / info['wall_s']:.0f} rows/s), output {info['out_mb']:.0f} MB")
            print(f"peak RSS: {info['self_maxrss_mb']:.0f} MB (main process), "
                  f"{info['children_maxrss_mb']:.0f} MB (largest process); goal < 1500 MB")


if __name__ == "__main__":
    main()
