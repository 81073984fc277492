"""Dropped-frame detection and frame-interval bookkeeping with injected flip times.

No window: the flip timestamps are made here, so the expected counts are
exact.  The rule (the project's, issue 4): a frame interval over 1.5 nominal
intervals counts as dropped; an interval spanning ``m`` refreshes lost
``m - 1`` frames (common practice, no source).
"""

from __future__ import annotations

import numpy as np
import pytest

from runner.display.framestats import IntervalTally, estimate_refresh_hz
from runner.timing import DROPPED_FACTOR, audit_flips

HZ = 60.0
FRAME = 1.0 / HZ


def flips_from(intervals_in_frames, start=12.5):
    """Timestamps whose successive intervals are the given multiples of a frame."""
    return start + np.concatenate([[0.0], np.cumsum(np.asarray(intervals_in_frames) * FRAME)])




@pytest.mark.parametrize(
    ("intervals", "dropped"),
    [
        ([1] * 30, 0),
        ([1, 1, 2, 1], 1),  # one refresh missed
        ([1, 3, 1], 2),  # two missed
        ([1, 1.49, 1.49, 1], 0),  # late but under 1.5 frames: not dropped
        ([1, 1.51, 1], 1),  # just over 1.5 frames
        ([1, 2, 1, 3, 1, 1.49, 1.51, 5, 1], 1 + 2 + 0 + 1 + 4),
    ],
)
def test_dropped_frames_counted_exactly(intervals, dropped):
    assert DROPPED_FACTOR == 1.5
    audit = audit_flips(flips_from(intervals), HZ)
    assert audit.dropped == dropped
    assert audit.n_intervals == len(intervals)
    assert audit.longest_s == pytest.approx(max(intervals) * FRAME)


def test_tally_over_trials_matches_numpy_on_all_intervals():
    rng = np.random.default_rng(4)
    runs = [np.r_[1 + rng.normal(0, 0.02, 40), 2.0, 1 + rng.normal(0, 0.02, 9)], [1, 1, 1, 3, 1], [1] * 7]
    tally = IntervalTally()
    for intervals in runs:
        tally.add(audit_flips(flips_from(intervals), HZ))
    every = np.concatenate([np.asarray(r, float) for r in runs]) * FRAME
    assert tally.intervals == every.size
    assert tally.dropped == 1 + 2
    assert tally.runs == 3 and tally.runs_with_drops == 2
    # reference: numpy's mean and sample SD over all intervals at once
    assert tally.mean_s == pytest.approx(every.mean(), rel=1e-9)
    assert tally.sd_s == pytest.approx(every.std(ddof=1), rel=1e-6)
    assert tally.longest_s == pytest.approx(every.max())
    summary = tally.as_dict()
    assert summary["dropped_frames"] == 3 and summary["trials_with_drops"] == 2
    assert summary["frame_interval_max_ms"] == pytest.approx(3 * FRAME * 1e3, abs=1e-3)


def test_refresh_estimate_ignores_a_few_late_frames():
    rng = np.random.default_rng(1)
    intervals = 1 + rng.normal(0, 0.01, 120)
    intervals[[10, 50, 90]] = [2.0, 3.0, 2.0]
    assert estimate_refresh_hz(flips_from(intervals)) == pytest.approx(HZ, rel=0.005)
    with pytest.raises(ValueError, match="at least 3"):
        estimate_refresh_hz([0.0, 0.01])
    with pytest.raises(ValueError, match="do not increase"):
        estimate_refresh_hz([1.0, 1.0, 1.0])
