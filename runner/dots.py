"""Random-dot kinematics in a circular aperture, in pure numpy.

A :class:`DotField` holds the dot positions of one aperture and advances them
one display frame at a time. It knows nothing about drawing: the presenter
asks for ``step()`` once per frame and hands the returned ``(n, 2)`` array to
its drawing call. Units are degrees of visual angle, seconds and frames;
``x`` points right, ``y`` points up, and the centre of the aperture is
``(0, 0)``. A direction is counter-clockwise from rightward (0 = right,
90 = up), as everywhere in aftershift.

Rules of motion
---------------
Noise rule: *fresh signal subset each frame, noise dots in random directions
at the signal speed.* On every frame, of the ``m`` dots that move on that
frame, exactly ``round(coherence * m)`` are drawn at random (without regard
to which were signal before) and step ``speed / refresh`` degrees in the
period's direction; every other moving dot steps the same distance in a
direction drawn uniformly on the circle, afresh for each dot and frame.
Why this rule: since signal identity changes every frame, no single dot
carries the direction for longer than one frame, so the observer has to
pool motion over the field (the usual aim in direction judgments); since
noise dots move at the signal speed, neither speed nor displacement marks
a dot as signal; and exact counts give every frame the nominal coherence
instead of a binomially varying one.

Lifetime: a dot lives ``lifetime_frames`` frames. It appears at a uniformly
random place in the aperture (age 0), moves on each of the next
``lifetime_frames - 1`` frames, and on the frame after that is replotted
(age 0 again). A replotted dot does not move on that frame and counts as
neither signal nor noise. With ``lifetime_frames = 1`` every dot is replotted
on every frame: dynamic noise without motion. Lifetimes are staggered: the
ages ``0 .. lifetime_frames - 1`` are dealt out in equal numbers at random
when the field is made, so the initial ages are uniform over that range and
the same number of dots (``n / lifetime_frames``, give or take one) is
replotted on every frame, with no frame-locked pulse of replots.

Wrap-around: a dot that steps over the edge re-enters on the opposite side
along its own direction of motion. Its coordinate along the chord it moves
on (the line through the dot in its direction of motion) is taken modulo the
chord length, so it keeps its overshoot and never leaves the aperture.
Moving along a chord with this wrap is a circular shift of the chord, which
maps the uniform distribution on the chord onto itself; the uniform
distribution over a disc is uniform along each of its chords of a given
direction, so each step keeps the areal density exactly uniform, for any
mixture of directions chosen independently of position. Replots are uniform
over the disc too. There is no band of thinner or denser dots at the edge.
A wrap is not a replot: the dot keeps its age.

Static periods (``direction_deg=None``): no dot moves, but lifetimes run
and dots are replotted as in a moving period, so the texture twinkles at the
same rate as the moving field.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["DotSpec", "DotField"]


def _require(ok: bool, field: str, message: str, value) -> None:
    if not ok:
        raise ValueError(f"{field}: {message}, got {value!r}")


def _is_whole(value) -> bool:
    return isinstance(value, (int, np.integer)) and not isinstance(value, (bool, np.bool_))


@dataclass(frozen=True)
class DotSpec:
    """Validated settings of one random-dot field.

    Parameters
    ----------
    aperture_radius_deg : float
        Radius of the circular aperture (deg), > 0.
    density_per_deg2 : float
        Dots per square degree of aperture, > 0.
    dot_size_deg : float
        Diameter of a dot (deg), > 0. Kept for the presenter; the kinematics
        treat dots as points.
    speed_deg_s : float
        Speed of every moving dot (deg/s), >= 0.
    coherence : float
        Default fraction of moving dots that move in the period's direction,
        0..1 (a period may override it).
    lifetime_frames : int
        Frames a dot lives before it is replotted at a random place, >= 1.
    refresh_hz : float
        Display refresh rate (frames per second), > 0.

    Raises
    ------
    ValueError
        If a value is out of range; the message names the field.
    """

    aperture_radius_deg: float
    density_per_deg2: float
    dot_size_deg: float
    speed_deg_s: float
    coherence: float
    lifetime_frames: int
    refresh_hz: float

    def __post_init__(self):
        numbers = ("aperture_radius_deg", "density_per_deg2", "dot_size_deg", "speed_deg_s", "coherence", "refresh_hz")
        for name in numbers:
            value = getattr(self, name)
            _require(
                isinstance(value, (int, float, np.integer, np.floating))
                and not isinstance(value, bool)
                and math.isfinite(value),
                f"DotSpec.{name}",
                "expected a finite number",
                value,
            )
        _require(self.aperture_radius_deg > 0, "DotSpec.aperture_radius_deg", "expected > 0", self.aperture_radius_deg)
        _require(self.density_per_deg2 > 0, "DotSpec.density_per_deg2", "expected > 0", self.density_per_deg2)
        _require(self.dot_size_deg > 0, "DotSpec.dot_size_deg", "expected > 0", self.dot_size_deg)
        _require(self.speed_deg_s >= 0, "DotSpec.speed_deg_s", "expected >= 0", self.speed_deg_s)
        _require(0 <= self.coherence <= 1, "DotSpec.coherence", "expected a value in 0..1", self.coherence)
        _require(
            _is_whole(self.lifetime_frames) and self.lifetime_frames >= 1,
            "DotSpec.lifetime_frames",
            "expected a whole number >= 1",
            self.lifetime_frames,
        )
        _require(self.refresh_hz > 0, "DotSpec.refresh_hz", "expected > 0", self.refresh_hz)
        _require(self.n_dots >= 1, "DotSpec.density_per_deg2", "the aperture would hold no dot", self.density_per_deg2)

    @property
    def n_dots(self) -> int:
        """Number of dots, ``round(density * pi * radius**2)``."""
        return int(round(self.density_per_deg2 * math.pi * self.aperture_radius_deg**2))

    @property
    def step_deg(self) -> float:
        """Distance a moving dot travels in one frame (deg)."""
        return self.speed_deg_s / self.refresh_hz


class DotField:
    """Positions of the dots of one aperture, advanced frame by frame.

    Parameters
    ----------
    spec : DotSpec
        Aperture, density, speed, default coherence, lifetime, refresh rate.
    rng : numpy.random.Generator
        Source of all randomness (initial places, replots, signal subsets,
        noise directions); the field is reproducible from its state.

    Attributes
    ----------
    spec : DotSpec
    n_dots : int
        Number of dots.
    positions : numpy.ndarray
        ``(n_dots, 2)`` read-only view of the current positions (deg).
    signal : numpy.ndarray
        ``(n_dots,)`` read-only bool view: the dots that moved in the
        period's direction on the last step.
    ages : numpy.ndarray
        ``(n_dots,)`` read-only int view: frames since each dot was plotted.

    Notes
    -----
    The rules of motion (noise rule, lifetime, wrap-around) are described in
    the module docstring. The field starts static; call :meth:`start_period`
    to set a direction.
    """

    def __init__(self, spec: DotSpec, rng: np.random.Generator):
        if not isinstance(spec, DotSpec):
            raise ValueError(f"spec: expected a DotSpec, got {type(spec).__name__}")
        if not isinstance(rng, np.random.Generator):
            raise ValueError(f"rng: expected a numpy.random.Generator, got {type(rng).__name__}")
        self.spec = spec
        self.n_dots = spec.n_dots
        self._rng = rng
        self._radius = float(spec.aperture_radius_deg)
        self._step = float(spec.step_deg)
        self._lifetime = int(spec.lifetime_frames)
        self._pos = self._random_places(self.n_dots)
        self._ages = rng.permutation(np.arange(self.n_dots) % self._lifetime)
        self._signal = np.zeros(self.n_dots, dtype=bool)
        self._direction: float | None = None
        self._coherence = float(spec.coherence)
        self.positions = self._read_only(self._pos)
        self.signal = self._read_only(self._signal)
        self.ages = self._read_only(self._ages)

    @staticmethod
    def _read_only(array: np.ndarray) -> np.ndarray:
        view = array.view()
        view.flags.writeable = False
        return view

    @property
    def direction_deg(self) -> float | None:
        """Direction of the current period (deg), or None while static."""
        return self._direction

    @property
    def coherence(self) -> float:
        """Coherence of the current period (0..1)."""
        return self._coherence

    def start_period(self, direction_deg: float | None, coherence: float | None = None) -> None:
        """Begin a motion period.

        Positions and ages carry over from the previous period, so the
        texture is continuous across periods.

        Parameters
        ----------
        direction_deg : float or None
            Direction of the signal dots, counter-clockwise from rightward
            (deg). None gives static dots: nothing moves, lifetimes still run.
        coherence : float, optional
            Fraction of moving dots that move in ``direction_deg`` (0..1);
            default: the spec's coherence.

        Raises
        ------
        ValueError
            If the direction is not finite or the coherence is outside 0..1.
        """
        if direction_deg is not None:
            _require(
                isinstance(direction_deg, (int, float, np.integer, np.floating))
                and not isinstance(direction_deg, bool)
                and math.isfinite(direction_deg),
                "direction_deg",
                "expected a finite number or None",
                direction_deg,
            )
            direction_deg = float(direction_deg)
        if coherence is None:
            coherence = self.spec.coherence
        _require(
            isinstance(coherence, (int, float, np.integer, np.floating)) and 0 <= coherence <= 1,
            "coherence",
            "expected a value in 0..1",
            coherence,
        )
        self._direction = direction_deg
        self._coherence = float(coherence)

    def step(self) -> np.ndarray:
        """Advance one frame.

        Returns
        -------
        numpy.ndarray
            ``(n_dots, 2)`` read-only view of the new positions (deg). It is
            updated in place by the next step; copy it to keep a frame.
        """
        self._ages += 1
        replot = self._ages >= self._lifetime
        self._ages[replot] = 0
        n_replot = int(np.count_nonzero(replot))
        if n_replot:
            self._pos[replot] = self._random_places(n_replot)
        self._signal[:] = False
        if self._direction is None or self._step == 0.0:
            return self.positions

        moving = np.flatnonzero(~replot)
        n_signal = int(round(self._coherence * moving.size))
        theta = math.radians(self._direction)
        ux = np.full(moving.size, math.cos(theta))
        uy = np.full(moving.size, math.sin(theta))
        if n_signal < moving.size:
            noise = self._noise_members(moving.size, n_signal)
            # float32 angles: plenty for a random direction, and much faster trigonometry
            angle = self._rng.random(noise.size, dtype=np.float32) * np.float32(2.0 * math.pi)
            ux[noise] = np.cos(angle)
            uy[noise] = np.sin(angle)

        x = self._pos[moving, 0] + self._step * ux
        y = self._pos[moving, 1] + self._step * uy
        out = np.flatnonzero(x * x + y * y > self._radius * self._radius)
        if out.size:
            x[out], y[out] = self._wrap(x[out], y[out], ux[out], uy[out])
        self._pos[moving, 0] = x
        self._pos[moving, 1] = y
        self._signal[moving] = True
        if n_signal < moving.size:
            self._signal[moving[noise]] = False
        return self.positions

    def _wrap(self, x, y, ux, uy):
        """Bring points outside the aperture back along their chords.

        ``t`` is the coordinate along the direction of motion ``u``, ``h``
        the coordinate along the perpendicular ``(-uy, ux)``; the chord at
        ``h`` runs from ``t = -c`` to ``t = c`` with ``c = sqrt(R² - h²)``.
        """
        t = x * ux + y * uy
        h = y * ux - x * uy
        c = np.sqrt(np.maximum(self._radius * self._radius - h * h, 0.0))
        with np.errstate(invalid="ignore", divide="ignore"):
            t = np.where(c > 0, np.mod(t + c, 2.0 * c) - c, 0.0)
        return t * ux - h * uy, t * uy + h * ux

    def _noise_members(self, m: int, n_signal: int) -> np.ndarray:
        """Indices (into ``0..m-1``) of a random subset of ``m - n_signal`` members."""
        if n_signal == 0:
            return np.arange(m)
        keys = self._rng.random(m)
        return np.argpartition(keys, n_signal)[n_signal:]

    def _random_places(self, n: int) -> np.ndarray:
        """``n`` points drawn uniformly over the aperture disc."""
        r = self._radius * np.sqrt(self._rng.random(n))
        phi = self._rng.uniform(0.0, 2.0 * math.pi, n)
        return np.column_stack((r * np.cos(phi), r * np.sin(phi)))
