"""Parametric bootstrap that re-runs the adaptive tracks with the fitted observer.

The fixed-level bootstrap (:mod:`fitting.bootstrap`) keeps the presented
levels; with adaptive placement the levels depend on the answers, and the
sampling distribution of the fit differs from the fixed-level one (Wichmann
& Hill 2001, II).  Here every replicate re-runs each condition's tracks
from their start: a fresh track proposes a level, the fitted observer
answers (``P(cw | x)`` at the generating parameters), the track takes the
answer, as many times as the track had trials in the log, or fewer for a
copy that stops earlier by its own rule (``max_reversals``).  The replicate's
trials are pooled into cells and all replicates are refitted in one batch,
exactly as in the fixed-level bootstrap, so intervals, BCa and the tables
downstream are unchanged.

``fitting`` never imports the session engine: the tracks come from a
*factory* passed in by the caller (the command line builds it from the
protocol in each log's sidecar), ``factory(condition, track) -> object``
with ``next_level()``, ``update(level, response_cw)`` and ``finished``.  A
factory may also offer ``factory.session(n)``: a callable
``(condition, track) -> copies`` giving ``n`` copies of a track for ``n``
simulated sessions, either a list of tracks or one object stepped together,
with ``next_levels()`` (nan for a copy that has stopped) and
``update(levels, responses)`` on arrays; the command line's does
(:mod:`runner.replay`, :mod:`runner.adaptive_batch`).  Where its
``shared`` attribute is true the copies of different tracks lend each other
what they learn, session by session, as the session's tracks did; every
replicate then re-runs the whole session in the order of the log, a
block of replicates at a time (:data:`SESSION_COPIES`).

Cost: replicates × trials track steps.  Step tracks take about a
microsecond per copy stepped together; Bayesian copies a few hundred
times that (``benchmarks/bench_bayesian_step.py``), which makes a pilot of
100 re-runs seconds to tens of seconds long per observer.

Generating parameters
---------------------
Short adaptive tracks bias the fitted spread low, far more than fixed
levels do (0.77 of the true spread at 24 up–down trials per condition,
benchmarks/README.md; slope bias of adaptive data, Kaernbach 2001), so a
pilot with the levels held fixed cannot see that bias.
:func:`rerun_generating_parameters` runs the pilot *through the tracks*:
it re-runs them ``pilot`` times at the estimates, refits, and moves the
spread(s) and lapse by minus their mean bias (Wichmann & Hill 2001, II, the
bootstrap bridging assumption).  ``fit`` uses it for both bootstraps when
the logs' sidecars give the tracks: the re-running one, and the default
fixed-level one, whose replicates are then drawn at the corrected spread.
"""

from __future__ import annotations

import numpy as np

from . import bootstrap
from .bootstrap import BootstrapResult, bias_corrected, no_steeper_than_resolved, replicate_pse_covariance
from .progress import ProgressBar
from .psychometric import (PsychometricFit, _cell_terms, deviance_by_condition, escape_saddles, probability_cw,
                           solve_batch)


def _pool(levels: np.ndarray, answers: np.ndarray):
    """Levels and answers (R, T) of one condition -> each replicate's distinct levels and counts.

    Returns ``(x, n, k)``, each (R, W): the distinct levels of each row in
    ascending order, then its first level again; trials and 'clockwise'
    answers at each, then zeros. A nan level is a trial a copy did not run
    (it had stopped by its own rule).
    """
    rows = levels.shape[0]
    order = np.argsort(levels, axis=1, kind="stable")            # nan last
    lv = np.take_along_axis(levels, order, axis=1)
    an = np.take_along_axis(answers, order, axis=1)
    ran = ~np.isnan(lv)
    new = ran.copy()
    new[:, 1:] &= lv[:, 1:] != lv[:, :-1]                         # a level not seen before in its row
    slot = np.cumsum(new, axis=1) - 1                             # its place among the row's levels
    width = max(int(new.sum(axis=1).max()), 1)
    flat = (np.arange(rows)[:, None] * width + slot)[ran]
    n = np.bincount(flat, minlength=rows * width).reshape(rows, width).astype(float)
    k = np.bincount(flat, weights=an[ran], minlength=rows * width).reshape(rows, width)
    x = np.repeat(lv[:, :1], width, axis=1)
    x[np.nonzero(new)[0], slot[new]] = lv[new]
    return x, n, k


class _OneByOne:
    """Copies of a track with no batched form, stepped one at a time; nan for a copy that has stopped."""

    def __init__(self, tracks):
        self.tracks = tracks

    def next_levels(self) -> np.ndarray:
        return np.fromiter((np.nan if tr.finished else tr.next_level() for tr in self.tracks), float,
                           len(self.tracks))

    def update(self, levels, responses) -> None:
        for tr, x, y in zip(self.tracks, levels, responses):
            if not np.isnan(x):
                tr.update(float(x), int(y))


