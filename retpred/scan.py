"""Method-development levers: pH scan, gradient-time scan, phase x pH scan, pH x ramp map,
pressure.

A scan predicts every analyte at each setting of one lever and reports, per setting, the
smallest neighbour resolution (the resolution map), the pair that sets it, the run time,
the peak capacity and the median plate number; then the best setting and the robust
windows (contiguous settings where the smallest Rs stays at or above the target).

Efficiency (pH and phase scans). The learned solute term g of ``retpred.model`` does not
depend on pH or column (its input is descriptors, fingerprints and the modifier), so it is
predicted once per modifier. Per setting only the Henderson-Hasselbalch ionisation, the
linear HSM-style column term (ridge), the retentivity/ionisation terms and the gradient
engine are evaluated, all vectorised over settings x analytes. ``retention_grid`` equals
``RetentionModel.retention_parameters`` row for row (tests/test_scan.py checks this).

pH points outside the column's usable range (``Column.ph_min``-``ph_max``) are *skipped*:
not predicted, listed in ``ScanResult.skipped`` and named in ``ScanResult.warnings``.

Physics is that of ``shared/design/retention-physics.md``: aqueous pKa, species-weighted
retention (section 4), LSS gradient engine (section 3), Knox/Wilke-Chang plates, Rs with
4-sigma widths and Darcy pressure (section 6). The pKa shift in hydro-organic eluents is
not modelled; keep the buffer pH at least 1 unit from analyte pKa values (common practice).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from retpred.calibration import Calibration, SoluteTraits, coverage_warning, outside_window
from retpred.chemistry import Ionisation, ionise
from retpred.column import (
    column_hsm,
    dead_time_min,
    max_backpressure_bar,
    peak_capacity,
    plate_number,
)
from retpred.errors import InputError, MethodError
from retpred.gradient import STATUS_AFTER_END, STATUS_INVALID, elute, program_from_method
from retpred.method import PHASE_CLASSES, Column, Method, main_ramp, method_summary
from retpred.model import (
    RetentionModel,
    Solutes,
    SystemContext,
    column_features,
    context_arrays,
    s_parameter,
    solute_matrix,
)
from retpred.peaks import peak_sigma_min, resolution
from retpred.report import (
    CAUTION,
    fmt_value,
    make_console,
    name_list,
    pyplot,
    save_figure,
    write_csv,
)

#: Baseline separation (common practice; retention-physics.md section 6).
DEFAULT_RS_TARGET = 1.5
#: A buffer holds its pH within about 1 unit of its pKa (common practice).
BUFFER_RANGE_PH = 1.0
#: Most points a scan range may give (keeps a typo such as 2:8:0.0001 from running for hours).
MAX_SCAN_POINTS = 2001
SETTING_PH = "ph"
SETTING_GRADIENT_TIME = "gradient_time_min"
_EPS = 1e-9


# =============================================================================================
# Buffers
# =============================================================================================


@dataclass(frozen=True)
class Buffer:
    """An eluent buffer or acid additive. ``pka`` are aqueous values at 25 C.

    ``nominal_ph`` is set for additives that are used at a fixed amount rather than as a
    buffer pair (e.g. 0.1 % TFA); they are suggested only within ``additive_tolerance_ph``
    of it. ``volatile`` means usable with evaporative detectors; ``ms_compatible`` is the
    common-practice judgement for electrospray MS.
    """

    name: str
    pka: tuple[float, ...]
    volatile: bool
    ms_compatible: bool
    source: str
    note: str = ""
    nominal_ph: float | None = None
    additive_tolerance_ph: float = 0.3


#: pKa values of aqueous buffer systems at 25 C, recalled from the CRC Handbook of Chemistry
#: and Physics tables of dissociation constants (from memory); volatility and MS flags are
#: common practice.
BUFFERS: tuple[Buffer, ...] = (
    Buffer("trifluoroacetic acid 0.1 % (additive)", (0.5,), True, False,
           "pKa about 0.3-0.5, from memory; pH about 2 at 0.1 % (common practice)",
           "not a buffer; strong ion pairing and MS signal suppression", nominal_ph=2.0),
    Buffer("formic acid 0.1 % (additive)", (3.75,), True, True,
           "pH about 2.7 at 0.1 % (common practice)",
           "weakly buffered below pH 2.75", nominal_ph=2.7),
    Buffer("phosphate", (2.15, 7.20, 12.35), False, False,
           "CRC Handbook, from memory", "non-volatile; UV-transparent; precipitates in high %B"),
    Buffer("citrate", (3.13, 4.76, 6.40), False, False, "CRC Handbook, from memory",
           "non-volatile; UV absorbance below about 230 nm"),
    Buffer("formate (formic acid / ammonium formate)", (3.75,), True, True,
           "CRC Handbook, from memory"),
    Buffer("acetate (acetic acid / ammonium acetate)", (4.76,), True, True,
           "CRC Handbook, from memory", "UV absorbance below about 230 nm"),
    Buffer("bicarbonate / carbonate (ammonium bicarbonate)", (6.35, 10.33), True, True,
           "CRC Handbook, from memory", "CO2 escapes: prepare fresh"),
    Buffer("tris", (8.07,), False, False, "CRC Handbook, from memory",
           "pKa falls about 0.03 per C (from memory)"),
    Buffer("ammonium (ammonia / ammonium salt)", (9.25,), True, True,
           "CRC Handbook, from memory", "needs a column rated for high pH"),
    Buffer("borate", (9.24,), False, False, "CRC Handbook, from memory"),
    Buffer("triethylamine / triethylammonium", (10.75,), True, True,
           "CRC Handbook, from memory", "persists in MS sources (common practice)"),
)


@dataclass(frozen=True)
class BufferOption:
    """A buffer that fits a pH: which pKa serves, and how far the pH is from it."""

    name: str
    pka: float
    distance_ph: float
    volatile: bool
    ms_compatible: bool
    source: str
    note: str


def buffers_for_ph(ph: float, max_distance_ph: float = BUFFER_RANGE_PH) -> list[BufferOption]:
    """Buffers whose pKa lies within ``max_distance_ph`` of ``ph`` (buffer range pKa +- 1,
    common practice), nearest first (ties: MS-compatible first); additives with a nominal
    pH (TFA, formic acid) are listed when ``ph`` is within their tolerance of it."""
    if not math.isfinite(ph):
        return []
    out = []
    for b in BUFFERS:
        if b.nominal_ph is not None:
            d = abs(ph - b.nominal_ph)
            if d <= b.additive_tolerance_ph + _EPS:
                out.append(BufferOption(b.name, b.pka[0], d, b.volatile, b.ms_compatible,
                                        b.source, b.note))
            continue
        d_all = [abs(ph - p) for p in b.pka]
        j = int(np.argmin(d_all))
        if d_all[j] <= max_distance_ph + _EPS:
            out.append(BufferOption(b.name, b.pka[j], d_all[j], b.volatile, b.ms_compatible,
                                    b.source, b.note))
    return sorted(out, key=lambda o: (round(o.distance_ph, 2), not o.ms_compatible))


def _buffer_text(ph: float) -> str:
    opts = buffers_for_ph(ph)
    return "; ".join(f"{o.name}{' (MS)' if o.ms_compatible else ''}" for o in opts)


# =============================================================================================
# Pressure and efficiency
# =============================================================================================


def pressure_report(method: Method) -> dict:
    """Highest column backpressure over the program against the instrument limit.

    Darcy's law with the dwell-delayed column contents (``retpred.column.max_backpressure_bar``;
    extra-column pressure not included). The limit is ``Method.max_pressure_bar`` (the method
    file's, else 400 bar HPLC / 1000 bar UHPLC, common practice). ``warning`` is set above the
    limit, or above 90 % of it.
    """
    p_bar, t_min = max_backpressure_bar(method)
    limit = float(method.max_pressure_bar)
    given = method.instrument.max_pressure_bar is not None
    frac = p_bar / limit
    warning = None
    if frac > 1.0:
        warning = (f"estimated column pressure {p_bar:.0f} bar (at {t_min:.1f} min) exceeds the "
                   f"instrument limit {limit:.0f} bar: lower the flow, use larger particles, a "
                   "shorter column, a higher temperature or acetonitrile")
    elif frac > 0.9:
        warning = (f"estimated column pressure {p_bar:.0f} bar is within 10 % of the instrument "
                   f"limit {limit:.0f} bar (tubing and frits add more)")
    return {
        "max_pressure_bar": p_bar,
        "at_time_min": t_min,
        "limit_bar": limit,
        "limit_source": "method file" if given else
        f"typical {'UHPLC' if method.is_uhplc else 'HPLC'} pump rating (common practice)",
        "fraction_of_limit": frac,
        "over_limit": bool(frac > 1.0),
        "warning": warning,
    }


def ramp_time_min(method: Method) -> float:
    """Duration of the main gradient ramp (0 for an isocratic method)."""
    times = [r[0] for r in method.gradient.program]
    ramp = main_ramp(times, [r[1] for r in method.gradient.program])
    return 0.0 if ramp is None else float(times[ramp[1]] - times[ramp[0]])


def stretch_ramp(method: Method, new_ramp_min: float) -> Method:
    """The method with its main ramp lasting ``new_ramp_min``.

    Rule: the main ramp is the first monotone %B change (rows i..j, as in ``method_summary``).
    Its rows keep their %B and flow; their times are scaled about row i so that row j comes
    ``new_ramp_min`` after row i (a multi-step ramp keeps its shape). Rows after j (wash,
    re-equilibration) are shifted by the change and keep their durations; rows before i (the
    initial hold) are unchanged. Start and end %B are therefore kept, and the gradient
    steepness b = S dphi t0 / tG scales as 1 / tG.
    """
    if not (math.isfinite(new_ramp_min) and new_ramp_min > 0):
        raise InputError(f"gradient time must be > 0 min, got {new_ramp_min:g}",
                         field="--gradient-time")
    rows = method.gradient.program
    times = [r[0] for r in rows]
    ramp = main_ramp(times, [r[1] for r in rows])
    if ramp is None:
        raise MethodError("the method is isocratic: there is no gradient ramp to stretch",
                          path=method.source, field="gradient.program")
    i, j = ramp
    old = times[j] - times[i]
    scale = new_ramp_min / old
    new_rows = []
    for k, (t, b, f) in enumerate(rows):
        if k <= i:
            nt = t
        elif k <= j:
            nt = times[i] + (t - times[i]) * scale
        else:
            nt = t + (new_ramp_min - old)
        new_rows.append((float(nt), b, f))
    g = dataclasses.replace(method.gradient, program=tuple(new_rows))
    return dataclasses.replace(method, gradient=g)


def efficiency_report(method: Method, mw_g_mol: float = 300.0) -> dict:
    """Expected plate number of the column for a typical solute (default MW 300) at the
    initial flow and the mid-ramp composition: Knox h (A 1, B 2, C 0.05, common practice) at
    nu = u dp / Dm, Dm by Wilke-Chang (``retpred.column.plate_number``)."""
    times, phis, flows = method.phi_program()
    ramp = main_ramp(times, phis)
    phi_mid = phis[0] if ramp is None else 0.5 * (phis[ramp[0]] + phis[ramp[1]])
    n = float(plate_number(method.column, flows[0], phi_mid, method.mobile_phase.organic,
                           method.temperature_c, mw_g_mol))
    return {"plates": n, "mw_g_mol": mw_g_mol, "phi": phi_mid,
            "dead_time_min": _t0(method), "ramp_time_min": ramp_time_min(method)}


def _t0(method: Method) -> float:
    if method.column.dead_time_min is not None:
        return float(method.column.dead_time_min)
    return dead_time_min(method.column, method.phi_program()[2][0])


# =============================================================================================
# Retention over many systems, the GBM evaluated once
# =============================================================================================


def _one_thread():
    """Run the boosted trees on one OpenMP thread: a scan predicts a few hundred rows at a
    time, where thread start-up and contention on a shared machine cost more than they give
    (seen: 2.7 s instead of 0.02 s for 14 rows under load)."""
    try:  # a scikit-learn dependency
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover
        import contextlib

        return contextlib.nullcontext()
    return threadpool_limits(limits=1, user_api="openmp")


def _flat_ionisation(ion: Ionisation) -> Ionisation:
    return Ionisation(*(np.asarray(a).reshape(-1) for a in (
        ion.f_neutral, ion.net_charge, ion.positive_charge, ion.negative_charge, ion.species)))


def retention_grid(
    model: RetentionModel, solutes: Solutes, contexts: Sequence[SystemContext],
    calibration: Calibration | None = None,
) -> tuple[np.ndarray, np.ndarray, Ionisation]:
    """``(log_kw (k, n), S (n,), ionisation (k, n))`` of every solute on every context.

    The equation of ``RetentionModel.retention_parameters`` (module docstring of
    ``retpred.model``). Fast path: the learned solute term g is predicted once per organic
    modifier (its input has no pH or column); ionisation, the linear column/charge term and
    the retentivity and ionisation terms are evaluated for all contexts at once. The fast
    path checks itself against ``retention_parameters`` on the first and last context and
    falls back to one batched ``retention_parameters`` call (every row through the trees)
    when they differ, so a change in ``retpred.model`` can slow a scan but not falsify it.
    ``calibration`` (fitted at one pH) is applied to every context.
    """
    n, k = len(solutes), len(contexts)
    ph = np.array([c.ph for c in contexts], dtype=float)
    ion_kn = ionise(solutes.sites, ph[:, None])
    log_kw = np.full((k, n), np.nan)
    ok = solutes.usable & np.all(np.isfinite(solutes.descriptors), axis=1)
    s = np.where(ok, s_parameter(solutes.mw), np.nan)
    if not ok.any() or k == 0:
        return log_kw, s, ion_kn
    with _one_thread():
        try:
            grid = _fast_grid(model, solutes, list(contexts), np.flatnonzero(ok))
        except (ValueError, KeyError, AttributeError, TypeError):
            grid = None
        if grid is not None:
            for r in {0, k - 1}:
                ref, _ = model.retention_parameters(solutes, contexts[r])
                if not np.allclose(grid[r], ref, rtol=0.0, atol=1e-9, equal_nan=True):
                    grid = None
                    break
        if grid is None:
            which = np.repeat(np.arange(k), n)
            lk, _ = model.retention_parameters(solutes, list(contexts), which=which,
                                               idx=np.tile(np.arange(n), k))
            grid = lk.reshape(k, n)
    if calibration is not None:
        grid = calibration.apply(grid, SoluteTraits.of(solutes, model=model, keys=True))
    log_kw = grid
    return log_kw, s, ion_kn


def _fast_grid(model: RetentionModel, solutes: Solutes, contexts: list[SystemContext],
               okidx: np.ndarray) -> np.ndarray:
    """log kw (k, n) with the boosted solute term computed once (see ``retention_grid``)."""
    k, m = len(contexts), okidx.size
    meoh_k = np.array([1.0 if c.organic == "methanol" else 0.0 for c in contexts])
    g = np.empty((k, m))
    for val in np.unique(meoh_k):
        g[meoh_k == val] = model.boosted_term(solute_matrix(solutes, okidx, np.full(m, val)))
    which = np.repeat(np.arange(k), m)
    idx = np.tile(okidx, k)
    arr = context_arrays(contexts, which)
    ph_k = np.array([c.ph for c in contexts])[:, None]
    ion = _flat_ionisation(ionise(solutes.sites.take(okidx), ph_k))
    z = column_features(solutes, idx, arr, ion, model.reference)
    n_in = getattr(model.ridge_, "n_features_in_", z.shape[1])
    # the ridge sees the HSM-style terms, or those plus the descriptor main effects
    lin = z if n_in == z.shape[1] else np.column_stack([z, solutes.descriptors[idx]])
    fixed = model.fixed_terms(arr, ion)
    pred = (g.reshape(-1) + model.ridge_term(lin) + fixed
            + np.tile(model.memory_offsets(solutes, okidx), k))
    if model.lab_linear_ is not None:
        pred = model.apply_lab(pred, solute_matrix(solutes, idx, arr["meoh"]))
    if model.lab_standards_:
        pred = pred + np.nan_to_num(model.lab_standard_offsets(solutes, idx, contexts, which))
    out = np.full((k, len(solutes)), np.nan)
    out[:, okidx] = pred.reshape(k, m)
    return out


# =============================================================================================
# Scan results
# =============================================================================================


@dataclass
class ScanResult:
    """One lever scanned on one column. Arrays are (points,) or (points, analytes).

    ``run_time_min`` is the time of the last eluting analyte (the shortest useful run);
    ``program_end_min`` the pump program's end. ``min_resolution`` is the smallest
    neighbour Rs = (t2 - t1) / (2 (sigma1 + sigma2)) among eluted analytes (NaN with fewer
    than two). ``best_index`` (:func:`_best`): in a pH scan the middle of the plateau within
    5 % of the largest smallest Rs; in a gradient-time scan the shortest run with every pair
    at ``rs_target``, else the largest smallest Rs (ties within 0.01: shorter run).
    ``robust_windows`` are (lo, hi) settings of contiguous evaluated points with smallest
    Rs >= ``rs_target`` (a skipped point ends a window).
    """

    setting: str
    values: np.ndarray
    names: list[str]
    rt_min: np.ndarray
    peak_width_min: np.ndarray
    charge: np.ndarray
    status: np.ndarray
    min_resolution: np.ndarray
    critical_pair: list[str]
    n_unresolved: np.ndarray
    run_time_min: np.ndarray
    program_end_min: np.ndarray
    peak_capacity: np.ndarray
    plates_median: np.ndarray
    rs_target: float
    best_index: int
    robust_windows: list[tuple[float, float]]
    skipped: np.ndarray
    pressure: dict
    column_label: str
    method_text: str
    fixed_ph: float | None = None
    warnings: list[str] = field(default_factory=list)

    @property
    def best_value(self) -> float:
        return float(self.values[self.best_index]) if self.best_index >= 0 else math.nan

    @property
    def best_min_resolution(self) -> float:
        return float(self.min_resolution[self.best_index]) if self.best_index >= 0 else math.nan


def _pair_metrics(rt: np.ndarray, sigma: np.ndarray, names: Sequence[str], rs_target: float):
    """Smallest neighbour Rs per row, its pair and the count below ``rs_target``."""
    k, n = rt.shape
    key = np.where(np.isfinite(rt), rt, np.inf)
    order = np.argsort(key, axis=1, kind="stable")
    rt_s = np.take_along_axis(rt, order, axis=1)
    sg_s = np.take_along_axis(sigma, order, axis=1)
    if n < 2:
        return np.full(k, np.nan), [""] * k, np.zeros(k, dtype=int)
    with np.errstate(invalid="ignore"):
        rs = resolution(rt_s[:, :-1], rt_s[:, 1:], sg_s[:, :-1], sg_s[:, 1:])
    rs = np.where(np.isfinite(rs), rs, np.nan)
    has = np.isfinite(rs).any(axis=1)
    j = np.argmin(np.where(np.isfinite(rs), rs, np.inf), axis=1)
    min_rs = np.where(has, rs[np.arange(k), np.minimum(j, n - 2)], np.nan)
    pairs = [f"{names[order[r, j[r]]]} / {names[order[r, j[r] + 1]]}" if has[r] else ""
             for r in range(k)]
    n_below = np.sum(np.where(np.isfinite(rs), rs < rs_target, False), axis=1)
    return min_rs, pairs, n_below


def robust_windows(values: np.ndarray, min_rs: np.ndarray, rs_target: float,
                   gaps: np.ndarray | None = None) -> list[tuple[float, float]]:
    """(lo, hi) of each run of consecutive points with smallest Rs >= ``rs_target``.

    ``gaps`` marks points between which a skipped setting lies (True at i: a gap before i).
    """
    good = np.isfinite(min_rs) & (min_rs >= rs_target)
    out, start = [], None
    for i in range(values.size):
        broken = gaps is not None and gaps[i]
        if start is not None and (not good[i] or broken):
            out.append((float(values[start]), float(values[i - 1])))
            start = None
        if good[i] and start is None:
            start = i
    if start is not None:
        out.append((float(values[start]), float(values[-1])))
    return out


#: pH scans: points whose smallest Rs is within this share of the scan's largest count as
#: equally good, and the most central of them is taken (our choice; a predicted Rs is far
#: less certain than 5 %)
PH_BEST_RS_SHARE = 0.05

#: pH scans: among equally central candidates, one at least this far inside the column's
#: usable pH range is preferred (pH units; common practice, from memory: work about half a
#: unit inside the rated range, where a buffer made up a little off stays inside it and the
#: bonded phase or silica ages least); farther than that is no better
PH_LIMIT_CLEARANCE = 0.5


def _best(min_rs: np.ndarray, run_min: np.ndarray, values: np.ndarray | None = None,
          gaps: np.ndarray | None = None, rs_target: float | None = None,
          limits: tuple[float, float] | None = None) -> int:
    """Index of the best point: the largest smallest Rs (ties within 0.01: shorter run).

    With ``rs_target`` (a gradient-time scan), the shortest run among the points whose
    smallest Rs reaches the target, if any does: a longer ramp than that buys resolution
    that the list does not need, at the price of run time (common practice).

    With ``values`` (a pH scan), every point within :data:`PH_BEST_RS_SHARE` of the
    largest smallest Rs is a candidate, and the one farthest from the ends of its run of
    consecutive candidates (broken by ``gaps``, as :func:`robust_windows` is) is taken:
    the middle of a plateau, where a buffer made up 0.2 units off or a pKa predicted a
    little wrong costs least, rather than its edge. Ties: farther inside the column's
    usable range ``limits`` (up to :data:`PH_LIMIT_CLEARANCE`), then larger Rs, then
    shorter run.
    """
    if min_rs.size == 0:
        return -1
    run_key = np.where(np.isfinite(run_min), run_min, np.inf)
    if not np.isfinite(min_rs).any():
        return int(np.argmin(run_key))
    top = np.nanmax(min_rs)
    enough = np.isfinite(min_rs) & (min_rs >= (np.inf if rs_target is None else rs_target))
    if enough.any():
        cand = np.flatnonzero(enough)
        return int(cand[np.argmin(run_key[cand])])
    if values is None:
        cand = np.flatnonzero(np.isfinite(min_rs) & (min_rs >= top - 0.01))
        return int(cand[np.argmin(run_key[cand])])
    good = np.isfinite(min_rs) & (min_rs >= top - max(0.01, PH_BEST_RS_SHARE * top))
    margin = np.full(min_rs.size, -np.inf)
    # the runs of consecutive candidates are the "robust windows" of the 0/1 indicator
    for lo, hi in robust_windows(values, good.astype(float), 0.5, gaps):
        inside = (values >= lo) & (values <= hi) & good
        margin[inside] = np.minimum(values[inside] - lo, hi - values[inside])
    rs_key = np.where(np.isfinite(min_rs), min_rs, -np.inf)
    clearance = np.zeros(min_rs.size)
    if limits is not None:
        depth = np.minimum(values - limits[0], limits[1] - values)
        clearance = np.clip(np.round(depth, 6), 0.0, PH_LIMIT_CLEARANCE)
    # lexsort: the last key is the primary one
    return int(np.lexsort((run_key, -rs_key, -clearance, -margin))[0])


def _elute_points(method: Method, programs, t0_min: float, log_kw: np.ndarray, s: np.ndarray,
                  mw: np.ndarray):
    """rt, sigma, plates and status for (k, n) log kw on one program or one per row."""
    k, n = log_kw.shape
    flow0 = method.phi_program()[2][0]
    if not isinstance(programs, list):
        el = elute(log_kw.reshape(-1), np.tile(s, k), programs)
        rt, phi_e, k_e, status = (a.reshape(k, n) for a in (
            el.rt_min, el.phi_elution, el.k_elution, el.status))
    else:
        parts = [elute(log_kw[r], s, programs[r]) for r in range(k)]
        rt = np.stack([p.rt_min for p in parts])
        phi_e = np.stack([p.phi_elution for p in parts])
        k_e = np.stack([p.k_elution for p in parts])
        status = np.stack([p.status for p in parts])
    mw_b = np.broadcast_to(np.nan_to_num(mw, nan=300.0), (k, n))
    plates = plate_number(method.column, flow0, np.nan_to_num(phi_e, nan=0.5),
                          method.mobile_phase.organic, method.temperature_c, mw_b)
    sigma = peak_sigma_min(t0_min, k_e, plates)
    return rt, sigma, np.where(np.isfinite(rt), plates, np.nan), status


def _assemble(method: Method, setting: str, values, names, rt, sigma, plates, status, charge,
              program_end, ramp_min, t0_min, rs_target, skipped, pressure, label,
              warnings, fixed_ph=None, gaps=None) -> ScanResult:
    min_rs, pairs, n_below = _pair_metrics(rt, sigma, names, rs_target)
    with np.errstate(all="ignore"):
        any_rt = np.isfinite(rt).any(axis=1)
        run = np.where(any_rt, np.nanmax(np.where(np.isfinite(rt), rt, -np.inf), axis=1),
                       np.nan)
        sig_mean = np.array([np.nanmean(r) if np.isfinite(r).any() else np.nan for r in sigma])
        plates_med = np.array([np.nanmedian(r) if np.isfinite(r).any() else np.nan
                               for r in plates])
        ramp = np.broadcast_to(np.asarray(ramp_min, dtype=float), min_rs.shape)
        # gradient: n_c = 1 + tG / (4 sigma_mean); isocratic (Giddings):
        # n_c = 1 + sqrt(N)/4 ln(t_last / t0)
        iso = 1.0 + np.sqrt(plates_med) / 4.0 * np.log(np.maximum(run, t0_min) / t0_min)
        pc = np.where(ramp > 0, peak_capacity(np.where(ramp > 0, ramp, 1.0), sig_mean), iso)
    n_eluted = np.isfinite(rt).sum(axis=1)
    # analytes without retention parameters are named once, by the unusable warning
    no_time = ~np.isfinite(rt) & (status != STATUS_INVALID)
    not_eluted = no_time.sum()
    warnings = list(warnings)
    if not_eluted:
        bad = sorted({names[j] for j in np.flatnonzero(no_time.any(axis=0))})
        warnings.append(f"{not_eluted} analyte-point(s) give no time (not eluted): "
                        + name_list(bad))
    late = (status == STATUS_AFTER_END).any(axis=0)
    if late.any():
        warnings.append("some analytes elute after the program end at some points: "
                        + name_list([names[j] for j in np.flatnonzero(late)]))
    if (n_eluted < 2).any():
        warnings.append("fewer than two analytes elute at some points: no resolution there")
    vals = np.asarray(values, dtype=float)
    if setting == SETTING_PH:
        best = _best(min_rs, run, vals, gaps,
                     limits=(method.column.ph_min, method.column.ph_max))
    else:
        best = _best(min_rs, run, rs_target=rs_target)
    return ScanResult(
        setting=setting, values=vals, names=list(names), rt_min=rt,
        peak_width_min=4.0 * sigma, charge=charge, status=status, min_resolution=min_rs,
        critical_pair=pairs, n_unresolved=n_below, run_time_min=run,
        program_end_min=np.broadcast_to(np.asarray(program_end, float), min_rs.shape).copy(),
        peak_capacity=pc, plates_median=plates_med, rs_target=rs_target, best_index=best,
        robust_windows=robust_windows(vals, min_rs, rs_target, gaps),
        skipped=np.asarray(skipped, dtype=float), pressure=pressure, column_label=label,
        method_text=method_summary(method), fixed_ph=fixed_ph, warnings=warnings,
    )


def _split_ph(column: Column, ph_values) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Points inside the usable range, skipped points, and gap flags for the kept points."""
    ph = np.asarray(ph_values, dtype=float).ravel()
    if ph.size == 0 or not np.all(np.isfinite(ph)):
        raise InputError("pH values must be finite and at least one", field="--ph")
    ph = np.unique(ph)
    inside = (ph >= column.ph_min - _EPS) & (ph <= column.ph_max + _EPS)
    pos = np.flatnonzero(inside)
    gaps = np.zeros(pos.size, dtype=bool)
    if pos.size > 1:
        gaps[1:] = np.diff(pos) > 1
    return ph[inside], ph[~inside], gaps


def _skip_warning(column: Column, skipped: np.ndarray, label: str) -> list[str]:
    if skipped.size == 0:
        return []
    return [f"{label}: {skipped.size} pH point(s) outside the column's usable range "
            f"{column.ph_min:g}-{column.ph_max:g} skipped ({skipped.min():g}-{skipped.max():g});"
            " give column.ph_min/ph_max for a column rated wider (hybrid particles, common "
            "practice about 1-12)"]


def _unusable_warning(solutes: Solutes, names: Sequence[str]) -> list[str]:
    bad = [str(names[i]) for i in np.flatnonzero(~solutes.usable)]
    if not bad:
        return []
    return [f"{len(bad)} analyte(s) could not be used: {name_list(bad)}"]


def _check_names(solutes: Solutes, names: Sequence[str]) -> list[str]:
    names = [str(x) for x in names]
    if len(names) != len(solutes):
        raise ValueError(f"names has {len(names)} entries, solutes has {len(solutes)}")
    return names


def _ph_contexts(method: Method, ph_values, columns: Mapping[str, Column]):
    """(splits {label: _split_ph}, contexts, owning label per context) of pH scans on
    ``columns``; they depend on the method's modifier and temperature, not its program."""
    splits = {lab: _split_ph(col, ph_values) for lab, col in columns.items()}
    contexts, owner = [], []
    for lab, col in columns.items():
        hsm = column_hsm(col)
        for ph in splits[lab][0]:
            contexts.append(SystemContext(organic=method.mobile_phase.organic, ph=float(ph),
                                          temperature_c=method.temperature_c, hsm=hsm))
            owner.append(lab)
    return splits, contexts, owner


def _ph_scans(method: Method, model: RetentionModel, solutes: Solutes, names,
              ph_values, columns: Mapping[str, Column], rs_target: float,
              calibration: Calibration | None, coverage: bool = True,
              grid=None) -> dict[str, ScanResult]:
    """pH scans of several columns (same geometry and program) with one batched model call
    (``coverage``: warn where analytes leave the calibrants' time window). ``grid``: the
    :func:`retention_grid` of these contexts already computed (the pH x ramp map computes
    it once for all its ramps, whose programs differ and whose contexts do not)."""
    names = _check_names(solutes, names)
    prog_t0 = _t0(method)
    pressure = pressure_report(method)
    splits, contexts, owner = _ph_contexts(method, ph_values, columns)
    if grid is None:
        grid = retention_grid(model, solutes, contexts, calibration)
    log_kw, s, ion = grid
    owner_a = np.array(owner, dtype=object)
    prog = program_from_method(method, dead_time_min=prog_t0)
    base_warn = list(method.warnings) + _unusable_warning(solutes, names)
    if calibration is not None:
        base_warn.append(f"calibration measured at pH {method.ph:g} is applied at every point")
    if pressure["warning"]:
        base_warn.append(pressure["warning"])
    out = {}
    for lab, col in columns.items():
        kept, skipped, gaps = splits[lab]
        rows = np.flatnonzero(owner_a == lab)
        if rows.size:
            rt, sigma, plates, status = _elute_points(method, prog, prog_t0, log_kw[rows], s,
                                                      solutes.mw)
            charge = ion.net_charge[rows]
        else:
            shape = (0, len(names))
            rt = sigma = plates = charge = np.empty(shape)
            status = np.empty(shape, dtype=str)
        warn = base_warn + _skip_warning(col, skipped, lab)
        if calibration is not None and coverage:
            warn += _ph_coverage(calibration, rt, kept)
        if kept.size == 0:
            warn.append(f"{lab}: no pH point lies inside the column's usable range")
        m_col = dataclasses.replace(method, column=col)
        out[lab] = _assemble(m_col, SETTING_PH, kept, names, rt, sigma, plates, status, charge,
                             prog.program_end_min, ramp_time_min(method), prog_t0, rs_target,
                             skipped, pressure, lab, warn, gaps=gaps)
    return out


def _ph_coverage(calibration: Calibration, rt: np.ndarray, ph_values: np.ndarray,
                 suffix: str = "") -> list[str]:
    """The calibration's coverage warning over the points of a pH scan (same program as
    the calibrants', so their time window applies at every point), naming the pH range of
    the points where some analyte is outside it."""
    points = outside_window(calibration, rt).any(axis=1)
    if not points.any():
        return []
    where = (f" at {int(points.sum())} of {points.size} pH points "
             f"(pH {ph_values[points].min():g}-{ph_values[points].max():g}){suffix}")
    return [coverage_warning(calibration, rt[points], where)]


def ph_scan(
    method: Method, model: RetentionModel, solutes: Solutes, names: Sequence[str],
    ph_values, rs_target: float = DEFAULT_RS_TARGET, calibration: Calibration | None = None,
    coverage: bool = True,
) -> ScanResult:
    """Predicted times of every analyte at each pH of ``ph_values`` on the method's column.

    Per pH: Henderson-Hasselbalch ionisation of the assigned sites, species-weighted
    ``log kw`` (retention-physics.md section 4), the column's cation-exchange term C(pH),
    then the exact LSS gradient engine and Knox/Wilke-Chang peak widths. Points outside
    ``column.ph_min``-``ph_max`` are skipped with a warning. With a ``calibration`` (and
    ``coverage``) a warning names the points where analytes leave the calibrants' window.
    """
    label = _own_label(method)
    return _ph_scans(method, model, solutes, names, ph_values, {label: method.column},
                     rs_target, calibration, coverage)[label]


def _own_label(method: Method) -> str:
    """Label of the method's own column in a pH scan."""
    return method.column.phase if method.column.hsm is None else \
        f"{method.column.phase} (own HSM parameters)"


def gradient_time_scan(
    method: Method, model: RetentionModel, solutes: Solutes, names: Sequence[str],
    ramp_times_min, rs_target: float = DEFAULT_RS_TARGET, calibration: Calibration | None = None,
) -> ScanResult:
    """Predicted times at each main-ramp duration (``stretch_ramp``: start and end %B kept,
    later rows shifted) at the method's pH. Retention parameters are computed once; each
    point builds its own program. Pressure is evaluated per point; the report keeps the
    highest."""
    names = _check_names(solutes, names)
    tg = np.unique(np.asarray(ramp_times_min, dtype=float).ravel())
    if tg.size == 0 or not np.all(np.isfinite(tg)) or np.any(tg <= 0):
        raise InputError("gradient times must be finite and > 0 min", field="--gradient-time")
    t0 = _t0(method)
    ctx = SystemContext(organic=method.mobile_phase.organic, ph=method.ph,
                        temperature_c=method.temperature_c, hsm=column_hsm(method.column))
    log_kw, s, ion = retention_grid(model, solutes, [ctx], calibration)
    methods = [stretch_ramp(method, float(t)) for t in tg]
    programs = [program_from_method(m, dead_time_min=t0) for m in methods]
    lk = np.repeat(log_kw, tg.size, axis=0)
    rt, sigma, plates, status = _elute_points(method, programs, t0, lk, s, solutes.mw)
    pressures = [pressure_report(m) for m in methods]
    worst = max(pressures, key=lambda p: p["max_pressure_bar"])
    warn = list(method.warnings) + _unusable_warning(solutes, names)
    if not method.column.ph_min - _EPS <= method.ph <= method.column.ph_max + _EPS:
        warn.append(f"method pH {method.ph:g} is outside the column's usable range "
                    f"{method.column.ph_min:g}-{method.column.ph_max:g}")
    if worst["warning"]:
        warn.append(worst["warning"])
    if calibration is not None:  # log kw is the same at every ramp: judge it on the method's
        own = elute(log_kw[0], s, program_from_method(method, dead_time_min=t0)).rt_min
        w = coverage_warning(calibration, own, " on the method's own gradient")
        warn += [w] if w else []
    charge = np.repeat(ion.net_charge, tg.size, axis=0)
    res = _assemble(method, SETTING_GRADIENT_TIME, tg, names, rt, sigma, plates, status, charge,
                    [p.program_end_min for p in programs], tg, t0, rs_target, np.empty(0),
                    worst, method.column.phase, warn, fixed_ph=method.ph)
    res.pressure = {**worst, "per_point_bar": [p["max_pressure_bar"] for p in pressures]}
    return res


# =============================================================================================
# Phase x pH
# =============================================================================================


@dataclass
class PhaseScanResult:
    """pH scans on several columns: one ``ScanResult`` each, a ranking and a suggestion."""

    scans: dict[str, ScanResult]
    summary: pd.DataFrame
    suggestion: str


def phase_ph_scan(
    method: Method, model: RetentionModel, solutes: Solutes, names: Sequence[str], ph_values,
    phases: Sequence[str] | None = None, extra_columns: Mapping[str, Column] | None = None,
    rs_target: float = DEFAULT_RS_TARGET,
) -> PhaseScanResult:
    """Joint phase x pH scan: the built-in classes (class-median HSM parameters, the method's
    geometry and pH range) and any columns the user describes (``extra_columns``: label ->
    Column with ``hsm`` set and its own pH range). Ranked as ``retpred columns`` ranks
    phases, at each column's best pH: fewest pairs below the target, then the largest
    smallest Rs, then the shorter run."""
    phases = list(PHASE_CLASSES) if phases is None else list(phases)
    cols: dict[str, Column] = {
        p: dataclasses.replace(method.column, phase=p, hsm=None) for p in phases}
    for lab, col in (extra_columns or {}).items():
        if lab in cols:
            raise InputError(f"column label '{lab}' is used twice", field="columns")
        cols[lab] = col
    if not cols:
        raise InputError("no phase or column to scan", field="--phases")
    scans = _ph_scans(method, model, solutes, names, ph_values, cols, rs_target, None)
    summary = pd.DataFrame([
        {"phase": lab, **_best_point_row(r),
         "robust_width_ph": max((hi - lo for lo, hi in r.robust_windows), default=math.nan)}
        for lab, r in scans.items()])
    summary["_rs"] = summary["min_resolution"].fillna(-np.inf)
    summary = summary.sort_values(["n_unresolved", "_rs", "last_rt_min"],
                                  ascending=[True, False, True]).drop(columns="_rs")
    summary = summary.reset_index(drop=True)
    summary.insert(0, "rank", np.arange(1, len(summary) + 1))
    return PhaseScanResult(scans=scans, summary=summary, suggestion=_suggest(summary, rs_target))


def _best_point_row(r: ScanResult) -> dict:
    """A pH scan at its best point: best_ph, min_resolution, worst_pair, n_unresolved,
    last_rt_min and its robust windows (text); one row of a phase or ramp summary."""
    b = r.best_index
    ok = b >= 0
    return {
        "best_ph": r.best_value,
        "min_resolution": r.best_min_resolution,
        "worst_pair": r.critical_pair[b] if ok else "",
        "n_unresolved": int(r.n_unresolved[b]) if ok else len(r.names),
        "last_rt_min": float(r.run_time_min[b]) if ok else math.nan,
        "robust_windows": _windows_text(r.robust_windows),
    }


def _with_buffers(text: str, ph: float) -> str:
    """``text`` and the buffers whose pKa lies within 1 unit of ``ph``."""
    buf = _buffer_text(ph)
    return text + (f"; buffers: {buf}" if buf else "; no common buffer within 1 pH unit")


def _windows_text(windows: list[tuple[float, float]]) -> str:
    """``[(2, 4), (6, 6)]`` -> ``"2-4 and 6 (one point)"``: a window of a single scan
    point is named as such, since a neighbour on either side already fails."""
    parts = [f"{lo:g}-{hi:g}" if hi > lo else f"{lo:g} (one point)" for lo, hi in windows]
    if len(parts) < 2:
        return "".join(parts)
    return ", ".join(parts[:-1]) + " and " + parts[-1]


def _suggest(summary: pd.DataFrame, rs_target: float) -> str:
    if summary.empty or not np.isfinite(summary.loc[0, "best_ph"]):
        return "no column gives a usable prediction over this pH range"
    b = summary.iloc[0]
    where = f"{b.phase} at pH {b.best_ph:g}"
    if b.n_unresolved == 0 and np.isfinite(b.min_resolution):
        text = f"{where} resolves all pairs (smallest Rs {b.min_resolution:.2f})"
        if b.robust_windows:
            text += f"; Rs >= {rs_target:g} over pH {b.robust_windows}"
    else:
        text = (f"{where} separates this list best but leaves {b.n_unresolved} pair(s) below "
                f"Rs {rs_target:g} (worst {b.worst_pair}, Rs {b.min_resolution:.2f})")
    return _with_buffers(text, float(b.best_ph))


# =============================================================================================
# Tables, text and plot
# =============================================================================================


@dataclass
class JointScanResult:
    """pH x gradient-time scan: one pH ``ScanResult`` per main-ramp duration, a summary row
    per ramp (at its best pH), the chosen cell and a suggestion."""

    ramps_min: np.ndarray
    scans: list[ScanResult]
    summary: pd.DataFrame
    best_ramp_index: int
    suggestion: str
    method_text: str = ""


#: pH x ramp map: the chosen pH must lie at least this far inside its robust window (pH
#: units; our choice: twice the 0.1 unit to which a buffer is usually made up, common
#: practice), so that a single passing pH point does not win on run time alone
JOINT_MIN_PH_MARGIN = 0.2


def _ph_margin(r: ScanResult) -> float:
    """Distance (pH units) from the best pH of scan ``r`` to the nearer end of the robust
    window that holds it; NaN when it lies in none."""
    ph = r.best_value
    for lo, hi in r.robust_windows:
        if lo - _EPS <= ph <= hi + _EPS:
            return float(min(ph - lo, hi - ph))
    return math.nan


def _best_ramp(summary: pd.DataFrame, rs_target: float) -> int:
    """Row of the chosen ramp: the shortest run among the ramps whose best pH keeps every
    pair at ``rs_target`` at least :data:`JOINT_MIN_PH_MARGIN` inside its robust window
    (``ph_margin``); else the shortest such run regardless of the margin (the
    gradient-time rule of :func:`_best`); else the largest smallest Rs (ties within 0.01:
    shorter run). -1 when no ramp has a point."""
    rs = summary["min_resolution"].to_numpy(float)
    run = summary["last_rt_min"].to_numpy(float)
    if not np.isfinite(summary["best_ph"].to_numpy(float)).any():
        return -1
    spare = summary["ph_margin"].to_numpy(float) >= JOINT_MIN_PH_MARGIN - _EPS
    if np.any(spare & (rs >= rs_target)):  # the ramps without the margin drop out
        return _best(np.where(spare, rs, np.nan), run, rs_target=rs_target)
    return _best(rs, run, rs_target=rs_target)


def ph_gradient_scan(
    method: Method, model: RetentionModel, solutes: Solutes, names: Sequence[str],
    ph_values, ramp_times_min, rs_target: float = DEFAULT_RS_TARGET,
    calibration: Calibration | None = None,
) -> JointScanResult:
    """Joint pH x gradient-time scan: for each main-ramp duration (:func:`stretch_ramp`)
    a pH scan (:func:`ph_scan`) with its best pH, then the chosen pair of settings: the
    shortest run that keeps every pair at the target at its ramp's best pH, else the
    largest smallest Rs. The usual two-lever map of method development (pH moves ionised
    analytes, the ramp moves all of them); the levers interact, so scanning them one at a
    time can miss the pair of settings that works."""
    tg = np.unique(np.asarray(ramp_times_min, dtype=float).ravel())
    if tg.size == 0 or not np.all(np.isfinite(tg)) or np.any(tg <= 0):
        raise InputError("gradient times must be finite and > 0 min", field="--gradient-time")
    label = _own_label(method)
    own_col = {label: method.column}
    # retention depends on pH, column, modifier and temperature, not on the ramp: one grid
    grid = retention_grid(model, solutes, _ph_contexts(method, ph_values, own_col)[1],
                          calibration)

    def scan_at(m: Method) -> ScanResult:
        return _ph_scans(m, model, solutes, names, ph_values, own_col, rs_target,
                         calibration, coverage=False, grid=grid)[label]

    scans = [scan_at(stretch_ramp(method, float(ramp))) for ramp in tg]
    if calibration is not None:
        # the calibrants' window belongs to the method's own gradient; the correction acts on
        # log kw, which the ramp does not change, so coverage is judged there (as in
        # gradient_time_scan), once for the whole map
        own = scan_at(method)
        cov = _ph_coverage(calibration, own.rt_min, own.values,
                           " on the method's own gradient")
        for r in scans:
            r.warnings.extend(cov)
    summary = pd.DataFrame([{"gradient_time_min": float(ramp), **_best_point_row(r),
                             "ph_margin": _ph_margin(r)}
                            for ramp, r in zip(tg, scans, strict=True)])
    best = _best_ramp(summary, rs_target)
    summary["best"] = np.arange(len(summary)) == best
    if best < 0:
        text = "no ramp gives a usable prediction over this pH range"
    else:
        b = summary.iloc[best]
        where = f"a {b.gradient_time_min:g} min ramp at pH {b.best_ph:g}"
        if b.n_unresolved == 0 and np.isfinite(b.min_resolution):
            spare = b.ph_margin >= JOINT_MIN_PH_MARGIN - _EPS
            text = (f"{where} is the shortest run that resolves all pairs"
                    + (f" with +/- {JOINT_MIN_PH_MARGIN:g} pH to spare" if spare else "")
                    + f" (smallest Rs {b.min_resolution:.2f}, last peak "
                    f"{b.last_rt_min:.2f} min)")
            if b.robust_windows:
                text += f"; at that ramp Rs >= {rs_target:g} over pH {b.robust_windows}"
            if not spare:
                text += (f"; no ramp keeps Rs >= {rs_target:g} over +/- "
                         f"{JOINT_MIN_PH_MARGIN:g} pH around its best pH: not robust to pH")
            shorter = summary[(summary.min_resolution >= rs_target)
                              & (summary.last_rt_min < b.last_rt_min)]
            if spare and len(shorter):
                s = shorter.iloc[0]
                text += (f"; a {s.gradient_time_min:g} min ramp reaches Rs {rs_target:g} "
                         f"only near pH {s.best_ph:g}, without that margin")
        elif np.isfinite(b.min_resolution):
            text = (f"{where} separates this list best but leaves {b.n_unresolved} pair(s) "
                    f"below Rs {rs_target:g} (worst {b.worst_pair}, Rs {b.min_resolution:.2f})")
        else:
            text = "fewer than two analytes elute at any setting: no pair to separate"
        if np.isfinite(b.min_resolution):
            text = _with_buffers(text, float(b.best_ph))
    return JointScanResult(ramps_min=tg, scans=scans, summary=summary, best_ramp_index=best,
                           suggestion=text, method_text=method_summary(method))


def joint_scan_frames(result: JointScanResult) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(long table, per-point summary) of a pH x gradient-time scan: the pH scans' frames
    with a ``gradient_time_min`` column; ``best`` marks the chosen cell only."""
    longs, pers = [], []
    for i, (ramp, r) in enumerate(zip(result.ramps_min, result.scans, strict=True)):
        lg, pr = scan_to_frame(r), scan_summary_frame(r)
        lg.insert(1, "gradient_time_min", float(ramp))
        pr.insert(1, "gradient_time_min", float(ramp))
        pr["best"] = pr["best"] & (i == result.best_ramp_index)
        longs.append(lg)
        pers.append(pr)
    return pd.concat(longs, ignore_index=True), pd.concat(pers, ignore_index=True)


def plot_joint_scan(result: JointScanResult, path, *, force: bool = False, inputs=()) -> None:
    """2-D resolution map: smallest Rs over pH (x) and ramp duration (y), the target as a
    contour, skipped pH points blank, the chosen cell marked."""
    plt = pyplot()
    ph = np.unique(np.concatenate([r.values for r in result.scans]))
    grid = np.full((result.ramps_min.size, ph.size), np.nan)
    for i, r in enumerate(result.scans):
        grid[i, np.searchsorted(ph, r.values)] = r.min_resolution
    fig, ax = plt.subplots(figsize=(10, 6), dpi=110)
    top = max(3.0, float(np.nanmax(grid)) if np.isfinite(grid).any() else 3.0)
    mesh = ax.pcolormesh(ph, result.ramps_min, grid, shading="nearest", cmap="viridis",
                         vmin=0.0, vmax=top)
    fig.colorbar(mesh, ax=ax, label="smallest Rs")
    rs_target = result.scans[0].rs_target if result.scans else DEFAULT_RS_TARGET
    if ph.size > 1 and result.ramps_min.size > 1 and np.isfinite(grid).sum() > 3:
        ax.contour(ph, result.ramps_min, np.nan_to_num(grid, nan=0.0), levels=[rs_target],
                   colors="white", linewidths=1.2)
    if result.best_ramp_index >= 0:
        b = result.summary.iloc[result.best_ramp_index]
        ax.plot([b.best_ph], [b.gradient_time_min], marker="o", mfc="none", mec="#c00000",
                ms=12, mew=2)
    ax.set_xlabel("pH")
    ax.set_ylabel("gradient ramp time (min)")
    ax.set_title(f"retpred scan: smallest Rs over pH and ramp time (white: Rs {rs_target:g}; "
                 "circle: chosen)", fontsize=10, loc="left")
    ax.text(0.0, -0.12, result.method_text + "\nPredicted; confirm by injection.",
            transform=ax.transAxes, fontsize=7, va="top")
    fig.tight_layout()
    save_figure(fig, path, force=force, inputs=inputs)


def scan_to_frame(result: ScanResult) -> pd.DataFrame:
    """Long table, one row per (setting, analyte): setting, value, column, analyte, rt_min,
    peak_width_min, charge, status, plus the point's min_resolution and critical_pair."""
    k, n = result.rt_min.shape
    return pd.DataFrame({
        "column": result.column_label,
        "setting": result.setting,
        "value": np.repeat(result.values, n),
        "analyte": np.tile(np.asarray(result.names, dtype=object), k),
        "rt_min": result.rt_min.reshape(-1),
        "peak_width_min": result.peak_width_min.reshape(-1),
        "charge": result.charge.reshape(-1),
        "status": result.status.reshape(-1),
        "point_min_resolution": np.repeat(result.min_resolution, n),
        "point_critical_pair": np.repeat(np.asarray(result.critical_pair, dtype=object), n),
    })


def scan_summary_frame(result: ScanResult) -> pd.DataFrame:
    """One row per setting: min_resolution, critical_pair, n_unresolved, run_time_min,
    program_end_min, peak_capacity, plates_median, in_robust_window, best, and for pH scans
    the buffers that fit."""
    in_win = np.zeros(result.values.size, dtype=bool)
    for lo, hi in result.robust_windows:
        in_win |= (result.values >= lo - _EPS) & (result.values <= hi + _EPS)
    df = pd.DataFrame({
        "column": result.column_label,
        "setting": result.setting,
        "value": result.values,
        "min_resolution": result.min_resolution,
        "critical_pair": result.critical_pair,
        "n_unresolved": result.n_unresolved,
        "run_time_min": result.run_time_min,
        "program_end_min": result.program_end_min,
        "peak_capacity": result.peak_capacity,
        "plates_median": result.plates_median,
        "in_robust_window": in_win,
        "best": np.arange(result.values.size) == result.best_index,
    })
    if result.setting == SETTING_PH:
        df["buffers"] = [_buffer_text(float(v)) for v in result.values]
    return df


def phase_scan_frames(result: PhaseScanResult) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(long table, per-point summary) of all columns of a phase x pH scan."""
    long = pd.concat([scan_to_frame(r) for r in result.scans.values()], ignore_index=True)
    per = pd.concat([scan_summary_frame(r) for r in result.scans.values()], ignore_index=True)
    return long, per


def _setting_text(result: ScanResult, value: float) -> str:
    if result.setting == SETTING_PH:
        return f"pH {value:g}"
    return f"a {value:g} min ramp"


def describe_scan(result: ScanResult) -> list[str]:
    """Plain-language lines: best setting, robust windows, pressure, buffers, efficiency."""
    lines = []
    if result.best_index < 0:
        return [f"{result.column_label}: no point could be evaluated"]
    b = result.best_index
    what = _setting_text(result, result.best_value)
    rs = result.min_resolution[b]
    gradient = result.setting == SETTING_GRADIENT_TIME
    shortest = gradient and np.isfinite(rs) and rs >= result.rs_target
    if shortest:
        what += f", the shortest run with every pair at Rs >= {result.rs_target:g}"
    if np.isfinite(rs):
        lines.append(f"best: {what} (smallest Rs {rs:.2f}, {result.critical_pair[b]}; "
                     f"last peak {result.run_time_min[b]:.2f} min)")
    else:
        lines.append(f"best: {what} (fewer than two peaks)")
    if shortest:
        top = int(np.nanargmax(result.min_resolution))
        if result.min_resolution[top] > rs + 0.01:
            lines.append(f"most resolution: {_setting_text(result, result.values[top])} "
                         f"(smallest Rs {result.min_resolution[top]:.2f}; last peak "
                         f"{result.run_time_min[top]:.2f} min)")
    if result.robust_windows:
        where = (f"{_windows_text(result.robust_windows)} min ramps" if gradient
                 else f"pH {_windows_text(result.robust_windows)}")
        lines.append(f"Rs >= {result.rs_target:g} over {where}")
    elif not np.isfinite(result.min_resolution).any():
        lines.append("no pair to separate at any setting (fewer than two analytes elute)")
    else:
        lines.append(f"no setting keeps every pair at Rs >= {result.rs_target:g}")
    p = result.pressure
    lines.append(f"column pressure up to {p['max_pressure_bar']:.0f} bar of "
                 f"{p['limit_bar']:.0f} bar ({p['limit_source']})")
    lines.append(f"peak capacity {result.peak_capacity[b]:.0f}, median plate number "
                 f"{result.plates_median[b]:.0f} at the best setting")
    if result.setting == SETTING_PH:
        opts = buffers_for_ph(result.best_value)
        if opts:
            lines.append("buffers for pH " + f"{result.best_value:g}: " + "; ".join(
                f"{o.name} (pKa {o.pka:g}{', volatile' if o.volatile else ''}"
                f"{', MS' if o.ms_compatible else ''})" for o in opts))
        else:
            lines.append(f"no common buffer has a pKa within 1 unit of pH {result.best_value:g}")
    return lines


def plot_scan(result: ScanResult, path, *, force: bool = False, inputs=()) -> None:
    """Resolution map (smallest Rs vs setting, the target line, robust windows shaded,
    skipped pH points marked) above the predicted time of each analyte vs setting."""
    plt = pyplot()
    x = result.values
    xlabel = "pH" if result.setting == SETTING_PH else "gradient ramp time (min)"
    fig, (ax1, ax2) = plt.subplots(2, 1, figsize=(10, 7.5), dpi=110, sharex=True,
                                   gridspec_kw={"height_ratios": [1, 1.6]})
    for lo, hi in result.robust_windows:
        for ax in (ax1, ax2):
            half = 0.5 * (np.min(np.diff(x)) if x.size > 1 else 0.1)
            ax.axvspan(lo - half, hi + half, color="#d9f2d9", lw=0, zorder=0)
    ax1.plot(x, result.min_resolution, color="#1f4e79", marker=".", lw=1.2)
    ax1.axhline(result.rs_target, color="#c00000", ls="--", lw=1)
    if result.skipped.size:
        ax1.plot(result.skipped, np.zeros_like(result.skipped), "x", color="#888888",
                 label="outside column pH range (skipped)")
        ax1.legend(fontsize=7, loc="upper right")
    if result.best_index >= 0:
        ax1.axvline(result.best_value, color="#333333", lw=0.8, ls=":")
    ax1.set_ylabel("smallest Rs")
    ax1.set_ylim(bottom=0)
    ax1.set_title(f"retpred scan: {result.column_label}; Rs target {result.rs_target:g} "
                  "(shaded: robust window)", fontsize=10, loc="left")
    for j, name in enumerate(result.names):
        y = result.rt_min[:, j]
        if not np.isfinite(y).any():
            continue
        ax2.plot(x, y, lw=1.0)
        last = np.flatnonzero(np.isfinite(y))[-1]
        ax2.annotate(name[:18], (x[last], y[last]), fontsize=6, xytext=(2, 0),
                     textcoords="offset points", va="center")
    ax2.set_xlabel(xlabel)
    ax2.set_ylabel("predicted time (min)")
    ax2.text(0.0, -0.16, result.method_text + "\nPredicted; confirm by injection.",
             transform=ax2.transAxes, fontsize=7, va="top")
    fig.tight_layout()
    save_figure(fig, path, force=force, inputs=inputs)


# =============================================================================================
# Command workflow (the CLI parses options and calls run_scan)
# =============================================================================================


def _ramp_values(text: str) -> np.ndarray:
    values = parse_range(text, "--gradient-time", 0.0)
    if values.min() <= 0:
        raise InputError("gradient times must be > 0 min", field="--gradient-time")
    return values


def parse_range(text: str, field_name: str, lo_limit: float = -math.inf,
                hi_limit: float = math.inf) -> np.ndarray:
    """'start:stop:step' (inclusive of stop when it lies on the grid), or 'a,b,c', or one
    number -> sorted values. Raises InputError naming ``field_name``."""
    raw = str(text).strip()
    try:
        if ":" in raw:
            parts = [float(p) for p in raw.split(":")]
            if len(parts) != 3:
                raise ValueError
            start, stop, step = parts
            if not (step > 0 and stop >= start):
                raise InputError(f"'{raw}': need start <= stop and step > 0", field=field_name)
            count = int(math.floor((stop - start) / step + 1e-9)) + 1
            if count > MAX_SCAN_POINTS:
                raise InputError(f"'{raw}' gives {count} points; at most {MAX_SCAN_POINTS}",
                                 field=field_name)
            values = np.round(start + step * np.arange(count), 10)
        else:
            values = np.array([float(p) for p in raw.split(",") if p.strip()])
    except ValueError:
        raise InputError(f"'{raw}' is not a range start:stop:step or a list a,b,c",
                         field=field_name) from None
    if values.size == 0 or not np.all(np.isfinite(values)):
        raise InputError(f"'{raw}' gives no finite value", field=field_name)
    if values.min() < lo_limit or values.max() > hi_limit:
        raise InputError(f"'{raw}' leaves {lo_limit:g}-{hi_limit:g}", field=field_name)
    return np.unique(values)


def run_scan(analytes, method_path, *, ph: str | None = None, gradient_time: str | None = None,
             phases: str | None = None, rs_target: float = DEFAULT_RS_TARGET,
             calibrants=None, calibration=None, model=None, out=None, summary_out=None,
             plot=None, force: bool = False, quiet: bool = False):
    """``retpred scan``: read, scan, write CSV (long, and per-point summary) and PNG, print.

    ``ph`` and ``gradient_time`` are range texts (``2:8:0.1``); give exactly one. ``phases``
    (comma-separated class names, or 'all') turns a pH scan into a phase x pH scan.
    ``calibrants`` (measured standards) or ``calibration`` (a file of ``retpred calibrate``)
    correct every point; they belong to the method's column, so not with ``phases``.
    """
    from rich.table import Table

    from retpred.io import read_smiles_list
    from retpred.model import featurise
    from retpred.workflow import check_outputs, parse_phases, prepared_run

    inputs = [analytes, method_path, model, calibrants, calibration]
    check_outputs([out, summary_out, plot], inputs, force)
    if ph is None and gradient_time is None:
        raise InputError("give --ph or --gradient-time (or both, for a pH x ramp map)")
    if phases is not None and ph is None:
        raise InputError("--phases needs --ph (a phase x pH scan)", field="--phases")
    if phases is not None and gradient_time is not None:
        raise InputError("--phases scans phases over pH at the method's gradient; give "
                         "--gradient-time without --phases", field="--phases")
    if phases is not None and (calibrants is not None or calibration is not None):
        raise InputError("a calibration belongs to the method's column; --phases compares "
                         "other columns, so scan them without it", field="--phases")
    if not (math.isfinite(rs_target) and rs_target > 0):
        raise InputError(f"resolution target must be > 0, got {rs_target:g}", field="--rs-target")
    method, mdl, prep = prepared_run(method_path, model, calibrants, calibration)
    cal = prep.calibration
    smiles, names = read_smiles_list(analytes)
    sol = featurise(smiles)
    phase_result = joint = None
    if ph is not None and gradient_time is not None:
        ramps = _ramp_values(gradient_time)
        joint = ph_gradient_scan(method, mdl, sol, names, parse_range(ph, "--ph", 0.0, 14.0),
                                 ramps, rs_target, calibration=cal)
        results = joint.scans
    elif ph is not None:
        values = parse_range(ph, "--ph", 0.0, 14.0)
        if phases is not None:
            chosen = None if phases.strip().lower() == "all" else parse_phases(phases)
            phase_result = phase_ph_scan(method, mdl, sol, names, values, chosen,
                                         rs_target=rs_target)
            results = list(phase_result.scans.values())
        else:
            results = [ph_scan(method, mdl, sol, names, values, rs_target, calibration=cal)]
    else:
        results = [gradient_time_scan(method, mdl, sol, names, _ramp_values(gradient_time),
                                      rs_target, calibration=cal)]
    if joint is not None:
        long, per = joint_scan_frames(joint)
    else:
        long = pd.concat([scan_to_frame(r) for r in results], ignore_index=True)
        per = pd.concat([scan_summary_frame(r) for r in results], ignore_index=True)
    if out is not None:
        write_csv(long, Path(out), force=force, inputs=inputs)
    if summary_out is not None:
        write_csv(per, Path(summary_out), force=force, inputs=inputs)
    if plot is not None and joint is not None:
        plot_joint_scan(joint, Path(plot), force=force, inputs=inputs)
    elif plot is not None:
        best = results[0] if phase_result is None else \
            phase_result.scans[phase_result.summary.loc[0, "phase"]]
        plot_scan(best, Path(plot), force=force, inputs=inputs)
    if not quiet:
        console = make_console()
        console.print(method_summary(method))
        if cal is not None:
            notes = cal.notes()
            console.print(f"{notes[0]}; fitted at the method's pH and gradient, applied at "
                          "every point")
            for line in notes[1:]:
                console.print(f"[yellow]note:[/] {line}")
        if phase_result is not None:
            t = Table(title="Columns over the pH range (class-median HSM parameters)")
            for c in ("rank", "phase", "best pH", "smallest Rs", "worst pair", "pairs below",
                      "last peak min", f"Rs >= {rs_target:g} over pH"):
                t.add_column(c)
            for r in phase_result.summary.itertuples():
                t.add_row(str(r.rank), r.phase, f"{r.best_ph:g}", f"{r.min_resolution:.2f}",
                          r.worst_pair, str(r.n_unresolved), f"{r.last_rt_min:.2f}",
                          r.robust_windows or "-")
            console.print(t)
            console.print(f"[bold]suggestion:[/] {phase_result.suggestion}")
        if joint is not None:
            t = Table(title="Ramp durations over the pH range (each at its best pH)")
            for c in ("ramp min", "best pH", "smallest Rs", "worst pair", "pairs below",
                      "last peak min", f"Rs >= {rs_target:g} over pH"):
                t.add_column(c)
            for r in joint.summary.itertuples():
                mark = " *" if r.best else ""
                best_ph = f"{r.best_ph:g}" if np.isfinite(r.best_ph) else "-"
                t.add_row(f"{r.gradient_time_min:g}{mark}", best_ph,
                          fmt_value(r.min_resolution), r.worst_pair or "-",
                          str(r.n_unresolved), fmt_value(r.last_rt_min),
                          r.robust_windows or "-")
            console.print(t)
            console.print(f"[bold]suggestion:[/] {joint.suggestion}")
            if joint.scans:
                p = joint.scans[0].pressure
                console.print(f"column pressure up to {p['max_pressure_bar']:.0f} bar of "
                              f"{p['limit_bar']:.0f} bar ({p['limit_source']})")
        singles = results if phase_result is None and joint is None else []
        for r in singles:
            for line in describe_scan(r):
                console.print(line)
        seen = set()
        for r in results:
            for w in r.warnings:
                if w not in seen:
                    seen.add(w)
                    console.print(f"[yellow]warning:[/] {w}")
        console.print(f"[dim]{CAUTION}[/]")
        for p in (out, summary_out, plot):
            if p is not None:
                console.print(f"wrote {p}")
    if joint is not None:
        return joint
    return results if phase_result is None else phase_result
