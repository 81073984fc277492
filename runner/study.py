"""Simulation studies: many simulated sessions of several designs, each fitted, with known truth.

A *design* is the user's protocol and observer model with some settings
changed (``--vary FIELD=[v1, v2, ...]``, several options form a grid). A
*task* is one simulated session of one design: the real session loop runs
headless with a simulated observer whose parameters are known, its rows stay
in memory, and the real fitter (:func:`fitting.fit_trials`) gives estimates
and 95 % intervals of

* the DoG amplitude and the peak offset at each lag (``tuning``), whose true
  values are ``A·exp(−k/τ)`` and ``w`` (the README's simulated-observer model),
* the decay ``τ`` in periods (two or more lags),
* the baseline PSE ``μ₀``.

Tasks are independent and handed out by :mod:`runner.workpool` (local cores
or a Dask cluster). A task's seed comes from its identity only: the session
and bootstrap seeds of replicate ``r`` are ``derive_seed(seed, r)``, the same
for every design, so designs are compared on common random numbers and no
number depends on which worker ran what. Finished tasks are kept in the
study folder (``tasks/``, one file per task, named by a hash of everything the
task's result depends on), so a rerun continues an interrupted study and an
extended grid reuses the designs already done.

``aftershift plan`` (:mod:`runner.planner`) summarises a study as interval
half-widths and coverage per design; ``aftershift recover``
(:mod:`runner.recovery`) as bias, RMSE and coverage.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import math
import sys
from collections import Counter
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.special import ndtri

from fitting.errors import InputError
from fitting.outputs import output_set
from fitting.report import fit_trials
from fitting.tables import prepare_trials
from runner.launch import derive_seed, package_versions, simulate_rows
from runner.light import written_settings
from runner.observers import ObserverModel, load_model
from runner.overview import check_size
from runner.protocol import CHOOSE_THEIR_LEVELS, Protocol, parse_protocol, protocol_from_dict, read_protocol_text
from runner.replay import TrackFactory
from runner.toml_text import toml_tables
from runner.workpool import TaskStore, WorkerLost, check_count, interrupted_line, open_pool, run_tasks


QUANTITIES = ("amplitude", "peak_offset", "decay", "baseline_pse")
UNITS = {"amplitude": "deg", "peak_offset": "deg", "decay": "periods", "baseline_pse": "deg"}
TRIALS_FIELD = "design.trials_per_track"
RESULT_COLUMNS = ("quantity", "lag", "estimate", "ci_low", "ci_high")
MAX_DESIGNS = 1000
MAX_TASKS = 10**6
#: Largest magnitude of a number in a task's result. Estimates are degrees of direction or PSE shift
#: and decays in periods, bounded by the fit to 1000; intervals of ill-posed fits may reach far beyond,
#: so the limit is generous: a number past it in a task file is damage, and the task is redone.
MAX_RESULT = 1e6
#: Bumped when a task's result would change for the same inputs (old results are then not reused).
TASK_VERSION = 3
#: At most this many of a fit's notes, each at most :data:`MAX_NOTE` characters, are kept with a task's result.
MAX_NOTES, MAX_NOTE = 40, 1000


# ---------------------------------------------------------------- designs


@dataclass(frozen=True)
class Design:
    """One protocol and observer model of a study.

    Attributes
    ----------
    protocol : Protocol
    model : ObserverModel
        With ``spread_between_observers = 0``: every session is the same observer.
    settings : dict
        The varied fields (``"design.trials_per_track"``, ``"model.lapse"``, ...)
        and their values in this design.
    """

    protocol: Protocol
    model: ObserverModel
    settings: dict = field(default_factory=dict)

    @property
    def label(self) -> str:
        """Short text naming the design by its varied settings (``as written`` if none)."""
        if not self.settings:
            return "as written"
        return ", ".join(f"{k.rsplit('.', 1)[-1]}={_show(v)}" for k, v in self.settings.items())

    @property
    def trials_per_condition(self) -> int:
        return self.protocol.design.trials_per_track * self.protocol.design.tracks_per_condition


def _show(value) -> str:
    if isinstance(value, list):
        return "[" + ",".join(_show(v) for v in value) + "]"
    return f"{value:g}" if isinstance(value, float) else str(value)


def parse_vary(text: str) -> tuple[str, list]:
    """``"FIELD=[v1, v2]"`` -> (field, [v1, v2]); values are TOML values.

    Raises
    ------
    InputError
        No ``=``, values that are not a non-empty TOML array, or repeated values.
    """
    name, sep, values = text.partition("=")
    name = name.strip()
    if not sep or not name:
        raise InputError("argument", "--vary", f"{text!r}: expected FIELD=[value, value, ...], "
                         "e.g. design.trials_per_track=[20, 40, 80]")
    parsed = toml_tables(f"v = {values.strip()}", "argument", f"--vary {name}", "values are not a TOML array")["v"]
    if not isinstance(parsed, list) or not parsed:
        raise InputError("argument", f"--vary {name}", "expected a non-empty array of values in [ ]")
    if len({json.dumps(v, sort_keys=True) for v in parsed}) != len(parsed):
        raise InputError("argument", f"--vary {name}", "a value is repeated")
    return name, parsed


def _with_setting(raw: dict, model: dict, name: str, value) -> None:
    section, _, key = name.partition(".")
    if section == "model":
        if key == "spread_between_observers":   # a study simulates one observer, the model's own, each run
            raise InputError("argument", f"--vary {name}", "a study simulates the model's observer itself in "
                             "every run, with no spread between observers, so varying it changes nothing")
        if key not in model:
            raise InputError("argument", f"--vary {name}", f"unknown observer model key; expected one of "
                             f"{', '.join('model.' + k for k in model if k != 'spread_between_observers')}")
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise InputError("argument", f"--vary {name}", f"{value!r} is not a number")
        model[key] = float(value)
        return
    if not key:
        raise InputError("argument", f"--vary {name}", "expected SECTION.FIELD of the protocol (e.g. "
                         "procedure.method) or model.KEY of the observer model")
    optional = section in Protocol.model_fields and Protocol.model_fields[section].default is None
    if optional and section not in raw:
        raise InputError("argument", f"--vary {name}", f"the protocol has no [{section}] section; varying it would "
                         "make another kind of protocol (write the section in the protocol to study it)")
    raw.setdefault(section, {})
    if not isinstance(raw[section], dict):
        raise InputError("argument", f"--vary {name}", f"{section} is not a section of the protocol")
    raw[section][key] = value


def expand_designs(protocol: Protocol, model: ObserverModel, vary: list[str] | None = None) -> list[Design]:
    """Every combination of the ``--vary`` values, validated like a protocol file.

    Parameters
    ----------
    protocol, model
        The protocol as written and the observer model.
    vary : list of str
        ``FIELD=[values]`` texts; the grid is their product, in the order given.

    Raises
    ------
    InputError
        A bad ``--vary`` text, a field varied twice, a design the protocol
        schema refuses (naming the design and the field), or more than
        :data:`MAX_DESIGNS` designs.
    """
    axes = [parse_vary(v) for v in (vary or [])]
    names = [n for n, _ in axes]
    if len(set(names)) != len(names):
        raise InputError("argument", "--vary", f"{sorted(n for n in names if names.count(n) > 1)[0]} is varied twice")
    count = math.prod(len(values) for _, values in axes)
    if count > MAX_DESIGNS:
        raise InputError("argument", "--vary", f"{count} designs; at most {MAX_DESIGNS} in one study")
    base_model = replace(model, spread_between_observers=0.0)
    if not axes:
        return [Design(protocol, base_model, {})]
    designs = []
    for combo in itertools.product(*(values for _, values in axes)):
        raw = written_settings(protocol)
        model_raw = asdict(base_model)
        settings = dict(zip(names, combo))
        for name, value in settings.items():
            _with_setting(raw, model_raw, name, value)
        if settings.get("procedure.method") in CHOOSE_THEIR_LEVELS and "procedure.start_offset_deg" not in settings:
            # they refuse a start: the protocol's stays with the up-down and weighted designs
            raw["procedure"].pop("start_offset_deg", None)
        where = "--vary " + ", ".join(f"{k}={_show(v)}" for k, v in settings.items())
        try:
            observer = ObserverModel(**model_raw)
        except ValueError as exc:
            raise InputError("argument", where, str(exc)) from None
        varied = protocol_from_dict(raw, where)
        check_size(varied, where)    # one session of each design must be one `check` would accept
        designs.append(Design(varied, observer, settings))
    return designs


def check_designs(designs: list[Design]) -> list[str]:
    """Notes about designs a study can only partly plan."""
    notes = []
    if any(d.protocol.stream is None and len(d.protocol.design.adapter_offsets_deg) < 3 for d in designs):
        notes.append("a design with fewer than 3 adapter offsets has no DoG tuning curve (amplitude, peak "
                     "offset, decay); only its baseline PSE is studied")
    if any(d.protocol.procedure.max_reversals for d in designs):
        notes.append("procedure.max_reversals may stop tracks before trials_per_track; trial counts are "
                     "the designed ones")
    return notes


def truth(model: ObserverModel, quantity: str, lag) -> float:
    """The simulated observer's true value of a quantity (the README's simulated-observer model)."""
    if quantity == "amplitude":
        return model.amplitude_deg * math.exp(-float(lag) / model.decay_periods)
    if quantity == "peak_offset":
        return model.peak_offset_deg
    if quantity == "decay":
        return model.decay_periods
    if quantity == "baseline_pse":
        return model.pse_deg
    raise ValueError(quantity)


# ---------------------------------------------------------------- one task


def session_seed(seed: int, replicate: int) -> int:
    """Seed of replicate ``replicate`` (sessions and bootstrap), the same in every design."""
    return derive_seed(seed, replicate)


def _finite(v) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None


def run_session_task(task: dict) -> dict:
    """Simulate one session in memory, fit it, and return estimate and interval per quantity.

    ``task`` holds ``protocol`` (a JSON dump), ``model`` (a dict), ``seed``
    (this replicate's seed), ``n_boot`` and ``lapse``. Adapt-test blocks are
    fitted as by ``fit``; continuous streams by the n-back regression
    (:mod:`fitting.nback`, lag = n − 1). Depends only on ``task``.

    Returns
    -------
    dict
        ``usable_trials``: the session's trials left once practice,
        bad-timing and missed trials are excluded; ``rows``: JSON-ready rows
        ``quantity, lag, estimate, ci_low, ci_high`` (None where the fit gave
        no value, and everywhere in a session without usable trials, which
        is not fitted: a failed replicate of its design); ``notes``: what the
        fit said about the session (why a value or interval is missing).
    """
    # the task holds the grey levels its design's light profile gave (see make_task): no profile to read again
    protocol = protocol_from_dict(task["protocol"], "study task", resolve_light=False)
    rows = simulate_rows(protocol, ObserverModel(**task["model"]), task["seed"])
    lags = studied_lags(protocol)
    usable = sum(1 for r in rows if not r["practice"] and r["timing_ok"] and r["response_cw"] is not None)
    nothing = (np.nan,) * 3
    notes: list[str] = []
    if not usable:
        tuning, decay, baseline = pd.DataFrame({"lag": []}), pd.DataFrame(), nothing
    elif protocol.stream is not None:
        tuning, decay, baseline = _fit_stream(rows, task)
    else:
        tuning, decay, baseline, notes = _fit_block(rows, task, protocol)
    out = []
    tuning = tuning.set_index("lag")
    for lag in lags:
        row = tuning.loc[lag] if lag in tuning.index else None
        for quantity, est, lo, hi in (("amplitude", "amplitude_deg", "amplitude_ci_low", "amplitude_ci_high"),
                                      ("peak_offset", "peak_offset_deg", "peak_offset_ci_low",
                                       "peak_offset_ci_high")):
            values = (row[est], row[lo], row[hi]) if row is not None else nothing
            out.append({"quantity": quantity, "lag": int(lag), **_triple(values)})
    if len(lags) > 1:
        values = (decay["decay_periods"].iloc[0], decay["ci_low"].iloc[0], decay["ci_high"].iloc[0]) if len(decay) \
            else nothing
        out.append({"quantity": "decay", "lag": None, **_triple(values)})
    out.append({"quantity": "baseline_pse", "lag": None, **_triple(baseline)})
    return {"usable_trials": usable, "rows": out, "notes": [str(n)[:MAX_NOTE] for n in notes[:MAX_NOTES]]}


def studied_lags(protocol: Protocol) -> list[int]:
    """The lags whose amplitude and peak offset a task reports (none with fewer than 3 adapter offsets)."""
    if protocol.stream is not None:
        return list(range(protocol.stream.nback_periods))
    return sorted(protocol.design.lags) if len(protocol.design.adapter_offsets_deg) >= 3 else []


def result_layout(protocol: Protocol) -> list[tuple[str, int | None]]:
    """``(quantity, lag)`` of each row of a task's result, in order (see :func:`run_session_task`)."""
    lags = studied_lags(protocol)
    layout = [(quantity, lag) for lag in lags for quantity in ("amplitude", "peak_offset")]
    return layout + ([("decay", None)] if len(lags) > 1 else []) + [("baseline_pse", None)]


def valid_result(result, layout: list[tuple[str, int | None]]) -> bool:
    """Whether a result read back from a task file is one :func:`run_session_task` could have returned.

    Its rows must follow ``layout`` (:func:`result_layout` of the task's
    protocol), every number be None or finite and within :data:`MAX_RESULT`,
    each interval ordered, and a session without usable trials hold no numbers.
    """
    if not isinstance(result, dict) or set(result) != {"usable_trials", "rows", "notes"}:
        return False
    usable, rows, notes = result["usable_trials"], result["rows"], result["notes"]
    if not (isinstance(notes, list) and len(notes) <= MAX_NOTES
            and all(isinstance(n, str) and len(n) <= MAX_NOTE for n in notes)):
        return False
    if isinstance(usable, bool) or not isinstance(usable, int) or usable < 0:
        return False
    if not isinstance(rows, list) or len(rows) != len(layout):
        return False
    for row, (quantity, lag) in zip(rows, layout):
        if not isinstance(row, dict) or set(row) != set(RESULT_COLUMNS):
            return False
        if row["quantity"] != quantity or row["lag"] != lag or type(row["lag"]) is bool:
            return False
        numbers = [row[c] for c in ("estimate", "ci_low", "ci_high")]
        for v in numbers:
            if v is not None and (isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v)
                                  or abs(v) > MAX_RESULT):
                return False
        if usable == 0 and any(v is not None for v in numbers):
            return False
        if numbers[1] is not None and numbers[2] is not None and numbers[1] > numbers[2]:
            return False
    return True


