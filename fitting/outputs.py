"""Outputs written whole, as a set, readable by colleagues.

``fit``, ``compare`` and ``plan`` write their tables, figures and reports
into a hidden staging folder inside ``--out`` (``.staging-<pid>-*``).  Only
when every file is complete are they moved into place, each by one rename,
after a manifest (``outputs.json``) listing them has been written.  Then the
files that the folder's previous manifest listed and this run did not write
are removed, so no table or figure of an earlier fit survives beside the new
ones.  A folder holding another command's set is refused (a comparison
written into a fit folder would otherwise remove the fit's tables).  Files
no manifest lists (your own notes) are never touched, and trial logs,
sidecars and lock files never, whatever a manifest says.

A failure, Ctrl-C or SIGTERM before that point removes the staging folder
and leaves the earlier outputs as they were; a staging folder left by a
killed process is removed by the next run into the same folder.  While the
files are moved in, Ctrl-C and SIGTERM wait until the set is complete (a
few milliseconds).  A process killed outright in that window (``kill -9``,
a power cut) leaves a journal, ``.outputs-pending.json``, naming its
staging folder and the set's files: the next command that writes into the
folder, or ``compare`` reading it, first finishes that move, so the folder
never stays a mix of two sets.

Two commands writing into one folder at once (two ``fit`` runs started by
mistake, say) move their sets in one after the other, never interleaved:
the move holds an exclusive lock on the folder itself (:func:`folder_lock`,
``flock`` on the directory, so no lock file is left), and ``compare`` holds
a shared one while it reads a fit folder, so it never reads half of one fit
and half of the next.  The one that moves its set in last says, in a note,
that it replaced a set moved in while it ran (the folder's manifest as
:func:`check_out_dir` saw it at the start is compared with the one found
at the move).

Files get the permissions the umask allows (``0666 & ~umask``), like any
file a program creates, so colleagues who can read the figures can read the
tables too.
"""

from __future__ import annotations

import fcntl
import json
import os
import shutil
import signal
import sys
import tempfile
from contextlib import contextmanager
from pathlib import Path

from .errors import InputError

MANIFEST = "outputs.json"
#: Journal of a set being moved in; present only while (or if killed while) the files are renamed.
PENDING = ".outputs-pending.json"
STAGING_PREFIX = ".staging-"
#: Data files a manifest can never cause to be removed, whatever it lists.
NEVER_REMOVED = (".trials.csv", ".session.json", ".lock")
#: This process's holds: folder -> [file descriptor, exclusive holds, shared holds].
_HELD: dict[str, list[int]] = {}
#: Folders this process has moved a complete set into (what a late Ctrl-C message reports).
_COMMITTED: list[str] = []
#: The manifest of each ``--out`` as :func:`check_out_dir` found it when its command started (:func:`_stamp`).
_SEEN: dict[str, tuple | None] = {}


def file_mode() -> int:
    """Mode of a new file under the current umask (``0666 & ~umask``)."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


def write_atomic(path: str | Path, data: bytes) -> None:
    """Write ``data`` under a temporary name beside ``path``, then rename it into place.

    The file's mode follows the umask; on any failure the temporary file is
    removed and ``path`` is unchanged.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix="." + path.name + ".", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            os.fchmod(fh.fileno(), file_mode())
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


class StagedOutputs:
    """The staging folder of one command's outputs, and where they will land.

    Attributes
    ----------
    folder : Path
        Write here (same layout as the final folder).
    final_dir : Path
        The ``--out`` folder.
    """

    def __init__(self, folder: Path, final_dir: Path):
        self.folder = folder
        self.final_dir = final_dir

    def final(self, path: str | Path) -> str:
        """Where a staged file will be once committed."""
        p = Path(path)
        try:
            return str(self.final_dir / p.relative_to(self.folder))
        except ValueError:
            return str(p)

    def final_paths(self, paths) -> list[str]:
        """:meth:`final` of each path."""
        return [self.final(p) for p in paths]


def _flock(fd: int, mode: int, folder: str) -> None:
    try:
        fcntl.flock(fd, mode | fcntl.LOCK_NB)
    except BlockingIOError:
        print(f"aftershift: waiting for another command using {folder}", file=sys.stderr, flush=True)
        fcntl.flock(fd, mode)
    except OSError:
        pass    # a file system without locks (some network mounts): go on unlocked, as before locks existed


