"""Quartz diagnostics against simulator truth and the arithmetic of the trade."""
import numpy as np
import pytest

from tickscope.core.faults import drive_levels, polarity_asymmetry, position_locked
from tickscope.core.regulation import detect_inhibition
from tickscope.core.simulate import Scenario
from conftest import analyze_scenario, match_times, true_step_times
from tickscope.export import summary_to_dict


def _ex(s):
    return summary_to_dict(s)


# -- inhibition ----------------------------------------------------------------------------------
def test_worked_example_plus_20_ppm_once_a_minute():
    # Worked example (shared/domain.md table row 5, computed): a crystal +20 ppm fast corrected once a
    # minute loses 39 pulses of 1/32768 s = 1.190 ms; a 10-s window across the step reads -99 ppm
    # (-8.56 s/day), windows without it +20 ppm (+1.728 s/day).
    jump = 39 / 32768
    assert jump * 1e3 == pytest.approx(1.190, abs=1e-3)
    assert (10 * 20e-6 - jump) / 10 * 1e6 == pytest.approx(-99.0, abs=0.1)
    assert -99.0e-6 * 86400 == pytest.approx(-8.56, abs=0.01)
    assert 20e-6 * 86400 == pytest.approx(1.728, abs=1e-6)
    # the same movement simulated: crystal +20 ppm (1.728 s/day), regulated to +0.0138 s/day
    # (residual +0.16 ppm: 20 ppm - 39/(32768*60))
    residual_ppm = 20 - 39 / (32768 * 60) * 1e6
    assert residual_ppm == pytest.approx(0.16, abs=0.01)
    sc = Scenario(duration_s=300, inhibition_period_s=60, inhibition_pulses=39,
                  rate_s_per_day=residual_ppm * 0.0864, snr_db=30, seed=51)
    s, *_ = analyze_scenario(sc)
    inh = _ex(s)["inhibition"]
    assert inh["period_s"] == 60
    assert inh["correction_us"] == pytest.approx(1190.2, abs=2.0)
    assert inh["pulses_32768"] == pytest.approx(39, abs=0.1)
    assert inh["crystal_rate_s_per_day"] == pytest.approx(1.728, abs=0.01)
    assert abs(s.rate.rate_s_per_day - residual_ppm * 0.0864) <= s.rate.ci95_s_per_day


def test_one_pulse_every_ten_seconds():
    # one 32768 Hz pulse every 10 s = 30.5 us = 3.05 ppm = 0.2637 s/day (domain.md row 3, computed)
    sc = Scenario(duration_s=200, inhibition_period_s=10, inhibition_pulses=1, rate_s_per_day=0.25,
                  snr_db=30, noise="pink", hum_hz=50, seed=52)
    s, *_ = analyze_scenario(sc)
    inh = _ex(s)["inhibition"]
    assert inh["period_s"] == 10
    assert inh["pulses_32768"] == pytest.approx(1.0, abs=0.15)
    assert inh["crystal_rate_s_per_day"] == pytest.approx(0.25 + 0.2637, abs=0.02)
    assert abs(s.rate.rate_s_per_day - 0.25) <= s.rate.ci95_s_per_day


def test_two_minute_period_with_8192_hz_pulses():
    # 20 pulses of the 8192 Hz stage every 120 s (NXP PCA2002 scheme): 2.441 ms, 80 pulses of 32768 Hz
    sc = Scenario(duration_s=600, inhibition_period_s=120, inhibition_pulses=20, inhibition_pulse_hz=8192,
                  rate_s_per_day=0.25, snr_db=25, seed=53)
    s, *_ = analyze_scenario(sc)
    inh = _ex(s)["inhibition"]
    assert inh["period_s"] == 120
    assert inh["pulses_8192"] == pytest.approx(20, abs=0.2)
    assert abs(s.rate.rate_s_per_day - 0.25) <= s.rate.ci95_s_per_day


