"""Calibration that says how sure it is: the device-clock fit on block readings built as a capture
makes them (delivery chunks, fixed or as-delivered blocks, bursts, host clock steps, delivery
shifts, lost audio, a wandering floor), the refusal of a profile too uncertain to help, the
profile's name, age and interval in the time base, `calibrate --list` at 80 columns, and real
captures through the PulseAudio null sink, whose pacing against the host clock follows from its
own arithmetic."""
import argparse
import json
import math
import os
import re
import subprocess
import sys
import threading
import time

import numpy as np
import pytest

from tickscope.cli import main
from tickscope.core.clockfit import fit_device_clock
from tickscope.core.clocksim import simulate_readings
from tickscope.io import profiles

FS = 48000


def _fit(d, **kw):
    return fit_device_clock(d["start"], d["host"], FS, frames=d["frames"], **kw)


@pytest.fixture
def confdir(tmp_path, monkeypatch):
    monkeypatch.setenv("TICKSCOPE_CONFIG_DIR", str(tmp_path / "conf"))
    return tmp_path


# -- the fit on readings of a known clock -----------------------------------------------------------
def test_fixed_blocks_beating_against_the_chunks_keep_the_truth_inside(rng):
    # listen and log read 2048 frames; the null sink delivers 2047 at a time: each block waits one
    # frame less than the one before for the rest of its chunk, which a line through the least
    # delays reads as 488 ppm (measured through the sink: +507 read, +19.5 true)
    for _ in range(4):
        d = simulate_readings(rng, ppm=19.5, seconds=30, chunk_frames=2047, block_frames=2048, delay_ms=0.5)
        fit = _fit(d)
        assert abs(fit.ppm - 19.5) > 300  # the readings alone cannot show the beat ...
        assert abs(fit.ppm - 19.5) <= fit.ci95_ppm  # ... so the interval carries the wait's worst case
        assert fit.blocks == "fixed" and fit.block_frames == 2048
        assert fit.wait_bound_ppm > 300
        # the driver's capture times are not used before they have settled (30 s, and as long again)
        assert math.isnan(_fit(d, adc_time_s=d["adc"]).adc_ppm)
    # they do not wait: over a longer run they narrow the bound to what the two lines disagree by
    d = simulate_readings(rng, ppm=19.5, seconds=90, chunk_frames=2047, block_frames=2048, delay_ms=0.5)
    worst, fa = _fit(d), _fit(d, adc_time_s=d["adc"])
    assert abs(fa.ppm - 19.5) <= fa.ci95_ppm < worst.ci95_ppm
    assert abs(fa.adc_ppm - 19.5) < 1.0


def test_fixed_blocks_of_small_chunks_are_narrowed_by_the_capture_times(rng):
    # a USB microphone: 1 ms packets, 2048-frame blocks.  The wait cycles within a millisecond;
    # with the driver's capture times agreeing, the bound of a whole block (42.7 ms) is not needed
    d = simulate_readings(rng, ppm=-37.0, seconds=120, chunk_frames=48, block_frames=2048, delay_ms=1.0)
    worst, seen = _fit(d), _fit(d, adc_time_s=d["adc"])
    assert abs(worst.ppm + 37) <= worst.ci95_ppm and abs(seen.ppm + 37) <= seen.ci95_ppm
    assert seen.ci95_ppm < 10 < 100 < worst.ci95_ppm


def test_bursts_are_not_host_clock_steps_and_the_delay_scatter_is_a_delay(rng):
    # blocks handed over two at a time, with stalls of 55-90 ms: the consecutive readings jump by
    # more than the 50 ms step threshold though the host clock never moved.  Before, each stall
    # made two "host clock steps", a stretch of one unpicked block got no offset at all, and its
    # delay read as the host's uptime: "delay scatter 2459861.80 ms rms"
    for _ in range(3):
        d = simulate_readings(rng, ppm=19.5, seconds=30, chunk_frames=4094, block_frames=2048, delay_ms=3.0,
                              stall_rate_hz=0.3, stall_ms=(55, 90), host0_s=8953.0)
        fit = _fit(d, adc_time_s=d["adc"])
        assert fit.steps == []
        true = d["host"] - (8953.0 + (d["start"] + d["frames"]) / (FS * (1 + 19.5e-6)))
        true_rms_ms = math.sqrt(np.mean((true - true.min()) ** 2)) * 1e3
        assert 0.5 * true_rms_ms < fit.delay_rms_ms < 1.5 * true_rms_ms
        assert abs(fit.ppm - 19.5) <= fit.ci95_ppm


