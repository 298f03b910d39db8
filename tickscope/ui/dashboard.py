"""The live screen (rich), our own layout: one column, most important first.

1. the rate in words and figures, with its 95 % interval;
2. an interval ruler: a number line in s/day on which the interval is a bar that narrows as
   steps arrive and the estimate a mark on it;
3. counts: steps, missed, failed, other sounds, audio gaps;
4. the residual strip (timing residuals over the session);
5. the input: level bar, noise floor, step level, clipping and placement hints;
6. the movement: ring-down per polarity, logic regulation, stepping pattern;
7. notes.

``render_live`` is pure (snapshot in, renderable out); the Live loop lives in the CLI.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from rich import box
from rich.console import Group, RenderableType
from rich.panel import Panel
from rich.text import Text

from ..export import rate_words
from ..model import BEAT_SOUNDS, Summary
from .layout import DIGITAL_SILENCE_DB, hanging
from .textreport import residual_strip


@dataclass(frozen=True)
class LiveStatus:
    source: str
    samplerate: float
    channel: int
    elapsed_s: float
    level_dbfs: float  # peak of the last half second
    overflows: int = 0
    saving_to: str | None = None


def _nice_span(v: float) -> float:
    for s in (0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1, 2, 5, 10, 20, 50, 100, 200, 500):
        if v <= s:
            return float(s)
    return float(10 ** math.ceil(math.log10(v)))


def interval_ruler(rate: float, ci: float, width: int) -> Text:
    """A number line (s/day) with the 95 % interval as a bar and the estimate as a mark."""
    span = _nice_span(max(abs(rate) + ci, 0.01) * 1.2)
    w = max(20, width - 24)  # panel borders, the two labels

    def col(v):
        return int(round((v + span) / (2 * span) * (w - 1)))

    line = ["┄"] * w
    style = ["dim"] * w
    zero = col(0.0)
    line[zero], style[zero] = "┼", "dim"
    a, b = max(0, col(rate - ci)), min(w - 1, col(rate + ci))
    for i in range(a, b + 1):
        line[i], style[i] = "━", "green" if ci < 0.5 else "yellow"
    m = min(w - 1, max(0, col(rate)))
    line[m], style[m] = "◆", "bold white"
    t = Text(f"{-span:+g} ".rjust(7), style="dim")
    for ch, st in zip(line, style):
        t.append(ch, style=st)
    t.append(f" {span:+g} s/day", style="dim")
    return t


def level_bar(level_dbfs: float, width: int = 24) -> Text:
    lo = -90.0
    frac = 0.0 if not math.isfinite(level_dbfs) else min(1.0, max(0.0, (level_dbfs - lo) / -lo))
    n = int(round(frac * width))
    t = Text("▕")
    style = "red" if level_dbfs > -1 else ("yellow" if level_dbfs > -6 else "cyan")
    t.append("█" * n, style=style)
    t.append("░" * (width - n), style="dim")
    t.append("▏")
    return t


def hourly_lines(hours, width: int, *, max_rows: int = 8,
                 empty: str = "rate per hour: the first hour is still filling") -> list[Text]:
    """Rate per hour on one shared scale: each hour a row, its interval a bar, its estimate a mark.

    ``hours``: records with ``hour, rate_s_per_day, ci95_s_per_day, steps, missed, complete``;
    ``empty``: the line shown while no hour has a rate (a finished log says why).
    """
    rows = [h for h in hours if math.isfinite(h.rate_s_per_day)][-max_rows:]
    if not rows:
        return [Text(empty, style="dim")]
    lo = min(h.rate_s_per_day - h.ci95_s_per_day for h in rows)
    hi = max(h.rate_s_per_day + h.ci95_s_per_day for h in rows)
    pad = max((hi - lo) * 0.1, 0.005)
    lo, hi = lo - pad, hi + pad
    w = max(10, width - 40)

    def col(v):
        return int(round((v - lo) / (hi - lo) * (w - 1)))

    out = [Text(f"rate per hour (s/day, 95 %)   scale {lo:+.3f} … {hi:+.3f}", style="dim")]
    for h in rows:
        t = Text(f"h{h.hour:<4d}", style="dim" if h.complete else "italic")
        t.append(f"{h.rate_s_per_day:+8.3f} ±{h.ci95_s_per_day:6.3f} ")
        bar = ["·"] * w
        a, b = max(0, col(h.rate_s_per_day - h.ci95_s_per_day)), min(w - 1, col(h.rate_s_per_day + h.ci95_s_per_day))
        for i in range(a, b + 1):
            bar[i] = "─"
        bar[min(w - 1, max(0, col(h.rate_s_per_day)))] = "◆"
        t.append("".join(bar), style="cyan" if h.complete else "dim")
        if h.missed:
            t.append(f" {h.missed} missed", style="red")
        out.append(t)
    return out


#: Steps this far over the noise (median, dB) or less get the placement hint (our own choice).
WEAK_STEPS_DB = 15.0
#: With no impulsive sound at all for this long (s), the hint says so (several step intervals of
#: a movement stepping every second or faster; our own choice).
NOTHING_HEARD_S = 10.0


def _waiting(s: Summary) -> str:
    """What the screen is waiting for before it has a rate."""
    if s.steps_detected >= 3:
        return f"{s.steps_detected} steps on the grid, fitting the rate…"
    n = s.sounds_heard
    if n == 0:
        return "heard no sound yet, listening for steps…"
    return f"heard {n} sound{'s' if n != 1 else ''}, finding the step interval…"


def _placement_hint(s: Summary, st: LiveStatus) -> str | None:
    """Advice on the input, given only on a level that was measured: the input's peak (clipping),
    the steps' own level over the noise, or no sound standing out of the noise at all."""
    if st.level_dbfs > -1:
        return "clipping: lower the input gain"
    if s.steps_detected >= 3 and math.isfinite(s.step_snr_db) and s.step_snr_db < WEAK_STEPS_DB:
        return "steps are weak: put the microphone on the case, near the motor"
    if s.sounds_heard == 0 and st.elapsed_s >= NOTHING_HEARD_S:
        return (f"no sound has stood out of the noise in {st.elapsed_s:.0f} s: if the movement steps every "
                "few seconds, put the microphone on the case, near the motor")
    return None


