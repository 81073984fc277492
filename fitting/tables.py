"""Reading trial logs and writing tidy tables.

Reading
-------
:func:`read_logs` takes files and folders (a folder means every
``*.trials.csv`` below it), checks every column the fits use, pools the
sessions of each observer, and drops practice trials, trials with
``timing_ok = false`` and missed answers (empty ``response_cw``), counting
each.  Any bad value raises :class:`~fitting.errors.InputError` naming the
file and the line (or column); nothing is guessed.

Columns (README, Output files): ``observer, session, trial, condition,
adapter_offset_deg, lag, track, test_offset_deg, response_cw, rt_s,
dropped_frames, timing_ok`` are required; ``practice`` (0/1, missing = no
practice) and ``period_s`` (seconds of one intervening period) are optional;
others are ignored.

Writing
-------
:func:`write_csv` writes a table atomically (temporary file, then rename) in
a fixed number format, so the same results give the same bytes.
"""

from __future__ import annotations

import csv
import io
import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import InputError
from .logfile import (LOG_SUFFIX, check_header_line, check_rows, decode_log, examine_tail, find_logs,  # noqa: F401
                      is_being_written)  # find_logs, LOG_SUFFIX: public here too
from .outputs import write_atomic

REQUIRED_COLUMNS = ["observer", "session", "trial", "condition", "adapter_offset_deg", "lag",
                    "track", "test_offset_deg", "response_cw", "rt_s", "dropped_frames", "timing_ok"]
BASELINE = "baseline"
#: Offsets beyond this (deg) are bad input: directions repeat every 360 degrees.
MAX_OFFSET_DEG = 180.0

#: How far (deg) a logged ``test_direction_deg`` may lie from ``reference_deg - test_offset_deg``: the log writes
#: directions to 6 decimals and offsets to 10 significant digits (``runner.trial_log``).
DIRECTION_TOLERANCE_DEG = 1e-5
#: The ``procedure`` cell of a practice row (``runner.session.trial_row``).
PRACTICE_PROCEDURE = "practice"

_TRUE = {"true", "1", "1.0", "yes"}
_FALSE = {"false", "0", "0.0", "no"}


def _text(col: pd.Series) -> pd.Series:
    """Column as stripped text, with missing values as ''."""
    out = col.astype(object).where(col.notna(), "")
    return out.map(lambda v: str(v).strip())


def _first_bad(mask: pd.Series) -> int | None:
    where = np.flatnonzero(mask.to_numpy())
    return int(where[0]) if where.size else None


class _Checker:
    """Converts raw text columns, raising on the first bad value."""

    def __init__(self, raw: pd.DataFrame, source: str, row_names: list[str]):
        self.raw = raw
        self.source = source
        self.row_names = row_names

    def fail(self, row: int, column: str, message: str):
        raise InputError(self.source, f"{self.row_names[row]}, column {column}", message)

    def text(self, name: str, required: bool = True) -> pd.Series:
        t = _text(self.raw[name])
        if required:
            bad = _first_bad(t == "")
            if bad is not None:
                self.fail(bad, name, "empty; a value is required")
        return t

    def number(self, name: str, allow_empty: bool, rows: pd.Series | None = None) -> pd.Series:
        t = _text(self.raw[name])
        num = pd.to_numeric(t.where(t != "", None), errors="coerce").astype(float)
        check = pd.Series(True, index=t.index) if rows is None else rows
        bad_text = check & (t != "") & ~np.isfinite(num.fillna(np.inf).to_numpy())
        bad_text |= check & (t != "") & num.isna()
        bad = _first_bad(bad_text)
        if bad is not None:
            self.fail(bad, name, f"'{t.iloc[bad]}' is not a number")
        if not allow_empty:
            bad = _first_bad(check & (t == ""))
            if bad is not None:
                self.fail(bad, name, "empty; a number is required")
        return num

    def flag(self, name: str, empty_means: bool | None) -> pd.Series:
        t = _text(self.raw[name]).str.lower()
        ok = t.isin(_TRUE | _FALSE) | ((t == "") & (empty_means is not None))
        bad = _first_bad(~ok)
        if bad is not None:
            self.fail(bad, name, f"'{self.raw[name].iloc[bad]}' is not true/false (or 1/0)")
        return t.isin(_TRUE) | ((t == "") & bool(empty_means))


