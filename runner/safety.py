"""Photosensitivity screening, safety refusals and the observer caution.

Why this exists
---------------
Random-dot motion with short periods, blank gaps and bright, dense dots can
switch large parts of the screen on and off several times a second, which can
provoke seizures in photosensitive people.  Before an observer sits down,
:func:`screen_protocol` rebuilds, frame by frame, the luminance the observer
will see in the worst case the protocol allows and counts flashes by the
definitions of W3C WCAG 2.x success criterion 2.3.1 ("three flashes or below
threshold") and its glossary entry "general flash and red flash thresholds".
ITU-R BT.1702 (guidance for reducing photosensitive seizures from television)
uses the same kind of thresholds.  The definitions below are restated from
the W3C text from memory; where this module has to choose (the shape of the
field, ties at a boundary, colour of black) it says so and errs on the side of
counting a flash.

Definitions used (WCAG 2.x SC 2.3.1 and glossary)
-------------------------------------------------
* Relative luminance: IEC 61966-2-1 (sRGB) decoding of each signal value
  (``v / 12.92`` at or below 0.04045, ``((v + 0.055) / 1.055) ** 2.4`` above)
  and ``Y = 0.2126 R + 0.7152 G + 0.0722 B`` (the Y row of the IEC
  61966-2-1 RGB → XYZ matrix), 0 for black and 1 for white.
* General flash: a pair of opposing changes in relative luminance of 10 % or
  more of the maximum relative luminance (1.0), where the relative luminance
  of the darker state is below 0.80.
* Red flash (WCAG 2.2 working definition): a pair of opposing transitions
  where one state has R / (R + G + B) ≥ 0.8 and the two states differ by more
  than 0.2 in the CIE 1976 UCS (u′, v′) chromaticity diagram.
* Threshold: a sequence passes if there are no more than three general and no
  more than three red flashes in any one-second period, or if the flashes
  that happen at the same time cover no more than 0.006 sr, i.e. 25 % of any
  10° visual field.
* Transitions are measured between adjacent peaks and valleys of the
  luminance-time curve.  A reversal smaller than the 0.1 flash threshold is
  not a peak or a valley (a step of 0.5 up, 0.05 down and 0.4 up is one rise
  of 0.85), so small ripples neither hide nor split a flash.

Choices made here
-----------------
* The 10° field is a disc of 10° diameter at the protocol's viewing distance,
  its radius on the screen ``distance · tan 5°``.  WCAG's informative note
  uses a 341 × 256 px rectangle on a 1024 × 768 screen as a stand-in because
  web content does not know the viewer's geometry; we do.  The disc is also
  what the standard's 0.006 sr means: a cone of 10° has a solid angle of
  2π(1 − cos 5°) = 0.0239 sr, and a quarter of it is 0.006 sr.
* An area of exactly 25 % counts (WCAG lets "no more than" 0.006 sr pass);
  a change of exactly 0.1 counts and a darker state of exactly 0.80 does not,
  as in the definition.  Differences are compared with a tolerance of 1e-9 so
  that 0.3 − 0.2 counts as 0.1.
* Relative luminance.  Without a light profile the display is assumed to be
  sRGB (the definitions above).  With one (``[light] profile``), the measured
  display is used instead: relative luminance is L / L_max of that display,
  L from its fitted gain–offset–gamma curves, so black is its black level
  over its maximum, not 0 (:mod:`runner.light`).  The report names which.
* Where the luminance comes from.  The screen is modelled as three parts,
  each uniform in its *mean* colour: the dot aperture (a disc centred on the
  screen), the photodiode patch (a square of ``safety.photodiode_patch_deg``
  in the lower-left corner, white during test periods and the background
  colour otherwise) and the rest of the screen (background, never changes).
  The mean linear colour of the aperture is
  ``background + coverage · (dot − background)`` per gun, where the dot colour
  is ``dots.level · dots.color_rgb`` and the background ``display.background``
  (sRGB signal values, decoded to linear light first), and the coverage is
  ``n_dots · (dot area) / (aperture area)`` — an upper bound, since
  overlapping dots cover less.  The fixation mark is on every frame, never
  changes and is left out; leaving it out only makes the darker state darker,
  which can only add flashes.
* Dots themselves.  Dots moving, and dots replotted at a random place at the
  end of their lifetime, keep the number of dots in the aperture, and so the
  mean luminance of every region, constant.  WCAG exempts such a fine,
  balanced pattern outright when its elements are smaller than 0.1° on a
  side; this module claims that exemption only for such dots.  For larger
  dots it claims nothing but counts them only through the mean, for this
  reason: when a dot pattern of coverage c is replaced by another of the same
  coverage at independent places, the area that brightens together is the
  part covered now and not before, c · (1 − c) of any region, which is at
  most a quarter (at c = 50 %, the most the protocol loader accepts); dots
  that move by small steps brighten even less at once.  So dots moving or
  being replotted do not reach the 25 % that counts, while whatever switches
  the dots on or off together (blank gaps, the answer window, a blank
  baseline) changes the mean and is counted.  The argument needs many dots
  per field; when so few large dots make up a quarter of a 10° field that a
  handful replotted at once could exceed it (fewer than
  :data:`FEW_DOTS_PER_QUARTER`), the screening says it cannot judge them
  (``Screening.unscreened``), and such a protocol is refused like one over the
  thresholds until it is reviewed (:data:`ACKNOWLEDGE_OPTION`).
* Red and black.  Black has no chromaticity; it is given the display's white
  point, so a saturated red next to black counts as a red transition (u′v′
  difference 0.26).  With a black background the aperture's mean then has
  the dots' chromaticity at any coverage, and red dots switched on and off
  fast are refused as red flashes even when sparse: deliberately cautious,
  and open to review with :data:`ACKNOWLEDGE_OPTION`.
* Which 10° field.  Fields are placed on the line from the aperture centre
  (where the dot field is worst) to the centre of the photodiode patch, and
  the worst one is reported.  In every field, each group of changing parts
  (dots, patch, both) whose combined area is at least 25 % of the field is
  checked on its area-weighted mean colour; a group below 25 % does not count.
  The whole screen is checked too, on its mean over the whole screen.
* Which sequence.  For a continuous-stream block (``[stream]``) the stream
  module supplies its worst case (:func:`runner.stream.screening_sequences`).
  Otherwise trials are interleaved at random, so any kind of trial
  (the baseline, and every lag) can follow itself; each kind is screened
  repeated back to back, and the worst kind is reported: a
  second of fixation, the first adaptation (if any, at most a second of it:
  a steady stretch holds no transition), then trials of that kind for
  :data:`TRIALS_SCREENED_S` seconds, each with its periods and blank gaps,
  the test (with the photodiode patch), an answer after
  :data:`FASTEST_ANSWER_S` (a fast observer; the answer window shows the
  fixation mark only) and the pause.  Practice trials have the same periods;
  text and break screens stay until a key press and are not screened.  A
  second that spans two different kinds of trial is not screened as such;
  its parts are, in each kind's own repetition.
* On/off flicker.  The whole screen's mean luminance is also searched for
  stretches of at least three on/off cycles at 3–60 Hz.  Such flicker is
  reported whatever its size; it is refused only when it also makes flashes
  over the thresholds.

Refusals
--------
A protocol over the thresholds, one with a part the screening cannot judge
(``Screening.unscreened``), a duration that is not whole frames and a
display whose refresh rate differs from the protocol's are refused with
:class:`SafetyRefusal` (exit code 3).  Its one-line message says why and how
to go on; the flicker and refresh refusals can be overridden after review
with :data:`ACKNOWLEDGE_OPTION` and :data:`REFRESH_OVERRIDE_OPTION`.

The observer caution (:func:`caution_text`) is read from
``safety.caution_file`` or the bundled ``runner/texts/caution.txt``.
"""

