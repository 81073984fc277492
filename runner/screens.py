"""The observer's screen texts, built from the protocol.

Every screen names keys the same way (:func:`key_words`: "the right arrow
key", "the Esc key", "the space bar"), and the instruction screen describes
the protocol's own reference direction and answer keys: "almost straight
up … tilted to the right: press the right arrow key" for an upward
reference, "almost straight to the left … tilted upward" for a leftward one,
"clockwise"/"counter-clockwise" for an oblique one.

Texts come from ``runner/texts/screens.toml`` (instructions for adapt–test
and stream blocks, practice over, break, pause, end) and
``runner/texts/caution.txt``; a lab replaces the caution with
``safety.caution_file`` and the instructions with
``screens.instructions_file`` (paths relative to the protocol file).  A
text may use the placeholders of :data:`PLACEHOLDERS`; the break screen
also ``{done}`` and ``{total}``, filled in by the session.
"""

from __future__ import annotations

import re
import sys
from pathlib import Path

from fitting.errors import InputError, file_problem
from runner.protocol import Protocol

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

TEXTS_DIR = Path(__file__).parent / "texts"
BUNDLED_CAUTION = TEXTS_DIR / "caution.txt"

#: Placeholders every observer text may use.
PLACEHOLDERS = ("cw_key", "ccw_key", "proceed_key", "quit_key", "pause_key", "reference", "cw_side", "ccw_side",
                "test_every")
#: Placeholders of the break screen, filled in by the session loop at each break.
LATER = ("done", "total")

_KEY_WORDS = {
    "left": "the left arrow key",
    "right": "the right arrow key",
    "up": "the up arrow key",
    "down": "the down arrow key",
    "space": "the space bar",
    "escape": "the Esc key",
    "return": "the Enter key",
    "tab": "the Tab key",
    "comma": "the comma key",
    "period": "the full-stop key",
    "slash": "the slash key",
    "semicolon": "the semicolon key",
}
#: Named directions (counter-clockwise from rightward) and the words for "clockwise of" / "counter-clockwise of" them.
_NAMED = {
    90.0: ("straight up", "to the right", "to the left"),
    270.0: ("straight down", "to the left", "to the right"),
    0.0: ("straight to the right", "downward", "upward"),
    180.0: ("straight to the left", "upward", "downward"),
}
_ORDINALS = {2: "second", 3: "third", 4: "fourth", 5: "fifth", 6: "sixth", 7: "seventh", 8: "eighth", 9: "ninth"}


def key_words(name: str) -> str:
    """How a key (by the keyboard's name for it) is called in texts for observers."""
    if name in _KEY_WORDS:
        return _KEY_WORDS[name]
    if name.startswith("num_"):
        return f"the {name[4:]} key on the number pad"
    return f"the {name.upper()} key"


def clock_words(direction_deg: float) -> str:
    """A direction as a position on a clock face: 90 → "12 o'clock", 45 → "1:30"."""
    minutes = round(((90.0 - direction_deg) / 30.0 % 12.0) * 60.0) % 720
    hour, minute = divmod(minutes, 60)
    hour = hour or 12
    return f"{hour} o'clock" if minute == 0 else f"{hour}:{minute:02d}"


def direction_words(reference_deg: float) -> tuple[str, str, str]:
    """Words for the reference direction and for its clockwise and counter-clockwise sides.

    Within 0.5 deg of up, down, right or left: "straight up" with "to the
    right"/"to the left" and so on; otherwise the clock-face position with
    "clockwise"/"counter-clockwise".
    """
    for named, words in _NAMED.items():
        if abs((reference_deg - named + 180.0) % 360.0 - 180.0) < 0.5:
            return words
    return f"towards {clock_words(reference_deg)} on a clock face", "clockwise", "counter-clockwise"


def placeholder_values(protocol: Protocol) -> dict[str, str]:
    """The words every placeholder of :data:`PLACEHOLDERS` stands for in this protocol."""
    keys = protocol.keys
    reference, cw_side, ccw_side = direction_words(protocol.reference_deg)
    every = protocol.stream.nback_periods + 1 if protocol.stream is not None else 1
    return {
        "cw_key": key_words(keys.cw), "ccw_key": key_words(keys.ccw), "proceed_key": key_words(keys.proceed),
        "quit_key": key_words(keys.quit), "pause_key": key_words(keys.pause),
        "reference": reference, "cw_side": cw_side, "ccw_side": ccw_side,
        "test_every": _ORDINALS.get(every, f"{every}th"),
    }


