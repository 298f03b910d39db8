"""Audio files in and out (libsndfile through soundfile): the same Block stream as live capture."""
from __future__ import annotations

import math
import os
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import soundfile as sf

from ..errors import InputError, ParameterError
from ..model import Block

BLOCK_FRAMES = 1 << 20  # 22 s at 48 kHz: large blocks read fastest, and the per-impact work is batched per block
WRITE_FRAMES = 1 << 14
MIN_DURATION_S = 0.5
MIN_RATE_HZ, MAX_RATE_HZ = 8000, 192000
#: integer subtypes read as integers (dtype, scale to float32 full scale)
_NATIVE_READ = {"PCM_16": ("int16", np.float32(2.0**-15)), "PCM_S8": ("int16", np.float32(2.0**-15)),
                "PCM_U8": ("int16", np.float32(2.0**-15)), "PCM_24": ("int32", np.float32(2.0**-31))}


@dataclass(frozen=True)
class FileInfo:
    path: str
    samplerate: int
    channels: int
    frames: int
    format: str
    subtype: str

    @property
    def duration_s(self) -> float:
        return self.frames / self.samplerate if self.samplerate else 0.0


def probe(path: str) -> FileInfo:
    """Open an audio file's header and check it is something we can analyze.

    Raises
    ------
    InputError
        Missing, a directory, empty, not audio, corrupt, or too short.
    """
    if not os.path.exists(path):
        raise InputError(f"no such file: {path}")
    if os.path.isdir(path):
        raise InputError(f"{path} is a directory, not an audio file")
    if os.path.getsize(path) == 0:
        raise InputError(f"{path} is empty (0 bytes)")
    try:
        info = sf.info(path)
    except (sf.LibsndfileError, RuntimeError, OSError) as e:
        raise InputError(f"{path} is not a readable audio file ({_short(e)})") from e
    if info.frames <= 0 or info.samplerate <= 0:
        raise InputError(f"{path} holds no audio samples")
    if not MIN_RATE_HZ <= info.samplerate <= MAX_RATE_HZ:
        raise InputError(f"{path}: sample rate {info.samplerate} Hz is outside {MIN_RATE_HZ}..{MAX_RATE_HZ} Hz")
    fi = FileInfo(path, int(info.samplerate), int(info.channels), int(info.frames), info.format, info.subtype)
    if fi.duration_s < MIN_DURATION_S:
        raise InputError(f"{path} is only {fi.duration_s:.2f} s long: record at least 30 s of ticking")
    return fi


def _short(e: Exception) -> str:
    msg = str(e).strip().splitlines()[-1] if str(e).strip() else type(e).__name__
    return msg.replace("Error opening ", "").strip()


