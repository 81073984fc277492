"""Predicted after-effects from a population of direction-tuned channels.

A small, explicit model to compare measurements with (``aftershift
compare``).  Channels prefer directions spaced evenly around the circle and
respond to a direction θ with a von Mises tuning curve
``exp(κ (cos(θ − θ_i) − 1))``.  Adaptation to an adapter at offset Δ scales
every channel's gain by ``1 − s · exp(κ_a (cos(θ_i − Δ) − 1))``; after *k*
intervening periods the gain loss has recovered to ``s · exp(−k / τ)``.  A
decoder that is unaware of the adaptation reads the direction of a test as
the angle of the population vector Σ r_i e^{iθ_i}, which is repelled from the
adapter.  The predicted PSE shift is the physical test offset that is read as
the reference, so a repulsive model gives a shift with the sign of Δ
(the README's convention).

All angles are offsets from the reference in degrees (positive = clockwise);
the model is symmetric, so the reference direction itself does not matter.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.optimize import brentq


@dataclass(frozen=True)
class ChannelModel:
    """Parameters of the channel population.

    Attributes
    ----------
    n_channels : int
        Channels with preferred directions every ``360 / n_channels`` deg.
    tuning_kappa : float
        Concentration of the channels' tuning (larger = narrower).
    adapt_strength : float
        Fractional gain loss of the channel tuned to the adapter, at lag 0.
    adapt_kappa : float
        Concentration of the gain loss around the adapter direction.
    recovery_periods : float
        τ: the gain loss decays as exp(−k / τ) over k intervening periods.
    """

    n_channels: int = 72
    tuning_kappa: float = 2.5
    adapt_strength: float = 0.4
    adapt_kappa: float = 2.5
    recovery_periods: float = 2.0

    def __post_init__(self):
        if self.n_channels < 8:
            raise ValueError("n_channels: expected at least 8")
        if not (0 <= self.adapt_strength < 1):
            raise ValueError("adapt_strength: expected a value in [0, 1)")
        if min(self.tuning_kappa, self.adapt_kappa, self.recovery_periods) <= 0:
            raise ValueError("tuning_kappa, adapt_kappa, recovery_periods: expected positive values")

    def preferred_rad(self) -> np.ndarray:
        """Preferred directions of the channels (rad)."""
        return np.linspace(0, 2 * np.pi, self.n_channels, endpoint=False)

    def gains(self, adapter_offset_deg: float | None, lag: int) -> np.ndarray:
        """Channel gains after an adapter (None = unadapted)."""
        pref = self.preferred_rad()
        if adapter_offset_deg is None:
            return np.ones_like(pref)
        loss = self.adapt_strength * np.exp(-lag / self.recovery_periods)
        return 1 - loss * np.exp(self.adapt_kappa * (np.cos(pref - np.radians(adapter_offset_deg)) - 1))

    def decoded_deg(self, test_offset_deg, gains: np.ndarray) -> np.ndarray:
        """Population-vector reading of test offsets (deg)."""
        x = np.radians(np.atleast_1d(np.asarray(test_offset_deg, float)))[:, None]
        pref = self.preferred_rad()[None, :]
        r = gains[None, :] * np.exp(self.tuning_kappa * (np.cos(x - pref) - 1))
        return np.degrees(np.angle((r * np.exp(1j * pref)).sum(axis=1)))

    def pse_shift_deg(self, adapter_offset_deg: float, lag: int) -> float:
        """The test offset read as the reference after adaptation: the crossing of 0 nearest 0 within ±90 deg.

        Raises
        ------
        ValueError
            No test offset within ±90 deg is read as the reference (the
            adaptation pushes every reading more than 90 deg away; the
            population vector's angle then only jumps from +180 to −180 deg,
            which is no reading of the reference).
        """
        g = self.gains(adapter_offset_deg, lag)
        grid = np.linspace(-90.0, 90.0, 181)
        read = self.decoded_deg(grid, g)
        crossing = (np.sign(read[:-1]) != np.sign(read[1:])) & (np.abs(read[:-1]) < 90) & (np.abs(read[1:]) < 90)
        if not crossing.any():
            raise ValueError(f"no test offset within +-90 deg is read as the reference after an adapter at "
                             f"{adapter_offset_deg:g} deg, lag {lag}")
        at = np.flatnonzero(crossing)
        i = at[np.argmin(np.abs(grid[at] + 0.5))]       # the crossing nearest 0
        return float(brentq(lambda x: self.decoded_deg(x, g)[0], grid[i], grid[i + 1], xtol=1e-10))


def predict_table(model: ChannelModel, adapter_offsets_deg, lags) -> pd.DataFrame:
    """Predicted PSE shifts on a grid, in the predictions-file layout.

    Returns
    -------
    DataFrame
        Columns ``lag``, ``adapter_offset_deg``, ``pse_shift_deg``.
    """
    rows = [
        {"lag": int(k), "adapter_offset_deg": float(d), "pse_shift_deg": model.pse_shift_deg(float(d), int(k))}
        for k in lags
        for d in adapter_offsets_deg
    ]
    return pd.DataFrame(rows, columns=["lag", "adapter_offset_deg", "pse_shift_deg"])
