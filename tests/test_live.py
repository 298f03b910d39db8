"""Live capture: the callback's bookkeeping (no hardware), the dashboard, and real capture through
a PulseAudio null sink (skipped locally when no sound server can be reached; required in CI)."""
import io
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from types import SimpleNamespace

import numpy as np
import pytest
import soundfile as sf

LOOPBACK_DIR = os.environ.get("TICKSCOPE_LOOPBACK_DIR", "/tmp/tickscope-loopback")
SINK = os.environ.get("TICKSCOPE_LOOPBACK_SINK", "tsink")
if "PULSE_SERVER" not in os.environ and os.path.exists(f"{LOOPBACK_DIR}/native"):
    os.environ["PULSE_SERVER"] = f"unix:{LOOPBACK_DIR}/native"  # before sounddevice is imported
    os.environ.setdefault("PULSE_COOKIE", f"{LOOPBACK_DIR}/cookie")

from tickscope.core.simulate import Scenario  # noqa: E402
from tickscope.io.capture import Capture  # noqa: E402
from tickscope.simulation import write_simulation  # noqa: E402
from tickscope.export import summary_to_dict


# -- the callback, driven by hand ------------------------------------------------------------------
def _status(overflow=False):
    return SimpleNamespace(input_overflow=overflow)


def test_callback_counts_overflow_as_a_gap():
    cap = Capture(None, 48000, queue_blocks=8, clock=lambda: 0.0)
    x = np.ones((480, 1), dtype=np.float32)
    cap._callback(x, 480, SimpleNamespace(inputBufferAdcTime=10.0), _status())
    # 0.01 s later than expected (480 frames lost), with the overflow flag
    cap._callback(x, 480, SimpleNamespace(inputBufferAdcTime=10.02), _status(True))
    b1, b2 = cap._q.get_nowait(), cap._q.get_nowait()
    assert (b1.start_sample, b1.gap_before) == (0, 0)
    assert (b2.start_sample, b2.gap_before) == (960, 480)
    assert cap.overflows == 1


def test_callback_full_queue_drops_and_reports_the_gap():
    cap = Capture(None, 48000, queue_blocks=1, clock=lambda: 0.0)
    x = np.zeros((100, 1), dtype=np.float32)
    for _ in range(3):
        cap._callback(x, 100, SimpleNamespace(inputBufferAdcTime=0.0), _status())
    assert cap.dropped_frames == 200
    cap._q.get_nowait()
    cap._callback(x, 100, SimpleNamespace(inputBufferAdcTime=0.0), _status())
    b = cap._q.get_nowait()
    assert b.start_sample == 300 and b.gap_before == 200


def test_lost_device_ends_blocks_with_a_device_error():
    from tickscope.errors import DeviceError

    cap = Capture(None, 48000, clock=time.monotonic)
    cap._stopped.set()  # the stream's finished callback fired: the device went away
    with pytest.raises(DeviceError, match="stopped delivering audio"):
        next(cap.blocks())


# -- the dashboard ---------------------------------------------------------------------------------
@pytest.mark.parametrize("size", [(80, 24), (160, 50)])
def test_dashboard_renders(size):
    from rich.console import Console

    from conftest import analyze_scenario
    from tickscope.ui.dashboard import LiveStatus, render_live

    s, *_ = analyze_scenario(Scenario(duration_s=40, rate_s_per_day=2.0, missed_steps=(10,), snr_db=25, seed=3))
    buf = io.StringIO()
    con = Console(file=buf, width=size[0], height=size[1], color_system=None)
    con.print(render_live(s, LiveStatus("pulse", 48000, 0, 40.0, -18.0, 1, None), width=size[0]))
    text = buf.getvalue()
    lines = text.splitlines()
    assert len(lines) <= size[1] and all(len(line) <= size[0] for line in lines)
    assert "gains 2.0" in text and "missed 1" in text and "gaps 1" in text and "s/day" in text
    assert "◆" in text  # the estimate on the interval ruler


def test_dashboard_for_beats_that_are_not_steps():
    # the live screen says what the report says: beats of an escapement, no missed steps
    from rich.console import Console

    from conftest import analyze_scenario
    from tickscope.ui.dashboard import LiveStatus, render_live

    s, *_ = analyze_scenario(Scenario(duration_s=30, snr_db=35, seed=1, jitter_us=1000, rattle_impacts=6,
                                      variation_freq_pct=15, variation_db=4))
    assert s.sound == "escapement"
    buf = io.StringIO()
    Console(file=buf, width=80, height=24, color_system=None).print(
        render_live(s, LiveStatus("pulse", 48000, 0, 30.0, -18.0, 0, None), width=80))
    text = buf.getvalue()
    assert "escapement · 3600 beats/h" in text and f"beats {summary_to_dict(s)['beats']['heard']}" in text
    # an escapement's beats, timed as such: a rate with its interval, no missed steps, no quartz
    # motor's ring-down or logic regulation
    assert "missed" not in text and "regulation" not in text and "ring-down" not in text and "± " in text


