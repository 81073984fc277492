"""Fresh adaptive tracks for the bootstrap that re-runs them (:mod:`fitting.replay`).

``fitting`` may not import the session engine, so the command line hands it
a function built here: for an observer, a *factory* ``(condition, track) ->
track`` that builds the track exactly as the session did, from the protocol
stored in the sidecar next to each of the observer's logs, and
``factory.session(n)``, copies of every track for ``n`` simulated sessions
at once.  Bayesian tracks that shared what they learnt about spread and
lapse in the session (``bayes_share_spread``) share it again, within each
simulated session, from that session's own answers.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from fitting.errors import InputError
from fitting.nback import is_stream_log
from fitting.provenance import check_sidecar_owner, log_cells, log_rows, protocol_by_observer
from fitting.tables import read_log_table
from runner.overview import settings_from_text
from runner.protocol import parse_protocol
from runner.schedule import design_conditions
from runner.shared_evidence import SharedEvidence
from runner.stream import STREAM_CONDITION
from runner.tracks import as_started, new_track, new_track_copies


def _sidecar(log: Path) -> Path:
    return log.with_name(log.name[: -len(".trials.csv")] + ".session.json")


def _read_session(side: Path):
    """A sidecar's content and the protocol its session ran (as started)."""
    meta = json.loads(side.read_text(encoding="utf-8"))
    # the grey levels of a [light] section are not needed here (the display is not opened): its profile, whose
    # relative path was resolved from the protocol's folder when the session ran, is not read again
    return meta, as_started(parse_protocol(meta["protocol"]["text"], str(side), resolve_light=False), meta, str(side))


def check_sidecar_matches(log: Path, side: Path, meta: dict, protocol) -> None:
    """Refuse a sidecar that belongs to another session than the log beside it.

    Its observer and session must be those the log's rows name
    (:func:`fitting.provenance.check_sidecar_owner`), and for adapt-test
    logs every condition and procedure of the rows must be its protocol's;
    a stream log's sidecar must hold a stream protocol whose K and
    directions are those of the rows' preceding periods, and an adapt-test
    log's an adapt-test protocol.  No track may hold more trials than the
    protocol gives one.

    Raises
    ------
    InputError
        Naming the sidecar and the field that disagrees.
    """
    cells = log_cells(log)
    check_sidecar_owner(log, side, meta, cells)
    if cells is None:
        return
    stream = is_stream_log(log)
    if stream != (protocol.stream is not None):
        kinds = ("an adapt-test block", "a stream block")
        raise InputError(str(side), "protocol", f"its protocol ({meta['protocol'].get('path')}) is "
                         f"{kinds[protocol.stream is not None]}, and its log {log.name} holds "
                         f"{'stream tests' if stream else 'adapt-test trials'}: {_ANOTHER_SESSION}")
    known = {STREAM_CONDITION} if stream else {c.name for c in design_conditions(protocol)}
    for field, found, allowed in (("condition", cells["condition"], known),
                                  ("procedure", cells["procedure"] - {"practice"}, {protocol.procedure.method})):
        stray = sorted(found - allowed)
        if stray:
            raise InputError(str(side), "protocol", f"its protocol ({meta['protocol'].get('path')}) has no {field} "
                             f"{' or '.join(map(repr, stray[:3]))}, which rows of its log {log.name} hold: "
                             f"{_ANOTHER_SESSION}")
    if stream:
        _check_preceding_periods(log, side, meta, protocol)
    _check_track_lengths(log, side, meta, protocol)


#: The end of every refusal of a sidecar that does not fit its log.
_ANOTHER_SESSION = ("the sidecar is another session's (put this session's own beside the log, or move it away), "
                    "or the log was edited")


def _check_preceding_periods(log: Path, side: Path, meta: dict, protocol) -> None:
    """Refuse a stream log whose tests follow other periods than the sidecar's stream shows.

    Every test of a stream follows ``stream.nback_periods`` periods, each in
    one of the directions ``stream.direction_step_deg`` apart: a sidecar of
    a stream with another K or other directions would describe (and plan)
    another experiment.  Cells that are not numbers are left to the fit,
    which names them.
    """
    s = protocol.stream
    directions = np.array(s.offsets_deg, dtype=float)
    for line, row in enumerate(log_rows(log, ("preceding_offsets_deg",)) or (), start=2):
        try:
            shown = [float(v) for v in row["preceding_offsets_deg"].split(";")]
        except ValueError:
            continue
        if not all(np.isfinite(shown)):     # the log's cell is at fault, not the sidecar
            raise InputError(str(log), f"line {line}, column preceding_offsets_deg",
                             f"{row['preceding_offsets_deg'][:40]!r}: expected finite numbers (';'-separated offsets)")
        where = f"line {line} of its log {log.name}"
        if len(shown) != s.nback_periods:
            raise InputError(str(side), "protocol", f"its protocol ({meta['protocol'].get('path')}) shows "
                             f"stream.nback_periods = {s.nback_periods} periods before each test, and {where} "
                             f"lists {len(shown)}: {_ANOTHER_SESSION}")
        odd = [v for v in shown if not np.isclose(directions, v, atol=1e-6).any()]
        if odd:
            raise InputError(str(side), "protocol", f"its protocol ({meta['protocol'].get('path')}) shows directions "
                             f"stream.direction_step_deg = {s.direction_step_deg:g} deg apart, and {where} lists "
                             f"an offset of {odd[0]:g} deg: {_ANOTHER_SESSION}")


