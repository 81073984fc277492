"""Grids of small panels drawn on one matplotlib canvas.

A figure with one matplotlib ``Axes`` per panel costs tens of artists per
panel (spines, tick objects, tick labels) and seconds to draw once there are
dozens of panels.  :class:`PanelGrid` draws every panel on one canvas in inch
coordinates instead: all lines of the figure go into a few line collections,
all dots into one scatter, all bands into one polygon collection, and only the
titles and the tick labels of the outer panels are text.  The cost then grows
with the data, not with the number of panels, and the grid wraps into as many
rows as the panels need.
"""

from __future__ import annotations

import textwrap
from dataclasses import dataclass, field

import numpy as np

INK = "#222222"
FAINT = "#9a9a9a"

# inches
_LEFT, _RIGHT, _BOTTOM = 0.62, 0.18, 0.48
_GAP_W, _GAP_H = 0.26, 0.5
_TITLE_LINE = 0.17          # one line of the figure title
_LEGEND_LINE = 0.19         # one legend entry
_CHAR_W = 0.55 / 72         # average character width per point of font size (DejaVu Sans)


def wrap_title(text: str, width_in: float, size_pt: float) -> str:
    """``text`` broken into lines that fit ``width_in`` inches at ``size_pt`` points."""
    chars = max(int(width_in / (_CHAR_W * size_pt)), 20)
    return "\n".join(textwrap.wrap(text, chars, break_on_hyphens=False)) or text


def nice_ticks(lo: float, hi: float, n: int = 4) -> np.ndarray:
    """Round tick values inside ``[lo, hi]``: the finest 1-2-2.5-5 step giving at most ``n`` ticks."""
    span = hi - lo
    if not np.isfinite(span) or span <= 0:
        return np.array([lo])
    mag = 10.0 ** np.floor(np.log10(span / n))
    for m in (1, 2, 2.5, 5, 10, 20):
        step = m * mag
        ticks = np.arange(np.ceil(lo / step) * step, hi + 1e-9 * span, step)
        if ticks.size <= n:
            break
    return np.round(ticks, 10)


def tick_text(v: float) -> str:
    return f"{v:g}" if abs(v) >= 1e-12 else "0"


@dataclass
class _Layer:
    segments: list = field(default_factory=list)
    colours: list = field(default_factory=list)


