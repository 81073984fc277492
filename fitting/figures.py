"""Figures of a fit, as PNG (and PDF on request), matplotlib's Agg backend.

Per observer:

* ``psychometric_<obs>``: one panel per condition (rows = lags, columns =
  adapter offsets, the baseline on top; more than eight offsets wrap into
  rows of six): proportion of clockwise answers at each level (dot area =
  trials), the fitted function, its 95 % band from the bootstrap replicates,
  and the baseline's fitted function for comparison;
* ``tracks_<obs>``: the test offset trial by trial in every track of every
  session (colour = track; filled = "clockwise" answer, open =
  "counter-clockwise");
* ``aftereffect_<obs>``: PSE shift against adapter offset, one colour per
  lag, with intervals and the fitted DoG curve;
* ``decay_<obs>``: DoG amplitude per lag with intervals and the fitted
  exponential decay.

With several observers, ``aftereffect_group`` and ``decay_group`` as well.

Speed: the panel grids are drawn on one canvas (:mod:`fitting.panels`), no
automatic layout pass runs, and :func:`make_figures` draws independent
figures in parallel processes.  With several observers and worker
processes, ``fit`` draws each observer's figures into memory
(:func:`draw_to_memory`) on the workers while the other observers are still
being fitted; :func:`make_figures` then writes them and draws the rest.  PNGs are written at print resolution
(:data:`PNG_DPI`, :data:`GRID_DPI` for the panel grids).  ``fit`` writes PNGs
only unless asked for PDF copies (``fit --pdf``, ``formats=("png", "pdf")``):
they added about 0.65 s (a fifth) to a 25-condition ``fit`` with 2,000
replicates.  Captions name only what the figure draws.
"""

from __future__ import annotations

import hashlib
import os
import re
import signal
from contextlib import ExitStack
from pathlib import Path

import numpy as np
import pandas as pd

from .aftereffect import dog
from .children import children_shielded, follow_parent
from .errors import InputError
from .flags import NOT_USABLE, usable
from .panels import FAINT as _FAINT
from .panels import INK as _INK
from .panels import PanelGrid, wrap_title

PNG_DPI = 300                    # print resolution of single plots
GRID_DPI = 200                   # and of the panel grids (up to 8 panels of 1.6 in across)
FORMATS = ("png", "pdf")         # what save() writes by default
FIT_FORMATS = ("png",)           # what make_figures() writes by default (``fit --pdf`` adds PDF)
MAX_COLUMNS = 8                  # a grid with more adapter offsets wraps into rows of WRAP_COLUMNS
WRAP_COLUMNS = 6
_LAG_COLOURS = ["#1b4965", "#c8553d", "#5a8f29", "#8e5572", "#d4a017", "#3a7ca5", "#6b4226"]
_STYLE = {
    "font.size": 8.5, "axes.titlesize": 8.5, "axes.labelsize": 8.5,
    "axes.edgecolor": _INK, "axes.labelcolor": _INK, "xtick.color": _INK, "ytick.color": _INK,
    "axes.spines.top": False, "axes.spines.right": False, "axes.linewidth": 0.7,
    "xtick.major.width": 0.6, "ytick.major.width": 0.6, "legend.frameon": False,
    "figure.dpi": 100, "savefig.dpi": PNG_DPI, "pdf.fonttype": 42,
}


_METADATA = {"png": {"Software": None}, "pdf": {"CreationDate": None, "Producer": None}}  # no time stamps


def pyplot():
    """matplotlib's ``pyplot`` with the Agg backend (imported on first use)."""
    import matplotlib
    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    return plt


