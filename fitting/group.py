"""Across observers: group rows that carry within- and between-observer uncertainty.

Group rows (observer ``group`` in the tables), made when there are two or
more observers:

* PSE and PSE shift per condition: the random-effects combination of the
  observers' estimates (:mod:`fitting.meta`: DerSimonian–Laird between-observer
  variance, Hartung–Knapp interval with t on n - 1 degrees of freedom), each
  observer's within-observer variance taken from its own interval.  The
  interval is never narrower than the fixed-effect combination of the
  observers' own intervals, so three observers who happen to agree cannot
  give a group interval far narrower than any of theirs;
* tuning per lag and decay: the same DoG / decaying-DoG fits as for one
  observer, applied to the group-mean curve (cells measured in every
  observer, equal weights), with intervals from the jackknife over observers
  (leave one observer out, refit; ``est +- t_{n-1} se_jack``), widened where
  needed to the fixed-effect combination of the observers' own intervals.
  Intervals of the peak offset and decay are clipped to their fitting bounds.

Only the observers' rows that are usable enter (:func:`fitting.flags.usable`:
no ``one-sided``, ``not-estimable`` or ``few-trials``): a PSE that is not
estimable has no error to weigh it by (answers all on one side gave
"intervals" 0.0001 deg wide, which the combination took at face value), and
a shift from fewer than ten trials has no interval.  A group row without
some observers' rows is flagged ``partial`` and the group notes name them.
The group curves use the observers whose every shift in the cells all
observers measured is usable, and only lags (and a decay) that at least one
of them has a curve of their own for.  The floors take a limit on a fitting
bound as "at least"/"at most": such an interval is at least twice its other
half wide, and one with both limits on bounds says nothing (infinitely
wide), so a group of such observers gets the whole bounded range.

A group row of fewer than three observers is flagged ``descriptive``; one
whose observers ran different protocols (:func:`flag_protocols_differ`)
``protocols-differ``.

The mixed model (statsmodels ``MixedLM``, REML, random intercept per observer)
regresses the PSE shift on adapter offset, lag and their interaction: a
simple linear summary of the whole data set, written to ``mixed_model.csv``
with a ``converged`` column.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from scipy import special

from .aftereffect import TAU_BOUNDS, fit_decay, fit_tuning, peak_bounds
from .flags import NOT_USABLE, WORDS, condense, join, on_bound
from .flags import usable as _usable_flags
from .logfile import GROUP_NAME
from .meta import random_effects, variance_from_interval
from .observer import AFTEREFFECT_COLUMNS, DECAY_COLUMNS, PSE_COLUMNS, TUNING_COLUMNS

GROUP = GROUP_NAME
MIN_OBSERVERS_FOR_INFERENCE = 3


def _t_quantile(n: np.ndarray, level: float) -> np.ndarray:
    return special.stdtrit(np.maximum(n - 1, 1), 0.5 + level / 2.0)


def _group_flags(n_obs, *extra) -> str:
    return join(["descriptive"] if n_obs < MIN_OBSERVERS_FOR_INFERENCE else [], *extra)


def usable(table: pd.DataFrame) -> np.ndarray:
    """Rows of an observers' table that group rows use (:func:`fitting.flags.usable`; all without ``flags``)."""
    return _usable_flags(table["flags"]) if "flags" in table else np.ones(len(table), dtype=bool)


def _left_out(table: pd.DataFrame, keep: np.ndarray, what: str, notes: list) -> None:
    """Add a note naming, per observer, the rows of ``table`` not kept and the words that left them out."""
    gone = table[~keep]
    if not len(gone):
        return
    total = table.groupby("observer")["observer"].size()
    parts = []
    for observer, rows in gone.groupby("observer", sort=True):
        words = {w for f in rows["flags"] for w in str(f).split() if w in NOT_USABLE}
        parts.append(f"{observer} ({len(rows)} of {total[observer]}: {' '.join(w for w in WORDS if w in words)})")
    notes.append(f"{what} leave out the observers' rows that are not usable: {', '.join(parts)}")


