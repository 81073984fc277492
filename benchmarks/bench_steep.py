"""PSE coverage for the observers whose fits collapsed (flagged ``steep``), rebuilt from their groups' seeds.

Among the 528 simulated observers of ``bench_coverage.py``'s up–down cell at
24 trials per condition (group numbers 64–111, groups of 3 and 8), four had
their shared spread collapse far below the tested levels' spacing, and
their intervals were flagged ``steep``: observers sim04 of group 8082,
sim04 of 8090, sim07 of 8091 and sim02 of 8107 (seed = 1000 x size +
number). This script simulates those groups again (the same seeds give the
same trials), fits them as ``bench_coverage.py --bootstraps pilot`` does and
counts, for the flagged observers and for all observers of these groups,
how many intervals hold the truth. Too few observers for a coverage
estimate of its own: it shows what a change does to exactly the cases that
failed, beside the whole-cell numbers of ``bench_coverage.py``.

``--draw-fraction F`` draws a collapsed fit's answers at F times the tested
levels' interquartile range instead of ``fitting.flags.STEEP_DRAW_FRACTION``
(to compare choices; ``fit`` itself has no such option).

``--screen FIRST COUNT`` looks for new collapsed fits instead of the four
above: it simulates groups of 8 numbered FIRST … FIRST + COUNT − 1 (seeds
8000 + number, numbers no coverage run has used are held-out cases), fits
them without a bootstrap (the flag needs only the fit), and scores the
groups with a flagged observer as above.  A collapse is rare (37 of 6,000
observers at 24 up–down trials), so screening is the cheap way to gather
enough of them.

Run: ``python benchmarks/bench_steep.py [--seeds 8082 8090 8091 8107 | --screen 400 250] [--boot 1000]
[--draw-fraction 0.5]``.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from collections import defaultdict
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "benchmarks"))

import bench_coverage as bc  # noqa: E402
from scratch import quiet_worker, scratch_folder, stop_workers  # noqa: E402
import fitting.bootstrap  # noqa: E402

FLAGGED = {8082: "sim04", 8090: "sim04", 8091: "sim07", 8107: "sim02"}
KINDS = ("condition PSE", "PSE shift", "tuning amplitude")


def _setting():
    """The coverage cell these observers come from: protocol text, observer model, population truth."""
    protocol = str(ROOT / "protocols" / "offset_by_lag.toml")
    model = bc.load_model(str(ROOT / "protocols" / "observers" / "typical.toml"))
    base = bc.load_protocol(protocol)
    pop = bc.population_truth(model, base.design.adapter_offsets_deg, base.design.lags)
    return bc.protocol_text(protocol, 24, "updown"), model, pop


def collapsed(seed: int) -> list[str]:
    """The observers of group ``seed`` (8 observers) whose point fit is flagged ``steep``."""
    text, model, _ = _setting()
    with tempfile.TemporaryDirectory() as tmp:
        logs = bc.simulate_group(text, model, 8, seed, Path(tmp))[0]
        pse = bc.fit_logs(logs, str(Path(tmp) / "fit"), n_boot=0, seed=seed, progress=False, figures=False).pse
    return sorted(set(pse.loc[pse["flags"].fillna("").str.contains("steep"), "observer"]))


def one(job):
    seed, n_boot = job
    text, model, pop = _setting()
    res = bc.one_group((text, model, 8, seed, n_boot, pop, ["pilot"], [bc.BY_STATISTIC]))
    own, _ = res["tables"][("pilot", bc.BY_STATISTIC)]
    flags = own["pse"].groupby("observer")["flags"].agg(lambda f: " ".join(sorted(set(" ".join(f.fillna("")).split()))))
    return seed, res["scores"][("pilot", bc.BY_STATISTIC)], flags.to_dict()


def _score_groups(pool, args, t0) -> list:
    """Screen (with ``--screen``) and score the groups of ``args.seeds`` on ``pool``."""
    if args.screen:
        first, count = args.screen
        candidates = [8000 + g for g in range(first, first + count)]
        found = {}
        for n, (seed, who) in enumerate(zip(candidates, pool.map(collapsed, candidates)), 1):
            found[seed] = who
            if n % 25 == 0 or n == count:     # screening 250 groups takes minutes: show progress
                print(f"# screened {n} of {count} groups, {sum(map(bool, found.values()))} with a collapsed fit",
                      file=sys.stderr, flush=True)
        args.seeds = [s for s, who in found.items() if who]
        print(f"# screened {8 * count} observers (groups {first}-{first + count - 1}) in "
              f"{time.perf_counter() - t0:.0f} s: collapsed "
              + (", ".join(f"{s} {' '.join(w)}" for s, w in found.items() if w) or "none"))
    return list(pool.map(one, [(s, args.boot) for s in args.seeds]))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, nargs="+", default=sorted(FLAGGED))
    ap.add_argument("--boot", type=int, default=1000)
    ap.add_argument("--screen", type=int, nargs=2, metavar=("FIRST", "COUNT"),
                    help="score the groups among 8000 + FIRST ... whose point fits collapse, not --seeds")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--draw-fraction", type=float, default=fitting.bootstrap.STEEP_DRAW_FRACTION,
                    help="spread of a collapsed fit's replicates, as a fraction of the levels' IQR")
    args = ap.parse_args()
    if args.screen and args.screen[1] < 1:
        ap.error("--screen: COUNT must be at least 1")
    # the worker processes are forked after this, so they draw at the same fraction
    fitting.bootstrap.STEEP_DRAW_FRACTION = args.draw_fraction
    print(f"# collapsed fits drawn at {args.draw_fraction:g} x the tested levels' interquartile range")
    t0 = time.perf_counter()
    # the workers ignore Ctrl-C and SIGTERM; on either the parent stops them and ends with one line
    with ProcessPoolExecutor(args.jobs, initializer=quiet_worker) as pool:
        try:
            results = _score_groups(pool, args, t0)
        except KeyboardInterrupt:
            stop_workers()
            raise
    print("| group | observer | flags | " + " | ".join(KINDS) + " |")
    print("|---|---|---|" + "---|" * len(KINDS))
    flagged, everyone = defaultdict(lambda: [0, 0]), defaultdict(lambda: [0, 0])
    for seed, scores, flags in results:
        for who, sc in scores.items():
            if who == "group":
                continue
            for kind, (hit, n) in sc.items():
                everyone[kind][0] += hit
                everyone[kind][1] += n
            if "steep" in flags.get(f"s{seed}_{who}", ""):
                cells = [f"{sc.get(k, (0, 0))[0]}/{sc.get(k, (0, 0))[1]}" for k in KINDS]
                print(f"| {seed} | {who} | {flags[f's{seed}_{who}']} | " + " | ".join(cells) + " |")
                for kind in KINDS:
                    hit, n = sc.get(kind, (0, 0))
                    flagged[kind][0] += hit
                    flagged[kind][1] += n
    for label, tally in (("flagged steep", flagged), ("all observers of these groups", everyone)):
        print(f"| {label} | | | " + " | ".join(
            f"{tally[k][0]}/{tally[k][1]} ({100 * tally[k][0] / tally[k][1]:.1f} %)" if tally[k][1] else "–"
            for k in KINDS) + " |")
    print(f"\n{time.perf_counter() - t0:.0f} s")


if __name__ == "__main__":
    try:
        with scratch_folder():
            main()
    except KeyboardInterrupt:      # nothing is kept between runs, so nothing is lost
        sys.exit("bench_steep: interrupted before the table was printed; it writes no files, so nothing is lost")
