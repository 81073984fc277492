"""How an on-screen session ends when something outside it stops it: a signal at its end screen, a window closed.

Each command runs as its own process on its own Xvfb, answered with
``xdotool`` keys as in tests/test_display_session.py.  What must hold is the
README's data-safety contract: one line, an exit code that says what
happened, every logged trial kept, and a sidecar that tells the truth about
how the part ended.
"""

from __future__ import annotations

import itertools
import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from conftest_display import DATA, find_window, own_x_server, require_xdotool, send_key  # noqa: F401

from runner import safety

pytestmark = [pytest.mark.display, pytest.mark.slow]

ROOT = Path(__file__).resolve().parent.parent
TINY = DATA / "display_tiny.toml"
TINY_TRIALS = 7    # the tiny protocol's trials (tests/test_display_session.py)
TWO = DATA / "display_two.toml"    # for the tests that run a session to its end
TOTAL = 2          # its trials


def _start(tmp_path: Path, env: dict, program: tuple[str, ...] = ("-m", "runner.cli"),
           protocol: Path = TWO, stdout: str = "stdout.txt") -> tuple[subprocess.Popen, Path]:
    out_file = tmp_path / stdout
    args = ["run", protocol, "--observer", "e01", "--out", tmp_path / "d", "--windowed", "--seed", "11",
            safety.REFRESH_OVERRIDE_OPTION]
    process = subprocess.Popen([sys.executable, *program, *map(str, args)], cwd=ROOT, env=env,
                               stdout=out_file.open("w"), stderr=subprocess.PIPE, text=True)
    return process, out_file


#: ``aftershift`` that sends itself SIGTERM as its quick fit of all TOTAL trials starts: the instant, exactly.
SIGTERM_IN_THE_LAST_QUICK_FIT = f"""
import os, signal, sys
from runner import cli
fit = cli._quick_fit_text
def quick_fit(rows):
    if len(rows) == {TOTAL}:
        os.kill(os.getpid(), signal.SIGTERM)
    return fit(rows)
cli._quick_fit_text = quick_fit
sys.exit(cli.console())
"""


#: ``aftershift`` whose disk is full when the first trial's row is written (os.write fails as on a full disk).
DISK_FULL_AT_THE_FIRST_ROW = """
import errno, os, sys
from runner import cli, trial_log
real = os.write
def write(fd, data):
    if data[:4] == b"e01,":
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
    return real(fd, data)
trial_log.os.write = write
sys.exit(cli.console())
"""


def _rows(tmp_path: Path) -> int:
    log = tmp_path / "d" / "e01-s1.trials.csv"
    return log.read_bytes().count(b"\n") - 1 if log.exists() else 0


def _answer_until(process, env, done, timeout_s: float = 75.0) -> str:
    """Press space and arrows every 0.25 s until ``done()``; return the window id."""
    window = find_window("aftershift", env, process=process)
    keys = itertools.cycle(["space", "right", "space", "left"])
    end = time.monotonic() + timeout_s
    while not done():
        assert process.poll() is None, process.stderr.read()
        assert time.monotonic() < end, "the session did not get there in time"
        send_key(window, next(keys), env)
        time.sleep(0.25)
    return window


def _parts(tmp_path: Path) -> list[tuple[str, int]]:
    side = json.loads((tmp_path / "d" / "e01-s1.session.json").read_text())
    return [(p["ended_by"], p["rows_added"]) for p in side["parts"]]


def test_sigterm_during_the_end_screen_leaves_the_session_completed(own_x_server, tmp_path):  # noqa: F811
    # before: exit 130 "continue with --resume", the part `interrupted`; the resume then opened the display
    # to show an end screen and added an empty `completed` part
    require_xdotool()
    env = own_x_server.env()
    process, out_file = _start(tmp_path, env)
    # the last trial logged, then the quick fit printed after its line: the end screen is up for 1.5 s
    _answer_until(process, env, lambda: _rows(tmp_path) == TOTAL)
    end = time.monotonic() + 30
    while not out_file.read_text().partition(f" {TOTAL}/{TOTAL} ")[2].partition("\n")[2].strip():
        assert time.monotonic() < end and process.poll() is None, out_file.read_text()
        time.sleep(0.02)
    process.send_signal(signal.SIGTERM)
    err = process.communicate(timeout=30)[1]
    assert process.returncode == 0, err
    assert "Traceback" not in err
    assert out_file.read_text().splitlines()[-1] == f"session completed: {TOTAL} trials this time, {TOTAL} in the log"
    assert _parts(tmp_path) == [("completed", TOTAL)]


