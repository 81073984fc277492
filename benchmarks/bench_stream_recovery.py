"""Parameter recovery of the n-back analysis on simulated streams (issue 8).

Runs the bundled stream protocol (``protocols/stream_nback.toml``: 600 tests,
12 directions, K = 3) through the real session loop with a simulated
observer (``aftershift simulate``'s path: StreamRun, StreamObserver,
TrialLog), reads the log back and fits it with :mod:`fitting.nback`, for
30 seeds.  Reports how often the true per-n amplitudes
``A·exp(-(n-1)/τ)``, the shared peak offset and the decay τ fall inside
their 95 % bootstrap intervals, and how often ``compare``'s χ² rejects the
true after-effect curve at the 5 % level: ``compare``'s rule (χ² over the
covariance's leading directions, as many as the parameters behind the
shifts, χ²/rank read against F on the spread's degrees of freedom) and,
beside it, the rule before (the full-rank inverse, each residual read
against t on ``n_trials - 2``); target 3–8 %.

Run: ``python benchmarks/bench_stream_recovery.py [--runs 30] [--boot 400] [--first-seed 0]`` (seeds
``first-seed`` … ``first-seed + runs - 1``).
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from fitting.aftereffect import dog
from fitting.compare import agreement
from fitting.covariance import covariance_matrix
from fitting.nback import bootstrap_nback, fit_nback, read_stream_logs, result_tables
from runner.launch import simulate
from runner.observers import ObserverModel
from runner.protocol import load_protocol, read_protocol_text

ROOT = Path(__file__).resolve().parent.parent
PROTOCOL = ROOT / "protocols" / "stream_nback.toml"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=30)
    parser.add_argument("--boot", type=int, default=400)
    parser.add_argument("--first-seed", type=int, default=0)
    args = parser.parse_args()
    protocol, text = load_protocol(PROTOCOL), read_protocol_text(PROTOCOL)
    model = ObserverModel(spread_between_observers=0.0)
    k = protocol.stream.nback_periods
    truth_a = model.amplitude_deg * np.exp(-np.arange(k) / model.decay_periods)
    hits = np.zeros(k + 2, dtype=int)
    joint = 0
    rejected = {"compare (rank of the parameters, F on the spread's dof)": 0,
                "before (full rank, t on n_trials - 2)": 0}
    start = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        for seed in range(args.first_seed, args.first_seed + args.runs):
            out = Path(tmp) / f"run{seed}"
            simulate(protocol, str(PROTOCOL), text, out, model, 1, seed, progress=False)
            trials = read_stream_logs(out)[0]
            boot = bootstrap_nback(fit_nback(trials), args.boot, np.random.default_rng([seed, 99]))
            lo, hi = boot.amplitude_ci
            w_lo, w_hi = boot.peak_offset_ci
            t_lo, t_hi = boot.decay_ci
            inside = np.r_[(lo <= truth_a) & (truth_a <= hi), w_lo <= model.peak_offset_deg <= w_hi,
                           t_lo <= model.decay_periods <= t_hi]
            hits += inside
            joint += bool(inside.all())
            tables = result_tables(boot)
            ae = tables["aftereffect"]
            truth = dog(ae["adapter_offset_deg"].to_numpy(float), truth_a[ae["lag"].to_numpy(int)],
                        model.peak_offset_deg)
            cov = covariance_matrix(tables["aftereffect_covariance"], ae["observer"].iloc[0], ae["lag"],
                                    ae["adapter_offset_deg"])
            common = (ae["pse_shift_deg"], ae["ci_low"], ae["ci_high"], truth, None, cov.matrix, cov.replicates)
            now = agreement(*common, spread_dof=cov.spread_dof, rank=cov.rank)
            rejected["compare (rank of the parameters, F on the spread's dof)"] += now.chi2_p < 0.05
            rejected["before (full rank, t on n_trials - 2)"] += agreement(*common, trials=ae["n_trials"]).chi2_p < 0.05
            print(f"seed {seed:2d}: a = {np.round(boot.fit.amplitudes_deg, 2)} (true {np.round(truth_a, 2)}), "
                  f"w = {boot.fit.peak_offset_deg:.1f}, tau = {boot.fit.decay_periods:.2f} "
                  f"[{t_lo:.2f}, {t_hi:.2f}]  {'ok' if inside.all() else 'MISS ' + str(inside.astype(int))}",
                  flush=True)
    names = [f"a_{n + 1}" for n in range(k)] + ["peak offset w", "decay tau"]
    print(f"\n{args.runs} runs, {args.boot} bootstrap replicates each, {time.perf_counter() - start:.0f} s")
    for name, h in zip(names, hits):
        print(f"  {name:<14} inside its 95 % CI in {h}/{args.runs} runs ({h / args.runs:.0%})")
    print(f"  all at once     in {joint}/{args.runs} runs ({joint / args.runs:.0%})")
    for name, r in rejected.items():
        se = np.sqrt(r / args.runs * (1 - r / args.runs) / args.runs)
        print(f"  chi2 rejects the true curve, {name}: {r}/{args.runs} ({r / args.runs:.1%} ± {se:.1%})")


if __name__ == "__main__":
    main()
