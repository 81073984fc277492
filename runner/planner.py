"""Design planning: how narrow the intervals of a protocol will be, by simulation.

:func:`plan_design` answers "how certain will my results be, and how many
trials do I need?" for a protocol as written. For each trial factor it
scales ``design.trials_per_track``, runs ``runs`` sessions of one simulated
observer through the real session loop (:func:`runner.launch.simulate`),
fits each with the real fitter (:func:`fitting.fit_logs`) and records the
95 % interval half-width of

* the DoG amplitude at each lag and the peak offset at each lag
  (``tuning.csv``),
* the decay in periods (``decay.csv``, with two or more lags),
* the baseline PSE (``pse.csv``), a quantity with a closed-form check.

The runs differ only by noise: the observer model is used with
``spread_between_observers = 0`` and every run has its own seed. The mean
and the median half-width per factor, and the trials per condition needed
for a target half-width of the amplitude, form a :class:`PlanResult`, which
writes a table and a figure. :func:`plan_command` is the ``aftershift plan``
command.

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
import signal
import tempfile
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from fitting import fit_logs
from fitting.errors import InputError
from fitting.figures import save
from fitting.progress import ProgressBar
from fitting.outputs import output_set
from fitting.tables import write_csv
from runner.launch import derive_seed, simulate
from runner.observers import ObserverModel, load_model
from runner.protocol import Protocol, parse_protocol, read_protocol_text

QUANTITIES = ("amplitude", "peak_offset", "decay", "baseline_pse")
UNITS = {"amplitude": "deg", "peak_offset": "deg", "decay": "periods", "baseline_pse": "deg"}
TABLE_COLUMNS = ["quantity", "lag", "factor", "trials_per_track", "trials_per_condition",
                 "mean_half_width", "sd_half_width", "median_half_width", "q25_half_width", "q75_half_width",
                 "runs_with_interval", "runs"]


# ---------------------------------------------------------------- designs


def scaled_trials(protocol: Protocol, factor: float) -> int:
    """``design.trials_per_track`` times ``factor``, kept valid.

    Rounded to the nearest whole number (at least 1); for constant stimuli
    to the nearest multiple of the number of levels (at least one multiple),
    the rule the protocol schema enforces.
    """
    n = protocol.design.trials_per_track * factor
    if protocol.procedure.method == "constant":
        levels = len(protocol.procedure.levels_deg)
        return levels * max(1, int(round(n / levels)))
    return max(1, int(round(n)))


def scaled_protocol(protocol: Protocol, trials_per_track: int) -> Protocol:
    """A copy of ``protocol`` with another ``design.trials_per_track``."""
    design = protocol.design.model_copy(update={"trials_per_track": int(trials_per_track)})
    return protocol.model_copy(update={"design": design})


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


# ---------------------------------------------------------------- one run


def _half(low, high) -> float:
    low, high = float(low), float(high)
    return (high - low) / 2 if math.isfinite(low) and math.isfinite(high) else float("nan")


def run_once(protocol: Protocol, protocol_text: str, protocol_path: str, model: ObserverModel, seed: int,
             n_boot: int, lapse) -> list[dict]:
    """Simulate and fit one session; return one row per quantity (and lag).

    The session and its fit live in a temporary folder that is removed
    afterwards. Half-widths are nan where the fitter gave no interval.
    """
    with tempfile.TemporaryDirectory(prefix="aftershift-plan-") as tmp:
        paths = simulate(protocol, protocol_path, protocol_text, Path(tmp) / "logs", model, 1, seed,
                         progress=False)
        report = fit_logs([str(p) for p in paths], Path(tmp) / "fit", n_boot=n_boot, seed=seed, lapse=lapse,
                          progress=False, figures=False)
    rows = []
    lags = sorted(protocol.design.lags)
    tuning = report.tuning[report.tuning["observer"] != "group"].set_index("lag")
    for lag in lags:
        row = tuning.loc[lag] if lag in tuning.index else None
        for quantity, lo, hi in (("amplitude", "amplitude_ci_low", "amplitude_ci_high"),
                                 ("peak_offset", "peak_offset_ci_low", "peak_offset_ci_high")):
            hw = _half(row[lo], row[hi]) if row is not None else float("nan")
            rows.append({"quantity": quantity, "lag": lag, "half_width": hw})
    if len(lags) > 1:
        d = report.decay[report.decay["observer"] != "group"]
        hw = _half(d["ci_low"].iloc[0], d["ci_high"].iloc[0]) if len(d) else float("nan")
        rows.append({"quantity": "decay", "lag": np.nan, "half_width": hw})
    base = report.pse[report.pse["condition"] == "baseline"]
    hw = _half(base["pse_ci_low"].iloc[0], base["pse_ci_high"].iloc[0]) if len(base) else float("nan")
    rows.append({"quantity": "baseline_pse", "lag": np.nan, "half_width": hw})
    return rows


def _run_job(job: dict) -> list[dict]:
    rows = run_once(job["protocol"], job["text"], job["path"], job["model"], job["seed"], job["n_boot"],
                    job["lapse"])
    keep = {k: job[k] for k in ("factor", "trials_per_track", "trials_per_condition", "run")}
    return [{**keep, **r} for r in rows]


# ---------------------------------------------------------------- result


@dataclass
class PlanResult:
    """What :func:`plan_design` measured.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per quantity, lag and trial factor (:data:`TABLE_COLUMNS`):
        mean, SD, median and quartiles over runs of the 95 % interval
        half-width, and how many runs gave an interval.
    runs : pandas.DataFrame
        Every run's half-widths (factor, trials_per_track,
        trials_per_condition, run, quantity, lag, half_width).
    target_half_width : float or None
        Target half-width of the amplitude (deg).
    needed : pandas.DataFrame
        Per lag: trials per condition for the target median amplitude half-width,
        exact (``trials_per_condition``) and as a valid design
        (``trials_per_track`` × tracks), and the measured log–log slope
        (−½ under the 1/√N law). Empty without a target.
    protocol_title : str
    notes : list of str
    """

    table: pd.DataFrame
    runs: pd.DataFrame
    target_half_width: float | None
    needed: pd.DataFrame
    protocol_title: str
    notes: list = field(default_factory=list)

    def half_width(self, quantity: str, lag: int | None = None, statistic: str = "median") -> pd.Series:
        """Half-width against trials per condition for one quantity (and lag).

        ``statistic`` is "median" or "mean" (over runs).
        """
        t = self.table[self.table["quantity"] == quantity]
        if lag is not None:
            t = t[t["lag"] == lag]
        return t.set_index("trials_per_condition")[f"{statistic}_half_width"].sort_index()

    def summary_lines(self) -> list[str]:
        """Lines for the console."""
        n_runs = int(self.runs["run"].nunique()) if len(self.runs) else 0
        lines = [f"plan for {self.protocol_title!r}: {n_runs} simulated sessions per design, "
                 "95 % interval half-widths over sessions"]
        shown = self.table.copy()
        shown["lag"] = shown["lag"].map(lambda v: "" if pd.isna(v) else str(int(v)))
        shown["unit"] = shown["quantity"].map(UNITS)
        for c in ("median_half_width", "mean_half_width", "sd_half_width"):
            shown[c] = shown[c].map(lambda v: f"{v:.3g}")
        shown["intervals"] = shown["runs_with_interval"].astype(str) + "/" + shown["runs"].astype(str)
        shown = shown.rename(columns={"trials_per_condition": "trials/condition", "median_half_width": "median",
                                      "mean_half_width": "mean", "sd_half_width": "sd"})
        cols = ["quantity", "lag", "trials/condition", "median", "mean", "sd", "unit", "intervals"]
        lines += shown[cols].to_string(index=False).splitlines()
        if self.target_half_width is not None:
            lines.append("")
            lines.append(f"for an amplitude half-width of {self.target_half_width:g} deg "
                         f"(median half-widths interpolated, ∝ 1/√N beyond the designs):")
            for _, r in self.needed.iterrows():
                if math.isfinite(r["trials_per_condition"]):
                    lines.append(f"  lag {int(r['lag'])}: about {r['trials_per_condition']:.0f} trials per condition "
                                 f"-> trials_per_track = {int(r['trials_per_track'])} "
                                 f"(log-log slope of the two largest designs {r['loglog_slope']:.2f}; 1/sqrt(N) gives -0.5)")
                else:
                    lines.append(f"  lag {int(r['lag'])}: no interval at any tested design; cannot say")
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
        write_csv(self.table, files[0], TABLE_COLUMNS)
        write_csv(self.runs, files[1])
        if self.target_half_width is not None:
            files.append(out / "plan_needed.csv")
            write_csv(self.needed, files[-1])
        files += self.figure(out / "plan")
        return files

    def figure(self, stem: Path) -> list[Path]:
        """Median half-width (bars: quartiles) against trials per condition, one panel per quantity; PNG and PDF."""
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        from matplotlib.ticker import FormatStrFormatter, LogLocator, NullFormatter

        usable = self.table[np.isfinite(self.table["median_half_width"]) & (self.table["median_half_width"] > 0)]
        present = [q for q in QUANTITIES if (usable["quantity"] == q).any()]
        if not present:
            return []
        fig, axes = plt.subplots(1, len(present), figsize=(3.6 * len(present), 3.4), squeeze=False)
        for ax, quantity in zip(axes[0], present):
            t = usable[usable["quantity"] == quantity]
            for lag, part in t.groupby(t["lag"].fillna(-1), sort=True):
                part = part.sort_values("trials_per_condition")
                label = f"lag {int(lag)}" if lag >= 0 else None
                mid = part["median_half_width"]
                bars = np.vstack([mid - part["q25_half_width"], part["q75_half_width"] - mid])
                ax.errorbar(part["trials_per_condition"], mid, yerr=bars, marker="o", capsize=3, label=label)
            if quantity == "amplitude" and self.target_half_width is not None:
                ax.axhline(self.target_half_width, color="0.4", linestyle="--", linewidth=1, label="target")
            ax.set_xscale("log")
            ax.set_yscale("log")
            ax.set_xticks(sorted(t["trials_per_condition"].unique()))
            ax.xaxis.set_minor_formatter(NullFormatter())
            for axis in (ax.xaxis, ax.yaxis):
                axis.set_major_formatter(FormatStrFormatter("%g"))
            ax.yaxis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
            ax.yaxis.set_minor_formatter(NullFormatter())
            ax.set_xlabel("trials per condition")
            ax.set_ylabel(f"95 % CI half-width ({UNITS[quantity]})")
            ax.set_title(quantity.replace("_", " "))
            if ax.get_legend_handles_labels()[0]:
                ax.legend(fontsize=8, frameon=False)
        fig.suptitle(f"{self.protocol_title}: expected interval half-width", fontsize=10)
        fig.tight_layout()
        return [Path(f) for f in save(fig, stem, dpi=150)]


# ---------------------------------------------------------------- planning


def _check(runs, trial_factors, target_half_width, jobs, n_boot):
    if isinstance(runs, bool) or not isinstance(runs, int) or runs < 1:
        raise InputError("argument", "--runs", f"expected a whole number >= 1, got {runs!r}")
    if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
        raise InputError("argument", "--jobs", f"expected a whole number >= 1, got {jobs!r}")
    if isinstance(n_boot, bool) or not isinstance(n_boot, int) or n_boot < 20:
        raise InputError("argument", "n_boot", f"expected a whole number >= 20, got {n_boot!r}")
    if not trial_factors or any(not (isinstance(f, (int, float)) and math.isfinite(f) and f > 0)
                                for f in trial_factors):
        raise InputError("argument", "trial_factors", f"expected positive numbers, got {trial_factors!r}")
    if target_half_width is not None and not (math.isfinite(target_half_width) and target_half_width > 0):
        raise InputError("argument", "--target-half-width", f"expected a positive number, got {target_half_width!r}")


def plan_design(
    protocol: Protocol,
    protocol_text: str,
    protocol_path: str,
    model: ObserverModel,
    runs: int,
    seed: int,
    trial_factors=(0.5, 1, 2),
    target_half_width: float | None = None,
    jobs: int = 2,
    n_boot: int = 200,
    progress: bool = True,
    lapse="free",
) -> PlanResult:
    """Expected interval half-widths of a protocol, and the trials a target needs.

    Parameters
    ----------
    protocol : Protocol
        The protocol as written.
    protocol_text, protocol_path : str
        Its text and path (recorded in the temporary sidecars).
    model : ObserverModel
        The simulated observer; ``spread_between_observers`` is set to 0.
    runs : int
        Simulated sessions per trial factor.
    seed : int
        Run ``i`` uses the seed ``derive_seed(seed, i)`` at every factor.
    trial_factors : sequence of float
        Multipliers of ``design.trials_per_track``; factors that round to
        the same trial count are run once.
    target_half_width : float, optional
        Target 95 % half-width of the DoG amplitude (deg).
    jobs : int
        Worker processes.
    n_boot : int
        Bootstrap replicates of each fit (>= 20).
    progress : bool
        Progress bar on stderr (drawn only on a terminal).
    lapse : "free" or float
        Lapse option of the fits (as for :func:`fitting.fit_logs`).

    Returns
    -------
    PlanResult

    Raises
    ------
    InputError
        Bad arguments.
    """
    _check(runs, trial_factors, target_half_width, jobs, n_boot)
    one_observer = replace(model, spread_between_observers=0.0)
    tracks = protocol.design.tracks_per_condition
    notes, designs = [], {}
    for factor in trial_factors:
        n = scaled_trials(protocol, factor)
        if n in designs:
            notes.append(f"factor {factor:g} gives the same {n} trials per track as factor {designs[n]:g}; run once")
        else:
            designs[n] = factor
    if protocol.stream is None and len(protocol.design.adapter_offsets_deg) < 3:
        notes.append("the design has fewer than 3 adapter offsets, so no DoG tuning curve (amplitude, peak "
                     "offset, decay) can be fitted; only the baseline PSE is planned")
    if protocol.procedure.max_reversals:
        notes.append("procedure.max_reversals may stop tracks before trials_per_track; "
                     "trial counts are the designed ones")
    jobs_list = [
        {"protocol": scaled_protocol(protocol, n), "text": protocol_text, "path": protocol_path,
         "model": one_observer, "seed": derive_seed(seed, i), "n_boot": n_boot, "lapse": lapse,
         "factor": f, "trials_per_track": n, "trials_per_condition": n * tracks, "run": i}
        for n, f in sorted(designs.items()) for i in range(runs)
    ]
    rows = []
    with ProgressBar(len(jobs_list), "planning", show=None if progress else False) as bar, \
            ProcessPoolExecutor(max_workers=jobs, initializer=_leave_interrupts_to_the_parent) as pool:
        try:
            for done in as_completed([pool.submit(_run_job, j) for j in jobs_list]):
                rows += done.result()
                bar.advance()
        except BaseException:  # Ctrl-C, SIGTERM: drop the queued runs, let the running ones end
            pool.shutdown(wait=True, cancel_futures=True)
            raise
    per_run = pd.DataFrame(rows).sort_values(["trials_per_track", "run", "quantity", "lag"], kind="stable")
    per_run = per_run.reset_index(drop=True)
    table = _summarise(per_run)
    needed = _needed(table, target_half_width, protocol) if target_half_width is not None else pd.DataFrame()
    return PlanResult(table, per_run, target_half_width, needed, protocol.title, notes)


def _leave_interrupts_to_the_parent() -> None:
    """Workers ignore Ctrl-C; the parent stops the plan and reports it in one line."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _summarise(per_run: pd.DataFrame) -> pd.DataFrame:
    keys = ["quantity", "lag", "factor", "trials_per_track", "trials_per_condition"]
    g = per_run.groupby(keys, dropna=False, sort=False)["half_width"]
    table = pd.DataFrame({
        "mean_half_width": g.mean(),
        "sd_half_width": g.std(ddof=1),
        "median_half_width": g.median(),
        "q25_half_width": g.quantile(0.25),
        "q75_half_width": g.quantile(0.75),
        "runs_with_interval": g.count(),
        "runs": g.size(),
    }).reset_index()
    table["quantity"] = pd.Categorical(table["quantity"], QUANTITIES, ordered=True)
    table = table.sort_values(["quantity", "lag", "trials_per_condition"]).reset_index(drop=True)
    table["quantity"] = table["quantity"].astype(str)
    return table[TABLE_COLUMNS]


