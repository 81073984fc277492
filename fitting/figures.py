"""Figures of a fit, in PNG and PDF (matplotlib, Agg backend).

Per observer:

* ``psychometric_<obs>``: one panel per condition (rows = lags, columns =
  adapter offsets, the baseline on top): proportion of clockwise answers at
  each level (dot area = trials), the fitted function, its 95 % band from the
  bootstrap replicates, and the baseline's fitted function for comparison;
* ``tracks_<obs>``: the test offset trial by trial in every track of every
  session (colour = track; filled = "clockwise" answer, open =
  "counter-clockwise");
* ``aftereffect_<obs>``: PSE shift against adapter offset, one colour per
  lag, with intervals and the fitted DoG curve;
* ``decay_<obs>``: DoG amplitude per lag with intervals and the fitted
  exponential decay.

With several observers, ``aftereffect_group`` and ``decay_group`` as well.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from .aftereffect import dog

_INK = "#222222"
_FAINT = "#9a9a9a"
_LAG_COLOURS = ["#1b4965", "#c8553d", "#5a8f29", "#8e5572", "#d4a017", "#3a7ca5", "#6b4226"]
_STYLE = {
    "font.size": 8.5, "axes.titlesize": 8.5, "axes.labelsize": 8.5,
    "axes.edgecolor": _INK, "axes.labelcolor": _INK, "xtick.color": _INK, "ytick.color": _INK,
    "axes.spines.top": False, "axes.spines.right": False, "axes.linewidth": 0.7,
    "xtick.major.width": 0.6, "ytick.major.width": 0.6, "legend.frameon": False,
    "figure.dpi": 100, "savefig.dpi": 150, "pdf.fonttype": 42,
}


def _plt():
    import matplotlib
    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    return plt


def safe_name(text: str) -> str:
    """File-name-safe form of an observer ID."""
    return re.sub(r"[^A-Za-z0-9_-]+", "_", str(text)) or "observer"


def _lag_colour(i: int) -> str:
    return _LAG_COLOURS[i % len(_LAG_COLOURS)]


def _lag_label(lag: float) -> str:
    lag = int(lag)
    if lag == 0:
        return "lag 0 (test right after adapter)"
    return f"lag {lag} ({lag} intervening period{'s' if lag != 1 else ''})"


def save(fig, base: Path, dpi: float | None = None) -> list[str]:
    """Save ``fig`` as ``base.png`` and ``base.pdf`` (no time stamps, so reruns give equal files); return the paths."""
    plt = _plt()
    base.parent.mkdir(parents=True, exist_ok=True)
    out = []
    for ext, meta in (("png", {"Software": None}), ("pdf", {"CreationDate": None, "Producer": None})):
        path = base.with_suffix("." + ext)
        fig.savefig(path, metadata=meta, dpi=dpi)
        out.append(str(path))
    plt.close(fig)
    return out


def _panel_grid(conds):
    """(row, col) of each condition: baseline at (0, 0), then lag rows, offset columns."""
    adapted = conds[~conds["is_baseline"]]
    offsets = np.sort(adapted["adapter_offset_deg"].unique())
    lags = np.sort(adapted["lag"].unique())
    has_base = bool(conds["is_baseline"].any())
    ncols = max(len(offsets), 3)
    pos = {}
    for i, row in conds.iterrows():
        if row["is_baseline"]:
            pos[i] = (0, 0)
        else:
            pos[i] = (int(np.searchsorted(lags, row["lag"])) + int(has_base),
                      int(np.searchsorted(offsets, row["adapter_offset_deg"])))
    nrows = len(lags) + int(has_base)
    return pos, max(nrows, 1), ncols


def _grid_axes(plt, nrows, ncols, panel_h, sharex):
    """A grid of panels with fixed margins (in inches; much faster than automatic layout)."""
    panel_w, left, right, top, bottom, gap_w, gap_h = 1.9, 0.62, 0.12, 0.85, 0.5, 0.3, 0.62
    width = left + right + ncols * panel_w + (ncols - 1) * gap_w
    height = top + bottom + nrows * panel_h + (nrows - 1) * gap_h
    fig, axes = plt.subplots(nrows, ncols, figsize=(width, height), sharex=sharex, sharey=True,
                             squeeze=False)
    fig.subplots_adjust(left=left / width, right=1 - right / width, top=1 - top / height,
                        bottom=bottom / height, wspace=gap_w / panel_w, hspace=gap_h / panel_h)
    return fig, axes


def _title(row) -> str:
    if row["is_baseline"]:
        return "baseline (no adapter)"
    return f"adapter {row['adapter_offset_deg']:+g}°, lag {int(row['lag'])}"


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


def psychometric_figure(a):
    """Psychometric function per condition for one observer (see module doc)."""
    plt = _plt()
    from .psychometric import probability_cw
    conds, fit, boot, trials = a.conditions, a.fit, a.boot, a.trials
    pos, nrows, ncols = _panel_grid(conds)
    lo_x, hi_x = trials["test_offset_deg"].min(), trials["test_offset_deg"].max()
    pad = 0.05 * max(hi_x - lo_x, 1.0)
    grid = np.linspace(lo_x - pad, hi_x + pad, 150)
    with plt.rc_context(_STYLE):
        fig, axes = _grid_axes(plt, nrows, ncols, 1.55, sharex=True)
        used = set(pos.values())
        for r in range(nrows):
            for c in range(ncols):
                if (r, c) not in used:
                    axes[r, c].set_visible(False)
        base = np.flatnonzero(conds["is_baseline"].to_numpy())
        base_curve = probability_cw(grid, fit.pse[base[0]], fit.spread[base[0]], fit.lapse,
                                    fit.sigmoid) if base.size else None
        for i, row in conds.iterrows():
            ax = axes[pos[i]]
            colour = _INK if row["is_baseline"] else _lag_colour(int(np.searchsorted(
                np.sort(conds.loc[~conds["is_baseline"], "lag"].unique()), row["lag"])))
            sel = trials["condition"] == row["condition"]
            bx, by, bn = _binned(trials.loc[sel, "test_offset_deg"].to_numpy(float),
                                 trials.loc[sel, "response_cw"].to_numpy(float))
            if base_curve is not None and not row["is_baseline"]:
                ax.plot(grid, base_curve, color=_FAINT, lw=0.9, ls="--")
            if boot is not None:
                curves = probability_cw(grid[None, :], boot.pse[:, [i]], boot.spread[:, [i]],
                                        boot.lapse[:, None], fit.sigmoid)
                band = np.quantile(curves, [0.025, 0.975], axis=0)
                ax.fill_between(grid, band[0], band[1], color=colour, alpha=0.18, lw=0)
            ax.plot(grid, probability_cw(grid, fit.pse[i], fit.spread[i], fit.lapse, fit.sigmoid),
                    color=colour, lw=1.3)
            ax.scatter(bx, by, s=6 + 60 * bn / max(bn.max(), 1), color=colour, alpha=0.85,
                       edgecolor="white", linewidth=0.4, zorder=3)
            ax.axvline(fit.pse[i], color=colour, lw=0.6, ls=":")
            ax.axhline(0.5, color=_FAINT, lw=0.4)
            ax.set_title(_title(row) + f"\nPSE {fit.pse[i]:+.2f}°, {int(row['n_trials'])} trials", pad=3)
            ax.set_ylim(-0.03, 1.03)
        for ax in axes[-1]:
            ax.set_xlabel("test offset (deg, + = clockwise)")
        for r in range(nrows):
            axes[r, 0].set_ylabel("proportion 'clockwise'")
        for r in range(nrows):
            for c in range(ncols):
                if axes[r, c].get_visible():
                    axes[r, c].tick_params(labelbottom=True)
        fig.suptitle(f"Observer {a.observer}: psychometric functions "
                     "(dots: answers, area = trials; line: fit; band: 95% bootstrap; "
                     "dashed grey: baseline fit)", x=0.01, ha="left", fontsize=9)
    return fig


def tracks_figure(a):
    """Test offset over trials in every track, one panel per condition."""
    plt = _plt()
    conds, trials, fit = a.conditions, a.trials, a.fit
    pos, nrows, ncols = _panel_grid(conds)
    with plt.rc_context(_STYLE):
        fig, axes = _grid_axes(plt, nrows, ncols, 1.5, sharex=False)
        used = set(pos.values())
        for r in range(nrows):
            for c in range(ncols):
                if (r, c) not in used:
                    axes[r, c].set_visible(False)
        for i, row in conds.iterrows():
            ax = axes[pos[i]]
            sel = trials[trials["condition"] == row["condition"]].copy()
            sel["_s"] = sel["session"].astype(str)
            sel = sel.sort_values(["_s", "trial"], kind="mergesort")
            tracks = sorted(sel["track"].unique())
            for (session, track), tr in sel.groupby(["_s", "track"], sort=True):
                colour = _LAG_COLOURS[tracks.index(track) % len(_LAG_COLOURS)]
                n = np.arange(1, len(tr) + 1)
                y = tr["test_offset_deg"].to_numpy(float)
                cw = tr["response_cw"].to_numpy(float) == 1
                ax.plot(n, y, color=colour, lw=0.8)
                ax.scatter(n[cw], y[cw], s=9, color=colour, zorder=3)
                ax.scatter(n[~cw], y[~cw], s=9, facecolor="white", edgecolor=colour, lw=0.7, zorder=3)
            ax.axhline(fit.pse[i], color=_INK, lw=0.7, ls="--")
            ax.set_title(_title(row), pad=3)
        for r in range(nrows):
            axes[r, 0].set_ylabel("test offset (deg)")
        for r in range(nrows):
            for c in range(ncols):
                if axes[r, c].get_visible():
                    axes[r, c].set_xlabel("trial in track")
        fig.suptitle(f"Observer {a.observer}: track histories (filled: answered 'clockwise', "
                     "open: 'counter-clockwise'; dashed: fitted PSE)", x=0.01, ha="left", fontsize=9)
    return fig


def _error_bars(y, low, high):
    """Error-bar lengths from interval limits; none where a limit is missing.

    An interval that does not hold its estimate (possible for BCa limits of
    flagged, separated data) is drawn from the estimate to its far limit.
    """
    err = np.vstack([y - np.asarray(low, dtype=float), np.asarray(high, dtype=float) - y])
    return np.clip(np.nan_to_num(err, nan=0.0), 0.0, None)


def aftereffect_figure(name: str, shifts, tuning, offsets=None):
    """PSE shift against adapter offset, per lag, with intervals and DoG fits."""
    plt = _plt()
    with plt.rc_context(_STYLE):
        fig, ax = plt.subplots(figsize=(6.4, 4.0))
        lags = np.sort(shifts["lag"].dropna().unique())
        span = float(np.abs(shifts["adapter_offset_deg"]).max()) if len(shifts) else 90.0
        grid = np.linspace(-1.08 * span, 1.08 * span, 300)
        nudge = 0.012 * span
        for i, lag in enumerate(lags):
            s = shifts[shifts["lag"] == lag]
            colour = _lag_colour(i)
            x = s["adapter_offset_deg"].to_numpy(float) + (i - (len(lags) - 1) / 2) * nudge
            y = s["pse_shift_deg"].to_numpy(float)
            err = _error_bars(y, s["ci_low"], s["ci_high"])
            ax.errorbar(x, y, yerr=err, fmt="o", ms=4, color=colour,
                        elinewidth=0.9, capsize=2, label=_lag_label(lag))
            t = tuning[tuning["lag"] == lag]
            if len(t):
                ax.plot(grid, dog(grid, float(t["amplitude_deg"].iloc[0]),
                                  float(t["peak_offset_deg"].iloc[0])), color=colour, lw=1.2)
        ax.axhline(0, color=_FAINT, lw=0.7)
        ax.axvline(0, color=_FAINT, lw=0.7)
        ax.set_xlabel("adapter offset from reference (deg, + = clockwise)")
        ax.set_ylabel("PSE shift from baseline (deg, + = clockwise)")
        ax.set_title(f"{'Group' if name == 'group' else 'Observer ' + name}: direction after-effect "
                     "(points: 95% intervals; lines: fitted tuning curve)", loc="left")
        ax.legend(loc="best", fontsize=7.5)
        ax.text(0.99, 0.02, "repulsion: shift has the sign of the adapter offset", ha="right",
                va="bottom", transform=ax.transAxes, color=_FAINT, fontsize=7)
        fig.tight_layout()
    return fig


def decay_figure(name: str, tuning, detail, reps=None, period_s: float = float("nan")):
    """Tuning amplitude per lag with intervals, and the fitted decay."""
    plt = _plt()
    with plt.rc_context(_STYLE):
        fig, ax = plt.subplots(figsize=(5.2, 3.6))
        lags = tuning["lag"].to_numpy(float)
        amp = tuning["amplitude_deg"].to_numpy(float)
        err = _error_bars(amp, tuning["amplitude_ci_low"], tuning["amplitude_ci_high"])
        ax.errorbar(lags, amp, yerr=err, fmt="o", color=_INK,
                    capsize=2.5, ms=4.5, elinewidth=0.9, label="tuning amplitude per lag (95% interval)")
        title = f"{'Group' if name == 'group' else 'Observer ' + name}: decay of the after-effect"
        if detail is not None and len(detail):
            d = detail.iloc[0]
            k = np.linspace(0, max(lags.max(), 1) * 1.05, 200)
            ax.plot(k, d["amplitude0_deg"] * np.exp(-k / d["decay_periods"]), color=_LAG_COLOURS[1],
                    lw=1.3, label="joint fit  A0 exp(-lag / tau)")
            if reps is not None:
                curves = reps[:, :1] * np.exp(-k[None, :] / reps[:, 2:3])
                band = np.quantile(curves, [0.025, 0.975], axis=0)
                ax.fill_between(k, band[0], band[1], color=_LAG_COLOURS[1], alpha=0.15, lw=0)
            tau_txt = f"tau = {d['decay_periods']:.2f} periods"
            if np.isfinite(d.get("ci_low", d.get("decay_ci_low", np.nan))):
                tau_txt += f" [{d['decay_ci_low']:.2f}, {d['decay_ci_high']:.2f}]"
            if np.isfinite(period_s):
                tau_txt += f" = {d['decay_periods'] * period_s:.2f} s"
            title += "\n" + tau_txt
        ax.axhline(0, color=_FAINT, lw=0.7)
        ax.set_xlabel("lag (intervening motion periods)")
        ax.set_ylabel("peak PSE shift (deg)")
        ax.set_xticks(lags)
        if np.isfinite(period_s):
            sec = ax.secondary_xaxis("top", functions=(lambda k: k * period_s, lambda s: s / period_s))
            sec.set_xlabel("time between adapter and test (s)")
        ax.set_title(title, loc="left")
        ax.legend(loc="upper right", fontsize=7.5)
        fig.tight_layout()
    return fig


def make_figures(analyses, group: dict | None, out_dir: Path) -> list[str]:
    """Draw and save every figure; returns the written paths."""
    out_dir = Path(out_dir)
    files: list[str] = []
    for a in analyses:
        tag = safe_name(a.observer)
        files += save(psychometric_figure(a), out_dir / f"psychometric_{tag}")
        files += save(tracks_figure(a), out_dir / f"tracks_{tag}")
        if len(a.aftereffect):
            files += save(aftereffect_figure(a.observer, a.aftereffect, a.tuning),
                          out_dir / f"aftereffect_{tag}")
        if len(a.tuning) >= 2 and len(a.decay_detail):
            files += save(decay_figure(a.observer, a.tuning, a.decay_detail, a.curves.get("decay"),
                                       a.period_s), out_dir / f"decay_{tag}")
    if group is not None and len(group["aftereffect"]):
        files += save(aftereffect_figure("group", group["aftereffect"], group["tuning"]),
                      out_dir / "aftereffect_group")
        if len(group["tuning"]) >= 2 and len(group["decay_detail"]):
            files += save(decay_figure("group", group["tuning"], group["decay_detail"], None,
                                       group.get("period_s", float("nan"))),
                          out_dir / "decay_group")
    return files
