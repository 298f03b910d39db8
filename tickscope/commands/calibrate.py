"""``tickscope calibrate``: measure the audio device's clock and keep it as a named profile."""
from __future__ import annotations

import dataclasses
import math
import os
import re
import sys

from ..errors import NoStepsError, ParameterError, TickscopeError
from ..units import ppm_to_s_per_day
from .common import console, write_json

#: A profile whose 95 % half-width is wider than this is not saved.  A quartz movement is commonly
#: held to about +-15 s/month, 0.5 s/day or 5.8 ppm (common practice, from memory): a calibration
#: unsure by more than 5 ppm (0.43 s/day) cannot tell such a movement in its tolerance from one out
#: of it (our own choice).
MAX_USEFUL_U95_PPM = 5.0


class TooUncertain(TickscopeError):
    """The calibration's interval is too wide to be worth a profile (nothing is saved)."""

    exit_code = 3


def correction_words(ppm: float) -> str:
    """What a device clock off by ``ppm`` does to the rates measured on it, and what tickscope does."""
    spd = abs(ppm_to_s_per_day(ppm))
    if ppm >= 0:
        return f"rates measured on it read {spd:.3f} s/day slow; tickscope adds that back"
    return f"rates measured on it read {spd:.3f} s/day fast; tickscope takes that off"


def run(args) -> int:
    from ..io import profiles

    if args.list:
        return _list(args)
    if not args.name:
        raise ParameterError("calibrate needs a profile NAME (or --list)")
    sync = profiles.host_sync_status()
    fit, samplerate = None, float(args.samplerate)
    if args.reference:
        ppm, u, dur, method, device, note, setup = _from_reference(args)
    else:
        fit, samplerate, method, device, setup = _from_readings(args)
        ppm, u, dur = fit.ppm, fit.ci95_ppm, fit.span_s
        note = _fit_note(fit)
    out = {"name": args.name, "ppm": float(ppm), "u95_ppm": float(u), "method": method, "duration_s": float(dur),
           "device": device, "host_sync": sync, "note": note, "setup": setup,
           "s_per_day": round(ppm_to_s_per_day(ppm), 4)}
    if fit is not None:
        out |= {"u95_statistical_ppm": fit.ci95_statistical_ppm, "u95_block_wait_ppm": fit.wait_bound_ppm,
                "pick_rms_ms": fit.pick_rms_ms, "delay_rms_ms": fit.delay_rms_ms,
                "seconds_for_1ppm": round(fit.needed_span_s(1.0), 0),
                "seconds_for_0.1ppm": round(fit.needed_span_s(0.1), 0)}
    if not (u <= MAX_USEFUL_U95_PPM):
        out |= {"saved": False, "seconds_needed": _seconds_needed(fit, dur, u)}
        if args.json:
            write_json(out)
        raise TooUncertain(_refusal(args, ppm, u, fit, dur, samplerate))
    pr = profiles.ClockProfile(args.name, float(ppm), float(u), method, profiles.now_iso(), float(dur), device, sync,
                               note, setup)
    path = profiles.save(pr)
    out |= {"saved": True, "profile_file": path, "created": pr.created}
    if args.json:
        write_json(out)
        return 0
    con = console()
    con.print(f"[bold]{args.name}[/bold]: the device clock runs {'fast' if ppm >= 0 else 'slow'} by "
              f"{abs(ppm):.3f} ± {u:.3f} ppm (95 %): {correction_words(ppm)}")
    con.print(f"method: {method}; {note}; host clock: {sync}; saved to {path}")
    if fit is not None:
        con.print(f"for ±1 ppm capture about {out['seconds_for_1ppm']:.0f} s, for ±0.1 ppm about "
                  f"{out['seconds_for_0.1ppm']:.0f} s; the host clock itself should be disciplined (NTP or GPS)")
        if sync not in ("synchronised (NTP)", "synchronised (chrony)"):
            con.print("[yellow]the system does not say its clock is synchronised: the result is only as good as "
                      "the host clock[/yellow]")
    return 0


def _fit_note(fit) -> str:
    parts = [f"{fit.n_blocks} blocks ({fit.blocks}"
             + (f", {fit.block_frames} frames" if fit.block_frames else "") + ")",
             f"least delays scatter {fit.pick_rms_ms:.3f} ms rms",
             f"delays above the least {fit.delay_rms_ms:.1f} ms rms"]
    if fit.steps:
        parts.append(f"{len(fit.steps)} host clock step{'s' * (len(fit.steps) > 1)} allowed for")
    if fit.shifts:
        parts.append(f"{len(fit.shifts)} delivery shift{'s' * (len(fit.shifts) > 1)} allowed for")
    if fit.gaps:
        parts.append(f"{fit.gaps} stretch{'es' * (fit.gaps > 1)} after lost audio")
    if fit.wait_bound_ppm > 0:
        parts.append(f"± {fit.wait_bound_ppm:.2f} ppm of it for the blocks' wait")
    return ", ".join(parts)


def _seconds_needed(fit, dur: float, u: float) -> float:
    """About how long a run would bring the half-width within the limit."""
    if fit is not None:
        return float(math.ceil(fit.needed_span_s(MAX_USEFUL_U95_PPM)))
    # a recording's rate: white timing noise narrows its interval as duration^-1.5
    if not (u > 0 and dur > 0):
        return float("nan")
    return float(math.ceil(dur * (u / MAX_USEFUL_U95_PPM) ** (2.0 / 3.0)))


