"""The step grid: which impacts are motor steps, which are missing, which are something else.

A stepping motor steps on a regular grid: step k sounds at ``a + b*k``.  The tracker

1. *acquires* the grid from the first seconds of impacts (:mod:`.acquire`: the step interval,
   the nominal interval quartz movements use, the steps' phase, a template per polarity);
2. *tracks*: every impact is timed against its slot's template; a slot is decided once
   the stream has passed it: the best-matching impact near the prediction is the
   step, later impacts of the same sound are secondary, everything else is rejected;
   a slot with no matching sound is a missed step (unless the audio had a gap there).
"""
from __future__ import annotations

import math
from collections import deque

import numpy as np

from ..model import Bursts, Event
from .acquire import Grid, OpenImpact, find_grid
from .detect import Impact
from .dsp import MovingLine, RollingWindow
from .beatsounds import BeatSounds, beat_sounds, sound_offsets
from .ringdown import step_ringdown
from .slotsounds import slot_sounds, stands_out
from .slottiming import time_on_slots
from .steptemplate import Template
from .timing import FIRST_IMPACT_PEAK_S, match, onset_of
from .trackconfig import TrackerConfig


class StepTracker:
    """Classifies a stream of impacts into steps on a grid (see module docstring)."""

    def __init__(self, samplerate: float, pre: int, config: TrackerConfig | None = None, *,
                 emit_delay_s: float = 0.12, lifts: bool = True):
        self.samplerate = float(samplerate)
        # whether to time each beat's lift (its snippets hold an escapement's unlocking: see
        # detect.ESCAPEMENT_PRE_S); without, every step's lift_s stays nan
        self.lifts = lifts
        # the detector hands over an impact this long after its onset (its snippet must be complete)
        self.emit_delay_s = emit_delay_s
        self.pre = pre
        self.cfg = config or TrackerConfig()
        self.templates: dict[int, Template] = {}
        self.sounds: dict[int, BeatSounds] = {}  # where each side's beat sounds lie in its template
        self.bursts: Bursts | None = None  # end-of-life stepping heard at acquisition
        self.acquired = False
        self.failed = False
        self.nominal_s: float | None = None
        self.measured_s: float | None = None
        self.coherence = float("nan")
        self._buffer: list[OpenImpact] = []
        self._open: list[OpenImpact] = []
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
        self.split_sides = False  # an escapement far out of beat: slots looked for at each side's offset
        # how well the sounds on the grid repeat: slots that held any sound, those whose sound
        # matched the step templates well, and the first sound's offset from the prediction
        # per polarity (count, sum, sum of squares; s)
        self.slots_heard = 0
        self.slots_matched = 0
        self._first_offset = {0: [0, 0.0, 0.0], 1: [0, 0.0, 0.0]}
        # for looking again: the outcome of recent slots (1: a sound in the slot) and the recent
        # steps and sounds that were not steps, with their snippets (bounded)
        self._outcomes: deque = deque(maxlen=max(8, int(math.ceil(self.cfg.regrid_window_s / 0.0625))))
        self._recent: deque = deque(maxlen=600)
        self._next_regrid_s = -math.inf
        self.regrids: list[tuple[float, float, float]] = []  # (time, old interval, new interval)

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
            fresh = [OpenImpact(imp, imp.onset_sample / self.samplerate) for imp in impacts]
            self._time_many(fresh)
            self._open += fresh
            impacts = []
        late: list[OpenImpact] = []  # impacts after the grid was found in this call
        for imp in impacts:
            t = (imp.snippet_start + onset_of(imp.snippet, self.samplerate, search_from=max(0, self.pre - int(0.004 * self.samplerate)),
                                              search_to=self.pre + int(FIRST_IMPACT_PEAK_S * self.samplerate))) / self.samplerate
            o = OpenImpact(imp, t)
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
        g = find_grid(self._buffer, self.cfg, self.samplerate, self.pre)
        if g is None:
            if final:
                self.failed = True
            return []
        self.measured_s, self.nominal_s, self.coherence = g.measured_s, g.nominal_s, g.coherence
        self._a, self._b = g.a, g.b
        self.templates = g.templates
        self._find_sounds()
        self.bursts = g.bursts
        self._seed_sides(g.side_offsets_s)
        if len(g.fine_k) >= 3:
            self._fit.extend(zip(g.fine_k[-self.cfg.track_steps:], g.fine_t_s[-self.cfg.track_steps:]))
        self.acquired = True
        self._next_slot = 0
        self._time_many(self._buffer)
        self._open += self._buffer
        self._buffer = []
        return []

    # -- tracking ------------------------------------------------------------------------
    def _time_many(self, opens: list[OpenImpact]) -> None:
        """Time impacts against their slots' templates (the slot from the frame-level time; see
        slottiming.time_on_slots)."""
        time_on_slots(opens, a=self._a, b=self._b, templates=self.templates, samplerate=self.samplerate,
                      tracked=len(self._fit) >= 8, pol_offset=self._pol_offset, lift_s=self._lift_s)

    def _lift_s(self, rows: np.ndarray, lags, pol: int):
        """An escapement's beats of several sounds: from each row's first sound to its drop (s), each
        sound timed against its own part of the template (nan where the side's beat is one sound)."""
        snd = self.sounds.get(pol)
        lags = np.atleast_1d(np.asarray(lags, dtype=np.float64))
        if not self.lifts or snd is None or snd.last_part is None:
            return np.full(len(lags), np.nan) if len(lags) > 1 else float("nan")
        d_first, d_last = sound_offsets(rows, lags, snd, self.samplerate)
        out = (snd.lift_samples + d_last - d_first) / self.samplerate
        return out if len(lags) > 1 else float(out[0])

    def _find_sounds(self) -> None:
        """Where each side's beat sounds lie in its template (an escapement's unlocking and drop)."""
        beat_s = self.measured_s or self._b
        self.sounds = {p: beat_sounds(t, self.samplerate, beat_s) for p, t in self.templates.items()}

    def _window_after(self) -> float:
        # long intervals (end-of-life bursts every 2-4 s) gather up to 0.35 s of sound per slot
        cluster = self.cfg.cluster_s if self._b < 1.5 else self.cfg.burst_cluster_s
        return max(self.cfg.slot_tolerance_s, min(cluster, 0.6 * self._b))

    def start_from(self, prior: "Grid") -> None:
        """Track ``prior`` (a grid found earlier in this stream: its line in absolute times) from the
        start, without searching (a second pass over a file, once the movement's grid is known)."""
        self.measured_s, self.nominal_s, self.coherence = prior.measured_s, prior.nominal_s, prior.coherence
        k0 = int(math.ceil((0.0 - prior.a) / prior.b))  # the first slot of the stream is number 0
        self._a, self._b = prior.a + prior.b * k0, prior.b
        swap = k0 % 2 == 1  # the polarities keep their sounds
        self.templates = {p: prior.templates[(p + 1) % 2 if swap else p] for p in (0, 1)}
        self._find_sounds()
        self.bursts = prior.bursts
        so = prior.side_offsets_s
        self._seed_sides((so[1], so[0]) if swap else so)
        self.acquired = True
        self._next_slot = 0

    def grid(self) -> "Grid | None":
        """The grid tracked now (line in absolute times), for :meth:`start_from`."""
        if not self.acquired:
            return None
        sides = (self._pol_offset(0), self._pol_offset(1)) if self.split_sides else (0.0, 0.0)
        return Grid(self.measured_s, self.nominal_s, self.coherence, self._a, self._b, dict(self.templates), [], [],
                    self.bursts, side_offsets_s=sides)

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
            if not final:
                out += self._maybe_regrid(pred)
        return out

    def _decide_slot(self, k: int, pred: float) -> list[Event]:
        """Slot k (predicted at ``pred``): its step, or its failed step and correction, or a missed
        step; every other impact up to the slot's end is a later impact of a step or rejected."""
        tol = min(self.cfg.slot_tolerance_s, 0.2 * self._b)
        centre = pred + self._pol_offset(k) if self.split_sides else pred  # a side far off the line
        in_slot = [o for o in self._open if abs(o.t_s - centre) <= tol]
        step, failed, correction = self._slot_sounds(in_slot, centre)
        if in_slot:
            self._note_heard(k, pred, in_slot, step, correction)
        later = self._burst_steps(step) if step is not None and self.bursts is not None else []
        out = self._sort_rest(k, pred, step or correction or failed, (step, failed, correction, *later))
        # a slot counts as heard when any sound lay in it: steps that vanish leave silent slots (a
        # sound that does not repeat well, a rattle, still fills them and keeps its grid)
        self._outcomes.append(1 if in_slot else 0)
        if failed is not None:
            out.insert(0, Event("failed", failed.t_s, step=k, polarity="AB"[k % 2], peak_dbfs=failed.imp.peak_dbfs,
                                snr_db=failed.imp.frame_snr_db, match=failed.match, flags=("failed",)))
            if correction is not None:
                out.insert(1, Event("correction", correction.t_s, step=k, polarity="AB"[k % 2],
                                    peak_dbfs=correction.imp.peak_dbfs, snr_db=correction.imp.frame_snr_db,
                                    match=correction.match, flags=("correction",)))
                self._last_step_t = correction.t_s
        elif step is not None:
            self._recent.append(step)
            for i, o in reversed(list(enumerate(later, start=1))):
                if o is not None:
                    out.insert(0, self._step_event(o, k, out, burst_index=i))
                else:  # a burst's step not heard: a missed step at its place in the burst
                    out.insert(0, Event("missed", step.t_s + self.bursts.offsets_ms[i - 1] * 1e-3, step=k,
                                        polarity=self._polarity(k, i), flags=("in-burst",)))
            out.insert(0, self._step_event(step, k, out))
            self._last_step_t = step.t_s
            self._peaks.append(step.imp.peak_dbfs)
            if step.match >= self.cfg.good_match:
                self._follow(k, step.t_s)
        elif not self._in_gap(pred):
            # where this polarity's step would have sounded (the line runs between the two polarities)
            out.insert(0, Event("missed", pred + self._pol_offset(k), step=k, polarity=self._polarity(k)))
        return out

    def _burst_steps(self, step: OpenImpact) -> list[OpenImpact | None]:
        """The later steps of the burst that ``step`` begins: at each of the burst's offsets (within
        8 ms), the best-matching sound, if it matches a step's sound at all."""
        out = []
        for off_ms in self.bursts.offsets_ms:
            t = step.t_s + off_ms * 1e-3
            near = [o for o in self._open if o is not step and abs(o.t_s - t) <= 0.008 and o.match >= self.cfg.min_match]
            out.append(max(near, key=lambda o: o.match) if near else None)
        return out

    def _slot_sounds(self, in_slot: list[OpenImpact], pred: float):
        """(step, failed, correction) among the impacts of a slot (each may be None; see
        core/slotsounds.py)."""
        typical = self._peaks.median() if len(self._peaks) >= 8 else None
        return slot_sounds(in_slot, pred, self._open, self.cfg, typical, self._stands_out)

    def _maybe_regrid(self, now_s: float) -> list[Event]:
        """After the slot at ``now_s``: look for the grid again when its steps have (mostly) vanished
        while other sounds go on, and switch to a quartz grid found among the sounds decided in the
        last seconds (a ``regrid`` event marks the switch).  Decided slot by slot, so the result does
        not depend on how the audio was cut into blocks."""
        cfg = self.cfg
        w = max(8, int(math.ceil(cfg.regrid_window_s / self._b)))
        recent = list(self._outcomes)[-w:]
        if len(recent) < w or now_s < self._next_regrid_s or np.mean(recent) > cfg.regrid_matched_share:
            return []
        self._next_regrid_s = now_s + cfg.retry_s
        horizon = now_s
        # the sounds of the last acquire_s (as the first search): the clock followed may still be in
        # an older stretch, and would be found again
        ring = sorted((o for o in self._recent if o.t_s >= horizon - cfg.acquire_s), key=lambda o: o.t_s)
        if len(ring) < 8:
            return []
        fresh = [OpenImpact(o.imp, o.imp.snippet_start / self.samplerate
                            + onset_of(o.imp.snippet, self.samplerate, search_from=max(0, self.pre - int(0.004 * self.samplerate)),
                                       search_to=self.pre + int(FIRST_IMPACT_PEAK_S * self.samplerate)) / self.samplerate)
                 for o in ring]
        g = find_grid(fresh, cfg, self.samplerate, self.pre)
        if g is None or g.nominal_s is None:
            return []
        span_slots = (fresh[-1].t_s - fresh[0].t_s) / g.b
        same = abs(g.b / self._b - 1) < 0.002 and abs(((g.a - self._a) / self._b + 0.5) % 1.0 - 0.5) * self._b < 0.02
        if same or len(g.fine_k) < cfg.regrid_coverage * span_slots:
            return []
        # continue on the new grid from the first of its slots not yet decided
        k_next = int(math.ceil((horizon - g.a) / g.b))
        shift = self._next_slot - k_next  # the new grid's slot k_next is the tracker's next slot
        old_b = self._b
        self._a, self._b = g.a - g.b * shift, g.b
        self.measured_s, self.nominal_s, self.coherence = g.measured_s, g.nominal_s, g.coherence
        self.templates = {p: g.templates[(p + shift) % 2] for p in (0, 1)}  # polarity by the tracker's numbers
        self._find_sounds()
        self.bursts = g.bursts
        self._fit = MovingLine(cfg.track_steps)
        self._fit.extend(((k + shift, t) for k, t in zip(g.fine_k, g.fine_t_s) if k >= k_next - cfg.track_steps))
        self._pol_res = {0: RollingWindow(32), 1: RollingWindow(32)}
        so = g.side_offsets_s
        self._seed_sides((so[1], so[0]) if shift % 2 else so)
        self._peaks = RollingWindow(64)
        self._outcomes.clear()
        self._recent.clear()
        self._time_many(self._open)
        self.regrids.append((horizon, old_b, g.b))
        return [Event("regrid", horizon, step=self._next_slot, flags=("regrid",))]

    def _note_heard(self, k: int, pred: float, in_slot: list[OpenImpact], step, correction) -> None:
        """How well the sounds on the grid repeat (see ``slots_heard``, ``onset_scatter_s``)."""
        self.slots_heard += 1
        if any(o is not None and o.match >= self.cfg.good_match for o in (step, correction)):
            self.slots_matched += 1
        d = min(o.t_s for o in in_slot) - pred
        fo = self._first_offset[k % 2]
        fo[0] += 1
        fo[1] += d
        fo[2] += d * d

    def _sort_rest(self, k: int, pred: float, anchor, decided) -> list[Event]:
        """The slot's other impacts: later impacts of its sound (or of the last step), or rejected;
        impacts past the slot's end stay open."""
        after = self._window_after()
        out, rest = [], []
        for o in self._open:
            if any(o is d for d in decided):
                continue
            if anchor is not None and anchor.t_s - 0.002 < o.t_s <= anchor.t_s + after:
                out.append(self._event(o, "secondary", k))
            elif o.t_s <= pred + after:
                if self._last_step_t < o.t_s <= self._last_step_t + after:
                    out.append(self._event(o, "secondary", k - 1))
                else:
                    out.append(self._reject(o))
                    self._offgrid.append((o.t_s, o.imp.peak_dbfs))
                    self._recent.append(o)
            else:
                rest.append(o)
        self._open = rest
        return out

    def _follow(self, k: int, t_s: float) -> None:
        """A well-matched step moves the tracking line (and its polarity's offset from it)."""
        if len(self._fit) >= 3:
            self._pol_res[k % 2].append(t_s - self.predict(k))
        self._fit.append(k, t_s)
        if len(self._fit) >= 3:
            b, t_k = self._fit.fit()
            self._b = b
            self._a = t_k - b * k

    def reference_u_s(self) -> float:
        """How well the two polarities' templates share one time reference (s): the largest change
        of their arrivals' difference when the arrival is found at another level of the first peak
        (0 when both polarities use one template)."""
        a, b = self.templates.get(0), self.templates.get(1)
        if a is None or b is None or a is b or len(a.arrival_checks) != len(b.arrival_checks):
            return 0.0
        d0 = b.onset_index - a.onset_index
        dev = [abs((cb - ca) - d0) for ca, cb in zip(a.arrival_checks, b.arrival_checks)]
        # and a twentieth of a sample each: the crossings are interpolated between samples of the
        # envelope (at 8 kHz 6 us; our own allowance: simulated references erred by up to 4 us there)
        return (max(dev, default=0.0) + 0.05) / self.samplerate

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

    def _seed_sides(self, offsets_s: tuple[float, float]) -> None:
        """An escapement far out of beat: each side's beats sound this far from the line (s); the
        slots are looked for there (its polarity offsets, seeded until its own steps take over)."""
        self.split_sides = any(abs(v) > 0.0 for v in offsets_s)
        if self.split_sides:
            for p in (0, 1):
                self._pol_res[p] = RollingWindow(32)
                for _ in range(4):
                    self._pol_res[p].append(float(offsets_s[p]))

    def _pol_offset(self, k: int) -> float:
        """How far the steps of slot k's polarity have sounded from the tracking line lately (s)."""
        res = self._pol_res[k % 2]
        return res.median() if len(res) >= 4 else 0.0

    def _stands_out(self, o: OpenImpact, pred: float) -> bool:
        """Whether a weak sound at a slot stands above the off-grid sounds of the seconds before it
        (see slotsounds.stands_out)."""
        return stands_out(o, pred, self._offgrid, self._open, self.cfg.slot_tolerance_s)

    def _in_gap(self, t: float) -> bool:
        return any(a - 0.03 <= t <= b + 0.03 for a, b in self._gaps)

    def _step_event(self, o: OpenImpact, k: int, siblings: list[Event], *, burst_index: int = 0) -> Event:
        imp = o.imp
        flags = ["in-burst"] if burst_index else []
        if imp.clipped:
            flags.append("clipped")
        if o.match < self.cfg.good_match:
            flags.append("low-match")
        if imp.truncated:
            flags.append("truncated")
        # ring-down (core/ringdown.py): its window ends at a burst's next step; the analyzer's
        # collector, when it gave one, takes the step for its polarity's coherent average
        pol = self._polarity(k, burst_index)
        nxt = [e.time_s for e in siblings if e.kind == "step" and e.time_s > o.t_s]
        rd = step_ringdown(imp, o.t_s, self.samplerate, pre=self.pre, polarity=pol,
                           collector=getattr(self, "ringdown_collector", None), next_step_s=min(nxt) if nxt else None)
        if rd.bent:
            flags.append("bent-decay")
        return Event("step", o.t_s, step=k, polarity=pol, peak_dbfs=imp.peak_dbfs,
                     snr_db=imp.frame_snr_db, match=o.match, decay_ms=rd.decay_ms, flags=tuple(flags),
                     lift_ms=o.lift_s * 1e3)

    def _polarity(self, k: int, burst_index: int = 0) -> str:
        """The coil polarity of slot k's step (or of the burst_index-th step of its burst): the
        polarity alternates step by step, and a burst of n holds n steps."""
        n = self.bursts.steps_per_burst if self.bursts is not None else 1
        return "AB"[(k * n + burst_index) % 2]

    def _event(self, o: OpenImpact, kind: str, k: int | None) -> Event:
        if kind == "secondary" and o.slot is not None:
            # a later sound of a slot may be a step of the other polarity (end-of-life bursts)
            other = self.templates[1 - (o.slot % 2 if o.slot >= 0 else 0)]
            if other is not self.templates[o.slot % 2 if o.slot >= 0 else 0]:
                o.match_any = max(o.match, match(o.imp.wsnippet, other, max_lag=int(0.003 * self.samplerate))[1])
        return Event(kind, o.t_s, step=k, peak_dbfs=o.imp.peak_dbfs, snr_db=o.imp.frame_snr_db,
                     match=o.match_any, flags=(kind,) if kind != "step" else ())

    def _reject(self, o: OpenImpact) -> Event:
        return self._event(o, "rejected", None)

    def _classify_leftover(self, o: OpenImpact) -> Event:
        if self._last_step_t < o.t_s <= self._last_step_t + self._window_after():
            return self._event(o, "secondary", self._next_slot - 1)
        return self._reject(o)
