"""Machine-readable forms of a summary: the JSON object and the per-event CSV (pure)."""
from __future__ import annotations

import csv
import math

from .model import KIND_CODES, Diagnosis, Event, Summary, flag_names
from .units import s_per_day_to_ppm

#: lift_ms: an escapement's beat, from its first sound to its drop (empty where not resolved)
CSV_HEADER = ["index", "step", "time_s", "polarity", "interval_s", "peak_dbfs", "decay_ms", "flags", "lift_ms"]


def _num(v, digits: int | None = None):
    if v is None:
        return None
    v = float(v)
    if not math.isfinite(v):
        return None
    return round(v, digits) if digits is not None else v


def summary_to_dict(s: Summary, *, source: str | None = None) -> dict:
    """The JSON object of ``analyze --json`` (schema in the README)."""
    r = s.rate
    d = {
        "source": source,
        "duration_s": _num(s.duration_s, 6),
        "sample_rate_hz": _num(s.samplerate),
        "channel": s.channel,
        "sound": s.sound,
        "step_interval_s": _num(s.step_interval_s),
        "measured_interval_s": _num(s.measured_interval_s, 9),
        "steps_detected": s.steps_detected,
        "missed_steps": s.missed_steps,
        "missed_step_times_s": [round(t, 6) for t in s.missed_step_times_s],
        "rejected_events": s.rejected_events,
        "secondary_impacts": s.secondary_impacts,
        "rate_s_per_day": _num(r.rate_s_per_day, 6) if r else None,
        "rate_ci95_s_per_day": _num(r.ci95_s_per_day, 6) if r else None,
        "rate_ppm": _num(s_per_day_to_ppm(r.rate_s_per_day), 4) if r else None,
        "clock_correction_ppm": _num(r.clock_correction_ppm if r else 0.0),
        "clock_calibrated": s.clock_calibrated,
        "time_base": s.time_base,
        "timing_jitter_us": _num(r.jitter_us, 3) if r else None,
        "polarity_offset_us": _num(r.polarity_offset_us, 3) if r else None,
        "steps_in_fit": r.n_steps if r else 0,
        "outliers": r.n_outliers if r else 0,
        "ringdown": {p: {"decay_ms_median": _num(v.decay_ms_median, 4), "decay_ms_iqr": _num(v.decay_ms_iqr, 4),
                         "steps": v.n, "abnormal": v.n_abnormal, "bent": v.n_bent,
                         "decay_ms_averaged": _num(v.decay_ms, 4), "decay_ms_averaged_ci95": _num(v.decay_ms_ci95, 4),
                         "steps_averaged": v.n_averaged, "averaged_bent": v.average_bent}
                     for p, v in s.ringdown.items()},
        "signal": {"step_snr_db": _num(s.step_snr_db, 2), "clipped_steps": s.clipped_steps,
                   "hum_hz": _num(s.hum_hz), "hum_db": _num(s.hum_db, 1), "dc_offset": _num(s.dc_offset, 5),
                   "peak_dbfs": _num(s.peak_dbfs, 2)},
        "warnings": list(s.warnings),
    }
    if s.diagnosis is not None:
        d.update(diagnosis_to_dict(s.diagnosis))
    d["diagnosis"] = list(s.reading)
    if s.escapement is not None:
        d["escapement"] = escapement_to_dict(s.escapement)
    if s.beats is not None:
        b = s.beats
        d["beats"] = {"heard": b.heard, "like_first": b.like_first, "scatter_ms": b.scatter_ms,
                      "alternation_ms": b.alternation_ms}
    if s.sound_reason is not None:
        d["sound_reason"] = s.sound_reason
    if s.capture is not None:
        c = s.capture
        d["capture"] = {"device": c.device, "overflows": c.overflows, "dropped_frames": c.dropped_frames,
                        "wall_seconds": c.wall_seconds, "ended": c.ended}
    return d


