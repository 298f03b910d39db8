"""What kind of sound a recording holds: a stepping motor's steps, an escapement's beats, or neither.

Decided from what the step tracker heard (pure).  A stepping motor gets the quartz diagnostics, an
escapement the beat figures (:mod:`.escapement`); a regular sound that is neither is described,
not measured, and :mod:`tickscope.advice` says why in plain words.  A new kind of sound is added
here: a kind, a cause, and the figures that tell it apart.

Kinds: ``stepping``, ``escapement``, ``not-ticking`` (a pattern that is neither: a sound on a grid
no movement beats at, or one that does not repeat), ``none`` (no pattern).  The step intervals of
quartz movements and the beats of escapements overlap (1/8 s is 28800 beats an hour, 1 s a seconds
pendulum), so on such an interval the beats themselves decide:

* at 1 s and longer a quartz motor is far the likelier: an escapement only when its tick and tock
  differ by more than any motor's polarities do, when its beats sound unlike one another, or when
  a balance's lift is heard.  Scatter alone does not decide here: a motor whose load varies from
  step to step (or whose step is several impacts of like loudness) is timed with milliseconds of
  scatter, as a seconds pendulum is, and the report says so (:func:`scattered_steps`);
* at 1/2, 1/4 and 1/8 s an escapement is far the likelier (a watch or a clock; quartz movements
  that step so fast are sweep movements, nearly silent): a stepping motor only when its steps keep
  time to a few microseconds and sound as one impact, with no unlocking before a drop.
"""
from __future__ import annotations

from dataclasses import dataclass

from .escapement import ESCAPE_BEAT_RANGE_S as ESCAPEMENT_BEAT_S

#: An alternation of the intervals (A->B minus B->A) beyond this share of the interval is an
#: escapement's tick-tock whatever else is heard (20 ms at 1 s: a pendulum out of beat by 1 %;
#: our own margin) ...
TICK_TOCK_SHARE = 0.02
#: ... and beyond this smaller share (5 ms at 1 s) when the beats also scatter by more than
#: TICK_TOCK_JITTER_US.  A stepping motor's two polarities can begin their sounds a few ms apart (two
#: real step sounds of one clock: 2.6 ms, so 5.2 ms of alternation) while it keeps time to
#: microseconds; an escapement's beats scatter by tens of us and more (our own margins).
TICK_TOCK_LOOSE_SHARE = 0.005
#: At a second, where scatter alone does not decide, alternate beats this far apart (15 ms) are a
#: pendulum's tick and tock: the independent motor model's two polarities, with load varying from
#: step to step, were timed up to 10.9 ms apart on its dev split; our simulator's pendulums in beat
#: by 15-16 ms were heard as one (set on the dev splits of both; scored on the score splits).
SECOND_TICK_TOCK_SHARE = 0.015
TICK_TOCK_JITTER_US = 50.0
#: never below this (us): the templates' own onsets can differ by this much
TICK_TOCK_MIN_US = 1000.0
#: Steps scattering more than this about their line (RMS, us) are no quartz motor's
#: (the realistic sweep's stepping recordings never went over 460 us).
MAX_STEP_JITTER_US = 2000.0
#: Sub-second steps of a quartz motor keep time to within this (RMS about their line, us): an
#: escapement's beats scatter by tens of us and more (the project's lever simulations 14-60 us; a
#: real wall clock's 4.8 ms; our own margin over a quartz motor's timing noise at 10-20 dB SNR).
QUARTZ_MAX_JITTER_US = 8.0
#: Beats that do not repeat: of at least this many grid slots holding sound ...
UNLIKE_MIN_SLOTS = 8
#: ... fewer than this share matched the templates well ...
UNLIKE_MATCHED_SHARE = 0.5
#: ... while the steps stand this far over the noise (a stepping motor heard this clearly
#: matches its templates: the sweep's matched share was never under 94 %).
UNLIKE_MIN_SNR_DB = 20.0


@dataclass(frozen=True)
class SoundVerdict:
    """``kind``: ``stepping``, ``escapement``, ``not-ticking`` or ``none``; ``cause`` says what decided
    it: ``no-pattern`` (no grid), ``off-interval`` (a grid at no interval a movement keeps),
    ``beat-rate`` (a grid at no quartz interval: an escapement's beat), ``tick-tock`` (alternate beats
    differ), ``scatter`` (beats scatter as no motor's steps do), ``unlike`` (beats that do not sound
    alike), ``lift`` (beats of an unlocking and a drop), ``given`` (the user said which)."""

    kind: str
    cause: str = ""


