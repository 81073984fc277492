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
from runner.protocol import as_started, parse_protocol
from runner.tracks import new_track


def _sidecar(log: Path) -> Path:
    return log.with_name(log.name[: -len(".trials.csv")] + ".session.json")


def track_factories(logs) -> dict:
    """Per observer, a track factory from the protocol in its logs' sidecars.

    Parameters
    ----------
    logs : list of paths
        Trial logs (``*.trials.csv``) with their sidecars beside them.

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
    for log in map(Path, logs):
        side = _sidecar(log)
        if not side.is_file():
            continue
        try:
            meta = json.loads(side.read_text(encoding="utf-8"))
            observer, text = str(meta["observer"]), meta["protocol"]["text"]
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise InputError(str(side), "protocol", f"cannot read the session's protocol ({exc})") from None
        protocol = as_started(parse_protocol(text, str(side)), meta)
        previous = protocols.setdefault(observer, protocol)
        if previous.procedure != protocol.procedure or previous.design.trials_per_track != protocol.design.trials_per_track:
            raise InputError(str(side), "procedure", f"observer {observer}'s sessions used different procedures; "
                             "fit them without --rerun-tracks")

    def factory_for(protocol):
        return lambda condition, track: new_track(protocol, int(track))

    return {obs: factory_for(p) for obs, p in protocols.items()}
