"""Quartz movement faults and habits from the step record (pure functions over arrays).

* End-of-life stepping: steps in bursts (found by the tracker, see :mod:`.acquire`).
* Adaptive drive levels, anomalies locked to a wheel's position, polarity asymmetry.
"""
from __future__ import annotations

import math

import numpy as np

from . import dsp
from ..model import FLAG_BITS, Bursts, DriveLevel, PositionLock


def burst_share(rec, bursts: Bursts | None) -> float:
    """Of the bursts heard (the grid's first steps), the share that held all their steps (0 without bursts)."""
    if bursts is None or not len(rec.k):
        return 0.0
    first = (rec.flags & FLAG_BITS["in-burst"]) == 0
    n_first = int(np.count_nonzero(first))
    if n_first == 0:
        return 0.0
    later = np.bincount(rec.k[~first] - rec.k.min(), minlength=int(rec.k.max() - rec.k.min()) + 1)
    full = later[rec.k[first] - rec.k.min()] >= bursts.steps_per_burst - 1
    return float(np.mean(full))


#: The false-alarm probability of each test here on a recording without the habit it looks for
#: (corrected for every position tried).
ALPHA = 1e-3
#: Drive levels: a level is held this many steps at least before a change can be told (half of
#: them of each polarity; the adaptive circuits lower their drive every few minutes, PCA146x
#: datasheet: "every 8 minutes"; a sound that changes for a few steps and back is something else:
#: the hand's load at one part of its turn, which impact of a step is loudest).
LEVEL_WINDOW_STEPS = 30
#: ... and a change of the step's level smaller than this (dB) is not called a drive level
#: (our own margin: a phone's gain control and a room move the level by tenths of a dB).
MIN_LEVEL_CHANGE_DB = 1.0
#: ... and be abrupt: about the change, a step between two plateaus must fit a polarity's levels
#: (to within this many times what noise alone leaves: about the 99.9th percentile of chi-squared
#: over its degrees of freedom for the window) and fit better than a straight ramp by this many
#: squared standard deviations of one level (our own margins: noise alone, with the step's place
#: chosen, gains a few)
PLATEAU_CHI2 = 2.0
ABRUPT_GAIN = 9.0
#: (or, where the level also wanders a little on each plateau -- the peak's place between samples
#: -- leave at most this share of the ramp's squared residual)
RAMP_SHARE = 0.2
#: ... and hold: along a segment the level may drift by at most this share of the smallest step
#: between the levels (or MIN_LEVEL_CHANGE_DB; our own margin)
DRIFT_SHARE = 0.5
#: ... and the steps' level over the noise must move the same way by this many standard errors
SNR_AGREE_Z = 3.0


def drive_levels(peaks_dbfs: np.ndarray, pol: np.ndarray | None = None, **kw) -> tuple[list[DriveLevel], int]:
    """The drive levels and the number of changes between them (see :func:`drive_level_test`)."""
    levels, changes, _ = drive_level_test(peaks_dbfs, pol, **kw)
    return levels, changes


def _median_steps(ys: np.ndarray, w: int) -> np.ndarray:
    """At each boundary before element i of ``ys`` (w <= i <= len - w): the median of the next w
    values minus that of the last w; NaN elsewhere."""
    med = np.median(np.lib.stride_tricks.sliding_window_view(ys, w), axis=1)  # med[i]: ys[i:i+w]
    out = np.full(len(ys) + 1, np.nan)
    out[w:len(ys) - w + 1] = med[w:] - med[:-w]
    return out


