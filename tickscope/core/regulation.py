"""Logic regulation (inhibition): once per period the divider swallows oscillator pulses.

One step interval per period is longer by n/32768 s (or n/8192 s) and the others are short:
the crystal runs fast on purpose (NXP PCA2002 datasheet Rev. 8, word A: "number of the 8192 Hz
pulses to be removed", calibration period 1 or 2 minutes; Philips PCA16xx: "Every minute a
jitter occurs as a result of time calibration").  Pure functions over step numbers and times.
"""
from __future__ import annotations

import math

import numpy as np

from . import dsp
from ..model import Inhibition
from ..units import CRYSTAL_HZ, SECONDS_PER_DAY

#: Longest logic-regulation period in the watch-IC datasheets we know (PCA2002: 2 minutes).
LONGEST_KNOWN_PERIOD_S = 120.0
#: Largest correction a crystal within +-20 ppm needs per 120 s period (20e-6 * 120 s = 2.4 ms;
#: +-20 ppm is the usual tuning-fork crystal tolerance, CTS TF20 / Epson FC-135 datasheets).
UNSEEN_CORRECTION_S = 20e-6 * LONGEST_KNOWN_PERIOD_S




def unseen_correction_ci95_s_per_day(ci95_s_per_day: float, span_s: float) -> float:
    """A rate's 95 % half-width widened for a logic-regulation correction not yet heard.

    Over less than two of the longest known periods a correction may still come: the
    half-width grows (in quadrature) by the largest usual correction over the span.
    Returned unchanged for spans of two periods or more.
    """
    if span_s >= 2 * LONGEST_KNOWN_PERIOD_S:
        return ci95_s_per_day
    return math.hypot(ci95_s_per_day, SECONDS_PER_DAY * UNSEEN_CORRECTION_S / max(span_s, 1.0))


#: the longest inhibition period searched (s)
MAX_PERIOD_S = 1800.0


def detect_inhibition(k: np.ndarray, t: np.ndarray, nominal_s: float, *, clock_ppm: float = 0.0,
                      clock_ppm_u95: float = 0.0, z_min: float = 7.0, min_periods: int = 2) -> Inhibition | None:
    """Find a periodic lengthening of one step interval (logic regulation).

    The intervals of consecutive steps are folded at every candidate period M (2 s up to a
    fifth of the record and at most ``MAX_PERIOD_S``, in steps); at the true period one phase
    holds all corrections.
    The score is that phase's mean excess over the other phases in standard errors; the
    period with the highest score wins, and it must exceed ``z_min`` (many periods and
    phases are tried, so the bar is high).
    """
    k = np.asarray(k)
    t = np.asarray(t, dtype=np.float64)
    if len(k) < 20:
        return None
    adj = np.flatnonzero(np.diff(k) == 1)
    if len(adj) < 20:
        return None
    d = t[adj + 1] - t[adj]
    kd = k[adj + 1]  # the interval ending at step kd
    # the two coil polarities may sound a little apart: remove the A->B / B->A difference first
    par = kd % 2
    if np.any(par == 0) and np.any(par == 1):
        m0, m1, mall = np.mean(d[par == 0]), np.mean(d[par == 1]), np.mean(d)
        d = d - np.where(par == 0, m0, m1) + mall
    best = _fold_search(kd, d, nominal_s, int(k.max() - k.min()), min_periods)
    if best is None or best[0] < z_min:
        return None
    # The smallest correction a 32768 Hz divider can make is one pulse, 30.5 us; anything
    # under half of that is not logic regulation.
    if best[3] < 0.5 / CRYSTAL_HZ:
        return None
    z, m, j = best[0], best[1], best[2]
    return _regulation_model(k, t, m, j, nominal_s, clock_ppm, clock_ppm_u95, kd, float(z))


