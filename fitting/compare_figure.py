"""The overlay figure of ``aftershift compare``: measured vs predicted, one panel per observer."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd

from fitting.figures import GRID_DPI, save
from fitting.panels import FAINT, INK, PanelGrid

_COLOURS = ["#1b4965", "#c8553d", "#5a8f29", "#8e5572", "#d4a017", "#3a7ca5", "#6b4226"]


def overlay_columns(n_panels: int) -> int:
    """Columns of the wrapped grid: up to 4 side by side, then rows of about equal length."""
    if n_panels <= 4:
        return n_panels
    return math.ceil(n_panels / math.ceil(n_panels / 4))


#: Legend text of the hollow points (the points :func:`fitting.compare.not_estimable` leaves out).
LEFT_OUT_LABEL = "left out of \u03c7\u00b2 and gain\n(one-sided, few trials,\ngroup of < 3 observers)"
#: Added to it when a hollow point lies beyond the vertical range.
BEYOND_LABEL = ";\noff scale: at the edge"


def overlay_canvas(points) -> PanelGrid:
    """Draw measured after-effects with 95 % CIs and predicted curves, one panel per observer.

    Points in the agreement statistics are filled, with their intervals;
    points left out of them (``in_statistics`` false: one-sided, too few
    trials, or a group cell of fewer than three observers) are hollow,
    without an interval, and the legend says so.  The
    vertical range is set by the points in the statistics and the
    predictions, so a PSE on its fitting bound does not flatten every panel;
    a hollow point beyond it sits on the panel's edge.

    Parameters
    ----------
    points : DataFrame
        From :func:`fitting.compare.match_predictions`, with ``in_statistics``
        (all points are in the statistics when the column is missing).

    Returns
    -------
    PanelGrid
        Not yet finished (:meth:`PanelGrid.finish` makes the figure).
    """
    observers = list(dict.fromkeys(points["observer"]))
    lags = sorted(points["lag"].unique())
    ncols = overlay_columns(len(observers))
    positions = [divmod(i, ncols) for i in range(len(observers))]
    kept = (points["in_statistics"].astype(bool) if "in_statistics" in points
            else pd.Series(True, index=points.index))
    x = points["adapter_offset_deg"].to_numpy(float)
    scaled = points[kept] if kept.any() else points
    ys = np.concatenate([scaled[["pse_shift_deg", "ci_low", "ci_high"]].to_numpy(float).ravel(),
                         points["predicted_deg"].to_numpy(float)])
    span = float(np.nanmax(np.abs(x))) if len(x) else 1.0
    lo, hi = float(np.nanmin(ys)), float(np.nanmax(ys))
    pad = 0.06 * max(hi - lo, 1.0)
    has_ci = bool(np.isfinite(points.loc[kept, ["ci_low", "ci_high"]].to_numpy(float)).any())
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
            side = gx + (j - (len(lags) - 1) / 2) * nudge
            used = kept[g.index].to_numpy()
            canvas.errorbars(i, side[used], g["pse_shift_deg"][used], g["ci_low"][used], g["ci_high"][used], colour)
            if not used.all():
                canvas.markers(i, side[~used], g["pse_shift_deg"].to_numpy(float)[~used], colour, filled=False,
                               size=3.2)
            canvas.line(i, gx, g["predicted_deg"].to_numpy(float), colour, 1.3, alpha=0.85)
        canvas.panel_title(i, str(observer))
    entries = []
    for j, lag in enumerate(lags):
        colour = _COLOURS[j % len(_COLOURS)]
        entries += [(f"measured, lag {lag:g}", colour, "marker"), (f"predicted, lag {lag:g}", colour, "line")]
    if not kept.all():
        hollow = points.loc[~kept, "pse_shift_deg"].to_numpy(float)
        beyond = ((hollow < lo - pad) | (hollow > hi + pad)).any()
        entries.append((LEFT_OUT_LABEL + (BEYOND_LABEL if beyond else ""), INK, "open"))
    canvas.legend(entries)
    return canvas


def overlay_figure(points, stem: Path) -> list[Path]:
    """Save :func:`overlay_canvas` as ``stem.png`` and ``stem.pdf``.

    Panels wrap into rows of at most four, so the figure stays readable for
    any number of observers; the legend sits right of the panels.

    Parameters
    ----------
    points : DataFrame
        As :func:`overlay_canvas` takes it.
    stem : Path
        Output path without suffix.

    Returns
    -------
    list of Path
    """
    return [Path(p) for p in save(overlay_canvas(points).finish(), stem, dpi=GRID_DPI)]
