"""Public entry points: :func:`fit_logs` (the ``fit`` command) and :func:`quick_shifts`.

Files written by :func:`fit_logs` into ``out_dir``
--------------------------------------------------
Tables with exactly the README's required columns, in that order, then ``flags``
(:mod:`fitting.flags`):

``pse.csv``, ``aftereffect.csv``, ``tuning.csv``, ``decay.csv``

More tables:

``fit_details.csv``   per observer and condition: SEs (observed information),
                      JND, spread interval, deviance, goodness-of-fit p, flags
``model_tests.csv``   per observer: log-likelihood, deviance, bootstrap
                      goodness-of-fit p, likelihood-ratio test of a spread per
                      condition against a shared spread, convergence
``decay_detail.csv``  the joint decay fit: amplitude at lag 0, shared peak
                      offset, tau in periods and in seconds, with intervals
``exclusions.csv``    per observer: trials read and excluded (practice, bad
                      timing, missed answers), trials used
``mixed_model.csv``   with several observers: the statsmodels mixed model, with
                      its convergence
``aftereffect_covariance.csv``  covariance of every pair of shifts, per observer
                      and for the group (:mod:`fitting.covariance`), for ``compare``
``summary.txt``       the text of :meth:`FitReport.summary`, flagged rows first
``figures/``          PNG and PDF figures (see :mod:`fitting.figures`)
``report_data.json``  sessions, protocols and software behind the fit
                      (:mod:`fitting.provenance`)
``report.html``       the report page (:mod:`fitting.page`)

Everything is computed first and written afterwards (each file atomically);
nothing else in ``out_dir`` is touched.  Results depend only on the data,
the options and the seed: each observer draws its replicates from
``SeedSequence([seed, crc32(observer id)])``, so adding an observer does not
change the others' intervals, and the tables are byte-for-byte reproducible.
"""

from __future__ import annotations

import math
import numbers
import threading
import zlib
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from .bootstrap import check_replicate_memory, parametric_bootstrap
from .errors import InputError
from .covariance import COVARIANCE_COLUMNS, group_covariance, observer_covariance
from .flags import NOT_USABLE, flagged_first, join, psychometric_flags, shared_notes, usable
from .group import (GROUP, flag_protocols_differ, group_aftereffect, group_curves, group_pse, group_weights,
                    logged_settings_note, mixed_model, protocol_identity)
from .observer import (BY_STATISTIC, INTERVAL_METHODS, AFTEREFFECT_COLUMNS, DECAY_COLUMNS, PSE_COLUMNS, TUNING_COLUMNS,
                       ObserverAnalysis, Options, analyse_observer, condition_table)
from .page import PAGE, write_page
from .progress import phase
from .provenance import REPORT_DATA, collect, protocol_by_observer, protocol_settings, write_report_data
from .psychometric import DEFAULT_LAPSE_MAX, SIGMOIDS, Cells, fit_cells
from .outputs import output_set
from .same_person import same_person_notes
from .tables import prepare_trials, read_logs, stack, write_csv, write_text

MAIN_TABLES = {"pse": PSE_COLUMNS, "aftereffect": AFTEREFFECT_COLUMNS,
               "tuning": TUNING_COLUMNS, "decay": DECAY_COLUMNS}

#: Observers whose figures a fit draws beside the other fits; they wait in memory (about 1 MB per observer
#: of the bundled protocol) until everything is written, so a study of thousands does not hold gigabytes.
EARLY_FIGURE_OBSERVERS = 200


