"""The covariance of the group's shifts that ``fit`` writes for ``compare``."""

from types import SimpleNamespace

import numpy as np
import pytest
import pandas as pd
from scipy import special

from statsmodels.stats.meta_analysis import _fit_tau_mm

from fitting.covariance import (between_observer_covariance, covariance_matrix, curve_between_covariance,
                                group_covariance)

CELLS = [(1, -20.0), (1, 20.0), (2, 20.0)]


def _observer(name, reps, shifts):
    ae = pd.DataFrame({"lag": [c[0] for c in CELLS], "adapter_offset_deg": [c[1] for c in CELLS],
                       "pse_shift_deg": shifts})
    return SimpleNamespace(observer=name, curves={"shift_reps": reps}, aftereffect=ae)


def _group_rows(half_widths):
    return pd.DataFrame({"observer": "group", "lag": [c[0] for c in CELLS],
                         "adapter_offset_deg": [c[1] for c in CELLS], "pse_shift_deg": 0.0,
                         "ci_low": -np.asarray(half_widths), "ci_high": np.asarray(half_widths)})


def test_group_covariance_is_the_covariance_of_the_weighted_mean_of_independent_observers():
    rng = np.random.default_rng(5)
    n = 200_000
    a = np.array([[1.0, 0.5, 0.2], [0.5, 2.0, 0.3], [0.2, 0.3, 1.5]])
    b = np.array([[2.0, -0.4, 0.0], [-0.4, 1.0, 0.6], [0.0, 0.6, 3.0]])
    reps = [rng.multivariate_normal(np.zeros(3), c, n) for c in (a, b)]
    w = np.array([[0.7, 0.4, 0.5], [0.3, 0.6, 0.5]])
    weights = pd.DataFrame(w, index=["o1", "o2"], columns=pd.MultiIndex.from_tuples(CELLS))
    group = _group_rows([1.0, 2.0, 3.0])
    table = group_covariance([_observer("o1", reps[0], [0, 0, 0]), _observer("o2", reps[1], [0, 0, 0])],
                             group, weights, 0.95, between="none")
    cov, replicates, dof = covariance_matrix(table, "group", [c[0] for c in CELLS], [c[1] for c in CELLS])[:3]
    # reference: numpy's correlation of the weighted mean of the two independent sets of draws
    mean = w[0] * reps[0] + w[1] * reps[1]
    sd = np.sqrt(np.diagonal(cov))
    np.testing.assert_allclose(cov / np.outer(sd, sd), np.corrcoef(mean, rowvar=False), atol=0.01)
    # the diagonal is the group interval's: half-width / t(n_obs - 1) quantile (here t on 1 dof)
    np.testing.assert_allclose(sd, np.array([1.0, 2.0, 3.0]) / special.stdtrit(1, 0.975))
    assert dof == 1 and np.isnan(replicates)


def test_between_observer_covariance_is_the_sample_covariance_when_observers_have_no_error():
    rng = np.random.default_rng(2)
    y = rng.normal(size=(7, 3)) @ np.array([[1.0, 0.5, 0.0], [0.0, 1.0, 0.3], [0.0, 0.0, 2.0]])
    zero = [np.zeros((3, 3))] * 7
    # reference: numpy's sample covariance (Jackson, White & Riley 2013: T = S - mean C_i with C_i = 0)
    np.testing.assert_allclose(between_observer_covariance(y, zero), np.cov(y, rowvar=False), atol=1e-12)
    # a missing cell: pairs of cells over the observers that have both, as pandas' pairwise covariance
    y[0, 2] = np.nan
    pairwise = pd.DataFrame(y).cov().to_numpy()
    assert np.linalg.eigvalsh(pairwise).min() > 0          # so the clipping to PSD leaves it as it is
    np.testing.assert_allclose(between_observer_covariance(y, zero), pairwise, atol=1e-12)


