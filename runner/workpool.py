"""Handing out independent tasks: local worker processes or a Dask cluster.

One abstraction, two backends:

* :class:`LocalPool` runs tasks in worker processes on this machine, by
  default one per core this process may run on (``os.sched_getaffinity``);
  one worker runs tasks in this process.
* :class:`ClusterPool` sends them to an existing Dask ``distributed``
  scheduler (``--scheduler ADDRESS``).  Dask is the optional ``cluster``
  extra; without it, asking for a scheduler is one clear error.

Both have ``map_unordered(fn, tasks)``: ``tasks`` is a dict from a task key
to the task's argument, and results come back as ``(key, result)`` pairs in
the order they finish.  A task's result may depend only on its argument,
never on the worker that runs it, so a study gives the same numbers on one
core, on many, on a cluster of any size and after a worker is lost (Dask
reruns a lost worker's tasks elsewhere).

:class:`TaskStore` keeps finished results on disk, one JSON file per task,
written atomically as each result arrives, so an interrupted study continues
where it stopped; a lock file keeps a second process out of the same folder.
:func:`run_tasks` ties pool, store and a progress bar together.
"""

from __future__ import annotations

import importlib.metadata
import json
import logging
import multiprocessing
import multiprocessing.forkserver
import os
import signal
import sys
import tempfile
import time
from collections import deque
from collections.abc import Callable, Iterator
from contextlib import closing
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from pathlib import Path

from fitting.children import children_shielded, follow_parent
from fitting.errors import InputError
from fitting.heap import arrays_on_the_heap
from fitting.outputs import file_mode
from runner.folder_claim import FolderClaim

#: How to install the optional Dask part.
CLUSTER_EXTRA = "pip install 'aftershift[cluster]' (or pip install -e '.[cluster]' in a checkout)"
CONNECT_TIMEOUT_S = 10
#: What the workers of ``fit`` need: the fits, and the figures they draw while other observers are fitted.
FIT_MODULES = ("fitting.report", "fitting.figures", "matplotlib.pyplot", "runner.replay")
#: What they need when ``fit`` has one observer, whose fit runs in the command's own process: the figures,
#: and what the observer's analysis needs to be unpickled (pandas; importing it in each worker costs 0.2 s).
FIGURE_MODULES = ("fitting.observer", "fitting.figures", "matplotlib.pyplot")
WORKER_WAIT_S = 60


class WorkerLost(RuntimeError):
    """A worker died (killed, out of memory) and its task could not be finished."""


def available_cores() -> int:
    """Cores this process may run on (its CPU affinity), at least 1."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - platforms without affinity
        return max(1, os.cpu_count() or 1)


def _worker_start() -> None:
    """First thing in every local worker: leave Ctrl-C to the parent, end when the parent ends, and
    keep arrays on the heap as the parent does (:mod:`fitting.heap`)."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    follow_parent()
    arrays_on_the_heap()


class LocalPool:
    """Worker processes on this machine.

    Parameters
    ----------
    workers : int, optional
        Number of worker processes (default: :func:`available_cores`). With 1,
        tasks run one after another in this process.
    preload : tuple of str
        Modules the workers need: the process the workers fork from starts
        importing them at once, so the first tasks do not wait for imports.
        Without it, the first task's module is imported when tasks arrive.
    """

    def __init__(self, workers: int | None = None, preload: tuple[str, ...] = ()):
        if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
            raise InputError("argument", "--jobs", f"expected a whole number >= 1, got {workers!r}")
        self.workers = available_cores() if workers is None else workers
        self.where = "this process" if self.workers == 1 else f"{self.workers} local worker processes"
        if self.workers > 1 and preload:
            # the server that forks the workers imports these now, beside whatever this process does
            # before its first tasks (it does not wait for the server)
            try:
                _start_server(preload)
            except OSError:     # only a head start: the pool tries again, and reports, when it is used
                pass

    def map_unordered(self, fn: Callable, tasks: dict, then: Callable | None = None
                      ) -> Iterator[tuple[str, object]]:
        """Run ``fn(task)`` for every task; yield ``(key, result)`` as each finishes.

        ``then(key, result)``, when given, is called here as each result
        arrives and returns more tasks, ``{key: (function, argument)}``, that
        join the queue at once (their results are yielded too and passed to
        ``then`` in turn).
        """
        if self.workers == 1 or (len(tasks) <= 1 and then is None):
            queue = deque((key, fn, task) for key, task in tasks.items())
            while queue:
                key, f, task = queue.popleft()
                result = f(task)
                if then is not None:
                    queue.extend((k, f2, t2) for k, (f2, t2) in then(key, result).items())
                yield key, result
            return
        # forkserver: workers fork from a clean server process (not from this one, which may hold
        # threads) that has imported the task's module once, so they start without importing it again
        ctx = _start_server((fn.__module__,))
        size = self.workers if then is not None else min(self.workers, len(tasks))
        pool = ProcessPoolExecutor(size, mp_context=ctx, initializer=_worker_start)
        finished = False
        try:
            pending = {_submit(pool, fn, task): key for key, task in tasks.items()}
            while pending:
                done, _ = wait(pending, return_when=FIRST_COMPLETED)
                for future in done:
                    key = pending.pop(future)
                    try:
                        result = future.result()
                    except BrokenProcessPool:
                        raise WorkerLost("a local worker process died (killed, or out of memory)") from None
                    if then is not None:
                        pending.update({_submit(pool, f2, t2): k for k, (f2, t2) in then(key, result).items()})
                    yield key, result
            finished = True
        finally:
            _stop(pool)
            if not finished:    # Ctrl-C, SIGTERM, a failed task: a worker the server is yet
                _stop_server()  # to fork would start after this process is gone

    def close(self) -> None:
        """Nothing to release (processes live only inside :meth:`map_unordered`)."""


