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

* a missing file that carries numbers (a table, ``report_data.json``,
  ``summary.txt``) is refused, as is a table (CSV) cut inside a row, with a
  row of more or fewer cells than its header, a header cell without a name,
  or without the ``observer`` column by which the page sorts its rows: one
  line naming the file (and line, column), exit 2;
* a figure that is missing, or not a whole PNG or PDF, leaves a note, which
  ``compare`` prints and the page shows at its top; the page then shows the
  fit without it.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass
from pathlib import Path

from .errors import InputError
from .outputs import MANIFEST, _inside, read_manifest, write_atomic
from .page import OBSERVER_TABLES, PAGE
from .provenance import REPORT_DATA

#: The copy's folder inside ``compare``'s output folder.
FIT_COPY = "fit"
#: Tables whose rows the page sorts by observer.
BY_OBSERVER = (*(name for name, _ in OBSERVER_TABLES), "exclusions.csv", "aftereffect_covariance.csv")
#: Files a page shows, looked for in a folder without a manifest.
SHOWN = (*BY_OBSERVER, "mixed_model.csv", REPORT_DATA, "summary.txt")
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
            data = path.read_bytes()
        except (FileNotFoundError, IsADirectoryError, NotADirectoryError):
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
        raise InputError(str(source / MANIFEST), "files", f"lists {outside[0]!r}, outside the fit folder, as no "
                         "fit writes it (a hand edit?); run fit again into this folder")
    return [rel for rel in listed if rel not in (PAGE, MANIFEST)]


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
