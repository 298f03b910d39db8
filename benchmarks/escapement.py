"""Score tickscope's escapement figures on its own simulator beside the independent escapement model.

    python benchmarks/escapement.py --n 10          # 10 score-split cases per kind
    python benchmarks/escapement.py --quick         # 3 per kind
    python benchmarks/escapement.py --split dev --kinds lever-noisy --n 5   # to debug

Own simulator: tickscope.core.escapesim with parameters drawn here (lever watches 18000-36000 beats per
hour, amplitude 200-320 degrees, asymmetry 0-2 ms, noise, rooms, a phone's gain control; pendulum clocks
out of beat by up to 10 %).  Independent: tests/independent/escapement_corpus (a balance and a pendulum
integrated numerically, rooms by pyroomacoustics, phones by pedalboard; it never imports tickscope).
For each kind: how often the sound is called an escapement, the rate, the asymmetry, the lift time and
the amplitude right within their own 95 % intervals (the amplitude at the case's true lift angle, given
as --lift-angle would), the median errors, and the throughput.  Figures only: nothing here is a
pass/fail test, and nobody tunes the analysis on the score split.
"""
from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, ROOT)

from tickscope.pipeline import analyze_samples  # noqa: E402

INDEPENDENT = ("lever-clean", "lever-noisy", "lever-room-phone", "pendulum")
OWN = ("own-lever", "own-pendulum")
SEED_BASE = {"dev": 0, "test": 50000, "score": 100000}


def _own_case(kind: str, seed: int):
    from tickscope.core.escapesim import EscapementScenario, render_all

    r = np.random.default_rng([seed, 7])
    if kind == "own-lever":
        kw = dict(movement="lever", duration_s=40.0, beats_per_hour=float(r.choice([18000, 21600, 28800, 36000])),
                  amplitude_deg=float(r.uniform(200, 320)), lift_angle_deg=float(r.uniform(44, 56)),
                  beat_asymmetry_ms=float(r.uniform(-2, 2)), rate_s_per_day=float(r.uniform(-30, 30)),
                  beat_jitter_us=float(r.uniform(5, 60)), snr_db=float(r.uniform(15, 40)),
                  reverb_rt60_ms=float(r.choice([0, 0, 300])), agc=bool(r.random() < 0.3), seed=seed)
    else:
        bph = float(r.choice([3600, 4800, 7200, 8100, 9000]))
        beat_ms = 3.6e6 / bph
        kw = dict(movement="pendulum", duration_s=60.0, beats_per_hour=bph,
                  beat_asymmetry_ms=float(r.uniform(-0.1, 0.1) * beat_ms), rate_s_per_day=float(r.uniform(-60, 60)),
                  beat_jitter_us=float(r.uniform(50, 400)), snr_db=float(r.uniform(18, 35)),
                  reverb_rt60_ms=float(r.choice([0, 400])), seed=seed)
    sc = EscapementScenario(**kw)
    x, truth = render_all(sc)
    lt = truth.get("lift_time_ms")
    return x[:, 0] if x.ndim > 1 else x, sc.samplerate_hz, dict(
        rate_s_per_day=truth["rate_s_per_day"], beat_asymmetry_ms=truth["beat_asymmetry_ms"],
        lift_time_ms=None if lt is None or kw["movement"] != "lever" else [lt, lt],
        amplitude_deg=truth.get("amplitude_deg") if kw["movement"] == "lever" else None,
        lift_angle_deg=kw.get("lift_angle_deg"), beats_per_hour=kw["beats_per_hour"])


def _independent_case(kind: str, seed: int):
    from tests.independent.escapement_corpus import make_case

    c = make_case(kind, seed)
    T = c.truth
    x = np.asarray(c.audio)
    return x[:, 0] if x.ndim > 1 else x, c.samplerate, dict(
        rate_s_per_day=T.get("rate_s_per_day"), beat_asymmetry_ms=T.get("beat_asymmetry_ms"),
        lift_time_ms=T.get("lift_time_ms") if kind != "pendulum" else None,
        amplitude_deg=T.get("amplitude_deg") if kind != "pendulum" else None,
        lift_angle_deg=T.get("lift_angle_deg"), beats_per_hour=T.get("beats_per_hour"))


def _analyze(x, fs, lift_angle_deg):
    """As `analyze` does it: a quartz step's window, then an escapement's where that hears one."""
    return analyze_samples(x, fs, lift_angle_deg=lift_angle_deg)


