"""The compiled loops (tickscope/core/_kernels.c) against their numpy reference versions."""
import os

import numpy as np
import pytest

from tickscope.core import kernels
from tickscope.core.ringdown import _measure_ringdown_numpy, measure_ringdown

needs_compiled = pytest.mark.skipif(not kernels.compiled() and not os.environ.get("KERNELS_REQUIRED"),
                                    reason="the compiled module was not built (no C compiler at install time)")


def test_compiled_module_is_built_where_ci_requires_it():
    # CI installs with a compiler: a C file that stopped compiling must fail there, not fall back quietly
    if os.environ.get("KERNELS_REQUIRED") and not os.environ.get("TICKSCOPE_PURE_NUMPY"):
        assert kernels.compiled()


@needs_compiled
def test_ringdown_matches_numpy():
    rng = np.random.default_rng(7)
    measured = 0
    for i in range(600):
        n = int(rng.integers(10, 6000))
        fs = float(rng.choice([8000, 44100, 48000, 96000]))
        t = np.arange(n) / fs
        tau_s = rng.uniform(0.001, 0.05)
        x = np.exp(-t / tau_s) * np.sin(2 * np.pi * rng.uniform(300, 4000) * t) * rng.uniform(0.01, 1)
        noise = rng.uniform(0, 1e-3) ** 2
        x = x + rng.standard_normal(n) * np.sqrt(noise) * rng.uniform(0, 2)
        npw = noise if i % 3 else 0.0
        ref = _measure_ringdown_numpy(x, fs, noise_power=npw, start_db=-3.0, stop_db=-25.0, min_range_db=8.0,
                                      margin_db=10.0)
        got = measure_ringdown(x, fs, noise_power=npw)
        if np.isnan(ref.decay_ms):
            assert np.isnan(got.decay_ms) and got.fit_range_db == 0.0
            continue
        measured += 1
        assert got.decay_ms == pytest.approx(ref.decay_ms, rel=1e-9)
        assert got.fit_range_db == pytest.approx(ref.fit_range_db, rel=1e-9, abs=1e-9)
        assert got.fit_rms_db == pytest.approx(ref.fit_rms_db, rel=1e-6, abs=1e-9)
    assert measured > 400  # most of these decays are measurable


@needs_compiled
def test_kernels_reject_wrong_buffers():
    from tickscope.core import _kernels

    w = np.ones(5)
    C = np.zeros((2, 5), dtype=np.complex128)
    with pytest.raises(ValueError):  # val shorter than tau
        _kernels.newton_peaks(C, np.zeros(2), np.zeros(1), w, w, w, 8, 3)
    with pytest.raises(ValueError):  # C not rows x bins
        _kernels.newton_peaks(np.zeros((2, 4), dtype=np.complex128), np.zeros(2), np.zeros(2), w, w, w, 8, 3)
    with pytest.raises(TypeError):  # not a buffer
        _kernels.ringdown([0.0] * 100, 48000.0, 0.0, -3.0, -25.0, 8.0, 10.0)
    assert _kernels.ringdown(np.zeros(5), 48000.0, 0.0, -3.0, -25.0, 8.0, 10.0) is None  # too short
    assert _kernels.ringdown(np.zeros(500), 48000.0, 0.0, -3.0, -25.0, 8.0, 10.0) is None  # silence
    with pytest.raises(ValueError):  # lags beyond the correlation's length
        _kernels.match_pick(np.zeros((2, 8), np.float32), np.zeros((2, 5), np.complex64), np.zeros((2, 8), np.float32),
                            4, 6, 2, 8, None, 1.0, w, w, w, 8, 3, np.zeros(2), np.zeros(2), np.zeros(2))
    x = np.zeros(100, np.float32)
    with pytest.raises(ValueError):  # head not lag samples long
        _kernels.frame_power(x, np.zeros(2, np.float32), 1, 10, np.zeros(10), 0, 1.0)
    with pytest.raises(ValueError):  # out not one value a frame
        _kernels.frame_power(x, np.zeros(1, np.float32), 1, 10, np.zeros(9), 0, 1.0)
    with pytest.raises(ValueError):  # 16-bit samples with a float32 head
        _kernels.frame_power(np.zeros(100, np.int16), np.zeros(1, np.float32), 1, 10, np.zeros(10), 2, 1.0)


