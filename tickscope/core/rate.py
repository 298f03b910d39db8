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


#: the batch-means view of fit_rate replaces the models' slope variance when it exceeds it by
#: this factor: the 99th percentile of chi2(6)/6 = 16.81/6 (8 batch means, a line through them;
#: the chi-squared quantile from memory of the standard tables)
BATCH_VIEW_F = 2.80
#: Stretches averaged for the batch-means view of the rate's interval.
BATCHES = 8


def _lsq(k: np.ndarray, t: np.ndarray, polarity_term: bool, groups: np.ndarray | None = None,
         sw: np.ndarray | None = None):
    """Least squares t = a_g + b k (+ c [k odd]); returns (b, a, c, residuals).

    With ``groups`` every group (a stretch of a log whose phase is not tied to the others)
    has its own intercept; ``a`` is then the first group's.  With ``sw`` (square roots of
    weights) the rows are weighted; the residuals returned are not.
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
    if sw is None:
        coef, *_ = np.linalg.lstsq(A, t, rcond=None)
    else:
        coef, *_ = np.linalg.lstsq(A * sw[:, None], t * sw, rcond=None)
    res = t - A @ coef
    a = coef[0] - coef[ng] * km
    return coef[ng], a, (coef[ng + 1] if polarity_term else 0.0), res


def _inliers(k: np.ndarray, t: np.ndarray, polarity_term: bool, g: np.ndarray | None = None,
             sw: np.ndarray | None = None, sigmas: float = 5.0, min_keep: int = 3) -> np.ndarray:
    """Steps within ``sigmas`` robust sigmas (MAD) of the line, refitted on the kept steps up to
    three times; stops before keeping fewer than ``min_keep``.  With groups, a step left out is
    measured against its own group's line; with ``sw``, residuals are in units of each step's scatter."""
    keep = np.ones(len(k), dtype=bool)
    for _ in range(3):
        b, a, c, _r = _lsq(k[keep], t[keep], polarity_term, None if g is None else g[keep],
                           None if sw is None else sw[keep])
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
        if sw is not None:
            r = r * sw
        med = np.median(r[keep])
        s = 1.4826 * np.median(np.abs(r[keep] - med))
        new = np.abs(r - med) <= max(sigmas * s, 1e-9)
        if new.sum() < min_keep or np.array_equal(new, keep):
            break
        keep = new
    return keep


def _diff_sigma(res: np.ndarray) -> float:
    """The scatter of residuals (in step order) from their successive differences (MAD): blind to
    level shifts and slow bends, which move few differences."""
    return 1.4826 * float(np.median(np.abs(np.diff(res)))) / math.sqrt(2.0)


def _one_polarity_groups(k: np.ndarray, g: np.ndarray) -> bool:
    """Whether every group holds steps of one polarity only (its intercept then holds the offset)."""
    return all(len(np.unique(k[g == v] % 2)) == 1 for v in np.unique(g))


def _checked(steps, times_s, nominal_interval_s: float, polarity_term: bool, groups, weights):
    """fit_rate's inputs as arrays, checked: (k, t, polarity_term, groups or None, sqrt weights or None)."""
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
    if g is not None and polarity_term and _one_polarity_groups(k, g):
        polarity_term = False  # each group's intercept holds its polarity's offset
    if weights is not None:
        w = np.asarray(weights, dtype=np.float64)
        if w.shape != k.shape or not np.all(w > 0):
            raise ParameterError("weights must be positive, one per step")
        sw_all = np.sqrt(w / w.mean())
    else:
        sw_all = None
    return k, t, polarity_term, g, sw_all


