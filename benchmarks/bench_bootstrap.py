"""Speed of the batched parametric bootstrap against refitting statsmodels per replicate.

One simulated observer, 25 conditions (baseline + 8 adapter offsets x 3 lags)
x 80 trials (two 1-up/1-down tracks of 40).  Side by side, in one run:

A. ``fit_logs`` with 2,000 replicates as a whole process (python start,
   imports, reading the log, joint fit with a free lapse, 2,000 replicate
   refits of all 25 conditions with the lapse refitted, intervals, tuning and
   decay fits, tables), timed from outside: wall clock and CPU seconds;
   the same with figures is reported as well;
B. statsmodels' binomial GLM with probit link refitted per replicate and per
   condition (lapse fixed at 0, which is easier than our free lapse) on the
   same kind of replicate data, pooled by level.  By default it is timed on
   200 replicates and scaled to 2,000 (it is linear in the replicates);
   ``--full`` runs all 2,000.

Target: A at least 30 x faster than B, and A within 3 s on 2 cores.

Run: ``python benchmarks/bench_bootstrap.py [--full] [--replicates N]``
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from fitting.psychometric import Cells, fit_cells  # noqa: E402
from fitting.synthetic import simulate_trials, write_log  # noqa: E402
from fitting.tables import read_logs  # noqa: E402

OFFSETS = (-90, -60, -30, -15, 15, 30, 60, 90)
LAGS = (0, 1, 2)


def _child_cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


def whole_process(log: Path, out: Path, replicates: int, figures: bool) -> tuple[float, float]:
    code = ("import sys; sys.path.insert(0, %r)\n"
            "from fitting import fit_logs\n"
            "fit_logs([%r], %r, n_boot=%d, seed=0, figures=%r, progress=False)\n"
            % (str(ROOT), str(log), str(out), replicates, figures))
    cpu0, t0 = _child_cpu(), time.perf_counter()
    subprocess.run([sys.executable, "-c", code], check=True)
    return time.perf_counter() - t0, _child_cpu() - cpu0


def statsmodels_per_replicate(log: Path, replicates: int) -> tuple[float, float]:
    import statsmodels.api as sm

    trials = read_logs([str(log)])
    names = list(dict.fromkeys(trials["condition"]))
    code = trials["condition"].map({c: i for i, c in enumerate(names)}).to_numpy()
    cells = Cells.from_trials(trials["test_offset_deg"].to_numpy(float),
                              trials["response_cw"].to_numpy(float), code, len(names))
    fit = fit_cells(cells, names, lapse=0.0)
    draws = np.random.default_rng(0).binomial(cells.n.astype(int)[None], fit.probabilities()[None],
                                              size=(replicates,) + cells.n.shape)
    family = sm.families.Binomial(link=sm.families.links.Probit())
    designs = []
    for c in range(len(names)):
        used = cells.n[c] > 0
        designs.append((used, sm.add_constant(cells.x[c, used]), cells.n[c, used]))
    cpu0, t0 = time.process_time(), time.perf_counter()
    failed = 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for r in range(replicates):
            for c, (used, X, n) in enumerate(designs):
                k = draws[r, c, used]
                try:
                    sm.GLM(np.column_stack([k, n - k]), X, family=family).fit()
                except Exception:       # perfect separation in a replicate
                    failed += 1
    if failed:
        print(f"   (statsmodels: {failed} of {replicates * len(designs)} refits failed)")
    return time.perf_counter() - t0, time.process_time() - cpu0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--full", action="store_true", help="refit all 2,000 replicates with statsmodels")
    ap.add_argument("--replicates", type=int, default=2000)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        log = tmp / "B01.trials.csv"
        write_log(simulate_trials(offsets=OFFSETS, lags=LAGS, trials_per_track=40, seed=1,
                                  observer="B01"), log)
        n_cond = 1 + len(OFFSETS) * len(LAGS)
        print(f"data: {n_cond} conditions x 80 trials; {args.replicates} replicates; "
              f"{os.cpu_count()} CPUs; load average {os.getloadavg()[0]:.1f}")
        whole_process(log, tmp / "warm", 10, False)            # warm the file cache
        wall_a, cpu_a = whole_process(log, tmp / "a", args.replicates, False)
        wall_f, cpu_f = whole_process(log, tmp / "f", args.replicates, True)
        n_sm = args.replicates if args.full else min(200, args.replicates)
        wall_b, cpu_b = statsmodels_per_replicate(log, n_sm)
        scale = args.replicates / n_sm
        print(f"A  aftershift fit_logs, whole process, no figures : {wall_a:6.2f} s wall, {cpu_a:6.2f} s CPU")
        print(f"A' the same with PNG + PDF figures                  : {wall_f:6.2f} s wall, {cpu_f:6.2f} s CPU")
        print(f"B  statsmodels probit GLM per replicate x condition : {wall_b * scale:6.2f} s wall, "
              f"{cpu_b * scale:6.2f} s CPU" + ("" if args.full else f"  (measured on {n_sm}, x{scale:g})"))
        print(f"speed-up B / A: {wall_b * scale / wall_a:5.1f} x wall, {cpu_b * scale / cpu_a:5.1f} x CPU "
              f"(target >= 30 x; A target <= 3 s)")


if __name__ == "__main__":
    main()
