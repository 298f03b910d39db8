"""Another clock in the room: a second ticking sound among the sounds that are not steps (pure)."""
from __future__ import annotations

import math

import numpy as np

from . import dsp
from ..model import OtherClock

#: the false-alarm probability of the vote for another clock's grid (corrected for every trial
#: period and phase cell)
ALPHA = 1e-3


def _loudest_after(t: np.ndarray, pk: np.ndarray, first: np.ndarray, span_s: float) -> np.ndarray:
    """For each sound ``first[i]``, the loudest peak among the sounds from it to ``span_s`` later: a
    tick's level is its loudest impact's, as a step's is, not that of whatever it began with (a
    gate's hiss, a faint first contact)."""
    order = np.argsort(t, kind="stable")
    ts, ps = t[order], pk[order]
    lo = np.searchsorted(ts, t[first], side="left")
    hi = np.searchsorted(ts, t[first] + span_s, side="right")
    return np.array([ps[a:b].max() for a, b in zip(lo, hi)])


def _line_with_alternation(n: np.ndarray, t: np.ndarray, alternation: bool = True) -> tuple[float, np.ndarray]:
    """Least-squares t = a + b n (+ c [n odd] with ``alternation``): the slope b and the residuals
    (with one parity only, a plain line)."""
    odd = (np.asarray(n) % 2).astype(np.float64)
    cols = [np.ones(len(n)), np.asarray(n, dtype=np.float64)]
    if alternation and 0 < odd.sum() < len(odd):
        cols.append(odd)
    A = np.stack(cols, axis=1)
    coef = np.linalg.lstsq(A, t, rcond=None)[0]
    return float(coef[1]), t - A @ coef


def other_clock(other_t: np.ndarray, other_peak_dbfs: np.ndarray, step_k: np.ndarray, step_t: np.ndarray,
                step_peak_dbfs: np.ndarray, *, window_s: float = 600.0, tolerance_s: float = 0.015) -> OtherClock | None:
    """A second ticking sound among the sounds that are not steps (another clock in the room).

    Sounds tied to the steps (a hand's bounce, an echo, a burst) keep a fixed delay after each
    step: those whose delay falls in a crowded 5 ms bin of the step period are set aside first.
    What is left is searched for a grid of its own within half a percent of the steps' interval
    (a quartz clock keeps within a few hundred ppm) over the last ``window_s``: at each trial
    period the sounds' phases are counted in 5 ms bins (a Hough-style vote); the interval is then
    fitted by least squares through the sounds within ``tolerance_s`` of the best grid.  Its
    ticks must move against the steps by 5 ms or more over the window, else they cannot be told
    from sounds tied to the steps.
    """
    other_t = np.asarray(other_t, dtype=np.float64)
    other_peak_dbfs = np.asarray(other_peak_dbfs, dtype=np.float64)
    step_t = np.asarray(step_t, dtype=np.float64)
    step_k = np.asarray(step_k)
    if len(other_t) < 10 or len(step_t) < 10:
        return None
    end = float(max(other_t[-1], step_t[-1]))
    sel = other_t >= end - window_s
    t, pk = other_t[sel], other_peak_dbfs[sel]
    st_sel = step_t >= end - window_s
    sk, st = step_k[st_sel], step_t[st_sel]
    spk = np.asarray(step_peak_dbfs, dtype=np.float64)[st_sel]
    if len(t) < 10 or len(st) < 10:
        return None
    interval_s, a0 = dsp.line_fit(sk - sk[0], st)
    nb = max(2, int(interval_s / 0.005))  # 5 ms bins of the cycle, here and in the search below
    keep = _untied(t, a0, interval_s, nb, len(st))
    t, pk = t[keep], pk[keep]
    if len(t) < 10:
        return None
    span = float(t[-1] - t[0])
    if span < 8 * interval_s:
        return None
    voted = _vote_grid(t - t[0], interval_s, span, nb, len(st))
    if voted is None:
        return None
    best_p, best_bin, p_vote = voted
    tr = t - t[0]
    # the sounds on that grid (the earliest of each tick), and a line through them
    phase = (best_bin + 1.0) / nb * best_p  # the middle of the fullest two bins
    n = np.round((tr - phase) / best_p)
    on = np.flatnonzero(np.abs(tr - phase - n * best_p) <= tolerance_s)
    _, first = np.unique(n[on], return_index=True)
    idx = on[first]
    # a clock ticks every time: most of the span's ticks must be heard (noise lining up by chance
    # fills a grid only here and there)
    need = max(10, 0.3 * len(st), 0.6 * span / best_p)
    if len(idx) < need:
        return None
    found = _tight_line(n, tr, idx, need)
    if found is None:
        return None
    b, idx = found
    drift_s = abs(b - interval_s) * span / interval_s
    if drift_s < 0.005:
        return None
    return OtherClock(interval_s=float(b), ticks=int(len(idx)),
                      level_db=float(np.median(_loudest_after(tr, pk, idx, 0.06)) - np.median(spk)),
                      drift_ms_per_min=float((b - interval_s) / interval_s * 60.0 * 1e3), p_value=p_vote)


