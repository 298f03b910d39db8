"""What the screens say, as a repairer reads them at 80 columns: the live screen while the step
interval is sought, the report of a short log and its figures, the analysis report's layout.

Every screen is rendered to plain text (no colour codes) and read as text; the figures are the
matplotlib objects the PNG files are written from.
"""
import io
import os

import numpy as np
import pytest
from rich.console import Console

from conftest import analyze_scenario
from tickscope.cli import main
from tickscope.core.detect import DetectorConfig
from tickscope.core.simulate import Scenario, render_all
from tickscope.io.simfile import write_simulation
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