@contextmanager
def folder_lock(folder: str | Path, exclusive: bool):
    """Hold an output folder's lock: exclusive to move a set in, shared to read one.

    The lock is ``flock`` on the folder's own descriptor: advisory, between
    aftershift commands, released by the kernel when a process dies.
    Re-entrant within a process: a shared hold is raised to exclusive for
    an inner exclusive one and lowered back after it.  A folder that cannot
    be opened (entered but not listed) is read without a shared hold.

    Parameters
    ----------
    folder : str or Path
        The output folder; it must exist.
    exclusive : bool
        True while moving a set in, False while reading one.

    Raises
    ------
    OSError
        The folder cannot be opened for an exclusive hold.
    """
    key = os.path.realpath(folder)
    held = _HELD.get(key)
    if held is None:
        try:
            fd = os.open(key, os.O_RDONLY | os.O_DIRECTORY)
        except OSError:
            if exclusive:
                raise
            fd = None
        if fd is None:            # a folder this user may not open: read unlocked; a failing read
            yield                 # reports itself in one line, as before locks existed
            return
        held = _HELD[key] = [fd, 0, 0]
    before = fcntl.LOCK_EX if held[1] else fcntl.LOCK_SH if held[2] else None
    held[1 if exclusive else 2] += 1
    try:
        if before is None or (exclusive and before == fcntl.LOCK_SH):
            _flock(held[0], fcntl.LOCK_EX if exclusive else fcntl.LOCK_SH, str(folder))
        yield
    finally:
        held[1 if exclusive else 2] -= 1
        if not held[1] and not held[2]:
            os.close(held[0])                      # closing the last descriptor releases the lock
            del _HELD[key]
        elif exclusive and not held[1]:
            fcntl.flock(held[0], fcntl.LOCK_SH)    # back to the outer shared hold


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def remove_dead_folders(parent: str | Path, prefix: str) -> None:
    """Remove folders ``parent/<prefix><pid>-*`` whose process has ended (killed before it could clean up).

    Parameters
    ----------
    parent : str or Path
        Where to look.
    prefix : str
        The name's start, followed by the owning process id and ``-``.
    """
    for entry in Path(parent).glob(prefix + "*"):
        try:
            pid = int(entry.name[len(prefix):].split("-")[0])
        except ValueError:
            continue
        if entry.is_symlink():      # no command makes one: a link named like a staging folder goes, not its target
            entry.unlink()
        elif entry.is_dir() and not _pid_alive(pid):
            shutil.rmtree(entry, ignore_errors=True)


