"""Starting and resuming sessions: logs, sidecars, seeds, texts.

:func:`simulate` runs simulated observers headless; :func:`run_on_screen`
runs a person on the display.  Both go through :class:`runner.session.BlockRun`
and :class:`runner.trial_log.TrialLog`, so their files are the same.
"""

from __future__ import annotations

import hashlib
import json
import secrets
import sys
from dataclasses import asdict
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from fitting.errors import InputError
from fitting.logfile import is_being_written
from fitting.outputs import check_out_dir
from fitting.provenance import software_versions
from runner.console import SimulationConsole
from runner.headless import HeadlessPresenter
from runner.observers import ObserverModel, SimulatedObserver, draw_observers
from runner.protocol import Protocol
from runner.screens import screen_texts
from runner.session import BlockRun, Console, SessionResult
from runner.stream import StreamObserver, StreamRun
from runner.tracks import as_started, tracks_record
from runner.trial_log import (StorageError, TrialLog, check_identifier, check_sidecar, log_paths, refuse_existing,
                               sidecar_lost)

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


def open_log(out_dir: Path, observer: str, session: str, resume: bool, durable: bool = True) -> TrialLog:
    """A new log, or the existing one when resuming (a new one if none exists).

    Either way the session's lock is held until the log is closed.  A log
    without a sidecar can only be resumed while it holds no trial (the
    session died between creating the two files).
    """
    path, _ = log_paths(out_dir, observer, session)
    if resume and path.exists():
        return TrialLog.reopen(out_dir, observer, session, durable, allow_missing_sidecar=True)
    return TrialLog.create(out_dir, observer, session, durable)


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


