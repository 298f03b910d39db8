"""Plain words: every sentence tickscope says about a recording, built from its figures.

The analysis (:mod:`tickscope.core`, :mod:`tickscope.pipeline`) computes numbers and verdicts;
this module turns them into the notes, the repairer's reading and the reasons a sound is not
measured.  It is the one place that may name a command-line option, so the core stays usable
without the CLI.  Pure: figures in, strings out.
"""
from __future__ import annotations

import math

from .core.diagnose import ASYMMETRY_REFERENCE_MAX_US
from .core.soundkind import scattered_steps
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
    if kind == "escapement":
        why = {"given": "as --movement escapement says",
               "beat-rate": f"its beat of {beat_interval_s:.4f} s is no quartz motor's interval",
               "tick-tock": "" if alternation_us is None else
               f"alternate beats differ by {alternation_us / 1000:.2f} ms, as an escapement's tick and tock do",
               "scatter": "" if scatter_s is None else
               f"its beats scatter by {scatter_s * 1000:.2f} ms (SD) about their line, as no quartz motor's steps do",
               "lift": "each beat holds an unlocking and a drop a balance's lift apart",
               "unlike": f"only {slots_matched} of {slots_heard} beats sound like the first ones"
               + ("" if scatter_s is None else f", and they scatter by {scatter_s * 1000:.1f} ms (SD) about the grid")
               + ", as no quartz motor's steps do"}.get(cause, "")
        return (f"the beats are a mechanical escapement's{': ' + why if why else ''}; they are timed as one "
                "(pass --movement quartz if it is a quartz movement)")
    if kind not in ("not-ticking", "not-stepping"):
        return None
    if cause == "unlike":
        how = (f"; only {slots_matched} of {slots_heard} beats sound like the first ones"
               + ("" if scatter_s is None else f", and they scatter by {scatter_s * 1000:.1f} ms (SD) about the grid"))
    else:
        how = "" if alternation_us is None else f", alternate beats differ by {alternation_us / 1000:.2f} ms"
    return (f"the sound is neither a quartz stepping-motor pattern nor an escapement's beat (beat interval heard "
            f"{beat_interval_s:.4f} s{how}): no rate is claimed for it")


