"""Checks of the independent corpora (tests/independent/) against outside truth, and a few analysis
checks of tickscope on cases of the 'test' split (seeds 50000-59999: neither the engineers' dev set
nor the benchmark's score set).

Tests that need sox or ffmpeg skip when the binary is missing, unless INDEPENDENT_REQUIRED=1.
Analysis checks that tickscope currently fails are xfail(strict=True): they are bugs to fix, not
weakened expectations.
"""
from __future__ import annotations

import json
import math
import os
import shutil

import numpy as np
import pytest
from scipy import signal

from tests.independent import corpus, effects as fx, motor_model as mm, sox_corpus

REQUIRED = os.environ.get("INDEPENDENT_REQUIRED") == "1"


def _need(tool):
    if shutil.which(tool) is None:
        if REQUIRED:
            pytest.fail(f"{tool} is not installed and INDEPENDENT_REQUIRED=1")
        pytest.skip(f"{tool} is not installed")


@pytest.fixture
def sox():
    _need("sox")


@pytest.fixture
def ffmpeg():
    _need("ffmpeg")


def pick_onsets(x: np.ndarray, fs: int, *, frac: float = 0.1, refractory_s: float = 0.3) -> np.ndarray:
    """An independent onset picker: the first sample whose |x| exceeds frac * max|x|, then dead for
    refractory_s.  Plain numpy, nothing shared with tickscope or the generators."""
    thr = frac * np.max(np.abs(x))
    idx = np.flatnonzero(np.abs(x) > thr)
    out = []
    last = -10 ** 12
    for i in idx:
        if i - last > refractory_s * fs:
            out.append(i)
            last = i
    return np.array(out)


# --------------------------------------------------------------------------------- sox corpus


@pytest.mark.parametrize("seed", [1, 2, 5])
def test_sox_train_onsets_match_truth_to_the_sample(sox, seed):
    rng = np.random.default_rng([seed, 11])
    x, fs, truth = sox_corpus.build("clean", rng, duration_s=12.0, n_ticks=10, snr_db=50.0, noise="whitenoise")
    found = pick_onsets(x.astype(np.float64), fs)
    expect = np.round(np.array(truth["step_times_s"]) * fs).astype(int)
    assert len(found) == len(expect)
    # a pluck resampled from 48 kHz rings a little before its first sample: one sample allowed then
    tol = 0 if truth["construction"]["samplerate_written"] in (44100, 48000) or truth["construction"]["style"] == "sine-pair" else 1
    assert np.max(np.abs(found - expect)) <= tol


def test_sox_relabelled_header_gives_the_rate_of_the_construction(sox):
    # the rate is 86400*(FS'/P - 1) for period P samples read at header rate FS' (computed)
    rng = np.random.default_rng(3)
    for _ in range(20):
        x, fs, truth = sox_corpus.build("clean", rng, duration_s=20.0, snr_db=50.0, noise="whitenoise", allow_missed=False)
        c = truth["construction"]
        if c["header_rate"] != c["samplerate_written"]:
            break
    else:
        pytest.fail("no relabelled case drawn")
    on = pick_onsets(x.astype(np.float64), fs) / fs
    slope = np.polyfit(np.arange(len(on)), on, 1)[0]
    assert truth["rate_s_per_day"] == pytest.approx(86400 * (c["header_rate"] / c["period_samples"] - 1), abs=1e-9)
    assert 86400 * (1 / slope - 1) == pytest.approx(truth["rate_s_per_day"], abs=1e-6)


