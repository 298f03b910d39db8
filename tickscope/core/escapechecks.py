"""The escapement simulator's parameter checks: one-line errors naming the value (pure)."""
from __future__ import annotations

import math
from typing import TYPE_CHECKING

from ..errors import ParameterError
from .balance import lift_time_s

if TYPE_CHECKING:
    from .escapesim import EscapementScenario

MOVEMENT_KINDS = ("lever", "pendulum")
PENDULUM_ESCAPEMENTS = ("recoil", "deadbeat")


def _bad(name: str, value, expected: str) -> ParameterError:
    return ParameterError(f"{name}={value!r}: expected {expected}")


def check_scenario(sc: "EscapementScenario") -> None:
    """Raise :class:`ParameterError` (one line, naming the value) for a parameter the simulator cannot use."""
    def finite(name):
        v = getattr(sc, name)
        if not isinstance(v, (int, float)) or not math.isfinite(v):
            raise _bad(name, v, "a finite number")

    for name in ("duration_s", "beats_per_hour", "rate_s_per_day", "rate_drift_s_per_day_per_h", "clock_ppm",
                 "first_beat_s", "beat_asymmetry_ms", "beat_jitter_us", "lift_angle_deg", "amplitude_deg",
                 "amplitude_fall_deg_per_h", "level_dbfs", "dc_offset", "stop_for_s"):
        finite(name)
    if sc.movement not in MOVEMENT_KINDS:
        raise _bad("movement", sc.movement, f"one of {', '.join(MOVEMENT_KINDS)}")
    if not 4000 <= sc.samplerate_hz <= 384000:
        raise _bad("samplerate_hz", sc.samplerate_hz, "4000..384000")
    if not sc.duration_s > 0:
        raise _bad("duration_s", sc.duration_s, "> 0")
    if sc.channels < 1 or not 0 <= sc.beat_channel < sc.channels:
        raise ParameterError(f"beat_channel={sc.beat_channel!r} with channels={sc.channels!r}: expected 0..channels-1")
    if not 0 < sc.beats_per_hour <= 72000:
        raise _bad("beats_per_hour", sc.beats_per_hour, "0 < beats an hour <= 72000")
    if not abs(sc.rate_s_per_day) < 8640:
        raise _bad("rate_s_per_day", sc.rate_s_per_day, "a rate within +-8640 s/day (10 %)")
    if not 0 <= sc.first_beat_s < sc.duration_s:
        raise _bad("first_beat_s", sc.first_beat_s, f"0 <= first beat < duration_s ({sc.duration_s!r})")
    beat_s = 3600.0 / sc.beats_per_hour
    if not abs(sc.beat_asymmetry_ms) * 1e-3 < beat_s:
        raise _bad("beat_asymmetry_ms", sc.beat_asymmetry_ms, f"|asymmetry| < one beat ({beat_s * 1e3:.4g} ms)")
    if not 0 <= sc.beat_jitter_us * 1e-6 <= beat_s / 20:
        raise _bad("beat_jitter_us", sc.beat_jitter_us, f"0 .. a twentieth of a beat ({beat_s / 20 * 1e6:.4g} us)")
    if sc.noise not in ("white", "pink"):
        raise _bad("noise", sc.noise, "'white' or 'pink'")
    if isinstance(sc.snr_db, bool) or not isinstance(sc.snr_db, (int, float)) or math.isnan(sc.snr_db):
        raise _bad("snr_db", sc.snr_db, "a number (inf = no noise)")
    if sc.variation_db < 0 or sc.variation_freq_pct < 0 or sc.transients_per_min < 0:
        raise ParameterError(f"variation_db={sc.variation_db!r}, variation_freq_pct={sc.variation_freq_pct!r}, "
                             f"transients_per_min={sc.transients_per_min!r}: expected >= 0")
    if not -20 < sc.tock_freq_shift_pct < 20:
        raise _bad("tock_freq_shift_pct", sc.tock_freq_shift_pct, "-20..20")
    if sc.wheel_teeth < 3:
        raise _bad("wheel_teeth", sc.wheel_teeth, ">= 3")
    if not 1 <= sc.wheel_pallet_span_teeth < sc.wheel_teeth:
        raise _bad("wheel_pallet_span_teeth", sc.wheel_pallet_span_teeth, f"1..{sc.wheel_teeth - 1}")
    if not 0 <= sc.wheel_anomaly_tooth < sc.wheel_teeth:
        raise _bad("wheel_anomaly_tooth", sc.wheel_anomaly_tooth, f"0..{sc.wheel_teeth - 1}")
    if not abs(sc.wheel_anomaly_ms) * 1e-3 < beat_s / 4:
        raise _bad("wheel_anomaly_ms", sc.wheel_anomaly_ms, f"|shift| < a quarter beat ({beat_s / 4 * 1e3:.4g} ms)")
    if sc.stop_at_s is not None:
        if not sc.first_beat_s < sc.stop_at_s < sc.duration_s:
            raise _bad("stop_at_s", sc.stop_at_s, f"a time after the first beat and before the end ({sc.duration_s!r} s)")
        if not sc.stop_for_s > 0:
            raise _bad("stop_for_s", sc.stop_for_s, "> 0 when stop_at_s is set")
    if not sc.restart_build_s > 0:
        raise _bad("restart_build_s", sc.restart_build_s, "> 0")
    if sc.movement == "lever":
        _check_lever(sc, beat_s)
    else:
        _check_pendulum(sc, beat_s)


