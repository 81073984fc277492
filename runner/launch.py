"""Starting and resuming sessions: logs, sidecars, seeds, texts.

:func:`simulate` runs simulated observers headless; :func:`run_on_screen`
runs a person on the display.  Both go through :class:`runner.session.BlockRun`
and :class:`runner.trial_log.TrialLog`, so their files are the same.
"""

from __future__ import annotations

import hashlib
import json
import re
import secrets
import sys
from dataclasses import asdict
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from fitting.errors import InputError
from fitting.logfile import examine_tail, is_being_written
from fitting.outputs import check_out_dir, signals_deferred
from fitting.provenance import software_versions
from runner.console import SimulationConsole
from runner.headless import HeadlessPresenter
from runner.observers import ObserverModel, SimulatedObserver, draw_observers
from runner.protocol import Protocol
from runner.screens import screen_texts
from runner.session import BlockRun, Console, SessionResult
from runner.stream import StreamObserver, StreamRun
from runner.tracks import as_started, tracks_record
from runner.session_lock import SessionLock
from runner.trial_log import (StorageError, TrialLog, check_identifier, check_sidecar, log_paths, read_rows,
                               refuse_existing, sidecar_bytes, sidecar_lost)

PACKAGES = ("aftershift", "numpy", "scipy", "pandas", "statsmodels", "pydantic", "matplotlib", "psychopy", "pyglet")


def now_iso() -> str:
    """Current UTC time, ISO 8601, to the second."""
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat()


def package_versions() -> dict[str, str | None]:
    """Versions of Python and the packages a session depends on."""
    return software_versions(PACKAGES)


def derive_seed(seed: int, *words: int) -> int:
    """A 32-bit seed derived from ``seed`` and ``words``."""
    return int(np.random.SeedSequence([seed, *words]).generate_state(1)[0])


#: The session label of ``run`` and ``simulate`` without ``--session``.
DEFAULT_SESSION = "s1"


def session_seed(seed: int, session: str, *observer: int) -> int:
    """The seed of one session: its schedule, tracks, dots and simulated answers come from it.

    ``seed`` mixed with the simulated observer's index (``observer``, none
    for a person) and the session label: another session of the same seed
    is the same simulated person (parameters drawn from ``seed`` alone)
    giving fresh answers, where it once gave an exact copy of the first.
    The default session mixes in no label, so its seeds, and every log
    written with them, are what they were before labels were mixed in.

    Parameters
    ----------
    seed : int
        The command's seed.
    session : str
        Session label (an identifier: letters, digits, ``-`` and ``_``).
    *observer : int
        The simulated observer's index (0 for ``sim01``); none for a person.

    Returns
    -------
    int
        ``seed`` itself for a person's default session, else a derived 32-bit seed.
    """
    label = () if session == DEFAULT_SESSION else (int.from_bytes(session.encode("utf-8"), "big"),)
    words = (*observer, *label)
    return derive_seed(seed, *words) if words else seed


def _resumed_session_seed(seed: int, session: str, observer: tuple[int, ...], sidecar: dict, source: str) -> int:
    """The session seed a resume continues: the sidecar's, when it follows from ``seed``.

    A session other than the default started before its label was mixed in
    (:func:`session_seed`) keeps the seed it started with.

    Raises
    ------
    InputError
        The sidecar's ``session_seed`` follows from its seed neither way (an edited sidecar).
    """
    recorded = sidecar["session_seed"]
    if recorded in (session_seed(seed, session, *observer), session_seed(seed, DEFAULT_SESSION, *observer)):
        return recorded
    raise InputError(source, "session_seed", f"{recorded} does not follow from the sidecar's seed {seed} and session "
                     f"{session!r}; the sidecar was edited: restore it or start a new session")


def _protocol_record(path: str, text: str) -> dict:
    return {"path": str(path), "sha256": hashlib.sha256(text.encode("utf-8")).hexdigest(), "text": text}


def open_log(out_dir: Path, observer: str, session: str, resume: bool, durable: bool = True,
             lock: SessionLock | None = None) -> TrialLog:
    """A new log, or the existing one when resuming (a new one if none exists).

    Either way the session's lock (``lock`` if the caller holds it already)
    is held until the log is closed.  A log without a sidecar can only be
    resumed while it holds no trial (the session died between creating the
    two files).
    """
    path, _ = log_paths(out_dir, observer, session)
    if resume and path.exists():
        return TrialLog.reopen(out_dir, observer, session, durable, allow_missing_sidecar=True, lock=lock)
    return TrialLog.create(out_dir, observer, session, durable, lock=lock)


