"""A recording fed in blocks of any size gives the same steps as the whole file at once."""
import numpy as np
from hypothesis import given, settings, strategies as st

from tickscope.core.simulate import Scenario, render_all
from tickscope.export import summary_to_dict
from tickscope.model import Block
from tickscope.pipeline import Analyzer

SC = Scenario(duration_s=14, snr_db=25, second_impact_ms=40, transients_per_min=12, rate_s_per_day=3.0, seed=41)
X = render_all(SC)[0][:, 0].astype(np.float32)


def _run(sizes):
    an = Analyzer(SC.samplerate_hz)
    events = []
    i = 0
    j = 0
    while i < len(X):
        n = sizes[j % len(sizes)]
        events += an.feed(Block(X[i:i + n], i))
        i += n
        j += 1
    an.finish()
    events += an.drain_final_events()
    return [(e.kind, e.step, round(e.time_s, 12)) for e in events]


REF = _run([len(X)])

# the same audio as 16-bit integers, and their float32 values (what a 16-bit file reads as)
X16 = np.round(np.clip(X, -1, 32767 / 32768) * 32768).astype(np.int16)
X16F = np.multiply(X16, np.float32(2.0**-15), dtype=np.float32)


def _run_x(x, sizes, scale=None):
    an = Analyzer(SC.samplerate_hz)
    events = []
    i = j = 0
    while i < len(x):
        n = sizes[j % len(sizes)]
        events += an.feed(Block(x[i:i + n], i, scale=scale))
        i += n
        j += 1
    summary = an.finish()
    events += an.drain_final_events()
    return [(e.kind, e.step, e.time_s, e.decay_ms, e.peak_dbfs) for e in events], summary


def test_integer_samples_give_the_results_of_their_float_values():
    # a 16-bit file goes to the analyzer as read (int16 with a scale): every event and the summary
    # must be exactly those of the float32 samples, whatever the block sizes
    ref_events, ref_sum = _run_x(X16F, [len(X16F)])
    assert sum(1 for e in ref_events if e[0] == "step") == 14
    for sizes in ([len(X16)], [4099], [48000, 7, 100003]):
        ev, summ = _run_x(X16, sizes, scale=2.0**-15)
        assert ev == ref_events
        assert summary_to_dict(summ, source="x") == summary_to_dict(ref_sum, source="x")


def test_a_stream_keeps_its_kind_of_samples():
    import pytest

    from tickscope.errors import ParameterError

    an = Analyzer(SC.samplerate_hz)
    an.feed(Block(X16[:48000], 0, scale=2.0**-15))
    with pytest.raises(ParameterError):
        an.feed(Block(X16F[48000:96000], 48000))


def test_reference_has_steps():
    assert sum(1 for e in REF if e[0] == "step") == 14


def test_block_size_one_and_a_prime():
    assert _run([1]) == REF
    assert _run([4099]) == REF


@settings(max_examples=15, deadline=None)
@given(st.lists(st.integers(min_value=1, max_value=60000), min_size=1, max_size=12))
def test_random_block_sizes(sizes):
    assert _run(sizes) == REF


def test_gap_is_not_a_missed_step():
    # drop 1.5 s of audio (an input overflow): those slots must not count as missed
    an = Analyzer(SC.samplerate_hz)
    cut0, cut1 = int(3.2 * SC.samplerate_hz), int(4.7 * SC.samplerate_hz)
    an.feed(Block(X[:cut0], 0))
    an.feed(Block(X[cut1:], cut1, gap_before=cut1 - cut0))
    s = an.finish()
    assert s.missed_steps == 0
    assert s.steps_detected == 14 - 2
    assert len(an.gaps) == 1


def test_block_thresholds_in_runs_equal_one_block_at_a_time():
    # the detector's per-0.25 s thresholds: the vectorised run (used once the running windows are
    # full) must give the very numbers of the block-by-block reference, and leave the same windows
    from tickscope.core.detect import ImpactDetector

    rng = np.random.default_rng(11)
    a, b = ImpactDetector(48000)._floor, ImpactDetector(48000)._floor  # their FloorTrackers
    W = a._floors.maxlen
    for n in (W + 3, 1, 2, 64, 5, 200):
        qf = rng.lognormal(-20, 1, n)
        q50 = rng.lognormal(-19, 1, n)
        q20 = q50 * rng.uniform(0.1, 1, n)
        q20[rng.random(n) < 0.1] = 0.0  # digital silence in part of a block
        q90 = q50 * rng.uniform(1, 50, n)
        full = len(a._floors) == W
        ref = b._block_thresholds_one_by_one(qf, q20, q50, q90, 2.5, 1e-12)
        got = (a._block_thresholds if full else a._block_thresholds_one_by_one)(qf, q20, q50, q90, 2.5, 1e-12)
        assert got == ref
        assert list(a._floors) == list(b._floors) and list(a._spreads) == list(b._spreads)


# -- an escapement's window on a stream (listen, log): windowprobe.WindowProbe --------------------------
def _probe_run(x, fs, n=2048, **options):
    from tickscope.windowprobe import WindowProbe

    w = WindowProbe(fs, **options)
    events = []
    for i in range(0, len(x), n):
        events += w.feed(Block(x[i:i + n], i))
    s = w.finish()
    events += w.drain_final_events()
    return w, s, events


def test_a_quartz_stream_probed_for_an_escapement_keeps_every_event_as_it_was():
    # a stepping motor is heard with a quartz step's window, as without the probe: the same events, in
    # the same order (held back while probing, then handed on all at once)
    w, s, events = _probe_run(X, SC.samplerate_hz)
    assert s.sound == "stepping" and "quartz" in w.window_note
    assert [(e.kind, e.step, round(e.time_s, 12)) for e in events] == REF


def test_a_lever_stream_is_heard_again_with_an_escapement_window():
    # a lever watch (own simulator: 21600 beats an hour, 240 deg at a 50 deg lift angle) streamed with
    # the movement unknown gives its lift times, as analyze's second pass does -- whether the stream
    # outlasts the probe (20 s) or ends within it (8 s: decided at the end); no beat is handed on twice
    from tickscope.core.escapesim import EscapementScenario, render_all as render_escapement
    from tickscope.pipeline import analyze_samples

    sc = EscapementScenario(movement="lever", duration_s=20.0, beats_per_hour=21600, amplitude_deg=240,
                            lift_angle_deg=50, snr_db=30, seed=5)
    x = render_escapement(sc)[0][:, 0].astype(np.float32)
    for dur_s in (20.0, 8.0):
        xx = x[:int(dur_s * sc.samplerate_hz)]
        w, s, events = _probe_run(xx, sc.samplerate_hz, lift_angle_deg=50)
        ref = analyze_samples(xx, sc.samplerate_hz, lift_angle_deg=50)
        assert s.sound == "escapement" and "escapement" in w.window_note
        assert all(v is not None for v in s.escapement.lift_time_ms)
        assert s.escapement.amplitude_deg == ref.escapement.amplitude_deg
        beats = [e.step for e in events if e.kind == "step"]
        assert len(beats) == len(set(beats)) == s.steps_detected == ref.steps_detected