def _submit(pool: ProcessPoolExecutor, fn: Callable, task):
    """``pool.submit(fn, task)``; a pool that can no longer start workers is a lost worker.

    The pool starts its workers as tasks arrive, through the forkserver; if
    that process was killed, starting one fails with an end of file.
    """
    try:
        return pool.submit(fn, task)
    except (BrokenProcessPool, EOFError, ConnectionError) as exc:
        raise WorkerLost("the process that starts local workers died (killed, or out of memory)") from exc


def _start_server(preload: tuple[str, ...]):
    """Start the process the workers fork from (if not running) and return its context.

    It starts ignoring Ctrl-C, and so do the workers it forks: a Ctrl-C while
    it is still importing ``preload`` would otherwise make it print a
    traceback of its own after the command's one line.
    """
    ctx = multiprocessing.get_context("forkserver")
    ctx.set_forkserver_preload(["runner.worker_server", *preload])     # first: workers of a stopped command are quiet
    with children_shielded():
        multiprocessing.forkserver.ensure_running()
    return ctx


def _stop_server() -> None:
    """End the process the workers fork from, and wait (up to 5 s) until it has ended.

    While it is still importing, workers asked for are queued in it; were
    it left running, it would fork them after this process is gone, and each
    would print a traceback for the pool's missing semaphores. It is not
    reaped, so that the next pool's start sees it dead and starts a new one.
    Call it after :func:`_stop`: once the server is gone, the pool takes its
    workers for ended and would not stop them.
    """
    pid = getattr(multiprocessing.forkserver._forkserver, "_forkserver_pid", None)  # no public handle
    if pid is None:
        return
    try:
        os.kill(pid, signal.SIGKILL)
        deadline = time.monotonic() + 5      # a process stuck in the kernel (a hung disk) cannot hold us
        while os.waitid(os.P_PID, pid, os.WEXITED | os.WNOWAIT | os.WNOHANG) is None:
            if time.monotonic() > deadline:
                break
            time.sleep(0.01)
    except (ProcessLookupError, ChildProcessError):     # already ended and reaped
        pass


def _stop(pool: ProcessPoolExecutor) -> None:
    """Cancel queued tasks and end the worker processes now, without waiting for running tasks."""
    # ProcessPoolExecutor has no public way to stop a running task before Python 3.14
    processes = list((getattr(pool, "_processes", None) or {}).values())
    manager = getattr(pool, "_executor_manager_thread", None)     # shutdown forgets it
    results = getattr(pool, "_result_queue", None)                 # and this
    pool.shutdown(wait=False, cancel_futures=True)
    for process in processes:
        if process.is_alive():
            process.terminate()
    for process in processes:
        process.join(timeout=5)
    # a worker ended while sending a large result (a figure, an analysis) leaves the manager thread
    # waiting for the rest of it, for ever, and interpreter exit waits for that thread: closing this
    # process's own copy of the sending end, the last one once the workers are gone, ends the wait
    writer = getattr(results, "_writer", None)
    if writer is not None and not any(process.is_alive() for process in processes):
        writer.close()
    # the pool's manager thread closes its wake-up pipe as it ends; left running, it races the
    # interpreter's exit hook, which writes to that pipe (an EBADF traceback after the last line)
    if manager is not None:
        manager.join(timeout=10)


