"""``tickscope log``: a device or a replayed recording through the pipeline into the log database."""
from __future__ import annotations

import math
import os
import sys
import time
from dataclasses import dataclass

from .. import __version__, advice
from ..errors import DeviceError, NoStepsError, ParameterError, StoreError
from ..model import BEAT_SOUNDS
from .common import PeakMeter, Refit, clock_from_args, console, movement_options, text, write_json

INTERRUPTED = 130  # the exit code of a log ended by Ctrl-C (the shell's 128 + SIGINT)


def run(args) -> int:
    from ..io.store import LogStore

    if (args.source is None) == (args.device is None):
        if args.source is None:
            raise ParameterError("give a source: --device DEVICE (a microphone) or --source PATH (a recording)")
        raise ParameterError("give either --device or --source, not both")
    if args.hours is not None and not args.hours > 0:
        raise ParameterError(f"--hours {args.hours}: expected > 0")
    store = LogStore(args.db)  # refused while another log writes this database
    started: dict = {}
    try:
        return _run(args, store, started)
    except NoStepsError:
        raise  # the log ran: its segment stays
    except BaseException:
        _forget_failed_start(store, started.get("seg"))
        raise
    finally:
        try:
            store.close()
        except StoreError:
            pass


def _forget_failed_start(store, seg) -> None:
    """A log that failed before any audio came (a missing source, no such device, bad options)
    leaves nothing behind: its empty segment goes, and so does the database if this run made it.
    Anything committed stays."""
    try:
        if seg is not None and not store.drop_empty_segment(seg):
            return
        store.discard()  # removes the file only if this run created it and it holds no segment
    except StoreError:
        pass


def _run(args, store, started: dict) -> int:
    from ..io.clips import ClipKeeper
    from ..io.profiles import host_sync_status
    from ..logsession import HISTORY_STEPS, LogSession, check_label
    from ..windowprobe import WindowProbe

    segs = store.segments()
    store.init_meta(args.label or "", __version__)
    check_label(store, args.label, args.db)
    now = time.time()
    tally: dict = {}  # samples of the source that were not numbers (read as silence)
    src = _open_source(args, segs, now, tally)
    if src is None:
        return 0
    plan, clock, samplerate = src.plan, src.clock, src.samplerate
    seg = store.new_segment(started_wall=now, source_kind=plan.kind, source=plan.source,
                            source_offset_s=plan.timeline_s if plan.kind == "file" else 0.0,
                            timeline_s=plan.timeline_s, join_kind=plan.join, samplerate=samplerate,
                            channel=plan.channel, clock_ppm=clock.ppm, clock_ppm_u95=clock.u95_ppm,
                            time_base=clock.time_base, host_sync=host_sync_status() if plan.kind == "device" else None,
                            version=__version__)
    started["seg"] = seg
    # auto: an escapement is heard again with its own window after the first seconds (lift times)
    an = WindowProbe(samplerate, channel=plan.channel, clock_ppm=clock.ppm, clock_ppm_u95=clock.u95_ppm,
                     detector=src.detector, history_steps=HISTORY_STEPS, lossy=src.info is not None and src.info.lossy,
                     **movement_options(args))
    clips = None
    if args.keep_audio == "anomalies":
        clips = ClipKeeper(samplerate, int(args.clip_budget_mb * 1e6), used_bytes=store.clip_bytes())
    ls = LogSession(store, seg, an, timeline_s=plan.timeline_s, clock_ppm=clock.ppm, clock_ppm_u95=clock.u95_ppm,
                    clips=clips)
    if plan.note:
        console(stderr=True).print(plan.note)
    number = len(segs) + 1
    try:
        reason, interrupted, err = _listen(ls, src, args, number)
        ls.finish(reason)
        if tally.get("nonfinite"):
            store.set_meta(f"segment {seg} nonfinite", str(tally["nonfinite"]))
            store.commit()
    except StoreError as e:
        # the disk is full (or the log became unwritable): what was committed stays, nothing more
        # can be written; the events come first, so the clips cut but not stored go
        store.rollback()
        ls.drop_clips(getattr(e, "why", str(e)))
        kept = _report_kept(args, ls, store, number, plan.source, e, clock.time_base, tally, clips)
        sys.stderr.write(f"tickscope: {e}; {kept}\n")
        return 2
    _report_segment(args, ls, number, plan.source, reason, clock.time_base, tally, clips)
    if err is not None:
        sys.stderr.write(f"tickscope: {reason}; everything up to then is kept in {args.db}\n")
        return 2
    if interrupted:
        return INTERRUPTED  # after everything is committed and the segment's end reported
    _raise_if_no_steps(args, ls, plan, src.info, tally, number)
    return 0


