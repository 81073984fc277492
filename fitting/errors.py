"""The two error types the command line turns into one line on stderr.

:class:`InputError` (bad input, exit code 2) is shared by the whole tool;
:class:`SafetyRefusal` (exit code 3) is raised by :mod:`runner.safety` and
the timing checks. Both live here, in a module that imports only three small
standard modules, so that the command line can catch them from its first
instant (a Ctrl-C while the heavy modules load is then reported in one line
too). So do the few words on a path that cannot be read (:func:`file_problem`,
:func:`name_too_long`).
"""

from __future__ import annotations

import errno
import os
import stat

#: The longest name of one file or folder on the usual file systems (ext4, XFS, btrfs, APFS, NTFS: 255).
NAME_MAX_BYTES = 255


class InputError(ValueError):
    """Bad input from a file or an argument.

    Parameters
    ----------
    source : str
        The file (or ``"argument"``) the bad value came from.
    field : str
        The field, column, line or option that is wrong.
    message : str
        What was expected, in plain words.
    """

    def __init__(self, source: str, field: str, message: str):
        self.source = str(source)
        self.field = str(field)
        self.message = " ".join(str(message).split())
        super().__init__(self.line())

    def __reduce__(self):
        # rebuilt from its three parts when it crosses to another process (worker pools)
        return (type(self), (self.source, self.field, self.message))

    def line(self) -> str:
        """Return the one-line description: ``source: field: message`` (control characters escaped)."""
        parts = [p for p in (self.source, self.field) if p]
        return printable(": ".join(parts + [self.message]))


class SafetyRefusal(Exception):
    """A protocol or display refused for safety or timing (exit code 3).

    Parameters
    ----------
    reason : str
        Why, in plain words.
    remedy : str
        How to go on (a fix, and the override option where there is one).
    source : str
        The protocol file, if known.
    field : str
        The protocol field concerned, if any.
    kind : {"safety", "timing"}
        Which check refused.
    override : str or None
        The command-line option that runs anyway after review, if any.
    """

    #: Exit code of the command line for a refusal.
    exit_code = 3

    def __init__(
        self,
        reason: str,
        remedy: str,
        source: str = "",
        field: str = "",
        kind: str = "safety",
        override: str | None = None,
    ):
        self.reason = " ".join(str(reason).split()).rstrip(".")
        self.remedy = " ".join(str(remedy).split()).rstrip(".")
        self.source = str(source)
        self.field = str(field)
        self.kind = kind
        self.override = override
        super().__init__(self.line())

    def line(self) -> str:
        """The one-line message: ``source: field: refused for KIND: reason; remedy``."""
        reason = self.reason[:1].lower() + self.reason[1:]
        parts = [p for p in (self.source, self.field) if p]
        return printable(": ".join(parts + [f"refused for {self.kind}: {reason}; {self.remedy}"]))


def printable(text: str) -> str:
    """``text`` with every character a terminal or a font would not show as itself written as an escape.

    A tab, a line break or an escape sequence in a file name or a protocol's
    path (``\\x1b[2J`` clears the screen) is shown as ``\\t``, ``\\n``,
    ``\\x1b[2J``: a message stays one line and the terminal stays as it was.
    """
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() else c.encode("unicode_escape").decode("ascii") for c in text)


def name_too_long(exc: OSError) -> InputError | None:
    """The one-line error for a path the file system refuses as too long, or ``None`` for any other error.

    Parameters
    ----------
    exc : OSError
        Raised by an operation on a path (``exc.filename`` names it).

    Returns
    -------
    InputError or None
        Naming the path (shortened) and the limit, for ``ENAMETOOLONG``.
    """
    if exc.errno != errno.ENAMETOOLONG:
        return None
    name = str(exc.filename or "")
    shown = name if len(name) <= 60 else f"{name[:40]}…{name[-12:]} ({len(name)} characters)"
    return InputError(shown, "name", f"too long for the file system (at most {NAME_MAX_BYTES} bytes "
                                      "between two slashes); choose a shorter name")


def _in_another_normal_form(path: str) -> str:
    """A hint when the folder holds the same name in another Unicode normal form, else "".

    "café" can be stored as é or as e + a combining accent (some systems
    write names the second way); the two look the same and open different files.
    """
    import unicodedata      # here: the module loads only what the first instant needs

    folder, name = os.path.split(os.fspath(path))
    if name.isascii():
        return ""
    wanted = unicodedata.normalize("NFC", name)
    try:
        with os.scandir(folder or ".") as entries:
            if any(e.name != name and unicodedata.normalize("NFC", e.name) == wanted for e in entries):
                return (" (a file of this name stored in another Unicode form is there, as some systems write "
                        "accented names: rename it, or copy its name from the folder listing)")
    except OSError:
        pass
    return ""


def file_problem(path) -> str | None:
    """Why ``path`` cannot be read as a regular file, in a few words, or ``None`` when it can.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    str or None
        "does not exist", "is not a file" (a folder, a pipe, a device) or why
        the name itself cannot be used (too long, a loop of links, no access).
    """
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        return "does not exist" + _in_another_normal_form(path)
    except NotADirectoryError:
        return "does not exist (a part of its path is a file)"
    except OSError as exc:
        too_long = name_too_long(exc)
        return f"cannot be used: its name is {too_long.message}" if too_long else f"cannot be used ({exc.strerror})"
    return None if stat.S_ISREG(mode) else "is not a file"
