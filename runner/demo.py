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

import json
import re
import shutil
from contextlib import contextmanager
from pathlib import Path

from fitting.errors import InputError
from fitting.outputs import MANIFEST, PENDING, STAGING_PREFIX, check_out_dir, read_manifest
from fitting.provenance import REPORT_DATA
from runner.folder_claim import CLAIM_FILE, FolderClaim
from runner.trial_log import StorageError

ROOT = Path(__file__).resolve().parent.parent
PROTOCOL = ROOT / "protocols" / "offset_by_lag.toml"
MODEL = ROOT / "protocols" / "observers" / "typical.toml"
DEMO_MARK = "DEMO_OUTPUT"
SEED = 2026
N_OBSERVERS = 3
N_BOOT = 1000


#: What a demo writes at the top of its folder; the tables of ``fit`` and ``compare`` are listed in their manifests.
_TOP_FOLDERS, _TOP_FILES = ("logs", "fit", "compare"), (DEMO_MARK, CLAIM_FILE, "predictions_population_model.csv")
#: The simulated observers' files in ``logs/``: log, sidecar, lock, and the ``.tmp`` each is written through.
_LOG_FILES = frozenset(f"sim{i:02d}-s1.{kind}{tmp}" for i in range(1, N_OBSERVERS + 1)
                       for kind in ("trials.csv", "session.json", "lock") for tmp in ("", ".tmp"))
#: A set being staged by ``fit`` or ``compare`` (``fitting.outputs``: ``.staging-PID-RANDOM``, mkdtemp's 8 characters),
#: and the temporary file of a manifest or journal being written (``fitting.outputs.write_atomic``: ``.NAME.RANDOM``).
_STAGING = re.compile(re.escape(STAGING_PREFIX) + r"\d+-[a-z0-9_]{8}")
_TEMPORARY = re.compile(r"\.(" + re.escape(MANIFEST) + "|" + re.escape(PENDING) + r")\.[a-z0-9_]{8}")
#: Where the demo's ``compare`` read its predictions from, as ``predictions_source.txt`` says it.
_PREDICTIONS_SOURCE = "../predictions_population_model.csv\n"


def _command_files(folder: Path) -> list[Path]:
    """Files and links in ``folder`` that its command (fit, compare) neither listed nor keeps for a move in."""
    own = set(read_manifest(folder)) | {MANIFEST, PENDING}
    try:
        own |= set(json.loads((folder / PENDING).read_text(encoding="utf-8")).get("files", []))
    except (OSError, ValueError, AttributeError, TypeError):
        pass
    found = []
    for path in sorted(folder.rglob("*")):
        rel = path.relative_to(folder)
        staged = len(rel.parts) > 1 and _STAGING.fullmatch(rel.parts[0]) and folder.joinpath(rel.parts[0]).is_dir()
        if staged or (len(rel.parts) == 1 and _TEMPORARY.fullmatch(rel.name) and path.is_file()) \
                or (path.is_dir() and not path.is_symlink()):
            continue
        if path.is_symlink() or rel.as_posix() not in own:
            found.append(path)
    return found


def _fitted_elsewhere(fit: Path, logs: Path) -> bool:
    """True when ``fit``'s record names a session that is not one of the demo's in ``logs`` (a fit of one's own).

    A session is the demo's when its log has a demo observer's name and, where
    the demo's sidecars are there to say so, the same observer, session and
    seed as one of them (a fit of other simulated logs of the same names
    differs in its seeds).
    """
    try:
        sessions = json.loads((fit / REPORT_DATA).read_text(encoding="utf-8"))["sessions"]
        named = [(Path(str(s["log"])).name, s.get("observer"), s.get("session"), s.get("seed")) for s in sessions]
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        return False            # no record (git leaves it out of a clone's results_demo): the names decide
    seeds = {}
    for side in logs.glob("sim*-s1.session.json"):
        try:
            data = json.loads(side.read_text(encoding="utf-8"))
            seeds[(data["observer"], data["session"])] = data.get("session_seed", data.get("seed"))
        except (OSError, ValueError, KeyError, TypeError):
            continue
    return any(name not in _LOG_FILES or (seeds and seeds.get((observer, session)) != seed)
               for name, observer, session, seed in named)


def _not_the_demos(out: Path) -> Path | None:
    """The first file or folder in the earlier demo's ``out`` that a demo does not write; None if none.

    The names it writes: the top-level ones, the simulated observers' files
    in ``logs/``, in ``fit/`` and ``compare/`` what their manifests and
    move journals list, staging folders and temporary files; and a fit and
    a comparison of its own (a fit of one's own written into ``fit/`` has a
    manifest as the demo's has, but its record names other logs).
    """
    for entry in sorted(out.iterdir()):
        folder = entry.name in _TOP_FOLDERS and entry.is_dir()
        if entry.is_symlink() or not (folder or entry.name in _TOP_FILES and entry.is_file()):
            return entry
    logs = out / "logs"
    if logs.is_dir():
        for entry in sorted(logs.iterdir()):
            if entry.name not in _LOG_FILES or entry.is_symlink() or not entry.is_file():
                return entry
    for name in ("fit", "compare"):
        if (out / name).is_dir():
            found = _command_files(out / name)
            if found:
                return found[0]
    for fit in (out / "fit", out / "compare" / "fit"):        # compare's copy of the fit it compared
        if fit.is_dir() and _fitted_elsewhere(fit, out / "logs"):
            return fit / REPORT_DATA
    source = out / "compare" / "predictions_source.txt"
    if source.is_file() and source.read_text(encoding="utf-8", errors="replace") != _PREDICTIONS_SOURCE:
        return source
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
        raise InputError(str(out), "--out", f"holds an earlier demo and {other.relative_to(out)}, which is not the "
                         "demo's (a file of yours, or an older demo's: then remove the folder yourself); the demo "
                         "replaces only its own output: move that away or choose another folder")


def _remove_manifest_last(folder: Path) -> None:
    """Remove ``folder``, its manifests and journals after everything they list: a kill at any instant leaves
    only files a manifest still lists, which the next demo may replace."""
    last = {MANIFEST, PENDING}
    paths = sorted(folder.rglob("*"), key=lambda p: (p.name in last, -len(p.parts)))
    for path in paths:
        if path.is_symlink() or not path.is_dir():
            path.unlink()
    shutil.rmtree(folder)


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
                _remove_manifest_last(entry)
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
    from runner.overview import plan_from_text, settings_from_text
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
                 settings=settings_from_text,
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
    return comparison.page
