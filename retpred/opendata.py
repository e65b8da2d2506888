"""Reader of the open reversed-phase retention data (``open-rp``, derived from RepoRT).

The data are CC BY-SA 4.0 and are never copied into this repository: they are read from a
path, ``$RETPRED_OPEN_RP`` or ``<checkout>/../shared/datasets/open-rp``.

Each dataset (chromatographic system) becomes a :class:`OpenSystem` with its own
:class:`~retpred.gradient.ElutionProgram`. Flaws of the data handled here:

- unknown dead time, or one implausible against the column geometry (outside 0.33-3x the
  geometric estimate ``0.5 L dc^2 / F``): the geometric estimate is used;
- unknown flow: 0.3 mL/min for columns of 2.1 mm i.d. or less, else 1.0 mL/min
  (common practice); with a known dead time only the dwell *time* depends on it;
- unknown dwell volume (never recorded): the method module's typical UHPLC/HPLC value;
- unknown column temperature, or one outside 5-100 C (one system gives -1, a placeholder,
  not a column at -1 C): the method module's default, 30 C;
- unknown pH: from the additives (formic/acetic/TFA -> acidic, ammonium hydroxide ->
  basic, ammonium salts alone -> near neutral), else formic-acid conditions;
- rows eluting at or before the dead time carry no retention information and are dropped;
  duplicate (dataset, structure) rows are averaged;
- systems without a gradient program, without a known organic modifier or with a
  non-silica phase (graphitic carbon) are left out;
- 1,3,5-triazines drawn over-hydrogenated (ring carbons sp3 with an extra H, exocyclic
  C=N, e.g. ``CCN=C1NC(N=C(N1)NC(C)C)Cl`` for the herbicide whose ring is aromatic): the ring
  is read as the aromatic triazine it must be (:func:`repair_triazine`). A ring CH carbon
  bonded to two ring nitrogens and carrying Cl, S, O or N is an aminal that would not
  survive a chromatographic run; the open data hold nine such drawings in one source.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from rdkit import Chem, RDLogger

from retpred.gradient import ElutionProgram, build_program
from retpred.method import (
    DEFAULT_DWELL_HPLC_ML,
    DEFAULT_DWELL_UHPLC_ML,
    DEFAULT_PH,
    DEFAULT_TEMPERATURE_C,
    TEMPERATURE_PHYSICAL_C,
    TEMPERATURE_USUAL_C,
    HsmParameters,
)

ENV_VAR = "RETPRED_OPEN_RP"
#: What to say when :func:`find_open_data` finds nothing (tests skip with it, scripts exit).
NOT_FOUND_MESSAGE = (f"open retention data not found: set {ENV_VAR} or place it at "
                     "../shared/datasets/open-rp next to the checkout")
_PHASE_MAP = {
    "C18": "C18",
    "C8": "C8",
    "phenyl": "phenyl",
    "Phenyl": "phenyl",
    "EP": "polar-embedded",
    "CN": "CN",
    "unknown": "C18",  # most unlabelled reversed-phase columns are C18 (the data: 290 of 324)
}
_MODIFIER_MAP = {"acn": "acetonitrile", "meoh": "methanol", "acn+iproh": "acetonitrile",
                 "acn+meoh": "acetonitrile", "acn+acetone": "acetonitrile"}


def not_found_message(path: str | os.PathLike | None = None) -> str:
    """The one-line error for :func:`find_open_data` returning None for ``path``."""
    if path is not None:
        return f"{path}: no open retention data there (needs systems.tsv and compounds.tsv.gz)"
    return f"{NOT_FOUND_MESSAGE} (or give --data)"


def find_open_data(path: str | os.PathLike | None = None) -> Path | None:
    """The open-rp folder: ``path`` when given (and only it: a folder named but not
    holding the data must not be replaced by another one), else ``$RETPRED_OPEN_RP`` or
    ``../shared/datasets/open-rp`` next to the checkout; ``None`` when it is not there."""
    here = Path(__file__).resolve().parent.parent
    if path is not None:
        candidates = [Path(path)]
    else:
        candidates = [Path(os.environ[ENV_VAR])] if os.environ.get(ENV_VAR) else []
        candidates += [here.parent / "shared" / "datasets" / "open-rp",
                       Path.cwd().parent / "shared" / "datasets" / "open-rp"]
    for c in candidates:
        if (c / "systems.tsv").is_file() and (c / "compounds.tsv.gz").is_file():
            return c
    return None


@dataclass(frozen=True)
class OpenSystem:
    dataset: str
    group: str  # source publication (DOI), else the dataset id
    phase: str
    organic: str
    ph: float
    temperature_c: float
    hsm: HsmParameters | None
    program: ElutionProgram
    length_mm: float
    inner_diameter_mm: float
    particle_um: float
    flow_ml_min: float


def _num(x) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


#: Column temperatures read as reported, C: from the lowest usual column temperature to the
#: physical limit of a method file (``retpred.method``); outside: not reported.
PLAUSIBLE_TEMPERATURE_C = (TEMPERATURE_USUAL_C[0], TEMPERATURE_PHYSICAL_C[1])


def column_temperature_c(x) -> float:
    """The column temperature of a ``systems.tsv`` cell: the default (30 C) where it is blank
    or outside :data:`PLAUSIBLE_TEMPERATURE_C` (a placeholder such as -1)."""
    t = _num(x)
    lo, hi = PLAUSIBLE_TEMPERATURE_C
    return t if t is not None and lo <= t <= hi else DEFAULT_TEMPERATURE_C


def ph_from_additives(additives: str | None) -> float:
    """A pH guess from the additive list when none was reported (common practice values:
    0.1 % formic acid ~2.7, 0.1 % acetic acid ~3.2, 0.1 % TFA ~2.0, ammonium hydroxide ~10,
    ammonium bicarbonate ~7.8, ammonium acetate/formate alone ~6.5)."""
    a = (additives or "").lower()
    if "trifluoroacetic" in a:
        return 2.0
    if "nh4oh" in a and "formic" not in a and "acetic" not in a:
        return 10.0
    if "formic" in a:
        return 2.7 if "nh4" not in a else 3.5
    if "acetic" in a:
        return 3.2 if "nh4" not in a else 4.8
    if "nh4bicarb" in a:
        return 7.8
    if "nh4" in a:
        return 6.5
    return DEFAULT_PH


def load_systems(root: Path) -> list[OpenSystem]:
    """All usable systems of the open data, each with its elution program."""
    sysdf = pd.read_csv(root / "systems.tsv", sep="\t", dtype={"dataset": str})
    grad = pd.read_csv(root / "gradients.tsv", sep="\t", dtype={"dataset": str})
    programs = {k: v.sort_values("t_min") for k, v in grad.groupby("dataset")}
    out = []
    for row in sysdf.itertuples(index=False):
        phase = _PHASE_MAP.get(str(row.phase))
        organic = _MODIFIER_MAP.get(str(row.modifier))
        g = programs.get(row.dataset)
        if phase is None or organic is None or g is None or len(g) == 0:
            continue
        length = _num(row.length_mm)
        idm = _num(row.id_mm)
        dp = _num(row.particle_um) or 3.0
        flow = _num(row.flow_ml_min)
        gflow = g["flow_ml_min"].to_numpy(dtype=float)
        if flow is None:
            finite = gflow[np.isfinite(gflow)]
            flow = float(finite[0]) if finite.size else None
        narrow = idm is None or idm <= 2.1
        if flow is None:
            flow = 0.3 if narrow else 1.0
        gflow = np.where(np.isfinite(gflow) & (gflow > 0), gflow, flow)
        t0_geo = None
        if length and idm:
            t0_geo = 0.5 * (length / 10.0) * (idm / 10.0) ** 2 / flow
        t0 = _num(row.t0_min)
        if t0 is None or t0 <= 0 or (t0_geo and not (t0_geo / 3 <= t0 <= 3 * t0_geo)):
            t0 = t0_geo
        if t0 is None:
            continue
        times = g["t_min"].to_numpy(dtype=float)
        phi = g["phi_organic"].to_numpy(dtype=float)
        if not np.all(np.isfinite(times)) or not np.all(np.isfinite(phi)):
            continue
        times = np.maximum.accumulate(times - times[0])
        dwell = DEFAULT_DWELL_UHPLC_ML if (narrow or dp < 2.0) else DEFAULT_DWELL_HPLC_ML
        try:
            prog = build_program(times, phi, gflow, dead_time_min=t0, dwell_volume_ml=dwell)
        except ValueError:
            continue
        ph = _num(row.ph_a)
        if ph is None:
            ph = ph_from_additives(row.additives if isinstance(row.additives, str) else None)
        hsm = None
        vals = [_num(getattr(row, f"hsm_{k}")) for k in ("H", "S", "A", "B", "C28", "C70", "kEB")]
        if all(v is not None for v in vals):
            hsm = HsmParameters(*vals)
        doi = row.source_doi if isinstance(row.source_doi, str) and row.source_doi else None
        out.append(
            OpenSystem(
                dataset=row.dataset,
                group=doi or f"dataset:{row.dataset}",
                phase=phase,
                organic=organic,
                ph=float(ph),
                temperature_c=column_temperature_c(row.temperature_c),
                hsm=hsm,
                program=prog,
                length_mm=length or 100.0,
                inner_diameter_mm=idm or 2.1,
                particle_um=dp,
                flow_ml_min=float(flow),
            )
        )
    return out


#: A non-aromatic 1,3,5-triazine ring with an sp3 CH carbon carrying a heteroatom or halogen
#: outside the ring (an over-hydrogenated drawing of an aromatic triazine).
_SP3_TRIAZINE = Chem.MolFromSmarts(
    "[CX4H1;r6;$(C[Cl,Br,I,S,O,N;!R])]1~[#7;r6]~[#6;r6;!a]~[#7;r6]~[#6;r6;!a]~[#7;r6]~1"
)


def repair_triazine(smiles: str) -> str:
    """The SMILES with every over-hydrogenated 1,3,5-triazine ring made aromatic again
    (ring atoms lose their extra H, exocyclic C=N become single bonds); other structures
    and anything that does not sanitise are returned unchanged."""
    RDLogger.DisableLog("rdApp.*")
    mol = Chem.MolFromSmiles(smiles)
    if mol is None or not mol.HasSubstructMatch(_SP3_TRIAZINE):
        return smiles
    rw = Chem.RWMol(mol)
    for match in mol.GetSubstructMatches(_SP3_TRIAZINE):
        ring = set(match)
        for i in ring:
            atom = rw.GetAtomWithIdx(i)
            atom.SetNumExplicitHs(0)
            atom.SetNoImplicit(False)
            atom.SetIsAromatic(True)
            for bond in atom.GetBonds():
                other = bond.GetOtherAtomIdx(i)
                if other in ring:
                    bond.SetBondType(Chem.BondType.AROMATIC)
                    bond.SetIsAromatic(True)
                elif bond.GetBondType() == Chem.BondType.DOUBLE and atom.GetSymbol() == "C":
                    bond.SetBondType(Chem.BondType.SINGLE)
                    nb = rw.GetAtomWithIdx(other)
                    nb.SetNoImplicit(False)
                    nb.SetNumExplicitHs(0)
    try:
        fixed = rw.GetMol()
        Chem.SanitizeMol(fixed)
    except Exception:  # noqa: BLE001 - RDKit raises several kinds; keep the original
        return smiles
    return Chem.MolToSmiles(fixed)


def load_compounds(root: Path, datasets: set[str] | None = None) -> pd.DataFrame:
    """Observed retention rows: dataset, smiles, inchikey, name, rt_min (duplicates averaged;
    over-hydrogenated triazine drawings repaired, see :func:`repair_triazine`)."""
    df = pd.read_csv(
        root / "compounds.tsv.gz",
        sep="\t",
        dtype={"dataset": str},
        usecols=["dataset", "name", "smiles", "inchikey", "rt_min"],
    )
    if datasets is not None:
        df = df[df["dataset"].isin(datasets)]
    df = df[np.isfinite(df["rt_min"]) & (df["rt_min"] > 0) & df["smiles"].notna()]
    suspect = df["smiles"].str.contains("=N|N=", regex=True)  # cheap pre-filter: a C=N
    if suspect.any():
        fixed = {t: repair_triazine(t) for t in df.loc[suspect, "smiles"].unique()}
        df.loc[suspect, "smiles"] = df.loc[suspect, "smiles"].map(fixed)
    df = (
        df.groupby(["dataset", "smiles"], as_index=False, sort=False)
        .agg(name=("name", "first"), inchikey=("inchikey", "first"), rt_min=("rt_min", "mean"))
    )
    return df.reset_index(drop=True)

