"""The sound of a simulated room, shared by the simulators of stepping motors and escapements (pure).

Sounds are :class:`SoundEvent` s (damped multi-mode impulses, knocks, voices) placed at exact
fractional times and evaluated at each sample instant (:class:`EventMixer`); the room and the
recorder are a :class:`RecordingChain` (reverberation, noise at a stated SNR, mains hum, DC, a
phone's gain control or noise gate, clipping); :func:`room_transients` and
:func:`second_clock_events` add knocks, voices and another clock.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..units import interval_from_rate

#: The voice of a second clock elsewhere in the room.
SECOND_CLOCK_MODES = ((1400.0, 7.0, 1.0), (3300.0, 3.0, 0.5))
RISE_S = 0.08e-3  # attack time constant of a drive impulse (80 us)


def _signal():
    """scipy.signal, imported on first use (it takes a second or two to import)."""
    from scipy import signal

    return signal


@dataclass
class SoundEvent:
    """One sound of a simulated room: a damped multi-mode impulse (or a knock, a voice) at an exact time.

    ``t_true_s`` is on the true time base (before the recording device's clock error); ``amp`` is
    the peak level (full scale); ``modes`` are (frequency Hz, amplitude decay constant ms, relative
    amplitude); ``rise_s`` is the attack time constant of the impulse.
    """

    t_true_s: float
    kind: str  # step | failed | correction | bounce | rattle | knock | voice | other_clock | (escapement sounds)
    amp: float
    modes: tuple[tuple[float, float, float], ...] = ()
    duration_s: float = 0.2
    noise_seed: int = 0
    rise_s: float = RISE_S


def modal_waveform(modes, t_s: np.ndarray, rise_s: float = RISE_S) -> np.ndarray:
    """Sum of damped sinusoids with a soft attack, evaluated at times t_s (s, >= 0 only)."""
    out = np.zeros_like(t_s)
    pos = t_s >= 0
    t = t_s[pos]
    w = np.zeros_like(t)
    for i, (f, tau_ms, a) in enumerate(modes):
        w += a * np.exp(-t / (tau_ms * 1e-3)) * np.sin(2 * np.pi * f * t + 0.3 * i)
    w *= 1.0 - np.exp(-t / rise_s)
    out[pos] = w
    return out



def band_limit(modes, samplerate_hz: float):
    """Drop resonances the recorder's anti-alias filter would remove (above 0.45 fs)."""
    kept = tuple(m for m in modes if m[0] < 0.45 * samplerate_hz)
    return kept or ((0.2 * samplerate_hz, modes[0][1], modes[0][2]),)


def room_transients(rng: np.random.Generator, *, duration_s: float, per_min: float, level: float,
                    transient_db: float) -> tuple[list[SoundEvent], list[dict]]:
    """Knocks and speech-like bursts at random times (Poisson, ``per_min`` a minute), with their truth records.

    A knock peaks ``transient_db`` over ``level``, a voice 12 dB under the knocks.  Draws from ``rng``.
    """
    n_tr = rng.poisson(per_min * duration_s / 60.0) if per_min > 0 else 0
    events: list[SoundEvent] = []
    transients = []
    for _ in range(n_tr):
        t = float(rng.uniform(0.2, max(0.3, duration_s - 0.5)))
        if rng.random() < 0.6:
            events.append(SoundEvent(t, "knock", level * 10 ** (transient_db / 20), (), 0.04, int(rng.integers(1 << 30))))
            transients.append({"time_true_s": t, "kind": "knock"})
        else:
            dur = float(rng.uniform(0.25, 0.7))
            events.append(SoundEvent(t, "voice", level * 10 ** ((transient_db - 12) / 20), (), dur, int(rng.integers(1 << 30))))
            transients.append({"time_true_s": t, "kind": "voice", "duration_s": dur})
    return events, transients


def second_clock_events(*, duration_s: float, rate_s_per_day: float, level: float, level_db: float,
                        offset_s: float, samplerate_hz: float, interval_s: float = 1.0) -> list[SoundEvent]:
    """The ticks of a second (quartz) clock elsewhere in the room: one every ``interval_s`` at its own rate."""
    iv2 = interval_from_rate(interval_s, rate_s_per_day)
    amp2 = level * 10 ** (level_db / 20)
    modes2 = band_limit(SECOND_CLOCK_MODES, samplerate_hz)
    events = []
    for j in range(int(duration_s / iv2) + 1):
        t = offset_s + j * iv2
        if t < duration_s:
            events.append(SoundEvent(t, "other_clock", amp2, modes2, 0.2))
    return events


def room_impulse_response(samplerate_hz: int, rt60_ms: float, rng: np.random.Generator) -> np.ndarray:
    """A room impulse response: the direct sound plus an exponentially decaying diffuse tail."""
    fs = samplerate_hz
    n = int(1.2 * rt60_ms * 1e-3 * fs) + 1
    t = np.arange(n) / fs
    tau = rt60_ms * 1e-3 / 6.908  # amplitude e-folding time for this RT60
    tail = rng.normal(0, 1, n) * np.exp(-t / tau)
    pre = int(0.002 * fs)  # first reflections arrive after 2 ms
    tail[:pre] = 0
    h = 0.35 * tail / math.sqrt(np.sum(tail**2) + 1e-30)
    h[0] = 1.0
    return h


class EventMixer:
    """Sums :class:`SoundEvent` s into consecutive chunks of samples on the recording device's clock.

    Each sound is evaluated analytically at the sample instants (never rounded to a sample):
    an event at true time ``t`` sits at device time ``t * (1 + clock_ppm * 1e-6)``.  ``events``
    must be sorted by time; chunks must be asked for in order.
    """

    def __init__(self, events: list[SoundEvent], samplerate_hz: int, clock_ppm: float):
        self.events = events
        self._fs = samplerate_hz
        self._scale = 1.0 + clock_ppm * 1e-6
        self._ev_i = 0
        self._active: list[SoundEvent] = []

    def mix(self, n0: int, n: int) -> np.ndarray:
        """The sounds of samples ``n0 .. n0 + n`` (before the room and the microphone)."""
        fs = self._fs
        scale = self._scale
        out = np.zeros(n)
        t_end_true = (n0 + n) / fs / scale
        while self._ev_i < len(self.events) and self.events[self._ev_i].t_true_s < t_end_true:
            self._active.append(self.events[self._ev_i])
            self._ev_i += 1
        keep = []
        for ev in self._active:
            # sample index range on the device clock
            s0 = int(math.floor(ev.t_true_s * scale * fs)) + 1
            s1 = int(math.ceil((ev.t_true_s + ev.duration_s) * scale * fs)) + 1
            a, b = max(s0, n0), min(s1, n0 + n)
            if a < b:
                idx = np.arange(a, b)
                t_rel = idx / fs / scale - ev.t_true_s  # true seconds since the onset
                if ev.kind == "knock":
                    r = np.random.default_rng(ev.noise_seed)
                    w = r.normal(0, 1, s1 - s0)[a - s0: b - s0] * np.exp(-t_rel / 0.004)
                    out[a - n0: b - n0] += ev.amp * 0.5 * w
                elif ev.kind == "voice":
                    r = np.random.default_rng(ev.noise_seed)
                    w = r.normal(0, 1, s1 - s0)
                    bb, aa = _signal().butter(2, [200 / (fs / 2), min(3000, 0.45 * fs) / (fs / 2)], "band")
                    w = _signal().lfilter(bb, aa, w)[a - s0: b - s0]
                    env = np.sin(np.pi * t_rel / ev.duration_s) * (0.6 + 0.4 * np.sin(2 * np.pi * 4.5 * t_rel))
                    out[a - n0: b - n0] += ev.amp * w * env
                elif ev.rise_s == RISE_S:
                    out[a - n0: b - n0] += ev.amp * modal_waveform(ev.modes, t_rel) / peak_level(ev.modes)
                else:
                    out[a - n0: b - n0] += (ev.amp * modal_waveform(ev.modes, t_rel, ev.rise_s)
                                            / peak_level(ev.modes, ev.rise_s))
            if s1 > n0 + n:
                keep.append(ev)
        self._active = keep
        return out


class RecordingChain:
    """What the room and the recorder do to the sounds, chunk by chunk, with state carried between chunks.

    In order: reverberation (convolution with ``rir``, its tail carried over), then per channel
    noise (white, or pink through a filter), mains hum, a DC offset and -- on ``signal_channel``
    only -- the sounds; then a phone's automatic gain control, a noise gate and hard clipping.
    The noise is drawn from ``rng`` per chunk and channel; the gain control and the gate work on
    whole frames of each chunk (1 ms and 0.5 ms), the remainder taking the last frame's gain, so
    the output depends on the chunk sizes -- give it the same chunks for the same output.
    """

    def __init__(self, *, samplerate_hz: int, channels: int, signal_channel: int, noise_sigma: float,
                 noise: str, rng: np.random.Generator, hum_hz: float = 0.0, hum_amp: float = 0.0,
                 dc_offset: float = 0.0, rir: np.ndarray | None = None, agc: bool = False,
                 gate_dbfs: float | None = None, clip_dbfs: float | None = None):
        self._fs = samplerate_hz
        self.channels = channels
        self.signal_channel = signal_channel
        self.noise_sigma = noise_sigma
        self.rng = rng
        self.hum_hz = hum_hz
        self.hum_amp = hum_amp
        self.dc_offset = dc_offset
        self.agc = agc
        self.gate_dbfs = gate_dbfs
        self.clip_dbfs = clip_dbfs
        self._pink_zi = None
        if noise == "pink":
            # Pink (1/f) noise filter; coefficients of the widely used 3-pole/3-zero
            # approximation (J. O. Smith, Spectral Audio Signal Processing, "Example:
            # Synthesis of 1/F Noise"; coefficients from memory).
            self._pink_b = np.array([0.049922035, -0.095993537, 0.050612699, -0.004408786])
            self._pink_a = np.array([1, -2.494956002, 2.017265875, -0.522189400])
            g = np.sqrt(np.mean(_signal().lfilter(self._pink_b, self._pink_a, self.rng.normal(0, 1, 1 << 16))[4096:] ** 2))
            self._pink_b = self._pink_b / g
            self._pink_zi = [_signal().lfilter_zi(self._pink_b, self._pink_a) * 0.0 for _ in range(channels)]
        self._rir = rir
        self._rev_tail = np.zeros(0)
        self._agc_level = 1e-3
        self._gate_gain = 0.0
        self._gate_hold = 0

    def process(self, dry: np.ndarray, n0: int) -> np.ndarray:
        """The recording of ``dry`` (the sounds of samples ``n0 .. n0 + len(dry)``): shape (n, channels)."""
        n = len(dry)
        fs = self._fs
        if self._rir is not None:
            wet = _signal().oaconvolve(dry, self._rir)
            wet[: len(self._rev_tail)] += self._rev_tail[: len(wet)]
            if len(self._rev_tail) > len(wet):
                rest = self._rev_tail[len(wet):]
                self._rev_tail = np.concatenate([wet[n:], np.zeros(0)])
                self._rev_tail[: len(rest)] += rest
            else:
                self._rev_tail = wet[n:].copy()
            dry = wet[:n]
        out = np.empty((n, self.channels))
        t = (n0 + np.arange(n)) / fs
        hum = 0.0
        if self.hum_hz > 0:
            a = self.hum_amp
            hum = a * (np.sin(2 * np.pi * self.hum_hz * t) + 0.5 * np.sin(2 * np.pi * 3 * self.hum_hz * t + 1)
                       + 0.25 * np.sin(2 * np.pi * 5 * self.hum_hz * t + 2))
        for c in range(self.channels):
            noise = self.rng.normal(0, self.noise_sigma, n)
            if self._pink_zi is not None:
                noise, self._pink_zi[c] = _signal().lfilter(self._pink_b, self._pink_a, noise, zi=self._pink_zi[c])
            x = noise + hum + self.dc_offset
            if c == self.signal_channel:
                x = x + dry
            out[:, c] = x
        if self.agc:
            out = self._apply_agc(out)
        if self.gate_dbfs is not None:
            out = self._apply_gate(out)
        if self.clip_dbfs is not None:
            lim = 10 ** (self.clip_dbfs / 20)
            np.clip(out, -lim, lim, out=out)
        return out

    @property
    def frame_samples(self) -> tuple[int, int]:
        """The frame lengths of the gain control and of the gate, samples."""
        return max(1, int(0.001 * self._fs)), max(1, int(0.0005 * self._fs))

    @staticmethod
    def _frames(x: np.ndarray, frame: int):
        """RMS level of x [n, channels] over consecutive frames of `frame` samples."""
        m = len(x) // frame
        return m, np.sqrt(np.mean(x[: m * frame, :].reshape(m, frame, -1) ** 2, axis=(1, 2)))

    def _apply_agc(self, x: np.ndarray) -> np.ndarray:
        """A phone's AGC: fast attack (2 ms), slow release (0.4 s), towards -20 dBFS, at most +30 dB."""
        frame = max(1, int(0.001 * self._fs))
        m, lev = self._frames(x, frame)
        gains = np.empty(m)
        a_att, a_rel = math.exp(-1 / 2.0), math.exp(-1 / 400.0)
        L = self._agc_level
        for i in range(m):
            v = lev[i]
            L = a_att * L + (1 - a_att) * v if v > L else a_rel * L + (1 - a_rel) * v
            gains[i] = min(0.1 / max(L, 1e-9), 10 ** 1.5)
        self._agc_level = L
        g = np.repeat(gains, frame)
        g = np.concatenate([g, np.full(len(x) - len(g), gains[-1] if m else 1.0)])
        return x * g[:, None]

    def _apply_gate(self, x: np.ndarray) -> np.ndarray:
        """A noise gate: opens within 1 ms when the level passes the threshold, holds 60 ms, closes over 20 ms."""
        frame = max(1, int(0.0005 * self._fs))
        m, lev = self._frames(x, frame)
        thr = 10 ** (self.gate_dbfs / 20)
        gains = np.empty(m)
        G, hold = self._gate_gain, self._gate_hold
        hold_frames, closed = int(0.06 / 0.0005), 10 ** (-30 / 20)
        for i in range(m):
            if lev[i] > thr:
                hold = hold_frames
                G = min(1.0, G + 0.5)
            elif hold > 0:
                hold -= 1
            else:
                G = max(closed, G - 0.025)
            gains[i] = max(G, closed)
        self._gate_gain, self._gate_hold = G, hold
        g = np.repeat(gains, frame)
        g = np.concatenate([g, np.full(len(x) - len(g), gains[-1] if m else 1.0)])
        return x * g[:, None]


_PEAKS: dict = {}


def peak_level(modes, rise_s: float = RISE_S) -> float:
    """Peak magnitude of a unit waveform (cached), so that `amp` is the peak level."""
    key = tuple(modes) if rise_s == RISE_S else (tuple(modes), rise_s)
    if key not in _PEAKS:
        t = np.arange(0, 0.02, 1 / 192000.0)
        _PEAKS[key] = float(np.max(np.abs(modal_waveform(modes, t, rise_s)))) or 1.0
    return _PEAKS[key]


def render_chunks(renderer, channels: int, chunk: int) -> np.ndarray:
    """Everything a renderer (``render(n)`` -> the next samples, none at the end) makes, in chunks of
    ``chunk`` samples: array [n, channels]."""
    parts = []
    while True:
        x = renderer.render(chunk)
        if not len(x):
            break
        parts.append(x)
    return np.concatenate(parts) if parts else np.zeros((0, channels))
