"""A log's faults: two writers at once, a full disk with clips, a log that fails to start, exit codes.

Real processes where it matters: a `tickscope log` subprocess stopped, killed with SIGKILL or
interrupted with SIGINT, and a second one started beside it.
"""
import json
import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import time

import numpy as np
import pytest
import soundfile as sf

from conftest import true_step_times
from tickscope.cli import main
from tickscope.core.simulate import Scenario
from tickscope.simulation import write_simulation
from tickscope.io.store import LogStore

PY = [sys.executable, "-m", "tickscope"]


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    """15 min at 8 kHz of a movement with three missed steps (a replay takes a second or two)."""
    d = tmp_path_factory.mktemp("faults")
    p = str(d / "workshop-regulator.wav")
    sc = Scenario(samplerate_hz=8000, duration_s=900, rate_s_per_day=1.5, missed_steps=(100, 400, 700),
                  snr_db=30, second_impact_ms=50, seed=21)
    truth = write_simulation(p, sc)
    n_true = int(np.sum(true_step_times(truth) < sc.duration_s - 0.1))
    return p, n_true


def _cli(*args, timeout=300):
    return subprocess.run([*PY, *args], capture_output=True, text=True, timeout=timeout)


def _tickscope_lines(err: str) -> list[str]:
    """tickscope's own lines of stderr (PortAudio's ALSA back end writes lines of its own there)."""
    return [ln for ln in err.strip().splitlines() if ln.startswith("tickscope: ")]


def _committed_s(db) -> float:
    try:
        with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as con:
            row = con.execute("SELECT max(decided_s) FROM segments").fetchone()
        return -1.0 if row is None or row[0] is None else float(row[0])
    except sqlite3.Error:
        return -1.0


def _segments(db) -> int:
    try:
        with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as con:
            return con.execute("SELECT count(*) FROM segments").fetchone()[0]
    except sqlite3.Error:
        return 0


def _wait_committed(p, db, at_least_s=0.0, limit_s=120.0):
    t0 = time.monotonic()
    while p.poll() is None and time.monotonic() - t0 < limit_s and _committed_s(db) <= at_least_s:
        time.sleep(0.01)
    assert p.poll() is None, "the log ended before the test could catch it at work"
    assert _committed_s(db) > at_least_s


def _db_files(folder) -> list[str]:
    return sorted(f for f in os.listdir(folder) if f.startswith("log.db"))


# -- two writers -----------------------------------------------------------------------------------------
def test_two_logs_started_together_on_one_database_write_each_step_once(bench, tmp_path):
    # both used to write segment 1 at timeline 0: the report then counted every step twice
    wav, n_true = bench
    db = str(tmp_path / "twice.db")
    cmd = [*PY, "log", db, "--source", wav, "--quiet", "--json"]
    ps = [subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for _ in range(2)]
    outs = [p.communicate(timeout=300) for p in ps]
    codes = sorted(p.returncode for p in ps)
    refused = [err for p, (_, err) in zip(ps, outs) if p.returncode != 0]
    # one logs it; the other is refused -- or, had it come after the first had ended, finds nothing to add
    assert codes[0] == 0 and codes[1] in (0, 2), outs
    for err in refused:
        assert len(err.strip().splitlines()) == 1 and "another tickscope log" in err, err
    r = _cli("report", db, "--json")
    assert r.returncode == 0, r.stderr
    d = json.loads(r.stdout)
    assert len(d["segments"]) == 1
    assert d["steps_detected"] == n_true and d["missed_steps"] == 3


