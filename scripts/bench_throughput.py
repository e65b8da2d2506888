"""Throughput of the whole streamed prediction path against a floor measured in the same run,
the speed-up of local processes, the feature cache, and peak memory of a large run.

ours  = retpred.batch.stream_predict: read the CSV in chunks, standardise, descriptors,
        ionisation, model, gradient engine, widths, order and pairs, write the CSV
floor = read the same CSV + bare RDKit MolFromSmiles + Crippen.MolLogP per row

SMILES: --n unique structures of the open RP data (RETPRED_OPEN_RP, else
<repo>/../shared/datasets/open-rp/compounds.tsv.gz, column 'smiles'), seeded order.
Goals: ours takes at most 3 x the floor's time on one core; --jobs 2 near 2 x --jobs 1.

Runs, each --repeat times (interleaved; medians printed when repeated):
  floor; ours --jobs 1; ours --jobs N with fresh worker processes (start-up included, as a
  command-line run); ours --jobs N with the workers already running (a second run in one
  Python session); ours --jobs 1 with an empty feature cache (cold) and again on the
  same cache (warm). All outputs are compared with the --jobs 1 output, byte for byte.
Beside each figure: the 1-minute load average at its start, the cores our processes got
(CPU seconds / wall seconds) and the seconds the main process spent runnable but waiting
for a core (/proc schedstat). On a shared machine the speed-up is depressed by others'
load; "load-corrected" subtracts the main process's run-queue wait from the wall time of
both runs (an estimate for a quiet machine, not a measurement).

With --rows N the input is those SMILES repeated to N rows and the run happens in a child
process; its peak resident memory is read with getrusage (goal: under 1.5 GB at 1,000,000).

Model: --model PATH, else the shipped default model, else a small model trained here on a
fixed subset of the open data (every 15th system, as the tests do).

Usage: python scripts/bench_throughput.py [--n 20000] [--jobs 2] [--repeat 3] [--rows 1000000]
"""

from __future__ import annotations

import argparse
import csv
import json
import os
import pickle
import statistics
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


