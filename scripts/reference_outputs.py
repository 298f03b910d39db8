"""Write the JSON and steps CSV of a fixed set of reference recordings, for before/after comparisons.

    python scripts/reference_outputs.py OUT_DIR      # then: diff -r OUT_BEFORE OUT_AFTER

A restructuring or a speed-up must leave every file identical; a fix changes only the files it
means to.  The set: the four bundled demo recordings (two quartz, a lever watch, a pendulum), the real recordings when
scripts/fetch-real-recordings.sh has fetched them, and simulated recordings of the cases that
exercise every diagnosis (made by the simulator with fixed seeds, into OUT_DIR/audio).  The
script also logs one of them and writes the log report's JSON.  Timings and paths are removed
from the JSON so that only results are compared.
"""
from __future__ import annotations

import contextlib
import io
import json
import os
import sys

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)

# (name, simulate options): each a case the analysis must keep reading the same way
CASES = {
    "inhibition": ["--duration-s", "300", "--rate-s-per-day", "1.5", "--inhibition-period-s", "60",
                   "--inhibition-pulses", "39", "--snr-db", "30", "--seed", "3"],
    "burst": ["--duration-s", "90", "--burst-steps", "2", "--snr-db", "30", "--seed", "4"],
    "burst4": ["--duration-s", "90", "--burst-steps", "4", "--burst-spacing-ms", "45", "--snr-db", "30", "--seed", "12"],
    "failed": ["--duration-s", "120", "--failed-steps", "20,51,80", "--correction-delay-ms", "30",
               "--snr-db", "30", "--seed", "5"],
    "other-clock": ["--duration-s", "150", "--second-clock-rate-s-per-day", "-40", "--second-clock-db", "-9",
                    "--snr-db", "28", "--seed", "6"],
    "phone-8k": ["--samplerate-hz", "8000", "--duration-s", "120", "--agc", "--reverb-rt60-ms", "200",
                 "--noise", "pink", "--snr-db", "20", "--second-impact-ms", "40", "--seed", "7"],
    "drive-levels": ["--duration-s", "400", "--drive-levels-db", "0,-4,-8", "--drive-level-period-s", "100",
                     "--snr-db", "30", "--seed", "8"],
    "rattle": ["--duration-s", "60", "--rattle-impacts", "3", "--jitter-us", "3000", "--seed", "9"],
    "missed-gate": ["--duration-s", "120", "--missed-steps", "10,11,60", "--gate-dbfs", "-60", "--snr-db", "25",
                    "--seed", "10"],
}


def _run(argv: list[str]) -> tuple[int, str]:
    from tickscope.cli import main

    out = io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(io.StringIO()):
        try:
            rc = main(argv)
        except SystemExit as e:  # argparse
            rc = int(e.code or 0)
    return rc, out.getvalue()


def _clean(d):
    """Drop what changes from run to run (paths, wall-clock times)."""
    if isinstance(d, dict):
        return {k: _clean(v) for k, v in d.items() if k not in ("source", "db", "wall_seconds", "started_wall",
                                                                 "ended_wall", "created", "plots")}
    if isinstance(d, list):
        return [_clean(v) for v in d]
    return d


def main(out_dir: str) -> int:
    os.environ["COLUMNS"] = "100"
    os.makedirs(os.path.join(out_dir, "audio"), exist_ok=True)
    files = {"kitchen": os.path.join(ROOT, "recordings", "kitchen-wall-clock.flac"),
             "wristwatch": os.path.join(ROOT, "recordings", "bench-wristwatch.flac"),
             "lever-watch": os.path.join(ROOT, "recordings", "bench-lever-watch.flac"),
             "pendulum": os.path.join(ROOT, "recordings", "mantel-pendulum.flac")}
    real = os.path.join(ROOT, "recordings", "real")
    for name in ("wall-clock.ogg", "kitchen-timer.ogg", "two-ticks.ogg"):
        if os.path.exists(os.path.join(real, name)):
            files["real-" + name.split(".")[0]] = os.path.join(real, name)
    for name, opts in CASES.items():
        path = os.path.join(out_dir, "audio", name + ".flac")
        if not os.path.exists(path):
            rc, _ = _run(["simulate", path, *opts])
            if rc:
                print(f"simulate {name} failed ({rc})", file=sys.stderr)
                return 1
        files[name] = path
    for name, path in files.items():
        csv = os.path.join(out_dir, name + ".steps.csv")
        rc, text = _run(["analyze", path, "--json", "--quiet", "--steps-csv", csv])
        try:
            d = _clean(json.loads(text))
        except ValueError:
            d = {"unparsed": text}
        with open(os.path.join(out_dir, name + ".json"), "w") as f:
            json.dump({"exit": rc, "result": d}, f, indent=1, sort_keys=True)
        _, report = _run(["analyze", path, "--quiet"])  # the human report, at COLUMNS=100
        with open(os.path.join(out_dir, name + ".txt"), "w") as f:
            f.write(report.replace(path, os.path.basename(path)))
        print(f"{name}: exit {rc}")
    db = os.path.join(out_dir, "log.db")
    for suffix in ("", "-wal", "-shm"):
        with contextlib.suppress(FileNotFoundError):
            os.remove(db + suffix)
    rc, text = _run(["log", db, "--source", files["failed"], "--json", "--quiet"])
    rc2, text2 = _run(["report", db, "--json"])
    _, report = _run(["report", db])
    with open(os.path.join(out_dir, "log.txt"), "w") as f:
        f.write(report.replace(db, os.path.basename(db)))
    with open(os.path.join(out_dir, "log.json"), "w") as f:
        json.dump({"exit": [rc, rc2], "log": _clean(json.loads(text or "{}")), "report": _clean(json.loads(text2 or "{}"))},
                  f, indent=1, sort_keys=True)
    print(f"log: exit {rc}, report: exit {rc2}")
    return 0


if __name__ == "__main__":
    if len(sys.argv) != 2:
        sys.exit(__doc__)
    sys.exit(main(sys.argv[1]))
