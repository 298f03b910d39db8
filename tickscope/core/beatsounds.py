"""The sounds within an escapement's beat, found in each side's template and timed in every beat (pure).

A lever escapement's beat is several sounds a few ms apart: the unlocking, the impulse, the drop.
:func:`beat_sounds` finds them in a side's template (the envelope's peaks that rise clear of the
dip before them); :func:`sound_offsets` times the first and the last of them in every beat against
its own part of the template, which gives each beat's lift time (:mod:`.escapement` turns lift
times into an amplitude).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import dsp
from .steptemplate import Template
from .timing import _envelope, match_many, rising_crossing

#: A lift lasts from (A = 360, LA = 20) 0.9 % to (A = 120, LA = 80) 10.8 % of the balance period
#: (balance.lift_time_s): sounds are looked for within this share of the period after the first.
LIFT_MAX_SHARE = 0.11
#: Sounds within a beat: a later sound rises this far over the dip before it (dB) ...
SOUND_RISE_DB = 6.0
#: ... reaches this close to the beat's loudest moment (dB) ...
SOUND_MIN_DB = -24.0
#: ... and stands this far over the template's noise (dB).
SOUND_OVER_NOISE_DB = 10.0
#: Two sounds closer than this (s) are one (a ring's first cycles).
SOUND_MIN_GAP_S = 0.0012
#: The last sound of a lift (the drop) is the loudest after the first, and within this of the
#: beat's loudest moment (dB).
LAST_SOUND_DB = -10.0
#: Envelope smoothing for finding the sounds (s).
SOUND_SMOOTH_S = 0.0002
#: Part of the template around a sound that times it in each beat: from before its arrival ...
PART_BEFORE_S = 0.0004
#: ... to after it (or to just before the next sound).
PART_AFTER_S = 0.0015
#: A beat's sound is located where its part of the template matches at least this well (the first
#: sound is often faint: at 10-20 dB SNR its part matches a single beat at 0.3-0.6).
PART_MIN_MATCH = 0.3


@dataclass(frozen=True)
class BeatSounds:
    """Where a side's beat sounds lie in its template (template sample indices).

    ``first``: the arrival of the beat's first sound; ``last``: of its last loud sound within a
    lift's reach (the drop), None when the beat is one sound; ``count``: sounds found.  ``first_part``
    and ``last_part`` are the template cut to each sound, to time it in every beat.
    """

    first: float
    last: float | None
    count: int
    first_part: Template
    last_part: Template | None
    reference: float  # the template's own time reference (its onset_index)
    loudest: float = 0.0  # the arrival of the beat's loudest sound
    #: the first and the loudest sound's arrival found at other levels of their peaks (ARRIVAL_LEVELS):
    #: how much the reference depends on the shape of the sound
    first_checks: tuple[float, ...] = ()
    loudest_checks: tuple[float, ...] = ()

    @property
    def lift_samples(self) -> float | None:
        return None if self.last is None else self.last - self.first


#: A sound within a beat arrives where its envelope rising to its peak crosses this share of it (low:
#: the start of the sound; the two sides' first sounds rise at different speeds, and half their peak
#: read them tens of us apart on independent recordings) ...
SOUND_ARRIVAL_LEVEL = 0.2
#: ... and is found again at these levels, to see how much the reference depends on the level.
ARRIVAL_LEVELS = (0.1, 0.4)


def _arrival(env: np.ndarray, peak: int, lo: int, level: float = 0.5) -> float:
    """Where the envelope rising to ``peak`` crosses ``level`` of it (sub-sample), not before ``lo``."""
    return rising_crossing(env, peak, lo, level)


def _part(template: Template, at: float, until: float | None, samplerate: float) -> Template:
    L = len(template.wave)
    a = max(0, int(math.floor(at - PART_BEFORE_S * samplerate)))
    end = at + PART_AFTER_S * samplerate
    if until is not None:
        end = min(end, until - 0.0002 * samplerate)
    b = min(L, int(math.ceil(max(end, at + 0.0006 * samplerate))))
    w = np.zeros(L)
    if b > a:
        w[a:b] = dsp.tukey(b - a, 0.3)
    return Template(template.wave, at, w, template.n_used, float(np.sum((template.wave * w) ** 2)))


def beat_sounds(template: Template, samplerate: float, beat_s: float) -> BeatSounds:
    """The sounds of one side's beat in its template (see :class:`BeatSounds`).

    A sound is a peak of the (smoothed Hilbert) envelope that rises ``SOUND_RISE_DB`` over the dip
    before it, reaches ``SOUND_MIN_DB`` of the beat's loudest moment and stands
    ``SOUND_OVER_NOISE_DB`` over the template's quietest stretch.  Looked for from the snippet's
    start to a lift's reach after the loudest moment's own first sound.
    """
    fs = samplerate
    env = _envelope(template.wave, fs, SOUND_SMOOTH_S)
    L = len(env)
    ref = float(template.onset_index)
    reach = int(LIFT_MAX_SHARE * 2.0 * beat_s * fs)
    hi = min(L - 1, int(ref) + reach)
    top_i = int(np.argmax(env[: hi + 1]))
    top = float(env[top_i])
    w = max(4, int(0.001 * fs))
    quiet = float(np.min([np.median(env[j: j + w]) for j in range(0, max(1, L - w), w)])) if L > w else 0.0
    floor_lin = max(top * 10 ** (SOUND_MIN_DB / 20), quiet * 10 ** (SOUND_OVER_NOISE_DB / 20))
    rise = 10 ** (SOUND_RISE_DB / 20)
    gap = int(SOUND_MIN_GAP_S * fs)
    peaks: list[int] = []
    dip = env[0]
    i = 1
    while i < hi:
        dip = min(dip, env[i])
        if env[i] >= env[i - 1] and env[i] >= env[i + 1] and env[i] >= floor_lin and env[i] >= rise * dip:
            if peaks and i - peaks[-1] < gap:
                if env[i] > env[peaks[-1]]:
                    peaks[-1] = i
            else:
                peaks.append(i)
            dip = env[i]
        i += 1
    if not peaks:
        peaks = [top_i]
    arrivals = [_arrival(env, p, 0, SOUND_ARRIVAL_LEVEL) for p in peaks]
    first = arrivals[0]
    # the drop: the loudest later sound within a lift's reach of the first (a room's echo of it,
    # or a knock, follows quieter), if it is loud
    later = [(env[p], a) for a, p in zip(arrivals, peaks) if SOUND_MIN_GAP_S * fs <= a - first <= reach]
    last = None
    if later:
        level, at = max(later)
        if level >= top * 10 ** (LAST_SOUND_DB / 20):
            last = at
    nxt = [a for a in arrivals if a > first + 0.5 * gap]
    first_part = _part(template, first, nxt[0] if nxt else None, fs)
    last_part = None
    if last is not None:
        after = [a for a in arrivals if a > last + 0.5 * gap]
        last_part = _part(template, last, after[0] if after else None, fs)
    top_k = int(np.argmax([env[p] for p in peaks]))
    return BeatSounds(first, last, len(peaks), first_part, last_part, ref, loudest=arrivals[top_k],
                      first_checks=tuple(_arrival(env, peaks[0], 0, v) for v in ARRIVAL_LEVELS),
                      loudest_checks=tuple(_arrival(env, peaks[top_k], 0, v) for v in ARRIVAL_LEVELS))


def sound_offsets(rows: np.ndarray, lags: np.ndarray, sounds: BeatSounds, samplerate: float
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Each row's first and last sound against where its template puts them (samples), given the
    row's lag against the whole template; nan where a sound is not found (the last: where the beat
    has one sound).  A lift time varies with the amplitude beat by beat; each sound is looked for
    within a quarter of the lift (at least 0.5 ms) of its place."""
    n = len(rows)
    lift = sounds.lift_samples
    reach = max(int(0.0005 * samplerate), int(0.25 * lift) if lift else 0)
    out = []
    for part in (sounds.first_part, sounds.last_part):
        if part is None:
            out.append(np.full(n, np.nan))
            continue
        got, rho = match_many(rows, part, max_lag=reach + int(np.max(np.abs(lags))) + 1, prefer=lags, tie=0.05)
        d = got - lags
        out.append(np.where((rho >= PART_MIN_MATCH) & (np.abs(d) <= reach), d, np.nan))
    return out[0], out[1]
