"""The group's χ² of agreement, calibrated by simulation (a parametric bootstrap test).

``compare`` reads the group's χ² from normal scores of residuals that are
each read against t on n_obs − 1 degrees of freedom.  That reading treats
the cells' standard errors as estimated independently, but they come from
the same few observers: an observer whose after-effect is larger than the
others' widens every cell at once, so with three observers the scores are
heavier-tailed together than one by one.  Simulated groups of 3 at 40
trials per condition rejected true predictions in 8.0 % (up–down tracks)
and 9.5 % (Bayesian) of groups that way.

Here the same statistic is drawn instead under the null hypothesis that the
predictions are the population's shifts (Davison & Hinkley 1997, Bootstrap
Methods and Their Application, §4.2): each simulated observer's shifts are

``y_i = p + b_i + e_i``,  ``e_i ~ N(0, C_i)``,  ``b_i ~ N(0, T)``,

with ``C_i`` the observer's own covariance (``aftereffect_covariance.csv``),
``p`` the predictions (plus one draw of their own error, shared by the
group, when they carry ``sd_deg``), and ``T`` the between-observer
covariance estimated from the observers: the part along their mean curve
(:func:`fitting.covariance.curve_between_covariance`) plus, per cell, what
the DerSimonian–Laird variance of that cell has beyond it.  Each simulated
group is combined and scored exactly as ``fit`` and ``compare`` score the
measured one (random-effects means with their floor, the group correlation,
the t-read normal scores), and the p value is the share of simulated χ² at
least as large as the measured one, ``(1 + #) / (1 + draws)``.

Measured by ``benchmarks/bench_coverage.py`` (``benchmarks/README.md``):
see there for the rejection rates before and after.  Within-observer
variances stay fixed at the observers' own, so the test is conditional on
them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import special

from fitting.covariance import curve_between_covariance, weighted_mean_correlation
from fitting.flags import usable
from fitting.meta import dersimonian_laird, random_effects, variance_from_interval
from fitting.scores import score_chi2

#: Simulated groups per test: the p value's Monte Carlo error at 0.05 is about 0.5 %.
DRAWS = 2000
#: Simulated groups combined at once (bounds the memory with many observers).
CHUNK = 250


@dataclass(frozen=True)
class GroupData:
    """The observers behind the group shifts, aligned on the group's cells.

    Attributes
    ----------
    shifts : ndarray (observers, cells)
        Their shifts (NaN where an observer lacks a cell).
    variances : ndarray (observers, cells)
        Their within-observer variances, from their intervals.
    within : ndarray (observers, cells, cells)
        Their own covariances (NaN rows and columns where a cell is lacking).
    level : float
        Confidence level of the intervals.
    """

    shifts: np.ndarray
    variances: np.ndarray
    within: np.ndarray
    level: float = 0.95

    @classmethod
    def from_tables(cls, shifts: pd.DataFrame, covariances: dict, cells, level: float = 0.95) -> GroupData | None:
        """Build from the observers' rows of ``aftereffect.csv`` and their covariance matrices.

        Parameters
        ----------
        shifts : DataFrame
            The observers' rows (``observer``, ``lag``, ``adapter_offset_deg``,
            ``pse_shift_deg``, ``ci_low``, ``ci_high``), the group's excluded.
        covariances : dict
            Observer → covariance of its shifts in the order of its rows;
            None for an observer without one.
        cells : sequence of (lag, offset)
            The group's cells, in the order of the statistic.

        Returns
        -------
        GroupData or None
            None when fewer than two observers, or one without a finite covariance.
        """
        index = {(float(lag), float(o)): j for j, (lag, o) in enumerate(cells)}
        p = len(index)
        ys, vs, cs = [], [], []
        for observer, rows in shifts.groupby("observer", sort=True):
            pos = np.array([index.get((float(lag), float(o)), -1)
                            for lag, o in zip(rows["lag"], rows["adapter_offset_deg"])])
            shift = rows["pse_shift_deg"].to_numpy(float)
            var = np.asarray(variance_from_interval(rows["ci_low"], rows["ci_high"], level), float)
            keep = (pos >= 0) & np.isfinite(shift) & np.isfinite(var) & (var > 0)
            if "flags" in rows:         # as fit's group rows: only the usable shifts (fitting.flags.usable)
                keep &= usable(rows["flags"])
            if not keep.any():
                continue
            cov = covariances.get(observer)
            if cov is None or np.shape(cov) != (len(rows),) * 2:
                return None
            block = np.asarray(cov, float)[np.ix_(keep, keep)]
            if not np.all(np.isfinite(block)):
                return None
            y, v, c = np.full(p, np.nan), np.full(p, np.nan), np.full((p, p), np.nan)
            y[pos[keep]], v[pos[keep]] = shift[keep], var[keep]
            c[np.ix_(pos[keep], pos[keep])] = block
            ys.append(y)
            vs.append(v)
            cs.append(c)
        if len(ys) < 2:
            return None
        return cls(np.array(ys), np.array(vs), np.array(cs), level)


def _group_estimates(data: GroupData, shifts, prediction_var):
    """Group shifts (b, cells), their covariance (b, cells, cells) and its dof, for shifts (b, k, cells)."""
    flat = np.asarray(shifts, float)
    b, k, p = flat.shape
    combined = random_effects(np.moveaxis(flat, 1, 0).reshape(k, b * p),
                              np.tile(data.variances, (1, b)), data.level)
    dof = max(k - 1, 1)
    half = special.stdtrit(dof, 0.5 + data.level / 2.0)
    est = combined.estimate.reshape(b, p)
    se = ((combined.high - combined.low) / (2.0 * half)).reshape(b, p)
    weights = np.moveaxis(combined.weights.reshape(k, b, p), 1, 0)
    corr = weighted_mean_correlation(weights, data.within, curve_between_covariance(flat, data.within))
    if corr is None:
        return est, None, dof
    cov = corr * se[:, :, None] * se[:, None, :]
    if prediction_var is not None:
        cov = cov + np.diag(prediction_var)
    return est, cov, dof


def _score(est, cov, dof, predicted, select) -> np.ndarray:
    sel = np.arange(est.shape[-1]) if select is None else np.asarray(select)
    if cov is None:
        return np.full(est.shape[0], np.nan)
    return score_chi2(est[:, sel] - predicted[sel], cov[:, sel[:, None], sel[None, :]], dof)


def group_statistic(data: GroupData, shifts, predicted, prediction_var=None, select=None) -> np.ndarray:
    """The group χ² that ``fit`` and ``compare`` give for ``shifts`` (..., observers, cells).

    ``predicted`` (cells,); ``prediction_var`` (cells,) the predictions' own
    variance (None: 0); ``select``: indices of the cells scored (a subset,
    e.g. one lag; None: all).  Returns one χ² per leading index.
    """
    y = np.asarray(shifts, float)
    pvar = None if prediction_var is None else np.asarray(prediction_var, float)
    est, cov, dof = _group_estimates(data, y.reshape((-1,) + y.shape[-2:]), pvar)
    return _score(est, cov, dof, np.asarray(predicted, float), select).reshape(y.shape[:-2])


#: Between-observer parts of the null model: along the mean curve and per cell (the default), the curve's
#: only, or the curve's and one excess shared by the cells.
BETWEEN = ("curve and cells", "curve", "curve and common excess")


def null_between(data: GroupData, between=BETWEEN[0]) -> np.ndarray:
    """Between-observer covariance ``T`` of the null model (see the module text).

    ``between``: one of :data:`BETWEEN`, or a function of ``data`` returning
    ``T`` (a candidate measured in ``benchmarks/``).

    ``between="curve"``: the part along the mean curve alone, as ``fit``'s
    group covariance has it (a measured candidate: it leaves out what the
    cells vary by on their own, and the test then rejects too often;
    ``benchmarks/README.md``).  ``between="curve and common excess"``: the
    curve part plus one variance on every cell, the mean over cells of the
    DerSimonian–Laird moment estimates beyond the curve part, clipped at 0
    once after pooling rather than per cell (a measured candidate: per-cell
    clipping biases each cell's variance upwards when there is little to
    estimate, but pooled, the excess is mostly 0 and the test rejects too
    often at 40 trials per condition; ``benchmarks/README.md``).
    """
    if callable(between):
        return between(data)
    if between not in BETWEEN:
        raise ValueError(f"between: expected one of {BETWEEN}, got {between!r}")
    curve = curve_between_covariance(data.shifts, data.within)
    if between == "curve":
        return curve
    if between == "curve and common excess":
        moments = dersimonian_laird(data.shifts, data.variances, clip=False)
        return curve + max(float(np.mean(moments - np.diagonal(curve))), 0.0) * np.eye(len(moments))
    per_cell = random_effects(data.shifts, data.variances, data.level).tau2
    extra = np.maximum(np.nan_to_num(per_cell) - np.diagonal(curve), 0.0)
    return curve + np.diag(extra)


def _root(c: np.ndarray) -> np.ndarray:
    """A square root ``L`` with ``L L' = c`` (negative eigenvalues of a noisy estimate set to 0)."""
    vals, vecs = np.linalg.eigh(c)
    return vecs * np.sqrt(np.clip(vals, 0.0, None))


