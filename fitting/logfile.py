"""Rules for the bytes of a trial log, shared by the session writer and ``fit``.

A trial log is a CSV file whose rows are each written with one ``write``,
newline included.  A process killed inside that write, or a power cut, can
leave the last line incomplete, or followed by NUL bytes where the file
system had reserved space that was never written.  The rules for the end of
a log are:

* anything after the last newline is a *torn* line, even when its cells all
  parse: a cut inside the last number still reads as a number
  ("180;-90;-3" for "180;-90;-30");
* a writer cuts a torn line off and says so;
* ``fit`` leaves out a torn line whose cells all parse, with a note, and
  refuses (exit 2) one with missing or unreadable cells, naming it, unless a
  session is writing the log at that moment (its lock is held): then the
  line being written is left out;
* a line holding NUL bytes, and everything after it, is torn; but NUL bytes
  with complete rows after them are damage inside the file (``Tail.damaged``),
  which both refuse rather than cut the trials that follow.

:func:`check_rows` holds the one set of cell rules: ``fit`` applies it to
every log it reads, and a resume to the log it continues, so both accept
and refuse the same rows.  The lock a writer holds is described in
``runner/session_lock.py``; :func:`is_being_written` only asks whether it is
held, so that ``fitting`` never imports ``runner``.
"""

from __future__ import annotations

import csv
import io
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path

from .errors import InputError

#: How each known column of a trial log parses.  Unknown columns accept anything.
CELL_KINDS = {
    "observer": "observer", "session": "id", "trial": "count", "condition": "text",
    "adapter_offset_deg": "number?", "lag": "whole?", "track": "whole?",
    "test_offset_deg": "number", "response_cw": "answer", "rt_s": "seconds?",
    "dropped_frames": "whole", "timing_ok": "flag", "practice": "bit",
    "period_s": "period?", "reference_deg": "number?", "test_direction_deg": "number?",
    "intervening_offsets_deg": "numbers", "procedure": "text?", "block": "text?",
    "preceding_offsets_deg": "numbers",
}
#: Columns every row of one log shares: a log holds one observer's one session.
IDENTITY_COLUMNS = ("observer", "session")
#: Columns a row leaves empty only in a condition without an adapter: the baseline, or a stream's tests.
ADAPTER_COLUMNS = ("adapter_offset_deg", "lag")
NO_ADAPTER_CONDITIONS = ("baseline", "stream")
LOCK_SUFFIX = ".lock"
#: A UTF-8 byte-order mark, as some spreadsheet programs put before the header; read past it.
BYTE_ORDER_MARK = b"\xef\xbb\xbf"
#: Longest duration a cell may hold (s): the 48 h a session may last (runner/overview.py).
MAX_SECONDS = 48 * 3600.0

# ASCII digits only: Python's int() and float() also take "²"-like digits of other scripts, "1_0" and
# "inf"; a number of more than 40 characters or a count of more than 9 digits is no trial's value.
_DECIMAL = re.compile(r"[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]{1,3})?")
_DIGITS = re.compile(r"[0-9]{1,9}(?:\.0*)?")     # "1.0" too: a log filtered with pandas writes counts so
_ID = re.compile(r"[A-Za-z0-9_-]{1,64}")
#: The observer name of the group rows in ``fit``'s tables (:mod:`fitting.group`): no observer may take it,
#: in any case, or their rows and figures would be taken for the group's.
GROUP_NAME = "group"


def identifier_problem(text: str, observer: bool = False) -> str | None:
    """What is wrong with an observer or session ID, or None: the rule of logs, ``run`` and ``simulate``.

    An ID is 1-64 letters, digits, ``-`` or ``_`` (it is part of file
    names); an observer's is not :data:`GROUP_NAME` in any case.
    """
    if _ID.fullmatch(text or "") is None:
        return "use 1-64 letters, digits, '-' or '_' only"
    if observer and text.lower() == GROUP_NAME:
        return f"{GROUP_NAME!r} (in any case) names the group rows of fit's tables; choose another observer ID"
    return None


def _number(text: str) -> bool:
    return len(text) <= 40 and _DECIMAL.fullmatch(text) is not None and math.isfinite(float(text))


def _whole(text: str) -> bool:
    return _DIGITS.fullmatch(text) is not None


def _count(text: str) -> bool:
    return _whole(text) and float(text) >= 1


def _seconds(text: str, low_open: bool) -> bool:
    if not _number(text):
        return False
    value = float(text)
    return (value > 0 if low_open else value >= 0) and value <= MAX_SECONDS


