"""PSE efficiency of the protocol's default tracks, and the trade-off behind them.

Run from the repository root::

    python benchmarks/bench_default_tracks.py               # 1,500 runs per cell (Bayesian: 300)
    python benchmarks/bench_default_tracks.py --runs 300    # quicker
    python benchmarks/bench_default_tracks.py --quick --spread 6   # another observer
    python benchmarks/bench_default_tracks.py --quick --methods bayesian --tracks 1   # one track of 80
    python benchmarks/bench_default_tracks.py --quick --methods bayesian --scratch --runs 1800   # variants not adopted
    python benchmarks/bench_default_tracks.py --quick --methods bayesian --pse-band 4 5   # PSEs near ±5° only

Every row is one ``[procedure]`` setting, built into tracks exactly as a
session builds them (:func:`runner.tracks.procedure_track`): a pair of tracks
of 40 trials each (80 trials per condition; the Bayesian method: two
independent tracks as well), taking turns.  The simulated observer answers
with P(cw | x) = λ/2 + (1 − λ)·Φ((x − μ)/σ), σ = 3° (``--spread``), with

* μ uniform in [−5°, 5°] (issue 14: "true PSEs anywhere in ±5°"), λ = 0 and
  4 %: PSE efficiency = Cramér–Rao bound² / RMSE² of a maximum-likelihood
  fit of the 80 trials (the project's fitter, lapse fixed at its true value;
  bound √(πσ²/(2N(1 − λ)²)), derived in ``bench_adaptive_efficiency.py``),
  ± its Monte Carlo standard error, and the RMSE of the spread relative to σ;
* μ = 15° (λ = 4 %): the tracks must still reach the PSE; its RMSE and
  efficiency are shown.

Every row sees the same true PSEs and the same random numbers (common random
numbers), so differences between rows are less noisy than each row's ± says.

``--conditions C`` runs a session of C conditions instead of one: each run
draws C PSEs, the conditions' trials are interleaved in a shuffled order,
and the Bayesian tracks share what they learn about spread and lapse as a
session's do (``bayes_share_spread``, :mod:`runner.shared_evidence`).  The
efficiencies are then those of ``fit``'s joint fit (one spread for the C
conditions); the last column gives them from one fit per condition.

Target (issue 14): the defaults of ``updown``, ``weighted`` and ``bayesian``
reach PSE efficiency ≥ 0.85 in both λ rows.
"""

from __future__ import annotations

import argparse
import dataclasses
import math
import os
import sys
from concurrent.futures import ProcessPoolExecutor

import numpy as np
from scipy.special import ndtr, xlogy

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), os.pardir))
sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from bench_adaptive_efficiency import fit_runs, pse_bound  # noqa: E402
from runner.protocol import ProcedureSettings  # noqa: E402
from runner.adaptive import EntropyTrack, log_pse_prior  # noqa: E402
from fitting.psychometric import Cells, Layout, parameter_bounds, solve_batch, starting_values  # noqa: E402
from runner.shared_evidence import SharedEvidence, log_evidence  # noqa: E402
from runner.tracks import entropy_settings, procedure_track  # noqa: E402

SPREAD = 3.0
N_TRIALS = 80
FAR_PSE = 15.0

# (label, settings) — the defaults first, then the settings they were chosen against
OLD_UPDOWN = dict(method="updown", start_offset_deg=20.0, steps_deg=[8.0, 4.0, 2.0, 1.0], k_down=2)
OLD_WEIGHTED = dict(method="weighted", start_offset_deg=20.0, steps_deg=[8.0, 4.0, 2.0, 1.0], target_cw=0.75)
CANDIDATES = [
    ("default updown", dict(method="updown")),
    ("default weighted", dict(method="weighted")),
    ("default bayesian", dict(method="bayesian")),
    ("bayesian, uniform PSE prior (the default before; bayes_pse_prior_sd_deg = 0)",
     dict(method="bayesian", bayes_pse_prior_sd_deg=0.0)),
    ("bayesian, posterior-mean placement (pse_mean)", dict(method="bayesian", bayes_placement="pse_mean")),
    ("bayesian, straddle ±0.25 spreads (and the default PSE prior)", dict(method="bayesian", bayes_placement="straddle")),
    ("updown, earlier defaults (±20°, 8-4-2-1°, 2-down)", OLD_UPDOWN),
    ("updown 2-down, ±3°, 4-2-1°", dict(method="updown", start_offset_deg=3.0, steps_deg=[4.0, 2.0, 1.0], k_down=2)),
    ("weighted, earlier defaults (±20°, 8-4-2-1°, 75 %)", OLD_WEIGHTED),
    ("weighted 75 %, ±3°, 4-2-1°", dict(method="weighted", start_offset_deg=3.0, steps_deg=[4.0, 2.0, 1.0],
                                         target_cw=0.75)),
]


