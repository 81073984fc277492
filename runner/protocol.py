"""Protocol files: schema, loading and validation.

A protocol is a TOML file with the sections ``[display]``, ``[dots]``,
``[timing]``, ``[design]``, ``[procedure]``, ``[keys]`` and ``[safety]``
plus two top-level keys (``title``, ``reference_deg``).  Every field has a
default fit for a dark-room direction-after-effect experiment, so a protocol
only states what differs.  Units are part of the names (``_deg``, ``_s``,
``_hz``, ``_cm``, ``_px``).  The README lists every field.

Loading never raises anything but :class:`fitting.errors.InputError`, whose
text is one line naming the file, the field and what was expected.
"""

from __future__ import annotations

import math
import unicodedata
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, PrivateAttr, ValidationError, field_validator, model_validator

from fitting.errors import InputError, file_problem
from runner import geometry, timing
from runner.adaptive import STRADDLE_SPREADS
from runner.light_settings import LightSettings
from runner.stream_settings import StreamSettings, check_stream
from runner.toml_text import toml_tables


#: The most trials one track may have (``design.trials_per_track``).
MAX_TRIALS_PER_TRACK = 10_000
#: Methods that choose every level themselves and refuse a ``procedure.start_offset_deg``.
CHOOSE_THEIR_LEVELS = ("bayesian", "constant")
#: Protocol files larger than this are refused before parsing.
MAX_PROTOCOL_BYTES = 1_000_000

KEY_NAMES = (
    "left right up down space escape return tab p q a s d f j k l z x n m b v c "
    "comma period slash semicolon 1 2 3 4 5 6 7 8 9 0 num_1 num_2 num_3 num_4 num_6 "
    "num_7 num_8 num_9"
).split()


class FrameTimingError(InputError):
    """A duration that is not a whole number of frames at the refresh rate.

    The command line refuses such a protocol with exit code 3 (display
    timing), not 2: the file is well formed, the display cannot deliver it.
    """


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False, frozen=True)


class DisplayProfile(_Section):
    """The display a protocol was written for.

    Attributes
    ----------
    refresh_hz : float
        Refresh rate; every duration must be whole frames at this rate.
    screen_cm : [float, float]
        Visible width and height of the picture, in centimetres.
    screen_px : [int, int]
        Width and height in pixels.
    distance_cm : float
        Eye-to-screen distance.
    background : float
        Background grey level, 0..1 of the display's range (0 for a dark room).
    """

    refresh_hz: float = Field(120.0, gt=20, le=500)
    screen_cm: list[float] = Field(default_factory=lambda: [53.0, 30.0], min_length=2, max_length=2)
    screen_px: list[int] = Field(default_factory=lambda: [1920, 1080], min_length=2, max_length=2)
    distance_cm: float = Field(57.0, gt=10, le=1000)
    background: float = Field(0.0, ge=0, le=1)

    @field_validator("screen_cm")
    @classmethod
    def _positive_cm(cls, v):
        if any(not (1 <= x <= 1000) for x in v):
            raise ValueError("expected two sizes between 1 and 1000 cm")
        return v

    @field_validator("screen_px")
    @classmethod
    def _positive_px(cls, v):
        if any(not (64 <= x <= 20000) for x in v):
            raise ValueError("expected two pixel counts between 64 and 20000")
        return v

    @property
    def px_per_deg(self) -> float:
        """Pixels per degree at the centre of the screen (horizontal axis)."""
        return geometry.deg_to_px(1.0, self.distance_cm, self.screen_cm[0], self.screen_px[0])

    @property
    def extent_deg(self) -> tuple[float, float]:
        """Full visual angle of the screen, width and height."""
        return (
            geometry.screen_extent_deg(self.distance_cm, self.screen_cm[0]),
            geometry.screen_extent_deg(self.distance_cm, self.screen_cm[1]),
        )


