"""Thin wrappers over outside tools used by the independent corpora (none of them is tickscope).

* sox (Debian's ``sox`` command, via subprocess): tick synthesis, noise, mixing (``-m``), speed
  change with resampling, sample-rate conversion.
* pyroomacoustics (PyPI): room impulse responses of a ShoeBox room (image source method).
* pedalboard (PyPI, Spotify): a phone's gain control (Compressor), noise gate (NoiseGate), high-
  and low-pass filters, clipping.
* ffmpeg (Debian's ``ffmpeg`` command): lossy codec round trips through temporary files.
* numpy/scipy: mains hum, speech-like bursts, dropped buffers, rumble.
"""
from __future__ import annotations

import math
import os
import shutil
import subprocess
import tempfile
from dataclasses import dataclass

import numpy as np
from scipy import signal

SOX = shutil.which("sox")
FFMPEG = shutil.which("ffmpeg")
_RAW = ["-t", "raw", "-e", "floating-point", "-b", "32", "-c", "1"]


class ToolMissing(RuntimeError):
    """A command-line tool the corpus needs is not installed."""


def need(tool: str) -> str:
    path = {"sox": SOX, "ffmpeg": FFMPEG}[tool]
    if not path:
        raise ToolMissing(f"{tool} is not installed")
    return path


# --------------------------------------------------------------------------------------------- sox


def sox_synth(args: list[str], samplerate: int) -> np.ndarray:
    """``sox -n ... synth ARGS`` as float32 (repeatable mode -R, no dither -D)."""
    # the rate goes before the null input (after it, sox would synthesise at 48 kHz and resample)
    cmd = [need("sox"), "-R", "-D", "-r", str(samplerate), "-n"] + _RAW + ["-"] + [str(a) for a in args]
    r = subprocess.run(cmd, capture_output=True, check=True)
    return np.frombuffer(r.stdout, np.float32).copy()


def sox_process(x: np.ndarray, samplerate: int, effects: list[str]) -> np.ndarray:
    """Pipe float32 samples through sox effects (e.g. ``['speed', '1.0001', 'rate', '-v', '48000']``)."""
    cmd = [need("sox"), "-R", "-D", "-r", str(samplerate)] + _RAW + ["-"] + _RAW + ["-"] + [str(a) for a in effects]
    r = subprocess.run(cmd, input=np.asarray(x, np.float32).tobytes(), capture_output=True, check=True)
    return np.frombuffer(r.stdout, np.float32).copy()


def sox_speed(x: np.ndarray, samplerate: int, factor: float) -> np.ndarray:
    """sox ``speed F rate -v FS``: plays F times faster, resampled back to FS (an event at t goes to t/F)."""
    return sox_process(x, samplerate, ["speed", repr(float(factor)), "rate", "-v", str(samplerate)])


def sox_resample(x: np.ndarray, samplerate: int, out_rate: int) -> np.ndarray:
    """sox ``rate -v`` (linear phase, its delay compensated: an event at t stays at t)."""
    return sox_process(x, samplerate, ["rate", "-v", str(out_rate)])


def sox_noise(kind: str, n: int, samplerate: int, seed: int) -> np.ndarray:
    """Unit-RMS noise from sox ``synth whitenoise|pinknoise|brownnoise``.  sox's repeatable mode gives
    one fixed sequence; the seed picks where in a longer run of it this noise starts."""
    if kind not in ("whitenoise", "pinknoise", "brownnoise"):
        raise ValueError(kind)
    skip = int(np.random.default_rng(seed).integers(0, 20 * samplerate))
    x = sox_synth(["synth", f"{n + skip}s", kind], samplerate)[skip:skip + n].astype(np.float64)
    if kind == "brownnoise":
        x = signal.sosfiltfilt(signal.butter(2, 20.0, "highpass", fs=samplerate, output="sos"), x)
    x -= x.mean()
    return x / (np.sqrt(np.mean(x ** 2)) + 1e-30)


