"""One scratch folder per benchmark run, removed however the run ends.

A benchmark's worker processes simulate and fit in temporary folders.  They
all live under one folder, ``aftershift-bench-<pid>-*`` in the system's
temporary directory, which the run removes when it ends, also after Ctrl-C or
SIGTERM (turned into the same ``KeyboardInterrupt``); the folder of a run
killed with SIGKILL is removed by the next run.  Benchmarks keep no results in
them, so nothing is lost either way.
"""

from __future__ import annotations

import multiprocessing
import os
import shutil
import signal
import sys
import tempfile
from concurrent.futures import ProcessPoolExecutor
from contextlib import contextmanager
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from fitting.outputs import remove_dead_folders  # noqa: E402

PREFIX = "aftershift-bench-"


def _interrupt(signum, frame):
    raise KeyboardInterrupt


def quiet_worker() -> None:
    """Pool initializer: a worker ignores Ctrl-C and ends at SIGTERM; the run stops its workers itself."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)


@contextmanager
def scratch_folder():
    """Point :mod:`tempfile` at a fresh folder for this run (and the workers it forks), then remove it.

    SIGTERM is read as Ctrl-C meanwhile; on either, the workers still running
    are stopped before the folder is removed.

    Yields
    ------
    Path
        The run's scratch folder.
    """
    base = Path(tempfile.gettempdir())
    remove_dead_folders(base, PREFIX)
    root = Path(tempfile.mkdtemp(prefix=f"{PREFIX}{os.getpid()}-", dir=base))
    before, tempfile.tempdir = tempfile.tempdir, str(root)
    env_before = os.environ.get("TMPDIR")
    os.environ["TMPDIR"] = str(root)             # for workers that start afresh instead of forking
    previous = signal.signal(signal.SIGTERM, _interrupt)
    try:
        yield root
    except KeyboardInterrupt:
        stop_workers()
        raise
    finally:
        signal.signal(signal.SIGTERM, previous)
        tempfile.tempdir = before
        if env_before is None:
            os.environ.pop("TMPDIR", None)
        else:
            os.environ["TMPDIR"] = env_before
        shutil.rmtree(root, ignore_errors=True)


def stop_workers() -> None:
    """Stop this process's worker processes at once (before a pool would wait for their tasks)."""
    for child in multiprocessing.active_children():
        child.terminate()
        child.join()


def pool_map(fn, jobs, workers: int) -> list:
    """``fn`` over ``jobs`` in ``workers`` processes, in order; Ctrl-C or SIGTERM stops them at once.

    Returns
    -------
    list
        ``fn(job)`` for every job.
    """
    with ProcessPoolExecutor(max_workers=workers, initializer=quiet_worker) as pool:
        try:
            return list(pool.map(fn, jobs))
        except KeyboardInterrupt:
            stop_workers()
            raise
