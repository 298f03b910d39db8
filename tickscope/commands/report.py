"""``tickscope report``: a log database's figures as a report, JSON, CSV and plots."""
from __future__ import annotations

import argparse
import dataclasses
import json
import os

from .. import advice
from ..errors import ParameterError, StoreError, TickscopeError
from .common import clock_from_args, console, write_json


def run(args) -> int:
    from ..core.logstats import log_figures
    from ..export import log_to_dict, write_log_csv
    from ..io.store import LogStore

    store = LogStore(args.db, readonly=True)
    try:
        segs = store.segments()
        if not segs:
            raise StoreError(f"log {args.db}: holds no segments yet")
        meta = store.meta()
        ev = store.events()
        gaps = store.gaps()
        minutes = store.minutes()
        device_clock = _device_clock(store, segs)
    finally:
        store.db.close()
    segs, over_ppm, over_u, time_base = _time_base(args, segs, device_clock)
    fig = log_figures(segs, ev, gaps=gaps, minutes=minutes, override_ppm=over_ppm, override_u95=over_u,
                      sounds=_segment_sounds(meta, segs), lossy={s.id for s in segs if meta.get(f"segment {s.id} lossy") == "1"})
    for s in segs:
        n_bad = meta.get(f"segment {s.id} nonfinite", "")
        if n_bad.isdigit():  # written by log as a count; anything else is not ours to read
            fig.notes.append(f"segment {s.id}: " + advice.nonfinite_note(int(n_bad)))
    if args.steps_csv:
        with open(args.steps_csv, "w", newline="") as fh:
            write_log_csv(fh, fig.event_t, fig.event_k, ev, fig.event_pol)
    d = log_to_dict(fig, db=args.db, meta=meta, segments=segs, time_base=time_base, device_clock=device_clock)
    label = meta.get("label") or os.path.basename(args.db)
    if args.out:
        from ..ui.plots import plot_log

        try:
            os.makedirs(args.out, exist_ok=True)
        except OSError as e:
            raise ParameterError(f"cannot create {args.out}: {e.strerror}") from e
        d["plots"] = plot_log(fig, args.out, title=label)
        with open(os.path.join(args.out, "report.json"), "w") as fh:
            json.dump(d, fh, indent=1)
    if args.json:
        write_json(d)
    else:
        from ..ui.logview import render_log

        con = console()
        con.print(render_log(fig, db=os.path.basename(args.db), label=meta.get("label") or "", time_base=time_base,
                             width=min(con.width, 140), device_clock=device_clock))
        if args.out:
            con.print(f"[dim]plots: {', '.join(d['plots'])}[/dim]")
    return 0


def _time_base(args, segs, device_clock):
    """The segments with the correction the options ask for, the whole-log override, and the time base."""
    over_ppm, over_u, time_base = None, 0.0, None
    if args.clock_from_host:
        if args.clock_ppm is not None or args.clock_profile:
            raise ParameterError("give one of --clock-ppm, --clock-profile and --clock-from-host")
        fits = {d["segment"]: d for d in device_clock}
        if not fits:
            raise ParameterError(f"{args.db} has no device segment of 10 minutes or more with clock readings: "
                                 "nothing to calibrate from")
        segs = [dataclasses.replace(s, clock_ppm=fits[s.id]["ppm"], clock_ppm_u95=fits[s.id]["ci95_ppm"],
                                    time_base=f"calibrated against the host clock over each segment (host "
                                              f"{fits[s.id]['host_sync']})")
                if s.id in fits else s for s in segs]
    if args.clock_ppm is not None or args.clock_profile:
        c = clock_from_args(args)
        over_ppm, over_u, time_base = c.ppm, c.u95_ppm, c.time_base
    elif all(s.clock_ppm is not None for s in segs):
        time_base = "; ".join(sorted({s.time_base or f'corrected by {s.clock_ppm:+g} ppm' for s in segs}))
    else:
        time_base = clock_from_args(argparse.Namespace()).time_base
        if any(s.clock_ppm is not None for s in segs):
            time_base = "mixed: some segments corrected, some on the device clock"
    return segs, over_ppm, over_u, time_base


def _segment_sounds(meta: dict, segs) -> dict:
    """What each segment's sound was, as stored by log at its end (older logs lack it)."""
    sounds = {}
    for s in segs:
        raw = meta.get(f"segment {s.id} sound")
        if raw:
            try:
                sounds[s.id] = json.loads(raw)
            except ValueError:
                pass
    return sounds


def _device_clock(store, segs) -> list[dict]:
    """The device clock against the host clock, per device segment long enough to say (from its block readings)."""
    from ..core.clockfit import fit_device_clock

    out = []
    for s in segs:
        if s.source_kind != "device":
            continue
        start, host = store.blocks(s.id)
        if len(start) < 16 or (start[-1] - start[0]) / s.samplerate < 600:
            continue
        try:
            f = fit_device_clock(start, host, s.samplerate, segments=min(64, len(start) // 2))
        except TickscopeError:
            continue
        out.append({"segment": s.id, "ppm": round(f.ppm, 3), "ci95_ppm": round(f.ci95_ppm, 3),
                    "span_s": round(f.span_s, 1), "host_sync": s.host_sync or "unknown"})
    return out
