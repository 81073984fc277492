"""Coverage of every printed interval, and compare's false rejections, through the real engine.

For each cell (procedure × trials per condition) the script simulates
``--groups`` groups of 3 and of 8 observers with between-observer
variability (``--model``, default ``protocols/observers/typical.toml``, its
``spread_between_observers``) on ``--protocol`` (default: the bundled
``offset_by_lag.toml`` with ``trials_per_track`` and ``method`` replaced),
through ``simulate`` → trial log → ``fit``, and checks:

* observers (every observer of every group, against its own drawn truth):
  condition PSEs, PSE shifts, tuning amplitude and peak offset per lag,
  decay τ;
* groups of 3 and of 8 (against the population: the mean over 20,000 draws
  of the observers' true PSEs and shifts, and the DoG / decay fits of that
  mean curve): the same intervals;
* ``compare``'s χ² at the 5 % level when the predictions are the truth (the
  observer's own true shifts; the population-mean shifts for a group), with
  the covariance ``fit`` writes.

Each simulated group is fitted with each bootstrap of ``--bootstraps`` (the
fixed-level one and the one that re-runs the adaptive tracks), side by side
on the same logs.  Each fit is then scored with each interval of
``--intervals``, on the same fit and the same replicates: ``by-statistic``
(the default of ``fit``: percentile for PSEs, shifts and peak offsets, the
profile interval of :func:`fitting.aftereffect.tuning_profile_interval` for
amplitudes, the profile interval of
:func:`fitting.aftereffect.decay_profile_interval` for the decay), ``bca``,
``percentile``, ``profile`` (profile likelihood for PSEs and shifts,
:mod:`fitting.profile`; tuning and decay keep BCa) and ``studentized``
(bootstrap-t for PSEs and shifts with every replicate's own standard error;
tuning and decay keep BCa).  ``--timing`` first times
``fit`` with each interval on one simulated group (seconds per observer,
side by side on the same logs).

Coverage is the share of intervals holding the truth; its Monte Carlo error
is the standard error over experiments (an experiment's intervals are
correlated, so the experiment, not the interval, is the unit).
``--pool`` also forms groups from all observers of a cell; ``--partitions
R`` scores their χ² on R random partitions into groups.  ``--save DIR``
keeps each cell's fits (one pickle per procedure and trial count);
``--rescore DIR [DIR ...]`` scores stored fits again without simulating or
fitting (for a new candidate statistic on the same fits; several folders of
runs with different seeds are scored as one cell); with ``--nulls`` it
scores only the group χ²'s rejections under each null model of
:data:`NULLS`, on the same pooled groups (minutes instead of most of an hour).
Targets: coverage 93–97 %; false rejections 3–8 %.

Run: ``python benchmarks/bench_coverage.py [--groups 6] [--boot 1000] [--jobs 2]
[--pool [--partitions 20]]
[--trials 24 40] [--procedures updown bayesian] [--bootstraps fixed rerun]
[--intervals bca percentile profile studentized] [--timing]
[--spread-bias [--lapse-max 0.06 0.1]]
[--save DIR | --rescore DIR [DIR ...] [--scale-check | --nulls [--partitions 20]]]``
"""

from __future__ import annotations

import argparse
import atexit
import itertools
import pickle
import re
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
from scipy import stats

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from fitting.aftereffect import fit_decay, fit_tuning, peak_bounds  # noqa: E402
from fitting.bootstrap import percentile_interval  # noqa: E402
from fitting.observer import (BY_STATISTIC, INTERVAL_METHODS, decay_interval, pse_shift_intervals,  # noqa: E402
                              tuning_intervals)
from fitting.errors import InputError  # noqa: E402
from fitting.compare import agreement, combine_gains, compare_results, gls_gain  # noqa: E402
from fitting.covariance import covariance_matrix, curve_between_covariance, group_covariance, spread_dof  # noqa: E402
from fitting.group_chi2 import GroupData, calibrated_p  # noqa: E402
from fitting.meta import dersimonian_laird, random_effects, variance_from_interval  # noqa: E402
from fitting.group import GROUP, group_aftereffect, group_curves, group_pse, group_weights  # noqa: E402
from fitting.psychometric import DEFAULT_LAPSE_MAX  # noqa: E402
from fitting.report import fit_logs  # noqa: E402
from runner.launch import simulate  # noqa: E402
from runner.observers import ObserverModel, draw_observers, load_model  # noqa: E402
from runner.protocol import load_protocol  # noqa: E402
from runner.replay import track_factories  # noqa: E402
from scratch import pool_map, scratch_folder  # noqa: E402


def protocol_text(base: str, trials_per_condition: int, method: str, tracks: int = 2,
                  placement: str | None = None, alone: bool = False, prior_sd: float | None = None) -> str:
    """The base protocol with ``tracks`` tracks sharing ``trials_per_condition``, the given method (and placement).

    ``alone``: Bayesian tracks that do not share spread and lapse evidence;
    ``prior_sd``: their Gaussian prior on the PSE (``bayes_pse_prior_sd_deg``).
    """
    text = Path(base).read_text(encoding="utf-8")
    text = re.sub(r"(?m)^tracks_per_condition\s*=.*$", f"tracks_per_condition = {tracks}", text)
    text = re.sub(r"(?m)^trials_per_track\s*=.*$", f"trials_per_track = {trials_per_condition // tracks}", text)
    if placement is not None:
        text = re.sub(r"(?m)^method\s*=.*$", lambda m: f'{m.group(0)}\nbayes_placement = "{placement}"', text)
    if prior_sd is not None:
        text = re.sub(r"(?m)^method\s*=.*$", lambda m: f'{m.group(0)}\nbayes_pse_prior_sd_deg = {prior_sd!r}', text)
    if alone:
        text = re.sub(r"(?m)^method\s*=.*$", lambda m: f'{m.group(0)}\nbayes_share_spread = false', text)
    if method in ("bayesian", "constant"):
        # the protocol check refuses a start level the method would not use
        text = re.sub(r"(?m)^start_offset_deg\s*=.*\n", "", text)
    return re.sub(r'(?m)^method\s*=.*$', f'method = "{method}"', text)


def refuse(line: str) -> None:
    """Bad input: ``line`` on stderr, exit 2."""
    print(f"bench_coverage.py: {line}", file=sys.stderr)
    sys.exit(2)


def with_offsets(base: str, offsets) -> str:
    """A copy of the protocol ``base`` whose design has these adapter offsets (a temporary file, removed at exit).

    For designs with fewer shifts per lag than the bundled protocol's 8
    (``--offsets``); everything else, lags included, stays as it is.
    """
    try:
        text = Path(base).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(base, "file", f"cannot read it ({type(exc).__name__})") from None
    listed = ", ".join(f"{float(d):g}" for d in offsets)
    text, n = re.subn(r"(?m)^adapter_offsets_deg\s*=.*$", f"adapter_offsets_deg = [{listed}]", text)
    if n != 1:
        raise InputError(base, "design.adapter_offsets_deg", f"expected one such line to replace, found {n}")
    handle, path = tempfile.mkstemp(prefix="coverage-offsets-", suffix=".toml")
    with open(handle, "w", encoding="utf-8") as out:
        out.write(text)
    atexit.register(Path(path).unlink, missing_ok=True)
    return path


def shift(m: ObserverModel, offset, lag):
    u = np.asarray(offset, float) / m.peak_offset_deg
    return m.amplitude_deg * u * np.exp(0.5 - 0.5 * u * u) * np.exp(-np.asarray(lag, float) / m.decay_periods)


