"""A lost connection to the X server: the one moment left to record a session part.

When the X server dies or kills the window's client (``xdotool windowkill``),
Xlib calls its I/O-error handler and then ends the process from C
(``XIO: fatal IO error``), past every Python ``except`` and ``finally``.  Its
default handler prints two lines and exits with status 1: the session's
part stayed ``running`` and no resume command was shown.  Our handler runs
Python while the process can still write: the caller's ``then`` records the
part, prints one line and ends the process (Xlib would end it anyway if the
handler returned).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import sys
from typing import Callable

#: ``int handler(Display *)``, the C type of an Xlib I/O-error handler.
_IO_ERROR_HANDLER = ctypes.CFUNCTYPE(ctypes.c_int, ctypes.c_void_p)

#: Handlers installed, kept alive for as long as Xlib may call them.
_installed: list = []


def on_connection_lost(then: Callable[[], None], exit_code: int) -> bool:
    """Call ``then()`` and end the process with ``exit_code`` when the X connection breaks.

    Parameters
    ----------
    then : callable
        Records what it can and prints one line; it runs inside an Xlib call,
        so it must not draw or touch the window.
    exit_code : int
        The process ends with it after ``then`` returns (or fails).

    Returns
    -------
    bool
        False where there is no Xlib (another windowing system): nothing is installed.
    """
    name = ctypes.util.find_library("X11")
    if name is None:
        return False
    try:
        xlib = ctypes.CDLL(name)
    except OSError:
        return False

    def lost(display) -> int:  # noqa: ARG001 - Xlib's argument
        try:
            then()
        finally:
            for stream in (sys.stdout, sys.stderr):
                stream.flush()
            os._exit(exit_code)

    handler = _IO_ERROR_HANDLER(lost)
    _installed.append(handler)
    xlib.XSetIOErrorHandler.argtypes = [_IO_ERROR_HANDLER]
    xlib.XSetIOErrorHandler.restype = _IO_ERROR_HANDLER
    xlib.XSetIOErrorHandler(handler)
    return True
