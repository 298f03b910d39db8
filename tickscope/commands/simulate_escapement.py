"""``tickscope simulate OUT --movement lever|pendulum``: the escapement simulator's options.

The simulate command keeps its quartz options (one per field of
:class:`tickscope.core.simulate.Scenario`; ``--movement wallclock|wristwatch|alarmclock``).
This module adds the escapement's own options and builds an
:class:`~tickscope.core.escapesim.EscapementScenario` from the parsed arguments.  The options
both simulators share (``--samplerate-hz``, ``--duration-s``, ``--rate-s-per-day``, ``--snr-db``,
``--agc``, ``--reverb-rt60-ms`` ...) are the quartz options, read under the same names.

Wiring, in the simulate command::

    add_escapement_options(parser)            # after the quartz options
    ...
    if is_escapement(args):
        return run(args)                      # writes OUT and OUT.truth.json
    refuse = escapement_options_given(args)   # a quartz movement with escapement options
"""
from __future__ import annotations

import argparse
import dataclasses

from ..errors import ParameterError

ESCAPEMENT_MOVEMENTS = ("lever", "pendulum")

#: Help for the escapement's own options (the shared ones keep the quartz help).
ESCAPEMENT_HELP = {
    "beat_channel": "channel that carries the movement (the others carry noise only)",
    "beats_per_hour": "nominal beats an hour (a tick or a tock is one beat), e.g. 28800 for a 4 Hz balance",
    "first_beat_s": "time of the first beat's first sound, s",
    "beat_asymmetry_ms": "tick-to-tock interval minus tock-to-tick interval, ms (the movement out of beat)",
    "beat_jitter_us": "RMS beat-to-beat jitter of each whole beat, us (tens of us for a watch)",
    "lift_angle_deg": "lever: the lift angle, degrees (20..80)",
    "amplitude_deg": "lever: the balance's amplitude, degrees (over half the lift angle, at most 360)",
    "amplitude_fall_deg_per_h": "lever: the amplitude falls this much every hour, degrees per hour (a run-down)",
    "unlock_arc_deg": "lever: balance arc from the unlocking to the impulse sound, degrees",
    "knock": "lever: the impulse pin strikes the outside of the horn when the amplitude passes --knock-angle-deg",
    "knock_angle_deg": "lever: the balance angle at which the pin meets the horn's outside, degrees",
    "tock_freq_shift_pct": "the tock's resonances are higher than the tick's by this much, percent",
    "tock_level_db": "the tock's level relative to the tick, dB",
    "wheel_teeth": "teeth of the escape wheel (one turn = twice this many beats)",
    "wheel_pallet_span_teeth": "teeth between the pallets: a tooth meets the exit pallet 2 N + 1 beats after the entry",
    "wheel_anomaly_tooth": "the escape wheel's odd tooth, 0..teeth-1",
    "wheel_anomaly_db": "that tooth's drop is louder by this much, dB (0 and 0 ms: no odd tooth)",
    "wheel_anomaly_ms": "that tooth's drop comes this much later, ms",
    "stop_at_s": "the movement stops at this time, s (unset: it runs throughout)",
    "stop_for_s": "... and starts again after this long, s",
    "restart_build_s": "lever: a restarted balance's amplitude builds up with this time constant, s",
    "pendulum_escapement": "pendulum: recoil (two impacts a beat) or deadbeat (one)",
    "pendulum_semi_arc_deg": "pendulum: its swing either side of vertical, degrees (adds the circular error; 0 = none)",
    "recoil_gap_ms": "pendulum, recoil: the second impact this long after the first, ms",
    "recoil_level_db": "pendulum, recoil: the second impact's level relative to the first, dB",
    "ring_hz": "pendulum: lowest resonance of the case or gong rod that rings after each beat, Hz",
    "ring_decay_ms": "pendulum: that ring's amplitude decay constant, ms",
    "ring_level_db": "pendulum: that ring's peak relative to the impact, dB",
}

#: Quartz options that have an escapement counterpart of another name.
_QUARTZ_COUNTERPART = {
    "step_channel": "beat_channel",
    "first_step_s": "first_beat_s",
    "jitter_us": "beat_jitter_us",
    "step_interval_s": "beats_per_hour",
    "polarity_asymmetry_us": "beat_asymmetry_ms",
    "polarity_b_level_db": "tock_level_db",
    "polarity_b_freq_shift": "tock_freq_shift_pct",
}


