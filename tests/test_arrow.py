"""The Schur-complement solve of the joint fit's arrow-shaped Hessian."""

import numpy as np
import pytest

from fitting.arrow import Arrow
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
