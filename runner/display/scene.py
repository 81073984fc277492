"""What can be on the observer's screen: dots, fixation mark, text, light patch.

Every stimulus is made once when the window opens; a frame is drawn by
:meth:`Scene.draw`, which issues a single draw call for the whole dot field
(one ``ElementArrayStim`` fed with the positions from
:class:`runner.dots.DotField`).

The looks are our own and deliberately dim for a dark room:

- fixation mark: a small disc of diameter ``dots.fixation_deg``;
- feedback after a practice answer: a thin ring around the mark when the
  answer was right, the mark switched off for the same time when it was not;
- text: grey :data:`DIM_STEP` above the background, about 0.6 deg high;
- light patch (``safety.photodiode_patch_deg``): a white square in the
  lower-left corner, on during every frame of a test period.
"""

from __future__ import annotations

import numpy as np

from runner.display._psychopy import visual
from runner.display.window import px_per_deg
from runner.protocol import Protocol

#: Text, fixation mark and feedback ring sit this far above the background
#: (fraction of the display's range): readable but dim in a dark room.
DIM_STEP = 0.2

#: Height of text lines (deg).
TEXT_HEIGHT_DEG = 0.6

#: Longest text line (deg), however wide the screen.
TEXT_WRAP_DEG = 26.0


class Scene:
    """The stimuli of one window.

    Parameters
    ----------
    win : psychopy.visual.Window
    protocol : Protocol
    """

    def __init__(self, win, protocol: Protocol):
        self.win = win
        dots = protocol.dots
        dim = min(1.0, protocol.display.background + DIM_STEP)
        self.dim_level = dim
        self.n_dots = dots.n_dots
        self.dots = visual.ElementArrayStim(
            win,
            units="deg",
            nElements=dots.n_dots,
            xys=np.zeros((dots.n_dots, 2)),
            sizes=dots.dot_size_deg,
            elementTex=None,
            elementMask="circle",
            colors=[dots.level * c for c in dots.color_rgb],
            colorSpace="rgb1",
            autoLog=False,
        )
        size = dots.fixation_deg
        self.fixation = (
            visual.Circle(win, radius=size / 2, units="deg", fillColor=[dim] * 3, lineWidth=0,
                          colorSpace="rgb1", edges=32, autoLog=False)
            if size > 0 else None
        )
        ring = max(size, 0.2) * 1.5
        self.ring = visual.Circle(win, radius=ring, units="deg", fillColor=None, lineColor=[dim] * 3,
                                  lineWidth=2, colorSpace="rgb1", edges=48, autoLog=False)
        width_deg = win.size[0] / px_per_deg(win.monitor)
        self.text = visual.TextStim(
            win, text="", units="deg", height=TEXT_HEIGHT_DEG, color=[dim] * 3, colorSpace="rgb1",
            wrapWidth=min(TEXT_WRAP_DEG, 0.85 * width_deg), alignText="center", autoLog=False,
        )
        self.patch = self._light_patch(win, protocol.safety.photodiode_patch_deg)

    @staticmethod
    def _light_patch(win, side_deg: float):
        """A white square flush with the lower-left corner, or None."""
        if side_deg <= 0:
            return None
        side = side_deg * px_per_deg(win.monitor)
        w, h = win.size
        return visual.Rect(win, width=side, height=side, units="pix", pos=(-w / 2 + side / 2, -h / 2 + side / 2),
                           fillColor=[1.0, 1.0, 1.0], lineWidth=0, colorSpace="rgb1", autoLog=False)

    def warm_up(self) -> None:
        """Draw every stimulus once off screen and clear, so the first real
        frame does not pay for building shaders and textures."""
        self.set_text("warm up")
        self.draw(np.zeros((self.n_dots, 2)), ring=True, patch=True, show_text=True)
        self.win.clearBuffer()

    def set_text(self, text: str) -> None:
        """Text for the next :meth:`draw` with ``show_text``."""
        self.text.text = text.strip("\n")

    def draw(self, positions=None, *, fixation: bool = True, ring: bool = False,
             patch: bool = False, show_text: bool = False) -> None:
        """Draw one frame into the back buffer (the caller flips).

        Parameters
        ----------
        positions : (n, 2) array or None
            Dot positions (deg); None draws no dots.
        fixation, ring, patch, show_text : bool
            Which of the other stimuli to draw.
        """
        if positions is not None:
            self.dots.setXYs(positions)
            self.dots.draw()
        if show_text:
            self.text.draw()
        if fixation and self.fixation is not None:
            self.fixation.draw()
        if ring:
            self.ring.draw()
        if patch and self.patch is not None:
            self.patch.draw()
