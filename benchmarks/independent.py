"""Score tickscope on independent corpora (sox, an integrated Lavet motor) beside its own simulator.

    python benchmarks/independent.py --n 20            # 20 score-split cases per corpus
    python benchmarks/independent.py --quick           # 3 per corpus
    python benchmarks/independent.py --n 20 --json out.json
    python benchmarks/independent.py --kinds motor-faults,sox-noisy --split dev --n 5   # to debug

Every case is written to a temporary file and analyzed by `python -m tickscope analyze PATH --json
--quiet --steps-csv CSV` in its own process.  The generators (tests/independent/) never import
tickscope; the two project-simulator columns (sim-realistic: benchmarks/run.py's realistic_scenario;
sim-faults: its Scenario with logic regulation, bursts, failed steps, drive levels) use
tickscope.core.simulate, and only here.  Figures only: nothing here is a pass/fail test, and nobody
tunes the analysis on the score split.
"""
from __future__ import annotations

import argparse
import csv
import json
import os
import subprocess
import sys
import tempfile
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, ROOT)

INDEPENDENT = ("sox-clean", "sox-resampled", "sox-noisy", "motor-clean", "motor-room", "motor-phone", "motor-lossy",
               "motor-faults", "no-diagnosis", "short-clips")
SIM = ("sim-realistic", "sim-faults")
DIAG = ("inhibition", "burst", "failed", "correction", "drive_levels", "position_locked", "other_clock")
SIM_SEED_BASE = {"dev": 0, "test": 50000, "score": 100000}


def _nice():
    try:
        os.nice(10)
    except OSError:
        pass


# ----------------------------------------------------------------------------------- case builders


def _sim_case(kind: str, seed: int):
    """A project-simulator case (the only place tickscope.core.simulate is used), truth mapped to
    the independent schema."""
    from tickscope.core.simulate import Scenario

    if kind == "sim-realistic":
        sys.path.insert(0, HERE)
        from run import realistic_scenario  # noqa: E402

        kw = realistic_scenario(seed)
    else:
        r = np.random.default_rng(seed)
        sub = str(r.choice(["inhibition", "burst", "failed", "drive"]))
        kw = dict(duration_s=150.0, seed=2000 + seed, rate_s_per_day=float(r.uniform(-5, 5)),
                  samplerate_hz=int(r.choice([16000, 22050, 44100, 48000])),
                  movement=str(r.choice(["wallclock", "wristwatch", "alarmclock"])), snr_db=float(r.uniform(18, 35)))
        if sub == "inhibition":
            p = int(r.choice([10, 60]))
            kw.update(duration_s=float(max(250, 2.6 * p)), inhibition_period_s=float(p),
                      inhibition_pulses=int(r.integers(5, 40)), inhibition_pulse_hz=float(r.choice([32768.0, 8192.0])))
        elif sub == "burst":
            kw.update(burst_steps=int(r.choice([2, 4])), burst_spacing_ms=float(r.uniform(30, 60)))
        elif sub == "failed":
            f = sorted(int(v) for v in r.choice(np.arange(10, 140), size=3, replace=False))
            kw.update(failed_steps=tuple(f), correction_delay_ms=float(r.choice([0.0, 35.0])))
        else:
            kw.update(duration_s=300.0, drive_levels_db=(0.0, 4.0), drive_level_period_s=90.0)
    sc = Scenario(**kw)
    x, truth = sim_truth(sc, corpus=kind, seed=seed, notes="project simulator")
    return x, sc.samplerate_hz, truth, None, ".wav"


