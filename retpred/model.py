"""Retention parameters from structure: LSS ``log kw`` and ``S`` for a given system.

For a solute on a system (column, organic modifier, pH, temperature)::

    log kw = g(solute, modifier)                       learned (gradient boosting)
           + z(solute, column, T, modifier) . w        learned (ridge, HSM-style terms)
           + log10(kEB / kEB_ref)                      column retentivity (HSM definition)
           + log10(f0 + (1 - f0) 10^-drop)             species-weighted retention (pH)
           + u(solute)                                  compound memory (open data only)
    S      = 0.25 * MW^0.5                              (Snyder and Dolan's rule of thumb)

The column term follows the hydrophobic-subtraction model (Snyder, Dolan, Carr; J.
Chromatogr. A 1060 (2004) 77): ``log(k/kEB) = eta' H - sigma' S* + beta' A + alpha' B +
kappa' C``. Column parameters enter as differences from the reference (the C18 class
median); the solute coefficients ``eta'``, ``sigma'``, ``beta'``, ``alpha'``, ``kappa'`` are
linear in solute descriptors (log P, bulk, H-bond acceptors/donors, protonated fraction)
and fitted on the open data. C8 and C18 therefore differ only through their column
parameters. Ionisation is the classical species-weighted mix ``k = f0 k_n + (1 - f0) k_ion``
(retention-physics.md section 4), which keeps the LSS form with a shifted ``log kw``.

``u`` is what the open data say of a compound the descriptors do not: for a structure
measured on training systems, the shrunken mean of its training residuals after a system
offset is removed (two-way additive fit, :func:`fit_compound_memory`); zero for any other
structure. It is constant across systems, so it never changes a predicted pH or column
shift. Compounds are keyed by a hash of their standardised SMILES, so the model file holds
no structure of the open data.

The compound factors ``v`` (``factors_``) are what the open data say of how a compound's
retention differs from system to system beyond any linear map of ``log kw``: a rank-3
factorisation ``e_ij = v_i . w_j`` of the training residuals left after a per-system line
(:func:`fit_compound_factors`). They do not enter the prediction itself; a calibration
estimates the loadings ``w`` of the user's system from its reference compounds
(``retpred.calibration``) and corrects the analytes that have factors.

Training turns every observed time into ``log kw`` exactly through the gradient engine
(``retpred.gradient.log_kw_from_rt``) with that system's own program.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Sequence
from dataclasses import astuple, dataclass, field
from datetime import UTC, datetime
from functools import cached_property, lru_cache

import numpy as np
from rdkit import Chem
from sklearn.ensemble import HistGradientBoostingRegressor
from sklearn.linear_model import Ridge

from retpred import __version__
from retpred.calibration import ridge_solve
from retpred.chemistry import (
    DESCRIPTOR_NAMES,
    Ionisation,
    SiteTable,
    compute_descriptors,
    compute_fingerprints,
    find_ionisable_sites,
    ionise,
)
from retpred.method import (
    SAME_PH_TOLERANCE,
    SAME_TEMPERATURE_TOLERANCE_C,
    HsmParameters,
)
from retpred.structures import StandardisedBatch, standardise_mols, standardise_smiles

#: Model-file format version; a file of another format is refused.
MODEL_FORMAT = 9
N_BITS = 256
#: Snyder and Dolan's rule of thumb S = 0.25 M^0.5 (retention-physics.md section 2).
S_RULE_COEF = 0.25
#: Drop of log k per unpaired negative charge (acid), per unpaired positive charge (base)
#: and per pair of opposite charges on one molecule (zwitterion), see :func:`ion_term`.
#: Chosen by the left-out-source cross-validation of the open data (error and pH-series sign
#: agreement together; DEVELOPERS.md "Ion drops"), not fitted per build. The smooth charge
#: terms of the ridge are linear in the charge and bounded (:func:`charge_term_bound`), so
#: retention still falls monotonically, and visibly, as a site ionises.
DEFAULT_ION_DROP_ACID = 0.5
DEFAULT_ION_DROP_BASE = 1.0
DEFAULT_ION_DROP_PAIR = 0.75
REFERENCE_TEMPERATURE_C = 30.0
#: Shrinkage of the compound memory, in systems: a compound seen on n systems keeps
#: n / (n + MEMORY_SHRINK) of its mean residual. The left-out-source CV is flat between 0.3
#: and 3 (DEVELOPERS.md "Compound memory").
MEMORY_SHRINK = 1.0
#: Backfitting sweeps of the compound memory; after each, the rows are reweighted (Huber).
MEMORY_ITERATIONS = 20
#: Huber's c of the memory's reweighting, in units of the residuals' robust scale
#: (1.4826 x their median absolute value): a row further out than c scales counts as if it
#: were c scales out (1.345: 95 % efficiency under normal errors; Huber, Ann. Math. Stat.
#: 1964). A structure drawn wrongly or a peak assigned to the wrong compound in one source
#: no longer sets the compound's offset for every other (DEVELOPERS.md "Compound memory").
MEMORY_HUBER_C = 1.345
#: Compound factors: rank, ridge penalty on each compound's factor vector (the loadings of
#: the training systems get 1.0 too), least number of training systems a compound needs,
#: alternating-least-squares sweeps. Chosen with the calibration they serve on the
#: left-out-source CV (DEVELOPERS.md "Compound factors").
FACTOR_RANK = 3
FACTOR_SHRINK = 1.0
FACTOR_MIN_SYSTEMS = 3
FACTOR_ITERATIONS = 15


def _d(name: str) -> int:
    return DESCRIPTOR_NAMES.index(name)


@dataclass(frozen=True)
class Solutes:
    """Everything the model needs to know of a batch of analytes (one row per input)."""

    batch: StandardisedBatch
    descriptors: np.ndarray
    fingerprints: np.ndarray
    sites: SiteTable
    #: (memory keys, stereo-blind keys) of the rows when already known (read back from the
    #: feature cache); otherwise computed on first use, from each standardised molecule
    known_keys: tuple[list[str], list[str]] | None = None

    @property
    def usable(self) -> np.ndarray:
        return self.batch.usable

    def __len__(self) -> int:
        return len(self.batch.smiles)

    @property
    def logp(self) -> np.ndarray:
        return self.descriptors[:, _d("logp")]

    @property
    def mw(self) -> np.ndarray:
        return self.descriptors[:, _d("mw")]

    @cached_property
    def _keys(self) -> tuple[list[str], list[str]]:
        if self.known_keys is not None:
            return self.known_keys
        # from the standardised molecule where the batch has it (the SMILES is written from
        # it, and re-reading that SMILES gives the same forms: tests/test_model.py); a
        # batch read back from the feature cache carries its keys
        forms = [stereo_forms(t) if m is None else stereo_forms_of(m, t)
                 for m, t in zip(self.batch.mols, self.batch.smiles, strict=True)]
        return [compound_key(a) for a, _ in forms], [compound_key(b) for _, b in forms]

    @property
    def memory_keys(self) -> list[str]:
        """Compound-memory key of every row: :func:`compound_key` of the structure's
        memory form (:func:`stereo_forms`: one key for enantiomers and, with a single
        centre, their racemate), computed once a batch."""
        return self._keys[0]

    @property
    def skeleton_keys(self) -> list[str]:
        """:func:`compound_key` of each row's stereo-blind form (the memory's fallback)."""
        return self._keys[1]


def featurise(smiles: Sequence[str] | None = None, mols: Sequence | None = None) -> Solutes:
    """Standardise and describe a batch (SMILES, or RDKit molecules from an SDF)."""
    batch = standardise_mols(mols) if mols is not None else standardise_smiles(smiles or [])
    return Solutes(
        batch=batch,
        descriptors=compute_descriptors(batch.mols),
        fingerprints=compute_fingerprints(batch.mols, n_bits=N_BITS),
        sites=find_ionisable_sites(batch.mols),
    )


@dataclass(frozen=True)
class SystemContext:
    """What the model needs of a chromatographic system."""

    organic: str
    ph: float
    temperature_c: float
    hsm: HsmParameters


def same_column(record: dict, ctx: SystemContext) -> bool:
    """Whether a recorded system's HSM parameters (``hsm``, as in
    :func:`retpred.lab.system_record`) are ``ctx``'s (a JSON round trip aside)."""
    return bool(np.allclose(record["hsm"], astuple(ctx.hsm), rtol=1e-6, atol=1e-9))


