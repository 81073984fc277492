"""``aftershift demo``: the whole job on invented data, in one command.

Scenario (invented): a lab pilots the default protocol
(``protocols/offset_by_lag.toml``) with three simulated observers drawn
around ``protocols/observers/typical.toml``.  The demo simulates their
sessions through the real session loop, fits them, compares the measured
after-effects with the predictions of a channel-population model
(:mod:`fitting.population`); ``compare`` writes the report.

Everything is seeded: tables and figures are the same bytes from run to run.
The only files that change between runs are the session sidecars (start and
end times, package versions), ``fit/report_data.json`` and the two
``report.html`` pages (which show them); the repository leaves exactly those
out (``.gitignore``), so running the demo in a clone leaves it clean.  The
output folder is replaced only if it holds a previous demo (marked by the
file ``DEMO_OUTPUT``) and nothing else: a file or folder no demo writes (a
session a user ran into its ``logs``, a fit of its own, notes) makes the
demo refuse, as does any other non-empty folder and a folder another demo
is writing into.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from contextlib import contextmanager
from pathlib import Path

from fitting.errors import InputError
from fitting.outputs import MANIFEST, PENDING, STAGING_PREFIX, check_out_dir, read_manifest, write_atomic
from runner.folder_claim import CLAIM_FILE, FolderClaim
from runner.trial_log import StorageError

ROOT = Path(__file__).resolve().parent.parent
PROTOCOL = ROOT / "protocols" / "offset_by_lag.toml"
MODEL = ROOT / "protocols" / "observers" / "typical.toml"
DEMO_MARK = "DEMO_OUTPUT"
SEED = 2026
N_OBSERVERS = 3
N_BOOT = 1000


#: The list of the files a finished demo wrote, with their SHA-256: what a rerun may replace.
FILE_LIST = ".demo-files.json"
#: What a demo writes at the top of its folder; the tables of ``fit`` and ``compare`` are listed in their manifests.
_TOP = (DEMO_MARK, CLAIM_FILE, FILE_LIST, "logs", "fit", "compare", "predictions_population_model.csv")
#: The simulated observers' log, sidecar and lock (and their ``.tmp`` while written) start with these.
_LOG_STEMS = tuple(f"sim{i:02d}-s1." for i in range(1, N_OBSERVERS + 1))


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _written(out: Path) -> list[Path]:
    """Every file below ``out`` but the claim's file, the mark and the list (links too: never the demo's)."""
    own = {out / CLAIM_FILE, out / DEMO_MARK, out / FILE_LIST}
    return [p for p in sorted(out.rglob("*")) if p not in own and (p.is_symlink() or not p.is_dir())]


def _write_file_list(out: Path) -> None:
    """Record what this demo wrote (:data:`FILE_LIST`), once it has written everything."""
    files = {p.relative_to(out).as_posix(): _digest(p) for p in _written(out)}
    write_atomic(out / FILE_LIST, (json.dumps({"files": files}, indent=1, sort_keys=True) + "\n").encode("utf-8"))


def _file_list(out: Path) -> dict | None:
    """The files a finished demo wrote, by SHA-256; None without a readable list (a demo killed, or older)."""
    try:
        files = json.loads((out / FILE_LIST).read_text(encoding="utf-8"))["files"]
    except (OSError, ValueError, KeyError, TypeError):
        return None
    return files if isinstance(files, dict) else None


def _command_files(folder: Path) -> list[Path]:
    """Files and links in ``folder`` that its command (fit, compare) neither listed nor keeps for a move in."""
    own = set(read_manifest(folder)) | {MANIFEST, PENDING}
    try:
        own |= set(json.loads((folder / PENDING).read_text(encoding="utf-8")).get("files", []))
    except (OSError, ValueError, AttributeError, TypeError):
        pass
    temporary = (f".{MANIFEST}.", f".{PENDING}.", STAGING_PREFIX)   # outputs.write_atomic's, a set being staged
    found = []
    for path in sorted(folder.rglob("*")):
        rel = path.relative_to(folder)
        if rel.parts[0].startswith(temporary) or (path.is_dir() and not path.is_symlink()):
            continue
        if path.is_symlink() or rel.as_posix() not in own:
            found.append(path)
    return found


def _unfinished_demo_extra(out: Path) -> Path | None:
    """In a demo folder without a file list, the first entry that this version's demo does not write."""
    for entry in sorted(out.iterdir()):
        if (entry.name not in _TOP and not entry.name.startswith(f".{FILE_LIST}.")) or entry.is_symlink():
            return entry        # (a list being written when the demo was killed: write_atomic's temporary file)
    logs = out / "logs"
    if logs.is_dir():
        for entry in sorted(logs.iterdir()):
            if not entry.name.startswith(_LOG_STEMS) or entry.is_symlink() or entry.is_dir():
                return entry
    for name in ("fit", "compare"):
        if (out / name).is_dir():
            found = _command_files(out / name)
            if found:
                return found[0]
    return None


def _not_the_demos(out: Path) -> str | None:
    """Words naming the first file in the earlier demo's ``out`` that a rerun may not replace; None if none.

    With the list of a finished demo (:data:`FILE_LIST`), every file must be
    on it with the bytes the demo wrote: a fit of one's own written into
    ``fit/`` has a manifest as the demo's has, but not its bytes.  Without
    one (a demo killed before it finished, or one older than the list), the
    names this version's demo writes (:func:`_unfinished_demo_extra`).
    """
    listed = _file_list(out)
    if listed is None:
        extra = _unfinished_demo_extra(out)
        return None if extra is None else (f"{extra.relative_to(out)}, which this version's demo does not write (if "
                                           "an older demo wrote it, remove the folder yourself)")
    for path in _written(out):
        rel = path.relative_to(out).as_posix()
        if path.is_symlink() or not path.is_file() or listed.get(rel) != _digest(path):
            return f"{rel}, which is not as the demo wrote it (a file of yours, or one changed since)"
    return None


