"""Light profiles: a display's measured luminance, as a text file of our own.

``aftershift measure-light`` writes one after fitting photometer readings
(:mod:`fitting.display_model`); protocols name it in ``[light] profile``.
The file is TOML, readable and diffable:

* top level: when it was measured (UTC), the display's size, resolution and
  refresh rate, what was measured (patch or full field, the surround's grey
  level), the black level and the maximum luminance (grey, cd/m²);
* ``[model.CHANNEL]``: the fitted gain–offset–gamma parameters of ``grey``
  (always) and of ``red``, ``green`` and ``blue`` when the guns were measured
  alone, each with its confidence interval and residuals;
* ``[readings]``: every reading, with its channel, level and residual.

A profile holds only for the display, its settings (brightness, contrast,
colour mode) and its warm-up state at the time of measurement.
"""

from __future__ import annotations

import contextlib
import hashlib
import math
import os
import sys
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from fitting.display_model import CHANNELS, MODEL_FIELDS, ChannelFit, GainOffsetGamma, flatness
from fitting.errors import InputError, file_problem
from runner.light_profile_schema import check_profile, check_summary
from runner.toml_text import toml_tables

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

#: The ``kind`` line that marks a light profile.
PROFILE_KIND = "aftershift light profile"
#: Format version written.
PROFILE_VERSION = 1


@dataclass(frozen=True)
class LightProfile:
    """A light profile read from its file.

    Attributes
    ----------
    path : str
    sha256 : str
        SHA-256 of the file's text (recorded in session sidecars).
    measured_utc : datetime
    screen_cm, screen_px : list
    refresh_hz : float or None
        Refresh rate when measured (None for readings fitted from a CSV file
        without a protocol).
    models : dict of str to GainOffsetGamma
        ``grey`` and any guns measured alone.
    fitted_anyway : bool
        The readings had problems and were fitted on request.
    """

    path: str
    sha256: str
    measured_utc: datetime
    screen_cm: list
    screen_px: list
    refresh_hz: float | None
    models: dict[str, GainOffsetGamma]
    fitted_anyway: bool = False

    @property
    def grey(self) -> GainOffsetGamma:
        """The grey (all guns together) model."""
        return self.models["grey"]

    @property
    def black_cd_m2(self) -> float:
        """Luminance at grey level 0."""
        return self.grey.min_cd_m2

    @property
    def max_cd_m2(self) -> float:
        """Luminance at grey level 1."""
        return self.grey.max_cd_m2

    @property
    def per_gun(self) -> bool:
        """True when all three guns were measured alone."""
        return all(c in self.models for c in CHANNELS[1:])

    def age_days(self, now: datetime | None = None) -> float:
        """Days since the measurement."""
        now = now or datetime.now(timezone.utc)
        return (now - self.measured_utc).total_seconds() / 86400.0


def _number(x: float) -> str:
    x = float(x)
    if math.isnan(x):
        return "nan"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return repr(round(x, 10))


def _array(values, fmt=_number) -> str:
    return "[" + ", ".join(fmt(v) for v in values) + "]"