def _check_track_lengths(log: Path, side: Path, meta: dict, protocol) -> None:
    """Refuse a log with more trials on a track (or more practice trials) than the sidecar's protocol gives one.

    The conditions of two protocols can be the same while their tracks are
    not as long: a sidecar of the shorter one beside the longer one's log
    would re-run the wrong tracks for the bootstrap.
    """
    d = protocol.design
    counts: dict = {}
    for cells in log_rows(log, ("condition", "track", "practice")) or ():
        key = "practice" if cells["practice"] == "1" else (cells["condition"], cells["track"])
        counts[key] = counts.get(key, 0) + 1
    for key, n in counts.items():
        most = d.practice_trials if key == "practice" else d.trials_per_track
        if n > most:
            what = "practice trials" if key == "practice" else f"trials on track {key[1]} of {key[0]}"
            raise InputError(str(side), "protocol", f"its protocol ({meta['protocol'].get('path')}) gives at most "
                             f"{most} {what}, and its log {log.name} holds {n}: {_ANOTHER_SESSION}")


def check_sidecars(logs) -> None:
    """:func:`check_sidecar_matches` for every log whose sidecar can be read; before a fit begins.

    One observer's sessions of different protocols are refused
    (:func:`fitting.provenance.protocol_by_observer`): ``fit`` would pool
    them into one PSE per condition.  Two simulated sessions of one
    observer with the same seed, protocol and observer model are refused
    too: their trials are one session twice,
    not new data (``simulate --session s2`` with the seed of s1 wrote such
    a copy before the label was mixed into the seed).  Sidecars that are
    missing or cannot be read are left to the fit, which notes them.

    Raises
    ------
    InputError
        A sidecar that belongs to another session than its log, an
        observer's sessions of different protocols, or a simulated session
        that repeats another.
    """
    simulated: dict = {}
    sessions, protocols = [], {}
    for log in map(Path, logs):
        side = _sidecar(log)
        try:
            meta, protocol = _read_session(side)
        except (OSError, ValueError, KeyError, TypeError, InputError):
            continue
        check_sidecar_matches(log, side, meta, protocol)
        sha = meta["protocol"].get("sha256")
        sessions.append({"observer": meta.get("observer"), "session": meta.get("session"), "sidecar": str(side),
                         "protocol_sha256": sha})
        protocols.setdefault(sha, {"path": meta["protocol"].get("path"), "text": meta["protocol"].get("text")})
        if meta.get("kind") != "simulation":
            continue        # a person answers afresh whatever the seed
        key = json.dumps([meta.get("observer"), meta["protocol"].get("sha256"), meta.get("session_seed"),
                          meta.get("observer_model")], sort_keys=True, default=str)
        first = simulated.setdefault(key, side)
        if first != side:
            raise InputError(str(side), "session_seed", f"is that of {first} (the same simulated observer, "
                             "protocol and seed): its log repeats that session's trials, it adds no new data; fit "
                             "one of the two")
    protocol_by_observer(sessions, protocols, settings_from_text)