def test_no_false_inhibition_and_short_file_is_provisional():
    s, *_ = analyze_scenario(Scenario(duration_s=300, rate_s_per_day=1.1, snr_db=30, jitter_us=5, seed=54))
    assert _ex(s)["inhibition"] is None
    assert _ex(s)["rate_provisional"] is False
    # shorter than one inhibition period: no confident rate
    sc = Scenario(duration_s=45, inhibition_period_s=60, inhibition_pulses=39, rate_s_per_day=0.25, snr_db=30, seed=55)
    s, *_ = analyze_scenario(sc)
    assert _ex(s)["rate_provisional"] is True
    assert s.rate.ci95_s_per_day > 1.0  # an unseen 2.4 ms correction over 45 s is 4.7 s/day
    assert any("provisional" in w for w in s.warnings)


def test_inhibition_function_on_plain_arrays(rng):
    k = np.arange(600)
    t = k * (1 - 20e-6) + np.floor(k / 60) * (39 / 32768) + rng.normal(0, 3e-6, 600)
    inh = detect_inhibition(k, t, 1.0)
    assert inh.period_steps == 60 and inh.pulses_32768 == pytest.approx(39, abs=0.5)
    assert detect_inhibition(k, k * (1 - 1e-6) + rng.normal(0, 3e-6, 600), 1.0) is None


# -- stepping patterns ---------------------------------------------------------------------------
@pytest.mark.parametrize("n", [2, 4])
def test_end_of_life_bursts(n):
    # PCA16xx datasheet: in end-of-life mode "bursts of 4 pulses are produced every 4 s"
    sc = Scenario(duration_s=120, burst_steps=n, rate_s_per_day=3.0, snr_db=30, seed=56)
    s, *_ = analyze_scenario(sc)
    ex = _ex(s)
    assert ex["pattern"] == "burst" and ex["steps_per_burst"] == n and ex["burst_period_s"] == n
    assert ex["steps_in_bursts"] == 120
    assert abs(s.rate.rate_s_per_day - 3.0) <= s.rate.ci95_s_per_day
    assert any("end-of-life" in w for w in s.warnings)


@pytest.mark.parametrize("n", [2, 4])
def test_steps_in_a_burst_are_steps(n):
    # Every step of an end-of-life burst is a motor step: counted, timed, with the polarity that
    # alternates step by step (they were once filed as later impacts of the burst's first step,
    # halving the count, and polarities were given per burst).
    sc = Scenario(duration_s=80.2, burst_steps=n, burst_spacing_ms=50, snr_db=30, seed=61)  # 80 steps: whole bursts
    s, an, truth, events = analyze_scenario(sc)
    true_t = true_step_times(truth)
    steps = [e for e in events if e.kind == "step"]
    assert s.steps_detected == len(true_t) and s.secondary_impacts == 0 and s.missed_steps == 0
    got = match_times([e.time_s for e in steps], true_t, tol_s=0.0005)
    assert np.all(np.isfinite(got))
    # the simulator numbers every step and gives step m the polarity of m's parity
    by_time = {round(e.time_s, 4): e.polarity for e in steps}
    pol = [by_time[round(v, 4)] for v in got]
    first_pol = pol[0]
    assert pol == [first_pol if m % 2 == 0 else ("B" if first_pol == "A" else "A") for m in range(len(pol))]
    assert sum("in-burst" in e.flags for e in steps) == len(true_t) * (n - 1) // n


def test_a_step_missing_from_a_burst_is_a_missed_step():
    sc = Scenario(duration_s=90, burst_steps=2, snr_db=30, missed_steps=(31,), seed=62)
    s, *_ = analyze_scenario(sc)
    assert _ex(s)["pattern"] == "burst"
    assert s.missed_steps == 1 and s.steps_detected == 89


@pytest.mark.parametrize("voice", [{}, {"polarity_b_freq_shift": 0.10}, {"polarity_b_freq_shift": -0.08, "polarity_b_level_db": -6},
                                   {"movement": "wristwatch", "polarity_b_freq_shift": 0.06},
                                   {"second_impact_ms": 40, "polarity_b_freq_shift": 0.05}])
