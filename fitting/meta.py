"""Random-effects combination of observers' estimates (pure numpy).

For each statistic (a column), observers ``i = 1..k`` give an estimate
``y_i`` with a within-observer variance ``v_i`` (from their own interval).
The group estimate and its interval carry both sources of uncertainty:

* between-observer variance ``tau^2`` by DerSimonian & Laird (1986):
  ``Q = sum w_i (y_i - y_FE)^2`` with ``w_i = 1 / v_i``,
  ``tau^2 = max(0, (Q - (k - 1)) / (sum w - sum w^2 / sum w))``;
* random-effects mean ``mu = sum w*_i y_i / sum w*_i``, ``w*_i = 1 / (v_i + tau^2)``;
* Hartung & Knapp (2001) variance ``q / sum w*`` with
  ``q = sum w*_i (y_i - mu)^2 / (k - 1)`` and t quantiles on ``k - 1``
  degrees of freedom;
* a floor: the half-width is at least that of the fixed-effect
  (inverse-variance) combination of the observers' own intervals,
  ``z sqrt(1 / sum w)``, so observers who agree by chance cannot make the
  group interval narrower than their own intervals allow.

Knapp & Hartung's (2003) truncation ``max(1, q)`` is available but not the
default: with three observers it made every group interval of the coverage
benchmark hold the truth (100 %, at 1.3 times the width), while the floor
alone gives 98 % with 3 and 96-97 % with 8 observers in a simulation of the
combination step (``benchmarks/README.md``).  With few observers (k < 3) the
result is descriptive only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special


@dataclass(frozen=True)
class Combined:
    """Per statistic (S,): the random-effects combination.

    Attributes
    ----------
    estimate, low, high, se : ndarray
        Random-effects mean, its interval and the (Hartung–Knapp) standard error.
    tau2 : ndarray
        DerSimonian–Laird between-observer variance.
    fixed_se : ndarray
        Standard error of the fixed-effect (inverse-variance) mean.
    n : ndarray of int
        Observers that had the statistic.
    weights : ndarray (k, S)
        Normalised random-effects weights (0 where an observer lacks it).
    """

    estimate: np.ndarray
    low: np.ndarray
    high: np.ndarray
    se: np.ndarray
    tau2: np.ndarray
    fixed_se: np.ndarray
    n: np.ndarray
    weights: np.ndarray


def dersimonian_laird(y, v, clip: bool = True):
    """DerSimonian–Laird ``tau^2`` per column of ``y`` (k, S); NaN cells are left out.

    ``clip=False`` keeps the moment estimate's negative values (to be pooled
    over columns before clipping, :mod:`fitting.group_chi2`).
    """
    y, v = np.asarray(y, float), np.asarray(v, float)
    ok = np.isfinite(y) & np.isfinite(v) & (v > 0)
    w = np.where(ok, 1.0 / np.where(ok, v, 1.0), 0.0)
    yy = np.where(ok, y, 0.0)
    sw = w.sum(axis=0)
    fe = (w * yy).sum(axis=0) / np.where(sw > 0, sw, 1.0)
    q = (w * (yy - fe) ** 2).sum(axis=0)
    k = ok.sum(axis=0)
    c = sw - (w * w).sum(axis=0) / np.where(sw > 0, sw, 1.0)
    tau2 = np.where(c > 0, (q - (k - 1)) / np.where(c > 0, c, 1.0), 0.0)
    return np.maximum(0.0, tau2) if clip else tau2


def random_effects(y, v, level: float = 0.95, truncate: bool = False, floor: bool = True) -> Combined:
    """Combine k observers' estimates ``y`` (k, S) with variances ``v`` (k, S).

    Parameters
    ----------
    y, v : array_like (k, S) or (k,)
        Estimates and their within-observer variances; NaN marks a missing one.
    level : float
        Confidence level.
    truncate : bool
        Knapp & Hartung's (2003) ``max(1, q)``.
    floor : bool
        Keep the half-width at least the fixed-effect one; ``False`` and
        ``truncate=False`` give the plain Hartung–Knapp interval (for checks
        against references).

    Returns
    -------
    Combined
        NaN where fewer than two observers have the statistic.
    """
    y = np.asarray(y, float)
    v = np.asarray(v, float)
    squeeze = y.ndim == 1
    y, v = (y[:, None], v[:, None]) if squeeze else (y, v)
    ok = np.isfinite(y) & np.isfinite(v) & (v > 0)
    k = ok.sum(axis=0)
    tau2 = dersimonian_laird(y, v)
    ws = np.where(ok, 1.0 / (np.where(ok, v, 1.0) + tau2), 0.0)
    w = np.where(ok, 1.0 / np.where(ok, v, 1.0), 0.0)
    yy = np.where(ok, y, 0.0)
    sws = ws.sum(axis=0)
    safe = np.where(sws > 0, sws, 1.0)
    mu = (ws * yy).sum(axis=0) / safe
    dof = np.maximum(k - 1, 1)
    q = (ws * (yy - mu) ** 2).sum(axis=0) / dof
    if truncate:
        q = np.maximum(q, 1.0)
    se = np.sqrt(q / safe)
    sw = w.sum(axis=0)
    fixed_se = np.sqrt(1.0 / np.where(sw > 0, sw, np.nan))
    t = special.stdtrit(dof, 0.5 + level / 2.0)
    z = special.ndtri(0.5 + level / 2.0)
    half = np.maximum(t * se, z * fixed_se) if floor else t * se
    bad = k < 2
    nan = np.where(bad, np.nan, 1.0)
    out = Combined(mu * nan, (mu - half) * nan, (mu + half) * nan, se * nan, tau2 * nan,
                   fixed_se * nan, k, ws / safe)
    if squeeze:
        return Combined(*(a[0] if a.ndim == 1 else a[:, 0] for a in
                          (out.estimate, out.low, out.high, out.se, out.tau2, out.fixed_se, out.n,
                           out.weights)))
    return out


def variance_from_interval(low, high, level: float = 0.95):
    """Within-observer variance implied by an interval: ``((high - low) / (2 z))^2``."""
    z = special.ndtri(0.5 + level / 2.0)
    return ((np.asarray(high, float) - np.asarray(low, float)) / (2.0 * z)) ** 2
