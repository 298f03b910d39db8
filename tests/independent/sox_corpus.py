"""Tick trains built with Debian's sox (no tickscope code): truth from the construction.

Ticks
    ``synth L pluck F`` (Karplus-Strong) or ``synth L sine F 0 25 fade l 0 L L`` (a cosine burst,
    abrupt at sample 0, under sox's logarithmic fade-out).  sox's 'l' fade is
    gain = 10^(-5*(1 - fraction)) (sox src/fade.c, from memory; checked by a Hilbert-envelope fit in
    tests/test_independent.py): 100 dB over the fade length L, i.e. an exponential amplitude decay
    with tau = L / (5 ln 10) = L / 11.513.  A pluck's decay is not set by us: its decay truth is null.
    Alternating polarities are two different tick sounds: a pluck and one an octave up, a pluck and
    its inverse, or two sine bursts of different pitch.

Trains
    Each tick is padded by sox (``pad 0 Ns``) to an exact number of samples P (the step period), a
    pair of ticks is repeated by sox (``repeat``) or units are concatenated with exact-length silent
    units (missed ticks).  Tick j starts at sample lead + j*P exactly.

Time bases
    * sox-clean: the file's rate FS; or the samples relabelled with another header rate FS' (sox
      reads the raw samples as FS'): every time is n/FS' and the interval P/FS'.
    * sox-resampled: ``speed F rate -v FS``: a sound at t goes to t/F (sox compensates its resampler's
      delay; checked in the tests), the interval P/(F*FS).
    Rate (s/day, positive gains) = 86400 * (1 s / interval - 1).
What is timed: the first sample of each tick sound (both tick kinds start abruptly).
"""
from __future__ import annotations

import math

import numpy as np

from . import effects as fx

LN10x5 = 5 * math.log(10)


#: every tick array starts with this much silence (its sound begins at sample TICK_LEAD_S * fs, an
#: integer at every rate used here): room for a resampled pluck's pre-ringing
TICK_LEAD_S = 0.02


def tick(kind: str, freq_hz: float, samplerate: int, *, length_s: float = 0.05, invert: bool = False) -> tuple[np.ndarray, float | None]:
    """One tick from sox, its sound starting at sample TICK_LEAD_S * samplerate; returns
    (samples, amplitude decay time constant in ms or None).  sox's pluck runs only at 44.1-48 kHz:
    at other rates it is made at 48 kHz and converted by sox ``rate -v`` (linear phase, delay
    compensated: its start stays at TICK_LEAD_S)."""
    lead = int(round(TICK_LEAD_S * samplerate))
    if kind == "pluck":
        fade = ["fade", "l", "0", f"{length_s}", f"{length_s * 0.5}"]
        if samplerate in (44100, 48000):
            x = np.concatenate([np.zeros(lead, np.float32),
                                fx.sox_synth(["synth", f"{length_s}", "pluck", f"{freq_hz:.3f}"] + fade, samplerate)])
        else:
            x = fx.sox_synth(["synth", f"{length_s}", "pluck", f"{freq_hz:.3f}"] + fade
                             + ["pad", f"{TICK_LEAD_S}", "0.01", "rate", "-v", str(samplerate)], 48000)
            # sox ran at 48 kHz and resampled; read back at samplerate
        tau = None
    elif kind == "sine":
        x = np.concatenate([np.zeros(lead, np.float32), fx.sox_synth(
            ["synth", f"{length_s}", "sine", f"{freq_hz:.3f}", "0", "25", "fade", "l", "0", f"{length_s}", f"{length_s}"], samplerate)])
        tau = length_s / LN10x5 * 1e3
    else:
        raise ValueError(kind)
    x = x.astype(np.float64)
    return (-x if invert else x), tau


