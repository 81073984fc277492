"""Psychometric model and maximum-likelihood fits, single, joint and batched.

The model (README, Models)::

    P(cw | x) = lapse / 2 + (1 - lapse) * F((x - pse) / spread)

with ``F`` the standard normal CDF (``"gaussian"``, default) or the standard
logistic CDF (``"logistic"``).  A *joint* fit gives every condition of one
observer its own PSE, a spread that is shared (default) or per condition, and
one lapse rate shared by all conditions, free within ``[0, lapse_max]`` or
fixed.

How the fit works
-----------------
Trials are pooled by stimulus level into *cells* (level, trials, clockwise
answers), padded to a rectangle ``(conditions, levels)``.  The parameter
vector is ``(pse_1..pse_C, log spread (1 or C), lapse?)``.  One solver,
:func:`solve_batch`, maximises the likelihood for a whole batch of data sets at
once (rows of a 2-D array): it is a box-constrained Newton method with

* the exact (observed) Hessian where it gives a descent direction and the
  expected (Fisher) information otherwise, so it never walks uphill;
* an active set for parameters sitting on a bound with the gradient pointing
  out (projected Newton), which is how the lapse is kept in its interval and
  how separated data get a bounded, flagged estimate instead of an infinite
  one;
* a backtracking (Armijo) line search done for all rows together.

The point fit and all bootstrap replicates use the same solver, so they are
fitted by exactly the same rules; rows that have converged drop out of the
batch.  Every bound is reported: a parameter on its bound is flagged and gets
no standard error (the information-based error is meaningless there).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from scipy import sparse, special

from .arrow import Arrow

SIGMOIDS = ("gaussian", "logistic")
# Wichmann & Hill (2001, Perception & Psychophysics 63, 1293-1313) bound the lapse to [0, 0.06]
# (from memory); a wider box let short adaptive tracks trade the spread for lapses (the spread
# collapsed to a few hundredths of the truth with the lapse near 0.1; benchmarks/README.md).
DEFAULT_LAPSE_MAX = 0.06
_PROB_FLOOR = 1e-12
_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)


class SeparationWarning(UserWarning):
    """Answers fall entirely on one side, or levels split them perfectly."""


class FitWarning(UserWarning):
    """A fit stopped on a bound or did not converge."""


# --------------------------------------------------------------------------
# model pieces
# --------------------------------------------------------------------------

def check_sigmoid(sigmoid: str) -> str:
    """Return ``sigmoid`` if it names a known shape, else raise ``ValueError``."""
    if sigmoid not in SIGMOIDS:
        raise ValueError(f"sigmoid must be one of {SIGMOIDS}, not {sigmoid!r}")
    return sigmoid


def sigmoid_parts(z: np.ndarray, sigmoid: str = "gaussian"):
    """Return ``F(z)``, its density ``f(z)`` and the density's slope ``f'(z)``."""
    if sigmoid == "gaussian":
        cdf = special.ndtr(z)
        pdf = np.exp(-0.5 * z * z) * _INV_SQRT_2PI
        return cdf, pdf, -z * pdf
    cdf = special.expit(z)
    pdf = cdf * (1.0 - cdf)
    return cdf, pdf, pdf * (1.0 - 2.0 * cdf)


def sigmoid_quantile(q, sigmoid: str = "gaussian"):
    """Inverse of the standard sigmoid: ``F^{-1}(q)``."""
    return special.ndtri(q) if sigmoid == "gaussian" else special.logit(q)


def probability_cw(x, pse, spread, lapse, sigmoid: str = "gaussian"):
    """Probability of a clockwise answer at test offset ``x`` (degrees)."""
    z = (np.asarray(x, dtype=float) - pse) / spread
    return lapse / 2.0 + (1.0 - lapse) * sigmoid_parts(z, sigmoid)[0]


def jnd_from_spread(spread, sigmoid: str = "gaussian"):
    """Just-noticeable difference: ``spread * F^{-1}(0.75)`` (degrees)."""
    return np.asarray(spread) * float(sigmoid_quantile(0.75, sigmoid))


# --------------------------------------------------------------------------
# data and parameter layout
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class Cells:
    """Trials pooled by stimulus level, one row per condition.

    Attributes
    ----------
    x : ndarray, shape (C, L)
        Test offsets (deg); padding repeats a real level of the row.
    n : ndarray, shape (C, L)
        Trials at each level (0 for padding).
    k : ndarray, shape (C, L)
        Clockwise answers at each level.
    """

    x: np.ndarray
    n: np.ndarray
    k: np.ndarray

    @classmethod
    def from_trials(cls, levels, responses, condition=None, n_conditions=None) -> "Cells":
        """Pool single trials.

        Parameters
        ----------
        levels : array_like
            Test offset of each trial (deg).
        responses : array_like
            1 for clockwise, 0 otherwise (missed trials must be removed first).
        condition : array_like of int, optional
            Condition index 0..C-1 of each trial (all 0 if omitted).
        n_conditions : int, optional
            C; defaults to ``max(condition) + 1``.
        """
        levels = np.asarray(levels, dtype=float)
        responses = np.asarray(responses, dtype=float)
        if levels.shape != responses.shape or levels.ndim != 1:
            raise ValueError("levels and responses must be 1-D and of equal length")
        if not np.all(np.isfinite(levels)):
            raise ValueError("levels must be finite numbers")
        if not np.all((responses == 0) | (responses == 1)):
            raise ValueError("responses must be 0 or 1")
        cond = np.zeros(levels.size, dtype=int) if condition is None else np.asarray(condition, dtype=int)
        n_cond = int(cond.max()) + 1 if n_conditions is None else int(n_conditions)
        rows = []
        for c in range(n_cond):
            sel = cond == c
            if not sel.any():
                raise ValueError(f"condition {c} has no trials")
            ux, inv = np.unique(levels[sel], return_inverse=True)
            rows.append((ux, np.bincount(inv).astype(float),
                         np.bincount(inv, weights=responses[sel])))
        width = max(len(r[0]) for r in rows)
        x = np.empty((n_cond, width))
        n = np.zeros((n_cond, width))
        k = np.zeros((n_cond, width))
        for c, (ux, nn, kk) in enumerate(rows):
            m = len(ux)
            x[c, :m], x[c, m:] = ux, ux[0]
            n[c, :m], k[c, :m] = nn, kk
        return cls(x, n, k)

    @property
    def n_conditions(self) -> int:
        return self.x.shape[0]

    @property
    def trials(self) -> np.ndarray:
        """Trials per condition, shape (C,)."""
        return self.n.sum(axis=1)


@dataclass(frozen=True)
class Layout:
    """Which parameter each condition uses.

    Parameters
    ----------
    n_conditions : int
    shared_spread : bool
        One spread for all conditions (True) or one per condition.
    lapse : float or None
        ``None``: lapse is a free parameter in ``[0, lapse_max]`` shared by all
        conditions; a number: the lapse is fixed at that value.
    lapse_max : float
        Upper bound of a free lapse.
    """

    n_conditions: int
    shared_spread: bool = True
    lapse: float | None = None
    lapse_max: float = DEFAULT_LAPSE_MAX

    @property
    def free_lapse(self) -> bool:
        return self.lapse is None

    @property
    def n_spreads(self) -> int:
        return 1 if self.shared_spread else self.n_conditions

    @property
    def n_params(self) -> int:
        return self.n_conditions + self.n_spreads + int(self.free_lapse)

    @cached_property
    def pse_index(self) -> np.ndarray:
        return np.arange(self.n_conditions)

    @cached_property
    def spread_index(self) -> np.ndarray:
        """Index of the log-spread parameter used by each condition, (C,)."""
        c = self.n_conditions
        return np.full(c, c) if self.shared_spread else c + np.arange(c)

    @property
    def lapse_index(self) -> int | None:
        return self.n_conditions + self.n_spreads if self.free_lapse else None

    @cached_property
    def _local_to_global(self) -> np.ndarray:
        """(C, 3) global index of each condition's (pse, log spread, lapse); -1 = fixed."""
        lap = -1 if self.lapse_index is None else self.lapse_index
        return np.column_stack([self.pse_index, self.spread_index,
                                np.full(self.n_conditions, lap)])

    @cached_property
    def _gather_gradient(self) -> sparse.csr_array:
        idx = self._local_to_global.ravel()
        keep = idx >= 0
        return sparse.csr_array((np.ones(keep.sum()), (idx[keep], np.flatnonzero(keep))),
                                shape=(self.n_params, idx.size))

    @cached_property
    def _gather_hessian(self) -> sparse.csr_array:
        g = self._local_to_global
        rows = g[:, :, None]
        cols = g[:, None, :]
        rows, cols = np.broadcast_arrays(rows, cols)
        rows, cols = rows.ravel(), cols.ravel()
        keep = (rows >= 0) & (cols >= 0)
        target = rows[keep] * self.n_params + cols[keep]
        return sparse.csr_array((np.ones(keep.sum()), (target, np.flatnonzero(keep))),
                                shape=(self.n_params ** 2, rows.size))

    def gather_gradient(self, local: np.ndarray) -> np.ndarray:
        """Sum per-condition gradients (B, C, 3) into the parameter vector (B, P)."""
        b = local.shape[0]
        return np.asarray(self._gather_gradient @ local.reshape(b, -1).T).T

    def gather_hessian(self, local: np.ndarray) -> np.ndarray:
        """Sum per-condition blocks (B, C, 3, 3) into the parameter matrix (B, P, P)."""
        b = local.shape[0]
        p = self.n_params
        return np.asarray(self._gather_hessian @ local.reshape(b, -1).T).T.reshape(b, p, p)

    def names(self, conditions) -> list[str]:
        """Readable parameter names for the given condition labels."""
        out = [f"pse[{c}]" for c in conditions]
        out += ["log_spread"] if self.shared_spread else [f"log_spread[{c}]" for c in conditions]
        if self.free_lapse:
            out.append("lapse")
        return out

    def unpack(self, theta: np.ndarray):
        """Split parameters (B, P) into pse (B, C), spread (B, C), lapse (B,)."""
        pse = theta[:, self.pse_index]
        spread = np.exp(theta[:, self.spread_index])
        if self.free_lapse:
            lapse = theta[:, self.lapse_index]
        else:
            lapse = np.full(theta.shape[0], float(self.lapse))
        return pse, spread, lapse