def _refuse_conflict(source: str, field: str, option: str, started, given) -> None:
    raise InputError(source, field, f"the session was started with {option} {started}, not {given}; "
                     f"resume without {option} (the sidecar rules a resume) or with the value it was started with")


def sidecar_settings(out_dir: Path, observers: list[str], session: str) -> list[tuple[str, dict]]:
    """The sidecars of the sessions a resume continues, checked for shape and identity."""
    found = []
    for observer in observers:
        path, side = log_paths(out_dir, observer, session)
        if not side.exists():
            continue
        try:
            content = json.loads(side.read_text(encoding="utf-8"))
        except OSError as exc:
            raise InputError(str(side), "file", f"cannot be read ({exc.strerror})") from None
        except ValueError as exc:
            raise InputError(str(side), "file", f"cannot be read as JSON ({exc})") from None
        check_sidecar(content, str(side))
        for field, value in (("observer", observer), ("session", session)):
            if content[field] != value:
                raise InputError(str(side), field, f"the sidecar belongs to {field} {content[field]!r}, "
                                 f"not {value!r}; it does not match its file name")
        found.append((str(side), content))
    return found


#: Most simulated observers one ``simulate`` runs (their IDs have two digits: sim01..sim99).
MAX_SIMULATED = 99


def simulated_names(n_observers: int) -> list[str]:
    """Observer IDs of ``n_observers`` simulated observers: ``sim01``, ``sim02``, ..."""
    return [f"sim{i + 1:02d}" for i in range(n_observers)]


def simulated_observers_in(out_dir: str | Path, session: str) -> int:
    """How many simulated observers a resume in ``out_dir`` continues: as many as the first run asked for
    (its sidecars record it), or the highest ``simNN`` with a log or a sidecar of ``session`` there (1 where
    there is none).  A run killed before its later observers began leaves no file of theirs."""
    pattern = re.compile(rf"sim(\d\d)-{re.escape(session)}\.(?:trials\.csv|session\.json)")
    try:
        found = [int(m.group(1)) for p in Path(out_dir).iterdir() if (m := pattern.fullmatch(p.name))]
    except OSError:
        return 1
    asked = []
    for source, content in sidecar_settings(Path(out_dir), simulated_names(max(found, default=1)), session):
        n = content.get("simulated_observers", 1)       # sidecars before it was recorded: their own file counts
        if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= MAX_SIMULATED:
            raise InputError(source, "simulated_observers", f"expected a whole number from 1 to {MAX_SIMULATED}, "
                             f"got {n!r}; was the sidecar edited?")
        asked.append(n)
    return max(found + asked, default=1)


def resume_seed_and_model(out_dir: Path, n_observers: int, session: str, seed: int | None,
                          model: ObserverModel | None) -> tuple[int, ObserverModel]:
    """Seed and observer model of a resumed simulation: the sidecars' values.

    Raises
    ------
    InputError
        A command-line seed or model that differs from the one the session
        started with, or sidecars that disagree with each other.
    """
    names = simulated_names(n_observers)
    found = sidecar_settings(out_dir, names, session)
    if not found and seed is None and not any(path.exists() for name in names
                                              for path in log_paths(out_dir, name, session)):
        raise InputError(str(out_dir), "--resume", f"no simulated session {session} to resume here (no log or "
                         "sidecar of it); leave out --resume to start it, with the --seed it was started with if it "
                         "had one")     # with --seed, a resume starts it
    if not found and seed is None:
        _refuse_unknown_seed(log_paths(out_dir, names[0], session)[1], "the original --seed (and --model, "
                             "if it used one)")
    for source, content in found:
        if seed is not None and content["seed"] != seed:
            _refuse_conflict(source, "seed", "--seed", content["seed"], seed)
        seed = content["seed"]
        stored = content.get("base_model")
        if isinstance(stored, dict):
            for key, value in stored.items():
                if not isinstance(value, (int, float)) or isinstance(value, bool):
                    raise InputError(source, f"base_model.{key}",
                                     f"malformed sidecar: expected a number, found {str(value)[:40]!r}")
            try:
                started = ObserverModel(**stored)
            except (TypeError, ValueError) as exc:
                raise InputError(source, "base_model", f"malformed sidecar: {exc}") from None
            if model is not None and asdict(model) != asdict(started):
                raise InputError(source, "base_model", "the session was started with another observer model; "
                                 "resume without --model (the sidecar rules a resume) or with the original file")
            model = started
    return seed, (model or ObserverModel())


