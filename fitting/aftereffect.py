"""After-effect curves: the DoG tuning shape per lag and its decay over lags.

Shapes (README, Models)::

    tuning:  shift(D)  = A * (D / w) * exp(1/2 - (D / w)^2 / 2)
    decay:   A_k       = A_0 * exp(-k / tau)

``A`` is the peak shift (deg, reached at ``D = +-w``; positive = repulsive),
``w`` the peak offset (deg), ``tau`` the decay constant in motion periods.

Choices
-------
* **Per lag** the DoG is fitted by weighted least squares to that lag's PSE
  shifts (weights = 1 / variance of each shift from the psychometric fit's
  observed information), giving the amplitude and peak offset of
  ``tuning.csv``.
* **Across lags** the decay is fitted *jointly* to all shifts at once with the
  model ``A_0 * exp(-k / tau) * DoG(D; w)`` (one peak offset for all lags),
  rather than to the per-lag amplitudes: at long lags the per-lag amplitude
  is small, its peak offset poorly determined, and a two-stage fit would
  carry that noise (and the upward bias of a free ``w``) into ``tau``.  This
  is the same shape the simulated observer uses, so a simulated run can be
  checked by parameter recovery.
* Every fit is batched over rows (point estimate, bootstrap replicates and
  finite-difference probes together): a grid search for the nonlinear
  parameters with the amplitude profiled out (closed form), then a bounded
  Levenberg–Marquardt refinement.
* Bounds, honestly reported: ``w`` lies in ``[min|D| / 2, 2 max|D|]`` (a
  peak outside that is not identifiable from the tested offsets), ``tau``
  in ``[0.01, 1000]`` periods.  An estimate or a confidence limit on a bound
  means "at least / at most this"; :func:`bound_note` words it.
* The decay constant's default interval is a profile interval
  (:func:`decay_profile_interval`): the joint shape fitted by generalised
  least squares with the shifts' covariance known up to a factor, the
  factor estimated from the residuals, and the interval never narrower
  than with the covariance taken as exact.  Shifts share the baseline PSE,
  so their errors correlate; the bootstrap intervals of ``tau`` (BCa) held
  the truth less often with short adaptive tracks (benchmarks/README.md).
  Each lag's tuning amplitude gets the same kind of profile interval
  (:func:`tuning_profile_interval`), with the factor alone setting the cut:
  its BCa limits held the truth in about 92.7 % of simulated observers with
  24 up–down trials per condition.  With fewer shifts per lag than the
  factor needs, the covariance is taken as exact (``cut="known"``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
# scipy.special, not scipy.stats: the same functions bit for bit, without stats' 0.3 s import
from scipy import special

from .arrow import dense_solve

TAU_BOUNDS = (0.01, 1000.0)


def dog(offset, amplitude, peak):
    """The tuning shape: ``A * (D / w) * exp(1/2 - (D / w)^2 / 2)``."""
    u = np.asarray(offset, dtype=float) / peak
    return amplitude * u * np.exp(0.5 - 0.5 * u * u)


def peak_bounds(offsets) -> tuple[float, float]:
    """Range allowed for the peak offset given the tested adapter offsets."""
    a = np.abs(np.asarray(offsets, dtype=float))
    a = a[a > 0]
    if a.size == 0:
        return 1.0, 2.0
    return float(a.min() / 2.0), float(2.0 * a.max())


def _shape(offsets, log_peak):
    """DoG shape with unit amplitude and its derivative in log w; offsets (..., J)."""
    u = offsets / np.exp(log_peak)
    e = np.exp(0.5 - 0.5 * u * u)
    return u * e, -u * (1.0 - u * u) * e


def _levenberg_marquardt(residuals, theta, lo, hi, n_iter: int = 80):
    """Bounded Levenberg–Marquardt for a batch of small least-squares problems.

    ``residuals(theta, rows) -> (r (b, M), J (b, M, P))`` for the given rows.
    """
    b, p = theta.shape
    theta = np.clip(theta, lo, hi)
    rows = np.arange(b)
    r, jac = residuals(theta, rows)
    cost = (r * r).sum(axis=1)
    damp = np.full(b, 1e-3)
    todo = rows.copy()
    finite = np.isfinite(hi - lo)
    room = np.where(finite, 1e-9 * np.where(finite, hi - lo, 0.0), 0.0)
    eye = np.eye(p)
    for _ in range(n_iter):
        if todo.size == 0:
            break
        jt = jac[todo]
        jtj = np.einsum("bmi,bmj->bij", jt, jt)
        g = np.einsum("bmi,bm->bi", jt, r[todo])
        th = theta[todo]
        fixed = ((th <= lo + room) & (g > 0)) | ((th >= hi - room) & (g < 0))
        mask = fixed[:, :, None] | fixed[:, None, :]
        diag = np.diagonal(jtj, axis1=1, axis2=2)
        a = jtj + damp[todo, None, None] * (diag[:, :, None] * eye + 1e-12 * eye)
        a = np.where(mask, 0.0, a) + np.where(fixed[:, :, None], eye, 0.0)
        gm = np.where(fixed, 0.0, g)
        step = -dense_solve(a, gm)           # NaN where no step exists: rejected below, damping grows
        cand = np.clip(th + step, lo, hi)
        rc, jc = residuals(cand, todo)
        cc = (rc * rc).sum(axis=1)
        better = np.isfinite(cc) & (cc <= cost[todo])
        gain = cost[todo] - cc
        upd = todo[better]
        theta[upd], r[upd], jac[upd], cost[upd] = cand[better], rc[better], jc[better], cc[better]
        damp[upd] /= 3.0
        damp[todo[~better]] *= 4.0
        small = (np.abs(cand - th).max(axis=1) < 1e-11) | (better & (gain <= 1e-14 * (1 + cost[todo])))
        stop = small | (damp[todo] > 1e12)
        todo = todo[~stop]
    return theta, cost


@dataclass
class TuningFit:
    """DoG fits of B rows: amplitude (deg), peak offset (deg), flags, residual sum."""

    amplitude: np.ndarray
    peak: np.ndarray
    peak_at_bound: np.ndarray
    rss: np.ndarray
    bounds: tuple


def fit_tuning(offsets, shifts, weights, bounds=None) -> TuningFit:
    """Weighted least-squares DoG fit of each row of ``shifts``.

    Parameters
    ----------
    offsets : array_like (J,)
        Adapter offsets (deg).
    shifts : array_like (B, J)
        PSE shifts (deg).
    weights : array_like (J,)
        Inverse variances (0 drops a point).
    bounds : (float, float), optional
        Peak-offset range; default :func:`peak_bounds`.
    """
    d = np.asarray(offsets, dtype=float)
    y = np.atleast_2d(np.asarray(shifts, dtype=float))
    w = np.asarray(weights, dtype=float)
    lo_w, hi_w = bounds if bounds is not None else peak_bounds(d)
    grid = np.linspace(np.log(lo_w), np.log(hi_w), 160)
    g = _shape(d[None, :], grid[:, None])[0]                       # (G, J)
    sgg = (w * g * g).sum(axis=1)                                   # (G,)
    sgy = (y * w) @ g.T                                             # (B, G)
    score = np.where(sgg > 0, sgy * sgy / np.where(sgg > 0, sgg, 1.0), -np.inf)
    best = score.argmax(axis=1)
    amp0 = sgy[np.arange(y.shape[0]), best] / sgg[best]
    theta = np.column_stack([amp0, grid[best]])
    sw = np.sqrt(w)

    def residuals(th, rows):
        shape, dshape = _shape(d[None, :], th[:, 1:2])
        model = th[:, :1] * shape
        r = sw * (y[rows] - model)
        jac = np.stack([-sw * shape, -sw * th[:, :1] * dshape], axis=2)
        return r, jac

    lo = np.array([-np.inf, np.log(lo_w)])
    hi = np.array([np.inf, np.log(hi_w)])
    theta, cost = _levenberg_marquardt(residuals, theta, lo, hi)
    room = 1e-6 * (hi[1] - lo[1])
    at_bound = (theta[:, 1] <= lo[1] + room) | (theta[:, 1] >= hi[1] - room)
    return TuningFit(theta[:, 0], np.exp(theta[:, 1]), at_bound, cost, (lo_w, hi_w))


@dataclass
class DecayFit:
    """Joint fits ``A_0 exp(-k / tau) DoG(D; w)`` of B rows."""

    amplitude0: np.ndarray
    peak: np.ndarray
    tau: np.ndarray
    peak_at_bound: np.ndarray
    tau_at_bound: np.ndarray
    rss: np.ndarray
    peak_range: tuple
    tau_range: tuple


def fit_decay(offsets, lags, shifts, weights, bounds=None, tau_bounds=TAU_BOUNDS) -> DecayFit:
    """Weighted least-squares fit of all lags' shifts with one decaying DoG.

    Parameters
    ----------
    offsets : array_like (J,)
        Adapter offsets (deg), the columns of ``shifts``.
    lags : array_like (K,)
        Lags (periods), the middle axis of ``shifts``.
    shifts : array_like (B, K, J)
        PSE shifts (deg); cells without data may hold anything but must have
        weight 0.
    weights : array_like (K, J)
        Inverse variances.
    bounds : (float, float), optional
        Peak-offset range; default :func:`peak_bounds`.
    tau_bounds : (float, float)
        Decay-constant range (periods).
    """
    d = np.asarray(offsets, dtype=float)
    k = np.asarray(lags, dtype=float)
    y = np.asarray(shifts, dtype=float)
    y = y[None] if y.ndim == 2 else y
    w = np.asarray(weights, dtype=float)
    b = y.shape[0]
    lo_w, hi_w = bounds if bounds is not None else peak_bounds(d)
    rate_lo, rate_hi = 1.0 / tau_bounds[1], 1.0 / tau_bounds[0]
    wgrid = np.linspace(np.log(lo_w), np.log(hi_w), 60)
    rgrid = np.geomspace(rate_lo, rate_hi, 60)
    g = _shape(d[None, :], wgrid[:, None])[0]                        # (G, J)
    e = np.exp(-k[:, None] * rgrid[None, :])                         # (K, R)
    den = (w @ (g * g).T).T @ (e * e)                                # (G, R)
    inv_den = np.where(den > 0, 1.0 / np.where(den > 0, den, 1.0), 0.0).ravel()
    ng, nr = den.shape
    # profiled score N^2 / D on the (w, rate) grid, in row chunks that stay in cache
    best = np.empty(b, dtype=int)
    amp0 = np.empty(b)
    for start in range(0, b, 128):
        yc = y[start:start + 128] * w                                # (b, K, J)
        pk = (yc.reshape(-1, d.size) @ g.T).reshape(yc.shape[0], k.size, ng)
        num = np.einsum("bkg,kr->bgr", pk, e, optimize=True).reshape(yc.shape[0], -1)
        idx = (num * num * inv_den).argmax(axis=1)
        best[start:start + 128] = idx
        amp0[start:start + 128] = num[np.arange(idx.size), idx] * inv_den[idx]
    gi, ri = np.unravel_index(best, (ng, nr))
    theta = np.column_stack([amp0, wgrid[gi], rgrid[ri]])
    sw = np.sqrt(w).ravel()
    dd = np.broadcast_to(d[None, :], (k.size, d.size)).ravel()
    kk = np.broadcast_to(k[:, None], (k.size, d.size)).ravel()
    yy = y.reshape(b, -1)

    def residuals(th, rows):
        shape, dshape = _shape(dd[None, :], th[:, 1:2])
        dec = np.exp(-kk[None, :] * th[:, 2:3])
        model = th[:, :1] * shape * dec
        r = sw * (yy[rows] - model)
        jac = np.stack([-sw * shape * dec, -sw * th[:, :1] * dshape * dec, sw * kk * model], axis=2)
        return r, jac

    lo = np.array([-np.inf, np.log(lo_w), rate_lo])
    hi = np.array([np.inf, np.log(hi_w), rate_hi])
    theta, cost = _levenberg_marquardt(residuals, theta, lo, hi)
    room_w = 1e-6 * (hi[1] - lo[1])
    peak_at = (theta[:, 1] <= lo[1] + room_w) | (theta[:, 1] >= hi[1] - room_w)
    tau_at = (theta[:, 2] <= rate_lo * (1 + 1e-6)) | (theta[:, 2] >= rate_hi * (1 - 1e-6))
    return DecayFit(theta[:, 0], np.exp(theta[:, 1]), 1.0 / theta[:, 2], peak_at, tau_at, cost,
                    (lo_w, hi_w), tuple(tau_bounds))


def _gls_setup(offsets, shifts, covariance, bounds, n_peaks: int, least: int):
    """What a profile interval starts from: shifts, the Cholesky factor of their covariance, the peak grid.

    Returns ``(y, chol, log_w, shape)`` with ``shape`` the unit DoG at each
    log peak offset of the grid, (G, n); None with fewer than ``least``
    shifts, non-finite input or a covariance that is not positive definite.
    """
    d = np.asarray(offsets, float)
    y = np.asarray(shifts, float)
    v = np.asarray(covariance, float)
    if y.size < least or not np.all(np.isfinite(y)) or not np.all(np.isfinite(v)):
        return None
    try:
        chol = np.linalg.cholesky(v)
    except np.linalg.LinAlgError:
        return None
    lo_w, hi_w = bounds if bounds is not None else peak_bounds(d)
    log_w = np.linspace(np.log(lo_w), np.log(hi_w), n_peaks)
    return y, chol, log_w, _shape(d[None, :], log_w[:, None])[0]


def decay_profile_interval(offsets, lags, shifts, covariance, estimate: float, bounds=None,
                           tau_bounds=TAU_BOUNDS, level: float = 0.95,
                           n_peaks: int = 80, n_rates: int = 400, cut: str = "floored") -> tuple[float, float]:
    """Profile interval of the decay constant ``tau``, with the shifts' covariance known up to a factor.

    The model ``A_0 * exp(-k / tau) * DoG(D; w)`` is fitted by generalised
    least squares, ``S = r' V^-1 r``.  For each ``tau`` on a grid the
    amplitude is profiled out exactly (it enters linearly) and the peak
    offset on a grid over ``bounds``.  The interval holds every ``tau``
    whose profile rises less than ``s^2 F(1, n - 3; level)`` above the
    minimum, ``s^2 = S_min / (n - 3)``: the profile interval of nonlinear
    least squares with an unknown variance factor (Bates & Watts 1988,
    Nonlinear Regression Analysis and Its Applications, ch. 6).  The cut is
    never below ``chi2_1(level)``, that of the likelihood-ratio interval
    with the covariance taken as exact: the covariance comes from the
    bootstrap replicates and already holds the shifts' sampling error, so a
    factor below 1 is residuals that happen to be small, not a smaller
    error (scaling uncertainties up by the residuals but never down is the
    Particle Data Group's scale-factor practice, Review of Particle Physics,
    introduction; from memory).  Limits are
    interpolated between grid points; where the profile stays low up to a
    bound, the limit is that bound.  The interval always holds
    ``estimate`` (the weighted least-squares fit of :func:`fit_decay`,
    which uses only the variances).

    Parameters
    ----------
    offsets, lags : array_like (n,)
        Adapter offset (deg) and lag (periods) of each shift.
    shifts : array_like (n,)
        The PSE shifts (deg).
    covariance : array_like (n, n)
        Their covariance (any positive multiple: the factor is estimated).
    estimate : float
        The reported ``tau``.
    bounds : (float, float), optional
        Peak-offset range; default :func:`peak_bounds`.
    tau_bounds : (float, float)
        Decay-constant range (periods).
    level : float
        Confidence level.
    n_peaks, n_rates : int
        Grid sizes for the peak offset (log-spaced) and the rate ``1 / tau``.
    cut : {"floored", "factor", "known"}
        The profile's rise that bounds the interval (:data:`PROFILE_CUTS`):
        "floored" (default) as above; "factor": ``s^2 F(1, n - 3)`` alone;
        "known": ``chi2_1`` alone, the covariance taken as exact.

    Returns
    -------
    (float, float)
        Lower and upper limit (periods); NaN when fewer than 4 shifts or a
        covariance that is not positive definite.
    """
    k = np.asarray(lags, float)
    nan = (float("nan"), float("nan"))
    ready = _gls_setup(offsets, shifts, covariance, bounds, n_peaks, 4)
    if ready is None:
        return nan
    y, chol, log_w, shape = ready                                     # shape (G, n)
    n = y.size
    rates = np.geomspace(1.0 / tau_bounds[1], 1.0 / tau_bounds[0], n_rates)
    decay = np.exp(-k[None, :] * rates[:, None])                      # (R, n)
    wy = np.linalg.solve(chol, y)
    profile = np.empty(rates.size)
    step = max(1, 2_000_000 // (n_peaks * n))                         # rates per chunk: bounded memory
    for start in range(0, rates.size, step):
        # whitened model columns L^-1 m; S = |L^-1 y|^2 - (m'V^-1 y)^2 / (m'V^-1 m), least over the peaks
        cols = (decay[start:start + step, None, :] * shape[None]).reshape(-1, n)
        white = np.linalg.solve(chol, cols.T).T
        num = white @ wy
        den = np.einsum("ij,ij->i", white, white)
        fitted = np.where(den > 0, num * num / np.where(den > 0, den, 1.0), 0.0)
        profile[start:start + step] = (wy @ wy - fitted).reshape(-1, log_w.size).min(axis=1)
    s_min = float(profile.min())
    if s_min <= 0:
        return nan
    excess = profile - s_min - _profile_cut(s_min, n - 3, level, cut)   # <= 0 inside
    inside = np.flatnonzero(excess <= 0)
    log_rate = np.log(rates)

    def crossing(i_in: int, i_out: int) -> float:
        t = excess[i_in] / (excess[i_in] - excess[i_out])             # linear in log rate
        return float(np.exp(log_rate[i_in] + t * (log_rate[i_out] - log_rate[i_in])))

    first, last = int(inside[0]), int(inside[-1])
    tau_hi = float(tau_bounds[1]) if first == 0 else 1.0 / crossing(first, first - 1)
    tau_lo = float(tau_bounds[0]) if last == rates.size - 1 else 1.0 / crossing(last, last + 1)
    return min(tau_lo, float(estimate)), max(tau_hi, float(estimate))


#: Rises of a profile that bound its interval: "factor" ``s^2 F(1, dof)``, "floored" never below ``chi2_1``,
#: "known" ``chi2_1`` alone (see :func:`_profile_cut`).
PROFILE_CUTS = ("factor", "floored", "known")


def _profile_cut(s_min: float, dof: int, level: float, cut: str) -> float:
    """Rise of a generalised least-squares profile that bounds a ``level`` interval of one parameter.

    "factor": ``s^2 F(1, dof; level)`` with ``s^2 = s_min / dof``, the
    profile interval of nonlinear least squares with the covariance known up
    to a factor (Bates & Watts 1988, ch. 6); "floored": the same, never
    below ``chi2_1(level)``; "known": ``chi2_1(level)``, the likelihood-ratio
    cut with the covariance taken as exact (Wilks 1938).
    """
    if cut not in PROFILE_CUTS:
        raise ValueError(f"cut: expected one of {list(PROFILE_CUTS)}, got {cut!r}")
    known = special.chdtri(1, 1.0 - level)
    if cut == "known":
        return known
    factor = s_min / dof * special.fdtri(1, dof, level)
    return max(factor, known) if cut == "floored" else factor


def tuning_profile_interval(offsets, shifts, covariance, estimate: float, bounds=None, level: float = 0.95,
                            n_peaks: int = 160, cut: str = "factor") -> tuple[float, float]:
    """Profile interval of one lag's tuning amplitude, with the shifts' covariance known up to a factor.

    The DoG ``A * DoG(D; w)`` is fitted by generalised least squares,
    ``S(A, w) = r' V^-1 r``.  For each peak offset ``w`` on a grid over
    ``bounds`` the set of amplitudes with ``S(A, w) <= S_min + cut`` is an
    interval in closed form (``S`` is quadratic in ``A``); the profile
    interval ``{A : min_w S(A, w) <= S_min + cut}`` is the union of these,
    reported as its hull.  The cut is ``s^2 F(1, n - 2; level)``,
    ``s^2 = S_min / (n - 2)``: the profile interval of nonlinear least
    squares with an unknown variance factor (Bates & Watts 1988, Nonlinear
    Regression Analysis and Its Applications, ch. 6).  Unlike the decay's
    (:func:`decay_profile_interval`) it is not floored at ``chi2_1`` by
    default: with the 6–8 shifts of one lag, ``F(1, n - 2)`` already widens
    the cut, and the floored interval over-covered in the coverage benchmark
    (benchmarks/README.md).  The interval always holds ``estimate`` (the
    weighted least-squares fit of :func:`fit_tuning`).

    Parameters
    ----------
    offsets : array_like (n,)
        Adapter offsets (deg) of the lag's shifts.
    shifts : array_like (n,)
        The PSE shifts (deg).
    covariance : array_like (n, n)
        Their covariance (any positive multiple: the factor is estimated;
        with ``cut="known"`` taken as it is).
    estimate : float
        The reported amplitude (deg).
    bounds : (float, float), optional
        Peak-offset range; default :func:`peak_bounds`.
    level : float
        Confidence level.
    n_peaks : int
        Grid size for the peak offset (log-spaced).
    cut : {"factor", "floored", "known"}
        "factor" (default) as above; "floored": never below ``chi2_1(level)``,
        as the decay's interval; "known": ``chi2_1(level)`` alone, the
        covariance taken as exact (any multiple then changes the interval),
        ``fit``'s rule for lags with too few shifts to estimate the factor.

    Returns
    -------
    (float, float)
        Lower and upper limit (deg); NaN when fewer than 3 shifts, non-finite
        input or a covariance that is not positive definite.
    """
    ready = _gls_setup(offsets, shifts, covariance, bounds, n_peaks, 3)
    nan = (float("nan"), float("nan"))
    if ready is None:
        return nan
    y, chol, _, shape = ready                                         # shape (G, n)
    white = np.linalg.solve(chol, shape.T).T                          # whitened columns L^-1 m
    wy = np.linalg.solve(chol, y)
    # S(A, w) = y'V^-1 y - 2 A m'V^-1 y + A^2 m'V^-1 m
    cross = white @ wy
    norm = np.einsum("ij,ij->i", white, white)
    keep = norm > 0
    if not keep.any():
        return nan
    cross, norm = cross[keep], norm[keep]
    total = float(wy @ wy)
    s_min = total - float(np.max(cross * cross / norm))
    if s_min <= 0:
        return nan
    room = cross * cross - norm * (total - s_min - _profile_cut(s_min, y.size - 2, level, cut))
    ok = room >= 0
    half = np.sqrt(room[ok])
    low = float(np.min((cross[ok] - half) / norm[ok]))
    high = float(np.max((cross[ok] + half) / norm[ok]))
    return min(low, float(estimate)), max(high, float(estimate))


def bound_note(name: str, estimate: float, low: float, high: float, bounds, unit: str) -> str:
    """Words for an estimate or confidence limit that sits on a bound ('' if none)."""
    lo_b, hi_b = bounds
    parts = []
    tol = 1e-6 * max(abs(hi_b), 1.0)
    if abs(estimate - hi_b) <= tol or abs(estimate - lo_b) <= tol:
        parts.append(f"{name} estimate on its bound ({estimate:.3g} {unit})")
    if np.isfinite(high) and abs(high - hi_b) <= tol:
        parts.append(f"upper CI limit of {name} is its bound {hi_b:.3g} {unit}: larger values are not excluded")
    if np.isfinite(low) and abs(low - lo_b) <= tol:
        parts.append(f"lower CI limit of {name} is its bound {lo_b:.3g} {unit}: smaller values are not excluded")
    return "; ".join(parts)