def test_a_second_writer_is_refused_while_the_first_holds_the_log_and_report_still_reads(bench, tmp_path):
    wav, n_true = bench
    db = str(tmp_path / "held.db")
    p = subprocess.Popen([*PY, "log", db, "--source", wav, "--quiet"], stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, text=True)
    try:
        _wait_committed(p, db)
        os.kill(p.pid, signal.SIGSTOP)  # the first writer holds the log, doing nothing
        try:
            second = _cli("log", db, "--source", wav, "--quiet", timeout=120)
            reading = _cli("report", db, "--json", timeout=120)
        finally:
            os.kill(p.pid, signal.SIGCONT)
        out, err = p.communicate(timeout=300)
    finally:
        if p.poll() is None:
            p.kill()
    assert second.returncode == 2
    assert len(second.stderr.strip().splitlines()) == 1 and "Traceback" not in second.stderr
    assert "another tickscope log" in second.stderr and f"process {p.pid}" in second.stderr, second.stderr
    assert reading.returncode == 0, reading.stderr  # the report reads a log while it is being written
    assert json.loads(reading.stdout)["steps_detected"] > 0
    assert p.returncode == 0, err
    d = json.loads(_cli("report", db, "--json").stdout)
    assert len(d["segments"]) == 1 and d["steps_detected"] == n_true


def test_kill_9_never_leaves_the_log_locked(bench, tmp_path):
    wav, n_true = bench
    db = str(tmp_path / "killed.db")
    p = subprocess.Popen([*PY, "log", db, "--source", wav, "--quiet"], stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, text=True)
    _wait_committed(p, db)
    p.send_signal(signal.SIGKILL)
    p.wait()
    r = _cli("log", db, "--source", wav, "--quiet", "--json")  # at once: the lock died with its process
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["segment"] == 2
    d = json.loads(_cli("report", db, "--json").stdout)
    assert [s["join"] for s in d["segments"]] == ["first", "exact"]
    # one step may straddle the restart point (see test_log's kill -9 test); none is written twice
    assert n_true - 1 <= d["steps_detected"] <= n_true


def test_two_writers_in_one_process_and_a_second_name_for_the_file(tmp_path):
    db = str(tmp_path / "one.db")
    first = LogStore(db)
    first.init_meta("", "test")
    try:
        with pytest.raises(Exception, match="another tickscope log"):
            LogStore(db)
        os.symlink(db, str(tmp_path / "alias.db"))
        with pytest.raises(Exception, match="another tickscope log"):
            LogStore(str(tmp_path / "alias.db"))
        LogStore(db, readonly=True).db.close()  # readers are never refused
    finally:
        first.close()
    LogStore(db).close()  # free again once the first writer has closed
    assert not os.path.exists(db + ".lock")


# -- a full disk with clips ---------------------------------------------------------------------------------
def _can_mount_tmpfs(path):
    if os.geteuid() != 0 or shutil.which("mount") is None:
        return False
    os.makedirs(path, exist_ok=True)
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=192k", "tmpfs", path], capture_output=True)
    return r.returncode == 0


def test_full_disk_with_clips_keeps_the_events_and_says_how_much(bench, tmp_path):
    # with --keep-audio anomalies a full disk once kept no events at all (a clip went into the
    # same transaction as the events and took it down)
    mnt = str(tmp_path / "tiny")
    if not _can_mount_tmpfs(mnt):
        pytest.skip("needs root to mount a tiny tmpfs")
    wav = bench[0]
    kept = {}
    try:
        for keep in ("none", "anomalies"):
            for f in os.listdir(mnt):
                os.remove(os.path.join(mnt, f))
            db = os.path.join(mnt, "log.db")
            r = _cli("log", db, "--source", wav, "--keep-audio", keep, "--json")
            assert r.returncode == 2 and "Traceback" not in r.stderr
            assert len(r.stderr.strip().splitlines()) == 1 and "disk is full" in r.stderr
            con = sqlite3.connect(db)
            assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
            steps = con.execute("SELECT count(*) FROM events WHERE kind=0").fetchone()[0]
            decided = con.execute("SELECT decided_s FROM segments").fetchone()[0]
            con.close()
            kept[keep] = steps
            # what was kept is said: in the JSON and in the error line, as the database holds it
            d = json.loads(r.stdout)
            assert d["ended"] == "the disk is full" and d["steps"] == steps > 0
            assert d["duration_s"] == pytest.approx(decided, abs=1e-3)
            assert f"{steps} steps" in r.stderr and f"{decided:.1f} s of audio" in r.stderr
            if keep == "anomalies":
                assert d["clips_stopped"] and d["clips_kept"] == 0
        assert kept["anomalies"] >= kept["none"] - 5, kept  # the events come first
        # the end-of-segment line says it too
        for f in os.listdir(mnt):
            os.remove(os.path.join(mnt, f))
        r = _cli("log", os.path.join(mnt, "log.db"), "--source", wav, "--keep-audio", "anomalies")
        assert r.returncode == 2
        words = " ".join(r.stdout.split())
        assert "ended (the disk is full)" in words and "steps" in words and "no more clips" in words, words
    finally:
        subprocess.run(["umount", mnt], capture_output=True)