class DotsSettings(_Section):
    """Random-dot field.

    Attributes
    ----------
    aperture_radius_deg : float
        Radius of the circular aperture, centred on fixation.
    density_per_deg2 : float
        Dots per square degree of aperture.
    dot_size_deg : float
        Dot diameter.
    speed_deg_s : float
        Speed of every moving dot; at least one pixel per second on the
        protocol's display (slower dots show no motion to judge).
    coherence : float
        Fraction of dots moving in the period's direction (0..1), in every
        period, the test included; it must give at least one moving dot
        (``round(coherence * dots) >= 1``): a test without coherent motion
        has no direction to judge.
    lifetime_frames : int
        Frames a dot lives before it is replotted at a random place.
    level : float
        Dot grey level, 0..1 of the display's range; dots must differ from
        ``display.background`` by at least one step of an 8-bit display
        (1/255) in some gun, or they may be drawn invisible.
    color_rgb : [float, float, float]
        Dot colour multiplier per gun (0..1); the drawn colour is
        ``level * color_rgb``.  White by default.
    fixation_deg : float
        Size of the fixation mark at the centre (0 = none).
    """

    aperture_radius_deg: float = Field(5.0, gt=0, le=60)
    density_per_deg2: float = Field(1.5, gt=0, le=50)
    dot_size_deg: float = Field(0.1, gt=0, le=2)
    speed_deg_s: float = Field(5.0, ge=0, le=100)
    coherence: float = Field(1.0, ge=0, le=1)
    lifetime_frames: int = Field(12, ge=1, le=100000)
    level: float = Field(0.6, ge=0, le=1)
    color_rgb: list[float] = Field(default_factory=lambda: [1.0, 1.0, 1.0], min_length=3, max_length=3)
    fixation_deg: float = Field(0.2, ge=0, le=5)

    @field_validator("color_rgb")
    @classmethod
    def _unit_rgb(cls, v):
        if any(not (0 <= x <= 1) for x in v):
            raise ValueError("expected three values between 0 and 1")
        return v

    @property
    def n_dots(self) -> int:
        """Number of dots in the aperture."""
        return int(round(self.density_per_deg2 * math.pi * self.aperture_radius_deg**2))


class TimingSettings(_Section):
    """Durations of one adapt–test trial, in seconds.

    Attributes
    ----------
    first_adaptation_s : float
        Long adaptation once at the start of the block (0 = none).  Only
        allowed with a single adapter offset: with several offsets interleaved
        it would bias the conditions unequally.
    adapter_s : float
        Adapter (top-up) at the start of every trial.
    period_s : float
        Each intervening motion period between adapter and test.
    test_s : float
        Test motion.
    gap_s : float
        Blank between successive periods (0 = periods follow directly).
    answer_window_s : float
        Time allowed for an answer after the test ends; a later answer is a
        missed trial.
    pause_after_answer_s : float
        Blank pause between the answer and the next trial.
    """

    first_adaptation_s: float = Field(0.0, ge=0, le=600)
    adapter_s: float = Field(0.5, gt=0, le=120)
    period_s: float = Field(0.5, gt=0, le=60)
    test_s: float = Field(0.5, gt=0, le=60)
    gap_s: float = Field(0.0, ge=0, le=60)
    answer_window_s: float = Field(3.0, gt=0, le=60)
    pause_after_answer_s: float = Field(0.4, ge=0, le=60)


class DesignSettings(_Section):
    """Conditions and trial counts of a block.

    Attributes
    ----------
    adapter_offsets_deg : list of float
        Adapter directions as offsets from the reference (positive = clockwise).
    lags : list of int
        Numbers of intervening motion periods between adapter and test.
    baseline : {"static", "blank"}
        What replaces the adapter in the baseline condition.
    intervening : {"balanced", "reference"}
        Directions of intervening periods: ``balanced`` draws offsets from
        ``intervening_offsets_deg`` in mirrored pairs per condition and
        position, so that any odd-symmetric after-effect they cause cancels;
        ``reference`` shows the reference direction itself.
    intervening_offsets_deg : list of float
        The set used by ``balanced``; it must be symmetric about 0.
    tracks_per_condition : int
        Adaptive tracks per condition (2: one from each side).
    trials_per_track : int
        Trials each track runs.
    practice_trials : int
        Practice trials at the start, easy levels, excluded from analysis.
    practice_offset_deg : float
        Test offset magnitude of practice trials; at least the smallest step
        the tracks use (the least of ``procedure.steps_deg``; 0.5°, the
        Bayesian level grid's spacing; the least spacing of
        ``procedure.levels_deg``), since practice is scored right or wrong.
    practice_feedback : bool
        Show whether practice answers were correct.
    break_every : int
        A break screen after this many trials (0 = no breaks).
    """

    adapter_offsets_deg: list[float] = Field(
        default_factory=lambda: [-90.0, -60.0, -30.0, -15.0, 15.0, 30.0, 60.0, 90.0], min_length=1, max_length=64
    )
    lags: list[int] = Field(default_factory=lambda: [0, 1, 2, 3], min_length=1, max_length=32)
    baseline: Literal["static", "blank"] = "static"
    intervening: Literal["balanced", "reference"] = "balanced"
    intervening_offsets_deg: list[float] = Field(
        default_factory=lambda: [-135.0, -90.0, -45.0, 45.0, 90.0, 135.0], min_length=1, max_length=64
    )
    tracks_per_condition: int = Field(2, ge=1, le=8)
    trials_per_track: int = Field(20, ge=1, le=MAX_TRIALS_PER_TRACK)
    practice_trials: int = Field(8, ge=0, le=1000)
    practice_offset_deg: float = Field(20.0, gt=0, le=90)
    practice_feedback: bool = True
    break_every: int = Field(120, ge=0, le=100000)

    @field_validator("adapter_offsets_deg", "intervening_offsets_deg")
    @classmethod
    def _offsets(cls, v):
        if any(not (-180 <= x <= 180) for x in v):
            raise ValueError("expected offsets between -180 and 180 degrees")
        if len(set(v)) != len(v):
            raise ValueError("expected distinct offsets")
        if -180 in v and 180 in v:
            raise ValueError("-180 and 180 are the same direction; keep one of them")
        return v

    @field_validator("adapter_offsets_deg")
    @classmethod
    def _no_zero_adapter(cls, v):
        if any(x == 0 for x in v):
            raise ValueError("an adapter offset of 0 is the reference itself; the baseline is added automatically")
        return v

    @field_validator("lags")
    @classmethod
    def _lags(cls, v):
        if any(x < 0 or x > 100 for x in v):
            raise ValueError("expected lags as whole numbers from 0 to 100")
        if len(set(v)) != len(v):
            raise ValueError("expected distinct lags")
        return v

    @field_validator("intervening_offsets_deg")
    @classmethod
    def _symmetric(cls, v):
        if sorted(v) != sorted(-x if abs(x) != 180 else x for x in v):
            raise ValueError("expected a set symmetric about 0 (each offset with its mirror)")
        return v