class ScratchEntropyTrack(EntropyTrack):
    """Six Bayesian variants tried against the default and not adopted (benchmark only).

    ``switch_after``: least expected entropy for the first K trials of the
    track, then the level nearest the posterior mean of the PSE;
    ``near_spreads``: least expected entropy among the levels within K
    posterior-mean spreads of the posterior mean of the PSE;
    ``min_variance``: least expected posterior variance of the PSE marginal
    (the minimum-variance rule of King-Smith et al., 1994);
    ``posterior_lapse``: the posterior's lapse held at this one value
    instead of spanning the grid's lapse rates (the entropy rule then has no
    lapse to learn from far levels);
    ``conditional``: least expected entropy of the PSE *given the spread*,
    H(μ, σ) − H(σ) with λ summed out (the conditional entropy, Cover &
    Thomas, 2006, Elements of Information Theory, §2.2), so that what a
    level would teach about the spread itself does not count;
    ``pool_until``: until the track has K answers, its posterior (for
    choosing levels) also holds everything its condition's other track
    learnt, PSE included (the ``partner``, set by :func:`simulate`), so that
    the two tracks search for their common PSE together; from K answers on
    it borrows only spread and lapse, as the default does.
    """

    def __init__(self, switch_after: int | None = None, near_spreads: float | None = None, min_variance: bool = False,
                 posterior_lapse: float | None = None, conditional: bool = False, pool_until: int = 0, **kw):
        if posterior_lapse is not None:
            kw["grid"] = dataclasses.replace(kw["grid"], lapses=(posterior_lapse,))
        super().__init__(**kw)
        self.switch_after = switch_after
        self.near_spreads = near_spreads
        self.min_variance = min_variance
        self.conditional = conditional
        self.pool_until = pool_until
        self.partner: ScratchEntropyTrack | None = None

    def posterior(self, borrowed: bool = True) -> np.ndarray:
        if not (borrowed and self.partner is not None and self.n_trials < self.pool_until):
            return super().posterior(borrowed)
        # the partner's log likelihood over (μ, σ, λ): its log posterior less its PSE prior (the same as ours);
        # it replaces the partner's share of the borrowed (σ, λ) evidence
        prior = log_pse_prior(self._mu, self._prior_sd)[:, None, None]
        log_post = self._log_post + self.partner._log_post - prior
        if self._evidence is not None:
            log_post = log_post + self._evidence.borrowed(self) - log_evidence(self.partner._log_post)
        p = np.exp(log_post - log_post.max())
        return p / p.sum()

    def expected_pse_variances(self) -> np.ndarray:
        """Expected posterior variance of the PSE after one trial at each level (deg², one per level)."""
        p = self.posterior()
        a = (p @ self._half_lapse).sum(axis=1)  # (μ,)
        b = p @ self._keep  # (μ, σ)
        cw = np.einsum("xms,ms->xm", self._table, b) + a  # unnormalised μ marginal after "cw", per level
        ccw = np.maximum(p.sum(axis=(1, 2)) - cw, 0.0)
        out = np.zeros(cw.shape[0])
        for m in (cw, ccw):
            mass = m.sum(axis=1)
            first = m @ self._mu
            out += m @ self._mu ** 2 - np.divide(first ** 2, mass, out=np.zeros_like(first), where=mass > 0)
        return out

    def expected_conditional_entropies(self) -> np.ndarray:
        """Expected posterior entropy of the PSE given the spread, H(μ, σ) − H(σ), after one trial at each level."""
        p = self.posterior()
        a = p @ self._half_lapse  # (μ, σ)
        b = p @ self._keep
        joint = p.sum(axis=2)
        cw = self._table * b[None] + a[None]  # (levels, μ, σ), unnormalised joint after "cw"
        ccw = np.maximum(joint[None] - cw, 0.0)
        out = np.zeros(self._level_values.size)
        for m in (cw, ccw):
            marg = m.sum(axis=1)  # (levels, σ)
            # H(μ, σ) − H(σ) of the normalised posterior, weighted by P(answer): Σ m log m over σ minus over (μ, σ)
            out += xlogy(marg, marg).sum(axis=1) - xlogy(m, m).sum(axis=(1, 2))
        return out

    def next_level(self) -> float:
        if self._proposal is None and self.conditional and not self.finished:
            self._proposal = float(self._level_values[int(np.argmin(self.expected_conditional_entropies()))])
        if self._proposal is None and self.min_variance and not self.finished:
            self._proposal = float(self._level_values[int(np.argmin(self.expected_pse_variances()))])
        if self._proposal is None and self.switch_after is not None and self.n_trials >= self.switch_after:
            pick = int(np.argmin(np.abs(self._level_values - self.posterior_mean().pse)))
            self._proposal = float(self._level_values[pick])
        if self._proposal is None and self.near_spreads is not None and not self.finished:
            mean = self.posterior_mean()
            far = np.abs(self._level_values - mean.pse) > self.near_spreads * mean.spread
            entropies = np.where(far, np.inf, self.expected_entropies())
            if np.isfinite(entropies).any():
                self._proposal = float(self._level_values[int(np.argmin(entropies))])
        return super().next_level()