def escapement_to_dict(e) -> dict:
    """The ``escapement`` object of the JSON (an :class:`~tickscope.model.EscapementFigures`)."""
    r = e.rate
    return {
        "beats_per_hour": _num(e.beats_per_hour, 1), "beats_per_hour_heard": _num(e.beats_per_hour_heard, 3),
        "nominal_source": e.nominal_source, "off_series_percent": _num(e.off_series_percent, 4),
        "balance": e.balance, "beat_interval_s": _num(e.beat_interval_s, 9),
        "rate_s_per_day": _num(r.rate_s_per_day, 4) if r else None,
        "rate_ci95_s_per_day": _num(r.ci95_s_per_day, 4) if r else None,
        "beat_asymmetry_ms": _num(e.beat_asymmetry_ms, 4), "beat_asymmetry_ci95_ms": _num(e.beat_asymmetry_ci95_ms, 4),
        "beat_asymmetry_percent": _num(e.beat_asymmetry_percent, 3), "beat_reference": e.beat_reference,
        "lift_time_ms": [_num(v, 4) for v in e.lift_time_ms],
        "lift_time_ci95_ms": [_num(v, 4) for v in e.lift_time_ci95_ms],
        "lifts_measured": list(e.lifts_measured),
        "lift_angle_deg": _num(e.lift_angle_deg), "lift_angle_given": e.lift_angle_given,
        "amplitude_deg": _num(e.amplitude_deg, 1), "amplitude_ci95_deg": _num(e.amplitude_ci95_deg, 1),
        "amplitude_reason": e.amplitude_reason,
        "beat_scatter_us": _num(e.beat_scatter_us, 1),
        "knocking": None if e.knocking is None else {
            "beats": e.knocking.beats, "of_beats": e.knocking.of_beats, "delay_ms": _num(e.knocking.delay_ms, 2),
            "p_value": _num(e.knocking.p_value)},
        "wheel_pattern": None if e.wheel is None else {
            "period_beats": e.wheel.period_beats, "amplitude_us": _num(e.wheel.amplitude_us, 1),
            "p_value": _num(e.wheel.p_value)},
        "stops": [{"at_s": _num(st.at_s, 3), "for_s": _num(st.for_s, 3), "restarted": st.restarted} for st in e.stops],
        "missed_beats": e.missed_beats,
    }


def diagnosis_to_dict(dg: Diagnosis) -> dict:
    """The quartz diagnostics' keys of the JSON object (schema in the README)."""

    def _p(v: float):  # a p-value: three significant digits (0 when below what a float holds)
        return None if v is None or not math.isfinite(v) else float(f"{v:.3g}")

    inh, b, oc, f, pa = dg.inhibition, dg.bursts, dg.other_clock, dg.failed, dg.asymmetry
    d = {
        "inhibition": None if inh is None else {
            "period_s": _num(inh.period_s, 3), "correction_us": _num(inh.correction_us, 2),
            "correction_ci95_us": _num(inh.correction_ci95_us, 2), "pulses_32768": _num(inh.pulses_32768, 2),
            "pulses_8192": _num(inh.pulses_8192, 2), "crystal_rate_s_per_day": _num(inh.crystal_rate_s_per_day, 4),
            "regulated_rate_s_per_day": _num(inh.regulated_rate_s_per_day, 5),
            "periods_observed": inh.periods_observed, "p_value": _p(inh.p_value),
            "hypotheses": inh.hypotheses},
        "rate_provisional": dg.rate_provisional,
        "rate_ci95_statistical_s_per_day": _num(dg.rate_ci95_statistical_s_per_day, 6),
        "pattern": "burst" if b else "regular",
        "burst_period_s": b.burst_period_s if b else None,
        "steps_per_burst": b.steps_per_burst if b else None,
    }
    if b:
        d["steps_in_bursts"] = dg.steps_in_bursts
        d["bursts_full_share"] = _num(b.share_tracked, 3)
    d["other_clock"] = None if oc is None else {
        "rate_s_per_day": _num(oc.rate_s_per_day, 3), "level_db": _num(oc.level_db, 1), "ticks": oc.ticks,
        "drift_ms_per_min": _num(oc.drift_ms_per_min, 2), "p_value": _p(oc.p_value)}
    d.update({
        "failed_steps": f.count,
        "failed_step_times_s": [round(v, 6) for v in f.times_s],
        "seconds_lost": round(f.seconds_lost, 3),
        "seconds_lost_per_day": _num(f.seconds_lost_per_day, 2),
        "correction_pulses": f.correction_pulses,
        "drive_levels": {"levels_dbfs": [round(lv.level_dbfs, 1) for lv in dg.drive_levels],
                         "shares": [round(lv.share, 3) for lv in dg.drive_levels],
                         "changes": dg.drive_level_changes, "p_value": _p(dg.drive_level_p_value)}
        if dg.drive_levels else None,
        "position_locked": None if dg.position_locked is None else {
            "period_steps": dg.position_locked.period_steps, "positions": dg.position_locked.positions,
            "count": dg.position_locked.count, "p_value": _p(dg.position_locked.p_value)},
    })
    if pa is not None:
        d["polarity_asymmetry_us"] = _num(pa.value_us, 2)
        d["polarity_asymmetry_ci95_us"] = _num(pa.ci95_us, 2)
        d["ringdown_polarity_diff_ms"] = _num(pa.ringdown_diff_ms, 3)
    return d


