"""Sub-sample timing against the Cramér-Rao bound."""
import numpy as np
import pytest

from tickscope.core.timing import Template, crlb_s, match


def _burst(t, f0=4000.0, w=0.5e-3):
    return np.exp(-t**2 / (2 * w * w)) * np.cos(2 * np.pi * f0 * t)


def test_crlb_worked_example():
    # Gaussian tone burst f0 = 4 kHz, w = 0.5 ms, fs = 48 kHz, peak 1, white noise sigma 0.1
    # -> CRLB 0.861 us (shared/domain.md table row 12, computed with Kay's sampled form).
    fs = 48000
    t = (np.arange(480) - 240) / fs
    assert crlb_s(_burst(t), fs, 0.1) * 1e6 == pytest.approx(0.861, abs=0.005)


def test_matched_timing_reaches_the_bound(rng):
    fs = 48000
    n = 960
    center = 480.0
    tmpl_wave = _burst((np.arange(n) - center) / fs)
    win = np.zeros(n)
    win[int(center) - 120: int(center) + 120] = 1.0
    tm = Template(tmpl_wave, center, win, 1, float(np.sum((tmpl_wave * win) ** 2)))
    errs = []
    for _ in range(400):
        d = rng.uniform(-3, 3)
        x = _burst((np.arange(n) - center - d) / fs) + rng.normal(0, 0.1, n)
        lag, rho = match(x, tm, max_lag=20)
        errs.append(lag - d)
    rms_us = np.sqrt(np.mean(np.square(errs))) / fs * 1e6
    bound = crlb_s(tmpl_wave, fs, 0.1) * 1e6
    assert rms_us < 1.3 * bound
    assert abs(np.mean(errs)) / fs * 1e6 < 0.2  # no interpolation bias


def test_near_tied_lobes_go_to_the_preferred_lag():
    # A long ring (2 kHz, 24 samples a cycle at 48 kHz, decaying over 40 ms): the correlation's
    # lobes one cycle either side of the true lag stand within 3 % of it.  Without a preference
    # the highest wins; with one, the near-tied lobe nearest the preferred lag wins -- whichever
    # side it is on (a slot's predicted time settles which ring cycle is the step's).
    from tickscope.core.timing import match_many

    fs = 48000
    n = 2400
    onset = 600
    t = (np.arange(n) - onset) / fs
    wave = np.where(t >= 0, np.exp(-np.clip(t, 0, None) / 0.04) * np.sin(2 * np.pi * 2000 * t), 0.0)
    win = np.zeros(n)
    win[onset - 48: onset + 960] = 1.0
    tm = Template(wave, float(onset), win, 1, float(np.sum((wave * win) ** 2)))
    rows = np.stack([wave, wave, wave, wave]).astype(np.float32)
    prefer = np.array([np.nan, 24.4, -23.5, 3.0])
    lag, rho = match_many(rows, tm, max_lag=60, prefer=prefer)
    assert lag[0] == pytest.approx(0.0, abs=0.01)  # no preference: the true lag, the highest lobe
    assert lag[1] == pytest.approx(24.0, abs=0.3)  # the next cycle, nearest the preferred lag
    assert lag[2] == pytest.approx(-24.0, abs=0.3)  # the cycle before
    assert lag[3] == pytest.approx(0.0, abs=0.01)  # nearest to +3 is the true lag
    assert rho[0] == pytest.approx(1.0, abs=1e-4) and 0.9 < rho[1] < 1.0
