"""The escapement simulator (tickscope.core.escapesim): its physics against values worked by hand and
against the rendered audio, measured by an envelope onset picker written here (scipy only)."""
import argparse
import dataclasses
import json
import math
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf
from scipy import signal

from tickscope.core import balance
from tickscope.core import escapesim as es
from tickscope.core.escapesim import EscapementRenderer, EscapementScenario, render_all
from tickscope.core.simulate import Scenario
from tickscope.errors import ParameterError


# ---------------------------------------------------------------------------------------------
# an independent measurement: onsets of the sounds of each beat from the audio's envelope


def _envelope(x, fs):
    sos = signal.butter(4, 1500, "highpass", fs=fs, output="sos")
    env = np.abs(signal.hilbert(signal.sosfiltfilt(sos, x)))
    k = max(1, int(0.0002 * fs))
    return env, np.convolve(env, np.ones(k) / k, mode="same")


def _beat_onsets(x, fs, *, gap_s=0.02, rel=0.12, frac=0.3):
    """Per beat (a cluster of envelope peaks with gaps under gap_s): the onset of its first sound and of
    its loudest sound, each where the envelope last rose through `frac` of that sound's peak (linear
    interpolation between samples)."""
    env, sm = _envelope(x, fs)
    pk, _ = signal.find_peaks(sm, height=20 * np.median(sm), distance=int(0.0008 * fs))
    groups, cur = [], [pk[0]]
    for p in pk[1:]:
        if p - cur[-1] > gap_s * fs:
            groups.append(cur)
            cur = []
        cur.append(p)
    groups.append(cur)

    def onset(p):
        lev = frac * env[p - 5: p + 5].max()
        i = p
        while env[i] > lev:
            i -= 1
        return (i + (lev - env[i]) / (env[i + 1] - env[i])) / fs

    out = []
    for g in groups:
        g = np.array(g)
        g = g[sm[g] >= rel * sm[g].max()]
        out.append((onset(g[0]), onset(g[np.argmax(sm[g])])))
    return np.array(out)


# ---------------------------------------------------------------------------------------------
# the published relation


def test_amplitude_relation_against_values_worked_by_hand():
    # The lift-time relation of a balance in simple harmonic motion, A = LA / (2 sin(pi t_lift / T))
    # (shared/domain.md section 10.3, check value computed there):
    #   LA 52 deg, A 280 deg, 28800/h -> T = 0.25 s; LA/(2A) = 52/560 = 0.0928571;
    #   arcsin(0.0928571) = 0.0928571 + 0.0928571^3/6 + 3*0.0928571^5/40 = 0.0929911 rad;
    #   T/pi = 0.0795775 s -> t_lift = 0.0795775 * 0.0929911 = 7.400 ms; back: 52 / (2 sin(0.0929911)) = 280.
    assert balance.lift_time_s(lift_angle_deg=52, amplitude_deg=280, period_s=0.25) * 1e3 == pytest.approx(7.400, abs=0.0005)
    assert balance.amplitude_from_lift_time(lift_angle_deg=52, lift_time_s=7.400e-3, period_s=0.25) == pytest.approx(280.0, abs=0.01)
    # by hand too: LA 50, A 250, 21600/h -> T = 1/3 s; LA/(2A) = 0.1; arcsin(0.1) = 0.1 + 0.001/6 + 3e-5/40
    #   = 0.1001674 rad; T/pi = 0.1061033 s -> t_lift = 10.6281 ms
    assert balance.lift_time_s(lift_angle_deg=50, amplitude_deg=250, period_s=1 / 3) * 1e3 == pytest.approx(10.6281, abs=0.0005)
    # circular error T = T0 (1 + theta0^2 / 16) (domain.md 10.5): 3 deg = 0.0523599 rad, squared 0.00274156,
    # /16 = 1.71347e-4 -> a pendulum at 3 deg loses 86400 * (1 - 1/1.000171347) = 14.80 s/day
    assert balance.circular_error_factor(3.0) == pytest.approx(1.000171347, abs=1e-9)