@dataclass
class FitReport:
    """What :func:`fit_logs` produced.

    Attributes
    ----------
    pse, aftereffect, tuning, decay : pandas.DataFrame
        The four main tables (group rows last, observer ``group``).
    extras : dict of str -> pandas.DataFrame
        ``fit_details``, ``model_tests``, ``decay_detail``, ``exclusions`` and,
        with several observers, ``mixed_model``.
    analyses : list of ObserverAnalysis
        Per-observer fits, bootstrap replicates and curve data.
    notes : dict of str -> list of str
        Warnings and caveats per observer (and ``group``).
    options : Options
    seed : int
    files : list of str
        Every file written.
    group : dict or None
        Group tables and curves (several observers).
    side_results : dict
        Results of the tasks that ``after_observer`` added (see
        :func:`fit_trials`), by key.
    """

    pse: pd.DataFrame
    aftereffect: pd.DataFrame
    tuning: pd.DataFrame
    decay: pd.DataFrame
    extras: dict
    analyses: list
    notes: dict
    options: Options
    seed: int
    out_dir: str = ""
    files: list = field(default_factory=list)
    group: dict | None = None
    side_results: dict = field(default_factory=dict)

    def summary(self) -> str:
        """Plain-text report for the terminal."""
        o = self.options
        ex = self.extras["exclusions"]
        lines = []
        n_obs = len(self.analyses)
        lines.append(f"aftershift fit: {n_obs} observer{'s' if n_obs != 1 else ''}, "
                     f"{int(ex['trials_used'].sum())} trials used of {int(ex['trials_read'].sum())} read "
                     f"(excluded: {int(ex['practice_excluded'].sum())} practice, "
                     f"{int(ex['bad_timing_excluded'].sum())} bad timing, "
                     f"{int(ex['missed_excluded'].sum())} missed answers)")
        lapse = (f"lapse free in [0, {o.lapse_max:g}]" if o.lapse == "free"
                 else f"lapse fixed at {float(o.lapse):g}")
        ci = _interval_words(o, self.seed)
        lines.append(f"{o.sigmoid} psychometric function, {lapse}, "
                     f"{'shared' if o.spread == 'shared' else 'per-condition'} spread; {ci}")
        lines += self._flagged()
        shared = shared_notes(self.notes, [a.observer for a in self.analyses])
        if shared:
            lines += ["", "Notes for every observer:"] + [f"  note: {n}" for n in shared]
        tests = self.extras["model_tests"].set_index("observer")
        for a in self.analyses:
            t = tests.loc[a.observer]
            lines.append("")
            lines.append(f"Observer {a.observer}: {int(t['n_trials'])} trials in "
                         f"{int(t['n_conditions'])} conditions")
            jnd = float(np.median(a.fit.jnd))
            lines.append(f"  lapse {a.fit.lapse:.3f}; spread {np.median(a.fit.spread):.2f} deg "
                         f"(JND {jnd:.2f} deg); " + (
                             f"deviance {t['deviance']:.1f} on {int(t['dof'])} df" if t["dof"] > 0 else
                             "no goodness of fit (no more cells of trials than fitted parameters)")
                         + (f", bootstrap goodness-of-fit p = {t['gof_p']:.3f}" if np.isfinite(t["gof_p"]) else ""))
            if np.isfinite(t["spread_lrt_stat"]):
                lines.append(f"  spread per condition vs shared: LR = {t['spread_lrt_stat']:.2f} on "
                             f"{int(t['spread_lrt_df'])} df, p = {t['spread_lrt_p']:.3f}")
            lines += _shift_grid(a.aftereffect)
            for _, r in a.tuning.iterrows():
                lines.append(f"  tuning, lag {int(r['lag'])}: amplitude {r['amplitude_deg']:.2f} deg"
                             f"{_ci(r['amplitude_ci_low'], r['amplitude_ci_high'])} at offset "
                             f"{r['peak_offset_deg']:.1f} deg"
                             f"{_ci(r['peak_offset_ci_low'], r['peak_offset_ci_high'], 1)}")
            if len(a.decay_detail):
                d = a.decay_detail.iloc[0]
                sec = (f" = {d['decay_s']:.2f} s{_ci(d['decay_s_ci_low'], d['decay_s_ci_high'])}"
                       if np.isfinite(d["decay_s"]) else " (period_s unknown: no seconds)")
                lines.append(f"  decay: tau {d['decay_periods']:.2f} periods"
                             f"{_ci(d['decay_ci_low'], d['decay_ci_high'])}{sec}")
            for n in self.notes.get(a.observer, []):
                if n not in shared:
                    lines.append(f"  note: {n}")
        if GROUP in self.notes or (self.tuning["observer"] == GROUP).any():
            lines.append("")
            own = self.aftereffect[self.aftereffect["observer"] != GROUP]
            used = own.loc[usable(own["flags"]), "observer"].nunique()
            lines.append(f"Group ({n_obs} observers{'' if used == n_obs else f', usable shifts from {used}'}; "
                         "random-effects intervals with within- and between-observer uncertainty)")
            g = self.aftereffect[self.aftereffect["observer"] == GROUP]
            lines += _shift_grid(g)
            for _, r in self.tuning[self.tuning["observer"] == GROUP].iterrows():
                lines.append(f"  tuning, lag {int(r['lag'])}: amplitude {r['amplitude_deg']:.2f} deg"
                             f"{_ci(r['amplitude_ci_low'], r['amplitude_ci_high'])} at offset "
                             f"{r['peak_offset_deg']:.1f} deg"
                             f"{_ci(r['peak_offset_ci_low'], r['peak_offset_ci_high'], 1)}")
            gd = self.decay[self.decay["observer"] == GROUP]
            if len(gd):
                r = gd.iloc[0]
                lines.append(f"  decay: tau {r['decay_periods']:.2f} periods{_ci(r['ci_low'], r['ci_high'])}")
            for n in self.notes.get(GROUP, []):
                lines.append(f"  note: {n}")
        if self.files:
            lines.append("")
            lines.append(f"written to {self.out_dir}: " + ", ".join(
                sorted({Path(f).name for f in self.files if "figures" not in Path(f).parts}))
                + f", and {sum('figures' in Path(f).parts for f in self.files)} figure files in figures/")
        return "\n".join(lines)


    def _flagged(self) -> list[str]:
        """The flagged rows of every table, listed before everything else."""
        def cond(r):
            return f"{r['observer']} PSE {r['condition']}"

        def cell(r):
            return f"{r['observer']} shift lag {r['lag']} offset {r['adapter_offset_deg']:+g}"

        found = (flagged_first(self.pse, cond) + flagged_first(self.aftereffect, cell)
                 + flagged_first(self.tuning, lambda r: f"{r['observer']} tuning lag {r['lag']}")
                 + flagged_first(self.decay, lambda r: f"{r['observer']} decay"))
        mm = self.extras.get("mixed_model")
        if mm is not None and len(mm) and not bool(mm["converged"].iloc[0]):
            found.append("mixed model: model-not-converged")
        if not found:
            return ["", "Flagged rows: none"]
        return ["", f"Flagged rows ({len(found)}; the words are explained in the README):"] + \
            [f"  {line}" for line in found]


