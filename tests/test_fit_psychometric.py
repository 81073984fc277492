"""Psychometric fits checked against statsmodels and scipy (external references)."""

import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import optimize, special

from conftest import run_cli
from fitting.psychometric import (DEFAULT_LAPSE_MAX, Cells, SeparationWarning, escape_saddles, fit_cells,
                                  fit_joint, fit_psychometric, negative_loglik, probability_cw, solve_batch)
from fitting.psychometric import _derivatives
from fitting.tables import read_logs


def _trials(rng, n=240, pse=1.3, spread=2.5, lapse=0.0, lo=-8, hi=8):
    x = np.round(rng.uniform(lo, hi, n), 1)
    p = lapse / 2 + (1 - lapse) * special.ndtr((x - pse) / spread)
    return x, (rng.random(n) < p).astype(float)


def _probit(x, y, method="irls"):
    X = sm.add_constant(x)
    model = sm.GLM(y, X, family=sm.families.Binomial(link=sm.families.links.Probit()))
    return model.fit(method=method, tol=1e-12, maxiter=200) if method == "irls" else model.fit(method=method)


def test_lapse_zero_equals_statsmodels_probit_glm():
    # Reference: statsmodels' binomial GLM with probit link on the same trials
    # (README, Models).  P = Phi(b0 + b1 x)  <=>  PSE = -b0/b1, spread = 1/b1.
    rng = np.random.default_rng(11)
    for _ in range(5):
        x, y = _trials(rng)
        fit = fit_psychometric(x, y, lapse=0.0)
        b0, b1 = _probit(x, y).params
        assert abs(fit.pse[0] - (-b0 / b1)) < 1e-4
        assert abs(fit.spread[0] - 1 / b1) < 1e-4
        assert fit.converged


def test_standard_errors_match_statsmodels_observed_information():
    # Reference: statsmodels GLM fitted by Newton (covariance from the observed
    # Hessian), transformed to (PSE, spread) by the delta method.
    rng = np.random.default_rng(5)
    x, y = _trials(rng, n=300)
    fit = fit_psychometric(x, y, lapse=0.0)
    res = _probit(x, y, method="newton")
    b0, b1 = res.params
    jac = np.array([[-1 / b1, b0 / b1 ** 2], [0.0, -1 / b1 ** 2]])
    cov = jac @ res.cov_params() @ jac.T
    assert fit.pse_se[0] == pytest.approx(np.sqrt(cov[0, 0]), rel=1e-3)
    assert fit.spread_se[0] == pytest.approx(np.sqrt(cov[1, 1]), rel=1e-3)


def test_logistic_option_equals_statsmodels_logit_glm():
    # Reference: statsmodels binomial GLM with its default logit link.
    rng = np.random.default_rng(3)
    x, y = _trials(rng)
    fit = fit_psychometric(x, y, sigmoid="logistic", lapse=0.0)
    res = sm.GLM(y, sm.add_constant(x), family=sm.families.Binomial()).fit(tol=1e-12)
    b0, b1 = res.params
    assert abs(fit.pse[0] + b0 / b1) < 1e-4
    assert abs(fit.spread[0] - 1 / b1) < 1e-4
    assert fit.jnd[0] == pytest.approx(fit.spread[0] * np.log(3.0))  # logit(0.75) = ln 3


def test_joint_shared_spread_equals_glm_with_condition_intercepts():
    # Reference: statsmodels probit GLM with one intercept per condition and a
    # common slope: PSE_c = -a_c / b, shared spread = 1 / b.
    rng = np.random.default_rng(8)
    xs, ys, cs = [], [], []
    for c, pse in enumerate([-2.0, 0.5, 3.0]):
        x, y = _trials(rng, n=150, pse=pse, spread=2.0)
        xs.append(x), ys.append(y), cs.append(np.full(x.size, c))
    x, y, c = map(np.concatenate, (xs, ys, cs))
    X = np.column_stack([(c == j).astype(float) for j in range(3)] + [x])
    res = sm.GLM(y, X, family=sm.families.Binomial(link=sm.families.links.Probit())).fit(tol=1e-12)
    fit = fit_joint(x, y, [f"c{j}" for j in c], spread="shared", lapse=0.0)
    b = res.params[3]
    np.testing.assert_allclose(fit.pse, -res.params[:3] / b, atol=1e-4)
    np.testing.assert_allclose(fit.spread, 1 / b, atol=1e-4)
    # per-condition spread = separate GLMs
    per = fit_joint(x, y, [f"c{j}" for j in c], spread="per_condition", lapse=0.0)
    for j in range(3):
        b0, b1 = _probit(x[c == j], y[c == j]).params
        assert abs(per.pse[j] + b0 / b1) < 1e-4 and abs(per.spread[j] - 1 / b1) < 1e-4


