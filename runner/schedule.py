"""The trial list of a block.

A block is every adapter offset × every lag, plus a baseline without
adapter, each condition run by ``design.tracks_per_condition`` adaptive
tracks of ``design.trials_per_track`` trials.  The tracks of all conditions
are interleaved at random (from the seed), after ``design.practice_trials``
practice trials.

Intervening directions (``design.intervening = "balanced"``)
-------------------------------------------------------------
For a condition with lag *k*, each of the *k* intervening positions gets its
own sequence of offsets over the condition's trials.  Each sequence is built
from mirrored pairs ``(+o, -o)`` of the offsets in
``design.intervening_offsets_deg``, cycling through the pairs, then shuffled.
Every position therefore shows each offset and its mirror equally often
(to within one trial when the count is odd), so any after-effect that is an
odd function of the offset — as the after-effect DoG (README, Models) is — sums to zero over
the condition and adds no net bias to its PSE; it only adds variance.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from runner.protocol import Protocol


@dataclass(frozen=True)
class Condition:
    """One cell of the design.

    Attributes
    ----------
    name : str
        ``baseline`` or ``adapt+15_lag2`` style.
    adapter_offset_deg : float or None
        None for the baseline.
    lag : int or None
        None for the baseline.
    """

    name: str
    adapter_offset_deg: float | None
    lag: int | None


@dataclass(frozen=True)
class ScheduledTrial:
    """A slot in the block, before its test level is chosen.

    Attributes
    ----------
    condition : Condition
    track : int or None
        Track within the condition; None for practice.
    intervening_offsets_deg : tuple of float
    practice : bool
    practice_offset_deg : float or None
        The signed test offset of a practice trial.
    """

    condition: Condition
    track: int | None
    intervening_offsets_deg: tuple[float, ...]
    practice: bool = False
    practice_offset_deg: float | None = None


@dataclass(frozen=True)
class Schedule:
    """The whole block in presentation order.

    Attributes
    ----------
    conditions : tuple of Condition
        Baseline first, then offsets × lags.
    slots : tuple of ScheduledTrial
        Practice slots first, then the interleaved main slots.
    """

    conditions: tuple[Condition, ...]
    slots: tuple[ScheduledTrial, ...]

    @property
    def n_practice(self) -> int:
        """Number of practice slots."""
        return sum(s.practice for s in self.slots)

    @property
    def n_main(self) -> int:
        """Number of main (analysed) slots."""
        return len(self.slots) - self.n_practice


def condition_name(adapter_offset_deg: float | None, lag: int | None) -> str:
    """The log's condition label, e.g. ``adapt-30_lag2`` or ``baseline``."""
    if adapter_offset_deg is None:
        return "baseline"
    return f"adapt{adapter_offset_deg:+g}_lag{lag}"


def design_conditions(protocol: Protocol) -> tuple[Condition, ...]:
    """Baseline followed by every adapter offset × lag, in protocol order."""
    out = [Condition("baseline", None, None)]
    for lag in protocol.design.lags:
        for offset in protocol.design.adapter_offsets_deg:
            out.append(Condition(condition_name(float(offset), lag), float(offset), lag))
    return tuple(out)


def balanced_offsets(n: int, offsets: list[float], rng: np.random.Generator) -> list[float]:
    """``n`` intervening offsets in mirrored pairs, shuffled.

    Parameters
    ----------
    n : int
        How many are needed.
    offsets : list of float
        A set symmetric about 0 (validated by the protocol).
    rng : numpy.random.Generator

    Returns
    -------
    list of float
        Each pair ``(+o, -o)`` appears ``n // 2 // n_pairs`` or one more
        times; offsets that are their own mirror (0, 180) form pairs with
        themselves.  When ``n`` is odd the last element is unpaired.
    """
    singles = sorted({float(o) for o in offsets if o in (0, 180, -180)})
    pairs = [(float(o), -float(o)) for o in sorted({abs(o) for o in offsets}) if o not in (0, 180)]
    pairs += [(s, s) for s in singles]
    order = rng.permutation(len(pairs))
    out: list[float] = []
    for i in range(n // 2):
        out.extend(pairs[order[i % len(pairs)]])
    if n % 2:
        extra = pairs[order[(n // 2) % len(pairs)]]
        out.append(extra[int(rng.integers(2))])
    return [out[i] for i in rng.permutation(len(out))]


def build_schedule(protocol: Protocol, seed: int) -> Schedule:
    """Lay out a block reproducibly from a seed.

    Parameters
    ----------
    protocol : Protocol
    seed : int

    Returns
    -------
    Schedule
    """
    design = protocol.design
    rng = np.random.default_rng([seed, 1])
    conditions = design_conditions(protocol)
    n_per_condition = design.tracks_per_condition * design.trials_per_track

    intervening: dict[str, list[tuple[float, ...]]] = {}
    for cond in conditions:
        lag = cond.lag or 0
        if design.intervening == "reference":
            columns = [[0.0] * n_per_condition for _ in range(lag)]
        else:
            columns = [balanced_offsets(n_per_condition, design.intervening_offsets_deg, rng) for _ in range(lag)]
        intervening[cond.name] = [tuple(col[i] for col in columns) for i in range(n_per_condition)]

    keys = [(c, t) for c in range(len(conditions)) for t in range(design.tracks_per_condition)]
    order = np.repeat(np.arange(len(keys)), design.trials_per_track)
    order = order[rng.permutation(order.size)]
    used = {c.name: 0 for c in conditions}
    main = []
    for k in order:
        ci, track = keys[k]
        cond = conditions[ci]
        main.append(ScheduledTrial(cond, track, intervening[cond.name][used[cond.name]]))
        used[cond.name] += 1

    practice = []
    for _ in range(design.practice_trials):
        cond = conditions[int(rng.integers(len(conditions)))]
        sign = 1.0 if rng.random() < 0.5 else -1.0
        lag = cond.lag or 0
        offsets = tuple(float(o) for o in rng.choice(design.intervening_offsets_deg, size=lag)) if lag else ()
        if design.intervening == "reference":
            offsets = (0.0,) * lag
        practice.append(
            ScheduledTrial(cond, None, offsets, practice=True, practice_offset_deg=sign * design.practice_offset_deg)
        )
    return Schedule(conditions=conditions, slots=tuple(practice + main))