def validate_trials(raw: pd.DataFrame, source: str, row_names: list[str] | None = None) -> pd.DataFrame:
    """Check and convert one table of trials (text or typed columns).

    Parameters
    ----------
    raw : pandas.DataFrame
        Rows of a trial log.
    source : str
        Name used in error messages (a file name, or ``"trials"``).
    row_names : list of str, optional
        How to name each row in messages (default ``"row 1"``, ...).

    Returns
    -------
    pandas.DataFrame
        Columns ``observer, session, trial, condition, is_baseline,
        adapter_offset_deg, lag, track, test_offset_deg, response_cw,
        timing_ok, practice, period_s, reference_deg, source, line``;
        ``response_cw`` is NaN for a missed answer, ``period_s`` and
        ``reference_deg`` NaN where the log does not have them.
    """
    raw = raw.rename(columns=lambda c: str(c).strip())
    missing = [c for c in REQUIRED_COLUMNS if c not in raw.columns]
    if missing:
        raise InputError(source, f"column {missing[0]}",
                         "missing required column" + ("s " if len(missing) > 1 else " ")
                         + ", ".join(missing))
    if len(raw) == 0:
        raise InputError(source, "", "the log holds no trials")
    raw = raw.reset_index(drop=True)
    names = row_names if row_names is not None else [f"row {i + 1}" for i in range(len(raw))]
    ck = _Checker(raw, source, names)
    out = pd.DataFrame(index=raw.index)
    out["observer"] = ck.text("observer")
    out["session"] = ck.text("session", required=False)
    out["trial"] = ck.number("trial", allow_empty=True)
    out["condition"] = ck.text("condition")
    out["is_baseline"] = out["condition"].str.lower() == BASELINE
    adapted = ~out["is_baseline"]
    offset = ck.number("adapter_offset_deg", allow_empty=True, rows=adapted)
    lag = ck.number("lag", allow_empty=True, rows=adapted)
    for name, col in (("adapter_offset_deg", offset), ("lag", lag)):
        bad = _first_bad(adapted & col.isna())
        if bad is not None:
            ck.fail(bad, name, f"empty, but condition '{out['condition'].iloc[bad]}' is not the baseline")
    bad = _first_bad(adapted & ((lag < 0) | (lag != np.round(lag))))
    if bad is not None:
        ck.fail(bad, "lag", f"'{raw['lag'].iloc[bad]}' is not a whole number of periods >= 0")
    out["adapter_offset_deg"] = offset.where(adapted)
    out["lag"] = lag.where(adapted)
    out["track"] = ck.text("track", required=False)
    out["test_offset_deg"] = ck.number("test_offset_deg", allow_empty=False)
    resp = _text(raw["response_cw"])
    num = pd.to_numeric(resp.where(resp != "", None), errors="coerce")
    bad = _first_bad((resp != "") & ~num.isin([0, 1]))
    if bad is not None:
        ck.fail(bad, "response_cw", f"'{resp.iloc[bad]}' is not 1, 0 or empty")
    out["response_cw"] = num.astype(float)
    out["timing_ok"] = ck.flag("timing_ok", empty_means=None)
    out["practice"] = ck.flag("practice", empty_means=False) if "practice" in raw.columns \
        else pd.Series(False, index=raw.index)
    if "period_s" in raw.columns:
        period = ck.number("period_s", allow_empty=True)
        bad = _first_bad(period <= 0)
        if bad is not None:
            ck.fail(bad, "period_s", f"'{raw['period_s'].iloc[bad]}' is not a positive duration")
        out["period_s"] = period
    else:
        out["period_s"] = np.nan
    # one direction, one number: 450 and 90 are the same reference
    out["reference_deg"] = np.mod(ck.number("reference_deg", allow_empty=True), 360.0) \
        if "reference_deg" in raw.columns else np.nan
    out["source"] = source
    out["line"] = names
    return out