@dataclass
class _Source:
    """Where a segment's audio comes from: a file replayed (``info``, ``block_iter``) or a device
    (``cap``), with the segment's plan and clock."""

    plan: object
    clock: object
    samplerate: float
    info: object = None
    block_iter: object = None
    cap: object = None
    detector: object = None


def _open_source(args, segs, now: float, tally: dict) -> _Source | None:
    """The file or device to log from, as the log's earlier segments allow (None: a replay that
    has nothing left to read, said on stderr)."""
    from ..logsession import plan_device_segment, plan_file_segment

    if args.source is not None:
        from ..io.audiofile import blocks, choose_channel, probe

        src = os.path.abspath(args.source)
        info = probe(src)
        plan = plan_file_segment(segs, src, samplerate=info.samplerate, frames=info.frames, channel=args.channel,
                                 default_channel=lambda: choose_channel(src, info), db=args.db)
        if plan.done:
            console(stderr=True).print(plan.done)
            return None
        if not 0 <= plan.channel < info.channels:
            raise ParameterError(f"--channel {plan.channel}: {src} has channels 0..{info.channels - 1}")
        return _Source(plan, clock_from_args(args), info.samplerate, info=info,
                       block_iter=blocks(src, info, plan.channel, start_frame=plan.start_frame, tally=tally))
    from ..core.detect import DetectorConfig
    from ..io.capture import Capture, resolve_device

    plan = plan_device_segment(segs, str(args.device), channel=args.channel, now_wall_s=now, db=args.db)
    if not 8000 <= args.samplerate <= 192000:
        raise ParameterError(f"--rate-hz {args.samplerate}: expected 8000..192000")
    dev = resolve_device(args.device)
    return _Source(plan, clock_from_args(args, device_name=args.device), args.samplerate,
                   cap=Capture(dev, args.samplerate, channel=plan.channel, blocksize=2048),
                   detector=DetectorConfig(chunk_s=0.25))


def _listen(ls, src: _Source, args, number: int) -> tuple[str, bool, Exception | None]:
    """Feed the segment until its source ends, the hours are reached, Ctrl-C or the device fails:
    (why it ended, whether Ctrl-C ended it, the device's error)."""
    limit_s = args.hours * 3600.0 if args.hours else None
    reason = "end of source"
    try:
        if src.cap is None:
            _log_file(ls, src.block_iter, src.info.duration_s - src.plan.timeline_s, limit_s,
                      show_progress=not args.quiet and not args.json)
            if limit_s is not None and ls.position_s >= limit_s:
                reason = "hours reached"
        else:
            reason = _log_device(ls, src.cap, limit_s, args, number, quiet=args.quiet or args.json)
    except KeyboardInterrupt:
        return "stopped by Ctrl-C", True, None
    except DeviceError as e:
        if ls.position_s <= 0:
            raise  # the device never gave audio (it cannot be opened): the log did not start
        return f"capture ended: {e}", False, e
    return reason, False, None


