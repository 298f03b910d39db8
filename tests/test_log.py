"""Weekend logging: the SQLite log, crash safety, resume, the report and its figures."""
import csv
import io
import json
import os
import random
import signal
import sqlite3
import subprocess
import sys
import time

import numpy as np
import soundfile as sf
import pytest

from conftest import match_times, true_step_times
from tickscope.cli import main
from tickscope.core.logstats import log_figures
from tickscope.core.simulate import Scenario, render_all
from tickscope.errors import StoreError
from tickscope.export import write_log_csv
from tickscope.simulation import write_simulation
from tickscope.io.store import LogStore
from tickscope.logsession import LogSession
from tickscope.model import Block, Event
from tickscope.pipeline import Analyzer

MISSED = (200, 900, 1500)


@pytest.fixture(scope="module")
def bench_recording(tmp_path_factory):
    """30 min at 8 kHz of a movement whose rate drifts from +2 to +4 s/day, with three missed steps."""
    d = tmp_path_factory.mktemp("logrec")
    p = str(d / "workshop-mantel-clock.wav")
    sc = Scenario(samplerate_hz=8000, duration_s=1800, rate_s_per_day=2.0, rate_drift_s_per_day_per_h=4.0,
                  missed_steps=MISSED, snr_db=30, second_impact_ms=50, seed=4)
    truth = write_simulation(p, sc)
    return p, truth, sc


def _cli(*args):
    return subprocess.run([sys.executable, "-m", "tickscope", *args], capture_output=True, text=True, timeout=300)


def _true_rate(sc, t0_h, t1_h):
    """Mean rate between two times (h) of a linearly drifting movement."""
    return sc.rate_s_per_day + sc.rate_drift_s_per_day_per_h * (t0_h + t1_h) / 2


# -- the whole job on audio -----------------------------------------------------------------------
def test_log_and_report_a_drifting_movement(bench_recording, tmp_path):
    wav, truth, sc = bench_recording
    db = str(tmp_path / "mantel.db")
    r = _cli("log", db, "--source", wav, "--label", "mantel clock, bench 2", "--json")
    assert r.returncode == 0, r.stderr
    seg = json.loads(r.stdout)
    assert seg["segment"] == 1 and seg["ended"] == "end of source" and seg["sound"] == "stepping"
    out = str(tmp_path / "plots")
    csv_path = str(tmp_path / "steps.csv")
    r = _cli("report", db, "--json", "--out", out, "--steps-csv", csv_path)
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    for key in ("segments", "duration_s", "steps_detected", "missed_steps", "gaps", "rate_s_per_day",
                "rate_ci95_s_per_day", "hourly", "adev", "tie_s", "worst_hour", "clock_correction_ppm"):
        assert key in d, key
    tt = true_step_times(truth)
    tt = tt[tt < sc.duration_s - 0.1]
    assert d["steps_detected"] == len(tt)
    miss_true = sorted(s["time_s"] for s in truth["steps"] if s["kind"] == "silent")
    assert np.allclose(sorted(d["missed_step_times_s"]), miss_true, atol=0.001)
    assert d["gaps"] == [] and len(d["segments"]) == 1
    # over the half hour the rate drifts from +2 to +4 s/day: the mean is +3
    assert abs(d["rate_s_per_day"] - _true_rate(sc, 0, 0.5)) <= d["rate_ci95_s_per_day"]
    # the minute rates follow the drift: each within 0.05 s/day of the truth at that minute
    mins = [m for m in d["minutes"] if m["rate_s_per_day"] is not None and 1 <= m["minute"] < 29]
    assert len(mins) >= 25
    err = [m["rate_s_per_day"] - _true_rate(sc, m["minute"] / 60, (m["minute"] + 1) / 60) for m in mins]
    assert np.max(np.abs(err)) < 0.05, err
    slope = np.polyfit([m["minute"] / 60 for m in mins], [m["rate_s_per_day"] for m in mins], 1)[0]
    assert slope == pytest.approx(4.0, rel=0.1)
    # time error: the movement gains about 3 s/day * 0.5 h / 24 h = 62.5 ms
    assert d["tie_s"]["final"] == pytest.approx(-3.0 * 1800 / 86400, rel=0.05)
    # a drifting rate leaves a bow in the time error; white timing noise alone would leave microseconds
    assert d["tie_s"]["detrended_peak_to_peak"] > 1e-4
    ad = d["adev"]
    assert ad["tau_s"][0] == 1.0 and all(lo <= v <= hi for lo, v, hi in zip(ad["ci95_low"], ad["deviation"], ad["ci95_high"]))
    assert d["worst_hour"]["hour"] == 0 and d["worst_hour"]["missed"] == 3
    # plots and the CSV export
    for name in ("rate.png", "tie.png", "adev.png", "ringdown.png", "report.json"):
        assert os.path.getsize(os.path.join(out, name)) > 1000
    assert open(os.path.join(out, "rate.png"), "rb").read(8) == b"\x89PNG\r\n\x1a\n"
    rows = open(csv_path).read().splitlines()
    assert rows[0] == "index,step,time_s,polarity,interval_s,peak_dbfs,decay_ms,flags,lift_ms"
    assert sum(1 for r_ in rows[1:] if r_.split(",")[3] in ("A", "B")) == len(tt)
    # the rich report renders without error and names the verdict
    r = _cli("report", db)
    assert r.returncode == 0 and "gains" in r.stdout and "Allan" in r.stdout
    # running the log again on a finished replay adds nothing
    r = _cli("log", db, "--source", wav, "--json")
    assert r.returncode == 0 and "nothing to add" in r.stderr