def _worker_version() -> str | None:
    """The installed aftershift version (None when run from an uninstalled checkout).

    Also run on every Dask worker: that it runs at all proves the worker can import aftershift.
    """
    try:
        return importlib.metadata.version("aftershift")
    except importlib.metadata.PackageNotFoundError:
        return None


class ClusterPool:
    """Tasks on an existing Dask ``distributed`` cluster.

    Parameters
    ----------
    address : str
        The scheduler's address, e.g. ``tcp://10.0.0.5:8786``.

    Raises
    ------
    InputError
        Dask is not installed, the scheduler cannot be reached, it has no
        workers within a minute, or its workers cannot import aftershift.
    """

    def __init__(self, address: str):
        try:
            from distributed import Client
        except ImportError:
            raise InputError("argument", "--scheduler", "running on a cluster needs dask and distributed: "
                             + CLUSTER_EXTRA) from None
        # the one-line errors below say what went wrong; Dask's own log lines would only repeat it
        for name in list(logging.root.manager.loggerDict):
            if name == "distributed" or name.startswith("distributed."):
                logging.getLogger(name).setLevel(logging.CRITICAL)
        _check_tls_settings(address)
        try:
            self.client = Client(address, timeout=f"{CONNECT_TIMEOUT_S}s", set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise InputError("argument", "--scheduler", f"cannot reach a Dask scheduler at {address!r} "
                             f"({' '.join(str(exc).split()) or type(exc).__name__})") from None
        try:
            self.client.wait_for_workers(1, timeout=WORKER_WAIT_S)
            versions = self.client.run(_worker_version)
        except (OSError, TimeoutError) as exc:
            self.close()
            raise InputError("argument", "--scheduler", f"the scheduler at {address} has no workers after "
                             f"{WORKER_WAIT_S} s; start some with: dask worker {address}") from exc
        except Exception as exc:  # the worker could not run our function: aftershift missing there
            self.close()
            raise InputError("argument", "--scheduler", f"the workers of {address} cannot import aftershift "
                             f"({type(exc).__name__}: {exc}); install it on every worker: {CLUSTER_EXTRA}") from None
        mine = _worker_version()
        other = sorted({str(v) for v in versions.values() if v != mine})
        if other:
            self.close()
            raise InputError("argument", "--scheduler", f"workers run aftershift {', '.join(other)}, this "
                             f"process {mine}; install the same version everywhere")
        self.address = address
        self.workers = len(versions)
        self.where = f"the Dask cluster at {address} ({self.workers} workers at start)"

    def map_unordered(self, fn: Callable, tasks: dict, then: Callable | None = None
                      ) -> Iterator[tuple[str, object]]:
        """Submit every task; yield ``(key, result)`` as each finishes.

        ``then`` adds tasks as results arrive, as in :meth:`LocalPool.map_unordered`.

        The Dask key of a task is its own key, so a task lost with a worker
        is rerun under the same identity; ``KilledWorker`` (a task that took
        down several workers) becomes :class:`WorkerLost`.
        """
        from concurrent.futures import CancelledError

        from distributed import as_completed
        from distributed.scheduler import KilledWorker

        def submit(f: Callable, task, key: str):
            future = self.client.submit(f, task, key=f"aftershift-{key}", pure=False)
            futures[future] = key
            return future

        futures: dict = {}
        for key, task in tasks.items():
            submit(fn, task, key)
        try:
            finished = as_completed(list(futures), loop=self.client.loop)
            for future in finished:
                try:
                    result = future.result()
                except KilledWorker as exc:
                    raise WorkerLost(f"Dask workers died running a task ({exc})") from None
                except (CancelledError, OSError):
                    raise WorkerLost(f"lost the connection to the Dask scheduler at {self.address}") from None
                key = futures[future]
                if then is not None:
                    for k, (f2, t2) in then(key, result).items():
                        finished.add(submit(f2, t2, k))
                yield key, result
                future.release()
        finally:
            if self.client.status == "running":
                self.client.cancel([f for f in futures if not f.done()])

    def close(self) -> None:
        """Disconnect from the scheduler (the cluster keeps running)."""
        self.client.close()


def _check_tls_settings(address: str) -> None:
    """Refuse a ``tls://`` address when Dask's configuration gives this process no TLS context.

    Dask builds the context from its configuration (``distributed.comm.tls.*``);
    without one, its client fails with a ``TypeError`` and then hangs closing.
    """
    if not address.lower().startswith("tls://"):
        return
    from distributed.security import Security

    try:
        context = Security().get_connection_args("client").get("ssl_context")
    except (OSError, ValueError) as exc:    # a named file missing, or not a certificate or key (ssl.SSLError)
        import dask

        named = ", ".join(f"{key} {dask.config.get(f'distributed.comm.tls.{key}', None)}"
                          for key in ("ca-file", "client.cert", "client.key"))
        raise InputError("argument", "--scheduler", f"{address} is a TLS address, but Dask's TLS settings cannot be "
                         f"used ({' '.join(str(exc).split())}; distributed.comm.tls.{named})") from None
    if context is None:
        raise InputError("argument", "--scheduler", f"{address} is a TLS address, but Dask's configuration names no "
                         "TLS files for this process: set distributed.comm.tls.ca-file, .client.cert and "
                         ".client.key (e.g. DASK_DISTRIBUTED__COMM__TLS__CA_FILE=...) as for the cluster's workers")


def open_pool(scheduler: str | None = None, workers: int | None = None, preload: tuple[str, ...] = ()):
    """A :class:`ClusterPool` when ``scheduler`` is given, else a :class:`LocalPool`.

    ``preload`` names the modules local workers need (see :class:`LocalPool`).

    Raises
    ------
    InputError
        Both given, or a bad value (see the classes).
    """
    if scheduler is not None:
        if workers is not None:
            raise InputError("argument", "--jobs", "the cluster decides its workers; give --jobs or --scheduler, "
                             "not both")
        if not scheduler.strip():
            raise InputError("argument", "--scheduler", "expected an address such as tcp://HOST:8786")
        return ClusterPool(scheduler.strip())
    return LocalPool(workers, preload)


# ---------------------------------------------------------------- results on disk


class TaskStore:
    """Finished task results in a folder, one JSON file per task.

    Each file is written to a temporary name, flushed to disk and renamed, so
    a kill at any instant leaves either the whole result or none.  While the
    store is open it holds the folder's claim (:class:`runner.folder_claim.FolderClaim`); a
    second process that opens the same folder gets an :class:`InputError`.
    The lock is the kernel's (``flock``), so it goes away with a killed process.

    Parameters
    ----------
    folder : str or Path
        Created if needed.
    option : str
        The option that named the folder, for error messages.
    accept : callable, optional
        ``accept(key, result) -> bool``: whether a stored result may be used
        for ``key`` (its types and values); a result it refuses is redone.

    Attributes
    ----------
    rejected : set of str
        Keys whose file was there but could not be used (unreadable, about
        another task, or refused by ``accept``).
    """

    def __init__(self, folder: str | Path, option: str = "--out",
                 accept: Callable[[str, object], bool] | None = None):
        self.folder = Path(folder)
        self.option = option
        self.accept = accept
        self.rejected: set[str] = set()
        self._mode = file_mode()  # task files follow the umask, as every output does
        self._claim = FolderClaim(self.folder, option)
        for stale in self.folder.glob(".part-*"):  # left by a process killed mid-write; we hold the lock
            stale.unlink(missing_ok=True)

    def _path(self, key: str) -> Path:
        return self.folder / f"{key}.json"

    def load(self, key: str):
        """The stored result of ``key``, or None: not stored, or not usable (then added to
        :attr:`rejected`; it will be redone).

        A file is usable when it is JSON, names ``key`` as its own (a file
        copied over another task's is not) and ``accept`` takes its result.
        """
        try:
            text = self._path(key).read_text(encoding="utf-8")
        except FileNotFoundError:
            return None
        except (OSError, UnicodeDecodeError):
            self.rejected.add(key)
            return None
        try:
            stored = json.loads(text)
        except (ValueError, RecursionError):
            stored = None
        if not (isinstance(stored, dict) and stored.get("key") == key and "result" in stored
                and (self.accept is None or self.accept(key, stored["result"]))):
            self.rejected.add(key)
            return None
        self.rejected.discard(key)
        return stored["result"]

    def save(self, key: str, result, about: dict | None = None) -> None:
        """Store ``result`` (JSON-ready) atomically, with ``about`` for people reading the file.

        Raises
        ------
        InputError
            The folder cannot be written (full disk, read-only).
        """
        text = json.dumps({"key": key, "about": about or {}, "result": result}, sort_keys=True, allow_nan=True)
        path = self._path(key)
        try:
            fd, tmp = tempfile.mkstemp(prefix=".part-", dir=self.folder)
            try:
                os.fchmod(fd, self._mode)
                with os.fdopen(fd, "w", encoding="utf-8") as fh:
                    fh.write(text + "\n")
                    fh.flush()
                    os.fsync(fh.fileno())
                os.replace(tmp, path)
            finally:
                if os.path.exists(tmp):
                    os.unlink(tmp)
        except OSError as exc:
            raise InputError(str(path), self.option, f"cannot be written ({exc.strerror}); finished tasks "
                             "are kept, free the space or fix the folder and run again") from None

    def close(self) -> None:
        """Release the lock."""
        self._claim.release()

    def __enter__(self) -> "TaskStore":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def progress_bar(total: int, done: int, label: str, show: bool | None = None):
    """A tqdm bar on stderr: tasks done of ``total`` and the time left; hidden when stderr is no terminal."""
    from fitting.progress import tqdm  # with the thread lock set there

    hidden = not sys.stderr.isatty() if show is None else not show
    return tqdm(total=total, initial=done, desc=label, unit="task", disable=hidden, file=sys.stderr,
                dynamic_ncols=True, smoothing=0.1)


def run_tasks(fn: Callable, tasks: dict, pool, store: TaskStore | None = None, label: str = "tasks",
              about: Callable[[str], dict] | None = None, show: bool | None = None,
              then: Callable | None = None) -> dict:
    """Run every task not yet in ``store``; return all results by key.

    Parameters
    ----------
    fn : callable
        ``fn(task) -> result``; the result must be JSON-ready when a store is used.
    tasks : dict
        Task key -> argument of ``fn``.
    pool : LocalPool or ClusterPool
    store : TaskStore, optional
        Finished results; each new one is saved the moment it arrives.
    label : str
        Words before the progress bar.
    about : callable, optional
        ``about(key)`` -> dict stored beside a result, for people.
    show : bool or None
        Progress bar: None = only when stderr is a terminal.
    then : callable, optional
        ``then(key, result) -> {key: (function, argument)}``: follow-up tasks
        that join the queue as each result arrives (see
        :meth:`LocalPool.map_unordered`); they count in the progress bar and
        are never stored.

    Raises
    ------
    KeyboardInterrupt
        Passed on after the pool is stopped; finished results are already saved.
    WorkerLost
        A worker died and its task could not be finished.
    """
    results = {}
    if store is not None:
        for key in tasks:
            found = store.load(key)
            if found is not None:
                results[key] = found
    todo = {k: t for k, t in tasks.items() if k not in results}
    # closing(): on Ctrl-C the pool stops at once, not when the interrupted frame is collected
    with progress_bar(len(tasks), len(results), label, show) as bar:
        def counted(key, result) -> dict:
            more = then(key, result)
            bar.total += len(more)
            return more

        with closing(pool.map_unordered(fn, todo, counted if then else None)) as finished:
            for key, result in finished:
                if store is not None and key in tasks:
                    store.save(key, result, about(key) if about else None)
                results[key] = result
                bar.update(1)
    return results


def task_mapper(pool, label: str) -> Callable[[Callable, dict], dict]:
    """``map_tasks(fn, tasks) -> results by key`` through ``pool``, with a progress bar.

    ``label`` names the work on the progress bar; ``map_tasks(..., label=WORDS)``
    names one call's work otherwise.

    A lost worker becomes an :class:`InputError` (one line, exit 2).
    """
    def map_tasks(fn: Callable, tasks: dict, then: Callable | None = None, *, label: str = label) -> dict:
        try:
            return run_tasks(fn, tasks, pool, label=f"{label} ({pool.where})", then=then)
        except WorkerLost as exc:
            raise InputError("worker", "", f"{exc}; nothing was written, run the command again") from None

    return map_tasks


def interrupted_line(done: int, total: int, folder: Path) -> str:
    """The one line printed when a study is interrupted."""
    share = f"{done} of {total} tasks" if total else "no tasks"
    return (f"interrupted; {share} finished and kept in {folder}; "
            "run the same command again to continue")


def check_count(n: int, option: str, low: int = 1, high: int = 10**6) -> None:
    """Refuse counts that are not whole numbers in ``[low, high]``."""
    if isinstance(n, bool) or not isinstance(n, int) or not (low <= n <= high):
        raise InputError("argument", option, f"expected a whole number from {low} to {high}, got {n!r}")
