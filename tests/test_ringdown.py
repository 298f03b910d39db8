"""Ring-down decay time, against closed forms and an independent implementation."""
import numpy as np
import pytest

from tickscope.core.ringdown import measure_ringdown


def _decay(tau_s=0.003, f0=2000.0, fs=48000, dur=0.2, noise_db=None, rng=None):
    t = np.arange(int(dur * fs)) / fs
    x = np.exp(-t / tau_s) * np.sin(2 * np.pi * f0 * t)
    if noise_db is not None:
        x = x + rng.normal(0, 10 ** (noise_db / 20), len(x))
    return x


def test_exponential_decay_tau():
    # f0 = 2 kHz, tau = 3 ms -> T60 = 20.72 ms (shared/domain.md table row 16, computed)
    rd = measure_ringdown(_decay(), 48000)
    assert rd.decay_ms == pytest.approx(3.0, rel=0.01)
    assert 6.908 * rd.decay_ms == pytest.approx(20.72, rel=0.01)


def test_noise_floor_is_compensated(rng):
    noise_db = -50
    x = _decay(noise_db=noise_db, rng=rng)
    rd = measure_ringdown(x, 48000, noise_power=10 ** (noise_db / 10))
    assert rd.decay_ms == pytest.approx(3.0, rel=0.05)


def test_against_pyroomacoustics():
    # Independent reference: pyroomacoustics.experimental.rt60.measure_rt60 (LCAV/pyroomacoustics,
    # Schroeder integration with threshold crossings). Our tau times 6.908 must agree with its RT60
    # estimate from the -5..-25 dB span (decay_db=20).
    pra_rt60 = pytest.importorskip("pyroomacoustics.experimental.rt60")
    for tau in (0.002, 0.005, 0.012):
        x = _decay(tau_s=tau, f0=1500.0, dur=0.4)
        ref = pra_rt60.measure_rt60(x, fs=48000, decay_db=20)
        ours = measure_ringdown(x, 48000).decay_ms * 1e-3 * 6.908
        assert ours == pytest.approx(ref, rel=0.03)


def test_unmeasurable_returns_nan():
    assert np.isnan(measure_ringdown(np.zeros(100), 48000).decay_ms)
    assert np.isnan(measure_ringdown(np.ones(5), 48000).decay_ms)


def _ringing_steps(taus_ms: dict, fs=48000, n=60, noise_db=-60.0, seed=2):
    """Steps once a second, each a 1.2 kHz ring with amplitude decay 9 ms (or taus_ms[k]), and their
    onsets' truth; white noise noise_db under the peak."""
    rng = np.random.default_rng(seed)
    x = rng.normal(0, 10 ** (noise_db / 20), int((n + 1) * fs))
    t = np.arange(int(0.2 * fs)) / fs
    for k in range(n):
        tau = taus_ms.get(k, 9.0) / 1000
        ring = np.exp(-t / tau) * np.sin(2 * np.pi * (1200 if k % 2 else 1235) * t)
        i = int((0.5 + k) * fs)
        x[i: i + len(ring)] += 0.5 * ring
    return x.astype(np.float32), fs


def test_abnormal_ring_downs_are_flagged_and_straight_ones_are_not_bent():
    # three steps ring 2.4x as long (a dragging rotor, say): flagged "ringdown", the rest not; all
    # decays are clean exponentials, so none is "bent"
    from tickscope.model import Block
    from tickscope.pipeline import Analyzer

    x, fs = _ringing_steps({44: 22.0, 45: 22.0, 50: 22.0})  # judged once 20 steps of its polarity are in
    an = Analyzer(fs)
    events = an.feed(Block(x, 0))
    s = an.finish()
    events += an.drain_final_events()
    flagged = sorted(e.step for e in events if e.kind == "step" and "ringdown" in e.flags)
    assert flagged == [44, 45, 50]
    assert not any("bent-decay" in e.flags for e in events)
    assert s.ringdown["A"].decay_ms_median == pytest.approx(9.0, rel=0.05)
    assert s.ringdown["A"].n_abnormal + s.ringdown["B"].n_abnormal == 3
    assert not any("bends away" in w for w in s.warnings)


def test_the_kitchen_demo_says_its_ring_down_is_the_rooms():
    # the bundled demo: a phone's gain control, a 250 ms room and a bounce; one polarity's decay
    # curve bends into the room's tail 10-15 dB down and reads 5 or 23 ms from step to step (the
    # resonance rings 9 ms): no step may be called abnormal for it, and the report says why
    import os

    from tickscope.io.audiofile import blocks, probe
    from tickscope.pipeline import Analyzer

    p = os.path.join(os.path.dirname(__file__), "..", "recordings", "kitchen-wall-clock.flac")
    info = probe(p)
    an = Analyzer(info.samplerate)
    for b in blocks(p, info, 0):
        an.feed(b)
    s = an.finish()
    a = s.ringdown["A"]
    assert a.n_bent > a.n / 2 and a.n_abnormal == 0
    assert any(w.startswith("the ring-down of polarity A bends away from one exponential") for w in s.warnings)
