"""One process at a time in a folder: ``plan``, ``recover`` and ``demo`` claim theirs.

A claim is an exclusive ``flock`` on ``FOLDER/.lock``, a file that records
the holder's process id.  A second process that tries to claim the folder
gets one line naming that process instead of writing beside it (two demos
into one folder deleted each other's files; two studies would redo each
other's tasks).  The kernel releases a ``flock`` when its process dies,
however it dies, so a claim left by a killed command never blocks the next
one.  The file itself stays: removing it would race with a process that has
just opened it.
"""

from __future__ import annotations

import errno
import fcntl
import os
import stat
from pathlib import Path

from fitting.errors import InputError

#: The claim's file, inside the claimed folder.
CLAIM_FILE = ".lock"


class FolderClaim:
    """An exclusive claim on a folder, held until :meth:`release`.

    Parameters
    ----------
    folder : str or Path
        Created if needed.
    option : str
        The option that named the folder, for error messages.

    Raises
    ------
    InputError
        The folder cannot be made or written, or another process holds it.
    """

    def __init__(self, folder: str | Path, option: str = "--out"):
        self.folder = Path(folder)
        path = self.folder / CLAIM_FILE
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            # never through a link: truncating it below would empty whatever file the link names
            fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW | os.O_NONBLOCK, 0o666)
        except OSError as exc:
            why = ("a link or a folder, not this tool's file" if exc.errno in (errno.ELOOP, errno.EISDIR)
                   else exc.strerror)
            where = str(path) if exc.errno in (errno.ELOOP, errno.EISDIR) else str(self.folder)
            raise InputError(where, option, f"cannot be used ({why})") from None
        if not stat.S_ISREG(os.fstat(fd).st_mode):       # a named pipe or a device of that name
            os.close(fd)
            raise InputError(str(path), option, "cannot be used (not a regular file, not this tool's file)")
        os.set_blocking(fd, True)
        self._file = os.fdopen(fd, "a+", encoding="utf-8")
        try:
            fcntl.flock(self._file, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            self._file.seek(0)
            holder = self._file.read().strip() or "another process"
            self._file.close()
            raise InputError(str(self.folder), option, f"is in use by {holder}; wait for it to finish or "
                             "choose another folder") from None
        try:
            self._file.seek(0)
            self._file.truncate()
            self._file.write(f"process {os.getpid()}\n")
            self._file.flush()
        except OSError as exc:
            self.release()
            raise InputError(str(self.folder), option, f"cannot be used ({exc.strerror})") from None

    def release(self) -> None:
        """Release the claim (idempotent)."""
        if not self._file.closed:
            fcntl.flock(self._file, fcntl.LOCK_UN)
            self._file.close()

    def __enter__(self) -> "FolderClaim":
        return self

    def __exit__(self, *exc) -> None:
        self.release()
