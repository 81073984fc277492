"""``aftershift recover``: does the fit recover known parameters, and do its intervals hold them?

A simulation study (:mod:`runner.study`) on the user's own protocol and
observer model: ``runs`` sessions of a simulated observer whose parameters
are known, each fitted like real data. For every design (the protocol as
written, or each combination of ``--vary`` values) and every quantity (DoG
amplitude and peak offset per lag, decay, baseline PSE) it reports

* the true value, the mean estimate, the bias (mean − truth) and the RMSE,
* the median width of the 95 % intervals,
* the coverage, the share of intervals that hold the true value, with its
  95 % Wilson interval (and its Monte Carlo standard error √(p(1 − p)/n));
  a 95 % interval should cover about 95 % of the time, and a coverage whose
  Wilson interval lies below 95 % is named on the console.

It writes ``recovery.csv`` (that table), ``recovery_runs.csv`` (every run)
and ``recovery.png`` / ``.pdf``: every run's interval, sorted by estimate,
against the true value.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from fitting.figures import save
from fitting.tables import write_csv
from runner.observers import ObserverModel
from runner.protocol import Protocol
from runner.study import (QUANTITIES, UNITS, StudySettings, check_designs, console_table, coverage_limits,
                          coverage_se, design_columns, expand_designs, failed_run_notes, missing_interval_notes,
                          run_study, study_command)

STATISTICS = ["truth", "mean_estimate", "bias", "rmse", "median_ci_width", "coverage", "coverage_se", "coverage_low",
              "coverage_high", "runs_with_estimate", "runs_with_interval", "runs_without_trials", "runs"]
#: Designs drawn in the figure (one row of panels each).
FIGURE_DESIGNS = 6


@dataclass
class RecoveryResult:
    """What :func:`recover` measured.

    Attributes
    ----------
    designs : pandas.DataFrame
        One row per design (:func:`runner.study.design_columns`).
    table : pandas.DataFrame
        One row per design, quantity and lag: the design columns and
        :data:`STATISTICS`. Bias and RMSE use the runs with an estimate,
        coverage and width the runs with an interval.
    runs : pandas.DataFrame
        Every run's estimate, interval, true value and whether it covered, and the
        session's usable trials (``usable_trials``; 0: a failed run, not fitted).
    protocol_title : str
    notes : list of str
    """

    designs: pd.DataFrame
    table: pd.DataFrame
    runs: pd.DataFrame
    protocol_title: str
    notes: list = field(default_factory=list)

    def summary_lines(self) -> list[str]:
        """Lines for the console."""
        n_runs = int(self.runs["replicate"].nunique()) if len(self.runs) else 0
        lines = [f"recovery for {self.protocol_title!r}: {n_runs} simulated sessions per design, each fitted; "
                 "95 % intervals"]
        shown = console_table(self.table, ("truth", "mean_estimate", "bias", "rmse", "median_ci_width"), 1)
        shown = shown.rename(columns={"mean_estimate": "mean", "median_ci_width": "CI width"})
        cols = ["quantity", "lag", "unit", "truth", "mean", "bias", "rmse", "CI width", "coverage", "intervals"]
        for label, part in shown.groupby("label", sort=False):
            lines.append("")
            lines.append(f"design: {label}")
            lines += ["  " + line for line in part[cols].to_string(index=False).splitlines()]
        low = self.table[self.table["coverage_high"] < 0.95]
        if len(low):
            lines.append("")
            lines.append("coverage below 95 % (its 95 % Wilson interval lies below): "
                         + "; ".join(f"{r['label']}: {r['quantity']}"
                                     + ("" if pd.isna(r["lag"]) else f" lag {int(r['lag'])}")
                                     for _, r in low.iterrows()))
        lines += [f"note: {n}" for n in self.notes]
        return lines

    def write(self, out_dir: str | Path) -> list[Path]:
        """Write ``recovery.csv``, ``recovery_runs.csv`` and the figure; return the paths."""
        out = Path(out_dir)
        out.mkdir(parents=True, exist_ok=True)
        files = [out / "recovery.csv", out / "recovery_runs.csv"]
        write_csv(self.table, files[0])
        write_csv(self.runs, files[1])
        return files + self.figure(out / "recovery")

    def figure(self, stem: Path) -> list[Path]:
        """Each run's interval (sorted by estimate; grey: holds the truth, red: misses it) and the true
        value (line), for amplitude and peak offset at the first lag, decay and baseline PSE; PNG and PDF."""
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        runs = self.runs
        first_lag = runs["lag"].min()
        panels = [(q, first_lag if q in ("amplitude", "peak_offset") else None) for q in QUANTITIES
                  if (runs["quantity"] == q).any()]
        designs = list(self.designs["design"])[:FIGURE_DESIGNS]
        fig, axes = plt.subplots(len(designs), len(panels), figsize=(3.4 * len(panels), 2.6 * len(designs) + 0.6),
                                 squeeze=False)
        for row, d in enumerate(designs):
            label = self.designs.loc[self.designs["design"] == d, "label"].iloc[0]
            for col, (quantity, lag) in enumerate(panels):
                ax = axes[row][col]
                part = runs[(runs["design"] == d) & (runs["quantity"] == quantity)]
                if lag is not None:
                    part = part[part["lag"] == lag]
                part = part[part["estimate"].notna()].sort_values("estimate")
                x = np.arange(len(part))
                has = part["half_width"].notna().to_numpy()
                hit = (part["covered"] == 1).to_numpy()
                for mask, colour in ((has & hit, "0.6"), (has & ~hit, "tab:red")):
                    ax.vlines(x[mask], part["ci_low"].to_numpy()[mask], part["ci_high"].to_numpy()[mask],
                              color=colour, linewidth=1)
                ax.plot(x, part["estimate"], ".", color="k", markersize=3)
                if len(part):
                    ax.axhline(part["truth"].iloc[0], color="tab:blue", linewidth=1.2)
                    finite = part[["ci_low", "ci_high", "estimate"]].to_numpy(float)
                    lo, hi = np.nanpercentile(finite, [2, 98])
                    pad = 0.1 * (hi - lo) if hi > lo else 1.0
                    ax.set_ylim(lo - pad, hi + pad)
                title = quantity.replace("_", " ") + ("" if lag is None else f", lag {int(lag)}")
                cov = self.table[(self.table["design"] == d) & (self.table["quantity"] == quantity)]
                if lag is not None:
                    cov = cov[cov["lag"] == lag]
                if len(cov) and math.isfinite(cov["coverage"].iloc[0]):
                    title += f"\ncoverage {100 * cov['coverage'].iloc[0]:.0f} %"
                ax.set_title(title, fontsize=9)
                ax.set_xticks([])
                ax.set_ylabel(f"{UNITS[quantity]}" + (f"\n{label}" if col == 0 else ""), fontsize=8)
                if row == len(designs) - 1:
                    ax.set_xlabel("runs, sorted by estimate", fontsize=8)
        fig.suptitle(f"{self.protocol_title}: 95 % intervals against the true value (blue); red: missed",
                     fontsize=10)
        fig.tight_layout()
        return [Path(f) for f in save(fig, stem, dpi=130)]


def recover(protocol: Protocol, model: ObserverModel, settings: StudySettings, out_dir: str | Path,
            vary: list[str] | None = None) -> RecoveryResult:
    """Run the recovery study and summarise it.

    Parameters
    ----------
    protocol : Protocol
    model : ObserverModel
        The simulated observer (``spread_between_observers`` is set to 0).
    settings : StudySettings
    out_dir : str or Path
        Study folder (finished tasks in ``out_dir/tasks``).
    vary : list of str, optional
        ``FIELD=[values]`` texts (:func:`runner.study.expand_designs`).

    Returns
    -------
    RecoveryResult

    Raises
    ------
    InputError
    runner.study.StudyInterrupted
    """
    settings.check()
    designs = expand_designs(protocol, model, vary)
    notes = check_designs(designs)
    per_run = run_study(designs, settings, out_dir, "recovery")
    notes += per_run.attrs["notes"]
    columns = design_columns(designs)
    notes += failed_run_notes(per_run, columns) + missing_interval_notes(per_run, columns)
    return RecoveryResult(columns, summarise(per_run, columns), columns.merge(per_run, on="design"),
                          protocol.title, notes)


def summarise(per_run: pd.DataFrame, columns: pd.DataFrame) -> pd.DataFrame:
    """Bias, RMSE, interval width and coverage per design, quantity and lag."""
    rows = []
    for (d, quantity, lag), part in per_run.groupby(["design", "quantity", "lag"], dropna=False, sort=False):
        est = part["estimate"].dropna()
        true = float(part["truth"].iloc[0])
        err = est - true
        covered = part["covered"].dropna()
        coverage = float(covered.mean()) if len(covered) else float("nan")
        rows.append({"design": d, "quantity": quantity, "lag": lag, "truth": true,
                     "mean_estimate": float(est.mean()) if len(est) else float("nan"),
                     "bias": float(err.mean()) if len(est) else float("nan"),
                     "rmse": float(np.sqrt((err**2).mean())) if len(est) else float("nan"),
                     "median_ci_width": float((2 * part["half_width"]).median()),
                     "coverage": coverage, "coverage_se": coverage_se(coverage, len(covered)),
                     **dict(zip(("coverage_low", "coverage_high"), coverage_limits(coverage, len(covered)))),
                     "runs_with_estimate": len(est), "runs_with_interval": len(covered),
                     "runs_without_trials": int((part["usable_trials"] == 0).sum()), "runs": len(part)})
    table = columns.merge(pd.DataFrame(rows), on="design")
    return table[list(columns.columns) + ["quantity", "lag"] + STATISTICS]


def recover_command(protocol_path: str, model_path: str | None, out_dir: str, settings: StudySettings,
                    vary: list[str] | None = None) -> int:
    """The ``aftershift recover`` command: load, study, print, write; returns the exit code.

    Exit code and errors as :func:`runner.study.study_command` (0; 130 after Ctrl-C; InputError).
    """
    return study_command(protocol_path, model_path, out_dir,
                         lambda protocol, model: recover(protocol, model, settings, out_dir, vary), "recover")
