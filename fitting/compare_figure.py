"""The overlay figure of ``aftershift compare``: measured vs predicted, one panel per observer."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from fitting.figures import GRID_DPI, save
from fitting.panels import FAINT, PanelGrid

_COLOURS = ["#1b4965", "#c8553d", "#5a8f29", "#8e5572", "#d4a017", "#3a7ca5", "#6b4226"]


def overlay_columns(n_panels: int) -> int:
    """Columns of the wrapped grid: up to 4 side by side, then rows of about equal length."""
    if n_panels <= 4:
        return n_panels
    return math.ceil(n_panels / math.ceil(n_panels / 4))


def overlay_figure(points, stem: Path) -> list[Path]:
    """Measured after-effects with 95 % CIs and predicted curves, one panel per observer.

    Panels wrap into rows of at most four, so the figure stays readable for
    any number of observers; the legend sits right of the panels.

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
    ncols = overlay_columns(len(observers))
    positions = [divmod(i, ncols) for i in range(len(observers))]
    x = points["adapter_offset_deg"].to_numpy(float)
    ys = points[["pse_shift_deg", "ci_low", "ci_high", "predicted_deg"]].to_numpy(float)
    span = float(np.nanmax(np.abs(x))) if len(x) else 1.0
    lo, hi = float(np.nanmin(ys)), float(np.nanmax(ys))
    pad = 0.06 * max(hi - lo, 1.0)
    has_ci = bool(np.isfinite(ys[:, 1:3]).any())
    canvas = PanelGrid(positions, (-1.1 * span, 1.1 * span), (lo - pad, hi + pad),
                       "Measured after-effects (points" + (", 95% CI" if has_ci else "") +
                       ") and predictions (lines), one panel per observer",
                       "adapter offset from reference (deg, + = clockwise)", "PSE shift (deg, + = clockwise)",
                       panel_w=2.4, panel_h=1.8, legend_w=1.6)
    nudge = 0.012 * span
    for i, observer in enumerate(observers):
        mine = points[points["observer"] == observer]
        canvas.hline(i, 0.0, FAINT, 0.6)
        canvas.vline(i, 0.0, FAINT, 0.6)
        for j, lag in enumerate(lags):
            colour = _COLOURS[j % len(_COLOURS)]
            g = mine[mine["lag"] == lag].sort_values("adapter_offset_deg")
            gx = g["adapter_offset_deg"].to_numpy(float)
            # side by side, so the intervals do not hide each other
            canvas.errorbars(i, gx + (j - (len(lags) - 1) / 2) * nudge, g["pse_shift_deg"], g["ci_low"],
                             g["ci_high"], colour)
            canvas.line(i, gx, g["predicted_deg"].to_numpy(float), colour, 1.3, alpha=0.85)
        canvas.panel_title(i, str(observer))
    entries = []
    for j, lag in enumerate(lags):
        colour = _COLOURS[j % len(_COLOURS)]
        entries += [(f"measured, lag {lag:g}", colour, "marker"), (f"predicted, lag {lag:g}", colour, "line")]
    canvas.legend(entries)
    return [Path(p) for p in save(canvas.finish(), stem, dpi=GRID_DPI)]
