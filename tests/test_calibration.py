"""Device-clock calibration: the fit on simulated block readings, profiles, the reference method,
and a real capture through the PulseAudio null sink (whose pacing is a genuine target)."""
import json
import os
import subprocess
import sys

import numpy as np
import pytest

from tickscope.cli import main
from tickscope.core.clockfit import fit_device_clock
from tickscope.core.simulate import Scenario
from tickscope.simulation import write_simulation


def _readings(ppm, seconds, rng, *, block=480, fs=48000, jitter_ms=2.0, gaps=(), step=None):
    """Per-block (first sample, host time) of a device fast by `ppm`, with scheduling delays."""
    n = int(seconds * fs / block)
    start = np.arange(n) * block
    for g0, glen in gaps:  # overflows: blocks lost, the sample index jumps on
        start[start >= g0] += glen
    host = 100.0 + start / (fs * (1 + ppm * 1e-6))
    host += rng.exponential(jitter_ms * 1e-3, n)  # never early, sometimes very late
    if step is not None:
        host[host > step[0]] += step[1]  # the host clock was stepped (NTP)
    return start, host


# These readings tie each block's host time to its own samples with no wait for the rest of a
# device chunk: a reader that takes what has arrived (block_frames=0).  Told nothing, the fit takes
# equal blocks for a reader of fixed blocks and bounds their wait at its worst (a block).
@pytest.mark.parametrize("ppm", [23.0, -41.0])
def test_recovers_simulated_offsets(rng, ppm):
    start, host = _readings(ppm, 600, rng)
    fit = fit_device_clock(start, host, 48000, block_frames=0)
    assert abs(fit.ppm - ppm) <= fit.ci95_ppm
    assert fit.ci95_ppm < 1.0


def test_interval_is_honest(rng):
    hits = 0
    for i in range(60):
        ppm = rng.uniform(-100, 100)
        start, host = _readings(ppm, 120, rng, jitter_ms=rng.uniform(0.5, 4))
        fit = fit_device_clock(start, host, 48000, block_frames=0)
        hits += abs(fit.ppm - ppm) <= fit.ci95_ppm
    assert hits >= 52  # about 95 % of 60 (binomial: 52 is 3 sigma below 57)


def test_jitter_gaps_and_host_steps_do_not_bias(rng):
    start, host = _readings(-41.0, 900, rng, jitter_ms=4.0, gaps=[(48000 * 100, 48000 * 3), (48000 * 500, 4800)],
                            step=(500.0, 0.35))
    fit = fit_device_clock(start, host, 48000, block_frames=0)
    assert len(fit.steps) == 1 and fit.steps[0][1] == pytest.approx(0.35, abs=0.02)
    assert abs(fit.ppm + 41.0) <= fit.ci95_ppm


def test_ppm_arithmetic():
    # 1 ppm = 0.0864 s/day (Epson RTC application manuals: 11.574 ppm is about 1 s/day)
    assert 1e-6 * 86400 == pytest.approx(0.0864)


@pytest.fixture
def confdir(tmp_path, monkeypatch):
    monkeypatch.setenv("TICKSCOPE_CONFIG_DIR", str(tmp_path / "conf"))
    return tmp_path


