"""The audio device's sample clock against the host clock, from per-block readings (pure).

What a reading is.  Each captured block carries the sample index of its first sample and the
host's monotonic clock when the block reached the program.  That host time marks the moment the
block's *last* sample was handed over, and it is late by two things:

- the delivery wait.  A device (or a sound server) hands audio over in chunks of its own: a USB
  packet, a DMA period, a sound server's block.  A reader that takes whatever has arrived ends its
  last block where the chunk ends, so that block waits for nothing.  A reader of fixed-size blocks
  (``listen`` and ``log`` read 2048 frames) ends its blocks anywhere inside a chunk, and a block
  waits for the rest of its chunk: up to one block's duration, drifting slowly when the block is
  close to a multiple of the chunk.  On the PulseAudio null sink, blocks of 2048 frames against
  chunks of 2047 made the least delay fall by one frame per block, which a line through the
  least-delayed readings took for a clock 488 ppm fast (measured: the sink paced +19.5 ppm, seen
  by a second client, while 2048-frame blocks read +507).  No line through host times alone can
  tell that drift from a rate within a run shorter than the beat, so for fixed-size blocks the
  interval carries its worst case (the wait lies between 0 and one block), unless the driver's
  capture times of the blocks, which do not wait, show the drift to be smaller.
- a scheduling delay that is never negative and varies by milliseconds, with bursts: several
  blocks handed over at once after a stall.

So the run is cut into segments and in each the reading with the least delay is kept (minimum-
delay filtering, the idea of NTP's clock filter; from memory); a line through those gives the
device's rate.  Abrupt changes of the least delay cut the run into stretches, each with its own
offset and a common rate: host clock steps (an NTP step, a suspend and resume; at least
``step_threshold_s``), smaller delivery shifts (another program joining a sound server moved the
least delay by 9 ms on the loopback), and lost audio (the sample index jumps past the previous
block's end: the length of what was lost is only estimated).  They are looked for on the lower
envelope of the readings (the least delay per window), which a late block never moves, so a burst
is not taken for a step.

The 95 % interval is the largest of three readings of the least delays' scatter (least squares
with their lag-one correlation, a line through the means of eighths, and a white-plus-wander
model fitted to the residuals), combined with a wander of the least delay slower than the run
can show (FLOOR_WANDER_S), plus the worst case of the blocks' wait for fixed-size blocks.  The
stream's first seconds needed no special care in the host times (measured: within 0.1 ms of the
later least delay from the first block on); the driver's capture times did.

Sign: ``ppm > 0`` means the device samples fast: it really runs at
``nominal * (1 + ppm * 1e-6)`` Hz, so a movement timed on it looks slow by that much.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from . import dsp
from ..errors import ParameterError
from ..units import s_per_day_to_ppm

#: The least delay must change by at least this much (s), and by 8 times the envelope's own
#: scatter, to be taken for a delivery shift (our own choice: the sink's 9 ms shifts stand well
#: clear of it, the envelope's scatter on a quiet machine is 0.1-0.3 ms).
MIN_SHIFT_S = 0.002
_SHIFT_SIGMAS = 8.0

#: The least delay also wanders over seconds, which a run of tens of seconds cannot tell from a
#: rate: its line takes the wander up.  Our own measurement (600 s through the PulseAudio null
#: sink on a shared 2-core machine, least delay per second about the run's line): 53 us white,
#: plus 46 us rms correlated over about 7 s.  Every fit carries at least this much wander
#: (rounded up), and more when its own readings show more.
FLOOR_WANDER_S = 50e-6
FLOOR_WANDER_TIME_S = 10.0

#: The driver's capture times settle for this long after a stream starts (see _adc_line).
ADC_SETTLE_S = 30.0


@dataclass(frozen=True)
class ClockFit:
    ppm: float
    ci95_ppm: float  # 95 % half-width: the statistical part plus the delivery-wait bound
    span_s: float
    n_blocks: int
    n_used: int  # least-delayed readings the line goes through
    delay_rms_ms: float  # rms of every reading's delay above the least-delayed reading of its stretch
    steps: list[tuple[float, float]] = field(default_factory=list)  # (host time, jump s) of host clock steps
    shifts: list[tuple[float, float]] = field(default_factory=list)  # (host time, change s) of delivery shifts
    gaps: int = 0  # stretches begun after lost audio
    ci95_statistical_ppm: float = float("nan")  # from the scatter of the least-delayed readings
    wait_bound_ppm: float = 0.0  # worst case of the delivery wait of fixed-size blocks (part of ci95_ppm)
    blocks: str = "unknown"  # "fixed" (block_frames each), "as delivered", or "unknown"
    block_frames: int | None = None
    pick_rms_ms: float = float("nan")  # scatter of the least-delayed readings about the line
    n_dropped: int = 0  # readings of stretches too short to say anything
    adc_ppm: float = float("nan")  # the line through the driver's capture times (fixed-size blocks only)

    def needed_span_s(self, target_ppm: float) -> float:
        """About how long a run gives a 95 % half-width of ``target_ppm``.

        The least delays scatter the same however long the run, and the delivery wait is bounded
        by a block, so both parts of the half-width fall as 1/span.
        """
        if not (self.ci95_ppm > 0 and self.span_s > 0 and target_ppm > 0):
            return float("nan")
        return self.span_s * self.ci95_ppm / target_ppm


def _block_kind(start: np.ndarray, frames: np.ndarray | None, block_frames: int | None,
                samplerate: float) -> tuple[str, int | None]:
    """Whether the blocks are of one fixed size (and which), as delivered, or unknown."""
    if block_frames is not None:
        return ("fixed", int(block_frames)) if block_frames > 0 else ("as delivered", None)
    if frames is not None:
        f = frames.astype(np.int64)
    else:
        d = np.diff(start).astype(np.int64)
        d = d[d > 0]
        if not len(d):
            return "unknown", None
        if np.median(d) > 0.25 * samplerate:
            # thinned readings (a log keeps one per window): what divides every distance is the block
            g = int(np.gcd.reduce(d))
            return ("fixed", g) if g >= 32 else ("unknown", None)
        f = d
    vals, counts = np.unique(f, return_counts=True)
    mode = int(vals[np.argmax(counts)])
    if counts.max() >= 0.9 * len(f) and mode > 0:
        return "fixed", mode
    return "as delivered", None


def _window_minima(x: np.ndarray, r: np.ndarray, width_s: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per window of device time: first index, index of the least residual, and that residual."""
    wid = np.floor((x - x[0]) / width_s).astype(np.int64)
    first = np.flatnonzero(np.r_[True, wid[1:] != wid[:-1]])
    sizes = np.diff(np.r_[first, len(x)])
    if len(first) > 2 and sizes[-1] < 0.5 * np.median(sizes):
        first = first[:-1]  # a short last window's least reading is no least delay: join it to the one before
    bounds = np.r_[first, len(x)]
    arg = np.array([a + int(np.argmin(r[a:b])) for a, b in zip(bounds[:-1], bounds[1:])])
    return first, arg, r[arg]