def test_sox_speed_moves_every_sound_to_t_over_f(sox):
    # sox `speed F rate -v FS`: a sound at t goes to t/F; measured here by cross-correlation with the
    # first tick and a parabolic peak, fitted with a line
    rng = np.random.default_rng(8)
    x, fs, truth = sox_corpus.build("resampled", rng, duration_s=30.0, snr_db=50.0, noise="whitenoise")
    x = x.astype(np.float64)
    t = np.array(truth["step_times_s"])
    i0 = int(round(t[0] * fs))
    tmpl = x[i0 - 20:i0 + int(0.02 * fs)]
    pos = []
    for tk in t[::2]:  # one polarity
        c = int(round(tk * fs))
        # lags within +-4 samples of the truth: a ringing tick's neighbouring cycles correlate
        # nearly as well, and what is checked is the position to a fraction of a sample
        seg = x[c - 24:c + int(0.02 * fs) + 4]
        cc = signal.correlate(seg, tmpl, "valid")
        k = int(np.argmax(cc))
        a, b, d = cc[k - 1], cc[k], cc[k + 1]
        pos.append(c - 24 + k + 0.5 * (a - d) / (a - 2 * b + d) + 20)
    pos = np.array(pos) / fs
    err = pos - t[::2]
    assert np.max(np.abs(err - err.mean())) * fs < 0.2  # within a fifth of a sample of t/F
    slope = np.polyfit(np.arange(len(pos)), pos, 1)[0] / 2
    assert 86400 * (1 / slope - 1) == pytest.approx(truth["rate_s_per_day"], abs=0.01)


def test_sox_log_fade_gives_the_stated_decay(sox):
    # amplitude e-folding time from a Hilbert-envelope log-linear fit (domain.md table row 16 method)
    x, tau = sox_corpus.tick("sine", 2000.0, 48000, length_s=0.06)
    x = x[int(sox_corpus.TICK_LEAD_S * 48000):]
    env = np.abs(signal.hilbert(x))
    t = np.arange(len(x)) / 48000
    sel = (t > 0.004) & (t < 0.045)
    slope = np.polyfit(t[sel], np.log(env[sel]), 1)[0]
    assert tau == pytest.approx(60 / (5 * math.log(10)), rel=1e-12)
    assert -1e3 / slope == pytest.approx(tau, rel=0.01)


def test_sox_mix_adds_with_the_gains(sox):
    a = np.zeros(4800)
    a[100] = 0.5
    b = np.random.default_rng(0).normal(size=4800) * 0.1
    m = fx.sox_mix([(a, 0.5), (b, 0.2)], 48000)
    assert np.max(np.abs(m - (0.5 * a + 0.2 * b))) < 1e-6


# --------------------------------------------------------------------------------- motor model


def test_motor_steps_with_drive_and_fails_below_the_detent():
    p = mm.MotorParams()
    ok = mm.integrate(p, (mm.Pulse(0.0, 5.9e-3, 1.55),))
    assert ok.final_half_turns == 1
    # static coil torque K_t*V/R below the detent torque K_d: the rotor cannot cross (twitch)
    v_weak = 0.5 * p.detent_torque * p.coil_ohm / p.torque_const
    weak = mm.integrate(p, (mm.Pulse(0.0, 7.8e-3, v_weak),))
    assert weak.final_half_turns == 0
    th = weak.states(np.linspace(0, 0.09, 2000))[0]
    assert 0.05 < th.max() < math.pi / 2  # it moved, and fell back
    # the wrong polarity (rotor aligned with the coil's field) only tugs it back
    al = mm.integrate(p, (mm.Pulse(0.0, 5.9e-3, -1.55),))
    tha = al.states(np.linspace(0, 0.09, 2000))[0]
    assert al.final_half_turns == 0 and -math.pi / 2 < tha.min() < 0


def test_failed_step_leaves_the_rotor_aligned_with_the_next_pulse():
    p = mm.MotorParams()
    rng = np.random.default_rng(0)
    mv = mm.Movement(p, mm.case_modes(rng), 16000)
    assert corpus.min_level(mv, 1.55) == 3  # 2.9 ms steps this motor unloaded, 1.95 ms does not
    mv.hand_imbalance = 0.6  # a heavy hand: the drive fails on the climb (and the movement stalls)
    ev = mv.run(mm.Divider(0.0), mm.DriveProgram(level=3), 70.0)
    kinds = [e.kind for e in ev]
    assert "failed" in kinds
    for i, k in enumerate(kinds[:-1]):
        if k == "failed":
            assert kinds[i + 1] == "aligned"  # the next pulse finds the rotor aligned: 2 s lost


