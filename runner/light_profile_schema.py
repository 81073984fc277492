"""What a light profile file may hold: its keys, their types and sensible ranges.

:func:`check_profile` validates the parsed TOML of a light profile
(:mod:`runner.light_profile`) and raises one :class:`InputError` naming the
profile file and the first bad field.  Unknown keys, wrong types (a
``fitted_anyway = "no"`` is not a boolean), nan or infinite numbers, format
versions other than 1, model parameters no display has and a grey maximum not
clearly above black (:func:`fitting.display_model.flatness`) are refused, so
that a profile cannot turn a requested luminance into a wrong grey level
without a word.

The model parameters must lie where :func:`fitting.display_model.fit_channel`
fits them (its bounds are :data:`GAIN_RANGE` and :data:`GAMMA_RANGE`), and
luminances at most :data:`MAX_CD_M2`, the most a ``[light]`` section may ask for.
"""

from __future__ import annotations

import math
from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from fitting.display_model import CHANNELS, GAIN_RANGE, GAMMA_RANGE
from fitting.errors import InputError

#: Largest luminance a profile may hold (cd/m²), the limit of ``[light]`` luminances
#: (:class:`runner.light_settings.LightSettings`).
MAX_CD_M2 = 100000.0
#: Relative difference allowed between the top-level black and maximum and the grey model's
#: (the file rounds numbers to 10 decimals).
AGREEMENT = 1e-6

#: Units of a profile's fields, by the end of the field's name, for the range messages.
UNITS = {"_cd_m2": "cd/m2", "_hz": "Hz", "_cm": "cm", "_px": "px", "level": "(grey level)"}

# interval limits are finite: measure-light refuses a fit that leaves a parameter undetermined
_Interval = Annotated[list[float], Field(min_length=2, max_length=2)]


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False, frozen=True)


class ChannelSection(_Section):
    """``[model.CHANNEL]``: the fitted gain–offset–gamma parameters of one channel."""

    black_cd_m2: float = Field(ge=0, le=MAX_CD_M2)
    amplitude_cd_m2: float = Field(gt=0, le=MAX_CD_M2)
    gain: float
    gamma: float
    offset: float | None = None
    black_cd_m2_ci: _Interval | None = None
    amplitude_cd_m2_ci: _Interval | None = None
    gain_ci: _Interval | None = None
    offset_ci: _Interval | None = None
    gamma_ci: _Interval | None = None
    ci_level: float | None = Field(None, gt=0, lt=1)
    rms_residual_cd_m2: Annotated[float, Field(allow_inf_nan=True)] | None = None
    n_readings: int | None = Field(None, ge=0)
    problems: list[str] | None = None


class ModelSection(_Section):
    """``[model]``: grey always, the guns when they were measured alone."""

    grey: ChannelSection
    red: ChannelSection | None = None
    green: ChannelSection | None = None
    blue: ChannelSection | None = None


class ReadingsSection(_Section):
    """``[readings]``: one entry per reading in every list."""

    gun: list[str]
    level: list[Annotated[float, Field(ge=0, le=1)]]
    luminance_cd_m2: list[Annotated[float, Field(ge=0, le=MAX_CD_M2)]]
    residual_cd_m2: list[float]
    row: list[Annotated[int, Field(ge=0)]]

    @model_validator(mode="after")
    def _same_lengths(self):
        lengths = {name: len(getattr(self, name)) for name in type(self).model_fields}
        if len(set(lengths.values())) > 1:
            raise ValueError("every list needs one entry per reading, got lengths "
                             + ", ".join(f"{k} {n}" for k, n in lengths.items()))
        unknown = sorted(set(self.gun) - set(CHANNELS))
        if unknown:
            raise ValueError(f"gun {unknown[0]!r} is not one of {', '.join(CHANNELS)}")
        return self


