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


def drive_levels(peaks_dbfs: np.ndarray, *, min_gap_db: float = 2.0, min_share: float = 0.05) -> tuple[list[DriveLevel], int]:
    """Cluster step levels into drive levels; returns the levels and the number of level changes."""
    p = np.asarray(peaks_dbfs, dtype=np.float64)
    p = p[np.isfinite(p)]
    if len(p) < 10:
        return [], 0
    order = np.sort(p)
    gaps = np.flatnonzero(np.diff(order) >= min_gap_db)
    edges = [order[0] - 1] + [0.5 * (order[g] + order[g + 1]) for g in gaps] + [order[-1] + 1]
    levels = []
    for a, b in zip(edges[:-1], edges[1:]):
        sel = (p > a) & (p <= b)
        if sel.sum() >= max(3, min_share * len(p)):
            levels.append(DriveLevel(float(np.median(p[sel])), float(sel.mean()), int(sel.sum())))
    if len(levels) < 2:
        return levels, 0
    centers = np.array([lv.level_dbfs for lv in levels])
    lab = np.argmin(np.abs(np.asarray(peaks_dbfs)[:, None] - centers[None, :]), axis=1)
    # count changes that last at least 5 steps
    changes = 0
    cur = lab[0]
    run = 0
    for v in lab[1:]:
        if v != cur:
            run += 1
            if run >= 5:
                changes += 1
                cur = v
                run = 0
        else:
            run = 0
    return levels, changes


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
        if pval < 1e-3 and (best is None or c > best.count):
            best = PositionLock(P, [int(x) for x in top], c)
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