def test_kill_9_and_resume_loses_nothing_and_duplicates_nothing(bench_recording, tmp_path):
    wav, truth, sc = bench_recording
    db = str(tmp_path / "crash.db")
    rnd = random.Random(17)
    kills = 0
    read_while_writing = None
    last_committed = -1.0
    for _ in range(8):
        p = subprocess.Popen([sys.executable, "-m", "tickscope", "log", db, "--source", wav, "--quiet"],
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        if kills == 1 and read_while_writing is None:
            # the report reads a log while it is being written
            read_while_writing = _cli("report", db, "--json")
        # kill at a random point of progress after this run has committed something: a point of
        # the recording, not of wall time, so that a fast machine (the whole replay takes about a
        # second) and a slow one are both caught in the middle of the work
        target = max(last_committed, 0.0) + rnd.uniform(0.1, 0.6) * (sc.duration_s - max(last_committed, 0.0))
        t0 = time.monotonic()
        while p.poll() is None and time.monotonic() - t0 < 120 and _committed_s(db) < target:
            time.sleep(0.005)
        if p.poll() is not None:
            p.wait()
            break  # it finished before the kill
        p.send_signal(signal.SIGKILL)
        p.wait()
        kills += 1
        last_committed = _committed_s(db)
        if kills == 3:
            r = subprocess.run([sys.executable, "-m", "tickscope", "log", db, "--source", wav, "--quiet"],
                               capture_output=True, text=True, timeout=300)
            assert r.returncode == 0, r.stderr
            break
    assert kills >= 1
    if read_while_writing is not None:
        assert read_while_writing.returncode == 0, read_while_writing.stderr
        assert json.loads(read_while_writing.stdout)["steps_detected"] > 100
    con = sqlite3.connect(db)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    segs = con.execute("SELECT join_kind, end_reason FROM segments ORDER BY id").fetchall()
    con.close()
    assert len(segs) >= 2 and segs[0][0] == "first" and all(j == "exact" for j, _ in segs[1:])
    assert segs[-1][1] == "end of source"
    st = LogStore(db, readonly=True)
    ev = st.events()
    fig = log_figures(st.segments(), ev, gaps=st.gaps())
    st.db.close()
    steps_t = np.sort((ev["time_s"] + np.array([s_off for s_off in _offsets(db, ev["seg"])]))[ev["kind"] == 0])
    # nothing duplicated: consecutive steps are about a second apart, never closer
    assert np.min(np.diff(steps_t)) > 0.9
    tt = true_step_times(truth)
    tt = tt[tt < sc.duration_s - 0.1]
    found = np.isfinite(match_times(steps_t, tt))
    # a restarted analysis re-reads from the last committed decision, so no step is lost
    # (allowed: one per restart, for a step whose sound straddles the restart point)
    assert found.sum() >= len(tt) - (len(segs) - 1), (len(tt) - found.sum(), len(segs))
    assert len(steps_t) == found.sum()  # and none is extra
    assert fig.missed_steps == len(MISSED)
    assert fig.groups == 1  # a resumed replay is stitched onto the same phase
    # ... and the time error left after the rate line runs on smoothly across the restarts
    k = fig.step_k.astype(float)
    res = fig.step_x - np.polyval(np.polyfit(k, fig.step_x, 2), k)  # the drift's bow removed
    assert np.max(np.abs(np.diff(res))) < 20e-6
    assert abs(fig.rate.rate_s_per_day - _true_rate(sc, 0, 0.5)) <= fig.rate.ci95_s_per_day


def _committed_s(db) -> float:
    """How far (s of the recording) the log's committed decisions reach; -1 before any."""
    try:
        with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as con:
            row = con.execute("SELECT max(source_offset_s + decided_s) FROM segments").fetchone()
        return -1.0 if row is None or row[0] is None else float(row[0])
    except sqlite3.Error:
        return -1.0


def _offsets(db, seg_ids):
    con = sqlite3.connect(db)
    off = dict(con.execute("SELECT id, source_offset_s FROM segments").fetchall())
    con.close()
    return [off[int(s)] for s in seg_ids]


# -- a weekend at scale (events straight into the log's sink) -------------------------------------------
def _weekend_events(rng, k0, k1, rate0, drift_per_h, jitter_s, t_shift, missed, failed):
    """Step events for steps k0..k1-1 of a movement whose rate drifts linearly (true seconds)."""
    k = np.arange(k0, k1)
    e = np.arange(k1) * 1.0  # nominal time of every step from the first
    iv = 1.0 / (1.0 + (rate0 + drift_per_h * e / 3600.0) / 86400.0)
    t_all = np.concatenate([[0.0], np.cumsum(iv)])[: k1] + 0.5
    t = t_all[k0:k1] + rng.normal(0, jitter_s, len(k)) - t_shift
    out = []
    for kk, tt in zip(k, t):
        if kk in missed:
            out.append(Event("missed", float(tt), step=int(kk), polarity="AB"[kk % 2]))
        elif kk in failed:
            out.append(Event("failed", float(tt), step=int(kk), polarity="AB"[kk % 2], peak_dbfs=-40, snr_db=15,
                             match=0.4, flags=("failed",)))
        else:
            out.append(Event("step", float(tt), step=int(kk), polarity="AB"[kk % 2], peak_dbfs=-14.0, snr_db=35.0,
                             match=0.97, decay_ms=8.0 + 0.1 * (kk % 2)))
    return out


def test_sixty_hour_log_with_drift_missed_steps_and_a_gap(tmp_path):
    """60 h: rate drifting +1 -> +4 s/day, 3 us jitter, missed and failed steps, a 30 min gap (a restart)."""
    rng = np.random.default_rng(60)
    db = str(tmp_path / "weekend.db")
    store = LogStore(db)
    store.init_meta("regulator, weekend test", "test")
    drift = 3.0 / 60.0
    missed = {5_000, 100_000, 190_000}
    failed = {150_000}
    gap_k = (108_000, 109_800)  # no audio from 30 h to 30.5 h
    common = dict(samplerate=8000.0, channel=0, clock_ppm=None, source_kind="device", source="bench mic")
    seg1 = store.new_segment(started_wall=1.8e9, timeline_s=0.0, join_kind="first", **common)
    ls = LogSession(store, seg1, None, nominal_s=1.0, timeline_s=0.0, commit_every_s=1e9, commit_audio_s=600)
    evs = _weekend_events(rng, 0, gap_k[0], 1.0, drift, 3e-6, 0.0, missed, failed)
    for i in range(0, len(evs), 2000):
        ls.take(evs[i:i + 2000], evs[min(i + 1999, len(evs) - 1)].time_s + 1)
        ls.maybe_commit()
    ls.finish("stopped by Ctrl-C")
    t2 = gap_k[1] * 1.0  # segment 2 begins ~30.5 h later on the wall clock (host clock 2 ms off)
    seg2 = store.new_segment(started_wall=1.8e9 + t2, timeline_s=t2 + 0.002, join_kind="wall", **common)
    ls = LogSession(store, seg2, None, nominal_s=1.0, timeline_s=t2)
    evs = _weekend_events(rng, gap_k[1], 216_000, 1.0, drift, 3e-6, t2, missed, failed)
    for i in range(0, len(evs), 2000):
        ls.take(evs[i:i + 2000], evs[min(i + 1999, len(evs) - 1)].time_s + 1)
        ls.maybe_commit()
    ls.finish("hours reached")
    assert len(ls.hourly()) >= 29  # the dashboard's rate per hour of this segment
    store.close()
    # ≤ 1 MB of database per hour of log at one step a second
    size = sum(os.path.getsize(p) for p in (db, db + "-wal") if os.path.exists(p))
    assert size / 60 <= 1e6, size
    st = LogStore(db, readonly=True)
    assert st.integrity() == "ok"
    fig = log_figures(st.segments(), st.events(), gaps=st.gaps(), minutes=st.minutes())
    st.db.close()
    assert fig.segments == 2 and fig.groups == 2
    assert fig.steps_detected == 216_000 - (gap_k[1] - gap_k[0]) - len(missed) - len(failed)
    assert fig.missed_steps == 3 and fig.failed_steps == 1
    assert [round(g[0] / 3600, 2) for g in fig.gaps] == [30.0] and fig.gaps[0][1] - fig.gaps[0][0] == pytest.approx(1800, abs=2)
    # the mean rate (+2.5 s/day) lies inside the interval; the interval admits the drift
    assert abs(fig.rate.rate_s_per_day - 2.5) <= fig.rate.ci95_s_per_day
    # every complete hour's rate covers that hour's true mean rate (3 us jitter: +-0.001 s/day or so)
    full = [h for h in fig.hourly if h["covered_s"] >= 3599]
    assert len(full) >= 57  # 60 h less the hour with the gap and the last, cut short
    hits = sum(abs(h["rate_s_per_day"] - (1.0 + drift * (h["hour"] + 0.5))) <= h["rate_ci95_s_per_day"] for h in full)
    assert hits >= 0.9 * len(full)
    # the worst hour is one with a missed or failed step
    assert fig.worst_hour["hour"] in {int(k // 3600) for k in missed | failed}
    assert fig.best_stretch["duration_s"] > 20 * 3600
    # Allan deviation at 1 s: white phase noise of 3 us gives sqrt(3) * 3e-6 (NIST SP 1065)
    assert fig.adev.lower[0] <= np.sqrt(3) * 3e-6 <= fig.adev.upper[0]
    # at long tau the drift (a random-walk-like frequency change) makes the deviation rise again
    assert fig.adev.deviation[-1] > fig.adev.deviation[np.argmin(fig.adev.deviation)]


# -- bounded memory ------------------------------------------------------------------------------
def test_analyzer_history_is_bounded():
    from tickscope.core.simulate import render_all

    sc = Scenario(duration_s=400, samplerate_hz=8000, seed=3, rate_s_per_day=1.0)
    x, _ = render_all(sc)
    an = Analyzer(8000, history_steps=64)
    n = 0
    for i in range(0, len(x), 4000):
        n += sum(ev.kind == "step" for ev in an.feed(Block(x[i:i + 4000, 0].astype(np.float32), i)))
        assert an.step_k.n <= 128
    assert n >= 390
    assert an.summary().rate is not None  # the recent window still gives a rate


# -- bad input and failures --------------------------------------------------------------------------
def test_full_database_stops_with_a_clear_error_and_keeps_the_committed(tmp_path):
    db = str(tmp_path / "full.db")
    store = LogStore(db)
    store.init_meta("", "test")
    seg = store.new_segment(started_wall=0.0, timeline_s=0.0, join_kind="first", samplerate=8000.0, channel=0,
                            source_kind="file", source="x")
    store.db.execute("PRAGMA max_page_count=40")  # SQLite's own "database or disk is full" (SQLITE_FULL)
    ls = LogSession(store, seg, None, nominal_s=1.0, commit_every_s=1e9, commit_audio_s=100)
    committed = 0
    with pytest.raises(StoreError, match="disk is full"):
        for k in range(100_000):
            ls.take([Event("step", k + 0.5, step=k, polarity="AB"[k % 2], match=0.9, peak_dbfs=-10, snr_db=30)],
                    k + 1.0)
            if ls.maybe_commit():
                committed = k + 1
    store.rollback()
    store.db.close()
    st = LogStore(db, readonly=True)
    assert st.integrity() == "ok"
    n = len(st.events()["time_s"])
    assert committed > 0 and n == committed
    st.db.close()


def _can_mount_tmpfs(path):
    if os.geteuid() != 0:
        return False
    os.makedirs(path, exist_ok=True)
    return subprocess.run(["mount", "-t", "tmpfs", "-o", "size=192k", "tmpfs", path], capture_output=True).returncode == 0


def test_full_disk_and_read_only_folder_on_a_tiny_file_system(bench_recording, tmp_path):
    mnt = str(tmp_path / "tiny")
    if not _can_mount_tmpfs(mnt):
        pytest.skip("needs root to mount a tiny tmpfs")
    try:
        db = os.path.join(mnt, "log.db")
        r = _cli("log", db, "--source", bench_recording[0], "--quiet")
        assert r.returncode == 2
        assert "Traceback" not in r.stderr and len(r.stderr.strip().splitlines()) == 1
        assert "disk is full" in r.stderr
        con = sqlite3.connect(db)
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert con.execute("SELECT count(*) FROM events").fetchone()[0] > 0  # what was committed stays
        con.close()
        subprocess.run(["mount", "-o", "remount,ro", mnt], check=True)
        r = _cli("log", os.path.join(mnt, "other.db"), "--source", bench_recording[0], "--quiet")
        assert r.returncode == 2 and "Traceback" not in r.stderr
        assert "read-only" in r.stderr or "cannot open" in r.stderr
        r = _cli("report", db, "--json")  # a read-only log is still readable
        assert r.returncode == 0, r.stderr
    finally:
        subprocess.run(["umount", mnt], capture_output=True)


@pytest.mark.parametrize("case", ["missing", "text", "not-a-log", "empty-log"])
def test_report_on_bad_databases(tmp_path, capsys, case):
    p = tmp_path / "x.db"
    if case == "text":
        p.write_text("hello, this is not a database\n" * 100)
    elif case == "not-a-log":
        con = sqlite3.connect(p)
        con.execute("CREATE TABLE t (a)")
        con.commit()
        con.close()
    elif case == "empty-log":
        LogStore(str(p)).close()
    assert main(["report", str(p)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("tickscope: ") and len(err.strip().splitlines()) == 1


def test_log_usage_errors(tmp_path, bench_recording, capsys):
    assert main(["log", str(tmp_path / "a.db")]) == 2
    assert "give a source" in capsys.readouterr().err
    assert main(["log", str(tmp_path / "nodir" / "a.db"), "--source", bench_recording[0]]) == 2
    assert "does not exist" in capsys.readouterr().err
    # a log of one recording cannot be continued with another
    other = str(tmp_path / "other.wav")
    write_simulation(other, Scenario(duration_s=20, samplerate_hz=8000))
    assert main(["log", str(tmp_path / "b.db"), "--source", other, "--quiet"]) == 0
    capsys.readouterr()
    assert main(["log", str(tmp_path / "b.db"), "--source", bench_recording[0], "--quiet"]) == 2
    assert "use a new database" in capsys.readouterr().err
    assert main(["log", str(tmp_path / "c.db"), "--source", str(tmp_path / "missing.wav")]) == 2


def test_keep_audio_clips_around_anomalies_within_budget(tmp_path):
    wav = str(tmp_path / "clip.wav")
    write_simulation(wav, Scenario(duration_s=120, samplerate_hz=8000, missed_steps=(30, 80), snr_db=30, seed=8))
    db = str(tmp_path / "clips.db")
    assert main(["log", db, "--source", wav, "--keep-audio", "anomalies", "--quiet"]) == 0
    st = LogStore(db, readonly=True)
    clips = st.clips()
    st.db.close()
    kinds = [c[2] for c in clips]
    assert kinds.count("missed") == 2
    import io

    import soundfile as sf

    for seg, t, kind, fs, start, data in clips:
        x, sr = sf.read(io.BytesIO(data))
        assert sr == 8000 and start <= t <= start + len(x) / sr
    # a tiny budget keeps nothing and says so
    db2 = str(tmp_path / "clips2.db")
    assert main(["log", db2, "--source", wav, "--keep-audio", "anomalies", "--clip-budget-mb", "0.0001",
                 "--json", "--quiet"]) == 0
    st = LogStore(db2, readonly=True)
    assert st.clips() == []
    st.db.close()


def test_report_calibrates_a_device_log_from_its_own_block_readings(tmp_path, capsys):
    # an hour from a device whose sample clock runs 40 ppm fast: on its time base a movement
    # that keeps perfect time seems to lose 40 ppm = 3.456 s/day; the logged block readings
    # (least-delayed block per 10 s) measure the device against the host clock and undo it
    rng = np.random.default_rng(3)
    db = str(tmp_path / "dev.db")
    store = LogStore(db)
    store.init_meta("", "test")
    seg = store.new_segment(started_wall=1.8e9, timeline_s=0.0, join_kind="first", samplerate=48000.0,
                            channel=0, source_kind="device", source="usb mic", host_sync="synchronised (NTP)")
    ppm = 40.0
    for i in range(360):
        host = i * 10.0 + 5.0
        start = int(round(host * 48000 * (1 + ppm * 1e-6)))
        store.add_block(seg, start, host + 0.003 + abs(rng.normal(0, 0.0005)), 1.8e9 + host, None)
    ls = LogSession(store, seg, None, nominal_s=1.0)
    k = np.arange(3600)
    t = (0.5 + k) * (1 + ppm * 1e-6) + rng.normal(0, 2e-6, len(k))  # true 1 s steps on the fast device clock
    ls.take([Event("step", float(tt), step=int(kk), polarity="AB"[kk % 2], match=0.95, peak_dbfs=-12, snr_db=30)
             for kk, tt in zip(k, t)], float(t[-1]) + 0.5)
    ls.finish("stopped by Ctrl-C")
    store.close()
    assert main(["report", db, "--json"]) == 0
    raw = json.loads(capsys.readouterr().out)
    assert raw["rate_s_per_day"] == pytest.approx(-3.456, abs=0.01)
    assert raw["device_clock_vs_host"][0]["ppm"] == pytest.approx(40.0, abs=0.5)
    assert main(["report", db, "--json", "--clock-from-host"]) == 0
    cal = json.loads(capsys.readouterr().out)
    assert abs(cal["rate_s_per_day"]) <= cal["rate_ci95_s_per_day"] and cal["rate_ci95_s_per_day"] < 0.1
    assert cal["clock_correction_ppm"] == pytest.approx(40.0, abs=0.5)
    assert "host clock" in cal["time_base"]
    assert main(["report", db, "--clock-from-host", "--clock-ppm", "3"]) == 2


def test_polarity_names_hold_across_a_restart(tmp_path):
    """A restarted device log names A/B from its own first step; the report names them once for the log.

    The movement: A steps ring 8 ms, B steps 12 ms (physical polarity = step number parity).  The
    second segment starts on a B step, which that segment calls A.
    """
    rng = np.random.default_rng(5)
    store = LogStore(str(tmp_path / "restart.db"))
    store.init_meta("polarity test", "test")
    common = dict(samplerate=8000.0, channel=0, clock_ppm=None, source_kind="device", source="bench mic")

    def events(k0, k1, t_shift):
        out = []
        for own, kk in enumerate(range(k0, k1)):
            t = 0.5 + kk * (1 - 2e-5) + rng.normal(0, 3e-6) - t_shift
            out.append(Event("step", float(t), step=own, polarity="AB"[own % 2], peak_dbfs=-14.0, snr_db=35.0,
                             match=0.97, decay_ms=(8.0, 12.0)[kk % 2] + rng.normal(0, 0.05)))
        return out

    for i, (k0, k1) in enumerate(((0, 4000), (4901, 9000))):  # a 15 min gap; segment 2 starts on step 4901 (B)
        t_shift = k0 * (1 - 2e-5)
        seg = store.new_segment(started_wall=1.8e9 + t_shift, timeline_s=t_shift, join_kind="wall" if i else "first",
                                **common)
        ls = LogSession(store, seg, None, nominal_s=1.0, timeline_s=t_shift)
        evs = events(k0, k1, t_shift)
        ls.take(evs, evs[-1].time_s + 1)
        ls.finish("test")
    st = LogStore(str(tmp_path / "restart.db"), readonly=True)
    ev = st.events()
    fig = log_figures(st.segments(), ev)
    # as stored, segment 2 calls its 12 ms steps A
    seg2 = ev["seg"] == st.segments()[1].id
    assert np.median(ev["decay_ms"][seg2 & (ev["pol"] == 0)]) == pytest.approx(12.0, abs=0.2)
    # the report: A rings 8 ms and B 12 ms in every hour, before and after the restart
    hours = [r for r in fig.ringdown_hourly if r["A"] and r["B"]]
    assert len(hours) >= 2 and any(r["hour"] >= 2 for r in hours)
    for r in hours:
        assert r["A"]["median_ms"] == pytest.approx(8.0, abs=0.2), r
        assert r["B"]["median_ms"] == pytest.approx(12.0, abs=0.2), r
    assert any("other way round" in n for n in fig.notes)
    # the steps CSV uses the log's names too
    buf = io.StringIO()
    write_log_csv(buf, fig.event_t, fig.event_k, ev, fig.event_pol)
    rows = list(csv.DictReader(io.StringIO(buf.getvalue())))
    for r in rows:
        assert (float(r["decay_ms"]) < 10) == (r["polarity"] == "A")
    st.db.close()


def test_log_of_an_escapement_holds_beats_not_steps(tmp_path):
    # a mechanical escapement (5 beats a second, tick and tock 4 ms apart): the log used to end with
    # "1497 steps, 2 missed" and the report with "step every 0 s"; analyze times such a sound as an
    # escapement's beats, and so must the log and its report (rate against 18000 per hour, the beat
    # asymmetry hour by hour)
    wav = str(tmp_path / "escapement.wav")
    write_simulation(wav, Scenario(samplerate_hz=8000, duration_s=120, step_interval_s=0.2,
                                   polarity_asymmetry_us=2000, snr_db=30, movement="wristwatch", seed=2))
    db = str(tmp_path / "esc.db")
    r = _cli("log", db, "--source", wav, "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert d["sound"] == "escapement" and d["beat_interval_s"] == pytest.approx(0.2, rel=1e-3)
    # timed as an escapement: 18000 beats per hour, B beats 2 ms late (an asymmetry of 4 ms)
    assert d["escapement"]["beats_per_hour"] == 18000
    assert abs(abs(d["escapement"]["beat_asymmetry_ms"]) - 4.0) <= d["escapement"]["beat_asymmetry_ci95_ms"] + 0.05
    r = _cli("report", db, "--json")
    assert r.returncode == 0, r.stderr
    rep = json.loads(r.stdout)
    assert rep["step_interval_s"] == pytest.approx(0.2) and rep["missed_steps"] <= 2
    assert rep["steps_detected"] >= 595  # 600 beats in 120 s
    # the simulated movement keeps exact time: rate 0 within its interval, as analyze measures it
    assert abs(rep["rate_s_per_day"]) <= rep["rate_ci95_s_per_day"] + 0.05
    h = rep["hourly"][0]
    assert abs(abs(h["beat_asymmetry_ms"]) - 4.0) <= h["beat_asymmetry_ci95_ms"] + 0.05
    assert any(n.startswith("the log holds an escapement's beats, 18000 per hour") for n in rep["notes"])
    r = _cli("report", db)
    assert "step every 0 s" not in r.stdout and "an escapement's beats" in " ".join(r.stdout.split())
    assert "at the end of segment 1: the escapement" in " ".join(r.stdout.split())


def test_report_of_a_lossy_replay_fits_within_the_codecs_shifts(tmp_path):
    # The voice note of test_realistic (Opus at ~28 kbit/s, whose encoder moves every step by ~35 us
    # at once partway through): analyze fits the rate within the stretches between such shifts; the
    # report of the same file replayed through a log must do the same and agree with it.
    sc = Scenario(duration_s=240, rate_s_per_day=12.3, movement="wristwatch", snr_db=26.8, seed=105)
    path = str(tmp_path / "voice-note.opus")
    write_simulation(path, sc, compression_level=0.9)
    a = subprocess.run([sys.executable, "-m", "tickscope", "analyze", path, "--json"], capture_output=True, text=True)
    ana = json.loads(a.stdout)
    db = str(tmp_path / "vn.db")
    r = _cli("log", db, "--source", path, "--json")
    assert r.returncode == 0, r.stderr
    rep = json.loads(_cli("report", db, "--json").stdout)
    assert rep["rate_s_per_day"] == pytest.approx(ana["rate_s_per_day"], abs=1e-4)
    assert any("lossy codec" in n for n in rep["notes"])
    # without the segment's lossy mark (a log written before the report knew of it) no shift is
    # looked for, and the line through all the steps is off by far more than analyze's interval
    with sqlite3.connect(db) as con:
        con.execute("DELETE FROM meta WHERE key LIKE 'segment % lossy'")
    plain = json.loads(_cli("report", db, "--json").stdout)
    assert abs(plain["rate_s_per_day"] - 12.3) > 10 * ana["rate_ci95_statistical_s_per_day"]
    assert not any("lossy codec" in n for n in plain["notes"])


def test_ticking_that_stops_before_the_end_is_not_missed_in_the_hourly_lines(tmp_path):
    # the movement stops (or the microphone is taken away) 8 s before the recording ends: those
    # slots are silence, not missed steps -- in the totals and, as it once was not, in the hour's line
    sc = Scenario(duration_s=40, snr_db=30, seed=3)
    x, truth = render_all(sc)
    fs = sc.samplerate_hz
    y = np.concatenate([x[:, 0], np.random.default_rng(0).normal(0, 1e-4, 8 * fs)]).astype(np.float32)
    wav = str(tmp_path / "stops.wav")
    sf.write(wav, y, fs)
    d = json.loads(_cli("log", str(tmp_path / "a.db"), "--source", wav, "--json").stdout)
    assert d["missed"] == 0 and d["stopped_slots"] >= 6
    out = _cli("log", str(tmp_path / "b.db"), "--source", wav).stdout
    hour_lines = [ln for ln in out.splitlines() if ln.startswith("h0")]
    assert hour_lines and not any("missed" in ln for ln in hour_lines), out


def test_log_of_a_damaged_float_file_says_what_was_lost(tmp_path):
    # a float WAV holding NaNs and infinities (a damaged file): they are lost audio, gaps in the log
    # (never missed steps), and the log says so -- in its JSON line, its database and the report
    x, _ = render_all(Scenario(duration_s=40, seed=12))
    x = x[:, 0].astype(np.float32)
    x[48000 * 20: 48000 * 20 + 300] = np.nan
    x[48000 * 30: 48000 * 30 + 5] = np.inf
    wav = str(tmp_path / "damaged.wav")
    sf.write(wav, x, 48000, subtype="FLOAT")
    db = str(tmp_path / "damaged.db")
    r = _cli("log", db, "--source", wav, "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert d["nonfinite_samples"] == 305 and d["steps"] >= 38
    r = _cli("report", db, "--json")
    assert r.returncode == 0, r.stderr
    rep = json.loads(r.stdout)
    assert any("305 samples" in n and "lost audio" in n for n in rep["notes"])
    assert [g["kind"] for g in rep["gaps"]].count("unusable audio") == 2 and rep["missed_steps"] == 0


@pytest.mark.parametrize("told", [["--movement", "escapement"], []], ids=["told", "auto"])
def test_a_logged_lever_gives_its_amplitude_hour_by_hour(tmp_path, told):
    # The lever demo (28800 beats an hour, amplitude 275 deg at a 52 deg lift angle; simulator truth)
    # logged with --movement escapement, or without (its first seconds are then heard again with an
    # escapement's window, windowprobe.py): each beat's lift time is stored, and the report gives each
    # hour's balance amplitude from them -- as analyze gives the whole recording's -- and exports the
    # lift times in the steps CSV.
    src = os.path.join(os.path.dirname(__file__), "..", "recordings", "bench-lever-watch.flac")
    truth = json.load(open(src.replace(".flac", ".truth.json")))["scenario"]
    db = str(tmp_path / "lever.db")
    r = _cli("log", db, "--source", src, *told, "--json")
    assert r.returncode == 0, r.stderr
    with sqlite3.connect(db) as con:
        lifts = [v for (v,) in con.execute("SELECT lift_us FROM events WHERE kind=0")]
    assert sum(v is not None for v in lifts) >= 0.6 * len(lifts) > 100
    r = _cli("report", db, "--json", "--steps-csv", str(tmp_path / "beats.csv"))
    assert r.returncode == 0, r.stderr
    rep = json.loads(r.stdout)
    h = rep["hourly"][0]
    assert h["amplitude_reason"] is None
    assert abs(h["amplitude_deg"] - truth["amplitude_deg"]) <= h["amplitude_ci95_deg"]
    a = _cli("analyze", src, "--json")
    e = json.loads(a.stdout)["escapement"]
    assert h["amplitude_deg"] == pytest.approx(e["amplitude_deg"], abs=0.5 * e["amplitude_ci95_deg"])
    # an escapement has no logic regulation: its rate's interval is not widened for an unseen
    # correction (30 s of a quartz motor would be), so the log's agrees with analyze's
    a_rate = json.loads(a.stdout)
    assert rep["rate_ci95_s_per_day"] == pytest.approx(a_rate["rate_ci95_s_per_day"], rel=0.25)
    assert abs(rep["rate_s_per_day"] - truth["rate_s_per_day"]) <= rep["rate_ci95_s_per_day"]
    # the hour's asymmetry carries the allowance for where each side is timed, as analyze's does
    assert h["beat_asymmetry_ci95_ms"] >= 0.05 and abs(abs(h["beat_asymmetry_ms"]) - abs(
        truth["beat_asymmetry_ms"])) <= h["beat_asymmetry_ci95_ms"]
    rows = list(csv.DictReader(open(tmp_path / "beats.csv")))
    got = [float(x["lift_ms"]) for x in rows if x["lift_ms"]]
    # the lift time the amplitude relation gives, t = (T / pi) asin(LA / 2A) (shared/domain.md 10.3)
    period_s = 2 * 3600 / truth["beats_per_hour"]
    lift_ms = period_s / np.pi * np.arcsin(truth["lift_angle_deg"] / (2 * truth["amplitude_deg"])) * 1e3
    assert len(got) >= 100 and np.median(got) == pytest.approx(lift_ms, rel=0.03)
    r = _cli("report", db)
    assert "beats hour by hour" in r.stdout and "balance amplitude" in r.stdout
    r = _cli("report", db, "--out", str(tmp_path / "plots"), "--json")
    assert r.returncode == 0, r.stderr
    png = tmp_path / "plots" / "balance.png"
    assert str(png) in json.loads(r.stdout)["plots"] and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_a_version_1_log_gains_the_lift_column_when_written_again(tmp_path):
    # a log written before lift times were stored: read as it is (no lift times), and the first
    # writer adds the column and marks the schema 2; nothing already stored changes
    db = str(tmp_path / "old.db")
    con = sqlite3.connect(db)
    con.executescript("""
        CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT);
        INSERT INTO meta VALUES ('schema_version', '1');
        CREATE TABLE events (seg INTEGER NOT NULL, kind INTEGER NOT NULL, step INTEGER, time_s REAL NOT NULL,
            pol INTEGER, peak_cdb INTEGER, snr_cdb INTEGER, match_pm INTEGER, decay_us INTEGER, flags INTEGER);
        INSERT INTO events VALUES (1, 0, 0, 0.5, 0, -2000, 3000, 990, 8000, 0);
    """)
    con.commit()
    con.close()
    from tickscope.io.store import LogStore

    ro = LogStore(db, readonly=True)
    ev = ro.events()
    assert ev["time_s"].tolist() == [0.5] and np.isnan(ev["lift_ms"]).all()
    ro.close()
    st = LogStore(db)
    assert st.meta()["schema_version"] == "2"
    st.add_event(1, "step", 1, 1.5, 1, -20.0, 30.0, 0.99, 8.0, (), lift_ms=1.25)
    st.commit()
    ev = st.events()
    assert ev["time_s"].tolist() == [0.5, 1.5] and np.isnan(ev["lift_ms"][0]) and ev["lift_ms"][1] == 1.25
    assert ev["decay_ms"].tolist() == [8.0, 8.0]
    st.close()