def _refusal(args, ppm: float, u: float, fit, dur: float, samplerate: float) -> str:
    """The one line that says why nothing was saved and what would do."""
    head = (f"not saved: {args.name} reads {ppm:+.2f} ± {u:.2f} ppm (95 %), too wide to help "
            f"(limit ± {MAX_USEFUL_U95_PPM:g} ppm = {ppm_to_s_per_day(MAX_USEFUL_U95_PPM):.2f} s/day)")
    need = _seconds_needed(fit, dur, u)
    if not math.isfinite(need):
        return head
    if fit is None:
        return f"{head}; a reference recording of about {_duration(need)} would do"
    if fit.wait_bound_ppm > 0.5 * u:
        why = (f"its blocks of {fit.block_frames} frames wait up to {fit.block_frames / samplerate * 1e3:.1f} ms "
               "for the rest of the device's chunk")
        how = f"about {_duration(need)} of capture would do, or a live calibrate --device"
    else:
        why = f"its least-delayed readings scatter by {fit.pick_rms_ms:.3f} ms rms"
        how = (f"about {_duration(need)} of capture would do" if args.from_blocks
               else f"--seconds {need:.0f} would do")
    return f"{head}: {why}; {how}"


def _duration(s: float) -> str:
    if s < 120:
        return f"{s:.0f} s"
    if s < 7200:
        return f"{s / 60:.0f} min"
    return f"{s / 3600:.1f} h"


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
    from rich import box
    from rich.table import Table

    con.print(f"clock profiles in {profiles.config_dir()}", overflow="fold")
    # five columns, the wordy ones wrapping between words, so that 80 columns hold them
    t = Table(box=box.SIMPLE_HEAD, show_edge=False, pad_edge=False)
    t.add_column("name", max_width=16)
    t.add_column("ppm (95 %)", justify="right", no_wrap=True)
    t.add_column("s/day", justify="right", no_wrap=True)
    t.add_column("made", max_width=12)
    t.add_column("measured")
    for v in allp.values():
        age = v.age_days()
        made = _age(age) + (" [red]stale[/red]" if age > args.max_age_days else "")
        how = (f"{_SHORT_METHOD.get(v.method, v.method)}, {_duration(v.duration_s)}; "
               f"host {_short_sync(v.host_sync)}")
        t.add_row(v.name, f"{v.ppm:+.3f} ± {v.u95_ppm:.3f}", f"{ppm_to_s_per_day(v.ppm):+.3f}", made, how)
    con.print(t)
    return 0


_SHORT_METHOD = {"host-clock": "host clock", "reference": "reference", "saved-capture": "saved capture"}


def _short_sync(s: str) -> str:
    return {"synchronised (NTP)": "NTP", "synchronised (chrony)": "chrony", "not synchronised": "not synced"}.get(s, s)


def _age(days: float) -> str:
    if not math.isfinite(days):
        return "date unknown"
    if days < 1 / 24:
        return f"{max(days * 1440, 0):.0f} min ago"
    if days < 2:
        return f"{days * 24:.0f} h ago"
    return f"{days:.0f} days ago"


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
    return ppm, u, sm.duration_s, "reference", args.device or "", note, "a recording through the device"


def _read_columns(path: str, n: int):
    """The frames and adc_time_s columns of a saved capture's PATH.blocks.csv (None where absent,
    unreadable or of another length; a capture time of 0 or empty is no capture time)."""
    import csv

    import numpy as np

    def num(v):
        try:
            x = float(v)
        except (TypeError, ValueError):
            return float("nan")
        return x if x != 0 else float("nan")

    try:
        with open(path) as f:
            rows = list(csv.DictReader(f))
    except (OSError, ValueError):
        return None, None
    if len(rows) != n:
        return None, None
    fr = np.array([num(r.get("frames")) for r in rows])
    adc = np.array([num(r.get("adc_time_s")) for r in rows])
    return (fr if np.isfinite(fr).all() else None), (adc if np.isfinite(adc).any() else None)


def _from_readings(args):
    """The device clock against the host clock: from a saved capture's readings, or a capture now."""
    import numpy as np

    from ..core.clockfit import fit_device_clock

    if args.from_blocks:
        from ..io.audiofile import read_block_readings

        rows, samplerate = read_block_readings(args.from_blocks)
        samplerate = samplerate or args.samplerate
        method, device = "saved-capture", args.device or ""
        frames, adc = _read_columns(args.from_blocks, len(rows))
        block_frames = None  # inferred from the frames: listen and log read fixed blocks
        setup = "as saved by listen --save"
    else:
        from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

        from ..io.capture import CALIBRATION_BLOCKSIZE, clock_readings, resolve_device

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
        frames = arr[:, 1] if len(arr) else None
        rows = [(a, c) for a, _, c in rows]
        block_frames, adc = CALIBRATION_BLOCKSIZE, None
        setup = f"latency {args.latency}, blocks as delivered"
    arr = np.array(rows)
    if len(arr) < 16:
        raise ParameterError("too few blocks were captured to calibrate")
    fit = fit_device_clock(arr[:, 0], arr[:, 1], samplerate, frames=frames, block_frames=block_frames,
                           adc_time_s=adc)
    return fit, samplerate, method, device, setup