def _abrupt(seg: np.ndarray, sigma: float) -> bool:
    """Whether the values ``seg`` (noise ``sigma`` each) are two plateaus: a step (at its best place
    in the middle half) leaves no more than noise (``PLATEAU_CHI2`` times the squared residual
    noise alone would leave, or ``RAMP_SHARE`` of a ramp's) and fits better than a straight ramp by ``ABRUPT_GAIN`` squared
    standard deviations or more.  A drive switches its pulse width from one pulse to the next and
    holds it; a hand's load over its turn, a gain control or the peak's place between samples
    move the level smoothly, or back and forth."""
    m = len(seg)
    if m < 8:
        return False
    x = np.arange(m, dtype=np.float64)
    ramp = seg - np.polyval(np.polyfit(x, seg, 1), x)
    rss_ramp = float(ramp @ ramp)
    best = math.inf
    for c in range(m // 4, m - m // 4 + 1):
        a, b = seg[:c], seg[c:]
        best = min(best, float(((a - a.mean()) ** 2).sum() + ((b - b.mean()) ** 2).sum()))
    s2 = sigma * sigma
    plateaus = best <= PLATEAU_CHI2 * (m - 2) * s2 or best <= RAMP_SHARE * rss_ramp
    return plateaus and rss_ramp - best >= ABRUPT_GAIN * s2


def _best_step(x: np.ndarray, c: int, w: int) -> int:
    """The boundary within ``w`` of ``c`` where a step fits ``x`` (from 2 ``w`` either side) best."""
    lo, hi = max(0, c - 2 * w), min(len(x), c + 2 * w)
    seg = x[lo:hi]
    best, at = math.inf, c
    for b in range(max(lo + 1, c - w), min(hi - 1, c + w) + 1):
        u, v = seg[: b - lo], seg[b - lo:]
        rss = float(((u - u.mean()) ** 2).sum() + ((v - v.mean()) ** 2).sum())
        if rss < best:
            best, at = rss, b
    return at


def drive_level_test(peaks_dbfs: np.ndarray, pol: np.ndarray | None = None, snr_db: np.ndarray | None = None, *,
                     window: int = LEVEL_WINDOW_STEPS, alpha: float = ALPHA,
                     min_change_db: float = MIN_LEVEL_CHANGE_DB) -> tuple[list[DriveLevel], int, float]:
    """Adaptive drive levels: the steps' level changing over time between plateaus.

    Null hypothesis: each polarity's level is the same throughout.  A constant difference between
    the two polarities is no drive level (each polarity is judged against itself), nor is a change
    heard in one polarity only (which impact of one polarity's sound is loudest can change with
    the sound's place between samples): the drive's pulse width sets both.  With ``snr_db`` (each
    step's level over the noise floor) a drive level must move that too: a phone's gain control
    moves the steps' level and the noise's together, the steps' level over the noise not.  At
    every step the median of each series' (polarity's, and level's or level over noise) next
    ``window`` // 2 values is compared with that of its last as many; under the null the
    difference is normal with a spread set by the noise of successive values of the series.  A
    change is the smaller of the polarities' standardised differences of the level, of one sign
    (and the level over the noise moving the same way by ``SNR_AGREE_Z`` standard errors); those whose
    p-value, corrected for every position tried, falls below ``alpha`` and that are at least
    ``min_change_db`` split the record into segments, and segments at levels closer than
    ``min_change_db`` are one drive level.  Each change must be abrupt in both polarities
    (:func:`_abrupt`), and no segment's level may drift along it by ``DRIFT_SHARE`` of the smallest
    step between the levels.  Returns
    the levels (two or more when found), the number of changes between them and the p-value of
    the largest change.
    """
    p = np.asarray(peaks_dbfs, dtype=np.float64)
    q = np.zeros(len(p), dtype=np.int64) if pol is None else np.asarray(pol, dtype=np.int64)
    s = None if snr_db is None else np.asarray(snr_db, dtype=np.float64)
    ok = np.isfinite(p) if s is None else np.isfinite(p) & np.isfinite(s)
    y, q = p[ok], q[ok]
    n = len(y)
    sides = [side for side in (0, 1) if np.count_nonzero(q == side) > 0]
    if not sides:
        return [], 0, float("nan")
    w = max(4, int(window) // len(sides))  # values of one polarity each side of a boundary
    if any(np.count_nonzero(q == side) < 3 * w for side in sides):
        return [], 0, float("nan")
    series = [y] if s is None else [y, s[ok]]
    z, size_db, wins, yc = _change_scores(series, q, sides, w)
    cuts, p_max = _significant_cuts(z, size_db, wins, q, sides, w, alpha, min_change_db)
    if not cuts:
        return [], 0, p_max
    # the medians cannot place a change to better than half their window: place each cut where a
    # step fits the levels of both polarities best
    cuts = [_best_step(yc, c, w) for c in cuts]
    bounds = [0] + sorted(cuts) + [n]
    label, cur = _level_labels(yc, bounds, min_change_db)
    if cur == 0:
        return [], 0, p_max
    step_label = np.repeat(label, np.diff(bounds))
    if _plateaus_drift(yc, q, sides, bounds, step_label, cur, w, min_change_db):
        return [], 0, p_max
    base = float(np.median(y))
    levels = []
    for lv in range(cur + 1):
        sel = step_label == lv
        levels.append(DriveLevel(base + float(np.median(yc[sel])), float(sel.mean()), int(sel.sum())))
    changes = int(np.count_nonzero(np.diff(label) != 0))
    return levels, changes, p_max


def _change_scores(series: list[np.ndarray], q: np.ndarray, sides: list[int], w: int):
    """At every boundary, the smallest of the series' and polarities' standardised changes of their
    medians over ``w`` values either side (0 where they disagree in sign, or where the level over
    the noise does not move clearly with the level), and the smallest change in dB; also each
    polarity's (values, noise) of each series, and the level with each polarity's median removed."""
    y = series[0]
    n = len(y)
    yc = y.copy()
    wins: dict[int, list] = {side: [] for side in sides}  # per polarity: (values, noise) of each series
    z = np.full(n + 1, np.inf)  # the smallest standardised change at the boundary before step i
    sign = np.zeros(n + 1)
    size_db = np.full(n + 1, np.inf)  # the smallest change in dB
    for si, x in enumerate(series):
        for side in sides:
            idx = np.flatnonzero(q == side)
            xs = x[idx] - np.median(x[idx])
            d1 = np.diff(xs)
            sigma = max(1.4826 * float(np.median(np.abs(d1 - np.median(d1)))) / math.sqrt(2.0), 0.05)
            if si == 0:
                yc[idx] = xs
            wins[side].append((xs, sigma))
            # the boundary before step b of the record lies before this series' value searchsorted(idx, b)
            D = _median_steps(xs, w)[np.searchsorted(idx, np.arange(n + 1))]
            sg = np.sign(D)
            agree = (sign == 0) | (sg == sign)
            sign = np.where(sign == 0, sg, sign)
            # the median of w normal values has a variance of about (pi/2) sigma^2 / w
            zz = np.abs(D) / (sigma * math.sqrt(math.pi / w))
            if si == 0:
                z = np.where(np.isnan(D), np.nan, np.where(agree, np.minimum(z, zz), 0.0))
                size_db = np.where(np.isnan(D), np.nan, np.minimum(size_db, np.abs(D)))
            else:
                # the level over the noise need only move the same way, clearly (3 standard
                # errors; it is measured over the first 2 ms and moves less than the peak)
                z = np.where(agree & (zz >= SNR_AGREE_Z), z, 0.0)
    z = np.nan_to_num(z, nan=0.0, posinf=0.0)
    size_db = np.nan_to_num(size_db, nan=0.0, posinf=0.0)
    return z, size_db, wins, yc


def _significant_cuts(z: np.ndarray, size_db: np.ndarray, wins: dict, q: np.ndarray, sides: list[int], w: int,
                      alpha: float, min_change_db: float) -> tuple[list[int], float]:
    """The boundaries whose change is significant (corrected for every position tried), at least
    ``min_change_db``, abrupt in both polarities and ``2 w`` from a larger one; and the p-value of
    the largest change."""
    npos = int(np.count_nonzero(z > 0)) or 1

    def p_of(v: float) -> float:
        return min(1.0, 2.0 * npos * 0.5 * math.erfc(v / math.sqrt(2.0)))

    order = np.argsort(-z, kind="stable")
    p_max = p_of(float(z[order[0]]))
    cuts: list[int] = []
    for b in order:
        if p_of(float(z[b])) >= alpha:
            break
        if float(size_db[b]) < min_change_db:
            continue
        if all(abs(int(b) - c) >= 2 * w for c in cuts) and all(
                any(_abrupt(xs[max(0, i - w): i + w], sg) for xs, sg in wins[side])
                for side in sides for i in [int(np.searchsorted(np.flatnonzero(q == side), b))]):
            cuts.append(int(b))
    return cuts, p_max


def _level_labels(yc: np.ndarray, bounds: list[int], min_change_db: float) -> tuple[np.ndarray, int]:
    """The drive level of each segment between ``bounds`` and the highest level's number: segments
    within ``min_change_db`` of each other (single linkage over their sorted levels) are one level."""
    seg_lv = np.array([np.median(yc[a:b]) for a, b in zip(bounds[:-1], bounds[1:])])
    # segments within min_change_db of each other (single linkage over their sorted levels): one level
    order_lv = np.argsort(seg_lv)
    label = np.zeros(len(seg_lv), dtype=np.int64)
    cur = 0
    for a, b in zip(order_lv[:-1], order_lv[1:]):
        if seg_lv[b] - seg_lv[a] >= min_change_db:
            cur += 1
        label[b] = cur
    return label, cur


def _plateaus_drift(yc: np.ndarray, q: np.ndarray, sides: list[int], bounds: list[int], step_label: np.ndarray,
                    cur: int, w: int, min_change_db: float) -> bool:
    """Whether a segment's level drifts along it by ``DRIFT_SHARE`` of the smallest step between
    the levels (in either polarity)."""
    # Plateaus hold: a segment whose level drifts from its start to its end by half the smallest
    # step between the levels (a phone's gain control recovering after another sound came close to
    # the steps) is no drive level.
    lv_meds = np.sort([np.median(yc[step_label == lv]) for lv in range(cur + 1)])
    allow = max(min_change_db, DRIFT_SHARE * float(np.min(np.diff(lv_meds))))
    for a, b in zip(bounds[:-1], bounds[1:]):
        for side in sides:
            # the segment's first and last thirds, a few steps in from its cuts (which can miss the
            # change by a step or two)
            v = yc[a:b][q[a:b] == side][2:-2]
            if len(v) < w:
                continue
            third = len(v) // 3
            if abs(float(np.median(v[-third:]) - np.median(v[:third]))) >= allow:
                return True
    return False


def position_locked(anomaly_k: np.ndarray, span_steps: int, *, periods=(60,), min_count: int = 3) -> PositionLock | None:
    """Anomalies that repeat at the same step number modulo a wheel's revolution.

    Chance coincidence is judged with a binomial tail: with n anomalies spread over P
    positions, how likely is one position to collect this many?
    """
    a = np.asarray(anomaly_k, dtype=np.int64)
    if len(a) < min_count:
        return None
    best = None
    for P in periods:
        if span_steps < 2 * P:
            continue
        cnt = np.bincount(a % P, minlength=P)
        top = np.flatnonzero(cnt >= max(min_count, 0.25 * len(a)))
        if not len(top):
            continue
        c = int(cnt[top].sum())
        # probability that some position gets >= max count by chance
        pval = min(1.0, P * dsp.binom_sf(int(cnt.max()) - 1, len(a), 1.0 / P))
        if pval < ALPHA and (best is None or c > best.count):
            best = PositionLock(P, [int(x) for x in top], c, pval)
    return best


def polarity_asymmetry(k: np.ndarray, t: np.ndarray, *, min_pairs: int = 8,
                       min_group: int = 3) -> tuple[float, float] | None:
    """Mean A->B interval minus mean B->A interval (us) and its 95 % half-width.

    None with fewer than ``min_pairs`` consecutive step pairs or ``min_group`` in either direction.
    """
    k = np.asarray(k)
    t = np.asarray(t, dtype=np.float64)
    adj = np.flatnonzero(np.diff(k) == 1)
    if len(adj) < min_pairs:
        return None
    d = t[adj + 1] - t[adj]
    from_a = (k[adj] % 2) == 0
    a, b = d[from_a], d[~from_a]
    if len(a) < max(min_group, 2) or len(b) < max(min_group, 2):
        return None
    diff = float(a.mean() - b.mean())
    se = math.sqrt(a.var(ddof=1) / len(a) + b.var(ddof=1) / len(b))
    return diff * 1e6, 1.96 * se * 1e6
