"""Where the device-clock readings break into stretches, and their least-delayed readings (pure).

The readings' lower envelope (the least delay per window of device time) shows host clock steps,
delivery shifts and lost audio as abrupt changes a late block never makes; see core/clockfit.py
for what a reading is and how the stretches are used.
"""
from __future__ import annotations

import numpy as np

#: The least delay must change by at least this much (s), and by 8 times the envelope's own
#: scatter, to be taken for a delivery shift (our own choice: the sink's 9 ms shifts stand well
#: clear of it, the envelope's scatter on a quiet machine is 0.1-0.3 ms).
MIN_SHIFT_S = 0.002
_SHIFT_SIGMAS = 8.0


def _block_kind(start: np.ndarray, frames: np.ndarray | None, block_frames: int | None,
                samplerate: float) -> tuple[str, int | None]:
    """Whether the blocks are of one fixed size (and which), as delivered, or unknown."""
    if block_frames is not None:
        return ("fixed", int(block_frames)) if block_frames > 0 else ("as delivered", None)
    if frames is not None:
        f = frames.astype(np.int64)
    else:
        d = np.diff(start).astype(np.int64)
        d = d[d > 0]
        if not len(d):
            return "unknown", None
        if np.median(d) > 0.25 * samplerate:
            # thinned readings (a log keeps one per window): what divides every distance is the block
            g = int(np.gcd.reduce(d))
            return ("fixed", g) if g >= 32 else ("unknown", None)
        f = d
    vals, counts = np.unique(f, return_counts=True)
    mode = int(vals[np.argmax(counts)])
    if counts.max() >= 0.9 * len(f) and mode > 0:
        return "fixed", mode
    return "as delivered", None


def _window_minima(x: np.ndarray, r: np.ndarray, width_s: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per window of device time: first index, index of the least residual, and that residual."""
    wid = np.floor((x - x[0]) / width_s).astype(np.int64)
    first = np.flatnonzero(np.r_[True, wid[1:] != wid[:-1]])
    sizes = np.diff(np.r_[first, len(x)])
    if len(first) > 2 and sizes[-1] < 0.5 * np.median(sizes):
        first = first[:-1]  # a short last window's least reading is no least delay: join it to the one before
    bounds = np.r_[first, len(x)]
    arg = np.array([a + int(np.argmin(r[a:b])) for a, b in zip(bounds[:-1], bounds[1:])])
    return first, arg, r[arg]


def _find_breaks(x: np.ndarray, r: np.ndarray, step_threshold_s: float,
                 lost: np.ndarray, wait_s: float) -> tuple[list[int], list[int], list[int], float]:
    """Indices j where a new stretch begins (reading j is the first after the break): host clock
    steps, delivery shifts, lost audio; and the slope of the envelope (s per device s)."""
    span = x[-1] - x[0]
    gap = np.diff(x)
    typical = float(np.median(gap)) if len(gap) else 0.0
    width = max(span / 256.0, 8.0 * typical, 0.2)
    first, arg, m = _window_minima(x, r, width)
    if len(m) < 3:
        return [], [], [int(j) for j in np.flatnonzero(lost) + 1], 0.0
    dx = np.diff(x[arg])
    dm = np.diff(m)
    ok = dx > 0
    slope = float(np.median(dm[ok] / dx[ok])) if ok.any() else 0.0
    d = dm - slope * dx
    mad = 1.4826 * float(np.median(np.abs(d - np.median(d))))
    thr_shift = max(MIN_SHIFT_S, _SHIFT_SIGMAS * mad)
    steps, shifts = [], []
    bounds = np.r_[first, len(x)]
    for i in np.flatnonzero(np.abs(d) > min(thr_shift, step_threshold_s)):
        # the break lies within windows i and i+1.  Readings after it never lie below the later
        # level (less the envelope's noise), readings before it never below the earlier one
        a, b = bounds[i], bounds[min(i + 2, len(bounds) - 1)]
        xs = x[a:b]
        before = m[i] + slope * (xs - x[arg[i]])
        after = m[i + 1] + slope * (xs - x[arg[i + 1]])
        eps = min(abs(d[i]) / 2, max(4 * mad, 2e-4))
        rr = r[a:b]
        if d[i] > 0:  # the later level is higher: after the last reading below it
            below = np.flatnonzero(rr < after - eps)
            j = a + (int(below[-1]) + 1 if len(below) else 0)
        else:  # the later level is lower: at the first reading below the earlier one
            below = np.flatnonzero(rr < before - eps)
            j = a + (int(below[0]) if len(below) else b - a)
        if not 0 < j < len(x) or lost[max(a - 1, 0):b].any():
            continue  # lost audio breaks the stretch there already (its length is only estimated)
        big = abs(d[i]) >= max(step_threshold_s, 1.5 * wait_s)
        (steps if big else shifts).append(int(j))
    gaps = [int(j) for j in np.flatnonzero(lost) + 1]
    return sorted(set(steps)), sorted(set(shifts) - set(steps)), gaps, slope


def _least_delayed(e: np.ndarray, key: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The reading of least ``e`` in each group of ``key``, and how far above the floor such a
    least reading typically lies: the mean gap between the group's lowest five readings (near its
    floor a delay distribution's lowest order statistics are spaced by about the minimum's own
    excess, as for the exponential; our own estimator)."""
    order = np.lexsort((e, key))
    ks = key[order]
    starts = np.flatnonzero(np.r_[True, ks[1:] != ks[:-1]])
    sizes = np.diff(np.r_[starts, len(order)])
    k = np.minimum(4, sizes - 1)
    lo = e[order[starts]]
    hi = e[order[starts + k]]
    lift = np.where(k > 0, (hi - lo) / np.maximum(k, 1), np.nan)
    lift = np.where(np.isfinite(lift), lift, np.nanmedian(lift) if np.isfinite(lift).any() else 0.0)
    pick = order[starts]
    srt = np.argsort(pick)
    return pick[srt], lift[srt]
