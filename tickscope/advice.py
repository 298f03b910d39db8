"""Plain words: every sentence tickscope says about a recording, built from its figures.

The analysis (:mod:`tickscope.core`, :mod:`tickscope.pipeline`) computes numbers and verdicts;
this module turns them into the notes, the repairer's reading and the reasons a sound is not
measured.  It is the one place that may name a command-line option, so the core stays usable
without the CLI.  Pure: figures in, strings out.
"""
from __future__ import annotations

from .core.diagnose import ASYMMETRY_REFERENCE_MAX_US
from .units import ppm_to_s_per_day

#: Typical error of an uncalibrated consumer audio clock (common practice; sound-card
#: oscillators are often quoted at +-100 ppm, shared/domain.md section 4.1).
TYPICAL_DEVICE_PPM = 50.0

UNCALIBRATED_TIME_BASE = (f"device clock, uncalibrated (typical ±{TYPICAL_DEVICE_PPM:.0f} ppm ≈ "
                          f"±{ppm_to_s_per_day(TYPICAL_DEVICE_PPM):.1f} s/day)")

_PROFILE_METHODS = {"host-clock": "against the host clock", "reference": "against a reference recording",
                    "saved-capture": "against the host clock (saved capture)"}


def profile_time_base(profile, *, auto: bool, stale_days: float) -> str:
    """The time base of a rate corrected by a saved clock profile: which profile, its correction
    with its 95 % interval, how it was measured and how long ago."""
    how = {"host-clock": "host clock", "reference": "reference recording",
           "saved-capture": "host clock, saved capture"}.get(profile.method, profile.method)
    days = profile.age_days()
    if not days < float("inf"):  # an unreadable date
        age = "date unknown"
    elif days < 1 / 24:
        age = f"made {max(days * 1440, 0.0):.0f} min ago"
    elif days < 2:
        age = f"made {days * 24:.0f} h ago"
    else:
        age = f"made {days:.0f} days ago"
    stale = "; STALE" if days > stale_days else ""
    whose = " (named like this device)" if auto else ""
    return (f"corrected by profile {profile.name!r}{whose}: {profile.ppm:+.2f} ± {profile.u95_ppm:.2f} ppm, "
            f"{how}, {age}{stale}")


def nonfinite_note(n: int) -> str:
    return (f"{n} samples of the file are not numbers (NaN or infinite: a damaged float file): they are lost "
            "audio, counted as gaps, never as missed steps")


def unusable_reason(path: str) -> str:
    return f"none of the samples of {path} are numbers (NaN or infinite: a damaged float file): there is no audio to analyze"


def cut_short_note(analyzed_s: float, header_s: float) -> str:
    return (f"the file ends at {analyzed_s:.1f} s though its header says {header_s:.1f} s (cut short or damaged): "
            "analyzed what it holds")


# -- the kind of sound -----------------------------------------------------------------------------
#: Below this length (s), finding no step pattern is put down to the length first.
SHORT_FOR_PATTERN_S = 8.0


def sound_reason(kind: str, cause: str, *, duration_s: float, beat_interval_s: float | None,
                 alternation_us: float | None, slots_heard: int, slots_matched: int,
                 scatter_s: float | None) -> str | None:
    """Why the sound is not taken for steps (None when it is)."""
    if kind == "none":
        if duration_s < SHORT_FOR_PATTERN_S:
            return (f"the recording is only {duration_s:.1f} s long, too short to find a stepping pattern "
                    "(it takes several steps in a row): record at least 30 s")
        return ("no stepping-motor pattern was heard: move the microphone onto the case or closer "
                "to the movement, quiet the room, and record at least 30 s")
    if kind != "not-stepping":
        return None
    if cause == "unlike":
        how = (f"; only {slots_matched} of {slots_heard} beats sound like the first ones"
               + ("" if scatter_s is None else f", and they scatter by {scatter_s * 1000:.1f} ms (SD) about the grid"))
    else:
        how = "" if alternation_us is None else f", alternate beats differ by {alternation_us / 1000:.2f} ms"
    return (f"the sound is not a quartz stepping-motor pattern (beat interval heard {beat_interval_s:.4f} s{how}): "
            "no rate is claimed for it")