def _limit_pages(monkeypatch, pages: int):
    """SQLite's own "database or disk is full" (SQLITE_FULL) for the writer, at this many pages."""
    real = sqlite3.connect

    def connect(path, *a, **k):
        con = real(path, *a, **k)
        if not str(path).startswith("file:"):  # the writer (readers open a read-only URI)
            con.execute(f"PRAGMA max_page_count={pages}")
        return con

    monkeypatch.setattr(sqlite3, "connect", connect)


@pytest.fixture(scope="module")
def anomalies(tmp_path_factory):
    """4 min at 16 kHz with a missed step every 35 s: six clips of ~27 kB."""
    p = str(tmp_path_factory.mktemp("clips") / "bench-carriage-clock.wav")
    write_simulation(p, Scenario(samplerate_hz=16000, duration_s=240, missed_steps=(25, 60, 95, 130, 165, 200),
                                 snr_db=30, seed=8))
    return p


@pytest.mark.parametrize("pages", [14, 16, 24])
def test_clips_that_do_not_fit_give_way_to_the_events(anomalies, tmp_path, monkeypatch, capsys, pages):
    # the events of this log take 12 pages of 4 KiB, a clip about 7: at 14 pages no clip fits, at 16
    # one fits but then leaves no room for the events, at 24 two fit; every event must be kept
    db = str(tmp_path / "clips.db")
    _limit_pages(monkeypatch, pages)
    rc = main(["log", db, "--source", anomalies, "--keep-audio", "anomalies", "--json", "--quiet"])
    monkeypatch.undo()
    out, err = capsys.readouterr()
    assert rc == 0, err
    d = json.loads(out)
    st = LogStore(db, readonly=True)
    ev, clips = st.events(), st.clips()
    st.db.close()
    assert d["steps"] == int(np.sum(ev["kind"] == 0)) == 234 and int(np.sum(ev["kind"] == 1)) == 6
    assert d["clips_kept"] == len(clips) < 6 and "the disk is full" in d["clips_stopped"]
    assert d["clips_kept_bytes"] == sum(len(c[5]) for c in clips)
    if pages == 16:
        assert d["clips_removed"] == 1 and not clips  # stored, then removed for the events


def test_a_full_database_without_clips_still_says_what_it_kept(anomalies, tmp_path, monkeypatch, capsys):
    db = str(tmp_path / "full.db")
    _limit_pages(monkeypatch, 11)
    rc = main(["log", db, "--source", anomalies, "--json", "--quiet"])
    monkeypatch.undo()
    out, err = capsys.readouterr()
    assert rc == 2 and len(err.strip().splitlines()) == 1 and "disk is full" in err
    d = json.loads(out)
    st = LogStore(db, readonly=True)
    ev, seg = st.events(), st.segments()[0]
    st.db.close()
    assert d["ended"] == "the disk is full" and 0 < d["steps"] == int(np.sum(ev["kind"] == 0)) < 234
    assert d["duration_s"] == pytest.approx(seg.decided_s, abs=1e-3) and d["lost_s"] > 0
    assert f"{d['steps']} steps" in err


