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

from runner.adaptive import ConstantLevels, EntropyGrid, EntropyTrack, UpDownTrack, WeightedTrack
from runner.adaptive_batch import EntropyBatch, StepCopies
from runner.protocol import PSE_GRID_STEP_DEG, ProcedureSettings, Protocol
from runner.schedule import Schedule
from runner.shared_evidence import SharedEvidence


SHARING_KEY = "bayes_tracks_share_spread"   # in every sidecar written since the tracks could share


def as_started(protocol: Protocol, sidecar: dict | None) -> Protocol:
    """The protocol as a session's tracks ran it, from the session's sidecar (None: a new session).

    Sessions whose sidecar predates ``bayes_share_spread`` (it has no
    ``SHARING_KEY``) ran their Bayesian tracks alone; a resume and the
    bootstrap's re-runs must do the same, or the tracks would propose other
    levels than the log holds.
    """
    if sidecar is None or SHARING_KEY in sidecar or protocol.procedure.method != "bayesian":
        return protocol
    return protocol.model_copy(update={"procedure": protocol.procedure.model_copy(
        update={"bayes_share_spread": False})})


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
