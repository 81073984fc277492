"""Many copies of one adaptive track, stepped together.

The bootstrap that re-runs the adaptive tracks (:mod:`fitting.replay`)
steps a hundred or more fresh copies of a track side by side: each copy
proposes a level, the fitted observer answers, each copy takes its answer.
Stepped one at a time that is a Python call per copy and trial; here each
step is a few array operations over all copies.  Both classes have
``next_levels()`` (one level per copy, nan for a copy that has stopped),
``update(levels, responses)`` and ``finished``.

:class:`StepCopies` (up–down and weighted tracks) follows the rules of
:mod:`runner.adaptive` with the same arithmetic, so every copy presents
exactly the levels a single track would given the same answers.

:class:`EntropyBatch` (Bayesian tracks): one
:class:`~runner.adaptive.EntropyTrack` spends a few hundred microseconds per
trial, most of it in numpy calls too small to run at full speed; here the
copies' posteriors sit in one array and every step is a handful of large
array operations. The model, grid and placement rules are those of
:class:`~runner.adaptive.EntropyTrack`; three things differ, each for speed
(about 3× per copy and trial, ``benchmarks/bench_bayesian_step.py``):

* the sums run in a different order;
* the posterior is kept as probabilities (multiplied by each likelihood and
  renormalised) rather than as log-probabilities, which saves a logarithm
  per grid point and trial; a grid point below about 1e-308 of the total
  becomes exactly zero here, and counts as zero in the single track's
  entropies too;
* the expected entropies are computed in single precision.

A copy therefore proposes the same level as a single track given the same
answers, except where two levels' expected entropies agree to about 1e-6:
``tests/test_adaptive.py`` checks that at most 0.5 % of proposals differ and
that each difference is such a near-tie.  The bootstrap needs the same
behaviour in distribution, not a byte-identical log, so this is used only
there; sessions always run :class:`~runner.adaptive.EntropyTrack`.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy.special import ndtr, xlogy

from runner.adaptive import STRADDLE_SPREADS, EntropyGrid, EntropyTrack, UpDownTrack, WeightedTrack, _cdf_table
from runner.shared_evidence import LOG_FLOOR


class StepCopies:
    """``copies`` copies of an up–down or weighted track, stepped together.

    Parameters
    ----------
    prototype : UpDownTrack or WeightedTrack
        A fresh track whose settings every copy takes.
    copies : int
        Number of copies (>= 1).
    """

    def __init__(self, prototype, copies: int):
        if not isinstance(prototype, (UpDownTrack, WeightedTrack)) or prototype.n_trials:
            raise ValueError("prototype: expected a fresh UpDownTrack or WeightedTrack")
        if int(copies) != copies or copies < 1:
            raise ValueError(f"copies: expected a whole number >= 1, got {copies!r}")
        state = prototype.state()
        self.kind = state["kind"]
        self._steps = np.array(state["steps"], float)
        self._low, self._high = state["bounds"]
        self._max_trials, self._max_reversals = state["max_trials"], state["max_reversals"]
        if self.kind == "updown":
            self._down = state["down"]
            self._toward = -1 if state["side"] == "cw" else +1     # the move after `down` answers on the side
            self._side_answer = 1 if state["side"] == "cw" else 0
        else:
            p = state["target_p_cw"]
            self._factor = {+1: 2.0 * p, -1: 2.0 * (1.0 - p)}
        self._level = np.full(int(copies), float(state["start_level"]))
        self._last_move = np.zeros(int(copies), int)
        self._reversals = np.zeros(int(copies), int)
        self._trials = np.zeros(int(copies), int)
        self._run = np.zeros(int(copies), int)

    @property
    def stopped(self) -> np.ndarray:
        """Per copy: True once it reached ``max_trials`` trials or ``max_reversals`` reversals."""
        out = np.zeros(self._level.size, bool)
        if self._max_trials is not None:
            out |= self._trials >= self._max_trials
        if self._max_reversals is not None:
            out |= self._reversals >= self._max_reversals
        return out

    @property
    def finished(self) -> bool:
        """True once every copy has stopped."""
        return bool(self.stopped.all())

    def next_levels(self) -> np.ndarray:
        """The level each copy proposes, nan for a copy that has stopped."""
        return np.where(self.stopped, np.nan, self._level)

    def update(self, levels, responses) -> None:
        """Take one answer per copy (1 cw, 0 ccw); copies given a nan level, or stopped, are left as they are."""
        levels = np.asarray(levels, float).reshape(self._level.shape)
        responses = np.asarray(responses).reshape(self._level.shape)
        live = ~np.isnan(levels) & ~self.stopped
        if not np.isin(responses[live], (0, 1)).all():
            raise ValueError("update: expected answers of 1 or 0 for every copy that runs")
        if self.kind == "updown":
            on_side = responses == self._side_answer
            run = np.where(on_side, self._run + 1, 0)
            full = on_side & (run >= self._down)
            direction = np.where(on_side, np.where(full, self._toward, 0), -self._toward)
            self._run = np.where(live, np.where(full, 0, run), self._run)
            factor = 1.0
        else:
            direction = np.where(responses == 1, -1, +1)
            factor = np.where(direction > 0, self._factor[+1], self._factor[-1])
        moving = live & (direction != 0)
        # a reversal is a move against the previous move; the step shrinks at the reversal itself
        self._reversals += moving & (self._last_move != 0) & (direction != self._last_move)
        self._last_move = np.where(moving, direction, self._last_move)
        step = self._steps[np.minimum(self._reversals, self._steps.size - 1)]
        moved = np.minimum(np.maximum(levels + direction * step * factor, self._low), self._high)
        self._level = np.where(moving, moved, np.where(live, levels, self._level))
        self._trials += live


#: Rows of the entropy sums are taken in blocks of about this many elements (256 kB: they stay in cache).
_CHUNK_ELEMENTS = 65_536

#: Largest (μ, levels, copies) work array of one entropy step, in elements (64 MB in single precision).
_BATCH_ELEMENTS = 16_000_000

_TINY32 = np.float32(1e-37)  # floor before a log in single precision; m·log m there is 0 to that precision


def _entropy_terms(cw: np.ndarray, ccw: np.ndarray) -> np.ndarray:
    """Σ_r P(r) log P(r) − Σ m_r log m_r over the first axis (unnormalised marginals m_r; changes both).

    The sums over the first axis run over blocks of rows small enough to stay in cache.
    """
    np.maximum(ccw, 0.0, out=ccw)
    p_cw, p_ccw = cw.sum(axis=0), ccw.sum(axis=0)
    total = xlogy(p_cw, p_cw) + xlogy(p_ccw, p_ccw)
    rows = max(1, _CHUNK_ELEMENTS // cw[0].size)
    for m in (cw, ccw):
        for lo in range(0, m.shape[0], rows):
            block = m[lo:lo + rows]
            np.maximum(block, _TINY32, out=block)
            total -= (block * np.log(block)).sum(axis=0)
    return total


@lru_cache(maxsize=8)
def _table_by_pse(grid: EntropyGrid) -> np.ndarray:
    """The Φ table (μ, levels, σ) in single precision, shared by all copies of one grid (read-only).

    The bootstrap that re-runs a session holds copies of all its tracks at once.
    """
    table = np.ascontiguousarray(_cdf_table(grid).transpose(1, 0, 2), dtype=np.float32)
    table.flags.writeable = False
    return table


class EntropyBatch:
    """``copies`` independent Bayesian tracks with the same settings, stepped together.

    Parameters
    ----------
    copies : int
        Number of tracks (>= 1).
    max_trials, grid, placement, straddle_spreads, side, pse_prior_sd
        As for :class:`~runner.adaptive.EntropyTrack` (checked the same way).
    target : {"pse"}
        The only target stepped together: with the joint (PSE, spread)
        target each copy's work arrays are as large as a cache, and copies
        one at a time (:class:`~runner.adaptive.EntropyTrack`) are faster.
    evidence : SharedEvidence, optional
        Shared with copies of the session's other tracks
        (:mod:`runner.shared_evidence`), one row per copy: copy r lends its
        log evidence (copies, spread, lapse) to row r of the others and
        multiplies theirs into the posterior that chooses its levels, as the
        tracks of one session do.

    Notes
    -----
    Each track answers every trial (there are no missed answers in a
    simulated re-run), so all copies have the same trial count.
    """

    def __init__(self, copies: int, *, max_trials: int, target: str = "pse", grid: EntropyGrid | None = None,
                 placement: str = "entropy", straddle_spreads: float = STRADDLE_SPREADS, side: int = 1,
                 pse_prior_sd: float = 0.0, evidence=None):
        if target != "pse":
            raise ValueError(f"target: copies are stepped together for the target 'pse' only, got {target!r}")
        if int(copies) != copies or copies < 1:
            raise ValueError(f"copies: expected a whole number >= 1, got {copies!r}")
        one = EntropyTrack(max_trials=max_trials, target=target, grid=grid, placement=placement,
                           straddle_spreads=straddle_spreads, side=side, pse_prior_sd=pse_prior_sd)  # checks all
        self._straddle, self._side = float(straddle_spreads), one.straddle_side   # side of the first trial
        self.copies = int(copies)
        self.max_trials = max_trials
        self.placement, self.grid = one.placement, one.grid        # the target is always "pse"
        self._mu, self._sigma = self.grid.pse_values(), self.grid.spread_values()
        lapse = self.grid.lapse_values()
        self._half_lapse, self._keep = lapse / 2.0, 1.0 - lapse
        self._lapse_terms = np.stack([self._half_lapse, self._keep], axis=1)   # (λ, 2)
        self._levels = self.grid.level_values()
        table = _cdf_table(self.grid)                                    # (x, μ, σ)
        self._table_mxs = _table_by_pse(self.grid)                       # (μ, x, σ)
        self._table_flat = table.reshape(table.shape[0], -1)              # (x, μ·σ): the update's Φ
        cells = self._mu.size * self._sigma.size
        prior = one.posterior(borrowed=False).transpose(2, 0, 1).reshape(lapse.size, cells)   # (λ, μ·σ)
        self._post = np.repeat(prior[None], self.copies, axis=0)                                  # (R, λ, μ·σ)
        self.n_trials = 0
        self._evidence = evidence
        if evidence is not None:
            evidence.join(self)

    def _placing(self) -> np.ndarray:
        """The posteriors that choose levels, (R, λ, μ·σ): the own ones times the borrowed evidence."""
        if self._evidence is None:
            return self._post
        log_w = self._evidence.borrowed(self)                                  # (R, σ, λ), or 0 before any answer
        if np.ndim(log_w) == 0:
            return self._post
        w = np.exp(log_w - log_w.max(axis=(1, 2), keepdims=True)).transpose(0, 2, 1)     # (R, λ, σ)
        shape = (self.copies, w.shape[1], self._mu.size, self._sigma.size)
        post = (self._post.reshape(shape) * w[:, :, None, :]).reshape(self._post.shape)
        return post / post.sum(axis=(1, 2))[:, None, None]

    def _log_evidence(self) -> np.ndarray:
        """Each copy's own log evidence over (σ, λ), shape (R, σ, λ), max 0 per copy (see :mod:`runner.shared_evidence`)."""
        shape = (self.copies, self._keep.size, self._mu.size, self._sigma.size)
        with np.errstate(divide="ignore"):
            new = np.log(self._post.reshape(shape).sum(axis=2)).transpose(0, 2, 1)
        return np.maximum(new - new.max(axis=(1, 2), keepdims=True), LOG_FLOOR)

    @property
    def finished(self) -> bool:
        """True once every copy has ``max_trials`` answers."""
        return self.n_trials >= self.max_trials

    def posterior(self, borrowed: bool = True) -> np.ndarray:
        """Normalised posteriors, shape (copies, μ, σ, λ); ``borrowed=False``: from each copy's own answers."""
        shape = (self.copies, self._lapse_terms.shape[0], self._mu.size, self._sigma.size)
        post = self._placing() if borrowed else self._post
        return post.reshape(shape).transpose(0, 2, 3, 1).copy()

    def _marginals(self):
        """a = Σ_λ p·λ/2, b = Σ_λ p·(1 − λ) and the (μ, σ) marginal, each (copies, μ·σ)."""
        ab = (self._lapse_terms.T @ self._placing()).astype(np.float32)     # (R, 2, μ·σ)
        a, b = ab[:, 0], ab[:, 1]
        return a, b, b + 2.0 * a

    def _pse_cells(self, m: np.ndarray) -> np.ndarray:
        """(copies, μ·σ) -> (copies, μ): summed over σ."""
        return m.reshape(m.shape[0], self._mu.size, self._sigma.size).sum(axis=2)

    def expected_entropies(self) -> np.ndarray:
        """Expected posterior entropy (nats) of the PSE after one trial at each level.

        Returns
        -------
        numpy.ndarray
            Shape (copies, levels).
        """
        a, b, joint = self._marginals()
        a_mu, joint_mu = self._pse_cells(a), self._pse_cells(joint)
        b = b.reshape(self.copies, self._mu.size, -1)
        out = np.empty((self.copies, self._levels.size))
        step = max(1, _BATCH_ELEMENTS // self._table_mxs[..., 0].size)     # copies at a time: memory stays bounded
        for lo in range(0, self.copies, step):
            sl = slice(lo, lo + step)
            # cw[m, x, r] = Σ_σ Φ(x; m, σ) b[r, m, σ] + Σ_σ a[r, m, σ]: one matrix product per μ point
            cw = np.matmul(self._table_mxs, b[sl].transpose(1, 2, 0))
            cw += a_mu[sl].T[:, None, :]
            ccw = joint_mu[sl].T[:, None, :] - cw
            out[sl] = _entropy_terms(cw, ccw).T
        return out

    def next_levels(self) -> np.ndarray:
        """The level each copy proposes, shape (copies,); nan for every copy once finished."""
        if self.finished:
            return np.full(self.copies, np.nan)
        if self.placement == "entropy":
            pick = np.argmin(self.expected_entropies(), axis=1)
        else:
            post = self._placing().sum(axis=1).reshape(self.copies, self._mu.size, -1)    # (R, μ, σ)
            aim = post.sum(axis=2) @ self._mu
            if self.placement == "straddle":
                side = self._side if self.n_trials % 2 == 0 else -self._side
                aim = aim + side * self._straddle * (post.sum(axis=1) @ self._sigma)
            pick = np.argmin(np.abs(self._levels[None, :] - aim[:, None]), axis=1)
        return self._levels[pick]

    def update(self, levels, responses) -> None:
        """Take one answer per copy: ``levels`` (deg) and ``responses`` (1 cw, 0 ccw), shape (copies,)."""
        if self.finished:
            raise RuntimeError("EntropyBatch is finished; it takes no more answers")
        levels = np.asarray(levels, float).reshape(self.copies)
        responses = np.asarray(responses).reshape(self.copies)
        if not np.isin(responses, (0, 1)).all() or not np.isfinite(levels).all():
            raise ValueError("update: expected finite levels and answers of 1 or 0 for every copy")
        step = (levels - self.grid.level_min) / self.grid.level_step
        row = np.rint(step).astype(int)
        on_list = (np.abs(step - row) < 1e-9) & (row >= 0) & (row < self._levels.size)
        if on_list.all():       # the usual case: Φ of every level on the list is in the table already
            phi = self._table_flat[row]
        else:
            phi = ndtr((levels[:, None, None] - self._mu[None, :, None]) / self._sigma[None, None, :])
            phi = phi.reshape(self.copies, -1)
        phi = np.where(responses[:, None] == 1, phi, 1.0 - phi)     # P(ccw) = 1 − Φ
        for lapse, (half, keep) in enumerate(self._lapse_terms):
            self._post[:, lapse] *= half + keep * phi
        self._post /= self._post.sum(axis=(1, 2))[:, None, None]
        self.n_trials += 1
        if self._evidence is not None:
            self._evidence.refresh(self, self._log_evidence())