def _combine(values: pd.DataFrame, keys: list[str], col: str, low: str, high: str,
             level: float) -> pd.DataFrame:
    """Random-effects combination of ``col`` per ``keys`` cell across observers' usable rows.

    ``n`` counts the observers combined, ``left_out`` those whose row was
    not usable, ``n_trials`` the trials of the rows combined.
    """
    ok = usable(values)
    kept = values.assign(**{col: values[col].where(ok), "_v": np.where(
        ok, variance_from_interval(values[low], values[high], level), np.nan),
        "_trials": values["n_trials"].where(ok, 0), "_gone": (~ok).astype(int)})
    wide = kept.pivot_table(index="observer", columns=keys, values=col, dropna=False)
    var = kept.pivot_table(index="observer", columns=keys, values="_v", dropna=False)
    var = var.reindex(index=wide.index, columns=wide.columns)
    per_cell = kept.groupby(keys, sort=False)[["_trials", "_gone"]].sum().reindex(wide.columns)
    c = random_effects(wide.to_numpy(float), var.to_numpy(float), level)
    out = pd.DataFrame({"mean": c.estimate, "low": c.low, "high": c.high, "n": c.n,
                        "left_out": per_cell["_gone"].to_numpy(), "n_trials": per_cell["_trials"].to_numpy()},
                       index=wide.columns)
    return out


def _without_lone_cells(m: pd.DataFrame, what: str, names, notes: list | None, unit: str) -> pd.DataFrame:
    """The cells of ``m`` (:func:`_combine`) with 2 or more observers; a note names the others, which get no row.

    ``names``: the cells' names in the note, one per row of ``m``.
    """
    lone = (m["n"] < 2).to_numpy()
    if notes is not None and lone.any():
        shown = [n for n, x in zip(names, lone) if x]
        listed = ", ".join(shown[:4]) + (f" and {len(shown) - 4} more" if len(shown) > 4 else "")
        notes.append(f"no group {what} where fewer than 2 observers have a usable row: {lone.sum()} of {len(m)} "
                     f"{unit} ({listed})")
    return m[~lone]


def _row_flags(m: pd.DataFrame) -> list[str]:
    return [_group_flags(n, ["partial"] if gone else []) for n, gone in zip(m["n"], m["left_out"])]


def _pse_key(pse: pd.DataFrame) -> pd.DataFrame:
    """``pse`` with the column ``_k`` naming the cell group PSEs pool: baseline, or adapter offset and lag."""
    return pse.assign(_k=np.where(pse["lag"].isna(), "baseline",
                                  pse["adapter_offset_deg"].astype(str) + "|" + pse["lag"].astype(str)))


def group_pse(pse: pd.DataFrame, level: float, notes: list | None = None) -> pd.DataFrame:
    """Group rows of ``pse.csv``: random-effects PSE per condition across observers' usable rows."""
    key = _pse_key(pse)
    m = _combine(key, ["_k"], "pse_deg", "pse_ci_low", "pse_ci_high", level)
    if notes is not None:
        _left_out(pse, usable(pse), "group PSEs", notes)
    g = key[usable(key)].groupby("_k", sort=False)
    first = key.groupby("_k", sort=False).first()
    m = _without_lone_cells(m, "PSE", first.loc[m.index, "condition"], notes, "conditions")
    idx = [k for k in first.index if k in m.index]
    m = m.loc[idx]
    out = pd.DataFrame({"observer": GROUP, "condition": first.loc[idx, "condition"],
                        "adapter_offset_deg": first.loc[idx, "adapter_offset_deg"],
                        "lag": first.loc[idx, "lag"], "pse_deg": m["mean"],
                        "pse_ci_low": m["low"], "pse_ci_high": m["high"],
                        "spread_deg": g["spread_deg"].mean().reindex(idx),
                        "lapse": g["lapse"].mean().reindex(idx),
                        "n_trials": m["n_trials"].astype(int),
                        "flags": _row_flags(m)})
    return out[PSE_COLUMNS].reset_index(drop=True)