def fit_rate(steps: np.ndarray, times_s: np.ndarray, nominal_interval_s: float, *,
             clock_ppm: float = 0.0, clock_ppm_u95: float = 0.0,
             outlier_sigmas: float = 5.0, polarity_term: bool = True,
             min_ci_s_per_day: float = 0.001, groups: np.ndarray | None = None,
             weights: np.ndarray | None = None) -> RateEstimate:
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
    weights : np.ndarray [shape=(n,)], optional
        Relative weights of the steps (inverse variances: a stretch a lossy codec timed more
        roughly counts less).  The interval is then that of the weighted fit.

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
    k, t, polarity_term, g, sw_all = _checked(steps, times_s, nominal_interval_s, polarity_term, groups, weights)
    keep = _inliers(k, t, polarity_term, g, sw_all, outlier_sigmas, min_keep=3)
    kk, tt = k[keep], t[keep]
    gg = None if g is None else g[keep]
    n = len(kk)
    sw = None if sw_all is None else sw_all[keep]
    b, a, c, res_t = _lsq(kk, tt, polarity_term, gg, sw)
    res = res_t if sw is None else res_t * sw  # the statistics below are of the weighted residuals
    n_groups = 1 if gg is None else len(np.unique(gg))
    sxx, span_steps = _spread_of_steps(kk, gg, sw)
    dof = max(n - 1 - n_groups - int(polarity_term), 1)
    s2 = float(np.sum(res**2)) / dof
    var_b, n_eff, rho = _slope_variance(kk, gg, sw, res, res_t, s2, sxx, span_steps)
    rate, ci = _rate_and_ci(b, var_b, n_eff, nominal_interval_s, clock_ppm, clock_ppm_u95, min_ci_s_per_day)
    return RateEstimate(
        rate_s_per_day=float(rate),
        ci95_s_per_day=float(ci),
        interval_s=float(b),
        n_steps=int(n),
        n_outliers=int(len(k) - n),
        span_s=float(tt.max() - tt.min()),
        jitter_us=float(math.sqrt(np.mean(res_t**2)) * 1e6),
        residual_correlation=rho,
        clock_correction_ppm=float(clock_ppm),
        polarity_offset_us=float(c * 1e6),
    )


def _slope_variance(kk: np.ndarray, gg: np.ndarray | None, sw: np.ndarray | None, res: np.ndarray,
                    res_t: np.ndarray, s2: float, sxx: float, span_steps: float) -> tuple[float, float, float]:
    """The variance of the fitted interval (s^2), the steps' effective number and the residuals'
    lag-one correlation: white residuals inflated by their correlation, or the phase-plus-frequency
    view, or the batch means, whichever is the largest where it applies."""
    n = len(kk)
    order = np.argsort(kk, kind="stable") if gg is None else np.lexsort((kk, gg))
    kk_o, res_o = kk[order], res[order]
    same = np.ones(len(kk_o) - 1, dtype=bool) if gg is None else np.diff(gg[order]) == 0
    consecutive = (np.diff(kk_o) == 1) & same  # pairs of consecutive steps (of the same group)
    rho = _lag1_correlation(res_o, consecutive, s2, n)
    infl = (1 + rho) / (1 - rho)
    var_b = s2 / sxx * infl if sxx > 0 else float("inf")
    var_mix = _phase_frequency_variance(res_o, consecutive, sxx, span_steps)
    if var_mix is not None and var_mix > var_b:
        infl = max(infl, var_mix / (s2 / sxx)) if s2 > 0 and sxx > 0 else infl
        var_b = var_mix
    n_eff = max(3.0, n / infl)
    # (a lossy file's weighted stretches too: a codec's timing error also drifts smoothly with a
    # step's place in its frames; not a log's wall-joined segments, whose drifts the
    # white-frequency view describes)
    if (gg is None or sw is not None) and n >= 8 * BATCHES:
        var_bm = _batch_means_variance(kk, res_t, sw)
        if var_bm > BATCH_VIEW_F * var_b:
            var_b = var_bm
            n_eff = float(BATCHES)
    return var_b, n_eff, rho


def _rate_and_ci(b: float, var_b: float, n_eff: float, nominal_interval_s: float, clock_ppm: float,
                 clock_ppm_u95: float, min_ci_s_per_day: float) -> tuple[float, float]:
    """The daily rate (s/day) of the fitted interval ``b`` (s) and its 95 % half-width, the device
    clock's correction and its uncertainty included."""
    q = dsp.t_ppf(0.975, max(n_eff - 2, 1))
    se_b = math.sqrt(var_b)
    scale = 1.0 + clock_ppm * 1e-6
    rate = SECONDS_PER_DAY * (nominal_interval_s * scale / b - 1.0)
    # d(rate)/d(b) = -86400 * nominal * scale / b^2
    ci_fit = q * se_b * SECONDS_PER_DAY * nominal_interval_s * scale / b**2
    ci_clock = clock_ppm_u95 * 1e-6 * SECONDS_PER_DAY
    ci = max(math.hypot(ci_fit, ci_clock), min_ci_s_per_day)
    return rate, ci