_CHECKS = {
    "id": (lambda t: identifier_problem(t) is None, "a name of 1-64 letters, digits, - or _"),
    "observer": (lambda t: identifier_problem(t, observer=True) is None,
                 f"an observer ID of 1-64 letters, digits, - or _ other than {GROUP_NAME!r} (the group rows' name)"),
    "text": (lambda t: t != "", "a non-empty value"),
    "text?": (lambda t: True, ""),
    "count": (_count, "a whole number from 1 to 999999999"),
    "whole": (_whole, "a whole number from 0 to 999999999"),
    "whole?": (lambda t: t == "" or _whole(t), "empty or a whole number from 0 to 999999999"),
    "number": (_number, "a finite number"),
    "number?": (lambda t: t == "" or _number(t), "a finite number or empty"),
    "seconds?": (lambda t: t == "" or _seconds(t, False), f"empty or seconds from 0 to {MAX_SECONDS:g}"),
    "period?": (lambda t: t == "" or _seconds(t, True), f"empty or a duration above 0 and up to {MAX_SECONDS:g} s"),
    "answer": (lambda t: t in ("", "0", "1", "0.0", "1.0"), "1, 0 or empty"),
    "flag": (lambda t: t.lower() in ("true", "false"), "true or false"),
    "bit": (lambda t: t in ("0", "1"), "0 or 1"),
    "numbers": (lambda t: t == "" or all(_number(v) for v in t.split(";")), "';'-separated finite numbers"),
}


def cell_count_problem(header, cells) -> str | None:
    """Words for a row with another number of cells than the header ("4,5" typed for "4.5"); None if equal."""
    if len(cells) == len(header):
        return None
    return f"expected {len(header)} cells as in the header, found {len(cells)}"


def check_cells(header, cells) -> tuple[str, str] | None:
    """The first cell that does not parse, as ``(column, message)``; None if all do.

    Numbers are ASCII decimals (no ``inf``, ``nan``, ``_`` or digits of
    other scripts); see :data:`CELL_KINDS` for what each column holds.

    Parameters
    ----------
    header : sequence of str
        Column names of the log.
    cells : sequence of str
        One row's cells.
    """
    count = cell_count_problem(header, cells)
    if count is not None:
        return "cells", count
    for name, text in zip(header, cells):
        kind = CELL_KINDS.get(name)
        if kind is None:
            continue
        ok, expected = _CHECKS[kind]
        if not ok(text):
            shown = repr(text[:40]) + ("..." if len(text) > 40 else "")
            return name, f"{shown} is not {expected}"
    return None


def check_rows(header, rows, source: str, identity: dict[str, str] | None = None) -> None:
    """Apply the cell rules to every row of a log: the rules ``fit`` and a resume share.

    Parameters
    ----------
    header : sequence of str
        Column names (line 1).
    rows : sequence of sequence of str
        The rows' cells, from line 2 on.
    source : str
        The log's name, for messages.
    identity : dict, optional
        The observer and session every row must name (a resume knows them);
        by default those of the first row.

    Raises
    ------
    InputError
        Naming the file, the line and the column of the first bad cell.
    """
    header = list(header)
    where = {name: header.index(name) for name in IDENTITY_COLUMNS if name in header}
    adapted = [(name, header.index(name)) for name in ADAPTER_COLUMNS if name in header and "condition" in header]
    for line, cells in enumerate(rows, start=2):
        bad = check_cells(header, cells)
        if bad is not None:
            raise InputError(source, f"line {line}" + ("" if bad[0] == "cells" else f", column {bad[0]}"), bad[1])
        condition = cells[header.index("condition")] if adapted else ""
        for name, i in adapted:
            if cells[i] == "" and condition.lower() not in NO_ADAPTER_CONDITIONS:
                raise InputError(source, f"line {line}, column {name}",
                                 f"empty, but condition {condition!r} is not the baseline")
        if identity is None:
            identity = {name: cells[i] for name, i in where.items()}
        for name, i in where.items():
            if name in identity and cells[i] != identity[name]:
                raise InputError(source, f"line {line}, column {name}",
                                 f"{cells[i]!r} where the log's other rows say {identity[name]!r}; "
                                 "a log holds one observer's one session")


def decode_log(data: bytes, source: str) -> str:
    """The text of a log's bytes, past a UTF-8 byte-order mark.

    Raises
    ------
    InputError
        Bytes that are not UTF-8, naming their line.
    """
    if data.startswith(BYTE_ORDER_MARK):
        data = data[len(BYTE_ORDER_MARK):]
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        raise InputError(source, f"line {line}", "not UTF-8 text; a trial log is a UTF-8 CSV file") from None


def _cells(line: bytes) -> list[str] | None:
    try:
        text = line.decode("utf-8")
    except UnicodeDecodeError:
        return None
    rows = list(csv.reader(io.StringIO(text)))
    return rows[0] if len(rows) == 1 else None


def check_header_line(data: bytes, source: str) -> None:
    """Refuse a file whose complete first line is no log header: a picture, a sidecar, another table.

    Only a first line ending in its newline is judged (a header cut by a
    kill is the tail rules' business).

    Raises
    ------
    InputError
        Naming line 1, and a sidecar given in place of its log.
    """
    end = data.find(b"\n")
    if end < 0:
        return
    cells = _cells(data[:end].removeprefix(BYTE_ORDER_MARK).rstrip(b"\r"))
    if cells is not None and "observer" in (c.strip() for c in cells):
        return
    hint = (" (a session sidecar: give the .trials.csv beside it)" if source.endswith(".session.json")
            else " (not a text file)" if b"\x00" in data[:end] or cells is None else "")
    raise InputError(source, "line 1", f"not a trial log: its first line is not a log header{hint}")


