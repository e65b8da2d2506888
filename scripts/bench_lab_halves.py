"""Lab-model benchmark (issue 5): train on half of a system's compounds, predict the other half.

    python scripts/bench_lab_halves.py [--data PATH] [--folds 5] [--step 1] [--min-compounds 40]

The base model of each system is the cross-validated one of the build (grouped folds by
source publication, so the system's own source was never seen). For every left-out system
with at least ``--min-compounds`` compounds, a random half (seed 0) plays the lab's data: the
correction is chosen and fitted exactly as ``retpred train`` does it
(:func:`retpred.lab.select_correction`), then the other half is predicted. Printed: the
median over systems of (lab median |error|) / (base zero-shot median |error|) on the same
held-out compounds, the share of systems at or below the 0.7 target, percentiles, and which
correction was chosen how often. ``--step N`` keeps every Nth system for a quick run.
Writes nothing.
"""

from __future__ import annotations

import argparse
import sys
import time
from collections import Counter
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from _open_cv import open_data_cv  # noqa: E402

from retpred.evaluation import _scored_systems  # noqa: E402
from retpred.gradient import elute  # noqa: E402
from retpred.lab import _apply, select_correction  # noqa: E402
from retpred.model import solute_matrix  # noqa: E402

TARGET_RATIO = 0.7


def half_split_ratio(ts, fp, sysi, m, seed=0):
    """(chosen correction, base zero-shot and lab median |error| on the held-out half)."""
    system = ts.systems[sysi]
    prog = system.program
    perm = np.random.default_rng(seed).permutation(m.size)
    tr, te = perm[: m.size // 2], perm[m.size // 2:]
    base, obs, s, rt = fp.log_kw[m], ts.log_kw[m], ts.s[m], ts.rt_min[m]
    meoh = np.full(m.size, 1.0 if system.organic == "methanol" else 0.0)
    x = solute_matrix(ts.solutes, ts.solute_idx[m], meoh)

    def rt_of(lk, sel):
        return elute(lk, s[tr][sel], prog).rt_min

    kind, _, lin, gbm = select_correction(base[tr], obs[tr], x[tr], rt[tr], rt_of)
    lab = elute(_apply(lin, gbm, base[te], x[te]), s[te], prog).rt_min
    zero = elute(base[te], s[te], prog).rt_min
    return (kind, float(np.nanmedian(np.abs(zero - rt[te]))),
            float(np.nanmedian(np.abs(lab - rt[te]))))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--data", type=Path, default=None)
    ap.add_argument("--folds", type=int, default=5)
    ap.add_argument("--step", type=int, default=1)
    ap.add_argument("--min-compounds", type=int, default=40)
    args = ap.parse_args(argv)
    t_start = time.perf_counter()
    cv = open_data_cv(args.data, args.step, args.folds)
    if cv is None:
        return 2
    ts, fp = cv
    rows = [half_split_ratio(ts, fp, sysi, m) for sysi, m in _scored_systems(ts)
            if m.size >= args.min_compounds]
    kinds = Counter(r[0] for r in rows)
    ratio = np.array([lab / zero for _, zero, lab in rows if zero > 0])
    if ratio.size == 0:
        print("no system large enough", file=sys.stderr)
        return 2
    p10, p25, p50, p75, p90 = np.percentile(ratio, [10, 25, 50, 75, 90])
    print(f"systems: {ratio.size} (>= {args.min_compounds} compounds, left out by source)")
    print(f"lab / zero-shot median |error|, held-out half: median {p50:.2f} "
          f"(target <= {TARGET_RATIO}); systems at or below target: "
          f"{np.mean(ratio <= TARGET_RATIO):.2f}")
    print(f"percentiles 10/25/50/75/90: {p10:.2f} {p25:.2f} {p50:.2f} {p75:.2f} {p90:.2f}")
    print("correction chosen: " + ", ".join(f"{k} {n}" for k, n in kinds.most_common()))
    print(f"({time.perf_counter() - t_start:.0f} s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
