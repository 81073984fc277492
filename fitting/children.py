"""Helper processes: born deaf to Ctrl-C, and ending with their parent.

A terminal's Ctrl-C sends SIGINT to the whole process group: to this
process, which reports it in one line, and to every helper process it
started. A helper that is still starting (importing scipy, say) has not yet
had the chance to ignore SIGINT and would print a ``KeyboardInterrupt``
traceback of its own after the command's one line. Helpers started inside
:func:`children_shielded` ignore SIGINT from birth: an ignored signal stays
ignored across ``fork`` and ``exec``, and Python leaves it so at start-up.

A parent killed outright (``kill -9``) cannot stop its helpers, and a pool's
helpers would wait for work forever; a helper that calls
:func:`follow_parent` as it starts ends when its parent has ended. The
process that :mod:`multiprocessing` starts to track a pool's semaphores then
removes those the parent left; it is started quiet about it (two lines of
warning on the terminal, after the shell's own word for the kill, that tell
the user nothing they can act on).
"""

from __future__ import annotations

import multiprocessing
import os
import signal
import sys
import threading
from collections.abc import Iterator
from contextlib import contextmanager

#: Passed to helper Pythons as ``-W``: the semaphore tracker's warning about a killed parent's semaphores.
QUIET_TRACKER = "ignore:resource_tracker:UserWarning"


@contextmanager
def children_shielded() -> Iterator[None]:
    """Start child processes inside this block to have them ignore SIGINT for life.

    They are the parent's to stop. The parent ignores SIGINT too while
    inside the block, the few milliseconds a ``fork`` or ``exec`` takes: a
    Ctrl-C in that instant is dropped and has to be pressed again. Outside
    the main thread (where handlers cannot change), or when SIGINT's handler
    was set outside Python, the block does nothing.
    """
    if QUIET_TRACKER not in sys.warnoptions:      # read by multiprocessing when it starts a Python
        sys.warnoptions.append(QUIET_TRACKER)
    handler = signal.getsignal(signal.SIGINT)
    if threading.current_thread() is not threading.main_thread() or handler is None:
        yield               # None: a handler set outside Python, which could not be put back
        return
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, handler)


def follow_parent() -> None:
    """In a helper process: end it (exit code 1) as soon as the process that started it has ended.

    A daemon thread waits on the parent's end of a pipe, which closes when
    the parent ends, however it ends. Does nothing in a process not started
    by :mod:`multiprocessing`.
    """
    parent = multiprocessing.parent_process()
    if parent is not None:
        threading.Thread(target=_end_with, args=(parent,), name="aftershift-parent-watch", daemon=True).start()


def _end_with(parent) -> None:
    parent.join()       # returns once the parent has ended
    os._exit(1)
