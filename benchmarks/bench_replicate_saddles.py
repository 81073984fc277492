"""How many parametric-bootstrap refits stop on a saddle, and what moving them off costs.

Newton's method stops wherever the gradient vanishes, and with short
adaptive tracks some refits of the joint fit stop on a saddle of the
likelihood (a condition's answers split so that its PSE has two peaks).
For each simulated observer (the coverage benchmark's protocol and observer
model: ``bench_coverage.protocol_text``, seeds ``1000 x size + group``) the
script draws ``--boot`` fixed-level replicates at the point fit, refits them
with :func:`fitting.psychometric.solve_batch`, and counts refits whose observed
information over the parameters off their bounds has a negative eigenvalue
(numpy's dense ``eigvalsh``), before and after
:func:`fitting.psychometric.escape_saddles`, and how many of those left
had not converged (flagged so in ``fit``'s tables).  It also reports how far the
moved PSEs went, the log-likelihood they gained, and the seconds of the
refits and of the escape side by side in one run.

Run: ``python benchmarks/bench_replicate_saddles.py [--groups 4] [--sizes 8]
[--trials 24 40] [--procedures updown bayesian] [--boot 1000]``
"""

from __future__ import annotations

import argparse
import copy
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

from bench_coverage import protocol_text, simulate_group  # noqa: E402
from fitting.observer import condition_table  # noqa: E402
from fitting.psychometric import (Cells, _derivatives, escape_saddles, fit_cells, probability_cw,  # noqa: E402
                                  solve_batch)
from fitting.tables import read_logs  # noqa: E402
from runner.observers import load_model  # noqa: E402


def on_saddle(sol, cells, k, layout) -> np.ndarray:
    """Refits whose observed information off the bounds has a negative eigenvalue (numpy's eigvalsh)."""
    info = _derivatives(sol.theta, cells.x[None], cells.n[None], k, layout, "gaussian", fisher=False)[2]
    return np.array([np.linalg.eigvalsh(h[np.ix_(~b, ~b)])[0] < -1e-9 * max(np.abs(h).max(), 1.0)
                     if np.isfinite(h).all() else False for h, b in zip(info, sol.at_bound)])


def one_observer(log: str, n_boot: int, rng) -> dict:
    trials = read_logs([log])
    names = condition_table(trials)["condition"].tolist()
    code = trials["condition"].map({c: j for j, c in enumerate(names)}).to_numpy()
    cells = Cells.from_trials(trials["test_offset_deg"].to_numpy(float), trials["response_cw"].to_numpy(float),
                              code, len(names))
    fit = fit_cells(cells, names, warn=False)
    lay = fit.layout
    p = probability_cw(cells.x, fit.pse[:, None], fit.spread[:, None], fit.lapse)
    k = rng.binomial(cells.n.astype(np.int64), p, size=(n_boot,) + p.shape).astype(float)
    t0 = time.perf_counter()
    sol = solve_batch(fit.theta[None], cells.x[None], cells.n[None], k, lay, fit.lower[None], fit.upper[None])
    t1 = time.perf_counter()
    old = copy.deepcopy(sol)
    escape_saddles(sol, cells.x[None], cells.n[None], k, lay, fit.lower, fit.upper, "gaussian")
    t2 = time.perf_counter()
    moved = old.nll - sol.nll > 1e-9
    left = on_saddle(sol, cells, k, lay)
    return {"before": int(on_saddle(old, cells, k, lay).sum()), "after": int(left.sum()),
            "after_unconverged": int((left & ~sol.converged).sum()),
            "moved": int(moved.sum()), "gain": list(old.nll[moved] - sol.nll[moved]),
            "pse_move": list(np.abs(sol.theta - old.theta)[moved][:, lay.pse_index].max(axis=1)),
            "solve_s": t1 - t0, "escape_s": t2 - t1, "n": n_boot}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--groups", type=int, default=4, help="simulated groups per cell")
    ap.add_argument("--sizes", type=int, nargs="+", default=[8])
    ap.add_argument("--trials", type=int, nargs="+", default=[24, 40], help="trials per condition")
    ap.add_argument("--procedures", nargs="+", default=["updown", "bayesian"])
    ap.add_argument("--boot", type=int, default=1000, help="replicates per observer")
    ap.add_argument("--model", default=str(ROOT / "protocols" / "observers" / "typical.toml"))
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    model = load_model(args.model)
    print(f"# fixed-level refits on saddles: {args.groups} groups of each size {args.sizes} per cell, "
          f"{args.boot} replicates per observer")
    print("| procedure | trials/cond. | refits on a saddle | after the escape (not converged) | PSE moved (median / max, deg) | "
          "log-likelihood gained (median) | refit s | escape s (× refit) | observers |")
    print("|---|---|---|---|---|---|---|---|---|")
    for proc in args.procedures:
        for n_trials in args.trials:
            text = protocol_text(str(ROOT / "protocols" / "offset_by_lag.toml"), n_trials, proc)
            rows = []
            for size in args.sizes:
                for g in range(args.groups):
                    seed = 1000 * size + g
                    with tempfile.TemporaryDirectory() as tmp:
                        logs = simulate_group(text, model, size, seed, Path(tmp))[0]
                        rng = np.random.default_rng(seed)
                        rows += [one_observer(log, args.boot, rng) for log in logs]
            n = sum(r["n"] for r in rows)
            before, after = sum(r["before"] for r in rows), sum(r["after"] for r in rows)
            unconverged = sum(r["after_unconverged"] for r in rows)
            move = np.concatenate([r["pse_move"] for r in rows] + [[np.nan]])
            gain = np.concatenate([r["gain"] for r in rows] + [[np.nan]])
            solve_s, esc_s = sum(r["solve_s"] for r in rows), sum(r["escape_s"] for r in rows)
            print(f"| {proc} | {n_trials} | {before} of {n} ({100 * before / n:.2f} %) | {after} ({unconverged}) | "
                  f"{np.nanmedian(move):.2f} / {np.nanmax(move):.2f} | {np.nanmedian(gain):.2f} | "
                  f"{solve_s:.1f} | {esc_s:.1f} ({esc_s / solve_s:.2f}×) | {len(rows)} |", flush=True)


if __name__ == "__main__":
    main()
