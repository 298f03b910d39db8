"""Mechanical escapements: rate against the nominal beat, beat asymmetry, lift time and balance
amplitude, from the beats' sounds.

Checks against published relations and worked values (domain notes 10.1-10.4, computed from the
formulas named there), against the project's escapement simulator (core/escapesim: known
parameters) and against the independent escapement model of tests/independent (a balance and
a pendulum integrated numerically, rooms and phones from general-purpose libraries; its truth
comes from its construction).  Figures over many recordings: benchmarks/escapement.py.
"""
import json
import math
import os
import subprocess
import sys

import numpy as np
import pytest

from tickscope.core.escapement import (amplitude_deg, amplitude_interval, beat_asymmetry, nominal_beats)
from tickscope.core.escapesim import EscapementScenario, render_all
from tickscope.export import summary_to_dict
from tickscope.pipeline import analyze_samples

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _run(x, fs, **kw):
    """Analysed as `analyze` does (pipeline.analyze_samples: a second pass with an escapement's window)."""
    x = np.asarray(x)
    return analyze_samples(x[:, 0] if x.ndim > 1 else x, fs, **kw)


def _sim(**kw):
    sc = EscapementScenario(**kw)
    x, truth = render_all(sc)
    return _run(x, sc.samplerate_hz), truth


# -- published relations and worked values ---------------------------------------------------------
def test_nominal_beat_from_the_series():
    # 28800 beats per hour -> a beat of 0.125 s; 21600 -> 1/6 s (domain notes 10.1, computed)
    n = nominal_beats(0.1250400)
    assert n.beats_per_hour == 28800 and n.beat_s == pytest.approx(0.125) and n.source == "series" and n.balance
    assert nominal_beats(1 / 6 * 1.0003).beats_per_hour == 21600
    # a seconds pendulum: 3600 per hour, no balance
    n = nominal_beats(1.0013)
    assert n.beats_per_hour == 3600 and not n.balance
    # given by the user, kept whatever is heard
    assert nominal_beats(0.2232, 16200).beats_per_hour == 16200 and nominal_beats(0.2232, 16200).source == "given"
    # off every usual value by more than 1 %: the nearest, said to be so
    assert nominal_beats(0.2232).source == "nearest"


def test_amplitude_from_the_lift_time_worked_value():
    # A = LA / (2 sin(pi t_lift / T)); LA 52 degrees, 28800 beats per hour (T = 0.25 s):
    # A = 280 degrees <-> t_lift = 7.40 ms (domain notes 10.3, computed)
    t_lift = 0.25 / math.pi * math.asin(52 / (2 * 280))
    assert t_lift * 1e3 == pytest.approx(7.40, abs=0.01)
    assert amplitude_deg(t_lift, 0.25, 52.0) == pytest.approx(280.0, abs=1e-6)
    # the amplitude scales with the lift angle assumed (about linearly)
    assert amplitude_deg(t_lift, 0.25, 48.0) == pytest.approx(280.0 * 48 / 52, rel=0.01)
    # a longer lift is a smaller swing; the interval follows the slope dA/dt
    a, h = amplitude_interval(t_lift, 0.1e-3, 0.25, 52.0)
    assert h == pytest.approx(abs(amplitude_deg(t_lift + 0.05e-3, 0.25, 52) - amplitude_deg(t_lift - 0.05e-3, 0.25, 52)),
                              rel=0.01)
    assert amplitude_deg(0.2, 0.25, 52.0) is None  # no lift longer than half a period


def test_beat_asymmetry_worked_value():
    # intervals 0.43 / 0.61 s alternating: 180 ms, 34.6 % of the mean beat (domain notes 10.4, computed)
    iv = np.tile([0.43, 0.61], 20)
    t = np.concatenate([[0.0], np.cumsum(iv)])
    k = np.arange(len(t))
    a, half, n = beat_asymmetry(k, t)
    assert a == pytest.approx(-0.18) and half == pytest.approx(0.0, abs=1e-9) and n == 20
    assert abs(a) / np.mean(iv) * 100 == pytest.approx(34.6, abs=0.05)


def test_beat_asymmetry_interval_holds_for_white_timing_noise():
    # 400 records of 200 beats, each beat timed with 30 us of white noise, an asymmetry of 0.3 ms:
    # the 95 % interval must hold the truth in 95 % of them (between 92 % and 98 %); the naive one
    # (two interval means taken as independent) holds it in about 83 %
    hit = 0
    for seed in range(400):
        r = np.random.default_rng(seed)
        k = np.arange(200)
        t = k * 0.125 + np.where(k % 2 == 1, 0.15e-3, 0.0) + r.normal(0, 30e-6, 200)
        a, half, _ = beat_asymmetry(k, t)
        hit += abs(a - 0.3e-3) <= half
    assert 0.92 * 400 <= hit <= 0.98 * 400


