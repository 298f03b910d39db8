"""Daily rate from step times, with a 95 % interval that stays honest.

A straight line ``t_k = a + b k`` is fitted to the step times by least squares after
removing outliers (residuals beyond 5 robust sigmas).  The textbook slope variance
``sigma^2 / sum (k - mean k)^2`` holds only for independent residuals; real step
times have correlated residuals (a drifting rate, logic-regulation jumps, a room
that warms up).  The residuals are therefore modelled as AR(1): the slope variance
is inflated by ``(1 + rho) / (1 - rho)`` and the degrees of freedom are reduced to
the effective number of independent residuals (a standard large-sample correction
for a regression slope with AR(1) errors; from memory).  A Student-t quantile then
gives the half-width.
"""
from __future__ import annotations

import math

import numpy as np

from . import dsp
from ..errors import ParameterError
from ..model import RateEstimate
from ..units import SECONDS_PER_DAY


def _lsq(k: np.ndarray, t: np.ndarray, polarity_term: bool, groups: np.ndarray | None = None):
    """Least squares t = a_g + b k (+ c [k odd]); returns (b, a, c, residuals).

    With ``groups`` every group (a stretch of a log whose phase is not tied to the others)
    has its own intercept; ``a`` is then the first group's.
    """
    km = k.mean()
    if groups is None:
        cols = [np.ones_like(k)]
    else:
        cols = [(groups == g).astype(np.float64) for g in np.unique(groups)]
    ng = len(cols)
    cols.append(k - km)
    if polarity_term:
        cols.append((k % 2) - 0.5)
    A = np.vstack(cols).T
    coef, *_ = np.linalg.lstsq(A, t, rcond=None)
    res = t - A @ coef
    a = coef[0] - coef[ng] * km
    return coef[ng], a, (coef[ng + 1] if polarity_term else 0.0), res


