"""The one place where psychopy is imported.

Importing psychopy has side effects in the user's home folder: it creates
``~/.psychopy3`` (preferences, caches, plugin folders) and writes a default
monitor calibration file there, and every ``psychopy.monitors.Monitor`` made
later loads any calibration saved under the same name.  aftershift builds its
monitor in memory from the protocol and wants neither, so ``HOME`` points at
a private temporary folder while psychopy is imported (psychopy reads it only
then) and is restored right after; the folder is removed when the process
exits.  Nothing of psychopy's preferences is read from, or written to, the
real home folder, and no gamma table is touched (see
:mod:`runner.display.window`).  A process that ends without its exit
handlers (SIGKILL, a lost X server) leaves its folder; the next import
removes the folders of processes that no longer exist.

Without an X display (``DISPLAY`` unset or unreachable) the import fails
with a one-line :class:`fitting.errors.InputError` naming ``DISPLAY``, which
the command line reports with exit code 2.

psychopy's console log is limited to errors: the experimenter's console is
ours, and psychopy's notices (for example that its optional low-latency
keyboard backend is missing, so its keyboard falls back to window events) are explained in
:mod:`runner.display`.
"""

from __future__ import annotations

import atexit
import os
import shutil
import tempfile

from fitting.errors import InputError

#: The temporary preference folders: ``aftershift-psychopy-<pid>-<random>``.
PREFIX = "aftershift-psychopy-"


def _remove_folders_of_ended_processes(folder: str) -> None:
    """Remove the preference folders that processes which ended without their exit handlers left behind.

    A process killed (SIGKILL) or ended by Xlib when its X server went away
    cannot remove its folder at exit; its process id in the folder's name
    tells the next one that nobody uses it any more.  A folder whose process
    is alive (or cannot be asked about) is kept.
    """
    try:
        names = os.listdir(folder)
    except OSError:
        return
    for name in names:
        pid = name[len(PREFIX):].partition("-")[0]
        if not (name.startswith(PREFIX) and pid.isdigit()):
            continue
        try:
            os.kill(int(pid), 0)
        except ProcessLookupError:
            shutil.rmtree(os.path.join(folder, name), ignore_errors=True)
        except (OSError, OverflowError):
            pass


_remove_folders_of_ended_processes(tempfile.gettempdir())
_PREFS_HOME = tempfile.mkdtemp(prefix=f"{PREFIX}{os.getpid()}-")
atexit.register(shutil.rmtree, _PREFS_HOME, ignore_errors=True)
_real_home = os.environ.get("HOME")
os.environ["HOME"] = _PREFS_HOME
try:
    from psychopy import logging

    logging.console.setLevel(logging.ERROR)
    import pyglet
    from psychopy import __version__ as version
    from psychopy import core, event, monitors, visual
    from psychopy.tools.monitorunittools import deg2pix
except Exception as exc:
    # pyglet raises its NoSuchDisplayException (one class per platform).
    if type(exc).__name__ != "NoSuchDisplayException":
        raise
    shown = os.environ.get("DISPLAY") or "not set"
    raise InputError(
        "environment", "DISPLAY",
        f"no screen to draw on (cannot connect to the X display; DISPLAY is {shown}); "
        "run on the lab display, or under Xvfb for a test",
    ) from None
finally:
    if _real_home is None:
        del os.environ["HOME"]
    else:
        os.environ["HOME"] = _real_home

#: Where psychopy keeps its preference folder for this process.
PREFS_HOME = _PREFS_HOME

__all__ = ["core", "deg2pix", "event", "logging", "monitors", "pyglet", "version", "visual", "PREFS_HOME"]
