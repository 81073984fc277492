"""Notes on observers who may be one person: names alike but for case, or the same trials under two names.

The group rows count every observer name as one person.  A log copied
under another name (``SIM02`` beside ``sim02``), or a person typed in
another case at a later session, would be counted twice: the group's
interval narrows on data it does not have.  ``fit`` does not refuse (two
people may be called ``ab`` and ``AB`` by a lab's scheme, and only the lab
knows); it says so in the notes, naming both.
"""

from __future__ import annotations

import csv
import hashlib
import io
import unicodedata
from pathlib import Path

import pandas as pd

from .logfile import IDENTITY_COLUMNS, examine_tail


def name_key(name: str) -> str:
    """An observer name in the form where names alike but for case (or Unicode form) are equal: NFKC casefold."""
    return unicodedata.normalize("NFKC", unicodedata.normalize("NFKC", str(name)).casefold())


def _trials_digest(log: Path) -> str | None:
    """SHA-256 of a log's whole rows without their observer and session cells; None if unreadable or no row."""
    try:
        data = Path(log).read_bytes()
        rows = list(csv.reader(io.StringIO(data[: examine_tail(data).keep].decode("utf-8-sig"), newline="")))
    except (OSError, UnicodeDecodeError, csv.Error):
        return None
    if len(rows) < 2:
        return None
    keep = [i for i, name in enumerate(c.strip() for c in rows[0]) if name not in IDENTITY_COLUMNS]
    digest = hashlib.sha256()
    for row in rows:
        digest.update("\x1f".join(row[i] for i in keep if i < len(row)).encode("utf-8") + b"\x1e")
    return digest.hexdigest()


def same_person_notes(trials: pd.DataFrame) -> list[str]:
    """Notes naming observers whose names are equal but for case, and logs that hold the same trials.

    Parameters
    ----------
    trials : pandas.DataFrame
        Trials from :func:`fitting.tables.read_logs`: the ``observer`` and
        ``source`` columns, and ``attrs["files"]``, the logs read.

    Returns
    -------
    list of str
        One note per set of names equal under :func:`name_key`, and one per
        set of logs whose rows are the same apart from observer and session.
    """
    notes = []
    alike: dict[str, set] = {}
    for name in trials["observer"].astype(str).unique():
        alike.setdefault(name_key(name), set()).add(name)
    for names in alike.values():
        if len(names) > 1:
            notes.append(f"observers {' and '.join(sorted(names))} are one name when case is ignored: they are counted as "
                         f"{len(names)} people; if they are one, give their logs and sidecars one name")
    owner = trials.drop_duplicates("source").set_index("source")["observer"].astype(str).to_dict()
    copies: dict[str, list] = {}
    for log in trials.attrs.get("files") or sorted(owner):
        digest = _trials_digest(Path(log))
        if digest is not None:
            copies.setdefault(digest, []).append(str(log))
    for logs in copies.values():
        if len(logs) > 1:
            named = [f"{log} ({owner.get(log, '?')})" for log in logs]
            who = ", ".join(named[:-1]) + " and " + named[-1]
            notes.append(f"logs {who} hold the same trials row for row (all but observer and session): a copy "
                         "adds no data; fit only one of them")
    return notes