def fit_rate(steps: np.ndarray, times_s: np.ndarray, nominal_interval_s: float, *,
             clock_ppm: float = 0.0, clock_ppm_u95: float = 0.0,
             outlier_sigmas: float = 5.0, polarity_term: bool = True,
             min_ci_s_per_day: float = 0.001, groups: np.ndarray | None = None) -> RateEstimate:
    """Fit the daily rate to step numbers and times.

    Parameters
    ----------
    steps : np.ndarray [shape=(n,), int]
        Grid numbers of the steps (gaps allowed).
    times_s : np.ndarray [shape=(n,)]
        Step times on the recording's time base (s).
    nominal_interval_s : float
        The interval the movement should keep (1 s for most quartz movements).
    clock_ppm : float
        The recording device's sample clock runs fast by this many ppm; corrected here.
    clock_ppm_u95 : float
        95 % half-width of ``clock_ppm``; combined in quadrature with the fit's interval.
    polarity_term : bool
        Fit a constant offset between odd and even steps: the two coil polarities can
        sound a few microseconds apart, which is not timing noise.
    min_ci_s_per_day : float
        Resolution floor of the half-width (0.001 s/day = 1.2e-8).  On clean simulated
        recordings the timing estimator shows sub-nanosecond systematic drifts (its bias
        depends slightly on where a step falls between samples), so narrower intervals
        would claim more than the method delivers.
    groups : np.ndarray [shape=(n,), int], optional
        Stretches whose phase is not tied together (segments of a log joined only by the
        wall clock): each gets its own intercept, and the rate is their common slope.

    Returns
    -------
    RateEstimate
        ``rate_s_per_day`` positive when the movement gains.

    Examples
    --------
    >>> k = np.arange(61)
    >>> est = fit_rate(k, k * (1 - 1e-5), 1.0)   # 10 ppm short intervals
    >>> round(est.rate_s_per_day, 4)
    0.864
    """
    k = np.asarray(steps, dtype=np.float64)
    t = np.asarray(times_s, dtype=np.float64)
    if k.shape != t.shape or k.ndim != 1:
        raise ParameterError("steps and times_s must be 1-D arrays of the same length")
    if len(k) < 3:
        raise ParameterError(f"need at least 3 steps to fit a rate, got {len(k)}")
    if not nominal_interval_s > 0:
        raise ParameterError(f"nominal_interval_s={nominal_interval_s!r}: expected > 0")
    polarity_term = polarity_term and len(np.unique(k % 2)) == 2 and len(k) >= 6
    g = None if groups is None else np.asarray(groups)
    if g is not None and g.shape != k.shape:
        raise ParameterError("groups must have one entry per step")
    if g is not None and len(np.unique(g)) == 1:
        g = None
    keep = np.ones(len(k), dtype=bool)
    for _ in range(3):
        b, a, c, _r = _lsq(k[keep], t[keep], polarity_term, None if g is None else g[keep])
        if g is None:
            r = t - (a + b * k + c * ((k % 2) - 0.5))
        else:
            r = np.empty(len(k))
            r[keep] = _r
            # outside the kept set: against the line of the step's own group
            for gg in np.unique(g[~keep]):
                sel = keep & (g == gg)
                off = float(np.median(t[sel] - b * k[sel] - c * ((k[sel] % 2) - 0.5))) if sel.any() else 0.0
                out = ~keep & (g == gg)
                r[out] = t[out] - (off + b * k[out] + c * ((k[out] % 2) - 0.5))
        med = np.median(r[keep])
        s = 1.4826 * np.median(np.abs(r[keep] - med))
        new = np.abs(r - med) <= max(outlier_sigmas * s, 1e-9)
        if new.sum() < 3 or np.array_equal(new, keep):
            break
        keep = new
    kk, tt = k[keep], t[keep]
    gg = None if g is None else g[keep]
    n = len(kk)
    b, a, c, res = _lsq(kk, tt, polarity_term, gg)
    n_groups = 1 if gg is None else len(np.unique(gg))
    if gg is None:
        sxx = float(np.sum((kk - kk.mean()) ** 2))
        span_steps = float(kk.max() - kk.min()) + 1
    else:
        sxx = span_steps = 0.0
        for v in np.unique(gg):
            kv = kk[gg == v]
            sxx += float(np.sum((kv - kv.mean()) ** 2))
            span_steps += float(kv.max() - kv.min()) + 1
    dof = max(n - 1 - n_groups - int(polarity_term), 1)
    s2 = float(np.sum(res**2)) / dof
    # lag-1 autocorrelation over consecutive steps only (of the same group)
    order = np.argsort(kk, kind="stable") if gg is None else np.lexsort((kk, gg))
    kk_o, res_o = kk[order], res[order]
    same = np.ones(len(kk_o) - 1, dtype=bool) if gg is None else np.diff(gg[order]) == 0
    adj = np.flatnonzero((np.diff(kk_o) == 1) & same)
    rho = 0.0
    if len(adj) >= 8 and s2 > 0:
        rho = float(np.sum(res_o[adj] * res_o[adj + 1]) / np.sum(res_o**2) * n / max(len(adj), 1))
        rho = min(max(rho, -0.5), 0.98)
    infl = (1 + rho) / (1 - rho)
    var_b = s2 / sxx * infl if sxx > 0 else float("inf")
    # Second view: the two noise types of time-and-frequency metrology, white phase noise
    # (each step time scattered independently) and white frequency noise (each interval
    # scattered independently: the phase wanders as a random walk).  From the intervals
    # d_k of consecutive steps: var(d) = 2 s_pm^2 + s_fm^2 and cov(d_k, d_k+1) = -s_pm^2.
    # OLS slope variance: s_pm^2 / Sxx (= 12 s_pm^2 / N^3) + (6/5) s_fm^2 / N (large-N forms; from memory).
    if len(adj) >= 8:
        d = np.diff(res_o)[(np.diff(kk_o) == 1) & same]  # residual intervals: line and polarity removed
        d = d - d.mean()
        c1 = float(np.mean(d[:-1] * d[1:])) if len(d) > 2 else 0.0
        s_pm2 = max(-c1, 0.0)
        vd = float(np.mean(d * d))
        s_fm2 = max(vd - 2 * s_pm2, 0.0)
        if s_fm2 < 3.0 * vd * np.sqrt(2.0 / len(d)):  # not significant: sampling scatter alone
            s_fm2 = 0.0
        var_mix = s_pm2 / sxx + 1.2 * s_fm2 / span_steps
        if var_mix > var_b:
            infl = max(infl, var_mix / (s2 / sxx)) if s2 > 0 and sxx > 0 else infl
            var_b = var_mix
    n_eff = max(3.0, n / infl)
    q = dsp.t_ppf(0.975, max(n_eff - 2, 1))
    se_b = math.sqrt(var_b)
    scale = 1.0 + clock_ppm * 1e-6
    rate = SECONDS_PER_DAY * (nominal_interval_s * scale / b - 1.0)
    # d(rate)/d(b) = -86400 * nominal * scale / b^2
    ci_fit = q * se_b * SECONDS_PER_DAY * nominal_interval_s * scale / b**2
    ci_clock = clock_ppm_u95 * 1e-6 * SECONDS_PER_DAY
    ci = max(math.hypot(ci_fit, ci_clock), min_ci_s_per_day)
    return RateEstimate(
        rate_s_per_day=float(rate),
        ci95_s_per_day=float(ci),
        interval_s=float(b),
        n_steps=int(n),
        n_outliers=int(len(k) - n),
        span_s=float(tt.max() - tt.min()),
        jitter_us=float(math.sqrt(np.mean(res**2)) * 1e6),
        residual_correlation=rho,
        clock_correction_ppm=float(clock_ppm),
        polarity_offset_us=float(c * 1e6),
    )


def residuals_s(steps: np.ndarray, times_s: np.ndarray, *, polarity_term: bool = True) -> np.ndarray:
    """Residuals (s) of the step times from their least-squares line (and polarity offset)."""
    k = np.asarray(steps, dtype=np.float64)
    t = np.asarray(times_s, dtype=np.float64)
    if len(k) < 3:
        return np.zeros(len(k))
    return _lsq(k, t, polarity_term and len(np.unique(k % 2)) == 2 and len(k) >= 6)[3]
