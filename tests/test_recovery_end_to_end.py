"""simulate → fit recovers the simulated after-effect (fast version).

The slow version with 50 sessions and 1,000 replicates is
`benchmarks/bench_recovery_end_to_end.py`.  Here 10 seeded sessions of the
default protocol with 300 replicates each: the 95 % intervals of the lag-0
amplitude, lag-0 peak offset and decay must hold the values the simulated
observer was given in at least 8 of 10 sessions (with a nominal 95 %
coverage, 8 or more of 10 happens with probability 0.99 — binomial).
"""

from __future__ import annotations

from dataclasses import replace

import pytest

from runner.observers import load_model

from conftest import PROTOCOLS, ROOT

import sys

sys.path.insert(0, str(ROOT / "benchmarks"))
from bench_recovery_end_to_end import one_run  # noqa: E402


@pytest.mark.slow
def test_simulate_then_fit_recovers_amplitude_peak_and_decay():
    model = replace(load_model(PROTOCOLS / "observers" / "typical.toml"), spread_between_observers=0.0)
    truth = {"amplitude": model.amplitude_deg, "peak_offset": model.peak_offset_deg, "decay": model.decay_periods}
    runs = [one_run(str(PROTOCOLS / "offset_by_lag.toml"), model, seed, 300) for seed in range(100, 110)]
    for name, true in truth.items():
        covered = sum(lo <= true <= hi for _, lo, hi in (r[name] for r in runs))
        assert covered >= 8, (name, covered, [r[name] for r in runs])
