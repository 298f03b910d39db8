"""The step interval and the steps' phase from impact times (pure; used by core/acquire.py).

A phase-coherence scan over periods (like a Rayleigh test) finds the longest period on which the
impacts line up; it is multiplied up where only every m-th slot holds sound, and snapped to the
nearest interval quartz movements use when within a tolerance of one.
"""
from __future__ import annotations

import math

import numpy as np

#: Step intervals of quartz movements (s): 2^-k fractions of a second for stepping
#: sweep hands, and the PCA2002 output periods 1, 5, 10, 20, 30 s (NXP PCA2002
#: datasheet Rev. 8, Table 7) plus 2 s and 60 s (common practice), and 4 s: the end-of-life
#: burst period of the Philips PCA16xx ("bursts of 4 pulses are produced every 4 s").
QUARTZ_INTERVALS_S = (1 / 16, 1 / 8, 1 / 4, 1 / 2, 1.0, 2.0, 4.0, 5.0, 10.0, 20.0, 30.0, 60.0)


def find_interval(times_s: np.ndarray, weights: np.ndarray | None = None, *,
                  min_s: float = 0.05, max_s: float | None = None,
                  max_impacts: int = 160) -> tuple[float, float, float] | None:
    """Longest period on which the impact times line up.

    Returns ``(interval_s, phase_s, coherence)`` or None.  The coherence of a period P is
    ``|sum w exp(2 pi i t / P)| / sum w``: 1 when every impact sits on the same phase.
    Fractions of the true interval (P/2, P/3 ...) line up too, so the longest period whose
    coherence is close to the best one is taken.
    """
    t = np.asarray(times_s, dtype=np.float64)
    if len(t) < 3:
        return None
    w = np.ones(len(t)) if weights is None else np.asarray(weights, dtype=np.float64)
    span = float(t[-1] - t[0])
    if span <= 0:
        return None
    max_s = min(max_s or span / 2, span / 2)
    if max_s <= min_s:
        return None
    if len(t) > max_impacts:  # the strongest impacts carry the pattern; the rest cost time
        top = np.sort(np.argsort(w)[-max_impacts:])
        t, w = t[top], w[top]
    tt = t - t[0]
    # relative resolution 5e-4 (0.05 %): phases drift at most ~0.2 cycles across 40 s at 50 ms
    step = 5e-4
    periods = np.exp(np.arange(math.log(min_s), math.log(max_s), step))
    coh = np.empty(len(periods))
    W = w.sum()
    for i in range(0, len(periods), 512):
        P = periods[i: i + 512]
        ph = np.exp(2j * np.pi * tt[None, :] / P[:, None])
        coh[i: i + 512] = np.abs(ph @ w) / W
    best = float(coh.max())
    if best <= 0:
        return None
    # local maxima close to the best; take the longest period among them
    good = np.flatnonzero(coh >= 0.8 * best)
    j = int(good[-1])
    # climb to the local maximum around j
    while j + 1 < len(coh) and coh[j + 1] >= coh[j]:
        j += 1
    while j - 1 >= 0 and coh[j - 1] > coh[j]:
        j -= 1
    P = float(periods[j])
    phase = float(np.angle(np.sum(w * np.exp(2j * np.pi * tt / P)))) / (2 * np.pi) * P
    return P, t[0] + phase % P, float(coh[j])


def _step_phase(t: np.ndarray, w: np.ndarray, P: float, sound_s: float) -> float:
    """Time of the steps' phase on a grid of interval P: the earliest strong cluster of impact phases.

    The impacts' phases modulo P are gathered in 1 ms bins (weights ``w``) and smoothed over
    +-4 ms (a few ms of drift across the window).  The strongest cluster may be a step's later
    impact (a bounce as loud as the step): the earliest cluster within ``sound_s`` before it
    that holds at least half its weight is the steps' first impact.
    """
    nb = max(16, min(20000, int(round(P / 0.001))))
    bw = P / nb
    ph = np.mod(t - t[0], P)
    hist = np.bincount(np.minimum((ph / bw).astype(np.int64), nb - 1), weights=w, minlength=nb)
    half = max(1, int(round(0.004 / bw)))
    ext = np.concatenate([hist[-half:], hist, hist[:half]])
    cs = np.concatenate([[0.0], np.cumsum(ext)])
    dens = cs[2 * half + 1:] - cs[: len(cs) - 2 * half - 1]  # circular box sum, one per bin
    top = int(np.argmax(dens))
    reach = int(round(min(sound_s, 0.45 * P) / bw))
    for j in range(reach, 0, -1):  # earliest first
        c = (top - j) % nb
        if dens[c] >= 0.5 * dens[top] and dens[c] >= dens[(c - 1) % nb] and dens[c] >= dens[(c + 1) % nb]:
            return float(t[0] + c * bw)
    return float(t[0] + top * bw)


def nominal_interval(measured_s: float, tolerance: float = 0.005) -> float | None:
    """The quartz step interval within ``tolerance`` (relative) of a measured one, or None."""
    for c in QUARTZ_INTERVALS_S:
        if abs(measured_s / c - 1) <= tolerance:
            return c
    return None


def _grow_period(t: np.ndarray, w: np.ndarray, P: float, phase: float) -> tuple[float, float]:
    """A fraction of the true interval lines up too; if only every m-th slot of the grid holds
    sound (m = 2, 3 or 5; the others (nearly) empty), the interval is m times as long."""
    for _ in range(4):
        kk = np.round((t - phase) / P).astype(np.int64)
        near = np.abs(t - (phase + kk * P)) <= 0.3 * P  # wide: the phase may be pulled by a bounce
        grown = False
        for m in (2, 3, 5):
            if t[-1] - t[0] < 2 * m * P:
                continue
            cw = np.array([float(np.sum(w[near & (kk % m == c)])) for c in range(m)])
            c_best = int(np.argmax(cw))
            if np.all(np.delete(cw, c_best) < 0.2 * cw[c_best]):
                phase += c_best * P
                P *= m
                grown = True
                break
        if not grown:
            break
    return P, phase
