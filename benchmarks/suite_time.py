"""Where the test suite's time goes: wall and CPU of every test, with its child processes.

Two uses:

* as a pytest plugin, loaded into the suite's run, it appends one JSON line
  per test to ``SUITE_TIME_DIR/<pid>.jsonl``: the test's wall time and the
  CPU time of the worker process and of the child processes it waited for
  (command-line runs; a worker pool's processes are counted only when their
  parent waits for them, so pools are undercounted);
* as a script, it sums those lines: totals, the longest tests, the files.

Commands (repository root)::

    rm -rf /tmp/suite_time; SUITE_TIME_DIR=/tmp/suite_time PYTHONPATH=benchmarks python -m pytest -q -p suite_time
    python benchmarks/suite_time.py /tmp/suite_time [--top 40]
"""

from __future__ import annotations

import argparse
import collections
import json
import os
import resource
import time
from pathlib import Path

import pytest


def _cpu() -> tuple[float, float]:
    own, children = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime, children.ru_utime + children.ru_stime


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_protocol(item, nextitem):  # noqa: ARG001 - pytest's hook signature
    """Time one test (set-up, call and tear-down) and append its line."""
    folder = Path(os.environ.get("SUITE_TIME_DIR", "suite_time"))
    start, (own, children) = time.monotonic(), _cpu()
    yield
    end, (own2, children2) = time.monotonic(), _cpu()
    folder.mkdir(parents=True, exist_ok=True)
    with open(folder / f"{os.getpid()}.jsonl", "a", encoding="utf-8") as f:
        f.write(json.dumps({"test": item.nodeid, "wall": end - start, "own_cpu": own2 - own,
                            "child_cpu": children2 - children}) + "\n")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("folder", type=Path, help="SUITE_TIME_DIR of the run")
    parser.add_argument("--top", type=int, default=30, help="longest tests shown (default 30)")
    args = parser.parse_args()
    rows = [json.loads(line) for f in sorted(args.folder.glob("*.jsonl")) for line in f.open(encoding="utf-8")]
    if not rows:
        raise SystemExit(f"{args.folder}: no test times (run the suite with -p suite_time first)")
    wall = sum(r["wall"] for r in rows)
    own, child = sum(r["own_cpu"] for r in rows), sum(r["child_cpu"] for r in rows)
    print(f"{len(rows)} tests over {len(list(args.folder.glob('*.jsonl')))} worker processes: {wall:.0f} "
          f"worker-seconds; CPU {own:.0f} s in the test processes, {child:.0f} s in the children they waited for; "
          f"{wall - own - child:.0f} s neither (waiting for frames, for the other core, or uncounted pools)")
    rows.sort(key=lambda r: -r["wall"])
    print(f"\nthe {args.top} longest tests ({sum(r['wall'] for r in rows[:args.top]):.0f} worker-seconds):")
    print(f"{'wall':>7} {'own CPU':>8} {'children':>9}  test")
    for r in rows[:args.top]:
        print(f"{r['wall']:7.1f} {r['own_cpu']:8.1f} {r['child_cpu']:9.1f}  {r['test']}")
    files = collections.defaultdict(lambda: [0.0, 0.0, 0])
    for r in rows:
        f = files[r["test"].split("::")[0]]
        f[0] += r["wall"]
        f[1] += r["own_cpu"] + r["child_cpu"]
        f[2] += 1
    print("\nby file:")
    for name, (w, c, n) in sorted(files.items(), key=lambda kv: -kv[1][0]):
        print(f"{w:7.1f} s wall {c:7.1f} s CPU {n:5d} tests  {name}")


if __name__ == "__main__":
    main()