def population_truth(model: ObserverModel, offsets, lags, draws: int = 20000):
    """Population-mean PSE, shifts and the curve parameters fitted to the mean curve."""
    rng = np.random.default_rng(12345)
    z = rng.standard_normal((draws, 5)) * model.spread_between_observers
    amp = model.amplitude_deg * np.exp(0.2 * z[:, 2])
    w = model.peak_offset_deg * np.exp(0.15 * z[:, 3])
    tau = model.decay_periods * np.exp(0.2 * z[:, 4])
    d, k = np.meshgrid(np.asarray(offsets, float), np.asarray(lags, float))      # (K, J)
    u = d[None] / w[:, None, None]
    mean = (amp[:, None, None] * u * np.exp(0.5 - 0.5 * u * u) * np.exp(-k[None] / tau[:, None, None])).mean(0)
    prange = peak_bounds(offsets)
    truth = {"pse0": model.pse_deg, "shift": {(float(lag), float(o)): mean[i, j]
                                              for i, lag in enumerate(lags) for j, o in enumerate(offsets)}}
    ones = np.ones(len(offsets))
    for i, lag in enumerate(lags):
        t = fit_tuning(offsets, mean[i][None], ones, prange)
        truth[("amp", float(lag))], truth[("peak", float(lag))] = float(t.amplitude[0]), float(t.peak[0])
    dfit = fit_decay(offsets, np.asarray(lags, float), mean[None], np.ones_like(mean), prange)
    truth["tau"] = float(dfit.tau[0])
    return truth


def observer_truth(m: ObserverModel, offsets, lags):
    truth = {"pse0": m.pse_deg, "tau": m.decay_periods,
             "shift": {(float(lag), float(o)): float(shift(m, o, lag)) for lag in lags for o in offsets}}
    for lag in lags:
        truth[("amp", float(lag))] = float(m.amplitude_deg * np.exp(-lag / m.decay_periods))
        truth[("peak", float(lag))] = m.peak_offset_deg
    return truth


def _inside(lo, hi, true):
    return bool(np.isfinite(lo) and np.isfinite(hi) and lo <= true <= hi)


def score(report, who: str, truth: dict) -> dict:
    """Per interval kind: (covered, total) of one observer's (or the group's) rows."""
    out = defaultdict(lambda: [0, 0])

    def add(kind, lo, hi, true):
        out[kind][0] += _inside(lo, hi, true)
        out[kind][1] += 1

    for r in report.pse[report.pse["observer"] == who].itertuples():
        sh = 0.0 if pd.isna(r.lag) else truth["shift"][(float(r.lag), float(r.adapter_offset_deg))]
        add("condition PSE", r.pse_ci_low, r.pse_ci_high, truth["pse0"] + sh)
        if "steep" in str(r.flags):
            add("condition PSE flagged steep", r.pse_ci_low, r.pse_ci_high, truth["pse0"] + sh)
    for r in report.aftereffect[report.aftereffect["observer"] == who].itertuples():
        add("PSE shift", r.ci_low, r.ci_high, truth["shift"][(float(r.lag), float(r.adapter_offset_deg))])
    for r in report.tuning[report.tuning["observer"] == who].itertuples():
        add("tuning amplitude", r.amplitude_ci_low, r.amplitude_ci_high, truth[("amp", float(r.lag))])
        add("peak offset", r.peak_offset_ci_low, r.peak_offset_ci_high, truth[("peak", float(r.lag))])
    for r in report.decay[report.decay["observer"] == who].itertuples():
        add("decay", r.ci_low, r.ci_high, truth["tau"])
    return {k: tuple(v) for k, v in out.items()}


def observed_information_covariance(a):
    """Covariance of an observer's shifts from the joint fit's inverse observed information (delta method).

    None when a PSE is not estimable (a separated condition or one on a bound).
    """
    fit, conds = a.fit, a.conditions
    pi = fit.layout.pse_index
    base = int(np.flatnonzero(conds["is_baseline"])[0])
    idx = conds.index[~conds["is_baseline"]].to_numpy()
    dmat = np.zeros((idx.size, fit.covariance.shape[0]))
    dmat[np.arange(idx.size), pi[idx]] = 1.0
    dmat[:, pi[base]] -= 1.0
    if not np.all(np.isfinite(fit.covariance[np.ix_(pi, pi)])):
        return None
    return dmat @ np.nan_to_num(fit.covariance) @ dmat.T


def effective_spread_dof(a, reps: np.ndarray, cov: np.ndarray):
    """(β, ν') of one observer from its replicates (see :func:`chi2_candidates`); None without them."""
    if a.boot is None:
        return None
    log_s = replicate_log_spread(a)
    ok = np.isfinite(log_s) & np.all(np.isfinite(reps), axis=1)
    if ok.sum() < 10 or reps.shape[0] != log_s.size:
        return None
    d = reps[ok] - reps[ok].mean(axis=0)
    t_b = np.einsum("bi,bi->b", d, np.linalg.solve(cov, d.T).T)
    beta = float(np.polyfit(log_s[ok] - log_s[ok].mean(), np.log(t_b), 1)[0])
    nu = spread_dof(log_s)
    return (beta, 4 * nu / (2 - beta) ** 2) if beta < 2 and np.isfinite(nu) else None


def replicate_log_spread(a) -> np.ndarray:
    """The log spread of each bootstrap replicate of analysis ``a`` (its mean over conditions), as ``fit`` reads ν."""
    return a.boot.theta[:, np.unique(a.fit.layout.spread_index)].mean(axis=1)


def robust_spread_dof(log_s: np.ndarray) -> float:
    """ν of the fitted spread from a robust scale of its replicates' log spread (NaN with fewer than 10).

    The scale is the IQR over that of a standard normal (``scipy.stats.iqr(scale="normal")``), read as
    :func:`fitting.covariance.spread_dof` reads the SD, ν = 1 / (2 scale²).
    """
    log_s = log_s[np.isfinite(log_s)]
    if log_s.size < 10:
        return float("nan")
    scale = float(stats.iqr(log_s, scale="normal"))
    return 1.0 / (2.0 * scale ** 2) if scale > 0 else float("nan")


