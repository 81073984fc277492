"""Adaptive tracks of a block, built from the protocol's ``[procedure]``.

Tracks of one condition come in pairs that approach the PSE from opposite
sides: track 0 starts on the clockwise side and targets a clockwise
proportion above one half (``updown``: 0.5^(1/down); ``weighted``:
``target_cw``), track 1 mirrors it from the counter-clockwise side.  Further
tracks (``tracks_per_condition`` > 2) alternate.  ``bayesian`` tracks are
independent posteriors; ``constant`` tracks show every level equally often
in an order shuffled from the seed; with ``bayes_share_spread`` (the
default) the ``bayesian`` tracks of a session lend each other what they know
about spread and lapse (:mod:`runner.shared_evidence`).
"""

from __future__ import annotations

import zlib

from pydantic import ValidationError

from fitting.errors import InputError
from runner.adaptive import ConstantLevels, EntropyGrid, EntropyTrack, UpDownTrack, WeightedTrack
from runner.adaptive_batch import EntropyBatch, StepCopies
from runner.protocol import PSE_GRID_STEP_DEG, ProcedureSettings, Protocol
from runner.schedule import Schedule
from runner.shared_evidence import SharedEvidence


SHARING_KEY = "bayes_tracks_share_spread"   # in every sidecar written since the tracks could share
PRIOR_KEY = "bayes_tracks_pse_prior_sd_deg"  # in every sidecar written since the PSE prior's default was 6°

# Bayesian settings whose default changed after sessions were recorded: the
# sidecar key that records the value a session ran with, the [procedure]
# field, and the value that sessions whose sidecar lacks the key ran with
# when their protocol left the field out.
_CHANGED_DEFAULTS = (
    (SHARING_KEY, "bayes_share_spread", False),
    (PRIOR_KEY, "bayes_pse_prior_sd_deg", 0.0),
)


def tracks_record(protocol: Protocol) -> dict:
    """The sidecar entries that let :func:`as_started` re-run this session's tracks under later defaults."""
    return {key: getattr(protocol.procedure, field) for key, field, _ in _CHANGED_DEFAULTS}


def as_started(protocol: Protocol, sidecar: dict | None, source: str = "") -> Protocol:
    """The protocol as a session's tracks ran it, from the session's sidecar (None: a new session).

    Where the protocol leaves a setting of :func:`tracks_record` out, the
    session ran it with the default of its day: the value its sidecar
    records, or, in a sidecar written before that default changed, the old
    default (before ``bayes_share_spread`` the tracks ran alone; before the
    Gaussian PSE prior became the default they had a uniform one).  A resume
    and the bootstrap's re-runs must do the same, or the tracks would propose
    other levels than the log holds.

    Raises
    ------
    InputError
        A recorded value of the wrong type or outside the field's range,
        naming ``source`` (the sidecar's path) and the key.
    """
    proc = protocol.procedure
    if sidecar is None or proc.method != "bayesian":
        return protocol
    ran = {}
    for key, field, old in _CHANGED_DEFAULTS:
        value = sidecar.get(key, old)
        if isinstance(value, bool) != isinstance(old, bool) or not isinstance(value, type(old) | int):
            raise InputError(source, key, f"malformed sidecar: expected {type(old).__name__}, found {value!r:.40}")
        if field not in proc.model_fields_set and value != getattr(proc, field):
            ran[field] = value
    if not ran:
        return protocol
    try:
        settled = ProcedureSettings.model_validate({**proc.model_dump(exclude_unset=True), **ran})
    except ValidationError as exc:
        error = exc.errors()[0]
        key = next(k for k, f, _ in _CHANGED_DEFAULTS if f == error["loc"][0])
        raise InputError(source, key, f"malformed sidecar: {ran[error['loc'][0]]!r:.40} ({error['msg']})") from None
    return protocol.model_copy(update={"procedure": settled})


