"""The human report of an analysis, drawn with rich (our own layout).

Layout, top to bottom: a one-line headline in words; a "reading" table (each figure
with its uncertainty and what it rests on); a residual strip (the timing residuals of
the steps over the recording, a band from lowest to highest per column with the
median marked); the ring-down per polarity; then the notes (warnings) in plain words.
"""
from __future__ import annotations

import math

import numpy as np
from rich import box
from rich.console import Group, RenderableType
from rich.panel import Panel
from rich.table import Table
from rich.text import Text

from .. import advice
from ..export import rate_words
from ..model import Summary
from ..units import s_per_day_to_ppm
from .layout import DIGITAL_SILENCE_DB, hanging, phrase_lines


def _tlabel(v: float) -> str:
    return "0" if abs(v) < 0.05 else f"{v:.3g}"


def residual_strip(times_s: np.ndarray | None, res_us: np.ndarray | None, *, width: int = 60,
                   height: int = 7, time_unit: str = "s", caption: str = "residual µs") -> Text:
    """A text chart of timing residuals (us) against time: per column, the range as a band."""
    t = Text()
    if times_s is None or res_us is None or len(res_us) < 3:
        t.append("(too few steps to draw the residuals)", style="dim")
        return t
    lo_v, hi_v = float(np.percentile(res_us, 0.5)), float(np.percentile(res_us, 99.5))
    span = max(hi_v - lo_v, 1e-3)
    lo_v -= 0.05 * span
    hi_v += 0.05 * span
    t0, t1 = float(times_s[0]), float(times_s[-1])
    cols = max(8, min(width, len(res_us)))
    edges = np.linspace(t0, t1 + 1e-9, cols + 1)
    col = np.clip(np.searchsorted(edges, times_s, side="right") - 1, 0, cols - 1)
    grid = [[" "] * cols for _ in range(height)]
    styles = [[""] * cols for _ in range(height)]

    def row(v):
        return int(np.clip(round((hi_v - v) / (hi_v - lo_v) * (height - 1)), 0, height - 1))

    for c in range(cols):
        v = res_us[col == c]
        if not len(v):
            continue
        r_hi, r_lo, r_med = row(v.max()), row(v.min()), row(float(np.median(v)))
        for r in range(r_hi, r_lo + 1):
            grid[r][c], styles[r][c] = "▒", "cyan"
        grid[r_med][c], styles[r_med][c] = "█", "bold cyan"
    zero = row(0.0) if lo_v <= 0 <= hi_v else None
    label_w = 9
    for r in range(height):
        v = hi_v - r * (hi_v - lo_v) / (height - 1)
        t.append(f"{v:+8.1f} ", style="dim")
        for c in range(cols):
            ch = grid[r][c]
            if ch == " " and r == zero:
                t.append("┄", style="dim")
            else:
                t.append(ch, style=styles[r][c])
        t.append("\n")
    left, right = f"{_tlabel(t0)} {time_unit}", f"{_tlabel(t1)} {time_unit}"
    t.append(" " * label_w + left.ljust(max(cols - len(right), len(left) + 1)) + right, style="dim")
    t.append("\n" + " " * label_w + f"{caption} · band: range per column · block: median", style="dim")
    return t


def _fmt(v: float | None, fmt: str, unit: str = "") -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "—"
    return f"{v:{fmt}}{unit}"