def chi2_candidates(report, truths: dict) -> dict:
    """compare's χ² test and gain interval for each observer under candidate references (truth predicted).

    Returns ``{candidate: {observer: (rejected, chi2, dof, gain CI holds 1)}}``.  Candidates:
    normal scores with the bootstrap covariance (an earlier rule: Hartlap-scaled ``r' V^-1 r`` against
    χ², gain with ``V`` known); the observed-information (inverse Hessian, delta method) covariance
    (Efron & Hinkley 1978); the bootstrap-calibrated statistic (share of ``T*_b >= T``, Davison &
    Hinkley 1997, ch. 4; covariance from half the replicates, T*_b from the other half); t scores on
    ``n_trials / 2 - 1`` (trials per track − 1) degrees of freedom; t scores on ``n_trials - 2`` (the
    rule before ``compare`` read ``T / n`` against F on the spread's degrees of freedom); normal scores
    scaled by the side of the printed 95 % interval facing the truth, so that each score passes 1.96
    exactly when the truth falls outside the interval, with the replicates' correlation; ``T / n`` against
    F(n, ν') with the spread's *effective* degrees of freedom ν' = 4 ν / (2 − β)², β the slope of
    log T*_b on log s*_b over the observer's own replicates (how the shifts' scatter grows with the
    fitted spread; ν' = ν when it does not, β = 0); ``T / n`` against F(n, ν) with ν from a robust scale
    of the replicates' log spread (:func:`robust_spread_dof`), and the same with ``T`` from the covariance
    of the replicates whose log spread lies within Tukey's far fences (three IQRs beyond the quartiles).
    """
    out = defaultdict(dict)
    for a in report.analyses:
        reps = a.curves.get("shift_reps") if a.curves else None
        if reps is None or a.observer not in truths:
            continue
        ae = a.aftereffect
        est = ae["pse_shift_deg"].to_numpy(float)
        truth = np.array([truths[a.observer]["shift"][(float(lag), float(o))]
                          for lag, o in zip(ae["lag"], ae["adapter_offset_deg"])])
        n, n_rep = est.size, reps.shape[0]
        if not np.all(np.isfinite(est)):
            continue
        cov = np.cov(reps, rowvar=False)
        h = (n_rep - n - 2) / (n_rep - 1)
        e = est - truth
        t_stat = float(h * e @ np.linalg.solve(cov, e))
        g, g_se, _ = gls_gain(est, truth, h * np.linalg.inv(cov), free_scale=False)
        holds = abs(g - 1.0) <= 1.959964 * g_se
        out["normal scores, gain with V known (earlier)"][a.observer] = (
            stats.chi2.sf(t_stat, n) < 0.05, t_stat, n, holds)
        # out of sample on both sides: covariance from half the replicates, T*_b from the other half
        half_cov = np.cov(reps[1::2], rowvar=False)
        d = reps[::2] - est
        t_star = np.einsum("bi,bi->b", d, np.linalg.solve(half_cov, d.T).T)
        p_cal = (1 + np.sum(t_star >= float(e @ np.linalg.solve(half_cov, e)))) / (1 + d.shape[0])
        out["bootstrap-calibrated T*"][a.observer] = (p_cal < 0.05, t_stat, n, holds)
        oi = observed_information_covariance(a)
        if oi is not None:
            t_oi = float(e @ np.linalg.solve(oi, e))
            g, g_se, _ = gls_gain(est, truth, np.linalg.inv(oi), free_scale=False)
            out["observed information"][a.observer] = (stats.chi2.sf(t_oi, n) < 0.05, t_oi, n,
                                                       abs(g - 1.0) <= 1.959964 * g_se)
        # scores scaled by the printed interval's own side (|z| > 1.96 exactly when the truth is outside it),
        # correlated as the replicates are
        lo, hi = ae["ci_low"].to_numpy(float), ae["ci_high"].to_numpy(float)
        side = np.where(est >= truth, est - lo, hi - est)
        if np.all(side > 0):
            z = 1.959964 * e / side
            sd = np.sqrt(np.diagonal(cov))
            t_int = float(h * z @ np.linalg.solve(cov / np.outer(sd, sd), z))
            out["scores from the printed interval's side"][a.observer] = (
                stats.chi2.sf(t_int, n) < 0.05, t_int, n, np.nan)
        beta_nu = effective_spread_dof(a, reps, cov)
        if beta_nu is not None:
            out["F on the spread's effective degrees of freedom"][a.observer] = (
                stats.f.sf(t_stat / n, n, beta_nu[1]) < 0.05, t_stat, n, np.nan, *beta_nu)
        log_s = replicate_log_spread(a) if a.boot is not None else np.array([])
        nu_rob = robust_spread_dof(log_s)
        if np.isfinite(nu_rob):
            out["F on the spread's robust degrees of freedom"][a.observer] = (
                stats.f.sf(t_stat / n, n, nu_rob) < 0.05, t_stat, n, np.nan, nu_rob)
            # and the covariance without the replicates whose spread lies beyond Tukey's far fences
            q25, q75 = np.nanpercentile(log_s, [25, 75])
            iqr = q75 - q25
            inner = ((log_s >= q25 - 3 * iqr) & (log_s <= q75 + 3 * iqr)) & np.all(np.isfinite(reps), axis=1)
            if inner.sum() > n + 3:
                cov_in = np.cov(reps[inner], rowvar=False)
                h_in = (inner.sum() - n - 2) / (inner.sum() - 1)
                t_in = float(h_in * e @ np.linalg.solve(cov_in, e))
                out["F on the robust degrees of freedom, covariance within the far fences"][a.observer] = (
                    stats.f.sf(t_in / n, n, nu_rob) < 0.05, t_in, n, np.nan, nu_rob, int((~inner).sum()))
        # the rule before compare read T / n against F on the spread's degrees of freedom
        b = agreement(est, ae["ci_low"], ae["ci_high"], truth, None, cov, n_rep, np.nan, trials=ae["n_trials"])
        out["t scores on n_trials - 2 (the rule before)"][a.observer] = (b.chi2_p < 0.05, b.chi2, b.dof,
                                                                         b.gain_ci_low <= 1.0 <= b.gain_ci_high)
        half = ae["n_trials"].to_numpy(float) / 2 + 1       # read as n_trials - 2 = trials per track - 1
        b = agreement(est, ae["ci_low"], ae["ci_high"], truth, None, cov, n_rep, np.nan, trials=half)
        out["t scores on trials per track - 1"][a.observer] = (b.chi2_p < 0.05, b.chi2, b.dof,
                                                               b.gain_ci_low <= 1.0 <= b.gain_ci_high)
    return dict(out)


TABLES = ("pse", "aftereffect", "tuning", "decay")


def method_tables(report, method: str, level: float = 0.95):
    """The observers' tables of ``report`` with PSE and shift limits (and, for percentile, curve limits)
    recomputed by interval ``method`` on the same fit and replicates, plus the group rows built from them.

    Returns ``(tables, seconds spent on the intervals)``.
    """
    own = {k: getattr(report, k)[getattr(report, k)["observer"] != GROUP].copy() for k in TABLES}
    spent = 0.0
    for a in report.analyses:
        base_rows = np.flatnonzero(a.conditions["is_baseline"].to_numpy())
        base = int(base_rows[0]) if base_rows.size else None
        adapted = np.flatnonzero(~a.conditions["is_baseline"].to_numpy()) if base is not None else []
        t0 = time.perf_counter()
        pse_method = "percentile" if method == BY_STATISTIC else method
        plo, phi, slo, shi = pse_shift_intervals(pse_method, a.fit, a.boot, base, adapted, level)
        spent += time.perf_counter() - t0
        sel = (own["pse"]["observer"] == a.observer).to_numpy()
        own["pse"].loc[sel, "pse_ci_low"], own["pse"].loc[sel, "pse_ci_high"] = plo, phi
        sel = (own["aftereffect"]["observer"] == a.observer).to_numpy()
        if sel.any():
            own["aftereffect"].loc[sel, "ci_low"], own["aftereffect"].loc[sel, "ci_high"] = slo, shi
        if method in ("percentile", BY_STATISTIC) and a.boot is not None:
            # by-statistic: percentile peak offsets, the profile intervals of the amplitudes and the decay
            kinds = ["amplitude", "peak_offset"] if method == "percentile" else ["peak_offset"]
            t = own["tuning"]
            profiles = tuning_intervals(a, level) if method == BY_STATISTIC else {}
            for i in np.flatnonzero((t["observer"] == a.observer).to_numpy()):
                lag = int(t["lag"].iloc[i])
                lo, hi = percentile_interval(a.curves[("tuning", lag)], level)
                pick = slice(None) if method == "percentile" else slice(1, 2)
                t.iloc[i, t.columns.get_indexer([f"{k}_ci_low" for k in kinds])] = lo[pick]
                t.iloc[i, t.columns.get_indexer([f"{k}_ci_high" for k in kinds])] = hi[pick]
                if np.all(np.isfinite(profiles.get(lag, np.nan))):
                    t.iloc[i, t.columns.get_indexer(["amplitude_ci_low", "amplitude_ci_high"])] = profiles[lag]
            d = own["decay"]
            sel = (d["observer"] == a.observer).to_numpy()
            if method == "percentile" and sel.any() and "decay" in a.curves:
                lo, hi = percentile_interval(a.curves["decay"][:, 2], level)
                d.loc[sel, "ci_low"], d.loc[sel, "ci_high"] = lo[0], hi[0]
            if method == BY_STATISTIC and sel.any():
                limits = decay_interval(a, level)
                if np.all(np.isfinite(limits)):
                    d.loc[sel, "ci_low"], d.loc[sel, "ci_high"] = limits
    tables = dict(own)
    if len(report.analyses) > 1:
        tables["pse"] = pd.concat([own["pse"], group_pse(own["pse"], level)], ignore_index=True)
        g_ae = group_aftereffect(own["aftereffect"], level)
        tuning, decay, _, _ = group_curves(own["aftereffect"], level, [], own["tuning"], own["decay"])
        tables["aftereffect"] = pd.concat([own["aftereffect"], g_ae], ignore_index=True)
        tables["tuning"] = pd.concat([own["tuning"], tuning], ignore_index=True)
        tables["decay"] = pd.concat([own["decay"], decay], ignore_index=True)
    return tables, spent


