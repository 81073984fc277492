"""Profile-likelihood intervals of condition PSEs and PSE shifts.

The likelihood-ratio interval of a parameter ``psi`` (Cox & Hinkley 1974,
§9.3) is every value whose profile log-likelihood ``l_p(psi)`` (the maximum
over all other parameters with ``psi`` held at that value) lies within
``chi2_1(level) / 2`` of the maximum.  Nothing else is held fixed here: at
every trial value of ``psi`` the whole joint fit (every PSE, the spread(s)
and the lapse, inside their box) is re-maximised by the same batched solver
as the point fit (:func:`fitting.psychometric.solve_batch`).

* A condition PSE ``mu_j`` is held by closing its box (``lo = hi = psi``).
* A shift ``mu_j - mu_b`` (``b`` the baseline) is held by writing condition
  ``j``'s cells into the baseline's row at levels ``x - psi``: with a shared
  spread and lapse, ``F((x - mu_j) / s) = F((x - psi - mu_b) / s)``, so the
  merged fit has one PSE fewer and ``mu_j = mu_b + psi`` exactly.  (With one
  spread per condition this does not hold; shifts then have no profile
  interval.)

Each limit is a root of ``r(psi) = 2 (l_max - l_p(psi)) - chi2_1(level)``.
Its slope is known without extra fits: by the envelope theorem
``d l_p / d psi`` is the partial derivative of the log-likelihood in ``mu_j``
at the constrained maximum.  So Newton steps on ``psi`` (safeguarded by a
bracket and bisection) find every limit of every condition at once, one
batched re-fit per step.  This is the idea of Venzon & Moolgavkar (1988),
who solve for the limit and the constrained maximum jointly; here the two
are alternated, which lets the existing bounded solver handle the lapse
sitting on its bound.  A limit that would lie beyond the PSE box is
reported *at* the box (read it as "at least"; the tables flag ``on-bound``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from .psychometric import Layout, PsychometricFit, _arrow_derivatives, solve_batch


@dataclass
class ProfileResult:
    """Limits of one kind of statistic (PSEs or shifts) and how they were found.

    Attributes
    ----------
    low, high : ndarray (S,)
        The limits (NaN where the statistic is not estimable).
    low_on_bound, high_on_bound : ndarray (S,) bool
        The limit is the box edge: the profile never reached the cut-off.
    refits : int
        Batched re-fits used (each one re-maximises every row still open).
    """

    low: np.ndarray
    high: np.ndarray
    low_on_bound: np.ndarray
    high_on_bound: np.ndarray
    refits: int


def cutoff(level: float) -> float:
    """``chi2_1`` quantile at ``level``: twice the drop of the log-likelihood at a limit."""
    return float(special.chdtri(1, 1.0 - level))


def _find_limits(evaluate, estimate, se, box_low, box_high, level, tol, max_steps):
    """Safeguarded Newton search for both limits of S statistics, all rows at once.

    ``evaluate(rows, values, warm)`` returns ``(r, slope, warm)`` for the
    given rows (indices into the 2S rows: low limits first, then high).
    """
    s = estimate.size
    q = cutoff(level)
    z = np.sqrt(q)
    side = np.concatenate([-np.ones(s), np.ones(s)])
    est = np.concatenate([estimate, estimate])
    bound = np.concatenate([box_low, box_high])
    step0 = np.where(np.isfinite(se) & (se > 0), z * se, 0.25 * (box_high - box_low))
    step0 = np.concatenate([step0, step0])
    inner = est.copy()                                   # r < 0 here (the estimate)
    outer = bound.copy()                                 # r > 0 here once known
    outer_known = np.zeros(2 * s, dtype=bool)
    value = est + side * np.minimum(step0, np.abs(bound - est))
    limit = np.full(2 * s, np.nan)
    on_bound = np.zeros(2 * s, dtype=bool)
    open_ = np.isfinite(est)
    warm = None
    refits = 0
    for _ in range(max_steps):
        rows = np.flatnonzero(open_)
        if rows.size == 0:
            break
        r, slope, warm = evaluate(rows, value[rows], warm)
        refits += 1
        v = value[rows]
        done = np.abs(r) < tol
        limit[rows[done]] = v[done]
        # the box edge itself still inside the cut-off: the limit is the edge
        edge = (r < 0) & (np.abs(v - bound[rows]) <= 1e-9 * np.maximum(1.0, np.abs(bound[rows])))
        limit[rows[edge & ~done]] = v[edge & ~done]
        on_bound[rows[edge & ~done]] = True
        below = r < 0
        inner[rows[below]] = v[below]
        outer[rows[~below]] = v[~below]
        outer_known[rows[~below]] = True
        # Newton step on psi; its slope must point away from the estimate
        good = np.isfinite(slope) & (slope * side[rows] > 0)
        with np.errstate(over="ignore", divide="ignore"):
            newton = v - r / np.where(good, slope, 1.0)
        lo_b = np.minimum(inner[rows], outer[rows])
        hi_b = np.maximum(inner[rows], outer[rows])
        inside = good & (newton > lo_b) & (newton < hi_b)
        # no Newton step: bisect a known bracket, else move out geometrically (up to the box edge)
        grow = est[rows] + side[rows] * 3.0 * np.abs(v - est[rows])
        grow = np.where(side[rows] > 0, np.minimum(grow, bound[rows]), np.maximum(grow, bound[rows]))
        fallback = np.where(outer_known[rows], 0.5 * (inner[rows] + outer[rows]), grow)
        nxt = np.where(inside, newton, fallback)
        narrow = outer_known[rows] & (np.abs(outer[rows] - inner[rows]) < 1e-9 * (1.0 + np.abs(v)))
        limit[rows[narrow & ~done & ~edge]] = inner[rows[narrow & ~done & ~edge]]
        value[rows] = nxt
        open_[rows[done | edge | narrow]] = False
    return limit[:s], limit[s:], on_bound[:s], on_bound[s:], refits


def profile_pse(fit: PsychometricFit, level: float = 0.95, tol: float = 1e-4,
                max_steps: int = 60) -> ProfileResult:
    """Profile-likelihood intervals of every condition PSE of a joint fit.

    Parameters
    ----------
    fit : PsychometricFit
    level : float
        Confidence level.
    tol : float
        Accuracy of ``2 (l_max - l_p)`` at a limit (in chi-square units).
    max_steps : int
        Newton/bisection steps at most.

    Returns
    -------
    ProfileResult
        Limits NaN for a condition whose answers all fall on one side.
    """
    lay, cells = fit.layout, fit.cells
    C = lay.n_conditions
    j_of = np.concatenate([np.arange(C), np.arange(C)])
    nll_hat = -fit.loglik
    q = cutoff(level)
    x, n = cells.x[None], cells.n[None]

    def evaluate(rows, values, warm):
        j = lay.pse_index[j_of[rows]]
        theta0 = np.tile(fit.theta, (rows.size, 1)) if warm is None else warm[rows]
        theta0[np.arange(rows.size), j] = values
        lo = np.tile(fit.lower, (rows.size, 1))
        hi = np.tile(fit.upper, (rows.size, 1))
        lo[np.arange(rows.size), j] = hi[np.arange(rows.size), j] = values
        k = np.broadcast_to(cells.k, (rows.size,) + cells.k.shape)
        sol = solve_batch(theta0, x, n, k, lay, lo, hi, fit.sigmoid, max_iter=200, tol=1e-12)
        nll, grad, _, _ = _arrow_derivatives(sol.theta, x, n, k, lay, fit.sigmoid)
        if warm is None:
            warm = np.tile(fit.theta, (2 * C, 1))
        warm[rows] = sol.theta
        # d(-l_p)/d psi = d nll / d mu_j at the constrained optimum
        return 2.0 * (nll - nll_hat) - q, 2.0 * grad[np.arange(rows.size), j], warm

    est = np.where(_one_sided(fit), np.nan, fit.pse)
    box_lo, box_hi = fit.lower[lay.pse_index], fit.upper[lay.pse_index]
    lo, hi, lob, hib, refits = _find_limits(evaluate, est, fit.pse_se, box_lo, box_hi, level, tol, max_steps)
    return ProfileResult(lo, hi, lob, hib, refits)


def _one_sided(fit: PsychometricFit) -> np.ndarray:
    """Conditions with every answer on one side: no finite PSE, so no interval.

    (Separated answers keep a finite PSE under a shared spread, and a profile
    interval that spans the gap between the answers.)
    """
    sep = fit.separation or [""] * len(fit.conditions)
    return np.array([s.startswith("all ") for s in sep], dtype=bool)


def _merged_cells(cells, base: int, j: np.ndarray, shift: np.ndarray):
    """Per row, cells with condition ``j[r]`` moved into row ``base`` at levels ``x - shift[r]``.

    Returns ``x, n, k`` of shape (B, C - 1, 2 L) and ``keep`` (B, C - 1), the
    original index of each remaining condition.
    """
    C, L = cells.x.shape
    B = shift.size
    keep = np.array([[c for c in range(C) if c != jj] for jj in j]).reshape(B, C - 1)
    b = np.argmax(keep == base, axis=1)
    rows = np.arange(B)
    x = np.empty((B, C - 1, 2 * L))
    n = np.zeros((B, C - 1, 2 * L))
    k = np.zeros((B, C - 1, 2 * L))
    x[:, :, :L] = cells.x[keep]
    x[:, :, L:] = cells.x[keep][:, :, :1]
    n[:, :, :L], k[:, :, :L] = cells.n[keep], cells.k[keep]
    x[rows, b, L:] = cells.x[j] - shift[:, None]
    n[rows, b, L:], k[rows, b, L:] = cells.n[j], cells.k[j]
    return x, n, k, keep


def profile_shifts(fit: PsychometricFit, base: int, conditions, level: float = 0.95,
                   tol: float = 1e-4, max_steps: int = 60) -> ProfileResult:
    """Profile-likelihood intervals of ``PSE[j] - PSE[base]`` for each ``j`` in ``conditions``.

    Needs a shared spread (see the module docstring); the lapse may be free
    or fixed.  Every limit of every condition is searched in one batch.

    Returns
    -------
    ProfileResult
        Limits NaN where the condition's or the baseline's answers all fall
        on one side.
    """
    lay, cells = fit.layout, fit.cells
    if not lay.shared_spread:
        raise ValueError("profile intervals of shifts need a shared spread")
    conditions = np.asarray(conditions, dtype=int)
    S = conditions.size
    C = cells.x.shape[0]
    sub = Layout(C - 1, True, lay.lapse, lay.lapse_max)
    j_of = np.concatenate([conditions, conditions])
    nll_hat = -fit.loglik
    q = cutoff(level)
    full_x, full_n = cells.x[None], cells.n[None]
    nuisance = np.arange(C, lay.n_params)            # spread and lapse keep their place after the PSEs

    def evaluate(rows, values, warm):
        if warm is None:
            warm = np.tile(fit.theta, (2 * S, 1))
        j = j_of[rows]
        x, n, k, keep = _merged_cells(cells, base, j, values)
        sub_index = np.hstack([keep, np.broadcast_to(nuisance, (rows.size, nuisance.size))])
        take = (lambda a: np.take_along_axis(np.broadcast_to(a, (rows.size, lay.n_params)), sub_index, axis=1))
        sol = solve_batch(take(warm[rows]), x, n, k, sub, take(fit.lower), take(fit.upper), fit.sigmoid,
                          max_iter=200, tol=1e-12)
        theta = np.empty((rows.size, lay.n_params))
        np.put_along_axis(theta, sub_index, sol.theta, axis=1)
        theta[np.arange(rows.size), j] = theta[:, base] + values
        kk = np.broadcast_to(cells.k, (rows.size,) + cells.k.shape)
        nll, grad, _, _ = _arrow_derivatives(theta, full_x, full_n, kk, lay, fit.sigmoid)
        warm[rows] = theta
        return 2.0 * (nll - nll_hat) - q, 2.0 * grad[np.arange(rows.size), lay.pse_index[j]], warm

    pse = fit.pse
    cov = fit.covariance
    pi = lay.pse_index
    est = pse[conditions] - pse[base]
    se = np.sqrt(cov[pi[conditions], pi[conditions]] + cov[pi[base], pi[base]]
                 - 2.0 * cov[pi[conditions], pi[base]])
    one_sided = _one_sided(fit)
    est = np.where(one_sided[conditions] | one_sided[base], np.nan, est)
    box_lo = fit.lower[pi[conditions]] - fit.upper[pi[base]]
    box_hi = fit.upper[pi[conditions]] - fit.lower[pi[base]]
    lo, hi, lob, hib, refits = _find_limits(evaluate, est, se, box_lo, box_hi, level, tol, max_steps)
    return ProfileResult(lo, hi, lob, hib, refits)