@pytest.mark.filterwarnings("ignore::fitting.psychometric.SeparationWarning")
def test_a_separated_condition_under_a_shared_spread_keeps_a_finite_pse_and_error():
    # Reference: statsmodels probit GLM with condition intercepts and a common slope, fitted by Newton
    # (covariance from the observed Hessian), whose estimates stay finite when one condition alone is
    # separated (the slope is held by the others); the PSE's error by the delta method on (a_c, b). Before, such a PSE had no error, and a separated baseline cost the
    # observer every shift's weight, hence the tuning and decay fits (common practice, no source).
    rng = np.random.default_rng(11)
    xs, ys, cs = [], [], []
    for c, pse in enumerate([-2.0, 0.5]):
        x, y = _trials(rng, n=150, pse=pse, spread=2.0)
        xs.append(x), ys.append(y), cs.append(np.full(x.size, c))
    x_sep = np.array([-6.0, -4.0, -3.0, -2.0, -1.0, 1.0, 2.0, 3.0, 4.0, 6.0])
    xs.append(x_sep), ys.append((x_sep > 0).astype(float)), cs.append(np.full(x_sep.size, 2))
    x, y, c = map(np.concatenate, (xs, ys, cs))
    X = np.column_stack([(c == j).astype(float) for j in range(3)] + [x])
    res = sm.GLM(y, X, family=sm.families.Binomial(link=sm.families.links.Probit())).fit(
        method="newton", start_params=np.r_[0.0, 0.0, 0.0, 0.5], tol=1e-12, maxiter=200)
    fit = fit_joint(x, y, [f"c{j}" for j in c], spread="shared", lapse=0.0)
    assert fit.separation[2] == "complete separation"
    a, b = res.params[2], res.params[3]
    grad = np.array([-1.0 / b, a / b**2])
    se = float(np.sqrt(grad @ res.cov_params()[np.ix_([2, 3], [2, 3])] @ grad))
    assert fit.pse[2] == pytest.approx(-a / b, abs=1e-4)
    assert fit.pse_se[2] == pytest.approx(se, rel=1e-3)


def test_deviance_equals_statsmodels_binomial_counts():
    # Reference: statsmodels GLM deviance on (successes, failures) per level,
    # which is the deviance against the saturated model.
    rng = np.random.default_rng(21)
    levels = np.repeat(np.linspace(-6, 6, 9), 12)
    y = (rng.random(levels.size) < special.ndtr((levels - 0.7) / 2.2)).astype(float)
    fit = fit_psychometric(levels, y, lapse=0.0)
    ux = np.unique(levels)
    k = np.array([y[levels == v].sum() for v in ux])
    n = np.array([(levels == v).sum() for v in ux])
    res = sm.GLM(np.column_stack([k, n - k]), sm.add_constant(ux),
                 family=sm.families.Binomial(link=sm.families.links.Probit())).fit(tol=1e-12)
    assert fit.deviance == pytest.approx(res.deviance, abs=1e-6)
    assert fit.loglik == pytest.approx(res.llf - np.sum(np.log(special.comb(n, k))), abs=1e-6)