def simulate_group(text: str, model, n_obs: int, seed: int, tmp: Path):
    """Simulate ``n_obs`` observers on the protocol ``text`` in ``tmp``: (logs, observer models, offsets, lags)."""
    path = tmp / "protocol.toml"
    path.write_text(text, encoding="utf-8")
    protocol = load_protocol(str(path))
    logs = [str(p) for p in simulate(protocol, str(path), text, tmp / "logs", model, n_obs, seed, progress=False)]
    return logs, draw_observers(model, n_obs, seed), protocol.design.adapter_offsets_deg, protocol.design.lags


def one_group(args) -> dict:
    """Simulate one group, fit it with each bootstrap; score observers and group, compare with the truth."""
    text, model, n_obs, seed, n_boot, pop, bootstraps, intervals = args
    out = {"n_obs": n_obs, "fit_s": {}, "interval_s": {}, "scores": {}, "rejected": {}}
    with tempfile.TemporaryDirectory() as tmp:
        logs, models, offsets, lags = simulate_group(text, model, n_obs, seed, Path(tmp))
        truths = {f"sim{i + 1:02d}": observer_truth(m, offsets, lags) for i, m in enumerate(models)}
        truths["group"] = pop
        rows = [{"observer": who, "lag": lag, "adapter_offset_deg": o, "pse_shift_deg": v}
                for who, t in truths.items() for (lag, o), v in t["shift"].items()]
        for who in truths:
            pd.DataFrame([r for r in rows if r["observer"] == who]).drop(columns="observer").to_csv(
                Path(tmp) / f"pred_{who}.csv", index=False)
        for boot in bootstraps:
            fit_dir = Path(tmp) / f"fit_{boot}"
            t0 = time.perf_counter()
            # the replicates' own covariances are kept only when a studentized interval is wanted
            report = fit_logs(logs, str(fit_dir), n_boot=n_boot, seed=seed, progress=False, figures=False,
                              tracks=track_factories(logs) if boot in ("rerun", "pilot") else None,
                              track_use="pilot" if boot == "pilot" else "replicates",
                              interval="studentized" if "studentized" in intervals else "bca")
            out["fit_s"][boot] = time.perf_counter() - t0
            out.setdefault("candidates", {})[boot] = chi2_candidates(report, truths)
            reps = {f"s{seed}_{a.observer}": a.curves.get("shift_reps") for a in report.analyses}
            for method in intervals:
                tables, spent = method_tables(report, method)
                out["interval_s"][(boot, method)] = spent
                out["scores"][(boot, method)] = {who: score(SimpleNamespace(**tables), who, t)
                                                 for who, t in truths.items()}
                # observer rows for groups pooled across simulated groups (renamed to stay apart)
                own = {k: v[v["observer"] != GROUP].assign(observer=lambda f: f"s{seed}_" + f["observer"])
                       for k, v in tables.items()}
                out.setdefault("tables", {})[(boot, method)] = (own, reps)
            rejected = {}
            for who in truths:
                table = compare_results(fit_dir, Path(tmp) / f"pred_{who}.csv", Path(tmp) / "cmp",
                                        figures=False).table
                row = table[(table["observer"] == who) & (table["lag"] == "all")].iloc[0]
                if not np.isfinite(row["dof"]):   # compare leaves out an observer with a point lacking its CI
                    continue
                # p value and reference (e.g. "F(32, 47.3)") kept for rescoring other readings of chi2
                rejected[who] = (bool(row["chi2_p"] < 0.05), float(row["chi2"]), int(row["dof"]),
                                 float(row["gain_ci_low"]) <= 1.0 <= float(row["gain_ci_high"]),
                                 float(row["chi2_p"]), str(row["chi2_reference"]))
            out["rejected"][boot] = rejected
    return out


def shrunk_excess_between(data) -> np.ndarray:
    """Candidate null (``fitting.group_chi2.null_between``): the per-cell excess shrunk towards its mean over cells.

    The cells' DerSimonian–Laird moment estimates beyond the curve part,
    ``t_c``, unclipped, are shrunk towards their mean ``m`` by the empirical
    Bayes factor of Efron & Morris (1975, JASA 70): ``m + A / (A + s_c²) ·
    (t_c − m)`` with ``s_c² = 2 (v_c + τ²)² / (k − 1)`` the moment estimate's
    sampling variance for ``k`` observers of equal within-observer variance
    ``v_c`` (``τ²``: the curve part plus the clipped ``m``) and ``A`` the
    cells' variance of ``t_c`` beyond the mean ``s_c²``, clipped at 0; then
    clipped at 0 per cell.  With no spread between cells beyond noise
    (``A = 0``) it is the common-excess null, with much the per-cell one.
    """
    curve = curve_between_covariance(data.shifts, data.within)
    y, v = data.shifts, data.variances
    t = dersimonian_laird(y, v, clip=False) - np.diagonal(curve)
    ok = np.isfinite(y) & np.isfinite(v) & (v > 0)
    w = np.where(ok, 1.0 / np.where(ok, v, 1.0), 0.0)
    k = ok.sum(axis=0)
    sw = w.sum(axis=0)
    v_equal = (k - 1) / (sw - (w * w).sum(axis=0) / sw)
    m = float(np.mean(t))
    s2 = 2.0 * (v_equal + np.diagonal(curve) + max(m, 0.0)) ** 2 / (k - 1)
    a = max(float(np.var(t, ddof=1) - np.mean(s2)), 0.0)
    return curve + np.diag(np.maximum(m + a / (a + s2) * (t - m), 0.0))


def _pooled_members(names, sizes, partitions: int):
    """(partition, size, members) of every group formed from ``names``: disjoint within a partition (seed = its number)."""
    for part in range(partitions):
        order = np.random.default_rng(part).permutation(names)
        for size in sizes:
            for start in range(0, len(order) - size + 1, size):
                yield part, size, set(order[start:start + size])


def _pooled_tables(results, boot):
    """Observer names, their rows of every table (one frame per table) and their shift replicates."""
    tables = [r["tables"][boot] for r in results]
    names = [obs for own, _ in tables for obs in own["pse"]["observer"].unique()]
    rows = {k: pd.concat([own[k] for own, _ in tables], ignore_index=True) for k in tables[0][0]}
    return names, rows, {k: v for _, r in tables for k, v in r.items()}


def _group_test_data(ae_rows: pd.DataFrame, reps: dict, pop: dict, level: float):
    """A pooled group's shifts (``group_aftereffect``), the true shifts of its cells and its :class:`GroupData`."""
    g_ae = group_aftereffect(ae_rows, level)
    cells = list(zip(g_ae["lag"].astype(float), g_ae["adapter_offset_deg"].astype(float)))
    covariances = {o: np.cov(reps[o], rowvar=False) for o in ae_rows["observer"].unique()}
    return g_ae, [pop["shift"][c] for c in cells], GroupData.from_tables(ae_rows, covariances, cells, level)


#: Null models of the group χ² scored side by side by ``--nulls`` (``fitting.group_chi2.null_between``).
NULLS = {"default: curve part and each cell's clipped excess": "curve and cells",
         "curve part only": "curve",
         "curve part and one excess shared by the cells": "curve and common excess",
         "curve part and the cells' excess shrunk to their mean (Efron–Morris)": shrunk_excess_between}


