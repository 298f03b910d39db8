"""Small signal-processing and statistics helpers on numpy (and scipy.special) alone.

``scipy.signal`` and ``scipy.stats`` take 1-2 s to import, longer than analysing a 10 minute
recording; the analysis path uses these instead (each checked against scipy in
tests/test_dsp.py).
"""
from __future__ import annotations

import math
from bisect import bisect_left, insort
from collections import deque

import numpy as np


def butter_highpass_sos(order: int, wn: float) -> np.ndarray:
    """Digital Butterworth high-pass as second-order sections (as ``scipy.signal.butter(..., output='sos')``).

    ``wn`` is the cut-off as a fraction of the Nyquist frequency.  Analog prototype, high-pass
    transform and bilinear transform with pre-warping (the textbook route; e.g. Oppenheim &
    Schafer, Discrete-Time Signal Processing, section 7.1; from memory).
    """
    if not 0 < wn < 1:
        raise ValueError(f"wn={wn!r}: expected 0 < wn < 1")
    fs = 2.0
    warped = 2 * fs * math.tan(math.pi * wn / fs)
    k = np.arange(order)
    p_proto = np.exp(1j * np.pi * (2 * k + order + 1) / (2 * order))  # left half-plane poles
    p = warped / p_proto  # low-pass -> high-pass: s -> wc / s (zeros at s = 0)
    gain = float(np.real(1.0 / np.prod(-p_proto)))
    fs2 = 2 * fs
    pz = (fs2 + p) / (fs2 - p)  # bilinear transform; the zeros at s = 0 map to z = 1
    gain *= float(np.real(fs2**order / np.prod(fs2 - p)))  # the bilinear transform's gain
    real = pz[np.abs(pz.imag) <= 1e-12].real
    upper = pz[pz.imag > 1e-12]  # one pole of each conjugate pair
    upper = upper[np.argsort(upper.imag)]
    sections = [[1.0, -1.0, 0.0, 1.0, -z, 0.0] for z in real]
    sections += [[1.0, -2.0, 1.0, 1.0, -2 * z.real, abs(z) ** 2] for z in upper]
    sos = np.array(sections, dtype=np.float64)
    sos[0, :3] *= gain
    return sos


