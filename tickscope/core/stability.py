"""Time-and-frequency stability of a step train: time interval error and Allan deviation (pure).

Step k of a movement with nominal interval ``tau0`` should sound at ``t_first + (k - k_first) tau0``.
Its *time interval error* (TIE, IEEE Std 1139-2008 / ITU-T G.810) is the difference
``x_k = t_k - t_first - (k - k_first) tau0``: the phase data of NIST SP 1065.  A movement
that gains has a falling ``x`` (its steps come early); the slope is the rate.

The overlapping Allan deviation (NIST SP 1065, section 5.2.4) of phase data at spacing tau0,
for tau = m tau0::

    AVAR(tau) = sum_i (x[i+2m] - 2 x[i+m] + x[i])^2 / (2 tau^2 (N - 2m))

A log has holes: missed steps, rejected stretches, gaps between segments.  The phase of a
missing step is NaN here; every second difference that touches a NaN is left out and the
sum is divided by the number of terms kept, and segments are pooled by adding their sums and
counts.  On gap-free data this is exactly the textbook estimator (tested against allantools
and the NBS test sets).

Confidence intervals use the chi-squared distribution with the "simple" equivalent degrees
of freedom of Howe, Allan and Barnes (1981) as tabulated in NIST SP 1065 (Table 11, from
memory), for the noise type read off the slope of the deviation itself.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError
from . import dsp


def phase_from_steps(steps: np.ndarray, times_s: np.ndarray, tau0_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Phase (time error) data on a regular grid from numbered step times.

    Returns ``(k_grid, x_s)``: every step number from the first to the last, and its time
    error against the nominal grid started at the first step; NaN where no step was timed.
    """
    k = np.asarray(steps, dtype=np.int64)
    t = np.asarray(times_s, dtype=np.float64)
    if k.shape != t.shape or k.ndim != 1:
        raise ParameterError("steps and times_s must be 1-D arrays of the same length")
    if len(k) == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0)
    order = np.argsort(k, kind="stable")
    k, t = k[order], t[order]
    k0 = int(k[0])
    grid = np.arange(k0, int(k[-1]) + 1, dtype=np.int64)
    x = np.full(len(grid), np.nan)
    x[k - k0] = t - t[0] - (k - k0) * tau0_s
    return grid, x


@dataclass(frozen=True)
class AdevSums:
    """Pooled overlapping-AVAR sums for a list of averaging factors (additive across segments)."""

    m: np.ndarray  # averaging factors
    sum_sq: np.ndarray  # sum of squared second differences, s^2
    count: np.ndarray  # number of second differences

    def __add__(self, other: "AdevSums") -> "AdevSums":
        if not np.array_equal(self.m, other.m):
            raise ParameterError("AdevSums over different averaging factors cannot be pooled")
        return AdevSums(self.m, self.sum_sq + other.sum_sq, self.count + other.count)


def octave_factors(n_points: int, max_fraction: float = 0.25) -> np.ndarray:
    """Averaging factors 1, 2, 4, ... up to ``max_fraction`` of the data length."""
    top = max(1, int(n_points * max_fraction))
    return 2 ** np.arange(0, int(math.log2(top)) + 1) if top >= 1 else np.array([1])


def oadev_sums(x_s: np.ndarray, m_list) -> AdevSums:
    """Sums of squared overlapping second differences of phase data (NaN = missing)."""
    x = np.asarray(x_s, dtype=np.float64)
    m_arr = np.asarray(list(m_list), dtype=np.int64)
    ss = np.zeros(len(m_arr))
    cnt = np.zeros(len(m_arr), dtype=np.int64)
    for j, m in enumerate(m_arr):
        if m < 1:
            raise ParameterError(f"averaging factor {m}: expected >= 1")
        if len(x) <= 2 * m:
            continue
        d = x[2 * m:] - 2.0 * x[m:-m] + x[: -2 * m]
        ok = np.isfinite(d)
        ss[j] = float(np.dot(d[ok], d[ok]))
        cnt[j] = int(np.count_nonzero(ok))
    return AdevSums(m_arr, ss, cnt)


@dataclass(frozen=True)
class AllanResult:
    tau_s: np.ndarray
    deviation: np.ndarray
    lower: np.ndarray  # 95 % interval
    upper: np.ndarray
    n_terms: np.ndarray
    edf: np.ndarray
    alpha: np.ndarray  # power-law noise exponent used for the interval (2 white PM ... -2 random-walk FM)


def oadev_from_sums(sums: AdevSums, tau0_s: float, n_points: int, *, ci: float = 0.95) -> AllanResult:
    """Overlapping Allan deviation with chi-squared intervals from pooled sums.

    ``n_points`` is the number of phase points behind the sums (for the degrees of freedom).
    """
    ok = sums.count > 0
    m = sums.m[ok]
    tau = m * tau0_s
    avar = sums.sum_sq[ok] / (2.0 * tau**2 * sums.count[ok])
    dev = np.sqrt(avar)
    alpha = noise_alpha_from_slope(tau, dev)
    edf = np.array([edf_simple(n_points, int(mm), int(a)) for mm, a in zip(m, alpha)])
    lo, hi = chi2_interval(dev, edf, ci)
    return AllanResult(tau, dev, lo, hi, sums.count[ok], edf, alpha)