@needs_compiled
@pytest.mark.parametrize("nfft", [64, 512, 2048])
def test_newton_peaks_matches_numpy(nfft):
    from tickscope.core.corrpeaks import _newton_peaks

    rng = np.random.default_rng(nfft)
    rows = 25
    x = rng.standard_normal((rows, nfft // 2))
    t = rng.standard_normal(nfft // 4)
    C = np.fft.rfft(x, nfft, axis=1) * np.conj(np.fft.rfft(t, nfft))
    c = np.fft.irfft(C, nfft, axis=1)
    tau0 = np.argmax(c, axis=1) + rng.uniform(-0.45, 0.45, rows)
    tau0[0] = np.argmin(c[0])  # a minimum: Newton must stop there at once (not concave)
    for iters in (1, 3, 6):
        got = _newton_peaks(C, nfft, tau0, iters)
        ref = _newton_peaks(C, nfft, tau0, iters, use_compiled=False)
        np.testing.assert_allclose(got[0], ref[0], rtol=0, atol=1e-9)
        np.testing.assert_allclose(got[1], ref[1], rtol=1e-9, atol=1e-12)
    assert got[0][0] == tau0[0]


@needs_compiled
def test_newton_peaks_finds_known_fractional_delays():
    from tickscope.core.corrpeaks import _newton_peaks

    rng = np.random.default_rng(5)
    nfft, n = 1024, 256
    spec = np.fft.rfft(rng.standard_normal(n), nfft)
    spec[nfft // 8:] = 0  # band-limited: one clear correlation peak
    t = np.fft.irfft(spec, nfft)[:n]
    delays = rng.uniform(20, 200, 12)
    k = np.arange(nfft // 2 + 1)
    X = np.fft.rfft(t, nfft)[None, :] * np.exp(-2j * np.pi * np.outer(delays, k) / nfft)  # rows: t delayed
    C = X * np.conj(np.fft.rfft(t, nfft))
    for use in (True, False):
        tau, val = _newton_peaks(C, nfft, np.round(delays), 6, use_compiled=use)
        np.testing.assert_allclose(tau, delays, atol=1e-6)
        np.testing.assert_allclose(val, np.dot(t, t), rtol=1e-6)  # the peak of an autocorrelation


@needs_compiled
def test_whole_analysis_without_the_compiled_loops_gives_the_same_result(tmp_path):
    # a machine without a C compiler installs without the module and runs the numpy versions:
    # the whole analysis must still work there and agree with the compiled one
    import json
    import subprocess
    import sys

    from tickscope.core.simulate import Scenario
    from tickscope.simulation import write_simulation

    path = str(tmp_path / "pn.wav")
    write_simulation(path, Scenario(duration_s=40, rate_s_per_day=-3.3, snr_db=25, second_impact_ms=45,
                                    missed_steps=(20,), seed=9))
    out = {}
    for pure in ("", "1"):
        env = {k: v for k, v in os.environ.items() if k != "TICKSCOPE_PURE_NUMPY"}
        if pure:
            env["TICKSCOPE_PURE_NUMPY"] = pure
        r = subprocess.run([sys.executable, "-m", "tickscope", "analyze", path, "--json"], capture_output=True,
                           text=True, env=env)
        assert r.returncode == 0, r.stderr
        out[pure] = json.loads(r.stdout)
    a, b = out[""], out["1"]
    assert a["steps_detected"] == b["steps_detected"] == 39 and a["missed_steps"] == b["missed_steps"] == 1
    assert b["rate_s_per_day"] == pytest.approx(a["rate_s_per_day"], abs=1e-5)
    for pol in ("A", "B"):
        assert b["ringdown"][pol]["decay_ms_median"] == pytest.approx(a["ringdown"][pol]["decay_ms_median"], abs=1e-3)


@needs_compiled
@pytest.mark.parametrize("lag", [1, 2, 5, 37])
@pytest.mark.parametrize("hop", [4, 22, 24, 48])
def test_frame_power_matches_numpy(lag, hop):
    from tickscope.core.detect import ImpactDetector

    rng = np.random.default_rng(lag * 100 + hop)
    det = ImpactDetector(48000)
    det.hop = hop
    for n in (0 if lag == 1 else 3, lag, 10 * hop + 7, 4096):
        x = (rng.standard_normal(n) * rng.uniform(1e-4, 0.5)).astype(np.float32)
        for prev in (np.zeros(0, np.float32), rng.standard_normal(3).astype(np.float32),
                     rng.standard_normal(lag + 9).astype(np.float32)):
            ref = det._frame_energy(x, prev, lag)
            e, hi, lo, total = kernels.frame_power(x, det._head(x, prev, lag), lag, hop)
            assert e.shape == ref.shape
            np.testing.assert_allclose(e, ref, rtol=2e-6, atol=1e-30)
            if n:
                assert (hi, lo) == (float(x.max()), float(x.min()))
                assert total == pytest.approx(float(np.sum(x, dtype=np.float64)), rel=1e-5, abs=1e-5)


@needs_compiled
@pytest.mark.parametrize("dtype,scale", [(np.int16, 2.0**-15), (np.int32, 2.0**-31)])
@pytest.mark.parametrize("lag", [1, 3, 37, 300])
def test_frame_power_of_integers_equals_that_of_their_float_samples(dtype, scale, lag):
    # 16-bit and 24-bit audio goes to the detector as read; its numbers must be those of the float32
    # samples the reader would otherwise have made (np.multiply(x, scale, dtype=np.float32)), exactly
    rng = np.random.default_rng(lag)
    hop = 24
    for n in (lag, 5 * hop + 3, 300 * hop + 11, 48000):
        full = 32767 if dtype == np.int16 else (2**23 - 1) * 256
        x = rng.integers(-full, full, n + lag).astype(dtype)
        if dtype == np.int32:
            x = (x // 256 * 256).astype(dtype)  # 24-bit samples, as libsndfile reads them into int32
        x[rng.random(n + lag) < 0.01] = -full - (1 if dtype == np.int16 else 256)  # full-scale negative
        head, x = x[:lag], x[lag:]
        xf, hf = (np.multiply(v, np.float32(scale), dtype=np.float32) for v in (x, head))
        ref = kernels.frame_power(xf, hf, lag, hop)
        got = kernels.frame_power(x, head, lag, hop, scale=scale)
        assert np.array_equal(got[0], ref[0]) and got[1:] == ref[1:]


@needs_compiled
@pytest.mark.parametrize("fs", [8000, 48000])
def test_match_pick_matches_numpy(fs):
    # match_many's lobe choice in C against _pick_numpy, on ringing sounds (many near-tied lobes)
    # with noise, with and without preferred lags
    from tickscope.core.timing import Template, _newton_weights, _pick_numpy, _template_spectrum, _window_span

    rng = np.random.default_rng(fs)
    n = int(0.05 * fs)
    for trial in range(40):
        onset = n // 4
        t = (np.arange(n) - onset) / fs
        f0 = rng.uniform(0.1, 0.3) * fs
        wave = np.where(t >= 0, np.exp(-np.clip(t, 0, None) / rng.uniform(0.002, 0.05)) * np.sin(2 * np.pi * f0 * t), 0)
        win = np.zeros(n)
        win[onset - int(0.001 * fs): onset + int(0.01 * fs)] = 1.0
        tm = Template(wave, float(onset), win, 1, float(np.sum((wave * win) ** 2)))
        s0, s1 = _window_span(tm)
        nt = s1 - s0
        max_lag = int(0.003 * fs)
        a, b = max(0, s0 - max_lag), min(n, s1 + max_lag)
        nfft = 1 << int(np.ceil(np.log2(b - a + nt)))
        rows = 7
        xp = np.zeros((rows, nfft), dtype=np.float32)
        for r in range(rows):
            d = rng.uniform(-max_lag + 2, max_lag - 2)
            shifted = np.interp(np.arange(n) - d, np.arange(n), wave)
            xp[r, : b - a] = (shifted + rng.normal(0, rng.uniform(1e-4, 0.3), n))[a:b]
        C = np.fft.rfft(xp, axis=1) * _template_spectrum(tm, s0, s1, nfft)
        c = np.fft.irfft(C, nfft, axis=1)
        if c.dtype != np.float32:
            pytest.skip("numpy before 2.0 transforms float32 in double precision")
        lags = np.arange(-max_lag, max_lag + 1) + (s0 - a)
        lags = lags[(lags >= 0) & (lags <= b - a - nt)]
        pref = None if trial % 3 == 0 else rng.uniform(lags[0], lags[-1], rows)
        if pref is not None:
            pref[rng.random(rows) < 0.3] = np.nan
        ref = _pick_numpy(c, C, xp[:, : b - a], lags, nt, nfft, pref, tm.energy)
        got = tuple(np.empty(rows) for _ in range(3))
        w, w1, w2 = _newton_weights(C.shape[1], nfft)
        kernels.match_pick(c, C, xp, int(lags[0]), len(lags), nt, b - a, pref, tm.energy, w, w1, w2, nfft, 3, *got)
        for g, r in zip(got, ref):
            np.testing.assert_allclose(g, r, rtol=1e-12, atol=1e-12)


@needs_compiled
def test_onset_scan_matches_numpy():
    from tickscope.core.detect import ImpactDetector

    rng = np.random.default_rng(5)
    for trial in range(200):
        nf = int(rng.integers(0, 3000))
        sub = int(rng.integers(1, 600))
        nblk = max(1, -(-nf // sub))
        now = rng.lognormal(-20, 2, nf)
        bg = now * rng.lognormal(-1, 1.5, nf)
        thr_b = rng.lognormal(-19, 1, nblk)
        fl_b = thr_b * rng.uniform(0.05, 0.5, nblk)
        args = (now, bg, thr_b, fl_b, sub, 10 ** 0.4, int(rng.integers(0, 10**6)), 4, int(rng.integers(1, 200)),
                int(rng.integers(-10**12, 10**6)), int(rng.integers(-1, 10**6)))
        ref = ImpactDetector._onsets_numpy(*args)
        got = kernels.onset_scan(*args)
        assert np.array_equal(got[0], ref[0]) and np.array_equal(got[1], ref[1]) and got[2] == ref[2]
