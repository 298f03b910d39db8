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
from .textreport import residual_strip


def _hms(s: float) -> str:
    s = max(0.0, s)
    return f"{int(s // 3600)} h {int(s % 3600 // 60):02d} min"


def timeline_strip(fig, width: int) -> Text:
    """One character per stretch of the log: covered, gap, missed/failed step, other sounds."""
    t = Text()
    if fig.span_s <= 0:
        return t
    t0 = min([a for a, _, _ in fig.gaps] + [0.0])
    w = max(10, width)
    edges = np.linspace(t0, t0 + fig.span_s, w + 1)
    chars = ["━"] * w
    styles = ["green"] * w

    def cols(times):
        return np.clip(np.searchsorted(edges, times, side="right") - 1, 0, w - 1)

    for c in cols(fig.rejected_times_s):
        chars[c], styles[c] = "┅", "yellow"
    for a, b, kind in fig.gaps:
        if kind == "restart":
            c = int(cols(np.array([a]))[0])
            chars[c], styles[c] = "┃", "blue"
            continue
        for c in range(int(cols(np.array([a]))[0]), int(cols(np.array([b]))[0]) + 1):
            chars[c], styles[c] = " ", ""
    for c in cols(fig.missed_times_s):
        chars[c], styles[c] = "✕", "bold red"
    for c in cols(fig.failed_times_s):
        chars[c], styles[c] = "!", "bold red"
    t.append("▕")
    for ch, st in zip(chars, styles):
        t.append(ch, style=st)
    t.append("▏\n")
    t.append(" 0 h".ljust(w - 6) + f"{fig.span_s / 3600:.1f} h", style="dim")
    t.append("\n ━ steps  ┅ other sounds  ✕ missed  ! failed  ┃ restart  (blank) no audio", style="dim")
    return t


def render_log(fig, *, db: str, label: str, time_base: str, width: int = 100,
               device_clock: list[dict] | None = None) -> RenderableType:
    parts: list[RenderableType] = []
    head = Text()
    head.append(f"{label or 'unlabelled movement'}", style="bold")
    head.append(f" · {fig.segments} segment{'s' if fig.segments != 1 else ''} · {_hms(fig.span_s)} "
                f"({_hms(fig.duration_s)} of audio) · "
                + (f"step every {fig.nominal_s:g} s" if fig.nominal_s else "no step interval"))
    parts.append(head)
    parts.append(Text(f"time base: {time_base}", style="dim"))
    r = fig.rate
    v = Text()
    if r is not None:
        v.append(rate_words(r.rate_s_per_day), style="bold")
        v.append(f"  ± {r.ci95_s_per_day:.3f} s/day (95 %) over the whole log")
    else:
        v.append("no rate: " + (fig.notes[0] if fig.notes else "no stepping pattern logged"), style="yellow")
    parts.append(v)
    c = Text()
    c.append(f"steps {fig.steps_detected}")
    c.append(f" · missed {fig.missed_steps}", style="red" if fig.missed_steps else "")
    c.append(f" · failed {fig.failed_steps}", style="red" if fig.failed_steps else "")
    if fig.correction_pulses:
        c.append(f" · correction pulses {fig.correction_pulses}", style="yellow")
    c.append(f" · other sounds {fig.rejected_events}")
    lost = sum(b - a for a, b, k in fig.gaps if k != "restart")
    c.append(f" · gaps {sum(1 for g in fig.gaps if g[2] != 'restart')} ({lost:.0f} s)", style="yellow" if lost else "")
    if r is not None:
        c.append(f" · jitter {r.jitter_us:.1f} µs", style="dim")
    parts.append(c)
    parts.append(Text(""))
    parts.append(Text("timeline", style="bold"))
    parts.append(timeline_strip(fig, width - 8))
    hours = [SimpleNamespace(hour=h["hour"], rate_s_per_day=h["rate_s_per_day"] if h["rate_s_per_day"] is not None
                             else float("nan"), ci95_s_per_day=h["rate_ci95_s_per_day"] or 0.0, steps=h["steps"],
                             missed=h["missed"], complete=h["covered_s"] >= 3599) for h in fig.hourly]
    parts.append(Text(""))
    parts.extend(hourly_lines(hours, width - 4, max_rows=24 if width >= 100 else 12))
    if len(fig.step_x) >= 3:
        parts.append(Text(""))
        k = fig.step_k.astype(np.float64)
        A = np.vstack([np.ones(len(k)), k - k.mean()]).T
        coef, *_ = np.linalg.lstsq(A, fig.step_x, rcond=None)
        res_ms = (fig.step_x - A @ coef) * 1e3
        unit, scale = ("ms", 1.0) if np.ptp(res_ms) >= 2.0 else ("µs", 1e3)
        parts.append(Text(f"time error left after the rate line ({unit}; a bow is a drifting rate, a step a jump)",
                          style="bold"))
        parts.append(residual_strip(fig.step_t / 3600.0, res_ms * scale, width=width - 14, height=6, time_unit="h",
                                    caption=f"time error {unit}"))
        if fig.tie is not None:
            parts.append(Text(f"accumulated time error {_dur(fig.tie.final_s, sign=True)} "
                              f"({'ahead' if fig.tie.final_s < 0 else 'behind'}); after the rate line: "
                              f"rms {_dur(fig.tie.detrended_rms_s)}, peak to peak "
                              f"{_dur(fig.tie.detrended_peak_to_peak_s)}", style="dim"))
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
        parts.append(Text(f"worst hour: h{w['hour']} ({w['why']})", style="yellow"))
    if fig.best_stretch:
        b = fig.best_stretch
        rate = "" if b["rate_s_per_day"] is None else f", {rate_words(b['rate_s_per_day'])} ± {b['rate_ci95_s_per_day']:.3f}"
        parts.append(Text(f"best stretch: {_hms(b['duration_s'])} without a missed or failed step or a gap, from "
                          f"{b['start_s'] / 3600:.2f} h{rate}", style="green"))
    for d in device_clock or []:
        parts.append(Text(f"segment {d['segment']}: the device clock ran {d['ppm']:+.2f} ± {d['ci95_ppm']:.2f} ppm "
                          f"against the host clock (host {d['host_sync']})", style="dim"))
    for n in fig.notes:
        parts.append(Text("! " + n, style="yellow"))
    return Panel(Group(*parts), title=f"tickscope · log report · {db}", title_align="left", box=box.ROUNDED,
                 width=width)


def _dur(v: float, sign: bool = False) -> str:
    """A time error with a unit that suits it: 15.6 ms, 0.31 µs, 2.40 s."""
    a = abs(v)
    f = "+" if sign else ""
    if a >= 1:
        return f"{v:{f}.2f} s"
    if a >= 1e-3:
        return f"{v * 1e3:{f}.2f} ms"
    return f"{v * 1e6:{f}.2f} µs"


def _tau(s: float) -> str:
    if s < 60:
        return f"{s:g} s"
    if s < 3600:
        return f"{s / 60:.3g} min"
    return f"{s / 3600:.3g} h"
