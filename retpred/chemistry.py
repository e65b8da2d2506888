"""Descriptors, fingerprints, ionisable sites, ionisation and log D for standardised parents.

Everything the retention engine knows about an analyte comes from here. Inputs are the
parent molecules of :mod:`retpred.structures` (None rows give NaN descriptors, zero
fingerprints and no sites). Ionisation follows ../shared/design/retention-physics.md section 4.
"""

from __future__ import annotations

import csv
import re
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache
from importlib import resources

import numpy as np
import pandas as pd
from rdkit import Chem
from rdkit.Chem import rdFingerprintGenerator, rdMolDescriptors

from retpred.errors import InputError

# --------------------------------------------------------------------------- descriptors

DESCRIPTOR_NAMES: tuple[str, ...] = (
    "logp",  # Wildman-Crippen log P (Wildman & Crippen 1999)
    "mr",  # Wildman-Crippen molar refractivity, cm3/mol
    "tpsa",  # topological polar surface area, A^2 (Ertl et al. 2000), N and O only
    "mw",  # average molecular weight, g/mol
    "hbd",  # H-bond donors (RDKit definition)
    "hba",  # H-bond acceptors (RDKit definition)
    "rotatable_bonds",  # rotatable bonds, classic non-strict SMARTS definition (4x cheaper)
    "aromatic_rings",
    "fraction_csp3",
    "heavy_atoms",
    "rings",  # SSSR ring count
    "halogens",  # F + Cl + Br + I atoms
    "formal_charge",  # net formal charge of the standardised parent (quaternary ions)
    "n_nitrogen",
    "n_oxygen",
    "labute_asa",  # Labute approximate surface area, A^2: molecular size
    "kappa2",  # Kier kappa-2 shape index: elongation versus compactness (bulkiness proxy)
)

_HALOGEN = Chem.MolFromSmarts("[F,Cl,Br,I]")
_NITROGEN = Chem.MolFromSmarts("[#7]")


_NON_STRICT = rdMolDescriptors.NumRotatableBondsOptions.NonStrict


def _kappa2(mol: Chem.Mol) -> float:
    """Kier kappa-2 shape index (Hall & Kier): (A + a - 1)(A + a - 2)^2 / (P2 + a)^2.

    A heavy atoms, a Hall-Kier alpha, P2 paths of two bonds = sum over atoms of C(degree, 2).
    Same value as RDKit CalcKappa2 at a quarter of its cost (measured).
    """
    n = mol.GetNumHeavyAtoms()
    if n < 2:
        return 0.0
    deg = Chem.GetAdjacencyMatrix(mol).sum(axis=1)
    p2 = float((deg * (deg - 1)).sum()) / 2.0
    alpha = rdMolDescriptors.CalcHallKierAlpha(mol)
    denom = (p2 + alpha) ** 2
    return (n + alpha - 1.0) * (n + alpha - 2.0) ** 2 / denom if denom > 0 else 0.0


def _descriptor_row(mol: Chem.Mol) -> list[float]:
    logp, mr = rdMolDescriptors.CalcCrippenDescriptors(mol)
    n_no = rdMolDescriptors.CalcNumLipinskiHBA(mol)  # count of N + O atoms
    n_n = len(mol.GetSubstructMatches(_NITROGEN))
    return [
        logp,
        mr,
        rdMolDescriptors.CalcTPSA(mol),
        rdMolDescriptors._CalcMolWt(mol),
        rdMolDescriptors.CalcNumHBD(mol),
        rdMolDescriptors.CalcNumHBA(mol),
        rdMolDescriptors.CalcNumRotatableBonds(mol, _NON_STRICT),
        rdMolDescriptors.CalcNumAromaticRings(mol),
        rdMolDescriptors.CalcFractionCSP3(mol),
        mol.GetNumHeavyAtoms(),
        rdMolDescriptors.CalcNumRings(mol),
        len(mol.GetSubstructMatches(_HALOGEN)),
        Chem.GetFormalCharge(mol),
        n_n,
        n_no - n_n,
        rdMolDescriptors.CalcLabuteASA(mol),
        _kappa2(mol),
    ]