def _manifest(out: Path) -> dict:
    try:
        content = json.loads((out / MANIFEST).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return content if isinstance(content, dict) else {}


def read_manifest(out: Path) -> list[str]:
    """Files (relative to ``out``) the folder's manifest lists; empty if none or unreadable."""
    files = _manifest(out).get("files", [])
    return [f for f in files if isinstance(f, str)] if isinstance(files, list) else []


#: Manifests written before ``plan`` and ``recover`` named themselves said "study".
_SAME_SET = {"study": ("plan", "recover")}


def refuse_other_set(out_dir: str | Path, command: str) -> None:
    """Refuse to move ``command``'s set into a folder holding another command's set.

    A set replaces the earlier set of the same command (its stale files are
    removed); another command's set would be removed with it, so that
    ``compare --out`` a fit folder would delete the fit's tables.

    Raises
    ------
    InputError
        The folder's manifest names another command.
    """
    out = Path(out_dir)
    earlier = _manifest(out).get("command")
    if isinstance(earlier, str) and earlier != command and command not in _SAME_SET.get(earlier, ()):
        shown = " or ".join(f"`aftershift {c}`" for c in _SAME_SET.get(earlier, (earlier,)))
        raise InputError(str(out), "--out", f"holds the outputs of {shown} (listed in {MANIFEST}), "
                         f"which `aftershift {command}` would replace; choose another folder")


def committed() -> list[str]:
    """Folders into which this process has moved a complete set, in order."""
    return list(_COMMITTED)


@contextmanager
def signals_deferred():
    """Hold Ctrl-C and SIGTERM until the block ends, then act on the first that came.

    Python runs signal handlers in the main thread; outside it (where they
    cannot be replaced) the block runs unguarded.
    """
    caught: list[int] = []
    wanted = (signal.SIGINT, signal.SIGTERM)
    try:
        old = {s: signal.signal(s, lambda signum, frame: caught.append(signum)) for s in wanted}
    except ValueError:
        yield
        return
    try:
        yield
    finally:
        for s, handler in old.items():
            signal.signal(s, handler)
        if caught:
            handler = old[caught[0]]
            if callable(handler):
                handler(caught[0], None)
            elif handler == signal.SIG_DFL:
                os.kill(os.getpid(), caught[0])


def _inside(out: Path, rel: str) -> bool:
    """True when ``out / rel`` names a place inside ``out``: no absolute path, no ``..``, no folder linked out.

    (A manifest edited by hand once made a fit delete a file through a linked folder.)
    """
    if Path(rel).is_absolute() or ".." in Path(rel).parts:
        return False
    top = os.path.realpath(out)
    parent = os.path.realpath((out / rel).parent)
    return parent == top or parent.startswith(top + os.sep)


def _move_in(out: Path, stage: Path, files: list[str], previous: list[str]) -> None:
    """Rename the staged files into ``out``, then the manifest; remove stale files; drop the journal.

    Repeatable: a file already moved (absent from ``stage``) is skipped, so
    a move cut short by a kill is finished by running this again.
    """
    for rel in files:
        if not _inside(out, rel):
            continue
        target = out / rel
        target.parent.mkdir(parents=True, exist_ok=True)
        try:
            os.replace(stage / rel, target)
        except FileNotFoundError:
            if not target.exists():
                raise
    if (stage / MANIFEST).exists():
        os.replace(stage / MANIFEST, out / MANIFEST)
    keep = set(files) | {MANIFEST}
    for rel in previous:
        if rel in keep or rel.endswith(NEVER_REMOVED) or not _inside(out, rel):
            continue
        stale = out / rel
        try:
            stale.unlink()
        except OSError:
            continue
        _prune_empty(stale.parent, out)
    try:
        os.unlink(out / PENDING)
    except FileNotFoundError:
        pass


def _journal(out: Path) -> dict | None:
    """The journal of an interrupted move, or None; an unreadable one reads as one without a staging folder."""
    try:
        content = json.loads((out / PENDING).read_text(encoding="utf-8"))
    except FileNotFoundError:
        return None
    except (OSError, ValueError):
        return {"files": [], "previous": [], "stage": None}
    if not isinstance(content, dict):
        return {"files": [], "previous": [], "stage": None}
    lists = {k: [f for f in content.get(k, []) if isinstance(f, str)] if isinstance(content.get(k), list) else []
             for k in ("files", "previous")}
    stage = content.get("stage")
    ok = isinstance(stage, str) and stage.startswith(STAGING_PREFIX) and Path(stage).name == stage
    return {**lists, "stage": stage if ok else None}


def finish_interrupted(out_dir: str | Path) -> bool:
    """Finish the move of a set that a killed process left half done; the caller holds the folder exclusively.

    Returns
    -------
    bool
        False when the folder holds a journal that cannot be finished (its
        staging folder is gone), True otherwise.
    """
    out = Path(out_dir)
    for temporary in out.glob(f".{PENDING}.*"):      # a journal whose own writing was cut short
        temporary.unlink(missing_ok=True)
    journal = _journal(out)
    if journal is None:
        return True
    stage = out / journal["stage"] if journal["stage"] else None
    # under the folder's exclusive lock no live command is moving a set in, whatever process now has that
    # pid; a staging folder that is a link (a hand-edited journal) would move files in from elsewhere
    if stage is not None and stage.is_dir() and not stage.is_symlink():
        _move_in(out, stage, journal["files"], journal["previous"])
        shutil.rmtree(stage, ignore_errors=True)
        return True
    return False


def settle(out_dir: str | Path) -> None:
    """Before reading a set: finish a move that a killed process left half done.

    Raises
    ------
    InputError
        The folder holds a half-moved set that cannot be finished here (its
        staging folder is gone, or the folder cannot be written).
    """
    out = Path(out_dir)
    if not os.path.exists(out / PENDING):
        return
    try:
        with folder_lock(out, exclusive=True):
            if finish_interrupted(out):
                remove_dead_folders(out, STAGING_PREFIX)    # what else the killed command left
                return
    except OSError:
        pass
    raise InputError(str(out), PENDING, "a command was killed while moving its outputs in, and the move "
                     "cannot be finished here; run that command again into this folder")


def _stamp(out: Path) -> tuple | None:
    """Which manifest the folder holds: device, inode and change time of ``outputs.json`` (None: none).

    Every set's manifest arrives by a rename, so a new set gives a new stamp.
    """
    try:
        st = os.stat(out / MANIFEST)
    except OSError:
        return None
    return st.st_dev, st.st_ino, st.st_mtime_ns


def _say_if_replaced_meanwhile(out: Path, command: str) -> None:
    """Note a set moved into ``out`` by another process since this command started (see :func:`check_out_dir`)."""
    key = os.path.abspath(out)
    if key not in _SEEN:
        return
    before = _SEEN.pop(key)
    now = _stamp(out)
    if now is not None and now != before:
        print(f"note: {out}: another `aftershift {_manifest(out).get('command', command)}` moved its outputs into "
              "this folder while this one ran; this run's outputs replace them (each set whole)", file=sys.stderr)


def _commit(staged: StagedOutputs, command: str) -> None:
    stage, out = staged.folder, staged.final_dir
    refuse_other_set(out, command)        # again, under the lock: another command may have written meanwhile
    _say_if_replaced_meanwhile(out, command)
    files = sorted(str(p.relative_to(stage)) for p in stage.rglob("*") if p.is_file())
    unfinished = _journal(out) or {"files": []}      # a move that could not be finished: its files are stale too
    previous = sorted(set(read_manifest(out)) | set(unfinished["files"]))
    manifest = {"tool": "aftershift", "command": command, "files": files}
    write_atomic(stage / MANIFEST, (json.dumps(manifest, indent=2) + "\n").encode("utf-8"))
    journal = {"stage": stage.name, "command": command, "files": files, "previous": previous}
    write_atomic(out / PENDING, (json.dumps(journal) + "\n").encode("utf-8"))
    with signals_deferred():
        _move_in(out, stage, files, previous)
        _COMMITTED.append(str(out))


def _prune_empty(folder: Path, top: Path) -> None:
    while folder != top and top in folder.parents:
        try:
            folder.rmdir()
        except OSError:
            return
        folder = folder.parent


def check_out_dir(out_dir: str | Path, command: str | None = None) -> None:
    """Refuse, before any work, an ``--out`` that cannot become a writable folder.

    Parameters
    ----------
    out_dir : str or Path
        The ``--out`` folder.
    command : str, optional
        The command that will write there: a folder holding another
        command's set is refused too (:func:`refuse_other_set`), and the
        folder's manifest is remembered, so that the move can say whether
        another process moved a set in meanwhile.

    Raises
    ------
    InputError
        An empty name, a path under a regular file, a folder (or its nearest
        existing parent) that cannot be written, or another command's folder.
    """
    if not str(out_dir).strip():
        raise InputError("argument", "--out", "is empty; name a folder (. for the current one)")
    out = Path(out_dir)
    if command is not None and out.is_dir():
        refuse_other_set(out, command)
    probe = out
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent
    if not probe.is_dir():
        raise InputError(str(out), "--out", f"{probe} is a file, not a folder")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise InputError(str(out), "--out", f"{probe} cannot be written (read-only or no permission)")
    if command is not None:
        _SEEN[os.path.abspath(out)] = _stamp(out)


@contextmanager
def output_set(out_dir: str | Path, command: str):
    """Stage a command's outputs and move them into ``out_dir`` as one set.

    Parameters
    ----------
    out_dir : str or Path
        The ``--out`` folder (created if needed).
    command : str
        Recorded in the manifest.

    Yields
    ------
    StagedOutputs

    Raises
    ------
    InputError
        ``out_dir`` is not a folder or cannot be written; a full disk.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(str(out), "--out", "exists and is not a folder")
    try:
        out.mkdir(parents=True, exist_ok=True)
        refuse_other_set(out, command)
        with folder_lock(out, exclusive=True):
            finish_interrupted(out)     # before the killed process's staging folder is removed below
            if os.path.abspath(out) in _SEEN:       # a killed command's set, finished here, is not "meanwhile"
                _SEEN[os.path.abspath(out)] = _stamp(out)
        remove_dead_folders(out, STAGING_PREFIX)
        stage = Path(tempfile.mkdtemp(prefix=f"{STAGING_PREFIX}{os.getpid()}-", dir=out))
    except OSError as exc:
        raise InputError(str(out), "--out", f"cannot be written ({exc.strerror})") from None
    staged = StagedOutputs(stage, out)
    try:
        yield staged
        with folder_lock(out, exclusive=True):
            _commit(staged, command)
    except InputError as exc:   # named where the user will look, not in the staging folder
        raise InputError(exc.source.replace(str(stage), str(out)), exc.field, exc.message) from None
    except OSError as exc:
        if _moving(out, stage):   # cut short while moving: the staging folder stays for the next run
            raise InputError(str(out), "--out", f"cannot be written ({exc.strerror}) while the new outputs were "
                             "moved in; the next aftershift command into this folder finishes the move") from None
        raise InputError(str(out), "--out", f"cannot be written ({exc.strerror}); the earlier outputs "
                         "there are unchanged") from None
    finally:
        if not _moving(out, stage):
            shutil.rmtree(stage, ignore_errors=True)


def _moving(out: Path, stage: Path) -> bool:
    """True when the folder's journal names ``stage``: its move began and did not end."""
    journal = _journal(out)
    return journal is not None and journal["stage"] == stage.name