#: One step of the grey levels an 8-bit display draws (1/255 of its range): dots that differ from the
#: background by less may be drawn in the background's own code, invisible (common practice, no source).
GREY_STEP = 1.0 / 255.0


def grey_step_short(dot_rgb, background: float) -> bool:
    """True when no gun of the dots differs from the background by one 8-bit step (:data:`GREY_STEP`)."""
    return max(abs(v - background) for v in dot_rgb) < GREY_STEP - 1e-12


PSE_GRID_STEP_DEG = 0.5   # spacing of the Bayesian tracks' PSE grid and level list (runner.tracks)


class ProcedureSettings(_Section):
    """How test offsets are chosen.

    Attributes
    ----------
    method : {"updown", "weighted", "bayesian", "constant"}
        Levitt's transformed up–down, Kaernbach's weighted up–down, the
        Bayesian method (a posterior over PSE, spread and lapse, Kontsevich &
        Tyler, 1999; see ``bayes_placement``), or constant stimuli.
    start_offset_deg : float
        ``updown``, ``weighted``: tracks start this far from the reference,
        one track on each side.  Refused with ``bayesian`` (the prior,
        ``pse_range_deg`` and ``bayes_pse_prior_sd_deg``, decides its first
        level) and ``constant``.
    bounds_deg : [float, float]
        Lowest and highest test offset.
    steps_deg : list of float
        Step sizes used in turn after each reversal (the last is kept).
    k_down : int
        ``updown``: Levitt's k — consecutive answers on the track's side
        before a step toward the other side (1 converges on the PSE, 2 on
        70.7 %/29.3 %).
    target_cw : float
        ``weighted``: proportion of clockwise answers the first track aims
        at; the second aims at ``1 - target_cw``.

    The defaults (start ±2°, steps 4, 2, 1, 0.5°, k 1, target 55 %, the
    Bayesian grid and PSE prior below) keep the trials near the PSE: at 80
    trials per condition and PSEs within ±5° they reach about 0.85–0.9 of
    the Cramér–Rao bound on the PSE, and they
    still reach a PSE 15° away
    (``benchmarks/bench_default_tracks.py``).  They trade away spread
    precision; for the spread use ``k_down = 2`` or ``bayes_target =
    "pse_spread"``.
    max_reversals : int
        Stop a track after this many reversals (0 = stop by trials only).
    levels_deg : list of float
        ``constant``: the test offsets; each track shows each level
        ``trials_per_track / len(levels_deg)`` times.
    bayes_placement : {"entropy", "pse_mean", "straddle"}
        ``bayesian``: where the next trial goes.  ``"entropy"`` (default):
        the level of least expected posterior entropy of ``bayes_target``
        (Kontsevich & Tyler, 1999), which spends some trials off the PSE to
        learn the spread; ``"pse_mean"``: the level nearest the posterior
        mean of the PSE (King-Smith et al., 1994), which keeps the trials at
        the PSE (PSE efficiency 0.84 against 0.81 at σ = 3°), but the spread
        is then learnt poorly and the fit's intervals cover less (condition
        PSEs at 24 trials per condition: 91.2 % with one such track and
        ``fit``'s default re-run pilot, against 94.2 % with the default
        placement; ``benchmarks/README.md``); ``"straddle"``: the levels
        nearest the posterior mean of the PSE plus and minus
        ``bayes_straddle_spreads`` times the posterior mean of the spread,
        above and below in turn (the first track starts above, the second
        below), which keeps the trials near the PSE and on both sides of it.
        With the default PSE prior: PSE efficiency 0.84 / 0.845 (lapse 0 /
        4 %) with a single condition, below the default placement's
        0.88 / 0.86, and intervals on the wide side at 24 trials per
        condition (``compare``'s χ² rejected none of 66 true models)
        (``benchmarks/README.md``).
    bayes_straddle_spreads : float
        ``"straddle"``: distance of the levels from the PSE estimate, in
        estimated spreads.
    bayes_pse_prior_sd_deg : float
        ``bayesian``: the SD of a Gaussian prior on the PSE centred on the
        reference (default 6°), for PSEs expected near it, as the up–down
        tracks' start at ±``start_offset_deg`` expects them; 0 gives every
        PSE of ``pse_range_deg`` the same prior probability (the default
        before; sessions started then resume with it).  With 6: PSE
        efficiency 0.88 / 0.86 (lapse 0 / 4 %) with a single condition
        against 0.81 / 0.81 with 0, 0.915 / 0.87 against 0.88 / 0.855 in
        sessions of 8 conditions, and a PSE 15° away is still
        reached (RMSE 0.52°).  Every named interval in the band at 24 and 40
        trials per condition (decay at 40: 95.2 % on 330 simulated
        observers) (``benchmarks/README.md``).  The prior steers
        only where trials go: ``fit`` estimates the PSE by maximum
        likelihood, without it.
    bayes_target : {"pse", "pse_spread"}
        ``bayesian`` with ``bayes_placement = "entropy"``: minimise the
        entropy of the PSE alone or of PSE and spread.
    bayes_share_spread : bool
        ``bayesian``: every track chooses its levels with what all the
        session's tracks have learnt about spread and lapse, which the fit
        gives all conditions in common (``runner/shared_evidence.py``); each
        track still learns its own PSE.  With the spread learnt from the
        whole session the trials move towards the PSE: PSE efficiency
        0.88 / 0.855 (lapse 0 / 4 %) against 0.78 / 0.80 in sessions of 8
        conditions at σ = 3°, 0.82 / 0.81 against 0.81 / 0.79 with a single
        condition (both with the uniform PSE prior of then), intervals as
        before (``benchmarks/README.md``).  ``false``: every track learns
        alone, as when the conditions' spreads are expected to differ.
    pse_range_deg, spread_range_deg : [float, float]
        ``bayesian``: the parameter grid, i.e. the support of its prior
        (uniform in the spread; in the PSE as ``bayes_pse_prior_sd_deg``
        says).  The defaults (±20°, 1–10°) cover PSEs 15° away and the usual
        spreads of direction judgments; a wider grid spends a 40-trial track's
        first trials far from the PSE (PSE efficiency 0.7 at ±30°, 0.5–20°).
    """

    method: Literal["updown", "weighted", "bayesian", "constant"] = "updown"
    start_offset_deg: float = Field(2.0, ge=0, le=180)
    bounds_deg: list[float] = Field(default_factory=lambda: [-45.0, 45.0], min_length=2, max_length=2)
    steps_deg: list[float] = Field(default_factory=lambda: [4.0, 2.0, 1.0, 0.5], min_length=1, max_length=32)
    k_down: int = Field(1, ge=1, le=5)
    target_cw: float = Field(0.55, gt=0.5, lt=1)
    max_reversals: int = Field(0, ge=0, le=10000)
    levels_deg: list[float] = Field(
        default_factory=lambda: [-16.0, -8.0, -4.0, -2.0, 2.0, 4.0, 8.0, 16.0], min_length=2, max_length=200
    )
    bayes_placement: Literal["entropy", "pse_mean", "straddle"] = "entropy"
    bayes_straddle_spreads: float = Field(STRADDLE_SPREADS, ge=0, le=3)
    bayes_pse_prior_sd_deg: float = Field(6.0, ge=0, le=180)
    bayes_target: Literal["pse", "pse_spread"] = "pse"
    bayes_share_spread: bool = True
    pse_range_deg: list[float] = Field(default_factory=lambda: [-20.0, 20.0], min_length=2, max_length=2)
    spread_range_deg: list[float] = Field(default_factory=lambda: [1.0, 10.0], min_length=2, max_length=2)

    @field_validator("bounds_deg", "pse_range_deg")
    @classmethod
    def _ordered_range(cls, v):
        if not (-180 <= v[0] < v[1] <= 180):
            raise ValueError("expected [low, high] with -180 <= low < high <= 180")
        return v

    @field_validator("spread_range_deg")
    @classmethod
    def _spread_range(cls, v):
        if not (0 < v[0] < v[1] <= 180):
            raise ValueError("expected [low, high] with 0 < low < high <= 180")
        return v

    @field_validator("steps_deg")
    @classmethod
    def _steps(cls, v):
        if any(not (0 < x <= 90) for x in v):
            raise ValueError("expected step sizes between 0 and 90 degrees")
        return v

    @field_validator("levels_deg")
    @classmethod
    def _levels(cls, v):
        if any(not (-180 <= x <= 180) for x in v):
            raise ValueError("expected levels between -180 and 180 degrees")
        if len(set(v)) != len(v):
            raise ValueError("expected distinct levels")
        return v