def same_conditions(record: dict, ctx: SystemContext) -> bool:
    """Whether a recorded system (``organic``, ``ph``, ``temperature_c``, ``hsm`` as in
    :func:`retpred.lab.system_record`) has ``ctx``'s retention conditions: the same
    modifier and column parameters, pH and temperature within the tolerances of
    :func:`retpred.method.conditions_differ`."""
    return (record["organic"] == ctx.organic
            and same_column(record, ctx)
            and abs(record["ph"] - ctx.ph) <= SAME_PH_TOLERANCE
            and abs(record["temperature_c"] - ctx.temperature_c)
            <= SAME_TEMPERATURE_TOLERANCE_C)


def s_parameter(mw: np.ndarray) -> np.ndarray:
    """LSS slope ``S = 0.25 sqrt(M)`` (Snyder and Dolan rule of thumb; M in g/mol)."""
    return S_RULE_COEF * np.sqrt(np.clip(mw, 30.0, 3000.0))


def ion_term(ion: Ionisation, drop_acid: float, drop_base: float,
             drop_pair: float = DEFAULT_ION_DROP_PAIR) -> np.ndarray:
    """Species-weighted retention ``log10(f0 + (1 - f0) 10^-d)`` of the ionised forms.

    ``f0`` is the neutral fraction (retention-physics.md section 4). The mean drop ``d`` of
    the charged forms follows their charges ``q+`` and ``q-`` (mean positive and negative
    charge): unpaired charges cost ``drop_base`` (net positive) or ``drop_acid`` (net
    negative) each, opposite charges paired on one molecule ``drop_pair`` per pair::

        d (1 - f0) = drop_base max(q+ - q-, 0) + drop_acid max(q- - q+, 0)
                     + drop_pair min(q+, q-)

    For one ionisable site this is the classical sigmoid ``k = f0 k_n + (1 - f0) k_ion``
    (``q = 1 - f0``, ``d`` the drop of that site's kind). With several sites every charge
    counts: a dianion loses twice the drop of a monoanion (more charge, more polar), and a
    zwitterion pays ``drop_pair`` for its pair of opposite charges instead of the mean of an
    acid's and a base's drop. The ridge's linear charge terms then move the plateaus
    (``COLUMN_TERM_NAMES``: cation, anion, cation*anion).
    """
    pos, neg = ion.positive_charge, ion.negative_charge
    f0 = np.clip(ion.f_neutral, 0.0, 1.0)
    total = (drop_base * np.maximum(pos - neg, 0.0) + drop_acid * np.maximum(neg - pos, 0.0)
             + drop_pair * np.minimum(pos, neg))
    charged = 1.0 - f0
    drop = np.where(charged > 1e-12, total / np.maximum(charged, 1e-12), 0.0)
    return np.log10(f0 + charged * 10.0 ** (-drop))


#: The learned charge terms may soften the fixed ion drop by at most this share of it, for
#: each modifier: an ionised solute always keeps most of the drop (log P of ions lies 3-4
#: units below the neutral's; retention-physics.md section 4). Unbounded, a ridge trained
#: on a few systems learned +0.33 per anion in acetonitrile against the 0.5 drop, and
#: benzoic acid lost only a third of its k on ionisation.
MAX_DROP_SOFTENING = 0.5

#: log P range over which the learned van 't Hoff slope ``d log k / d(1000/T)`` must reach
#: :data:`VANT_HOFF_MIN_SLOPE`. Retention in reversed phase falls as the column warms
#: (transfer to the stationary phase is exothermic; roughly 1-2 % of k per degree, common
#: practice, from memory). The open data cannot show it: each system has one temperature,
#: so a free fit takes up differences between labs. Free, it learned -0.28 + 0.14 log P
#: (polar analytes retained longer at higher temperature); bounded at zero, 0.07 + 0.02
#: log P (about a fifth of practice).
VANT_HOFF_LOGP_RANGE = (-4.0, 10.0)
#: Least van 't Hoff slope, log units per 1000/K: 0.45 x 1000/T^2 is 1.1 % of k per degree
#: at 30 C and 1.0 % at 50 C, the low end of practice's 1-2 % (``log k = a + b / T``,
#: ``b = -Delta H / (R ln 10)``; about -9 kJ/mol).
VANT_HOFF_MIN_SLOPE = 0.45


