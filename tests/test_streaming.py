"""A recording fed in blocks of any size gives the same steps as the whole file at once."""
import numpy as np
from hypothesis import given, settings, strategies as st

from tickscope.core.simulate import Scenario, render_all
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
