"""A corpus of escapement recordings with known truth, made outside tickscope.

``escapement_cases(kind, split, n)`` yields :class:`EscapementCase` objects (name, audio,
samplerate, truth, suffix, and for lossy cases the encoded file's bytes).  The mechanics
come from :mod:`escapement_model` (integrated lever and pendulum escapements), the room
from pyroomacoustics (ShoeBox, image sources), a phone's processing from pedalboard
(high-pass, compressor as gain control, noise gate, low-pass) and the codecs from ffmpeg.
Nothing here imports tickscope.

Kinds
    ``lever-clean``       wristwatches at 18000-36000 beats/h, microphone on the case, SNR 25-40 dB, 2 min
    ``lever-noisy``       the same at SNR 10-20 dB, sometimes mains hum
    ``lever-room-phone``  wristwatches and alarm clocks on a table in a room, heard by a phone
                          (gain control, sometimes a noise gate, a codec three times in four)
    ``pendulum``          mantel, wall and longcase clocks (dead-beat or recoil), beat rates off the
                          round series (and some seconds pendulums), out of beat, long-ringing plates
    ``no-escapement``     what must not be called an escapement: a quartz movement stepping once a
                          second (truth kind 'stepping'), a synchronous clock motor's hum, noise with
                          scattered clicks, speech-like bursts (truth kind 'none')

Splits (by seed; deterministic given kind and seed)
    ``dev`` seeds 0-9999 (debugging), ``test`` 50000-59999 (unit tests), ``score`` from 100000
    (printed benchmark figures only).

Truth (``case.truth``), times on the recording's time base
    ``beat_times_s``      first sound (unlocking, release) of every beat whose first sound lies in
                          the recording, as it arrives at the microphone (source time + direct-path
                          delay); ``main_sound_times_s`` the loudest sound of each beat (the drop);
                          ``event_times_s`` every sound by kind
    ``beat_sides``        0 for beats on the side of the first beat listed, 1 for the others
    ``beat_interval_s``   the slope of a least-squares line through beat_times_s with an offset
                          between the sides (the mean beat over the recording)
    ``rate_s_per_day``    86400*(nominal beat / beat_interval_s - 1) against the nominal beats_per_hour
                          (null when the beat rate is off every series value: then see
                          ``train_beats_per_hour`` and ``rate_vs_train_s_per_day``)
    ``beat_asymmetry_ms`` mean interval side 0 -> side 1 minus side 1 -> side 0 (signed);
                          ``beat_asymmetry_percent`` the same over the mean beat, x100
    ``amplitude_deg``     mean over the recording's beats of the swing's extreme about the rest point
                          (hairspring / vertical) after each beat; ``amplitude_per_beat_deg`` per beat
    ``lift_time_ms``      [side 0, side 1]: mean time from the first to the last sound of a beat
                          (the drop; knocks excluded); ``lift_times_ms`` per beat
    ``snr_db``            median over beats of the mean power in the 10 ms from the beat's loudest sound
                          (clean signal at the microphone, room included) over the noise's mean power
                          (full band, as added, before any phone processing)
"""
from __future__ import annotations

import math
import os
import shutil
import subprocess
import tempfile
from dataclasses import dataclass

import numpy as np

try:
    from .escapement_model import (DEG, SPEED_OF_SOUND_M_S, Impact, LeverEscapement, ModeSet, PendulumClock,
                                   beam_modes, circular_plate_modes, hertz_pulse, rect_plate_modes,
                                   render_impacts)
except ImportError:  # imported as a top-level module (tests/independent on sys.path)
    from escapement_model import (DEG, SPEED_OF_SOUND_M_S, Impact, LeverEscapement, ModeSet, PendulumClock,
                                  beam_modes, circular_plate_modes, hertz_pulse, rect_plate_modes,
                                  render_impacts)

KINDS = ("lever-clean", "lever-noisy", "lever-room-phone", "pendulum", "no-escapement")
SPLITS = {"dev": (0, 10000), "test": (50000, 60000), "score": (100000, None)}
WATCH_SERIES_BPH = (18000, 19800, 21600, 25200, 28800, 36000)  # domain.md s.10.1 (common practice)
ALARM_SERIES_BPH = (14400, 18000)
#: the beat rates a clock's train is taken to be "on the series" at (others: beats_per_hour null)
CLOCK_SERIES_BPH = (3600,)
LOSSY_SUFFIXES = (".m4a", ".mp3", ".opus", ".ogg")
DEFAULT_DURATION_S = 120.0
PRE_ROLL_S = 1.0  # the movement runs before the recording starts: tails and reverberation of earlier beats are heard


@dataclass
class EscapementCase:
    name: str
    audio: np.ndarray  # float32 mono, as decoded from the file (lossy cases) or as written (.wav)
    samplerate: int
    truth: dict
    suffix: str  # '.wav' or the lossy file's extension
    encoded: bytes | None = None  # the lossy file's bytes (None for .wav)

    def write(self, directory: str) -> str:
        """Write the case as a file in directory (the encoded bytes for lossy cases, else a
        32-bit float WAV); returns its path."""
        path = os.path.join(directory, self.name + self.suffix)
        if self.encoded is not None:
            with open(path, "wb") as f:
                f.write(self.encoded)
        else:
            import soundfile as sf
            sf.write(path, self.audio, self.samplerate, subtype="FLOAT")
        return path


def escapement_cases(kind: str, split: str, n: int, start: int = 0, duration_s: float | None = None):
    """Yield n cases of a kind from a split (seeds split_base + start + i)."""
    if kind not in KINDS:
        raise ValueError(f"kind {kind!r}: one of {KINDS}")
    if split not in SPLITS:
        raise ValueError(f"split {split!r}: one of {tuple(SPLITS)}")
    lo, hi = SPLITS[split]
    for i in range(n):
        seed = lo + start + i
        if hi is not None and seed >= hi:
            raise ValueError(f"split {split!r} holds seeds {lo}..{hi - 1}")
        yield make_case(kind, seed, duration_s=duration_s)


