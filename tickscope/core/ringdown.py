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

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from ..model import RingDownStats
from ..units import DB_PER_NEPER
from . import kernels
from .dsp import RollingWindow, fast_len, line_fit, t_ppf


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
    if kernels.compiled():  # the same method in C (``_kernels.c``); this function is its reference
        got = kernels.ringdown_line(x, samplerate, noise_power, start_db, stop_db, min_range_db, margin_db)
        if got is None:
            return RingDown(float("nan"), 0.0, float("nan"))
        slope, range_db, rms = got
        return RingDown(float(-DB_PER_NEPER / slope * 1e3), range_db, rms)
    return _measure_ringdown_numpy(x, samplerate, noise_power=noise_power, start_db=start_db, stop_db=stop_db,
                                   min_range_db=min_range_db, margin_db=margin_db)


def _measure_ringdown_numpy(x: np.ndarray, samplerate: float, *, noise_power: float, start_db: float,
                            stop_db: float, min_range_db: float, margin_db: float) -> RingDown:
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
    # truncate where the smoothed energy meets the noise (Lundeby-style, simplified)
    m = n - p
    if noise_power > 0:
        b = int(np.argmax(sm[p:] < 2.0 * noise_power))
        if sm[p + b] < 2.0 * noise_power:
            m = min(max(b, 8), m)
    e = e[p: p + m] - noise_power
    np.maximum(e, 0.0, out=e)
    # the decay curve, linear, stored backwards: rev[j] = curve at sample m-1-j (ascending, as the
    # curve never rises), so its threshold crossings are binary searches
    rev = np.cumsum(e[::-1])
    if rev[-1] <= 0:
        return nan
    rev /= rev[-1]
    snr_db = 10 * math.log10(peak / noise_power) if noise_power > 0 else 120.0
    lo_db = max(stop_db, -(snr_db - margin_db))
    if start_db - lo_db < min_range_db:
        return nan

    def first_at_or_below(level: float) -> int | None:
        n_le = int(np.searchsorted(rev, level, side="right"))  # samples at or below the level
        return m - n_le if n_le else None

    i0 = first_at_or_below(10 ** (start_db / 10)) or 0
    i1 = first_at_or_below(10 ** (lo_db / 10))
    if i1 is None:
        i1 = m - 1
    if i1 - i0 < 4:
        return nan
    ratio = rev[m - i1: m - i0][::-1]  # the curve over [i0, i1)
    # least-squares line through the curve in dB at evenly spaced points (closed form)
    y = np.log(np.maximum(ratio, 1e-30)) * (10.0 / math.log(10.0))  # dB (np.log is 2x faster than log10)
    nfit = i1 - i0
    c = np.arange(nfit) - 0.5 * (nfit - 1)
    slope = float(np.dot(c, y)) * 12.0 / (nfit * (nfit * nfit - 1.0)) * samplerate
    if slope >= 0:
        return nan
    resid = y - float(np.mean(y)) - (slope / samplerate) * c
    rms = float(np.sqrt(np.dot(resid, resid) / nfit))
    return RingDown(float(-DB_PER_NEPER / slope * 1e3), float(y[0] - y[-1]), rms)




