"""Each polarity's steps averaged coherently, for a ring-down measured where single steps drown (pure)."""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .dsp import fast_len, t_ppf
from .humremoval import EDGE_S, ring_frequency_hz
from .stepdecay import StepDecay, window_decay


# -- each polarity's coherent average -----------------------------------------------------------------

@dataclass(frozen=True)
class CoherentResult:
    """The ring-down of a polarity's coherent average."""

    decay: StepDecay
    ci95_ms: float  # half-width of the 95 % interval of decay.decay_ms (nan: too few steps)
    steps: int  # steps averaged


class CoherentDecay:
    """Each polarity's steps averaged coherently, for a ring-down measured where single steps drown.

    A step is offered by :func:`step_ringdown` (its cleaned snippet and sub-sample time) and added
    when :meth:`commit` says so (the analyzer leaves out clipped, badly matched and abnormal steps).
    The window from 1 ms before each step's time to 84 ms after it is added into one of ``FRACTIONS``
    sums by the fractional part of its time, so that no step needs a transform of its own: each sum
    is shifted by its fraction's centre once, when the average is asked for (the alignment is then
    good to 1/16 of a sample).  Uncorrelated noise falls as 1/N in power; the average's noise floor is
    the steps' mean noise power over N.  The steps go round ``GROUPS`` interleaved groups, and the
    95 % interval is a jackknife over them (leave one group out: (G-1)/G times the sum of squared
    deviations of the G decay times, with Student's t at G-1 degrees of freedom).
    """

    GROUPS = 10
    BEFORE_S = 0.001
    LENGTH_S = 0.084  # at most; as long as the first step of the polarity allows (less 2 ms)
    MIN_STEPS = 4

    def __init__(self, samplerate: float):
        self.samplerate = float(samplerate)
        self.hum_hz: float | None = None  # mains hum to remove from every step (set by the analyzer)
        self.fractions = 8 if samplerate <= 50000 else 4
        self.before = int(round(self.BEFORE_S * samplerate))
        self._ring_hz: dict[str, float] = {}
        self._pending: dict[float, tuple] = {}
        self.reset()

    def reset(self) -> None:
        """Forget every step (the grid was found again: what was averaged was not this movement)."""
        self._sums: dict[str, np.ndarray] = {}
        self._counts = {p: np.zeros(self.GROUPS, dtype=np.int64) for p in "AB"}
        self._noise = {p: np.zeros(self.GROUPS) for p in "AB"}
        self._pending.clear()
        self._cache: dict[str, tuple[int, CoherentResult | None]] = {}

    def ring_hz(self, polarity: str, x: np.ndarray, u: float) -> float:
        """The ring's frequency for this polarity, from the first 15 ms of the first step that asks
        (``x`` its snippet, ``u`` its time in samples of it)."""
        f = self._ring_hz.get(polarity)
        if f is None:
            i, w = max(0, int(u)), int(0.015 * self.samplerate)
            f = self._ring_hz[polarity] = ring_frequency_hz(x[i: i + w], x[-w:], self.samplerate)
        return f

    def steps(self, polarity: str) -> int:
        return int(self._counts[polarity].sum())

    def offer(self, t_s: float, polarity: str, x: np.ndarray, u: float, noise_power: float) -> None:
        """A step measured: its snippet ``x`` (cleaned), its time ``u`` in samples of ``x``."""
        self._pending[t_s] = (polarity, x, u, noise_power)

    def commit(self, t_s: float, use: bool = True) -> None:
        """The step offered at ``t_s`` is added to its polarity's average (``use``) or dropped."""
        got = self._pending.pop(t_s, None)
        if got is None or not use:
            return
        pol, x, u, noise = got
        if pol not in self._counts or not math.isfinite(noise):
            return
        n = int(math.floor(u))
        a = n - self.before
        end = len(x) - int(EDGE_S * self.samplerate)
        sums = self._sums.get(pol)
        if sums is None:
            length = min(int(round(self.LENGTH_S * self.samplerate)), end - a - int(0.002 * self.samplerate))
            if a < 0 or length < int(0.02 * self.samplerate):
                return
            sums = self._sums[pol] = np.zeros((self.GROUPS, self.fractions, length))
        if a < 0 or a + sums.shape[-1] > end:
            return
        b = min(int((u - n) * self.fractions), self.fractions - 1)
        cnt = self._counts[pol]
        g = int(cnt.sum()) % self.GROUPS
        sums[g, b] += x[a: a + sums.shape[-1]]
        cnt[g] += 1
        self._noise[pol][g] += noise

    def drop_pending(self) -> None:
        self._pending.clear()

    def _aligned(self, polarity: str) -> np.ndarray:
        """Per group, the sum of its steps with each fraction's sum shifted onto the whole sample."""
        S = self._sums[polarity]
        L = S.shape[-1]
        nfft = fast_len(L + 64)
        spec = np.fft.rfft(S, nfft, axis=-1)  # [G, F, nfft/2+1]
        w = 2 * math.pi * np.fft.rfftfreq(nfft)
        centres = (np.arange(self.fractions) + 0.5) / self.fractions
        # y(m) = x(m + d): the step's time moves from before + d to before
        spec *= np.exp(1j * np.outer(centres, w))[None, :, :]
        return np.fft.irfft(spec.sum(axis=1), nfft, axis=-1)[:, :L]

    def result(self, polarity: str) -> CoherentResult | None:
        """The coherent average's ring-down and its interval (None with fewer than MIN_STEPS steps)."""
        cnt = self._counts[polarity]
        n = int(cnt.sum())
        cached = self._cache.get(polarity)
        if cached is not None and cached[0] == n:
            return cached[1]
        out = None
        if n >= self.MIN_STEPS:
            A = self._aligned(polarity)
            total = A.sum(axis=0)
            nz = self._noise[polarity]
            rd = window_decay(total / n, self.samplerate, float(nz.sum()) / n / n)
            ci = float("nan")
            full = np.flatnonzero(cnt > 0)
            if math.isfinite(rd.decay_ms) and len(full) == self.GROUPS:
                taus = []
                for g in full:
                    m = n - int(cnt[g])
                    taus.append(window_decay((total - A[g]) / m, self.samplerate,
                                             float(nz.sum() - nz[g]) / m / m).decay_ms)
                taus = np.array(taus)
                if np.all(np.isfinite(taus)):
                    G = len(taus)
                    sd = math.sqrt((G - 1) / G * float(np.sum((taus - taus.mean()) ** 2)))
                    ci = t_ppf(0.975, G - 1) * sd
            out = CoherentResult(rd, ci, n)
        self._cache[polarity] = (n, out)
        return out
