"""The Schur-complement solve of the joint fit's arrow-shaped Hessian."""

from pathlib import Path

import numpy as np
import pytest
import scipy.linalg

from conftest import ROOT, run_cli
from fitting.arrow import Arrow, dense_solve
from fitting.psychometric import Layout


def _random_local(rng, b, c, free_lapse):
    """Symmetric, diagonally dominant per-condition (pse, log spread, lapse) blocks."""
    loc = rng.normal(size=(b, c, 3, 3))
    loc = loc + np.swapaxes(loc, -1, -2) + 8.0 * np.eye(3)
    if not free_lapse:
        loc[..., 2, :] = 0.0
        loc[..., :, 2] = 0.0
    return loc



@pytest.mark.parametrize("shared", [True, False])
def test_screen_for_negative_curvature_misses_no_indefinite_matrix(shared):
    # Reference: numpy's dense symmetric eigenvalues (LAPACK). Blocks with a weakened diagonal make
    # about half of the matrices indefinite, some only through the Schur complement.
    rng = np.random.default_rng(11)
    layout = Layout(7, shared, None)
    local = _random_local(rng, 400, 7, True)
    local -= rng.uniform(0.0, 9.0, size=(400, 1, 1, 1)) * np.eye(3)
    arrow = Arrow.from_local(local, shared, True)
    fixed = rng.random((400, layout.n_params)) < 0.1
    lowest = np.linalg.eigvalsh(arrow.hold(fixed).dense())[:, 0]
    flagged = arrow.hold(fixed).may_be_indefinite()
    assert 0.2 < (lowest < 0).mean() < 0.8
    assert flagged[lowest < 0].all()
    # a definite matrix is cleared unless it is within rounding of singular
    assert not flagged[lowest > 1e-6].any()
    # non-finite entries are left to the caller
    arrow.e[0, 0, 0] = np.nan
    assert not arrow.may_be_indefinite()[0]

@pytest.mark.parametrize("shared", [True, False])
@pytest.mark.parametrize("lapse", [None, 0.02])
def test_schur_solve_equals_a_dense_lapack_solve(shared, lapse):
    rng = np.random.default_rng(3)
    layout = Layout(9, shared, lapse)
    local = _random_local(rng, 6, 9, lapse is None)
    arrow = Arrow.from_local(local, shared, lapse is None)
    dense = layout.gather_hessian(local)
    assert np.allclose(arrow.dense(), dense, rtol=1e-14, atol=1e-13)
    g = rng.normal(size=(6, layout.n_params))
    fixed = rng.random((6, layout.n_params)) < 0.2
    # reference: numpy's LAPACK solve of the full matrix with the fixed rows and
    # columns replaced by the identity (the projected Newton system)
    mask = fixed[:, :, None] | fixed[:, None, :]
    held = np.where(mask, 0.0, dense) + np.where(np.eye(layout.n_params, dtype=bool) & fixed[:, :, None], 1.0, 0.0)
    want = np.linalg.solve(held, g[..., None])[..., 0]
    assert np.allclose(arrow.hold(fixed).solve(g), want, rtol=1e-10, atol=1e-12)


def test_singular_blocks_fall_back_to_the_pseudo_inverse():
    rng = np.random.default_rng(4)
    local = _random_local(rng, 3, 4, True)
    local[1, 2] = 0.0                       # condition 2 of row 1 carries no information
    arrow = Arrow.from_local(local, True, True)
    g = rng.normal(size=(3, 6))
    g[1, 2] = 0.0
    out = arrow.solve(g)
    assert np.isfinite(out).all()
    # reference: numpy's pseudo-inverse gives the minimum-norm solution
    assert np.allclose(out[1], np.linalg.pinv(arrow.dense()[1]) @ g[1])


