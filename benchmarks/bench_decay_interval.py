"""Decay-constant intervals side by side on kept coverage fits: the kept limits against the profile interval.

Reads the fits that ``bench_coverage.py --save DIR`` kept (one pickle per
procedure and trial count, named ``PROC_TRIALS.pickle``) and scores, for
every simulated observer with a decay fit, two 95 % intervals of the decay
constant on the same shifts and replicates:

* ``kept`` — the limits kept in the pickle's default-rule tables: BCa for
  fits kept before the decay's profile interval became the default (the
  coverage benchmark then kept the fit's BCa limits for the decay);
* ``profile`` — :func:`fitting.aftereffect.decay_profile_interval` with the
  covariance of the replicated shifts (the default now).

The truth of each observer comes from the observer model with the group's
seed, as in ``bench_coverage.py``.  Coverage ± its binomial Monte Carlo
error, the misses on each side, and the median width in log units.

Usage::

    python benchmarks/bench_decay_interval.py DIR --first-group 64 --groups 24
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


def observer_rows(results: list[dict], sizes, first: int, groups: int, model) -> list[dict]:
    """One row per observer with a decay fit: truth, estimate, and both intervals."""
    jobs = [(size, 1000 * size + g) for size in sizes for g in range(first, first + groups)]
    if len(jobs) != len(results):
        raise SystemExit(f"the pickle holds {len(results)} groups, the options name {len(jobs)}")
    rows = []
    for (size, seed), res in zip(jobs, results):
        own, reps = res["tables"][INTERVAL_KEY]
        for i, truth in enumerate(draw_observers(model, size, seed)):
            who = f"s{seed}_sim{i + 1:02d}"
            decay = own["decay"][own["decay"]["observer"] == who]
            shifts = own["aftereffect"][own["aftereffect"]["observer"] == who]
            if decay.empty or reps.get(who) is None:
                continue
            offsets = shifts["adapter_offset_deg"].to_numpy(float)
            lags = shifts["lag"].to_numpy(float)
            tau = float(decay["decay_periods"].iloc[0])
            profile = decay_profile_interval(offsets, lags, shifts["pse_shift_deg"].to_numpy(float),
                                             np.cov(reps[who], rowvar=False), tau, peak_bounds(offsets))
            rows.append({"truth": truth.decay_periods, "kept": (decay["ci_low"].iloc[0], decay["ci_high"].iloc[0]),
                         "profile": profile})
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
    ap.add_argument("kept", type=Path, help="folder of bench_coverage.py --save")
    ap.add_argument("--first-group", type=int, required=True, help="as given to bench_coverage.py")
    ap.add_argument("--groups", type=int, required=True, help="as given to bench_coverage.py")
    ap.add_argument("--sizes", type=int, nargs="+", default=[3, 8])
    ap.add_argument("--model", default=str(ROOT / "protocols" / "observers" / "typical.toml"))
    args = ap.parse_args()
    model = load_model(args.model)
    print("| kept fits | observers | interval | coverage ± MC SE (%) | truth below / above | median log width |")
    print("|---|---|---|---|---|---|")
    for path in sorted(args.kept.glob("*.pickle")):
        with open(path, "rb") as f:
            rows = observer_rows(pickle.load(f), args.sizes, args.first_group, args.groups, model)
        for kind in ("kept", "profile"):
            print(f"| {path.stem} | {len(rows)} | {kind} | {score(rows, kind)} |", flush=True)


if __name__ == "__main__":
    main()