def null_rejections(results, boot, sizes, pop: dict, partitions: int, level: float = 0.95) -> list[str]:
    """The group χ²'s rejections at 5 % (truth predicted) under each of :data:`NULLS`, on the same pooled groups.

    Only the simulated p values are computed (no intervals, no other
    candidates), so a cell's kept fits are scored in minutes.
    """
    names, rows, reps = _pooled_tables(results, boot)
    hits = defaultdict(list)
    for _, size, members in _pooled_members(names, sizes, partitions):
        _, pred, data = _group_test_data(rows["aftereffect"][rows["aftereffect"]["observer"].isin(members)],
                                         reps, pop, level)
        for name, between in NULLS.items():
            (_, p), = calibrated_p(data, pred, between=between)
            hits[(size, name)].append(p < 0.05)
    lines = []
    for (size, name), h in hits.items():
        share, one = np.mean(h), len(names) // size        # ± of one partition (an upper bound)
        lines.append(f"| groups of {size} | {name} | {100 * share:.1f} ± {100 * np.sqrt(share * (1 - share) / one):.1f} % "
                     f"| {len(h)} |")
    return lines


def pooled_groups(results, boot, sizes, pop: dict, level: float = 0.95, partitions: int = 1):
    """Groups formed from all simulated observers of a cell (disjoint, at random), scored like ``fit``'s.

    Every observer is drawn independently from the population, so any set of
    observers is a simulated group; pooling gives many more groups per CPU
    second than simulating each group separately.  Coverage is scored on the
    first partition of the observers into groups; the χ² rejections on
    ``partitions`` partitions (seeds 0, 1, ...), which shares each observer
    between several groups: their average is less noisy than one partition,
    but its groups are not independent, so the Monte Carlo error stated for
    it is that of one partition (an upper bound).

    Returns ``(units, rejected, independent)``: ``independent[label]`` is the
    number of disjoint groups in one partition.
    """
    names, rows, reps = _pooled_tables(results, boot)
    units, rejected, independent = defaultdict(list), defaultdict(list), {}
    for part, size, members in _pooled_members(names, sizes, partitions):
        label = f"pooled groups of {size}" + (f" ({partitions} partitions)" if partitions > 1 else "")
        independent[label] = independent[f"{label}: GLS gain of the group shifts"] = len(names) // size
        sub = {k: v[v["observer"].isin(members)] for k, v in rows.items()}
        g_ae, pred, data = _group_test_data(sub["aftereffect"], reps, pop, level)
        if part == 0:
            tuning, decay, _, _ = group_curves(sub["aftereffect"], level, [], sub["tuning"], sub["decay"])
            rep = SimpleNamespace(pse=group_pse(sub["pse"], level), aftereffect=g_ae, tuning=tuning,
                                  decay=decay)
            for kind, pair in score(rep, GROUP, pop).items():
                units[(f"pooled groups of {size}", kind)].append(pair)
        fake = [SimpleNamespace(observer=o, curves={"shift_reps": reps[o]},
                                aftereffect=sub["aftereffect"][sub["aftereffect"]["observer"] == o])
                for o in sorted(members)]
        cov = group_covariance(fake, g_ae, group_weights(sub["aftereffect"], level), level)
        matrix, _, dof = covariance_matrix(cov, GROUP, g_ae["lag"], g_ae["adapter_offset_deg"])[:3]
        a = agreement(g_ae["pse_shift_deg"], g_ae["ci_low"], g_ae["ci_high"], pred, None, matrix, np.nan, dof)
        # compare's p value: from simulated groups (fitting.group_chi2), as compare_results computes it
        (_, p_sim), = calibrated_p(data, pred)
        (_, p_curve), = calibrated_p(data, pred, between="curve")
        (_, p_common), = calibrated_p(data, pred, between="curve and common excess")
        # the group gain as compare gives it: the observers' own gains (against the same predictions), combined
        gains = []
        for o in fake:
            ae = o.aftereffect
            own_pred = [pop["shift"][(float(lag), float(x))] for lag, x in zip(ae["lag"], ae["adapter_offset_deg"])]
            reps_o = o.curves["shift_reps"]
            own = agreement(ae["pse_shift_deg"], ae["ci_low"], ae["ci_high"], own_pred, None,
                            np.cov(reps_o, rowvar=False), reps_o.shape[0], np.nan, trials=ae["n_trials"])
            gains.append((own.gain, own.gain_se))
        _, g_low, g_high = combine_gains(*zip(*gains))
        rejected[label].append((p_sim < 0.05, a.chi2, a.dof, g_low <= 1.0 <= g_high))
        rejected[f"{label}: GLS gain of the group shifts"].append(
            (p_sim < 0.05, a.chi2, a.dof, a.gain_ci_low <= 1.0 <= a.gain_ci_high))
        rejected[f"{label}: t-read normal scores against chi2 (before)"].append(
            (a.chi2_p < 0.05, a.chi2, a.dof, np.nan))
        rejected[f"{label}: simulated, between-observer part along the curve only"].append(
            (p_curve < 0.05, a.chi2, a.dof, np.nan))
        rejected[f"{label}: simulated, curve part and one excess shared by the cells"].append(
            (p_common < 0.05, a.chi2, a.dof, np.nan))
        for name in ("t-read normal scores against chi2 (before)",
                     "simulated, between-observer part along the curve only",
                     "simulated, curve part and one excess shared by the cells"):
            independent[f"{label}: {name}"] = independent[label]
        weights = group_weights(sub["aftereffect"], level)
        matrix_b, matrix_o, matrix_d = (
            covariance_matrix(group_covariance(fake, g_ae, weights, level, between=kind),
                              GROUP, g_ae["lag"], g_ae["adapter_offset_deg"]).matrix
            for kind in ("cells", "none", size_and_decay_between))
        for name, rej in group_chi2_candidates(sub["aftereffect"], g_ae, matrix, dof, np.asarray(pred),
                                               level, matrix_b, matrix_o, matrix_d).items():
            rejected[f"{label}: {name}"].append(rej)
            independent[f"{label}: {name}"] = independent[label]
    return units, rejected, independent


def _wide(shifts: pd.DataFrame, col: str, cells) -> np.ndarray:
    """Observers × cells array of ``col``, the cells ``[(lag, offset), ...]`` in the given order."""
    table = shifts.pivot_table(index="observer", columns=["lag", "adapter_offset_deg"], values=col, dropna=False)
    where = {(float(lag), float(o)): j for j, (lag, o) in enumerate(table.columns)}
    return table.to_numpy(float)[:, [where[c] for c in cells]]


def size_and_decay_between(shifts, within, cells) -> np.ndarray:
    """Candidate: the between-observer covariance in the plane of the mean curve ``m`` and ``lag · m``.

    A gain per observer moves the cells along ``m``; a decay constant per
    observer along ``lag · m`` (the derivative of ``exp(-lag / τ)`` in
    ``1/τ``).  Method of moments in that plane (the observers' 2 × 2 sample
    covariance of their projections less their mean own covariance there),
    clipped to positive semi-definite.
    """
    y = np.asarray(shifts, float)
    m = np.nanmean(y, axis=0)
    lags = np.array([c[0] for c in cells], float)
    q, _ = np.linalg.qr(np.nan_to_num(np.column_stack([m, lags * m])))
    d = np.nan_to_num(y - m) @ q
    t = d.T @ d / (y.shape[0] - 1) - np.mean([q.T @ np.nan_to_num(c) @ q for c in within], axis=0)
    vals, vecs = np.linalg.eigh(t)
    return q @ ((vecs * np.clip(vals, 0.0, None)) @ vecs.T) @ q.T


