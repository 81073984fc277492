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

Two kinds of evidence:

* :class:`SharedEvidence`, live, for a session: every member's log
  evidence is refreshed after each of its answers;
* :class:`RecordedEvidence`, for the bootstrap that re-runs one track:
  the evidence the session's *other* tracks had gathered before each of the
  track's trials, replayed from the log (:func:`recorded_evidence`), so the
  re-run copies borrow what the real track borrowed.

A track with no evidence object borrows nothing (a lone track).
"""

from __future__ import annotations

import numpy as np


class SharedEvidence:
    """Log evidence over (spread, lapse) of a session's Bayesian tracks, each lending to the others."""

    def __init__(self):
        self._evidence: dict[int, np.ndarray | float] = {}
        self.version = 0

    def join(self, member) -> None:
        """Add a track (with no answers yet: it lends nothing until its first answer)."""
        self._evidence.setdefault(id(member), 0.0)

    def refresh(self, member, log_post: np.ndarray) -> None:
        """Take the member's new log posterior (PSE, spread, lapse) after an answer."""
        # the track keeps its log posterior with maximum 0, so exp cannot overflow; a (spread, lapse) column
        # that underflows to log 0 = −inf has no weight beside the maximum's column anyway
        with np.errstate(divide="ignore"):
            new = np.log(np.exp(log_post - log_post.max()).sum(axis=0))
        self._evidence[id(member)] = new - new.max()
        self.version += 1

    def borrowed(self, member) -> np.ndarray | float:
        """Σ of the other members' log evidence, shape (spread, lapse), or 0.0 before any answer."""
        own = id(member)
        return sum((e for k, e in self._evidence.items() if k != own), 0.0)


class RecordedEvidence:
    """The (spread, lapse) log weights a track borrowed before each of its trials, replayed.

    Parameters
    ----------
    steps : ndarray, shape (T, spread, lapse)
        Row t: what the track borrowed before its trial t + 1.  A track run
        for more trials than recorded keeps the last row.
    """

    version = 0

    def __init__(self, steps: np.ndarray):
        self.steps = np.asarray(steps, dtype=float)

    def join(self, member) -> None:
        """Nothing to do: the weights do not depend on the members."""

    def refresh(self, member, log_post: np.ndarray) -> None:
        """Nothing to do: the weights are recorded."""

    def borrowed(self, member) -> np.ndarray | float:
        """The row for the member's next trial."""
        if self.steps.shape[0] == 0:
            return 0.0
        return self.steps[min(member.n_trials, self.steps.shape[0] - 1)]


def recorded_evidence(sequence, new_track) -> dict:
    """Replay a session's Bayesian tracks and record what each borrowed before each of its trials.

    Parameters
    ----------
    sequence : iterable of (key, level, response_cw)
        The answered trials in the order they were run; ``key`` names the
        track (for example ``(condition, track)``).
    new_track : callable
        ``new_track(evidence)``: a fresh track of the session's procedure
        that joins ``evidence``.

    Returns
    -------
    dict
        ``key -> RecordedEvidence``.
    """
    shared = SharedEvidence()
    tracks: dict = {}
    rows: dict = {}
    for key, level, response in sequence:
        track = tracks.get(key)
        if track is None:
            track = tracks[key] = new_track(shared)
            rows[key] = []
        rows[key].append(np.zeros((track.grid.spread_count, len(track.grid.lapses))) + shared.borrowed(track))
        if not track.finished:
            track.update(level, response)
    return {key: RecordedEvidence(np.array(r)) for key, r in rows.items()}