def _refuse_unknown_seed(sidecar: Path, what: str) -> None:
    """A resume that would have to guess the seed: no sidecar records it and no ``--seed`` names it.

    A log that already holds trials cannot be resumed without its sidecar
    at all (:meth:`runner.trial_log.TrialLog.reopen`), so for it the advice
    is not ``--seed``.
    """
    log = sidecar.with_name(sidecar.name.replace(".session.json", ".trials.csv"))
    try:
        with open(log, "rb") as fh:
            rows = fh.read(1 << 16).count(b"\n") > 1
    except OSError:
        rows = False
    if rows:
        raise sidecar_lost(sidecar)
    raise InputError(str(sidecar), "seed", f"is missing, so the seed this session started with is unknown "
                     f"(the run stopped before writing it); resume with {what}")


def check_can_start(out_dir: str | Path, observer: str, session: str, resume: bool,
                    seed: int | None = None) -> None:
    """Refuse, before any window opens, a session that cannot start in ``out_dir``.

    A session another process is writing is refused first, naming that
    process.  Without ``resume`` an existing log or sidecar of this session
    is refused; with it, a session that does not exist is refused, and so is
    one whose sidecar (and so its seed) is missing unless ``seed`` is given;
    in every case ``--out`` must be able to become a writable folder
    (:func:`fitting.outputs.check_out_dir`).

    Raises
    ------
    InputError
    """
    check_out_dir(out_dir)
    path, sidecar = log_paths(out_dir, observer, session)
    if is_being_written(path):
        SessionLock(path).release()     # refused, naming the holder
    if not resume:
        refuse_existing(path, sidecar)
    elif not path.exists() and not sidecar.exists():
        raise InputError(str(path), "file", "no session to resume here (neither its log nor its sidecar exists); "
                         "check --out, --observer and --session, or leave out --resume to start it")
    elif seed is None and not sidecar.exists():
        _refuse_unknown_seed(sidecar, "--seed and the seed it started with (any seed if it was drawn at random)")


def check_resume(out_dir: str | Path, observer: str, session: str, text: str, light: dict | None,
                 seed: int | None) -> None:
    """Refuse, before any window opens, a resume that its sidecar rules out.

    The protocol text must be the one the session started with, the light
    profile must give the same grey levels, and a ``seed`` must be the
    session's.  A session without a sidecar passes (it has no trial yet).

    Raises
    ------
    InputError
    """
    for source, content in sidecar_settings(Path(out_dir), [observer], session):
        check_same_protocol(source, content, text)
        _note_same_levels([(source, content)], light)
        if seed is not None and seed != content["seed"]:
            _refuse_other_seed(source, content["seed"], seed)


def _refuse_other_seed(source: str, started: int, given: int) -> None:
    raise InputError(source, "seed", f"this session's seed is {started} (recorded when it started), "
                     f"not --seed {given}; resume without --seed (the sidecar rules a resume)")


def check_same_protocol(source: str, sidecar: dict, text: str) -> None:
    """Refuse to resume with a protocol that differs from the one started with."""
    digest = hashlib.sha256(text.encode("utf-8")).hexdigest()
    if sidecar.get("protocol", {}).get("sha256") != digest:
        raise InputError(
            source,
            "protocol.sha256",
            "the protocol file differs from the one this session started with; resume with the original file",
        )


#: The grey levels a light profile sets, as the sidecar's ``light`` record names them.
LIGHT_LEVELS = (("background_level", "background"), ("dots_level", "dots"))


def _note_same_levels(started: list[tuple[str, dict]], light: dict | None) -> None:
    """Refuse other grey levels (:func:`check_same_light`); say so, once, when only the profile file changed."""
    changed = [source for source, sidecar in started if check_same_light(source, sidecar, light)]
    if changed:
        which = changed[0] if len(changed) == 1 else f"{changed[0]} and {len(changed) - 1} more sessions"
        print(f"note: {which}: the light profile file differs from the one the session started with, "
              "but gives the same grey levels; continuing (the new part records its SHA-256)", file=sys.stderr)