def safe_name(text: str) -> str:
    """File-name-safe form of an observer ID, different for different IDs.

    An ID of ASCII letters, digits, ``_`` and ``-`` is kept as it is.  In any
    other the rest becomes ``_`` and a short digest of the whole ID is
    appended, so that "a b" and "a_b", or "Ö1" and "Ä1", name different
    files (they overwrote each other's figures before).
    """
    text = str(text)
    if re.fullmatch(r"[A-Za-z0-9_-]+", text):
        return text
    cleaned = re.sub(r"[^A-Za-z0-9_-]+", "_", text).strip("_") or "observer"
    return f"{cleaned}-{hashlib.sha1(text.encode('utf-8')).hexdigest()[:8]}"


def _lag_colour(i: int) -> str:
    return _LAG_COLOURS[i % len(_LAG_COLOURS)]


def _lag_label(lag: float) -> str:
    lag = int(lag)
    if lag == 0:
        return "lag 0 (test right after adapter)"
    return f"lag {lag} ({lag} intervening period{'s' if lag != 1 else ''})"


def save(fig, base: Path, dpi: float | None = None, formats=FORMATS) -> list[str]:
    """Save ``fig`` as ``base.png`` (and ``base.pdf``), without time stamps; return the paths.

    Parameters
    ----------
    fig : matplotlib Figure
    base : Path
        Output path without suffix.
    dpi : float, optional
        PNG resolution (default :data:`PNG_DPI`).
    formats : sequence of {"png", "pdf"}
    """
    plt = pyplot()
    base.parent.mkdir(parents=True, exist_ok=True)
    out = []
    for ext in formats:
        path = base.with_suffix("." + ext)
        fig.savefig(path, metadata=_METADATA[ext], dpi=dpi or PNG_DPI)
        out.append(str(path))
    plt.close(fig)
    return out


def panel_positions(conds) -> list[tuple[int, int]]:
    """(row, column) of each condition of ``conds`` (in its order).

    Up to :data:`MAX_COLUMNS` adapter offsets: the baseline alone in the top
    row, then one row per lag and one column per offset.  More offsets: all
    panels in order (baseline, then by lag and offset), wrapped into rows of
    :data:`WRAP_COLUMNS`.
    """
    base = conds["is_baseline"].to_numpy(bool)
    adapted = conds[~base]
    offsets = np.sort(adapted["adapter_offset_deg"].unique())
    lags = np.sort(adapted["lag"].unique())
    if len(offsets) <= MAX_COLUMNS:
        top = int(base.any())
        return [(0, 0) if b else (int(np.searchsorted(lags, lag)) + top,
                                  int(np.searchsorted(offsets, off)))
                for b, lag, off in zip(base, conds["lag"], conds["adapter_offset_deg"])]
    order = np.lexsort((conds["adapter_offset_deg"].to_numpy(float), conds["lag"].fillna(-1).to_numpy(float),
                        ~base))
    pos = [(0, 0)] * len(conds)
    for k, i in enumerate(order):
        pos[i] = divmod(k, WRAP_COLUMNS)
    return pos


def _title(row) -> str:
    if row["is_baseline"]:
        return "baseline (no adapter)"
    return f"adapter {row['adapter_offset_deg']:+.4g}°, lag {int(row['lag'])}"


def _binned(x, y):
    """Proportions at each level, or in up to 10 equal-count bins if levels are many."""
    order = np.argsort(x, kind="mergesort")
    x, y = x[order], y[order]
    ux = np.unique(x)
    if ux.size <= 12:
        idx = np.searchsorted(ux, x)
    else:
        edges = np.quantile(x, np.linspace(0, 1, 11))
        idx = np.clip(np.searchsorted(edges, x, side="right") - 1, 0, 9)
    n = np.bincount(idx)
    keep = n > 0
    return ((np.bincount(idx, weights=x)[keep] / n[keep]),
            (np.bincount(idx, weights=y)[keep] / n[keep]), n[keep])


def _condition_colours(conds) -> list[str]:
    lags = np.sort(conds.loc[~conds["is_baseline"], "lag"].unique())
    return [_INK if b else _lag_colour(int(np.searchsorted(lags, lag)))
            for b, lag in zip(conds["is_baseline"], conds["lag"])]


