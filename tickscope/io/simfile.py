"""Write simulated recordings and their truth files (streaming, any length)."""
from __future__ import annotations

import json
import os
from collections.abc import Callable

import numpy as np
import soundfile as sf

from ..core.simulate import Renderer, Scenario
from ..errors import InputError, ParameterError
from .audiofile import write_audio

CHUNK_S = 10.0


def truth_path_for(audio_path: str) -> str:
    """The truth file that sits beside a simulated recording: NAME.truth.json."""
    root, _ = os.path.splitext(audio_path)
    return root + ".truth.json"


def write_simulation(path: str, sc: Scenario, *, subtype: str | None = None,
                     progress: Callable[[float], None] | None = None, description: str = "") -> dict:
    """Render ``sc`` to ``path`` chunk by chunk and write the truth JSON beside it."""
    ext = os.path.splitext(path)[1].lower()
    r = Renderer(sc)
    peak = 0.0
    if ext in (".ogg", ".mp3"):
        # lossy encoders are given the whole signal (short scenarios only)
        parts = []
        while True:
            x = r.render(int(CHUNK_S * sc.samplerate_hz))
            if not len(x):
                break
            parts.append(x)
            if progress:
                progress(r.pos / r.n_total)
        data = np.concatenate(parts)
        peak = float(np.max(np.abs(data))) if len(data) else 0.0
        write_audio(path, np.clip(data, -1, 1).astype(np.float32), sc.samplerate_hz, subtype=subtype)
    else:
        fmt = {".wav": "WAV", ".flac": "FLAC", ".w64": "W64", ".aiff": "AIFF", ".aif": "AIFF"}.get(ext)
        if fmt is None:
            raise ParameterError(f"{path}: unknown audio extension {ext!r} (use .wav, .flac, .ogg or .mp3)")
        st = subtype or ("PCM_24" if fmt == "FLAC" else "FLOAT")
        try:
            with sf.SoundFile(path, "w", samplerate=sc.samplerate_hz, channels=sc.channels, format=fmt, subtype=st) as f:
                while True:
                    x = r.render(int(CHUNK_S * sc.samplerate_hz))
                    if not len(x):
                        break
                    peak = max(peak, float(np.max(np.abs(x))))
                    f.write(np.clip(x, -1, 1) if st != "FLOAT" else x)
                    if progress:
                        progress(r.pos / r.n_total)
        except (sf.LibsndfileError, RuntimeError, OSError, ValueError) as e:
            raise InputError(f"cannot write {path}: {e}") from e
    truth = dict(r.truth)
    truth["description"] = description
    truth["audio_file"] = os.path.basename(path)
    truth["peak_full_scale"] = peak
    truth["lossy"] = ext in (".ogg", ".mp3")
    try:
        with open(truth_path_for(path), "w") as f:
            json.dump(truth, f, indent=1)
    except OSError as e:
        raise InputError(f"cannot write {truth_path_for(path)}: {e}") from e
    return truth
