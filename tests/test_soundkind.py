"""The sound-kind decision (core/soundkind.py): what decides stepping, escapement or neither."""
from __future__ import annotations

import pytest

from tickscope.core.soundkind import (MAX_STEP_JITTER_US, SECOND_TICK_TOCK_SHARE, classify_sound,
                                      scattered_steps)


def _kind(**kw):
    base = dict(grid_found=True, nominal_s=1.0, steps=120, jitter_us=2.0, alternation_us=10.0, slots_heard=120,
                slots_matched=118, step_snr_db=35.0, interval_s=1.0)
    base.update(kw)
    return classify_sound(**base)


def test_a_clean_second_is_a_stepping_motor():
    assert _kind().kind == "stepping"


@pytest.mark.parametrize("jitter_us,alternation_us", [(2400.0, 250.0), (1860.0, 9460.0), (100.0, -8300.0),
                                                      (4500.0, 7800.0)])
def test_scatter_and_a_small_tick_tock_at_a_second_stay_a_motor(jitter_us, alternation_us):
    # figures of independent motor recordings (load varying from step to step, tests/independent
    # motor-faults and motor-phone, dev split): ms of scatter and polarities timed ms apart
    v = _kind(jitter_us=jitter_us, alternation_us=alternation_us)
    assert v.kind == "stepping"
    assert scattered_steps(v.kind, 1.0, jitter_us) == (jitter_us > MAX_STEP_JITTER_US)


def test_a_pendulum_out_of_beat_at_a_second_is_an_escapement():
    over = SECOND_TICK_TOCK_SHARE * 1e6 * 1.1
    assert _kind(jitter_us=200.0, alternation_us=-over) == _kind(jitter_us=200.0, alternation_us=over)
    assert _kind(jitter_us=200.0, alternation_us=over).kind == "escapement"
    assert _kind(jitter_us=200.0, alternation_us=over).cause == "tick-tock"
    assert _kind(jitter_us=200.0, alternation_us=0.9 * SECOND_TICK_TOCK_SHARE * 1e6).kind == "stepping"


def test_beats_that_do_not_sound_alike_at_a_second_are_an_escapement():
    v = _kind(jitter_us=470.0, slots_heard=15, slots_matched=3)
    assert (v.kind, v.cause) == ("escapement", "unlike")
    # ... but not when the steps are too faint for their templates to be trusted
    assert _kind(jitter_us=470.0, slots_heard=15, slots_matched=3, step_snr_db=12.0).kind == "stepping"


def test_fast_beats_need_a_crystals_time_to_be_a_motor():
    assert _kind(nominal_s=0.25, interval_s=0.25, jitter_us=3.0).kind == "stepping"
    v = _kind(nominal_s=0.25, interval_s=0.25, jitter_us=30.0)
    assert (v.kind, v.cause) == ("escapement", "scatter")
    assert _kind(nominal_s=0.25, interval_s=0.25, jitter_us=3.0, lift_resolved=True).cause == "lift"


def test_off_interval_grids_and_what_the_user_says():
    assert _kind(nominal_s=None, interval_s=0.2).kind == "escapement"          # 18000 beats an hour
    assert _kind(nominal_s=None, interval_s=3.0).kind == "not-ticking"         # no movement beats so
    assert _kind(grid_found=False).kind == "none"
    assert _kind(movement="escapement", jitter_us=2.0).kind == "escapement"
    assert _kind(movement="quartz", alternation_us=50000.0).kind == "stepping"
    # a 2 s grid is no escapement's beat: scatter makes it neither
    assert _kind(nominal_s=2.0, interval_s=2.0, jitter_us=5000.0).kind == "not-ticking"


@pytest.mark.parametrize("silence_samples", [215838, 231676, 247514])
def test_a_motor_whose_every_step_sounds_twice_is_not_two_sides_of_a_pendulum(tmp_path, silence_samples):
    # A 1 s motor whose hand bounces 45 ms after every step (own simulator), behind this much digital
    # silence (a capture started before the playback: the live loopback test's case): every step
    # sounds at both places, so the seconds pendulum's rule (each side at a place of its own,
    # core/beatsides._side_places) must not take one polarity at its bounce -- which read the
    # motor as an escapement whose beats differ by 90 ms, with its missed step unseen.
    import numpy as np
    import soundfile as sf

    from tickscope.core.simulate import Scenario
    from tickscope.pipeline import analyze_samples
    from tickscope.simulation import write_simulation

    sc = Scenario(duration_s=16, first_step_s=0.6, rate_s_per_day=-6.5, snr_db=35, missed_steps=(6,),
                  second_impact_ms=45, seed=71)
    wav = str(tmp_path / "play.wav")
    truth = write_simulation(wav, sc)
    x, fs = sf.read(wav, dtype="float32")
    x = np.concatenate([np.zeros(silence_samples, np.float32), x, np.zeros(4 * fs, np.float32)])
    s = analyze_samples(x, fs)
    assert s.sound == "stepping" and s.missed_steps == 1
    assert s.steps_detected == sum(1 for st in truth["steps"] if st["kind"] == "step")