# -- the project's simulator: known parameters -----------------------------------------------------
@pytest.mark.slow
@pytest.mark.parametrize("kw", [
    dict(duration_s=30, seed=1, beats_per_hour=28800, amplitude_deg=280, rate_s_per_day=6.0, beat_asymmetry_ms=0.4),
    dict(duration_s=30, seed=2, beats_per_hour=18000, amplitude_deg=220, snr_db=15, rate_s_per_day=-12.0),
    dict(duration_s=60, seed=3, beats_per_hour=21600, amplitude_deg=310, reverb_rt60_ms=400, agc=True,
         beat_asymmetry_ms=1.5),
])
def test_lever_watch_rate_asymmetry_and_amplitude(kw):
    s, truth = _sim(movement="lever", **kw)
    assert s.sound == "escapement"
    e = summary_to_dict(s)["escapement"]
    assert e["beats_per_hour"] == kw["beats_per_hour"] and e["balance"]
    assert abs(e["rate_s_per_day"] - truth["rate_s_per_day"]) <= e["rate_ci95_s_per_day"]
    assert abs(abs(e["beat_asymmetry_ms"]) - abs(truth["beat_asymmetry_ms"])) <= e["beat_asymmetry_ci95_ms"] + 0.02
    # the lift time and so the amplitude, at the simulator's own lift angle (the default 52)
    assert e["lift_angle_deg"] == 52 and not e["lift_angle_given"]
    # (the simulator places the sounds by the relation itself: the lift time's noise alone, within
    # 1.5 %; the interval also carries the relation's own systematic allowance of 7 %)
    assert e["amplitude_deg"] == pytest.approx(truth["amplitude_deg"], rel=0.015)
    assert e["amplitude_ci95_deg"] >= 0.069 * e["amplitude_deg"]  # (JSON rounds to 0.1 degree)
    assert any("balance amplitude" in line and "assumed" in line for line in s.reading)


@pytest.mark.slow
def test_pendulum_clock_out_of_beat():
    s, truth = _sim(movement="pendulum", duration_s=40, seed=4, beats_per_hour=8100, beat_asymmetry_ms=30)
    e = summary_to_dict(s)["escapement"]
    assert s.sound == "escapement" and e["beats_per_hour"] == 8100 and not e["balance"]
    assert abs(abs(e["beat_asymmetry_ms"]) - 30.0) <= e["beat_asymmetry_ci95_ms"] + 0.1
    assert e["amplitude_deg"] is None and e["amplitude_reason"] == "pendulum"
    assert any(line.startswith("out of beat") for line in s.reading)


@pytest.mark.parametrize("asym_ms,seed", [(82.0, 5), (-95.0, 6)])
def test_a_seconds_pendulum_far_out_of_beat_is_followed_on_both_sides(asym_ms, seed):
    # 3600 beats an hour, 8-10 % out of beat: on a quartz motor's interval, with each side 40-50 ms
    # off the line (no motor's polarities are 10 ms apart); it used to lose the grid again and again
    # and read "stepping" or nothing at all
    s, truth = _sim(movement="pendulum", duration_s=60, seed=seed, beats_per_hour=3600, beat_asymmetry_ms=asym_ms,
                    beat_jitter_us=250.0, snr_db=20.0)
    e = summary_to_dict(s)["escapement"]
    assert s.sound == "escapement" and e["beats_per_hour"] == 3600 and s.steps_detected >= 55
    assert abs(abs(e["beat_asymmetry_ms"]) - abs(asym_ms)) <= e["beat_asymmetry_ci95_ms"] + 0.1
    assert abs(e["rate_s_per_day"] - truth["rate_s_per_day"]) <= e["rate_ci95_s_per_day"]


@pytest.mark.slow
def test_a_watch_in_beat_is_not_called_out_of_beat():
    # no asymmetry at all: the statement may not say out of beat (its test is at 1 %)
    s, truth = _sim(movement="lever", duration_s=30, seed=7, beat_asymmetry_ms=0.0, beat_jitter_us=40.0)
    assert not any(line.startswith("out of beat") for line in s.reading)


# -- the independent escapement model --------------------------------------------------------------
def _independent(kind, seed):
    sys.path.insert(0, ROOT)
    from tests.independent.escapement_corpus import make_case

    c = make_case(kind, seed)
    return c, _run(c.audio, c.samplerate)


@pytest.mark.slow
@pytest.mark.parametrize("seed", [
    pytest.param(50000, marks=pytest.mark.xfail(strict=True, reason="rate -0.522 +- 0.023 s/day for -0.548: the "
                                                 "interval 10 % too narrow on the independent model's beats")),
    50001,
    pytest.param(50002, marks=pytest.mark.xfail(strict=True, reason="one side's lift read 8.0 ms for 10.07: its "
                                                 "unlocking sound taken at another of the beat's sounds")),
    pytest.param(50003, marks=pytest.mark.xfail(strict=True, reason="one side's lift read 8.5 ms for 11.14: its "
                                                 "unlocking sound taken at another of the beat's sounds"))])
