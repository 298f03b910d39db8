"""The log report in the terminal (rich): our own layout, read top to bottom.

1. what was logged, how long, on which time base;
2. the verdict: the rate over the whole log with its interval, and the counts;
3. a timeline strip: audio covered, gaps, missed and failed steps, other sounds;
4. the rate per hour on one shared scale (drift shows as a slanting column of marks);
5. the time error the rate line does not explain, over the log;
6. the Allan deviation table with intervals, also in s/day;
7. the worst hour, the best stretch, notes.
"""
from __future__ import annotations

from types import SimpleNamespace

import numpy as np
from rich import box
from rich.console import Group, RenderableType
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from ..export import rate_words
from ..units import SECONDS_PER_DAY
from .dashboard import hourly_lines
from .layout import axis_label, duration_words, hanging, phrase_lines, time_unit
from .textreport import residual_strip


def timeline_strip(fig, width: int) -> Text:
    """One character per stretch of the log: steps heard, audio without steps, gaps, missed and
    failed steps, other sounds; under it the ends of the log in a unit chosen from its span."""
    t = Text()
    if fig.span_s <= 0:
        return t
    t0 = fig.start_s
    w = max(10, width)
    edges = np.linspace(t0, t0 + fig.span_s, w + 1)
    # a column holds steps when one was heard within a step interval of it (a column can be
    # shorter than the interval between steps)
    near = fig.nominal_s or 0.0
    steps = np.sort(np.asarray(fig.step_times_s, dtype=np.float64))
    n_lo = np.searchsorted(steps, edges[:-1] - near, side="left")
    n_hi = np.searchsorted(steps, edges[1:] + near, side="right")
    chars = ["━" if hi > lo else "┈" for lo, hi in zip(n_lo, n_hi)]
    styles = ["green" if c == "━" else "dim" for c in chars]

    def cols(times):
        return np.clip(np.searchsorted(edges, times, side="right") - 1, 0, w - 1)

    for c in cols(fig.rejected_times_s):
        chars[c], styles[c] = "┅", "yellow"
    for a, b, kind in fig.gaps:
        c0, c1 = int(cols(np.array([a]))[0]), int(cols(np.array([b]))[0])
        if kind == "restart":
            chars[c0], styles[c0] = "┃", "blue"
            continue
        silent = kind in ("no steps heard", "steps stopped")  # audio, but no steps in it
        for c in range(c0, c1 + 1):
            chars[c], styles[c] = ("┈", "dim") if silent else (" ", "")
    for c in cols(fig.missed_times_s):
        chars[c], styles[c] = "✕", "bold red"
    for c in cols(fig.failed_times_s):
        chars[c], styles[c] = "!", "bold red"
    t.append("▕")
    for ch, st in zip(chars, styles):
        t.append(ch, style=st)
    t.append("▏\n")
    unit, per = time_unit(fig.span_s)
    left, right = " " + axis_label(0.0, unit), axis_label(fig.span_s / per, unit)
    t.append(left.ljust(max(w + 1 - len(right), len(left) + 1)) + right, style="dim")
    legend = [("━", "steps"), ("┈", "no steps heard"), ("┅", "other sounds"), ("✕", "missed"), ("!", "failed"),
              ("┃", "restart"), (" ", "(blank) no audio")]
    shown = [f"{g} {name}" if g != " " else name for g, name in legend if g == "━" or g in chars]
    t.append("\n " + "  ".join(shown), style="dim")
    return t


def _us(v_us: float) -> str:
    """A time error given in µs, with the digits that matter: 0.05 µs, 0.4 µs, 42 µs, 279.14 ms."""
    if v_us >= 1000:
        return _dur(v_us * 1e-6)
    return f"{v_us:.0f} µs" if v_us >= 10 else (f"{v_us:.1f} µs" if v_us >= 1 else f"{v_us:.2f} µs")


def _no_hourly_rate(fig) -> str:
    """Why the rate-per-hour lines are empty."""
    if not fig.steps_detected:
        return "rate per hour: none (no steps logged)"
    if not fig.ended:
        return "rate per hour: none yet (too few steps in any hour so far)"
    return "rate per hour: none (too few steps in any hour for a rate)"