def _find_breaks(x: np.ndarray, r: np.ndarray, step_threshold_s: float,
                 lost: np.ndarray, wait_s: float) -> tuple[list[int], list[int], list[int], float]:
    """Indices j where a new stretch begins (reading j is the first after the break): host clock
    steps, delivery shifts, lost audio; and the slope of the envelope (s per device s)."""
    span = x[-1] - x[0]
    gap = np.diff(x)
    typical = float(np.median(gap)) if len(gap) else 0.0
    width = max(span / 256.0, 8.0 * typical, 0.2)
    first, arg, m = _window_minima(x, r, width)
    if len(m) < 3:
        return [], [], [int(j) for j in np.flatnonzero(lost) + 1], 0.0
    dx = np.diff(x[arg])
    dm = np.diff(m)
    ok = dx > 0
    slope = float(np.median(dm[ok] / dx[ok])) if ok.any() else 0.0
    d = dm - slope * dx
    mad = 1.4826 * float(np.median(np.abs(d - np.median(d))))
    thr_shift = max(MIN_SHIFT_S, _SHIFT_SIGMAS * mad)
    steps, shifts = [], []
    bounds = np.r_[first, len(x)]
    for i in np.flatnonzero(np.abs(d) > min(thr_shift, step_threshold_s)):
        # the break lies within windows i and i+1.  Readings after it never lie below the later
        # level (less the envelope's noise), readings before it never below the earlier one
        a, b = bounds[i], bounds[min(i + 2, len(bounds) - 1)]
        xs = x[a:b]
        before = m[i] + slope * (xs - x[arg[i]])
        after = m[i + 1] + slope * (xs - x[arg[i + 1]])
        eps = min(abs(d[i]) / 2, max(4 * mad, 2e-4))
        rr = r[a:b]
        if d[i] > 0:  # the later level is higher: after the last reading below it
            below = np.flatnonzero(rr < after - eps)
            j = a + (int(below[-1]) + 1 if len(below) else 0)
        else:  # the later level is lower: at the first reading below the earlier one
            below = np.flatnonzero(rr < before - eps)
            j = a + (int(below[0]) if len(below) else b - a)
        if not 0 < j < len(x) or lost[max(a - 1, 0):b].any():
            continue  # lost audio breaks the stretch there already (its length is only estimated)
        big = abs(d[i]) >= max(step_threshold_s, 1.5 * wait_s)
        (steps if big else shifts).append(int(j))
    gaps = [int(j) for j in np.flatnonzero(lost) + 1]
    return sorted(set(steps)), sorted(set(shifts) - set(steps)), gaps, slope


