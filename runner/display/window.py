"""The psychopy window: monitor geometry, colours, refresh measurement, pacing.

Geometry comes from the protocol's ``[display]``: a ``psychopy.monitors.Monitor``
is built in memory (width in cm, viewing distance, size in pixels) and never
saved, and the window works in degrees of visual angle.  Colours are given as
0..1 of the display's range (psychopy's ``rgb1`` colour space); the gamma
table of the operating system is left as it is.
"""

from __future__ import annotations

import time

from fitting.errors import InputError
from runner.display._psychopy import core, deg2pix, monitors, pyglet, visual
from runner.display.framestats import estimate_refresh_hz
from runner.protocol import Protocol

#: Window title; tests find the window by it.
WINDOW_TITLE = "aftershift"

#: Flips before measuring the refresh rate (the first ones are often slow).
WARM_UP_FRAMES = 10

#: A display whose flips come this many times faster than the protocol's
#: refresh rate is not synchronised to a vertical blank (no vsync, e.g. Xvfb);
#: the presenter then paces flips itself.
UNSYNCED_FACTOR = 1.5


def make_monitor(protocol: Protocol):
    """An in-memory psychopy monitor with the protocol's geometry.

    Parameters
    ----------
    protocol : Protocol

    Returns
    -------
    psychopy.monitors.Monitor
        Width ``display.screen_cm[0]``, distance ``display.distance_cm``,
        size ``display.screen_px``; no gamma, never saved to disk.
    """
    d = protocol.display
    monitor = monitors.Monitor("aftershift-display", width=d.screen_cm[0], distance=d.distance_cm, autoLog=False)
    monitor.setSizePix(list(d.screen_px))
    return monitor


def px_per_deg(monitor) -> float:
    """Pixels per degree as psychopy draws them on ``monitor``."""
    return float(deg2pix(1.0, monitor))


def _fit_window(screen_px: list[int]) -> list[int]:
    """The protocol's pixel size, shrunk (same aspect) to fit the screen we have."""
    screen = pyglet.canvas.get_display().get_default_screen()
    scale = min(1.0, 0.95 * screen.width / screen_px[0], 0.95 * screen.height / screen_px[1])
    return [max(64, int(screen_px[0] * scale)), max(64, int(screen_px[1] * scale))]


def open_window(protocol: Protocol, windowed: bool):
    """Open the observer's window.

    Parameters
    ----------
    protocol : Protocol
    windowed : bool
        A window of the protocol's pixel size (shrunk to fit the screen, the
        scale in pixels per degree unchanged) instead of full screen.

    Returns
    -------
    psychopy.visual.Window
        Units degrees, background ``display.background``, cursor hidden in
        full screen.

    Raises
    ------
    InputError
        Field ``display.screen_px`` when the full-screen picture does not have
        the protocol's pixel size (its geometry would be wrong).
    """
    d = protocol.display
    size = _fit_window(d.screen_px) if windowed else list(d.screen_px)
    win = visual.Window(
        size=size,
        fullscr=not windowed,
        allowGUI=windowed,
        monitor=make_monitor(protocol),
        units="deg",
        color=[d.background] * 3,
        colorSpace="rgb1",
        winType="pyglet",
        title=WINDOW_TITLE,
        checkTiming=False,
        waitBlanking=True,
        autoLog=False,
    )
    if not windowed:
        win.mouseVisible = False
        if list(win.size) != list(d.screen_px):
            shown = f"{win.size[0]} x {win.size[1]}"
            win.close()
            raise InputError(
                "", "display.screen_px",
                f"the screen shows {shown} px, the protocol says {d.screen_px[0]} x {d.screen_px[1]}; "
                "set the display to the protocol's resolution or correct [display]",
            )
    return win


def measure_refresh(win, refresh_hz: float) -> float:
    """Measure the refresh rate from flip timestamps of an empty screen.

    Parameters
    ----------
    win : psychopy.visual.Window
    refresh_hz : float
        The protocol's rate; about half a second of it is measured (at least
        60 intervals) after :data:`WARM_UP_FRAMES` flips.

    Returns
    -------
    float
        Measured rate in Hz (median interval).
    """
    for _ in range(WARM_UP_FRAMES):
        win.flip()
    n = max(60, round(0.5 * refresh_hz))
    return estimate_refresh_hz([win.flip() for _ in range(n + 1)])


def renderer_name() -> str:
    """The OpenGL renderer string (``llvmpipe`` and the like mean software)."""
    try:
        return str(pyglet.gl.gl_info.get_renderer())
    except Exception:  # noqa: BLE001 - informative only, never fatal
        return "unknown"


class FlipPacer:
    """Holds flips to a frame grid on a display without vsync.

    On a synchronised display ``frame_s`` is 0 and the pacer does nothing:
    the vertical blank paces the flips.  Without vsync (flips return at
    once, as under Xvfb) :meth:`wait` sleeps until the next slot of a grid
    one nominal frame apart, so that durations counted in frames still last
    their seconds.  A flip that comes more than half a frame late restarts
    the grid from that flip, as a display would show it at its next refresh.

    Parameters
    ----------
    frame_s : float
        The grid's period, 0 for none.
    """

    def __init__(self, frame_s: float = 0.0):
        self.frame_s = float(frame_s)
        self._due: float | None = None

    def wait(self) -> None:
        """Sleep until the next slot of the grid (session clock)."""
        if self.frame_s and self._due is not None:
            delay = self._due - core.getTime()
            if delay > 0:
                time.sleep(delay)

    def flipped(self, flip_s: float) -> None:
        """Note the time of the flip just done and schedule the next slot."""
        if not self.frame_s:
            return
        if self._due is None or flip_s - self._due > self.frame_s / 2:
            self._due = flip_s
        self._due += self.frame_s
