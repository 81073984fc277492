"""The rule for the number cells of a table: a finite number (or empty where allowed), in its range.

``compare`` applies it to the tables it reads for numbers (``aftereffect.csv``,
the covariances, the predictions) and :mod:`fitting.fit_copy` to the other
tables of a fit that its page shows, so that one rule decides what a number
cell may hold, and a refusal names the file, line and column in one line.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from .errors import InputError


def line_of(mask) -> int:
    """The file line of the first True row of ``mask`` (the header is line 1)."""
    return int(np.flatnonzero(np.asarray(mask))[0]) + 2


def check_numbers(frame: pd.DataFrame, path: Path, columns, may_be_empty=()) -> None:
    """Turn ``columns`` of ``frame`` into numbers, refusing a cell that is not a finite number.

    Parameters
    ----------
    frame : DataFrame
        The table as read (cells as text or numbers); changed in place.
    path : Path
        Where it was read (named in the error).
    columns : iterable of str
        Columns whose cells must be finite numbers.
    may_be_empty : iterable of str
        Columns whose cells may also be empty.

    Raises
    ------
    InputError
        Naming the first line and column of a cell that is not a finite number.
    """
    for col in columns:
        values = pd.to_numeric(frame[col], errors="coerce")
        bad = values.isna() & frame[col].notna() | ~np.isfinite(values.fillna(0))
        missing = values.isna() & (col not in tuple(may_be_empty))
        if (missing & ~bad).any():
            line = line_of(missing & ~bad)
            raise InputError(str(path), f"line {line}", f"{col}: missing or not a finite number "
                             f"({str(frame[col].iloc[line - 2])!r})")
        if bad.any():
            line = line_of(bad)
            raise InputError(str(path), f"line {line}", f"{col}: expected a number, found {str(frame[col].iloc[line - 2])!r}")
        frame[col] = values


def check_ranges(frame: pd.DataFrame, path: Path, lags=(), ranges=None) -> None:
    """Refuse a lag that is not a whole number >= 0 and a value outside its range, naming line and column.

    Parameters
    ----------
    frame : DataFrame
        Number columns already checked by :func:`check_numbers`.
    path : Path
        Where it was read (named in the error).
    lags : iterable of str
        Columns of whole numbers of periods >= 0 (empty cells pass).
    ranges : dict of str to (float, float, str), optional
        Column -> (low, high, unit shown after the range); empty cells pass.

    Raises
    ------
    InputError
        Naming the first line and column of a value out of its range.
    """
    for col in lags:
        lag = frame[col]
        odd = (lag < 0) | (lag != np.round(lag)) & lag.notna()
        if odd.any():
            line = line_of(odd)
            raise InputError(str(path), f"line {line}",
                             f"{col}: expected a whole number of periods >= 0, found {lag.iloc[line - 2]:g}")
    for col, (low, high, unit) in (ranges or {}).items():
        out = frame[col].notna() & ~frame[col].between(low, high)
        if out.any():
            line = line_of(out)
            raise InputError(str(path), f"line {line}", f"{col}: expected a value in [{low:g}, {high:g}]{unit}, "
                             f"found {frame[col].iloc[line - 2]:g}")