SCRATCH = ("switch_after", "near_spreads", "min_variance", "posterior_lapse", "conditional", "pool_until")


def _procedure(settings: dict) -> ProcedureSettings:
    return ProcedureSettings(**{k: v for k, v in settings.items() if k not in SCRATCH})


def _track(settings: dict, n: int, t: int, evidence=None):
    """Track number ``t`` as a session builds it, or a :class:`ScratchEntropyTrack` for a scratch setting."""
    scratch = {k: settings[k] for k in SCRATCH if k in settings}
    proc = _procedure(settings)
    if scratch:
        return ScratchEntropyTrack(**scratch, **entropy_settings(proc, n), evidence=evidence)
    return procedure_track(proc, n, t, (0, t), evidence)


SCRATCH_ROWS = [(f"bayesian, entropy for {k} trials then posterior mean (scratch)",
                 dict(method="bayesian", switch_after=k)) for k in (4, 10, 20, 30)] + [
    (f"bayesian, Gaussian PSE prior SD {sd:g}° (bayes_pse_prior_sd_deg; the default is 6°)",
     dict(method="bayesian", bayes_pse_prior_sd_deg=sd)) for sd in (3.0, 10.0)] + [
    (f"bayesian, entropy among levels within {k:g} spreads of the PSE (scratch)",
     dict(method="bayesian", near_spreads=k)) for k in (0.5, 1.0)] + [
    ("bayesian, least expected posterior variance of the PSE (scratch)", dict(method="bayesian", min_variance=True))] + [
    (f"bayesian, posterior lapse held at {lam:g} (scratch)", dict(method="bayesian", posterior_lapse=lam))
    for lam in (0.0, 0.02)] + [
    ("bayesian, least expected entropy of the PSE given the spread (scratch)", dict(method="bayesian", conditional=True)),
    ("bayesian, PSE grid ±10° (a diagnostic of the search: cannot reach a PSE 15° away) (scratch)",
     dict(method="bayesian", pse_range_deg=[-10.0, 10.0]))] + [
    ("bayesian, every track learns the spread alone (bayes_share_spread = false)",
     dict(method="bayesian", bayes_share_spread=False))] + [
    (f"bayesian, a condition's two tracks pool their PSE evidence for their first {k} trials (scratch)",
     dict(method="bayesian", pool_until=k)) for k in (6, 12, 20)]


