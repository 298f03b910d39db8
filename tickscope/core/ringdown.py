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

from ..model import RingDownStats
from ..units import DB_PER_NEPER
from . import kernels
from .coherentdecay import CoherentDecay
from .dsp import RollingWindow
from .humremoval import EDGE_S, remove_hum
from .stepdecay import StepDecay, window_decay


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
#
# (1: core/humremoval.py; 2-3: core/stepdecay.py; 4: core/coherentdecay.py; a step's window: step_ringdown.)


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