def _ci(lo, hi, digits: int = 2) -> str:
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return ""
    return f" [{lo:.{digits}f}, {hi:.{digits}f}]"


def _shift_grid(shifts: pd.DataFrame) -> list[str]:
    """The summary's grid of PSE shifts (lag x adapter offset).

    A shift flagged with a word of :data:`fitting.flags.NOT_USABLE` (one-sided,
    not estimable, too few trials) is shown as "–": its number says nothing
    about the observer, and a plain grid read it as an after-effect.  A line
    under the grid names the flags; ``aftereffect.csv`` keeps the numbers.
    """
    if shifts is None or not len(shifts):
        return []
    flags = shifts["flags"] if "flags" in shifts else pd.Series("", index=shifts.index)
    shown = shifts.assign(pse_shift_deg=shifts["pse_shift_deg"].where(usable(flags), np.inf))
    tab = shown.pivot_table(index="lag", columns="adapter_offset_deg", values="pse_shift_deg")
    head = "  PSE shift (deg) by adapter offset (deg):"
    cols = "    lag " + "".join(f" {c:>7.4g}" for c in tab.columns)    # a space even before -90.1818
    rows = [f"    {int(lag):>3d} " + "".join("        " if np.isnan(v) else "       \u2013" if np.isinf(v)
                                          else f"{v:>8.2f}" for v in tab.loc[lag].to_numpy(float))
            for lag in tab.index]
    words = sorted({w for f in flags[~usable(flags)] for w in str(f).split() if w in NOT_USABLE},
                   key=NOT_USABLE.index)
    if words:
        rows.append(f"    \u2013: not estimable, flagged {' / '.join(words)} (aftereffect.csv keeps the number "
                    "and its flags)")
    return [head, cols] + rows


# --------------------------------------------------------------------------
# argument checks
# --------------------------------------------------------------------------

def _interval_words(o: Options, seed: int) -> str:
    """The summary's words for the kind of interval in the tables."""
    level = f"{100 * o.level:g}%"
    how = "" if not o.tracks else (", adaptive tracks re-run in every replicate" if o.track_use == "replicates"
                                   else ", drawn at the spread and lapse corrected by a pilot that re-ran the "
                                        "adaptive tracks")
    boot = f"{o.n_boot} parametric bootstrap replicate{'' if o.n_boot == 1 else 's'} (seed {seed}{how})"
    resolved = math.ceil(2.0 / (1.0 - o.level) - 1e-9)    # the fewest whose extremes reach both tails
    if 0 < o.n_boot < resolved:
        boot += (f", too few to resolve the {50 * (1 - o.level):g}% tails (at least {resolved} needed, 1,000 "
                 "recommended): rough intervals")
    if o.interval in ("profile", "studentized"):
        first = ("profile-likelihood" if o.interval == "profile" else "studentized bootstrap") + \
            " intervals of PSEs and shifts"
        rest = f"BCa intervals of tuning and decay from {boot}" if o.n_boot else "no tuning or decay intervals"
        return f"{level} {first}; {rest}"
    if not o.n_boot:
        return "no bootstrap: no intervals"
    if o.interval == BY_STATISTIC:
        return (f"{level} intervals from {boot}: percentile for PSEs, shifts and peak offsets, "
                "profile intervals for tuning amplitudes and the decay")
    return f"{level} {'BCa' if o.interval == 'bca' else 'percentile'} intervals from {boot}"


