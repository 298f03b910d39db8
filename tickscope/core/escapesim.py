"""The escapement simulator: recordings of a mechanical escapement with known truth.

Two movements: a lever escapement (watches, alarm and carriage clocks) and a pendulum
clock's anchor (recoil) or dead-beat escapement.  The sounds' times come from the motion,
not from a template:

* **Lever.**  The balance swings ``theta(t) = A sin(2 pi (t - c) / T)`` about each beat's
  centre crossing ``c`` (T = the balance period = two beats).  Within the lift angle LA the
  impulse pin is in the fork: the beat's sounds are the *unlocking* (the balance at -LA/2 of
  its swing through the centre), the *impulse* (at ``-LA/2 + unlock_arc_deg``) and the *drop*
  (the escape tooth landing on the other pallet's locking face, at +LA/2; the loudest).  The
  first-to-last time of a beat is therefore ``t_lift = (T / pi) arcsin(LA / (2 A))``, and the
  amplitude comes back exactly through the published relation ``A = LA / (2 sin(pi t_lift / T))``
  (shared/domain.md section 10.3; simple harmonic motion).  Above ``knock_angle_deg`` the impulse
  pin strikes the outside of the fork's horn late in the swing, at ``c + (T / 2 pi) arcsin(knock / A)``
  (knocking; the swing's reversal by that blow is not modelled: the motion keeps the set amplitude).
* **Pendulum.**  Beat times from the pendulum's period, with the circular error
  ``T = T0 (1 + theta0^2 / 16)`` when a semi-arc is given (published small-angle series,
  shared/domain.md section 10.5); a dead-beat escapement makes one impact per beat, a recoil
  escapement two (the escape wheel recoils); every beat sets the case or a gong rod ringing.

Definitions
-----------
* ``beats_per_hour``: nominal beats an hour (one beat = a tick or a tock = half a period).
* ``rate_s_per_day``: the movement's daily rate, positive gains.  For a pendulum it is the rate
  its length gives in small swings; a semi-arc adds the circular error (the truth's
  ``rate_s_per_day`` is the rate the clock really runs at).
* ``beat_asymmetry_ms``: the tick->tock interval minus the tock->tick interval (the rest point
  off the escapement's centre), held constant in ms.  Beat ``k`` (even = tick) crosses the
  escapement's centre at ``c_k = c_0 + u_k + [k odd] a / 2``, ``u_k`` the uniform beat schedule.
* ``clock_ppm``: the recording device's sample clock runs fast by this many ppm: a sound at
  true time ``t`` sits at recording time ``t (1 + clock_ppm 1e-6)`` (as :mod:`.simulate`).
* ``level_dbfs``: peak level of the loudest sound of a beat (the drop; a pendulum's impact).
* ``snr_db``: mean power of a tick over the first 10 ms from its first sound, over the noise power.

Everything here is pure: an :class:`EscapementScenario` in, arrays and a truth dict out; the
motion (every beat's crossing and the times of its sounds) is :mod:`.escapemotion`'s.  The
room, the recorder and their degradations are the quartz simulator's (:mod:`.simulate`:
noise, hum, knocks and voices, reverberation, gain control, gate, clipping, DC, a second
clock); lossy encoding happens where the file is written (:mod:`tickscope.io.simfile`).
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from .balance import circular_error_factor, lift_time_s
from .escapechecks import check_scenario
from .escapemotion import _uniform_intervals, beat_motion
from .soundscape import (EventMixer, RecordingChain, SoundEvent, band_limit, modal_waveform, peak_level,
                         render_chunks, room_impulse_response, room_transients, second_clock_events)

SNR_WINDOW_S = 0.010  # as the quartz simulator: SNR on the first 10 ms of a beat
ESCAPE_RISE_S = 0.04e-3  # attack of a steel-on-steel click (40 us; our own choice)
RING_RISE_S = 0.3e-3  # a case or gong rod takes longer to speak (our own choice)

#: The invented voices of the sounds (frequency Hz, amplitude decay constant ms, relative
#: amplitude) and their levels relative to the loudest sound of the beat, dB.
LEVER_SOUNDS: dict[str, tuple[tuple[tuple[float, float, float], ...], float]] = {
    "unlock": (((6100.0, 0.25, 1.0), (8900.0, 0.15, 0.6)), -9.0),
    "impulse": (((4300.0, 0.35, 1.0), (7200.0, 0.20, 0.5)), -14.0),
    "drop": (((3300.0, 0.80, 1.0), (5200.0, 0.50, 0.7), (7900.0, 0.30, 0.4)), 0.0),
    # the impulse pin on the outside of the horn: a duller blow
    "knock": (((2100.0, 1.20, 1.0), (3900.0, 0.70, 0.6)), -4.0),
}
PENDULUM_SOUNDS: dict[str, tuple[tuple[tuple[float, float, float], ...], float]] = {
    "drop": (((1900.0, 1.5, 1.0), (3100.0, 1.0, 0.6), (4700.0, 0.6, 0.3)), 0.0),
    "recoil": (((2300.0, 1.0, 1.0), (3600.0, 0.7, 0.5)), 0.0),  # its level: recoil_level_db
}
#: The partials of a gong rod clamped at one end (Euler-Bernoulli cantilever: (beta_n L)^2
#: for beta L = 1.8751, 4.6941, 7.8548 gives 1 : 6.267 : 17.55; Rayleigh, The Theory of Sound,
#: vol. 1, ch. VIII; roots from memory), with our own choice of their decays and amplitudes.
ROD_PARTIALS = ((1.0, 1.0, 1.0), (6.267, 0.5, 0.4), (17.55, 0.25, 0.15))


@dataclass(frozen=True)
class EscapementScenario:
    """Every parameter of a simulated escapement recording (defaults: a clean 28800/h lever watch, 60 s, 48 kHz)."""

    samplerate_hz: int = 48000
    duration_s: float = 60.0
    channels: int = 1
    beat_channel: int = 0  # channel that carries the movement; others carry noise only
    movement: str = "lever"  # "lever" | "pendulum"
    beats_per_hour: float = 28800.0
    rate_s_per_day: float = 0.0
    rate_drift_s_per_day_per_h: float = 0.0  # the rate changes by this much every hour
    clock_ppm: float = 0.0
    first_beat_s: float = 0.3  # true time of the first beat's first sound
    beat_asymmetry_ms: float = 0.0  # tick->tock minus tock->tick interval
    beat_jitter_us: float = 0.0  # RMS beat-to-beat jitter of each whole beat (tens of us for a watch)
    # lever escapement
    lift_angle_deg: float = 52.0
    amplitude_deg: float = 280.0
    amplitude_fall_deg_per_h: float = 0.0  # a run-down: the amplitude falls this much every hour
    unlock_arc_deg: float = 14.0  # balance arc from the unlocking to the impulse sound (our own choice)
    knock: bool = True  # the impulse pin strikes the horn's outside when the amplitude passes knock_angle_deg
    knock_angle_deg: float = 330.0  # common practice: knocking above ~330 degrees
    tock_freq_shift_pct: float = 4.0  # the tock's resonances are higher by this much (the other pallet)
    tock_level_db: float = -1.5  # the tock's level relative to the tick
    # the escape wheel
    wheel_teeth: int = 15
    wheel_pallet_span_teeth: int = 3  # a tooth meets the exit pallet 2 span + 1 beats after the entry pallet
    wheel_anomaly_tooth: int = 0
    wheel_anomaly_db: float = 0.0  # that tooth's drop is louder by this much (0 and 0 ms: no anomaly)
    wheel_anomaly_ms: float = 0.0  # ... and later by this much
    # a clock that stops and restarts
    stop_at_s: float | None = None  # no beat from this true time ...
    stop_for_s: float = 0.0  # ... for this long; then it starts again (a balance at half its amplitude)
    restart_build_s: float = 1.5  # a restarted balance's amplitude e-folds towards the set one (our own choice)
    # pendulum
    pendulum_escapement: str = "recoil"  # "recoil" (two impacts a beat) | "deadbeat" (one)
    pendulum_semi_arc_deg: float = 0.0  # the pendulum's swing either side; 0 = small swings, no circular error
    recoil_gap_ms: float = 9.0  # the recoil's second impact this long after the drop
    recoil_level_db: float = -7.0
    ring_hz: float = 430.0  # the case's or gong rod's lowest resonance
    ring_decay_ms: float = 120.0  # its amplitude decay constant
    ring_level_db: float = -14.0  # its peak relative to the impact
    # the room and the recorder (as the quartz simulator)
    level_dbfs: float = -12.0
    snr_db: float = 40.0
    noise: str = "white"  # "white" | "pink"
    hum_hz: float = 0.0
    hum_db: float = -20.0  # hum amplitude relative to the beat's peak
    variation_db: float = 0.0  # beat-to-beat level variation (RMS)
    variation_freq_pct: float = 0.0  # beat-to-beat resonance variation (RMS, percent)
    transients_per_min: float = 0.0  # knocks and speech-like bursts in the room
    transient_db: float = 6.0
    reverb_rt60_ms: float = 0.0
    agc: bool = False
    gate_dbfs: float | None = None
    clip_dbfs: float | None = None
    dc_offset: float = 0.0
    second_clock_rate_s_per_day: float | None = None  # a quartz clock elsewhere in the room
    second_clock_db: float = -10.0
    second_clock_offset_s: float = 0.37
    seed: int = 1

    def replace(self, **changes) -> "EscapementScenario":
        """A copy with some fields changed."""
        return dataclasses.replace(self, **changes)


# --------------------------------------------------------------------------------------------
# the sounds


def _voice(sc: EscapementScenario, name: str, tock: bool) -> tuple[tuple[tuple[float, float, float], ...], float]:
    """The resonances and the level (dB relative to the beat's loudest sound) of one sound of a tick or a tock."""
    if sc.movement == "lever":
        modes, db = LEVER_SOUNDS[name]
    elif name == "ring":
        f0, d0 = sc.ring_hz, sc.ring_decay_ms
        modes = tuple((f0 * rf, d0 * rd, ra) for rf, rd, ra in ROD_PARTIALS)
        db = sc.ring_level_db
    else:
        modes, db = PENDULUM_SOUNDS[name]
        if name == "recoil":
            db = sc.recoil_level_db
    if tock:
        modes = tuple((f * (1 + sc.tock_freq_shift_pct / 100), tau, a) for f, tau, a in modes)
        db = db + sc.tock_level_db
    return modes, db


def _duration_s(modes) -> float:
    """How long a sound is evaluated: 12 decay constants of its slowest mode (-104 dB, under 16 bits' floor)."""
    return max(0.005, 12e-3 * max(tau for _, tau, _ in modes))


def _beat_sounds(sc: EscapementScenario, times: dict[str, float], tock: bool, amp: float,
                 freq_factor: float = 1.0, drop_db: float = 0.0) -> list[SoundEvent]:
    """The SoundEvents of one beat (true times), ``amp`` the peak level of its loudest sound."""
    out = []
    for name, t in times.items():
        if not math.isfinite(t):
            continue
        modes, db = _voice(sc, name, tock)
        if name == "drop":
            db += drop_db
        if freq_factor != 1.0:
            modes = tuple((f * freq_factor, tau, a) for f, tau, a in modes)
        modes = band_limit(modes, sc.samplerate_hz)
        rise = ESCAPE_RISE_S
        out.append(SoundEvent(float(t), name, amp * 10 ** (db / 20), modes, _duration_s(modes), 0, rise))
        if name == "drop" and sc.movement == "pendulum":
            # the ring follows the impact's level (its side, variation and anomaly included)
            rmodes, _ = _voice(sc, "ring", tock)
            if freq_factor != 1.0:
                rmodes = tuple((f * freq_factor, tau, a) for f, tau, a in rmodes)
            rmodes = band_limit(rmodes, sc.samplerate_hz)
            out.append(SoundEvent(float(t), "ring", amp * 10 ** ((sc.ring_level_db + db) / 20), rmodes,
                                  _duration_s(rmodes), 0, RING_RISE_S))
    return out


def beat_power(sc: EscapementScenario) -> float:
    """Mean power over its first 10 ms of a nominal tick whose loudest sound peaks at 1 (the SNR reference)."""
    m = beat_motion(sc.replace(duration_s=min(sc.duration_s, sc.first_beat_s + 3 * 3600.0 / sc.beats_per_hour),
                               stop_at_s=None, wheel_anomaly_db=0.0, wheel_anomaly_ms=0.0))
    t_first = min(float(v[0]) for v in m["sounds"].values() if math.isfinite(v[0]))
    times = {name: float(v[0]) - t_first for name, v in m["sounds"].items()}
    fs = sc.samplerate_hz
    t = np.arange(max(1, int(SNR_WINDOW_S * fs))) / fs
    w = np.zeros(len(t))
    for ev in _beat_sounds(sc, times, False, 1.0):
        w += ev.amp * modal_waveform(ev.modes, t - ev.t_true_s, ev.rise_s) / peak_level(ev.modes, ev.rise_s)
    return float(np.mean(w**2))


def build_events(sc: EscapementScenario) -> tuple[list[SoundEvent], dict]:
    """Every sound of the recording with its true time, and the truth record."""
    m = beat_motion(sc)
    rng = np.random.default_rng(sc.seed)
    n = len(m["beat"])
    jitter = rng.normal(0.0, sc.beat_jitter_us * 1e-6, n) if sc.beat_jitter_us > 0 else np.zeros(n)
    level = 10 ** (sc.level_dbfs / 20)
    scale = 1.0 + sc.clock_ppm * 1e-6
    names = list(m["sounds"])
    events: list[SoundEvent] = []
    beats = []
    for i in range(n):
        tock = bool(m["tock"][i])
        var_db = rng.normal(0, sc.variation_db) if sc.variation_db > 0 else 0.0
        ff = 1 + rng.normal(0, sc.variation_freq_pct / 100) if sc.variation_freq_pct > 0 else 1.0
        anomaly = bool(m["wheel_anomaly"][i])
        times = {name: float(m["sounds"][name][i] + jitter[i]) for name in names}
        events += _beat_sounds(sc, times, tock, level * 10 ** (var_db / 20), ff,
                               sc.wheel_anomaly_db if anomaly else 0.0)
        heard = {name: t for name, t in times.items() if math.isfinite(t)}
        t_first = min(heard.values())
        flags = []
        if "knock" in heard:
            flags.append("knock")
        if anomaly:
            flags.append("wheel-anomaly")
        if m["stopped"][i]:
            flags.append("stopped")
        if m["restarted"][i]:
            flags.append("restarted")
        rec = {"beat": int(m["beat"][i]), "side": "tock" if tock else "tick", "time_s": t_first * scale,
               "time_true_s": t_first, "sounds": {name: t * scale for name, t in heard.items()}}
        if sc.movement == "lever":
            rec["amplitude_deg"] = float(m["amplitude_deg"][i])
            rec["lift_time_ms"] = (heard["drop"] - heard["unlock"]) * 1e3
        rec["flags"] = flags
        beats.append(rec)
    tr_events, transients = room_transients(rng, duration_s=sc.duration_s, per_min=sc.transients_per_min,
                                            level=level, transient_db=sc.transient_db)
    events += tr_events
    if sc.second_clock_rate_s_per_day is not None:
        events += second_clock_events(duration_s=sc.duration_s, rate_s_per_day=sc.second_clock_rate_s_per_day,
                                      level=level, level_db=sc.second_clock_db, offset_s=sc.second_clock_offset_s,
                                      samplerate_hz=sc.samplerate_hz)
    events.sort(key=lambda e: e.t_true_s)
    truth = _truth(sc, m, beats, transients)
    return events, truth


def _truth(sc: EscapementScenario, m: dict, beats: list[dict], transients: list[dict]) -> dict:
    beat_s = 3600.0 / sc.beats_per_hour
    scale = 1.0 + sc.clock_ppm * 1e-6
    lever = sc.movement == "lever"
    cf = circular_error_factor(sc.pendulum_semi_arc_deg) if not lever else 1.0
    rate_true = 86400.0 * ((1 + sc.rate_s_per_day / 86400.0) / cf - 1)
    rate_device = 86400.0 * ((1 + rate_true / 86400.0) / scale - 1)
    iv = float(_uniform_intervals(sc, np.array([0]))[0])
    truth = {
        "kind": "escapement",
        "movement": sc.movement,
        "scenario": dataclasses.asdict(sc),
        "beats_per_hour": sc.beats_per_hour,
        "beat_interval_s": beat_s,  # nominal
        "beat_interval_true_s": iv,  # at the start, with the rate (and circular error)
        "rate_s_per_day": rate_true,  # the rate the movement really runs at (start of the recording)
        "rate_drift_s_per_day_per_h": sc.rate_drift_s_per_day_per_h,
        "beat_asymmetry_ms": sc.beat_asymmetry_ms,
        "beat_asymmetry_percent": 100.0 * sc.beat_asymmetry_ms * 1e-3 / iv,
        "lift_angle_deg": sc.lift_angle_deg if lever else None,
        "amplitude_deg": sc.amplitude_deg if lever else None,
        "amplitude_end_deg": (sc.amplitude_deg - sc.amplitude_fall_deg_per_h * sc.duration_s / 3600.0) if lever else None,
        "lift_time_ms": (lift_time_s(lift_angle_deg=sc.lift_angle_deg, amplitude_deg=sc.amplitude_deg, period_s=2 * iv)
                         * 1e3 if lever else None),
        "beats": beats,
        "transients": transients,
        "stops": [],
    }
    if lever:
        # the rest point's offset from the escapement's centre that gives the asymmetry at the set amplitude:
        # the centre is crossed a/4 before or after the balance's own zero (simple harmonic motion)
        truth["rest_point_offset_deg"] = sc.amplitude_deg * math.sin(math.pi * sc.beat_asymmetry_ms * 1e-3 / (2 * 2 * iv))
    else:
        truth["pendulum_escapement"] = sc.pendulum_escapement
        truth["pendulum_semi_arc_deg"] = sc.pendulum_semi_arc_deg
        truth["rate_small_arc_s_per_day"] = sc.rate_s_per_day
        truth["circular_error_s_per_day"] = rate_true - sc.rate_s_per_day
        truth["impacts_per_beat"] = 2 if sc.pendulum_escapement == "recoil" else 1
    if sc.stop_at_s is not None:
        last = [b["beat"] for b in beats if "stopped" in b["flags"]]
        first = [b["beat"] for b in beats if "restarted" in b["flags"]]
        truth["stops"].append({"from_s": sc.stop_at_s * scale,
                               "to_s": (m["restart_s"] * scale) if m["restart_s"] is not None else None,
                               "last_beat_before": last[0] if last else None,
                               "first_beat_after": first[0] if first else None})
    truth["expected"] = {
        "rate_s_per_day": rate_true,  # after correcting for clock_ppm
        "rate_device_time_s_per_day": rate_device,  # without correction
        "beat_interval_s": beat_s,
        "beat_asymmetry_ms": sc.beat_asymmetry_ms,
        "amplitude_deg": sc.amplitude_deg if lever else None,  # at the set lift angle
    }
    return truth


# --------------------------------------------------------------------------------------------
# rendering


class EscapementRenderer:
    """Renders an :class:`EscapementScenario` chunk by chunk, in order, as float64 arrays [n, channels].

    The room and the recorder work on internal blocks of a fixed length (about ``block_s``, a whole
    number of the gain control's and the gate's frames), so the output is the same whatever the
    sequence of chunk sizes asked for -- the whole recording at once or one sample at a time.  Only
    one block and the caller's chunk are held in memory.
    """

    def __init__(self, sc: EscapementScenario, *, block_s: float = 1.0):
        check_scenario(sc)
        self.sc = sc
        self.events, self.truth = build_events(sc)
        fs = sc.samplerate_hz
        self.n_total = int(round(sc.duration_s * fs))
        self.pos = 0
        self._mixer = EventMixer(self.events, fs, sc.clock_ppm)
        p_beat = beat_power(sc) * (10 ** (sc.level_dbfs / 20)) ** 2
        self.noise_sigma = math.sqrt(p_beat / 10 ** (sc.snr_db / 10))
        self._chain = RecordingChain(
            samplerate_hz=fs, channels=sc.channels, signal_channel=sc.beat_channel, noise_sigma=self.noise_sigma,
            noise=sc.noise, rng=np.random.default_rng(sc.seed + 7919), hum_hz=sc.hum_hz,
            hum_amp=10 ** ((sc.level_dbfs + sc.hum_db) / 20), dc_offset=sc.dc_offset,
            rir=(room_impulse_response(fs, sc.reverb_rt60_ms, np.random.default_rng(sc.seed + 31))
                 if sc.reverb_rt60_ms > 0 else None),
            agc=sc.agc, gate_dbfs=sc.gate_dbfs, clip_dbfs=sc.clip_dbfs)
        unit = math.lcm(*self._chain.frame_samples)
        self._block = unit * max(1, int(round(block_s * fs / unit)))
        self._made = 0
        self._buf = np.zeros((0, sc.channels))

    def render(self, n: int) -> np.ndarray:
        """The next ``n`` samples (fewer at the end), shape (n, channels), float64."""
        n = min(n, self.n_total - self.pos)
        if n <= 0:
            return np.zeros((0, self.sc.channels))
        parts = [self._buf]
        have = len(self._buf)
        while have < n:
            m = min(self._block, self.n_total - self._made)
            if m <= 0:  # cannot happen while pos + len(buffer) == made; never spin if it did
                break
            parts.append(self._chain.process(self._mixer.mix(self._made, m), self._made))
            self._made += m
            have += m
        x = np.concatenate(parts) if len(parts) > 1 else parts[0]
        self._buf = x[n:]
        self.pos += n
        return x[:n]


def render_all(sc: EscapementScenario, chunk: int = 1 << 16) -> tuple[np.ndarray, dict]:
    """The whole recording at once (for short scenarios): array [n, channels] and truth."""
    r = EscapementRenderer(sc)
    return render_chunks(r, sc.channels, chunk), r.truth
