"""The command line end to end: outputs, exit codes and bad input (never a traceback)."""
import csv
import json
import os
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf

from tickscope.cli import build_parser, main
from tickscope.core.simulate import Scenario, render_all
from tickscope.simulation import write_simulation

JSON_KEYS = {"duration_s", "sample_rate_hz", "channel", "step_interval_s", "steps_detected", "missed_steps",
             "missed_step_times_s", "rejected_events", "rate_s_per_day", "rate_ci95_s_per_day",
             "clock_correction_ppm", "timing_jitter_us", "ringdown", "warnings"}


@pytest.fixture(scope="module")
def rec(tmp_path_factory):
    p = str(tmp_path_factory.mktemp("rec") / "clock.wav")
    write_simulation(p, Scenario(duration_s=40, rate_s_per_day=4.0, snr_db=30, missed_steps=(20,), seed=3))
    return p


def run(args, capsys):
    code = main(args)
    out = capsys.readouterr()
    return code, out.out, out.err


def test_json_schema_and_values(rec, capsys):
    code, out, err = run(["analyze", rec, "--json"], capsys)
    assert code == 0
    d = json.loads(out)
    assert JSON_KEYS <= set(d)
    assert d["steps_detected"] == 39 and d["missed_steps"] == 1
    assert abs(d["missed_step_times_s"][0] - 20.5) < 0.01
    assert abs(d["rate_s_per_day"] - 4.0) <= d["rate_ci95_s_per_day"]
    assert set(d["ringdown"]) == {"A", "B"} and d["ringdown"]["A"]["decay_ms_median"] > 0
    assert any("uncalibrated" in w for w in d["warnings"])


def test_clock_ppm_option(rec, capsys):
    code, out, _ = run(["analyze", rec, "--json", "--clock-ppm", "10+-0.5"], capsys)
    d = json.loads(out)
    assert d["clock_correction_ppm"] == 10.0
    assert not any("uncalibrated" in w for w in d["warnings"])
    # +10 ppm device clock correction adds 0.864 s/day
    assert d["rate_s_per_day"] == pytest.approx(4.864, abs=0.01)
    assert d["rate_ci95_s_per_day"] >= 0.5 * 0.0864


def test_steps_csv(rec, tmp_path, capsys):
    p = tmp_path / "steps.csv"
    code, _, _ = run(["analyze", rec, "--json", "--steps-csv", str(p)], capsys)
    rows = list(csv.DictReader(open(p)))
    assert list(rows[0].keys()) == ["index", "step", "time_s", "polarity", "interval_s", "peak_dbfs", "decay_ms", "flags", "lift_ms"]
    steps = [r for r in rows if r["polarity"]]
    assert len(steps) == 39
    assert all(len(r["time_s"].split(".")[1]) >= 9 for r in steps)
    assert {r["polarity"] for r in steps} == {"A", "B"}


def test_human_report_and_plot(rec, tmp_path, capsys):
    png = tmp_path / "a.png"
    code, out, _ = run(["analyze", rec, "--plot", str(png)], capsys)
    assert code == 0
    assert "gains 4.0" in out and "missed steps" in out
    assert png.stat().st_size > 10000


def test_default_demo_recording(capsys):
    code, out, err = run(["analyze", "--json"], capsys)
    assert code == 0
    d = json.loads(out)
    assert d["source"].endswith("kitchen-wall-clock.flac")
    assert abs(d["rate_s_per_day"] - 2.7) <= d["rate_ci95_s_per_day"]


