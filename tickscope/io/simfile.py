"""Write simulated recordings and their truth files (streaming, any length)."""
from __future__ import annotations

import json
import os
from collections.abc import Callable

import numpy as np
import soundfile as sf

from ..core.simulate import Renderer, Scenario
from ..errors import InputError
from .audiofile import WRITE_FRAMES, audio_format_for

CHUNK_S = 10.0


def truth_path_for(audio_path: str) -> str:
    """The truth file that sits beside a simulated recording: NAME.truth.json."""
    root, _ = os.path.splitext(audio_path)
    return root + ".truth.json"


def write_simulation(path: str, sc: Scenario, *, subtype: str | None = None,
                     progress: Callable[[float], None] | None = None, description: str = "",
                     compression_level: float | None = None) -> dict:
    """Render ``sc`` to ``path`` chunk by chunk and write the truth JSON beside it.

    ``compression_level`` (0..1, lossy formats) is handed to libsndfile: higher is smaller.
    """
    ext = os.path.splitext(path)[1].lower()
    fmt, st = audio_format_for(path, subtype)
    r = Renderer(sc)
    peak = 0.0
    try:
        extra = {} if compression_level is None else {"compression_level": float(compression_level)}
        with sf.SoundFile(path, "w", samplerate=sc.samplerate_hz, channels=sc.channels, format=fmt, subtype=st,
                          **extra) as f:
            while True:
                x = r.render(int(CHUNK_S * sc.samplerate_hz))
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