def _wander_variance(t: np.ndarray, z: np.ndarray, design: np.ndarray, v: np.ndarray, span: float) -> float:
    """Variance of ``v @ z`` for a noise ``z`` that is white plus a wander correlated over some
    time, both read from the residuals' semivariogram.  The residuals of a fitted line show less
    of a slow wander than there is (the line has taken part of it up), so the model is fitted to
    what its residuals would show, ``(I - H) C (I - H)`` with H the fit's hat matrix: a white part
    and an exponentially correlated part, their sizes by non-negative least squares over lag
    bins, the correlation time the best on a grid (residual maximum likelihood's idea, reduced to
    moments; our own simplification)."""
    from scipy.optimize import nnls

    n = len(t)
    i, j = np.triu_indices(n, 1)
    lag = np.abs(t[j] - t[i])
    if n < 8 or not np.any(lag > 0):
        return float(v @ v) * float(np.var(z))
    half_sq = 0.5 * (z[j] - z[i]) ** 2
    lo = float(np.min(lag[lag > 0]))
    edges = np.geomspace(lo, max(span, lo * 1.01) * 1.0001, 13)
    b = np.clip(np.searchsorted(edges, lag, side="right") - 1, 0, len(edges) - 2)
    counts = np.bincount(b, minlength=len(edges) - 1).astype(float)
    has = counts > 0
    emp = np.bincount(b, weights=half_sq, minlength=len(edges) - 1)[has] / counts[has]
    M = np.eye(n) - design @ np.linalg.pinv(design)
    dt = np.abs(t[:, None] - t[None, :])

    def expected(C):
        R = M @ C @ M
        d = np.diag(R)
        pair = 0.5 * (d[i] + d[j]) - R[i, j]
        return np.bincount(b, weights=pair, minlength=len(edges) - 1)[has] / counts[has]

    white = expected(np.eye(n))
    sw = np.sqrt(counts[has])
    best = None
    for ell in np.geomspace(lo, 2 * span, 12):
        K = np.exp(-dt / ell)
        X = np.column_stack([white, expected(K)]) * sw[:, None]
        coef, res = nnls(X, emp * sw)
        if best is None or res < best[0]:
            best = (res, coef, K)
    _, (a0, a1), K = best
    return max(float(v @ (a0 * np.eye(n) + a1 * K) @ v), 0.0)