# -- a log that fails to start ----------------------------------------------------------------------------
@pytest.mark.parametrize("case", ["missing source", "no such device", "bad channel", "bad rate", "not audio"])
def test_a_log_that_fails_to_start_leaves_no_database(tmp_path, anomalies, capsys, case):
    db = str(tmp_path / "log.db")
    junk = tmp_path / "notes.wav"
    junk.write_text("not audio\n")
    args = {"missing source": ["--source", str(tmp_path / "missing.wav")],
            "no such device": ["--device", "no device is called this"],
            "bad channel": ["--source", anomalies, "--channel", "3"],
            "bad rate": ["--device", "0", "--rate-hz", "1000"],
            "not audio": ["--source", str(junk)]}[case]
    assert main(["log", db, *args]) == 2
    err = capsys.readouterr().err
    assert len(_tickscope_lines(err)) == 1, err
    assert _db_files(tmp_path) == [], _db_files(tmp_path)


def test_a_failed_start_never_removes_a_log_that_holds_segments(tmp_path, anomalies, capsys):
    db = str(tmp_path / "log.db")
    assert main(["log", db, "--source", anomalies, "--quiet", "--label", "carriage clock", "--hours", "0.02"]) == 0
    st = LogStore(db, readonly=True)
    before = st.events()
    st.db.close()
    assert 0 < int(np.sum(before["kind"] == 0)) < 234  # part of the recording: a resume would add to it
    for args in (["--source", anomalies, "--channel", "3"],  # bad option on resume
                 ["--device", "no device is called this"],  # a device into a file's log
                 ["--source", anomalies, "--label", "another clock"]):  # another movement
        assert main(["log", db, *args]) == 2
    capsys.readouterr()
    st = LogStore(db, readonly=True)
    assert len(st.segments()) == 1 and st.integrity() == "ok"
    assert np.array_equal(st.events()["time_s"], before["time_s"])
    st.db.close()


# -- exit codes ---------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def unusable(tmp_path_factory):
    d = tmp_path_factory.mktemp("nosteps")
    quiet = str(d / "quiet-room.wav")
    sf.write(quiet, np.random.default_rng(0).normal(0, 1e-4, 8000 * 30).astype(np.float32), 8000)
    nan = str(d / "damaged.wav")
    sf.write(nan, np.full(8000 * 30, np.nan, dtype=np.float32), 8000, subtype="FLOAT")
    return {"silence": quiet, "all not numbers": nan}


@pytest.mark.parametrize("case", ["silence", "all not numbers"])
def test_log_of_audio_without_steps_exits_3_as_analyze_does(unusable, tmp_path, capsys, case):
    path = unusable[case]
    assert main(["analyze", path, "--quiet"]) == 3
    a_err = capsys.readouterr().err
    db = str(tmp_path / "log.db")
    assert main(["log", db, "--source", path, "--json", "--quiet"]) == 3
    out, err = capsys.readouterr()
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("tickscope: no steps could be found"), err
    # the same reason as analyze gives
    why = {"silence": "no stepping-motor pattern was heard", "all not numbers": "are numbers"}[case]
    assert why in a_err and why in err
    d = json.loads(out)  # the segment's summary still comes first, and the segment is kept
    assert d["steps"] == 0 and d["duration_s"] == pytest.approx(30.0, abs=0.1)
    st = LogStore(db, readonly=True)
    assert len(st.segments()) == 1
    st.db.close()


def test_ctrl_c_on_a_replay_exits_130_after_committing_and_summing_up(bench, tmp_path):
    wav, _ = bench
    db = str(tmp_path / "stopped.db")
    p = subprocess.Popen([*PY, "log", db, "--source", wav, "--quiet", "--json"], stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, text=True)
    _wait_committed(p, db)
    p.send_signal(signal.SIGINT)
    out, err = p.communicate(timeout=120)
    assert p.returncode == 130, (p.returncode, err)
    assert "Traceback" not in err
    d = json.loads(out)
    assert d["ended"] == "stopped by Ctrl-C" and 0 < d["duration_s"] < 900
    with sqlite3.connect(db) as con:
        reason, decided = con.execute("SELECT end_reason, decided_s FROM segments").fetchone()
        steps = con.execute("SELECT count(*) FROM events WHERE kind=0").fetchone()[0]
    assert reason == "stopped by Ctrl-C" and decided == pytest.approx(d["duration_s"], abs=1e-3)
    assert steps == d["steps"]  # everything it counted is committed