from __future__ import annotations

import itertools
import math
import dataclasses
from dataclasses import dataclass

import numpy as np

from fitting.errors import InputError, SafetyRefusal  # SafetyRefusal: defined there, raised here
from runner import geometry
from runner.plan import Period, trial_periods
from runner.protocol import Protocol, frame_plan

# --- thresholds of WCAG 2.x SC 2.3.1 and its glossary ("general flash and red flash thresholds")

#: A general flash needs changes of at least this much relative luminance
#: ("10 % or more of the maximum relative luminance (1.0)").
FLASH_CHANGE = 0.10
#: ... and the darker of the two states must be below this.
DARKER_STATE_BELOW = 0.80
#: More than this many flashes in any one-second period fails.
FLASHES_ALLOWED_PER_S = 3
#: Flashes over less than this fraction of a 10° visual field (0.006 sr) do not count.
AREA_FRACTION = 0.25
#: Diameter of "a 10 degree visual field".
FIELD_DEG = 10.0
#: WCAG 2.2 working definition of a saturated red: R / (R + G + B) >= 0.8 ...
RED_RATIO = 0.8
#: ... and a difference of more than 0.2 in CIE 1976 u'v' between the two states.
RED_UV_DIFFERENCE = 0.2
#: Elements smaller than this (deg) form a "fine, balanced pattern" that is exempt.
FINE_PATTERN_DEG = 0.1
#: Fewer dots than this making up a quarter of a 10° field asks for a review
#: (our choice: the c(1 - c) argument of the module docstring needs many dots).
FEW_DOTS_PER_QUARTER = 20
#: Whole-field on/off flicker reported in this band (Hz).
FLICKER_BAND_HZ = (3.0, 60.0)

# --- sRGB, IEC 61966-2-1

#: Signal values at or below this decode linearly (IEC 61966-2-1).
SRGB_BREAKPOINT = 0.04045
#: Linear RGB (sRGB primaries, D65 white) to CIE XYZ, IEC 61966-2-1.
SRGB_TO_XYZ = np.array(
    [
        [0.4124, 0.3576, 0.1805],
        [0.2126, 0.7152, 0.0722],
        [0.0193, 0.1192, 0.9505],
    ]
)

# --- choices of this module (see the module docstring)

#: The fastest answer assumed after the test, in seconds.
FASTEST_ANSWER_S = 0.2
#: Seconds of back-to-back trials screened per kind of trial.
TRIALS_SCREENED_S = 6.0
#: Fields placed between the aperture centre and the photodiode patch.
FIELD_POSITIONS = 11
#: Grid points across a field's diameter used to measure overlapping areas.
AREA_GRID = 401
#: Tolerance for comparisons of luminance and areas with the thresholds.
_TOL = 1e-9

#: Command-line option that runs a protocol over the flash thresholds after review.
ACKNOWLEDGE_OPTION = "--flicker-reviewed"
#: Command-line option that runs on a display whose refresh differs from the protocol's.
REFRESH_OVERRIDE_OPTION = "--refresh-reviewed"
#: Largest relative difference between measured and protocol refresh rate.
REFRESH_TOLERANCE = 0.01



