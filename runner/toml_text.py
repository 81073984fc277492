"""Reading TOML text into tables, with one error for everything the parser can raise.

``tomllib`` raises ``TOMLDecodeError`` for bad syntax, but a plain
``ValueError`` for an integer of more than 4,300 digits and a
``RecursionError`` for arrays nested thousands deep; each became a traceback
where a protocol, a light profile, an observer model or a ``--vary`` list
was read.
"""

from __future__ import annotations

import sys

from fitting.errors import InputError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib


def toml_tables(text: str, source: str, field: str = "TOML", what: str = "not valid TOML") -> dict:
    """Parse ``text``; raise :class:`~fitting.errors.InputError` (``source``, ``field``) if it is not TOML.

    Parameters
    ----------
    text : str
    source, field : str
        Named in the error.
    what : str
        The error's words before the parser's own in parentheses.
    """
    try:
        return tomllib.loads(text)
    except RecursionError:
        raise InputError(source, field, f"{what} (nested too deep)") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(source, field, f"{what} ({exc})") from None
    except ValueError:              # Python's own limit on converting long integers
        raise InputError(source, field, f"{what} (an integer of more than 4,300 digits)") from None