#: Re-run copies of tracks held at once when the tracks of a session share what they learn: the
#: replicates are re-run in blocks of ``SESSION_COPIES // tracks`` (a Bayesian copy on the default
#: grid holds about 100 kB, so about 200 MB).
SESSION_COPIES = 2_000


def _plan(schedule, conditions: int) -> list:
    """Log order ``[(condition index, track id), ...]`` -> per condition ``[(track id, trials), ...]`` by track id."""
    counts: dict = {}
    for key in schedule:
        counts[key] = counts.get(key, 0) + 1
    plan: dict = {}
    for (c, track), m in sorted(counts.items()):
        plan.setdefault(c, []).append((track, m))
    return [plan.get(c, []) for c in range(conditions)]


def _session(factory, n: int):
    """``(condition, track) -> n`` copies stepped together, of one set of ``n`` simulated sessions; and whether shared."""
    made = factory.session(n) if hasattr(factory, "session") else (lambda c, t: [factory(c, t) for _ in range(n)])

    def copies(condition: str, track: str):
        out = made(condition, track)
        return _OneByOne(out) if isinstance(out, list) else out
    return copies, bool(getattr(made, "shared", False))


class _Answers:
    """Simulated answers of the fitted observer at ``generate``: ``answer(c, levels)`` -> 0/1 per copy.

    A copy that has stopped (level nan) is answered as at 0°; its answer is not used.
    """

    def __init__(self, fit: PsychometricFit, generate: np.ndarray, rng: np.random.Generator):
        self.pse, self.spread, self.lapse = fit.layout.unpack(generate[None])
        self.sigmoid, self.rng = fit.sigmoid, rng

    def __call__(self, c: int, x: np.ndarray) -> np.ndarray:
        p = probability_cw(np.nan_to_num(x), self.pse[0, c], self.spread[0, c], self.lapse[0], self.sigmoid)
        return (self.rng.random(x.size) < p).astype(int)


def _run_track(tracks, n: int, n_trials: int, c: int, answer: _Answers):
    """Step ``n`` copies of one track ``n_trials`` times: levels and answers (n, n_trials), nan where stopped."""
    lv, an = np.full((n, n_trials), np.nan), np.zeros((n, n_trials))
    for t in range(n_trials):
        x = tracks.next_levels()        # nan: the copy stopped by its own rule (max_reversals)
        if np.isnan(x).all():
            break
        y = answer(c, x)
        tracks.update(x, y)
        lv[:, t], an[:, t] = x, y
    return lv, an


def _levels_by_track(fit, plan, factory, n: int, answer: _Answers, bar):
    """Each condition's re-run levels and answers (n, trials), its tracks run one after another."""
    copies, _ = _session(factory, n)
    out = []
    for c, name in enumerate(fit.conditions):
        parts = [_run_track(copies(name, track_id), n, m, c, answer) for track_id, m in plan[c]]
        out.append((np.hstack([p[0] for p in parts]), np.hstack([p[1] for p in parts])))
        bar.advance(n)
    return out