def render_log(fig, *, db: str, label: str, time_base: str, width: int = 100,
               device_clock: list[dict] | None = None) -> RenderableType:
    parts: list[RenderableType] = []
    inner = width - 4  # the panel's borders and padding
    lasted = (f"{duration_words(fig.duration_s)} of audio" if abs(fig.span_s - fig.duration_s) < 1
              else f"{duration_words(fig.span_s)} ({duration_words(fig.duration_s)} of audio)")
    parts.append(phrase_lines([(label or "unlabelled movement", "bold"),
                               (f"· {fig.segments} segment{'s' if fig.segments != 1 else ''}", ""),
                               (f"· {lasted}", ""),
                               ("· " + (f"step every {fig.nominal_s:g} s" if fig.nominal_s else "no step interval"), "")],
                              inner, sep=" "))
    parts.append(hanging("", f"time base: {time_base}", style="dim"))
    r = fig.rate
    if r is not None:
        parts.append(phrase_lines([(rate_words(r.rate_s_per_day), "bold"),
                                   (f"± {r.ci95_s_per_day:.3f} s/day (95 %)", ""), ("over the whole log", "")], inner))
    else:
        parts.append(hanging("", "no rate: " + (fig.notes[0] if fig.notes else "no stepping pattern logged"),
                             style="yellow"))
    lost = sum(b - a for a, b, k in fig.gaps if k != "restart")
    counts = [(f"steps {fig.steps_detected}", ""), (f"missed {fig.missed_steps}", "red" if fig.missed_steps else ""),
              (f"failed {fig.failed_steps}", "red" if fig.failed_steps else "")]
    if fig.correction_pulses:
        counts.append((f"correction pulses {fig.correction_pulses}", "yellow"))
    counts += [(f"other sounds {fig.rejected_events}", ""),
               (f"gaps {sum(1 for g in fig.gaps if g[2] != 'restart')} ({lost:.0f} s)", "yellow" if lost else "")]
    if r is not None:
        counts.append((f"rate fit residual {_us(r.jitter_us)} rms", "dim"))
    parts.append(phrase_lines(counts, inner, sep=" · ", indent=""))
    parts.append(Text(""))
    parts.append(Text("timeline", style="bold"))
    parts.append(timeline_strip(fig, width - 8))
    hours = [SimpleNamespace(hour=h["hour"], rate_s_per_day=h["rate_s_per_day"] if h["rate_s_per_day"] is not None
                             else float("nan"), ci95_s_per_day=h["rate_ci95_s_per_day"] or 0.0, steps=h["steps"],
                             missed=h["missed"], complete=h["covered_s"] >= 3599) for h in fig.hourly]
    parts.append(Text(""))
    parts.extend(hourly_lines(hours, width - 4, max_rows=24 if width >= 100 else 12, empty=_no_hourly_rate(fig)))
    if fig.hourly and "beat_asymmetry_ms" in fig.hourly[0]:
        parts += _beat_hours(fig.hourly)
    if len(fig.step_x) >= 3:
        parts += _time_error_part(fig, width)
    if fig.adev is not None:
        parts.append(Text(""))
        tb = Table(title="overlapping Allan deviation (95 % interval)", title_justify="left", box=box.SIMPLE_HEAD)
        for col in ("τ", "σy(τ)", "interval", "as s/day", "terms"):
            tb.add_column(col, justify="right")
        ad = fig.adev
        for i in range(len(ad.tau_s)):
            tb.add_row(_tau(ad.tau_s[i]), f"{ad.deviation[i]:.2e}", f"{ad.lower[i]:.2e} … {ad.upper[i]:.2e}",
                       f"{ad.deviation[i] * SECONDS_PER_DAY:.4f}", str(int(ad.n_terms[i])))
        parts.append(tb)
    if fig.worst_hour:
        w = fig.worst_hour
        parts.append(hanging("", f"worst hour: h{w['hour']} ({w['why']})", style="yellow"))
    if fig.best_stretch:
        b = fig.best_stretch
        unit, per = time_unit(fig.span_s)
        rate = None if b["rate_s_per_day"] is None else f"{rate_words(b['rate_s_per_day'])} ± {b['rate_ci95_s_per_day']:.3f}"
        parts.append(phrase_lines([(f"best stretch: {duration_words(b['duration_s'])} without a missed or failed step "
                                    "or a gap,", "green"),
                                   (f"from {axis_label((b['start_s'] - fig.start_s) / per, unit)}" + (
                                       "," if rate else ""), "green"), (rate or "", "green")], inner, sep=" "))
    for d in device_clock or []:
        parts.append(hanging("", f"segment {d['segment']}: the device clock ran {d['ppm']:+.2f} ± {d['ci95_ppm']:.2f} "
                                 f"ppm against the host clock (host {d['host_sync']})", style="dim"))
    for n in fig.notes:
        parts.append(hanging("! ", n, style="yellow"))
    return Panel(Group(*parts), title=f"tickscope · log report · {db}", title_align="left", box=box.ROUNDED,
                 width=width)