# ---------------------------------------------------------------------------------------------------
# The ring-down of a step, as the analysis measures it
#
# 1. Mains hum is removed from the step's snippet (least squares on the hum's harmonics that lie
#    below the ring, each allowed to drift a little in frequency: remove_hum).
# 2. The step's main impact is its loudest moment within MAIN_SEARCH_S of its time (a faint first
#    sound -- the drive pulse's onset, 25-30 dB under the impacts that follow it -- is not where
#    the ring-down starts), and its own sound ends where a new sound rises out of the decay (a
#    hand's bounce; rises within OWN_SOUND_S of the peak are the impact's own later contacts).
# 3. On that stretch: Schroeder's decay curve (backward integral of the energy, in blocks of
#    BLOCK_S) with the noise power subtracted; the energy the decay still holds after the point
#    where it meets the noise (or after the snippet's end, while the sound goes on) is added from
#    the envelope's own late decay (the truncation compensation of Lundeby et al.); a least-squares
#    line over -5..-25 dB of the curve (ISO 3382's T20 range; from memory), its lower end raised to
#    where the curve is the added tail's alone: the range comes from this curve's noise floor.
# 4. Each polarity's steps are also averaged coherently (aligned by their sub-sample times): the
#    noise falls as 1/N where the sound stays, and the average is measured the same way
#    (CoherentDecay); its 95 % interval comes from a jackknife over interleaved groups of steps.

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
HUM_TOP_HZ = 1000.0  # hum harmonics up to here are removed ...
HUM_RING_GAP_HZ = 300.0  # ... and only those this far below the ring's frequency
HUM_BOTTOM_HZ = 140.0  # below this the snippets' 300 Hz high-pass has removed them already
#: A snippet's first and last 4 ms carry its filter's edge transients (the audio is cut there: with
#: strong hum the cut alone rings the high-pass).
EDGE_S = 0.004


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
    its own sound cut before a new one, the decay curve fitted (see the notes above)."""
    nb = max(1, int(round(samplerate * BLOCK_S)))
    block_s = nb / samplerate
    E = _block_energy(np.asarray(x, dtype=np.float64), nb)
    if len(E) < 16:
        return _NAN_DECAY
    noise_block = noise_power * nb
    p, q, new = main_impact(E, block_s, noise_block)
    rd = decay_curve_fit(E[p:q], block_s, noise_block, sound_goes_on=not new)
    return dataclasses.replace(rd, peak_ms=p * block_s * 1e3, end_ms=q * block_s * 1e3)


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


# -- one step -----------------------------------------------------------------------------------------

def step_ringdown(imp, t_s: float, samplerate: float, *, pre: int, polarity: str,
                  collector: "CoherentDecay | None" = None, next_step_s: float | None = None) -> StepDecay:
    """The ring-down of the step whose sound is the impact ``imp`` (a :class:`~.snippets.Impact`), timed
    at ``t_s``.  ``pre`` is how many samples of the snippet precede its coarse onset (the noise before
    the sound is measured there); ``next_step_s`` the time of a later step within the snippet (a burst's
    next step), where this one's window ends.  A ``collector`` gets the cleaned step for its polarity's
    coherent average (and gives the mains hum to remove)."""
    x = imp.snippet
    fs = samplerate
    u = t_s * fs - imp.snippet_start  # the step's time, in samples of the snippet
    ms = int(0.001 * fs)
    e = int(EDGE_S * fs)
    first = ms  # the snippet's start-up transient is small unless strong hum was cut there
    if collector is not None and collector.hum_hz:
        x = remove_hum(x, fs, collector.hum_hz, collector.ring_hz(polarity, x, u))
        first = e
    # the noise: before the sound's coarse onset; or at the snippet's end if quieter there (under a
    # phone's gain control the noise before a step is amplified more than the noise during it)
    # (the 4 ms up to 1 ms before it: the snippet keeps 25 ms before the onset for an escapement's
    # unlocking, where a quartz step's noise window would take in the sounds before the step)
    pre_seg = x[max(first, pre - 5 * ms): max(first, pre - ms)]
    noise = float(np.dot(pre_seg, pre_seg)) / len(pre_seg) if len(pre_seg) > 8 else 0.0
    i0 = max(0, int(math.floor(u)) - max(1, int(0.0002 * fs)))
    i1 = len(x) - e
    if next_step_s is not None:
        i1 = min(i1, int((next_step_s * fs) - imp.snippet_start) - ms)
    tail = x[max(i0, i1 - int(0.012 * fs)): i1]
    if len(tail) > 8 and i1 - i0 > int(0.05 * fs):
        tail_power = float(np.dot(tail, tail)) / len(tail)
        noise = min(noise, tail_power) if noise > 0 else tail_power
    rd = window_decay(x[i0: max(i1, i0 + 1)], fs, noise)
    if collector is not None:
        collector.offer(t_s, polarity, x, u, noise)
    return rd


# -- each polarity's coherent average -----------------------------------------------------------------

@dataclass(frozen=True)
class CoherentResult:
    """The ring-down of a polarity's coherent average."""

    decay: StepDecay
    ci95_ms: float  # half-width of the 95 % interval of decay.decay_ms (nan: too few steps)
    steps: int  # steps averaged


