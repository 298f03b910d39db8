"""Reading audio files: the fast integer path gives exactly what libsndfile's float conversion gives."""
from __future__ import annotations

import numpy as np
import pytest
import soundfile as sf

from tickscope.io import audiofile


@pytest.mark.parametrize("fmt,subtype,ext", [
    ("WAV", "PCM_16", "wav"), ("WAV", "PCM_24", "wav"), ("WAV", "PCM_U8", "wav"),
    ("AIFF", "PCM_S8", "aiff"), ("FLAC", "PCM_16", "flac"), ("FLAC", "PCM_24", "flac"),
    ("WAV", "PCM_32", "wav"), ("WAV", "FLOAT", "wav"),
])
@pytest.mark.parametrize("channels", [1, 2])
def test_blocks_equal_libsndfile_float(tmp_path, fmt, subtype, ext, channels):
    rng = np.random.default_rng(7)
    n = 50_000
    x = np.clip(rng.normal(0, 0.3, (n, channels)), -1, 1)
    x[:10] = [[-1.0] * channels]  # full scale both ways
    x[10:20] = [[0.999969] * channels]
    path = str(tmp_path / f"a.{ext}")
    sf.write(path, x, 8000, format=fmt, subtype=subtype)
    ref = sf.read(path, dtype="float32", always_2d=True)[0]
    info = audiofile.probe(path)
    for ch in range(channels):
        got = np.concatenate([b.samples for b in audiofile.blocks(path, info, ch, block_frames=4097)])
        assert got.dtype == np.float32
        # bit-exact: any scale or rounding difference would show
        assert np.array_equal(got, ref[:, ch]), (subtype, ch)


def test_blocks_start_frame_and_positions(tmp_path):
    x = np.arange(20_000, dtype=np.float64) / 40_000.0
    path = str(tmp_path / "ramp.wav")
    sf.write(path, x, 8000, subtype="PCM_16")
    info = audiofile.probe(path)
    bl = list(audiofile.blocks(path, info, 0, block_frames=3000, start_frame=5000))
    assert [b.start_sample for b in bl] == list(range(0, 15_000, 3000))
    got = np.concatenate([b.samples for b in bl])
    assert np.array_equal(got, sf.read(path, dtype="float32")[0][5000:])


# --- files libsndfile cannot read, decoded by ffmpeg (a phone's AAC .m4a) ---------------------------
import json  # noqa: E402
import os  # noqa: E402
import shutil  # noqa: E402
import subprocess  # noqa: E402

from tickscope.cli import main  # noqa: E402
from tickscope.core.simulate import Scenario, render_all  # noqa: E402
from tickscope.errors import InputError  # noqa: E402


def _need_ffmpeg():
    if shutil.which("ffmpeg") and shutil.which("ffprobe"):
        return
    if os.environ.get("FFMPEG_REQUIRED"):
        pytest.fail("ffmpeg is not installed (CI installs it)")
    pytest.skip("ffmpeg is not installed")


def _encode(src: str, dst: str, *args: str) -> None:
    subprocess.run(["ffmpeg", "-v", "error", "-nostdin", "-y", "-i", src, *args, dst], check=True)


def test_m4a_blocks_equal_ffmpegs_own_decoding(tmp_path):
    _need_ffmpeg()
    rng = np.random.default_rng(3)
    wav = str(tmp_path / "a.wav")
    sf.write(wav, np.clip(rng.normal(0, 0.2, (30_000, 2)), -1, 1), 16000)
    m4a = str(tmp_path / "a.m4a")
    _encode(wav, m4a, "-c:a", "aac", "-b:a", "64k")
    # reference: ffmpeg decodes the same file to a float WAV, read by libsndfile
    ref_path = str(tmp_path / "ref.wav")
    _encode(m4a, ref_path, "-c:a", "pcm_f32le")
    ref = sf.read(ref_path, dtype="float32", always_2d=True)[0]
    info = audiofile.probe(m4a)
    assert (info.format, info.subtype, info.samplerate, info.channels) == ("FFMPEG", "aac", 16000, 2)
    assert abs(info.frames - len(ref)) <= 2048  # the container's duration; decoding pads to whole 1024-frame AAC frames
    for ch in range(2):
        got = np.concatenate([b.samples for b in audiofile.blocks(m4a, info, ch, block_frames=4097)])
        assert got.dtype == np.float32 and np.array_equal(got, ref[:, ch])
    part = list(audiofile.blocks(m4a, info, 1, block_frames=3000, start_frame=5000))
    assert part[0].start_sample == 0
    assert np.array_equal(np.concatenate([b.samples for b in part]), ref[5000:, 1])


def test_phone_aac_recording_analyzed_end_to_end(tmp_path, capsys):
    # a phone's default: AAC in .m4a (mono, 48 kHz); truth from the simulator
    _need_ffmpeg()
    sc = Scenario(duration_s=90, rate_s_per_day=-3.1, snr_db=25, second_impact_ms=45, agc=True, seed=14)
    x, truth = render_all(sc)
    wav = str(tmp_path / "phone.wav")
    sf.write(wav, x, sc.samplerate_hz, subtype="PCM_24")
    m4a = str(tmp_path / "phone.m4a")
    _encode(wav, m4a, "-c:a", "aac", "-b:a", "64k")
    assert main(["analyze", m4a, "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    n_true = sum(1 for s in truth["steps"] if s["kind"] == "step" and s["time_s"] < sc.duration_s - 0.1)
    assert d["sound"] == "stepping" and d["steps_detected"] == n_true and d["missed_steps"] == 0
    exp = truth["expected"]["rate_device_time_s_per_day"]
    assert abs(d["rate_s_per_day"] - exp) <= d["rate_ci95_s_per_day"]
    assert abs(d["rate_s_per_day"] - exp) < 0.02
    assert d["sample_rate_hz"] == sc.samplerate_hz and abs(d["duration_s"] - sc.duration_s) < 0.1


def test_m4a_without_ffmpeg_says_what_to_do(tmp_path, monkeypatch):
    p = tmp_path / "memo.m4a"
    p.write_bytes(b"\x00\x00\x00\x20ftypM4A " + bytes(200))
    monkeypatch.setattr(audiofile.shutil, "which", lambda name: None)
    with pytest.raises(InputError, match="install ffmpeg"):
        audiofile.probe(str(p))


def test_m4a_that_is_not_audio_or_cut_short(tmp_path, capsys):
    _need_ffmpeg()
    bad = tmp_path / "list.m4a"
    bad.write_text("eggs, flour, a new mainspring\n" * 50)
    with pytest.raises(InputError, match="not a readable audio file"):
        audiofile.probe(str(bad))
    # cut in half, its index at the front (as phones write them): analyze what it holds, and say so
    sc = Scenario(duration_s=60, snr_db=30, seed=5)
    x, _ = render_all(sc)
    wav = str(tmp_path / "whole.wav")
    sf.write(wav, x, sc.samplerate_hz)
    m4a = str(tmp_path / "whole.m4a")
    _encode(wav, m4a, "-c:a", "aac", "-b:a", "96k", "-movflags", "+faststart")
    data = open(m4a, "rb").read()
    cut = tmp_path / "cut.m4a"
    cut.write_bytes(data[: len(data) // 2])
    assert main(["analyze", str(cut), "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert 20 < d["duration_s"] < 40 and d["steps_detected"] >= 20
    assert any("cut short or damaged" in w for w in d["warnings"])