class KeySettings(_Section):
    """Keys, by the names psychopy's keyboard reports.

    Attributes
    ----------
    cw, ccw : str
        Answer keys: test clockwise of the reference ("right of vertical"
        for an upward reference) and counter-clockwise.
    quit : str
        Ends the session cleanly; completed trials are kept.
    proceed : str
        Continues past instruction, caution and break screens.
    pause : str
        Pauses between trials until ``proceed``.
    """

    cw: str = "right"
    ccw: str = "left"
    quit: str = "escape"
    proceed: str = "space"
    pause: str = "p"

    @field_validator("cw", "ccw", "quit", "proceed", "pause")
    @classmethod
    def _known_key(cls, v):
        if v not in KEY_NAMES:
            raise ValueError(f"unknown key {v!r}; expected one of: {', '.join(KEY_NAMES)}")
        return v

    @model_validator(mode="after")
    def _distinct(self):
        keys = [self.cw, self.ccw, self.quit, self.proceed, self.pause]
        if len(set(keys)) != len(keys):
            raise ValueError("expected five distinct keys for cw, ccw, quit, proceed and pause")
        return self


class SafetySettings(_Section):
    """Photosensitivity-related settings.

    Attributes
    ----------
    photodiode_patch_deg : float
        Side of a square in the lower-left corner that is white during every
        test frame (black otherwise), so a light sensor sees test onset and
        offset (0 = none).
    caution_file : str
        Text shown to the observer before the first trial; empty = the
        bundled text.  Relative paths are relative to the protocol file.
    """

    photodiode_patch_deg: float = Field(0.0, ge=0, le=10)
    caution_file: str = ""