def _check_lever(sc: "EscapementScenario", beat_s: float) -> None:
    if not 20 <= sc.lift_angle_deg <= 80:
        raise _bad("lift_angle_deg", sc.lift_angle_deg, "20..80 degrees")
    if not sc.lift_angle_deg / 2 < sc.amplitude_deg <= 360:
        raise _bad("amplitude_deg", sc.amplitude_deg,
                   f"more than half the lift angle ({sc.lift_angle_deg / 2:g}) and at most 360 degrees")
    end = sc.amplitude_deg - sc.amplitude_fall_deg_per_h * sc.duration_s / 3600.0
    if not sc.lift_angle_deg / 2 < end <= 360:
        raise ParameterError(f"amplitude_fall_deg_per_h={sc.amplitude_fall_deg_per_h!r}: the amplitude would "
                             f"reach {end:.4g} degrees by {sc.duration_s:g} s, outside half the lift angle "
                             f"({sc.lift_angle_deg / 2:g}) .. 360 (the balance would stop)")
    if not 0 < sc.unlock_arc_deg < sc.lift_angle_deg:
        raise _bad("unlock_arc_deg", sc.unlock_arc_deg, f"0 < arc < lift angle ({sc.lift_angle_deg:g})")
    if not 180 <= sc.knock_angle_deg <= 360:
        raise _bad("knock_angle_deg", sc.knock_angle_deg, "180..360 degrees")
    lift_s = lift_time_s(lift_angle_deg=sc.lift_angle_deg, amplitude_deg=min(sc.amplitude_deg, end),
                         period_s=2 * beat_s)
    if not lift_s + 2e-3 + abs(sc.beat_asymmetry_ms) * 1e-3 / 2 < beat_s:
        raise ParameterError(f"beats_per_hour={sc.beats_per_hour!r}: a lift time of {lift_s * 1e3:.3g} ms "
                             "leaves no room between the beats; raise the amplitude or lower the asymmetry")


def _check_pendulum(sc: "EscapementScenario", beat_s: float) -> None:
    if sc.pendulum_escapement not in PENDULUM_ESCAPEMENTS:
        raise _bad("pendulum_escapement", sc.pendulum_escapement, f"one of {', '.join(PENDULUM_ESCAPEMENTS)}")
    if not 0 <= sc.pendulum_semi_arc_deg <= 30:
        raise _bad("pendulum_semi_arc_deg", sc.pendulum_semi_arc_deg, "0..30 degrees")
    if not 0 < sc.recoil_gap_ms * 1e-3 < beat_s / 4:
        raise _bad("recoil_gap_ms", sc.recoil_gap_ms, f"0 < gap < a quarter beat ({beat_s / 4 * 1e3:.4g} ms)")
    if not 20 <= sc.ring_hz < 0.45 * sc.samplerate_hz:
        raise _bad("ring_hz", sc.ring_hz, f"20 .. {0.45 * sc.samplerate_hz:g} Hz (0.45 of the sample rate)")
    if not 0 < sc.ring_decay_ms <= 2000:
        raise _bad("ring_decay_ms", sc.ring_decay_ms, "0 < decay <= 2000 ms")