def _check_options(n_boot, seed, lapse, spread, sigmoid, interval, level, lapse_max, progress) -> Options:
    if isinstance(n_boot, bool) or not isinstance(n_boot, numbers.Integral) or n_boot < 0:
        raise InputError("argument", "--bootstrap", f"replicates must be a whole number >= 0, not {n_boot!r}")
    if isinstance(seed, bool) or not isinstance(seed, numbers.Integral) or seed < 0:
        raise InputError("argument", "--seed", f"seed must be a whole number >= 0, not {seed!r}")
    if not (isinstance(lapse_max, numbers.Real) and 0 < lapse_max < 0.5):
        raise InputError("argument", "--lapse-max", f"must be in (0, 0.5), not {lapse_max!r}")
    if isinstance(lapse, str) and lapse.strip().lower() == "free":
        lapse = "free"
    else:
        try:
            value = float(lapse)
        except (TypeError, ValueError):
            raise InputError("argument", "--lapse", f"'free' or a number in [0, 0.5), not {lapse!r}") from None
        if not (math.isfinite(value) and 0.0 <= value < 0.5):
            raise InputError("argument", "--lapse", f"a fixed lapse must be in [0, 0.5), not {lapse!r}")
        lapse = value
    spread = str(spread).replace("-", "_")
    if spread not in ("shared", "per_condition"):
        raise InputError("argument", "--spread", f"'shared' or 'per-condition', not {spread!r}")
    if sigmoid not in SIGMOIDS:
        raise InputError("argument", "--function", f"one of {', '.join(SIGMOIDS)}, not {sigmoid!r}")
    if interval not in INTERVAL_METHODS:
        raise InputError("argument", "--interval", f"one of {', '.join(INTERVAL_METHODS)}, not {interval!r}")
    if interval == "profile" and spread != "shared":
        raise InputError("argument", "--interval", "profile intervals of PSE shifts need --spread shared")
    if not (isinstance(level, numbers.Real) and 0.5 <= level < 1.0):
        raise InputError("argument", "--level", f"a confidence level in [0.5, 1), not {level!r}")
    show = None if progress is True else (True if progress == "always" else False)
    return Options(int(n_boot), lapse, spread, sigmoid, interval, float(level), float(lapse_max), show)


def _observer_rng(seed: int, observer: str) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence([int(seed), zlib.crc32(observer.encode("utf-8"))]))


# --------------------------------------------------------------------------
# entry points
# --------------------------------------------------------------------------

def _analyse_task(task) -> ObserverAnalysis:
    """One observer's analysis from ``(observer, trials, options, seed)``; runs in any process."""
    observer, trials, opts, seed = task
    return analyse_observer(observer, trials, opts, _observer_rng(seed, observer))