def test_logging_screen_adds_hourly_rates_and_still_fits(tmp_path):
    from rich.console import Console

    from conftest import analyze_scenario
    from tickscope.logsession import HourRate
    from tickscope.ui.dashboard import LiveStatus, hourly_lines, render_live

    s, *_ = analyze_scenario(Scenario(duration_s=40, rate_s_per_day=2.0, snr_db=25, seed=3))
    hours = [HourRate(h, 2.0 + 0.1 * h, 0.004, 3600, int(h % 3 == 1), True) for h in range(9)]
    hours.append(HourRate(9, 2.95, 0.02, 1200, 0, False))
    for width, height in ((80, 24), (160, 50)):
        extra = hourly_lines(hours, width, max_rows=6 if height < 30 else 12)
        buf = io.StringIO()
        con = Console(file=buf, width=width, height=height, color_system=None)
        con.print(render_live(s, LiveStatus("pulse", 48000, 0, 40.0, -18.0, 0, None), width=width, mode="logging",
                              extra=extra))
        text = buf.getvalue()
        lines = text.splitlines()
        assert all(len(line) <= width for line in lines) and len(lines) <= height + 6
        assert "logging" in text and "rate per hour" in text and "h9" in text and "+2.950" in text
        assert "1 missed" in text
        # the marks climb across the rows: the drift is visible on one shared scale
        cols = [line.index("◆") for line in lines if line.lstrip("│ ").startswith("h") and "◆" in line]
        assert cols == sorted(cols) and cols[-1] > cols[0]


# -- real capture through the loopback --------------------------------------------------------------
def _loopback_unavailable():
    for exe in ("pactl", "paplay"):
        if shutil.which(exe) is None:
            return f"{exe} not found (bash scripts/audio-loopback.sh install)"
    try:
        import sounddevice as sd
    except OSError as e:
        return f"sounddevice unusable: {e}"
    r = subprocess.run(["pactl", "list", "short", "sinks"], capture_output=True, text=True, timeout=10)
    if r.returncode != 0 or SINK not in r.stdout.split():
        return f"no PulseAudio null sink {SINK!r} (bash scripts/audio-loopback.sh start)"
    sd._terminate()
    sd._initialize()  # PortAudio caches the device list at import
    if "pulse" not in [d["name"] for d in sd.query_devices()]:
        return "PortAudio lists no ALSA 'pulse' device (apt-get install libasound2-plugins)"
    return None


@pytest.fixture(scope="module")
def loopback():
    reason = _loopback_unavailable()
    if reason:
        if os.environ.get("AUDIO_LOOPBACK_REQUIRED") == "1":
            pytest.fail(f"audio loopback required but unavailable: {reason}", pytrace=False)
        pytest.skip(f"audio loopback unavailable: {reason}")
    return SINK


