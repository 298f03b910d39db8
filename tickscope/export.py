"""Machine-readable forms of a summary: the JSON object and the per-event CSV (pure)."""
from __future__ import annotations

import csv
import math

from .model import Event, Summary

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
                         "steps": v.n, "abnormal": v.n_abnormal} for p, v in s.ringdown.items()},
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
