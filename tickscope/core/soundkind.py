"""What kind of sound a recording holds: a stepping motor's steps, another regular beat, or none.

Decided from what the step tracker heard (pure).  Only a stepping motor gets a rate, missed
steps and the quartz diagnostics; any other regular beat is described, not measured, and
:mod:`tickscope.advice` says why in plain words.  A new kind of sound is added here: a kind,
a cause, and the figures that tell it apart.
"""
from __future__ import annotations

from dataclasses import dataclass

#: An alternation of the intervals (A->B minus B->A) beyond this share of the interval is an
#: escapement's tick-tock whatever else is heard (20 ms at 1 s: a pendulum out of beat by 1 %;
#: our own margin) ...
TICK_TOCK_SHARE = 0.02
#: ... and beyond this smaller share (5 ms at 1 s) when the beats also scatter by more than
#: TICK_TOCK_JITTER_US.  A stepping motor's two polarities can begin their sounds a few ms apart (two
#: real step sounds of one clock: 2.6 ms, so 5.2 ms of alternation) while it keeps time to
#: microseconds; an escapement's beats scatter by tens of us and more (our own margins).
TICK_TOCK_LOOSE_SHARE = 0.005
TICK_TOCK_JITTER_US = 50.0
#: never below this (us): the templates' own onsets can differ by this much
TICK_TOCK_MIN_US = 1000.0
#: Steps scattering more than this about their line (RMS, us) are no quartz motor's
#: (the realistic sweep's stepping recordings never went over 460 us).
MAX_STEP_JITTER_US = 2000.0
#: Beats that do not repeat: of at least this many grid slots holding sound ...
UNLIKE_MIN_SLOTS = 8
#: ... fewer than this share matched the templates well ...
UNLIKE_MATCHED_SHARE = 0.5
#: ... while the steps stand this far over the noise (a stepping motor heard this clearly
#: matches its templates: the sweep's matched share was never under 94 %).
UNLIKE_MIN_SNR_DB = 20.0


@dataclass(frozen=True)
class SoundVerdict:
    """``kind``: ``stepping``, ``not-stepping`` or ``none``; ``cause`` says what decided a sound
    that is not stepping: ``no-pattern`` (no grid), ``off-interval`` (a grid at no quartz
    interval), ``tick-tock`` (alternate beats differ), ``scatter`` (beats scatter by ms) or
    ``unlike`` (beats that do not sound alike)."""

    kind: str
    cause: str = ""


def classify_sound(*, grid_found: bool, nominal_s: float | None, steps: int, jitter_us: float | None,
                   alternation_us: float | None, slots_heard: int, slots_matched: int,
                   step_snr_db: float) -> SoundVerdict:
    """The kind of sound from the tracker's grid and the figures of its steps.

    ``jitter_us`` is the RMS residual of the rate fit (None when there is no fit yet).
    """
    if not grid_found or steps == 0:
        return SoundVerdict("none", "no-pattern")
    if nominal_s is None:
        return SoundVerdict("not-stepping", "off-interval")
    if jitter_us is not None:
        firm_us = max(TICK_TOCK_MIN_US, TICK_TOCK_SHARE * nominal_s * 1e6)
        loose_us = max(TICK_TOCK_MIN_US, TICK_TOCK_LOOSE_SHARE * nominal_s * 1e6)
        if alternation_us is not None and (abs(alternation_us) > firm_us or (
                abs(alternation_us) > loose_us and jitter_us > TICK_TOCK_JITTER_US)):
            return SoundVerdict("not-stepping", "tick-tock")
        if jitter_us > MAX_STEP_JITTER_US:
            return SoundVerdict("not-stepping", "scatter")
    if (slots_heard >= UNLIKE_MIN_SLOTS and slots_matched < UNLIKE_MATCHED_SHARE * slots_heard
            and step_snr_db >= UNLIKE_MIN_SNR_DB):
        return SoundVerdict("not-stepping", "unlike")
    return SoundVerdict("stepping")
