"""The audio device's sample clock against the host clock, from per-block readings (pure).

Each captured block carries its first sample index and the host's monotonic clock when
the block reached the program.  That reading is late by a scheduling delay that is never
negative and varies by milliseconds, so an ordinary line fit would be noisy and biased by
bursts.  Instead the session is cut into segments and in each the block with the smallest
delay relative to a first fit is kept (minimum-delay filtering, the idea of NTP's clock
filter; from memory); a line through those minima gives the device's rate.

Host clock steps (an NTP step, a suspend and resume) show as jumps in the readings; the
fit then gives each stretch between jumps its own offset and a common rate.

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


@dataclass(frozen=True)
class ClockFit:
    ppm: float
    ci95_ppm: float
    span_s: float
    n_blocks: int
    n_used: int
    delay_rms_ms: float  # scatter of all readings around the minimum-delay line
    steps: list[tuple[float, float]] = field(default_factory=list)  # (host time, jump s) of host clock steps

    def needed_span_s(self, target_ppm: float) -> float:
        """About how long a run gives a 95 % half-width of ``target_ppm``.

        The readings' delay scatter does not shrink with time, so the half-width falls as 1/span.
        """
        if not (self.ci95_ppm > 0 and self.span_s > 0 and target_ppm > 0):
            return float("nan")
        return self.span_s * self.ci95_ppm / target_ppm


def fit_device_clock(start_sample: np.ndarray, host_time_s: np.ndarray, samplerate: float, *,
                     segments: int = 64, step_threshold_s: float = 0.05) -> ClockFit:
    """Fit the device's sample-clock offset (ppm) from (first sample, host time) pairs of blocks.

    Parameters
    ----------
    start_sample : np.ndarray [shape=(n,)]
        Sample index of each block's first sample (gaps from overflows included).
    host_time_s : np.ndarray [shape=(n,)]
        Host monotonic clock when the block arrived, s.
    samplerate : float
        Nominal sample rate, Hz.
    segments : int
        Number of stretches in which the least-delayed block is kept.
    step_threshold_s : float
        A jump of the readings larger than this is a host clock step.
    """
    x = np.asarray(start_sample, dtype=np.float64) / float(samplerate)  # device seconds
    h = np.asarray(host_time_s, dtype=np.float64)
    ok = np.isfinite(x) & np.isfinite(h)
    x, h = x[ok], h[ok]
    if len(x) < 16:
        raise ParameterError(f"need at least 16 blocks to fit the device clock, got {len(x)}")
    span = float(x[-1] - x[0])
    if span <= 1.0:
        raise ParameterError(f"the capture is only {span:.2f} s long: calibrate over minutes at least")
    # host clock steps: jumps of the residual host - device between consecutive blocks
    b0 = np.polyfit(x, h, 1)
    r = h - np.polyval(b0, x)
    jumps = np.flatnonzero(np.abs(np.diff(r)) > step_threshold_s)
    seg_id = np.zeros(len(x), dtype=int)
    steps = []
    for j in jumps:
        seg_id[j + 1:] += 1
        steps.append((float(h[j + 1]), float(r[j + 1] - r[j])))
    nseg = int(seg_id.max()) + 1
    # first fit with one offset per stretch, then keep the least-delayed block per segment
    A = np.zeros((len(x), 1 + nseg))
    A[:, 0] = x - x.mean()
    A[np.arange(len(x)), 1 + seg_id] = 1.0
    coef, *_ = np.linalg.lstsq(A, h, rcond=None)
    res = h - A @ coef
    edges = np.linspace(x[0], x[-1] + 1e-9, segments + 1)
    pick = []
    for a, b in zip(edges[:-1], edges[1:]):
        idx = np.flatnonzero((x >= a) & (x < b))
        if len(idx):
            pick.append(int(idx[np.argmin(res[idx])]))
    pick = np.array(sorted(set(pick)))
    if len(pick) < 4:
        raise ParameterError("too few blocks to fit the device clock")
    Ap = A[pick]
    coef, *_ = np.linalg.lstsq(Ap, h[pick], rcond=None)
    rp = h[pick] - Ap @ coef
    dof = max(len(pick) - Ap.shape[1], 1)
    s2 = float(rp @ rp) / dof
    cov = np.linalg.pinv(Ap.T @ Ap) * s2
    slope = coef[0]  # host seconds per device second
    se = math.sqrt(max(float(cov[0, 0]), 0.0))
    q = dsp.t_ppf(0.975, dof)
    # device seconds per host second = 1/slope = 1 + ppm
    ppm = (1.0 / slope - 1.0) * 1e6
    ci = q * se / slope**2 * 1e6
    # The pacing of a device against the host clock also wanders (load, other streams), which
    # the scatter of the minima does not show.  Batch means: fit each quarter of the run on its
    # own; the spread of the four rates gives a second half-width, and the larger one is kept.
    quarters = []
    qe = np.linspace(x[0], x[-1] + 1e-9, 5)
    for a, b in zip(qe[:-1], qe[1:]):
        sel = pick[(x[pick] >= a) & (x[pick] < b)]
        if len(sel) >= 4 and len(set(seg_id[sel])) == 1:
            sl = np.polyfit(x[sel], h[sel], 1)[0]
            quarters.append((1.0 / sl - 1.0) * 1e6)
    if len(quarters) >= 3:
        ci = max(ci, dsp.t_ppf(0.975, len(quarters) - 1) * float(np.std(quarters, ddof=1))
                 / math.sqrt(len(quarters)))
    delay = h - A @ coef
    return ClockFit(ppm=float(ppm), ci95_ppm=float(ci), span_s=span, n_blocks=int(len(x)), n_used=int(len(pick)),
                    delay_rms_ms=float(np.sqrt(np.mean((delay - delay.min()) ** 2)) * 1e3), steps=steps)


def ppm_from_reference(known_s_per_day: float, known_u95_s_per_day: float, measured_s_per_day: float,
                       measured_u95_s_per_day: float) -> tuple[float, float]:
    """The device clock's offset (ppm, 95 % half-width) from a movement of known rate timed on it.

    A device fast by X ppm makes a movement read slow by X ppm: X = (known - measured) in ppm.
    The two uncertainties are independent and add in quadrature.
    """
    ppm = s_per_day_to_ppm(known_s_per_day - measured_s_per_day)
    u95 = s_per_day_to_ppm(math.hypot(known_u95_s_per_day, measured_u95_s_per_day))
    return ppm, u95