def charge_term_bound(drop: float) -> float:
    """Largest coefficient ``c`` of a charge term linear in the ionised fraction.

    ``min(MAX_DROP_SOFTENING d, (1 - 10^-d) / ln 10)``: the second keeps the single-site
    curve ``log10(f0 + (1 - f0) 10^-d) + c (1 - f0)`` monotone in ``f0`` (its slope in
    ``f0`` is ``(1 - 10^-d) / (ln 10 (f0 + (1 - f0) 10^-d)) - c``, smallest at ``f0 = 1``).
    """
    return float(min(MAX_DROP_SOFTENING * drop, (1.0 - 10.0 ** -drop) / np.log(10.0)))


def bounded_ridge(x: np.ndarray, y: np.ndarray, alpha: float, a_ub: np.ndarray,
                  b_ub: np.ndarray, sample_weight: np.ndarray | None = None
                  ) -> tuple[np.ndarray, float]:
    """Ridge with intercept under linear inequality constraints ``a_ub @ coef <= b_ub``.

    Minimises ``sum_i w_i (y_i - b0 - x_i . coef)^2 + alpha |coef|^2`` (scikit-learn's
    ``Ridge`` objective) subject to the constraints. With weighted centring the problem is
    the quadratic ``coef' G coef / 2 - h' coef``, ``G = Xc' W Xc + alpha I``; with a few
    constraints every active set is tried (KKT system of each, Nocedal and Wright,
    Numerical Optimization, ch. 16) and the best feasible one with non-negative
    multipliers is kept: exact, not iterative. Returns ``(coef, intercept)``.
    """
    w = np.ones(len(y)) if sample_weight is None else np.asarray(sample_weight, float)
    xm = w @ x / w.sum()
    ym = float(w @ y / w.sum())
    xc = x - xm
    g = xc.T @ (xc * w[:, None]) + alpha * np.eye(x.shape[1])
    h = xc.T @ (w * (y - ym))
    a_ub = np.atleast_2d(np.asarray(a_ub, float))
    b_ub = np.asarray(b_ub, float)
    n, m = g.shape[0], a_ub.shape[0]
    best, best_obj = None, np.inf
    for mask in range(1 << m):
        act = [i for i in range(m) if mask >> i & 1]
        k = len(act)
        kkt = np.zeros((n + k, n + k))
        kkt[:n, :n] = g
        kkt[:n, n:] = a_ub[act].T
        kkt[n:, :n] = a_ub[act]
        try:
            sol = np.linalg.solve(kkt, np.concatenate([h, b_ub[act]]))
        except np.linalg.LinAlgError:
            continue
        coef, lam = sol[:n], sol[n:]
        if np.any(a_ub @ coef > b_ub + 1e-10) or np.any(lam < -1e-10):
            continue
        obj = 0.5 * coef @ g @ coef - h @ coef
        if obj < best_obj:
            best, best_obj = coef, obj
    if best is None:
        raise ValueError("bounded_ridge: no feasible active set")
    return best, ym - float(xm @ best)


# Names of the HSM-style interaction features, in order (documentation and model card).
COLUMN_TERM_NAMES = (
    "dH*(logp-logp_EB)", "dS*x(bulk-bulk_EB)", "dA*hba", "dB*hbd", "dC*cation",
    "d(1/T)", "d(1/T)*logp", "methanol", "methanol*logp", "methanol*tpsa", "methanol*hbd",
    "cation", "anion", "cation*anion", "methanol*cation", "methanol*anion",
)

#: The HSM's reference solute: log(k/kEB) = 0 for ethylbenzene on every column, so each
#: solute coefficient (eta', sigma', beta', alpha', kappa') vanishes for it and a column's
#: retentivity for ethylbenzene is its kEB alone.
REFERENCE_SOLUTE_SMILES = "CCc1ccccc1"


@lru_cache(maxsize=1)
def reference_solute_terms() -> tuple[float, float]:
    """``(log P, bulk)`` of ethylbenzene, the HSM reference solute (bulk = heavy atoms / 10;
    its H-bond acceptor and donor counts and charge are zero)."""
    d = compute_descriptors([Chem.MolFromSmiles(REFERENCE_SOLUTE_SMILES)])[0]
    return float(d[_d("logp")]), float(d[_d("heavy_atoms")]) / 10.0


def column_features(
    solutes: Solutes, idx: np.ndarray, ctx_arrays: dict, ion: Ionisation, ref: HsmParameters
) -> np.ndarray:
    """Interaction matrix z for rows ``idx`` of ``solutes`` on their systems.

    ``ctx_arrays`` holds per-row arrays H, S, A, B, C (at the row's pH), inv_t (1000/K)
    and meoh (0/1). The column terms are the HSM's (Snyder, Dolan and Carr 2004) with each
    solute coefficient linear in a descriptor and zero for ethylbenzene:
    ``eta' = w1 (log P - log P_EB)``, ``sigma' = w2 (bulk - bulk_EB)``, ``beta' = w3 hba``,
    ``alpha' = w4 hbd``, ``kappa' = w5 cation``. So ethylbenzene's retention differs between
    columns by ``log10(kEB / kEB_ref)`` only, as the HSM defines, and a column's lower kEB
    cannot be undone by a learned column offset.
    """
    d = solutes.descriptors[idx]
    logp = d[:, _d("logp")]
    bulk = d[:, _d("heavy_atoms")] / 10.0
    hba = d[:, _d("hba")]
    hbd = d[:, _d("hbd")]
    tpsa = d[:, _d("tpsa")] / 100.0
    c_ref = ref.c_at_ph(3.0)
    dh = ctx_arrays["H"] - ref.H
    ds = ctx_arrays["S"] - ref.S
    da = ctx_arrays["A"] - ref.A
    db = ctx_arrays["B"] - ref.B
    dc = ctx_arrays["C"] - c_ref
    dt = ctx_arrays["inv_t"] - 1000.0 / (REFERENCE_TEMPERATURE_C + 273.15)
    me = ctx_arrays["meoh"]
    cation = ion.positive_charge
    anion = ion.negative_charge
    # smooth charge terms beside the species-weighted ion term: zwitterions (both charges)
    # and ion drops that depend on the modifier. No term in the ionised fraction itself or
    # in charge x log P: with positive coefficients they outweighed the log term at partial
    # ionisation and made lipophilic acids gain retention as they ionised.
    logp_eb, bulk_eb = reference_solute_terms()
    return np.column_stack(
        [dh * (logp - logp_eb), ds * (bulk - bulk_eb), da * hba, db * hbd, dc * cation,
         dt, dt * logp, me, me * logp, me * tpsa, me * hbd, cation, anion,
         cation * anion, me * cation, me * anion]
    )