class PanelGrid:
    """``n`` panels with common axis limits, wrapped into rows, on one canvas.

    Parameters
    ----------
    positions : list of (row, column)
        Where each panel goes (row 0 at the top).
    xlim, ylim : (float, float)
        Data limits shared by all panels.
    title : str
        Figure title (wrapped to the figure width, never cut).
    xlabel, ylabel : str
        Axis labels, written once below and left of the grid.
    panel_w, panel_h : float
        Panel size in inches.
    """

    def __init__(self, positions, xlim, ylim, title: str, xlabel: str, ylabel: str,
                 panel_w: float = 1.6, panel_h: float = 1.15, font_pt: float = 7.0,
                 legend_w: float = 0.0):
        import matplotlib
        matplotlib.use("Agg", force=False)
        import matplotlib.pyplot as plt

        self.positions = list(positions)
        self.nrows = max(r for r, _ in self.positions) + 1
        self.ncols = max(c for _, c in self.positions) + 1
        self.xlim, self.ylim = (float(xlim[0]), float(xlim[1])), (float(ylim[0]), float(ylim[1]))
        self.pw, self.ph, self.font = panel_w, panel_h, font_pt
        self.legend_w = legend_w
        self.width = _LEFT + _RIGHT + legend_w + self.ncols * panel_w + (self.ncols - 1) * _GAP_W
        self.title = wrap_title(title, self.width - 0.2, font_pt + 1.5)
        self.top = 0.25 + _TITLE_LINE * (self.title.count("\n") + 1) + 0.35
        self.height = self.top + _BOTTOM + self.nrows * panel_h + (self.nrows - 1) * _GAP_H
        self.fig = plt.figure(figsize=(self.width, self.height))
        ax = self.fig.add_axes((0, 0, 1, 1))
        ax.set_axis_off()
        ax.set_xlim(0, self.width)
        ax.set_ylim(0, self.height)
        self.ax = ax
        self.layers: dict = {}
        self.polys, self.poly_colours = [], []
        self.dots = {"xy": [], "s": [], "face": [], "edge": []}
        self.marks: dict = {}
        self.fig.text(0.08 / self.width, 1 - 0.2 / self.height, self.title, ha="left", va="top",
                      fontsize=font_pt + 1.5, color=INK)
        self.fig.text(0.5 * (_LEFT + self.width - _RIGHT - legend_w) / self.width, 0.08 / self.height, xlabel,
                      ha="center", va="bottom", fontsize=font_pt + 0.5, color=INK)
        self.fig.text(0.08 / self.width, 0.5 * (self.height - self.top + _BOTTOM) / self.height, ylabel,
                      ha="left", va="center", rotation=90, fontsize=font_pt + 0.5, color=INK)

    # -- coordinates ---------------------------------------------------------

    def origin(self, i: int) -> tuple[float, float]:
        """Lower-left corner of panel ``i`` in inches."""
        r, c = self.positions[i]
        x0 = _LEFT + c * (self.pw + _GAP_W)
        y0 = self.height - self.top - (r + 1) * self.ph - r * _GAP_H
        return x0, y0

    def to_canvas(self, i: int, x, y):
        """Data coordinates of panel ``i`` to inches (values clipped to the limits)."""
        x0, y0 = self.origin(i)
        (a, b), (c, d) = self.xlim, self.ylim
        x = np.clip(np.asarray(x, dtype=float), a, b)
        y = np.clip(np.asarray(y, dtype=float), c, d)
        return x0 + (x - a) / (b - a) * self.pw, y0 + (y - c) / (d - c) * self.ph

    # -- drawing -------------------------------------------------------------

    def line(self, i, x, y, colour, lw: float = 1.0, style: str = "solid", alpha: float = 1.0):
        """A polyline in panel ``i``."""
        cx, cy = self.to_canvas(i, x, y)
        layer = self.layers.setdefault((lw, style, alpha), _Layer())
        layer.segments.append(np.column_stack([cx, cy]))
        layer.colours.append(colour)

    def hline(self, i, y, colour, lw: float = 0.5, style: str = "solid"):
        self.line(i, self.xlim, [y, y], colour, lw, style)

    def vline(self, i, x, colour, lw: float = 0.5, style: str = "solid"):
        self.line(i, [x, x], self.ylim, colour, lw, style)

    def band(self, i, x, low, high, colour, alpha: float = 0.18):
        """A shaded band between ``low`` and ``high``."""
        cx, cl = self.to_canvas(i, x, low)
        _, ch = self.to_canvas(i, x, high)
        self.polys.append(np.column_stack([np.r_[cx, cx[::-1]], np.r_[cl, ch[::-1]]]))
        self.poly_colours.append((colour, alpha))

    def points(self, i, x, y, size, face, edge="white"):
        """Dots (``size`` in points squared, scalar or per dot)."""
        cx, cy = self.to_canvas(i, x, y)
        n = cx.size
        self.dots["xy"].append(np.column_stack([cx, cy]))
        self.dots["s"].append(np.broadcast_to(np.asarray(size, dtype=float), (n,)))
        self.dots["face"] += [face] * n
        self.dots["edge"] += [edge] * n

    def markers(self, i, x, y, colour, filled: bool = True, size: float = 2.6):
        """Equal markers (``size`` in points), cheaper than :meth:`points` when there are many."""
        cx, cy = self.to_canvas(i, x, y)
        xs, ys = self.marks.setdefault((colour, filled, size), ([], []))
        xs.append(cx)
        ys.append(cy)

    def errorbars(self, i, x, y, low, high, colour, size: float = 3.2):
        """Filled markers at ``(x, y)`` with vertical intervals ``[low, high]`` (missing limits: no bar)."""
        low, high = np.asarray(low, dtype=float), np.asarray(high, dtype=float)
        ok = np.isfinite(low) & np.isfinite(high)
        x = np.asarray(x, dtype=float)
        for xi, lo, hi in zip(x[ok], low[ok], high[ok]):
            self.line(i, [xi, xi], [lo, hi], colour, 0.8)
        self.markers(i, x, y, colour, True, size)

    def legend(self, entries):
        """Legend right of the grid, outside every panel: ``(label, colour, kind)`` with kind
        ``"line"``, ``"dashed"``, ``"marker"`` or ``"open"``; a label may run over several lines."""
        x = self.width - _RIGHT - self.legend_w + 0.15
        y = self.height - self.top - 0.1
        for label, colour, kind in entries:
            more = label.count("\n") * _LEGEND_LINE / 2      # a longer label is centred lower
            y -= more
            if kind in ("line", "dashed"):
                layer = self.layers.setdefault((1.2, "solid" if kind == "line" else "dashed", 1.0), _Layer())
                layer.segments.append(np.array([[x, y], [x + 0.25, y]]))
                layer.colours.append(colour)
            else:
                xs, ys = self.marks.setdefault((colour, kind == "marker", 3.2), ([], []))
                xs.append(np.array([x + 0.125]))
                ys.append(np.array([y]))
            self.ax.text(x + 0.33, y, label, ha="left", va="center", fontsize=self.font, color=INK)
            y -= _LEGEND_LINE + more

    def panel_title(self, i, text: str):
        x0, y0 = self.origin(i)
        self.ax.text(x0 + self.pw / 2, y0 + self.ph + 0.04, text, ha="center", va="bottom",
                     fontsize=self.font, color=INK, linespacing=1.1)

    # -- finishing -----------------------------------------------------------

    def _frames(self):
        """Left and bottom axis lines with ticks; tick labels on the outer panels only."""
        xt = nice_ticks(*self.xlim, 4)
        yt = nice_ticks(*self.ylim, 3)
        occupied = set(self.positions)
        tick = 0.04
        for i, (r, c) in enumerate(self.positions):
            x0, y0 = self.origin(i)
            self.line(i, self.xlim, [self.ylim[0]] * 2, INK, 0.6)
            self.line(i, [self.xlim[0]] * 2, self.ylim, INK, 0.6)
            cx, _ = self.to_canvas(i, xt, np.zeros_like(xt))
            _, cy = self.to_canvas(i, np.zeros_like(yt), yt)
            ticks = self.layers.setdefault((0.6, "solid", 1.0), _Layer())
            ticks.segments += [np.array([[x, y0], [x, y0 - tick]]) for x in cx]
            ticks.segments += [np.array([[x0, y], [x0 - tick, y]]) for y in cy]
            ticks.colours += [INK] * (cx.size + cy.size)
            if (r + 1, c) not in occupied:
                for x, v in zip(cx, xt):
                    self.ax.text(x, y0 - tick - 0.02, tick_text(v), ha="center", va="top",
                                 fontsize=self.font - 0.5, color=INK)
            if (r, c - 1) not in occupied:
                for y, v in zip(cy, yt):
                    self.ax.text(x0 - tick - 0.03, y, tick_text(v), ha="right", va="center",
                                 fontsize=self.font - 0.5, color=INK)

    def finish(self):
        """Turn the collected pieces into a few collections; return the figure."""
        from matplotlib.collections import LineCollection, PolyCollection

        self._frames()
        if self.polys:
            self.ax.add_collection(PolyCollection(
                self.polys, facecolors=[(c, a) for c, a in self.poly_colours], linewidths=0, zorder=1))
        styles = {"solid": "-", "dashed": (0, (3.5, 2)), "dotted": (0, (1, 1.6))}
        for (lw, style, alpha), layer in self.layers.items():
            self.ax.add_collection(LineCollection(layer.segments, colors=layer.colours, linewidths=lw,
                                                  linestyles=styles[style], alpha=alpha, zorder=2,
                                                  capstyle="butt"))
        for (colour, filled, size), (xs, ys) in self.marks.items():
            self.ax.plot(np.concatenate(xs), np.concatenate(ys), "o", ms=size, mew=0.6, mec=colour,
                         mfc=colour if filled else "white", ls="none", zorder=3)
        if self.dots["xy"]:
            xy = np.concatenate(self.dots["xy"])
            self.ax.scatter(xy[:, 0], xy[:, 1], s=np.concatenate(self.dots["s"]), c=self.dots["face"],
                            edgecolors=self.dots["edge"], linewidths=0.5, zorder=3)
        self.ax.set_xlim(0, self.width)
        self.ax.set_ylim(0, self.height)
        return self.fig
