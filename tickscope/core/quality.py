"""Signal quality of a recording: mains hum (pure)."""
from __future__ import annotations

import math

import numpy as np

from . import dsp

#: A mains line this far (dB) over its neighbouring bins is hum worth a note (our own margin).
HUM_MIN_DB = 15.0


def mains_hum(x: np.ndarray, samplerate: float) -> tuple[float | None, float | None]:
    """The mains frequency (50 or 60 Hz) standing out of the spectrum of ``x``, and by how many dB.

    Welch's power spectrum with 1 s segments; the level is the peak of the three bins around
    the line over the median of the bins 2-10 Hz either side.  (None, None) when neither
    stands ``HUM_MIN_DB`` out, or the audio is under a second long.
    """
    x = np.asarray(x, dtype=np.float64)
    if len(x) < samplerate:
        return None, None
    f, p = dsp.welch_psd(x - x.mean(), samplerate, int(samplerate))
    best: tuple[float | None, float | None] = (None, None)
    for hz in (50.0, 60.0):
        i = int(round(hz / (f[1] - f[0])))
        if i + 12 >= len(p):
            continue
        neigh = np.concatenate([p[i - 10: i - 2], p[i + 3: i + 11]])
        lvl = 10 * math.log10(max(p[i - 1: i + 2].max(), 1e-30) / max(np.median(neigh), 1e-30))
        if lvl >= HUM_MIN_DB and (best[1] is None or lvl > best[1]):
            best = (hz, lvl)
    return best
