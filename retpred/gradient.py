"""Gradient-elution engine: retention parameters -> retention times for a real method.

The solute obeys the linear-solvent-strength (LSS) relation
``log10 k = log10 kw - S * phi`` and the fundamental equation of gradient elution,
written over delivered volume so that flow changes are exact (Snyder and Dolan,
*High-Performance Gradient Elution*, 2007, ch. 9; ``retention-physics.md`` section 3)::

    integral_0^{V*} dV / k(phi_in(V)) = V0,      V_R = V* + V0,

where ``phi_in(V)`` is the organic fraction reaching the column inlet after a volume ``V``
has been pumped (the pump program delayed by the dwell volume ``VD``) and ``V0`` is the
column dead volume. Within a segment where ``phi_in`` is linear in ``V`` the integral of
``10^(S phi)`` has a closed form, so the engine is exact for LSS solutes, not a time-stepped
approximation, and it is vectorised over molecules (a loop over a few segments only).
Segments whose flow changes are split into short pieces that are linear in volume.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

LN10 = np.log(10.0)

STATUS_OK = "ok"
STATUS_HOLD = "eluted during initial hold"
STATUS_BEFORE_GRADIENT = "eluted before gradient reached column"
STATUS_AFTER_END = "eluted after program end"
STATUS_NOT_ELUTED = "not eluted"
STATUS_INVALID = "no retention parameters"

#: A solute whose predicted time exceeds this multiple of the program length is reported as
#: not eluted (no time given) rather than with an extrapolated time nobody would wait for.
NOT_ELUTED_FACTOR = 3.0

#: Isocratic runs have no program end: retention factors above this count as not eluted
#: (k > 100 would mean a run of over 100 dead times; common practice keeps k below ~20).
ISOCRATIC_MAX_K = 100.0

#: Pieces per program segment whose flow changes (the composition is linear in time there,
#: not in volume; 64 pieces keep the error far below 0.01 %).
_FLOW_PIECES = 64


@dataclass(frozen=True)
class ElutionProgram:
    """Organic fraction at the column inlet as a piecewise-linear function of volume.

    Attributes
    ----------
    volume_ml, phi:
        Breakpoints of ``phi_in(V)`` (inlet composition, volume fraction 0-1) against the
        delivered volume; constant at ``phi[-1]`` beyond the last breakpoint.
    pump_time_min, pump_volume_ml, pump_flow_ml_min, pump_phi:
        The pump program's breakpoints: delivered volume, flow (linear in time between
        them, constant after) and composition leaving the mixer.
    dead_volume_ml:
        Column dead volume V0 = t0 * F.
    dwell_volume_ml:
        Volume between the mixing point and the column inlet.
    hold_volume_ml:
        Pumped volume at the end of the initial isocratic hold (0 for none).
    program_end_min:
        Last time of the pump program.
    """

    volume_ml: np.ndarray
    phi: np.ndarray
    pump_time_min: np.ndarray
    pump_volume_ml: np.ndarray
    pump_flow_ml_min: np.ndarray
    pump_phi: np.ndarray
    dead_volume_ml: float
    dwell_volume_ml: float
    hold_volume_ml: float
    program_end_min: float

    @property
    def isocratic(self) -> bool:
        return bool(np.all(self.phi == self.phi[0]))

    def time_at_volume(self, volume_ml: np.ndarray) -> np.ndarray:
        """Clock time (min) at which ``volume_ml`` has been delivered."""
        return _time_at_volume(self, np.asarray(volume_ml, dtype=float))

    def volume_at_time(self, time_min: np.ndarray) -> np.ndarray:
        """Delivered volume (mL) at clock time ``time_min``."""
        return _volume_at_time(self, np.asarray(time_min, dtype=float))

    def phi_inlet(self, volume_ml: np.ndarray) -> np.ndarray:
        """Inlet organic fraction after ``volume_ml`` has been pumped."""
        return np.interp(volume_ml, self.volume_ml, self.phi)

    def phi_outlet(self, time_min: np.ndarray) -> np.ndarray:
        """Organic fraction leaving the column (reaching the detector) at clock time
        ``time_min``: the inlet composition one dead volume earlier,
        ``phi_out(t) = phi_in(V(t) - V0)`` (an unretained solvent front; retention-physics.md
        section 3 for the delays)."""
        v = self.volume_at_time(np.asarray(time_min, dtype=float)) - self.dead_volume_ml
        return self.phi_inlet(v)

    @property
    def dead_time_min(self) -> float:
        """t0 at the initial flow."""
        return self.dead_volume_ml / float(self.pump_flow_ml_min[0])


@dataclass(frozen=True)
class Elution:
    """Result of the engine, one entry per molecule.

    ``rt_min`` is NaN where the status is ``not eluted`` or the parameters were invalid.
    ``phi_elution`` and ``k_elution`` are the composition and retention factor at the
    column outlet when the band leaves it; ``b_elution`` the local gradient steepness
    ``b = S * dphi/dV * V0`` there (0 while isocratic).
    """

    rt_min: np.ndarray
    phi_elution: np.ndarray
    k_elution: np.ndarray
    b_elution: np.ndarray
    status: np.ndarray


def build_program(
    time_min,
    phi,
    flow_ml_min,
    *,
    dead_time_min: float,
    dwell_volume_ml: float,
) -> ElutionProgram:
    """Build the inlet-composition profile of a pump program.

    ``time_min``, ``phi`` and ``flow_ml_min`` are the pump breakpoints (linear between).
    ``dead_time_min`` is t0 at the initial flow, so V0 = t0 * F(0).
    """
    t = np.asarray(time_min, dtype=float)
    p = np.asarray(phi, dtype=float)
    f = np.asarray(flow_ml_min, dtype=float)
    if t.ndim != 1 or t.size == 0 or p.shape != t.shape or f.shape != t.shape:
        raise ValueError("time_min, phi and flow_ml_min must be 1-D arrays of one length")
    if np.any(np.diff(t) < 0):
        raise ValueError("program times must not decrease")
    if np.any(f <= 0) or not np.all(np.isfinite(f)):
        raise ValueError("flow must be positive")
    if dead_time_min <= 0 or dwell_volume_ml < 0:
        raise ValueError("dead time must be > 0 and dwell volume >= 0")

    # Pump volume at each breakpoint: flow linear in time -> trapezoid rule is exact.
    pump_v = np.concatenate([[0.0], np.cumsum(0.5 * (f[1:] + f[:-1]) * np.diff(t))])

    # Composition against pumped volume; split flow-changing segments into pieces.
    vols = [0.0]
    phis = [p[0]]
    for j in range(t.size - 1):
        dt = t[j + 1] - t[j]
        if dt == 0.0:  # a step: composition jumps at this volume
            vols.append(pump_v[j + 1])
            phis.append(p[j + 1])
            continue
        if f[j] == f[j + 1] or p[j] == p[j + 1]:
            vols.append(pump_v[j + 1])
            phis.append(p[j + 1])
            continue
        frac = np.linspace(0.0, 1.0, _FLOW_PIECES + 1)[1:]
        tt = frac * dt
        vv = pump_v[j] + f[j] * tt + 0.5 * (f[j + 1] - f[j]) / dt * tt**2
        vols.extend(vv.tolist())
        phis.extend((p[j] + (p[j + 1] - p[j]) * frac).tolist())
    vols_a = np.asarray(vols)
    phis_a = np.asarray(phis)

    # Dwell delay: the inlet sees the initial composition for the first VD.
    inlet_v = np.concatenate([[0.0], vols_a + dwell_volume_ml])
    inlet_p = np.concatenate([[p[0]], phis_a])
    if dwell_volume_ml == 0.0:
        inlet_v, inlet_p = inlet_v[1:], inlet_p[1:]

    changed = np.nonzero(p != p[0])[0]
    hold_v = float(pump_v[changed[0] - 1]) if changed.size else 0.0
    return ElutionProgram(
        volume_ml=inlet_v,
        phi=inlet_p,
        pump_time_min=t,
        pump_volume_ml=pump_v,
        pump_flow_ml_min=f,
        pump_phi=p,
        dead_volume_ml=float(dead_time_min * f[0]),
        dwell_volume_ml=float(dwell_volume_ml),
        hold_volume_ml=hold_v,
        program_end_min=float(t[-1]),
    )


def program_from_method(method, dead_time_min: float | None = None) -> ElutionProgram:
    """The :class:`ElutionProgram` of a :class:`retpred.method.Method`.

    The dead time is the method's own, else estimated from the column geometry
    (``retpred.column.dead_time_min``).
    """
    times, phis, flows = method.phi_program()
    if dead_time_min is None:
        from retpred.column import dead_time_min as _geometry_t0

        dead_time_min = _geometry_t0(method.column, flows[0])
    return build_program(
        times, phis, flows, dead_time_min=dead_time_min, dwell_volume_ml=method.dwell_volume_ml
    )


def _segment_integrals(s: np.ndarray, prog: ElutionProgram) -> tuple[np.ndarray, np.ndarray]:
    """J increments ``integral 10^(S phi_in(V)) dV`` over each profile segment, shape (n, m).

    Closed form for a linear segment phi = phi_a + g (V - V_a):
    ``10^(S phi_a) (10^(S g dV) - 1) / (S g ln 10)``, and ``dV 10^(S phi_a)`` when g S = 0.
    """
    v = prog.volume_ml
    p = prog.phi
    dv = np.diff(v)
    g = np.where(dv > 0, np.diff(p) / np.where(dv > 0, dv, 1.0), 0.0)
    s_col = s[:, None]
    x = s_col * g[None, :] * dv[None, :] * LN10  # S g dV ln10
    base = np.exp(s_col * p[None, :-1] * LN10)
    # expm1(x)/x -> 1 as x -> 0; use a safe ratio
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(np.abs(x) > 1e-12, np.expm1(x) / np.where(x == 0, 1.0, x), 1.0)
    return base * dv[None, :] * ratio, g


def integral_to_volume(s: np.ndarray, volume_ml: np.ndarray, prog: ElutionProgram) -> np.ndarray:
    """``J(V) = integral_0^V 10^(S phi_in(V')) dV'`` for each molecule's own upper limit."""
    s = np.asarray(s, dtype=float)
    vmax = np.asarray(volume_ml, dtype=float)
    v = prog.volume_ml
    p = prog.phi
    total = np.zeros_like(vmax)
    for j in range(v.size - 1):
        va, vb = v[j], v[j + 1]
        if vb <= va:
            continue
        upper = np.clip(vmax, va, vb)
        seg = upper - va
        g = (p[j + 1] - p[j]) / (vb - va)
        x = s * g * seg * LN10
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            ratio = np.where(np.abs(x) > 1e-12, np.expm1(x) / np.where(x == 0, 1.0, x), 1.0)
        total += np.exp(s * p[j] * LN10) * seg * ratio
    tail = np.maximum(vmax - v[-1], 0.0)
    total += np.exp(s * p[-1] * LN10) * tail
    return total


def elute(log_kw, s, prog: ElutionProgram) -> Elution:
    """Retention times of LSS solutes (``log10 k = log_kw - s * phi``) under ``prog``.

    Solves ``J(V*) = kw * V0`` segment by segment; within the segment that holds the root,
    ``V* - V_a = log10(1 + R S g ln10 / 10^(S phi_a)) / (S g)`` (``R / 10^(S phi_a)`` when
    ``g S = 0``) with ``R`` the part of ``kw V0`` left at the segment start.
    """
    log_kw = np.atleast_1d(np.asarray(log_kw, dtype=float))
    s = np.broadcast_to(np.asarray(s, dtype=float), log_kw.shape).astype(float)
    n = log_kw.size
    valid = np.isfinite(log_kw) & np.isfinite(s) & (s >= 0)
    lk = np.where(valid, log_kw, 0.0)
    ss = np.where(valid, s, 0.0)

    v = prog.volume_ml
    p = prog.phi
    target = np.exp(lk * LN10) * prog.dead_volume_ml  # kw * V0
    incr, g = _segment_integrals(ss, prog)
    cum = np.concatenate([np.zeros((n, 1)), np.cumsum(incr, axis=1)], axis=1)

    # First segment whose cumulative integral reaches the target (m = after the profile).
    reached = cum[:, 1:] >= target[:, None]
    m = incr.shape[1]
    if m:
        seg = np.where(reached.any(axis=1), reached.argmax(axis=1), m)
    else:
        seg = np.zeros(n, dtype=int)
    rows = np.arange(n)
    remaining = target - cum[rows, seg]
    remaining = np.maximum(remaining, 0.0)

    seg_c = np.minimum(seg, max(m - 1, 0))
    in_profile = seg < m
    va = np.where(in_profile, v[:-1][seg_c] if m else 0.0, v[-1])
    pa = np.where(in_profile, p[:-1][seg_c] if m else p[-1], p[-1])
    ga = np.where(in_profile, g[seg_c] if m else 0.0, 0.0)
    base = np.exp(ss * pa * LN10)
    sg = ss * ga
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        arg = remaining * sg * LN10 / base
        dv_slope = np.log1p(arg) / (sg * LN10)
    dv_flat = remaining / base
    dv_root = np.where(np.abs(sg) > 1e-12, dv_slope, dv_flat)
    if m:
        seg_len = np.diff(v)[seg_c]
        dv_root = np.where(in_profile, np.clip(dv_root, 0.0, seg_len), dv_root)
    v_star = va + dv_root
    v_r = v_star + prog.dead_volume_ml
    rt = prog.time_at_volume(v_r)

    phi_e = prog.phi_inlet(v_star)
    k_e = np.exp((lk - ss * phi_e) * LN10)
    b_e = ss * ga * prog.dead_volume_ml

    status = np.full(n, STATUS_OK, dtype=object)
    if not prog.isocratic:
        front_v = prog.hold_volume_ml + prog.dwell_volume_ml
        status[v_star <= front_v] = STATUS_BEFORE_GRADIENT
        status[v_star <= prog.hold_volume_ml] = STATUS_HOLD
        status[rt > prog.program_end_min] = STATUS_AFTER_END
    if prog.isocratic:
        limit = prog.dead_time_min * (1.0 + ISOCRATIC_MAX_K)
    else:
        limit = NOT_ELUTED_FACTOR * max(prog.program_end_min, prog.dead_time_min * 10.0)
    never = ~np.isfinite(rt) | (rt > limit)
    status[never] = STATUS_NOT_ELUTED
    status[~valid] = STATUS_INVALID
    bad = never | ~valid
    rt = np.where(bad, np.nan, rt)
    return Elution(
        rt_min=rt,
        phi_elution=np.where(bad, np.nan, phi_e),
        k_elution=np.where(bad, np.nan, k_e),
        b_elution=np.where(bad, np.nan, b_e),
        status=status.astype(str),
    )


def log_kw_from_rt(rt_min, s, prog: ElutionProgram) -> np.ndarray:
    """Exact inverse of :func:`elute`: the ``log10 kw`` that elutes at ``rt_min`` given ``S``.

    ``kw = J(V_R - V0) / V0``; NaN where the time is not after the dead time.
    """
    rt = np.atleast_1d(np.asarray(rt_min, dtype=float))
    s = np.broadcast_to(np.asarray(s, dtype=float), rt.shape).astype(float)
    v_star = prog.volume_at_time(rt) - prog.dead_volume_ml
    ok = np.isfinite(v_star) & (v_star > 0) & np.isfinite(s)
    j = integral_to_volume(np.where(ok, s, 0.0), np.where(ok, v_star, 0.0), prog)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.log10(j / prog.dead_volume_ml)
    return np.where(ok, out, np.nan)


def _volume_at_time(prog: ElutionProgram, t: np.ndarray) -> np.ndarray:
    tp, vp, fp = prog.pump_time_min, prog.pump_volume_ml, prog.pump_flow_ml_min
    out = np.empty_like(t)
    after = t >= tp[-1]
    out[after] = vp[-1] + fp[-1] * (t[after] - tp[-1])
    inside = ~after
    ti = np.clip(t[inside], tp[0], tp[-1])
    j = np.clip(np.searchsorted(tp, ti, side="right") - 1, 0, max(tp.size - 2, 0))
    if tp.size == 1:
        out[inside] = fp[0] * ti
        return out
    dt_seg = tp[j + 1] - tp[j]
    slope = np.where(dt_seg > 0, (fp[j + 1] - fp[j]) / np.where(dt_seg > 0, dt_seg, 1.0), 0.0)
    tau = ti - tp[j]
    out[inside] = vp[j] + fp[j] * tau + 0.5 * slope * tau**2
    return out


def _time_at_volume(prog: ElutionProgram, v: np.ndarray) -> np.ndarray:
    tp, vp, fp = prog.pump_time_min, prog.pump_volume_ml, prog.pump_flow_ml_min
    out = np.full_like(v, np.nan)
    fin = np.isfinite(v)
    after = fin & (v >= vp[-1])
    out[after] = tp[-1] + (v[after] - vp[-1]) / fp[-1]
    inside = fin & ~after
    if tp.size == 1 or not inside.any():
        return out
    vi = np.maximum(v[inside], 0.0)
    j = np.clip(np.searchsorted(vp, vi, side="right") - 1, 0, tp.size - 2)
    # skip zero-length (step) segments: searchsorted 'right' already lands past them
    dt_seg = tp[j + 1] - tp[j]
    slope = np.where(dt_seg > 0, (fp[j + 1] - fp[j]) / np.where(dt_seg > 0, dt_seg, 1.0), 0.0)
    dv = vi - vp[j]
    f0 = fp[j]
    # solve f0 tau + slope tau^2 / 2 = dv for tau >= 0 (stable form of the quadratic root)
    disc = np.sqrt(np.maximum(f0**2 + 2.0 * slope * dv, 0.0))
    tau = np.where(np.abs(slope) > 1e-15, 2.0 * dv / (f0 + disc), dv / f0)
    out[inside] = tp[j] + tau
    return out
