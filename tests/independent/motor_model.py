"""A second, physically different quartz movement: a Lavet stepping motor integrated numerically.

Nothing here imports tickscope.  The project's simulator places a prescribed sound at each step
time; this module integrates the mechanics of the motor and lets the sound, the failures, the
bursts and the drive levels come out of the integration.

Mechanics (state: rotor angle and speed, coil current, wheel angle and speed, hand angle and speed;
every angle referred to the rotor shaft)
    * Rotor: a two-pole permanent magnet of inertia J with viscous damping.  The stator's notches
      give a detent (cogging) torque -K_d*sin(2*theta): rest positions at 0 and pi, a barrier of
      height K_d between them at pi/2.
    * Coil: L*di/dt = v - R*i - K_t*omega*sin(phi_c - theta) (back-EMF of the moving magnet), torque
      K_t*i*sin(phi_c - theta).  The coil field's axis phi_c = pi - alpha lies alpha (the rest
      offset, 30-45 deg) short of the next rest position, as in a Lavet motor: a pulse of the right
      polarity pulls the rotor over the barrier; one of the wrong polarity (the rotor "aligned" with
      it) only tugs it back by a few degrees.  Between pulses the driver either shorts the coil
      (v = 0 through R: electrical damping) or leaves it open (the current dies in ~20 us).
    * Gear train: the rotor pinion drives the wheels (inertia ratio ~3, reflected to the rotor)
      through a backlash gap +-g; contact is a stiff spring-damper (Hunt-Crossley-like, linear here)
      whose natural frequency is a few kHz.  The wheel carries a Coulomb load (tanh-smoothed) and a
      load that depends on the wheel's position (an unbalanced seconds hand lifted against gravity,
      or a dirty tooth), constant during one step.
    * Hand: the seconds hand sits on the wheel through a torsional compliance (10-25 Hz): after the
      rotor stops, the hand swings on and pulls the wheel across the backlash -- the hand's bounce
      is an impact tens of ms after the step, out of the integration, not a copied sound.
    Integrated with scipy.integrate.solve_ivp (LSODA) for ~60-120 ms per step.  A step succeeds
    when the rotor settles half a turn on; a failed step (too little drive for the load: low cell
    voltage, a heavy hand, a short pulse) is a twitch that falls back, and the next pulse then finds
    the rotor aligned with it.

Sound
    The plate is excited by the reaction torques on the stator and bearings: the magnetic torque
    (coil + detent, acting on the stator) and the pinion-wheel contact torque (impacts of the
    backlash).  The modes are our own choice: the flexural ring modes of a thin circular case middle
    (Love's inextensional ring, f_n proportional to n(n^2-1)/sqrt(n^2+1), n = 2..5; from memory of
    Rayleigh/Love, Theory of Sound vol. 1 s.233) plus one low dial-plate mode, each a damped
    oscillator of loss factor eta (tau = 1/(pi*f*eta)).  The two rotor orientations load the stator
    at opposite ends, so the A and B steps couple to the modes with different gains (their sounds
    differ).  Radiated pressure is taken as the sum of modal velocities.  Everything is computed on a
    fine grid (>= 96 kHz), decimated to the file's rate by scipy.signal.resample_poly (zero phase:
    sample n of the output is time n/fs of the input) and placed at fractional-sample times by an FFT
    phase ramp.

Time truth
    What is timed: the start of each drive pulse, taken from the divider chain's crystal-cycle count
    (exact rational numbers of crystal periods), plus the room's direct-path delay where a room is
    added (corpus).  The motor begins to move, and the stator to radiate, at that instant; the loud
    impacts follow a few ms later at a delay that depends on the drive and load (given per sound in
    :attr:`StepSound.peak_delay_ms`).

Divider chain (:class:`Divider`)
    A 32768 Hz crystal (off by ``crystal_ppm``) counted down to one output edge every 32768 cycles.
    Logic regulation: once every ``period_s`` seconds N pulses of the stage at ``pulse_hz`` (32768 or
    8192 Hz) are swallowed, delaying every later edge by N*32768/pulse_hz crystal cycles (NXP PCA2002
    datasheet Rev. 8, Table 6: "number of the 8192 Hz pulses to be removed", period 1 or 2 min).
    End of life: bursts of ``steps_per_burst`` pulses every ``steps_per_burst`` seconds, spaced by a
    whole number of crystal cycles (Philips PCA16xx: "bursts of 4 pulses ... every 4 s").
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import signal
from scipy.integrate import solve_ivp

CRYSTAL_HZ = 32768
SECONDS_PER_DAY = 86400.0
#: Motor pulse widths n/1024 s, n = 1..8 (NXP PCA2002 datasheet Rev. 8, Table 7).
PCA2002_WIDTHS_S = tuple(n / 1024.0 for n in range(1, 9))


def rate_from_interval(nominal_s: float, interval_s: float) -> float:
    """Daily rate (s/day, positive gains) of a movement whose steps come every ``interval_s``."""
    return SECONDS_PER_DAY * (nominal_s / interval_s - 1.0)


# --------------------------------------------------------------------------------------------
# mechanics


@dataclass(frozen=True)
class MotorParams:
    """A Lavet motor, its gear train and seconds hand (SI units; angles on the rotor shaft)."""

    rotor_inertia: float = 1.0e-12  # kg m^2
    detent_hz: float = 200.0  # small-swing frequency of the rotor in its detent well
    coil_ohm: float = 1000.0
    coil_tau_ms: float = 0.3  # L/R
    torque_const: float = 1.6e-3  # N m / A  (= V s / rad)
    rest_offset_deg: float = 40.0  # alpha: coil axis short of the next rest position
    rotor_damping: float = 0.05  # fraction of critical damping in the detent well
    coil_shorted: bool = True  # between pulses the driver shorts the coil
    train_ratio: float = 3.0  # wheel inertia / rotor inertia (reflected)
    backlash_rad: float = 0.12  # half gap
    contact_hz: float = 3000.0
    contact_damping: float = 0.15
    load_ratio: float = 0.15  # Coulomb load on the wheel / detent torque K_d
    hand_ratio: float = 6.0  # hand inertia / rotor inertia (reflected); 0 = no compliant hand
    hand_hz: float = 14.0
    hand_damping: float = 0.05

    @property
    def detent_torque(self) -> float:
        return (2 * math.pi * self.detent_hz) ** 2 * self.rotor_inertia / 2.0

    @staticmethod
    def random(rng: np.random.Generator, **over) -> "MotorParams":
        p = MotorParams(
            detent_hz=float(rng.uniform(160, 260)), rest_offset_deg=float(rng.uniform(32, 45)),
            torque_const=float(rng.uniform(1.4e-3, 1.8e-3)), rotor_damping=float(rng.uniform(0.03, 0.1)),
            coil_shorted=bool(rng.random() < 0.7), train_ratio=float(rng.uniform(2.0, 4.0)),
            backlash_rad=float(rng.uniform(0.08, 0.16)), contact_hz=float(rng.uniform(2500, 4000)),
            contact_damping=float(rng.uniform(0.1, 0.25)), load_ratio=float(rng.uniform(0.08, 0.18)),
            hand_ratio=float(rng.uniform(3, 8)), hand_hz=float(rng.uniform(11, 22)),
            hand_damping=float(rng.uniform(0.03, 0.08)))
        return replace(p, **over)


@dataclass(frozen=True)
class Pulse:
    """One coil pulse, relative to the start of an integration: start, width, signed voltage."""

    start_s: float
    width_s: float
    volts: float


@dataclass
class Motion:
    """The integrated motion of one integration window."""

    params: MotorParams
    pulses: tuple
    extra_load: float
    sol: object  # solve_ivp OdeSolution (dense)
    t_end_s: float
    half_turns_after: list  # rotor half-turns completed after each pulse (before the next)
    final_half_turns: int

    def states(self, t: np.ndarray) -> np.ndarray:
        return self.sol(np.clip(t, 0.0, self.t_end_s))


def _coefficients(p: MotorParams):
    j = p.rotor_inertia
    kd = p.detent_torque
    jw = p.train_ratio * j
    jeff = j * jw / (j + jw)
    kc = (2 * math.pi * p.contact_hz) ** 2 * jeff
    cc = p.contact_damping * 2 * math.sqrt(kc * jeff)
    cr = p.rotor_damping * 2 * math.sqrt(2 * kd * j)
    jh = max(p.hand_ratio, 1e-6) * j
    kh = (2 * math.pi * p.hand_hz) ** 2 * jh if p.hand_ratio > 0 else 0.0
    ch = p.hand_damping * 2 * math.sqrt(kh * jh) if p.hand_ratio > 0 else 0.0
    return dict(j=j, kd=kd, jw=jw, kc=kc, cc=cc, cr=cr, jh=jh, kh=kh, ch=ch,
                ind=p.coil_tau_ms * 1e-3 * p.coil_ohm, phic=math.pi - math.radians(p.rest_offset_deg))


def contact_torque(p: MotorParams, y: np.ndarray) -> np.ndarray:
    """Pinion-wheel contact torque (positive drives the wheel forward) for states y [7, n]."""
    c = _coefficients(p)
    d = y[0] - y[3]
    dv = y[1] - y[4]
    g = p.backlash_rad
    f = np.where(d > g, c["kc"] * (d - g) + c["cc"] * dv, 0.0) + np.where(d < -g, c["kc"] * (d + g) + c["cc"] * dv, 0.0)
    # a contact only pushes (no sticking): damping may not pull the flanks together
    return np.where(d > g, np.maximum(f, 0.0), np.where(d < -g, np.minimum(f, 0.0), 0.0))


def magnetic_torque(p: MotorParams, y: np.ndarray) -> np.ndarray:
    """Coil plus detent torque on the rotor (its reaction acts on the stator) for states y [7, n]."""
    c = _coefficients(p)
    return p.torque_const * y[2] * np.sin(c["phic"] - y[0]) - c["kd"] * np.sin(2 * y[0])


def integrate(p: MotorParams, pulses: tuple, *, extra_load: float = 0.0, duration_s: float = 0.09) -> Motion:
    """Integrate the motor from rest at theta = 0 (wheel and hand resting on the forward flank).

    ``extra_load`` is an added load torque on the wheel as a fraction of the detent torque
    (an unbalanced hand being lifted, a dirty tooth); it may be negative (the hand falling).
    """
    c = _coefficients(p)
    j, kd, jw, kc, cc, cr, jh, kh, ch, ind, phic = (c[k] for k in ("j", "kd", "jw", "kc", "cc", "cr", "jh", "kh", "ch", "ind", "phic"))
    kt, res, g = p.torque_const, p.coil_ohm, p.backlash_rad
    coulomb = (p.load_ratio) * kd
    bias = extra_load * kd
    shorted = p.coil_shorted
    pl = [(q.start_s, q.start_s + q.width_s, q.volts) for q in pulses]
    sin, tanh = math.sin, math.tanh
    has_hand = p.hand_ratio > 0

    def drive(t):
        for a, b, v in pl:
            if a <= t < b:
                return v, True
        return 0.0, False

    def rhs(t, y):
        th, om, i, ph, nu, ps, et = y
        v, on = drive(t)
        s = sin(phic - th)
        if on or shorted:
            di = (v - res * i - kt * om * s) / ind
        else:
            di = -i / 2e-5
        d = th - ph
        if d > g:
            fc = max(kc * (d - g) + cc * (om - nu), 0.0)
        elif d < -g:
            fc = min(kc * (d + g) + cc * (om - nu), 0.0)
        else:
            fc = 0.0
        fh = kh * (ps - ph) + ch * (et - nu) if has_hand else 0.0
        dom = (kt * i * s - kd * sin(2 * th) - cr * om - fc) / j
        dnu = (fc + fh - coulomb * tanh(nu / 2.0) - bias) / jw
        det = -fh / jh if has_hand else 0.0
        return [om, dom, di, nu, dnu, et, det]

    y0 = [0.0, 0.0, 0.0, -g, 0.0, -g, 0.0]
    # the wheel's standing load and a hand at rest would press the flank; start just touching
    sol = solve_ivp(rhs, (0.0, duration_s), y0, method="LSODA", rtol=1e-7,
                    atol=[1e-7, 1e-4, 1e-10, 1e-7, 1e-4, 1e-7, 1e-4], max_step=1.0 / (8 * p.contact_hz),
                    dense_output=True)
    if not sol.success:
        raise RuntimeError(f"motor integration failed: {sol.message}")
    ends = [q.start_s for q in pulses[1:]] + [duration_s]
    after = [int(round(float(sol.sol(max(e - 1e-4, 0.0))[0]) / math.pi)) for e in ends]
    return Motion(p, tuple(pulses), extra_load, sol.sol, duration_s, after, after[-1])


# --------------------------------------------------------------------------------------------
# modes and radiation


@dataclass(frozen=True)
class Mode:
    freq_hz: float
    tau_ms: float  # amplitude e-folding time
    gain_a: float  # coupling for rotor orientation A (theta rest 0) and B (pi)
    gain_b: float


def ring_mode_freqs(f2_hz: float, n_max: int = 5) -> list[float]:
    """Inextensional flexural modes of a thin ring: f_n / f_2 = [n(n^2-1)/sqrt(n^2+1)] / [6/sqrt(5)]."""
    ref = 2 * 3 / math.sqrt(5)
    return [f2_hz * (n * (n * n - 1) / math.sqrt(n * n + 1)) / ref for n in range(2, n_max + 1)]


def case_modes(rng: np.random.Generator, *, f2_hz: float | None = None, tau2_ms: float | None = None) -> tuple[Mode, ...]:
    """Our own case: ring modes of the case middle (dominant n = 2) and one dial-plate mode."""
    f2 = float(rng.uniform(1300, 2800)) if f2_hz is None else f2_hz
    tau2 = float(rng.uniform(3.0, 12.0)) if tau2_ms is None else tau2_ms
    eta2 = 1.0 / (math.pi * f2 * tau2 * 1e-3)
    modes = []
    for k, f in enumerate(ring_mode_freqs(f2)):
        eta = eta2 * (f / f2) ** float(rng.uniform(0.3, 0.7))  # losses grow with frequency
        tau = 1e3 / (math.pi * f * eta)
        amp = 1.0 if k == 0 else float(rng.uniform(0.15, 0.45)) / k
        sa = 1.0 if k == 0 else float(rng.choice([-1.0, 1.0]))
        modes.append(Mode(f, tau, amp * sa, amp * float(rng.uniform(0.6, 1.0)) * float(rng.choice([-1.0, 1.0]))))
    fp = f2 * float(rng.uniform(0.55, 0.8))
    modes.append(Mode(fp, tau2 * float(rng.uniform(0.2, 0.45)), float(rng.uniform(0.1, 0.3)), float(rng.uniform(0.1, 0.3))))
    # B couples a little differently to the dominant mode as well
    m0 = modes[0]
    modes[0] = Mode(m0.freq_hz, m0.tau_ms, 1.0, float(rng.uniform(0.75, 0.95)))
    return tuple(modes)


@dataclass
class StepSound:
    """The radiated sound of one integration window at the file's rate."""

    wave: np.ndarray  # float64, sample `lead` is the window's t = 0 (pulse start)
    lead: int
    samplerate: int
    half_turns_after: list
    peak_delay_ms: float  # time of the envelope's peak after the pulse start
    contact_times_ms: list  # onsets of separate impact clusters after the first


