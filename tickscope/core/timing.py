"""Sub-sample timing of steps by matching against templates learned from the recording.

The timing statistic is the cross-correlation of a step's (high-passed) audio with the
template of its polarity (Knapp & Carter 1976, generalized cross-correlation with a
template as the reference).  The integer peak is refined to a fraction of a sample by
Newton's method on the band-limited correlation itself, evaluated exactly from its
spectrum, so there is no interpolation bias (compare the three-point parabola of
J. O. Smith, Spectral Audio Signal Processing, "Quadratic Interpolation of Spectral
Peaks").  A template's own time origin is its onset: the point where its envelope
first reaches ``onset_fraction`` of its peak, i.e. the first impact of the step.
"""
from __future__ import annotations

import numpy as np

from ..errors import ParameterError
from . import dsp, kernels
from .coarsetiming import COARSE_TIE, coarse_lags
from .corrpeaks import _newton_weights, _pick_numpy
from .steptemplate import Template, _template_spectrum, _window_span

#: the first impact's envelope peaks this soon after its coarse onset (an attack of a few ms;
#: our own choice, wide enough for the simulator's and typical movements' attacks)
FIRST_IMPACT_PEAK_S = 0.010
#: dips of a ring's envelope shorter than this (s) do not end the walk back to a sound's start
#: (a ring of 1 kHz and up; our own choice)
ONSET_BRIDGE_S = 0.001
#: A sound's first peak: the first local maximum of its envelope after the sound begins that
#: reaches this share of the loudest within ``FIRST_PEAK_S`` (a ripple of the lead-in is no peak) ...
FIRST_PEAK_SHARE = 0.3
FIRST_PEAK_S = 0.001
#: where a sound begins, for the search of its first peak: its envelope first reaching this share
#: of the loudest moment of its first impact (as the templates' windows are placed)
ONSET_FRACTION = 0.2
#: ... and its arrival, the time reference of its template: where the envelope rising to that
#: peak crosses this share of it.  Found the same way for both coil polarities, so that their
#: time references are one physical event, the impulse's arrival, whatever their ring (our own
#: choice: half-way up the attack, far above the noise of an averaged template).
ARRIVAL_LEVEL = 0.5
#: The arrival is also found at these levels: if the two polarities' rises differ in shape,
#: their arrivals differ by level, and that difference bounds how well they share a reference.
ARRIVAL_CHECK_LEVELS = (0.3, 0.7)


def _envelope(x: np.ndarray, samplerate: float, smooth_s: float = 0.0) -> np.ndarray:
    env = dsp.analytic_envelope(x)
    k = max(1, int(round(smooth_s * samplerate)))
    if k > 1:
        env = np.convolve(env, np.ones(k) / k, mode="same")
    return env


def onset_of(wave: np.ndarray, samplerate: float, *, fraction: float = 0.2,
             search_from: int = 0, search_to: int | None = None) -> float:
    """Sub-sample index where the envelope of ``wave`` first reaches ``fraction`` of its peak.

    The search walks back from the envelope's maximum in ``search_from .. search_to``, so
    noise long before the sound cannot trigger it, and a later, louder impact of the same
    step (a hand's bounce) cannot pass for its start.  It walks on across dips of the envelope
    shorter than ``ONSET_BRIDGE_S`` between moments at half the peak or more: a ring whose
    partials beat dips below the level every cycle, and the start of its sound lies before them
    (the noise of a lead-in, a phone's lifted hiss, is not that loud).
    """
    env = _envelope(wave, samplerate)
    stop = len(env) if search_to is None else max(search_from + 1, min(len(env), search_to))
    p = search_from + int(np.argmax(env[search_from:stop]))
    level = fraction * env[p]
    bridge = max(1, int(round(ONSET_BRIDGE_S * samplerate)))
    i = p
    while i > search_from:
        if env[i - 1] >= level:
            i -= 1
            continue
        # below the level: go on if the envelope was loud (half the peak: a ring's own ripple, not
        # the noise of a lead-in) within the bridge before
        j = i - 1
        lo = max(search_from, i - 1 - bridge)
        loud = max(level, 0.5 * env[p])
        while j > lo and env[j] < loud:
            j -= 1
        if env[j] >= loud and j > search_from:
            i = j
            continue
        break
    if i == search_from or env[i] == env[i - 1]:
        return float(i)
    # linear interpolation between i-1 (below) and i (at or above)
    return float(i - 1 + (level - env[i - 1]) / (env[i] - env[i - 1]))


