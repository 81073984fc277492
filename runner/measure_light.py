"""``aftershift measure-light``: readings in, light profile out.

Two ways in, one way out:

* on the display (:mod:`runner.display.light_meter`): a patch at grey levels
  in random order, the experimenter types each photometer reading; every
  reading goes to a CSV file (appended and flushed to disk) the moment it is
  accepted, so a crash or Escape loses nothing and ``--resume`` continues;
* from a CSV file of readings (``--readings``), without a screen.

Both end in :func:`finish`: the readings are checked and fitted
(:mod:`fitting.display_model`), the parameters with intervals and residuals
are printed, and the light profile (:mod:`runner.light_profile`) and a figure
are written next to each other.  Readings with problems are listed with
their rows and refused (exit 2) unless ``--fit-anyway`` is given.
"""

from __future__ import annotations

import csv
import fcntl
import io
import math
import os
import shutil
import sys
import tempfile
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from fitting.display_model import ReadingsRefused, Readings, fit_readings, make_readings, read_readings
from fitting.errors import InputError, printable
from runner.light_profile import PROFILE_KIND, profile_text, write_atomically

#: Columns of the readings file the screen routine writes.
LOG_COLUMNS = ("order", "gun", "level", "luminance_cd_m2", "seed", "time_utc")

#: Light profiles this process has put in place, with their figures (the line of an interrupted command names them).
_WRITTEN: list[Path] = []

#: Colour of each channel at level 1.
GUN_RGB = {"grey": (1.0, 1.0, 1.0), "red": (1.0, 0.0, 0.0), "green": (0.0, 1.0, 0.0), "blue": (0.0, 0.0, 1.0)}


@dataclass(frozen=True)
class Step:
    """One patch to measure.

    Attributes
    ----------
    order : int
        1-based position in the session.
    gun : str
        ``grey`` or the gun shown alone.
    level : float
        Grey level, a whole 8-bit code divided by 255.
    """

    order: int
    gun: str
    level: float

    @property
    def rgb(self) -> tuple[float, float, float]:
        """Signal values of the patch."""
        return tuple(self.level * c for c in GUN_RGB[self.gun])


def measurement_steps(n_levels: int, repeats: int, per_gun: bool, seed: int) -> list[Step]:
    """Every patch of a session, in random order.

    Levels are ``n_levels`` whole 8-bit codes from 0 to 255, equally spaced;
    each is shown ``repeats`` times for grey and, with ``per_gun``, for each
    gun alone.  The order is a random permutation drawn from ``seed``.

    Raises
    ------
    InputError
        Fewer than 5 or more than 256 levels, repeats outside 1..10.
    """
    if not 5 <= n_levels <= 256:
        raise InputError("argument", "--levels", f"expected 5 to 256 levels, got {n_levels}")
    if not 1 <= repeats <= 10:
        raise InputError("argument", "--repeats", f"expected 1 to 10 repeats, got {repeats}")
    codes = np.unique(np.round(np.linspace(0, 255, n_levels)).astype(int))
    guns = ["grey", "red", "green", "blue"] if per_gun else ["grey"]
    items = [(g, int(c)) for g in guns for c in codes for _ in range(repeats)]
    order = np.random.default_rng([seed, 15]).permutation(len(items))
    return [Step(i + 1, items[j][0], items[j][1] / 255.0) for i, j in enumerate(order)]


