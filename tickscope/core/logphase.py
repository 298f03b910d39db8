"""The phase of a log's steps against the nominal grid: time interval error and Allan deviation (pure).

Per group of segments (never across a wall-clock join): each step's time error x on the
nominal grid (:func:`~tickscope.core.stability.phase_from_steps`), with each group's A/B offset
removed, single mis-timed steps left out, continued across a join on the fitted rate; the
overlapping-ADEV sums of the groups pooled (NIST SP 1065 estimators in :mod:`.stability`).
"""
from __future__ import annotations

import numpy as np

from . import stability as stab


def phase_figures(K: np.ndarray, T: np.ndarray, G: np.ndarray, good: np.ndarray, nominal: float,
                  interval_s: float, notes: list[str]):
    """(ADEV or None, TIE summary, step times, their time errors, their step numbers) of the good
    steps; ``interval_s`` is the log's fitted step interval."""
    adev = None
    sums = None
    n_points = 0
    n_out = 0
    xs, ts, ks = [], [], []
    x_end = None
    for g in np.unique(G[good]):
        sel = good & (G == g)
        kg, tg = K[sel], T[sel]
        kg, first = np.unique(kg, return_index=True)  # sorted; a step number appears once
        tg = tg[first]
        # each segment's templates set its own A/B offset: removed group by group
        pol_c = polarity_offset_s(kg, tg, np.zeros(len(kg), dtype=np.int64))
        grid, x = stab.phase_from_steps(kg, tg - pol_c * ((kg % 2) - 0.5), nominal)
        n_out += _drop_outliers(x)
        if x_end is not None:
            # continue on the fitted rate across the join: x grows by (b - nominal) per step
            x = x + x_end[1] + (grid[0] - x_end[0]) * (interval_s - nominal)
        ok = np.isfinite(x)
        x_end = (grid[ok][-1], x[ok][-1])
        t_grid = np.full(len(grid), np.nan)
        t_grid[kg - grid[0]] = tg
        xs.append(x[ok])
        ts.append(t_grid[ok])
        ks.append(grid[ok])
        m = stab.octave_factors(max(len(x), 4))
        s_ = stab.oadev_sums(x, m)
        n_points += int(ok.sum())
        if sums is None:
            sums = s_
        else:
            mm = np.union1d(sums.m, s_.m)
            sums = _pad(sums, mm) + _pad(s_, mm)
    step_x = np.concatenate(xs)
    step_t = np.concatenate(ts)
    step_k = np.concatenate(ks)
    tie = stab.tie_summary(step_k, step_x)
    if sums is not None and n_points >= 8:
        adev = stab.oadev_from_sums(sums, nominal, n_points)
    if n_out:
        notes.append(f"{n_out} step{'s' if n_out != 1 else ''} sat far off their neighbours (a knock or a voice on top of the step): "
                     "left out of the time error and the Allan deviation")
    return adev, tie, step_t, step_x, step_k


def polarity_offset_s(k: np.ndarray, t: np.ndarray, g: np.ndarray) -> float:
    """How much later odd steps sound than even ones, from each step against its two neighbours.

    A global least-squares polarity term picks up part of any curvature of the phase (a rate
    that drifts over days), because alternating signs do not sum to zero against k^2 at the
    ends; the local form ``x_k - (x_k-1 + x_k+1) / 2`` cancels the trend step by step.
    """
    vals = []
    for gg in np.unique(g):
        sel = g == gg
        kk, first = np.unique(k[sel], return_index=True)
        tt = t[sel][first]
        if len(kk) < 3:
            continue
        trip = (kk[2:] - kk[:-2] == 2) & (kk[1:-1] - kk[:-2] == 1)
        d = tt[1:-1] - 0.5 * (tt[:-2] + tt[2:])
        sign = np.where(kk[1:-1] % 2 == 1, 1.0, -1.0)
        vals.append((d * sign)[trip])
    v = np.concatenate(vals) if vals else np.zeros(0)
    return float(np.median(v)) if len(v) >= 8 else 0.0


def _drop_outliers(x: np.ndarray, *, window: int = 31, sigmas: float = 6.0, floor_s: float = 2e-6) -> int:
    """Set to NaN the steps far from the running median of their neighbours; returns how many.

    The running median follows a drifting rate and a logic-regulation sawtooth, so only
    single mis-timed steps stand out (the rate fit drops the same steps as outliers).
    """
    from scipy.ndimage import median_filter

    ok = np.flatnonzero(np.isfinite(x))
    if len(ok) < window:
        return 0
    v = x[ok] - np.polyval(np.polyfit(ok, x[ok], 1), ok)  # a straight ramp would bias the median at the ends
    r = v - median_filter(v, size=window, mode="nearest")
    mad = 1.4826 * float(np.median(np.abs(r - np.median(r))))
    bad = np.abs(r - np.median(r)) > max(sigmas * mad, floor_s)
    # a logic-regulation jump moves every later step: the running median follows it within
    # half a window, so only isolated points are dropped (at most 1 in 50)
    if bad.sum() > len(v) / 50:
        return 0
    x[ok[bad]] = np.nan
    return int(bad.sum())


def _pad(s: stab.AdevSums, m: np.ndarray) -> stab.AdevSums:
    ss = np.zeros(len(m))
    cnt = np.zeros(len(m), dtype=np.int64)
    idx = np.searchsorted(m, s.m)
    ss[idx] = s.sum_sq
    cnt[idx] = s.count
    return stab.AdevSums(m, ss, cnt)
