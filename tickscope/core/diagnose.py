"""Quartz movement diagnostics from the step record (pure functions over arrays).

* Inhibition (logic regulation): once per period the divider swallows oscillator pulses,
  so one step interval is longer by n/32768 s (or n/8192 s) and the others are short:
  the crystal runs fast on purpose (NXP PCA2002 datasheet Rev. 8, word A: "number of the
  8192 Hz pulses to be removed", calibration period 1 or 2 minutes; Philips PCA16xx:
  "Every minute a jitter occurs as a result of time calibration").
* End-of-life stepping: steps in bursts (PCA16xx: "bursts of 4 pulses are produced every
  4 s"; two steps every 2 s is also documented in consumer watch manuals).
* Failed steps, correction pulses, adaptive drive levels, anomalies locked to a wheel's
  position, polarity asymmetry; and the plain-words reading built from them.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import dsp
from ..units import CRYSTAL_HZ, SECONDS_PER_DAY

#: Longest logic-regulation period in the watch-IC datasheets we know (PCA2002: 2 minutes).
LONGEST_KNOWN_PERIOD_S = 120.0
#: Largest correction a crystal within +-20 ppm needs per 120 s period (20e-6 * 120 s = 2.4 ms;
#: +-20 ppm is the usual tuning-fork crystal tolerance, CTS TF20 / Epson FC-135 datasheets).
UNSEEN_CORRECTION_S = 20e-6 * LONGEST_KNOWN_PERIOD_S


@dataclass(frozen=True)
class Inhibition:
    period_s: float
    period_steps: int
    correction_us: float
    correction_ci95_us: float
    pulses_32768: float
    pulses_8192: float
    crystal_rate_s_per_day: float
    regulated_rate_s_per_day: float
    regulated_ci95_s_per_day: float
    periods_observed: int
    z_score: float
    phase_step: int  # step number (mod period) whose interval carries the correction


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
    span_steps = int(k.max() - k.min())
    best = None
    step_s = nominal_s
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
    if best is None or best[0] < z_min:
        return None
    # The smallest correction a 32768 Hz divider can make is one pulse, 30.5 us; anything
    # under half of that is not logic regulation.
    if best[3] < 0.5 / CRYSTAL_HZ:
        return None
    z, m, j, excess, se = best
    # One least-squares model of the step times: t = a + b_fast k + J n(k) + c [k odd], with
    # n(k) the number of corrections before step k.  The regulated (mean) interval is
    # b_fast + J/m, and its variance comes from the model's covariance.
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
        z_score=float(z),
        phase_step=j,
    )


@dataclass(frozen=True)
class Bursts:
    steps_per_burst: int
    burst_period_s: float
    spacing_ms: float


def detect_bursts(step_k: np.ndarray, sec_k: np.ndarray, sec_delay_s: np.ndarray, interval_s: float) -> Bursts | None:
    """Steps delivered in groups: every slot of a 2-4 s grid holds 1-3 more step-like sounds at a fixed spacing."""
    if interval_s < 1.5 or len(step_k) < 3:
        return None
    if not len(sec_k):
        return None
    per_slot = np.array([np.count_nonzero(sec_k == kk) for kk in step_k])
    extra = int(np.median(per_slot))
    if extra < 1 or np.mean(per_slot == extra) < 0.7:
        return None
    n = extra + 1
    if abs(interval_s / n - 1.0) > 0.02:  # bursts of n one-second steps every n seconds
        return None
    firsts = [float(np.min(sec_delay_s[sec_k == kk])) for kk in step_k if np.any(sec_k == kk)]
    return Bursts(n, interval_s, float(np.median(firsts)) * 1e3)


@dataclass(frozen=True)
class DriveLevel:
    level_dbfs: float
    share: float
    steps: int


def drive_levels(peaks_dbfs: np.ndarray, *, min_gap_db: float = 2.0, min_share: float = 0.05) -> tuple[list[DriveLevel], int]:
    """Cluster step levels into drive levels; returns the levels and the number of level changes."""
    p = np.asarray(peaks_dbfs, dtype=np.float64)
    p = p[np.isfinite(p)]
    if len(p) < 10:
        return [], 0
    order = np.sort(p)
    gaps = np.flatnonzero(np.diff(order) >= min_gap_db)
    edges = [order[0] - 1] + [0.5 * (order[g] + order[g + 1]) for g in gaps] + [order[-1] + 1]
    levels = []
    for a, b in zip(edges[:-1], edges[1:]):
        sel = (p > a) & (p <= b)
        if sel.sum() >= max(3, min_share * len(p)):
            levels.append(DriveLevel(float(np.median(p[sel])), float(sel.mean()), int(sel.sum())))
    if len(levels) < 2:
        return levels, 0
    centers = np.array([lv.level_dbfs for lv in levels])
    lab = np.argmin(np.abs(np.asarray(peaks_dbfs)[:, None] - centers[None, :]), axis=1)
    # count changes that last at least 5 steps
    changes = 0
    cur = lab[0]
    run = 0
    for v in lab[1:]:
        if v != cur:
            run += 1
            if run >= 5:
                changes += 1
                cur = v
                run = 0
        else:
            run = 0
    return levels, changes


@dataclass(frozen=True)
class PositionLock:
    period_steps: int
    positions: list[int]
    count: int


def position_locked(anomaly_k: np.ndarray, span_steps: int, *, periods=(60,), min_count: int = 3) -> PositionLock | None:
    """Anomalies that repeat at the same step number modulo a wheel's revolution.

    Chance coincidence is judged with a binomial tail: with n anomalies spread over P
    positions, how likely is one position to collect this many?
    """
    a = np.asarray(anomaly_k, dtype=np.int64)
    if len(a) < min_count:
        return None
    best = None
    for P in periods:
        if span_steps < 2 * P:
            continue
        cnt = np.bincount(a % P, minlength=P)
        top = np.flatnonzero(cnt >= max(min_count, 0.25 * len(a)))
        if not len(top):
            continue
        c = int(cnt[top].sum())
        # probability that some position gets >= max count by chance
        pval = min(1.0, P * dsp.binom_sf(int(cnt.max()) - 1, len(a), 1.0 / P))
        if pval < 1e-3 and (best is None or c > best.count):
            best = PositionLock(P, [int(x) for x in top], c)
    return best


def polarity_asymmetry(k: np.ndarray, t: np.ndarray, *, min_pairs: int = 8,
                       min_group: int = 3) -> tuple[float, float] | None:
    """Mean A->B interval minus mean B->A interval (us) and its 95 % half-width.

    None with fewer than ``min_pairs`` consecutive step pairs or ``min_group`` in either direction.
    """
    k = np.asarray(k)
    t = np.asarray(t, dtype=np.float64)
    adj = np.flatnonzero(np.diff(k) == 1)
    if len(adj) < min_pairs:
        return None
    d = t[adj + 1] - t[adj]
    from_a = (k[adj] % 2) == 0
    a, b = d[from_a], d[~from_a]
    if len(a) < max(min_group, 2) or len(b) < max(min_group, 2):
        return None
    diff = float(a.mean() - b.mean())
    se = math.sqrt(a.var(ddof=1) / len(a) + b.var(ddof=1) / len(b))
    return diff * 1e6, 1.96 * se * 1e6


@dataclass(frozen=True)
class OtherClock:
    interval_s: float  # its own tick interval, on the recording's time base
    ticks: int  # sounds that lie on its grid
    level_db: float  # median level of its ticks minus that of the steps
    drift_ms_per_min: float  # how fast its ticks move against the steps


def _loudest_after(t: np.ndarray, pk: np.ndarray, first: np.ndarray, span_s: float) -> np.ndarray:
    """For each sound ``first[i]``, the loudest peak among the sounds from it to ``span_s`` later: a
    tick's level is its loudest impact's, as a step's is, not that of whatever it began with (a
    gate's hiss, a faint first contact)."""
    order = np.argsort(t, kind="stable")
    ts, ps = t[order], pk[order]
    lo = np.searchsorted(ts, t[first], side="left")
    hi = np.searchsorted(ts, t[first] + span_s, side="right")
    return np.array([ps[a:b].max() for a, b in zip(lo, hi)])


