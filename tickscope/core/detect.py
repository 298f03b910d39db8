"""Streaming impact detector: finds every impulsive sound, cheaply, in blocks of any size.

Two stages, so that the heavy work happens only near the sounds:

1. On every sample: a lagged difference ``x[n] - x[n-L]`` (a comb high-pass that
   removes DC and most hum; its first pass band peaks at fs/2L) and its energy in
   frames of ``hop_s``.  This is one pass of numpy arithmetic.  The lag L is chosen
   once, from the first ``tune_s`` seconds, as the one under which the loudest
   moments stand highest above the typical level (the movement's own band).
2. On the frame envelope: an adaptive noise floor (a low quantile over the last few
   seconds) and an onset rule: the energy over ``sum_s`` at least ``threshold_db``
   above the floor and ``rise_db`` above the moments just before it starts an
   impact, unless one started within ``refractory_s``.

Each impact keeps a short snippet of the raw audio around it for the timing stage
(:mod:`tickscope.core.timing`).  Incoming blocks are re-cut into fixed internal
chunks, so the result does not depend on the block sizes the caller used: a file
fed one sample at a time gives the same impacts as the whole file at once.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from . import dsp, kernels

from ..errors import ParameterError
from ..model import samples_as_float32
from .noisefloor import FloorTracker
from .snippets import Impact, impacts_from_rows, noise_whitener


#: The snippet kept before an impact's onset for an escapement's beats (s): the detector is set off
#: by a beat's loud drop, and its quieter unlocking comes up to a lift time earlier (~20 ms at 220
#: degrees and 18000 beats per hour: domain notes 10.3's relation); the lift is measured only if both
#: are kept.  Quartz steps keep 6 ms: with 25 ms of the noise before them in every template, a few
#: steps of an independent motor recording were timed 1-7 ms off.
ESCAPEMENT_PRE_S = 0.025


@dataclass(frozen=True)
class DetectorConfig:
    """Settings of the impact detector (times in seconds, levels in dB)."""

    hop_s: float = 0.0005  # envelope frame: 0.5 ms
    chunk_s: float = 16.0  # processing chunk: long for files (fast), 0.25 s for live audio (prompt)
    stats_block_s: float = 0.25  # floor and spread statistics per block of this length (any chunk size)
    floor_window_s: float = 4.0  # memory of the noise floor
    floor_quantile: float = 0.3  # the floor is this quantile of frame energies
    threshold_db: float = 4.0  # an impact's 2 ms energy stands this far above the floor ...
    rise_db: float = 4.0  # ... and this far above the 2.5-6 ms before it
    sum_s: float = 0.002  # energy summed over 2 ms for the onset rule
    tune_s: float = 3.0  # audio used to choose the difference lag
    refractory_s: float = 0.008  # impacts closer than 8 ms are one impact
    pre_s: float = 0.006  # snippet kept before an impact's coarse onset (ESCAPEMENT_PRE_S for beats)
    post_s: float = 0.090  # and after it (ring-down and a hand's bounce)
    highpass_hz: float = 300.0  # timing works above hum and handling noise
    min_level_dbfs: float = -110.0  # frames below this never start an impact


class ImpactDetector:
    """Streaming impact detector.

    Parameters
    ----------
    samplerate : float
        Sample rate of the audio in Hz.
    config : DetectorConfig, optional

    Examples
    --------
    >>> det = ImpactDetector(48000)
    >>> impacts = det.process(np.zeros(48000, dtype=np.float32))
    >>> impacts += det.flush()
    >>> impacts
    []
    """

    def __init__(self, samplerate: float, config: DetectorConfig | None = None):
        if not 1000 <= samplerate <= 400000:
            raise ParameterError(f"samplerate={samplerate!r}: expected 1000..400000 Hz")
        self.samplerate = float(samplerate)
        self.cfg = cfg = config or DetectorConfig()
        self.hop = max(2, int(round(cfg.hop_s * samplerate)))
        self.sub = max(1, int(round(cfg.stats_block_s * samplerate / self.hop)))  # frames per statistics block
        self.chunk = self.hop * self.sub * max(1, int(round(cfg.chunk_s / cfg.stats_block_s)))
        self.pre = int(round(cfg.pre_s * samplerate))
        self.post = int(round(cfg.post_s * samplerate))
        self.refractory_frames = max(1, int(round(cfg.refractory_s * samplerate / self.hop)))
        nyq = samplerate / 2
        self._sos = dsp.butter_highpass_sos(4, min(cfg.highpass_hz, 0.2 * nyq) / nyq)
        # snippets are filtered in the frequency domain: zero-phase high-pass (|H|^2, i.e. forward
        # and backward) and the whitening FIR, with 20 ms of zero padding against wrap-around
        self._nfft = dsp.fast_len(self.pre + self.post + int(0.02 * samplerate))
        # single precision: its rounding (~1e-7 of the peak) lies far below any recording's noise;
        # the transforms then cost two thirds as much (step times within 1 ns, decay times within
        # 0.001 ms of double precision on the benchmark's hour of steps)
        self._hp_resp = dsp.sos_power_response(self._sos, self._nfft).astype(np.float32)
        self.nsum = max(1, int(round(cfg.sum_s * samplerate / self.hop)))
        scale = samplerate / 48000.0
        self.lag_choices = sorted({max(1, int(round(v * scale))) for v in (1, 2, 3, 5, 8, 12, 20, 32)})
        self.reset()

    def reset(self) -> None:
        """Forget everything (start of a new stream)."""
        # the samples as they come: float32, or integers standing for their value times _scale
        # (16- and 24-bit files, read as such: the float conversion of every sample is skipped and
        # made only where numbers are needed, with the same float32 values)
        self._dtype = np.dtype(np.float32)
        self._scale: float | None = None
        self._typed = False  # set by the first samples
        self._inbuf: list[np.ndarray] = []
        self._inlen = 0
        self._consumed = 0  # samples handed to the chunk processor so far
        self.lag: int | None = None  # chosen from the first tune_s seconds
        self.whitener = np.ones(1)  # FIR that whitens the background noise (set with the lag)
        self._wh_resp = self._hp_resp
        self._tail = np.zeros(0, dtype=self._dtype)  # last `lag` samples before this chunk
        self._prev_frames = np.zeros(16)  # energies of the 16 frames before this chunk
        self._floor = FloorTracker(self.cfg, self.sub)
        self._last_onset_frame = -(10**12)
        self._quiet_until_frame = -1
        self._raw = np.zeros(0, dtype=self._dtype)  # recent raw audio (our own copy)
        self._raw_start = 0
        self._fresh = np.zeros(0, dtype=self._dtype)  # the chunk being processed, right after _raw (not copied)
        self._waiting: list[tuple[int, float]] = []  # (onset sample, frame snr) awaiting their snippet
        self.floor_db = float("nan")  # current noise floor, dB re full-scale frame energy per sample
        self.samples_seen = 0
        self.max_abs = 0.0
        self.sum_x = 0.0

    # -- public API -------------------------------------------------------------------------
    def process(self, samples: np.ndarray, scale: float | None = None) -> list[Impact]:
        """Feed the next block (1-D float array); returns the impacts that became final.

        With ``scale``, the samples are 16- or 32-bit integers standing for their value times
        ``scale`` (a power of two, as a 16- or 24-bit file reads): the results are those of the
        float32 samples ``np.multiply(samples, scale, dtype=np.float32)``.  A stream keeps the
        kind of samples it began with.
        """
        if scale is None:
            x = np.asarray(samples, dtype=np.float32).reshape(-1)
        else:
            x = np.asarray(samples).reshape(-1)
            if x.dtype not in (np.int16, np.int32):
                raise ParameterError(f"integer samples must be int16 or int32, not {x.dtype}")
        if not self._typed:
            self._typed = True
            self._dtype, self._scale = x.dtype, (None if scale is None else float(scale))
            for name in ("_tail", "_raw", "_fresh"):
                setattr(self, name, getattr(self, name).astype(self._dtype))
        elif x.dtype != self._dtype or (scale is not None and float(scale) != self._scale):
            raise ParameterError("a stream's samples must keep one type and scale (float32, or integers)")
        if not len(x):
            return []
        self.samples_seen += len(x)
        self._inbuf.append(x)
        self._inlen += len(x)
        out: list[Impact] = []
        if self.lag is None and self._inlen < int(self.cfg.tune_s * self.samplerate):
            return out
        if self.lag is None:
            self._tune(self._as_float(np.concatenate(self._inbuf)))
        if self._inlen >= self.chunk:
            # Everything buffered, in whole statistics blocks: what was held back, completed to a
            # whole block from the new samples (a small copy), then the new samples' whole blocks
            # in place (no copy of the bulk of the audio).
            unit = self.hop * self.sub
            held = self._inbuf[:-1]
            if held:
                need = (-sum(len(h) for h in held)) % unit
                out += self._process_chunk(np.concatenate(held + [x[:need]]))
                x = x[need:]
            n_whole = (len(x) // unit) * unit
            if n_whole:
                out += self._process_chunk(x[:n_whole])
            rest = x[n_whole:].copy()  # the caller may reuse its buffer
            self._inbuf = [rest] if len(rest) else []
            self._inlen = len(rest)
        return out

    def flush(self) -> list[Impact]:
        """End of stream: process what is left and return the remaining impacts."""
        out, tail = self._drain()
        if len(tail):  # too short for a frame: keep it only as audio for snippets
            self._append_raw(tail)
            self._consumed += len(tail)
        out += self._emit_ready(final=True)
        return out

    def _drain(self) -> tuple[list[Impact], np.ndarray]:
        """Process the buffered input's whole frames now; returns the impacts and the leftover samples."""
        if not self._inlen:
            return [], np.zeros(0, dtype=self._dtype)
        buf = np.concatenate(self._inbuf)
        self._inbuf, self._inlen = [], 0
        if self.lag is None:
            self._tune(self._as_float(buf))
        n = (len(buf) // self.hop) * self.hop
        return (self._process_chunk(buf[:n]) if n else []), buf[n:]

    def skip(self, n: int) -> list[Impact]:
        """Audio was lost (input overflow): finish what is buffered, then jump ``n`` samples ahead.

        The envelope history is cleared so the jump itself does not look like an impact.
        """
        out, tail = self._drain()
        n += len(tail)  # a part-frame before the gap is dropped with it
        out += self._emit_ready(final=True)
        self._consumed += n
        self.samples_seen += n
        pad = (-self._consumed) % self.hop  # keep frames aligned to the hop grid
        self._consumed += pad
        self._raw = np.zeros(0, dtype=self._dtype)
        self._fresh = np.zeros(0, dtype=self._dtype)
        self._raw_start = self._consumed
        self._tail = np.zeros(0, dtype=self._dtype)
        self._prev_frames = np.zeros(len(self._prev_frames))
        # the audio resumes abruptly: no onset in the first frames after the gap
        self._quiet_until_frame = self._consumed // self.hop + len(self._prev_frames)
        return out

    @property
    def position(self) -> int:
        """Sample index up to which the stream has been examined."""
        return self._consumed

    # -- internals ---------------------------------------------------------------------------
    def _as_float(self, x: np.ndarray) -> np.ndarray:
        """The samples as float32 (integers times their scale: exact, the file reader's values)."""
        return samples_as_float32(x, self._scale)

    def _append_raw(self, x: np.ndarray) -> None:
        """Audio after the raw audio so far.  The chunk itself is not copied: snippets are cut from
        it and what later snippets need is kept (a copy of the last ~0.1 s) by _emit_ready."""
        if len(self._fresh):
            self._raw = np.concatenate([self._raw, self._fresh])
        self._fresh = x

    def _raw_end(self) -> int:
        return self._raw_start + len(self._raw) + len(self._fresh)

    def _fetch(self, out: np.ndarray, a: int) -> None:
        """Copy the raw audio from sample ``a`` on into ``out`` (zeros where there is none)."""
        b = a + len(out)
        for start, piece in ((self._raw_start, self._raw), (self._raw_start + len(self._raw), self._fresh)):
            lo, hi = max(a, start), min(b, start + len(piece))
            if hi > lo:
                out[lo - a: hi - a] = piece[lo - start: hi - start]

    @staticmethod
    def _head(x: np.ndarray, prev: np.ndarray, lag: int) -> np.ndarray:
        """The lag samples before x: prev's last ones; before the first sample the signal is taken
        to have been constant (no jump at the start)."""
        fill = prev[0] if len(prev) else (x[0] if len(x) else 0)
        return np.concatenate([np.full(max(0, lag - len(prev)), fill, dtype=x.dtype),
                               prev[-lag:] if len(prev) else prev]).astype(x.dtype, copy=False)

    def _frame_energy(self, x: np.ndarray, prev: np.ndarray, lag: int) -> np.ndarray:
        """Mean power per frame of x[n] - x[n-lag] (prev holds the samples before x)."""
        hop = self.hop
        d = np.empty(len(x), dtype=np.float32)
        if lag < len(x):
            np.subtract(x[lag:], x[:-lag], out=d[lag:])
        head = self._head(x, prev, lag)
        m = min(lag, len(x))
        d[:m] = x[:m] - head[:m]
        f = d[: (len(x) // hop) * hop].reshape(-1, hop)
        return np.einsum("ij,ij->i", f, f).astype(np.float64) / hop

    def _chunk_power(self, x: np.ndarray, prev: np.ndarray, lag: int) -> tuple[np.ndarray, float, float, float]:
        """The one pass over every sample of a chunk: :meth:`_frame_energy`, and the chunk's largest
        sample, smallest and sum (in C when built: one read of the samples instead of five)."""
        if kernels.compiled():
            return kernels.frame_power(x, self._head(x, prev, lag), lag, self.hop, scale=self._scale)
        x, prev = self._as_float(x), self._as_float(prev)
        return self._frame_energy(x, prev, lag), float(x.max()), float(x.min()), float(np.sum(x))

    def _tune(self, x: np.ndarray) -> None:
        """Choose the difference lag under which the loudest moments stand out most."""
        x = x[: int(self.cfg.tune_s * self.samplerate)]  # the same audio whatever the block sizes
        best, best_lag = -np.inf, 1
        for lag in self.lag_choices:
            e = self._frame_energy(x, np.zeros(0, dtype=np.float32), lag)[lag // self.hop + 1:]
            if len(e) < 4 * self.nsum:
                continue
            s = np.convolve(e, np.ones(self.nsum), mode="valid")
            med = float(np.median(s))
            top = float(np.quantile(s, 0.997))
            contrast = top / med if med > 0 else 0.0
            if contrast > best * 1.05:  # prefer short lags unless a longer one is clearly better
                best, best_lag = contrast, lag
        self.lag = best_lag
        self.whitener = noise_whitener(x, self._frame_energy(x, np.zeros(0, dtype=np.float32), best_lag),
                                        self.hop, self.samplerate)
        # the whitening FIR is causal: its spectrum times the zero-phase high-pass
        self._wh_resp = (self._hp_resp * np.fft.rfft(self.whitener, self._nfft)).astype(np.complex64)

    def _process_chunk(self, x: np.ndarray) -> list[Impact]:
        n0 = self._consumed
        e, hi, lo, total = self._chunk_power(x, self._tail, self.lag)
        self.max_abs = max(self.max_abs, hi, -lo)
        self.sum_x += total  # float32 within a frame (pairwise within the chunk in numpy), float64 across
        self._tail = np.concatenate([self._tail, x])[-self.lag:] if self.lag > len(x) else x[-self.lag:].copy()
        P = len(self._prev_frames)
        ext = np.concatenate([self._prev_frames, e])
        cs = np.concatenate([[0.0], np.cumsum(ext)])
        ns = self.nsum
        m = len(ext)
        # mean power over the nsum frames ending at each frame i (i = P .. m-1), and over 5..12
        # frames before it (cs[j] is the sum of the first j frames)
        now = (cs[P + 1: m + 1] - cs[P + 1 - ns: m + 1 - ns]) / ns
        bg = (cs[P - 4: m - 4] - cs[P - 12: m - 12]) / 8.0
        thr_b, fl_b = self._floor.thresholds(e, now)
        self.floor_db = 10 * math.log10(max(fl_b[-1], 1e-30))
        self._prev_frames = ext[-P:]
        rise = 10 ** (self.cfg.rise_db / 10)
        args = (now, bg, np.asarray(thr_b, dtype=np.float64), np.asarray(fl_b, dtype=np.float64), self.sub, rise,
                n0 // self.hop, ns, self.refractory_frames, self._last_onset_frame, self._quiet_until_frame)
        onsets, floors, self._last_onset_frame = (kernels.onset_scan(*args) if kernels.compiled()
                                                  else self._onsets_numpy(*args))
        self._waiting += zip((onsets * self.hop).tolist(), floors.tolist())
        self._append_raw(x)
        self._consumed += len(x)
        return self._emit_ready(final=False)

    @staticmethod
    def _onsets_numpy(now, bg, thr_b, fl_b, sub: int, rise: float, first_frame: int, ns: int, refractory: int,
                      last: int, quiet: int) -> tuple[np.ndarray, np.ndarray, int]:
        """The onset rule over a chunk's frames: a frame is a candidate when its 2 ms power beats its
        block's threshold and the power 2.5-6 ms before it by the rise; a candidate starts an impact
        unless within the refractory time of the last one or in the quiet frames after a gap.
        Returns the onset frames (where each summed window starts), their blocks' floors and the last
        onset frame (the reference of the compiled ``kernels.onset_scan``)."""
        blk = np.arange(len(now)) // sub
        thr, fl = thr_b[blk], fl_b[blk]
        onsets, floors = [], []
        for c in np.flatnonzero((now > thr) & (now > bg * rise + 0.5 * fl)).tolist():
            fi = first_frame + c - ns + 1  # the summed window starts here
            if fi - last < refractory or first_frame + c < quiet:
                continue
            last = fi + ns - 1
            onsets.append(fi)
            floors.append(fl[c])
        return np.array(onsets, dtype=np.int64), np.array(floors, dtype=np.float64), last

    def _emit_ready(self, final: bool) -> list[Impact]:
        out: list[Impact] = []
        end = self._raw_end()
        keep, ready = [], []
        for onset, snr in self._waiting:
            if onset + self.post <= end or final:
                ready.append((onset, snr))
            else:
                keep.append((onset, snr))
        if ready:
            out = self._cut(ready)
        self._waiting = keep
        # drop raw audio nobody needs any more (keep one pre-window before the next chunk)
        # an onset found in the next chunk can lie up to one summing window before it
        back = self.pre + (self.nsum + 2) * self.hop
        need_from = min([o - self.pre for o, _ in keep], default=end - back)
        need_from = max(self._raw_start, min(need_from, end - back))
        kept = np.empty(end - need_from, dtype=self._dtype)
        self._fetch(kept, need_from)
        self._raw, self._raw_start, self._fresh = kept, need_from, np.zeros(0, dtype=self._dtype)
        return out

    def _cut(self, ready: list[tuple[int, float]]) -> list[Impact]:
        """The impacts' snippets and levels (each ``snr`` comes in as the floor's power, goes out in dB).

        The snippets of all impacts ready at once are cut straight into rows as long as the FFT
        (the zeros are its padding; an FFT asked to pad for itself copies each row first, costing
        as much as the transform) and filtered together (:func:`.snippets.impacts_from_rows`).
        """
        n = self.pre + self.post
        padded = np.zeros((len(ready), self._nfft), dtype=np.float32)
        trunc = []
        end = self._raw_end()
        for i, (onset, _) in enumerate(ready):
            a = onset - self.pre
            self._fetch(padded[i, :n], a)
            trunc.append(onset + self.post > end or a < self._raw_start)
        return impacts_from_rows(padded, [o for o, _ in ready], np.array([f for _, f in ready]), trunc,
                                 pre=self.pre, post=self.post, samplerate=self.samplerate, lag=self.lag or 1,
                                 hop=self.hop, scale=self._scale, hp_resp=self._hp_resp, wh_resp=self._wh_resp,
                                 whitened=len(self.whitener) > 1)