def test_sigterm_during_the_last_quick_fit_leaves_the_session_complete(own_x_server, tmp_path):  # noqa: F811
    # before: exit 130 "every completed trial is in the log; to continue: ... --resume", the part `interrupted`
    require_xdotool()
    env = own_x_server.env()
    process, out_file = _start(tmp_path, env, ("-c", SIGTERM_IN_THE_LAST_QUICK_FIT))
    _answer_until(process, env, lambda: process.poll() is not None or _rows(tmp_path) == TOTAL)
    err = process.communicate(timeout=60)[1]
    lines = err.strip().splitlines()
    assert process.returncode == 130 and len(lines) == 1, err
    log = tmp_path / "d" / "e01-s1.trials.csv"
    assert lines[0] == (f"aftershift run: stopped by SIGTERM; the session is complete: all {TOTAL} trials are saved "
                        f"in {log} (nothing to resume); the quick fit after the last trial was skipped; "
                        f"to fit them: aftershift fit {log} --out {tmp_path / 'd' / 'fit'}")
    assert out_file.read_text().splitlines()[-1].startswith(f"trial {TOTAL:4d}/{TOTAL} ")    # no quick fit shown
    assert _parts(tmp_path) == [("completed", TOTAL)]

    resumed = subprocess.run([sys.executable, "-m", "runner.cli", "run", str(TWO), "--observer", "e01", "--out",
                              str(tmp_path / "d"), "--windowed", "--resume"], cwd=ROOT, env={**env, "DISPLAY": ""},
                             capture_output=True, text=True, timeout=60)
    assert resumed.returncode == 0 and resumed.stderr == "", resumed.stderr     # said before any window: no display
    assert resumed.stdout == f"session complete already: {TOTAL} trials in the log; nothing to resume\n"
    assert _parts(tmp_path) == [("completed", TOTAL)]


@pytest.mark.parametrize("how", ["windowclose", "windowkill"])
def test_a_window_closed_or_killed_from_outside_ends_in_one_line_with_the_resume_command(own_x_server, tmp_path,  # noqa: F811
                                                                                         how):
    # before: windowclose gave a traceback ending in pyglet's "GLException: b'out of memory'", exit 1, the part
    # `failed`; windowkill (the X connection lost) ended the process from Xlib, "XIO: fatal IO error", exit 1,
    # the part left `running`; neither said how to go on
    require_xdotool()
    env = own_x_server.env()
    process, _ = _start(tmp_path, env, protocol=TINY)
    window = _answer_until(process, env, lambda: _rows(tmp_path) >= 3)
    subprocess.run(["xdotool", how, window], env=env, capture_output=True)
    err = process.communicate(timeout=30)[1]
    lines = err.strip().splitlines()
    assert process.returncode == 4 and len(lines) == 1, err
    assert lines[0].startswith("aftershift run: the display failed during the session")
    assert lines[0].endswith("--resume") and "--seed" not in lines[0]
    rows = _rows(tmp_path)
    assert 3 <= rows < TINY_TRIALS and _parts(tmp_path) == [("failed", rows)]


#: ``aftershift`` that kills its X server (SIGKILL) at the named step of opening its window, then takes that step.
X_SERVER_KILLED_WHILE_THE_WINDOW_OPENS = """
import os, signal, sys, time
from runner import cli
from runner.display import presenter

def killed_before(step):
    def run(*args, **kwargs):
        pid = int(os.environ["TEST_XVFB_PID"])
        os.kill(pid, signal.SIGKILL)
        while open(f"/proc/{pid}/stat").read().split(") ")[1][0] != "Z":     # gone, its sockets closed
            time.sleep(0.01)
        return step(*args, **kwargs)
    return run

name = os.environ["TEST_KILL_BEFORE"]
setattr(presenter, name, killed_before(getattr(presenter, name)))
sys.exit(cli.console())
"""


def test_a_full_disk_during_a_session_names_the_whole_command_that_continues(own_x_server, tmp_path):  # noqa: F811
    # before (a hostile-user sweep): "free some space, then continue with --resume", while simulate names its
    # whole command; a person's session is resumed by typing it
    require_xdotool()
    env = own_x_server.env()
    process, _ = _start(tmp_path, env, ("-c", DISK_FULL_AT_THE_FIRST_ROW))
    window = find_window("aftershift", env, process=process)
    keys = itertools.cycle(["space", "right"])
    end = time.monotonic() + 60
    while process.poll() is None:
        assert time.monotonic() < end, "the session did not reach its first trial's row in time"
        send_key(window, next(keys), env)
        time.sleep(0.25)
    err = process.stderr.read()
    lines = err.strip().splitlines()
    assert process.returncode == 2 and len(lines) == 1, err
    assert "disk is full" in lines[0] and lines[0].endswith(
        f"continue: aftershift run {TWO} --observer e01 --out {tmp_path / 'd'} --windowed "
        f"{safety.REFRESH_OVERRIDE_OPTION} --resume"), lines[0]
    assert _parts(tmp_path) == [("disk full", 0)]


