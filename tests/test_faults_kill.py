"""Fault injection with real processes: SIGKILL at random instants, SIGTERM, Ctrl-C, two writers at once.

Each simulation is a separate process, killed or raced as a user's mistake
would; afterwards ``simulate --resume`` must leave logs equal, byte for byte,
to an uninterrupted run with the same seed (the resume contract in the README), and
every refused or interrupted command must say so in one line.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from fault_helpers import (LONG, LONG_ARGS, PILOT, cli, ended_by_interrupt, leftovers, logs, one_line, only_notes,
                           resume_equals)
from runner.cli import main

from conftest import ROOT

NAME = "sim01-s1.trials.csv"
SIDE = "sim01-s1.session.json"
pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def whole(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("whole")
    assert main(["simulate", str(LONG), "--out", str(out), *LONG_ARGS]) == 0
    return out


def _start(out: Path, *extra: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "runner.cli", "simulate", str(LONG), "--out", str(out),
                             *LONG_ARGS, *extra], cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            text=True)


def _kill_when(proc: subprocess.Popen, ready, sig=signal.SIGKILL, timeout: float = 60) -> bool:
    """Send ``sig`` as soon as ``ready()`` is true; False if the process ended first."""
    deadline = time.monotonic() + timeout
    while proc.poll() is None and not ready() and time.monotonic() < deadline:
        time.sleep(0.0002)
    alive = proc.poll() is None
    if alive:
        os.kill(proc.pid, sig)
    proc.wait()
    return alive


def _rows(path: Path) -> int:
    try:
        return path.read_bytes().count(b"\n") - 1
    except FileNotFoundError:
        return -1


def _resume(capsys, out: Path, whole: Path) -> None:
    resume_equals(capsys, LONG, LONG_ARGS, out, whole)


# 8 instants drawn at random (seeded, so a failure can be repeated), plus the header and the sidecar writes
_RNG = np.random.default_rng(20261202)
_AT_ROWS = sorted(int(x) for x in _RNG.integers(0, 1300, 8))


@pytest.mark.parametrize("at", ["header", "sidecar"] + _AT_ROWS)
def test_sigkill_at_an_instant_then_resume_equals_the_uninterrupted_log(capsys, tmp_path, whole, at):
    out = tmp_path / "o"
    log, side = out / NAME, out / SIDE
    if at == "header":
        ready = lambda: (out / (NAME + ".tmp")).exists() or log.exists()  # noqa: E731
    elif at == "sidecar":
        ready = lambda: (out / (SIDE + ".tmp")).exists() or side.exists()  # noqa: E731
    else:
        ready = lambda: _rows(log) >= at  # noqa: E731
    assert _kill_when(_start(out), ready), "the simulation ended before the kill"
    _resume(capsys, out, whole)


def test_sigkill_during_a_resume_then_resume_again(capsys, tmp_path, whole):
    out = tmp_path / "o"
    assert _kill_when(_start(out), lambda: _rows(out / NAME) >= 200)
    assert _kill_when(_start(out, "--resume"), lambda: _rows(out / NAME) >= 700)
    _resume(capsys, out, whole)
    parts = json.loads((out / SIDE).read_text())["parts"]      # each resume closed the part the kill left open
    assert [p["ended_by"] for p in parts] == ["vanished", "vanished", "completed"]
    assert sum(p["rows_added"] for p in parts) == _rows(out / NAME) and parts[1]["rows_added"] > 0


def test_sigterm_ends_the_part_as_interrupted_with_the_resume_hint(capsys, tmp_path, whole):
    out = tmp_path / "o"
    proc = _start(out)
    assert _kill_when(proc, lambda: _rows(out / NAME) >= 300, sig=signal.SIGTERM)
    err = proc.stderr.read()
    assert proc.returncode == 130
    line = one_line(err)
    assert "SIGTERM" in line and line.startswith("aftershift simulate")
    part = json.loads((out / SIDE).read_text())["parts"][-1]
    assert part["ended_by"] == "interrupted" and part["rows_added"] == _rows(out / NAME)
    # the line names the whole command that continues it, seed and observers included, and that command works
    import shlex

    advised = shlex.split(line.split("to continue: ", 1)[1])
    assert advised[:2] == ["aftershift", "simulate"] and advised[-1] == "--resume" and "--seed" in advised
    code, err = cli(capsys, *advised[1:])
    assert code == 0, err
    assert logs(out) == logs(whole)


def test_signals_during_the_wind_down_are_ignored(capsys, tmp_path, whole):
    # SIGTERM, then Ctrl-C and SIGTERM again and again while the part is closed: before, one of them broke
    # into the sidecar's last write (the part stayed "running") or into the exit, with a traceback, and one
    # that came during the interpreter's shutdown ended the process by SIGTERM after its line was printed
    out = tmp_path / "o"
    proc = _start(out)
    while proc.poll() is None and _rows(out / NAME) < 300:
        time.sleep(0.0002)
    proc.send_signal(signal.SIGTERM)
    for i in range(400):
        if proc.poll() is not None:
            break
        with contextlib.suppress(ProcessLookupError):
            os.kill(proc.pid, (signal.SIGINT, signal.SIGTERM)[i % 2])
        time.sleep(0.0005)
    err = proc.communicate()[1]
    assert ended_by_interrupt(proc.returncode), (proc.returncode, err)
    line = one_line(err)     # the first signal handled names itself: SIGINT may be handled before a pending SIGTERM
    assert line.startswith("aftershift simulate: ") and "--resume" in line
    part = json.loads((out / SIDE).read_text())["parts"][-1]
    assert part["ended_by"] == "interrupted" and part["rows_added"] == _rows(out / NAME)
    _resume(capsys, out, whole)


@pytest.mark.parametrize("second", [[], ["--resume"]], ids=["fresh+fresh", "fresh+resume"])
def test_two_writers_at_once_one_is_refused_and_no_trial_is_doubled(capsys, tmp_path, whole, second):
    out = tmp_path / "o"
    first = _start(out)
    while not (out / NAME).exists() and first.poll() is None:
        time.sleep(0.0005)
    other = _start(out, *second)
    other.wait()
    first.wait()
    assert first.returncode == 0, first.stderr.read()
    err = other.stderr.read()
    if second and other.returncode == 0:  # it came after the first had ended: resuming a finished session
        only_notes(err)
    else:
        assert other.returncode == 2
        line = one_line(err)
        assert "another session is writing" in line or "already holds this session" in line
    assert logs(out) == logs(whole)


@pytest.mark.parametrize("second", [[], ["--resume"]], ids=["fresh", "resume"])
def test_a_second_writer_while_the_session_is_held_names_the_holder(capsys, tmp_path, whole, second):
    from runner.session_lock import SessionLock

    out = tmp_path / "o"
    assert _kill_when(_start(out), lambda: _rows(out / NAME) >= 100)
    before = logs(out)
    with SessionLock(out / NAME):  # this test process is now the running writer
        proc = _start(out, *second)
        proc.wait()
        line = one_line(proc.stderr.read())
    assert proc.returncode == 2 and f"process {os.getpid()}" in line and "another session is writing" in line
    assert logs(out) == before
    _resume(capsys, out, whole)


def test_two_resumes_at_once_after_a_kill(capsys, tmp_path, whole):
    out = tmp_path / "o"
    assert _kill_when(_start(out), lambda: _rows(out / NAME) >= 100)
    a, b = _start(out, "--resume"), _start(out, "--resume")
    codes = sorted([a.wait(), b.wait()])
    errs = [a.stderr.read(), b.stderr.read()]
    assert codes[0] == 0 and codes[1] in (0, 2), errs
    if codes[1] == 2:
        assert "another session is writing" in one_line(next(e for e, p in zip(errs, (a, b)) if p.returncode == 2))
    assert logs(out) == logs(whole)
    trials = [line.split(b",")[2] for line in (out / NAME).read_bytes().splitlines()[1:]]
    assert len(trials) == len(set(trials))


def test_ctrl_c_during_fit_names_the_command_and_leaves_nothing_half_written(capsys, tmp_path, whole):
    out = tmp_path / "fit"
    assert cli(capsys, "fit", whole, "--out", out, "--bootstrap", "0", "--no-figures")[0] == 0
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    proc = subprocess.Popen([sys.executable, "-m", "runner.cli", "fit", str(whole), "--out", str(out),
                             "--bootstrap", "3000"], cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                            text=True)
    time.sleep(2.5)
    proc.send_signal(signal.SIGINT)
    proc.wait()
    err = proc.stderr.read()
    assert ended_by_interrupt(proc.returncode), err
    assert one_line(err).startswith("aftershift fit: interrupted")
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
    assert leftovers(out) == []


_SLOW_START = """
import sys, time
from runner.workpool import LocalPool
try:
    LocalPool(2, preload=("slow_to_import",))
    print("started", flush=True)
    time.sleep(60)
