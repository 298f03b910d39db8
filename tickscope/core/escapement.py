"""Mechanical escapements: beat rate, beat asymmetry, lift time and balance amplitude (pure).

An escapement beats alternately, tick and tock, each beat one swing of the balance (or the
pendulum) through the escapement.  The step tracker follows the beats exactly as it follows a
stepping motor's two polarities: a template per side learned from the recording, every beat timed
against its side's template.  This module adds what only an escapement has:

* the nominal beat rate: the beats per hour the movement is made for (the watch and clock series,
  or what the user says), against which the rate is measured;
* the sounds within a beat (:mod:`.beatsounds`): a lever escapement's unlocking, impulse and drop,
  a few ms apart, found in each side's template and timed in every beat, which gives each beat's
  lift time;
* the beat asymmetry between the tick->tock and tock->tick intervals (:func:`beat_asymmetry`), with
  an interval that holds for white timing noise as well as for a wandering beat;
* the balance amplitude from the lift time (:mod:`.balance`, domain notes 10.3).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from . import dsp
from .balance import amplitude_from_lift_time
from .beatsounds import BeatSounds

if TYPE_CHECKING:
    from ..model import Knocking, Stop, WheelPattern

#: Beats per hour of watches, alarm and carriage clocks (domain notes 10.1; common practice, from
#: memory): 2 .. 5 Hz balances.
WATCH_SERIES_BPH = (14400, 18000, 19800, 21600, 25200, 28800, 36000)
#: Beats per hour of pendulum clocks often met (domain notes 10.1 and the issue's examples;
#: common practice, from memory).  A clock need not sit on any of them.
CLOCK_SERIES_BPH = (3600, 4800, 5400, 6000, 7200, 8100, 9000, 10800, 12000)
#: A measured beat rate within this share of a series value is taken to be that value (1 %:
#: 864 s/day, further off than a running movement is regulated; our own margin).
SERIES_TOLERANCE = 0.01
#: Beat rates from this on are a balance's (14400 is the slowest balance of the series); below,
#: a pendulum's, whose arc the sound of its beat does not give.
BALANCE_MIN_BPH = 14000.0
#: Lift angle assumed when none is given (domain notes 10.3: "52 degrees is a common default when
#: unknown"; common practice, from memory), and the range accepted (the issue: 20-80 degrees).
DEFAULT_LIFT_ANGLE_DEG = 52.0
LIFT_ANGLE_RANGE_DEG = (20.0, 80.0)
#: Where each side's first sound is taken to begin, when the two sides sound differently: an
#: allowance beside the level checks (s, per side; the asymmetry takes twice it).  On the
#: independent escapement model's dev split (tests/independent/escapement_model.py, 20 lever
#: recordings timed at their first sounds) the asymmetry erred by up to 0.07 ms, mostly 0.01-0.06,
#: where its interval without the allowance was 0.01-0.05 ms.
BEAT_REFERENCE_ALLOWANCE_S = 25e-6
#: Amplitudes outside this range are no balance's swing (a beat's two sounds are then not its
#: unlocking and drop; our own bounds around the healthy 200-330 degrees of domain notes 10.3).
AMPLITUDE_PLAUSIBLE_DEG = (100.0, 400.0)
#: The amplitude relation takes the balance to swing freely through the lift; a balance driven
#: through it swings otherwise.  An independent model of a lever escapement integrated with its
#: impulse (tests/independent/escapement_model.py, its dev split) read 3-9 % low by the relation
#: (mean 5 %); our own simulator follows the relation exactly.  The amplitude's interval carries
#: this share of it as a systematic allowance, beside the lift time's noise (its lift angle's
#: uncertainty is not in it: the lift angle is the user's).
AMPLITUDE_MODEL_SHARE = 0.07



@dataclass(frozen=True)
class Nominal:
    """The beat rate a movement is measured against.

    ``source``: ``given`` (the user's), ``series`` (the series value within 1 % of the beat rate
    heard) or ``nearest`` (the beat rate heard is off every series value: the nearest is used,
    and the rate against it says so).
    """

    beats_per_hour: float
    source: str
    off_percent: float  # the beat rate heard over the nominal, minus one, in %

    @property
    def beat_s(self) -> float:
        return 3600.0 / self.beats_per_hour

    @property
    def balance(self) -> bool:
        """A balance's beat rate (else a pendulum's)."""
        return self.beats_per_hour >= BALANCE_MIN_BPH


def nominal_beats(measured_beat_s: float, given_bph: float | None = None) -> Nominal:
    """The nominal beat rate for a measured beat interval (see :class:`Nominal`)."""
    heard = 3600.0 / measured_beat_s
    if given_bph is not None:
        return Nominal(float(given_bph), "given", (heard / given_bph - 1.0) * 100.0)
    series = WATCH_SERIES_BPH + CLOCK_SERIES_BPH
    best = min(series, key=lambda v: abs(math.log(heard / v)))
    off = heard / best - 1.0
    return Nominal(float(best), "series" if abs(off) <= SERIES_TOLERANCE else "nearest", off * 100.0)


def lift_angle(given_deg: float | None) -> tuple[float, bool]:
    """The lift angle used and whether it was given (else the default)."""
    return (float(given_deg), True) if given_deg is not None else (DEFAULT_LIFT_ANGLE_DEG, False)


def beat_asymmetry(k: np.ndarray, t: np.ndarray, *, min_pairs: int = 6) -> tuple[float, float, int] | None:
    """Mean interval from an even-numbered beat to the next minus from an odd-numbered beat to the
    next (s), its 95 % half-width, and the pairs used.

    One figure per pair of consecutive intervals (tick->tock minus the tock->tick after it); the
    figures of neighbouring pairs share a beat, so the variance of their mean is that of a moving
    average, estimated with Newey-West weights over three lags (Newey & West 1987, Econometrica
    55:703): it holds for white timing noise (where the naive variance of two interval means reads
    half the true one) and for a beat whose period wanders.
    """
    k = np.asarray(k, dtype=np.int64)
    t = np.asarray(t, dtype=np.float64)
    pos = {int(a): float(b) for a, b in zip(k, t)}
    e, where = [], []
    for a in k:
        a = int(a)
        if a % 2 == 0 and a + 1 in pos and a + 2 in pos:
            e.append((pos[a + 1] - pos[a]) - (pos[a + 2] - pos[a + 1]))
            where.append(a)
    if len(e) < min_pairs:
        return None
    x = np.array(e)
    mean = float(x.mean())
    r = x - mean
    n = len(x)
    var = float(r @ r) / n
    lags = 3
    for h in range(1, min(lags, n - 1) + 1):
        var += 2.0 * (1.0 - h / (lags + 1)) * float(r[h:] @ r[:-h]) / n
    var = max(var, float(r @ r) / n / 4.0)
    half = dsp.t_ppf(0.975, max(n - 1, 1)) * math.sqrt(var / n)
    return mean, half, n


def amplitude_deg(lift_s: float, period_s: float, lift_angle_deg: float) -> float | None:
    """The amplitude from a lift time (None when the lift is no part of a swing)."""
    if not 0 < lift_s < period_s / 2:
        return None
    return amplitude_from_lift_time(lift_angle_deg=lift_angle_deg, lift_time_s=lift_s, period_s=period_s)


def amplitude_interval(lift_s: float, lift_u95_s: float, period_s: float, lift_angle_deg: float
                       ) -> tuple[float, float] | None:
    """The amplitude and its 95 % half-width from a lift time and its half-width (first-order
    propagation: dA/dt = -A (pi / T) cot(pi t / T))."""
    a = amplitude_deg(lift_s, period_s, lift_angle_deg)
    if a is None:
        return None
    x = math.pi * lift_s / period_s
    return a, abs(a * math.pi / period_s / math.tan(x)) * lift_u95_s


# -- the figures of a recording ------------------------------------------------------------------

#: Lift times per side needed for a lift time and an amplitude (our own minimum).
MIN_LIFTS = 8
#: The two sides' lift times agree within this share, or the sounds taken for the unlocking and the
#: drop are not the same on both (in simple harmonic motion both sides pass the same arc, so their
#: lift times are equal whatever the beat asymmetry; our own margin for a room's echoes).
LIFT_SIDES_AGREE = 0.2
#: Systematic allowance on a lift time (samples): two arrivals, each interpolated on the rise of a
#: sound whose shape the two sounds need not share (our own allowance).
LIFT_REFERENCE_SAMPLES = 2.0
#: Knocking: the sounds off the beats are gathered by their delay after the beat in bins of this (s) ...
KNOCK_BIN_S = 0.002
#: ... a bin holding sounds after this share of the beats at least ...
KNOCK_MIN_SHARE = 0.1
#: ... and so many that chance (the other bins' rate, a binomial tail corrected for every bin) would
#: give it less often than this.
KNOCK_P = 1e-3
#: The escape wheel's turn, in beats: twice the teeth of the wheels met most (15: Swiss and English
#: lever, pin pallet; 20 and 30: some clocks; common practice, from memory).
WHEEL_PERIODS_BEATS = (30, 40, 60)
WHEEL_P = 1e-3
#: ... and only a pattern this large (RMS, us) is worth a repairer's attention (a worn or bent tooth
#: moves its beats by a tenth of a ms and more; our own margin: a pattern of ten us is a timing
#: detail of the sound, not a fault).
WHEEL_MIN_US = 50.0
#: A run of this many missed beats (and at least a second of them) is a stop.
STOP_MIN_BEATS = 4


def _side_lift(lift_ms: np.ndarray) -> tuple[float | None, float | None, int]:
    """Mean lift time (ms) of one side's beats, its 95 % half-width and the beats used (those
    within five scaled MADs of the median)."""
    x = lift_ms[np.isfinite(lift_ms)]
    if len(x) < MIN_LIFTS:
        return None, None, int(len(x))
    med = float(np.median(x))
    mad = 1.4826 * float(np.median(np.abs(x - med)))
    x = x[np.abs(x - med) <= max(5 * mad, 0.05)]
    if len(x) < MIN_LIFTS:
        return None, None, int(len(x))
    half = dsp.t_ppf(0.975, len(x) - 1) * float(np.std(x, ddof=1)) / math.sqrt(len(x))
    return float(x.mean()), half, int(len(x))


def knocking(beat_t_s: np.ndarray, other_t_s: np.ndarray, beat_s: float, after_s: float) -> "Knocking | None":
    """Sounds after the beats at one delay, beat after beat (see :class:`~tickscope.model.Knocking`).

    ``after_s``: sounds this soon after a beat's first sound are its own (its drop and ring).
    """
    from ..model import Knocking

    bt = np.sort(np.asarray(beat_t_s, dtype=np.float64))
    ot = np.asarray(other_t_s, dtype=np.float64)
    lo, hi = after_s, 0.8 * beat_s
    if len(bt) < 20 or hi - lo < 3 * KNOCK_BIN_S or not len(ot):
        return None
    j = np.searchsorted(bt, ot, side="right") - 1
    ok = j >= 0
    d = ot[ok] - bt[j[ok]]
    d = d[(d >= lo) & (d < hi)]
    nb = int((hi - lo) / KNOCK_BIN_S)
    if len(d) < 5 or nb < 3:
        return None
    # one count per beat per bin (a sound's own later impacts do not count twice)
    per_beat = np.unique(np.stack([j[ok][(ot[ok] - bt[j[ok]] >= lo) & (ot[ok] - bt[j[ok]] < hi)],
                                   np.minimum(((d - lo) / KNOCK_BIN_S).astype(int), nb - 1)]), axis=1)
    cnt = np.bincount(per_beat[1], minlength=nb)
    top = int(np.argmax(cnt))
    c = int(cnt[top])
    n = len(bt)
    rest = (int(cnt.sum()) - c) / max(nb - 1, 1)
    p0 = min(max(rest / n, 0.5 / n), 0.999)
    pval = min(1.0, nb * dsp.binom_sf(c - 1, n, p0))
    if c < KNOCK_MIN_SHARE * n or pval >= KNOCK_P:
        return None
    sel = (d >= lo + top * KNOCK_BIN_S) & (d < lo + (top + 1) * KNOCK_BIN_S)
    return Knocking(beats=c, of_beats=n, delay_ms=float(np.median(d[sel])) * 1e3, p_value=float(pval))


def wheel_pattern(k: np.ndarray, res_s: np.ndarray) -> "WheelPattern | None":
    """Beat times that repeat with the escape wheel's turn: the residuals, less a running mean over
    each period tried (a wandering beat is no pattern), folded at the period; a one-way analysis of
    variance of the folded means (F test), its p-value corrected for every period tried."""
    from ..model import WheelPattern

    k = np.asarray(k, dtype=np.int64)
    r = np.asarray(res_s, dtype=np.float64)
    best = None
    tried = [P for P in WHEEL_PERIODS_BEATS if len(k) >= 4 * P and (k.max() - k.min()) >= 4 * P]
    for P in tried:
        # the running mean over one period at every beat (beats missing: a mean over those heard)
        full = np.full(int(k.max() - k.min()) + 1, np.nan)
        full[k - k.min()] = r
        ok = np.isfinite(full)
        cs = np.concatenate([[0.0], np.cumsum(np.where(ok, full, 0.0))])
        cn = np.concatenate([[0], np.cumsum(ok)])
        h = P // 2
        idx = k - k.min()
        a, b = np.maximum(idx - h, 0), np.minimum(idx + h + 1, len(full))
        x = r - (cs[b] - cs[a]) / np.maximum(cn[b] - cn[a], 1)
        ph = (k % P).astype(int)
        cnt = np.bincount(ph, minlength=P)
        if np.any(cnt < 3):
            continue
        means = np.bincount(ph, weights=x, minlength=P) / cnt
        within = float(np.sum((x - means[ph]) ** 2))
        between = float(np.sum(cnt * (means - x.mean()) ** 2))
        df1, df2 = P - 1, len(x) - P
        if within <= 0 or df2 < 1:
            continue
        F = (between / df1) / (within / df2)
        p = dsp.f_sf(F, df1, df2) * len(tried)
        amp = float(np.sqrt(np.mean((means - means.mean()) ** 2)))
        if p < WHEEL_P and amp * 1e6 >= WHEEL_MIN_US and (best is None or p < best[0]):
            best = (p, P, amp)
    if best is None:
        return None
    return WheelPattern(period_beats=best[1], amplitude_us=best[2] * 1e6, p_value=min(best[0], 1.0))


def stops(k: np.ndarray, t: np.ndarray, missed_k: np.ndarray, beat_s: float, trailing_slots: int,
          end_s: float) -> tuple["Stop", ...]:
    """Runs of missed beats long enough to be a stop (see :data:`STOP_MIN_BEATS`), and beats that
    ended before the recording did."""
    from ..model import Stop

    out = []
    need = max(STOP_MIN_BEATS, int(math.ceil(1.0 / beat_s)))
    mk = np.sort(np.asarray(missed_k, dtype=np.int64))
    if len(mk) and len(k):
        pos = dict(zip((int(v) for v in k), (float(v) for v in t)))
        run_start = 0
        for i in range(1, len(mk) + 1):
            if i == len(mk) or mk[i] != mk[i - 1] + 1:
                n = i - run_start
                if n >= need:
                    before = pos.get(int(mk[run_start]) - 1)
                    after = pos.get(int(mk[i - 1]) + 1)
                    at = before if before is not None else float(t[0])
                    out.append(Stop(at_s=at, for_s=None if after is None else after - at, restarted=after is not None))
                run_start = i
    if trailing_slots >= need and len(t):
        out.append(Stop(at_s=float(t[-1]), for_s=None, restarted=False))
    return tuple(out)


def _beat_reference(s0: BeatSounds | None, s1: BeatSounds | None, fs: float) -> tuple[str, dict, float]:
    """What both sides' beats are timed at, each side's offset of it from its template's reference
    (s), and how well the two share it (s: the largest change of their difference when each sound's
    arrival is found at other levels of its peak, and a twentieth of a sample).

    The first sound where both sides show the same beat (a first sound and a drop, their lifts
    agreeing, or both one sound); else the loudest sound on both (the drop): a side whose unlocking
    is too faint to show would otherwise be timed at its drop and the other at its unlocking."""
    if s0 is None or s1 is None:
        return "first-sound", {0: 0.0, 1: 0.0}, 0.0
    same = (s0.last is None and s1.last is None) or (
        s0.last is not None and s1.last is not None
        and abs(s0.lift_samples - s1.lift_samples) <= LIFT_SIDES_AGREE * max(s0.lift_samples, s1.lift_samples))
    if same:
        at, checks, ref = (s0.first, s1.first), (s0.first_checks, s1.first_checks), "first-sound"
    else:
        at, checks, ref = (s0.loudest, s1.loudest), (s0.loudest_checks, s1.loudest_checks), "main-sound"
    offs = {0: (at[0] - s0.reference) / fs, 1: (at[1] - s1.reference) / fs}
    d0 = at[1] - at[0]
    dev = [abs((cb - ca) - d0) for ca, cb in zip(*checks)]
    u = (max(dev, default=0.0) + 0.05) / fs
    return ref, offs, math.hypot(u, BEAT_REFERENCE_ALLOWANCE_S)


def escapement_figures(rec, good: np.ndarray, *, rate, nominal: Nominal, sounds: dict, samplerate: float,
                       reference_u_s: float, lift_angle_deg: float | None, trailing_slots: int, end_s: float,
                       beat_s: float | None = None, lifts_heard: bool = True):
    """The figures of an escapement's beats (:class:`~tickscope.model.EscapementFigures`).

    ``rec``: the analyzer's record (:class:`~tickscope.model.StepArrays`), ``good``: the beats that
    time the grid, ``rate``: the rate fitted against the nominal beat, ``sounds``: each side's
    :class:`BeatSounds`.
    """
    from ..model import EscapementFigures
    from .rate import residuals_s

    fs = samplerate
    k, t = rec.k[good], rec.t_s[good]
    # the mean beat heard (``beat_s`` given, else the rate's fitted interval, else the nominal)
    beat_s = beat_s if beat_s is not None else rate.interval_s if rate is not None else nominal.beat_s
    # side 0 is the side of the first beat heard (tick); the tracker's numbers may begin on either
    flip = bool(len(rec.k)) and int(rec.k[0]) % 2 == 1
    s0, s1 = sounds.get(0), sounds.get(1)
    ref, offs, ref_u = _beat_reference(s0, s1, fs)
    # (a balance's sides that sound too unlike to share their first sound are timed at their
    # loudest, which can be the unlocking on one side and the drop on the other: no asymmetry is
    # claimed from them -- on the independent model's dev split such figures erred by 12 and 27 ms;
    # a pendulum's loudest sound is its drop on both sides)
    asym = beat_asymmetry(k, t) if ref != "main-sound" or not nominal.balance else None
    asym_ms = asym_ci = asym_pct = None
    if asym is not None:
        v = asym[0] + 2.0 * (offs[1] - offs[0])
        v = -v if flip else v
        asym_ms = v * 1e3
        asym_ci = math.hypot(asym[1], 2.0 * math.hypot(reference_u_s, ref_u)) * 1e3
        asym_pct = v / beat_s * 100.0
    # lift times and the amplitude
    la, given = lift_angle(lift_angle_deg)
    # (a pendulum's beat has no lift to hear: its later sounds are a recoil's, not a drop's)
    lifts = [_side_lift(rec.lift_ms[good & (rec.pol == p)]) if lifts_heard and nominal.balance else (None, None, 0)
             for p in ((1, 0) if flip else (0, 1))]
    amp = amp_ci = None
    sys_ms = LIFT_REFERENCE_SAMPLES / fs * 1e3
    if not nominal.balance:
        reason = "pendulum"
    elif not lifts_heard:
        reason = "short-window"
    elif not any(s is not None and s.last is not None for s in (s0, s1)):
        reason = "one-sound"
    else:
        amp, amp_ci, reason = lift_amplitude(lifts, beat_s=beat_s, lift_angle_deg=la, samplerate=fs)
    res = residuals_s(k, t) if len(k) >= 6 else np.zeros(0)
    scatter = float(np.sqrt(np.mean(res ** 2))) * 1e6 if len(res) >= 6 else None
    drop_s = max(((s.last if s.last is not None else s.first) - s.first) / fs for s in (s0, s1) if s is not None) \
        if (s0 is not None or s1 is not None) else 0.0
    knock = knocking(t, rec.other_t_s, beat_s, after_s=drop_s - min(offs.values()) + 0.004) if nominal.balance else None
    wheel = wheel_pattern(k, res) if len(res) else None
    st = stops(rec.k, rec.t_s, rec.missed_k, beat_s, trailing_slots, end_s)
    return EscapementFigures(
        beats_per_hour=nominal.beats_per_hour, beats_per_hour_heard=3600.0 / beat_s, nominal_source=nominal.source,
        off_series_percent=(nominal.beat_s / beat_s - 1.0) * 100.0, balance=nominal.balance, beat_interval_s=beat_s,
        rate=rate, beat_asymmetry_ms=asym_ms, beat_asymmetry_ci95_ms=asym_ci, beat_asymmetry_percent=asym_pct,
        beat_reference=ref,
        lift_time_ms=tuple(m for m, _, _ in lifts), lift_time_ci95_ms=tuple(
            None if h is None else math.hypot(h, sys_ms) for _, h, _ in lifts),
        lifts_measured=tuple(n for _, _, n in lifts), lift_angle_deg=la if nominal.balance else None,
        lift_angle_given=given, amplitude_deg=amp, amplitude_ci95_deg=amp_ci, amplitude_reason=reason,
        beat_scatter_us=scatter, knocking=knock, wheel=wheel, stops=st, missed_beats=int(len(rec.missed_k)))


def side_lifts(lift_ms: np.ndarray, side: np.ndarray) -> list[tuple[float | None, float | None, int]]:
    """Each side's mean lift time (ms), its 95 % half-width and how many beats gave it, from beats'
    lift times (nan: not resolved) and their sides (0, 1)."""
    return [_side_lift(lift_ms[side == p]) for p in (0, 1)]


def lift_amplitude(lifts, *, beat_s: float, lift_angle_deg: float, samplerate: float
                   ) -> tuple[float | None, float | None, str | None]:
    """The balance amplitude (deg) and its 95 % half-width from each side's lift (``(mean_ms,
    half_ms, n)``, see :func:`side_lifts`), or None and why not: ``few-lifts`` (no side has enough),
    ``sides-differ`` (the two sides' lifts disagree), ``implausible`` (no balance's swing)."""
    resolved = [(m, h) for m, h, _ in lifts if m is not None]
    if not resolved:
        return None, None, "few-lifts"
    if len(resolved) == 2 and abs(resolved[0][0] - resolved[1][0]) > LIFT_SIDES_AGREE * max(r[0] for r in resolved):
        return None, None, "sides-differ"
    sys_ms = LIFT_REFERENCE_SAMPLES / samplerate * 1e3
    m = float(np.mean([r[0] for r in resolved]))
    h = math.sqrt(sum(r[1] ** 2 for r in resolved)) / len(resolved)
    got = amplitude_interval(m * 1e-3, math.hypot(h, sys_ms) * 1e-3, 2.0 * beat_s, lift_angle_deg)
    if got is None or not AMPLITUDE_PLAUSIBLE_DEG[0] <= got[0] <= AMPLITUDE_PLAUSIBLE_DEG[1]:
        return None, None, "implausible"
    return got[0], math.hypot(got[1], AMPLITUDE_MODEL_SHARE * got[0]), None


MOVEMENTS = ("auto", "quartz", "escapement")


def check_escapement_options(movement: str, beats_per_hour: float | None, lift_angle_deg: float | None) -> None:
    """Raise :class:`~tickscope.errors.ParameterError` (one line) for options no escapement has."""
    from ..errors import ParameterError

    if movement not in MOVEMENTS:
        raise ParameterError(f"movement={movement!r}: expected one of {', '.join(MOVEMENTS)}")
    if beats_per_hour is not None and not (isinstance(beats_per_hour, (int, float)) and math.isfinite(beats_per_hour)
                                           and 3600.0 / ESCAPE_BEAT_RANGE_S[1] <= beats_per_hour
                                           <= 3600.0 / ESCAPE_BEAT_RANGE_S[0]):
        raise ParameterError(f"beats per hour {beats_per_hour!r}: expected "
                             f"{3600.0 / ESCAPE_BEAT_RANGE_S[1]:.0f}..{3600.0 / ESCAPE_BEAT_RANGE_S[0]:.0f}")
    lo, hi = LIFT_ANGLE_RANGE_DEG
    if lift_angle_deg is not None and not (isinstance(lift_angle_deg, (int, float)) and lo <= lift_angle_deg <= hi):
        raise ParameterError(f"lift angle {lift_angle_deg!r} degrees: expected {lo:g}..{hi:g} "
                             "(lever escapements' lift angles lie between about 38 and 58)")


#: The beat intervals an escapement can have (s): as soundkind.ESCAPEMENT_BEAT_S.
ESCAPE_BEAT_RANGE_S = (0.045, 1.6)


def lift_resolved(sounds: dict, beat_s: float | None, samplerate: float) -> bool:
    """Both sides' beats hold an earlier sound before a loud later one (their drop), their lift
    times agree, and the amplitude they give at any lift angle of 38-58 degrees is a balance's."""
    if beat_s is None or len(sounds) < 2 or any(s.last is None for s in sounds.values()):
        return False
    lifts = [s.lift_samples / samplerate for s in sounds.values()]
    if abs(lifts[0] - lifts[1]) > LIFT_SIDES_AGREE * max(lifts):
        return False
    lift = float(np.mean(lifts))
    lo, hi = AMPLITUDE_PLAUSIBLE_DEG
    for la in (38.0, 58.0):
        a = amplitude_deg(lift, 2.0 * beat_s, la)
        if a is not None and lo <= a <= hi:
            return True
    return False