class StepsCsv:
    """Writes one row per detected event (steps, secondary impacts, rejected sounds)."""

    def __init__(self, fh):
        self._w = csv.writer(fh, lineterminator="\n")
        self._w.writerow(CSV_HEADER)
        self._i = 0
        self._last: dict[int, float] = {}

    def write(self, ev: Event) -> None:
        if ev.kind == "missed":
            return
        interval = ""
        if ev.kind == "step" and ev.step is not None:
            # from the previous step when it was heard: the slot before, or (within an end-of-life
            # burst, whose steps share their slot's number) the burst's step before
            prev = self._last.get(ev.step if "in-burst" in ev.flags else ev.step - 1)
            if prev is not None:
                interval = f"{ev.time_s - prev:.9f}"
            self._last = {ev.step: ev.time_s}
        self._w.writerow([
            self._i,
            "" if ev.step is None else ev.step,
            f"{ev.time_s:.9f}",
            ev.polarity if ev.kind == "step" else "",
            interval,
            "" if not math.isfinite(ev.peak_dbfs) else f"{ev.peak_dbfs:.2f}",
            "" if not math.isfinite(ev.decay_ms) else f"{ev.decay_ms:.3f}",
            ";".join(ev.flags),
            "" if not math.isfinite(ev.lift_ms) else f"{ev.lift_ms:.4f}",
        ])
        self._i += 1


def rate_words(rate_s_per_day: float) -> str:
    """'gains 2.71 s/day' / 'loses 0.40 s/day'."""
    return f"{'gains' if rate_s_per_day >= 0 else 'loses'} {abs(rate_s_per_day):.3f} s/day"


