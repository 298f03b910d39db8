"""The ring-down of one step's window: its main impact found, its own sound cut before a new one,
Schroeder's decay curve fitted (pure; the method's notes are in core/ringdown.py)."""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from ..units import DB_PER_NEPER
from .dsp import line_fit

BLOCK_S = 1e-4  # the decay curve is built from the energy of 0.1 ms blocks
MAIN_SEARCH_S = 0.025  # the main impact lies within 25 ms of the step's time
OWN_SOUND_S = 0.015  # rises in the first 15 ms after the main peak are its own contacts
NEW_SOUND_DB = 10.0  # a new sound rises this far over the envelope's low of the ...
NEW_SOUND_LOOK_S = 0.005  # ... 5 ms before it
START_DB = -5.0  # fit range on the decay curve (ISO 3382 T20: -5..-25 dB; from memory)
STOP_DB = -25.0
MIN_RANGE_DB = 4.0  # a line over less of the curve is no measurement
TAIL_FIT_S = 0.02  # the late decay that continues the curve: the last 20 ms of the envelope
#: A decay curve whose line misfit (RMS, dB) exceeds this share of the dB it spans bends away from
#: one exponential: a room's reverberation or noise (clean simulated ring-downs stay under 0.006,
#: with a 250 ms room 0.02-0.03; our own threshold).
BENT_SHARE = 0.03


@dataclass(frozen=True)
class StepDecay:
    """The ring-down of one step (or of a polarity's coherent average)."""

    decay_ms: float  # amplitude e-folding time tau (nan when not measurable)
    fit_range_db: float  # dB of the decay curve the line spans
    fit_rms_db: float  # RMS misfit of the line (dB)
    bent: bool = False  # the curve bends away from one exponential (BENT_SHARE)
    peak_ms: float = float("nan")  # the main impact's peak after the step's time
    end_ms: float = float("nan")  # where the step's own sound ends (a new sound, or the snippet's end)


_NAN_DECAY = StepDecay(float("nan"), 0.0, float("nan"))