def test_a_host_clock_step_among_stalls_is_found_where_it_is(rng):
    d = simulate_readings(rng, ppm=41.0, seconds=60, chunk_frames=480, delay_ms=2.0, stall_rate_hz=1.0,
                          stall_ms=(60, 120), host_steps=((130.0, 0.35),))
    fit = _fit(d, block_frames=0)
    assert len(fit.steps) == 1
    at, jump = fit.steps[0]
    assert jump == pytest.approx(0.35, abs=0.002) and at == pytest.approx(130.35, abs=0.05)
    assert abs(fit.ppm - 41.0) <= fit.ci95_ppm


def test_delivery_shift_and_lost_audio_get_their_own_offsets(rng):
    # another program joining the sound server moved the least delay by 9 ms (measured on the
    # loopback); an overflow's lost length is known only to a few ms.  Either bent the old line,
    # whose interval then widened to hundreds of ppm
    for _ in range(3):
        d = simulate_readings(rng, ppm=-63.0, seconds=40, chunk_frames=416, delay_ms=0.5,
                              shifts=((17.0, 0.009),), gaps=((28.0, 0.3, 0.004),))
        fit = _fit(d, block_frames=0)
        assert abs(fit.ppm + 63.0) <= fit.ci95_ppm < 10.0
        assert len(fit.shifts) == 1 and fit.shifts[0][1] == pytest.approx(0.009, abs=0.0005)
        assert fit.gaps == 1 and fit.steps == []


def test_interval_covers_a_wandering_floor(rng):
    # the least delay wanders over seconds (as measured through the loopback); 40 s runs.
    # About 95 % of 40 (binomial: 34 is nearly 3 sigma below 38)
    hits = 0
    for _ in range(40):
        ppm = rng.uniform(-100, 100)
        d = simulate_readings(rng, ppm=ppm, seconds=40, chunk_frames=480, delay_ms=1.0, wander=(40e-6, 5.0),
                              stall_rate_hz=0.2)
        fit = _fit(d, block_frames=0)
        hits += abs(fit.ppm - ppm) <= fit.ci95_ppm
    assert hits >= 34


# -- the command: refusal, sign, profile in the time base, the list ---------------------------------
def _write_blocks(path, d, *, adc=True):
    with open(path, "w") as f:
        f.write("start_sample,frames,host_time_s,wall_time_s,adc_time_s,gap_before\n")
        for s0, n, h, a in zip(d["start"], d["frames"], d["host"], d["adc"]):
            f.write(f"{int(s0)},{int(n)},{float(h)!r},0,{float(a) if adc else 0.0!r},0\n")


def test_a_profile_too_uncertain_to_help_is_not_saved(confdir, rng, capsys):
    # 20 s of blocks under a heavy load: the interval is tens of ppm
    d = simulate_readings(rng, ppm=30.0, seconds=20, chunk_frames=480, delay_ms=8.0, wander=(300e-6, 3.0))
    p = str(confdir / "busy.flac.blocks.csv")
    _write_blocks(p, d)
    assert main(["calibrate", "busy", "--from-blocks", p]) == 3
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and err.startswith("tickscope: not saved")
    m = re.search(r"about (\d+) (s|min|h) of capture would do", err)
    assert m, err
    assert "busy" not in profiles.load_all()
    # --json says the same with the figures, and what run length would do
    assert main(["calibrate", "busy", "--from-blocks", p, "--json"]) == 3
    out = json.loads(capsys.readouterr().out)
    assert out["saved"] is False and out["u95_ppm"] > 5
    assert out["seconds_needed"] == pytest.approx(out["duration_s"] * out["u95_ppm"] / 5.0, rel=0.01)
    assert "busy" not in profiles.load_all()