def group_chi2_candidates(shifts, g_ae, matrix, dof, pred, level: float = 0.95, between_matrix=None,
                          own_matrix=None, plane_matrix=None) -> dict:
    """The group χ² under candidate alternatives, as ``{name: (rejected, chi2, df, gain CI holds 1)}``.

    ``matrix`` is ``fit``'s group covariance (``between="curve"``, the default).

    * ``between_matrix``: the group correlation with the whole between-observer
      covariance across cells added (``group_covariance(..., between="cells")``);
    * ``own_matrix``: the group correlation from the observers' own
      covariances alone (``between="none"``; ``fit``'s rule before the
      seventh session);
    * ``plane_matrix``: with the between-observer covariance in the plane of
      the curve's size and decay (:func:`size_and_decay_between`);

    * the plain Hartung–Knapp standard errors, without the fixed-effect floor
      (:func:`fitting.meta.random_effects` with ``floor=False``), with the
      group correlation ``compare`` uses;
    * a sign-flip randomisation test over observers (every sign pattern of
      the observers' deviations from the prediction in the weighted group
      mean, with ``compare``'s group covariance as the metric; exact when
      each deviation is symmetric about zero).
    """
    cells = [(float(lag), float(o)) for lag, o in zip(g_ae["lag"], g_ae["adapter_offset_deg"])]
    y = _wide(shifts, "pse_shift_deg", cells)
    v = _wide(shifts.assign(_v=variance_from_interval(shifts["ci_low"], shifts["ci_high"], level)), "_v", cells)
    plain = random_effects(y, v, level, floor=False)
    est, nan = g_ae["pse_shift_deg"].to_numpy(float), float("nan")
    sd = np.sqrt(np.diagonal(matrix))
    hk = agreement(est, g_ae["ci_low"], g_ae["ci_high"], pred, None,
                   matrix / np.outer(sd, sd) * np.outer(plain.se, plain.se), np.nan, dof)
    dev = np.nan_to_num(plain.weights * (y - pred))                     # (k, cells)
    k = dev.shape[0]
    if k <= 12:
        signs = np.array(list(itertools.product((1.0, -1.0), repeat=k)))
    else:                                                                # 4,096 random patterns
        signs = np.random.default_rng(k).choice((1.0, -1.0), (4096, k))
        signs[0] = 1.0
    inv = np.linalg.pinv(matrix)
    t = np.einsum("sc,cd,sd->s", signs @ dev, inv, signs @ dev)
    p_flip = float(np.mean(t >= t[0] * (1 - 1e-12)))                   # row 0: all signs +1, the data
    out = {}
    for name, other in (("correlation with between-observer covariance", between_matrix),
                        ("correlation from the observers' own covariances (before)", own_matrix),
                        ("correlation with between-observer covariance of size and decay", plane_matrix)):
        if other is not None:
            b = agreement(est, g_ae["ci_low"], g_ae["ci_high"], pred, None, other, np.nan, dof)
            out[name] = (b.chi2_p < 0.05, b.chi2, b.dof, b.gain_ci_low <= 1.0 <= b.gain_ci_high)
    return out | {"plain Hartung–Knapp errors (no floor)": (hk.chi2_p < 0.05, hk.chi2, hk.dof, nan),
            "sign flips over observers": (p_flip < 0.05, float(t[0]), len(cells), nan)}


def combination_only(draws: int = 20000, seed: int = 1) -> list[str]:
    """Coverage of the combination step alone: k estimates with se 0.7-1.2, se known to +-15 %.

    Compares plain Hartung-Knapp, the default (fixed-effect floor) and the
    Knapp-Hartung truncation (:func:`fitting.meta.random_effects`).
    """
    rng = np.random.default_rng(seed)
    lines = ["| observers | between SD | plain Hartung–Knapp | with fixed-effect floor (default) | truncated q ≥ 1 |",
             "|---|---|---|---|---|"]
    for k in (3, 8):
        for tau in (0.0, 0.3, 0.6):
            se = rng.uniform(0.7, 1.2, (k, draws))
            y = rng.normal(0, tau, (k, draws)) + rng.normal(0, se)
            v = (se * np.exp(rng.normal(0, 0.15, (k, draws)))) ** 2
            cov = [np.mean((c.low <= 0) & (c.high >= 0)) for c in
                   (random_effects(y, v, floor=False), random_effects(y, v), random_effects(y, v, truncate=True))]
            lines.append(f"| {k} | {tau:g} | " + " | ".join(f"{100 * c:.1f} %" for c in cov) + " |")
    return lines


def _coverage(units):
    """Pooled share and its Monte Carlo SE over experiments (ratio estimator)."""
    cov = np.array([c for c, _ in units], float)
    tot = np.array([t for _, t in units], float)
    keep = tot > 0
    cov, tot = cov[keep], tot[keep]
    if tot.sum() == 0:
        return np.nan, np.nan, 0
    p = cov.sum() / tot.sum()
    n = tot.size
    se = np.sqrt(np.sum((cov - p * tot) ** 2) / (n * (n - 1))) / tot.mean() if n > 1 else np.nan
    return p, se, int(tot.sum())


def _verdict(p, se, lo, hi):
    if not np.isfinite(p):
        return "–"
    if lo <= p <= hi:
        return "met"
    if not np.isfinite(se):
        return "missed (no MC SE)"
    return "MISSED" if (p + 2 * se < lo or p - 2 * se > hi) else "missed (within 2 MC SE)"


def _spread_bias_group(job) -> list[dict]:
    """Point fits (no bootstrap) of one simulated group with each lapse bound: one row per observer and bound."""
    text, model, size, seed, lapse_maxes = job
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        logs, models, offsets, lags = simulate_group(text, model, size, seed, Path(tmp))
        for lapse_max in lapse_maxes:
            report = fit_logs(logs, str(Path(tmp) / f"fit{lapse_max}"), n_boot=0, seed=seed, progress=False,
                              figures=False, lapse_max=lapse_max)
            for a, m in zip(report.analyses, models):
                t = observer_truth(m, offsets, lags)
                true = np.array([t["pse0"] + (0.0 if pd.isna(r.lag) else
                                              t["shift"][(float(r.lag), float(r.adapter_offset_deg))])
                                 for r in a.pse.itertuples()])
                rows.append({"lapse_max": lapse_max, "ratio": a.fit.spread[0] / m.spread_deg,
                             "lapse_on_bound": a.fit.lapse_at_bound, "z": (a.fit.pse - true) / a.fit.pse_se})
    return rows


def spread_bias(args, model) -> list[str]:
    """Fitted shared spread over the observer's true spread, and the Wald z of the PSEs, without bootstrap.

    Adaptive tracks place levels by the previous answers; with short tracks
    this biases the fitted spread low (Kaernbach 2001, from memory), which
    narrows every interval computed at the fitted parameters.  The spread of
    ``(PSE - truth) / se`` (1 if the errors were right) shows the same thing.
    Collapsed spreads (below a tenth or a quarter of the truth) and lapses on
    their bound are counted for each ``--lapse-max``, on the same logs.
    """
    sizes = " and ".join(str(s) for s in args.sizes)
    lines = [f"# fitted spread / true spread and PSE z-scores ({args.groups} groups of each size {sizes}, numbers "
             f"{args.first_group}–{args.first_group + args.groups - 1}, no bootstrap)",
             "| procedure | trials/cond. | lapse bound | fitted / true spread ± SE | lowest | below 0.1 / 0.25 of "
             "the truth | lapse on its bound | SD of (PSE − truth) / se | observers |",
             "|---|---|---|---|---|---|---|---|---|"]
    for proc in args.procedures:
        for n_trials in args.trials:
            text = protocol_text(args.protocol, n_trials, proc, args.tracks, args.bayes_placement, args.bayes_alone,
                                 args.bayes_prior_sd)
            jobs = [(text, model, size, 1000 * size + g, args.lapse_max) for size in args.sizes
                    for g in range(args.first_group, args.first_group + args.groups)]
            rows = pd.DataFrame([r for group in pool_map(_spread_bias_group, jobs, args.jobs) for r in group])
            for lapse_max, d in rows.groupby("lapse_max", sort=False):
                r = d["ratio"].to_numpy()
                z = np.concatenate(d["z"].to_list())
                z = z[np.isfinite(z)]
                lines.append(f"| {proc} | {n_trials} | {lapse_max:g} | {r.mean():.3f} ± "
                             f"{r.std(ddof=1) / np.sqrt(r.size):.3f} | {r.min():.3f} | {(r < 0.1).sum()} / "
                             f"{(r < 0.25).sum()} | {d['lapse_on_bound'].sum()} | {z.std():.2f} | {r.size} |")
            print("\n".join(lines), file=sys.stderr, flush=True)     # so far, for long runs
    return lines