@dataclass(frozen=True)
class Tail:
    """What the end of a log holds.

    Attributes
    ----------
    keep : int
        Bytes of the file that hold complete lines (each with its newline).
    torn : bytes
        The bytes after ``keep`` (empty when nothing is torn).
    torn_line : int
        Line number (1-based) where the torn part starts; 0 if none.
    reason : str
        Why the part is torn, in plain words.
    cells_parse : bool
        The torn part is one line whose cells all parse: only its newline
        may be missing, or it may be cut inside its last cell.
    damaged : bool
        NUL bytes with complete rows after them: damage inside the file,
        which no tail rule may cut off (the rows after it are trials).
    """

    keep: int
    torn: bytes
    torn_line: int
    reason: str
    cells_parse: bool = False
    damaged: bool = False

    def damage(self, source: str) -> InputError:
        """The refusal of a log damaged inside (:attr:`damaged`): neither cut nor fitted."""
        return InputError(source, f"line {self.torn_line}", "holds NUL bytes and complete rows follow it: the file "
                          "is damaged inside, not cut at its end; mend or remove that line by hand (a copy first)")

    def describe(self) -> str:
        """One phrase saying why the line is torn and what it held."""
        shown = self.torn[:60].decode("utf-8", "replace").replace("\x00", "\\0")
        more = "..." if len(self.torn) > 60 else ""
        return f"{self.reason}; {len(self.torn)} bytes: {shown!r}{more}"


def examine_tail(data: bytes) -> Tail:
    """Apply the tail rules to the bytes of a log.

    The header is the first line; a log whose header itself is incomplete
    has ``keep = 0`` and the whole content torn.
    """
    nul = data.find(b"\x00")
    if nul >= 0:
        keep = data.rfind(b"\n", 0, nul) + 1
        line_no = data.count(b"\n", 0, keep) + 1
        end = data.find(b"\n", nul)
        if end >= 0 and data[end + 1:].strip(b"\x00"):     # rows follow: damage inside the file, not its end
            return Tail(keep, data[keep:], line_no, "NUL bytes with rows after them", damaged=True)
        return Tail(keep, data[keep:], line_no, "NUL bytes, as left by a power cut")
    keep = data.rfind(b"\n") + 1
    if keep == len(data):
        return Tail(keep, b"", 0, "")
    line_no = data.count(b"\n", 0, keep) + 1
    if keep == 0:
        return Tail(0, data, 1, "the header was cut")
    header = _cells(data[: data.find(b"\n")].removeprefix(BYTE_ORDER_MARK))
    cells = _cells(data[keep:])
    if header is not None and cells is not None and check_cells(header, cells) is None:
        return Tail(keep, data[keep:], line_no, "no newline at its end (rows are written whole with their "
                    "newline; its last cell may be cut)", cells_parse=True)
    return Tail(keep, data[keep:], line_no, "missing or cut cells")


def lock_path(log: str | Path) -> Path:
    """The lock file of a log: ``<observer>-<session>.lock`` beside it."""
    p = Path(log)
    name = p.name[: -len(".trials.csv")] if p.name.endswith(".trials.csv") else p.name
    return p.with_name(name + LOCK_SUFFIX)


def is_being_written(log: str | Path) -> bool:
    """True while a session holds the log's lock (a writer is running)."""
    import fcntl

    try:
        fd = os.open(lock_path(log), os.O_RDONLY)
    except OSError:
        return False
    try:
        fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
    except OSError:
        return True
    finally:
        os.close(fd)
    return False


#: The end of every trial log's file name.
LOG_SUFFIX = ".trials.csv"


def find_logs(paths) -> list[Path]:
    """Expand files and folders into the list of trial-log files.

    Raises
    ------
    InputError
        A path that does not exist, or a folder with no ``*.trials.csv``.
    """
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    found: list[Path] = []
    seen = set()
    for raw in paths:
        p = Path(raw)
        try:
            if p.is_dir():
                files = sorted(f for f in p.rglob("*" + LOG_SUFFIX) if f.is_file())
                if not files:
                    raise InputError(str(p), "", f"no trial logs (*{LOG_SUFFIX}) in this folder or below")
            elif p.is_file():
                files = [p]
            else:
                raise InputError(str(p), "", "no such file or folder")
        except OSError as exc:
            raise InputError(str(p), "", f"cannot be read ({exc.strerror})") from None
        for f in files:
            key = f.resolve()
            if key not in seen:
                seen.add(key)
                found.append(f)
    if not found:
        raise InputError("argument", "LOG_OR_DIR", "give at least one trial log or folder")
    return found
