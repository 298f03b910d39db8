"""What the screens say, as a repairer reads them at 80 columns: the live screen while the step
interval is sought, the report of a short log and its figures, the analysis report's layout.

Every screen is rendered to plain text (no colour codes) and read as text; the figures are the
matplotlib objects the PNG files are written from.
"""
import io
import os
import re

import numpy as np
import pytest
from rich.console import Console

from conftest import analyze_scenario
from tickscope.cli import main
from tickscope.core.detect import DetectorConfig
from tickscope.core.simulate import Scenario, render_all
from tickscope.simulation import write_simulation
from tickscope.model import Block
from tickscope.pipeline import Analyzer

WIDTH = 80


def _text(renderable, width: int = WIDTH) -> str:
    buf = io.StringIO()
    Console(file=buf, width=width, color_system=None).print(renderable)
    return buf.getvalue()


def _inner_lines(text: str) -> list[str]:
    """The lines inside a panel's borders, without the borders and the one space of padding."""
    out = []
    for line in text.splitlines():
        if line[:1] in "│┃" and line[-1:] in "│┃":
            out.append(line[2:-2].rstrip())
    return out


def _squash(text: str) -> str:
    """The panel's text as one line of words (borders and line breaks removed)."""
    return " ".join(" ".join(_inner_lines(text)).split())


@pytest.fixture
def saved_figures(monkeypatch):
    """The matplotlib figures the plots would write, by file name (nothing is written)."""
    from matplotlib.figure import Figure

    saved = {}

    def savefig(self, path, *args, **kwargs):
        saved[os.path.basename(str(path))] = self

    monkeypatch.setattr(Figure, "savefig", savefig)
    return saved


def _plotted_x(ax) -> np.ndarray:
    """Every x of the points and lines drawn on an axes (vertical marker lines excluded)."""
    xs = []
    for line in ax.get_lines():
        x = np.asarray(line.get_xdata(), dtype=float)
        if len(x) == 2 and x[0] == x[1] and tuple(line.get_ydata()) == (0, 1):
            continue  # an axvline
        xs.append(x)
    for coll in ax.collections:
        for path in coll.get_paths():
            xs.append(path.vertices[:, 0])
    return np.concatenate(xs) if xs else np.zeros(0)