# --------------------------------------------------------------------------
# likelihood and its derivatives, batched
# --------------------------------------------------------------------------

def _cell_terms(theta, x, layout, sigmoid):
    """Probabilities and pieces shared by the derivatives, all (B, C, L)."""
    pse, spread, lapse = layout.unpack(theta)
    sigma = spread[:, :, None]
    z = (x - pse[:, :, None]) / sigma
    cdf, pdf, dpdf = sigmoid_parts(z, sigmoid)
    lam = lapse[:, None, None]
    keep = 1.0 - lam
    p = np.clip(lam * 0.5 + keep * cdf, _PROB_FLOOR, 1.0 - _PROB_FLOOR)
    return p, z, sigma, keep, cdf, pdf, dpdf


def negative_loglik(theta, x, n, k, layout, sigmoid="gaussian") -> np.ndarray:
    """Negative log-likelihood of each row of ``theta`` (B,)."""
    p = _cell_terms(theta, x, layout, sigmoid)[0]
    return -(k * np.log(p) + (n - k) * np.log1p(-p)).sum(axis=(1, 2))


def probability_derivatives(theta, x, layout, sigmoid="gaussian"):
    """``p`` and its first derivatives in (pse, log spread, lapse), each (B, C, L)."""
    p, z, sigma, keep, cdf, pdf, _ = _cell_terms(theta, x, layout, sigmoid)
    return p, -keep * pdf / sigma, -keep * pdf * z, 0.5 - cdf