def profile_text(fits: dict[str, ChannelFit], measured_utc: datetime, screen_cm, screen_px,
                 refresh_hz: float | None, field: str, surround_level: float | None, label: str = "",
                 fitted_anyway: bool = False) -> str:
    """The text of a light profile.

    Parameters
    ----------
    fits : dict of str to ChannelFit
        From :func:`fitting.display_model.fit_readings`; must hold ``grey``.
    measured_utc : datetime
        When the readings were taken (timezone-aware).
    screen_cm, screen_px : sequence of two numbers
    refresh_hz : float or None
        Measured refresh rate, None if unknown.
    field : str
        What was measured, e.g. ``"central patch, 5 deg square"``.
    surround_level : float or None
        Grey level around the patch; None if not known (readings typed in
        from a file).
    label : str
        Free text naming the display.
    fitted_anyway : bool
        Readings with problems were fitted on request.
    """
    if "grey" not in fits:
        raise InputError("readings", "gun", "a profile needs grey readings (all guns at the same level)")
    grey = fits["grey"].model
    lines = [
        "# aftershift light profile: measured luminance of one display (written by `aftershift measure-light`).",
        "# It holds only for this display, its settings (brightness, contrast, colour mode) and its",
        "# warm-up state at the time of measurement.",
        "# Model per channel: L(v) = black + amplitude * max(0, gain * v + offset) ** gamma, offset = 1 - gain,",
        "# v the grey level 0..1 (gain-offset-gamma model).",
        f'kind = "{PROFILE_KIND}"',
        f"version = {PROFILE_VERSION}",
        f'measured_utc = "{measured_utc.astimezone(timezone.utc).replace(microsecond=0).isoformat()}"',
        f"label = {_toml_string(label)}",
        f"screen_cm = {_array(screen_cm)}",
        f"screen_px = {_array(screen_px, lambda v: str(int(v)))}",
    ]
    lines.append(f"refresh_hz = {_number(refresh_hz)}" if refresh_hz is not None else "# refresh_hz: not measured")
    lines += [
        f"field = {_toml_string(field)}",
        f"surround_level = {_number(surround_level)}" if surround_level is not None
        else "# surround_level: not known (readings from a file)",
        f"black_cd_m2 = {_number(grey.min_cd_m2)}",
        f"max_cd_m2 = {_number(grey.max_cd_m2)}",
        f"fitted_anyway = {'true' if fitted_anyway else 'false'}",
    ]
    for channel, fit in fits.items():
        lines += ["", f"[model.{channel}]"]
        for name, value in fit.model.as_dict().items():
            lo, hi = fit.ci[name]
            lines.append(f"{name} = {_number(value)}")
            lines.append(f"{name}_ci = {_array([lo, hi])}")
        lines += [
            f"ci_level = {_number(fit.level_ci)}",
            f"rms_residual_cd_m2 = {_number(fit.rms_residual_cd_m2)}",
            f"n_readings = {fit.readings.level.size}",
        ]
        if fit.problems:
            lines.append("problems = [" + ", ".join(_toml_string(p.line()) for p in fit.problems) + "]")
    channel, level, value, resid, row = [], [], [], [], []
    for name, fit in fits.items():
        r = fit.readings
        channel += [name] * r.level.size
        level += list(r.level)
        value += list(r.cd_m2)
        resid += list(fit.residuals_cd_m2)
        row += list(r.row)
    lines += [
        "",
        "[readings]",
        f"gun = {_array(channel, _toml_string)}",
        f"level = {_array(level)}",
        f"luminance_cd_m2 = {_array(value)}",
        f"residual_cd_m2 = {_array(resid)}",
        f"row = {_array(row, lambda v: str(int(v)))}",
    ]
    return "\n".join(lines) + "\n"


def _toml_string(text: str) -> str:
    escaped = str(text).replace("\\", "\\\\").replace('"', '\\"')
    return '"' + "".join(c if c.isprintable() else " " for c in escaped) + '"'


def write_atomically(path: str | Path, text: str) -> Path:
    """Write ``text`` to ``path`` through a temporary file and a rename.

    A crash leaves either the old file or the new one, never half of one.

    Raises
    ------
    InputError
        The folder cannot be written (field ``--out``).
    """
    p = Path(path)
    if p.is_dir():
        raise InputError(str(p), "--out", "is a folder; expected a file name for the profile")
    tmp = p.with_name(f".{p.name}.{os.getpid()}.tmp")
    try:
        p.parent.mkdir(parents=True, exist_ok=True)
        with tmp.open("w", encoding="utf-8") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, p)
    except OSError as exc:
        with contextlib.suppress(OSError):      # a read-only folder refuses this too: the first error is the one said
            tmp.unlink(missing_ok=True)
        raise InputError(str(p), "--out", f"cannot be written ({exc.strerror})") from None
    return p


