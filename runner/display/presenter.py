"""The on-screen presenter and the keyboard as a source of answers.

:class:`ScreenPresenter` implements :class:`runner.plan.Presenter` with a
psychopy window; :class:`KeyboardAnswers` implements
:class:`runner.plan.AnswerSource` with the observer at the keyboard.  Both
run frame by frame: every period lasts exactly its number of frames, every
flip is timestamped, and a frame interval over
:data:`runner.timing.DROPPED_FACTOR` nominal intervals counts as dropped.

Times are on one session clock, psychopy's monotonic clock
(``psychopy.core.monotonicClock``): ``Window.flip`` returns it and key
presses are stamped on it.

Keys
----
Key presses are read from the window's own key events through
``psychopy.event.getKeys(timeStamped=True)``: each press is stamped when
the window's events are dispatched, which psychopy does at the start of
every flip, so a time stamp is exact to one frame.  (Without its optional low-latency backend,
``psychopy.hardware.keyboard.Keyboard`` falls back to the same events, but in
this version reports each press's name as a ``[name, time]`` pair and its
time as the moment it was polled; reading the events directly avoids both.)
The same events carry synthetic key presses sent by ``xdotool`` under Xvfb,
which the tests rely on.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from runner import safety
from runner.display._psychopy import event, version as psychopy_version
from runner.display.framestats import IntervalTally
from runner.display.scene import Scene
from runner.display.window import (
    UNSYNCED_FACTOR,
    FlipPacer,
    measure_refresh,
    open_window,
    px_per_deg,
    renderer_name,
)
from runner.dots import DotField, DotSpec
from runner.plan import Answer, Period, Playback, TrialPlan
from runner.protocol import Protocol
from runner.timing import audit_flips

#: How long practice feedback stays (s, rounded to frames).
FEEDBACK_S = 0.3

#: How long a text shown without waiting (the end screen) stays (s).
TEXT_HOLD_S = 1.5

#: A key press: psychopy key name and session-clock time (s).
PressedKey = tuple[str, float]


@dataclass(frozen=True)
class RefreshCheck:
    """The refresh rate measured when the window opened.

    Attributes
    ----------
    protocol_hz : float
        ``display.refresh_hz``.
    measured_hz : float
        Measured from flip timestamps.
    overridden : bool
        The rates differ by more than the tolerance and the experimenter ran
        anyway with the override option.
    paced : bool
        Flips were not synchronised to the display (no vsync): the presenter
        holds each flip to one nominal frame itself.
    """

    protocol_hz: float
    measured_hz: float
    overridden: bool
    paced: bool


def dot_spec(protocol: Protocol) -> DotSpec:
    """The protocol's dot field at its nominal refresh rate."""
    d = protocol.dots
    return DotSpec(
        aperture_radius_deg=d.aperture_radius_deg,
        density_per_deg2=d.density_per_deg2,
        dot_size_deg=d.dot_size_deg,
        speed_deg_s=d.speed_deg_s,
        coherence=d.coherence,
        lifetime_frames=d.lifetime_frames,
        refresh_hz=protocol.display.refresh_hz,
    )