def compute_descriptors(mols: Sequence[Chem.Mol | None]) -> np.ndarray:
    """Descriptor matrix, shape (n, len(DESCRIPTOR_NAMES)), float64; NaN rows for None."""
    out = np.full((len(mols), len(DESCRIPTOR_NAMES)), np.nan)
    for i, mol in enumerate(mols):
        if mol is not None:
            out[i] = _descriptor_row(mol)
    return out


@lru_cache(maxsize=8)
def _morgan(n_bits: int):
    return rdFingerprintGenerator.GetMorganGenerator(radius=2, fpSize=n_bits)


def compute_fingerprints(mols: Sequence[Chem.Mol | None], n_bits: int = 256) -> np.ndarray:
    """Morgan radius-2 count fingerprint folded to ``n_bits``; uint8 clipped at 255.

    Rows of zeros for None.
    """
    if n_bits < 1:
        raise ValueError("n_bits must be positive")
    gen = _morgan(int(n_bits))
    out = np.zeros((len(mols), n_bits), dtype=np.uint8)
    for i, mol in enumerate(mols):
        if mol is not None:
            np.minimum(gen.GetCountFingerprintAsNumPy(mol), 255, out=out[i], casting="unsafe")
    return out


# --------------------------------------------------------------------------- ionisable sites

KIND_ACID = 1
KIND_BASE = -1
KIND_PERMANENT_CATION = 2
KIND_PADDING = 0
_KIND_CODES = {"acid": KIND_ACID, "base": KIND_BASE, "permanent cation": KIND_PERMANENT_CATION}

# Rule for several sites of the same kind in one molecule (electrostatic and statistical
# effect of the first charge on the next). Sites of one kind are ranked by table pKa
# (bases: most basic first; acids: most acidic first). Each later site is shifted, away from
# ionisation (bases down, acids up), by the sum over stronger sites j of
#     6 / (d_ij - 1) [+ 1.5 if both site atoms share a ring],
# d_ij = topological distance in bonds between the two site atoms (at least 2).
# Fitted by eye to (from memory, CRC Handbook / Perrin): ethylenediamine 9.9/6.9 (d=3),
# 1,3-diaminopropane 10.5/8.5 (d=4), 1,4-diaminobutane 10.8/9.4 (d=5), hexamethylene-
# diamine 11.0/10.0 (d=7); oxalic 1.25/4.27 (O-O d=3), succinic 4.2/5.6 (d=5), adipic
# 4.4/5.4 (d=7); catechol 9.45/12.8 (d=3); phosphoric acid 2.15/7.2 (d=2);
# piperazine 9.73/5.35 (d=3, same ring). Permanent cations rank as the strongest bases.
SAME_KIND_SHIFT = 6.0
SAME_RING_EXTRA = 1.5


@dataclass(frozen=True)
class _Group:
    name: str
    query: Chem.Mol
    pka: float
    kind: int
    site_idx: int  # query atom index of the ionisable atom (map number 1)
    claim_idx: tuple[int, ...]  # query atom indices claimed (map numbers 1 and 2)
    source: str


_FRAGMENT_NAME = r"[A-Za-z_][A-Za-z0-9_]*"
_FRAGMENT_REF = re.compile(r"\{(" + _FRAGMENT_NAME + r")\}")


def _read_fragments(lines: list[tuple[int, str]], where: str) -> dict[str, str]:
    """Named SMARTS fragments of the group table: lines ``@name<TAB>primitives``.

    A fragment is the text of an atom's primitives (no brackets), e.g.
    ``NX3;+0;!$(N-[!C,!X4])``; a smarts cell uses it as ``[{name};H1:1]``. Fragments do not
    nest. Raises InputError naming the line for a malformed or repeated definition.
    """
    out: dict[str, str] = {}
    for line_no, ln in lines:
        name, _, text = ln[1:].partition("\t")
        name, text = name.strip(), text.strip()
        if not re.fullmatch(_FRAGMENT_NAME, name) or not text:
            raise InputError("a fragment line is '@name<TAB>SMARTS primitives'", path=where,
                             line=line_no, field="fragment")
        if name in out:
            raise InputError(f"fragment '{name}' defined twice", path=where, line=line_no,
                             field="fragment")
        if "{" in text or Chem.MolFromSmarts(f"[{text}]") is None:
            raise InputError(f"fragment '{name}' is not a valid SMARTS atom (fragments do "
                             "not nest)", path=where, line=line_no, field="fragment")
        out[name] = text
    return out