def classify_sound(*, grid_found: bool, nominal_s: float | None, steps: int, jitter_us: float | None,
                   alternation_us: float | None, slots_heard: int, slots_matched: int,
                   step_snr_db: float, interval_s: float | None = None, lift_resolved: bool = False,
                   movement: str = "auto") -> SoundVerdict:
    """The kind of sound from the tracker's grid and the figures of its steps.

    ``nominal_s``: the quartz step interval the grid lies on (None: none); ``interval_s``: the grid's
    interval as measured; ``jitter_us``: the RMS residual of the rate fit (None when there is no fit
    yet); ``lift_resolved``: both sides' beats hold an earlier sound before a loud later one, a
    balance's lift apart; ``movement``: ``auto``, or ``quartz`` / ``escapement`` when the user said.
    """
    if not grid_found or steps == 0:
        return SoundVerdict("none", "no-pattern")
    iv = interval_s if interval_s is not None else nominal_s
    beat_ok = iv is not None and ESCAPEMENT_BEAT_S[0] <= iv <= ESCAPEMENT_BEAT_S[1]
    if movement == "quartz":
        return SoundVerdict("stepping", "given") if nominal_s is not None else SoundVerdict("not-ticking", "off-interval")
    if movement == "escapement":
        return SoundVerdict("escapement", "given") if beat_ok else SoundVerdict("not-ticking", "off-interval")
    if nominal_s is None:
        return SoundVerdict("escapement", "beat-rate") if beat_ok else SoundVerdict("not-ticking", "off-interval")
    unlike = (slots_heard >= UNLIKE_MIN_SLOTS and slots_matched < UNLIKE_MATCHED_SHARE * slots_heard
              and step_snr_db >= UNLIKE_MIN_SNR_DB)
    firm_us = max(TICK_TOCK_MIN_US, TICK_TOCK_SHARE * nominal_s * 1e6)
    loose_us = max(TICK_TOCK_MIN_US, TICK_TOCK_LOOSE_SHARE * nominal_s * 1e6)
    alt = abs(alternation_us) if alternation_us is not None else 0.0
    cause = ""
    if jitter_us is not None:
        if alt > firm_us or (alt > loose_us and jitter_us > TICK_TOCK_JITTER_US):
            cause = "tick-tock"
        elif jitter_us > MAX_STEP_JITTER_US:
            cause = "scatter"
    if not cause and unlike:
        cause = "unlike"
    if nominal_s >= 0.9 and beat_ok:
        # a second (a seconds pendulum's beat too): stepping unless the beats cannot be a motor's
        if alt > SECOND_TICK_TOCK_SHARE * nominal_s * 1e6:
            return SoundVerdict("escapement", "tick-tock")
        if unlike:
            return SoundVerdict("escapement", "unlike")
        if lift_resolved:
            return SoundVerdict("escapement", "lift")
        return SoundVerdict("stepping")
    if nominal_s >= 0.9 or not beat_ok:
        # a quartz motor's interval no escapement beats at: stepping unless the beats are not a motor's
        if not cause:
            return SoundVerdict("stepping")
        return SoundVerdict("not-ticking", cause)
    # 1/2, 1/4, 1/8 s: an escapement unless the steps keep a quartz motor's time
    if cause:
        return SoundVerdict("escapement", cause)
    if lift_resolved:
        return SoundVerdict("escapement", "lift")
    if jitter_us is None or jitter_us > QUARTZ_MAX_JITTER_US or alt > loose_us:
        return SoundVerdict("escapement", "scatter" if jitter_us is not None and jitter_us > QUARTZ_MAX_JITTER_US
                            else "tick-tock" if alt > loose_us else "beat-rate")
    return SoundVerdict("stepping")


def scattered_steps(kind: str, nominal_s: float | None, jitter_us: float | None) -> bool:
    """True for a second's steps, called a stepping motor's, that scatter as a crystal's steps do not
    (over :data:`MAX_STEP_JITTER_US` RMS): a motor whose load varies from step to step, one timed on
    unlike impacts, or a seconds pendulum in beat whose beats sound alike -- the report says which
    to suspect and how to say it is an escapement."""
    return (kind == "stepping" and nominal_s is not None and nominal_s >= 0.9 and jitter_us is not None
            and jitter_us > MAX_STEP_JITTER_US)
