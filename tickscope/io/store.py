"""The log database: one SQLite file per log (WAL journal, no server).

Layout (``SCHEMA_VERSION`` 2; a version 1 log gains the columns added since when a writer opens it):

``meta``      key/value: schema version, movement label, creation time, tickscope version
``segments``  one row per run of ``tickscope log`` on this database: source, device, sample
              rate, clock correction, where the segment sits on the log's timeline and how it
              is joined to the one before (``exact``: same audio clock, e.g. a file resumed
              where the last run stopped; ``wall``: by the host's wall clock only)
``events``    every step, missed step, failed step, correction pulse and rejected sound:
              segment, kind, step number, time on the segment's audio time base, polarity,
              level, SNR, template match, ring-down, flags, an escapement's lift time (small
              integers: ~35 bytes a row)
``blocks``    host clock readings of the capture, thinned to the least-delayed block per
              ``BLOCK_WINDOW_S`` (all a device-clock fit needs; see core/clockfit.py)
``gaps``      audio lost inside a segment (input overflow)
``minutes``   per-minute summaries: counts, rate and its interval, jitter, level, ring-down
``clips``     optional short FLAC clips around anomalies (``--keep-audio anomalies``)

Crash safety: the writer commits at least every few seconds; SQLite's WAL journal with
``synchronous=FULL`` makes every commit durable, and a crash, ``kill -9`` or power cut at any
moment leaves the database as of the last commit (SQLite's atomic commit guarantees; see
sqlite.org "Atomic Commit In SQLite" and "Write-Ahead Logging").

One writer at a time: a writer holds an OS advisory lock (``flock``; ``msvcrt.locking`` on
Windows) on ``DB.lock`` beside the database for as long as it is open.  SQLite's own locks
cannot do this, because a writer commits in many small transactions and another writer would
slip in between them (both would then write segment 1 at timeline 0).  The kernel drops the
lock with the process, so a ``kill -9`` never leaves a log locked; a stale ``DB.lock`` file
is harmless.  Readers (``report``) take no such lock.
"""
from __future__ import annotations

import os
import sqlite3
import time

import numpy as np

from ..errors import StoreError
from ..model import KIND_CODES, flag_bits
from .logerror import _store_error
from .loglock import WriterLock, _unlink
from .logschema import _COLUMNS, _FIELDS, _SCHEMA, MIGRATIONS, SCHEMA_VERSION, Segment

BLOCK_WINDOW_S = 10.0