def psychometric_figure(a):
    """Psychometric function per condition for one observer (see module doc)."""
    from .psychometric import probability_cw
    conds, fit, boot, trials = a.conditions, a.fit, a.boot, a.trials
    lo_x, hi_x = trials["test_offset_deg"].min(), trials["test_offset_deg"].max()
    pad = 0.05 * max(hi_x - lo_x, 1.0)
    grid = np.linspace(lo_x - pad, hi_x + pad, 64)
    base = np.flatnonzero(conds["is_baseline"].to_numpy())
    parts = ["dots: answers, area = trials", "line: fit"]
    if boot is not None:
        parts.append("band: 95% bootstrap")
    if base.size and len(conds) > 1:
        parts.append("dashed grey: baseline fit")
    parts.append("dotted: PSE")
    canvas = PanelGrid(panel_positions(conds), (grid[0], grid[-1]), (-0.03, 1.03),
                       f"Observer {a.observer}: psychometric functions ({'; '.join(parts)})",
                       "test offset (deg, + = clockwise)", "proportion 'clockwise'")
    curves = probability_cw(grid[None, :], fit.pse[:, None], fit.spread[:, None], fit.lapse, fit.sigmoid)
    if boot is not None:
        bands = np.empty((2, len(conds), grid.size))
        for c0 in range(0, len(conds), 16):      # in chunks: B x 16 x 64 values at a time
            sl = slice(c0, c0 + 16)
            reps = probability_cw(grid[None, None, :], boot.pse[:, sl, None], boot.spread[:, sl, None],
                                  boot.lapse[:, None, None], fit.sigmoid)
            bands[:, sl] = np.quantile(reps, [0.025, 0.975], axis=0)
    trial_code = trials["condition"].map({c: i for i, c in enumerate(conds["condition"])}).to_numpy()
    x_all = trials["test_offset_deg"].to_numpy(float)
    y_all = trials["response_cw"].to_numpy(float)
    colours = _condition_colours(conds)
    for i, row in enumerate(conds.itertuples(index=False)):
        colour = colours[i]
        canvas.hline(i, 0.5, _FAINT, 0.4)
        if base.size and not row.is_baseline:
            canvas.line(i, grid, curves[base[0]], _FAINT, 0.8, "dashed")
        if boot is not None:
            canvas.band(i, grid, bands[0, i], bands[1, i], colour)
        canvas.line(i, grid, curves[i], colour, 1.2)
        canvas.vline(i, fit.pse[i], colour, 0.6, "dotted")
        sel = trial_code == i
        bx, by, bn = _binned(x_all[sel], y_all[sel])
        canvas.points(i, bx, by, 5 + 45 * bn / max(bn.max(), 1), colour)
        head = "baseline (no adapter)" if row.is_baseline else \
            f"adapter {row.adapter_offset_deg:+.4g}°, lag {int(row.lag)}"
        canvas.panel_title(i, f"{head}\nPSE {fit.pse[i]:+.2f}°, {int(row.n_trials)} trials")
    return canvas.finish()