def log_to_dict(fig, *, db: str, meta: dict, segments, time_base: str, device_clock: list[dict] | None = None) -> dict:
    """The JSON object of ``report --json`` (schema in the README)."""
    r = fig.rate
    ad = fig.adev
    tie = fig.tie
    return {
        "db": db,
        "label": meta.get("label") or None,
        "segments": [{"id": s.id, "source": s.source, "join": s.join_kind, "timeline_s": _num(s.timeline_s, 3),
                      "duration_s": _num(s.duration_s, 3), "sample_rate_hz": s.samplerate,
                      "clock_ppm": _num(s.clock_ppm), "ended": s.end_reason or "still logging or interrupted",
                      "version": s.version} for s in segments],
        "duration_s": _num(fig.duration_s, 3),
        "span_s": _num(fig.span_s, 3),
        "step_interval_s": _num(fig.nominal_s),
        "steps_detected": fig.steps_detected,
        "missed_steps": fig.missed_steps,
        "missed_step_times_s": [round(float(t), 6) for t in fig.missed_times_s],
        "failed_steps": fig.failed_steps,
        "failed_step_times_s": [round(float(t), 6) for t in fig.failed_times_s],
        "correction_pulses": fig.correction_pulses,
        "rejected_events": fig.rejected_events,
        "gaps": [{"start_s": round(a, 3), "end_s": round(b, 3), "kind": k} for a, b, k in fig.gaps],
        "rate_s_per_day": _num(r.rate_s_per_day, 6) if r else None,
        "rate_ci95_s_per_day": _num(r.ci95_s_per_day, 6) if r else None,
        "rate_ppm": _num(s_per_day_to_ppm(r.rate_s_per_day), 4) if r else None,
        "timing_jitter_us": _num(r.jitter_us, 3) if r else None,
        "clock_correction_ppm": _num(fig.clock_correction_ppm),
        "clock_correction_u95_ppm": _num(fig.clock_ppm_u95),
        "time_base": time_base,
        "device_clock_vs_host": device_clock or [],
        "hourly": [{k: (_num(v, 6) if isinstance(v, float) else v) for k, v in h.items()} for h in fig.hourly],
        "minutes": [{"minute": m["minute"], "steps": m.get("steps"), "missed": m.get("missed"),
                     "rate_s_per_day": _num(m.get("rate_s_per_day"), 6),
                     "rate_ci95_s_per_day": _num(m.get("rate_ci95_s_per_day"), 6)} for m in fig.minutes],
        "adev": None if ad is None else {
            "tau_s": [float(v) for v in ad.tau_s], "deviation": [float(v) for v in ad.deviation],
            "ci95_low": [float(v) for v in ad.lower], "ci95_high": [float(v) for v in ad.upper],
            "n_terms": [int(v) for v in ad.n_terms], "edf": [round(float(v), 2) for v in ad.edf],
            "noise_alpha": [int(v) for v in ad.alpha]},
        "tie_s": None if tie is None else {
            "final": _num(tie.final_s, 9), "peak_to_peak": _num(tie.peak_to_peak_s, 9),
            "detrended_rms": _num(tie.detrended_rms_s, 9), "detrended_peak_to_peak": _num(tie.detrended_peak_to_peak_s, 9)},
        "worst_hour": fig.worst_hour,
        "best_stretch": None if fig.best_stretch is None else {k: _num(v, 6) for k, v in fig.best_stretch.items()},
        "ringdown_hourly": fig.ringdown_hourly,
        "notes": fig.notes,
    }


_KIND_NAMES = {v: k for k, v in KIND_CODES.items()}


def write_log_csv(fh, T, K, ev: dict, P=None) -> int:
    """Every logged event with the columns of ``analyze --steps-csv`` (time on the log's timeline;
    ``P``: the log's polarity names, see :func:`tickscope.core.logstats.polarity_on_log`)."""
    P = ev["pol"] if P is None else P
    w = csv.writer(fh, lineterminator="\n")
    w.writerow(CSV_HEADER)
    last_k = last_t = None
    n = 0
    order = sorted(range(len(T)), key=lambda i: T[i])
    for i in order:
        kind = _KIND_NAMES.get(int(ev["kind"][i]), "?")
        if kind == "missed":
            continue
        k = int(K[i])
        interval = ""
        if kind == "step" and k >= 0:
            if last_k is not None and k == last_k + 1:
                interval = f"{T[i] - last_t:.9f}"
            last_k, last_t = k, T[i]
        flags = flag_names(int(ev["flags"][i]))
        if kind != "step":
            flags.insert(0, kind)
        pk, dc = float(ev["peak_dbfs"][i]), float(ev["decay_ms"][i])
        lift = float(ev["lift_ms"][i]) if "lift_ms" in ev else math.nan
        pol = int(P[i])
        w.writerow([n, "" if k < 0 else k, f"{T[i]:.9f}", ("A" if pol == 0 else "B") if kind == "step" and pol >= 0 else "",
                    interval, "" if not math.isfinite(pk) else f"{pk:.2f}", "" if not math.isfinite(dc) else f"{dc:.3f}",
                    ";".join(flags), "" if not math.isfinite(lift) else f"{lift:.3f}"])
        n += 1
    return n
