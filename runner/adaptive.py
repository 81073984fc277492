"""Adaptive procedures: which test offset to present next.

Four procedures, each a small object with the same face:

======================  ========  ==============================================
class                   ``kind``  method
======================  ========  ==============================================
:class:`UpDownTrack`    updown    Levitt's transformed up–down (Levitt, 1971)
:class:`WeightedTrack`  weighted  Kaernbach's weighted up–down (Kaernbach, 1991)
:class:`EntropyTrack`   bayesian  posterior over (PSE, spread, lapse)
                                  (Kontsevich & Tyler, 1999); next level of
                                  least expected entropy, nuisance parameters
                                  summed out (Prins, 2013), or at the
                                  posterior mean of the PSE (King-Smith et
                                  al., 1994)
:class:`ConstantLevels` constant  method of constant stimuli
======================  ========  ==============================================

Every procedure has ``next_level()`` (the level to present; it does not
change the procedure), ``update(level, response_cw)``, ``finished``,
``n_trials``, ``estimate()`` and ``state()``; :func:`restore` rebuilds a
procedure from its state. Levels are test offsets in degrees (positive =
clockwise); ``response_cw`` is 1 (clockwise), 0 (counter-clockwise) or None
(missed answer). A missed answer changes nothing: it is not counted and the
same level is proposed again.

A state is a dict of plain JSON types: the settings, the levels presented
and the answers given so far, and a few derived values for people reading
the session sidecar (current level, reversals, estimate). :func:`restore`
rebuilds the procedure from the settings, replays the answers and refuses a
state whose derived values do not match the replay.

Everything here is numpy and ``scipy.special``; nothing depends on the
protocol models or on a display.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from functools import lru_cache
from typing import NamedTuple

import numpy as np
from scipy.special import log_ndtr, ndtr, xlogy

from runner.shared_evidence import log_evidence

__all__ = [
    "UpDownTrack",
    "WeightedTrack",
    "EntropyTrack",
    "EntropyGrid",
    "PosteriorMean",
    "ConstantLevels",
    "restore",
]

STATE_VERSION = 1

PLACEMENTS = ("entropy", "pse_mean", "straddle")  # level choices of EntropyTrack
STRADDLE_SPREADS = 0.25   # default distance of "straddle" levels from the PSE estimate, in estimated spreads


# ---------------------------------------------------------------- checks


def _number(name: str, value) -> float:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise ValueError(f"{name}: expected a number, got {value!r}")
    if not math.isfinite(value):
        raise ValueError(f"{name}: expected a finite number, got {value!r}")
    return float(value)


def _whole(name: str, value, minimum: int, allow_none: bool = False) -> int | None:
    if value is None and allow_none:
        return None
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise ValueError(f"{name}: expected a whole number >= {minimum}, got {value!r}")
    return int(value)


def _response(value) -> int | None:
    if value is None:
        return None
    if isinstance(value, (bool, np.bool_, int, np.integer)) and value in (0, 1):
        return int(value)
    raise ValueError(f"response_cw: expected 1, 0 or None, got {value!r}")


def _bounds(value) -> tuple[float, float]:
    try:
        lo, hi = value
    except (TypeError, ValueError):
        raise ValueError(f"bounds: expected [low, high], got {value!r}") from None
    lo, hi = _number("bounds", lo), _number("bounds", hi)
    if not lo < hi:
        raise ValueError(f"bounds: expected low < high, got {value!r}")
    return lo, hi


def _steps(value) -> tuple[float, ...]:
    if isinstance(value, (int, float)) or not hasattr(value, "__len__") or len(value) == 0:
        raise ValueError(f"steps: expected a non-empty list of step sizes, got {value!r}")
    steps = tuple(_number("steps", s) for s in value)
    if any(s <= 0 for s in steps):
        raise ValueError(f"steps: expected step sizes > 0, got {value!r}")
    return steps


def _check_kind(state: dict, kind: str) -> None:
    if state.get("kind") != kind:
        raise ValueError(f"state.kind: expected {kind!r}, got {state.get('kind')!r}")
    if state.get("version") != STATE_VERSION:
        raise ValueError(f"state.version: expected {STATE_VERSION}, got {state.get('version')!r}")


def _replayed(proc, state: dict):
    """Replay the answers of ``state`` into ``proc`` and check the result."""
    levels, responses = state.get("levels"), state.get("responses")
    if not isinstance(levels, list) or not isinstance(responses, list) or len(levels) != len(responses):
        raise ValueError("state.levels: expected two lists of equal length, levels and responses")
    for level, response in zip(levels, responses):
        if response is None:
            raise ValueError("state.responses: missed answers are not part of a state")
        try:
            proc.update(level, response)
        except RuntimeError:
            raise ValueError("state.levels: more answers than the procedure takes") from None
    rebuilt = proc.state()
    if rebuilt != state:
        differing = sorted(k for k in set(state) | set(rebuilt) if state.get(k) != rebuilt.get(k))
        raise ValueError(f"state: does not match a replay of its answers (differs in {', '.join(differing)})")
    return proc


# ---------------------------------------------------------------- step tracks


class _StepTrack:
    """Shared walk of the up–down tracks: level, steps, bounds, reversals.

    A subclass says, for each answer, which way the level moves (``-1``,
    ``0`` or ``+1``) and how many base steps the move takes.
    """

    kind = ""

    def __init__(self, start_level, steps, bounds, max_trials, max_reversals, estimate_reversals):
        self._bounds = _bounds(bounds)
        self._start = _number("start_level", start_level)
        if not self._bounds[0] <= self._start <= self._bounds[1]:
            raise ValueError(f"start_level: expected a level within bounds {list(self._bounds)}, got {start_level!r}")
        self._steps = _steps(steps)
        self._max_trials = _whole("max_trials", max_trials, 1, allow_none=True)
        self._max_reversals = _whole("max_reversals", max_reversals, 1, allow_none=True)
        if self._max_trials is None and self._max_reversals is None:
            raise ValueError("max_trials: give max_trials, max_reversals or both, so that the track can stop")
        self._estimate_reversals = _whole("estimate_reversals", estimate_reversals, 1)
        self._level = self._start
        self._last_move = 0
        self._reversals: list[float] = []
        self._levels: list[float] = []
        self._responses: list[int] = []

    # the rule of each method
    def _direction(self, response: int) -> int:
        raise NotImplementedError

    def _step_factor(self, direction: int) -> float:
        return 1.0

    @property
    def n_trials(self) -> int:
        """Answered trials so far (missed answers do not count)."""
        return len(self._responses)

    @property
    def reversal_levels(self) -> list[float]:
        """Levels at which the track changed direction, in order."""
        return list(self._reversals)

    @property
    def finished(self) -> bool:
        """True once ``max_trials`` trials or ``max_reversals`` reversals are reached."""
        return (self._max_trials is not None and self.n_trials >= self._max_trials) or (
            self._max_reversals is not None and len(self._reversals) >= self._max_reversals
        )

    def step_size(self) -> float:
        """Base step in use now: the schedule's entry for the reversals so far (the last is kept)."""
        return self._steps[min(len(self._reversals), len(self._steps) - 1)]

    def next_level(self) -> float:
        """Return the level to present next.

        Raises
        ------
        RuntimeError
            If the track is finished.
        """
        if self.finished:
            raise RuntimeError(f"{type(self).__name__} is finished; it proposes no more levels")
        return self._level

    def update(self, level: float, response_cw: int | None) -> None:
        """Take the answer to one trial.

        Parameters
        ----------
        level : float
            The offset actually presented (normally ``next_level()``); the
            next level is a step away from it.
        response_cw : {1, 0, None}
            1 clockwise, 0 counter-clockwise, None missed (no change).

        Raises
        ------
        ValueError
            If the level is not finite or the response is not 1, 0 or None.
        RuntimeError
            If the track is finished.
        """
        if self.finished:
            raise RuntimeError(f"{type(self).__name__} is finished; it takes no more answers")
        response = _response(response_cw)
        level = _number("level", level)
        if response is None:
            return
        direction = self._direction(response)
        if direction != 0:
            if self._last_move != 0 and direction != self._last_move:
                self._reversals.append(level)  # the step size shrinks at the reversal itself
            self._last_move = direction
            moved = level + direction * self.step_size() * self._step_factor(direction)
            self._level = min(max(moved, self._bounds[0]), self._bounds[1])
        else:
            self._level = level
        self._levels.append(level)
        self._responses.append(response)

    def estimate(self) -> float:
        """Mean of the last ``estimate_reversals`` reversal levels (fewer if fewer), nan before the first.

        This is the level the track converges on (its target point, see the
        class docstring), not by itself the PSE; for tracks paired on
        symmetric targets the mean of the pair estimates the PSE.
        """
        if not self._reversals:
            return float("nan")
        return float(np.mean(self._reversals[-self._estimate_reversals :]))

    def _walk_state(self) -> dict:
        return {
            "start_level": self._start,
            "steps": list(self._steps),
            "bounds": list(self._bounds),
            "max_trials": self._max_trials,
            "max_reversals": self._max_reversals,
            "estimate_reversals": self._estimate_reversals,
            "levels": list(self._levels),
            "responses": list(self._responses),
            "n_trials": self.n_trials,
            "current_level": self._level,
            "reversal_levels": list(self._reversals),
        }


