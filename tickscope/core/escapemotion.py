"""The motion of an escapement's simulated balance or pendulum: every beat's centre crossing, period,
amplitude and the true times of its sounds (pure; no jitter, no audio).

Used by :mod:`.escapesim`, which gives the beats their voices and the recording its chain.  The
swing is a sinusoid through the centre at each beat's crossing: a lever's unlocking and drop lie
+-LA/2 either side of it, its impulse after the unlocking arc; the rate, the drift, a pendulum's
circular error, the beat asymmetry, a run-down and a stop with its restart are all in the schedule.
"""
from __future__ import annotations

import math
from typing import TYPE_CHECKING

import numpy as np

from ..errors import ParameterError
from .balance import circular_error_factor
from .escapechecks import _bad, check_scenario

if TYPE_CHECKING:
    from .escapesim import EscapementScenario



def _amplitude_at(sc: EscapementScenario, t_s: np.ndarray, restart_s: float | None) -> np.ndarray:
    """The balance amplitude (degrees) at true times ``t_s``: the run-down, and the build-up after a restart."""
    a = sc.amplitude_deg - sc.amplitude_fall_deg_per_h * np.asarray(t_s, dtype=float) / 3600.0
    if restart_s is not None:
        half = sc.lift_angle_deg / 2.0
        dt = np.asarray(t_s, dtype=float) - restart_s
        build = np.where(dt >= 0, 1.0 - 0.5 * np.exp(-np.maximum(dt, 0.0) / sc.restart_build_s), 1.0)
        a = half + (a - half) * build  # starts half way between half the lift angle and the set amplitude
    return a


def _uniform_intervals(sc: EscapementScenario, k: np.ndarray) -> np.ndarray:
    """The interval from beat k to beat k+1 without asymmetry (rate, drift, circular error), true seconds."""
    beat_s = 3600.0 / sc.beats_per_hour
    cf = circular_error_factor(sc.pendulum_semi_arc_deg) if sc.movement == "pendulum" else 1.0
    r = sc.rate_s_per_day + sc.rate_drift_s_per_day_per_h * (k * beat_s) / 3600.0
    return beat_s / (1.0 + r / 86400.0) * cf