def test_the_set_amplitude_comes_out_of_every_beat_through_the_relation():
    # a run-down: 300 deg falling 3600 deg/h (1 deg/s) over 20 s, at 21600/h with a rate and an asymmetry
    sc = EscapementScenario(duration_s=20, beats_per_hour=21600, rate_s_per_day=-30, beat_asymmetry_ms=0.7,
                            amplitude_deg=300, amplitude_fall_deg_per_h=3600, lift_angle_deg=48, clock_ppm=0)
    _, truth = es.build_events(sc)
    T = 2 * (3600 / 21600) / (1 - 30 / 86400)  # the balance period with the rate applied
    for b in truth["beats"]:
        s = b["sounds"]
        t_lift = s["drop"] - s["unlock"]
        amp = 48 / (2 * math.sin(math.pi * t_lift / T))  # the relation, written out here
        centre = (s["unlock"] + s["drop"]) / 2  # unlocking and drop are symmetric about the centre crossing
        assert amp == pytest.approx(300 - centre, abs=1e-6)  # the set amplitude at that moment
        assert b["amplitude_deg"] == pytest.approx(amp, abs=1e-6)
        assert s["unlock"] < s["impulse"] < s["drop"]
    assert truth["lift_time_ms"] == pytest.approx((T / math.pi) * math.asin(48 / (2 * 300)) * 1e3, rel=1e-12)


# ---------------------------------------------------------------------------------------------
# beat times


def test_beat_times_follow_the_set_rate_and_asymmetry_exactly():
    bph, rate, asym_ms, ppm, la, amp, first = 21600, 12.5, 0.6, 25.0, 48.0, 260.0, 0.41
    sc = EscapementScenario(duration_s=30, beats_per_hour=bph, rate_s_per_day=rate, beat_asymmetry_ms=asym_ms,
                            clock_ppm=ppm, lift_angle_deg=la, amplitude_deg=amp, first_beat_s=first)
    _, truth = es.build_events(sc)
    iv = 3600 / bph / (1 + rate / 86400)
    k = np.array([b["beat"] for b in truth["beats"]])
    t = np.array([b["time_s"] for b in truth["beats"]])
    assert np.array_equal(k, np.arange(len(k))) and len(k) == int((30 - first) / iv) + 1
    expected = (first + k * iv + np.where(k % 2 == 1, asym_ms * 1e-3 / 2, 0.0)) * (1 + ppm * 1e-6)
    assert np.max(np.abs(t - expected)) < 1e-12
    assert all(b["side"] == ("tock" if b["beat"] % 2 else "tick") for b in truth["beats"])
    d = np.diff(t) / (1 + ppm * 1e-6)
    assert np.mean(d[0::2]) - np.mean(d[1::2]) == pytest.approx(asym_ms * 1e-3, abs=1e-12)  # tick->tock longer
    assert truth["beat_asymmetry_percent"] == pytest.approx(100 * asym_ms * 1e-3 / iv, rel=1e-12)
    # the rate a line through the beats gives, on the device's time base
    slope = np.polyfit(k[::2], t[::2], 1)[0]
    assert 86400 * (3600 / bph / slope - 1) == pytest.approx(truth["expected"]["rate_device_time_s_per_day"], abs=1e-5)
    assert truth["expected"]["rate_device_time_s_per_day"] == pytest.approx(rate - ppm * 0.0864, abs=0.002)