def _raise_if_no_steps(args, ls, plan, info, tally: dict, number: int) -> None:
    """Exit 3, as analyze does, when this run heard no steps (silence, or audio that was all unusable)."""
    where = args.source if plan.kind == "file" else f"the input device {args.device}"
    kept = f"segment {number} of {args.db} keeps its {ls.position_s:.0f} s of audio"
    if info is not None and tally.get("nonfinite", 0) >= info.frames - plan.start_frame > 0:
        raise NoStepsError(f"no steps could be found: {advice.unusable_reason(args.source)} ({kept})")
    if (ls.sound or {}).get("sound") == "none" and ls.totals["steps"] == 0:
        why = ls.sound_reason or "no stepping pattern heard"
        raise NoStepsError(f"no steps could be found in {where}: {why} ({kept})")


def _clip_fields(clips) -> dict:
    if clips is None:
        return {}
    return {"clips_kept": clips.kept, "clips_kept_bytes": clips.used, "clips_skipped": clips.skipped,
            "clips_removed": clips.removed, "clips_stopped": None if not clips.stopped else
            f"{clips.stopped} (from {clips.stopped_at_s:.1f} s of the segment)"}


def _report_kept(args, ls, store, number: int, source: str, e, time_base: str, tally: dict, clips) -> str:
    """The segment's end when the store could no longer write: what is kept, from the database
    itself (the counters of the analysis also hold what was lost); the words for the error line."""
    why = getattr(e, "why", str(e))
    try:
        k = store.kept(ls.seg)
    except StoreError:
        k = None
    if k is None:
        return f"what was committed before is kept in {args.db}"
    kinds = k["kinds"]
    d = {"db": args.db, "segment": number, "source": source, "duration_s": round(k["decided_s"], 3),
         "steps": kinds.get("step", 0), "missed": kinds.get("missed", 0), "failed": kinds.get("failed", 0),
         "rejected": kinds.get("rejected", 0), "gaps": k["gaps"], "ended": why,
         "lost_s": round(max(ls.position_s - k["decided_s"], 0.0), 3), "time_base": time_base}
    if tally.get("nonfinite"):
        d["nonfinite_samples"] = tally["nonfinite"]
    if clips is not None:
        d.update(_clip_fields(clips), clips_kept=k["clips"], clips_kept_bytes=k["clip_bytes"])
    kept = (f"everything committed is kept: {k['decided_s']:.1f} s of audio, {d['steps']} steps, "
            f"{d['missed']} missed, {d['failed']} failed")
    if args.json:
        write_json(d)
    else:
        con = console()
        con.print(f"log {args.db}: segment {number} ended ({why}) after {ls.position_s / 3600:.2f} h of audio; "
                  f"kept {k['decided_s'] / 3600:.2f} h: {d['steps']} steps, {d['missed']} missed, "
                  f"{d['failed']} failed, {d['gaps']} gaps (the last {d['lost_s']:.0f} s could not be written)")
        if clips is not None:
            con.print(_clip_line(d))
        con.print(f"[dim]see the whole log: tickscope report {args.db}[/dim]")
    return kept


def _clip_line(d: dict) -> str:
    line = f"clips: {d['clips_kept']} kept ({d['clips_kept_bytes'] / 1e3:.0f} kB), {d['clips_skipped']} not kept"
    if d.get("clips_removed"):
        line += f", {d['clips_removed']} removed again to make room for the events"
    if d.get("clips_stopped"):
        line += f"; no more clips: {d['clips_stopped']}"
    return line


