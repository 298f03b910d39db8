"""Audio files in and out: the same Block stream as live capture.

Files are read with libsndfile (through soundfile): WAV, FLAC, Ogg Vorbis and Opus, MP3, AIFF
and the rest of its formats.  What it cannot read -- phones' AAC (.m4a), AMR and 3GP, video
soundtracks -- is decoded by ffmpeg where it is installed, streamed through a pipe as float32
(the stream's own sample rate and channels, no resampling), so memory stays flat here too.
"""
from __future__ import annotations

import json
import math
import os
import shutil
import subprocess
import threading
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import soundfile as sf

from ..errors import InputError, ParameterError
from ..model import Block, samples_as_float32

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
    header_frames: int | None = None  # what the header claims, when it claims more than the file holds

    @property
    def duration_s(self) -> float:
        return self.frames / self.samplerate if self.samplerate else 0.0

    @property
    def header_duration_s(self) -> float:
        """How long the header says the recording is (a file cut short holds less)."""
        frames = self.header_frames if self.header_frames is not None else self.frames
        return frames / self.samplerate if self.samplerate else 0.0

    @property
    def lossy(self) -> bool:
        """Whether the audio went through a lossy codec (its step times may shift; see Analyzer)."""
        if self.format == FFMPEG_FORMAT:
            return not (self.subtype.startswith("pcm_") or self.subtype in _LOSSLESS_CODECS)
        return self.subtype in ("VORBIS", "OPUS", "MPEG_LAYER_I", "MPEG_LAYER_II", "MPEG_LAYER_III",
                                "GSM610", "G721_32", "G723_24", "G723_40", "VOX_ADPCM", "IMA_ADPCM", "MS_ADPCM",
                                "NMS_ADPCM_16", "NMS_ADPCM_24", "NMS_ADPCM_32")


_LOSSLESS_CODECS = {"flac", "alac", "wavpack", "ape", "tta", "mlp", "truehd", "shorten"}


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
        fi = FileInfo(path, int(info.samplerate), int(info.channels), int(info.frames), info.format, info.subtype,
                      _wav_claimed_frames(path, int(info.frames)) if info.format == "WAV" else None)
    except (sf.LibsndfileError, RuntimeError, OSError) as e:
        fi = _probe_ffmpeg(path, _short(e))
    if fi.frames <= 0 or fi.samplerate <= 0:
        raise InputError(f"{path} holds no audio samples")
    if not MIN_RATE_HZ <= fi.samplerate <= MAX_RATE_HZ:
        raise InputError(f"{path}: sample rate {fi.samplerate} Hz is outside {MIN_RATE_HZ}..{MAX_RATE_HZ} Hz")
    if fi.duration_s < MIN_DURATION_S:
        raise InputError(f"{path} is only {fi.duration_s:.2f} s long: record at least 30 s of ticking")
    return fi


def _wav_claimed_frames(path: str, frames: int) -> int | None:
    """The frames a RIFF WAV's data chunk claims, when more than the file holds (libsndfile reads
    what is there and reports that; the header's own figure tells a file cut short)."""
    import struct

    try:
        with open(path, "rb") as f:
            head = f.read(1 << 16)
    except OSError:
        return None
    if head[:4] != b"RIFF" or head[8:12] != b"WAVE":
        return None
    i, align = 12, 0
    while i + 8 <= len(head):
        cid, size = head[i: i + 4], struct.unpack("<I", head[i + 4: i + 8])[0]
        if cid == b"fmt " and i + 22 <= len(head):
            align = struct.unpack("<H", head[i + 20: i + 22])[0]  # bytes per frame (all channels)
        elif cid == b"data":
            if not align or size == 0xFFFFFFFF:
                return None
            claimed = size // align
            return claimed if claimed > frames else None
        i += 8 + size + (size & 1)
    return None


FFMPEG_FORMAT = "FFMPEG"  # FileInfo.format of a file decoded by ffmpeg (subtype: its codec)


def _probe_ffmpeg(path: str, why: str) -> FileInfo:
    """The first audio stream of a file libsndfile cannot read, as ffprobe sees it."""
    if shutil.which("ffprobe") is None or shutil.which("ffmpeg") is None:
        raise InputError(f"{path} is not a file libsndfile reads ({why}); for a phone's .m4a, .aac, .amr or "
                         ".3gp install ffmpeg (e.g. apt-get install ffmpeg) or convert it to FLAC")
    try:
        r = subprocess.run(["ffprobe", "-v", "error", "-select_streams", "a:0", "-show_entries",
                            "stream=codec_name,sample_rate,channels,duration:format=duration", "-of", "json", path],
                           capture_output=True, text=True, timeout=60, stdin=subprocess.DEVNULL)
        d = json.loads(r.stdout or "{}")
    except (OSError, subprocess.SubprocessError, ValueError) as e:
        raise InputError(f"{path} is not a readable audio file (ffprobe: {e})") from e
    streams = d.get("streams") or []
    if r.returncode != 0 or not streams:
        msg = (r.stderr or "").strip().splitlines()
        raise InputError(f"{path} is not a readable audio file ({why}; ffprobe: "
                         f"{msg[-1] if msg else 'no audio stream'})")
    st = streams[0]
    try:
        rate = int(st.get("sample_rate") or 0)
        channels = int(st.get("channels") or 0)
        dur = float(st.get("duration") or (d.get("format") or {}).get("duration") or 0.0)
    except ValueError as e:
        raise InputError(f"{path}: ffprobe gave an unreadable stream description ({e})") from e
    if channels <= 0:
        raise InputError(f"{path} holds no audio channels")
    # the container's duration: the exact count of frames is only known once decoded
    return FileInfo(path, rate, channels, int(round(dur * rate)), FFMPEG_FORMAT, str(st.get("codec_name", "?")))


