"""The overlay figure of ``aftershift compare``: measured vs predicted."""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from fitting.figures import save  # noqa: E402


def overlay_figure(points, stem: Path) -> list[Path]:
    """Measured after-effects with 95 % CIs and predicted curves, one panel per observer.

    Parameters
    ----------
    points : DataFrame
        From :func:`fitting.compare.match_predictions`.
    stem : Path
        Output path without suffix; ``.png`` and ``.pdf`` are written.

    Returns
    -------
    list of Path
    """
    observers = list(dict.fromkeys(points["observer"]))
    lags = sorted(points["lag"].unique())
    colours = plt.cm.viridis(np.linspace(0.05, 0.85, max(len(lags), 1)))
    fig, axes = plt.subplots(1, len(observers), figsize=(4.2 * len(observers), 3.6), squeeze=False, sharey=True)
    for ax, observer in zip(axes[0], observers):
        mine = points[points["observer"] == observer]
        for i, (colour, lag) in enumerate(zip(colours, lags)):
            g = mine[mine["lag"] == lag].sort_values("adapter_offset_deg")
            x = g["adapter_offset_deg"].to_numpy()
            y = g["pse_shift_deg"].to_numpy()
            err = np.vstack([y - g["ci_low"].to_numpy(), g["ci_high"].to_numpy() - y])
            nudge = (i - (len(lags) - 1) / 2) * 1.5  # side by side, so the intervals do not hide each other
            ax.errorbar(x + nudge, y, yerr=err, fmt="o", ms=4, color=colour, capsize=2, label=f"measured, lag {lag:g}")
            ax.plot(x, g["predicted_deg"], "-", color=colour, lw=1.5, alpha=0.8, label=f"predicted, lag {lag:g}")
        ax.axhline(0, color="0.7", lw=0.8)
        ax.axvline(0, color="0.7", lw=0.8)
        ax.set_title(str(observer))
        ax.set_xlabel("adapter offset from reference (deg, + = clockwise)")
    axes[0][0].set_ylabel("PSE shift (deg, + = clockwise)")
    axes[0][-1].legend(fontsize=7, frameon=False, loc="best")
    fig.suptitle("Measured after-effects (points, 95% CI) and predictions (lines)", fontsize=10)
    fig.tight_layout()
    return [Path(p) for p in save(fig, stem, dpi=150)]
