"""Write simulated recordings and their truth files (streaming, any length).

The renderer is any object with ``render(n)`` (the next n samples, [n, channels]; empty at the
end), ``pos``, ``n_total`` and ``truth`` (the core's simulators: see :mod:`tickscope.simulation`).
"""
from __future__ import annotations

import json
import os
from collections.abc import Callable

import numpy as np
import soundfile as sf

from ..errors import InputError
from .audiofile import WRITE_FRAMES, audio_format_for

CHUNK_S = 10.0


def truth_path_for(audio_path: str) -> str:
    """The truth file that sits beside a simulated recording: NAME.truth.json."""
    root, _ = os.path.splitext(audio_path)
    return root + ".truth.json"


def write_rendered(path: str, r, samplerate_hz: int, channels: int, *, subtype: str | None,
                    progress: Callable[[float], None] | None, description: str,
                    compression_level: float | None) -> dict:
    """Write what renderer ``r`` makes to ``path`` (format from the extension, lossy codecs included)
    and NAME.truth.json beside it: the renderer's truth with ``description``, ``audio_file``,
    ``peak_full_scale``, ``lossy`` and ``compression_level`` added.  ``compression_level`` (0..1,
    lossy formats) is handed to libsndfile: higher is smaller."""
    ext = os.path.splitext(path)[1].lower()
    fmt, st = audio_format_for(path, subtype)
    peak = 0.0
    try:
        extra = {} if compression_level is None else {"compression_level": float(compression_level)}
        with sf.SoundFile(path, "w", samplerate=samplerate_hz, channels=channels, format=fmt, subtype=st,
                          **extra) as f:
            while True:
                x = r.render(int(CHUNK_S * samplerate_hz))
                if not len(x):
                    break
                peak = max(peak, float(np.max(np.abs(x))))
                if st != "FLOAT":
                    x = np.clip(x, -1, 1)
                for i in range(0, len(x), WRITE_FRAMES):  # small writes: libsndfile's Vorbis encoder crashed on one 60 s write
                    f.write(x[i: i + WRITE_FRAMES])
                if progress:
                    progress(r.pos / r.n_total)
    except (sf.LibsndfileError, RuntimeError, OSError, ValueError) as e:
        raise InputError(f"cannot write {path}: {e}") from e
    truth = dict(r.truth)
    truth["description"] = description
    truth["audio_file"] = os.path.basename(path)
    truth["peak_full_scale"] = peak
    truth["lossy"] = ext in (".ogg", ".oga", ".opus", ".mp3")
    if compression_level is not None:
        truth["compression_level"] = float(compression_level)
    try:
        with open(truth_path_for(path), "w") as f:
            json.dump(truth, f, indent=1)
    except OSError as e:
        raise InputError(f"cannot write {truth_path_for(path)}: {e}") from e
    return truth