def tick_pair(rng: np.random.Generator, samplerate: int) -> dict:
    """Two alternating tick sounds (A, B) from sox."""
    style = str(rng.choice(["pluck-octave", "pluck-inverted", "sine-pair", "pluck-sine"]))
    f = float(rng.uniform(2000, 3000))
    f = min(f, 0.4 * samplerate)
    if style == "pluck-octave":
        f = min(float(rng.uniform(1500, 2050)), 0.2 * samplerate)
        fb = 2 * f  # an octave up (sox's pluck takes up to ~4.2 kHz)
        a, ta = tick("pluck", f, samplerate, length_s=float(rng.uniform(0.03, 0.06)))
        b, tb = tick("pluck", fb, samplerate, length_s=float(rng.uniform(0.03, 0.06)))
    elif style == "pluck-inverted":
        length = float(rng.uniform(0.03, 0.06))
        a, ta = tick("pluck", f, samplerate, length_s=length)
        b, tb = tick("pluck", f, samplerate, length_s=length, invert=True)
    elif style == "sine-pair":
        a, ta = tick("sine", f, samplerate, length_s=float(rng.uniform(0.035, 0.09)))
        b, tb = tick("sine", min(f * float(rng.uniform(1.1, 1.3)), 0.42 * samplerate), samplerate,
                     length_s=float(rng.uniform(0.035, 0.09)))
    else:
        a, ta = tick("pluck", f, samplerate, length_s=float(rng.uniform(0.03, 0.06)))
        b, tb = tick("sine", min(f * 1.15, 0.42 * samplerate), samplerate, length_s=float(rng.uniform(0.035, 0.09)))
    gb = 10 ** (float(rng.uniform(-2, 0)) / 20)
    return dict(style=style, a=a, b=b * gb, tau_a_ms=ta, tau_b_ms=tb, freq_hz=f)


def unit(x: np.ndarray, period: int, samplerate: int) -> np.ndarray:
    """A tick padded by sox to exactly ``period`` samples (``pad 0 Ns``)."""
    y = fx.sox_process(x, samplerate, ["pad", "0", f"{period - len(x)}s"]).astype(np.float64)
    assert len(y) == period, (len(y), period)
    return y


