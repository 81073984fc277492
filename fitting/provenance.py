"""Where fitted data came from: sessions, protocols and software, for the report.

``fit`` reads the session sidecar beside every trial log
(``NAME.session.json`` beside ``NAME.trials.csv``) and keeps what a reader
of the results needs to judge them: which protocol (path, SHA-256, its plan
and text), which seed, when and how each session ran and ended, the display's
measured refresh rate, dropped frames, and the package versions at the
session and at the fit.  It is written to ``report_data.json`` in the fit's
output folder, so that ``compare`` can rebuild the same report later.

A log without a sidecar is reported as such; nothing is guessed.  A sidecar
that names another observer or session than its log's rows is refused.
"""

from __future__ import annotations

import csv
import importlib.metadata
import io
import json
import platform
from pathlib import Path
from typing import Callable

from .errors import InputError
from .logfile import LOG_SUFFIX, cell_count_problem, examine_tail, find_logs, is_being_written
from .outputs import write_atomic

#: Name of the file holding the report's provenance in a fit folder.
REPORT_DATA = "report_data.json"
SIDECAR_SUFFIX = ".session.json"
#: Packages whose versions the report lists for the fit itself.
FIT_PACKAGES = ("aftershift", "numpy", "scipy", "pandas", "statsmodels", "matplotlib", "tqdm")

PlanFunction = Callable[[str], "list[str]"]


def software_versions(packages) -> dict[str, str | None]:
    """Python's version and each installed package's (None where it is not installed), now."""
    out: dict[str, str | None] = {"python": platform.python_version()}
    for name in packages:
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = None
    return out


def fit_software() -> dict[str, str | None]:
    """Python's and the fitting packages' versions, now."""
    return software_versions(FIT_PACKAGES)


def sidecar_path(log: Path) -> Path:
    """The sidecar that belongs to a trial log."""
    name = log.name[: -len(LOG_SUFFIX)] if log.name.endswith(LOG_SUFFIX) else log.stem
    return log.with_name(name + SIDECAR_SUFFIX)


def log_cells(log: Path, columns=("observer", "session", "condition", "procedure")) -> dict[str, set[str]] | None:
    """The values each of ``columns`` takes in a trial log's whole rows; None when the log cannot be read so.

    A last line without its newline is left out (it may be cut inside its
    first cell); a log that is not readable CSV with these columns gives
    None: the fit itself reports what is wrong with it.
    """
    rows = log_rows(log, columns)
    if rows is None:
        return None
    cells: dict[str, set[str]] = {c: set() for c in columns}
    for row in rows:
        for c in columns:
            cells[c].add(row[c])
    return cells


def log_rows(log: Path, columns) -> list[dict[str, str]] | None:
    """``columns`` of every whole row of a trial log; None when the log cannot be read so (see :func:`log_cells`).

    Whole rows are those the tail rules keep (:func:`fitting.logfile.examine_tail`).

    Raises
    ------
    InputError
        A whole row with another number of cells than the header, named by
        its line as ``fit`` names it: its cells would be read under the
        wrong columns, and a check of the sidecar against them would blame
        a good sidecar.
    """
    try:
        data = Path(log).read_bytes()
    except OSError:
        return None
    try:
        rows = list(csv.reader(io.StringIO(data[: examine_tail(data).keep].decode("utf-8-sig"), newline="")))
    except (UnicodeDecodeError, csv.Error):
        return None
    header = [c.strip() for c in rows[0]] if rows else []
    if not set(columns) <= set(header):
        return None
    for line, cells in enumerate(rows[1:], start=2):
        problem = cell_count_problem(header, cells)
        if problem is not None:
            raise InputError(str(log), f"line {line}", problem)
    where = {c: header.index(c) for c in columns}
    return [{c: cells[i] for c, i in where.items()} for cells in rows[1:]]


def check_sidecar_owner(log: Path, side: Path, data: dict, cells: dict[str, set[str]] | None = None) -> None:
    """Refuse a sidecar that names another observer or session than the rows of the log beside it.

    A sidecar copied beside the wrong log (another observer's, another
    session's) would give the report, and the bootstrap that re-runs the
    tracks, another session's protocol, seed and times.

    Parameters
    ----------
    log, side : Path
        The trial log and the sidecar beside it.
    data : dict
        The sidecar's content.
    cells : dict, optional
        :func:`log_cells` of the log, if read already.

    Raises
    ------
    InputError
        Naming the sidecar and the field that disagrees.
    """
    cells = log_cells(log) if cells is None else cells
    for field in ("observer", "session"):
        claimed = data.get(field)
        found = sorted(cells.get(field, ())) if cells else []
        if claimed is None or len(found) != 1 or found == [str(claimed)]:
            continue    # rows that disagree among themselves are the log's damage, which reading it names
        raise InputError(str(side), field, f"names {field} {claimed!r}, but the rows of its log {Path(log).name} "
                         f"name {found[0]!r}: it is another session's sidecar; put this session's own beside the "
                         "log, or move it away")