def test_report_on_a_directory_says_it_is_one(tmp_path, capsys):
    assert main(["report", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1
    assert "is a directory, not a log database" in err and "no such file" not in err


# -- a device log through the virtual microphone ------------------------------------------------------------
LOOPBACK_DIR = os.environ.get("TICKSCOPE_LOOPBACK_DIR", "/tmp/tickscope-loopback")
SINK = os.environ.get("TICKSCOPE_LOOPBACK_SINK", "tsink")


@pytest.fixture(scope="module")
def loopback():
    env = dict(os.environ)
    if "PULSE_SERVER" not in env and os.path.exists(f"{LOOPBACK_DIR}/native"):
        env["PULSE_SERVER"] = f"unix:{LOOPBACK_DIR}/native"
        env.setdefault("PULSE_COOKIE", f"{LOOPBACK_DIR}/cookie")
    reason = None
    if shutil.which("pactl") is None or shutil.which("paplay") is None:
        reason = "pactl/paplay not found (bash scripts/audio-loopback.sh install)"
    else:
        r = subprocess.run(["pactl", "list", "short", "sinks"], capture_output=True, text=True, timeout=10, env=env)
        if r.returncode != 0 or SINK not in r.stdout.split():
            reason = f"no PulseAudio null sink {SINK!r} (bash scripts/audio-loopback.sh start)"
    if reason:
        if os.environ.get("AUDIO_LOOPBACK_REQUIRED") == "1":
            pytest.fail(f"audio loopback required but unavailable: {reason}", pytrace=False)
        pytest.skip(f"audio loopback unavailable: {reason}")
    return env


def test_device_log_refuses_a_second_writer_and_ctrl_c_exits_130(loopback, tmp_path):
    env = loopback
    sc = Scenario(duration_s=16, first_step_s=0.6, rate_s_per_day=2.0, snr_db=35, seed=73)
    wav = str(tmp_path / "play.wav")
    truth = write_simulation(wav, sc)
    n_true = int(np.sum(true_step_times(truth) < sc.duration_s))
    db = str(tmp_path / "bench.db")
    cmd = [*PY, "log", db, "--device", "pulse", "--rate-hz", "48000", "--json"]
    p = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    second = None
    try:
        t0 = time.monotonic()
        while time.monotonic() - t0 < 20 and not _segments(db):  # the row appears just before capture starts
            time.sleep(0.1)
        assert _segments(db), "the device log did not start"
        time.sleep(1.0)
        second = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
        try:
            _, err2 = second.communicate(timeout=60)  # a second writer used to log on beside the first
        except subprocess.TimeoutExpired:
            second.kill()
            second.communicate()
            pytest.fail("a second device log ran beside the first")
        subprocess.run(["paplay", f"--device={SINK}", wav], check=True, timeout=60, env=env)
        time.sleep(2.5)  # the last steps are decided a few slots later
        p.send_signal(signal.SIGINT)
        out, err = p.communicate(timeout=30)
    finally:
        for q in (p, second):
            if q is not None and q.poll() is None:
                q.kill()
    assert second.returncode == 2 and _tickscope_lines(err2) and "another tickscope log" in err2, err2
    assert p.returncode == 130, (p.returncode, err)
    d = json.loads(out)
    assert d["ended"] == "stopped by Ctrl-C" and d["steps"] == n_true
    r = _cli("report", db, "--json")
    assert r.returncode == 0, r.stderr
    rep = json.loads(r.stdout)
    assert len(rep["segments"]) == 1 and rep["steps_detected"] == n_true


def test_a_device_that_cannot_be_opened_leaves_no_database(loopback, tmp_path):
    db = str(tmp_path / "log.db")
    r = subprocess.run([*PY, "log", db, "--device", "pulse", "--channel", "40"], capture_output=True, text=True,
                       timeout=60, env=loopback)
    assert r.returncode == 2
    lines = _tickscope_lines(r.stderr)
    assert len(lines) == 1 and "cannot open the input device" in lines[0], r.stderr
    assert "segment 1 ended" not in r.stdout
    assert _db_files(tmp_path) == []
