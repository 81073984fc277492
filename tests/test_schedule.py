"""The trial list of a block: counts, interleaving, balance, practice."""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest

from runner.protocol import load_protocol
from runner.schedule import balanced_offsets, build_schedule

from conftest import PROTOCOLS


@pytest.fixture(scope="module")
def protocol():
    return load_protocol(PROTOCOLS / "offset_by_lag.toml")


def test_every_condition_and_track_gets_its_trials(protocol):
    s = build_schedule(protocol, seed=3)
    d = protocol.design
    main = [t for t in s.slots if not t.practice]
    counts = Counter((t.condition.name, t.track) for t in main)
    assert len(counts) == (1 + len(d.adapter_offsets_deg) * len(d.lags)) * d.tracks_per_condition
    assert set(counts.values()) == {d.trials_per_track}
    assert all(t.practice for t in s.slots[: d.practice_trials])
    assert not any(t.practice for t in s.slots[d.practice_trials :])


@pytest.mark.parametrize("seed", [0, 1, 2, 99])
def test_intervening_directions_are_balanced_per_condition_and_position(protocol, seed):
    s = build_schedule(protocol, seed)
    by_condition: dict[str, list[tuple[float, ...]]] = {}
    for t in s.slots:
        if not t.practice:
            by_condition.setdefault(t.condition.name, []).append(t.intervening_offsets_deg)
    for name, seqs in by_condition.items():
        lag = len(seqs[0])
        assert all(len(x) == lag for x in seqs)
        for position in range(lag):
            values = Counter(x[position] for x in seqs)
            for o in protocol.design.intervening_offsets_deg:
                # each offset appears as often as its mirror: an odd after-effect cancels
                assert values[o] == values[-o], (name, position, values)
            assert sum(v * n for v, n in values.items()) == 0


def test_the_block_is_reproducible_from_the_seed_and_differs_between_seeds(protocol):
    a, b, c = build_schedule(protocol, 5), build_schedule(protocol, 5), build_schedule(protocol, 6)
    assert a == b
    assert [t.condition.name for t in a.slots] != [t.condition.name for t in c.slots]


def test_interleaving_is_random_not_blocked(protocol):
    s = build_schedule(protocol, 8)
    names = [t.condition.name for t in s.slots if not t.practice]
    repeats = sum(x == y for x, y in zip(names, names[1:]))
    # with 33 conditions at random, about 1/33 of neighbours repeat by chance
    assert repeats < len(names) / 10


def test_balanced_offsets_with_an_odd_count_is_off_by_at_most_one():
    rng = np.random.default_rng(0)
    values = balanced_offsets(11, [-90.0, -45.0, 45.0, 90.0], rng)
    assert len(values) == 11
    assert abs(sum(np.sign(values))) == 1