# ----------------------------------------------------------------------------------------------
# Colour: IEC 61966-2-1 and CIE 1976 UCS


def srgb_to_linear(signal) -> np.ndarray:
    """Decode sRGB signal values (0..1) to linear light (IEC 61966-2-1).

    Parameters
    ----------
    signal : array_like
        Signal values between 0 and 1.

    Returns
    -------
    numpy.ndarray
        ``v / 12.92`` for ``v <= 0.04045``, ``((v + 0.055) / 1.055) ** 2.4`` above.
    """
    v = np.asarray(signal, dtype=float)
    curved = ((np.maximum(v, SRGB_BREAKPOINT) + 0.055) / 1.055) ** 2.4
    return np.where(v <= SRGB_BREAKPOINT, v / 12.92, curved)


def relative_luminance(linear_rgb) -> np.ndarray:
    """Relative luminance Y of linear sRGB colours (last axis R, G, B).

    Uses the Y row of :data:`SRGB_TO_XYZ`; 0 is black and 1 is white.
    """
    return np.asarray(linear_rgb, dtype=float) @ SRGB_TO_XYZ[1]


def _neutral_where_black(linear_rgb) -> np.ndarray:
    # Black has no chromaticity of its own; we give it the display's white
    # point (R = G = B), which makes a saturated red next to black count as a
    # red transition (our choice; see the module docstring, "Red and black").
    rgb = np.asarray(linear_rgb, dtype=float)
    black = rgb.sum(axis=-1, keepdims=True) <= _TOL
    return np.where(black, 1.0, rgb)


def chromaticity_uv(linear_rgb) -> np.ndarray:
    """CIE 1976 UCS chromaticity (u′, v′) of linear sRGB colours.

    ``u′ = 4X / (X + 15Y + 3Z)``, ``v′ = 9Y / (X + 15Y + 3Z)`` (CIE 15), with
    XYZ from :data:`SRGB_TO_XYZ`.  Black is given the D65 white point.

    Returns
    -------
    numpy.ndarray
        Shape ``(..., 2)``.
    """
    xyz = _neutral_where_black(linear_rgb) @ SRGB_TO_XYZ.T
    d = xyz[..., 0] + 15.0 * xyz[..., 1] + 3.0 * xyz[..., 2]
    return np.stack([4.0 * xyz[..., 0] / d, 9.0 * xyz[..., 1] / d], axis=-1)


def red_ratio(linear_rgb) -> np.ndarray:
    """R / (R + G + B) of linear sRGB colours (1/3 for black and greys)."""
    rgb = _neutral_where_black(linear_rgb)
    return rgb[..., 0] / rgb.sum(axis=-1)


# ----------------------------------------------------------------------------------------------
# Flash counting on luminance-time curves


@dataclass(frozen=True)
class FlashCount:
    """Flashes found in a luminance-time curve.

    Attributes
    ----------
    per_second : int
        The most flashes in any one-second window.
    window_start_s : float or None
        Start of the first window with that many (None without flashes).
    transitions : int
        Qualifying transitions in the whole curve.
    """

    per_second: int
    window_start_s: float | None
    transitions: int


def turning_points(values, threshold: float = 0.0) -> np.ndarray:
    """Frames of the peaks and valleys of a curve.

    Parameters
    ----------
    values : array_like
        One value per frame.
    threshold : float
        A reversal smaller than this is not a peak or valley; 0 keeps every
        reversal.

    Returns
    -------
    numpy.ndarray of int
        Frame indices where each peak or valley is first reached, in order;
        the first entry is the level the first change starts from.  Empty
        for a constant curve.
    """
    v = np.asarray(values, dtype=float)
    if v.size < 2:
        return np.zeros(0, dtype=int)
    starts = np.flatnonzero(np.r_[True, v[1:] != v[:-1]])
    levels = v[starts]
    need = max(threshold - _TOL, _TOL)
    pivots: list[int] = []
    low = high = 0  # lowest and highest level seen before the first change
    direction = 0
    candidate = 0
    for j in range(1, levels.size):
        x = levels[j]
        if direction == 0:
            low = j if x < levels[low] else low
            high = j if x > levels[high] else high
            if levels[high] - levels[low] >= need:
                rising = high > low
                pivots.append(low if rising else high)
                direction, candidate = (1, high) if rising else (-1, low)
        elif direction > 0:
            if x > levels[candidate]:
                candidate = j
            elif levels[candidate] - x >= need:
                pivots.append(candidate)
                direction, candidate = -1, j
        else:
            if x < levels[candidate]:
                candidate = j
            elif x - levels[candidate] >= need:
                pivots.append(candidate)
                direction, candidate = 1, j
    if direction:
        pivots.append(candidate)
    return starts[np.asarray(pivots, dtype=int)]


def _most_per_second(frames: np.ndarray, signs: np.ndarray, refresh_hz: float) -> FlashCount:
    """Most pairs of opposing transitions in any one-second window.

    Within a window, consecutive transitions of the same sign act as one (only
    an opposing change completes a flash), so the flashes in a window are
    half the number of same-sign runs, rounded down.
    """
    if frames.size == 0:
        return FlashCount(0, None, 0)
    run = np.r_[0, np.cumsum(signs[1:] != signs[:-1])]
    end = np.searchsorted(frames, frames + refresh_hz, side="left")  # window [t, t + 1 s)
    flashes = (run[end - 1] - run + 1) // 2
    best = int(np.argmax(flashes))
    count = int(flashes[best])
    return FlashCount(count, float(frames[best] / refresh_hz) if count else None, int(frames.size))