def tracks_figure(a):
    """Test offset over trials in every track, one panel per condition."""
    conds, trials, fit = a.conditions, a.trials, a.fit
    t = trials.assign(_s=trials["session"].astype(str)).sort_values(["_s", "trial"], kind="mergesort")
    y = t["test_offset_deg"].to_numpy(float)
    cw_all = t["response_cw"].to_numpy(float) == 1
    cond = t["condition"].to_numpy()
    track_all = t["track"].to_numpy()
    # one run of trials per (condition, session, track), in trial order
    run = t.groupby(["condition", "_s", "track"], sort=True).ngroup().to_numpy()
    lo, hi = float(np.nanmin(y)), float(np.nanmax(y))
    pad = 0.06 * max(hi - lo, 1.0)
    canvas = PanelGrid(panel_positions(conds), (0.5, max(int(np.bincount(run).max()), 2) + 0.5),
                       (lo - pad, hi + pad),
                       f"Observer {a.observer}: track histories (colour: track; filled: answered "
                       "'clockwise', open: 'counter-clockwise'; dashed: fitted PSE)",
                       "trial in track", "test offset (deg)")
    for i, row in enumerate(conds.itertuples(index=False)):
        in_cond = cond == row.condition
        tracks = sorted(set(track_all[in_cond]))
        for r in np.unique(run[in_cond]):       # runs sort by session, then track, as before
            sel = run == r
            colour = _LAG_COLOURS[tracks.index(track_all[sel][0]) % len(_LAG_COLOURS)]
            yy, cw = y[sel], cw_all[sel]
            n = np.arange(1, len(yy) + 1)
            canvas.line(i, n, yy, colour, 0.7)
            canvas.markers(i, n[cw], yy[cw], colour, True)
            canvas.markers(i, n[~cw], yy[~cw], colour, False)
        canvas.hline(i, fit.pse[i], _INK, 0.7, "dashed")
        canvas.panel_title(i, _title(row._asdict()))
    return canvas.finish()


def _error_bars(y, low, high):
    """Error-bar lengths from interval limits; none where a limit is missing.

    An interval that does not hold its estimate (possible for BCa limits of
    flagged, separated data) is drawn from the estimate to its far limit.
    """
    err = np.vstack([y - np.asarray(low, dtype=float), np.asarray(high, dtype=float) - y])
    return np.clip(np.nan_to_num(err, nan=0.0), 0.0, None)


def single_plot(plt, width, plot_w, plot_h, title, left=0.75, bottom=0.55, top_axis=False):
    """One plot with fixed margins (inches): room on the right for a legend, on top for a wrapped title
    (and a secondary x axis when ``top_axis``); no automatic layout pass."""
    title = wrap_title(title, width - 0.15, _STYLE["axes.titlesize"])
    top = 0.2 + 0.16 * (title.count("\n") + 1) + (0.45 if top_axis else 0.0)
    height = bottom + plot_h + top
    fig = plt.figure(figsize=(width, height))
    ax = fig.add_axes((left / width, bottom / height, plot_w / width, plot_h / height))
    fig.text(0.08 / width, 1 - 0.1 / height, title, ha="left", va="top", fontsize=_STYLE["axes.titlesize"])
    return fig, ax


def outside_legend(ax, **kw):
    """Legend to the right of the data, outside the plot."""
    ax.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), borderaxespad=0.0, fontsize=7.5, **kw)


#: Legend text of the hollow points of :func:`aftereffect_figure` (the words found are added).
NOT_ESTIMABLE_LABEL = "not estimable, no interval"
#: Added to it when a hollow point lies beyond the vertical range.
OFF_SCALE_LABEL = ";\noff scale: at the edge"


