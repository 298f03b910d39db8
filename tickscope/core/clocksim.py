"""Block readings of a device clock, built the way a capture makes them (for tests and benchmarks)."""
from __future__ import annotations

import math

import numpy as np


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
    wake = _chunk_wakes(rng, fs_true=fs_true, seconds=seconds, samplerate=samplerate, chunk_frames=chunk_frames,
                        delay_ms=delay_ms, delay_shape=delay_shape, stall_rate_hz=stall_rate_hz, stall_ms=stall_ms,
                        load=load, shifts=shifts, wander=wander, host0_s=host0_s)
    start, frames, host = _blocks_read(wake, chunk_frames, block_frames)
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


def _chunk_wakes(rng: np.random.Generator, *, fs_true: float, seconds: float, samplerate: float,
                 chunk_frames: int, delay_ms: float, delay_shape: float, stall_rate_hz: float,
                 stall_ms: tuple[float, float], load: tuple[tuple[float, float, float], ...],
                 shifts: tuple[tuple[float, float], ...], wander: tuple[float, float],
                 host0_s: float) -> np.ndarray:
    """Host time at which the program wakes for each chunk: when the chunk's last sample is taken,
    moved by the shifts and the wander of the least delay, plus the delay (or a stall), never
    before an earlier wake."""
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
    return np.maximum.accumulate(wake)


def _blocks_read(wake: np.ndarray, chunk_frames: int, block_frames: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """First sample, length and host time of each block the program reads at its wakes: blocks
    of ``block_frames``, or (0) everything delivered since the last wake."""
    nchunk = len(wake)
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
    return start, frames, host