def _block_energy(x: np.ndarray, nb: int) -> np.ndarray:
    m = (len(x) // nb) * nb
    if nb == 1:
        return x[:m] * x[:m]
    r = x[:m].reshape(-1, nb)
    return np.einsum("ij,ij->i", r, r)


def _moving_mean(e: np.ndarray, w: int) -> np.ndarray:
    """Centred moving mean over w blocks (shorter at the ends)."""
    n = len(e)
    if w <= 1 or n == 0:
        return np.asarray(e, dtype=np.float64)
    cs = np.empty(n + 1)
    cs[0] = 0.0
    np.cumsum(e, out=cs[1:])
    h = w // 2
    idx = np.arange(n)
    lo = np.clip(idx - h, 0, n)
    hi = np.clip(idx - h + w, 0, n)
    return (cs[hi] - cs[lo]) / (hi - lo)


def main_impact(E: np.ndarray, block_s: float, noise_block: float) -> tuple[int, int, bool]:
    """In block energies ``E`` from the step's time on: the block of the main impact's peak, the block
    where the step's own sound ends, and whether a new sound starts there (else the sound runs to
    the end of ``E``)."""
    w = max(1, int(round(0.001 / block_s)))
    S = _moving_mean(E, w)
    p = int(np.argmax(S[: max(1, min(len(S), int(round(MAIN_SEARCH_S / block_s))))]))
    k = max(1, int(round(NEW_SOUND_LOOK_S / block_s)))
    j_from = p + max(k, int(round(OWN_SOUND_S / block_s)))
    if j_from >= len(S):
        return p, len(E), False
    lows = np.lib.stride_tricks.sliding_window_view(S[j_from - k: len(S) - 1], k).min(axis=1)
    np.maximum(lows, max(noise_block, 1e-300), out=lows)
    up = np.flatnonzero(S[j_from:] > lows * 10 ** (NEW_SOUND_DB / 10))
    if not len(up):
        return p, len(E), False
    j = j_from + int(up[0])
    return p, max(p + 1, j - k + int(np.argmin(S[j - k: j]))), True


def decay_curve_fit(E: np.ndarray, block_s: float, noise_block: float, *, sound_goes_on: bool) -> StepDecay:
    """Decay time of block energies ``E`` that start at the sound's peak and end with its own sound.

    ``noise_block`` is the noise energy of one block (subtracted); ``sound_goes_on`` says that the
    sound continues after ``E`` ends (the snippet was too short for it), rather than being followed
    by another sound.
    """
    n = len(E)
    if n < 8:
        return _NAN_DECAY
    w = max(1, int(round(0.001 / block_s)))
    S = _moving_mean(E, w)
    # the curve ends where the envelope meets the noise (within 3 dB)
    c = n
    if noise_block > 0:
        below = np.flatnonzero(S[w:] < 2.0 * noise_block)
        if len(below):
            c = int(below[0]) + w
    if c < 8:
        return _NAN_DECAY
    rev = np.cumsum((E[:c] - noise_block)[::-1])[::-1]
    if rev[0] <= 0:
        return _NAN_DECAY
    # what the decay still holds after c: its envelope's own late decay, continued to the sound's end
    tail = 0.0
    if c < n or sound_goes_on:
        a = max(0, c - max(4, int(round(TAIL_FIT_S / block_s))))
        env = S[a:c] - noise_block
        ok = env > (0.5 * noise_block if noise_block > 0 else 0.0)
        if np.count_nonzero(ok) >= 4:
            t = (np.flatnonzero(ok) + a - c) * block_s
            sl, ic = line_fit(t, np.log(env[ok]))  # ln(energy per block) at (t - t_c)
            if sl < 0:
                tail = math.exp(ic) / block_s / -sl
                if not sound_goes_on:  # the energy up to the next sound only
                    tail *= 1.0 - math.exp(sl * (n - c) * block_s)
    edc = rev + tail
    ratio = edc / edc[0]
    lo_db = STOP_DB if tail <= 0 else max(STOP_DB, 10 * math.log10(tail / edc[0]) + 0.5)
    j0 = int(np.argmax(ratio <= 10 ** (START_DB / 10)))
    below = np.flatnonzero(ratio <= 10 ** (lo_db / 10))
    j1 = int(below[0]) if len(below) else c
    m = j1 - j0
    if m < 4:
        return _NAN_DECAY
    y = np.log(np.maximum(ratio[j0:j1], 1e-30)) * (10.0 / math.log(10.0))
    cc = np.arange(m) - 0.5 * (m - 1)
    slope = float(np.dot(cc, y)) * 12.0 / (m * (m * m - 1.0)) / block_s  # dB/s
    span = float(y[0] - y[-1])
    if slope >= 0 or span < MIN_RANGE_DB:
        return _NAN_DECAY
    resid = y - float(np.mean(y)) - slope * block_s * cc
    rms = float(math.sqrt(float(np.dot(resid, resid)) / m))
    return StepDecay(-DB_PER_NEPER / slope * 1e3, span, rms, rms > BENT_SHARE * span)


def window_decay(x: np.ndarray, samplerate: float, noise_power: float) -> StepDecay:
    """The ring-down of ``x``, which starts at (or just before) a step's time: its main impact found,
    its own sound cut before a new one, the decay curve fitted (see the notes in core/ringdown.py)."""
    nb = max(1, int(round(samplerate * BLOCK_S)))
    block_s = nb / samplerate
    E = _block_energy(np.asarray(x, dtype=np.float64), nb)
    if len(E) < 16:
        return _NAN_DECAY
    noise_block = noise_power * nb
    p, q, new = main_impact(E, block_s, noise_block)
    rd = decay_curve_fit(E[p:q], block_s, noise_block, sound_goes_on=not new)
    return dataclasses.replace(rd, peak_ms=p * block_s * 1e3, end_ms=q * block_s * 1e3)
