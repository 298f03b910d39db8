"""tickscope benchmarks: speed, memory, timing accuracy, interval coverage, and a baseline.

    python benchmarks/run.py            # everything (about 20 minutes on 2 cores)
    python benchmarks/run.py --quick    # shorter files and fewer trials

Figures are printed with their targets.  Ratios are measured within one run, so a busy
machine moves both sides of a ratio together.  Nothing here is a pass/fail test.
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, os.path.dirname(HERE))

from tickscope.core.simulate import Scenario, _waveform, render_all, step_modes  # noqa: E402
from tickscope.core.timing import crlb_s  # noqa: E402
from tickscope.simulation import write_simulation  # noqa: E402
from tickscope.model import Block  # noqa: E402
from tickscope.pipeline import Analyzer  # noqa: E402


def hdr(text):
    print(f"\n== {text}", flush=True)


def run_cli(path, env=None):
    """Run `tickscope analyze` as its own process; wall time, CPU time (user + system) and peak RSS
    of that process, and its JSON."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t = time.perf_counter()
    r = subprocess.run([sys.executable, "-m", "tickscope", "analyze", path, "--json", "--quiet"],
                       capture_output=True, text=True, env=env)
    dt = time.perf_counter() - t
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    rss_mb = after.ru_maxrss / 1024
    if r.returncode != 0:
        print("  analyze failed:", r.stderr.strip())
        return dt, cpu, rss_mb, None
    return dt, cpu, max(rss_mb, before.ru_maxrss / 1024), json.loads(r.stdout)


def _cli_env(pure_numpy: bool = False) -> dict:
    """The environment of a user's shell: bytecode may be cached (a sandbox's
    PYTHONDONTWRITEBYTECODE would recompile every module on every run), and optionally the
    compiled loops switched off."""
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONDONTWRITEBYTECODE", "TICKSCOPE_PURE_NUMPY")}
    if pure_numpy:
        env["TICKSCOPE_PURE_NUMPY"] = "1"
    return env


def read_only_seconds(path):
    """Seconds to read the file as float32: (libsndfile converting, tickscope's own reader)."""
    import soundfile as sf
    from tickscope.io import audiofile

    t = time.perf_counter()
    for _ in sf.blocks(path, blocksize=1 << 18, dtype="float32"):
        pass
    lib = time.perf_counter() - t
    info = audiofile.probe(path)
    t = time.perf_counter()
    for _ in audiofile.blocks(path, info, 0):
        pass
    return lib, time.perf_counter() - t


