"""The per-step loops of the analysis: compiled (``_kernels.c``) where it was built, else numpy.

The numpy versions are the reference: ``tests/test_kernels.py`` checks that the compiled ones
give the same numbers (to rounding).  Building needs a C compiler; ``pip install`` skips the
module when it cannot be built, and everything still runs, somewhat slower (benchmarks/run.py).
Set ``TICKSCOPE_PURE_NUMPY=1`` to use the numpy versions although the module is there.
"""
from __future__ import annotations

import os

import numpy as np

try:
    if os.environ.get("TICKSCOPE_PURE_NUMPY"):
        raise ImportError("TICKSCOPE_PURE_NUMPY is set")
    from . import _kernels as _c
except ImportError:  # not built (no compiler at install time), or switched off
    _c = None


def compiled() -> bool:
    """Whether the compiled loops are in use."""
    return _c is not None


def ringdown_line(x: np.ndarray, samplerate: float, noise_power: float, start_db: float, stop_db: float,
                  min_range_db: float, margin_db: float) -> tuple[float, float, float] | None:
    """The compiled Schroeder decay fit of :func:`tickscope.core.ringdown.measure_ringdown`:
    (slope dB/s, dB of curve used, RMS dB of the line's misfit), or None when not measurable.
    Only call when :func:`compiled` is true."""
    return _c.ringdown(np.ascontiguousarray(x, dtype=np.float64), float(samplerate), float(noise_power),
                       float(start_db), float(stop_db), float(min_range_db), float(margin_db))


def newton_peaks(C: np.ndarray, tau: np.ndarray, val: np.ndarray, w: np.ndarray, w1: np.ndarray, w2: np.ndarray,
                 nfft: int, iters: int) -> None:
    """The compiled Newton refinement of :func:`tickscope.core.corrpeaks._newton_peaks` (tau updated
    and val filled in place).  Only call when :func:`compiled` is true."""
    _c.newton_peaks(C, tau, val, w, w1, w2, int(nfft), int(iters))


def frame_power(x: np.ndarray, head: np.ndarray, lag: int, hop: int, scale: float | None = None
                ) -> tuple[np.ndarray, float, float, float]:
    """The compiled one-pass form of the detector's per-sample work
    (:meth:`tickscope.core.detect.ImpactDetector._chunk_power`): the mean power of
    ``x[n] - x[n-lag]`` per frame of ``hop`` samples (``head``: the ``lag`` samples before ``x``),
    and the largest sample, the smallest and their sum.  With ``scale``, ``x`` and ``head`` are
    16- or 32-bit integers standing for their value times ``scale`` (the numbers are those of the
    float32 samples ``np.multiply(x, scale, dtype=np.float32)``).  Only call when :func:`compiled`
    is true."""
    out = np.empty(len(x) // hop)
    if scale is None:
        kind, x, head = 0, np.ascontiguousarray(x, dtype=np.float32), np.ascontiguousarray(head, dtype=np.float32)
    else:
        kind = x.dtype.itemsize
        if x.dtype.kind != "i" or kind not in (2, 4):
            raise TypeError(f"frame_power: integer samples must be int16 or int32, not {x.dtype}")
        x, head = np.ascontiguousarray(x), np.ascontiguousarray(head, dtype=x.dtype)
    hi, lo, total = _c.frame_power(x, head, int(lag), int(hop), out, kind, float(scale or 1.0))
    return out, hi, lo, total


def match_pick(c: np.ndarray, C: np.ndarray, xp: np.ndarray, l0: int, n_lags: int, nt: int, width: int,
               pref: np.ndarray | None, energy: float, w: np.ndarray, w1: np.ndarray, w2: np.ndarray, nfft: int,
               iters: int, tau: np.ndarray, val: np.ndarray, rho: np.ndarray, tie: float = 0.03,
               refine: float = 0.0) -> None:
    """The compiled :func:`tickscope.core.corrpeaks._pick_numpy` (c float32 and C complex64 rows;
    tau, val and rho filled in place).  Only call when :func:`compiled` is true."""
    _c.match_pick(c, C, xp, int(l0), int(n_lags), int(nt), int(width),
                  None if pref is None else np.ascontiguousarray(pref, dtype=np.float64), float(energy),
                  w, w1, w2, int(nfft), int(iters), tau, val, rho, float(tie), float(refine))


def onset_scan(now: np.ndarray, bg: np.ndarray, thr_b: np.ndarray, fl_b: np.ndarray, sub: int, rise: float,
               first_frame: int, ns: int, refractory: int, last: int, quiet: int) -> tuple[np.ndarray, np.ndarray, int]:
    """The compiled :meth:`tickscope.core.detect.ImpactDetector._onsets_numpy`: onset frames, their
    blocks' floors, and the last onset frame.  Only call when :func:`compiled` is true."""
    on = np.empty(len(now), dtype=np.int64)
    fl = np.empty(len(now))
    n, last = _c.onset_scan(np.ascontiguousarray(now, dtype=np.float64), np.ascontiguousarray(bg, dtype=np.float64),
                            np.ascontiguousarray(thr_b, dtype=np.float64), np.ascontiguousarray(fl_b, dtype=np.float64),
                            int(sub), float(rise), int(first_frame), int(ns), int(refractory), int(last), int(quiet),
                            on, fl)
    return on[:n], fl[:n], int(last)