class UpDownTrack(_StepTrack):
    """Levitt's transformed up–down track (Levitt, 1971).

    ``down`` consecutive answers on the track's side move the level one step
    toward the other side; a single answer the other way moves it one step
    back. ``side="cw"``: ``down`` clockwise answers lower the level, one
    counter-clockwise answer raises it; the track converges on the level
    where P(cw) = 0.5 ** (1 / down) (70.71 % for 2, 79.37 % for 3).
    ``side="ccw"`` mirrors this and converges on P(cw) = 1 − 0.5 ** (1 / down).
    A reversal is a move opposite to the previous move; it is recorded at
    the level of the trial whose answer caused it.

    Parameters
    ----------
    start_level : float
        First level (deg), within ``bounds``.
    steps : sequence of float
        Step sizes (deg), used in turn: the first until the first reversal,
        the next from that reversal on, and so on; the last is kept.
    bounds : (float, float)
        Lowest and highest level; moves stop at the bounds.
    down : int, default 2
        Consecutive answers on the track's side needed for a step.
    side : {"cw", "ccw"}, default "cw"
        The side whose answers must come ``down`` in a row.
    max_trials, max_reversals : int or None
        Stop after this many answered trials or reversals, whichever comes
        first; at least one must be given.
    estimate_reversals : int, default 6
        Number of final reversals averaged by :meth:`estimate`.
    """

    kind = "updown"

    def __init__(
        self,
        *,
        start_level: float,
        steps,
        bounds,
        down: int = 2,
        side: str = "cw",
        max_trials: int | None = None,
        max_reversals: int | None = None,
        estimate_reversals: int = 6,
    ):
        super().__init__(start_level, steps, bounds, max_trials, max_reversals, estimate_reversals)
        self._down = _whole("down", down, 1)
        if side not in ("cw", "ccw"):
            raise ValueError(f"side: expected 'cw' or 'ccw', got {side!r}")
        self._side = side
        self._run = 0

    @property
    def target_p_cw(self) -> float:
        """P(cw) at the level the track converges on (Levitt, 1971)."""
        p = 0.5 ** (1.0 / self._down)
        return p if self._side == "cw" else 1.0 - p

    def _direction(self, response: int) -> int:
        toward_other_side = -1 if self._side == "cw" else +1
        if response == (1 if self._side == "cw" else 0):
            self._run += 1
            if self._run < self._down:
                return 0
            self._run = 0
            return toward_other_side
        self._run = 0
        return -toward_other_side

    def state(self) -> dict:
        """Return the state as plain JSON types (see :func:`restore`)."""
        return {
            "kind": self.kind,
            "version": STATE_VERSION,
            "down": self._down,
            "side": self._side,
            **self._walk_state(),
            "run": self._run,
            "estimate": _json_float(self.estimate()),
        }

    @classmethod
    def _from_state(cls, state: dict) -> UpDownTrack:
        _check_kind(state, cls.kind)
        keys = ("start_level", "steps", "bounds", "down", "side", "max_trials", "max_reversals", "estimate_reversals")
        return _replayed(cls(**_settings(state, keys)), state)