#: Columns of ``solute_matrix`` that hold the count fingerprint.
FINGERPRINT_COLUMNS = slice(len(DESCRIPTOR_NAMES), len(DESCRIPTOR_NAMES) + N_BITS)


def solute_matrix(solutes: Solutes, idx: np.ndarray, meoh: np.ndarray) -> np.ndarray:
    """Features of the learned solute term g: descriptors, fingerprint counts, modifier."""
    return np.column_stack(
        [solutes.descriptors[idx], solutes.fingerprints[idx].astype(np.float32), meoh]
    )


def context_arrays(contexts: Sequence[SystemContext], which: np.ndarray) -> dict:
    """Per-row column/system arrays from a list of contexts and each row's context index."""
    h = np.array([c.hsm.H for c in contexts])[which]
    s = np.array([c.hsm.S for c in contexts])[which]
    a = np.array([c.hsm.A for c in contexts])[which]
    b = np.array([c.hsm.B for c in contexts])[which]
    cc = np.array([c.hsm.c_at_ph(c.ph) for c in contexts])[which]
    keb = np.array([c.hsm.kEB for c in contexts])[which]
    inv_t = np.array([1000.0 / (c.temperature_c + 273.15) for c in contexts])[which]
    meoh = np.array([1.0 if c.organic == "methanol" else 0.0 for c in contexts])[which]
    ph = np.array([c.ph for c in contexts])[which]
    return {"H": h, "S": s, "A": a, "B": b, "C": cc, "kEB": keb, "inv_t": inv_t,
            "meoh": meoh, "ph": ph}


#: The boosting's loss. Absolute error (each leaf the weighted median of its residuals)
#: instead of squared error since December 2026: the open data hold mis-drawn structures,
#: mis-assigned peaks and systems with unrecorded dwell volumes, which a squared loss
#: chases. Left-out-source CV of the format-9 code (DEVELOPERS.md, "The boosting's loss").
GBM_LOSS = "absolute_error"