def train(pair: dict, period: int, n_ticks: int, samplerate: int, *, lead: int, missed: set) -> np.ndarray:
    """The train: lead silence, then n_ticks units alternating A, B (missed slots silent)."""
    ua, ub = unit(pair["a"], period, samplerate), unit(pair["b"], period, samplerate)
    if not missed and n_ticks % 2 == 0:
        body = fx.sox_process(np.concatenate([ua, ub]), samplerate, ["repeat", str(n_ticks // 2 - 1)]).astype(np.float64)
    else:
        silent = np.zeros(period)
        body = np.concatenate([silent if j in missed else (ua if j % 2 == 0 else ub) for j in range(n_ticks)])
    return np.concatenate([np.zeros(lead), body])


def snr_power(pair: dict, samplerate: int) -> float:
    """Mean power of the ticks over their first 10 ms (A and B averaged)."""
    m = int(0.010 * samplerate)
    i = int(round(TICK_LEAD_S * samplerate))
    return 0.5 * (np.mean(pair["a"][i:i + m] ** 2) + np.mean(pair["b"][i:i + m] ** 2))


def crlb_us(pair: dict, samplerate: float, sigma: float) -> float:
    """Cramer-Rao bound on one tick's time in white noise of SD sigma, sampled form
    var >= sigma^2 / sum((ds/dt)^2) (Kay 1993, from memory), ds/dt by FFT differentiation; the
    RMS over the two tick sounds."""
    v = []
    for s in (pair["a"], pair["b"]):
        n = 1 << int(math.ceil(math.log2(len(s) * 2)))
        spec = np.fft.rfft(np.concatenate([np.zeros(16), s]), n)
        w = 2 * np.pi * np.fft.rfftfreq(n, 1.0 / samplerate)
        ds = np.fft.irfft(1j * w * spec, n)
        v.append(sigma ** 2 / np.sum(ds ** 2))
    return float(math.sqrt(np.mean(v)) * 1e6)


def build(kind: str, rng: np.random.Generator, *, duration_s: float | None = None, n_ticks: int | None = None,
          noise: str | None = None, snr_db: float | None = None, allow_missed: bool = True) -> tuple[np.ndarray, int, dict]:
    """A sox corpus case: kind 'clean' | 'resampled' | 'noisy'.  Returns (audio, header rate, truth)."""
    fs = int(rng.choice([8000, 16000, 22050, 32000, 44100, 48000]))
    pair = tick_pair(rng, fs)
    dur = float(rng.uniform(60, 120)) if duration_s is None else duration_s
    lead = int(rng.integers(int(0.2 * fs), int((0.45 if n_ticks else 0.7) * fs)))
    header = fs
    speed = 1.0
    if kind == "resampled":
        period = fs
        speed = 1.0 + float(rng.uniform(-1.5e-4, 1.5e-4))
    else:
        lim = max(1, round(fs * 3e-4))
        period = fs + int(rng.integers(-lim, lim + 1))
        if rng.random() < 0.5:
            lim = max(1, round(fs * 4e-4))
            header = fs + int(rng.integers(-lim if fs > 8000 else 0, lim + 1))  # relabelled: a known rate offset
    if n_ticks is None:
        n_ticks = int((dur * header / 1.0 - lead - 0.1 * fs) // period) + 1
        n_ticks -= n_ticks % 2 if kind == "resampled" else 0
    missed: set = set()
    if allow_missed and kind != "resampled" and rng.random() < 0.5:
        missed = set(int(v) for v in rng.choice(np.arange(3, n_ticks - 3), size=int(rng.integers(1, 4)), replace=False))
    x = train(pair, period, n_ticks, fs, lead=lead, missed=missed)
    onset_samples = lead + int(round(TICK_LEAD_S * fs)) + period * np.arange(n_ticks, dtype=np.float64)
    if kind == "resampled":
        x = fx.sox_speed(x, fs, speed)
        onset_samples = onset_samples / speed
    n_total = int(math.ceil(dur * header)) if duration_s is not None else len(x) + int(0.3 * fs)
    y = np.zeros(max(n_total, len(x)))
    y[:len(x)] = x
    if duration_s is not None:
        y = y[:n_total]  # the last unit's silence runs past a short clip's end
    # noise (sox synth), at a stated SNR: tick power over its first 10 ms / noise variance
    noise = noise or ("whitenoise" if kind != "noisy" else str(rng.choice(["whitenoise", "pinknoise", "brownnoise"])))
    snr = snr_db if snr_db is not None else (float(rng.uniform(40, 50)) if kind != "noisy" else float(rng.uniform(8, 30)))
    peak_target = 10 ** (float(rng.uniform(-24, -6)) / 20)
    g = peak_target / max(np.max(np.abs(pair["a"])), np.max(np.abs(pair["b"])))
    sigma = math.sqrt(snr_power(pair, fs) * g * g / 10 ** (snr / 10))
    nz = fx.sox_noise(noise, len(y), fs, int(rng.integers(1 << 30)))
    y = fx.sox_mix([(y, g), (nz, sigma)], fs).astype(np.float64)
    keep = sorted(set(range(n_ticks)) - missed)
    interval = period / header / speed
    pairg = dict(a=pair["a"] * g, b=pair["b"] * g)
    truth = dict(
        kind="stepping", samplerate=header, duration_s=len(y) / header, interval_s=1.0,
        rate_s_per_day=86400.0 * (1.0 / interval - 1.0),
        step_times_s=[float(onset_samples[j] / header) for j in keep],
        step_numbers=keep, polarities=["A" if j % 2 == 0 else "B" for j in keep],
        missed_steps=sorted(missed), failed_steps=[], aligned_steps=[], correction_pulses=[],
        burst=None, inhibition=None, drive_levels=None, other_clock=None, position_locked=None,
        decay_ms=({"A": pair["tau_a_ms"], "B": pair["tau_b_ms"]} if pair["tau_a_ms"] and pair["tau_b_ms"] else None),
        snr_db=snr, crlb_us=(crlb_us(pairg, header, sigma) if noise == "whitenoise" else None),
        lossy=None, room=None, drops=[], timing_scored=True,
        notes=(f"sox {pair['style']} ticks at {pair['freq_hz']:.0f} Hz, period {period} samples, written at {fs} Hz"
               + (f", header relabelled {header} Hz" if header != fs else "")
               + (f", sox speed {speed!r} rate -v {fs}" if speed != 1.0 else "")
               + f", {noise} at {snr:.1f} dB; times are sample 0 of each tick"),
        construction=dict(samplerate_written=fs, period_samples=period, lead_samples=lead, speed=speed,
                          header_rate=header, style=pair["style"]),
    )
    return y.astype(np.float32), header, truth