#: Settings that change what no trial measures: names, keys, texts, breaks, practice trials (never fitted), and the
#: light profile's file name (the luminances asked of it are compared).
NOT_MEASURED = ("title", "keys", "safety", "screens", "design.break_every", "design.practice_trials",
                "design.practice_offset_deg", "design.practice_feedback", "light.profile")
#: Lists whose order changes no condition.
AS_SETS = ("design.adapter_offsets_deg", "design.lags", "design.intervening_offsets_deg")


def measured_settings(settings: dict) -> dict:
    """``settings`` (a protocol's tables) as "the same protocol" compares them (:func:`protocol_by_observer`).

    Without :data:`NOT_MEASURED`, with the lists of :data:`AS_SETS` sorted
    and every number a float (``5`` and ``5.0`` are one setting).
    """
    out = json.loads(json.dumps(settings, default=str))         # a copy, with TOML's dates as text
    for dotted in NOT_MEASURED + AS_SETS:
        *tables, key = dotted.split(".")
        where = out
        for table in tables:
            where = where.get(table) if isinstance(where, dict) else None
        if isinstance(where, dict) and key in where:
            if dotted in NOT_MEASURED:
                del where[key]
            elif isinstance(where[key], list):
                where[key] = sorted(where[key], key=lambda v: (str(type(v)), v))
    return _as_floats(out)


def protocol_settings(text: str) -> dict | None:
    """A protocol's settings read from its text as TOML (:func:`measured_settings`); None if it is not TOML.

    What "the same protocol" compares where the protocol cannot be parsed
    with its defaults (``fitting`` does not import ``runner``'s parser; the
    command line passes it, :func:`protocol_by_observer`): comments, layout,
    key order and the :data:`NOT_MEASURED` settings change no trial; a value
    written out that equals its default does count here.
    """
    try:
        import tomllib
    except ModuleNotFoundError:            # Python 3.10
        import tomli as tomllib
    try:
        settings = tomllib.loads(str(text).removeprefix("\ufeff"))
    except (tomllib.TOMLDecodeError, TypeError):
        return None
    return measured_settings(settings)


def _as_floats(value):
    """``value`` with every number a float (TOML reads ``5`` and ``5.0`` as int and float; one setting to a session)."""
    if isinstance(value, dict):
        return {key: _as_floats(v) for key, v in value.items()}
    if isinstance(value, list):
        return [_as_floats(v) for v in value]
    return float(value) if isinstance(value, int) and not isinstance(value, bool) else value


def _first_difference(a, b, where: str = "") -> str:
    """The first setting (dotted name) whose value differs between two settings tables, with both values."""
    if isinstance(a, dict) and isinstance(b, dict):
        for key in sorted(set(a) | set(b)):
            if a.get(key, _ABSENT) != b.get(key, _ABSENT):
                return _first_difference(a.get(key, _ABSENT), b.get(key, _ABSENT), f"{where}.{key}".lstrip("."))
    shown = ["(absent)" if v is _ABSENT else _cut(json.dumps(v, default=str)) for v in (a, b)]
    return f"{where}: {shown[0]} against {shown[1]}"


_ABSENT = object()


def _cut(text: str, size: int = 40) -> str:
    return text if len(text) <= size else text[: size - 1] + "…"