def resume_seed_and_model(out_dir: Path, n_observers: int, session: str, seed: int | None,
                          model: ObserverModel | None) -> tuple[int, ObserverModel]:
    """Seed and observer model of a resumed simulation: the sidecars' values.

    Raises
    ------
    InputError
        A command-line seed or model that differs from the one the session
        started with, or sidecars that disagree with each other.
    """
    names = [f"sim{i + 1:02d}" for i in range(n_observers)]
    found = sidecar_settings(out_dir, names, session)
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

    Without ``resume`` an existing log or sidecar of this session is refused;
    with it, a session whose sidecar (and so its seed) is missing is refused
    unless ``seed`` is given; in every case ``--out`` must be able to become
    a writable folder (:func:`fitting.outputs.check_out_dir`).

    Raises
    ------
    InputError
    """
    check_out_dir(out_dir)
    path, sidecar = log_paths(out_dir, observer, session)
    if not resume:
        refuse_existing(path, sidecar)
    elif seed is None and not sidecar.exists():
        _refuse_unknown_seed(sidecar, "--seed and the seed it started with (any seed if it was drawn at random)")


def check_same_protocol(log: TrialLog, sidecar: dict, text: str) -> None:
    """Refuse to resume with a protocol that differs from the one started with."""
    digest = hashlib.sha256(text.encode("utf-8")).hexdigest()
    if sidecar.get("protocol", {}).get("sha256") != digest:
        raise InputError(
            str(log.sidecar_path),
            "protocol.sha256",
            "the protocol file differs from the one this session started with; resume with the original file",
        )


def check_same_light(log: TrialLog, sidecar: dict, base: dict) -> None:
    """Refuse to resume with a light profile that differs from the one started with.

    The same protocol text with a re-measured profile gives other grey levels,
    so the trials would not be comparable.
    """
    old = (sidecar.get("light") or {}).get("profile_sha256")
    new = (base.get("light") or {}).get("profile_sha256")
    if old != new:
        raise InputError(
            str(log.sidecar_path),
            "light.profile_sha256",
            "the light profile differs from the one this session started with (its grey levels would change); "
            "resume with the original profile or start a new session",
        )


#: ``ended_by`` of a part whose process ended without recording how (kill -9, power cut), set by the next resume.
VANISHED = "vanished"


def start_sidecar(log: TrialLog, base: dict, resume: bool, text: str) -> dict | None:
    """Read (resume) or write (new) the sidecar; return its content with a new part.

    Repairs made to the log's tail on opening are recorded in the new part.
    Parts left ``running`` by a process that ended without a word are closed
    first (:func:`close_vanished_parts`).  A session that is complete gets
    no new part: None is returned.
    """
    if log.sidecar_path.exists():
        sidecar = log.read_sidecar()
        check_same_protocol(log, sidecar, text)
        check_same_light(log, sidecar, base)
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


def completed_rows(out_dir: str | Path, observer: str, session: str) -> int | None:
    """The trials of a session that is complete already (:func:`is_complete`), read without opening it; else None.

    Lets ``run --resume`` say so before it opens the display.  Anything
    unreadable or unusual gives None: the resume then reads the files itself
    and reports what it finds.
    """
    path, sidecar = log_paths(out_dir, observer, session)
    try:
        content = json.loads(sidecar.read_text(encoding="utf-8"))
        rows = path.read_bytes().count(b"\n") - 1
        return rows if content.get("kind") == "screen" and is_complete(content, rows) else None
    except (OSError, ValueError, AttributeError, TypeError, KeyError, IndexError):
        return None


def run_part(log: TrialLog, sidecar: dict, session) -> SessionResult:
    """Run one part of a session, end it in the sidecar however it ends, close the log.

    ``session`` is a no-argument callable running the loop.  An interrupt
    (Ctrl-C, SIGTERM), a full disk or any other failure marks the part
    ``interrupted``, ``disk full``, ``disk error`` or ``failed`` in the sidecar and is
    raised again; the log keeps every completed row.
    """
    try:
        try:
            result = session()
        except BaseException as exc:
            how = "interrupted" if isinstance(exc, KeyboardInterrupt) else (
                ("disk full" if exc.full else "disk error") if isinstance(exc, StorageError) else "failed")
            _end_part(log, sidecar, how)
            raise
        log.sync()
        finish_sidecar(log, sidecar, result)
        return result
    finally:
        log.close()


def _end_part(log: TrialLog, sidecar: dict, how: str) -> None:
    """Best effort: the disk may be the reason the part ended."""
    part = sidecar["parts"][-1]
    try:
        total = log.rows_on_disk()  # an interrupt can fall between a row's write and its count
    except OSError:
        total = log.n_rows
    part.update(ended=now_iso(), ended_by=how, rows_added=total - len(log.rows))
    sidecar["rows_total"] = total
    try:
        log.write_sidecar(sidecar)
    except (OSError, InputError):
        pass


def finish_sidecar(log: TrialLog, sidecar: dict, result: SessionResult) -> None:
    """Record how this part ended, the track states and the timing."""
    part = sidecar["parts"][-1]
    part.update(ended=now_iso(), ended_by=result.ended_by, rows_added=result.rows_added, timing=result.timing)
    sidecar["rows_total"] = result.rows_total
    sidecar["track_states"] = result.track_states
    log.write_sidecar(sidecar)


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
    names = [f"sim{i + 1:02d}" for i in range(n_observers)]
    started = {}
    if not resume:
        for name in names:      # every observer before any work: none is written if one would be refused
            path, side = log_paths(out, name, session)
            if not is_being_written(path):      # a held session is refused when opened, naming its holder
                refuse_existing(path, side)
    else:
        seed, model = resume_seed_and_model(out, n_observers, session, seed, model)
        started = {content["observer"]: (content, side) for side, content in sidecar_settings(out, names, session)}
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
            run_part(log, sidecar, lambda: run.run(presenter, answers, log.append, log.rows, texts, console,
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
    run.run(HeadlessPresenter(hz), observer_kind(model, (session_seed, 5), hz), rows.append, [],
            screen_texts(protocol, ""), None, "simulated session")
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
    """
    out = Path(out_dir)
    log = open_log(out, observer, session, resume)
    started = None
    try:
        if log.sidecar_path.exists():
            started = log.read_sidecar()
            if seed is not None and seed != started["seed"]:
                _refuse_conflict(str(log.sidecar_path), "seed", "--seed", started["seed"], seed)
            seed = int(started["seed"])
            run_seed = _resumed_session_seed(seed, session, (), started, str(log.sidecar_path))
        else:
            seed = secrets.randbelow(2**31) if seed is None else seed
            run_seed = session_seed(seed, session)
        as_run = as_started(protocol, started, str(log.sidecar_path))
    except BaseException:
        log.close()
        raise
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
    try:
        sidecar = start_sidecar(log, base, resume, protocol_text)
    except BaseException:
        log.close()
        raise
    if sidecar is None:
        log.close()
        return SessionResult("complete already", len(log.rows), 0, started.get("track_states", {}), {})
    if resume:
        sidecar["parts"][-1].update({k: v for k, v in extra.items() if k in ("measured_refresh_hz", "acknowledged")})
    run = (StreamRun if protocol.stream is not None else BlockRun)(as_run, run_seed, observer, session)
    texts = screen_texts(protocol, caution, protocol_path)
    return run_part(log, sidecar, lambda: run.run(presenter, answers, log.append, log.rows, texts, console,
                                                  str(log.path)))