def _spread_of_steps(kk: np.ndarray, gg: np.ndarray | None, sw: np.ndarray | None) -> tuple[float, float]:
    """The (weighted) sum of squares of the step numbers about their group means, and the groups'
    summed spans in steps: the slope's variance is s^2 / Sxx."""
    if gg is None and sw is None:
        return float(np.sum((kk - kk.mean()) ** 2)), float(kk.max() - kk.min()) + 1
    sxx = span_steps = 0.0
    for v in (np.unique(gg) if gg is not None else [None]):
        sel = slice(None) if v is None else gg == v
        kv = kk[sel]
        wv = np.ones(len(kv)) if sw is None else sw[sel] ** 2
        sxx += float(np.sum(wv * (kv - np.average(kv, weights=wv)) ** 2))
        span_steps += float(kv.max() - kv.min()) + 1
    return sxx, span_steps


def _lag1_correlation(res_o: np.ndarray, consecutive: np.ndarray, s2: float, n: int) -> float:
    """Lag-1 autocorrelation of the residuals (in step order) over consecutive steps only, held to
    -0.5 .. 0.98 (first view: AR(1) residuals widen the interval by (1 + rho) / (1 - rho))."""
    adj = np.flatnonzero(consecutive)
    if len(adj) < 8 or not s2 > 0:
        return 0.0
    rho = float(np.sum(res_o[adj] * res_o[adj + 1]) / np.sum(res_o**2) * n / max(len(adj), 1))
    return min(max(rho, -0.5), 0.98)


def _phase_frequency_variance(res_o: np.ndarray, consecutive: np.ndarray, sxx: float,
                              span_steps: float) -> float | None:
    """Second view: the slope's variance under the two noise types of time-and-frequency metrology.

    White phase noise (each step time scattered independently) and white frequency noise (each
    interval scattered independently: the phase wanders as a random walk).  From the intervals
    d_k of consecutive steps: var(d) = 2 s_pm^2 + s_fm^2 and cov(d_k, d_k+1) = -s_pm^2.  OLS slope
    variance: s_pm^2 / Sxx (= 12 s_pm^2 / N^3) + (6/5) s_fm^2 / N (large-N forms; from memory).
    None with fewer than 8 consecutive pairs.
    """
    if np.count_nonzero(consecutive) < 8:
        return None
    d = np.diff(res_o)[consecutive]  # residual intervals: line and polarity removed
    d = d - d.mean()
    c1 = float(np.mean(d[:-1] * d[1:])) if len(d) > 2 else 0.0
    s_pm2 = max(-c1, 0.0)
    vd = float(np.mean(d * d))
    s_fm2 = max(vd - 2 * s_pm2, 0.0)
    if s_fm2 < 3.0 * vd * np.sqrt(2.0 / len(d)):  # not significant: sampling scatter alone
        s_fm2 = 0.0
    return s_pm2 / sxx + 1.2 * s_fm2 / span_steps


