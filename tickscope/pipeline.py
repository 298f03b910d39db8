"""The one pipeline shared by file analysis, live listening and logging.

``Analyzer`` takes :class:`~tickscope.model.Block` objects of any size from any source,
runs the impact detector and the step tracker, keeps compact per-step arrays, and
builds a :class:`~tickscope.model.Summary` on demand (a snapshot while running, the
final summary at the end).  It performs no I/O.
"""
from __future__ import annotations

import dataclasses
import math

import numpy as np

from . import advice
from .core.detect import ESCAPEMENT_PRE_S, DetectorConfig, ImpactDetector
from .core.diagnose import diagnose
from .core.faults import polarity_asymmetry
from .core.grid import StepTracker
from .core.trackconfig import TrackerConfig
from .core.quality import mains_hum
from .core.rate import fit_rate, level_shifts, residuals_s, stretch_weights
from .core.coherentdecay import CoherentDecay
from .core.ringdown import AbnormalJudge, ringdown_stats
from .core.escapement import check_escapement_options, escapement_figures, lift_resolved, nominal_beats
from .core.soundkind import classify_sound
from .errors import ParameterError
from .model import FLAG_BITS, BeatStats, Block, Event, RateEstimate, StepArrays, Summary, flag_bits, samples_as_float32

HUM_ANALYSIS_S = 8.0  # the first seconds of audio are searched for mains hum
LOUD_REJECT_DB = 10.0  # off-grid sounds this far above the floor are counted as rejected events


class _Column:
    """A growable numpy column (amortised doubling), so step history stays compact."""

    def __init__(self, dtype):
        self._a = np.zeros(256, dtype=dtype)
        self.n = 0

    def append(self, v) -> None:
        if self.n == len(self._a):
            self._a = np.concatenate([self._a, np.zeros_like(self._a)])
        self._a[self.n] = v
        self.n += 1

    @property
    def values(self) -> np.ndarray:
        return self._a[: self.n]

    def keep_last(self, n: int) -> None:
        """Forget all but the last n values (bounded history for long logs)."""
        if self.n > n:
            self._a[:n] = self._a[self.n - n: self.n]
            self.n = n


#: The analyzer's record: groups of aligned columns (attribute, StepArrays field or None, dtype).
_COLUMNS = (
    (("step_k", "k", np.int64), ("step_t", "t_s", np.float64), ("step_pol", "pol", np.int8),
     ("step_match", "match", np.float32), ("step_decay", "decay_ms", np.float32), ("step_snr", "snr_db", np.float32),
     ("step_peak", "peak_dbfs", np.float32), ("step_flags", "flags", np.int16), ("step_lift", "lift_ms", np.float32)),
    (("missed_t", "missed_t_s", np.float64), ("missed_k", "missed_k", np.int64)),
    (("failed_k", "failed_k", np.int64), ("failed_t", "failed_t_s", np.float64)),
    (("correction_k", "correction_k", np.int64),),
    (("rejected_snr", None, np.float32),),
    (("other_t", "other_t_s", np.float64), ("other_peak", "other_peak_dbfs", np.float32)),  # every sound not a step
)


def wants_escapement_window(summary: "Summary", analyzer: "Analyzer") -> bool:
    """Whether a recording analysed with a quartz step's short window should be heard again with an
    escapement's (detect.ESCAPEMENT_PRE_S): its beats are an escapement's, or it steps at 1/2, 1/4
    or 1/8 s, where only a lift heard tells a watch's beat from a fast quartz motor.  The second
    pass is kept when it hears an escapement."""
    if analyzer.lifts_heard or analyzer.movement == "quartz":
        return False
    return summary.sound == "escapement" or (summary.sound == "stepping" and summary.step_interval_s is not None
                                             and summary.step_interval_s < 0.9)


