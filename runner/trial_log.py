"""Crash-safe trial log and session sidecar.

The trial log is a CSV file, ``<observer>-<session>.trials.csv``, one row per
completed trial.  Each row is written with a single ``write``, flushed and
``fsync``-ed before the next trial starts, so a crash or power cut loses at
most the trial in progress.  A torn last line (the process died inside a
write) is detected when the log is reopened, reported and cut off;
everything before it is kept.

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
import io
import json
import os
import re
import sys
from pathlib import Path

from fitting.errors import InputError

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

_ID = re.compile(r"^[A-Za-z0-9_-]{1,64}$")


def check_identifier(value: str, field: str) -> str:
    """Accept an observer or session ID usable as part of a file name.

    Raises
    ------
    InputError
        Unless ``value`` is 1–64 letters, digits, ``-`` or ``_``.
    """
    if not _ID.match(value or ""):
        raise InputError("argument", field, f"{value!r}: use 1-64 letters, digits, '-' or '_' only")
    return value


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


def _row_text(row: dict) -> str:
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerow([format_value(row.get(c)) for c in COLUMNS])
    return buf.getvalue()


def read_rows(path: str | Path, repair: bool = False) -> list[dict[str, str]]:
    """Read a trial log written by :class:`TrialLog`.

    Parameters
    ----------
    path : str or Path
    repair : bool
        Cut a torn last line off the file (used before appending).

    Returns
    -------
    list of dict
        One dict of strings per complete row.

    Raises
    ------
    InputError
        If the header is not this tool's.
    """
    p = Path(path)
    data = p.read_bytes()
    if data and not data.endswith(b"\n"):
        cut = data.rfind(b"\n") + 1
        kept = max(data[:cut].count(b"\n") - 1, 0)
        print(
            f"warning: {p}: the last line was torn (the session stopped while writing it); "
            f"dropping that partial trial and keeping the {kept} rows before it",
            file=sys.stderr,
        )
        data = data[:cut]
        if repair:
            with open(p, "r+b") as fh:
                fh.truncate(cut)
                fh.flush()
                os.fsync(fh.fileno())
    text = data.decode("utf-8")
    reader = csv.reader(io.StringIO(text))
    header = next(reader, None)
    if header is None:
        return []
    if tuple(header) != COLUMNS:
        raise InputError(str(p), "line 1", "the header is not an aftershift trial log header")
    rows = []
    for n, cells in enumerate(reader, start=2):
        if len(cells) != len(COLUMNS):
            raise InputError(str(p), f"line {n}", f"expected {len(COLUMNS)} cells, found {len(cells)}")
        rows.append(dict(zip(COLUMNS, cells)))
    return rows


class TrialLog:
    """Append-only, fsync'd trial log with its JSON sidecar.

    Use :meth:`create` for a new session and :meth:`reopen` to resume one.

    Attributes
    ----------
    path, sidecar_path : Path
    rows : list of dict
        Rows already on disk when the log was opened (strings, as read).
    """

    def __init__(self, path: Path, sidecar_path: Path, rows: list[dict[str, str]]):
        self.path = path
        self.sidecar_path = sidecar_path
        self.rows = rows
        self._fh = open(path, "a", encoding="utf-8", newline="")

    @classmethod
    def create(cls, out_dir: str | Path, observer: str, session: str) -> "TrialLog":
        """Start a new log; refuse if this session already has data.

        Raises
        ------
        InputError
            If the log or sidecar exists (pass ``--resume`` or choose another
            output folder), or the folder cannot be created.
        """
        path, sidecar = log_paths(out_dir, observer, session)
        refuse_existing(path, sidecar)
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            with open(path, "x", encoding="utf-8", newline="") as fh:
                fh.write(",".join(COLUMNS) + "\n")
                fh.flush()
                os.fsync(fh.fileno())
        except OSError as exc:
            raise InputError(str(path), "file", f"cannot be created ({exc.strerror})") from None
        _fsync_dir(path.parent)
        return cls(path, sidecar, [])

    @classmethod
    def reopen(cls, out_dir: str | Path, observer: str, session: str) -> "TrialLog":
        """Open an interrupted session's log for appending.

        Raises
        ------
        InputError
            If there is no log or sidecar to resume.
        """
        path, sidecar = log_paths(out_dir, observer, session)
        if not path.exists() or not sidecar.exists():
            raise InputError(str(path), "file", "no session to resume here (log or sidecar missing)")
        rows = read_rows(path, repair=True)
        return cls(path, sidecar, rows)

    def append(self, row: dict) -> None:
        """Write one trial and make it durable before returning."""
        self._fh.write(_row_text(row))
        self._fh.flush()
        os.fsync(self._fh.fileno())

    def close(self) -> None:
        """Close the log file."""
        self._fh.close()

    def read_sidecar(self) -> dict:
        """The sidecar's content."""
        try:
            return json.loads(self.sidecar_path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise InputError(str(self.sidecar_path), "file", f"cannot be read as JSON ({exc})") from None

    def write_sidecar(self, content: dict) -> None:
        """Replace the sidecar atomically."""
        tmp = self.sidecar_path.with_suffix(".json.tmp")
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(content, fh, indent=2, sort_keys=False, default=_json_default)
            fh.write("\n")
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, self.sidecar_path)
        _fsync_dir(self.sidecar_path.parent)


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