def _velocity_ir(mode: Mode, rate: float, gain: float) -> np.ndarray:
    n = int(min(8 * mode.tau_ms * 1e-3, 0.25) * rate) + 1
    t = np.arange(n) / rate
    w = 2 * math.pi * mode.freq_hz
    a = 1e3 / mode.tau_ms
    # velocity impulse response of a damped oscillator (displacement e^-at sin(wt)/w)
    return gain * np.exp(-a * t) * (np.cos(w * t) - (a / w) * np.sin(w * t))


def radiate(motion: Motion, modes: tuple, orientation: str, samplerate: int, *,
            mag_weight: float = 0.15, lead_s: float = 0.004) -> StepSound:
    """Sound of the integrated motion through the case modes, at ``samplerate``."""
    m = max(1, int(math.ceil(96000 / samplerate)))
    fine = samplerate * m
    lead = int(round(lead_s * samplerate))
    n = int(motion.t_end_s * fine)
    t = np.arange(n) / fine
    y = motion.states(t)
    p = motion.params
    kd = p.detent_torque
    cont = contact_torque(p, y) / kd
    mag = magnetic_torque(p, y) / kd
    exc = mag_weight * mag + cont  # reaction torques on stator and bearings
    out = np.zeros(n)
    for md in modes:
        gain = md.gain_a if orientation == "A" else md.gain_b
        if md.freq_hz >= 0.45 * samplerate:
            continue  # above what the recorder keeps (the decimator would remove it anyway)
        ir = _velocity_ir(md, fine, gain)
        out += signal.fftconvolve(exc, ir)[:n]
    out = np.concatenate([np.zeros(lead * m), out])
    wave = signal.resample_poly(out, 1, m)
    # separate impact clusters: contact starts after >= 5 ms without contact
    active = np.abs(cont) > 1e-3
    starts = np.flatnonzero(active[1:] & ~active[:-1]) + 1
    clusters = []
    last_end = -1e9
    idx_active = np.flatnonzero(active)
    for s_ in starts:
        prev = idx_active[idx_active < s_]
        gap = (s_ - prev[-1]) / fine if len(prev) else 1e9
        if gap > 5e-3 and t[s_] > 2e-3:
            clusters.append(float(t[s_] * 1e3))
        last_end = s_
    env = np.abs(signal.hilbert(wave))
    pk = (int(np.argmax(env)) - lead) / samplerate * 1e3
    return StepSound(wave, lead, samplerate, list(motion.half_turns_after), pk, clusters)


