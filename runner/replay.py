"""Fresh adaptive tracks for the bootstrap that re-runs them (:mod:`fitting.replay`).

``fitting`` may not import the session engine, so the command line hands it
a function built here: for an observer, a *factory* ``(condition, track) ->
track`` that builds the track exactly as the session did, from the protocol
stored in the sidecar next to each of the observer's logs.  Bayesian tracks
that shared what they learnt about spread and lapse in the session
(``bayes_share_spread``) borrow, in every re-run, what their real
counterparts borrowed before each trial (:meth:`TrackFactory.given`).
"""

from __future__ import annotations

import json
from pathlib import Path

from fitting.errors import InputError
from runner.protocol import parse_protocol
from runner.shared_evidence import recorded_evidence
from runner.tracks import as_started, new_track, new_track_copies


def _sidecar(log: Path) -> Path:
    return log.with_name(log.name[: -len(".trials.csv")] + ".session.json")


def track_factories(logs, strict: bool = True) -> dict:
    """Per observer, a track factory from the protocol in its logs' sidecars.

    Parameters
    ----------
    logs : list of paths
        Trial logs (``*.trials.csv``) with their sidecars beside them.
    strict : bool
        Refuse (True) or leave out (False) an observer whose sessions used
        different procedures or whose sidecar cannot be read.

    Returns
    -------
    dict of str -> callable
        Observers whose sidecars are missing are left out (their bootstrap
        keeps the levels fixed).

    Raises
    ------
    InputError
        A sidecar that is not readable JSON, or one observer's logs written
        with different procedures.
    """
    protocols: dict = {}
    mixed: set = set()
    for log in map(Path, logs):
        side = _sidecar(log)
        if not side.is_file():
            continue
        try:
            meta = json.loads(side.read_text(encoding="utf-8"))
            observer, text = str(meta["observer"]), meta["protocol"]["text"]
            protocol = as_started(parse_protocol(text, str(side)), meta)
        except (OSError, ValueError, KeyError, TypeError, InputError) as exc:
            if not strict:      # whose sessions this was is unknown: every pilot keeps the levels fixed
                return {}
            if isinstance(exc, InputError):
                raise
            raise InputError(str(side), "protocol", f"cannot read the session's protocol ({exc})") from None
        previous = protocols.setdefault(observer, protocol)
        if previous.procedure != protocol.procedure or previous.design.trials_per_track != protocol.design.trials_per_track:
            if strict:
                raise InputError(str(side), "procedure", f"observer {observer}'s sessions used different "
                                 "procedures; fit them without --rerun-tracks")
            mixed.add(observer)
    for observer in mixed:
        del protocols[observer]
    return {obs: TrackFactory(p) for obs, p in protocols.items()}


class TrackFactory:
    """Fresh tracks of one protocol, ``factory(condition, track_id)``; picklable, for worker processes.

    ``factory.copies(condition, track_id, n)`` gives ``n`` copies stepped
    together where the procedure has that form, else None
    (:func:`runner.tracks.new_track_copies`).

    Parameters
    ----------
    protocol : Protocol
    evidence : dict, optional
        ``(condition, track_id) -> RecordedEvidence`` (:meth:`given`).
    """

    def __init__(self, protocol, evidence: dict | None = None):
        self.protocol = protocol
        self.evidence = evidence or {}

    def given(self, sequence) -> TrackFactory:
        """This factory for one observer's answered trials, in the order they were run.

        Parameters
        ----------
        sequence : iterable of ((condition, track_id), level, response_cw)

        Returns
        -------
        TrackFactory
            Itself unless its Bayesian tracks shared spread and lapse; then
            one whose tracks borrow, before each trial, what the observer's
            other tracks had lent the real track before its trial of that
            number (:func:`runner.shared_evidence.recorded_evidence`).
        """
        proc = self.protocol.procedure
        if proc.method != "bayesian" or not proc.bayes_share_spread:
            return self
        keyed = [((str(c), str(t)), float(x), int(r)) for (c, t), x, r in sequence]
        made = recorded_evidence(keyed, lambda shared: new_track(self.protocol, 0, evidence=shared))
        return TrackFactory(self.protocol, made)

    def __call__(self, condition: str, track) -> object:
        return new_track(self.protocol, int(track), evidence=self.evidence.get((str(condition), str(track))))

    def copies(self, condition: str, track, n: int):
        return new_track_copies(self.protocol, int(track), n, self.evidence.get((str(condition), str(track))))
