"""Read and standardise analyte structures (SMILES or SDF) with RDKit.

Standardisation, per structure:

1. parse (SMILES) or take the molecule as read (SDF); explicit hydrogens are removed;
2. keep the parent: the largest organic (carbon-containing) fragment by heavy-atom count,
   passing over common counter-ions and solvents when another organic fragment exists;
3. neutralise where a neutral parent exists (RDKit ``rdMolStandardize.Uncharger``:
   protonated amines and carboxylates are neutralised, quaternary ammonium, N-oxides and
   nitro groups keep their charges);
4. keep stereochemistry; write the canonical isomeric SMILES of the parent.

The full ``rdMolStandardize.Cleanup`` pipeline is not used: it costs about 0.9 ms per
molecule (measured, about twice bare parsing), and the parsers already sanitise. Tautomers
are not canonicalised (the ionisable-group SMARTS cover the usual drawn forms).

Unusable rows get a short reason in ``status`` ('empty', 'unparseable SMILES', 'no carbon').
Usable rows outside the small-molecule domain are flagged (``status`` starts with
'outside domain:'), not refused, so the caller can decide.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from rdkit import Chem, rdBase
from rdkit.Chem import rdMolDescriptors
from rdkit.Chem.MolStandardize import rdMolStandardize

from retpred.errors import InputError

# Small-molecule domain (common practice for RP-LC retention models: drug-like and
# metabolite-like analytes; peptides and large natural products behave differently).
MAX_HEAVY_ATOMS = 150
# The open data the model learns from hold no structure with fewer than 4 heavy atoms (23
# of 15,320 have 4 or 5; solutes eluting before 1.15 t0 are not used for training): for
# methanol- or ethanol-sized solutes, barely retained in reversed phase, the model's
# retention is an extrapolation that comes out too long.
MIN_HEAVY_ATOMS = 4
# A chain of this many peptide bonds between alpha carbons (a tetrapeptide or larger) flags
# the structure as a peptide.
MIN_PEPTIDE_BONDS = 3

_CARBON = Chem.MolFromSmarts("[#6]")
_CHARGED = Chem.MolFromSmarts("[!+0]")
_UNUSUAL_ELEMENT = Chem.MolFromSmarts(
    "[!#1;!#5;!#6;!#7;!#8;!#9;!#14;!#15;!#16;!#17;!#34;!#35;!#53]"
)
_PEPTIDE_BOND = Chem.MolFromSmarts("[CX4][CX3](=O)[NX3][CX4][CX3]=O")

# Counter-ions and solvents (neutral, non-isomeric canonical SMILES) passed over when another
# organic fragment is present. Common practice for salt stripping.
_COUNTERIONS = frozenset(
    Chem.CanonSmiles(s, useChiral=0)
    for s in (
        "CC(=O)O", "OC=O", "OC(=O)C(F)(F)F", "OC(=O)C=CC(=O)O", "OC(=O)CCC(=O)O",
        "OC(=O)C(O)C(O)C(=O)O", "OC(=O)CC(O)(CC(=O)O)C(=O)O", "OC(=O)C(=O)O",
        "OC(=O)C(O)CC(=O)O", "CC(O)C(=O)O", "CS(=O)(=O)O", "OS(=O)(=O)c1ccccc1",
        "Cc1ccc(S(=O)(=O)O)cc1", "CCS(=O)(=O)O", "OS(=O)(=O)CCS(=O)(=O)O",
        "OC(=O)c1ccccc1", "CCO", "CO", "CC(C)O", "CC(C)=O", "CS(C)=O", "ClCCl",
        "ClC(Cl)Cl", "CCOCC", "CCOC(C)=O", "CC#N", "c1ccccc1", "Cc1ccccc1",
        "OCCN(CCO)CCO", "NC(CO)(CO)CO", "CNCC(O)C(O)C(O)C(O)CO",
    )
)

_uncharger: rdMolStandardize.Uncharger | None = None


def _get_uncharger() -> rdMolStandardize.Uncharger:
    global _uncharger
    if _uncharger is None:
        _uncharger = rdMolStandardize.Uncharger(canonicalOrder=True)
    return _uncharger


@dataclass
class StandardisedBatch:
    """Standardised parents of a batch of input structures, row-aligned with the input.

    ``mols``: parent molecules (None where unusable); ``smiles``: canonical isomeric SMILES of
    the parent ('' where unusable); ``usable``: bool array; ``status``: 'ok', a warning
    ('outside domain: ...') for usable-but-flagged rows, or the reason a row is unusable;
    ``changes``: what standardisation did ('' if nothing), e.g. 'salt stripped: Na+; neutralised'.
    """

    mols: list[Chem.Mol | None]
    smiles: list[str]
    usable: np.ndarray
    status: list[str]
    changes: list[str]

    def __len__(self) -> int:
        return len(self.mols)


def _fragment_label(frag: Chem.Mol) -> str:
    """Molecular formula with charge, e.g. 'Na+', 'Cl-', 'H2O', 'C4H4O4'."""
    return rdMolDescriptors.CalcMolFormula(frag)


def _choose_parent(mol: Chem.Mol) -> tuple[Chem.Mol | None, list[str]]:
    """Largest organic fragment (None if no fragment has carbon) and labels of the rest."""
    frags = Chem.GetMolFrags(mol, asMols=True, sanitizeFrags=False)
    if len(frags) == 1:
        return (mol if mol.HasSubstructMatch(_CARBON) else None), []
    organic = [f for f in frags if f.HasSubstructMatch(_CARBON)]
    if not organic:
        return None, []
    if len(organic) > 1:
        non_counter = [
            f for f in organic
            if Chem.MolToSmiles(_get_uncharger().uncharge(f), isomericSmiles=False)
            not in _COUNTERIONS
        ]
        candidates = non_counter or organic
    else:
        candidates = organic
    # largest by heavy atoms, then by molecular weight; first wins ties
    best = max(
        candidates,
        key=lambda f: (f.GetNumHeavyAtoms(), rdMolDescriptors._CalcMolWt(f)),
    )
    removed = [_fragment_label(f) for f in frags if f is not best]
    return best, removed


def _domain_warnings(mol: Chem.Mol) -> list[str]:
    warnings: list[str] = []
    n_heavy = mol.GetNumHeavyAtoms()
    if n_heavy > MAX_HEAVY_ATOMS:
        warnings.append(f"{n_heavy} heavy atoms")
    if n_heavy < MIN_HEAVY_ATOMS:
        warnings.append(f"only {n_heavy} heavy atom{'s' if n_heavy > 1 else ''}")
    if len(mol.GetSubstructMatches(_PEPTIDE_BOND)) >= MIN_PEPTIDE_BONDS:
        warnings.append("peptide")
    if mol.HasSubstructMatch(_UNUSUAL_ELEMENT):
        elements = sorted(
            {a.GetSymbol() for a in mol.GetAtoms()}
            - {"H", "B", "C", "N", "O", "F", "Si", "P", "S", "Cl", "Se", "Br", "I"}
        )
        warnings.append("element " + ",".join(elements))
    return warnings


def _standardise_one(mol: Chem.Mol) -> tuple[Chem.Mol | None, str, str, str]:
    """(parent, smiles, status, changes) for one parsed molecule."""
    if mol.GetNumAtoms() == 0:
        return None, "", "empty", ""
    if mol.GetNumAtoms() != mol.GetNumHeavyAtoms():
        mol = Chem.RemoveHs(mol)
    changes = []
    parent, removed = _choose_parent(mol)
    if parent is None:
        return None, "", "no carbon", ""
    if removed:
        changes.append("salt stripped: " + ", ".join(removed))
        parent = Chem.Mol(parent)
        parent.UpdatePropertyCache(strict=False)
        Chem.SanitizeMol(parent)
    if parent.HasSubstructMatch(_CHARGED):
        n_before = len(parent.GetSubstructMatches(_CHARGED))
        neutral = _get_uncharger().uncharge(parent)
        if len(neutral.GetSubstructMatches(_CHARGED)) < n_before or Chem.GetFormalCharge(
            neutral
        ) != Chem.GetFormalCharge(parent):
            changes.append("neutralised")
        parent = neutral
    warnings = _domain_warnings(parent)
    status = ("outside domain: " + ", ".join(warnings)) if warnings else "ok"
    return parent, Chem.MolToSmiles(parent), status, "; ".join(changes)


def _run(items: Sequence, parse) -> StandardisedBatch:
    n = len(items)
    mols: list[Chem.Mol | None] = [None] * n
    smiles = [""] * n
    usable = np.zeros(n, dtype=bool)
    status = [""] * n
    changes = [""] * n
    with rdBase.BlockLogs():
        for i, item in enumerate(items):
            mol, reason = parse(item)
            if mol is None:
                status[i] = reason
                continue
            try:
                parent, smi, st, ch = _standardise_one(mol)
            except Exception as exc:  # RDKit sanitisation or kekulisation failures
                parent, smi, st, ch = None, "", f"standardisation failed: {exc}"[:80], ""
            mols[i], smiles[i], status[i], changes[i] = parent, smi, st, ch
            usable[i] = parent is not None
    return StandardisedBatch(mols=mols, smiles=smiles, usable=usable, status=status,
                             changes=changes)


def _parse_smiles(smi) -> tuple[Chem.Mol | None, str]:
    if smi is None or (isinstance(smi, float) and np.isnan(smi)):
        return None, "empty"
    text = str(smi).strip()
    if not text:
        return None, "empty"
    try:
        mol = Chem.MolFromSmiles(text)
    except Exception:
        mol = None
    if mol is None:
        return None, "unparseable SMILES"
    return mol, ""


def _take_mol(mol) -> tuple[Chem.Mol | None, str]:
    if mol is None:
        return None, "unparseable structure"
    return mol, ""


def standardise_smiles(smiles: Sequence[str]) -> StandardisedBatch:
    """Parse and standardise SMILES strings; never raises for bad rows (see module doc)."""
    return _run(list(smiles), _parse_smiles)


def standardise_mols(mols: Sequence[Chem.Mol | None]) -> StandardisedBatch:
    """Standardise already-read molecules (e.g. from an SDF file; None = unreadable record)."""
    return _run(list(mols), _take_mol)


def read_sdf(
    path: str | Path, name_field: str | None = None
) -> tuple[list[str], StandardisedBatch]:
    """Read an SDF file: (record names, standardised batch).

    Names come from ``name_field`` if given and present, else the record title line, else
    'record N' (1-based). Unreadable records stay in the batch with status
    'unparseable structure'. Raises InputError if the file cannot be opened.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError("SDF file not found", path=str(path))
    with rdBase.BlockLogs():
        try:
            supplier = Chem.SDMolSupplier(str(path), sanitize=True, removeHs=True)
            mols = list(supplier)
        except OSError as exc:
            raise InputError(f"cannot read SDF file: {exc}", path=str(path)) from None
    names = []
    for i, mol in enumerate(mols):
        name = ""
        if mol is not None:
            if name_field and mol.HasProp(name_field):
                name = mol.GetProp(name_field).strip()
            elif mol.HasProp("_Name"):
                name = mol.GetProp("_Name").strip()
        names.append(name or f"record {i + 1}")
    return names, standardise_mols(mols)
