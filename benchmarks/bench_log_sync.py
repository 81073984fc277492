"""What simulated observers save by not syncing every row to disk.

Side by side, in one run, on the same disk: ``simulate`` of the default
protocol (``protocols/offset_by_lag.toml``) with

A. a person's durability: every row written and synced (fsync) before the
   next trial;
B. a simulated observer's: every row written at once (a killed process
   loses nothing), synced only at breaks and at the end.

The two are run alternately (A, B, A, B, ...) and the median wall time of
each is reported with the ratio A / B.  Both must write the same bytes.
Target (issue 14): B faster than A; the ratio is reported as measured.

Run: ``python benchmarks/bench_log_sync.py [--observers 3] [--repeats 5] [--dir PATH]``
(``--dir`` chooses the disk; tmpfs makes fsync free and the ratio ~1).
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from runner.launch import simulate  # noqa: E402
from runner.observers import ObserverModel  # noqa: E402
from runner.protocol import parse_protocol, read_protocol_text  # noqa: E402

PROTOCOL = ROOT / "protocols" / "offset_by_lag.toml"


def one_run(folder: Path, observers: int, sync_every_row: bool) -> tuple[float, dict[str, bytes]]:
    text = read_protocol_text(PROTOCOL)
    protocol = parse_protocol(text, source=str(PROTOCOL))
    t0 = time.perf_counter()
    paths = simulate(protocol, str(PROTOCOL), text, folder, ObserverModel(), observers, 7, progress=False,
                     sync_every_row=sync_every_row)
    seconds = time.perf_counter() - t0
    return seconds, {p.name: p.read_bytes() for p in paths}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--observers", type=int, default=3)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--dir", default=str(ROOT / "benchmarks"), help="where the logs are written (a real disk)")
    args = parser.parse_args()
    times = {True: [], False: []}
    reference = None
    rows = 0
    for i in range(args.repeats):
        for sync in (True, False):
            folder = Path(tempfile.mkdtemp(prefix=".bench-sync-", dir=args.dir))
            try:
                seconds, logs = one_run(folder, args.observers, sync)
            finally:
                shutil.rmtree(folder)
            reference = reference or logs
            assert logs == reference, "per-trial sync and flush-only wrote different logs"
            rows = sum(v.count(b"\n") - 1 for v in logs.values())
            times[sync].append(seconds)
    a, b = statistics.median(times[True]), statistics.median(times[False])
    print(f"simulate {PROTOCOL.name}, {args.observers} observers, {rows} rows, {args.repeats} alternating repeats, "
          f"logs in {args.dir}")
    print(f"A  fsync every row (people)              : {a:6.3f} s median  ({1000 * a / rows:.3f} ms per row)")
    print(f"B  write every row, sync at breaks + end : {b:6.3f} s median  ({1000 * b / rows:.3f} ms per row)")
    print(f"ratio A / B: {a / b:.1f} x   (identical logs: yes)")


if __name__ == "__main__":
    main()