def _local_derivatives(theta, x, n, k, layout, sigmoid, fisher=True):
    """Negative log-likelihood and its derivatives per condition.

    Returns ``(nll (B,), grad (B, C, 3), observed (B, C, 3, 3), fisher)`` in
    the local order (pse, log spread, lapse) of each condition, with the
    signs of the *negative* log-likelihood; ``fisher`` is None unless asked.
    """
    p, z, sigma, keep, cdf, pdf, dpdf = _cell_terms(theta, x, layout, sigmoid)
    q = 1.0 - p
    nk = n - k
    nll = -(k * np.log(p) + nk * np.log1p(-p)).sum(axis=(1, 2))
    d1 = k / p - nk / q                 # d loglik / dp
    d2 = -(k / (p * p) + nk / (q * q))  # d2 loglik / dp2
    kp = keep * pdf
    first = [-kp / sigma, -kp * z]
    # second derivatives of p, in the order of _SECOND_PAIRS
    second = [keep * dpdf / (sigma * sigma), keep * (z * dpdf + pdf) / sigma,
              keep * z * (z * dpdf + pdf)]
    if layout.free_lapse:
        first.append(0.5 - cdf)
        second += [pdf / sigma, z * pdf]
    m = len(first)
    dmat = np.stack(first, axis=2)                                   # (B, C, m, L)
    b, c = theta.shape[0], x.shape[1]
    grad = np.zeros((b, c, 3))
    grad[..., :m] = -(dmat @ d1[..., None])[..., 0]
    obs = np.zeros((b, c, 3, 3))
    obs[..., :m, :m] = -(dmat * d2[:, :, None, :]) @ np.swapaxes(dmat, -1, -2)
    extra = (np.stack(second, axis=2) @ d1[..., None])[..., 0]      # (B, C, len(second))
    for s, (i, j) in enumerate(_SECOND_PAIRS[:len(second)]):
        obs[..., i, j] -= extra[..., s]
        if i != j:
            obs[..., j, i] -= extra[..., s]
    fis = None
    if fisher:
        info = n / (p * q)                  # Fisher weight of p
        fis = np.zeros((b, c, 3, 3))
        fis[..., :m, :m] = (dmat * info[:, :, None, :]) @ np.swapaxes(dmat, -1, -2)
    return nll, grad, obs, fis


def _derivatives(theta, x, n, k, layout, sigmoid, fisher=True):
    """Negative log-likelihood, its gradient and curvature matrices.

    Returns ``(nll (B,), grad (B, P), observed (B, P, P), fisher (B, P, P))``;
    ``observed`` is the exact Hessian of the negative log-likelihood and
    ``fisher`` its expectation (the Fisher information; None unless asked).
    """
    nll, grad, obs, fis = _local_derivatives(theta, x, n, k, layout, sigmoid, fisher)
    return (nll, layout.gather_gradient(grad), layout.gather_hessian(obs),
            None if fis is None else layout.gather_hessian(fis))


def _arrow_derivatives(theta, x, n, k, layout, sigmoid, fisher=False):
    """As :func:`_derivatives`, with the curvature matrices as :class:`~fitting.arrow.Arrow`."""
    nll, grad, obs, fis = _local_derivatives(theta, x, n, k, layout, sigmoid, fisher)
    arrow = (lambda a: Arrow.from_local(a, layout.shared_spread, layout.free_lapse))
    return nll, layout.gather_gradient(grad), arrow(obs), None if fis is None else arrow(fis)


_SECOND_PAIRS = [(0, 0), (0, 1), (1, 1), (0, 2), (1, 2)]


# --------------------------------------------------------------------------
# bounds and starting values
# --------------------------------------------------------------------------

def parameter_bounds(cells: Cells, layout: Layout):
    """Box for the parameters (P,) each: ``lo``, ``hi``.

    PSE: the tested range widened by its own width on each side; spread:
    1/1000 to 10 times the tested range (log scale); lapse: ``[0, lapse_max]``.
    Ranges narrower than 1 deg count as 1 deg.
    """
    used = cells.n > 0
    xmin = np.where(used, cells.x, np.inf).min(axis=1)
    xmax = np.where(used, cells.x, -np.inf).max(axis=1)
    width = np.maximum(xmax - xmin, 1.0)
    lo = np.empty(layout.n_params)
    hi = np.empty(layout.n_params)
    lo[layout.pse_index] = xmin - width
    hi[layout.pse_index] = xmax + width
    spread_width = np.full(layout.n_conditions, width.max()) if layout.shared_spread else width
    lo[layout.spread_index] = np.log(1e-3 * spread_width)
    hi[layout.spread_index] = np.log(10.0 * spread_width)
    if layout.free_lapse:
        lo[layout.lapse_index], hi[layout.lapse_index] = 0.0, layout.lapse_max
    return lo, hi


