"""The step grid: which impacts are motor steps, which are missing, which are something else.

A stepping motor steps on a regular grid: step k sounds at ``a + b*k``.  The tracker

1. *acquires* the grid from the first seconds of impacts: the step interval is the
   longest period on which the impacts line up (a phase-coherence scan, like a
   Rayleigh test), refined by a line fit; the nominal interval is the nearest
   interval quartz movements use (1 s, 1/2, 1/4, 1/8, 1/16 s, 2, 5, 10, 20, 30, 60 s);
2. learns a template per polarity (even and odd steps) from the acquired steps;
3. *tracks*: every impact is timed against its slot's template; a slot is decided once
   the stream has passed it: the best-matching impact near the prediction is the
   step, later impacts of the same sound are secondary, everything else is rejected;
   a slot with no matching sound is a missed step (unless the audio had a gap there).
"""
from __future__ import annotations

import dataclasses
import math
import statistics
from collections import deque
from dataclasses import dataclass

import numpy as np

from ..model import Event
from .detect import Impact
from .dsp import MovingLine, RollingWindow
from .ringdown import measure_ringdown
from .timing import FIRST_IMPACT_PEAK_S, Template, envelope_lag, learn_template, match, match_many, onset_of

# A decay curve whose line misfit (RMS, dB) exceeds this share of the dB it spans bends away from one
# exponential: a room's reverberation or noise some 10-15 dB under the peak (simulated clean ring-downs
# stay under 0.006, with a 250 ms room 0.02-0.03; our own threshold).  Such a step's decay time is
# kept but not judged abnormal: it describes the recording more than the motor.
BENT_DECAY = 0.03

#: Step intervals of quartz movements (s): 2^-k fractions of a second for stepping
#: sweep hands, and the PCA2002 output periods 1, 5, 10, 20, 30 s (NXP PCA2002
#: datasheet Rev. 8, Table 7) plus 2 s and 60 s (common practice), and 4 s: the end-of-life
#: burst period of the Philips PCA16xx ("bursts of 4 pulses are produced every 4 s").
QUARTZ_INTERVALS_S = (1 / 16, 1 / 8, 1 / 4, 1 / 2, 1.0, 2.0, 4.0, 5.0, 10.0, 20.0, 30.0, 60.0)


@dataclass(frozen=True)
class TrackerConfig:
    acquire_s: float = 12.0  # seconds of impacts used to find the grid
    acquire_max_s: float = 40.0  # look for a grid in at most the last 40 s of impacts
    retry_s: float = 4.0  # while no grid is found, look again every 4 s of audio
    min_coherence: float = 0.3  # impacts must line up at least this well
    nominal_tolerance: float = 0.005  # measured interval within 0.5 % of a quartz interval
    slot_tolerance_s: float = 0.025  # a step lies within 25 ms of its predicted time
    cluster_s: float = 0.12  # impacts up to 120 ms after a step are part of its sound
    burst_cluster_s: float = 0.35  # the same for step intervals of 2 s and more (bursts)
    min_match: float = 0.3  # below this correlation a sound is not this movement's step
    good_match: float = 0.6  # steps below this are flagged and kept out of the rate fit
    template_steps: int = 24  # steps per polarity averaged into a template
    track_steps: int = 32  # steps in the moving line fit that predicts the next slot
    weak_db: float = 9.0  # a step this much quieter than usual is a failed step (a twitch)
    correction_min_s: float = 0.008  # a correction pulse follows a failed step after 8 ...
    correction_max_s: float = 0.085  # ... to 85 ms
    twitch_s: float = 0.005  # a failed step's twitch sounds within 5 ms of its slot


