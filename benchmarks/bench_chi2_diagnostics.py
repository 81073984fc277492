"""Why compare's χ² rejects the truth too often: the shift errors of simulated observers, diagnosed.

Simulates observers through the real engine (``simulate`` → trial log →
``fit``, as ``bench_coverage.py`` does), keeps each observer's fitted
shifts, their bootstrap replicates, the observed-information (inverse
Hessian, delta method) covariance of the joint fit and the true shifts,
and prints:

* the mean squared standardised error ``(est - truth)^2 / var`` per shift
  with the bootstrap and with the observed-information variances (1 when a
  variance is right; Efron & Hinkley 1978 argue for observed information),
  and the median ratio of the two variances;
* the same in the whitened coordinates of the bootstrap covariance, by
  eigenvalue (smallest first), which shows where the covariance is short;
* excess kurtosis of the standardised and whitened errors (0 for normal);
* the Hartlap-scaled χ² against χ²_n quantiles (a QQ summary) and the
  rejection rate of each candidate reference, with Monte Carlo errors;
* the GLS gain's standardised error ``(g - 1) / se`` (variance 1 when the
  covariance is right along the predictions).

Run: ``python benchmarks/bench_chi2_diagnostics.py --trials 24 --groups 16 --observers 4 --boot 400``
(``--rerun`` for the bootstrap that re-runs the tracks; ``--save FILE`` / ``--load FILE`` keep the
simulated fits for another look).
"""

from __future__ import annotations

import argparse
import pickle
import sys
import tempfile
from pathlib import Path

import numpy as np
from scipy import stats

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

from bench_coverage import (observed_information_covariance, observer_truth, protocol_text,  # noqa: E402
                            simulate_group)
from fitting.report import fit_logs  # noqa: E402
from runner.observers import load_model  # noqa: E402
from runner.replay import track_factories  # noqa: E402
from scratch import pool_map, scratch_folder  # noqa: E402


def one(args) -> list[dict]:
    """Simulate and fit one group; per observer: estimate, replicates, observed-information cov, truth."""
    text, n_obs, seed, n_boot, rerun = args
    model = load_model(str(ROOT / "protocols" / "observers" / "typical.toml"))
    out = []
    with tempfile.TemporaryDirectory() as tmp:
        logs, models, offsets, lags = simulate_group(text, model, n_obs, seed, Path(tmp))
        report = fit_logs(logs, str(Path(tmp) / "fit"), n_boot=n_boot, seed=seed, progress=False, figures=False,
                          tracks=track_factories(logs) if rerun else None)
        for i, a in enumerate(report.analyses):
            truth = observer_truth(models[i], offsets, lags)["shift"]
            ae = a.aftereffect
            out.append({"est": ae["pse_shift_deg"].to_numpy(float), "reps": a.curves["shift_reps"],
                        "truth": np.array([truth[(float(lag), float(o))] for lag, o in
                                           zip(ae["lag"], ae["adapter_offset_deg"])]),
                        "oi": observed_information_covariance(a),
                        "flags": list(ae["flags"])})
    return out


def _rate(pvalues) -> str:
    pv = np.asarray(pvalues, float)
    r = float(np.mean(pv < 0.05))
    return f"{100 * r:.1f} ± {100 * np.sqrt(r * (1 - r) / pv.size):.1f} % ({pv.size})"


def diagnose(res: list[dict]) -> None:
    n = res[0]["est"].size
    zb, zo, white, chi2, gain_z, ratio = [], [], [], [], [], []
    for r in res:
        e = r["est"] - r["truth"]
        reps = r["reps"]
        cov = np.cov(reps, rowvar=False)
        h = (reps.shape[0] - n - 2) / (reps.shape[0] - 1)          # Hartlap et al. (2007)
        zb.append(e / np.sqrt(np.diagonal(cov)))
        if r["oi"] is not None:
            zo.append(e / np.sqrt(np.diagonal(r["oi"])))
            ratio.append(np.mean(np.diagonal(r["oi"]) / np.diagonal(cov)))
        vals, vecs = np.linalg.eigh(cov)
        white.append((vecs.T @ e) / np.sqrt(vals))
        chi2.append(h * e @ np.linalg.solve(cov, e))
        vinv = h * np.linalg.inv(cov)
        p = r["truth"]
        spp = p @ vinv @ p
        gain_z.append((p @ vinv @ r["est"] / spp - 1.0) * np.sqrt(spp))
    zb, white, chi2 = np.array(zb), np.array(white), np.array(chi2)
    sep = np.mean([any("separated" in f for f in r["flags"]) for r in res])
    print(f"observers {len(res)}, shifts {n}, replicates {res[0]['reps'].shape[0]}; "
          f"observers with a separated condition {100 * sep:.0f} %")
    print(f"mean z^2 per shift: bootstrap {np.mean(zb ** 2):.3f} (per-shift range "
          f"{np.mean(zb ** 2, 0).min():.2f}-{np.mean(zb ** 2, 0).max():.2f}); observed information "
          f"{np.mean(np.array(zo) ** 2):.3f} ({len(zo)} observers with all PSEs estimable); "
          f"median variance ratio observed information / bootstrap {np.median(ratio):.2f}")
    quarters = np.array_split(np.arange(n), 4)
    print("whitened variance by eigenvalue quarter (smallest first): "
          + ", ".join(f"{np.mean(white[:, q] ** 2):.2f}" for q in quarters))
    print(f"excess kurtosis: standardised {stats.kurtosis(zb.ravel()):.2f}, whitened {stats.kurtosis(white.ravel()):.2f}")
    qs = (0.5, 0.9, 0.95)
    print("Hartlap chi2 quantiles " + ", ".join(f"{100 * q:.0f} %: {np.quantile(chi2, q):.1f} (chi2_{n} "
                                                 f"{stats.chi2.ppf(q, n):.1f})" for q in qs)
          + f"; mean chi2/df {np.mean(chi2) / n:.3f}")
    print(f"rejections at 5 %: Hartlap chi2 {_rate(stats.chi2.sf(chi2, n))}")
    gz = np.array(gain_z)
    print(f"GLS gain (g - 1) / se with V known: mean {gz.mean():+.2f}, variance {gz.var():.2f}, "
          f"|.| < 1.96 in {100 * np.mean(np.abs(gz) < 1.96):.0f} %")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--trials", type=int, default=24, help="trials per condition")
    ap.add_argument("--procedure", default="updown")
    ap.add_argument("--groups", type=int, default=16)
    ap.add_argument("--observers", type=int, default=4, help="observers per simulated group")
    ap.add_argument("--boot", type=int, default=400)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--rerun", action="store_true", help="bootstrap that re-runs the tracks")
    ap.add_argument("--save")
    ap.add_argument("--load")
    args = ap.parse_args()
    if args.load:
        with open(args.load, "rb") as fh:
            res = pickle.load(fh)
    else:
        text = protocol_text(str(ROOT / "protocols" / "offset_by_lag.toml"), args.trials, args.procedure)
        jobs = [(text, args.observers, 5000 + g, args.boot, args.rerun) for g in range(args.groups)]
        res = [o for group in pool_map(one, jobs, args.jobs) for o in group]
        if args.save:
            with open(args.save, "wb") as fh:
                pickle.dump(res, fh)
    diagnose(res)


if __name__ == "__main__":
    try:
        with scratch_folder():
            main()
    except KeyboardInterrupt:
        sys.exit("bench_chi2_diagnostics: interrupted; it writes no files, so nothing is lost")