def test_saved_profile_says_what_the_correction_does(confdir, rng, capsys):
    d = simulate_readings(rng, ppm=76.0, seconds=200, chunk_frames=480, delay_ms=1.0)
    p = str(confdir / "quiet.flac.blocks.csv")
    _write_blocks(p, d)
    assert main(["calibrate", "quiet", "--from-blocks", p]) == 0
    out = " ".join(capsys.readouterr().out.split())
    # 76 ppm fast: rates measured on it read 76 * 0.0864 = 6.566 s/day slow, which is added back
    m = re.search(r"rates measured on it read (\d+\.\d+) s/day slow; tickscope adds that back", out)
    assert m, out
    assert float(m.group(1)) == pytest.approx(profiles.get("quiet").ppm * 0.0864, abs=0.001)
    from tickscope.commands.calibrate import correction_words

    assert correction_words(-12.0) == "rates measured on it read 1.037 s/day fast; tickscope takes that off"


def test_applied_profile_is_named_with_its_age_and_interval(confdir):
    from tickscope.commands.common import clock_from_args

    profiles.save(profiles.ClockProfile("usb mic", 76.92, 1.5, "host-clock", "2026-01-01T00:00:00+00:00", 600.0))
    profiles.save(profiles.ClockProfile("bench", -3.2, 0.4, "reference", profiles.now_iso(), 900.0))
    none = argparse.Namespace(clock_ppm=None, clock_profile=None)
    auto = clock_from_args(none, device_name="usb mic")  # used by default: named like the device
    assert auto.ppm == 76.92
    tb = auto.time_base
    assert "'usb mic'" in tb and "named like this device" in tb and "± 1.50 ppm" in tb and "+76.92" in tb
    assert re.search(r"made \d+ days ago", tb) and "STALE" in tb and len(tb) <= 120
    chosen = clock_from_args(argparse.Namespace(clock_ppm=None, clock_profile="bench")).time_base
    assert "'bench'" in chosen and "± 0.40 ppm" in chosen and "made 0 min ago" in chosen
    assert "named like" not in chosen and "STALE" not in chosen and "reference recording" in chosen


def test_list_fits_80_columns(confdir, monkeypatch, capsys):
    profiles.save(profiles.ClockProfile("kitchen usb microphone", 76.921, 1.234, "saved-capture",
                                        "2025-01-01T00:00:00+00:00", 86400.0, host_sync="synchronised (chrony)"))
    profiles.save(profiles.ClockProfile("bench", -123.456, 0.05, "reference", profiles.now_iso(), 900.0,
                                        host_sync="not synchronised"))
    monkeypatch.setenv("COLUMNS", "80")
    assert main(["calibrate", "--list"]) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    assert all(len(line) <= 80 for line in lines), out
    assert "…" not in out
    flat = " ".join(out.split())
    for text in ("+76.921 ± 1.234", "-123.456 ± 0.050", "+6.646", "-10.667", "saved capture", "reference",
                 "24.0 h", "15 min", "chrony", "not synced", "stale"):
        assert text in flat, (text, out)
    assert "kitchen usb" in flat and "microphone" in flat


# -- through the PulseAudio null sink ---------------------------------------------------------------
from test_live import loopback  # noqa: E402,F401  (the shared fixture)


def _sink_state():
    """The null sink's configured latency (us), and how many streams play into or record from it."""
    sinks = subprocess.run(["pactl", "list", "sinks"], capture_output=True, text=True, timeout=10).stdout
    m = re.search(r"configured (\d+) usec", sinks)
    ins = subprocess.run(["pactl", "list", "short", "sink-inputs"], capture_output=True, text=True, timeout=10).stdout
    outs = subprocess.run(["pactl", "list", "short", "source-outputs"], capture_output=True, text=True,
                          timeout=10).stdout
    return (int(m.group(1)) if m else None), len(ins.splitlines()), len(outs.splitlines())


def _sink_pacing_ppm(configured_us, rate=FS):
    """How fast the null sink runs against CLOCK_MONOTONIC: it renders chunks of its configured
    latency's whole frames and advances its clock by each chunk's length truncated to whole
    microseconds (PulseAudio 16, src/modules/module-null-sink.c: sink_update_requested_latency_cb
    sets max_request = pa_usec_to_bytes(latency), process_render adds pa_bytes_to_usec(chunk))."""
    frames = configured_us * rate // 1_000_000
    exact_us = frames * 1e6 / rate
    return (exact_us / math.floor(exact_us) - 1.0) * 1e6