class WeightedTrack(_StepTrack):
    """Kaernbach's weighted up–down track (Kaernbach, 1991).

    Every answer moves the level: a clockwise answer lowers it by S_down, a
    counter-clockwise answer raises it by S_up. The track converges on
    P(cw) = S_up / (S_up + S_down) = ``target_p_cw``. The two steps are
    derived from the target and a base step s: S_up = 2·p·s and
    S_down = 2·(1 − p)·s, so that their mean is s (both equal s at p = 0.5).

    Parameters
    ----------
    target_p_cw : float
        Proportion of clockwise answers to converge on, strictly between 0
        and 1 (for a PSE pair, e.g. 0.75 and 0.25).
    start_level, bounds, max_trials, max_reversals, estimate_reversals
        As for :class:`UpDownTrack`.
    steps : sequence of float
        Base steps s (deg), used in turn after each reversal, the last kept.
    """

    kind = "weighted"

    def __init__(
        self,
        *,
        target_p_cw: float,
        start_level: float,
        steps,
        bounds,
        max_trials: int | None = None,
        max_reversals: int | None = None,
        estimate_reversals: int = 6,
    ):
        super().__init__(start_level, steps, bounds, max_trials, max_reversals, estimate_reversals)
        p = _number("target_p_cw", target_p_cw)
        if not 0 < p < 1:
            raise ValueError(f"target_p_cw: expected a value strictly between 0 and 1, got {target_p_cw!r}")
        self._p = p

    @property
    def target_p_cw(self) -> float:
        """P(cw) at the level the track converges on (Kaernbach, 1991)."""
        return self._p

    def step_up(self) -> float:
        """Current S_up (deg), the rise after a counter-clockwise answer."""
        return self.step_size() * self._step_factor(+1)

    def step_down(self) -> float:
        """Current S_down (deg), the drop after a clockwise answer."""
        return self.step_size() * self._step_factor(-1)

    def _direction(self, response: int) -> int:
        return -1 if response == 1 else +1

    def _step_factor(self, direction: int) -> float:
        return 2.0 * self._p if direction > 0 else 2.0 * (1.0 - self._p)

    def state(self) -> dict:
        """Return the state as plain JSON types (see :func:`restore`)."""
        return {
            "kind": self.kind,
            "version": STATE_VERSION,
            "target_p_cw": self._p,
            **self._walk_state(),
            "estimate": _json_float(self.estimate()),
        }

    @classmethod
    def _from_state(cls, state: dict) -> WeightedTrack:
        _check_kind(state, cls.kind)
        keys = ("target_p_cw", "start_level", "steps", "bounds", "max_trials", "max_reversals", "estimate_reversals")
        return _replayed(cls(**_settings(state, keys)), state)


def _settings(state: dict, keys) -> dict:
    missing = [k for k in keys if k not in state]
    if missing:
        raise ValueError(f"state.{missing[0]}: missing")
    return {k: state[k] for k in keys}


