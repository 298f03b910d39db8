"""The per-sample loops of the analysis: compiled (``_kernels.c``) where it was built, else numpy.

The numpy versions are the reference: ``tests/test_kernels.py`` checks that the compiled ones
give the same numbers (to rounding).  Building needs a C compiler; ``pip install`` skips the
module when it cannot be built, and everything still runs, about 1.3x slower on a long file.
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


def frame_energy(x: np.ndarray, head: np.ndarray, lag: int, hop: int, *,
                 use_compiled: bool = True) -> tuple[np.ndarray, float, float, float]:
    """Mean power per frame of ``hop`` samples of x[n] - x[n - lag], the ``lag`` samples before
    x being ``head``; and the largest, the smallest and the sum of the samples of x.

    ``x`` and ``head`` are float32; the frame powers float64.
    """
    x = np.ascontiguousarray(x, dtype=np.float32)
    head = np.ascontiguousarray(head, dtype=np.float32)
    if len(head) != lag:
        raise ValueError(f"head holds {len(head)} samples, lag is {lag}")
    if _c is not None and use_compiled:
        out = np.empty(len(x) // hop)
        mx, mn, s = _c.frame_energy(x, head, int(lag), int(hop), out)
        return out, mx, mn, s
    d = np.empty(len(x), dtype=np.float32)
    if lag < len(x):
        np.subtract(x[lag:], x[:-lag], out=d[lag:])
    m = min(lag, len(x))
    d[:m] = x[:m] - head[:m]
    f = d[: (len(x) // hop) * hop].reshape(-1, hop)
    e = np.einsum("ij,ij->i", f, f).astype(np.float64) / hop
    if not len(x):
        return e, 0.0, 0.0, 0.0
    return e, float(x.max()), float(x.min()), float(np.sum(x))


def ringdown_line(x: np.ndarray, samplerate: float, noise_power: float, start_db: float, stop_db: float,
                  min_range_db: float, margin_db: float) -> tuple[float, float, float] | None:
    """The compiled Schroeder decay fit of :func:`tickscope.core.ringdown.measure_ringdown`:
    (slope dB/s, dB of curve used, RMS dB of the line's misfit), or None when not measurable.
    Only call when :func:`compiled` is true."""
    return _c.ringdown(np.ascontiguousarray(x, dtype=np.float64), float(samplerate), float(noise_power),
                       float(start_db), float(stop_db), float(min_range_db), float(margin_db))


def newton_peaks(C: np.ndarray, tau: np.ndarray, val: np.ndarray, w: np.ndarray, w1: np.ndarray, w2: np.ndarray,
                 nfft: int, iters: int) -> None:
    """The compiled Newton refinement of :func:`tickscope.core.timing._newton_peaks` (tau updated
    and val filled in place).  Only call when :func:`compiled` is true."""
    _c.newton_peaks(C, tau, val, w, w1, w2, int(nfft), int(iters))
