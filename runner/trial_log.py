"""Crash-safe trial log and session sidecar.

The trial log is a CSV file, ``<observer>-<session>.trials.csv``, one row per
completed trial.  Each row is handed to the operating system with a single
``write`` before the next trial starts, so a killed process loses at most the
trial in progress; with a person, each row is also synced to disk (fsync),
so a power cut loses nothing either.  Simulated observers sync at breaks and
at the end (their rows can be made again from the seed).  The tail of a log
follows the rules of :mod:`fitting.logfile` when it is reopened: a torn last
line (one without its newline) is cut off and reported.
A new log's header is written under a temporary name and renamed into
place.  One process at a time writes a session
(:mod:`runner.session_lock`).  A full disk cuts the log back to its last
whole row and ends the command with one line.

The sidecar, ``<observer>-<session>.session.json``, describes the session:
the protocol text and its SHA-256, the display profile, package versions,
seeds, start and end times of every part (a resumed session has several),
the adaptive-procedure states at the end and the timing summary.  It is
replaced atomically (write to a temporary file, fsync, rename).

Existing data is never overwritten: creating a log where one exists is an
error unless the session is resumed.
"""

from __future__ import annotations

import csv
import errno
import io
import json
import os
import sys
from pathlib import Path

from fitting.errors import InputError
from fitting.logfile import check_rows, decode_log, examine_tail, identifier_problem, lock_path
from runner.session_lock import SessionLock

#: Columns of the trial log, in order.  The first twelve are required of every log (README, Output files).
#: ``block`` is ``stream`` for the tests of a continuous stream (empty for
#: discrete trials); ``preceding_offsets_deg`` holds, for a stream test, the
#: offsets of its 1st, 2nd, ... Kth preceding periods, ``;``-separated.
COLUMNS = (
    "observer",
    "session",
    "trial",
    "condition",
    "adapter_offset_deg",
    "lag",
    "track",
    "test_offset_deg",
    "response_cw",
    "rt_s",
    "dropped_frames",
    "timing_ok",
    "practice",
    "period_s",
    "reference_deg",
    "test_direction_deg",
    "intervening_offsets_deg",
    "procedure",
    "block",
    "preceding_offsets_deg",
)


def check_identifier(value: str, field: str) -> str:
    """Accept an observer or session ID usable as part of a file name.

    The rule of :func:`fitting.logfile.identifier_problem`, which ``fit``
    applies to the logs too; ``--observer`` may not be ``group``.

    Raises
    ------
    InputError
        Unless ``value`` is 1–64 letters, digits, ``-`` or ``_`` (and, for
        ``--observer``, not ``group`` in any case).
    """
    problem = identifier_problem(value, observer=field == "--observer")
    if problem:
        raise InputError("argument", field, f"{value!r}: {problem}")
    return value


def sidecar_lost(sidecar: Path) -> InputError:
    """The refusal to resume a session whose log holds trials but whose sidecar is gone."""
    return InputError(str(sidecar), "file", "is missing and its log holds trials: the session cannot be resumed "
                      "without it (fit still reads the log; start a new --session for more trials)")


def log_paths(out_dir: str | Path, observer: str, session: str) -> tuple[Path, Path]:
    """Paths of the trial log and the sidecar of a session."""
    stem = f"{observer}-{session}"
    out = Path(out_dir)
    return out / f"{stem}.trials.csv", out / f"{stem}.session.json"


def refuse_existing(path: Path, sidecar: Path) -> None:
    """Raise :class:`InputError` if a session's log or sidecar already exists."""
    if path.exists() or sidecar.exists():
        raise InputError(
            str(path), "file", "already holds this session; pass --resume to continue it or choose another --out"
        )


def format_value(value) -> str:
    """Text of one cell: empty for None, ``true``/``false``, compact numbers."""
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return format(value, ".10g")
    if isinstance(value, (tuple, list)):
        return ";".join(format_value(v) for v in value)
    return str(value)


def _row_text(row: dict, newline: str = "\n") -> str:
    buf = io.StringIO()
    csv.writer(buf, lineterminator=newline).writerow([format_value(row.get(c)) for c in COLUMNS])
    return buf.getvalue()


def _line_end(path: Path) -> str:
    """The line ending of a log's header: ``"\\r\\n"`` for a log saved by a Windows editor, else ``"\\n"``.

    Rows appended on resume take the same ending, so a log never mixes two.
    """
    with open(path, "rb") as fh:
        first = fh.read(4096).split(b"\n", 1)
    return "\r\n" if len(first) == 2 and first[0].endswith(b"\r") else "\n"


#: How a full disk's line says to go on; a command that knows its whole resume command puts that in its place.
RESUME_ADVICE = "continue with --resume"