def test_a_drifting_rate_and_a_pendulums_circular_error():
    sc = EscapementScenario(movement="pendulum", duration_s=60, beats_per_hour=8100, rate_s_per_day=5.0,
                            rate_drift_s_per_day_per_h=600.0, pendulum_semi_arc_deg=3.0, first_beat_s=0.2)
    _, truth = es.build_events(sc)
    b0 = 3600 / 8100
    t = np.array([b["time_s"] for b in truth["beats"]])
    cf = 1 + math.radians(3.0) ** 2 / 16
    # each interval keeps the rate of its start: r_k = 5 + 600 * (k b0) / 3600
    ivs = [b0 / (1 + (5 + 600 * kk * b0 / 3600) / 86400) * cf for kk in range(len(t) - 1)]
    assert np.max(np.abs(t - (0.2 + np.concatenate([[0], np.cumsum(ivs)])))) < 1e-11
    assert truth["rate_s_per_day"] == pytest.approx(86400 * ((1 + 5 / 86400) / cf - 1), rel=1e-12)
    assert truth["circular_error_s_per_day"] == pytest.approx(-14.80, abs=0.01)  # worked by hand above
    assert all(set(b["sounds"]) == {"drop", "recoil"} for b in truth["beats"])
    assert all(b["sounds"]["recoil"] - b["sounds"]["drop"] == pytest.approx(9e-3, abs=1e-12) for b in truth["beats"])
    _, dead = es.build_events(sc.replace(pendulum_escapement="deadbeat"))
    assert all(set(b["sounds"]) == {"drop"} for b in dead["beats"])


def test_beat_jitter_scatters_whole_beats_by_the_set_amount():
    sc = EscapementScenario(duration_s=60, beat_jitter_us=40.0)
    _, jit = es.build_events(sc)
    _, clean = es.build_events(sc.replace(beat_jitter_us=0.0))
    d = np.array([a["time_s"] - b["time_s"] for a, b in zip(jit["beats"], clean["beats"])])
    assert np.std(d) * 1e6 == pytest.approx(40.0, rel=0.1)
    # the whole beat moves: its lift time does not
    assert max(abs(a["lift_time_ms"] - b["lift_time_ms"]) for a, b in zip(jit["beats"], clean["beats"])) < 1e-9


# ---------------------------------------------------------------------------------------------
# the audio


@pytest.mark.parametrize("amp", [230.0, 300.0])
def test_lift_time_measured_from_the_audio_agrees_with_the_truth(amp):
    sc = EscapementScenario(duration_s=8, amplitude_deg=amp, snr_db=35, rate_s_per_day=8, beat_asymmetry_ms=0.5)
    x, truth = render_all(sc)
    o = _beat_onsets(x[:, 0], sc.samplerate_hz)
    assert len(o) == len(truth["beats"])
    first_err = o[:, 0] - np.array([b["time_s"] for b in truth["beats"]])
    assert np.max(np.abs(first_err)) < 50e-6  # each beat found where the truth puts its first sound
    lift = np.median(o[:, 1] - o[:, 0])
    assert lift * 1e3 == pytest.approx(truth["lift_time_ms"], abs=0.05)
    T = 2 * 0.125 / (1 + 8 / 86400)
    assert 52 / (2 * math.sin(math.pi * lift / T)) == pytest.approx(amp, abs=2.0)
    # and the asymmetry, from the first onsets
    d = np.diff(o[:, 0])
    assert (np.median(d[0::2]) - np.median(d[1::2])) * 1e3 == pytest.approx(0.5, abs=0.03)


def _late_swing_level_db(x, fs, truth):
    """Per beat: the envelope's peak between 15 ms after the drop and 15 ms before the next beat, over the
    median envelope (dB), and where that peak lies."""
    _, sm = _envelope(x, fs)
    floor = np.median(sm)
    beats = truth["beats"]
    out = []
    for b, nxt in zip(beats[:-1], beats[1:]):
        a, e = int((b["sounds"]["drop"] + 0.015) * fs), int((nxt["time_s"] - 0.015) * fs)
        i = a + int(np.argmax(sm[a:e]))
        out.append((20 * np.log10(sm[i] / floor), i / fs))
    return np.array(out)