# -- notes on a summary ----------------------------------------------------------------------------
def notes(s, *, calibrated: bool, codec_shifts: tuple[int, float] | None, trailing_silence_slots: int,
          gaps: list[tuple[float, float]]) -> list[str]:
    """The plain-words notes of a summary, those that put the rate itself in doubt first.

    ``s`` is the :class:`~tickscope.model.Summary` being built (its warnings not yet set).
    """
    out: list[str] = []
    if s.sound_reason:
        out.append(s.sound_reason)
    if s.sound != "escapement":  # an escapement's beats ring as its case does: no motor's ring-down
        out += _ringdown_notes(s.ringdown)
    rate, dg = s.rate, s.diagnosis
    if not calibrated and rate is not None:
        out.append(f"the rate is on the audio device's own, uncalibrated time base; such clocks are "
                   f"commonly off by tens of ppm (±{TYPICAL_DEVICE_PPM:.0f} ppm = "
                   f"±{ppm_to_s_per_day(TYPICAL_DEVICE_PPM):.1f} s/day): calibrate and pass --clock-ppm")
    if rate is not None and codec_shifts is not None and not (dg and dg.inhibition):
        n, largest_us = codec_shifts
        out.append(f"the lossy codec shifted the step times abruptly {n} time{'s' if n > 1 else ''} (by up to "
                   f"{largest_us:.0f} us): the rate is fitted within the stretches between shifts; a lossless "
                   "recording (WAV, FLAC) avoids this")
    if rate is not None and scattered_steps(s.sound, s.step_interval_s, rate.jitter_us):
        out.append(f"the steps scatter by {rate.jitter_us / 1000:.1f} ms (RMS) about their line, far more than a "
                   "crystal's steps do: a motor whose load varies from step to step, or a step heard as several "
                   "impacts of like loudness (the rate's interval allows for it); a seconds pendulum in beat "
                   "sounds the same: pass --movement escapement if it is one")
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
        # (or bends on most steps and in their coherent average as well)
        wide = v.decay_ms_iqr > 0.5 * v.decay_ms_median
        if v.n >= 8 and v.n_bent > v.n / 3 and (wide or (v.average_bent and v.n_bent > v.n / 2)):
            how = "varies widely" if wide else "so does the average of its steps"
            out.append(f"the ring-down of polarity {v.polarity} bends away from one exponential on {v.n_bent} of "
                       f"{v.n} steps and {how} (median {v.decay_ms_median:.1f} ms, IQR "
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
        out.append(f"logic regulation: every {inh.period_s:g} s one step comes {inh.correction_us:.1f} ± "
                   f"{inh.correction_ci95_us:.1f} µs late (≈ {inh.pulses_32768:.1f} pulses of 32768 Hz; "
                   f"{_chance(inh.p_value)} that the noise alone lines up so, over the {inh.hypotheses} periods "
                   f"and phases tried); the crystal alone "
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
    out += _missed_reading(dg, sorted(float(t) for t in missed_step_times_s))
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


def _missed_reading(dg, miss: list[float]) -> list[str]:
    """What the missed steps mean, told apart by their neighbours (a slot after a failed step, a
    lone missed slot, missed slots in a row)."""
    out: list[str] = []
    if not miss:
        return out
    f = dg.failed
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
    return out


# -- an escapement's reading -----------------------------------------------------------------------
#: A watch's beat asymmetry: within 0.5 ms good, 1 ms acceptable (domain notes 10.4; common practice,
#: from memory).  A pendulum clock is called out of beat past 3 % of its beat (our own figure: the
#: uneven tick-tock the trade listens for is heard by ear from a few per cent).
BEAT_ASYMMETRY_GOOD_MS = 0.5
BEAT_ASYMMETRY_ACCEPTABLE_MS = 1.0
PENDULUM_OUT_OF_BEAT_PERCENT = 3.0
#: A beat asymmetry is called out of beat only past its tolerance and beyond its noise at 1 %
#: (two-sided z = 2.576 from its 95 % half-width / 1.96): the false alarm of that statement.
OUT_OF_BEAT_Z = 2.576
#: Balance amplitudes (domain notes 10.3; common practice, from memory): below 200 degrees needs
#: attention; from 330 the impulse pin may knock on the banking.
AMPLITUDE_LOW_DEG = 200.0
AMPLITUDE_HIGH_DEG = 330.0

_NO_AMPLITUDE = {
    "pendulum": "a pendulum's arc cannot be told from the sound of its beats: no amplitude",
    "one-sound": "each beat is heard as one sound (its unlocking and drop not apart): no amplitude; a microphone "
                 "on the case, in a quiet room, helps",
    "few-lifts": "too few beats had their unlocking and drop both heard: no amplitude; record longer, closer",
    "sides-differ": "the two sides' lift times differ by more than a fifth: the sounds taken for unlocking and "
                    "drop are not the same on both sides, so no amplitude is claimed",
    "short-window": "no lift times: the beats were heard with a quartz step's short window; say --movement "
                    "escapement to hear each beat's unlocking too (analyze does this itself for a file)",
    "implausible": "the lift time gives no balance's swing at this lift angle: the sounds taken for unlocking and "
                   "drop are not those, so no amplitude is claimed",
}


def escapement_reading(e) -> tuple[str, ...]:
    """Plain-words statements from an :class:`~tickscope.model.EscapementFigures`, each with its figure."""
    out = []
    r = e.rate
    src = {"given": "as given", "series": "the usual value nearest the beat heard",
           "nearest": "nearest the beat heard, which is off every usual value"}.get(e.nominal_source, e.nominal_source)
    if r is not None:
        nd = 1 if r.ci95_s_per_day >= 0.5 else 2 if r.ci95_s_per_day >= 0.05 else 3  # the interval's digits
        out.append(f"the escapement {'gains' if r.rate_s_per_day >= 0 else 'loses'} {abs(r.rate_s_per_day):.{nd}f} "
                   f"± {r.ci95_s_per_day:.{nd}f} s/day against {e.beats_per_hour:.0f} beats per hour ({src}; "
                   f"heard {e.beats_per_hour_heard:.1f})")
    if e.nominal_source == "nearest":
        out.append(f"the rate is against the nearest usual beat, {e.beats_per_hour:.0f} per hour, which the beat "
                   f"heard ({e.beats_per_hour_heard:.1f}) is {e.off_series_percent:+.2f} % off: it says more about "
                   "that guess than about the movement; give the movement's own with --beats-per-hour (from its "
                   "train's wheel counts)")
    a, ci = e.beat_asymmetry_ms, e.beat_asymmetry_ci95_ms
    if a is not None and ci is not None:
        z = abs(a) / (ci / 1.96) if ci > 0 else math.inf
        pct = e.beat_asymmetry_percent or 0.0
        past = abs(pct) > PENDULUM_OUT_OF_BEAT_PERCENT if not e.balance else abs(a) > BEAT_ASYMMETRY_ACCEPTABLE_MS
        fig = f"beat asymmetry {abs(a):.2f} ± {ci:.2f} ms ({abs(pct):.1f} % of the beat)"
        if z < OUT_OF_BEAT_Z:
            out.append(f"{fig}: no asymmetry beyond the timing noise")
        elif past:
            what = ("set it in beat (the crutch or a beat adjuster, toward the side of the longer interval; which "
                    "side that is cannot be told from the sound)") if not e.balance else \
                ("past the 1 ms usually accepted: the balance's rest point is off the escapement's centre")
            out.append(f"out of beat: {fig}; {what}")
        elif e.balance and abs(a) <= BEAT_ASYMMETRY_GOOD_MS:
            out.append(f"{fig}: in beat (within the 0.5 ms counted good)")
        else:
            out.append(f"{fig}: within what is usually accepted")
    if a is None and e.beat_reference == "main-sound" and e.balance:
        out.append("no beat asymmetry: the two sides' beats sound too unlike to be timed at the same sound "
                   "(a microphone on the case, in a quiet room, may hear both sides' unlocking)")
    elif a is None:
        out.append("no beat asymmetry: fewer than 6 pairs of consecutive beats that match their side's sound well")
    if e.amplitude_deg is not None:
        lift = [v for v in e.lift_time_ms if v is not None]
        la = (f"the given lift angle of {e.lift_angle_deg:g}°" if e.lift_angle_given else
              f"a lift angle of {e.lift_angle_deg:g}° assumed (give the movement's own with --lift-angle: "
              "the amplitude scales with it)")
        health = ""
        if e.amplitude_deg < AMPLITUDE_LOW_DEG:
            health = ": low, the movement needs attention (mainspring, lubrication, wear)"
        elif e.amplitude_deg >= AMPLITUDE_HIGH_DEG:
            health = ": high, the impulse pin may knock on the banking"
        out.append(f"balance amplitude {e.amplitude_deg:.0f} ± {e.amplitude_ci95_deg:.0f}° from a lift time of "
                   f"{sum(lift) / len(lift):.2f} ms at {la}{health}")
    elif e.amplitude_reason in _NO_AMPLITUDE:
        out.append(_NO_AMPLITUDE[e.amplitude_reason])
    k = e.knocking
    if k is not None:
        out.append(f"knocking: a sound {k.delay_ms:.0f} ms after the beat in {k.beats} of {k.of_beats} beats "
                   f"({_chance(k.p_value)} that other sounds line up so): the impulse pin striking the outside "
                   "of the fork horn, an amplitude past the banking")
    w = e.wheel
    if w is not None:
        out.append(f"the beat times repeat every {w.period_beats} beats ({w.amplitude_us:.0f} µs RMS; "
                   f"{_chance(w.p_value)} by noise): look at the escape wheel and its pinion (a bent tooth, out of true)")
    for st in e.stops:
        if st.restarted and st.for_s is not None:
            out.append(f"the beats stopped at {st.at_s:.1f} s for {st.for_s:.1f} s and started again")
        else:
            out.append(f"the beats stopped at {st.at_s:.1f} s and did not start again")
    return tuple(out)
