"""The 95 % half-width of the device clock's line from the scatter of its least-delayed readings (pure).

Three readings of the scatter (least squares with the residuals' lag-one correlation, a line
through the means of eighths, a white-plus-wander model fitted to the residuals), the largest
kept, combined with a wander of the least delay slower than the run can show (FLOOR_WANDER_S);
see core/clockfit.py.
"""
from __future__ import annotations

import math

import numpy as np

from . import dsp

#: The least delay also wanders over seconds, which a run of tens of seconds cannot tell from a
#: rate: its line takes the wander up.  Our own measurement (600 s through the PulseAudio null
#: sink on a shared 2-core machine, least delay per second about the run's line): 53 us white,
#: plus 46 us rms correlated over about 7 s.  Every fit carries at least this much wander
#: (rounded up), and more when its own readings show more.
FLOOR_WANDER_S = 50e-6
FLOOR_WANDER_TIME_S = 10.0


def _wander_variance(t: np.ndarray, z: np.ndarray, design: np.ndarray, v: np.ndarray, span: float) -> float:
    """Variance of ``v @ z`` for a noise ``z`` that is white plus a wander correlated over some
    time, both read from the residuals' semivariogram.  The residuals of a fitted line show less
    of a slow wander than there is (the line has taken part of it up), so the model is fitted to
    what its residuals would show, ``(I - H) C (I - H)`` with H the fit's hat matrix: a white part
    and an exponentially correlated part, their sizes by non-negative least squares over lag
    bins, the correlation time the best on a grid (residual maximum likelihood's idea, reduced to
    moments; our own simplification)."""
    from scipy.optimize import nnls

    n = len(t)
    i, j = np.triu_indices(n, 1)
    lag = np.abs(t[j] - t[i])
    if n < 8 or not np.any(lag > 0):
        return float(v @ v) * float(np.var(z))
    half_sq = 0.5 * (z[j] - z[i]) ** 2
    lo = float(np.min(lag[lag > 0]))
    edges = np.geomspace(lo, max(span, lo * 1.01) * 1.0001, 13)
    b = np.clip(np.searchsorted(edges, lag, side="right") - 1, 0, len(edges) - 2)
    counts = np.bincount(b, minlength=len(edges) - 1).astype(float)
    has = counts > 0
    emp = np.bincount(b, weights=half_sq, minlength=len(edges) - 1)[has] / counts[has]
    M = np.eye(n) - design @ np.linalg.pinv(design)
    dt = np.abs(t[:, None] - t[None, :])

    def expected(C):
        R = M @ C @ M
        d = np.diag(R)
        pair = 0.5 * (d[i] + d[j]) - R[i, j]
        return np.bincount(b, weights=pair, minlength=len(edges) - 1)[has] / counts[has]

    white = expected(np.eye(n))
    sw = np.sqrt(counts[has])
    best = None
    for ell in np.geomspace(lo, 2 * span, 12):
        K = np.exp(-dt / ell)
        X = np.column_stack([white, expected(K)]) * sw[:, None]
        coef, res = nnls(X, emp * sw)
        if best is None or res < best[0]:
            best = (res, coef, K)
    _, (a0, a1), K = best
    return max(float(v @ (a0 * np.eye(n) + a1 * K) @ v), 0.0)




def _line_ci(x_pick: np.ndarray, r_pick: np.ndarray, st_pick: np.ndarray, A: np.ndarray, coef: np.ndarray,
             w: np.ndarray, sw: np.ndarray, span: float) -> tuple[float, np.ndarray, np.ndarray]:
    """The 95 % half-width of the line's slope (s per device s) from the picked readings (device
    time ``x_pick``, host minus device time ``r_pick``, stretch ``st_pick``) about the weighted
    fit ``A @ coef``; also the slope as a weighted sum of the picked readings, and their residuals."""
    rp = r_pick - A @ coef
    z = rp * sw
    dof = max(len(x_pick) - A.shape[1], 1)
    s2 = float(z @ z) / dof
    pw = np.linalg.pinv(A * sw[:, None])
    slope_w = pw[0] * sw  # the slope as a weighted sum of the picked readings
    var_c = s2 * float(pw[0] @ pw[0])
    # residuals that follow one another: the variance is too small by (1 + rho) / (1 - rho)
    same = st_pick[1:] == st_pick[:-1]
    if same.sum() >= 8 and s2 > 0:
        rho = float(np.sum(z[1:][same] * z[:-1][same]) / (z @ z))
        if rho > 0:
            rho = min(rho, 0.9)
            var_c *= (1 + rho) / (1 - rho)
    ci_c = dsp.t_ppf(0.975, dof) * math.sqrt(max(var_c, 0.0))
    # low-frequency wander (load, other streams): a line through the residuals' means over eighths
    if len(x_pick) >= 16:
        ci_c = _eighths_ci(x_pick, rp, w, ci_c)
    # a floor that wanders (a busy machine, other streams) moves neighbouring least delays
    # together, over seconds: the slope's variance under a white-plus-wander model of the
    # residuals (see _wander_variance)
    if len(x_pick) >= 16:
        var_g = _wander_variance(x_pick, z, A * sw[:, None], pw[0], span)
        ci_c = max(ci_c, dsp.t_ppf(0.975, 6) * math.sqrt(var_g))
    # the least delay's slow wander, which a short run's own residuals cannot show
    ti = x_pick
    K = FLOOR_WANDER_S ** 2 * np.exp(-np.abs(ti[:, None] - ti[None, :]) / FLOOR_WANDER_TIME_S)
    K[st_pick[:, None] != st_pick[None, :]] = 0.0
    var_wander = max(float(slope_w @ K @ slope_w), 0.0)
    ci_c = math.hypot(ci_c, 1.96 * math.sqrt(var_wander))
    return ci_c, slope_w, rp


def _eighths_ci(x_pick: np.ndarray, rp: np.ndarray, w: np.ndarray, ci_c: float) -> float:
    """``ci_c`` widened, if need be, to the half-width a line through the residuals' weighted
    means over eighths of the picked readings shows."""
    parts = np.array_split(np.arange(len(x_pick)), 8)
    wb = np.array([w[q].sum() for q in parts])
    bx = np.array([np.average(x_pick[q], weights=w[q]) for q in parts])
    by = np.array([np.average(rp[q], weights=w[q]) for q in parts])
    bl = np.polyfit(bx, by, 1, w=np.sqrt(wb))
    br = (by - np.polyval(bl, bx)) * np.sqrt(wb)
    mx = np.average(bx, weights=wb)
    sxx = float(np.sum(wb * (bx - mx) ** 2))
    if sxx > 0:
        se_b = math.sqrt(float(br @ br) / 6 / sxx)
        ci_c = max(ci_c, dsp.t_ppf(0.975, 6) * se_b)
    return ci_c