def oadev(x_s: np.ndarray, tau0_s: float, m_list=None, *, ci: float = 0.95) -> AllanResult:
    """Overlapping Allan deviation of phase data (NaN = missing), octave-spaced by default."""
    x = np.asarray(x_s, dtype=np.float64)
    if m_list is None:
        m_list = octave_factors(len(x))
    return oadev_from_sums(oadev_sums(x, m_list), tau0_s, len(x), ci=ci)


def noise_alpha_from_slope(tau: np.ndarray, dev: np.ndarray) -> np.ndarray:
    """Dominant power-law noise per tau from the local log-log slope mu of the deviation.

    sigma ~ tau^(mu/2): mu = -2 white/flicker PM (alpha 2 or 1), -1 white FM (0), 0 flicker FM (-1),
    +1 random-walk FM (-2) (NIST SP 1065, Table 4; from memory).  White and flicker PM share a
    slope; the one with fewer degrees of freedom (flicker PM) is taken, so the interval errs wide.
    """
    n = len(tau)
    alpha = np.zeros(n, dtype=int)
    if n == 0:
        return alpha
    lt, ld = np.log(tau), np.log(np.maximum(dev, 1e-300))
    for i in range(n):
        lo, hi = max(0, i - 1), min(n - 1, i + 1)
        mu = 2.0 * (ld[hi] - ld[lo]) / (lt[hi] - lt[lo]) if hi > lo else -1.0
        if mu < -1.5:
            alpha[i] = 1
        elif mu < -0.5:
            alpha[i] = 0
        elif mu < 0.5:
            alpha[i] = -1
        else:
            alpha[i] = -2
    return alpha


def edf_simple(n_points: int, m: int, alpha: int) -> float:
    """Equivalent degrees of freedom of the overlapping Allan variance.

    Howe, Allan & Barnes (1981) "simple" approximations as given in NIST SP 1065 (section 5.3,
    from memory), for phase data of N points, averaging factor m and noise exponent alpha.
    """
    N, m = float(n_points), float(m)
    if N - 2 * m < 1:
        return 1.0
    if alpha == 2:
        edf = (N + 1) * (N - 2 * m) / (2 * (N - m))
    elif alpha == 1:
        edf = math.exp(math.sqrt(math.log((N - 1) / (2 * m)) * math.log((2 * m + 1) * (N - 1) / 4))) \
            if (N - 1) / (2 * m) > 1 else 1.0
    elif alpha == 0:
        edf = (3 * (N - 1) / (2 * m) - 2 * (N - 2) / N) * 4 * m**2 / (4 * m**2 + 5)
    elif alpha == -1:
        edf = 2 * (N - 2) ** 2 / (2.3 * N - 4.9) if m == 1 else 5 * N**2 / (4 * m * (N + 3 * m))
    elif alpha == -2:
        edf = (N - 2) / m * ((N - 1) ** 2 - 3 * m * (N - 1) + 4 * m**2) / (N - 3) ** 2
    else:
        raise ParameterError(f"alpha={alpha}: expected 2, 1, 0, -1 or -2")
    return float(max(edf, 1.0))


def chi2_interval(dev: np.ndarray, edf: np.ndarray, ci: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Chi-squared confidence interval of a deviation with ``edf`` degrees of freedom."""
    dev = np.asarray(dev, dtype=np.float64)
    edf = np.asarray(edf, dtype=np.float64)
    p = (1 - ci) / 2
    lo = dev * np.sqrt(edf / dsp.chi2_ppf(1 - p, edf))
    hi = dev * np.sqrt(edf / dsp.chi2_ppf(p, edf))
    return lo, hi


@dataclass(frozen=True)
class TieSummary:
    """Time interval error over a log (s)."""

    final_s: float  # accumulated time error at the last step (negative: the movement gained)
    peak_to_peak_s: float  # of the raw TIE
    detrended_rms_s: float  # after removing the mean rate (what the rate line does not explain)
    detrended_peak_to_peak_s: float


def tie_summary(k: np.ndarray, x_s: np.ndarray) -> TieSummary:
    """Summary of phase data x (NaN = missing) at grid numbers k."""
    ok = np.isfinite(x_s)
    if ok.sum() < 3:
        nan = float("nan")
        return TieSummary(nan, nan, nan, nan)
    kk, xx = np.asarray(k, dtype=np.float64)[ok], np.asarray(x_s)[ok]
    A = np.vstack([np.ones_like(kk), kk - kk.mean()]).T
    coef, *_ = np.linalg.lstsq(A, xx, rcond=None)
    r = xx - A @ coef
    return TieSummary(float(xx[-1]), float(xx.max() - xx.min()), float(np.sqrt(np.mean(r**2))),
                      float(r.max() - r.min()))


def tie_rms(x_s: np.ndarray, m: int) -> float:
    """TIE-rms at lag m: sqrt(mean((x[i+m] - x[i])^2)), without removing the mean (ITU-T G.810 form)."""
    x = np.asarray(x_s, dtype=np.float64)
    if len(x) <= m:
        return float("nan")
    d = x[m:] - x[:-m]
    d = d[np.isfinite(d)]
    return float(np.sqrt(np.mean(d * d))) if len(d) else float("nan")
