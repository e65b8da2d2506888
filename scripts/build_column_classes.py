"""Write retpred/data/column_classes.tsv: median HSM parameters per phase class.

Reads the public hydrophobic-subtraction column table ``hsm_columns.tsv`` of the open-rp
data (derived from RepoRT, CC BY-SA 4.0) from ``$RETPRED_OPEN_RP`` or
``<checkout>/../shared/datasets/open-rp`` and writes only the per-class medians and counts.

Class of a column: from its 'phase type' label (C18 -> C18, C8 -> C8, phenyl -> phenyl,
EP (embedded polar group) -> polar-embedded, CN -> CN); where the label is blank, from the
USP code (L1 -> C18, L7 -> C8, L11 -> phenyl, L10 -> CN). Other phases (C4, C30,
fluorinated, mixed labels, ...) are left out.

Usage: python scripts/build_column_classes.py [--open-rp PATH] [--out PATH]
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

import pandas as pd

REPO = Path(__file__).resolve().parent.parent
OUT = REPO / "retpred" / "data" / "column_classes.tsv"
CLASSES = ("C18", "C8", "phenyl", "polar-embedded", "CN")
PHASE_TYPE_TO_CLASS = {
    "c18": "C18",
    "c8": "C8",
    "phenyl": "phenyl",
    "ep": "polar-embedded",
    "cn": "CN",
}
USP_TO_CLASS = {"L1": "C18", "L7": "C8", "L11": "phenyl", "L10": "CN"}
# source column -> HsmParameters field
FIELDS = {
    "H": "H",
    "S*": "S",
    "A": "A",
    "B": "B",
    "C (pH 2.8)": "C28",
    "C (pH 7.0)": "C70",
    "EB retention factor": "kEB",
}


def open_rp_dir(path: str | None) -> Path:
    for cand in (
        path,
        os.environ.get("RETPRED_OPEN_RP"),
        REPO.parent / "shared" / "datasets" / "open-rp",
    ):
        if cand and (Path(cand) / "hsm_columns.tsv").is_file():
            return Path(cand)
    sys.exit("hsm_columns.tsv not found: pass --open-rp PATH or set RETPRED_OPEN_RP")


def phase_class(phase_type, usp_code) -> str | None:
    """Our phase class of one HSM table row, or None when it is none of ours."""
    label = str(phase_type).strip().lower() if isinstance(phase_type, str) else ""
    if label:
        return PHASE_TYPE_TO_CLASS.get(label)
    code = str(usp_code).strip().upper() if isinstance(usp_code, str) else ""
    return USP_TO_CLASS.get(code)


def class_medians(table: pd.DataFrame) -> pd.DataFrame:
    """Median of each HSM parameter per class, with the number of columns per class."""
    cls = [phase_class(p, u) for p, u in zip(table["phase type"], table["usp code"], strict=True)]
    df = table.assign(phase=cls).dropna(subset=["phase"])
    grouped = df.groupby("phase")
    med = grouped[list(FIELDS)].median().rename(columns=FIELDS)
    med.insert(0, "n_columns", grouped.size())
    return med.reindex(list(CLASSES))


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--open-rp", default=None)
    ap.add_argument("--out", default=str(OUT))
    args = ap.parse_args(argv)
    src = open_rp_dir(args.open_rp) / "hsm_columns.tsv"
    table = pd.read_csv(src, sep="\t")
    med = class_medians(table)
    if med["n_columns"].isna().any():
        sys.exit(f"a phase class has no columns in {src}")
    lines = [
        "# Median hydrophobic-subtraction (HSM) column parameters per phase class.",
        "# Derived from the public HSM column table as distributed in the open-rp data",
        "# (derived from RepoRT; CC BY-SA 4.0). Written by scripts/build_column_classes.py;",
        "# n_columns = number of table columns in the class. Class from the 'phase type'",
        "# label (EP = polar-embedded), else from the USP code (L1 C18, L7 C8, L11 phenyl,",
        "# L10 CN).",
        "phase\tn_columns\t" + "\t".join(FIELDS.values()),
    ]
    for phase, row in med.iterrows():
        vals = "\t".join(f"{row[f]:.4g}" for f in FIELDS.values())
        lines.append(f"{phase}\t{int(row['n_columns'])}\t{vals}")
    Path(args.out).write_text("\n".join(lines) + "\n", encoding="utf-8")
    print(f"wrote {args.out}: " + ", ".join(f"{p} {int(n)}" for p, n in med["n_columns"].items()))


if __name__ == "__main__":
    main()
