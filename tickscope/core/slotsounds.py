"""Which of a slot's sounds is its step, a failed step (a twitch) or a correction pulse (pure).

A failed step is a twitch: a weak sound on the slot (``weak_db`` under the steps' usual level)
that stands above the noise's own blips (:func:`stands_out`), with no step; some circuits then
send a stronger correction pulse 15-85 ms later, which steps the rotor (as loud as a step).  A
rotor that fell back can also sound like a step: then only a correction pulse tells, a sound
louder than any step 15-85 ms after it (the correction pulse is wider than the drive).  A weak
sound just before a step (within 15 ms) is part of that step: a lossy codec's pre-echo, a first
contact -- not a twitch.
"""
from __future__ import annotations

import statistics
from typing import TYPE_CHECKING, Callable, Iterable

from .acquire import OpenImpact

if TYPE_CHECKING:
    from .trackconfig import TrackerConfig

# A weak sound this close before a step is part of it (a lossy codec's pre-echo reaches back
# a frame, ~13 ms for MP3 at 44.1 kHz; a correction pulse comes later: 25-45 ms in the
# adaptive drives we know of; our own margin) (s) ...
PRECURSOR_S = 0.015
# ... and a correction pulse steps the rotor: its sound is this much louder than the twitch (dB),
# or, after a twitch as loud as a step, this much louder than the steps (our own margins)
CORRECTION_OVER_TWITCH_DB = 6.0
CORRECTION_OVER_STEP_DB = 6.0

#: the noise's blips a twitch must stand above: those of the seconds before (s)
TWITCH_NOISE_S = 2.0
#: ... and the noise floor itself (peak frame energy over the floor, dB).  A quiet recording's noise
#: seldom starts an impact, but one on the slot of a missed step was taken for a twitch: white noise
#: at 7 dB over the floor, on a clean click train.  The twitches of our own simulator stand 16-37 dB
#: over it (development split), and a twitch 9 dB under the steps (TrackerConfig.weak_db) needs
#: steps 19 dB over the floor to be heard at all; our own margin.
TWITCH_OVER_FLOOR_DB = 10.0


def slot_sounds(in_slot: list[OpenImpact], pred: float, open_impacts: list[OpenImpact], cfg: "TrackerConfig",
                typical: float | None, stands_out: Callable[[OpenImpact, float], bool]):
    """(step, failed, correction) among the impacts of a slot (each may be None; see the module
    docstring).  ``open_impacts`` are all the impacts not yet decided (a correction pulse may lie
    past the slot), ``typical`` the usual level of a step (dBFS, None while too few are known),
    ``stands_out(o, pred)`` whether a weak sound stands above the noise's blips."""
    def weak_sound(o) -> bool:
        return typical is not None and o.imp.peak_dbfs < typical - cfg.weak_db

    step = _step_among(in_slot, cfg, weak_sound)
    failed = correction = None
    # a twitching rotor sounds on the grid (the drive pulse is on time): within twitch_s
    # (our reasoning from how the circuit drives the motor; no published tolerance)
    twitch_s = cfg.twitch_s
    late_s = max(cfg.correction_min_s, PRECURSOR_S)
    weak = step is not None and weak_sound(step)
    if step is not None and step.t_s - pred > late_s:
        # the step came late: a correction pulse after a twitch on the slot, if there was one
        early = [o for o in in_slot if o.t_s < step.t_s - late_s and abs(o.t_s - pred) <= twitch_s
                 and weak_sound(o)]
        if early and not weak and step.match >= cfg.good_match:
            failed, correction, step = min(early, key=lambda o: o.t_s), step, None
        elif weak:
            step = None  # a faint sound off the grid (a quiet room's noise): no step here
    elif weak:
        if abs(step.t_s - pred) <= twitch_s:
            failed, step = step, None
        else:
            step = None
    elif step is not None and typical is not None and abs(step.t_s - pred) <= twitch_s:
        # a rotor that fell back can sound like a step; the correction pulse that then turns it is
        # wider than the drive and sounds louder than any step (CORRECTION_OVER_STEP_DB)
        cors = [o for o in open_impacts if step.t_s + late_s <= o.t_s <= step.t_s + cfg.correction_max_s
                and o.match >= cfg.good_match and o.imp.peak_dbfs >= typical + CORRECTION_OVER_STEP_DB
                and step.imp.peak_dbfs < typical + CORRECTION_OVER_STEP_DB / 2]
        if cors:
            failed, correction, step = step, min(cors, key=lambda o: o.t_s), None
    if step is None and typical is not None:
        failed, correction = _twitch_and_correction(in_slot, pred, open_impacts, cfg, failed, correction,
                                                    weak_sound, late_s, stands_out)
    return step, failed, correction


