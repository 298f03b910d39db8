"""``tickscope devices``: the audio input devices PortAudio can use."""
from __future__ import annotations

import dataclasses

from .common import console, write_json


def run(args) -> int:
    from ..io.capture import list_devices

    devs = list_devices()
    if args.json:
        write_json([dataclasses.asdict(d) for d in devs])
        return 0
    from rich.table import Table

    t = Table(title="input devices", title_justify="left")
    for c in ("", "index", "name", "host API", "default rate", "channels"):
        t.add_column(c)
    for d in devs:
        t.add_row("*" if d.is_default else "", str(d.index), d.name, d.hostapi, f"{d.default_samplerate_hz:g} Hz",
                  str(d.input_channels))
    con = console()
    if not devs:
        con.print("no input devices found (is a microphone connected, and the sound server running?)")
        return 2
    con.print(t)
    con.print("[dim]* = default input; choose with --device INDEX or a part of the name[/dim]")
    return 0