def sox_mix(parts: list[tuple[np.ndarray, float]], samplerate: int) -> np.ndarray:
    """``sox -m``: the sum of the parts with the given linear gains.  sox clips float input beyond
    +-1 as it reads it, so each part is scaled by its gain before it is written (``-v 1``)."""
    sox = need("sox")
    n = max(len(p) for p, _ in parts)
    with tempfile.TemporaryDirectory(prefix="tsmix") as d:
        cmd = [sox, "-R", "-D", "-m"]
        for j, (p, g) in enumerate(parts):
            f = os.path.join(d, f"p{j}.f32")
            q = np.zeros(n, np.float32)
            q[:len(p)] = np.asarray(p, np.float64) * g
            if np.max(np.abs(q)) > 1.0:
                raise ValueError("a part of the mix exceeds full scale")
            q.tofile(f)
            cmd += ["-v", "1", "-r", str(samplerate)] + _RAW + [f]
        cmd += _RAW + ["-"]
        r = subprocess.run(cmd, capture_output=True, check=True)
    return np.frombuffer(r.stdout, np.float32).copy()


# ------------------------------------------------------------------------------- pyroomacoustics


@dataclass
class Room:
    rir: np.ndarray  # the direct path arrives at sample direct_delay_s * fs of this response
    samplerate: int
    direct_delay_s: float
    distance_m: float
    rt60_s: float
    dims_m: tuple
    absorption: float


def shoebox_room(samplerate: int, rng: np.random.Generator, *, rt60_s: float | None = None,
                 distance_m: float | None = None, sources: int = 1) -> list[Room]:
    """ShoeBox room (pyroomacoustics): random size, absorption from Sabine's formula for a random
    RT60 (``pra.inverse_sabine``), microphone near the first source; one response per source.

    pyroomacoustics delays every response by frac_delay_length // 2 samples (its fractional delay
    filter, documented in pyroomacoustics.room); that delay is removed here, so the direct path of
    source s arrives distance/c after emission."""
    import pyroomacoustics as pra

    dims = np.array([rng.uniform(3, 7), rng.uniform(3, 6), rng.uniform(2.4, 3.2)])
    rt60 = float(rng.uniform(0.15, 0.6)) if rt60_s is None else float(rt60_s)
    e_abs, max_order = pra.inverse_sabine(rt60, dims)
    max_order = int(min(max_order, 14))
    room = pra.ShoeBox(dims, fs=samplerate, materials=pra.Material(float(e_abs)), max_order=max_order)
    src0 = np.array([rng.uniform(0.5, dims[0] - 0.5), rng.uniform(0.5, dims[1] - 0.5), rng.uniform(1.0, 2.0)])
    dist = float(rng.uniform(0.15, 1.2)) if distance_m is None else float(distance_m)
    direction = rng.normal(size=3)
    direction /= np.linalg.norm(direction)
    mic = np.clip(src0 + dist * direction, 0.2, dims - 0.2)
    positions = [src0]
    for _ in range(sources - 1):
        positions.append(np.array([rng.uniform(0.4, dims[0] - 0.4), rng.uniform(0.4, dims[1] - 0.4), rng.uniform(0.8, 2.2)]))
    for p in positions:
        room.add_source(p)
    room.add_microphone(mic)
    room.compute_rir()
    gd = pra.constants.get("frac_delay_length") // 2
    out = []
    for s, p in enumerate(positions):
        h = np.asarray(room.rir[0][s], np.float64)[gd:]
        d = float(np.linalg.norm(p - mic))
        out.append(Room(h, samplerate, d / room.c, d, rt60, tuple(float(v) for v in dims), float(e_abs)))
    return out


def apply_room(x: np.ndarray, room: Room) -> np.ndarray:
    """Convolve with the room response, same length, normalised so the direct path has gain 1."""
    h = room.rir / (1.0 / (4 * math.pi * room.distance_m))
    return signal.oaconvolve(x, h)[:len(x)]


# -------------------------------------------------------------------------------------- pedalboard