def _fold_search(kd: np.ndarray, d: np.ndarray, step_s: float, span_steps: int, min_periods: int):
    """The fold of the intervals ``d`` (ending at steps ``kd``) whose one phase stands out most:
    (z, period in steps, phase, excess s, its standard error), or None."""
    best = None
    # Periods up to a fifth of the record, and no longer than 30 minutes: published periods run
    # from seconds to about 20 minutes (see the domain notes); each period costs a pass over
    # every interval, so an unbounded search grows with the square of the record's length.
    max_m = max(2, min((span_steps + 1) // 5, int(MAX_PERIOD_S / step_s)))
    # per-phase means and variances from sums (centred first, so the sums of squares lose nothing)
    dc = d - d.mean()
    dc2 = dc * dc
    n_all, s_all, q_all = len(dc), float(dc.sum()), float(dc2.sum())
    floor2 = (0.1e-6) ** 2
    # Periods from 3 steps up: a 2-step period cannot be told from the two polarities sounding apart.
    for m in range(max(3, int(math.ceil(2.0 / step_s))), max_m + 1):
        ph = kd % m
        cnt = np.bincount(ph, minlength=m)
        ok = cnt > 0
        if np.count_nonzero(ok) < 2:
            continue
        sums = np.bincount(ph, weights=dc, minlength=m)
        means = np.where(ok, sums / np.maximum(cnt, 1), -np.inf)
        j = int(np.argmax(means))
        nj = int(cnt[j])
        if nj < min_periods or nj == n_all:
            continue
        no = n_all - nj
        sj = float(sums[j])
        qj = float(np.bincount(ph, weights=dc2, minlength=m)[j])
        mj, mo = sj / nj, (s_all - sj) / no
        excess = mj - mo
        if m % 2 == 0:
            excess /= 1.0 - 2.0 / m  # the polarity step above took 2/m of it away
        # within-group scatter: at a wrong period the corrections spread over the phases and
        # inflate it; at the true period both groups are as tight as the timing jitter
        var_j = qj / nj - mj * mj
        var_o = (q_all - qj) / no - mo * mo
        se = math.sqrt(max(var_j, floor2) / nj + max(var_o, floor2) / no)
        z = excess / se
        if best is None or z > best[0]:
            best = (z, m, j, excess, se)
    return best


def _regulation_model(k: np.ndarray, t: np.ndarray, m: int, j: int, nominal_s: float, clock_ppm: float,
                      clock_ppm_u95: float, kd: np.ndarray, z: float) -> Inhibition:
    """One least-squares model of the step times at the found period and phase:
    t = a + b_fast k + J n(k) + c [k odd], n(k) the number of corrections before step k.
    The regulated (mean) interval is b_fast + J/m; its variance comes from the model's covariance."""
    kk = k.astype(np.float64)
    ncorr = np.floor((k - j) / m) - np.floor((k.min() - j) / m)
    X = np.vstack([np.ones_like(kk), kk - kk.mean(), ncorr - ncorr.mean(), (k % 2) - 0.5]).T
    coef, *_ = np.linalg.lstsq(X, t, rcond=None)
    res = t - X @ coef
    dof = max(len(t) - 4, 1)
    s2 = float(res @ res) / dof
    cov = np.linalg.pinv(X.T @ X) * s2
    g = np.array([0.0, 1.0, 1.0 / m, 0.0])  # d(mean interval)/d(coef)
    mean_iv = coef[1] + coef[2] / m
    var_iv = float(g @ cov @ g)
    scale = 1.0 + clock_ppm * 1e-6
    reg = SECONDS_PER_DAY * (nominal_s * scale / mean_iv - 1)
    q = dsp.t_ppf(0.975, dof)
    reg_ci = math.hypot(q * math.sqrt(var_iv) * SECONDS_PER_DAY * nominal_s * scale / mean_iv**2,
                        clock_ppm_u95 * 1e-6 * SECONDS_PER_DAY)
    reg_ci = max(reg_ci, 0.001)
    crystal = SECONDS_PER_DAY * (nominal_s * scale / coef[1] - 1)
    excess = float(coef[2])
    se = math.sqrt(float(cov[2, 2]))
    J = excess
    return Inhibition(
        period_s=m * nominal_s,
        period_steps=m,
        correction_us=J * 1e6,
        correction_ci95_us=1.96 * se * 1e6,
        pulses_32768=J * CRYSTAL_HZ,
        pulses_8192=J * 8192,
        crystal_rate_s_per_day=crystal,
        regulated_rate_s_per_day=reg,
        regulated_ci95_s_per_day=reg_ci,
        periods_observed=int(np.count_nonzero((kd % m) == j)),
        z_score=z,
        phase_step=j,
    )