def bench_throughput(tmp, hours_list, repeats: int = 5):
    from tickscope.core import kernels

    hdr("throughput and memory of the whole `tickscope analyze` process (48 kHz mono, 16-bit WAV)")
    print("  targets: >= 3000x real time for 1 h, one core; peak memory <= 150 MB, flat with duration")
    print(f"  compiled loops (tickscope/core/_kernels.c) built: {kernels.compiled()}; each file analyzed "
          f"{repeats} times after one warm-up run (start-up imports included, bytecode cached)")
    env = _cli_env()
    for hours in hours_list:
        path = os.path.join(tmp, f"long_{hours}h.wav")
        t = time.perf_counter()
        write_simulation(path, Scenario(duration_s=hours * 3600.0, rate_s_per_day=1.23, snr_db=30,
                                        missed_steps=(100, 2000), seed=5), subtype="PCM_16")
        gen = time.perf_counter() - t
        dur = hours * 3600.0
        os.sync()  # the new file's pages written out first: their writeback would slow the runs below
        run_cli(path, env)  # warm-up: page cache, bytecode
        # each run right after a float32 read of the same file: this VM's speed wanders by +-20 % over
        # tens of seconds, and the pair's ratio is the figure that stays put
        runs, reads = [], []
        for _ in range(repeats):
            reads.append(read_only_seconds(path))
            runs.append(run_cli(path, env))
        walls = sorted(r[0] for r in runs)
        cpus = sorted(r[1] for r in runs)
        rss = max(r[2] for r in runs)
        d = runs[-1][3]
        rd, rd_own = (min(r[i] for r in reads) for i in (0, 1))
        ratio = sorted(r[0] / q[0] for r, q in zip(runs, reads))[len(runs) // 2]
        med = walls[len(walls) // 2]
        print(f"  {hours:g} h: analyze best {walls[0]:.2f} s = {dur / walls[0]:,.0f}x real time, median {med:.2f} s = "
              f"{dur / med:,.0f}x; CPU (user + system) median {cpus[len(cpus) // 2]:.2f} s; peak RSS {rss:.0f} MB; "
              f"(generated in {gen:.0f} s)")
        print(f"       reading alone as float32 {rd:.2f} s = {dur / rd:,.0f}x (tickscope's reader: {rd_own:.2f} s = "
              f"{dur / rd_own:,.0f}x)")
        print(f"       analysis / float32 reading, run by run: median {ratio:.2f}x the time ({100 / ratio:.0f} % of its "
              f"speed; the target's own proportion, 3000x against ~8000x reading, is 2.67x = 37 %)")
        if kernels.compiled():
            pn = sorted(run_cli(path, _cli_env(pure_numpy=True))[0] for _ in range(max(1, repeats // 2)))
            print(f"       the same without the compiled loops (TICKSCOPE_PURE_NUMPY=1): best {pn[0]:.2f} s = "
                  f"{dur / pn[0]:,.0f}x ({pn[0] / walls[0]:.2f}x the time)")
        if d:
            n_missed = sum(1 for k in (100, 2000) if 0.5 + k < dur)  # the scenario's missed steps in this length
            print(f"       steps {d['steps_detected']}, missed {d['missed_steps']} (truth {n_missed}), rate "
                  f"{d['rate_s_per_day']:+.5f} ± {d['rate_ci95_s_per_day']:.5f} s/day (truth +1.23000)")
        os.remove(path)


def bench_timing(snrs, duration_s):
    hdr("timing error vs the Cramér-Rao bound (48 kHz, no source jitter)")
    print("  target at SNR 30 dB: <= 0.5 us RMS and within 1.5x the bound")
    for snr in snrs:
        sc = Scenario(duration_s=duration_s, snr_db=snr, rate_s_per_day=0.0, seed=int(snr) + 100)
        x, truth = render_all(sc)
        an = Analyzer(sc.samplerate_hz)
        an.feed(Block(x[:, 0].astype(np.float32), 0))
        an.finish()
        tt = np.array([s["time_s"] for s in truth["steps"] if s["kind"] == "step"])
        pol = np.array([s["polarity"] for s in truth["steps"] if s["kind"] == "step"])
        det = an.step_t.values
        k = an.step_k.values
        err = []
        for p, par in (("A", 0), ("B", 1)):
            e = det[(k % 2) == par] - tt[pol == p][: int(np.sum((k % 2) == par))]
            err.append(e - e.mean())  # each polarity's onset definition is a constant offset
        rms_us = float(np.sqrt(np.mean(np.concatenate(err) ** 2)) * 1e6)
        # the bound for the A waveform as recorded (peak at level_dbfs) in white noise of the scenario
        fs = sc.samplerate_hz
        t = np.arange(int(0.1 * fs)) / fs
        w = _waveform(step_modes(sc, 0), t)
        w *= 10 ** (sc.level_dbfs / 20) / np.max(np.abs(w))
        from tickscope.core.simulate import Renderer
        sigma = Renderer(sc).noise_sigma
        bound_us = crlb_s(w, fs, sigma) * 1e6
        print(f"  SNR {snr:4.0f} dB: RMS error {rms_us:7.3f} us; CRLB {bound_us:7.3f} us; ratio {rms_us / bound_us:5.2f}")


def bench_coverage(trials, duration_s):
    hdr(f"95 % interval coverage over {trials} simulated recordings ({duration_s:.0f} s each)")
    print("  target: 93..97 %, and half-widths no wider than the jitter justifies")
    rng = np.random.default_rng(2026)
    hits = hits_rep = 0
    ratios = []
    misses = []
    t0 = time.perf_counter()
    for i in range(trials):
        rate = float(rng.uniform(-20, 20))
        snr = float(rng.uniform(12, 40))
        jit = float(rng.choice([0.0, 5.0, 20.0, 50.0]))
        sc = Scenario(duration_s=duration_s, rate_s_per_day=rate, snr_db=snr, jitter_us=jit,
                      movement=str(rng.choice(["wallclock", "wristwatch", "alarmclock"])),
                      second_impact_ms=float(rng.choice([0.0, 45.0])), seed=1000 + i)
        x, truth = render_all(sc)
        an = Analyzer(sc.samplerate_hz)
        an.feed(Block(x[:, 0].astype(np.float32), 0))
        s = an.finish()
        if s.rate is None:
            misses.append(i)
            continue
        # the fit's own interval (the reported one adds an unseen logic-regulation correction on
        # recordings shorter than 4 minutes, which would make coverage trivially 100 %)
        stat = s.rate_ci95_statistical_s_per_day or s.rate.ci95_s_per_day
        hits += abs(s.rate.rate_s_per_day - rate) <= stat
        hits_rep += abs(s.rate.rate_s_per_day - rate) <= s.rate.ci95_s_per_day
        if jit > 0:
            n = s.rate.n_steps
            ideal = 1.96 * jit * 1e-6 * np.sqrt(12 / (n * (n * n - 1))) * 86400
            ratios.append(stat / ideal)
    n_ok = trials - len(misses)
    print(f"  coverage of the fit's interval {hits}/{n_ok} = {100 * hits / max(n_ok, 1):.1f} %; of the reported "
          f"(provisional) interval {100 * hits_rep / max(n_ok, 1):.1f} %; no rate in {len(misses)} recordings; "
          f"{(time.perf_counter() - t0) / trials:.2f} s per recording")
    if ratios:
        print(f"  half-width / (1.96 x OLS theory for the injected jitter): median {np.median(ratios):.2f}, "
              f"90th percentile {np.percentile(ratios, 90):.2f}")


def bench_librosa(tmp, duration_s):
    hdr(f"baseline: librosa onset detection on the same recording ({duration_s:.0f} s, 48 kHz, SNR 30 dB)")
    try:
        import librosa
    except ImportError:
        print("  librosa not installed (pip install -e '.[bench]'): skipped")
        return
    sc = Scenario(duration_s=duration_s, snr_db=30, rate_s_per_day=3.0, second_impact_ms=45, seed=77)
    path = os.path.join(tmp, "baseline.wav")
    truth = write_simulation(path, sc)
    tt = np.array([s["time_s"] for s in truth["steps"] if s["kind"] == "step"])

    def score(times):
        times = np.asarray(times)
        idx = np.clip(np.searchsorted(times, tt), 1, len(times) - 1)
        near = np.where(np.abs(times[idx] - tt) < np.abs(times[idx - 1] - tt), times[idx], times[idx - 1])
        err = near - tt
        found = np.abs(err) < 0.05  # +-50 ms onset tolerance (mir_eval default; from memory)
        e = err[found] - np.mean(err[found])
        k = np.arange(len(tt))[found]
        slope = np.polyfit(k, near[found], 1)[0]
        rate = 86400 * (1 / slope - 1)
        return found.sum(), len(times) - found.sum(), np.sqrt(np.mean(e**2)) * 1e6, rate

    for label, kw in (("librosa defaults (sr 22050, hop 512)", dict(sr=22050, hop=512)),
                      ("librosa native rate, hop 32", dict(sr=None, hop=32))):
        t = time.perf_counter()
        y, sr = librosa.load(path, sr=kw["sr"])
        on = librosa.onset.onset_detect(y=y, sr=sr, hop_length=kw["hop"], units="time")
        dt = time.perf_counter() - t
        f, extra, rms, rate = score(on)
        print(f"  {label:40s}: {duration_s / dt:8.0f}x real time; found {f}/{len(tt)}, extra {extra}; "
              f"timing RMS {rms:9.1f} us; rate {rate:+8.3f} s/day (truth +3.000)")
    run_cli(path, _cli_env())  # warm-up, as for librosa's first call above
    dt, _, _, d = run_cli(path, _cli_env())
    print(f"  {'tickscope analyze (whole process)':40s}: {duration_s / dt:8.0f}x real time; found "
          f"{d['steps_detected']}/{len(tt)}; jitter {d['timing_jitter_us']:9.3f} us; rate {d['rate_s_per_day']:+8.4f} "
          f"± {d['rate_ci95_s_per_day']:.4f} s/day")


def bench_live(tmp, seconds):
    hdr(f"live capture through the PulseAudio null sink ({seconds:.0f} s at 48 kHz)")
    print("  targets: <= 5 % of one core; a step on screen <= 0.5 s after its sound")
    import shutil
    import threading

    if not os.environ.get("PULSE_SERVER") or shutil.which("paplay") is None:
        print("  no loopback (bash scripts/audio-loopback.sh start, then export PULSE_SERVER/PULSE_COOKIE): skipped")
        return
    from tickscope.io.capture import Capture, resolve_device

    sc = Scenario(duration_s=seconds, first_step_s=0.6, snr_db=30, rate_s_per_day=1.0, seed=88)
    wav = os.path.join(tmp, "live.wav")
    write_simulation(wav, sc)
    # 1) CPU of the whole `tickscope listen` process (no screen), from the kernel's accounting
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    p = subprocess.Popen([sys.executable, "-m", "tickscope", "listen", "--device", "pulse", "--json",
                          "--duration", str(seconds + 4)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    time.sleep(3)
    subprocess.run(["paplay", "--device=" + os.environ.get("TICKSCOPE_LOOPBACK_SINK", "tsink"), wav], check=False)
    out, err = p.communicate(timeout=120)
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    d = json.loads(out) if out.strip() else {}
    wall = d.get("capture", {}).get("wall_seconds", seconds)
    b0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    subprocess.run([sys.executable, "-c", "import tickscope.cli, tickscope.pipeline, tickscope.io.capture, "
                    "tickscope.io.audiofile, tickscope.export, sounddevice, tickscope.ui.textreport, "
                    "tickscope.core.diagnose"], check=False)
    b1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    startup = (b1.ru_utime - b0.ru_utime) + (b1.ru_stime - b0.ru_stime)
    print(f"  listen process: {cpu:.2f} s CPU over {wall:.1f} s = {100 * cpu / wall:.1f} % of one core; without "
          f"its {startup:.1f} s of start-up imports {100 * (cpu - startup) / wall:.1f} %; steps {d.get('steps_detected')}")
    # 2) latency, in-process: sample arrival (host clock of its block) to the step's event
    from tickscope.core.detect import DetectorConfig

    an = Analyzer(48000, detector=DetectorConfig(chunk_s=0.25))  # as `tickscope listen` runs it
    cap = Capture(resolve_device("pulse"), 48000, blocksize=2048)  # as `tickscope listen` opens it
    arrivals = []  # (end sample, host time)
    lat = []
    first_grid_s = [float("inf")]
    player = threading.Timer(2.5, lambda: subprocess.run(["paplay", "--device=" + os.environ.get(
        "TICKSCOPE_LOOPBACK_SINK", "tsink"), wav], check=False))
    player.start()
    with cap:
        for b in cap.blocks():
            arrivals.append((b.start_sample + len(b.samples), b.host_time_s))
            for ev in an.feed(b):
                if ev.kind == "step":
                    s_idx = ev.time_s * 48000
                    host = next(h for e, h in arrivals if e >= s_idx)
                    lat.append((time.monotonic() - host, an.tracker.acquired and ev.time_s > first_grid_s[0]))
            if an.tracker.acquired and first_grid_s[0] == float("inf"):
                first_grid_s[0] = an.duration_s  # steps after this were decided one by one
            if an.duration_s > seconds + 3:
                break
    player.join()
    steady = [d for d, ok in lat if ok]
    if steady:
        print(f"  once the grid is found ({first_grid_s[0]:.0f} s in): a step is decided {np.median(steady) * 1e3:.0f} ms "
              f"(median), {np.percentile(steady, 95) * 1e3:.0f} ms (95th pct) after its sound, and the screen "
              f"redraws on every decided step; {len(steady)} steps")
        print(f"  the first {len(lat) - len(steady)} steps wait for the grid (12 s of impacts): up to "
              f"{max(d for d, _ in lat):.1f} s")


def _rss_mb() -> float:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    return float("nan")


def log_worker(db: str, hours: float) -> None:
    """Child process: log `hours` of simulated 8 kHz audio; one JSON line per hour of audio."""
    from tickscope.core.simulate import Renderer
    from tickscope.io.store import LogStore
    from tickscope.logsession import HISTORY_STEPS, LogSession

    fs = 8000
    sc = Scenario(samplerate_hz=fs, duration_s=hours * 3600, rate_s_per_day=1.0, rate_drift_s_per_day_per_h=0.05,
                  snr_db=30, seed=5)
    r = Renderer(sc)
    store = LogStore(db)
    store.init_meta("benchmark", "bench")
    seg = store.new_segment(started_wall=time.time(), timeline_s=0.0, join_kind="first", samplerate=fs,
                            channel=0, source_kind="file", source="simulated")
    ls = LogSession(store, seg, Analyzer(fs, history_steps=HISTORY_STEPS), timeline_s=0.0)
    pos = 0
    cpu_log = 0.0
    next_h = 1
    while True:
        x = r.render(60 * fs)
        if not len(x):
            break
        x = x[:, 0].astype(np.float32)
        c0 = time.process_time()
        for i in range(0, len(x), 4096):
            ls.feed(Block(x[i:i + 4096], pos + i))
        cpu_log += time.process_time() - c0
        pos += len(x)
        if pos >= next_h * 3600 * fs:
            ls.commit()
            wal = os.path.getsize(db + "-wal") if os.path.exists(db + "-wal") else 0
            store.db.execute("PRAGMA wal_checkpoint(TRUNCATE)")  # measure the database itself
            print(json.dumps({"hour": next_h, "cpu_s": cpu_log, "rss_mb": _rss_mb(), "db_bytes": os.path.getsize(db),
                              "wal_bytes": wal,
                              "steps": ls.totals["steps"]}), flush=True)
            cpu_log = 0.0
            next_h += 1
    ls.finish("end of source")
    store.close()


def bench_log(tmp, audio_hours: float, event_hours: float):
    hdr("weekend log: memory, CPU and database size per hour")
    print("  targets: memory and CPU per hour flat over the run; database <= 1 MB per hour at one step a second")
    db = os.path.join(tmp, "bench-log.db")
    p = subprocess.run([sys.executable, __file__, "--log-worker", db, str(audio_hours)], capture_output=True,
                       text=True)
    rows = [json.loads(line) for line in p.stdout.splitlines() if line.startswith("{")]
    if not rows:
        print("  log worker failed:", p.stderr.strip()[-400:])
    for r_ in rows:
        if r_["hour"] in (1, 2) or r_["hour"] == rows[-1]["hour"] or r_["hour"] % 6 == 0:
            print(f"  audio hour {r_['hour']:3d}: log path {r_['cpu_s']:6.1f} s CPU for the hour "
                  f"({3600 / max(r_['cpu_s'], 1e-9):,.0f}x real time at 8 kHz), RSS {r_['rss_mb']:6.1f} MB, "
                  f"database {r_['db_bytes'] / r_['hour'] / 1e6:.3f} MB per hour (journal before checkpoint "
                  f"{r_['wal_bytes'] / 1e6:.2f} MB; SQLite checkpoints it every 1000 pages)")
    if len(rows) >= 2:
        print(f"  RSS growth from hour 1 to hour {rows[-1]['hour']}: {rows[-1]['rss_mb'] - rows[0]['rss_mb']:+.1f} MB; "
              f"CPU of the last hour / the first: {rows[-1]['cpu_s'] / rows[0]['cpu_s']:.2f}")
    # the sink alone at weekend scale: events of a 1 s movement straight into the log
    from tickscope.io.store import LogStore
    from tickscope.logsession import LogSession
    from tickscope.model import Event

    db2 = os.path.join(tmp, "bench-events.db")
    store = LogStore(db2)
    store.init_meta("benchmark", "bench")
    seg = store.new_segment(started_wall=time.time(), timeline_s=0.0, join_kind="first", samplerate=8000.0,
                            channel=0, source_kind="device", source="simulated")
    ls = LogSession(store, seg, None, nominal_s=1.0)
    rng = np.random.default_rng(1)
    c0 = time.process_time()
    n = int(event_hours * 3600)
    marks = {1, int(event_hours)}
    for h in range(int(event_hours)):
        k = np.arange(h * 3600, (h + 1) * 3600)
        t = k * (1 - 1e-5) + 0.5 + rng.normal(0, 3e-6, len(k))
        ls.take([Event("step", float(tt), step=int(kk), polarity="AB"[kk % 2], peak_dbfs=-14.0, snr_db=35.0,
                       match=0.97, decay_ms=8.0) for kk, tt in zip(k, t)], float(t[-1]) + 0.5)
        ls.commit()
        if h + 1 in marks:
            store.db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
            size = os.path.getsize(db2)
            print(f"  events only, hour {h + 1:3d}: {(time.process_time() - c0) / (h + 1):.3f} s CPU per hour, "
                  f"database {size / (h + 1) / 1e6:.3f} MB per hour, RSS {_rss_mb():.1f} MB")
    ls.finish("end")
    store.close()
    from tickscope.core.logstats import log_figures

    st = LogStore(db2, readonly=True)
    c0 = time.perf_counter()
    log_figures(st.segments(), st.events(), gaps=st.gaps(), minutes=st.minutes())
    print(f"  report figures for {n / 3600:.0f} h of steps: {time.perf_counter() - c0:.1f} s")
    st.db.close()


def realistic_scenario(i: int) -> dict:
    """Random phone-and-room conditions for sweep case i (reproducible: seeded by i)."""
    import random

    r = random.Random(i)
    kw = dict(duration_s=120, seed=1000 + i, rate_s_per_day=r.uniform(-20, 20),
              samplerate_hz=r.choice([8000, 16000, 22050, 44100, 48000]),
              movement=r.choice(["wallclock", "wristwatch", "alarmclock"]),
              snr_db=r.uniform(12, 30), noise=r.choice(["white", "pink"]))
    if r.random() < 0.5:
        kw["reverb_rt60_ms"] = r.uniform(150, 600)
    if r.random() < 0.4:
        kw["agc"] = True
    if r.random() < 0.3:
        kw["gate_dbfs"] = r.uniform(-45, -30)
    if r.random() < 0.4:
        kw["second_impact_ms"] = r.uniform(30, 90)
        kw["second_impact_db"] = r.uniform(-8, 0)
    if r.random() < 0.3:  # a quieter second clock somewhere in the room
        kw["second_clock_rate_s_per_day"] = r.uniform(-300, 300)
        kw["second_clock_db"] = r.uniform(-16, -8)
    if r.random() < 0.3:
        kw["transients_per_min"] = r.uniform(1, 6)
    if r.random() < 0.3:
        kw["hum_hz"] = r.choice([50, 60])
    if r.random() < 0.3:
        kw["variation_db"] = r.uniform(0.5, 2.5)
        kw["variation_freq_pct"] = r.uniform(0.5, 2)
    if r.random() < 0.3:
        kw["jitter_us"] = r.uniform(2, 30)
    if r.random() < 0.3:
        kw["missed_steps"] = tuple(sorted(r.sample(range(15, 110), r.randint(1, 3))))
    return kw


def realistic_case(i: int) -> dict:
    kw = realistic_scenario(i)
    sc = Scenario(**kw)
    x, truth = render_all(sc)
    x = x[:, sc.step_channel].astype(np.float32)
    an = Analyzer(sc.samplerate_hz)
    for j in range(0, len(x), 8192):
        an.feed(Block(x[j:j + 8192], j))
    s = an.finish()
    n_true = sum(1 for st in truth["steps"] if st["kind"] == "step")
    exp = truth["expected"]["rate_device_time_s_per_day"]
    stat = s.rate_ci95_statistical_s_per_day
    return dict(i=i, kw=kw, sound=s.sound, steps=s.steps_detected, true=n_true, missed=s.missed_steps,
                true_missed=len(kw.get("missed_steps", ())), rate=None if s.rate is None else s.rate.rate_s_per_day,
                exp=exp, stat=stat, reported=None if s.rate is None else s.rate.ci95_s_per_day)


def bench_realistic(n: int):
    hdr(f"random phone-and-room recordings ({n} x 120 s: AGC, gates, reverb, bounces, second clocks, knocks, "
        "varying ticks, 8-48 kHz, SNR 12-30 dB)")
    print("  targets: exact step and missed-step counts; the rate within its interval")
    from multiprocessing import Pool

    t0 = time.perf_counter()
    with Pool(min(2, os.cpu_count() or 1)) as pool:
        res = pool.map(realistic_case, range(n))
    counts = [r for r in res if r["steps"] != r["true"] or r["missed"] != r["true_missed"] or r["sound"] != "stepping"]
    stat_miss = [r for r in res if r["rate"] is not None and r["stat"] is not None and abs(r["rate"] - r["exp"]) > r["stat"]]
    rep_miss = [r for r in res if r["rate"] is not None and abs(r["rate"] - r["exp"]) > r["reported"]]
    print(f"  counts exact in {n - len(counts)}/{n}; rate within the fit's interval in {n - len(stat_miss)}/{n}, "
          f"within the reported interval in {n - len(rep_miss)}/{n} ({time.perf_counter() - t0:.0f} s)")
    for r in counts + [r for r in stat_miss if r not in counts]:
        kw = {k: (round(v, 2) if isinstance(v, float) else v) for k, v in r["kw"].items() if k != "duration_s"}
        rate = "none" if r["rate"] is None else f"{r['rate']:+.3f} (truth {r['exp']:+.3f}, fit +-{r['stat']:.3f})"
        print(f"    case {r['i']}: {r['sound']}, steps {r['steps']}/{r['true']}, missed {r['missed']}/"
              f"{r['true_missed']}, rate {rate}; {kw}")


LOSSY_CASES = [("libopus", "opus", b) for b in ("16k", "24k", "32k", "48k", "64k")] + \
    [("aac", "m4a", b) for b in ("32k", "64k")] + [("libmp3lame", "mp3", "32k"), ("libvorbis", "ogg", "48k")]


def lossy_case(args) -> dict:
    """One simulated recording through one codec (ffmpeg), analyzed as a file (case i is reproducible)."""
    from tickscope.io import audiofile
    import soundfile as sf

    codec, ext, br, i, tmp = args
    rng = np.random.default_rng(i)
    fs = int(rng.choice([44100, 48000]))
    sc = Scenario(duration_s=float(rng.choice([120, 240])), rate_s_per_day=float(rng.uniform(-20, 20)),
                  snr_db=float(rng.uniform(18, 35)), samplerate_hz=fs,
                  movement=str(rng.choice(["wallclock", "wristwatch", "alarmclock"])),
                  second_impact_ms=float(rng.choice([0.0, 45.0])), seed=100 + i)
    x, truth = render_all(sc)
    src = os.path.join(tmp, f"src{os.getpid()}.wav")
    out = os.path.join(tmp, f"enc{os.getpid()}.{ext}")
    sf.write(src, x, fs, subtype="PCM_24")
    subprocess.run(["ffmpeg", "-v", "error", "-nostdin", "-y", "-i", src, "-c:a", codec, "-b:a", br, out], check=True)
    info = audiofile.probe(out)
    an = Analyzer(info.samplerate, lossy=info.lossy)
    for b in audiofile.blocks(out, info, 0):
        an.feed(b)
    s = an.finish()
    r = an.rate()
    n_true = sum(1 for st in truth["steps"] if st["kind"] == "step" and st["time_s"] < sc.duration_s - 0.1)
    exp = truth["expected"]["rate_device_time_s_per_day"]
    return dict(case=(codec, br), exact=s.steps_detected == n_true and s.missed_steps == 0,
                err=None if r is None else r.rate_s_per_day - exp, ci=None if r is None else r.ci95_s_per_day,
                shifts=an.shifts is not None)


def bench_lossy(tmp, n: int):
    hdr(f"lossy files ({n} simulated recordings of 2-4 min per codec and bit rate, through ffmpeg)")
    print("  targets: the rate within its interval (about 95 %), exact step counts")
    if not shutil.which("ffmpeg"):
        print("  skipped: ffmpeg is not installed")
        return
    from multiprocessing import Pool

    t0 = time.perf_counter()
    jobs = [(c, e, b, i, tmp) for c, e, b in LOSSY_CASES for i in range(n)]
    with Pool(min(2, os.cpu_count() or 1)) as pool:
        res = pool.map(lossy_case, jobs)
    for c, _e, b in LOSSY_CASES:
        rr = [r for r in res if r["case"] == (c, b)]
        ok = [r for r in rr if r["err"] is not None]
        cov = 100 * np.mean([abs(r["err"]) <= r["ci"] for r in ok]) if ok else float("nan")
        worst = max((abs(r["err"]) / r["ci"] for r in ok), default=float("nan"))
        print(f"  {c:10s} {b:>4s}: rate within its interval {cov:5.1f} %, worst |error|/interval {worst:4.1f}; "
              f"counts exact {100 * np.mean([r['exact'] for r in rr]):5.1f} %; shifts found in "
              f"{sum(r['shifts'] for r in rr)}; no rate {len(rr) - len(ok)}")
    print(f"  ({time.perf_counter() - t0:.0f} s)")


def main():
    if len(sys.argv) == 4 and sys.argv[1] == "--log-worker":
        log_worker(sys.argv[2], float(sys.argv[3]))
        return
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="short files, few trials (a smoke run)")
    ap.add_argument("--log-hours", type=float, default=None,
                    help="hours of audio for the log benchmark (default 6; 60 for a full weekend: about 15 minutes)")
    ap.add_argument("--only", choices=("throughput", "timing", "coverage", "librosa", "live", "log", "realistic",
                                       "lossy"),
                    help="run one benchmark")
    a = ap.parse_args()
    if a.only:
        with tempfile.TemporaryDirectory() as tmp:
            {"throughput": lambda: bench_throughput(tmp, [0.1] if a.quick else [1.0, 4.0]),
             "timing": lambda: bench_timing([40, 30, 20, 10], 120),
             "coverage": lambda: bench_coverage(200, 60),
             "librosa": lambda: bench_librosa(tmp, 600),
             "live": lambda: bench_live(tmp, 60),
             "log": lambda: bench_log(tmp, a.log_hours or (1.0 if a.quick else 6.0), 60.0),
             "realistic": lambda: bench_realistic(20 if a.quick else 140),
             "lossy": lambda: bench_lossy(tmp, 4 if a.quick else 16)}[a.only]()
        return
    with tempfile.TemporaryDirectory() as tmp:
        if a.quick:
            bench_throughput(tmp, [0.1])
            bench_timing([30, 10], 30)
            bench_coverage(20, 30)
            bench_librosa(tmp, 60)
            bench_live(tmp, 15)
            bench_log(tmp, a.log_hours or 1.0, 60.0)
            bench_realistic(20)
            bench_lossy(tmp, 4)
        else:
            bench_throughput(tmp, [1.0, 4.0])
            bench_timing([40, 30, 20, 10], 120)
            bench_coverage(200, 60)
            bench_librosa(tmp, 600)
            bench_live(tmp, 60)
            bench_log(tmp, a.log_hours or 6.0, 60.0)
            bench_realistic(140)
            bench_lossy(tmp, 16)


if __name__ == "__main__":
    main()