except KeyboardInterrupt:
    print("stopped", file=sys.stderr)
    sys.exit(130)
"""


def test_ctrl_c_while_the_worker_server_imports_leaves_only_the_parents_line(tmp_path):
    # The server the workers fork from imports their modules first; a Ctrl-C to the process group
    # then must not make it print a traceback of its own (a CI run saw one under `plan`).
    (tmp_path / "slow_to_import.py").write_text("import time\ntime.sleep(4)\n")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(tmp_path), str(ROOT)])}  # the server's path too
    proc = subprocess.Popen([sys.executable, "-c", _SLOW_START], cwd=ROOT, env=env, text=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, start_new_session=True)
    assert proc.stdout.readline().strip() == "started"
    time.sleep(1)               # the server is inside its 4 s import now
    os.killpg(proc.pid, signal.SIGINT)
    try:
        _, err = proc.communicate(timeout=30)  # EOF only once the server has ended too
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        pytest.fail("the pool's parent did not stop on Ctrl-C")
    assert proc.returncode == 130
    assert err.strip() == "stopped", err


_LONG_TASKS = """
from runner.workpool import LocalPool
import napping
for _ in LocalPool(2).map_unordered(napping.nap, {"a": 1, "b": 2}):
    pass
"""


def test_local_workers_end_when_their_parent_is_killed(tmp_path):
    # kill -9 cannot let the parent stop its workers; they must not wait for work forever
    (tmp_path / "napping.py").write_text(
        "import os, pathlib, time\n"
        f"def nap(i):\n    pathlib.Path({str(tmp_path)!r}, f'{{i}}.pid').write_text(str(os.getpid()))\n"
        "    time.sleep(120)\n")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(tmp_path), str(ROOT)])}
    err = (tmp_path / "stderr").open("w")       # the helpers' too: they write to the parent's stderr
    parent = subprocess.Popen([sys.executable, "-c", _LONG_TASKS], cwd=ROOT, env=env, start_new_session=True,
                              stderr=err)
    deadline = time.monotonic() + 60
    while len(list(tmp_path.glob("*.pid"))) < 2 and time.monotonic() < deadline:
        time.sleep(0.1)
    workers = [int(p.read_text()) for p in tmp_path.glob("*.pid")]
    assert len(workers) == 2, "the two workers did not start"
    parent.kill()
    parent.wait()
    deadline = time.monotonic() + 10
    while any(Path(f"/proc/{pid}").exists() for pid in workers) and time.monotonic() < deadline:
        time.sleep(0.1)
    left = [pid for pid in workers if Path(f"/proc/{pid}").exists()]
    try:
        assert not left, f"workers {left} still running 10 s after their parent was killed"
        deadline = time.monotonic() + 10    # the pool's server and semaphore tracker end after them
        while time.monotonic() < deadline and _group_alive(parent.pid):
            time.sleep(0.1)
        # before, the tracker then warned in two lines about the semaphores it removed
        assert (tmp_path / "stderr").read_text() == ""
    finally:
        err.close()
        with contextlib.suppress(ProcessLookupError):   # whatever is left of the group (the pool's server)
            os.killpg(parent.pid, signal.SIGKILL)


def _group_alive(group: int) -> bool:
    try:
        os.killpg(group, 0)
    except ProcessLookupError:
        return False
    return True


_BIG_RESULTS = """
import os, signal, sys, threading, time
from pathlib import Path
from runner.workpool import LocalPool
import bulky