def _batch_means_variance(kk: np.ndarray, res_t: np.ndarray, sw: np.ndarray | None) -> float:
    """Third view: slow structure neither model describes, by the method of batch means.

    A level shift where a lossy codec changes mode (low-bitrate Opus moved every step by 30-50 us
    at once, mid-recording) or a phone's gain control changes its state, a room warming up.  The
    residuals are averaged over ``BATCHES`` consecutive stretches (the method of batch means for
    correlated data; from memory) and the slope is then known only as well as a line through
    those means determines it (weighted by each batch's total weight; unweighted, every batch
    counts alike).  The caller takes this view only when its variance exceeds the models' by
    ``BATCH_VIEW_F``, so that residuals the models describe seldom widen the interval.
    """
    nb = BATCHES
    parts = np.array_split(np.argsort(kk, kind="stable"), nb)
    wv = np.ones(len(kk)) if sw is None else sw * sw
    wb = np.ones(nb) if sw is None else np.array([wv[i].sum() for i in parts])
    kb = np.array([np.average(kk[i], weights=wv[i]) for i in parts])
    rb = np.array([np.average(res_t[i], weights=wv[i]) for i in parts])
    kc = kb - np.average(kb, weights=wb)
    sxx_b = float(np.sum(wb * kc * kc))
    e = rb - np.average(rb, weights=wb) - kc * (float(np.sum(wb * kc * rb)) / sxx_b)
    return float(np.sum(wb * e * e)) / (nb - 2) / sxx_b


def residuals_s(steps: np.ndarray, times_s: np.ndarray, *, polarity_term: bool = True) -> np.ndarray:
    """Residuals (s) of the step times from their least-squares line (and polarity offset)."""
    k = np.asarray(steps, dtype=np.float64)
    t = np.asarray(times_s, dtype=np.float64)
    if len(k) < 3:
        return np.zeros(len(k))
    return _lsq(k, t, polarity_term and len(np.unique(k % 2)) == 2 and len(k) >= 6)[3]


def level_shifts(steps: np.ndarray, times_s: np.ndarray, *, z: float = 6.0, max_shifts: int = 8,
                 window: int = 8) -> np.ndarray | None:
    """Stretches between abrupt shifts of the step times, as group labels for :func:`fit_rate`.

    A lossy codec can move every step by tens of microseconds at once and keep them there:
    low-bitrate Opus does so when a step's place in its 20 ms frame crosses a certain point
    (measured here: 30-40 us at the moment the drifting phase crossed it, the two polarities a
    few steps apart; and ~50 us on the first few steps, while the encoder settles).  A line
    through such times tilts, and its interval does not know it.  A movement's phase does not
    jump (logic regulation aside, which :mod:`diagnose` models), so stretches between such shifts
    are given their own intercept and the rate comes from within them.

    All the steps are searched, and each polarity on its own (binary segmentation of the residuals
    from the line), and a stretch ends at any shift found:
    the largest standardized CUSUM ``|S_j| / (sigma sqrt(j (n - j) / n))``, sigma from successive
    differences (blind to the shifts themselves), is taken as a shift when it exceeds ``z`` and
    the means of the ``window`` steps on either side differ by more than 4 standard errors of
    their own scatter (abrupt: a drifting rate bends the residuals smoothly, by far less over so
    few steps).  Both thresholds are our own margins: white residuals of 60-3600 steps never
    reached them in our trials.

    Returns None when no shift is found, else an int array (one label per step, in input order;
    each label holds steps of one polarity, unless one polarity has too few steps to search).
    """
    k = np.asarray(steps, dtype=np.float64)
    t = np.asarray(times_s, dtype=np.float64)
    n = len(k)
    if n < 4 * window:
        return None
    par = (k % 2).astype(np.int64)
    both = len(np.unique(par)) == 2
    # shifts that move both polarities alike are seen best in all the steps; those that move one,
    # or the two a few steps apart, in each polarity alone: a stretch ends at either
    common = _shift_cuts(k, t, z, max_shifts, window, both)
    series = [np.flatnonzero(par == p) for p in (0, 1)]
    if not both or min(len(s) for s in series) < 2 * window:
        series = [np.arange(n)]
    labels = np.zeros(n, dtype=np.int64)
    found, nxt = bool(common), 0
    for sel in series:
        own = _shift_cuts(k[sel], t[sel], z, max_shifts, window, False) if len(series) > 1 else []
        found = found or bool(own)
        cuts_k = np.array(sorted(set(common) | set(own)), dtype=np.float64)
        lab = np.searchsorted(cuts_k, k[sel], side="right")
        lab = np.unique(lab, return_inverse=True)[1] + nxt  # no empty stretches
        labels[sel] = lab
        nxt = int(lab.max()) + 1
    return labels if found else None


