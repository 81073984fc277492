"""A presenter without a screen: a virtual clock that advances frame by frame.

It shows nothing and never sleeps; each period adds its frames to the clock.
``simulate`` pairs it with a simulated observer, so a whole session runs in
a fraction of a second of real time through the same loop as on screen.
"""

from __future__ import annotations

from runner.plan import Playback, TrialPlan


class HeadlessPresenter:
    """A :class:`~runner.plan.Presenter` with a virtual clock.

    Parameters
    ----------
    refresh_hz : float
        Frames per virtual second.
    """

    def __init__(self, refresh_hz: float):
        self.refresh_hz = float(refresh_hz)
        self.frames = 0

    @property
    def clock_s(self) -> float:
        """Virtual seconds since the presenter started."""
        return self.frames / self.refresh_hz

    def show_text(self, text: str, wait: bool = True) -> bool:
        """Nothing to show; a simulated observer always continues."""
        return True

    def play(self, trial: TrialPlan) -> Playback:
        """Advance the clock through the trial's periods."""
        onset = offset = None
        for period in trial.periods:
            if period.role == "test":
                onset = self.clock_s
            self.frames += period.frames
            if period.role == "test":
                offset = self.clock_s
        n = sum(p.frames for p in trial.periods)
        end = self.clock_s
        return Playback(onset if onset is not None else end, offset if offset is not None else end, n, 0)

    def blank(self, frames: int) -> bool:
        """Advance the clock by ``frames``."""
        self.frames += int(frames)
        return True

    def feedback(self, correct: bool) -> None:
        """No feedback without a screen."""

    def requests(self) -> set[str]:
        """A simulation never pauses or quits by itself."""
        return set()

    def timing_summary(self) -> dict:
        """Frames shown on the virtual clock; nothing can drop."""
        return {"presenter": "headless", "refresh_hz": self.refresh_hz, "frames": self.frames, "dropped_frames": 0}

    def close(self) -> None:
        """Nothing to release."""