def check_row_agreement(raw: pd.DataFrame, source: str, names: list[str], offset: pd.Series, practice: pd.Series,
                        lag: pd.Series) -> None:
    """Refuse a log row whose cells disagree with each other, as no session writes them (an edited cell).

    ``raw``: the log's text cells, ``names`` its rows' names in messages;
    ``offset``, ``practice`` and ``lag``: its test offsets, practice flags
    and lags as read (NaN where not a number or empty).

    Where the log has the columns: the test direction is the reference
    minus the test offset, modulo 360 (directions counter-clockwise from
    rightward, offsets positive clockwise: ``runner.plan.offset_to_direction``);
    a session's rows share one reference; a practice row's procedure is
    ``practice`` and only its; an adapt-test row (not ``block`` stream) has
    as many intervening offsets as its lag (none for the baseline).  A
    flipped answer leaves no such trace in its row: only replaying the
    tracks (``--resume`` does) shows it.
    """
    ck = _Checker(raw, source, names)
    observer, session = _text(raw["observer"]), _text(raw.get("session", pd.Series("", index=raw.index)))
    if "reference_deg" in raw.columns:
        reference = ck.number("reference_deg", allow_empty=True)
        key = observer + "\0" + session
        known = reference.notna()
        first = reference[known].groupby(key[known]).transform("first").reindex(reference.index)
        bad = _first_bad(known & ~np.isclose(reference, first, rtol=0, atol=1e-9))
        if bad is not None:
            ck.fail(bad, "reference_deg", f"{reference.iloc[bad]:g} deg, but the first row of session "
                    f"{session.iloc[bad]} of {observer.iloc[bad]} has {first.iloc[bad]:g}: one "
                    "session has one reference (an edited cell?)")
        if "test_direction_deg" in raw.columns:
            direction = ck.number("test_direction_deg", allow_empty=True)
            expected = np.mod(reference - offset, 360.0)
            apart = np.abs(np.mod(direction - expected + 180.0, 360.0) - 180.0)
            bad = _first_bad(direction.notna() & known & (apart > DIRECTION_TOLERANCE_DEG))
            if bad is not None:
                ck.fail(bad, "test_direction_deg", f"{direction.iloc[bad]:g} deg, but reference_deg "
                        f"{reference.iloc[bad]:g} and test_offset_deg {offset.iloc[bad]:g} give "
                        f"{expected.iloc[bad]:g} (reference minus offset): the row disagrees with itself (an "
                        "edited cell?)")
    if "procedure" in raw.columns:
        procedure = _text(raw["procedure"])
        bad = _first_bad((procedure != "") & ((procedure == PRACTICE_PROCEDURE) != practice))
        if bad is not None:
            ck.fail(bad, "procedure", f"'{procedure.iloc[bad]}', but practice is "
                    f"{int(practice.iloc[bad])}: practice rows, and only they, have procedure "
                    f"'{PRACTICE_PROCEDURE}' (an edited cell?)")
    if "intervening_offsets_deg" in raw.columns:
        cells = _text(raw["intervening_offsets_deg"])
        count = cells.map(lambda c: len(c.split(";")) if c else 0)
        stream = _text(raw["block"]) == "stream" if "block" in raw.columns else pd.Series(False, index=raw.index)
        bad = _first_bad(~stream & (count != lag.fillna(0)))
        if bad is not None:
            at, n = lag.iloc[bad], count.iloc[bad]
            ck.fail(bad, "intervening_offsets_deg", f"{n} offset{'' if n == 1 else 's'}, but the row's lag is "
                    f"{'empty (baseline: none)' if np.isnan(at) else f'{at:g}'}: one offset per intervening "
                    "period (an edited cell?)")


