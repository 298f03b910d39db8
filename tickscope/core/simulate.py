"""The movement simulator: recordings of a stepping-motor movement with known truth.

A step is a short drive impulse that excites a few damped resonances (rotor, hand,
case).  Every onset is placed at an exact, fractional-sample time: the waveform is
evaluated analytically at each sample instant, never rounded to a sample.  On top
of the movement the simulator adds what real recordings do: noise (white or pink)
at a stated SNR, mains hum, knocks and speech-like bursts, a second impact on each
step, tick-to-tick variation, beats that do not repeat (a rattle of random impacts),
room reverberation, a phone's automatic gain control or noise gate, clipping, a second
clock in the room, and an audio-clock offset.
Lossy encoding happens where the file is written (:mod:`tickscope.io.simfile`).

Everything here is pure: a :class:`Scenario` in, arrays and a truth dict out.
The pieces that are not about a stepping motor -- :class:`SoundEvent` and
:func:`modal_waveform`, the room's knocks and voices (:func:`room_transients`), a
second clock (:func:`second_clock_events`), :class:`EventMixer` and the room and
recorder (:class:`RecordingChain`: reverberation, noise, hum, DC, gain control, gate,
clipping) -- are shared with the escapement simulator (:mod:`.escapesim`).

Definitions
-----------
* ``snr_db``: mean power of a step over the first 10 ms after its onset, over the
  noise power, in dB (noise measured over the full band of the recording).
* ``clock_ppm``: the recording device's sample clock runs fast by this many ppm,
  i.e. it really samples at ``samplerate_hz * (1 + clock_ppm * 1e-6)``.  An event
  at true time ``t`` therefore sits at recording time ``t * (1 + clock_ppm * 1e-6)``.
* ``rate_s_per_day``: the movement's true daily rate; positive gains.
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from ..units import CRYSTAL_HZ, interval_from_rate
from .soundscape import (EventMixer, RecordingChain, SoundEvent, band_limit, modal_waveform, render_chunks,
                         room_impulse_response, room_transients, second_clock_events)

_waveform = modal_waveform  # the name this module used first (the benchmarks import it)

#: Resonances (frequency Hz, amplitude decay constant ms, relative amplitude) of the
#: invented movements used by the demo, tests and benchmarks.
MOVEMENTS: dict[str, tuple[tuple[float, float, float], ...]] = {
    # a kitchen wall clock: a big rotor and a long hand, low and ringing
    "wallclock": ((1150.0, 9.0, 1.0), (2430.0, 4.0, 0.6), (3900.0, 2.0, 0.35)),
    # a small wristwatch on a bench pad: high and dry
    "wristwatch": ((2900.0, 3.0, 1.0), (4700.0, 1.6, 0.7), (6800.0, 0.9, 0.4)),
    # a travel alarm clock: a middle voice with a hard case
    "alarmclock": ((1700.0, 6.0, 1.0), (3100.0, 3.0, 0.8), (5200.0, 1.2, 0.3)),
}
#: The voice of a hand's bounce (second impact on each step).
BOUNCE_MODES = ((3600.0, 1.5, 1.0), (5400.0, 0.8, 0.5))
SNR_WINDOW_S = 0.010  # SNR is defined on the first 10 ms of a step



@dataclass(frozen=True)
class Scenario:
    """Every parameter of a simulated recording (all defaults give a clean 1 s wall clock)."""

    samplerate_hz: int = 48000
    duration_s: float = 60.0
    channels: int = 1
    step_channel: int = 0  # channel that carries the movement; others carry noise only
    movement: str = "wallclock"
    step_interval_s: float = 1.0
    rate_s_per_day: float = 0.0
    rate_drift_s_per_day_per_h: float = 0.0  # the rate changes by this much every hour (warming, a weakening cell)
    clock_ppm: float = 0.0
    first_step_s: float = 0.5
    jitter_us: float = 0.0
    level_dbfs: float = -12.0  # peak level of a step
    snr_db: float = 40.0
    noise: str = "white"  # "white" | "pink"
    hum_hz: float = 0.0  # 0 = no hum; else 50 or 60 (with 3rd and 5th harmonics)
    hum_db: float = -20.0  # hum amplitude relative to the step peak
    missed_steps: tuple[int, ...] = ()  # step numbers that make no sound
    polarity_b_freq_shift: float = 0.03  # B-polarity resonances 3 % higher
    polarity_b_level_db: float = -1.0
    polarity_asymmetry_us: float = 0.0  # B steps sound this much later
    variation_db: float = 0.0  # tick-to-tick level variation (RMS)
    variation_freq_pct: float = 0.0  # tick-to-tick resonance variation (RMS, percent)
    second_impact_ms: float = 0.0  # 0 = none; else delay of the hand bounce
    second_impact_db: float = -6.0
    # a sound that does not repeat (not a stepping motor: a cheap escapement, a rattling case):
    # every beat adds this many impacts at random delays within rattle_spread_ms, each with its
    # own resonances (0.7-1.4x the movement's) and level (0 to -12 dB); use with jitter_us
    rattle_impacts: int = 0
    rattle_spread_ms: float = 40.0
    transients_per_min: float = 0.0  # knocks and speech-like bursts, off the step grid
    transient_db: float = 6.0  # knock peak relative to the step peak
    reverb_rt60_ms: float = 0.0  # 0 = dry room
    agc: bool = False  # a phone's automatic gain control
    gate_dbfs: float | None = None  # noise gate threshold; None = no gate
    clip_dbfs: float | None = None  # hard clipping level; None = none
    dc_offset: float = 0.0
    second_clock_rate_s_per_day: float | None = None  # None = no second clock
    second_clock_db: float = -10.0
    second_clock_offset_s: float = 0.37
    # quartz logic regulation: every period the divider swallows pulses
    inhibition_period_s: float = 0.0  # 0 = none
    inhibition_pulses: int = 0
    inhibition_pulse_hz: float = float(CRYSTAL_HZ)
    # end-of-life stepping: bursts of N steps every N intervals
    burst_steps: int = 0  # 0 = regular stepping
    burst_spacing_ms: float = 60.0
    failed_steps: tuple[int, ...] = ()  # step numbers where the rotor only twitches
    correction_delay_ms: float = 0.0  # 0 = no correction pulses after failed steps
    drive_levels_db: tuple[float, ...] = ()  # adaptive drive: level steps cycled
    drive_level_period_s: float = 480.0
    seed: int = 1

    def replace(self, **changes) -> "Scenario":
        """A copy with some fields changed."""
        return dataclasses.replace(self, **changes)


def _check(sc: Scenario) -> None:
    if sc.rattle_impacts < 0 or not sc.rattle_spread_ms > 0:
        raise ParameterError(f"rattle_impacts={sc.rattle_impacts!r}, rattle_spread_ms={sc.rattle_spread_ms!r}: "
                             "expected >= 0 impacts within > 0 ms")
    if sc.samplerate_hz < 4000 or sc.samplerate_hz > 384000:
        raise ParameterError(f"samplerate_hz={sc.samplerate_hz!r}: expected 4000..384000")
    if not sc.duration_s > 0:
        raise ParameterError(f"duration_s={sc.duration_s!r}: expected > 0")
    if sc.rate_drift_s_per_day_per_h and (sc.inhibition_pulses or sc.burst_steps > 1):
        raise ParameterError("a rate drift cannot be combined with logic regulation or bursts in the simulator")
    if sc.movement not in MOVEMENTS:
        raise ParameterError(f"movement={sc.movement!r}: expected one of {sorted(MOVEMENTS)}")
    if sc.noise not in ("white", "pink"):
        raise ParameterError(f"noise={sc.noise!r}: expected 'white' or 'pink'")
    if not 0 < sc.step_interval_s <= 60:
        raise ParameterError(f"step_interval_s={sc.step_interval_s!r}: expected 0 < interval <= 60")
    if sc.channels < 1 or not 0 <= sc.step_channel < sc.channels:
        raise ParameterError(f"step_channel={sc.step_channel!r} with channels={sc.channels!r}")


def step_modes(sc: Scenario, polarity: int) -> tuple[tuple[float, float, float], ...]:
    """The resonances of a step of polarity 0 (A) or 1 (B), band-limited to the recording."""
    base = MOVEMENTS[sc.movement]
    if polarity:
        base = tuple((f * (1 + sc.polarity_b_freq_shift), tau, a) for f, tau, a in base)
    return band_limit(base, sc.samplerate_hz)


def step_power(sc: Scenario) -> float:
    """Mean power of a unit-peak A step over its first 10 ms (the SNR reference)."""
    fs = sc.samplerate_hz
    t = np.arange(int(0.05 * fs)) / fs
    w = _waveform(step_modes(sc, 0), t)
    w /= np.max(np.abs(w))
    return float(np.mean(w[: max(1, int(SNR_WINDOW_S * fs))] ** 2))


def step_times_true(sc: Scenario) -> tuple[np.ndarray, np.ndarray]:
    """True times (s) of every motor pulse slot and its step number.

    Includes the logic-regulation phase steps and the burst pattern, before jitter.
    """
    interval = interval_from_rate(sc.step_interval_s, sc.rate_s_per_day)
    n = int(math.floor((sc.duration_s - sc.first_step_s) / interval)) + 1
    k = np.arange(max(n, 0))
    t = sc.first_step_s + k * interval
    if sc.rate_drift_s_per_day_per_h and len(k):
        # the rate at nominal time e: r0 + drift * e / 3600; each interval keeps the rate of its start
        e = k[:-1] * sc.step_interval_s
        iv = sc.step_interval_s / (1.0 + (sc.rate_s_per_day + sc.rate_drift_s_per_day_per_h * e / 3600.0) / 86400.0)
        t = sc.first_step_s + np.concatenate([[0.0], np.cumsum(iv)])
        t = t[t <= sc.duration_s]
        k = k[: len(t)]
    if sc.inhibition_period_s > 0 and sc.inhibition_pulses:
        # Between corrections the crystal runs fast so that the mean rate is the stated
        # one; once per period the divider swallows pulses and the step comes late.
        jump_s = sc.inhibition_pulses / sc.inhibition_pulse_hz
        per = sc.inhibition_period_s
        fast = interval - jump_s * sc.step_interval_s / per  # the crystal's own step interval
        elapsed = k * sc.step_interval_s  # nominal seconds since the first step
        n_corr = np.floor(elapsed / per + 1e-9)
        t = sc.first_step_s + k * fast + n_corr * jump_s
    if sc.burst_steps > 1:
        # End-of-life: the circuit holds steps back and delivers them in a burst.
        g = k // sc.burst_steps
        j = k % sc.burst_steps
        base = t[np.minimum(g * sc.burst_steps + sc.burst_steps - 1, len(t) - 1)] if len(t) else t
        t = base + j * sc.burst_spacing_ms * 1e-3
    return t, k


def build_events(sc: Scenario) -> tuple[list[SoundEvent], dict]:
    """Every sound of the recording with its true time, plus the truth record."""
    _check(sc)
    rng = np.random.default_rng(sc.seed)
    t_slots, k = step_times_true(sc)
    jitter = rng.normal(0.0, sc.jitter_us * 1e-6, len(t_slots)) if sc.jitter_us > 0 else np.zeros(len(t_slots))
    t_slots = t_slots + jitter
    events: list[SoundEvent] = []
    steps = []
    missed = set(sc.missed_steps)
    failed = set(sc.failed_steps)
    # Without a correction pulse the next pulse finds the rotor already aligned: silent.
    followers = {f + 1 for f in failed} if sc.correction_delay_ms <= 0 else set()
    level = 10 ** (sc.level_dbfs / 20)
    b_level = 10 ** (sc.polarity_b_level_db / 20)
    drive_db = np.array(sc.drive_levels_db or (0.0,))
    for i, (t, kk) in enumerate(zip(t_slots, k)):
        pol = int(kk % 2)
        t_sound = t + (sc.polarity_asymmetry_us * 1e-6 if pol else 0.0)
        kind = "step"
        if kk in missed or kk in followers:
            kind = "silent"
        elif kk in failed:
            kind = "failed"
        var_db = rng.normal(0, sc.variation_db) if sc.variation_db > 0 else 0.0
        dl = drive_db[int(t // sc.drive_level_period_s) % len(drive_db)]
        amp = level * (b_level if pol else 1.0) * 10 ** ((var_db + dl) / 20)
        modes = step_modes(sc, pol)
        if sc.variation_freq_pct > 0:
            modes = tuple((f * (1 + rng.normal(0, sc.variation_freq_pct / 100)), tau, a) for f, tau, a in modes)
        if kind == "step":
            events.append(SoundEvent(t_sound, "step", amp, modes, 0.25))
            if sc.second_impact_ms > 0:
                d = sc.second_impact_ms * 1e-3 * (1 + rng.normal(0, 0.02))
                events.append(SoundEvent(t_sound + d, "bounce", amp * 10 ** (sc.second_impact_db / 20),
                                     band_limit(BOUNCE_MODES, sc.samplerate_hz), 0.05))
            for _ in range(sc.rattle_impacts):
                d = rng.uniform(0.002, max(0.003, sc.rattle_spread_ms * 1e-3))
                m = band_limit(tuple((f * rng.uniform(0.7, 1.4), tau, a) for f, tau, a in modes), sc.samplerate_hz)
                events.append(SoundEvent(t_sound + d, "rattle", amp * 10 ** (rng.uniform(-12.0, 0.0) / 20), m, 0.1))
        elif kind == "failed":
            # a twitch: weak, short, duller
            tw = tuple((f * 0.8, tau * 0.4, a) for f, tau, a in modes)
            events.append(SoundEvent(t_sound, "failed", amp * 0.25, tw, 0.05))
            if sc.correction_delay_ms > 0:
                events.append(SoundEvent(t_sound + sc.correction_delay_ms * 1e-3, "correction", amp * 1.6,
                                     step_modes(sc, pol), 0.25))
        steps.append({"step": int(kk), "polarity": "AB"[pol], "time_true_s": float(t_sound), "kind": kind})
    tr_events, transients = room_transients(rng, duration_s=sc.duration_s, per_min=sc.transients_per_min,
                                            level=level, transient_db=sc.transient_db)
    events += tr_events
    if sc.second_clock_rate_s_per_day is not None:
        events += second_clock_events(duration_s=sc.duration_s, rate_s_per_day=sc.second_clock_rate_s_per_day,
                                      level=level, level_db=sc.second_clock_db, offset_s=sc.second_clock_offset_s,
                                      samplerate_hz=sc.samplerate_hz)
    events.sort(key=lambda e: e.t_true_s)
    scale = 1.0 + sc.clock_ppm * 1e-6
    for s in steps:
        s["time_s"] = s["time_true_s"] * scale  # on the recording's (device) time base
    truth = {
        "scenario": dataclasses.asdict(sc),
        "steps": steps,
        "transients": transients,
        "expected": expected_results(sc),
    }
    return events, truth


def expected_results(sc: Scenario) -> dict:
    """What a perfect analysis of this scenario should report."""
    scale = 1.0 + sc.clock_ppm * 1e-6
    # On the device's own time base every interval is stretched by `scale`.
    rate_device = 86400.0 * ((1 + sc.rate_s_per_day / 86400.0) / scale - 1)
    exp = {
        "rate_s_per_day": sc.rate_s_per_day,  # after correcting for clock_ppm
        "rate_device_time_s_per_day": rate_device,  # without correction
        "step_interval_s": sc.step_interval_s,
    }
    if sc.inhibition_period_s > 0 and sc.inhibition_pulses:
        jump_s = sc.inhibition_pulses / sc.inhibition_pulse_hz
        exp["inhibition_correction_us"] = jump_s * 1e6
        interval = interval_from_rate(sc.step_interval_s, sc.rate_s_per_day)
        fast = interval - jump_s * sc.step_interval_s / sc.inhibition_period_s
        exp["crystal_rate_s_per_day"] = 86400.0 * (sc.step_interval_s / fast - 1)
    return exp


class Renderer:
    """Renders a :class:`Scenario` chunk by chunk, in order, as float64 arrays [n, channels].

    The output of the same scenario is identical whatever the sequence of chunk
    sizes except for the random noise (drawn per call); tests use one chunk size.
    """

    def __init__(self, sc: Scenario):
        _check(sc)
        self.sc = sc
        self.events, self.truth = build_events(sc)
        self.rng = np.random.default_rng(sc.seed + 7919)
        self.n_total = int(round(sc.duration_s * sc.samplerate_hz))
        self.pos = 0
        fs = sc.samplerate_hz
        self._mixer = EventMixer(self.events, fs, sc.clock_ppm)
        p_step = step_power(sc) * (10 ** (sc.level_dbfs / 20)) ** 2
        self.noise_sigma = math.sqrt(p_step / 10 ** (sc.snr_db / 10))
        self._chain = RecordingChain(
            samplerate_hz=fs, channels=sc.channels, signal_channel=sc.step_channel, noise_sigma=self.noise_sigma,
            noise=sc.noise, rng=self.rng, hum_hz=sc.hum_hz, hum_amp=10 ** ((sc.level_dbfs + sc.hum_db) / 20),
            dc_offset=sc.dc_offset,
            rir=(room_impulse_response(fs, sc.reverb_rt60_ms, np.random.default_rng(sc.seed + 31))
                 if sc.reverb_rt60_ms > 0 else None),
            agc=sc.agc, gate_dbfs=sc.gate_dbfs, clip_dbfs=sc.clip_dbfs)
        self._fs = fs

    def _dry(self, n0: int, n: int) -> np.ndarray:
        """The movement and the room's other sounds (before the room and microphone)."""
        return self._mixer.mix(n0, n)

    def render(self, n: int) -> np.ndarray:
        """The next ``n`` samples (fewer at the end), shape (n, channels), float64."""
        sc = self.sc
        n = min(n, self.n_total - self.pos)
        if n <= 0:
            return np.zeros((0, sc.channels))
        n0 = self.pos
        out = self._chain.process(self._dry(n0, n), n0)
        self.pos += n
        return out


def render_all(sc: Scenario, chunk: int = 1 << 16) -> tuple[np.ndarray, dict]:
    """The whole recording at once (for short scenarios): array [n, channels] and truth."""
    r = Renderer(sc)
    return render_chunks(r, sc.channels, chunk), r.truth
