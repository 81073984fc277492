"""Curve intervals side by side on kept coverage fits: the kept limits against the profile intervals.

Reads the fits that ``bench_coverage.py --save DIR`` kept (one pickle per
procedure and trial count, named ``PROC_TRIALS.pickle``) and scores, on the
same shifts and replicates, four 95 % intervals of every simulated
observer's decay constant and of their tuning amplitude at each lag:

* ``kept`` — the limits kept in the pickle's default-rule tables.  Decay:
  BCa for fits kept before its profile interval became the default (the
  third session), the profile interval after.  Amplitude: BCa for fits
  kept before the twentieth session, its profile interval after (BCa
  for lags with fewer than 8 shifts until the twenty-second);
* ``profile, factor alone`` — the profile interval of the curve fitted by
  generalised least squares with the covariance of the replicated shifts
  (:func:`fitting.observer.replicate_covariance`, as ``fit`` takes it:
  replicates with a non-finite shift left out; no interval where too few
  remain), the cut ``s^2 F(1, dof)`` set by the variance factor alone
  (:func:`fitting.aftereffect.decay_profile_interval`, the decay's default
  until the nineteenth session;
  :func:`fitting.aftereffect.tuning_profile_interval`, the amplitude's
  default since the twentieth for lags with 8 or more shifts, as in the
  bundled ``offset_by_lag.toml`` that the coverage benchmark runs; scored
  here for every lag);
* ``profile, floored at the known-covariance cut`` — the same, the cut
  never below ``chi2_1`` (the decay's default since the nineteenth
  session);
* ``profile, covariance taken as known`` — the cut ``chi2_1`` alone (the
  amplitude's default since the twenty-second session for lags with 3–7
  shifts, measured with ``bench_coverage.py --offsets``).

The truth of each observer comes from the observer model with the group's
seed, as in ``bench_coverage.py``.  Coverage ± its binomial Monte Carlo
error, the misses on each side, and the median width (the decay's in log
units, the amplitude's in degrees).

Usage::

    python benchmarks/bench_curve_intervals.py DIR [DIR ...]     # the folders' fits pooled per cell
"""

from __future__ import annotations

import argparse
import pickle
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from fitting.aftereffect import decay_profile_interval, peak_bounds, tuning_profile_interval  # noqa: E402
from fitting.observer import replicate_covariance  # noqa: E402
from runner.observers import draw_observers, load_model  # noqa: E402

INTERVAL_KEY = ("pilot", "by-statistic")
# the profile interval's cut (fitting.aftereffect.PROFILE_CUTS)
RULES = {"profile, factor alone": "factor", "profile, floored at the known-covariance cut": "floored",
         "profile, covariance taken as known": "known"}
#: What a rule gives where the replicates are too few for a covariance (the fit then keeps BCa).
NO_INTERVAL = (float("nan"), float("nan"))


def observer_rows(results: list[dict], model) -> dict[str, list[dict]]:
    """Rows of every observer with replicates: ``{"decay": [...], "amplitude": [...]}``.

    Each row holds the truth, the kept limits and the profile interval under
    each rule.  Observers are named ``s<seed>_simNN`` by ``bench_coverage.py``;
    the seed and the group's size give the observer's truth.
    """
    rows: dict[str, list[dict]] = {"decay": [], "amplitude": []}
    for res in results:
        own, reps = res["tables"][INTERVAL_KEY]
        for who in own["tuning"]["observer"].unique():
            if who not in reps or reps[who] is None:
                continue                                   # the group row, or no replicates
            seed, number = who.split("_sim")
            truth = draw_observers(model, res["n_obs"], int(seed[1:]))[int(number) - 1]
            shifts = own["aftereffect"][own["aftereffect"]["observer"] == who]
            offsets = shifts["adapter_offset_deg"].to_numpy(float)
            lags = shifts["lag"].to_numpy(float)
            values = shifts["pse_shift_deg"].to_numpy(float)
            bounds = peak_bounds(offsets)
            for _, t in own["tuning"][own["tuning"]["observer"] == who].iterrows():
                lag = lags == t["lag"]
                row = {"truth": truth.amplitude_deg * np.exp(-t["lag"] / truth.decay_periods),
                       "kept": (t["amplitude_ci_low"], t["amplitude_ci_high"])}
                cov = replicate_covariance(reps[who][:, lag])
                for name, cut in RULES.items():
                    row[name] = (NO_INTERVAL if cov is None else
                                 tuning_profile_interval(offsets[lag], values[lag], cov, t["amplitude_deg"],
                                                         bounds, cut=cut))
                rows["amplitude"].append(row)
            decay = own["decay"][own["decay"]["observer"] == who]
            if decay.empty:
                continue
            row = {"truth": truth.decay_periods, "kept": (decay["ci_low"].iloc[0], decay["ci_high"].iloc[0])}
            cov = replicate_covariance(reps[who])
            for name, cut in RULES.items():
                row[name] = (NO_INTERVAL if cov is None else
                             decay_profile_interval(offsets, lags, values, cov, float(decay["decay_periods"].iloc[0]),
                                                    bounds, cut=cut))
            rows["decay"].append(row)
    return rows


def score(rows: list[dict], kind: str, log_width: bool) -> str:
    """Coverage ± MC SE, misses below / above, median width (of the logs with ``log_width``)."""
    lo = np.array([r[kind][0] for r in rows], float)
    hi = np.array([r[kind][1] for r in rows], float)
    truth = np.array([r["truth"] for r in rows])
    held = (lo <= truth) & (truth <= hi)          # no interval (NaN limits) counts as a miss
    p, n = held.mean(), held.size
    none = int(np.sum(~np.isfinite(lo) | ~np.isfinite(hi)))
    width = np.log(hi / lo) if log_width else hi - lo
    return (f"{100 * p:.1f} ± {100 * np.sqrt(p * (1 - p) / n):.1f} | {int((truth < lo).sum())} / "
            f"{int((truth > hi).sum())}{f' ({none} without an interval)' if none else ''} | "
            f"{np.nanmedian(width):.2f}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("kept", type=Path, nargs="+", help="folders of bench_coverage.py --save (pooled)")
    ap.add_argument("--model", default=str(ROOT / "protocols" / "observers" / "typical.toml"))
    args = ap.parse_args()
    model = load_model(args.model)
    cells: dict[str, dict[str, list]] = {}
    for folder in args.kept:
        if not any(folder.glob("*.pickle")):
            ap.error(f"{folder}: no kept fits (*.pickle of bench_coverage.py --save)")
        for path in sorted(folder.glob("*.pickle")):
            try:
                with open(path, "rb") as f:
                    kept = pickle.load(f)
            except (OSError, EOFError, pickle.UnpicklingError) as exc:
                ap.error(f"{path}: not a kept fit of bench_coverage.py --save ({type(exc).__name__}: {exc})")
            rows = observer_rows(kept, model)
            for what, more in rows.items():
                cells.setdefault(path.stem, {}).setdefault(what, []).extend(more)
    print("| kept fits | statistic | intervals | interval | coverage ± MC SE (%) | truth below / above | median width |")
    print("|---|---|---|---|---|---|---|")
    for name, by_what in cells.items():
        for what, rows in by_what.items():
            for kind in ("kept", *RULES):
                print(f"| {name} | {what} | {len(rows)} | {kind} | {score(rows, kind, what == 'decay')} |", flush=True)


if __name__ == "__main__":
    main()
