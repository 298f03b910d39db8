"""``tickscope simulate``: write a simulated recording and its truth file."""
from __future__ import annotations

import argparse
import dataclasses

from ..errors import ParameterError
from .common import console


def run(args) -> int:
    from ..core.simulate import Scenario
    from ..simulation import truth_path_for, write_simulation
    from . import simulate_escapement

    if simulate_escapement.is_escapement(args):
        return simulate_escapement.run(args)
    given = simulate_escapement.escapement_options_given(args)
    if given:
        raise ParameterError(f"{given[0]} is for escapements: add --movement lever or --movement pendulum")
    changes = {}
    for f in dataclasses.fields(Scenario):
        v = getattr(args, f.name, None)
        if v is not None:
            changes[f.name] = v
    try:
        sc = Scenario(**changes)
    except TypeError as e:
        raise ParameterError(str(e)) from e
    if args.compression_level is not None and not 0.0 <= args.compression_level <= 1.0:
        raise ParameterError(f"--compression-level {args.compression_level}: expected 0..1")
    truth = write_simulation(args.out, sc, description=args.description or "", compression_level=args.compression_level)
    n = sum(1 for s in truth["steps"] if s["kind"] == "step")
    console(stderr=True).print(f"wrote {args.out} ({sc.duration_s:g} s, {n} steps) and {truth_path_for(args.out)}")
    return 0


SIM_HELP = {
    "samplerate_hz": "sample rate of the file, Hz",
    "duration_s": "length of the recording, s",
    "channels": "number of channels",
    "step_channel": "channel that carries the movement (the others carry noise only)",
    "movement": "the movement: a quartz movement's voice (wallclock, wristwatch, alarmclock) or an escapement "
                "(lever, pendulum)",
    "step_interval_s": "nominal step interval, s (1 for most quartz movements)",
    "rate_s_per_day": "the movement's true daily rate, s/day (positive gains)",
    "rate_drift_s_per_day_per_h": "the rate changes by this much every hour, s/day per hour (a slow drift)",
    "clock_ppm": "the recording device's sample clock runs fast by this many ppm",
    "first_step_s": "time of the first step, s",
    "jitter_us": "RMS random timing jitter of each step, us",
    "level_dbfs": "peak level of a step, dBFS",
    "snr_db": "step power over its first 10 ms relative to the noise power, dB",
    "noise": "noise colour: white or pink",
    "hum_hz": "mains hum frequency (50 or 60; 0 = none), with 3rd and 5th harmonics",
    "hum_db": "hum amplitude relative to the step peak, dB",
    "missed_steps": "comma-separated step numbers that make no sound",
    "polarity_b_freq_shift": "B-polarity resonances are higher by this fraction",
    "polarity_b_level_db": "B-polarity level relative to A, dB",
    "polarity_asymmetry_us": "B steps sound this many us later than the grid",
    "variation_db": "tick-to-tick level variation (RMS), dB",
    "variation_freq_pct": "tick-to-tick resonance frequency variation (RMS), percent",
    "second_impact_ms": "delay of a second impact on every step (hand bounce), ms; 0 = none",
    "second_impact_db": "level of the second impact relative to the step, dB",
    "rattle_impacts": "further impacts at random delays on every beat, each with its own resonances "
                      "(a sound that does not repeat: a cheap escapement, a rattling case); 0 = none",
    "rattle_spread_ms": "the rattle's impacts fall within this many ms after the beat",
    "transients_per_min": "knocks and speech-like bursts per minute, off the step grid",
    "transient_db": "knock peak relative to the step peak, dB",
    "reverb_rt60_ms": "room reverberation time RT60, ms; 0 = dry",
    "agc": "apply a phone's automatic gain control",
    "gate_dbfs": "noise gate threshold, dBFS (phones); unset = no gate",
    "clip_dbfs": "hard clipping level, dBFS; unset = no clipping",
    "dc_offset": "DC offset added to the signal, full scale",
    "second_clock_rate_s_per_day": "add a second clock in the room with this rate, s/day",
    "second_clock_db": "level of the second clock relative to the movement, dB",
    "second_clock_offset_s": "time of the second clock's first tick, s",
    "inhibition_period_s": "logic-regulation period, s (0 = none)",
    "inhibition_pulses": "oscillator pulses swallowed each inhibition period",
    "inhibition_pulse_hz": "frequency of the divider stage the pulses are swallowed from, Hz",
    "burst_steps": "end-of-life stepping: steps per burst (0 = regular)",
    "burst_spacing_ms": "spacing of steps within a burst, ms",
    "failed_steps": "comma-separated step numbers where the rotor only twitches",
    "correction_delay_ms": "correction pulse this long after a failed step, ms (0 = none)",
    "drive_levels_db": "adaptive drive: comma-separated level steps in dB, cycled",
    "drive_level_period_s": "time between adaptive drive level changes, s",
    "seed": "random seed",
}


def _tuple_of(conv):
    def parse(text: str):
        try:
            return tuple(conv(v) for v in text.split(",") if v.strip())
        except ValueError as e:
            raise argparse.ArgumentTypeError(f"{text!r}: expected comma-separated numbers") from e
    return parse


def add_options(p: argparse.ArgumentParser) -> None:
    """One option per field of the quartz Scenario (names and defaults from the dataclass)."""
    from ..core.simulate import Scenario

    for f in dataclasses.fields(Scenario):
        opt = "--" + f.name.replace("_", "-")
        default = f.default
        helptext = f"{SIM_HELP.get(f.name, f.name)} (default: {default!r})"
        if f.type in ("bool",) or isinstance(default, bool):
            p.add_argument(opt, dest=f.name, action="store_true", default=None, help=helptext)
        elif isinstance(default, tuple):
            conv = float if f.name == "drive_levels_db" else int
            p.add_argument(opt, dest=f.name, type=_tuple_of(conv), default=None, metavar="N,N,...", help=helptext)
        elif isinstance(default, str):
            p.add_argument(opt, dest=f.name, type=str, default=None, help=helptext)
        elif isinstance(default, int) and not isinstance(default, bool):
            p.add_argument(opt, dest=f.name, type=int, default=None, help=helptext)
        else:
            p.add_argument(opt, dest=f.name, type=float, default=None, help=helptext)