@dataclass
class RetentionModel:
    """Learned part of the retention model; see the module docstring for the equation.

    Attributes ending in ``_`` are learned by :meth:`fit`.
    """

    reference: HsmParameters
    ion_drop_acid: float = DEFAULT_ION_DROP_ACID
    ion_drop_base: float = DEFAULT_ION_DROP_BASE
    ion_drop_pair: float = DEFAULT_ION_DROP_PAIR
    gbm_max_iter: int = 300
    gbm_learning_rate: float = 0.08
    ridge_alpha: float = 1.0
    random_state: int = 0
    ridge_: Ridge | None = None
    gbm_: HistGradientBoostingRegressor | None = None
    #: quantiles of held-out log kw residuals {"zero_shot": [...], "calibrated": [...]}
    residual_quantiles_: dict = field(default_factory=dict)
    #: standard deviation of held-out residuals, and neighbour correlation
    residual_sd_: dict = field(default_factory=dict)
    metrics_: dict = field(default_factory=dict)
    meta_: dict = field(default_factory=dict)
    #: lab correction learned by ``retpred train``: {"offset", "slope", "pivot"} applied to
    #: the open-data prediction, then ``lab_gbm_`` on the remaining residual (or None)
    #: applicability domain: descriptor mean, inverse covariance and the Mahalanobis
    #: distance that 99.5 % of the training structures stay within
    domain_: dict = field(default_factory=dict)
    lab_linear_: dict | None = None
    lab_gbm_: HistGradientBoostingRegressor | None = None
    #: lab neighbour correction: {"fingerprints": [[...]], "residuals": [...]} of the lab's
    #: compounds after the linear map (``retpred.calibration.neighbour_correction``) or None
    lab_neighbours_: dict | None = None
    #: the lab's measured compounds (:func:`retpred.lab.lab_standards`): {"keys": [...],
    #: "systems": [index into ``meta_["lab_systems"]``, ...], "offsets": [log kw, ...]},
    #: each offset the mean residual of a structure's retained rows on one lab system after
    #: the lab correction; or None
    lab_standards_: dict | None = None
    #: compound memory {structure key: log kw offset} (see :func:`fit_compound_memory`)
    memory_: dict = field(default_factory=dict)
    #: compound factors {structure key: [v_1, ..., v_k]} (see :func:`fit_compound_factors`)
    factors_: dict = field(default_factory=dict)
    #: fallbacks of both for stereoisomers not in training {stereo-blind key: mean of the
    #: isomers that are} (see :func:`stereo_forms`)
    skeleton_memory_: dict = field(default_factory=dict)
    skeleton_factors_: dict = field(default_factory=dict)
    #: the offset-free companion (``retpred.training.fit_model``): ridge, boosting and
    #: compound memory refitted on targets without each training system's mean residual;
    #: the learned part of ``log kw`` is the mean of the model's own and the companion's
    companion_ridge_: Ridge | None = None
    companion_gbm_: HistGradientBoostingRegressor | None = None
    companion_memory_: dict = field(default_factory=dict)
    companion_skeleton_memory_: dict = field(default_factory=dict)

    # --- prediction ------------------------------------------------------------------
    def retention_parameters(
        self, solutes: Solutes, ctx: SystemContext | Sequence[SystemContext],
        which: np.ndarray | None = None, idx: np.ndarray | None = None,
    ) -> tuple[np.ndarray, np.ndarray]:
        """``(log_kw, S)`` of rows ``idx`` (default all) on their systems.

        ``ctx`` is one context for all rows, or a list with ``which`` giving each row's.
        Unusable molecules get NaN.
        """
        n = len(solutes)
        idx = np.arange(n) if idx is None else np.asarray(idx)
        if isinstance(ctx, SystemContext):
            contexts, which = [ctx], np.zeros(idx.size, dtype=int)
        else:
            contexts = list(ctx)
        arr = context_arrays(contexts, which)
        ion = ionise(solutes.sites.take(idx), arr["ph"])
        log_kw = np.full(idx.size, np.nan)
        s = s_parameter(solutes.mw[idx])
        ok = solutes.usable[idx] & np.all(np.isfinite(solutes.descriptors[idx]), axis=1)
        if ok.any():
            fixed = self.fixed_terms(arr, ion)
            z = column_features(solutes, idx, arr, ion, self.reference)
            x = solute_matrix(solutes, idx, arr["meoh"])
            lin = np.column_stack([z[ok], solutes.descriptors[idx][ok]])
            pred = (self.boosted_term(x[ok]) + self.ridge_term(lin) + fixed[ok]
                    + self.memory_offsets(solutes, idx[ok]))
            if self.lab_linear_ is not None:
                pred = self.apply_lab(pred, x[ok])
            if self.lab_standards_:
                pred = pred + np.nan_to_num(self.lab_standard_offsets(
                    solutes, idx[ok], contexts, which[ok]))
            log_kw[ok] = pred
        s = np.where(ok, s, np.nan)
        return log_kw, s

    @staticmethod
    def _lookup(exact: dict, skeleton: dict, solutes: Solutes, i: int):
        """A structure's entry: its own (or its enantiomer's), else the mean of its
        stereoisomers', else its stereo-blind form's own; None if none is known."""
        got = exact.get(solutes.memory_keys[i])
        if got is None:
            sk = solutes.skeleton_keys[i]
            got = skeleton.get(sk, exact.get(sk))
        return got

    def _members(self) -> list[tuple]:
        """``(ridge, boosting, memory, skeleton memory)`` of the model and, if fitted, of its
        offset-free companion; every learned term is their mean."""
        parts = [(self.ridge_, self.gbm_, self.memory_, self.skeleton_memory_)]
        if self.companion_gbm_ is not None:
            parts.append((self.companion_ridge_, self.companion_gbm_, self.companion_memory_,
                          self.companion_skeleton_memory_))
        return parts

    def boosted_term(self, x: np.ndarray) -> np.ndarray:
        """The boosting's term of rows ``x`` (:func:`solute_matrix`)."""
        return np.mean([g.predict(x) for _, g, _, _ in self._members()], axis=0)

    def ridge_term(self, lin: np.ndarray) -> np.ndarray:
        """The ridge's term of rows ``lin`` (column terms and descriptor main effects)."""
        # einsum, not BLAS: the result must not depend on the batch size (exact ties
        # between identical structures decide elution order in every run mode)
        return np.mean([np.einsum("ij,j->i", lin, r.coef_) + r.intercept_
                        for r, _, _, _ in self._members()], axis=0)

    def memory_offsets(self, solutes: Solutes, idx: np.ndarray) -> np.ndarray:
        """Compound-memory offset ``u`` of rows ``idx``: the mean of the model's and its
        companion's (:meth:`_members`), each 0 for structures not in training,
        stereoisomers aside (see :meth:`_lookup`)."""
        idx = np.asarray(idx)
        out = np.zeros(idx.size)
        members = self._members()
        for _, _, mem, skel in members:
            if mem:
                out += [self._lookup(mem, skel, solutes, i) or 0.0 for i in idx]
        return out / len(members)

    def set_companion(self, other: RetentionModel) -> RetentionModel:
        """Take ``other``'s ridge, boosting and compound memory as the companion; returns
        ``self``."""
        self.companion_ridge_, self.companion_gbm_ = other.ridge_, other.gbm_
        self.companion_memory_ = other.memory_
        self.companion_skeleton_memory_ = other.skeleton_memory_
        return self

    def factor_matrix(self, solutes: Solutes, idx: np.ndarray | None = None) -> np.ndarray:
        """(rows, rank) compound factors of rows ``idx`` (default all); zeros for structures
        without factors (new to the training data, or seen on too few systems)."""
        idx = np.arange(len(solutes)) if idx is None else np.asarray(idx)
        fac = self.factors_
        rank = len(next(iter(fac.values()))) if fac else FACTOR_RANK
        out = np.zeros((idx.size, rank))
        for r, i in enumerate(idx):
            v = self._lookup(fac, self.skeleton_factors_, solutes, i) if solutes.usable[i] \
                else None
            if v is not None:
                out[r] = v
        return out

    def pair_sd_scale(self, calibrated: bool) -> float:
        """Scale of the neighbour-spacing sd for co-elution risk, fitted on left-out pairs
        of the same regime (with 10 calibrants, or zero-shot); a model that recorded one
        scale for both gives that one, a model with none 1.0."""
        sd = self.residual_sd_
        key = "pair_sd_scale_calibrated" if calibrated else "pair_sd_scale_zero_shot"
        return float(sd.get(key, sd.get("pair_sd_scale", 1.0)))

    def analyte_risk_params(self, calibrated: bool) -> tuple[float, float, float]:
        """(sd scale, a, b) of the per-analyte co-elution risk of the regime: the spacing sd
        of :func:`retpred.peaks.any_coelution_probability` is multiplied by the scale and
        its result recalibrated by ``recalibrate_risk(p, a, b)``; all three fitted on
        left-out analyte lists (model card). A model built without them gives its pair
        scale and the identity map (0, 1)."""
        key = "analyte_risk_calibrated" if calibrated else "analyte_risk_zero_shot"
        got = self.residual_sd_.get(key)
        if got is None:
            return (self.pair_sd_scale(calibrated), 0.0, 1.0)
        scale, a, b = (float(v) for v in got)
        return (scale, a, b)

    def known(self, solutes: Solutes) -> np.ndarray:
        """True where a usable structure is in the compound memory (it was in training)."""
        mem = self.memory_
        return np.array([bool(u) and k in mem
                         for u, k in zip(solutes.usable, solutes.memory_keys, strict=True)],
                        dtype=bool)

    def apply_lab(self, pred: np.ndarray, x: np.ndarray) -> np.ndarray:
        """Lab correction: ``a + b (pred - pivot) + h(x, pred)`` (see ``retpred.lab``)."""
        lin = self.lab_linear_
        out = lin["offset"] + lin["slope"] * (pred - lin["pivot"])
        if self.lab_gbm_ is not None:
            out = out + self.lab_gbm_.predict(np.column_stack([x, pred]))
        if self.lab_neighbours_:
            from retpred.calibration import neighbour_correction

            nb = self.lab_neighbours_
            out = out + neighbour_correction(x[:, FINGERPRINT_COLUMNS],
                                             np.asarray(nb["fingerprints"], dtype=float),
                                             np.asarray(nb["residuals"], dtype=float))
        return out

    def lab_standard_offsets(self, solutes: Solutes, idx: np.ndarray,
                             contexts: Sequence[SystemContext],
                             which: np.ndarray) -> np.ndarray:
        """``log kw`` offsets of rows ``idx`` that are lab standards (NaN elsewhere): a
        structure's mean offset over the lab systems with the row's retention conditions
        (:func:`same_conditions`), else over all the lab systems it was measured on (the
        lab correction is carried to other conditions too, with a note)."""
        std = self.lab_standards_ or {}
        systems = (self.meta_ or {}).get("lab_systems") or []
        table: dict[str, list[tuple[int, float]]] = {}
        for key, j, off in zip(std.get("keys", ()), std.get("systems", ()),
                               std.get("offsets", ()), strict=True):
            table.setdefault(key, []).append((int(j), float(off)))
        match = [{j for j, rec in enumerate(systems) if same_conditions(rec, c)}
                 for c in contexts]
        out = np.full(len(idx), np.nan)
        for r, (i, w) in enumerate(zip(idx, which, strict=True)):
            got = table.get(solutes.memory_keys[i]) if solutes.usable[i] else None
            if got:
                own = [off for j, off in got if j in match[w]]
                out[r] = float(np.mean(own or [off for _, off in got]))
        return out

    def lab_standard_runs(self, solutes: Solutes, key_of_run: str) -> tuple[np.ndarray,
                                                                              np.ndarray]:
        """Which rows are lab standards, and which of them were measured on the run whose
        :func:`retpred.method.run_key` is ``key_of_run`` (their predicted time is then the
        measured one)."""
        std = self.lab_standards_ or {}
        systems = (self.meta_ or {}).get("lab_systems") or []
        own_systems = {j for j, rec in enumerate(systems) if rec.get("run_key") == key_of_run}
        keys = set(std.get("keys", ()))
        own_keys = {k for k, j in zip(std.get("keys", ()), std.get("systems", ()), strict=True)
                    if int(j) in own_systems}
        pairs = [(bool(u) and k in keys, bool(u) and k in own_keys)
                 for u, k in zip(solutes.usable, solutes.memory_keys, strict=True)]
        arr = np.array(pairs, dtype=bool).reshape(-1, 2)
        return arr[:, 0], arr[:, 1]

    def fixed_terms(self, arr: dict, ion: Ionisation) -> np.ndarray:
        """Terms of ``log kw`` that are not learned: column retentivity and ionisation."""
        return np.log10(arr["kEB"] / self.reference.kEB) + ion_term(
            ion, self.ion_drop_acid, self.ion_drop_base, self.ion_drop_pair
        )

    # --- training --------------------------------------------------------------------
    def _coef_bounds(self, n_features: int) -> tuple[np.ndarray, np.ndarray]:
        """``A coef <= b``: per modifier, the plain charge terms (``cation``, ``anion`` and
        their methanol terms) stay within :func:`charge_term_bound` of their drop; and the
        van 't Hoff slope ``d log k / d(1000/T) = c_T + c_TP log P`` is at least
        :data:`VANT_HOFF_MIN_SLOPE` for any log P in :data:`VANT_HOFF_LOGP_RANGE` (retention
        falls by practice's share of k per degree as the column warms)."""
        col = {name: i for i, name in enumerate(COLUMN_TERM_NAMES)}
        rows, bounds = [], []
        for charge, drop in (("cation", self.ion_drop_base), ("anion", self.ion_drop_acid)):
            for terms in ((charge,), (charge, f"methanol*{charge}")):
                a = np.zeros(n_features)
                a[[col[t] for t in terms]] = 1.0
                rows.append(a)
                bounds.append(charge_term_bound(drop))
        for logp in VANT_HOFF_LOGP_RANGE:
            a = np.zeros(n_features)
            a[col["d(1/T)"]], a[col["d(1/T)*logp"]] = -1.0, -logp
            rows.append(a)
            bounds.append(-VANT_HOFF_MIN_SLOPE)
        return np.array(rows), np.array(bounds)

    def fit(
        self, solutes: Solutes, idx: np.ndarray, contexts: Sequence[SystemContext],
        which: np.ndarray, log_kw_obs: np.ndarray, sample_weight: np.ndarray | None = None,
    ) -> RetentionModel:
        """Fit on observed ``log kw`` of rows (solute ``idx[i]`` on context ``which[i]``).

        Ridge on the HSM-style terms plus linear descriptor main effects first (they keep
        homologous series in order and extrapolate smoothly), then gradient boosting on
        what is left. Returns ``self``.
        """
        arr = context_arrays(contexts, which)
        ion = ionise(solutes.sites.take(idx), arr["ph"])
        y = log_kw_obs - self.fixed_terms(arr, ion)
        z = column_features(solutes, idx, arr, ion, self.reference)
        x = solute_matrix(solutes, idx, arr["meoh"])
        lin = np.column_stack([z, solutes.descriptors[idx]])
        ridge = Ridge(alpha=self.ridge_alpha).fit(lin, y, sample_weight=sample_weight)
        a_ub, b_ub = self._coef_bounds(lin.shape[1])
        if np.any(a_ub @ ridge.coef_ > b_ub):
            ridge.coef_, ridge.intercept_ = bounded_ridge(
                lin, y, self.ridge_alpha, a_ub, b_ub, sample_weight)
        resid = y - ridge.predict(lin)
        gbm = HistGradientBoostingRegressor(
            loss=GBM_LOSS,
            max_iter=self.gbm_max_iter,
            learning_rate=self.gbm_learning_rate,
            max_leaf_nodes=31,
            min_samples_leaf=20,
            l2_regularization=1.0,
            random_state=self.random_state,
        ).fit(x, resid, sample_weight=sample_weight)
        self.ridge_ = ridge
        self.gbm_ = gbm
        self.lab_linear_ = self.lab_gbm_ = self.lab_neighbours_ = self.lab_standards_ = None
        self.companion_ridge_ = self.companion_gbm_ = None
        self.companion_memory_, self.companion_skeleton_memory_ = {}, {}
        self.memory_, self.factors_ = {}, {}
        self.skeleton_memory_, self.skeleton_factors_ = {}, {}
        self.domain_ = fit_domain(solutes.descriptors[np.unique(idx)])
        idx, which = np.asarray(idx), np.asarray(which)
        resid = log_kw_obs - self.retention_parameters(solutes, contexts, which, idx)[0]
        ok = np.isfinite(resid)
        # one compound per memory key: salt forms that standardise to one parent, and
        # enantiomers, pool their rows
        mkeys = np.array(solutes.memory_keys, dtype=object)
        ukeys, kid = np.unique(mkeys[idx], return_inverse=True)
        first = np.zeros(ukeys.size, dtype=int)
        first[kid] = idx  # a solute of each key (all of them share its stereo-blind form)
        skeleton = [solutes.skeleton_keys[i] for i in first]
        comps, offsets = fit_compound_memory(resid[ok], kid[ok], which[ok])
        self.memory_ = {ukeys[k]: round(float(v), 5) for k, v in zip(comps, offsets, strict=True)}
        u = np.zeros(ukeys.size)
        u[comps] = offsets
        self.skeleton_memory_ = _skeleton_means(ukeys, skeleton, dict(zip(comps, offsets,
                                                                         strict=True)))
        rows = np.flatnonzero(ok)
        pred_lk = log_kw_obs[rows] - resid[rows] + u[kid[rows]]
        comps, v = fit_compound_factors(log_kw_obs[rows], pred_lk, kid[rows], which[rows])
        self.factors_ = {ukeys[k]: [round(float(a), 5) for a in row]
                         for k, row in zip(comps, v, strict=True)}
        self.skeleton_factors_ = _skeleton_means(ukeys, skeleton, dict(zip(comps, v,
                                                                          strict=True)))
        return self

    def outside_domain(self, solutes: Solutes) -> np.ndarray:
        """True where a structure is far from every training structure (see
        :func:`fit_domain`); unusable rows are False (they have their own status)."""
        if not self.domain_:
            return np.zeros(len(solutes), dtype=bool)
        d = mahalanobis(solutes.descriptors, self.domain_)
        return np.isfinite(d) & (d > self.domain_["threshold"])

    # --- metadata ----------------------------------------------------------------------
    def identity(self) -> str:
        """16 hex digits of the SHA-256 of :meth:`describe` (format, version, training data
        fingerprint, training date, lab metadata): what a calibration file records of the
        model that fitted it."""
        return data_fingerprint(to_json(self.describe()))[:16]

    def describe(self) -> dict:
        return {
            "format": MODEL_FORMAT,
            "tool_version": __version__,
            "descriptors": list(DESCRIPTOR_NAMES),
            "fingerprint_bits": N_BITS,
            "column_terms": list(COLUMN_TERM_NAMES),
            **self.meta_,
        }


