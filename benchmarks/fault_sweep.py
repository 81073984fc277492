"""A by-hand sweep of random faults: how many cases end clean.

Not a speed benchmark: it counts.  Each case starts ``simulate`` of
``protocols/offset_by_lag.toml`` (one observer, seed 5) as a real process and
then, at an instant drawn uniformly from the whole run (interpreter start,
imports, header and sidecar writes and trials alike):

* ``kill``: SIGKILL, then ``simulate --resume``;
* ``term``: SIGTERM, then ``simulate --resume``;
* ``race``: a second ``simulate`` (fresh or ``--resume``, alternately), then
  ``--resume`` if the session is not complete.

* ``plan``: Ctrl-C to the whole process group of ``plan`` (``protocols/pilot_short.toml``,
  ``--runs 4``: 12 tasks on local worker processes), then ``plan`` again.

A case is clean when every command either succeeded or failed with exit 2 /
130 and exactly one line on stderr (notes and warnings allowed on success;
a process killed by the signal itself, which SIGTERM does while the
interpreter is still starting, says nothing),
no traceback appeared, no temporary file was left, and the final log equals,
byte for byte, an uninterrupted run with the same seed. For ``plan``: no
process of the group is left once the command has ended (stderr reaches its
end within 60 s), and the second ``plan``'s ``plan.csv`` equals an
uninterrupted run's.

Run: ``python benchmarks/fault_sweep.py [--cases 30] [--seed 1] [--plan 10]`` (cases per kind).
"""

from __future__ import annotations

import argparse
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
PROTOCOL = ROOT / "protocols" / "offset_by_lag.toml"
PILOT = ROOT / "protocols" / "pilot_short.toml"
ARGS = ["--observers", "1", "--seed", "5"]
ENV = {**os.environ, "PYTHONPATH": str(ROOT)}


def _cmd(out: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "runner.cli", "simulate", str(PROTOCOL), "--out", str(out), *ARGS, *extra]


def _start(out: Path, *extra: str) -> subprocess.Popen:
    return subprocess.Popen(_cmd(out, *extra), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                            env=ENV, cwd=ROOT)


def _problems(code: int, err: str, ok=(0, 2, 130)) -> list[str]:
    lines = err.strip().splitlines()
    found = []
    if code not in ok:
        found.append(f"exit {code}")
    if "Traceback" in err:
        found.append("traceback")
    if code != 0 and len(lines) != 1:
        found.append(f"{len(lines)} lines on stderr")
    if code == 0 and any(not ln.startswith(("note:", "warning:")) for ln in lines):
        found.append("unexpected stderr")
    return found


def _plan(out: Path) -> list[str]:
    return [sys.executable, "-m", "runner.cli", "plan", str(PILOT), "--runs", "4", "--out", str(out)]


def plan_case(at: float, n: int, reference: bytes, work: Path) -> list[str]:
    out = work / f"plan{n}"
    # a session of its own, so that the signal reaches the workers too, as a terminal's Ctrl-C does
    first = subprocess.Popen(_plan(out), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                             env=ENV, cwd=ROOT, start_new_session=True)
    time.sleep(at)
    if first.poll() is None:
        os.killpg(first.pid, signal.SIGINT)
    problems = []
    try:
        err = first.communicate(timeout=60)[1]      # ends when every process holding stderr has ended
    except subprocess.TimeoutExpired:
        os.killpg(first.pid, signal.SIGKILL)
        err = first.communicate()[1]
        problems.append("a process of the group still running 60 s later")
    # -SIGINT: ended by the signal itself, as Python does after a Ctrl-C inside code it ran through eval
    # (e.g. a namedtuple made while modules load) even when the one line was written; a shell reports 130
    problems += _problems(130 if first.returncode == -signal.SIGINT else first.returncode, err)
    done = subprocess.run(_plan(out), capture_output=True, text=True, env=ENV, cwd=ROOT)
    problems += _problems(done.returncode, done.stderr, ok=(0,))
    if not (out / "plan.csv").is_file() or (out / "plan.csv").read_bytes() != reference:
        problems.append("plan.csv differs from the uninterrupted run")
    # tasks/.lock stays: it is the lock file that keeps a second `plan` out of the folder
    if [p for p in out.rglob("*") if p.name != ".lock" and (p.name.startswith(".") or p.name.endswith(".tmp"))]:
        problems.append("temporary file left")
    return problems


def _logs(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.glob("*.trials.csv"))}


def one_case(kind: str, at: float, n: int, reference: dict, work: Path) -> list[str]:
    out = work / f"{kind}{n}"
    problems = []
    first = _start(out)
    time.sleep(at)
    if kind == "race":
        second = _start(out, *(["--resume"] if n % 2 else []))
        for proc in (first, second):
            proc.wait()
            problems += _problems(proc.returncode, proc.stderr.read())
    else:
        if first.poll() is None:
            first.send_signal(signal.SIGKILL if kind == "kill" else signal.SIGTERM)
        first.wait()
        err = first.stderr.read()
        if first.returncode >= 0:  # a signal before the handler is installed (interpreter start) just kills
            problems += _problems(first.returncode, err, ok=(0, 130))
    done = subprocess.run(_cmd(out, "--resume"), capture_output=True, text=True, env=ENV, cwd=ROOT)
    problems += _problems(done.returncode, done.stderr, ok=(0,))
    if _logs(out) != reference:
        problems.append("log differs from the uninterrupted run")
    if any(p.name.endswith(".tmp") for p in out.iterdir()):
        problems.append("temporary file left")
    return problems


def _tally(kind: str, cases: int, case) -> int:
    """Run ``case(n)`` for n < ``cases``, print the kind's line (problems counted by kind); return the clean ones."""
    bad: dict[str, int] = {}
    kind_clean = 0
    for n in range(cases):
        found = case(n)
        for f in found:
            bad[f] = bad.get(f, 0) + 1
        kind_clean += not found
    print(f"{kind:<6}{cases:>7}{kind_clean:>7}  {bad or 'none'}")
    return kind_clean


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cases", type=int, default=30, help="cases per kind (default 30)")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--plan", type=int, default=10, metavar="N",
                        help="Ctrl-C cases of `plan` (default 10; 0 skips them)")
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        t0 = time.perf_counter()
        subprocess.run(_cmd(work / "whole"), check=True, capture_output=True, env=ENV, cwd=ROOT)
        span = time.perf_counter() - t0
        reference = _logs(work / "whole")
        print(f"uninterrupted run: {span:.2f} s; instants drawn uniformly in [0, {1.1 * span:.2f}] s")
        print(f"{'kind':<6}{'tried':>7}{'clean':>7}  problems")
        total = clean = 0
        for kind in ("kill", "term", "race"):
            clean += _tally(kind, args.cases, lambda n: one_case(kind, float(rng.uniform(0, 1.1 * span)), n,
                                                                 reference, work))
            total += args.cases
        if args.plan:
            t0 = time.perf_counter()
            subprocess.run(_plan(work / "plan_whole"), check=True, capture_output=True, env=ENV, cwd=ROOT)
            span = time.perf_counter() - t0
            reference = (work / "plan_whole" / "plan.csv").read_bytes()
            print(f"uninterrupted plan: {span:.2f} s; Ctrl-C instants drawn uniformly in [0, {1.1 * span:.2f}] s")
            clean += _tally("plan", args.plan, lambda n: plan_case(float(rng.uniform(0, 1.1 * span)), n,
                                                                   reference, work))
            total += args.plan
        print(f"all   {total:>7}{clean:>7}")


if __name__ == "__main__":
    main()
