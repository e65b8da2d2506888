"""Soak run: a large analyte file with a share of garbage lines goes through the streamed
prediction; every garbage row must be reported and every other row predicted.

The file is SMILES from the open RP data (RETPRED_OPEN_RP, else
<repo>/../shared/datasets/open-rp/compounds.tsv.gz, column 'smiles'; else a built-in list)
repeated to ``--rows``, with ``--garbage`` of the lines replaced by broken rows of several
kinds (unparsable SMILES, impossible valence, unclosed ring or branch, unknown element,
missing SMILES, too many fields). The run happens in a child process (as the command
would) and its peak resident memory is read with getrusage.

Usage: python scripts/soak.py [--rows 1000000] [--garbage 0.05] [--jobs 1] [--model PATH]
       [--cache DIR]
"""

from __future__ import annotations

import argparse
import csv
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

#: Broken rows: (kind, builder from a valid SMILES). Each is invalid by the SMILES
#: specification (OpenSMILES: branches and ring bonds must close; bracket atoms must be
#: elements) or by valence (carbon has valence 4), so RDKit refuses it.
GARBAGE_KINDS = (
    ("unclosed branch", lambda s: s + "(C"),
    ("unclosed ring", lambda s: "C9" + s),
    ("unknown element", lambda s: "[Xq]" + s),
    ("pentavalent carbon", lambda s: "C(C)(C)(C)(C)C"),
    ("not a structure", lambda s: "%%??!!"),
    ("missing SMILES", lambda s: ""),
    ("too many fields", None),
)


def open_smiles(limit: int | None = None) -> tuple[list[str], str]:
    """Unique SMILES of the open data (seeded order), else the built-in benchmark list."""
    import os

    base = os.environ.get("RETPRED_OPEN_RP")
    root = Path(base) if base else HERE.parent / ".." / "shared" / "datasets" / "open-rp"
    path = root / "compounds.tsv.gz"
    if path.is_file():
        import pandas as pd

        smiles = pd.read_csv(path, sep="\t", usecols=["smiles"])["smiles"].dropna()
        smiles = smiles.drop_duplicates().sample(frac=1.0, random_state=12345)
        if limit is not None:
            smiles = smiles.iloc[:limit]
        return smiles.tolist(), str(path.resolve())
    from bench_chemistry import BUILTIN

    return list(BUILTIN), "built-in list"


def make_input(path: Path, n_rows: int, smiles: list[str], garbage: float = 0.0,
               seed: int = 7) -> np.ndarray:
    """Write a CSV (header ``name,smiles,batch``) of ``n_rows`` analytes cycling through
    ``smiles``; a seeded ``garbage`` fraction of rows are broken (GARBAGE_KINDS in turn).
    Returns the 1-based file line numbers of the broken rows."""
    rng = np.random.default_rng(seed)
    broken = np.zeros(n_rows, dtype=bool)
    k = int(round(garbage * n_rows))
    if k:
        broken[rng.choice(n_rows, size=k, replace=False)] = True
    lines = []
    with open(path, "w", encoding="utf-8", newline="") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(["name", "smiles", "batch"])
        g = 0
        for i in range(n_rows):
            s = smiles[i % len(smiles)]
            if broken[i]:
                kind, build = GARBAGE_KINDS[g % len(GARBAGE_KINDS)]
                g += 1
                if build is None:
                    w.writerow([f"bad{i}", s, "x", "surplus", "fields"])
                else:
                    w.writerow([f"bad{i}", build(s), "x"])
                lines.append(i + 2)
            else:
                w.writerow([f"c{i}", s, f"b{i % 97}"])
    return np.asarray(lines, dtype=np.int64)


def run_child(prep_pickle: Path, analytes: Path, out: Path, jobs: int, chunk_size: int,
              cache_dir: Path | None = None) -> dict:
    """Run the streamed prediction in a child process (feature cache in ``cache_dir`` if
    given); peak RSS from getrusage."""
    import json
    import resource
    import subprocess

    cmd = [sys.executable, str(HERE / "bench_throughput.py"), "--child", str(prep_pickle),
           str(analytes), str(out), str(jobs), str(chunk_size), str(cache_dir or "")]
    t0 = time.perf_counter()
    res = subprocess.run(cmd, capture_output=True, text=True, check=False)
    wall = time.perf_counter() - t0
    if res.returncode != 0:
        raise SystemExit(f"child failed ({res.returncode}):\n{res.stderr[-3000:]}")
    info = json.loads(res.stdout.strip().splitlines()[-1])
    info["wall_s"] = wall
    info["children_maxrss_mb"] = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    return info


def check_reported(out_csv: Path, garbage_lines: np.ndarray) -> tuple[int, int, int]:
    """(rows, garbage rows reported without a time, other rows without a time)."""
    import pandas as pd

    bad_set = set(garbage_lines.tolist())
    rows = reported = others = 0
    for part in pd.read_csv(out_csv, usecols=["line", "status", "rt_min"], chunksize=200_000,
                            keep_default_na=False, dtype={"status": str, "rt_min": str}):
        rows += len(part)
        no_time = (part["rt_min"] == "") & (part["status"] != "ok")
        is_bad = part["line"].isin(bad_set)
        reported += int((no_time & is_bad).sum())
        others += int((no_time & ~is_bad).sum())
    return rows, reported, others


def main() -> None:
    from bench_throughput import build_prep, save_prep

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--garbage", type=float, default=0.05)
    ap.add_argument("--jobs", type=int, default=1)
    ap.add_argument("--chunk-size", type=int, default=5000)
    ap.add_argument("--model", type=Path, default=None)
    ap.add_argument("--workdir", type=Path, default=None)
    ap.add_argument("--cache", type=Path, default=None, help="feature cache directory")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(dir=args.workdir) as tmp:
        tmp = Path(tmp)
        prep, model_note = build_prep(args.model)
        smiles, origin = open_smiles()
        analytes = tmp / "soak.csv"
        garbage_lines = make_input(analytes, args.rows, smiles, args.garbage)
        print(f"input: {args.rows} rows ({garbage_lines.size} garbage) cycling {len(smiles)} "
              f"SMILES from {origin}; model: {model_note}", flush=True)
        info = run_child(save_prep(prep, tmp), analytes, tmp / "out.csv", args.jobs,
                         args.chunk_size, args.cache)
        rows, reported, others = check_reported(tmp / "out.csv", garbage_lines)
    print(f"rows written: {rows} of {args.rows}")
    print(f"garbage rows reported (no time, status given): {reported} of {garbage_lines.size}")
    print(f"failed rows in the summary: {info['n_failed']}; valid rows without a time: {others}")
    print(f"wall {info['wall_s']:.0f} s, {args.rows / info['wall_s']:.0f} rows/s with --jobs "
          f"{args.jobs}; peak RSS {info['self_maxrss_mb']:.0f} MB (main process), "
          f"{info['children_maxrss_mb']:.0f} MB (largest process)")
    ok = rows == args.rows and reported == garbage_lines.size
    print("soak PASSED" if ok else "soak FAILED")
    raise SystemExit(0 if ok else 1)


if __name__ == "__main__":
    main()