def fit_trials(trials: pd.DataFrame, n_boot: int = 1000, seed: int = 0, lapse="free",
               spread: str = "shared", progress=True, *, sigmoid: str = "gaussian",
               interval: str = BY_STATISTIC, level: float = 0.95,
               lapse_max: float = DEFAULT_LAPSE_MAX, map_tasks=None, tracks: dict | None = None,
               track_use: str = "replicates", after_observer=None, protocols: dict | None = None) -> FitReport:
    """Fit checked trials (from :func:`read_logs`) without writing anything.

    Same options as :func:`fit_logs`; returns the :class:`FitReport` with
    no files.  ``protocols`` (observer -> the identity of their sidecars'
    protocol, :func:`fitting.provenance.protocol_by_observer`) and the logs'
    own motion periods and reference directions flag group rows that pool
    observers of different protocols (:func:`fitting.group.flag_protocols_differ`).  With ``map_tasks`` and several observers,
    ``after_observer(analysis) -> {key: (function, argument)}`` may add tasks
    that run on the same workers as soon as an observer's analysis is in
    (:func:`fit_logs` draws the observer's figures so, beside the fits of
    the others); their results are the report's ``side_results``.
    """
    opts = _check_options(n_boot, seed, lapse, spread, sigmoid, interval, level, lapse_max, progress)
    check_replicate_memory(opts.n_boot, int(trials.groupby(["observer", "condition"]).ngroups))
    if tracks:
        if track_use not in ("replicates", "pilot"):
            raise ValueError(f"track_use: expected 'replicates' or 'pilot', got {track_use!r}")
        opts = replace(opts, tracks=dict(tracks), track_use=track_use)
    groups = {str(observer): obs_trials.reset_index(drop=True)
              for observer, obs_trials in trials.groupby("observer", sort=True)}
    side_results = {}
    if map_tasks is not None and len(groups) > 1:
        quiet = replace(opts, progress=False)
        tasks = {obs: (obs, t, quiet, int(seed)) for obs, t in groups.items()}
        if after_observer is None:
            done = map_tasks(_analyse_task, tasks)
        else:
            done = map_tasks(_analyse_task, tasks, lambda key, r: after_observer(r) if key in tasks else {})
        analyses = [done[obs] for obs in groups]
        side_results = {k: v for k, v in done.items() if k not in tasks}
    else:
        analyses = [_analyse_task((obs, t, opts, int(seed))) for obs, t in groups.items()]
    notes = {a.observer: a.notes for a in analyses}
    tables = {k: stack([getattr(a, k) for a in analyses], MAIN_TABLES.get(k)) if analyses else None
              for k in ("pse", "aftereffect", "tuning", "decay", "details", "model_test", "decay_detail")}
    extras = {"fit_details": tables["details"], "model_tests": tables["model_test"],
              "decay_detail": tables["decay_detail"]}
    exclusions = trials.attrs.get("exclusions")
    if exclusions is None:
        exclusions = trials.groupby("observer").size().rename("trials_used").reset_index()
        for c in ("trials_read",):
            exclusions[c] = exclusions["trials_used"]
        for c in ("practice_excluded", "bad_timing_excluded", "missed_excluded"):
            exclusions[c] = 0
    extras["exclusions"] = exclusions
    group = None
    if len(analyses) > 1:
        gnotes: list[str] = []
        group = {"pse": group_pse(tables["pse"], opts.level, gnotes),
                 "aftereffect": group_aftereffect(tables["aftereffect"], opts.level, gnotes)
                 if len(tables["aftereffect"]) else pd.DataFrame(columns=AFTEREFFECT_COLUMNS)}
        if len(tables["aftereffect"]):
            group["tuning"], group["decay"], group["decay_detail"], group["curves"] = \
                group_curves(tables["aftereffect"], opts.level, gnotes, tables["tuning"], tables["decay"])
        else:
            group["tuning"], group["decay"], group["decay_detail"] = (
                pd.DataFrame(columns=TUNING_COLUMNS), pd.DataFrame(columns=DECAY_COLUMNS), pd.DataFrame())
        periods = {a.period_s for a in analyses if np.isfinite(a.period_s)}
        group["period_s"] = periods.pop() if len(periods) == 1 else float("nan")
        if len(group["decay_detail"]):
            d = group["decay_detail"]
            per = group["period_s"]
            d["period_s"] = per
            for a, b in (("decay_s", "decay_periods"), ("decay_s_ci_low", "decay_ci_low"),
                         ("decay_s_ci_high", "decay_ci_high")):
                d[a] = d[b] * per
        extras["mixed_model"] = mixed_model(tables["aftereffect"], gnotes)
        identity = protocol_identity(trials, protocols)
        flag_protocols_differ(group, tables, extras["mixed_model"], identity)
        gnotes += [n for n in [logged_settings_note(identity)] if n]
        if len(group["aftereffect"]):
            group["covariance"] = group_covariance(
                analyses, group["aftereffect"], group_weights(tables["aftereffect"], opts.level), opts.level)
        for k in ("pse", "aftereffect", "tuning", "decay"):
            tables[k] = stack([tables[k], group[k]], MAIN_TABLES[k])
        extras["decay_detail"] = stack([extras["decay_detail"], group["decay_detail"]])
        notes[GROUP] = gnotes
    covs = [observer_covariance(a) for a in analyses] + [(group or {}).get("covariance")]
    covs = [c for c in covs if c is not None]
    if covs:
        extras["aftereffect_covariance"] = pd.concat(covs, ignore_index=True)[COVARIANCE_COLUMNS]
    return FitReport(*(tables[k][MAIN_TABLES[k]] for k in MAIN_TABLES), extras, analyses, notes,
                     opts, int(seed), group=group, side_results=side_results)


