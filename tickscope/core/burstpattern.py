"""End-of-life stepping found while acquiring the grid: every slot holds a burst of steps (pure;
used by core/acquire.py)."""
from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from ..model import Bursts
from .steptemplate import Template
from .timing import match

if TYPE_CHECKING:
    from .acquire import OpenImpact
    from .trackconfig import TrackerConfig


#: End-of-life bursts: steps follow the burst's first within this window (s) ...
BURST_WINDOW_S = (0.012, 0.35)
#: ... each at the same offset in every burst, to within this (s, SD; our own margin: a circuit's
#: burst spacing is set by its counter)
BURST_OFFSET_SD_S = 0.004
#: ... in this share of the slots at least
BURST_SHARE = 0.7
#: ... roughly evenly spaced: the i-th later step within this share of the spacing (or 10 ms) of
#: i spacings (the counter spaces the pulses evenly; a rotor still moving from the last step
#: sounds its impact a few ms early or late; our own margin)
BURST_EVEN = 0.25


def _burst_pattern(buf: list[OpenImpact], steps: list[OpenImpact], templates: dict[int, Template],
                   interval_s: float, cfg: "TrackerConfig", samplerate: float) -> Bursts | None:
    """End-of-life stepping: every slot of a 2-4 s grid holds a burst of one-second steps.

    The circuit holds steps back and delivers n of them every n seconds (Philips PCA16xx: "bursts
    of 4 pulses are produced every 4 s"; two steps every 2 s is also documented in consumer watch
    manuals).  So a burst is: the slot's step, then n - 1 more sounds that match a step template
    well, at the same offsets in every slot, where n one-second steps make the grid's interval.

    A step's own later impacts (a hand's bounce, the rotor settling) recur at fixed offsets too
    and can match a template as well: the sounds after each slot's step that match well are
    gathered into clusters of one offset (within 4 ms) across slots; clusters heard in at least
    ``BURST_SHARE`` of the slots are candidates, and of the sets of n - 1 of them spaced roughly
    evenly (``BURST_EVEN``) the one that matches the templates best (and, on a near tie, is
    loudest: steps are the loudest sounds of a burst) is the burst.
    """
    if interval_s < 1.5 or len(steps) < 3:
        return None
    n = int(round(interval_s))
    if n < 2 or abs(interval_s / n - 1.0) > 0.02:
        return None
    lo, hi = BURST_WINDOW_S
    hi = min(hi, 0.6 * interval_s / n)
    max_lag = int(0.003 * samplerate)
    heard = []  # per slot: (offset s, match, peak dBFS relative to the slot's step) of sounds like a step
    for st in steps:
        later = [o for o in buf if st.t_s + lo < o.t_s <= st.t_s + hi]
        like = []
        for o in later:
            rho = max(match(o.imp.wsnippet, tm, max_lag=max_lag)[1] for tm in templates.values())
            if rho >= cfg.good_match:
                like.append((o.t_s - st.t_s, rho, o.imp.peak_dbfs - st.imp.peak_dbfs))
        heard.append(like)
    clusters = _offset_clusters(heard)
    need = BURST_SHARE * len(steps)
    cands = [c for c in clusters if c["slots"] >= need]
    if len(cands) < n - 1:
        return None
    import itertools

    best = None
    for combo in itertools.combinations(sorted(cands, key=lambda c: c["offset"]), n - 1):
        offs = np.array([c["offset"] for c in combo])
        spacing = offs[-1] / (n - 1)
        if np.any(np.abs(offs - spacing * np.arange(1, n)) > max(0.010, BURST_EVEN * spacing)):
            continue
        # the slots that held every sound of the set
        full = set.intersection(*(c["members"] for c in combo))
        if len(full) < need:
            continue
        score = sum(c["match"] for c in combo) + 0.005 * sum(c["level_db"] for c in combo)
        if best is None or score > best[0]:
            best = (score, combo, full)
    if best is None:
        return None
    _, combo, full = best
    per = np.array([[dict(c["by_slot"])[i] for c in combo] for i in sorted(full)])
    if np.any(np.std(per, axis=0) > BURST_OFFSET_SD_S):
        return None
    med = np.median(per, axis=0) * 1e3
    return Bursts(steps_per_burst=n, burst_period_s=float(interval_s), spacing_ms=float(med[0]),
                  offsets_ms=tuple(float(v) for v in med), share_full=float(len(full) / len(steps)))


def _offset_clusters(heard: list[list[tuple[float, float, float]]], width_s: float = 0.006) -> list[dict]:
    """The sounds after each slot's step, gathered by offset: each cluster holds at most one sound
    per slot (the best-matching within ``width_s`` of the cluster's first offset), with the slots
    it was heard in, its median offset, match and level."""
    items = sorted((off, rho, lv, i) for i, like in enumerate(heard) for off, rho, lv in like)
    clusters: list[dict] = []
    for off, rho, lv, i in items:
        c = clusters[-1] if clusters else None
        if c is None or off - c["first"] > width_s:
            c = dict(first=off, by_slot={})
            clusters.append(c)
        prev = c["by_slot"].get(i)
        if prev is None or rho > prev[1]:
            c["by_slot"][i] = (off, rho, lv)
    out = []
    for c in clusters:
        v = np.array(list(c["by_slot"].values()))
        out.append(dict(offset=float(np.median(v[:, 0])), match=float(np.median(v[:, 1])),
                        level_db=float(np.median(v[:, 2])), slots=len(v), members=set(c["by_slot"]),
                        by_slot={i: x[0] for i, x in c["by_slot"].items()}))
    return out