def general_flashes(luminance, refresh_hz: float) -> FlashCount:
    """Count general flashes (WCAG 2.x SC 2.3.1) in a relative-luminance curve.

    Parameters
    ----------
    luminance : array_like
        Relative luminance (0..1) per frame.
    refresh_hz : float
        Frames per second.

    Returns
    -------
    FlashCount
        A transition between adjacent peaks and valleys qualifies when it is
        at least 0.1 and its darker state is below 0.80; a flash is a pair of
        opposing qualifying transitions.
    """
    y = np.asarray(luminance, dtype=float)
    p = turning_points(y, FLASH_CHANGE)
    a, b = y[p[:-1]], y[p[1:]]
    ok = (np.abs(b - a) >= FLASH_CHANGE - _TOL) & (np.minimum(a, b) < DARKER_STATE_BELOW)
    return _most_per_second(p[1:][ok], np.sign(b - a)[ok], refresh_hz)


def red_flashes(linear_rgb, refresh_hz: float) -> FlashCount:
    """Count red flashes (WCAG 2.2 working definition) in a colour curve.

    Parameters
    ----------
    linear_rgb : array_like, shape (n_frames, 3)
        Linear sRGB colour per frame.
    refresh_hz : float
        Frames per second.

    Returns
    -------
    FlashCount
        Transitions are taken between adjacent peaks and valleys of
        R / (R + G + B); one qualifies when one of its two states has
        R / (R + G + B) ≥ 0.8 and the states differ by more than 0.2 in u′v′.
        A flash is a pair of opposing qualifying transitions (towards red and
        away from it).
    """
    rgb = np.asarray(linear_rgb, dtype=float)
    ratio = red_ratio(rgb)
    p = turning_points(ratio)
    uv = chromaticity_uv(rgb[p])
    apart = np.linalg.norm(uv[1:] - uv[:-1], axis=1) > RED_UV_DIFFERENCE + _TOL
    saturated = np.maximum(ratio[p[:-1]], ratio[p[1:]]) >= RED_RATIO - _TOL
    ok = apart & saturated
    return _most_per_second(p[1:][ok], np.sign(ratio[p[1:]] - ratio[p[:-1]])[ok], refresh_hz)


def largest_change(luminance) -> float:
    """Largest change between adjacent peaks and valleys of a curve (0 if constant)."""
    y = np.asarray(luminance, dtype=float)
    p = turning_points(y)
    return float(np.abs(np.diff(y[p])).max()) if p.size > 1 else 0.0


@dataclass(frozen=True)
class Flicker:
    """A stretch of on/off cycles.

    Attributes
    ----------
    frequency_hz : float
        Cycles per second (refresh rate over the median cycle in frames).
    cycles : int
        On-phases in the stretch.
    """

    frequency_hz: float
    cycles: int


def on_off_flicker(luminance, refresh_hz: float, band_hz=FLICKER_BAND_HZ, min_cycles: int = 3) -> Flicker | None:
    """Find the fastest run of on/off cycles in a band of frequencies.

    Parameters
    ----------
    luminance : array_like
        Relative luminance per frame.
    refresh_hz : float
        Frames per second.
    band_hz : (float, float)
        Cycles from one rise to the next must fall in this band.
    min_cycles : int
        Fewest successive on-phases that make a flicker.

    Returns
    -------
    Flicker or None
        The fastest such stretch, of any size of change; None if there is none.
    """
    y = np.asarray(luminance, dtype=float)
    p = turning_points(y)
    rises = p[1:][np.diff(y[p]) > 0]
    if rises.size < min_cycles:
        return None
    cycle = np.diff(rises)
    inside = (refresh_hz / cycle >= band_hz[0] - _TOL) & (refresh_hz / cycle <= band_hz[1] + _TOL)
    best = None
    for is_inside, group in itertools.groupby(zip(inside, cycle), key=lambda pair: pair[0]):
        run = [c for _, c in group]
        if is_inside and len(run) + 1 >= min_cycles:
            found = Flicker(float(refresh_hz / np.median(run)), len(run) + 1)
            if best is None or found.frequency_hz > best.frequency_hz:
                best = found
    return best


# ----------------------------------------------------------------------------------------------
# Regions: parts of the screen inside a 10° field


@dataclass(frozen=True)
class Surface:
    """A part of the screen, uniform in its mean colour.

    Attributes
    ----------
    name : str
        What it is ("dots", "photodiode patch").
    area : float
        Its area inside the region, as a fraction of a 10° field's area.
    linear_rgb : numpy.ndarray, shape (n_frames, 3)
        Mean linear colour per frame.
    """

    name: str
    area: float
    linear_rgb: np.ndarray

    @property
    def changes(self) -> bool:
        """True when the colour is not the same on every frame."""
        return bool(np.any(self.linear_rgb != self.linear_rgb[:1]))


