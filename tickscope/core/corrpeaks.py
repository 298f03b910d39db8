"""Sub-sample peaks of correlation lobes, evaluated exactly from their spectra (pure).

Newton's method on the band-limited correlation itself (no interpolation bias), and
:func:`~tickscope.core.timing.match_many`'s choice among a row's lobes (_pick_numpy, the
reference of the compiled ``_kernels.c``); see core/timing.py.
"""
from __future__ import annotations

import numpy as np

from . import kernels


_NEWTON_WEIGHTS: dict[tuple[int, int], tuple[np.ndarray, np.ndarray, np.ndarray]] = {}


def _newton_weights(nbins: int, nfft: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-bin weights of the real-signal sum (1 at DC and Nyquist, 2 between), times w and w^2."""
    key = (nbins, nfft)
    got = _NEWTON_WEIGHTS.get(key)
    if got is None:
        w = np.full(nbins, 2.0)
        w[0] = 1.0
        if nfft % 2 == 0:
            w[-1] = 1.0
        wk = 2 * np.pi * np.arange(nbins) / nfft
        got = _NEWTON_WEIGHTS[key] = (w, w * wk, w * wk * wk)
    return got


def _rotate(C: np.ndarray, tau: np.ndarray, nfft: int) -> np.ndarray:
    """Rows C[r, k] * exp(2 pi i k tau[r] / nfft): the phase ramps by running products (a complex
    exp per bin costs twice as much; the products' rounding error stays near k * 1e-16)."""
    ramp = np.repeat(np.exp(2j * np.pi * tau / nfft)[:, None], C.shape[1], axis=1)
    ramp[:, 0] = 1.0
    return C * np.cumprod(ramp, axis=1)


def _newton_peaks(C: np.ndarray, nfft: int, tau0: np.ndarray, iters: int = 6, *,
                  use_compiled: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Refine the maxima of the correlations whose spectra are the rows of C (rfft bins), each
    near its own lag tau0[r].  Returns the lags and the correlation values there."""
    w, w1, w2 = _newton_weights(C.shape[1], nfft)
    tau = np.array(tau0, dtype=np.float64)
    if use_compiled and kernels.compiled():  # the same iteration in C, row by row (``_kernels.c``)
        val = np.empty(len(tau))
        kernels.newton_peaks(np.ascontiguousarray(C, dtype=np.complex128), tau, val, w, w1, w2, nfft, iters)
        return tau, val
    live = np.ones(len(tau), dtype=bool)
    for _ in range(iters):
        idx = np.flatnonzero(live)
        if not len(idx):
            break
        ph = _rotate(C[idx], tau[idx], nfft)
        d1 = -(ph.imag @ w1)
        d2 = -(ph.real @ w2)
        ok = d2 < 0  # past a maximum's concave part: stop there
        step = np.clip(-d1 / np.where(ok, d2, -1.0), -0.5, 0.5)
        tau[idx[ok]] += step[ok]
        live[idx[~ok | (np.abs(step) < 1e-6)]] = False
    val = (_rotate(C, tau, nfft).real @ w) / nfft
    return tau, val


def _pick_numpy(c: np.ndarray, C: np.ndarray, x: np.ndarray, lags: np.ndarray, nt: int, nfft: int,
                pref: np.ndarray | None, energy: float, tie: float = 0.03,
                refine: float = 0.0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """match_many's choice for each row of the correlations c (spectra C, searched rows x, lag
    indices ``lags`` into c): the refined lag index and correlation there, and the correlation
    coefficient."""
    nrow = len(c)
    rows, j, start, order = _lobes_to_refine(c, lags, nfft, tie, refine)
    # Newton from the parabola's peak: two or three steps then suffice
    tau, val = _newton_peaks(C[rows], nfft, start, iters=3)
    wander = np.abs(tau - j) > 1.0  # Newton wandered: keep the integer peak
    tau = np.where(wander, j.astype(np.float64), tau)
    val = np.where(wander, c[rows, j], val)
    out_tau, out_val = _best_lobes(nrow, rows, tau, val, order, pref, tie)
    rho = _coefficients(x, out_tau, out_val, nt, energy)
    return out_tau, out_val, rho


def _lobes_to_refine(c: np.ndarray, lags: np.ndarray, nfft: int, tie: float, refine: float):
    """The lobes of each row of c worth refining: (row, lag index, parabola peak's index, order in
    the row's lags) of each."""
    nrow = len(c)
    cl = c[:, lags]
    top = cl.max(axis=1)
    # A ringing step's correlation oscillates at its ring frequency.  At a low sample rate
    # (8 kHz, a 1.2 kHz ring: 6.5 samples a cycle) the true peak can fall between samples
    # and read lower than the next cycle's, so every lobe near the top is refined and the
    # best refined one wins (otherwise whole ring cycles slip: ~0.8 ms at 8 kHz).
    # the lobes refined: within `reach` of the top (see match_many's refine)
    reach = max(tie, refine)
    bar = np.float32(max(0.1, min(0.75, 1.0 - reach - 0.05)))
    inner = (cl[:, 1:-1] >= cl[:, :-2]) & (cl[:, 1:-1] >= cl[:, 2:]) & (cl[:, 1:-1] >= bar * top[:, None])
    am = np.argmax(cl, axis=1)
    # candidate lobes (row, lag index, order): the local maxima in lag order, then the
    # highest sample when it is not one of them
    r_in, i_in = np.nonzero(inner)
    i_in = i_in + 1
    has = np.zeros(nrow, dtype=bool)
    has[r_in[i_in == am[r_in]]] = True
    extra = np.flatnonzero(~has)
    rows = np.concatenate([r_in, extra])
    j = lags[np.concatenate([i_in, am[extra]])]
    order = np.concatenate([np.arange(len(r_in)), np.full(len(extra), len(lags))])
    # rank the lobes by their three-point parabola peaks; refine those within 3 % of the best
    y0, y1, y2 = c[rows, j - 1], c[rows, j], c[rows, (j + 1) % nfft]
    den = y0 - 2 * y1 + y2
    conc = den < 0
    safe = np.where(conc, den, -1.0)
    pv = np.where(conc, y1 - (y0 - y2) ** 2 / (8 * safe), y1)
    start = np.where(conc, j + 0.5 * (y0 - y2) / safe, j.astype(np.float64))
    top_p = np.full(nrow, -np.inf)
    np.maximum.at(top_p, rows, pv)
    keep = pv >= top_p[rows] - reach * np.abs(top_p[rows])
    return rows[keep], j[keep], start[keep], order[keep]


def _best_lobes(nrow: int, rows: np.ndarray, tau: np.ndarray, val: np.ndarray, order: np.ndarray,
                pref: np.ndarray | None, tie: float) -> tuple[np.ndarray, np.ndarray]:
    """Each row's refined lag index and correlation of its best lobe (near-ties settled by ``pref``)."""
    # the best refined lobe of each row (the first in candidate order among equals)
    score = -val
    tied_first = np.zeros(len(rows), dtype=bool)
    if pref is not None:
        pref = pref[rows]
        row_best = np.full(nrow, -np.inf)
        np.maximum.at(row_best, rows, val)
        near_tie = (val >= row_best[rows] - tie * np.abs(row_best[rows])) & np.isfinite(pref)
        # near-ties rank by distance to the preferred lag, ahead of every other lobe of the row
        # (a key of its own: folded into one number, an offset of -1e300 swallowed the distance)
        score = np.where(near_tie, np.abs(tau - np.where(np.isfinite(pref), pref, 0.0)), -val)
        tied_first = ~near_tie
    pick = np.lexsort((order, score, tied_first, rows))
    first = np.ones(len(pick), dtype=bool)
    first[1:] = rows[pick][1:] != rows[pick][:-1]
    best = pick[first]
    out_tau = np.zeros(nrow)
    out_val = np.zeros(nrow)
    out_tau[rows[best]] = tau[best]
    out_val[rows[best]] = val[best]
    return out_tau, out_val


def _coefficients(x: np.ndarray, out_tau: np.ndarray, out_val: np.ndarray, nt: int, energy: float) -> np.ndarray:
    """The correlation coefficient of each row at its chosen lag (the row's energy under the template)."""
    nrow = len(x)
    i0 = np.rint(out_tau).astype(np.int64)
    rho = np.zeros(nrow)
    cs = np.concatenate([np.zeros((nrow, 1)), np.cumsum(x * x, axis=1, dtype=np.float64)], axis=1)
    ok = (i0 >= 0) & (i0 + nt <= x.shape[1])
    r_ok = np.flatnonzero(ok)
    seg_e = cs[r_ok, i0[r_ok] + nt] - cs[r_ok, i0[r_ok]]
    den = np.sqrt(energy * seg_e + 1e-300)
    rho[r_ok] = np.where(den > 0, out_val[r_ok] / den, 0.0)
    return rho