# -- notes on a summary ----------------------------------------------------------------------------
def notes(s, *, calibrated: bool, codec_shifts: tuple[int, float] | None, trailing_silence_slots: int,
          gaps: list[tuple[float, float]]) -> list[str]:
    """The plain-words notes of a summary, those that put the rate itself in doubt first.

    ``s`` is the :class:`~tickscope.model.Summary` being built (its warnings not yet set).
    """
    out: list[str] = []
    if s.sound_reason:
        out.append(s.sound_reason)
    out += _ringdown_notes(s.ringdown)
    rate, dg = s.rate, s.diagnosis
    if not calibrated and rate is not None:
        out.append(f"the rate is on the audio device's own, uncalibrated time base; such clocks are "
                   f"commonly off by tens of ppm (+-{TYPICAL_DEVICE_PPM:.0f} ppm = "
                   f"+-{ppm_to_s_per_day(TYPICAL_DEVICE_PPM):.1f} s/day): calibrate and pass --clock-ppm")
    if rate is not None and codec_shifts is not None and not (dg and dg.inhibition):
        n, largest_us = codec_shifts
        out.append(f"the lossy codec shifted the step times abruptly {n} time{'s' if n > 1 else ''} (by up to "
                   f"{largest_us:.0f} us): the rate is fitted within the stretches between shifts; a lossless "
                   "recording (WAV, FLAC) avoids this")
    if rate is not None and (rate.span_s < 20 or rate.n_steps < 10):
        out.append(f"the recording is short ({rate.span_s:.0f} s of steps): record at least a minute "
                   "for a useful rate, ten for a precise one")
    n = s.steps_detected
    if n and s.step_snr_db < 12:
        out.append(f"steps are weak (median {s.step_snr_db:.0f} dB above the noise): put the microphone on the case "
                   "or closer to the movement and quiet the room")
    if n and s.clipped_steps > 0.05 * n:
        out.append(f"{s.clipped_steps} steps clip the input: lower the input gain or move the microphone back")
    if s.hum_hz:
        out.append(f"mains hum at {s.hum_hz:.0f} Hz ({s.hum_db:+.0f} dB over the noise floor) was heard and ignored; "
                   "keep the microphone cable away from mains leads")
    if s.rejected_events > max(5, 0.1 * max(n, 1)):
        out.append(f"{s.rejected_events} sounds off the step grid (knocks, voices, another clock) were ignored")
    if abs(s.dc_offset) > 0.05:
        out.append(f"the recording has a DC offset of {s.dc_offset:+.3f} full scale (removed before analysis)")
    if dg is not None:
        first, later = _diagnosis_notes(dg)
        out = first + out + later
    for t in s.regrid_times_s:
        out.insert(0, f"the steps followed until {t:.0f} s stopped while another regular beat went on: tickscope "
                      "found the step grid again there; the sounds followed before are counted as other sounds "
                      "(another clock that stopped, or one the microphone was moved away from)")
    if s.second_pass:
        out.insert(0, "a first pass followed another clock that then stopped: the movement heard to the end was "
                      "followed from the start in a second pass")
    if trailing_silence_slots:
        out.append(f"the steps stopped {trailing_silence_slots} slots before the end (not counted as missed)")
    if gaps:
        out.append(f"{len(gaps)} gap{'s' if len(gaps) != 1 else ''} in the audio ({sum(b - a for a, b in gaps):.2f} s "
                   "lost); steps there are not counted as missed")
    return out


def _ringdown_notes(ringdown: dict) -> list[str]:
    out = []
    for v in ringdown.values():
        # a decay that bends on many steps and varies widely from step to step: the room, not the motor
        if v.n >= 8 and v.n_bent > v.n / 3 and v.decay_ms_iqr > 0.5 * v.decay_ms_median:
            out.append(f"the ring-down of polarity {v.polarity} bends away from one exponential on {v.n_bent} of "
                       f"{v.n} steps and varies widely (median {v.decay_ms_median:.1f} ms, IQR "
                       f"{v.decay_ms_iqr:.1f} ms): the room's reverberation or noise shapes it as much as the "
                       "movement does, so these decay times describe the recording more than the motor; for "
                       "ring-down figures put the microphone on the case in a quiet room")
    return out