def _untied(t: np.ndarray, a0: float, interval_s: float, nb: int, n_steps: int) -> np.ndarray:
    """Which sounds are not tied to the steps: those whose delay after the step grid does not fall
    in a crowded 5 ms bin (or next to one) of the cycle (a bounce, an echo, a burst)."""
    delay_bin = np.minimum((np.mod(t - a0, interval_s) / interval_s * nb).astype(np.int64), nb - 1)
    crowded = np.bincount(delay_bin, minlength=nb) > max(5, 0.2 * n_steps)
    crowded = crowded | np.roll(crowded, 1) | np.roll(crowded, -1)
    return ~crowded[delay_bin]


def vote_p_value(count: int, lam: float, cells: int) -> float:
    """The chance that the fullest of ``cells`` cells holds ``count`` sounds or more when each holds
    a Poisson number with mean ``lam`` (a union bound: cells times the one cell's tail)."""
    from scipy.special import pdtrc

    return float(min(1.0, cells * pdtrc(count - 1, lam)))


def _vote_grid(tr: np.ndarray, interval_s: float, span: float, nb: int, n_steps: int) -> tuple[float, int, float] | None:
    """The trial period and 5 ms phase bin holding the most sounds (times ``tr`` from the first),
    when that count stands far above chance; else None.

    Trial periods lie within +-0.5 % of the steps' interval, spaced so that the ends of the span
    move by at most 5 ms between neighbours; at each, the sounds' phases are counted in 5 ms
    bins and the fullest 10 ms (two bins) scores it -- a count, so that clutter elsewhere in the
    cycle (noise, knocks, the reverberation of the steps) cannot pull the phase as a mean would.
    """
    dp = 0.005 * interval_s / span
    half = int(0.005 * interval_s / dp)
    trials = interval_s + dp * np.arange(-half, half + 1)
    best_n, best_p, best_bin = 0, None, 0
    for chunk in np.array_split(trials, max(1, len(trials) * len(tr) // 2_000_000 + 1)):
        ph = np.mod(tr[None, :], chunk[:, None]) / chunk[:, None]
        bins = np.minimum((ph * nb).astype(np.int64), nb - 1) + nb * np.arange(len(chunk))[:, None]
        counts = np.bincount(bins.ravel(), minlength=nb * len(chunk)).reshape(len(chunk), nb)
        pair = counts + np.roll(counts, -1, axis=1)
        i, j = np.unravel_index(int(np.argmax(pair)), pair.shape)
        if pair[i, j] > best_n:
            best_n, best_p, best_bin = int(pair[i, j]), float(chunk[i]), int(j)
    # the fullest cell must stand far above what the same number of sounds at random phases
    # would put in the fullest of this many cells (Poisson mean lam; 6 sigma and 3 more: our margin),
    # and its chance, times the cells tried (Bonferroni), fall below ALPHA
    lam = len(tr) * 2.0 / nb
    if best_p is None or best_n < max(10, 0.3 * n_steps, lam + 6.0 * math.sqrt(lam) + 3.0):
        return None
    p = vote_p_value(best_n, lam, len(trials) * nb)
    if p >= ALPHA:
        return None
    return best_p, best_bin, p


def _tight_line(n: np.ndarray, tr: np.ndarray, idx: np.ndarray, need: float):
    """(slope, the ticks on it) of the line through the candidate ticks ``idx`` (tick numbers ``n``,
    times ``tr``) when most lie tight on it; else None.

    A clock's ticks sit tight on their line (a spread of 2 ms at most in the sweep of simulated
    phone recordings, even timed against the other clock's templates); sounds of a noisy stretch
    that happen to fall in the window spread evenly over it (3.7 ms for +-5 ms): keep the ticks
    within 5 ms, ask for most of them again, and for a spread (1.4826 MAD) of 3 ms at most.  The
    other clock is a stepping motor too: its two polarities may sound apart by several ms (two
    real step sounds of one clock: 9.5 ms between their first sounds), so the line carries an
    offset between alternate ticks (tried when a plain line does not fit: the simulated sweep's
    second clocks, whose polarities sound alike, fitted a little better without it).
    """
    for alternation in (False, True):
        b, res = _line_with_alternation(n[idx], tr[idx], alternation)
        tight = np.abs(res) <= 0.005
        if np.count_nonzero(tight) < need:
            continue
        b, res = _line_with_alternation(n[idx[tight]], tr[idx[tight]], alternation)
        if 1.4826 * float(np.median(np.abs(res - np.median(res)))) <= 0.003:
            return b, idx[tight]
    return None
