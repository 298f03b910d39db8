"""Logic regulation (inhibition): once per period the divider swallows oscillator pulses.

One step interval per period is longer by n/32768 s (or n/8192 s) and the others are short:
the crystal runs fast on purpose (NXP PCA2002 datasheet Rev. 8, word A: "number of the 8192 Hz
pulses to be removed", calibration period 1 or 2 minutes; Philips PCA16xx: "Every minute a
jitter occurs as a result of time calibration").  Pure functions over step numbers and times.
"""
from __future__ import annotations

import dataclasses
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
#: The false-alarm probability a recording without logic regulation runs of being said to have
#: it: the search's p-value, corrected for every period and phase tried, must fall below this.
ALPHA = 1e-3
#: Each interval's evidence is clipped at this many (robust) standard deviations, so that no
#: single interval -- a knock, a codec's shift of the step times -- can decide the test alone.
CLIP_SIGMA = 5.0


def detect_inhibition(k: np.ndarray, t: np.ndarray, nominal_s: float, *, clock_ppm: float = 0.0,
                      clock_ppm_u95: float = 0.0, alpha: float = ALPHA, min_periods: int = 2) -> Inhibition | None:
    """Find a periodic lengthening of one step interval (logic regulation), tested against the noise.

    The intervals of consecutive steps (the two polarities' difference removed) are turned into
    the evidence of a lengthening that is not undone by the next or the last interval (a step
    timed late lengthens one interval and shortens the next: no correction of the divider does
    that), standardised by their own robust spread and clipped at ``CLIP_SIGMA``.  They are folded
    at every period M from 2 s (3 steps) up to half the record (``min_periods`` corrections at
    least) and ``MAX_PERIOD_S``; at the true period one phase holds every correction.  Each
    period's best phase is tested against the rest of the intervals (its neighbours left out), in
    two ways whose larger p-value counts: the normal tail of its mean excess, and the chance that
    the phase's every interval is as long as its shortest when drawn from the recording's own
    other intervals (the noise's own long intervals, whatever their distribution).  The p-value is
    that times the number of (period, phase) hypotheses tried (Bonferroni); logic regulation is
    found when it is below ``alpha`` and the correction is at least half a 32768 Hz pulse.
    Returns the model at the best period (:func:`_regulation_model`), with its p-value.
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
        m0, m1 = np.median(d[par == 0]), np.median(d[par == 1])
        d = d - np.where(par == 0, m0, m1)
    else:
        d = d - np.median(d)
    w = _uncompensated(kd, d)
    found = _fold_test(kd, w, nominal_s, int(k.max() - k.min()), min_periods)
    if found is None:
        return None
    p, m, j, hypotheses = found
    if p >= alpha:
        return None
    inh, res = _regulation_model(k, t, m, j, nominal_s, clock_ppm, clock_ppm_u95, kd, 0.0)
    if not _staircase_shape(k, res, m, inh.correction_us * 1e-6):
        return None
    # The model of the step times must hold the correction as clearly: a lengthening that is
    # later undone (a drive that weakens every minute and strengthens after a failure moves the
    # step sounds late and back) fits no staircase, and its t statistic, with the residuals'
    # correlation allowed for, falls short of the same corrected bar.
    p_times = min(1.0, hypotheses * 0.5 * math.erfc(inh.z_score / math.sqrt(2.0))) if math.isfinite(inh.z_score) else 0.0
    p = max(p, p_times)
    if p >= alpha:
        return None
    # The smallest correction a 32768 Hz divider can make is one pulse, 30.5 us; anything
    # under half of that is not logic regulation.
    if inh.correction_us * 1e-6 < 0.5 / CRYSTAL_HZ:
        return None
    return dataclasses.replace(inh, p_value=float(p), hypotheses=int(hypotheses))


def _z_of(p: float, hypotheses: int) -> float:
    """The one-sided normal deviate of the uncorrected p-value (for the record)."""
    from statistics import NormalDist

    q = min(max(p / max(hypotheses, 1), 1e-300), 0.5)
    if q < 1e-15:  # beyond NormalDist's reach: the tail's asymptote
        return math.sqrt(-2 * math.log(q) - math.log(-2 * math.log(q)) - math.log(2 * math.pi))
    return -NormalDist().inv_cdf(q)


def _uncompensated(kd: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Each interval's lengthening that the intervals beside it do not undo.

    A step timed late (a knock over it, a slipped cycle) lengthens its interval and shortens the
    next by as much; one timed early, the other way round.  A correction of the divider
    lengthens one interval only.  So the evidence of an interval is its excess less the larger
    shortening of its neighbours (when they were heard): ``d[b] + min(0, d[b-1], d[b+1])``.
    """
    w = d.copy()
    for off in (-1, 1):
        nb = kd + off
        pos = np.clip(np.searchsorted(kd, nb), 0, len(kd) - 1)
        has = kd[pos] == nb
        w = w + np.where(has, np.minimum(0.0, d[pos]), 0.0)
    return w