def sim_truth(sc, *, corpus: str, seed: int, notes: str, position_locked: bool = False):
    """Render a project-simulator scenario: (the movement's channel, its truth in the independent
    corpora's schema)."""
    from tickscope.core.simulate import render_all

    x, tr = render_all(sc)
    x = x[:, sc.step_channel].astype(np.float32)
    end = sc.duration_s - 0.1
    st = [s for s in tr["steps"] if s["time_s"] < end]
    steps = [s for s in st if s["kind"] == "step"]
    inh = None
    if sc.inhibition_period_s > 0 and sc.inhibition_pulses:
        inh = dict(period_s=sc.inhibition_period_s, correction_us=tr["expected"]["inhibition_correction_us"],
                   pulses=sc.inhibition_pulses, pulse_hz=sc.inhibition_pulse_hz)
    failed = [s["step"] for s in st if s["kind"] == "failed"]
    truth = dict(
        kind="stepping", samplerate=sc.samplerate_hz, duration_s=sc.duration_s, interval_s=sc.step_interval_s,
        rate_s_per_day=tr["expected"]["rate_device_time_s_per_day"],
        step_times_s=[s["time_s"] for s in steps], step_numbers=[s["step"] for s in steps],
        polarities=[s["polarity"] for s in steps],
        missed_steps=[s["step"] for s in st if s["kind"] == "silent"], failed_steps=failed, aligned_steps=[],
        correction_pulses=failed if sc.correction_delay_ms > 0 else [],
        burst=(dict(period_s=float(sc.burst_steps), steps_per_burst=sc.burst_steps, spacing_ms=sc.burst_spacing_ms)
               if sc.burst_steps > 1 else None),
        inhibition=inh, drive_levels=(len(sc.drive_levels_db) if len(sc.drive_levels_db) > 1 else None),
        other_clock=(dict(rate_s_per_day=sc.second_clock_rate_s_per_day, level_db=sc.second_clock_db)
                     if sc.second_clock_rate_s_per_day is not None else None),
        position_locked=dict(period_steps=60) if position_locked else None, decay_ms=None, snr_db=sc.snr_db,
        crlb_us=None, lossy=None, room=({"rt60_s": sc.reverb_rt60_ms / 1e3} if sc.reverb_rt60_ms else None),
        drops=[], timing_scored=not (sc.variation_db or sc.variation_freq_pct or sc.jitter_us or sc.drive_levels_db),
        notes=notes, corpus=corpus, seed=seed)
    return x, truth


def _independent_case(kind: str, seed: int):
    from tests.independent import corpus

    c = corpus.case(kind, seed)
    return c.audio, c.samplerate, c.truth, c.encoded, c.suffix


# -------------------------------------------------------------------------------------------- scoring


def analyze(path: str, csv_path: str) -> tuple[dict | None, list[dict], str]:
    env = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}
    for attempt in range(3):
        r = subprocess.run([sys.executable, "-m", "tickscope", "analyze", path, "--json", "--quiet", "--steps-csv", csv_path],
                           capture_output=True, text=True, env=env, cwd=ROOT)
        if r.stdout.strip():
            try:
                js = json.loads(r.stdout)
            except json.JSONDecodeError:
                js = None
            rows = []
            if os.path.exists(csv_path):
                with open(csv_path) as f:
                    rows = list(csv.DictReader(f))
            return js, rows, r.stderr.strip()[-300:]
        if r.returncode in (3,):  # no steps: no JSON may follow
            return None, [], r.stderr.strip()[-300:]
        time.sleep(20)  # the CLI may be mid-edit by another engineer
    return None, [], r.stderr.strip()[-300:]


def _first_polarity_map(truth: dict) -> dict:
    pols = truth.get("polarities") or []
    if not pols:
        return {}
    first = pols[0]
    other = "B" if first == "A" else "A"
    return {first: "A", other: "B"}