def check_same_light(source: str, sidecar: dict, light: dict | None) -> bool:
    """Refuse to resume with a light profile that gives other grey levels than the one started with.

    A re-measured profile gives other grey levels for the same protocol, so
    the trials would not be comparable; an edit that leaves the levels as
    they were (a comment) does not matter.

    Returns
    -------
    bool
        True when the profile file differs but its grey levels do not.
    """
    old, new = sidecar.get("light") or {}, light or {}
    if old.get("profile_sha256") == new.get("profile_sha256"):
        return False
    changed = [f"{name} {old.get(key)} now {new.get(key)}" for key, name in LIGHT_LEVELS
               if not _same_level(old.get(key), new.get(key))]
    if changed:
        raise InputError(source, "light.profile_sha256",
                         f"the light profile differs from the one this session started with and gives other grey "
                         f"levels ({'; '.join(changed)}); resume with the original profile or start a new session")
    return True


def _same_level(a, b) -> bool:
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        return abs(a - b) <= 1e-9
    return a == b


#: ``ended_by`` of a part whose process ended without recording how (kill -9, power cut), set by the next resume.
VANISHED = "vanished"


def start_sidecar(log: TrialLog, base: dict, resume: bool, text: str) -> dict | None:
    """Read (resume) or write (new) the sidecar; return its content with a new part.

    Repairs made to the log's tail on opening are recorded in the new part.
    Parts left ``running`` by a process that ended without a word are closed
    first (:func:`close_vanished_parts`).  A session that is complete gets
    no new part: None is returned.
    """
    new_light = False
    if log.sidecar_path.exists():
        sidecar = log.read_sidecar()
        check_same_protocol(str(log.sidecar_path), sidecar, text)
        new_light = check_same_light(str(log.sidecar_path), sidecar, base.get("light"))
        changed = close_vanished_parts(sidecar, len(log.rows))
        if is_complete(sidecar, len(log.rows)):
            if changed:
                log.write_sidecar(sidecar)
            return None
    else:
        sidecar = dict(base)
        sidecar["parts"] = []
    part = {"started": now_iso(), "ended": None, "ended_by": "running", "rows_added": 0}
    if log.repairs:
        part["log_repairs"] = log.repairs
    if new_light:
        part["light_profile_sha256"] = base["light"]["profile_sha256"]
    sidecar["parts"].append(part)
    log.write_sidecar(sidecar)
    return sidecar


def close_vanished_parts(sidecar: dict, rows: int) -> bool:
    """Mark parts still ``running`` as :data:`VANISHED`; return True if any was.

    Their process ended without recording it (kill -9, a power cut, a full
    disk while the sidecar was written).  The last such part is credited
    with the log's rows that no other part accounts for.
    """
    parts = sidecar["parts"]
    left = [i for i, p in enumerate(parts) if p.get("ended_by") == "running"]
    for i in left:
        parts[i]["ended_by"] = VANISHED
    if left:
        others = sum(p.get("rows_added", 0) for j, p in enumerate(parts) if j != left[-1]
                     and isinstance(p.get("rows_added"), int))
        parts[left[-1]]["rows_added"] = max(rows - others, 0)
        sidecar["rows_total"] = rows
    return bool(left)


def is_complete(sidecar: dict, rows: int) -> bool:
    """True when the last part completed the session and the log still holds all its rows."""
    parts = sidecar["parts"]
    return bool(parts) and parts[-1].get("ended_by") == "completed" and sidecar.get("rows_total") == rows


def completed_rows(out_dir: str | Path, observer: str, session: str, kind: str = "screen") -> int | None:
    """The trials of a session that is complete already (:func:`is_complete`), read without opening it; else None.

    Lets ``run --resume`` say so before it opens the display, and a stopped
    command say that nothing is left to resume.  ``kind`` is the sidecar's
    (``"screen"`` or ``"simulation"``).  Anything unreadable or unusual gives
    None: the resume then reads the files itself and reports what it finds.
    """
    path, sidecar = log_paths(out_dir, observer, session)
    try:
        content = json.loads(sidecar.read_text(encoding="utf-8"))
        rows = path.read_bytes().count(b"\n") - 1
        return rows if content.get("kind") == kind and is_complete(content, rows) else None
    except (OSError, ValueError, AttributeError, TypeError, KeyError, IndexError):
        return None