def _shift_cuts(k: np.ndarray, t: np.ndarray, z: float, max_shifts: int, window: int, pol: bool) -> list[float]:
    """Step numbers at which stretches start after an abrupt shift (see level_shifts); ``pol``: the
    series holds both polarities (their offset is fitted)."""
    order = np.argsort(k, kind="stable")
    k, t = k[order], t[order]
    # outliers (a slipped ring cycle moves a step by a whole period) out first, as in fit_rate
    keep = _inliers(k, t, pol, min_keep=2 * window)
    k, t = k[keep], t[keep]
    n = len(k)
    cuts: list[int] = []  # a new stretch starts at these positions
    for _ in range(max_shifts):
        g = np.searchsorted(np.array(cuts, dtype=np.int64), np.arange(n), side="right") if cuts else None
        res = _lsq(k, t, pol, g)[3]
        sig = _diff_sigma(res)
        if not sig > 0:
            break
        # slips of a ring cycle and other outliers would dominate a cumulative sum: held at 5 sigma
        res = np.clip(res, -5 * sig, 5 * sig)
        best = None
        bounds = [0] + cuts + [n]
        for a, b in zip(bounds[:-1], bounds[1:]):
            m = b - a
            if m < 2 * 3:
                continue
            r = res[a:b] - res[a:b].mean()
            s = np.cumsum(r)[:-1]
            j = np.arange(1, m)
            zz = np.abs(s) / (sig * np.sqrt(j * (m - j) / m))
            zz[:2] = zz[-2:] = 0.0  # a stretch of fewer than 3 steps is not worth an intercept
            i = int(np.argmax(zz))
            if zz[i] > z and (best is None or zz[i] > best[0]):
                best = (float(zz[i]), a + i + 1)
        if best is None or not _abrupt(res, best[1], window):
            break  # nothing stands out, or a smooth bend rather than a shift
        cuts = sorted(cuts + [best[1]])
    return [float(k[c]) for c in cuts]


def _abrupt(res: np.ndarray, c: int, window: int) -> bool:
    """Whether the residuals jump between positions c-1 and c: the means of the ``window`` steps on
    either side differ by more than 4 standard errors of their own scatter."""
    lo, hi = res[max(c - window, 0): c], res[c: c + window]
    if len(lo) < 2 or len(hi) < 2:
        return False
    d = np.concatenate([lo - lo.mean(), hi - hi.mean()])
    s_loc = math.sqrt(float(np.sum(d * d)) / (len(d) - 2))
    return abs(float(hi.mean() - lo.mean())) > 4.0 * s_loc * math.sqrt(1.0 / len(lo) + 1.0 / len(hi))


def stretch_weights(steps: np.ndarray, times_s: np.ndarray, groups: np.ndarray) -> np.ndarray:
    """Per-step weights 1/sigma^2 of each stretch of :func:`level_shifts`, sigma from the successive
    differences of its residuals: the part of a recording a codec timed roughly (Opus at low bit rates
    scattered one stretch by ~12 us and the next by ~2 us) counts for less.  A stretch of fewer than
    8 steps takes the median sigma of the others; no sigma is taken below a tenth of that median.
    Two passes: the residuals of the second come from the fit weighted by the first (an unweighted
    line, pulled by the rough stretch, tilts the residuals of the clean one).
    """
    k = np.asarray(steps, dtype=np.float64)
    t = np.asarray(times_s, dtype=np.float64)
    g = np.asarray(groups)
    pol = len(np.unique(k % 2)) == 2 and not _one_polarity_groups(k, g)
    out = np.ones(len(k))
    for _ in range(2):
        res = _lsq(k, t, pol, g, np.sqrt(out / out.mean()))[3]
        sig = {}
        for v in np.unique(g):
            sel = np.flatnonzero(g == v)
            sel = sel[np.argsort(k[sel], kind="stable")]
            if len(sel) >= 8:
                sig[v] = _diff_sigma(res[sel])
        med = float(np.median(list(sig.values()))) if sig else 1.0
        if not med > 0:
            return np.ones(len(k))
        for v in np.unique(g):
            out[g == v] = 1.0 / max(sig.get(v, med), 0.1 * med) ** 2
    return out
