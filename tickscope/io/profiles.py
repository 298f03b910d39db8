"""Named device-clock profiles, kept as JSON in the user's configuration directory (platformdirs)."""
from __future__ import annotations

import datetime as dt
import json
import os
from dataclasses import asdict, dataclass, fields

from ..errors import ParameterError, StoreError
from ..units import SECONDS_PER_DAY

FILE = "clock-profiles.json"


@dataclass(frozen=True)
class ClockProfile:
    name: str
    ppm: float
    u95_ppm: float
    method: str  # "host-clock", "reference", "saved-capture"
    created: str  # ISO 8601, UTC
    duration_s: float
    device: str = ""
    host_sync: str = "unknown"  # what the system said about its own clock at the time
    note: str = ""
    setup: str = ""  # how the device was opened (a virtual device's clock can depend on it)

    def age_days(self, now: dt.datetime | None = None) -> float:
        now = now or dt.datetime.now(dt.timezone.utc)
        try:
            t = dt.datetime.fromisoformat(self.created)
        except ValueError:
            return float("inf")
        return (now - t).total_seconds() / SECONDS_PER_DAY


def config_dir() -> str:
    env = os.environ.get("TICKSCOPE_CONFIG_DIR")
    if env:
        return env
    import platformdirs

    return platformdirs.user_config_dir("tickscope")


def _path() -> str:
    return os.path.join(config_dir(), FILE)


def load_all() -> dict[str, ClockProfile]:
    p = _path()
    if not os.path.exists(p):
        return {}
    try:
        with open(p) as f:
            raw = json.load(f)
        known = {f.name for f in fields(ClockProfile)}
        return {k: ClockProfile(**{a: b for a, b in v.items() if a in known}) for k, v in raw.items()}
    except (OSError, ValueError, TypeError) as e:
        raise StoreError(f"cannot read the clock profiles in {p}: {e}") from e


def save(profile: ClockProfile) -> str:
    allp = load_all()
    allp[profile.name] = profile
    p = _path()
    try:
        os.makedirs(os.path.dirname(p), exist_ok=True)
        tmp = p + ".tmp"
        with open(tmp, "w") as f:
            json.dump({k: asdict(v) for k, v in allp.items()}, f, indent=1)
        os.replace(tmp, p)  # never a half-written profile file
    except OSError as e:
        raise StoreError(f"cannot write the clock profiles in {p}: {e.strerror}") from e
    return p


def get(name: str) -> ClockProfile:
    allp = load_all()
    if name not in allp:
        known = ", ".join(sorted(allp)) or "none yet (run tickscope calibrate)"
        raise ParameterError(f"no clock profile named {name!r}; known: {known}")
    return allp[name]


def now_iso() -> str:
    return dt.datetime.now(dt.timezone.utc).replace(microsecond=0).isoformat()


def host_sync_status() -> str:
    """What the system says about its clock discipline ('synchronised', 'not synchronised', 'unknown')."""
    import shutil
    import subprocess

    if shutil.which("timedatectl"):
        try:
            r = subprocess.run(["timedatectl", "show", "-p", "NTPSynchronized", "--value"], capture_output=True,
                               text=True, timeout=5)
            if r.returncode == 0 and r.stdout.strip() in ("yes", "no"):
                return "synchronised (NTP)" if r.stdout.strip() == "yes" else "not synchronised"
        except (OSError, subprocess.SubprocessError):
            pass
    if shutil.which("chronyc"):
        try:
            r = subprocess.run(["chronyc", "tracking"], capture_output=True, text=True, timeout=5)
            if r.returncode == 0 and "Leap status     : Normal" in r.stdout:
                return "synchronised (chrony)"
        except (OSError, subprocess.SubprocessError):
            pass
    return "unknown"
