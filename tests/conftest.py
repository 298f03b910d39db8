"""Shared fixtures: seeded generators and a helper that runs the whole pipeline on a scenario."""
import numpy as np
import pytest

from tickscope.core.simulate import Scenario, render_all
from tickscope.model import Block
from tickscope.pipeline import Analyzer


@pytest.fixture
def rng():
    return np.random.default_rng(12345)


def analyze_scenario(sc: Scenario, *, block: int = 8192, clock_ppm=None):
    """Render a scenario, run it through the pipeline; returns (summary, analyzer, truth, events)."""
    x, truth = render_all(sc)
    x = x[:, sc.step_channel].astype(np.float32)
    an = Analyzer(sc.samplerate_hz, clock_ppm=clock_ppm)
    events = []
    for i in range(0, len(x), block):
        events += an.feed(Block(x[i:i + block], i))
    s = an.finish()
    events += an.drain_final_events()
    return s, an, truth, events


def true_step_times(truth, kind="step"):
    return np.array([s["time_s"] for s in truth["steps"] if s["kind"] == kind])


def match_times(detected, truth_times, tol_s=0.002):
    """For each true time the nearest detected time within tol (nan where none)."""
    detected = np.sort(np.asarray(detected))
    out = np.full(len(truth_times), np.nan)
    if not len(detected):
        return out
    idx = np.clip(np.searchsorted(detected, truth_times), 1, len(detected) - 1) if len(detected) > 1 else np.zeros(len(truth_times), int)
    for i, t in enumerate(truth_times):
        cands = [detected[j] for j in {idx[i] - 1, idx[i]} if 0 <= j < len(detected)]
        best = min(cands, key=lambda v: abs(v - t))
        if abs(best - t) <= tol_s:
            out[i] = best
    return out