def starting_values(cells: Cells, layout: Layout, sigmoid="gaussian") -> np.ndarray:
    """A coarse grid search for (pse, spread) per condition, shape (P,)."""
    x, n, k = cells.x, cells.n, cells.k
    used = n > 0
    xmin = np.where(used, x, np.inf).min(axis=1)
    xmax = np.where(used, x, -np.inf).max(axis=1)
    width = np.maximum(xmax - xmin, 1.0)
    lapse = 0.02 * min(1.0, layout.lapse_max / 0.04) if layout.free_lapse else float(layout.lapse)
    mu_grid = xmin[:, None] + (xmax - xmin)[:, None] * np.linspace(0, 1, 21)[None, :]   # (C, G)
    sd_factor = np.geomspace(0.02, 2.0, 13)
    sd_base = np.full(x.shape[0], width.max()) if layout.shared_spread else width
    sd_grid = sd_base[:, None] * sd_factor[None, :]                                    # (C, S)
    z = (x[:, None, None, :] - mu_grid[:, None, :, None]) / sd_grid[:, :, None, None]   # (C, S, G, L)
    p = np.clip(lapse / 2 + (1 - lapse) * sigmoid_parts(z, sigmoid)[0], _PROB_FLOOR, 1 - _PROB_FLOOR)
    nll = -(k[:, None, None, :] * np.log(p) + (n - k)[:, None, None, :] * np.log1p(-p)).sum(-1)
    best_mu = nll.argmin(axis=2)                      # (C, S)
    best_nll = nll.min(axis=2)                        # (C, S)
    theta = np.empty(layout.n_params)
    if layout.shared_spread:
        s = int(best_nll.sum(axis=0).argmin())
        pick = np.full(x.shape[0], s)
        theta[layout.n_conditions] = np.log(sd_grid[0, s])
    else:
        pick = best_nll.argmin(axis=1)
        theta[layout.spread_index] = np.log(sd_grid[np.arange(x.shape[0]), pick])
    theta[layout.pse_index] = mu_grid[np.arange(x.shape[0]), best_mu[np.arange(x.shape[0]), pick]]
    if layout.free_lapse:
        theta[layout.lapse_index] = lapse
    return theta


# --------------------------------------------------------------------------
# the batched solver
# --------------------------------------------------------------------------

@dataclass
class BatchSolution:
    """Result of :func:`solve_batch` for B rows."""

    theta: np.ndarray        # (B, P)
    nll: np.ndarray          # (B,)
    converged: np.ndarray    # (B,) bool
    iterations: np.ndarray   # (B,) int
    at_bound: np.ndarray     # (B, P) bool
    observed: Arrow          # exact Hessian of the negative log-likelihood at theta


def _rows(a: np.ndarray, idx: np.ndarray) -> np.ndarray:
    """Rows ``idx`` of a batch array, or the array itself if shared (first dim 1)."""
    return a if a.shape[0] == 1 else a[idx]


def _newton_direction(obs: Arrow, grad, fixed):
    """Projected Newton direction with the exact Hessian.

    Returns the direction, the gradient with fixed parameters zeroed, and the
    rows where the direction is not a descent direction.
    """
    g = np.where(fixed, 0.0, grad)
    d = -obs.hold(fixed).solve(g)
    slope = (g * d).sum(axis=1)
    uphill = ~(np.isfinite(d).all(axis=1) & (slope < 0)) & (np.abs(g).max(axis=1) > 0)
    return np.where(np.isfinite(d), d, 0.0), g, uphill


def _fisher_direction(fis: Arrow, g, fixed):
    """Fisher-scoring direction, with a tiny ridge for non-identifiable directions."""
    fis = fis.hold(fixed)
    d = -fis.add_ridge(1e-10 * (1.0 + fis.max_abs_diagonal())).solve(g)
    return np.where(np.isfinite(d), d, 0.0)


