"""Progress on standard error for every phase that can take more than a moment.

Two shapes, both drawn with tqdm and both silent when the stream is not a
terminal (so logs, pipes and captured output stay clean) unless told to draw:

* :class:`ProgressBar` counts units of work out of a known total
  (replicates, trials, simulated runs);
* :func:`phase` is for work whose size is not known in advance (drawing
  figures, comparing): a line with the elapsed time, refreshed twice a
  second, and optionally a count read from a callable (files written so far).

Examples
--------
>>> with ProgressBar(2000, "bootstrap S01") as bar:   # doctest: +SKIP
...     for chunk in chunks:
...         work(chunk)
...         bar.advance(len(chunk))
>>> with phase("drawing figures", count=lambda: len(list(out.glob("*.png")))):  # doctest: +SKIP
...     make_figures(...)
"""

from __future__ import annotations

import sys
import threading
from contextlib import contextmanager
from typing import Callable, Iterator, TextIO

from tqdm import tqdm

# Bars are drawn by one process only: a thread lock, not tqdm's default process-shared
# semaphore, which outlives a killed worker pool as a "leaked semaphore" warning.
tqdm.set_lock(threading.RLock())

#: Seconds between redraws of a :func:`phase` line.
PHASE_REFRESH_S = 0.5


def wants_progress(stream: TextIO | None = None, show: bool | None = None) -> bool:
    """Whether to draw: ``show`` if given, else whether ``stream`` (stderr) is a terminal."""
    if show is not None:
        return bool(show)
    stream = sys.stderr if stream is None else stream
    isatty = getattr(stream, "isatty", None)
    try:
        return bool(isatty and isatty())
    except ValueError:  # a closed stream
        return False


class ProgressBar:
    """Counts work done out of ``total`` and redraws one line in place.

    Parameters
    ----------
    total : int
        Units of work expected (replicates, observers, ...).
    label : str
        Words shown before the bar.
    stream : file-like, optional
        Where to draw; standard error by default.
    show : bool or None, optional
        ``None`` (default) draws only when ``stream`` is a terminal; ``True``
        always draws; ``False`` never draws.
    unit : str, optional
        Name of one unit of work, shown with the rate.
    """

    def __init__(self, total: int, label: str = "", stream: TextIO | None = None,
                 show: bool | None = None, unit: str = "it"):
        self.total = max(int(total), 0)
        self.label = label
        self.stream = sys.stderr if stream is None else stream
        self.show = wants_progress(self.stream, show)
        self.done = 0
        self._bar = tqdm(total=self.total, desc=label, file=self.stream, disable=not self.show,
                         unit=unit, leave=True, dynamic_ncols=True, mininterval=0.1)

    def advance(self, n: int = 1) -> None:
        """Record ``n`` more units done."""
        step = min(int(n), self.total - self.done)
        if step > 0:
            self.done += step
            self._bar.update(step)

    def close(self) -> None:
        """Draw the final state and end the line."""
        self._bar.close()

    def __enter__(self) -> "ProgressBar":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


@contextmanager
def phase(label: str, show: bool | None = None, count: Callable[[], int] | None = None,
          unit: str = "files", stream: TextIO | None = None) -> Iterator[None]:
    """Show that a step of unknown length is running, with its elapsed time.

    Parameters
    ----------
    label : str
        What is being done ("drawing figures").
    show : bool or None
        As for :class:`ProgressBar` (None: only on a terminal).
    count : callable, optional
        Returns how many units are done so far (polled at every redraw).
    unit : str
        Name of the units ``count`` returns.
    stream : file-like, optional
        Standard error by default.
    """
    stream = sys.stderr if stream is None else stream
    if not wants_progress(stream, show):
        yield
        return
    fmt = "{desc}: {n_fmt} " + unit + " [{elapsed}]" if count is not None else "{desc} [{elapsed}]"
    bar = tqdm(total=None, desc=label, file=stream, leave=True, dynamic_ncols=True, bar_format=fmt)
    stop = threading.Event()

    def redraw() -> None:
        if count is not None:
            try:
                bar.n = int(count())
            except OSError:  # the folder being counted is not there yet
                pass
        bar.refresh()

    def tick() -> None:
        while not stop.wait(PHASE_REFRESH_S):
            redraw()

    ticker = threading.Thread(target=tick, name=f"progress: {label}", daemon=True)
    ticker.start()
    try:
        yield
    finally:
        stop.set()
        ticker.join()
        redraw()
        bar.close()