def _listen(args, **kw):
    return subprocess.Popen([sys.executable, "-m", "tickscope", "listen", "--device", "pulse", "--rate-hz", "48000",
                             *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, **kw)


def test_listen_through_the_loopback(loopback, tmp_path):
    sc = Scenario(duration_s=16, first_step_s=0.6, rate_s_per_day=-6.5, snr_db=35, missed_steps=(6,),
                  second_impact_ms=45, seed=71)
    wav = str(tmp_path / "play.wav")
    truth = write_simulation(wav, sc)
    save = str(tmp_path / "cap.flac")
    p = _listen(["--duration", "24", "--json", "--save", save])
    # play only once audio is flowing (start-up imports plus up to 2 s for the idle sink's first block)
    t0 = time.monotonic()
    while time.monotonic() - t0 < 20:
        if os.path.exists(save + ".blocks.csv") and sum(1 for _ in open(save + ".blocks.csv")) > 5:
            break
        time.sleep(0.1)
    time.sleep(0.3)
    subprocess.run(["paplay", f"--device={loopback}", wav], check=True, timeout=60)
    out, err = p.communicate(timeout=60)
    assert p.returncode == 0, err
    d = json.loads(out)
    n_true = sum(1 for s in truth["steps"] if s["kind"] == "step")
    assert d["steps_detected"] == n_true
    assert d["missed_steps"] == 1, json.dumps({k: d[k] for k in ("missed_step_times_s", "capture", "warnings", "measured_interval_s")})
    # the loopback is sample-exact, so the rate on the device time base is the true one
    assert abs(d["rate_s_per_day"] - (-6.5)) <= d["rate_ci95_statistical_s_per_day"]
    assert d["capture"]["overflows"] == 0
    info = sf.info(save)
    assert info.samplerate == 48000 and info.frames >= 20 * 48000
    rows = open(save + ".blocks.csv").read().splitlines()
    assert rows[0].startswith("start_sample,frames,host_time_s") and len(rows) > 100
    assert json.load(open(save + ".json"))["steps_detected"] == n_true
    # the saved audio analyzed as a file gives the same steps
    r = subprocess.run([sys.executable, "-m", "tickscope", "analyze", save, "--json"], capture_output=True, text=True)
    assert json.loads(r.stdout)["steps_detected"] == n_true


def test_listen_to_a_lever_watch_gives_its_lift_times_without_being_told(loopback, tmp_path):
    # The lever demo (simulator truth: 28800 beats an hour, amplitude 275 deg at a 52 deg lift angle)
    # played into the virtual microphone, with no --movement: after its first seconds listen hears it
    # again with an escapement's window, as analyze's second pass does, and gives the lift times and
    # the amplitude that before needed --movement escapement.
    src = os.path.join(os.path.dirname(__file__), "..", "recordings", "bench-lever-watch.flac")
    truth = json.load(open(src.replace(".flac", ".truth.json")))["scenario"]
    save = str(tmp_path / "cap.flac")
    p = _listen(["--duration", "36", "--json", "--save", save, "--lift-angle", str(truth["lift_angle_deg"])])
    t0 = time.monotonic()
    while time.monotonic() - t0 < 20:
        if os.path.exists(save + ".blocks.csv") and sum(1 for _ in open(save + ".blocks.csv")) > 5:
            break
        time.sleep(0.1)
    time.sleep(0.3)
    subprocess.run(["paplay", f"--device={loopback}", src], check=True, timeout=60)
    out, err = p.communicate(timeout=90)
    assert p.returncode == 0, err
    d = json.loads(out)
    e = d["escapement"]
    assert d["sound"] == "escapement" and e["beats_per_hour"] == 28800
    assert all(v is not None for v in e["lift_time_ms"]), e
    assert abs(e["amplitude_deg"] - truth["amplitude_deg"]) <= e["amplitude_ci95_deg"]


def test_ctrl_c_keeps_a_valid_file_and_summary(loopback, tmp_path):
    save = str(tmp_path / "stop.flac")
    p = _listen(["--json", "--save", save])
    time.sleep(4.0)
    p.send_signal(signal.SIGINT)
    out, err = p.communicate(timeout=30)
    assert p.returncode == 0, err
    assert "Traceback" not in err
    d = json.loads(out)
    assert d["capture"]["ended"] == "stopped by Ctrl-C"
    info = sf.info(save)  # a complete, readable file
    assert info.frames > 0.2 * 48000
    assert os.path.exists(save + ".json")


def test_missing_portaudio_is_one_clear_line(monkeypatch, capsys):
    import builtins

    from tickscope.cli import main

    real_import = builtins.__import__

    def fake_import(name, *a, **k):
        if name == "sounddevice":
            raise OSError("PortAudio library not found")
        return real_import(name, *a, **k)

    monkeypatch.setattr(builtins, "__import__", fake_import)
    for cmd in (["devices"], ["listen", "--duration", "1"]):
        assert main(cmd) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and "PortAudio" in err and "apt-get install libportaudio2" in err


def test_log_from_the_loopback_then_resume_after_ctrl_c(loopback, tmp_path):
    import sqlite3

    sc = Scenario(duration_s=16, first_step_s=0.6, rate_s_per_day=3.0, snr_db=35, missed_steps=(8,), seed=72)
    wav = str(tmp_path / "play.wav")
    truth = write_simulation(wav, sc)
    n_true = sum(1 for s in truth["steps"] if s["kind"] == "step")
    db = str(tmp_path / "bench.db")
    cmd = [sys.executable, "-m", "tickscope", "log", db, "--device", "pulse", "--rate-hz", "48000", "--json"]
    p = subprocess.Popen([*cmd, "--hours", str(26 / 3600), "--label", "loopback clock"], stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, text=True)
    t0 = time.monotonic()
    while time.monotonic() - t0 < 20:  # the segment row appears just before capture starts
        try:
            with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as con:
                if con.execute("SELECT count(*) FROM segments").fetchone()[0]:
                    break
        except sqlite3.Error:
            pass
        time.sleep(0.1)
    time.sleep(3.0)
    subprocess.run(["paplay", f"--device={loopback}", wav], check=True, timeout=60)
    out, err = p.communicate(timeout=60)
    assert p.returncode == 0, err
    d = json.loads(out)
    assert d["segment"] == 1 and d["ended"] == "hours reached"
    assert d["steps"] == n_true and d["missed"] == 1
    # again on the same database: a new segment, joined by the wall clock; Ctrl-C ends it cleanly
    p = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    time.sleep(4.0)
    p.send_signal(signal.SIGINT)
    out, err = p.communicate(timeout=30)
    assert p.returncode == 130, err  # interrupted (README), after everything was committed and summed up
    assert json.loads(out)["ended"] == "stopped by Ctrl-C" and json.loads(out)["segment"] == 2
    r = subprocess.run([sys.executable, "-m", "tickscope", "report", db, "--json"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    rep = json.loads(r.stdout)
    assert [s["join"] for s in rep["segments"]] == ["first", "wall"]
    assert rep["steps_detected"] == n_true and rep["missed_steps"] == 1
    assert any(g["kind"] == "between segments" for g in rep["gaps"])
    # the loopback is sample-exact: the rate on the device time base is the true one
    assert abs(rep["rate_s_per_day"] - 3.0) <= max(rep["rate_ci95_s_per_day"], 0.05)
