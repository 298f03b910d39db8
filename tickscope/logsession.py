"""The log's sink: feeds the one pipeline and writes what it decides to the log database.

``LogSession`` sits where the file report and the live screen sit for ``analyze`` and
``listen``: the same :class:`~tickscope.pipeline.Analyzer` (with a bounded history), and
everything it decides goes to :class:`~tickscope.io.store.LogStore`, committed every few
seconds.  Nothing here grows with the number of steps: per-minute and per-hour work uses
buffers of one minute and one hour, the audio kept for anomaly clips is a ring of a few
seconds, and the clips themselves have a byte budget.
"""
from __future__ import annotations

import dataclasses
import json
import math
import os
import shutil
import time
from dataclasses import dataclass

import numpy as np

from .core.rate import fit_rate
from .core.regulation import unseen_correction_ci95_s_per_day
from .errors import StoreError
from .io.clips import ClipKeeper
from .io.store import BLOCK_WINDOW_S, LogStore
from .model import BEAT_SOUNDS, Block, Event
from .pipeline import LOUD_REJECT_DB

COMMIT_EVERY_S = 2.0  # wall seconds between commits (at most this much is lost to a crash)
COMMIT_AUDIO_S = 60.0  # ... and at most this much audio when replaying a file faster than real time
HISTORY_STEPS = 3600  # steps the analyzer keeps for the live summary (the database keeps all)
CLIP_KINDS = ("missed", "failed", "correction", "rejected")
#: Clips are kept only while the disk keeps this much free for the events after them: a weekend of
#: events (60 h x 0.14 MB) and SQLite's journal between its checkpoints (1000 pages of 4 KiB), with
#: room to spare (our own choice).  The events come first.
CLIP_FLOOR_BYTES = 16_000_000


@dataclass(frozen=True)
class HourRate:
    hour: int  # hour of the log's timeline
    rate_s_per_day: float
    ci95_s_per_day: float
    steps: int
    missed: int
    complete: bool


def _count_key(kind: str) -> str:
    """The counter an event kind adds to (steps, missed, failed, corrections, rejected, secondary)."""
    return {"step": "steps", "correction": "corrections"}.get(kind, kind)


class _Bucket:
    """Events of one minute or one hour (bounded by the bucket's length)."""

    def __init__(self, index: int):
        self.index = index
        self.k: list[int] = []
        self.t: list[float] = []
        self.peak: list[float] = []
        self.decay = {0: [], 1: []}
        self.counts = dict.fromkeys(("steps", "missed", "failed", "corrections", "rejected", "secondary"), 0)

    def add(self, ev: Event, good: bool) -> None:
        key = _count_key(ev.kind)
        if key in self.counts:
            self.counts[key] += 1
        if ev.kind == "step":
            if good:
                self.k.append(int(ev.step))
                self.t.append(ev.time_s)
            self.peak.append(ev.peak_dbfs)
            if math.isfinite(ev.decay_ms):
                self.decay[0 if ev.polarity == "A" else 1].append(ev.decay_ms)

    def rate(self, nominal_s: float | None, clock_ppm: float | None, clock_u95: float):
        if nominal_s is None or len(self.k) < 6 or max(self.k) - min(self.k) < 5:
            return None
        return fit_rate(np.array(self.k), np.array(self.t), nominal_s, clock_ppm=clock_ppm or 0.0,
                        clock_ppm_u95=clock_u95)