class ReadingsLog:
    """The screen routine's readings file: one row per accepted reading, fsync'd.

    Parameters
    ----------
    path : Path
    seed : int or None
        Seed of the order; None: 0 for a new file, the file's own when resumed.
    resume : bool
        Continue an existing file (its rows must match the planned steps).

    Raises
    ------
    InputError
        A file that exists without ``resume``, or a ``seed`` other than the
        one a resumed file's readings were taken in (it was taken silently).
    """

    def __init__(self, path: Path, seed: int | None, resume: bool):
        self.path = Path(path)
        self.seed = 0 if seed is None else seed
        self.rows: list[dict] = []
        existed = self.path.exists()
        if existed and not resume:
            raise InputError(str(self.path), "file", "exists; pass --resume to continue it, or choose another --out")
        #: True when this run made the file: only then may a run that kept no reading remove it again.
        self.created = not existed
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._file = self.path.open("a+b")
        except OSError as exc:
            raise InputError(str(self.path), "--out", f"cannot be written ({exc.strerror})") from None
        try:
            fcntl.flock(self._file.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            self._file.close()
            raise InputError(str(self.path), "file", "is being written by another measure-light; "
                                                     "one measurement at a time") from None
        try:    # read under the lock: a second measure-light cannot be cutting or appending meanwhile
            self.rows = _read_log(self.path, self._file) if existed else []
        except BaseException:
            self._file.close()
            raise
        if self.rows and int(self.rows[0]["seed"]) != self.seed:
            if seed is not None:
                self._file.close()
                raise InputError(str(self.path), "--seed", f"{seed} is not the seed its readings were taken in "
                                 f"({int(self.rows[0]['seed'])}); leave --seed out to continue them")
            self.seed = int(self.rows[0]["seed"])
        self._text = io.TextIOWrapper(self._file, encoding="utf-8", newline="", write_through=True)
        self._writer = csv.DictWriter(self._text, fieldnames=LOG_COLUMNS)
        if self._file.seek(0, os.SEEK_END) == 0:
            self._writer.writeheader()
            self._sync()

    def remaining(self, steps: list[Step]) -> list[Step]:
        """The steps not yet in the file, refusing rows that are not steps of this plan.

        Rows deleted from the file (say, readings refused as noisy) are
        measured again on ``--resume``.
        """
        done = set()
        for row in self.rows:
            try:
                order = int(row["order"])
                step = steps[order - 1] if order >= 1 else None
                if step is None:
                    raise IndexError(order)
                same = row["gun"] == step.gun and abs(float(row["level"]) - step.level) <= 1e-6
            except (KeyError, ValueError, IndexError):
                same = False
            if not same or order in done:
                raise InputError(str(self.path), f"order {row.get('order')}",
                                 "does not match this session's plan (or appears twice); resume with the same "
                                 "--levels, --repeats and --per-gun")
            done.add(order)
        return [s for s in steps if s.order not in done]

    def _sync(self) -> None:
        self._text.flush()
        os.fsync(self._file.fileno())

    def append(self, step: Step, cd_m2: float) -> None:
        """Write one accepted reading and flush it to disk."""
        row = {"order": step.order, "gun": step.gun, "level": f"{step.level:.6f}", "luminance_cd_m2": repr(cd_m2),
               "seed": self.seed, "time_utc": datetime.now(timezone.utc).replace(microsecond=0).isoformat()}
        self._writer.writerow(row)
        self._sync()
        self.rows.append({k: str(v) for k, v in row.items()})

    def close(self) -> None:
        """Close the file."""
        self._text.close()

    def readings(self) -> Readings:
        """The readings so far."""
        return make_readings([float(r["level"]) for r in self.rows], [float(r["luminance_cd_m2"]) for r in self.rows],
                             [r["gun"] for r in self.rows], [int(r["order"]) for r in self.rows], str(self.path))


#: psychopy key names and the characters they type into a reading: digits and the decimal point (or comma) ...
TYPED = {**{str(d): str(d) for d in range(10)}, **{f"num_{d}": str(d) for d in range(10)},
         "period": ".", "num_decimal": ".", "comma": ",", "num_separator": ","}   # the keypad's: a decimal comma
#: ... and keys that type nothing (modifiers, moving, the keys the screen itself reads).  Every other key is kept
#: in the reading, as itself or as "?", so that a reading typed with it is refused: dropped, "-5" was read as
#: 5 cd/m2 and "1e308" as 1308.
NOT_TYPING = frozenset({"lshift", "rshift", "shift", "lctrl", "rctrl", "ctrl", "lalt", "ralt", "alt", "lmeta",
                        "rmeta", "lwindows", "rwindows", "lcommand", "rcommand", "loption", "roption", "capslock",
                        "numlock", "scrolllock", "menu", "function", "tab", "left", "right", "up", "down", "home",
                        "end", "pageup", "pagedown", "insert", "delete", "escape", "return", "num_enter",
                        "backspace", *(f"f{i}" for i in range(1, 25))})
_NAMED = {"minus": "-", "num_subtract": "-", "plus": "+", "num_add": "+", "space": " ", "slash": "/",
          "num_divide": "/", "num_multiply": "*", "equal": "=", "num_equal": "=", "apostrophe": "'",
          "semicolon": ";", "colon": ":"}


def typed_character(key: str) -> str:
    """The character the key ``key`` (a psychopy key name) types into a reading; "" for keys that type none.

    Digits, the decimal point and comma type themselves; a key that types
    nothing (:data:`NOT_TYPING`) gives ""; any other key gives its character
    (or "?"), which makes the reading refused rather than silently shortened.
    """
    if key in TYPED:
        return TYPED[key]
    if key in NOT_TYPING:
        return ""
    if len(key) == 1 and key.isprintable():
        return key
    return _NAMED.get(key, "?")


def parse_reading(text: str) -> float | None:
    """A typed reading in cd/m² (decimal point or comma), or None if it is not one."""
    try:
        value = float(text.strip().replace(",", "."))
    except ValueError:
        return None
    return value if np.isfinite(value) and 0.0 <= value < 1e6 else None


def caution(patch_deg: float | None) -> str:
    """The caution printed before the measurement window opens, about what that window shows.

    Parameters
    ----------
    patch_deg : float or None
        Side of the central patch in degrees; None for the full field.

    Returns
    -------
    str
        One line: the window shows a steady patch that jumps between grey
        levels (and guns) when a reading is entered, never the protocol's
        dots; who should not take the readings; defer to the ethics board
        and clinical advice.
    """
    shown = f"a steady {patch_deg:g}° square patch" if patch_deg is not None else "the whole screen, steady,"
    return (f"caution: measure-light shows {shown} at full level while the photometer is aimed, then at other "
            "levels in random order, jumping to the next each time a reading is entered (it never shows the "
            "protocol's dots); its jumps in level can flash, which can trigger seizures in people with "
            "photosensitive epilepsy and migraine in others: people with such a history should not take the "
            "readings; follow your ethics board and clinical advice")


def check_out(out: str | Path, inputs: dict) -> None:
    """Refuse a profile name that would destroy a file, before anything is measured or fitted.

    Parameters
    ----------
    out : str or Path
        The ``--out`` given: a ``.toml`` file; an earlier light profile there
        is replaced (a new measurement of the display).
    inputs : dict
        What the command reads, ``{"readings file": path, "protocol": path}``
        (None where not given).

    Raises
    ------
    InputError
        ``out`` does not end in ``.toml`` (a ``.png`` was overwritten by the
        figure, a ``.csv`` could be the readings), is one of the inputs, or
        is an existing file that is not a light profile.
    """
    p = Path(out)
    if p.suffix.lower() != ".toml":
        raise InputError(str(out), "--out", "expected a file name ending in .toml for the light profile (its figure "
                         "is written beside it as .png)")
    for what, path in inputs.items():
        if path is not None and p.exists() and Path(path).exists() and p.samefile(path):
            raise InputError(str(out), "--out", f"is the {what} this command reads; choose another name")
    if p.is_file():
        try:
            kind = f'kind = "{PROFILE_KIND}"' in p.read_text(encoding="utf-8", errors="replace")
        except OSError as exc:
            raise InputError(str(out), "--out", f"cannot be read ({exc.strerror})") from None
        if not kind:
            raise InputError(str(out), "--out", "exists and is not a light profile (only an earlier profile is "
                             "replaced); choose another name")


def readings_path(out: str | Path) -> Path:
    """Where the screen routine keeps the readings of profile ``out``."""
    p = Path(out)
    return p.with_name(p.stem + ".readings.csv")


def _read_log(path: Path, f) -> list[dict]:
    """The readings an existing readings file holds (``f``: it, open ``a+b`` and locked), checked.

    A last line without its line end (a reading being written when the
    process ended) is cut off with a note, and that reading is measured
    again; so are rows whose reading was cleared by hand.

    Raises
    ------
    InputError
        A header other than :data:`LOG_COLUMNS` (a spreadsheet may have
        saved the file with other separators), or a row or cell that is not
        as measure-light writes it, naming its line and column.
    """
    f.seek(0)
    data = f.read()
    whole = data.rfind(b"\n") + 1
    if whole < len(data):
        f.truncate(whole)
        os.fsync(f.fileno())
        print(f"note: {path}: its last line was cut short ({data[whole:][:40]!r}: a reading being written when the "
              "measurement ended); it is removed and that reading is measured again", file=sys.stderr)
        data = data[:whole]
    if not data:        # nothing whole in it, not even the header (ended while writing it): begin afresh
        return []
    try:
        text = data.decode("utf-8-sig")    # -sig: a spreadsheet's "CSV UTF-8" byte-order mark
    except UnicodeDecodeError:
        raise InputError(str(path), "file", "is not UTF-8 text; expected the readings file measure-light "
                         "writes") from None
    reader = csv.reader(io.StringIO(text, newline=""))
    header = [cell.strip() for cell in next(reader, [])]
    if header != list(LOG_COLUMNS):
        raise InputError(str(path), "header", f"expected the columns {','.join(LOG_COLUMNS)} as measure-light "
                         f"writes them, found {','.join(header)[:80] or 'none'!r} (re-saved by a spreadsheet with "
                         "other separators?); restore them to continue, nothing was changed")
    rows = []
    for cells in reader:
        line = reader.line_num
        if not any(cell.strip() for cell in cells):
            continue
        if len(cells) != len(LOG_COLUMNS):
            raise InputError(str(path), f"line {line}", f"has {len(cells)} cells, the header {len(LOG_COLUMNS)} "
                             "(a decimal comma?); correct it or delete the row to measure it again")
        row = dict(zip(LOG_COLUMNS, (cell.strip() for cell in cells)))
        if not row["luminance_cd_m2"]:
            continue        # a reading cleared by hand: measured again
        for name, kind in (("order", int), ("level", float), ("luminance_cd_m2", float), ("seed", int)):
            try:
                value = kind(row[name]) if "_" not in row[name] else None
            except ValueError:
                value = None
            if value is None or not math.isfinite(value) or value < 0:
                raise InputError(str(path), f"line {line}: {name}", f"expected a number >= 0 as measure-light "
                                 f"writes it, got {row[name][:40]!r}; correct it or delete the row to measure "
                                 "it again")
        if rows and row["seed"] != rows[0]["seed"]:
            raise InputError(str(path), f"line {line}: seed", f"{row['seed']} differs from the first reading's "
                             f"{rows[0]['seed']}: one file holds one measurement")
        rows.append(row)
    return rows


def _write_profile_and_figure(fits, out: Path, text: str) -> tuple[Path, list[str]]:
    """Write the profile ``text`` to ``out`` and its figure beside it (``.png``, ``.pdf`` of the same stem).

    Figure and profile are written into a hidden folder beside ``out``
    first; then the figure is moved to its names and the profile last, so
    it appears only once its figure is in place and no rename needs room.  A full disk, a
    read-only folder or a figure name that is a folder is one
    :class:`~fitting.errors.InputError` naming ``--out`` with no new file.
    Ctrl-C and SIGTERM wait while the files are moved in. (A process killed
    between those renames leaves the earlier profile beside the new figure,
    and the hidden folder: run the command again.)
    """
    from fitting.display_figure import light_figure
    from fitting.outputs import signals_deferred

    staging = None
    try:
        for name in (out, *(out.with_name(f"{out.stem}.{ext}") for ext in ("png", "pdf"))):
            if name.is_dir():
                raise InputError(str(out), "--out", f"{name} is a folder; expected a file name for the profile "
                                 "and room for its figure")
        out.parent.mkdir(parents=True, exist_ok=True)
        # short names inside: a name near the file system's limit is the user's to use, not the staging's
        staging = Path(tempfile.mkdtemp(prefix=".light-profile-", dir=out.parent))
        # a tab or a line break in the name is shown as \t, \n: the fonts have no glyph for them
        drawn = light_figure(fits, staging / "figure", title=f"light profile {printable(out.name)}")
        ready = write_atomically(staging / "profile.toml", text)    # every byte on disk before anything is replaced
        figures = [str(out.with_name(out.stem + Path(f).suffix)) for f in drawn]   # lab.display.v2.png
        with signals_deferred():
            for f, final in zip(drawn, figures):
                os.replace(f, final)
            os.replace(ready, out)
            _WRITTEN.append(out)
    except OSError as exc:
        raise InputError(str(out), "--out", f"cannot be written ({exc.strerror or exc})") from None
    finally:
        if staging is not None:
            shutil.rmtree(staging, ignore_errors=True)
    return out, figures


def written() -> list[Path]:
    """Light profiles this process has written in full, in order."""
    return list(_WRITTEN)


def finish(readings: Readings, out: str | Path, screen_cm, screen_px, refresh_hz: float | None, field: str,
           surround_level: float | None, label: str = "", fit_anyway: bool = False, measured_utc: datetime | None = None,
           stream=None) -> Path:
    """Fit readings, print the result, write the light profile and its figure.

    Parameters
    ----------
    readings : Readings
    out : str or Path
        The profile file (TOML); the figure goes next to it (``.png``/``.pdf``).
    screen_cm, screen_px, refresh_hz, field, surround_level, label
        Written into the profile (see :func:`runner.light_profile.profile_text`).
    fit_anyway : bool
        Fit readings with problems (listed in the profile).
    measured_utc : datetime, optional
        Default: now.
    stream : file-like, optional
        Where the report is printed (default standard output).

    Returns
    -------
    Path
        The profile written.

    Raises
    ------
    ReadingsRefused
        Problems in the readings (every one is printed first), exit 2.
    """
    stream = stream or sys.stdout
    if "grey" not in readings.channels:
        raise InputError(readings.source, "gun", "no grey readings (all guns at the same level); a profile needs them")
    try:
        fits = fit_readings(readings, fit_anyway=fit_anyway)
    except ReadingsRefused as exc:
        stream.write("problems in the readings (nothing fitted; measure these rows again, or pass --fit-anyway):\n")
        if Path(readings.source).name.endswith(".readings.csv"):
            stream.write(f"  (rows are the 'order' column of {readings.source}: delete those rows and run the same "
                         "command with --resume to measure them again)\n")
        stream.write("".join(f"  {p.line()}\n" for p in exc.problems))
        stream.flush()
        raise
    lines = [f"gain-offset-gamma fit of {readings.level.size} readings from {readings.source}:"]
    for fit in fits.values():
        lines += ["  " + x for x in fit.summary_lines()]
        lines += [f"  fitted anyway despite: {p.line()}" for p in fit.problems]
    when = measured_utc or datetime.now(timezone.utc)
    text = profile_text(fits, when, screen_cm, screen_px, refresh_hz, field, surround_level, label,
                        fitted_anyway=any(f.problems for f in fits.values()))
    path, figures = _write_profile_and_figure(fits, Path(out), text)
    lines += [f"light profile: {path}", f"figure: {figures[0]}",
              "this calibration holds only for this display, its current settings (brightness, contrast, colour "
              "mode) and its warm-up state; measure again after changing any of them"]
    stream.write("\n".join(lines) + "\n")
    stream.flush()
    return path


def from_csv(readings_file: str | Path, out: str | Path, protocol=None, label: str = "",
             fit_anyway: bool = False) -> Path:
    """Fit readings from a CSV file and write the light profile (no screen).

    The display's size and resolution come from ``protocol`` (``[display]``),
    or the built-in defaults; the refresh rate and the surround are recorded as not known.
    """
    from runner.protocol import Protocol

    protocol = protocol or Protocol()
    d = protocol.display
    readings = read_readings(readings_file)
    return finish(readings, out, d.screen_cm, d.screen_px, None, f"readings from {Path(readings_file).name}",
                  None, label, fit_anyway)     # neither the refresh rate nor the surround is known


def on_screen(protocol, out: str | Path, n_levels: int = 9, repeats: int = 2, per_gun: bool = False,
              patch_deg: float | None = 5.0, windowed: bool = False, seed: int | None = None, resume: bool = False,
              label: str = "", fit_anyway: bool = False, stream=None) -> Path | None:
    """Measure the display on screen, then fit and write the light profile.

    Readings go to :func:`readings_path` of ``out`` as they are accepted.

    Returns
    -------
    Path or None
        The profile, or None when the experimenter stopped early (the
        readings so far are kept; ``resume`` continues).
    """
    stream = stream or sys.stdout
    if Path(out).is_dir():
        raise InputError(str(out), "--out", "is a folder; expected a file name for the light profile")
    log = ReadingsLog(readings_path(out), seed, resume)
    try:
        steps = measurement_steps(n_levels, repeats, per_gun, log.seed)
        todo = log.remaining(steps)
        if todo:
            from runner.display.light_meter import measure  # opens psychopy: only when there is something to measure

            stream.write(caution(patch_deg) + "\n")
            stream.flush()
            complete, hz = measure(protocol, steps, todo, log, windowed, patch_deg, stream)
        else:
            complete, hz = True, None
    finally:
        log.close()
        if not log.rows and log.created:  # made by this run, no reading taken (no screen, stopped at once)
            log.path.unlink(missing_ok=True)
    if not complete:
        if log.rows:
            stream.write(f"stopped: {len(log.rows)} of {len(steps)} readings kept in {log.path}; "
                         "continue with the same command and --resume\n")
        else:
            stream.write("stopped before the first reading; nothing written\n")
        stream.flush()
        return None
    d = protocol.display
    field = f"central square patch of {patch_deg:g} deg" if patch_deg is not None else "full field"
    return finish(log.readings(), out, d.screen_cm, d.screen_px, hz, field, d.background, label, fit_anyway,
                  stream=stream)