@pytest.mark.parametrize("step", ["open_window", "measure_refresh"])
def test_an_x_server_lost_while_the_window_opens_ends_in_one_line(own_x_server, tmp_path, step):  # noqa: F811
    # before: "open_window" ended in pyglet's NoSuchDisplayException traceback (exit 1), "measure_refresh" in
    # Xlib's two "XIO: fatal IO error" lines (exit 1): our handler was installed only once the window was open
    env = {**own_x_server.env(), "TEST_XVFB_PID": str(own_x_server.process.pid), "TEST_KILL_BEFORE": step}
    process, out_file = _start(tmp_path, env, ("-c", X_SERVER_KILLED_WHILE_THE_WINDOW_OPENS))
    err = process.communicate(timeout=120)[1]
    lines = err.strip().splitlines()
    assert process.returncode == 4 and len(lines) == 1, err
    assert lines[0].startswith("aftershift run: the display failed while its window opened (")
    assert lines[0].endswith("; the session had not started and nothing was recorded; to start it, "
                             "run the same command again")
    assert not (tmp_path / "d" / "e01-s1.trials.csv").exists() and not (tmp_path / "d" / "e01-s1.session.json").exists()


def test_a_window_killed_after_the_last_trial_leaves_the_session_complete(own_x_server, tmp_path):  # noqa: F811
    # before: the part `failed` although the log held every trial, and the line said to continue with --resume
    require_xdotool()
    env = own_x_server.env()
    process, out_file = _start(tmp_path, env)
    window = _answer_until(process, env, lambda: _rows(tmp_path) == TOTAL)
    end = time.monotonic() + 30     # the quick fit printed after the last trial's line: the end screen is up
    while not out_file.read_text().partition(f" {TOTAL}/{TOTAL} ")[2].partition("\n")[2].strip():
        assert time.monotonic() < end and process.poll() is None, out_file.read_text()
        time.sleep(0.02)
    subprocess.run(["xdotool", "windowkill", window], env=env, capture_output=True)
    err = process.communicate(timeout=30)[1]
    lines = err.strip().splitlines()
    assert process.returncode == 4 and len(lines) == 1, err
    log = tmp_path / "d" / "e01-s1.trials.csv"
    assert lines[0].startswith("aftershift run: the display failed during the session")
    assert lines[0].endswith(f"the session is complete: all {TOTAL} trials are saved in {log} (nothing to resume); "
                             f"to fit them: aftershift fit {log} --out {tmp_path / 'd' / 'fit'}"), lines[0]
    assert _parts(tmp_path) == [("completed", TOTAL)]


def test_two_runs_started_at_once_on_one_session_open_one_window(own_x_server, tmp_path):  # noqa: F811
    # a double-launched session: before, both runs passed the check, both opened a window and measured the
    # display, and the second met the session's lock only when it opened the log (a hostile-user sweep found
    # it); now the lock is taken before the window, so the second ends in one line without one
    require_xdotool()
    env = own_x_server.env()
    runs = [_start(tmp_path, env, stdout=f"stdout{i}.txt")[0] for i in (1, 2)]
    most = 0
    while all(p.poll() is None for p in runs):
        shown = subprocess.run(["xdotool", "search", "--name", "^aftershift$"], env=env, capture_output=True, text=True)
        most = max(most, len(shown.stdout.split()))
        time.sleep(0.02)
    loser = next(p for p in runs if p.poll() is not None)
    winner = next(p for p in runs if p is not loser)
    lines = loser.communicate(timeout=30)[1].strip().splitlines()
    assert loser.returncode == 2 and len(lines) == 1 and "another session is writing" in lines[0], lines
    assert f"process {winner.pid} " in lines[0]
    assert most <= 1
    _answer_until(winner, env, lambda: winner.poll() is not None)
    assert winner.wait(timeout=30) == 0, winner.stderr.read()
    assert _rows(tmp_path) == TOTAL and _parts(tmp_path) == [("completed", TOTAL)]