def fill(text: str, values: dict[str, str], refuse, keep: tuple[str, ...] = ()) -> str:
    """Replace ``{name}`` placeholders; names in ``keep`` stay; any other name is refused.

    ``refuse(message)`` returns the exception to raise.
    """
    def one(match: re.Match) -> str:
        name = match.group(1)
        if name in keep:
            return match.group(0)
        if name not in values:
            known = ", ".join("{" + k + "}" for k in (*values, *keep))
            raise refuse(f"has an unknown placeholder {match.group(0)}; expected {known}")
        return values[name]

    return re.sub(r"\{([A-Za-z_]+)\}", one, text)


def read_lab_text(name: str, protocol_path, field: str) -> tuple[str, Path]:
    """Read a text file named in a protocol field (relative to the protocol file).

    Raises
    ------
    InputError
        Missing, unreadable, not UTF-8 or empty (naming the field).
    """
    source = str(protocol_path) if protocol_path is not None else ""
    path = Path(name)
    if not path.is_absolute():
        path = (Path(protocol_path).parent if protocol_path is not None else Path.cwd()) / path
    problem = file_problem(path)
    if problem:
        raise InputError(source, field, f"file {path} {problem}")
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise InputError(source, field, f"file {path} is not UTF-8 text") from None
    except OSError as exc:
        raise InputError(source, field, f"file {path} cannot be read ({exc.strerror})") from None
    if not text.strip():
        raise InputError(source, field, f"file {path} is empty")
    return text, path


def lab_or_bundled(protocol: Protocol, protocol_path, field: str, bundled: str, keep: tuple[str, ...] = ()) -> str:
    """The text named by ``field`` (``section.name``) in the protocol, or ``bundled``; placeholders filled."""
    section, name = field.split(".")
    chosen = getattr(getattr(protocol, section), name)
    source = str(protocol_path) if protocol_path is not None else ""
    what = f"{field.split('.')[1].replace('_file', '')} file"
    if chosen:
        text, path = read_lab_text(chosen, protocol_path, field)
        where = f"{what} {path}"
    else:
        text, where = bundled, f"bundled {what}"
    return fill(text, placeholder_values(protocol), lambda msg: InputError(source, field, f"{where} {msg}"),
                keep).strip() + "\n"


def caution_text(protocol: Protocol, protocol_path=None) -> str:
    """The caution shown before the first trial: ``safety.caution_file`` or the bundled text, keys filled in.

    Raises
    ------
    InputError
        The file is missing, unreadable, not UTF-8, empty or has an unknown
        placeholder (field ``safety.caution_file``).
    """
    return lab_or_bundled(protocol, protocol_path, "safety.caution_file",
                          BUNDLED_CAUTION.read_text(encoding="utf-8"))


def screen_texts(protocol: Protocol, caution: str, protocol_path=None) -> dict[str, str]:
    """Every observer screen's text for this protocol.

    Parameters
    ----------
    protocol : Protocol
    caution : str
        The caution screen (from :func:`caution_text`; empty in simulations).
    protocol_path : path, optional
        The protocol file, for a relative ``screens.instructions_file``.

    Returns
    -------
    dict
        ``caution``, ``instructions``, ``practice_done``, ``break`` (with
        ``{done}`` and ``{total}`` left for the session), ``paused``, ``end``.

    Raises
    ------
    InputError
        A bad ``screens.instructions_file`` (see :func:`read_lab_text`).
    """
    bundled = tomllib.loads((TEXTS_DIR / "screens.toml").read_text(encoding="utf-8"))
    values = placeholder_values(protocol)
    texts = {}
    for name, text in bundled.items():
        if name.startswith("instructions"):
            continue
        texts[name] = fill(text, values, lambda msg, n=name: InputError(str(TEXTS_DIR / "screens.toml"), n, msg),
                           keep=LATER if name == "break" else ()).strip()
    kind = "instructions_stream" if protocol.stream is not None else "instructions"
    texts["instructions"] = lab_or_bundled(protocol, protocol_path, "screens.instructions_file",
                                           bundled[kind]).strip()
    texts["caution"] = caution
    return texts
