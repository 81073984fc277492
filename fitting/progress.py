"""A tiny text progress bar on stderr, with no dependency.

It draws only when the stream is a terminal, unless told to draw anyway, so
logs and captured output stay clean.

Examples
--------
>>> with ProgressBar(2000, "bootstrap S01") as bar:   # doctest: +SKIP
...     for chunk in chunks:
...         work(chunk)
...         bar.advance(len(chunk))
"""

from __future__ import annotations

import sys
import time
from typing import TextIO


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
    width : int, optional
        Characters in the bar itself.
    """

    def __init__(self, total: int, label: str = "", stream: TextIO | None = None,
                 show: bool | None = None, width: int = 30):
        self.total = max(int(total), 0)
        self.label = label
        self.stream = sys.stderr if stream is None else stream
        if show is None:
            isatty = getattr(self.stream, "isatty", None)
            show = bool(isatty and isatty())
        self.show = show
        self.width = width
        self.done = 0
        self._start = time.monotonic()
        self._last_draw = -1.0

    def advance(self, n: int = 1) -> None:
        """Record ``n`` more units done and redraw (at most 20 times a second)."""
        self.done = min(self.done + int(n), self.total)
        now = time.monotonic()
        if self.done >= self.total or now - self._last_draw >= 0.05:
            self._draw()
            self._last_draw = now

    def close(self) -> None:
        """Draw the final state and end the line."""
        if self.show:
            self._draw()
            self.stream.write("\n")
            self.stream.flush()

    def __enter__(self) -> "ProgressBar":
        if self.show:
            self._draw()
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def _draw(self) -> None:
        if not self.show:
            return
        frac = self.done / self.total if self.total else 1.0
        filled = int(round(frac * self.width))
        elapsed = time.monotonic() - self._start
        bar = "=" * filled + " " * (self.width - filled)
        self.stream.write(f"\r{self.label} [{bar}] {self.done}/{self.total} {elapsed:5.1f} s")
        self.stream.flush()