def _bad(tmp_path, kind):
    p = tmp_path / f"{kind}.wav"
    fs = 48000
    rng = np.random.default_rng(1)
    if kind == "missing":
        return str(tmp_path / "nope.wav")
    if kind == "directory":
        return str(tmp_path)
    if kind == "not-audio":
        p.write_text("this is a shopping list, not audio\n" * 20)
    elif kind == "empty":
        p.write_bytes(b"")
    elif kind == "short":
        sf.write(p, rng.normal(0, 0.01, int(0.3 * fs)), fs)
    elif kind == "two-steps":  # real steps, too few for a pattern
        x, _ = render_all(Scenario(duration_s=2))
        sf.write(p, x, fs)
    elif kind == "silence":
        sf.write(p, np.zeros(fs * 10), fs)
    elif kind == "noise":
        sf.write(p, rng.normal(0, 0.1, fs * 10), fs)
    elif kind == "corrupt-header":
        x, _ = render_all(Scenario(duration_s=5))
        sf.write(p, x, fs)
        b = bytearray(p.read_bytes())
        b[8:12] = b"JUNK"
        p.write_bytes(bytes(b))
    elif kind == "truncated":
        sf.write(p, rng.normal(0, 0.01, fs * 5), fs, subtype="PCM_16")
        p.write_bytes(p.read_bytes()[:30])
    return str(p)


@pytest.mark.parametrize("kind,code,words", [
    ("missing", 2, "no such file"),
    ("directory", 2, "directory"),
    ("not-audio", 2, "not a readable audio file"),
    ("empty", 2, "empty"),
    ("short", 2, "0.30 s long"),
    ("two-steps", 3, "only 2.0 s long, too short to find a stepping pattern"),
    ("corrupt-header", 2, "not a readable audio file"),
    ("truncated", 2, ""),
    ("silence", 3, "no steps"),
    ("noise", 3, "no stepping-motor pattern was heard"),
])
def test_bad_input(tmp_path, capsys, kind, code, words):
    c, out, err = run(["analyze", _bad(tmp_path, kind), "--json"], capsys)
    assert c == code
    assert "Traceback" not in err
    assert err.startswith("tickscope: ") and err.count("\n") == 1
    assert words in err


def test_header_claims_more_data_than_it_holds(tmp_path, capsys):
    # a WAV cut short: the header says 60 s, the file holds 30 s; analyze what is there
    p = tmp_path / "cut.wav"
    x, _ = render_all(Scenario(duration_s=60, snr_db=30, seed=4))
    sf.write(p, x, 48000, subtype="PCM_16")
    b = p.read_bytes()
    p.write_bytes(b[: 44 + 2 * 48000 * 30])
    c, out, err = run(["analyze", str(p), "--json"], capsys)
    assert c == 0 and "Traceback" not in err
    d = json.loads(out)
    assert 28 <= d["steps_detected"] <= 30 and d["missed_steps"] == 0
    # the README promises a note (it was missing: libsndfile reports the frames the file holds)
    assert any("cut short" in w and "60.0 s" in w for w in d["warnings"])


def test_clipped_dc_and_two_channels(tmp_path, capsys):
    sc = Scenario(duration_s=30, channels=2, step_channel=1, snr_db=30, clip_dbfs=-16, seed=8)
    p = str(tmp_path / "st.wav")
    write_simulation(p, sc)
    c, out, err = run(["analyze", p, "--json"], capsys)
    d = json.loads(out)
    assert c == 0 and d["channel"] == 1
    assert d["steps_detected"] == 30
    assert d["signal"]["clipped_steps"] > 20
    assert any("clip" in w for w in d["warnings"])
    c, out, err = run(["analyze", p, "--json", "--channel", "0"], capsys)
    assert c == 3
    c, out, err = run(["analyze", p, "--json", "--channel", "5"], capsys)
    assert c == 2 and "channels 0..1" in err


def test_float_file_with_samples_that_are_not_numbers(tmp_path, capsys):
    # a damaged float WAV: NaN and inf samples used to poison the detector's statistics (no steps found)
    sc = Scenario(duration_s=30, snr_db=30, seed=12)
    p = str(tmp_path / "f.wav")
    write_simulation(p, sc, subtype="FLOAT")
    x, fs = sf.read(p, dtype="float32")
    x[5000:9000] = np.nan
    x[200000] = np.inf
    x[300000] = -np.inf
    sf.write(p, x, fs, subtype="FLOAT")
    c, out, err = run(["analyze", p, "--json"], capsys)
    d = json.loads(out)
    assert c == 0 and d["steps_detected"] == 30 and d["missed_steps"] == 0
    assert any("4002 samples of the file are not numbers" in w for w in d["warnings"])
    assert "Traceback" not in err