def read_log_table(path: Path) -> pd.DataFrame:
    """The rows of one log file as text, after the tail rules of :mod:`fitting.logfile`.

    A last line without its newline is torn.  Left out with a note when
    its cells all parse (it may be cut inside its last cell), otherwise an
    error (exit 2) naming it, unless a session is writing the log right now
    (its lock is held), in which case the line being written is left out.
    Every row must pass the cell rules a resume applies too
    (:func:`fitting.logfile.check_rows`).

    Raises
    ------
    InputError
        Unreadable file, torn line, a table that is not a CSV log, or a bad
        cell (naming its line and column).
    """
    source = str(path)
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise InputError(source, "file", f"cannot be read ({exc.strerror})") from None
    check_header_line(data, source)
    tail = examine_tail(data)
    if tail.damaged:
        raise tail.damage(source)
    if tail.torn:
        if is_being_written(path):
            pass                    # the line a running session is writing
        elif tail.cells_parse:
            print(f"note: {source}: line {tail.torn_line} left out: torn ({tail.describe()}); resume the "
                  "session (--resume) to write it again", file=sys.stderr)
        else:
            raise InputError(source, f"line {tail.torn_line}",
                             f"torn ({tail.describe()}): the session stopped "
                             "while writing it; resume the session (--resume) to repair the log, or fit a copy "
                             "without that line")
        data = data[: tail.keep]
    rows = list(csv.reader(io.StringIO(decode_log(data, source))))
    if not rows:
        raise InputError(source, "", "empty file: no header and no trials")
    header = [c.strip() for c in rows[0]]
    check_rows(header, rows[1:], source)
    return pd.DataFrame(rows[1:], columns=header, dtype=str)


def _read_file(path: Path) -> pd.DataFrame:
    source = str(path)
    raw = read_log_table(path)
    names = [f"line {i + 2}" for i in range(len(raw))]
    trials = validate_trials(raw, source, names)
    check_row_agreement(raw, source, names, trials["test_offset_deg"], trials["practice"], trials["lag"])
    return trials


def check_unique_trials(table: pd.DataFrame) -> None:
    """Refuse the same (observer, session, trial) twice across all inputs.

    ``table`` has ``observer, session, trial, source, line`` columns.  A
    backup copy of a log beside the original, or a row written twice, would
    otherwise be fitted as twice the data.

    Raises
    ------
    InputError
        Naming both places of the first repeated trial.
    """
    key = pd.DataFrame({c: table[c].map(lambda v: f"{v:g}" if isinstance(v, float) else str(v))
                        for c in ("observer", "session", "trial")})
    dup = key.duplicated(keep=False)
    if not dup.any():
        return
    first = key[dup].iloc[0]
    same = table[dup & (key == first).all(axis=1)]
    a, b = same.iloc[0], same.iloc[1]
    raise InputError(str(b["source"]), str(b["line"]),
                     f"observer {first['observer']}, session {first['session']}, trial {first['trial']} "
                     f"is already in {a['source']} {a['line']}; the same trial twice would count double "
                     "(remove the copy or the repeated row)")


def recorded_bounds(log: str | Path) -> tuple[float, float] | None:
    """The protocol's test-offset bounds from the sidecar beside a log, if it records them."""
    p = Path(log)
    if not p.name.endswith(LOG_SUFFIX):
        return None
    try:
        side = json.loads(p.with_name(p.name[: -len(LOG_SUFFIX)] + ".session.json").read_text(encoding="utf-8"))
        lo, hi = (float(v) for v in side["offset_bounds_deg"])
    except (OSError, ValueError, KeyError, TypeError):
        return None
    return (lo, hi) if np.isfinite([lo, hi]).all() and lo < hi else None


def check_offsets(trials: pd.DataFrame, limit: float = MAX_OFFSET_DEG) -> None:
    """Refuse offsets outside a plausible range.

    Main-trial test offsets must lie within the protocol's bounds where
    the log's sidecar records them (``offset_bounds_deg``), and within
    ±``limit`` otherwise; practice and adapter offsets within ±``limit``.

    Raises
    ------
    InputError
        Naming the file, line and column of the first implausible offset.
    """
    lo = pd.Series(-limit, index=trials.index)
    hi = pd.Series(limit, index=trials.index)
    for source in trials["source"].unique():
        bounds = recorded_bounds(source)
        if bounds is not None:
            rows = (trials["source"] == source) & ~trials["practice"]  # practice offsets may lie outside
            lo[rows], hi[rows] = bounds[0] - 1e-9, bounds[1] + 1e-9
    x = trials["test_offset_deg"]
    bad = _first_bad((x < lo) | (x > hi))
    if bad is not None:
        row = trials.iloc[bad]
        raise InputError(str(row["source"]), f"{row['line']}, column test_offset_deg",
                         f"{row['test_offset_deg']:g} deg is outside the plausible range "
                         f"[{lo.iloc[bad]:g}, {hi.iloc[bad]:g}] deg (the protocol's bounds where the sidecar "
                         f"records them, otherwise ±{limit:g})")
    bad = _first_bad(trials["adapter_offset_deg"].abs() > limit)
    if bad is not None:
        row = trials.iloc[bad]
        raise InputError(str(row["source"]), f"{row['line']}, column adapter_offset_deg",
                         f"{row['adapter_offset_deg']:g} deg is outside the plausible range of ±{limit:g} deg")


