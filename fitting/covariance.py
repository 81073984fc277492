"""Covariance of the PSE shifts, written by ``fit`` and used by ``compare``.

The shifts of one observer all subtract the same baseline PSE, so their
errors are correlated (about 0.4 with equal trial counts); treating them as
independent inflates a chi-square of agreement.  ``fit`` therefore writes
``aftereffect_covariance.csv``, in long form, one row per pair of cells:

``observer, lag_a, adapter_offset_a_deg, lag_b, adapter_offset_b_deg,
covariance_deg2, replicates, dof, spread_dof, shift_parameters``

* observers: the covariance of the paired bootstrap replicates of their
  shifts (``replicates`` = their number, ``dof`` empty), and ``spread_dof``,
  the degrees of freedom of the fitted spread (:func:`spread_dof`): the
  shifts' errors scale with the spread, which is itself estimated, so
  ``compare`` reads ``r' V^-1 r / n`` against F(n, spread_dof) (stream
  fits write theirs the same way, from the n-back fit's one spread);
* ``shift_parameters`` (stream fits): the fitted parameters the shift of
  cell a is a function of, e.g. ``a1 w`` (the amplitude at lag 0 and the
  peak offset).  The n-back shifts are a difference-of-Gaussians curve, so
  the covariance of 30 cells has rank 4 (K amplitudes and w): ``compare``
  reads the χ² of a set of cells on as many degrees of freedom as the
  distinct parameters behind them, over the covariance's leading
  directions.  Empty for adapt–test fits: each shift has its own PSEs;
* ``group``: ``D R D`` with ``R`` the correlation of the random-effects
  weighted mean under the observers' own covariances plus the
  between-observer variance along the group's mean curve (observers whose
  after-effects differ in size move every cell together;
  :func:`curve_between_covariance`, ``between="curve"``), and
  ``D`` the group standard errors implied by the group intervals
  (``(high - low) / (2 t_{n-1})``); ``dof`` = n - 1 tells ``compare`` to
  read the standardised residuals against t, not normal, quantiles.
  At 40 trials per condition simulated groups of 3 rejected the truth in
  10.3 % (up–down tracks, 1,056 observers) and 11.2 % (Bayesian, 264)
  without the curve part, and in 8.0 % and 9.5 % with it, reading χ²(n);
  ``compare`` now reads the group's p value from groups simulated from
  the observers' rows of this file instead (:mod:`fitting.group_chi2`).
  ``between="cells"`` adds instead the whole between-observer covariance
  across cells (method of moments): measured and not used, because with
  3-8 observers its noisy estimate makes the χ² reject the truth in 16-36 %
  of groups (``benchmarks/README.md``).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import NamedTuple

import numpy as np
import pandas as pd
from scipy import special

COVARIANCE_COLUMNS = ["observer", "lag_a", "adapter_offset_a_deg", "lag_b", "adapter_offset_b_deg",
                      "covariance_deg2", "replicates", "dof", "spread_dof", "shift_parameters"]


def long_table(observer, lags, offsets, cov, replicates, dof, spread_dof=np.nan,
               shift_parameters=None) -> pd.DataFrame:
    """The long form of ``cov`` (n cells × n cells); ``shift_parameters``: one text per cell or None."""
    n = len(lags)
    ia, ib = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    ia, ib = ia.ravel(), ib.ravel()
    lags, offsets = np.asarray(lags, float), np.asarray(offsets, float)
    return pd.DataFrame({"observer": observer, "lag_a": lags[ia].astype(int),
                         "adapter_offset_a_deg": offsets[ia], "lag_b": lags[ib].astype(int),
                         "adapter_offset_b_deg": offsets[ib], "covariance_deg2": cov.ravel(),
                         "replicates": replicates, "dof": dof, "spread_dof": spread_dof,
                         "shift_parameters": "" if shift_parameters is None else np.asarray(shift_parameters)[ia]})


def spread_dof(log_spread) -> float:
    """Degrees of freedom of a fitted spread, from the bootstrap replicates of its logarithm.

    A variance estimate on ν degrees of freedom is a scaled χ²_ν / ν, whose
    logarithm has variance about 2 / ν; so ν = 1 / (2 Var*(log s)), with
    ``Var*`` over the replicates (Satterthwaite 1946, Biometrics Bulletin 2,
    110).

    Parameters
    ----------
    log_spread : array_like (R,)
        Replicates of the log spread (for a fit with one spread per
        condition, their mean over conditions); non-finite ones are skipped.

    Returns
    -------
    float
        ν; NaN with fewer than three replicates or when the spread did not
        vary (``compare`` then reads the residuals against t, as for files
        without the column).
    """
    values = np.asarray(log_spread, float)
    values = values[np.isfinite(values)]
    var = float(np.var(values, ddof=1)) if values.size >= 3 else 0.0
    return 1.0 / (2.0 * var) if var > 0 else float("nan")


def observer_covariance(analysis) -> pd.DataFrame | None:
    """Long covariance table of one observer's shifts from its bootstrap replicates."""
    reps = analysis.curves.get("shift_reps") if analysis.curves else None
    if reps is None or reps.shape[0] < 3 or not len(analysis.aftereffect):
        return None
    cov = np.atleast_2d(np.cov(reps, rowvar=False))
    ae = analysis.aftereffect
    boot = analysis.boot
    log_spreads = ([] if boot is None else
                   boot.theta[:, np.unique(analysis.fit.layout.spread_index)].mean(axis=1))
    return long_table(analysis.observer, ae["lag"].to_numpy(float), ae["adapter_offset_deg"].to_numpy(float),
                      cov, reps.shape[0], np.nan, spread_dof(log_spreads))