def ring():             # Ctrl-C just as a worker starts sending its result
    while not Path(sys.argv[1]).exists():
        time.sleep(0.005)
    time.sleep(0.1)
    os.kill(os.getpid(), signal.SIGINT)

threading.Thread(target=ring, daemon=True).start()
try:
    for _ in LocalPool(2).map_unordered(bulky.bulk, {"a": 1, "b": 2}):
        pass
except KeyboardInterrupt:
    print("stopped", file=sys.stderr)
    sys.exit(130)
"""


def test_ctrl_c_while_a_worker_sends_a_large_result_still_lets_the_process_end(tmp_path):
    # A worker stopped half-way through sending a result (a figure is 0.2-0.4 MB, more than a pipe
    # holds) left the pool's manager thread waiting for the rest, and the interpreter's exit waited
    # for that thread for ever (seen with SIGTERM during `fit`'s figures).
    flag = tmp_path / "sending"
    (tmp_path / "bulky.py").write_text(
        "import pathlib\n"
        f"def bulk(i):\n    data = b'x' * (256 << 20)\n    pathlib.Path({str(flag)!r}).touch()\n    return data\n")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(tmp_path), str(ROOT)])}
    proc = subprocess.Popen([sys.executable, "-c", _BIG_RESULTS, str(flag)], cwd=ROOT, env=env, text=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, start_new_session=True)
    try:
        _, err = proc.communicate(timeout=30)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        pytest.fail("the process did not end after Ctrl-C while a worker was sending its result")
    assert flag.exists(), "no worker got as far as sending"
    assert proc.returncode == 130 and "stopped" in err, err


def test_ctrl_c_during_plan_stops_the_workers_and_says_so(tmp_path):
    out = tmp_path / "plan"
    proc = subprocess.Popen([sys.executable, "-m", "runner.cli", "plan", str(PILOT), "--runs", "40", "--out", str(out)],
                            cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)
    time.sleep(4)
    os.killpg(proc.pid, signal.SIGINT)  # as a terminal's Ctrl-C: the whole process group
    try:
        proc.wait(timeout=60)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        pytest.fail("plan did not stop on Ctrl-C")
    assert ended_by_interrupt(proc.returncode)
    assert one_line(proc.stderr.read()).startswith("aftershift plan: interrupted")
    assert not (out / "plan.csv").exists()  # no half-made summary; finished tasks are kept to continue
    assert not list(out.glob(".staging-*")) and not list((out / "tasks").glob(".part-*"))


_LOST_SIGNAL_DRIVER = """
import os, signal, sys, time, weakref
from runner import cli