def _json_float(value: float) -> float | None:
    """A float for JSON: nan (not valid JSON) becomes None."""
    return None if math.isnan(value) else float(value)


# ---------------------------------------------------------------- Bayesian


def _span(lo: float, hi: float, step: float) -> np.ndarray:
    """``lo, lo + step, ...`` up to ``hi`` (included when it falls on a step, within rounding)."""
    count = int(math.floor((hi - lo) / step + 1e-9))
    return lo + step * np.arange(count + 1)


@dataclass(frozen=True)
class EntropyGrid:
    """Parameter and level grid of an :class:`EntropyTrack`.

    The prior is uniform over the grid points: uniform in PSE and lapse, and
    log-uniform in spread (the spread points are log-spaced).

    Parameters
    ----------
    pse_min, pse_max, pse_step : float
        PSE (μ) grid, deg: ``pse_min, pse_min + pse_step, ...`` up to
        ``pse_max`` (included when it falls on a step).
    spread_min, spread_max : float
        Spread (σ) grid limits, deg, ``0 < spread_min < spread_max``.
    spread_count : int
        Number of log-spaced spread points, >= 2.
    lapses : tuple of float
        Lapse (λ) grid points, each in 0..1 (exclusive of 1).
    level_min, level_max, level_step : float
        Levels the track may propose, deg, spaced like the PSE grid.

    Notes
    -----
    The defaults are the grid the speed target refers to: μ −30…30° in 0.5°
    (121 points), σ 0.5…20° (25 log-spaced points), λ 0…0.1 in 0.02 (6
    points), levels −30…30° in 0.5° (121 levels).
    """

    pse_min: float = -30.0
    pse_max: float = 30.0
    pse_step: float = 0.5
    spread_min: float = 0.5
    spread_max: float = 20.0
    spread_count: int = 25
    lapses: tuple = (0.0, 0.02, 0.04, 0.06, 0.08, 0.1)
    level_min: float = -30.0
    level_max: float = 30.0
    level_step: float = 0.5

    def __post_init__(self):
        numbers = ("pse_min", "pse_max", "pse_step", "spread_min", "spread_max", "level_min", "level_max", "level_step")
        for name in numbers:
            object.__setattr__(self, name, _number(f"grid.{name}", getattr(self, name)))
        object.__setattr__(self, "spread_count", _whole("grid.spread_count", self.spread_count, 2))
        if isinstance(self.lapses, (int, float)) or len(self.lapses) == 0:
            raise ValueError(f"grid.lapses: expected a non-empty list of lapse rates, got {self.lapses!r}")
        lapses = tuple(_number("grid.lapses", v) for v in self.lapses)
        if any(not 0 <= v < 1 for v in lapses) or len(set(lapses)) != len(lapses):
            raise ValueError(f"grid.lapses: expected distinct values in [0, 1), got {list(self.lapses)!r}")
        object.__setattr__(self, "lapses", lapses)
        for axis in ("pse", "level"):
            lo, hi, step = (getattr(self, f"{axis}_{k}") for k in ("min", "max", "step"))
            if not lo < hi:
                raise ValueError(f"grid.{axis}_min: expected {axis}_min < {axis}_max, got {lo!r} and {hi!r}")
            if not step > 0:
                raise ValueError(f"grid.{axis}_step: expected a step > 0, got {step!r}")
        if not 0 < self.spread_min < self.spread_max:
            raise ValueError(f"grid.spread_min: expected 0 < spread_min < spread_max, got {self.spread_min!r}")

    def pse_values(self) -> np.ndarray:
        """PSE grid points (deg)."""
        return _span(self.pse_min, self.pse_max, self.pse_step)

    def spread_values(self) -> np.ndarray:
        """Spread grid points (deg), log-spaced."""
        return np.geomspace(self.spread_min, self.spread_max, self.spread_count)

    def lapse_values(self) -> np.ndarray:
        """Lapse grid points."""
        return np.array(self.lapses, dtype=float)

    def level_values(self) -> np.ndarray:
        """Levels the track chooses from (deg)."""
        return _span(self.level_min, self.level_max, self.level_step)


@lru_cache(maxsize=8)
def _cdf_table(grid: EntropyGrid) -> np.ndarray:
    """Φ((x − μ) / σ) for every level x and grid point (μ, σ): shape (levels, μ, σ).

    Shared by all tracks with the same grid (read-only).
    """
    x = grid.level_values()[:, None, None]
    mu = grid.pse_values()[None, :, None]
    sigma = grid.spread_values()[None, None, :]
    table = ndtr((x - mu) / sigma)
    table.flags.writeable = False
    return table


@lru_cache(maxsize=2)
def _scratch(shape: tuple) -> np.ndarray:
    """Three work arrays of ``shape``, reused across calls and tracks.

    Fresh multi-megabyte arrays on every call cost more (in page faults)
    than the arithmetic done in them; tracks run one at a time, so one set
    per shape suffices.
    """
    return np.empty((3, *shape))


_TINY = 1e-300  # floor for probabilities before a log; m·log m at the floor is 0 to double precision


