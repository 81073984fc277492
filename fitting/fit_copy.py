"""The copy of a fit folder that ``compare``'s page shows, each file checked on the way.

``compare``'s page shows a fit's tables, figures and records beside the
comparison.  It used to link the fit folder's files while copying the
tables' numbers into the page, so a later ``fit`` into the same folder left
the page showing old numbers beside new figures and downloads.  Now
``compare`` copies every file of the fit that the page shows into
:data:`FIT_COPY` inside its own folder and builds the page from that copy: a
snapshot of one fit, whatever happens to the fit folder afterwards.

The files copied are those the fit folder's manifest (``outputs.json``,
:mod:`fitting.outputs`) lists, less the fit's own page; a folder without a
manifest (assembled by hand) gives the files a page shows that are there.
Each is checked as it is read:

* a missing file that carries numbers (a table, ``summary.txt``) is refused, as is a table (CSV) cut inside a row, with a
  row of more or fewer cells than its header, a header cell without a name,
  or without the ``observer`` column by which the page sorts its rows: one
  line naming the file (and line, column), exit 2; so is a number cell of
  ``pse.csv``, ``aftereffect.csv``, ``tuning.csv`` or ``decay.csv`` that is
  not a finite number, or beyond the range fit's bounds keep it in, by the
  rule ``compare`` applies to the tables it reads (:mod:`fitting.cells`);
* a file (or a folder on its way) that is a link, or that is not a regular
  file (a FIFO, a device, a folder), is refused in one line saying what it
  is: the copy holds the fit's own files, never what a link points to (such
  as ``/etc/passwd``), and reading waits on no pipe; so is a file larger
  than :data:`MAX_FILE_BYTES` (it is not fit's, and would be held in memory);
* a figure that is missing, or not a whole PNG or PDF, or a missing
  ``report_data.json`` (the record of sessions, protocols and software, not
  numbers of the tables; a clone of the repository lacks the demo's) leaves
  a note, which
  ``compare`` prints and the page shows at its top; the page then shows the
  fit without it.
"""

from __future__ import annotations

import csv
import errno
import io
import os
import stat
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from .aftereffect import TAU_BOUNDS
from .cells import check_numbers, check_ranges
from .errors import InputError
from .observer import AFTEREFFECT_COLUMNS, DECAY_COLUMNS, PSE_COLUMNS, TUNING_COLUMNS
from .outputs import MANIFEST, _inside, read_manifest, write_atomic
from .page import OBSERVER_TABLES, PAGE
from .provenance import REPORT_DATA

#: The copy's folder inside ``compare``'s output folder.
FIT_COPY = "fit"
#: Tables whose rows the page sorts by observer.
BY_OBSERVER = (*(name for name, _ in OBSERVER_TABLES), "exclusions.csv", "aftereffect_covariance.csv")
#: Files a page shows, looked for in a folder without a manifest.
SHOWN = (*BY_OBSERVER, "mixed_model.csv", REPORT_DATA, "summary.txt")
#: Tables whose cells the page shows as numbers: columns fit writes as text (the rest are numbers, or empty).
TEXT_COLUMNS = ("observer", "condition", "flags")
NUMBER_TABLES = {"pse.csv": PSE_COLUMNS, "aftereffect.csv": AFTEREFFECT_COLUMNS, "tuning.csv": TUNING_COLUMNS,
                 "decay.csv": DECAY_COLUMNS}
#: Ranges fit's own bounds keep numbers in (the decay constant's fit, :data:`fitting.aftereffect.TAU_BOUNDS`).
NUMBER_RANGES = {"decay.csv": {col: (*TAU_BOUNDS, " periods (what fit can write)")
                               for col in ("decay_periods", "ci_low", "ci_high")}}
#: The largest file copied (bytes): far above anything fit writes; the copy is held in memory until written.
MAX_FILE_BYTES = 256 * 2**20
#: First and last bytes of a whole figure file (PNG: signature and IEND chunk; PDF: header and end marker).
FIGURE_ENDS = {".png": (b"\x89PNG\r\n\x1a\n", b"IEND\xaeB`\x82"), ".pdf": (b"%PDF-", b"%%EOF")}