def swallowed(args):            # the signal lands in a function whose exception Python can only print
    class Held: pass
    held = Held()
    def callback(ref):
        os.kill(os.getpid(), signal.SIGTERM)
        time.sleep(0.2)
    ref = weakref.ref(held, callback)
    del held
    time.sleep(0.2)
    print("ran on to the end")
    return 0

def converted(args):            # a compiled module turns it into an error of its own, without the signal
    try:
        os.kill(os.getpid(), signal.SIGTERM)
        time.sleep(0.2)
    except KeyboardInterrupt:
        pass
    raise ImportError("PyCapsule_Import could not import module 'datetime'")

cli.cmd_check = {"swallowed": swallowed, "converted": converted}[sys.argv[1]]
sys.argv = ["aftershift", "check", sys.argv[2]]
sys.exit(cli.console())
"""


@pytest.mark.slow    # a command in its own process
@pytest.mark.parametrize("how", ["swallowed", "converted"])
def test_a_signal_that_python_or_a_module_loses_still_ends_in_one_line(how):
    # a SIGTERM during numpy's import became "ImportError: PyCapsule_Import could not import module 'datetime'"
    # (a traceback, exit 1), and one in the import system's clean-up was printed as "Exception ignored in: ..."
    # while the command ran on to exit 0 (found by SIGTERM at 100 instants of measure-light's first 0.13 s)
    done = subprocess.run([sys.executable, "-c", _LOST_SIGNAL_DRIVER, how, str(PILOT)], cwd=ROOT,
                          capture_output=True, text=True, timeout=60)
    assert (done.returncode, done.stdout, done.stderr) == (130, "", "aftershift check: stopped by SIGTERM\n")


_WORKER_START_DRIVER = """
import multiprocessing.synchronize, sys
from runner.workpool import LocalPool

def hook_of_a_worker(_):
    return sys.excepthook.__module__

if __name__ == "__main__":
    print(sorted(set(dict(LocalPool(2).map_unordered(hook_of_a_worker, {"a": 0, "b": 1})).values())))
    import runner.worker_server      # as in the server: a semaphore its command removed, then a real error
    gone = multiprocessing.synchronize.SemLock.__new__(multiprocessing.synchronize.SemLock)
    try:
        gone.__setstate__((0, 1, 1, "/aftershift-no-such-semaphore"))
    except FileNotFoundError:
        sys.excepthook(*sys.exc_info())
    try:
        raise ValueError("a real start-up error")
    except ValueError:
        sys.excepthook(*sys.exc_info())
"""


@pytest.mark.slow    # a command-like process with a worker pool
def test_a_worker_started_while_its_command_stops_ends_without_a_traceback(tmp_path):
    # about one Ctrl-C or SIGTERM in 40 in a fit's first seconds: a worker forked as the command stopped found
    # the pool's semaphores removed and printed a FileNotFoundError traceback after the command's one line
    script = tmp_path / "driver.py"
    script.write_text(_WORKER_START_DRIVER, encoding="utf-8")
    done = subprocess.run([sys.executable, str(script)], cwd=ROOT, capture_output=True, text=True, timeout=120,
                          env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert done.stdout.strip() == "['runner.worker_server']", done.stderr      # the rule is in every worker
    assert "FileNotFoundError" not in done.stderr and "ValueError: a real start-up error" in done.stderr
