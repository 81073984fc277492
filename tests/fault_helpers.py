"""Shared tools of the fault-injection tests (tests/test_faults*.py).

Every fault case asserts three things: the exit code, that stderr is one line
without a traceback (for failures), and that the logs end equal to an
uninterrupted run of the same seed.
"""

from __future__ import annotations

import contextlib
import os
import signal
import subprocess
import sys
import traceback
from pathlib import Path

import pytest

from runner.cli import main

from conftest import PROTOCOLS

PILOT = PROTOCOLS / "pilot_short.toml"
LONG = PROTOCOLS / "offset_by_lag.toml"
PILOT_ARGS = ["--observers", "2", "--seed", "5"]
LONG_ARGS = ["--observers", "1", "--seed", "5"]


def cli(capsys, *args) -> tuple[int, str]:
    """Run ``aftershift ARGS`` in this process; return (exit code, stderr)."""
    capsys.readouterr()
    code = main([str(a) for a in args])
    return code, capsys.readouterr().err


def one_line(stderr: str) -> str:
    """The single line of stderr; fails on more lines or a traceback."""
    lines = stderr.strip().splitlines()
    assert len(lines) == 1, f"expected one line on stderr, got:\n{stderr}"
    assert "Traceback" not in stderr
    return lines[0]


def ended_by_interrupt(code: int) -> bool:
    """Exit code of a command stopped by Ctrl-C: 130, or death by SIGINT itself.

    Python ends a process by SIGINT after a Ctrl-C landed in code it ran
    through ``eval`` (a ``namedtuple`` made while modules load), even when
    the command caught it and wrote its one line; a shell shows 130 for both.
    """
    return code in (130, -signal.SIGINT)


def only_notes(stderr: str) -> None:
    """stderr of a successful command: nothing, or note/warning lines, never a traceback."""
    assert "Traceback" not in stderr
    for line in stderr.strip().splitlines():
        assert line.startswith(("note:", "warning:")), stderr


def logs(folder: Path) -> dict[str, bytes]:
    """Name -> bytes of every trial log in ``folder``."""
    return {p.name: p.read_bytes() for p in sorted(Path(folder).glob("*.trials.csv"))}


def leftovers(folder: Path) -> list[str]:
    """Temporary or staging files left in ``folder`` (there must be none)."""
    return sorted(str(p) for p in Path(folder).rglob("*") if p.name.endswith(".tmp") or p.name.startswith("."))


def resume_equals(capsys, protocol: Path, args: list[str], out: Path, whole: Path) -> str:
    """``simulate --resume`` into ``out`` succeeds, leaves no temporary file, and the logs equal ``whole``'s."""
    code, err = cli(capsys, "simulate", protocol, "--out", out, *args, "--resume")
    assert code == 0, err
    only_notes(err)
    assert logs(out) == logs(whole)
    assert leftovers(out) == []
    return err


@contextlib.contextmanager
def tmpfs(path: Path, size: str = "64k", read_only: bool = False):
    """A small tmpfs at ``path`` (skips the test where mounting is not allowed)."""
    path.mkdir(parents=True, exist_ok=True)
    opts = f"size={size}" + (",ro" if read_only else "")
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", opts, "tmpfs", str(path)], capture_output=True, text=True)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here ({done.stderr.strip() or 'not root'}); "
                    "the ENOSPC test in test_faults.py covers a full disk without it")
    try:
        yield path
    finally:
        subprocess.run(["umount", "-l", str(path)], capture_output=True)


def as_nobody(argv: list[str]) -> tuple[int, str]:
    """Run ``main(argv)`` in a forked child that dropped root (uid 65534); return (code, stderr).

    As root, permission bits do not stop reads; an unprivileged child sees
    them as a colleague's account would.  Modules the command needs must be
    imported before the fork (the child may not read the interpreter's
    folders).
    """
    read, write = os.pipe()
    pid = os.fork()
    if pid == 0:  # pragma: no cover - child
        code = 99
        try:
            os.close(read)
            sys.stderr = os.fdopen(write, "w")  # pytest's capture object is not this pipe
            sys.stdout = open(os.devnull, "w")
            os.setgid(65534)
            os.setuid(65534)
            code = main(argv)
        except BaseException:
            traceback.print_exc()
        finally:
            sys.stderr.flush()
            os._exit(code)
    os.close(write)
    with os.fdopen(read, "r") as fh:
        err = fh.read()
    _, status = os.waitpid(pid, 0)
    return os.waitstatus_to_exitcode(status), err
