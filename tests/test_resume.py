"""Crash safety: a session killed at any instant and resumed writes the same rows.

The simulated session is run as a separate process and killed with SIGKILL
(no chance to clean up) at several points; `--resume` then continues it.
The trial logs must equal, byte for byte, those of an uninterrupted run with
the same seed.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from runner.trial_log import read_rows

from conftest import PROTOCOLS, ROOT, run_cli

PROTOCOL = PROTOCOLS / "offset_by_lag.toml"
ARGS = ["--observers", "3", "--seed", "11"]


@pytest.fixture(scope="module")
def uninterrupted(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("whole")
    done = run_cli("simulate", PROTOCOL, "--out", out, *ARGS)
    assert done.returncode == 0, done.stderr
    return out


def _logs(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.glob("*.trials.csv"))}


def _rows_in(folder: Path) -> int:
    total = 0
    for p in folder.glob("*.trials.csv"):
        try:
            total += p.read_bytes().count(b"\n")
        except FileNotFoundError:
            pass
    return total


def _kill_after(out: Path, rows: int) -> int:
    """Start a simulation and SIGKILL it once ``rows`` lines are on disk."""
    proc = subprocess.Popen(
        [sys.executable, "-m", "runner.cli", "simulate", str(PROTOCOL), "--out", str(out), *ARGS],
        cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )
    deadline = time.monotonic() + 120
    while proc.poll() is None and _rows_in(out) < rows and time.monotonic() < deadline:
        time.sleep(0.001)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    return _rows_in(out)


@pytest.mark.slow  # left out of the quick subset
@pytest.mark.parametrize("kill_at", [0, 40, 1500, 2900])
def test_killed_and_resumed_session_writes_identical_rows(kill_at, tmp_path, uninterrupted):
    out = tmp_path / "killed"
    on_disk = _kill_after(out, kill_at)
    total = sum(v.count(b"\n") for v in _logs(uninterrupted).values())
    assert on_disk < total, "the simulation finished before it could be killed; kill earlier"
    done = run_cli("simulate", PROTOCOL, "--out", out, *ARGS, "--resume")
    assert done.returncode == 0, done.stderr
    assert _logs(out) == _logs(uninterrupted)


@pytest.mark.slow  # left out of the quick subset
def test_torn_last_line_is_dropped_with_a_warning_and_the_rest_kept(tmp_path, uninterrupted):
    out = tmp_path / "torn"
    out.mkdir()
    whole = _logs(uninterrupted)
    name = sorted(whole)[0]
    lines = whole[name].splitlines(keepends=True)
    keep = b"".join(lines[:101])  # header + 100 rows
    (out / name).write_bytes(keep + lines[101][:17])  # a row cut off mid-write
    sidecar = name.replace(".trials.csv", ".session.json")
    (out / sidecar).write_bytes((uninterrupted / sidecar).read_bytes())
    rows = read_rows(out / name)
    assert len(rows) == 100
    done = run_cli("simulate", PROTOCOL, "--out", out, *ARGS, "--resume")
    assert done.returncode == 0, done.stderr
    assert "torn" in done.stderr
    assert _logs(out) == whole


def test_existing_data_is_never_overwritten(tmp_path, uninterrupted):
    out = tmp_path / "again"
    first = run_cli("simulate", PROTOCOLS / "pilot_short.toml", "--out", out)
    assert first.returncode == 0
    before = _logs(out)
    second = run_cli("simulate", PROTOCOLS / "pilot_short.toml", "--out", out)
    assert second.returncode == 2
    assert len(second.stderr.strip().splitlines()) == 1 and "--resume" in second.stderr
    assert _logs(out) == before


def test_resume_with_a_changed_protocol_is_refused(tmp_path):
    out = tmp_path / "changed"
    assert run_cli("simulate", PROTOCOLS / "pilot_short.toml", "--out", out).returncode == 0
    before = _logs(out)
    changed = tmp_path / "changed.toml"
    changed.write_text((PROTOCOLS / "pilot_short.toml").read_text().replace("trials_per_track = 12", "trials_per_track = 14"))
    done = run_cli("simulate", changed, "--out", out, "--resume")
    assert done.returncode == 2 and "protocol" in done.stderr
    assert _logs(out) == before


@pytest.mark.slow  # left out of the quick subset
@pytest.mark.parametrize("rows_kept", [1, 37])
def test_bayesian_session_cut_short_and_resumed_writes_identical_rows(rows_kept, tmp_path):
    # pilot_short.toml runs Bayesian tracks: a resume replays the log
    # through fresh posteriors and must propose exactly the levels the uninterrupted session did.
    whole_out, cut_out = tmp_path / "whole", tmp_path / "cut"
    protocol = PROTOCOLS / "pilot_short.toml"
    assert run_cli("simulate", protocol, "--out", whole_out, "--seed", "5").returncode == 0
    whole = _logs(whole_out)
    name = sorted(whole)[0]
    cut_out.mkdir()
    lines = whole[name].splitlines(keepends=True)
    (cut_out / name).write_bytes(b"".join(lines[: 1 + rows_kept]))
    sidecar = name.replace(".trials.csv", ".session.json")
    (cut_out / sidecar).write_bytes((whole_out / sidecar).read_bytes())
    done = run_cli("simulate", protocol, "--out", cut_out, "--seed", "5", "--resume")
    assert done.returncode == 0, done.stderr
    assert _logs(cut_out) == whole
    levels = {float(row["test_offset_deg"]) for row in read_rows(cut_out / name)}
    assert len(levels) > 5  # the tracks moved: not one level replayed over and over


@pytest.mark.slow  # left out of the quick subset
def test_a_session_started_under_old_defaults_resumes_with_them(tmp_path):
    # Sessions started before bayes_share_spread existed ran their Bayesian tracks alone, with a uniform PSE
    # prior (the default until bayes_pse_prior_sd_deg = 6); their sidecars lack SHARING_KEY and PRIOR_KEY
    # (each key alone: tests/test_protocol.py). Resumed with the same protocol file, they must go on as they
    # started (the rows an uninterrupted session under the old defaults writes); under the new ones the
    # resume would refuse its own log.
    import json
    from runner.tracks import PRIOR_KEY, SHARING_KEY

    protocol = PROTOCOLS / "pilot_short.toml"
    alone = tmp_path / "alone.toml"
    alone.write_text(protocol.read_text().replace(
        'method = "bayesian"', 'method = "bayesian"\nbayes_share_spread = false\nbayes_pse_prior_sd_deg = 0.0'))
    assert alone.read_text() != protocol.read_text()
    whole_out, cut_out, shared_out = tmp_path / "whole", tmp_path / "cut", tmp_path / "shared"
    assert run_cli("simulate", alone, "--out", whole_out, "--seed", "5").returncode == 0
    assert run_cli("simulate", protocol, "--out", shared_out, "--seed", "5").returncode == 0
    whole = _logs(whole_out)
    assert whole != _logs(shared_out)          # the new defaults change the levels
    name = sorted(whole)[0]
    cut_out.mkdir()
    lines = whole[name].splitlines(keepends=True)
    (cut_out / name).write_bytes(b"".join(lines[:30]))
    sidecar_name = name.replace(".trials.csv", ".session.json")
    sidecar = json.loads((shared_out / sidecar_name).read_text())   # the protocol record of the file resumed with
    old = json.loads((whole_out / sidecar_name).read_text())
    old["protocol"] = sidecar["protocol"]
    del old[SHARING_KEY], old[PRIOR_KEY]                            # as written before the defaults changed
    (cut_out / sidecar_name).write_text(json.dumps(old))
    done = run_cli("simulate", protocol, "--out", cut_out, "--seed", "5", "--resume")
    assert done.returncode == 0, done.stderr
    assert _logs(cut_out)[name] == whole[name]



def test_a_simulated_resume_with_nothing_to_resume_says_to_start_without_it(tmp_path, capsys):
    # before: "sim01-s1.session.json: seed: is missing ... (the run stopped before writing it)", of a file and
    # a folder that never existed
    from runner.cli import main

    for out in (tmp_path / "never", tmp_path / "empty"):
        if out.name == "empty":
            out.mkdir()
        capsys.readouterr()
        assert main(["simulate", str(PROTOCOLS / "pilot_short.toml"), "--out", str(out), "--resume"]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "no simulated session s1 to resume here" in err[0], err
        assert "leave out --resume to start it" in err[0] and "is missing" not in err[0], err


def test_a_simulated_resume_continues_every_observer_the_first_run_asked_for(tmp_path):
    # a run of 3 observers killed while sim01 ran left no file of sim02 and sim03; a bare --resume finished
    # sim01 alone and said nothing. The sidecars record how many were asked for.
    from runner.cli import main

    protocol = str(PROTOCOLS / "pilot_short.toml")
    assert main(["simulate", protocol, "--out", str(tmp_path / "whole"), "--observers", "3"]) == 0
    cut = tmp_path / "cut"
    assert main(["simulate", protocol, "--out", str(cut), "--observers", "3"]) == 0
    for later in [*cut.glob("sim02-*"), *cut.glob("sim03-*")]:
        later.unlink()                                  # the state a kill -9 during sim01 leaves for them
    assert main(["simulate", protocol, "--out", str(cut), "--resume"]) == 0
    for name in ("sim01", "sim02", "sim03"):
        log = f"{name}-s1.trials.csv"
        assert (cut / log).read_bytes() == (tmp_path / "whole" / log).read_bytes(), name


def test_an_edited_count_of_simulated_observers_is_one_line_naming_the_sidecar(tmp_path, capsys):
    # the count a bare --resume continues comes from the sidecars: an absurd one must not start 1000 sessions
    import json

    from runner.cli import main

    out = tmp_path / "o"
    assert main(["simulate", str(PROTOCOLS / "pilot_short.toml"), "--out", str(out)]) == 0
    sidecar = out / "sim01-s1.session.json"
    content = json.loads(sidecar.read_text())
    assert content["simulated_observers"] == 1
    for absurd in (1000, 0, "3", True):
        content["simulated_observers"] = absurd
        sidecar.write_text(json.dumps(content))
        before = sorted(p.name for p in out.iterdir())
        capsys.readouterr()
        assert main(["simulate", str(PROTOCOLS / "pilot_short.toml"), "--out", str(out), "--resume"]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "sim01-s1.session.json: simulated_observers" in err[0], err
        assert sorted(p.name for p in out.iterdir()) == before