class ScreenSettings(_Section):
    """The observer's screens.

    Attributes
    ----------
    instructions_file : str
        Instruction text shown after the caution; empty = the bundled text,
        built from `reference_deg` and `[keys]`.  It may use the placeholders
        `{reference}`, `{cw_side}`, `{ccw_side}`, `{cw_key}`, `{ccw_key}`,
        `{proceed_key}`, `{quit_key}`, `{pause_key}` and `{test_every}`.
        Relative paths are relative to the protocol file.
    """

    instructions_file: str = ""


class Protocol(_Section):
    """A whole protocol file.

    Attributes
    ----------
    title : str
        Shown in plans, logs and reports.
    reference_deg : float
        The judged direction (90 = upward).
    display, dots, timing, design, procedure, keys, safety, screens
        The sections described in their own classes.
    stream : StreamSettings or None
        Present (a ``[stream]`` section) for a continuous-stream block, absent
        for discrete adapt–test trials; see :mod:`runner.stream_settings`.
    light : LightSettings or None
        Present (a ``[light]`` section) to name a light profile and give
        luminances in cd/m²; see :mod:`runner.light_settings`.
    """

    title: str = Field("Direction after-effect", min_length=1, max_length=200)
    reference_deg: float = Field(90.0, ge=0, lt=360)
    display: DisplayProfile = Field(default_factory=DisplayProfile)
    dots: DotsSettings = Field(default_factory=DotsSettings)
    timing: TimingSettings = Field(default_factory=TimingSettings)
    design: DesignSettings = Field(default_factory=DesignSettings)
    procedure: ProcedureSettings = Field(default_factory=ProcedureSettings)
    keys: KeySettings = Field(default_factory=KeySettings)
    safety: SafetySettings = Field(default_factory=SafetySettings)
    screens: ScreenSettings = Field(default_factory=ScreenSettings)
    stream: StreamSettings | None = None
    light: LightSettings | None = None
    #: The resolved ``[light]`` section (:func:`runner.light.light_plan`), set by the loader.
    _light_plan: object = PrivateAttr(default=None)

    @field_validator("title")
    @classmethod
    def _printable_title(cls, v):
        if any(unicodedata.category(c) in ("Cc", "Cf", "Zl", "Zp") for c in v):    # printed to terminals and pages
            raise ValueError("expected a title without control characters (line breaks, escapes)")
        return v


