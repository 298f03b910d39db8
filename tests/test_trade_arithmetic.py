"""Arithmetic of the trade, checked against published figures (sources in comments)."""
import math

import pytest

from tickscope import units


def test_crystal_divider_gives_one_step_per_second():
    # 32768 Hz = 2^15: fifteen divide-by-two stages give 1 Hz (Jauch, "tuning fork crystal ...
    # always exactly 32.768 kHz"; shared/domain.md table row 1).
    assert units.CRYSTAL_HZ == 2**15
    assert units.CRYSTAL_HZ / 2**15 == 1.0
    assert units.CRYSTAL_PERIOD_US == pytest.approx(30.517578125, abs=1e-12)


def test_ppm_and_seconds_per_day():
    # Epson RTC application manuals: "Δf/f = 11.574e-6 is an error of approximately 1 second/day".
    assert units.s_per_day_to_ppm(1.0) == pytest.approx(11.574, abs=5e-4)
    assert units.ppm_to_s_per_day(1.0) == pytest.approx(0.0864, abs=1e-12)


def test_one_dropped_pulse_per_minute():
    # One 32768 Hz pulse dropped every 60 s: 86400 / (32768 * 60) = 0.043945 s/day (computed;
    # shared/domain.md table row 3).
    assert 86400 / (32768 * 60) == pytest.approx(0.043945, abs=1e-6)


def test_rate_sign_and_round_trip():
    # positive = the movement gains: shorter intervals than nominal
    assert units.rate_from_interval(1.0, 0.99999) > 0
    iv = units.interval_from_rate(1.0, 2.7)
    assert units.rate_from_interval(1.0, iv) == pytest.approx(2.7, abs=1e-9)


def test_t60_from_tau():
    # Exponential ring-down: T60 = 3 ln10 tau = 6.9078 tau (shared/domain.md table row 16).
    assert units.t60_from_tau(0.003) == pytest.approx(0.02072, abs=1e-5)
    assert units.DB_PER_NEPER == pytest.approx(8.686, abs=1e-3)
    assert 3 * math.log(10) == pytest.approx(6.9078, abs=1e-4)