def test_independent_lever_rate_and_lift(seed):
    c, s = _independent("lever-clean", seed)
    T = c.truth
    e = summary_to_dict(s)["escapement"]
    assert s.sound == "escapement" and e is not None
    assert abs(e["rate_s_per_day"] - T["rate_s_per_day"]) <= e["rate_ci95_s_per_day"]
    # the lift time of each side (the independent model's unlocking and drop)
    lifts = [v for v in e["lift_time_ms"] if v is not None]
    assert lifts and all(abs(v - np.mean(T["lift_time_ms"])) <= 0.3 for v in lifts)
    # the amplitude at the model's own lift angle: within its interval of the balance's true swing
    # (the model's balance is driven through the lift, which the relation ignores)
    s2 = _run(c.audio, c.samplerate, lift_angle_deg=T["lift_angle_deg"])
    e2 = summary_to_dict(s2)["escapement"]
    assert abs(e2["amplitude_deg"] - T["amplitude_deg"]) <= e2["amplitude_ci95_deg"]


# -- the command line ------------------------------------------------------------------------------
def _cli(*args):
    return subprocess.run([sys.executable, "-m", "tickscope", *args], capture_output=True, text=True, timeout=300)


@pytest.mark.slow
def test_analyze_the_bench_watch_with_its_lift_angle(tmp_path):
    p = os.path.join(ROOT, "recordings", "bench-lever-watch.flac")
    truth = json.load(open(os.path.join(ROOT, "recordings", "bench-lever-watch.truth.json")))
    r = _cli("analyze", p, "--json", "--lift-angle", "52", "--beats-per-hour", "28800")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    e = d["escapement"]
    assert d["sound"] == "escapement" and e["lift_angle_given"] and e["nominal_source"] == "given"
    assert abs(e["rate_s_per_day"] - truth["rate_s_per_day"]) <= e["rate_ci95_s_per_day"]
    assert e["amplitude_deg"] == pytest.approx(truth["amplitude_deg"], rel=0.015)
    r = _cli("analyze", p)
    assert r.returncode == 0 and "beats per hour" in r.stdout and "amplitude" in r.stdout
    # the steps CSV carries each beat's lift time (and a device that cannot be rewound is no error)
    out = tmp_path / "beats.csv"
    r = _cli("analyze", p, "--quiet", "--steps-csv", str(out))
    assert r.returncode == 0, r.stderr
    import csv

    rows = [row for row in csv.DictReader(open(out)) if row["polarity"]]
    lifts = [float(row["lift_ms"]) for row in rows if row["lift_ms"]]
    assert len(rows) >= 200 and len(lifts) >= 0.5 * len(rows)
    assert np.median(lifts) == pytest.approx(truth["lift_time_ms"], abs=0.1)
    assert _cli("analyze", p, "--quiet", "--steps-csv", os.devnull).returncode == 0


@pytest.mark.parametrize("args,words", [
    (["--lift-angle", "95"], "lift angle 95.0 degrees: expected 20..80"),
    (["--beats-per-hour", "900000"], "beats per hour 900000.0: expected"),
])
def test_options_no_escapement_has_are_one_line_errors(args, words):
    p = os.path.join(ROOT, "recordings", "bench-lever-watch.flac")
    r = _cli("analyze", p, *args)
    assert r.returncode == 2 and words in r.stderr and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1


@pytest.mark.slow
def test_a_quartz_movement_said_to_be_an_escapement_is_timed_as_beats():
    # --movement escapement on the quartz demo: a 1 s beat is a pendulum's (3600 per hour)
    r = _cli("analyze", "--json", "--movement", "escapement")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert d["sound"] == "escapement" and d["escapement"]["beats_per_hour"] == 3600


@pytest.mark.slow
def test_live_screen_of_an_escapement_fits_and_shows_its_figures():
    import io

    from rich.console import Console

    from tickscope.ui.dashboard import LiveStatus, render_live

    s, truth = _sim(movement="lever", duration_s=20, seed=11, beats_per_hour=21600, amplitude_deg=260)
    buf = io.StringIO()
    Console(file=buf, width=80, height=24, color_system=None).print(
        render_live(s, LiveStatus("pulse", 48000, 0, 20.0, -18.0, 0, None), width=80))
    text = buf.getvalue()
    lines = text.splitlines()
    assert len(lines) <= 24 and all(len(line) <= 80 for line in lines)
    assert "escapement · 21600 beats/h" in text and "asymmetry" in text and "amplitude" in text and "assumed" in text
    assert "missed" not in text  # an escapement's beats are not steps to be missed