_BAYES_FIELDS = ("bayes_placement", "bayes_straddle_spreads", "bayes_pse_prior_sd_deg", "bayes_target",
                 "bayes_share_spread", "pse_range_deg", "spread_range_deg")
#: The ``[procedure]`` fields each method reads (runner.tracks.procedure_track); ``bounds_deg`` serves all.
METHOD_FIELDS = {
    "updown": ("start_offset_deg", "steps_deg", "k_down", "max_reversals"),
    "weighted": ("start_offset_deg", "steps_deg", "target_cw", "max_reversals"),
    "bayesian": _BAYES_FIELDS,
    "constant": ("levels_deg",),
}


def ignored_settings(proc: ProcedureSettings) -> list[str]:
    """``[procedure]`` fields the file sets that its method does not read (``check`` names them)."""
    used = {"method", "bounds_deg", *METHOD_FIELDS[proc.method]}
    return sorted(f"procedure.{name}" for name in proc.model_fields_set - used)


def frame_plan(protocol: Protocol) -> dict[str, timing.FrameCount]:
    """Frames of every duration in ``[timing]`` at the protocol's refresh rate.

    Raises
    ------
    InputError
        For the first duration that is not a whole number of frames (field
        ``timing.NAME``); the message proposes the nearest valid values.
    """
    hz = protocol.display.refresh_hz
    plan = {}
    for name, seconds in protocol.timing.model_dump().items():
        frames = timing.to_frames(seconds, hz)
        if frames is None:
            raise FrameTimingError("", f"timing.{name}", timing.describe_refusal(seconds, hz))
        plan[name] = frames
    return plan


def _round_up(x: float, digits: int = 3) -> float:
    """``x`` rounded up to ``digits`` significant digits (a least value quoted in a message must pass)."""
    scale = 10.0 ** (digits - 1 - math.floor(math.log10(x)))
    return math.ceil(x * scale) / scale


def smallest_step_deg(proc: ProcedureSettings) -> float:
    """The smallest difference of test offsets the tracks of ``proc`` work with, in degrees.

    The least of ``steps_deg`` (up–down and weighted), the Bayesian level
    grid's spacing :data:`PSE_GRID_STEP_DEG`, or the least spacing of
    ``levels_deg`` (constant stimuli).
    """
    if proc.method == "bayesian":
        return PSE_GRID_STEP_DEG
    if proc.method == "constant":
        levels = sorted(proc.levels_deg)
        return min(b - a for a, b in zip(levels, levels[1:]))
    return min(proc.steps_deg)