def find_interval(times_s: np.ndarray, weights: np.ndarray | None = None, *,
                  min_s: float = 0.05, max_s: float | None = None,
                  max_impacts: int = 160) -> tuple[float, float, float] | None:
    """Longest period on which the impact times line up.

    Returns ``(interval_s, phase_s, coherence)`` or None.  The coherence of a period P is
    ``|sum w exp(2 pi i t / P)| / sum w``: 1 when every impact sits on the same phase.
    Fractions of the true interval (P/2, P/3 ...) line up too, so the longest period whose
    coherence is close to the best one is taken.
    """
    t = np.asarray(times_s, dtype=np.float64)
    if len(t) < 3:
        return None
    w = np.ones(len(t)) if weights is None else np.asarray(weights, dtype=np.float64)
    span = float(t[-1] - t[0])
    if span <= 0:
        return None
    max_s = min(max_s or span / 2, span / 2)
    if max_s <= min_s:
        return None
    if len(t) > max_impacts:  # the strongest impacts carry the pattern; the rest cost time
        top = np.sort(np.argsort(w)[-max_impacts:])
        t, w = t[top], w[top]
    tt = t - t[0]
    # relative resolution 5e-4 (0.05 %): phases drift at most ~0.2 cycles across 40 s at 50 ms
    step = 5e-4
    periods = np.exp(np.arange(math.log(min_s), math.log(max_s), step))
    coh = np.empty(len(periods))
    W = w.sum()
    for i in range(0, len(periods), 512):
        P = periods[i: i + 512]
        ph = np.exp(2j * np.pi * tt[None, :] / P[:, None])
        coh[i: i + 512] = np.abs(ph @ w) / W
    best = float(coh.max())
    if best <= 0:
        return None
    # local maxima close to the best; take the longest period among them
    good = np.flatnonzero(coh >= 0.8 * best)
    j = int(good[-1])
    # climb to the local maximum around j
    while j + 1 < len(coh) and coh[j + 1] >= coh[j]:
        j += 1
    while j - 1 >= 0 and coh[j - 1] > coh[j]:
        j -= 1
    P = float(periods[j])
    phase = float(np.angle(np.sum(w * np.exp(2j * np.pi * tt / P)))) / (2 * np.pi) * P
    return P, t[0] + phase % P, float(coh[j])


def _step_phase(t: np.ndarray, w: np.ndarray, P: float, sound_s: float) -> float:
    """Time of the steps' phase on a grid of interval P: the earliest strong cluster of impact phases.

    The impacts' phases modulo P are gathered in 1 ms bins (weights ``w``) and smoothed over
    +-4 ms (a few ms of drift across the window).  The strongest cluster may be a step's later
    impact (a bounce as loud as the step): the earliest cluster within ``sound_s`` before it
    that holds at least half its weight is the steps' first impact.
    """
    nb = max(16, min(20000, int(round(P / 0.001))))
    bw = P / nb
    ph = np.mod(t - t[0], P)
    hist = np.bincount(np.minimum((ph / bw).astype(np.int64), nb - 1), weights=w, minlength=nb)
    half = max(1, int(round(0.004 / bw)))
    ext = np.concatenate([hist[-half:], hist, hist[:half]])
    cs = np.concatenate([[0.0], np.cumsum(ext)])
    dens = cs[2 * half + 1:] - cs[: len(cs) - 2 * half - 1]  # circular box sum, one per bin
    top = int(np.argmax(dens))
    reach = int(round(min(sound_s, 0.45 * P) / bw))
    for j in range(reach, 0, -1):  # earliest first
        c = (top - j) % nb
        if dens[c] >= 0.5 * dens[top] and dens[c] >= dens[(c - 1) % nb] and dens[c] >= dens[(c + 1) % nb]:
            return float(t[0] + c * bw)
    return float(t[0] + top * bw)


def _grid_line(chosen: dict) -> tuple[np.ndarray, np.ndarray, float, float, np.ndarray]:
    """Slot numbers, times, the line t = a + b k through them (outliers left out) and which were kept."""
    ks = np.array(sorted(chosen))
    ts = np.array([chosen[k].t_s for k in ks])
    b, a = np.polyfit(ks, ts, 1)
    res = ts - (a + b * ks)
    keep = np.abs(res - np.median(res)) < max(0.005, 4 * np.median(np.abs(res - np.median(res))) + 1e-4)
    if keep.sum() >= 3:
        b, a = np.polyfit(ks[keep], ts[keep], 1)
    return ks, ts, float(a), float(b), keep


def _line_spread(chosen: dict) -> float:
    """Median absolute deviation (s) of the chosen impacts from the line through them."""
    ks = np.array(sorted(chosen), dtype=np.float64)
    ts = np.array([chosen[int(k)].t_s for k in ks])
    b, a = np.polyfit(ks, ts, 1)
    return float(np.median(np.abs(ts - (a + b * ks))))