def _sum_m_log_m(m: np.ndarray, work: np.ndarray) -> np.ndarray:
    """Row sums of m·log m for a 2-D ``m`` (floored at _TINY in place)."""
    np.maximum(m, _TINY, out=m)
    return np.einsum("ij,ij->i", m, np.log(m, out=work))


def log_pse_prior(mu: np.ndarray, sd: float) -> np.ndarray:
    """Log prior of the PSE grid points ``mu``: Gaussian of SD ``sd`` (deg) about 0, or 0 everywhere for sd = 0.

    Unnormalised: the posterior is normalised after every answer.
    """
    if sd == 0:
        return np.zeros_like(mu)
    return -0.5 * (mu / sd) ** 2


class PosteriorMean(NamedTuple):
    """Posterior means of the psychometric parameters."""

    pse: float
    spread: float
    lapse: float


class EntropyTrack:
    """Bayesian adaptive track over a grid of PSE, spread and lapse.

    The posterior of Kontsevich & Tyler (1999) over a grid of PSE μ, spread
    σ and lapse λ. The model is the README's psychometric function
    P(cw | x) = λ/2 + (1 − λ)·Φ((x − μ)/σ); the prior is uniform over the
    grid (see :class:`EntropyGrid`). Each trial the track proposes a level
    of the grid's level list, chosen by ``placement``:

    * ``"entropy"``: the level whose expected posterior entropy of the
      target is least (Kontsevich & Tyler, 1999), with the parameters that
      are not the target summed out before the entropy is taken (Prins,
      2013); the lowest such level on a tie;
    * ``"pse_mean"``: the level nearest the posterior mean of the PSE (the
      mean of the posterior as both placement and estimate, King-Smith,
      Grigsby, Vingrys, Benes & Supowit, 1994); the lower level on a tie.
      Trials stay at the current PSE estimate, which is what the PSE needs;
      the spread is learnt only from the scatter of that estimate;
    * ``"straddle"``: the level nearest μ̄ ± c·σ̄ (posterior means of PSE
      and spread, c = ``straddle_spreads``), above and below in turn
      (``side`` first).  Trials sit near the PSE, where a trial tells most
      about it, yet on both sides of it in equal numbers, which keeps the
      spread estimable and the fitted PSE from leaning on it (a design
      symmetric about μ makes the PSE and spread estimates uncorrelated);
      the lower level on a tie.

    Parameters
    ----------
    max_trials : int
        Stop after this many answered trials.
    target : {"pse", "pse_spread"}, default "pse"
        "pse": entropy of the μ marginal (σ and λ are nuisance parameters);
        "pse_spread": entropy of the joint (μ, σ) marginal (λ is nuisance).
        Used by ``placement="entropy"`` only.
    grid : EntropyGrid, optional
        Parameter and level grid; default :class:`EntropyGrid()`.
    placement : {"entropy", "pse_mean", "straddle"}, default "entropy"
        How the next level is chosen (see above).
    straddle_spreads : float, default 0.25
        ``"straddle"``: distance of the levels from the PSE estimate, in
        estimated spreads (>= 0).
    side : {1, -1}, default 1
        ``"straddle"``: 1 starts above the PSE estimate, -1 below.
    pse_prior_sd : float, default 0
        > 0: the prior on the PSE is a Gaussian of this SD (deg) centred on
        the reference, cut to the grid; 0: uniform over the grid.
    evidence : SharedEvidence, optional
        What the session's other tracks know about spread and lapse
        (:mod:`runner.shared_evidence`); it is multiplied into the posterior
        that chooses levels and into :meth:`posterior` and
        :meth:`posterior_mean`.  The state's ``posterior_mean`` is from the
        track's own answers, so that a state restores without the others.

    Notes
    -----
    Since λ enters the model linearly, the posterior's sum over λ is taken
    before the likelihood: the precomputed table holds Φ((x − μ)/σ) for
    levels × (μ, σ) only, and for each outcome the (μ, σ) marginal is
    ``a + b·Φ`` with ``a = Σ_λ p·λ/2`` and ``b = Σ_λ p·(1 − λ)``. The
    posterior is kept as log-probabilities (``log_ndtr`` where λ = 0, so no
    likelihood underflows); updates accept any level, on the level list or
    not. Entropies are in nats.
    """

    kind = "bayesian"

    def __init__(self, *, max_trials: int, target: str = "pse", grid: EntropyGrid | None = None,
                 placement: str = "entropy", straddle_spreads: float = STRADDLE_SPREADS, side: int = 1,
                 pse_prior_sd: float = 0.0, evidence=None):
        self._max_trials = _whole("max_trials", max_trials, 1)
        if target not in ("pse", "pse_spread"):
            raise ValueError(f"target: expected 'pse' or 'pse_spread', got {target!r}")
        self._target = target
        if placement not in PLACEMENTS:
            raise ValueError(f"placement: expected one of {list(PLACEMENTS)}, got {placement!r}")
        self._placement = placement
        self._straddle = _number("straddle_spreads", straddle_spreads)
        if self._straddle < 0:
            raise ValueError(f"straddle_spreads: expected a number >= 0, got {straddle_spreads!r}")
        if side not in (1, -1) or isinstance(side, bool):
            raise ValueError(f"side: expected 1 or -1, got {side!r}")
        self._side = int(side)
        self._prior_sd = _number("pse_prior_sd", pse_prior_sd)
        if self._prior_sd < 0:
            raise ValueError(f"pse_prior_sd: expected a number >= 0 (0: uniform prior), got {pse_prior_sd!r}")
        if grid is None:
            grid = EntropyGrid()
        if not isinstance(grid, EntropyGrid):
            raise ValueError(f"grid: expected an EntropyGrid, got {type(grid).__name__}")
        self.grid = grid
        self._mu = grid.pse_values()
        self._sigma = grid.spread_values()
        self._lapse = grid.lapse_values()
        self._level_values = grid.level_values()
        self._table = _cdf_table(grid)
        self._half_lapse = self._lapse / 2.0
        self._keep = 1.0 - self._lapse
        self._zero_lapse = np.flatnonzero(self._lapse == 0.0)
        self._log_post = np.zeros((self._mu.size, self._sigma.size, self._lapse.size))
        self._log_post += log_pse_prior(self._mu, self._prior_sd)[:, None, None]
        self._levels: list[float] = []
        self._responses: list[int] = []
        self._proposal: float | None = None
        self._evidence = evidence
        self._proposed_at = 0       # the evidence's version when the proposal was made
        if evidence is not None:
            evidence.join(self)

    @property
    def n_trials(self) -> int:
        """Answered trials so far (missed answers do not count)."""
        return len(self._responses)

    @property
    def finished(self) -> bool:
        """True once ``max_trials`` trials are answered."""
        return self.n_trials >= self._max_trials

    @property
    def target(self) -> str:
        """"pse" or "pse_spread"."""
        return self._target

    @property
    def placement(self) -> str:
        """"entropy", "pse_mean" or "straddle"."""
        return self._placement

    @property
    def straddle_side(self) -> int:
        """``"straddle"``: 1 when the next level goes above the PSE estimate, -1 below."""
        return self._side if self.n_trials % 2 == 0 else -self._side

    def posterior(self, borrowed: bool = True) -> np.ndarray:
        """Normalised posterior over the grid, shape (μ, σ, λ).

        ``borrowed=False``: from the track's own answers only, without what
        the other tracks of its evidence lend.
        """
        log_post = self._log_post
        if borrowed and self._evidence is not None:
            log_post = log_post + self._evidence.borrowed(self)
        p = np.exp(log_post - log_post.max())
        return p / p.sum()

    def posterior_mean(self, borrowed: bool = True) -> PosteriorMean:
        """Posterior means of μ, σ and λ (σ: arithmetic mean over its grid); ``borrowed`` as in :meth:`posterior`."""
        p = self.posterior(borrowed)
        return PosteriorMean(
            pse=float(p.sum(axis=(1, 2)) @ self._mu),
            spread=float(p.sum(axis=(0, 2)) @ self._sigma),
            lapse=float(p.sum(axis=(0, 1)) @ self._lapse),
        )

    def estimate(self) -> float:
        """Posterior mean of the PSE (deg)."""
        return self.posterior_mean().pse

    def expected_entropies(self) -> np.ndarray:
        """Expected posterior entropy (nats) of the target after one trial at each level.

        Returns
        -------
        numpy.ndarray
            One value per entry of ``grid.level_values()``.
        """
        p = self.posterior()
        a = p @ self._half_lapse  # (μ, σ)
        b = p @ self._keep
        joint = p.sum(axis=2)
        # unnormalised target marginal after each answer, one row per level
        if self._target == "pse":
            cw = np.einsum("xms,ms->xm", self._table, b) + a.sum(axis=1)  # (levels, μ)
            ccw = joint.sum(axis=1) - cw
            work = np.empty_like(cw)
        else:
            cw, ccw, work = _scratch((self._level_values.size, joint.size))  # (levels, μ·σ)
            np.multiply(self._table.reshape(self._level_values.size, -1), b.ravel(), out=cw)
            cw += a.ravel()
            np.subtract(joint.ravel(), cw, out=ccw)
        np.maximum(ccw, 0.0, out=ccw)
        p_cw = cw.sum(axis=1)
        p_ccw = ccw.sum(axis=1)
        # Σ_r P(r) H(post_r) = Σ_r [P(r) log P(r) − Σ m_r log m_r], m_r unnormalised
        return xlogy(p_cw, p_cw) + xlogy(p_ccw, p_ccw) - _sum_m_log_m(cw, work) - _sum_m_log_m(ccw, work)

    def next_level(self) -> float:
        """Return the next level: least expected entropy, or nearest the posterior mean of the PSE.

        Raises
        ------
        RuntimeError
            If the track is finished.
        """
        if self.finished:
            raise RuntimeError("EntropyTrack is finished; it proposes no more levels")
        version = 0 if self._evidence is None else self._evidence.version
        if self._proposal is None or version != self._proposed_at:
            self._proposed_at = version
            if self._placement == "entropy":
                pick = int(np.argmin(self.expected_entropies()))
            else:
                mean = self.posterior_mean()
                aim = mean.pse
                if self._placement == "straddle":
                    aim += self.straddle_side * self._straddle * mean.spread
                pick = int(np.argmin(np.abs(self._level_values - aim)))
            self._proposal = float(self._level_values[pick])
        return self._proposal

    def update(self, level: float, response_cw: int | None) -> None:
        """Take the answer to one trial and update the posterior.

        Parameters
        ----------
        level : float
            The offset actually presented (deg); any finite value.
        response_cw : {1, 0, None}
            1 clockwise, 0 counter-clockwise, None missed (no change).

        Raises
        ------
        ValueError
            If the level is not finite or the response is not 1, 0 or None.
        RuntimeError
            If the track is finished.
        """
        if self.finished:
            raise RuntimeError("EntropyTrack is finished; it takes no more answers")
        response = _response(response_cw)
        level = _number("level", level)
        if response is None:
            return
        z = (level - self._mu[:, None]) / self._sigma[None, :]
        if response == 0:
            z = -z  # P(ccw) uses Φ(−z) = 1 − Φ(z)
        with np.errstate(divide="ignore"):
            log_like = np.log(self._half_lapse + self._keep * ndtr(z)[:, :, None])
        if self._zero_lapse.size:
            # with λ = 0 the likelihood is Φ alone, which underflows far out: take its log directly
            log_like[:, :, self._zero_lapse] = log_ndtr(z)[:, :, None]
        self._log_post += log_like
        self._log_post -= self._log_post.max()
        if self._evidence is not None:
            self._evidence.refresh(self, log_evidence(self._log_post))
        self._levels.append(level)
        self._responses.append(response)
        self._proposal = None

    def state(self) -> dict:
        """Return the state as plain JSON types (see :func:`restore`)."""
        grid = asdict(self.grid)
        grid["lapses"] = list(grid["lapses"])
        return {
            "kind": self.kind,
            "version": STATE_VERSION,
            "target": self._target,
            "placement": self._placement,
            "straddle_spreads": self._straddle,
            "side": self._side,
            "pse_prior_sd": self._prior_sd,
            "max_trials": self._max_trials,
            "grid": grid,
            "levels": list(self._levels),
            "responses": list(self._responses),
            "n_trials": self.n_trials,
            "posterior_mean": list(self.posterior_mean(borrowed=False)),
        }

    @classmethod
    def _from_state(cls, state: dict) -> EntropyTrack:
        _check_kind(state, cls.kind)
        # states written before these options had their defaults
        state = {"placement": "entropy", "straddle_spreads": STRADDLE_SPREADS, "side": 1, "pse_prior_sd": 0.0, **state}
        settings = _settings(state, ("target", "placement", "straddle_spreads", "side", "pse_prior_sd",
                                     "max_trials", "grid"))
        if not isinstance(settings["grid"], dict):
            raise ValueError("state.grid: expected a table of grid settings")
        try:
            grid = EntropyGrid(**{**settings["grid"], "lapses": tuple(settings["grid"].get("lapses", ()))})
        except TypeError as err:
            raise ValueError(f"state.grid: {err}") from None
        proc = cls(max_trials=settings["max_trials"], target=settings["target"], grid=grid,
                   placement=settings["placement"], straddle_spreads=settings["straddle_spreads"],
                   side=settings["side"], pse_prior_sd=settings["pse_prior_sd"])
        return _replayed(proc, state)