def _schedule(sc: EscapementScenario, t0: float, k0: int, t_end: float, first_offset_s) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Beat numbers, centre-crossing times and local beat intervals of one run of the movement.

    The run starts with beat ``k0`` whose first sound is at ``t0``; ``first_offset_s(k0)`` is the time
    from a beat's first sound to its centre.  Beats whose first sound falls before ``t_end``.
    """
    beat_s = 3600.0 / sc.beats_per_hour
    a_s = sc.beat_asymmetry_ms * 1e-3
    n = int(math.floor((t_end - t0) / (beat_s * 0.9))) + 3  # enough for any rate within 10 %
    k = k0 + np.arange(max(n, 0))
    iv = _uniform_intervals(sc, k)
    if sc.rate_drift_s_per_day_per_h:
        u = np.concatenate([[0.0], np.cumsum(iv[:-1])])
    else:
        u = (k - k0) * iv[0]
    # the asymmetry: tock centres late by a/2 (tick->tock = iv + a/2, tock->tick = iv - a/2)
    asym = np.where(k % 2 == 1, a_s / 2, 0.0) - (a_s / 2 if k0 % 2 == 1 else 0.0)
    c = t0 + first_offset_s + u + asym
    return k, c, iv


def _lift_half_s(sc: EscapementScenario, amp_deg, period_s):
    """Time from the centre crossing to +LA/2 (half the lift time), seconds."""
    return period_s / (2 * math.pi) * np.arcsin(sc.lift_angle_deg / (2.0 * np.asarray(amp_deg)))


def beat_motion(sc: EscapementScenario) -> dict:
    """Every beat's number, side, centre crossing, period, amplitude and the times of its sounds (true time, no jitter).

    Returns a dict of arrays: ``beat``, ``tock`` (bool), ``centre_s``, ``period_s`` (the local balance or
    pendulum period, two uniform beats), ``amplitude_deg`` (lever; nan for a pendulum), ``sounds``
    (name -> array of times, nan where the beat lacks that sound), ``stopped``/``restarted`` (bool), and
    ``restart_s`` (the true time the movement starts again, or None).
    """
    check_scenario(sc)
    restart_s = None
    stop_end = sc.duration_s
    if sc.stop_at_s is not None:
        stop_end = sc.stop_at_s
        restart_s = sc.stop_at_s + sc.stop_for_s
    runs = [_run_beats(sc, sc.first_beat_s, 0, stop_end, None)]
    if restart_s is not None and restart_s < sc.duration_s:
        k_last = int(runs[0][0][-1]) if len(runs[0][0]) else -1
        runs.append(_run_beats(sc, restart_s, k_last + 1, sc.duration_s, restart_s))
    k = np.concatenate([r[0] for r in runs]).astype(np.int64)
    c = np.concatenate([r[1] for r in runs])
    period = np.concatenate([r[2] for r in runs])
    amp = np.concatenate([r[3] for r in runs])
    stopped = np.zeros(len(k), bool)
    restarted = np.zeros(len(k), bool)
    if sc.stop_at_s is not None and len(runs[0][0]):
        stopped[len(runs[0][0]) - 1] = True
        if len(runs) > 1 and len(runs[1][0]):
            restarted[len(runs[0][0])] = True
    sounds = _beat_sound_times(sc, c, period, amp)
    anomaly = np.zeros(len(k), bool)
    if sc.wheel_anomaly_db or sc.wheel_anomaly_ms:
        anomaly = _wheel_anomaly(sc, k, sounds)
    return {"beat": k, "tock": (k % 2) == 1, "centre_s": c, "period_s": period, "amplitude_deg": amp,
            "sounds": sounds, "stopped": stopped, "restarted": restarted, "wheel_anomaly": anomaly,
            "restart_s": restart_s if (restart_s is not None and restart_s < sc.duration_s) else None}


def _run_beats(sc: EscapementScenario, t0: float, k0: int, t_end: float, restart):
    """One run of beats from ``t0`` (the first beat's first sound) numbered from ``k0`` until ``t_end``:
    (numbers, centre crossings, periods, amplitudes)."""
    lever = sc.movement == "lever"
    off = 0.0
    if lever:
        # the first beat's first sound at t0: its centre lies half a lift time later (the lift time of
        # that beat's own amplitude and period)
        iv0 = _uniform_intervals(sc, np.array([k0]))[0]
        for _ in range(30):  # c - half_lift(A(c)) = t0 by fixed-point steps (each shrinks the error ~1000x)
            a0 = _amplitude_at(sc, np.array([t0 + off]), restart)[0]
            new = float(_lift_half_s(sc, a0, 2 * iv0))
            if new == off:
                break
            off = new
    k, c, iv = _schedule(sc, t0, k0, t_end, off)
    period = 2 * iv
    if lever:
        amp = _amplitude_at(sc, c, restart)
        first = c - _lift_half_s(sc, amp, period)
    else:
        amp = np.full(len(c), np.nan)
        first = c
    keep = first < t_end
    return k[keep], c[keep], period[keep], amp[keep]


def _beat_sound_times(sc: EscapementScenario, c: np.ndarray, period: np.ndarray, amp: np.ndarray) -> dict:
    """The times of each beat's sounds from the swing through the centre at ``c`` (name -> array)."""
    sounds: dict[str, np.ndarray] = {}
    w = period / (2 * math.pi)  # seconds per radian of the swing's phase
    if sc.movement == "lever":
        if np.any(amp <= sc.lift_angle_deg / 2):
            raise ParameterError(f"amplitude_deg={sc.amplitude_deg!r}: the balance's amplitude falls to half the "
                                 "lift angle during the recording (it would stop)")
        half_lift = sc.lift_angle_deg / 2.0
        sounds["unlock"] = c - w * np.arcsin(half_lift / amp)
        sounds["impulse"] = c + w * np.arcsin((sc.unlock_arc_deg - half_lift) / amp)
        sounds["drop"] = c + w * np.arcsin(half_lift / amp)
        if sc.knock:
            # the swing passes knock_angle_deg late on its way out (before its extreme at c + T/4)
            kt = c + w * np.arcsin(np.minimum(sc.knock_angle_deg / amp, 1.0))
            sounds["knock"] = np.where(amp > sc.knock_angle_deg, kt, np.nan)
    else:
        sounds["drop"] = c.copy()
        if sc.pendulum_escapement == "recoil":
            sounds["recoil"] = c + sc.recoil_gap_ms * 1e-3
    return sounds


def _wheel_anomaly(sc: EscapementScenario, k: np.ndarray, sounds: dict) -> np.ndarray:
    """The beats where the escape wheel's odd tooth meets a pallet (its drop shifted in ``sounds``)."""
    n2 = 2 * sc.wheel_teeth
    entry = 2 * sc.wheel_anomaly_tooth
    exit_ = entry + 2 * sc.wheel_pallet_span_teeth + 1
    anomaly = ((k - entry) % n2 == 0) | ((k - exit_) % n2 == 0)
    shifted = sounds["drop"] + np.where(anomaly, sc.wheel_anomaly_ms * 1e-3, 0.0)
    if sc.movement == "lever" and np.any(shifted <= sounds["impulse"]):
        raise _bad("wheel_anomaly_ms", sc.wheel_anomaly_ms, "a shift that keeps the drop after the impulse")
    sounds["drop"] = shifted
    if "recoil" in sounds:
        sounds["recoil"] = sounds["recoil"] + np.where(anomaly, sc.wheel_anomaly_ms * 1e-3, 0.0)
    return anomaly