def close_complete_log(protocol: Protocol, out_dir: str | Path, observer: str, session: str) -> int | None:
    """The trials of a session whose log holds every trial though its sidecar does not say so; else None.

    The last part then ended after its last trial without recording that it
    completed: killed or interrupted during the end of the session, or its
    sidecar's last write refused by a full disk.  A part left ``running`` is
    closed as :data:`VANISHED` with its rows, the log's track states are
    recorded, and no new part is added, so ``run --resume`` says the session
    is complete before it opens the display.  A log with a torn last line is
    left to the resume, which cuts and records it.

    Returns
    -------
    int or None
        The trials in the log, or None when trials remain (or the sidecar
        says it is complete: :func:`completed_rows`).
    """
    path, side = log_paths(out_dir, observer, session)
    try:
        content = json.loads(side.read_text(encoding="utf-8"))
        data = path.read_bytes()
        rows = data.count(b"\n") - 1
        if rows < 1 or is_complete(content, rows) or examine_tail(data).torn:
            return None
    except (OSError, ValueError, TypeError, KeyError, AttributeError, IndexError):
        return None
    log = TrialLog.reopen(out_dir, observer, session)
    try:
        sidecar = log.read_sidecar()
        run = (StreamRun if protocol.stream is not None else BlockRun)(
            as_started(protocol, sidecar, str(log.sidecar_path)), sidecar["session_seed"], observer, session)
        if run.replay(log.rows, str(log.path)) < run.expected_rows():
            return None
        if close_vanished_parts(sidecar, len(log.rows)):
            print(f"note: {log.sidecar_path}: its last part ended after the last trial without a record; "
                  f"marked {VANISHED}", file=sys.stderr)
        sidecar.update(rows_total=len(log.rows), track_states=run.track_states())
        if sidecar != log.read_sidecar():
            log.write_sidecar(sidecar)
        return len(log.rows)
    finally:
        log.close()


#: Bytes a sidecar may grow by per trial of its session: the track states keep every level and answer
#: (about 47 bytes per trial with the default protocol's up-down tracks, measured), with a margin.
SIDECAR_BYTES_PER_TRIAL = 96
#: Bytes a sidecar may grow by when a part ends, besides the track states (its end, the timing summary).
SIDECAR_SPARE = 16384


#: How to end the part now running, for :func:`end_running_part` (empty between parts).
_running: list = []


def end_running_part(how: str) -> bool:
    """Record the part now running as ended by ``how`` and close its log; False when none runs.

    For a handler that ends the process where it stands and never returns
    (a lost X connection, :mod:`runner.x_connection`): no ``finally`` of
    :func:`run_part` runs after it.
    """
    if not _running:
        return False
    _running.pop()(how)
    return True


def run_part(log: TrialLog, sidecar: dict, run, session) -> SessionResult:
    """Run one part of a session, end it in the sidecar however it ends, close the log.

    ``run`` is the session's :class:`~runner.session.BlockRun` or
    :class:`~runner.stream.StreamRun` and ``session`` a no-argument callable
    running its loop.  Room for the sidecar's last write is kept from the
    start (:meth:`runner.trial_log.TrialLog.keep_sidecar_room`).  An
    interrupt (Ctrl-C, SIGTERM), a full disk or any other failure marks the
    part ``interrupted``, ``disk full``, ``disk error`` or ``failed`` in the
    sidecar, with the rows and track states of the log as it is then, and is
    raised again; the log keeps every completed row.  An interrupt or a
    failure (a lost display) that comes once the log holds every trial of the
    session (during the pause after the last trial, the quick fit or the end
    screen) leaves the part ``completed`` and is raised once that is recorded.
    """
    try:
        log.keep_sidecar_room(len(sidecar_bytes(sidecar)) + SIDECAR_BYTES_PER_TRIAL * run.expected_rows()
                              + SIDECAR_SPARE)
        _running.append(lambda how: (_end_part(log, sidecar, run, how, None), log.close()))
        try:
            result = session()
            log.sync()
        except BaseException as exc:
            how = "interrupted" if isinstance(exc, KeyboardInterrupt) else (
                ("disk full" if exc.full else "disk error") if isinstance(exc, StorageError) else "failed")
            _end_part(log, sidecar, run, how, exc)
            raise
        finish_sidecar(log, sidecar, result)
        if result.stop is not None:     # it came during the summary, after the part had ended
            raise result.stop
        return result
    finally:
        _running.clear()
        log.close()