def _fit_block(rows: list[dict], task: dict, protocol: Protocol):
    """``tuning``, ``decay``, the baseline PSE (estimate, low, high) and the fit's notes of an adapt-test session."""
    frame = pd.DataFrame(rows)
    # track numbers as a log holds them ("1", not the "1.0" of a column that practice rows' None made float)
    frame["track"] = pd.Series([r["track"] for r in rows], index=frame.index, dtype=object)
    trials = prepare_trials(frame, source="simulated session")
    # the pilot re-runs the session's tracks, as `fit` does when the sidecars give the protocol
    factory = TrackFactory(protocol)
    report = fit_trials(trials, n_boot=task["n_boot"], seed=task["seed"], lapse=task["lapse"], progress=False,
                        tracks={str(obs): factory for obs in trials["observer"].unique()}, track_use="pilot")
    base = report.pse[report.pse["condition"] == "baseline"]
    baseline = (base["pse_deg"].iloc[0], base["pse_ci_low"].iloc[0], base["pse_ci_high"].iloc[0]) if len(base) \
        else (np.nan,) * 3
    notes = [n for obs in trials["observer"].unique() for n in report.notes.get(obs, [])]
    return report.tuning, report.decay, baseline, notes


def _fit_stream(rows: list[dict], task: dict):
    """``tuning``, ``decay`` and the PSE μ₀ (estimate, low, high) of a stream session with usable trials."""
    from fitting.nback import StreamTrials, bootstrap_nback, fit_nback, result_tables

    used = [r for r in rows if not r["practice"] and r["response_cw"] is not None and r["timing_ok"]]
    trials = StreamTrials("sim01", np.array([r["test_offset_deg"] for r in used], dtype=float),
                          np.array([r["response_cw"] for r in used], dtype=float),
                          np.array([r["preceding_offsets_deg"] for r in used], dtype=float),
                          float(used[0]["period_s"]))
    boot = bootstrap_nback(fit_nback(trials, task["lapse"]), task["n_boot"], np.random.default_rng(task["seed"]))
    tables = result_tables(boot)
    low, high = boot.interval(boot.fit.pse_deg, boot.per_n[:, 0])
    return tables["tuning"], tables["decay"], (boot.fit.pse_deg, low[0], high[0])