def test_knocking_appears_only_above_the_threshold_amplitude():
    # 345 deg falling to 315 over 40 s: the impulse pin knocks on the horn while the amplitude is above 330
    fs = 48000
    sc = EscapementScenario(duration_s=40, amplitude_deg=345, amplitude_fall_deg_per_h=2700, snr_db=35)
    x, truth = render_all(sc)
    beats = truth["beats"]
    knocking = np.array(["knock" in b["flags"] for b in beats])
    above = np.array([b["amplitude_deg"] > 330 for b in beats])
    assert np.array_equal(knocking, above) and 0.3 < knocking.mean() < 0.7
    T = 0.25
    for b in beats:
        if "knock" in b["sounds"]:
            centre = (b["sounds"]["unlock"] + b["sounds"]["drop"]) / 2
            # the swing reaches 330 deg at (T / 2 pi) arcsin(330 / A) after the centre: late, before the extreme
            assert b["sounds"]["knock"] - centre == pytest.approx(T / (2 * math.pi) * math.asin(330 / b["amplitude_deg"]), abs=1e-9)
            assert T / 8 < b["sounds"]["knock"] - centre < T / 4
    late = _late_swing_level_db(x[:, 0], fs, truth)
    k = knocking[:-1]
    assert np.min(late[k, 0]) > 20 and np.max(late[~k, 0]) < 12, (np.min(late[k, 0]), np.max(late[~k, 0]))
    knock_t = np.array([b["sounds"]["knock"] for b in beats[:-1] if "knock" in b["sounds"]])
    assert np.max(np.abs(late[k, 1] - knock_t)) < 0.5e-3  # the loud late sound is the knock
    # below the threshold, and with knocking switched off, none
    for quiet in (sc.replace(amplitude_deg=325, amplitude_fall_deg_per_h=0, duration_s=10),
                  sc.replace(knock=False, amplitude_fall_deg_per_h=0, duration_s=10)):
        xq, tq = render_all(quiet)
        assert not any("knock" in b["flags"] or "knock" in b["sounds"] for b in tq["beats"])
        assert np.max(_late_swing_level_db(xq[:, 0], fs, tq)[:, 0]) < 12


def test_an_odd_escape_wheel_tooth_repeats_every_two_teeth_of_beats():
    sc = EscapementScenario(duration_s=20, wheel_teeth=15, wheel_pallet_span_teeth=3, wheel_anomaly_tooth=2,
                            wheel_anomaly_db=6.0, wheel_anomaly_ms=0.3, snr_db=40)
    x, truth = render_all(sc)
    beats = truth["beats"]
    odd = np.array(["wheel-anomaly" in b["flags"] for b in beats])
    k = np.array([b["beat"] for b in beats])
    # the tooth meets the entry pallet at beat 4 (mod 30) and the exit pallet 2*3 + 1 = 7 beats later
    assert np.array_equal(odd, (k % 30 == 4) | (k % 30 == 11))
    lift = np.array([b["lift_time_ms"] for b in beats])
    assert np.allclose(lift[odd] - np.median(lift[~odd]), 0.3, atol=1e-9)
    # the drop's peak in the audio, louder by 6 dB
    fs = sc.samplerate_hz
    pk = np.array([np.max(np.abs(x[int(b["sounds"]["drop"] * fs): int((b["sounds"]["drop"] + 0.003) * fs), 0]))
                   for b in beats])
    side = np.array([b["side"] == "tock" for b in beats])
    for s in (False, True):
        ratio_db = 20 * np.log10(np.median(pk[odd & (side == s)]) / np.median(pk[~odd & (side == s)]))
        assert ratio_db == pytest.approx(6.0, abs=0.5)