def _expand_fragments(smarts: str, fragments: dict[str, str], where: str,
                      line_no: int) -> str:
    def sub(m: re.Match) -> str:
        if m.group(1) not in fragments:
            raise InputError(f"unknown fragment {{{m.group(1)}}}", path=where, line=line_no,
                             field="smarts")
        return fragments[m.group(1)]

    return _FRAGMENT_REF.sub(sub, smarts)


def load_group_table(path=None) -> list[_Group]:
    """Read the ionisable-group table (TSV: group, smarts, pka, kind, source; '#' comments;
    ``@name<TAB>primitives`` lines define SMARTS fragments used as ``{name}``).

    Raises InputError naming file, line and field for a bad row.
    """
    if path is None:
        text = resources.files("retpred").joinpath("data/ionisable_groups.tsv").read_text()
        where = "retpred/data/ionisable_groups.tsv"
    else:
        with open(path, encoding="utf-8") as fh:
            text = fh.read()
        where = str(path)
    numbered = [(i + 1, ln) for i, ln in enumerate(text.splitlines()) if ln and ln[0] != "#"]
    fragments = _read_fragments([x for x in numbered if x[1][0] == "@"], where)
    lines = [x for x in numbered if x[1][0] != "@"]
    if not lines:
        raise InputError("no header line", path=where)
    header_no, header = lines[0]
    reader = csv.DictReader([ln for _, ln in lines], delimiter="\t")
    needed = ("group", "smarts", "pka", "kind", "source")
    missing = [c for c in needed if c not in (reader.fieldnames or [])]
    if missing:
        raise InputError(f"missing columns: {', '.join(missing)}", path=where, line=header_no)
    groups = []
    for (line_no, _), row in zip(lines[1:], reader, strict=True):
        query = Chem.MolFromSmarts(
            _expand_fragments(row["smarts"] or "", fragments, where, line_no))
        if query is None:
            raise InputError("invalid SMARTS", path=where, line=line_no, field="smarts")
        kind = _KIND_CODES.get((row["kind"] or "").strip())
        if kind is None:
            raise InputError(
                "kind must be acid, base or permanent cation", path=where, line=line_no,
                field="kind",
            )
        if kind == KIND_PERMANENT_CATION:
            pka = np.nan
        else:
            try:
                pka = float(row["pka"])
            except (TypeError, ValueError):
                raise InputError("pka is not a number", path=where, line=line_no,
                                 field="pka") from None
        maps = [a.GetAtomMapNum() for a in query.GetAtoms()]
        if maps.count(1) != 1:
            raise InputError("SMARTS needs exactly one atom mapped :1 (the site)", path=where,
                             line=line_no, field="smarts")
        groups.append(
            _Group(
                name=row["group"].strip(),
                query=query,
                pka=pka,
                kind=kind,
                site_idx=maps.index(1),
                claim_idx=tuple(i for i, m in enumerate(maps) if m in (1, 2)),
                source=row["source"],
            )
        )
    return groups


@lru_cache(maxsize=1)
def _default_groups() -> tuple[_Group, ...]:
    return tuple(load_group_table())