def _triple(values) -> dict:
    return dict(zip(("estimate", "ci_low", "ci_high"), (_finite(v) for v in values)))


# ---------------------------------------------------------------- a study


@dataclass(frozen=True)
class StudySettings:
    """How many sessions, how they are fitted, and where the work runs.

    Attributes
    ----------
    runs : int
        Simulated sessions per design.
    seed : int
    n_boot : int
        Bootstrap replicates per fit.
    lapse : "free" or float
        Lapse option of the fits.
    jobs : int or None
        Local worker processes (None: every available core).
    scheduler : str or None
        Dask scheduler address; the study runs on that cluster.
    progress : bool or None
        Progress bar (None: only when stderr is a terminal).
    """

    runs: int
    seed: int = 0
    n_boot: int = 200
    lapse: object = "free"
    jobs: int | None = None
    scheduler: str | None = None
    progress: bool | None = None

    def check(self) -> None:
        """Raise :class:`InputError` naming the option of a bad value."""
        check_count(self.runs, "--runs", 1, 100000)
        check_count(self.seed, "--seed", 0, 2**32 - 1)  # as every command's seed
        check_count(self.n_boot, "--bootstrap", 20, 100000)
        if self.jobs is not None:
            check_count(self.jobs, "--jobs", 1, 4096)
        if self.lapse != "free":
            try:
                ok = 0 <= float(self.lapse) < 0.5
            except (TypeError, ValueError):
                ok = False
            if not ok:
                raise InputError("argument", "--lapse", f"expected 'free' or a number in [0, 0.5), got {self.lapse!r}")


