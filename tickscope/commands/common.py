"""What several commands share: the console, the clock correction chosen by the options, the
bundled recordings, and the helpers of the live screens."""
from __future__ import annotations

import argparse
import math
import os
import re
from dataclasses import dataclass

from ..errors import ParameterError

DEMO_RECORDING = "kitchen-wall-clock.flac"
#: A clock profile older than this is flagged stale (a sound card's clock drifts with age and
#: temperature; our own choice).
STALE_DAYS = 90.0


def console(stderr: bool = False):
    """A rich console (stdout, or stderr for progress and notes)."""
    from rich.console import Console

    return Console(stderr=stderr, highlight=False)


def text(s: str, style: str = ""):
    from rich.text import Text

    return Text(s, style=style)


def recordings_dir() -> str:
    """The folder of the bundled demo recordings (beside the package, or in the checkout)."""
    here = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    for cand in (os.path.join(here, "recordings"), os.path.join(os.path.dirname(here), "recordings")):
        if os.path.isdir(cand):
            return cand
    return os.path.join(os.path.dirname(here), "recordings")


_NUMBER = r"[-+]?\d+(?:\.\d*)?(?:[eE][-+]?\d+)?"


def parse_ppm(value: str) -> tuple[float, float]:
    """'12.5' or '12.5+-0.3' or '12.5±0.3' -> (value, u95)."""
    m = re.fullmatch(rf"\s*({_NUMBER})\s*(?:(?:\+-|±|\+/-)\s*(\d+(?:\.\d*)?(?:[eE][-+]?\d+)?))?\s*", value)
    if not m:
        raise argparse.ArgumentTypeError(f"{value!r} is not a value like 12.5 or 12.5+-0.3")
    return float(m.group(1)), float(m.group(2) or 0.0)


@dataclass(frozen=True)
class ClockChoice:
    """The device-clock correction a command applies: ppm (None: uncalibrated), its 95 %
    half-width, and the time base in words."""

    ppm: float | None
    u95_ppm: float
    time_base: str


def clock_from_args(args, device_name: str | None = None) -> ClockChoice:
    """The correction from --clock-ppm / --clock-profile (or the profile named like the device)."""
    from .. import advice
    from ..io import profiles

    ppm_opt = getattr(args, "clock_ppm", None)
    name = getattr(args, "clock_profile", None)
    if ppm_opt is not None and name:
        raise ParameterError("give either --clock-ppm or --clock-profile, not both")
    if ppm_opt is not None:
        ppm, u = ppm_opt
        return ClockChoice(ppm, u, f"corrected by --clock-ppm {ppm:+g} (± {u:g} ppm, 95 %)")
    auto = False
    if not name and device_name and device_name in profiles.load_all():
        name, auto = device_name, True
    if name:
        pr = profiles.get(name)
        return ClockChoice(pr.ppm, pr.u95_ppm, advice.profile_time_base(pr, auto=auto, stale_days=STALE_DAYS))
    return ClockChoice(None, 0.0, advice.UNCALIBRATED_TIME_BASE)


class Refit:
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


class PeakMeter:
    """Input level for the live screens: the peak of the last half second, dBFS."""

    def __init__(self, window_s: float = 0.5):
        self.window_s = window_s
        self._peaks: list[tuple[float, float]] = []

    def update(self, samples, now: float) -> float:
        pk = float(abs(samples).max()) if len(samples) else 0.0
        self._peaks = [(t, v) for t, v in self._peaks if now - t < self.window_s] + [(now, pk)]
        return 20 * math.log10(max(max(v for _, v in self._peaks), 1e-6))


def write_json(d) -> None:
    """One JSON object on stdout."""
    import json
    import sys

    sys.stdout.write(json.dumps(d, indent=1) + "\n")


def movement_options(args) -> dict:
    """The Analyzer's movement keywords from ``--movement``, ``--beats-per-hour``, ``--lift-angle``
    (checked there: a one-line error for a value no escapement has)."""
    return {"movement": getattr(args, "movement", "auto") or "auto",
            "beats_per_hour": getattr(args, "beats_per_hour", None),
            "lift_angle_deg": getattr(args, "lift_angle_deg", None)}