def score(kind: str, seed: int, audio, fs, truth, encoded, suffix) -> dict:
    import soundfile as sf

    with tempfile.TemporaryDirectory(prefix="tsind") as d:
        path = os.path.join(d, f"case{suffix}")
        if encoded is not None:
            with open(path, "wb") as f:
                f.write(encoded)
        else:
            sf.write(path, np.clip(audio, -1, 1), int(fs), subtype="PCM_24")
        js, rows, err = analyze(path, os.path.join(d, "steps.csv"))
    n_steps = len(truth["step_times_s"])
    empty_truth = len(truth["missed_steps"]) + len(truth.get("aligned_steps", [])) + len(truth["failed_steps"])
    out = dict(kind=kind, seed=seed, n_steps=n_steps, truth_rate=truth["rate_s_per_day"], error=None)
    has = {
        "inhibition": truth.get("inhibition") is not None, "burst": truth.get("burst") is not None,
        "failed": bool(truth.get("failed_steps")), "correction": bool(truth.get("correction_pulses")),
        "drive_levels": truth.get("drive_levels") is not None, "position_locked": truth.get("position_locked") is not None,
        "other_clock": truth.get("other_clock") is not None,
    }
    out["has"] = has
    if js is None:
        out.update(error=err or "no JSON", sound=None, detected={k: False for k in DIAG})
        return out
    out["sound"] = js.get("sound")
    out["steps_detected"] = js.get("steps_detected")
    out["empty_detected"] = (js.get("missed_steps") or 0) + (js.get("failed_steps") or 0)
    out["empty_truth"] = empty_truth
    out["steps_exact"] = js.get("steps_detected") == n_steps
    out["slots_exact"] = out["empty_detected"] == empty_truth
    out["missed_exact"] = (js.get("missed_steps") or 0) == len(truth["missed_steps"]) + len(truth.get("aligned_steps", []))
    rate = js.get("rate_s_per_day")
    ci = js.get("rate_ci95_s_per_day")
    stat = js.get("rate_ci95_statistical_s_per_day")
    out["rate"] = rate
    out["ci"] = ci
    out["stat_ci"] = stat
    if rate is not None and ci is not None:
        out["rate_err"] = rate - truth["rate_s_per_day"]
        out["in_ci"] = abs(out["rate_err"]) <= ci
        out["in_stat_ci"] = stat is not None and abs(out["rate_err"]) <= stat
    det = {
        "inhibition": js.get("inhibition") is not None, "burst": js.get("pattern") == "burst",
        "failed": (js.get("failed_steps") or 0) > 0, "correction": (js.get("correction_pulses") or 0) > 0,
        "drive_levels": js.get("drive_levels") is not None, "position_locked": js.get("position_locked") is not None,
        "other_clock": js.get("other_clock") is not None,
    }
    out["detected"] = det
    if has["inhibition"] and js.get("inhibition"):
        ti, ji = truth["inhibition"], js["inhibition"]
        out["inh_period_ok"] = abs((ji.get("period_s") or 0) - ti["period_s"]) < 0.5
        out["inh_corr_err_us"] = (ji.get("correction_us") or float("nan")) - ti["correction_us"]
    if has["other_clock"] and js.get("other_clock"):
        out["other_rate_err"] = js["other_clock"].get("rate_s_per_day", float("nan")) - truth["other_clock"]["rate_s_per_day"]
    # timing: match CSV steps to truth times, offset removed per polarity
    tt = np.array(truth["step_times_s"])
    steps_rows = [r for r in rows if r.get("polarity") in ("A", "B") and not ({"secondary", "rejected"} & set((r.get("flags") or "").split(";")))]
    if len(tt) and steps_rows:
        ct = np.array([float(r["time_s"]) for r in steps_rows])
        j = np.clip(np.searchsorted(ct, tt), 1, len(ct) - 1) if len(ct) > 1 else np.zeros(len(tt), int)
        cand = np.stack([ct[np.maximum(j - 1, 0)], ct[j]])
        near = cand[np.argmin(np.abs(cand - tt), axis=0), np.arange(len(tt))]
        dd = near - tt
        med = np.median(dd)
        ok = np.abs(dd - med) < 0.015
        out["matched"] = int(ok.sum())
        pols = np.array(truth["polarities"])
        res = []
        for p in ("A", "B"):
            sel = ok & (pols == p)
            if sel.sum() >= 3:
                res.append(dd[sel] - np.mean(dd[sel]))
        if res and truth.get("timing_scored"):
            r_ = np.concatenate(res)
            out["timing_rms_us"] = float(np.sqrt(np.mean(r_ ** 2)) * 1e6)
            if truth.get("crlb_us"):
                out["timing_vs_crlb"] = out["timing_rms_us"] / truth["crlb_us"]
    # decay
    if truth.get("decay_ms") and js.get("ringdown"):
        pm = _first_polarity_map(truth)
        errs = []
        for tp, tau in truth["decay_ms"].items():
            rd = js["ringdown"].get(pm.get(tp, tp)) or {}
            m = rd.get("decay_ms_median")
            if m is not None and tau:
                errs.append((m - tau) / tau)
        if errs:
            out["decay_rel_err"] = float(np.mean(np.abs(errs)))
            out["decay_dry"] = truth.get("room") is None
    return out