def make_task(design: Design, replicate: int, s: StudySettings) -> dict:
    """The argument of :func:`run_session_task` for replicate ``replicate`` of ``design``.

    The protocol is the design's as loaded: with a ``[light]`` section, its
    grey levels are those of the light profile, so the task's key changes
    with the profile and workers need no copy of it.
    """
    return {"protocol": design.protocol.model_dump(mode="json", exclude_none=True, exclude_unset=True), "model": asdict(design.model),
            "seed": session_seed(s.seed, replicate), "n_boot": s.n_boot,
            "lapse": s.lapse if s.lapse == "free" else float(s.lapse)}


def task_key(task: dict, version: str | None) -> str:
    """A task's name: a hash of everything its result depends on (``version``: aftershift's)."""
    identity = {"task": task, "version": TASK_VERSION, "aftershift": version}
    return hashlib.sha256(json.dumps(identity, sort_keys=True).encode("utf-8")).hexdigest()[:24]


class StudyInterrupted(Exception):
    """Ctrl-C during a study; ``line`` says what is kept."""

    def __init__(self, line: str):
        super().__init__(line)
        self.line = line


def run_study(designs: list[Design], settings: StudySettings, folder: str | Path, label: str) -> pd.DataFrame:
    """Run ``settings.runs`` sessions of every design, keeping finished ones in ``folder/tasks``.

    Returns
    -------
    pandas.DataFrame
        One row per design, replicate, quantity and lag: ``design`` (index
        into ``designs``), ``replicate``, ``quantity``, ``lag``, ``estimate``,
        ``ci_low``, ``ci_high``, ``usable_trials``, ``truth``, ``half_width``,
        ``covered``. ``attrs["notes"]`` says how many task files were redone
        because they could not be used (:func:`valid_result`);
        ``attrs["session_notes"]`` maps ``(design, replicate)`` to what the
        fit of that session said.

    Raises
    ------
    InputError
        Bad settings, a folder in use by another process or not writable, a
        cluster that cannot be used, or a worker lost for good.
    StudyInterrupted
        Ctrl-C: every finished task is kept, and rerunning continues.
    """
    settings.check()
    if len(designs) * settings.runs > MAX_TASKS:
        raise InputError("argument", "--runs", f"{len(designs)} designs x {settings.runs} runs is more than "
                         f"{MAX_TASKS} tasks")
    version = package_versions().get("aftershift")
    tasks, index = {}, {}
    for d, design in enumerate(designs):
        for r in range(settings.runs):
            task = make_task(design, r, settings)
            key = task_key(task, version)
            tasks[key] = task
            index.setdefault(key, []).append((d, r))
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise InputError(str(folder), "--out", "exists and is not a folder")
    layouts = {key: result_layout(designs[where[0][0]].protocol) for key, where in index.items()}
    store = TaskStore(folder / "tasks", accept=lambda key, result: valid_result(result, layouts[key]))
    pool = None
    results: dict = {}
    try:
        pool = open_pool(settings.scheduler, settings.jobs)
        about = {key: {"designs": [designs[d].label for d, _ in where], "replicate": where[0][1]}
                 for key, where in index.items()}
        results = run_tasks(run_session_task, tasks, pool, store, f"{label} ({pool.where})", about.get,
                            settings.progress)
    except KeyboardInterrupt:
        done = sum(1 for key in tasks if store.load(key) is not None)
        raise StudyInterrupted(interrupted_line(done, len(tasks), store.folder)) from None
    except WorkerLost as exc:
        raise InputError(str(store.folder), "worker", f"{exc}; finished tasks are kept, run the same command "
                         "again to continue") from None
    finally:
        if pool is not None:
            pool.close()
        store.close()
    redone = len(store.rejected)
    rows, said = [], {}
    for key, where in index.items():
        for d, r in where:
            said[d, r] = results[key]["notes"]
            usable = results[key]["usable_trials"]
            for row in results[key]["rows"]:  # fixed column order, whether fresh or read back from disk
                rows.append({"design": d, "replicate": r, **{c: row[c] for c in RESULT_COLUMNS},
                             "usable_trials": usable})
    per_run = _with_truth(pd.DataFrame(rows), designs)
    per_run.attrs["notes"] = [f"{redone} task file{'s' if redone > 1 else ''} in {store.folder} could not be used "
                              "(unreadable, damaged, or not the task named) and "
                              f"{'were' if redone > 1 else 'was'} redone"] if redone else []
    per_run.attrs["session_notes"] = said
    return per_run