class StorageError(InputError):
    """The disk refused a write (full, or an I/O error); the log was cut back to its last whole row.

    Attribute ``full`` tells a full disk from an I/O error.
    """

    full = True


def _header_text() -> str:
    return ",".join(COLUMNS) + "\n"


def read_rows(path: str | Path, repair: bool = False, repairs: list | None = None,
              identity: dict[str, str] | None = None) -> list[dict[str, str]]:
    """Read a trial log written by :class:`TrialLog`, applying the tail rules.

    See :mod:`fitting.logfile`: a torn last line (anything after the last
    newline) is dropped with a warning on stderr.

    Parameters
    ----------
    path : str or Path
    repair : bool
        Make the file match what is returned: cut a torn line off, write
        the header of an empty log (used before
        appending, under the session's lock).
    repairs : list, optional
        Receives one dict per change made (for the sidecar).
    identity : dict, optional
        The observer and session every row must name (default: the first
        row's).

    Returns
    -------
    list of dict
        One dict of strings per complete row.

    Raises
    ------
    InputError
        If the header is not this tool's, or a row breaks the cell rules
        :func:`fitting.logfile.check_rows` shares with ``fit`` (the file is
        then left as it was).
    """
    p = Path(path)
    try:
        data = p.read_bytes()
    except OSError as exc:
        raise InputError(str(p), "file", f"cannot be read ({exc.strerror})") from None
    tail = examine_tail(data)
    if tail.damaged:
        raise tail.damage(str(p))
    header = _header_text().encode("utf-8")
    if tail.keep == 0 and (tail.torn == b"" or header.startswith(tail.torn)):
        if repair:
            _write_new(p, header)
            _note(repairs, p, "header", f"the log held no trial and an incomplete header ({len(data)} bytes); "
                  "wrote the header again")
        return []
    if tail.keep == 0:
        raise InputError(str(p), "line 1", "the header is cut or not an aftershift trial log header, "
                         "and the file holds other data; it cannot be repaired automatically")
    table = list(csv.reader(io.StringIO(decode_log(data[: tail.keep], str(p)))))
    head = table[0] if table else None
    if head is None or tuple(head) != COLUMNS:
        raise InputError(str(p), "line 1", "the header is not an aftershift trial log header"
                         f" ({_header_difference(head or [])})")
    check_rows(COLUMNS, table[1:], str(p), identity)   # before any repair: a refused log stays as it was
    if tail.torn:
        action = "cut off" if repair else "ignoring"
        _note(repairs, p, "torn", f"{action} the torn line {tail.torn_line} ({tail.describe()}), "
              f"keeping the {len(table) - 1} rows before it")
        if repair:
            _truncate(p, tail.keep)
    return [dict(zip(COLUMNS, cells)) for cells in table[1:]]


def _header_difference(head: list[str]) -> str:
    """Where a header first differs from this tool's, in words."""
    for i, (found, expected) in enumerate(zip(head, COLUMNS)):
        if found != expected:
            return f"column {i + 1} is {found[:40]!r}, expected {expected!r}"
    if len(head) < len(COLUMNS):
        return f"ends after {len(head)} columns, expected {len(COLUMNS)}"
    return f"has {len(head)} columns, expected {len(COLUMNS)}"


def _note(repairs: list | None, path: Path, kind: str, text: str) -> None:
    print(f"warning: {path}: {text}", file=sys.stderr)
    if repairs is not None:
        repairs.append({"kind": kind, "detail": text})


def _truncate(path: Path, size: int) -> None:
    with open(path, "r+b") as fh:
        fh.truncate(size)
        fh.flush()
        os.fsync(fh.fileno())


def _write_new(path: Path, content: bytes) -> None:
    """Write a whole file under a temporary name, sync it and rename it into place.

    The temporary file is written over in place, not emptied first, so
    space kept under its name (:meth:`TrialLog.keep_sidecar_room`) is used
    for the new content on a disk that has filled up meanwhile.
    """
    tmp = path.with_name(path.name + ".tmp")
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT, 0o666)
        try:
            _write_all(fd, content)
            os.ftruncate(fd, len(content))
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
    except OSError as exc:
        _unlink(tmp)
        raise _disk_error(path, exc, None) from None
    except BaseException:  # Ctrl-C or SIGTERM in the middle: no temporary file stays behind
        _unlink(tmp)
        raise
    _fsync_dir(path.parent)


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view):]


def _unlink(path: Path) -> None:
    try:
        os.unlink(path)
    except OSError:
        pass


