"""Structure reading and standardisation (retpred.structures).

Expected parents are written out independently (as the neutral parent drug) and compared
through RDKit's own canonicaliser (a general-purpose reference library).
"""

from __future__ import annotations

import numpy as np
import pytest
from rdkit import Chem

from retpred.errors import InputError
from retpred.structures import read_sdf, standardise_mols, standardise_smiles


def canon(smiles: str) -> str:
    return Chem.CanonSmiles(smiles)


def test_bad_rows_get_reasons_and_the_rest_still_works():
    batch = standardise_smiles(["", "C1CC", "xyz", "[Na+].[Cl-]", "CCCO", None, "O"])
    assert batch.status[:5] == ["empty", "unparseable SMILES", "unparseable SMILES", "no carbon",
                                "ok"]
    assert batch.status[5] == "empty"
    assert batch.status[6] == "no carbon"  # water
    assert batch.usable.tolist() == [False, False, False, False, True, False, False]
    assert batch.smiles[4] == canon("OCCC")
    assert batch.mols[0] is None and batch.smiles[0] == ""
    assert len(batch) == 7


def test_rdkit_parse_errors_are_not_printed(capfd):
    standardise_smiles(["C1CC", "c1cccc1", "C(C)(C)(C)(C)C"])
    assert "SMILES Parse Error" not in capfd.readouterr().err


@pytest.mark.parametrize(
    ("salt", "parent", "removed"),
    [
        # ibuprofen sodium -> ibuprofen
        ("CC(C)Cc1ccc(cc1)C(C)C(=O)[O-].[Na+]", "CC(C)Cc1ccc(cc1)C(C)C(=O)O", "Na+"),
        # chlorpromazine hydrochloride -> chlorpromazine
        ("CN(C)CCCN1c2ccccc2Sc2ccc(Cl)cc21.Cl", "CN(C)CCCN1c2ccccc2Sc2ccc(Cl)cc21", "HCl"),
        # propranolol drawn as the ammonium chloride -> propranolol
        ("CC(C)[NH2+]CC(O)COc1cccc2ccccc12.[Cl-]", "CC(C)NCC(O)COc1cccc2ccccc12", "Cl-"),
        # paracetamol hemihydrate-like solvate -> paracetamol
        ("CC(=O)Nc1ccc(O)cc1.O", "CC(=O)Nc1ccc(O)cc1", "H2O"),
        # caffeine citrate: the counter-ion has as many heavy atoms as caffeine
        ("Cn1cnc2c1c(=O)n(C)c(=O)n2C.OC(=O)CC(O)(CC(=O)O)C(=O)O", "Cn1cnc2c1c(=O)n(C)c(=O)n2C",
         "C6H8O7"),
        # metformin tosylate: the counter-ion is larger than the drug
        ("CN(C)C(=N)N=C(N)N.Cc1ccc(cc1)S(=O)(=O)O", "CN(C)C(=N)N=C(N)N", "C7H8O3S"),
    ],
)
def test_salt_and_solvate_parents(salt, parent, removed):
    batch = standardise_smiles([salt])
    assert batch.usable[0]
    assert batch.smiles[0] == canon(parent)
    assert f"salt stripped: {removed}" in batch.changes[0]


def test_neutralisation_is_recorded_only_when_done():
    batch = standardise_smiles(["CC(=O)[O-].[Na+]", "CC(=O)O", "[NH3+]CC(=O)[O-]"])
    assert batch.changes[0] == "salt stripped: Na+; neutralised"
    assert batch.changes[1] == ""
    assert batch.smiles[2] == canon("NCC(=O)O") and batch.changes[2] == "neutralised"


def test_permanent_charges_and_charge_separated_groups_stay():
    batch = standardise_smiles([
        "CC(=O)OCC[N+](C)(C)C.[Cl-]",  # acetylcholine chloride: quaternary ammonium
        "O=[N+]([O-])c1ccccc1",  # nitro group
        "C[N+](C)(C)[O-]",  # amine N-oxide
        "C[N+](C)(C)CC(=O)[O-]",  # betaine: zwitterion with a quaternary N
    ])
    charges = [Chem.GetFormalCharge(m) for m in batch.mols]
    assert charges == [1, 0, 0, 0]
    assert batch.smiles[0] == canon("CC(=O)OCC[N+](C)(C)C")
    assert batch.smiles[1] == canon("O=[N+]([O-])c1ccccc1")
    assert batch.smiles[3] == canon("C[N+](C)(C)CC(=O)[O-]")


def test_stereo_is_kept():
    batch = standardise_smiles(["N[C@@H](C)C(=O)O", "C/C=C/C(=O)O.[K+]"])
    assert batch.smiles[0] == canon("N[C@@H](C)C(=O)O")
    assert "@" in batch.smiles[0]
    assert batch.smiles[1] == canon("C/C=C/C(=O)O")


def test_domain_flags_keep_rows_usable():
    peptide = "N[C@@H](C)C(=O)N[C@@H](C)C(=O)N[C@@H](C)C(=O)N[C@@H](C)C(=O)N[C@@H](C)C(=O)O"
    dipeptide = "N[C@@H](Cc1ccccc1)C(=O)N[C@@H](C)C(=O)O"
    big = "C" * 180  # 180 heavy atoms, above the 150 limit of issue 2
    batch = standardise_smiles([peptide, dipeptide, big, "CCO", "CC(=O)O", "C[N+](C)(C)C"])
    assert batch.usable.all()
    assert batch.status[0] == "outside domain: peptide"
    assert batch.status[1] == "ok"
    assert batch.status[2] == "outside domain: 180 heavy atoms"
    # ethanol (3 heavy atoms) is smaller than anything the open data hold; acetic acid (4)
    # and the tetramethylammonium ion (5) are not
    assert batch.status[3] == "outside domain: only 3 heavy atoms"
    assert batch.status[4] == "ok" and batch.status[5] == "ok"


def test_standardise_mols_and_sdf(tmp_path):
    path = tmp_path / "in.sdf"
    writer = Chem.SDWriter(str(path))
    for name, smi in [("ibuprofen sodium", "CC(C)Cc1ccc(cc1)C(C)C(=O)[O-].[Na+]"),
                      ("alanine", "N[C@@H](C)C(=O)O")]:
        mol = Chem.MolFromSmiles(smi)
        mol.SetProp("_Name", name)
        writer.write(mol)
    writer.close()
    # append a broken record
    with open(path, "a") as fh:
        fh.write("broken\n  nonsense\n\n  2  1  0  0  0  0  0  0  0  0999 V2000\nM  END\n$$$$\n")
    names, batch = read_sdf(path)
    assert names[:2] == ["ibuprofen sodium", "alanine"]
    assert batch.smiles[0] == canon("CC(C)Cc1ccc(cc1)C(C)C(=O)O")
    assert batch.smiles[1] == canon("N[C@@H](C)C(=O)O")  # stereo from the mol block
    assert not batch.usable[2] and batch.status[2] == "unparseable structure"

    direct = standardise_mols([None, Chem.MolFromSmiles("CCN.Cl")])
    assert direct.status[0] == "unparseable structure"
    assert direct.smiles[1] == canon("CCN")
    assert direct.usable.dtype == np.bool_


def test_read_sdf_missing_file_names_the_path(tmp_path):
    with pytest.raises(InputError, match="nope.sdf"):
        read_sdf(tmp_path / "nope.sdf")