def _with_truth(per_run: pd.DataFrame, designs: list[Design]) -> pd.DataFrame:
    per_run = per_run.astype({"estimate": float, "ci_low": float, "ci_high": float, "lag": float})
    per_run["truth"] = [truth(designs[d].model, q, lag) for d, q, lag in
                        zip(per_run["design"], per_run["quantity"], per_run["lag"].fillna(0))]
    per_run["half_width"] = (per_run["ci_high"] - per_run["ci_low"]) / 2
    has = per_run["half_width"].notna()
    per_run["covered"] = np.where(has, (per_run["ci_low"] <= per_run["truth"]) & (per_run["truth"] <= per_run["ci_high"]),
                                  np.nan)
    order = pd.Categorical(per_run["quantity"], QUANTITIES, ordered=True)
    per_run = per_run.assign(_q=order).sort_values(["design", "replicate", "_q", "lag"], kind="stable")
    return per_run.drop(columns="_q").reset_index(drop=True)


def design_columns(designs: list[Design]) -> pd.DataFrame:
    """One row per design: ``design`` (index), ``label``, each varied field, trials per track and condition."""
    rows = []
    for i, d in enumerate(designs):
        rows.append({"design": i, "label": d.label, **{k: _show(v) for k, v in d.settings.items()},
                     "trials_per_track": d.protocol.design.trials_per_track,
                     "trials_per_condition": d.trials_per_condition})
    return pd.DataFrame(rows)