def score(kind: str, seed: int) -> dict:
    x, fs, T = (_own_case if kind in OWN else _independent_case)(kind, seed)
    la = T["lift_angle_deg"] if T.get("lift_angle_deg") and T.get("amplitude_deg") else None
    t0 = time.perf_counter()
    s = _analyze(x, fs, la)
    dt = time.perf_counter() - t0
    e = s.escapement
    out = dict(kind=kind, seed=seed, audio_s=len(x) / fs, cpu_s=dt, escapement=s.sound == "escapement" and e is not None)
    if not out["escapement"]:
        return out
    out["bph_right"] = T["beats_per_hour"] is None or abs(e.beats_per_hour - T["beats_per_hour"]) < 1
    r = e.rate
    if r is not None and T["rate_s_per_day"] is not None and out["bph_right"]:
        out["rate_err"] = r.rate_s_per_day - T["rate_s_per_day"]
        out["rate_in"] = abs(out["rate_err"]) <= r.ci95_s_per_day
    if e.beat_asymmetry_ms is not None and T["beat_asymmetry_ms"] is not None:
        # which side is tick cannot be told from the sound: the asymmetry's size is scored
        out["asym_err"] = abs(e.beat_asymmetry_ms) - abs(T["beat_asymmetry_ms"])
        out["asym_in"] = abs(out["asym_err"]) <= e.beat_asymmetry_ci95_ms
    if T["lift_time_ms"] is not None:
        got = [(v, h) for v, h in zip(e.lift_time_ms, e.lift_time_ci95_ms) if v is not None]
        if got:
            m = float(np.mean(T["lift_time_ms"]))
            out["lift_err"] = max((v - m for v, _ in got), key=abs)
            out["lift_in"] = all(abs(v - m) <= h for v, h in got)
        if e.amplitude_deg is not None and T["amplitude_deg"] is not None:
            out["amp_err"] = e.amplitude_deg - T["amplitude_deg"]
            out["amp_in"] = abs(out["amp_err"]) <= e.amplitude_ci95_deg
        out["amp_given"] = e.amplitude_deg is not None
    return out


def _share(rows, key):
    v = [r[key] for r in rows if key in r]
    return f"{sum(v)}/{len(v)}" if v else "-"


def _med(rows, key, fmt):
    v = [abs(r[key]) for r in rows if key in r]
    return format(float(np.median(v)), fmt) if v else "-"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=10)
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--split", choices=tuple(SEED_BASE), default="score")
    ap.add_argument("--kinds", default=",".join(OWN + INDEPENDENT))
    a = ap.parse_args(argv)
    n = 3 if a.quick else a.n
    from rich.console import Console
    from rich.progress import Progress
    from rich.table import Table

    kinds = a.kinds.split(",")
    rows = {k: [] for k in kinds}
    with Progress(transient=True) as prog:
        task = prog.add_task("cases", total=n * len(kinds))
        for k in kinds:
            for i in range(n):
                rows[k].append(score(k, SEED_BASE[a.split] + i))
                prog.advance(task)
    t = Table(title=f"escapement figures, {a.split} split, {n} cases per kind (right = within its own 95 % interval)")
    for c in ("kind", "source", "escapement", "beat rate", "rate right", "|rate err| s/day", "asym right",
              "|asym err| ms", "lift right", "|lift err| ms", "amplitude given", "amp right", "|amp err| deg",
              "x real time"):
        t.add_column(c, justify="right" if c != "kind" else "left")
    for k in kinds:
        R = rows[k]
        esc = [r for r in R if r["escapement"]]
        speed = sum(r["audio_s"] for r in R) / max(sum(r["cpu_s"] for r in R), 1e-9)
        t.add_row(k, "own simulator" if k in OWN else "independent", f"{len(esc)}/{len(R)}", _share(esc, "bph_right"),
                  _share(esc, "rate_in"), _med(esc, "rate_err", ".3f"), _share(esc, "asym_in"),
                  _med(esc, "asym_err", ".3f"), _share(esc, "lift_in"), _med(esc, "lift_err", ".3f"),
                  _share(esc, "amp_given"), _share(esc, "amp_in"), _med(esc, "amp_err", ".1f"), f"{speed:.0f}")
    Console(width=200).print(t)
    return 0


if __name__ == "__main__":
    sys.exit(main())