def render_summary(s: Summary, *, source: str = "", width: int = 80) -> RenderableType:
    """The whole report as one rich renderable."""
    inner = min(width, 120) - 4  # inside the panel's borders and padding
    parts: list[RenderableType] = [_headline(s, inner), _readings(s)]

    if s.sound == "stepping" and s.residuals_us is not None and len(s.residuals_us) >= 3:
        parts.append(Panel(residual_strip(s.residual_times_s, s.residuals_us, width=max(20, min(width - 20, 100))),
                           title="timing residuals", title_align="left", box=box.ROUNDED, expand=False))
    if s.escapement is not None:
        parts += _escapement_part(s.escapement)
    elif s.ringdown:
        parts += _ringdown_part(s)
    reading = _reading(s)
    if reading:
        parts.append(Text("the repairer's reading", style="bold"))
        for line in reading:
            parts.append(hanging("  • ", line))
        if any(w in " ".join(reading) for w in ("cell", "margin", "tooth")):
            parts.append(hanging("  ", "Before opening the case or changing the cell: keep button cells away from "
                                 "children, expect to re-test a water-resistant case, unplug mains clocks, work "
                                 "antistatic.", style="dim"))
    if s.warnings:
        parts.append(Text("notes", style="bold"))
        for w in s.warnings:
            parts.append(hanging("  ! ", w, style="yellow"))
    title = f"tickscope · {source}" if source else "tickscope"
    sub = f"{s.duration_s:.1f} s · {s.samplerate:g} Hz · channel {s.channel}"
    return Panel(Group(*parts), title=title, subtitle=sub, title_align="left", box=box.HEAVY_HEAD, width=min(width, 120))


def _reading(s: Summary) -> tuple[str, ...]:
    """The repairer's reading; with missed steps, what they mean is part of it."""
    if s.diagnosis is not None and s.missed_steps:
        return advice.reading(s.diagnosis, missed_step_times_s=tuple(s.missed_step_times_s))
    return s.reading


def _headline(s: Summary, width: int) -> Text:
    """One line in words, broken between its phrases when it does not fit ``width``."""
    r = s.rate
    if s.sound == "stepping" and r is not None:
        return phrase_lines([
            Text.assemble(("The movement ", "bold"), (rate_words(r.rate_s_per_day),
                          "bold green" if abs(r.rate_s_per_day) < 0.5 else "bold yellow")),
            (f"± {r.ci95_s_per_day:.3f} s/day (95 %)", "bold"),
            (f"over {r.n_steps} steps in {r.span_s:.0f} s", "")], width)
    e = s.escapement
    if s.sound == "escapement" and e is not None and r is not None:
        return phrase_lines([
            Text.assemble(("The escapement ", "bold"), (rate_words(r.rate_s_per_day),
                          "bold green" if abs(r.rate_s_per_day) < 10 else "bold yellow")),
            (f"± {r.ci95_s_per_day:.2f} s/day (95 %)", "bold"),
            (f"at {e.beats_per_hour:.0f} beats per hour" + (" (nearest usual value: a guess)"
                                                            if e.nominal_source == "nearest" else ""), ""),
            (f"over {r.n_steps} beats in {r.span_s:.0f} s", "")], width)
    if s.sound == "escapement" and e is not None:
        return phrase_lines([("An escapement", "bold yellow"),
                             (f"beating {e.beats_per_hour_heard:.1f} times an hour;", ""),
                             ("too few beats for a rate", "")], width, sep=" ")
    if s.sound in ("escapement", "not-ticking", "not-stepping"):
        return phrase_lines([("Not a quartz stepping pattern", "bold yellow"),
                             (f"— beat interval heard {_fmt(s.measured_interval_s, '.5f', ' s')};", ""),
                             ("no rate claimed", "")], width, sep=" ")
    return Text("No steps found", style="bold red")