#: a tetrahedral centre's tag in the mirror image
_MIRROR_TAG = {Chem.ChiralType.CHI_TETRAHEDRAL_CW: Chem.ChiralType.CHI_TETRAHEDRAL_CCW,
               Chem.ChiralType.CHI_TETRAHEDRAL_CCW: Chem.ChiralType.CHI_TETRAHEDRAL_CW}


def stereo_forms(smiles: str) -> tuple[str, str]:
    """``(memory form, stereo-blind form)`` canonical SMILES of a standardised structure.

    Enantiomers are retained identically in an achiral environment such as a reversed-phase
    column and eluent (any chromatography textbook), and so is their racemate. A structure
    whose only stereo element is one tetrahedral centre is therefore remembered under its
    stereo-blind form (no stereo marks): R, S and unspecified are one compound. With two or
    more centres, or a double-bond geometry, the memory form is the smaller of its canonical
    SMILES and its mirror image's (every tetrahedral centre inverted; double bonds are not
    mirrored), so diastereomers stay apart and enantiomers share it; the stereo-blind form is
    then the fallback key for a stereoisomer the training data do not hold. A structure
    without stereo marks is its own form twice; one RDKit cannot read is returned as is.
    """
    if not _has_stereo_marks(smiles):
        return smiles, smiles
    mol = Chem.MolFromSmiles(smiles)
    if mol is None:
        return smiles, smiles
    return stereo_forms_of(mol, Chem.MolToSmiles(mol))


