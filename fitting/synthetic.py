"""Simulated trial logs for tests, benchmarks and pilots.

The observer follows the README's model::

    shift(D, k) = A * (D / w) * exp(1/2 - (D / w)^2 / 2) * exp(-k / tau)
    P(cw | x)   = lapse / 2 + (1 - lapse) * Phi((x - pse0 - shift(D, k)) / spread)

Levels come from a pair of simple 1-up/1-down tracks per condition that start
on opposite sides of the reference (the track converges on the 50 % point,
i.e. the PSE), or from a fixed set of levels (method of constant stimuli).
This generator is self-contained so that ``fitting`` never imports the
session engine; the real sessions are run by ``aftershift simulate``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import special

LOG_COLUMNS = ["observer", "session", "trial", "condition", "adapter_offset_deg", "lag", "track",
               "test_offset_deg", "response_cw", "rt_s", "dropped_frames", "timing_ok", "practice",
               "period_s", "reference_deg", "procedure"]


@dataclass(frozen=True)
class ObserverModel:
    """Parameters of a simulated observer (degrees; decay in motion periods)."""

    pse_deg: float = 0.0
    spread_deg: float = 2.0
    lapse: float = 0.02
    amplitude_deg: float = 3.0
    peak_offset_deg: float = 30.0
    decay_periods: float = 1.5

    def shift(self, offset, lag):
        """PSE shift (deg) after an adapter at ``offset`` (deg) and ``lag`` periods."""
        u = np.asarray(offset, dtype=float) / self.peak_offset_deg
        return (self.amplitude_deg * u * np.exp(0.5 - 0.5 * u * u)
                * np.exp(-np.asarray(lag, dtype=float) / self.decay_periods))

    def p_cw(self, x, shift=0.0):
        """Probability of a clockwise answer at test offset ``x``."""
        z = (np.asarray(x, dtype=float) - self.pse_deg - shift) / self.spread_deg
        return self.lapse / 2 + (1 - self.lapse) * special.ndtr(z)


def condition_name(offset, lag) -> str:
    """Label of an adapter condition, e.g. ``adapt+15_lag0``."""
    return f"adapt{offset:+g}_lag{int(lag)}"


def simulate_trials(model: ObserverModel = ObserverModel(), offsets=(-60, -30, -15, 15, 30, 60),
                    lags=(0, 1, 2), trials_per_track: int = 40, tracks: int = 2,
                    procedure: str = "updown", seed=0, observer: str = "sim01",
                    session: str = "1", start_deg: float = 8.0, step_deg: float = 1.0,
                    levels=None, baseline: bool = True, period_s: float | None = 0.5,
                    reference_deg: float = 90.0, practice_trials: int = 0,
                    missed_rate: float = 0.0, bad_timing_rate: float = 0.0) -> pd.DataFrame:
    """One simulated session as a trial-log table (the required columns and more).

    Parameters
    ----------
    model : ObserverModel
    offsets, lags : sequences
        Adapter conditions are all pairs (offset, lag); a baseline (no
        adapter) is added when ``baseline`` is true.
    trials_per_track, tracks : int
        Trials in each condition = ``trials_per_track * tracks``.
    procedure : {"updown", "constant"}
        ``updown``: 1-up/1-down tracks of ``step_deg``, starting alternately at
        ``+start_deg`` and ``-start_deg``.  ``constant``: trials at ``levels``
        (default 9 levels from -8 to +8 deg) in random order.
    seed : int or numpy SeedSequence
    observer, session : str
    period_s : float or None
        Written to the ``period_s`` column (None: column left out).
    practice_trials : int
        Extra baseline trials marked ``practice = 1`` at the start.
    missed_rate, bad_timing_rate : float
        Shares of trials with an empty answer, or with ``timing_ok = false``.

    Returns
    -------
    pandas.DataFrame
        Rows in presentation order (tracks interleaved at random).
    """
    rng = np.random.default_rng(seed)
    conds = ([("baseline", np.nan, np.nan)] if baseline else []) + [
        (condition_name(o, k), float(o), float(k)) for k in lags for o in offsets]
    n_tracks = len(conds) * tracks
    cond_of_track = np.repeat(np.arange(len(conds)), tracks)
    shift = np.array([0.0 if np.isnan(o) else model.shift(o, k) for _, o, k in conds])[cond_of_track]
    t = trials_per_track
    level = np.empty((n_tracks, t))
    answer = np.empty((n_tracks, t))
    missed = rng.random((n_tracks, t)) < missed_rate
    if procedure == "updown":
        current = np.where(np.arange(n_tracks) % 2 == 0, start_deg, -start_deg)
        for i in range(t):
            level[:, i] = current
            cw = rng.random(n_tracks) < model.p_cw(current, shift)
            answer[:, i] = cw
            step = np.where(cw, -step_deg, step_deg)
            current = np.where(missed[:, i], current, current + step)
    elif procedure == "constant":
        grid = np.linspace(-8.0, 8.0, 9) if levels is None else np.asarray(levels, dtype=float)
        reps = -(-t // grid.size)
        for j in range(n_tracks):
            level[j] = rng.permutation(np.tile(grid, reps))[:t]
        answer = (rng.random((n_tracks, t)) < model.p_cw(level, shift[:, None])).astype(float)
    else:
        raise ValueError("procedure must be 'updown' or 'constant'")
    # interleave: a random order of track ids, each appearing t times
    order = rng.permutation(np.repeat(np.arange(n_tracks), t))
    position = np.zeros(n_tracks, dtype=int)
    rows = []
    for tr in order:
        i = position[tr]
        position[tr] += 1
        name, off, lag = conds[cond_of_track[tr]]
        rows.append((name, off, lag, int(tr % tracks) + 1, level[tr, i],
                     np.nan if missed[tr, i] else answer[tr, i]))
    df = pd.DataFrame(rows, columns=["condition", "adapter_offset_deg", "lag", "track",
                                     "test_offset_deg", "response_cw"])
    if practice_trials:
        x = rng.uniform(-start_deg, start_deg, practice_trials)
        prac = pd.DataFrame({"condition": "baseline", "adapter_offset_deg": np.nan, "lag": np.nan,
                             "track": 1, "test_offset_deg": x,
                             "response_cw": (rng.random(practice_trials) < model.p_cw(x)).astype(float)})
        df = pd.concat([prac, df], ignore_index=True)
    n = len(df)
    df.insert(0, "observer", observer)
    df.insert(1, "session", str(session))
    df.insert(2, "trial", np.arange(1, n + 1))
    df["lag"] = df["lag"].astype("Int64")
    df["response_cw"] = df["response_cw"].astype("Int64")
    df["rt_s"] = np.where(df["response_cw"].isna(), np.nan, rng.uniform(0.35, 1.2, n).round(3))
    df["dropped_frames"] = 0
    df["timing_ok"] = rng.random(n) >= bad_timing_rate
    df["practice"] = (np.arange(n) < practice_trials).astype(int)
    if period_s is not None:
        df["period_s"] = period_s
    df["reference_deg"] = reference_deg
    df["procedure"] = np.where(df["practice"] == 1, "practice", procedure)     # as a session logs it
    return df


def write_log(trials: pd.DataFrame, path) -> None:
    """Write a table from :func:`simulate_trials` as a ``*.trials.csv`` log."""
    out = trials.copy()
    out["timing_ok"] = np.where(out["timing_ok"].astype(bool), "true", "false")
    out["test_offset_deg"] = out["test_offset_deg"].round(6)
    out.to_csv(path, index=False, na_rep="")


def recovery_study(seeds, model: ObserverModel = ObserverModel(), n_boot: int = 300,
                   offsets=(-60, -30, -15, 15, 30, 60), lags=(0, 1, 2),
                   trials_per_track: int = 40, interval: str = "by-statistic") -> pd.DataFrame:
    """Simulate one observer per seed, fit, and check each interval against the truth.

    Returns one row per seed with the estimates and intervals of the lag-0
    tuning amplitude and peak offset (``tuning.csv``) and of the decay
    constant (``decay.csv``), and whether each interval holds the simulated
    value.
    """
    from .observer import Options, analyse_observer
    from .tables import prepare_trials

    opts = Options(n_boot=n_boot, interval=interval, progress=False)
    rows = []
    for seed in seeds:
        trials = prepare_trials(simulate_trials(model, offsets, lags, trials_per_track, seed=seed,
                                                observer=f"sim{seed}"))
        a = analyse_observer(f"sim{seed}", trials, opts, np.random.default_rng([seed, 1]))
        t0 = a.tuning[a.tuning["lag"] == 0].iloc[0]
        d = a.decay.iloc[0]
        row = {"seed": seed}
        for name, est, lo, hi, truth in (
                ("amplitude", t0["amplitude_deg"], t0["amplitude_ci_low"], t0["amplitude_ci_high"],
                 model.amplitude_deg),
                ("peak_offset", t0["peak_offset_deg"], t0["peak_offset_ci_low"],
                 t0["peak_offset_ci_high"], model.peak_offset_deg),
                ("decay", d["decay_periods"], d["ci_low"], d["ci_high"], model.decay_periods)):
            row.update({name: est, f"{name}_low": lo, f"{name}_high": hi,
                        f"{name}_covered": bool(lo <= truth <= hi)})
        rows.append(row)
    return pd.DataFrame(rows)
