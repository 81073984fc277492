"""Everything fitted for one observer: PSEs, shifts, tuning, decay, with intervals.

:func:`analyse_observer` runs, for the pooled trials of one observer:

1. the joint psychometric fit (PSE per condition, spread shared or per
   condition, lapse shared), and the other spread model for the
   likelihood-ratio test;
2. the parametric bootstrap (all replicates refitted in one batch);
3. PSE shifts ``PSE(condition) - PSE(baseline)`` per lag and offset, taken on
   the *same* replicates, so the baseline's uncertainty enters every shift;
4. per lag, the DoG tuning fit; across lags, the joint decay fit
   (:mod:`fitting.aftereffect`), again on every replicate;
5. intervals for all of them.  The default, ``"by-statistic"``, gives each
   kind of number the bootstrap interval that held its level best in the
   coverage benchmark (``benchmarks/bench_coverage.py``, benchmarks/README.md):
   percentile limits for PSEs, shifts and peak offsets, and for each lag's
   tuning amplitude (with 8 or more shifts; BCa with fewer) and for the
   decay constant the profile interval of a
   generalised least-squares fit with the replicates' covariance of the
   shifts (:func:`fitting.aftereffect.tuning_profile_interval`,
   :func:`fitting.aftereffect.decay_profile_interval`; their BCa limits
   (Efron 1987) held the truth in about 92.7 % and 91 % of simulated
   observers with 24 up–down trials per condition).  ``"bca"`` or ``"percentile"``
   use one kind for everything.  BCa needs each statistic's gradient in the
   fit parameters: exact for PSEs and shifts, by central differences for the
   curve parameters (the curve fits are run on the probes in the same batch as
   the replicates).  On request the PSEs and shifts get profile-likelihood
   (:mod:`fitting.profile`) or studentized bootstrap intervals instead; the
   tuning and decay intervals stay BCa (see :func:`pse_shift_intervals`).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import special

from .aftereffect import (TAU_BOUNDS, bound_note, decay_profile_interval, fit_decay, fit_tuning, peak_bounds,
                          tuning_profile_interval)
from .bootstrap import BootstrapResult, parametric_bootstrap, pilot_size
from .profile import profile_pse, profile_shifts
from .flags import MIN_TRIALS_FOR_INTERVAL, condense, join, off_interval, on_bound, psychometric_flags
from .progress import ProgressBar
from .replay import replay_bootstrap, rerun_generating_parameters
from .psychometric import DEFAULT_LAPSE_MAX, Cells, PsychometricFit, fit_cells

PSE_COLUMNS = ["observer", "condition", "adapter_offset_deg", "lag", "pse_deg", "pse_ci_low",
               "pse_ci_high", "spread_deg", "lapse", "n_trials", "flags"]
AFTEREFFECT_COLUMNS = ["observer", "lag", "adapter_offset_deg", "pse_shift_deg", "ci_low",
                       "ci_high", "n_trials", "flags"]
TUNING_COLUMNS = ["observer", "lag", "amplitude_deg", "amplitude_ci_low", "amplitude_ci_high",
                  "peak_offset_deg", "peak_offset_ci_low", "peak_offset_ci_high", "flags"]
DECAY_COLUMNS = ["observer", "decay_periods", "ci_low", "ci_high", "flags"]

_FD_STEP = 1e-4   # deg, central differences of curve parameters in the PSEs


@dataclass(frozen=True)
class Options:
    """Settings shared by every observer's analysis.

    Attributes
    ----------
    n_boot : int
        Bootstrap replicates (0: no intervals).
    lapse : "free" or float
    spread : {"shared", "per_condition"}
    sigmoid : {"gaussian", "logistic"}
    interval : {"by-statistic", "bca", "percentile", "profile", "studentized"}
        Interval of the PSEs and shifts (tuning and decay: BCa unless
        "percentile", or, under "by-statistic", the profile intervals of the
        tuning amplitudes and of the decay);
        see :func:`pse_shift_intervals`.
    level : float
        Confidence level of every interval.
    lapse_max : float
    progress : bool or None
        Progress bar (None: only on a terminal).
    tracks : dict of str -> callable, optional
        Per observer, a factory of fresh adaptive tracks (:mod:`fitting.replay`);
        observers not listed are bootstrapped with the levels held fixed.
    track_use : {"replicates", "pilot"}
        What the listed observers' tracks are re-run for: every replicate, or
        only the pilot that sets the generating spread and lapse of the
        fixed-level replicates.
    """

    n_boot: int = 1000
    lapse: object = "free"
    spread: str = "shared"
    sigmoid: str = "gaussian"
    interval: str = "by-statistic"
    level: float = 0.95
    lapse_max: float = DEFAULT_LAPSE_MAX
    progress: bool | None = None
    tracks: dict | None = None
    track_use: str = "replicates"


@dataclass
class ObserverAnalysis:
    """All results of one observer (tables as DataFrames, plus what figures need)."""

    observer: str
    conditions: pd.DataFrame
    trials: pd.DataFrame
    fit: PsychometricFit
    alternative: PsychometricFit | None
    boot: BootstrapResult | None
    pse: pd.DataFrame
    details: pd.DataFrame
    aftereffect: pd.DataFrame
    tuning: pd.DataFrame
    decay: pd.DataFrame
    decay_detail: pd.DataFrame
    model_test: pd.DataFrame
    period_s: float
    curves: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)


def condition_table(trials: pd.DataFrame) -> pd.DataFrame:
    """Conditions of one observer: baseline first, then by lag and offset."""
    g = trials.groupby("condition", sort=False)
    tab = pd.DataFrame({"condition": list(g.groups.keys())})
    first = g.first()
    tab["is_baseline"] = tab["condition"].map(first["is_baseline"]).astype(bool)
    tab["adapter_offset_deg"] = tab["condition"].map(first["adapter_offset_deg"]).astype(float)
    tab["lag"] = tab["condition"].map(first["lag"]).astype(float)
    tab["n_trials"] = tab["condition"].map(g.size()).astype(int)
    tab["_b"] = ~tab["is_baseline"]
    tab = tab.sort_values(["_b", "lag", "adapter_offset_deg", "condition"], kind="mergesort")
    return tab.drop(columns="_b").reset_index(drop=True)


def _period(trials: pd.DataFrame, notes: list) -> float:
    values = trials["period_s"].dropna().unique()
    if values.size == 0:
        return float("nan")
    if np.ptp(values) > 1e-9:
        notes.append(f"period_s differs between trials ({', '.join('%g' % v for v in sorted(values))} s); "
                     "the decay is not converted to seconds")
        return float("nan")
    return float(values[0])


#: The default interval rule: percentile limits for PSEs, shifts and peak offsets, profile intervals for the
#: tuning amplitudes and the decay (each kind as measured best by benchmarks/bench_coverage.py).
BY_STATISTIC = "by-statistic"
#: A lag's amplitude profile interval estimates the covariance's factor (cut s^2 F(1, n - 2)) with at least
#: this many usable shifts (6 residual degrees of freedom, the bundled design); with 3 to 7 it takes the
#: replicates' covariance as exact (cut chi2_1): the factor's F(1, n - 2) cut explodes there (161 at n = 3)
#: and BCa held the truth in only 89–93 % in 10 of 18 cells with 3, 4 and 6 shifts (benchmarks/README.md).
TUNING_FACTOR_MIN_SHIFTS = 8
INTERVAL_METHODS = (BY_STATISTIC, "bca", "percentile", "profile", "studentized")


def _intervals(boot, opts, estimate, reps, gradient, percentile_kind=None):
    """Bootstrap limits of every column of ``reps``.

    ``percentile_kind`` (bool per column) marks the columns that get
    percentile limits under the ``"by-statistic"`` rule; the others get BCa.
    """
    if boot is None:
        nan = np.full(np.size(estimate), np.nan)
        return nan, nan.copy()
    if opts.interval == "percentile":
        return boot.interval(estimate, reps, gradient, "percentile", opts.level)
    lo, hi = boot.interval(estimate, reps, gradient, "bca", opts.level)
    if opts.interval == BY_STATISTIC and percentile_kind is not None and np.any(percentile_kind):
        cols = np.flatnonzero(percentile_kind)
        plo, phi = boot.interval(np.asarray(estimate)[cols], reps[:, cols], None, "percentile", opts.level)
        lo[cols], hi[cols] = plo, phi
    return lo, hi


def _pse_method(interval: str) -> str:
    """The interval kind of PSEs and shifts under the option ``interval``."""
    return "percentile" if interval == BY_STATISTIC else interval


def pse_shift_intervals(method: str, fit: PsychometricFit, boot: BootstrapResult | None, base: int | None,
                        adapted, level: float = 0.95):
    """Limits of every condition PSE and of every shift ``PSE[j] - PSE[base]``, ``j`` in ``adapted``.

    Parameters
    ----------
    method : {"bca", "percentile", "profile", "studentized"}
        ``"profile"``: likelihood-ratio intervals, the joint fit re-maximised
        at every trial value (:mod:`fitting.profile`; no bootstrap needed);
        ``"studentized"``: bootstrap-t with each replicate's own standard
        error (``boot`` run with ``studentize=True``); the others: the
        bootstrap quantiles.
    fit, boot
        The point fit and its bootstrap (None: NaN limits unless profile).
    base : int or None
        Index of the baseline condition (None: no shifts).
    adapted : sequence of int
        Conditions whose shift from the baseline is wanted.
    level : float

    Returns
    -------
    (pse_low, pse_high, shift_low, shift_high) : ndarrays (C,), (C,), (S,), (S,)
    """
    adapted = np.asarray(adapted, dtype=int)
    C = len(fit.conditions)
    w = np.eye(C)
    if base is not None and adapted.size:
        w = np.hstack([w, np.eye(C)[:, adapted] - np.eye(C)[:, [base]]])
    if method == "profile":
        p = profile_pse(fit, level)
        lo, hi = p.low, p.high
        if w.shape[1] > C:
            s = profile_shifts(fit, base, adapted, level)
            lo, hi = np.concatenate([lo, s.low]), np.concatenate([hi, s.high])
    elif boot is None:
        lo = hi = np.full(w.shape[1], np.nan)
    elif method == "studentized":
        lo, hi = boot.studentized(w, level)
    else:
        lay = fit.layout
        grad = np.zeros((lay.n_params, w.shape[1]))
        grad[lay.pse_index] = w
        lo, hi = boot.interval(fit.pse @ w, boot.pse @ w, grad, method, level)
    return lo[:C], hi[:C], lo[C:], hi[C:]


def decay_interval(a: "ObserverAnalysis", level: float = 0.95) -> tuple[float, float]:
    """The profile interval of an analysed observer's decay constant (``"by-statistic"``'s rule).

    For a fit made with another interval rule (the coverage benchmark scores
    several rules on one fit).  NaN limits without a decay fit or replicates.
    """
    reps = a.curves.get("shift_reps") if a.curves else None
    if reps is None or a.decay.empty:
        return float("nan"), float("nan")
    model = _CurveModel(a.conditions, a.fit, [])
    return model.decay_interval(a.aftereffect["pse_shift_deg"].to_numpy(float), reps,
                                float(a.decay["decay_periods"].iloc[0]), level)


def tuning_intervals(a: "ObserverAnalysis", level: float = 0.95) -> dict[int, tuple[float, float]]:
    """The profile intervals of an analysed observer's tuning amplitudes, by lag (``"by-statistic"``'s rule).

    For a fit made with another interval rule, as :func:`decay_interval`;
    empty without replicates.
    """
    reps = a.curves.get("shift_reps") if a.curves else None
    if reps is None:
        return {}
    model = _CurveModel(a.conditions, a.fit, [])
    shifts = a.aftereffect["pse_shift_deg"].to_numpy(float)
    out = {}
    for i in model.tuning_lags:
        lag = int(model.lags[i])
        row = a.tuning[a.tuning["lag"] == lag]
        out[lag] = model.tuning_interval(i, shifts, reps, float(row["amplitude_deg"].iloc[0]), level)
    return out


class _CurveModel:
    """Maps PSE rows (B, C) to shifts, per-lag tuning and the decay fit."""

    def __init__(self, conds: pd.DataFrame, fit: PsychometricFit, notes: list):
        self.base = int(np.flatnonzero(conds["is_baseline"])[0])
        adapted = conds[~conds["is_baseline"]]
        self.cond_index = adapted.index.to_numpy()
        self.offsets = np.sort(adapted["adapter_offset_deg"].unique())
        self.lags = np.sort(adapted["lag"].unique())
        cov = fit.covariance
        pi = fit.layout.pse_index
        var = (np.diagonal(cov)[pi[self.cond_index]] + cov[pi[self.base], pi[self.base]]
               - 2.0 * cov[pi[self.cond_index], pi[self.base]])
        self.shift_var = var
        weight = np.where(np.isfinite(var), 1.0 / np.maximum(np.where(np.isfinite(var), var, 1.0), 1e-6), 0.0)
        if (weight == 0).any():
            bad = adapted["condition"].to_numpy()[weight == 0]
            notes.append("left out of the curve fits (PSE not estimable): " + ", ".join(bad))
        # (K, J) layout of the adapter conditions
        self.cell_k = np.searchsorted(self.lags, adapted["lag"].to_numpy())
        self.cell_j = np.searchsorted(self.offsets, adapted["adapter_offset_deg"].to_numpy())
        self.weight = np.zeros((self.lags.size, self.offsets.size))
        self.weight[self.cell_k, self.cell_j] = weight
        self.tuning_lags = [i for i in range(self.lags.size)
                            if ((self.weight[i] > 0) & (self.offsets != 0)).sum() >= 3]
        for i in range(self.lags.size):
            if i not in self.tuning_lags:
                notes.append(f"lag {self.lags[i]:g}: fewer than 3 usable non-zero adapter offsets, "
                             "no tuning curve")
        self.decay_ok = len(self.tuning_lags) >= 2
        self.peak_range = peak_bounds(self.offsets)

    def decay_interval(self, shifts: np.ndarray, shift_reps: np.ndarray, tau: float,
                       level: float) -> tuple[float, float]:
        """Profile interval of ``tau`` with the covariance of the replicated shifts (see the module text).

        NaN limits when the replicates are too few (or too degenerate) for a
        covariance of the shifts that the decay fit uses.
        """
        used = (self.weight[self.cell_k, self.cell_j] > 0) & np.isin(self.cell_k, self.tuning_lags)
        cov = replicate_covariance(shift_reps[:, used])
        if cov is None:
            return float("nan"), float("nan")
        return decay_profile_interval(self.offsets[self.cell_j[used]], self.lags[self.cell_k[used]],
                                      shifts[used], cov, tau, self.peak_range, TAU_BOUNDS, level)

    def factor_lag(self, lag_index: int) -> bool:
        """True where lag ``lag_index``'s amplitude interval estimates the covariance's factor: at least
        :data:`TUNING_FACTOR_MIN_SHIFTS` usable shifts."""
        used = (self.weight[self.cell_k, self.cell_j] > 0) & (self.cell_k == lag_index)
        return int(used.sum()) >= TUNING_FACTOR_MIN_SHIFTS

    def tuning_interval(self, lag_index: int, shifts: np.ndarray, shift_reps: np.ndarray, amplitude: float,
                        level: float) -> tuple[float, float]:
        """Profile interval of lag ``lag_index``'s tuning amplitude with the covariance of its replicated shifts.

        The cut is the variance factor's with at least
        :data:`TUNING_FACTOR_MIN_SHIFTS` usable shifts, that of the
        covariance taken as exact with fewer (:meth:`factor_lag`).  NaN
        limits as for :meth:`decay_interval`.
        """
        used = (self.weight[self.cell_k, self.cell_j] > 0) & (self.cell_k == lag_index)
        cov = replicate_covariance(shift_reps[:, used])
        if cov is None:
            return float("nan"), float("nan")
        return tuning_profile_interval(self.offsets[self.cell_j[used]], shifts[used], cov, amplitude,
                                       self.peak_range, level,
                                       cut="factor" if self.factor_lag(lag_index) else "known")

    def shifts(self, pse: np.ndarray) -> np.ndarray:
        return pse[:, self.cond_index] - pse[:, [self.base]]

    def grid(self, shifts: np.ndarray) -> np.ndarray:
        out = np.zeros((shifts.shape[0], self.lags.size, self.offsets.size))
        out[:, self.cell_k, self.cell_j] = shifts
        return out

    def statistics(self, pse: np.ndarray) -> tuple[np.ndarray, dict]:
        """Shifts, then [A_k, w_k for tuning lags] + [A0, w, tau], per row."""
        sh = self.shifts(pse)
        cube = self.grid(sh)
        cols, flags = [], {}
        for i in self.tuning_lags:
            t = fit_tuning(self.offsets, cube[:, i], self.weight[i], self.peak_range)
            cols += [t.amplitude, t.peak]
            flags[("tuning", i)] = t.peak_at_bound
        if self.decay_ok:
            keep = self.tuning_lags
            dfit = fit_decay(self.offsets, self.lags[keep], cube[:, keep], self.weight[keep],
                             self.peak_range, TAU_BOUNDS)
            cols += [dfit.amplitude0, dfit.peak, dfit.tau]
            flags["decay_peak"], flags["decay_tau"] = dfit.peak_at_bound, dfit.tau_at_bound
        stats = np.column_stack(cols) if cols else np.zeros((pse.shape[0], 0))
        return np.column_stack([sh, stats]), flags


def replicate_covariance(reps: np.ndarray) -> np.ndarray | None:
    """Covariance of replicated shifts, as the profile intervals of the decay and the amplitudes take it.

    Parameters
    ----------
    reps : ndarray (replicates, cells)
        Bootstrap replicates of the shifts; a row with a non-finite value
        (a failed refit) is left out.

    Returns
    -------
    ndarray (cells, cells) or None
        None when no more rows remain than cells + 2, too few for a
        covariance whose inverse is usable.
    """
    reps = reps[np.all(np.isfinite(reps), axis=1)]
    if reps.shape[0] <= reps.shape[1] + 2:
        return None
    return np.cov(reps, rowvar=False)


def analyse_observer(observer: str, trials: pd.DataFrame, opts: Options,
                     rng: np.random.Generator) -> ObserverAnalysis:
    """Fit one observer's pooled trials; see the module docstring for the steps."""
    notes: list[str] = []
    conds = condition_table(trials)
    names = conds["condition"].tolist()
    code = trials["condition"].map({c: i for i, c in enumerate(names)}).to_numpy()
    cells = Cells.from_trials(trials["test_offset_deg"].to_numpy(float),
                              trials["response_cw"].to_numpy(float), code, len(names))
    other = "per_condition" if opts.spread == "shared" else "shared"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        fit = fit_cells(cells, names, opts.spread, opts.lapse, opts.sigmoid, opts.lapse_max)
        alt = fit_cells(cells, names, other, opts.lapse, opts.sigmoid, opts.lapse_max,
                        warn=False) if len(names) > 1 else None
    notes += condense(w.message for w in caught)
    if fit.lapse_at_bound:
        notes.append(f"lapse on its bound ({fit.lapse:g})")
    boot = None
    if opts.n_boot > 0:
        factory = (opts.tracks or {}).get(observer)
        if opts.tracks is not None and factory is None:
            notes.append("bootstrap kept the levels fixed, with a fixed-level pilot: no single protocol "
                         "was found in the session sidecars")
        elif factory is not None and not trials["track"].astype(str).str.fullmatch(r"\d+").all():
            notes.append("bootstrap kept the levels fixed: some trials name no track number")
            factory = None
        generate, studentize = None, opts.interval == "studentized"
        if factory is not None:
            schedule = list(zip(code.tolist(), trials["track"].astype(str)))    # the trials in the order run
            if opts.track_use == "replicates":
                boot = replay_bootstrap(fit, schedule, factory, opts.n_boot, rng, opts.progress,
                                        f"bootstrap {observer} (tracks re-run)", studentize=studentize)
            else:
                pilot = pilot_size(opts.n_boot)
                with ProgressBar(pilot * len(names), f"pilot {observer} (tracks re-run)",
                                 show=opts.progress) as bar:
                    generate = rerun_generating_parameters(fit, schedule, factory, pilot, rng, bar)
        if boot is None:
            boot = parametric_bootstrap(fit, opts.n_boot, rng, opts.progress, f"bootstrap {observer}",
                                        studentize=studentize, generate=generate)
        bad = 1.0 - boot.converged.mean()
        if bad > 0:
            notes.append(f"{100 * bad:.1f}% of bootstrap refits stopped before converging")
    # --- PSE table -----------------------------------------------------
    base = int(np.flatnonzero(conds["is_baseline"])[0]) if conds["is_baseline"].any() else None
    adapted = np.flatnonzero(~conds["is_baseline"].to_numpy()) if base is not None else np.zeros(0, int)
    lo, hi, *shift_ci = pse_shift_intervals(_pse_method(opts.interval), fit, boot, base, adapted, opts.level)
    if _pse_method(opts.interval) in ("bca", "percentile"):
        shift_ci = None      # computed with the curve statistics below, on the same replicates
    cond_flags = psychometric_flags(fit, boot)
    # no interval from too few trials, nor for a PSE that is not estimable (answers all on one side)
    bare = (fit.n_trials < MIN_TRIALS_FOR_INTERVAL) | np.array(["one-sided" in f for f in cond_flags])
    lo, hi = np.where(bare, np.nan, lo), np.where(bare, np.nan, hi)
    box = zip(fit.lower[fit.layout.pse_index], fit.upper[fit.layout.pse_index])
    cond_flags = [join(f, ["on-bound"] if on_bound(e, l, h, b) else [], ["off-interval"] if off_interval(e, l, h) else [])
                  for f, e, l, h, b in zip(cond_flags, fit.pse, lo, hi, box)]
    pse = pd.DataFrame({
        "observer": observer, "condition": names,
        "adapter_offset_deg": conds["adapter_offset_deg"].to_numpy(),
        "lag": conds["lag"].astype("Int64"),
        "pse_deg": fit.pse, "pse_ci_low": lo, "pse_ci_high": hi,
        "spread_deg": fit.spread, "lapse": fit.lapse, "n_trials": conds["n_trials"].to_numpy(),
        "flags": cond_flags})
    details = _details(observer, conds, fit, boot, opts, cond_flags)
    model_test = _model_test(observer, fit, alt, boot, opts)
    period = _period(trials, notes)
    analysis = ObserverAnalysis(observer, conds, trials, fit, alt, boot, pse, details,
                                pd.DataFrame(columns=AFTEREFFECT_COLUMNS),
                                pd.DataFrame(columns=TUNING_COLUMNS),
                                pd.DataFrame(columns=DECAY_COLUMNS), pd.DataFrame(),
                                model_test, period, {}, notes)
    if not conds["is_baseline"].any():
        notes.append("no baseline trials: no PSE shifts, tuning or decay")
        return analysis
    if conds["is_baseline"].all():
        return analysis
    _curves(analysis, opts, shift_ci)
    return analysis


