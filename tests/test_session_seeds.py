"""Seeds of sessions: another session of the same seed is the same person answering afresh, never a copy.

Before, ``simulate --seed 3 --session s2`` wrote exactly the rows of
``--seed 3`` (session s1): the same schedule, tracks and answers, which
``fit`` then pooled as if they were independent trials.  A person's
``run --seed S --session s2`` likewise repeated session s1's schedule,
tracks and dots.  The default session keeps the seeds it always had, so
logs already written, resumes and the demo's files stay the same bytes.
"""

from __future__ import annotations

import json
from pathlib import Path

from fault_helpers import PILOT, cli, one_line

from runner.console import SimulationConsole
from runner.headless import HeadlessPresenter
from runner.launch import derive_seed, run_on_screen, session_seed
from runner.observers import ObserverModel, SimulatedObserver
from runner.protocol import load_protocol, read_protocol_text

ARGS = ["--observers", "2", "--seed", "3"]


def _rows(log: Path) -> list[list[str]]:
    """The cells after observer and session, row by row."""
    return [line.split(",")[2:] for line in log.read_text().splitlines()[1:]]


def _sidecar(folder: Path, name: str) -> dict:
    return json.loads((folder / f"{name}.session.json").read_text())


def test_a_second_simulated_session_is_the_same_observer_answering_afresh(capsys, tmp_path):
    for session in ("s1", "s2"):
        code, err = cli(capsys, "simulate", PILOT, "--out", tmp_path, *ARGS, "--session", session)
        assert code == 0, err
    for i, name in enumerate(("sim01", "sim02")):
        first, second = _sidecar(tmp_path, f"{name}-s1"), _sidecar(tmp_path, f"{name}-s2")
        assert first["observer_model"] == second["observer_model"]          # the same simulated person
        assert first["session_seed"] == derive_seed(3, i)                  # the default session's seed as before
        assert second["session_seed"] != first["session_seed"]
        assert _rows(tmp_path / f"{name}-s1.trials.csv") != _rows(tmp_path / f"{name}-s2.trials.csv")
    # and the two observers of one session differ from each other, as they always did
    assert _sidecar(tmp_path, "sim01-s2")["session_seed"] != _sidecar(tmp_path, "sim02-s2")["session_seed"]


def _as_session(source: Path, target: Path, name: str, session: str, rows: int) -> None:
    """Copy session s1 of ``name`` as session ``session`` cut to ``rows`` trials: what a session labelled
    ``session`` and started before labels were mixed into seeds left when it was stopped."""
    lines = (source / f"{name}-s1.trials.csv").read_text().splitlines(keepends=True)
    relabel = [lines[0]] + [line.replace(f"{name},s1,", f"{name},{session},", 1) for line in lines[1:1 + rows]]
    (target / f"{name}-{session}.trials.csv").write_text("".join(relabel))
    sidecar = _sidecar(source, f"{name}-s1")
    sidecar["session"] = session
    (target / f"{name}-{session}.session.json").write_text(json.dumps(sidecar))


def test_a_session_started_before_labels_were_mixed_in_resumes_with_its_own_seed(capsys, tmp_path):
    whole, cut = tmp_path / "whole", tmp_path / "cut"
    code, err = cli(capsys, "simulate", PILOT, "--out", whole, *ARGS)
    assert code == 0, err
    cut.mkdir()
    for name in ("sim01", "sim02"):
        _as_session(whole, cut, name, "s2", rows=30)
    code, err = cli(capsys, "simulate", PILOT, "--out", cut, *ARGS, "--session", "s2", "--resume")
    assert code == 0, err
    for name in ("sim01", "sim02"):         # continued exactly as that session would have gone on
        assert _rows(cut / f"{name}-s2.trials.csv") == _rows(whole / f"{name}-s1.trials.csv")


def test_a_sidecar_whose_session_seed_follows_from_nothing_is_refused_naming_the_field(capsys, tmp_path):
    code, err = cli(capsys, "simulate", PILOT, "--out", tmp_path, *ARGS, "--session", "s2")
    assert code == 0, err
    side = tmp_path / "sim01-s2.session.json"
    sidecar = json.loads(side.read_text())
    sidecar["session_seed"] += 1
    side.write_text(json.dumps(sidecar))
    log = tmp_path / "sim01-s2.trials.csv"
    log.write_text("".join(log.read_text().splitlines(keepends=True)[:20]))
    before = log.read_bytes()
    code, err = cli(capsys, "simulate", PILOT, "--out", tmp_path, *ARGS, "--session", "s2", "--resume")
    assert code == 2 and one_line(err).startswith(f"aftershift: {side}: session_seed:")
    assert log.read_bytes() == before


def _person(out: Path, session: str, seed: int) -> dict:
    """A person's session through :func:`run_on_screen`, on the headless presenter, answered by a model."""
    protocol = load_protocol(PILOT)
    hz = protocol.display.refresh_hz
    run_on_screen(protocol, str(PILOT), read_protocol_text(PILOT), out, "P01", HeadlessPresenter(hz),
                  SimulatedObserver(ObserverModel(), (7, 5), hz), "", SimulationConsole(1, show=False), {},
                  session=session, seed=seed)
    return _sidecar(out, f"P01-{session}")


def test_a_persons_second_session_with_the_same_seed_gets_its_own_schedule(tmp_path):
    first, second = _person(tmp_path, "s1", 5), _person(tmp_path, "s2", 5)
    assert first["seed"] == second["seed"] == 5
    assert first["session_seed"] == 5 == session_seed(5, "s1")        # the default session: the seed itself
    assert second["session_seed"] == session_seed(5, "s2") != 5
    order = [[row[1] for row in _rows(tmp_path / f"P01-{s}.trials.csv")] for s in ("s1", "s2")]
    assert order[0] != order[1]                                       # conditions in another order