def aftereffect_figure(name: str, shifts, tuning, offsets=None, means=None, n_means: int = 0):
    """PSE shift against adapter offset, per lag, with intervals and DoG fits.

    A shift flagged with a word of :data:`fitting.flags.NOT_USABLE` (one-sided,
    not estimable, too few trials) is drawn hollow, without an interval, and
    the legend says so; the vertical range is set by the other shifts (and
    the curves), so a PSE on its fitting bound does not flatten the plot: a
    hollow point beyond it sits on the edge.  The look is that of the
    points ``compare``'s overlay leaves out of its statistics.

    Parameters
    ----------
    name : str
        Observer ID or ``"group"``.
    shifts : DataFrame
        ``aftereffect`` table (``lag, adapter_offset_deg, pse_shift_deg, ci_low, ci_high``,
        optionally ``flags``).
    tuning : DataFrame
        ``tuning`` table; a lag's DoG curve is drawn when it has a row.
    offsets : ignored
        Kept for callers of the earlier signature.
    means : DataFrame, optional
        For the group: the points its curves are fitted to (``lag,
        adapter_offset_deg, mean_shift_deg``: the equal-weight mean of the
        ``n_means`` observers the curves use), drawn as crosses beside the
        random-effects estimates, which can differ from them.
    n_means : int
        How many observers ``means`` average.
    """
    plt = pyplot()
    lags = np.sort(shifts["lag"].dropna().unique())
    flags = shifts["flags"] if "flags" in shifts else pd.Series("", index=shifts.index, dtype=object)
    kept = pd.Series(usable(flags), index=shifts.index)
    estimates = shifts[kept]
    has_ci = bool(np.isfinite(estimates[["ci_low", "ci_high"]].to_numpy(float)).any()) if len(estimates) else False
    has_line = any(len(tuning[tuning["lag"] == lag]) for lag in lags)
    what = ["points: " + ("estimates with 95% intervals" if has_ci else "estimates")] if len(estimates) else []
    if not kept.all():
        what.append("hollow: not estimable")
    if has_line:
        what.append("lines: fitted tuning curve")
    who = "Group" if name == "group" else "Observer " + str(name)
    with plt.rc_context(_STYLE):
        fig, ax = single_plot(plt, 8.4, 5.2, 3.6, f"{who}: direction after-effect ({'; '.join(what)})")
        span = float(np.abs(shifts["adapter_offset_deg"]).max()) if len(shifts) else 90.0
        grid = np.linspace(-1.08 * span, 1.08 * span, 200)
        nudge = 0.012 * span
        crossed = False
        drawn = [estimates[["pse_shift_deg", "ci_low", "ci_high"]].to_numpy(float).ravel()]
        hollow = []
        for i, lag in enumerate(lags):
            s = shifts[shifts["lag"] == lag]
            used = kept[s.index].to_numpy()
            colour = _lag_colour(i)
            x = s["adapter_offset_deg"].to_numpy(float) + (i - (len(lags) - 1) / 2) * nudge
            y = s["pse_shift_deg"].to_numpy(float)
            err = _error_bars(y[used], s["ci_low"][used], s["ci_high"][used])
            ax.errorbar(x[used], y[used], yerr=err if has_ci else None, fmt="o", ms=4, color=colour,
                        elinewidth=0.9, capsize=2, label=_lag_label(lag))
            if not used.all():
                hollow.append((x[~used], y[~used], colour))
            t = tuning[tuning["lag"] == lag]
            m = means[means["lag"] == lag] if means is not None and len(t) else ()
            if len(m):
                ax.plot(m["adapter_offset_deg"].to_numpy(float) + (i - (len(lags) - 1) / 2) * nudge,
                        m["mean_shift_deg"].to_numpy(float), "x", ms=4.5, mew=1.0, color=colour)
                drawn.append(m["mean_shift_deg"].to_numpy(float))
                crossed = True
            if len(t):
                curve = dog(grid, float(t["amplitude_deg"].iloc[0]), float(t["peak_offset_deg"].iloc[0]))
                ax.plot(grid, curve, color=colour, lw=1.2)
                drawn.append(curve)
        if hollow:
            _hollow_points(ax, hollow, np.concatenate(drawn), flags[~kept])
        if crossed:     # one legend entry, in no lag's colour
            ax.plot([], [], "x", ms=4.5, mew=1.0, color="0.35",
                    label=f"mean of the {n_means} observers\nthe lines are fitted to")
        ax.axhline(0, color=_FAINT, lw=0.7)
        ax.axvline(0, color=_FAINT, lw=0.7)
        ax.set_xlabel("adapter offset from reference (deg, + = clockwise)")
        ax.set_ylabel("PSE shift from baseline (deg, + = clockwise)")
        outside_legend(ax)
        if len(estimates):
            ax.text(1.02, 0.0, "repulsion: the shift has\nthe sign of the adapter offset", ha="left",
                    va="bottom", transform=ax.transAxes, color=_FAINT, fontsize=7)
    return fig