@dataclass(frozen=True)
class SiteTable:
    """Ionisable sites of a batch, padded to m = max sites (at least 1).

    ``pka`` (n, m) aqueous pKa (NaN for padding and permanent cations); ``kind`` (n, m) int8:
    +1 acid, -1 base, 2 permanent cation, 0 padding; ``group``: group names per molecule.
    """

    pka: np.ndarray
    kind: np.ndarray
    group: list[list[str]]

    def __len__(self) -> int:
        return self.pka.shape[0]

    def take(self, idx: np.ndarray) -> SiteTable:
        """The rows ``idx`` (repeats allowed), as a new table."""
        return SiteTable(pka=self.pka[idx], kind=self.kind[idx],
                         group=[self.group[i] for i in idx])

    def describe(self, i: int) -> str:
        """'group:pKa;group:pKa' for molecule ``i`` ('perm' for permanent charges)."""
        parts = []
        for j, name in enumerate(self.group[i]):
            if self.kind[i, j] == KIND_PERMANENT_CATION:
                parts.append(f"{name}:perm")
            else:
                parts.append(f"{name}:{self.pka[i, j]:.1f}")
        return ";".join(parts)


@dataclass(frozen=True)
class _Family:
    """Group-table rows sharing a screen: the same site atom and first neighbour query."""

    element: int  # atomic number of the site atom (0 = unknown): molecule-level guard
    screen: Chem.Mol | None  # None = no screen (single-row family)
    rows: tuple[int, ...]  # indices into the group table, in table order


def _family_key(g: _Group) -> tuple[int, str]:
    atom = g.query.GetAtomWithIdx(g.site_idx)
    text = re.sub(r":[0-9]+\]", "]", atom.GetSmarts())
    nbrs = sorted(atom.GetNeighbors(), key=lambda a: a.GetIdx())
    if nbrs:
        bond = g.query.GetBondBetweenAtoms(atom.GetIdx(), nbrs[0].GetIdx()).GetSmarts() or "-,:"
        text += bond + re.sub(r":[0-9]+\]", "]", nbrs[0].GetSmarts())
    return atom.GetAtomicNum(), text


@lru_cache(maxsize=1)
def _families() -> tuple[_Family, ...]:
    """Screens for speed (about 4 us per SMARTS call): a row can only match if its
    family screen (site atom + first neighbour, a sub-pattern of the row) matches, and only
    if the molecule has the site atom's element. Results do not depend on the screens."""
    groups = _default_groups()
    keyed: dict[tuple[int, str], list[int]] = {}
    for i, g in enumerate(groups):
        keyed.setdefault(_family_key(g), []).append(i)
    families = []
    for (element, text), rows in keyed.items():
        screen = Chem.MolFromSmarts(text) if len(rows) > 1 else None
        families.append(_Family(element=element, screen=screen, rows=tuple(rows)))
    return tuple(families)


_ELEMENT_QUERY = {z: Chem.MolFromSmarts(f"[#{z}]") for z in (5, 6, 7, 8, 15, 16)}


def _sites_of(mol: Chem.Mol, groups: Sequence[_Group]) -> list[tuple[str, float, int, int]]:
    # which rows can match: element guard, then family screen
    present: dict[int, bool] = {}
    candidate_rows: list[int] = []
    for fam in _families():
        z = fam.element
        if z in _ELEMENT_QUERY:
            if z not in present:
                present[z] = mol.HasSubstructMatch(_ELEMENT_QUERY[z])
            if not present[z]:
                continue
        if fam.screen is not None and not mol.HasSubstructMatch(fam.screen):
            continue
        candidate_rows.extend(fam.rows)
    candidate_rows.sort()
    claimed: set[int] = set()
    sites = []  # (group, pka, kind, atom index)
    for r in candidate_rows:
        g = groups[r]
        for match in mol.GetSubstructMatches(g.query, uniquify=False):
            atoms = [match[i] for i in g.claim_idx]
            if claimed.intersection(atoms):
                continue
            claimed.update(atoms)
            sites.append((g.name, g.pka, g.kind, match[g.site_idx]))
    if len(sites) > 1:
        sites = _shift_same_kind(mol, sites)
    return sites