def _readings(s: Summary) -> Table:
    """The table of figures, each with what it rests on."""
    r = s.rate
    tab = Table(box=box.SIMPLE_HEAD, show_edge=False, pad_edge=False, expand=False)
    tab.add_column("reading", style="bold")
    tab.add_column("value", justify="right")
    tab.add_column("basis", style="dim")
    if s.escapement is not None:
        _escapement_rows(tab, s)
        return tab
    if r is not None:
        tab.add_row("rate", f"{r.rate_s_per_day:+.4f} s/day", f"95 % ± {r.ci95_s_per_day:.4f}; "
                    f"{s_per_day_to_ppm(r.rate_s_per_day):+.3f} ppm; line fit, residual corr {r.residual_correlation:+.2f}")
        tb = s.time_base or (f"clock corrected by {r.clock_correction_ppm:+.3f} ppm"
                             if s.clock_calibrated else "device clock, uncalibrated")
        tab.add_row("time base", f"{r.clock_correction_ppm:+.2f} ppm" if s.clock_calibrated else "", tb)
        tab.add_row("step interval", f"{s.step_interval_s:g} s", f"measured {s.measured_interval_s:.9f} s")
        tab.add_row("timing jitter", f"{r.jitter_us:.2f} µs", "RMS residual from the fitted line")
        tab.add_row("polarity offset", f"{r.polarity_offset_us:+.2f} µs", "B steps relative to A steps")
    dg = s.diagnosis
    if dg is not None:
        _diagnosis_rows(tab, dg)
    if s.sound in ("not-ticking", "not-stepping") and s.beats is not None:
        # beats on a grid of their own: no steps to miss, nothing to diagnose
        b = s.beats
        tab.add_row("beats heard", f"{b.heard}", f"every {_fmt(s.measured_interval_s, '.4f', ' s')} on average; "
                    f"{b.like_first} sound like the first ones")
        if b.scatter_ms is not None:
            tab.add_row("beat scatter", f"{b.scatter_ms:.1f} ms", "SD of each beat's first sound about the grid")
        if b.alternation_ms is not None:
            tab.add_row("tick − tock", f"{b.alternation_ms:+.2f} ms", "mean A→B interval minus mean B→A")
    else:
        tab.add_row("steps heard", f"{s.steps_detected}", f"{r.n_outliers} outliers left out of the fit" if r else "")
        miss = ", ".join(f"{t:.1f}" for t in s.missed_step_times_s[:6]) + (" …" if s.missed_steps > 6 else "")
        tab.add_row("missed steps", f"{s.missed_steps}", f"at {miss} s" if s.missed_steps else "none on the grid")
    tab.add_row("other sounds", f"{s.rejected_events}", f"off the grid, ignored; {s.secondary_impacts} later impacts within steps")
    tab.add_row("step level", *_level_cells(s))
    if s.hum_hz:
        tab.add_row("mains hum", f"{s.hum_hz:.0f} Hz", f"{s.hum_db:+.0f} dB over the floor")
    return tab


def _level_cells(s: Summary) -> tuple[str, str]:
    """The steps' (or beats') level over the noise: a number, or "above digital silence"."""
    if s.step_snr_db == s.step_snr_db and s.step_snr_db > DIGITAL_SILENCE_DB:
        return "—", f"above digital silence (nothing between the sounds); peak {s.peak_dbfs:.1f} dBFS"
    return _fmt(s.step_snr_db, ".1f", " dB"), f"above the noise floor; peak {s.peak_dbfs:.1f} dBFS"


def _escapement_rows(tab, s: Summary) -> None:
    """The readings table of an escapement's beats."""
    e, r = s.escapement, s.rate
    src = {"given": "given", "series": "usual value nearest", "nearest": "nearest; off every usual value"}
    if r is not None:
        tab.add_row("rate", f"{r.rate_s_per_day:+.2f} s/day", f"95 % ± {r.ci95_s_per_day:.2f}; "
                    f"{s_per_day_to_ppm(r.rate_s_per_day):+.1f} ppm; line through the beats")
        tb = s.time_base or ("clock corrected" if s.clock_calibrated else "device clock, uncalibrated")
        tab.add_row("time base", f"{r.clock_correction_ppm:+.2f} ppm" if s.clock_calibrated else "", tb)
    tab.add_row("beats per hour", f"{e.beats_per_hour:.0f}",
                f"{src.get(e.nominal_source, e.nominal_source)}; heard {e.beats_per_hour_heard:.2f} "
                f"({'balance' if e.balance else 'pendulum'})")
    tab.add_row("beat interval", f"{e.beat_interval_s * 1e3:.3f} ms", "mean, from the line through the beats")
    if e.beat_asymmetry_ms is not None:
        tab.add_row("beat asymmetry", f"{e.beat_asymmetry_ms:+.2f} ms",
                    f"95 % ± {e.beat_asymmetry_ci95_ms:.2f}; {abs(e.beat_asymmetry_percent or 0):.1f} % of the beat; "
                    f"tick→tock minus tock→tick, each beat at its {e.beat_reference.replace('-', ' ')}")
    for side, (lt, ci, n) in enumerate(zip(e.lift_time_ms, e.lift_time_ci95_ms, e.lifts_measured)):
        if lt is not None:
            tab.add_row(f"lift time, {'tick' if side == 0 else 'tock'}", f"{lt:.2f} ms",
                        f"95 % ± {ci:.2f}; unlocking to drop, {n} beats")
    if e.amplitude_deg is not None:
        tab.add_row("amplitude", f"{e.amplitude_deg:.0f}°", f"95 % ± {e.amplitude_ci95_deg:.0f}; lift angle "
                    f"{e.lift_angle_deg:g}° ({'given' if e.lift_angle_given else 'assumed: --lift-angle'})")
    if e.beat_scatter_us is not None:
        tab.add_row("beat scatter", f"{e.beat_scatter_us / 1e3:.3f} ms", "RMS about the line, each side's offset removed")
    tab.add_row("beats heard", f"{s.steps_detected}", f"{e.missed_beats} missed; {len(e.stops)} stops")
    tab.add_row("other sounds", f"{s.rejected_events}", f"off the beats, ignored; {s.secondary_impacts} later sounds within beats")
    tab.add_row("beat level", *_level_cells(s))


