"""``tickscope calibrate``: measure the audio device's clock and keep it as a named profile."""
from __future__ import annotations

import dataclasses
import os
import re
import sys

from ..errors import NoStepsError, ParameterError
from ..units import ppm_to_s_per_day
from .common import console, write_json


def run(args) -> int:
    from ..io import profiles

    if args.list:
        return _list(args)
    if not args.name:
        raise ParameterError("calibrate needs a profile NAME (or --list)")
    sync = profiles.host_sync_status()
    fit = None
    if args.reference:
        ppm, u, dur, method, device, note = _from_reference(args)
    else:
        fit, samplerate, method, device = _from_readings(args)
        ppm, u, dur = fit.ppm, fit.ci95_ppm, fit.span_s
        note = (f"{fit.n_blocks} blocks, delay scatter {fit.delay_rms_ms:.2f} ms rms"
                + (f"; {len(fit.steps)} host clock steps removed" if fit.steps else ""))
    pr = profiles.ClockProfile(args.name, float(ppm), float(u), method, profiles.now_iso(), float(dur), device, sync, note)
    path = profiles.save(pr)
    out = dataclasses.asdict(pr) | {"profile_file": path, "s_per_day": round(ppm_to_s_per_day(ppm), 4)}
    if fit is not None:
        out["seconds_for_1ppm"] = round(fit.needed_span_s(1.0), 0)
        out["seconds_for_0.1ppm"] = round(fit.needed_span_s(0.1), 0)
    if args.json:
        write_json(out)
        return 0
    con = console()
    con.print(f"[bold]{args.name}[/bold]: the device clock runs {'fast' if ppm >= 0 else 'slow'} by "
              f"{abs(ppm):.3f} ± {u:.3f} ppm (95 %) = {ppm_to_s_per_day(ppm):+.3f} s/day on every rate it measures")
    con.print(f"method: {method}; {note}; host clock: {sync}; saved to {path}")
    if fit is not None:
        con.print(f"for ±1 ppm capture about {out['seconds_for_1ppm']:.0f} s, for ±0.1 ppm about "
                  f"{out['seconds_for_0.1ppm']:.0f} s; the host clock itself should be disciplined (NTP or GPS)")
        if sync not in ("synchronised (NTP)", "synchronised (chrony)"):
            con.print("[yellow]the system does not say its clock is synchronised: the result is only as good as "
                      "the host clock[/yellow]")
    return 0


def _list(args) -> int:
    from ..io import profiles

    allp = profiles.load_all()
    if args.json:
        write_json({k: dataclasses.asdict(v) | {"age_days": round(v.age_days(), 2), "stale": v.age_days() > args.max_age_days}
                    for k, v in allp.items()})
        return 0
    con = console()
    if not allp:
        con.print(f"no clock profiles yet in {profiles.config_dir()} (run: tickscope calibrate NAME --device ...)")
        return 0
    from rich.table import Table

    t = Table(title=f"clock profiles ({profiles.config_dir()})", title_justify="left")
    for c in ("name", "ppm", "± 95 %", "s/day", "method", "date", "run", "host clock", "age"):
        t.add_column(c)
    for v in allp.values():
        age = v.age_days()
        t.add_row(v.name, f"{v.ppm:+.3f}", f"{v.u95_ppm:.3f}", f"{ppm_to_s_per_day(v.ppm):+.3f}", v.method,
                  v.created[:10], f"{v.duration_s:.0f} s", v.host_sync,
                  f"{age:.0f} d" + (" [red]stale[/red]" if age > args.max_age_days else ""))
    con.print(t)
    return 0


def _from_reference(args):
    """A recording, through the device, of a movement of known rate: the rate it reads on the device."""
    from ..core.clockfit import ppm_from_reference
    from ..io.audiofile import blocks, choose_channel, probe
    from ..pipeline import Analyzer

    if args.known_rate is None:
        raise ParameterError("--reference needs --known-rate R[+-U] (s/day)")
    info = probe(args.reference)
    ch = choose_channel(args.reference, info)
    an = Analyzer(info.samplerate, channel=ch, clock_ppm=0.0)
    for b in blocks(args.reference, info, ch):
        an.feed(b)
    sm = an.finish()
    if sm.rate is None:
        raise NoStepsError(f"no rate could be measured in {args.reference}")
    known, known_u = args.known_rate
    stat = sm.rate_ci95_statistical_s_per_day or sm.rate.ci95_s_per_day
    ppm, u = ppm_from_reference(known, known_u, sm.rate.rate_s_per_day, stat)
    note = f"reference {os.path.basename(args.reference)} of known rate {known:+g} ± {known_u:g} s/day"
    return ppm, u, sm.duration_s, "reference", args.device or "", note


def _from_readings(args):
    """The device clock against the host clock: from a saved capture's readings, or a capture now."""
    import numpy as np

    from ..core.clockfit import fit_device_clock

    if args.from_blocks:
        from ..io.audiofile import read_block_readings

        rows, samplerate = read_block_readings(args.from_blocks)
        samplerate = samplerate or args.samplerate
        method, device = "saved-capture", args.device or ""
    else:
        from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

        from ..io.capture import clock_readings, resolve_device

        dev = resolve_device(args.device)
        latency = float(args.latency) if re.fullmatch(r"[0-9.]+", args.latency) else args.latency
        with Progress(TextColumn("calibrating"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"),
                      TimeRemainingColumn(), console=console(stderr=True), transient=True,
                      disable=args.json) as prog:
            task = prog.add_task("c", total=args.seconds)
            rows, interrupted = clock_readings(dev, args.samplerate, args.seconds, latency=latency,
                                  progress=lambda el: prog.update(task, completed=el))
        if interrupted:
            sys.stderr.write("tickscope: interrupted; fitting what was captured\n")
        samplerate = args.samplerate
        method, device = "host-clock", str(args.device or "default input")
    arr = np.array(rows)
    if len(arr) < 16:
        raise ParameterError("too few blocks were captured to calibrate")
    return fit_device_clock(arr[:, 0], arr[:, 1], samplerate), samplerate, method, device
