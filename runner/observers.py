"""Simulated observers: a parametric model of a direction after-effect.

The model (README, Models) answers a test at offset ``x`` after an adapter at
offset ``Δ`` with ``k`` intervening periods with

    P(cw | x) = λ/2 + (1 − λ) · Φ((x − μ₀ − shift(Δ, k)) / σ)
    shift(Δ, k) = A · (Δ / w) · exp(½ − ½ (Δ / w)²) · exp(−k / τ)

so the shift peaks at ``A`` for ``Δ = ±w`` and is repulsive (same sign as
``Δ``) for ``A > 0``.  Baseline trials have no shift.  Each trial's answer is
drawn from a generator seeded by (seed words, trial number), so a resumed
session draws exactly the answers an uninterrupted one would.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields, replace
from pathlib import Path

import numpy as np
from scipy.special import ndtr

from fitting.errors import InputError
from runner.plan import Answer, Playback, TrialPlan
from runner.toml_text import toml_tables


@dataclass(frozen=True)
class ObserverModel:
    """Parameters of a simulated observer.

    Attributes
    ----------
    pse_deg : float
        μ₀, the PSE without adaptation (positive = clockwise bias).
    spread_deg : float
        σ of the cumulative Gaussian.
    lapse : float
        λ, rate of random key presses (half land on each side).
    amplitude_deg : float
        A, the peak shift of the after-effect at lag 0.
    peak_offset_deg : float
        w, the adapter offset at which the shift peaks.
    decay_periods : float
        τ, exponential decay of the shift per intervening period.
    spread_between_observers : float
        Scales how much observers drawn with :func:`draw_observers` differ
        (0 = identical copies, 1 = the built-in spreads).
    median_rt_s : float
        Median of the log-normal response-time distribution.
    miss_rate : float
        Probability of no answer within the window.
    """

    pse_deg: float = 0.0
    spread_deg: float = 3.0
    lapse: float = 0.02
    amplitude_deg: float = 3.0
    peak_offset_deg: float = 30.0
    decay_periods: float = 2.0
    spread_between_observers: float = 1.0
    median_rt_s: float = 0.6
    miss_rate: float = 0.0

    def __post_init__(self):
        checks = {    # name: (passes, the range in words)
            "pse_deg": (-90 <= self.pse_deg <= 90, "from -90 to 90"),
            "spread_deg": (0 < self.spread_deg <= 90, "above 0, at most 90"),
            "lapse": (0 <= self.lapse < 1, "from 0, below 1"),
            "amplitude_deg": (-90 <= self.amplitude_deg <= 90, "from -90 to 90"),
            "peak_offset_deg": (0 < self.peak_offset_deg <= 180, "above 0, at most 180"),
            "decay_periods": (0 < self.decay_periods <= 1000, "above 0, at most 1000"),
            "spread_between_observers": (0 <= self.spread_between_observers <= 10, "from 0 to 10"),
            "median_rt_s": (0 < self.median_rt_s <= 10, "above 0, at most 10"),
            "miss_rate": (0 <= self.miss_rate < 1, "from 0, below 1"),
        }
        for name, (ok, words) in checks.items():
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and ok):
                raise ValueError(f"{name}: {value!r} is out of range; expected a number {words}")

    def shift_deg(self, adapter_offset_deg: float | None, lag: int | None) -> float:
        """PSE shift after an adapter at ``adapter_offset_deg`` and ``lag`` periods."""
        if adapter_offset_deg is None:
            return 0.0
        z = adapter_offset_deg / self.peak_offset_deg
        return self.amplitude_deg * z * math.exp(0.5 - 0.5 * z * z) * math.exp(-(lag or 0) / self.decay_periods)

    def nback_shift_deg(self, preceding_offsets_deg) -> float:
        """PSE shift of a stream test: the decaying DoG shifts of its preceding periods, summed.

        ``Σ_{n=1..K} A · (Δ_n / w) · exp(½ − ½ (Δ_n / w)²) · exp(−(n − 1) / τ)``
        with ``Δ_n`` the offset of the n-th preceding period
        (``preceding_offsets_deg[0]`` is the 1-back period), i.e. the sum of
        :meth:`shift_deg` at lag ``k = n − 1``.
        """
        return sum(self.shift_deg(float(offset), n) for n, offset in enumerate(preceding_offsets_deg))

    def p_cw(self, test_offset_deg: float, adapter_offset_deg: float | None, lag: int | None) -> float:
        """Probability of a clockwise answer."""
        mu = self.pse_deg + self.shift_deg(adapter_offset_deg, lag)
        core = float(ndtr((test_offset_deg - mu) / self.spread_deg))
        return self.lapse / 2 + (1 - self.lapse) * core


def load_model(path: str | Path | None) -> ObserverModel:
    """Read an observer model file (flat TOML keys); None gives the defaults.

    Raises
    ------
    InputError
        Unknown key, wrong type or a value out of range, naming the file and key.
    """
    if path is None:
        return ObserverModel()
    p = Path(path)
    if not p.is_file():
        raise InputError(str(p), "file", "is a folder; expected an observer model file (.toml)" if p.is_dir()
                         else "does not exist or is not a file")
    try:
        text = p.read_bytes().decode("utf-8-sig")     # with or without a byte-order mark
    except UnicodeDecodeError as exc:
        raise InputError(str(p), "TOML", f"not a valid TOML text file ({exc})") from None
    raw = toml_tables(text, str(p), what="not a valid TOML text file")
    if not raw:      # an empty or cut file would silently mean the default observer
        raise InputError(str(p), "(top level)", "the file has no settings; start from protocols/observers/typical.toml")
    known = {f.name for f in fields(ObserverModel)}
    for key, value in raw.items():
        if key not in known:
            raise InputError(str(p), key, f"unknown key; expected one of {', '.join(sorted(known))}")
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise InputError(str(p), key, "expected a number")
    try:
        return ObserverModel(**{k: float(v) for k, v in raw.items()})
    except ValueError as exc:
        key, _, msg = str(exc).partition(": ")
        raise InputError(str(p), key, msg) from None


def draw_observers(model: ObserverModel, n: int, seed: int) -> list[ObserverModel]:
    """Draw ``n`` observers around ``model``, reproducibly.

    The first observer varies like the others; with
    ``spread_between_observers = 0`` all are copies of ``model``.  Spreads
    (scaled by ``spread_between_observers``): PSE ± 0.5° (SD), spread,
    amplitude and decay × exp(N(0, 0.2)), peak offset × exp(N(0, 0.15)).
    """
    s = model.spread_between_observers
    out = []
    for i in range(n):
        rng = np.random.default_rng([seed, 7, i])
        z = rng.standard_normal(5) * s
        out.append(
            replace(
                model,
                pse_deg=model.pse_deg + 0.5 * z[0],
                spread_deg=model.spread_deg * math.exp(0.2 * z[1]),
                amplitude_deg=model.amplitude_deg * math.exp(0.2 * z[2]),
                peak_offset_deg=model.peak_offset_deg * math.exp(0.15 * z[3]),
                decay_periods=model.decay_periods * math.exp(0.2 * z[4]),
            )
        )
    return out


class SimulatedObserver:
    """An :class:`~runner.plan.AnswerSource` that answers from the model.

    Parameters
    ----------
    model : ObserverModel
    seed_words : tuple of int
        Seed of this observer's answers; combined with the trial number.
    refresh_hz : float
        Refresh rate, to keep response times inside the answer window.
    """

    def __init__(self, model: ObserverModel, seed_words: tuple[int, ...], refresh_hz: float):
        self.model = model
        self.seed_words = tuple(int(w) for w in seed_words)
        self.refresh_hz = float(refresh_hz)

    def answer(self, trial: TrialPlan, playback: Playback, window_frames: int) -> Answer:
        """Draw the answer to ``trial``; reproducible from the trial number."""
        rng = np.random.default_rng([*self.seed_words, trial.index])
        u_answer, u_miss, z_rt = rng.random(), rng.random(), rng.standard_normal()
        if u_miss < self.model.miss_rate:
            return Answer(None, None)
        p = self.model.p_cw(trial.test_offset_deg, trial.adapter_offset_deg, trial.lag)
        test_s = playback.test_offset_s - playback.test_onset_s
        latest = test_s + 0.95 * window_frames / self.refresh_hz
        rt = min(self.model.median_rt_s * math.exp(0.3 * z_rt), latest)
        return Answer(int(u_answer < p), round(rt, 4))