#: The folded step times must follow the staircase of logic regulation to within this share of
#: its correction (or of their own noise, whichever is larger; our own margin).
SHAPE_TOLERANCE = 0.25


def _staircase_shape(k: np.ndarray, res: np.ndarray, m: int, jump_s: float) -> bool:
    """Whether the step times, folded at the period, are the staircase of logic regulation: a
    single jump a period, flat between jumps (the crystal's own rate).

    Any timing that repeats with a period correlates with the staircase -- an unbalanced seconds
    hand loads the motor differently at each second of its turn, and the step sounds come later
    on the climb and earlier on the way down -- but only logic regulation leaves nothing else
    once the staircase is fitted.  The model's residuals are folded at the period (the median of
    each phase); none may stray from zero by more than ``SHAPE_TOLERANCE`` of the correction,
    or 5 standard errors of that median (from the step-to-step timing noise) where more.
    """
    ph = k % m
    adj = np.diff(k) == 1
    dr = np.diff(res)[adj]
    if len(dr) < 8:
        return True
    sigma = 1.4826 * float(np.median(np.abs(dr - np.median(dr)))) / math.sqrt(2.0)
    order = np.argsort(ph, kind="stable")
    cuts = np.flatnonzero(np.diff(ph[order])) + 1
    for grp in np.split(order, cuts):
        if len(grp) < 2:
            continue
        r = abs(float(np.median(res[grp])))
        allow = max(SHAPE_TOLERANCE * abs(jump_s), 5.0 * 1.2533 * sigma / math.sqrt(len(grp)))
        if r > allow:
            return False
    return True