def solve_batch(theta0, x, n, k, layout: Layout, lo, hi, sigmoid="gaussian",
                max_iter: int = 100, tol: float = 1e-10) -> BatchSolution:
    """Maximum-likelihood fits of many data sets at once.

    Parameters
    ----------
    theta0 : ndarray, shape (B, P) or (1, P)
        Starting parameters (pse, log spread, lapse).
    x, n : ndarray, shape (B, C, L) or (1, C, L)
        Levels and trials per cell (shared when the first dimension is 1).
    k : ndarray, shape (B, C, L)
        Clockwise answers per cell.
    layout : Layout
    lo, hi : ndarray, shape (B, P) or (1, P) or (P,)
        Parameter box.
    sigmoid : {"gaussian", "logistic"}
    max_iter : int
        Newton iterations at most.
    tol : float
        Converged when the Newton decrement ``-g.d`` (a log-likelihood
        difference) falls below ``tol``.

    Returns
    -------
    BatchSolution
    """
    k = np.asarray(k, dtype=float)
    b = k.shape[0]
    x = np.asarray(x, dtype=float)
    n = np.asarray(n, dtype=float)
    lo = np.atleast_2d(np.asarray(lo, dtype=float))
    hi = np.atleast_2d(np.asarray(hi, dtype=float))
    theta = np.array(np.broadcast_to(theta0, (b, layout.n_params)), dtype=float)
    theta = np.clip(theta, lo, hi)
    nll = np.full(b, np.nan)
    converged = np.zeros(b, dtype=bool)
    iterations = np.zeros(b, dtype=int)
    # derivatives at the current point, kept from the line search when its
    # first (full) step is accepted, so each Newton step costs one evaluation
    grad_c = np.empty((b, layout.n_params))
    own = 1 if layout.shared_spread else 2
    obs_c = Arrow.empty(b, layout.n_conditions, own, layout.n_params - own * layout.n_conditions)
    cached = np.zeros(b, dtype=bool)
    todo = np.arange(b)
    for _ in range(max_iter):
        if todo.size == 0:
            break
        need = todo[~cached[todo]]
        if need.size:
            f, g_, o_, _ = _arrow_derivatives(theta[need], _rows(x, need), _rows(n, need), k[need],
                                              layout, sigmoid, fisher=False)
            nll[need], grad_c[need], obs_c[need], cached[need] = f, g_, o_, True
        th = theta[todo]
        xa, na, ka = _rows(x, todo), _rows(n, todo), k[todo]
        la, ha = _rows(lo, todo), _rows(hi, todo)
        f0, grad, obs = nll[todo], grad_c[todo], obs_c[todo]
        room = 1e-9 * (ha - la)
        fixed = ((th <= la + room) & (grad > 0)) | ((th >= ha - room) & (grad < 0))
        d, g, uphill = _newton_direction(obs, grad, fixed)
        if uphill.any():
            # where the exact Hessian does not give a descent direction, use
            # the Fisher information (positive semi-definite): Fisher scoring
            u = np.flatnonzero(uphill)
            fis = _arrow_derivatives(th[u], _rows(xa, u), _rows(na, u), ka[u], layout, sigmoid,
                                     fisher=True)[3]
            d[u] = _fisher_direction(fis, g[u], fixed[u])
        decrement = -(g * d).sum(axis=1)
        done = decrement < tol
        converged[todo[done]] = True
        move = np.flatnonzero(~done)
        # backtracking line search, all moving rows together
        step = np.ones(move.size)
        accepted = np.zeros(move.size, dtype=bool)
        for attempt in range(40):
            open_ = np.flatnonzero(~accepted)
            if open_.size == 0:
                break
            rows = move[open_]
            cand = np.clip(th[rows] + step[open_, None] * d[rows], _rows(la, rows), _rows(ha, rows))
            args = (cand, _rows(xa, rows), _rows(na, rows), ka[rows], layout, sigmoid)
            if attempt == 0:
                fc, gc, oc, _ = _arrow_derivatives(*args)
            else:
                fc = negative_loglik(*args)
            change = (grad[rows] * (cand - th[rows])).sum(axis=1)
            ok = np.isfinite(fc) & (fc <= f0[rows] + 1e-4 * np.minimum(change, 0.0))
            good = open_[ok]
            target = todo[move[good]]
            theta[target] = cand[ok]
            nll[target] = fc[ok]
            if attempt == 0:
                grad_c[target], obs_c[target] = gc[ok], oc[ok]
            else:
                cached[target] = False
            accepted[good] = True
            step[open_[~ok]] *= 0.5
        iterations[todo[move]] += 1
        # a row that cannot improve (line search failed) or improves by less
        # than rounding is at a numerical optimum when its decrement is small
        # (this ends fits drifting along a flat ridge, e.g. separated data);
        # otherwise it stays flagged as not converged
        gain = f0[move] - nll[todo[move]]
        flat = ~accepted | (gain <= 1e-13 * (1.0 + np.abs(f0[move])))
        converged[todo[move[flat]]] = decrement[move[flat]] < 1e-6
        todo = todo[move[~flat]]
    stale = np.flatnonzero(~cached)     # moved by a shortened step in the last iteration
    if stale.size:
        nll[stale], _, obs_c[stale], _ = _arrow_derivatives(theta[stale], _rows(x, stale), _rows(n, stale),
                                                            k[stale], layout, sigmoid)
    room = 1e-7 * (hi - lo)
    at_bound = (theta <= lo + room) | (theta >= hi - room)
    return BatchSolution(theta, nll, converged, iterations, at_bound, obs_c)


# --------------------------------------------------------------------------
# separation and deviance
# --------------------------------------------------------------------------

def separation(cells: Cells) -> list[str]:
    """Describe, per condition, answers that a finite fit cannot follow.

    Returns ``""`` for ordinary data, ``"all clockwise"``, ``"all
    counter-clockwise"`` or ``"complete separation"`` (every clockwise answer
    at a larger offset than every counter-clockwise one).
    """
    x, n, k = cells.x, cells.n, cells.k
    has_cw = k > 0
    has_ccw = (n - k) > 0
    out = []
    for c in range(x.shape[0]):
        if not has_ccw[c].any():
            out.append("all clockwise")
        elif not has_cw[c].any():
            out.append("all counter-clockwise")
        elif x[c][has_ccw[c]].max() < x[c][has_cw[c]].min():
            out.append("complete separation")
        else:
            out.append("")
    return out


