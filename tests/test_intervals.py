"""Profile-likelihood and studentized (bootstrap-t) intervals of PSEs and shifts."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import optimize, special, stats

from conftest import PROTOCOLS, run_cli
from fitting.bootstrap import (parametric_bootstrap, percentile_interval, replicate_pse_covariance,
                               studentized_interval)
from fitting.observer import pse_shift_intervals
from fitting.profile import cutoff, profile_pse, profile_shifts
from fitting.psychometric import Cells, fit_cells, probability_cw

Q95 = stats.chi2.ppf(0.95, 1)


def _trials(rng, pses, per=30, spread=2.0, lapse=0.0):
    cond = np.repeat(np.arange(len(pses)), per)
    mu = np.asarray(pses, float)[cond]
    x = np.round(rng.normal(mu, 2.5) * 2) / 2          # half-degree steps around each PSE
    y = (rng.random(x.size) < probability_cw(x, mu, spread, lapse)).astype(float)
    return x, y, cond


def test_cutoff_is_the_chi2_quantile():
    # Cox & Hinkley (1974, §9.3): the likelihood-ratio limit drops 2 log L by chi2_1(level)
    assert cutoff(0.95) == pytest.approx(Q95, rel=1e-12)
    assert cutoff(0.8) == pytest.approx(stats.chi2.ppf(0.8, 1), rel=1e-12)


def test_profile_pse_matches_statsmodels_probit_glm_with_the_pse_held():
    # Reference: statsmodels GLM (binomial, probit link).  With the lapse fixed
    # at 0, P(cw) = Phi((x - mu) / s); holding mu gives a probit GLM on the
    # single regressor (x - mu) without intercept, whose maximised
    # log-likelihood is the profile; its roots at chi2_1(0.95) / 2 below the
    # unrestricted maximum (intercept + slope GLM) are the limits.
    rng = np.random.default_rng(11)
    x, y, _ = _trials(rng, [0.7], per=60)
    cells = Cells.from_trials(x, y)
    fit = fit_cells(cells, lapse=0.0, warn=False)
    used = cells.n[0] > 0
    lv, nn, kk = cells.x[0][used], cells.n[0][used], cells.k[0][used]
    endog = np.column_stack([kk, nn - kk])
    probit = sm.families.Binomial(link=sm.families.links.Probit())
    full = sm.GLM(endog, sm.add_constant(lv), family=probit).fit()
    mu_hat = -full.params[0] / full.params[1]

    def drop(mu):
        held = sm.GLM(endog, (lv - mu)[:, None], family=probit).fit()
        return 2.0 * (full.llf - held.llf) - Q95

    lo = optimize.brentq(drop, mu_hat - 10, mu_hat, xtol=1e-10)
    hi = optimize.brentq(drop, mu_hat, mu_hat + 10, xtol=1e-10)
    prof = profile_pse(fit, 0.95, tol=1e-7)
    assert fit.pse[0] == pytest.approx(mu_hat, abs=1e-6)
    assert prof.low[0] == pytest.approx(lo, abs=1e-5)
    assert prof.high[0] == pytest.approx(hi, abs=1e-5)
    assert not (prof.low_on_bound[0] or prof.high_on_bound[0])


def _nll(params, x, n, k):
    """Negative log-likelihood of baseline + one condition, shared spread, free lapse (brute force)."""
    mu0, mu1, log_s, lapse = params
    total = 0.0
    for mu, xs, ns, ks in ((mu0, x[0], n[0], k[0]), (mu1, x[1], n[1], k[1])):
        p = np.clip(lapse / 2 + (1 - lapse) * special.ndtr((xs - mu) / np.exp(log_s)), 1e-12, 1 - 1e-12)
        total -= (ks * np.log(p) + (ns - ks) * np.log1p(-p)).sum()
    return total


def test_profile_shift_matches_a_brute_force_refit_with_scipy():
    # Reference: scipy.optimize (L-BFGS-B inside the same box, from several
    # starts) maximising over the baseline PSE, spread and a free lapse with the
    # shift held, and brentq for the limits.
    rng = np.random.default_rng(5)
    x, y, cond = _trials(rng, [0.0, 1.5], per=40, lapse=0.04)
    cells = Cells.from_trials(x, y, cond, 2)
    fit = fit_cells(cells, warn=False)
    xs, ns, ks = cells.x, cells.n, cells.k
    box = list(zip(fit.lower, fit.upper))
    best = -fit.loglik

    def held(delta):
        def f(p):
            return _nll([p[0], p[0] + delta, p[1], p[2]], xs, ns, ks)
        starts = [[fit.pse[0], fit.theta[2], lam] for lam in (0.0, 0.02, 0.06)]
        return min(optimize.minimize(f, s, method="L-BFGS-B", bounds=[box[0], box[2], box[3]],
                                     options={"ftol": 1e-14, "gtol": 1e-10}).fun for s in starts)

    est = fit.pse[1] - fit.pse[0]
    drop = (lambda d: 2.0 * (held(d) - best) - Q95)
    lo = optimize.brentq(drop, est - 8, est, xtol=1e-8)
    hi = optimize.brentq(drop, est, est + 8, xtol=1e-8)
    prof = profile_shifts(fit, 0, [1], 0.95, tol=1e-7)
    assert prof.low[0] == pytest.approx(lo, abs=2e-4)
    assert prof.high[0] == pytest.approx(hi, abs=2e-4)


def test_profile_limits_move_with_the_levels_of_their_own_condition_only():
    # property (no reference needed): adding c to every level of condition j
    # moves its PSE, its PSE limits and its shift limits by exactly c, and
    # leaves every other condition's limits alone (the likelihood is the same
    # function of the shifted parameter)
    rng = np.random.default_rng(3)
    x, y, cond = _trials(rng, [0.0, 1.0, -1.5, 2.0], per=24, lapse=0.03)
    c, j = 3.25, 2
    fits = [fit_cells(Cells.from_trials(x + np.where(cond == j, d, 0.0), y, cond, 4), warn=False)
            for d in (0.0, c)]
    a, b = (profile_pse(f, 0.95, tol=1e-8) for f in fits)
    sa, sb = (profile_shifts(f, 0, [1, 2, 3], 0.95, tol=1e-8) for f in fits)
    move = np.array([0, 0, c, 0])
    np.testing.assert_allclose(b.low, a.low + move, atol=1e-5)
    np.testing.assert_allclose(b.high, a.high + move, atol=1e-5)
    np.testing.assert_allclose(sb.low, sa.low + move[1:], atol=1e-5)
    np.testing.assert_allclose(sb.high, sa.high + move[1:], atol=1e-5)
    # and every limit sits where twice the log-likelihood has dropped by the cut-off, with the
    # estimate inside: a wider level gives a wider interval around it
    narrow = profile_pse(fits[0], 0.8)
    assert np.all(a.low < narrow.low) and np.all(narrow.low < fits[0].pse)
    assert np.all(fits[0].pse < narrow.high) and np.all(narrow.high < a.high)


def test_one_sided_answers_get_no_profile_interval_and_a_flat_side_stops_at_the_box():
    x = np.repeat([-2.0, 0.0, 2.0], 8)
    y = np.ones(x.size)                                    # all clockwise: PSE not estimable
    x2 = np.repeat([-4.0, -2.0, 0.0, 2.0, 4.0], 10)
    y2 = (x2 > -3).astype(float)                           # separated: the spread is not estimable
    cells = Cells.from_trials(np.concatenate([x2, x]), np.concatenate([y2, y]),
                              np.repeat([0, 1], [x2.size, x.size]), 2)
    fit = fit_cells(cells, warn=False)
    prof = profile_pse(fit)
    assert np.isnan(prof.low[1]) and np.isnan(prof.high[1])
    assert np.all(np.isnan(profile_shifts(fit, 0, [1]).low))


def test_studentized_interval_with_a_constant_se_is_the_basic_interval():
    # Davison & Hinkley (1997, §5.2): with se* = se the studentized limits are
    # the basic bootstrap limits 2 T - T*_(1-a/2), 2 T - T*_(a/2)
    reps = np.random.default_rng(2).gamma(3.0, size=(5001, 1))
    est = 2.5
    lo, hi = studentized_interval([est], [0.7], reps, np.full_like(reps, 0.7))
    plo, phi = percentile_interval(reps)
    assert lo[0] == pytest.approx(2 * est - phi[0], rel=1e-12)
    assert hi[0] == pytest.approx(2 * est - plo[0], rel=1e-12)


def test_studentized_bootstrap_of_a_normal_mean_gives_students_t_interval():
    # Efron & Tibshirani (1993, ch. 12): for a normal mean the bootstrap-t pivot
    # (xbar* - xbar) / (s* / sqrt n) of a parametric bootstrap is Student's t
    # with n - 1 df, so the limits approach scipy.stats.t's interval (the
    # normal-theory interval would be much narrower at n = 6).
    rng = np.random.default_rng(9)
    data = rng.normal(10.0, 2.0, 6)
    n, m, s = data.size, data.mean(), data.std(ddof=1)
    star = rng.normal(m, s, (40000, n))
    lo, hi = studentized_interval([m], [s / np.sqrt(n)], star.mean(axis=1)[:, None],
                                  (star.std(axis=1, ddof=1) / np.sqrt(n))[:, None])
    ref = stats.t.interval(0.95, n - 1, loc=m, scale=s / np.sqrt(n))
    half = ref[1] - m
    assert lo[0] == pytest.approx(ref[0], abs=0.03 * half)
    assert hi[0] == pytest.approx(ref[1], abs=0.03 * half)


def test_each_replicate_se_is_that_replicates_own_fit():
    # the covariance kept per replicate is what fit_cells reports for the same answers
    rng = np.random.default_rng(4)
    fits = []
    for lapse in (0.03, 0.0):
        x, y, cond = _trials(rng, [0.0, 1.0, -1.0], per=30, lapse=lapse)
        fits.append(fit_cells(Cells.from_trials(x[np.argsort(cond, kind="stable")], y, cond, 3), warn=False))
    shape = max(f.cells.x.shape[1] for f in fits)
    pad = (lambda a, f: np.pad(a, ((0, 0), (0, shape - a.shape[1])), mode="edge" if a is f.cells.x else "constant"))
    x = np.stack([pad(f.cells.x, f) for f in fits])
    n = np.stack([pad(f.cells.n, f) for f in fits])
    k = np.stack([pad(f.cells.k, f) for f in fits])
    cov = replicate_pse_covariance(np.stack([f.theta for f in fits]), x, n, k, fits[0].layout, "gaussian",
                                   np.stack([f.at_bound for f in fits]))
    for r, f in enumerate(fits):
        pi = f.layout.pse_index
        np.testing.assert_allclose(cov[r], f.covariance[np.ix_(pi, pi)], rtol=1e-8)
    assert fits[1].lapse_at_bound     # one of them with the lapse held on its bound


def test_pse_shift_intervals_methods_agree_on_plenty_of_trials():
    # with 200 trials per condition all four methods give nearly the same
    # limits (first-order equivalence, Efron & Tibshirani 1993, ch. 12-14)
    rng = np.random.default_rng(8)
    x, y, cond = _trials(rng, [0.0, 1.0, -1.0], per=200, lapse=0.02)
    fit = fit_cells(Cells.from_trials(x, y, cond, 3), warn=False)
    boot = parametric_bootstrap(fit, 2000, np.random.default_rng(2), progress=False, studentize=True)
    got = {m: pse_shift_intervals(m, fit, boot, 0, [1, 2]) for m in ("bca", "percentile", "profile", "studentized")}
    width = got["profile"][1] - got["profile"][0]
    for m, limits in got.items():
        for a, b in zip(limits, got["profile"]):
            np.testing.assert_allclose(a, b, atol=0.1 * width.mean(), err_msg=m)


def test_unknown_interval_and_profile_without_a_shared_spread_are_input_errors(tmp_path):
    from fitting.errors import InputError
    from fitting.report import fit_trials
    with pytest.raises(InputError, match="--interval.*profile, studentized"):
        fit_trials(None, interval="bootstrap-t")
    with pytest.raises(InputError, match="--spread shared"):
        fit_trials(None, interval="profile", spread="per_condition")


def test_profile_with_one_spread_per_condition_is_refused_in_one_line(tmp_path):
    assert run_cli("simulate", PROTOCOLS / "pilot_short.toml", "--out", tmp_path).returncode == 0
    done = run_cli("fit", tmp_path, "--out", tmp_path / "out", "--interval", "profile", "--spread", "per_condition")
    assert done.returncode == 2
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and "--interval" in lines[0] and "--spread shared" in lines[0]
