"""What the group χ²'s simulated p value costs in power: rejections of wrong and of true predictions.

Reads the fits that ``bench_coverage.py --save DIR`` kept (one pickle per
procedure and trial count), forms disjoint groups of 3 and of 8 from their
observers (one random partition), and tests each group's shifts against the
population's true curve and against wrong ones: the true curve times 0.7 and
1.3 (a wrong size), the true curve without decay over lags (every lag as
large as lag 0), and the true curve plus 0.5° (a constant bias).  Each is
scored with ``compare``'s χ² read two ways: the simulated p value
(:mod:`fitting.group_chi2`, ``compare``'s rule) and the earlier reading of
the same statistic against χ²(n) (``before``).

Run: ``python benchmarks/bench_group_power.py DIR/bayesian_40.pickle [more pickles]``
"""

from __future__ import annotations

import argparse
import pickle
import sys
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

from bench_coverage import population_truth  # noqa: E402
from fitting.compare import agreement  # noqa: E402
from fitting.covariance import covariance_matrix, group_covariance  # noqa: E402
from fitting.group import GROUP, group_aftereffect, group_weights  # noqa: E402
from fitting.group_chi2 import GroupData, calibrated_p  # noqa: E402
from runner.observers import load_model  # noqa: E402
from runner.protocol import load_protocol  # noqa: E402

LEVEL = 0.95
BOOT = ("pilot", "by-statistic")


def wrong_curves(truth: np.ndarray, lags: np.ndarray) -> dict:
    """The true curve and the wrong predictions scored against it."""
    at_zero = np.abs(truth[lags == 0]).sum()
    no_decay = truth * np.array([at_zero / max(np.abs(truth[lags == lag]).sum(), 1e-9) for lag in lags])
    return {"true curve": truth, "size × 0.7": 0.7 * truth, "size × 1.3": 1.3 * truth,
            "no decay over lags": no_decay, "bias + 0.5°": truth + 0.5}


def score_groups(path: Path, pop: dict, sizes=(3, 8)) -> dict:
    """``{(size, prediction, reading): [rejected, ...]}`` over one partition of the pickle's observers."""
    with open(path, "rb") as f:
        results = pickle.load(f)
    tables = [r["tables"][BOOT] for r in results]
    shifts = pd.concat([own["aftereffect"] for own, _ in tables], ignore_index=True)
    reps = {k: v for _, r in tables for k, v in r.items()}
    names = list(np.random.default_rng(0).permutation(sorted(shifts["observer"].unique())))
    out: dict = {}
    for size in sizes:
        for start in range(0, len(names) - size + 1, size):
            members = sorted(names[start:start + size])
            sub = shifts[shifts["observer"].isin(members)]
            g = group_aftereffect(sub, LEVEL)
            cells = list(zip(g["lag"].astype(float), g["adapter_offset_deg"].astype(float)))
            truth = np.array([pop["shift"][c] for c in cells])
            fake = [SimpleNamespace(observer=o, curves={"shift_reps": reps[o]},
                                    aftereffect=sub[sub["observer"] == o]) for o in members]
            matrix, _, dof = covariance_matrix(group_covariance(fake, g, group_weights(sub, LEVEL), LEVEL),
                                               GROUP, g["lag"], g["adapter_offset_deg"])[:3]
            data = GroupData.from_tables(sub, {o: np.cov(reps[o], rowvar=False) for o in members}, cells, LEVEL)
            for name, pred in wrong_curves(truth, np.array([c[0] for c in cells])).items():
                before = agreement(g["pse_shift_deg"], g["ci_low"], g["ci_high"], pred, None, matrix, np.nan, dof)
                (_, p), = calibrated_p(data, pred)
                out.setdefault((size, name, "simulated p"), []).append(p < 0.05)
                out.setdefault((size, name, "χ²(n), before"), []).append(before.chi2_p < 0.05)
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("pickles", nargs="+", type=Path, help="files written by bench_coverage.py --save")
    ap.add_argument("--model", default=str(ROOT / "protocols" / "observers" / "typical.toml"))
    ap.add_argument("--protocol", default=str(ROOT / "protocols" / "offset_by_lag.toml"))
    args = ap.parse_args()
    base = load_protocol(args.protocol)
    pop = population_truth(load_model(args.model), base.design.adapter_offsets_deg, base.design.lags)
    t0 = time.perf_counter()
    total: dict = {}
    for path in args.pickles:
        for key, v in score_groups(path, pop).items():
            total.setdefault(key, []).extend(v)
    print("| group size | prediction | rejected at 5 %: simulated p | rejected at 5 %: χ²(n), before | groups |")
    print("|---|---|---|---|---|")
    for size in sorted({k[0] for k in total}):
        for name in wrong_curves(np.zeros(1), np.zeros(1)):
            sim, old = total[(size, name, "simulated p")], total[(size, name, "χ²(n), before")]
            print(f"| {size} | {name} | {100 * np.mean(sim):.1f} % | {100 * np.mean(old):.1f} % | {len(sim)} |")
    print(f"\ntotal {time.perf_counter() - t0:.0f} s")


if __name__ == "__main__":
    main()