def deviance_by_condition(p, n, k) -> np.ndarray:
    """Deviance against the saturated model, summed over levels: (..., C).

    ``D = 2 * sum(k log(k / (n p)) + (n - k) log((n - k) / (n (1 - p))))``
    over cells (Wichmann & Hill 2001, part I).
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        obs = np.where(n > 0, k / np.where(n > 0, n, 1.0), 0.0)
        dev = 2.0 * (special.xlogy(k, np.where(k > 0, obs / p, 1.0))
                     + special.xlogy(n - k, np.where(n - k > 0, (1 - obs) / (1 - p), 1.0)))
    return np.where(n > 0, dev, 0.0).sum(axis=-1)


# --------------------------------------------------------------------------
# results
# --------------------------------------------------------------------------

@dataclass
class PsychometricFit:
    """Maximum-likelihood fit of one observer's conditions (or one condition).

    Attributes
    ----------
    conditions : tuple of str
        Condition labels, in row order of ``cells``.
    cells : Cells
    layout : Layout
    sigmoid : str
    theta : ndarray (P,)
        Estimates in the fitting scale: pse (deg), log spread, lapse.
    lower, upper : ndarray (P,)
        The parameter box.
    loglik : float
    converged : bool
    iterations : int
    at_bound : ndarray (P,) bool
    covariance : ndarray (P, P)
        Inverse observed information over the parameters not on a bound
        (rows and columns of bound or fixed parameters are NaN).
    separation : list of str
        Per condition, see :func:`separation`.
    """

    conditions: tuple
    cells: Cells
    layout: Layout
    sigmoid: str
    theta: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    loglik: float
    converged: bool
    iterations: int
    at_bound: np.ndarray
    covariance: np.ndarray
    separation: list = field(default_factory=list)

    # --- estimates in natural units ----------------------------------
    @property
    def pse(self) -> np.ndarray:
        """PSE per condition (deg)."""
        return self.theta[self.layout.pse_index].copy()

    @property
    def spread(self) -> np.ndarray:
        """Spread per condition (deg); equal entries when shared."""
        return np.exp(self.theta[self.layout.spread_index])

    @property
    def lapse(self) -> float:
        return float(self.layout.unpack(self.theta[None])[2][0])

    @property
    def jnd(self) -> np.ndarray:
        """JND per condition (deg): ``spread * F^{-1}(0.75)``."""
        return jnd_from_spread(self.spread, self.sigmoid)

    @property
    def standard_errors(self) -> np.ndarray:
        """Standard errors in the fitting scale (P,); NaN on a bound."""
        return np.sqrt(np.diagonal(self.covariance))

    @property
    def pse_se(self) -> np.ndarray:
        return self.standard_errors[self.layout.pse_index]

    @property
    def spread_se(self) -> np.ndarray:
        """Delta method: ``se(spread) = spread * se(log spread)``."""
        return self.spread * self.standard_errors[self.layout.spread_index]

    @property
    def lapse_se(self) -> float:
        if not self.layout.free_lapse:
            return float("nan")
        return float(self.standard_errors[self.layout.lapse_index])

    @property
    def n_trials(self) -> np.ndarray:
        return self.cells.trials

    @property
    def deviance(self) -> float:
        """Deviance against the saturated model (one cell per level)."""
        return float(self.deviance_by_condition.sum())

    @property
    def deviance_by_condition(self) -> np.ndarray:
        return deviance_by_condition(self.probabilities(), self.cells.n, self.cells.k)

    @property
    def n_cells(self) -> int:
        return int((self.cells.n > 0).sum())

    @property
    def dof(self) -> int:
        """Cells minus free parameters not on a bound."""
        free = (~self.at_bound).sum() if self.layout.n_params else 0
        return int(self.n_cells - free)

    @property
    def pse_at_bound(self) -> np.ndarray:
        return self.at_bound[self.layout.pse_index]

    @property
    def spread_at_bound(self) -> np.ndarray:
        return self.at_bound[self.layout.spread_index]

    @property
    def lapse_at_bound(self) -> bool:
        return bool(self.layout.free_lapse and self.at_bound[self.layout.lapse_index])

    @property
    def flags(self) -> list[str]:
        """Per condition, a short text of everything unusual about its fit."""
        out = []
        for c in range(len(self.conditions)):
            words = [self.separation[c]] if self.separation and self.separation[c] else []
            if self.pse_at_bound[c]:
                words.append("PSE on its bound")
            if self.spread_at_bound[c]:
                words.append("spread on its bound")
            if not self.converged:
                words.append("did not converge")
            out.append("; ".join(words))
        return out

    def probabilities(self) -> np.ndarray:
        """Fitted P(cw) at every cell, (C, L)."""
        return _cell_terms(self.theta[None], self.cells.x[None], self.layout, self.sigmoid)[0][0]

    def predict(self, x, condition: int | str = 0) -> np.ndarray:
        """Fitted P(cw) at offsets ``x`` for one condition (index or label)."""
        c = self.conditions.index(condition) if isinstance(condition, str) else int(condition)
        return probability_cw(x, self.pse[c], self.spread[c], self.lapse, self.sigmoid)

    def summary(self) -> str:
        """Readable table of estimates, errors, flags and fit statistics."""
        lines = [f"Psychometric fit ({self.sigmoid} sigmoid, "
                 f"{'shared' if self.layout.shared_spread else 'per-condition'} spread, "
                 + ("lapse free in [0, %g]" % self.layout.lapse_max if self.layout.free_lapse
                    else "lapse fixed at %g" % self.layout.lapse) + ")"]
        head = f"{'condition':<22}{'trials':>7}{'PSE':>9}{'se':>7}{'spread':>9}{'se':>7}{'JND':>8}  notes"
        lines.append(head)
        pse_se, spread_se = self.pse_se, self.spread_se
        for c, name in enumerate(self.conditions):
            lines.append(f"{str(name):<22}{int(self.n_trials[c]):>7d}{self.pse[c]:>9.3f}"
                         f"{_fmt(pse_se[c]):>7}{self.spread[c]:>9.3f}{_fmt(spread_se[c]):>7}"
                         f"{self.jnd[c]:>8.3f}  {self.flags[c]}")
        if any(self.separation):
            lines.append("separated answers: with a shared spread the PSE lies in the gap between the "
                         "answers and its se leans on the other conditions' spread; on one side, or "
                         "with a spread of its own, the value shown is bounded and has no se")
        lapse_note = " (on its bound)" if self.lapse_at_bound else ""
        lines.append(f"lapse {self.lapse:.4f} se {_fmt(self.lapse_se)}{lapse_note}")
        lines.append(f"log-likelihood {self.loglik:.4f}; deviance {self.deviance:.3f} on {self.dof} df; "
                     f"{'converged' if self.converged else 'NOT converged'} after {self.iterations} iterations")
        lines.append("units: degrees of test offset, + = clockwise; se from the observed information")
        return "\n".join(lines)


def _fmt(v) -> str:
    return "—" if not np.isfinite(v) else (f"{v:.3f}" if abs(v) < 1e3 else f"{v:.2g}")


def _estimable(layout, at_bound, sep) -> np.ndarray:
    """Parameters the data can estimate (boolean mask over the parameters).

    Not estimable: a parameter on a bound; the PSE of a condition with every
    answer on one side; and a separated condition's PSE where nothing holds its
    spread away from zero (a spread of its own, or every condition separated),
    so that any PSE in the gap between its answers fits equally well.  Under a
    spread shared with other conditions a separated condition keeps a finite
    PSE with a finite error, flagged ``separated`` in the tables.
    """
    free = ~at_bound.copy()
    all_separated = all(sep)
    for c, s in enumerate(sep):
        if s and (s.startswith("all ") or not layout.shared_spread or all_separated):
            free[layout.pse_index[c]] = False
            if not layout.shared_spread:
                free[layout.spread_index[c]] = False
    if layout.shared_spread and all_separated:
        free[layout.spread_index[0]] = False
    return free


def _information(theta, cells: Cells, layout: Layout, sigmoid) -> np.ndarray:
    """Observed information (exact Hessian of the negative log-likelihood) of one fit, (P, P)."""
    return _derivatives(theta[None], cells.x[None], cells.n[None], cells.k[None], layout, sigmoid,
                        fisher=False)[2][0]


def _covariance(info, layout, at_bound, sep):
    """Inverse of the observed information ``info`` over the estimable parameters.

    Rows of parameters that are not estimable (:func:`_estimable`) are NaN,
    and so are those of a parameter along which the information vanishes
    (one at a time, the one that loads most on the flattest direction).
    """
    free = _estimable(layout, at_bound, sep)
    cov = np.full(info.shape, np.nan)
    while free.any():
        sub = info[np.ix_(free, free)]
        if not np.isfinite(sub).all():
            break
        evals, vecs = np.linalg.eigh(sub)
        if evals[0] > 1e-12 * max(evals[-1], 1e-300):
            cov[np.ix_(free, free)] = np.linalg.inv(sub)
            break
        # a direction the answers do not pin down (e.g. a PSE in a gap between tested levels, where
        # any value fits as well): its parameter gets NaN rows, the others keep their errors
        free[np.flatnonzero(free)[np.argmax(np.abs(vecs[:, 0]))]] = False
    return cov


def _negative_curvature(info, free):
    """Rows whose observed information over the ``free`` parameters has a negative eigenvalue.

    ``info`` (B, P, P), ``free`` (B, P) bool.  Returns the rows and, for each,
    the eigenvector of the most negative eigenvalue (zero on fixed parameters).
    """
    both = free[:, :, None] & free[:, None, :]
    ok = np.isfinite(np.where(both, info, 0.0)).all(axis=(1, 2)) & free.any(axis=1)
    # fixed parameters get a unit diagonal, so they add eigenvalue 1 and never a negative one
    m = np.where(both & ok[:, None, None], info, 0.0) + np.eye(info.shape[1]) * ~free[:, None, :]
    evals, vecs = np.linalg.eigh(m)
    top = np.abs(evals).max(axis=1)
    rows = np.flatnonzero(ok & (evals[:, 0] < -1e-9 * np.maximum(top, 1.0)))
    return rows, vecs[rows, :, 0] * free[rows]


def escape_saddles(sol: BatchSolution, x, n, k, layout: Layout, lo, hi, sigmoid, free=None,
                   rounds: int = 5, max_iter: int = 100, tol: float = 1e-10) -> BatchSolution:
    """Move converged fits off stationary points that are not maxima.

    Newton's method stops wherever the gradient vanishes.  A condition whose
    answers are split symmetrically between two levels has a likelihood with
    two peaks once the shared spread is small, and a PSE that started between
    them stays on the saddle (its gradient is zero by symmetry).  Where the
    observed information over the examined parameters has a negative
    eigenvalue, the fit is searched along that eigenvector (the direction of
    negative curvature; Nocedal & Wright, 2006, *Numerical Optimization*,
    section 4.3) on a grid of steps out to the parameter box, and solved again
    from the best point if it is better.  Only fits that the arrow screen
    (:meth:`~fitting.arrow.Arrow.may_be_indefinite`) does not clear are
    decomposed densely.

    Parameters
    ----------
    sol : BatchSolution
        B fits, as from :func:`solve_batch` with the same data; updated in place.
    x, n, k, layout, lo, hi, sigmoid
        As for :func:`solve_batch` (``lo``/``hi`` of shape (P,), (1, P) or (B, P)).
    free : ndarray (B, P) or (1, P) bool, optional
        Parameters to examine, besides being off their bounds (default: all).
    rounds : int
        Searches per fit at most.
    max_iter, tol : int, float
        Of the solves from the searched points (see :func:`solve_batch`).

    Returns
    -------
    BatchSolution
        ``sol``.
    """
    x, n, k = (np.asarray(a, dtype=float) for a in (x, n, k))
    lo = np.broadcast_to(np.atleast_2d(lo), sol.theta.shape)
    hi = np.broadcast_to(np.atleast_2d(hi), sol.theta.shape)
    todo = np.arange(sol.theta.shape[0])
    for _ in range(rounds):
        examined = ~sol.at_bound[todo] & (True if free is None else _rows(free, todo))
        unsure = sol.observed[todo].hold(~examined).may_be_indefinite()
        todo, examined = todo[unsure], examined[unsure]
        if todo.size == 0:
            break
        rows, vec = _negative_curvature(sol.observed[todo].dense(), examined)
        todo, examined = todo[rows], examined[rows]
        if todo.size == 0:
            break
        reach = np.max(np.where(examined, (hi - lo)[todo], 0.0), axis=1)
        steps = np.geomspace(1e-3, 1.0, 40)
        steps = np.concatenate([steps, -steps])[None, :, None] * reach[:, None, None]    # (R, S, 1)
        cand = np.clip(sol.theta[todo][:, None] + steps * vec[:, None], lo[todo][:, None], hi[todo][:, None])
        r, s = cand.shape[:2]
        pick = np.repeat(todo, s)
        f = negative_loglik(cand.reshape(r * s, -1), _rows(x, pick), _rows(n, pick), k[pick], layout,
                            sigmoid).reshape(r, s)
        f = np.where(np.isfinite(f), f, np.inf)
        best = f.argmin(axis=1)
        better = f[np.arange(r), best] < sol.nll[todo] - 1e-9
        todo, start = todo[better], cand[np.flatnonzero(better), best[better]]
        if todo.size == 0:
            break
        again = solve_batch(start, _rows(x, todo), _rows(n, todo), k[todo], layout, lo[todo], hi[todo], sigmoid,
                            max_iter, tol)
        sol.theta[todo], sol.nll[todo], sol.converged[todo] = again.theta, again.nll, again.converged
        sol.iterations[todo] += again.iterations
        sol.at_bound[todo], sol.observed[todo] = again.at_bound, again.observed
    return sol


def fit_cells(cells: Cells, conditions=None, spread: str = "shared", lapse="free",
              sigmoid: str = "gaussian", lapse_max: float = DEFAULT_LAPSE_MAX,
              warn: bool = True) -> PsychometricFit:
    """Joint maximum-likelihood fit of pooled trials.

    Parameters
    ----------
    cells : Cells
    conditions : sequence of str, optional
        Labels (default ``"0", "1", ...``).
    spread : {"shared", "per_condition"}
    lapse : "free" or float
        ``"free"`` estimates one lapse in ``[0, lapse_max]``; a number fixes it.
    sigmoid : {"gaussian", "logistic"}
    lapse_max : float
    warn : bool
        Emit :class:`SeparationWarning` / :class:`FitWarning` when the data
        call for it (the flags are set either way).

    Returns
    -------
    PsychometricFit
    """
    check_sigmoid(sigmoid)
    if spread not in ("shared", "per_condition"):
        raise ValueError("spread must be 'shared' or 'per_condition'")
    fixed = None if lapse == "free" else float(lapse)
    layout = Layout(cells.n_conditions, spread == "shared", fixed, lapse_max)
    conditions = tuple(str(c) for c in (conditions if conditions is not None else range(cells.n_conditions)))
    lo, hi = parameter_bounds(cells, layout)
    theta0 = starting_values(cells, layout, sigmoid)
    sol = solve_batch(theta0[None], cells.x[None], cells.n[None], cells.k[None], layout,
                      lo, hi, sigmoid, max_iter=200, tol=1e-12)
    sep = separation(cells)
    sol = escape_saddles(sol, cells.x[None], cells.n[None], cells.k[None], layout, lo, hi, sigmoid,
                         free=_estimable(layout, sol.at_bound[0], sep)[None], max_iter=200, tol=1e-12)
    info = _information(sol.theta[0], cells, layout, sigmoid)
    theta = sol.theta[0]
    at_bound = sol.at_bound[0]
    fit = PsychometricFit(conditions, cells, layout, sigmoid, theta, lo, hi, float(-sol.nll[0]),
                          bool(sol.converged[0]), int(sol.iterations[0]), at_bound,
                          _covariance(info, layout, at_bound, sep), sep)
    if warn:
        for c, s in enumerate(sep):
            if s:
                what = ("its PSE and spread are bounded and flagged, not estimable from these answers"
                        if not np.isfinite(fit.covariance[layout.pse_index[c], layout.pse_index[c]]) else
                        "flagged; its PSE and its error lean on the spread shared with the other conditions")
                warnings.warn(SeparationWarning(f"condition {conditions[c]}: {s}; {what}"), stacklevel=2)
        if not fit.converged:
            warnings.warn(FitWarning("the psychometric fit did not converge"), stacklevel=2)
    return fit


def fit_psychometric(levels, responses, sigmoid: str = "gaussian", lapse="free",
                     lapse_max: float = DEFAULT_LAPSE_MAX) -> PsychometricFit:
    """Fit one condition from single trials.

    Parameters
    ----------
    levels : array_like
        Test offset of each trial (deg, + = clockwise).
    responses : array_like
        1 = clockwise answer, 0 = counter-clockwise.
    sigmoid, lapse, lapse_max
        As in :func:`fit_cells`.

    Examples
    --------
    >>> fit = fit_psychometric([-4, -2, 0, 2, 4] * 8, [0, 0, 1, 1, 1] * 8)  # doctest: +SKIP
    >>> print(fit.summary())                                              # doctest: +SKIP
    """
    return fit_cells(Cells.from_trials(levels, responses), ("all",), "shared", lapse,
                     sigmoid, lapse_max)


def fit_joint(levels, responses, condition, spread: str = "shared", lapse="free",
              sigmoid: str = "gaussian", lapse_max: float = DEFAULT_LAPSE_MAX) -> PsychometricFit:
    """Fit several conditions of one observer together from single trials.

    ``condition`` holds a label per trial; conditions are ordered by first
    appearance.  See :func:`fit_cells` for the other parameters.
    """
    labels, codes = _codes(condition)
    cells = Cells.from_trials(levels, responses, codes, len(labels))
    return fit_cells(cells, labels, spread, lapse, sigmoid, lapse_max)


def _codes(condition):
    condition = [str(c) for c in condition]
    labels = list(dict.fromkeys(condition))
    where = {c: i for i, c in enumerate(labels)}
    return tuple(labels), np.array([where[c] for c in condition])