def group_aftereffect(shifts: pd.DataFrame, level: float, notes: list | None = None) -> pd.DataFrame:
    """Group rows of ``aftereffect.csv``: random-effects shift per lag and offset of the usable rows."""
    m = _combine(shifts, ["lag", "adapter_offset_deg"], "pse_shift_deg", "ci_low", "ci_high", level)
    if notes is not None:
        _left_out(shifts, usable(shifts), "group shifts", notes)
    m = _without_lone_cells(m, "shift", [f"lag {lag:g} offset {o:+g}" for lag, o in m.index], notes, "cells")
    out = m.reset_index()
    out = pd.DataFrame({"observer": GROUP, "lag": out["lag"].astype("Int64"),
                        "adapter_offset_deg": out["adapter_offset_deg"],
                        "pse_shift_deg": out["mean"], "ci_low": out["low"], "ci_high": out["high"],
                        "n_trials": out["n_trials"].astype(int).to_numpy(), "flags": _row_flags(out)})
    return out.sort_values(["lag", "adapter_offset_deg"]).reset_index(drop=True)[AFTEREFFECT_COLUMNS]


def group_weights(shifts: pd.DataFrame, level: float) -> pd.DataFrame:
    """Normalised random-effects weights of each observer's usable shift (for the group covariance).

    Returns a table indexed by the observers with a usable shift, one column
    per ``(lag, offset)``; 0 where an observer's shift is missing or not usable.
    """
    shifts = shifts[usable(shifts)]
    wide = shifts.pivot_table(index="observer", columns=["lag", "adapter_offset_deg"],
                              values="pse_shift_deg", dropna=False)
    v = shifts.assign(_v=variance_from_interval(shifts["ci_low"], shifts["ci_high"], level))
    var = v.pivot_table(index="observer", columns=["lag", "adapter_offset_deg"], values="_v",
                        dropna=False).reindex(index=wide.index, columns=wide.columns)
    c = random_effects(wide.to_numpy(float), var.to_numpy(float), level)
    return pd.DataFrame(c.weights, index=wide.index, columns=wide.columns)


def _fixed_half(own: pd.DataFrame, cols: tuple[str, str, str], level: float, bounds=None) -> float:
    """Half-width of the fixed-effect combination of observers' own intervals.

    ``cols`` names the estimate and its limits.  With ``bounds`` (the fitting
    bounds of the statistic) a limit on a bound means "at least"/"at most",
    so the interval is at least as wide as shown: its width is taken as the
    larger of the width shown and twice its other half, and an interval with
    both limits on bounds as infinitely wide (it says nothing), so the
    result is infinite when every interval is so.  0 without any interval.
    """
    if own is None or not len(own):
        return 0.0
    est, lo, hi = (own[c].to_numpy(float) for c in cols)
    width = hi - lo
    if bounds is not None:
        tol = 1e-6 * max(abs(bounds[0]), abs(bounds[1]), 1.0)
        lo_b, hi_b = np.abs(lo - bounds[0]) <= tol, np.abs(hi - bounds[1]) <= tol
        half = np.where(lo_b, hi - est, est - lo)           # the half that is not cut by a bound
        width = np.where(lo_b & hi_b, np.inf, np.where(lo_b | hi_b, np.maximum(width, 2.0 * half), width))
    var = np.asarray(variance_from_interval(0.0, width, level), float)
    var = var[~np.isnan(var) & (var > 0)]        # inf stays: an interval that says nothing
    if var.size == 0:
        return 0.0
    with np.errstate(divide="ignore"):           # every interval says nothing: no finite floor
        return float(special.ndtri(0.5 + level / 2.0) * np.sqrt(1.0 / np.sum(1.0 / var)))


def _jackknife(estimates: np.ndarray, level: float, n: int):
    """Point (row 0) and t interval from leave-one-out rows 1..n."""
    est, loo = estimates[0], estimates[1:]
    se = np.sqrt((n - 1) / n * ((loo - loo.mean(axis=0)) ** 2).sum(axis=0))
    half = _t_quantile(np.array([n]), level)[0] * se
    return est, est - half, est + half


def _widen(est, low, high, half):
    """Widen ``[low, high]`` so that each side is at least ``half`` from ``est``."""
    return min(low, est - half), max(high, est + half)


