"""Tests of runner.dots: signal fraction, displacement, direction, density, lifetimes."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from runner.dots import DotField, DotSpec


def _spec(**changes) -> DotSpec:
    values = dict(
        aperture_radius_deg=5.0,
        density_per_deg2=20.0,
        dot_size_deg=0.1,
        speed_deg_s=6.0,
        coherence=0.5,
        lifetime_frames=8,
        refresh_hz=60.0,
    )
    values.update(changes)
    return DotSpec(**values)


def _field(seed=1, **changes) -> DotField:
    return DotField(_spec(**changes), np.random.default_rng(seed))


def test_dot_count_and_starting_state():
    field = _field()
    assert field.n_dots == round(20.0 * math.pi * 5.0**2) == 1571
    assert field.positions.shape == (1571, 2) and field.positions.dtype == float
    assert np.all(np.hypot(*field.positions.T) <= 5.0)
    # staggered lifetimes: initial ages cover 0..L-1 in equal numbers (±1)
    counts = np.bincount(field.ages, minlength=8)
    assert counts.size == 8 and counts.max() - counts.min() <= 1
    with pytest.raises(ValueError):
        field.positions[0, 0] = 99.0  # the caller gets a read-only view


def test_signal_fraction_is_exact_and_drawn_afresh_each_frame():
    # rule documented in runner/dots.py: a fresh random subset each frame (common practice, no source)
    field = _field(coherence=0.3)
    field.start_period(90.0)
    previous = None
    stayed = total = 0
    for _ in range(200):
        field.step()
        moving = field.ages != 0
        assert field.signal.sum() == round(0.3 * moving.sum())
        assert not np.any(field.signal & ~moving)
        if previous is not None:
            both = moving & previous[1]
            stayed += np.count_nonzero(field.signal & previous[0] & both)
            total += np.count_nonzero(previous[0] & both)
        previous = (field.signal.copy(), moving)
    # with a fixed signal identity this would be 1; with a fresh subset it is the coherence
    assert stayed / total == pytest.approx(0.3, abs=0.02)


@pytest.mark.parametrize("direction", [0.0, 90.0, 210.0, -33.3])
def test_displacement_and_direction_per_frame(direction):
    field = _field(coherence=0.6, lifetime_frames=1000)
    field.start_period(direction)
    step = 6.0 / 60.0
    u = np.array([math.cos(math.radians(direction)), math.sin(math.radians(direction))])
    noise_angles = []
    n_wrapped = 0
    for _ in range(40):
        before = field.positions.copy()
        after = field.step().copy()
        moved = after - before
        distance = np.hypot(*moved.T)
        # every dot moves one step, except the few that wrapped round the edge
        # (noise directions are float32, so their steps are exact to ~1e-8 relative)
        plain = np.isclose(distance, step, rtol=1e-6, atol=0)
        sig = field.signal
        assert np.count_nonzero(~plain) < 0.05 * field.n_dots
        # direction convention (README, Conventions): counter-clockwise from rightward, x right, y up
        np.testing.assert_allclose(moved[sig & plain], np.broadcast_to(step * u, moved[sig & plain].shape), atol=1e-12)
        noise_angles.append(np.arctan2(moved[~sig & plain, 1], moved[~sig & plain, 0]))
        # a wrapped signal dot stays on its chord and re-enters with its overshoot
        wrapped = sig & ~plain
        n_wrapped += np.count_nonzero(wrapped)
        h_before = before[wrapped] @ np.array([-u[1], u[0]])
        h_after = after[wrapped] @ np.array([-u[1], u[0]])
        np.testing.assert_allclose(h_after, h_before, atol=1e-9)
        half_chord = np.sqrt(25.0 - h_before**2)
        np.testing.assert_allclose(after[wrapped] @ u, before[wrapped] @ u + step - 2 * half_chord, atol=1e-9)
        assert np.all(np.hypot(*after.T) <= 5.0 * (1 + 1e-12))
    assert n_wrapped > 0
    # noise dots: directions uniform on the circle (Kolmogorov–Smirnov test, scipy.stats)
    angles = np.concatenate(noise_angles) % (2 * math.pi)
    assert stats.kstest(angles / (2 * math.pi), "uniform").pvalue > 1e-3


def test_static_period_moves_nothing_but_replots():
    field = _field(lifetime_frames=5)
    field.start_period(None)
    for _ in range(12):
        before = field.positions.copy()
        field.step()
        replotted = field.ages == 0
        assert np.array_equal(field.positions[~replotted], before[~replotted])
        assert np.all(np.any(field.positions[replotted] != before[replotted], axis=1))
        assert replotted.sum() in (math.floor(1571 / 5), math.ceil(1571 / 5))
        assert not field.signal.any()


def test_lifetimes_are_exact_and_staggered():
    lifetime = 6
    field = _field(lifetime_frames=lifetime)
    field.start_period(45.0)
    replot_frames = [[] for _ in range(field.n_dots)]
    per_frame = []
    for frame in range(1, 61):
        field.step()
        fresh = np.flatnonzero(field.ages == 0)
        per_frame.append(fresh.size)
        for i in fresh:
            replot_frames[i].append(frame)
    # every dot lives exactly `lifetime` frames between replots
    gaps = np.concatenate([np.diff(f) for f in replot_frames])
    assert np.all(gaps == lifetime)
    # the same number of dots is replotted on every frame (no frame-locked pulse)
    assert set(per_frame) <= {field.n_dots // lifetime, -(-field.n_dots // lifetime)}
    # first replots are uniform over frames 1..L (chi-square goodness of fit, scipy.stats)
    first = np.bincount([f[0] for f in replot_frames], minlength=lifetime + 1)[1:]
    assert stats.chisquare(first).pvalue > 1e-3
    # ages observed on any frame are uniform over 0..L-1
    assert stats.chisquare(np.bincount(field.ages, minlength=lifetime)).pvalue > 1e-3


def test_lifetime_one_is_dynamic_noise():
    field = _field(lifetime_frames=1)
    field.start_period(0.0)
    for _ in range(3):
        before = field.positions.copy()
        field.step()
        assert np.all(field.ages == 0) and not field.signal.any()
        assert np.all(np.any(field.positions != before, axis=1))


def _areal_counts(positions, radius, rings=10, sectors=12):
    """Counts in equal-area bins: rings of equal r² width × equal angular sectors."""
    r2 = (positions**2).sum(axis=1) / radius**2
    ring = np.minimum((r2 * rings).astype(int), rings - 1)
    sector = ((np.arctan2(positions[:, 1], positions[:, 0]) % (2 * math.pi)) / (2 * math.pi) * sectors).astype(int)
    return np.bincount(ring * sectors + np.minimum(sector, sectors - 1), minlength=rings * sectors), r2


def _uniform_over_disc(positions, radius):
    # points uniform over a disc: r²/R² ~ U(0, 1) and equal counts in equal areas (common practice, no source);
    # checked with the chi-square and Kolmogorov–Smirnov tests of scipy.stats
    counts, r2 = _areal_counts(positions, radius)
    return min(stats.chisquare(counts).pvalue, stats.kstest(r2, "uniform").pvalue)


@pytest.mark.parametrize("coherence", [1.0, 0.5, 0.0])
def test_density_stays_uniform_after_many_wraps(coherence):
    # lifetimes longer than the run: only the wrap-around can keep the density uniform
    radius = 5.0
    field = _field(seed=3, density_per_deg2=300.0, speed_deg_s=12.0, coherence=coherence, lifetime_frames=10**6)
    field.start_period(90.0)
    for _ in range(600):  # 23,562 dots; the signal dots cross the aperture twelve times
        field.step()
    assert _uniform_over_disc(field.positions, radius) > 1e-3
    outer = np.hypot(*field.positions.T) > radius * math.sqrt(0.95)  # the outer 5 % of the area
    assert outer.mean() == pytest.approx(0.05, abs=4 * math.sqrt(0.05 * 0.95 / field.n_dots))


def test_density_check_detects_a_naive_wrap():
    # the same check must reject a common naive rule: a dot that leaves is put back at a random
    # place on the trailing half of the edge (it then crowds the edge)
    rng = np.random.default_rng(3)
    radius, step = 5.0, 0.2
    r = radius * np.sqrt(rng.random(23562))
    phi = rng.uniform(0, 2 * math.pi, r.size)
    pos = np.column_stack((r * np.cos(phi), r * np.sin(phi)))
    for _ in range(600):
        pos[:, 1] += step
        out = np.hypot(*pos.T) > radius
        angle = -math.pi / 2 + rng.uniform(-math.pi / 2, math.pi / 2, out.sum())
        pos[out] = radius * np.column_stack((np.cos(angle), np.sin(angle)))
    assert _uniform_over_disc(pos, radius) < 1e-3


def test_same_seed_same_frames_and_periods_carry_on():
    a, b = _field(seed=8), _field(seed=8)
    for direction in (90.0, None, 270.0):
        a.start_period(direction)
        b.start_period(direction, coherence=0.5)
        for _ in range(10):
            assert np.array_equal(a.step(), b.step())
    assert a.direction_deg == 270.0 and a.coherence == 0.5


@pytest.mark.parametrize(
    "field, value",
    [
        ("aperture_radius_deg", 0.0),
        ("density_per_deg2", -1.0),
        ("density_per_deg2", 1e-6),
        ("dot_size_deg", float("nan")),
        ("speed_deg_s", -2.0),
        ("coherence", 1.5),
        ("lifetime_frames", 0),
        ("lifetime_frames", 2.5),
        ("refresh_hz", 0.0),
    ],
)
def test_bad_spec_names_the_field(field, value):
    with pytest.raises(ValueError, match=field):
        _spec(**{field: value})


def test_bad_period_arguments_are_refused():
    field = _field()
    with pytest.raises(ValueError, match="direction_deg"):
        field.start_period(float("inf"))
    with pytest.raises(ValueError, match="coherence"):
        field.start_period(90.0, coherence=-0.1)
    with pytest.raises(ValueError, match="rng"):
        DotField(_spec(), rng=np.random.RandomState(0))