def test_between_observer_covariance_removes_the_observers_own_errors_and_stays_psd():
    rng = np.random.default_rng(3)
    true_between = np.array([[1.0, 0.8], [0.8, 1.0]])
    own = np.diag([0.5, 2.0])
    k, draws = 40, 2000                                      # enough observers that clipping is rare
    est = np.array([between_observer_covariance(
        rng.multivariate_normal(np.zeros(2), true_between + own, k), [own] * k) for _ in range(draws)])
    assert np.linalg.eigvalsh(est).min() > -1e-12
    # unbiased for T: the observers' own errors are removed (Monte Carlo SE of the mean about 0.01)
    np.testing.assert_allclose(est.mean(axis=0), true_between, atol=0.05)
    naive = np.cov(rng.multivariate_normal(np.zeros(2), true_between + own, (draws, k)).reshape(-1, 2),
                   rowvar=False)
    assert naive[1, 1] > true_between[1, 1] + 1.5            # without the subtraction: T + C


def test_curve_between_variance_is_the_method_of_moments_variance_of_the_projections():
    # Observers whose after-effects differ in size: y_i = g_i m + their own errors.
    rng = np.random.default_rng(8)
    k, p = 5, 6
    m = np.array([-2.0, -1.0, 1.5, 2.5, 0.8, 0.4])
    own = [a @ a.T * 0.05 for a in rng.normal(size=(k, p, p))]
    y = np.exp(0.2 * rng.normal(size=k))[:, None] * m + np.array([rng.multivariate_normal(np.zeros(p), c)
                                                                  for c in own])
    t = curve_between_covariance(y, own)
    # reference: statsmodels' method-of-moments between-study variance (DerSimonian & Kacker 2007, eq. 6),
    # with equal weights (Hedges' 1983 estimate, s^2 - mean v), of the observers' shifts projected on
    # the unit vector along their mean curve, clipped at 0 as a variance must be
    u = y.mean(axis=0) / np.linalg.norm(y.mean(axis=0))
    tau2 = max(0.0, _fit_tau_mm(y @ u, np.array([u @ c @ u for c in own]), np.ones(k)))
    assert tau2 > 0
    np.testing.assert_allclose(t, tau2 * np.outer(u, u), rtol=1e-10, atol=1e-14)
    # observers that agree better than their own errors allow: no between-observer part
    assert not curve_between_covariance(y, [c * 1e3 for c in own]).any()


def test_group_covariance_with_the_curve_part_widens_only_along_the_group_curve():
    rng = np.random.default_rng(9)
    reps = [rng.multivariate_normal(np.zeros(3), np.eye(3) * 0.01, 4000) for _ in range(3)]
    shifts = [[-1.0, 1.0, 0.5], [-2.0, 2.0, 1.0], [-3.0, 3.0, 1.5]]       # one curve, three sizes
    observers = [_observer(f"o{i}", r, s) for i, (r, s) in enumerate(zip(reps, shifts))]
    weights = pd.DataFrame(np.full((3, 3), 1 / 3), index=["o0", "o1", "o2"],
                           columns=pd.MultiIndex.from_tuples(CELLS))
    group = _group_rows([1.0, 1.0, 1.0])
    cells = [c[0] for c in CELLS], [c[1] for c in CELLS]
    plain = covariance_matrix(group_covariance(observers, group, weights, 0.95, between="none"), "group",
                              *cells).matrix
    curve = covariance_matrix(group_covariance(observers, group, weights, 0.95), "group", *cells).matrix
    u = np.array([-2.0, 2.0, 1.0]) / 3.0
    # the same standard errors (the group intervals'); the curve direction now carries most of the variance
    np.testing.assert_allclose(np.diagonal(curve), np.diagonal(plain))
    assert u @ curve @ u > 2.5 * (u @ plain @ u)
    top = np.linalg.eigh(curve)[1][:, -1]
    assert abs(top @ u) > 0.95                                                # its leading direction
    with pytest.raises(ValueError, match="between"):
        group_covariance(observers, group, weights, 0.95, between="all")
