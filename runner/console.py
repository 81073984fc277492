"""The experimenter's console in the terminal.

Two flavours of :class:`runner.session.Console`: a progress bar for
simulations, and a line-per-trial console for sessions with a person, which
also prints a quick fit of the PSE shifts at every break.  Neither ever
draws on the observer's screen.
"""

from __future__ import annotations

import sys

from fitting.progress import ProgressBar
from runner.session import Console


class SimulationConsole(Console):
    """A single progress bar over all simulated trials.

    Parameters
    ----------
    total : int
        Trials expected over all observers.
    label : str
    show : bool or None
        As :class:`fitting.progress.ProgressBar` (None: only on a terminal).
    """

    def __init__(self, total: int, label: str = "simulating", show: bool | None = None):
        self.bar = ProgressBar(total, label, show=show)
        #: Called at every break: the launcher syncs the log to disk there.
        self.at_break = None

    def block_done(self, rows):
        """A break: sync the log (see :mod:`runner.trial_log`)."""
        if self.at_break is not None:
            self.at_break()

    def trial_done(self, done, total, dropped_so_far, seconds_left):
        """Advance the bar by one trial."""
        self.bar.advance(1)

    def skip(self, n: int) -> None:
        """Count trials already on disk (resumed sessions)."""
        self.bar.advance(n)

    def close(self) -> None:
        """End the bar's line."""
        self.bar.close()


class ExperimenterConsole(Console):
    """Progress, time left and dropped frames, one line per trial.

    Parameters
    ----------
    quick_fit : callable or None
        ``rows -> str``: a short table of PSE shifts so far, printed at
        breaks and at the end.
    stream : file-like
        Defaults to standard output.
    """

    def __init__(self, quick_fit=None, stream=None):
        self.quick_fit = quick_fit
        self.stream = stream or sys.stdout
        #: True once a quick fit has covered every trial logged so far (False after each new trial).
        self.fit_is_current = False

    def _say(self, text: str) -> None:
        self.stream.write(text + "\n")
        self.stream.flush()

    def started(self, total, done):
        """Announce the session and what is already logged."""
        self._say(f"session: {total} trials planned, {done} already logged")

    def trial_done(self, done, total, dropped_so_far, seconds_left):
        """One status line per trial."""
        self.fit_is_current = False
        minutes = seconds_left / 60
        self._say(f"trial {done:4d}/{total}  left {total - done:4d}  ~{minutes:5.1f} min  dropped frames so far {dropped_so_far}")

    def block_done(self, rows):
        """Print the quick fit of the trials so far."""
        if self.quick_fit is None:
            return
        text = self.quick_fit(rows)
        if text:
            self._say(text)
        self.fit_is_current = True

    def note(self, text):
        """A one-line message."""
        self._say(text)
