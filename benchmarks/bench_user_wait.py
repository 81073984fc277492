"""Speed where the user waits: every row of issue 14's table, side by side in one run.

Rows (each a whole process, timed from outside: wall clock and CPU seconds of
the child processes):

1. ``fit --bootstrap 2000`` on 25 conditions x 80 trials of one simulated
   session (with its sidecar, so the default pilot re-runs the tracks) with
   figures (the default: PNG), with ``--pdf`` and with ``--no-figures``, against the statsmodels probit-GLM
   refit loop on the same data (``bench_bootstrap.statsmodels_per_replicate``,
   timed on a part of the replicates and scaled; it is linear in them).
   Target: with figures >= 30 x the loop.
2. ``aftershift demo`` (simulate 3 observers, fit with 1,000 replicates and
   figures, compare, report).  Target: <= 10 s on 2 cores.
3. ``fit --bootstrap 2000 --no-figures`` on 100 conditions x 80 trials: CPU
   time / wall time (target <= 1.2) and the speed-up over the statsmodels loop
   (target >= 60 x).
4. ``simulate`` of the default protocol (3 observers) as it is, and with
   ``os.fsync`` replaced by a no-op in the child (the floor without per-trial
   sync).  The sync policy itself belongs to ``runner/trial_log.py``.
5. PSE efficiency of the protocol's default tracks at 80 trials, true PSE
   uniform in +-5 deg, lapse 0 and 4 % (``bench_default_tracks.py``, fewer runs).
6. With ``--tests``: the quick test subset and the whole suite, wall clock.
7. With ``--chunks``: the fit of rows 1 and 3 in this process (``fit_trials``,
   no files) at several sizes of the bootstrap's chunks
   (``fitting.bootstrap.CHUNK_CELLS``), and whether the tables stay the same.
8. With ``--heap``: rows 1 and 3 of this checkout again with
   ``fitting.heap.arrays_on_the_heap`` a no-op in the child (glibc's own
   malloc thresholds), beside the same rows as they are.

``--baseline DIR`` runs rows 1-4 with another checkout of the project as
well (e.g. the commit before a change, unpacked with ``git archive``), so old
and new numbers come from the same run on the same machine load.

Run: ``python benchmarks/bench_user_wait.py [--baseline DIR] [--tests] [--quick] [--chunks] [--heap]``
"""

from __future__ import annotations

import argparse
import os
import re
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "benchmarks"))

import numpy as np  # noqa: E402

from bench_bootstrap import statsmodels_per_replicate  # noqa: E402

OFFSETS_25 = (-90, -60, -30, -15, 15, 30, 60, 90)
OFFSETS_100 = tuple(float(v) for v in np.linspace(-96, 96, 34)[:33])  # 33 offsets (no 0) x 3 lags + baseline


def _child_cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


