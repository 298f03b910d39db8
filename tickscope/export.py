"""Machine-readable forms of a summary: the JSON object and the per-event CSV (pure)."""
from __future__ import annotations

import csv
import math

from .model import KIND_CODES, Event, Summary, flag_names

CSV_HEADER = ["index", "step", "time_s", "polarity", "interval_s", "peak_dbfs", "decay_ms", "flags"]


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
        "sample_rate_hz": _num(s.sample_rate_hz),
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
        "rate_ppm": _num(r.rate_s_per_day / 0.0864, 4) if r else None,
        "clock_correction_ppm": _num(r.clock_correction_ppm if r else 0.0),
        "clock_calibrated": bool(s.extras.get("clock_calibrated", False)),
        "time_base": s.extras.get("time_base"),
        "timing_jitter_us": _num(r.jitter_us, 3) if r else None,
        "polarity_offset_us": _num(r.polarity_offset_us, 3) if r else None,
        "steps_in_fit": r.n_steps if r else 0,
        "outliers": r.n_outliers if r else 0,
        "ringdown": {p: {"decay_ms_median": _num(v.decay_ms_median, 4), "decay_ms_iqr": _num(v.decay_ms_iqr, 4),
                         "steps": v.n, "abnormal": v.n_abnormal, "bent": v.n_bent} for p, v in s.ringdown.items()},
        "signal": {"step_snr_db": _num(s.step_snr_db, 2), "clipped_steps": s.clipped_steps,
                   "hum_hz": _num(s.hum_hz), "hum_db": _num(s.hum_db, 1), "dc_offset": _num(s.dc_offset, 5),
                   "peak_dbfs": _num(s.peak_dbfs, 2)},
        "warnings": list(s.warnings),
    }
    for k, v in s.extras.items():
        if k not in d and k not in ("clock_calibrated", "alternation_us", "coherence"):
            if k == "diagnosis":
                v = list(v)
            d[k] = v
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
            prev = self._last.get(ev.step - 1)
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
                      "duration_s": _num(s.duration_s, 3), "sample_rate_hz": s.sample_rate_hz,
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
        "rate_ppm": _num(r.rate_s_per_day / 0.0864, 4) if r else None,
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
        pol = int(P[i])
        w.writerow([n, "" if k < 0 else k, f"{T[i]:.9f}", ("A" if pol == 0 else "B") if kind == "step" and pol >= 0 else "",
                    interval, "" if not math.isfinite(pk) else f"{pk:.2f}", "" if not math.isfinite(dc) else f"{dc:.3f}",
                    ";".join(flags)])
        n += 1
    return n
