"""Real microphone recordings of ticking timepieces (not simulated).

The audio comes from a Debian package (see scripts/fetch-real-recordings.sh, which CI runs;
locally the tests are skipped until it has been run).  Neither recording is a quartz movement:
what they check is that tickscope hears every beat of a real, lossy recording, reports the beat
interval heard, and does not claim a rate, failed steps or missed steps for a sound that is not
a stepping motor's.  The beat times they are checked against come from a plain envelope peak
picker written here (scipy's Butterworth high-pass and find_peaks), not from tickscope.
"""
import json
import os
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from scipy import signal

from tickscope.cli import main
from tickscope.io.audiofile import blocks, choose_channel, probe
from tickscope.pipeline import Analyzer

REAL = Path(os.environ.get("TICKSCOPE_REAL_DIR", Path(__file__).resolve().parents[1] / "recordings" / "real"))


def _path(name: str) -> Path:
    p = REAL / name
    if not p.exists():
        if os.environ.get("REAL_RECORDINGS_REQUIRED"):
            pytest.fail(f"{p} is missing: run scripts/fetch-real-recordings.sh")
        pytest.skip("real recordings not fetched (bash scripts/fetch-real-recordings.sh)")
    return p


def _reference_beats(path: Path, min_gap_s: float) -> np.ndarray:
    """Beat times (s): peaks of the 1 ms envelope above 1 kHz, at least min_gap_s apart, within
    20 dB of the loudest."""
    x, fs = sf.read(path)
    if x.ndim > 1:
        x = x.mean(axis=1)
    y = signal.sosfiltfilt(signal.butter(4, 1000, "highpass", fs=fs, output="sos"), x)
    hop = int(fs // 1000)
    env = np.abs(y[: len(y) // hop * hop]).reshape(-1, hop).max(axis=1)
    pk, _ = signal.find_peaks(env, height=0.1 * env.max(), distance=int(min_gap_s * 1000))
    return pk / 1000.0


def _analyze(path: Path):
    # as `analyze` does it: the channel with the clearest impacts, the file in blocks
    info = probe(str(path))
    ch = choose_channel(str(path), info)
    an = Analyzer(info.samplerate, channel=ch, lossy=info.lossy)
    for b in blocks(str(path), info, ch):
        an.feed(b)
    return an.finish()


def test_wall_clock_beats_are_heard_and_not_taken_for_quartz_steps():
    p = _path("wall-clock.ogg")
    ref = _reference_beats(p, 0.5)
    k = np.arange(len(ref))
    slope, icept = np.polyfit(k, ref, 1)
    scatter_ms = np.std(ref - (icept + slope * k)) * 1000
    # the recording itself: 15 beats about a second apart, scattered by milliseconds (a quartz
    # step lands within microseconds), so no rate may be claimed
    assert len(ref) == 15 and 0.99 < slope < 1.01 and scatter_ms > 3.0
    s = _analyze(p)
    assert s.sound == "not-stepping" and s.rate is None
    assert s.measured_interval_s == pytest.approx(slope, rel=0.003)
    assert s.extras["beats"]["heard"] >= 14
    assert s.extras["beats"]["scatter_ms"] > 3.0
    # no motor diagnosis for a sound that is not a stepping motor's
    assert "failed_steps" not in s.extras and not s.extras["diagnosis"]
    assert s.missed_steps == 0 and s.missed_step_times_s == []


def test_kitchen_timer_tick_tock_is_heard_with_its_beat_interval():
    p = _path("kitchen-timer.ogg")
    ref = _reference_beats(p, 0.12)
    iv = np.diff(ref)
    # tick and tock: alternate intervals differ (a mechanical escapement's uneven beat)
    alt_ms = abs(iv[0::2].mean() - iv[1::2].mean()) * 1000
    assert len(ref) == 18 and alt_ms > 5.0
    s = _analyze(p)
    assert s.sound == "not-stepping" and s.rate is None
    assert s.extras["beats"]["heard"] >= 17
    assert s.measured_interval_s == pytest.approx(iv.mean(), rel=0.01)
    # the onset of a beat is not its envelope peak: allow 3 ms between the two measures
    assert abs(s.extras["beats"]["alternation_ms"]) == pytest.approx(alt_ms, abs=3.0)


def test_real_recordings_through_the_command_line(capsys):
    p = _path("wall-clock.ogg")
    assert main(["analyze", str(p), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["sound"] == "not-stepping" and d["rate_s_per_day"] is None
    assert d["beats"]["heard"] >= 14
    assert any("not a quartz stepping-motor pattern" in w for w in d["warnings"])
    assert main(["analyze", str(_path("kitchen-timer.ogg"))]) == 0
    out = capsys.readouterr().out
    assert "Not a quartz stepping pattern" in out and "beats heard" in out and "missed steps" not in out
