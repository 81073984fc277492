"""Imported first into the process that local workers fork from (:func:`runner.workpool._start_server`).

A worker forked while its command is being stopped (Ctrl-C, SIGTERM) can
find that the command has already removed its pool's semaphores: it failed
with ``FileNotFoundError`` where it rebuilt one, and printed the traceback
after the command's one stop line (about one stop in 40 in the first seconds
of a ``fit`` of several observers). Such a worker has nothing to report (its
command is gone or going, and a pool that lost a worker otherwise says so
itself), so it now ends without a word; every other error of a worker's
start is printed as before. Importing this module sets that rule
(``sys.excepthook``) in the server and so in every worker it forks; no other
process imports it.
"""

from __future__ import annotations

import os
import sys

_PRINTED = sys.excepthook


def _semaphore_gone(kind, value, tb) -> bool:
    """True for the ``FileNotFoundError`` of rebuilding a semaphore its creator has removed."""
    if not issubclass(kind, FileNotFoundError) or tb is None:
        return False
    while tb.tb_next is not None:
        tb = tb.tb_next
    code = tb.tb_frame.f_code
    return code.co_name == "__setstate__" and os.path.basename(code.co_filename) == "synchronize.py"


def _quiet_when_stopped(kind, value, tb) -> None:
    if not _semaphore_gone(kind, value, tb):
        _PRINTED(kind, value, tb)


sys.excepthook = _quiet_when_stopped
