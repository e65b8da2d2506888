"""The species-weighted ionisation term of the retention model (retpred.model.ion_term).

Sources named beside each check value:
- Henderson-Hasselbalch and the species-weighted retention factor k = f0 k_n + (1 - f0) k_ion
  (retention-physics.md section 4): for one ionisable site the term is exactly
  log10(f0 + (1 - f0) 10^-drop) with f0 = 1 / (1 + 10^(pH - pKa)) (acid) or
  1 / (1 + 10^(pKa - pH)) (base).
- An ion with more charges is more polar and less retained than one with fewer (a dianion
  elutes before the monoanion of the same skeleton; common practice).
- pKa values: benzoic acid 4.20, benzylamine 9.34, phthalic acid 2.94 / 5.43,
  phenylalanine 1.83 / 9.13 (CRC Handbook, from memory). The physics uses the chemistry
  layer's assigned values, which the tests read back from the site table.
"""

from __future__ import annotations

import numpy as np
import pytest

from retpred.chemistry import KIND_ACID, KIND_BASE, ionise
from retpred.model import (
    DEFAULT_ION_DROP_ACID,
    DEFAULT_ION_DROP_BASE,
    DEFAULT_ION_DROP_PAIR,
    featurise,
    ion_term,
)

PH = np.round(np.arange(0.0, 14.0 + 1e-9, 0.05), 3)
DROPS = (DEFAULT_ION_DROP_ACID, DEFAULT_ION_DROP_BASE, DEFAULT_ION_DROP_PAIR)


def _term(smiles: str, ph=PH, drops=DROPS) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """ion_term of one structure over ``ph``, with its sites' pKa and kinds."""
    sol = featurise([smiles])
    sites = sol.sites.take(np.zeros(ph.size, dtype=int))
    return ion_term(ionise(sites, ph), *drops), sol.sites.pka[0], sol.sites.kind[0]


@pytest.mark.parametrize("smiles,kind,drop", [
    ("OC(=O)c1ccccc1", KIND_ACID, DEFAULT_ION_DROP_ACID),  # benzoic acid, pKa 4.20
    ("NCc1ccccc1", KIND_BASE, DEFAULT_ION_DROP_BASE),  # benzylamine, pKa 9.34
])
def test_one_site_is_the_classical_species_weighted_sigmoid(smiles, kind, drop):
    term, pka, kinds = _term(smiles)
    assert np.isfinite(pka).sum() == 1 and kinds[0] == kind
    sign = 1.0 if kind == KIND_ACID else -1.0
    f0 = 1.0 / (1.0 + 10.0 ** (sign * (PH - pka[0])))  # Henderson-Hasselbalch
    expected = np.log10(f0 + (1.0 - f0) * 10.0 ** (-drop))  # k = f0 k_n + (1 - f0) k_ion
    np.testing.assert_allclose(term, expected, atol=1e-12)


def test_a_dianion_loses_more_retention_than_a_monoanion():
    # phthalic acid (pKa 2.94 / 5.43) against benzoic acid (4.20): both fully ionised at
    # pH 9, where the doubly charged anion must be the less retained (each unpaired charge
    # costs its drop); between pH 4.5 and 7 only the second carboxyl still ionises and the
    # diacid keeps losing retention while the monoacid has levelled off.
    di, pka, _ = _term("OC(=O)c1ccccc1C(=O)O")
    mono, _, _ = _term("OC(=O)c1ccccc1")
    assert np.isfinite(pka).sum() == 2
    at = {p: int(np.argmin(np.abs(PH - p))) for p in (4.5, 7.0, 9.0)}
    assert di[at[9.0]] == pytest.approx(-2 * DEFAULT_ION_DROP_ACID, abs=0.01)
    assert mono[at[9.0]] == pytest.approx(-DEFAULT_ION_DROP_ACID, abs=0.01)
    assert di[at[4.5]] - di[at[7.0]] > 0.5 * DEFAULT_ION_DROP_ACID
    assert np.all(np.diff(di) <= 1e-12)  # an acid never gains retention as the pH rises


def test_an_ampholyte_pays_the_pair_drop_as_a_zwitterion():
    # phenylalanine (carboxyl 1.83, amine 9.13): a cation at pH 0 (one unpaired positive
    # charge), a zwitterion between the pKa values (one pair of opposite charges), an anion
    # at pH 14 (one unpaired negative charge). The plateaus are the documented drops, worked
    # by hand from the equation in ion_term's docstring.
    term, pka, kinds = _term("NC(Cc1ccccc1)C(=O)O")
    acid_pka = pka[kinds == KIND_ACID][0]
    base_pka = pka[kinds == KIND_BASE][0]
    assert acid_pka < base_pka
    mid = int(np.argmin(np.abs(PH - 0.5 * (acid_pka + base_pka))))
    assert term[mid] == pytest.approx(-DEFAULT_ION_DROP_PAIR, abs=0.01)
    assert term[-1] == pytest.approx(-DEFAULT_ION_DROP_ACID, abs=0.01)
    # at pH 0 about 1 % of the carboxyl is already ionised (pKa about 2): nearly the cation
    assert term[0] == pytest.approx(-DEFAULT_ION_DROP_BASE, abs=0.03)
    # the zwitterion pays the pair drop, not the sum of an acid's and a base's
    assert term[mid] > -(DEFAULT_ION_DROP_ACID + DEFAULT_ION_DROP_BASE)


def test_neutral_compound_has_no_ion_term():
    term, pka, _ = _term("Cc1ccccc1")  # toluene: no ionisable site
    assert not np.isfinite(pka).any()
    assert np.all(term == 0.0)
