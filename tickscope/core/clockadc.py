"""The line through the driver's capture times of the blocks (pure).

For fixed-size blocks the capture times (PortAudio's inputBufferAdcTime) do not wait for the rest
of a chunk, so their line against device time bounds how far the blocks' wait can have drifted;
see core/clockfit.py.
"""
from __future__ import annotations

import math

import numpy as np

#: The driver's capture times settle for this long after a stream starts (see _adc_line).
ADC_SETTLE_S = 30.0


def _adc_fit(x0: np.ndarray, e: np.ndarray, st: np.ndarray, segments: int) -> tuple[float, float] | None:
    """Slope of ``e`` against ``x0`` and its standard error: the median per segment, a line
    through those with one offset per stretch, segments far off the line left out."""
    span = x0[-1] - x0[0]
    if span <= 0:
        return None
    seg = np.minimum(((x0 - x0[0]) / span * segments).astype(np.int64), segments - 1)
    key = st * (segments + 1) + seg
    keys = np.unique(key)
    if len(keys) < 8:
        return None
    mx = np.array([np.median(x0[key == k]) for k in keys])
    me = np.array([np.median(e[key == k]) for k in keys])
    ks = keys // (segments + 1)
    used = np.unique(ks)
    A = np.zeros((len(keys), 1 + len(used)))
    A[:, 0] = mx - mx.mean()
    A[np.arange(len(keys)), 1 + np.searchsorted(used, ks)] = 1.0
    keep = np.ones(len(keys), dtype=bool)
    for _ in range(5):  # a stream's first capture times are wild (measured: 0.6 s off for 1 s): left out
        coef, *_ = np.linalg.lstsq(A[keep], me[keep], rcond=None)
        res = me - A @ coef
        mad = 1.4826 * float(np.median(np.abs(res[keep])))
        new = np.abs(res) <= max(5 * mad, 1e-6)
        if (new == keep).all():
            break
        keep = new
    dof = int(keep.sum()) - A.shape[1]
    if dof < 4:
        return None
    cov = np.linalg.pinv(A[keep].T @ A[keep]) * float(res[keep] @ res[keep]) / dof
    return float(coef[0]), math.sqrt(max(float(cov[0, 0]), 0.0))


def _adc_line(x0: np.ndarray, adc: np.ndarray, stretch: np.ndarray, segments: int) -> tuple[float, float] | None:
    """The line through the driver's capture times (slope of capture time minus device time per
    device second, and its standard error), or None when they are too few or have not settled:
    after a stream starts they can creep towards their line for tens of seconds (measured on the
    loopback: a hump of 1.7 ms over the first 12 s, a creep of 1.6 ms over the first 30 s), so
    the first ADC_SETTLE_S are left out, at least as long again must follow, and the two halves of
    what follows must agree."""
    ok = np.isfinite(adc) & (adc != 0) & (x0 >= x0[0] + ADC_SETTLE_S)
    if ok.sum() < 64 or x0[ok][-1] - x0[ok][0] < ADC_SETTLE_S:
        return None
    x0, e, st = x0[ok], adc[ok] - x0[ok], stretch[ok]
    whole = _adc_fit(x0, e, st, segments)
    mid = 0.5 * (x0[0] + x0[-1])
    halves = [_adc_fit(x0[q], e[q], st[q], segments // 2) for q in (x0 < mid, x0 >= mid)]
    if whole is None or any(hv is None for hv in halves):
        return None
    (c1, s1), (c2, s2) = halves
    if abs(c1 - c2) > 3.0 * math.hypot(s1, s2) + 2e-7:
        return None
    return whole
