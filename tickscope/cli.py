"""Command line: wires sources and sinks to the pipeline; the only place errors become exit codes.

Exit codes: 0 ok, 2 bad usage or unreadable input, 3 no steps could be found,
130 interrupted (Ctrl-C).
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import math
import os
import re
import sys

from . import __version__
from .errors import NoStepsError, ParameterError, TickscopeError

# numpy's BLAS starts a thread per core for products of a few thousand numbers, the size of the
# per-step work, and spends more CPU than it saves (measured: ~0.1 s more per hour of audio, no
# faster). One thread, unless the user has set it.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")


def _keep_freed_memory() -> None:
    """Let glibc's malloc keep freed blocks for reuse instead of handing each large one back.

    The analysis makes and drops arrays of a few hundred kB to a few MB many times a second (FFT
    rows, audio blocks, numpy's and pocketfft's temporaries).  By default glibc maps each such
    block fresh from the kernel and unmaps it when freed, so every use pays a page fault per 4 kB;
    on virtual machines a fault can cost microseconds (a batch of single-precision FFTs here ran
    4x slower for it).  Blocks below 32 MB now come from the heap and are reused; the peak memory
    is unchanged (benchmarks/run.py prints it).  Elsewhere than glibc this does nothing."""
    if not sys.platform.startswith("linux"):
        return
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6")
        m_trim_threshold, m_top_pad, m_mmap_threshold = -1, -2, -3  # malloc.h
        libc.mallopt(m_mmap_threshold, 32 << 20)
        libc.mallopt(m_trim_threshold, 64 << 20)
        libc.mallopt(m_top_pad, 16 << 20)
    except (OSError, AttributeError):  # not glibc (musl, say): its own allocator, left as it is
        pass

DEMO_RECORDING = "kitchen-wall-clock.flac"


def _recordings_dir() -> str:
    here = os.path.dirname(os.path.abspath(__file__))
    for cand in (os.path.join(here, "recordings"), os.path.join(os.path.dirname(here), "recordings")):
        if os.path.isdir(cand):
            return cand
    return os.path.join(os.path.dirname(here), "recordings")


def parse_ppm(text: str) -> tuple[float, float]:
    """'12.5' or '12.5+-0.3' or '12.5±0.3' -> (ppm, u95)."""
    m = re.fullmatch(r"\s*([-+]?\d+(?:\.\d*)?(?:[eE][-+]?\d+)?)\s*(?:(?:\+-|±|\+/-)\s*(\d+(?:\.\d*)?(?:[eE][-+]?\d+)?))?\s*", text)
    if not m:
        raise argparse.ArgumentTypeError(f"{text!r} is not a ppm value like 12.5 or 12.5+-0.3")
    return float(m.group(1)), float(m.group(2) or 0.0)


# ---------------------------------------------------------------------------------------------
def _clock(args, device_name: str | None = None) -> tuple[float | None, float, str]:
    """(ppm, u95, time-base statement) from --clock-ppm / --clock-profile (or a device's own profile)."""
    from .io import profiles
    from .pipeline import TYPICAL_DEVICE_PPM
    from .units import ppm_to_s_per_day

    if getattr(args, "clock_ppm", None) is not None and getattr(args, "clock_profile", None):
        raise ParameterError("give either --clock-ppm or --clock-profile, not both")
    if getattr(args, "clock_ppm", None) is not None:
        ppm, u = args.clock_ppm
        return ppm, u, f"corrected by --clock-ppm {ppm:+g} (± {u:g} ppm, 95 %)"
    name = getattr(args, "clock_profile", None)
    auto = False
    if not name and device_name:
        if device_name in profiles.load_all():
            name, auto = device_name, True
    if name:
        pr = profiles.get(name)
        stale = " — STALE, recalibrate" if pr.age_days() > STALE_DAYS else ""
        how = {"host-clock": "against the host clock", "reference": "against a reference recording",
               "saved-capture": "against the host clock (saved capture)"}.get(pr.method, pr.method)
        return pr.ppm, pr.u95_ppm, (f"calibrated {how} on {pr.created[:10]} ({pr.ppm:+.2f} ± {pr.u95_ppm:.2f} ppm, "
                                    f"profile {pr.name}{', used by default for this device' if auto else ''}){stale}")
    return None, 0.0, (f"device clock, uncalibrated (typical ±{TYPICAL_DEVICE_PPM:.0f} ppm ≈ "
                       f"±{ppm_to_s_per_day(TYPICAL_DEVICE_PPM):.1f} s/day)")


STALE_DAYS = 90.0


def cmd_analyze(args) -> int:
    from .export import StepsCsv, summary_to_dict
    from .io.audiofile import blocks, choose_channel, probe
    from .pipeline import Analyzer

    path = args.path
    demo = False
    if path is None:
        path = os.path.join(_recordings_dir(), DEMO_RECORDING)
        demo = True
    info = probe(path)
    channel = args.channel
    chosen_note = ""
    if channel is None:
        channel = choose_channel(path, info)
        if info.channels > 1:
            chosen_note = f"channel {channel} of {info.channels} has the clearest steps"
    elif not 0 <= channel < info.channels:
        raise ParameterError(f"--channel {channel}: {path} has channels 0..{info.channels - 1}")
    clock_ppm, clock_u, time_base = _clock(args)
    an = Analyzer(info.samplerate, channel=channel, clock_ppm=clock_ppm, clock_ppm_u95=clock_u, lossy=info.lossy)
    csv_fh = None
    if args.steps_csv:
        try:
            csv_fh = open(args.steps_csv, "w", newline="")
        except OSError as e:
            raise ParameterError(f"cannot write {args.steps_csv}: {e.strerror}") from e
    try:
        writer = StepsCsv(csv_fh) if csv_fh else None
        tally: dict = {}
        _run_file(an, blocks(path, info, channel, tally=tally, integers=True), info, writer,
                  show_progress=not args.json and not args.quiet)
        summary = an.finish()
        if writer:
            for ev in an.drain_final_events():
                writer.write(ev)
    finally:
        if csv_fh:
            csv_fh.close()
    summary.extras["clock_calibrated"] = clock_ppm is not None
    summary.extras["time_base"] = time_base
    if summary.duration_s < info.duration_s - max(1.0, 0.01 * info.duration_s):
        summary.warnings.append(f"the file ends at {summary.duration_s:.1f} s though its header says "
                                f"{info.duration_s:.1f} s (cut short or damaged): analyzed what it holds")
    if tally.get("nonfinite"):
        summary.warnings.append(_nonfinite_note(tally["nonfinite"]))
    if chosen_note:
        summary.warnings.insert(0, chosen_note)
    if demo and not args.json:
        _console(stderr=True).print(f"[dim]no file given: analyzing the bundled demo recording {path}[/dim]")
    if args.json:
        d = summary_to_dict(summary, source=path)
        sys.stdout.write(json.dumps(d, indent=1) + "\n")
    else:
        from .ui.textreport import render_summary

        con = _console()
        con.print(render_summary(summary, source=os.path.basename(path), width=con.width))
    if args.plot:
        from .ui.plots import plot_analysis

        plot_analysis(summary, an, args.plot, title=os.path.basename(path))
    if summary.sound == "none" or summary.steps_detected == 0:
        why = summary.extras.get("sound_reason") or (summary.warnings[-1] if summary.warnings
                                                         else "no stepping pattern heard")
        raise NoStepsError(f"no steps could be found in {path}: {why}")
    return 0


def _nonfinite_note(n: int) -> str:
    return f"{n} samples of the file are not numbers (NaN or infinite: a damaged float file) and were read as silence"


def _run_file(an, block_iter, info, writer, *, show_progress: bool) -> None:
    if show_progress and info.duration_s > 60:
        from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

        with Progress(TextColumn("analyzing"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"),
                      TimeRemainingColumn(), console=_console(stderr=True), transient=True) as prog:
            task = prog.add_task("a", total=info.frames)
            for b in block_iter:
                evs = an.feed(b)
                if writer:
                    for ev in evs:
                        writer.write(ev)
                prog.update(task, completed=b.start_sample + len(b.samples))
    else:
        for b in block_iter:
            evs = an.feed(b)
            if writer:
                for ev in evs:
                    writer.write(ev)


def cmd_simulate(args) -> int:
    from .core.simulate import Scenario
    from .io.simfile import truth_path_for, write_simulation

    changes = {}
    for f in dataclasses.fields(Scenario):
        v = getattr(args, f.name, None)
        if v is not None:
            changes[f.name] = v
    try:
        sc = Scenario(**changes)
    except TypeError as e:
        raise ParameterError(str(e)) from e
    if args.compression_level is not None and not 0.0 <= args.compression_level <= 1.0:
        raise ParameterError(f"--compression-level {args.compression_level}: expected 0..1")
    truth = write_simulation(args.out, sc, description=args.description or "", compression_level=args.compression_level)
    n = sum(1 for s in truth["steps"] if s["kind"] == "step")
    _console(stderr=True).print(f"wrote {args.out} ({sc.duration_s:g} s, {n} steps) and {truth_path_for(args.out)}")
    return 0


def cmd_devices(args) -> int:
    from .io.capture import list_devices

    devs = list_devices()
    if args.json:
        sys.stdout.write(json.dumps([dataclasses.asdict(d) for d in devs], indent=1) + "\n")
        return 0
    from rich.table import Table

    t = Table(title="input devices", title_justify="left")
    for c in ("", "index", "name", "host API", "default rate", "channels"):
        t.add_column(c)
    for d in devs:
        t.add_row("*" if d.is_default else "", str(d.index), d.name, d.hostapi, f"{d.default_samplerate_hz:g} Hz",
                  str(d.input_channels))
    con = _console()
    if not devs:
        con.print("no input devices found (is a microphone connected, and the sound server running?)")
        return 2
    con.print(t)
    con.print("[dim]* = default input; choose with --device INDEX or a part of the name[/dim]")
    return 0


class _Refit:
    """The summary a live screen shows, refitted from every step so far.  A refit grows with the
    session (a 4 h summary costs ~160 ms), so once it costs more than 5 % of the time between
    refits it is done less often and the screen keeps the last one."""

    def __init__(self, summarize):
        self.summarize = summarize
        self.shown = None
        self.last_s = 0.0
        self.cost_s = 0.0

    def get(self, now: float):
        if self.shown is None or now - self.last_s >= 20.0 * self.cost_s:
            import time

            t = time.monotonic()
            self.shown = self.summarize()
            self.last_s = time.monotonic()
            self.cost_s = self.last_s - t
        return self.shown


class _PeakMeter:
    """Input level for the live screens: the peak of the last half second, dBFS."""

    def __init__(self, window_s: float = 0.5):
        self.window_s = window_s
        self._peaks: list[tuple[float, float]] = []

    def update(self, samples, now: float) -> float:
        pk = float(abs(samples).max()) if len(samples) else 0.0
        self._peaks = [(t, v) for t, v in self._peaks if now - t < self.window_s] + [(now, pk)]
        return 20 * math.log10(max(max(v for _, v in self._peaks), 1e-6))


def cmd_listen(args) -> int:
    import time

    from .errors import DeviceError
    from .export import summary_to_dict
    from .io.audiofile import LiveRecorder
    from .io.capture import Capture, resolve_device
    from .pipeline import Analyzer

    if not 8000 <= args.rate_hz <= 192000:
        raise ParameterError(f"--rate-hz {args.rate_hz}: expected 8000..192000")
    dev = resolve_device(args.device)
    clock_ppm, clock_u, time_base = _clock(args, device_name=args.device)
    from .core.detect import DetectorConfig

    # short processing chunks: a step reaches the screen promptly (results equal those of `analyze`)
    an = Analyzer(args.rate_hz, channel=args.channel, clock_ppm=clock_ppm, clock_ppm_u95=clock_u,
                  detector=DetectorConfig(chunk_s=0.25))
    rec = LiveRecorder(args.save, args.rate_hz) if args.save else None
    # ~43 ms blocks: fewer wake-ups than the driver's default (less CPU), well inside the 0.25 s chunk
    cap = Capture(dev, args.rate_hz, channel=args.channel, blocksize=2048)
    src = args.device if args.device is not None else "default input"
    stop_note = None
    rec_error = None
    meter = _PeakMeter()
    t0 = time.monotonic()
    live = None
    try:
        with cap:
            if not args.json:
                from rich.live import Live

                from .ui.dashboard import LiveStatus, render_live

                con = _console()
                live = Live(console=con, refresh_per_second=4, transient=False, auto_refresh=False)
                live.start()
            last_draw = 0.0
            refit = _Refit(an.summary)
            for b in cap.blocks():
                new_step = any(ev.kind == "step" for ev in an.feed(b))
                if rec:
                    try:
                        rec.write(b)
                    except (OSError, RuntimeError) as e:  # a full disk: stop recording, keep listening
                        rec_error = f"recording stopped at {an.duration_s:.1f} s: {e}"
                        try:
                            rec.close()
                        except (OSError, RuntimeError):
                            pass
                        rec = None
                now = time.monotonic()
                level = meter.update(b.samples, now)
                # redraw as soon as a step is decided, and at least twice a second
                if live is not None and (new_step or now - last_draw >= 0.4):
                    shown = refit.get(now)
                    st = LiveStatus(str(src), args.rate_hz, args.channel, an.duration_s, level,
                                    cap.overflows + (1 if cap.dropped_frames else 0), args.save)
                    live.update(render_live(shown, st, width=min(con.width, 160)), refresh=True)
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
    summary = an.finish()
    summary.extras["clock_calibrated"] = clock_ppm is not None
    summary.extras["time_base"] = time_base
    summary.extras["capture"] = {"device": str(src), "overflows": cap.overflows, "dropped_frames": cap.dropped_frames,
                                 "wall_seconds": round(time.monotonic() - t0, 3), "ended": stop_note or "completed"}
    if rec_error:
        summary.warnings.append(rec_error)
    d = summary_to_dict(summary, source=f"device:{src}")
    if args.save:
        try:
            with open(args.save + ".json", "w") as f:
                json.dump(d, f, indent=1)
        except OSError as e:
            sys.stderr.write(f"tickscope: cannot write {args.save}.json: {e.strerror}\n")
    if args.json:
        sys.stdout.write(json.dumps(d, indent=1) + "\n")
    else:
        from .ui.textreport import render_summary

        con = _console()
        con.print(render_summary(summary, source=f"{src} (live)", width=con.width))
    if stop_note and stop_note.startswith("capture ended"):
        sys.stderr.write(f"tickscope: {stop_note}; everything up to then is kept\n")
        return 2
    return 0


def cmd_log(args) -> int:
    from .errors import StoreError
    from .io.store import LogStore

    if (args.source is None) == (args.device is None):
        if args.source is None and args.device is None:
            raise ParameterError("give a source: --device DEVICE (a microphone) or --source PATH (a recording)")
        raise ParameterError("give either --device or --source, not both")
    if args.hours is not None and not args.hours > 0:
        raise ParameterError(f"--hours {args.hours}: expected > 0")
    store = LogStore(args.db)
    try:
        return _run_log(args, store)
    finally:
        try:
            store.close()
        except StoreError:
            pass


def _run_log(args, store) -> int:
    import time

    from .errors import DeviceError, StoreError
    from .logsession import HISTORY_STEPS, ClipKeeper, LogSession
    from .pipeline import Analyzer

    segs = store.segments()
    store.init_meta(args.label or "", __version__)
    if args.label and store.meta().get("label") not in (args.label, ""):
        raise ParameterError(f"{args.db} is the log of {store.meta().get('label')!r}, not {args.label!r}: "
                             "use a new database for another movement")
    if args.label and not store.meta().get("label"):
        store.set_meta("label", args.label)
        store.commit()
    now = time.time()
    last = segs[-1] if segs else None
    note = ""
    cap = None
    tally: dict = {}  # samples of the source that were not numbers (read as silence)
    if args.source is not None:
        from .io.audiofile import blocks, choose_channel, probe

        src = os.path.abspath(args.source)
        info = probe(src)
        if last is not None and last.source_kind != "file":
            raise ParameterError(f"{args.db} logs a device; a recording cannot be added to it (use a new database)")
        if last is not None and last.source != src:
            raise ParameterError(f"{args.db} logs {last.source}; to replay {src} use a new database")
        offset_s = 0.0 if last is None else last.source_offset_s + last.decided_s
        start_frame = int(round(offset_s * info.samplerate))
        if start_frame >= info.frames - int(info.samplerate):
            _console(stderr=True).print(f"{args.db} already holds {src} to its end; nothing to add "
                                        f"(tickscope report {args.db})")
            return 0
        channel = args.channel if args.channel is not None else (last.channel if last else choose_channel(src, info))
        if not 0 <= channel < info.channels:
            raise ParameterError(f"--channel {channel}: {src} has channels 0..{info.channels - 1}")
        fs = info.samplerate
        block_iter = blocks(src, info, channel, start_frame=start_frame, tally=tally)
        kind, source, join, timeline = "file", src, ("first" if last is None else "exact"), offset_s
        if last is not None:
            note = f"resuming {src} at {offset_s:.1f} s (segment {len(segs) + 1})"
        total_s = info.duration_s - offset_s
        clock_ppm, clock_u, time_base = _clock(args)
        detector = None
    else:
        from .core.detect import DetectorConfig
        from .io.capture import Capture, resolve_device

        if last is not None and last.source_kind != "device":
            raise ParameterError(f"{args.db} logs the recording {last.source}; log a device into a new database")
        if not 8000 <= args.rate_hz <= 192000:
            raise ParameterError(f"--rate-hz {args.rate_hz}: expected 8000..192000")
        dev = resolve_device(args.device)
        fs = args.rate_hz
        channel = args.channel or 0
        clock_ppm, clock_u, time_base = _clock(args, device_name=args.device)
        cap = Capture(dev, fs, channel=channel, blocksize=2048)
        kind, source, join = "device", str(args.device), ("first" if last is None else "wall")
        timeline = 0.0 if last is None else now - segs[0].started_wall
        if last is not None:
            note = f"resuming the log as segment {len(segs) + 1} after {now - (last.ended_wall or last.started_wall + last.duration_s):.0f} s"
        total_s = None
        detector = DetectorConfig(chunk_s=0.25)
    from .io.profiles import host_sync_status

    seg = store.new_segment(started_wall=now, source_kind=kind, source=source,
                            source_offset_s=timeline if kind == "file" else 0.0, timeline_s=timeline, join_kind=join,
                            sample_rate_hz=fs, channel=channel, clock_ppm=clock_ppm, clock_ppm_u95=clock_u,
                            time_base=time_base, host_sync=host_sync_status() if kind == "device" else None,
                            version=__version__)
    an = Analyzer(fs, channel=channel, clock_ppm=clock_ppm, clock_ppm_u95=clock_u, detector=detector,
                  history_steps=HISTORY_STEPS, lossy=args.source is not None and info.lossy)
    clips = None
    if args.keep_audio == "anomalies":
        clips = ClipKeeper(fs, int(args.clip_budget_mb * 1e6), used_bytes=store.clip_bytes())
    ls = LogSession(store, seg, an, timeline_s=timeline, clock_ppm=clock_ppm, clock_ppm_u95=clock_u, clips=clips)
    limit_s = args.hours * 3600.0 if args.hours else None
    err = None
    reason = "end of source"
    if note:
        _console(stderr=True).print(note)
    try:
        if cap is None:
            _log_file(ls, block_iter, total_s, limit_s, show_progress=not args.quiet and not args.json)
            if limit_s is not None and ls.position_s >= limit_s:
                reason = "hours reached"
        else:
            reason = _log_device(ls, cap, limit_s, args, segs, quiet=args.quiet or args.json)
    except KeyboardInterrupt:
        reason = "stopped by Ctrl-C"
    except DeviceError as e:
        reason = f"capture ended: {e}"
        err = e
    except StoreError:
        store.rollback()  # a full disk: what was committed stays; nothing more can be written
        raise
    ls.finish(reason)
    if tally.get("nonfinite"):
        store.set_meta(f"segment {seg} nonfinite", str(tally["nonfinite"]))
    t = ls.totals
    d = {"db": args.db, "segment": len(segs) + 1, "source": source, "duration_s": round(ls.position_s, 3),
         "steps": t["steps"], "missed": t["missed"], "failed": t["failed"], "rejected": t["rejected"],
         "gaps": t["gaps"], "stopped_slots": t.get("stopped_slots", 0), "ended": reason, "time_base": time_base}
    if tally.get("nonfinite"):
        d["nonfinite_samples"] = tally["nonfinite"]
    snd = ls.sound or {}
    d["sound"] = snd.get("sound")
    if snd.get("sound") == "not-stepping":
        d["beat_interval_s"] = snd.get("beat_interval_s")
    if clips is not None:
        d["clips_kept_bytes"] = clips.used
        d["clips_skipped"] = clips.skipped
    if args.json:
        sys.stdout.write(json.dumps(d, indent=1) + "\n")
    else:
        con = _console()
        if snd.get("sound") == "not-stepping":
            con.print(f"log {args.db}: segment {d['segment']} ended ({reason}) after {ls.position_s / 3600:.2f} h of audio: "
                      f"{snd.get('why') or 'the sound is not a quartz stepping-motor pattern'}; "
                      "its beats are kept, but no steps, missed steps or rate are counted from them")
        else:
            con.print(f"log {args.db}: segment {d['segment']} ended ({reason}) after {ls.position_s / 3600:.2f} h of "
                      f"audio: {t['steps']} steps, {t['missed']} missed, {t['failed']} failed, {t['gaps']} gaps")
        hours = [h for h in ls.hourly() if math.isfinite(h.rate_s_per_day)]
        if hours and snd.get("sound") != "not-stepping":
            from .ui.dashboard import hourly_lines

            for line in hourly_lines(hours, min(con.width, 120), max_rows=12):
                con.print(line)
        if tally.get("nonfinite"):
            con.print(f"[yellow]{_nonfinite_note(tally['nonfinite'])}[/yellow]")
        con.print(f"[dim]see the whole log: tickscope report {args.db}[/dim]")
    if err is not None:
        sys.stderr.write(f"tickscope: {reason}; everything up to then is kept in {args.db}\n")
        return 2
    return 0


def _log_file(ls, block_iter, total_s, limit_s, *, show_progress: bool) -> None:
    def run(update=None):
        for b in block_iter:
            ls.feed(b)
            if update:
                update(ls.position_s)
            if limit_s is not None and ls.position_s >= limit_s:
                break

    goal = min(total_s, limit_s) if limit_s else total_s
    if show_progress and goal > 60:
        from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

        with Progress(TextColumn("logging"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"),
                      TextColumn("{task.fields[info]}"), TimeRemainingColumn(), console=_console(stderr=True),
                      transient=True) as prog:
            task = prog.add_task("a", total=goal, info="")
            run(lambda p: prog.update(task, completed=p, info=f"{ls.totals['steps']} steps, {ls.totals['missed']} missed"))
    else:
        run()


def _log_device(ls, cap, limit_s, args, segs, *, quiet: bool) -> str:
    import time

    live = None
    meter = _PeakMeter()
    last_draw = 0.0
    refit = _Refit(lambda: ls.an.summary())
    prior = len(segs)
    with cap:
        if not quiet:
            from rich.live import Live

            con = _console()
            live = Live(console=con, refresh_per_second=4, transient=False, auto_refresh=False)
            live.start()
        try:
            from .ui.dashboard import LiveStatus, hourly_lines, render_live

            for b in cap.blocks():
                new_step = any(ev.kind == "step" for ev in ls.feed(b))
                now = time.monotonic()
                level = meter.update(b.samples, now)
                if live is not None and (new_step or now - last_draw >= 0.5):
                    shown = refit.get(now)
                    st = LiveStatus(str(args.device), args.rate_hz, ls.an.channel, ls.position_s, level,
                                    cap.overflows + (1 if cap.dropped_frames else 0), None)
                    w = min(con.width, 160)
                    t = ls.totals
                    info = _text(f"log {os.path.basename(args.db)} · segment {prior + 1}: {t['steps']} steps, "
                                 f"{t['missed']} missed, {t['failed']} failed · committed {ls.commits}× · "
                                 "the rate above covers the last 1-2 h", style="dim")
                    live.update(render_live(shown, st, width=w, mode="logging",
                                            extra=[info, *hourly_lines(ls.hourly(), w, max_rows=6)]), refresh=True)
                    last_draw = now
                if limit_s is not None and ls.position_s >= limit_s:
                    return "hours reached"
        finally:
            if live is not None:
                live.stop()
    return "end of source"


def _text(text: str, style: str = ""):
    from rich.text import Text

    return Text(text, style=style)


def cmd_report(args) -> int:
    from .core.logstats import log_figures
    from .errors import StoreError
    from .export import log_to_dict, write_log_csv
    from .io.store import LogStore

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
        over_ppm, over_u, time_base = _clock(args)
    elif all(s.clock_ppm is not None for s in segs):
        time_base = "; ".join(sorted({s.time_base or f'corrected by {s.clock_ppm:+g} ppm' for s in segs}))
    else:
        time_base = _clock(argparse.Namespace())[2]
        if any(s.clock_ppm is not None for s in segs):
            time_base = "mixed: some segments corrected, some on the device clock"
    sounds = {}
    for s_ in segs:
        raw = meta.get(f"segment {s_.id} sound")
        if raw:
            try:
                sounds[s_.id] = json.loads(raw)
            except ValueError:
                pass
    lossy = {s_.id for s_ in segs if meta.get(f"segment {s_.id} lossy") == "1"}
    fig = log_figures(segs, ev, gaps=gaps, minutes=minutes, override_ppm=over_ppm, override_u95=over_u,
                      sounds=sounds, lossy=lossy)
    for s_ in segs:
        n_bad = meta.get(f"segment {s_.id} nonfinite", "")
        if n_bad.isdigit():  # written by log as a count; anything else is not ours to read
            fig.notes.append(f"segment {s_.id}: " + _nonfinite_note(int(n_bad)))
    if args.steps_csv:
        with open(args.steps_csv, "w", newline="") as fh:
            write_log_csv(fh, fig.event_t, fig.event_k, ev, fig.event_pol)
    d = log_to_dict(fig, db=args.db, meta=meta, segments=segs, time_base=time_base, device_clock=device_clock)
    label = meta.get("label") or os.path.basename(args.db)
    if args.out:
        from .ui.plots import plot_log

        try:
            os.makedirs(args.out, exist_ok=True)
        except OSError as e:
            raise ParameterError(f"cannot create {args.out}: {e.strerror}") from e
        d["plots"] = plot_log(fig, args.out, title=label)
        with open(os.path.join(args.out, "report.json"), "w") as fh:
            json.dump(d, fh, indent=1)
    if args.json:
        sys.stdout.write(json.dumps(d, indent=1) + "\n")
    else:
        from .ui.logview import render_log

        con = _console()
        con.print(render_log(fig, db=os.path.basename(args.db), label=meta.get("label") or "", time_base=time_base,
                             width=min(con.width, 140), device_clock=device_clock))
        if args.out:
            con.print(f"[dim]plots: {', '.join(d['plots'])}[/dim]")
    return 0


def _device_clock(store, segs) -> list[dict]:
    """The device clock against the host clock, per device segment long enough to say (from its block readings)."""
    from .core.clockfit import fit_device_clock

    out = []
    for s in segs:
        if s.source_kind != "device":
            continue
        start, host = store.blocks(s.id)
        if len(start) < 16 or (start[-1] - start[0]) / s.sample_rate_hz < 600:
            continue
        try:
            f = fit_device_clock(start, host, s.sample_rate_hz, segments=min(64, len(start) // 2))
        except TickscopeError:
            continue
        out.append({"segment": s.id, "ppm": round(f.ppm, 3), "ci95_ppm": round(f.ci95_ppm, 3),
                    "span_s": round(f.span_s, 1), "host_sync": s.host_sync or "unknown"})
    return out


def cmd_calibrate(args) -> int:
    import csv as _csv
    import time

    import numpy as np

    from .core.clockfit import fit_device_clock
    from .io import profiles

    con = _console()
    if args.list:
        allp = profiles.load_all()
        if args.json:
            sys.stdout.write(json.dumps({k: dataclasses.asdict(v) | {"age_days": round(v.age_days(), 2),
                                        "stale": v.age_days() > args.max_age_days} for k, v in allp.items()},
                                        indent=1) + "\n")
            return 0
        if not allp:
            con.print(f"no clock profiles yet in {profiles.config_dir()} (run: tickscope calibrate NAME --device ...)")
            return 0
        from rich.table import Table

        t = Table(title=f"clock profiles ({profiles.config_dir()})", title_justify="left")
        for c in ("name", "ppm", "± 95 %", "s/day", "method", "date", "run", "host clock", "age"):
            t.add_column(c)
        for v in allp.values():
            age = v.age_days()
            t.add_row(v.name, f"{v.ppm:+.3f}", f"{v.u95_ppm:.3f}", f"{v.ppm * 0.0864:+.3f}", v.method, v.created[:10],
                      f"{v.duration_s:.0f} s", v.host_sync,
                      f"{age:.0f} d" + (" [red]stale[/red]" if age > args.max_age_days else ""))
        con.print(t)
        return 0
    if not args.name:
        raise ParameterError("calibrate needs a profile NAME (or --list)")
    sync = profiles.host_sync_status()
    if args.reference:
        if args.known_rate is None:
            raise ParameterError("--reference needs --known-rate R[+-U] (s/day)")
        from .io.audiofile import blocks, choose_channel, probe
        from .pipeline import Analyzer

        info = probe(args.reference)
        ch = choose_channel(args.reference, info)
        an = Analyzer(info.samplerate, channel=ch, clock_ppm=0.0)
        for b in blocks(args.reference, info, ch):
            an.feed(b)
        sm = an.finish()
        if sm.rate is None:
            raise NoStepsError(f"no rate could be measured in {args.reference}")
        known, known_u = args.known_rate
        # a device fast by X ppm makes a movement read slow by 0.0864 X s/day
        ppm = (known - sm.rate.rate_s_per_day) / 0.0864
        stat = sm.extras.get("rate_ci95_statistical_s_per_day") or sm.rate.ci95_s_per_day
        u = float(np.hypot(stat, known_u)) / 0.0864
        method, dur, device = "reference", sm.duration_s, args.device or ""
        note = f"reference {os.path.basename(args.reference)} of known rate {known:+g} ± {known_u:g} s/day"
    else:
        if args.from_blocks:
            rows = []
            try:
                with open(args.from_blocks) as f:
                    for r in _csv.DictReader(f):
                        rows.append((float(r["start_sample"]), float(r["host_time_s"])))
            except (OSError, KeyError, ValueError) as e:
                raise ParameterError(f"{args.from_blocks}: not a tickscope blocks file ({e})") from e
            rate_hz = args.rate_hz
            audio = args.from_blocks[: -len(".blocks.csv")] if args.from_blocks.endswith(".blocks.csv") else None
            if audio and os.path.exists(audio):
                import soundfile as sf

                rate_hz = sf.info(audio).samplerate
            method, device = "saved-capture", args.device or ""
        else:
            from .io.capture import Capture, resolve_device

            dev = resolve_device(args.device)
            latency = float(args.latency) if re.fullmatch(r"[0-9.]+", args.latency) else args.latency
            cap = Capture(dev, args.rate_hz, latency=latency)
            rows = []
            t0 = time.monotonic()
            from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

            try:
                with cap, Progress(TextColumn("calibrating"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"),
                                   TimeRemainingColumn(), console=_console(stderr=True), transient=True,
                                   disable=args.json) as prog:
                    task = prog.add_task("c", total=args.seconds)
                    for b in cap.blocks():
                        rows.append((float(b.start_sample), float(b.host_time_s)))
                        el = time.monotonic() - t0
                        prog.update(task, completed=min(el, args.seconds))
                        if el >= args.seconds:
                            break
            except KeyboardInterrupt:
                sys.stderr.write("tickscope: interrupted; fitting what was captured\n")
            rate_hz = args.rate_hz
            method, device = "host-clock", str(args.device or "default input")
        arr = np.array(rows)
        if len(arr) < 16:
            raise ParameterError("too few blocks were captured to calibrate")
        fit = fit_device_clock(arr[:, 0], arr[:, 1], rate_hz)
        ppm, u, dur = fit.ppm, fit.ci95_ppm, fit.span_s
        note = (f"{fit.n_blocks} blocks, delay scatter {fit.delay_rms_ms:.2f} ms rms"
                + (f"; {len(fit.steps)} host clock steps removed" if fit.steps else ""))
    pr = profiles.ClockProfile(args.name, float(ppm), float(u), method, profiles.now_iso(), float(dur), device, sync, note)
    path = profiles.save(pr)
    out = dataclasses.asdict(pr) | {"profile_file": path, "s_per_day": round(ppm * 0.0864, 4)}
    if method != "reference":
        out["seconds_for_1ppm"] = round(fit.needed_span_s(1.0), 0)
        out["seconds_for_0.1ppm"] = round(fit.needed_span_s(0.1), 0)
    if args.json:
        sys.stdout.write(json.dumps(out, indent=1) + "\n")
    else:
        con.print(f"[bold]{args.name}[/bold]: the device clock runs {'fast' if ppm >= 0 else 'slow'} by "
                  f"{abs(ppm):.3f} ± {u:.3f} ppm (95 %) = {ppm * 0.0864:+.3f} s/day on every rate it measures")
        con.print(f"method: {method}; {note}; host clock: {sync}; saved to {path}")
        if method != "reference":
            con.print(f"for ±1 ppm capture about {out['seconds_for_1ppm']:.0f} s, for ±0.1 ppm about "
                      f"{out['seconds_for_0.1ppm']:.0f} s; the host clock itself should be disciplined (NTP or GPS)")
        if sync != "synchronised (NTP)" and sync != "synchronised (chrony)" and method != "reference":
            con.print("[yellow]the system does not say its clock is synchronised: the result is only as good as "
                      "the host clock[/yellow]")
    return 0


# ---------------------------------------------------------------------------------------------
_SIM_HELP = {
    "samplerate_hz": "sample rate of the file, Hz",
    "duration_s": "length of the recording, s",
    "channels": "number of channels",
    "step_channel": "channel that carries the movement (the others carry noise only)",
    "movement": "the movement's voice: wallclock, wristwatch or alarmclock",
    "step_interval_s": "nominal step interval, s (1 for most quartz movements)",
    "rate_s_per_day": "the movement's true daily rate, s/day (positive gains)",
    "rate_drift_s_per_day_per_h": "the rate changes by this much every hour, s/day per hour (a slow drift)",
    "clock_ppm": "the recording device's sample clock runs fast by this many ppm",
    "first_step_s": "time of the first step, s",
    "jitter_us": "RMS random timing jitter of each step, us",
    "level_dbfs": "peak level of a step, dBFS",
    "snr_db": "step power over its first 10 ms relative to the noise power, dB",
    "noise": "noise colour: white or pink",
    "hum_hz": "mains hum frequency (50 or 60; 0 = none), with 3rd and 5th harmonics",
    "hum_db": "hum amplitude relative to the step peak, dB",
    "missed_steps": "comma-separated step numbers that make no sound",
    "polarity_b_freq_shift": "B-polarity resonances are higher by this fraction",
    "polarity_b_level_db": "B-polarity level relative to A, dB",
    "polarity_asymmetry_us": "B steps sound this many us later than the grid",
    "variation_db": "tick-to-tick level variation (RMS), dB",
    "variation_freq_pct": "tick-to-tick resonance frequency variation (RMS), percent",
    "second_impact_ms": "delay of a second impact on every step (hand bounce), ms; 0 = none",
    "second_impact_db": "level of the second impact relative to the step, dB",
    "rattle_impacts": "further impacts at random delays on every beat, each with its own resonances "
                      "(a sound that does not repeat: a cheap escapement, a rattling case); 0 = none",
    "rattle_spread_ms": "the rattle's impacts fall within this many ms after the beat",
    "transients_per_min": "knocks and speech-like bursts per minute, off the step grid",
    "transient_db": "knock peak relative to the step peak, dB",
    "reverb_rt60_ms": "room reverberation time RT60, ms; 0 = dry",
    "agc": "apply a phone's automatic gain control",
    "gate_dbfs": "noise gate threshold, dBFS (phones); unset = no gate",
    "clip_dbfs": "hard clipping level, dBFS; unset = no clipping",
    "dc_offset": "DC offset added to the signal, full scale",
    "second_clock_rate_s_per_day": "add a second clock in the room with this rate, s/day",
    "second_clock_db": "level of the second clock relative to the movement, dB",
    "second_clock_offset_s": "time of the second clock's first tick, s",
    "inhibition_period_s": "logic-regulation period, s (0 = none)",
    "inhibition_pulses": "oscillator pulses swallowed each inhibition period",
    "inhibition_pulse_hz": "frequency of the divider stage the pulses are swallowed from, Hz",
    "burst_steps": "end-of-life stepping: steps per burst (0 = regular)",
    "burst_spacing_ms": "spacing of steps within a burst, ms",
    "failed_steps": "comma-separated step numbers where the rotor only twitches",
    "correction_delay_ms": "correction pulse this long after a failed step, ms (0 = none)",
    "drive_levels_db": "adaptive drive: comma-separated level steps in dB, cycled",
    "drive_level_period_s": "time between adaptive drive level changes, s",
    "seed": "random seed",
}


def _tuple_of(conv):
    def parse(text: str):
        try:
            return tuple(conv(v) for v in text.split(",") if v.strip())
        except ValueError as e:
            raise argparse.ArgumentTypeError(f"{text!r}: expected comma-separated numbers") from e
    return parse


def _add_sim_options(p: argparse.ArgumentParser) -> None:
    from .core.simulate import Scenario

    for f in dataclasses.fields(Scenario):
        opt = "--" + f.name.replace("_", "-")
        default = f.default
        helptext = f"{_SIM_HELP.get(f.name, f.name)} (default: {default!r})"
        if f.type in ("bool",) or isinstance(default, bool):
            p.add_argument(opt, dest=f.name, action="store_true", default=None, help=helptext)
        elif isinstance(default, tuple):
            conv = float if f.name == "drive_levels_db" else int
            p.add_argument(opt, dest=f.name, type=_tuple_of(conv), default=None, metavar="N,N,...", help=helptext)
        elif isinstance(default, str):
            p.add_argument(opt, dest=f.name, type=str, default=None, help=helptext)
        elif isinstance(default, int) and not isinstance(default, bool):
            p.add_argument(opt, dest=f.name, type=int, default=None, help=helptext)
        else:
            p.add_argument(opt, dest=f.name, type=float, default=None, help=helptext)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="tickscope", description="Time a ticking quartz movement by ear: rate in s/day, "
                                "missed steps and ring-down, from a microphone or a recording.")
    p.add_argument("--version", action="version", version=f"tickscope {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    a = sub.add_parser("analyze", help="analyze a saved recording (default: the bundled demo recording)",
                       description="Find every step in a recording, fit the daily rate with a 95 % interval, "
                       "count missed steps and measure each step's ring-down.")
    a.add_argument("path", nargs="?", help="audio file (WAV, FLAC, Ogg Vorbis or Opus, MP3, ...; a phone's .m4a and what else ffmpeg decodes, where installed); omitted: the bundled demo")
    a.add_argument("--channel", type=int, default=None, help="channel to analyze (default: the clearest)")
    a.add_argument("--clock-ppm", type=parse_ppm, default=None, metavar="X[+-U]",
                   help="the recording device's clock runs fast by X ppm (95 %% uncertainty U); the rate is corrected")
    a.add_argument("--clock-profile", metavar="NAME", help="correct the rate with a saved clock profile (see calibrate)")
    a.add_argument("--json", action="store_true", help="print one JSON object instead of the report")
    a.add_argument("--steps-csv", metavar="PATH", help="write one row per detected event to this CSV file")
    a.add_argument("--plot", metavar="PNG", help="draw the timing residuals and ring-downs to this PNG file")
    a.add_argument("--quiet", action="store_true", help="no progress bar")
    a.set_defaults(func=cmd_analyze)

    d = sub.add_parser("devices", help="list audio input devices", description="List the audio input devices "
                       "PortAudio can use: index, name, host API, default sample rate, channels; * marks the default.")
    d.add_argument("--json", action="store_true", help="print the list as JSON")
    d.set_defaults(func=cmd_devices)

    li = sub.add_parser("listen", help="listen to a movement through a microphone, with a live screen",
                        description="Capture from a microphone and analyze as the steps arrive: the same analysis as "
                        "`analyze`, shown live; Ctrl-C ends with the final report.")
    li.add_argument("--device", default=None, help="input device index or part of its name (default: the default input)")
    li.add_argument("--rate-hz", type=int, default=48000, help="sample rate to ask the device for, Hz (default 48000)")
    li.add_argument("--channel", type=int, default=0, help="input channel to analyze (default 0)")
    li.add_argument("--duration", type=float, default=None, metavar="S", help="stop after S seconds of audio")
    li.add_argument("--save", metavar="PATH", help="also record the audio (FLAC or WAV by extension), the per-block "
                    "clock readings to PATH.blocks.csv and the summary to PATH.json")
    li.add_argument("--clock-ppm", type=parse_ppm, default=None, metavar="X[+-U]",
                    help="the device's clock runs fast by X ppm (95 %% uncertainty U); the rate is corrected")
    li.add_argument("--clock-profile", metavar="NAME", help="correct the rate with a saved clock profile (default: "
                    "the profile named like --device, if there is one)")
    li.add_argument("--json", action="store_true", help="no live screen; print the final summary as JSON")
    li.set_defaults(func=cmd_listen)

    c = sub.add_parser("calibrate", help="measure the audio device's clock and keep it as a named profile",
                       description="Measure how fast the audio device's sample clock runs, in ppm with a 95 % interval: "
                       "against the host clock (capture for --seconds), from a saved capture's block readings "
                       "(--from-blocks), or from a recording of a reference movement of known rate (--reference). "
                       "The result is kept as a named profile for --clock-profile.")
    c.add_argument("name", nargs="?", help="profile name (use the device's name to have listen use it by default)")
    c.add_argument("--device", default=None, help="input device index or part of its name")
    c.add_argument("--seconds", type=float, default=600.0, help="capture length for the host-clock method (default 600)")
    c.add_argument("--rate-hz", type=int, default=48000, help="sample rate, Hz (default 48000)")
    c.add_argument("--latency", default="high", help="PortAudio latency: high, low or seconds (default high)")
    c.add_argument("--from-blocks", metavar="CSV", help="calibrate from a saved capture's PATH.blocks.csv")
    c.add_argument("--reference", metavar="AUDIO", help="a recording, through the device, of a movement of known rate")
    c.add_argument("--known-rate", type=parse_ppm, default=None, metavar="R[+-U]",
                   help="the reference movement's rate and its 95 %% uncertainty, s/day")
    c.add_argument("--list", action="store_true", help="list the saved profiles")
    c.add_argument("--max-age-days", type=float, default=90.0, help="profiles older than this are flagged stale")
    c.add_argument("--json", action="store_true", help="print the result as JSON")
    c.set_defaults(func=cmd_calibrate)

    lg = sub.add_parser("log", help="log a movement's steps for hours or days into a database (crash-safe)",
                        description="Log every step of a movement into an SQLite database, committed every few "
                                    "seconds. Running it again on the same database resumes the log as a new "
                                    "segment. Read it with `tickscope report DB` (also while it is being written).")
    lg.add_argument("db", help="the log database (created if missing, resumed if it exists)")
    lg.add_argument("--device", default=None, help="log from this input device (index or part of its name)")
    lg.add_argument("--source", metavar="PATH", help="log from a recording, as fast as it can be read")
    lg.add_argument("--hours", type=float, default=None, metavar="H", help="stop after H hours of audio (default: "
                    "until Ctrl-C or the end of the recording)")
    lg.add_argument("--label", default=None, help="what is logged, e.g. 'hall clock, after service'")
    lg.add_argument("--rate-hz", type=int, default=48000, help="device sample rate, Hz (default 48000)")
    lg.add_argument("--channel", type=int, default=None, help="channel to analyze")
    lg.add_argument("--clock-ppm", type=parse_ppm, default=None, metavar="X[+-U]",
                    help="the device's sample clock runs fast by X ppm (± U, 95 %%)")
    lg.add_argument("--clock-profile", metavar="NAME", help="correct with a saved clock profile (see calibrate)")
    lg.add_argument("--keep-audio", choices=("none", "anomalies"), default="none",
                    help="keep short clips around missed and failed steps, correction pulses and other sounds "
                         "(default none: no audio is kept)")
    lg.add_argument("--clip-budget-mb", type=float, default=20.0, help="at most this many MB of clips (default 20)")
    lg.add_argument("--json", action="store_true", help="no screen; print the segment's totals as JSON at the end")
    lg.add_argument("--quiet", action="store_true", help="no progress bar or live screen")
    lg.set_defaults(func=cmd_log)

    rp = sub.add_parser("report", help="report on a log: rate over time, time error, Allan deviation, plots",
                        description="Read a log database (also one still being written) and report the rate "
                                    "per hour and minute, the time interval error, the overlapping Allan deviation, "
                                    "missed and failed steps, gaps and ring-down over time.")
    rp.add_argument("db", help="the log database")
    rp.add_argument("--out", metavar="DIR", help="write rate.png, tie.png, adev.png, ringdown.png and report.json here")
    rp.add_argument("--json", action="store_true", help="print one JSON object instead of the report")
    rp.add_argument("--steps-csv", metavar="PATH", help="export every logged event (same columns as analyze)")
    rp.add_argument("--clock-ppm", type=parse_ppm, default=None, metavar="X[+-U]",
                    help="correct the whole log: the device's clock runs fast by X ppm")
    rp.add_argument("--clock-profile", metavar="NAME", help="correct the whole log with a saved clock profile")
    rp.add_argument("--clock-from-host", action="store_true",
                    help="correct each device segment by its own clock measured against the host clock during "
                         "the log (the host clock must be NTP-disciplined)")
    rp.set_defaults(func=cmd_report)

    s = sub.add_parser("simulate", help="write a simulated recording with its truth file",
                       description="Write a recording of a simulated stepping-motor movement (WAV, FLAC, Ogg Vorbis, "
                       "Opus or MP3 by extension) and NAME.truth.json beside it with every parameter and every true step time.")
    s.add_argument("out", help="output audio file (.wav, .flac, .ogg, .opus, .mp3)")
    s.add_argument("--description", help="a line describing the scenario, stored in the truth file")
    s.add_argument("--compression-level", type=float, metavar="C",
                   help="lossy formats: 0 (best quality, largest) .. 1 (smallest); e.g. 0.9 gives Opus at ~28 kbit/s, "
                        "like a messaging app's voice note")
    _add_sim_options(s)
    s.set_defaults(func=cmd_simulate)
    return p


def _console(stderr: bool = False):
    from rich.console import Console

    return Console(stderr=stderr, highlight=False)


def main(argv: list[str] | None = None) -> int:
    _keep_freed_memory()
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except KeyboardInterrupt:
        sys.stderr.write("tickscope: interrupted\n")
        return 130
    except TickscopeError as e:
        sys.stderr.write(f"tickscope: {e}\n")
        return e.exit_code
    except MemoryError:
        sys.stderr.write("tickscope: out of memory\n")
        return 2
    except OSError as e:  # a full disk, a vanished directory: say which file, never a traceback
        where = f" ({e.filename})" if getattr(e, "filename", None) else ""
        sys.stderr.write(f"tickscope: cannot write or read{where}: {e.strerror or e}\n")
        return 2
    except BrokenPipeError:
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