def _disk_error(path: Path, exc: OSError, rows: int | None) -> InputError:
    if exc.errno in (errno.ENOSPC, errno.EDQUOT):
        what = "the disk is full"
    elif exc.errno == errno.EIO:
        what = "the disk reported an I/O error"
    else:
        return InputError(str(path), "file", f"cannot be written ({exc.strerror})")
    safe = "every completed trial is safe" if rows is None else f"{rows} trials are safe in the log"
    error = StorageError(str(path), "disk", f"{what} ({exc.strerror}); {safe}; free some space, then {RESUME_ADVICE}")
    error.full = exc.errno != errno.EIO
    return error


class TrialLog:
    """Append-only trial log with its JSON sidecar, written by one process at a time.

    Use :meth:`create` for a new session and :meth:`reopen` to resume one.
    Both take the session's lock (:class:`runner.session_lock.SessionLock`),
    held until :meth:`close`.

    Parameters
    ----------
    path, sidecar_path : Path
    rows : list of dict
        Rows already on disk.
    lock : SessionLock
    durable : bool
        True (people): every row is synced to disk (fsync) before the next
        trial.  False (simulated observers): every row is handed to the
        operating system at once (a killed process loses nothing) and synced
        only at :meth:`sync` (breaks) and at the end.
    repairs : list of dict, optional
    newline : str
        Line ending of the rows appended (that of the log's header).

    Attributes
    ----------
    repairs : list of dict
        Changes made to the tail of the log when it was opened.
    """

    def __init__(self, path: Path, sidecar_path: Path, rows: list[dict[str, str]], lock: SessionLock,
                 durable: bool = True, repairs: list | None = None, newline: str = "\n"):
        self.path = path
        self.newline = newline
        self.sidecar_path = sidecar_path
        self.rows = rows
        self.lock = lock
        self.durable = durable
        self.repairs = repairs or []
        self.n_rows = len(rows)
        try:
            self._fd = os.open(path, os.O_WRONLY | os.O_APPEND)
            self._size = os.fstat(self._fd).st_size
        except OSError as exc:
            lock.release()
            raise InputError(str(path), "file", f"cannot be opened for writing ({exc.strerror})") from None

    @classmethod
    def create(cls, out_dir: str | Path, observer: str, session: str, durable: bool = True,
               lock: SessionLock | None = None) -> "TrialLog":
        """Start a new log; refuse if this session already has data.

        The header is written to a temporary file, synced and renamed into
        place, so a log is never born without its whole header.  ``lock``:
        the session's lock, taken already by the caller (``run`` takes it
        before its window opens); the log then holds that one until :meth:`close`.

        Raises
        ------
        InputError
            If the log or sidecar exists (pass ``--resume`` or choose another
            output folder), another process holds the session, or the folder
            cannot be created.
        """
        path, sidecar = log_paths(out_dir, observer, session)
        lock = _lock(path, sidecar, lock)
        written = False
        try:
            refuse_existing(path, sidecar)
            _write_new(path, _header_text().encode("utf-8"))
            written = True
            return cls(path, sidecar, [], lock, durable)
        except BaseException:
            if written:     # the header alone: a later start must not find a session here
                _unlink(path)
            lock.release()
            raise

    @classmethod
    def reopen(cls, out_dir: str | Path, observer: str, session: str, durable: bool = True,
               allow_missing_sidecar: bool = False, lock: SessionLock | None = None) -> "TrialLog":
        """Open an interrupted session's log for appending, repairing its tail.

        Parameters
        ----------
        allow_missing_sidecar : bool
            Accept a log without sidecar while it holds no trial (the
            session died between creating the two files).
        lock : SessionLock, optional
            As for :meth:`create`.

        Raises
        ------
        InputError
            If there is no log or sidecar to resume, or another process
            holds the session.
        """
        path, sidecar = log_paths(out_dir, observer, session)
        lock = _lock(path, sidecar, lock)
        try:
            if not path.exists() or not (sidecar.exists() or allow_missing_sidecar):
                raise InputError(str(path), "file", "no session to resume here (log or sidecar missing)")
            repairs: list = []
            rows = read_rows(path, repair=True, repairs=repairs, identity={"observer": observer, "session": session})
            if rows and not sidecar.exists():
                raise sidecar_lost(sidecar)
            return cls(path, sidecar, rows, lock, durable, repairs, _line_end(path))
        except BaseException:
            lock.release()
            raise

    def append(self, row: dict) -> None:
        """Write one trial in a single write (synced to disk when ``durable``).

        Raises
        ------
        StorageError
            The disk is full or failed; the file is cut back to its last
            whole row first.
        """
        data = _row_text(row, self.newline).encode("utf-8")
        try:
            _write_all(self._fd, data)
            if self.durable:
                os.fsync(self._fd)
        except OSError as exc:
            try:
                os.ftruncate(self._fd, self._size)
                os.fsync(self._fd)
            except OSError:
                pass
            raise _disk_error(self.path, exc, self.n_rows) from None
        self._size += len(data)
        self.n_rows += 1

    def rows_on_disk(self) -> int:
        """Whole rows in the file now (after an interrupt that may have come between a write and its count)."""
        with open(self.path, "rb") as fh:
            return max(fh.read().count(b"\n") - 1, 0)  # less the header line

    def sync(self) -> None:
        """Force the rows written so far to disk (breaks and the end of a simulated session)."""
        if self._fd >= 0:
            try:
                os.fsync(self._fd)
            except OSError as exc:
                raise _disk_error(self.path, exc, self.n_rows) from None

    def close(self) -> None:
        """Sync and close the log file, free the sidecar's kept room, then release the session's lock."""
        try:
            if self._fd >= 0:
                try:
                    os.fsync(self._fd)
                except OSError:
                    pass
                os.close(self._fd)
                self._fd = -1
                _unlink(self.sidecar_path.with_name(self.sidecar_path.name + ".tmp"))
        finally:
            self.lock.release()

    def read_sidecar(self) -> dict:
        """The sidecar's content, checked for the shape this tool writes.

        Raises
        ------
        InputError
            Unreadable, not JSON, or malformed (naming the field).
        """
        src = str(self.sidecar_path)
        try:
            content = json.loads(self.sidecar_path.read_text(encoding="utf-8"))
        except OSError as exc:
            raise InputError(src, "file", f"cannot be read ({exc.strerror})") from None
        except ValueError as exc:
            raise InputError(src, "file", f"cannot be read as JSON ({exc})") from None
        check_sidecar(content, src)
        return content

    def write_sidecar(self, content: dict) -> None:
        """Replace the sidecar atomically (no temporary file survives a failure)."""
        _write_new(self.sidecar_path, sidecar_bytes(content))

    def keep_sidecar_room(self, size: int) -> None:
        """Keep ``size`` bytes allocated for the sidecar's next write, until :meth:`close`.

        The space is held under the sidecar's temporary name (zeros), which
        its next write fills in place: the write that records how a part
        ended then succeeds on a disk that has filled up meanwhile.  Best
        effort: on a disk that is full already nothing is kept.
        """
        tmp = self.sidecar_path.with_name(self.sidecar_path.name + ".tmp")
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT, 0o666)
        except OSError:
            return
        try:
            os.posix_fallocate(fd, 0, size)
        except OSError:
            pass
        finally:
            os.close(fd)


