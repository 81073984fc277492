"""The one error type for bad input, shared by the whole tool.

The command line turns an :class:`InputError` into a single line on stderr
and exit code 2; nothing else about it is special.
"""

from __future__ import annotations


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
        """Return the one-line description: ``source: field: message``."""
        parts = [p for p in (self.source, self.field) if p]
        return ": ".join(parts + [self.message])