def render_live(s: Summary, st: LiveStatus, *, width: int = 80, extra: list[RenderableType] | None = None,
                mode: str = "listening") -> RenderableType:
    """The live screen; ``extra`` rows (the log's hourly rates) go under the counts."""
    parts: list[RenderableType] = _headline(s, width)
    parts.append(_counts(s, st))
    if s.escapement is not None:
        parts.append(_escapement_line(s.escapement))
    if extra:
        parts.extend(extra)
    if s.sound not in BEAT_SOUNDS and s.residuals_us is not None and len(s.residuals_us) >= 3:
        parts.append(residual_strip(s.residual_times_s, s.residuals_us, width=max(20, width - 14), height=5))
    lv = Text("input ")
    lv.append_text(level_bar(st.level_dbfs, 20 if width < 100 else 32))
    lv.append(f" {st.level_dbfs:5.1f} dBFS")
    if math.isfinite(s.step_snr_db):
        what = 'beats' if s.sound in BEAT_SOUNDS else 'steps'
        lv.append(f" · {what} over digital silence" if s.step_snr_db > DIGITAL_SILENCE_DB else
                  f" · {what} {s.step_snr_db:+.0f} dB over the noise")
    parts.append(lv)
    hint = _placement_hint(s, st)
    if hint:
        parts.append(hanging("  ! ", hint, style="red" if hint.startswith("clipping") else "yellow"))
    mv = _motor_line(s)
    if len(mv):
        parts.append(mv)
    # while the step interval is still sought, the reason a finished recording would give for
    # finding no pattern (too short, or "move the microphone") is not yet a finding
    shown = [w for w in s.warnings if not (s.sound == "none" and w == s.sound_reason)]
    for w in shown[:3 if width < 100 else 6]:
        if "uncalibrated" in w:
            w = "device clock uncalibrated (±4 s/day typical): pass --clock-ppm"
        parts.append(Text("! " + w, style="yellow", overflow="ellipsis", no_wrap=True))
    elapsed = f"{int(st.elapsed_s // 3600):02d}:{int(st.elapsed_s % 3600 // 60):02d}:{int(st.elapsed_s % 60):02d}"
    title = f"tickscope · {mode} · {st.source}"
    sub = f"{st.samplerate:g} Hz · ch {st.channel} · {elapsed}" + (f" · saving {st.saving_to}" if st.saving_to else "")
    return Panel(Group(*parts), title=title, subtitle=sub, title_align="left", box=box.ROUNDED, width=width)