class _Watch:
    """The sink's state every 0.5 s while a command runs (another test's stream changes the sink)."""

    def __init__(self):
        self.seen, self._stop = [], threading.Event()
        self._t = threading.Thread(target=self._run, daemon=True)

    def _run(self):
        while not self._stop.is_set():
            self.seen.append(_sink_state())
            self._stop.wait(0.5)

    def __enter__(self):
        self._t.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._t.join()

    def steady(self, streams=1):
        """The configured latency if it held throughout with our stream alone, else None."""
        mid = self.seen[2:-2]  # the stream's own start and end
        conf = {c for c, _, _ in mid}
        if len(conf) != 1 or any(i or o != streams for _, i, o in mid):
            return None
        return conf.pop()


def _env(confdir):
    return dict(os.environ, TICKSCOPE_CONFIG_DIR=str(confdir / "conf"))


def test_loopback_calibration_covers_the_sinks_own_pacing(loopback, confdir):
    # The sink paced by the host clock reads fast, not 0: with the default latency its chunk of 416
    # frames (8666.67 us) advances its clock by 8666 us, +76.93 ppm.  A profile named like the device
    # is then right for that setup, and the interval must hold that figure.
    for _attempt in range(3):
        with _Watch() as w:
            r = subprocess.run([sys.executable, "-m", "tickscope", "calibrate", "pulse", "--device", "pulse",
                                "--seconds", "30", "--json"], capture_output=True, text=True, env=_env(confdir),
                               timeout=120)
        conf = w.steady()
        if conf is not None:
            break
    else:
        pytest.skip(f"another stream used the sink during every try: {w.seen}")
    assert r.returncode in (0, 3), r.stderr
    d = json.loads(r.stdout)
    truth = _sink_pacing_ppm(conf)
    # a 95 % interval misses one run in twenty by design (CI saw 6.47 off for +-6.03): the test asks for
    # 1.5 times it (2.9 sigma, missed about once in 270 runs of a Gaussian error)
    assert abs(d["ppm"] - truth) <= 1.5 * d["u95_ppm"], (d["ppm"], d["u95_ppm"], conf, truth)
    if conf == 8687:  # PortAudio's default 'high' latency here
        assert truth == pytest.approx(76.929, abs=0.001)


def test_listen_capture_is_not_taken_for_a_calibration(loopback, confdir):
    # listen reads blocks of 2048 frames; the sink then renders chunks of 2047 (+19.54 ppm).  The
    # old fit read the saved blocks as +516 +- 12 ppm and saved that profile (exit 0)
    save = str(confdir / "cap.flac")
    env = _env(confdir)
    for _attempt in range(3):
        for f in (save, save + ".blocks.csv", save + ".json"):
            if os.path.exists(f):
                os.remove(f)
        with _Watch() as w:
            p = subprocess.run([sys.executable, "-m", "tickscope", "listen", "--device", "pulse", "--rate-hz", "48000",
                                "--duration", "20", "--json", "--save", save], capture_output=True, text=True,
                               env=env, timeout=120)
        conf = w.steady()
        if conf is not None:
            break
    else:
        pytest.skip(f"another stream used the sink during every try: {w.seen}")
    assert os.path.exists(save + ".blocks.csv"), p.stderr
    truth = _sink_pacing_ppm(conf)
    r = subprocess.run([sys.executable, "-m", "tickscope", "calibrate", "from-listen", "--from-blocks",
                        save + ".blocks.csv", "--json"], capture_output=True, text=True, env=env, timeout=120)
    d = json.loads(r.stdout)
    assert abs(d["ppm"] - truth) <= d["u95_ppm"], (d, conf, truth)
    assert r.returncode == 3 and d["saved"] is False
    assert len(r.stderr.strip().splitlines()) == 1 and "wait up to 42.7 ms" in r.stderr
    profs = json.load(open(confdir / "conf" / "clock-profiles.json")) if os.path.exists(
        confdir / "conf" / "clock-profiles.json") else {}
    assert "from-listen" not in profs