class _FfmpegFailed(Exception):
    """ffmpeg exited with an error (its last line of stderr)."""


def _ffmpeg_frames(path: str, info: FileInfo, block_frames: int) -> Iterator[np.ndarray]:
    """Decode with ffmpeg: float32 arrays of shape (frames, channels), block_frames at a time."""
    cmd = ["ffmpeg", "-v", "error", "-nostdin", "-i", path, "-map", "0:a:0", "-vn", "-f", "f32le",
           "-acodec", "pcm_f32le", "-"]
    try:
        proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL)
    except OSError as e:
        raise InputError(f"{path}: cannot start ffmpeg ({e})") from e
    # stderr is drained by a thread, so a chatty decoder can never block the pipe we read
    err: list[bytes] = []
    t = threading.Thread(target=lambda: err.append(proc.stderr.read()), daemon=True)
    t.start()
    nbytes = block_frames * info.channels * 4
    rest = b""
    try:
        while True:
            chunk = proc.stdout.read(nbytes)
            if not chunk:
                break
            chunk = rest + chunk
            whole = len(chunk) // (4 * info.channels) * 4 * info.channels
            rest = chunk[whole:]
            if whole:
                yield np.frombuffer(chunk[:whole], dtype="<f4").reshape(-1, info.channels)
        rc = proc.wait()
        t.join(timeout=5)
        if rc != 0:
            msg = b"".join(err).decode(errors="replace").strip().splitlines()
            raise _FfmpegFailed(msg[-1] if msg else f"ffmpeg exited with status {rc}")
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stdout.close()


def _short(e: Exception) -> str:
    msg = str(e).strip().splitlines()[-1] if str(e).strip() else type(e).__name__
    return msg.replace("Error opening ", "").strip()


def choose_channel(path: str, info: FileInfo, seconds: float = 20.0) -> int:
    """The channel whose loudest moments stand highest above its typical level."""
    if info.channels == 1:
        return 0
    n = int(min(info.frames, seconds * info.samplerate))
    if info.format == FFMPEG_FORMAT:
        parts, got = [], 0
        try:
            for x in _ffmpeg_frames(path, info, BLOCK_FRAMES):
                parts.append(x)
                got += len(x)
                if got >= n:
                    break
        except _FfmpegFailed as e:
            if not parts:
                raise InputError(f"{path}: cannot decode audio (ffmpeg: {e})") from e
        x = np.concatenate(parts)[:n] if parts else np.zeros((0, info.channels), np.float32)
    else:
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


class _Unusable:
    """Samples that are not numbers (NaN, +-inf: a damaged float file) are lost audio, not silence:
    they become gaps in the stream (``Block.gap_before``), which the analysis never counts as
    missed steps.  Counted in ``tally["nonfinite"]``; runs less than ``min_good_s`` apart are one
    gap (the few samples between them cannot be analyzed)."""

    def __init__(self, samplerate: float, tally: dict | None, min_good_s: float = 0.01):
        self.tally = tally
        self.min_good = max(1, int(min_good_s * samplerate))
        self.pending = 0  # unusable samples not yet handed over (a run reaching the block's end)

    def blocks(self, y: np.ndarray, pos: int) -> list[Block]:
        """The usable parts of ``y`` (stream index ``pos`` of its first sample) as Blocks."""
        with np.errstate(all="ignore"):
            clean = math.isfinite(float(np.sum(y)))
        if clean:
            out = [Block(y, pos, gap_before=self.pending)] if len(y) else []
            self.pending = 0 if len(y) else self.pending
            return out
        bad = ~np.isfinite(y)
        if self.tally is not None:
            self.tally["nonfinite"] = self.tally.get("nonfinite", 0) + int(np.count_nonzero(bad))
        edges = np.flatnonzero(np.diff(np.concatenate([[True], bad, [True]]).astype(np.int8)))
        goods = [(int(a), int(b)) for a, b in zip(edges[0::2], edges[1::2])]  # runs of usable samples
        out, cursor = [], 0
        for i, (a, b) in enumerate(goods):
            inner = 0 < a and b < len(y)  # bounded by unusable samples on both sides
            if inner and b - a < self.min_good:
                continue  # too short to analyze between two runs: part of the gap
            out.append(Block(y[a:b], pos + a, gap_before=self.pending + a - cursor))
            self.pending, cursor = 0, b
        self.pending += len(y) - cursor
        return out

    def end(self, pos: int) -> list[Block]:
        """An unusable stretch at the end of the file: an empty block after it, so it counts as a gap."""
        if not self.pending:
            return []
        out = [Block(np.zeros(0, dtype=np.float32), pos, gap_before=self.pending)]
        self.pending = 0
        return out