def _refuse_foreign(out: Path) -> None:
    """Refuse an ``out`` that holds anything but an earlier demo's files (they are not ours to replace)."""
    if not out.is_dir():
        return
    if not (out / DEMO_MARK).exists():
        if any(e.name != CLAIM_FILE for e in out.iterdir()):
            raise InputError(str(out), "--out", "is not empty and holds no earlier demo output; choose another "
                             "folder")
        return
    other = _not_the_demos(out)
    if other is not None:
        raise InputError(str(out), "--out", f"holds an earlier demo and {other}; the demo replaces only its own "
                         "output: move that away or choose another folder")


@contextmanager
def _claimed(out: Path):
    """Hold ``out`` for this demo, emptied of an earlier demo's files and marked as the demo's.

    The folder's claim (:class:`runner.folder_claim.FolderClaim`) keeps a
    second demo out while this one writes; the claim's file and the mark
    stay while the rest is removed, so a demo killed at any instant leaves
    a folder the next demo may replace.  A linked ``--out`` is followed: the
    linked folder is the one replaced.
    """
    _refuse_foreign(out)            # before the claim leaves its file in somebody else's folder
    with FolderClaim(out):
        _refuse_foreign(out)        # again under the claim
        for entry in out.iterdir():
            if entry.name in (CLAIM_FILE, DEMO_MARK):
                continue
            if entry.is_dir() and not entry.is_symlink():
                shutil.rmtree(entry)
            else:
                entry.unlink()
        (out / DEMO_MARK).write_text(
            "This folder is the output of `aftershift demo`; running the demo again replaces it.\n", encoding="utf-8")
        yield


def run_demo(out_dir: str | Path = "results_demo", progress: bool | None = None) -> Path:
    """Simulate, fit and compare, as a user would; return the report's path.

    The steps are the commands' own functions (``simulate``, ``fit``,
    ``compare``), so the demo's report is the report ``compare`` writes:
    ``OUT/compare/report.html``.

    Parameters
    ----------
    out_dir : str or Path
        Output folder (default ``results_demo``).
    progress : bool or None
        Progress on stderr (None: only on a terminal).

    Raises
    ------
    InputError
        ``out_dir`` cannot be written, is in use by another demo, holds
        something other than an earlier demo, or the disk filled up (one
        line; the demo starts afresh when run again).
    """
    out = Path(out_dir)
    check_out_dir(out)
    try:
        with _claimed(out):
            return _run(out, progress)
    except StorageError as exc:     # its advice, --resume, is for `simulate`; the demo starts afresh
        raise InputError(str(out), "--out", f"{exc.message.split('; ')[0]} while writing {exc.source}; free "
                         "some space and run the demo again") from None
    except OSError as exc:
        raise InputError(str(exc.filename or out), "--out", f"cannot be written ({exc.strerror}); run the demo "
                         "again once it can be") from None


def _run(out: Path, progress: bool | None) -> Path:
    """The demo's steps into the claimed folder ``out``."""
    from runner.workpool import FIT_MODULES, open_pool, task_mapper

    # the workers' parent process starts importing what they need now, beside the imports and the
    # simulation below
    pool = open_pool(preload=FIT_MODULES)
    from fitting.compare import compare_results
    from fitting.population import ChannelModel, predict_table
    from fitting.progress import phase
    from fitting.report import fit_logs
    from fitting.tables import find_logs
    from runner.launch import simulate
    from runner.observers import load_model
    from runner.overview import plan_from_text
    from runner.protocol import load_protocol, read_protocol_text
    from runner.replay import track_factories
    from runner.safety import screen_protocol
    protocol = load_protocol(PROTOCOL)
    text = read_protocol_text(PROTOCOL)
    screening = screen_protocol(protocol)
    rel_protocol = str(PROTOCOL.relative_to(ROOT))
    simulate(
        protocol, rel_protocol, text, out / "logs", load_model(MODEL), N_OBSERVERS, SEED,
        screening=screening.to_dict(), progress=progress,
    )
    for lock in (out / "logs").glob("*.lock"):  # no session writes the demo's logs any more
        lock.unlink()
    fit_progress = True if progress is None else ("always" if progress else False)
    logs = [str(p) for p in find_logs([str(out / "logs")])]
    try:                        # the observers are fitted on every available core, as by `fit`
        fit_logs(logs, str(out / "fit"), n_boot=N_BOOT, seed=SEED, progress=fit_progress, plan=plan_from_text,
                 map_tasks=task_mapper(pool, "fitting"),
                 tracks=track_factories(logs, strict=False), track_use="pilot")
    finally:
        pool.close()
    predictions = predict_table(
        ChannelModel(tuning_kappa=4.0, adapt_strength=0.25, adapt_kappa=6.0, recovery_periods=2.0),
        protocol.design.adapter_offsets_deg, protocol.design.lags,
    )
    predictions.to_csv(out / "predictions_population_model.csv", index=False, float_format="%.6f")
    with phase("comparing with the population model", show=progress):
        comparison = compare_results(out / "fit", out / "predictions_population_model.csv", out / "compare")
    _write_file_list(out)
    return comparison.page