@dataclass(frozen=True)
class RegionResult:
    """Flashes in one region of the screen.

    Attributes
    ----------
    name : str
        Which region.
    general, red : FlashCount
        The most general and red flashes in any one second, counting only
        changes over at least 25 % of a 10° field.
    largest_change : float
        Largest step of relative luminance of any changing part of the region
        (whatever its area).
    changing_area : float
        Combined area of the changing parts, as a fraction of a 10° field.
    """

    name: str
    general: FlashCount
    red: FlashCount
    largest_change: float
    changing_area: float

    @property
    def passed(self) -> bool:
        """True when neither count exceeds three flashes in a second."""
        return max(self.general.per_second, self.red.per_second) <= FLASHES_ALLOWED_PER_S

    def to_dict(self) -> dict:
        """Plain values for the session sidecar."""
        return {
            "region": self.name,
            "general_flashes_per_s": self.general.per_second,
            "red_flashes_per_s": self.red.per_second,
            "worst_window_start_s": self.general.window_start_s
            if self.general.per_second >= self.red.per_second
            else self.red.window_start_s,
            "largest_change": round(self.largest_change, 6),
            "changing_area_of_10deg_field": round(self.changing_area, 4),
        }


def region_flashes(name: str, surfaces, refresh_hz: float, luminance=relative_luminance) -> RegionResult:
    """Count flashes in a region made of uniform parts.

    Every group of changing parts whose combined area is at least 25 % of a
    10° field is checked on its area-weighted mean colour; the worst group
    gives the region's counts.  Groups under 25 % do not count (WCAG 2.x
    SC 2.3.1: flashes over no more than 0.006 sr, a quarter of a 10° field).

    Parameters
    ----------
    name : str
        Name of the region, for reports.
    surfaces : sequence of Surface
        The parts of the screen inside the region.
    refresh_hz : float
        Frames per second.
    luminance : callable
        Linear colour to relative luminance (default: sRGB,
        :func:`relative_luminance`; a measured display:
        :meth:`runner.light.LightModel.relative_luminance`).

    Returns
    -------
    RegionResult
    """
    changing = [s for s in surfaces if s.area > 0 and s.changes]
    general = red = FlashCount(0, None, 0)
    for size in range(1, len(changing) + 1):
        for group in itertools.combinations(changing, size):
            area = sum(s.area for s in group)
            if area < AREA_FRACTION - _TOL:
                continue
            rgb = sum(s.area * s.linear_rgb for s in group) / area
            g, r = general_flashes(luminance(rgb), refresh_hz), red_flashes(rgb, refresh_hz)
            general = g if g.per_second > general.per_second else general
            red = r if r.per_second > red.per_second else red
    biggest = max((largest_change(luminance(s.linear_rgb)) for s in changing), default=0.0)
    return RegionResult(name, general, red, biggest, sum(s.area for s in changing))


# ----------------------------------------------------------------------------------------------
# The protocol's screen: layout of its parts and the worst-case frame sequences


@dataclass(frozen=True)
class _Layout:
    """Areas of the screen's parts, as fractions of a 10° field's area."""

    screen: float
    aperture: float
    patch: float
    fields: tuple[tuple[str, float, float], ...]  # (name, dots area, patch area) per placed field


def field_radius_cm(distance_cm: float) -> float:
    """Radius on the screen of a 10° field seen at ``distance_cm`` (d · tan 5°)."""
    return geometry.deg_to_cm(FIELD_DEG, distance_cm) / 2.0


def _layout(protocol: Protocol) -> _Layout:
    display = protocol.display
    width, height = display.screen_cm
    cm_per_deg = geometry.deg_to_cm(1.0, display.distance_cm)  # the scale the presenter draws degrees at
    r_field = field_radius_cm(display.distance_cm)
    field_area = math.pi * r_field**2
    r_dots = protocol.dots.aperture_radius_deg * cm_per_deg
    side = protocol.safety.photodiode_patch_deg * cm_per_deg
    patch_w, patch_h = min(side, width), min(side, height)
    # The screen's centre is (0, 0); the patch sits in the lower-left corner.
    left, bottom = -width / 2.0, -height / 2.0
    grid = np.linspace(-r_field, r_field, AREA_GRID)
    gx, gy = np.meshgrid(grid, grid)
    inside = gx**2 + gy**2 <= r_field**2
    ox, oy = gx[inside], gy[inside]
    if side > 0:
        centres = np.linspace(0.0, 1.0, FIELD_POSITIONS)
        target = (left + patch_w / 2.0, bottom + patch_h / 2.0)
    else:
        centres, target = np.zeros(1), (0.0, 0.0)
    fields = []
    for t in centres:
        x, y = ox + t * target[0], oy + t * target[1]
        dots = float(np.mean(x**2 + y**2 <= r_dots**2))
        patch = float(np.mean((x <= left + patch_w) & (y <= bottom + patch_h) & (x >= left) & (y >= bottom)))
        if t == 0.0:
            name = "10° field centred on the dots"
        elif t == 1.0:
            name = "10° field centred on the photodiode patch"
        else:
            name = "10° field between the dots and the photodiode patch"
        fields.append((name, dots, patch))
    return _Layout(
        screen=width * height / field_area,
        aperture=math.pi * r_dots**2 / field_area,
        patch=patch_w * patch_h / field_area,
        fields=tuple(fields),
    )


@dataclass(frozen=True)
class _Sequence:
    """What is on the screen, frame by frame, for one worst case."""

    label: str
    dots_on: np.ndarray
    patch_on: np.ndarray