def test_free_lapse_reaches_the_maximum_found_by_scipy():
    # Reference: scipy's bounded quasi-Newton optimiser (L-BFGS-B) on the same
    # likelihood, started from several points; ours must be at least as good.
    rng = np.random.default_rng(4)
    x, y = _trials(rng, n=400, lapse=0.06, spread=1.5)
    fit = fit_psychometric(x, y)
    cells, lay = fit.cells, fit.layout

    def nll(th):
        return float(negative_loglik(th[None], cells.x[None], cells.n[None], cells.k[None], lay)[0])

    best = min(optimize.minimize(nll, start, method="L-BFGS-B",
                                 bounds=list(zip(fit.lower, fit.upper))).fun
               for start in ([0, 0, 0.01], [2, 1, 0.05], [-1, 0.5, 0.09]))
    assert -fit.loglik <= best + 1e-7
    assert 0.0 <= fit.lapse <= DEFAULT_LAPSE_MAX


def test_lapse_stays_in_bounds_and_is_flagged():
    rng = np.random.default_rng(9)
    x, y = _trials(rng, n=500, lapse=0.4)
    fit = fit_psychometric(x, y)
    assert fit.lapse == pytest.approx(DEFAULT_LAPSE_MAX)
    assert fit.lapse_at_bound and np.isnan(fit.lapse_se)


@pytest.mark.parametrize("answers", ["separated", "all_cw", "all_ccw"])
def test_separation_gives_warning_and_bounded_flagged_estimate(answers):
    x = np.repeat([-3.0, -2.0, -1.0, 1.0, 2.0, 3.0], 5)
    y = {"separated": (x > 0), "all_cw": np.ones_like(x), "all_ccw": np.zeros_like(x)}[answers]
    with pytest.warns(SeparationWarning):
        fit = fit_psychometric(x, y.astype(float))
    for v in (fit.pse[0], fit.spread[0], fit.lapse, fit.loglik, fit.deviance):
        assert np.isfinite(v)
    assert fit.lower[0] <= fit.pse[0] <= fit.upper[0]
    assert fit.flags[0] and np.isnan(fit.pse_se[0])
    assert "separat" in fit.summary() or "all " in fit.summary()
    if answers == "separated":
        assert -1.0 < fit.pse[0] < 1.0       # inside the gap between the answers


def test_batched_solver_equals_one_by_one():
    rng = np.random.default_rng(2)
    fits, ks = [], []
    x = np.repeat(np.linspace(-5, 5, 11), 6)
    for _ in range(6):
        y = (rng.random(x.size) < 0.01 + 0.98 * special.ndtr((x - 0.5) / 2)).astype(float)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fits.append(fit_psychometric(x, y))
        ks.append(fits[-1].cells.k)
    f0 = fits[0]
    sol = solve_batch(f0.theta[None], f0.cells.x[None], f0.cells.n[None], np.stack(ks), f0.layout,
                      f0.lower, f0.upper, tol=1e-12)
    np.testing.assert_allclose(sol.theta, np.stack([f.theta for f in fits]), atol=1e-6)


def test_cells_reject_bad_responses():
    with pytest.raises(ValueError):
        Cells.from_trials([0, 1], [0, 2])


def test_summary_is_readable():
    rng = np.random.default_rng(1)
    x, y = _trials(rng)
    text = fit_cells(Cells.from_trials(x, y), ["baseline"]).summary()
    assert "baseline" in text and "log-likelihood" in text and "deviance" in text


SADDLE_LOG = Path(__file__).parent / "data" / "saddle" / "sim03-s1.trials.csv"
SEPARATED_BASELINE_LOG = Path(__file__).parent / "data" / "separated_baseline" / "sim04-s1.trials.csv"
FLAT_PSE_LOG = Path(__file__).parent / "data" / "flat_pse" / "sim08-s1.trials.csv"
COLLAPSED_LOG = Path(__file__).parent / "data" / "collapsed_spread" / "sim08-s1.trials.csv"