def failed_run_notes(per_run: pd.DataFrame, designs: pd.DataFrame) -> list[str]:
    """One note per design with simulated sessions that had no usable trial (every test missed or mistimed).

    ``designs`` is :func:`design_columns`; such sessions are not fitted and count as runs without estimate.
    """
    notes = []
    sessions = per_run.drop_duplicates(["design", "replicate"])
    for d, part in sessions.groupby("design", sort=True):
        failed, total = int((part["usable_trials"] == 0).sum()), len(part)
        label = designs.loc[designs["design"] == d, "label"].iloc[0]
        if failed == total:
            notes.append(f"design {label}: none of its {total} simulated sessions had a usable trial (all missed, "
                         "practice or mistimed); it has no estimates")
        elif failed:
            notes.append(f"design {label}: {failed} of {total} simulated sessions had no usable trial; they count "
                         "as failed runs, without estimate or interval")
    return notes


def missing_interval_notes(per_run: pd.DataFrame, designs: pd.DataFrame) -> list[str]:
    """One note per design whose fitted sessions gave some quantity no interval at all, with what the fits said.

    ``designs`` is :func:`design_columns`; the fits' notes are
    ``per_run.attrs["session_notes"]`` (:func:`run_study`), and the two
    said of most of those sessions are quoted.
    """
    notes = []
    said = per_run.attrs.get("session_notes", {})
    fitted = per_run[per_run["usable_trials"] > 0]
    for d, part in fitted.groupby("design", sort=True):
        empty = [(q, lag) for (q, lag), rows in part.groupby(["quantity", "lag"], dropna=False, sort=False)
                 if rows["half_width"].isna().all()]
        if not empty:
            continue
        sessions = part["replicate"].unique()
        counts = Counter(n for r in sessions for n in dict.fromkeys(said.get((d, r), [])))
        what = ", ".join(q.replace("_", " ") + ("" if pd.isna(lag) else f" (lag {int(lag)})") for q, lag in empty)
        label = designs.loc[designs["design"] == d, "label"].iloc[0]
        line = f"design {label}: no interval for {what} in any of its {len(sessions)} fitted sessions"
        if counts:
            line += "; the fits said: " + "; ".join(f'"{text}" ({k} of {len(sessions)})'
                                                    for text, k in counts.most_common(2))
        notes.append(line)
    return notes


