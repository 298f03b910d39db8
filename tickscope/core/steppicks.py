"""One step per slot of a trial grid, the line through the chosen steps, and how much each impact
counts in the search (pure; used by core/acquire.py)."""
from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from .acquire import OpenImpact


def impact_weights(buf: list[OpenImpact]) -> np.ndarray:
    """How much each impact counts in the search: its SNR against the loud end, capped.

    Impacts that stand far above the noise floor count most (the level alone can mislead: a
    phone's gain control lifts the noise between steps to the steps' level).  A sound out of
    digital silence stands 200 dB over its "floor" (the detector's floor has not yet risen to
    the room's noise): each impact's floor is taken no lower than the median floor of the
    window, and the SNR is capped at 60 dB.  Behind a noise gate every sound rises out of
    digital silence: the floor is also taken no lower than 50 dB under the loud end, so that a
    second clock 12 dB down stands 12 dB less far above it than the movement (both would
    otherwise pass any cap and weigh the same).  Weights are relative to the loud end (90th
    percentile: the steps, while they are a tenth of the sounds or more), so the faint noise
    impacts of a quiet room -- several a second at 8 kHz, four for every step -- weigh little;
    capped so that no single knock dominates.
    """
    snr = np.array([o.imp.frame_snr_db for o in buf])
    peak = np.array([o.imp.peak_dbfs for o in buf])
    floor = np.maximum(np.maximum(peak - snr, np.median(peak - snr)), np.percentile(peak, 90) - 50.0)
    snr = np.minimum(peak - floor, 60.0)
    return np.clip(10 ** ((snr - np.percentile(snr, 90)) / 10), 0.02, 2.0)


def _pick_steps(buf: list[OpenImpact], phase: float, P: float, back: float, tol: float) -> dict[int, OpenImpact]:
    """The step of each slot ``phase + k P`` among the impacts from ``back`` before it to ``tol`` after.

    A step's sound can hold several impacts (a hand's bounce as loud as the step): the step
    is the earliest impact within 6 dB of the slot's loudest.  But where that earliest one is
    a different sound -- a quieter second clock ticking just before -- the loudest impacts
    form the movement's line: when the loudest and the earliest differ by a delay that is not
    the same from slot to slot (a bounce follows its step at a fixed delay), the chain of
    impacts that lines up better is taken, the loudest on a tie.
    """
    near: dict[int, list[OpenImpact]] = {}
    for o in buf:
        k = int(round((o.t_s - phase + 0.5 * (back - tol)) / P))
        r = o.t_s - (phase + k * P)
        if -back <= r <= tol:
            near.setdefault(k, []).append(o)
    early: dict[int, OpenImpact] = {}
    loud: dict[int, OpenImpact] = {}
    for k, group in near.items():
        top = max(o.imp.frame_snr_db for o in group)
        early[k] = min((o for o in group if o.imp.frame_snr_db >= top - 6.0), key=lambda o: o.t_s)
        loud[k] = max(group, key=lambda o: o.imp.frame_snr_db)
    differ = [k for k in early if early[k] is not loud[k]]
    if len(differ) < 3 or len(early) < 4:
        return early
    delays = np.array([loud[k].t_s - early[k].t_s for k in differ])
    if float(np.std(delays)) < 0.002:
        return early  # the same step's later impact, at a fixed delay (2 ms: our own margin)
    spread_early = _line_spread(early)
    spread_loud = _line_spread(loud)
    return loud if spread_loud <= max(2 * spread_early, spread_early + 0.0005) else early


def _grid_line(chosen: dict) -> tuple[np.ndarray, np.ndarray, float, float, np.ndarray]:
    """Slot numbers, times, the line t = a + b k through them (outliers left out) and which were kept."""
    ks = np.array(sorted(chosen))
    ts = np.array([chosen[k].t_s for k in ks])
    b, a = np.polyfit(ks, ts, 1)
    res = ts - (a + b * ks)
    keep = np.abs(res - np.median(res)) < max(0.005, 4 * np.median(np.abs(res - np.median(res))) + 1e-4)
    if keep.sum() >= 3:
        b, a = np.polyfit(ks[keep], ts[keep], 1)
    return ks, ts, float(a), float(b), keep


def _line_spread(chosen: dict) -> float:
    """Median absolute deviation (s) of the chosen impacts from the line through them."""
    ks = np.array(sorted(chosen), dtype=np.float64)
    ts = np.array([chosen[int(k)].t_s for k in ks])
    b, a = np.polyfit(ks, ts, 1)
    return float(np.median(np.abs(ts - (a + b * ks))))