def _hollow_points(ax, hollow, drawn, flags) -> None:
    """Draw the not-estimable shifts ``(x, y, colour)`` hollow, inside the range of ``drawn``
    (the estimates, their limits and the curves; the hollow points' own when there is none), with a
    legend entry naming the flags."""
    ys = np.concatenate([y for _, y, _ in hollow])
    drawn = drawn[np.isfinite(drawn)]
    scale = drawn if drawn.size else ys[np.isfinite(ys)]
    lo, hi = (float(scale.min()), float(scale.max())) if scale.size else (-1.0, 1.0)
    pad = 0.08 * max(hi - lo, 1.0)
    lo, hi = min(lo, 0.0) - pad, max(hi, 0.0) + pad        # zero, where the baseline lies, stays in view
    for x, y, colour in hollow:
        ax.plot(x, np.clip(y, lo, hi), "o", ms=4.5, mfc="white", mec=colour, mew=1.1, ls="none")
    words = sorted({w for f in flags for w in str(f).split() if w in NOT_USABLE}, key=NOT_USABLE.index)
    beyond = bool(((ys < lo) | (ys > hi)).any())
    label = f"{NOT_ESTIMABLE_LABEL}\n({', '.join(words)}{OFF_SCALE_LABEL if beyond else ''})"
    ax.errorbar([], [], fmt="o", ms=4.5, mfc="white", mec=_INK, mew=1.1, color=_INK, label=label)  # listed last
    ax.set_ylim(lo, hi)


def decay_band(reps, lags) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """95 % band of the decay ``A0 exp(-lag / tau)`` from bootstrap replicates, at whole lags.

    The band is taken at every whole lag from 0 to the largest: a test can
    only come after a whole number of periods, and between lags replicates
    with a very short tau (on its lower bound) would pull the pointwise band
    down just after lag 0.  :func:`_between_lags` joins the values for drawing.

    Returns
    -------
    k, low, high : ndarray
    """
    k = np.arange(0, int(np.max(lags)) + 1, dtype=float)
    curves = reps[:, :1] * np.exp(-k[None, :] / reps[:, 2:3])
    low, high = np.quantile(curves, [0.025, 0.975], axis=0)
    return k, low, high