class ScreenPresenter:
    """Shows trials in a psychopy window (a :class:`runner.plan.Presenter`).

    Made by :func:`open_screen`, which opens the window and measures the
    refresh rate first.

    Parameters
    ----------
    protocol : Protocol
    win : psychopy.visual.Window
        From :func:`runner.display.window.open_window`.
    scene : Scene
        The stimuli of ``win``.
    refresh : RefreshCheck

    Attributes
    ----------
    window : psychopy.visual.Window
    refresh_hz : float
        The protocol's (nominal) refresh rate.
    measured_hz : float
        The measured one.
    frame_hook : callable or None
        If set, called as ``frame_hook(period, frame_index)`` right after
        each flip of :meth:`play` (to grab the picture or send a trigger).
    """

    def __init__(self, protocol: Protocol, win, scene: Scene, refresh: RefreshCheck):
        self.protocol = protocol
        self.window = win
        self.refresh = refresh
        self.refresh_hz = float(protocol.display.refresh_hz)
        self.measured_hz = float(refresh.measured_hz)
        self.scene = scene
        self.keys = protocol.keys
        self.frame_hook: Callable[[Period, int], None] | None = None
        self._spec = dot_spec(protocol)
        self._pacer = FlipPacer(1.0 / self.refresh_hz if refresh.paced else 0.0)
        self._pending: set[str] = set()
        self._test_keys: list[PressedKey] = []
        self._tally = IntervalTally()
        self._closed = False
        event.clearEvents()

    # -- frames and keys ------------------------------------------------------
    def _flip(self) -> tuple[float, list[PressedKey]]:
        """Flip (paced if needed); return the flip time and new key presses."""
        self._pacer.wait()
        t = self.window.flip()
        self._pacer.flipped(t)
        return t, self._read_keys()

    def _read_keys(self) -> list[PressedKey]:
        """New key presses; the window's close button (``--windowed``) counts as the quit key."""
        keys = [(str(name), float(t)) for name, t in event.getKeys(timeStamped=True)]
        handle = self.window.winHandle
        if getattr(handle, "has_exit", False):      # set by the window's default close handler
            handle.has_exit = False
            keys.append((self.keys.quit, keys[-1][1] if keys else 0.0))
        return keys

    def _quit_kept(self) -> bool:
        """True, once, for a quit key pressed during :meth:`feedback` (which cannot stop anything itself)."""
        if "quit" in self._pending:
            self._pending.discard("quit")
            return True
        return False

    def _drain(self) -> bool:
        """Drop keys pressed while nothing listened; note pause; True on quit (pressed now or kept)."""
        quit_pressed = self._quit_kept()
        for name, _ in self._read_keys():
            if name == self.keys.quit:
                quit_pressed = True
            elif name == self.keys.pause:
                self._pending.add("pause")
        return quit_pressed

    def hold_fixation(self, frames: int, answer_keys: tuple[str, ...] = ()) -> PressedKey | None:
        """Show the fixation mark alone for up to ``frames`` frames.

        Parameters
        ----------
        frames : int
        answer_keys : tuple of str
            Keys that end the wait early.

        Returns
        -------
        (str, float) or None
            The quit key or the first of ``answer_keys`` pressed, with its
            time; None when the frames ran out.  The pause key is noted for
            :meth:`requests`.
        """
        for _ in range(int(frames)):
            self.scene.draw(None)
            _, keys = self._flip()
            for name, t in keys:
                if name == self.keys.quit or name in answer_keys:
                    return name, t
                if name == self.keys.pause:
                    self._pending.add("pause")
        return None

    def take_test_keys(self) -> list[PressedKey]:
        """Answer keys pressed from the onset of the last test until :meth:`play` returned."""
        keys, self._test_keys = self._test_keys, []
        return keys

    # -- the Presenter interface ---------------------------------------------
    def show_text(self, text: str, wait: bool = True) -> bool:
        """Show dim text until the proceed key (or, without ``wait``, for a moment).

        Returns
        -------
        bool
            False if the quit key was pressed, True otherwise.
        """
        if self._drain():
            return False
        self.scene.set_text(text)
        frames = round(TEXT_HOLD_S * self.refresh_hz)
        shown = 0
        while wait or shown < frames:
            self.scene.draw(None, fixation=False, show_text=True)
            _, keys = self._flip()
            shown += 1
            names = {name for name, _ in keys}
            if self.keys.quit in names:
                return False
            if self.keys.proceed in names:
                return True
        return True

    def play(self, trial: TrialPlan) -> Playback:
        """Show the trial's periods, each for exactly its frames.

        A lead-in flip of the fixation mark comes first (it sets the frame
        phase; its interval is not audited), and a flip of the fixation mark
        after the last period ends the test: that flip's time is the test
        offset, and it is the first frame of the answer window.

        Returns
        -------
        Playback
            Onset and offset of the test on the session clock, frames shown,
            frames dropped (from the lead-in flip to the offset flip), and
            ``aborted`` if the quit key was pressed (the trial stops at once).
        """
        field = DotField(self._spec, np.random.default_rng(list(trial.dots_seed)))
        self._test_keys = []
        aborted = self._drain()
        self.scene.draw(None)
        t, keys = self._flip()
        aborted = self._note_keys(keys, None) or aborted
        flips = [t]
        onset = None
        shown = 0
        for period in trial.periods:
            if aborted:
                break
            if period.look != "blank":
                field.start_period(period.direction_deg if period.look == "motion" else None)
            is_test = period.role == "test"
            for i in range(period.frames):
                positions = field.step() if period.look != "blank" else None
                self.scene.draw(positions, patch=is_test)
                t, keys = self._flip()
                flips.append(t)
                shown += 1
                if is_test and i == 0:
                    onset = t
                if self.frame_hook is not None:
                    self.frame_hook(period, i)
                if self._note_keys(keys, onset):
                    aborted = True
                    break
        if not aborted:
            self.scene.draw(None)
            t, keys = self._flip()
            flips.append(t)
            aborted = self._note_keys(keys, onset)
        audit = audit_flips(flips, self.refresh_hz)
        self._tally.add(audit)
        return Playback(
            test_onset_s=onset if onset is not None else t,
            test_offset_s=t,
            n_frames=shown,
            dropped_frames=audit.dropped,
            aborted=aborted,
        )

    def _note_keys(self, keys: list[PressedKey], test_onset: float | None) -> bool:
        """Keys during a trial: keep answers from the test onset on; True on quit."""
        for name, t in keys:
            if name == self.keys.quit:
                return True
            if name == self.keys.pause:
                self._pending.add("pause")
            elif name in (self.keys.cw, self.keys.ccw) and test_onset is not None and t >= test_onset:
                self._test_keys.append((name, t))
        return False

    def blank(self, frames: int) -> bool:
        """Show the fixation mark alone for ``frames`` frames; False on the quit key (or one kept)."""
        if self._quit_kept():
            return False
        return self.hold_fixation(frames) is None

    def feedback(self, correct: bool) -> None:
        """A brief, dim sign after a practice answer.

        Right: a thin ring around the fixation mark.  Wrong: the mark goes off.
        Both last :data:`FEEDBACK_S`; the quit key is kept, and the next
        :meth:`blank`, :meth:`show_text`, :meth:`play` or :meth:`requests`
        obeys it at once.
        """
        for _ in range(max(1, round(FEEDBACK_S * self.refresh_hz))):
            self.scene.draw(None, fixation=correct, ring=correct)
            _, keys = self._flip()
            for name, _ in keys:
                if name == self.keys.quit:
                    self._pending.add("quit")
                elif name == self.keys.pause:
                    self._pending.add("pause")

    def requests(self) -> set[str]:
        """Return and clear ``pause`` and ``quit`` asked for since the last call."""
        if self._drain():
            self._pending.add("quit")
        asked, self._pending = self._pending, set()
        return asked

    def timing_summary(self) -> dict:
        """Refresh rates, frame-interval statistics and dropped frames of all trials so far."""
        win = self.window
        return {
            "presenter": "screen",
            "refresh_hz": self.refresh_hz,
            "measured_refresh_hz": round(self.measured_hz, 3),
            "refresh_override": self.refresh.overridden,
            "paced_without_vsync": self.refresh.paced,
            **self._tally.as_dict(),
            "window_px": [int(win.size[0]), int(win.size[1])],
            "fullscreen": bool(win.fullscr),
            "px_per_deg": round(px_per_deg(win.monitor), 4),
            "renderer": renderer_name(),
            "keyboard": "window key events (psychopy.event), stamped at each flip",
            "psychopy": psychopy_version,
        }

    def close(self) -> None:
        """Close the window (once)."""
        if not self._closed:
            self._closed = True
            self.window.close()


