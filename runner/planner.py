"""Design planning: how narrow the intervals of a protocol will be, and whether they hold the truth.

:func:`plan_design` answers "how certain will my results be, how many trials
do I need, and which procedure gives more for them?" for a protocol as
written and for variations of it. It runs a simulation study
(:mod:`runner.study`): ``runs`` sessions of one simulated observer with known
parameters per design, through the real session loop and the real fitter,
handed out to local worker processes or a Dask cluster. Designs are every
combination of ``--vary`` values (for example ``design.trials_per_track`` ×
``procedure.method``); when the trials per track are not varied, the
protocol's value is scaled by the trial factors (0.5, 1, 2 by default).

For each design it reports, for the DoG amplitude and peak offset at each
lag, the decay and the baseline PSE, the 95 % interval half-width over runs
(median, mean, SD, quartiles) and the coverage: the share of intervals that
hold the simulated observer's true value, with its Monte Carlo standard
error. With a target half-width of the amplitude it adds the trials per
condition needed for it, for each design family (the designs that differ
only in trials per track) and lag.

Why the median as well as the mean: with few trials some sessions give an
interval that runs to a parameter bound of the curve fit (a peak offset of
90°, a decay of 1000 periods, an amplitude in the hundreds of degrees when
the peak offset collapses), and one such session moves the mean more than
all the others together. The median is what a typical session gives; the
trials needed for a target are interpolated through the medians
(:func:`trials_needed`: a local power law between measured designs,
half-width ∝ 1/√N, the asymptotic rate of a maximum-likelihood estimate,
beyond them).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from fitting.errors import InputError
from fitting.figures import save
from fitting.tables import write_csv
from runner.observers import ObserverModel
from runner.overview import MAX_HOURS, MAX_TRIALS, size_problem
from runner.protocol import MAX_TRIALS_PER_TRACK, Protocol
from runner.study import (QUANTITIES, TRIALS_FIELD, UNITS, Design, StudySettings, check_designs, console_table,
                          coverage_limits, coverage_se, design_columns, expand_designs, failed_run_notes,
                          missing_interval_notes, run_study, study_command)

#: Smallest --target-half-width: a hundredth of a degree is far finer than direction judgements are
#: resolved (common practice, no source); smaller targets only overflow the trial counts.
MIN_TARGET_HALF_WIDTH_DEG = 0.01
STATISTICS = ["median_half_width", "mean_half_width", "sd_half_width", "q25_half_width", "q75_half_width",
              "coverage", "coverage_se", "coverage_low", "coverage_high", "runs_with_interval", "runs_without_trials",
              "runs"]


# ---------------------------------------------------------------- designs


def trials_step(protocol: Protocol) -> int:
    """The step of valid ``design.trials_per_track`` values (the rules the protocol schema enforces).

    Constant stimuli: a multiple of the number of levels; a stream: tracks ×
    trials a multiple of the stream's directions; both rules together for both.
    """
    step = len(protocol.procedure.levels_deg) if protocol.procedure.method == "constant" else 1
    if protocol.stream is not None:
        directions = protocol.stream.n_directions
        step = math.lcm(step, directions // math.gcd(directions, protocol.design.tracks_per_condition))
    return step


def scaled_trials(protocol: Protocol, factor: float) -> int:
    """``design.trials_per_track`` times ``factor``, rounded to the nearest valid value (at least one step)."""
    step = trials_step(protocol)
    return step * max(1, int(round(protocol.design.trials_per_track * factor / step)))


def trials_needed(trials, half_widths, target: float) -> float:
    """Trials per condition at which the half-width reaches ``target``.

    Between two measured designs that bracket the target, the half-width is
    interpolated linearly in log N – log h (a local power law); beyond the
    measured designs it is extrapolated from the nearest one with
    half-width ∝ 1/√N. Where the measured half-widths cross the target more
    than once (noise, or intervals stuck at a bound in small designs), the
    crossing at the most trials is used.

    Parameters
    ----------
    trials, half_widths : array_like
        Measured designs and their half-widths; nan and non-positive
        half-widths are ignored.
    target : float
        Target half-width (> 0).

    Returns
    -------
    float
        Trials per condition (not rounded); nan when no point is usable.
    """
    n = np.asarray(trials, dtype=float)
    h = np.asarray(half_widths, dtype=float)
    ok = np.isfinite(h) & (h > 0)
    n, h = n[ok], h[ok]
    if n.size == 0:
        return float("nan")
    order = np.argsort(n)
    n, h = n[order], h[order]
    above = np.flatnonzero(h > target)
    if above.size == 0:  # every design is already narrow enough: extrapolate down from the smallest
        return float(n[0] * (h[0] / target) ** 2)
    i = int(above[-1])
    if i == n.size - 1:  # still too wide at the largest design: extrapolate up with 1/sqrt(N)
        return float(n[i] * (h[i] / target) ** 2)
    slope = (math.log(h[i + 1]) - math.log(h[i])) / (math.log(n[i + 1]) - math.log(n[i]))
    return float(math.exp(math.log(n[i]) + (math.log(target) - math.log(h[i])) / slope))


def loglog_slope(trials, half_widths) -> float:
    """Slope of log half-width against log trials between the two largest usable designs.

    −½ under the 1/√N law; a flatter or positive slope says the smaller
    design's intervals were limited by a bound. nan with fewer than two
    usable designs.
    """
    n = np.asarray(trials, dtype=float)
    h = np.asarray(half_widths, dtype=float)
    ok = np.isfinite(h) & (h > 0)
    n, h = n[ok], h[ok]
    if n.size < 2:
        return float("nan")
    order = np.argsort(n)[-2:]
    return float(np.diff(np.log(h[order]))[0] / np.diff(np.log(n[order]))[0])


def with_trial_factors(designs: list[Design], factors) -> tuple[list[Design], list[str]]:
    """Each design at ``trials_per_track`` × each factor (kept valid); designs that coincide run once.

    Returns
    -------
    designs : list of Design
        With ``design.trials_per_track`` among their settings.
    notes : list of str
        Factors that gave the same trial count as an earlier one.
    """
    out, notes = [], []
    for d in designs:
        seen: dict[int, float] = {}
        for f in factors:
            n = scaled_trials(d.protocol, f)
            if n in seen:
                notes.append(f"{d.label}: factor {f:g} gives the same {n} trials per track as factor "
                             f"{seen[n]:g}; run once")
                continue
            seen[n] = f
            design = d.protocol.design.model_copy(update={"trials_per_track": n})
            scaled = d.protocol.model_copy(update={"design": design})
            too_large = size_problem(scaled)
            if too_large:
                notes.append(f"{d.label}: factor {f:g} gives {too_large}; not simulated")
                continue
            out.append(replace(d, protocol=scaled, settings={TRIALS_FIELD: n, **d.settings}))
    return out, notes


# ---------------------------------------------------------------- result


@dataclass
class PlanResult:
    """What :func:`plan_design` measured.

    Attributes
    ----------
    designs : pandas.DataFrame
        One row per design (:func:`runner.study.design_columns`): ``design``,
        ``label``, the varied fields, ``trials_per_track``,
        ``trials_per_condition``; ``family`` labels designs that differ only
        in trials per track.
    table : pandas.DataFrame
        One row per design, quantity and lag: the design columns and
        :data:`STATISTICS` (half-widths over runs, coverage of the true value
        among runs with an interval and its Monte Carlo SE).
    runs : pandas.DataFrame
        Every run's estimate, interval, true value, half-width and whether
        the interval holds the true value.
    target_half_width : float or None
        Target half-width of the amplitude (deg).
    needed : pandas.DataFrame
        Per family and lag: trials per condition for the target median
        amplitude half-width, exact (``trials_per_condition``) and as a valid
        design (``trials_per_track``); ``basis``: ``interpolated`` between
        simulated designs, ``extrapolated`` beyond the largest (by the factor
        ``beyond_largest``), or the ``smallest design with intervals``, which
        already reaches the target (never fewer trials); and the measured
        log–log slope (−½ under the 1/√N law). Empty without a target.
    protocol_title : str
    notes : list of str
    """

    designs: pd.DataFrame
    table: pd.DataFrame
    runs: pd.DataFrame
    target_half_width: float | None
    needed: pd.DataFrame
    protocol_title: str
    notes: list = field(default_factory=list)

    def half_width(self, quantity: str, lag: int | None = None, statistic: str = "median",
                   family: str | None = None) -> pd.Series:
        """Half-width against trials per condition for one quantity (and lag, and design family).

        ``statistic`` is "median" or "mean" (over runs); ``family`` defaults to the first.
        """
        t = self.table[(self.table["quantity"] == quantity)
                       & (self.table["family"] == (family or self.table["family"].iloc[0]))]
        if lag is not None:
            t = t[t["lag"] == lag]
        return t.set_index("trials_per_condition")[f"{statistic}_half_width"].sort_index()

    def summary_lines(self) -> list[str]:
        """Lines for the console."""
        n_runs = int(self.runs["replicate"].nunique()) if len(self.runs) else 0
        count = f"{len(self.designs)} design{'s' if len(self.designs) != 1 else ''}"
        lines = [f"plan for {self.protocol_title!r}: {count}, {n_runs} simulated sessions "
                 "each; 95 % interval half-widths over sessions, and coverage of the true value"]
        shown = console_table(self.table, ("median_half_width", "mean_half_width", "sd_half_width"), 0)
        shown = shown.rename(columns={"trials_per_condition": "trials/cond", "median_half_width": "median",
                                      "mean_half_width": "mean", "sd_half_width": "sd"})
        cols = ["quantity", "lag", "trials/cond", "median", "mean", "sd", "unit", "coverage", "intervals"]
        for family, part in shown.groupby("family", sort=False):
            lines.append("")
            lines.append(f"designs: {family}")
            lines += ["  " + line for line in part[cols].to_string(index=False).splitlines()]
        if self.target_half_width is not None:
            lines.append("")
            lines.append(f"for an amplitude half-width of {self.target_half_width:g} deg "
                         f"(median half-widths interpolated, ∝ 1/√N beyond the designs):")
            lines += [f"  {r['family']}, lag {int(r['lag'])}: {_recommendation(r)}" for _, r in self.needed.iterrows()]
            if self.needed.empty:
                lines.append("  none: no design has a tuning amplitude (it needs 3 or more adapter offsets)")
        lines += [f"note: {n}" for n in self.notes]
        return lines

    def write(self, out_dir: str | Path) -> list[Path]:
        """Write ``plan.csv``, ``plan_runs.csv``, ``plan_needed.csv`` (with a target) and the figure.

        Returns
        -------
        list of Path
            The files written.
        """
        out = Path(out_dir)
        out.mkdir(parents=True, exist_ok=True)
        files = [out / "plan.csv", out / "plan_runs.csv"]
        write_csv(self.table, files[0])
        write_csv(self.runs, files[1])
        if self.target_half_width is not None:
            files.append(out / "plan_needed.csv")
            write_csv(self.needed, files[-1])
        files += self.figure(out / "plan")
        return files

    def figure(self, stem: Path) -> list[Path]:
        """Median half-width (bars: quartiles) and coverage (bars: 95 % Wilson interval) against trials
        per condition, one column per quantity, one line per design family and lag; PNG and PDF."""
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        from matplotlib.ticker import FormatStrFormatter, LogLocator, NullFormatter

        usable = self.table[np.isfinite(self.table["median_half_width"]) & (self.table["median_half_width"] > 0)]
        present = [q for q in QUANTITIES if (usable["quantity"] == q).any()]
        if not present:
            return []
        fig, axes = plt.subplots(2, len(present), figsize=(3.8 * len(present), 6.6), squeeze=False,
                                 sharex="col")
        several = usable["family"].nunique() > 1
        for col, quantity in enumerate(present):
            top, bottom = axes[0][col], axes[1][col]
            t = usable[usable["quantity"] == quantity]
            for (family, lag), part in t.groupby(["family", t["lag"].fillna(-1)], sort=False):
                part = part.sort_values("trials_per_condition")
                label = ", ".join(([family] if several else []) + ([f"lag {int(lag)}"] if lag >= 0 else [])) or None
                mid = part["median_half_width"]
                bars = np.vstack([mid - part["q25_half_width"], part["q75_half_width"] - mid])
                line = top.errorbar(part["trials_per_condition"], mid, yerr=bars, marker="o", capsize=3,
                                    label=label)
                bottom.errorbar(part["trials_per_condition"], 100 * part["coverage"],
                                yerr=100 * np.vstack([part["coverage"] - part["coverage_low"],
                                                      part["coverage_high"] - part["coverage"]]),
                                marker="o", capsize=3, color=line[0].get_color())
            if quantity == "amplitude" and self.target_half_width is not None:
                top.axhline(self.target_half_width, color="0.4", linestyle="--", linewidth=1, label="target")
            bottom.axhline(95, color="0.4", linestyle="--", linewidth=1)
            top.set_xscale("log")
            top.set_yscale("log")
            bottom.set_xticks(sorted(t["trials_per_condition"].unique()))
            for ax in (top, bottom):
                ax.xaxis.set_minor_formatter(NullFormatter())
                ax.xaxis.set_major_formatter(FormatStrFormatter("%g"))
            top.yaxis.set_major_formatter(FormatStrFormatter("%g"))
            top.yaxis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
            top.yaxis.set_minor_formatter(NullFormatter())
            top.set_ylabel(f"95 % CI half-width ({UNITS[quantity]})")
            top.set_title(quantity.replace("_", " "))
            bottom.set_ylim(min(50.0, float(np.nanmin(100 * t["coverage"])) - 5 if t["coverage"].notna().any()
                                else 50.0), 102)
            bottom.set_ylabel("coverage of the true value (%)")
            bottom.set_xlabel("trials per condition")
            if top.get_legend_handles_labels()[0]:
                top.legend(fontsize=7, frameon=False)
        fig.suptitle(f"{self.protocol_title}: expected interval half-width and coverage (dashed: 95 %)",
                     fontsize=10)
        fig.tight_layout()
        return [Path(f) for f in save(fig, stem, dpi=150)]


def _recommendation(r: pd.Series) -> str:
    """One row of :attr:`PlanResult.needed` in words: how many trials, and how far the simulated designs back it."""
    if not math.isfinite(r["trials_per_condition"]):
        return "no tested design gave an interval in at least half its sessions; cannot say"
    n, per_track = r["trials_per_condition"], int(r["trials_per_track"])
    slope = (f"log-log slope of the two largest designs {r['loglog_slope']:.2f}; 1/sqrt(N) gives -0.5"
             if math.isfinite(r["loglog_slope"]) else "one design with intervals")
    if r["basis"] == SMALLEST:
        return (f"the smallest design with intervals, {n:.0f} trials per condition (trials_per_track = "
                f"{per_track}), reaches it already; fewer trials were not shown to give intervals at all, so "
                "none are recommended")
    if per_track > MAX_TRIALS_PER_TRACK:
        reach = (f"; not reachable: a track holds at most {MAX_TRIALS_PER_TRACK:,} trials (and a session "
                 f"{MAX_TRIALS:,} trials, {MAX_HOURS:g} hours), so no protocol can hold it: choose a larger target")
    else:
        reach = ""
    if r["basis"] == EXTRAPOLATED:
        factor = r["beyond_largest"]
        times = f"{factor:,.0f}" if factor >= 10 else f"{factor:.2g}"
        return (f"about {n:,.0f} trials per condition -> trials_per_track = {per_track:,}, extrapolated {times}x "
                f"beyond the largest design simulated ({n / factor:,.0f} trials per condition) with half-width "
                f"∝ 1/√N ({slope}){reach or '; simulate a design near it before relying on it'}")
    return f"about {n:,.0f} trials per condition -> trials_per_track = {per_track:,} ({slope}){reach}"


# ---------------------------------------------------------------- planning


def plan_design(
    protocol: Protocol,
    model: ObserverModel,
    settings: StudySettings,
    out_dir: str | Path,
    vary: list[str] | None = None,
    trial_factors=(0.5, 1, 2),
    target_half_width: float | None = None,
) -> PlanResult:
    """Expected interval half-widths and coverage of a protocol's designs, and the trials a target needs.

    Parameters
    ----------
    protocol : Protocol
        The protocol as written.
    model : ObserverModel
        The simulated observer; ``spread_between_observers`` is set to 0.
    settings : StudySettings
        Runs per design, seed, bootstrap replicates, lapse option, and where
        the tasks run (local cores or ``scheduler``).
    out_dir : str or Path
        The study folder: finished tasks are kept in ``out_dir/tasks``.
    vary : list of str, optional
        ``FIELD=[values]`` texts (:func:`runner.study.expand_designs`).
    trial_factors : sequence of float
        Multipliers of ``design.trials_per_track`` when it is not varied;
        factors that round to the same trial count run once.
    target_half_width : float, optional
        Target 95 % half-width of the DoG amplitude (deg).

    Returns
    -------
    PlanResult

    Raises
    ------
    InputError
        Bad arguments or designs.
    runner.study.StudyInterrupted
        Ctrl-C (finished tasks are kept).
    """
    if not trial_factors or any(not (isinstance(f, (int, float)) and math.isfinite(f) and f > 0)
                                for f in trial_factors):
        raise InputError("argument", "trial_factors", f"expected positive numbers, got {trial_factors!r}")
    if target_half_width is not None and not (math.isfinite(target_half_width)
                                              and MIN_TARGET_HALF_WIDTH_DEG <= target_half_width):
        raise InputError("argument", "--target-half-width", f"expected at least {MIN_TARGET_HALF_WIDTH_DEG:g} deg, "
                         f"got {target_half_width!r}")
    settings.check()
    designs = expand_designs(protocol, model, vary)
    notes = []
    if not any(d.settings.get(TRIALS_FIELD) is not None for d in designs):
        designs, notes = with_trial_factors(designs, trial_factors)
    notes += check_designs(designs)
    per_run = run_study(designs, settings, out_dir, "planning")
    notes += per_run.attrs["notes"]
    columns = design_columns(designs)
    columns["family"] = [Design(d.protocol, d.model, {k: v for k, v in d.settings.items() if k != TRIALS_FIELD}).label
                         for d in designs]
    table = _summarise(per_run, columns)
    notes += failed_run_notes(per_run, columns) + missing_interval_notes(per_run, columns)
    runs = columns.merge(per_run, on="design")
    needed = _needed(table, target_half_width, designs) if target_half_width is not None else pd.DataFrame()
    return PlanResult(columns, table, runs, target_half_width, needed, protocol.title, notes)


def _summarise(per_run: pd.DataFrame, columns: pd.DataFrame) -> pd.DataFrame:
    g = per_run.assign(failed=per_run["usable_trials"] == 0).groupby(["design", "quantity", "lag"], dropna=False,
                                                                     sort=False)
    hw = g["half_width"]
    table = pd.DataFrame({
        "median_half_width": hw.median(),
        "mean_half_width": hw.mean(),
        "sd_half_width": hw.std(ddof=1),
        "q25_half_width": hw.quantile(0.25),
        "q75_half_width": hw.quantile(0.75),
        "coverage": g["covered"].mean(),
        "runs_with_interval": hw.count(),
        "runs_without_trials": g["failed"].sum(),
        "runs": g.size(),
    }).reset_index()
    table["coverage_se"] = [coverage_se(c, n) for c, n in zip(table["coverage"], table["runs_with_interval"])]
    table["coverage_low"], table["coverage_high"] = zip(*[coverage_limits(c, n) for c, n in
                                                          zip(table["coverage"], table["runs_with_interval"])])
    table = columns.merge(table, on="design")
    table["_q"] = pd.Categorical(table["quantity"], QUANTITIES, ordered=True)
    table["_f"] = pd.Categorical(table["family"], list(dict.fromkeys(columns["family"])), ordered=True)
    table = table.sort_values(["_f", "_q", "lag", "trials_per_condition"], kind="stable")
    keys = [c for c in columns.columns] + ["quantity", "lag"]
    return table[keys + STATISTICS].reset_index(drop=True)


def _trials_per_track_for(protocol: Protocol, per_track: float) -> int:
    """The smallest valid ``trials_per_track`` >= ``per_track``."""
    step = trials_step(protocol)
    return step * max(1, math.ceil(per_track / step - 1e-9))


#: ``basis`` of a recommendation: between two simulated designs, beyond the largest, or the smallest with intervals.
INTERPOLATED, EXTRAPOLATED, SMALLEST = "interpolated", "extrapolated", "smallest design with intervals"


def _needed(table: pd.DataFrame, target: float, designs: list[Design]) -> pd.DataFrame:
    """Trials per condition for the target median amplitude half-width, per design family and lag.

    Only designs where at least half the sessions gave an interval count
    (the median of the others is the median of a lucky few), and the
    recommendation is never fewer trials than the smallest of them: a
    smaller design may give no interval at all (a 12-trial design once gave
    none in 30 sessions while the 1/√N law from 24 trials recommended 1
    trial).  A recommendation beyond the largest design is
    ``extrapolated``, and ``beyond_largest`` says by what factor.
    """
    out = []
    amp = table[table["quantity"] == "amplitude"]
    for (family, lag), part in amp.groupby(["family", "lag"], sort=False):
        protocol = designs[int(part["design"].iloc[0])].protocol
        part = part[2 * part["runs_with_interval"] >= part["runs"]]
        n = trials_needed(part["trials_per_condition"], part["median_half_width"], target)
        measured = part.loc[np.isfinite(part["median_half_width"]) & (part["median_half_width"] > 0),
                            "trials_per_condition"]
        basis, beyond = "", float("nan")
        if math.isfinite(n):
            smallest, largest = float(measured.min()), float(measured.max())
            basis = SMALLEST if n <= smallest else EXTRAPOLATED if n > largest else INTERPOLATED
            n, beyond = max(n, smallest), n / largest
        per_track = (_trials_per_track_for(protocol, n / protocol.design.tracks_per_condition)
                     if math.isfinite(n) else float("nan"))
        out.append({"family": family, "lag": int(lag), "target_half_width_deg": target,
                    "trials_per_condition": n, "trials_per_track": per_track, "basis": basis,
                    "beyond_largest": beyond,
                    "loglog_slope": loglog_slope(part["trials_per_condition"], part["median_half_width"])})
    return pd.DataFrame(out, columns=NEEDED_COLUMNS)     # with its header when no design has an amplitude


#: The columns of ``plan_needed.csv``.
NEEDED_COLUMNS = ["family", "lag", "target_half_width_deg", "trials_per_condition", "trials_per_track", "basis",
                  "beyond_largest", "loglog_slope"]


def plan_command(protocol_path: str, model_path: str | None, out_dir: str, settings: StudySettings,
                 vary: list[str] | None = None, target_half_width: float | None = None) -> int:
    """The ``aftershift plan`` command: load, plan, print, write; returns the exit code.

    Parameters
    ----------
    protocol_path : str
        Protocol file.
    model_path : str or None
        Observer model file (built-in defaults when None).
    out_dir : str
        Study folder: ``plan.csv``, ``plan_runs.csv``, ``plan_needed.csv``,
        ``plan.png`` / ``plan.pdf``, and finished tasks in ``tasks/``.
    settings : StudySettings
    vary : list of str, optional
        ``FIELD=[values]`` texts.
    target_half_width : float or None
        Target 95 % half-width of the amplitude (deg).

    Exit code and errors as :func:`runner.study.study_command` (0; 130 after Ctrl-C; InputError).
    """
    return study_command(protocol_path, model_path, out_dir, lambda protocol, model: plan_design(
        protocol, model, settings, out_dir, vary, target_half_width=target_half_width), "plan")