def _check_conditions(trials: pd.DataFrame) -> None:
    """Within an observer, one condition label <-> one (offset, lag)."""
    adapted = trials[~trials["is_baseline"]]
    for obs, group in adapted.groupby("observer", sort=True):
        key = list(zip(group["adapter_offset_deg"], group["lag"]))
        first_key: dict = {}
        first_name: dict = {}
        for (name, k, src, line) in zip(group["condition"], key, group["source"], group["line"]):
            if first_key.setdefault(name, k) != k:
                raise InputError(src, line, f"condition '{name}' of observer {obs} had adapter offset "
                                 f"{first_key[name][0]:g} and lag {first_key[name][1]:g} before, "
                                 f"here {k[0]:g} and {k[1]:g}")
            if first_name.setdefault(k, name) != name:
                raise InputError(src, line, f"conditions '{first_name[k]}' and '{name}' of observer "
                                 f"{obs} both have adapter offset {k[0]:g} and lag {k[1]:g}")


def _check_one_protocol(trials: pd.DataFrame) -> None:
    """Within an observer, one motion period and one reference direction: sessions of other protocols are not pooled.

    The sidecars say which protocol each session ran
    (:func:`fitting.provenance.protocol_by_observer` refuses an observer's
    sessions of different protocols); the log's own ``period_s`` and
    ``reference_deg`` say it too, also for a log whose sidecar is missing.
    """
    for column, unit, what in (("period_s", " s", "motion periods"), ("reference_deg", " deg", "reference directions")):
        known = trials[trials[column].notna()]
        first = known.groupby("observer", sort=False)[column].transform("first")
        bad = np.flatnonzero(~np.isclose(known[column], first, rtol=1e-9, atol=1e-12))
        if bad.size:
            row = known.iloc[bad[0]]
            was = known[known["observer"] == row["observer"]].iloc[0]
            raise InputError(row["source"], f"{row['line']}, column {column}",
                             f"{row[column]:g}{unit}, but observer {row['observer']}'s {was['line']} of "
                             f"{was['source']} has {was[column]:g}{unit}: sessions of protocols with other {what} "
                             "would be pooled into one PSE per condition; fit each protocol's logs on their own")


def exclude(trials: pd.DataFrame, include_bad_timing: bool = False,
            include_practice: bool = False):
    """Drop practice, bad-timing and missed trials; count them per observer.

    Returns
    -------
    kept : pandas.DataFrame
    counts : pandas.DataFrame
        Per observer: ``files, trials_read, practice_excluded,
        bad_timing_excluded, missed_excluded, trials_used``.
    """
    prac = trials["practice"] & (not include_practice)
    bad_timing = ~prac & ~trials["timing_ok"] & (not include_bad_timing)
    missed = ~prac & ~bad_timing & trials["response_cw"].isna()
    keep = ~(prac | bad_timing | missed)
    flags = pd.DataFrame({"observer": trials["observer"], "source": trials["source"],
                          "practice": prac, "bad": bad_timing, "missed": missed, "keep": keep})
    g = flags.groupby("observer", sort=True)
    counts = pd.DataFrame({
        "files": g["source"].nunique(),
        "trials_read": g.size(),
        "practice_excluded": g["practice"].sum(),
        "bad_timing_excluded": g["bad"].sum(),
        "missed_excluded": g["missed"].sum(),
        "trials_used": g["keep"].sum(),
    }).reset_index()
    return trials[keep].reset_index(drop=True), counts