def _has_stereo_marks(smiles: str) -> bool:
    return "@" in smiles or "/" in smiles or "\\" in smiles


def stereo_forms_of(mol: Chem.Mol, smiles: str) -> tuple[str, str]:
    """:func:`stereo_forms` of ``smiles``, the canonical SMILES written from ``mol``,
    without reading it again (``mol`` is not changed)."""
    if not _has_stereo_marks(smiles):
        return smiles, smiles
    flat = Chem.MolToSmiles(mol, isomericSmiles=False)
    centres = [atom.GetIdx() for atom in mol.GetAtoms() if atom.GetChiralTag() in _MIRROR_TAG]
    bonds = "/" in smiles or "\\" in smiles
    if not bonds and len(centres) <= 1:
        return flat, flat
    if not centres:
        return smiles, flat
    mirror = Chem.Mol(mol)
    for i in centres:
        atom = mirror.GetAtomWithIdx(i)
        atom.SetChiralTag(_MIRROR_TAG[atom.GetChiralTag()])
    return min(smiles, Chem.MolToSmiles(mirror)), flat


def compound_key(smiles: str) -> str:
    """Key of a standardised structure in the compound memory: the first 16 hex digits of
    the SHA-256 of its canonical SMILES (the structure itself is not stored)."""
    return hashlib.sha256(smiles.encode("utf-8")).hexdigest()[:16]


def _skeleton_means(keys, skeleton: list[str], values: dict) -> dict:
    """``{stereo-blind key: mean value}`` over the compounds (``keys[i]``, with values
    ``values[i]``) of each stereo-blind form that some stereo-marked compound shares (a form
    without stereo marks is found under its own memory key); values rounded like the
    memory's."""
    groups: dict[str, list] = {}
    marked = set()
    for i, value in values.items():
        groups.setdefault(skeleton[i], []).append(np.asarray(value, dtype=float))
        if skeleton[i] != keys[i]:
            marked.add(skeleton[i])
    out = {}
    for sk in marked:
        mean = np.mean(groups[sk], axis=0)
        out[sk] = round(float(mean), 5) if mean.ndim == 0 else [round(float(a), 5)
                                                                for a in mean]
    return out