def child(prep_pickle: str, analytes: str, out: str, jobs: str, chunk_size: str,
          cache_dir: str = "") -> None:
    """The command's work in a fresh process; prints one JSON line."""
    import resource

    from retpred.batch import stream_predict

    with open(prep_pickle, "rb") as fh:
        prep = pickle.load(fh)  # noqa: S301 - written by the parent process of this script
    s = stream_predict(prep, analytes, out, jobs=int(jobs), chunk_size=int(chunk_size),
                       force=True, progress=False, cache_dir=cache_dir or False)
    print(json.dumps({
        "n_rows": s.n_rows, "n_ok": s.n_ok, "n_failed": s.n_failed, "seconds": s.seconds,
        "self_maxrss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "out_mb": Path(out).stat().st_size / 1e6, "cache_hits": s.cache_hits,
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


def _schedstat(pid: int) -> tuple[float, float]:
    """(CPU seconds, run-queue wait seconds) summed over the threads of ``pid``."""
    cpu = wait = 0.0
    try:
        tasks = os.listdir(f"/proc/{pid}/task")
    except OSError:
        return 0.0, 0.0
    for t in tasks:
        try:
            with open(f"/proc/{pid}/task/{t}/schedstat") as fh:
                run_ns, wait_ns, _ = fh.read().split()
        except (OSError, ValueError):
            continue
        cpu += int(run_ns) / 1e9
        wait += int(wait_ns) / 1e9
    return cpu, wait


def _children() -> list[int]:
    me = os.getpid()
    out = []
    for d in os.listdir("/proc"):
        if d.isdigit():
            try:
                with open(f"/proc/{d}/stat") as fh:
                    stat = fh.read()
            except OSError:
                continue
            if int(stat.rsplit(")", 1)[1].split()[1]) == me:
                out.append(int(d))
    return out


def _accounts() -> dict[int, tuple[float, float]]:
    return {pid: _schedstat(pid) for pid in [os.getpid(), *_children()]}


class Measured:
    """Wall seconds of a block, with the load average at its start, the CPU our processes
    (this one and its children) used and the main process's run-queue wait."""

    def __init__(self):
        self.load = os.getloadavg()[0]
        self._before = _accounts()
        self._t0 = time.perf_counter()

    def stop(self) -> Measured:
        self.wall = time.perf_counter() - self._t0
        after = _accounts()
        zero = (0.0, 0.0)
        self.cpu = sum(a[0] - self._before.get(p, zero)[0] for p, a in after.items())
        me = os.getpid()
        self.main_wait = after[me][1] - self._before[me][1]
        self.cores = self.cpu / self.wall if self.wall > 0 else float("nan")
        return self

    def note(self) -> str:
        return (f"load {self.load:.2f}, got {self.cores:.2f} cores, main waited "
                f"{self.main_wait:.1f} s for a core")


def floor_run(path: Path) -> Measured:
    m = Measured()
    floor_seconds(path)
    return m.stop()


def ours_run(prep, path: Path, out: Path, jobs: int, chunk_size: int, cache_dir=False,
             fresh_workers: bool = False):
    """(Measured, StreamSummary) of one stream_predict run."""
    from retpred.batch import stop_workers, stream_predict

    if fresh_workers:
        stop_workers()
    m = Measured()
    s = stream_predict(prep, path, out, jobs=jobs, chunk_size=chunk_size, force=True,
                       progress=False, cache_dir=cache_dir)
    return m.stop(), s


def _med(xs: list[float]) -> float:
    return statistics.median(xs)


def throughput(prep, smiles: list[str], tmp: Path, jobs: int, chunk_size: int, repeat: int,
               with_cache: bool) -> None:
    from retpred.batch import stop_workers

    n = len(smiles)
    path = tmp / "bench.csv"
    write_input(path, smiles, n)
    warm = tmp / "warm.csv"
    write_input(warm, smiles, 200)
    ours_run(prep, warm, tmp / "w.csv", 1, chunk_size)  # imports, tables
    runs: dict[str, list[Measured]] = {k: [] for k in
                                       ("floor", "j1", "jn", "jn_warm", "cold", "warm")}
    same: list[bool] = []
    cpu_rows: dict[str, list[float]] = {"j1": [], "jn": []}
    reference = tmp / "o1.csv"
    for r in range(repeat):
        runs["floor"].append(floor_run(path))
        m, s = ours_run(prep, path, reference, 1, chunk_size)
        runs["j1"].append(m)
        cpu_rows["j1"].append(s.compute_cpu_s / n * 1e6)
        m, s = ours_run(prep, path, tmp / "oj.csv", jobs, chunk_size, fresh_workers=True)
        runs["jn"].append(m)
        cpu_rows["jn"].append(s.compute_cpu_s / n * 1e6)
        same.append((tmp / "oj.csv").read_bytes() == reference.read_bytes())
        m, _ = ours_run(prep, path, tmp / "ojw.csv", jobs, chunk_size)
        runs["jn_warm"].append(m)
        same.append((tmp / "ojw.csv").read_bytes() == reference.read_bytes())
        if with_cache:
            cache = tmp / f"cache{r}"
            m, s = ours_run(prep, path, tmp / "oc.csv", 1, chunk_size, cache_dir=cache)
            runs["cold"].append(m)
            same.append((tmp / "oc.csv").read_bytes() == reference.read_bytes())
            m, s = ours_run(prep, path, tmp / "ow.csv", 1, chunk_size, cache_dir=cache)
            runs["warm"].append(m)
            same.append((tmp / "ow.csv").read_bytes() == reference.read_bytes()
                        and s.cache_hits == n)
            cache_mb = sum(f.stat().st_size for f in cache.iterdir()) / 1e6
        tag = f"[{r + 1}/{repeat}]"
        line = " ".join(f"{k} {v[-1].wall:.1f}s" for k, v in runs.items() if v)
        print(f"{tag} {line} (load {runs['floor'][-1].load:.2f})", flush=True)
    stop_workers()

    def wall(k):
        return _med([m.wall for m in runs[k]])

    def corrected(k):
        return _med([m.wall - m.main_wait for m in runs[k]])

    med = f" (medians of {repeat})" if repeat > 1 else ""
    f = wall("floor")
    print(f"\n{n} molecules{med}; the floor is measured in the same run")
    print(f"floor (read CSV + MolFromSmiles + Crippen.MolLogP): {n / f:8.0f} mol/s "
          f"({f:.1f} s; {runs['floor'][-1].note()})")
    for k, label in (("j1", "ours, --jobs 1 (whole predict path, CSV to CSV)"),
                     ("jn", f"ours, --jobs {jobs}, fresh worker processes"),
                     ("jn_warm", f"ours, --jobs {jobs}, workers already running")):
        w = wall(k)
        print(f"{label + ':':52s}{n / w:8.0f} mol/s ({w:.1f} s; {runs[k][-1].note()})")
    print(f"time ours/floor on one core: {wall('j1') / f:.2f} x (goal <= 3)")
    print(f"speed-up --jobs {jobs} / --jobs 1: {wall('j1') / wall('jn'):.2f} with fresh "
          f"workers, {wall('j1') / wall('jn_warm'):.2f} with running workers (ideal {jobs})")
    print(f"  load-corrected estimate (wall minus the main process's run-queue wait): "
          f"{corrected('j1') / corrected('jn'):.2f} fresh, "
          f"{corrected('j1') / corrected('jn_warm'):.2f} running")
    print(f"  predicting CPU per molecule: {_med(cpu_rows['j1']):.0f} us (--jobs 1), "
          f"{_med(cpu_rows['jn']):.0f} us (--jobs {jobs}, summed over processes)")
    if with_cache:
        c, w = wall("cold"), wall("warm")
        print(f"feature cache, --jobs 1: cold {n / c:.0f} mol/s ({c:.1f} s), warm {n / w:.0f} "
              f"mol/s ({w:.1f} s); warm/cold speed-up {c / w:.2f}; cold/no-cache time "
              f"{c / wall('j1'):.2f}; warm time / floor {w / f:.2f}; cache file "
              f"{cache_mb:.1f} MB")
    print(f"outputs identical to --jobs 1: {all(same)}", flush=True)


def main() -> None:
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        child(*sys.argv[2:8])
        return
    from soak import open_smiles, run_child

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=20_000, help="unique open structures")
    ap.add_argument("--jobs", type=int, default=2, help="processes for the parallel run")
    ap.add_argument("--chunk-size", type=int, default=2500)
    ap.add_argument("--repeat", type=int, default=1, help="repeat the runs, print medians")
    ap.add_argument("--no-cache", action="store_true", help="skip the feature-cache runs")
    ap.add_argument("--rows", type=int, default=0, help="also run N rows in a child process "
                    "and report its peak memory")
    ap.add_argument("--rows-jobs", type=int, default=1, help="--jobs of the --rows run")
    ap.add_argument("--skip-throughput", action="store_true")
    ap.add_argument("--model", type=Path, default=None)
    ap.add_argument("--workdir", type=Path, default=None)
    args = ap.parse_args()

    prep, model_note = build_prep(args.model)
    smiles, origin = open_smiles(args.n)
    print(f"{len(smiles)} SMILES from {origin}; model: {model_note}; {os.cpu_count()} cores; "
          f"load average at start {os.getloadavg()[0]:.2f}", flush=True)
    with tempfile.TemporaryDirectory(dir=args.workdir) as tmp:
        tmp = Path(tmp)
        if not args.skip_throughput:
            throughput(prep, smiles, tmp, args.jobs, args.chunk_size, max(1, args.repeat),
                       not args.no_cache)
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