class ProfileFile(_Section):
    """The whole file."""

    kind: str
    version: int
    measured_utc: str
    label: str | None = None
    screen_cm: list[Annotated[float, Field(gt=0, le=10000)]] = Field(min_length=2, max_length=2)
    screen_px: list[Annotated[int, Field(gt=0, le=100000)]] = Field(min_length=2, max_length=2)
    refresh_hz: float | None = Field(None, gt=0, le=10000)
    field: str | None = None
    surround_level: float | None = Field(None, ge=0, le=1)
    black_cd_m2: float | None = Field(None, ge=0, le=MAX_CD_M2)
    max_cd_m2: float | None = Field(None, gt=0, le=MAX_CD_M2)
    fitted_anyway: bool = False
    model: ModelSection
    readings: ReadingsSection | None = None


def _check_channel(source: str, channel: str, section: ChannelSection) -> None:
    where = f"model.{channel}."
    for name, value, (low, high) in (("gain", section.gain, GAIN_RANGE), ("gamma", section.gamma, GAMMA_RANGE)):
        if not low <= value <= high:
            raise InputError(source, where + name, f"{value:g} is outside {low:g}..{high:g}, the range "
                             "measure-light fits (displays are near 2.2 in gamma and 1 in gain: common practice, "
                             "no source); measure the display again")
    if section.offset is not None and not math.isclose(section.offset, 1.0 - section.gain, abs_tol=AGREEMENT):
        raise InputError(source, where + "offset", f"{section.offset:g} is not 1 - gain = {1.0 - section.gain:g}")
    top = section.black_cd_m2 + section.amplitude_cd_m2
    if top > MAX_CD_M2:
        raise InputError(source, where + "amplitude_cd_m2", f"black + amplitude = {top:g} cd/m2, more than "
                         f"{MAX_CD_M2:g}")


def check_profile(raw: dict, source: str) -> ProfileFile:
    """Validate a light profile's parsed TOML.

    Parameters
    ----------
    raw : dict
        The file's tables as :mod:`tomllib` reads them.
    source : str
        The profile file, named in errors.

    Returns
    -------
    ProfileFile

    Raises
    ------
    InputError
        One line naming ``source`` and the first bad field.
    """
    try:
        profile = ProfileFile.model_validate(raw)
    except ValidationError as exc:
        first = exc.errors()[0]
        loc = ".".join(str(x) for x in first.get("loc", ()) if not isinstance(x, int)) or "(top level)"
        message = first.get("msg", "invalid value").removeprefix("Value error, ")
        if first.get("type") == "extra_forbidden":
            message = "unknown key (a light profile holds only what measure-light writes)"
        elif first.get("type") == "finite_number":
            message = "expected a finite number (not nan or inf)"
        elif first.get("type") in ("greater_than", "greater_than_equal", "less_than", "less_than_equal"):
            message = f"{first['input']!r} found; {message[0].lower()}{message[1:]}{_unit(loc)}"
        raise InputError(source, loc, message) from None
    if profile.version != 1:
        raise InputError(source, "version", f"format version {profile.version} is not known; expected 1")
    for channel in CHANNELS:
        section = getattr(profile.model, channel)
        if section is not None:
            _check_channel(source, channel, section)
    return profile


def _unit(field: str) -> str:
    """`` cd/m2`` and the like for a dotted field name; empty where the field has no unit."""
    return next((" " + unit for end, unit in UNITS.items() if field.endswith(end)), "")


def check_summary(profile: ProfileFile, source: str, black_cd_m2: float, max_cd_m2: float) -> None:
    """Refuse a top-level ``black_cd_m2`` or ``max_cd_m2`` that is not the grey model's (given)."""
    for name, written, model in (("black_cd_m2", profile.black_cd_m2, black_cd_m2),
                                 ("max_cd_m2", profile.max_cd_m2, max_cd_m2)):
        if written is not None and not math.isclose(written, model, rel_tol=AGREEMENT, abs_tol=1e-9):
            raise InputError(source, name, f"{written:g} cd/m2 is not the grey model's {model:.10g} cd/m2; "
                             "was the file edited by hand?")
