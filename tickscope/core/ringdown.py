"""Ring-down of one step: the e-folding time of its amplitude envelope.

Method: M. R. Schroeder, "New method of measuring reverberation time", J. Acoust.
Soc. Am. 37(3):409-412 (1965): the energy decay curve is the backward integral of the
squared signal.  A least-squares line is fitted to the curve in dB over a range below
its start (ISO 3382 uses -5..-25 dB for T20; from memory), shortened when the noise
floor is near, after subtracting the noise power so the curve does not bend up.

For an envelope proportional to e^(-t/tau) the energy decays 8.686/tau dB per second,
so ``tau = -8.686 / slope`` and T60 = 6.908 tau.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..units import DB_PER_NEPER


@dataclass(frozen=True)
class RingDown:
    decay_ms: float  # amplitude e-folding time tau (nan when not measurable)
    fit_range_db: float  # how many dB of the decay curve the fit used
    fit_rms_db: float  # RMS deviation of the curve from the line


def measure_ringdown(x: np.ndarray, samplerate: float, *, noise_power: float = 0.0,
                     start_db: float = -3.0, stop_db: float = -25.0,
                     min_range_db: float = 8.0, margin_db: float = 10.0) -> RingDown:
    """Decay time constant of the ring-down in ``x`` (which starts at the sound's onset).

    Parameters
    ----------
    x : np.ndarray [shape=(n,)]
        The sound from its onset to where the next sound starts (high-passed).
    samplerate : float
        Hz.
    noise_power : float
        Mean power of the background noise in ``x`` (subtracted before integrating).
    start_db, stop_db : float
        Fit range on the decay curve, relative to the curve at the envelope's peak.
    min_range_db : float
        Below this usable range the decay is reported as not measurable (nan).
    margin_db : float
        The fit stops this far above the noise floor.

    Returns
    -------
    RingDown
    """
    x = np.asarray(x, dtype=np.float64)
    nan = RingDown(float("nan"), 0.0, float("nan"))
    if len(x) < 16:
        return nan
    e = x * x
    # start at the envelope's peak (after the attack), smoothed over ~0.5 ms (a centred moving
    # average, as np.convolve(e, ones(k) / k, "same"), from a running sum)
    k = max(1, int(0.0005 * samplerate))
    n = len(e)
    h = (k - 1) // 2
    cs = np.empty(n + 1)
    cs[0] = 0.0
    np.cumsum(e, out=cs[1:])
    # window of sample i: e[max(0, i + h - k + 1) .. min(n - 1, i + h)] (zeros outside)
    hi = cs[np.minimum(np.arange(n) + h, n - 1) + 1] if n <= k + h else np.concatenate([cs[h + 1: n + 1], np.full(h, cs[n])])
    lo_start = k - 1 - h  # first sample whose window starts inside e
    lo = np.concatenate([np.zeros(min(lo_start, n)), cs[: max(0, n - lo_start)]])
    sm = (hi - lo) / k
    p = int(np.argmax(sm))
    peak = sm[p]
    if peak <= 0:
        return nan
    e = e[p:] - noise_power
    # truncate where the smoothed energy meets the noise (Lundeby-style, simplified)
    sm = sm[p:]
    if noise_power > 0:
        below = np.flatnonzero(sm < 2.0 * noise_power)
        if len(below):
            e = e[: max(int(below[0]), 8)]
    e = np.maximum(e, 0.0)
    edc = np.cumsum(e[::-1])[::-1]
    if edc[0] <= 0:
        return nan
    ratio = edc / edc[0]  # the decay curve, linear; in dB only where the fit needs it
    snr_db = 10 * math.log10(peak / noise_power) if noise_power > 0 else 120.0
    lo_db = max(stop_db, -(snr_db - margin_db))
    if start_db - lo_db < min_range_db:
        return nan
    i0 = int(np.argmax(ratio <= 10 ** (start_db / 10)))
    below_lo = ratio <= 10 ** (lo_db / 10)
    i1 = int(np.argmax(below_lo)) if below_lo.any() else len(ratio) - 1
    if i1 - i0 < 4:
        return nan
    # least-squares line through the curve in dB at evenly spaced points (closed form)
    y = 10 * np.log10(np.maximum(ratio[i0:i1], 1e-30))
    m = i1 - i0
    c = np.arange(m) - 0.5 * (m - 1)
    slope = float(np.dot(c, y)) * 12.0 / (m * (m * m - 1.0)) * samplerate
    if slope >= 0:
        return nan
    resid = y - float(np.mean(y)) - (slope / samplerate) * c
    rms = float(np.sqrt(np.dot(resid, resid) / m))
    return RingDown(float(-DB_PER_NEPER / slope * 1e3), float(y[0] - y[-1]), rms)