def _curve_observers(shifts: pd.DataFrame, notes: list) -> tuple[pd.DataFrame, list, bool]:
    """The group curves' observers and cells: who has every shift usable in the cells all observers measured.

    Returns the usable shifts of those observers in those cells (observers x
    cells), the observers left out, and whether the cells are fewer than all
    measured (designs that differ); notes say why anything is missing.
    """
    measured = shifts.groupby(["observer", "lag", "adapter_offset_deg"]).size().unstack(["lag", "adapter_offset_deg"])
    cells = measured.dropna(axis=1).columns            # cells measured in every observer
    if len(cells) < measured.shape[1]:
        notes.append(f"group curves use the {len(cells)} of {measured.shape[1]} (lag, adapter offset) cells that "
                     "every observer measured: the observers' designs differ")
    ok = shifts[usable(shifts)]
    wide = ok.pivot_table(index="observer", columns=["lag", "adapter_offset_deg"], values="pse_shift_deg")
    wide = wide.reindex(index=measured.index, columns=cells)
    complete = wide.notna().all(axis=1)
    left = list(wide.index[~complete])
    if left and len(cells):
        words = {w for f in shifts.loc[shifts["observer"].isin(left) & ~usable(shifts), "flags"]
                 for w in str(f).split() if w in NOT_USABLE}
        notes.append(f"group curves leave out {', '.join(left)}: not every shift of theirs is usable "
                     f"({' '.join(w for w in WORDS if w in words)})")
    return wide[complete], left, len(cells) < measured.shape[1]


def _no_group_curve(what: str, why: str, own, notes: list) -> None:
    """Say why a curve some observer has of their own has no group counterpart."""
    if own is not None and len(own):
        notes.append(f"no group {what}: {why}")