def test_a_clock_that_stops_and_restarts():
    sc = EscapementScenario(duration_s=12, stop_at_s=5.0, stop_for_s=2.5, amplitude_deg=280, snr_db=40)
    x, truth = render_all(sc)
    beats = truth["beats"]
    t = np.array([b["time_s"] for b in beats])
    assert not np.any((t >= 5.0) & (t < 7.5))
    assert [b["beat"] for b in beats] == list(range(len(beats)))  # the movement's own count goes on
    last = next(i for i, b in enumerate(beats) if "stopped" in b["flags"])
    assert "restarted" in beats[last + 1]["flags"] and beats[last + 1]["time_s"] == pytest.approx(7.5, abs=1e-12)
    assert truth["stops"] == [{"from_s": 5.0, "to_s": 7.5, "last_beat_before": last, "first_beat_after": last + 1}]
    # a balance set going again starts half way between half the lift angle and its amplitude, and builds up
    a = [b["amplitude_deg"] for b in beats[last + 1:]]
    assert a[0] == pytest.approx(26 + (280 - 26) * 0.5, abs=1.0) and a[-1] > 270 and np.all(np.diff(a) > 0)
    fs = sc.samplerate_hz
    quiet = x[int((beats[last]["time_s"] + 0.05) * fs): int(7.45 * fs), 0]
    assert np.sqrt(np.mean(quiet**2)) < 3 * np.median(np.abs(x[:, 0])) + 1e-12  # noise only while stopped


def test_a_pendulums_ring_decays_as_set():
    sc = EscapementScenario(movement="pendulum", beats_per_hour=7200, duration_s=6, ring_hz=400, ring_decay_ms=150,
                            pendulum_escapement="deadbeat", snr_db=50, samplerate_hz=32000)
    x, truth = render_all(sc)
    fs = sc.samplerate_hz
    sos = signal.butter(4, [300, 500], "bandpass", fs=fs, output="sos")
    env = np.abs(signal.hilbert(signal.sosfiltfilt(sos, x[:, 0])))
    taus = []
    for b in truth["beats"][1:-2]:
        t0 = b["time_s"]
        i = np.arange(int((t0 + 0.05) * fs), int((t0 + 0.35) * fs))
        slope = np.polyfit(i / fs, np.log(env[i]), 1)[0]
        taus.append(-1 / slope)
    # beats 0.5 s apart: the tails of earlier beats add a little, so within 15 %
    assert np.median(taus) * 1e3 == pytest.approx(150, rel=0.15)


# ---------------------------------------------------------------------------------------------
# rendering


def _busy(**kw):
    return EscapementScenario(duration_s=6, channels=2, beat_channel=1, noise="pink", snr_db=20, agc=True,
                              gate_dbfs=-50, reverb_rt60_ms=300, transients_per_min=20, hum_hz=50, clip_dbfs=-3,
                              dc_offset=0.002, second_clock_rate_s_per_day=40, beat_jitter_us=30, variation_db=1,
                              variation_freq_pct=1, samplerate_hz=22050, **kw)


def test_the_chunked_render_equals_the_whole_render():
    sc = _busy()
    r = EscapementRenderer(sc)
    whole = r.render(r.n_total)
    assert whole.shape == (r.n_total, 2) and not len(r.render(100))
    r = EscapementRenderer(sc)
    sizes, parts, i = [1, 2, 4099, 17, 30011, 1000], [], 0
    while True:
        x = r.render(sizes[i % len(sizes)])
        i += 1
        if not len(x):
            break
        parts.append(x)
    assert np.array_equal(np.concatenate(parts), whole)


def test_sounds_are_placed_the_same_whatever_the_internal_block():
    # no noise: the sounds evaluated at the sample instants must not depend on where the blocks fall
    sc = EscapementScenario(duration_s=4, snr_db=math.inf, reverb_rt60_ms=200, beat_jitter_us=20,
                            samplerate_hz=44100, transients_per_min=30)
    a = EscapementRenderer(sc).render(10**9)
    b = EscapementRenderer(sc, block_s=0.0371).render(10**9)
    assert np.max(np.abs(a)) > 0.1 and np.allclose(a, b, rtol=0, atol=1e-12)