# ---------------------------------------------------------------- constant stimuli


def _probit_pse(levels: np.ndarray, responses: np.ndarray) -> float:
    """PSE −a/b of the maximum-likelihood probit fit P(cw) = Φ(a + b·x), lapse 0.

    Fisher scoring (iteratively reweighted least squares). Returns nan when
    no finite maximum exists: fewer than two distinct levels, one kind of
    answer only, or answers separated by level (complete or quasi-complete
    separation), and when the iteration does not settle.
    """
    x, y = levels.astype(float), responses.astype(float)
    if x.size < 2 or np.ptp(x) == 0 or y.min() == y.max():
        return float("nan")
    x_cw, x_ccw = x[y == 1], x[y == 0]
    if x_ccw.max() <= x_cw.min() or x_cw.max() <= x_ccw.min():
        return float("nan")
    design = np.column_stack((np.ones_like(x), x))
    beta = np.zeros(2)
    for _ in range(100):
        eta = design @ beta
        mu = np.clip(ndtr(eta), 1e-12, 1 - 1e-12)
        dens = np.maximum(np.exp(-0.5 * eta * eta) / math.sqrt(2 * math.pi), 1e-300)
        weight = dens * dens / (mu * (1 - mu))
        working = eta + (y - mu) / dens
        new = np.linalg.solve(design.T @ (weight[:, None] * design), design.T @ (weight * working))
        if np.max(np.abs(new - beta)) < 1e-10 * (1 + np.max(np.abs(beta))):
            return float(-new[0] / new[1]) if new[1] != 0 else float("nan")
        beta = new
    return float("nan")


