"""A log database's failures in words: what went wrong with the file, without naming it twice."""
from __future__ import annotations

from ..errors import StoreError


def _store_error(path: str, e: Exception) -> StoreError:
    # an OSError's own words, not str(e): that names the file, and a path may hold any word
    msg = e.strerror if isinstance(e, OSError) and e.strerror else str(e)
    low = msg.lower()
    if "full" in low:
        why = "the disk is full"
    elif "readonly" in low or "read-only" in low:
        why = "the file or its folder is read-only"
    elif "unable to open" in low:
        why = "cannot open it (missing folder or no permission)"
    elif "not a database" in low or "malformed" in low:
        why = "it is not a tickscope log (not an SQLite database, or damaged)"
    elif "locked" in low or "busy" in low:
        why = "another program is writing it"
    elif isinstance(e, OSError) and e.strerror:
        why = e.strerror
    else:
        why = msg
    err = StoreError(f"log {path}: {why}")
    err.why = why  # the reason alone, for a log's end-of-segment line
    return err