class KeyboardAnswers:
    """Answers from the keyboard (a :class:`runner.plan.AnswerSource`).

    Parameters
    ----------
    presenter : ScreenPresenter
        The window the observer looks at; it shows the fixation mark while
        the answer is awaited.
    """

    def __init__(self, presenter: ScreenPresenter):
        self.presenter = presenter

    def answer(self, trial: TrialPlan, playback: Playback, window_frames: int) -> Answer:
        """Wait for the clockwise or counter-clockwise key.

        Keys pressed during the test count.  Otherwise the fixation mark
        stays up, flipping frame by frame, until an answer key or the end of
        the answer window (``window_frames`` from the end of the test, the
        offset flip of :meth:`ScreenPresenter.play` being the first).

        Returns
        -------
        Answer
            ``response_cw`` 1 for the clockwise key, 0 for the other, None if
            the window ran out; ``rt_s`` from test onset; ``quit`` for the
            quit key.
        """
        keys = self.presenter.keys
        early = self.presenter.take_test_keys()
        press = early[0] if early else self.presenter.hold_fixation(max(window_frames - 1, 0), (keys.cw, keys.ccw))
        if press is None:
            return Answer(None, None)
        name, t = press
        if name == keys.quit:
            return Answer(None, None, quit=True)
        return Answer(int(name == keys.cw), round(t - playback.test_onset_s, 6))


