"""Starting and resuming sessions: logs, sidecars, seeds, texts.

:func:`simulate` runs simulated observers headless; :func:`run_on_screen`
runs a person on the display.  Both go through :class:`runner.session.BlockRun`
and :class:`runner.trial_log.TrialLog`, so their files are the same.
"""

from __future__ import annotations

import hashlib
import importlib.metadata
import platform
import secrets
import sys
from dataclasses import asdict
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from fitting.errors import InputError
from runner.console import SimulationConsole
from runner.headless import HeadlessPresenter
from runner.observers import ObserverModel, SimulatedObserver, draw_observers
from runner.protocol import Protocol
from runner.session import BlockRun, Console, SessionResult
from runner.stream import StreamObserver, StreamRun
from runner.trial_log import TrialLog, log_paths, read_rows

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

TEXTS_DIR = Path(__file__).parent / "texts"
PACKAGES = ("aftershift", "numpy", "scipy", "pandas", "statsmodels", "pydantic", "matplotlib", "psychopy", "pyglet")


def now_iso() -> str:
    """Current UTC time, ISO 8601, to the second."""
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat()


def package_versions() -> dict[str, str | None]:
    """Versions of Python and the packages a session depends on."""
    out: dict[str, str | None] = {"python": platform.python_version()}
    for name in PACKAGES:
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = None
    return out


def screen_texts(protocol: Protocol, caution: str) -> dict[str, str]:
    """The observer's screen texts with the protocol's keys filled in."""
    raw = tomllib.loads((TEXTS_DIR / "screens.toml").read_text(encoding="utf-8"))
    keys = protocol.keys
    fill = {
        "cw_key": keys.cw.upper() if len(keys.cw) == 1 else keys.cw,
        "ccw_key": keys.ccw.upper() if len(keys.ccw) == 1 else keys.ccw,
        "proceed_key": keys.proceed,
        "quit_key": keys.quit,
        "pause_key": keys.pause,
    }
    texts = {}
    for name, text in raw.items():
        text = text.strip()
        if name == "break":
            texts[name] = text.replace("{proceed_key}", fill["proceed_key"])
        else:
            texts[name] = text.format(**fill)
    texts["caution"] = caution
    return texts


def derive_seed(seed: int, *words: int) -> int:
    """A 32-bit seed derived from ``seed`` and ``words``."""
    return int(np.random.SeedSequence([seed, *words]).generate_state(1)[0])


def _protocol_record(path: str, text: str) -> dict:
    return {"path": str(path), "sha256": hashlib.sha256(text.encode("utf-8")).hexdigest(), "text": text}


def open_log(out_dir: Path, observer: str, session: str, resume: bool) -> TrialLog:
    """A new log, or the existing one when resuming (a new one if none exists).

    A log without a sidecar can only be resumed while it holds no trial (the
    session died between creating the two files); with trials, the sidecar's
    seed is needed and its absence is an error.
    """
    path, sidecar = log_paths(out_dir, observer, session)
    if resume and path.exists():
        if sidecar.exists():
            return TrialLog.reopen(out_dir, observer, session)
        if not read_rows(path, repair=True):
            return TrialLog(path, sidecar, [])
        raise InputError(str(sidecar), "file", "is missing; a session with trials cannot be resumed without its seed")
    return TrialLog.create(out_dir, observer, session)


def check_same_protocol(log: TrialLog, sidecar: dict, text: str) -> None:
    """Refuse to resume with a protocol that differs from the one started with."""
    digest = hashlib.sha256(text.encode("utf-8")).hexdigest()
    if sidecar.get("protocol", {}).get("sha256") != digest:
        raise InputError(
            str(log.sidecar_path),
            "protocol.sha256",
            "the protocol file differs from the one this session started with; resume with the original file",
        )


def start_sidecar(log: TrialLog, base: dict, resume: bool, text: str) -> dict:
    """Read (resume) or write (new) the sidecar; return its content with a new part."""
    if log.sidecar_path.exists():
        sidecar = log.read_sidecar()
        check_same_protocol(log, sidecar, text)
    else:
        sidecar = dict(base)
        sidecar["parts"] = []
    sidecar["parts"].append({"started": now_iso(), "ended": None, "ended_by": "running", "rows_added": 0})
    log.write_sidecar(sidecar)
    return sidecar


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
    model: ObserverModel,
    n_observers: int = 1,
    seed: int = 0,
    resume: bool = False,
    session: str = "s1",
    screening: dict | None = None,
    progress: bool | None = None,
) -> list[Path]:
    """Simulate ``n_observers`` observers running the protocol.

    Observers are named ``sim01``, ``sim02``, ...; each gets its own log and
    sidecar in ``out_dir`` and its own parameters drawn around ``model``
    (:func:`runner.observers.draw_observers`).

    Returns
    -------
    list of Path
        The trial logs.
    """
    out = Path(out_dir)
    models = draw_observers(model, n_observers, seed)
    loop, observer_kind = (StreamRun, StreamObserver) if protocol.stream is not None else (BlockRun, SimulatedObserver)
    runs = [loop(protocol, derive_seed(seed, i), f"sim{i + 1:02d}", session) for i in range(n_observers)]
    console = SimulationConsole(sum(r.expected_rows() for r in runs), "simulating", show=progress)
    paths = []
    try:
        for i, (run, observer_model) in enumerate(zip(runs, models)):
            log = open_log(out, run.observer, session, resume)
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
                "observer_model": asdict(observer_model),
                "safety": screening,
            }
            sidecar = start_sidecar(log, base, resume, protocol_text)
            console.skip(len(log.rows))
            answers = observer_kind(observer_model, (run.seed, 5), protocol.display.refresh_hz)
            presenter = HeadlessPresenter(protocol.display.refresh_hz)
            try:
                result = run.run(presenter, answers, log.append, log.rows, screen_texts(protocol, ""), console, str(log.path))
            finally:
                log.close()
            finish_sidecar(log, sidecar, result)
            paths.append(log.path)
    finally:
        console.close()
    return paths


def simulate_rows(protocol: Protocol, model: ObserverModel, session_seed: int, observer: str = "sim01",
                  session: str = "s1") -> list[dict]:
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
    session: str = "s1",
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
        Session seed; drawn at random (and stored) when not given.
    """
    out = Path(out_dir)
    log = open_log(out, observer, session, resume)
    if log.sidecar_path.exists():
        seed = int(log.read_sidecar()["session_seed"])
    elif seed is None:
        seed = secrets.randbelow(2**31)
    base = {
        "tool": "aftershift",
        "kind": "screen",
        "observer": observer,
        "session": session,
        "protocol": _protocol_record(protocol_path, protocol_text),
        "display_profile": protocol.display.model_dump(),
        "packages": package_versions(),
        "seed": seed,
        "session_seed": seed,
        **extra,
    }
    sidecar = start_sidecar(log, base, resume, protocol_text)
    if resume:
        sidecar["parts"][-1].update({k: v for k, v in extra.items() if k in ("measured_refresh_hz", "acknowledged")})
    run = (StreamRun if protocol.stream is not None else BlockRun)(protocol, seed, observer, session)
    try:
        result = run.run(presenter, answers, log.append, log.rows, screen_texts(protocol, caution), console, str(log.path))
    finally:
        log.close()
    finish_sidecar(log, sidecar, result)
    return result