def phone_chain(x: np.ndarray, samplerate: int, rng: np.random.Generator, *, agc: bool = True,
                gate_db: float | None = None, highpass_hz: float | None = 120.0,
                lowpass_hz: float | None = None) -> tuple[np.ndarray, dict]:
    """A phone's input chain with pedalboard: high-pass, gain control (Compressor + makeup Gain),
    noise gate, low-pass.  Returns the audio and the settings used."""
    import pedalboard as pb

    plugins = []
    cfg: dict = {}
    if highpass_hz:
        plugins.append(pb.HighpassFilter(cutoff_frequency_hz=float(highpass_hz)))
        cfg["highpass_hz"] = float(highpass_hz)
    if agc:
        thr = float(rng.uniform(-38, -26))
        ratio = float(rng.uniform(3, 10))
        att = float(rng.uniform(0.5, 5))
        rel = float(rng.uniform(80, 400))
        plugins += [pb.Compressor(threshold_db=thr, ratio=ratio, attack_ms=att, release_ms=rel),
                    pb.Gain(gain_db=float(-thr * (1 - 1 / ratio) * 0.6))]
        cfg["agc"] = dict(threshold_db=thr, ratio=ratio, attack_ms=att, release_ms=rel)
    if gate_db is not None:
        rel = float(rng.uniform(40, 150))
        plugins.append(pb.NoiseGate(threshold_db=float(gate_db), ratio=10.0, attack_ms=1.0, release_ms=rel))
        cfg["gate"] = dict(threshold_db=float(gate_db), release_ms=rel)
    if lowpass_hz:
        plugins.append(pb.LowpassFilter(cutoff_frequency_hz=float(lowpass_hz)))
        cfg["lowpass_hz"] = float(lowpass_hz)
    board = pb.Pedalboard(plugins)
    y = board(np.asarray(x, np.float32)[None, :], float(samplerate))[0]
    return y.astype(np.float64), cfg


def clip(x: np.ndarray, threshold_db: float) -> np.ndarray:
    """Hard clipping (pedalboard Clipping)."""
    import pedalboard as pb

    return pb.Clipping(threshold_db=float(threshold_db))(np.asarray(x, np.float32)[None, :], 48000.0)[0].astype(np.float64)


# ------------------------------------------------------------------------------------------ ffmpeg

CODECS = {  # name -> (ffmpeg encoder, file suffix)
    "mp3": ("libmp3lame", ".mp3"),
    "aac": ("aac", ".m4a"),
    "opus": ("libopus", ".opus"),
    "vorbis": ("libvorbis", ".ogg"),
}


def codec_roundtrip(x: np.ndarray, samplerate: int, codec: str, bitrate: str) -> tuple[np.ndarray, bytes, str]:
    """Encode 16-bit PCM of ``x`` with ffmpeg, decode it back with ffmpeg (which drops the
    encoder's priming samples as the container says).  Returns (decoded audio at the input rate,
    trimmed/padded to the input length; the encoded file's bytes; its suffix)."""
    ff = need("ffmpeg")
    import soundfile as sf

    enc, suffix = CODECS[codec]
    with tempfile.TemporaryDirectory(prefix="tscodec") as d:
        src = os.path.join(d, "in.wav")
        out = os.path.join(d, "out" + suffix)
        sf.write(src, np.clip(x, -1, 1).astype(np.float32), samplerate, subtype="PCM_16")
        extra = ["-aac_coder", "fast"] if enc == "aac" else []
        subprocess.run([ff, "-v", "error", "-nostdin", "-y", "-i", src, "-c:a", enc] + extra + ["-b:a", bitrate, "-ac", "1", out],
                       check=True, capture_output=True)
        data = open(out, "rb").read()
        r = subprocess.run([ff, "-v", "error", "-nostdin", "-i", out, "-f", "f32le", "-ac", "1", "-ar", str(samplerate), "-"],
                           check=True, capture_output=True)
    y = np.frombuffer(r.stdout, np.float32).astype(np.float64)
    z = np.zeros(len(x))
    z[:min(len(x), len(y))] = y[:len(x)]
    return z, data, suffix


# ------------------------------------------------------------------------------------ numpy/scipy


def mains_hum(n: int, samplerate: int, f0_hz: float, amplitude: float, rng: np.random.Generator) -> np.ndarray:
    """Mains hum: the fundamental and odd harmonics (3rd, 5th, 7th) with random phases (numpy)."""
    t = np.arange(n) / samplerate
    out = np.zeros(n)
    for h, a in ((1, 1.0), (3, 0.5), (5, 0.25), (7, 0.12)):
        if h * f0_hz < 0.45 * samplerate:
            out += a * np.sin(2 * np.pi * h * f0_hz * t + rng.uniform(0, 2 * np.pi))
    return amplitude * out


