"""The one-writer lock of a log database (an OS advisory lock on ``DB.lock``; see io/store.py).

SQLite's own locks cannot keep a second writer out, because a writer commits in many small
transactions and another writer would slip in between them.  The kernel drops the lock with the
process, so a ``kill -9`` never leaves a log locked; a stale ``DB.lock`` file is harmless.
"""
from __future__ import annotations

import errno
import os

from ..errors import StoreError
from .logerror import _store_error


class WriterLock:
    """The one-writer lock of a log: an OS advisory lock on ``DB.lock``, held until :meth:`release`.

    Raises :class:`StoreError` at once (never waits) when another process holds it.  The lock
    file is named after the database's real path, so two names of one file (a symlink) share it.
    """

    def __init__(self, db_path: str):
        self.path = os.path.realpath(db_path) + ".lock"
        self.fd: int | None = None
        for _ in range(20):
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError as e:
                raise _store_error(db_path, e) from e
            if not _try_lock(fd):
                holder = _read_pid(fd)
                os.close(fd)
                who = f"another tickscope log (process {holder})" if holder else "another tickscope log"
                raise StoreError(f"log {db_path}: {who} is writing it; one writer at a time (wait for it to "
                                 f"end or stop it; tickscope report {db_path} reads it meanwhile)")
            # a writer that ended between our open and our lock removed the file (and another may
            # have made a new one): a lock on the removed file guards nothing
            try:
                same = os.path.samestat(os.fstat(fd), os.stat(self.path))
            except OSError:
                same = False
            if same:
                self.fd = fd
                try:
                    os.ftruncate(fd, 0)
                    os.write(fd, f"{os.getpid()}\n".encode())
                except OSError:
                    pass  # the pid is only for the message of a refused writer
                return
            os.close(fd)
        raise StoreError(f"log {db_path}: cannot take the writer's lock {self.path} (it keeps being replaced)")

    def __del__(self):  # a store dropped without close() still lets go of its log
        try:
            self.release()
        except Exception:  # noqa: BLE001 - interpreter shutdown
            pass

    def release(self) -> None:
        if getattr(self, "fd", None) is None:
            return
        fd, self.fd = self.fd, None
        if os.name == "nt":  # an open file cannot be removed there; a writer that slips in keeps it
            os.close(fd)
            _unlink(self.path)
        else:  # removed while still held, so that no one locks a file about to go
            _unlink(self.path)
            os.close(fd)


def _try_lock(fd: int) -> bool:
    try:
        import fcntl
    except ImportError:  # Windows
        import msvcrt

        try:
            msvcrt.locking(fd, msvcrt.LK_NBLCK, 1)
        except OSError:
            return False
        return True
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError as e:
        if e.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
            return False
        raise
    return True


def _read_pid(fd: int) -> str:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        raw = os.read(fd, 32).decode("ascii", "replace").strip()
    except OSError:
        return ""
    return raw if raw.isdigit() else ""


def _unlink(path: str) -> None:
    try:
        os.unlink(path)
    except OSError:
        pass

