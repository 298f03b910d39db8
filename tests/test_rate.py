"""The rate fit and its interval."""
import math

import numpy as np
import pytest

from tickscope.core.rate import fit_rate
from tickscope.errors import ParameterError


def test_slope_uncertainty_matches_ols_theory(rng):
    # sigma_rate = sigma * sqrt(12 / (N (N^2 - 1))) for white jitter (ordinary least squares slope
    # variance; shared/domain.md table row 13: sigma 10 us, N = 60 -> 0.0745 ppm).
    sigma, n = 10e-6, 60
    theory_ppm = sigma * math.sqrt(12 / (n * (n * n - 1))) * 1e6
    assert theory_ppm == pytest.approx(0.0745, abs=5e-4)
    half = []
    for _ in range(200):
        k = np.arange(n)
        t = k + rng.normal(0, sigma, n)
        est = fit_rate(k, t, 1.0, polarity_term=False)
        half.append(est.ci95_s_per_day)
    # the 95 % half-width is about 2 sigma: the interval is as wide as the jitter justifies, no wider
    assert np.median(half) / 0.0864 == pytest.approx(2.0 * theory_ppm, rel=0.15)


def test_interval_covers_truth_about_95_percent(rng):
    hits = 0
    trials = 400
    for i in range(trials):
        n = int(rng.integers(30, 400))
        true_rate = rng.uniform(-20, 20)
        iv = 1.0 / (1 + true_rate / 86400)
        k = np.arange(n)
        t = 0.3 + k * iv + rng.normal(0, 20e-6, n)
        est = fit_rate(k, t, 1.0)
        hits += abs(est.rate_s_per_day - true_rate) <= est.ci95_s_per_day
    assert 0.92 <= hits / trials <= 0.98


def test_correlated_residuals_widen_the_interval(rng):
    # a random-walk phase (white frequency noise): the plain OLS interval would be far too narrow
    hits = 0
    for _ in range(200):
        n = 300
        k = np.arange(n)
        walk = np.cumsum(rng.normal(0, 5e-6, n))
        t = k + walk
        est = fit_rate(k, t, 1.0, polarity_term=False)
        # truth of the underlying clock: the mean frequency of the walk is 0
        hits += abs(est.rate_s_per_day) <= est.ci95_s_per_day
        assert est.residual_correlation > 0.5
    assert hits / 200 >= 0.85


def test_outliers_do_not_move_the_rate(rng):
    k = np.arange(100)
    t = k * (1 - 5e-6) + rng.normal(0, 5e-6, 100)
    t[[10, 50, 70]] += 0.003  # three cycle slips / knocks
    est = fit_rate(k, t, 1.0)
    assert est.n_outliers == 3
    assert est.rate_s_per_day == pytest.approx(5e-6 * 86400, abs=0.01)


def test_clock_correction_and_uncertainty():
    k = np.arange(100)
    t = k * (1 + 20e-6)  # device clock fast by 20 ppm stretches every interval
    est = fit_rate(k, t, 1.0, clock_ppm=20.0, clock_ppm_u95=1.0)
    assert est.rate_s_per_day == pytest.approx(0.0, abs=1e-6)
    assert est.ci95_s_per_day >= 0.0864 - 1e-9  # 1 ppm of clock uncertainty is 0.0864 s/day


@pytest.mark.parametrize("k,t", [([0, 1], [0.0, 1.0]), ([0, 1, 2], [0.0, 1.0])])
def test_bad_input(k, t):
    with pytest.raises(ParameterError):
        fit_rate(np.array(k), np.array(t), 1.0)


def test_groups_get_their_own_intercept():
    # two stretches of one log whose phases are not tied (joined by the wall clock only):
    # the second is shifted by 37 ms; the common slope must still give the rate
    rng = np.random.default_rng(11)
    k = np.concatenate([np.arange(0, 3000), np.arange(3600, 7000)])
    t = k * (1 + 2.0 / 86400) + rng.normal(0, 5e-6, len(k))  # loses 2 s/day
    t[k >= 3600] += 0.037
    g = (k >= 3600).astype(int)
    est = fit_rate(k, t, 1.0, groups=g)
    assert est.rate_s_per_day == pytest.approx(-2.0, abs=est.ci95_s_per_day)
    assert est.ci95_s_per_day < 0.01
    naive = fit_rate(k, t, 1.0)
    assert abs(naive.rate_s_per_day + 2.0) > 0.1  # without groups the jump biases the slope


