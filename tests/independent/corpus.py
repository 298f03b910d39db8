"""Independent test corpora: one entry point, ``cases(kind, split, n)``.

Nothing here imports tickscope: the recordings come from sox (:mod:`.sox_corpus`) and from a
numerically integrated Lavet motor (:mod:`.motor_model`) through pyroomacoustics, pedalboard and
ffmpeg (:mod:`.effects`); the truth is computed from the construction, never measured on the audio.

Splits (the seed decides everything; generation is deterministic given kind and seed):
    dev   seeds 0..9999        for engineers to look at and debug
    test  seeds 50000..59999   the unit tests' analysis checks (tests/test_independent.py)
    score seeds 100000..       only for the benchmark's printed figures; nobody tunes on them
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Iterator

import numpy as np

from . import effects as fx
from . import motor_model as mm
from . import sox_corpus

SPLITS = {"dev": (0, 10000), "test": (50000, 60000), "score": (100000, 10 ** 9)}
KINDS = ("sox-clean", "sox-resampled", "sox-noisy", "motor-clean", "motor-room", "motor-phone", "motor-lossy",
         "motor-faults", "no-diagnosis", "short-clips")
DIAGNOSES = ("inhibition", "burst", "failed", "correction", "drive_levels", "position_locked", "other_clock")


@dataclass
class Case:
    name: str
    audio: np.ndarray  # float32 mono (for lossy cases: as ffmpeg decodes the encoded file)
    samplerate: int
    truth: dict
    suffix: str  # '.wav', or the lossy file's extension ('.mp3', '.m4a', '.opus', '.ogg')
    encoded: bytes | None = field(default=None, repr=False)  # the lossy file's bytes (write these)


def cases(kind: str, split: str, n: int, *, start: int = 0) -> Iterator[Case]:
    """n cases of ``kind`` from ``split`` (seeds base+start .. base+start+n-1)."""
    lo, hi = SPLITS[split]
    for i in range(start, start + n):
        if lo + i >= hi:
            raise ValueError(f"split {split!r} has no seed {lo + i}")
        yield case(kind, lo + i)


def case(kind: str, seed: int) -> Case:
    """The case of ``kind`` with ``seed`` (reproducible)."""
    if kind not in KINDS:
        raise ValueError(f"kind {kind!r}: expected one of {KINDS}")
    rng = np.random.default_rng([seed, KINDS.index(kind), 7919])
    if kind.startswith("sox-"):
        audio, fs, truth = sox_corpus.build(kind[4:], rng)
        return _finish(kind, seed, audio, fs, truth)
    if kind == "short-clips":
        if rng.random() < 0.5:
            audio, fs, truth = sox_corpus.build("noisy", rng, duration_s=5.0, n_ticks=5, allow_missed=False,
                                                snr_db=float(rng.uniform(18, 35)), noise="whitenoise")
        else:
            audio, fs, truth, enc, suf = motor_recording(rng, "short")
            return _finish(kind, seed, audio, fs, truth, enc, suf)
        return _finish(kind, seed, audio, fs, truth)
    if kind == "no-diagnosis" and rng.random() < 0.4:
        audio, fs, truth = sox_corpus.build("noisy", rng, duration_s=float(rng.uniform(120, 300)),
                                            snr_db=float(rng.uniform(15, 35)))
        return _finish(kind, seed, audio, fs, truth)
    audio, fs, truth, enc, suf = motor_recording(rng, kind[6:] if kind.startswith("motor-") else "none")
    return _finish(kind, seed, audio, fs, truth, enc, suf)


def _finish(kind, seed, audio, fs, truth, encoded=None, suffix=".wav") -> Case:
    truth = dict(truth)
    truth["corpus"] = kind
    truth["seed"] = int(seed)
    return Case(f"{kind}-{seed}", np.asarray(audio, np.float32), int(fs), _jsonable(truth), suffix, encoded)


def _jsonable(v):
    if isinstance(v, dict):
        return {str(k): _jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    if isinstance(v, (np.floating,)):
        return float(v)
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, np.ndarray):
        return [_jsonable(x) for x in v.tolist()]
    return v


# --------------------------------------------------------------------------------------------------
# motor recordings


def min_level(mv: mm.Movement, volts: float, extra: float = 0.0) -> int | None:
    """The lowest PCA2002 width index at which the motor steps (from the integration)."""
    for lv, w in enumerate(mm.PCA2002_WIDTHS_S):
        if mv.motion((mm.Pulse(0.0, w, volts),), round(extra, 3), 0.09).final_half_turns == 1:
            return lv
    return None


def _movement(rng, fs, **kw) -> mm.Movement:
    """A random movement whose motor steps at 1.55 V within the PCA2002 widths (redrawn otherwise)."""
    for _ in range(8):
        p = mm.MotorParams.random(rng)
        modes = mm.case_modes(rng)
        mv = mm.Movement(p, modes, fs, seed=int(rng.integers(1 << 30)), **kw)
        lv = min_level(mv, 1.55, kw.get("load_jitter", 0.0))
        if lv is not None and lv <= 5:
            return mv
    raise RuntimeError("no random motor steps at 1.55 V")


def _level(mv, volts, extra=0.0, default=4) -> int:
    lv = min_level(mv, volts, extra)
    return default if lv is None else lv


def _other_clock(rng, fs, duration_s, main_rate) -> tuple[mm.Movement, list, float]:
    """A second clock in the room: another movement, another crystal."""
    mv = _movement(rng, fs)
    diff = float(rng.choice([-1, 1]) * rng.uniform(30, 300))
    rate = main_rate + diff
    ppm = rate / 0.0864
    div = mm.Divider(ppm, first_edge_s=float(rng.uniform(0.15, 0.9)))
    lv = _level(mv, 1.55)
    ev = mv.run(div, mm.DriveProgram(level=min(7, lv + 1)), duration_s)
    return mv, ev, div.regulated_rate_s_per_day()


def motor_recording(rng: np.random.Generator, flavor: str):
    """A motor-model recording: flavor 'clean' | 'room' | 'phone' | 'lossy' | 'faults' | 'none' | 'short'.

    Returns (audio float32, samplerate, truth, encoded bytes or None, suffix)."""
    notes = []
    if flavor == "clean":
        fs = int(rng.choice([16000, 22050, 32000, 44100, 48000]))
        duration = float(rng.uniform(60, 150))
    elif flavor == "phone":
        fs = int(rng.choice([8000, 16000, 32000, 44100, 48000]))
        duration = float(rng.uniform(90, 180))
    elif flavor == "lossy":
        fs = 0  # chosen with the codec below
        duration = float(rng.uniform(90, 180))
    elif flavor == "short":
        fs = int(rng.choice([16000, 44100, 48000]))
        duration = 5.0
    elif flavor == "none":
        fs = int(rng.choice([16000, 22050, 44100, 48000]))
        duration = float(rng.uniform(120, 300))
    else:
        fs = int(rng.choice([16000, 22050, 32000, 44100, 48000]))
        duration = float(rng.uniform(90, 150))
    sub = str(rng.choice(["inhibition", "burst", "failed", "adaptive", "schedule"])) if flavor == "faults" else None
    if sub in ("inhibition", "adaptive", "schedule"):
        fs = int(rng.choice([16000, 22050]))  # long recordings
    codec = None
    if flavor == "lossy":
        codec = str(rng.choice(["mp3", "aac", "opus", "vorbis", "aac-voice-memo"]))
        if codec == "opus":
            fs = 48000
        elif codec == "aac-voice-memo":
            fs = 32000
        else:
            fs = int(rng.choice([22050, 44100, 48000]))

    variants = 1
    load_jitter = 0.0
    if flavor in ("phone", "lossy") and rng.random() < 0.5:
        variants, load_jitter = 5, float(rng.uniform(0.02, 0.08))  # tick-to-tick variation of the load
        notes.append(f"tick-to-tick load variation +-{load_jitter:.2f} K_d (5 variants)")
    mv = _movement(rng, fs, load_jitter=load_jitter, variants=variants)
    if rng.random() < 0.2:
        mv.params = mm.replace(mv.params, hand_ratio=0.0)
        notes.append("no compliant hand (no bounce)")
    volts = 1.55
    lv0 = _level(mv, volts, load_jitter)
    drive = mm.DriveProgram(level=min(7, lv0 + 1), volts=volts)
    first_edge = float(rng.uniform(0.3, 0.9))
    crystal_ppm = float(rng.uniform(-60, 60))
    inhibition = None
    if flavor == "faults":
        if sub == "inhibition":
            period = int(rng.choice([10, 60, 120]))
            pulse_hz = int(rng.choice([32768, 8192]))
            crystal_ppm = float(rng.uniform(8, 60))
            pulses = max(1, int(round(crystal_ppm * 1e-6 * period * pulse_hz)))
            if pulse_hz == 8192:
                pulses = min(pulses, 127)
            inhibition = mm.Inhibition(period, pulses, pulse_hz)
            duration = float(max(250.0, 2.6 * period + 20 * rng.random()))
        elif sub == "burst":
            n_b = int(rng.choice([2, 4]))
            volts = float(rng.uniform(1.25, 1.4))  # a cell near its end
            lv = _level(mv, volts, 0.0, 5)
            spacing_ms = float(rng.uniform(30, 60))
            drive = mm.DriveProgram(mode="burst", volts=volts, level=min(7, lv + 1), steps_per_burst=n_b,
                                    burst_spacing_cycles=int(round(spacing_ms * 32.768)))
            duration = float(rng.uniform(120, 180))
        elif sub == "failed":
            # a cell a little low and an unbalanced seconds hand: the drive just steps the motor when
            # the hand is level, and fails near the top of the hand's climb (the load at which it
            # fails is found by integration)
            volts = float(rng.uniform(1.35, 1.55))
            lv = min_level(mv, volts)
            if lv is None:
                volts, lv = 1.55, _level(mv, 1.55)
            fail_at = None
            for extra in np.arange(0.05, 0.65, 0.05):
                if mv.motion((mm.Pulse(0.0, mm.PCA2002_WIDTHS_S[lv], volts),), round(float(extra), 3), 0.09).final_half_turns != 1:
                    fail_at = float(extra)
                    break
            drive = mm.DriveProgram(level=lv, volts=volts)
            # just under the failing load at the top of the climb: a step fails there only when the
            # step-to-step variation adds to it (1 in 3)
            mv.hand_imbalance = (fail_at if fail_at is not None else 0.6) - 0.05 + float(rng.uniform(0.005, 0.02))
            # the load also varies a little from step to step, so a hesitating hand gets over the top
            mv.variants, mv.load_jitter = 3, 0.05
            mv.hand_phase = float(rng.uniform(0, 2 * math.pi))
            duration = float(rng.uniform(150, 240))
        elif sub == "adaptive":
            lv = _level(mv, volts)
            drive = mm.DriveProgram(mode="adaptive", volts=volts, level=max(0, lv - 1) if rng.random() < 0.5 else lv,
                                    down_every_s=float(rng.uniform(60, 150)), correction_delay_s=float(rng.uniform(0.025, 0.045)))
            mv.hand_imbalance = float(rng.uniform(0.1, 0.3))
            mv.hand_phase = float(rng.uniform(0, 2 * math.pi))
            duration = float(rng.uniform(300, 420))
        else:  # schedule: levels chosen to sound >= 3 dB apart where the motor allows it
            lv = _level(mv, volts)
            cands = list(range(lv, 8))
            peaks = {}
            for c in cands:
                mo = mv.motion((mm.Pulse(0.0, mm.PCA2002_WIDTHS_S[c], volts),), 0.0, 0.09)
                if mo.final_half_turns == 1:
                    peaks[c] = 20 * math.log10(np.max(np.abs(mv.sound(mo.pulses, 0.0, 0.09, "A").wave)))
            lo_c = min(peaks, key=peaks.get)
            hi_c = max(peaks, key=peaks.get)
            levels = (lo_c, hi_c) if lo_c != hi_c else (lv, 7)
            stage = float(rng.uniform(60, 120))
            drive = mm.DriveProgram(mode="schedule", volts=volts, levels=levels, stage_s=stage, level=levels[0])
            duration = float(max(3.2 * stage, 240))
            notes.append(f"drive widths {[round(mm.PCA2002_WIDTHS_S[c] * 1e3, 2) for c in levels]} ms, "
                         f"sound peaks {[round(peaks.get(c, float('nan')), 1) for c in levels]} dB (arbitrary ref), stage {stage:.0f} s")
        notes.append(f"fault: {sub}")
    if flavor == "short":
        first_edge = float(rng.uniform(0.3, 0.5))
    div = mm.Divider(crystal_ppm, inhibition, first_edge_s=first_edge)
    # a 5 s clip: exactly 5 edges
    events = mv.run(div, drive, duration if flavor != "short" else first_edge + 4.0 + 0.13)
    n = int(round(duration * fs))
    dry = mv.render(events, n)
    rate = div.regulated_rate_s_per_day()

    # --- another clock in the room
    other = None
    other_dry = None
    if flavor in ("phone", "faults", "room") and rng.random() < (0.35 if flavor == "phone" else 0.15) and sub != "burst":
        omv, oev, orate = _other_clock(rng, fs, duration, rate)
        other_dry = omv.render(oev, n)
        other_db = float(rng.uniform(-16, -8))
        other = dict(rate_s_per_day=orate, level_db=other_db)
    # levels: the movement's median step peak (dry) sets the scale
    peaks = [np.max(np.abs(dry[int(e.time_s * fs):int(e.time_s * fs) + int(0.03 * fs)])) for e in events
             if e.kind in ("step", "burst-step") and int(e.time_s * fs) < n]
    ref = float(np.median(peaks)) if peaks else float(np.max(np.abs(dry)) or 1.0)
    dry /= ref
    if other_dry is not None:
        # the other clock's loudest tick, level_db under the movement's median step (both dry)
        other_dry *= 10 ** (other["level_db"] / 20) / max(float(np.max(np.abs(other_dry))), 1e-12)

    # --- room (pyroomacoustics)
    room = None
    delay = 0.0
    use_room = flavor in ("room", "phone", "lossy", "none") or (flavor == "faults" and rng.random() < 0.5) \
        or (flavor == "short" and rng.random() < 0.5)
    if use_room:
        rooms = fx.shoebox_room(fs, rng, sources=2 if other_dry is not None else 1)
        clean = fx.apply_room(dry, rooms[0])
        delay = rooms[0].direct_delay_s
        room = dict(rt60_s=rooms[0].rt60_s, direct_delay_s=delay, distance_m=rooms[0].distance_m, dims_m=rooms[0].dims_m)
        if other_dry is not None:
            other_dry = fx.apply_room(other_dry, rooms[1])  # direct paths both at gain 1: level_db holds at the mic
    else:
        clean = dry
    level = 10 ** (float(rng.uniform(-26, -10)) / 20)
    clean = clean * level
    if other_dry is not None:
        other_dry = other_dry * level

    # --- the step times (first arrival at the microphone: pulse start + direct path)
    steps = [e for e in events if e.kind in ("step", "burst-step")]
    step_t = np.array([e.time_s + delay for e in steps])
    # SNR: mean step power over its first 10 ms of the recorded clean sound / noise variance
    m10 = int(0.010 * fs)
    pw = [np.mean(clean[int(t * fs):int(t * fs) + m10] ** 2) for t in step_t[:40] if int(t * fs) + m10 < n]
    p_step = float(np.mean(pw)) if pw else 1e-12
    noise_kind = str(rng.choice(["whitenoise", "pinknoise", "brownnoise"])) if flavor not in ("clean", "short") else "whitenoise"
    if flavor == "clean":
        snr = float(rng.uniform(25, 45))
    elif flavor == "short":
        snr = float(rng.uniform(20, 35))
    else:
        snr = float(rng.uniform(12, 35))
    sigma = math.sqrt(p_step / 10 ** (snr / 10))
    mix = [(clean, 1.0), (fx.sox_noise(noise_kind, n, fs, int(rng.integers(1 << 30))), sigma)]
    if other_dry is not None:
        mix.append((other_dry, 1.0))
    extras = []
    hum = None
    fan = None
    speech = None
    if flavor in ("phone", "lossy", "room", "none", "faults") and rng.random() < 0.35:
        hum_db = float(rng.uniform(-10, 6)) if flavor == "phone" else float(rng.uniform(-25, -5))
        f0 = float(rng.choice([50.0, 60.0]))
        mix.append((fx.mains_hum(n, fs, f0, 1.0, rng), level * 10 ** (hum_db / 20) / 2.0))
        hum = dict(hz=f0, db_re_step_peak=hum_db)
    if flavor in ("phone", "none") and rng.random() < 0.4:
        fan_db = float(rng.uniform(-30, -15))
        mix.append((fx.sox_noise("brownnoise", n, fs, int(rng.integers(1 << 30))), level * 10 ** (fan_db / 20)))
        fan = dict(db_re_step_peak_rms=fan_db)
    if flavor in ("phone", "none") and rng.random() < 0.4:
        sp_db = float(rng.uniform(-6, 6))
        mix.append((fx.speech_like(n, fs, rng), level * 10 ** (sp_db / 20)))
        speech = dict(db_re_step_peak=sp_db)
    # keep every part within full scale for sox's mixer
    scale = 1.0
    for x, g in mix:
        pk = float(np.max(np.abs(x)) * g)
        if pk > 0.98:
            scale = min(scale, 0.98 / pk)
    y = fx.sox_mix([(x, g * scale) for x, g in mix], fs).astype(np.float64)
    clean = clean * scale
    sigma *= scale

    # --- the phone
    phone = None
    nonlinear = False
    if flavor == "phone" or (flavor == "lossy" and rng.random() < 0.5):
        lp = 3400.0 if fs == 8000 else (float(rng.uniform(6000, 0.45 * fs)) if rng.random() < 0.5 else None)
        gate = float(rng.uniform(-60, -42)) if rng.random() < 0.35 else None
        y, phone = fx.phone_chain(y, fs, rng, agc=rng.random() < 0.7, gate_db=gate,
                                  highpass_hz=float(rng.uniform(60, 200)), lowpass_hz=lp)
        nonlinear = True
    clipping = None
    if flavor == "phone" and rng.random() < 0.2:
        y = y + fx.rumble(n, fs, rng) * float(np.max(np.abs(y))) * float(rng.uniform(0.5, 1.5))
        thr = float(20 * np.log10(np.max(np.abs(y)))) - float(rng.uniform(3, 8))
        y = fx.clip(y, thr)
        clipping = dict(threshold_dbfs=thr)
        nonlinear = True
    pk = float(np.max(np.abs(y)))
    if pk > 0.99:
        y *= 0.99 / pk
        clean *= 0.99 / pk
        sigma *= 0.99 / pk

    # --- lost buffers (samples skipped: later times move earlier)
    drops = []
    if flavor == "phone" and rng.random() < 0.3:
        sounds = list(step_t) + [e.time_s + delay for e in events if e.kind in ("failed", "aligned", "correction")]
        y, drops = fx.drop_buffers(y, fs, rng, np.array(sounds), count=int(rng.integers(1, 4)),
                                   block=int(rng.choice([256, 512, 1024, 2048])))
        step_t = fx.shift_for_drops(step_t, drops, fs)

    def shifted(ts):
        return [float(v) for v in fx.shift_for_drops(np.array(ts, dtype=np.float64), drops, fs)] if drops else [float(v) for v in ts]

    # --- codec
    encoded, suffix, lossy = None, ".wav", None
    if codec:
        name = "aac" if codec.startswith("aac") else codec
        br = {"mp3": ["32k", "64k", "128k"], "aac": ["32k", "64k", "96k"], "opus": ["16k", "24k", "32k", "64k"],
              "vorbis": ["48k", "64k", "96k"]}[name]
        bitrate = "64k" if codec == "aac-voice-memo" else str(rng.choice(br))
        y, encoded, suffix = fx.codec_roundtrip(y, fs, name, bitrate)
        lossy = f"{name} {bitrate}"

    # --- truth
    failed = [e.slot for e in events if e.kind == "failed"]
    aligned = [e.slot for e in events if e.kind == "aligned"]
    corr = [e.slot for e in events if e.kind == "correction"]
    levels_used = None
    if drive.mode in ("adaptive", "schedule"):
        lv = [e.level for e in steps]
        counts = {v: lv.count(v) for v in set(lv)}
        used = [v for v, c in counts.items() if c >= max(3, 0.05 * len(lv))]
        levels_used = len(used) if len(used) >= 2 else None
        notes.append(f"drive levels used (width index: steps) {dict(sorted(counts.items()))}")
    pos_lock = None
    if failed:
        turns = {}
        for f in failed:
            turns.setdefault(f % 60, set()).add(f // 60)
        if any(len(v) >= 2 for v in turns.values()):
            pos_lock = dict(period_steps=60)
    burst = None
    if drive.mode == "burst":
        burst = dict(period_s=float(drive.steps_per_burst), steps_per_burst=int(drive.steps_per_burst),
                     spacing_ms=float(drive.burst_spacing_cycles / 32.768))
    inh = None
    if inhibition is not None:
        inh = dict(period_s=float(inhibition.period_s), correction_us=float(div.swallowed_cycles / div.crystal_hz * 1e6),
                   pulses=int(inhibition.pulses), pulse_hz=int(inhibition.pulse_hz),
                   crystal_rate_s_per_day=div.crystal_rate_s_per_day())
    # decay truth per orientation from the most common sound of each
    decay = {}
    for o in ("A", "B"):
        keys = [e.key for e in steps if e.polarity == o and e.key is not None]
        if keys:
            k = max(set(keys), key=keys.count)
            decay[o] = mm.decay_truth_ms(mv.sound(*k))
    dom = mv.modes[0]
    # CRLB: white noise added after everything linear, nothing nonlinear after it
    crlb = None
    if noise_kind == "whitenoise" and not nonlinear and codec is None and not drops and steps:
        v = []
        for o in ("A", "B"):
            ts = [t for t, e in zip(step_t, steps) if e.polarity == o][:3]
            for t in ts:
                a, b = int(t * fs) - int(0.002 * fs), int(t * fs) + int(0.08 * fs)
                if a < 0 or b > len(clean):
                    continue
                s = clean[a:b]
                nn = 1 << int(math.ceil(math.log2(len(s) * 2)))
                spec = np.fft.rfft(s, nn)
                w = 2 * np.pi * np.fft.rfftfreq(nn, 1.0 / fs)
                ds = np.fft.irfft(1j * w * spec, nn)
                v.append(sigma ** 2 / np.sum(ds ** 2))
        crlb = float(math.sqrt(np.mean(v)) * 1e6) if v else None
    timing_scored = variants == 1 and drive.mode in ("fixed", "burst") and mv.hand_imbalance == 0.0
    truth = dict(
        kind="stepping", samplerate=fs, duration_s=len(y) / fs, interval_s=1.0, rate_s_per_day=rate,
        step_times_s=[float(t) for t in step_t], step_numbers=[e.slot for e in steps],
        polarities=[e.polarity for e in steps],
        missed_steps=[], failed_steps=failed, aligned_steps=aligned, correction_pulses=corr,
        failed_times_s=shifted([e.time_s + delay for e in events if e.kind == "failed"]),
        correction_times_s=shifted([e.time_s + delay for e in events if e.kind == "correction"]),
        burst=burst, inhibition=inh, drive_levels=levels_used, other_clock=other, position_locked=pos_lock,
        decay_ms=decay or None, decay_modal_ms=dict(freq_hz=dom.freq_hz, tau_ms=dom.tau_ms),
        snr_db=snr, crlb_us=crlb, lossy=lossy, room=room, drops=drops, phone=phone, clipping=clipping,
        hum=hum, fan=fan, speech=speech, timing_scored=bool(timing_scored),
        motor=dict(params=mv.params.__dict__, drive_mode=drive.mode, volts=drive.volts,
                   width_ms=mm.PCA2002_WIDTHS_S[drive.level] * 1e3, crystal_ppm=crystal_ppm,
                   peak_delay_ms=sorted({round(mv.sound(*e.key).peak_delay_ms, 2) for e in steps if e.key is not None})[:8]),
        notes="; ".join(notes + [
            "times: pulse start from the crystal count + the room's direct-path delay; the loud impacts follow "
            "by motor.peak_delay_ms", f"noise {noise_kind} at {snr:.1f} dB (step power over 10 ms / noise variance)",
            "decay_ms: Schroeder EDC of the noiseless dry step sound, line over -5..-25 dB (before the hand's bounce)"]),
    )
    return y.astype(np.float32), fs, truth, encoded, suffix
