"""Score tickscope's escapement figures on its own simulator beside the independent escapement model.

    python benchmarks/escapement.py --n 10          # 10 score-split cases per kind
    python benchmarks/escapement.py --quick         # 3 per kind
    python benchmarks/escapement.py --split dev --kinds lever-noisy --n 5   # to debug
    python benchmarks/escapement.py --n 34 --hour    # 204 recordings for coverage, and 1 h for throughput

Own simulator: tickscope.core.escapesim with parameters drawn here (lever watches 18000-36000 beats per
hour, amplitude 200-320 degrees, asymmetry 0-2 ms, noise, rooms, a phone's gain control; pendulum clocks
out of beat by up to 10 %).  Independent: tests/independent/escapement_corpus (a balance and a pendulum
integrated numerically, rooms by pyroomacoustics, phones by pedalboard; it never imports tickscope).
For each kind: how often the sound is called an escapement, the rate, the asymmetry, the lift time and
the amplitude right within their own 95 % intervals (the amplitude at the case's true lift angle, given
as --lift-angle would), the median errors, and the throughput; first the issue's target recording (2 min of a
28800/h watch at 25 dB with 20 us of beat jitter: rate, asymmetry, amplitude, missed and extra beats, beat timing
against the Cramér-Rao bound, and the SNR down to 10 dB), and with --hour the throughput on 1 h.  Figures only: nothing here is a
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


# -- the targets on one kind of recording, beat timing against the Cramér-Rao bound ------------
TARGET = dict(movement="lever", duration_s=120.0, beats_per_hour=28800.0, snr_db=25.0, beat_jitter_us=20.0)


def _beats(x, fs, lift_angle_deg):
    """Every beat heard (times s, sides 0/1) and the summary, heard with an escapement's window."""
    from tickscope.model import Block
    from tickscope.pipeline import Analyzer

    an = Analyzer(fs, movement="escapement", lift_angle_deg=lift_angle_deg)
    for j in range(0, len(x), 65536):
        an.feed(Block(x[j:j + 65536], j))
    s = an.finish()
    return an.step_t.values.copy(), an.step_pol.values.copy(), s


def _beat_crlb_s(sc) -> float:
    """The Cramér-Rao bound on timing one whole beat (all its sounds, as one known waveform) in the
    scenario's white noise: the noiseless beat from the same scenario, the noise's sigma from the
    noisy recording's quiet lead-in (timing.crlb_s; Kay 1993, from memory)."""
    from tickscope.core.escapesim import render_all
    from tickscope.core.timing import crlb_s

    fs = sc.samplerate_hz
    clean = render_all(sc.replace(snr_db=200.0, duration_s=1.0, beat_jitter_us=0.0))[0][:, 0]
    noisy = render_all(sc.replace(duration_s=1.0))[0][:, 0]
    i0 = int((sc.first_beat_s - 0.003) * fs)
    sigma = float(np.std(noisy[int(0.02 * fs):i0]))
    beat = clean[i0:i0 + int(0.9 * 3600.0 / sc.beats_per_hour * fs)]
    return crlb_s(beat, fs, sigma)


def target_case(seed: int, **changes) -> dict:
    """One recording of the issue's target kind (2 min of a 28800/h watch at 25 dB, 20 us of beat
    jitter; asymmetry, amplitude, lift angle and rate drawn), scored beat by beat against the truth."""
    from tickscope.core.escapesim import EscapementScenario, render_all

    r = np.random.default_rng([seed, 11])
    sc = EscapementScenario(**{**TARGET, **changes}, amplitude_deg=float(r.uniform(200, 310)),
                            lift_angle_deg=float(r.uniform(44, 56)), beat_asymmetry_ms=float(r.uniform(-1.5, 1.5)),
                            rate_s_per_day=float(r.uniform(-20, 20)), seed=seed)
    x, truth = render_all(sc)
    x = x[:, 0].astype(np.float32)
    t, pol, s = _beats(x, sc.samplerate_hz, sc.lift_angle_deg)
    true_t = np.array([b["time_s"] for b in truth["beats"] if b["time_s"] < sc.duration_s - 0.05])
    # each beat heard against the nearest true beat (its first sound; a beat is timed where its
    # template is, the drop: a constant offset, taken out first): within 2 ms it is that beat, else an extra
    def nearest(tq):
        i = np.searchsorted(true_t, tq).clip(1, len(true_t) - 1)
        return np.where(np.abs(true_t[i - 1] - tq) < np.abs(true_t[i] - tq), i - 1, i)

    near = nearest(t)
    lag = float(np.median(t - true_t[near])) if len(t) else 0.0
    near = nearest(t - lag)
    d = t - true_t[near]
    hit = np.abs(d - lag) < 0.002
    out = dict(seed=seed, snr_db=sc.snr_db, true_beats=len(true_t), found=int(len(np.unique(near[hit]))),
               extra=int((~hit).sum()))
    out["missed"] = out["true_beats"] - out["found"]
    # timing: each side's own reference point (where its template is timed) is a constant offset
    res = np.concatenate([d[hit & (pol == p)] - np.median(d[hit & (pol == p)]) for p in (0, 1) if (hit & (pol == p)).any()])
    out["timing_rms_us"] = float(np.sqrt(np.mean(res ** 2)) * 1e6) if len(res) else float("nan")
    out["crlb_us"] = _beat_crlb_s(sc) * 1e6
    e = s.escapement
    if e is not None and e.rate is not None:
        out["rate_err"] = e.rate.rate_s_per_day - truth["rate_s_per_day"]
        out["rate_in"] = abs(out["rate_err"]) <= e.rate.ci95_s_per_day
    if e is not None and e.beat_asymmetry_ms is not None:
        out["asym_err"] = abs(e.beat_asymmetry_ms) - abs(truth["beat_asymmetry_ms"])
    if e is not None and e.amplitude_deg is not None:
        out["amp_err"] = e.amplitude_deg - truth["amplitude_deg"]
    return out