class ConstantLevels:
    """Method of constant stimuli: each level a fixed number of times, in a shuffled order.

    Parameters
    ----------
    levels : sequence of float
        The test offsets (deg), distinct.
    repeats : int
        Presentations of each level.
    seed : int
        Seed (>= 0) of the shuffle; the order is ``len(levels) * repeats``
        long and fixed at construction.

    Notes
    -----
    A missed answer leaves the level at the head of the order, so it is
    presented again next. :meth:`estimate` is the PSE of a probit
    maximum-likelihood fit with lapse 0 (nan while it does not exist);
    the full fits with lapse and intervals belong to the ``fitting`` package.
    """

    kind = "constant"

    def __init__(self, *, levels, repeats: int, seed: int):
        if isinstance(levels, (int, float)) or not hasattr(levels, "__len__") or len(levels) == 0:
            raise ValueError(f"levels: expected a non-empty list of levels, got {levels!r}")
        self._level_set = tuple(_number("levels", v) for v in levels)
        if len(set(self._level_set)) != len(self._level_set):
            raise ValueError(f"levels: expected distinct levels, got {list(levels)!r}")
        self._repeats = _whole("repeats", repeats, 1)
        self._seed = _whole("seed", seed, 0)
        order = np.random.default_rng(self._seed).permutation(np.repeat(self._level_set, self._repeats))
        self._remaining = [float(v) for v in order]
        self._levels: list[float] = []
        self._responses: list[int] = []

    @property
    def n_trials(self) -> int:
        """Answered trials so far (missed answers do not count)."""
        return len(self._responses)

    @property
    def finished(self) -> bool:
        """True once every level has been answered ``repeats`` times."""
        return not self._remaining

    @property
    def remaining(self) -> list[float]:
        """Levels still to present, in order."""
        return list(self._remaining)

    def next_level(self) -> float:
        """Return the level at the head of the order.

        Raises
        ------
        RuntimeError
            If every level has been presented.
        """
        if self.finished:
            raise RuntimeError("ConstantLevels is finished; it proposes no more levels")
        return self._remaining[0]

    def update(self, level: float, response_cw: int | None) -> None:
        """Take the answer to the trial at the head of the order.

        Parameters
        ----------
        level : float
            The level presented; must be ``next_level()``.
        response_cw : {1, 0, None}
            1 clockwise, 0 counter-clockwise, None missed (the level stays
            at the head of the order).

        Raises
        ------
        ValueError
            If the level is not the one proposed or the response is not 1, 0 or None.
        RuntimeError
            If the order is used up.
        """
        if self.finished:
            raise RuntimeError("ConstantLevels is finished; it takes no more answers")
        response = _response(response_cw)
        level = _number("level", level)
        if level != self._remaining[0]:
            raise ValueError(f"level: expected the proposed level {self._remaining[0]!r}, got {level!r}")
        if response is None:
            return
        self._remaining.pop(0)
        self._levels.append(level)
        self._responses.append(response)

    def estimate(self) -> float:
        """PSE (deg) of a probit fit with lapse 0 to the answers so far; nan if it does not exist."""
        return _probit_pse(np.array(self._levels), np.array(self._responses))

    def state(self) -> dict:
        """Return the state as plain JSON types (see :func:`restore`)."""
        return {
            "kind": self.kind,
            "version": STATE_VERSION,
            "level_set": list(self._level_set),
            "repeats": self._repeats,
            "seed": self._seed,
            "levels": list(self._levels),
            "responses": list(self._responses),
            "remaining": list(self._remaining),
            "n_trials": self.n_trials,
            "estimate": _json_float(self.estimate()),
        }

    @classmethod
    def _from_state(cls, state: dict) -> ConstantLevels:
        """Rebuild from the stored order (not the seed), so a state outlives changes of numpy's shuffle."""
        _check_kind(state, cls.kind)
        settings = _settings(state, ("level_set", "repeats", "seed", "levels", "remaining"))
        proc = cls(levels=settings["level_set"], repeats=settings["repeats"], seed=settings["seed"])
        order = list(settings["levels"]) + list(settings["remaining"])
        if sorted(order) != sorted(proc._remaining):
            raise ValueError("state.remaining: the order does not hold each level `repeats` times")
        proc._remaining = [float(v) for v in order]
        return _replayed(proc, state)


# ---------------------------------------------------------------- restore

_KINDS = {cls.kind: cls for cls in (UpDownTrack, WeightedTrack, EntropyTrack, ConstantLevels)}


def restore(state: dict):
    """Rebuild a procedure from its :meth:`state`.

    Parameters
    ----------
    state : dict
        A state as returned by a procedure's ``state()`` (after a JSON round
        trip or not).

    Returns
    -------
    UpDownTrack or WeightedTrack or EntropyTrack or ConstantLevels
        A procedure equal to the one that wrote the state: same state, and
        the same levels for the same future answers.

    Raises
    ------
    ValueError
        If the state is not a dict, its kind is unknown, a setting is
        invalid, or its derived values do not match a replay of its answers.
    """
    if not isinstance(state, dict):
        raise ValueError(f"state: expected a dict, got {type(state).__name__}")
    kind = state.get("kind")
    if kind not in _KINDS:
        raise ValueError(f"state.kind: expected one of {sorted(_KINDS)}, got {kind!r}")
    return _KINDS[kind]._from_state(state)
