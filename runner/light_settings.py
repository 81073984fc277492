"""The ``[light]`` section of a protocol: stimuli in cd/m² from a light profile.

Without a ``[light]`` section grey levels are "0..1 of the display's range",
as they always were.  With one, the protocol names a light profile (written
by ``aftershift measure-light``) and may give the background and the dots in
cd/m², or the dots as a contrast to the background; the loader turns them
into the grey levels that produce them on the measured display
(:mod:`runner.light`) and the photosensitivity screening uses the measured
light instead of the sRGB assumption.

This module imports nothing from :mod:`runner.protocol`, which imports it.
"""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict, Field, model_validator


class LightSettings(BaseModel):
    """Stimulus luminance from a measured display (optional section).

    Attributes
    ----------
    profile : str
        The light profile (TOML written by ``aftershift measure-light``);
        relative paths are relative to the protocol file.
    background_cd_m2 : float or None
        Background luminance; replaces ``display.background`` (give one, not
        both).  None: the background is ``display.background``.
    dots_cd_m2 : float or None
        Dot luminance; replaces ``dots.level``.  Give at most one of
        ``dots_cd_m2``, ``weber_contrast`` and ``michelson_contrast``.
    weber_contrast : float or None
        Dots as Weber contrast to the background, (L_dots − L_bg) / L_bg;
        needs ``background_cd_m2``.
    michelson_contrast : float or None
        Dots as Michelson contrast, (L_dots − L_bg) / (L_dots + L_bg),
        positive for dots brighter than the background (−1..1); needs
        ``background_cd_m2``.
    max_age_days : float
        A profile measured longer ago than this gives a warning (recalibrating
        about monthly is common practice, no source).
    """

    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False, frozen=True)

    profile: str = Field(min_length=1, max_length=4096)
    background_cd_m2: float | None = Field(None, ge=0, le=100000)
    dots_cd_m2: float | None = Field(None, ge=0, le=100000)
    weber_contrast: float | None = Field(None, gt=-1, le=10000)
    michelson_contrast: float | None = Field(None, gt=-1, lt=1)
    max_age_days: float = Field(31.0, gt=0, le=36500)

    @model_validator(mode="after")
    def _one_dot_luminance(self):
        given = [n for n in ("dots_cd_m2", "weber_contrast", "michelson_contrast") if getattr(self, n) is not None]
        if len(given) > 1:
            raise ValueError(f"give at most one of dots_cd_m2, weber_contrast and michelson_contrast, not {' and '.join(given)}")
        if given and given[0] != "dots_cd_m2" and self.background_cd_m2 is None:
            raise ValueError(f"{given[0]} needs background_cd_m2 (a contrast is relative to the background)")
        return self

    @property
    def dots_field(self) -> str | None:
        """The field that sets the dots' luminance, if any."""
        for name in ("dots_cd_m2", "weber_contrast", "michelson_contrast"):
            if getattr(self, name) is not None:
                return name
        return None
