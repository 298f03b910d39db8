"""Snippets around impacts: their levels, clipping, and the filtered audio the timing stage matches.

Each impact keeps ~96 ms of audio around its coarse onset, high-passed (zero phase) and whitened
against the background noise by a linear-prediction filter (:func:`noise_whitener`); both filters
are applied as one spectrum to all the snippets that are ready together, as the rows of one FFT.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import dsp


@dataclass
class Impact:
    """One impulsive sound: coarse position, level, and a snippet of audio around it."""

    onset_sample: int  # coarse onset (frame resolution) on the stream's sample index
    peak_dbfs: float  # peak sample magnitude in the snippet, dBFS
    frame_snr_db: float  # peak frame energy over the noise floor
    snippet_start: int  # sample index of snippet[0]
    snippet: np.ndarray  # high-passed audio, float64
    wsnippet: np.ndarray  # the same, whitened against the background noise (for timing)
    clipped: bool = False
    truncated: bool = False


def impacts_from_rows(padded: np.ndarray, onsets: list[int], floors: np.ndarray, truncated: list[bool], *,
                      pre: int, post: int, samplerate: float, lag: int, hop: int, scale: float | None,
                      hp_resp: np.ndarray, wh_resp: np.ndarray, whitened: bool) -> list[Impact]:
    """Impacts from raw snippet rows: their levels, clipping, and the filtered snippets.

    ``padded`` holds one row per impact, as long as the FFT, its first ``pre + post`` samples the
    raw audio from ``pre`` before the coarse onset (integers' values if ``scale`` is set; the rest
    zeros); ``floors`` the noise floor (power) at each onset.  The rows are filtered in place.
    """
    n = pre + post
    raw = padded[:, :n]
    if scale is not None:  # integers: exact in float32, and so after the power-of-two scale
        raw *= np.float32(scale)
    # the level of each impact only: its first 10 ms (a later sound in the snippet is another impact)
    ms1 = int(0.001 * samplerate)
    ms10 = int(0.010 * samplerate)
    head = raw[:, max(0, pre - ms1): pre + ms10]
    peak = np.abs(head).max(axis=1) if head.shape[1] else np.zeros(len(onsets))
    clipped = _flat_tops(head, peak)
    # level over the floor, measured the way the floor was (lagged difference, frame energy)
    # on the first 10 ms of each impact
    hd = raw[:, pre - ms1: pre + ms10].astype(np.float32)
    if hd.shape[1] > lag + hop:
        dd = hd[:, lag:] - hd[:, :-lag]
        m = (dd.shape[1] // hop) * hop
        dd = dd[:, :m].reshape(len(onsets), -1, hop)
        fe = np.einsum("ijk,ijk->ij", dd, dd) / hop
        snr = 10 * np.log10(np.maximum(fe.max(axis=1).astype(np.float64), 1e-30) / np.maximum(floors, 1e-30))
    else:
        snr = np.zeros(len(onsets))
    # zero-phase high-pass and whitening in one spectrum; the 6 ms before the onset absorb
    # the start-up transient (the pre-onset mean is removed first, so a DC offset cannot
    # ring the filter)
    raw -= raw[:, : max(1, pre // 2)].mean(axis=1, keepdims=True)
    nfft = padded.shape[1]
    X = np.fft.rfft(padded, axis=1)
    hp = np.fft.irfft(X * hp_resp, nfft, axis=1)[:, :n]
    wh = np.fft.irfft(X * wh_resp, nfft, axis=1)[:, :n] if whitened else hp
    return [Impact(onset_sample=onset, peak_dbfs=20 * math.log10(max(float(peak[i]), 1e-12)),
                   frame_snr_db=float(snr[i]), snippet_start=onset - pre, snippet=hp[i], wsnippet=wh[i],
                   clipped=bool(clipped[i]), truncated=truncated[i])
            for i, onset in enumerate(onsets)]


def _flat_tops(rows: np.ndarray, peak: np.ndarray) -> np.ndarray:
    """Per row: True when the waveform sits at its extreme for 3+ consecutive samples (clipping)."""
    if rows.shape[1] < 3:
        return np.zeros(len(rows), dtype=bool)
    at = np.abs(rows) >= 0.999 * peak[:, None]
    run3 = at[:, :-2] & at[:, 1:-1] & at[:, 2:]
    return run3.any(axis=1) & (peak > 0)


def noise_whitener(x: np.ndarray, frame_e: np.ndarray, hop: int, samplerate: float,
                    order: int = 16, window_s: float = 0.25) -> np.ndarray:
    """FIR prediction-error filter A(z) of the quietest stretch of ``x`` (linear prediction).

    Filtering with A(z) whitens the background (pink noise, hum, rumble), so the template
    match becomes the matched filter for coloured noise (the prefilter of Knapp & Carter's
    generalized cross-correlation).  Steps and templates go through the same filter.
    """
    nwin = max(1, int(window_s * samplerate / hop))
    if len(frame_e) < nwin + 2:
        return np.ones(1)
    c = np.convolve(frame_e, np.ones(nwin), mode="valid")
    i = int(np.argmin(c))
    seg = x[i * hop: (i + nwin) * hop].astype(np.float64)
    if len(seg) < 4 * order:
        return np.ones(1)
    seg = seg - seg.mean()
    sos = dsp.butter_highpass_sos(4, min(300.0, 0.2 * samplerate / 2) / (samplerate / 2))
    nfft = dsp.fast_len(2 * len(seg))
    seg = np.fft.irfft(np.fft.rfft(seg, nfft) * dsp.sos_power_response(sos, nfft), nfft)[: len(seg)]
    seg = seg[int(0.01 * samplerate): len(seg) - int(0.01 * samplerate)]
    # autocorrelation at lags 0..order only (the full correlation costs n^2)
    r = np.array([float(np.dot(seg[: len(seg) - j], seg[j:])) for j in range(order + 1)])
    if r[0] <= 0:
        return np.ones(1)
    r[0] *= 1.0 + 1e-3  # a little white floor keeps the filter tame
    try:
        a = dsp.levinson(r, order)
    except np.linalg.LinAlgError:
        return np.ones(1)
    return np.concatenate([[1.0], a])