def test_reference_recording_and_profile_use(confdir, capsys):
    # a reference movement of known rate +1.0 s/day recorded through a device 23 ppm fast
    ref = str(confdir / "ref.wav")
    write_simulation(ref, Scenario(duration_s=300, rate_s_per_day=1.0, clock_ppm=23.0, snr_db=30, seed=81))
    assert main(["calibrate", "shop-mic", "--reference", ref, "--known-rate", "1.0+-0.001", "--json"]) == 0
    prof = json.loads(capsys.readouterr().out)
    assert prof["ppm"] == pytest.approx(23.0, abs=max(prof["u95_ppm"], 0.05))
    # a movement measured with the same device, corrected by the profile
    rec = str(confdir / "watch.wav")
    write_simulation(rec, Scenario(duration_s=300, rate_s_per_day=-3.0, clock_ppm=23.0, snr_db=30, seed=82))
    assert main(["analyze", rec, "--json", "--clock-profile", "shop-mic"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert abs(d["rate_s_per_day"] + 3.0) <= d["rate_ci95_s_per_day"]
    assert d["clock_calibrated"] and "reference recording" in d["time_base"]
    assert not any("uncalibrated" in w for w in d["warnings"])
    # without it the same file reads 23 ppm (about 2 s/day) slow, and says its time base is uncalibrated
    assert main(["analyze", rec, "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["rate_s_per_day"] == pytest.approx(-3.0 - 23 * 0.0864, abs=0.01)
    assert "uncalibrated" in d["time_base"]
    # listing, stale flag, unknown profile, conflicting options
    assert main(["calibrate", "--list", "--json", "--max-age-days", "-1"]) == 0
    lst = json.loads(capsys.readouterr().out)
    assert lst["shop-mic"]["stale"] is True
    assert main(["analyze", rec, "--clock-profile", "nope"]) == 2
    assert "no clock profile named 'nope'" in capsys.readouterr().err
    assert main(["analyze", rec, "--clock-profile", "shop-mic", "--clock-ppm", "3"]) == 2


def test_from_saved_blocks(confdir, rng, capsys):
    # a saved capture's blocks are of one size: the driver's capture times (adc_time_s, as listen
    # --save writes them) show how little their wait drifted; without them the wait is taken at its worst
    start, host = _readings(57.0, 300, rng)
    adc = 100.0 + start / (48000 * (1 + 57e-6)) + rng.normal(0, 2e-5, len(start))
    p = confdir / "cap.flac.blocks.csv"
    with open(p, "w") as f:
        f.write("start_sample,frames,host_time_s,wall_time_s,adc_time_s,gap_before\n")
        for s0, h, a in zip(start, host, adc):
            f.write(f"{int(s0)},480,{float(h)!r},0,{float(a)!r},0\n")
    assert main(["calibrate", "saved", "--from-blocks", str(p), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert abs(d["ppm"] - 57.0) <= d["u95_ppm"] and d["method"] == "saved-capture"


# -- the real thing: the null sink is paced by the host clock, rounding each block to whole us --------
from test_live import loopback  # noqa: E402,F401  (the shared fixture)


def _calibrate(latency, seconds, confdir):
    env = dict(os.environ, TICKSCOPE_CONFIG_DIR=str(confdir / "conf"))
    r = subprocess.run([sys.executable, "-m", "tickscope", "calibrate", f"sink-{latency}", "--device", "pulse",
                        "--seconds", str(seconds), "--latency", latency, "--json"], capture_output=True, text=True,
                       env=env, timeout=seconds + 60)
    # a run this short may be too uncertain to be kept as a profile (exit 3): --json gives the figures
    assert r.returncode in (0, 3), r.stderr
    return json.loads(r.stdout)


def test_loopback_device_clock(loopback, confdir):
    # Measured in shared/audio-loopback.md: with PortAudio latency 0.1 s (1200 frames, a whole number of
    # microseconds) the sink runs within a few ppm of the host clock; with the default block it runs
    # tens of ppm fast (+59 to +83 ppm seen), because each block's duration is truncated to whole us.
    # A PulseAudio server that has run for hours under other clients has been seen (once, locally) to
    # pace the 0.1 s configuration like the default one (+82 ppm): that is the server, not the
    # calibration.  So the exact configuration gets up to four tries to show two agreeing readings.
    exact, tries = [], []
    while len(exact) < 2 and len(tries) < 4:
        d = _calibrate("0.1", 25, confdir)
        tries.append(round(d["ppm"], 2))
        if abs(d["ppm"]) < 5 + d["u95_ppm"]:
            exact.append(d)
    assert len(exact) == 2, f"latency 0.1 s read {tries} ppm"
    # the default block: its block arrival times scatter far more on a busy VM (25 s gave 95 %
    # intervals of +-17 to +-80 ppm around readings of +69 to +87 here, with the old code and the new;
    # 40 s still gave +-22 and +-54 once): each reading must be fast, and the two pooled (weighted by
    # 1/u^2) must lie clear of +20 ppm
    fast = [_calibrate("high", 40, confdir) for _ in range(2)]
    seen = [(round(x["ppm"], 1), round(x["u95_ppm"], 1)) for x in fast]
    w = [1.0 / max(x["u95_ppm"], 1e-3) ** 2 for x in fast]
    pooled = sum(wi * x["ppm"] for wi, x in zip(w, fast)) / sum(w)
    assert all(x["ppm"] > 30 for x in fast) and pooled - sum(w) ** -0.5 > 20, f"latency high read {seen} ppm"
    # consistent across runs: the two intervals overlap
    for a, b in (exact, fast):
        assert abs(a["ppm"] - b["ppm"]) <= a["u95_ppm"] + b["u95_ppm"] + 2.0