def group_curves(shifts: pd.DataFrame, level: float, notes: list, own_tuning=None, own_decay=None):
    """Group tuning rows and decay row from the mean curve; jackknife intervals.

    Parameters
    ----------
    shifts : pandas.DataFrame
        The observers' rows of ``aftereffect.csv``.
    level : float
    notes : list
        Receives the group notes (who was left out, which curve is missing and why).
    own_tuning, own_decay : pandas.DataFrame, optional
        The observers' own rows: the floor of each interval is the
        fixed-effect combination of those of the observers used
        (:func:`_fixed_half`), and a lag (or the decay) gets a group curve
        only when at least one of them has one of their own.

    Returns
    -------
    tuning, decay, decay_detail : pandas.DataFrame
    curves : dict
        ``offsets`` and ``lags`` of the curves, and for the figures ``means``:
        the equal-weight mean shift of the observers used in each cell (``lag``,
        ``adapter_offset_deg``, ``mean_shift_deg``), the points the curves are
        fitted to, and ``observers``, who they are.
    """
    empty = (pd.DataFrame(columns=TUNING_COLUMNS), pd.DataFrame(columns=DECAY_COLUMNS), pd.DataFrame(), {})
    wide, left, narrowed = _curve_observers(shifts, notes)
    observers = list(wide.index)
    n = len(observers)
    partial = ["partial"] if left else []
    if n < 2 or wide.shape[1] == 0:
        _no_group_curve("tuning or decay", f"{n} observer{'' if n == 1 else 's'} with every shift usable in the "
                        "cells all observers measured (2 needed)" if wide.shape[1] else
                        "no (lag, adapter offset) cell was measured by every observer",
                        own_tuning, notes)
        return empty
    own_tuning = None if own_tuning is None else own_tuning[own_tuning["observer"].isin(observers)]
    own_decay = None if own_decay is None else own_decay[own_decay["observer"].isin(observers)]
    lags = np.sort(wide.columns.get_level_values(0).unique().to_numpy(dtype=float))
    offsets = np.sort(wide.columns.get_level_values(1).unique().to_numpy(dtype=float))
    vals = wide.to_numpy(float)
    total = vals.sum(axis=0)
    rows = np.vstack([total / n, (total[None] - vals) / (n - 1)])    # mean, then leave-one-out means
    cube = np.zeros((rows.shape[0], lags.size, offsets.size))
    weight = np.zeros((lags.size, offsets.size))
    kk = np.searchsorted(lags, wide.columns.get_level_values(0).to_numpy(dtype=float))
    jj = np.searchsorted(offsets, wide.columns.get_level_values(1).to_numpy(dtype=float))
    cube[:, kk, jj] = rows
    weight[kk, jj] = 1.0
    prange = peak_bounds(offsets)
    tuning_rows, tuning_lags = [], []
    means = pd.DataFrame({"lag": wide.columns.get_level_values(0).to_numpy(dtype=float),
                          "adapter_offset_deg": wide.columns.get_level_values(1).to_numpy(dtype=float),
                          "mean_shift_deg": rows[0]})
    curves = {"offsets": offsets, "lags": lags, "means": means, "observers": observers}
    for i, lag in enumerate(lags):
        own = None if own_tuning is None else own_tuning[own_tuning["lag"] == lag]
        if ((weight[i] > 0) & (offsets != 0)).sum() < 3:
            if narrowed:
                _no_group_curve(f"tuning at lag {lag:g}", "fewer than 3 non-zero adapter offsets measured by "
                                "every observer", own, notes)
            continue
        if own_tuning is not None and not len(own):
            notes.append(f"no group tuning at lag {lag:g}: no observer used has a tuning curve of their own there")
            continue
        t = fit_tuning(offsets, cube[:, i], weight[i], prange)
        a, alo, ahi = _jackknife(t.amplitude, level, n)
        w, wlo, whi = _jackknife(t.peak, level, n)
        alo, ahi = _widen(a, alo, ahi, _fixed_half(own, ("amplitude_deg", "amplitude_ci_low", "amplitude_ci_high"),
                                                   level))
        wlo, whi = _widen(w, wlo, whi, _fixed_half(
            own, ("peak_offset_deg", "peak_offset_ci_low", "peak_offset_ci_high"), level, prange))
        wlo, whi = max(wlo, prange[0]), min(whi, prange[1])
        tuning_rows.append({"observer": GROUP, "lag": int(lag), "amplitude_deg": a,
                            "amplitude_ci_low": alo, "amplitude_ci_high": ahi,
                            "peak_offset_deg": w, "peak_offset_ci_low": wlo,
                            "peak_offset_ci_high": whi,
                            "flags": _group_flags(n, ["on-bound"] if on_bound(w, wlo, whi, prange) else [], partial)})
        tuning_lags.append(i)
    tuning = pd.DataFrame(tuning_rows, columns=TUNING_COLUMNS)
    decay = pd.DataFrame(columns=DECAY_COLUMNS)
    detail = pd.DataFrame()
    if len(tuning_lags) < 2:
        _no_group_curve("decay", "fewer than 2 lags with a group tuning curve", own_decay, notes)
    elif own_decay is not None and not len(own_decay):
        notes.append("no group decay: no observer used has a decay fit of their own")
    else:
        d = fit_decay(offsets, lags[tuning_lags], cube[:, tuning_lags], weight[tuning_lags], prange)
        a0 = _jackknife(d.amplitude0, level, n)
        w = _jackknife(d.peak, level, n)
        tau = _jackknife(d.tau, level, n)
        tau_ci = _widen(*tau, _fixed_half(own_decay, ("decay_periods", "ci_low", "ci_high"), level, TAU_BOUNDS))
        tau_ci = (max(tau_ci[0], TAU_BOUNDS[0]), min(tau_ci[1], TAU_BOUNDS[1]))
        bound = on_bound(tau[0], *tau_ci, TAU_BOUNDS) or on_bound(w[0], w[1], w[2], prange)
        decay = pd.DataFrame([{"observer": GROUP, "decay_periods": tau[0], "ci_low": tau_ci[0],
                               "ci_high": tau_ci[1],
                               "flags": _group_flags(n, ["on-bound"] if bound else [], partial)}],
                             columns=DECAY_COLUMNS)
        detail = pd.DataFrame([{"observer": GROUP, "amplitude0_deg": a0[0], "amplitude0_ci_low": a0[1],
                                "amplitude0_ci_high": a0[2], "peak_offset_deg": w[0],
                                "peak_offset_ci_low": max(w[1], prange[0]),
                                "peak_offset_ci_high": min(w[2], prange[1]),
                                "decay_periods": tau[0], "decay_ci_low": tau_ci[0],
                                "decay_ci_high": tau_ci[1],
                                "lags_used": " ".join("%g" % lags[i] for i in tuning_lags)}])
        curves["decay"] = (a0[0], w[0], tau[0])
        if d.tau_at_bound[0]:
            notes.append(f"group: decay on its bound ({tau[0]:.3g} periods)")
    if n < MIN_OBSERVERS_FOR_INFERENCE:
        notes.append(f"group of {n} observers: group rows are descriptive (flagged), their "
                     "intervals are not inference about a population")
    return tuning, decay, detail, curves


