"""Throughput of the chemistry layer against a floor measured in the same run.

ours  = standardise_smiles + compute_descriptors + compute_fingerprints + find_ionisable_sites
floor = bare RDKit MolFromSmiles + Crippen.MolLogP

SMILES: a seeded sample of unique SMILES from the open RP dataset
(RETPRED_OPEN_RP, else <repo>/../shared/datasets/open-rp/compounds.tsv.gz, column 'smiles'),
else a built-in list of drugs repeated. Prints molecules/s of both (median of repeats) and
the ratio; the target is ours >= 0.25 x floor and >= 700 molecules/s per core.

Usage: python scripts/bench_chemistry.py [--n 3000] [--repeats 5]
"""

from __future__ import annotations

import argparse
import os
import statistics
import time
from pathlib import Path

BUILTIN = [
    "CC(C)Cc1ccc(C(C)C(=O)O)cc1", "CN(C)CCCN1c2ccccc2Sc2ccc(Cl)cc21.Cl",
    "CC(=O)Nc1ccc(O)cc1", "Cn1c(=O)c2c(ncn2C)n(C)c1=O", "CC(C)NCC(O)COc1cccc2ccccc12",
    "OC(=O)c1cn(C2CC2)c2cc(N3CCNCC3)c(F)cc2c1=O", "Cc1cc(NS(=O)(=O)c2ccc(N)cc2)no1",
    "CC(=O)CC(c1ccccc1)c1c(O)c2ccccc2oc1=O", "NCC(=O)O", "CN(C)C(=N)N=C(N)N",
    "OC(=O)COCCN1CCN(C(c2ccccc2)c2ccc(Cl)cc2)CC1", "C[N+](C)(C)CCOC(C)=O.[Cl-]",
    "CCN(CC)CC(=O)Nc1c(C)cccc1C", "O=C(O)c1ccccc1O", "CC12CCC3C(CCC4=CC(=O)CCC34C)C1CCC2O",
    "COc1cc(Cc2cnc(N)nc2N)cc(OC)c1OC", "OC[C@H]1O[C@@H](O)[C@H](O)[C@@H](O)[C@@H]1O",
    "Clc1ccc(cc1)C(c1ccccc1)N1CCN(CC1)CCOCC(=O)O", "CCCCC1C(=O)N(c2ccccc2)N(c2ccccc2)C1=O",
    "O=C([O-])c1ccccc1Nc1c(Cl)cccc1Cl.[Na+]",
]


def load_smiles(n: int) -> tuple[list[str], str]:
    base = os.environ.get("RETPRED_OPEN_RP")
    root = Path(base) if base else Path(__file__).resolve().parents[1] / ".." / "shared" / (
        "datasets/open-rp"
    )
    path = root / "compounds.tsv.gz"
    if path.is_file():
        import pandas as pd

        smiles = pd.read_csv(path, sep="\t", usecols=["smiles"])["smiles"].dropna()
        smiles = smiles.drop_duplicates()
        smiles = smiles.sample(min(n, len(smiles)), random_state=12345).tolist()
        return smiles, str(path.resolve())
    reps = n // len(BUILTIN) + 1
    return (BUILTIN * reps)[:n], "built-in list"


def median_rate(fn, n_mol: int, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return n_mol / statistics.median(times)


def measure(smiles: list[str], repeats: int = 5) -> tuple[float, float]:
    """(ours, floor) in molecules per second, median of ``repeats`` interleaved runs."""
    from rdkit import Chem, rdBase
    from rdkit.Chem import Crippen

    from retpred.chemistry import compute_descriptors, compute_fingerprints, find_ionisable_sites
    from retpred.structures import standardise_smiles

    def floor():
        with rdBase.BlockLogs():
            for s in smiles:
                m = Chem.MolFromSmiles(s)
                if m is not None:
                    Crippen.MolLogP(m)

    def ours():
        batch = standardise_smiles(smiles)
        compute_descriptors(batch.mols)
        compute_fingerprints(batch.mols)
        find_ionisable_sites(batch.mols)

    ours()  # warm caches (group table, generators)
    f_times, o_times = [], []
    for _ in range(repeats):  # interleave so load changes hit both
        t0 = time.perf_counter()
        floor()
        f_times.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        ours()
        o_times.append(time.perf_counter() - t0)
    n = len(smiles)
    return n / statistics.median(o_times), n / statistics.median(f_times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=3000, help="number of SMILES")
    ap.add_argument("--repeats", type=int, default=5)
    args = ap.parse_args()
    smiles, origin = load_smiles(args.n)
    ours, floor = measure(smiles, args.repeats)
    print(f"SMILES: {len(smiles)} from {origin}; median of {args.repeats} repeats")
    print(f"floor (MolFromSmiles + Crippen.MolLogP): {floor:8.0f} molecules/s")
    print(f"ours  (standardise + descriptors + fingerprints + sites): {ours:8.0f} molecules/s")
    print(f"ratio ours/floor: {ours / floor:.2f}  (target >= 0.25; absolute target >= 700/s)")


if __name__ == "__main__":
    main()