def _report_segment(args, ls, number: int, source: str, reason: str, time_base: str, tally: dict, clips) -> None:
    """The segment's totals at its end (JSON, or a few lines and the hourly rates)."""
    t = ls.totals
    d = {"db": args.db, "segment": number, "source": source, "duration_s": round(ls.position_s, 3),
         "steps": t["steps"], "missed": t["missed"], "failed": t["failed"], "rejected": t["rejected"],
         "gaps": t["gaps"], "stopped_slots": t.get("stopped_slots", 0), "ended": reason, "time_base": time_base}
    if tally.get("nonfinite"):
        d["nonfinite_samples"] = tally["nonfinite"]
    snd = ls.sound or {}
    d["sound"] = snd.get("sound")
    if snd.get("sound") in BEAT_SOUNDS:
        d["beat_interval_s"] = snd.get("beat_interval_s")
    if snd.get("escapement") is not None:
        d["escapement"] = snd["escapement"]
        d["diagnosis"] = snd.get("reading") or []
    d.update(_clip_fields(clips))
    if args.json:
        write_json(d)
        return
    con = console()
    if snd.get("sound") in BEAT_SOUNDS:
        con.print(f"log {args.db}: segment {number} ended ({reason}) after {ls.position_s / 3600:.2f} h of audio: "
                  f"{snd.get('why') or 'the sound is not a quartz stepping-motor pattern'}; "
                  "its beats are kept, but no steps, missed steps or rate are counted from them")
        for line in snd.get("reading") or ():
            con.print(f"  • {line}")
    else:
        con.print(f"log {args.db}: segment {number} ended ({reason}) after {ls.position_s / 3600:.2f} h of "
                  f"audio: {t['steps']} steps, {t['missed']} missed, {t['failed']} failed, {t['gaps']} gaps")
    hours = [h for h in ls.hourly() if math.isfinite(h.rate_s_per_day)]
    if hours and snd.get("sound") not in BEAT_SOUNDS:
        from ..ui.dashboard import hourly_lines

        for line in hourly_lines(hours, min(con.width, 120), max_rows=12):
            con.print(line)
    if tally.get("nonfinite"):
        con.print(f"[yellow]{advice.nonfinite_note(tally['nonfinite'])}[/yellow]")
    if clips is not None and (clips.kept or clips.skipped or clips.removed):
        con.print(_clip_line(d))
    con.print(f"[dim]see the whole log: tickscope report {args.db}[/dim]")


def _log_file(ls, block_iter, total_s, limit_s, *, show_progress: bool) -> None:
    def feed(update=None):
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
                      TextColumn("{task.fields[info]}"), TimeRemainingColumn(), console=console(stderr=True),
                      transient=True) as prog:
            task = prog.add_task("a", total=goal, info="")
            feed(lambda p: prog.update(task, completed=p, info=f"{ls.totals['steps']} steps, {ls.totals['missed']} missed"))
    else:
        feed()


def _log_device(ls, cap, limit_s, args, number: int, *, quiet: bool) -> str:
    live = con = None
    meter = PeakMeter()
    last_draw = 0.0
    refit = Refit(lambda: ls.an.summary())
    with cap:
        if not quiet:
            from rich.live import Live

            con = console()
            live = Live(console=con, refresh_per_second=4, transient=False, auto_refresh=False)
            live.start()
        try:
            from ..ui.dashboard import LiveStatus, hourly_lines, render_live

            for b in cap.blocks():
                new_step = any(ev.kind == "step" for ev in ls.feed(b))
                now = time.monotonic()
                level = meter.update(b.samples, now)
                if live is not None and (new_step or now - last_draw >= 0.5):
                    st = LiveStatus(str(args.device), args.samplerate, ls.an.channel, ls.position_s, level,
                                    cap.overflows + (1 if cap.dropped_frames else 0), None)
                    w = min(con.width, 160)
                    t = ls.totals
                    info = text(f"log {os.path.basename(args.db)} · segment {number}: {t['steps']} steps, "
                                f"{t['missed']} missed, {t['failed']} failed · committed {ls.commits}× · "
                                "the rate above covers the last 1-2 h", style="dim")
                    live.update(render_live(refit.get(now), st, width=w, mode="logging",
                                            extra=[info, *hourly_lines(ls.hourly(), w, max_rows=6)]), refresh=True)
                    last_draw = now
                if limit_s is not None and ls.position_s >= limit_s:
                    return "hours reached"
        finally:
            if live is not None:
                live.stop()
    return "end of source"