def _stretched(estimate, low, high) -> bool:
    """True when a limit equals the estimate: a profile interval stretched to hold it (a degenerate one)."""
    return bool(np.isfinite(estimate) and (low == estimate or high == estimate))


def _details(observer, conds, fit, boot, opts, flags) -> pd.DataFrame:
    out = pd.DataFrame({"observer": observer, "condition": conds["condition"],
                        "adapter_offset_deg": conds["adapter_offset_deg"],
                        "lag": conds["lag"].astype("Int64"), "n_trials": conds["n_trials"],
                        "n_levels": (fit.cells.n > 0).sum(axis=1),
                        "pse_deg": fit.pse, "pse_se": fit.pse_se,
                        "spread_deg": fit.spread, "spread_se": fit.spread_se,
                        "jnd_deg": fit.jnd, "lapse": fit.lapse,
                        "deviance": fit.deviance_by_condition})
    if boot is not None:
        lo, hi = boot.interval(fit.spread, boot.spread, None, "percentile", opts.level)
        out["spread_ci_low"], out["spread_ci_high"] = lo, hi
        out["gof_p"] = boot.gof_p_by_condition
        out["replicates_pse_on_bound"] = boot.at_bound[:, fit.layout.pse_index].mean(axis=0)
    else:
        out["spread_ci_low"] = out["spread_ci_high"] = out["gof_p"] = np.nan
        out["replicates_pse_on_bound"] = np.nan
    out["flags"] = flags        # the words of pse.csv (fitting.flags), not the fit's own phrases
    return out