def test_determinism_by_seed():
    sc = _busy()
    a, ta = render_all(sc)
    b, tb = render_all(sc)
    assert np.array_equal(a, b) and ta == tb
    c, tc = render_all(sc.replace(seed=2))
    assert not np.array_equal(a, c) and tc["beats"][3]["time_s"] != ta["beats"][3]["time_s"]


@pytest.mark.parametrize("kw, words", [
    (dict(lift_angle_deg=15), "lift_angle_deg=15"),
    (dict(lift_angle_deg=85), "lift_angle_deg=85"),
    (dict(beats_per_hour=0), "beats_per_hour=0"),
    (dict(beats_per_hour=-3600), "beats_per_hour=-3600"),
    (dict(amplitude_deg=25), "amplitude_deg=25"),
    (dict(amplitude_deg=400), "amplitude_deg=400"),
    (dict(amplitude_deg=100, amplitude_fall_deg_per_h=5000, duration_s=60), "amplitude_fall_deg_per_h=5000"),
    (dict(movement="cylinder"), "movement='cylinder'"),
    (dict(beat_asymmetry_ms=200), "beat_asymmetry_ms=200"),
    (dict(beat_jitter_us=-1), "beat_jitter_us=-1"),
    (dict(stop_at_s=5, stop_for_s=0), "stop_for_s=0"),
    (dict(stop_at_s=100), "stop_at_s=100"),
    (dict(wheel_anomaly_tooth=15), "wheel_anomaly_tooth=15"),
    (dict(movement="pendulum", pendulum_escapement="verge"), "pendulum_escapement='verge'"),
    (dict(movement="pendulum", pendulum_semi_arc_deg=45), "pendulum_semi_arc_deg=45"),
    (dict(noise="brown"), "noise='brown'"),
    (dict(samplerate_hz=1000), "samplerate_hz=1000"),
    (dict(duration_s=float("nan")), "duration_s=nan"),
])
def test_bad_parameters_raise_a_one_line_parameter_error(kw, words):
    with pytest.raises(ParameterError) as e:
        EscapementRenderer(EscapementScenario(**kw))
    assert words in str(e.value) and "\n" not in str(e.value)


def test_the_core_stays_pure():
    code = ("import sys, tickscope.core.escapesim; bad = [m for m in ('sounddevice','soundfile','rich','matplotlib',"
            "'sqlite3') if m in sys.modules]; print(bad); sys.exit(1 if bad else 0)")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert r.returncode == 0, r.stdout + r.stderr


# ---------------------------------------------------------------------------------------------
# the file writer and the command's options


def test_written_file_and_truth(tmp_path):
    from tickscope.simulation import write_escapement_simulation

    sc = EscapementScenario(movement="pendulum", duration_s=3, samplerate_hz=32000, beats_per_hour=8100,
                            beat_asymmetry_ms=26, agc=True, snr_db=30)
    path = str(tmp_path / "mantel.flac")
    truth = write_escapement_simulation(path, sc, subtype="PCM_16", description="a test clock")
    y, fs = sf.read(path)
    x, t2 = render_all(sc)
    assert fs == 32000 and len(y) == len(x) and np.max(np.abs(y - x[:, 0])) <= 1 / 32768 + 1e-12
    on_disk = json.load(open(tmp_path / "mantel.truth.json"))
    assert on_disk["kind"] == "escapement" and on_disk["movement"] == "pendulum"
    assert on_disk["description"] == "a test clock" and on_disk["audio_file"] == "mantel.flac" and not on_disk["lossy"]
    assert on_disk["beats"] == t2["beats"] == truth["beats"]
    assert on_disk["scenario"] == dataclasses.asdict(sc)
    assert on_disk["beat_asymmetry_percent"] == pytest.approx(100 * 0.026 / (3600 / 8100), rel=1e-9)