def fit_compound_memory(
    resid: np.ndarray, compound: np.ndarray, system: np.ndarray,
    shrink: float = MEMORY_SHRINK, n_iter: int = MEMORY_ITERATIONS,
    huber_c: float | None = MEMORY_HUBER_C,
) -> tuple[np.ndarray, np.ndarray]:
    """Compound effects of the additive model ``r_ij = a_j + u_i + e`` by iteratively
    reweighted backfitting (a Huber M-estimate; Huber 1964).

    ``a_j`` (system offset: dwell volume, dead time, batch; not kept, a user's system is
    calibrated instead) is the weighted mean over its compounds of ``r - u``; ``u_i`` is the
    weighted mean over its ``n_i`` systems of ``r - a`` shrunk by ``n_i / (n_i + shrink)``
    (a ridge penalty on ``u``; the weights locate the mean, the count of systems sets the
    shrinkage). The weights start at 1; after each sweep they are ``w = min(1, c s / |e|)``,
    ``e = r - a - u``, ``s = 1.4826 median |e|`` (``huber_c`` c; None, or a zero scale,
    keeps them at 1: the least-squares backfit). Returns ``(unique compounds, u)``.
    """
    comps, ci = np.unique(compound, return_inverse=True)
    _, si = np.unique(system, return_inverse=True)
    n_c = np.bincount(ci, minlength=comps.size).astype(float)
    u = np.zeros(comps.size)
    w = np.ones(resid.size)
    for _ in range(n_iter):
        a = np.bincount(si, w * (resid - u[ci])) / np.bincount(si, w)
        u = (np.bincount(ci, w * (resid - a[si]), minlength=comps.size)
             / np.bincount(ci, w, minlength=comps.size)) * n_c / (n_c + shrink)
        if huber_c is None:
            continue
        e = np.abs(resid - a[si] - u[ci])
        scale = 1.4826 * float(np.median(e))
        if scale > 1e-9:
            w = np.minimum(1.0, huber_c * scale / np.maximum(e, 1e-12))
    return comps, u


def _groups(labels: np.ndarray, n: int) -> list[np.ndarray]:
    """Row indices of each label ``0 .. n-1``."""
    order = np.argsort(labels, kind="stable")
    bounds = np.searchsorted(labels[order], np.arange(n + 1))
    return [order[bounds[i]:bounds[i + 1]] for i in range(n)]


def fit_compound_factors(
    log_kw_obs: np.ndarray, log_kw_pred: np.ndarray, compound: np.ndarray,
    system: np.ndarray, rank: int = FACTOR_RANK, shrink: float = FACTOR_SHRINK,
    min_systems: int = FACTOR_MIN_SYSTEMS, n_iter: int = FACTOR_ITERATIONS,
) -> tuple[np.ndarray, np.ndarray]:
    """Compound factors of the interaction model ``e_ij = v_i . w_j + noise``.

    ``e`` is what is left of ``log kw`` on each system after the least-squares line of
    observed on predicted (the part a calibration's linear map absorbs). ``v`` (compounds
    with ``min_systems`` or more training rows, one per system) and ``w`` (systems) are
    fitted by alternating ridge regressions, ``v_i = (W_i^T W_i + shrink I)^-1 W_i^T e_i``
    and likewise ``w_j`` with penalty 1: a low-rank completion of the compound x system
    residual matrix. The start is deterministic: ``v`` from the leading ``rank`` singular
    vectors of that matrix with its missing cells set to 0, ``U_k S_k^1/2`` (the usual
    spectral start of matrix completion), so the result does not hang on a random draw.
    Returns ``(compounds, v)``; ``w`` is not kept (a user's system gets its own from its
    calibrants).
    """
    e = np.asarray(log_kw_obs, dtype=float) - log_kw_pred
    systems, si = np.unique(system, return_inverse=True)
    for rows in _groups(si, systems.size):
        if rows.size >= 3:
            b = np.polyfit(log_kw_pred[rows], log_kw_obs[rows], 1)
            e[rows] = log_kw_obs[rows] - np.polyval(b, log_kw_pred[rows])
        else:
            e[rows] -= e[rows].mean()
    comps, ci = np.unique(compound, return_inverse=True)
    keep = np.bincount(ci)[ci] >= min_systems
    if not keep.any():
        return np.array([], dtype=int), np.zeros((0, rank))
    e, compound, system = e[keep], np.asarray(compound)[keep], np.asarray(system)[keep]
    comps, ci = np.unique(compound, return_inverse=True)
    systems, si = np.unique(system, return_inverse=True)
    c_rows, s_rows = _groups(ci, comps.size), _groups(si, systems.size)
    cells = np.zeros((comps.size, systems.size))
    np.add.at(cells, (ci, si), e)
    counts = np.zeros_like(cells)
    np.add.at(counts, (ci, si), 1.0)
    cells = np.divide(cells, counts, out=cells, where=counts > 0)
    left, singular, _ = np.linalg.svd(cells, full_matrices=False)
    v = np.zeros((comps.size, rank))
    k = min(rank, singular.size)
    v[:, :k] = left[:, :k] * np.sqrt(singular[:k])
    w = np.zeros((systems.size, rank))
    for _ in range(n_iter):
        for j, rows in enumerate(s_rows):
            w[j] = ridge_solve(v[ci[rows]], e[rows], 1.0)
        for i, rows in enumerate(c_rows):
            v[i] = ridge_solve(w[si[rows]], e[rows], shrink)
    return comps, v


#: Training structures whose Mahalanobis distance stays within this quantile define the
#: domain; 99.5 % keeps the unusual-but-seen inside and flags what nothing resembles.
DOMAIN_QUANTILE = 0.995


def fit_domain(descriptors: np.ndarray) -> dict:
    """Applicability domain in descriptor space: mean, (regularised) inverse covariance and
    the ``DOMAIN_QUANTILE`` of the training structures' Mahalanobis distances."""
    d = descriptors[np.all(np.isfinite(descriptors), axis=1)]
    mean = d.mean(axis=0)
    cov = np.cov(d, rowvar=False) + 1e-6 * np.eye(d.shape[1])
    icov = np.linalg.pinv(cov)
    dom = {"mean": mean.tolist(), "icov": icov.tolist()}
    dist = mahalanobis(d, dom)
    dom["threshold"] = float(np.quantile(dist, DOMAIN_QUANTILE))
    return dom


def mahalanobis(descriptors: np.ndarray, domain: dict) -> np.ndarray:
    diff = descriptors - np.asarray(domain["mean"])
    icov = np.asarray(domain["icov"])
    return np.sqrt(np.maximum(np.einsum("ij,jk,ik->i", diff, icov, diff), 0.0))


def data_fingerprint(*parts: bytes | str) -> str:
    """SHA-256 over the training inputs (for the model's metadata)."""
    h = hashlib.sha256()
    for p in parts:
        h.update(p.encode() if isinstance(p, str) else p)
    return h.hexdigest()


def now_utc() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def to_json(obj) -> str:
    return json.dumps(obj, sort_keys=True, indent=1, default=float)
