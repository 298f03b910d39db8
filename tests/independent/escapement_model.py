"""A second, physically different escapement model, built outside tickscope.

Nothing here imports tickscope: this is the outside truth its escapement analysis is
checked against.  Where the project's own simulator places the sounds of a beat on a
prescribed motion (a balance swinging as A*sin(2*pi*t/T)), this module integrates the
mechanics and lets the sounds fall where the integration puts them.

Lever escapement (:class:`LeverEscapement`)
    A balance wheel of inertia I on a hairspring of stiffness k (natural period
    T0 = 2*pi*sqrt(I/k)), the hairspring optionally hardening or softening
    (torque -k*x*(1 + beta*x**2): a small isochronism error), whose rest point lies
    ``rest_offset_deg`` off the lever's centre line (this puts the watch out of beat).
    Losses: viscous (air, oil: -c*omega) and Coulomb (pivots: -mu*sign(omega)).
    The escapement acts only within +-LA/2 of the lever's centre line, and only while
    the balance moves in the direction of the coming beat:
      * entry: the impulse pin strikes the fork (an inelastic impact: the lever's
        inertia, reflected to the balance, J, joins the balance; momentum is kept, energy
        J/(I+J) of the kinetic energy is lost) -- the *unlock* sound;
      * unlocking: over the first ``unlock_angle_deg`` of the lift the balance drives
        the lever against the locking (a resisting torque, proportional to the
        mainspring torque: draw and locking friction) -- it takes a little energy;
      * impulse: over the rest of the lift the escape wheel drives the balance with a
        torque proportional to the mainspring torque; its start is the *impulse* sound
        (the escape tooth meeting the pallet's impulse face);
      * exit at +LA/2: the balance leaves the fork (the lever's kinetic energy goes
        into the banking), the escape tooth leaves the impulse face and the escape wheel
        falls freely through the drop angle, starting at the speed the impulse left it
        with and accelerated by the mainspring: the *drop* sound lands that much later.
    Outside the lift the balance swings free.  If it swings past the banking angle the
    impulse pin strikes the outside of the fork horn: a *knock* (an impact with
    restitution e, the balance rebounds).
    The amplitude is an outcome: the mainspring torque is chosen by a short calibration
    (the fixed point of one balance period: the torque for which the amplitude after a
    period equals the target), and then falls over the hours of the run; the gear
    train adds a ripple with the turns of its wheels.  The natural period is regulated
    the same way (one period of the calibrated motion) to the target rate, as a
    watchmaker would set the regulator; the rate that results is read from the
    integrated beats, never from a formula.

Pendulum clock (:class:`PendulumClock`)
    A pendulum theta'' = -(g/L)*sin(theta) - (omega0/Q)*theta' + escapement torque, with
    a dead-beat (Graham: impulse only within +-phi/2 of the crutch line, friction on the
    dead faces outside) or recoil (anchor: one pallet or the other always pushes, the
    wheel is driven back through the supplementary arc) escapement.  The crutch line
    is ``crutch_offset_deg`` off the pendulum's vertical: out of beat.  The going
    train's count gives a nominal beat rate that is off every round series value.

Sound (:func:`render_impacts`)
    Every mechanical event is a contact-force pulse: a half-sine whose peak force and
    duration follow Hertz's impact law (F ~ v**(6/5), duration ~ v**(-1/5), for the
    impact velocity v the integration gives; Johnson, *Contact Mechanics*, 1985, s.11.4,
    from memory), driving damped structural modes.  The modes are our own: a clamped
    circular plate (case back; roots of J_n I_{n+1} + I_n J_{n+1} = 0, computed here),
    a free-free beam (a bridge; cos(x)*cosh(x) = 1) and simply supported rectangular
    plates (a clock case and its movement plates), each event exciting them through the
    mode shape at its own point.  Each mode's response to the pulse is evaluated in
    closed form at every sample instant (exact fractional event times).  What is
    radiated is taken as the modal velocity times the mode's angular frequency.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize, special
from scipy.integrate import solve_ivp

STANDARD_GRAVITY_M_S2 = 9.80665  # the CGPM's standard acceleration of gravity (1901)
SPEED_OF_SOUND_M_S = 343.0  # dry air at about 20 degC (common value; pyroomacoustics' default too)
RTOL = 1e-10
DEG = math.pi / 180.0


class StoppedError(RuntimeError):
    """The oscillator no longer reaches the escapement (the movement stops)."""


def _event(fun, direction=0.0, terminal=False):
    fun.direction = direction
    fun.terminal = terminal
    return fun


def _first(sol, i):
    """Time and state of the first occurrence of event i (None when it did not occur)."""
    if len(sol.t_events[i]):
        return float(sol.t_events[i][0]), sol.y_events[i][0]
    return None


# ---------------------------------------------------------------------------
# Lever escapement
# ---------------------------------------------------------------------------

class _ChebTable:
    """Chebyshev interpolation of a vector function of one or two arguments on a box.

    The values at the Chebyshev nodes come from the caller's integration; between the
    nodes the interpolant of a smooth (analytic) map converges geometrically."""

    def __init__(self, fun, lo, hi, n, lo2=None, hi2=None, n2=1):
        self.lo, self.hi, self.n = lo, hi, n
        self.lo2, self.hi2, self.n2 = lo2, hi2, n2
        u = np.cos(np.pi * (np.arange(n) + 0.5) / n)
        self._inv = np.linalg.inv(np.polynomial.chebyshev.chebvander(u, n - 1))
        x = lo + (u + 1) * 0.5 * (hi - lo)
        if n2 > 1:
            v = np.cos(np.pi * (np.arange(n2) + 0.5) / n2)
            self._inv2 = np.linalg.inv(np.polynomial.chebyshev.chebvander(v, n2 - 1))
            x2 = lo2 + (v + 1) * 0.5 * (hi2 - lo2)
            self.values = np.array([[fun(a, b) for b in x2] for a in x])  # (n, n2, m)
        else:
            self.values = np.array([fun(a) for a in x])  # (n, m)

    def contains(self, x, x2=None):
        if not self.lo <= x <= self.hi:
            return False
        return self.n2 == 1 or self.lo2 <= x2 <= self.hi2

    def __call__(self, x, x2=None):
        u = 2 * (x - self.lo) / (self.hi - self.lo) - 1
        wu = np.polynomial.chebyshev.chebvander(np.array([u]), self.n - 1)[0] @ self._inv
        if self.n2 == 1:
            return wu @ self.values
        v = 2 * (x2 - self.lo2) / (self.hi2 - self.lo2) - 1
        wv = np.polynomial.chebyshev.chebvander(np.array([v]), self.n2 - 1)[0] @ self._inv2
        return np.einsum("i,j,ijm->m", wu, wv, self.values)


@dataclass
class LeverBeat:
    """One beat, as the integration gives it (times in s, angles in rad, rates in rad/s)."""
    index: int
    direction: int  # +1 or -1: the balance's direction through the lift
    t_entry: float  # the impulse pin strikes the fork: unlock sound
    omega_before_entry: float
    omega_after_entry: float
    t_impulse: float  # unlocking done, the tooth meets the impulse face
    omega_impulse: float
    t_exit: float  # end of the lift: the balance leaves the fork
    omega_exit: float
    drop_delay_s: float  # free fall of the escape wheel through the drop
    drop_speed_rad_s: float  # escape-wheel angular speed when it lands
    t_turn: float  # the following extreme of the swing (or the knock that turned it)
    theta_turn: float
    t_next_entry: float
    omega_next: float  # balance speed arriving at the next entry (before the impact)
    knocks: list  # (time, |omega| at impact) of banking knocks in this beat's swing
    torque_factor: float  # mainspring torque relative to the calibrated one
    work_impulse_j: float
    work_unlock_j: float
    loss_viscous_j: float
    loss_coulomb_j: float
    loss_entry_impact_j: float
    loss_exit_j: float
    loss_knock_j: float

    @property
    def t_drop(self) -> float:
        return self.t_exit + self.drop_delay_s


_LIFT_KEYS = ("t_imp", "om_imp", "t_exit", "om_exit", "w_imp", "w_unl", "visc", "coul")
_SWING_KEYS = ("t_turn", "th_turn", "t_back", "om_back", "visc", "coul")


@dataclass
class LeverEscapement:
    """A Swiss lever escapement as a dynamical system (see the module docstring).

    Give the nominal beat rate, the target amplitude and rate; the model chooses the
    mainspring torque and regulates the natural period by short calibration runs
    unless ``impulse_torque_n_m`` / ``natural_period_s`` are given.

    Each beat is integrated in four smooth pieces (unlocking, impulse, the free swing
    out to the extreme, and back to the next entry), each a solve_ivp call ending on a
    terminal event.  For long runs the two maps a beat is made of -- the lift (speed at
    entry, torque) -> (times, exit speed) and the free swing (exit speed) -> (times,
    return speed) -- are tabulated by the same integration at Chebyshev nodes and
    interpolated (``tables=True``); outside the tables, and for swings that can reach
    the banking, every beat is integrated directly.
    """
    nominal_beats_per_hour: float = 28800.0
    target_amplitude_deg: float = 280.0
    target_rate_s_per_day: float = 0.0
    inertia_kg_m2: float = 1.5e-9  # a wristwatch balance, ~15 mg cm^2 (from memory)
    q_viscous: float = 250.0  # quality factor of the free balance from viscous loss alone
    coulomb_share: float = 0.3  # share of the free-swing loss due to Coulomb friction (at the target amplitude)
    cubic_per_rad2: float = 0.0  # hairspring torque -k*x*(1 + beta*x^2)
    rest_offset_deg: float = 0.0  # hairspring rest point off the lever's centre line
    lift_angle_deg: float = 52.0
    unlock_angle_deg: float = 10.0  # part of the lift in which the balance unlocks the pallet
    unlock_torque_ratio: float = 0.25  # resisting torque while unlocking / impulse torque
    lever_inertia_ratio: float = 0.004  # lever inertia reflected to the balance, J/I
    bank_angle_deg: float | None = None  # knock when |theta| reaches this (None: never)
    bank_restitution: float = 0.6
    wheel_ratio: float = 0.25  # escape-wheel rotation per balance rotation during the impulse
    drop_angle_deg: float = 1.5  # escape-wheel drop
    drop_free_time_s: float = 0.6e-3  # drop time from rest under the calibrated torque
    torque_fall_per_hour: float = 0.0  # mainspring: relative torque lost per hour of running
    hours_since_wind: float = 0.0
    ripple: tuple = ()  # ((relative amplitude, period in beats, phase rad), ...) of the train
    escape_teeth: int = 15
    tooth_drop_errors: tuple = ()  # relative error of the drop angle, tooth by tooth (each tooth: two beats)
    natural_period_s: float | None = None
    impulse_torque_n_m: float | None = None
    calibration: dict = field(default_factory=dict)

    def __post_init__(self):
        self.nominal_beat_s = 3600.0 / self.nominal_beats_per_hour
        self.theta_rest = self.rest_offset_deg * DEG
        self.half_lift = 0.5 * self.lift_angle_deg * DEG
        self.unlock_arc = self.unlock_angle_deg * DEG
        self.lever_inertia = self.lever_inertia_ratio * self.inertia_kg_m2
        self.bank = None if self.bank_angle_deg is None else self.bank_angle_deg * DEG
        if not 0 <= self.unlock_arc < 2 * self.half_lift:
            raise ValueError("the unlocking arc must lie within the lift")
        self._tables = {}
        fixed_period = self.natural_period_s is not None
        fixed_torque = self.impulse_torque_n_m is not None
        want_beat = self.nominal_beat_s / (1 + self.target_rate_s_per_day / 86400.0)
        if not fixed_period:
            self.natural_period_s = 2 * want_beat
        self._set_losses()
        if fixed_torque and fixed_period:
            return
        if not fixed_torque:
            self.impulse_torque_n_m = self._calibrate_torque()
        if not fixed_period:
            # regulate, as a watchmaker moves the index: the equations are invariant under a change
            # of time scale s when every torque scales as 1/s^2 (damping c = I*omega0/Q and the
            # Coulomb torque set from it do), so scaling T0 and the torque together moves the
            # period exactly and keeps the amplitude; checked by integrating a period again
            for _ in range(3):
                period = self._period_map(self.impulse_torque_n_m)[1]
                self.calibration.setdefault("periods_s", []).append(period)
                if abs(period / (2 * want_beat) - 1) < 1e-13:
                    break
                scale = 2 * want_beat / period
                self.natural_period_s *= scale
                self._set_losses()
                if not fixed_torque:
                    self.impulse_torque_n_m /= scale ** 2
        self.calibration["impulse_torque_n_m"] = self.impulse_torque_n_m
        self.calibration["natural_period_s"] = self.natural_period_s

    # -- parameters -------------------------------------------------------------
    def _set_losses(self):
        I = self.inertia_kg_m2
        self.omega0 = 2 * math.pi / self.natural_period_s
        self.stiffness = I * self.omega0 ** 2
        self.energy_scale = 0.5 * self.stiffness * (self.target_amplitude_deg * DEG) ** 2
        self.damping = I * self.omega0 / self.q_viscous
        A = self.target_amplitude_deg * DEG
        # losses per beat of a free simple harmonic swing of amplitude A:
        # viscous (pi/2)*c*omega0*A^2, Coulomb 2*mu*A (energy balance of a damped oscillator)
        visc = 0.5 * math.pi * self.damping * self.omega0 * A * A
        share = self.coulomb_share
        self.coulomb = 0.0 if share <= 0 else share / (1 - share) * visc / (2 * A)
        self._tables = {}

    def torque_factor(self, t_s: float, beat_index: int) -> float:
        """Mainspring torque at time t (s from the start of the run) relative to the calibrated one."""
        h0 = self.hours_since_wind
        f = self.torque_fall_per_hour
        m = (1 - f * (h0 + t_s / 3600.0)) / (1 - f * h0) if f else 1.0
        for amp, period_beats, phase in self.ripple:
            m *= 1 + amp * math.sin(2 * math.pi * beat_index / period_beats + phase)
        return m

    def energy(self, theta: float, omega: float, coupled: bool = False) -> float:
        """Mechanical energy (J): kinetic + hairspring potential (+ the lever's while coupled)."""
        x = theta - self.theta_rest
        inertia = self.inertia_kg_m2 + (self.lever_inertia if coupled else 0.0)
        return 0.5 * inertia * omega ** 2 + self.stiffness * (0.5 * x * x + 0.25 * self.cubic_per_rad2 * x ** 4)

    # -- the equations ------------------------------------------------------------
    def _rhs(self, coupled: bool, esc: float, fric: float):
        """One smooth piece: inertia I (+J while coupled to the lever), escapement torque
        esc, friction torque -fric (fric = mu*direction of motion); the state carries
        theta, omega and four work integrals (impulse given, unlocking taken, viscous
        and Coulomb losses)."""
        inertia = self.inertia_kg_m2 + (self.lever_inertia if coupled else 0.0)
        k, beta, c = self.stiffness, self.cubic_per_rad2, self.damping
        th_r = self.theta_rest

        def rhs(t, y):
            om = y[1]
            x = y[0] - th_r
            p = esc * om
            return (om, (-k * x * (1.0 + beta * x * x) - c * om - fric + esc) / inertia,
                    p if p > 0 else 0.0, -p if p < 0 else 0.0, c * om * om, abs(fric * om))
        return rhs

    def _solve(self, rhs, t0, y0, event, t_max=None):
        ew = 1e-13 * self.energy_scale
        t1 = t0 + (t_max if t_max is not None else 2 * self.natural_period_s)
        sol = solve_ivp(rhs, (t0, t1), y0, method="DOP853", rtol=RTOL,
                        atol=[1e-12, 1e-10, ew, ew, ew, ew], events=event)
        if sol.status < 0:
            raise RuntimeError(sol.message)
        return sol

    def _piece(self, rhs, t0, y0, events, what):
        sol = self._solve(rhs, t0, y0, events)
        for i in range(len(events)):
            if len(sol.t_events[i]):
                return i, float(sol.t_events[i][0]), np.array(sol.y_events[i][0], float)
        raise StoppedError(what)

    def _approach(self, t0, theta0, omega0, d):
        """Free swing from (theta0, omega0), moving d, until the balance enters the lift."""
        hl = self.half_lift
        ev = _event(lambda t, y: d * y[0] + hl, +1.0, True)
        _, t, y = self._piece(self._rhs(False, 0.0, self.coulomb * d), t0, [theta0, omega0, 0, 0, 0, 0],
                              [ev], "the balance does not reach the lift")
        return t, float(y[1])

    def lift_direct(self, omega_in: float, d: int, factor: float) -> np.ndarray:
        """Integrate the lift from the pin's entry (speed before the impact omega_in, moving d):
        returns the values of _LIFT_KEYS (times from the entry)."""
        I, J, hl, U = self.inertia_kg_m2, self.lever_inertia, self.half_lift, self.unlock_arc
        tau_i = self.impulse_torque_n_m * factor
        fric = self.coulomb * d
        y = np.array([-d * hl, omega_in * I / (I + J), 0, 0, 0, 0], float)
        t = 0.0
        if U > 0:
            ev = _event(lambda t, y: d * y[0] + hl - U, +1.0, True)
            _, t, y = self._piece(self._rhs(True, -d * self.unlock_torque_ratio * tau_i, fric), 0.0, y, [ev],
                                  "the balance turned back while unlocking")
        t_imp, om_imp = t, y[1]
        ev = _event(lambda t, y: d * y[0] - hl, +1.0, True)
        _, t, y = self._piece(self._rhs(True, d * tau_i, fric), t, y, [ev],
                              "the balance turned back on the impulse")
        return np.array([t_imp, om_imp, t, y[1], y[2], y[3], y[4], y[5]])

    def swing_direct(self, omega_exit: float, d: int):
        """The free swing from the end of the lift (moving d) out to the extreme -- or the
        banking -- and back to the next entry: (values of _SWING_KEYS, knocks, knock loss)."""
        I, hl = self.inertia_kg_m2, self.half_lift
        fric = self.coulomb * d
        y = np.array([d * hl, omega_exit, 0, 0, 0, 0], float)
        ev_turn = _event(lambda t, y: y[1], -float(d), True)
        events = [ev_turn]
        if self.bank is not None:
            events.append(_event(lambda t, y: d * y[0] - self.bank, +1.0, True))
        which, t_turn, y = self._piece(self._rhs(False, 0.0, fric), 0.0, y, events,
                                       "the balance does not turn")
        knocks, loss_knock = [], 0.0
        th_turn = y[0]
        if which == 1:  # the impulse pin strikes the outside of the fork horn
            om_k = y[1]
            knocks.append((t_turn, abs(om_k)))
            y[1] = -self.bank_restitution * om_k
            loss_knock = 0.5 * I * (om_k ** 2 - y[1] ** 2)
        ev_next = _event(lambda t, y: d * y[0] - hl, -1.0, True)
        _, t_back, y = self._piece(self._rhs(False, 0.0, -fric), t_turn, y, [ev_next],
                                   "the balance does not come back to the lift")
        return np.array([t_turn, th_turn, t_back, y[1], y[4], y[5]]), knocks, loss_knock

    def build_tables(self, omega_lo: float, omega_hi: float, factor_lo: float, factor_hi: float,
                     n: int = 14, n_factor: int = 5):
        """Tabulate the lift and swing maps (both directions) over entry speeds |omega| in
        [omega_lo, omega_hi] and torque factors in [factor_lo, factor_hi]."""
        self._tables = {}
        nf = 1 if factor_hi - factor_lo < 1e-12 else n_factor
        for d in (+1, -1):
            if nf == 1:
                f0 = factor_lo
                lift = _ChebTable(lambda w: self.lift_direct(d * w, d, f0), omega_lo, omega_hi, n)
            else:
                lift = _ChebTable(lambda w, f: self.lift_direct(d * w, d, f), omega_lo, omega_hi, n,
                                  factor_lo, factor_hi, nf)
            self._tables[("lift", d)] = (lift, nf == 1, factor_lo)
            # exit speeds reached from these entries (the impulse raises the speed)
            ex = [abs(self.lift_direct(d * w, d, f)[3]) for w in (omega_lo, omega_hi)
                  for f in (factor_lo, factor_hi)]
            lo, hi = min(ex) * 0.98, max(ex) * 1.02
            # the swing map is smooth only where no swing reaches the banking: tabulate it
            # when even the fastest exit in the table turns short of it
            if self.bank is None or not self.swing_direct(d * hi, d)[1]:
                self._tables[("swing", d)] = _ChebTable(lambda w: self.swing_direct(d * w, d)[0], lo, hi, n)

    def _lift(self, omega_in, d, factor):
        tab = self._tables.get(("lift", d))
        if tab is not None:
            table, flat, f0 = tab
            w = abs(omega_in)
            if flat and abs(factor - f0) < 1e-15 and table.contains(w):
                return table(w)
            if not flat and table.contains(w, factor):
                return table(w, factor)
        return self.lift_direct(omega_in, d, factor)

    def _swing(self, omega_exit, d):
        table = self._tables.get(("swing", d))
        if table is not None and table.contains(abs(omega_exit)):
            return table(abs(omega_exit)), [], 0.0
        return self.swing_direct(omega_exit, d)

    def beat(self, index, t_entry, omega_before, d, factor) -> LeverBeat:
        """One beat: from the pin's entry into the fork to the next entry."""
        I, J = self.inertia_kg_m2, self.lever_inertia
        L = dict(zip(_LIFT_KEYS, self._lift(omega_before, d, factor)))
        S_vals, knocks, loss_knock = self._swing(L["om_exit"], d)
        S = dict(zip(_SWING_KEYS, S_vals))
        om_after = omega_before * I / (I + J)
        om_exit = float(L["om_exit"])
        # the escape wheel after the tooth leaves the impulse face: it starts at the speed
        # the lever drove it with and falls through the drop under the mainspring torque
        v0 = self.wheel_ratio * abs(om_exit)
        drop = self.drop_angle_deg * DEG
        accel = 2 * drop / self.drop_free_time_s ** 2 * factor
        if self.tooth_drop_errors:
            drop *= 1 + self.tooth_drop_errors[(index // 2) % self.escape_teeth % len(self.tooth_drop_errors)]
        v_land = math.sqrt(v0 * v0 + 2 * accel * drop)
        t_exit = t_entry + float(L["t_exit"])
        return LeverBeat(
            index=index, direction=d, t_entry=t_entry, omega_before_entry=omega_before,
            omega_after_entry=om_after, t_impulse=t_entry + float(L["t_imp"]), omega_impulse=float(L["om_imp"]),
            t_exit=t_exit, omega_exit=om_exit, drop_delay_s=2 * drop / (v0 + v_land), drop_speed_rad_s=v_land,
            t_turn=t_exit + float(S["t_turn"]), theta_turn=float(S["th_turn"]),
            t_next_entry=t_exit + float(S["t_back"]), omega_next=float(S["om_back"]),
            knocks=[(t_exit + tk, w) for tk, w in knocks], torque_factor=factor,
            work_impulse_j=float(L["w_imp"]), work_unlock_j=float(L["w_unl"]),
            loss_viscous_j=float(L["visc"] + S["visc"]), loss_coulomb_j=float(L["coul"] + S["coul"]),
            loss_entry_impact_j=0.5 * I * omega_before ** 2 - 0.5 * (I + J) * om_after ** 2,
            loss_exit_j=0.5 * J * om_exit ** 2, loss_knock_j=loss_knock)

    def run(self, duration_s: float, t_start: float = 0.0, start_amplitude_deg: float | None = None,
            start_phase: float = 0.0, tables="auto"):
        """Integrate beats from t_start (s) for duration_s; returns the list of LeverBeat.

        ``tables``: True tabulates the beat maps, False integrates every beat, "auto" tabulates
        for runs long enough to repay it.

        The balance starts at rest at its extreme on the negative side (amplitude
        ``start_amplitude_deg`` about the hairspring's rest point; default the target,
        which is the calibrated steady state), ``start_phase`` (0..1) of a beat before
        t_start."""
        A = (self.target_amplitude_deg if start_amplitude_deg is None else start_amplitude_deg) * DEG
        t0 = t_start - start_phase * 0.5 * self.natural_period_s
        t_entry, om = self._approach(t0, self.theta_rest - A, 0.0, +1)
        n_est = int(duration_s / (0.5 * self.natural_period_s)) + 4
        if tables is True or (tables == "auto" and n_est > 200):  # the tables cost about 100 beats
            fs = [self.torque_factor(duration_s * i / max(n_est - 1, 1), i) for i in range(n_est)]
            w = abs(om)
            self.build_tables(0.9 * w, 1.1 * w, min(fs), max(fs))
        else:
            self._tables = {}
        beats = []
        d, i = +1, 0
        while t_entry < t_start + duration_s:
            b = self.beat(i, t_entry, om, d, self.torque_factor(t_entry - t_start, i))
            beats.append(b)
            t_entry, om = b.t_next_entry, b.omega_next
            d, i = -d, i + 1
        return beats

    # -- calibration ----------------------------------------------------------------
    def _period_map(self, tau, amplitude_rad=None, banking=False):
        """One period from rest at the negative extreme: (amplitude after it, its length).

        Without ``banking`` the swing is free to pass the banking angle: the calibration
        targets the amplitude the mainspring would give if nothing stopped the balance."""
        saved = self.impulse_torque_n_m, self.bank
        tables = self._tables
        self.impulse_torque_n_m = tau
        if not banking:
            self.bank = None
        self._tables = {}
        try:
            A = self.target_amplitude_deg * DEG if amplitude_rad is None else amplitude_rad
            t, om = self._approach(0.0, self.theta_rest - A, 0.0, +1)
            b1 = self.beat(0, t, om, +1, 1.0)
            b2 = self.beat(1, b1.t_next_entry, b1.omega_next, -1, 1.0)
            return self.theta_rest - b2.theta_turn, b2.t_next_entry - t
        finally:
            self.impulse_torque_n_m, self.bank = saved
            self._tables = tables

    def _calibrate_torque(self):
        """The impulse torque whose one-period map keeps the target amplitude (its fixed point)."""
        A = self.target_amplitude_deg * DEG
        I, J, hl = self.inertia_kg_m2, self.lever_inertia, self.half_lift
        w = self.omega0
        # first guess from the energy balance of a simple harmonic swing
        visc = 0.5 * math.pi * self.damping * w * A * A
        coul = 2 * self.coulomb * A
        ke_lift = 0.5 * I * w * w * max(A * A - hl * hl, 1e-9)
        arc = 2 * hl - self.unlock_arc * (1 + self.unlock_torque_ratio)
        guess = (visc + coul + 2 * ke_lift * J / I) / arc
        self.calibration["torque_first_guess_n_m"] = guess

        def f(tau):
            try:
                return self._period_map(tau)[0] - A
            except StoppedError:
                return -A
        return _bracketed_root(f, guess)

    def steady_state(self, torque_factor: float = 1.0):
        """(amplitude_deg, period_s) of the steady swing at a given mainspring torque: the
        fixed point of the one-period map (the amplitude after a period equals the one before)."""
        tau = self.impulse_torque_n_m * torque_factor
        g = lambda a_deg: self._period_map(tau, a_deg * DEG)[0] / DEG - a_deg
        lo = self.lift_angle_deg * 0.5 + abs(self.rest_offset_deg) + 5
        hi = 359.0  # the banking is left out here (see _period_map)
        if g(lo) < 0 or g(hi) > 0:
            raise StoppedError("no steady amplitude in range")
        a = optimize.brentq(g, lo, hi, xtol=1e-10)
        return a, self._period_map(tau, a * DEG)[1]

    def free_swing(self, amplitude_deg: float, n_periods: int = 1, with_losses: bool = True):
        """The balance swinging without its escapement, integrated with the model's own
        equations (hairspring, cubic term, friction): (periods_s, negative extremes_rad)."""
        saved = self.damping, self.coulomb
        if not with_losses:
            self.damping = self.coulomb = 0.0
        try:
            th, om, t = self.theta_rest - amplitude_deg * DEG, 0.0, 0.0
            times, extremes = [0.0], [th]
            for _ in range(n_periods):
                for d in (+1, -1):
                    ev = _event(lambda t, y: y[1], -float(d), True)
                    _, t, y = self._piece(self._rhs(False, 0.0, self.coulomb * d), t, [th, om, 0, 0, 0, 0],
                                          [ev], "no turn")
                    th, om = float(y[0]), 0.0
                times.append(t)
                extremes.append(th)
            return np.diff(times), np.array(extremes)
        finally:
            self.damping, self.coulomb = saved


def _bracketed_root(f, guess):
    """Root of an increasing function near guess (bracket grown as needed, then Brent)."""
    lo, hi = 0.8 * guess, 1.25 * guess
    flo, fhi = f(lo), f(hi)
    for _ in range(60):
        if flo <= 0:
            break
        lo *= 0.7
        flo = f(lo)
    for _ in range(60):
        if fhi >= 0:
            break
        hi *= 1.4
        fhi = f(hi)
    if flo > 0 or fhi < 0:
        raise StoppedError("no torque gives the target amplitude")
    return optimize.brentq(f, lo, hi, xtol=guess * 1e-13, rtol=1e-13)


# ---------------------------------------------------------------------------
# Pendulum clock
# ---------------------------------------------------------------------------

@dataclass
class PendulumBeat:
    index: int
    direction: int
    t_release: float  # dead-beat: the tooth passes onto the impulse face; recoil: the tooth escapes the pallet
    omega_release: float
    t_exit: float  # dead-beat: the tooth leaves the impulse face (recoil: == t_release)
    omega_exit: float
    drop_delay_s: float
    drop_speed_rad_s: float
    t_turn: float
    theta_turn: float
    t_next: float
    omega_next: float
    torque_factor: float
    work_escapement_j: float  # net work of the escape wheel on the pendulum (recoil: net of the recoil)
    loss_viscous_j: float
    loss_friction_j: float

    @property
    def t_drop(self) -> float:
        return self.t_exit + self.drop_delay_s


_PEND_KEYS = ("t_exit", "om_exit", "t_drop", "v_land", "t_turn", "th_turn", "t_next", "om_next",
              "w_esc", "visc", "fric")


@dataclass
class PendulumClock:
    """A pendulum clock with a dead-beat or recoil escapement (see the module docstring).

    A beat runs from one release of the escape wheel to the next, integrated in smooth
    pieces (impulse, the wheel's drop, out to the extreme, back), each a solve_ivp call
    ending on a terminal event (the drop ends at the time the wheel's free fall gives).
    """
    train_beats_per_hour: float = 7680.0
    target_amplitude_deg: float = 4.0  # semi-arc
    target_rate_s_per_day: float = 0.0  # against the train's nominal
    escapement: str = "deadbeat"  # or "recoil"
    q: float = 150.0
    bob_mass_kg: float = 0.25
    impulse_arc_deg: float = 2.0  # dead-beat: impulse faces; recoil: between the two escaping points
    crutch_offset_deg: float = 0.0
    friction_ratio: float = 0.1  # sliding friction on the pallets / escape torque
    wheel_ratio: float = 0.6
    drop_angle_deg: float = 2.0
    drop_free_time_s: float = 3e-3
    torque_fall_per_hour: float = 0.0
    hours_since_wind: float = 0.0
    ripple: tuple = ()
    gravity_m_s2: float = STANDARD_GRAVITY_M_S2
    length_m: float | None = None
    escape_torque_n_m: float | None = None
    calibration: dict = field(default_factory=dict)

    def __post_init__(self):
        if self.escapement not in ("deadbeat", "recoil"):
            raise ValueError("escapement: 'deadbeat' or 'recoil'")
        self.nominal_beat_s = 3600.0 / self.train_beats_per_hour
        self.offset = self.crutch_offset_deg * DEG
        self.half_arc = 0.5 * self.impulse_arc_deg * DEG
        fixed_len = self.length_m is not None
        fixed_torque = self.escape_torque_n_m is not None
        A = self.target_amplitude_deg * DEG
        want = 2 * self.nominal_beat_s / (1 + self.target_rate_s_per_day / 86400.0)
        if not fixed_len:
            # the small-swing period with the circular-error series as a first guess
            self.length_m = self.gravity_m_s2 * (want / (2 * math.pi * (1 + A * A / 16))) ** 2
        self._set()
        if fixed_len and fixed_torque:
            return
        if not fixed_torque:
            self.escape_torque_n_m = self._calibrate_torque()
        if not fixed_len:
            for _ in range(3):
                period = self._period_map(self.escape_torque_n_m)[1]
                self.calibration.setdefault("periods_s", []).append(period)
                if abs(period / want - 1) < 1e-12:
                    break
                self.length_m *= (want / period) ** 2
                self._set()
                if not fixed_torque:
                    self.escape_torque_n_m = self._calibrate_torque()
        self.calibration.update(length_m=self.length_m, escape_torque_n_m=self.escape_torque_n_m)

    def _set(self):
        self.inertia = self.bob_mass_kg * self.length_m ** 2  # a point bob on a light rod
        self.omega0 = math.sqrt(self.gravity_m_s2 / self.length_m)
        self.damping = self.inertia * self.omega0 / self.q  # torque per rad/s
        self.energy_scale = 0.5 * self.inertia * (self.omega0 * self.target_amplitude_deg * DEG) ** 2

    torque_factor = LeverEscapement.torque_factor

    def _rhs(self, esc: float, fric: float):
        """One smooth piece: gravity (large-angle), viscous damping, escapement torque esc,
        sliding friction -fric; the state carries theta, omega and three work integrals."""
        I = self.inertia
        mgl = self.bob_mass_kg * self.gravity_m_s2 * self.length_m
        c = self.damping
        sin = math.sin

        def rhs(t, y):
            om = y[1]
            return (om, (-mgl * sin(y[0]) - c * om + esc - fric) / I, esc * om, c * om * om, abs(fric * om))
        return rhs

    def _period_guess_s(self):
        return 2 * math.pi / self.omega0

    def _solve(self, rhs, t0, y0, t1, events=None):
        ew = 1e-13 * self.energy_scale
        sol = solve_ivp(rhs, (t0, t1), y0, method="DOP853", rtol=RTOL,
                        atol=[1e-13, 1e-12, ew, ew, ew], events=events)
        if sol.status < 0:
            raise RuntimeError(sol.message)
        return sol

    def _piece(self, rhs, t0, y0, event, what):
        sol = self._solve(rhs, t0, y0, t0 + 2 * self._period_guess_s(), [event])
        if not len(sol.t_events[0]):
            raise StoppedError(what)
        return float(sol.t_events[0][0]), np.array(sol.y_events[0][0], float)

    def _start(self, t0, A, d):
        """From rest at the extreme on the -d side to the first beat's release (moving d)."""
        off, ha = self.offset, self.half_arc
        tau, fr = self.escape_torque_n_m, self.friction_ratio * self.escape_torque_n_m
        y = [-d * A, 0.0, 0, 0, 0]
        if self.escapement == "deadbeat":
            ev = _event(lambda t, y: d * (y[0] - off) + ha, +1.0, True)
            t, y = self._piece(self._rhs(0.0, d * fr), t0, y, ev, "the pendulum does not reach the impulse face")
        else:
            ev = _event(lambda t, y: d * (y[0] - off) - ha, +1.0, True)
            t, y = self._piece(self._rhs(d * tau, d * fr), t0, y, ev, "the pendulum does not reach the escaping point")
        return t, float(y[1])

    def beat_direct(self, omega_in: float, d: int, factor: float) -> np.ndarray:
        """One beat from its release (moving d at omega_in) to the next release: the values
        of _PEND_KEYS, times from the release."""
        off, ha = self.offset, self.half_arc
        tau = self.escape_torque_n_m * factor
        fr = self.friction_ratio * tau
        w = np.zeros(3)
        if self.escapement == "deadbeat":
            y = np.array([off - d * ha, omega_in, 0, 0, 0], float)
            ev = _event(lambda t, y: d * (y[0] - off) - ha, +1.0, True)
            t_exit, y = self._piece(self._rhs(d * tau, d * fr), 0.0, y, ev,
                                    "the pendulum turned back on the impulse face")
            w += y[2:]
        else:
            y = np.array([off + d * ha, omega_in, 0, 0, 0], float)
            t_exit = 0.0
        om_exit = float(y[1])
        # the escape wheel, released, falls through the drop from the speed the pallet let it go at
        v0 = self.wheel_ratio * abs(om_exit)
        drop = self.drop_angle_deg * DEG
        accel = 2 * drop / self.drop_free_time_s ** 2 * factor
        v_land = math.sqrt(v0 * v0 + 2 * accel * drop)
        t_d = 2 * drop / (v0 + v_land)
        y[2:] = 0.0
        sol = self._solve(self._rhs(0.0, 0.0), t_exit, y, t_exit + t_d)
        y = np.array(sol.y[:, -1], float)
        w += y[2:]
        y[2:] = 0.0
        esc = 0.0 if self.escapement == "deadbeat" else -d * tau  # recoil: the other pallet pushes back
        ev = _event(lambda t, y: y[1], -float(d), True)
        t_turn, y = self._piece(self._rhs(esc, d * fr), t_exit + t_d, y, ev, "the pendulum does not turn")
        th_turn = float(y[0])
        w += y[2:]
        y[2:] = 0.0
        if self.escapement == "deadbeat":
            ev = _event(lambda t, y: d * (y[0] - off) - ha, -1.0, True)  # the -d beat's release
        else:
            ev = _event(lambda t, y: -d * (y[0] - off) - ha, +1.0, True)  # the -d beat's escape
        t_next, y = self._piece(self._rhs(esc, -d * fr), t_turn, y, ev,
                                "the pendulum does not come back to the escapement")
        w += y[2:]
        return np.array([t_exit, om_exit, t_d, v_land, t_turn, th_turn, t_next, float(y[1]), *w])

    def build_tables(self, omega_lo, omega_hi, factor_lo, factor_hi, n=12, n_factor=4):
        nf = 1 if factor_hi - factor_lo < 1e-12 else n_factor
        self._tables = {}
        for d in (+1, -1):
            if nf == 1:
                f0 = factor_lo
                tab = _ChebTable(lambda w: self.beat_direct(d * w, d, f0), omega_lo, omega_hi, n)
            else:
                tab = _ChebTable(lambda w, f: self.beat_direct(d * w, d, f), omega_lo, omega_hi, n,
                                 factor_lo, factor_hi, nf)
            self._tables[d] = (tab, nf == 1, factor_lo)

    def beat(self, index, t_rel, omega_in, d, factor) -> PendulumBeat:
        tab = getattr(self, "_tables", {}).get(d)
        v = None
        if tab is not None:
            table, flat, f0 = tab
            w = abs(omega_in)
            if flat and abs(factor - f0) < 1e-15 and table.contains(w):
                v = table(w)
            elif not flat and table.contains(w, factor):
                v = table(w, factor)
        if v is None:
            v = self.beat_direct(omega_in, d, factor)
        B = dict(zip(_PEND_KEYS, v))
        return PendulumBeat(index=index, direction=d, t_release=t_rel, omega_release=omega_in,
                            t_exit=t_rel + B["t_exit"], omega_exit=float(B["om_exit"]),
                            drop_delay_s=float(B["t_drop"]), drop_speed_rad_s=float(B["v_land"]),
                            t_turn=t_rel + B["t_turn"], theta_turn=float(B["th_turn"]),
                            t_next=t_rel + B["t_next"], omega_next=float(B["om_next"]), torque_factor=factor,
                            work_escapement_j=float(B["w_esc"]), loss_viscous_j=float(B["visc"]),
                            loss_friction_j=float(B["fric"]))

    def run(self, duration_s: float, t_start: float = 0.0, start_amplitude_deg: float | None = None,
            start_phase: float = 0.0, tables="auto"):
        """Beats from t_start for duration_s (the pendulum starts at rest at the negative
        extreme, ``start_phase`` of a beat earlier); returns the list of PendulumBeat."""
        A = (self.target_amplitude_deg if start_amplitude_deg is None else start_amplitude_deg) * DEG
        t0 = t_start - start_phase * 0.5 * self._period_guess_s()
        t, om = self._start(t0, A, +1)
        self._tables = {}
        n_est = int(duration_s / (0.5 * self._period_guess_s())) + 4
        if tables is True or (tables == "auto" and n_est > 80):
            fs = [self.torque_factor(duration_s * i / (n_est - 1), i) for i in range(n_est)]
            self.build_tables(0.92 * abs(om), 1.08 * abs(om), min(fs), max(fs))
        d, i, beats = +1, 0, []
        while t < t_start + duration_s:
            b = self.beat(i, t, om, d, self.torque_factor(t - t_start, i))
            beats.append(b)
            t, om = b.t_next, b.omega_next
            d, i = -d, i + 1
        return beats

    def _period_map(self, tau, amplitude_rad=None):
        saved = self.escape_torque_n_m
        self.escape_torque_n_m = tau
        self._tables = {}
        try:
            A = self.target_amplitude_deg * DEG if amplitude_rad is None else amplitude_rad
            t, om = self._start(0.0, A, +1)
            b1 = self.beat(0, t, om, +1, 1.0)
            b2 = self.beat(1, b1.t_next, b1.omega_next, -1, 1.0)
            return -b2.theta_turn, b2.t_next - t
        finally:
            self.escape_torque_n_m = saved

    def _calibrate_torque(self):
        A = self.target_amplitude_deg * DEG
        # first guess from the energy balance per beat: (pi/2)*c*omega0*A^2 lost to damping,
        # torque*(arc) given, friction*(the arc it slides over) taken
        arc = 2 * self.half_arc
        slide = 2 * A if self.escapement == "recoil" else 2 * A - arc
        net = max(arc - self.friction_ratio * (slide + arc), 0.2 * arc)
        guess = 0.5 * math.pi * self.damping * self.omega0 * A * A / net
        self.calibration["torque_first_guess_n_m"] = guess

        def f(tau):
            try:
                return self._period_map(tau)[0] - A
            except StoppedError:
                return -A
        return _bracketed_root(f, guess)

    def steady_state(self, torque_factor: float = 1.0):
        """(amplitude_deg, period_s) of the steady swing at a given drive torque (fixed point
        of the one-period map)."""
        tau = self.escape_torque_n_m * torque_factor
        g = lambda a: self._period_map(tau, a * DEG)[0] / DEG - a
        lo = self.impulse_arc_deg * 0.5 + abs(self.crutch_offset_deg) + 0.2
        a = optimize.brentq(g, lo, 30.0, xtol=1e-11)
        return a, self._period_map(tau, a * DEG)[1]

    def free_swing(self, amplitude_deg: float, n_periods: int = 1, with_losses: bool = False):
        """The pendulum without its escapement (the model's own equations):
        (periods_s, negative extremes_rad)."""
        saved = self.damping
        if not with_losses:
            self.damping = 0.0
        try:
            th, t = -amplitude_deg * DEG, 0.0
            times, extremes = [0.0], [th]
            rhs = self._rhs(0.0, 0.0)
            for _ in range(n_periods):
                for d in (+1, -1):
                    ev = _event(lambda t, y: y[1], -float(d), True)
                    t, y = self._piece(rhs, t, [th, 0.0, 0, 0, 0], ev, "no turn")
                    th = float(y[0])
                times.append(t)
                extremes.append(th)
            return np.diff(times), np.array(extremes)
        finally:
            self.damping = saved


# ---------------------------------------------------------------------------
# Structural modes
# ---------------------------------------------------------------------------

def clamped_circular_plate_roots(n_max: int = 4, s_max: int = 3):
    """Frequency parameters lambda (omega ~ lambda^2) of a clamped circular plate.

    Roots of J_n(l)*I_{n+1}(l) + I_n(l)*J_{n+1}(l) = 0 (the clamped-edge condition of
    Kirchhoff plate theory).  Returns a list of (lambda, n, s) sorted by lambda."""
    out = []
    for n in range(n_max + 1):
        g = lambda x: special.jv(n, x) * special.iv(n + 1, x) + special.iv(n, x) * special.jv(n + 1, x)
        xs = np.linspace(0.5, 4 * s_max + n + 6, 4000)
        v = g(xs) / special.iv(n, xs)
        s = 0
        for a, b, va, vb in zip(xs[:-1], xs[1:], v[:-1], v[1:]):
            if va * vb < 0:
                s += 1
                r = optimize.brentq(lambda x: g(x) / special.iv(n, x), a, b, xtol=1e-14)
                out.append((r, n, s))
                if s >= s_max:
                    break
    return sorted(out)


def clamped_circular_plate_shape(lam: float, n: int, r: float, phi: float) -> float:
    """Mode shape of the clamped circular plate (unit radius) at (r, phi)."""
    return float((special.jv(n, lam * r) - special.jv(n, lam) / special.iv(n, lam) * special.iv(n, lam * r))
                 * math.cos(n * phi))


def free_free_beam_roots(n: int = 4):
    """beta*L of a free-free Euler-Bernoulli beam: roots of cos(x)*cosh(x) = 1 (x > 0)."""
    out = []
    for k in range(1, n + 1):
        a, b = (k + 0.5) * math.pi - 0.5, (k + 0.5) * math.pi + 0.5
        out.append(optimize.brentq(lambda x: math.cos(x) * math.cosh(x) - 1, a, b, xtol=1e-14))
    return out


def free_free_beam_shape(bl: float, x: float) -> float:
    """Mode shape of the free-free beam (unit length) at x in [0, 1]."""
    sig = (math.cosh(bl) - math.cos(bl)) / (math.sinh(bl) - math.sin(bl))
    u = bl * x
    return (math.cosh(u) + math.cos(u)) - sig * (math.sinh(u) + math.sin(u))


@dataclass
class ModeSet:
    """Damped structural modes: frequency (Hz), amplitude e-folding time (s), per-event gains."""
    freqs_hz: np.ndarray
    decay_s: np.ndarray
    gains: dict  # event type -> array of modal gains (participation * radiation)

    def band_limited(self, samplerate: float, fraction: float = 0.45) -> "ModeSet":
        keep = self.freqs_hz < fraction * samplerate
        return ModeSet(self.freqs_hz[keep], self.decay_s[keep], {k: v[keep] for k, v in self.gains.items()})

    @staticmethod
    def join(*sets: "ModeSet") -> "ModeSet":
        keys = set().union(*[s.gains for s in sets])
        return ModeSet(np.concatenate([s.freqs_hz for s in sets]), np.concatenate([s.decay_s for s in sets]),
                       {k: np.concatenate([s.gains.get(k, np.zeros(len(s.freqs_hz))) for s in sets]) for k in keys})


def circular_plate_modes(f1_hz, q1, points: dict, rng, n_modes=8, q_slope=-0.3, spread=0.15):
    """Clamped circular plate modes with fundamental f1; points: event -> (r, phi) on the plate."""
    roots = clamped_circular_plate_roots()[:n_modes]
    lam1 = roots[0][0]
    f = np.array([f1_hz * (lam / lam1) ** 2 for lam, _, _ in roots])
    q = q1 * (f / f1_hz) ** q_slope
    decay = q / (math.pi * f)  # amplitude e-folding time of a mode of quality factor Q
    rad = np.array([1.0 / (1 + n) for _, n, _ in roots])  # axisymmetric modes radiate best
    gains = {}
    for ev, (r, phi) in points.items():
        g = np.array([clamped_circular_plate_shape(lam, n, r, phi) for lam, n, _ in roots]) * rad
        gains[ev] = g * np.exp(rng.normal(0, spread, len(g)))
    return ModeSet(f, decay, gains)


def beam_modes(f1_hz, q1, points: dict, rng, n_modes=4, spread=0.15):
    roots = free_free_beam_roots(n_modes)
    f = np.array([f1_hz * (b / roots[0]) ** 2 for b in roots])
    decay = q1 * (f / f1_hz) ** -0.3 / (math.pi * f)
    gains = {ev: np.array([free_free_beam_shape(b, x) / (1 + i) for i, b in enumerate(roots)])
             * np.exp(rng.normal(0, spread, n_modes)) for ev, x in points.items()}
    return ModeSet(f, decay, gains)


def rect_plate_modes(f11_hz, aspect, q1, points: dict, rng, n_modes=10, f_max_ratio=12.0, spread=0.15):
    """Simply supported rectangular plate (sides 1 x aspect): f_mn ~ (m)^2 + (n/aspect)^2."""
    cand = []
    for m in range(1, 8):
        for n in range(1, 8):
            cand.append(((m * m + (n / aspect) ** 2) / (1 + 1 / aspect ** 2), m, n))
    cand = sorted(c for c in cand if c[0] <= f_max_ratio)[:n_modes]
    f = np.array([f11_hz * c[0] for c in cand])
    decay = q1 * (f / f11_hz) ** -0.3 / (math.pi * f)
    # modes odd in both directions radiate as monopoles; others much less
    rad = np.array([1.0 if (m % 2 and n % 2) else 0.3 for _, m, n in cand]) / np.sqrt(np.arange(1, len(cand) + 1))
    gains = {}
    for ev, (x, y) in points.items():
        g = np.array([math.sin(m * math.pi * x) * math.sin(n * math.pi * y) for _, m, n in cand]) * rad
        gains[ev] = g * np.exp(rng.normal(0, spread, len(g)))
    return ModeSet(f, decay, gains)


# ---------------------------------------------------------------------------
# Contact pulses and rendering
# ---------------------------------------------------------------------------

@dataclass
class Impact:
    time_s: float  # onset of the contact force (at the listening point, if delays are added)
    kind: str  # 'unlock', 'impulse', 'drop', 'knock', 'release', 'step-a', ...
    force: float  # peak force, arbitrary units
    duration_s: float  # contact duration (half-sine)


def hertz_pulse(kind, time_s, speed, ref_speed, ref_force, ref_duration_s) -> Impact:
    """Hertz impact law (Johnson 1985, s.11.4; from memory): peak force ~ v^(6/5), duration ~ v^(-1/5)."""
    r = max(speed / ref_speed, 1e-6)
    return Impact(time_s, kind, ref_force * r ** 1.2, ref_duration_s * r ** -0.2)


def _mode_velocity(t, tau, f_hz, decay_s):
    """Velocity of unit modes (natural f, amplitude decay time) under a unit half-sine force of
    duration tau starting at t = 0, in closed form at the times t (>= 0); shape (len(t), modes).

    y'' + 2*sigma*y' + wn^2*y = sin(pi*u/tau) on [0, tau]; h(t) = exp(-sigma t) sin(wd t)/wd.
    With s = -sigma + i*wd, y'(t) = -(1/(2 wd)) Re[s (G(s, iW) - G(s, -iW))],
    G(a, b) = exp(a t) (exp((b - a) m) - 1)/(b - a), m = min(t, tau), W = pi/tau."""
    s, wd = _poles(f_hz, decay_s)
    W = np.pi / tau
    t = np.asarray(t, float)[:, None]
    m = np.minimum(t, tau)
    b1, b2 = 1j * W - s, -1j * W - s
    G = np.exp(s * t) * (np.expm1(b1 * m) / b1 - np.expm1(b2 * m) / b2)
    return -(s * G).real / (2 * wd)


def _poles(f_hz, decay_s):
    wd = 2 * np.pi * np.asarray(f_hz, float)
    return -1.0 / np.asarray(decay_s, float) + 1j * wd, wd


def _tail_coefficient(tau, f_hz, decay_s):
    """For t >= tau the velocity above is Re[C exp(s t)]: returns C per mode."""
    s, wd = _poles(f_hz, decay_s)
    W = np.pi / tau
    b1, b2 = 1j * W - s, -1j * W - s
    K = np.expm1(b1 * tau) / b1 - np.expm1(b2 * tau) / b2
    return -s * K / (2 * wd)


def render_impacts_direct(impacts, modes: "ModeSet", samplerate: int, n_samples: int, t0_s: float = 0.0,
                          floor_db: float = -100.0) -> np.ndarray:
    """Reference renderer: every impact's modal response evaluated in closed form at each
    sample instant t = t0_s + n/samplerate (slow; used to check render_impacts)."""
    out = np.zeros(n_samples)
    if not len(modes.freqs_hz):
        return out
    w = 2 * np.pi * modes.freqs_hz
    tail_s = float(np.max(modes.decay_s)) * (-floor_db / 20 * math.log(10))
    for imp in impacts:
        g = modes.gains[imp.kind]
        n0 = max(0, int(math.ceil((imp.time_s - t0_s) * samplerate)))
        n1 = min(n_samples, int(math.ceil((imp.time_s + imp.duration_s + tail_s - t0_s) * samplerate)))
        if n1 <= n0:
            continue
        t = np.maximum(t0_s + np.arange(n0, n1) / samplerate - imp.time_s, 0.0)
        out[n0:n1] += imp.force * (_mode_velocity(t, imp.duration_s, modes.freqs_hz, modes.decay_s) @ (g * w))
    return out


def render_impacts(impacts, modes: "ModeSet", samplerate: int, n_samples: int, t0_s: float = 0.0) -> np.ndarray:
    """Sum of the modal responses to every impact at the sample instants t = t0_s + n/samplerate.

    Exact at fractional event times: while a contact lasts its response is evaluated in
    closed form; from the first sample after it, each mode is a damped complex exponential
    C*exp(s*t), injected there and carried on by the one-pole recursion
    z[n] = z[n-1]*exp(s/samplerate) + injection[n] (scipy.signal.lfilter)."""
    from scipy.signal import lfilter

    out = np.zeros(n_samples)
    f, dec = modes.freqs_hz, modes.decay_s
    if not len(f):
        return out
    s, wd = _poles(f, dec)
    idx, vals = [], []
    for imp in impacts:
        g = modes.gains[imp.kind] * wd * imp.force
        n0 = max(0, int(math.ceil((imp.time_s - t0_s) * samplerate)))
        n_end = max(0, int(math.ceil((imp.time_s + imp.duration_s - t0_s) * samplerate)))  # first t >= tau
        if n0 >= n_samples:
            continue
        if n_end > n0:
            t = t0_s + np.arange(n0, min(n_end, n_samples)) / samplerate - imp.time_s
            out[n0:min(n_end, n_samples)] += _mode_velocity(np.maximum(t, 0.0), imp.duration_s, f, dec) @ g
        if n_end < n_samples:
            t1 = t0_s + n_end / samplerate - imp.time_s
            idx.append(n_end)
            vals.append(g * _tail_coefficient(imp.duration_s, f, dec) * np.exp(s * t1))
    if not idx:
        return out
    idx = np.array(idx)
    vals = np.array(vals)
    chunk = 1 << 19
    for m in range(len(f)):
        a = [1.0, -np.exp(s[m] / samplerate)]
        zi = np.zeros(1, complex)
        for c0 in range(0, n_samples, chunk):
            c1 = min(n_samples, c0 + chunk)
            sel = (idx >= c0) & (idx < c1)
            inj = np.zeros(c1 - c0, complex)
            np.add.at(inj, idx[sel] - c0, vals[sel, m])
            z, zi = lfilter([1.0], a, inj, zi=zi)
            out[c0:c1] += z.real
    return out