def _cross_checks(p: Protocol) -> None:
    """Checks that involve several sections; raise InputError(field=...)."""
    width_deg, height_deg = p.display.extent_deg
    diameter = 2 * p.dots.aperture_radius_deg
    if diameter > min(width_deg, height_deg):
        raise InputError(
            "",
            "dots.aperture_radius_deg",
            f"an aperture of {diameter:g} deg diameter does not fit on a screen of "
            f"{width_deg:.1f} x {height_deg:.1f} deg at {p.display.distance_cm:g} cm",
        )
    if p.dots.n_dots < 1:
        raise InputError("", "dots.density_per_deg2", "the aperture would hold no dots; raise the density or the radius")
    if p.dots.n_dots > 20000:
        raise InputError("", "dots.density_per_deg2", f"{p.dots.n_dots} dots is more than 20000; lower the density")
    if p.dots.dot_size_deg * p.display.px_per_deg < 1.0:
        raise InputError(
            "", "dots.dot_size_deg", f"{p.dots.dot_size_deg:g} deg is less than one pixel on this display"
        )
    covered = p.dots.n_dots * math.pi * (p.dots.dot_size_deg / 2) ** 2 / (math.pi * p.dots.aperture_radius_deg**2)
    if covered > 0.5:
        raise InputError(
            "", "dots.density_per_deg2", f"dots would cover {covered:.0%} of the aperture; expected at most 50 %"
        )
    px_per_s = p.dots.speed_deg_s * p.display.px_per_deg
    if px_per_s < 1.0:
        raise InputError("", "dots.speed_deg_s", f"{p.dots.speed_deg_s:g} deg/s is {px_per_s:.3g} pixels per second on "
                         "this display: dots that do not move a pixel a second show no direction; expected at least "
                         f"{_round_up(1.0 / p.display.px_per_deg):g} deg/s")
    if round(p.dots.coherence * p.dots.n_dots) < 1:
        raise InputError("", "dots.coherence", f"{p.dots.coherence:g} moves none of the {p.dots.n_dots} dots in the "
                         "period's direction, so the test has no direction to judge; expected at least "
                         f"{_round_up(1.0 / p.dots.n_dots):g} (one dot)")
    drawn = [p.dots.level * c for c in p.dots.color_rgb]
    if grey_step_short(drawn, p.display.background):
        raise InputError("", "dots.level", f"dots drawn at grey level {p.dots.level:.4g} (times dots.color_rgb) "
                         f"on a background of {p.display.background:.4g} differ by less than one step of an 8-bit "
                         "display (1/255), so they may be drawn in the background's own code, invisible; change "
                         "dots.level, dots.color_rgb or display.background")
    step_deg = p.dots.speed_deg_s / p.display.refresh_hz
    if step_deg > p.dots.aperture_radius_deg / 2:
        raise InputError("", "dots.speed_deg_s", "dots would jump more than half the aperture radius per frame")
    if p.timing.first_adaptation_s > 0 and len(p.design.adapter_offsets_deg) != 1:
        raise InputError(
            "",
            "timing.first_adaptation_s",
            "an initial adaptation needs a single adapter offset; with several interleaved offsets "
            "it would bias the conditions unequally (set it to 0 or use one offset)",
        )
    labels: dict[str, float] = {}
    for offset in p.design.adapter_offsets_deg:
        label = f"{offset:+g}"
        if label in labels:
            raise InputError("", "design.adapter_offsets_deg",
                             f"offsets {labels[label]!r} and {offset!r} would give two conditions the same name "
                             f"(adapt{label}); use offsets that differ in their first six digits")
        labels[label] = offset
    proc = p.procedure
    lo, hi = proc.bounds_deg
    if proc.method in CHOOSE_THEIR_LEVELS and "start_offset_deg" in proc.model_fields_set:
        chooser = ("the Bayesian method chooses every level itself (from its prior: pse_range_deg, "
                   "bayes_pse_prior_sd_deg)"
                   if proc.method == "bayesian" else "constant stimuli show levels_deg")
        raise InputError("", "procedure.start_offset_deg",
                         f"has no meaning with method = \"{proc.method}\": {chooser}; remove the field")
    if not (lo <= proc.start_offset_deg <= hi and lo <= -proc.start_offset_deg <= hi):
        raise InputError("", "procedure.start_offset_deg", f"tracks start at ±{proc.start_offset_deg:g}, outside bounds_deg")
    if proc.method == "constant" and not all(lo <= v <= hi for v in proc.levels_deg):
        raise InputError("", "procedure.levels_deg", f"levels outside bounds_deg [{lo:g}, {hi:g}]")
    if proc.method == "constant" and p.design.trials_per_track % len(proc.levels_deg):
        raise InputError(
            "",
            "design.trials_per_track",
            f"constant stimuli need a multiple of the {len(proc.levels_deg)} levels per track, "
            f"got {p.design.trials_per_track}",
        )
    if proc.method == "bayesian" and proc.bayes_placement != "entropy" and proc.bayes_target == "pse_spread":
        raise InputError("", "procedure.bayes_target", "\"pse_spread\" needs bayes_placement = \"entropy\" "
                         f"(\"{proc.bayes_placement}\" places every trial by the PSE estimate)")
    if proc.method == "bayesian" and 0 < proc.bayes_pse_prior_sd_deg < PSE_GRID_STEP_DEG:
        raise InputError("", "procedure.bayes_pse_prior_sd_deg",
                         f"expected 0 (uniform prior) or at least the PSE grid's step of {PSE_GRID_STEP_DEG:g}°, "
                         f"got {proc.bayes_pse_prior_sd_deg:g}: a narrower prior fixes the PSE at the reference")
    if proc.method == "bayesian" and not (proc.pse_range_deg[0] < hi and proc.pse_range_deg[1] > lo):
        raise InputError("", "procedure.pse_range_deg", "expected a PSE grid that overlaps bounds_deg")
    if p.design.practice_offset_deg > max(abs(lo), abs(hi)):
        raise InputError("", "design.practice_offset_deg", "expected a practice offset inside procedure.bounds_deg")
    finest = smallest_step_deg(proc)
    if p.design.practice_trials > 0 and p.design.practice_offset_deg < finest:
        raise InputError("", "design.practice_offset_deg",
                         f"a practice tilt of {p.design.practice_offset_deg:g}° is finer than the smallest step the "
                         f"tracks use ({finest:g}°), so practice answers scored right or wrong would be guesses; "
                         f"expected at least {finest:g}")
    if p.stream is not None:
        check_stream(p)


