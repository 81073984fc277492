"""Parameter recovery: do the 95 % intervals hold the simulated after-effect?

50 seeded simulated observers (README, Models; amplitude 3 deg, peak
offset 30 deg, decay 1.5 periods, spread 2 deg, lapse 0.02; baseline + 6
adapter offsets x 3 lags, two 1-up/1-down tracks of 40 trials per condition)
are fitted with 1,000 bootstrap replicates each.  For the lag-0 amplitude
and peak offset (``tuning.csv``) and the decay constant (``decay.csv``) the
share of intervals holding the simulated value must be at least 90 %.

Trial tables come from :mod:`fitting.synthetic` for now; the end-to-end
simulate -> fit version runs the session engine's simulated observer.

Run: ``python benchmarks/bench_recovery.py [--reps 50] [--boot 1000] [--interval bca|percentile]``
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from fitting.synthetic import ObserverModel, recovery_study  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=50)
    ap.add_argument("--boot", type=int, default=1000)
    ap.add_argument("--interval", default="by-statistic", choices=["by-statistic", "bca", "percentile"])
    ap.add_argument("--trials-per-track", type=int, default=40)
    args = ap.parse_args()
    model = ObserverModel()
    t0 = time.perf_counter()
    res = recovery_study(range(args.reps), model, args.boot, trials_per_track=args.trials_per_track,
                         interval=args.interval)
    elapsed = time.perf_counter() - t0
    ok = True
    print(f"{args.reps} simulated observers, {args.boot} replicates, {args.interval} intervals, "
          f"{elapsed:.1f} s")
    for name, truth in (("amplitude", model.amplitude_deg), ("peak_offset", model.peak_offset_deg),
                        ("decay", model.decay_periods)):
        cov = res[f"{name}_covered"].mean()
        width = (res[f"{name}_high"] - res[f"{name}_low"]).median()
        ok &= cov >= 0.9
        print(f"  {name:<12} true {truth:6.2f}  mean estimate {res[name].mean():6.2f}  "
              f"median 95% width {width:6.2f}  coverage {100 * cov:5.1f} %  "
              f"{'ok' if cov >= 0.9 else 'BELOW 90 %'}")
    print("PASS" if ok else "FAIL")
    sys.exit(0 if ok else 1)


if __name__ == "__main__":
    main()