def _headline(s: Summary, width: int) -> list[RenderableType]:
    """The rate with its interval and ruler, or what was heard instead, or what is waited for."""
    dg, r = s.diagnosis, s.rate
    head = Text()
    if r is not None:
        head.append(rate_words(r.rate_s_per_day), style="bold")
        head.append(f"   ± {r.ci95_s_per_day:.3f} s/day (95 %)")
        if dg is not None and dg.rate_provisional:
            head.append("   provisional", style="yellow")
        return [head, interval_ruler(r.rate_s_per_day, r.ci95_s_per_day, width)]
    if s.sound in BEAT_SOUNDS:
        head.append(f"{'an escapement' if s.sound == 'escapement' else 'not a quartz stepping pattern'} "
                    f"(beat {s.measured_interval_s or 0:.4f} s)", style="yellow")
    else:
        head.append(_waiting(s), style="bold")
    return [head]


def _counts(s: Summary, st: LiveStatus) -> Text:
    """Steps (or beats), missed and failed steps, other sounds, gaps and the timing jitter."""
    dg, r = s.diagnosis, s.rate
    counts = Text()
    beats = s.beats
    if s.sound in BEAT_SOUNDS and beats:
        # beats of another kind of sound: nothing to miss or fail (as in the report)
        counts.append(f"beats {beats.heard}", style="bold")
        counts.append(f" · {beats.like_first} like the first")
        if beats.scatter_ms is not None:
            counts.append(f" · scatter {beats.scatter_ms:.1f} ms")
    else:
        counts.append(f"steps {s.steps_detected}", style="bold")
        counts.append(f" · missed {s.missed_steps}", style="red" if s.missed_steps else "")
    if dg is not None and dg.failed.count:
        counts.append(f" · failed {dg.failed.count}", style="red")
    counts.append(f" · other sounds {s.rejected_events}")
    counts.append(f" · gaps {st.overflows}", style="red" if st.overflows else "")
    if r is not None:
        counts.append(f" · jitter {r.jitter_us:.1f} µs", style="dim")
    return counts


def _escapement_line(e) -> Text:
    """An escapement's own figures, each with its interval (as in the report)."""
    esc = Text(f"escapement · {e.beats_per_hour:.0f} beats/h", style="bold")
    if e.nominal_source == "nearest":
        esc.append(f" nearest (heard {e.beats_per_hour_heard:.1f}: give --beats-per-hour)", style="yellow")
    if e.beat_asymmetry_ms is not None:
        esc.append(f" · asymmetry {abs(e.beat_asymmetry_ms):.2f} ± {e.beat_asymmetry_ci95_ms:.2f} ms")
    if e.amplitude_deg is not None:
        esc.append(f" · amplitude {e.amplitude_deg:.0f} ± {e.amplitude_ci95_deg:.0f}° "
                   f"(lift angle {e.lift_angle_deg:g}°{'' if e.lift_angle_given else ' assumed'})")
    elif e.balance and e.amplitude_reason:
        esc.append(f" · no amplitude ({e.amplitude_reason})", style="dim")
    return esc


def _motor_line(s: Summary) -> Text:
    """A quartz motor's ring-down, its regulation and end-of-life bursts."""
    dg, r = s.diagnosis, s.rate
    mv = Text()
    for p in ("A", "B") if s.sound not in BEAT_SOUNDS else ():
        if p in s.ringdown:
            mv.append(f"ring-down {p} {s.ringdown[p].decay_ms_median:.2f} ms  ")
    inh = dg.inhibition if dg is not None else None
    if inh:
        mv.append(f"· regulation {inh.correction_us:.0f} µs every {inh.period_s:g} s  ")
    elif r is not None and s.sound not in BEAT_SOUNDS:
        mv.append("· regulation: none heard yet  ", style="dim")
    if dg is not None and dg.bursts:
        mv.append(f"· bursts of {dg.bursts.steps_per_burst}: cell at end of life", style="red")
    return mv