def _end_part(log: TrialLog, sidecar: dict, run, how: str, cause: BaseException | None) -> None:
    """Record a part that ended by ``cause``: best effort, the disk may be the reason it ended.

    The rows and track states are those of the log now (an interrupt can
    fall between a row's write and the tracks' update): the logged rows are
    replayed into a fresh copy of ``run``.  A part ``interrupted`` or ``failed``
    (a display lost at the end screen) after its log came to hold every trial
    of the session is recorded ``completed``; a full disk or a disk error is
    not (the last rows may not have reached the disk).
    When the sidecar cannot be written, an :class:`InputError` ``cause`` says so.
    """
    part = sidecar["parts"][-1]
    try:
        rows = read_rows(log.path)
        states, complete = track_states_after(run, rows, str(log.path))
        total = len(rows)
        if how in ("interrupted", "failed") and complete:     # a stop or a lost display at the end screen
            how = "completed"
    except (OSError, InputError):
        states, total = None, log.n_rows
    part.update(ended=now_iso(), ended_by=how, rows_added=total - len(log.rows))
    sidecar["rows_total"] = total
    if states is None:
        sidecar.pop("track_states", None)   # stale states would be worse than none
    else:
        sidecar["track_states"] = states
    try:
        log.write_sidecar(sidecar)
    except (OSError, InputError):
        if isinstance(cause, InputError):
            cause.message += (f"; the sidecar {log.sidecar_path.name} could not record how this part ended "
                              "(it still shows it running; the next --resume marks it vanished)")
            cause.args = (cause.line(),)


def track_states_after(run, rows: list[dict[str, str]], source: str) -> tuple[dict, bool]:
    """The track states of ``run``'s session after ``rows``, replayed into a fresh copy of it.

    Returns
    -------
    states : dict
    complete : bool
        True when the rows are the whole session (no trial left to run).

    Raises
    ------
    InputError
        If the rows are not those the session's protocol and seed produce.
    """
    fresh = type(run)(run.protocol, run.seed, run.observer, run.session)
    complete = fresh.replay(rows, source) >= fresh.expected_rows()
    return fresh.track_states(), complete


def finish_sidecar(log: TrialLog, sidecar: dict, result: SessionResult) -> None:
    """Record how this part ended, the track states and the timing.

    The part has ended when this runs: a Ctrl-C or SIGTERM that comes
    during the write does not stop it (the write is made again, later
    signals being ignored while the command winds down) and is raised
    afterwards.

    Raises
    ------
    InputError
        The sidecar cannot be written; the message says what it still holds.
    """
    part = sidecar["parts"][-1]
    part.update(ended=now_iso(), ended_by=result.ended_by, rows_added=result.rows_added, timing=result.timing)
    sidecar["rows_total"] = result.rows_total
    sidecar["track_states"] = result.track_states
    try:
        try:
            log.write_sidecar(sidecar)
        except KeyboardInterrupt:
            log.write_sidecar(sidecar)
            raise
    except InputError as exc:
        raise type(exc)(exc.source, exc.field,
                        f"the session {result.ended_by} with {result.rows_total} trials in the log, but the sidecar "
                        f"could not record it and still shows this part running: {exc.message}") from None