def fit_logs(paths, out_dir, n_boot: int = 1000, seed: int = 0, lapse="free",
             spread: str = "shared", include_bad_timing: bool = False, progress=True,
             figures: bool = True, *, include_practice: bool = False, sigmoid: str = "gaussian",
             figure_formats=("png",),
             interval: str = BY_STATISTIC, level: float = 0.95,
             lapse_max: float = DEFAULT_LAPSE_MAX, plan=None, map_tasks=None,
             tracks: dict | None = None, track_use: str = "replicates", settings=None) -> FitReport:
    """Read trial logs, fit every observer (and the group), write tables, figures and ``report.html``.

    Parameters
    ----------
    paths : list of str
        Trial logs and/or folders (every ``*.trials.csv`` below a folder).
        Sessions of the same observer are pooled; they must have run one
        protocol (:func:`fitting.provenance.protocol_by_observer`).
    out_dir : str
        Output folder (created if needed).
    n_boot : int
        Parametric bootstrap replicates per observer (0: no intervals).
    seed : int
        Seed of the replicates; same seed, same tables byte for byte.
    lapse : "free" or float
        ``"free"``: one lapse per observer in ``[0, lapse_max]``; a number in
        ``[0, 0.5)`` fixes it.
    spread : {"shared", "per_condition"}
        One spread per observer or one per condition (the other model is
        fitted too, for the likelihood-ratio test in ``model_tests.csv``).
    include_bad_timing : bool
        Keep trials with ``timing_ok = false``.
    progress : bool or "always"
        Progress bars on stderr: True = only when stderr is a terminal,
        "always" = even when it is not, False = never.
    figures : bool
        Draw the figures.
    figure_formats : sequence of {"png", "pdf"}
        File types of the figures (default PNG only: PDF copies add about
        a fifth to the run time of a 25-condition ``fit``).
    include_practice : bool
        Keep practice trials.
    sigmoid : {"gaussian", "logistic"}
        Shape ``F`` of the psychometric function.
    interval : {"by-statistic", "bca", "percentile", "profile", "studentized"}
        Kind of interval in the tables (see :mod:`fitting.observer`).
    level : float
        Confidence level.
    lapse_max : float
        Upper bound of a free lapse (default 0.1).
    plan : callable, optional
        ``protocol text -> lines`` of the protocol's plan, shown in the
        report (see :func:`fitting.provenance.collect`).
    settings : callable, optional
        ``protocol text -> settings`` compared to decide whether an
        observer's sessions ran one protocol
        (:func:`fitting.provenance.protocol_by_observer`; default
        :func:`fitting.provenance.protocol_settings`, the text read as TOML;
        the command line passes its parser, which fills in the defaults).
    map_tasks : callable, optional
        ``map_tasks(fn, tasks) -> results``: runs ``fn(task)`` for each value
        of the dict ``tasks`` (in any process, in any order) and returns the
        results under the same keys. Given, the observers are analysed through
        it (the command line hands them to local worker processes or a Dask
        cluster); each observer's replicates depend only on the seed and its
        ID, so the tables are the same either way.  With figures, it is also
        called as ``map_tasks(fn, tasks, then)``: ``then(key, result)`` returns
        more tasks, ``{key: (function, argument)}``, to run as each result
        arrives (here: the finished observer's figures, drawn into memory
        while the others are fitted, written with the tables; the same bytes
        as when drawn afterwards); and as ``map_tasks(fn, tasks,
        label=WORDS)`` for the figures still to draw after the fits (of up to
        :data:`EARLY_FIGURE_OBSERVERS` observers; beyond that, this process
        draws the rest straight into files).
    tracks : dict of str -> callable, optional
        Per observer, a factory of fresh adaptive tracks: the bootstrap then
        re-runs the tracks with the fitted observer (:mod:`fitting.replay`;
        the command line builds these from the sidecars with
        ``--rerun-tracks``).
    track_use : {"replicates", "pilot"}
        Re-run the tracks for every replicate, or only for the pilot that
        sets the generating spread and lapse (:mod:`fitting.replay`).

    Returns
    -------
    FitReport

    Raises
    ------
    InputError
        Bad arguments, unreadable or invalid logs (naming file and line), an
        observer whose sessions ran different protocols.
    """
    if Path(out_dir).exists() and not Path(out_dir).is_dir():
        raise InputError(str(out_dir), "--out", "exists and is not a folder")
    _check_options(n_boot, seed, lapse, spread, sigmoid, interval, level, lapse_max, progress)
    trials = read_logs(paths, include_bad_timing, include_practice)
    data = collect(paths, plan)     # the sidecars: one protocol per observer (refused otherwise), for the flags
    protocols = protocol_by_observer(data["sessions"], data["protocols"], settings or protocol_settings)
    n_observers = trials["observer"].nunique()
    # with workers, they draw every figure (their process has matplotlib imported already); this process
    # draws only when there are none, or when more observers than fit in memory leave figures for the end
    draw_here = figures and (map_tasks is None or n_observers > EARLY_FIGURE_OBSERVERS)
    importing = _import_ahead(draw_here, n_observers > 1)
    if figures:
        from .figures import check_formats, draw_to_memory, figure_tasks, observer_figure_tasks

        formats = check_formats(figure_formats)

        early = 0                       # observers whose figures are drawn beside the fits

        def draw_early(analysis) -> dict:
            """An observer's figures, drawn while others are fitted and held in memory until the end."""
            nonlocal early
            if early >= EARLY_FIGURE_OBSERVERS:
                return {}               # the rest are drawn after the fits, straight into files
            early += 1
            return {("figure", stem): (draw_to_memory, (draw, args, stem, formats))
                    for draw, args, stem in observer_figure_tasks(analysis)}
    report = fit_trials(trials, n_boot, seed, lapse, spread, progress, sigmoid=sigmoid,
                        interval=interval, level=level, lapse_max=lapse_max, map_tasks=map_tasks,
                        tracks=tracks, track_use=track_use, after_observer=draw_early if figures else None,
                        protocols=protocols)
    drawn = {name: data for files in report.side_results.values() for name, data in files.items()}
    if figures and not draw_here:
        # what is left (one observer's figures, or the group's) goes to the workers too, into memory
        left = {("figure", stem): (draw, args, stem, formats)
                for draw, args, stem in figure_tasks(report.analyses, report.group)
                if f"{stem}.{formats[0]}" not in drawn}
        if left:
            done = map_tasks(draw_to_memory, left, label="drawing figures")
            drawn.update({name: data for files in done.values() for name, data in files.items()})
    # all fitting is done; only now is anything written, staged and moved in as one set
    with output_set(out_dir, "fit") as staged:
        out = staged.folder
        fig_files: list[str] = []
        if figures:
            from .figures import make_figures
            importing.join()
            with phase("drawing figures" if draw_here else "writing figures", show=report.options.progress,
                       count=lambda: _count_files(out / "figures")):
                fig_files = make_figures(report.analyses, report.group, out / "figures", formats=figure_formats,
                                         drawn=drawn)
        files = []
        for name, cols in MAIN_TABLES.items():
            write_csv(getattr(report, name), out / f"{name}.csv", cols)
            files.append(str(out / f"{name}.csv"))
        for name, table in report.extras.items():
            if table is not None and len(table.columns):
                write_csv(table, out / f"{name}.csv")
                files.append(str(out / f"{name}.csv"))
        files += fig_files + [str(out / "summary.txt"), str(out / REPORT_DATA), str(out / PAGE)]
        report.out_dir = str(staged.final_dir)
        report.files = staged.final_paths(files)
        where = report.notes.setdefault(GROUP if report.group is not None else report.analyses[0].observer, [])
        # said before pooling, wherever the summary is read (the page says the protocols' note too)
        where[:0] = [n for n in (protocols_note(data), *same_person_notes(trials)) if n]
        for observer, text in session_notes(data):
            report.notes.setdefault(observer, []).append(text)
        write_text(out / "summary.txt", report.summary() + "\n")
        data.update(kind="adapt-test", options=report.summary().splitlines()[1], notes=report.notes)
        write_report_data(out, data)
        write_page(out)
    return report


