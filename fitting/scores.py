"""Standardised residuals read against Student's t, as normal scores, and their χ² (pure numpy).

``compare`` reads a residual ``r_j / sd_j`` whose standard error is itself
estimated on ν degrees of freedom against t_ν, maps it to the normal score
with the same tail probability, and sums the scores through the inverse of
the residuals' correlation: ``χ² = z' C^-1 z``.  With ν infinite this is
``r' V^-1 r``.  The functions take leading axes of independent sets, so the
simulated group statistics of :mod:`fitting.group_chi2` use the same code as
the table's rows.
"""

from __future__ import annotations

import numpy as np
# scipy.special, not scipy.stats: the same functions bit for bit, without stats' 0.3 s import
from scipy import special


def normal_scores(standardised, dof):
    """Map standardised residuals read against Student's t on ``dof`` to normal scores.

    ``dof`` may be a scalar or one value per residual; non-finite values
    (infinite degrees of freedom) leave the residual as it is.
    """
    t = np.asarray(standardised, float)
    nu = np.broadcast_to(np.asarray(dof, float), t.shape)
    out = t.copy()
    finite = np.isfinite(nu) & (nu > 0)
    if finite.any():
        # upper tail by symmetry keeps precision far out in both tails
        tail = special.stdtr(nu[finite], -np.abs(t[finite]))
        out[finite] = np.sign(t[finite]) * -special.ndtri(np.clip(tail, 1e-300, 0.5))
    return out


def inverse(v: np.ndarray) -> np.ndarray:
    """Inverse of ``v`` (..., n, n); the pseudo-inverse where it is singular."""
    try:
        return np.linalg.inv(v)
    except np.linalg.LinAlgError:
        return np.linalg.pinv(v)


def score_chi2(resid, cov, dof, scale: float = 1.0):
    """``scale · z' C^-1 z`` for residuals (..., n) with covariance (..., n, n).

    ``z`` are the normal scores of ``resid / sd`` read against t on ``dof``
    (scalar or (..., n); infinite: read as normal), ``sd`` and ``C`` the
    standard deviations and correlation of ``cov``; ``scale`` is a factor on
    the inverse (Hartlap's, for a covariance from bootstrap replicates).
    """
    v = np.asarray(cov, float)
    sd = np.sqrt(np.einsum("...jj->...j", v))
    z = normal_scores(np.asarray(resid, float) / sd, dof)
    corr = v / (sd[..., :, None] * sd[..., None, :])
    return scale * np.einsum("...j,...jk,...k->...", z, inverse(corr), z)
