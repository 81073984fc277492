"""Decay-constant intervals side by side on kept coverage fits: the kept limits against the profile interval.

Reads the fits that ``bench_coverage.py --save DIR`` kept (one pickle per
procedure and trial count, named ``PROC_TRIALS.pickle``) and scores, for
every simulated observer with a decay fit, three 95 % intervals of the decay
constant on the same shifts and replicates:

* ``kept`` — the limits kept in the pickle's default-rule tables: BCa for
  fits kept before the decay's profile interval became the default (the
  coverage benchmark then kept the fit's BCa limits for the decay);
* ``profile, factor alone`` — :func:`fitting.aftereffect.decay_profile_interval`
  with the covariance of the replicated shifts, the cut ``s^2 F(1, n - 3)``
  set by the variance factor alone (the default until the nineteenth
  session);
* ``profile, floored at the known-covariance cut`` — the same, the cut
  never below ``chi2_1`` (the default since).

The truth of each observer comes from the observer model with the group's
seed, as in ``bench_coverage.py``.  Coverage ± its binomial Monte Carlo
error, the misses on each side, and the median width in log units.

Usage::

    python benchmarks/bench_decay_interval.py DIR [DIR ...]     # the folders' fits pooled per cell
"""

from __future__ import annotations

import argparse
import pickle
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from fitting.aftereffect import decay_profile_interval, peak_bounds  # noqa: E402
from runner.observers import draw_observers, load_model  # noqa: E402

INTERVAL_KEY = ("pilot", "by-statistic")
# the profile interval's cut: s^2 F(1, n - 3) alone (before), or never below the chi2_1 cut of the
# covariance taken as exact (fit's default since the nineteenth session)
RULES = {"profile, factor alone": False, "profile, floored at the known-covariance cut": True}


def observer_rows(results: list[dict], model) -> list[dict]:
    """One row per observer with a decay fit: truth, kept limits, and the profile interval under each rule.

    Observers are named ``s<seed>_simNN`` by ``bench_coverage.py``; the
    seed and the group's size give the observer's truth.
    """
    rows = []
    for res in results:
        own, reps = res["tables"][INTERVAL_KEY]
        for who in own["decay"]["observer"]:
            if who not in reps or reps[who] is None:
                continue                                   # the group row, or no replicates
            seed, number = who.split("_sim")
            truth = draw_observers(model, res["n_obs"], int(seed[1:]))[int(number) - 1]
            decay = own["decay"][own["decay"]["observer"] == who]
            shifts = own["aftereffect"][own["aftereffect"]["observer"] == who]
            offsets = shifts["adapter_offset_deg"].to_numpy(float)
            lags = shifts["lag"].to_numpy(float)
            tau = float(decay["decay_periods"].iloc[0])
            row = {"truth": truth.decay_periods, "kept": (decay["ci_low"].iloc[0], decay["ci_high"].iloc[0])}
            for name, floor in RULES.items():
                row[name] = decay_profile_interval(offsets, lags, shifts["pse_shift_deg"].to_numpy(float),
                                                   np.cov(reps[who], rowvar=False), tau, peak_bounds(offsets),
                                                   floor_at_known=floor)
            rows.append(row)
    return rows


def score(rows: list[dict], kind: str) -> str:
    """Coverage ± MC SE, misses below / above, median log width."""
    lo = np.array([r[kind][0] for r in rows])
    hi = np.array([r[kind][1] for r in rows])
    truth = np.array([r["truth"] for r in rows])
    held = (lo <= truth) & (truth <= hi)          # no interval (NaN limits) counts as a miss
    p, n = held.mean(), held.size
    none = int(np.sum(~np.isfinite(lo) | ~np.isfinite(hi)))
    return (f"{100 * p:.1f} ± {100 * np.sqrt(p * (1 - p) / n):.1f} | {int((truth < lo).sum())} / "
            f"{int((truth > hi).sum())}{f' ({none} without an interval)' if none else ''} | "
            f"{np.nanmedian(np.log(hi / lo)):.2f}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("kept", type=Path, nargs="+", help="folders of bench_coverage.py --save (pooled)")
    ap.add_argument("--model", default=str(ROOT / "protocols" / "observers" / "typical.toml"))
    args = ap.parse_args()
    model = load_model(args.model)
    cells: dict[str, list] = {}
    for folder in args.kept:
        if not any(folder.glob("*.pickle")):
            ap.error(f"{folder}: no kept fits (*.pickle of bench_coverage.py --save)")
        for path in sorted(folder.glob("*.pickle")):
            with open(path, "rb") as f:
                cells.setdefault(path.stem, []).extend(observer_rows(pickle.load(f), model))
    print("| kept fits | observers | interval | coverage ± MC SE (%) | truth below / above | median log width |")
    print("|---|---|---|---|---|---|")
    for name, rows in cells.items():
        for kind in ("kept", *RULES):
            print(f"| {name} | {len(rows)} | {kind} | {score(rows, kind)} |", flush=True)


if __name__ == "__main__":
    main()
