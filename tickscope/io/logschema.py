"""The log database's tables (``SCHEMA_VERSION``) and its segment rows (see io/store.py for the layout)."""
from __future__ import annotations

from dataclasses import dataclass

#: 2 added ``events.lift_us`` (an escapement's lift time per beat); a version 1 log gains the column
#: when a writer opens it (``MIGRATIONS``), and reads as one without lift times until then.
SCHEMA_VERSION = 2


_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT);
CREATE TABLE IF NOT EXISTS segments (
    id INTEGER PRIMARY KEY,
    started_wall REAL NOT NULL,      -- unix time of the segment's first sample
    ended_wall REAL,
    source_kind TEXT NOT NULL,       -- 'file' | 'device'
    source TEXT NOT NULL,
    source_offset_s REAL NOT NULL DEFAULT 0,  -- file sources: where time 0 of the segment lies in the file
    timeline_s REAL NOT NULL,        -- where time 0 of the segment lies on the log's timeline
    join_kind TEXT NOT NULL,         -- 'first' | 'exact' | 'wall'
    sample_rate_hz REAL NOT NULL,
    channel INTEGER NOT NULL,
    clock_ppm REAL,                  -- NULL: uncalibrated device time base
    clock_ppm_u95 REAL NOT NULL DEFAULT 0,
    time_base TEXT,
    host_sync TEXT,
    version TEXT,
    step_interval_s REAL,
    duration_s REAL NOT NULL DEFAULT 0,   -- audio processed (committed)
    decided_s REAL NOT NULL DEFAULT 0,    -- every slot before this time is decided and stored
    end_reason TEXT
);
CREATE TABLE IF NOT EXISTS events (
    seg INTEGER NOT NULL, kind INTEGER NOT NULL, step INTEGER, time_s REAL NOT NULL,
    pol INTEGER, peak_cdb INTEGER, snr_cdb INTEGER, match_pm INTEGER, decay_us INTEGER, flags INTEGER,
    lift_us INTEGER
);
CREATE TABLE IF NOT EXISTS blocks (
    seg INTEGER NOT NULL, start_sample INTEGER NOT NULL, host_time_s REAL, wall_time_s REAL, adc_time_s REAL
);
CREATE TABLE IF NOT EXISTS gaps (seg INTEGER NOT NULL, start_s REAL NOT NULL, end_s REAL NOT NULL, kind TEXT);
CREATE TABLE IF NOT EXISTS minutes (
    seg INTEGER NOT NULL, minute INTEGER NOT NULL, steps INTEGER, missed INTEGER, failed INTEGER,
    corrections INTEGER, rejected INTEGER, secondary INTEGER, rate_s_per_day REAL, rate_ci95_s_per_day REAL,
    jitter_us REAL, peak_dbfs REAL, decay_a_ms REAL, decay_b_ms REAL,
    PRIMARY KEY (seg, minute)
);
CREATE TABLE IF NOT EXISTS clips (
    seg INTEGER NOT NULL, time_s REAL NOT NULL, kind TEXT, sample_rate_hz INTEGER, start_s REAL, flac BLOB
);
"""

#: (table, column, its declaration): columns later schema versions added, added to an older log by
#: the first writer that opens it
MIGRATIONS = (("events", "lift_us", "INTEGER"),)


@dataclass(frozen=True)
class Segment:
    id: int
    started_wall: float
    ended_wall: float | None
    source_kind: str
    source: str
    source_offset_s: float
    timeline_s: float
    join_kind: str
    samplerate: float  # column sample_rate_hz
    channel: int
    clock_ppm: float | None
    clock_ppm_u95: float
    time_base: str | None
    host_sync: str | None
    version: str | None
    step_interval_s: float | None
    duration_s: float
    decided_s: float
    end_reason: str | None


#: Segment fields stored under another column name (the schema keeps its units in its names).
_COLUMNS = {"samplerate": "sample_rate_hz"}
_FIELDS = {v: k for k, v in _COLUMNS.items()}