def first_arrival(wave: np.ndarray, samplerate: float, *, search_from: int = 0, search_to: int | None = None,
                  level: float = ARRIVAL_LEVEL) -> float:
    """Sub-sample index of the arrival of the first impact in ``wave`` (its time reference).

    Where the sound begins is a low crossing of its envelope (``ONSET_FRACTION`` of the loudest
    moment in ``search_from .. search_to``); its first peak is the first local maximum of the (Hilbert) envelope after that,
    within ``FIRST_PEAK_S``; the arrival is where the envelope rising to that peak crosses
    ``level`` of it.  It is scale-free (a quieter polarity arrives at the same time) and depends on
    the rise of the impulse, not on how the ring that follows beats: two polarities that ring at
    different frequencies after the same impulse share it.  (Aligning their whole envelopes did
    not: it read 53 us apart for simulated polarities whose impulses were simultaneous.)
    """
    env = _envelope(wave, samplerate)
    stop = len(env) if search_to is None else max(search_from + 8, min(len(env), search_to))
    # where the sound begins: a low crossing (ONSET_FRACTION of the loudest moment of the first
    # impact), and from a little before it the rise to the first peak
    start = max(search_from + 1, int(onset_of(wave, samplerate, fraction=ONSET_FRACTION, search_from=search_from,
                                              search_to=stop)) - 1)
    end = min(len(env) - 1, start + max(3, int(round(FIRST_PEAK_S * samplerate))))
    top = float(env[start: end + 1].max())
    p = start
    while p < end and not (env[p] >= FIRST_PEAK_SHARE * top and env[p] >= env[p - 1] and env[p] >= env[p + 1]):
        p += 1
    return rising_crossing(env, p, search_from, level)


def rising_crossing(env: np.ndarray, peak: int, lo: int, level: float) -> float:
    """Where the envelope rising to ``peak`` crosses ``level`` of it (sub-sample), not before ``lo``."""
    thr = level * env[peak]
    i = peak
    while i > lo and env[i - 1] >= thr:
        i -= 1
    if i == lo or env[i] == env[i - 1]:
        return float(i)
    return float(i - 1 + (thr - env[i - 1]) / (env[i] - env[i - 1]))


def match(snippet: np.ndarray, template: Template, *, max_lag: int, center: int = 0) -> tuple[float, float]:
    """Best lag (samples, sub-sample) of ``snippet`` against ``template`` and the correlation coefficient.

    A lag of 0 means the snippet's sound sits exactly where the template's does; lags
    ``center - max_lag .. center + max_lag`` are searched.
    """
    lags, rhos = match_many(np.asarray(snippet)[None, :], template, max_lag=max_lag, center=center)
    return float(lags[0]), float(rhos[0])