@dataclass(frozen=True)
class FitCopy:
    """The checked files of a fit folder, held until they are written into ``compare``'s outputs.

    Attributes
    ----------
    source : Path
        The fit folder.
    files : dict of str to bytes
        Path relative to the fit folder -> content.
    notes : tuple of str
        Figures left out, and why.
    """

    source: Path
    files: dict
    notes: tuple

    def write(self, folder: Path) -> Path:
        """Write the files under ``folder / FIT_COPY`` (same layout as the fit folder); return that folder."""
        into = Path(folder) / FIT_COPY
        for rel, data in self.files.items():
            write_atomic(into / rel, data)
        into.mkdir(parents=True, exist_ok=True)
        return into


def read_fit(fit_dir: str | Path) -> FitCopy:
    """Read and check the files of ``fit_dir`` that ``compare``'s page shows.

    Parameters
    ----------
    fit_dir : str or Path
        A folder written by ``aftershift fit``.

    Returns
    -------
    FitCopy

    Raises
    ------
    InputError
        A file with numbers is missing or damaged, or the manifest lists a
        file outside the folder.
    """
    source = Path(fit_dir)
    files, notes = {}, []
    for rel in _listed(source):
        path = source / rel
        figure = path.suffix.lower() in FIGURE_ENDS
        try:
            data = _read_own(source, rel)
        except (FileNotFoundError, NotADirectoryError):
            if rel == REPORT_DATA:            # a record, not numbers of the tables (git-ignored in the demo)
                notes.append(f"{path}: listed in {MANIFEST} but missing; the report shows the fit without the "
                             "sessions, protocols and software behind it")
                continue
            if not figure:
                raise InputError(str(path), "file", f"listed in {MANIFEST} but missing; it carries numbers the "
                                 "report shows, so run fit again into this folder") from None
            notes.append(f"{path}: listed in {MANIFEST} but missing; the report shows the fit without it")
            continue
        except OSError as exc:
            raise InputError(str(path), "file", f"cannot be read ({exc.strerror})") from None
        if figure:
            head, tail = FIGURE_ENDS[path.suffix.lower()]
            if not (data.startswith(head) and tail in data[-32:]):
                notes.append(f"{path}: not a whole {path.suffix[1:].upper()} file (cut or damaged); the report "
                             "shows the fit without it")
                continue
        elif path.suffix == ".csv":
            check_table(path, data, by_observer=rel in BY_OBSERVER)
            if rel in NUMBER_TABLES:
                _check_cells(path, data, NUMBER_TABLES[rel], NUMBER_RANGES.get(rel))
        files[rel] = data
    return FitCopy(source, files, tuple(notes))


def _listed(source: Path) -> list[str]:
    """What the manifest lists (less the fit's page and the manifest), or what a page shows that is there."""
    if not (source / MANIFEST).is_file():
        found = [name for name in SHOWN if (source / name).is_file()]
        return found + sorted(str(p.relative_to(source)) for folder in (source, source / "figures")
                              if folder.is_dir() for p in folder.iterdir()
                              if p.suffix.lower() in FIGURE_ENDS and p.is_file())
    listed = read_manifest(source)
    if not listed:
        raise InputError(str(source / MANIFEST), "files", "not the list of files fit writes (damaged?); "
                         "run fit again into this folder")
    outside = [rel for rel in listed if not _inside(source, rel)]
    if outside:
        rel = outside[0]
        parts = Path(rel).parts
        if not (Path(rel).is_absolute() or ".." in parts):       # a folder of the fit linked elsewhere
            for depth in range(1, len(parts)):
                if (source.joinpath(*parts[:depth])).is_symlink():
                    _refuse_link(source.joinpath(*parts[:depth]), source)
        raise InputError(str(source / MANIFEST), "files", f"lists {rel!r}, outside the fit folder, as no "
                         "fit writes it (a hand edit?); run fit again into this folder")
    return [rel for rel in listed if rel not in (PAGE, MANIFEST)]


#: What a path that is not a regular file is, by its file type.
_KINDS = {stat.S_IFDIR: "a folder", stat.S_IFIFO: "a FIFO (named pipe)", stat.S_IFCHR: "a device",
          stat.S_IFBLK: "a device", stat.S_IFSOCK: "a socket"}