def entropy_settings(proc: ProcedureSettings, n: int, track: int = 0) -> dict:
    """Keyword arguments of Bayesian track number ``track`` (even: straddles from above) of ``n`` trials under ``proc``."""
    lo, hi = proc.bounds_deg
    grid = EntropyGrid(
        pse_min=proc.pse_range_deg[0], pse_max=proc.pse_range_deg[1], pse_step=PSE_GRID_STEP_DEG,
        spread_min=proc.spread_range_deg[0], spread_max=proc.spread_range_deg[1],
        level_min=lo, level_max=hi, level_step=PSE_GRID_STEP_DEG,
    )
    return {"max_trials": n, "target": proc.bayes_target, "grid": grid, "placement": proc.bayes_placement,
            "straddle_spreads": proc.bayes_straddle_spreads, "side": 1 if track % 2 == 0 else -1,
            "pse_prior_sd": proc.bayes_pse_prior_sd_deg}


def procedure_track(proc: ProcedureSettings, n: int, track: int, seed_words: tuple[int, ...], evidence=None):
    """The adaptive procedure of track number ``track`` of a condition.

    Parameters
    ----------
    proc : ProcedureSettings
        The protocol's ``[procedure]``.
    n : int
        Trials of the track.
    track : int
        Track number within its condition (even: starts on the clockwise side).
    seed_words : tuple of int
        Seed of the order of constant stimuli.
    evidence : SharedEvidence, optional
        ``bayesian``: what the session's other tracks lend this one.
    """
    cw_side = track % 2 == 0
    start = proc.start_offset_deg if cw_side else -proc.start_offset_deg
    stop = {"max_trials": n, "max_reversals": proc.max_reversals or None}
    if proc.method == "updown":
        return UpDownTrack(
            start_level=start, steps=proc.steps_deg, bounds=proc.bounds_deg, down=proc.k_down,
            side="cw" if cw_side else "ccw", **stop,
        )
    if proc.method == "weighted":
        target = proc.target_cw if cw_side else 1.0 - proc.target_cw
        return WeightedTrack(target_p_cw=target, start_level=start, steps=proc.steps_deg, bounds=proc.bounds_deg, **stop)
    if proc.method == "bayesian":
        return EntropyTrack(**entropy_settings(proc, n, track), evidence=evidence)
    repeats = n // len(proc.levels_deg)
    seed = zlib.crc32(repr(seed_words).encode())
    return ConstantLevels(levels=proc.levels_deg, repeats=repeats, seed=seed)


def new_track(protocol: Protocol, track: int, seed_words: tuple[int, ...] = (0,), evidence=None):
    """A fresh procedure for track number ``track`` of any condition (as a session builds it).

    ``evidence``: for ``bayesian``, what the other tracks lend it (:mod:`runner.shared_evidence`).
    """
    return procedure_track(protocol.procedure, protocol.design.trials_per_track, track, seed_words, evidence)


def new_track_copies(protocol: Protocol, track: int, copies: int, evidence=None):
    """``copies`` fresh copies of track number ``track``, stepped together; None where there is no such form.

    Up–down and weighted tracks: :class:`runner.adaptive_batch.StepCopies`;
    Bayesian tracks with the default target "pse":
    :class:`runner.adaptive_batch.EntropyBatch`.  Constant stimuli and the
    joint (PSE, spread) target gain nothing from it and have none.
    ``evidence`` as for :func:`new_track`, with one row per copy.
    """
    proc, n = protocol.procedure, protocol.design.trials_per_track
    if proc.method in ("updown", "weighted"):
        return StepCopies(procedure_track(proc, n, track, (0,)), copies)
    if proc.method == "bayesian" and proc.bayes_target == "pse":
        return EntropyBatch(copies, **entropy_settings(proc, n, track), evidence=evidence)
    return None


def make_tracks(protocol: Protocol, schedule: Schedule, seed: int) -> dict:
    """One adaptive procedure per condition and track, keyed ``condition/track``.

    Parameters
    ----------
    protocol : Protocol
    schedule : Schedule
    seed : int
        Session seed (used by constant stimuli for their order).

    Returns
    -------
    dict
        ``{"adapt+15_lag0/0": procedure, ...}`` in schedule condition order.
    """
    proc = protocol.procedure
    shared = SharedEvidence() if proc.method == "bayesian" and proc.bayes_share_spread else None
    out = {}
    for ci, cond in enumerate(schedule.conditions):
        for track in range(protocol.design.tracks_per_condition):
            out[f"{cond.name}/{track}"] = procedure_track(proc, protocol.design.trials_per_track,
                                                          track, (seed, 2, ci, track), shared)
    return out