class CoherentDecay:
    """Each polarity's steps averaged coherently, for a ring-down measured where single steps drown.

    A step is offered by :func:`step_ringdown` (its cleaned snippet and sub-sample time) and added
    when :meth:`commit` says so (the analyzer leaves out clipped, badly matched and abnormal steps).
    The window from 1 ms before each step's time to 84 ms after it is added into one of ``FRACTIONS``
    sums by the fractional part of its time, so that no step needs a transform of its own: each sum
    is shifted by its fraction's centre once, when the average is asked for (the alignment is then
    good to 1/16 of a sample).  Uncorrelated noise falls as 1/N in power; the average's noise floor is
    the steps' mean noise power over N.  The steps go round ``GROUPS`` interleaved groups, and the
    95 % interval is a jackknife over them (leave one group out: (G-1)/G times the sum of squared
    deviations of the G decay times, with Student's t at G-1 degrees of freedom).
    """

    GROUPS = 10
    BEFORE_S = 0.001
    LENGTH_S = 0.084  # at most; as long as the first step of the polarity allows (less 2 ms)
    MIN_STEPS = 4

    def __init__(self, samplerate: float):
        self.samplerate = float(samplerate)
        self.hum_hz: float | None = None  # mains hum to remove from every step (set by the analyzer)
        self.fractions = 8 if samplerate <= 50000 else 4
        self.before = int(round(self.BEFORE_S * samplerate))
        self._ring_hz: dict[str, float] = {}
        self._pending: dict[float, tuple] = {}
        self.reset()

    def reset(self) -> None:
        """Forget every step (the grid was found again: what was averaged was not this movement)."""
        self._sums: dict[str, np.ndarray] = {}
        self._counts = {p: np.zeros(self.GROUPS, dtype=np.int64) for p in "AB"}
        self._noise = {p: np.zeros(self.GROUPS) for p in "AB"}
        self._pending.clear()
        self._cache: dict[str, tuple[int, CoherentResult | None]] = {}

    def ring_hz(self, polarity: str, x: np.ndarray, u: float) -> float:
        """The ring's frequency for this polarity, from the first 15 ms of the first step that asks
        (``x`` its snippet, ``u`` its time in samples of it)."""
        f = self._ring_hz.get(polarity)
        if f is None:
            i, w = max(0, int(u)), int(0.015 * self.samplerate)
            f = self._ring_hz[polarity] = ring_frequency_hz(x[i: i + w], x[-w:], self.samplerate)
        return f

    def steps(self, polarity: str) -> int:
        return int(self._counts[polarity].sum())

    def offer(self, t_s: float, polarity: str, x: np.ndarray, u: float, noise_power: float) -> None:
        """A step measured: its snippet ``x`` (cleaned), its time ``u`` in samples of ``x``."""
        self._pending[t_s] = (polarity, x, u, noise_power)

    def commit(self, t_s: float, use: bool = True) -> None:
        """The step offered at ``t_s`` is added to its polarity's average (``use``) or dropped."""
        got = self._pending.pop(t_s, None)
        if got is None or not use:
            return
        pol, x, u, noise = got
        if pol not in self._counts or not math.isfinite(noise):
            return
        n = int(math.floor(u))
        a = n - self.before
        end = len(x) - int(EDGE_S * self.samplerate)
        sums = self._sums.get(pol)
        if sums is None:
            length = min(int(round(self.LENGTH_S * self.samplerate)), end - a - int(0.002 * self.samplerate))
            if a < 0 or length < int(0.02 * self.samplerate):
                return
            sums = self._sums[pol] = np.zeros((self.GROUPS, self.fractions, length))
        if a < 0 or a + sums.shape[-1] > end:
            return
        b = min(int((u - n) * self.fractions), self.fractions - 1)
        cnt = self._counts[pol]
        g = int(cnt.sum()) % self.GROUPS
        sums[g, b] += x[a: a + sums.shape[-1]]
        cnt[g] += 1
        self._noise[pol][g] += noise

    def drop_pending(self) -> None:
        self._pending.clear()

    def _aligned(self, polarity: str) -> np.ndarray:
        """Per group, the sum of its steps with each fraction's sum shifted onto the whole sample."""
        S = self._sums[polarity]
        L = S.shape[-1]
        nfft = fast_len(L + 64)
        spec = np.fft.rfft(S, nfft, axis=-1)  # [G, F, nfft/2+1]
        w = 2 * math.pi * np.fft.rfftfreq(nfft)
        centres = (np.arange(self.fractions) + 0.5) / self.fractions
        # y(m) = x(m + d): the step's time moves from before + d to before
        spec *= np.exp(1j * np.outer(centres, w))[None, :, :]
        return np.fft.irfft(spec.sum(axis=1), nfft, axis=-1)[:, :L]

    def result(self, polarity: str) -> CoherentResult | None:
        """The coherent average's ring-down and its interval (None with fewer than MIN_STEPS steps)."""
        cnt = self._counts[polarity]
        n = int(cnt.sum())
        cached = self._cache.get(polarity)
        if cached is not None and cached[0] == n:
            return cached[1]
        out = None
        if n >= self.MIN_STEPS:
            A = self._aligned(polarity)
            total = A.sum(axis=0)
            nz = self._noise[polarity]
            rd = window_decay(total / n, self.samplerate, float(nz.sum()) / n / n)
            ci = float("nan")
            full = np.flatnonzero(cnt > 0)
            if math.isfinite(rd.decay_ms) and len(full) == self.GROUPS:
                taus = []
                for g in full:
                    m = n - int(cnt[g])
                    taus.append(window_decay((total - A[g]) / m, self.samplerate,
                                             float(nz.sum() - nz[g]) / m / m).decay_ms)
                taus = np.array(taus)
                if np.all(np.isfinite(taus)):
                    G = len(taus)
                    sd = math.sqrt((G - 1) / G * float(np.sum((taus - taus.mean()) ** 2)))
                    ci = t_ppf(0.975, G - 1) * sd
            out = CoherentResult(rd, ci, n)
        self._cache[polarity] = (n, out)
        return out


