"""Helpers for the display tests: an X server, the window, synthetic keys.

Imported by the ``tests/test_display_*.py`` files (pytest does not load this
module by itself).  Display tests open real psychopy windows on an X server:
the one in ``DISPLAY`` if set, otherwise a private Xvfb started here (Mesa
draws in software).  Keys are sent with ``xdotool key --window``, which
delivers synthetic key events that psychopy's window events see.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import time
from pathlib import Path

import pytest

DATA = Path(__file__).resolve().parent / "data"

#: psychopy key names and the X key symbols that xdotool sends for them.
X_KEYSYMS = {"left": "Left", "right": "Right", "space": "space", "escape": "Escape", "p": "p"}

SCREEN = "1024x768x24"


class XServer:
    """A private Xvfb on a free display number (``-displayfd`` picks it)."""

    def __init__(self):
        read_end, write_end = os.pipe()
        # -noreset: Xvfb otherwise resets when its last client leaves, and a program that connects during
        # that reset (the resume right after a session ended) is refused the display.
        # -r: no key autorepeat.  xdotool presses a key with XTEST when the window has the focus and may
        # release it with XSendEvent when the window has gone meanwhile (the Escape that ends a program),
        # so the server can keep that key down and repeat it into the next program's window, which then
        # sees an Escape nobody typed (seen: the resumed measurement screen stopped at once in 3 runs of 42
        # under load, its window having the first one's id; none in 60 with -r).
        self.process = subprocess.Popen(
            ["Xvfb", "-displayfd", str(write_end), "-screen", "0", SCREEN, "-nolisten", "tcp", "-noreset", "-r"],
            pass_fds=(write_end,), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        )
        os.close(write_end)
        with os.fdopen(read_end) as pipe:
            number = pipe.readline().strip()
        if not number:
            self.process.kill()
            raise RuntimeError("Xvfb did not report a display number")
        self.display = f":{number}"

    def env(self) -> dict:
        """The environment of a child process drawing on this server."""
        return {**os.environ, "DISPLAY": self.display}

    def stop(self) -> None:
        """Stop this server (only the process started here)."""
        self.process.terminate()
        try:
            self.process.wait(timeout=5)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait()


def require_xvfb() -> None:
    """Skip, with the reason, when no X server can be had."""
    if shutil.which("Xvfb") is None:
        pytest.skip("Xvfb is not installed (apt-get install xvfb); display tests need an X server")


def require_xdotool() -> None:
    """Skip, with the reason, when synthetic keys cannot be sent."""
    if shutil.which("xdotool") is None:
        pytest.skip("xdotool is not installed (apt-get install xdotool); key-event tests need it")


@pytest.fixture(scope="session")
def x_display():
    """An X display for in-process windows: ``DISPLAY`` if set, else a private Xvfb."""
    if os.environ.get("DISPLAY"):
        yield os.environ["DISPLAY"]
        return
    require_xvfb()
    server = XServer()
    os.environ["DISPLAY"] = server.display
    try:
        yield server.display
    finally:
        del os.environ["DISPLAY"]
        server.stop()


@pytest.fixture
def own_x_server():
    """A private Xvfb for a child process (killed afterwards)."""
    require_xvfb()
    server = XServer()
    try:
        yield server
    finally:
        server.stop()


def find_window(title: str, env: dict, timeout_s: float = 60.0, process: subprocess.Popen | None = None) -> str:
    """The X window id of the window named ``title`` (waits for it to appear)."""
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        found = subprocess.run(["xdotool", "search", "--name", f"^{title}$"], env=env,
                               capture_output=True, text=True)
        ids = found.stdout.split()
        if ids:
            return ids[-1]
        if process is not None and process.poll() is not None:
            err = process.stderr.read() if process.stderr else ""
            raise AssertionError(f"the program ended (exit {process.returncode}) before its window appeared: {err[-2000:]}")
        time.sleep(0.1)
    raise AssertionError(f"no window named {title!r} appeared within {timeout_s:g} s")


def wait_until_no_window(title: str, env: dict, timeout_s: float = 30.0) -> None:
    """Wait until no window named ``title`` is left (a finished program's window closes asynchronously)."""
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        found = subprocess.run(["xdotool", "search", "--name", f"^{title}$"], env=env, capture_output=True, text=True)
        if not found.stdout.split():
            return
        time.sleep(0.1)
    raise AssertionError(f"a window named {title!r} was still open after {timeout_s:g} s")


def send_key(window: str, key: str, env: dict) -> None:
    """Press and release a key (psychopy name) in ``window``."""
    subprocess.run(["xdotool", "key", "--window", window, X_KEYSYMS.get(key, key)], env=env,
                   check=False, capture_output=True)