class LogStore:
    """One log database.  Writes are batched; :meth:`commit` makes them durable.

    Parameters
    ----------
    path : str
        The database file (created if missing, unless ``readonly``).
    readonly : bool
        Open for reading only (the report; works while a logger is writing).
    """

    def __init__(self, path: str, *, readonly: bool = False):
        self.path = path
        self.readonly = readonly
        self._lock: WriterLock | None = None
        self.created = False  # the file did not exist before this writer opened it
        if os.path.isdir(path):
            raise StoreError(f"log {path}: is a directory, not a log database")
        if readonly and not os.path.isfile(path):
            raise StoreError(f"log {path}: no such file")
        if not readonly:
            d = os.path.dirname(os.path.abspath(path))
            if not os.path.isdir(d):
                raise StoreError(f"log {path}: the folder {d} does not exist")
            self._lock = WriterLock(path)
            self.created = not os.path.exists(path)
        try:
            self._open()
        except BaseException:
            if self._lock is not None:
                self._lock.release()
            raise
        self._in_tx = False
        self._event_rows: list[tuple] = []
        self._ops: list[tuple[str, tuple]] = []  # the open transaction's writes, to replay after a full disk

    def _open(self) -> None:
        path, readonly = self.path, self.readonly
        try:
            if readonly:
                self.db = sqlite3.connect(f"file:{os.path.abspath(path)}?mode=ro", uri=True, timeout=10,
                                          isolation_level=None, check_same_thread=False)
            else:
                self.db = sqlite3.connect(path, timeout=10, isolation_level=None, check_same_thread=False)
                mode = self.db.execute("PRAGMA journal_mode=WAL").fetchone()[0]
                if str(mode).lower() != "wal":
                    raise StoreError(f"log {path}: the file system does not support SQLite's WAL journal")
                self.db.execute("PRAGMA synchronous=FULL")
                self.db.executescript(_SCHEMA)
            self._check_schema()
            self._lift = self._migrate()
        except sqlite3.Error as e:
            raise _store_error(path, e) from e

    # -- housekeeping ------------------------------------------------------------------------
    def _check_schema(self) -> None:
        try:
            row = self.db.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()
        except sqlite3.OperationalError as e:
            if "no such table" in str(e):
                raise StoreError(f"log {self.path}: not a tickscope log (no meta table)") from e
            raise
        if row is None:
            if self.readonly:
                raise StoreError(f"log {self.path}: not a tickscope log (empty)")
            return
        if int(row[0]) > SCHEMA_VERSION:
            raise StoreError(f"log {self.path}: written by a newer tickscope (schema {row[0]}); upgrade to read it")

    def _migrate(self) -> bool:
        """Add the columns an older log lacks (a writer only) and say whether events hold lift times."""
        for table, column, decl in MIGRATIONS:
            have = {r[1] for r in self.db.execute(f"PRAGMA table_info({table})")}
            if column in have or self.readonly:
                continue
            self.db.execute("BEGIN IMMEDIATE")
            self.db.execute(f"ALTER TABLE {table} ADD COLUMN {column} {decl}")
            self.db.execute("UPDATE meta SET value=? WHERE key='schema_version'", (str(SCHEMA_VERSION),))
            self.db.execute("COMMIT")
        return "lift_us" in {r[1] for r in self.db.execute("PRAGMA table_info(events)")}

    def init_meta(self, label: str, version: str) -> None:
        with self._guard():
            have = self.db.execute("SELECT count(*) FROM meta").fetchone()[0]
            if have:
                return
            self.db.execute("BEGIN")
            self.db.executemany("INSERT INTO meta VALUES (?, ?)", [
                ("schema_version", str(SCHEMA_VERSION)), ("label", label),
                ("created_wall", repr(time.time())), ("tickscope_version", version)])
            self.db.execute("COMMIT")

    def meta(self) -> dict[str, str]:
        with self._guard():
            return dict(self.db.execute("SELECT key, value FROM meta").fetchall())

    def set_meta(self, key: str, value: str) -> None:
        self._write("INSERT OR REPLACE INTO meta VALUES (?, ?)", (key, value))

    def close(self) -> None:
        try:
            if self._in_tx and not self.readonly:
                self.commit()
        finally:
            try:
                self.db.close()
            finally:
                if self._lock is not None:  # after SQLite has let go of the file
                    self._lock.release()

    def discard(self) -> None:
        """Close and remove the database (and its journal files): for a log this writer created
        that never began (it holds no segment).  Refuses to remove one that holds segments."""
        self.rollback()
        try:
            holds = self.readonly or not self.created or bool(self.segments())
        except StoreError:
            holds = True
        if holds:
            self.close()
            return
        try:
            self.db.close()
            for ext in ("", "-wal", "-shm", "-journal"):
                _unlink(self.path + ext)
        finally:
            if self._lock is not None:
                self._lock.release()

    def _guard(self):
        return _Guard(self)

    def _begin(self) -> None:
        if not self._in_tx:
            with self._guard():
                self.db.execute("BEGIN IMMEDIATE")
            self._in_tx = True

    def _write(self, sql: str, params: tuple = ()):
        """One write of the open transaction (begun if need be), noted so that it can be replayed."""
        self._begin()
        with self._guard():
            cur = self.db.execute(sql, params)
        self._ops.append((sql, params))
        return cur

    # -- writing -----------------------------------------------------------------------------
    def new_segment(self, **f) -> int:
        """A new segment row (fields of :class:`Segment`; the id is returned)."""
        f = {_COLUMNS.get(k, k): v for k, v in f.items()}
        cols = ", ".join(f)
        q = ", ".join("?" for _ in f)
        cur = self._write(f"INSERT INTO segments ({cols}) VALUES ({q})", tuple(f.values()))
        self.commit()
        return int(cur.lastrowid)

    def update_segment(self, seg: int, **f) -> None:
        sets = ", ".join(f"{k}=?" for k in f)
        self._write(f"UPDATE segments SET {sets} WHERE id=?", (*f.values(), seg))

    def add_event(self, seg: int, kind: str, step: int | None, time_s: float, pol: int | None,
                  peak_dbfs: float, snr_db: float, match: float, decay_ms: float, flags: tuple[str, ...],
                  lift_ms: float = float("nan")) -> None:
        self._event_rows.append((seg, KIND_CODES[kind], step, float(time_s), pol, _i(peak_dbfs, 100), _i(snr_db, 100),
                                 _i(match, 1000), _i(decay_ms, 1000), flag_bits(flags), _i(lift_ms, 1000)))

    def add_block(self, seg: int, start_sample: int, host_s, wall_s, adc_s) -> None:
        self._write("INSERT INTO blocks VALUES (?, ?, ?, ?, ?)", (seg, int(start_sample), host_s, wall_s, adc_s))

    def forget_steps(self, seg: int, before_s: float) -> dict[str, int]:
        """The grid was found again at ``before_s``: what segment ``seg`` stored as steps before it
        become rejected sounds (another clock's ticks), and its missed, failed and corrected slots
        go.  (As the analyzer forgets them, see ``Analyzer._forget_grid``.)  Returns how many of each
        kind were forgotten."""
        self.commit()  # the batched rows first: then one query sees them all
        step, rejected = KIND_CODES["step"], KIND_CODES["rejected"]
        gone = (KIND_CODES["missed"], KIND_CODES["failed"], KIND_CODES["correction"])
        names = {v: k for k, v in KIND_CODES.items()}
        self._begin()
        with self._guard():
            counts = {names[int(k)]: int(n) for k, n in self.db.execute(
                "SELECT kind, COUNT(*) FROM events WHERE seg=? AND time_s<? GROUP BY kind", (seg, before_s))}
        self._write("UPDATE events SET kind=?, step=NULL, pol=NULL WHERE seg=? AND time_s<? AND kind=?",
                    (rejected, seg, before_s, step))
        self._write(f"DELETE FROM events WHERE seg=? AND time_s<? AND kind IN ({','.join('?' * len(gone))})",
                    (seg, before_s, *gone))
        return {k: counts.get(k, 0) for k in ("step", "missed", "failed", "correction")}

    def add_gap(self, seg: int, start_s: float, end_s: float, kind: str) -> None:
        self._write("INSERT INTO gaps VALUES (?, ?, ?, ?)", (seg, start_s, end_s, kind))

    def add_minute(self, seg: int, row: dict) -> None:
        cols = ", ".join(["seg", *row])
        q = ", ".join("?" for _ in range(len(row) + 1))
        self._write(f"INSERT OR REPLACE INTO minutes ({cols}) VALUES ({q})", (seg, *row.values()))

    def add_clip(self, seg: int, time_s: float, kind: str, samplerate: int, start_s: float, flac: bytes) -> None:
        self._write("INSERT INTO clips VALUES (?, ?, ?, ?, ?, ?)",
                    (seg, time_s, kind, samplerate, start_s, sqlite3.Binary(flac)))

    def delete_clips(self, seg: int) -> tuple[int, int]:
        """Remove segment ``seg``'s clips (committed at once); returns how many and their bytes."""
        with self._guard():
            n, nbytes = self.db.execute("SELECT count(*), coalesce(sum(length(flac)), 0) FROM clips WHERE seg=?",
                                        (seg,)).fetchone()
        if n:
            self._write("DELETE FROM clips WHERE seg=?", (seg,))
            self.commit()
        return int(n), int(nbytes)

    def clip_bytes(self) -> int:
        with self._guard():
            return int(self.db.execute("SELECT coalesce(sum(length(flac)), 0) FROM clips").fetchone()[0])

    def commit(self, *, make_room=None) -> None:
        """Write the batched rows and make everything durable.

        When the disk is full and ``make_room`` is given, it is called (after the transaction is
        rolled back) to free space, e.g. by removing clips; if it returns True the transaction's
        writes are made again and committed once more.  A commit that fails raises StoreError and
        leaves the writes pending until :meth:`rollback`.
        """
        try:
            self._commit_once()
        except StoreError as e:
            if make_room is None or getattr(e, "why", "") != "the disk is full":
                raise
            ops, rows = self._ops, self._event_rows
            self.rollback()
            if not make_room():
                raise
            self._event_rows = rows
            for sql, params in ops:
                self._write(sql, params)
            self._commit_once()

    def _commit_once(self) -> None:
        try:
            if self._event_rows:
                self._begin()
                with self._guard():
                    self.db.executemany("INSERT INTO events VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                                        self._event_rows)
            if self._in_tx:
                with self._guard():
                    self.db.execute("COMMIT")
        except BaseException:
            self._end_tx()  # nothing of it is written; the pending writes stay for a retry or rollback()
            raise
        self._in_tx = False
        self._event_rows = []
        self._ops = []

    def _end_tx(self) -> None:
        if self.db.in_transaction:  # a failed COMMIT (a full disk) may leave it open, or SQLite ends it
            try:
                self.db.execute("ROLLBACK")
            except sqlite3.Error:
                pass
        self._in_tx = False

    def rollback(self) -> None:
        """Forget everything not committed."""
        self._event_rows = []
        self._ops = []
        self._end_tx()

    def drop_empty_segment(self, seg: int) -> bool:
        """Remove segment ``seg`` if nothing of it was committed (a run that failed before any audio
        came); True if it is gone.  A segment holding audio or events is never removed."""
        self.rollback()
        with self._guard():
            row = self.db.execute("SELECT duration_s FROM segments WHERE id=?", (seg,)).fetchone()
            if row is None:
                return True
            n = self.db.execute("SELECT count(*) FROM events WHERE seg=?", (seg,)).fetchone()[0]
            if n or row[0] > 0:
                return False
            self.db.execute("BEGIN IMMEDIATE")
            try:
                for table in ("gaps", "blocks", "minutes", "clips"):
                    self.db.execute(f"DELETE FROM {table} WHERE seg=?", (seg,))
                self.db.execute("DELETE FROM meta WHERE key LIKE ?", (f"segment {seg} %",))
                self.db.execute("DELETE FROM segments WHERE id=?", (seg,))
                self.db.execute("COMMIT")
            except BaseException:
                self.db.execute("ROLLBACK")
                raise
        return True

    def kept(self, seg: int) -> dict:
        """What of segment ``seg`` is committed: audio seconds decided, events by kind, gaps and clips."""
        names = {v: k for k, v in KIND_CODES.items()}
        with self._guard():
            row = self.db.execute("SELECT decided_s FROM segments WHERE id=?", (seg,)).fetchone()
            kinds = {names.get(int(k), str(k)): int(n) for k, n in
                     self.db.execute("SELECT kind, count(*) FROM events WHERE seg=? GROUP BY kind", (seg,))}
            gaps = self.db.execute("SELECT count(*) FROM gaps WHERE seg=?", (seg,)).fetchone()[0]
            clips, clip_bytes = self.db.execute("SELECT count(*), coalesce(sum(length(flac)), 0) FROM clips "
                                                "WHERE seg=?", (seg,)).fetchone()
        return {"decided_s": float(row[0]) if row else 0.0, "kinds": kinds, "gaps": int(gaps),
                "clips": int(clips), "clip_bytes": int(clip_bytes)}

    # -- reading -----------------------------------------------------------------------------
    def segments(self) -> list[Segment]:
        with self._guard():
            cur = self.db.execute("SELECT * FROM segments ORDER BY id")
            names = [_FIELDS.get(d[0], d[0]) for d in cur.description]
            return [Segment(**dict(zip(names, r))) for r in cur.fetchall()]

    def events(self, seg: int | None = None, kinds: tuple[str, ...] | None = None) -> dict[str, np.ndarray]:
        """Events as numpy columns (time order within each segment)."""
        where, args = [], []
        if seg is not None:
            where.append("seg=?")
            args.append(seg)
        if kinds is not None:
            where.append(f"kind IN ({','.join(str(KIND_CODES[k]) for k in kinds)})")
        q = ("SELECT seg, kind, step, time_s, pol, peak_cdb, snr_cdb, match_pm, decay_us, flags, "
             + ("lift_us" if self._lift else "NULL") + " FROM events")
        if where:
            q += " WHERE " + " AND ".join(where)
        q += " ORDER BY seg, time_s"
        with self._guard():
            rows = self.db.execute(q, args).fetchall()
        a = np.array(rows, dtype=np.float64) if rows else np.zeros((0, 11))
        return {
            "seg": a[:, 0].astype(np.int64), "kind": a[:, 1].astype(np.int64),
            "step": np.nan_to_num(a[:, 2], nan=-1).astype(np.int64), "time_s": a[:, 3],
            "pol": np.nan_to_num(a[:, 4], nan=-1).astype(np.int64), "peak_dbfs": a[:, 5] / 100,
            "snr_db": a[:, 6] / 100, "match": a[:, 7] / 1000, "decay_ms": a[:, 8] / 1000,
            "flags": np.nan_to_num(a[:, 9]).astype(np.int64), "lift_ms": a[:, 10] / 1000,
        }

    def gaps(self) -> list[tuple[int, float, float, str]]:
        with self._guard():
            return [tuple(r) for r in self.db.execute("SELECT seg, start_s, end_s, kind FROM gaps ORDER BY seg, start_s")]

    def minutes(self) -> list[dict]:
        with self._guard():
            cur = self.db.execute("SELECT * FROM minutes ORDER BY seg, minute")
            names = [d[0] for d in cur.description]
            return [dict(zip(names, r)) for r in cur.fetchall()]

    def blocks(self, seg: int) -> tuple[np.ndarray, np.ndarray]:
        with self._guard():
            rows = self.db.execute("SELECT start_sample, host_time_s FROM blocks WHERE seg=? ORDER BY start_sample",
                                   (seg,)).fetchall()
        a = np.array(rows, dtype=np.float64) if rows else np.zeros((0, 2))
        return a[:, 0], a[:, 1]

    def clips(self) -> list[tuple[int, float, str, int, float, bytes]]:
        with self._guard():
            return [tuple(r) for r in self.db.execute("SELECT seg, time_s, kind, sample_rate_hz, start_s, flac FROM clips "
                                                      "ORDER BY seg, time_s")]

    def integrity(self) -> str:
        with self._guard():
            return str(self.db.execute("PRAGMA integrity_check").fetchone()[0])


class _Guard:
    """Turns sqlite3 and OS errors into one-line StoreErrors (a full disk, a read-only file)."""

    def __init__(self, store: LogStore):
        self.store = store

    def __enter__(self):
        return self

    def __exit__(self, et, e, tb):
        if e is not None and isinstance(e, (sqlite3.Error, OSError)) and not isinstance(e, StoreError):
            raise _store_error(self.store.path, e) from e
        return False


def _i(v: float, scale: float) -> int | None:
    if v is None or not np.isfinite(v):
        return None
    return int(round(float(v) * scale))