def protocols_note(data: dict) -> str | None:
    """A note when the sessions ran different protocols (from :func:`fitting.provenance.collect`), else None.

    Names each protocol (the start of its SHA-256) with the observers who ran it.
    """
    protocols = data.get("protocols", {})
    if len(protocols) < 2:
        return None
    users: dict[str, set] = {}
    for s in data.get("sessions", []):
        users.setdefault(s.get("protocol_sha256") or "", set()).add(str(s.get("observer")))
    who = "; ".join(f"{sha[:12]} ({Path(str(p.get('path'))).name}): {', '.join(sorted(users.get(sha, ())))}"
                    for sha, p in protocols.items())
    return f"the observers ran {len(protocols)} different protocols ({who}); compare them before pooling"


def session_notes(data: dict) -> list[tuple[str, str]]:
    """``(observer, note)`` for every session that did not complete, or whose log lacks trials (from :func:`collect`).

    A session stopped early (Escape, a signal, a full disk) or killed (its
    last part still ``running``) is fitted like any other; the note says
    that its tracks did not run to their end.  A log that holds another
    number of trials than its sidecar counted (copied too early, or cut) is
    named too (:func:`fitting.provenance.count_problem`).
    """
    notes = []
    for s in data.get("sessions", []):
        if s.get("count_problem"):
            notes.append((str(s.get("observer")), s["count_problem"]))
        how = s.get("ended_by")
        if s.get("being_written"):
            notes.append((str(s.get("observer")), f"session {s.get('session')} was being written when this fit read "
                          f"it ({s['being_written']}; a running session held its log): this fit has the trials "
                          "logged by then; fit again when it has ended"))
        elif how is not None and how != "completed":
            # a part still "running" has no count of its own yet: the sidecar's is that of the parts before it
            ended = "never recorded its end (killed)" if how == "running" else f"ended {how!r}"
            kept = ("" if s.get("trials") is None or how == "running"
                    else f"; {s['trials']} trials in the log by its sidecar")
            notes.append((str(s.get("observer")), f"session {s.get('session')} did not complete: its last part "
                          f"{ended}{kept} (continue it with --resume before fitting, if it was not meant to end "
                          "there)"))
    return notes