#: Another clock this loud against the steps (dB) or louder puts the steps timed in doubt.
LOUD_OTHER_CLOCK_DB = -6.0


def _diagnosis_notes(dg) -> tuple[list[str], list[str]]:
    """Notes from the diagnosis: (those that put the rate in doubt, the others)."""
    first, later = [], []
    if dg.rate_provisional:
        later.append(f"the rate is provisional: logic-regulated movements correct once every 60 or 120 s, "
                     f"so record {dg.record_more_s:.0f} s more (4 minutes in all) to see whole correction periods")
    b = dg.bursts
    if b:
        later.append(f"end-of-life stepping: {b.steps_per_burst} steps every {b.burst_period_s:g} s — "
                     "replace the cell (keep button cells away from children)")
    oc = dg.other_clock
    if oc is not None:
        if oc.level_db >= LOUD_OTHER_CLOCK_DB:
            first.append(
                f"another clock ticks in the recording nearly as loud as the steps ({oc.level_db:+.1f} dB): it runs at "
                f"{oc.rate_s_per_day:+.1f} s/day on the same time base and drifts {oc.drift_ms_per_min:+.1f} ms a minute "
                "against the steps timed here; make sure these are the movement's (move the microphone onto it, "
                "or stop the other clock: a phone's gain control can make two clocks sound alike)")
        else:
            later.append(f"another clock ticks in the background ({oc.level_db:.0f} dB below the steps, "
                         f"{oc.rate_s_per_day:+.1f} s/day; {oc.ticks} ticks on a grid of their own, "
                         f"{_chance(oc.p_value)} that other sounds line up so): its ticks were left out")
    if dg.failed.correction_pulses:
        later.append(f"{dg.failed.correction_pulses} correction pulses: the movement is working at its margin")
    pa = dg.asymmetry
    if pa is not None and pa.reference_u95_us > ASYMMETRY_REFERENCE_MAX_US:
        later.append(f"the two coil polarities sound too different to time both from one reference (± "
                     f"{pa.reference_u95_us:.0f} µs): the A→B − B→A difference ({pa.value_us:+.0f} ± {pa.ci95_us:.0f} µs) "
                     "cannot tell uneven stepping")
    return first, later


# -- the repairer's reading ------------------------------------------------------------------------
def _chance(p: float) -> str:
    """A p-value in words: 'a chance of 3e-08' (or under 1e-300)."""
    if p != p:
        return "a chance not known"
    return "a chance under 1e-300" if p < 1e-300 else f"a chance of {p:.1g}"