def blocks(path: str, info: FileInfo, channel: int, block_frames: int = BLOCK_FRAMES, *,
           start_frame: int = 0, tally: dict | None = None, integers: bool = False) -> Iterator[Block]:
    """Yield the chosen channel as float32 Blocks; the file is closed even if abandoned early.

    With ``start_frame`` reading starts there, and the blocks count samples from it (a log
    resumed part-way through a file).  Float samples that are not numbers are lost audio: they
    become gaps (``Block.gap_before``) and are counted in ``tally["nonfinite"]`` when a dict is given.  With ``integers``, 8-, 16- and
    24-bit PCM comes as read (int16 or int32 Blocks with their ``scale``; the analyzer converts
    only what it needs, skipping a pass over every sample); other files as float32 still.
    """
    if not 0 <= channel < info.channels:
        raise ParameterError(f"--channel {channel}: {info.path} has channels 0..{info.channels - 1}")
    pos = 0
    if info.format == FFMPEG_FORMAT:
        yield from _ffmpeg_blocks(path, info, channel, block_frames, start_frame, tally)
        return
    # Integer PCM is read as integers and scaled here: libsndfile's own float conversion costs
    # ~5x the rest of reading.  The result is the same float32 (1/2^15 and 1/2^31 are powers of
    # two; 24-bit samples are exact in float32), as tests/test_audiofile.py checks.
    dtype, scale = _NATIVE_READ.get(info.subtype, ("float32", None))
    unusable = _Unusable(info.samplerate, tally)
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
                    yield from unusable.blocks(np.ascontiguousarray(x[:, channel]), pos)
                elif integers:
                    yield Block(np.ascontiguousarray(x[:, channel]), pos, scale=float(scale))
                else:
                    yield Block(samples_as_float32(x[:, channel], scale), pos)
                pos += len(x)
    except (sf.LibsndfileError, OSError) as e:
        if pos == 0:
            raise InputError(f"{path}: cannot read audio ({_short(e)})") from e
    yield from unusable.end(pos)


def _ffmpeg_blocks(path: str, info: FileInfo, channel: int, block_frames: int, start_frame: int,
                   tally: dict | None = None) -> Iterator[Block]:
    pos = 0
    skip = int(start_frame)  # decoded and dropped: exact to the sample, as libsndfile's seek
    unusable = _Unusable(info.samplerate, tally)
    try:
        for x in _ffmpeg_frames(path, info, block_frames):
            if skip:
                drop = min(skip, len(x))
                x, skip = x[drop:], skip - drop
                if not len(x):
                    continue
            yield from unusable.blocks(np.ascontiguousarray(x[:, channel]), pos)
            pos += len(x)
    except _FfmpegFailed as e:
        if pos == 0:
            raise InputError(f"{path}: cannot decode audio (ffmpeg: {e})") from e
        # a truncated or damaged tail: keep what was decoded
    yield from unusable.end(pos)


def audio_format_for(path: str, subtype: str | None = None) -> tuple[str, str]:
    """(format, subtype) that ``path``'s extension asks for (lossless defaults: 24-bit, WAV float)."""
    ext = os.path.splitext(path)[1].lower()
    fmt = {".wav": "WAV", ".flac": "FLAC", ".ogg": "OGG", ".oga": "OGG", ".opus": "OGG", ".mp3": "MP3",
           ".aiff": "AIFF", ".aif": "AIFF", ".w64": "W64", ".caf": "CAF"}.get(ext)
    if fmt is None:
        raise ParameterError(f"{path}: unknown audio extension {ext!r} (use .wav, .flac, .ogg, .opus or .mp3)")
    if subtype is None:
        subtype = "OPUS" if ext == ".opus" else {"OGG": "VORBIS", "MP3": "MPEG_LAYER_III", "WAV": "FLOAT"}.get(fmt, "PCM_24")
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


def read_block_readings(path: str) -> tuple[list[tuple[float, float]], int | None]:
    """The (start sample, host time) rows of a capture's PATH.blocks.csv (written by
    :class:`LiveRecorder`), and the sample rate of its audio file when that lies beside it."""
    import csv

    rows = []
    try:
        with open(path) as f:
            for r in csv.DictReader(f):
                rows.append((float(r["start_sample"]), float(r["host_time_s"])))
    except (OSError, KeyError, ValueError, TypeError) as e:
        raise ParameterError(f"{path}: not a tickscope blocks file ({e})") from e
    audio = path[: -len(".blocks.csv")] if path.endswith(".blocks.csv") else None
    rate = None
    if audio and os.path.exists(audio):
        try:
            rate = int(sf.info(audio).samplerate)
        except (sf.LibsndfileError, RuntimeError) as e:
            raise InputError(f"{audio}: {_short(e)}") from e
    return rows, rate
