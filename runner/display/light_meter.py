"""The measurement screen of ``aftershift measure-light``.

The window shows nothing but the light to be measured: a central square
patch of ``patch_deg`` on the protocol's background, or the full field, at
one grey level (or one gun alone) after another, in the random order of
:func:`runner.measure_light.measurement_steps`.  No text is drawn on the
display, so no light but the patch's reaches the photometer; everything the
experimenter reads is on the console (the terminal).

Keys (typed while the window has the focus, echoed on the console):
digits and a decimal point (or comma) type the reading in cd/m²,
Backspace corrects, Enter accepts it and shows the next patch, Escape stops
(every accepted reading is already on disk; ``--resume`` continues).
Before the first patch a full-level patch is shown to aim the photometer;
Enter starts.
"""

from __future__ import annotations

import sys

from fitting.errors import InputError
from runner import safety
from runner.display._psychopy import event, visual
from runner.display.window import UNSYNCED_FACTOR, FlipPacer, measure_refresh, open_window
from runner.measure_light import ReadingsLog, Step, parse_reading, typed_character
from runner.protocol import Protocol

ACCEPT = ("return", "num_enter")
ERASE = ("backspace",)
STOP = "escape"


class LightMeterScreen:
    """The patch and the keyboard of one measurement session.

    Parameters
    ----------
    protocol : Protocol
        Geometry and background (``display.background`` is the surround).
    windowed : bool
        A window instead of full screen.
    patch_deg : float or None
        Side of the central square in degrees; None for the full field.
    stream : file-like
        The console (default standard output).
    """

    def __init__(self, protocol: Protocol, windowed: bool, patch_deg: float | None, stream=None):
        self.stream = stream or sys.stdout
        self.protocol = protocol
        self.win = open_window(protocol, windowed)
        try:
            width_deg, height_deg = protocol.display.extent_deg
            if patch_deg is not None and not (0 < patch_deg <= min(width_deg, height_deg)):
                raise InputError("argument", "--patch-deg",
                                 f"expected a patch from 0 to {min(width_deg, height_deg):.1f} deg (the screen's height)")
            side = (patch_deg, patch_deg) if patch_deg is not None else (2 * width_deg, 2 * height_deg)
            self.patch = visual.Rect(self.win, width=side[0], height=side[1], units="deg", pos=(0, 0),
                                     fillColor=[1.0, 1.0, 1.0], lineWidth=0, colorSpace="rgb1", autoLog=False)
            hz = float(protocol.display.refresh_hz)
            self.measured_hz = measure_refresh(self.win, hz)
            # Without vsync (a virtual display) hold flips to the nominal rate instead of spinning.
            self._pacer = FlipPacer(1.0 / hz if self.measured_hz > UNSYNCED_FACTOR * hz else 0.0)
        except BaseException:
            self.win.close()
            raise

    def say(self, text: str, end: str = "\n") -> None:
        """Write to the console at once."""
        self.stream.write(text + end)
        self.stream.flush()

    def show(self, rgb) -> None:
        """Draw the patch in ``rgb`` (0..1 per gun) and flip."""
        self.patch.fillColor = list(rgb)
        self.patch.draw()
        self._pacer.wait()
        self._pacer.flipped(self.win.flip())

    def type_number(self, rgb) -> float | None:
        """Show the patch until a reading is typed and accepted; None on Escape."""
        typed = ""
        event.clearEvents()
        while True:
            self.show(rgb)
            for name in event.getKeys():
                if name == STOP:
                    self.say("")
                    return None
                character = typed_character(name)
                if character:
                    typed += character
                    self.say(character, end="")
                elif name in ERASE and typed:
                    typed = typed[:-1]
                    self.say("\b \b", end="")
                elif name in ACCEPT:
                    value = parse_reading(typed)
                    if value is not None:
                        self.say(f"  -> {value:g} cd/m2")
                        return value
                    self.say(f"  -> {typed!r} is not a reading in cd/m2 (0 or more); type it again: ", end="")
                    typed = ""

    def wait_for_enter(self, rgb) -> bool:
        """Show the patch until Enter (True) or Escape (False)."""
        event.clearEvents()
        while True:
            self.show(rgb)
            keys = event.getKeys()
            if STOP in keys:
                return False
            if any(k in ACCEPT for k in keys):
                return True

    def close(self) -> None:
        """Close the window."""
        self.win.close()


def measure(protocol: Protocol, steps: list[Step], todo: list[Step], log: ReadingsLog, windowed: bool,
            patch_deg: float | None, stream=None) -> tuple[bool, float]:
    """Run the measurement screen over ``todo``, the ``steps`` not yet in ``log``.

    Returns
    -------
    (bool, float or None)
        Whether every step was measured (False after Escape) and the refresh
        rate to record in the profile (Hz): the measured one, or None when it
        is not the protocol's ``display.refresh_hz`` (within the tolerance of
        :func:`runner.safety.check_refresh`), which the console then says.
    """
    screen = LightMeterScreen(protocol, windowed, patch_deg, stream)
    try:
        measured, hz = screen.measured_hz, float(protocol.display.refresh_hz)
        recorded = measured if safety.check_refresh(measured, hz) is None else None
        screen.say(f"display: {measured:.2f} Hz measured; surround grey level "
                   f"{protocol.display.background:g}; {len(steps)} patches, {len(steps) - len(todo)} already measured")
        if recorded is None:
            why = ("flips are not synchronised to the display (no vsync: a virtual or remote display?)"
                   if measured > UNSYNCED_FACTOR * hz else "another rate than the protocol's")
            screen.say(f"warning: {measured:.2f} Hz is not the protocol's {hz:g} Hz: {why}; the profile records the "
                       "refresh rate as not measured (the readings of a steady patch are not affected)")
        screen.say("aim the photometer at the patch (shown at full level) and press Enter in the window; "
                   "Esc stops, keeping every reading")
        if not screen.wait_for_enter((1.0, 1.0, 1.0)):
            return False, recorded
        for step in todo:
            screen.say(f"reading {step.order}/{len(steps)}: {step.gun} level {step.level:.4f} "
                       f"(code {round(step.level * 255)}) - type cd/m2, Enter: ", end="")
            value = screen.type_number(step.rgb)
            if value is None:
                return False, recorded
            log.append(step, value)
        return True, recorded
    finally:
        screen.close()