def decay_truth_ms(sound: StepSound, *, lo_db: float = -5.0, hi_db: float = -25.0) -> float:
    """Amplitude e-folding time of a clean step sound: Schroeder's backward-integrated energy decay
    (Schroeder, JASA 37(3) 409-412, 1965) of the noiseless dry sound, least-squares line over
    lo_db..hi_db (the ISO 3382 T20 range), tau = 8.686 / |slope in dB/s|.  The window ends before
    the next impact cluster (a hand's bounce) so that the figure is the step's own ring-down."""
    x = sound.wave[sound.lead:]
    fs = sound.samplerate
    env_peak = int(np.argmax(np.abs(signal.hilbert(x))))
    end = len(x)
    for c in sound.contact_times_ms:
        cut = int((c - 1.0) * 1e-3 * fs)
        if cut > env_peak + int(0.003 * fs):
            end = min(end, cut)
            break
    x = x[env_peak:end]
    e = np.cumsum((x ** 2)[::-1])[::-1]
    edc = 10 * np.log10(e / e[0] + 1e-300)
    i0 = int(np.argmax(edc <= lo_db))
    i1 = int(np.argmax(edc <= hi_db))
    if i1 <= i0 + 3:
        i1 = len(edc) - 1
    tt = np.arange(i0, i1) / fs
    slope = np.polyfit(tt, edc[i0:i1], 1)[0]
    return float(8.685889638 / abs(slope) * 1e3)