def run_one(job) -> dict:
    kind, seed = job
    t = time.perf_counter()
    try:
        built = _sim_case(kind, seed) if kind.startswith("sim-") else _independent_case(kind, seed)
        gen_s = time.perf_counter() - t
        r = score(kind, seed, *built)
    except Exception as e:  # a generator failing is a figure too
        r = dict(kind=kind, seed=seed, error=f"{type(e).__name__}: {e}", has={k: False for k in DIAG},
                 detected={k: False for k in DIAG}, gen_s=None)
        return r
    r["gen_s"] = gen_s
    r["total_s"] = time.perf_counter() - t
    return r


# ------------------------------------------------------------------------------------------ tables


def frac(rs, key):
    v = [r.get(key) for r in rs if r.get(key) is not None]
    return f"{sum(bool(x) for x in v)}/{len(v)}" if v else "-"


def med(rs, key, fmt="{:.3g}", absval=False):
    v = [abs(r[key]) if absval else r[key] for r in rs if r.get(key) is not None and np.isfinite(r[key])]
    return fmt.format(float(np.median(v))) if v else "-"


def tables(results: list[dict], kinds: list[str]):
    from rich.console import Console
    from rich.table import Table

    con = Console(width=max(160, 14 * len(kinds) + 30))
    by = {k: [r for r in results if r["kind"] == k] for k in kinds}

    def table(title, rows):
        t = Table(title=title, title_justify="left")
        t.add_column("")
        for k in kinds:
            t.add_column(k, justify="right")
        for name, f in rows:
            t.add_row(name, *[f(by[k]) for k in kinds])
        con.print(t)

    table("cases", [("scored", lambda rs: str(len(rs))), ("analysis failed / no JSON", lambda rs: str(sum(1 for r in rs if r.get("error")))),
                    ("called stepping", lambda rs: f"{sum(1 for r in rs if r.get('sound') == 'stepping')}/{len(rs)}")])
    table("step counts", [("steps exact", lambda rs: frac(rs, "steps_exact")),
                          ("empty slots exact (missed+failed)", lambda rs: frac(rs, "slots_exact")),
                          ("missed exact", lambda rs: frac(rs, "missed_exact")),
                          ("both exact", lambda rs: f"{sum(1 for r in rs if r.get('steps_exact') and r.get('slots_exact'))}/{len(rs)}")])
    table("rate", [("within reported 95 % interval", lambda rs: frac(rs, "in_ci")),
                   ("within the fit's (statistical) interval", lambda rs: frac(rs, "in_stat_ci")),
                   ("median |error| s/day", lambda rs: med(rs, "rate_err", absval=True)),
                   ("median reported half-width s/day", lambda rs: med(rs, "ci")),
                   ("median statistical half-width s/day", lambda rs: med(rs, "stat_ci"))])
    table("timing (matched steps, offset removed per polarity)",
          [("cases timed", lambda rs: str(sum(1 for r in rs if r.get("timing_rms_us") is not None))),
           ("median RMS us", lambda rs: med(rs, "timing_rms_us")),
           ("median RMS / CRLB", lambda rs: med(rs, "timing_vs_crlb")),
           ("matched / true steps (median share)", lambda rs: med([dict(x=r["matched"] / max(r["n_steps"], 1)) for r in rs if r.get("matched") is not None], "x"))])
    table("ring-down (median |relative error| of decay_ms_median vs truth tau)",
          [("dry cases", lambda rs: med([r for r in rs if r.get("decay_dry")], "decay_rel_err", "{:.1%}")),
           ("in a room", lambda rs: med([r for r in rs if r.get("decay_dry") is False], "decay_rel_err", "{:.1%}")),
           ("within 15 % (all)", lambda rs: (lambda v: f"{sum(x <= 0.15 for x in v)}/{len(v)}" if v else "-")(
               [r["decay_rel_err"] for r in rs if r.get("decay_rel_err") is not None]))])
    rows = []
    for d in DIAG:
        rows.append((f"{d}: detected", lambda rs, d=d: (lambda h: f"{sum(r['detected'][d] for r in h)}/{len(h)}" if h else "-")(
            [r for r in rs if r["has"][d]])))
        rows.append((f"{d}: false alarms", lambda rs, d=d: (lambda h: f"{sum(r['detected'][d] for r in h)}/{len(h)}" if h else "-")(
            [r for r in rs if not r["has"][d] and r.get("sound") is not None])))
    table("diagnoses (detected on cases that have it; false alarms on cases that do not)", rows)
    table("diagnosis figures", [("inhibition period right", lambda rs: frac(rs, "inh_period_ok")),
                                ("median |inhibition correction error| us", lambda rs: med(rs, "inh_corr_err_us", absval=True)),
                                ("median |other clock rate error| s/day", lambda rs: med(rs, "other_rate_err", absval=True))])
    if "short-clips" in kinds:
        table("short clips (5 s, 5 ticks)", [("every tick found", lambda rs: (
            f"{sum(1 for r in rs if r.get('matched') == 5 and r.get('steps_detected') == 5)}/{len(rs)}"
            if rs and rs[0]["kind"] == "short-clips" else "-"))])
    table("generation (s per case, median)", [("generate", lambda rs: med(rs, "gen_s", "{:.2f}")), ("generate + analyze", lambda rs: med(rs, "total_s", "{:.2f}"))])