def _beat_hours(hourly: list[dict]) -> list[RenderableType]:
    """An escapement log's hours: the beat asymmetry and, for a balance, the amplitude, each with
    its 95 % interval (or why there is none)."""
    amp = any("amplitude_reason" in h for h in hourly)
    tb = Table(title="beats hour by hour (95 % intervals)", title_justify="left", box=box.SIMPLE_HEAD)
    for col in ("hour", "beat asymmetry", *(("balance amplitude",) if amp else ())):
        tb.add_column(col, justify="right")
    for h in hourly[-24:]:
        a = h.get("beat_asymmetry_ms")
        row = [f"h{h['hour']}", "–" if a is None else f"{abs(a):.2f} ± {h['beat_asymmetry_ci95_ms']:.2f} ms"]
        if amp:
            v = h.get("amplitude_deg")
            row.append(f"none ({h.get('amplitude_reason')})" if v is None else
                       f"{v:.0f} ± {h['amplitude_ci95_deg']:.0f}°")
        tb.add_row(*row)
    return [Text(""), tb]


def _time_error_part(fig, width: int) -> list[RenderableType]:
    """The time error the rate line leaves, drawn over the log, and its figures, each named (the
    rate fit's residual in the counts above is another figure: see ``_tie_vs_fit``)."""
    parts: list[RenderableType] = [Text("")]
    k = fig.step_k.astype(np.float64)
    A = np.vstack([np.ones(len(k)), k - k.mean()]).T
    coef, *_ = np.linalg.lstsq(A, fig.step_x, rcond=None)
    res_ms = (fig.step_x - A @ coef) * 1e3
    unit, scale = ("ms", 1.0) if np.ptp(res_ms) >= 2.0 else ("µs", 1e3)
    parts.append(phrase_lines([(f"time error after the rate line ({unit})", "bold"),
                               ("a bow is a drifting rate, a step a jump", "dim")], width - 4))
    t_unit, per = time_unit(fig.span_s)
    parts.append(residual_strip(fig.step_t / per, res_ms * scale, width=width - 14, height=6, time_unit=t_unit,
                                caption=f"time error {unit}"))
    tie = fig.tie
    if tie is not None and np.isfinite(tie.detrended_rms_s):
        text = (f"accumulated time error {_dur(tie.final_s, sign=True)} ({'ahead' if tie.final_s < 0 else 'behind'}); "
                f"time error after the rate line: rms {_dur(tie.detrended_rms_s)}, peak to peak "
                f"{_dur(tie.detrended_peak_to_peak_s)}" + _tie_vs_fit(fig))
        parts.append(hanging("", text, style="dim"))
    return parts


def _tie_vs_fit(fig) -> str:
    """Why the time error's rms can be far above the rate fit's residual: they are of different steps
    and different lines (said only when they differ enough to be read as a contradiction)."""
    r = fig.rate
    tie_us = fig.tie.detrended_rms_s * 1e6
    if r is None or tie_us <= 1.5 * r.jitter_us + 0.05:
        return ""
    left_out = f", {r.n_outliers} left out as outliers" if r.n_outliers else ""
    starts = " and each stretch's own start" if fig.groups > 1 else ""
    return (f" — more than the rate fit residual ({_us(r.jitter_us)} rms), which is of the {r.n_steps} steps the fit "
            f"kept{left_out}, with the offset between the two polarities{starts} fitted; the time error is of "
            f"all {len(fig.step_x)} steps on one line")


def _dur(v: float, sign: bool = False) -> str:
    """A time error with a unit that suits it: 15.6 ms, 0.31 µs, 2.40 s."""
    a = abs(v)
    f = "+" if sign else ""
    if a >= 1:
        return f"{v:{f}.2f} s"
    if a >= 1e-3:
        return f"{v * 1e3:{f}.2f} ms"
    if a >= 1e-7 or a == 0:
        return f"{v * 1e6:{f}.2f} µs"
    return f"{v * 1e9:{f}.0f} ns"


def _tau(s: float) -> str:
    if s < 60:
        return f"{s:g} s"
    if s < 3600:
        return f"{s / 60:.3g} min"
    return f"{s / 3600:.3g} h"