def test_unusable_samples_are_a_gap_not_missed_steps(tmp_path, capsys):
    # two seconds of NaN over two steps of a float file: lost audio, not a movement fault (they
    # were once two missed steps)
    sc = Scenario(duration_s=30, snr_db=30, seed=13)
    p = str(tmp_path / "nan.wav")
    write_simulation(p, sc, subtype="FLOAT")
    x, fs = sf.read(p, dtype="float32")
    x[int(10.2 * fs): int(12.2 * fs)] = np.nan  # the steps at 10.5 and 11.5 s
    sf.write(p, x, fs, subtype="FLOAT")
    c, out, err = run(["analyze", p, "--json"], capsys)
    d = json.loads(out)
    assert c == 0 and d["steps_detected"] == 28 and d["missed_steps"] == 0
    assert any("1 gap in the audio (2.00 s lost)" in w for w in d["warnings"])


def test_a_file_of_nothing_but_unusable_samples_says_so_first(tmp_path, capsys):
    p = str(tmp_path / "allnan.wav")
    sf.write(p, np.full(48000 * 20, np.nan, dtype=np.float32), 48000, subtype="FLOAT")
    c, out, err = run(["analyze", p], capsys)
    assert c == 3 and "Traceback" not in err
    line = err.strip().splitlines()[-1]
    assert line.startswith("tickscope: no steps could be found: none of the samples") and "microphone" not in line


def test_every_subcommand_has_help():
    p = build_parser()
    sub = [a for a in p._actions if a.__class__.__name__ == "_SubParsersAction"][0]
    for name, sp in sub.choices.items():
        assert sp.description, name
        for a in sp._actions:
            assert a.help, (name, a.dest)


def test_simulate_writes_truth(tmp_path, capsys):
    p = tmp_path / "s.flac"
    code, _, err = run(["simulate", str(p), "--duration-s", "5", "--missed-steps", "2,3", "--agc"], capsys)
    assert code == 0
    t = json.load(open(tmp_path / "s.truth.json"))
    assert t["scenario"]["missed_steps"] == [2, 3] and t["scenario"]["agc"] is True
    assert sf.info(str(p)).frames == 5 * 48000


def test_module_entry_point_and_no_traceback():
    r = subprocess.run([sys.executable, "-m", "tickscope", "analyze", "/nonexistent.wav"], capture_output=True, text=True)
    assert r.returncode == 2 and "Traceback" not in r.stderr


def test_full_disk_is_one_line(tmp_path, capsys):
    # /dev/full fails every write with ENOSPC, like a full disk
    if not os.path.exists("/dev/full"):
        pytest.skip("no /dev/full on this system")
    rec = str(tmp_path / "w.wav")
    write_simulation(rec, Scenario(duration_s=10, snr_db=30, seed=5))
    code = main(["analyze", rec, "--json", "--steps-csv", "/dev/full"])
    err = capsys.readouterr().err
    assert code == 2 and err.startswith("tickscope: ") and err.count("\n") == 1 and "No space left" in err


def test_a_reader_that_leaves_the_pipe_ends_it_quietly(tmp_path):
    # `tickscope analyze --json | head -c 10`: the reader closes the pipe early; tickscope must end
    # with status 0 and say nothing (it once reported "Broken pipe" and exited 2).  The reader here
    # leaves at once (`true`), so the pipe is surely closed when the JSON is written.
    import shlex

    err = tmp_path / "err.txt"
    cmd = (f"{shlex.quote(sys.executable)} -m tickscope analyze --json --quiet 2>{shlex.quote(str(err))} "
           "| true; echo ${PIPESTATUS[0]}")
    r = subprocess.run(["bash", "-c", cmd], capture_output=True, text=True, timeout=120)
    assert r.stdout.strip() == "0" and err.read_text() == ""
