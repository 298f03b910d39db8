"""Layout helpers shared by the screens: time units chosen from a span, durations in words,
lines that break only between phrases, and paragraphs with a hanging indent."""
from __future__ import annotations

import math

from rich.cells import cell_len
from rich.table import Table
from rich.text import Text

#: A level over the noise beyond this (dB) is over digital silence (exact zeros between the sounds:
#: a gated or edited file), not over any noise a microphone hears (24-bit audio spans 144 dB)
DIGITAL_SILENCE_DB = 150.0

#: (name, seconds per unit), smallest first.
TIME_UNITS = (("s", 1.0), ("min", 60.0), ("h", 3600.0), ("days", 86400.0))


def time_unit(span_s: float) -> tuple[str, float]:
    """The unit a time axis spanning ``span_s`` reads best in, and its length in seconds:
    seconds up to 3 minutes, minutes up to 3 hours, hours up to 4 days (a weekend log, whose
    rates are given per hour), days beyond."""
    span_s = abs(span_s) if math.isfinite(span_s) else 0.0
    if span_s <= 180:
        return TIME_UNITS[0]
    if span_s <= 3 * 3600:
        return TIME_UNITS[1]
    if span_s <= 4 * 86400:
        return TIME_UNITS[2]
    return TIME_UNITS[3]


def axis_label(v: float, unit: str) -> str:
    """A time axis end label in its unit: '0 s', '59 s', '12.5 min', '61 h'."""
    if abs(v) < 1e-9:
        return f"0 {unit}"
    return f"{v:.3g} {unit}" if abs(v) < 100 else f"{v:.0f} {unit}"


def duration_words(s: float) -> str:
    """A duration as a repairer says it: '58 s', '12 min 05 s', '2 h 05 min', '2 days 03 h'."""
    s = max(0.0, float(s)) if math.isfinite(s) else 0.0
    if s < 60:
        return f"{s:.0f} s" if s >= 9.5 else f"{s:.1f} s"
    if s < 3600:
        m, sec = divmod(int(round(s)), 60)
        return f"{m} min {sec:02d} s"
    if s < 86400:
        h, m = divmod(int(round(s / 60)), 60)
        return f"{h} h {m:02d} min"
    d, h = divmod(int(round(s / 3600)), 24)
    return f"{d} day{'s' if d != 1 else ''} {h:02d} h"


def phrase_lines(phrases, width: int, *, sep: str = "  ", indent: str = "  ") -> Text:
    """Phrases (``(text, style)`` pairs or rich Texts) on as few lines as fit ``width``, broken
    only between phrases; a continuation line starts with ``indent``.  A phrase longer than a
    line is left to wrap by itself."""
    out = Text()
    used = 0
    for ph in phrases:
        ph = ph if isinstance(ph, Text) else Text(ph[0], style=ph[1])
        if not ph.plain:
            continue
        n = ph.cell_len
        if used and used + cell_len(sep) + n > width:
            out.append("\n" + indent)
            used = cell_len(indent)
        elif used:
            out.append(sep)
            used += cell_len(sep)
        out.append_text(ph)
        used += n
    return out


def hanging(marker: str, text: str | Text, *, style: str = "") -> Table:
    """A paragraph whose wrapped lines start under its first word, not under ``marker``."""
    grid = Table.grid(padding=0, expand=True)
    grid.add_column(no_wrap=True, width=cell_len(marker))
    grid.add_column(ratio=1, overflow="fold")
    body = text if isinstance(text, Text) else Text(text, style=style)
    grid.add_row(Text(marker, style=style), body)
    return grid