class LogSession:
    """One segment of a log: analyzer in, database out.

    Parameters
    ----------
    store : LogStore
    seg : int
        The segment's id in the store.
    analyzer : Analyzer or None
        The pipeline (None when events are handed to :meth:`take` directly, e.g. by a test).
    timeline_s : float
        Where time 0 of this segment lies on the log's timeline (for minute and hour buckets).
    nominal_s : float or None
        The step interval when known in advance (otherwise from the analyzer once acquired).
    """

    def __init__(self, store: LogStore, seg: int, analyzer=None, *, timeline_s: float = 0.0,
                 clock_ppm: float | None = None, clock_ppm_u95: float = 0.0, samplerate: float | None = None,
                 nominal_s: float | None = None, clips: ClipKeeper | None = None,
                 commit_every_s: float = COMMIT_EVERY_S, commit_audio_s: float = COMMIT_AUDIO_S, clock=time.monotonic):
        self.store = store
        self.seg = seg
        self.an = analyzer
        self.timeline_s = timeline_s
        self.clock_ppm = clock_ppm
        self.clock_u95 = clock_ppm_u95
        self.samplerate = float(samplerate or (analyzer.samplerate if analyzer is not None else 1.0))
        self._nominal = nominal_s
        self.clips = clips
        self.commit_every_s = commit_every_s
        self.commit_audio_s = commit_audio_s
        self._clock = clock
        self._last_commit = clock()
        self._last_commit_audio = 0.0
        self.position_s = 0.0
        self.totals = dict.fromkeys(("steps", "missed", "failed", "corrections", "rejected", "secondary", "gaps",
                                     "faint"), 0)
        self._minutes: dict[int, _Bucket] = {}
        self._hour: _Bucket | None = None
        self.hours: list[HourRate] = []  # closed hours of this segment (one entry per hour: small)
        self._win: tuple[int, int, float, float, float, float] | None = None  # least-delayed block of the window
        self.good_match = analyzer.tracker.cfg.good_match if analyzer is not None else 0.6
        self.commits = 0
        self._miss_run = 0  # missed steps since the last step heard
        self._miss_hours: list[_Bucket] = []  # the hour bucket of each of them
        self.sound: dict | None = None  # the segment's sound as analyze would call it (set by finish)
        self.sound_reason = ""  # ... and why, when it holds no steps or no stepping motor
        self._clip_rows: list[tuple[str, float, float, bytes]] = []  # cut, stored after the next commit
        if analyzer is not None and getattr(analyzer, "lossy", False):
            # the report searches such a segment's step times for a codec's abrupt shifts, as analyze does
            store.set_meta(f"segment {seg} lossy", "1")

    @property
    def nominal_s(self) -> float | None:
        if self.an is not None and self.an.tracker.nominal_s is not None:
            return self.an.tracker.nominal_s
        return self._nominal

    # -- input ---------------------------------------------------------------------------------
    def feed(self, block: Block) -> list[Event]:
        """One block of audio through the pipeline; decided events go to the database."""
        an = self.an
        if block.gap_before > 0:
            g0 = an.duration_s
            # live: audio the capture lost; a file: samples that are not numbers
            kind = "overflow" if block.host_time_s is not None else "unusable audio"
            self.store.add_gap(self.seg, g0, g0 + block.gap_before / self.samplerate, kind)
            self.totals["gaps"] += 1
        evs = an.feed(block)
        self.position_s = an.duration_s
        start = int(round(an.duration_s * self.samplerate)) - len(block.samples)
        if self.clips is not None:
            self.clips.audio(block, start)
        if block.host_time_s is not None:
            self._block_reading(start, block)
        self.take(evs)
        if self.clips is not None and self.clips.pending:
            self._store_clips()
        self.maybe_commit()
        return evs

    def _store_clips(self) -> None:
        self._clip_rows.extend(self.clips.ready())

    def _write_clips(self) -> None:
        """The clips cut since the last commit, each in a transaction of its own after the events'
        (a clip that does not fit costs only itself; from then on no clips are kept)."""
        rows, self._clip_rows = self._clip_rows, []
        for i, (kind, t, a, data) in enumerate(rows):
            why = "" if self.clips.stopped else self._no_room_for_clip(len(data))
            if not why:
                try:
                    self.store.add_clip(self.seg, t, kind, int(round(self.samplerate)), a, data)
                    self.store.commit()
                    continue
                except StoreError as e:
                    self.store.rollback()
                    why = getattr(e, "why", str(e))
            self.clips.stop(why, t)
            for *_, d in rows[i:]:
                self.clips.drop(len(d))
            return

    def _no_room_for_clip(self, nbytes: int) -> str:
        try:
            free = shutil.disk_usage(os.path.dirname(os.path.abspath(self.store.path))).free
        except OSError:
            return ""
        if free - nbytes < CLIP_FLOOR_BYTES:
            return f"less than {CLIP_FLOOR_BYTES / 1e6:.0f} MB free on the disk, kept for the events"
        return ""

    def _make_room(self) -> bool:
        """The disk is full: the events come first, so this segment's clips go to make room for them
        (True if any went: the commit is then tried once more)."""
        if self.clips is None:
            return False
        self.drop_clips("the disk is full")
        try:
            n, nbytes = self.store.delete_clips(self.seg)
        except StoreError:
            self.store.rollback()
            return False
        self.clips.removed_from_store(n, nbytes)
        return n > 0

    def drop_clips(self, reason: str) -> None:
        """No more clips, and those cut but not yet stored are dropped (the store cannot write)."""
        if self.clips is None:
            return
        self.clips.stop(reason, self.position_s)
        for *_, d in self._clip_rows:
            self.clips.drop(len(d))
        self._clip_rows = []

    def _block_reading(self, start: int, b: Block) -> None:
        w = int(start / self.samplerate // BLOCK_WINDOW_S)
        delay = b.host_time_s - start / self.samplerate
        if self._win is not None and self._win[0] != w:
            _, s0, h, wa, ad, _ = self._win
            self.store.add_block(self.seg, s0, h, wa, ad)
            self._win = None
        if self._win is None or delay < self._win[5]:
            self._win = (w, start, b.host_time_s, b.wall_time_s, b.adc_time_s, delay)

    def take(self, events: list[Event], position_s: float | None = None) -> None:
        """Store decided events and update the minute and hour buckets."""
        if position_s is not None:
            self.position_s = position_s
        for ev in events:
            if ev.kind == "regrid":
                # the clock followed so far was not the movement (it stopped while another beat went on)
                gone = self.store.forget_steps(self.seg, ev.time_s)
                for kind, n in gone.items():
                    self.totals[_count_key(kind)] -= n
                self.totals["rejected"] += gone["step"]
                self.store.add_gap(self.seg, ev.time_s, ev.time_s, "grid found again")
                continue
            if ev.kind == "secondary":
                self.totals["secondary"] += 1
                self._bucket_minute(ev).add(ev, False)
                continue
            if ev.kind == "rejected" and not ev.snr_db >= self.loud_db():
                # faint off-grid sounds (a quiet room's noise at 8 kHz gives several a second)
                # are counted per minute, not stored one by one
                self.totals["faint"] += 1
                self._bucket_minute(ev).add(ev, False)
                continue
            pol = None if ev.polarity not in ("A", "B") else (0 if ev.polarity == "A" else 1)
            self.store.add_event(self.seg, ev.kind, ev.step, ev.time_s, pol, ev.peak_dbfs, ev.snr_db, ev.match,
                                 ev.decay_ms, ev.flags, ev.lift_ms)
            key = _count_key(ev.kind)
            if key in self.totals:
                self.totals[key] += 1
            good = ev.kind == "step" and ev.match >= self.good_match and "low-match" not in ev.flags and "in-burst" not in ev.flags
            self._bucket_minute(ev).add(ev, good)
            hour = self._bucket_hour(ev)
            hour.add(ev, good)
            if ev.kind == "missed":
                self._miss_run += 1
                self._miss_hours.append(hour)
            elif ev.kind == "step":
                self._miss_run = 0
                self._miss_hours = []
            if self.clips is not None and ev.kind in CLIP_KINDS:
                self.clips.request(ev.kind, ev.time_s)
        self._close_minutes(self.position_s)

    def loud_db(self) -> float:
        """Off-grid sounds at least this far over the floor are stored (as ``analyze`` counts them)."""
        an = self.an
        return an.loud_db(recent=200) if an is not None and an.step_snr.n >= 8 else LOUD_REJECT_DB

    # -- buckets -------------------------------------------------------------------------------
    def _bucket_minute(self, ev: Event) -> _Bucket:
        m = int((self.timeline_s + ev.time_s) // 60)
        b = self._minutes.get(m)
        if b is None:
            b = self._minutes[m] = _Bucket(m)
        return b

    def _close_minutes(self, position_s: float, final: bool = False) -> None:
        now_min = (self.timeline_s + position_s - 5.0) / 60  # events arrive up to a few s late
        for m in sorted(self._minutes):
            if final or m + 1 <= now_min:
                self._write_minute(self._minutes.pop(m))

    def _write_minute(self, b: _Bucket) -> None:
        r = b.rate(self.nominal_s, self.clock_ppm, self.clock_u95)
        peak = float(np.median(b.peak)) if b.peak else None
        da = float(np.median(b.decay[0])) if b.decay[0] else None
        db = float(np.median(b.decay[1])) if b.decay[1] else None
        self.store.add_minute(self.seg, {
            "minute": b.index, **b.counts,
            "rate_s_per_day": None if r is None else r.rate_s_per_day,
            "rate_ci95_s_per_day": None if r is None else r.ci95_s_per_day,
            "jitter_us": None if r is None else r.jitter_us, "peak_dbfs": peak, "decay_a_ms": da, "decay_b_ms": db})

    def _bucket_hour(self, ev: Event) -> _Bucket:
        h = int((self.timeline_s + ev.time_s) // 3600)
        if self._hour is not None and h > self._hour.index:
            self.hours.append(self._hour_rate(self._hour, complete=True))
            self._hour = None
        if self._hour is None:
            self._hour = _Bucket(h)
        return self._hour

    def _hour_rate(self, b: _Bucket, complete: bool) -> HourRate:
        r = b.rate(self.nominal_s, self.clock_ppm, self.clock_u95)
        if r is None:
            return HourRate(b.index, float("nan"), float("nan"), b.counts["steps"], b.counts["missed"], complete)
        # as analyze does: a logic-regulation correction may not have come yet
        ci = unseen_correction_ci95_s_per_day(r.ci95_s_per_day, r.span_s)
        return HourRate(b.index, r.rate_s_per_day, ci, b.counts["steps"], b.counts["missed"], complete)

    def hourly(self) -> list[HourRate]:
        """Rate per hour so far (the current hour last, marked incomplete)."""
        cur = [self._hour_rate(self._hour, complete=False)] if self._hour is not None and self._hour.k else []
        return self.hours[-48:] + cur

    # -- durability ----------------------------------------------------------------------------
    def maybe_commit(self) -> bool:
        now = self._clock()
        if now - self._last_commit >= self.commit_every_s or self.position_s - self._last_commit_audio >= self.commit_audio_s:
            self.commit()
            return True
        return False

    def commit(self) -> None:
        decided = self.an.decided_until_s() if self.an is not None else self.position_s
        self.store.update_segment(self.seg, duration_s=self.position_s, decided_s=decided,
                                  step_interval_s=self.nominal_s)
        self.store.commit(make_room=self._make_room)
        self._last_commit = self._clock()
        self._last_commit_audio = self.position_s
        self.commits += 1
        if self._clip_rows:
            self._write_clips()

    def finish(self, reason: str) -> None:
        """End of the segment: decide the last slots, write the last buckets, commit."""
        if self.an is not None:
            summary = self.an.finish()
            self.take(self.an.drain_final_events())
            self.position_s = self.an.duration_s
            # what the segment's sound was, as analyze would say it: a log of a sound that is not a
            # stepping motor (an escapement, a rattle) holds beats, not steps, and its report says so
            self.sound = {"sound": summary.sound, "beat_interval_s": summary.measured_interval_s,
                          "beats": summary.beats.heard if summary.beats is not None else None,
                          "why": summary.sound_reason if summary.sound in BEAT_SOUNDS else None}
            if summary.escapement is not None:  # from the beats the analyzer still holds (its history)
                from .export import escapement_to_dict

                self.sound["escapement"] = escapement_to_dict(summary.escapement)
                self.sound["reading"] = list(summary.reading)
            self.store.set_meta(f"segment {self.seg} sound", json.dumps(self.sound))
            self.sound_reason = summary.sound_reason or ""
        if self._win is not None:
            _, s0, h, wa, ad, _ = self._win
            self.store.add_block(self.seg, s0, h, wa, ad)
            self._win = None
        # slots after the last step heard are silence, not missed steps (as analyze counts them)
        self.totals["missed"] -= self._miss_run
        # (the analyzer drops the last ones it decides at the end itself; it counts them all)
        self.totals["stopped_slots"] = max(self._miss_run, getattr(self.an, "trailing_silence_slots", 0) or 0)
        for b in self._miss_hours:  # the open hour's count too (the screen and the end's hourly lines)
            if b is self._hour:
                b.counts["missed"] -= 1
        self._close_minutes(self.position_s, final=True)
        if self._hour is not None:
            self.hours.append(self._hour_rate(self._hour, complete=False))
            self._hour = None
        self.store.update_segment(self.seg, duration_s=self.position_s, decided_s=self.position_s,
                                  ended_wall=time.time(), end_reason=reason, step_interval_s=self.nominal_s)
        if self.clips is not None:
            self.clips.post_s = 0.0  # the end of the audio: clip what there is
            self._store_clips()
        self.store.commit(make_room=self._make_room)
        if self._clip_rows:
            self._write_clips()


# -- where a new segment goes: the log's resume rules ------------------------------------------------
@dataclass(frozen=True)
class SegmentPlan:
    """Where the next segment of a log begins and how it joins the ones before.

    ``join``: ``first`` (a new log), ``exact`` (a replay resumed on the same audio clock:
    ``start_frame`` is where the last commit's decided slots end) or ``wall`` (a device log
    resumed: joined by the wall clock).  ``done`` is set when there is nothing to add.
    """

    kind: str  # "file" | "device"
    source: str
    join: str
    timeline_s: float
    start_frame: int = 0
    channel: int = 0
    note: str = ""
    done: str = ""


def check_label(store: LogStore, label: str | None, db: str) -> None:
    """A log holds one movement: a different label is refused; the first label given is kept."""
    from .errors import ParameterError

    if label and store.meta().get("label") not in (label, ""):
        raise ParameterError(f"{db} is the log of {store.meta().get('label')!r}, not {label!r}: "
                             "use a new database for another movement")
    if label and not store.meta().get("label"):
        store.set_meta("label", label)
        store.commit()


def plan_file_segment(segments, source: str, *, samplerate: float, frames: int, channel: int | None,
                      default_channel, db: str) -> SegmentPlan:
    """A replay of ``source`` (an absolute path): a new log, or the same file resumed where it stopped.

    ``default_channel`` is called for the channel of a new log when none is given.
    """
    from .errors import ParameterError

    last = segments[-1] if segments else None
    if last is not None and last.source_kind != "file":
        raise ParameterError(f"{db} logs a device; a recording cannot be added to it (use a new database)")
    if last is not None and last.source != source:
        raise ParameterError(f"{db} logs {last.source}; to replay {source} use a new database")
    offset_s = 0.0 if last is None else last.source_offset_s + last.decided_s
    start_frame = int(round(offset_s * samplerate))
    if channel is None:
        channel = last.channel if last is not None else default_channel()
    plan = SegmentPlan("file", source, "first" if last is None else "exact", offset_s, start_frame, channel,
                       "" if last is None else f"resuming {source} at {offset_s:.1f} s (segment {len(segments) + 1})")
    if start_frame >= frames - int(samplerate):
        plan = dataclasses.replace(plan, done=f"{db} already holds {source} to its end; nothing to add "
                                              f"(tickscope report {db})")
    return plan


def plan_device_segment(segments, device: str, *, channel: int | None, now_wall_s: float, db: str) -> SegmentPlan:
    """A device log: a new log, or the log resumed as a segment joined by the wall clock."""
    from .errors import ParameterError

    last = segments[-1] if segments else None
    if last is not None and last.source_kind != "device":
        raise ParameterError(f"{db} logs the recording {last.source}; log a device into a new database")
    if last is None:
        return SegmentPlan("device", device, "first", 0.0, channel=channel or 0)
    pause = now_wall_s - (last.ended_wall or last.started_wall + last.duration_s)
    return SegmentPlan("device", device, "wall", now_wall_s - segments[0].started_wall, channel=channel or 0,
                       note=f"resuming the log as segment {len(segments) + 1} after {pause:.0f} s")