def _adc_fit(x0: np.ndarray, e: np.ndarray, st: np.ndarray, segments: int) -> tuple[float, float] | None:
    """Slope of ``e`` against ``x0`` and its standard error: the median per segment, a line
    through those with one offset per stretch, segments far off the line left out."""
    span = x0[-1] - x0[0]
    if span <= 0:
        return None
    seg = np.minimum(((x0 - x0[0]) / span * segments).astype(np.int64), segments - 1)
    key = st * (segments + 1) + seg
    keys = np.unique(key)
    if len(keys) < 8:
        return None
    mx = np.array([np.median(x0[key == k]) for k in keys])
    me = np.array([np.median(e[key == k]) for k in keys])
    ks = keys // (segments + 1)
    used = np.unique(ks)
    A = np.zeros((len(keys), 1 + len(used)))
    A[:, 0] = mx - mx.mean()
    A[np.arange(len(keys)), 1 + np.searchsorted(used, ks)] = 1.0
    keep = np.ones(len(keys), dtype=bool)
    for _ in range(5):  # a stream's first capture times are wild (measured: 0.6 s off for 1 s): left out
        coef, *_ = np.linalg.lstsq(A[keep], me[keep], rcond=None)
        res = me - A @ coef
        mad = 1.4826 * float(np.median(np.abs(res[keep])))
        new = np.abs(res) <= max(5 * mad, 1e-6)
        if (new == keep).all():
            break
        keep = new
    dof = int(keep.sum()) - A.shape[1]
    if dof < 4:
        return None
    cov = np.linalg.pinv(A[keep].T @ A[keep]) * float(res[keep] @ res[keep]) / dof
    return float(coef[0]), math.sqrt(max(float(cov[0, 0]), 0.0))