def between_observer_covariance(shifts: np.ndarray, within: list[np.ndarray]) -> np.ndarray:
    """Method-of-moments covariance of the observers' true shifts across cells.

    ``shifts`` is observers × cells (NaN: not measured), ``within`` each
    observer's (cells, cells) covariance of its own errors.  With equal
    weights, ``E[S] = T + mean(C_i)`` for the sample covariance ``S`` of the
    observers' shifts, so ``T = S - mean(C_i)`` (the identity-weight case of
    the matrix method of moments of Jackson, White & Riley, 2013, Biometrical
    Journal 55), taken pair of cells by pair of cells over the observers that
    have both, then made positive semi-definite by setting its negative
    eigenvalues to zero, as they do.
    """
    y = np.asarray(shifts, float)
    k, p = y.shape
    t = np.zeros((p, p))
    for a in range(p):
        for b in range(a, p):
            both = np.isfinite(y[:, a]) & np.isfinite(y[:, b])
            if both.sum() < 2:
                continue
            ya, yb = y[both, a], y[both, b]
            s_ab = float(np.sum((ya - ya.mean()) * (yb - yb.mean())) / (both.sum() - 1))
            c_ab = float(np.mean([within[i][a, b] for i in np.flatnonzero(both)]))
            t[a, b] = t[b, a] = s_ab - c_ab
    vals, vecs = np.linalg.eigh(t)
    return (vecs * np.clip(vals, 0.0, None)) @ vecs.T


def curve_between_covariance(shifts: np.ndarray, within) -> np.ndarray:
    """Between-observer covariance along the observers' mean curve only (rank one).

    Observers whose after-effects differ mainly in size (a gain per
    observer) move all cells together along the mean curve ``m``; with
    ``u = m / |m|``, the variance of ``u'y_i`` over observers less the mean
    of their own ``u'C_i u`` (clipped at 0) is that component's variance
    (the equal-weight method-of-moments estimate of a between-study
    variance: Hedges, 1983, Psychological Bulletin 93; DerSimonian &
    Kacker, 2007, Contemporary Clinical Trials 28, eq. 6), and ``τ_u² u u'``
    its covariance.  One number from the observers instead of a cells ×
    cells matrix (:func:`between_observer_covariance`).

    Parameters
    ----------
    shifts : ndarray (..., observers, cells)
        The observers' shifts; NaN where an observer lacks a cell.  Leading
        axes hold independent sets (simulated ones, :mod:`fitting.group_chi2`).
    within : array_like (observers, cells, cells)
        Each observer's covariance of its own errors (NaN entries: none).

    Returns
    -------
    ndarray (..., cells, cells)
    """
    y = np.asarray(shifts, float)
    c = np.nan_to_num(np.asarray(within, float))
    k, p = y.shape[-2:]
    m = np.nanmean(y, axis=-2)
    norm = np.sqrt(np.nansum(m * m, axis=-1, keepdims=True))
    if k < 2:
        return np.zeros(y.shape[:-2] + (p, p))
    u = np.nan_to_num(m / np.where(norm > 0, norm, np.inf))
    proj = np.einsum("...kp,...p->...k", np.nan_to_num(y - m[..., None, :]), u)
    own = np.einsum("...p,kpq,...q->...k", u, c, u)
    tau2 = np.maximum(0.0, np.sum(proj ** 2, axis=-1) / (k - 1) - own.mean(axis=-1))
    return tau2[..., None, None] * u[..., :, None] * u[..., None, :]


def weighted_mean_correlation(weights, within, between):
    """Correlation across cells of the weighted mean ``sum_i w_i y_i`` of the observers.

    Each observer's errors have covariance ``within[i] + between`` (its own
    and the between-observer part); ``weights`` (..., observers, cells) are
    the normalised random-effects weights (0 where an observer lacks a cell).

    Returns
    -------
    ndarray (..., cells, cells), or None where a cell has no variance.
    """
    w = np.asarray(weights, float)
    cov = (np.einsum("...kp,...kq,kpq->...pq", w, w, np.nan_to_num(np.asarray(within, float)))
           + np.einsum("...kp,...kq->...pq", w, w) * between)
    sd = np.sqrt(np.einsum("...pp->...p", cov))
    if not np.all(sd > 0):
        return None
    return cov / (sd[..., :, None] * sd[..., None, :])


#: What a group covariance adds to the observers' own: nothing, the curve part (``fit``), every cell pair.
_BETWEEN = {"none": lambda y, within: np.zeros((y.shape[1], y.shape[1])), "curve": curve_between_covariance,
            "cells": between_observer_covariance}


