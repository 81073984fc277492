"""How long a short command takes from the shell: mostly the imports it makes.

Each row is one whole process, timed from outside (wall clock and CPU seconds
of the child), the median of ``--repeats`` runs: ``--help``; ``check`` and
``simulate`` (one observer) of ``protocols/pilot_short.toml``; ``fit
--bootstrap 0 --no-figures`` of that simulated log.  With ``--baseline DIR``
(another checkout, e.g. ``git archive`` of an older commit) the same rows run
for it too, interleaved run by run, so that old and new see the same load.

Run: ``python benchmarks/bench_startup.py [--baseline DIR] [--repeats 7]``
"""

from __future__ import annotations

import argparse
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _child_cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


def timed(args: list[str], root: Path, cwd: Path) -> tuple[float, float]:
    """Wall and CPU seconds of ``aftershift ARGS`` run from checkout ``root``."""
    env = dict(os.environ, PYTHONPATH=str(root))
    cpu0, t0 = _child_cpu(), time.perf_counter()
    subprocess.run([sys.executable, "-m", "runner.cli", *args], cwd=cwd, env=env, check=True,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - t0, _child_cpu() - cpu0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--baseline", type=Path, help="another checkout to time side by side")
    ap.add_argument("--repeats", type=int, default=7)
    args = ap.parse_args()
    roots = [("new", ROOT)] + ([("old", args.baseline.resolve())] if args.baseline else [])
    protocol = str(ROOT / "protocols" / "pilot_short.toml")
    print(f"# {os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f} at start; median of {args.repeats} runs")
    print("| checkout | command | wall s | CPU s |")
    print("|---|---|---|---|")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        subprocess.run([sys.executable, "-m", "runner.cli", "simulate", protocol, "--out", str(tmp / "logs"),
                        "--seed", "1"], cwd=ROOT, check=True, stdout=subprocess.DEVNULL)
        log = str(next((tmp / "logs").glob("*.trials.csv")))
        commands = {
            "--help": lambda i: ["--help"],
            "check": lambda i: ["check", protocol],
            "simulate": lambda i: ["simulate", protocol, "--out", str(tmp / f"s{i}"), "--seed", "1"],
            "fit --bootstrap 0 --no-figures": lambda i: ["fit", log, "--out", str(tmp / f"f{i}"), "--bootstrap", "0",
                                                         "--no-figures"],
        }
        times: dict[tuple[str, str], list[tuple[float, float]]] = {}
        for i in range(args.repeats):
            for name, make in commands.items():
                for tag, root in roots:
                    times.setdefault((tag, name), []).append(timed(make(f"{tag}{i}"), root, tmp))
        for name in commands:
            for tag, _ in roots:
                runs = times[(tag, name)]
                wall = statistics.median(w for w, _ in runs)
                cpu = statistics.median(c for _, c in runs)
                print(f"| {tag} | `{name}` | {wall:.2f} | {cpu:.2f} |")
    print(f"# load average {os.getloadavg()[0]:.1f} at the end")


if __name__ == "__main__":
    main()
