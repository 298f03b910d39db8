"""Mains hum removed from a step's snippet, below the ring's own frequency (pure; see core/ringdown.py)."""
from __future__ import annotations

import math

import numpy as np

from .dsp import fast_len

HUM_TOP_HZ = 1000.0  # hum harmonics up to here are removed ...
HUM_RING_GAP_HZ = 300.0  # ... and only those this far below the ring's frequency
HUM_BOTTOM_HZ = 140.0  # below this the snippets' 300 Hz high-pass has removed them already
#: A snippet's first and last 4 ms carry its filter's edge transients (the audio is cut there: with
#: strong hum the cut alone rings the high-pass).
EDGE_S = 0.004


# -- mains hum ----------------------------------------------------------------------------------------

_HUM_CACHE: dict = {}


def _hum_basis(n: int, samplerate: float, hum_hz: float, top_hz: float):
    """Least-squares pieces for the hum harmonics between HUM_BOTTOM_HZ and top_hz over n samples:
    (basis [n, 4H], pseudo-inverse [4H, n]); each harmonic as a cosine and a sine whose amplitudes
    may change linearly over the window (a mains frequency off by a few tenths of a hertz)."""
    key = (n, float(samplerate), float(hum_hz), round(float(top_hz), 1))
    got = _HUM_CACHE.get(key)
    if got is not None or key in _HUM_CACHE:
        return got
    h = np.arange(max(1, math.ceil(HUM_BOTTOM_HZ / hum_hz)), int(top_hz // hum_hz) + 1)
    if not len(h):
        _HUM_CACHE[key] = None
        return None
    t = np.arange(n) / samplerate
    ph = 2 * math.pi * hum_hz * np.outer(t, h)
    u = (2.0 * np.arange(n) / max(n - 1, 1) - 1.0)[:, None]  # -1..1 over the window
    A = np.hstack([np.cos(ph), np.sin(ph), u * np.cos(ph), u * np.sin(ph)])
    P = np.linalg.pinv(A)
    if len(_HUM_CACHE) > 8:
        _HUM_CACHE.clear()
    _HUM_CACHE[key] = got = (A.astype(np.float32), P.astype(np.float32))
    return got


def ring_frequency_hz(early: np.ndarray, late: np.ndarray, samplerate: float) -> float:
    """The ring's own frequency: where the power of ``early`` (a step's first moments) stands most
    above that of ``late`` (as long, from the snippet's end) -- steady hum is in both, the ring is
    not -- above 300 Hz."""
    n = min(len(early), len(late))
    if n < 8:
        return 0.0
    nfft = fast_len(max(n, int(samplerate / 10)))  # bins of 10 Hz or finer
    win = np.hanning(n)
    pe = np.abs(np.fft.rfft(np.asarray(early[:n], dtype=np.float64) * win, nfft)) ** 2
    pl = np.abs(np.fft.rfft(np.asarray(late[-n:], dtype=np.float64) * win, nfft)) ** 2
    d = pe - pl
    d[np.fft.rfftfreq(nfft, 1.0 / samplerate) < 300.0] = -np.inf
    return float(int(np.argmax(d)) * samplerate / nfft)


def remove_hum(x: np.ndarray, samplerate: float, hum_hz: float, ring_hz: float) -> np.ndarray:
    """``x`` (a snippet) with the mains hum harmonics that lie clear below the ring removed: least
    squares over its interior (its filter's edge transients left out), subtracted everywhere;
    ``x`` itself when no harmonic qualifies."""
    top = min(HUM_TOP_HZ, 0.45 * samplerate, ring_hz - HUM_RING_GAP_HZ)
    if not hum_hz or top < HUM_BOTTOM_HZ:
        return x
    e0, e1 = int(EDGE_S * samplerate), int(EDGE_S * samplerate)
    n = len(x) - e0 - e1
    if n < int(0.02 * samplerate):
        return x
    got = _hum_basis(n, samplerate, hum_hz, top)
    if got is None:
        return x
    A, P = got
    y = np.array(x, dtype=np.float64)
    y[e0: e0 + n] -= A @ (P @ np.asarray(x[e0: e0 + n], dtype=np.float32))
    return y