def protocol_by_observer(sessions, protocols: dict, settings: Callable[[str], dict | None] = protocol_settings
                         ) -> dict[str, str]:
    """Each observer's protocol; refuse an observer whose sessions ran different protocols.

    ``fit`` pools an observer's sessions into one PSE per condition: trials
    of another protocol (other periods, another refresh rate, other tracks)
    in the same condition name would be pooled as the same measurement.  A
    protocol is the same when its settings are (:func:`protocol_settings`:
    comments, layout and title aside); a protocol whose text the sidecar
    lacks, or that is not TOML, only when its SHA-256 is.

    Parameters
    ----------
    sessions : iterable of dict
        Records with ``observer, session, sidecar, protocol_sha256``, as
        :func:`collect` gives them; those without a protocol (no sidecar,
        an unreadable one) are passed over.
    protocols : dict
        SHA-256 -> a record with the protocol's ``path`` and ``text``.
    settings : callable
        Protocol text -> the settings compared (None if it cannot be read):
        :func:`protocol_settings`, or the command line's parser with the
        defaults filled in (``runner.overview.settings_from_text``).

    Returns
    -------
    dict of str -> str
        Observer -> an identity of the protocol of their sessions (equal for
        the same settings).

    Raises
    ------
    InputError
        Naming the later session's sidecar, the observer, both sessions,
        both protocol files and the first setting that differs.
    """
    identity: dict[str, str] = {}
    compared: dict[str, dict | None] = {}
    for sha, record in protocols.items():
        compared[sha] = settings((record or {}).get("text") or "") if (record or {}).get("text") else None
        identity[sha] = json.dumps(compared[sha], sort_keys=True, default=str) if compared[sha] is not None else sha
    first: dict[str, dict] = {}
    for s in sessions:
        sha = s.get("protocol_sha256")
        if not sha or s.get("observer") is None:
            continue
        observer = str(s["observer"])
        seen = first.setdefault(observer, s)
        if identity.get(seen["protocol_sha256"], seen["protocol_sha256"]) == identity.get(sha, sha):
            continue

        def ran(r):
            path = (protocols.get(r["protocol_sha256"]) or {}).get("path")
            return f"session {r.get('session')} ran {path} (SHA-256 {r['protocol_sha256'][:12]})"

        old, new = compared.get(seen["protocol_sha256"]), compared.get(sha)
        differ = (f"they differ in {_first_difference(new, old)}" if old is not None and new is not None else
                  "their files differ")
        raise InputError(str(s.get("sidecar")), "protocol", f"observer {observer}'s {ran(s)} and {ran(seen)} ({differ}): "
                         "fit would pool their trials into one PSE per condition; fit each protocol's logs on "
                         "their own (for example from folders of their own)")
    return {observer: identity.get(r["protocol_sha256"], r["protocol_sha256"]) for observer, r in first.items()}


def count_problem(log: Path, data: dict) -> str | None:
    """Words for a log that holds another number of trials than its sidecar counted when its last part ended.

    None when they agree, when either count is unknown, or while the last
    part is still running (its count is written when it ends).  A log copied
    before its last rows reached it, or cut by hand, holds fewer: a fit
    would take the session for complete.
    """
    counted = data.get("rows_total")
    parts = data.get("parts") if isinstance(data.get("parts"), list) else []
    ended_by = parts[-1].get("ended_by") if parts and isinstance(parts[-1], dict) else None
    if isinstance(counted, bool) or not isinstance(counted, int) or ended_by in (None, "running"):
        return None
    try:
        with open(log, newline="", encoding="utf-8", errors="replace") as f:
            held = max(0, sum(1 for row in csv.reader(f) if row) - 1)
    except (OSError, csv.Error):
        return None
    if held == counted:
        return None
    missing = counted - held
    what = (f"{missing} {'is' if missing == 1 else 'are'} missing from the log (copied too early, or cut?); run "
            "--resume re-runs them" if missing > 0 else "the log holds rows the sidecar does not count")
    return f"{log}: holds {held} trials, but its sidecar counted {counted} when its last part ended ({ended_by}): {what}"


def _now_utc() -> str:
    """The time now, UTC, to the minute (as ``2026-12-05 20:31 UTC``)."""
    from datetime import datetime, timezone

    return datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