def test_divider_swallows_exactly_n_pulses():
    # one inhibition per period: that second is N*32768/pulse_hz cycles long, every other 32768
    for period, n, hz in ((10, 3, 32768), (60, 39, 32768), (120, 7, 8192)):
        d = mm.Divider(20.0, mm.Inhibition(period, n, hz))
        k = np.arange(0, 3 * period + 2)
        gaps = np.diff(d.edge_cycles(k))
        extra = gaps - 32768
        assert set(extra.tolist()) == {0, n * 32768 // hz}
        assert np.count_nonzero(extra) == len(np.flatnonzero(k[:-1] % period == 0))
    # domain.md row 5 (computed): +20 ppm crystal, 39 pulses of 1/32768 s per 60 s -> +0.16 ppm residual
    d = mm.Divider(20.0, mm.Inhibition(60, 39))
    assert d.regulated_rate_s_per_day() / 0.0864 == pytest.approx(0.1628, abs=0.001)
    assert d.swallowed_cycles / d.crystal_hz * 1e3 == pytest.approx(1.190, abs=0.001)
    # domain.md rows 3-4 (computed): one pulse per 10 s at 32768 Hz = 0.26367 s/day; per 60 s at 8192 Hz = 0.17578
    assert mm.Divider(0.0).regulated_rate_s_per_day() - mm.Divider(0.0, mm.Inhibition(10, 1)).regulated_rate_s_per_day() == pytest.approx(0.26367, abs=1e-4)
    assert mm.Divider(0.0).regulated_rate_s_per_day() - mm.Divider(0.0, mm.Inhibition(60, 1, 8192)).regulated_rate_s_per_day() == pytest.approx(0.17578, abs=1e-4)


def test_burst_mode_gives_bursts_at_the_programmed_spacing():
    # Philips PCA16xx: bursts of 4 pulses every 4 s (domain.md s.3); spacing a whole number of cycles
    mv = mm.Movement(mm.MotorParams(), mm.case_modes(np.random.default_rng(1)), 16000)
    ev = mv.run(mm.Divider(0.0), mm.DriveProgram(mode="burst", level=6, steps_per_burst=4, burst_spacing_cycles=1311), 20.0)
    t = np.array([e.time_s for e in ev])
    assert len(ev) % 4 == 0 and len(ev) >= 16
    d = np.diff(t.reshape(-1, 4), axis=1)
    assert np.allclose(d, 1311 / 32768, atol=1e-12)
    assert np.allclose(np.diff(t[::4]), 4.0, atol=1e-9)


def test_decay_truth_agrees_with_a_hilbert_envelope_fit():
    p = mm.MotorParams(hand_ratio=0.0)
    modes = mm.case_modes(np.random.default_rng(4), f2_hz=2000.0, tau2_ms=8.0)
    snd = mm.radiate(mm.integrate(p, (mm.Pulse(0.0, 5.9e-3, 1.55),)), modes, "A", 48000)
    tau = mm.decay_truth_ms(snd)
    x = snd.wave[snd.lead:]
    env = np.abs(signal.hilbert(x))
    pk = int(np.argmax(env))
    e_db = 20 * np.log10(env / env[pk] + 1e-12)
    sel = np.arange(len(x)) > pk
    sel &= (e_db < -5) & (e_db > -25)
    slope = np.polyfit(np.flatnonzero(sel) / 48000, np.log(env[sel]), 1)[0]
    assert tau == pytest.approx(-1e3 / slope, rel=0.15)
    assert tau == pytest.approx(8.0, rel=0.3)  # the dominant mode's tau, from the modal parameters


def test_fractional_placement_is_exact():
    # a band-limited pulse placed at a fractional time equals the pulse evaluated there analytically
    fs = 16000

    def pulse(t):
        return np.exp(-0.5 * (t / 4.0) ** 2) * np.cos(2 * np.pi * 0.2 * t)

    w = pulse(np.arange(64) - 32.0)
    out = np.zeros(2000)
    mm.place(out, w, 32, 0.05 + 0.37 / fs, fs)
    n = np.arange(2000)
    want = pulse(n - (0.05 * fs + 0.37))
    assert np.max(np.abs(out - want)) < 1e-3


# ------------------------------------------------------------------------------------ effects


def test_room_direct_path_arrives_at_distance_over_c():
    rooms = fx.shoebox_room(48000, np.random.default_rng(2), rt60_s=0.2, distance_m=0.5)
    r = rooms[0]
    i = r.direct_delay_s * 48000
    h = r.rir[:int(i) + 6]
    k = int(np.argmax(np.abs(h)))
    assert abs(k - i) <= 1.0
    assert r.direct_delay_s == pytest.approx(0.5 / 343.0, rel=0.01)


def test_dropped_buffers_shift_later_times(sox):
    fs = 8000
    x = np.zeros(fs * 10)
    times = np.arange(0.5, 9.6, 1.0)
    x[(times * fs).astype(int)] = 1.0
    y, drops = fx.drop_buffers(x, fs, np.random.default_rng(0), times, count=2, block=512)
    assert len(drops) == 2 and len(y) == len(x) - 1024
    new = fx.shift_for_drops(times, drops, fs)
    assert np.array_equal(np.flatnonzero(y > 0.5), np.round(new * fs).astype(int))


@pytest.mark.parametrize("codec", ["mp3", "opus"])
def test_codec_round_trip_keeps_the_time_base(ffmpeg, codec):
    fs = 48000
    x = np.zeros(fs * 2)
    x[fs // 2:fs // 2 + 48] = np.hanning(48) * 0.5
    y, data, suffix = fx.codec_roundtrip(x, fs, codec, "96k")
    c = np.correlate(y[fs // 2 - 2000:fs // 2 + 2000], x[fs // 2 - 2000:fs // 2 + 2000], "full")
    assert abs(int(np.argmax(c)) - 3999) <= 1 and len(data) > 1000 and suffix in (".mp3", ".opus")


def test_generation_is_deterministic(sox):
    a = corpus.case("sox-noisy", 42)
    b = corpus.case("sox-noisy", 42)
    assert np.array_equal(a.audio, b.audio) and a.truth == b.truth
    json.dumps(a.truth)


# ------------------------------------------------------------------------- analysis, test split


def run_analyze(path, csv_path):
    """`tickscope analyze PATH --json --quiet --steps-csv CSV` in its own process."""
    import csv
    import subprocess
    import sys

    r = subprocess.run([sys.executable, "-m", "tickscope", "analyze", path, "--json", "--quiet", "--steps-csv", csv_path],
                       capture_output=True, text=True)
    assert r.stdout.strip(), r.stderr
    with open(csv_path) as f:
        rows = list(csv.DictReader(f))
    return json.loads(r.stdout), rows


def _analyze(c, tmp_path):
    import soundfile as sf

    path = tmp_path / f"case{c.suffix}"
    if c.encoded is not None:
        path.write_bytes(c.encoded)
    else:
        sf.write(str(path), np.clip(c.audio, -1, 1), c.samplerate, subtype="PCM_24")
    return run_analyze(str(path), str(tmp_path / "steps.csv"))


def _timing_rms_us(truth, rows):
    tt = np.array(truth["step_times_s"])
    ct = np.array([float(r["time_s"]) for r in rows if r["polarity"] in ("A", "B")])
    near = ct[np.argmin(np.abs(ct[None, :] - tt[:, None]), axis=1)]
    d = near - tt
    pols = np.array(truth["polarities"])
    res = np.concatenate([d[pols == p] - d[pols == p].mean() for p in ("A", "B") if np.any(pols == p)])
    return float(np.sqrt(np.mean(res ** 2)) * 1e6)


@pytest.mark.parametrize("kind", ["sox-clean", "sox-resampled", "sox-noisy"])
def test_analysis_sox_counts_rate_and_timing(sox, tmp_path, kind):
    # identical sox ticks, fractional-sample drift: the step times once jumped by whole cycles of the
    # tick's pitch (sox-clean 50000: A by 2 cycles of 1524 Hz, B by 1 of 3048 Hz; 253 us RMS)
    c = corpus.case(kind, 50000)
    js, rows = _analyze(c, tmp_path)
    t = c.truth
    assert js["sound"] == "stepping"
    assert js["steps_detected"] == len(t["step_times_s"])
    assert js["missed_steps"] == len(t["missed_steps"])
    assert abs(js["rate_s_per_day"] - t["rate_s_per_day"]) <= js["rate_ci95_statistical_s_per_day"]
    assert _timing_rms_us(t, rows) < 1.0


def test_analysis_motor_clean_near_the_crlb(sox, tmp_path):
    c = corpus.case("motor-clean", 50000)
    js, rows = _analyze(c, tmp_path)
    t = c.truth
    assert js["steps_detected"] == len(t["step_times_s"]) and js["missed_steps"] == 0
    assert abs(js["rate_s_per_day"] - t["rate_s_per_day"]) <= js["rate_ci95_statistical_s_per_day"]
    assert _timing_rms_us(t, rows) < 3 * t["crlb_us"]


def test_analysis_motor_clean_decay(sox, tmp_path):
    # the ring-down once read ~76 % off the truth (Schroeder EDC of the noiseless dry step over -5..-25 dB)
    c = corpus.case("motor-clean", 50000)
    js, _ = _analyze(c, tmp_path)
    for pol, tau in c.truth["decay_ms"].items():
        assert js["ringdown"][pol]["decay_ms_median"] == pytest.approx(tau, rel=0.15)


@pytest.mark.parametrize("seed", [50000, 50001])
def test_analysis_short_clip_every_tick(sox, tmp_path, seed):
    c = corpus.case("short-clips", seed)
    js, rows = _analyze(c, tmp_path)
    assert len(c.truth["step_times_s"]) == 5
    assert js["steps_detected"] == 5 and js["failed_steps"] == 0 and js["missed_steps"] == 0


def test_analysis_eol_burst(sox, tmp_path):
    c = corpus.case("motor-faults", 50003)
    js, _ = _analyze(c, tmp_path)
    assert js["pattern"] == "burst" and js["steps_per_burst"] == c.truth["burst"]["steps_per_burst"]
    assert js["steps_detected"] == len(c.truth["step_times_s"])


def test_analysis_inhibition(sox, tmp_path):
    c = corpus.case("motor-faults", 50006)
    js, _ = _analyze(c, tmp_path)
    inh = c.truth["inhibition"]
    assert js["inhibition"] is not None
    assert js["inhibition"]["period_s"] == pytest.approx(inh["period_s"], abs=0.5)
    assert js["inhibition"]["correction_us"] == pytest.approx(inh["correction_us"], rel=0.1)


@pytest.mark.xfail(strict=True, reason="failed steps from an unbalanced hand on a low cell (the integrated "
                   "twitch is about as loud as a step): the recording is called not-stepping and no failed "
                   "step is reported (motor-faults 50002)")
def test_analysis_failed_steps(sox, tmp_path):
    c = corpus.case("motor-faults", 50002)
    js, _ = _analyze(c, tmp_path)
    t = c.truth
    assert js["sound"] == "stepping"
    assert js["failed_steps"] > 0
    assert js["steps_detected"] == len(t["step_times_s"])