def _between_lags(k, values, fine):
    """Values at whole lags joined like the decay they bound: geometrically where both ends
    are positive, linearly otherwise (monotone between lags either way)."""
    i = np.clip(np.searchsorted(k, fine, side="right") - 1, 0, len(k) - 2)
    a, b = values[i], values[i + 1]
    t = (fine - k[i]) / (k[i + 1] - k[i])
    geometric = (a > 0) & (b > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        geo = a * np.power(np.where(geometric, b / a, 1.0), t)
    return np.where(geometric, geo, a + t * (b - a))


def decay_figure(name: str, tuning, detail, reps=None, period_s: float = float("nan")):
    """Tuning amplitude per lag with intervals, and the fitted decay."""
    plt = pyplot()
    lags = tuning["lag"].to_numpy(float)
    amp = tuning["amplitude_deg"].to_numpy(float)
    has_fit = detail is not None and len(detail) > 0
    has_band = has_fit and reps is not None
    who = "Group" if name == "group" else "Observer " + str(name)
    title = f"{who}: decay of the after-effect"
    if has_fit:
        d = detail.iloc[0]
        tau_txt = f"tau = {d['decay_periods']:.2f} periods"
        if np.isfinite(d.get("decay_ci_low", np.nan)):
            tau_txt += f" [{d['decay_ci_low']:.2f}, {d['decay_ci_high']:.2f}]"
        if np.isfinite(period_s):
            tau_txt += f" = {d['decay_periods'] * period_s:.2f} s"
        title += "; " + tau_txt
    with plt.rc_context(_STYLE):
        fig, ax = single_plot(plt, 7.6, 4.4, 3.0, title, top_axis=bool(np.isfinite(period_s)))
        err = _error_bars(amp, tuning["amplitude_ci_low"], tuning["amplitude_ci_high"])
        ax.errorbar(lags, amp, yerr=err, fmt="o", color=_INK,
                    capsize=2.5, ms=4.5, elinewidth=0.9, label="tuning amplitude per lag\n(95% interval)")
        if has_fit:
            k = np.linspace(0, max(lags.max(), 1) * 1.05, 120)
            ax.plot(k, d["amplitude0_deg"] * np.exp(-k / d["decay_periods"]), color=_LAG_COLOURS[1],
                    lw=1.3, label="joint fit A0 exp(-lag / tau)")
            if has_band:
                kb, low, high = decay_band(reps, lags)
                if kb.size >= 2:
                    fine = np.linspace(0, kb[-1], 60 * int(kb[-1]) + 1)
                    ax.fill_between(fine, _between_lags(kb, low, fine), _between_lags(kb, high, fine),
                                    color=_LAG_COLOURS[1], alpha=0.15, lw=0,
                                    label="95% bootstrap band of the fit\n(at whole lags)")
        ax.axhline(0, color=_FAINT, lw=0.7)
        ax.set_xlabel("lag (intervening motion periods)")
        ax.set_ylabel("peak PSE shift (deg)")
        ax.set_xticks(lags)
        if np.isfinite(period_s):
            sec = ax.secondary_xaxis("top", functions=(lambda k: k * period_s, lambda s: s / period_s))
            sec.set_xlabel("time between adapter and test (s)", fontsize=7.5)
        outside_legend(ax)
    return fig


# --------------------------------------------------------------------------
# drawing all figures, in parallel processes
# --------------------------------------------------------------------------

_TASKS: list = []      # filled before the worker processes fork; they read it by index


def _plain_worker_signals() -> None:
    """Forked drawing workers: Ctrl-C is the parent's to report; SIGTERM or the parent's end ends them.

    They inherit the command's own handlers otherwise (a SIGTERM handler that
    raises would print a traceback when the pool shuts its workers down).
    """
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    follow_parent()


def observer_figure_tasks(a) -> list:
    """``(draw, args, stem)`` of each figure of one observer's analysis."""
    tag = safe_name(a.observer)
    tasks = [(psychometric_figure, (a,), f"psychometric_{tag}"), (tracks_figure, (a,), f"tracks_{tag}")]
    if len(a.aftereffect):
        tasks.append((aftereffect_figure, (a.observer, a.aftereffect, a.tuning), f"aftereffect_{tag}"))
    if len(a.tuning) >= 2 and len(a.decay_detail):
        tasks.append((decay_figure, (a.observer, a.tuning, a.decay_detail, a.curves.get("decay"),
                                     a.period_s), f"decay_{tag}"))
    return tasks


def figure_tasks(analyses, group) -> list:
    """``(draw, args, stem)`` of every figure of a fit: each observer's, then the group's."""
    tasks = [t for a in analyses for t in observer_figure_tasks(a)]
    if group is not None and len(group["aftereffect"]):
        curves = group.get("curves") or {}
        tasks.append((aftereffect_figure, ("group", group["aftereffect"], group["tuning"], None, curves.get("means"),
                                           len(curves.get("observers", ()))),
                      "aftereffect_group"))
        if len(group["tuning"]) >= 2 and len(group["decay_detail"]):
            tasks.append((decay_figure, ("group", group["tuning"], group["decay_detail"], None,
                                         group.get("period_s", float("nan"))), "decay_group"))
    return tasks


def _dpi(draw) -> int:
    return GRID_DPI if draw in (psychometric_figure, tracks_figure) else PNG_DPI


def _run_task(i: int, out_dir: str, formats) -> list[str]:
    draw, args, stem = _TASKS[i]
    return save(draw(*args), Path(out_dir) / stem, dpi=_dpi(draw), formats=formats)


def draw_to_memory(task) -> dict[str, bytes]:
    """Draw one figure into memory: ``task = (draw, args, stem, formats)`` -> ``{file name: bytes}``.

    The bytes are those :func:`save` would write; runs in any process, so a
    ``fit`` can draw an observer's figures while other observers are still
    being fitted, and write them only when everything is done.
    """
    import io

    draw, args, stem, formats = task
    fig = draw(*args)
    files = {}
    for ext in formats:
        buffer = io.BytesIO()
        fig.savefig(buffer, format=ext, metadata=_METADATA[ext], dpi=_dpi(draw))
        files[f"{stem}.{ext}"] = buffer.getvalue()
    pyplot().close(fig)
    return files


def available_cores() -> int:
    """Cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:          # not on Linux
        return os.cpu_count() or 1


def check_formats(formats) -> tuple[str, ...]:
    """``formats`` as a tuple, checked to be among :data:`FORMATS` (ValueError otherwise)."""
    formats = tuple(formats)
    if not formats or any(f not in FORMATS for f in formats):
        raise ValueError(f"figure formats must be among {FORMATS}, not {formats}")
    return formats


def make_figures(analyses, group: dict | None, out_dir: Path, formats=FIT_FORMATS,
                 jobs: int | None = None, drawn: dict[str, bytes] | None = None) -> list[str]:
    """Draw and save every figure; returns the written paths (in a fixed order).

    Parameters
    ----------
    analyses : list of ObserverAnalysis
    group : dict or None
        Group tables (``aftereffect``, ``tuning``, ``decay_detail``, ``period_s``).
    out_dir : Path
    formats : sequence of {"png", "pdf"}
        File types (default PNG only, at print resolution; PDF copies add
        about a fifth to a 25-condition ``fit``).
    jobs : int, optional
        Worker processes (default: the available cores).  Figures are
        independent, so they are drawn in parallel; 1 draws them here.
    drawn : dict of str -> bytes, optional
        Files already drawn (by :func:`draw_to_memory`), by file name: they
        are written as they are and only the others are drawn.
    """
    global _TASKS
    out_dir = Path(out_dir)
    formats = check_formats(formats)
    drawn = drawn or {}
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise InputError(str(out_dir), "--out", f"cannot create the figure folder ({e.strerror})") from None
    _TASKS = figure_tasks(analyses, group)
    names = [[f"{stem}.{ext}" for ext in formats] for _, _, stem in _TASKS]
    ready = [i for i in range(len(_TASKS)) if all(n in drawn for n in names[i])]
    todo = [i for i in range(len(_TASKS)) if i not in set(ready)]
    # the big grids first, so that the small figures fill in behind them
    todo.sort(key=lambda i: _TASKS[i][0] not in (psychometric_figure, tracks_figure))
    jobs = min(jobs or available_cores(), len(todo))
    try:
        for i in ready:
            for name in names[i]:
                (out_dir / name).write_bytes(drawn[name])
        if todo:
            pyplot()            # imported once here, inherited by the worker processes
        if jobs > 1 and hasattr(os, "fork"):
            import multiprocessing
            with ExitStack() as stack:
                with children_shielded():       # a Ctrl-C as they fork is the parent's alone
                    pool = stack.enter_context(
                        multiprocessing.get_context("fork").Pool(jobs, initializer=_plain_worker_signals))
                pool.starmap(_run_task, [(i, str(out_dir), formats) for i in todo], chunksize=1)
        else:
            for i in todo:
                _run_task(i, str(out_dir), formats)
    except OSError as e:        # e.g. a full disk: the tables are not written either
        raise InputError(str(e.filename or out_dir), "--out", f"cannot write a figure ({e.strerror})") from None
    finally:
        _TASKS = []
    return [str(out_dir / n) for row in names for n in row]
