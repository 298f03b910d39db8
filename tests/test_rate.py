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
