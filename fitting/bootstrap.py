"""Parametric bootstrap of a joint psychometric fit; percentile and BCa intervals.

Replicate data sets are drawn from the fitted model at the observer's own
levels and trial counts (Wichmann & Hill 2001, part II): at every cell,
``k* ~ Binomial(n, p_hat)``.  All replicates, and all conditions within each,
are then refitted *together* by :func:`fitting.psychometric.solve_batch` —
one batched Newton solve on arrays of shape (replicates, conditions, levels),
with the lapse refitted in every replicate inside its bounds, exactly as in
the point fit.  Replicates are processed in chunks only to drive the progress
bar and bound memory; the arithmetic of a replicate does not depend on the
chunk it falls in.

Intervals
---------
* percentile: the replicate quantiles;
* studentized, or bootstrap-t (Efron & Tibshirani 1993, ch. 12; Davison &
  Hinkley 1997, §5.2): ``t* = (T* - T_gen) / se*`` with ``se*`` from each
  replicate's own observed information, and limits ``T - t*_{1-a/2} se``,
  ``T - t*_{a/2} se``; for PSEs and shifts (linear in the parameters), when
  the bootstrap is run with ``studentize=True``;
* BCa (Efron 1987): quantiles shifted by the bias correction ``z0`` (share of
  replicates below the estimate) and the acceleration ``a``.  For a
  multi-parameter model Efron obtains ``a`` from the *least favourable*
  one-parameter family through the estimate: with ``v = I^{-1} grad T`` (``I``
  the Fisher information, ``T`` the statistic), ``a`` is one sixth of the
  skewness of the score along ``v``.  For binomial cells the moments are
  exact: with ``d = v . dp/dtheta`` at each cell, ``E[u^2] = sum n d^2/(p q)``
  and ``E[u^3] = sum n d^3 (1 - 2p)/(p q)^2``.  Statistics that are smooth
  functions of the parameters (PSE shifts, tuning amplitudes) pass their
  gradient; see :meth:`BootstrapResult.acceleration`.

Caveat (Wichmann & Hill 2001, II): with adaptive procedures the levels
depend on the answers, while the parametric bootstrap keeps them fixed; the
intervals are then approximate.  Coverage also falls short when the
bootstrap distribution, centred on a biased estimate from few trials, is a
poor stand-in for the sampling distribution at the true parameters, and when
the lapse is on its bound in many replicates.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np
from scipy import special

from .errors import InputError
from .flags import STEEP_DRAW_FRACTION, STEEP_FRACTION, steep_floor
from .progress import ProgressBar
from .psychometric import (PsychometricFit, _cell_terms, _covariance, _derivatives, _information,
                           deviance_by_condition, escape_saddles, probability_derivatives, solve_batch)

INTERVALS = ("bca", "percentile")


@dataclass
class BootstrapResult:
    """Replicate refits of one :class:`PsychometricFit`.

    Attributes
    ----------
    fit : PsychometricFit
        The point fit the replicates were drawn from.
    theta : ndarray (R, P)
        Replicate estimates in the fitting scale (pse, log spread, lapse).
    converged : ndarray (R,) bool
    at_bound : ndarray (R, P) bool
    deviance_by_condition : ndarray (R, C)
        Deviance of each replicate's data against its own refit.
    generating_theta : ndarray (P,)
        Parameters the replicate answers were drawn from (the estimate, or
        its bias-corrected version; see :func:`parametric_bootstrap_many`).
    pse_covariance : ndarray (R, C, C) or None
        Each replicate's own inverse observed information, PSE block (NaN
        rows for PSEs on a bound); kept only with ``studentize=True``.
    """

    fit: PsychometricFit
    theta: np.ndarray
    converged: np.ndarray
    at_bound: np.ndarray
    deviance_by_condition: np.ndarray
    generating_theta: np.ndarray
    pse_covariance: np.ndarray | None = None

    @property
    def n_boot(self) -> int:
        return self.theta.shape[0]

    @property
    def pse(self) -> np.ndarray:
        """Replicate PSEs (R, C)."""
        return self.theta[:, self.fit.layout.pse_index]

    @property
    def spread(self) -> np.ndarray:
        return np.exp(self.theta[:, self.fit.layout.spread_index])

    @property
    def lapse(self) -> np.ndarray:
        return self.fit.layout.unpack(self.theta)[2]

    @property
    def deviance(self) -> np.ndarray:
        return self.deviance_by_condition.sum(axis=1)

    @property
    def gof_p(self) -> float:
        """Bootstrap goodness-of-fit p-value of the deviance (Wichmann & Hill 2001, I).

        Share of replicates whose deviance reaches the observed one, counted
        as ``(1 + #{D* >= D}) / (R + 1)``.
        """
        return float((1 + (self.deviance >= self.fit.deviance - 1e-9).sum()) / (self.n_boot + 1))

    @property
    def gof_p_by_condition(self) -> np.ndarray:
        obs = self.fit.deviance_by_condition
        return (1 + (self.deviance_by_condition >= obs - 1e-9).sum(axis=0)) / (self.n_boot + 1)

    def acceleration(self, gradient) -> np.ndarray:
        """BCa acceleration for statistics with the given gradients.

        Parameters
        ----------
        gradient : ndarray (P,) or (P, S)
            Derivative of each statistic with respect to the fitting-scale
            parameters at the estimate.

        Returns
        -------
        ndarray (S,)
            Efron's (1987) least-favourable-family acceleration; 0 where the
            statistic depends only on parameters that are not estimable.
        """
        fit = self.fit
        grad = np.asarray(gradient, dtype=float)
        grad = grad[:, None] if grad.ndim == 1 else grad
        free = np.isfinite(np.diagonal(fit.covariance))
        out = np.zeros(grad.shape[1])
        if not free.any():
            return out
        cells = fit.cells
        _, _, _, fis = _derivatives(fit.theta[None], cells.x[None], cells.n[None], cells.k[None],
                                    fit.layout, fit.sigmoid)
        info = fis[0][np.ix_(free, free)]
        v = np.zeros_like(grad)
        v[free] = np.linalg.lstsq(info, grad[free], rcond=None)[0]
        p, dm, ds, dl = (a[0] for a in probability_derivatives(fit.theta[None], cells.x[None],
                                                                fit.layout, fit.sigmoid))
        lay = fit.layout
        d = v[lay.pse_index].T[:, :, None] * dm + v[lay.spread_index].T[:, :, None] * ds
        if lay.free_lapse:
            d = d + v[lay.lapse_index][:, None, None] * dl
        pq = p * (1.0 - p)
        m2 = (cells.n * d ** 2 / pq).sum(axis=(1, 2))
        m3 = (cells.n * d ** 3 * (1.0 - 2.0 * p) / pq ** 2).sum(axis=(1, 2))
        ok = m2 > 0
        out[ok] = m3[ok] / (6.0 * m2[ok] ** 1.5)
        return out

    def interval(self, estimate, replicates, gradient=None, method: str = "bca",
                 level: float = 0.95):
        """Confidence limits of statistics computed on the replicates.

        Parameters
        ----------
        estimate : array_like (S,)
            The statistics at the point fit.
        replicates : array_like (R, S)
            The same statistics on every replicate (paired with ``theta``).
        gradient : array_like (P, S), optional
            For BCa: derivatives of the statistics in the fitting scale
            (acceleration 0 if omitted).
        method : {"bca", "percentile"}
        level : float

        Returns
        -------
        (low, high) : ndarrays (S,)
        """
        estimate = np.atleast_1d(np.asarray(estimate, dtype=float))
        reps = np.asarray(replicates, dtype=float).reshape(self.n_boot, -1)
        if method == "percentile":
            return percentile_interval(reps, level)
        if method != "bca":
            raise ValueError(f"method must be one of {INTERVALS}")
        accel = np.zeros(reps.shape[1]) if gradient is None else self.acceleration(gradient)
        return bca_interval(estimate, reps, accel, level)


    def studentized(self, contrasts, level: float = 0.95):
        """Bootstrap-t limits of linear combinations of the PSEs.

        Parameters
        ----------
        contrasts : array_like (C, S)
            Column ``s`` holds the weights of statistic ``s`` on the PSEs
            (a unit column for a PSE, ``e_j - e_base`` for a shift).
        level : float

        Returns
        -------
        (low, high) : ndarrays (S,)
            NaN where the point fit gives the statistic no standard error.
        """
        if self.pse_covariance is None:
            raise ValueError("studentized intervals need the bootstrap run with studentize=True")
        w = np.asarray(contrasts, dtype=float)
        fit = self.fit
        pi = fit.layout.pse_index
        estimate = fit.pse @ w
        used = np.abs(w) > 0
        # the point fit's error by the replicates' rule: only parameters on a bound are held
        # (fit.covariance also drops separated conditions with a spread of their own, as the replicates do not)
        info = _information(fit.theta, fit.cells, fit.layout, fit.sigmoid)
        cov = _covariance(info, fit.layout, fit.at_bound, [""] * len(fit.conditions))[np.ix_(pi, pi)]
        # a PSE without an error (on a bound) leaves only the statistics that use it without one
        var = np.einsum("cs,cd,ds->s", w, np.nan_to_num(cov, nan=0.0), w)
        var[np.isnan(np.diagonal(cov)) @ used > 0] = np.nan
        se = np.sqrt(np.where(var > 0, var, np.nan))
        centre = self.generating_theta[pi] @ w
        reps = self.pse @ w
        rep_var = np.einsum("cs,rcd,ds->rs", w, np.nan_to_num(self.pse_covariance, nan=0.0), w)
        missing = np.isnan(self.pse_covariance[:, np.arange(pi.size), np.arange(pi.size)]) @ used > 0
        rep_se = np.where(missing | (rep_var <= 0), np.nan, np.sqrt(np.maximum(rep_var, 0.0)))
        return studentized_interval(estimate, se, reps, rep_se, centre, level)


def studentized_interval(estimate, se, replicates, replicate_se, centre=None, level: float = 0.95):
    """Studentized (bootstrap-t) interval (Efron & Tibshirani 1993, ch. 12).

    Parameters
    ----------
    estimate, se : array_like (S,)
        The statistics and their standard errors at the point fit.
    replicates, replicate_se : array_like (R, S)
        The statistics and each replicate's own standard error.  A replicate
        without a standard error (NaN: its estimate on a bound) counts as an
        extreme ``t*`` on the side it fell.
    centre : array_like (S,), optional
        The statistics at the parameters the replicates were drawn from
        (default: ``estimate``).
    level : float

    Returns
    -------
    (low, high) : ndarrays (S,)
        ``estimate - t*_{(1+level)/2} se``, ``estimate - t*_{(1-level)/2} se``.
    """
    est = np.atleast_1d(np.asarray(estimate, dtype=float))
    se = np.broadcast_to(np.asarray(se, dtype=float), est.shape)
    reps = np.asarray(replicates, dtype=float).reshape(-1, est.size)
    rse = np.asarray(replicate_se, dtype=float).reshape(reps.shape)
    centre = est if centre is None else np.broadcast_to(np.asarray(centre, dtype=float), est.shape)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (reps - centre) / rse
    t = np.where(np.isfinite(t), t, np.where(reps >= centre, np.inf, -np.inf))
    alpha = (1.0 - level) / 2.0
    srt = np.sort(t, axis=0)
    cols = est.size
    q = _column_quantiles(srt, np.full(cols, alpha)), _column_quantiles(srt, np.full(cols, 1.0 - alpha))
    with np.errstate(invalid="ignore"):
        low, high = est - q[1] * se, est - q[0] * se
    bad = ~(np.isfinite(se) & (se > 0))
    return np.where(bad, np.nan, low), np.where(bad, np.nan, high)


def _pseudo_inverse(m: np.ndarray) -> np.ndarray:
    """Pseudo-inverse of one matrix; NaN where LAPACK's SVD does not converge (that replicate has no covariance)."""
    try:
        return np.linalg.pinv(m)
    except np.linalg.LinAlgError:
        return np.full(m.shape, np.nan)


def replicate_pse_covariance(theta, x, n, k, layout, sigmoid, at_bound) -> np.ndarray:
    """Inverse observed information of each replicate, PSE block (B, C, C).

    Parameters on a bound are held (their rows NaN), as in the point fit.
    """
    _, _, obs, _ = _derivatives(theta, x, n, k, layout, sigmoid, fisher=False)
    held = np.asarray(at_bound, dtype=bool)
    eye = np.eye(layout.n_params, dtype=bool)
    keep = ~held[:, :, None] & ~held[:, None, :]
    h = np.where(keep, obs, np.where(eye[None] & held[:, :, None], 1.0, 0.0))
    with np.errstate(invalid="ignore"):
        try:
            cov = np.linalg.inv(h)
        except np.linalg.LinAlgError:
            cov = np.stack([_pseudo_inverse(m) for m in h])
    cov = np.where(keep, cov, np.nan)
    pi = layout.pse_index
    return cov[:, pi[:, None], pi[None, :]]


def _column_quantiles(sorted_reps: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Linear-interpolation quantile ``q[s]`` of each sorted column ``s``."""
    r = sorted_reps.shape[0]
    pos = np.clip(q, 0.0, 1.0) * (r - 1)
    low = np.floor(pos).astype(int)
    high = np.minimum(low + 1, r - 1)
    frac = pos - low
    cols = np.arange(sorted_reps.shape[1])
    return sorted_reps[low, cols] * (1 - frac) + sorted_reps[high, cols] * frac


def percentile_interval(replicates, level: float = 0.95):
    """Percentile interval of each column of ``replicates`` (R, S)."""
    reps = np.asarray(replicates, dtype=float)
    reps = reps[:, None] if reps.ndim == 1 else reps
    alpha = (1.0 - level) / 2.0
    low, high = np.quantile(reps, [alpha, 1.0 - alpha], axis=0)
    return low, high


def bca_interval(estimate, replicates, acceleration, level: float = 0.95):
    """Bias-corrected and accelerated interval (Efron 1987).

    Parameters
    ----------
    estimate : array_like (S,)
    replicates : array_like (R, S)
    acceleration : array_like (S,)
    level : float

    Returns
    -------
    (low, high) : ndarrays (S,)
        The bias correction uses the share of replicates below the estimate
        (ties count half), kept within ``[0.5/R, 1 - 0.5/R]``.
    """
    reps = np.asarray(replicates, dtype=float)
    reps = reps[:, None] if reps.ndim == 1 else reps
    est = np.broadcast_to(np.asarray(estimate, dtype=float), reps.shape[1:])
    accel = np.broadcast_to(np.asarray(acceleration, dtype=float), reps.shape[1:])
    r = reps.shape[0]
    below = (reps < est).sum(axis=0) + 0.5 * (reps == est).sum(axis=0)
    z0 = special.ndtri(np.clip(below / r, 0.5 / r, 1.0 - 0.5 / r))
    z = special.ndtri(np.array([(1.0 - level) / 2.0, (1.0 + level) / 2.0]))
    t = z0[None, :] + z[:, None]
    denom = np.maximum(1.0 - accel[None, :] * t, 1e-6)
    q = special.ndtr(z0[None, :] + t / denom)
    srt = np.sort(reps, axis=0)
    return _column_quantiles(srt, q[0]), _column_quantiles(srt, q[1])


def parametric_bootstrap(fit: PsychometricFit, n_boot: int, rng: np.random.Generator,
                         progress: bool | None = None, label: str = "bootstrap",
                         chunk: int | None = None, bias_correct: bool = True,
                         studentize: bool = False, generate=None) -> BootstrapResult:
    """Draw ``n_boot`` replicate data sets from ``fit`` and refit them all.

    Parameters
    ----------
    fit : PsychometricFit
    n_boot : int
        Replicates (>= 1).
    rng : numpy.random.Generator
        Source of the replicate answers (seed it for reproducible intervals).
    progress : bool or None
        Progress bar on stderr: ``None`` only on a terminal, ``True`` always,
        ``False`` never.
    label : str
        Words in front of the progress bar.
    chunk : int, optional
        Rows per batched solve (default: as many as keep each solve under
        about half a million cells).
    bias_correct : bool
        Generate the replicates at bias-corrected spread and lapse (see
        :func:`parametric_bootstrap_many`).
    studentize : bool
        Keep each replicate's own PSE covariance, for
        :meth:`BootstrapResult.studentized`.
    generate : ndarray (P,), optional
        Generating parameters found elsewhere (for example by re-running the
        adaptive tracks, :func:`fitting.replay.rerun_generating_parameters`);
        no pilot is run then.

    Returns
    -------
    BootstrapResult
    """
    return parametric_bootstrap_many([fit], n_boot, rng, progress, label, chunk, bias_correct,
                                     studentize=studentize,
                                     generate=None if generate is None else np.asarray(generate)[None])[0]


def _nuisance_mask(layout) -> np.ndarray:
    mask = np.zeros(layout.n_params, dtype=bool)
    mask[layout.spread_index] = True
    if layout.free_lapse:
        mask[layout.lapse_index] = True
    return mask


def pilot_size(n_boot: int) -> int:
    """Replicates of the pilot that sets the generating spread and lapse: a tenth, at least 100, at most 1,000.

    The pilot estimates a mean bias only: 1,000 replicates put its Monte Carlo
    error far below the bias itself, and more would only cost time (and, for
    re-run Bayesian tracks, a posterior array per copy).
    """
    return min(1000, max(100, n_boot // 10))


def parametric_bootstrap_many(fits, n_boot: int, rng: np.random.Generator,
                              progress: bool | None = None, label: str = "bootstrap",
                              chunk: int | None = None, bias_correct: bool = True,
                              pilot: int | None = None, studentize: bool = False,
                              generate=None) -> list[BootstrapResult]:
    """Bootstrap several fits of the same shape in one batch.

    All fits must share the layout and the cell-array shape (for example,
    many data sets from one design); their replicates are refitted together.
    The answers are drawn fit by fit, in order, so a list of one gives the
    same result as :func:`parametric_bootstrap`.

    Generating parameters
    ---------------------
    The bootstrap stands in for the sampling distribution at the true
    parameters only if it is run at parameters close to them (Wichmann & Hill
    2001, II, the "bootstrap bridging assumption").  With tens of trials per
    condition the maximum-likelihood spread is biased low and a free lapse
    biased high, which narrows every replicate distribution and makes the
    PSE intervals cover less than they claim.  With ``bias_correct`` (the
    default) a pilot run of ``pilot`` replicates (default
    :func:`pilot_size`) estimates that bias, and the replicates are generated at
    ``theta_hat - bias`` for the spread(s) and the lapse only (PSEs stay at
    their estimates), kept inside the bounds.  Intervals remain centred on
    the estimates; :attr:`BootstrapResult.fit` is still the point fit.
    ``generate`` (one row per fit) replaces the pilot.
    """
    if n_boot < 1:
        raise ValueError("n_boot must be at least 1")
    first = fits[0]
    layout, shape = first.layout, first.cells.x.shape
    if any(f.layout != layout or f.cells.x.shape != shape or f.sigmoid != first.sigmoid for f in fits):
        raise ValueError("fits bootstrapped together must share layout, sigmoid and cell shape")
    if chunk is None:
        chunk = max(50, CHUNK_CELLS // first.cells.x.size)
    n_pilot = (pilot if pilot is not None else pilot_size(n_boot)) if bias_correct else 0
    if generate is not None:
        n_pilot = 0
    with ProgressBar(len(fits) * (n_boot + n_pilot), label, show=progress) as bar:
        if generate is None:
            generate = generating_parameters(fits, n_pilot, rng, chunk, bar)
        generate = no_steeper_than_resolved(fits, generate)
        theta, converged, at_bound, dev, cov = _replicates(fits, generate, n_boot, rng, chunk, bar,
                                                           studentize)
    owner = np.repeat(np.arange(len(fits)), n_boot)
    return [BootstrapResult(f, theta[owner == i], converged[owner == i], at_bound[owner == i],
                            dev[owner == i], generate[i], None if cov is None else cov[owner == i])
            for i, f in enumerate(fits)]


def no_steeper_than_resolved(fits, generate: np.ndarray) -> np.ndarray:
    """``generate`` (one row per fit) with no spread steeper than the tested levels resolve.

    A spread far below the spacing of the tested levels is not resolved by
    the answers: on few trials a step fits as well as a slope. Answers drawn
    from such a collapsed function are nearly certain at every level, so the
    replicates agree with each other and the intervals come out far too
    narrow. Two rules, both from :func:`fitting.flags.steep_floor`:

    - a fit flagged ``steep`` (its spread below the floor) carries no
      information on its spread; its answers are drawn at
      :data:`~fitting.flags.STEEP_DRAW_FRACTION` of the levels'
      interquartile range, the scale the levels were spread over;
    - any other generating spread is raised to the floor when below it.

    For the four observers whose fit collapsed first, PSE intervals held
    the truth in 78 % of cases when drawn at the collapsed spread, 87 % at
    the floor and 97 % at half the range, the fraction chosen on them; on 37
    collapsed observers found later (held out), 94 % at half the range
    (benchmarks/README.md, "Collapsed fits"). Fits
    above the floor are unchanged; the estimates themselves are never changed.
    """
    out = np.array(generate, dtype=float)
    for i, f in enumerate(fits):
        floor = steep_floor(f.cells, f.layout.shared_spread)
        resolved = floor > 0
        collapsed = resolved & (np.asarray(f.spread) < floor)
        least = np.where(collapsed, floor * (STEEP_DRAW_FRACTION / STEEP_FRACTION), floor)
        index = f.layout.spread_index[resolved]
        out[i, index] = np.maximum(out[i, index], np.log(least[resolved]))
    return out


def generating_parameters(fits, n_pilot: int, rng, chunk: int, bar) -> np.ndarray:
    """Parameters (one row per fit) the replicates are drawn at.

    The estimates, with spread(s) and lapse moved by minus their bias in a
    pilot of ``n_pilot`` fixed-level replicates (none when ``n_pilot`` is 0);
    see :func:`parametric_bootstrap_many`.
    """
    theta_hat = np.stack([f.theta for f in fits])
    if not n_pilot:
        return theta_hat
    th, *_ = _replicates(fits, theta_hat, n_pilot, rng, chunk, bar)
    return bias_corrected(fits, th.reshape(len(fits), n_pilot, -1))


def bias_corrected(fits, pilot_theta: np.ndarray) -> np.ndarray:
    """``theta_hat - bias`` for spread(s) and lapse, kept in the bounds; ``pilot_theta`` is (fits, R, P)."""
    theta_hat = np.stack([f.theta for f in fits])
    bias = pilot_theta.mean(axis=1) - theta_hat
    generate = theta_hat - np.where(_nuisance_mask(fits[0].layout), bias, 0.0)
    return np.clip(generate, np.stack([f.lower for f in fits]), np.stack([f.upper for f in fits]))


def _replicates(fits, generate, n_boot, rng, chunk, bar, studentize: bool = False):
    """Draw answers at ``generate`` (one row per fit) and refit every replicate.

    Returns ``(theta, converged, at_bound, deviance, pse_covariance or None)``.
    """
    first = fits[0]
    layout, shape, sigmoid = first.layout, first.cells.x.shape, first.sigmoid
    m = len(fits)
    rows = m * n_boot
    x_all = np.stack([f.cells.x for f in fits])
    n_all = np.stack([f.cells.n for f in fits])
    p_gen = _cell_terms(generate, x_all, layout, sigmoid)[0]
    draws = np.concatenate([rng.binomial(n_all[i].astype(np.int64)[None], p_gen[i][None],
                                         size=(n_boot,) + shape).astype(float) for i in range(m)])
    owner = np.repeat(np.arange(m), n_boot)
    lo_all = np.stack([f.lower for f in fits])
    hi_all = np.stack([f.upper for f in fits])
    theta = np.empty((rows, layout.n_params))
    converged = np.empty(rows, dtype=bool)
    at_bound = np.empty((rows, layout.n_params), dtype=bool)
    dev = np.empty((rows, shape[0]))
    cov = np.empty((rows, shape[0], shape[0])) if studentize else None
    one = m == 1
    for start in range(0, rows, chunk):
        sl = slice(start, min(start + chunk, rows))
        who = owner[sl]
        pick = (lambda a: a[:1]) if one else (lambda a: a[who])
        xs, ns = pick(x_all), pick(n_all)
        sol = solve_batch(pick(generate), xs, ns, draws[sl], layout, pick(lo_all), pick(hi_all), sigmoid)
        # 1-2 % of refits of 24 up-down trials per condition stop on a saddle (bench_replicate_saddles.py)
        sol = escape_saddles(sol, xs, ns, draws[sl], layout, pick(lo_all), pick(hi_all), sigmoid)
        theta[sl], converged[sl], at_bound[sl] = sol.theta, sol.converged, sol.at_bound
        p_star = _cell_terms(sol.theta, xs, layout, sigmoid)[0]
        dev[sl] = deviance_by_condition(p_star, ns, draws[sl])
        if studentize:
            cov[sl] = replicate_pse_covariance(sol.theta, xs, ns, draws[sl], layout, sigmoid, sol.at_bound)
        bar.advance(sl.stop - sl.start)
    return theta, converged, at_bound, dev, cov


#: Cells (replicates x conditions x levels) refitted together by default.  Each array of a Newton step
#: then takes 0.8 MB, near a core's 2 MB L2 cache; 500,000 cells (4 MB arrays) made the 100-condition
#: fit 1.4-1.8 times slower (``benchmarks/bench_user_wait.py --chunks`` measures it).  The numbers do not
#: depend on it.
CHUNK_CELLS = 100_000

#: Bytes kept per replicate and condition until the tables are written (measured: about 175 B with
#: ``fit`` on 33 conditions, 2,000 against 20,000 replicates; rounded up).
BYTES_PER_REPLICATE_CONDITION = 200


def check_replicate_memory(n_boot: int, n_conditions: int, memory_bytes: float | None = None) -> None:
    """Refuse a replicate count whose results would not fit in half of this machine's memory.

    Parameters
    ----------
    n_boot : int
        Replicates per observer.
    n_conditions : int
        Conditions summed over all observers (every observer's replicates are kept).
    memory_bytes : float, optional
        Physical memory; read from the system when not given.

    Raises
    ------
    InputError
        Naming ``--bootstrap``, the estimate and the largest count that fits.
    """
    if memory_bytes is None:
        try:
            memory_bytes = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
        except (ValueError, OSError, AttributeError):
            return
    per_replicate = BYTES_PER_REPLICATE_CONDITION * max(n_conditions, 1)
    if n_boot * per_replicate > memory_bytes / 2:
        raise InputError("argument", "--bootstrap",
                         f"{n_boot:,} replicates of {n_conditions} conditions would need about "
                         f"{n_boot * per_replicate / 2**30:.1f} GiB; at most {int(memory_bytes / 2 // per_replicate):,} "
                         "fit in half of this machine's memory")