def _read_own(source: Path, rel: str) -> bytes:
    """Read ``source / rel`` if it is a regular file reached through no link; else refuse it in one line.

    Each part of ``rel`` is opened with ``O_NOFOLLOW`` inside the folder
    opened before it, so a link anywhere on the way is seen, not followed;
    ``O_NONBLOCK`` keeps the open of a FIFO from waiting for a writer.

    Raises
    ------
    FileNotFoundError, NotADirectoryError
        The file (or a folder on its way) is not there.
    InputError
        A link, or not a regular file, naming it and what it is.
    """
    parts = Path(rel).parts
    fd = os.open(source, os.O_RDONLY | os.O_DIRECTORY)
    try:
        for depth, part in enumerate(parts, 1):
            last = depth == len(parts)
            flags = os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC | (0 if last else os.O_DIRECTORY)
            try:
                inner = os.open(part, flags, dir_fd=fd)
            except OSError as exc:
                here = source.joinpath(*parts[:depth])
                if exc.errno in (errno.ELOOP, errno.ENOTDIR) and here.is_symlink():
                    _refuse_link(here, source)
                raise
            os.close(fd)
            fd = inner
        mode = os.fstat(fd).st_mode
        if not stat.S_ISREG(mode):
            raise InputError(str(source / rel), "file", f"is {_KINDS.get(stat.S_IFMT(mode), 'not a file')}, "
                             "not a file fit writes; compare copies only the fit's own files, so put the file "
                             "itself there or run fit again into this folder")
        size = os.fstat(fd).st_size
        if size > MAX_FILE_BYTES:
            raise InputError(str(source / rel), "file", f"is {size / 2**20:,.0f} MB, larger than any file fit writes "
                             f"(at most {MAX_FILE_BYTES // 2**20} MB is copied); run fit again into this folder")
        os.set_blocking(fd, True)
        with os.fdopen(fd, "rb") as fh:
            fd = -1                                                 # closed with fh
            return fh.read()
    finally:
        if fd >= 0:
            os.close(fd)


def _refuse_link(link: Path, source: Path) -> None:
    """Refuse ``link`` (a link inside the fit folder ``source``), saying where it points."""
    target = os.readlink(link)
    real, top = os.path.realpath(link), os.path.realpath(source)
    where = "inside" if real == top or real.startswith(top + os.sep) else "outside"
    raise InputError(str(link), "file", f"is a link to {target}, {where} the fit folder; compare copies only the "
                     "fit's own files, not what links point to: copy the files themselves in (e.g. `cp -rL`) "
                     "or run fit again into this folder")


def _check_cells(path: Path, data: bytes, columns, ranges) -> None:
    """Refuse a number cell (a column of ``columns`` fit writes as a number) as compare's own tables are refused."""
    frame = pd.read_csv(io.BytesIO(data), dtype=str, keep_default_na=False, na_values=[""])
    numbers = [col for col in columns if col in frame and col not in TEXT_COLUMNS]
    check_numbers(frame, path, numbers, may_be_empty=numbers)
    check_ranges(frame, path, [col for col in numbers if col == "lag"],
                 {col: span for col, span in (ranges or {}).items() if col in numbers})


def check_table(path: Path, data: bytes, by_observer: bool = False) -> None:
    """Refuse a table ``fit`` wrote that the report could not show whole.

    Parameters
    ----------
    path : Path
        Where ``data`` was read (named in the error).
    data : bytes
        The file's content.
    by_observer : bool
        The table must have an ``observer`` column.

    Raises
    ------
    InputError
        Cut inside a row (``fit`` ends every row with its newline), not
        UTF-8 text, empty, a header cell without a name, no ``observer``
        column where one is needed, or a row whose number of cells is not
        the header's; naming the line (and column).
    """
    if data and not data.endswith(b"\n"):
        line = data.count(b"\n") + 1
        raise InputError(str(path), f"line {line}", "the file ends inside this row (cut off, as "
                         "an interrupted copy leaves it); copy the fit's folder again or run fit again")
    try:
        rows = csv.reader(io.StringIO(data.decode("utf-8"), newline=""))
        header = next(rows, None)
        if not header:
            raise InputError(str(path), "line 1", "no header: the file is empty, and fit writes at least its header")
        for column, name in enumerate(header, 1):
            if not name.strip():
                raise InputError(str(path), f"line 1, column {column}", "a column without a name, as no fit "
                                 "writes it (a changed or damaged file?); run fit again")
        if by_observer and "observer" not in header:
            raise InputError(str(path), "observer", "column missing, as no fit writes it (a changed or damaged "
                             "file?); run fit again")
        for row in rows:
            if row and len(row) != len(header):
                raise InputError(str(path), f"line {rows.line_num}", f"{len(row)} cells where the header has "
                                 f"{len(header)} (a cut or changed row?); copy the fit's folder again or run fit again")
    except (UnicodeDecodeError, csv.Error) as exc:
        raise InputError(str(path), "file", f"cannot be read as CSV ({str(exc).splitlines()[0]})") from None
