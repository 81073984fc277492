"""The observer's screen: psychopy window, dots, frame-locked periods, keyboard.

This package is the only part of aftershift that imports psychopy, and it does
so only when a window is opened: importing ``runner.display`` itself loads no
psychopy, so ``simulate``, ``fit``, ``check`` and the test suite run without
a screen.

Entry points for the command line
---------------------------------
:func:`open_screen`
    ``aftershift run``: opens the window, measures the refresh rate, refuses
    a mismatch unless overridden, and returns the presenter and the keyboard
    answer source for :class:`runner.session.BlockRun`.
:func:`display_test`
    ``aftershift display-test``: frame timing while the protocol's full dot
    field is drawn, a verdict and a JSON report.

Modules
-------
``_psychopy``    the single psychopy import (keeps psychopy's files out of the home folder)
``window``       window, in-memory monitor geometry, refresh measurement, flip pacing
``scene``        the stimuli: dot field, fixation mark, feedback ring, text, light patch
``presenter``    :class:`~runner.display.presenter.ScreenPresenter`, :class:`~runner.display.presenter.KeyboardAnswers`
``selftest``     :func:`display_test`
``framestats``   refresh estimate and frame-interval tally (pure numpy)

Keyboard
--------
Keys are read from the window's own key events (``psychopy.event``), each
stamped on the session clock when psychopy dispatches the window's events at
the start of a flip: times are exact to one frame.  This works with or
without psychopy's optional low-latency keyboard backend, and it is what sees synthetic key presses from
``xdotool`` under Xvfb.  psychopy's ``hardware.keyboard.Keyboard`` is not
used: without that optional backend it falls back to the same events but, in psychopy
2026.2, reports a press's name as a ``[name, time]`` pair and its time as
the moment of polling.  See :mod:`runner.display.presenter`.

psychopy's own files
--------------------
Importing psychopy creates ``~/.psychopy3`` with a monitor file; here it is
imported with ``HOME`` pointing at a temporary folder removed at exit (see
:mod:`runner.display._psychopy`).  The monitor is built in memory from
``[display]`` and never saved; the gamma table is left alone.

Displays without vsync
----------------------
Under Xvfb (and on some windowed desktops) ``flip`` does not wait for a
vertical blank and returns at once, several hundred times a second.  The
refresh check then refuses the session unless the experimenter passes the
override option; with the override the presenter holds every flip to one
nominal frame itself (``paced_without_vsync`` in the timing summary), so
periods still last their seconds and answer windows stay usable.
"""

from __future__ import annotations

from fitting.errors import InputError

#: Shortest display test that gets a verdict (s): 60 frame intervals at 60 Hz (common practice, no source).
MIN_TEST_S = 1.0
#: Longest display test (s).
MAX_TEST_S = 3600.0


def check_seconds(seconds) -> None:
    """Refuse a display test's ``--seconds`` outside :data:`MIN_TEST_S`..:data:`MAX_TEST_S` (or not a number)."""
    if not (isinstance(seconds, (int, float)) and MIN_TEST_S <= seconds <= MAX_TEST_S):   # False for nan
        raise InputError("argument", "--seconds", f"expected a duration from {MIN_TEST_S:g} to {MAX_TEST_S:g} s, "
                         f"not {seconds!r}")


def open_screen(protocol, windowed: bool, allow_refresh_mismatch: bool, console=None):
    """Open the observer's screen; see :func:`runner.display.presenter.open_screen`."""
    from runner.display.presenter import open_screen as _open_screen

    return _open_screen(protocol, windowed, allow_refresh_mismatch, console)


def display_test(protocol=None, seconds: float = 10.0, windowed: bool = False, report_path=None,
                 screening: dict | None = None) -> dict:
    """Measure frame timing on this display; see :func:`runner.display.selftest.display_test`."""
    from runner.display.selftest import display_test as _display_test

    return _display_test(protocol, seconds, windowed, report_path, screening=screening)