def _shifted(rng, n=240, sigma=8e-6):
    # a lossy codec's doing (measured on low-bitrate Opus): the first 5 steps 50 us early while
    # the encoder settles, and every step 35 us late from step 108 on
    k = np.arange(n)
    t = k * (1 - 3.0 / 86400) + rng.normal(0, sigma, n) + (k % 2) * 20e-6  # gains 3 s/day
    t[108:] += 35e-6
    t[:5] -= 50e-6
    return k, t


def test_level_shifts_are_found_and_the_rate_fitted_between_them():
    from tickscope.core.rate import level_shifts

    rng = np.random.default_rng(4)
    k, t = _shifted(rng)
    g = level_shifts(k, t)
    assert g is not None
    # each polarity's stretches start at the shifts (A on even steps, B on odd): [0, 5), [5, 108), [108, 240)
    assert [int(k[g == v][0]) for v in np.unique(g)] == [0, 6, 108, 1, 5, 109]
    naive = fit_rate(k, t, 1.0)
    est = fit_rate(k, t, 1.0, groups=g)
    assert abs(naive.rate_s_per_day - 3.0) > 0.02  # the shifts tilt one line by ~3 of its own intervals
    assert est.rate_s_per_day == pytest.approx(3.0, abs=est.ci95_s_per_day)
    # the interval is that of the slope within the stretches: not blown up by the shifts
    assert est.ci95_s_per_day < 0.01
    # found in any order of the input, and the outliers of a slipped ring cycle do not hide them
    perm = rng.permutation(len(k))
    t2 = t.copy()
    t2[[30, 150]] += 870e-6
    g2 = level_shifts(k[perm], t2[perm])
    assert g2 is not None and np.array_equal(g2, g[perm])


def test_level_shifts_not_found_in_white_noise_or_a_smooth_drift():
    from tickscope.core.rate import level_shifts

    rng = np.random.default_rng(5)
    false = 0
    for _ in range(200):
        n = int(rng.choice([60, 240, 1000, 3600]))
        k = np.arange(n)
        t = k * 1.00001 + rng.normal(0, 10e-6, n) + (k % 2) * 5e-6
        false += level_shifts(k, t) is not None
    assert false <= 2  # 1 % at most (none seen in 500 trials)
    # a rate drifting by 0.02 s/day over 4 minutes bends the residuals smoothly: no shift.  (Faster
    # drifts, 0.05 s/day in 4 minutes against 5 us of scatter, are cut into stretches about half the
    # time: the rate stays that of the stretches, only the note then blames the codec.)
    k = np.arange(240)
    t = k * 1.0 + 0.02 / 86400 * k * k / 480 + rng.normal(0, 5e-6, 240)
    assert level_shifts(k, t) is None


def test_weights_favour_the_cleaner_stretch():
    from tickscope.core.rate import level_shifts, stretch_weights

    rng = np.random.default_rng(6)
    k = np.arange(240)
    t = k * (1 + 1.5 / 86400) + (k % 2) * 20e-6  # loses 1.5 s/day
    t[:110] += rng.normal(0, 15e-6, 110)  # the codec times this stretch roughly
    t[110:] += rng.normal(0, 2e-6, 130) + 40e-6
    g = level_shifts(k, t)
    assert g is not None and len(np.unique(g)) >= 4  # two stretches (or more) of each polarity
    w = stretch_weights(k, t, g)
    assert 20 < w[200] / w[0] < 200  # (15 / 2)^2 = 56
    est_w = fit_rate(k, t, 1.0, groups=g, weights=w)
    est_u = fit_rate(k, t, 1.0, groups=g)
    assert est_w.ci95_s_per_day < 0.5 * est_u.ci95_s_per_day
    assert est_w.rate_s_per_day == pytest.approx(-1.5, abs=est_w.ci95_s_per_day)
    with pytest.raises(ParameterError):
        fit_rate(k, t, 1.0, weights=-w)
