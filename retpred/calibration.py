"""Calibration of predictions to one system from measured reference compounds.

The correction works in retention space: each calibrant's measured time is turned into its
observed ``log kw`` through the gradient engine with the user's own method (exact inverse),
and a map ``log kw_pred -> log kw_obs`` is fitted. Three candidates, chosen by
leave-one-out error in *time* (the quantity the user measures):

- ``shift``: ``log kw = pred + a`` (one parameter: the system is uniformly more or less
  retentive, e.g. a column batch, an eluent or a dwell difference);
- ``linear``: ``log kw = a + b (pred - pivot)`` with a robust (repeated-median) slope
  bounded to 0.5-2; needs 3 or more calibrants;
- ``monotone``: the linear map plus an isotonic (monotone) correction of its residuals,
  interpolated linearly between calibrants; needs 10 or more.

Warnings: calibrants covering only part of the elution window of the analytes, and a
calibrant whose leave-one-out error is an outlier (over 3 robust standard deviations and
over 0.3 min).
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy.stats import siegelslopes
from sklearn.isotonic import IsotonicRegression

from retpred.errors import InputError

CALIBRATION_FORMAT = 1
SLOPE_BOUNDS = (0.5, 2.0)
MIN_LINEAR = 3
MIN_MONOTONE = 10


@dataclass(frozen=True)
class Calibration:
    kind: str
    offset: float
    slope: float = 1.0
    pivot: float = 0.0
    knots_x: tuple[float, ...] = ()
    knots_y: tuple[float, ...] = ()
    n_calibrants: int = 0
    loo_median_abs_error_min: float = float("nan")
    loo_errors_min: dict = field(default_factory=dict)
    cal_rt_range_min: tuple[float, float] = (float("nan"), float("nan"))
    warnings: tuple[str, ...] = ()
    method_summary: str = ""

    def apply(self, log_kw_pred: np.ndarray) -> np.ndarray:
        """Corrected ``log kw``."""
        x = np.asarray(log_kw_pred, dtype=float)
        y = self.offset + self.slope * (x - self.pivot)
        if self.kind == "monotone" and self.knots_x:
            kx, ky = np.asarray(self.knots_x), np.asarray(self.knots_y)
            inside = np.interp(x, kx, ky)
            # outside the calibrants keep the end corrections constant
            y = y + inside
        return y

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
        if not isinstance(d, dict) or d.get("format") != CALIBRATION_FORMAT:
            raise InputError("not a retpred calibration file of this version", path=path)
        d.pop("format")
        try:
            d["knots_x"] = tuple(float(v) for v in d.get("knots_x", ()))
            d["knots_y"] = tuple(float(v) for v in d.get("knots_y", ()))
            d["cal_rt_range_min"] = tuple(float(v) for v in d.get("cal_rt_range_min", ()))
            d["warnings"] = tuple(str(w) for w in d.get("warnings", ()))
            cal = cls(**d)
            float(cal.offset), float(cal.slope), float(cal.pivot)
        except (TypeError, ValueError) as exc:
            raise InputError(f"calibration file has a bad field ({exc})", path=path) from None
        if cal.kind not in ("shift", "linear", "monotone"):
            raise InputError(f"unknown calibration kind '{cal.kind}'", path=path, field="kind")
        return cal


def _fit(kind: str, x: np.ndarray, y: np.ndarray) -> Calibration:
    if kind == "shift":
        return Calibration(kind="shift", offset=float(np.median(y - x)), pivot=0.0, slope=1.0)
    pivot = float(np.median(x))
    res = siegelslopes(y, x)
    slope = float(np.clip(res.slope, *SLOPE_BOUNDS))
    offset = float(np.median(y - slope * (x - pivot)))
    if kind == "linear":
        return Calibration(kind="linear", offset=offset, slope=slope, pivot=pivot)
    order = np.argsort(x)
    iso = IsotonicRegression(increasing=True).fit(x[order], (y[order]))
    # monotone map = isotonic fit of y; store its difference to the linear map at knots
    kx = x[order]
    ky = iso.predict(kx) - (offset + slope * (kx - pivot))
    # light smoothing of the isotonic steps: 3-point running mean
    if ky.size >= 3:
        ky = np.convolve(np.pad(ky, 1, mode="edge"), np.ones(3) / 3, mode="valid")
    return Calibration(kind="monotone", offset=offset, slope=slope, pivot=pivot,
                       knots_x=tuple(map(float, kx)), knots_y=tuple(map(float, ky)))


def candidate_kinds(n: int) -> list[str]:
    kinds = ["shift"]
    if n >= MIN_LINEAR:
        kinds.append("linear")
    if n >= MIN_MONOTONE:
        kinds.append("monotone")
    return kinds


def fit_calibration(
    pred_log_kw: np.ndarray,
    obs_log_kw: np.ndarray,
    rt_obs_min: np.ndarray,
    rt_of: Callable[[np.ndarray], np.ndarray],
    names: list[str] | None = None,
    method_summary: str = "",
) -> Calibration:
    """Fit and choose a calibration by leave-one-out error in time.

    ``rt_of(log_kw)`` gives the calibrants' times for a vector of their ``log kw`` (with
    their own S, on the user's method).
    """
    x = np.asarray(pred_log_kw, dtype=float)
    y = np.asarray(obs_log_kw, dtype=float)
    t = np.asarray(rt_obs_min, dtype=float)
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(t)
    names = names or [f"calibrant {i + 1}" for i in range(x.size)]
    if ok.sum() < 1:
        raise InputError("no usable calibrant (each needs a valid structure and rt after t0)")
    xi, yi, ti = x[ok], y[ok], t[ok]
    used_names = [n for n, k in zip(names, ok, strict=True) if k]
    n = xi.size
    kinds = candidate_kinds(n)
    loo: dict[str, float] = {}
    loo_resid: dict[str, np.ndarray] = {}
    if n >= 2:
        for kind in kinds:
            pred_lk = np.empty(n)
            for i in range(n):
                keep = np.arange(n) != i
                pred_lk[i] = _fit(kind, xi[keep], yi[keep]).apply(xi[i : i + 1])[0]
            full = np.full(x.size, np.nan)
            full[ok] = pred_lk
            rt_loo = rt_of(full)[ok]
            err = rt_loo - ti
            loo_resid[kind] = err
            loo[kind] = float(np.nanmedian(np.abs(err)))
        best = min(kinds, key=lambda k: (loo[k], kinds.index(k)))
    else:
        best = "shift"
    cal = _fit(best, xi, yi)
    warnings = []
    if best in loo_resid:
        err = loo_resid[best]
        mad = 1.4826 * np.nanmedian(np.abs(err - np.nanmedian(err)))
        for name, e in zip(used_names, err, strict=True):
            if np.isfinite(e) and abs(e) > max(3 * mad, 0.3) and n >= 4:
                warnings.append(
                    f"calibrant '{name}' looks like an outlier "
                    f"(leave-one-out error {e:+.2f} min)"
                )
    dropped = x.size - n
    if dropped:
        warnings.append(f"{dropped} calibrant(s) not usable (bad structure or rt before t0)")
    return Calibration(
        kind=cal.kind, offset=cal.offset, slope=cal.slope, pivot=cal.pivot,
        knots_x=cal.knots_x, knots_y=cal.knots_y, n_calibrants=n,
        loo_median_abs_error_min=loo.get(best, float("nan")),
        loo_errors_min=loo, cal_rt_range_min=(float(ti.min()), float(ti.max())),
        warnings=tuple(warnings), method_summary=method_summary,
    )


def coverage_warning(cal: Calibration, rt_min: np.ndarray) -> str | None:
    """A warning when analytes elute well outside the calibrants' window."""
    lo, hi = cal.cal_rt_range_min
    if not np.isfinite(lo):
        return None
    span = max(hi - lo, 1e-9)
    rt = rt_min[np.isfinite(rt_min)]
    outside = int(np.sum((rt < lo - 0.1 * span) | (rt > hi + 0.1 * span)))
    if outside:
        return (
            f"calibrants cover {lo:.2f}-{hi:.2f} min; {outside} analyte(s) are predicted "
            "outside that window, where the correction is extrapolated"
        )
    return None
