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

from .clockadc import _adc_line
from .clockbreaks import _block_kind, _find_breaks, _least_delayed
from .clockspread import _line_ci
from ..errors import ParameterError
from ..units import s_per_day_to_ppm


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
    s, h, fr, adc = _sorted_readings(start_sample, host_time_s, frames, adc_time_s)
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
    stretch, steps, shifts, n_gaps, slope0 = _stretches(x, r, h, step_threshold_s, lost, wait_s)
    seg = _segments_per_stretch(x, stretch, segments, span)
    pick, A, coef, w, sw, used, xc = _least_delayed_line(x, r, stretch, seg, segments, slope0)
    c = float(coef[0])
    ci_c, slope_w, rp = _line_ci(x[pick], r[pick], stretch[pick], A, coef, w, sw, span)
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
                    steps=steps, shifts=shifts, gaps=n_gaps, ci95_statistical_ppm=float(ci_stat),
                    wait_bound_ppm=float(wait_ppm), blocks=kind, block_frames=bf,
                    pick_rms_ms=float(np.sqrt(np.mean(rp ** 2))) * 1e3, n_dropped=int(n - inside.sum()),
                    adc_ppm=adc_ppm)


def _sorted_readings(start_sample, host_time_s, frames, adc_time_s):
    """The readings as float arrays, those with a missing value left out, in sample order."""
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
    return s, h, fr, adc


def _stretches(x: np.ndarray, r: np.ndarray, h: np.ndarray, step_threshold_s: float, lost: np.ndarray,
               wait_s: float) -> tuple[np.ndarray, list[tuple[float, float]], list[tuple[float, float]], int, float]:
    """The stretch each reading belongs to, the (host time, jump s) of host clock steps and of
    delivery shifts, how many stretches begin after lost audio, and the envelope's slope."""
    n = len(x)
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
    return stretch, steps, shifts, len(gap_at), slope0


def _segments_per_stretch(x: np.ndarray, stretch: np.ndarray, segments: int, span: float) -> np.ndarray:
    """The segment of its stretch each reading lies in: every stretch is cut into its own share of
    the segments, so that no segment holds only the few readings at a stretch's edge (their least
    delay is no least delay)."""
    n = len(x)
    seg = np.zeros(n, dtype=np.int64)
    for k in range(stretch.max() + 1):
        idx = np.flatnonzero(stretch == k)
        lo, hi = x[idx[0]], x[idx[-1]]
        nk = max(1, int(round(segments * (hi - lo) / span)))
        seg[idx] = np.minimum(((x[idx] - lo) / max(hi - lo, 1e-9) * nk).astype(np.int64), nk - 1)
    return seg


def _least_delayed_line(x: np.ndarray, r: np.ndarray, stretch: np.ndarray, seg: np.ndarray, segments: int,
                        slope0: float):
    """A weighted line (common slope, one offset per stretch) through the least-delayed reading of
    each segment and stretch, found twice (the second time about the first line).  Returns the
    picked readings, the design matrix, its coefficients (the slope first), the weights and their
    square roots, the stretches used, and the device time the slope is centred on."""
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
    return pick, A, coef, w, sw, used, xc


def ppm_from_reference(known_s_per_day: float, known_u95_s_per_day: float, measured_s_per_day: float,
                       measured_u95_s_per_day: float) -> tuple[float, float]:
    """The device clock's offset (ppm, 95 % half-width) from a movement of known rate timed on it.

    A device fast by X ppm makes a movement read slow by X ppm: X = (known - measured) in ppm.
    The two uncertainties are independent and add in quadrature.
    """
    ppm = s_per_day_to_ppm(known_s_per_day - measured_s_per_day)
    u95 = s_per_day_to_ppm(math.hypot(known_u95_s_per_day, measured_u95_s_per_day))
    return ppm, u95