def print_targets(n: int) -> None:
    from rich.console import Console
    from rich.table import Table

    con = Console(width=200)
    rows = [target_case(200000 + i) for i in range(n)]
    t = Table(title=f"the target recording: 2 min of a 28800/h lever watch at 25 dB, 20 us beat jitter ({n} seeds; "
                    "targets: rate <= 0.05 s/day, asymmetry <= 0.05 ms, amplitude <= 5 deg at the true lift angle)")
    for c in ("seed", "beats (true)", "missed", "extra", "|rate err| s/day", "rate in its interval", "|asym err| ms",
              "|amp err| deg", "timing RMS us", "CRLB us", "timing / CRLB"):
        t.add_column(c, justify="right")
    for r in rows:
        t.add_row(str(r["seed"]), str(r["true_beats"]), str(r["missed"]), str(r["extra"]),
                  *(f"{abs(r[k]):.3f}" if k in r else "-" for k in ("rate_err",)), str(r.get("rate_in", "-")),
                  *(f"{abs(r[k]):{f}}" if k in r else "-" for k, f in (("asym_err", ".3f"), ("amp_err", ".1f"))),
                  f"{r['timing_rms_us']:.2f}", f"{r['crlb_us']:.2f}", f"{r['timing_rms_us'] / r['crlb_us']:.1f}")
    con.print(t)
    # beats missed or extra as the noise rises (the target: none to 12 dB)
    t = Table(title="beats missed and extra against the SNR (the target recording's kind, 3 seeds each; target: none to 12 dB)")
    for c in ("SNR dB", "true beats", "missed", "extra", "timing RMS us", "CRLB us"):
        t.add_column(c, justify="right")
    for snr in (40.0, 30.0, 20.0, 15.0, 12.0, 10.0):
        rs = [target_case(210000 + i, snr_db=snr) for i in range(3)]
        t.add_row(f"{snr:g}", str(sum(r["true_beats"] for r in rs)), str(sum(r["missed"] for r in rs)),
                  str(sum(r["extra"] for r in rs)), f"{np.median([r['timing_rms_us'] for r in rs]):.2f}",
                  f"{np.median([r['crlb_us'] for r in rs]):.2f}")
    con.print(t)


def print_hour(tmp: str) -> None:
    """Whole-process throughput of ``tickscope analyze`` on 1 h of a 28800/h lever watch (48 kHz,
    16-bit WAV), paired with a float32 read of the same file (benchmarks/run.py's method)."""
    import soundfile as sf

    from run import _cli_env, read_only_seconds, run_cli
    from tickscope.core.escapesim import EscapementRenderer, EscapementScenario

    sc = EscapementScenario(movement="lever", duration_s=3600.0, snr_db=30.0, beat_jitter_us=20.0,
                            rate_s_per_day=4.2, beat_asymmetry_ms=0.6, seed=9)
    path = os.path.join(tmp, "lever_1h.wav")
    ren = EscapementRenderer(sc)
    n_total = int(sc.duration_s * sc.samplerate_hz)
    with sf.SoundFile(path, "w", sc.samplerate_hz, 1, subtype="PCM_16") as f:
        for j in range(0, n_total, 1 << 20):
            f.write(np.clip(ren.render(min(1 << 20, n_total - j))[:, 0], -1, 1))
    os.sync()
    env = _cli_env()
    run_cli(path, env)  # warm-up
    rd = read_only_seconds(path)[0]
    wall, cpu, rss, d = run_cli(path, env)
    print(f"1 h of a 28800/h lever watch: analyze {wall:.1f} s = {3600 / wall:,.0f}x real time (CPU {cpu:.1f} s, peak "
          f"RSS {rss:.0f} MB); reading alone as float32 {rd:.2f} s = {3600 / rd:,.0f}x; the target is 3000x")
    if d and d.get("escapement"):
        e = d["escapement"]
        print(f"  beats {d['steps_detected']}, rate {e['rate_s_per_day']:+.4f} ± {e['rate_ci95_s_per_day']:.4f} s/day "
              f"(truth +4.2), asymmetry {e['beat_asymmetry_ms']} ms (truth ±0.6)")
    os.remove(path)


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
    ap.add_argument("--targets", type=int, default=5, metavar="N",
                    help="seeds of the target recording (0: skip it and the SNR sweep)")
    ap.add_argument("--hour", action="store_true", help="also time analyze on 1 h of a lever watch (a few minutes)")
    a = ap.parse_args(argv)
    n = 3 if a.quick else a.n
    if a.targets:
        print_targets(2 if a.quick else a.targets)
    if a.hour:
        import tempfile

        with tempfile.TemporaryDirectory() as tmp:
            print_hour(tmp)
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
    # the intervals' coverage pooled over the kinds (--n 34: 204 recordings; target 93-97 %)
    for side, ks in (("own simulator", [k for k in kinds if k in OWN]), ("independent", [k for k in kinds if k not in OWN])):
        esc = [r for k in ks for r in rows[k] if r["escapement"]]
        if not esc:
            continue
        parts = []
        for key, name in (("rate_in", "rate"), ("asym_in", "asymmetry"), ("lift_in", "lift"), ("amp_in", "amplitude")):
            v = [r[key] for r in esc if key in r]
            if v:
                parts.append(f"{name} {sum(v)}/{len(v)} ({100 * np.mean(v):.0f} %)")
        print(f"coverage of the 95 % intervals, {side} ({sum(len(rows[k]) for k in ks)} recordings): " + ", ".join(parts))
    return 0


if __name__ == "__main__":
    sys.exit(main())