class AbnormalJudge:
    """Flags a step whose ring-down departs from its polarity's recent steps.

    Each polarity keeps the log decay times of its last 200 steps; once 20 are in, a step
    more than max(5 MAD, a factor 1.5) from their median is abnormal.  A ``bent`` step (its
    decay curve bends away from one exponential: the room's tail or noise) is never judged
    (its decay time still joins the history).
    """

    def __init__(self, history: int = 200, min_steps: int = 20):
        self._decays = {0: RollingWindow(history), 1: RollingWindow(history)}
        self.min_steps = min_steps

    def judge(self, polarity: int, decay_ms: float, *, bent: bool) -> bool:
        """True when the step is abnormal; the step is then (or otherwise) added to the history."""
        if not (math.isfinite(decay_ms) and decay_ms > 0):
            return False
        dq = self._decays[polarity]
        ld = math.log(decay_ms)
        abnormal = False
        if len(dq) >= self.min_steps and not bent:
            med = dq.median()
            mad = 1.4826 * dq.median_abs_deviation(med)
            abnormal = abs(ld - med) > max(5 * mad, math.log(1.5))
        dq.append(ld)
        return abnormal


def ringdown_stats(pol: np.ndarray, decay_ms: np.ndarray, abnormal: np.ndarray, bent: np.ndarray,
                   coherent: CoherentDecay | None = None) -> dict:
    """Per polarity ('A', 'B'): :class:`~tickscope.model.RingDownStats` of the measured decay times
    (median, IQR), and of the polarity's coherent average when ``coherent`` holds one."""
    out = {}
    for p, name in ((0, "A"), (1, "B")):
        sel = (pol == p) & np.isfinite(decay_ms)
        d = decay_ms[sel].astype(np.float64)
        avg = coherent.result(name) if coherent is not None else None
        extra = {}
        if avg is not None:
            extra = dict(decay_ms=float(avg.decay.decay_ms), decay_ms_ci95=float(avg.ci95_ms), n_averaged=avg.steps,
                         average_bent=bool(avg.decay.bent), average_range_db=float(avg.decay.fit_range_db))
        if len(d):
            q1, med, q3 = np.percentile(d, [25, 50, 75])
            out[name] = RingDownStats(name, len(d), float(med), float(q3 - q1), int(np.count_nonzero(abnormal[sel])),
                                      int(np.count_nonzero(bent[sel])), **extra)
        elif extra:  # no single step measurable (noise), but their average is
            out[name] = RingDownStats(name, 0, float("nan"), float("nan"), 0, 0, **extra)
    return out