def timing(args, model) -> list[str]:
    """``fit`` with each interval of ``--intervals`` on the same logs of one group: seconds per observer."""
    lines = ["# fit time with each interval, same logs (one group of "
             f"{max(args.sizes)} per cell, {args.boot} replicates, fixed-level bootstrap, 1 process)",
             "| procedure | trials/cond. | interval | fit s/observer | ratio to bca |", "|---|---|---|---|---|"]
    for proc in args.procedures:
        for n_trials in args.trials:
            text = protocol_text(args.protocol, n_trials, proc, args.tracks, args.bayes_placement, args.bayes_alone,
                                 args.bayes_prior_sd)
            size = max(args.sizes)
            with tempfile.TemporaryDirectory() as tmp:
                path = Path(tmp) / "protocol.toml"
                path.write_text(text, encoding="utf-8")
                protocol = load_protocol(str(path))
                logs = [str(p) for p in simulate(protocol, str(path), text, Path(tmp) / "logs", model, size,
                                                 7, progress=False)]
                took = {}
                for method in ["bca"] + [m for m in args.intervals if m != "bca"]:
                    t0 = time.perf_counter()
                    fit_logs(logs, str(Path(tmp) / f"fit_{method}"), n_boot=args.boot, seed=7, progress=False,
                             figures=False, interval=method)
                    took[method] = (time.perf_counter() - t0) / size
                    lines.append(f"| {proc} | {n_trials} | {method} | {took[method]:.2f} | "
                                 f"{took[method] / took['bca']:.2f} |")
    return lines


def chi2_scale_lines(results, model, label: str, common_nu=(20, 40, 60, 100, 200, 400)) -> list[str]:
    """How an observer's χ² follows its fitted spread, from kept fits (``--scale-check``).

    ``compare`` reads ``T / n`` against F(n, ν), ν the fitted spread's degrees of
    freedom, which assumes the shifts' covariance scales with the square of
    the spread it was built at, so that log(T / n) falls with slope −2 against
    log(fitted / true spread).  Prints that slope (least squares over the
    observers), the SD of log(fitted / true spread), and the share of
    rejections if every observer's ν were one common number instead.
    """
    x, t, n = [], [], []
    for res in results:
        pse = res["tables"][("pilot", BY_STATISTIC)][0]["pse"]
        fitted = pse.groupby("observer")["spread_deg"].first()
        for who, r in res["rejected"].get("pilot", {}).items():
            if who == GROUP:
                continue
            name = next(o for o in fitted.index if o.endswith("_" + who))
            seed = int(name.split("_")[0][1:])
            truth = draw_observers(model, res["n_obs"], seed)[int(who[3:]) - 1].spread_deg
            x.append(np.log(fitted[name] / truth))
            t.append(r[1])
            n.append(r[2])
    x, t, n = np.array(x), np.array(t), np.array(n)
    slope = np.polyfit(x, np.log(t / n), 1)[0]
    own = [c for res in results
           for c in res["candidates"].get("pilot", {}).get("F on the spread's effective degrees of freedom", {}).values()]
    betas = np.array([c[4] for c in own])
    beta = (f"; β of the observers' own replicates: median {np.median(betas):.2f}, so ν' = 4 ν / (2 − β)² is "
            f"{np.median(4 / (2 - betas) ** 2):.2f} ν (median)" if own else "")
    common = ", ".join(f"ν {nu}: {100 * np.mean(stats.f.sf(t / n, n, nu) < 0.05):.1f} %" for nu in common_nu)
    return [f"{label}: {x.size} observers; slope of log(χ²/n) on log(fitted / true spread) {slope:.2f} "
            f"(−2 if the covariance scaled with the spread squared); SD of log(fitted / true spread) "
            f"{x.std():.3f}; rejections with one common ν: {common}{beta}"]