def _adc_line(x0: np.ndarray, adc: np.ndarray, stretch: np.ndarray, segments: int) -> tuple[float, float] | None:
    """The line through the driver's capture times (slope of capture time minus device time per
    device second, and its standard error), or None when they are too few or have not settled:
    after a stream starts they can creep towards their line for tens of seconds (measured on the
    loopback: a hump of 1.7 ms over the first 12 s, a creep of 1.6 ms over the first 30 s), so
    the first ADC_SETTLE_S are left out, at least as long again must follow, and the two halves of
    what follows must agree."""
    ok = np.isfinite(adc) & (adc != 0) & (x0 >= x0[0] + ADC_SETTLE_S)
    if ok.sum() < 64 or x0[ok][-1] - x0[ok][0] < ADC_SETTLE_S:
        return None
    x0, e, st = x0[ok], adc[ok] - x0[ok], stretch[ok]
    whole = _adc_fit(x0, e, st, segments)
    mid = 0.5 * (x0[0] + x0[-1])
    halves = [_adc_fit(x0[q], e[q], st[q], segments // 2) for q in (x0 < mid, x0 >= mid)]
    if whole is None or any(hv is None for hv in halves):
        return None
    (c1, s1), (c2, s2) = halves
    if abs(c1 - c2) > 3.0 * math.hypot(s1, s2) + 2e-7:
        return None
    return whole


def _least_delayed(e: np.ndarray, key: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The reading of least ``e`` in each group of ``key``, and how far above the floor such a
    least reading typically lies: the mean gap between the group's lowest five readings (near its
    floor a delay distribution's lowest order statistics are spaced by about the minimum's own
    excess, as for the exponential; our own estimator)."""
    order = np.lexsort((e, key))
    ks = key[order]
    starts = np.flatnonzero(np.r_[True, ks[1:] != ks[:-1]])
    sizes = np.diff(np.r_[starts, len(order)])
    k = np.minimum(4, sizes - 1)
    lo = e[order[starts]]
    hi = e[order[starts + k]]
    lift = np.where(k > 0, (hi - lo) / np.maximum(k, 1), np.nan)
    lift = np.where(np.isfinite(lift), lift, np.nanmedian(lift) if np.isfinite(lift).any() else 0.0)
    pick = order[starts]
    srt = np.argsort(pick)
    return pick[srt], lift[srt]


def fit_device_clock(start_sample: np.ndarray, host_time_s: np.ndarray, samplerate: float, *,
                     frames: np.ndarray | None = None, block_frames: int | None = None,
                     adc_time_s: np.ndarray | None = None, segments: int = 64,
                     step_threshold_s: float = 0.05) -> ClockFit:
    """Fit the device's sample-clock offset (ppm) from (first sample, host time) pairs of blocks.

    Parameters
    ----------
    start_sample : np.ndarray [shape=(n,)]
        Sample index of each block's first sample (gaps from overflows included).
    host_time_s : np.ndarray [shape=(n,)]
        Host monotonic clock when the block arrived, s.
    samplerate : float
        Nominal sample rate, Hz.
    frames : np.ndarray [shape=(n,)], optional
        Each block's length: the host time is then paired with the block's last sample, and a
        sample index that jumps past the previous block's end marks lost audio.
    block_frames : int, optional
        The reader's fixed block size (0: it takes what has arrived); inferred when not given.
    adc_time_s : np.ndarray [shape=(n,)], optional
        The driver's capture time of each block's first sample (PortAudio's inputBufferAdcTime),
        on any clock that runs at the host clock's rate.  It does not wait for the rest of a
        chunk, so for fixed-size blocks it says how far their wait can have drifted: the bound
        of a block is replaced by the disagreement of the two lines (with its uncertainty) when
        that is smaller.
    segments : int
        Number of stretches of the run in which the least-delayed block is kept.
    step_threshold_s : float
        A change of the least delay at least this large is a host clock step.
    """
    s = np.asarray(start_sample, dtype=np.float64)
    h = np.asarray(host_time_s, dtype=np.float64)
    fr = None if frames is None else np.asarray(frames, dtype=np.float64)
    adc = None if adc_time_s is None else np.asarray(adc_time_s, dtype=np.float64)
    ok = np.isfinite(s) & np.isfinite(h) & (np.isfinite(fr) if fr is not None else True)
    s, h = s[ok], h[ok]
    fr = fr[ok] if fr is not None else None
    adc = adc[ok] if adc is not None else None
    order = np.argsort(s, kind="stable")
    s, h = s[order], h[order]
    fr = fr[order] if fr is not None else None
    adc = adc[order] if adc is not None else None
    n = len(s)
    if n < 16:
        raise ParameterError(f"need at least 16 blocks to fit the device clock, got {n}")
    kind, bf = _block_kind(s, fr, block_frames, samplerate)
    x = (s + (fr if fr is not None else 0.0)) / float(samplerate)  # device seconds at each block's end
    span = float(x[-1] - x[0])
    if span <= 1.0:
        raise ParameterError(f"the capture is only {span:.2f} s long: calibrate over minutes at least")
    lost = np.zeros(n - 1, dtype=bool) if fr is None else (s[1:] != s[:-1] + fr[:-1])
    r = h - x  # host minus device time: a line of slope -ppm*1e-6 plus the delays
    wait_s = bf / float(samplerate) if kind == "fixed" and bf else 0.0
    step_at, shift_at, gap_at, slope0 = _find_breaks(x, r, step_threshold_s, lost, wait_s)
    cuts = sorted(set(step_at) | set(shift_at) | set(gap_at))
    stretch = np.zeros(n, dtype=np.int64)
    for j in cuts:
        stretch[j:] += 1

    def jump(j: int) -> float:
        a, b = max(0, j - 64), min(n, j + 64)
        e = r - slope0 * x
        return float(e[j:b].min() - e[a:j].min())

    steps = [(float(h[j]), jump(j)) for j in step_at]
    shifts = [(float(h[j]), jump(j)) for j in shift_at]

    # least-delayed reading per segment and stretch, twice (the second time about the first line)
    # every stretch is cut into its own share of the segments, so that no segment holds only the
    # few readings at a stretch's edge (their least delay is no least delay)
    seg = np.zeros(n, dtype=np.int64)
    for k in range(stretch.max() + 1):
        idx = np.flatnonzero(stretch == k)
        lo, hi = x[idx[0]], x[idx[-1]]
        nk = max(1, int(round(segments * (hi - lo) / span)))
        seg[idx] = np.minimum(((x[idx] - lo) / max(hi - lo, 1e-9) * nk).astype(np.int64), nk - 1)
    e = r - slope0 * x
    for _ in range(2):
        pick, lift = _least_delayed(e, stretch * (segments + 1) + seg)
        counts = np.bincount(stretch[pick], minlength=stretch.max() + 1)
        good = (counts >= 3)[stretch[pick]]
        pick, lift = pick[good], lift[good]
        if len(pick) < 4:
            raise ParameterError("too few blocks to fit the device clock")
        used = np.unique(stretch[pick])
        col = np.searchsorted(used, stretch[pick])
        xc = float(np.mean(x[pick]))
        A = np.zeros((len(pick), 1 + len(used)))
        A[:, 0] = x[pick] - xc
        A[np.arange(len(pick)), 1 + col] = 1.0
        # a segment whose lowest readings lie far apart (a busy stretch) tells its floor less well
        w = 1.0 / (lift ** 2 + np.median(lift) ** 2 + 1e-14)
        sw = np.sqrt(w)
        coef, *_ = np.linalg.lstsq(A * sw[:, None], r[pick] * sw, rcond=None)
        e = r - coef[0] * x
    c = float(coef[0])
    rp = r[pick] - A @ coef
    z = rp * sw
    dof = max(len(pick) - A.shape[1], 1)
    s2 = float(z @ z) / dof
    pw = np.linalg.pinv(A * sw[:, None])
    slope_w = pw[0] * sw  # the slope as a weighted sum of the picked readings
    var_c = s2 * float(pw[0] @ pw[0])
    # residuals that follow one another: the variance is too small by (1 + rho) / (1 - rho)
    same = stretch[pick][1:] == stretch[pick][:-1]
    if same.sum() >= 8 and s2 > 0:
        rho = float(np.sum(z[1:][same] * z[:-1][same]) / (z @ z))
        if rho > 0:
            rho = min(rho, 0.9)
            var_c *= (1 + rho) / (1 - rho)
    ci_c = dsp.t_ppf(0.975, dof) * math.sqrt(max(var_c, 0.0))
    # low-frequency wander (load, other streams): a line through the residuals' means over eighths
    if len(pick) >= 16:
        parts = np.array_split(np.arange(len(pick)), 8)
        wb = np.array([w[q].sum() for q in parts])
        bx = np.array([np.average(x[pick][q], weights=w[q]) for q in parts])
        by = np.array([np.average(rp[q], weights=w[q]) for q in parts])
        bl = np.polyfit(bx, by, 1, w=np.sqrt(wb))
        br = (by - np.polyval(bl, bx)) * np.sqrt(wb)
        mx = np.average(bx, weights=wb)
        sxx = float(np.sum(wb * (bx - mx) ** 2))
        if sxx > 0:
            se_b = math.sqrt(float(br @ br) / 6 / sxx)
            ci_c = max(ci_c, dsp.t_ppf(0.975, 6) * se_b)
    # a floor that wanders (a busy machine, other streams) moves neighbouring least delays
    # together, over seconds: the slope's variance under a white-plus-wander model of the
    # residuals (see _wander_variance)
    if len(pick) >= 16:
        var_g = _wander_variance(x[pick], z, A * sw[:, None], pw[0], span)
        ci_c = max(ci_c, dsp.t_ppf(0.975, 6) * math.sqrt(var_g))
    # the least delay's slow wander, which a short run's own residuals cannot show
    ti = x[pick]
    K = FLOOR_WANDER_S ** 2 * np.exp(-np.abs(ti[:, None] - ti[None, :]) / FLOOR_WANDER_TIME_S)
    K[stretch[pick][:, None] != stretch[pick][None, :]] = 0.0
    var_wander = max(float(slope_w @ K @ slope_w), 0.0)
    ci_c = math.hypot(ci_c, 1.96 * math.sqrt(var_wander))
    # fixed-size blocks wait between 0 and one block for the rest of their chunk: the worst case
    wait_c = 0.0
    adc_ppm = float("nan")
    if kind == "fixed" and bf:
        wait_c = bf / float(samplerate) * float(np.sum(slope_w[slope_w > 0]))
        if adc is not None:
            line = _adc_line(s / float(samplerate), adc, stretch, segments)
            if line is not None:
                c_adc, se_adc = line
                adc_ppm = (1.0 / (1.0 + c_adc) - 1.0) * 1e6
                seen = abs(c - c_adc) + 1.96 * math.hypot(ci_c / 1.96, se_adc)
                wait_c = min(wait_c, seen)
    to_ppm = 1e6 / (1.0 + c) ** 2
    ppm = (1.0 / (1.0 + c) - 1.0) * 1e6
    ci_stat = ci_c * to_ppm
    wait_ppm = wait_c * to_ppm
    inside = np.isin(stretch, used)
    delay = r - (c * (x - xc))
    off = np.full(stretch.max() + 1, np.nan)
    for k in used:
        off[k] = delay[stretch == k].min()
    above = (delay - off[stretch])[inside]
    return ClockFit(ppm=float(ppm), ci95_ppm=float(ci_stat + wait_ppm), span_s=span, n_blocks=n,
                    n_used=int(len(pick)), delay_rms_ms=float(np.sqrt(np.mean(above ** 2)) * 1e3),
                    steps=steps, shifts=shifts, gaps=len(gap_at), ci95_statistical_ppm=float(ci_stat),
                    wait_bound_ppm=float(wait_ppm), blocks=kind, block_frames=bf,
                    pick_rms_ms=float(np.sqrt(np.mean(rp ** 2))) * 1e3, n_dropped=int(n - inside.sum()),
                    adc_ppm=adc_ppm)


def simulate_readings(rng: np.random.Generator, *, ppm: float, seconds: float, samplerate: float = 48000.0,
                      chunk_frames: int = 480, block_frames: int = 0, delay_ms: float = 2.0,
                      delay_shape: float = 1.0, stall_rate_hz: float = 0.0, stall_ms: tuple[float, float] = (20, 120),
                      load: tuple[tuple[float, float, float], ...] = (), host_steps: tuple[tuple[float, float], ...] = (),
                      shifts: tuple[tuple[float, float], ...] = (), gaps: tuple[tuple[float, float, float], ...] = (),
                      wander: tuple[float, float] = (0.0, 1.0), adc_noise_s: float = 20e-6, adc_wild_s: float = 1.0,
                      host0_s: float = 100.0) -> dict[str, np.ndarray]:
    """Block readings of a device fast by ``ppm``, built the way a capture makes them (for tests
    and benchmarks).

    The device hands over ``chunk_frames`` at a time, each chunk as its last sample is taken;
    the program wakes a gamma-distributed delay later (mean ``delay_ms``, shape ``delay_shape``:
    1 is exponential), or after a stall (``stall_rate_hz`` of them, ``stall_ms`` long) — never
    before an earlier wake — and reads blocks of ``block_frames`` (0: everything that has arrived).
    ``load``: (from s, to s, factor) stretches where the delays are that much longer.
    ``host_steps``: (host time s, jump s); ``shifts``: (device time s, change of the least delay s);
    ``gaps``: (device time s, lost s, error of the lost length's estimate s).
    ``wander``: (rms s, correlation time s) of a slow wander of the least delay (first-order
    autoregressive, chunk by chunk).  The driver's capture time of each block's first sample is right to ``adc_noise_s`` (rms),
    except over the stream's first ``adc_wild_s``, where it is 0.6 s early (as measured on the
    loopback).

    Returns ``start``, ``frames``, ``host`` and ``adc`` per block.
    """
    fs_true = samplerate * (1 + ppm * 1e-6)
    nchunk = int(seconds * samplerate / chunk_frames)
    k = np.arange(nchunk)
    avail = host0_s + (k + 1) * chunk_frames / fs_true
    for t, dd in shifts:
        avail[(k + 1) * chunk_frames / samplerate >= t] += dd
    if wander[0] > 0:
        a = math.exp(-chunk_frames / samplerate / wander[1])
        from scipy.signal import lfilter

        drive = rng.normal(0.0, wander[0] * math.sqrt(1 - a * a), nchunk)
        drive[0] = rng.normal(0.0, wander[0])
        avail += lfilter([1.0], [1.0, -a], drive)
    mean = np.full(nchunk, delay_ms * 1e-3)
    for t0, t1, f in load:
        tt = (k + 1) * chunk_frames / samplerate
        mean[(tt >= t0) & (tt < t1)] *= f
    wake = avail + rng.gamma(delay_shape, mean / delay_shape)
    if stall_rate_hz > 0:
        nst = rng.poisson(stall_rate_hz * seconds)
        at = rng.integers(0, nchunk, nst)
        wake[at] += rng.uniform(stall_ms[0], stall_ms[1], nst) * 1e-3
    wake = np.maximum.accumulate(wake)
    if block_frames:
        nb = nchunk * chunk_frames // block_frames
        start = np.arange(nb, dtype=np.int64) * block_frames
        kk = -(-(start + block_frames) // chunk_frames) - 1  # the chunk holding each block's last sample
        host = wake[kk]
        frames = np.full(nb, block_frames, dtype=np.int64)
    else:
        # one read per wake: everything delivered since the last one
        last = np.r_[wake[1:] != wake[:-1], True]
        ends = (np.flatnonzero(last) + 1) * chunk_frames
        start = np.r_[0, ends[:-1]].astype(np.int64)
        frames = (ends - start).astype(np.int64)
        host = wake[last]
    # blocks read in one wake reach the program a few microseconds apart
    first = np.r_[True, host[1:] != host[:-1]]
    rank = np.arange(len(host)) - np.maximum.accumulate(np.where(first, np.arange(len(host)), 0))
    host = host + rank * 5e-6
    keep = np.ones(len(start), dtype=bool)
    shift_idx = np.zeros(len(start), dtype=np.int64)
    for t, lost_s, err_s in gaps:
        g0, g1 = int(t * samplerate), int((t + lost_s) * samplerate)
        keep &= ~((start + frames > g0) & (start < g1))
        shift_idx[start >= g1] += int(round(err_s * samplerate))
    adc = host0_s + start / fs_true + rng.normal(0.0, adc_noise_s, len(start))
    adc[start < adc_wild_s * samplerate] -= 0.6
    host_out = host.copy()
    for t, jmp in host_steps:
        host_out[host >= t] += jmp
        adc[host >= t] += jmp
    return {"start": (start + shift_idx)[keep], "frames": frames[keep], "host": host_out[keep], "adc": adc[keep]}


def ppm_from_reference(known_s_per_day: float, known_u95_s_per_day: float, measured_s_per_day: float,
                       measured_u95_s_per_day: float) -> tuple[float, float]:
    """The device clock's offset (ppm, 95 % half-width) from a movement of known rate timed on it.

    A device fast by X ppm makes a movement read slow by X ppm: X = (known - measured) in ppm.
    The two uncertainties are independent and add in quadrature.
    """
    ppm = s_per_day_to_ppm(known_s_per_day - measured_s_per_day)
    u95 = s_per_day_to_ppm(math.hypot(known_u95_s_per_day, measured_u95_s_per_day))
    return ppm, u95