def _simulate_parser():
    # the simulate command's quartz options as the command builds them (one per quartz Scenario field,
    # dest = the field's name, default None), built here so that this test does not depend on the CLI module
    p = argparse.ArgumentParser(prog="tickscope simulate")
    p.add_argument("out")
    p.add_argument("--description")
    p.add_argument("--compression-level", type=float)
    for f in dataclasses.fields(Scenario):
        opt = "--" + f.name.replace("_", "-")
        if isinstance(f.default, bool):
            p.add_argument(opt, dest=f.name, action="store_true", default=None)
        elif isinstance(f.default, str):
            p.add_argument(opt, dest=f.name, type=str, default=None)
        elif isinstance(f.default, tuple):
            p.add_argument(opt, dest=f.name, type=lambda s: tuple(int(v) for v in s.split(",")), default=None)
        elif isinstance(f.default, int):
            p.add_argument(opt, dest=f.name, type=int, default=None)
        else:
            p.add_argument(opt, dest=f.name, type=float, default=None)
    from tickscope.commands.simulate_escapement import add_escapement_options

    add_escapement_options(p)  # must not clash with any quartz option
    return p


def test_escapement_options_build_the_scenario():
    from tickscope.commands import simulate_escapement as se

    p = _simulate_parser()
    a = p.parse_args(["o.flac", "--movement", "lever", "--beats-per-hour", "21600", "--beat-asymmetry-ms", "0.8",
                      "--lift-angle-deg", "50", "--amplitude-deg", "250", "--amplitude-fall-deg-per-h", "12",
                      "--beat-jitter-us", "20", "--no-knock", "--rate-s-per-day", "-4", "--agc", "--snr-db", "22"])
    assert se.is_escapement(a)
    sc = se.escapement_scenario_from_args(a)
    assert (sc.beats_per_hour, sc.beat_asymmetry_ms, sc.lift_angle_deg, sc.amplitude_deg, sc.amplitude_fall_deg_per_h,
            sc.beat_jitter_us, sc.knock, sc.rate_s_per_day, sc.agc, sc.snr_db) == (21600, 0.8, 50, 250, 12, 20, False,
                                                                                 -4, True, 22)
    assert sc.duration_s == EscapementScenario().duration_s  # unset options keep the defaults
    a = p.parse_args(["o.flac", "--movement", "pendulum", "--pendulum-escapement", "deadbeat",
                      "--pendulum-semi-arc-deg", "4", "--ring-decay-ms", "90"])
    sc = se.escapement_scenario_from_args(a)
    assert (sc.movement, sc.pendulum_escapement, sc.pendulum_semi_arc_deg, sc.ring_decay_ms) == ("pendulum", "deadbeat", 4, 90)
    # quartz-only options are refused for an escapement, naming the counterpart; bad values in one line
    with pytest.raises(ParameterError, match="--jitter-us is for quartz movements.*--beat-jitter-us"):
        se.escapement_scenario_from_args(p.parse_args(["o.flac", "--movement", "lever", "--jitter-us", "3"]))
    with pytest.raises(ParameterError, match="--missed-steps"):
        se.escapement_scenario_from_args(p.parse_args(["o.flac", "--movement", "pendulum", "--missed-steps", "3,4"]))
    with pytest.raises(ParameterError, match="lift_angle_deg=90"):
        se.escapement_scenario_from_args(p.parse_args(["o.flac", "--movement", "lever", "--lift-angle-deg", "90"]))
    # a quartz movement: not an escapement, and the escapement options given are listed for refusal
    q = p.parse_args(["o.flac", "--movement", "wallclock", "--lift-angle-deg", "50", "--knock"])
    assert not se.is_escapement(q) and se.escapement_options_given(q) == ["--lift-angle-deg", "--knock"]
    assert se.escapement_options_given(p.parse_args(["o.flac", "--movement", "wallclock"])) == []