def line_fit(x: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """Least-squares slope and intercept of y against x (closed form: np.polyfit costs ~10x more
    on the short arrays of the per-step work)."""
    x = np.asarray(x, dtype=np.float64)
    xm, ym = x.mean(), float(np.mean(y))
    dx = x - xm
    b = float(np.dot(dx, y - ym) / np.dot(dx, dx))
    return b, float(ym - b * xm)


class RollingWindow:
    """The last ``maxlen`` values, kept in arrival order and in sorted order, so that the median
    and the median absolute deviation of a running window cost a few binary searches rather
    than a sort per value (the same numbers as ``statistics.median`` on the window)."""

    def __init__(self, maxlen: int):
        self.maxlen = maxlen
        self._fifo: deque = deque()
        self._sorted: list[float] = []

    def __len__(self) -> int:
        return len(self._fifo)

    def __iter__(self):
        return iter(self._fifo)

    def append(self, v: float) -> None:
        if len(self._fifo) == self.maxlen:
            old = self._fifo.popleft()
            del self._sorted[bisect_left(self._sorted, old)]
        self._fifo.append(v)
        insort(self._sorted, v)

    def order_stat(self, i: int) -> float:
        """The i-th smallest value (from 0)."""
        return self._sorted[i]

    def median(self) -> float:
        s = self._sorted
        n = len(s)
        if not n:
            raise ValueError("median of an empty window")
        return s[n // 2] if n % 2 else (s[n // 2 - 1] + s[n // 2]) / 2

    def median_abs_deviation(self, center: float) -> float:
        """The median of |v - center| over the window (unscaled).

        The deviations of the values below ``center`` and of those at or above it are two sorted
        runs; the smallest k + 1 of their union take i from the first run, found by bisection."""
        s = self._sorted
        n = len(s)
        if not n:
            raise ValueError("median of an empty window")
        c = center
        idx = bisect_left(s, c)
        n_lo, n_hi = idx, n - idx  # run lengths: deviations c - s[idx-1-i] and s[idx+j] - c
        k = n // 2  # the (k+1) smallest hold the median (and, for even n, the one before it)
        a, b = max(0, k + 1 - n_hi), min(k + 1, n_lo)
        while a < b:
            i = (a + b) // 2
            j = k + 1 - i
            if j > 0 and i < n_lo and c - s[idx - 1 - i] < s[idx + j - 1] - c:
                a = i + 1  # the low run's next deviation is smaller than the high run's last taken
            else:
                b = i
        i, j = a, k + 1 - a
        lo1 = c - s[idx - i] if i >= 1 else -math.inf  # the largest taken from each run
        hi1 = s[idx + j - 1] - c if j >= 1 else -math.inf
        if lo1 >= hi1:
            kth = lo1
            second = max(c - s[idx - i + 1] if i >= 2 else -math.inf, hi1)
        else:
            kth = hi1
            second = max(s[idx + j - 2] - c if j >= 2 else -math.inf, lo1)
        return kth if n % 2 else (second + kth) / 2


class MovingLine:
    """A least-squares line through the last ``maxlen`` points (x, y), kept up to date as points
    arrive: running sums about an anchor point, taken anew from the stored points every
    ``maxlen`` arrivals so that the subtractions of departed points cannot pile up rounding.
    A few operations a point instead of a pass over the window (the tracker refits at every step)."""

    def __init__(self, maxlen: int):
        self._pts: deque = deque(maxlen=maxlen)
        self._since = 0
        self._x0 = self._y0 = 0.0
        self._sx = self._sy = self._sxx = self._sxy = 0.0

    def __len__(self) -> int:
        return len(self._pts)

    def _resum(self) -> None:
        self._x0, self._y0 = self._pts[-1] if self._pts else (0.0, 0.0)
        self._sx = self._sy = self._sxx = self._sxy = 0.0
        for x, y in self._pts:
            dx, dy = x - self._x0, y - self._y0
            self._sx += dx
            self._sy += dy
            self._sxx += dx * dx
            self._sxy += dx * dy
        self._since = 0

    def append(self, x: float, y: float) -> None:
        pts = self._pts
        if len(pts) == pts.maxlen:
            ox, oy = pts[0]
            dx, dy = ox - self._x0, oy - self._y0
            self._sx -= dx
            self._sy -= dy
            self._sxx -= dx * dx
            self._sxy -= dx * dy
        pts.append((x, y))
        self._since += 1
        if self._since >= pts.maxlen or len(pts) == 1:
            self._resum()
            return
        dx, dy = x - self._x0, y - self._y0
        self._sx += dx
        self._sy += dy
        self._sxx += dx * dx
        self._sxy += dx * dy

    def extend(self, points) -> None:
        for x, y in points:
            self.append(x, y)

    def fit(self) -> tuple[float, float]:
        """(slope, the line's value at the newest point's x); needs two distinct x."""
        n = len(self._pts)
        xm, ym = self._sx / n, self._sy / n
        sxx = self._sxx - self._sx * xm
        b = (self._sxy - self._sx * ym) / sxx
        x_last = self._pts[-1][0] - self._x0
        return b, self._y0 + ym + b * (x_last - xm)


def sos_power_response(sos: np.ndarray, nfft: int) -> np.ndarray:
    """|H(e^jw)|^2 of second-order sections at the rfft bins of length ``nfft``.

    Multiplying a spectrum by it is filtering forward and backward (zero phase).
    """
    w = 2 * np.pi * np.arange(nfft // 2 + 1) / nfft
    z1 = np.exp(-1j * w)
    z2 = z1 * z1
    h = np.ones(len(w), dtype=np.complex128)
    for b0, b1, b2, a0, a1, a2 in sos:
        h *= (b0 + b1 * z1 + b2 * z2) / (a0 + a1 * z1 + a2 * z2)
    return (h.real**2 + h.imag**2).astype(np.float64)


def fast_len(n: int) -> int:
    """The smallest 2^a 3^b 5^c >= n (a length numpy's FFT handles quickly)."""
    best = 1 << int(math.ceil(math.log2(max(n, 1))))
    f5 = 1
    while f5 < best:
        f35 = f5
        while f35 < best:
            v = f35
            while v < n:
                v *= 2
            best = min(best, v)
            f35 *= 3
        f5 *= 5
    return best


def analytic_envelope(x: np.ndarray) -> np.ndarray:
    """|x + j H{x}|: the magnitude of the analytic signal (as ``abs(scipy.signal.hilbert(x))``)."""
    x = np.asarray(x, dtype=np.float64)
    n = len(x)
    if n == 0:
        return x.copy()
    X = np.fft.fft(x)
    h = np.zeros(n)
    if n % 2 == 0:
        h[0] = h[n // 2] = 1.0
        h[1: n // 2] = 2.0
    else:
        h[0] = 1.0
        h[1: (n + 1) // 2] = 2.0
    return np.abs(np.fft.ifft(X * h))


def tukey(n: int, alpha: float = 0.5) -> np.ndarray:
    """Tapered cosine window (as ``scipy.signal.windows.tukey``)."""
    if n <= 0:
        return np.zeros(0)
    if n == 1 or alpha <= 0:
        return np.ones(n)
    if alpha >= 1:
        return 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(n) / (n - 1))
    x = np.arange(n) / (n - 1)
    w = np.ones(n)
    lo = x < alpha / 2
    hi = x > 1 - alpha / 2
    w[lo] = 0.5 * (1 + np.cos(np.pi * (2 * x[lo] / alpha - 1)))
    w[hi] = 0.5 * (1 + np.cos(np.pi * (2 * x[hi] / alpha - 2 / alpha + 1)))
    return w


def welch_psd(x: np.ndarray, fs: float, nperseg: int) -> tuple[np.ndarray, np.ndarray]:
    """Averaged periodogram, Hann window, half overlap, mean removed per segment (Welch 1967)."""
    x = np.asarray(x, dtype=np.float64)
    nperseg = min(nperseg, len(x))
    step = max(1, nperseg // 2)
    win = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(nperseg) / nperseg)  # periodic Hann
    starts = range(0, len(x) - nperseg + 1, step)
    acc = np.zeros(nperseg // 2 + 1)
    n = 0
    for s in starts:
        seg = x[s: s + nperseg]
        acc += np.abs(np.fft.rfft((seg - seg.mean()) * win)) ** 2
        n += 1
    psd = acc / max(n, 1) / (fs * np.sum(win**2))
    psd[1:-1] *= 2
    return np.fft.rfftfreq(nperseg, 1 / fs), psd


def levinson(r: np.ndarray, order: int) -> np.ndarray:
    """Prediction coefficients a[1..order] from autocorrelations r[0..order] (Levinson-Durbin).

    Solves the Toeplitz system ``R a = -r[1:]`` (as ``scipy.linalg.solve_toeplitz(r[:order], -r[1:])``).
    """
    r = np.asarray(r, dtype=np.float64)
    a = np.zeros(order)
    err = r[0]
    if err <= 0:
        raise np.linalg.LinAlgError("non-positive zero-lag autocorrelation")
    for m in range(order):
        acc = r[m + 1] + np.dot(a[:m], r[m:0:-1])
        k = -acc / err
        a[:m] = a[:m] + k * a[:m][::-1]
        a[m] = k
        err *= 1 - k * k
        if err <= 0:
            raise np.linalg.LinAlgError("the autocorrelation is not positive definite")
    return a


def t_ppf(p: float, df: float) -> float:
    """Quantile of Student's t (as ``scipy.stats.t.ppf``).

    From 8 degrees of freedom on, the Cornish-Fisher expansion around the normal quantile
    (Abramowitz & Stegun 26.7.5; from memory; within 1e-4 relative of scipy there, tested)
    spares the import of scipy.special; below, scipy.special.stdtrit.
    """
    if df >= 8:
        from statistics import NormalDist

        z = NormalDist().inv_cdf(p)
        z2 = z * z
        g1 = (z2 + 1) * z / 4
        g2 = ((5 * z2 + 16) * z2 + 3) * z / 96
        g3 = (((3 * z2 + 19) * z2 + 17) * z2 - 15) * z / 384
        g4 = ((((79 * z2 + 776) * z2 + 1482) * z2 - 1920) * z2 - 945) * z / 92160
        return float(z + g1 / df + g2 / df**2 + g3 / df**3 + g4 / df**4)
    from scipy.special import stdtrit

    return float(stdtrit(df, p))


def chi2_ppf(p, df):
    """Quantile of the chi-squared distribution (as ``scipy.stats.chi2.ppf``); arrays allowed."""
    from scipy.special import chdtri

    return chdtri(df, 1.0 - np.asarray(p, dtype=np.float64))


def betainc_reg(a: float, b: float, x: float) -> float:
    """The regularized incomplete beta function I_x(a, b) (as ``scipy.special.betainc``).

    Its continued fraction evaluated by the modified Lentz method, on the side of x where it
    converges fast (Numerical Recipes, 2nd ed., section 6.4, ``betai``/``betacf``; from memory;
    tested against scipy to 1e-12).  Pure Python: importing scipy.special takes about half a second,
    longer than analysing a short recording.
    """
    if not (a > 0 and b > 0):
        raise ValueError("betainc_reg needs a > 0 and b > 0")
    if x <= 0.0:
        return 0.0
    if x >= 1.0:
        return 1.0
    if x > (a + 1.0) / (a + b + 2.0):
        return 1.0 - betainc_reg(b, a, 1.0 - x)
    log_front = math.lgamma(a + b) - math.lgamma(a) - math.lgamma(b) + a * math.log(x) + b * math.log1p(-x)
    tiny = 1e-300
    c, d = 1.0, 1.0 - (a + b) * x / (a + 1.0)
    d = 1.0 / (d if abs(d) > tiny else tiny)
    f = d
    for m in range(1, 10000):
        for num in (m * (b - m) * x / ((a + 2 * m - 1) * (a + 2 * m)),
                    -(a + m) * (a + b + m) * x / ((a + 2 * m) * (a + 2 * m + 1))):
            d = 1.0 + num * d
            d = 1.0 / (d if abs(d) > tiny else tiny)
            c = 1.0 + num / c
            c = c if abs(c) > tiny else tiny
            f *= c * d
        if abs(c * d - 1.0) < 1e-15:
            break
    return math.exp(log_front) * f / a


def binom_sf(k: int, n: int, p: float) -> float:
    """P(X > k) for X ~ Binomial(n, p) (as ``scipy.stats.binom.sf``): I_p(k + 1, n - k)."""
    if k < 0:
        return 1.0
    if k >= n:
        return 0.0
    return betainc_reg(k + 1.0, float(n - k), float(p))


def f_sf(F: float, df1: float, df2: float) -> float:
    """P(X > F) for X ~ F(df1, df2) (as ``scipy.stats.f.sf``): I_{df2/(df2 + df1 F)}(df2/2, df1/2)."""
    if F <= 0:
        return 1.0
    return betainc_reg(df2 / 2.0, df1 / 2.0, df2 / (df2 + df1 * F))
