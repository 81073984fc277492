"""Speed of one trial of the Bayesian entropy track (runner/adaptive.py).

Target: choosing the next level plus updating the posterior takes at most
10 ms per trial on the default grid (121 PSE x 25 spread x 6 lapse points,
121 levels). The run reports both targets ("pse", "pse_spread"), the parts
(select, update), the one-off table build, the replay done by ``restore``
for an 80-trial state, and an up–down track's trial for scale, with the
ratios side by side. Times are CPU time of this process
(``time.process_time``, all threads), so that other work on a shared
machine does not inflate them.

Last, copies stepped together (``runner/adaptive_batch.py``, the bootstrap
pilot's way) against the same copies one at a time, per copy and trial.

Run by hand::

    python benchmarks/bench_bayesian_step.py [--trials 80] [--runs 5] [--copies 100]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import numpy as np
from scipy.special import ndtr

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runner import adaptive  # noqa: E402
from runner.adaptive import EntropyGrid, EntropyTrack, UpDownTrack, restore  # noqa: E402
from runner.adaptive_batch import EntropyBatch  # noqa: E402

TARGET_MS = 10.0


def _simulated_run(track, rng, pse=3.0, spread=4.0):
    """Run ``track`` to the end against a cumulative Gaussian observer; per-trial select and update times (s)."""
    select, update = [], []
    while not track.finished:
        t0 = time.process_time()
        level = track.next_level()
        t1 = time.process_time()
        track.update(level, int(rng.random() < ndtr((level - pse) / spread)))
        t2 = time.process_time()
        select.append(t1 - t0)
        update.append(t2 - t1)
    return select, update


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=80)
    parser.add_argument("--runs", type=int, default=5)
    parser.add_argument("--copies", type=int, default=100, help="copies in the side-by-side of stepped copies")
    args = parser.parse_args(argv)
    grid = EntropyGrid()
    sizes = (grid.pse_values().size, grid.spread_values().size, grid.lapse_values().size, grid.level_values().size)
    print(f"numpy {np.__version__}; default grid mu x sigma x lapse = {sizes[0]} x {sizes[1]} x {sizes[2]}")
    print(f"{sizes[3]} levels; median over {args.runs} runs x {args.trials} trials")

    adaptive._cdf_table.cache_clear()
    start = time.process_time()
    EntropyTrack(max_trials=args.trials, grid=grid)
    print(f"table build (once per grid): {(time.process_time() - start) * 1e3:.2f} ms")

    rng = np.random.default_rng(1)
    updown_ms = []
    for _ in range(args.runs):
        track = UpDownTrack(start_level=20, steps=[8, 4, 2, 1], bounds=(-45, 45), max_trials=args.trials)
        s, u = _simulated_run(track, rng)
        updown_ms += [(a + b) * 1e3 for a, b in zip(s, u)]
    updown = statistics.median(updown_ms)

    header = ("select ms", "update ms", "trial ms", "trial/target", "trial/updown")
    print(f"{'track':>22} " + " ".join(f"{h:>{w}}" for h, w in zip(header, (10, 10, 9, 13, 13))))
    for target in ("pse", "pse_spread"):
        select_ms, update_ms, trial_ms, replay_ms = [], [], [], []
        for _ in range(args.runs):
            track = EntropyTrack(max_trials=args.trials, target=target, grid=grid)
            s, u = _simulated_run(track, rng)
            select_ms += [x * 1e3 for x in s]
            update_ms += [x * 1e3 for x in u]
            trial_ms += [(a + b) * 1e3 for a, b in zip(s, u)]
            state = track.state()
            start = time.process_time()
            restore(state)
            replay_ms.append((time.process_time() - start) * 1e3)
        trial = statistics.median(trial_ms)
        print(
            f"{'bayesian ' + target:>22} {statistics.median(select_ms):>10.3f} {statistics.median(update_ms):>10.3f} "
            f"{trial:>9.3f} {trial / TARGET_MS:>13.3f} {trial / updown:>13.0f}"
        )
        print(f"{'':>22} restore of a {args.trials}-trial state (replay): {statistics.median(replay_ms):.1f} ms")
    print(f"{'updown':>22} {'':>10} {'':>10} {updown:>9.4f} {updown / TARGET_MS:>13.5f} {1:>13.0f}")
    print(f"target: select + update <= {TARGET_MS} ms per trial on the default grid (trial/target <= 1)")
    copies_side_by_side(args.trials, args.copies)


def copies_side_by_side(trials: int, copies: int) -> None:
    """Per copy and trial: ``copies`` tracks one at a time against the same number stepped together.

    The bootstrap pilot that re-runs the tracks (fitting/replay.py) steps its
    copies together (runner/adaptive_batch.py); both sides here run on the
    grid of a protocol's default Bayesian procedure and of the bundled
    protocol's bounds, with the same answers, CPU time of this process.
    """
    grid = EntropyGrid(pse_min=-20, pse_max=20, spread_min=1, spread_max=10, level_min=-45, level_max=45)
    rng = np.random.default_rng(2)
    truth = rng.normal(0, 3, copies)
    singles = [EntropyTrack(max_trials=trials, grid=grid) for _ in range(copies)]
    batch = EntropyBatch(copies, max_trials=trials, grid=grid)
    spent = {"one at a time": 0.0, "stepped together": 0.0}
    for _ in range(trials):
        t0 = time.process_time()
        levels = np.array([t.next_level() for t in singles])
        t1 = time.process_time()
        together = batch.next_levels()
        t2 = time.process_time()
        answers = (rng.random(copies) < ndtr((levels - truth) / 3.0)).astype(int)
        t3 = time.process_time()
        for t, x, y in zip(singles, levels, answers):
            t.update(float(x), int(y))
        t4 = time.process_time()
        batch.update(levels, answers)       # the single tracks' levels, so both sides stay on the same path
        t5 = time.process_time()
        spent["one at a time"] += (t1 - t0) + (t4 - t3)
        spent["stepped together"] += (t2 - t1) + (t5 - t4)
        assert np.mean(together != levels) <= 0.01
    per = {k: v / (copies * trials) * 1e6 for k, v in spent.items()}
    print(f"\n{copies} copies x {trials} trials, pilot grid ({grid.pse_values().size} x {grid.spread_values().size} "
          f"x {grid.lapse_values().size}, {grid.level_values().size} levels), CPU time per copy and trial:")
    for name, us in per.items():
        print(f"{name:>22}: {us:8.1f} us  ({per['one at a time'] / us:.2f} x faster than one at a time)")


if __name__ == "__main__":
    main()