def _shift_same_kind(mol: Chem.Mol, sites):
    """Apply the same-kind rule (see SAME_KIND_SHIFT) to a molecule's sites."""
    kinds = [s[2] for s in sites]
    n_base = sum(k in (KIND_BASE, KIND_PERMANENT_CATION) for k in kinds)
    n_acid = kinds.count(KIND_ACID)
    if n_base < 2 and n_acid < 2:
        return sites
    dist = Chem.GetDistanceMatrix(mol)
    ring_sets = [set(r) for r in mol.GetRingInfo().AtomRings()]
    out = list(sites)

    def shift(indices, strength, sign):
        order = sorted(indices, key=strength)
        for rank, i in enumerate(order):
            if sites[i][2] == KIND_PERMANENT_CATION:
                continue
            penalty = 0.0
            for j in order[:rank]:
                a, b = sites[i][3], sites[j][3]
                d = max(float(dist[a, b]), 2.0)
                penalty += SAME_KIND_SHIFT / (d - 1.0)
                if any(a in r and b in r for r in ring_sets):
                    penalty += SAME_RING_EXTRA
            name, pka, kind, atom = sites[i]
            out[i] = (name, pka + sign * penalty, kind, atom)

    bases = [i for i, k in enumerate(kinds) if k in (KIND_BASE, KIND_PERMANENT_CATION)]
    acids = [i for i, k in enumerate(kinds) if k == KIND_ACID]
    if len(bases) > 1:
        shift(bases, lambda i: -np.inf if np.isnan(sites[i][1]) else -sites[i][1], -1.0)
    if len(acids) > 1:
        shift(acids, lambda i: sites[i][1], +1.0)
    return out


def find_ionisable_sites(mols: Sequence[Chem.Mol | None]) -> SiteTable:
    """Match the ionisable-group table (retpred/data/ionisable_groups.tsv) on each parent.

    Patterns run top to bottom (most specific first); each atom is assigned to one group
    only (the atoms a group claims are its SMARTS atoms mapped :1 and :2). Several sites of
    one kind are then shifted by the same-kind rule (SAME_KIND_SHIFT). Sites are treated as
    independent in :func:`ionise`.
    """
    groups = _default_groups()
    per_mol = [([] if m is None else _sites_of(m, groups)) for m in mols]
    n = len(mols)
    m = max([1] + [len(s) for s in per_mol])
    pka = np.full((n, m), np.nan)
    kind = np.zeros((n, m), dtype=np.int8)
    names: list[list[str]] = []
    for i, sites in enumerate(per_mol):
        names.append([s[0] for s in sites])
        for j, (_, p, k, _) in enumerate(sites):
            pka[i, j] = p
            kind[i, j] = k
    return SiteTable(pka=pka, kind=kind, group=names)


# --------------------------------------------------------------------------- ionisation

SPECIES = ("neutral", "anion", "cation", "zwitterion")


@dataclass(frozen=True)
class Ionisation:
    """Ionisation state of each molecule at the given pH (arrays of shape ``ph`` x n).

    ``f_neutral``: fraction with no charged site; ``net_charge`` = ``positive_charge`` -
    ``negative_charge`` (mean charges, both >= 0); ``species``: dominant species among
    'neutral' (no charge), 'cation' / 'anion' (net charge > 0 / < 0), 'zwitterion'
    (charged sites, net zero).
    """

    f_neutral: np.ndarray
    net_charge: np.ndarray
    positive_charge: np.ndarray
    negative_charge: np.ndarray
    species: np.ndarray