def read_logs(paths, include_bad_timing: bool = False, include_practice: bool = False) -> pd.DataFrame:
    """Read, check and pool trial logs.

    Parameters
    ----------
    paths : str, path or list of them
        Log files and/or folders (every ``*.trials.csv`` below a folder).
    include_bad_timing : bool
        Keep trials with ``timing_ok = false`` (dropped by default).
    include_practice : bool
        Keep practice trials (dropped by default).

    Returns
    -------
    pandas.DataFrame
        The usable trials (see :func:`validate_trials` for the columns).
        ``df.attrs["exclusions"]`` holds the per-observer counts of
        :func:`exclude`; ``df.attrs["files"]`` the files read.

    Raises
    ------
    InputError
        Bad paths, missing columns, bad values (naming file and line), or no
        usable trial at all.
    """
    files = find_logs(paths)
    trials = pd.concat([_read_file(f) for f in files], ignore_index=True)
    check_unique_trials(trials)
    check_offsets(trials)
    _check_conditions(trials)
    _check_one_protocol(trials)
    kept, counts = exclude(trials, include_bad_timing, include_practice)
    if kept.empty:
        raise InputError(str(files[0]) if len(files) == 1 else "logs", "",
                         "no usable trials once practice, bad-timing and missed trials are excluded")
    kept.attrs["exclusions"] = counts
    kept.attrs["files"] = [str(f) for f in files]
    return kept


def prepare_trials(trials: pd.DataFrame, include_bad_timing: bool = False,
                   include_practice: bool = False, source: str = "trials") -> pd.DataFrame:
    """Like :func:`read_logs` for a table already in memory (e.g. after a block)."""
    checked = validate_trials(trials, source)
    check_offsets(checked)
    _check_conditions(checked)
    kept, counts = exclude(checked, include_bad_timing, include_practice)
    if kept.empty:
        raise InputError(source, "", "no usable trials once practice, bad-timing and missed "
                         "trials are excluded")
    kept.attrs["exclusions"] = counts
    return kept


# --------------------------------------------------------------------------
# writing
# --------------------------------------------------------------------------

#: Below this magnitude a number (other than a p-value) is floating-point residue and is written as 0:
#: a PSE that is zero by the symmetry of its data came out as 2.7e-16 on one CPU and 4.0e-16 on another.
RESIDUE = 1e-12


def _is_p_value(column: str) -> bool:
    """Whether a column holds p-values, whose tiny values are results, not residue."""
    return column == "p_value" or column.endswith("_p")


def stack(frames, columns=None) -> pd.DataFrame:
    """The rows of several tables, one table after another, with their column types kept.

    Tables without rows are left out: pandas gives a column the ``object``
    type when any table has it without rows, and :func:`format_table` then
    writes its numbers in full instead of with six significant digits.

    Parameters
    ----------
    frames : iterable of pandas.DataFrame or None
    columns : list of str, optional
        Columns of the (empty) result when no table has rows.
    """
    full = [f for f in frames if f is not None and len(f)]
    if not full:
        return pd.DataFrame(columns=columns)
    return pd.concat(full, ignore_index=True)


def format_table(df: pd.DataFrame, columns: list[str] | None = None) -> str:
    """CSV text with floats in ``%.6g``, whole-number columns as integers, NaN empty.

    Numbers smaller in magnitude than :data:`RESIDUE` are written as 0,
    except in p-value columns (``p_value``, ``*_p``).
    """
    out = df[columns].copy() if columns is not None else df.copy()
    for c in out.columns:
        col = out[c]
        if pd.api.types.is_bool_dtype(col):
            out[c] = np.where(col, "true", "false")
        elif pd.api.types.is_integer_dtype(col):
            out[c] = col.astype(object).where(col.notna(), "").map(str)
        elif pd.api.types.is_float_dtype(col):
            floor = 0.0 if _is_p_value(str(c)) else RESIDUE
            out[c] = [("" if not np.isfinite(v) else "%.6g" % (0.0 if abs(v) <= floor else v))
                      for v in col.to_numpy(dtype=float)]
    return out.to_csv(index=False, lineterminator="\n")


def write_text(path: Path, text: str) -> None:
    """Write ``text`` whole (temporary file, then rename), with the umask's permissions."""
    write_atomic(path, text.encode("utf-8"))


def write_csv(df: pd.DataFrame, path, columns: list[str] | None = None) -> None:
    """Write a table with :func:`format_table` through :func:`write_text`."""
    write_text(Path(path), format_table(df, columns))