def cell_results(args, proc: str, n_trials: int, text: str, model, pop) -> list[dict]:
    """One cell's simulated and fitted groups: computed (and kept with ``--save``) or read (``--rescore``)."""
    name = f"{proc}_{n_trials}.pickle"
    if args.rescore:
        results = []
        design = {offset for _, offset in pop["shift"]}
        for folder in args.rescore:       # several folders: their cells scored as one (seeds must differ)
            try:
                with open(folder / name, "rb") as f:
                    kept = pickle.load(f)
                offsets = {float(o) for res in kept for own, _ in res["tables"].values()
                           for o in own["aftereffect"]["adapter_offset_deg"]}
            except (OSError, EOFError, pickle.UnpicklingError, KeyError, TypeError, ValueError) as exc:
                refuse(f"{folder / name}: not fits kept by --save ({type(exc).__name__})")
            if not offsets <= design:
                refuse(f"{folder / name}: --offsets: the kept fits have adapter offsets "
                         f"{sorted(offsets)}, the protocol {sorted(design)} (give the run's --offsets)")
            results += kept
        return results
    jobs = [(text, model, size, 1000 * size + g, args.boot, pop, args.bootstraps, args.intervals)
            for size in args.sizes for g in range(args.first_group, args.first_group + args.groups)]
    results = pool_map(one_group, jobs, args.jobs)
    if args.save:
        args.save.mkdir(parents=True, exist_ok=True)
        with open(args.save / name, "wb") as f:
            pickle.dump(results, f)
    return results


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--groups", type=int, default=6, help="groups of each size per cell")
    ap.add_argument("--first-group", type=int, default=0,
                    help="number of the first group (its seed is 1000 x size + number): a run with "
                         "--first-group K adds groups that a run with --groups K did not have")
    ap.add_argument("--sizes", type=int, nargs="+", default=[3, 8])
    ap.add_argument("--boot", type=int, default=1000,
                    help="bootstrap replicates per fit (default: fit's own default, 1000)")
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--trials", type=int, nargs="+", default=[24, 40], help="trials per condition")
    ap.add_argument("--procedures", nargs="+", default=["updown", "bayesian"])
    ap.add_argument("--pool", action="store_true",
                    help="also score groups formed from all observers of a cell (many more groups)")
    ap.add_argument("--partitions", type=int, default=1,
                    help="with --pool: score the χ² of pooled groups on this many random partitions of the "
                         "observers into groups (less noisy; the stated error is that of one partition)")
    ap.add_argument("--bootstraps", nargs="+", default=["fixed", "rerun"], choices=["fixed", "pilot", "rerun"],
                    help="fixed: levels held, fixed-level pilot; pilot: levels held, pilot re-runs the tracks; "
                         "rerun: tracks re-run for every replicate (fit --rerun-tracks)")
    ap.add_argument("--intervals", nargs="+", default=[BY_STATISTIC], choices=list(INTERVAL_METHODS),
                    help="intervals scored on the same fits: by-statistic (default of fit), bca, percentile, profile "
                         "(PSEs and shifts by profile likelihood), studentized (bootstrap-t for PSEs and shifts)")
    ap.add_argument("--timing", action="store_true",
                    help="first time fit with each interval of --intervals on one group (s per observer)")
    ap.add_argument("--spread-bias", action="store_true",
                    help="only measure the fitted / true spread, collapsed spreads and PSE z-scores (no bootstrap, "
                         "each --lapse-max on the same logs) and stop")
    ap.add_argument("--lapse-max", type=float, nargs="+", default=[DEFAULT_LAPSE_MAX],
                    help="with --spread-bias: upper bounds of the free lapse to compare (default: fit's)")
    ap.add_argument("--protocol", default=str(ROOT / "protocols" / "offset_by_lag.toml"))
    ap.add_argument("--offsets", type=float, nargs="+", metavar="DEG",
                    help="the protocol's adapter offsets replaced by these (fewer shifts per lag; give the same "
                         "with --rescore)")
    ap.add_argument("--tracks", type=int, choices=(1, 2), default=2, help="tracks per condition sharing its trials")
    ap.add_argument("--bayes-placement", choices=("entropy", "pse_mean", "straddle"),
                    help="placement of Bayesian tracks")
    ap.add_argument("--bayes-prior-sd", type=float,
                    help="SD (deg) of the Bayesian tracks' Gaussian prior on the PSE (bayes_pse_prior_sd_deg; "
                         "default the protocol's, 6; 0 = uniform, the default before)")
    ap.add_argument("--bayes-alone", action="store_true",
                    help="Bayesian tracks that do not share spread and lapse (bayes_share_spread = false)")
    ap.add_argument("--model", default=str(ROOT / "protocols" / "observers" / "typical.toml"))
    ap.add_argument("--save", type=Path, help="keep each cell's fits in this folder (pickles)")
    ap.add_argument("--rescore", type=Path, nargs="+",
                    help="score the fits kept by --save in these folders (as one cell); no simulation")
    ap.add_argument("--nulls", action="store_true",
                    help="with --rescore: only the group chi2's rejections under each null model, on the same "
                         "pooled groups (--sizes, --partitions)")
    ap.add_argument("--scale-check", action="store_true",
                    help="with --rescore: only print how the observers' chi2 follows their fitted spread")
    args = ap.parse_args()
    for folder in args.rescore or []:
        missing = [f"{p}_{t}.pickle" for p in args.procedures for t in args.trials if not (folder / f"{p}_{t}.pickle").is_file()]
        if missing:
            ap.error(f"--rescore: {folder} holds no {missing[0]} (give --procedures and --trials of the kept run)")
    if args.boot < 50 and not args.rescore and not args.spread_bias:
        ap.error(f"--boot: at least 50 replicates (a covariance of the 32 shifts needs more than 34), not {args.boot}")
    if args.scale_check and not args.rescore:
        ap.error("--scale-check needs --rescore DIR (kept fits)")
    if args.nulls and not args.rescore:
        ap.error("--nulls needs --rescore DIR (kept fits)")
    if args.partitions < 1:
        ap.error(f"--partitions: expected a whole number >= 1, got {args.partitions}")
    model = load_model(args.model)
    given = args.protocol
    try:
        if args.offsets:
            args.protocol = with_offsets(args.protocol, args.offsets)
        base = load_protocol(args.protocol)
    except InputError as exc:
        where = f"{given} with --offsets" if args.offsets else given
        refuse(f"{where}: {exc.field}: {exc.message}")
    pop = population_truth(model, base.design.adapter_offsets_deg, base.design.lags)
    t0 = time.perf_counter()
    if args.scale_check:
        for proc in args.procedures:
            for n_trials in args.trials:
                results = cell_results(args, proc, n_trials, "", model, pop)
                print("\n".join(chi2_scale_lines(results, model, f"{proc}, {n_trials} trials")))
        return
    if args.spread_bias:
        print("\n".join(spread_bias(args, model)))
        return
    if args.nulls:
        print("| groups | null model of the group χ² | rejections at 5 % (truth predicted) ± MC SE of one partition | tests |")
        print("|---|---|---|---|")
        for proc in args.procedures:
            for n_trials in args.trials:
                results = cell_results(args, proc, n_trials, "", model, pop)
                print(f"| **{proc}, {n_trials} trials, {sum(r['n_obs'] for r in results)} observers, "
                      f"{args.partitions} partitions** |  |  |  |")
                print("\n".join(null_rejections(results, (args.bootstraps[0], args.intervals[0]), args.sizes, pop,
                                                args.partitions)), flush=True)
        print(f"\ntotal {time.perf_counter() - t0:.0f} s")
        return
    if args.timing:
        print("\n".join(timing(args, model)) + "\n", flush=True)
    print("# the combination step alone (20,000 simulated sets each; MC SE about 0.2 %)")
    print("\n".join(combination_only()) + "\n")
    runs = (f"the fits kept in {', '.join(map(str, args.rescore))}" if args.rescore else
            f"{args.groups} groups of each size {args.sizes} per cell (numbers {args.first_group}–"
            f"{args.first_group + args.groups - 1}), {args.boot} replicates")
    print(f"# coverage: {runs}, model {Path(args.model).name} "
          f"(between-observer spread {model.spread_between_observers:g})")
    print("| procedure | trials/cond. | bootstrap / interval | who | statistic | coverage ± MC SE | intervals | target 93–97 % |")
    print("|---|---|---|---|---|---|---|---|")
    rej_lines, independent = [], {}
    for proc in args.procedures:
        for n_trials in args.trials:
            text = protocol_text(args.protocol, n_trials, proc, args.tracks, args.bayes_placement, args.bayes_alone,
                                 args.bayes_prior_sd)
            results = cell_results(args, proc, n_trials, text, model, pop)
            for boot in args.bootstraps:
                rej = defaultdict(list)
                for res in results:
                    for who in res["scores"][(boot, args.intervals[0])]:
                        label = "observers" if who != "group" else f"groups of {res['n_obs']}"
                        if who in res["rejected"][boot]:
                            rej[label].append(res["rejected"][boot][who])
                for res in results:
                    for name, by_obs in res["candidates"][boot].items():
                        rej[f"observers: {name}"] += list(by_obs.values())
                for method in args.intervals:
                    units = defaultdict(list)
                    for res in results:
                        for who, sc in res["scores"][(boot, method)].items():
                            label = "observers" if who != "group" else f"groups of {res['n_obs']}"
                            for kind, pair in sc.items():
                                units[(label, kind)].append(pair)
                    if args.pool:
                        more_units, more_rej, independent = pooled_groups(results, (boot, method), args.sizes,
                                                                          pop, partitions=args.partitions)
                        units.update(more_units)
                        if method == args.intervals[0]:
                            rej.update(more_rej)
                    for (label, kind), u in sorted(units.items()):
                        p, se, n = _coverage(u)
                        print(f"| {proc} | {n_trials} | {boot} / {method} | {label} | {kind} | "
                              f"{100 * p:.1f} ± {100 * se:.1f} % | {n} | {_verdict(p, se, 0.93, 0.97)} |")
                    extra = np.mean([r["interval_s"][(boot, method)] / r["n_obs"] for r in results])
                    print(f"| {proc} | {n_trials} | {boot} / {method} | – | interval seconds per observer "
                          f"(after the fit) | {extra:.2f} s |  |  |")
                for label, r in sorted(rej.items()):
                    share = np.mean([x[0] for x in r])
                    se = np.sqrt(share * (1 - share) / independent.get(label, len(r)))
                    mean_chi2 = np.mean([x[1] / x[2] for x in r])
                    gain_cov = np.mean([x[3] for x in r])      # NaN: a candidate without a gain
                    rej_lines.append(f"| {proc} | {n_trials} | {boot} | {label} | {100 * share:.1f} ± {100 * se:.1f} % | "
                                     f"{len(r)} | {mean_chi2:.2f} | {f'{100 * gain_cov:.0f} %' if np.isfinite(gain_cov) else '–'} | "
                                     f"{_verdict(share, se, 0.03, 0.08)} |")
                fit_s = np.mean([r["fit_s"][boot] / r["n_obs"] for r in results])
                rej_lines.append(f"| {proc} | {n_trials} | {boot} | fit time per observer | {fit_s:.2f} s |  |  |  |  |")
            print("# χ² lines so far:\n" + "\n".join(rej_lines), file=sys.stderr, flush=True)
            sys.stdout.flush()
    print()
    print("| procedure | trials/cond. | bootstrap | who | χ² rejections at 5 % (truth predicted) ± MC SE | tests | "
          "mean χ²/df | gain CI holds 1 | target 3–8 % |")
    print("|---|---|---|---|---|---|---|---|---|")
    print("\n".join(rej_lines))
    print(f"\ntotal {time.perf_counter() - t0:.0f} s")


if __name__ == "__main__":
    try:
        with scratch_folder():
            main()
    except KeyboardInterrupt:
        sys.exit("bench_coverage: interrupted; the cells finished before were printed (and kept with --save), "
                 "the rest is lost; no temporary folder is left")