@pytest.mark.parametrize("asym_us", [0.0, 300.0])
def test_polarity_asymmetry_times_the_steps_not_their_sounds(voice, asym_us):
    # B steps sound asym_us late, so A->B minus B->A is 2 * asym_us (the simulator's definition).
    # Each polarity is timed from the arrival of its impulse: polarities that ring differently must
    # not read as uneven stepping (a default simulation without any asymmetry once read -106 us,
    # and 400 us read 293.5), and a true asymmetry must be read within its interval.
    s, *_ = analyze_scenario(Scenario(duration_s=60, polarity_asymmetry_us=asym_us, seed=5, **voice))
    pa = s.diagnosis.asymmetry
    assert abs(pa.value_us - 2 * asym_us) <= pa.ci95_us and pa.ci95_us < 60.0
    assert pa.uneven == (asym_us > 0)
    assert any("step unevenly" in line for line in s.reading) == (asym_us > 0)


def test_polarities_too_different_for_one_reference_claim_nothing():
    # at 8 kHz the arrivals of two differently ringing polarities are known only to ~150 us: the
    # difference is reported with that interval, and no uneven stepping is claimed
    s, *_ = analyze_scenario(Scenario(duration_s=60, samplerate_hz=8000, polarity_b_freq_shift=0.05, snr_db=25,
                                      polarity_asymmetry_us=300.0, seed=5))
    pa = s.diagnosis.asymmetry
    assert pa.reference_u95_us > 150 and not pa.uneven and abs(pa.value_us - 600) <= pa.ci95_us
    assert any("too different to time both from one reference" in w for w in s.warnings)


def test_regular_is_not_burst_even_with_a_bounce():
    s, *_ = analyze_scenario(Scenario(duration_s=60, second_impact_ms=45, snr_db=30, seed=57))
    assert _ex(s)["pattern"] == "regular"
    assert _ex(s)["failed_steps"] == 0 and _ex(s)["correction_pulses"] == 0


def test_failed_steps_and_their_silent_followers():
    sc = Scenario(duration_s=120, failed_steps=(20, 61, 90), snr_db=30, noise="pink", hum_hz=50, seed=58)
    s, an, truth, _ = analyze_scenario(sc)
    ex = _ex(s)
    assert ex["failed_steps"] == 3
    true_t = [st["time_s"] for st in truth["steps"] if st["kind"] == "failed"]
    assert np.allclose(ex["failed_step_times_s"], true_t, atol=0.002)
    assert s.missed_steps == 3  # the silent followers
    assert ex["seconds_lost"] == 6.0
    assert ex["seconds_lost_per_day"] == pytest.approx(6 / 119 * 86400, rel=0.02)


@pytest.mark.parametrize("over_floor_db,twitch", [(7.3, False), (9.5, False), (16.4, True)])
def test_a_twitch_stands_over_the_noise_floor_even_in_a_quiet_room(over_floor_db, twitch):
    # A slot of a missed step in a quiet recording (no blips of the noise in the seconds before):
    # white noise that happens to start an impact on the slot, 7.3 dB over the floor (a clean click
    # train, independent SoX corpus), is no twitch; our own simulator's twitches stand 16-37 dB over
    # it (core/slotsounds.TWITCH_OVER_FLOOR_DB)
    from tickscope.core.acquire import OpenImpact
    from tickscope.core.slotsounds import stands_out
    from tickscope.core.snippets import Impact

    imp = Impact(onset_sample=49 * 8000, peak_dbfs=-60.7, frame_snr_db=over_floor_db, snippet_start=0,
                 snippet=np.zeros(8), wsnippet=np.zeros(8))
    o = OpenImpact(imp, t_s=49.34, slot=49, match=0.23)
    assert stands_out(o, 49.34, offgrid=[], open_impacts=[o], slot_tolerance_s=0.03) is twitch


def test_correction_pulses_are_counted_and_not_confused_with_bounces():
    sc = Scenario(duration_s=120, failed_steps=(20, 61, 90), correction_delay_ms=35, second_impact_ms=60,
                  snr_db=30, seed=59)
    s, *_ = analyze_scenario(sc)
    ex = _ex(s)
    assert ex["failed_steps"] == 3 and ex["correction_pulses"] == 3
    assert ex["seconds_lost"] == 0.0 and s.missed_steps == 0
    assert any("margin" in w for w in s.warnings)