def timed(cmd, root: Path, env_extra=None) -> tuple[float, float]:
    """Wall and CPU seconds of one child process run in ``root`` with ``root`` on PYTHONPATH."""
    env = dict(os.environ, PYTHONPATH=str(root), **(env_extra or {}))
    cpu0, t0 = _child_cpu(), time.perf_counter()
    subprocess.run(cmd, cwd=root, env=env, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t0, _child_cpu() - cpu0


def fit_cmd(log: Path, out: Path, replicates: int, figures: bool, *extra: str) -> list[str]:
    cmd = [sys.executable, "-m", "runner.cli", "fit", str(log), "--out", str(out), "--bootstrap",
           str(replicates), "--seed", "1", *extra]
    return cmd + ([] if figures else ["--no-figures"])


NO_SYNC = ("import os, runpy, sys; os.fsync = lambda fd: None; sys.argv = ['aftershift'] + sys.argv[1:]; "
           "runpy.run_module('runner.cli', run_name='__main__')")


NO_HEAP = ("import runpy, sys, fitting.heap; fitting.heap.arrays_on_the_heap = lambda: False; "
           "sys.argv = ['aftershift'] + sys.argv[1:]; runpy.run_module('runner.cli', run_name='__main__')")


def simulate_cmd(root: Path, out: Path, sync: bool) -> list[str]:
    args = ["simulate", str(root / "protocols" / "offset_by_lag.toml"), "--out", str(out), "--observers", "3",
            "--seed", "1", "--model", str(root / "protocols" / "observers" / "typical.toml")]
    return [sys.executable, "-m", "runner.cli", *args] if sync else [sys.executable, "-c", NO_SYNC, *args]


def log_with(tmp: Path, name: str, offsets) -> Path:
    """One simulated session (``simulate``, so with its sidecar: `fit`'s default pilot re-runs its tracks)."""
    text = (ROOT / "protocols" / "offset_by_lag.toml").read_text(encoding="utf-8")
    text = re.sub(r"(?m)^adapter_offsets_deg\s*=.*$", f"adapter_offsets_deg = {[float(o) for o in offsets]}", text)
    text = re.sub(r"(?m)^lags\s*=.*$", "lags = [0, 1, 2]", text)
    text = re.sub(r"(?m)^trials_per_track\s*=.*$", "trials_per_track = 40", text)
    protocol = tmp / f"{name}.toml"
    protocol.write_text(text, encoding="utf-8")
    subprocess.run([sys.executable, "-m", "runner.cli", "simulate", str(protocol), "--out", str(tmp / name),
                    "--observers", "1", "--seed", "1"], cwd=ROOT, check=True, stdout=subprocess.DEVNULL)
    return next((tmp / name).glob("*.trials.csv"))


def chunk_table(logs: dict[str, Path], sizes=(500_000, 200_000, 100_000, 50_000)) -> list[str]:
    """``fit_trials`` (2,000 replicates, re-run pilot) at each chunk size, best of two, per log."""
    import fitting.bootstrap
    from fitting.report import fit_trials, read_logs
    from runner.replay import track_factories

    lines = ["| log | cells per chunk | replicates per chunk | fit s (best of 2) | tables as at the first size |",
             "|---|---|---|---|---|"]
    default = fitting.bootstrap.CHUNK_CELLS
    try:
        for name, log in logs.items():
            trials = read_logs([str(log)], False, False)
            first = None
            for size in sizes:
                fitting.bootstrap.CHUNK_CELLS = size
                best = np.inf
                for _ in range(2):
                    t0 = time.perf_counter()
                    report = fit_trials(trials, 2000, 1, progress=False, tracks=track_factories([str(log)], strict=False),
                                        track_use="pilot")
                    best = min(best, time.perf_counter() - t0)
                tables = [report.pse.to_csv(), report.aftereffect.to_csv(), report.tuning.to_csv()]
                first = first or tables
                cells = report.analyses[0].fit.cells.x.size
                mark = " (default)" if size == default else ""
                lines.append(f"| {name} | {size:,}{mark} | {max(50, size // cells)} | {best:.2f} | "
                             f"{'same' if tables == first else 'DIFFERENT'} |")
    finally:
        fitting.bootstrap.CHUNK_CELLS = default
    return lines


def row(label, wall, cpu, extra="") -> str:
    return f"| {label} | {wall:.2f} | {cpu:.2f} | {cpu / wall:.2f} | {extra} |"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--baseline", type=Path, help="another checkout to time side by side")
    ap.add_argument("--tests", action="store_true", help="also time the quick test subset and the whole suite")
    ap.add_argument("--quick", action="store_true", help="fewer statsmodels replicates and efficiency runs")
    ap.add_argument("--replicates", type=int, default=2000)
    ap.add_argument("--chunks", action="store_true", help="also time the fit at several bootstrap chunk sizes")
    ap.add_argument("--heap", action="store_true", help="also time the fit with glibc's own malloc thresholds")
    args = ap.parse_args()
    roots = [("new", ROOT)] + ([("old", args.baseline.resolve())] if args.baseline else [])
    n_sm25, n_sm100, runs = (40, 10, 100) if args.quick else (100, 25, 300)
    print(f"# {os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f} at start")
    print("| what | wall s | CPU s | CPU/wall | notes |")
    print("|---|---|---|---|---|")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        log25, log100 = log_with(tmp, "C25", OFFSETS_25), log_with(tmp, "C100", OFFSETS_100)
        timed(fit_cmd(log25, tmp / "warm", 10, False), ROOT)            # warm the file cache
        wall_sm25, cpu_sm25 = statsmodels_per_replicate(log25, n_sm25)
        loop25, loop25_cpu = (v * args.replicates / n_sm25 for v in (wall_sm25, cpu_sm25))
        wall_sm100, cpu_sm100 = statsmodels_per_replicate(log100, n_sm100)
        loop100, loop100_cpu = (v * args.replicates / n_sm100 for v in (wall_sm100, cpu_sm100))
        print(row(f"statsmodels loop, 25 conditions x {args.replicates} replicates", loop25, loop25_cpu,
                  f"measured on {n_sm25}, scaled"))
        print(row(f"statsmodels loop, 100 conditions x {args.replicates} replicates", loop100, loop100_cpu,
                  f"measured on {n_sm100}, scaled"))
        for tag, root in roots:
            # code from before `fit --pdf` existed wrote PNG + PDF by default; since then PNG only
            formats = "PNG" if "--pdf" in (root / "runner" / "cli.py").read_text(encoding="utf-8") else "PNG + PDF"
            w, c = timed(fit_cmd(log25, tmp / f"{tag}25f", args.replicates, True), root)
            print(row(f"{tag}: fit 25 conditions, default figures ({formats})", w, c,
                      f"{loop25 / w:.1f} x the loop wall, {loop25_cpu / c:.1f} x CPU (target >= 30 x)"), flush=True)
            if tag == "new":
                w, c = timed(fit_cmd(log25, tmp / f"{tag}25p", args.replicates, True, "--pdf"), root)
                print(row(f"{tag}: fit 25 conditions, --pdf (PNG + PDF)", w, c,
                          f"{loop25 / w:.1f} x the loop wall, {loop25_cpu / c:.1f} x CPU"), flush=True)
            w, c = timed(fit_cmd(log25, tmp / f"{tag}25n", args.replicates, False), root)
            print(row(f"{tag}: fit 25 conditions, --no-figures", w, c,
                      f"{loop25 / w:.1f} x the loop wall, {loop25_cpu / c:.1f} x CPU"), flush=True)
            w, c = timed(fit_cmd(log100, tmp / f"{tag}100", args.replicates, False), root)
            print(row(f"{tag}: fit 100 conditions, --no-figures", w, c,
                      f"{loop100 / w:.1f} x the loop wall, {loop100_cpu / c:.1f} x CPU (target >= 60 x); "
                      "CPU/wall target <= 1.2"), flush=True)
            w, c = timed(fit_cmd(log100, tmp / f"{tag}100t", args.replicates, False), root,
                         {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"})
            print(row(f"{tag}: fit 100 conditions, --no-figures, one BLAS thread", w, c,
                      f"{loop100 / w:.1f} x the loop wall, {loop100_cpu / c:.1f} x CPU"), flush=True)
            w, c = timed([sys.executable, "-m", "runner.cli", "demo", "--out", str(tmp / f"{tag}demo")], root)
            print(row(f"{tag}: aftershift demo", w, c, "target <= 10 s; CPU without the fit's workers (children "
                      "of multiprocessing's fork server, which nobody here waits for)"), flush=True)
            w, c = timed(simulate_cmd(root, tmp / f"{tag}sim", True), root)
            w0, c0 = timed(simulate_cmd(root, tmp / f"{tag}sim0", False), root)
            print(row(f"{tag}: simulate, 3 observers", w, c, f"{w / w0:.2f} x the same without fsync"))
            print(row(f"{tag}: simulate, 3 observers, fsync a no-op", w0, c0, "floor"), flush=True)
        if args.heap:
            for label, log, figures, loop in (("25 conditions, default figures", log25, True, loop25),
                                              ("100 conditions, --no-figures", log100, False, loop100)):
                for kept in (True, False):
                    cmd = fit_cmd(log, tmp / f"heap{kept}{figures}", args.replicates, figures)
                    if not kept:
                        cmd = [sys.executable, "-c", NO_HEAP, *cmd[3:]]
                    w, c = timed(cmd, ROOT)
                    how = "arrays on the heap (as shipped)" if kept else "glibc's own malloc thresholds"
                    print(row(f"new: fit {label}, {how}", w, c, f"{loop / w:.1f} x the loop wall"), flush=True)
        if args.chunks:
            for line in chunk_table({"25 conditions": log25, "100 conditions": log100}):
                print(line, flush=True)
    from bench_default_tracks import efficiency_table
    for line in efficiency_table(runs=runs, seed=1, quick=True):
        print(line, flush=True)
    if args.tests:
        for label, extra in (("quick test subset", ["-m", "not slow and not display"]), ("whole test suite", [])):
            t0 = time.perf_counter()
            subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", *extra], cwd=ROOT,
                           env=dict(os.environ, PYTHONPATH=str(ROOT)), stdout=subprocess.DEVNULL)
            print(f"{label}: {time.perf_counter() - t0:.0f} s wall", flush=True)
    print(f"# load average {os.getloadavg()[0]:.1f} at the end")


if __name__ == "__main__":
    main()