def protocol_identity(trials: pd.DataFrame, sidecars: dict | None) -> dict[str, tuple]:
    """What is known of each observer's protocol: its identity from the sidecars, and the logs' own settings.

    Parameters
    ----------
    trials : pandas.DataFrame
        The checked trials (:func:`fitting.tables.validate_trials`): their
        ``period_s`` and ``reference_deg`` are written in every row of a log.
    sidecars : dict or None
        Observer -> the identity of their sidecars' protocol
        (:func:`fitting.provenance.protocol_by_observer`); observers without
        a sidecar are not in it.

    Returns
    -------
    dict of str -> tuple
        Observer -> ``(sidecar identity, period_s, reference_deg)``, None
        where not known.  Without sidecars the logs still tell two motion
        periods or two reference directions apart.
    """
    sidecars = sidecars or {}
    columns = ("period_s", "reference_deg")
    logged = trials.assign(**{c: np.nan for c in columns if c not in trials}).groupby("observer", sort=False)
    logged = logged[list(columns)].first()
    return {str(o): (sidecars.get(str(o)), *(None if pd.isna(v) else round(float(v), 9) for v in row))
            for o, row in zip(logged.index, logged.itertuples(index=False))}


def logged_settings_note(identity: dict[str, tuple]) -> str | None:
    """A note naming who logged which motion period or reference direction when they differ, else None.

    ``identity``: :func:`protocol_identity`.  (Sidecars that differ are named
    by ``fitting.report.protocols_note``.)
    """
    parts = []
    for i, what, unit in ((1, "motion periods", " s"), (2, "reference directions", " deg")):
        who: dict[float, list[str]] = {}
        for observer, known in identity.items():
            if known[i] is not None:
                who.setdefault(known[i], []).append(observer)
        if len(who) > 1:
            parts.append(f"{what} " + "; ".join(
                f"{value:g}{unit} ({', '.join(names[:4])}{f' and {len(names) - 4} more' if len(names) > 4 else ''})"
                for value, names in sorted(who.items())))
    if not parts:
        return None
    return ("the observers' logs show different " + " and ".join(parts)
            + ": group rows that pool them are flagged protocols-differ")


def flag_protocols_differ(group: dict, own: dict, mixed: pd.DataFrame | None, protocols: dict) -> None:
    """Add ``protocols-differ`` to the group rows whose observers ran different protocols, in place.

    Parameters
    ----------
    group : dict
        The group tables ``pse``, ``aftereffect``, ``tuning``, ``decay`` and
        ``curves`` (:func:`group_curves`: ``observers``, those of the curves).
    own : dict
        The observers' ``pse`` and ``aftereffect`` tables.
    mixed : pandas.DataFrame or None
        The mixed model's table (:func:`mixed_model`), over every usable shift.
    protocols : dict of str -> tuple
        Observer -> what is known of their protocol (:func:`protocol_identity`):
        entries that are None are not known and passed over; observers
        differ when any entry known for two of them differs.

    A PSE or shift row pools the observers with a usable row in its cell;
    the tuning and decay rows, the observers of the group curves.
    """
    def differ(observers) -> bool:
        known = [protocols[o] for o in map(str, observers) if o in protocols]
        return any(len({k[i] for k in known} - {None}) > 1 for i in range(len(known[0]) if known else 0))

    def mark(table, rows) -> None:
        rows = np.asarray(rows, dtype=bool)
        if table is not None and rows.any():
            table.loc[rows, "flags"] = [join(f, ["protocols-differ"]) for f in table.loc[rows, "flags"]]

    pse = _pse_key(own["pse"])
    members = pse[usable(pse)].groupby("_k")["observer"].agg(differ)
    mark(group["pse"], _pse_key(group["pse"])["_k"].map(members).fillna(False))
    shifts = own["aftereffect"]
    if len(shifts) and len(group["aftereffect"]):
        cell = ["lag", "adapter_offset_deg"]
        ok = shifts[usable(shifts)].astype({"lag": float, "adapter_offset_deg": float})
        members = ok.groupby(cell)["observer"].agg(differ)
        keys = pd.MultiIndex.from_frame(group["aftereffect"][cell].astype(float))
        mark(group["aftereffect"], members.reindex(keys).fillna(False).to_numpy())
    if differ((group.get("curves") or {}).get("observers", ())):
        for name in ("tuning", "decay"):
            mark(group.get(name), np.ones(len(group.get(name, ())), dtype=bool))
    if mixed is not None and len(mixed) and len(shifts) and differ(shifts.loc[usable(shifts), "observer"].unique()):
        mark(mixed, np.ones(len(mixed), dtype=bool))