def _sequences(protocol: Protocol) -> list[_Sequence]:
    """One sequence per kind of trial: the largest lag first, the baseline last.

    A stream block (``[stream]``) has no trials; its worst case comes from
    :func:`runner.stream.screening_sequences`.
    """
    if protocol.stream is not None:
        from runner.stream import screening_sequences  # imported here: the stream loop is not needed otherwise

        return [_Sequence(label, dots, patch) for label, dots, patch in screening_sequences(protocol)]
    hz = protocol.display.refresh_hz
    frames = frame_plan(protocol)
    second = max(1, int(round(hz)))
    answer = max(1, min(int(round(FASTEST_ANSWER_S * hz)), frames["answer_window_s"].frames))
    tail = (Period("answer", "blank", answer), Period("pause", "blank", frames["pause_after_answer_s"].frames))
    lead = [Period("pause", "blank", second)]
    if frames["first_adaptation_s"].frames:
        lead.append(Period("first_adaptation", "motion", min(frames["first_adaptation_s"].frames, second)))
    adapter = protocol.design.adapter_offsets_deg[0]
    kinds = [(f"lag-{k} trials in a row", adapter, (0.0,) * k) for k in sorted(protocol.design.lags, reverse=True)]
    kinds.append((f"baseline trials ({protocol.design.baseline}) in a row", None, ()))
    out = []
    for label, offset, intervening in kinds:
        trial = trial_periods(protocol, offset, intervening, 0.0) + tail
        length = sum(p.frames for p in trial)
        periods = lead + list(trial) * max(2, math.ceil(TRIALS_SCREENED_S * hz / length))
        dots_on = np.concatenate([np.full(p.frames, p.look != "blank") for p in periods])
        patch_on = np.concatenate([np.full(p.frames, p.role == "test") for p in periods])
        out.append(_Sequence(label, dots_on, patch_on & (protocol.safety.photodiode_patch_deg > 0)))
    return out


def _colours(protocol: Protocol, light=None) -> tuple[np.ndarray, np.ndarray]:
    """Linear colour of the background and of a dot (sRGB unless a light model is given)."""
    decode = srgb_to_linear if light is None else light.linear
    background = decode(np.full(3, protocol.display.background))
    dot = decode(protocol.dots.level * np.asarray(protocol.dots.color_rgb))
    return background, dot


def _coverage(protocol: Protocol) -> float:
    """Fraction of the aperture covered by dots (an upper bound: dots may overlap)."""
    d = protocol.dots
    return min(1.0, d.n_dots * (d.dot_size_deg / 2.0) ** 2 / d.aperture_radius_deg**2)


# ----------------------------------------------------------------------------------------------
# The screening result


@dataclass(frozen=True)
class Screening:
    """Result of :func:`screen_protocol`.

    Attributes
    ----------
    passed : bool
        True when no region has more than three general or red flashes in
        any one second.
    worst_field : RegionResult
        The worst 10° field.
    whole_screen : RegionResult
        The mean over the whole screen.
    flicker_hz : float or None
        Fastest on/off flicker of the whole screen in 3–60 Hz, of any size;
        None if there is none.
    worst_case : str
        The kind of trial, repeated, that gave these counts.
    screened_s : float
        Seconds of that sequence screened.
    reasons : list of str
        Why the protocol fails, in plain sentences (empty if it passes).
    unscreened : list of str
        What the screening cannot judge, in plain sentences; each needs a
        review, as a failure does (:attr:`cleared` is False).
    notes : list of str
        Other findings and the assumptions behind the result.
    light_source : str
        Where relative luminance came from: the sRGB assumption or a
        measured display's light profile (``[light] profile``).
    """

    passed: bool
    worst_field: RegionResult
    whole_screen: RegionResult
    flicker_hz: float | None
    worst_case: str
    screened_s: float
    reasons: list[str] = dataclasses.field(default_factory=list)
    notes: list[str] = dataclasses.field(default_factory=list)
    light_source: str = "sRGB display assumed (IEC 61966-2-1 decoding)"
    unscreened: list[str] = dataclasses.field(default_factory=list)

    @property
    def cleared(self) -> bool:
        """True when the protocol passed and nothing was left unscreened: it runs without a review."""
        return self.passed and not self.unscreened

    @property
    def verdict(self) -> str:
        """``passed``, ``over the thresholds`` or ``not screened in full``."""
        if not self.passed:
            return "over the thresholds"
        return "passed" if self.cleared else "not screened in full"

    def summary_lines(self) -> list[str]:
        """A short block for ``aftershift check``."""
        lines = [
            f"photosensitivity screening (WCAG 2.x SC 2.3.1): {self.verdict}",
            f"  worst case: {self.worst_case}, {self.screened_s:.1f} s",
            f"  relative luminance from: {self.light_source}",
            f"  most flashes in any second, general / red (3 allowed):",
        ]
        for region in (self.worst_field, self.whole_screen):
            lines.append(
                f"    {region.name}: {region.general.per_second} / {region.red.per_second}"
                f" (largest step {region.largest_change:.3f} of full white,"
                f" changing area {region.changing_area:.0%} of a 10° field)"
            )
        lines.append(f"  on/off flicker at 3-60 Hz: {f'{self.flicker_hz:.3g} Hz' if self.flicker_hz else 'none'}")
        lines += [f"  - {r}" for r in self.reasons]
        lines += [f"  - Not screened, so it runs only with {ACKNOWLEDGE_OPTION} after a review: {u}"
                  for u in self.unscreened]
        lines += [f"  - {n}" for n in self.notes]
        if self.cleared:
            lines.append("  caution: passing does not make a protocol safe for everyone: people with a history of "
                         "photosensitive epilepsy, seizures or migraine triggered by flicker should not take part; "
                         "follow your ethics board and clinical advice")
        elif self.passed:
            lines.append("  caution: what the screening cannot judge may flash; flashes can trigger seizures in "
                         "people with photosensitive epilepsy and migraine in others; run it only after your ethics "
                         "board has reviewed it, exclude people with such a history, let anyone stop at any time, "
                         "and follow clinical advice")
            lines.append(f"  to run anyway after review, pass {ACKNOWLEDGE_OPTION}")
        else:
            lines.append("  caution: flashes like these can trigger seizures in people with photosensitive epilepsy "
                         "and migraine in others; run it only after your ethics board has reviewed it, exclude "
                         "people with such a history, let anyone stop at any time, and follow clinical advice")
            lines.append(f"  to run anyway after review, pass {ACKNOWLEDGE_OPTION}")
        return lines

    def to_dict(self, acknowledged: bool = False) -> dict:
        """Plain values for the session sidecar.

        ``passed`` is the flash count alone; ``cleared`` and ``verdict`` say
        whether the protocol runs without a review (:attr:`cleared`).

        Parameters
        ----------
        acknowledged : bool
            True when the experimenter passed :data:`ACKNOWLEDGE_OPTION`.
        """
        return {
            "criterion": "WCAG 2.x SC 2.3.1 general and red flash thresholds",
            "relative_luminance_from": self.light_source,
            "verdict": self.verdict,
            "cleared": self.cleared,
            "passed": self.passed,
            "unscreened": list(self.unscreened),
            "acknowledged_with": ACKNOWLEDGE_OPTION if acknowledged else None,
            "worst_case": self.worst_case,
            "screened_s": round(self.screened_s, 4),
            "regions": [self.worst_field.to_dict(), self.whole_screen.to_dict()],
            "flicker_hz": None if self.flicker_hz is None else round(self.flicker_hz, 4),
            "assumptions": {
                "field": f"disc of {FIELD_DEG:g} deg diameter at the viewing distance",
                "fastest_answer_s": FASTEST_ANSWER_S,
                "photodiode_patch": "lower-left square, white during test periods",
            },
            "reasons": list(self.reasons),
            "notes": list(self.notes),
        }


