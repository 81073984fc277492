"""Notes on observers who may be one person: names alike but for case, or the same trials under two names.

The group rows count every observer name as one person.  A log copied
under another name (``SIM02`` beside ``sim02``), or a person typed in
another case at a later session, would be counted twice: the group's
interval narrows on data it does not have.  ``fit`` does not refuse (two
people may be called ``ab`` and ``AB`` by a lab's scheme, and only the lab
knows); it says so in the notes, naming both.
"""

from __future__ import annotations

import hashlib
import unicodedata

import pandas as pd

from .logfile import IDENTITY_COLUMNS


def name_key(name: str) -> str:
    """An observer name in the form where names alike but for case (or Unicode form) are equal: NFKC casefold."""
    return unicodedata.normalize("NFKC", unicodedata.normalize("NFKC", str(name)).casefold())


def _trials_digest(rows: pd.DataFrame) -> str:
    """SHA-256 of one log's trials as read, without the cells that name the observer, the session or the file."""
    kept = rows.drop(columns=[c for c in (*IDENTITY_COLUMNS, "source", "line") if c in rows.columns])
    return hashlib.sha256(kept.to_csv(index=False).encode("utf-8")).hexdigest()


def same_person_notes(trials: pd.DataFrame) -> list[str]:
    """Notes naming observers whose names are equal but for case, and logs that hold the same trials.

    Parameters
    ----------
    trials : pandas.DataFrame
        Trials from :func:`fitting.tables.read_logs`, with their ``observer``
        and ``source`` (the log each came from); the logs are not read again.

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
    for log, rows in trials.groupby("source", sort=True):
        copies.setdefault(_trials_digest(rows.reset_index(drop=True)), []).append(str(log))
    for logs in copies.values():
        if len(logs) > 1:
            named = [f"{log} ({owner.get(log, '?')})" for log in logs]
            who = ", ".join(named[:-1]) + " and " + named[-1]
            notes.append(f"logs {who} hold the same trials row for row (all but observer and session): a copy "
                         "adds no data; fit only one of them")
    return notes
