"""Flaws of the open data handled by the reader (retpred.opendata)."""

from __future__ import annotations

import numpy as np
import pytest
from rdkit import Chem
from rdkit.Chem.rdMolDescriptors import CalcMolFormula

from retpred.opendata import ENV_VAR, find_open_data, load_compounds, repair_triazine


@pytest.mark.parametrize(
    ("drawn", "formula"),
    [
        # over-hydrogenated drawings found in the open data; formulas of the aromatic
        # herbicides (from memory: atrazine C8H14ClN5, simazine C7H12ClN5, prometryn
        # C10H19N5S, cyanazine C9H13ClN6; standard pesticide compilations)
        ("CCN=C1NC(N=C(N1)NC(C)C)Cl", "C8H14ClN5"),
        ("CCN=C1NC(NC(=NCC)N1)Cl", "C7H12ClN5"),
        ("CC(C)NC1=NC(N=C(N1)NC(C)C)SC", "C10H19N5S"),
        ("CCN=C1NC(NC(N1)Cl)NC(C)(C)C#N", "C9H13ClN6"),
    ],
)
def test_over_hydrogenated_triazine_is_read_as_aromatic(drawn, formula):
    fixed = Chem.MolFromSmiles(repair_triazine(drawn))
    assert CalcMolFormula(fixed) == formula
    ring = fixed.GetRingInfo().AtomRings()
    assert len(ring) == 1 and all(fixed.GetAtomWithIdx(i).GetIsAromatic() for i in ring[0])


@pytest.mark.parametrize(
    "smiles",
    ["CCNc1nc(Cl)nc(NC(C)C)n1",  # aromatic already
     "C1NCNCN1",  # hexahydro-1,3,5-triazine: saturated, no substituted CH aminal
     "CN1CN(C)CN(C)C1",  # 1,3,5-trimethyl-1,3,5-triazinane
     "NC(=N)NC(=N)N"],  # biguanide: C=N outside any ring
)
def test_other_structures_are_left_alone(smiles):
    assert repair_triazine(smiles) == smiles


@pytest.mark.opendata
def test_open_data_holds_no_sp3_triazine_after_reading(open_data):
    from retpred.opendata import _SP3_TRIAZINE

    smiles = load_compounds(open_data)["smiles"].unique()
    mols = [Chem.MolFromSmiles(s) for s in smiles]
    assert not any(m is not None and m.HasSubstructMatch(_SP3_TRIAZINE) for m in mols)
    assert "CCNc1nc(Cl)nc(NC(C)C)n1" in set(smiles)


@pytest.mark.parametrize(
    ("cell", "expected"),
    [
        ("40.0", 40.0), (25, 25.0), ("60", 60.0),
        # blank, and the placeholder -1 of one open-data system: not a column at -1 C; the
        # default is the method module's 30 C (common practice)
        ("", 30.0), (None, 30.0), ("nan", 30.0), ("-1.0", 30.0), (0.0, 30.0), (250.0, 30.0),
    ],
)
def test_column_temperature_placeholders_read_as_not_reported(cell, expected):
    from retpred.opendata import column_temperature_c

    assert column_temperature_c(cell) == expected


def test_open_data_temperatures_are_plausible(open_systems):
    temps = np.array([s.temperature_c for s in open_systems])
    assert temps.min() >= 5.0 and temps.max() <= 100.0


@pytest.mark.opendata
def test_smallest_open_data_structure_sets_the_small_molecule_flag(open_data):
    # retpred.structures flags structures smaller than anything the model learned from;
    # the limit must match the open data: none below it, some at it or just above
    from retpred.structures import MIN_HEAVY_ATOMS

    smiles = load_compounds(open_data)["smiles"].unique()
    heavy = np.array([m.GetNumHeavyAtoms() for s in smiles
                      if (m := Chem.MolFromSmiles(s)) is not None])
    assert heavy.min() >= MIN_HEAVY_ATOMS
    assert np.sum(heavy <= MIN_HEAVY_ATOMS + 1) >= 10


def test_a_named_data_folder_is_the_only_one_looked_at(tmp_path, monkeypatch):
    # a folder given by --data that does not hold the data is reported as missing, even
    # when the environment names one that does (no silent fall-back to other data)
    good = tmp_path / "good"
    good.mkdir()
    for name in ("systems.tsv", "compounds.tsv.gz"):
        (good / name).write_bytes(b"")
    monkeypatch.setenv(ENV_VAR, str(good))
    assert find_open_data() == good
    assert find_open_data(good) == good
    assert find_open_data(tmp_path / "missing") is None