def simulate(
    protocol: Protocol,
    protocol_path: str,
    protocol_text: str,
    out_dir: str | Path,
    model: ObserverModel | None,
    n_observers: int = 1,
    seed: int | None = 0,
    resume: bool = False,
    session: str = DEFAULT_SESSION,
    screening: dict | None = None,
    progress: bool | None = None,
    light: dict | None = None,
    sync_every_row: bool = False,
) -> list[Path]:
    """Simulate ``n_observers`` observers running the protocol.

    Observers are named ``sim01``, ``sim02``, ...; each gets its own log and
    sidecar in ``out_dir`` and its own parameters drawn around ``model``
    (:func:`runner.observers.draw_observers`).  ``light``, when given, is the
    light profile's record (:meth:`runner.light.LightPlan.sidecar`) for the
    sidecars.  ``seed`` and ``model`` may be None: a resume then takes them
    from the sidecars (and is refused when no sidecar records the seed), a
    new session uses 0 and the built-in model.  Rows are
    written at once but synced to disk only at breaks and at the end (they can
    be made again from the seed), unless ``sync_every_row`` asks for a
    person's per-trial sync.

    Returns
    -------
    list of Path
        The trial logs.
    """
    out = Path(out_dir)
    check_identifier(session, "--session")
    names = simulated_names(n_observers)
    started = {}
    if not resume:
        for name in names:      # every observer before any work: none is written if one would be refused
            path, side = log_paths(out, name, session)
            if not is_being_written(path):      # a held session is refused when opened, naming its holder
                refuse_existing(path, side)
    else:
        seed, model = resume_seed_and_model(out, n_observers, session, seed, model)
        started = {content["observer"]: (content, side) for side, content in sidecar_settings(out, names, session)}
        # other grey levels: refused before any observer goes on
        _note_same_levels([(str(side), content) for content, side in started.values()], light)
    seed = 0 if seed is None else seed
    model = model or ObserverModel()
    models = draw_observers(model, n_observers, seed)
    loop, observer_kind = (StreamRun, StreamObserver) if protocol.stream is not None else (BlockRun, SimulatedObserver)
    runs = [loop(as_started(protocol, *started.get(name, (None, ""))),
                 _resumed_session_seed(seed, session, (i,), *started[name]) if name in started
                 else session_seed(seed, session, i), name, session)
            for i, name in enumerate(names)]
    console = SimulationConsole(sum(r.expected_rows() for r in runs), "simulating", show=progress)
    paths = []
    try:
        for i, (run, observer_model) in enumerate(zip(runs, models)):
            done = close_complete_log(protocol, out, run.observer, session) if resume else None
            if done is not None:     # every trial logged, the end not recorded: closed, no empty part added
                console.skip(done)
                print(f"note: {log_paths(out, run.observer, session)[0]}: the session is complete ({done} trials); "
                      "nothing to resume", file=sys.stderr)
                paths.append(log_paths(out, run.observer, session)[0])
                continue
            log = open_log(out, run.observer, session, resume, durable=sync_every_row)
            base = {
                "tool": "aftershift",
                "kind": "simulation",
                "observer": run.observer,
                "session": session,
                "protocol": _protocol_record(protocol_path, protocol_text),
                "display_profile": protocol.display.model_dump(),
                "measured_refresh_hz": None,
                "packages": package_versions(),
                "seed": seed,
                "simulated_observers": len(runs),      # a resume without --observers continues them all
                "session_seed": run.seed,
                "offset_bounds_deg": protocol.procedure.bounds_deg,
                "base_model": asdict(model),
                "observer_model": asdict(observer_model),
                **tracks_record(protocol),
                "safety": screening,
                **({"light": light} if light is not None else {}),
            }
            try:
                sidecar = start_sidecar(log, base, resume, protocol_text)
            except BaseException:
                log.close()
                raise
            console.skip(len(log.rows))
            if sidecar is None:
                log.close()
                print(f"note: {log.path}: the session is complete ({len(log.rows)} trials); nothing to resume",
                      file=sys.stderr)
                paths.append(log.path)
                continue
            console.at_break = log.sync
            answers = observer_kind(observer_model, (run.seed, 5), protocol.display.refresh_hz)
            presenter = HeadlessPresenter(protocol.display.refresh_hz)
            texts = screen_texts(protocol, "", protocol_path)
            run_part(log, sidecar, run, lambda: run.run(presenter, answers, log.append, log.rows, texts, console,
                                                        str(log.path)))
            paths.append(log.path)
    finally:
        console.close()
    return paths


def simulate_rows(protocol: Protocol, model: ObserverModel, session_seed: int, observer: str = "sim01",
                  session: str = DEFAULT_SESSION) -> list[dict]:
    """One simulated session held in memory: the rows its trial log would hold.

    The same loop, presenter and observer as :func:`simulate`, without files:
    with ``session_seed = derive_seed(seed, i)`` and an observer model that
    does not vary (``spread_between_observers = 0``) the rows are those of
    observer ``i + 1`` of ``simulate(..., seed=seed)``.
    """
    loop, observer_kind = (StreamRun, StreamObserver) if protocol.stream is not None else (BlockRun, SimulatedObserver)
    run = loop(protocol, session_seed, observer, session)
    hz = protocol.display.refresh_hz
    rows: list[dict] = []
    result = run.run(HeadlessPresenter(hz), observer_kind(model, (session_seed, 5), hz), rows.append, [],
                     screen_texts(protocol, ""), None, "simulated session")
    if result.stop is not None:     # a stop signal that came as the session ended is still a stop
        raise result.stop
    return rows


