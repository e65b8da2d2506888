"""Calibration of predictions to one system from measured reference compounds.

The correction works in retention space: each calibrant's measured time is turned into its
observed ``log kw`` through the gradient engine with the user's own method (exact inverse),
and a map ``log kw_pred -> log kw_obs`` is fitted. Up to five candidate maps, each scored by
its leave-one-out error in *time* (the quantity the user measures):

- ``unchanged``: ``log kw = pred``, the model's own predictions (no parameter, so its
  leave-one-out error is simply its error on the calibrants); with two or more
  calibrants. It lets the blend keep a model that already fits the system: on the open
  data (283 left-out systems, 10 random calibrants, seeds 0-3 of the same draws) 49
  systems ended worse after the other maps than before any, and taking it into the blend
  moved the median error from 2.57, 2.66, 2.73, 2.79 % of the run to 2.59, 2.57, 2.64,
  2.74 % (mean 2.69 -> 2.64; average weight 0.14). Like the others it is followed by the
  structure-aware corrections below;
- ``shift``: ``log kw = pred + a`` (one parameter: the system is uniformly more or less
  retentive, e.g. a column batch, an eluent or a dwell difference);
- ``linear``: ``log kw = a + b (pred - pivot)``, slope bounded to 0.5-2, fitted on the
  calibrants' errors in *time*: each ``log kw`` residual is weighted by the calibrant's
  ``J = d t_R / d log kw`` (first-order propagation through the engine; an early peak
  moves little for a given ``log kw`` error, a peak in the gradient much more) and the fit is
  a Huber M-estimate (robust to a mislabelled standard); needs 3 or more calibrants.
  Measured on the open data (283 left-out systems, 10 random calibrants, seeds 0-3, in
  the blend below, with the monotone kind built on it): median error 2.94 -> 2.81 % of the
  run against the unweighted repeated-median line (Siegel 1982), which the selectivity
  kind still uses;
- ``monotone``: the linear map plus an isotonic (monotone) correction of its residuals
  (weighted by ``J^2``), interpolated linearly between calibrants; needs 10 or more;
- ``selectivity``: the linear map plus ``c_P (log P - mean) + c_T (TPSA/100 - mean)``, a
  ridge-regularised (lambda = 1) correction of the system's hydrophobic and polar
  selectivity relative to the model (the two leading solute terms of the
  hydrophobic-subtraction picture, Snyder, Dolan and Carr 2004); needs 6 or more.

Each candidate is fitted on all calibrants and, with the analytes' structures
(``SoluteTraits``), followed by its own two structure-aware corrections (below). The
corrected ``log kw`` of the candidates are then averaged with weights ``1 / LOO_k^2``
(``LOO_k``: candidate k's leave-one-out median absolute error in minutes, floored at
``LOO_FLOOR_MIN``): inverse-variance weighting of estimators of the same quantity, which
keeps a candidate that is nearly as good instead of discarding it. Measured on the open
data (283 left-out systems, 10 random calibrants, seeds 0 and 1 of the same draws): median
error 2.92 and 2.83 % of the run against 2.97 and 3.02 % when the single best candidate
was used; equal weights gave 3.04 % (mean of the two seeds). The model card has the
current four-seed figure.

The two structure-aware corrections, in this order. First the compound-factor
correction: for analytes the open data know well, the model holds factors ``v``
(``retpred.model.fit_compound_factors``); the system's loadings are fitted on the
calibrants' residuals after the map, ``w = (V^T V + lambda I)^-1 V^T r`` (ridge,
lambda = 0.3; calibrants without factors contribute nothing), and each analyte gains
``v . w``. Measured on the open data (283 left-out systems, 10 random calibrants, four
seeds of 5 draws): median error 3.16 -> 3.05 % of the run (per seed -0.00 to -0.21). Then
the neighbour correction: each calibrant's remaining residual ``r_j`` is shared with
structurally similar analytes, ``delta = sum_j w_j r_j / (sum_j w_j + kappa)``,
``w_j = exp((T_j - 1) / tau)`` with ``T`` the count-fingerprint Tanimoto (min/max)
similarity, ``tau = 0.2``, ``kappa = 0.5`` (a kernel smoother shrunk towards zero; an
analyte unlike every calibrant gets almost nothing).
Measured on the open data (283 left-out systems, 10 random calibrants), on the model of
session 2: median error 3.56 % of the run with shift/linear/monotone only, 3.40 % with both
additions. The current model's figure is on the model card (``models/MODEL_CARD.md``).
Last, an analyte with a calibrant's structure gets that calibrant's remaining error too
(``standard_offsets``, stored when the calibrants' traits carry their keys): it is
predicted at its measured ``log kw``, i.e. at its measured time on the same method.

Warnings: calibrants covering only part of the elution window of the analytes, and a
calibrant whose leave-one-out error under the blend (the candidates' leave-one-out
predictions averaged with the same weights) is an outlier (over 3 robust standard
deviations and over 0.3 min).
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, replace

import numpy as np
from scipy.stats import siegelslopes
from sklearn.isotonic import IsotonicRegression

from retpred.errors import InputError

#: written by this version; formats 2 (no quadratic kind) and 3 (no measured standards or
#: method conditions) are read too
CALIBRATION_FORMAT = 4
READABLE_FORMATS = (2, 3, 4)
SLOPE_BOUNDS = (0.5, 2.0)
MIN_LINEAR = 3
MIN_MONOTONE = 10
MIN_QUADRATIC = 8
#: ridge on the quadratic kind's curvature (insensitive: 0.1-1 gave the same medians)
CURVATURE_RIDGE = 0.3
MIN_SELECTIVITY = 6
SELECTIVITY_RIDGE = 1.0
FACTOR_RIDGE = 0.3
NEIGHBOUR_TAU = 0.2
NEIGHBOUR_KAPPA = 0.5
#: floor of a candidate's leave-one-out error in the blend weights (min; ~ a data
#: system's time resolution) so that exact fits do not get infinite weight
LOO_FLOOR_MIN = 0.005
#: Huber's tuning constant (95 % efficiency at the normal distribution; Huber 1964)
HUBER_C = 1.345
#: time weights are clipped to this factor of their median either way
TIME_WEIGHT_RANGE = 5.0
#: log kw step of the central difference that gives the time weights
JACOBIAN_STEP = 0.01
KINDS = ("unchanged", "shift", "linear", "monotone", "selectivity", "quadratic")


@dataclass(frozen=True)
class SoluteTraits:
    """What the selectivity and neighbour corrections need of each analyte (row-aligned).

    ``logp``: Crippen log P; ``tpsa_a2``: topological polar surface area (A^2);
    ``fingerprints``: (n, bits) count fingerprints of the standardised structures;
    ``factors``: (n, rank) compound factors of the model (zero rows for structures it has
    none for), or None; ``keys``: the compound-memory key of each structure ("" for an
    unusable row), which matches analytes to measured standards, or None (the validation
    leaves it out: its analytes are never the calibrants).
    """

    logp: np.ndarray
    tpsa_a2: np.ndarray
    fingerprints: np.ndarray
    factors: np.ndarray | None = None
    keys: np.ndarray | None = None

    @classmethod
    def of(cls, solutes, idx=None, model=None, keys: bool = False) -> SoluteTraits:
        """Traits of a ``retpred.model.Solutes`` batch (rows ``idx``, default all), with the
        compound factors of ``model`` (a ``RetentionModel``) when given and the structures'
        keys when ``keys``."""
        from retpred.chemistry import DESCRIPTOR_NAMES

        idx = np.arange(len(solutes)) if idx is None else np.asarray(idx)
        d = solutes.descriptors[idx]
        factors = model.factor_matrix(solutes, idx) if model is not None else None
        key_arr = None
        if keys:
            key_arr = np.array([k if u else "" for k, u in
                                zip(solutes.memory_keys, solutes.usable, strict=True)],
                               dtype=object)[idx]
        return cls(logp=d[:, DESCRIPTOR_NAMES.index("logp")],
                   tpsa_a2=d[:, DESCRIPTOR_NAMES.index("tpsa")],
                   fingerprints=solutes.fingerprints[idx], factors=factors, keys=key_arr)

    def take(self, idx) -> SoluteTraits:
        return SoluteTraits(self.logp[idx], self.tpsa_a2[idx], self.fingerprints[idx],
                            None if self.factors is None else self.factors[idx],
                            None if self.keys is None else self.keys[idx])

    def selectivity_terms(self) -> np.ndarray:
        return np.column_stack([self.logp, self.tpsa_a2 / 100.0])


def ridge_solve(a: np.ndarray, r: np.ndarray, lam: float) -> np.ndarray:
    """Ridge coefficients without intercept, ``(A^T A + lam I)^-1 A^T r``."""
    return np.linalg.solve(a.T @ a + lam * np.eye(a.shape[1]), a.T @ r)


def tanimoto_counts(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """(len(a), len(b)) min/max Tanimoto similarity of count fingerprints."""
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    out = np.empty((a.shape[0], b.shape[0]))
    for j in range(b.shape[0]):  # a few calibrants: loop over them, vectorised over analytes
        mn = np.minimum(a, b[j]).sum(axis=1)
        mx = np.maximum(a, b[j]).sum(axis=1)
        out[:, j] = np.where(mx > 0, mn / np.where(mx > 0, mx, 1.0), 0.0)
    return out


def neighbour_correction(fp_analytes: np.ndarray, fp_calibrants: np.ndarray,
                         residuals: np.ndarray, tau: float = NEIGHBOUR_TAU,
                         kappa: float = NEIGHBOUR_KAPPA) -> np.ndarray:
    """``sum_j w_j r_j / (sum_j w_j + kappa)``, ``w_j = exp((T_j - 1) / tau)``."""
    r = np.asarray(residuals, dtype=float)
    ok = np.isfinite(r)
    if not ok.any() or fp_analytes.shape[0] == 0:
        return np.zeros(fp_analytes.shape[0])
    w = np.exp((tanimoto_counts(fp_analytes, fp_calibrants[ok]) - 1.0) / tau)
    return (w @ r[ok]) / (w.sum(axis=1) + kappa)


@dataclass(frozen=True)
class CalibrationMap:
    """One candidate map ``log kw_pred -> log kw`` with its structure-aware corrections.

    ``weight``: its share of the blend (the weights of a calibration sum to 1)."""

    kind: str
    offset: float
    slope: float = 1.0
    pivot: float = 0.0
    knots_x: tuple[float, ...] = ()
    knots_y: tuple[float, ...] = ()
    #: selectivity kind: coefficients of (log P, TPSA/100) and the calibrants' means
    sel_coef: tuple[float, ...] = ()
    sel_center: tuple[float, ...] = ()
    #: quadratic kind: ``curvature c`` of ``c u^2``, ``u = x - pivot`` clipped to
    #: ``curve_range`` (the calibrants' span of ``u``; straight beyond it)
    curvature: float = 0.0
    curve_range: tuple[float, ...] = ()
    #: compound-factor correction: the system's loadings w (analytes gain v . w)
    factor_loadings: tuple[float, ...] = ()
    #: neighbour correction: the calibrants' residuals after this map (fingerprints are
    #: held once, by the :class:`Calibration`)
    nb_residuals: tuple[float, ...] = ()
    weight: float = 1.0

    def apply(self, log_kw_pred: np.ndarray, traits: SoluteTraits | None = None,
              nb_fingerprints: np.ndarray | None = None) -> np.ndarray:
        """Corrected ``log kw``; see :meth:`Calibration.apply`."""
        y = self._map(log_kw_pred)
        if self.kind == "selectivity":
            if traits is None:
                raise ValueError("a selectivity calibration needs the analytes' structures")
            e = traits.selectivity_terms() - np.asarray(self.sel_center)
            y = y + e @ np.asarray(self.sel_coef)
        if self.factor_loadings and traits is not None and traits.factors is not None:
            y = y + traits.factors @ np.asarray(self.factor_loadings)
        if self.nb_residuals and traits is not None and nb_fingerprints is not None:
            y = y + neighbour_correction(traits.fingerprints, nb_fingerprints,
                                         np.asarray(self.nb_residuals))
        return y

    def _map(self, log_kw_pred: np.ndarray) -> np.ndarray:
        x = np.asarray(log_kw_pred, dtype=float)
        y = self.offset + self.slope * (x - self.pivot)
        if self.kind == "monotone" and self.knots_x:
            kx, ky = np.asarray(self.knots_x), np.asarray(self.knots_y)
            # outside the calibrants the end corrections stay constant
            y = y + np.interp(x, kx, ky)
        if self.kind == "quadratic" and self.curve_range:
            u = np.clip(x - self.pivot, self.curve_range[0], self.curve_range[1])
            y = y + self.curvature * u**2
        return y

    @classmethod
    def from_dict(cls, d: dict) -> CalibrationMap:
        d = dict(d)
        for key in ("knots_x", "knots_y", "sel_coef", "sel_center", "factor_loadings",
                    "nb_residuals", "curve_range"):
            d[key] = tuple(float(v) for v in d.get(key, ()))
        m = cls(**d)
        if m.kind not in KINDS:
            raise ValueError(f"unknown calibration kind '{m.kind}'")
        float(m.offset), float(m.slope), float(m.pivot), float(m.weight)
        if m.kind == "selectivity" and len(m.sel_coef) != 2:
            raise ValueError("a selectivity map needs two coefficients")
        if len(m.knots_x) != len(m.knots_y):
            raise ValueError("knots_x and knots_y differ in length")
        if len(m.curve_range) not in (0, 2) or not np.isfinite(float(m.curvature)):
            raise ValueError("a quadratic map needs a finite curvature and a two-value range")
        return m


@dataclass(frozen=True)
class Calibration:
    """A fitted calibration: the candidate maps and their weights, and what it was fitted on.

    ``loo_median_abs_error_min``: the blend's leave-one-out median absolute error (min),
    the candidates' leave-one-out predictions averaged with the final weights (the weights
    come from the same leave-one-out errors, so it is slightly optimistic);
    ``loo_errors_min``: each candidate's own."""

    maps: tuple[CalibrationMap, ...]
    #: neighbour correction: the calibrants' count fingerprints (rows of ``nb_residuals``)
    nb_fingerprints: tuple[tuple[int, ...], ...] = ()
    n_factor_calibrants: int = 0
    n_calibrants: int = 0
    loo_median_abs_error_min: float = float("nan")
    loo_errors_min: dict = field(default_factory=dict)
    cal_rt_range_min: tuple[float, float] = (float("nan"), float("nan"))
    warnings: tuple[str, ...] = ()
    method_summary: str = ""
    #: ``RetentionModel.identity()`` of the model whose predictions were corrected ("" in
    #: files written before it was recorded)
    model_id: str = ""
    #: measured standards (format 4): each usable calibrant's compound key and what is left
    #: of its ``log kw`` error after the blend, so that an analyte with the same structure
    #: gets its measured retention back (:meth:`apply`)
    standard_keys: tuple[str, ...] = ()
    standard_offsets: tuple[float, ...] = ()
    #: ``retpred.method.retention_conditions`` and ``run_key`` of the method it was fitted
    #: on (empty in files of format 3 or older)
    conditions: dict = field(default_factory=dict)
    run_key: str = ""
    #: the calibrants' measured ``log kw`` and their S (format 4), from which their window
    #: on another program is found (:meth:`on_program`)
    cal_log_kw: tuple[float, ...] = ()
    cal_s: tuple[float, ...] = ()

    @property
    def kind(self) -> str:
        """The one map's kind, or ``"blend"``."""
        return self.maps[0].kind if len(self.maps) == 1 else "blend"

    def describe(self) -> str:
        """E.g. ``"blend of linear 0.52, selectivity 0.31, shift 0.17"``; maps whose weight
        rounds to 0.00 are counted, not listed (``"linear 1.00 (2 maps below 0.01)"``)."""
        if len(self.maps) == 1:
            return self.maps[0].kind
        parts = sorted(self.maps, key=lambda m: -m.weight)
        shown = [m for m in parts if m.weight >= 0.005] or parts[:1]
        text = ", ".join(f"{m.kind} {m.weight:.2f}" for m in shown)
        hidden = len(parts) - len(shown)
        if hidden:
            text += f" ({hidden} map{'s' if hidden > 1 else ''} below 0.01)"
        return text if len(shown) == 1 else "blend of " + text

    def map_of(self, kind: str) -> CalibrationMap | None:
        return next((m for m in self.maps if m.kind == kind), None)

    def without_factors(self) -> Calibration:
        """The same calibration without its compound-factor correction."""
        return replace(self, maps=tuple(replace(m, factor_loadings=()) for m in self.maps))

    def apply(self, log_kw_pred: np.ndarray, traits: SoluteTraits | None = None) -> np.ndarray:
        """Corrected ``log kw`` (last axis: analytes, aligned with ``traits``):
        ``sum_k weight_k map_k(log kw_pred)``, each map followed by its corrections.

        Without ``traits`` only the maps of predicted ``log kw`` are applied; a calibration
        with a selectivity map then raises ``ValueError``, the structure-aware corrections
        are skipped."""
        fps = np.asarray(self.nb_fingerprints) if self.nb_fingerprints else None
        total = 0.0
        for m in self.maps:
            total = total + m.weight * m.apply(log_kw_pred, traits, fps)
        total = np.asarray(total, dtype=float)
        if self.standard_keys and traits is not None and traits.keys is not None:
            hit, offset = self._standards(traits.keys)
            total = total + np.where(hit, offset, 0.0)
        return total

    def _standards(self, keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        lookup = dict(zip(self.standard_keys, self.standard_offsets, strict=True))
        offset = np.array([lookup.get(k, np.nan) if k else np.nan for k in keys], dtype=float)
        return np.isfinite(offset), np.nan_to_num(offset)

    def measured(self, traits: SoluteTraits | None) -> np.ndarray:
        """True for analytes whose structure (compound key) is one of the calibrants': their
        corrected ``log kw`` is the standard's measured one (an achiral column does not tell
        enantiomers apart, and a racemate drawn without stereo marks shares the key)."""
        if traits is None or traits.keys is None or not self.standard_keys:
            n = 0 if traits is None else len(traits.logp)
            return np.zeros(n, dtype=bool)
        return self._standards(traits.keys)[0]

    def on_program(self, program) -> Calibration:
        """This calibration with ``cal_rt_range_min`` the calibrants' window on ``program``
        (a ``retpred.gradient.ElutionProgram``): their measured ``log kw`` eluted on it
        (LSS). On the calibration's own method that gives back their measured times; a file
        without them keeps its window."""
        if not self.cal_log_kw:
            return self
        from retpred.gradient import elute

        rt = elute(np.asarray(self.cal_log_kw), np.asarray(self.cal_s), program).rt_min
        if not np.isfinite(rt).any():
            return self
        return replace(self, cal_rt_range_min=(float(np.nanmin(rt)), float(np.nanmax(rt))))

    def condition_mismatch(self, method) -> str | None:
        """A warning when ``method``'s pH, temperature, modifier or column differ from those
        this calibration was fitted on (None when they agree or were not recorded)."""
        from retpred.method import conditions_differ, retention_conditions

        if not self.conditions:
            return None
        diff = conditions_differ(self.conditions, method)
        if not diff:
            return None
        now = retention_conditions(method)
        label = {"ph": "pH", "temperature_c": "temperature (C)", "organic": "modifier",
                 "hsm": "column parameters"}
        text = ", ".join(f"{label.get(k, k)} {_shown(self.conditions[k])} -> {_shown(now[k])}"
                         for k in diff)
        return (f"this calibration was fitted on other conditions ({text}): its correction "
                "may not carry over; refit it with standards run on this method")

    def model_mismatch(self, model_id: str) -> str | None:
        """A warning when this calibration was fitted on another model's predictions."""
        if not self.model_id or self.model_id == model_id:
            return None
        return (f"this calibration was fitted with another model (model id {self.model_id}, "
                f"this one {model_id}): its correction may not suit these predictions; refit "
                "it with 'retpred calibrate'")

    def factor_note(self) -> str | None:
        """One line on the compound-factor correction, or None when it is not used."""
        if not any(m.factor_loadings for m in self.maps):
            return None
        return (f"compound-factor correction from {self.n_factor_calibrants} calibrant(s) "
                "the open data know, applied to the analytes they know too")

    def notes(self) -> list[str]:
        """The report lines of a run with this calibration: what it is, its leave-one-out
        error, the compound-factor note and the warnings."""
        head = (f"calibrated with {self.n_calibrants} reference compound(s), "
                f"correction: {self.describe()}")
        if np.isfinite(self.loo_median_abs_error_min):
            head += f", leave-one-out median error {self.loo_median_abs_error_min:.2f} min"
        factor = self.factor_note()
        return [head, *([factor] if factor else []), *self.warnings]

    def to_json(self) -> str:
        d = asdict(self)
        d["format"] = CALIBRATION_FORMAT
        return json.dumps(d, indent=1, sort_keys=True)

    @classmethod
    def from_json(cls, text: str, path: str = "<calibration>") -> Calibration:
        try:
            d = json.loads(text)
        except ValueError as exc:
            raise InputError(f"not a calibration file ({exc.msg})", path=path) from None
        if not isinstance(d, dict) or "format" not in d:
            raise InputError("not a retpred calibration file", path=path)
        if d.get("format") not in READABLE_FORMATS:
            raise InputError(f"calibration file of format {d.get('format')!r}, this version "
                             f"reads formats {', '.join(map(str, READABLE_FORMATS))}: refit "
                             "it with 'retpred calibrate'", path=path, field="format")
        d.pop("format")
        try:
            maps = d.get("maps")
            if not isinstance(maps, list) or not maps:
                raise ValueError("no maps")
            d["maps"] = tuple(CalibrationMap.from_dict(m) for m in maps)
            d["cal_rt_range_min"] = tuple(float(v) for v in d.get("cal_rt_range_min", ()))
            d["warnings"] = tuple(str(w) for w in d.get("warnings", ()))
            d["nb_fingerprints"] = tuple(tuple(int(v) for v in row)
                                         for row in d.get("nb_fingerprints", ()))
            d["standard_keys"] = tuple(str(k) for k in d.get("standard_keys", ()))
            d["standard_offsets"] = tuple(float(v) for v in d.get("standard_offsets", ()))
            d["cal_log_kw"] = tuple(float(v) for v in d.get("cal_log_kw", ()))
            d["cal_s"] = tuple(float(v) for v in d.get("cal_s", ()))
            if not isinstance(d.get("conditions", {}), dict):
                raise ValueError("conditions is not a table")
            cal = cls(**d)
        except (TypeError, ValueError) as exc:
            raise InputError(f"calibration file has a bad field ({exc})", path=path) from None
        n_fp = len(cal.nb_fingerprints)
        if any(m.nb_residuals and len(m.nb_residuals) != n_fp for m in cal.maps) or not (
                abs(sum(m.weight for m in cal.maps) - 1.0) < 1e-6) or (
                len(cal.standard_keys) != len(cal.standard_offsets)) or (
                len(cal.cal_log_kw) != len(cal.cal_s)):
            raise InputError("calibration file has inconsistent fields", path=path)
        return cal


def _shown(value) -> str:
    if isinstance(value, float):
        return f"{value:g}"
    if isinstance(value, list):
        return "HSM " + "/".join(f"{float(v):g}" for v in value)
    return "class median HSM" if value is None else str(value)


def time_jacobian(rt_of: Callable[[np.ndarray], np.ndarray], log_kw: np.ndarray,
                  h: float = JACOBIAN_STEP) -> np.ndarray:
    """``d t_R / d log kw`` of each compound (min per log unit) by central difference
    through the gradient engine ``rt_of``."""
    lk = np.asarray(log_kw, dtype=float)
    return (rt_of(lk + h) - rt_of(lk - h)) / (2.0 * h)


def time_weights(jac_min: np.ndarray) -> np.ndarray:
    """Calibrants' weights ``J = d t_R / d log kw`` (min per log unit), cleaned: a ``log kw``
    error ``e`` moves a peak by about ``J e`` (first-order error propagation), so residuals
    ``J e`` are errors in time. Non-finite or non-positive ``J`` take the median, and ``J`` is
    clipped to ``TIME_WEIGHT_RANGE`` times the median either way."""
    j = np.asarray(jac_min, dtype=float)
    good = np.isfinite(j) & (j > 0)
    if not good.any():
        return np.ones_like(j)
    med = float(np.median(j[good]))
    j = np.where(good, j, med)
    return np.clip(j, med / TIME_WEIGHT_RANGE, med * TIME_WEIGHT_RANGE)


def huber_line(x: np.ndarray, r: np.ndarray, w: np.ndarray, scale: float,
               c: float = HUBER_C, max_iter: int = 100) -> tuple[float, float]:
    """``(a, b)`` minimising ``sum_i rho(w_i (r_i - a - b x_i) / scale)`` with Huber's
    ``rho`` (quadratic up to ``c``, linear beyond; Huber 1964), by iteratively reweighted
    least squares with the scale held fixed."""
    x = np.asarray(x, dtype=float)
    coef = huber_fit(np.column_stack([np.ones_like(x), x]), r, w, scale, c, max_iter=max_iter)
    return float(coef[0]), float(coef[1])


def huber_fit(a_mat: np.ndarray, r: np.ndarray, w: np.ndarray, scale: float,
              c: float = HUBER_C, ridge: np.ndarray | None = None,
              max_iter: int = 100) -> np.ndarray:
    """Coefficients ``beta`` of a Huber regression of ``r`` on ``A`` with case weights
    ``w``: IRLS on ``w_i (r_i - A_i beta) / scale`` with Huber's ``rho`` and the scale held
    fixed, each step a weighted least squares with ``sum_j ridge_j beta_j^2`` added."""
    r = np.asarray(r, dtype=float)
    w = np.asarray(w, dtype=float)
    u = np.ones_like(r)
    coef = np.zeros(a_mat.shape[1])
    pen = None if ridge is None else np.sqrt(np.asarray(ridge, dtype=float))
    for _ in range(max_iter):
        ww = np.sqrt(w * w * u)
        lhs, rhs = a_mat * ww[:, None], r * ww
        if pen is not None:
            lhs = np.vstack([lhs, np.diag(pen)])
            rhs = np.concatenate([rhs, np.zeros(pen.size)])
        new = np.linalg.lstsq(lhs, rhs, rcond=None)[0]
        z = np.abs(w * (r - a_mat @ new)) / (c * max(scale, 1e-12))
        u = np.where(z <= 1.0, 1.0, 1.0 / np.maximum(z, 1e-300))
        done = np.allclose(new, coef, rtol=0.0, atol=1e-12)
        coef = new
        if done:
            break
    return coef


def _line(x: np.ndarray, y: np.ndarray, w: np.ndarray | None) -> tuple[float, float, float]:
    """``(offset, slope, pivot)`` of the linear map ``y = offset + slope (x - pivot)``.

    Without weights: the repeated-median slope (Siegel 1982) and the median offset. With
    time weights ``w`` (three or more calibrants): a Huber fit of the time residuals
    ``w (y - x - a - b (x - pivot))``, its scale fixed at 1.4826 x the median absolute
    deviation of the repeated-median line's time residuals; the slope ``1 + b`` is bounded
    to ``SLOPE_BOUNDS`` (a bounded slope takes the weighted median offset)."""
    pivot = float(np.median(x))
    res = siegelslopes(y, x)
    slope = float(np.clip(res.slope, *SLOPE_BOUNDS))
    if w is None or x.size < MIN_LINEAR:
        return float(np.median(y - slope * (x - pivot))), slope, pivot
    a, b = huber_line(x - pivot, y - x, w, _time_scale(res, x, y, w))
    slope = 1.0 + b
    if SLOPE_BOUNDS[0] <= slope <= SLOPE_BOUNDS[1]:
        return pivot + a, slope, pivot
    slope = float(np.clip(slope, *SLOPE_BOUNDS))
    return weighted_median(y - slope * (x - pivot), w), slope, pivot


def _time_scale(rm, x: np.ndarray, y: np.ndarray, w: np.ndarray) -> float:
    """The Huber fits' fixed scale: 1.4826 x the median absolute deviation of the time
    residuals ``w (y - line)`` of the repeated-median line ``rm`` (``siegelslopes``)."""
    t_res = w * (y - rm.intercept - rm.slope * x)
    return 1.4826 * float(np.median(np.abs(t_res - np.median(t_res))))


def weighted_median(v: np.ndarray, w: np.ndarray) -> float:
    """The value where the cumulative weight of the sorted ``v`` first reaches half."""
    order = np.argsort(v)
    cw = np.cumsum(np.asarray(w, dtype=float)[order])
    return float(np.asarray(v, dtype=float)[order][np.searchsorted(cw, 0.5 * cw[-1])])


def _fit(kind: str, x: np.ndarray, y: np.ndarray, e: np.ndarray | None = None,
         w: np.ndarray | None = None) -> CalibrationMap:
    """One candidate map on calibrants ``x`` (predicted) -> ``y`` (observed log kw); ``e``:
    their selectivity terms (log P, TPSA/100), used by the selectivity kind; ``w``: their
    time weights (:func:`time_weights`), used by the linear and monotone kinds."""
    if kind == "unchanged":
        return CalibrationMap(kind="unchanged", offset=0.0)
    if kind == "shift":
        return CalibrationMap(kind="shift", offset=float(np.median(y - x)))
    if kind == "selectivity":
        offset, slope, pivot = _line(x, y, None)
        r = y - offset - slope * (x - pivot)
        center = e.mean(axis=0)
        ec = e - center
        coef = ridge_solve(ec, r - r.mean(), SELECTIVITY_RIDGE)
        return CalibrationMap(kind="selectivity", offset=offset + float(r.mean()), slope=slope,
                              pivot=pivot, sel_coef=tuple(map(float, coef)),
                              sel_center=tuple(map(float, center)))
    if kind == "quadratic":
        return _quadratic(x, y, w)
    offset, slope, pivot = _line(x, y, w)
    if kind == "linear":
        return CalibrationMap(kind="linear", offset=offset, slope=slope, pivot=pivot)
    order = np.argsort(x)
    iso = IsotonicRegression(increasing=True).fit(
        x[order], y[order], sample_weight=None if w is None else w[order] ** 2)
    # monotone map = isotonic fit of y; store its difference to the linear map at knots
    kx = x[order]
    ky = iso.predict(kx) - (offset + slope * (kx - pivot))
    # light smoothing of the isotonic steps: 3-point running mean
    if ky.size >= 3:
        ky = np.convolve(np.pad(ky, 1, mode="edge"), np.ones(3) / 3, mode="valid")
    return CalibrationMap(kind="monotone", offset=offset, slope=slope, pivot=pivot,
                          knots_x=tuple(map(float, kx)), knots_y=tuple(map(float, ky)))


def _quadratic(x: np.ndarray, y: np.ndarray, w: np.ndarray | None) -> CalibrationMap:
    """``y - x = a + b u + c u^2`` (``u = x - median x``), a Huber fit of the time-weighted
    residuals as for the linear kind (:func:`_line`: same weights, same fixed scale) with
    the ridge ``CURVATURE_RIDGE`` on ``c``; straight beyond the calibrants' span of ``u``.
    The slope is bounded as the linear kind's and the curvature so that the map stays
    monotone. A curvature in ``log kw`` space that a line cannot take: on the open data's
    left-out systems it lowers the 10-calibrant median (DEVELOPERS.md, "Calibration
    blend")."""
    pivot = float(np.median(x))
    u = x - pivot
    ww = np.ones_like(x) if w is None else np.asarray(w, dtype=float)
    scale = _time_scale(siegelslopes(y, x), x, y, ww)
    a, b, c = huber_fit(np.column_stack([np.ones_like(u), u, u * u]), y - x, ww, scale,
                        ridge=np.array([0.0, 0.0, CURVATURE_RIDGE]))
    lo, hi = float(u.min()), float(u.max())
    slope = float(np.clip(1.0 + b, *SLOPE_BOUNDS))
    # monotone, never flatter than the lowest slope allowed: slope + 2 c u >= SLOPE_BOUNDS[0]
    # at both ends of the span (a map that turns back would swap analytes' order)
    room = slope - SLOPE_BOUNDS[0]
    c_max = room / (-2.0 * lo) if lo < 0 else np.inf
    c_min = -room / (2.0 * hi) if hi > 0 else -np.inf
    return CalibrationMap(kind="quadratic", offset=pivot + float(a), slope=slope,
                          pivot=pivot, curvature=float(np.clip(c, c_min, c_max)),
                          curve_range=(lo, hi))


def candidate_kinds(n: int, with_traits: bool = False) -> list[str]:
    """The kinds fitted on ``n`` calibrants (``unchanged`` needs two: with one there is
    no leave-one-out error to weigh the others against)."""
    kinds = ["unchanged"] if n >= 2 else []
    kinds.append("shift")
    if n >= MIN_LINEAR:
        kinds.append("linear")
    if n >= MIN_MONOTONE:
        kinds.append("monotone")
    if with_traits and n >= MIN_SELECTIVITY:
        kinds.append("selectivity")
    if n >= MIN_QUADRATIC:
        kinds.append("quadratic")
    return kinds


def blend_weights(loo_min: np.ndarray) -> np.ndarray:
    """``w_k = LOO_k^-2 / sum_j LOO_j^-2``, ``LOO`` floored at ``LOO_FLOOR_MIN`` (min)."""
    inv = 1.0 / np.maximum(np.asarray(loo_min, dtype=float), LOO_FLOOR_MIN) ** 2
    return inv / inv.sum()


def _with_corrections(m: CalibrationMap, x: np.ndarray, y: np.ndarray,
                      traits: SoluteTraits | None) -> CalibrationMap:
    """``m`` with its compound-factor loadings and neighbour residuals, fitted on the
    calibrants' residuals after the map (needs ``traits`` and ``MIN_LINEAR`` calibrants)."""
    if traits is None or x.size < MIN_LINEAR:
        return m
    resid = y - m.apply(x, traits)
    f = traits.factors
    loadings: tuple = ()
    if f is not None and np.any(f != 0.0):
        w = ridge_solve(f, resid, FACTOR_RIDGE)
        loadings = tuple(map(float, w))
        resid = resid - f @ w
    return replace(m, factor_loadings=loadings, nb_residuals=tuple(map(float, resid)))


def _restricted(rt_of: Callable[[np.ndarray], np.ndarray],
                mask: np.ndarray) -> Callable[[np.ndarray], np.ndarray]:
    """``rt_of`` for the calibrants ``mask`` only: takes and returns their values alone."""

    def rt_at(lk_sub: np.ndarray) -> np.ndarray:
        full = np.full(mask.size, np.nan)
        full[mask] = lk_sub
        return rt_of(full)[mask]

    return rt_at


def _censored_targets(x: np.ndarray, y: np.ndarray, t: np.ndarray, up: np.ndarray,
                      cens: np.ndarray, rt_of: Callable[[np.ndarray], np.ndarray],
                      traits: SoluteTraits | None) -> np.ndarray:
    """``y`` with the censored calibrants' targets ``min(mu, b)`` (:func:`fit_calibration`);
    ``mu`` is the model's own prediction when no calibrant was retained."""
    exact = ~cens & np.isfinite(x) & np.isfinite(y) & np.isfinite(t)
    mu = x[cens]
    if exact.any():
        ie = np.flatnonzero(exact)
        first = fit_calibration(x[exact], y[exact], t[exact], _restricted(rt_of, exact),
                                traits=None if traits is None else traits.take(ie))
        mu = first.apply(mu, None if traits is None else traits.take(np.flatnonzero(cens)))
    out = y.copy()
    out[cens] = np.minimum(mu, up[cens])
    return out


def fit_calibration(
    pred_log_kw: np.ndarray,
    obs_log_kw: np.ndarray,
    rt_obs_min: np.ndarray,
    rt_of: Callable[[np.ndarray], np.ndarray],
    names: list[str] | None = None,
    method_summary: str = "",
    traits: SoluteTraits | None = None,
    upper_log_kw: np.ndarray | None = None,
) -> Calibration:
    """Fit the candidate maps, weight them by leave-one-out error in time, blend them.

    ``rt_of(log_kw)`` gives the calibrants' times for a vector of their ``log kw`` (with
    their own S, on the user's method). ``traits`` (the calibrants' structures) enables the
    selectivity kind and the structure-aware corrections.

    ``upper_log_kw``: per calibrant, an upper bound ``b`` on its ``log kw`` where it eluted
    at or near t0 (NaN for the others; ``obs_log_kw`` is then ignored). Such a calibrant is
    censored: a first blend fitted on the other calibrants maps its prediction to ``mu``,
    and it enters the fit with target ``min(mu, b)``, the zero-noise E step of a censored
    (Tobit) regression, as for the training data's void rows (DEVELOPERS.md, "Void rows").
    """
    x = np.asarray(pred_log_kw, dtype=float)
    y = np.asarray(obs_log_kw, dtype=float)
    t = np.asarray(rt_obs_min, dtype=float)
    names = names or [f"calibrant {i + 1}" for i in range(x.size)]
    warnings = []
    if upper_log_kw is not None:
        up = np.asarray(upper_log_kw, dtype=float)
        cens = np.isfinite(up) & np.isfinite(x) & np.isfinite(t)
        if cens.any():
            y = _censored_targets(x, y, t, up, cens, rt_of, traits)
            void_names = [n for n, c in zip(names, cens, strict=True) if c]
            warnings.append(f"{len(void_names)} calibrant(s) eluted at or near t0 and only "
                            f"bound the correction from above: {', '.join(void_names)}")
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(t)
    if ok.sum() < 1:
        raise InputError("no usable calibrant (each needs a valid structure and an rt "
                         "not before t0)")
    xi, yi, ti = x[ok], y[ok], t[ok]
    used_names = [n for n, k in zip(names, ok, strict=True) if k]
    n = xi.size
    ti_traits = traits.take(np.flatnonzero(ok)) if traits is not None else None
    ei = ti_traits.selectivity_terms() if ti_traits is not None else None
    kinds = candidate_kinds(n, ti_traits is not None)

    rt_at = _restricted(rt_of, ok)

    wi = time_weights(time_jacobian(rt_at, yi))
    loo: dict[str, float] = {}
    loo_lk = np.empty((len(kinds), n))
    if n >= 2:
        # each calibrant's own traits, taken once for all kinds
        tr_one = [None if ti_traits is None else ti_traits.take(np.array([i]))
                  for i in range(n)]
        for k, kind in enumerate(kinds):
            for i in range(n):
                keep = np.arange(n) != i
                e_keep = ei[keep] if ei is not None else None
                fit_i = _fit(kind, xi[keep], yi[keep], e_keep, wi[keep])
                loo_lk[k, i] = fit_i.apply(xi[i : i + 1], tr_one[i])[0]
            loo[kind] = float(np.nanmedian(np.abs(rt_at(loo_lk[k]) - ti)))
        weights = blend_weights(np.array([loo[k] for k in kinds]))
    else:
        weights = np.ones(1)
    maps = tuple(replace(_with_corrections(_fit(kind, xi, yi, ei, wi), xi, yi, ti_traits),
                         weight=float(w)) for kind, w in zip(kinds, weights, strict=True))
    n_fac = 0
    if any(m.factor_loadings for m in maps):
        n_fac = int(np.any(ti_traits.factors != 0.0, axis=1).sum())
    nb_fp: tuple = ()
    if any(m.nb_residuals for m in maps):
        nb_fp = tuple(tuple(int(v) for v in row) for row in ti_traits.fingerprints)
    blend_loo = float("nan")
    if n >= 2:
        err = rt_at(weights @ loo_lk) - ti
        blend_loo = float(np.nanmedian(np.abs(err)))
        mad = 1.4826 * np.nanmedian(np.abs(err - np.nanmedian(err)))
        for name, e in zip(used_names, err, strict=True):
            if np.isfinite(e) and abs(e) > max(3 * mad, 0.3) and n >= 4:
                warnings.append(
                    f"calibrant '{name}' looks like an outlier "
                    f"(leave-one-out error {e:+.2f} min)"
                )
    dropped = [name for name, k in zip(names, ok, strict=True) if not k]
    if dropped:
        warnings.append(f"{len(dropped)} calibrant(s) not usable (bad structure or rt well "
                        f"before t0): {', '.join(dropped)}")
    cal = Calibration(
        maps=maps, nb_fingerprints=nb_fp, n_factor_calibrants=n_fac, n_calibrants=n,
        loo_median_abs_error_min=blend_loo, loo_errors_min=loo,
        cal_rt_range_min=(float(ti.min()), float(ti.max())),
        warnings=tuple(warnings), method_summary=method_summary,
    )
    if ti_traits is not None and ti_traits.keys is not None:
        cal = _with_standards(cal, xi, yi, ti_traits)
    return cal


def _with_standards(cal: Calibration, x: np.ndarray, y: np.ndarray,
                    traits: SoluteTraits) -> Calibration:
    """``cal`` with each calibrant's remaining error ``y - blend(x)`` stored under its
    compound key (the mean over replicate injections of one structure), so that the same
    structure among the analytes is predicted at its measured ``log kw``: on the method of
    the calibration that is its measured time, elsewhere its own offset carried like the
    model's compound memory. A void calibrant's target is its bound (``min(mu, b)``)."""
    left = y - cal.apply(x, traits)
    keys = [str(k) for k in traits.keys]
    out: dict[str, list[float]] = {}
    for k, r in zip(keys, left, strict=True):
        if k and np.isfinite(r):
            out.setdefault(k, []).append(float(r))
    return replace(cal, standard_keys=tuple(out),
                   standard_offsets=tuple(float(np.mean(v)) for v in out.values()))


def outside_window(cal: Calibration, rt_min: np.ndarray) -> np.ndarray:
    """True where a predicted time lies more than a tenth of the calibrants' time span
    outside their window (NaN times and an empty window give False)."""
    lo, hi = cal.cal_rt_range_min
    rt = np.asarray(rt_min, dtype=float)
    if not np.isfinite(lo):
        return np.zeros(rt.shape, dtype=bool)
    span = max(hi - lo, 1e-9)
    with np.errstate(invalid="ignore"):
        return (rt < lo - 0.1 * span) | (rt > hi + 0.1 * span)


def coverage_warning(cal: Calibration, rt_min: np.ndarray, where: str = "") -> str | None:
    """A warning when analytes elute well outside the calibrants' window (``where``:
    appended to the count, e.g. " at 3 of 61 pH points (pH 2-3)")."""
    outside = outside_window(cal, rt_min)
    if outside.ndim > 1:
        outside = outside.any(axis=0)
    n = int(outside.sum())
    if n:
        lo, hi = cal.cal_rt_range_min
        return (
            f"calibrants cover {lo:.2f}-{hi:.2f} min; {n} analyte(s) are predicted "
            f"outside that window{where}, where the correction is extrapolated"
        )
    return None
