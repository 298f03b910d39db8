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

from .core.detect import DetectorConfig, ImpactDetector
from .core.grid import StepTracker, TrackerConfig
from .core import diagnose as dg
from .core import dsp
from .core.dsp import RollingWindow
from .core.rate import fit_rate, level_shifts, residuals_s, stretch_weights
from .errors import ParameterError
from .model import FLAG_BITS, Block, Event, RateEstimate, RingDownStats, Summary, flag_bits, samples_as_float32
from .units import SECONDS_PER_DAY, ppm_to_s_per_day

#: Typical error of an uncalibrated consumer audio clock (common practice; sound-card
#: oscillators are often quoted at +-100 ppm, shared/domain.md section 4.1).
TYPICAL_DEVICE_PPM = 50.0
HUM_ANALYSIS_S = 8.0
ASYMMETRY_FLOOR_US = 300.0
SHORT_FOR_PATTERN_S = 8.0  # below this, finding no step pattern is put down to the length first
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
    """

    def __init__(self, samplerate: float, *, channel: int = 0, clock_ppm: float | None = None,
                 clock_ppm_u95: float = 0.0, detector: DetectorConfig | None = None,
                 tracker: TrackerConfig | None = None, history_steps: int | None = None,
                 lossy: bool = False):
        if not samplerate or samplerate <= 0:
            raise ParameterError(f"samplerate={samplerate!r}: expected > 0")
        self.samplerate = float(samplerate)
        self.channel = channel
        self.clock_ppm = clock_ppm
        self.clock_ppm_u95 = clock_ppm_u95
        self.lossy = lossy
        self.shifts: tuple[int, float] | None = None  # (count, largest us) found by the last rate()
        self.detector = ImpactDetector(samplerate, detector)
        self.tracker = StepTracker(samplerate, self.detector.pre, tracker,
                                   emit_delay_s=(self.detector.post + 2 * self.detector.hop) / samplerate)
        self._pos = 0  # samples fed so far (including zeros fed for gaps)
        self.step_k = _Column(np.int64)
        self.step_t = _Column(np.float64)
        self.step_pol = _Column(np.int8)
        self.step_match = _Column(np.float32)
        self.step_decay = _Column(np.float32)
        self.step_snr = _Column(np.float32)
        self.step_peak = _Column(np.float32)
        self.step_flags = _Column(np.int16)
        self.missed_t = _Column(np.float64)
        self.missed_k = _Column(np.int64)
        self.failed_k = _Column(np.int64)
        self.failed_t = _Column(np.float64)
        self.correction_k = _Column(np.int64)
        self.sec_k = _Column(np.int64)  # step-like later sounds within a slot (bursts)
        self.sec_delay = _Column(np.float64)
        self.rejected_snr = _Column(np.float32)
        self.other_t = _Column(np.float64)  # sounds that are not steps (later impacts and rejected ones)
        self.other_peak = _Column(np.float32)
        self.n_secondary = 0
        self.n_clipped = 0
        self.gaps: list[tuple[float, float]] = []
        self._decays = {0: RollingWindow(200), 1: RollingWindow(200)}
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
            self._pos = self.detector.position
            out += self._record(self.tracker.add(impacts, self._pos / self.samplerate))
            x = x[self._pos - block.start_sample:] if self._pos > block.start_sample else x
        if self._hum_n < HUM_ANALYSIS_S * self.samplerate:
            self._hum_buf.append(x.copy() if block.scale is None else samples_as_float32(x, block.scale))
            self._hum_n += len(x)
        out += self._run(x, block.scale)
        return out

    def _run(self, x: np.ndarray, scale: float | None = None) -> list[Event]:
        impacts = self.detector.process(x, scale)
        self._pos += len(x)
        return self._record(self.tracker.add(impacts, self.detector.position / self.samplerate))

    def finish(self) -> Summary:
        """End of the stream: decide the last slots and return the final summary."""
        if not self._finished:
            impacts = self.detector.flush()
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
                dq = self._decays[pol]  # log decay times of this polarity's recent steps
                if math.isfinite(d) and d > 0:
                    ld = math.log(d)
                    if len(dq) >= 20 and "bent-decay" not in flags:
                        med = dq.median()
                        mad = 1.4826 * dq.median_abs_deviation(med)
                        if abs(ld - med) > max(5 * mad, math.log(1.5)):
                            flags = flags + ("ringdown",)
                    dq.append(ld)
                if flags != ev.flags:
                    ev = dataclasses.replace(ev, flags=flags)
                self.step_k.append(ev.step)
                self.step_t.append(ev.time_s)
                self.step_pol.append(pol)
                self.step_match.append(ev.match)
                self.step_decay.append(d)
                self.step_snr.append(ev.snr_db)
                self.step_peak.append(ev.peak_dbfs)
                self.step_flags.append(flag_bits(flags))
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
                if ev.match >= self.tracker.cfg.good_match and self.step_k.n and self.step_k.values[-1] == ev.step:
                    self.sec_k.append(ev.step)
                    self.sec_delay.append(ev.time_s - self.step_t.values[-1])
            out.append(ev)
        if self.history_steps is not None:
            self._trim(self.history_steps)
        return out

    def _trim(self, n: int) -> None:
        if self.step_k.n > 2 * n:
            for c in (self.step_k, self.step_t, self.step_pol, self.step_match, self.step_decay, self.step_snr,
                      self.step_peak, self.step_flags):
                c.keep_last(n)
        for pair in ((self.missed_t, self.missed_k), (self.failed_k, self.failed_t), (self.correction_k,),
                     (self.sec_k, self.sec_delay), (self.rejected_snr,), (self.other_t, self.other_peak)):
            if pair[0].n > 2 * n:
                for c in pair:
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
        # clipped steps stay in: their template was learned from clipped steps too
        return self.step_match.values >= self.tracker.cfg.good_match

    def summary(self) -> Summary:
        """A snapshot of everything found so far."""
        fs = self.samplerate
        tr = self.tracker
        n_steps = self.step_k.n
        warnings: list[str] = []
        rate = self.rate()
        if tr.failed or n_steps == 0:
            pattern = "none"
        elif tr.nominal_s is None:
            pattern = "not-stepping"
        else:
            pattern = "stepping"
        # An escapement's tick-tock: unequal alternate intervals, or large scatter.  The A/B offset
        # measured on a stepper carries the two templates' onset difference, which for ringing,
        # varying sounds has reached 1.5 ms (a sweep of simulated phones and rooms), so at long
        # intervals the tick-tock must exceed 0.5 % of the interval (5 ms at 1 s; our own margin)
        asym_us = self._alternation_us()
        tick_tock_us = max(1000.0, 0.005 * (tr.nominal_s or 0.0) * 1e6)
        if pattern == "stepping" and rate is not None and (
                (asym_us is not None and abs(asym_us) > tick_tock_us) or rate.jitter_us > 2000.0):
            pattern = "not-stepping"
        # Sounds that do not repeat: loud beats on the grid, but most unlike the ones the templates
        # were learned from (a real recording of a wall clock whose every beat is a different
        # cluster of impacts, scattered by ~8 ms): a stepping motor's steps, heard this clearly,
        # match their template; a failing motor's corrections match too.  (Half, and 20 dB: our own margins.)
        snr = float(np.median(self.step_snr.values)) if n_steps else float("nan")
        unlike = (pattern == "stepping" and tr.slots_heard >= 8 and tr.slots_matched < 0.5 * tr.slots_heard
                  and snr >= 20.0)
        if unlike:
            pattern = "not-stepping"
        if pattern != "stepping":
            rate_out = None
        else:
            rate_out = rate
        diag = self._diagnose(rate_out) if pattern == "stepping" else {}
        if diag.get("rate") is not None:
            rate_out = diag["rate"]
        res_us = res_t = None
        good = self._good_steps()
        if good.sum() >= 3:
            res_t = self.step_t.values[good]
            res_us = residuals_s(self.step_k.values[good], res_t) * 1e6
        ring = {}
        for pol, name in ((0, "A"), (1, "B")):
            sel = (self.step_pol.values == pol) & np.isfinite(self.step_decay.values)
            d = self.step_decay.values[sel].astype(np.float64)
            ab = int(np.count_nonzero((self.step_flags.values[sel] & FLAG_BITS["ringdown"]) != 0))
            bent = int(np.count_nonzero((self.step_flags.values[sel] & FLAG_BITS["bent-decay"]) != 0))
            if len(d):
                q1, med, q3 = np.percentile(d, [25, 50, 75])
                ring[name] = RingDownStats(name, len(d), float(med), float(q3 - q1), ab, bent)
        hum_hz, hum_db = self._hum()
        dc = self.detector.sum_x / max(self.detector.samples_seen, 1)
        peak = 20 * math.log10(max(self.detector.max_abs, 1e-12))
        # --- plain-words warnings -----------------------------------------------------------
        reason: dict = {}  # why the sound is not taken for steps, in the words of its warning
        if pattern == "none":
            if self.duration_s < SHORT_FOR_PATTERN_S:
                why = (f"the recording is only {self.duration_s:.1f} s long, too short to find a stepping pattern "
                       "(it takes several steps in a row): record at least 30 s")
            else:
                why = ("no stepping-motor pattern was heard: move the microphone onto the case or closer "
                       "to the movement, quiet the room, and record at least 30 s")
            warnings.append(why)
            reason["sound_reason"] = why
        beats = {}
        if pattern == "not-stepping":
            iv = tr.measured_s
            spread = tr.onset_scatter_s()
            if unlike:
                how = (f"; only {tr.slots_matched} of {tr.slots_heard} beats sound like the first ones"
                       + ("" if spread is None else f", and they scatter by {spread * 1000:.1f} ms (SD) about the grid"))
            else:
                how = "" if asym_us is None else f", alternate beats differ by {asym_us / 1000:.2f} ms"
            warnings.append(f"the sound is not a quartz stepping-motor pattern (beat interval heard {iv:.4f} s{how}): "
                            "no rate is claimed for it")
            reason["sound_reason"] = warnings[-1]
            beats = {"beats": {"heard": tr.slots_heard, "like_first": tr.slots_matched,
                               "scatter_ms": None if spread is None else round(spread * 1000, 3),
                               "alternation_ms": None if asym_us is None else round(asym_us / 1000, 3)}}
        for v in ring.values():
            # a decay that bends on many steps and varies widely from step to step: the room, not the motor
            if v.n >= 8 and v.n_bent > v.n / 3 and v.decay_ms_iqr > 0.5 * v.decay_ms_median:
                warnings.append(f"the ring-down of polarity {v.polarity} bends away from one exponential on {v.n_bent} of "
                                f"{v.n} steps and varies widely (median {v.decay_ms_median:.1f} ms, IQR "
                                f"{v.decay_ms_iqr:.1f} ms): the room's reverberation or noise shapes it as much as the "
                                "movement does, so these decay times describe the recording more than the motor; for "
                                "ring-down figures put the microphone on the case in a quiet room")
        if self.clock_ppm is None and rate_out is not None:
            warnings.append(f"the rate is on the audio device's own, uncalibrated time base; such clocks are "
                            f"commonly off by tens of ppm (+-{TYPICAL_DEVICE_PPM:.0f} ppm = "
                            f"+-{ppm_to_s_per_day(TYPICAL_DEVICE_PPM):.1f} s/day): calibrate and pass --clock-ppm")
        if rate_out is not None and self.shifts is not None and not diag.get("json", {}).get("inhibition"):
            warnings.append(f"the lossy codec shifted the step times abruptly {self.shifts[0]} time"
                            f"{'s' if self.shifts[0] > 1 else ''} (by up to {self.shifts[1]:.0f} us): the rate is "
                            "fitted within the stretches between shifts; a lossless recording (WAV, FLAC) avoids this")
        if rate_out is not None and (rate_out.span_s < 20 or rate_out.n_steps < 10):
            warnings.append(f"the recording is short ({rate_out.span_s:.0f} s of steps): record at least a minute "
                            "for a useful rate, ten for a precise one")
        if n_steps and snr < 12:
            warnings.append(f"steps are weak (median {snr:.0f} dB above the noise): put the microphone on the case "
                            "or closer to the movement and quiet the room")
        if n_steps and self.n_clipped > 0.05 * n_steps:
            warnings.append(f"{self.n_clipped} steps clip the input: lower the input gain or move the microphone back")
        if hum_hz:
            warnings.append(f"mains hum at {hum_hz:.0f} Hz ({hum_db:+.0f} dB over the noise floor) was heard and ignored; "
                            "keep the microphone cable away from mains leads")
        if self.n_rejected > max(5, 0.1 * max(n_steps, 1)):
            warnings.append(f"{self.n_rejected} sounds off the step grid (knocks, voices, another clock) were ignored")
        if abs(dc) > 0.05:
            warnings.append(f"the recording has a DC offset of {dc:+.3f} full scale (removed before analysis)")
        warnings[:0] = diag.get("first_warnings", [])  # notes that put the rate itself in doubt
        warnings += diag.get("warnings", [])
        if self.trailing_silence_slots:
            warnings.append(f"the steps stopped {self.trailing_silence_slots} slots before the end "
                            "(not counted as missed)")
        if self.gaps:
            warnings.append(f"{len(self.gaps)} gaps in the audio ({sum(b - a for a, b in self.gaps):.2f} s lost); "
                            "steps there are not counted as missed")
        return Summary(
            duration_s=self.duration_s,
            sample_rate_hz=fs,
            channel=self.channel,
            step_interval_s=tr.nominal_s if pattern == "stepping" else None,
            measured_interval_s=tr.measured_s,
            sound=pattern,
            steps_detected=n_steps,
            # only a stepping motor misses steps: a beat grid of another sound claims none
            missed_steps=self.missed_t.n if pattern == "stepping" else 0,
            missed_step_times_s=[float(v) for v in self.missed_t.values] if pattern == "stepping" else [],
            rejected_events=self.n_rejected,
            secondary_impacts=self.n_secondary,
            rate=rate_out,
            ringdown=ring,
            step_snr_db=snr,
            clipped_steps=self.n_clipped,
            hum_hz=hum_hz,
            hum_db=hum_db,
            dc_offset=float(dc),
            peak_dbfs=peak,
            warnings=warnings,
            residuals_us=res_us,
            residual_times_s=res_t,
            extras={"alternation_us": asym_us, "coherence": tr.coherence, **diag.get("json", {}),
                    "diagnosis": diag.get("lines", []), **beats, **reason},
        )

    def _diagnose(self, rate: RateEstimate | None) -> dict:
        """Quartz diagnostics (see core/diagnose.py): rate over whole inhibition periods and the reading."""
        tr = self.tracker
        nominal = tr.nominal_s
        good = self._good_steps()
        k, t = self.step_k.values[good], self.step_t.values[good]
        out: dict = {"json": {}, "lines": [], "warnings": [], "first_warnings": []}
        js, lines = out["json"], out["lines"]
        if rate is None or nominal is None:
            return out
        cp, cu = self.clock_ppm or 0.0, self.clock_ppm_u95
        b = dg.detect_bursts(self.step_k.values, self.sec_k.values, self.sec_delay.values, nominal)
        inh = None if b else dg.detect_inhibition(k, t, nominal, clock_ppm=cp, clock_ppm_u95=cu)
        provisional = False
        if inh is not None and math.isfinite(inh.regulated_rate_s_per_day):
            out["rate"] = dataclasses.replace(rate, rate_s_per_day=inh.regulated_rate_s_per_day,
                                              ci95_s_per_day=inh.regulated_ci95_s_per_day)
            js["inhibition"] = {
                "period_s": _r(inh.period_s, 3), "correction_us": _r(inh.correction_us, 2),
                "correction_ci95_us": _r(inh.correction_ci95_us, 2), "pulses_32768": _r(inh.pulses_32768, 2),
                "pulses_8192": _r(inh.pulses_8192, 2), "crystal_rate_s_per_day": _r(inh.crystal_rate_s_per_day, 4),
                "regulated_rate_s_per_day": _r(inh.regulated_rate_s_per_day, 5), "periods_observed": inh.periods_observed}
            lines.append(f"logic regulation: every {inh.period_s:g} s one step comes {inh.correction_us:.1f} µs late "
                         f"(≈ {inh.pulses_32768:.1f} pulses of 32768 Hz); the crystal alone "
                         f"{'gains' if inh.crystal_rate_s_per_day >= 0 else 'loses'} {abs(inh.crystal_rate_s_per_day):.2f} s/day, "
                         f"regulated {inh.regulated_rate_s_per_day:+.3f} s/day over {inh.periods_observed} whole periods")
            if inh.periods_observed < 2:
                provisional = True
        else:
            js["inhibition"] = None
            if rate.span_s < 2 * dg.LONGEST_KNOWN_PERIOD_S:
                # an unseen correction could still come: widen the interval by its largest usual size
                provisional = True
                sys_ = SECONDS_PER_DAY * dg.UNSEEN_CORRECTION_S / max(rate.span_s, 1.0)
                out["rate"] = dataclasses.replace(rate, ci95_s_per_day=math.hypot(rate.ci95_s_per_day, sys_))
        js["rate_provisional"] = provisional
        js["rate_ci95_statistical_s_per_day"] = _r(rate.ci95_s_per_day, 6)
        if provisional:
            need = max(0.0, 2 * dg.LONGEST_KNOWN_PERIOD_S - rate.span_s)
            out["warnings"].append(f"the rate is provisional: logic-regulated movements correct once every 60 or 120 s, "
                                   f"so record {need:.0f} s more (4 minutes in all) to see whole correction periods")
        # stepping pattern
        js["pattern"] = "burst" if b else "regular"
        js["burst_period_s"] = b.burst_period_s if b else None
        js["steps_per_burst"] = b.steps_per_burst if b else None
        if b:
            js["steps_in_bursts"] = int(self.step_k.n + self.sec_k.n)
        if b:
            out["warnings"].append(f"end-of-life stepping: {b.steps_per_burst} steps every {b.burst_period_s:g} s — "
                                   "replace the cell (keep button cells away from children)")
            lines.append(f"the cell is at end of life: the circuit steps in bursts of {b.steps_per_burst} every "
                         f"{b.burst_period_s:g} s ({b.spacing_ms:.0f} ms apart); the rate above is burst to burst")
        # another clock in the room
        oc = dg.other_clock(self.other_t.values, self.other_peak.values, self.step_k.values, self.step_t.values,
                            self.step_peak.values)
        if oc is not None:
            other_rate = SECONDS_PER_DAY * (nominal * (1.0 + cp * 1e-6) / oc.interval_s - 1)
            js["other_clock"] = {"rate_s_per_day": _r(other_rate, 3), "level_db": _r(oc.level_db, 1),
                                 "ticks": oc.ticks, "drift_ms_per_min": _r(oc.drift_ms_per_min, 2)}
            if oc.level_db >= -6.0:  # as loud as the steps: the rate itself is in doubt, this note first
                out["first_warnings"].append(
                    f"another clock ticks in the recording nearly as loud as the steps ({oc.level_db:+.1f} dB): it runs at "
                    f"{other_rate:+.1f} s/day on the same time base and drifts {oc.drift_ms_per_min:+.1f} ms a minute "
                    "against the steps timed here; make sure these are the movement's (move the microphone onto it, "
                    "or stop the other clock: a phone's gain control can make two clocks sound alike)")
            else:
                out["warnings"].append(f"another clock ticks in the background ({oc.level_db:.0f} dB below the steps, "
                                       f"{other_rate:+.1f} s/day): its ticks were left out")
        else:
            js["other_clock"] = None
        # failed steps, correction pulses
        fk = self.failed_k.values
        ck = set(int(v) for v in self.correction_k.values)
        mk = set(int(v) for v in self.missed_k.values)
        lost_steps = sum(0 if int(x) in ck else (2 if int(x) + 1 in mk else 1) for x in fk)
        span = max(rate.span_s, 1.0)
        js["failed_steps"] = int(len(fk))
        js["failed_step_times_s"] = [round(float(v), 6) for v in self.failed_t.values]
        js["seconds_lost"] = round(lost_steps * nominal, 3)
        js["seconds_lost_per_day"] = _r(lost_steps * nominal / span * SECONDS_PER_DAY, 2)
        js["correction_pulses"] = len(ck)
        if len(fk):
            lines.append(f"the motor failed {len(fk)} steps ({len(ck)} recovered by a correction pulse), losing "
                         f"{lost_steps * nominal:g} s — about {lost_steps * nominal / span * SECONDS_PER_DAY:.0f} s/day at this "
                         "rate of failure: the motor works at its margin (worn or dirty train, thick oil, weak cell)")
        if ck:
            out["warnings"].append(f"{len(ck)} correction pulses: the movement is working at its margin")
        # drive levels
        levels, changes = dg.drive_levels(self.step_peak.values)
        js["drive_levels"] = ({"levels_dbfs": [round(lv.level_dbfs, 1) for lv in levels],
                               "shares": [round(lv.share, 3) for lv in levels], "changes": changes}
                              if len(levels) >= 2 else None)
        if len(levels) >= 2:
            lines.append(f"{len(levels)} drive levels heard ({', '.join(f'{lv.level_dbfs:.0f} dBFS' for lv in levels)}), "
                         f"{changes} changes: an adaptive motor drive, not a fault by itself")
        # anomalies locked to a wheel position
        rk = self.step_k.values[(self.step_flags.values & FLAG_BITS["ringdown"]) != 0]
        anomalies = np.unique(np.concatenate([fk, np.array(sorted(ck), dtype=np.int64), rk]))
        k_all = self.step_k.values
        pl = dg.position_locked(anomalies, int(k_all.max() - k_all.min()) if len(k_all) else 0)
        js["position_locked"] = ({"period_steps": pl.period_steps, "positions": pl.positions, "count": pl.count}
                                 if pl else None)
        if pl:
            lines.append(f"anomalies repeat at step {', '.join(map(str, pl.positions))} of every {pl.period_steps} "
                         f"({pl.count} times, counted from the first step heard): look for a damaged tooth or a hand "
                         "touching the dial, another hand or the glass there")
        # polarity asymmetry
        pa = dg.polarity_asymmetry(k, t)
        if pa:
            js["polarity_asymmetry_us"] = _r(pa[0], 2)
            js["polarity_asymmetry_ci95_us"] = _r(pa[1], 2)
            rd = self.summary_ringdown_diff()
            js["ringdown_polarity_diff_ms"] = _r(rd, 3) if rd is not None else None
            # the two polarities' templates are aligned by their envelopes; on simulated movements
            # whose polarities ring 3 % apart that alignment leaves up to ~110 us, so only a
            # difference well beyond it is reported as uneven stepping
            if abs(pa[0]) > max(2 * pa[1], ASYMMETRY_FLOOR_US):
                lines.append(f"the two coil polarities step unevenly (A→B minus B→A {pa[0]:+.0f} ± {pa[1]:.0f} µs): "
                             "the rotor may sit off-centre in its detent, or one polarity drives weaker (common "
                             "practice, no source)")
        return out

    def summary_ringdown_diff(self) -> float | None:
        d = self.step_decay.values
        p = self.step_pol.values
        a, b = d[(p == 0) & np.isfinite(d)], d[(p == 1) & np.isfinite(d)]
        if len(a) < 3 or len(b) < 3:
            return None
        return float(np.median(b) - np.median(a))

    def _alternation_us(self) -> float | None:
        """Mean A->B interval minus mean B->A interval (us), over all steps (an escapement's tick-tock)."""
        if self.step_k.n < 6:
            return None
        pa = dg.polarity_asymmetry(self.step_k.values, self.step_t.values, min_pairs=4, min_group=2)
        return None if pa is None else pa[0]

    def _hum(self) -> tuple[float | None, float | None]:
        if not self._hum_buf:
            return None, None
        x = np.concatenate(self._hum_buf)[: int(HUM_ANALYSIS_S * self.samplerate)].astype(np.float64)
        if len(x) < self.samplerate:
            return None, None
        f, p = dsp.welch_psd(x - x.mean(), self.samplerate, int(self.samplerate))
        best = (None, None)
        for hz in (50.0, 60.0):
            i = int(round(hz / (f[1] - f[0])))
            if i + 12 >= len(p):
                continue
            neigh = np.concatenate([p[i - 10: i - 2], p[i + 3: i + 11]])
            lvl = 10 * math.log10(max(p[i - 1: i + 2].max(), 1e-30) / max(np.median(neigh), 1e-30))
            if lvl >= 15 and (best[1] is None or lvl > best[1]):
                best = (hz, lvl)
        return best


def _r(v, digits):
    return None if v is None or not math.isfinite(v) else round(float(v), digits)