def _line_with_alternation(n: np.ndarray, t: np.ndarray, alternation: bool = True) -> tuple[float, np.ndarray]:
    """Least-squares t = a + b n (+ c [n odd] with ``alternation``): the slope b and the residuals
    (with one parity only, a plain line)."""
    odd = (np.asarray(n) % 2).astype(np.float64)
    cols = [np.ones(len(n)), np.asarray(n, dtype=np.float64)]
    if alternation and 0 < odd.sum() < len(odd):
        cols.append(odd)
    A = np.stack(cols, axis=1)
    coef = np.linalg.lstsq(A, t, rcond=None)[0]
    return float(coef[1]), t - A @ coef


def other_clock(other_t: np.ndarray, other_peak_dbfs: np.ndarray, step_k: np.ndarray, step_t: np.ndarray,
                step_peak_dbfs: np.ndarray, *, window_s: float = 600.0, tolerance_s: float = 0.015) -> OtherClock | None:
    """A second ticking sound among the sounds that are not steps (another clock in the room).

    Sounds tied to the steps (a hand's bounce, an echo, a burst) keep a fixed delay after each
    step: those whose delay falls in a crowded 5 ms bin of the step period are set aside first.
    What is left is searched for a grid of its own within half a percent of the steps' interval
    (a quartz clock keeps within a few hundred ppm) over the last ``window_s``: at each trial
    period the sounds' phases are counted in 5 ms bins (a Hough-style vote); the interval is then
    fitted by least squares through the sounds within ``tolerance_s`` of the best grid.  Its
    ticks must move against the steps by 5 ms or more over the window, else they cannot be told
    from sounds tied to the steps.
    """
    other_t = np.asarray(other_t, dtype=np.float64)
    other_peak_dbfs = np.asarray(other_peak_dbfs, dtype=np.float64)
    step_t = np.asarray(step_t, dtype=np.float64)
    step_k = np.asarray(step_k)
    if len(other_t) < 10 or len(step_t) < 10:
        return None
    end = float(max(other_t[-1], step_t[-1]))
    sel = other_t >= end - window_s
    t, pk = other_t[sel], other_peak_dbfs[sel]
    st_sel = step_t >= end - window_s
    sk, st = step_k[st_sel], step_t[st_sel]
    spk = np.asarray(step_peak_dbfs, dtype=np.float64)[st_sel]
    if len(t) < 10 or len(st) < 10:
        return None
    interval_s, a0 = dsp.line_fit(sk - sk[0], st)
    nb = max(2, int(interval_s / 0.005))  # 5 ms bins of the cycle, here and in the search below
    # set aside the sounds tied to the steps: crowded delays after the step grid
    delay_bin = np.minimum((np.mod(t - a0, interval_s) / interval_s * nb).astype(np.int64), nb - 1)
    crowded = np.bincount(delay_bin, minlength=nb) > max(5, 0.2 * len(st))
    crowded = crowded | np.roll(crowded, 1) | np.roll(crowded, -1)
    keep = ~crowded[delay_bin]
    t, pk = t[keep], pk[keep]
    if len(t) < 10:
        return None
    span = float(t[-1] - t[0])
    if span < 8 * interval_s:
        return None
    # trial periods within +-0.5 % of the steps' interval, spaced so that the ends of the span
    # move by at most 5 ms between neighbours; at each, the sounds' phases are counted in 5 ms
    # bins and the fullest 10 ms (two bins) scores it -- a count, so that clutter elsewhere in the
    # cycle (noise, knocks, the reverberation of the steps) cannot pull the phase as a mean would
    dp = 0.005 * interval_s / span
    half = int(0.005 * interval_s / dp)
    trials = interval_s + dp * np.arange(-half, half + 1)
    tr = t - t[0]
    best_n, best_p, best_bin = 0, None, 0
    for chunk in np.array_split(trials, max(1, len(trials) * len(tr) // 2_000_000 + 1)):
        ph = np.mod(tr[None, :], chunk[:, None]) / chunk[:, None]
        bins = np.minimum((ph * nb).astype(np.int64), nb - 1) + nb * np.arange(len(chunk))[:, None]
        counts = np.bincount(bins.ravel(), minlength=nb * len(chunk)).reshape(len(chunk), nb)
        pair = counts + np.roll(counts, -1, axis=1)
        i, j = np.unravel_index(int(np.argmax(pair)), pair.shape)
        if pair[i, j] > best_n:
            best_n, best_p, best_bin = int(pair[i, j]), float(chunk[i]), int(j)
    # the fullest cell must stand far above what the same number of sounds at random phases
    # would put in the fullest of this many cells (Poisson mean lam; 6 sigma and 3 more: our margin)
    lam = len(tr) * 2.0 / nb
    if best_p is None or best_n < max(10, 0.3 * len(st), lam + 6.0 * math.sqrt(lam) + 3.0):
        return None
    # the sounds on that grid (the earliest of each tick), and a line through them
    phase = (best_bin + 1.0) / nb * best_p  # the middle of the fullest two bins
    n = np.round((tr - phase) / best_p)
    on = np.flatnonzero(np.abs(tr - phase - n * best_p) <= tolerance_s)
    _, first = np.unique(n[on], return_index=True)
    idx = on[first]
    # a clock ticks every time: most of the span's ticks must be heard (noise lining up by chance
    # fills a grid only here and there)
    need = max(10, 0.3 * len(st), 0.6 * span / best_p)
    if len(idx) < need:
        return None
    # a clock's ticks sit tight on their line (a spread of 2 ms at most in the sweep of simulated
    # phone recordings, even timed against the other clock's templates); sounds of a noisy stretch
    # that happen to fall in the window spread evenly over it (3.7 ms for +-5 ms): keep the ticks
    # within 5 ms, ask for most of them again, and for a spread (1.4826 MAD) of 3 ms at most.  The
    # other clock is a stepping motor too: its two polarities may sound apart by several ms (two
    # real step sounds of one clock: 9.5 ms between their first sounds), so the line carries an
    # offset between alternate ticks (tried when a plain line does not fit: the simulated sweep's
    # second clocks, whose polarities sound alike, fitted a little better without it).
    found = None
    for alternation in (False, True):
        b, res = _line_with_alternation(n[idx], tr[idx], alternation)
        tight = np.abs(res) <= 0.005
        if np.count_nonzero(tight) < need:
            continue
        b, res = _line_with_alternation(n[idx[tight]], tr[idx[tight]], alternation)
        if 1.4826 * float(np.median(np.abs(res - np.median(res)))) <= 0.003:
            found = b, idx[tight]
            break
    if found is None:
        return None
    b, idx = found
    drift_s = abs(b - interval_s) * span / interval_s
    if drift_s < 0.005:
        return None
    return OtherClock(interval_s=float(b), ticks=int(len(idx)),
                      level_db=float(np.median(_loudest_after(tr, pk, idx, 0.06)) - np.median(spk)),
                      drift_ms_per_min=float((b - interval_s) / interval_s * 60.0 * 1e3))