def sidecar_bytes(content: dict) -> bytes:
    """The sidecar file's bytes for ``content``."""
    return (json.dumps(content, indent=2, sort_keys=False, default=_json_default) + "\n").encode("utf-8")


#: Largest seed (seeds are 32-bit: numpy's seed sequences take any size; files and other tools may not).
MAX_SEED = 2**32 - 1
#: Fields every sidecar has, and their JSON types.
SIDECAR_FIELDS = {"observer": str, "session": str, "seed": int, "session_seed": int, "protocol": dict, "parts": list}


def check_sidecar(content, source: str) -> None:
    """Refuse a sidecar that is not a JSON object of the shape this tool writes.

    Raises
    ------
    InputError
        ``malformed sidecar`` naming the first missing or mistyped field.
    """
    if not isinstance(content, dict):
        raise InputError(source, "file", f"malformed sidecar: expected a JSON object, found {type(content).__name__}")
    for name, kind in SIDECAR_FIELDS.items():
        value = content.get(name)
        if not isinstance(value, kind) or isinstance(value, bool):
            raise InputError(source, name, f"malformed sidecar: expected {kind.__name__}, found {value!r:.40}")
    for name in ("seed", "session_seed"):
        if not 0 <= content[name] <= MAX_SEED:
            raise InputError(source, name, f"malformed sidecar: a seed is from 0 to {MAX_SEED:,}, "
                             f"not {str(content[name])[:40]}")
    if not isinstance(content["protocol"].get("sha256"), str):
        raise InputError(source, "protocol.sha256", "malformed sidecar: expected the protocol's SHA-256 text")
    if not all(isinstance(p, dict) for p in content["parts"]):
        raise InputError(source, "parts", "malformed sidecar: expected a list of objects")


def _lock(path: Path, sidecar: Path, held: SessionLock | None = None) -> SessionLock:
    """The session's lock: ``held`` (taken by the caller; it must be this log's) or a new one."""
    if held is not None and held.path != lock_path(path):
        raise ValueError(f"lock: {held.path} is not the lock of {path}")
    lock = held if held is not None else SessionLock(path)
    for done in (path, sidecar):  # temporary files of a process killed while writing them
        _unlink(done.with_name(done.name + ".tmp"))
    return lock


def _json_default(value):
    if hasattr(value, "item"):
        return value.item()
    if isinstance(value, (set, tuple)):
        return list(value)
    raise TypeError(f"cannot store {type(value).__name__} in the sidecar")


def _fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