def reading(dg, *, missed_step_times_s: tuple[float, ...] = ()) -> tuple[str, ...]:
    """Plain-words statements, each built from a figure of the diagnosis; with the missed steps'
    times, what they mean."""
    out = []
    inh = dg.inhibition
    if inh is not None:
        out.append(f"logic regulation: every {inh.period_s:g} s one step comes {inh.correction_us:.1f} µs late "
                   f"(≈ {inh.pulses_32768:.1f} pulses of 32768 Hz); the crystal alone "
                   f"{'gains' if inh.crystal_rate_s_per_day >= 0 else 'loses'} {abs(inh.crystal_rate_s_per_day):.2f} s/day, "
                   f"regulated {inh.regulated_rate_s_per_day:+.3f} s/day over {inh.periods_observed} whole periods")
    b = dg.bursts
    if b:
        held = "" if b.share_tracked != b.share_tracked else f"; {b.share_tracked:.0%} of the bursts held every step"
        out.append(f"the cell is at end of life: the circuit steps in bursts of {b.steps_per_burst} every "
                   f"{b.burst_period_s:g} s ({b.spacing_ms:.0f} ms apart{held}); the rate above is burst to burst")
    f = dg.failed
    if f.count:
        out.append(f"the motor failed {f.count} steps ({f.correction_pulses} recovered by a correction pulse; each a "
                   "twitch on its slot well under the steps' usual level and louder than every other sound of the "
                   f"2 s before it), losing {f.seconds_lost:g} s — about {f.seconds_lost_per_day:.0f} s/day at this "
                   "rate of failure: the motor works at its margin (worn or dirty train, thick oil, weak cell)")
    miss = sorted(float(t) for t in missed_step_times_s)
    if miss:
        # A stepping motor's pulses alternate in polarity: a rotor left standing by one pulse is
        # not turned by the next either (common practice, no source; the simulator and the
        # failed-step count model it so).  The slots are told apart by their neighbours.
        iv = dg.rate.interval_s

        def follows(a: float, b: float) -> bool:
            return abs(b - a - iv) < 0.25 * iv

        after_failed = [t for t in miss if any(follows(ft, t) for ft in f.times_s)]
        runs: list[list[float]] = []
        for t in miss:
            if t in after_failed:
                continue
            if runs and follows(runs[-1][-1], t):
                runs[-1].append(t)
            else:
                runs.append([t])
        singles, longer = [r[0] for r in runs if len(r) == 1], [r for r in runs if len(r) > 1]

        def listed(v: list[str]) -> str:
            return ", ".join(v[:6]) + (" …" if len(v) > 6 else "")

        n = len(miss)
        out.append(f"{n} missed step{'s' if n != 1 else ''} (slot{'s' if n != 1 else ''} of the step grid with no "
                   f"step heard, at {listed([f'{t:.1f}' for t in miss])} s): they do not change the rate, which "
                   "is fitted to the steps heard")
        if singles and not dg.bursts:
            out.append(f"{'a missed slot' if len(singles) == 1 else 'missed slots'} between steps heard "
                       f"({listed([f'{t:.1f}' for t in singles])} s): the step was most likely made and only its "
                       "sound lost (a quiet step, a noise gate, a phone's gain control, a knock over it), and the "
                       "hands lost nothing; the coil's pulses alternate in polarity, so a rotor that had not turned "
                       "there would have missed the next pulse too (common practice, no source)")
        if longer and not dg.bursts:
            out.append(f"missed slots in a row ({listed([f'{r[0]:.1f}–{r[-1]:.1f}' for r in longer])} s): the rotor "
                       "may have failed to turn (it then misses the next pulse too, and the hands fall behind by "
                       "those steps) or the sound dropped out; watch the seconds hand there")
        if after_failed:
            out.append(f"{'a missed slot follows' if len(after_failed) == 1 else 'missed slots follow'} a failed step "
                       f"({listed([f'{t:.1f}' for t in after_failed])} s): the next pulse found the rotor aligned, "
                       "part of the seconds lost above")
    if dg.drive_levels:
        out.append(f"{len(dg.drive_levels)} drive levels heard "
                   f"({', '.join(f'{lv.level_dbfs:.0f} dBFS' for lv in dg.drive_levels)}), "
                   f"{dg.drive_level_changes} changes, each abrupt and in both polarities "
                   f"({_chance(dg.drive_level_p_value)} for the largest without any): an adaptive motor drive, "
                   "not a fault by itself")
    pl = dg.position_locked
    if pl:
        out.append(f"anomalies repeat at step {', '.join(map(str, pl.positions))} of every {pl.period_steps} "
                   f"({pl.count} times, counted from the first step heard; {_chance(pl.p_value)} by coincidence): "
                   "look for a damaged tooth or a hand touching the dial, another hand or the glass there")
    pa = dg.asymmetry
    if pa is not None and pa.uneven:
        out.append(f"the two coil polarities step unevenly (A→B minus B→A {pa.value_us:+.0f} ± {pa.ci95_us:.0f} µs): "
                   "the rotor may sit off-centre in its detent, or one polarity drives weaker (common "
                   "practice, no source)")
    return tuple(out)
