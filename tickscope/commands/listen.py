"""``tickscope listen``: a microphone through the pipeline, with a live screen."""
from __future__ import annotations

import dataclasses
import json
import sys
import time

from ..errors import DeviceError, ParameterError
from ..model import CaptureInfo
from .common import PeakMeter, Refit, clock_from_args, console, movement_options, write_json


def run(args) -> int:
    from ..core.detect import DetectorConfig
    from ..export import summary_to_dict
    from ..io.audiofile import LiveRecorder
    from ..io.capture import Capture, resolve_device
    from ..windowprobe import WindowProbe

    if not 8000 <= args.samplerate <= 192000:
        raise ParameterError(f"--rate-hz {args.samplerate}: expected 8000..192000")
    dev = resolve_device(args.device)
    clock = clock_from_args(args, device_name=args.device)
    # short processing chunks: a step reaches the screen promptly (results equal those of `analyze`);
    # auto: an escapement is heard again with its own window after the first seconds (lift times)
    an = WindowProbe(args.samplerate, channel=args.channel, clock_ppm=clock.ppm, clock_ppm_u95=clock.u95_ppm,
                     detector=DetectorConfig(chunk_s=0.25), **movement_options(args))
    rec = LiveRecorder(args.save, args.samplerate) if args.save else None
    # ~43 ms blocks: fewer wake-ups than the driver's default (less CPU), well inside the 0.25 s chunk
    cap = Capture(dev, args.samplerate, channel=args.channel, blocksize=2048)
    src = args.device if args.device is not None else "default input"
    t0 = time.monotonic()
    stop_note, rec_error = _capture(an, cap, rec, args, str(src))
    summary = an.finish()
    notes = list(summary.warnings) + ([rec_error] if rec_error else [])
    summary = dataclasses.replace(
        summary, warnings=notes, clock_calibrated=clock.ppm is not None, time_base=clock.time_base,
        capture=CaptureInfo(str(src), cap.overflows, cap.dropped_frames, round(time.monotonic() - t0, 3),
                            stop_note or "completed"))
    d = summary_to_dict(summary, source=f"device:{src}")
    if args.save:
        try:
            with open(args.save + ".json", "w") as f:
                json.dump(d, f, indent=1)
        except OSError as e:
            sys.stderr.write(f"tickscope: cannot write {args.save}.json: {e.strerror}\n")
    if args.json:
        write_json(d)
    else:
        from ..ui.textreport import render_summary

        con = console()
        con.print(render_summary(summary, source=f"{src} (live)", width=con.width))
    if stop_note and stop_note.startswith("capture ended"):
        sys.stderr.write(f"tickscope: {stop_note}; everything up to then is kept\n")
        return 2
    return 0


def _capture(an, cap, rec, args, src: str) -> tuple[str | None, str | None]:
    """Capture until the duration, Ctrl-C or the device's end; returns (why it stopped, recording error)."""
    stop_note = rec_error = None
    meter = PeakMeter()
    live = con = None
    try:
        with cap:
            if not args.json:
                from rich.live import Live

                con = console()
                live = Live(console=con, refresh_per_second=4, transient=False, auto_refresh=False)
                live.start()
            last_draw = 0.0
            refit = Refit(an.summary)
            for b in cap.blocks():
                new_step = any(ev.kind == "step" for ev in an.feed(b))
                if rec:
                    try:
                        rec.write(b)
                    except (OSError, RuntimeError) as e:  # a full disk: stop recording, keep listening
                        rec_error = f"recording stopped at {an.duration_s:.1f} s: {e}"
                        _close_quietly(rec)
                        rec = None
                now = time.monotonic()
                level = meter.update(b.samples, now)
                # redraw as soon as a step is decided, and at least twice a second
                if live is not None and (new_step or now - last_draw >= 0.4):
                    from ..ui.dashboard import LiveStatus, render_live

                    st = LiveStatus(src, args.samplerate, args.channel, an.duration_s, level,
                                    cap.overflows + (1 if cap.dropped_frames else 0), args.save)
                    live.update(render_live(refit.get(now), st, width=min(con.width, 160)), refresh=True)
                    last_draw = now
                if args.duration and an.duration_s >= args.duration:
                    break
    except KeyboardInterrupt:
        stop_note = "stopped by Ctrl-C"
    except DeviceError as e:
        stop_note = f"capture ended: {e}"
    finally:
        if live is not None:
            live.stop()
        if rec:
            rec.close()
    return stop_note, rec_error


def _close_quietly(rec) -> None:
    try:
        rec.close()
    except (OSError, RuntimeError):
        pass