#: An observer variance below this fraction of the residual variance is the REML bound (0).
ZERO_VARIANCE = 1e-6


def mixed_model(shifts: pd.DataFrame, notes: list) -> pd.DataFrame:
    """Linear mixed model of the shift on offset, lag and offset x lag, over the observers' usable shifts.

    statsmodels ``MixedLM`` (REML) with a random intercept per observer.
    Returns a table ``term, estimate, std_error, z, p_value, ci_low,
    ci_high, converged, flags`` plus the two variance components; empty with
    a note when the data cannot support it.  statsmodels' warnings become
    one note: the distinct messages with their counts, or, when the model
    did not converge (its optimiser tries several methods, each warning),
    their number and the first.
    """
    import statsmodels.formula.api as smf

    ok = usable(shifts)
    if not ok.all():
        notes.append("the mixed model leaves out the same shifts as the group rows")
    data = shifts.loc[ok, ["observer", "lag", "adapter_offset_deg", "pse_shift_deg"]].dropna()
    data = data.astype({"lag": float, "adapter_offset_deg": float, "pse_shift_deg": float})
    cols = ["term", "estimate", "std_error", "z", "p_value", "ci_low", "ci_high", "converged",
            "flags"]
    if data["observer"].nunique() < 2 or len(data) < 6:
        notes.append("mixed model not fitted: needs at least 2 observers and 6 shifts")
        return pd.DataFrame(columns=cols)
    formula = "pse_shift_deg ~ adapter_offset_deg * lag" if data["lag"].nunique() > 1 \
        else "pse_shift_deg ~ adapter_offset_deg"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            res = smf.mixedlm(formula, data, groups=data["observer"]).fit(reml=True)
        except (np.linalg.LinAlgError, ValueError) as exc:
            notes.append(f"mixed model failed: {exc}")
            return pd.DataFrame(columns=cols)
        fe, se, ci = res.fe_params, res.bse_fe, res.conf_int()     # their warnings (a singular fit) are caught too
        z, p = res.tvalues, res.pvalues
    converged = bool(res.converged)
    messages = [str(w.message).strip().splitlines()[0].replace(" Check mle_retvals", "")
                for w in caught if str(w.message).strip()]          # statsmodels' advice to its own users
    if not converged:
        notes.append("mixed model did not converge (its rows are flagged model-not-converged)"
                     + (f"; statsmodels warned {len(messages)} times, first: {messages[0]}" if messages else ""))
    elif messages:
        notes.append(f"mixed model: statsmodels warned: {'; '.join(m.rstrip('.') for m in condense(messages))}")
    ci = ci.loc[fe.index]
    out = pd.DataFrame({"term": fe.index, "estimate": fe.to_numpy(),
                        "std_error": se.to_numpy(), "z": z.loc[fe.index].to_numpy(),
                        "p_value": p.loc[fe.index].to_numpy(),
                        "ci_low": ci.iloc[:, 0].to_numpy(), "ci_high": ci.iloc[:, 1].to_numpy()})
    scale = float(res.scale)
    tau2 = float(res.cov_re.iloc[0, 0])
    # REML keeps the observer variance >= 0; an optimum on that bound comes back as round-off
    # (1e-10, its digits set by the installed BLAS), so it is written as 0 and flagged.
    tau2_on_bound = tau2 <= ZERO_VARIANCE * scale
    extra = pd.DataFrame({"term": ["observer intercept variance", "residual variance"],
                          "estimate": [0.0 if tau2_on_bound else tau2, scale]})
    table = pd.concat([out, extra], ignore_index=True)
    table["converged"] = converged
    table["flags"] = "" if converged else "model-not-converged"
    if tau2_on_bound:
        table.loc[table["term"] == "observer intercept variance", "flags"] = join(
            table["flags"].iloc[0], ["on-bound"])
    return table[cols]
