"""The command line: the parser and ``main``; the only place errors become messages and exit codes.

Each command lives in its own module of :mod:`tickscope.commands` (``run(args) -> int``),
imported only when chosen.  Exit codes: 0 ok, 2 bad usage, unreadable input, a full disk or
a lost device (everything recorded is kept), 3 no steps could be found, 130 interrupted (Ctrl-C).
"""
from __future__ import annotations

import argparse
import importlib
import os
import sys

from . import __version__
from .commands.common import parse_ppm
from .errors import TickscopeError


def _parents() -> dict[str, argparse.ArgumentParser]:
    """Option groups that several commands share (declared once)."""
    def parent():
        return argparse.ArgumentParser(add_help=False)

    json_ = parent()
    json_.add_argument("--json", action="store_true", help="print one JSON object instead of the report")
    quiet = parent()
    quiet.add_argument("--quiet", action="store_true", help="no progress bar or live screen")
    clock = parent()
    clock.add_argument("--clock-ppm", type=parse_ppm, default=None, metavar="X[+-U]",
                       help="the recording device's clock runs fast by X ppm (95 %% uncertainty U); the rate is corrected")
    clock.add_argument("--clock-profile", metavar="NAME", help="correct the rate with a saved clock profile (see "
                       "calibrate; listen and log use the profile named like --device by default)")
    device = parent()
    device.add_argument("--device", default=None, help="input device index or part of its name (default: the default input)")
    device.add_argument("--rate-hz", dest="samplerate", type=int, default=48000, help="sample rate to ask the device for, Hz (default 48000)")
    movement = parent()
    mv = movement.add_argument_group("the movement")
    mv.add_argument("--movement", choices=("auto", "quartz", "escapement"), default="auto",
                    help="what ticks: a quartz stepping motor, a mechanical escapement (lever or pendulum), or auto "
                         "(the sound decides; default)")
    mv.add_argument("--beats-per-hour", type=float, default=None, metavar="N",
                    help="an escapement's nominal beats per hour, e.g. 28800 (default: the usual value nearest the "
                         "beat heard, said in the report)")
    mv.add_argument("--lift-angle", dest="lift_angle_deg", type=float, default=None, metavar="DEG",
                    help="a lever escapement's lift angle in degrees, from the movement's data "
                         "(default 52, said in the report); the amplitude depends on it")
    return {"json": json_, "quiet": quiet, "clock": clock, "device": device, "movement": movement}


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="tickscope", description="Time a ticking quartz movement by ear: rate in s/day, "
                                "missed steps and ring-down, from a microphone or a recording.")
    p.add_argument("--version", action="version", version=f"tickscope {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    par = _parents()

    a = sub.add_parser("analyze", parents=[par["clock"], par["movement"], par["json"], par["quiet"]],
                       help="analyze a saved recording (default: the bundled demo recording)",
                       description="Find every step in a recording, fit the daily rate with a 95 % interval, "
                       "count missed steps and measure each step's ring-down.")
    a.add_argument("path", nargs="?", help="audio file (WAV, FLAC, Ogg Vorbis or Opus, MP3, ...; a phone's .m4a and "
                   "what else ffmpeg decodes, where installed); omitted: the bundled demo")
    a.add_argument("--channel", type=int, default=None, help="channel to analyze (default: the clearest)")
    a.add_argument("--steps-csv", metavar="PATH", help="write one row per detected event to this CSV file")
    a.add_argument("--plot", metavar="PNG", help="draw the timing residuals and ring-downs to this PNG file")

    sub.add_parser("devices", parents=[par["json"]], help="list audio input devices",
                       description="List the audio input devices PortAudio can use: index, name, host API, default "
                       "sample rate, channels; * marks the default.")

    li = sub.add_parser("listen", parents=[par["device"], par["clock"], par["movement"], par["json"]],
                        help="listen to a movement through a microphone, with a live screen",
                        description="Capture from a microphone and analyze as the steps arrive: the same analysis as "
                        "`analyze`, shown live; Ctrl-C ends with the final report.")
    li.add_argument("--channel", type=int, default=0, help="input channel to analyze (default 0)")
    li.add_argument("--duration", type=float, default=None, metavar="S", help="stop after S seconds of audio")
    li.add_argument("--save", metavar="PATH", help="also record the audio (FLAC or WAV by extension), the per-block "
                    "clock readings to PATH.blocks.csv and the summary to PATH.json")

    c = sub.add_parser("calibrate", parents=[par["device"], par["json"]],
                       help="measure the audio device's clock and keep it as a named profile",
                       description="Measure how fast the audio device's sample clock runs, in ppm with a 95 % interval: "
                       "against the host clock (capture for --seconds), from a saved capture's block readings "
                       "(--from-blocks), or from a recording of a reference movement of known rate (--reference). "
                       "The result is kept as a named profile for --clock-profile.")
    c.add_argument("name", nargs="?", help="profile name (use the device's name to have listen use it by default)")
    c.add_argument("--seconds", type=float, default=600.0, help="capture length for the host-clock method (default 600)")
    c.add_argument("--latency", default="high", help="PortAudio latency: high, low or seconds (default high)")
    c.add_argument("--from-blocks", metavar="CSV", help="calibrate from a saved capture's PATH.blocks.csv")
    c.add_argument("--reference", metavar="AUDIO", help="a recording, through the device, of a movement of known rate")
    c.add_argument("--known-rate", type=parse_ppm, default=None, metavar="R[+-U]",
                   help="the reference movement's rate and its 95 %% uncertainty, s/day")
    c.add_argument("--list", action="store_true", help="list the saved profiles")
    c.add_argument("--max-age-days", type=float, default=90.0, help="profiles older than this are flagged stale")

    lg = sub.add_parser("log", parents=[par["device"], par["clock"], par["movement"], par["json"], par["quiet"]],
                        help="log a movement's steps for hours or days into a database (crash-safe)",
                        description="Log every step of a movement into an SQLite database, committed every few "
                                    "seconds. Running it again on the same database resumes the log as a new "
                                    "segment. Read it with `tickscope report DB` (also while it is being written).")
    lg.add_argument("db", help="the log database (created if missing, resumed if it exists)")
    lg.add_argument("--source", metavar="PATH", help="log from a recording, as fast as it can be read")
    lg.add_argument("--hours", type=float, default=None, metavar="H", help="stop after H hours of audio (default: "
                    "until Ctrl-C or the end of the recording)")
    lg.add_argument("--label", default=None, help="what is logged, e.g. 'hall clock, after service'")
    lg.add_argument("--channel", type=int, default=None, help="channel to analyze")
    lg.add_argument("--keep-audio", choices=("none", "anomalies"), default="none",
                    help="keep short clips around missed and failed steps, correction pulses and other sounds "
                         "(default none: no audio is kept)")
    lg.add_argument("--clip-budget-mb", type=float, default=20.0, help="at most this many MB of clips (default 20)")

    rp = sub.add_parser("report", parents=[par["clock"], par["json"]],
                        help="report on a log: rate over time, time error, Allan deviation, plots",
                        description="Read a log database (also one still being written) and report the rate "
                                    "per hour and minute, the time interval error, the overlapping Allan deviation, "
                                    "missed and failed steps, gaps and ring-down over time.")
    rp.add_argument("db", help="the log database")
    rp.add_argument("--out", metavar="DIR", help="write rate.png, tie.png, adev.png, ringdown.png (balance.png for a balance's amplitudes) and report.json here")
    rp.add_argument("--steps-csv", metavar="PATH", help="export every logged event (same columns as analyze)")
    rp.add_argument("--clock-from-host", action="store_true",
                    help="correct each device segment by its own clock measured against the host clock during "
                         "the log (the host clock must be NTP-disciplined)")

    s = sub.add_parser("simulate", help="write a simulated recording with its truth file",
                       description="Write a recording of a simulated movement -- a quartz stepping motor "
                       "(--movement wallclock, wristwatch or alarmclock) or a mechanical escapement (--movement lever "
                       "or pendulum) -- as WAV, FLAC, Ogg Vorbis, Opus or MP3 by extension, and NAME.truth.json beside "
                       "it with every parameter and the true time of every step or beat.")
    s.add_argument("out", help="output audio file (.wav, .flac, .ogg, .opus, .mp3)")
    s.add_argument("--description", help="a line describing the scenario, stored in the truth file")
    s.add_argument("--compression-level", type=float, metavar="C",
                   help="lossy formats: 0 (best quality, largest) .. 1 (smallest); e.g. 0.9 gives Opus at ~28 kbit/s, "
                        "like a messaging app's voice note")
    from .commands.simulate import add_options
    from .commands.simulate_escapement import add_escapement_options

    add_options(s)
    add_escapement_options(s)
    for name, sp in sub.choices.items():
        sp.set_defaults(command=name)
    return p


def main(argv: list[str] | None = None) -> int:
    from . import runtime

    runtime.tune()
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return 2
    try:
        command = importlib.import_module(f".commands.{args.command}", __package__)
        code = int(command.run(args) or 0)
        sys.stdout.flush()
        return code
    except KeyboardInterrupt:
        sys.stderr.write("tickscope: interrupted\n")
        return 130
    except BrokenPipeError:  # `tickscope analyze --json | head`: the reader left; end quietly
        _quiet_stdout()
        return 0
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


def _quiet_stdout() -> None:
    """Point stdout at /dev/null so that the interpreter's last flush finds no closed pipe."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError):
        pass


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