def match_many(snippets: np.ndarray, template: Template, *, max_lag: int, center: int = 0,
               prefer: np.ndarray | None = None, tie: float = 0.03, refine: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """:func:`match` for the rows of ``snippets`` (2-D, or a list of equal-length 1-D arrays) at
    once: the same numbers, with the FFTs, the lobe search and Newton's method run over all rows
    together.  Only the part of each row the search needs is copied.

    ``prefer`` (a lag per row, nan for none): among lobes within ``tie`` (a share: 3 %) of the
    best, take the one nearest this lag rather than the highest.  ``refine`` (a share) widens the
    lobes refined before that choice: a ring sampled only two or three times a cycle can hide its
    true peak between samples, its best sample reading half as high (see :func:`refine_reach`).  A ringing sound whose pitch varies a little from
    tick to tick can make the next ring cycle's lobe read a hair higher; the step grid knows
    where the step is to far better than a cycle, so it settles such near-ties.
    """
    nrow, width = len(snippets), len(snippets[0])  # rows of a 2-D array or arrays of a list alike
    s0, s1 = _window_span(template)
    a = max(0, s0 + center - max_lag)
    b = min(width, s1 + center + max_lag)
    nt = s1 - s0
    nfft = 1 << int(np.ceil(np.log2(max(b - a, 0) + nt)))
    # the searched part of each row, straight into rows as long as the FFT (zeros: its padding)
    xp = np.zeros((nrow, nfft), dtype=np.float32)
    for i, row in enumerate(snippets):
        xp[i, : b - a] = row[a:b]
    x = xp[:, : b - a]
    C = np.fft.rfft(xp, axis=1) * _template_spectrum(template, s0, s1, nfft)
    c = np.fft.irfft(C, nfft, axis=1)
    # c[j] = sum_n x[n + j] t[n]; lag j in x coordinates is lag (a + j - s0) in snippet coordinates
    lags = np.arange(center - max_lag, center + max_lag + 1) + (s0 - a)
    lags = lags[(lags >= 0) & (lags <= x.shape[1] - nt)]
    if not len(lags):
        return np.zeros(nrow), np.zeros(nrow)
    pref = None if prefer is None else np.asarray(prefer, dtype=np.float64) - a + s0  # in correlation-index units
    if kernels.compiled() and c.dtype == np.float32 and C.dtype == np.complex64:
        # the same choice in C (``_kernels.c``); _pick_numpy is its reference (and runs where
        # numpy before 2.0 transforms float32 in double precision)
        w, w1, w2 = _newton_weights(C.shape[1], nfft)
        out_tau, out_val, rho = (np.empty(nrow) for _ in range(3))
        kernels.match_pick(c, C, xp, int(lags[0]), len(lags), nt, b - a, pref, template.energy, w, w1, w2, nfft,
                           3, out_tau, out_val, rho, tie, refine)
    else:
        out_tau, out_val, rho = _pick_numpy(c, C, x, lags, nt, nfft, pref, template.energy, tie, refine)
    return a + out_tau - s0, rho


def _shift(x: np.ndarray, delay) -> np.ndarray:
    """Delay x (1-D, or each row of 2-D x by its own delay) by a fractional number of samples
    (positive = later), by an FFT phase ramp."""
    x = np.asarray(x, dtype=np.float64)
    n = x.shape[-1]
    nfft = 1 << int(np.ceil(np.log2(2 * n)))
    X = np.fft.rfft(x, nfft, axis=-1)
    k = np.arange(X.shape[-1])
    ramp = np.exp(-2j * np.pi * np.multiply.outer(np.asarray(delay, dtype=np.float64), k) / nfft)
    return np.fft.irfft(X * ramp, nfft, axis=-1)[..., :n]


def learn_template(snippets: list[np.ndarray], samplerate: float, *, pre: int,
                   window_s: float = 0.012, onset_fraction: float = 0.2,
                   max_lag_s: float = 0.002, iterations: int = 3) -> Template:
    """Average aligned snippets of one polarity into a template.

    Parameters
    ----------
    snippets : list of np.ndarray [shape=(L,)]
        High-passed audio, each with its coarse onset near index ``pre``.
    samplerate : float
        Hz.
    pre : int
        Index of the coarse onset in each snippet.
    window_s : float
        Length of the matching window after the onset (12 ms): the attack and early
        ring-down, where the timing information is; the late ring-down varies more
        from step to step and with the room.
    """
    if not snippets:
        raise ParameterError("learn_template needs at least one snippet")
    L = min(len(s) for s in snippets)
    S = np.stack([np.asarray(s[:L], dtype=np.float64) for s in snippets])
    energies = [float(np.dot(s[pre: pre + int(window_s * samplerate)], s[pre: pre + int(window_s * samplerate)])) for s in S]
    ref = S[int(np.argsort(energies)[len(energies) // 2])].copy()  # a typical one, not the loudest outlier
    max_lag = max(2, int(round(max_lag_s * samplerate)))
    # the step is timed at its first impact, which starts at the coarse onset: its envelope
    # peaks within a few ms (a later, louder bounce of the hand is not the start)
    first_s = int(round(FIRST_IMPACT_PEAK_S * samplerate))
    tmpl = 1
    for _ in range(iterations):
        on = onset_of(ref, samplerate, fraction=onset_fraction, search_from=max(0, pre - max_lag),
                      search_to=pre + first_s)
        win = _window(L, on, samplerate, window_s)
        t = Template(ref, on, win, 1, float(np.sum((ref * win) ** 2)))
        # aligned by their onsets first (a ring's carrier cannot tell one cycle from the next), then
        # to a fraction of a sample by the carrier lobe nearest that
        coarse, _ = coarse_lags(S, t, samplerate, max_lag=max_lag)
        lags, rhos = match_many(S, t, max_lag=max_lag, prefer=coarse, tie=COARSE_TIE)
        use = np.flatnonzero(rhos >= 0.3)  # the others are not this polarity's sound
        n = len(use)
        if n:
            acc = np.zeros(L)
            for row in _shift(S[use], -lags[use]):
                acc += row
            ref = acc / n
        tmpl = max(n, 1)
    lo, hi = max(0, pre - max_lag), pre + first_s
    on = onset_of(ref, samplerate, fraction=onset_fraction, search_from=lo, search_to=hi)
    win = _window(L, on, samplerate, window_s)
    arrival = first_arrival(ref, samplerate, search_from=lo, search_to=hi)
    checks = tuple(first_arrival(ref, samplerate, search_from=lo, search_to=hi, level=v) for v in ARRIVAL_CHECK_LEVELS)
    return Template(ref, arrival, win, int(tmpl), float(np.sum((ref * win) ** 2)), checks)


def _window(L: int, onset: float, samplerate: float, window_s: float) -> np.ndarray:
    a = max(0, int(np.floor(onset - 0.0005 * samplerate)))
    b = min(L, int(np.ceil(onset + window_s * samplerate)))
    w = np.zeros(L)
    if b > a:
        w[a:b] = dsp.tukey(b - a, 0.2)
    return w


def crlb_s(template_wave: np.ndarray, samplerate: float, noise_sigma: float) -> float:
    """Cramér-Rao bound (s, RMS) on the arrival time of a known pulse in white noise.

    var(tau) >= sigma^2 / sum((ds/dt)^2) in sampled form (Kay 1993, Fundamentals of
    Statistical Signal Processing I, example on range estimation; from memory).  The
    derivative is taken spectrally, which is exact for a band-limited pulse.
    """
    n = len(template_wave)
    nfft = 1 << int(np.ceil(np.log2(2 * n)))
    X = np.fft.rfft(template_wave, nfft)
    f = np.fft.rfftfreq(nfft, 1 / samplerate)
    ds = np.fft.irfft(2j * np.pi * f * X, nfft)[:n]
    return float(noise_sigma / np.sqrt(np.sum(ds**2)))


def envelope_lag(a: np.ndarray, b: np.ndarray, samplerate: float, *, max_lag_s: float = 0.003) -> float:
    """Delay (samples, sub-sample) of the envelope of ``b`` relative to that of ``a``.

    Envelopes (Hilbert magnitude, smoothed over 0.2 ms) are compared instead of waveforms
    because the two coil polarities ring at slightly different frequencies: their
    waveforms drift apart within a few cycles while their envelopes keep the same shape.
    """
    ea = _envelope(a, samplerate, 0.0002)
    eb = _envelope(b, samplerate, 0.0002)
    m = int(max_lag_s * samplerate)
    n = len(ea)
    nfft = 1 << int(np.ceil(np.log2(2 * n)))
    c = np.fft.irfft(np.fft.rfft(eb, nfft) * np.conj(np.fft.rfft(ea, nfft)), nfft)
    lags = np.concatenate([np.arange(0, m + 1), np.arange(-m, 0)])
    vals = np.concatenate([c[: m + 1], c[-m:]])
    i = int(np.argmax(vals))
    L = int(lags[i])
    y0, y1, y2 = c[(L - 1) % nfft], c[L % nfft], c[(L + 1) % nfft]
    den = y0 - 2 * y1 + y2
    frac = 0.5 * (y0 - y2) / den if den < 0 else 0.0
    return float(L + max(-0.5, min(0.5, frac)))