def make_case(kind: str, seed: int, duration_s: float | None = None) -> EscapementCase:
    rng = np.random.default_rng([KINDS.index(kind) + 1, seed])
    dur = DEFAULT_DURATION_S if duration_s is None else float(duration_s)
    builder = {"lever-clean": _lever_case, "lever-noisy": _lever_case, "lever-room-phone": _lever_case,
               "pendulum": _pendulum_case, "no-escapement": _other_case}[kind]
    case = builder(kind, seed, rng, dur)
    case.truth["seed"] = seed
    case.truth["corpus_kind"] = kind
    return case


# ---------------------------------------------------------------------------
# Helpers: noise, room, phone, codec
# ---------------------------------------------------------------------------

def _colored_noise(rng, n, exponent):
    """Gaussian noise with power spectrum ~ 1/f**exponent (0 white, 1 pink), unit variance."""
    if exponent == 0:
        return rng.standard_normal(n)
    spec = np.fft.rfft(rng.standard_normal(n))
    f = np.arange(len(spec), dtype=float)
    f[0] = 1.0
    spec /= f ** (exponent / 2)
    spec[0] = 0
    x = np.fft.irfft(spec, n)
    return x / np.std(x)


def _room_rir(rng, samplerate, dims, src, mic, rt60_s, max_order_cap=20):
    """A ShoeBox image-source RIR with its direct path at distance/c (pyroomacoustics' global
    fractional-delay offset, frac_delay_length // 2 samples, removed)."""
    import pyroomacoustics as pra

    e_abs, max_order = pra.inverse_sabine(rt60_s, dims)
    room = pra.ShoeBox(dims, fs=samplerate, materials=pra.Material(e_abs), max_order=min(max_order, max_order_cap),
                       air_absorption=False)
    room.add_source(list(src))
    room.add_microphone(np.array(mic, float))
    room.compute_rir()
    h = np.asarray(room.rir[0][0], float)
    h = h[pra.constants.get("frac_delay_length") // 2:]
    dist = float(np.linalg.norm(np.subtract(src, mic)))
    c = float(pra.constants.get("c"))
    try:
        from pyroomacoustics.experimental import measure_rt60
        rt_meas = float(measure_rt60(h, samplerate, decay_db=30))
    except Exception:  # measure_rt60 needs a long enough decay
        rt_meas = None
    # normalise so the direct sound has unit gain (pyroomacoustics scales it by 1/(4 pi d))
    h *= 4 * math.pi * dist
    return h, dist / c, {"dims_m": list(map(float, dims)), "source_m": list(map(float, src)),
                         "mic_m": list(map(float, mic)), "mic_distance_m": dist, "rt60_target_s": rt60_s,
                         "rt60_measured_s": rt_meas, "max_order": int(min(max_order, max_order_cap)),
                         "absorption": float(e_abs), "speed_of_sound_m_s": c}


def _place_in_room(rng, dims, distance_m):
    dims = np.asarray(dims, float)
    for _ in range(200):
        src = np.array([rng.uniform(0.6, dims[0] - 0.6), rng.uniform(0.6, dims[1] - 0.6), rng.uniform(0.7, 1.2)])
        v = rng.normal(size=3)
        v[2] *= 0.3
        mic = src + distance_m * v / np.linalg.norm(v)
        if np.all(mic > 0.2) and np.all(mic < dims - 0.2):
            return src, mic
    raise RuntimeError("could not place the microphone")


def _convolve(x, h):
    from scipy.signal import oaconvolve
    return oaconvolve(x, h)[: len(x)]


def _phone_chain(rng, x, samplerate, gate: bool):
    """A phone's processing with pedalboard: high-pass, gain control (compressor + make-up gain),
    optionally a noise gate, low-pass.  Returns (y, settings)."""
    import pedalboard as pb

    st = {"highpass_hz": float(rng.uniform(80, 250)),
          "compressor_threshold_db": float(rng.uniform(-38, -18)), "compressor_ratio": float(rng.uniform(2, 6)),
          "compressor_attack_ms": float(rng.uniform(2, 12)), "compressor_release_ms": float(rng.uniform(60, 300)),
          "makeup_gain_db": float(rng.uniform(4, 14)), "lowpass_hz": float(min(rng.uniform(6000, 12000),
                                                                                   0.45 * samplerate))}
    chain = [pb.HighpassFilter(st["highpass_hz"]),
             pb.Compressor(st["compressor_threshold_db"], st["compressor_ratio"], st["compressor_attack_ms"],
                           st["compressor_release_ms"]),
             pb.Gain(st["makeup_gain_db"])]
    if gate:
        st.update(gate_threshold_db=float(rng.uniform(-58, -42)), gate_ratio=float(rng.uniform(4, 12)),
                  gate_release_ms=float(rng.uniform(40, 200)))
        chain.append(pb.NoiseGate(st["gate_threshold_db"], st["gate_ratio"], 1.0, st["gate_release_ms"]))
    chain.append(pb.LowpassFilter(st["lowpass_hz"]))
    y = pb.Pedalboard(chain)(x.astype(np.float32)[None, :], samplerate)[0].astype(float)
    # the linear filters' delay at the sound's band (information only: beat_times_s are at the microphone)
    lin = pb.Pedalboard([pb.HighpassFilter(st["highpass_hz"]), pb.LowpassFilter(st["lowpass_hz"])])
    st["filters_delay_s"] = _lag_s(lin(x.astype(np.float32)[None, :], samplerate)[0].astype(float), x, samplerate)
    return y, st


def _lag_s(y, x, samplerate, max_lag=200):
    """Lag of y behind x (s): the peak of their cross-correlation (over an excerpt of 2^19
    samples from 1 s in), parabolic interpolation."""
    a = min(samplerate, max(0, min(len(x), len(y)) - (1 << 19)))
    n = min(len(x), len(y), a + (1 << 19)) - a
    x, y = x[a:a + n], y[a:a + n]
    m = 1 << int(math.ceil(math.log2(2 * n)))
    c = np.fft.irfft(np.fft.rfft(y, m) * np.conj(np.fft.rfft(x, m)), m)
    c = np.concatenate([c[-max_lag:], c[: max_lag + 1]])
    k = int(np.argmax(c))
    if 0 < k < len(c) - 1:
        a, b, d = c[k - 1], c[k], c[k + 1]
        frac = 0.5 * (a - d) / (a - 2 * b + d) if (a - 2 * b + d) != 0 else 0.0
    else:
        frac = 0.0
    return float((k - max_lag + frac) / samplerate)


_CODECS = {".m4a": ["-c:a", "aac"], ".mp3": ["-c:a", "libmp3lame"], ".opus": ["-c:a", "libopus"],
           ".ogg": ["-c:a", "libvorbis"]}


def _encode_decode(x, samplerate, suffix, bitrate_kbps):
    """Encode with ffmpeg (through files, so MP3's encoder-delay tag is written), decode back to
    float32 at the same rate.  Returns (decoded, encoded bytes, lag in samples of decoded vs input)."""
    import soundfile as sf

    if shutil.which("ffmpeg") is None:
        raise RuntimeError("ffmpeg is needed for lossy cases")
    with tempfile.TemporaryDirectory() as d:
        src = os.path.join(d, "in.wav")
        enc = os.path.join(d, "out" + suffix)
        sf.write(src, x.astype(np.float32), samplerate, subtype="FLOAT")
        rate = ["-q:a", str(bitrate_kbps)] if suffix == ".ogg" else ["-b:a", f"{bitrate_kbps}k"]
        r = subprocess.run(["ffmpeg", "-v", "error", "-y", "-i", src, *_CODECS[suffix], *rate, enc],
                           capture_output=True)
        if r.returncode:
            raise RuntimeError(r.stderr.decode(errors="replace"))
        r = subprocess.run(["ffmpeg", "-v", "error", "-i", enc, "-f", "f32le", "-ac", "1", "-ar", str(samplerate),
                            "pipe:1"], capture_output=True)
        if r.returncode:
            raise RuntimeError(r.stderr.decode(errors="replace"))
        y = np.frombuffer(r.stdout, np.float32).astype(float)
        with open(enc, "rb") as f:
            data = f.read()
    lag = int(round(_lag_s(y, x, samplerate, max_lag=4096) * samplerate))
    if len(y) < len(x):
        y = np.concatenate([y, np.zeros(len(x) - len(y))])
    return y[: len(x)], data, lag


def _snr_ref_power(clean, samplerate, onsets_s, window_s=0.010):
    p = []
    for t in onsets_s:
        a = int(math.ceil(t * samplerate))
        b = a + int(round(window_s * samplerate))
        if a >= 0 and b <= len(clean):
            p.append(np.mean(clean[a:b] ** 2))
    return float(np.median(p)) if p else float(np.mean(clean ** 2))


def _fit_beats(times, sides):
    """Least-squares line through the beat times with an offset for side 1: (slope, offset)."""
    t = np.asarray(times, float)
    k = np.arange(len(t), dtype=float)
    A = np.c_[np.ones_like(t), k, np.asarray(sides, float)]
    coef = np.linalg.lstsq(A, t - t[0], rcond=None)[0]
    return float(coef[1]), float(coef[2])


def _asymmetry(times, sides):
    d = np.diff(np.asarray(times, float))
    s = np.asarray(sides[:-1])
    a01, a10 = d[s == 0], d[s == 1]
    if not len(a01) or not len(a10):
        return None, None
    asym = float(np.mean(a01) - np.mean(a10))
    return asym * 1e3, 100.0 * asym / float(np.mean(d))


def _finish(rng, clean, samplerate, noise_power, noise_exponent, hum, peak_dbfs):
    """Add noise (and hum) to the clean microphone signal, set the level: returns (x, scale)."""
    n = len(clean)
    noise = math.sqrt(noise_power) * _colored_noise(rng, n, noise_exponent)
    x = clean + noise
    if hum is not None:
        f0, level = hum
        t = np.arange(n) / samplerate
        x += math.sqrt(noise_power) * level * (np.sin(2 * np.pi * f0 * t) + 0.4 * np.sin(2 * np.pi * 3 * f0 * t + 1.0))
    scale = 10 ** (peak_dbfs / 20) / max(np.max(np.abs(x)), 1e-12)
    return x * scale, scale


# ---------------------------------------------------------------------------
# Lever escapements
# ---------------------------------------------------------------------------

def _lever_params(rng, instrument):
    knock = rng.random() < 0.1
    if instrument == "alarm-clock":
        bph = int(rng.choice(ALARM_SERIES_BPH))
        inertia = rng.uniform(6e-9, 2e-8)
        lift = rng.uniform(40, 55)
        drop_t = rng.uniform(0.8e-3, 1.6e-3)
        amp = rng.uniform(190, 280)
        q = rng.uniform(120, 220)
    else:
        bph = int(rng.choice(WATCH_SERIES_BPH, p=[0.15, 0.05, 0.25, 0.05, 0.4, 0.1]))
        inertia = rng.uniform(0.8e-9, 2.5e-9)
        lift = rng.uniform(44, 56)
        drop_t = rng.uniform(0.3e-3, 0.8e-3)
        amp = rng.uniform(170, 315)
        q = rng.uniform(180, 320)
    bank = None
    if knock:
        bank = rng.uniform(318, 332)
        amp = bank + rng.uniform(8, 25)  # the free target: the banking stops it
    elif rng.random() < 0.5:
        bank = rng.uniform(325, 335)  # there, but not reached
    teeth = 15
    p = dict(nominal_beats_per_hour=bph, target_amplitude_deg=float(amp),
             target_rate_s_per_day=float(np.clip(rng.normal(0, 15), -60, 60)), inertia_kg_m2=float(inertia),
             q_viscous=float(q), coulomb_share=float(rng.uniform(0.15, 0.4)),
             cubic_per_rad2=float(rng.uniform(-1.5e-5, 1.5e-5)),
             rest_offset_deg=float(rng.uniform(-2.5, 2.5) if rng.random() < 0.85 else rng.uniform(-0.2, 0.2)),
             lift_angle_deg=float(lift), unlock_angle_deg=float(rng.uniform(8, 12)),
             unlock_torque_ratio=float(rng.uniform(0.15, 0.35)), lever_inertia_ratio=float(rng.uniform(0.002, 0.006)),
             bank_angle_deg=None if bank is None else float(bank), bank_restitution=float(rng.uniform(0.45, 0.7)),
             wheel_ratio=float(rng.uniform(0.2, 0.3)), drop_angle_deg=float(rng.uniform(1.0, 2.0)),
             drop_free_time_s=float(drop_t), torque_fall_per_hour=float(rng.uniform(0.005, 0.02)),
             hours_since_wind=float(rng.uniform(0, 30)),
             ripple=((float(rng.uniform(0.003, 0.015)), 2 * teeth, float(rng.uniform(0, 2 * np.pi))),
                     (float(rng.uniform(0.005, 0.02)), 60.0 * bph / 3600.0, float(rng.uniform(0, 2 * np.pi)))),
             escape_teeth=teeth, tooth_drop_errors=tuple(float(v) for v in rng.normal(0, 0.04, teeth)))
    return p, knock


def _lever_voice(rng, instrument, samplerate):
    """Our own case modes: a clamped circular case back and a free-free bridge; each sound
    strikes them at its own point (the two pallets and the two faces of the fork apart)."""
    pts_plate, pts_beam = {}, {}
    for kind in ("unlock", "impulse", "drop", "knock"):
        for side in ("+", "-"):
            pts_plate[kind + side] = (float(rng.uniform(0.1, 0.75)), float(rng.uniform(0, 2 * np.pi)))
            pts_beam[kind + side] = float(rng.uniform(0.05, 0.95))
    if instrument == "alarm-clock":
        plate = circular_plate_modes(rng.uniform(900, 1800), rng.uniform(30, 90), pts_plate, rng, n_modes=8)
        beam = beam_modes(rng.uniform(3000, 5500), rng.uniform(40, 150), pts_beam, rng, n_modes=3)
    else:
        plate = circular_plate_modes(rng.uniform(2200, 4500), rng.uniform(40, 120), pts_plate, rng, n_modes=7)
        beam = beam_modes(rng.uniform(5000, 9000), rng.uniform(60, 200), pts_beam, rng, n_modes=3)
    scale_beam = rng.uniform(0.3, 0.8)
    beam = ModeSet(beam.freqs_hz, beam.decay_s, {k: v * scale_beam for k, v in beam.gains.items()})
    return ModeSet.join(plate, beam).band_limited(samplerate)


def _lever_impacts(rng, beats, esc, teeth_strength):
    """Contact pulses of every beat from the integrated motion (Hertz: force ~ v^1.2, duration ~ v^-0.2)."""
    b0 = beats[min(2, len(beats) - 1)]
    ref = {"unlock": abs(b0.omega_before_entry), "impulse": abs(b0.omega_impulse), "drop": b0.drop_speed_rad_s,
           "knock": abs(b0.omega_before_entry)}
    level = {"unlock": rng.uniform(0.25, 0.6), "impulse": rng.uniform(0.12, 0.35), "drop": 1.0,
             "knock": rng.uniform(0.8, 1.6)}
    dur = {"unlock": rng.uniform(80e-6, 150e-6), "impulse": rng.uniform(100e-6, 200e-6),
           "drop": rng.uniform(50e-6, 100e-6), "knock": rng.uniform(60e-6, 120e-6)}
    imps = []
    for b in beats:
        side = "+" if b.direction > 0 else "-"
        tooth = teeth_strength[(b.index // 2) % len(teeth_strength)]
        imps.append(hertz_pulse("unlock" + side, b.t_entry, abs(b.omega_before_entry), ref["unlock"],
                                level["unlock"], dur["unlock"]))
        imps.append(hertz_pulse("impulse" + side, b.t_impulse, abs(b.omega_impulse), ref["impulse"],
                                level["impulse"] * tooth, dur["impulse"]))
        imps.append(hertz_pulse("drop" + side, b.t_drop, b.drop_speed_rad_s, ref["drop"], level["drop"] * tooth,
                                dur["drop"]))
        for tk, wk in b.knocks:
            imps.append(hertz_pulse("knock" + side, tk, wk, ref["knock"], level["knock"], dur["knock"]))
    return imps, {"level": level, "duration_s": dur, "reference_speed_rad_s": ref}


def _lever_case(kind, seed, rng, dur):
    room_phone = kind == "lever-room-phone"
    instrument = "alarm-clock" if room_phone and rng.random() < 0.3 else "wristwatch"
    params, knock_intended = _lever_params(rng, instrument)
    esc = LeverEscapement(**params)
    beats = esc.run(dur + PRE_ROLL_S + 0.05, t_start=-PRE_ROLL_S, start_phase=float(rng.random()))
    if room_phone:
        fs_render = 48000
        fs_out = int(rng.choice([8000, 16000, 22050, 44100, 48000], p=[0.1, 0.25, 0.1, 0.25, 0.3]))
    else:
        fs_render = fs_out = int(rng.choice([44100, 48000, 96000], p=[0.45, 0.45, 0.1]))
    voice = _lever_voice(rng, instrument, fs_render)
    teeth_strength = np.exp(rng.normal(0, 0.08, esc.escape_teeth))
    imps, sound_info = _lever_impacts(rng, beats, esc, teeth_strength)
    truth_events = _lever_event_table(beats, esc)
    return _render_case(kind, seed, rng, dur, "lever", instrument, imps, voice, fs_render, fs_out, truth_events,
                        esc, params, sound_info, room_phone=room_phone,
                        notes=["knocking intended (free amplitude above the banking)"] if knock_intended else [])


def _lever_event_table(beats, esc):
    rows = []
    for b in beats:
        rows.append(dict(first=b.t_entry, main=b.t_drop, last=b.t_drop, side=b.direction,
                         kinematic_lift=b.t_exit - b.t_entry, amplitude=abs(b.theta_turn - esc.theta_rest) / DEG,
                         knocks=[t for t, _ in b.knocks],
                         events={"unlock": b.t_entry, "impulse": b.t_impulse, "drop": b.t_drop}))
    return rows


# ---------------------------------------------------------------------------
# Pendulum clocks
# ---------------------------------------------------------------------------

def _clock_train(rng):
    """An invented going train whose centre wheel turns once an hour: beats/h =
    2 * escape teeth * (third wheel / escape pinion) * (centre wheel / third pinion)."""
    if rng.random() < 0.2:
        return 3600, {"escape_teeth": 30, "note": "seconds pendulum: the escape wheel turns once a minute"}
    for _ in range(1000):
        ne = int(rng.choice([30, 32, 36, 40]))
        pe, p3 = int(rng.choice([7, 8])), int(rng.choice([7, 8]))
        w3, w2 = int(rng.integers(48, 81)), int(rng.integers(56, 97))
        bph = 2 * ne * w3 * w2 / (pe * p3)
        if 5400 <= bph <= 9000 and all(abs(bph - s) > 50 for s in (5400, 6000, 7200, 9000)):
            return bph, {"escape_teeth": ne, "escape_pinion": pe, "third_wheel": w3, "third_pinion": p3,
                         "centre_wheel": w2}
    raise RuntimeError("no train found")


def _pendulum_case(kind, seed, rng, dur):
    bph, train = _clock_train(rng)
    escapement = "deadbeat" if rng.random() < 0.5 else "recoil"
    amp = rng.uniform(2.5, 5.5) if escapement == "deadbeat" else rng.uniform(3.0, 7.0)
    arc = rng.uniform(1.5, 3.0)
    max_off = min(0.8, amp - arc / 2 - 0.6)
    offset = float(rng.uniform(-max_off, max_off))
    teeth = int(train["escape_teeth"])
    params = dict(train_beats_per_hour=float(bph), target_amplitude_deg=float(amp),
                  target_rate_s_per_day=float(np.clip(rng.normal(0, 30), -120, 120)), escapement=escapement,
                  q=float(rng.uniform(60, 250)), bob_mass_kg=float(rng.uniform(0.1, 1.5)), impulse_arc_deg=float(arc),
                  crutch_offset_deg=offset, friction_ratio=float(rng.uniform(0.04, 0.15)),
                  wheel_ratio=float(rng.uniform(0.3, 1.0)), drop_angle_deg=float(rng.uniform(1.0, 3.0)),
                  drop_free_time_s=float(rng.uniform(2e-3, 6e-3)), torque_fall_per_hour=float(rng.uniform(0.0, 0.004)),
                  hours_since_wind=float(rng.uniform(0, 150)),
                  ripple=((float(rng.uniform(0.005, 0.03)), 2.0 * teeth, float(rng.uniform(0, 2 * np.pi))),))
    clock = PendulumClock(**params)
    beats = clock.run(dur + PRE_ROLL_S + 2.0, t_start=-PRE_ROLL_S - 1.5, start_phase=float(rng.random()))
    instrument = "longcase-clock" if bph == 3600 else str(rng.choice(["mantel-clock", "wall-clock"]))
    phone = rng.random() < 0.3
    fs_render = 48000
    fs_out = int(rng.choice([16000, 44100, 48000], p=[0.3, 0.3, 0.4])) if phone else int(rng.choice([44100, 48000]))
    pts_case, pts_plate, pts_beam = {}, {}, {}
    for k in ("release", "drop"):
        for side in ("+", "-"):
            pts_case[k + side] = (float(rng.uniform(0.2, 0.8)), float(rng.uniform(0.2, 0.8)))
            pts_plate[k + side] = (float(rng.uniform(0.1, 0.9)), float(rng.uniform(0.1, 0.9)))
            pts_beam[k + side] = float(rng.uniform(0.05, 0.95))
    case = rect_plate_modes(rng.uniform(150, 400), rng.uniform(0.6, 1.6), rng.uniform(15, 40), pts_case, rng, n_modes=6)
    plates = rect_plate_modes(rng.uniform(600, 1500), rng.uniform(0.7, 1.4), rng.uniform(200, 600), pts_plate, rng,
                              n_modes=6)
    pallet = beam_modes(rng.uniform(2000, 4000), rng.uniform(100, 300), pts_beam, rng, n_modes=3)
    gs = rng.uniform(0.3, 0.7), rng.uniform(0.5, 1.0), rng.uniform(0.2, 0.6)
    voice = ModeSet.join(*[ModeSet(m.freqs_hz, m.decay_s, {k: v * g for k, v in m.gains.items()})
                           for m, g in zip((case, plates, pallet), gs)]).band_limited(fs_render)
    b0 = beats[min(2, len(beats) - 1)]
    lv = {"release": rng.uniform(0.03, 0.12), "drop": 1.0}
    du = {"release": rng.uniform(150e-6, 300e-6), "drop": rng.uniform(80e-6, 200e-6)}
    ref_rel = abs(b0.omega_release)
    tooth = np.exp(rng.normal(0, 0.1, teeth))
    imps, rows = [], []
    for b in beats:
        side = "+" if b.direction > 0 else "-"
        ts = tooth[(b.index // 2) % teeth]
        imps.append(hertz_pulse("release" + side, b.t_release, abs(b.omega_release), ref_rel, lv["release"],
                                du["release"]))
        imps.append(hertz_pulse("drop" + side, b.t_drop, b.drop_speed_rad_s, b0.drop_speed_rad_s, lv["drop"] * ts,
                                du["drop"]))
        rows.append(dict(first=b.t_release, main=b.t_drop, last=b.t_drop, side=b.direction,
                         kinematic_lift=b.t_exit - b.t_release, amplitude=abs(b.theta_turn) / DEG, knocks=[],
                         events={"release": b.t_release, "drop": b.t_drop}))
    sound_info = {"level": lv, "duration_s": du}
    c = _render_case(kind, seed, rng, dur, "pendulum", instrument, imps, voice, fs_render, fs_out, rows, clock,
                     params, sound_info, room_phone=phone, pendulum=True)
    c.truth["train"] = train
    c.truth["train_beats_per_hour"] = float(bph)
    if bph in CLOCK_SERIES_BPH:
        c.truth["beats_per_hour"] = float(bph)
    else:
        c.truth["beats_per_hour"] = None
        c.truth["rate_s_per_day"] = None
    c.truth["rate_vs_train_s_per_day"] = 86400.0 * (3600.0 / bph / c.truth["beat_interval_s"] - 1)
    if bph in CLOCK_SERIES_BPH:
        c.truth["rate_s_per_day"] = c.truth["rate_vs_train_s_per_day"]
    c.truth["escapement"] = escapement
    c.truth["pendulum_length_m"] = clock.length_m
    return c


# ---------------------------------------------------------------------------
# Shared rendering and truth
# ---------------------------------------------------------------------------

def _render_case(kind, seed, rng, dur, movement, instrument, imps, voice, fs_render, fs_out, rows, model, params,
                 sound_info, room_phone=False, pendulum=False, notes=()):
    from scipy.signal import resample_poly

    notes = list(notes)
    n_render = int(round(dur * fs_render))
    room = None
    if room_phone or pendulum:
        dims = [float(rng.uniform(3, 6)), float(rng.uniform(3, 5)), float(rng.uniform(2.4, 3.0))]
        dist = float(rng.uniform(0.05, 0.6) if movement == "lever" else rng.uniform(0.3, 2.0))
        src, mic = _place_in_room(rng, dims, dist)
        rt60 = float(rng.uniform(0.25, 0.7) if movement == "lever" else rng.uniform(0.3, 0.9))
        h, delay, room = _room_rir(rng, fs_render, dims, src, mic, rt60)
        dry = render_impacts(imps, voice, fs_render, n_render + len(h), t0_s=-len(h) / fs_render)
        clean = _convolve(dry, h)[len(h):]
        # dry sound rendered from t = -len(h)/fs so that the reverberation of beats before the
        # recording starts is heard; the RIR carries the direct-path delay
    else:
        dist = float(rng.uniform(0.005, 0.03))  # a microphone on the case
        delay = dist / SPEED_OF_SOUND_M_S
        shifted = [Impact(i.time_s + delay, i.kind, i.force, i.duration_s) for i in imps]
        clean = render_impacts(shifted, voice, fs_render, n_render)
        room = {"mic_distance_m": dist, "speed_of_sound_m_s": SPEED_OF_SOUND_M_S, "reverberation": None}
    room["direct_delay_s"] = delay

    # beats whose first sound reaches the microphone within the recording
    rows = [r for r in rows if 0 <= r["first"] + delay < dur]
    times = np.array([r["first"] + delay for r in rows])
    side0 = rows[0]["side"]
    sides = [0 if r["side"] == side0 else 1 for r in rows]
    main = np.array([r["main"] + delay for r in rows])

    # SNR and noise
    if kind == "lever-clean":
        snr = float(rng.uniform(25, 40))
    elif kind == "lever-noisy":
        snr = float(rng.uniform(10, 20))
    elif kind == "lever-room-phone":
        snr = float(rng.uniform(15, 35))
    else:
        snr = float(rng.uniform(20, 40))
    p_ref = _snr_ref_power(clean, fs_render, main)
    noise_power = p_ref / 10 ** (snr / 10)
    hum = None
    if kind == "lever-noisy" and rng.random() < 0.4:
        hum = (float(rng.choice([50.0, 60.0])), float(rng.uniform(1, 6)))
    noise_exp = float(rng.choice([0.0, 0.5, 1.0]))
    # the noise from a generator of its own: every other choice of the case is independent of its duration
    noise_rng = np.random.default_rng(int(rng.integers(2 ** 63)))
    x, _ = _finish(noise_rng, clean, fs_render, noise_power, noise_exp, hum, float(rng.uniform(-20, -6)))

    chain = None
    if room_phone:
        x, chain = _phone_chain(rng, x, fs_render, gate=rng.random() < 0.5)
        peak = float(np.max(np.abs(x)))
        chain["output_scaled_by"] = min(1.0, 0.7 / peak) if peak > 0 else 1.0  # the phone keeps its peaks under 0 dBFS
        x = x * chain["output_scaled_by"]
    if fs_out != fs_render:
        g = math.gcd(fs_out, fs_render)
        x = resample_poly(x, fs_out // g, fs_render // g)
    x = np.clip(x, -1.0, 1.0)
    suffix, encoded, codec, lag = ".wav", None, None, 0
    if room_phone and rng.random() < 0.75:
        choices = [s for s in LOSSY_SUFFIXES if not (s == ".opus" and fs_out not in (8000, 16000, 48000))]
        suffix = str(rng.choice(choices))
        # bit rate in kbit/s (Vorbis: the encoder's quality level, -q:a)
        kbps = int(rng.choice({".m4a": [48, 64, 96, 128], ".mp3": [48, 64, 96, 128], ".opus": [24, 32, 48, 64],
                               ".ogg": [1, 2, 3, 4]}[suffix]))
        if fs_out <= 16000 and suffix != ".ogg":
            kbps = min(kbps, 48)
        x, encoded, lag = _encode_decode(x, fs_out, suffix, kbps)
        codec = {"suffix": suffix, "decoded_lag_samples": lag,
                 ("vorbis_quality" if suffix == ".ogg" else "bitrate_kbps"): kbps}
        if lag:
            notes.append(f"the decoded file lags the encoder's input by {lag} samples; truth times include it")
    shift = lag / fs_out
    times = times + shift
    main = main + shift

    interval, side_offset = _fit_beats(times, sides)
    asym_ms, asym_pct = _asymmetry(times, sides)
    nominal = getattr(model, "nominal_beat_s", None)
    bph = params.get("nominal_beats_per_hour")
    lift_each = np.array([(r["last"] - r["first"]) * 1e3 for r in rows])
    kin_each = np.array([r["kinematic_lift"] * 1e3 for r in rows])
    amps = np.array([r["amplitude"] for r in rows])
    s_arr = np.array(sides)
    lift_side = [float(np.mean(lift_each[s_arr == s])) if np.any(s_arr == s) else None for s in (0, 1)]
    kin_side = [float(np.mean(kin_each[s_arr == s])) if np.any(s_arr == s) else None for s in (0, 1)]
    lift_angle = params.get("lift_angle_deg", params.get("impulse_arc_deg"))
    period = 2 * interval
    # the published relation (domain.md s.10.3) applied to the true lift times: what an ideal
    # reading of the sounds would report, to compare with the true amplitude
    a_from_lift = [lift_angle / (2 * math.sin(math.pi * (v * 1e-3) / period)) if v else None for v in lift_side]
    if params.get("escapement") == "recoil":
        a_from_lift = [None, None]  # a recoil escapement has no lift to time: its first to last sound is the drop
        notes.append("recoil escapement: the beat's sounds are the escape and the drop; lift_time_ms is the drop")
    knock_beats, knock_times = [], []
    for i, r in enumerate(rows):
        if r["knocks"]:
            knock_beats.append(i)
            knock_times += [t + delay + shift for t in r["knocks"]]
    ev_times = {}
    for r in rows:
        for k, t in r["events"].items():
            ev_times.setdefault(k, []).append(t + delay + shift)
    if knock_times:
        ev_times["knock"] = knock_times
    truth = {
        "kind": "escapement", "movement": movement, "instrument": instrument, "samplerate": int(fs_out),
        "duration_s": len(x) / fs_out,
        "beats_per_hour": None if bph is None else float(bph),
        "beat_interval_s": interval,
        "rate_s_per_day": None if nominal is None else 86400.0 * (nominal / interval - 1),
        "side_offset_s": side_offset,
        "beat_asymmetry_ms": asym_ms, "beat_asymmetry_percent": asym_pct,
        "lift_angle_deg": float(lift_angle),
        "amplitude_deg": float(np.mean(amps)), "amplitude_per_beat_deg": amps.tolist(),
        "lift_time_ms": lift_side, "lift_times_ms": lift_each.tolist(),
        "lift_time_kinematic_ms": kin_side,
        "amplitude_from_lift_deg": a_from_lift,
        "beat_times_s": times.tolist(), "beat_sides": sides, "main_sound_times_s": main.tolist(),
        "event_times_s": ev_times,
        "knock_beats": knock_beats, "knock_times_s": knock_times,
        "snr_db": snr, "noise_spectrum_exponent": noise_exp, "hum": None if hum is None else
        {"hz": hum[0], "level_over_noise_rms": hum[1]},
        "lossy": encoded is not None, "codec": codec, "room": room, "phone_chain": chain,
        "samplerate_rendered": fs_render,
        "params": _jsonable(params), "calibration": _jsonable(model.calibration), "sound": _jsonable(sound_info),
        "notes": notes + [
            "beat_times_s: first sound of each beat at the microphone (direct-path delay included; the phone's "
            "filters' own delay, phone_chain.filters_delay_s, is not)",
            "side 0 = the side of the first beat listed; beat_asymmetry = mean(side0->side1) - mean(side1->side0)",
            "lift_time_ms: first to last sound of the beat (unlocking to drop, the escape wheel's free drop "
            "included); lift_time_kinematic_ms: the balance's entry to its exit from the lift",
            "amplitude about the rest point of the hairspring (lever) or the vertical (pendulum)",
        ] + (["knocking: the banking cuts the swing short, and the model's watch gains strongly (rate from the "
              "integration)"] if knock_beats else []),
    }
    name = f"{kind}-{seed:06d}"
    return EscapementCase(name, x.astype(np.float32), int(fs_out), truth, suffix, encoded)


def _jsonable(v):
    if isinstance(v, dict):
        return {str(k): _jsonable(u) for k, u in v.items()}
    if isinstance(v, (list, tuple)):
        return [_jsonable(u) for u in v]
    if isinstance(v, (np.floating, np.integer)):
        return v.item()
    if isinstance(v, np.ndarray):
        return v.tolist()
    return v


# ---------------------------------------------------------------------------
# Things that are not an escapement
# ---------------------------------------------------------------------------

def _other_case(kind, seed, rng, dur):
    sub = ("quartz", "sweep", "noise", "speech")[seed % 4]
    fs = int(rng.choice([16000, 44100, 48000]))
    n = int(round(dur * fs))
    t = np.arange(n) / fs
    truth = {"kind": "none", "movement": sub, "instrument": None, "samplerate": fs, "duration_s": dur,
             "beats_per_hour": None, "beat_interval_s": None, "rate_s_per_day": None, "beat_asymmetry_ms": None,
             "beat_asymmetry_percent": None, "lift_angle_deg": None, "amplitude_deg": None, "lift_time_ms": None,
             "beat_times_s": [], "beat_sides": [], "knock_beats": [], "snr_db": None, "lossy": False, "notes": []}
    noise_sigma = 10 ** (rng.uniform(-4, -2.5))
    if sub == "quartz":
        rate = float(np.clip(rng.normal(0, 10), -30, 30))
        interval = 1.0 / (1 + rate / 86400.0)
        t0 = float(rng.uniform(0.05, 0.95))
        times = t0 + interval * np.arange(int((dur - t0) / interval) + 1)
        times = times[times < dur]
        pts = {"step+": (float(rng.uniform(0.1, 0.7)), 0.0), "step-": (float(rng.uniform(0.1, 0.7)), 1.3)}
        pb = {"step+": float(rng.uniform(0.1, 0.9)), "step-": float(rng.uniform(0.1, 0.9))}
        voice = ModeSet.join(circular_plate_modes(rng.uniform(1200, 3000), rng.uniform(15, 50), pts, rng, n_modes=6),
                             beam_modes(rng.uniform(3500, 7000), rng.uniform(20, 60), pb, rng, n_modes=3)
                             ).band_limited(fs)
        dist = float(rng.uniform(0.01, 0.3))
        delay = dist / SPEED_OF_SOUND_M_S
        dura = float(rng.uniform(150e-6, 400e-6))
        imps = [Impact(tt + delay, "step+" if i % 2 == 0 else "step-", 1.0, dura) for i, tt in enumerate(times)]
        clean = render_impacts(imps, voice, fs, n)
        snr = float(rng.uniform(15, 40))
        p_ref = _snr_ref_power(clean, fs, times + delay)
        x, _ = _finish(rng, clean, fs, p_ref / 10 ** (snr / 10), float(rng.choice([0.0, 1.0])), None,
                       float(rng.uniform(-20, -6)))
        truth.update(kind="stepping", movement="stepping-motor", instrument="quartz wall clock",
                     beats_per_hour=3600.0, beat_interval_s=interval, rate_s_per_day=rate, beat_asymmetry_ms=0.0,
                     beat_asymmetry_percent=0.0, beat_times_s=(times + delay).tolist(),
                     beat_sides=[i % 2 for i in range(len(times))], snr_db=snr,
                     notes=["one sound per step, coil polarities alternate (their sounds differ a little)"])
    elif sub == "sweep":
        f_mains = float(rng.choice([50.0, 60.0]))
        f0 = 2 * f_mains  # a synchronous motor hums at twice the mains frequency
        x = np.zeros(n)
        for h, a in enumerate([1.0, 0.5, 0.3, 0.2, 0.1], start=1):
            x += a * np.sin(2 * np.pi * h * f0 * t + rng.uniform(0, 2 * np.pi))
        mesh_hz = float(rng.uniform(8, 40))  # gear mesh: a whir amplitude-modulated by the teeth
        from scipy.signal import butter, sosfiltfilt
        sos = butter(4, [min(1500, 0.4 * fs), min(4000, 0.45 * fs)], btype="band", fs=fs, output="sos")
        whir = sosfiltfilt(sos, rng.standard_normal(n))
        whir *= (1 + 0.6 * np.sin(2 * np.pi * mesh_hz * t)) * rng.uniform(0.3, 1.0) / np.std(whir)
        x = x * (1 + 0.05 * np.sin(2 * np.pi * rng.uniform(0.1, 1.0) * t)) + whir
        x += noise_sigma * 50 * rng.standard_normal(n)
        x *= 10 ** (rng.uniform(-24, -8) / 20) / np.max(np.abs(x))
        truth["notes"] = [f"synchronous clock motor hum at {f0:g} Hz with harmonics and a gear whir "
                          f"modulated at {mesh_hz:.1f} Hz: no beats"]
    elif sub == "noise":
        x = _colored_noise(rng, n, float(rng.choice([0.0, 1.0, 2.0])))
        k = rng.poisson(rng.uniform(0.3, 2.0) * dur)
        clicks = np.sort(rng.uniform(0, dur, k))
        pts = {"click": (0.4, 0.0)}
        voice = circular_plate_modes(rng.uniform(800, 3000), rng.uniform(10, 40), pts, rng, n_modes=5).band_limited(fs)
        imps = [Impact(float(c), "click", float(rng.lognormal(0, 0.7)), float(rng.uniform(1e-4, 5e-4)))
                for c in clicks]
        cl = render_impacts(imps, voice, fs, n)
        if np.max(np.abs(cl)) > 0:
            x += cl / np.max(np.abs(cl)) * rng.uniform(3, 20)
        x *= 10 ** (rng.uniform(-24, -8) / 20) / np.max(np.abs(x))
        truth["notes"] = [f"noise with {k} clicks at random (Poisson) times"]
    else:
        x = _speech_like(rng, fs, n)
        x += noise_sigma * rng.standard_normal(n) * np.max(np.abs(x))
        x *= 10 ** (rng.uniform(-20, -6) / 20) / np.max(np.abs(x))
        truth["notes"] = ["speech-like bursts: voiced syllables through formant resonances, words and pauses"]
    return EscapementCase(f"{kind}-{seed:06d}", np.clip(x, -1, 1).astype(np.float32), fs, truth, ".wav", None)


def _speech_like(rng, fs, n):
    """Syllables of a glottal pulse train (jittered pitch with a glide) through three formant
    resonators, grouped into words and phrases with pauses."""
    from scipy.signal import lfilter

    x = np.zeros(n)
    t = float(rng.uniform(0, 0.5))
    f0_base = float(rng.uniform(90, 220))
    while t < n / fs - 0.3:
        for _ in range(int(rng.integers(1, 5))):  # syllables in a word
            dur = float(rng.uniform(0.08, 0.3))
            a, b = int(t * fs), min(n, int((t + dur) * fs))
            if b <= a:
                break
            m = b - a
            f0 = f0_base * (1 + 0.15 * rng.standard_normal()) * np.linspace(1.0, rng.uniform(0.8, 1.2), m)
            phase = np.cumsum(f0 * (1 + 0.01 * rng.standard_normal(m)) / fs)
            src = (np.diff(np.floor(phase), prepend=np.floor(phase[0])) > 0).astype(float)
            src = lfilter([1.0], [1.0, -0.95], src)
            y = np.zeros(m)
            for fc, bw in ((rng.uniform(300, 800), 80), (rng.uniform(900, 2200), 120), (rng.uniform(2400, 3200), 180)):
                if fc < 0.45 * fs:
                    r = math.exp(-math.pi * bw / fs)
                    y += lfilter([1 - r], [1, -2 * r * math.cos(2 * math.pi * fc / fs), r * r], src)
            env = np.sin(np.pi * np.arange(m) / m) ** 0.7
            x[a:b] += y * env * rng.uniform(0.5, 1.0)
            t += dur + float(rng.uniform(0.02, 0.12))
        t += float(rng.uniform(0.1, 0.4)) if rng.random() < 0.7 else float(rng.uniform(0.6, 2.0))
    return x
