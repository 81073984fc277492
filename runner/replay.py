"""Fresh adaptive tracks for the bootstrap that re-runs them (:mod:`fitting.replay`).

``fitting`` may not import the session engine, so the command line hands it
a function built here: for an observer, a *factory* ``(condition, track) ->
track`` that builds the track exactly as the session did, from the protocol
stored in the sidecar next to each of the observer's logs.
"""

from __future__ import annotations

import json
from pathlib import Path

from fitting.errors import InputError
from runner.protocol import parse_protocol
from runner.tracks import new_track, new_track_copies


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
            protocol = parse_protocol(text, str(side))
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
    """

    def __init__(self, protocol):
        self.protocol = protocol

    def __call__(self, condition: str, track) -> object:
        return new_track(self.protocol, int(track))

    def copies(self, condition: str, track, n: int):
        return new_track_copies(self.protocol, int(track), n)