def _opt(name: str) -> str:
    return "--" + name.replace("_", "-")


def _quartz_fields() -> set[str]:
    from ..core.simulate import Scenario

    return {f.name for f in dataclasses.fields(Scenario)}


def _own_fields():
    """The escapement's fields that the quartz Scenario lacks (they get options here)."""
    from ..core.escapesim import EscapementScenario

    quartz = _quartz_fields()
    return [f for f in dataclasses.fields(EscapementScenario) if f.name not in quartz]


def add_escapement_options(parser: argparse.ArgumentParser) -> None:
    """Add the escapement's own options (an argument group) to the simulate command's parser.

    The parser must already hold the quartz options (one ``--field-name`` per quartz Scenario field,
    ``dest`` the field's name, default None); they are shared and not added again.  Every option
    added here defaults to None (= the scenario's default).
    """
    g = parser.add_argument_group("escapements (--movement lever or pendulum)")
    for f in _own_fields():
        default = f.default
        helptext = f"{ESCAPEMENT_HELP.get(f.name, f.name)} (default: {default!r})"
        if isinstance(default, bool):
            g.add_argument(_opt(f.name), dest=f.name, action=argparse.BooleanOptionalAction, default=None,
                           help=helptext)
        elif f.name == "pendulum_escapement":
            from ..core.escapechecks import PENDULUM_ESCAPEMENTS

            g.add_argument(_opt(f.name), dest=f.name, choices=PENDULUM_ESCAPEMENTS, default=None, help=helptext)
        elif isinstance(default, str):
            g.add_argument(_opt(f.name), dest=f.name, type=str, default=None, help=helptext)
        elif isinstance(default, int):
            g.add_argument(_opt(f.name), dest=f.name, type=int, default=None, help=helptext)
        else:
            g.add_argument(_opt(f.name), dest=f.name, type=float, default=None, help=helptext)


def is_escapement(args) -> bool:
    """True when ``--movement`` names an escapement (lever or pendulum)."""
    return getattr(args, "movement", None) in ESCAPEMENT_MOVEMENTS


def escapement_options_given(args) -> list[str]:
    """The escapement-only options set on the command line (for refusing them with a quartz movement)."""
    return [_opt(f.name) for f in _own_fields() if getattr(args, f.name, None) is not None]


def escapement_scenario_from_args(args):
    """An :class:`EscapementScenario` from the parsed simulate options.

    Options left unset keep the scenario's defaults.  A quartz-only option (``--missed-steps``,
    ``--inhibition-period-s``, ``--jitter-us`` ...) raises :class:`ParameterError` naming it (and
    the escapement's counterpart where there is one), as does a bad value.
    """
    from ..core.escapesim import EscapementScenario, check_scenario

    if not is_escapement(args):
        raise ParameterError(f"--movement {getattr(args, 'movement', None)!r}: expected lever or pendulum "
                             "for the escapement simulator")
    esc_fields = {f.name for f in dataclasses.fields(EscapementScenario)}
    for name in sorted(_quartz_fields() - esc_fields):
        if getattr(args, name, None) is not None:
            hint = f"; use {_opt(_QUARTZ_COUNTERPART[name])}" if name in _QUARTZ_COUNTERPART else ""
            raise ParameterError(f"{_opt(name)} is for quartz movements, not --movement {args.movement}{hint}")
    changes = {}
    for name in esc_fields:
        v = getattr(args, name, None)
        if v is not None:
            changes[name] = v
    try:
        sc = EscapementScenario(**changes)
    except TypeError as e:
        raise ParameterError(str(e)) from e
    check_scenario(sc)
    return sc


def run(args) -> int:
    """Write the escapement recording ``args.out`` and its truth file; a line on stderr says what was written."""
    from ..simulation import truth_path_for, write_escapement_simulation
    from .common import console

    sc = escapement_scenario_from_args(args)
    level = getattr(args, "compression_level", None)
    if level is not None and not 0.0 <= level <= 1.0:
        raise ParameterError(f"--compression-level {level}: expected 0..1")
    truth = write_escapement_simulation(args.out, sc, description=getattr(args, "description", None) or "",
                                        compression_level=level)
    console(stderr=True).print(f"wrote {args.out} ({sc.duration_s:g} s, {sc.movement}, {len(truth['beats'])} beats) "
                               f"and {truth_path_for(args.out)}")
    return 0