def test_position_locked_weak_steps():
    fails = tuple(37 + 60 * i for i in range(5))
    sc = Scenario(duration_s=330, failed_steps=fails, correction_delay_ms=30, snr_db=30, seed=60)
    s, *_ = analyze_scenario(sc)
    pl = _ex(s)["position_locked"]
    assert pl is not None and pl["period_steps"] == 60 and pl["positions"] == [37 - 0]


def test_drive_levels_are_not_faults():
    sc = Scenario(duration_s=240, drive_levels_db=(0.0, -6.0), drive_level_period_s=60, snr_db=30, seed=61)
    s, *_ = analyze_scenario(sc)
    dl = _ex(s)["drive_levels"]
    assert dl is not None and len(dl["levels_dbfs"]) == 2 and dl["changes"] == 3
    assert _ex(s)["failed_steps"] == 0


def test_polarity_asymmetry():
    sc = Scenario(duration_s=120, polarity_asymmetry_us=300, snr_db=30, seed=62)
    s, *_ = analyze_scenario(sc)
    ex = _ex(s)
    # A->B intervals are 300 us longer, B->A 300 us shorter: difference 600 us
    assert ex["polarity_asymmetry_us"] == pytest.approx(600, abs=150)
    assert any("unevenly" in line for line in ex["diagnosis"])
    s, *_ = analyze_scenario(Scenario(duration_s=120, snr_db=30, seed=63))
    assert not any("unevenly" in line for line in _ex(s)["diagnosis"])


def test_small_functions(rng):
    levels, changes = drive_levels(np.r_[np.full(50, -12.0), np.full(50, -18.0)] + rng.normal(0, 0.3, 100))
    assert len(levels) == 2 and changes == 1
    assert position_locked(np.array([5, 65, 125, 185]), 300).positions == [5]
    assert position_locked(np.array([5, 66, 127, 188]), 300) is None
    k = np.arange(40)
    t = k + np.where(k % 2 == 1, 100e-6, 0.0)
    d, ci = polarity_asymmetry(k, t)
    assert d == pytest.approx(200, abs=1e-6)


def test_other_clock_found_among_bounces_and_noise():
    # event lists as the tracker leaves them: steps at 1 s, a bounce 50 ms after each, a phone's
    # lifted noise (9 blips a second in the second half of each interval) and a second clock
    # gaining 150 s/day, 300 ms out of phase at the start
    from tickscope.core.otherclock import other_clock

    rng = np.random.default_rng(21)
    k = np.arange(300)
    step_t = 0.5 + k * (1 - 5 / 86400) + rng.normal(0, 20e-6, len(k))
    bounce = step_t + 0.050 + rng.normal(0, 0.3e-3, len(k))
    noise = np.sort(np.concatenate([s + rng.uniform(0.5, 1.0, 9) for s in step_t]))
    iv2 = 1 / (1 + 150 / 86400)
    clock2 = 0.8 + np.arange(299) * iv2 + rng.normal(0, 1e-3, 299)
    others = np.concatenate([bounce, noise, clock2])
    order = np.argsort(others)
    peaks = np.concatenate([np.full(300, -15.0), np.full(len(noise), -25.0), np.full(299, -18.0)])[order]
    oc = other_clock(others[order], peaks, k, step_t, np.full(300, -8.0))
    assert oc is not None
    assert oc.interval_s == pytest.approx(iv2, abs=2e-6)  # 150 s/day is 1736 ppm: known to a couple of ppm
    assert oc.level_db == pytest.approx(-10.0, abs=0.5)
    assert oc.ticks >= 250  # a few are lost where it passes the bounce or a noise blip comes first
    # without the second clock: the bounce (fixed delay) and the noise are not another clock
    keep = np.concatenate([bounce, noise])
    order = np.argsort(keep)
    assert other_clock(keep[order], np.full(len(keep), -20.0), k, step_t, np.full(300, -8.0)) is None