# -- the live screen while the step interval is sought -------------------------------------------------
def _live_screens(sc: Scenario | None, at_s, *, audio=None):
    """(summary, screen text) at each time, fed as `listen` feeds it (~43 ms blocks, 0.25 s chunks),
    of a simulated movement or of ``audio`` (48 kHz samples)."""
    from tickscope.ui.dashboard import LiveStatus, render_live

    if sc is not None:
        x, _ = render_all(sc)
        x = x[:, sc.step_channel].astype(np.float32)
        fs = sc.samplerate_hz
    else:
        x, fs = audio, 48000
    an = Analyzer(fs, detector=DetectorConfig(chunk_s=0.25))
    out, todo, block = [], list(at_s), 2048
    for i in range(0, len(x), block):
        an.feed(Block(x[i:i + block], i))
        now = (i + block) / fs
        if todo and now >= todo[0]:
            level = 20 * np.log10(max(float(np.abs(x[max(0, i + block - fs // 2):i + block]).max()), 1e-6))
            s = an.summary()
            out.append((s, _text(render_live(s, LiveStatus("pulse", fs, 0, now, level), width=WIDTH))))
            todo.pop(0)
    return out


def test_listen_says_what_it_waits_for_and_advises_placement_only_on_a_measured_low_level():
    # Clear steps (+36 dB): for the first 12-15 s, while the step interval is sought, the screen
    # said only "listening for steps…", and from 8 s advised moving the microphone (the final
    # report's reason for "no pattern", shown on a level nobody had measured).
    screens = _live_screens(Scenario(duration_s=16, rate_s_per_day=-5.0, snr_db=31, seed=3), [1, 3, 6, 9, 12, 16])
    for s, text in screens:
        words = _squash(text)
        assert "microphone" not in words, words
        if s.rate is None:
            n = s.sounds_heard
            if n == 0:
                assert "heard no sound yet" in words, words
            else:
                assert f"heard {n} sound{'s' if n != 1 else ''}, finding the step interval" in words, words
    assert screens[-1][0].rate is not None and screens[-1][0].step_snr_db > 30  # the grid was found
    assert any(s.sounds_heard >= 6 and s.rate is None for s, _ in screens)
    # weak steps, measured: the hint is given (the steps' median is 12.5 dB over the noise here)
    s, text = _live_screens(Scenario(duration_s=20, snr_db=6, seed=3), [20])[0]
    assert s.steps_detected >= 3 and s.step_snr_db < 15
    assert "put the microphone on the case" in _squash(text)
    # nothing heard at all for 12 s: that too is a measured level, and the hint says so
    hiss = np.random.default_rng(5).normal(0.0, 0.003, 12 * 48000).astype(np.float32)
    s, text = _live_screens(None, [12], audio=hiss)[0]
    assert s.sounds_heard == 0
    words = _squash(text)
    assert "heard no sound yet" in words and "microphone" in words


# -- the report of a short log -------------------------------------------------------------------------
@pytest.fixture(scope="module")
def minute_log(tmp_path_factory):
    """A one-minute log of a movement with two missed steps (58 steps)."""
    d = tmp_path_factory.mktemp("minute")
    wav = str(d / "bench-3-carriage-clock.wav")
    write_simulation(wav, Scenario(samplerate_hz=16000, duration_s=60, missed_steps=(20, 40), snr_db=30, seed=2))
    db = str(d / "minute.db")
    assert main(["log", db, "--source", wav, "--quiet"]) == 0
    return db


def _report(db: str, monkeypatch, *args) -> str:
    from tickscope.commands import report as report_cmd

    buf = io.StringIO()
    monkeypatch.setattr(report_cmd, "console", lambda stderr=False: Console(file=buf, width=WIDTH, color_system=None))
    assert main(["report", db, *args]) == 0
    return buf.getvalue()


def test_report_of_a_one_minute_log_reads_its_times_in_seconds(minute_log, monkeypatch):
    # the header said "0 h 01 min", the timeline ran "0 h … 0.0 h", the time error "0 h … 0 h", the
    # best stretch "0 h 00 min … from 0.00 h"
    text = _report(minute_log, monkeypatch)
    assert not re.search(r"\b0(\.0+)? h\b", text), text
    lines = _inner_lines(text)
    strip = next(i for i, ln in enumerate(lines) if ln.startswith("▕"))
    assert re.fullmatch(r"0 s +(59|60) s", lines[strip + 1].strip()), lines[strip + 1]
    err_axis = [ln for ln in lines if re.fullmatch(r"[\d.]+ s +[\d.]+ s", ln.strip())]
    assert len(err_axis) == 2, lines  # the timeline's and the time error's
    assert re.search(r"best stretch: \d+ s without", _squash(text))


def test_report_plots_of_a_one_minute_log_read_in_seconds_and_stay_inside_the_log(minute_log, monkeypatch,
                                                                                   saved_figures, tmp_path):
    # the axes ran 0.000-0.016 h and the ring-down's one point sat at 0.5 h, 29 minutes past the end
    _report(minute_log, monkeypatch, "--out", str(tmp_path / "plots"))
    assert {"rate.png", "tie.png", "adev.png", "ringdown.png"} <= set(saved_figures)
    for name in ("rate.png", "tie.png", "ringdown.png"):
        ax = saved_figures[name].axes[-1] if name == "tie.png" else saved_figures[name].axes[0]
        assert "(s)" in ax.get_xlabel() and "(h)" not in ax.get_xlabel(), (name, ax.get_xlabel())
        lo, hi = ax.get_xlim()
        assert -1 <= lo and hi <= 61, (name, lo, hi)
    for name in ("rate.png", "ringdown.png"):
        x = _plotted_x(saved_figures[name].axes[0])
        assert len(x) and x.min() >= 0 and x.max() <= 60, (name, x)


def test_report_of_a_log_without_steps_draws_none_and_does_not_wait_for_the_hour(tmp_path, monkeypatch):
    # a log with no steps (once: an escapement logged before escapements were timed; now: a room's
    # noise): its report drew the whole timeline with the step glyph and said "the first hour is
    # still filling" of a log that had ended
    import numpy as np
    import soundfile as sf

    wav = str(tmp_path / "room.wav")
    sf.write(wav, np.random.default_rng(2).normal(0, 0.01, 8000 * 40).astype(np.float32), 8000)
    db = str(tmp_path / "esc.db")
    main(["log", db, "--source", wav, "--quiet"])
    text = _report(db, monkeypatch)
    strip = next(ln for ln in _inner_lines(text) if ln.startswith("▕"))
    assert "━" not in strip, strip
    assert "still filling" not in text and "rate per hour: none" in _squash(text)


def test_report_of_a_finished_short_log_does_not_wait_for_the_hour(tmp_path, monkeypatch):
    wav = str(tmp_path / "five.wav")
    write_simulation(wav, Scenario(samplerate_hz=16000, duration_s=5, snr_db=30, seed=1))
    db = str(tmp_path / "five.db")
    assert main(["log", db, "--source", wav, "--quiet"]) == 0
    words = _squash(_report(db, monkeypatch))
    assert "still filling" not in words and "rate per hour: none" in words, words


def test_report_names_the_jitter_of_each_figure(minute_log, monkeypatch):
    # the header said "jitter 0.0 µs" and the time-error section "rms 0.05 µs": two figures of one
    # log, unnamed, that read as a contradiction
    words = _squash(_report(minute_log, monkeypatch))
    assert "jitter" not in words
    fit = re.search(r"rate fit residual ([\d.]+) µs rms", words)
    tie = re.search(r"time error after the rate line: rms ([\d.]+) µs", words)
    assert fit and tie, words
    assert float(fit.group(1)) > 0 and float(tie.group(1)) > 0  # both shown with enough digits to read


# -- the analysis report at 80 columns ------------------------------------------------------------------
@pytest.fixture(scope="module")
def missed_analysis():
    s, an, *_ = analyze_scenario(Scenario(duration_s=120, missed_steps=(10, 11, 60), gate_dbfs=-60, snr_db=25,
                                          seed=10))
    assert s.missed_steps == 3
    return s, an


def test_headline_breaks_between_phrases(missed_analysis):
    # "… (95 %)  over 117 steps in 119" / "s": the headline wrapped inside its last phrase
    from tickscope.ui.textreport import render_summary

    s, _ = missed_analysis
    lines = _inner_lines(_text(render_summary(s, source="gated.flac", width=WIDTH)))
    r = s.rate
    phrases = [f"± {r.ci95_s_per_day:.3f} s/day (95 %)", f"over {r.n_steps} steps in {r.span_s:.0f} s"]
    for p in phrases:
        assert any(p in ln for ln in lines[:3]), (p, lines[:3])


def test_notes_and_reading_wrap_with_a_hanging_indent(missed_analysis):
    from tickscope.ui.textreport import render_summary

    s, _ = missed_analysis
    lines = _inner_lines(_text(render_summary(s, source="gated.flac", width=WIDTH)))
    i = lines.index("notes")
    body = lines[i + 1:]
    assert body and body[0].startswith("  ! ")
    assert len(body) > len(s.warnings)  # some notes take more than one line at 80 columns
    for ln in body:
        assert ln.startswith("  ! ") or ln.startswith("    "), body
    j = lines.index("the repairer's reading")
    for ln in lines[j + 1:i]:
        assert ln.startswith("  • ") or ln.startswith("    ") or not ln.strip(), lines[j + 1:i]


def test_notes_write_plus_minus_as_the_tables_do(missed_analysis):
    # the notes wrote "+-50 ppm = +-4.3 s/day" where every table writes "±"
    s, _ = missed_analysis
    assert any("uncalibrated time base" in w for w in s.warnings)
    assert not any("+-" in w for w in s.warnings) and any("±" in w for w in s.warnings)


def test_steps_out_of_digital_silence_say_so_not_a_number():
    # a file with exact zeros between its ticks read "step level 285.4 dB above the noise floor"
    import numpy as np

    from tickscope.pipeline import analyze_samples
    from tickscope.ui.textreport import render_summary

    fs = 48000
    x = np.zeros(fs * 12, np.float32)
    n = np.arange(int(0.02 * fs))
    for k in range(11):
        i = int((0.5 + k) * fs)
        x[i:i + len(n)] += (0.5 * np.exp(-n / fs / 0.004) * np.sin(2 * np.pi * 2500 * n / fs) * (-1) ** k)
    s = analyze_samples(x, fs)
    assert s.sound == "stepping" and s.steps_detected == 11
    words = _squash(_text(render_summary(s, source="zeros.wav", width=WIDTH)))
    assert "above digital silence" in words and "dB above the noise floor" not in words


def test_reading_says_what_the_missed_steps_mean(missed_analysis):
    # three missed steps, nothing else to diagnose: the repairer's reading was left out
    from tickscope.ui.textreport import render_summary

    s, _ = missed_analysis
    words = _squash(_text(render_summary(s, source="gated.flac", width=WIDTH)))
    assert "the repairer's reading" in words
    reading = words.split("the repairer's reading", 1)[1].split(" notes ", 1)[0]
    assert "3 missed steps" in reading and "10.5" in reading and "60.5" in reading, reading
    assert "rate" in reading  # what they do (not) to the rate


def test_analysis_plot_names_its_missed_step_lines(missed_analysis, saved_figures, tmp_path):
    from tickscope.ui.plots import plot_analysis

    s, an = missed_analysis
    plot_analysis(s, an, str(tmp_path / "gated.png"), title="gated")
    ax = saved_figures["gated.png"].axes[0]
    legend = ax.get_legend()
    assert legend is not None and any("missed step" in t.get_text() for t in legend.get_texts())
    marked = [ln for ln in ax.get_lines() if ln.get_label().startswith("missed step")]
    assert len(marked) == 1  # one legend entry for the three lines


def test_reading_with_missed_steps_keeps_every_other_statement():
    # adding the missed steps to the reading once dropped the drive-level and position statements
    from tickscope.ui.textreport import render_summary

    s, *_ = analyze_scenario(Scenario(duration_s=150, drive_levels_db=(0, -4, -8), drive_level_period_s=40,
                                      missed_steps=(30, 90), snr_db=30, seed=8))
    assert s.missed_steps == 2 and any("drive levels" in line for line in s.reading)
    words = _squash(_text(render_summary(s, source="drive.flac", width=WIDTH)))
    reading = words.split("the repairer's reading", 1)[1].split(" notes ", 1)[0]
    for line in s.reading:
        assert " ".join(line.split()) in reading, (line, reading)
    assert "2 missed steps" in reading and "between steps heard (30.5, 90.5 s)" in reading, reading