def _model_test(observer, fit, alt, boot, opts) -> pd.DataFrame:
    row = {"observer": observer, "n_trials": int(fit.n_trials.sum()),
           "n_conditions": len(fit.conditions), "spread_model": opts.spread,
           "sigmoid": fit.sigmoid, "lapse": fit.lapse,
           "lapse_on_bound": fit.lapse_at_bound, "loglik": fit.loglik,
           "deviance": fit.deviance, "dof": fit.dof, "converged": fit.converged,
           "gof_p": boot.gof_p if boot is not None and fit.dof > 0 else np.nan,   # no test without df left
           "replicates": boot.n_boot if boot is not None else 0,
           "replicates_converged": float(boot.converged.mean()) if boot is not None else np.nan,
           "replicates_lapse_on_bound": (float(boot.at_bound[:, fit.layout.lapse_index].mean())
                                         if boot is not None and fit.layout.free_lapse else np.nan)}
    if alt is not None:
        shared, per = (fit, alt) if fit.layout.shared_spread else (alt, fit)
        stat = max(2.0 * (per.loglik - shared.loglik), 0.0)
        df = len(fit.conditions) - 1
        row.update(spread_lrt_stat=stat, spread_lrt_df=df,
                   spread_lrt_p=float(special.chdtrc(df, stat)))
    else:
        row.update(spread_lrt_stat=np.nan, spread_lrt_df=0, spread_lrt_p=np.nan)
    return pd.DataFrame([row])


