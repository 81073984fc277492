"""Handing out study tasks: speed-up from 1 to 2 local workers, and the cost per task of the Dask path.

1. Speed-up. ``--tasks`` real study tasks (one simulated session of the
   bundled ``protocols/offset_by_lag.toml``, fitted with ``--boot`` bootstrap
   replicates: what ``plan`` and ``recover`` run) through
   :class:`runner.workpool.LocalPool` with 1 worker (in this process) and with
   2 worker processes, start-up of the worker processes included. Target:
   close to 2× on two free cores.
2. Overhead per task. Tasks that do almost nothing (``math.sqrt``) through
   the local pool with 2 processes and through a Dask cluster of a scheduler
   and 2 single-thread workers started here on 127.0.0.1 (no other address is
   used). Overhead per task = time from the first result to the last / (tasks − 1):
   the hand-out cost without start-up.
3. The real tasks of (1) on the Dask cluster, for the end-to-end comparison.
4. Control: a loop in C (``sum`` over a range, no Python work, no imports)
   on 1 and 2 local processes: the speed-up the machine itself allows at
   that moment. On a shared machine (other users' processes, the kernel's
   per-session CPU sharing) it can be far below 2×, and no pool can beat it.

The machine is shared: the load average is printed beside the numbers.

Run: ``python benchmarks/bench_workpool.py [--tasks 24] [--boot 200] [--trivial 400]``
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runner.observers import ObserverModel  # noqa: E402
from runner.protocol import load_protocol  # noqa: E402
from runner.study import StudySettings, expand_designs, make_task, run_session_task  # noqa: E402
from runner.workpool import ClusterPool, LocalPool  # noqa: E402

PROTOCOL = ROOT / "protocols" / "offset_by_lag.toml"


def timed(pool, fn, tasks: dict) -> tuple[float, float]:
    """Wall seconds to run every task through ``pool``, and from the first result to the last."""
    t0 = time.perf_counter()
    first = None
    for _ in pool.map_unordered(fn, tasks):
        first = first or time.perf_counter()
    end = time.perf_counter()
    return end - t0, end - first


def start_cluster(folder: Path) -> tuple[str, list[subprocess.Popen]]:
    """A scheduler and two single-thread workers on 127.0.0.1."""
    info = folder / "scheduler.json"
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    quiet = {"stdout": subprocess.DEVNULL, "stderr": subprocess.DEVNULL, "env": env, "cwd": ROOT}
    procs = [subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1",
                               "--port", "0", "--no-dashboard", "--scheduler-file", str(info)], **quiet)]
    while not info.exists():
        time.sleep(0.1)
    address = json.loads(info.read_text())["address"]
    procs += [subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_worker", address, "--host", "127.0.0.1",
                                "--nthreads", "1", "--no-nanny", "--no-dashboard"], **quiet) for _ in range(2)]
    return address, procs


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--tasks", type=int, default=24)
    ap.add_argument("--boot", type=int, default=200)
    ap.add_argument("--trivial", type=int, default=400)
    args = ap.parse_args()
    [design] = expand_designs(load_protocol(PROTOCOL), ObserverModel())
    settings = StudySettings(runs=args.tasks, n_boot=args.boot)
    real = {str(r): make_task(design, r, settings) for r in range(args.tasks)}
    trivial = {str(i): float(i) for i in range(args.trivial)}
    print(f"# {os.cpu_count()} CPUs, {len(os.sched_getaffinity(0))} usable; load average "
          f"{os.getloadavg()[0]:.1f} at start")

    loops = {str(i): range(30_000_000) for i in range(2 * args.tasks // 3)}
    loop_one, _ = timed(LocalPool(1), sum, loops)
    loop_two, _ = timed(LocalPool(2), sum, loops)
    cpu0, wall0 = time.process_time(), time.perf_counter()
    one, _ = timed(LocalPool(1), run_session_task, real)
    share = (time.process_time() - cpu0) / (time.perf_counter() - wall0)
    two, two_after_first = timed(LocalPool(2), run_session_task, real)
    local_start, local_rest = timed(LocalPool(2), math.sqrt, trivial)

    with tempfile.TemporaryDirectory() as tmp:
        address, procs = start_cluster(Path(tmp))
        try:
            cluster = ClusterPool(address)
            while len(cluster.client.scheduler_info()["workers"]) < 2:
                time.sleep(0.1)
            dask_start, dask_rest = timed(cluster, math.sqrt, trivial)
            timed(cluster, run_session_task, {"warm": real["0"]})  # workers import the fitting code once
            dask_real, _ = timed(cluster, run_session_task, {f"r{k}": v for k, v in real.items()})
            cluster.close()
        finally:
            for p in procs:
                p.kill()
                p.wait()
    local_per, dask_per = local_rest / (args.trivial - 1), dask_rest / (args.trivial - 1)

    print("| what | workers | tasks | wall s | per task | ratio |")
    print("|---|---|---|---|---|---|")
    print(f"| control: a C loop (sum of a range), local | 1 (in process) | {len(loops)} | {loop_one:.1f} | "
          f"{loop_one / len(loops):.2f} s | 1.00 |")
    print(f"| control: a C loop (sum of a range), local | 2 processes | {len(loops)} | {loop_two:.1f} | "
          f"{loop_two / len(loops):.2f} s | speed-up {loop_one / loop_two:.2f}× |")
    print(f"| real study tasks, local | 1 (in process) | {args.tasks} | {one:.1f} | {one / args.tasks:.2f} s | 1.00 |")
    print(f"| real study tasks, local | 2 processes | {args.tasks} | {two:.1f} | {two / args.tasks:.2f} s | "
          f"speed-up {one / two:.2f}× |")
    print(f"| real study tasks, Dask | 2 workers (warm) | {args.tasks} | {dask_real:.1f} | "
          f"{dask_real / args.tasks:.2f} s | speed-up {one / dask_real:.2f}× |")
    print(f"| trivial tasks, local | 2 processes | {args.trivial} | {local_start:.2f} | "
          f"{1000 * local_per:.2f} ms | 1.00 |")
    print(f"| trivial tasks, Dask | 2 workers | {args.trivial} | {dask_start:.2f} | "
          f"{1000 * dask_per:.2f} ms | {dask_per / local_per:.1f}× local |")
    print(f"# 2 local processes: {two - two_after_first:.1f} s to the first result (start-up + one task); "
          f"the in-process run got {share:.2f} CPU s per wall s")
    print("# the control rows show how much of a second core this shared machine gives right now: the study "
          "tasks cannot speed up more than the C loop does")
    print("# per task of trivial tasks: time from the first result to the last / (tasks - 1), i.e. the hand-out "
          "cost without start-up; wall s includes starting the local processes (the Dask workers already run)")
    print(f"# load average {os.getloadavg()[0]:.1f} at the end")


if __name__ == "__main__":
    main()
