"""Peak widths, resolution of neighbours and co-elution risk.

Times in minutes. Relations from ``shared/design/retention-physics.md`` section 6; each
docstring names its equation and source. All functions are vectorised over analytes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr


def peak_sigma_min(t0_min, k_elution, plates, compression=1.0) -> np.ndarray:
    """Gradient peak standard deviation sigma_t = G t0 (1 + k_e) / sqrt(N) (min), k_e the
    retention factor at elution, G an optional gradient compression factor (1 = none).
    With k_e the isocratic k and G = 1 this is the isocratic sigma_t = tR / sqrt(N)."""
    t0 = np.asarray(t0_min, dtype=float)
    k = np.asarray(k_elution, dtype=float)
    n = np.asarray(plates, dtype=float)
    return np.asarray(compression, dtype=float) * t0 * (1.0 + k) / np.sqrt(n)


def gradient_compression_factor(b, k0=np.inf) -> np.ndarray:
    """Gradient band compression factor (Poppe, Paanakker and Bronckhorst, J. Chromatogr. 204
    (1981) 77; in the form of Snyder and Dolan, High-Performance Gradient Elution, 2007):

        G^2 = (1 + p + p^2 / 3) / (1 + p)^2,   p = 2.3 b k0 / (1 + k0)

    b the gradient steepness S Delta-phi t0 / tG (log10 basis), k0 the retention factor at the
    start of the gradient (default: strongly retained, p = 2.3 b). G = 1 at b = 0 and tends to
    1 / sqrt(3) for steep gradients."""
    b = np.asarray(b, dtype=float)
    k0 = np.asarray(k0, dtype=float)
    with np.errstate(divide="ignore"):
        ratio = 1.0 / (1.0 + 1.0 / k0)  # k0 / (1 + k0), exact 1 for k0 = inf
    p = 2.3 * b * ratio
    return np.sqrt((1.0 + p + p**2 / 3.0) / (1.0 + p) ** 2)


def resolution(t1_min, t2_min, sigma1_min, sigma2_min) -> np.ndarray:
    """Resolution Rs = (t2 - t1) / (2 (sigma1 + sigma2)) (the 4-sigma base-width definition;
    Rs >= 1.5 baseline separation, common practice)."""
    t1 = np.asarray(t1_min, dtype=float)
    t2 = np.asarray(t2_min, dtype=float)
    s = np.asarray(sigma1_min, dtype=float) + np.asarray(sigma2_min, dtype=float)
    return (t2 - t1) / (2.0 * s)


def unresolved_probability(
    delta_t_min, sigma1_min, sigma2_min, delta_sd_min, rs_threshold=1.5
) -> np.ndarray:
    """Probability that two peaks are resolved worse than ``rs_threshold``.

    With the true spacing dt ~ Normal(delta_t, delta_sd) and the window w = 2 Rs_thr (s1 + s2):
    P(|dt| < w) = Phi((w - delta_t) / sd) - Phi((-w - delta_t) / sd). A zero sd gives the
    indicator |delta_t| < w."""
    d = np.asarray(delta_t_min, dtype=float)
    w = 2.0 * rs_threshold * (np.asarray(sigma1_min, float) + np.asarray(sigma2_min, float))
    sd = np.asarray(delta_sd_min, dtype=float)
    d, w, sd = np.broadcast_arrays(d, w, sd)
    out = np.where(np.abs(d) < w, 1.0, 0.0)
    pos = sd > 0
    safe = np.where(pos, sd, 1.0)
    prob = ndtr((w - d) / safe) - ndtr((-w - d) / safe)
    out = np.where(pos, prob, out)
    return np.where(np.isfinite(d) & np.isfinite(w) & np.isfinite(sd), out, np.nan)



#: Largest rank distance to a partner considered by :func:`any_coelution_probability`.
MAX_PARTNER_OFFSET = 200


def any_coelution_probability(rt_min, sigma_min, rt_sd_min, rho=0.0, rs_threshold=1.5,
                              max_offset=MAX_PARTNER_OFFSET) -> np.ndarray:
    """Probability that each analyte is resolved worse than ``rs_threshold`` from at least
    one other analyte of the list, treating its pairs as independent:

        P_i = 1 - prod_j (1 - p_ij),

    p_ij the pair probability of :func:`unresolved_probability` with the spacing sd
    sqrt(s_i^2 + s_j^2 - 2 rho s_i s_j) (s the time-error sds). Unlike the risk with the two
    predicted neighbours only, a partner two or more places away counts too, as it must when
    the time errors are as large as the spacings (the usual case before calibration).

    Partners are taken by rank distance in the sorted times: the neighbours always, then up
    to ``max_offset`` places on each side while a partner can still be within reach
    (spacing under w + 9 sd with the largest window and sd of the list; beyond that
    p_ij < 1e-18). Rows with a non-finite time, and rows without any finite pair
    probability, give NaN."""
    rt = np.asarray(rt_min, dtype=float)
    n = rt.shape[0]
    sigma = np.broadcast_to(np.asarray(sigma_min, dtype=float), (n,))
    sd = np.broadcast_to(np.asarray(rt_sd_min, dtype=float), (n,))
    out = np.full(n, np.nan)
    order = np.flatnonzero(np.isfinite(rt))
    order = order[np.argsort(rt[order], kind="stable")]
    if order.size < 2:
        return out
    t, sg, s = rt[order], sigma[order], sd[order]
    fin = np.isfinite(sg) & np.isfinite(s)
    sg_max = float(np.max(sg[fin])) if fin.any() else 0.0
    s_max = float(np.max(s[fin])) if fin.any() else 0.0
    reach = 2.0 * rs_threshold * (sg + sg_max) + 9.0 * (s + s_max)
    log_keep = np.zeros(order.size)
    seen = np.zeros(order.size, dtype=bool)
    sure = np.zeros(order.size, dtype=bool)  # a pair probability of exactly 1
    m = order.size
    for k in range(1, min(max_offset, m - 1) + 1):
        gap = t[k:] - t[:m - k]
        if k > 1 and not np.any(gap < reach[:m - k]):
            break  # the times are sorted: no partner further away is within reach either
        sa, sb = s[:m - k], s[k:]
        pair_sd = np.sqrt(np.maximum(sa ** 2 + sb ** 2 - 2 * rho * sa * sb, 0))
        p = unresolved_probability(gap, sg[:m - k], sg[k:], pair_sd, rs_threshold)
        ok = np.isfinite(p)
        term = np.log1p(-np.minimum(np.where(ok, p, 0.0), 1.0 - 1e-16))
        log_keep[:m - k] += term
        log_keep[k:] += term
        seen[:m - k] |= ok
        seen[k:] |= ok
        sure[:m - k] |= p >= 1.0
        sure[k:] |= p >= 1.0
    out[order] = np.where(seen, np.where(sure, 1.0, 0.0 - np.expm1(log_keep)), np.nan)
    return out


def recalibrate_risk(p, a: float = 0.0, b: float = 1.0) -> np.ndarray:
    """Logistic recalibration p' = 1 / (1 + exp(-(a + b logit p))) (Platt, in: Advances in
    Large Margin Classifiers, MIT Press 1999), p clipped to [1e-6, 1 - 1e-6]; a = 0, b = 1
    leaves p unchanged. NaN stays NaN."""
    from scipy.special import expit, logit

    p = np.asarray(p, dtype=float)
    if a == 0.0 and b == 1.0:
        return p.copy()
    return expit(a + b * logit(np.clip(p, 1e-6, 1 - 1e-6)))


#: Standard normal 95th percentile: a central 90 % interval spans +/- Z90 sd.
Z90 = 1.6448536269514722


def time_error_sd_min(rt_min, rt_low_min, rt_high_min, scale=1.0) -> np.ndarray:
    """Time-error sd from a central 90 % prediction interval, ``scale`` x half-width / Z90
    (normal errors). Where the upper end is open (it would not elute within the run), the
    lower half-width ``rt - rt_low`` stands in for the half-width."""
    rt = np.asarray(rt_min, dtype=float)
    lo = np.asarray(rt_low_min, dtype=float)
    hi = np.asarray(rt_high_min, dtype=float)
    half = np.where(np.isfinite(hi), (hi - lo) / 2.0, rt - lo)
    return scale * half / Z90


@dataclass
class PairTable:
    """Neighbour pairs of a predicted chromatogram. Arrays are indexed like the input
    analytes except ``order``.

    order: indices of the usable analytes (finite rt) in elution order.
    resolution_next: Rs to the next-eluting analyte; NaN for the last and unusable rows.
    coelution_risk: largest unresolved probability with either neighbour; NaN if none.
    coelutes_with: names of neighbours with risk >= 0.5 or Rs < threshold, joined by ';'.
    """

    order: np.ndarray
    resolution_next: np.ndarray
    coelution_risk: np.ndarray
    coelutes_with: list[str]


def neighbour_pairs(rt_min, sigma_min, names, rt_sd_min, rs_threshold=1.5, rho=0.0) -> PairTable:
    """Resolution and co-elution risk of each analyte with its elution neighbours.

    ``rt_sd_min`` is each analyte's time-error standard deviation (scalar or per analyte),
    ``rho`` the correlation of neighbours' errors: the spacing's sd is
    sqrt(s1^2 + s2^2 - 2 rho s1 s2). Rows with a NaN time (failed molecules) are skipped and
    get NaN / ''.
    """
    rt = np.asarray(rt_min, dtype=float)
    n = rt.shape[0]
    sigma = np.broadcast_to(np.asarray(sigma_min, dtype=float), (n,))
    sd = np.broadcast_to(np.asarray(rt_sd_min, dtype=float), (n,))
    names = [str(x) for x in names]
    if len(names) != n:
        raise ValueError(f"names has {len(names)} entries, rt_min has {n}")
    valid = np.flatnonzero(np.isfinite(rt))
    order = valid[np.argsort(rt[valid], kind="stable")]
    res_next = np.full(n, np.nan)
    risk = np.full(n, np.nan)
    partners: list[list[str]] = [[] for _ in range(n)]
    if order.size >= 2:
        i1, i2 = order[:-1], order[1:]
        rs = resolution(rt[i1], rt[i2], sigma[i1], sigma[i2])
        pair_sd = np.sqrt(np.maximum(sd[i1] ** 2 + sd[i2] ** 2 - 2 * rho * sd[i1] * sd[i2], 0))
        p = unresolved_probability(rt[i2] - rt[i1], sigma[i1], sigma[i2], pair_sd, rs_threshold)
        res_next[i1] = rs
        for a, b, r, pr in zip(i1, i2, rs, p, strict=True):
            for x in (a, b):
                if np.isfinite(pr):
                    risk[x] = pr if np.isnan(risk[x]) else max(risk[x], pr)
            if (np.isfinite(pr) and pr >= 0.5) or (np.isfinite(r) and r < rs_threshold):
                partners[a].append(names[b])
                partners[b].append(names[a])
    return PairTable(
        order=order,
        resolution_next=res_next,
        coelution_risk=risk,
        coelutes_with=[";".join(p) for p in partners],
    )


def simulate_chromatogram(rt_min, sigma_min, heights, t_grid_min) -> np.ndarray:
    """Detector trace as a sum of Gaussian peaks h exp(-(t - tR)^2 / (2 sigma^2)); rows with
    a non-finite time, width or height are left out."""
    rt = np.asarray(rt_min, dtype=float).ravel()
    sigma = np.broadcast_to(np.asarray(sigma_min, dtype=float), rt.shape)
    h = np.broadcast_to(np.asarray(heights, dtype=float), rt.shape)
    ok = np.isfinite(rt) & np.isfinite(sigma) & np.isfinite(h) & (sigma > 0)
    t = np.asarray(t_grid_min, dtype=float)
    z = (t[..., None] - rt[ok]) / sigma[ok]
    return (h[ok] * np.exp(-0.5 * z**2)).sum(axis=-1)
