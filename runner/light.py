"""From cd/m² to grey levels, and from grey levels to relative luminance.

Two jobs for protocols with a ``[light]`` section (:mod:`runner.light_settings`):

* :func:`plan_light` reads the light profile, turns the requested
  luminances (or contrast) into grey levels with the inverse of the fitted
  gain–offset–gamma model, refuses luminances the display cannot produce
  (naming the field) and warns about an old profile;
  :func:`apply_light` puts the levels into ``display.background`` and
  ``dots.level``, so everything downstream (screen, screening, logs) uses them.
* :class:`LightModel` turns signal values into relative luminance for the
  photosensitivity screening: the sRGB assumption of IEC 61966-2-1
  (:data:`SRGB_LIGHT`) or the measured display, ``L / L_max`` with L from the
  profile (:func:`measured_light`).

Coloured light from a profile
-----------------------------
Grey (all guns at one level) always uses the grey model: that is what was
measured.  L_max is the grey model's luminance at level 1 (white).  For the
screening, which needs light per gun, the grey model's amplitude is shared
among the guns: with per-gun readings in proportion to their fitted
amplitudes, each gun on its own fitted curve (the guns add up: the channel
independence the gain–offset–gamma model assumes); with grey readings only
by the sRGB luminance weights (0.2126, 0.7152, 0.0722) on the grey curve —
an assumption, stated in the screening report.  A luminance in cd/m² for
coloured dots is refused without per-gun readings.  Chromaticities (for
the red-flash test) always assume sRGB primaries: a photometer measures no
colour.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from fitting.errors import InputError
from runner.light_profile import LightProfile, load_profile
from runner.protocol import grey_step_short
from runner.safety import SRGB_TO_XYZ, srgb_to_linear

#: Y row of the IEC 61966-2-1 RGB -> XYZ matrix (sRGB luminance weights).
SRGB_Y = SRGB_TO_XYZ[1]
#: Grey levels a display usually shows (8 bits per gun); used to report the
#: luminance of the nearest code (common practice, no source).
CODES = 255


@dataclass(frozen=True)
class LightModel:
    """Signal values (0..1 per gun) to linear light and relative luminance.

    Relative luminance is ``black + linear @ weights``: 1 for white, ``black``
    for black.  Linear light per gun stays additive, so mean colours of
    regions are area-weighted means of ``linear``.

    Attributes
    ----------
    source : str
        Where the luminance comes from, for reports.
    black : float
        Relative luminance of black (0 for sRGB).
    weights : numpy.ndarray, shape (3,)
        Relative luminance of each gun's full level above black.
    curves : tuple of callables or None
        Per-gun normalised transfer ``f_k(v)`` (0 at 0, 1 at 1); None: sRGB.
    max_cd_m2 : float or None
        Luminance of white (cd/m²) when measured.
    """

    source: str
    black: float = 0.0
    weights: np.ndarray = field(default_factory=lambda: SRGB_Y.copy())
    curves: tuple | None = None
    max_cd_m2: float | None = None

    def linear(self, signal_rgb) -> np.ndarray:
        """Linear light per gun (0..1 of that gun's range) of signal values."""
        s = np.asarray(signal_rgb, dtype=float)
        if self.curves is None:
            return srgb_to_linear(s)
        return np.stack([self.curves[k](s[..., k]) for k in range(3)], axis=-1)

    def relative_luminance(self, linear_rgb) -> np.ndarray:
        """Relative luminance (white = 1) of linear light."""
        return self.black + np.asarray(linear_rgb, dtype=float) @ self.weights

    def cd_m2(self, signal_rgb) -> np.ndarray:
        """Luminance (cd/m²) of signal values; only for a measured display."""
        if self.max_cd_m2 is None:
            raise ValueError("the sRGB assumption has no luminance in cd/m2")
        return self.max_cd_m2 * self.relative_luminance(self.linear(signal_rgb))


#: The sRGB assumption (IEC 61966-2-1 decoding, Y row weights).
SRGB_LIGHT = LightModel("sRGB display assumed (IEC 61966-2-1 decoding)")


def measured_light(profile: LightProfile) -> LightModel:
    """The light model of a measured display.

    Per-gun models when the profile has all three guns, otherwise the grey
    model shared among the guns by the sRGB weights (see the module docstring).
    """
    grey = profile.grey
    black, top = grey.min_cd_m2, grey.max_cd_m2
    if profile.per_gun:
        models = [profile.models[c] for c in ("red", "green", "blue")]
        share = np.array([m.amplitude_cd_m2 for m in models])
        how = "per-gun readings"
    else:
        models = [grey] * 3
        share = SRGB_Y
        how = "grey readings, shared among the guns by sRGB weights"
    weights = share / share.sum() * (top - black) / top

    def curve(m):
        low = float(m.normalised(0.0))
        return lambda v: (m.normalised(v) - low) / (1.0 - low)

    return LightModel(
        source=f"measured display: light profile {profile.path} ({how}), L / L_max with L_max = {top:.4g} cd/m2",
        black=black / top,
        weights=weights,
        curves=tuple(curve(m) for m in models),
        max_cd_m2=top,
    )


@dataclass(frozen=True)
class LightPlan:
    """The luminances of a protocol with a light profile.

    Attributes
    ----------
    profile : LightProfile
    light : LightModel
    background_level, dots_level : float
        Grey levels to draw (``display.background``, ``dots.level``).
    background_cd_m2, dots_cd_m2 : float
        Luminance they give by the profile's model.
    requested : dict of str to float
        The ``[light]`` values the protocol asked for.
    age_days : float
    max_age_days : float
    warnings : list of str
        One line each, naming the protocol and ``light.profile``.
    dot_rgb : tuple of float
        ``dots.color_rgb``.
    """

    profile: LightProfile
    light: LightModel
    background_level: float
    dots_level: float
    background_cd_m2: float
    dots_cd_m2: float
    requested: dict
    age_days: float
    max_age_days: float
    warnings: list
    dot_rgb: tuple = (1.0, 1.0, 1.0)

    @property
    def weber(self) -> float:
        """Weber contrast of the dots, (L_dots − L_bg) / L_bg (inf on a 0 background)."""
        bg = self.background_cd_m2
        return (self.dots_cd_m2 - bg) / bg if bg > 0 else math.inf

    @property
    def michelson(self) -> float:
        """Michelson contrast of the dots, (L_dots − L_bg) / (L_dots + L_bg)."""
        total = self.dots_cd_m2 + self.background_cd_m2
        return (self.dots_cd_m2 - self.background_cd_m2) / total if total > 0 else 0.0

    def check_lines(self) -> list[str]:
        """Lines for ``aftershift check``."""
        p = self.profile
        lines = [
            f"light      profile {p.path}",
            f"           measured {p.measured_utc.date().isoformat()} ({_age_words(self.age_days)}), "
            f"black {p.black_cd_m2:.4g} cd/m2, max {p.max_cd_m2:.4g} cd/m2, SHA-256 {p.sha256[:12]}",
        ]
        for what, level, value, key in (
            ("background", self.background_level, self.background_cd_m2, "background_cd_m2"),
            ("dots", self.dots_level, self.dots_cd_m2, "dots"),
        ):
            asked = self.requested.get(key)
            head = f"{asked:.4g} cd/m2 requested -> grey level" if asked is not None else "grey level (as written)"
            codes = np.round(level * self._colour(what) * CODES)      # each gun is drawn at level x its colour
            if np.ptp(codes) == 0:      # grey: the grey model, at the code every gun gets
                nearest, shown = self.profile.grey.luminance(codes[0] / CODES), f"code {int(codes[0])}"
            else:
                nearest, shown = self.light.cd_m2(codes / CODES), f"codes {tuple(int(c) for c in codes)}"
            lines.append(f"           {what:<10} {head} {level:.4f} = {value:.4g} cd/m2 "
                         f"(nearest 8-bit {shown}: {float(nearest):.4g} cd/m2)")
        for name in ("weber_contrast", "michelson_contrast"):
            if name in self.requested:
                lines.append(f"           {name.replace('_', ' ')} {self.requested[name]:g} requested")
        weber = "inf (black background)" if math.isinf(self.weber) else f"{self.weber:.4g}"
        lines.append(f"           contrast of the dots: Weber {weber}, Michelson {self.michelson:.4g}")
        return lines

    def cd_m2(self, level: float, colour) -> float:
        """Luminance of ``level · colour``: the grey model for grey, the light model otherwise."""
        return _cd_m2(self.profile, self.light, level, colour)

    def _colour(self, what: str) -> np.ndarray:
        return np.ones(3) if what == "background" else np.asarray(self.dot_rgb)

    def sidecar(self) -> dict:
        """Plain values for the session sidecar."""
        return {
            "profile_path": self.profile.path,
            "profile_sha256": self.profile.sha256,
            "profile_measured_utc": self.profile.measured_utc.isoformat(),
            "profile_age_days": round(self.age_days, 3),
            "requested": dict(self.requested),
            "background_level": self.background_level,
            "dots_level": self.dots_level,
            "background_cd_m2": self.background_cd_m2,
            "dots_cd_m2": self.dots_cd_m2,
            "weber_contrast": None if math.isinf(self.weber) else self.weber,
            "michelson_contrast": self.michelson,
        }


def _age_words(age_days: float) -> str:
    """A profile's age for ``check``: "3 days ago", or how far in the future its date lies."""
    if age_days < -1.0:
        return f"{-age_days:.0f} days in the future: check the computer's clock and the profile's measured_utc"
    return f"{max(age_days, 0.0):.0f} days ago"


def profile_path(protocol, source: str = "") -> Path:
    """The light profile's path, relative paths taken from the protocol's folder."""
    path = Path(protocol.light.profile)
    if not path.is_absolute() and source and not source.startswith("<"):
        path = Path(source).parent / path
    return path


def _range_error(source: str, key: str, value: float, profile: LightProfile, what: str,
                 bounds: tuple[float, float] | None = None) -> InputError:
    """The refusal of a luminance beyond the profile's range (or ``bounds``: a colour's), with the digits that show it."""
    low, high = bounds if bounds is not None else (profile.black_cd_m2, profile.max_cd_m2)
    passed = low if value < low else high
    digits = next((d for d in range(4, 13) if f"{value:.{d}g}" != f"{passed:.{d}g}"), 12)
    side = "below the black level" if value < low else "above the maximum"
    return InputError(source, key, f"{value:.{digits}g} cd/m2 for {what} lies {side} the display gives by its light "
                                   f"profile ({low:.{digits}g} to {high:.{digits}g} cd/m2)")


def _grey_share(colour) -> float | None:
    """c for a neutral colour (c, c, c) with c > 0, which the grey model measured at level × c; else None."""
    colour = np.asarray(colour, dtype=float)
    return float(colour[0]) if colour[0] > 0 and np.allclose(colour, colour[0]) else None


def _cd_m2(profile: LightProfile, light: LightModel, level: float, colour) -> float:
    share = _grey_share(colour)
    if share is not None:
        return float(profile.grey.luminance(level * share))
    return float(light.cd_m2(level * np.asarray(colour, dtype=float)))


def _dot_level(light: LightModel, profile: LightProfile, colour: np.ndarray, target: float) -> float:
    """The dots' level that gives ``target`` cd/m² (nan if it cannot)."""
    share = _grey_share(colour)
    if share is not None:       # grey dots: the grey model at level × share
        level = float(profile.grey.level(target)) / share
        return level if level <= 1.0 + 1e-12 else math.nan
    lo, hi = float(light.cd_m2(0 * colour)), float(light.cd_m2(colour))
    if not (lo - 1e-9 <= target <= hi + 1e-9):
        return math.nan
    if hi - lo <= 0:
        return 0.0
    from scipy import optimize   # here: the commands that only read a profile need not load it

    return float(optimize.brentq(lambda s: float(light.cd_m2(s * colour)) - target, 0.0, 1.0, xtol=1e-12))


def plan_light(protocol, source: str = "", now=None) -> LightPlan | None:
    """Grey levels, luminances and warnings of a protocol's ``[light]`` section.

    Parameters
    ----------
    protocol : runner.protocol.Protocol
        As validated, before :func:`apply_light`.
    source : str
        The protocol file: relative profile paths start from its folder, and
        errors name it.
    now : datetime, optional
        For the profile's age (default: now).

    Returns
    -------
    LightPlan or None
        None for a protocol without ``[light]``.

    Raises
    ------
    InputError
        A missing or malformed profile (``light.profile``), a luminance or
        contrast the display cannot produce (naming its field), cd/m² for
        coloured dots without per-gun readings (``dots.color_rgb``), or a level
        given twice (``display.background``, ``dots.level``).
    """
    settings = protocol.light
    if settings is None:
        return None
    if settings.background_cd_m2 is not None and "background" in protocol.display.model_fields_set:
        raise InputError(source, "display.background",
                         "give the background as display.background (grey level) or light.background_cd_m2, not both")
    if settings.dots_field and "level" in protocol.dots.model_fields_set:
        raise InputError(source, "dots.level",
                         f"give the dots as dots.level (grey level) or light.{settings.dots_field}, not both")
    profile = load_profile(profile_path(protocol, source), source)
    light = measured_light(profile)
    colour = np.asarray(protocol.dots.color_rgb, dtype=float)
    requested: dict = {}
    if settings.background_cd_m2 is not None:
        bg_cd = settings.background_cd_m2
        requested["background_cd_m2"] = bg_cd
        bg_level = float(profile.grey.level(bg_cd))
        if math.isnan(bg_level):
            raise _range_error(source, "light.background_cd_m2", bg_cd, profile, "a background")
    else:
        bg_level = protocol.display.background
    bg_cd = _cd_m2(profile, light, bg_level, np.ones(3))
    dots_key = settings.dots_field
    if dots_key is None:
        dots_level = protocol.dots.level
    else:
        value = getattr(settings, dots_key)
        requested[dots_key] = value
        if dots_key == "dots_cd_m2":
            target = value
        elif dots_key == "weber_contrast":
            target = bg_cd * (1.0 + value)
        else:
            target = bg_cd * (1.0 + value) / (1.0 - value)
        requested["dots"] = target
        if _grey_share(colour) is None and not profile.per_gun:
            raise InputError(source, "dots.color_rgb",
                             "dots in cd/m2 with a colour other than grey need per-gun readings in the light "
                             "profile (measure-light --per-gun)")
        dots_level = _dot_level(light, profile, colour, target)
        if math.isnan(dots_level):
            white = np.allclose(colour, 1.0)
            raise _range_error(source, f"light.{dots_key}", target, profile, "dots" if white else "dots of this colour",
                               None if white else (_cd_m2(profile, light, 0.0, colour), _cd_m2(profile, light, 1.0, colour)))
    dots_cd = _cd_m2(profile, light, dots_level, colour)
    if grey_step_short(dots_level * colour, bg_level):
        raise InputError(source, f"light.{dots_key}" if dots_key else "dots.level",
                         f"dots of {dots_cd:.4g} cd/m2 (grey level {dots_level:.4f}) on a background of {bg_cd:.4g} "
                         f"cd/m2 (grey level {bg_level:.4f}) differ by less than one step of an 8-bit display "
                         "(1/255), so they may be drawn in the background's own code, invisible")
    age = profile.age_days(now)
    warnings = []
    if age > settings.max_age_days:
        warnings.append(
            f"{source}: light.profile: the light profile was measured {age:.0f} days ago, more than "
            f"light.max_age_days = {settings.max_age_days:g}; recalibrating about monthly is common practice "
            "(no source) - measure the display again with aftershift measure-light"
        )
    elif age < -1.0:
        warnings.append(f"{source}: light.profile: the light profile is dated {-age:.0f} days in the future; "
                        "check the computer's clock")
    if any(abs(a - b) > 0.02 * b for a, b in zip(profile.screen_cm, protocol.display.screen_cm)):
        warnings.append(
            f"{source}: light.profile: measured on a display of {profile.screen_cm[0]:g} x {profile.screen_cm[1]:g} cm, "
            f"the protocol says {protocol.display.screen_cm[0]:g} x {protocol.display.screen_cm[1]:g}; "
            "is it the same display?")
    if profile.refresh_hz is not None and abs(profile.refresh_hz - protocol.display.refresh_hz) > 0.01 * protocol.display.refresh_hz:
        warnings.append(
            f"{source}: light.profile: measured at {profile.refresh_hz:g} Hz, the protocol runs at "
            f"{protocol.display.refresh_hz:g} Hz; a display's light can differ between refresh rates (overdrive, "
            "dynamic modes): measure it at the protocol's")
    if list(profile.screen_px) != list(protocol.display.screen_px):
        warnings.append(
            f"{source}: light.profile: measured on a {profile.screen_px[0]}x{profile.screen_px[1]} px display, "
            f"the protocol says {protocol.display.screen_px[0]}x{protocol.display.screen_px[1]}; is it the same display?"
        )
    if profile.fitted_anyway:
        warnings.append(f"{source}: light.profile: its readings had problems and were fitted anyway (see the profile)")
    return LightPlan(profile, light, bg_level, dots_level, bg_cd, dots_cd, requested, age,
                     settings.max_age_days, warnings, tuple(float(c) for c in colour))


def apply_light(protocol, plan: LightPlan | None):
    """The protocol with the plan's grey levels, the profile's absolute path and the plan.

    Returns the protocol unchanged when ``plan`` is None; otherwise a copy
    whose :func:`light_plan` is ``plan``.
    """
    if plan is None:
        return protocol
    out = protocol.model_copy(update={
        "display": protocol.display.model_copy(update={"background": plan.background_level}),
        "dots": protocol.dots.model_copy(update={"level": plan.dots_level}),
        "light": protocol.light.model_copy(update={"profile": str(Path(plan.profile.path).resolve())}),
    })
    out._light_plan = plan
    return out


def written_settings(protocol) -> dict:
    """The protocol's settings as its file gave them, as a JSON-ready dict.

    :func:`apply_light` puts the grey levels of ``light.background_cd_m2``
    and of the dots' luminance into ``display.background`` and
    ``dots.level``; they are left out here, so that the dict validates again
    (with the light section resolved anew) after a change of its settings.
    """
    raw = protocol.model_dump(mode="json", exclude_none=True, exclude_unset=True)
    settings = protocol.light
    if settings is not None and light_plan(protocol) is not None:
        if settings.background_cd_m2 is not None:
            raw.get("display", {}).pop("background", None)
        if settings.dots_field is not None:
            raw.get("dots", {}).pop("level", None)
    return raw


def light_plan(protocol) -> LightPlan | None:
    """The light plan the loader attached to a protocol (None without ``[light]``)."""
    return getattr(protocol, "_light_plan", None)


def light_for(protocol) -> LightModel:
    """The light model the screening uses: measured with a profile, sRGB otherwise."""
    plan = light_plan(protocol)
    if plan is not None:
        return plan.light
    if protocol.light is None:
        return SRGB_LIGHT
    return measured_light(load_profile(protocol.light.profile, "", "light.profile"))
