"""``tickscope analyze``: a saved recording through the pipeline, then the report, JSON, CSV or plot."""
from __future__ import annotations

import dataclasses
import os
import shutil
import tempfile

from .. import advice
from ..errors import NoStepsError, ParameterError
from .common import DEMO_RECORDING, clock_from_args, console, movement_options, recordings_dir, write_json


def run(args) -> int:
    from ..io.audiofile import probe
    from ..pipeline import Analyzer

    path = args.path
    demo = path is None
    if demo:
        path = os.path.join(recordings_dir(), DEMO_RECORDING)
    info = probe(path)
    channel, chosen_note = _channel(args, path, info)
    clock = clock_from_args(args)

    def analyzer(**more):
        return Analyzer(info.samplerate, channel=channel, clock_ppm=clock.ppm, clock_ppm_u95=clock.u95_ppm,
                        lossy=info.lossy, **movement_options(args), **more)

    csv_fh = None
    if args.steps_csv:
        try:
            csv_fh = open(args.steps_csv, "w", newline="")
        except OSError as e:
            raise ParameterError(f"cannot write {args.steps_csv}: {e.strerror}") from e
    try:
        an, summary, tally = _passes(analyzer, path, info, channel, csv_fh, args)
    finally:
        if csv_fh:
            csv_fh.close()
    if tally.get("nonfinite", 0) >= info.frames:  # nothing usable: say that first, and only that
        raise NoStepsError(f"no steps could be found: {advice.unusable_reason(path)}")
    notes = list(summary.warnings)
    claimed_s = max(info.duration_s, info.header_duration_s)
    if summary.duration_s < claimed_s - max(1.0, 0.01 * claimed_s):
        notes.append(advice.cut_short_note(summary.duration_s, claimed_s))
    if tally.get("nonfinite"):
        notes.append(advice.nonfinite_note(tally["nonfinite"]))
    if chosen_note:
        notes.insert(0, chosen_note)
    summary = dataclasses.replace(summary, warnings=notes, clock_calibrated=clock.ppm is not None,
                                  time_base=clock.time_base)
    _show(summary, an, args, path, demo)
    if summary.sound == "none" or summary.steps_detected == 0:
        why = summary.sound_reason or (summary.warnings[-1] if summary.warnings else "no stepping pattern heard")
        raise NoStepsError(f"no steps could be found in {path}: {why}")
    return 0


def _channel(args, path: str, info) -> tuple[int, str]:
    """The channel to analyse and, when tickscope chose it among several, a note saying so."""
    from ..io.audiofile import choose_channel

    if args.channel is None:
        channel = choose_channel(path, info)
        return channel, (f"channel {channel} of {info.channels} has the clearest steps" if info.channels > 1 else "")
    if not 0 <= args.channel < info.channels:
        raise ParameterError(f"--channel {args.channel}: {path} has channels 0..{info.channels - 1}")
    return args.channel, ""


def _passes(analyzer, path: str, info, channel: int, csv_fh, args):
    """The file heard once, and again where the first pass asks for it: from the start with the grid
    of a clock heard to the end, and with an escapement's window.  (analyzer, summary, tally)."""
    from ..core.detect import ESCAPEMENT_PRE_S, DetectorConfig
    from ..pipeline import wants_escapement_window

    an = analyzer()
    tally: dict = {}
    summary = _one_pass(an, path, info, channel, csv_fh, tally, args)
    if an.regrid_times_s and an.tracker.grid() is not None:
        # A clock followed at first stopped and another went on (the movement, heard to the end):
        # follow that one from the start, as if it had been found there (the CSV is written again).
        an = analyzer(prior=an.tracker.grid())
        if csv_fh:
            _rewind(csv_fh)
        tally = {}
        summary = _one_pass(an, path, info, channel, csv_fh, tally, args)
    if wants_escapement_window(summary, an):
        # a mechanical movement's beats (or fast steps that may be a watch's): heard again with
        # the window that holds each beat's unlocking as well as its drop, for the lift times;
        # kept (with its rows of the CSV) only if it hears an escapement
        again = analyzer(detector=DetectorConfig(pre_s=ESCAPEMENT_PRE_S))
        # (its rows wait in memory, or on disk past 8 MB, until it is kept)
        rows = tempfile.SpooledTemporaryFile(8 << 20, mode="w+", newline="") if csv_fh else None
        try:
            tally2: dict = {}
            s2 = _one_pass(again, path, info, channel, rows, tally2, args)
            if s2.sound == "escapement":
                an, summary, tally = again, s2, tally2
                if csv_fh:
                    _rewind(csv_fh)
                    rows.seek(0)
                    shutil.copyfileobj(rows, csv_fh)
        finally:
            if rows:
                rows.close()
    return an, summary, tally


def _show(summary, an, args, path: str, demo: bool) -> None:
    """The report, or the JSON, and the plot asked for."""
    from ..export import summary_to_dict

    if demo and not args.json:
        console(stderr=True).print(f"[dim]no file given: analyzing the bundled demo recording {path}[/dim]")
    if args.json:
        write_json(summary_to_dict(summary, source=path))
    else:
        from ..ui.textreport import render_summary

        con = console()
        con.print(render_summary(summary, source=os.path.basename(path), width=con.width))
    if args.plot:
        from ..ui.plots import plot_analysis

        plot_analysis(summary, an, args.plot, title=os.path.basename(path))


def _rewind(fh) -> None:
    """Empty the steps CSV for a pass that writes it again (a device that cannot be truncated,
    such as /dev/null, is left as it is)."""
    try:
        fh.seek(0)
        fh.truncate()
    except OSError:
        pass


def _one_pass(an, path, info, channel, csv_fh, tally, args):
    from ..export import StepsCsv
    from ..io.audiofile import blocks

    writer = StepsCsv(csv_fh) if csv_fh else None
    run_file(an, blocks(path, info, channel, tally=tally, integers=True), info, writer,
             show_progress=not args.json and not args.quiet)
    summary = an.finish()
    if writer:
        for ev in an.drain_final_events():
            writer.write(ev)
    return summary


def run_file(an, block_iter, info, writer, *, show_progress: bool) -> None:
    """Feed a file's blocks to the analyzer (with a progress bar for files over a minute)."""
    def feed(update=None):
        for b in block_iter:
            evs = an.feed(b)
            if writer:
                for ev in evs:
                    writer.write(ev)
            if update:
                update(b.start_sample + len(b.samples))

    if show_progress and info.duration_s > 60:
        from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

        with Progress(TextColumn("analyzing"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"),
                      TimeRemainingColumn(), console=console(stderr=True), transient=True) as prog:
            task = prog.add_task("a", total=info.frames)
            feed(lambda done: prog.update(task, completed=done))
    else:
        feed()