def _step_among(in_slot: list[OpenImpact], cfg: "TrackerConfig", weak_sound: Callable[[OpenImpact], bool]):
    """The slot's best-matching sound that is a step's (the earliest of the near-best; None when
    none matches a step at all), a weak precursor passed over for the step that follows it."""
    cands = [o for o in in_slot if o.match >= cfg.min_match]
    step = None
    if cands:
        best = max(o.match for o in cands)
        good = [o for o in cands if o.match >= best - 0.1]
        # two impacts timed within 2 ms of each other are one sound (the snippet of a faint
        # sound just before a step holds the step too): keep the louder impact
        good = [o for o in good if not any(abs(p.t_s - o.t_s) < 0.002 and (p.imp.peak_dbfs, p.match) >
                                           (o.imp.peak_dbfs, o.match) for p in good)]
        step = min(good, key=lambda o: o.t_s)
        # a weak sound that a step follows closely is that step's precursor (pre-echo)
        later = [o for o in good if 0 < o.t_s - step.t_s <= PRECURSOR_S and not weak_sound(o)]
        if weak_sound(step) and later:
            step = min(later, key=lambda o: o.t_s)
    return step


def _twitch_and_correction(in_slot, pred, open_impacts, cfg, failed, correction, weak_sound, late_s, stands_out):
    """A slot without a step: its twitch (a weak sound on the slot, unless one was found already)
    and the correction pulse after it, both dropped when the twitch does not stand above the
    noise's own blips."""
    twitch_s = cfg.twitch_s
    if failed is None:
        near = [o for o in in_slot if abs(o.t_s - pred) <= twitch_s and weak_sound(o)]
        if near:
            failed = min(near, key=lambda o: o.t_s)
    if failed is not None and correction is None:
        cors = [o for o in open_impacts if failed.t_s + late_s <= o.t_s <= failed.t_s + cfg.correction_max_s
                and o.match >= cfg.good_match and not weak_sound(o)
                and o.imp.peak_dbfs >= failed.imp.peak_dbfs + CORRECTION_OVER_TWITCH_DB]
        if cors:
            correction = min(cors, key=lambda o: o.t_s)
    if failed is not None and not stands_out(failed, pred):
        failed = correction = None  # as loud as the noise's own blips around it: no evidence of a twitch
    return failed, correction


def stands_out(o: OpenImpact, pred: float, offgrid: Iterable[tuple[float, float]], open_impacts: list[OpenImpact],
               slot_tolerance_s: float) -> bool:
    """Whether a weak sound at a slot stands above the off-grid sounds of the seconds before it
    (``offgrid``: (time s, peak dBFS) of sounds rejected already; ``open_impacts``: those to be
    rejected with this slot).

    Where a phone's gain control lifts the noise while the movement is silent, the noise
    itself starts an impact every few tens of ms; a twitch must be louder than every one of
    those heard in the two seconds before it, and 6 dB over their median (our own margin, set
    from the sweep of simulated phone recordings): with n such sounds, a blip of the same
    noise would be the loudest by chance once in n + 1.
    (Not those after it: the silence after a failed step lets the gain rise, whatever the
    twitch was.)  With fewer than three such sounds before it (a quiet room, or a gain that
    had not yet risen) any weak sound on the slot counts that stands TWITCH_OVER_FLOOR_DB over
    the noise floor (always required).
    """
    if not o.imp.frame_snr_db >= TWITCH_OVER_FLOOR_DB:
        return False
    lo, hi = pred - TWITCH_NOISE_S, pred - slot_tolerance_s
    levels = [p for t, p in offgrid if lo <= t < hi]  # rejected already
    levels += [q.imp.peak_dbfs for q in open_impacts if lo <= q.t_s < hi and q is not o]  # to be rejected with this slot
    if len(levels) < 3:
        return True
    return o.imp.peak_dbfs > max(levels) and o.imp.peak_dbfs >= statistics.median(levels) + 6.0