def group_covariance(analyses, group_shifts: pd.DataFrame, weights: pd.DataFrame,
                     level: float, between: str | Callable = "curve") -> pd.DataFrame | None:
    """Long covariance table of the group shifts (see the module text).

    ``between``: ``"curve"`` (the observers' own covariances and the
    between-observer variance along the group's mean curve; ``fit``'s
    rule), ``"none"`` (their own covariances only), ``"cells"`` (with the
    whole method-of-moments between-observer covariance; a measured
    candidate), or a function ``(shifts, within, cells) -> (cells, cells)``
    giving the between-observer part (benchmark candidates).
    """
    if not callable(between) and between not in _BETWEEN:
        raise ValueError(f"between: expected one of {tuple(_BETWEEN)}, got {between!r}")
    if group_shifts is None or not len(group_shifts):
        return None
    cells = list(zip(group_shifts["lag"].astype(float), group_shifts["adapter_offset_deg"].astype(float)))
    index = {c: i for i, c in enumerate(cells)}
    p = len(cells)
    own_cov, own_w, values = [], [], []
    for a in analyses:
        reps = a.curves.get("shift_reps") if a.curves else None
        if reps is None or a.observer not in weights.index:
            continue
        ae = a.aftereffect
        own = [index.get((float(lag), float(o))) for lag, o in zip(ae["lag"], ae["adapter_offset_deg"])]
        # the cells the group combined this observer's shift in (weight > 0: not left out as unusable)
        keep = [j for j, i in enumerate(own)
                if i is not None and np.nan_to_num(weights.loc[a.observer].get(cells[i], 0.0)) > 0]
        if not keep:
            continue
        pos = np.array([own[j] for j in keep])
        c = np.full((p, p), np.nan)
        c[np.ix_(pos, pos)] = np.atleast_2d(np.cov(reps[:, keep], rowvar=False))
        w = np.zeros(p)
        w[pos] = [weights.loc[a.observer].get(cells[i], 0.0) for i in pos]
        y = np.full(p, np.nan)
        y[pos] = ae["pse_shift_deg"].to_numpy(float)[keep]
        own_cov.append(c)
        own_w.append(w)
        values.append(y)
    n_obs = len(own_cov)
    if n_obs < 2:
        return None
    y = np.array(values)
    t = between(y, own_cov, cells) if callable(between) else _BETWEEN[between](y, own_cov)
    corr = weighted_mean_correlation(np.array(own_w), np.array(own_cov), t)
    if corr is None:
        return None
    dof = max(n_obs - 1, 1)
    q = special.stdtrit(dof, 0.5 + level / 2.0)
    se = (group_shifts["ci_high"].to_numpy(float) - group_shifts["ci_low"].to_numpy(float)) / (2 * q)
    cov = corr * np.outer(se, se)
    return long_table(str(group_shifts["observer"].iloc[0]), [c[0] for c in cells], [c[1] for c in cells],
                      cov, np.nan, dof)


class ShiftCovariance(NamedTuple):
    """One observer's (or the group's) rows of ``aftereffect_covariance.csv`` as a matrix."""

    matrix: np.ndarray | None
    replicates: float
    dof: float
    spread_dof: float
    rank: int = 0


#: No covariance: no file, or not the observer or a cell of it.
NO_COVARIANCE = ShiftCovariance(None, np.nan, np.nan, np.nan)


def covariance_matrix(table: pd.DataFrame, observer: str, lags, offsets) -> ShiftCovariance:
    """The (n, n) covariance of ``observer``'s cells in the given order, with its replicates and dofs.

    The matrix is None (and the numbers NaN) when the table lacks the
    observer or a cell; ``spread_dof`` is NaN when the table has no such
    column (files written before it).  ``rank``: the number of cells, or,
    when every cell names its ``shift_parameters``, the number of distinct
    parameters behind them if that is smaller.
    """
    rows = table[table["observer"].astype(str) == str(observer)]
    if not len(rows):
        return NO_COVARIANCE
    look = {(float(r.lag_a), float(r.adapter_offset_a_deg), float(r.lag_b), float(r.adapter_offset_b_deg)):
            float(r.covariance_deg2) for r in rows.itertuples()}
    cells = list(zip(np.asarray(lags, float), np.asarray(offsets, float)))
    out = np.empty((len(cells), len(cells)))
    for i, (la, oa) in enumerate(cells):
        for j, (lb, ob) in enumerate(cells):
            v = look.get((la, oa, lb, ob))
            if v is None:
                return NO_COVARIANCE
            out[i, j] = v
    rank = len(cells)
    if "shift_parameters" in rows:
        names = {(float(r.lag_a), float(r.adapter_offset_a_deg)): str(r.shift_parameters).split()
                 for r in rows.itertuples() if isinstance(r.shift_parameters, str)}
        if all(names.get(c) for c in cells):
            rank = min(rank, len({p for c in cells for p in names[c]}))
    first = rows.iloc[0]
    return ShiftCovariance(out, float(first["replicates"]), float(first["dof"]),
                           float(first["spread_dof"]) if "spread_dof" in rows else np.nan, rank)