def run_on_screen(
    protocol: Protocol,
    protocol_path: str,
    protocol_text: str,
    out_dir: str | Path,
    observer: str,
    presenter,
    answers,
    caution: str,
    console: Console,
    extra: dict,
    resume: bool = False,
    session: str = DEFAULT_SESSION,
    seed: int | None = None,
    lock: SessionLock | None = None,
) -> SessionResult:
    """Run a person through the protocol on an opened screen.

    Parameters
    ----------
    presenter, answers
        The on-screen :class:`~runner.plan.Presenter` and keyboard
        :class:`~runner.plan.AnswerSource`.
    caution : str
        The caution screen's text.
    extra : dict
        Added to a new sidecar (measured refresh, acknowledgements, safety).
    seed : int, optional
        The seed (:func:`session_seed` mixes in a label other than the
        default); drawn at random (and stored) when not given.
    lock : SessionLock, optional
        The session's lock, taken before the screen opened (``run`` does, so
        that of two runs started at once only one opens a window); the log
        holds it from here and releases it when it closes.
    """
    out = Path(out_dir)
    log = open_log(out, observer, session, resume, lock=lock)
    try:    # until the part is open in the sidecar, a failure (a signal too) leaves no trace but the log's repairs
        started = log.read_sidecar() if log.sidecar_path.exists() else None
        if started is not None:
            if seed is not None and seed != started["seed"]:
                _refuse_other_seed(str(log.sidecar_path), started["seed"], seed)
            seed = int(started["seed"])
            run_seed = _resumed_session_seed(seed, session, (), started, str(log.sidecar_path))
        else:
            seed = secrets.randbelow(2**31) if seed is None else seed
            run_seed = session_seed(seed, session)
        run = (StreamRun if protocol.stream is not None else BlockRun)(
            as_started(protocol, started, str(log.sidecar_path)), run_seed, observer, session)
        texts = screen_texts(protocol, caution, protocol_path)
        base = {
            "tool": "aftershift",
            "kind": "screen",
            "observer": observer,
            "session": session,
            "protocol": _protocol_record(protocol_path, protocol_text),
            "display_profile": protocol.display.model_dump(),
            "packages": package_versions(),
            "seed": seed,
            "session_seed": run_seed,
            "offset_bounds_deg": protocol.procedure.bounds_deg,
            **tracks_record(protocol),
            **extra,
        }
        sidecar = start_sidecar(log, base, resume, protocol_text)
    except BaseException:
        if not resume and not log.sidecar_path.exists():
            log.path.unlink(missing_ok=True)    # the header alone, just written: the session never started
        log.close()
        raise
    if sidecar is None:
        log.close()
        return SessionResult("complete already", len(log.rows), 0, started.get("track_states", {}), {})
    if resume:
        sidecar["parts"][-1].update({k: v for k, v in extra.items() if k in ("measured_refresh_hz", "acknowledged")})
    shown = EndScreenGuard(presenter, console)
    return run_part(log, sidecar, run, lambda: run.run(shown, answers, log.append, log.rows, texts, console,
                                                       str(log.path)))


class EndScreenGuard:
    """The presenter as the session loop sees it, with a stop signal during the end screen absorbed.

    The end screen (the one text shown without waiting) comes after the part
    has ended: every row is logged and how it ended is known.  A Ctrl-C or
    SIGTERM there waits for the screen's moment to pass (raised inside the
    window library, it left half-made objects behind that printed
    tracebacks) and the part is recorded as it ended (``completed`` or
    ``quit``), not as ``interrupted``.

    Parameters
    ----------
    presenter : runner.plan.Presenter
    console : Console
        Told that the end screen was cut short.
    """

    def __init__(self, presenter, console: Console):
        self._presenter = presenter
        self._console = console

    def __getattr__(self, name):
        return getattr(self._presenter, name)

    def show_text(self, text: str, wait: bool = True) -> bool:
        """Show a text as the presenter does; a stop signal during the end screen ends only the screen."""
        if wait:
            return self._presenter.show_text(text)
        try:
            with signals_deferred():
                self._presenter.show_text(text, wait=False)
        except KeyboardInterrupt:
            self._console.note("a stop signal (Ctrl-C or SIGTERM) came during the end screen; the part had ended")
        return True
