"""Frame-interval bookkeeping in pure numpy (no window needed).

The presenter records the flip timestamp of every frame.  This module turns
runs of timestamps into a refresh-rate estimate and a running summary of
frame intervals over a session; dropped frames are counted by
:func:`runner.timing.audit_flips`, the same rule everywhere.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from runner.timing import FrameAudit


def estimate_refresh_hz(flip_times_s) -> float:
    """Refresh rate from successive flip timestamps.

    The median interval is used, so a few late frames (a hiccup of the
    operating system while measuring) do not bias the estimate.

    Parameters
    ----------
    flip_times_s : array_like
        At least three timestamps of successive flips, in seconds.

    Returns
    -------
    float
        ``1 / median(interval)`` in Hz.

    Raises
    ------
    ValueError
        With fewer than three timestamps or a non-positive median interval.
    """
    t = np.asarray(flip_times_s, dtype=float)
    if t.size < 3:
        raise ValueError(f"flip_times_s: expected at least 3 timestamps, got {t.size}")
    median = float(np.median(np.diff(t)))
    if not median > 0:
        raise ValueError("flip_times_s: timestamps do not increase")
    return 1.0 / median


@dataclass
class IntervalTally:
    """Running summary of frame intervals over many runs of flips.

    Each run (a trial) is added as its :class:`~runner.timing.FrameAudit`;
    the tally keeps counts, sums and the longest interval, so a long session
    costs no memory.

    Attributes
    ----------
    runs : int
        Runs added.
    runs_with_drops : int
        Runs in which at least one frame was dropped.
    intervals : int
        Frame intervals seen.
    dropped : int
        Frames dropped over all runs.
    longest_s : float
        Longest interval seen.
    """

    runs: int = 0
    runs_with_drops: int = 0
    intervals: int = 0
    dropped: int = 0
    longest_s: float = 0.0
    _sum: float = field(default=0.0, repr=False)
    _sum_sq: float = field(default=0.0, repr=False)

    def add(self, audit: FrameAudit) -> None:
        """Add one run's audit."""
        if audit.n_intervals == 0:
            return
        n = audit.n_intervals
        self.runs += 1
        self.runs_with_drops += int(audit.dropped > 0)
        self.intervals += n
        self.dropped += audit.dropped
        self.longest_s = max(self.longest_s, audit.longest_s)
        # Rebuild the run's sum of squares from its mean and (ddof=1) SD.
        self._sum += audit.mean_s * n
        self._sum_sq += audit.sd_s**2 * (n - 1) + n * audit.mean_s**2

    @property
    def mean_s(self) -> float:
        """Mean frame interval (0 before any interval)."""
        return self._sum / self.intervals if self.intervals else 0.0

    @property
    def sd_s(self) -> float:
        """Standard deviation of the frame intervals (ddof=1)."""
        n = self.intervals
        if n < 2:
            return 0.0
        var = (self._sum_sq - n * self.mean_s**2) / (n - 1)
        return math.sqrt(max(var, 0.0))

    def as_dict(self) -> dict:
        """JSON-ready summary, intervals in milliseconds."""
        return {
            "trials": self.runs,
            "trials_with_drops": self.runs_with_drops,
            "frame_intervals": self.intervals,
            "dropped_frames": self.dropped,
            "frame_interval_mean_ms": round(self.mean_s * 1e3, 4),
            "frame_interval_sd_ms": round(self.sd_s * 1e3, 4),
            "frame_interval_max_ms": round(self.longest_s * 1e3, 4),
        }
