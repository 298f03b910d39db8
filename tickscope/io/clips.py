"""Short audio clips around a log's anomalies, within a byte budget (``log --keep-audio anomalies``).

A ring of the last few seconds of audio; a clip is cut once its audio is complete and encoded
as FLAC bytes for the log database.
"""
from __future__ import annotations

import io
import math

import numpy as np

from ..model import Block


class ClipKeeper:
    """Short audio clips around anomalies, within a byte budget (``--keep-audio anomalies``)."""

    def __init__(self, samplerate: float, budget_bytes: int, used_bytes: int = 0, *, pre_s: float = 0.6,
                 post_s: float = 1.0, min_spacing_s: float = 20.0):
        self.samplerate = float(samplerate)
        self.budget = budget_bytes
        self.used = used_bytes
        self.pre_s, self.post_s = pre_s, post_s
        self.min_spacing_s = min_spacing_s
        n = int(round((pre_s + post_s + 6.0) * self.samplerate))  # decisions come up to ~3 s after the sound
        self._ring = np.zeros(n, dtype=np.float32)
        self._end = 0  # stream sample index just after the ring's newest sample
        self._pending: list[tuple[str, float]] = []
        self._last: dict[str, float] = {}
        self.skipped = 0
        self.kept = 0  # clips handed out by ready() and not dropped or removed since
        self.removed = 0  # clips stored, then removed to make room for the events (a full disk)
        self.stopped = ""  # why no more clips are kept (the disk filling up), once they are not
        self.stopped_at_s: float | None = None

    def audio(self, block: Block, start_sample: int) -> None:
        x = np.asarray(block.samples, dtype=np.float32).reshape(-1)
        if start_sample != self._end:  # a gap: the ring restarts
            self._ring[:] = 0
        need = len(x) + int(round((self.pre_s + self.post_s + 6.0) * self.samplerate))
        if len(self._ring) < need:  # a sound is decided up to a block after it: keep two blocks' worth
            self._ring = np.concatenate([np.zeros(need - len(self._ring), dtype=np.float32), self._ring])
        n = len(self._ring)
        if len(x) >= n:
            self._ring[:] = x[-n:]
        else:
            self._ring = np.roll(self._ring, -len(x))
            self._ring[-len(x):] = x
        self._end = start_sample + len(x)

    @property
    def pending(self) -> int:
        return len(self._pending)

    def request(self, kind: str, time_s: float) -> None:
        if self.used >= self.budget or self.stopped:
            self.skipped += 1
            return
        if time_s - self._last.get(kind, -math.inf) < self.min_spacing_s or len(self._pending) >= 16:
            self.skipped += 1
            return
        self._last[kind] = time_s
        self._pending.append((kind, time_s))

    def ready(self) -> list[tuple[str, float, float, bytes]]:
        """Clips whose audio is complete: (kind, time_s, start_s, FLAC bytes)."""
        import soundfile as sf

        out, keep = [], []
        pos_s = self._end / self.samplerate
        ring_start_s = (self._end - len(self._ring)) / self.samplerate
        for kind, t in self._pending:
            if t + self.post_s > pos_s:
                keep.append((kind, t))
                continue
            a = max(t - self.pre_s, ring_start_s, 0.0)
            i0 = int(round((a - ring_start_s) * self.samplerate))
            i1 = int(round((t + self.post_s - ring_start_s) * self.samplerate))
            seg = self._ring[max(i0, 0): max(i1, 0)]
            if len(seg) < 0.1 * self.samplerate:
                self.skipped += 1
                continue
            buf = io.BytesIO()
            sf.write(buf, np.clip(seg, -1, 1), int(round(self.samplerate)), format="FLAC", subtype="PCM_16")
            data = buf.getvalue()
            if self.used + len(data) > self.budget:
                self.skipped += 1
                continue
            self.used += len(data)
            self.kept += 1
            out.append((kind, t, a, data))
        self._pending = keep
        return out

    def drop(self, nbytes: int) -> None:
        """A clip from :meth:`ready` that could not be stored after all."""
        self.used -= nbytes
        self.kept -= 1
        self.skipped += 1

    def removed_from_store(self, n: int, nbytes: int) -> None:
        """``n`` stored clips of ``nbytes`` were removed again (to make room for the events)."""
        self.removed += n
        self.kept -= n
        self.used -= nbytes

    def stop(self, reason: str, at_s: float) -> None:
        """Keep no more clips (the events come first: e.g. the disk is filling up)."""
        if not self.stopped:
            self.stopped, self.stopped_at_s = reason, at_s
        self.skipped += len(self._pending)
        self._pending = []