def _badness(region: RegionResult) -> tuple:
    # Most flashes first; among equals, the field with the most changing area.
    return (max(region.general.per_second, region.red.per_second), region.general.per_second, region.changing_area)


def _failures(region: RegionResult, worst_case: str) -> list[str]:
    out = []
    if region.general.per_second > FLASHES_ALLOWED_PER_S:
        out.append(
            f"The {region.name} would flash {region.general.per_second} times in one second with {worst_case} "
            f"(steps of up to {region.largest_change:.2f} in relative luminance over {region.changing_area:.0%} "
            f"of a 10° field), more than the {FLASHES_ALLOWED_PER_S} that WCAG 2.x SC 2.3.1 allows."
        )
    if region.red.per_second > FLASHES_ALLOWED_PER_S:
        out.append(
            f"The {region.name} would show {region.red.per_second} saturated-red flashes in one second with "
            f"{worst_case}, more than the {FLASHES_ALLOWED_PER_S} that WCAG 2.x SC 2.3.1 allows."
        )
    return out


def _notes(
    protocol: Protocol, layout: _Layout, passed: bool, flicker_hz: float | None, worst: RegionResult, light
) -> list[str]:
    notes = []
    if flicker_hz is not None:
        note = f"The stimulus switches on and off at {flicker_hz:.3g} Hz (whole screen), inside the 3-60 Hz band."
        if passed:
            note += (
                f" Its steps (at most {worst.largest_change:.3f} of full white in the {worst.name}) "
                "stay below the flash thresholds, so it is reported, not refused."
            )
        notes.append(note)
    side = protocol.safety.photodiode_patch_deg
    if side > 0:
        share = max(p for _, _, p in layout.fields)
        counted = "at least the 25% that counts" if share >= AREA_FRACTION - _TOL else "less than the 25% that counts"
        notes.append(
            f"The photodiode patch ({side:g}° square, lower left, white during each test) covers {share:.0%} "
            f"of a 10° field, {counted}."
        )
    size = protocol.dots.dot_size_deg
    if size < FINE_PATTERN_DEG:
        notes.append(
            f"Dots of {size:g}° are smaller than 0.1°, a fine, balanced pattern that WCAG exempts: single dots "
            "moving or being replotted are not flashes; switching the whole dot field on and off is counted."
        )
    else:
        notes.append(
            f"Dots of {size:g}° are not smaller than WCAG's 0.1° fine-pattern limit, so no exemption is claimed; "
            "moving and replotted dots keep every region's mean luminance constant and count only through it."
        )
    order = "the stream's tests back to back" if protocol.stream is not None else "trials of one kind back to back"
    notes.append(
        f"Assumed: answers {FASTEST_ANSWER_S:g} s after each test, {order}, "
        "the 10° field as a disc at the protocol's viewing distance."
    )
    return notes


def _unscreened(protocol: Protocol, light) -> list[str]:
    """What the screening cannot judge (see "Dots themselves" in the module docstring)."""
    size = protocol.dots.dot_size_deg
    per_quarter = AREA_FRACTION * (FIELD_DEG / size) ** 2
    background, dot = _colours(protocol, light)
    contrast = abs(float(light.relative_luminance(dot) - light.relative_luminance(background)))
    if per_quarter < FEW_DOTS_PER_QUARTER and contrast >= FLASH_CHANGE - _TOL:
        return [f"{per_quarter:.0f} dots of {size:g}° make up a quarter of a 10° field, so a few of them replotted "
                "at once could light up the 25% that counts, which this screening cannot judge (smaller dots, "
                f"at least {FEW_DOTS_PER_QUARTER} to a quarter field, or less contrast avoid it)."]
    return []