def _escapement_part(e) -> list[RenderableType]:
    """The two sides of the beat drawn to scale: tick→tock and tock→tick as bars of their length."""
    a = e.beat_asymmetry_ms
    if a is None:
        return []
    beat_ms = e.beat_interval_s * 1e3
    long_ms = [beat_ms + a / 2, beat_ms - a / 2]  # tick->tock, tock->tick
    # a scale that shows the difference: bars from (beat - 4 |a| - 1 ms) to the longer one
    lo = max(0.0, beat_ms - 4 * abs(a) - 1.0)
    hi = max(long_ms) + 0.2
    w = 40
    out = [Text("the two halves of the beat", style="bold")]
    for name, v in zip(("tick→tock", "tock→tick"), long_ms):
        n = int(round((v - lo) / (hi - lo) * w))
        out.append(Text.assemble(f"  {name} ", ("█" * n, "cyan"), f" {v:.2f} ms"))
    out.append(Text(f"  (bars start at {lo:.1f} ms)", style="dim"))
    return out


def _ringdown_part(s: Summary) -> list[RenderableType]:
    rt = Table(box=box.SIMPLE_HEAD, show_edge=False, pad_edge=False)
    rt.add_column("polarity")
    rt.add_column("decay τ, median", justify="right")
    rt.add_column("IQR", justify="right")
    rt.add_column("T60", justify="right")
    rt.add_column("steps", justify="right")
    rt.add_column("abnormal", justify="right")
    rt.add_column("bent", justify="right")
    for p, v in sorted(s.ringdown.items()):
        rt.add_row(p, f"{v.decay_ms_median:.2f} ms", f"{v.decay_ms_iqr:.2f} ms", f"{6.908 * v.decay_ms_median:.1f} ms",
                   str(v.n), str(v.n_abnormal), str(v.n_bent))
    return [Text("ring-down (amplitude e-folding time)", style="bold"), rt]


def _diagnosis_rows(tab, dg) -> None:
    """The quartz diagnostics' rows of the readings table."""
    inh = dg.inhibition
    if inh:
        tab.add_row("logic regulation", f"{inh.correction_us:.1f} µs", f"every {inh.period_s:g} s "
                    f"(≈ {inh.pulses_32768:.1f} pulses of 32768 Hz); crystal alone {inh.crystal_rate_s_per_day:+.3f} s/day")
    else:
        tab.add_row("logic regulation", "none heard", "provisional: record 4 min" if dg.rate_provisional else "")
    if dg.bursts:
        tab.add_row("stepping", "bursts", f"{dg.bursts.steps_per_burst} steps every {dg.bursts.burst_period_s:g} s: "
                    "cell at end of life")
    if dg.failed.count:
        tab.add_row("failed steps", str(dg.failed.count), f"{dg.failed.correction_pulses} corrected; "
                    f"{round(dg.failed.seconds_lost, 3):g} s lost")
    if dg.asymmetry is not None:
        tab.add_row("A→B − B→A", f"{dg.asymmetry.value_us:+.1f} µs", f"± {dg.asymmetry.ci95_us:.1f} (95 %)")