@pytest.mark.filterwarnings("ignore::fitting.psychometric.SeparationWarning")
def test_no_condition_is_left_on_a_saddle_of_the_likelihood():
    # simulated: 24 up-down trials per condition; in condition adapt-15_lag3 the answers split evenly
    # around the reference, so with the shared spread small its likelihood has two peaks and Newton's
    # method stopped on the saddle between them (zero gradient by symmetry). The observed information
    # was then indefinite and the whole covariance NaN: no tuning or decay for this observer at all.
    trials = read_logs([SADDLE_LOG])
    fit = fit_joint(trials["test_offset_deg"], trials["response_cw"], trials["condition"])
    cells, lay = fit.cells, fit.layout
    # a maximum: the observed information is positive definite, so every PSE has an error (the separated
    # condition too: the spread it shares with the others keeps its PSE finite) ...
    assert np.isfinite(np.diagonal(fit.covariance)[lay.pse_index]).all()
    assert [c for c, s in zip(fit.conditions, fit.separation) if s] == ["adapt-90_lag1"]
    # ... and no condition's PSE can do better. Reference: scipy's brute-force grid (then Nelder-Mead)
    # along each PSE with the other parameters held.
    theta = fit.theta
    for c in range(cells.n_conditions):
        def nll(mu, c=c):
            th = theta.copy()
            th[lay.pse_index[c]] = mu[0]
            return float(negative_loglik(th[None], cells.x[None], cells.n[None], cells.k[None], lay)[0])
        span = (fit.lower[lay.pse_index[c]], fit.upper[lay.pse_index[c]])
        best = optimize.brute(nll, [span], Ns=400, full_output=True)[1]
        assert -fit.loglik <= best + 1e-7, fit.conditions[c]



@pytest.mark.filterwarnings("ignore::fitting.psychometric.SeparationWarning")
@pytest.mark.parametrize("log", [SADDLE_LOG, FLAT_PSE_LOG], ids=["saddle", "flat-pse"])
def test_bootstrap_refits_are_moved_off_saddles(log):
    # Parametric-bootstrap refits of short adaptive tracks stop on saddles too (about 1-2 % of them at
    # 24 up-down trials per condition, benchmarks/bench_replicate_saddles.py); the bootstrap moves them.
    trials = read_logs([log])
    fit = fit_joint(trials["test_offset_deg"], trials["response_cw"], trials["condition"])
    cells, lay = fit.cells, fit.layout
    pse, spread = fit.theta[lay.pse_index], np.exp(fit.theta[lay.spread_index])
    p = probability_cw(cells.x, pse[:, None], spread[:, None], fit.lapse)
    k = np.random.default_rng(5).binomial(cells.n.astype(np.int64), p, size=(300,) + p.shape).astype(float)
    args = cells.x[None], cells.n[None], k, lay, fit.lower[None], fit.upper[None]
    sol = solve_batch(fit.theta[None], *args)

    def saddles(s):
        # Reference: numpy's dense symmetric eigenvalues (LAPACK) of the observed information over the
        # parameters off their bounds (the information itself is checked against statsmodels above)
        info = _derivatives(s.theta, cells.x[None], cells.n[None], k, lay, "gaussian", fisher=False)[2]
        return np.array([np.linalg.eigvalsh(h[np.ix_(~b, ~b)])[0] < -1e-6 * np.abs(h).max()
                         for h, b in zip(info, s.at_bound)])

    before = sol.nll.copy()
    stuck = saddles(sol)
    assert stuck.any()
    escape_saddles(sol, *args[:3], lay, fit.lower, fit.upper, "gaussian")
    assert not saddles(sol)[stuck].any()
    assert (sol.nll[stuck] < before[stuck] - 1e-6).all() and (sol.nll <= before + 1e-9).all()

@pytest.mark.filterwarnings("ignore::fitting.psychometric.SeparationWarning")
def test_a_pse_the_answers_do_not_pin_down_leaves_the_other_errors_alone():
    # simulated, 24 up-down trials per condition; in adapt+15_lag1 the tracks left a gap from -8 to +8 deg
    # and the PSE can sit anywhere in its middle. Its information vanished and, before, took every
    # other condition's error with it.
    trials = read_logs([FLAT_PSE_LOG])
    fit = fit_joint(trials["test_offset_deg"], trials["response_cw"], trials["condition"])
    cells, lay = fit.cells, fit.layout
    se = np.sqrt(np.diagonal(fit.covariance)[lay.pse_index])
    flat = [c for c, e in zip(fit.conditions, se) if not np.isfinite(e)]
    assert flat == ["adapt+15_lag1"]
    # it is flat indeed: the likelihood moves by less than 0.01 over +-2 deg around the estimate
    c = fit.conditions.index("adapt+15_lag1")
    th = np.repeat(fit.theta[None], 9, axis=0)
    th[:, lay.pse_index[c]] += np.linspace(-2, 2, 9)
    nll = negative_loglik(th, cells.x[None], cells.n[None], cells.k[None], lay)
    assert np.ptp(nll) < 0.01