def _fold_test(kd: np.ndarray, w: np.ndarray, step_s: float, span_steps: int, min_periods: int):
    """The period whose best phase stands out most, tested: (p, period in steps, phase, hypotheses)
    or None.  See :func:`detect_inhibition`."""
    med = float(np.median(w))
    sigma = max(1.4826 * float(np.median(np.abs(w - med))), 0.1e-6)
    v = (w - med) / sigma  # standardised evidence
    u = np.clip(v, -CLIP_SIGMA, CLIP_SIGMA)
    n_all = len(u)
    # Periods up to half the record (two corrections heard), and no longer than 30 minutes:
    # published periods run from seconds to about 20 minutes (see the domain notes); each period
    # costs a pass over every interval, so an unbounded search grows with the square of the
    # record's length.  From 3 steps up: a 2-step period cannot be told from the two polarities
    # sounding apart.
    m_lo = max(3, int(math.ceil(2.0 / step_s)))
    m_hi = min((span_steps + 1) // max(min_periods, 2), int(MAX_PERIOD_S / step_s))
    if m_hi < m_lo:
        return None
    hypotheses = sum(range(m_lo, m_hi + 1))
    s_all = float(u.sum())
    best = None
    for m in range(m_lo, m_hi + 1):
        ph = kd % m
        cnt = np.bincount(ph, minlength=m).astype(np.float64)
        sums = np.bincount(ph, weights=u, minlength=m)
        # the phase and its neighbours (whose evidence shares steps with it) against the rest
        near_c = cnt + np.roll(cnt, 1) + np.roll(cnt, -1)
        near_s = sums + np.roll(sums, 1) + np.roll(sums, -1)
        no = n_all - near_c
        ok = (cnt >= min_periods) & (no >= 2)
        if not np.any(ok):
            continue
        mj = np.where(ok, sums / np.maximum(cnt, 1), -np.inf)
        mo = np.where(ok, (s_all - near_s) / np.maximum(no, 1), 0.0)
        sd = float(np.std(u)) or 1.0
        z = np.where(ok, (mj - mo) / (sd * np.sqrt(1.0 / np.maximum(cnt, 1) + 1.0 / np.maximum(no, 1))), -np.inf)
        j = int(np.argmax(z))
        if not np.isfinite(z[j]) or z[j] <= 0:
            continue
        p_norm = 0.5 * math.erfc(z[j] / math.sqrt(2.0))
        mem = ph == j
        far = ~(mem | (ph == (j + 1) % m) | (ph == (j - 1) % m))
        x_min = float(v[mem].min())
        q = float(np.count_nonzero(v[far] >= x_min)) / max(int(far.sum()), 1)
        p = min(1.0, hypotheses * max(p_norm, q ** int(cnt[j])))
        if best is None or p < best[0] or (p == best[0] and z[j] > best[4]):
            best = (p, m, j, hypotheses, float(z[j]))
    return None if best is None else best[:4]


def _regulation_model(k: np.ndarray, t: np.ndarray, m: int, j: int, nominal_s: float, clock_ppm: float,
                      clock_ppm_u95: float, kd: np.ndarray, z: float) -> Inhibition:
    """One model of the step times at the found period and phase:
    t = a + b_fast k + J n(k) + c [k odd], n(k) the number of corrections before step k, fitted
    robustly (Tukey's biweight by iterated reweighting: a few steps timed a ring cycle off, or a
    stretch of them, pulled the least-squares correction 6 % small).  The regulated (mean)
    interval is b_fast + J/m; variances from the weighted fit, inflated for residuals correlated
    from step to step (AR(1): ``(1 + rho) / (1 - rho)``).  Returns the correction's own t
    statistic in ``z_score`` (J over its standard error)."""
    kk = k.astype(np.float64)
    ncorr = np.floor((k - j) / m) - np.floor((k.min() - j) / m)
    X = np.vstack([np.ones_like(kk), kk - kk.mean(), ncorr - ncorr.mean(), (k % 2) - 0.5]).T
    wts = np.ones(len(t))
    coef = np.linalg.lstsq(X, t, rcond=None)[0]
    for it in range(30):
        res = t - X @ coef
        inl = wts > 0
        s = max(1.4826 * float(np.median(np.abs(res[inl] - np.median(res[inl])))), 1e-8)
        u = res / ((1.345 if it < 3 else 4.685) * s)
        # a few Huber steps first (convex: no wrong local solution), then the biweight
        new = np.minimum(1.0, 1.0 / np.maximum(np.abs(u), 1e-12)) if it < 3 else np.where(np.abs(u) < 1, (1 - u * u) ** 2, 0.0)
        if np.count_nonzero(new > 0) < max(8, len(t) // 2):
            break  # no clear majority of steps on the model: keep the last fit
        sw = np.sqrt(new)
        nxt = np.linalg.lstsq(X * sw[:, None], t * sw, rcond=None)[0]
        done = it >= 3 and np.allclose(nxt, coef, rtol=0, atol=1e-10)
        coef, wts = nxt, new
        if done:
            break
    res = t - X @ coef
    dof = max(float(wts.sum()) - 4, 1.0)
    s2 = float(np.sum(wts * res * res)) / dof
    cov = np.linalg.pinv((X * wts[:, None]).T @ X) * s2
    # residuals correlated from one step to the next (a stretch timed off together): inflate
    keep = wts > 0.5
    pair = keep[:-1] & keep[1:] & (np.diff(k) == 1)
    rho = 0.0
    if np.count_nonzero(pair) >= 8:
        r0, r1 = res[:-1][pair], res[1:][pair]
        rho = float(np.sum(r0 * r1) / max(np.sqrt(np.sum(r0 * r0) * np.sum(r1 * r1)), 1e-300))
        rho = min(max(rho, 0.0), 0.98)
    cov = cov * (1 + rho) / (1 - rho)
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
    J = float(coef[2])
    se = math.sqrt(max(float(cov[2, 2]), 0.0))
    inh = Inhibition(
        period_s=m * nominal_s,
        period_steps=m,
        correction_us=J * 1e6,
        correction_ci95_us=q * se * 1e6,
        pulses_32768=J * CRYSTAL_HZ,
        pulses_8192=J * 8192,
        crystal_rate_s_per_day=crystal,
        regulated_rate_s_per_day=reg,
        regulated_ci95_s_per_day=reg_ci,
        periods_observed=int(np.count_nonzero((kd % m) == j)),
        z_score=J / se if se > 0 else math.inf,
        phase_step=j,
    )
    return inh, res
