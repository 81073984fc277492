"""Arrow-shaped curvature matrices of the joint psychometric fit, solved by Schur complement.

In a joint fit every condition has parameters of its own (its PSE, and its
spread when spreads are per condition) and shares a few with all the others
(the shared spread, the lapse).  The Hessian of the negative log-likelihood is
therefore an *arrow*: small blocks on the diagonal, one per condition, and a
thin border of ``m <= 2`` shared rows and columns::

    H = [ D_1             B_1 ]
        [      D_2        B_2 ]
        [           ...   ... ]
        [ B_1' B_2' ...   E   ]

Solving ``H d = g`` by eliminating the blocks first (Schur complement,
e.g. Golub & Van Loan, *Matrix Computations*, 4th ed., section 3.2.11 on block
elimination) costs O(conditions) per data set instead of O(conditions^3), and
it needs only tiny (1x1, 2x2) inverses that are done element-wise in numpy:
no dense ``P x P`` matrix is built and no multi-threaded LAPACK call is made,
so the solver costs the same CPU time as wall time.

Parameter order of the global vector (see :class:`fitting.psychometric.Layout`):
``pse_1..pse_C``, then the spreads (1 shared or C own), then the lapse.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg

# local parameter order in the per-condition blocks: (pse, log spread, lapse)
_PSE, _SPREAD, _LAPSE = 0, 1, 2


@dataclass
class Arrow:
    """A batch of arrow matrices.

    Attributes
    ----------
    d : ndarray, shape (B, C, q, q)
        Per-condition diagonal blocks (``q`` = 1, or 2 with own spreads).
    b : ndarray, shape (B, C, q, m)
        Border: coupling of each condition's own parameters with the shared ones.
    e : ndarray, shape (B, m, m)
        Corner: the shared parameters among themselves.
    """

    d: np.ndarray
    b: np.ndarray
    e: np.ndarray

    @classmethod
    def from_local(cls, local: np.ndarray, shared_spread: bool, free_lapse: bool) -> "Arrow":
        """Build from per-condition blocks ``local`` (B, C, 3, 3) in (pse, log spread, lapse) order."""
        own = [_PSE] if shared_spread else [_PSE, _SPREAD]
        border = ([_SPREAD] if shared_spread else []) + ([_LAPSE] if free_lapse else [])
        rows = local[:, :, own]
        return cls(np.ascontiguousarray(rows[..., own]), np.ascontiguousarray(rows[..., border]),
                   local[:, :, border][..., border].sum(axis=1))

    @property
    def q(self) -> int:
        return self.d.shape[-1]

    @property
    def m(self) -> int:
        return self.e.shape[-1]

    def __getitem__(self, idx) -> "Arrow":
        return Arrow(self.d[idx], self.b[idx], self.e[idx])

    def __setitem__(self, idx, other: "Arrow") -> None:
        self.d[idx], self.b[idx], self.e[idx] = other.d, other.b, other.e

    @classmethod
    def empty(cls, batch: int, n_conditions: int, q: int, m: int) -> "Arrow":
        return cls(np.empty((batch, n_conditions, q, q)), np.empty((batch, n_conditions, q, m)),
                   np.empty((batch, m, m)))

    # -- between global vectors and (own, border) parts ---------------------

    def split(self, v: np.ndarray):
        """Global vectors (B, P) -> own part (B, C, q) and border part (B, m)."""
        bsz, c = v.shape[0], self.d.shape[1]
        own = v[:, :c * self.q].reshape(bsz, self.q, c).transpose(0, 2, 1)
        return own, v[:, c * self.q:]

    def join(self, own: np.ndarray, border: np.ndarray) -> np.ndarray:
        """Inverse of :meth:`split`."""
        bsz = own.shape[0]
        return np.concatenate([own.transpose(0, 2, 1).reshape(bsz, -1), border], axis=1)

    def dense(self) -> np.ndarray:
        """The full (B, P, P) matrix (for checks and the rare fallback)."""
        bsz, c, q, m = self.b.shape
        p = c * q + m
        out = np.zeros((bsz, p, p))
        idx = np.arange(c)
        for i in range(q):
            for j in range(q):
                out[:, i * c + idx, j * c + idx] = self.d[:, :, i, j]
            out[:, i * c:(i + 1) * c, c * q:] = self.b[:, :, i, :]
            out[:, c * q:, i * c:(i + 1) * c] = np.swapaxes(self.b[:, :, i, :], 1, 2)
        out[:, c * q:, c * q:] = self.e
        return out

    # -- operations used by the Newton solver -------------------------------

    def hold(self, fixed: np.ndarray) -> "Arrow":
        """Rows and columns of ``fixed`` (B, P) parameters replaced by those of the identity."""
        fo, fb = self.split(fixed)
        eye_q, eye_m = np.eye(self.q, dtype=bool), np.eye(self.m, dtype=bool)
        d = np.where(fo[..., :, None] | fo[..., None, :], 0.0, self.d)
        d = d + np.where(eye_q & fo[..., :, None], 1.0, 0.0)
        b = np.where(fo[..., :, None] | fb[:, None, None, :], 0.0, self.b)
        e = np.where(fb[:, :, None] | fb[:, None, :], 0.0, self.e)
        e = e + np.where(eye_m & fb[:, :, None], 1.0, 0.0)
        return Arrow(d, b, e)

    def add_ridge(self, ridge: np.ndarray) -> "Arrow":
        """``H + ridge * I`` with ``ridge`` (B,)."""
        r = ridge[:, None, None]
        return Arrow(self.d + r[:, None] * np.eye(self.q), self.b, self.e + r * np.eye(self.m))

    def max_abs_diagonal(self) -> np.ndarray:
        """Largest absolute diagonal element of each matrix, (B,)."""
        dd = np.abs(np.diagonal(self.d, axis1=-2, axis2=-1)).reshape(self.d.shape[0], -1).max(axis=1)
        if self.m:
            dd = np.maximum(dd, np.abs(np.diagonal(self.e, axis1=-2, axis2=-1)).max(axis=1))
        return dd

    def may_be_indefinite(self, rel: float = 1e-9) -> np.ndarray:
        """Rows that may have an eigenvalue below ``rel`` times their scale, (B,) bool.

        A cheap screen before a dense eigen-decomposition: a symmetric arrow
        matrix is positive definite exactly when its diagonal blocks and the
        Schur complement of the blocks in it are (inertia additivity,
        Haynsworth 1968, *Linear Algebra and its Applications* 1).  Rows with
        non-finite entries are not returned.
        """
        finite = (np.isfinite(self.d).all(axis=(1, 2, 3)) & np.isfinite(self.b).all(axis=(1, 2, 3))
                  & np.isfinite(self.e).all(axis=(1, 2)))
        tol = rel * np.maximum(self.max_abs_diagonal(), 1.0)
        d = np.where(finite[:, None, None, None], self.d, 1.0)
        unsure = ~(np.linalg.eigvalsh(d).min(axis=(1, 2)) > tol)
        if self.m:
            with np.errstate(all="ignore"):
                dinv, ok = _small_inverse(d)
                s = self.e - np.einsum("bcqi,bcqj->bij", self.b, dinv @ self.b)
            s = np.where((finite & ok)[:, None, None] & np.isfinite(s), s, 0.0)
            unsure |= ~ok | ~(np.linalg.eigvalsh(s).min(axis=1) > tol)
        return unsure & finite

    def solve(self, g: np.ndarray) -> np.ndarray:
        """Solve ``H d = g`` for every matrix of the batch, g (B, P).

        Block elimination; rows whose blocks or Schur complement are singular
        (or give non-finite numbers) are solved densely with a pseudo-inverse
        fallback, as a general solver would.
        """
        with np.errstate(all="ignore"):     # singular rows are caught below
            out, ok = self._eliminate(g)
        bad = ~ok | ~np.isfinite(out).all(axis=1)
        if bad.any():
            out[bad] = dense_solve(self[bad].dense(), g[bad])
        return out

    def _eliminate(self, g: np.ndarray):
        """Block elimination; returns the solution and which rows had regular pivots."""
        go, gb = self.split(g)
        dinv, ok = _small_inverse(self.d)
        y = dinv @ self.b                                     # (B, C, q, m)
        z = (dinv @ go[..., None])[..., 0]                    # (B, C, q)
        if self.m:
            s = self.e - np.einsum("bcqi,bcqj->bij", self.b, y)
            r = gb - np.einsum("bcqi,bcq->bi", self.b, z)
            sinv, ok_s = _small_inverse(s)
            ok &= ok_s
            xb = (sinv @ r[..., None])[..., 0]
            xo = z - (y @ xb[:, None, :, None])[..., 0]
        else:
            xb = gb
            xo = z
        return self.join(xo, xb), ok


def dense_solve(h: np.ndarray, g: np.ndarray) -> np.ndarray:
    """Solve ``h d = g`` for a stack of dense matrices, falling back to a pseudo-inverse.

    A singular matrix gets the minimum-norm least-squares solution.  Where
    the pseudo-inverse's SVD does not converge (LAPACK fails on some
    matrices whose entries span ~300 decades, as a Hessian does when a
    condition's PSE has run far past its data), that matrix is solved by a
    complete orthogonal factorization instead (LAPACK ``gelsy``, QR with
    column pivoting: no iteration to fail).  A matrix or right-hand side
    with non-finite entries gives NaN, which the Newton solver treats as no
    descent direction.
    """
    out = np.full(g.shape, np.nan)
    ok = np.isfinite(h).all(axis=(1, 2)) & np.isfinite(g).all(axis=1)
    h, g = h[ok], g[ok]
    try:
        out[ok] = np.linalg.solve(h, g[..., None])[..., 0]
    except np.linalg.LinAlgError:
        try:
            out[ok] = np.einsum("bij,bj->bi", np.linalg.pinv(h), g)
        except np.linalg.LinAlgError:
            out[ok] = [_least_squares(hi, gi) for hi, gi in zip(h, g)]
    return out


def _least_squares(h: np.ndarray, g: np.ndarray) -> np.ndarray:
    """Minimum-norm least-squares solution of one finite system (see :func:`dense_solve`)."""
    try:
        return np.linalg.pinv(h) @ g
    except np.linalg.LinAlgError:
        return linalg.lstsq(h, g, lapack_driver="gelsy", check_finite=False)[0]


def _small_inverse(a: np.ndarray):
    """Inverses of a stack of 0x0, 1x1 or 2x2 matrices, element-wise; and which rows (axis 0) were regular."""
    k = a.shape[-1]
    lead = a.shape[:-2]
    if k == 0:
        return a.copy(), np.ones(a.shape[0], dtype=bool)
    if k == 1:
        det = a[..., 0, 0]
        inv = np.zeros_like(a)
        good = det != 0
        inv[..., 0, 0] = np.divide(1.0, det, out=np.zeros(lead), where=good)
    elif k == 2:
        p, q, r, s = a[..., 0, 0], a[..., 0, 1], a[..., 1, 0], a[..., 1, 1]
        det = p * s - q * r
        scale = np.maximum(np.abs(p * s), np.abs(q * r))
        good = (det != 0) & (np.abs(det) > 1e-14 * scale)
        f = np.divide(1.0, det, out=np.zeros(lead), where=good)
        inv = np.stack([np.stack([s * f, -q * f], axis=-1), np.stack([-r * f, p * f], axis=-1)], axis=-2)
    else:  # the layouts never need more than 2
        raise ValueError("blocks larger than 2x2 are not supported")
    good = good & np.isfinite(det)
    return inv, good.reshape(a.shape[0], -1).all(axis=1)