def speech_like(n: int, samplerate: int, rng: np.random.Generator, *, phrases_per_min: float = 4.0) -> np.ndarray:
    """Speech-like interference: white noise through three formant resonators that move per syllable,
    under a syllable envelope (~4-6 syllables/s) in phrases of 1-3 s (scipy.signal).  Unit peak-ish."""
    out = np.zeros(n)
    dur = n / samplerate
    n_phr = rng.poisson(phrases_per_min * dur / 60.0)
    for _ in range(n_phr):
        t0 = rng.uniform(0, max(dur - 3, 0.1))
        length = rng.uniform(1.0, 3.0)
        i0, i1 = int(t0 * samplerate), min(n, int((t0 + length) * samplerate))
        m = i1 - i0
        if m < 100:
            continue
        src = rng.normal(size=m)
        seg = np.zeros(m)
        syl = rng.uniform(4, 6)
        bounds = np.cumsum(rng.uniform(0.6, 1.4, size=int(length * syl) + 2) / syl)
        start = 0
        for b in bounds:
            stop = min(m, int(b * samplerate))
            if stop - start < 50:
                continue
            part = src[start:stop]
            y = np.zeros_like(part)
            for f, bw in ((rng.uniform(300, 800), 90), (rng.uniform(900, 2200), 120), (rng.uniform(2300, 3200), 160)):
                if f < 0.45 * samplerate:
                    b_, a_ = signal.iirpeak(f, f / bw, fs=samplerate)
                    y += signal.lfilter(b_, a_, part)
            k = np.arange(len(part))
            y *= np.sin(np.pi * k / len(part)) ** 2
            seg[start:stop] = y
            start = stop
        out[i0:i1] += seg
    pk = np.max(np.abs(out))
    return out / pk if pk > 0 else out


def rumble(n: int, samplerate: int, rng: np.random.Generator) -> np.ndarray:
    """Handling rumble: low-passed noise below ~15 Hz plus a slow swing, unit peak (scipy.signal)."""
    x = rng.normal(size=n)
    x = signal.sosfiltfilt(signal.butter(2, 15.0, fs=samplerate, output="sos"), x)
    x += 0.5 * np.std(x) * 3 * np.sin(2 * np.pi * rng.uniform(0.5, 3) * np.arange(n) / samplerate)
    return x / np.max(np.abs(x))


def drop_buffers(x: np.ndarray, samplerate: int, rng: np.random.Generator, onsets_s: np.ndarray, *,
                 count: int, block: int) -> tuple[np.ndarray, list[dict]]:
    """Lost buffers: ``count`` blocks of ``block`` samples cut out (the samples after them move
    earlier).  Blocks are cut only in the quiet between sounds (>= 120 ms after and >= 60 ms
    before an onset), so every onset keeps its sound and its new time is exactly
    old - dropped_before / fs.  Returns the audio and [{at_s (output time), samples}]."""
    onsets = np.sort(np.asarray(onsets_s))
    n = len(x)
    cand = []
    for _ in range(200 * count):
        s = int(rng.integers(int(0.05 * n), int(0.95 * n)))
        t0, t1 = s / samplerate, (s + block) / samplerate
        before = onsets[onsets <= t1]
        after = onsets[onsets >= t0]
        if len(before) and t0 - before[-1] < 0.12:
            continue
        if len(after) and after[0] - t1 < 0.06:
            continue
        if any(abs(s - c) < 4 * block for c in cand):
            continue
        cand.append(s)
        if len(cand) == count:
            break
    cand.sort()
    keep = np.ones(n, bool)
    drops = []
    removed = 0
    for s in cand:
        keep[s:s + block] = False
        drops.append(dict(at_s=(s - removed) / samplerate, samples=int(block), input_sample=int(s)))
        removed += block
    return x[keep], drops


def shift_for_drops(times_s: np.ndarray, drops: list[dict], samplerate: int) -> np.ndarray:
    """Times on the output time base after the drops (events after a drop move earlier)."""
    out = np.asarray(times_s, np.float64).copy()
    for d in drops:
        out[np.asarray(times_s) * samplerate >= d["input_sample"] + d["samples"]] -= d["samples"] / samplerate
    return out