def place(out: np.ndarray, wave: np.ndarray, lead: int, time_s: float, samplerate: int, gain: float = 1.0) -> None:
    """Add ``wave`` (its sample ``lead`` at t = 0) to ``out`` so that t = 0 falls at ``time_s``, with
    the fractional part of the sample applied as an FFT phase ramp (the wave is band-limited)."""
    pos = time_s * samplerate - lead
    i0 = int(math.floor(pos))
    frac = pos - i0
    n = len(wave)
    nfft = 1 << int(math.ceil(math.log2(n + 64)))
    spec = np.fft.rfft(wave, nfft)
    k = np.arange(len(spec))
    shifted = np.fft.irfft(spec * np.exp(-2j * np.pi * k * frac / nfft), nfft)[: n + 32]
    a, b = max(i0, 0), min(i0 + len(shifted), len(out))
    if b > a:
        out[a:b] += gain * shifted[a - i0:b - i0]


# --------------------------------------------------------------------------------------------
# the divider chain and the drive


@dataclass(frozen=True)
class Inhibition:
    period_s: int
    pulses: int
    pulse_hz: int = CRYSTAL_HZ  # 32768 or 8192


class Divider:
    """Crystal-cycle counts of the 1 Hz output edges (and of burst pulses)."""

    def __init__(self, crystal_ppm: float, inhibition: Inhibition | None = None, first_edge_s: float = 0.5):
        self.crystal_hz = CRYSTAL_HZ * (1.0 + crystal_ppm * 1e-6)
        self.inhibition = inhibition
        self.first_edge_s = first_edge_s
        self.swallowed_cycles = 0 if inhibition is None else inhibition.pulses * (CRYSTAL_HZ // inhibition.pulse_hz)

    def edge_cycles(self, k: np.ndarray | int) -> np.ndarray:
        """Crystal cycles from the first edge to edge k: 32768 per edge, plus the swallowed cycles of
        every inhibition that has happened since (the divider swallows them during the second that
        begins at each multiple of the period, so the edge closing that second comes late)."""
        k = np.asarray(k, dtype=np.int64)
        cycles = CRYSTAL_HZ * k
        if self.inhibition is not None:
            p = self.inhibition.period_s
            n_inh = np.where(k > 0, (k - 1) // p + 1, 0)  # inhibitions in seconds 0, P, 2P, ... before edge k
            cycles = cycles + n_inh * self.swallowed_cycles
        return cycles

    def edge_times_s(self, k) -> np.ndarray:
        return self.first_edge_s + self.edge_cycles(k) / self.crystal_hz

    def cycles_to_s(self, cycles) -> np.ndarray:
        return np.asarray(cycles, dtype=np.float64) / self.crystal_hz

    def regulated_rate_s_per_day(self) -> float:
        """Mean rate over whole periods (or the crystal's rate without regulation)."""
        if self.inhibition is None:
            return rate_from_interval(1.0, CRYSTAL_HZ / self.crystal_hz)
        p = self.inhibition.period_s
        mean = (CRYSTAL_HZ * p + self.swallowed_cycles) / self.crystal_hz / p
        return rate_from_interval(1.0, mean)

    def crystal_rate_s_per_day(self) -> float:
        return rate_from_interval(1.0, CRYSTAL_HZ / self.crystal_hz)


@dataclass
class DriveProgram:
    """How the movement's IC drives the coil.

    mode 'fixed'    : one width and the cell's voltage; failures are not noticed (the next pulse
                      then finds the rotor aligned).
    mode 'adaptive' : the IC senses whether the rotor stepped (as by the back-EMF); after a failure it
                      fires a correction pulse (``correction_width_s`` at ``correction_delay_s``) and
                      raises the width one level; every ``down_every_s`` it tries one level lower.
    mode 'schedule' : the width steps through ``levels`` every ``stage_s`` (a drive that adapts to a
                      load the IC measures some other way); ``levels`` index ``widths_s``.
    mode 'burst'    : end of life: ``steps_per_burst`` pulses every ``steps_per_burst`` s,
                      ``burst_spacing_cycles`` crystal cycles apart.
    """

    mode: str = "fixed"
    volts: float = 1.55
    widths_s: tuple = PCA2002_WIDTHS_S
    level: int = 3  # index into widths_s
    max_level: int = 7
    correction_width_s: float = 7.8e-3
    correction_delay_s: float = 0.032
    down_every_s: float = 180.0
    levels: tuple = ()
    stage_s: float = 150.0
    steps_per_burst: int = 2
    burst_spacing_cycles: int = 1311  # ~40 ms


@dataclass
class Event:
    slot: int
    time_s: float  # pulse start (the sound's t = 0) on the movement's own time line
    kind: str  # step | failed | aligned | correction | burst-step
    polarity: str  # A (rotor leaves 0) or B (leaves pi) for the motion heard
    key: tuple  # sound cache key
    level: int | None = None


class Movement:
    """One movement: motor, case modes and drive; renders its dry sound and the event truth."""

    def __init__(self, params: MotorParams, modes: tuple, samplerate: int, *, hand_imbalance: float = 0.0,
                 hand_phase: float = 0.0, load_jitter: float = 0.0, variants: int = 1, seed: int = 0):
        self.params = params
        self.modes = modes
        self.samplerate = samplerate
        self.hand_imbalance = hand_imbalance  # peak extra load (fraction of K_d) over the hand's turn
        self.hand_phase = hand_phase
        self.load_jitter = load_jitter  # tick-to-tick load variation (fraction of K_d, RMS), quantised
        self.variants = max(1, variants)
        self.load_step = 0.05  # loads are quantised to this (fraction of K_d) so motions can be cached
        self.rng = np.random.default_rng(seed)
        self._motion: dict = {}
        self._sound: dict = {}

    # the load on the wheel with the seconds hand at a position (60 steps a turn)
    def extra_load(self, position: int, variant: int) -> float:
        grav = self.hand_imbalance * math.sin(2 * math.pi * (position % 60) / 60.0 + self.hand_phase)
        jit = 0.0
        if self.variants > 1:
            jit = self.load_jitter * (2 * variant / (self.variants - 1) - 1.0)
        # a falling hand helps the rotor only as far as the train's own friction lets it (more
        # assistance would carry the rotor over two detents)
        return round(round(max(grav + jit, -0.1) / self.load_step) * self.load_step, 3)

    def motion(self, pulses: tuple, extra: float, duration_s: float) -> Motion:
        key = (pulses, extra, duration_s)
        if key not in self._motion:
            self._motion[key] = integrate(self.params, pulses, extra_load=extra, duration_s=duration_s)
        return self._motion[key]

    def sound(self, pulses: tuple, extra: float, duration_s: float, orientation: str) -> StepSound:
        key = (pulses, extra, duration_s, orientation)
        if key not in self._sound:
            self._sound[key] = radiate(self.motion(pulses, extra, duration_s), self.modes, orientation, self.samplerate)
        return self._sound[key]

    def run(self, divider: Divider, drive: DriveProgram, duration_s: float) -> list[Event]:
        """Decide every slot's pulses from the divider and the drive, integrate, and return events
        (``Event.key`` gives the sound: pulses, extra load, window, orientation)."""
        events: list[Event] = []
        n_edges = int(np.floor((duration_s - divider.first_edge_s - 0.12) * 1.0)) + 1
        k_all = np.arange(max(n_edges + 2, 1))
        edge_t = divider.edge_times_s(k_all)
        half = 0  # rotor half-turns so far (its orientation: even = A rest at 0)
        polarity_out = 0  # the IC's output flip-flop: +1 pulse when even
        level = drive.level
        last_down = 0.0
        vol = drive.volts
        for k in k_all:
            t0 = float(edge_t[k])
            if t0 > duration_s - 0.12:
                break
            if drive.mode == "burst":
                if k % drive.steps_per_burst:
                    continue
                sp = divider.cycles_to_s(drive.burst_spacing_cycles)
                pulses = []
                for j in range(drive.steps_per_burst):
                    sign = 1.0 if (polarity_out + j) % 2 == 0 else -1.0
                    pulses.append((j * sp, drive.widths_s[level], sign))
                polarity_out += drive.steps_per_burst
            else:
                if drive.mode == "schedule" and drive.levels:
                    level = drive.levels[int(t0 // drive.stage_s) % len(drive.levels)]
                if drive.mode == "adaptive" and t0 - last_down >= drive.down_every_s:
                    last_down = t0
                    level = max(0, level - 1)
                sign = 1.0 if polarity_out % 2 == 0 else -1.0
                pulses = [(0.0, drive.widths_s[level], sign)]
                polarity_out += 1
            # in the rotor's frame: orientation flips the sign of the drive
            orient = "A" if half % 2 == 0 else "B"
            frame = 1.0 if orient == "A" else -1.0
            variant = int(self.rng.integers(self.variants)) if self.variants > 1 else 0
            extra = self.extra_load(half, variant)  # the hand is where the steps made so far put it
            rel = tuple(Pulse(a, w, s * frame * vol) for a, w, s in pulses)
            win = 0.09 + (rel[-1].start_s if len(rel) > 1 else 0.0)
            mot = self.motion(rel, extra, win)
            if drive.mode == "burst":
                done = 0
                prev = 0
                for j, q in enumerate(rel):
                    o = "A" if (half + done) % 2 == 0 else "B"
                    stepped = mot.half_turns_after[j] - prev
                    prev = mot.half_turns_after[j]
                    proper = q.volts * (1.0 if done % 2 == 0 else -1.0) > 0
                    kind = "burst-step" if stepped == 1 else ("failed" if proper else "aligned")
                    # one sound for the whole burst, carried by its first event
                    events.append(Event(int(k) + j, t0 + q.start_s, kind, o,
                                        (rel, extra, win, orient) if j == 0 else None, level))
                    done += stepped
                half += mot.final_half_turns
                continue
            stepped = mot.final_half_turns
            if stepped >= 1:
                events.append(Event(int(k), t0, "step", orient, (rel, extra, win, orient), level))
                half += 1
            elif sign * frame > 0:
                # a pulse of the right polarity that did not carry the rotor over: a failed step
                if drive.mode == "adaptive":
                    corr = rel + (Pulse(drive.correction_delay_s, drive.correction_width_s, rel[0].volts),)
                    win2 = drive.correction_delay_s + 0.09
                    mot2 = self.motion(corr, extra, win2)
                    events.append(Event(int(k), t0, "failed", orient, (corr, extra, win2, orient), level))
                    events.append(Event(int(k), t0 + drive.correction_delay_s, "correction", orient, None, level))
                    half += mot2.final_half_turns
                    polarity_out += 0
                    level = min(drive.max_level, level + 1)
                    last_down = t0
                else:
                    events.append(Event(int(k), t0, "failed", orient, (rel, extra, win, orient), level))
                    half += stepped
            else:
                events.append(Event(int(k), t0, "aligned", orient, (rel, extra, win, orient), level))
                half += stepped
        return events

    def render(self, events: list[Event], n_samples: int, *, gain: float = 1.0, time_offset_s: float = 0.0,
               level_jitter_db: float = 0.0) -> np.ndarray:
        """The dry sound of the events (t = 0 of each sound at event time + ``time_offset_s``)."""
        out = np.zeros(n_samples)
        for e in events:
            if e.key is None:
                continue
            rel, extra, win, orient = e.key
            snd = self.sound(rel, extra, win, orient)
            g = gain
            if level_jitter_db:
                g *= 10 ** (float(self.rng.normal(0, level_jitter_db)) / 20)
            place(out, snd.wave, snd.lead, e.time_s + time_offset_s, self.samplerate, g)
        return out