def _levels_in_log_order(fit, schedule, plan, factory, n: int, answer: _Answers, bar):
    """As :func:`_levels_by_track`, every replicate a whole session stepped in the log's order, in blocks."""
    block = max(1, SESSION_COPIES // max(1, sum(len(tracks) for tracks in plan)))
    out = [([], []) for _ in fit.conditions]
    for lo in range(0, n, block):
        rows = min(block, n - lo)
        copies, _ = _session(factory, rows)
        tracks, done, lv, an = {}, {}, {}, {}
        for c, track_id in schedule:
            key = (c, track_id)
            if key not in tracks:
                m = dict(plan[c])[track_id]
                tracks[key], done[key] = copies(fit.conditions[c], track_id), 0
                lv[key], an[key] = np.full((rows, m), np.nan), np.zeros((rows, m))
            x = tracks[key].next_levels()
            if not np.isnan(x).all():
                y = answer(c, x)
                tracks[key].update(x, y)
                lv[key][:, done[key]], an[key][:, done[key]] = x, y
            done[key] += 1
        for c in range(len(fit.conditions)):
            out[c][0].append(np.hstack([lv[(c, t)] for t, _ in plan[c]]))
            out[c][1].append(np.hstack([an[(c, t)] for t, _ in plan[c]]))
        bar.advance(rows * len(fit.conditions))
    return [(np.vstack(a), np.vstack(b)) for a, b in out]


def _rerun(fit: PsychometricFit, schedule, factory, generate: np.ndarray, n_boot: int, rng: np.random.Generator,
           bar, studentize: bool = False):
    """Re-run every track ``n_boot`` times at ``generate`` and refit.

    Returns ``(theta, converged, at_bound, deviance, cov)``, one row per replicate (``cov`` None unless
    ``studentize``).
    """
    plan = _plan(schedule, len(fit.conditions))
    answer = _Answers(fit, generate, rng)
    if _session(factory, 1)[1]:
        levels = _levels_in_log_order(fit, schedule, plan, factory, n_boot, answer, bar)
    else:
        levels = _levels_by_track(fit, plan, factory, n_boot, answer, bar)
    pools = [_pool(lv, an) for lv, an in levels]
    C = len(fit.conditions)
    width = max(cond[0].shape[1] for cond in pools)
    x = np.empty((n_boot, C, width))
    n = np.zeros((n_boot, C, width))
    k = np.zeros((n_boot, C, width))
    for c, (xc, nc, kc) in enumerate(pools):
        m = xc.shape[1]
        x[:, c, :m], x[:, c, m:] = xc, xc[:, :1]
        n[:, c, :m], k[:, c, :m] = nc, kc
    # refitted in chunks that keep the arrays near a core's cache, as the bootstrap's (same numbers)
    step = max(1, bootstrap.CHUNK_CELLS // x[0].size)
    parts = [_refit(fit, generate, x[i:i + step], n[i:i + step], k[i:i + step], studentize)
             for i in range(0, n_boot, step)]
    return tuple(None if part[0] is None else np.concatenate(part) for part in zip(*parts))


def _refit(fit: PsychometricFit, generate: np.ndarray, x, n, k, studentize: bool):
    """Refit replicates (x, n, k: (R, C, W)) from ``generate``: (theta, converged, at_bound, deviance, cov)."""
    layout, sigmoid = fit.layout, fit.sigmoid
    sol = solve_batch(generate[None], x, n, k, layout, fit.lower, fit.upper, sigmoid)
    sol = escape_saddles(sol, x, n, k, layout, fit.lower, fit.upper, sigmoid)
    p_star = _cell_terms(sol.theta, x, layout, sigmoid)[0]
    dev = deviance_by_condition(p_star, n, k)
    cov = (replicate_pse_covariance(sol.theta, x, n, k, layout, sigmoid, sol.at_bound)
           if studentize else None)
    return sol.theta, sol.converged, sol.at_bound, dev, cov


def rerun_generating_parameters(fit: PsychometricFit, schedule, factory, pilot: int, rng: np.random.Generator,
                                bar) -> np.ndarray:
    """Generating parameters (P,) from a pilot that re-runs the tracks at the estimates.

    The spread(s) and lapse are moved by minus their mean bias over ``pilot``
    re-run replicates (the PSEs stay at their estimates); ``pilot = 0``
    returns the estimates.  ``bar`` advances by ``pilot`` per condition.
    """
    if not pilot:
        return fit.theta.copy()
    theta = _rerun(fit, schedule, factory, fit.theta, pilot, rng, bar)[0]
    return bias_corrected([fit], theta[None])[0]


def replay_bootstrap(fit: PsychometricFit, schedule, factory, n_boot: int, rng: np.random.Generator,
                     progress: bool | None = None, label: str = "bootstrap (tracks re-run)",
                     pilot: int = 100, studentize: bool = False) -> BootstrapResult:
    """Bootstrap ``fit`` by re-running its adaptive tracks ``n_boot`` times.

    Parameters
    ----------
    fit : PsychometricFit
    schedule : list of (int, str)
        The observer's answered trials in the order they were run: each
        trial's condition (index into ``fit.conditions``) and track id.
    factory : callable
        ``factory(condition, track_id)`` returns a fresh track; see the
        module notes for ``factory.session``.
    n_boot : int
    rng : numpy.random.Generator
    progress : bool or None
    label : str
    pilot : int
        Re-run pilot replicates for the generating parameters
        (:func:`rerun_generating_parameters`; 0: the estimates).
    studentize : bool
        Keep each replicate's own PSE covariance (for bootstrap-t intervals).

    Returns
    -------
    BootstrapResult
    """
    C = len(fit.conditions)
    with ProgressBar((n_boot + pilot) * C, "pilot + " + label, show=progress) as bar:
        generate = rerun_generating_parameters(fit, schedule, factory, pilot, rng, bar)
        generate = no_steeper_than_resolved([fit], generate[None])[0]
        theta, converged, at_bound, dev, cov = _rerun(fit, schedule, factory, generate, n_boot, rng, bar, studentize)
    return BootstrapResult(fit, theta, converged, at_bound, dev, generate, cov)