def _import_ahead(figures: bool, group: bool) -> threading.Thread:
    """Import what comes after the fits in a thread, while the observers are being fitted.

    matplotlib for the figures and statsmodels for the group's mixed model
    take about 0.5 s and 1 s to import; on the main thread they would wait
    until every observer is done.  Join the thread before drawing.
    """
    def work():
        try:
            if figures:
                from .figures import pyplot
                pyplot()
            if group:
                import statsmodels.formula.api  # noqa: F401 - see fitting.group.mixed_model
        except Exception:   # noqa: BLE001 - only a head start: the main thread imports again and reports
            pass

    thread = threading.Thread(target=work, name="import ahead", daemon=True)
    thread.start()
    return thread


def _count_files(folder: Path) -> int:
    return sum(1 for _ in folder.iterdir()) if folder.is_dir() else 0


def quick_shifts(trials: pd.DataFrame, n_boot: int = 50, seed: int = 0) -> pd.DataFrame:
    """Fast PSE shifts for the experimenter's console after a block; writes nothing.

    Each observer's conditions are fitted jointly (shared spread, free lapse)
    and ``n_boot`` replicates give rough percentile 95 % intervals.

    Parameters
    ----------
    trials : pandas.DataFrame
        Trial-log rows (the log's columns; text or typed values).  Practice,
        bad-timing and missed trials are left out.
    n_boot : int
        Replicates (0: no intervals).
    seed : int

    Returns
    -------
    pandas.DataFrame
        ``observer, condition, adapter_offset_deg, lag, pse_deg,
        pse_shift_deg, ci_low, ci_high, n_trials, flags, shift_flags``; one
        row per condition (baseline included, shift 0). ``flags`` are the
        condition's own (its PSE's, as in ``pse.csv``), ``shift_flags`` add
        the baseline's (the shift's, as in ``aftereffect.csv``: a shift
        leans on both PSEs). Shifts and intervals empty
        (NaN) when the observer has no baseline trials yet; intervals empty
        where the condition or the baseline has fewer than
        :data:`~fitting.flags.MIN_TRIALS_FOR_INTERVAL` trials or all answers
        on one side.  ``.attrs["exclusions"]`` holds the exclusion counts
        (see :func:`exclusion_text`).
    """
    if isinstance(n_boot, bool) or not isinstance(n_boot, numbers.Integral) or n_boot < 0:
        raise InputError("argument", "n_boot", f"a whole number >= 0, not {n_boot!r}")
    kept = prepare_trials(trials)
    rows = []
    for observer, t in kept.groupby("observer", sort=True):
        conds = condition_table(t)
        names = conds["condition"].tolist()
        code = t["condition"].map({c: i for i, c in enumerate(names)}).to_numpy()
        cells = Cells.from_trials(t["test_offset_deg"].to_numpy(float),
                                  t["response_cw"].to_numpy(float), code, len(names))
        fit = fit_cells(cells, names, warn=False)
        base = np.flatnonzero(conds["is_baseline"].to_numpy())
        shift = fit.pse - fit.pse[base[0]] if base.size else np.full(len(names), np.nan)
        lo = hi = np.full(len(names), np.nan)
        flags = psychometric_flags(fit)
        shift_flags = [join(f, flags[base[0]]) for f in flags] if base.size else list(flags)
        if n_boot and base.size:
            boot = parametric_bootstrap(fit, int(n_boot), _observer_rng(seed, str(observer)), False)
            reps = boot.pse - boot.pse[:, [base[0]]]
            lo, hi = np.quantile(reps, [0.025, 0.975], axis=0)
            # no interval from too few trials or from answers all on one side
            bare = np.array([("few-trials" in f) or ("one-sided" in f) for f in shift_flags])
            lo, hi = np.where(bare, np.nan, lo), np.where(bare, np.nan, hi)
        rows.append(pd.DataFrame({"observer": str(observer), "condition": names,
                                  "adapter_offset_deg": conds["adapter_offset_deg"].to_numpy(),
                                  "lag": conds["lag"].astype("Int64").to_numpy(),
                                  "pse_deg": fit.pse, "pse_shift_deg": shift,
                                  "ci_low": lo, "ci_high": hi,
                                  "n_trials": conds["n_trials"].to_numpy(), "flags": flags,
                                  "shift_flags": shift_flags}))
    table = pd.concat(rows, ignore_index=True)
    table.attrs["exclusions"] = kept.attrs.get("exclusions")
    return table


def exclusion_text(counts: pd.DataFrame | None) -> str:
    """One line: trials used of read, and how many were excluded for what."""
    if counts is None or not len(counts):
        return ""
    used, read = int(counts["trials_used"].sum()), int(counts["trials_read"].sum())
    why = [f"{int(counts[c].sum())} {w}" for c, w in (("practice_excluded", "practice"),
                                                      ("bad_timing_excluded", "bad timing"),
                                                      ("missed_excluded", "missed answers"))
           if int(counts[c].sum())]
    return f"{used} trials used of {read}" + (f" (excluded: {', '.join(why)})" if why else "")