def track_factories(logs, strict: bool = True, notes: list | None = None) -> dict:
    """Per observer, a track factory from the protocol in its logs' sidecars.

    Parameters
    ----------
    logs : list of paths
        Trial logs (``*.trials.csv``) with their sidecars beside them.
    strict : bool
        Refuse (True) or leave out (False) an observer whose sessions used
        different procedures or one of whose sidecars cannot be read (the
        observer named in that log's first row).
    notes : list, optional
        Receives one line for each thing left out, and why.

    Returns
    -------
    dict of str -> callable
        Observers whose sidecars are missing are left out (their bootstrap
        keeps the levels fixed).

    Raises
    ------
    InputError
        A sidecar that is not readable JSON, or one observer's logs written
        with different procedures (with ``strict``); a sidecar that belongs
        to another session than its log (always: :func:`check_sidecar_matches`).
    """
    notes = [] if notes is None else notes
    protocols: dict = {}
    mixed: set = set()
    unread: dict = {}          # observer -> why their sidecar could not be read (strict=False)
    bare = []
    for log in map(Path, logs):
        side = _sidecar(log)
        if not side.exists():      # a folder of that name is read, and reported, as an unreadable sidecar
            bare.append(log)
            continue
        try:
            meta, protocol = _read_session(side)
            observer = str(meta["observer"])
        except (OSError, ValueError, KeyError, TypeError, InputError) as exc:
            if strict:
                if isinstance(exc, InputError):
                    raise
                raise InputError(str(side), "protocol", f"cannot read the session's protocol ({exc})") from None
            why = exc.line() if isinstance(exc, InputError) else f"{side}: protocol: cannot be read ({exc})"
            observer = _log_observer(log)
            if observer is None:    # no trial of this session to re-run (a log the fit cannot read stops it)
                notes.append(f"{why}; its log {log} names no observer in a first row, so it adds no trials")
            else:
                unread.setdefault(observer, why)
            continue
        check_sidecar_matches(log, side, meta, protocol)
        previous = protocols.setdefault(observer, protocol)
        if previous.procedure != protocol.procedure or previous.design.trials_per_track != protocol.design.trials_per_track:
            if strict:
                raise InputError(str(side), "procedure", f"observer {observer}'s sessions used different "
                                 "procedures; fit them without --rerun-tracks")
            mixed.add(observer)
    if bare:
        which = str(bare[0]) if len(bare) == 1 else f"{len(bare)} logs (first {bare[0]})"
        notes.append(f"{which}: no sidecar beside the log; the bootstrap keeps the presented levels of these sessions fixed")
    for observer in sorted(mixed - unread.keys()):
        notes.append(
            f"observer {observer}'s sessions used different procedures; their bootstrap keeps the presented levels fixed")
    for observer, why in sorted(unread.items()):
        notes.append(f"{why}; observer {observer}'s bootstrap keeps the presented levels fixed")
    return {obs: TrackFactory(p) for obs, p in protocols.items() if obs not in mixed and obs not in unread}


def _log_observer(log: Path) -> str | None:
    """The observer of a trial log's first row; None when the log has no readable row naming one."""
    try:
        table = read_log_table(log)
    except InputError:
        return None
    names = table["observer"] if "observer" in table else ()
    return (str(names.iloc[0]) or None) if len(names) else None


class TrackFactory:
    """Fresh tracks of one protocol, ``factory(condition, track_id)``; picklable, for worker processes.

    A track from ``factory(...)`` runs alone; ``factory.session(n)`` gives
    the tracks of ``n`` simulated sessions (:class:`SessionCopies`).

    Parameters
    ----------
    protocol : Protocol
    """

    def __init__(self, protocol):
        self.protocol = protocol

    def __call__(self, condition: str, track) -> object:
        return new_track(self.protocol, int(track))

    def session(self, n: int) -> SessionCopies:
        """Copies of the session's tracks for ``n`` simulated sessions (:class:`SessionCopies`)."""
        return SessionCopies(self.protocol, n)


class SessionCopies:
    """The tracks of ``n`` simulated sessions of one protocol, one track at a time.

    ``copies(condition, track_id)`` gives ``n`` fresh copies of that track
    (copy r belongs to session r): stepped together
    (:func:`runner.tracks.new_track_copies`) where the procedure has that
    form, else a list of ``n`` tracks.  Bayesian tracks that share spread and
    lapse (``bayes_share_spread``) share them with the copies of the other
    tracks asked for from the same object, session by session, so these
    must be stepped in the order the session ran them.

    Parameters
    ----------
    protocol : Protocol
    n : int
        Simulated sessions (>= 1).

    Attributes
    ----------
    shared : bool
        True when the copies of different tracks lend each other evidence.
    """

    def __init__(self, protocol, n: int):
        proc = protocol.procedure
        self.protocol, self.n = protocol, int(n)
        self.shared = proc.method == "bayesian" and proc.bayes_share_spread
        self._batched = SharedEvidence() if self.shared else None
        self._each = [SharedEvidence() for _ in range(self.n)] if self.shared else [None] * self.n

    def __call__(self, condition: str, track):
        made = new_track_copies(self.protocol, int(track), self.n, self._batched)
        if made is None:
            made = [new_track(self.protocol, int(track), evidence=e) for e in self._each]
        return made