def open_measured_scene(protocol: Protocol, windowed: bool):
    """Open the window, prepare the scene and measure the refresh rate.

    Every stimulus is drawn once off screen first, so the first measured
    frame is not a late one.  The window is closed again if any step fails.

    Returns
    -------
    (window, Scene, float)
        The psychopy window, its scene and the measured refresh rate (Hz).
    """
    win = open_window(protocol, windowed)
    try:
        scene = Scene(win, protocol)
        scene.warm_up()
        return win, scene, measure_refresh(win, float(protocol.display.refresh_hz))
    except BaseException:
        win.close()
        raise


def open_screen(protocol: Protocol, windowed: bool, allow_refresh_mismatch: bool, console=None):
    """Open the observer's screen for a session.

    Parameters
    ----------
    protocol : Protocol
    windowed : bool
        A window (tests, piloting) instead of full screen.
    allow_refresh_mismatch : bool
        Run even if the measured refresh rate is more than the tolerance of
        :func:`runner.safety.check_refresh` away from ``display.refresh_hz``
        (the experimenter's explicit override, recorded in the timing summary).
    console : runner.session.Console, optional
        Told the measured refresh rate.

    Returns
    -------
    (ScreenPresenter, KeyboardAnswers)

    Raises
    ------
    runner.safety.SafetyRefusal
        The refresh rate differs and no override was given (exit 3).
    fitting.errors.InputError
        Full screen at a pixel size other than ``display.screen_px`` (exit 2).
    """
    hz = float(protocol.display.refresh_hz)
    win, scene, measured = open_measured_scene(protocol, windowed)
    try:
        refusal = safety.check_refresh(measured, hz)
        if refusal is not None and not allow_refresh_mismatch:
            raise refusal
        check = RefreshCheck(hz, measured, refusal is not None, refusal is not None and measured > UNSYNCED_FACTOR * hz)
        presenter = ScreenPresenter(protocol, win, scene, check)
    except BaseException:
        win.close()
        raise
    if console is not None:
        note = f"display: measured {measured:.2f} Hz, protocol {hz:g} Hz"
        if check.overridden:
            note += f" (mismatch run anyway with {safety.REFRESH_OVERRIDE_OPTION}"
            note += "; flips paced in software, no vsync)" if check.paced else ")"
        console.note(note)
    return presenter, KeyboardAnswers(presenter)