def _trials_per_track_for(protocol: Protocol, per_track: float) -> int:
    """The smallest valid ``trials_per_track`` >= ``per_track`` (constant stimuli: a multiple of the levels)."""
    step = len(protocol.procedure.levels_deg) if protocol.procedure.method == "constant" else 1
    return step * max(1, math.ceil(per_track / step - 1e-9))


def _needed(table: pd.DataFrame, target: float, protocol: Protocol) -> pd.DataFrame:
    """Trials per condition for the target median amplitude half-width, per lag."""
    tracks = protocol.design.tracks_per_condition
    out = []
    amp = table[table["quantity"] == "amplitude"]
    for lag, part in amp.groupby("lag", sort=True):
        n = trials_needed(part["trials_per_condition"], part["median_half_width"], target)
        per_track = _trials_per_track_for(protocol, n / tracks) if math.isfinite(n) else float("nan")
        out.append({"lag": int(lag), "target_half_width_deg": target, "trials_per_condition": n,
                    "trials_per_track": per_track,
                    "loglog_slope": loglog_slope(part["trials_per_condition"], part["median_half_width"])})
    return pd.DataFrame(out)


def plan_command(protocol_path: str, model_path: str | None, runs: int, target_half_width: float | None,
                 out_dir: str, seed: int, jobs: int) -> int:
    """The ``aftershift plan`` command: load, plan, print, write; returns the exit code 0.

    Parameters
    ----------
    protocol_path : str
        Protocol file.
    model_path : str or None
        Observer model file (built-in defaults when None).
    runs : int
        Simulated sessions per design.
    target_half_width : float or None
        Target 95 % half-width of the amplitude (deg).
    out_dir : str
        Folder for ``plan.csv``, ``plan_runs.csv``, ``plan_needed.csv`` and
        ``plan.png`` / ``plan.pdf``.
    seed, jobs : int
        Seed and worker processes.

    Raises
    ------
    InputError
        Bad protocol, model file or argument (the command line exits with 2).
    """
    text = read_protocol_text(protocol_path)
    protocol = parse_protocol(text, source=str(protocol_path))
    model = load_model(model_path)
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(str(out), "--out", "exists and is not a folder")
    result = plan_design(protocol, text, str(protocol_path), model, runs, seed,
                         target_half_width=target_half_width, jobs=jobs)
    with output_set(out, "plan") as staged:
        files = staged.final_paths(result.write(staged.folder))
    print("\n".join(result.summary_lines()))
    print(f"wrote {', '.join(str(f) for f in files)}")
    return 0