def console_table(table: pd.DataFrame, numbers: tuple[str, ...], coverage_digits: int) -> pd.DataFrame:
    """A summary table as text for the console: lag ('' for none), unit, ``numbers`` to 3 digits,
    coverage as "p % [low, high]" (its 95 % Wilson interval, :func:`coverage_limits`), and
    ``intervals`` = runs with an interval / runs."""
    shown = table.copy()
    shown["lag"] = shown["lag"].map(lambda v: "" if pd.isna(v) else str(int(v)))
    shown["unit"] = shown["quantity"].map(UNITS)
    for c in numbers:
        shown[c] = shown[c].map(lambda v: f"{v:.3g}")
    d = coverage_digits
    shown["coverage"] = [f"{100 * c:.{d}f} % [{100 * lo:.{d}f}, {100 * hi:.{d}f}]" if math.isfinite(c) else "–"
                         for c, lo, hi in zip(shown["coverage"], shown["coverage_low"], shown["coverage_high"])]
    shown["intervals"] = shown["runs_with_interval"].astype(str) + "/" + shown["runs"].astype(str)
    return shown


def coverage_se(coverage: float, n: int) -> float:
    """Monte Carlo standard error of a coverage share, √(p(1 − p)/n) (binomial; common practice, no source).

    NaN at a share of 0 or 1, where the formula gives 0 whatever the number
    of runs (8 of 8 read as "100 ± 0 %"): :func:`coverage_limits` says how
    sure such a share is.
    """
    if n <= 0 or not math.isfinite(coverage) or coverage in (0.0, 1.0):
        return float("nan")
    return math.sqrt(coverage * (1 - coverage) / n)


def coverage_limits(coverage: float, n: int, level: float = 0.95) -> tuple[float, float]:
    """Wilson score interval of a coverage share over ``n`` runs (Wilson 1927, JASA 22, 209–212).

    Unlike ± its standard error it is not of zero width at a share of 0 or
    1: 8 intervals out of 8 holding the truth give 68–100 %, not 100 ± 0 %.

    Returns
    -------
    (float, float)
        The limits; nan without runs.
    """
    if not (n > 0 and math.isfinite(coverage)):
        return float("nan"), float("nan")
    z = float(ndtri(0.5 + level / 2))   # the normal quantile (as scipy.stats.norm.ppf)
    scale = 1 + z * z / n
    centre = (coverage + z * z / (2 * n)) / scale
    half = z / scale * math.sqrt(coverage * (1 - coverage) / n + z * z / (4 * n * n))
    return max(0.0, centre - half), min(1.0, centre + half)


def study_command(protocol_path: str, model_path: str | None, out_dir: str,
                  study: Callable[[Protocol, ObserverModel], object], command: str) -> int:
    """Load the protocol and observer model, run ``study(protocol, model)``, print and write its result.

    The result has ``summary_lines()`` and ``write(out_dir)`` (``PlanResult``, ``RecoveryResult``);
    ``command`` names the command in the line printed after Ctrl-C.

    Returns
    -------
    int
        0, or 130 after Ctrl-C (finished tasks kept; rerunning continues).

    Raises
    ------
    InputError
        Bad protocol, model file, option or folder (the command line exits with 2).
    """
    protocol = parse_protocol(read_protocol_text(protocol_path), source=str(protocol_path))
    model = load_model(model_path)
    try:
        result = study(protocol, model)
    except StudyInterrupted as stop:
        print(f"aftershift {command}: {stop.line}", file=sys.stderr)
        return 130
    with output_set(out_dir, command) as staged:  # tables and figures land whole, as one set
        files = staged.final_paths(result.write(staged.folder))
    print("\n".join(result.summary_lines()))
    print(f"wrote {', '.join(str(f) for f in files)}")
    return 0

