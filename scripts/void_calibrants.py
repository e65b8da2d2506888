"""Void calibrants benchmark (issue 5): standards eluting at or near t0, as bounds or as times.

    python scripts/void_calibrants.py [--data PATH] [--folds 5] [--step 1] [--seeds 0,1]

The validation's protocol draws its 10 calibrants from a system's retained rows only. A
user's standards may include a t0 marker or a polar compound eluting in the initial hold;
here the 10 calibrants of each left-out system (grouped folds by source publication, the
build's cross-validation) are drawn from *every* row, the void rows of the open data too
(0.8-1.15 t0, ``retpred.training.VoidRows``), and the retained rows not drawn are scored
(:func:`retpred.evaluation.void_calibrant_draws`). Printed per seed: the median over
systems of the median absolute error (% of the last retained time) with the void
calibrants read as exact times, used as upper bounds (what ``calibrate`` does), and the
protocol's retained-only draws for reference; the number of systems at or below 2.5 %;
and the bounds / exact ratio over the systems that drew a void calibrant, both measured
in this run. ``--step N`` keeps every Nth system for a quick run. Writes nothing.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from _open_cv import open_data_cv  # noqa: E402

from retpred.evaluation import void_calibrant_draws  # noqa: E402

TARGET_PCT = 2.5
MODES = ("retained", "exact", "bounds")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--data", type=Path, default=None)
    ap.add_argument("--folds", type=int, default=5)
    ap.add_argument("--step", type=int, default=1)
    ap.add_argument("--seeds", default="0,1", help="comma-separated draw seeds")
    args = ap.parse_args(argv)
    try:
        seeds = [int(v) for v in args.seeds.split(",")]
    except ValueError:
        print(f"--seeds: not a comma-separated list of integers: {args.seeds!r}",
              file=sys.stderr)
        return 2
    t_start = time.perf_counter()
    cv = open_data_cv(args.data, args.step, args.folds)
    if cv is None:
        return 2
    ts, fp = cv
    print(f"void rows: {ts.void.rt_min.size}, retained rows: {ts.rt_min.size}")
    for seed in seeds:
        tab = void_calibrant_draws(ts, fp, seed=seed)
        drew = tab[tab["void_drawn"] > 0]
        parts = [f"{mode} {tab[f'{mode}_medae_pct'].median():.2f} % "
                 f"({int((tab[f'{mode}_medae_pct'] <= TARGET_PCT).sum())})" for mode in MODES]
        ratio = drew["bounds_medae_pct"].median() / drew["exact_medae_pct"].median()
        print(f"seed {seed}, {len(tab)} systems, {tab['void_drawn'].mean():.2f} void "
              f"calibrants per draw: " + ", ".join(parts)
              + f"; bounds / exact on the {len(drew)} systems that drew one: {ratio:.3f}")
    print(f"(median % of the last retained time; systems at or below {TARGET_PCT} % in "
          f"brackets; {time.perf_counter() - t_start:.0f} s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