def _check_models_give_the_residuals(checked, source: str, models: dict) -> None:
    """Refuse a model that does not give the residuals its profile records for its own readings.

    ``measure-light`` writes every reading with its residual from the
    fitted curve; a model parameter (or a reading) edited by hand afterwards
    no longer agrees with them, and would turn requested luminances into
    other grey levels than the readings support.
    """
    readings = checked.readings
    if readings is None:
        return
    gun = np.asarray(readings.gun)
    level, value = np.asarray(readings.level, float), np.asarray(readings.luminance_cd_m2, float)
    recorded = np.asarray(readings.residual_cd_m2, float)
    for channel, model in models.items():
        at = gun == channel
        if not at.any():
            continue
        now = value[at] - model.luminance(level[at])
        worst = int(np.argmax(np.abs(now - recorded[at])))
        if abs(now[worst] - recorded[at][worst]) > 1e-6 * max(float(value[at].max()), 1e-9):
            raise InputError(source, f"model.{channel}", f"does not give its own readings: level "
                             f"{level[at][worst]:g} read {value[at][worst]:g} cd/m2 with a residual of "
                             f"{recorded[at][worst]:.4g}, the model now gives {now[worst]:.4g}; edited by hand? "
                             "Measure the display again (or restore the profile)")


def load_profile(path: str | Path, source: str = "", field: str = "light.profile") -> LightProfile:
    """Read a light profile.

    Parameters
    ----------
    path : str or Path
    source, field : str
        Named in errors about a missing file (the protocol and its field).

    Raises
    ------
    InputError
        Missing or malformed file, or a grey maximum not clearly above black
        (:func:`fitting.display_model.flatness`); errors about its content
        name the profile and the key.
    """
    p = Path(path)
    problem = file_problem(p)
    if problem:
        raise InputError(source or str(p), field, f"light profile {p} {problem}")
    try:
        data = p.read_bytes()       # hashed as stored: sha256sum of the file gives the same (CRLF line ends too)
        text = data.decode("utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(str(p), "file", f"cannot be read as text ({exc})") from None
    raw = toml_tables(text, str(p))

    if raw.get("kind") != PROFILE_KIND:
        raise InputError(str(p), "kind", f'expected "{PROFILE_KIND}"; is this a light profile?')
    checked = check_profile(raw, str(p))
    try:
        measured = datetime.fromisoformat(checked.measured_utc)
    except ValueError:
        raise InputError(str(p), "measured_utc", "expected an ISO 8601 time like 2026-01-31T09:00:00+00:00") from None
    if measured.tzinfo is None:
        measured = measured.replace(tzinfo=timezone.utc)
    models = {channel: GainOffsetGamma(*(getattr(section, k) for k in MODEL_FIELDS))
              for channel in CHANNELS if (section := getattr(checked.model, channel)) is not None}
    check_summary(checked, str(p), models["grey"].min_cd_m2, models["grey"].max_cd_m2)
    _check_models_give_the_residuals(checked, str(p), models)
    flat = flatness(models["grey"])
    if flat:
        raise InputError(str(p), "model.grey.amplitude_cd_m2", flat)
    return LightProfile(
        path=str(p),
        sha256=hashlib.sha256(data).hexdigest(),
        measured_utc=measured,
        screen_cm=list(checked.screen_cm),
        screen_px=list(checked.screen_px),
        refresh_hz=checked.refresh_hz,
        models=models,
        fitted_anyway=checked.fitted_anyway,
    )


def readings_arrays(profile_path: str | Path) -> dict[str, np.ndarray]:
    """The ``[readings]`` table of a profile as arrays (for checks and figures)."""
    raw = tomllib.loads(Path(profile_path).read_text(encoding="utf-8"))
    table = raw.get("readings", {})
    return {k: np.asarray(v) for k, v in table.items()}