def screen_protocol(protocol: Protocol, light=None) -> Screening:
    """Screen a protocol for flashes that could provoke photosensitive seizures.

    Builds the worst-case frame sequences of the protocol (see the module
    docstring), turns them into the mean colour of the whole screen and of
    10° fields at the protocol's viewing distance, and counts general and
    red flashes by WCAG 2.x SC 2.3.1.

    Parameters
    ----------
    protocol : Protocol
    light : runner.light.LightModel, optional
        How signal values become relative luminance.  Default: the measured
        display of the protocol's ``[light] profile`` (L / L_max of that
        display) when it names one, the sRGB assumption otherwise.

    Returns
    -------
    Screening

    Raises
    ------
    InputError
        A duration that is not whole frames (field ``timing.NAME``).
    """
    from runner.light import light_for

    light = light if light is not None else light_for(protocol)
    hz = protocol.display.refresh_hz
    layout = _layout(protocol)
    background, dot = _colours(protocol, light)
    dots_shown = background + _coverage(protocol) * (dot - background)
    white = light.linear(np.ones(3))
    rest = layout.screen - layout.aperture - layout.patch
    screened = []
    flicker_hz = []
    for seq in _sequences(protocol):
        dots = np.where(seq.dots_on[:, None], dots_shown, background)
        patch = np.where(seq.patch_on[:, None], white, background)
        mean = (layout.aperture * dots + layout.patch * patch + rest * background) / layout.screen
        whole = region_flashes("whole screen", [Surface("whole screen", layout.aperture + layout.patch, mean)], hz,
                               light.relative_luminance)
        fields = [
            region_flashes(name, [Surface("dots", a, dots), Surface("photodiode patch", p, patch)], hz,
                           light.relative_luminance)
            for name, a, p in layout.fields
            if a + p > 0
        ]
        screened.append((seq, max(fields, key=_badness), whole))
        flicker = on_off_flicker(light.relative_luminance(mean), hz)
        if flicker is not None:
            flicker_hz.append(flicker.frequency_hz)
    # The first kind of trial (largest lag) is reported when all are alike.
    seq, worst_field, whole = max(screened, key=lambda s: max(_badness(s[1]), _badness(s[2])))
    fastest = max(flicker_hz, default=None)
    reasons = _failures(worst_field, seq.label) + _failures(whole, seq.label)
    notes = _notes(protocol, layout, not reasons, fastest, worst_field, light)
    return Screening(not reasons, worst_field, whole, fastest, seq.label, seq.dots_on.size / hz, reasons, notes,
                     light.source, _unscreened(protocol, light))


# ----------------------------------------------------------------------------------------------
# Refusals (exit code 3)


def screening_refusal(screening: Screening, source: str = "") -> SafetyRefusal | None:
    """The refusal for a screening over the thresholds or not screened in full, or None if it cleared.

    Parameters
    ----------
    screening : Screening
    source : str
        The protocol file, for the message.
    """
    if screening.cleared:
        return None
    return SafetyRefusal(
        screening.reasons[0] if screening.reasons else f"not screened: {screening.unscreened[0]}",
        f"to run anyway after review, pass {ACKNOWLEDGE_OPTION}",
        source=source,
        override=ACKNOWLEDGE_OPTION,
    )


def timing_refusal(source: str, field: str, message: str) -> SafetyRefusal:
    """The refusal for a duration that is not a whole number of frames.

    Parameters
    ----------
    source : str
        The protocol file.
    field : str
        The duration's field, e.g. ``timing.gap_s``.
    message : str
        What is wrong and the nearest valid values (the loader's message).
    """
    return SafetyRefusal(
        message,
        "the display can only show whole frames, so change the protocol (there is no override)",
        source=source,
        field=field,
        kind="timing",
    )


def check_refresh(
    measured_hz: float, protocol_hz: float, tolerance: float = REFRESH_TOLERANCE, source: str = ""
) -> SafetyRefusal | None:
    """Refuse a display whose refresh rate is not the protocol's.

    Parameters
    ----------
    measured_hz : float
        Refresh rate measured on this display.
    protocol_hz : float
        ``display.refresh_hz`` of the protocol.
    tolerance : float
        Largest accepted relative difference (0.01 = 1 %).
    source : str
        The protocol file, for the message.

    Returns
    -------
    SafetyRefusal or None
        None when the rates agree within ``tolerance``.
    """
    ok = math.isfinite(measured_hz) and measured_hz > 0
    if ok and abs(measured_hz - protocol_hz) <= tolerance * protocol_hz + _TOL:
        return None
    if ok:
        reason = (
            f"the display refreshes at {measured_hz:.2f} Hz, {abs(measured_hz / protocol_hz - 1):.1%} away from the "
            f"protocol's {protocol_hz:g} Hz (more than {tolerance:.0%}), so every period would last the wrong time"
        )
    else:
        reason = "the display's refresh rate could not be measured, so frame timing cannot be trusted"
    return SafetyRefusal(
        reason,
        f"set the display to {protocol_hz:g} Hz or change display.refresh_hz; "
        f"to run anyway after review, pass {REFRESH_OVERRIDE_OPTION}",
        source=source,
        field="display.refresh_hz",
        kind="timing",
        override=REFRESH_OVERRIDE_OPTION,
    )


# ----------------------------------------------------------------------------------------------
# The observer caution: built in runner.screens with every other observer text

from runner.screens import BUNDLED_CAUTION, caution_text, key_words  # noqa: E402,F401  (public here too)