def ionise(sites: SiteTable, ph: float | np.ndarray) -> Ionisation:
    """Henderson-Hasselbalch per site, sites independent (microscopic terms multiplied).

    Acid site ionised fraction a = 1 / (1 + 10^(pKa - pH)); base site protonated fraction
    b = 1 / (1 + 10^(pH - pKa)); a permanent cation is always charged (f_neutral = 0).
    f_neutral = prod(1 - a) * prod(1 - b) (retention-physics.md section 4). ``ph`` is a
    scalar, one pH per molecule (n,), or any array broadcasting to (..., n), e.g. (k, 1)
    for k pH points; results have the broadcast shape. Independence ignores
    site-site coupling beyond the pKa shifts applied in find_ionisable_sites.
    """
    pka = sites.pka
    kind = sites.kind
    n, m = pka.shape
    ph_arr = np.asarray(ph, dtype=float)
    out_shape = np.broadcast_shapes(ph_arr.shape, (n,))
    ph_b = np.broadcast_to(ph_arr, out_shape)[..., None]  # (..., n, 1)
    with np.errstate(invalid="ignore", over="ignore"):
        p_acid = np.where(kind == KIND_ACID, 1.0 / (1.0 + 10.0 ** (pka - ph_b)), 0.0)
        p_base = np.where(kind == KIND_BASE, 1.0 / (1.0 + 10.0 ** (ph_b - pka)), 0.0)
    p_pos = np.where(kind == KIND_PERMANENT_CATION, 1.0, p_base)  # (..., n, m)
    p_neg = p_acid
    positive = p_pos.sum(axis=-1)
    negative = p_neg.sum(axis=-1)
    f_neutral = np.prod(1.0 - p_pos - p_neg, axis=-1)

    # distribution of the net charge over microstates (sites independent): convolution
    offset = m
    dist = np.zeros(p_pos.shape[:-1] + (2 * m + 1,))
    dist[..., offset] = 1.0
    for j in range(m):
        pp = p_pos[..., j : j + 1]
        pn = p_neg[..., j : j + 1]
        new = dist * (1.0 - pp - pn)
        new[..., 1:] += dist[..., :-1] * pp
        new[..., :-1] += dist[..., 1:] * pn
        dist = new
    p_cation = dist[..., offset + 1 :].sum(axis=-1)
    p_anion = dist[..., :offset].sum(axis=-1)
    p_zwitterion = np.clip(dist[..., offset] - f_neutral, 0.0, None)
    stacked = np.stack([f_neutral, p_anion, p_cation, p_zwitterion], axis=-1)
    species = np.asarray(SPECIES, dtype=object)[np.argmax(stacked, axis=-1)].astype(str)
    return Ionisation(
        f_neutral=f_neutral,
        net_charge=positive - negative,
        positive_charge=positive,
        negative_charge=negative,
        species=species,
    )


# Ions partition 3-4 log units less than the neutral form into octanol (rule of thumb from
# memory; ../shared/design/retention-physics.md section 4).
LOGP_ION_DROP = 3.5


def log_d(logp: np.ndarray, ionisation: Ionisation) -> np.ndarray:
    """log D = log10(f0 P + (1 - f0) P / 10^LOGP_ION_DROP), P = 10^logp.

    Evaluated as logp + log10(f0 + (1 - f0) 10^-drop); broadcasts like ``ionise``.
    """
    f0 = ionisation.f_neutral
    return np.asarray(logp, dtype=float) + np.log10(f0 + (1.0 - f0) * 10.0 ** -LOGP_ION_DROP)


# --------------------------------------------------------------------------- notebook helper


def chemistry_table(smiles: Sequence[str], ph: float = 2.7) -> pd.DataFrame:
    """One row per input SMILES: smiles, parent_smiles, status, changes, descriptors,
    logd, charge (mean net charge), species and sites ('group:pKa;...') at ``ph``."""
    from retpred.structures import standardise_smiles

    batch = standardise_smiles(smiles)
    desc = compute_descriptors(batch.mols)
    sites = find_ionisable_sites(batch.mols)
    ion = ionise(sites, ph)
    table = pd.DataFrame({
        "smiles": list(smiles),
        "parent_smiles": batch.smiles,
        "status": batch.status,
        "changes": batch.changes,
    })
    for j, name in enumerate(DESCRIPTOR_NAMES):
        table[name] = desc[:, j]
    usable = batch.usable
    table["logd"] = np.where(usable, log_d(desc[:, 0], ion), np.nan)
    table["charge"] = np.where(usable, ion.net_charge, np.nan)
    table["species"] = np.where(usable, ion.species, "")
    table["sites"] = [sites.describe(i) if usable[i] else "" for i in range(len(batch))]
    table.attrs["ph"] = ph
    return table
