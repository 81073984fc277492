"""Values that describe what a trial shows and what came back from it.

These small frozen dataclasses are the language between the schedule, the
session loop, the presenters (headless and on screen), the response sources
and the safety screening.  They hold no behaviour beyond simple derived
properties.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, Protocol as Interface

from runner.protocol import Protocol, frame_plan

#: What a period shows.  ``motion``: dots moving in ``direction_deg``;
#: ``static``: dots without displacement (baseline); ``blank``: fixation mark
#: only, no dots.
PeriodLook = Literal["motion", "static", "blank"]

#: Why a period is there.
PeriodRole = Literal["first_adaptation", "adapter", "baseline", "intervening", "gap", "test", "answer", "pause"]


@dataclass(frozen=True)
class Period:
    """One stretch of frames with a single look.

    Attributes
    ----------
    role : str
        One of :data:`PeriodRole`.
    look : str
        One of :data:`PeriodLook`.
    frames : int
        Duration in frames.
    direction_deg : float or None
        Motion direction (counter-clockwise from rightward) for ``motion``.
    offset_deg : float or None
        The same direction as a signed offset from the reference
        (positive = clockwise).
    """

    role: PeriodRole
    look: PeriodLook
    frames: int
    direction_deg: float | None = None
    offset_deg: float | None = None


def offset_to_direction(reference_deg: float, offset_deg: float) -> float:
    """Direction (ccw from rightward, 0..360) of a clockwise-positive offset."""
    return (reference_deg - offset_deg) % 360.0


def motion(role: PeriodRole, frames: int, reference_deg: float, offset_deg: float) -> Period:
    """A motion period at ``offset_deg`` from the reference."""
    return Period(role, "motion", frames, offset_to_direction(reference_deg, offset_deg), float(offset_deg))


def trial_periods(
    protocol: Protocol,
    adapter_offset_deg: float | None,
    intervening_offsets_deg: tuple[float, ...],
    test_offset_deg: float,
) -> tuple[Period, ...]:
    """The stimulus periods of one adapt–test trial, in order.

    Parameters
    ----------
    protocol : Protocol
    adapter_offset_deg : float or None
        None for the baseline: the adapter is replaced by static dots or a
        blank (``design.baseline``), and no intervening periods follow.
    intervening_offsets_deg : tuple of float
        One offset per intervening period (its length is the lag).
    test_offset_deg : float
        Test direction as an offset from the reference.

    Returns
    -------
    tuple of Period
        Adapter (or baseline stand-in), then for each intervening period a gap
        (if ``timing.gap_s`` > 0) and the period, then a gap and the test.
        The answer window and pause are added by the session loop.
    """
    frames = frame_plan(protocol)
    ref = protocol.reference_deg
    out: list[Period] = []
    if adapter_offset_deg is None:
        out.append(Period("baseline", protocol.design.baseline, frames["adapter_s"].frames))
    else:
        out.append(motion("adapter", frames["adapter_s"].frames, ref, adapter_offset_deg))
    gap = frames["gap_s"].frames
    for offset in intervening_offsets_deg:
        if gap:
            out.append(Period("gap", "blank", gap))
        out.append(motion("intervening", frames["period_s"].frames, ref, offset))
    if gap:
        out.append(Period("gap", "blank", gap))
    out.append(motion("test", frames["test_s"].frames, ref, test_offset_deg))
    return tuple(out)


@dataclass(frozen=True)
class TrialPlan:
    """Everything needed to present one trial.

    Attributes
    ----------
    index : int
        1-based position in the session (the log's ``trial`` column).
    condition : str
        ``baseline`` or e.g. ``adapt+15_lag2`` (practice trials too: see ``practice``).
    adapter_offset_deg : float or None
        None for baseline trials.
    lag : int or None
        Intervening periods; None for baseline trials.
    track : int or None
        Adaptive track within the condition (0-based); None for practice.
    test_offset_deg : float
        The level chosen for this trial.
    intervening_offsets_deg : tuple of float
    practice : bool
    periods : tuple of Period
    dots_seed : tuple of int
        Seed words for this trial's dot field (reproducible on resume).
    """

    index: int
    condition: str
    adapter_offset_deg: float | None
    lag: int | None
    track: int | None
    test_offset_deg: float
    intervening_offsets_deg: tuple[float, ...]
    practice: bool
    periods: tuple[Period, ...]
    dots_seed: tuple[int, ...] = ()

    @property
    def test_direction_deg(self) -> float:
        """Direction of the test period."""
        return next(p.direction_deg for p in self.periods if p.role == "test")


@dataclass(frozen=True)
class Playback:
    """What a presenter reports after showing a trial's periods.

    Attributes
    ----------
    test_onset_s : float
        Session-clock time of the first test frame's flip.
    test_offset_s : float
        Session-clock time of the flip that ended the test.
    n_frames : int
        Frames shown.
    dropped_frames : int
        Frames lost (intervals over 1.5 nominal frames).
    aborted : bool
        The quit key was pressed during the periods; the trial is not logged.
    """

    test_onset_s: float
    test_offset_s: float
    n_frames: int
    dropped_frames: int
    aborted: bool = False

    @property
    def timing_ok(self) -> bool:
        """True when no frame was dropped."""
        return self.dropped_frames == 0


@dataclass(frozen=True)
class Answer:
    """An observer's answer to one trial.

    Attributes
    ----------
    response_cw : int or None
        1 = clockwise, 0 = counter-clockwise, None = no answer in time.
    rt_s : float or None
        Seconds from test onset to the key press.
    quit : bool
        The quit key was pressed instead of an answer.
    """

    response_cw: int | None
    rt_s: float | None
    quit: bool = False


class Presenter(Interface):
    """Shows trials.  Implemented headless (virtual clock) and on screen.

    The session loop calls these methods only; nothing else about the
    display leaks into it.
    """

    def show_text(self, text: str, wait: bool = True) -> bool:
        """Show a message (instructions, caution, break, end).

        With ``wait`` it stays until the proceed key; returns False if the
        quit key was pressed instead, True otherwise.
        """

    def play(self, trial: TrialPlan) -> Playback:
        """Show the trial's periods frame by frame and report their timing."""

    def blank(self, frames: int) -> bool:
        """Show the fixation mark alone for ``frames`` frames; False on quit."""

    def feedback(self, correct: bool) -> None:
        """Brief feedback after a practice answer."""

    def requests(self) -> set[str]:
        """Return and clear keys asked for between trials: ``pause``, ``quit``."""

    def timing_summary(self) -> dict:
        """Refresh rate, frame-interval statistics and dropped frames so far."""

    def close(self) -> None:
        """Release the display."""


class AnswerSource(Interface):
    """Where answers come from: a simulated observer or the keyboard."""

    def answer(self, trial: TrialPlan, playback: Playback, window_frames: int) -> Answer:
        """Wait for (or simulate) the answer to a trial just shown.

        ``window_frames`` is the answer window after the test ends.
        """