def _field_of(error: dict) -> str:
    loc = [str(x) for x in error.get("loc", ()) if not isinstance(x, int)]
    return ".".join(loc) or "(top level)"


def _message_of(error: dict) -> str:
    kind = error.get("type", "")
    if kind == "extra_forbidden":
        return "unknown field (check the spelling; the README lists every field)"
    msg = error.get("msg", "invalid value")
    msg = msg.removeprefix("Value error, ")
    if kind == "finite_number":
        msg = "expected a finite number (not nan or inf)"
    return msg


def parse_protocol(text: str, source: str = "<protocol>", resolve_light: bool = True) -> Protocol:
    """Parse and validate protocol text.

    Parameters
    ----------
    text : str
        TOML text.
    source : str
        Name used in error messages (usually the file path).
    resolve_light : bool
        Read the ``[light]`` section's profile and put the grey levels of the
        requested luminances into ``display.background`` and ``dots.level``
        (:func:`runner.light.plan_light`); False leaves the levels as written.

    Returns
    -------
    Protocol

    Raises
    ------
    InputError
        One line naming ``source``, the field and what was expected.
    """
    raw = toml_tables(text.removeprefix("\ufeff"), source)     # the byte-order mark some editors write
    if not raw:
        raise InputError(source, "(top level)", "the file has no settings; start from protocols/offset_by_lag.toml")
    return protocol_from_dict(raw, source, resolve_light)


def protocol_from_dict(raw: dict, source: str = "<protocol>", resolve_light: bool = True) -> Protocol:
    """Validate protocol settings given as a dict (the parsed TOML tables); ``resolve_light`` as in
    :func:`parse_protocol`.

    Raises
    ------
    InputError
        One line naming ``source``, the field and what was expected.
    """
    try:
        protocol = Protocol.model_validate(raw)
    except ValidationError as exc:
        first = exc.errors()[0]
        raise InputError(source, _field_of(first), _message_of(first)) from None
    except RecursionError:
        raise InputError(source, "(top level)", "nesting too deep for a protocol") from None
    try:
        _cross_checks(protocol)
        frame_plan(protocol)
    except InputError as exc:
        raise type(exc)(source, exc.field, exc.message) from None
    if protocol.light is not None and resolve_light:
        from runner.light import apply_light, plan_light  # reads a file; only for protocols with [light]

        protocol = apply_light(protocol, plan_light(protocol, source))
    return protocol


def read_protocol_text(path: str | Path) -> str:
    """Read a protocol file as text, refusing what cannot be a protocol.

    Raises
    ------
    InputError
        Missing file, a folder, an unreadable, oversized or binary file.
    """
    if str(path).strip() == "":
        raise InputError("argument", "protocol", "is empty; name a protocol file (.toml)")
    p = Path(path)
    if not p.exists():      # the reason a path cannot be opened: missing, a loop of links, too long a name
        raise InputError(str(p), "file", file_problem(p) or "does not exist")
    if p.is_dir():
        raise InputError(str(p), "file", "is a folder; expected a protocol file (.toml)")
    if not p.is_file():  # a named pipe or a device would block the read or never end
        raise InputError(str(p), "file", "is not a regular file (a pipe or a device?); expected a protocol file (.toml)")
    try:
        data = p.read_bytes()
    except OSError as exc:
        raise InputError(str(p), "file", f"cannot be read ({exc.strerror})") from None
    if len(data) > MAX_PROTOCOL_BYTES:
        raise InputError(str(p), "file", f"is {len(data)} bytes; a protocol is at most {MAX_PROTOCOL_BYTES}")
    if b"\x00" in data:
        raise InputError(str(p), "file", "is binary, not a TOML text file")
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InputError(str(p), f"byte {exc.start}", "not UTF-8 text; expected a TOML text file") from None


def load_protocol(path: str | Path) -> Protocol:
    """Read and validate a protocol file.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    Protocol

    Raises
    ------
    InputError
    """
    return parse_protocol(read_protocol_text(path), source=str(path))