@pytest.mark.filterwarnings("ignore::fitting.psychometric.SeparationWarning")
def test_the_default_lapse_bound_keeps_short_tracks_from_collapsing_the_spread():
    # simulated: 24 up-down trials per condition, observer spread 2.38 deg and lapse 0.02. With the lapse
    # free up to 0.1 the likelihood's maximum trades the spread for lapses: the spread collapses to a
    # fortieth of the truth and the lapse takes every answer the steep function gets wrong.
    trials = read_logs([COLLAPSED_LOG])
    args = trials["test_offset_deg"], trials["response_cw"], trials["condition"]

    def scipy_best(fit):
        # Reference: scipy's bounded quasi-Newton optimiser (L-BFGS-B) on the same likelihood in the
        # same box, started at a steep, a middling and a true spread (lapse 0.02)
        cells, lay = fit.cells, fit.layout

        def nll(th):
            return float(negative_loglik(th[None], cells.x[None], cells.n[None], cells.k[None], lay)[0])
        found = []
        for spread in (0.05, 0.5, 2.5):
            th = fit.theta.copy()
            th[lay.spread_index], th[lay.lapse_index] = np.log(spread), 0.02
            found.append(optimize.minimize(nll, th, method="L-BFGS-B", bounds=list(zip(fit.lower, fit.upper))))
        return min(found, key=lambda r: r.fun)

    wide = fit_joint(*args, lapse_max=0.1)
    ref = scipy_best(wide)
    # the collapse is the likelihood's own maximum, not a solver's accident: scipy finds it too
    assert -wide.loglik <= ref.fun + 1e-6
    assert wide.spread[0] < 0.1 and np.exp(ref.x[wide.layout.spread_index][0]) < 0.1
    assert wide.lapse > 0.08
    # Wichmann & Hill (2001, Perception & Psychophysics 63) bound the lapse to [0, 0.06] (from memory);
    # with that bound, the default, the maximum in the box is a smooth function with the lapse on the bound
    fit = fit_joint(*args)
    ref = scipy_best(fit)
    assert -fit.loglik <= ref.fun + 1e-6
    assert fit.spread[0] > 0.8 and np.exp(ref.x[fit.layout.spread_index][0]) > 0.8
    assert fit.lapse == pytest.approx(DEFAULT_LAPSE_MAX) and fit.lapse_at_bound


def test_the_command_line_default_lapse_bound_is_the_fits_default():
    from runner.cli import build_parser
    fit_parser = build_parser()._subparsers._group_actions[0].choices["fit"]
    assert fit_parser.get_default("lapse_max") == DEFAULT_LAPSE_MAX


@pytest.mark.parametrize("log", [SADDLE_LOG, SEPARATED_BASELINE_LOG, FLAT_PSE_LOG],
                         ids=["saddle", "separated-baseline", "flat-pse"])
def test_fit_reports_every_curve_of_logs_that_lost_them(tmp_path, log):
    # simulated, 24 up-down trials per condition; each lost its tuning and decay fits before: to the
    # saddle above, to a baseline whose answers are separated (its PSE had no error, so no shift had),
    # or to one PSE that the answers do not pin down
    done = run_cli("fit", log, "--out", tmp_path / "fit", "--seed", 8064, "--bootstrap", 50, "--no-figures")
    assert done.returncode == 0, done.stderr
    tuning = pd.read_csv(tmp_path / "fit" / "tuning.csv")
    assert sorted(tuning["lag"]) == [0, 1, 2, 3]
    assert np.isfinite(tuning["amplitude_ci_low"]).all()
    assert len(pd.read_csv(tmp_path / "fit" / "decay.csv")) == 1
