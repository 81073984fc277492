"""Seconds and frames at a refresh rate.

Everything that is shown runs as a whole number of video frames.  A protocol
states durations in seconds; this module converts them, refuses durations
that the display cannot deliver, and proposes the nearest durations it can.
It also finds dropped frames in a list of flip timestamps.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: A duration is realisable when a whole number of frames lies this close (s).
FRAME_TOLERANCE_S = 0.0005

#: A frame interval longer than this many nominal intervals counts as dropped.
DROPPED_FACTOR = 1.5


@dataclass(frozen=True)
class FrameCount:
    """A duration realised as whole frames.

    Attributes
    ----------
    frames : int
        Number of frames.
    seconds : float
        The exact duration those frames last at the refresh rate.
    requested_s : float
        The duration that was asked for.
    """

    frames: int
    seconds: float
    requested_s: float

    @property
    def error_s(self) -> float:
        """Realised minus requested duration, in seconds."""
        return self.seconds - self.requested_s


def nearest_valid_s(seconds: float, refresh_hz: float) -> tuple[float, float]:
    """Return the realisable durations just below and just above ``seconds``.

    Parameters
    ----------
    seconds : float
        Requested duration.
    refresh_hz : float
        Display refresh rate.

    Returns
    -------
    (float, float)
        Durations of ``floor`` and ``ceil`` whole frames, in seconds (the
        lower one is never below one frame unless ``seconds`` is 0).
    """
    exact = seconds * refresh_hz
    low, high = math.floor(exact), math.ceil(exact)
    if seconds > 0:
        low = max(low, 1)
        high = max(high, 1)
    return low / refresh_hz, high / refresh_hz


def to_frames(seconds: float, refresh_hz: float) -> FrameCount | None:
    """Convert a duration to frames, or return None if it is not realisable.

    Parameters
    ----------
    seconds : float
        Requested duration (>= 0).
    refresh_hz : float
        Display refresh rate (> 0).

    Returns
    -------
    FrameCount or None
        None when no whole number of frames lies within
        :data:`FRAME_TOLERANCE_S` of the request, or when a positive
        duration would round to zero frames.
    """
    frames = int(round(seconds * refresh_hz))
    realised = frames / refresh_hz
    if abs(realised - seconds) > FRAME_TOLERANCE_S or (seconds > 0 and frames == 0):
        return None
    return FrameCount(frames=frames, seconds=realised, requested_s=seconds)


def describe_refusal(seconds: float, refresh_hz: float) -> str:
    """Say why a duration is refused and which values would be accepted."""
    low, high = nearest_valid_s(seconds, refresh_hz)
    frame_ms = 1000.0 / refresh_hz
    choices = sorted({round(low, 6), round(high, 6)})
    listed = " or ".join(f"{c:g}" for c in choices)
    return (
        f"{seconds:g} s is not a whole number of frames at {refresh_hz:g} Hz "
        f"(one frame = {frame_ms:.3f} ms); use {listed}"
    )


@dataclass(frozen=True)
class FrameAudit:
    """Dropped frames found in a run of flip timestamps.

    Attributes
    ----------
    n_intervals : int
        Number of frame intervals examined.
    dropped : int
        Frames lost: an interval of ``m`` nominal frames (rounded) that
        exceeds :data:`DROPPED_FACTOR` nominal intervals counts ``m - 1``.
    longest_s : float
        The longest interval seen.
    mean_s, sd_s : float
        Mean and standard deviation of the intervals.
    """

    n_intervals: int
    dropped: int
    longest_s: float
    mean_s: float
    sd_s: float


def audit_flips(flip_times_s, refresh_hz: float) -> FrameAudit:
    """Count dropped frames in a sequence of flip timestamps.

    Parameters
    ----------
    flip_times_s : array_like
        Timestamps of successive flips, in seconds.
    refresh_hz : float
        Nominal refresh rate.

    Returns
    -------
    FrameAudit
    """
    t = np.asarray(flip_times_s, dtype=float)
    if t.size < 2:
        return FrameAudit(0, 0, 0.0, 0.0, 0.0)
    dt = np.diff(t)
    nominal = 1.0 / refresh_hz
    late = dt > DROPPED_FACTOR * nominal
    lost = np.maximum(np.rint(dt[late] / nominal) - 1, 1).astype(int)
    return FrameAudit(
        n_intervals=int(dt.size),
        dropped=int(lost.sum()),
        longest_s=float(dt.max()),
        mean_s=float(dt.mean()),
        sd_s=float(dt.std(ddof=1)) if dt.size > 1 else 0.0,
    )