def simulate(settings: dict, mus, lapse: float, seeds, spread: float = SPREAD,
             tracks: int = 2) -> tuple[np.ndarray, np.ndarray]:
    """Levels and answers (R, C, N) of C conditions per run, ``tracks`` tracks each (N trials per condition).

    ``mus``: (R, C) true PSEs.  A condition's tracks take turns; with C > 1
    the conditions' trials come in a shuffled order.  Bayesian tracks of a
    run share spread and lapse evidence unless ``bayes_share_spread`` is off.
    """
    levels, answers = [], []
    proc = _procedure(settings)
    for mu, seed in zip(mus, seeds):
        rng = np.random.default_rng(seed)
        C = len(mu)
        shared = SharedEvidence() if proc.method == "bayesian" and proc.bayes_share_spread else None
        made = [[_track(settings, N_TRIALS // tracks, t, shared) for t in range(tracks)] for _ in range(C)]
        if settings.get("pool_until") and tracks == 2:
            for first, second in made:
                first.partner, second.partner = second, first
        order = np.zeros(N_TRIALS, int) if C == 1 else rng.permutation(np.repeat(np.arange(C), N_TRIALS))
        lv, an = np.zeros((C, N_TRIALS)), np.zeros((C, N_TRIALS))
        done = np.zeros(C, int)
        for c in order:
            i = done[c]
            track = made[c][i % tracks]
            x = track.next_level()
            r = int(rng.random() < lapse / 2 + (1 - lapse) * ndtr((x - mu[c]) / spread))
            track.update(x, r)
            lv[c, i], an[c, i] = x, r
            done[c] += 1
        levels.append(lv)
        answers.append(an)
    return np.array(levels), np.array(answers)


def joint_fit(levels: np.ndarray, answers: np.ndarray, lapse: float) -> tuple[np.ndarray, np.ndarray]:
    """PSEs (R, C) and spreads (R,) of one fit per run with one spread for its C conditions (``fit``'s default)."""
    runs, C, n = levels.shape
    layout = Layout(n_conditions=C, shared_spread=True, lapse=lapse)
    starts, lows, highs = [], [], []
    for x, y in zip(levels, answers):
        cells = Cells.from_trials(x.ravel(), y.ravel(), np.repeat(np.arange(C), n), C)
        lo, hi = parameter_bounds(cells, layout)
        starts.append(starting_values(cells, layout))
        lows.append(lo)
        highs.append(hi)
    sol = solve_batch(np.array(starts), levels, np.ones_like(levels), answers, layout, np.array(lows), np.array(highs))
    pse, sd, _ = layout.unpack(sol.theta)
    return pse, sd[:, 0]


def _chunk(args):
    return simulate(*args)


def _scores(err: np.ndarray, sd: np.ndarray, spread: float, lapse: float) -> dict:
    sq = err.ravel() ** 2
    mse = float(sq.mean())
    eff = pse_bound(N_TRIALS, spread, lapse) ** 2 / mse
    return {"rmse": math.sqrt(mse), "eff": eff, "eff_se": eff * float(sq.std()) / (mse * math.sqrt(sq.size)),
            "sd_rel": float(np.sqrt(np.mean((sd - spread) ** 2))) / spread}


def cell(pool, settings: dict, lapse: float, runs: int, seed, far: bool, jobs: int, spread: float = SPREAD,
         tracks: int = 2, conditions: int = 1, band: tuple[float, float] | None = None) -> dict:
    """Efficiency, spread RMSE and flags of one setting at one lapse rate.

    With ``conditions`` > 1 the scores are the joint fit's; ``alone`` holds
    those of one fit per condition.  ``band``: true PSEs of size uniform in
    [low, high], either sign, instead of uniform in [−5°, 5°].
    """
    rng = np.random.default_rng(seed)
    if far:
        mus = np.full((runs, conditions), FAR_PSE)
    elif band is None:
        mus = rng.uniform(-5.0, 5.0, (runs, conditions))
    else:
        mus = rng.choice([-1.0, 1.0], (runs, conditions)) * rng.uniform(*band, (runs, conditions))
    seeds = [[*seed, i] for i in range(runs)]
    parts = [(settings, mus[j::jobs], lapse, seeds[j::jobs], spread, tracks) for j in range(jobs)]
    done = list(pool.map(_chunk, parts))
    order = np.concatenate([np.arange(runs)[j::jobs] for j in range(jobs)])
    levels = np.concatenate([d[0] for d in done])
    answers = np.concatenate([d[1] for d in done])
    pse, sd, flagged = fit_runs(levels.reshape(-1, N_TRIALS), answers.reshape(-1, N_TRIALS), lapse)
    alone = _scores(pse - mus[order].ravel(), sd, spread, lapse)
    alone["flagged"] = float(flagged.mean())
    if conditions == 1:
        return alone
    pse, sd = joint_fit(levels, answers, lapse)
    return {**_scores(pse - mus[order], sd, spread, lapse), "alone": alone}


def efficiency_table(runs: int = 1500, seed: int = 1, quick: bool = False, jobs: int | None = None,
                     spread: float = SPREAD, tracks: int = 2, methods=None, scratch: bool = False,
                     only=None, conditions: int = 1, band: tuple[float, float] | None = None) -> list[str]:
    """The table as Markdown lines (``quick``: the defaults and two Bayesian placements; Bayesian with runs // 3).

    ``tracks``: tracks per condition sharing the 80 trials (2, as the
    protocols have them; 1: one track of 80 trials).  ``conditions``: runs
    are sessions of this many conditions (see the module docstring); runs
    per cell are divided by it, so a cell scores about as many PSEs.
    ``band``: see :func:`cell`.
    """
    jobs = jobs or len(os.sched_getaffinity(0))
    session = f" in sessions of {conditions} conditions (joint fit; one fit per condition last)" if conditions > 1 else ""
    truth = "uniform in [-5, 5] deg" if band is None else f"of size uniform in [{band[0]:g}, {band[1]:g}] deg, either sign"
    lines = [f"# default tracks at {N_TRIALS} trials in {tracks} track(s){session}: sigma = {spread:g} deg, true PSE "
             f"{truth} ({runs} PSEs per cell, Bayesian {max(runs // 3, 20)}); far: PSE = {FAR_PSE:g} "
             "deg, lapse 4 %",
             "| setting | PSE eff. λ = 0 | PSE eff. λ = 4 % | spread RMSE/σ λ = 0 | spread RMSE/σ λ = 4 % "
             "| far PSE: RMSE (deg) | far PSE: eff. | ≥ 0.85 in both |" + (" one fit per condition: eff. λ = 0 / 4 % |"
                                                                          if conditions > 1 else ""),
             "|---|---|---|---|---|---|---|---|" + ("---|" if conditions > 1 else "")]
    rows = [r for r in (CANDIDATES[:5] if quick else CANDIDATES) if not methods or r[1]["method"] in methods]
    rows += [r for r in SCRATCH_ROWS if scratch]
    if only:
        rows = [r for r in rows if any(word in r[0] for word in only)]
    with ProcessPoolExecutor(jobs) as pool:
        for label, settings in rows:
            n = max(runs // 3, 20) if settings["method"] == "bayesian" else runs
            n = max(n // conditions, 2)
            near = [cell(pool, settings, lam, n, [seed, i], False, jobs, spread, tracks, conditions, band)
                    for i, lam in enumerate((0.0, 0.04))]
            far = cell(pool, settings, 0.04, n, [seed, 2], True, jobs, spread, tracks, conditions)
            met = all(c["eff"] >= 0.85 for c in near)
            alone = (f" {near[0]['alone']['eff']:.2f} / {near[1]['alone']['eff']:.2f} |" if conditions > 1 else "")
            lines.append(f"| {label} | {near[0]['eff']:.2f} ± {near[0]['eff_se']:.2f} | "
                         f"{near[1]['eff']:.2f} ± {near[1]['eff_se']:.2f} | {near[0]['sd_rel']:.2f} | "
                         f"{near[1]['sd_rel']:.2f} | {far['rmse']:.2f} | {far['eff']:.2f} | "
                         f"{'met' if met else 'missed'} |" + alone)
    return lines


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=1500)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--quick", action="store_true",
                    help="the defaults, the posterior-mean and the straddle Bayesian placements only")
    ap.add_argument("--spread", type=float, default=SPREAD, help="the simulated observer's spread σ (deg)")
    ap.add_argument("--tracks", type=int, choices=(1, 2), default=2,
                    help="tracks per condition sharing the 80 trials (1: one track of 80)")
    ap.add_argument("--methods", nargs="+", help="only the rows of these methods (e.g. bayesian)")
    ap.add_argument("--scratch", action="store_true",
                    help="also the Bayesian variants tried and not adopted (posterior mean after K entropy "
                         "trials; Gaussian PSE priors of other widths; entropy among levels near the PSE; least "
                         "expected PSE variance; the posterior's lapse held at one value; tracks that "
                         "do not share the spread)")
    ap.add_argument("--only", nargs="+", help="only the rows whose label holds one of these words")
    ap.add_argument("--conditions", type=int, default=1,
                    help="runs are sessions of this many conditions, scored by the joint fit (default 1)")
    ap.add_argument("--pse-band", type=float, nargs=2, metavar=("LOW", "HIGH"),
                    help="true PSEs of size uniform in [LOW, HIGH] deg, either sign (default: uniform in ±5°)")
    args = ap.parse_args()
    if args.pse_band and not 0 <= args.pse_band[0] <= args.pse_band[1]:
        ap.error(f"--pse-band: expected 0 <= LOW <= HIGH, got {args.pse_band[0]:g} {args.pse_band[1]:g}")
    defaults = ProcedureSettings()
    print(f"# defaults: start ±{defaults.start_offset_deg:g} deg, steps {defaults.steps_deg}, "
          f"k_down {defaults.k_down}, target_cw {defaults.target_cw:g}, Bayesian placement {defaults.bayes_placement}, "
          f"shared spread {defaults.bayes_share_spread}, PSE prior SD {defaults.bayes_pse_prior_sd_deg:g} deg")
    for line in efficiency_table(args.runs, args.seed, args.quick, spread=args.spread, tracks=args.tracks,
                                 methods=args.methods, scratch=args.scratch, only=args.only,
                                 conditions=args.conditions, band=args.pse_band and tuple(args.pse_band)):
        print(line, flush=True)


if __name__ == "__main__":
    main()
