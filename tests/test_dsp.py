"""The numpy stand-ins of core/dsp.py against scipy.signal / scipy.stats / scipy.linalg (independent implementations)."""
import numpy as np
import pytest
from scipy import linalg, signal, stats

from tickscope.core import dsp


@pytest.mark.parametrize("order,wn", [(4, 300 / 24000), (4, 0.2), (2, 0.05), (3, 0.3), (5, 0.01)])
def test_butter_highpass_matches_scipy(order, wn):
    mine = dsp.butter_highpass_sos(order, wn)
    ref = signal.butter(order, wn, "highpass", output="sos")
    w, h_mine = signal.sosfreqz(mine, 512)
    _, h_ref = signal.sosfreqz(ref, 512)
    assert np.allclose(np.abs(h_mine), np.abs(h_ref), atol=1e-9)


def test_power_response_is_forward_backward_filtering():
    rng = np.random.default_rng(1)
    x = np.zeros(4096)
    x[1000:3000] = rng.normal(0, 1, 2000)
    sos = dsp.butter_highpass_sos(4, 300 / 24000)
    ref = signal.sosfiltfilt(sos, x, padtype=None)
    nfft = 8192
    mine = np.fft.irfft(np.fft.rfft(x, nfft) * dsp.sos_power_response(sos, nfft), nfft)[:4096]
    # away from the ends (where sosfiltfilt's start-up differs) the two agree closely
    assert np.max(np.abs(mine[1200:2800] - ref[1200:2800])) < 1e-6 * np.max(np.abs(ref))


def test_envelope_tukey_welch_levinson():
    rng = np.random.default_rng(2)
    for n in (255, 256):
        x = rng.normal(0, 1, n)
        assert np.allclose(dsp.analytic_envelope(x), np.abs(signal.hilbert(x)))
    for n, a in ((100, 0.2), (101, 0.5), (7, 1.0), (1, 0.2)):
        assert np.allclose(dsp.tukey(n, a), signal.windows.tukey(n, a))
    x = rng.normal(0, 1, 48000) + 0.3 * np.sin(2 * np.pi * 50 * np.arange(48000) / 8000)
    f, p = dsp.welch_psd(x, 8000, 8000)
    f2, p2 = signal.welch(x, fs=8000, nperseg=8000)
    assert np.allclose(f, f2) and np.allclose(p, p2, rtol=1e-9)
    r = np.correlate(x[:2000], x[:2000], "full")[1999:2016]
    assert np.allclose(dsp.levinson(r, 16), linalg.solve_toeplitz(r[:16], -r[1:17]))


def test_distribution_quantiles_match_scipy_stats():
    assert dsp.t_ppf(0.975, 7) == pytest.approx(stats.t.ppf(0.975, 7), rel=1e-10)
    for df in (8, 9.5, 12, 30, 100, 1e4, 1e7):
        for p in (0.975, 0.995, 0.025):
            assert dsp.t_ppf(p, df) == pytest.approx(stats.t.ppf(p, df), rel=1e-4)
    assert dsp.chi2_ppf(0.025, 37.5) == pytest.approx(stats.chi2.ppf(0.025, 37.5), rel=1e-10)
    assert np.allclose(dsp.chi2_ppf(np.array([0.025, 0.975]), np.array([3.0, 300.0])),
                       stats.chi2.ppf([0.025, 0.975], [3.0, 300.0]))
    for k, n, p in ((5, 60, 1 / 60), (0, 10, 0.3), (9, 10, 0.5), (10, 10, 0.5), (-1, 5, 0.2)):
        assert dsp.binom_sf(k, n, p) == pytest.approx(stats.binom.sf(k, n, p), rel=1e-10, abs=1e-15)
    # the knocking test's tails: a few hundred beats, small shares, p-values down to 1e-30
    for k, n, p in ((40, 300, 0.02), (150, 400, 0.1), (3, 2000, 1e-4), (999, 1000, 0.999)):
        assert dsp.binom_sf(k, n, p) == pytest.approx(stats.binom.sf(k, n, p), rel=1e-9, abs=1e-300)


def test_incomplete_beta_and_the_f_tail_match_scipy():
    # scipy.special.betainc and scipy.stats.f.sf as the reference (general-purpose library)
    from scipy import special

    for a, b, x in ((0.5, 0.5, 0.3), (2.0, 3.0, 0.9), (14.5, 100.0, 0.05), (200.0, 3.0, 0.99), (1.0, 1.0, 0.42),
                    (29.0 / 2, 1000.0 / 2, 0.97), (0.7, 40.0, 1e-5)):
        assert dsp.betainc_reg(a, b, x) == pytest.approx(special.betainc(a, b, x), rel=1e-11, abs=1e-300)
    assert dsp.betainc_reg(2.0, 3.0, 0.0) == 0.0 and dsp.betainc_reg(2.0, 3.0, 1.0) == 1.0
    # the escape wheel's F test: 29, 39 or 59 and a few hundred degrees of freedom
    for F, d1, d2 in ((1.0, 29, 400), (2.5, 39, 1200), (0.3, 59, 300), (8.0, 29, 900), (1e-9, 5, 5)):
        assert dsp.f_sf(F, d1, d2) == pytest.approx(stats.f.sf(F, d1, d2), rel=1e-9, abs=1e-300)


def test_fast_len():
    for n in (1, 2, 7, 100, 1000, 4609, 6145):
        m = dsp.fast_len(n)
        assert m >= n and m < 1.34 * n + 2
        f = m
        for q in (2, 3, 5):
            while f % q == 0:
                f //= q
        assert f == 1


def test_rolling_window_median_and_mad_equal_statistics_median():
    # the running window kept sorted must give exactly what statistics.median gives (ties, even
    # and odd counts, a center that is not the median)
    import random
    import statistics

    from tickscope.core.dsp import RollingWindow

    rnd = random.Random(3)
    for maxlen in (1, 2, 5, 32, 200):
        w, ref = RollingWindow(maxlen), []
        for _ in range(400):
            v = rnd.choice([rnd.random(), round(rnd.random(), 1), float(rnd.randint(-2, 2))])
            w.append(v)
            ref = (ref + [v])[-maxlen:]
            assert list(w) == ref and len(w) == len(ref)
            med = statistics.median(ref)
            assert w.median() == med
            for c in (med, rnd.random()):
                assert w.median_abs_deviation(c) == statistics.median([abs(x - c) for x in ref])


def test_moving_line_agrees_with_numpy_polyfit_over_a_long_stream():
    import numpy as np

    from tickscope.core.dsp import MovingLine

    # a weekend of steps (times up to 3.5e5 s, where rounding of running sums would show), with gaps
    rng = np.random.default_rng(4)
    k = np.cumsum(rng.choice([1, 1, 1, 1, 2, 5], 700)) + 345_000
    t = 0.7 + 1.00002 * k + rng.normal(0, 1e-5, len(k))
    line = MovingLine(32)
    for i, (ki, ti) in enumerate(zip(k, t)):
        line.append(float(ki), float(ti))
        if i < 2:
            continue
        w = slice(max(0, i - 31), i + 1)
        pb, pa = np.polyfit(k[w] - ki, t[w], 1)
        b, t_k = line.fit()
        assert len(line) == min(i + 1, 32)
        assert b == pytest.approx(pb, rel=1e-9)
        assert abs(t_k - pa) < 1e-9  # the predicted time of the newest step, to 1 ns (2e-10 s is 4 ulp here)