def choose_channel(path: str, info: FileInfo, seconds: float = 20.0) -> int:
    """The channel whose loudest moments stand highest above its typical level."""
    if info.channels == 1:
        return 0
    n = int(min(info.frames, seconds * info.samplerate))
    try:
        x = sf.read(path, frames=n, dtype="float32", always_2d=True)[0]
    except (sf.LibsndfileError, RuntimeError) as e:
        raise InputError(f"{path}: cannot read audio ({_short(e)})") from e
    hop = max(2, int(0.0005 * info.samplerate))
    best, best_c = -1.0, 0
    for c in range(info.channels):
        d = np.diff(x[:, c])
        m = (len(d) // hop) * hop
        if m < 8 * hop:
            continue
        e = np.einsum("ij,ij->i", d[:m].reshape(-1, hop), d[:m].reshape(-1, hop))
        med = float(np.median(e))
        top = float(np.quantile(e, 0.998))
        score = top / med if med > 0 else (math.inf if top > 0 else 0.0)
        if score > best:
            best, best_c = score, c
    return best_c


def blocks(path: str, info: FileInfo, channel: int, block_frames: int = BLOCK_FRAMES, *,
           start_frame: int = 0) -> Iterator[Block]:
    """Yield the chosen channel as float32 Blocks; the file is closed even if abandoned early.

    With ``start_frame`` reading starts there, and the blocks count samples from it (a log
    resumed part-way through a file).
    """
    if not 0 <= channel < info.channels:
        raise ParameterError(f"--channel {channel}: {info.path} has channels 0..{info.channels - 1}")
    pos = 0
    # Integer PCM is read as integers and scaled here: libsndfile's own float conversion costs
    # ~5x the rest of reading.  The result is the same float32 (1/2^15 and 1/2^31 are powers of
    # two; 24-bit samples are exact in float32), as tests/test_audiofile.py checks.
    dtype, scale = _NATIVE_READ.get(info.subtype, ("float32", None))
    try:
        with sf.SoundFile(path) as f:
            if start_frame:
                f.seek(int(start_frame))
            while True:
                try:
                    x = f.read(block_frames, dtype=dtype, always_2d=True)
                except (sf.LibsndfileError, RuntimeError) as e:
                    if pos == 0:
                        raise InputError(f"{path}: cannot read audio ({_short(e)})") from e
                    break  # a truncated or damaged tail: keep what was read
                if not len(x):
                    break
                if scale is None:
                    y = np.ascontiguousarray(x[:, channel])
                else:
                    y = np.multiply(x[:, channel], scale, dtype=np.float32)
                yield Block(y, pos)
                pos += len(y)
    except (sf.LibsndfileError, OSError) as e:
        if pos == 0:
            raise InputError(f"{path}: cannot read audio ({_short(e)})") from e


def audio_format_for(path: str, subtype: str | None = None) -> tuple[str, str]:
    """(format, subtype) that ``path``'s extension asks for (lossless defaults: 24-bit, WAV float)."""
    ext = os.path.splitext(path)[1].lower()
    fmt = {".wav": "WAV", ".flac": "FLAC", ".ogg": "OGG", ".oga": "OGG", ".mp3": "MP3", ".aiff": "AIFF",
           ".aif": "AIFF", ".w64": "W64", ".caf": "CAF"}.get(ext)
    if fmt is None:
        raise ParameterError(f"{path}: unknown audio extension {ext!r} (use .wav, .flac, .ogg or .mp3)")
    if subtype is None:
        subtype = {"OGG": "VORBIS", "MP3": "MPEG_LAYER_III", "WAV": "FLOAT"}.get(fmt, "PCM_24")
    if fmt in ("OGG", "MP3") and subtype not in ("VORBIS", "OPUS", "MPEG_LAYER_III"):
        raise ParameterError(f"{path}: subtype {subtype} does not fit a lossy {fmt} file")
    return fmt, subtype


class LiveRecorder:
    """Records captured blocks: the audio (FLAC/WAV by extension, written as it comes, so a crash
    leaves what was captured) and one CSV row of clock readings per block (PATH.blocks.csv)."""

    def __init__(self, path: str, samplerate: int):
        if os.path.exists(path):
            raise ParameterError(f"--save {path}: the file exists; choose a new name (nothing is overwritten)")
        fmt, st = audio_format_for(path, None)
        if fmt in ("OGG", "MP3"):
            raise ParameterError(f"--save {path}: use .flac or .wav (lossless) for recordings to be measured")
        if fmt == "WAV":
            st = "FLOAT"
        try:
            self._f = sf.SoundFile(path, "x", samplerate=samplerate, channels=1, format=fmt, subtype=st)
            self._csv = open(path + ".blocks.csv", "x")
        except (sf.LibsndfileError, RuntimeError, OSError) as e:
            raise InputError(f"cannot record to {path}: {_short(e)}") from e
        self._csv.write("start_sample,frames,host_time_s,wall_time_s,adc_time_s,gap_before\n")
        self._written = 0

    def write(self, b: Block) -> None:
        if b.gap_before:
            # keep the file's sample count equal to the stream's: lost audio becomes silence
            self._f.write(np.zeros(b.gap_before, dtype=np.float32))
        self._f.write(b.samples)
        self._csv.write(f"{b.start_sample},{len(b.samples)},{b.host_time_s!r},{b.wall_time_s!r},"
                        f"{b.adc_time_s!r},{b.gap_before}\n")

    def close(self) -> None:
        try:
            self._f.close()
        finally:
            self._csv.close()
