"""How a display turns grey levels into light: the gain–offset–gamma model.

A photometer reading ``L`` (cd/m²) of a patch drawn at grey level ``v``
(0..1 of the display's range) is modelled as

    L(v) = black + amplitude · max(0, gain · v + offset) ** gamma,   offset = 1 − gain

the gain–offset–gamma (GOG) model of CRT colorimetry (Berns, Motta &
Gorzynski 1993, Color Research & Application 18; Berns 1996, Displays 16 —
references from memory), written in luminance with the normalisation
``gain + offset = 1`` that makes the bracket 1 at full level, so that

* ``black`` = L(0) when ``gain >= 1`` (the light of a black screen, display
  flare and room light included),
* ``black + amplitude`` = L(1), the maximum,
* ``gain > 1`` (negative offset) means levels below ``(gain − 1) / gain``
  all give black.

The same model is fitted per gun (only that gun driven, the others at 0) or
to grey (all three guns at the same level).

Fitting is weighted least squares (:func:`scipy.optimize.least_squares`)
with a standard deviation proportional to the reading, floored at 1 % of the
largest reading (photometer errors are roughly a fixed fraction of the
reading; our choice).  Intervals are asymptotic: the covariance
``s² (JᵀJ)⁻¹`` of the weighted problem with Student-t quantiles on
``n − 4`` degrees of freedom.

Readings are checked before any fit (:func:`check_readings`): repeats that
disagree, level means that fall as the level rises, and readings far from
the fitted curve are reported with their rows, and :func:`fit_readings`
refuses them unless told to fit anyway.  Nothing here imports ``runner`` or
psychopy.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy import special

from fitting.errors import InputError

#: Channels a reading can belong to: all guns at one level, or one gun alone.
CHANNELS = ("grey", "red", "green", "blue")

#: Fewest distinct levels per channel (four parameters, and one to spare).
MIN_LEVELS = 5

#: Repeats of one level may differ by this fraction of their mean ...
REPEAT_SPREAD = 0.05
#: ... or by this fraction of the channel's largest reading, whichever is larger.
#: (Spot photometers repeat to about 1–2 %: common practice, no source.)
SCALE_FRACTION = 0.01
#: Most readings a readings file may hold: far more than any measurement takes (9 levels x 4 channels x 10
#: repeats is 360); a larger file is another file, and would make a profile every later check reads slowly.
MAX_READINGS = 10_000
#: Dark repeats: repeats that differ by more than this factor and by more than DARK_FLOOR_CD_M2 disagree
#: whatever the channel's maximum (at the dark end 1 % of the maximum is several times the reading itself;
#: common practice, no source).
DARK_REPEAT_RATIO = 2.0
DARK_FLOOR_CD_M2 = 0.1
#: The lowest and highest levels measured must reach these, or black and maximum are extrapolated.
SPAN_LEVELS = (0.05, 0.95)
#: A reading may lie this far (fraction of itself) from the fitted curve, or
#: SCALE_FRACTION of the maximum, whichever is larger.
RESIDUAL_LIMIT = 0.05

#: The model's parameters, in the order of :class:`GainOffsetGamma` (and of a profile's model tables).
MODEL_FIELDS = ("black_cd_m2", "amplitude_cd_m2", "gain", "gamma")
#: Where the fit looks for the gain and the gamma (also what a light profile may hold). Displays are near
#: gain 1 and gamma 2.2 (sRGB's reference display, IEC 61966-2-1); the ranges leave room for uncommon
#: curves (common practice, no source).
GAIN_RANGE = (0.2, 5.0)
GAMMA_RANGE = (0.3, 6.0)
#: Least ratio of grey's maximum to its black level a light profile may have. Displays give hundreds to
#: thousands to one; a ratio near 1 means the photometer did not see the patch (aimed at the wall, the
#: room light swamping it) or a dynamic mode followed the level (common practice, no source). Near 1 the
#: screening could not count a flash at all: WCAG 2.x SC 2.3.1 counts none whose darker state is at 0.8
#: of the maximum or above.
MIN_CONTRAST_RATIO = 10.0


@dataclass(frozen=True)
class GainOffsetGamma:
    """The gain–offset–gamma model of one channel, in cd/m².

    Attributes
    ----------
    black_cd_m2 : float
        Luminance added at every level (a black screen's light when gain >= 1).
    amplitude_cd_m2 : float
        Luminance the channel adds at full level.
    gain : float
        Gain of the normalised level; the offset is ``1 - gain``.
    gamma : float
        Exponent.
    """

    black_cd_m2: float
    amplitude_cd_m2: float
    gain: float
    gamma: float

    @property
    def offset(self) -> float:
        """Offset of the normalised level, ``1 - gain``."""
        return 1.0 - self.gain

    @property
    def min_cd_m2(self) -> float:
        """Luminance at level 0."""
        return float(self.luminance(0.0))

    @property
    def max_cd_m2(self) -> float:
        """Luminance at level 1."""
        return float(self.luminance(1.0))

    def normalised(self, level) -> np.ndarray:
        """``max(0, gain·v + offset) ** gamma``: 0 at black, 1 at full level."""
        v = np.asarray(level, dtype=float)
        return np.maximum(self.gain * v + self.offset, 0.0) ** self.gamma

    def luminance(self, level) -> np.ndarray:
        """Luminance (cd/m²) at grey level(s) ``level`` (0..1)."""
        return self.black_cd_m2 + self.amplitude_cd_m2 * self.normalised(level)

    def level(self, luminance_cd_m2) -> np.ndarray:
        """The lowest grey level (0..1) that gives ``luminance_cd_m2``.

        Values outside ``[min_cd_m2, max_cd_m2]`` give nan; callers refuse
        them by name (see :func:`runner.light.plan_light`).
        """
        y = np.asarray(luminance_cd_m2, dtype=float)
        lo, hi = self.min_cd_m2, self.max_cd_m2
        tol = 1e-9 * max(hi, 1.0)
        frac = np.clip((y - self.black_cd_m2) / self.amplitude_cd_m2, 0.0, None)
        v = (frac ** (1.0 / self.gamma) - self.offset) / self.gain
        v = np.clip(v, 0.0, 1.0)
        return np.where((y >= lo - tol) & (y <= hi + tol), v, np.nan)

    def as_dict(self) -> dict[str, float]:
        """Parameters by name, the derived offset included."""
        return {
            "black_cd_m2": self.black_cd_m2,
            "amplitude_cd_m2": self.amplitude_cd_m2,
            "gain": self.gain,
            "offset": self.offset,
            "gamma": self.gamma,
        }


@dataclass(frozen=True)
class Readings:
    """Photometer readings of one display.

    Attributes
    ----------
    level : numpy.ndarray
        Grey level of each reading (0..1).
    cd_m2 : numpy.ndarray
        The reading, cd/m².
    channel : numpy.ndarray of str
        ``grey`` or the gun driven alone (``red``, ``green``, ``blue``).
    row : numpy.ndarray of int
        Where each reading came from: its row in the CSV file (the header is
        row 1), or its order of entry on the measurement screen.
    source : str
        The file (or screen session) the readings came from, for messages.
    """

    level: np.ndarray
    cd_m2: np.ndarray
    channel: np.ndarray
    row: np.ndarray
    source: str = "<readings>"

    def only(self, channel: str) -> "Readings":
        """The readings of one channel."""
        keep = self.channel == channel
        return Readings(self.level[keep], self.cd_m2[keep], self.channel[keep], self.row[keep], self.source)

    @property
    def channels(self) -> list[str]:
        """Channels present, in the order of :data:`CHANNELS`."""
        return [c for c in CHANNELS if np.any(self.channel == c)]


@dataclass(frozen=True)
class Problem:
    """Readings that should not be fitted as they are.

    Attributes
    ----------
    channel : str
    kind : {"repeats disagree", "not monotonic", "far from the curve", "range not measured"}
    rows : tuple of int
        The offending rows.
    message : str
        What is wrong, in plain words.
    """

    channel: str
    kind: str
    rows: tuple[int, ...]
    message: str

    def line(self) -> str:
        """One line for the console."""
        rows = f" (rows {', '.join(str(r) for r in self.rows)})" if self.rows else ""
        return f"{self.channel}: {self.kind}{rows}: {self.message}"


class ReadingsRefused(InputError):
    """Readings with problems, refused for fitting (exit 2).

    Attributes
    ----------
    problems : list of Problem
    """

    def __init__(self, source: str, problems: list[Problem], hint: str = ""):
        self.problems = list(problems)
        first = self.problems[0]
        more = f"; {len(self.problems) - 1} more problem(s) listed above" if len(self.problems) > 1 else ""
        super().__init__(source, f"rows {', '.join(str(r) for r in first.rows)}" if first.rows else "levels",
                         f"{first.channel}: {first.kind}: {first.message}{more}{hint}")


@dataclass(frozen=True)
class ChannelFit:
    """A fitted channel: the model with intervals and residuals.

    Attributes
    ----------
    channel : str
    model : GainOffsetGamma
    ci : dict of str to (float, float)
        Confidence interval of every parameter (``offset`` included).
    level_ci : float
        Confidence level of ``ci``.
    readings : Readings
        What was fitted.
    residuals_cd_m2 : numpy.ndarray
        Reading minus fitted luminance, one per reading.
    dof : int
        Residual degrees of freedom.
    problems : list of Problem
        Problems found (empty unless fitted anyway).
    """

    channel: str
    model: GainOffsetGamma
    ci: dict[str, tuple[float, float]]
    level_ci: float
    readings: Readings
    residuals_cd_m2: np.ndarray
    dof: int
    problems: list[Problem] = field(default_factory=list)

    @property
    def rms_residual_cd_m2(self) -> float:
        """Root-mean-square residual (cd/m²)."""
        return float(np.sqrt(np.mean(self.residuals_cd_m2**2)))

    @property
    def max_relative_residual(self) -> float:
        """Largest residual as a fraction of the channel's maximum."""
        return float(np.max(np.abs(self.residuals_cd_m2)) / self.model.max_cd_m2)

    def summary_lines(self) -> list[str]:
        """Parameters with intervals and the residuals, for the console."""
        m = self.model
        pct = f"{self.level_ci:.0%}"
        lines = [f"{self.channel}: {self.readings.level.size} readings, black {m.min_cd_m2:.4g} cd/m2, "
                 f"max {m.max_cd_m2:.4g} cd/m2"]
        for name, value in m.as_dict().items():
            lo, hi = self.ci[name]
            lines.append(f"  {name:<16} {value:>10.4g}   {pct} CI [{lo:.4g}, {hi:.4g}]")
        lines.append(f"  residuals: rms {self.rms_residual_cd_m2:.3g} cd/m2, largest "
                     f"{self.max_relative_residual:.2%} of the maximum")
        return lines


def flatness(model: GainOffsetGamma) -> str | None:
    """Why a grey model is too flat to be a display's, or None when its maximum is clearly above black.

    Parameters
    ----------
    model : GainOffsetGamma
        The grey fit.

    Returns
    -------
    str or None
        A sentence for an error message when the maximum is less than
        :data:`MIN_CONTRAST_RATIO` times the black level.
    """
    black, top = model.min_cd_m2, model.max_cd_m2
    if top >= MIN_CONTRAST_RATIO * black:
        return None
    return (f"the maximum, {top:.4g} cd/m2, is only {top / black:.3g} times the black level, {black:.4g} cd/m2, "
            f"less than the {MIN_CONTRAST_RATIO:g} times any display in use gives (common practice, no source); "
            "was the photometer aimed at the patch, with the display's dynamic modes off? Measure again")


def _rows(r: Readings, mask) -> tuple[int, ...]:
    return tuple(int(x) for x in np.sort(r.row[np.asarray(mask)]))


def check_readings(readings: Readings) -> list[Problem]:
    """Problems in one channel's readings, before fitting.

    * Repeats of a level that differ by more than :data:`REPEAT_SPREAD` of
      their mean and :data:`SCALE_FRACTION` of the channel's largest reading,
      or by more than a factor :data:`DARK_REPEAT_RATIO` and
      :data:`DARK_FLOOR_CD_M2` (a slip at the dark end).
    * Levels that do not reach down to ``SPAN_LEVELS[0]`` and up to
      ``SPAN_LEVELS[1]`` (:data:`SPAN_LEVELS`): the black level or the
      maximum would be extrapolated.
    * A level whose mean reading is lower than the mean of a lower level by
      more than :data:`SCALE_FRACTION` of the largest reading.

    Parameters
    ----------
    readings : Readings
        One channel (see :meth:`Readings.only`).

    Returns
    -------
    list of Problem
    """
    out: list[Problem] = []
    channel = str(readings.channel[0]) if readings.channel.size else "grey"
    scale = SCALE_FRACTION * float(np.max(readings.cd_m2))
    levels = np.unique(readings.level)
    means = np.array([readings.cd_m2[readings.level == v].mean() for v in levels])
    for v, mean in zip(levels, means):
        at = readings.level == v
        values = readings.cd_m2[at]
        spread = float(values.max() - values.min())
        dark_slip = spread > DARK_FLOOR_CD_M2 and values.max() > DARK_REPEAT_RATIO * values.min()
        if values.size > 1 and (spread > max(REPEAT_SPREAD * mean, scale) or dark_slip):
            out.append(Problem(channel, "repeats disagree", _rows(readings, at),
                               f"level {v:g} read {', '.join(f'{x:g}' for x in values)} cd/m2, "
                               f"{spread / max(mean, 1e-12):.0%} apart; measure it again"))
    if levels.size and (levels[0] > SPAN_LEVELS[0] or levels[-1] < SPAN_LEVELS[1]):
        out.append(Problem(channel, "range not measured", (),
                           f"levels {levels[0]:g} to {levels[-1]:g} only: the fit would extrapolate the "
                           f"{'black level' if levels[0] > SPAN_LEVELS[0] else 'maximum'}; measure levels from "
                           f"{SPAN_LEVELS[0]:g} or lower to {SPAN_LEVELS[1]:g} or higher"))
    running = -np.inf
    running_level = None
    for v, mean in zip(levels, means):
        if mean < running - scale:
            rows = _rows(readings, (readings.level == v) | (readings.level == running_level))
            out.append(Problem(channel, "not monotonic", rows,
                               f"level {v:g} reads {mean:.4g} cd/m2, less than {running:.4g} at the lower level "
                               f"{running_level:g}; check the photometer's range and the display's dynamic modes"))
        if mean > running:
            running, running_level = mean, v
    return out


def _far_from_curve(readings: Readings, fitted: np.ndarray) -> list[Problem]:
    resid = readings.cd_m2 - fitted
    limit = np.maximum(RESIDUAL_LIMIT * np.abs(readings.cd_m2), SCALE_FRACTION * float(np.max(readings.cd_m2)))
    far = np.abs(resid) > limit
    if not far.any():
        return []
    channel = str(readings.channel[0])
    detail = ", ".join(f"row {int(r)}: level {v:g} read {y:g}, curve {f:.4g}"
                       for r, v, y, f in zip(readings.row[far], readings.level[far], readings.cd_m2[far], fitted[far]))
    return [Problem(channel, "far from the curve", _rows(readings, far),
                    f"{detail}; a typing slip or a reading taken before the patch settled?")]


def _start_values(level: np.ndarray, y: np.ndarray) -> list[np.ndarray]:
    black = max(float(np.min(y)), 0.0)
    amp = max(float(np.max(y)) - black, 1e-6)
    use = (level > 0.2) & (y > black)
    gamma0 = 2.2
    if use.sum() >= 2:
        slope = np.polyfit(np.log(level[use]), np.log((y[use] - black) / amp + 1e-12), 1)[0]
        if np.isfinite(slope):
            gamma0 = float(np.clip(slope, 0.5, 5.0))
    return [np.array([black, amp, g, c]) for g in (1.0, 1.1) for c in (gamma0, 2.2)]


def _model_of(x: np.ndarray) -> GainOffsetGamma:
    return GainOffsetGamma(*(float(v) for v in x))


def fit_channel(readings: Readings, level_ci: float = 0.95, fit_anyway: bool = False) -> ChannelFit:
    """Fit the gain–offset–gamma model to one channel's readings.

    Parameters
    ----------
    readings : Readings
        One channel, at least :data:`MIN_LEVELS` distinct levels.
    level_ci : float
        Confidence level of the parameter intervals.
    fit_anyway : bool
        Fit readings with problems (they are kept in ``problems``).

    Returns
    -------
    ChannelFit

    Raises
    ------
    ReadingsRefused
        The readings have problems (:func:`check_readings`, or readings far
        from the fitted curve) and ``fit_anyway`` is False.
    InputError
        Too few levels, no light at all, a grey maximum not clearly above
        black (:func:`flatness`), or a parameter the readings leave
        undetermined (an interval that is not finite); ``fit_anyway`` does
        not lift these.
    """
    from scipy import optimize   # here: reading a light profile need not load scipy.optimize

    channel = str(readings.channel[0]) if readings.channel.size else "grey"
    n_levels = np.unique(readings.level).size
    if n_levels < MIN_LEVELS:
        raise InputError(readings.source, channel,
                         f"{n_levels} distinct levels; the model needs at least {MIN_LEVELS}")
    y, v = readings.cd_m2, readings.level
    top = float(np.max(y))
    if not top > 0:
        raise InputError(readings.source, channel, "every reading is 0; is the photometer pointed at the patch?")
    problems = check_readings(readings)
    if problems and not fit_anyway:
        raise ReadingsRefused(readings.source, problems)
    sigma = np.maximum(y, SCALE_FRACTION * top)

    def residuals(x):
        return (y - _model_of(x).luminance(v)) / sigma

    lower = [0.0, 1e-9 * top, GAIN_RANGE[0], GAMMA_RANGE[0]]
    upper = [top, 3.0 * top, GAIN_RANGE[1], GAMMA_RANGE[1]]
    best = None
    for x0 in _start_values(v, y):
        x0 = np.clip(x0, np.add(lower, 1e-12), np.subtract(upper, 1e-12))
        res = optimize.least_squares(residuals, x0, bounds=(lower, upper), x_scale="jac", xtol=1e-12,
                                     ftol=1e-12, gtol=1e-12, max_nfev=2000)
        if best is None or res.cost < best.cost:
            best = res
    model = _model_of(best.x)
    fitted = model.luminance(v)
    far = _far_from_curve(readings, fitted)
    if far and not fit_anyway:
        raise ReadingsRefused(readings.source, far)
    dof = int(y.size - len(MODEL_FIELDS))
    ci = _intervals(best, dof, level_ci)
    flat = flatness(model) if channel == "grey" else None
    if flat:
        raise InputError(readings.source, f"{channel}: luminance_cd_m2", flat)
    for name, limits in ci.items():
        if not all(math.isfinite(x) for x in limits):
            raise InputError(readings.source, f"{channel}: {name}",
                             f"the readings do not determine it (its {level_ci:.0%} interval is not finite); "
                             "measure levels across the whole range")
    for name, (low, high) in (("gain", GAIN_RANGE), ("gamma", GAMMA_RANGE)):     # refused, --fit-anyway or not
        value = getattr(model, name)
        if min(value - low, high - value) <= 1e-6 * (high - low):
            raise InputError(readings.source, f"{channel}: {name}",
                             f"the fit stopped on the bound of the range the model allows ({value:g}, range "
                             f"{low:g} to {high:g}): no display curve passes through these readings; measure again")
    lo, hi = ci["gain"]
    ci["offset"] = (1.0 - hi, 1.0 - lo)
    return ChannelFit(channel, model, ci, level_ci, readings, y - fitted, dof, problems + far)


def _intervals(result, dof: int, level_ci: float) -> dict[str, tuple[float, float]]:
    x = result.x
    if dof <= 0:
        return {name: (math.nan, math.nan) for name in MODEL_FIELDS}
    s2 = 2.0 * result.cost / dof
    jtj = result.jac.T @ result.jac
    try:
        cov = np.linalg.inv(jtj) * s2
    except np.linalg.LinAlgError:
        return {name: (math.nan, math.nan) for name in MODEL_FIELDS}
    se = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    t = float(special.stdtrit(dof, 0.5 + level_ci / 2.0))   # Student's t quantile (as scipy.stats.t.ppf)
    return {name: (float(x[i] - t * se[i]), float(x[i] + t * se[i])) for i, name in enumerate(MODEL_FIELDS)}


def fit_readings(readings: Readings, level_ci: float = 0.95, fit_anyway: bool = False) -> dict[str, ChannelFit]:
    """Fit every channel present in ``readings``.

    All problems of all channels are collected before refusing, so one run
    lists every row to measure again.

    Returns
    -------
    dict of str to ChannelFit
        By channel, in the order of :data:`CHANNELS`.

    Raises
    ------
    ReadingsRefused
        Listing every problem found (unless ``fit_anyway``).
    """
    fits: dict[str, ChannelFit] = {}
    problems: list[Problem] = []
    for channel in readings.channels:
        try:
            fits[channel] = fit_channel(readings.only(channel), level_ci, fit_anyway)
        except ReadingsRefused as exc:
            problems += exc.problems
    if problems:
        raise ReadingsRefused(readings.source, problems)
    return fits


def make_readings(level, cd_m2, channel=None, row=None, source: str = "<readings>") -> Readings:
    """Validated :class:`Readings` from plain sequences.

    Raises
    ------
    InputError
        Naming the row of the first level outside 0..1, reading that is
        negative or not finite, or unknown channel.
    """
    level = np.asarray(level, dtype=float)
    cd_m2 = np.asarray(cd_m2, dtype=float)
    n = level.size
    channel = np.asarray(["grey"] * n if channel is None else [str(c).strip().lower() or "grey" for c in channel])
    row = np.arange(1, n + 1) if row is None else np.asarray(row, dtype=int)
    if not (cd_m2.size == n == channel.size == row.size):
        raise InputError(source, "columns", "level, luminance and channel need one value per reading")
    if n == 0:
        raise InputError(source, "rows", "no readings")
    for i in range(n):
        if not (math.isfinite(level[i]) and 0.0 <= level[i] <= 1.0):
            raise InputError(source, f"row {row[i]}: level", f"expected a grey level from 0 to 1, got {float(level[i])!r}")
        if not (math.isfinite(cd_m2[i]) and 0.0 <= cd_m2[i] < 1e6):
            raise InputError(source, f"row {row[i]}: luminance_cd_m2",
                             f"expected a reading in cd/m2 from 0 to 1e6, got {float(cd_m2[i])!r}")
        if channel[i] not in CHANNELS:
            raise InputError(source, f"row {row[i]}: gun", f"expected one of {', '.join(CHANNELS)}, got {str(channel[i])!r}")
    return Readings(level, cd_m2, channel, row, source)


#: Columns of a readings file (``gun`` may be left out: all grey).
READINGS_COLUMNS = ("level", "luminance_cd_m2", "gun")


def read_readings(path: str | Path) -> Readings:
    """Read photometer readings from a CSV file.

    The file has a header with ``level`` and ``luminance_cd_m2`` and, when
    guns were measured alone, ``gun`` (``grey``, ``red``, ``green`` or
    ``blue``; empty = grey).  Other columns are ignored; a row with more
    cells than the header is refused (a decimal comma splits a number in
    two).  Rows are numbered as a spreadsheet or editor shows them: the
    header is row 1, blank lines count.

    Raises
    ------
    InputError
        Missing file or column, or a bad cell (naming its line and column).
    """
    import csv

    p = Path(path)
    if not p.is_file():
        raise InputError(str(p), "file", "does not exist" if not p.exists() else "is not a file")
    try:
        with p.open(newline="", encoding="utf-8-sig") as f:    # -sig: a spreadsheet's "CSV UTF-8" byte-order mark
            reader = csv.reader(f)
            header = [name.strip() for name in next(reader, [])]
            rows = []
            for cells in reader:
                if any(cell.strip() for cell in cells):
                    rows.append((reader.line_num, cells))
                    if len(rows) > MAX_READINGS:
                        raise InputError(str(p), "file", f"holds more than {MAX_READINGS:,} readings, far more "
                                         "than a measurement takes; is it the readings file?")
    except UnicodeDecodeError:
        raise InputError(str(p), "file", "is not UTF-8 text; expected a CSV file") from None
    except (OSError, csv.Error) as exc:
        raise InputError(str(p), "file", f"cannot be read as CSV ({exc})") from None
    for name in READINGS_COLUMNS:
        if header.count(name) > 1:
            raise InputError(str(p), name, "the column appears twice in the header")
    for name in READINGS_COLUMNS[:2]:
        if name not in header:
            raise InputError(str(p), name, f"missing column; expected a header with {', '.join(READINGS_COLUMNS)}")
    if not rows:
        raise InputError(str(p), "file", "holds a header but no readings")
    level, value, gun, line = [], [], [], []
    for i, cells in rows:       # i: the line the row ends on, as a spreadsheet or editor shows it
        while len(cells) > len(header) and not cells[-1].strip():
            cells = cells[:-1]      # empty cells a spreadsheet adds at the end of a row
        if len(cells) > len(header):
            raise InputError(str(p), f"row {i}", f"has {len(cells)} cells, the header {len(header)}: a decimal "
                             f"comma ({','.join(cells)[:40]!r})? Write decimals with a point")
        r = dict(zip(header, cells))
        for name, out in (("level", level), ("luminance_cd_m2", value)):
            cell = (r.get(name) or "").strip()
            try:
                if "_" in cell:     # float() reads 1_0 as 10
                    raise ValueError(cell)
                out.append(float(cell))
            except ValueError:
                raise InputError(str(p), f"row {i}: {name}", f"expected a number, got {cell!r}") from None
        gun.append(r.get("gun") or "grey")
        line.append(i)
    return make_readings(level, value, gun, line, source=str(p))