def misreadings(results):
    out = []
    for r in results:
        why = []
        if r.get("error"):
            why.append(f"error: {r['error'][:120]}")
        else:
            if r.get("sound") != "stepping":
                why.append(f"sound={r.get('sound')}")
            if r.get("steps_exact") is False or r.get("slots_exact") is False:
                why.append(f"steps {r.get('steps_detected')}/{r['n_steps']}, empty slots {r.get('empty_detected')}/{r.get('empty_truth')}")
            if r.get("in_ci") is False:
                why.append(f"rate {r['rate']:+.4f} vs {r['truth_rate']:+.4f} (+-{r['ci']:.4f})")
            for d in DIAG:
                if r["has"][d] != r["detected"][d]:
                    why.append(f"{d} {'missed' if r['has'][d] else 'false alarm'}")
        if why:
            out.append(f"{r['kind']} seed {r['seed']}: " + "; ".join(why))
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--n", type=int, default=20, help="cases per corpus")
    ap.add_argument("--quick", action="store_true", help="3 cases per corpus")
    ap.add_argument("--kinds", default=",".join(INDEPENDENT + SIM))
    ap.add_argument("--split", default="score", choices=["dev", "test", "score"])
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--json", dest="json_out")
    a = ap.parse_args(argv)
    n = 3 if a.quick else a.n
    kinds = [k for k in a.kinds.split(",") if k]
    from tests.independent.corpus import SPLITS

    base = SPLITS[a.split][0]
    jobs = [(k, (SIM_SEED_BASE[a.split] if k.startswith("sim-") else base) + i) for i in range(n) for k in kinds]
    from multiprocessing import Pool

    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn, TimeRemainingColumn

    results = []
    t0 = time.perf_counter()
    with Pool(max(1, min(2, a.workers)), initializer=_nice) as pool, Progress(
            TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(), TimeRemainingColumn()) as prog:
        task = prog.add_task("generating and analyzing", total=len(jobs))
        for r in pool.imap_unordered(run_one, jobs):
            results.append(r)
            prog.update(task, advance=1, description=f"{r['kind']} {r['seed']}")
    results.sort(key=lambda r: (kinds.index(r["kind"]), r["seed"]))
    print(f"{len(results)} cases, split {a.split}, {n} per corpus, {time.perf_counter() - t0:.0f} s")
    tables(results, kinds)
    mis = misreadings(results)
    print(f"\nmisreadings ({len(mis)}):")
    for m in mis:
        print("  " + m)
    if a.json_out:
        with open(a.json_out, "w") as f:
            json.dump(dict(split=a.split, n=n, kinds=kinds, results=results), f, indent=1, default=float)
    return 0


if __name__ == "__main__":
    sys.exit(main())