def analyze_samples(x, samplerate: float, **options) -> "Summary":
    """A whole recording held in memory (one channel, float samples), analysed as ``analyze``
    analyses a file: once with a quartz step's window and, where that hears an escapement (see
    :func:`wants_escapement_window`), again with an escapement's.  ``options``: the Analyzer's."""
    x = np.asarray(x, dtype=np.float32)

    def once(**more):
        an = Analyzer(samplerate, **options, **more)
        for j in range(0, len(x), 65536):
            an.feed(Block(x[j:j + 65536], j))
        return an, an.finish()

    an, s = once()
    if wants_escapement_window(s, an) and "detector" not in options:
        _, s2 = once(detector=DetectorConfig(pre_s=ESCAPEMENT_PRE_S))
        if s2.sound == "escapement":
            return s2
    return s


class Analyzer:
    """Streaming analysis of one channel of audio.

    Parameters
    ----------
    samplerate : float
        Nominal sample rate of the device or file, Hz.
    channel : int
        Which channel of the source this is (reported only).
    clock_ppm : float or None
        The device's sample clock runs fast by this many ppm (None: uncalibrated).
    clock_ppm_u95 : float
        95 % half-width of ``clock_ppm``.
    history_steps : int or None
        Keep only about this many recent steps (and other events) in memory: a long log
        stores its steps in the database and its summary covers the recent past.  None
        keeps everything (a file, a listening session).
    lossy : bool
        The audio went through a lossy codec: abrupt shifts of the step times are looked for,
        and the rate is fitted within the stretches between them (see ``rate.level_shifts``).
    prior : Grid or None
        Track this step grid from the start (found by an earlier pass over the same audio:
        ``analyzer.tracker.grid()``) instead of searching the first seconds for one.
    movement : str
        ``auto`` (the sound decides whether it is a stepping motor or an escapement), ``quartz`` or
        ``escapement`` (the user knows).
    beats_per_hour : float or None
        An escapement's nominal beat rate (None: the series value nearest the beat heard).
    lift_angle_deg : float or None
        A lever escapement's lift angle (None: the default, said in every report).
    """

    def __init__(self, samplerate: float, *, channel: int = 0, clock_ppm: float | None = None,
                 clock_ppm_u95: float = 0.0, detector: DetectorConfig | None = None,
                 tracker: TrackerConfig | None = None, history_steps: int | None = None,
                 lossy: bool = False, prior=None, movement: str = "auto", beats_per_hour: float | None = None,
                 lift_angle_deg: float | None = None):
        if not samplerate or samplerate <= 0:
            raise ParameterError(f"samplerate={samplerate!r}: expected > 0")
        check_escapement_options(movement, beats_per_hour, lift_angle_deg)
        self.movement = movement
        self.beats_per_hour = beats_per_hour
        self.lift_angle_deg = lift_angle_deg
        self.samplerate = float(samplerate)
        self.channel = channel
        self.clock_ppm = clock_ppm
        self.clock_ppm_u95 = clock_ppm_u95
        self.lossy = lossy
        self.shifts: tuple[int, float] | None = None  # (count, largest us) found by the last rate()
        detector = detector or DetectorConfig()
        if movement == "escapement" and detector.pre_s < ESCAPEMENT_PRE_S:
            detector = dataclasses.replace(detector, pre_s=ESCAPEMENT_PRE_S)
        # an escapement's lift times need the unlocking in every snippet (detect.ESCAPEMENT_PRE_S)
        self.lifts_heard = detector.pre_s >= ESCAPEMENT_PRE_S
        self.detector = ImpactDetector(samplerate, detector)
        self.tracker = StepTracker(samplerate, self.detector.pre, tracker,
                                   emit_delay_s=(self.detector.post + 2 * self.detector.hop) / samplerate,
                                   lifts=self.lifts_heard)
        self._pos = 0  # samples fed so far (including zeros fed for gaps)
        self.sounds_heard = 0  # impacts the detector has handed over
        # the record: one growable column per figure (see _COLUMNS), trimmed group by group
        for group in _COLUMNS:
            for attr, _, dtype in group:
                setattr(self, attr, _Column(dtype))
        self.n_secondary = 0
        self.n_clipped = 0
        self.gaps: list[tuple[float, float]] = []
        self._ringdown = AbnormalJudge()
        # each polarity's coherent average: the tracker hands it every step it measures
        self._coherent = CoherentDecay(samplerate)
        self.tracker.ringdown_collector = self._coherent
        self.regrid_times_s: list[float] = []  # where the grid was found again (the sounds before: not steps)
        self.prior_used = prior is not None
        if prior is not None:
            self.tracker.start_from(prior)
        self._hum_buf: list[np.ndarray] = []
        self._hum_n = 0
        self._finished = False
        self._final_events: list[Event] = []
        self.trailing_silence_slots = 0
        if history_steps is not None and history_steps < 64:
            raise ParameterError(f"history_steps={history_steps}: expected >= 64")
        self.history_steps = history_steps

    # -- feeding ---------------------------------------------------------------------------
    def feed(self, block: Block) -> list[Event]:
        """Process one block; returns the events decided by it."""
        if self._finished:
            raise ParameterError("Analyzer.feed after finish()")
        if block.scale is None:
            x = np.asarray(block.samples, dtype=np.float32).reshape(-1)
        else:  # integers as read: the detector converts only what it needs
            x = np.asarray(block.samples).reshape(-1)
        out: list[Event] = []
        if block.gap_before > 0:
            g0 = self._pos / self.samplerate
            self.gaps.append((g0, g0 + block.gap_before / self.samplerate))
            self.tracker.add_gap(*self.gaps[-1])
            impacts = self.detector.skip(block.gap_before)
            self.sounds_heard += len(impacts)
            self._pos = self.detector.position
            out += self._record(self.tracker.add(impacts, self._pos / self.samplerate))
            x = x[self._pos - block.start_sample:] if self._pos > block.start_sample else x
        if self._hum_n < HUM_ANALYSIS_S * self.samplerate:
            self._hum_buf.append(x.copy() if block.scale is None else samples_as_float32(x, block.scale))
            self._hum_n += len(x)
            if self._hum_n >= HUM_ANALYSIS_S * self.samplerate:  # the ring-down removes it from every later step
                self._coherent.hum_hz = self._hum()[0]
        out += self._run(x, block.scale)
        return out

    def _run(self, x: np.ndarray, scale: float | None = None) -> list[Event]:
        impacts = self.detector.process(x, scale)
        self.sounds_heard += len(impacts)
        self._pos += len(x)
        return self._record(self.tracker.add(impacts, self.detector.position / self.samplerate))

    def finish(self) -> Summary:
        """End of the stream: decide the last slots and return the final summary."""
        if not self._finished:
            impacts = self.detector.flush()
            self.sounds_heard += len(impacts)
            pos_s = self._pos / self.samplerate
            self._final_events = self._record(self.tracker.add(impacts, pos_s))
            self._final_events += self._record(self.tracker.finish(pos_s))
            self._finished = True
            # slots after the last step heard are not missed steps: the sound stopped (the
            # recording outlasted the ticking, or the microphone was moved away)
            if self.step_t.n and self.missed_t.n:
                last = self.step_t.values[-1]
                keep = int(np.count_nonzero(self.missed_t.values <= last))
                self.trailing_silence_slots = self.missed_t.n - keep
                self.missed_t.n = keep
                self.missed_k.n = keep
                self._final_events = [e for e in self._final_events if not (e.kind == "missed" and e.time_s > last)]
        return self.summary()

    @property
    def finished(self) -> bool:
        """:meth:`finish` has been called: the stream is over."""
        return self._finished

    def drain_final_events(self) -> list[Event]:
        """The events decided by :meth:`finish` (once)."""
        out, self._final_events = self._final_events, []
        return out

    def _record(self, events: list[Event]) -> list[Event]:
        out = []
        for ev in events:
            if ev.kind == "step":
                pol = 0 if ev.polarity == "A" else 1
                flags = ev.flags
                d = ev.decay_ms
                abnormal = self._ringdown.judge(pol, d, bent="bent-decay" in flags)
                if abnormal:
                    flags = flags + ("ringdown",)
                    ev = dataclasses.replace(ev, flags=flags)
                self._coherent.commit(ev.time_s, use=not (abnormal or {"clipped", "low-match", "truncated"} & set(flags)))
                self.step_k.append(ev.step)
                self.step_t.append(ev.time_s)
                self.step_pol.append(pol)
                self.step_match.append(ev.match)
                self.step_decay.append(d)
                self.step_snr.append(ev.snr_db)
                self.step_peak.append(ev.peak_dbfs)
                self.step_flags.append(flag_bits(flags))
                self.step_lift.append(ev.lift_ms)
                if "clipped" in flags:
                    self.n_clipped += 1
            elif ev.kind == "missed":
                self.missed_t.append(ev.time_s)
                self.missed_k.append(ev.step)
            elif ev.kind == "failed":
                self.failed_k.append(ev.step)
                self.failed_t.append(ev.time_s)
            elif ev.kind == "correction":
                self.correction_k.append(ev.step)
            elif ev.kind == "rejected":
                self.rejected_snr.append(ev.snr_db)
                self.other_t.append(ev.time_s)
                self.other_peak.append(ev.peak_dbfs)
            elif ev.kind == "secondary":
                self.n_secondary += 1
                self.other_t.append(ev.time_s)
                self.other_peak.append(ev.peak_dbfs)
            elif ev.kind == "regrid":
                self._forget_grid(ev.time_s)
            out.append(ev)
        self._coherent.drop_pending()
        if self.history_steps is not None:
            self._trim(self.history_steps)
        return out

    def _forget_grid(self, t_s: float) -> None:
        """The grid was found again: what was followed before were not this movement's steps (another
        clock that stopped, one the microphone left).  Its steps become other sounds; its missed,
        failed and corrected slots are forgotten."""
        self.regrid_times_s.append(t_s)
        t = np.concatenate([self.other_t.values, self.step_t.values])
        pk = np.concatenate([self.other_peak.values, self.step_peak.values])
        order = np.argsort(t, kind="stable")
        for group in _COLUMNS:
            for attr, _, _ in group:
                getattr(self, attr).n = 0
        for v, p in zip(t[order], pk[order]):
            self.other_t.append(v)
            self.other_peak.append(p)
        self.n_clipped = 0
        self.trailing_silence_slots = 0
        self._ringdown = AbnormalJudge()
        self._coherent.reset()

    def _trim(self, n: int) -> None:
        for group in _COLUMNS:  # the columns of a group stay aligned row by row
            cols = [getattr(self, attr) for attr, _, _ in group]
            if cols[0].n > 2 * n:
                for c in cols:
                    c.keep_last(n)
        if len(self.gaps) > 2 * 64:
            del self.gaps[:-64]

    def decided_until_s(self) -> float:
        """Every step slot before this time (s) has been decided (a log resumes from here)."""
        tr = self.tracker
        if tr.acquired:
            return max(0.0, tr.predict(tr._next_slot) - 0.5 * tr._b)
        return max(0.0, self.duration_s - tr.cfg.acquire_max_s - 5.0)

    # -- results ---------------------------------------------------------------------------
    @property
    def duration_s(self) -> float:
        return self._pos / self.samplerate

    def rate(self) -> RateEstimate | None:
        """The rate fit over the steps so far (None when it cannot be fitted yet)."""
        nominal = self.tracker.nominal_s or self.tracker.measured_s
        good = self._good_steps()
        if nominal is None or good.sum() < 3:
            return None
        k = self.step_k.values[good]
        if k.max() - k.min() < 2:
            return None
        t = self.step_t.values[good]
        groups = level_shifts(k, t) if self.lossy else None
        self.shifts = None
        weights = None
        if groups is not None:
            weights = stretch_weights(k, t, groups)
        r = fit_rate(k, t, nominal, clock_ppm=self.clock_ppm or 0.0,
                     clock_ppm_u95=self.clock_ppm_u95, groups=groups, weights=weights)
        if groups is not None:
            # the size of each shift: the change of intercept from one stretch of a polarity to its
            # next (the fitted interval does not depend on the clock correction)
            off = t - r.interval_s * k
            sizes = []
            for g in range(1, int(groups.max()) + 1):
                a, b = groups == g - 1, groups == g
                if set(k[a] % 2) == set(k[b] % 2):  # consecutive labels of one series (a polarity, or both)
                    sizes.append(abs(float(np.median(off[b]) - np.median(off[a]))))
            self.shifts = (len(sizes), max(sizes) * 1e6) if sizes else None
        return r

    def loud_db(self, recent: int | None = None) -> float:
        """Off-grid sounds this far over the floor matter: within 10 dB of the typical step
        (the median of all steps, or of the last ``recent``), and at least 10 dB."""
        if not self.step_snr.n:
            return LOUD_REJECT_DB
        snr = self.step_snr.values if recent is None else self.step_snr.values[-recent:]
        return max(LOUD_REJECT_DB, float(np.median(snr)) - 10.0)

    @property
    def n_rejected(self) -> int:
        """Off-grid sounds loud enough to matter (see :meth:`loud_db`)."""
        snr = self.rejected_snr.values
        if not len(snr):
            return 0
        return int(np.count_nonzero(snr >= self.loud_db()))

    def _good_steps(self) -> np.ndarray:
        """Steps that time the grid: matched well (clipped steps stay in: their template was learned
        from clipped steps too), and the first of each end-of-life burst (the rate is burst to burst)."""
        return ((self.step_match.values >= self.tracker.cfg.good_match)
                & ((self.step_flags.values & FLAG_BITS["in-burst"]) == 0))

    def arrays(self) -> StepArrays:
        """The record so far as read-only views (valid until the next feed)."""
        v = {name: col.values for name, col in self._columns().items()}
        for arr in v.values():
            arr.flags.writeable = False
        return StepArrays(**v)

    def _columns(self) -> dict[str, _Column]:
        return {name: getattr(self, attr) for group in _COLUMNS for attr, name, _ in group if name}

    def summary(self) -> Summary:
        """A snapshot of everything found so far."""
        tr = self.tracker
        rec = self.arrays()
        n_steps = len(rec.k)
        rate = self.rate()
        snr = float(np.median(rec.snr_db)) if n_steps else float("nan")
        alternation = self._alternation_us()
        verdict = classify_sound(grid_found=not tr.failed, nominal_s=tr.nominal_s, steps=n_steps,
                                 jitter_us=None if rate is None else rate.jitter_us, alternation_us=alternation,
                                 slots_heard=tr.slots_heard, slots_matched=tr.slots_matched, step_snr_db=snr,
                                 interval_s=tr.measured_s, lift_resolved=self.lifts_heard and lift_resolved(
                                     tr.sounds, tr.measured_s, self.samplerate),
                                 movement=self.movement)
        stepping = verdict.kind == "stepping"
        esc = self._escapement() if verdict.kind == "escapement" else None
        diag = None
        if stepping and rate is not None and tr.nominal_s is not None:
            diag = diagnose(rec, self._good_steps(), rate, tr.nominal_s, bursts=tr.bursts,
                            reference_u_s=tr.reference_u_s(),
                            clock_ppm=self.clock_ppm or 0.0, clock_ppm_u95=self.clock_ppm_u95)
        scatter = tr.onset_scatter_s() if verdict.kind in ("escapement", "not-ticking") else None
        res_us = res_t = None
        good = self._good_steps()
        if good.sum() >= 3:
            res_t = rec.t_s[good]
            res_us = residuals_s(rec.k[good], res_t) * 1e6
        hum_hz, hum_db = self._hum()
        s = Summary(
            duration_s=self.duration_s,
            samplerate=self.samplerate,
            channel=self.channel,
            step_interval_s=tr.nominal_s if stepping else None,
            measured_interval_s=tr.measured_s,
            sound=verdict.kind,
            steps_detected=n_steps,
            # only a stepping motor misses steps: a beat grid of another sound claims none
            missed_steps=len(rec.missed_t_s) if stepping else 0,
            missed_step_times_s=[float(v) for v in rec.missed_t_s] if stepping else [],
            rejected_events=self.n_rejected,
            secondary_impacts=self.n_secondary,
            rate=(diag.rate if diag is not None else rate) if stepping else (esc.rate if esc is not None else None),
            ringdown=ringdown_stats(rec.pol, rec.decay_ms, (rec.flags & FLAG_BITS["ringdown"]) != 0,
                                    (rec.flags & FLAG_BITS["bent-decay"]) != 0, coherent=self._coherent),
            step_snr_db=snr,
            clipped_steps=self.n_clipped,
            hum_hz=hum_hz,
            hum_db=hum_db,
            dc_offset=float(self.detector.sum_x / max(self.detector.samples_seen, 1)),
            peak_dbfs=20 * math.log10(max(self.detector.max_abs, 1e-12)),
            residuals_us=res_us,
            residual_times_s=res_t,
            diagnosis=diag,
            reading=advice.reading(diag) if diag is not None else (
                advice.escapement_reading(esc) if esc is not None else ()),
            beats=None if verdict.kind not in ("escapement", "not-ticking") else BeatStats(
                tr.slots_heard, tr.slots_matched, None if scatter is None else round(scatter * 1000, 3),
                None if alternation is None else round(alternation / 1000, 3)),
            sound_reason=advice.sound_reason(verdict.kind, verdict.cause, duration_s=self.duration_s,
                                             beat_interval_s=tr.measured_s, alternation_us=alternation,
                                             slots_heard=tr.slots_heard, slots_matched=tr.slots_matched,
                                             scatter_s=scatter),
            alternation_us=alternation,
            coherence=tr.coherence,
            sounds_heard=self.sounds_heard,
            regrid_times_s=tuple(self.regrid_times_s),
            second_pass=self.prior_used,
            escapement=esc,
        )
        return dataclasses.replace(s, warnings=advice.notes(
            s, calibrated=self.clock_ppm is not None, codec_shifts=self.shifts,
            trailing_silence_slots=self.trailing_silence_slots, gaps=self.gaps))

    def _escapement(self):
        """The escapement figures of the beats so far (None before a grid is measured)."""
        tr = self.tracker
        if tr.measured_s is None:
            return None
        good = self._good_steps()
        beat_s = tr.measured_s
        if good.sum() >= 3:
            b = np.polyfit(self.step_k.values[good], self.step_t.values[good], 1)[0]
            beat_s = float(b) if b > 0 else beat_s
        nominal = nominal_beats(beat_s, self.beats_per_hour)
        rate = None
        # (a beat off every usual value by over 1 %, 864 s/day, is measured against the nearest, and
        # every report says so)
        if good.sum() >= 3 and np.ptp(self.step_k.values[good]) >= 2:
            rate = fit_rate(self.step_k.values[good], self.step_t.values[good], nominal.beat_s,
                            clock_ppm=self.clock_ppm or 0.0, clock_ppm_u95=self.clock_ppm_u95)
        return escapement_figures(self.arrays(), good, rate=rate, nominal=nominal, sounds=tr.sounds,
                                  samplerate=self.samplerate, reference_u_s=tr.reference_u_s(),
                                  lift_angle_deg=self.lift_angle_deg, trailing_slots=self.trailing_silence_slots,
                                  end_s=self.duration_s, beat_s=None if rate is not None else beat_s,
                                  lifts_heard=self.lifts_heard)

    def _alternation_us(self) -> float | None:
        """Mean A->B interval minus mean B->A interval (us), over all steps (an escapement's tick-tock)."""
        if self.step_k.n < 6:
            return None
        first = (self.step_flags.values & FLAG_BITS["in-burst"]) == 0  # a burst's later steps share its number
        pa = polarity_asymmetry(self.step_k.values[first], self.step_t.values[first], min_pairs=4, min_group=2)
        return None if pa is None else pa[0]

    def _hum(self) -> tuple[float | None, float | None]:
        if not self._hum_buf:
            return None, None
        x = np.concatenate(self._hum_buf)[: int(HUM_ANALYSIS_S * self.samplerate)]
        return mains_hum(x, self.samplerate)


