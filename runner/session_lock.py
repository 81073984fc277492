"""One writer per session: an advisory lock on a file beside the trial log.

``run`` and ``simulate`` take an exclusive ``flock`` on
``<observer>-<session>.lock`` before they create, repair or append to a log,
and hold it until the session part has ended and its sidecar is written
(``run`` takes it before its window opens and hands it to the log).
The lock file records the holder's process id, host and start time, so a
second writer exits 2 with one line naming the holder.

The kernel releases a ``flock`` when its process dies, however it dies, so a
lock left by a killed session never blocks the next one.  The holder clears
the record when it releases the lock; a record found on taking the lock
therefore belongs to a process that died holding it, and is reported as
taken over.  The lock file itself stays (removing it would race with a
writer that has just opened it).
"""

from __future__ import annotations

import fcntl
import json
import os
import socket
import sys
from datetime import datetime, timezone
from pathlib import Path

from fitting.errors import InputError
from fitting.logfile import lock_path


class SessionLock:
    """An exclusive lock on one session's log, held until :meth:`release`.

    Parameters
    ----------
    log : Path
        The trial log the lock protects (it need not exist yet).

    Raises
    ------
    InputError
        Another process holds the lock, or the lock file cannot be made.
    """

    def __init__(self, log: Path):
        self.path = lock_path(log)
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o666)
        except OSError as exc:
            raise InputError(str(self.path), "lock", f"cannot be created ({exc.strerror})") from None
        try:
            fcntl.flock(self._fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            holder = _describe(_read_record(self._fd))
            os.close(self._fd)
            raise InputError(str(log), "lock", f"another session is writing this log ({holder}); "
                             "wait for it to end or stop it first") from None
        left = _read_record(self._fd)
        if left:
            print(f"note: {self.path}: took over the lock left by {_describe(left)}, "
                  "which ended without releasing it", file=sys.stderr)
        record = {"pid": os.getpid(), "host": socket.gethostname(),
                  "started": datetime.now(timezone.utc).replace(microsecond=0).isoformat()}
        try:
            os.ftruncate(self._fd, 0)
            os.pwrite(self._fd, (json.dumps(record) + "\n").encode("utf-8"), 0)
        except OSError as exc:
            self.release()
            raise InputError(str(self.path), "lock", f"cannot be written ({exc.strerror})") from None

    def release(self) -> None:
        """Clear the record and release the lock (idempotent)."""
        if self._fd < 0:
            return
        try:
            os.ftruncate(self._fd, 0)
        except OSError:
            pass
        os.close(self._fd)
        self._fd = -1

    def __enter__(self) -> "SessionLock":
        return self

    def __exit__(self, *exc) -> None:
        self.release()


def _read_record(fd: int) -> dict:
    try:
        raw = os.pread(fd, 4096, 0)
        record = json.loads(raw.decode("utf-8")) if raw.strip() else {}
    except (OSError, ValueError):
        return {"pid": "?", "host": "?", "started": "?"}
    return record if isinstance(record, dict) else {}


def _describe(record: dict) -> str:
    if not record:
        return "a process that left no record"
    return f"process {record.get('pid', '?')} on {record.get('host', '?')} since {record.get('started', '?')}"