def calibrated_p(data: GroupData, predicted, prediction_sd=None, selects=(None,), draws: int = DRAWS,
                 seed: int = 0, between=BETWEEN[0]) -> list[tuple[float, float]]:
    """The group χ² and its simulated p value under "the predictions are the truth".

    Parameters
    ----------
    data : GroupData
        The observers behind the group.
    predicted, prediction_sd : array_like (cells,)
        Predictions and their own standard deviations (None: exact).
    selects : sequence
        Sets of cells scored, each an array of indices (a lag's) or None
        (all); they share the simulated groups.
    draws : int
        Simulated groups.
    seed : int
        Seed of the simulation (fixed: the same files give the same p).
    between : str or callable
        Between-observer part of the null model (:func:`null_between`).

    Returns
    -------
    list of (chi2, p)
        One pair per entry of ``selects``; p is NaN where the χ² is.
    """
    rng = np.random.default_rng(seed)
    k, p = data.shifts.shape
    pred = np.asarray(predicted, float)
    pvar = None if prediction_sd is None else np.nan_to_num(np.asarray(prediction_sd, float)) ** 2
    est, cov, dof = _group_estimates(data, data.shifts[None], pvar)
    observed = [float(_score(est, cov, dof, pred, sel)[0]) for sel in selects]
    present = np.isfinite(data.shifts)
    between_root = _root(null_between(data, between))
    own = [np.flatnonzero(row) for row in present]
    roots = [_root(data.within[i][np.ix_(cells, cells)]) for i, cells in enumerate(own)]
    reached, scored = np.zeros(len(selects)), np.zeros(len(selects))
    for start in range(0, draws, CHUNK):
        n = min(CHUNK, draws - start)
        sims = np.broadcast_to(pred, (n, k, p)).copy()
        if pvar is not None:
            sims += np.sqrt(pvar) * rng.standard_normal((n, 1, p))
        sims += np.einsum("pq,bkq->bkp", between_root, rng.standard_normal((n, k, p)))
        for i, (cells, root) in enumerate(zip(own, roots)):
            sims[:, i, cells] += rng.standard_normal((n, cells.size)) @ root.T
        sims[:, ~present] = np.nan
        est, cov, dof = _group_estimates(data, sims, pvar)
        for j, (sel, x) in enumerate(zip(selects, observed)):
            simulated = _score(est, cov, dof, pred, sel)
            reached[j] += np.sum(simulated >= x)
            scored[j] += np.sum(np.isfinite(simulated))
    # a simulated group without a statistic (none expected) counts neither way
    return [(x, float((1 + n) / (1 + m)) if np.isfinite(x) and m > 0 else float("nan"))
            for x, n, m in zip(observed, reached, scored)]
