"""What the Bayesian tracks of one session tell each other about spread and lapse.

The fit gives all conditions of an observer one spread and one lapse rate
(``fit``'s default); the Bayesian tracks can do the same while they choose
levels.  Each track keeps its own posterior over (PSE, spread, lapse) from
its own answers; for choosing a level it multiplies in, from every *other*
track of the session, that track's likelihood summed over its own PSE grid,
a function of (spread, lapse) alone.  With independent uniform priors on
the tracks' PSEs and one uniform prior on (spread, lapse) this is exactly
the posterior of the track's (PSE, spread, lapse) given all answers of the
session (Bayes' rule; the other PSEs are summed out one track at a time
because their likelihoods factorise).

With the spread known from the whole session, a track's least-expected-
entropy level moves from about half a spread off its PSE (where a lone track
learns the spread) towards the PSE, which is where the PSE is learnt
(``benchmarks/README.md``, "Tracks that share the spread").  The two tracks
of a condition stay two posteriors of their own PSE: pooling them as well
(one posterior per condition) was measured and left out, because it held
the trials so close to the PSE that the intervals no longer kept their level.

The bootstrap that re-runs the tracks (:mod:`fitting.replay`) simulates
whole sessions the same way: copies of every track, stepped in the log's
order, lend each other what their own simulated answers say, one row per
simulated session (:class:`runner.adaptive_batch.EntropyBatch` with a
:class:`SharedEvidence` whose arrays have a leading copies axis).  A track
with no evidence object borrows nothing (a lone track).
"""

from __future__ import annotations

import numpy as np

#: Log weights are kept at or above this floor (exp of it is 0 in double precision), so that a running
#: total of them is finite and one member's share can be taken out of it again.
LOG_FLOOR = -1.0e4


def log_evidence(log_post: np.ndarray) -> np.ndarray:
    """A track's log evidence over (spread, lapse) from its log posterior (PSE, spread, lapse), max 0.

    The posterior summed over the track's PSE grid; each column underflowing
    to 0 is kept at :data:`LOG_FLOOR`.
    """
    with np.errstate(divide="ignore"):
        new = np.log(np.exp(log_post - log_post.max()).sum(axis=0))
    return np.maximum(new - new.max(), LOG_FLOOR)


class SharedEvidence:
    """Log evidence over (spread, lapse) of a session's Bayesian tracks, each lending to the others.

    A member's evidence is an array (spread, lapse), or (copies, spread,
    lapse) for copies of tracks stepped together (row r: simulated session
    r); members of one evidence object have the same shape.
    """

    def __init__(self):
        self._evidence: dict[int, np.ndarray | float] = {}
        self._total: np.ndarray | float = 0.0
        self.version = 0

    def join(self, member) -> None:
        """Add a track (with no answers yet: it lends nothing until its first answer)."""
        self._evidence.setdefault(id(member), 0.0)

    def refresh(self, member, evidence: np.ndarray) -> None:
        """Take the member's new log evidence after an answer (:func:`log_evidence`, or one per copy)."""
        key = id(member)
        self._total = self._total + evidence - self._evidence[key]
        self._evidence[key] = evidence
        self.version += 1

    def borrowed(self, member) -> np.ndarray | float:
        """Σ of the other members' log evidence, shape as theirs, or 0.0 before any answer."""
        return self._total - self._evidence.get(id(member), 0.0)
