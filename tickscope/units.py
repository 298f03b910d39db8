"""Unit conversions used everywhere (pure, numpy only).

Conventions
-----------
* Times inside the pipeline are seconds on the audio device's sample clock:
  ``sample_index / samplerate`` (float64).
* Rate sign: ``rate_s_per_day = 86400 * (nominal_interval / measured_interval - 1)``;
  positive means the movement gains.
"""
from __future__ import annotations

import math

import numpy as np

SECONDS_PER_DAY = 86400.0
#: 32768 Hz = 2**15: fifteen binary divider stages give one step per second
#: (watch-crystal basics; shared/domain.md table row 1).
CRYSTAL_HZ = 32768
#: One period of the watch crystal, in microseconds (1/32768 s = 30.517578125 us).
CRYSTAL_PERIOD_US = 1e6 / CRYSTAL_HZ


def ppm_to_s_per_day(ppm: float) -> float:
    """Fractional frequency in ppm to seconds per day (1 ppm = 0.0864 s/day)."""
    return ppm * 1e-6 * SECONDS_PER_DAY


def s_per_day_to_ppm(s_per_day: float) -> float:
    """Seconds per day to ppm (1 s/day = 11.574 ppm)."""
    return s_per_day / SECONDS_PER_DAY * 1e6


def rate_from_interval(nominal_interval_s: float, measured_interval_s: float) -> float:
    """Daily rate in s/day of a movement whose step interval measures ``measured_interval_s``."""
    return SECONDS_PER_DAY * (nominal_interval_s / measured_interval_s - 1.0)


def interval_from_rate(nominal_interval_s: float, rate_s_per_day: float) -> float:
    """Step interval of a movement with the given daily rate (inverse of :func:`rate_from_interval`)."""
    return nominal_interval_s / (1.0 + rate_s_per_day / SECONDS_PER_DAY)


def samples_to_seconds(samples, samplerate: float):
    """Sample index (int or float, scalar or array) to seconds."""
    return np.asarray(samples, dtype=np.float64) / float(samplerate) if np.ndim(samples) else float(samples) / float(samplerate)


def db_power(ratio) -> float:
    """Power ratio to decibels (10 log10), with a floor at -300 dB."""
    return 10.0 * math.log10(max(float(ratio), 1e-30))


def db_amplitude(ratio) -> float:
    """Amplitude ratio to decibels (20 log10), with a floor at -300 dB."""
    return 20.0 * math.log10(max(float(ratio), 1e-15))


#: dB per neper of amplitude: a decay e^(-t/tau) falls 8.686/tau dB per second.
DB_PER_NEPER = 20.0 / math.log(10.0)


def t60_from_tau(tau_s: float) -> float:
    """Time for a 60 dB fall of an envelope proportional to e^(-t/tau): 3 ln(10) tau = 6.908 tau."""
    return 60.0 / DB_PER_NEPER * tau_s
