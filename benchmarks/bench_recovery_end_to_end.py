"""Parameter recovery through the real engine: `simulate` -> trial log -> `fit`.

For each of ``--reps`` seeds, one simulated observer with known parameters
(``--model``, default ``protocols/observers/typical.toml`` with
``spread_between_observers = 0``) runs ``--protocol`` (default: the bundled
``offset_by_lag.toml``) through the session loop, and its log is fitted with
``--boot`` bootstrap replicates.  Reported: the share of 95 % intervals that
hold the true lag-0 amplitude, lag-0 peak offset and decay (target ≥ 90 %).

Run: ``python benchmarks/bench_recovery_end_to_end.py [--reps 50] [--boot 1000] [--jobs 2]``
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from fitting.report import fit_logs  # noqa: E402
from runner.launch import simulate  # noqa: E402
from runner.observers import ObserverModel, load_model  # noqa: E402
from runner.protocol import load_protocol, read_protocol_text  # noqa: E402
from scratch import pool_map, scratch_folder  # noqa: E402


def one_run(protocol_path: str, model: ObserverModel, seed: int, n_boot: int) -> dict:
    """Simulate and fit one observer; return estimates and intervals."""
    protocol = load_protocol(protocol_path)
    with tempfile.TemporaryDirectory() as tmp:
        logs = simulate(protocol, protocol_path, read_protocol_text(protocol_path), Path(tmp) / "logs", model,
                        1, seed, progress=False)
        report = fit_logs([str(p) for p in logs], str(Path(tmp) / "fit"), n_boot=n_boot, seed=seed,
                          progress=False, figures=False)
    tuning = report.tuning[report.tuning["lag"] == 0].iloc[0]
    decay = report.decay.iloc[0]
    return {
        "amplitude": (tuning["amplitude_deg"], tuning["amplitude_ci_low"], tuning["amplitude_ci_high"]),
        "peak_offset": (tuning["peak_offset_deg"], tuning["peak_offset_ci_low"], tuning["peak_offset_ci_high"]),
        "decay": (decay["decay_periods"], decay["ci_low"], decay["ci_high"]),
    }


def _one_run(job: tuple) -> dict:
    return one_run(*job)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=50)
    ap.add_argument("--boot", type=int, default=1000)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--protocol", default=str(ROOT / "protocols" / "offset_by_lag.toml"))
    ap.add_argument("--model", default=str(ROOT / "protocols" / "observers" / "typical.toml"))
    args = ap.parse_args()
    model = replace(load_model(args.model), spread_between_observers=0.0)
    truth = {"amplitude": model.amplitude_deg, "peak_offset": model.peak_offset_deg, "decay": model.decay_periods}
    t0 = time.perf_counter()
    runs = pool_map(_one_run, [(args.protocol, model, seed, args.boot) for seed in range(args.reps)], args.jobs)
    elapsed = time.perf_counter() - t0
    print(f"{args.reps} simulated sessions of {Path(args.protocol).name}, {args.boot} replicates each, {elapsed:.0f} s")
    print(f"| parameter | true | mean estimate | median 95% CI width | coverage | target ≥ 90 % |")
    print("|---|---|---|---|---|---|")
    ok = True
    for name, true in truth.items():
        est = [r[name][0] for r in runs]
        covered = [r[name][1] <= true <= r[name][2] for r in runs]
        widths = sorted(r[name][2] - r[name][1] for r in runs)
        share = sum(covered) / len(runs)
        ok &= share >= 0.9
        mean = sum(e for e in est if math.isfinite(e)) / len(est)
        print(f"| {name} | {true:g} | {mean:.2f} | {widths[len(widths) // 2]:.2f} | {share:.0%} | "
              f"{'met' if share >= 0.9 else 'MISSED'} |")
    print("PASS" if ok else "FAIL")


if __name__ == "__main__":
    try:
        with scratch_folder():
            main()
    except KeyboardInterrupt:
        sys.exit("bench_recovery_end_to_end: interrupted; it writes no files, so nothing is lost")