def _assert_least_squares_minimum_norm(h, g, x):
    # least squares: the residual is orthogonal to the columns of h (normal equations)
    assert np.abs(h.T @ (h @ x - g)).max() < 1e-8 * np.abs(h).max() * np.abs(g).max()
    # minimum norm: nothing along the null space (row and column 13 are all zero)
    assert np.all(h[13] == 0) and np.all(h[:, 13] == 0) and abs(x[13]) <= 1e-8 * np.abs(x).max()


def test_a_matrix_whose_svd_may_not_converge_still_gets_the_least_squares_solution():
    # A Newton step's Hessian (26 of its 35 rows) from the pilot of the log below, with entries from
    # 1e-174 to 4e3.  numpy 2.3's pinv raised "SVD did not converge" on it (LAPACK gesdd) on the Intel
    # machine it came from, and not on an AMD EPYC: whichever path runs, the answer is the
    # minimum-norm least-squares solution.
    d = np.load(ROOT / "tests" / "data" / "hessian_svd_fails.npz")
    h, g = d["h"], d["g"]
    x = dense_solve(np.stack([h, np.eye(h.shape[0])]), np.stack([g, g]))
    assert np.isfinite(x).all()
    assert np.allclose(x[1], g)                           # the other matrix of the stack is unaffected
    _assert_least_squares_minimum_norm(h, g, x[0])


def test_when_the_svd_fails_the_orthogonal_factorization_gives_the_same_solution(monkeypatch):
    # Whether LAPACK's SVD converges on a matrix depends on the CPU (see above), so here its failure
    # is made certain: pinv raises as it does there; the solve of the singular matrix fails for real.
    d = np.load(ROOT / "tests" / "data" / "hessian_svd_fails.npz")
    h, g = d["h"], d["g"]
    # reference: the pseudo-inverse (cut-off as numpy's pinv, 1e-15 of the largest singular value) from
    # scipy's SVD with LAPACK's gesvd driver, whose QR iteration converged here on every machine tried,
    # where numpy's gesdd (divide and conquer) fails on some CPUs, this machine's included (2026-12-04)
    u, sv, vt = scipy.linalg.svd(h, lapack_driver="gesvd")
    keep = sv > 1e-15 * sv.max()
    want = vt[keep].T @ ((u[:, keep].T @ g) / sv[keep])

    def svd_fails(*args, **kwargs):
        raise np.linalg.LinAlgError("SVD did not converge")

    monkeypatch.setattr(np.linalg, "pinv", svd_fails)
    x = dense_solve(h[None], g[None])[0]
    assert np.isfinite(x).all()
    _assert_least_squares_minimum_norm(h, g, x)
    # two least-squares solvers agree to about condition number × machine epsilon (perturbation bound of
    # least squares, Golub & Van Loan, Matrix Computations, ch. 5; from memory); here κ ≈ 1.5e11
    tol = 10 * sv[keep].max() / sv[keep].min() * np.finfo(float).eps
    assert np.allclose(x, want, rtol=tol, atol=tol * np.abs(want).max())


def test_non_finite_rows_give_no_direction_rather_than_an_error():
    h = np.stack([np.diag([1.0, 0.0]), np.array([[np.inf, 0.0], [0.0, 0.0]])])
    x = dense_solve(h, np.ones((2, 2)))
    assert np.allclose(x[0], [1.0, 0.0]) and np.isnan(x[1]).all()


@pytest.mark.slow
def test_fit_of_the_log_that_broke_the_pilot_completes(tmp_path):
    # simulated: 24 up-down trials per condition; its pilot re-run met the matrix above and the fit
    # died with a traceback; the spread collapses (0.07 deg against a true 2.65), which the rows flag
    log = ROOT / "tests" / "data" / "collapsed_pilot" / "sim06-s1.trials.csv"
    done = run_cli("fit", log, "--out", tmp_path / "fit", "--seed", 8053, "--bootstrap", 20, "--no-figures")
    assert done.returncode == 0, done.stderr
    pse = (tmp_path / "fit" / "pse.csv").read_text()
    assert "steep" in pse
