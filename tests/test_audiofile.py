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