def _curves(a: ObserverAnalysis, opts: Options, shift_ci=None) -> None:
    fit, boot, conds, notes = a.fit, a.boot, a.conditions, a.notes
    model = _CurveModel(conds, fit, notes)
    lay = fit.layout
    C = len(conds)
    # rows: point estimate, finite-difference probes (+h, -h per PSE), replicates
    probes = np.repeat(fit.pse[None], 2 * C, axis=0)
    probes[np.arange(C), np.arange(C)] += _FD_STEP
    probes[C + np.arange(C), np.arange(C)] -= _FD_STEP
    rows = [fit.pse[None], probes] + ([boot.pse] if boot is not None else [])
    stats, flags = model.statistics(np.vstack(rows))
    est = stats[0]
    grad = np.zeros((lay.n_params, stats.shape[1]))
    grad[lay.pse_index] = (stats[1:1 + C] - stats[1 + C:1 + 2 * C]) / (2 * _FD_STEP)
    reps = stats[1 + 2 * C:] if boot is not None else None
    m = model.cond_index.size
    # by-statistic: percentile for the shifts and each lag's peak offset (the column after its amplitude)
    percentile_kind = np.zeros(stats.shape[1], dtype=bool)
    percentile_kind[:m] = True
    percentile_kind[m + 1:m + 2 * len(model.tuning_lags):2] = True
    lo, hi = _intervals(boot, opts, est, reps, grad, percentile_kind)
    if shift_ci is not None:     # the PSE-table method, shifts in the same order (condition index)
        lo[:m], hi[:m] = shift_ci
    adapted = conds.iloc[model.cond_index]
    cond_flags = a.pse["flags"].to_numpy()
    shift_flags = [join(w for w in (cond_flags[c] + " " + cond_flags[model.base]).split() if w != "off-interval")
                   for c in model.cond_index]
    bare = np.array([("few-trials" in f) or ("one-sided" in f) for f in shift_flags])
    lo[:m], hi[:m] = np.where(bare, np.nan, lo[:m]), np.where(bare, np.nan, hi[:m])
    # a curve inherits the doubts of the conditions it is fitted to
    inherited = join(*(w for f in shift_flags for w in f.split()
                       if w in ("one-sided", "not-converged")))
    shift_flags = [join(f, ["off-interval"] if off_interval(e, l, h) else [])
                   for f, e, l, h in zip(shift_flags, est[:m], lo[:m], hi[:m])]
    a.aftereffect = pd.DataFrame({
        "observer": a.observer, "lag": adapted["lag"].astype("Int64").to_numpy(),
        "adapter_offset_deg": adapted["adapter_offset_deg"].to_numpy(),
        "pse_shift_deg": est[:m], "ci_low": lo[:m], "ci_high": hi[:m],
        "n_trials": adapted["n_trials"].to_numpy(), "flags": shift_flags})
    a.curves = {"offsets": model.offsets, "lags": model.lags, "peak_range": model.peak_range,
                "shift_se": np.sqrt(model.shift_var)}
    rows_t = []
    col = m
    profile_failed, known_cut = [], []
    for i in model.tuning_lags:
        sl = slice(col, col + 2)
        if reps is not None and opts.interval == BY_STATISTIC:
            limits = model.tuning_interval(i, est[:m], reps[:, :m], est[col], opts.level)
            if np.all(np.isfinite(limits)):
                lo[col], hi[col] = limits
                if not model.factor_lag(i):
                    known_cut.append(f"{model.lags[i]:g}")
            else:
                profile_failed.append(f"{model.lags[i]:g}")
        off = [off_interval(est[col], lo[col], hi[col]) or _stretched(est[col], lo[col], hi[col]),
               off_interval(est[col + 1], lo[col + 1], hi[col + 1])]
        rows_t.append({"observer": a.observer, "lag": int(model.lags[i]),
                       "amplitude_deg": est[col], "amplitude_ci_low": lo[col],
                       "amplitude_ci_high": hi[col], "peak_offset_deg": est[col + 1],
                       "peak_offset_ci_low": lo[col + 1], "peak_offset_ci_high": hi[col + 1],
                       "flags": join(inherited, ["on-bound"] if on_bound(
                           est[col + 1], lo[col + 1], hi[col + 1], model.peak_range) else [],
                           ["off-interval"] if any(off) else [],
                           ["outside-tested"] if est[col + 1] > np.abs(model.offsets).max() else [])})
        note = bound_note(f"lag {model.lags[i]:g} peak offset", est[col + 1], lo[col + 1],
                          hi[col + 1], model.peak_range, "deg")
        if note:
            notes.append(note)
        if reps is not None:
            a.curves[("tuning", int(model.lags[i]))] = reps[:, sl]
        col += 2
    if profile_failed:
        notes.append(f"tuning amplitude interval of lag {', '.join(profile_failed)}: BCa (too few replicates, "
                     "or a singular covariance of the shifts, for the profile interval)")
    if known_cut:
        notes.append(f"tuning amplitude interval of lag {', '.join(known_cut)}: profile with the shifts' "
                     f"replicate covariance taken as exact (fewer than {TUNING_FACTOR_MIN_SHIFTS} shifts to "
                     "estimate its factor)")
    a.tuning = pd.DataFrame(rows_t, columns=TUNING_COLUMNS)
    if model.decay_ok:
        a0, w, tau = est[col:col + 3]
        if reps is not None and opts.interval == BY_STATISTIC:
            limits = model.decay_interval(est[:m], reps[:, :m], tau, opts.level)
            if np.all(np.isfinite(limits)):
                lo[col + 2], hi[col + 2] = limits
            else:
                notes.append("decay interval: BCa (too few replicates, or a singular covariance of the shifts, "
                             "for the profile interval)")
        ci = [(lo[col + j], hi[col + j]) for j in range(3)]
        bound = on_bound(tau, *ci[2], TAU_BOUNDS) or on_bound(w, *ci[1], model.peak_range)
        off = off_interval(tau, *ci[2]) or (not bound and _stretched(tau, *ci[2]))
        a.decay = pd.DataFrame([{"observer": a.observer, "decay_periods": tau,
                                 "ci_low": ci[2][0], "ci_high": ci[2][1],
                                 "flags": join(inherited, ["on-bound"] if bound else [],
                                               ["off-interval"] if off else [])}],
                               columns=DECAY_COLUMNS)
        per = a.period_s
        a.decay_detail = pd.DataFrame([{
            "observer": a.observer, "amplitude0_deg": a0, "amplitude0_ci_low": ci[0][0],
            "amplitude0_ci_high": ci[0][1], "peak_offset_deg": w, "peak_offset_ci_low": ci[1][0],
            "peak_offset_ci_high": ci[1][1], "decay_periods": tau, "decay_ci_low": ci[2][0],
            "decay_ci_high": ci[2][1], "period_s": per, "decay_s": tau * per,
            "decay_s_ci_low": ci[2][0] * per, "decay_s_ci_high": ci[2][1] * per,
            "lags_used": " ".join("%g" % model.lags[i] for i in model.tuning_lags),
            "tau_on_bound_share": float(flags["decay_tau"][1 + 2 * C:].mean()) if reps is not None else np.nan}])
        for name, j, rng_, unit in (("decay", 2, TAU_BOUNDS, "periods"),
                                    ("joint peak offset", 1, model.peak_range, "deg")):
            note = bound_note(name, est[col + j], ci[j][0], ci[j][1], rng_, unit)
            if note:
                notes.append(note)
        if reps is not None:
            a.curves["decay"] = reps[:, col:col + 3]
    else:
        notes.append("fewer than 2 lags with a tuning curve: no decay fit")
    if reps is not None:
        a.curves["shift_reps"] = reps[:, :m]
