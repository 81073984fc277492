"""Speed of the random-dot kinematics (runner/dots.py).

Target: one ``DotField.step()`` takes at most 0.2 ms for 2,000 dots. The
run also reports 500 and 5,000 dots, a static period (lifetimes only), and
the cost of handing the positions to a drawing call, taken as one copy of
the ``(n, 2)`` float array, with the ratios side by side. Times are CPU
time of this process (``time.process_time``), so that other work on a
shared machine does not inflate them; best of several runs.

Run by hand::

    python benchmarks/bench_kinematics.py [--frames 3000] [--repeats 5]
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from runner.dots import DotField, DotSpec  # noqa: E402

TARGET_MS = 0.2  # per frame at 2,000 dots


def _per_call_ms(action, frames: int, repeats: int) -> float:
    """Best of ``repeats`` runs of ``frames`` calls, in ms per call."""
    best = math.inf
    for _ in range(repeats):
        start = time.process_time()
        for _ in range(frames):
            action()
        best = min(best, (time.process_time() - start) / frames)
    return best * 1e3


def _field(n_dots: int, coherence: float, seed: int = 0) -> DotField:
    radius = 5.0
    spec = DotSpec(
        aperture_radius_deg=radius,
        density_per_deg2=n_dots / (math.pi * radius**2),
        dot_size_deg=0.1,
        speed_deg_s=5.0,
        coherence=coherence,
        lifetime_frames=12,
        refresh_hz=120.0,
    )
    return DotField(spec, np.random.default_rng(seed))


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=int, default=3000)
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args(argv)

    print(f"numpy {np.__version__}; radius 5 deg, 5 deg/s at 120 Hz, lifetime 12 frames")
    print(f"best of {args.repeats} runs x {args.frames} frames")
    print(f"{'dots':>6} {'period':>14} {'step ms':>9} {'copy ms':>9} {'step/copy':>10} {'step/target':>12}")
    for n_dots in (500, 2000, 5000):
        periods = (("coherent", 90.0, 1.0), ("coherence 0.5", 90.0, 0.5), ("static", None, 1.0))
        for label, direction, coherence in periods:
            field = _field(n_dots, coherence)
            field.start_period(direction)
            for _ in range(200):  # settle: wraps and replots under way
                field.step()
            step_ms = _per_call_ms(field.step, args.frames, args.repeats)
            copy_ms = _per_call_ms(field.positions.copy, args.frames, args.repeats)
            mark = "  <- target" if n_dots == 2000 else ""
            print(
                f"{field.n_dots:>6} {label:>14} {step_ms:>9.4f} {copy_ms:>9.4f} "
                f"{step_ms / copy_ms:>10.1f} {step_ms / TARGET_MS:>12.2f}{mark}"
            )
    print(f"target: step <= {TARGET_MS} ms per frame at 2000 dots (step/target <= 1)")


if __name__ == "__main__":
    main()