def nominal_interval(measured_s: float, tolerance: float = 0.005) -> float | None:
    """The quartz step interval within ``tolerance`` (relative) of a measured one, or None."""
    for c in QUARTZ_INTERVALS_S:
        if abs(measured_s / c - 1) <= tolerance:
            return c
    return None


@dataclass
class _Open:
    imp: Impact
    t_s: float  # best time estimate (coarse until templates exist)
    slot: int | None = None
    match: float = float("nan")  # against the template of its slot's polarity
    match_any: float = float("nan")  # against either polarity's template


class StepTracker:
    """Classifies a stream of impacts into steps on a grid (see module docstring)."""

    def __init__(self, samplerate: float, pre: int, config: TrackerConfig | None = None, *,
                 emit_delay_s: float = 0.12):
        self.fs = float(samplerate)
        # the detector hands over an impact this long after its onset (its snippet must be complete)
        self.emit_delay_s = emit_delay_s
        self.pre = pre
        self.cfg = config or TrackerConfig()
        self.templates: dict[int, Template] = {}
        self.acquired = False
        self.failed = False
        self.nominal_s: float | None = None
        self.measured_s: float | None = None
        self.coherence = float("nan")
        self._buffer: list[_Open] = []
        self._open: list[_Open] = []
        self._a = 0.0
        self._b = 1.0
        self._fit = MovingLine(self.cfg.track_steps)  # (step number, time) of well-matched steps
        self._next_slot = 0
        self._last_step_t = -math.inf
        self._gaps: list[tuple[float, float]] = []
        self._next_try_s = -math.inf
        self._peaks = RollingWindow(64)  # levels of recent steps (what a normal step sounds like)
        self._offgrid: deque = deque(maxlen=64)  # (time, peak) of recent rejected sounds (the noise's blips)
        self._pol_res = {0: RollingWindow(32), 1: RollingWindow(32)}  # each polarity's offset from the line
        # how well the sounds on the grid repeat: slots that held any sound, those whose sound
        # matched the step templates well, and the first sound's offset from the prediction
        # per polarity (count, sum, sum of squares; s)
        self.slots_heard = 0
        self.slots_matched = 0
        self._first_offset = {0: [0, 0.0, 0.0], 1: [0, 0.0, 0.0]}

    # -- public -------------------------------------------------------------------------
    def add_gap(self, start_s: float, end_s: float) -> None:
        """Audio between these times was lost (input overflow): slots there are not missed."""
        self._gaps.append((start_s, end_s))
        if len(self._gaps) > 128:  # only recent gaps can still hold undecided slots
            del self._gaps[:-64]

    def add(self, impacts: list[Impact], position_s: float) -> list[Event]:
        """Take new impacts (in time order) and the stream position; return decided events."""
        out: list[Event] = []
        if self.acquired:
            # the frame-level onset is enough to find the slot; the template match times it
            # (all of this call's impacts together: the grid does not move until _decide)
            fresh = [_Open(imp, imp.onset_sample / self.fs) for imp in impacts]
            self._time_many(fresh)
            self._open += fresh
            impacts = []
        late: list[_Open] = []  # impacts after the grid was found in this call
        for imp in impacts:
            t = (imp.snippet_start + onset_of(imp.snippet, self.fs, search_from=max(0, self.pre - int(0.004 * self.fs)),
                                              search_to=self.pre + int(FIRST_IMPACT_PEAK_S * self.fs))) / self.fs
            o = _Open(imp, t)
            if self.acquired:
                late.append(o)
                continue
            # acquisition uses exactly the impacts of the first acquire_s seconds, so the
            # result does not depend on how the audio was cut into blocks
            if self._buffer and t - self._buffer[0].t_s >= self.cfg.acquire_s and len(self._buffer) >= 8 \
                    and not self.failed and t >= self._next_try_s:
                self._next_try_s = t + self.cfg.retry_s
                out += self._acquire(final=False)
                if not self.acquired and t - self._buffer[0].t_s > self.cfg.acquire_max_s:
                    cut = t - self.cfg.acquire_max_s  # keep trying on the most recent audio
                    out += [self._reject(b) for b in self._buffer if b.t_s < cut]
                    self._buffer = [b for b in self._buffer if b.t_s >= cut]
            if self.acquired:
                late.append(o)
            else:
                self._buffer.append(o)
        if late:
            self._time_many(late)
            self._open += late
        if self.acquired:
            out += self._decide(position_s)
        return out

    def finish(self, position_s: float) -> list[Event]:
        """End of stream: decide everything that can be decided."""
        out: list[Event] = []
        if not self.acquired:
            out += self._acquire(final=True)
            if not self.acquired:
                out += [self._reject(o) for o in self._buffer]
                self._buffer = []
                return out
        out += self._decide(position_s, final=True)
        out += [self._classify_leftover(o) for o in self._open]
        self._open = []
        return out

    def predict(self, k: int) -> float:
        return self._a + self._b * k

    # -- acquisition ---------------------------------------------------------------------
    def _acquire(self, final: bool) -> list[Event]:
        buf = self._buffer
        if len(buf) < 3:
            if final:
                self.failed = True
            return []
        t = np.array([o.t_s for o in buf])
        # impacts that stand far above the noise floor count most (the level alone can
        # mislead: a phone's gain control lifts the noise between steps to the steps' level)
        # A sound out of digital silence stands 200 dB over its "floor" (the detector's floor has
        # not yet risen to the room's noise): each impact's floor is taken no lower than the
        # median floor of the window, and the SNR is capped at 60 dB.
        snr = np.array([o.imp.frame_snr_db for o in buf])
        peak = np.array([o.imp.peak_dbfs for o in buf])
        # Behind a noise gate every sound rises out of digital silence: the floor is also taken no
        # lower than 50 dB under the loud end, so that a second clock 12 dB down stands 12 dB less
        # far above it than the movement (both would otherwise pass any cap and weigh the same).
        floor = np.maximum(np.maximum(peak - snr, np.median(peak - snr)), np.percentile(peak, 90) - 50.0)
        snr = np.minimum(peak - floor, 60.0)
        # relative to the loud end (90th percentile: the steps, while they are a tenth of the sounds
        # or more), so the faint noise impacts of a quiet room -- several a second at 8 kHz, four
        # for every step -- weigh little; capped so that no single knock dominates
        w = np.clip(10 ** ((snr - np.percentile(snr, 90)) / 10), 0.02, 2.0)
        found = find_interval(t, w)
        if found is None or found[2] < self.cfg.min_coherence:
            if final:
                self.failed = True
            return []
        P, phase, coh = found
        # A fraction of the true interval lines up too; if only every m-th slot of the grid holds
        # sound (m = 2, 3 or 5; the others (nearly) empty), the interval is m times as long.
        for _ in range(4):
            kk = np.round((t - phase) / P).astype(np.int64)
            near = np.abs(t - (phase + kk * P)) <= 0.3 * P  # wide: the phase may be pulled by a bounce
            grown = False
            for m in (2, 3, 5):
                if t[-1] - t[0] < 2 * m * P:
                    continue
                cw = np.array([float(np.sum(w[near & (kk % m == c)])) for c in range(m)])
                c_best = int(np.argmax(cw))
                if np.all(np.delete(cw, c_best) < 0.2 * cw[c_best]):
                    phase += c_best * P
                    P *= m
                    grown = True
                    break
            if not grown:
                break
        # The coherence peak is broad over a few seconds, and its phase is a weighted mean over
        # everything that repeats with the step (a bounce, a burst, a phone's gain pumping, a second
        # clock at nearly the same rate): the interval can be skewed by tenths of a percent and the
        # phase by tens of ms.  A quartz movement (and the recording's clock) runs within a few
        # hundred ppm of its nominal interval, so near one (2 %, our own margin: gain pumping has skewed the peak
        # by 0.7 %; the line fitted through the steps must still land within the nominal tolerance
        # below) the steps are gathered on the nominal grid at their own phase (see _step_phase).
        nom = nominal_interval(P, 4 * self.cfg.nominal_tolerance)
        if nom is not None:
            P = nom
        tol = min(0.2 * P, 0.06)
        if nom is not None:
            phase = _step_phase(t, w, P, self.cfg.cluster_s if P < 1.5 else self.cfg.burst_cluster_s)
            back = tol
        else:
            # the slot's first sound may lie well before the coherence phase (bursts)
            back = min(0.25 * P, 0.35) if P >= 1.5 else tol
        # one step per slot (see _pick_steps), then again on the line fitted through those steps
        chosen = self._pick_steps(buf, phase, P, back, tol)
        if len(chosen) < 3:
            if final:
                self.failed = True
            return []
        ks, ts, a, b, keep = _grid_line(chosen)
        refined = self._pick_steps(buf, a, b, tol, tol)
        if len(refined) >= 3:
            chosen = refined
            ks, ts, a, b, keep = _grid_line(chosen)
        self.measured_s = float(b)
        self.nominal_s = nominal_interval(b, self.cfg.nominal_tolerance)
        self.coherence = coh
        k0 = int(ks[0])
        self._a = a + b * k0
        self._b = b
        # templates per polarity from the acquired steps (parity of the step number)
        by_pol: dict[int, list[np.ndarray]] = {0: [], 1: []}
        for k in ks[keep] if keep.sum() >= 3 else ks:
            pol = (int(k) - k0) % 2
            if len(by_pol[pol]) < self.cfg.template_steps:
                by_pol[pol].append(chosen[int(k)].imp.wsnippet)
        for pol in (0, 1):
            if len(by_pol[pol]) >= 2:
                self.templates[pol] = learn_template(by_pol[pol], self.fs, pre=self.pre)
        if not self.templates:
            src = by_pol[0] or by_pol[1]
            self.templates[0] = learn_template(src, self.fs, pre=self.pre)
        for pol in (0, 1):
            if pol not in self.templates:
                self.templates[pol] = self.templates[1 - pol]
        if self.templates[1] is not self.templates[0]:
            # Each template's onset came from its own envelope threshold, which noise or a
            # phone's gain control can push around.  Tie B's onset to A's by aligning the
            # two envelopes, so the polarity offset measures the sounds, not the thresholds.
            self.templates[1] = dataclasses.replace(
                self.templates[1], onset_index=self.templates[0].onset_index
                + envelope_lag(self.templates[0].wave, self.templates[1].wave, self.fs))
        self.acquired = True
        self._next_slot = 0
        # fine-time the acquired steps and refit the grid on the fine times
        fine_k, fine_t = [], []
        for k in ks:
            o = chosen[int(k)]
            kk = int(k) - k0
            lag, rho = match(o.imp.wsnippet, self.templates[kk % 2], max_lag=int(0.002 * self.fs))
            if rho >= self.cfg.good_match:
                fine_k.append(kk)
                fine_t.append((o.imp.snippet_start + self.templates[kk % 2].onset_index + lag) / self.fs)
        if len(fine_k) >= 3:
            self._b, self._a = np.polyfit(fine_k, fine_t, 1)
            self._fit.extend(zip(fine_k[-self.cfg.track_steps:], fine_t[-self.cfg.track_steps:]))
        out: list[Event] = []
        self._time_many(buf)
        self._open += buf
        self._buffer = []
        return out

    def _pick_steps(self, buf: list[_Open], phase: float, P: float, back: float, tol: float) -> dict[int, _Open]:
        """The step of each slot ``phase + k P`` among the impacts from ``back`` before it to ``tol`` after.

        A step's sound can hold several impacts (a hand's bounce as loud as the step): the step
        is the earliest impact within 6 dB of the slot's loudest.  But where that earliest one is
        a different sound -- a quieter second clock ticking just before -- the loudest impacts
        form the movement's line: when the loudest and the earliest differ by a delay that is not
        the same from slot to slot (a bounce follows its step at a fixed delay), the chain of
        impacts that lines up better is taken, the loudest on a tie.
        """
        near: dict[int, list[_Open]] = {}
        for o in buf:
            k = int(round((o.t_s - phase + 0.5 * (back - tol)) / P))
            r = o.t_s - (phase + k * P)
            if -back <= r <= tol:
                near.setdefault(k, []).append(o)
        early: dict[int, _Open] = {}
        loud: dict[int, _Open] = {}
        for k, group in near.items():
            top = max(o.imp.frame_snr_db for o in group)
            early[k] = min((o for o in group if o.imp.frame_snr_db >= top - 6.0), key=lambda o: o.t_s)
            loud[k] = max(group, key=lambda o: o.imp.frame_snr_db)
        differ = [k for k in early if early[k] is not loud[k]]
        if len(differ) < 3 or len(early) < 4:
            return early
        delays = np.array([loud[k].t_s - early[k].t_s for k in differ])
        if float(np.std(delays)) < 0.002:
            return early  # the same step's later impact, at a fixed delay (2 ms: our own margin)
        spread_early = _line_spread(early)
        spread_loud = _line_spread(loud)
        return loud if spread_loud <= max(2 * spread_early, spread_early + 0.0005) else early

    # -- tracking ------------------------------------------------------------------------
    def _time_many(self, opens: list[_Open]) -> None:
        """Time impacts against their slots' templates (the slot from the frame-level time)."""
        if not opens:
            return
        slots = [int(round((o.t_s - self._a) / self._b)) for o in opens]
        pols = [k % 2 if k >= 0 else 0 for k in slots]
        lag = np.zeros(len(opens))
        rho = np.zeros(len(opens))
        # where the grid is well known, near-tied correlation lobes are settled by the predicted
        # time of the slot (with this polarity's offset): a ring cycle must not slip
        prefer = np.full(len(opens), np.nan)
        if len(self._fit) >= 8:
            for i, (o, k) in enumerate(zip(opens, slots)):
                pr = self.predict(k) + self._pol_offset(k)
                prefer[i] = pr * self.fs - o.imp.snippet_start - self.templates[pols[i]].onset_index
        for pol in set(pols):
            idx = [i for i, q in enumerate(pols) if q == pol]
            lag[idx], rho[idx] = match_many([opens[i].imp.wsnippet for i in idx], self.templates[pol],
                                            max_lag=int(0.003 * self.fs), prefer=prefer[idx])
        for i, o in enumerate(opens):
            k = slots[i]
            tmpl = self.templates[pols[i]]
            lag_i, rho_i = float(lag[i]), float(rho[i])
            expect = int(round(self.predict(k) * self.fs - o.imp.snippet_start - tmpl.onset_index))
            if abs(expect) <= 0.010 * self.fs and (rho_i < 0.95 or abs(lag_i - expect) > 0.0003 * self.fs):
                # The frame-level onset can be several ms early (a faint sound just before the step
                # started the frame) and the search around it then finds only a side lobe: search
                # around the slot's predicted time as well and keep the better match.
                lag2, rho2 = match(o.imp.wsnippet, tmpl, max_lag=int(0.002 * self.fs), center=expect)
                if rho2 > rho_i + 0.05:
                    lag_i, rho_i = lag2, rho2
            o.t_s = (o.imp.snippet_start + tmpl.onset_index + lag_i) / self.fs
            o.match = rho_i
            o.slot = k
            o.match_any = rho_i  # raised against the other polarity only when the sound is not a step (_event)

    def _window_after(self) -> float:
        # long intervals (end-of-life bursts every 2-4 s) gather up to 0.35 s of sound per slot
        cluster = self.cfg.cluster_s if self._b < 1.5 else self.cfg.burst_cluster_s
        return max(self.cfg.slot_tolerance_s, min(cluster, 0.6 * self._b))

    def _decide(self, position_s: float, final: bool = False) -> list[Event]:
        out: list[Event] = []
        # impacts are emitted ~post_s after their onset; allow for that delay
        horizon = position_s - self.emit_delay_s if not final else position_s
        while True:
            k = self._next_slot
            pred = self.predict(k)
            end = pred + self._window_after()
            if end > horizon:
                if not final or pred + self.cfg.slot_tolerance_s > position_s:
                    break
            out += self._decide_slot(k, pred)
            self._next_slot += 1
        return out

    def _decide_slot(self, k: int, pred: float) -> list[Event]:
        cfg = self.cfg
        tol = min(cfg.slot_tolerance_s, 0.2 * self._b)
        out: list[Event] = []
        in_slot = [o for o in self._open if abs(o.t_s - pred) <= tol]
        cands = [o for o in in_slot if o.match >= cfg.min_match]
        step = None
        if cands:
            best = max(o.match for o in cands)
            good = [o for o in cands if o.match >= best - 0.1]
            # two impacts timed within 2 ms of each other are one sound (the snippet of a faint
            # sound just before a step holds the step too): keep the louder impact
            good = [o for o in good if not any(abs(p.t_s - o.t_s) < 0.002 and (p.imp.peak_dbfs, p.match) >
                                               (o.imp.peak_dbfs, o.match) for p in good)]
            step = min(good, key=lambda o: o.t_s)
        # A failed step: the rotor only twitches (a weak sound at the slot); some circuits
        # then send a stronger correction pulse 10-80 ms later.  A hand's bounce on every
        # step is not this: it follows a step that sounded normal.
        failed = correction = None
        typical = self._peaks.median() if len(self._peaks) >= 8 else None
        # a twitching rotor sounds on the grid (the drive pulse is on time): within twitch_s
        # (our reasoning from how the circuit drives the motor; no published tolerance)
        twitch_s = cfg.twitch_s
        weak = step is not None and typical is not None and step.imp.peak_dbfs < typical - cfg.weak_db
        if step is not None and step.t_s - pred > cfg.correction_min_s:
            early = [o for o in in_slot if o.t_s < step.t_s - 0.005 and abs(o.t_s - pred) <= twitch_s]
            if early:
                failed, correction, step = min(early, key=lambda o: o.t_s), step, None
            elif weak:
                step = None  # a faint sound off the grid (a quiet room's noise): no step here
        elif weak:
            if abs(step.t_s - pred) <= twitch_s:
                failed, step = step, None
            else:
                step = None
        if step is None and typical is not None:
            if failed is None:
                near = [o for o in in_slot if abs(o.t_s - pred) <= twitch_s]
                if near:
                    failed = min(near, key=lambda o: o.t_s)
            if failed is not None and correction is None:
                cors = [o for o in self._open if failed.t_s + cfg.correction_min_s <= o.t_s <= failed.t_s + cfg.correction_max_s
                        and o.match >= cfg.good_match and o.imp.peak_dbfs > failed.imp.peak_dbfs + 3]
                if cors:
                    correction = min(cors, key=lambda o: o.t_s)
            if failed is not None and correction is None and not self._stands_out(failed, pred):
                failed = None  # as loud as the noise's own blips around it: no evidence of a twitch
        if in_slot:
            self.slots_heard += 1
            if any(o is not None and o.match >= cfg.good_match for o in (step, correction)):
                self.slots_matched += 1
            d = min(o.t_s for o in in_slot) - pred
            fo = self._first_offset[k % 2]
            fo[0] += 1
            fo[1] += d
            fo[2] += d * d
        after = self._window_after()
        anchor = step or correction or failed
        rest = []
        for o in self._open:
            if o is step or o is failed or o is correction:
                continue
            if anchor is not None and anchor.t_s - 0.002 < o.t_s <= anchor.t_s + after:
                out.append(self._event(o, "secondary", k))
            elif o.t_s <= pred + after:
                if self._last_step_t < o.t_s <= self._last_step_t + after:
                    out.append(self._event(o, "secondary", k - 1))
                else:
                    out.append(self._reject(o))
                    self._offgrid.append((o.t_s, o.imp.peak_dbfs))
            else:
                rest.append(o)
        self._open = rest
        if failed is not None:
            out.insert(0, Event("failed", failed.t_s, step=k, polarity="AB"[k % 2], peak_dbfs=failed.imp.peak_dbfs,
                                snr_db=failed.imp.frame_snr_db, match=failed.match, flags=("failed",)))
            if correction is not None:
                out.insert(1, Event("correction", correction.t_s, step=k, polarity="AB"[k % 2],
                                    peak_dbfs=correction.imp.peak_dbfs, snr_db=correction.imp.frame_snr_db,
                                    match=correction.match, flags=("correction",)))
                self._last_step_t = correction.t_s
        elif step is not None:
            out.insert(0, self._step_event(step, k, out))
            self._last_step_t = step.t_s
            self._peaks.append(step.imp.peak_dbfs)
            if step.match >= cfg.good_match:
                if len(self._fit) >= 3:
                    self._pol_res[k % 2].append(step.t_s - self.predict(k))
                self._fit.append(k, step.t_s)
                if len(self._fit) >= 3:
                    b, t_k = self._fit.fit()
                    self._b = b
                    self._a = t_k - b * k
        elif not self._in_gap(pred):
            out.insert(0, Event("missed", pred, step=k, polarity="AB"[k % 2]))
        return out

    def onset_scatter_s(self) -> float | None:
        """The spread (standard deviation, s) of the first sound in each slot about the grid,
        each polarity's mean offset removed (a tick-tock is not scatter)."""
        n = ss = 0.0
        for cnt, s1, s2 in self._first_offset.values():
            if cnt:
                n += cnt
                ss += max(s2 - s1 * s1 / cnt, 0.0)
        if n < 4:
            return None
        return math.sqrt(ss / (n - 2))

    def _pol_offset(self, k: int) -> float:
        """How far the steps of slot k's polarity have sounded from the tracking line lately (s)."""
        res = self._pol_res[k % 2]
        return res.median() if len(res) >= 4 else 0.0

    def _stands_out(self, o: _Open, pred: float) -> bool:
        """Whether a weak sound at a slot stands above the off-grid sounds of the second around it.

        Where a phone's gain control lifts the noise while the movement is silent, the noise
        itself starts an impact every few tens of ms; a twitch must be clearly louder than
        those heard in the second before it (6 dB over their median: our own margin, set from the
        sweep of simulated phone recordings) to count as a failed step.
        (Not those after it: the silence after a failed step lets the gain rise, whatever the
        twitch was.)  With fewer than three such sounds before it (a quiet room, or a gain that
        had not yet risen) any weak sound on the slot counts.
        """
        lo, hi = pred - 1.0, pred - self.cfg.slot_tolerance_s
        levels = [p for t, p in self._offgrid if lo <= t < hi]  # rejected already
        levels += [q.imp.peak_dbfs for q in self._open if lo <= q.t_s < hi]  # to be rejected with this slot
        if len(levels) < 3:
            return True
        return o.imp.peak_dbfs >= statistics.median(levels) + 6.0

    def _in_gap(self, t: float) -> bool:
        return any(a - 0.03 <= t <= b + 0.03 for a, b in self._gaps)

    def _step_event(self, o: _Open, k: int, siblings: list[Event]) -> Event:
        imp = o.imp
        flags = []
        if imp.clipped:
            flags.append("clipped")
        if o.match < self.cfg.good_match:
            flags.append("low-match")
        if imp.truncated:
            flags.append("truncated")
        # ring-down: from the onset to the next impact of the same sound (or the snippet's end)
        i0 = int(round(o.t_s * self.fs)) - imp.snippet_start
        nxt = [e.time_s for e in siblings if e.kind == "secondary" and e.time_s > o.t_s]
        i1 = len(imp.snippet)
        if nxt:
            i1 = min(i1, int(round(min(nxt) * self.fs)) - imp.snippet_start - int(0.001 * self.fs))
        pre_seg = imp.snippet[int(0.001 * self.fs): max(int(0.001 * self.fs) + 1, i0 - int(0.001 * self.fs))]
        noise = float(np.dot(pre_seg, pre_seg)) / len(pre_seg) if len(pre_seg) > 8 else 0.0
        # the end of the window, too: under a phone's gain control the noise before a step
        # is amplified more than the noise during it
        tail = imp.snippet[max(i0, i1 - int(0.012 * self.fs)): i1]
        if len(tail) > 8 and i1 - i0 > int(0.05 * self.fs):
            tail_power = float(np.dot(tail, tail)) / len(tail)
            noise = min(noise, tail_power) if noise > 0 else tail_power
        rd = measure_ringdown(imp.snippet[max(i0, 0): max(i1, i0 + 1)], self.fs, noise_power=noise)
        if rd.fit_range_db > 0 and rd.fit_rms_db > BENT_DECAY * rd.fit_range_db:
            flags.append("bent-decay")
        return Event("step", o.t_s, step=k, polarity="AB"[k % 2], peak_dbfs=imp.peak_dbfs,
                     snr_db=imp.frame_snr_db, match=o.match, decay_ms=rd.decay_ms, flags=tuple(flags))

    def _event(self, o: _Open, kind: str, k: int | None) -> Event:
        if kind == "secondary" and o.slot is not None:
            # a later sound of a slot may be a step of the other polarity (end-of-life bursts)
            other = self.templates[1 - (o.slot % 2 if o.slot >= 0 else 0)]
            if other is not self.templates[o.slot % 2 if o.slot >= 0 else 0]:
                o.match_any = max(o.match, match(o.imp.wsnippet, other, max_lag=int(0.003 * self.fs))[1])
        return Event(kind, o.t_s, step=k, peak_dbfs=o.imp.peak_dbfs, snr_db=o.imp.frame_snr_db,
                     match=o.match_any, flags=(kind,) if kind != "step" else ())

    def _reject(self, o: _Open) -> Event:
        return self._event(o, "rejected", None)

    def _classify_leftover(self, o: _Open) -> Event:
        if self._last_step_t < o.t_s <= self._last_step_t + self._window_after():
            return self._event(o, "secondary", self._next_slot - 1)
        return self._reject(o)