def _session_record(log: Path) -> tuple[dict, dict | None]:
    """One session's facts and its protocol record (path, sha256, text) if known."""
    side = sidecar_path(log)
    record = {"log": str(log), "sidecar": None, "observer": None, "session": None, "kind": None,
              "protocol_sha256": None, "seed": None, "started": None, "ended": None, "ended_by": None,
              "trials": None, "measured_refresh_hz": None, "dropped_frames": None, "acknowledged": None,
              "packages": {}, "count_problem": None,
              "being_written": _now_utc() if is_being_written(log) else None}     # when it was seen so
    if not side.exists():
        record["problem"] = "no sidecar beside the log: protocol, seed and versions unknown"
        return record, None
    try:
        data = json.loads(side.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        record["problem"] = f"sidecar {side.name} cannot be read ({type(exc).__name__})"
        return record, None
    if not isinstance(data, dict):
        record["problem"] = f"sidecar {side.name} is not a JSON object (found a {type(data).__name__})"
        return record, None
    check_sidecar_owner(log, side, data)
    parts = [p for p in data.get("parts") or [] if isinstance(p, dict)] or [{}]
    dropped = [p.get("timing", {}).get("dropped_frames") for p in parts if isinstance(p.get("timing"), dict)]
    protocol = data.get("protocol") if isinstance(data.get("protocol"), dict) else {}
    record.update(
        sidecar=str(side), observer=data.get("observer"), session=data.get("session"), kind=data.get("kind"),
        protocol_sha256=protocol.get("sha256"), seed=data.get("session_seed", data.get("seed")),
        started=parts[0].get("started"), ended=parts[-1].get("ended"), ended_by=parts[-1].get("ended_by"),
        parts=len(parts), trials=data.get("rows_total"), measured_refresh_hz=data.get("measured_refresh_hz"),
        dropped_frames=sum(d for d in dropped if isinstance(d, (int, float))) if dropped else None,
        acknowledged=data.get("acknowledged"), packages=data.get("packages") or {},
    )
    record["count_problem"] = count_problem(log, data)
    return record, protocol if protocol.get("sha256") else None


def collect(logs, plan: PlanFunction | None = None) -> dict:
    """Sessions, protocols and software behind a fit.

    Parameters
    ----------
    logs : path or list of paths
        The trial logs (or folders) that were fitted.
    plan : callable, optional
        ``protocol text -> lines``: the plan of a protocol as ``aftershift
        check`` prints it (the command line passes the session engine's; the
        fitting side cannot read protocols itself).

    Returns
    -------
    dict
        ``sessions`` (one record per log), ``protocols`` (by SHA-256: path,
        plan lines, text) and ``software`` (the fit's package versions).
    """
    sessions, protocols = [], {}
    for log in find_logs(logs):
        record, protocol = _session_record(log)
        sessions.append(record)
        if protocol is not None and protocol["sha256"] not in protocols:
            text = protocol.get("text", "")
            protocols[protocol["sha256"]] = {"path": protocol.get("path"), "text": text,
                                              "plan": _plan_lines(plan, text)}
    return {"sessions": sessions, "protocols": protocols, "software": fit_software()}


def _plan_lines(plan: PlanFunction | None, text: str) -> list[str]:
    if plan is None or not text:
        return []
    try:
        return list(plan(text))
    except Exception as exc:  # an old protocol this version cannot read: say so in the report
        return [f"(the plan cannot be shown: {exc})"]


def write_report_data(out_dir: Path, data: dict) -> Path:
    """Write ``report_data.json`` into ``out_dir`` (atomically)."""
    path = Path(out_dir) / REPORT_DATA
    write_atomic(path, (json.dumps(data, indent=1, sort_keys=True, default=str) + "\n").encode("utf-8"))
    return path


def read_report_data(fit_dir: Path) -> dict:
    """The provenance a fit wrote; empty parts when the file is absent (an older fit).

    Raises
    ------
    InputError
        The file is not JSON, or not of the shape :func:`collect` and ``fit``
        give it (an older version's file or a hand edit), naming the field.
    """
    path = Path(fit_dir) / REPORT_DATA
    try:
        if not path.is_file():
            return {"sessions": [], "protocols": {}, "software": {}, "notes": {}, "missing": str(path)}
        data = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise InputError(str(path), "file", "is not the JSON that fit writes; run fit again") from None
    except OSError as exc:                 # e.g. a colleague's fit folder without read permission
        raise InputError(str(path), "file", f"cannot be read ({exc.strerror})") from None
    if not isinstance(data, dict):
        raise InputError(str(path), "file", "is not the JSON that fit writes; run fit again")
    _check_shape(data, path)
    return data


_OBJECT, _LIST, _TEXT = (dict, "an object"), (list, "a list"), (str, "a text")
_JSON_KINDS = {dict: "an object", list: "a list", str: "a text", int: "a number", float: "a number", bool: "true/false"}


def _check_shape(data: dict, path: Path) -> None:
    """Refuse a field of ``report_data.json`` the report cannot read, in one line naming it."""
    def expect(value, kind, field, optional=True):
        if not (isinstance(value, kind[0]) or optional and value is None):
            found = _JSON_KINDS.get(type(value), "nothing")
            raise InputError(str(path), field, f"expected {kind[1]}, found {found}: not what fit writes (an older "
                             "version or a hand edit?); run fit again")

    for key, kind in (("sessions", _LIST), ("protocols", _OBJECT), ("software", _OBJECT), ("notes", _OBJECT),
                      ("kind", _TEXT), ("options", _TEXT), ("missing", _TEXT)):
        expect(data.get(key), kind, key)
    for i, session in enumerate(data.get("sessions") or []):
        field = f"sessions[{i}]"
        expect(session, _OBJECT, field, optional=False)
        expect(session.get("log"), _TEXT, f"{field}.log", optional=False)
        for key, kind in (("observer", _TEXT), ("protocol_sha256", _TEXT), ("packages", _OBJECT)):
            expect(session.get(key), kind, f"{field}.{key}")
    for sha, protocol in (data.get("protocols") or {}).items():
        field = f"protocols.{sha}"
        expect(protocol, _OBJECT, field, optional=False)
        expect(protocol.get("text"), _TEXT, f"{field}.text")
        expect(protocol.get("plan"), _LIST, f"{field}.plan")
        for j, line in enumerate(protocol.get("plan") or []):
            expect(line, _TEXT, f"{field}.plan[{j}]", optional=False)
    for observer, notes in (data.get("notes") or {}).items():
        expect(notes, _LIST, f"notes.{observer}", optional=False)
        for j, note in enumerate(notes):
            expect(note, _TEXT, f"notes.{observer}[{j}]", optional=False)
