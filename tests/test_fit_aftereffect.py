"""Tuning and decay fits against scipy's least-squares fitters; parameter recovery."""

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats

from conftest import ROOT, run_cli
from fitting.covariance import covariance_matrix

from fitting.aftereffect import TAU_BOUNDS, decay_profile_interval, dog, fit_decay, fit_tuning, tuning_profile_interval
from fitting.synthetic import recovery_study

OFFSETS = np.array([-90, -60, -30, -15, 15, 30, 60, 90.0])


def test_tuning_fit_equals_scipy_curve_fit():
    # Reference: scipy.optimize.curve_fit (weighted least squares, sigma = SE).
    rng = np.random.default_rng(1)
    se = rng.uniform(0.3, 0.6, OFFSETS.size)
    for _ in range(5):
        y = dog(OFFSETS, 2.5, 28.0) + rng.normal(0, se)
        ours = fit_tuning(OFFSETS, y[None], 1 / se ** 2)
        ref, _ = optimize.curve_fit(dog, OFFSETS, y, p0=[2, 30], sigma=se)
        assert ours.amplitude[0] == pytest.approx(ref[0], rel=1e-5)
        assert ours.peak[0] == pytest.approx(ref[1], rel=1e-5)


def test_decay_fit_equals_scipy_least_squares():
    # Reference: scipy.optimize.least_squares on the same weighted residuals.
    rng = np.random.default_rng(2)
    lags = np.array([0, 1, 2, 3.0])
    truth = dog(OFFSETS[None], 3.0, 30.0) * np.exp(-lags[:, None] / 1.5)
    y = truth + rng.normal(0, 0.4, truth.shape)
    w = np.full(truth.shape, 1 / 0.16)
    ours = fit_decay(OFFSETS, lags, y[None], w)

    def resid(p):
        return (np.sqrt(w) * (y - dog(OFFSETS[None], p[0], p[1]) * np.exp(-lags[:, None] / p[2]))).ravel()

    ref = optimize.least_squares(resid, [2.0, 25.0, 1.0], xtol=1e-14, ftol=1e-14).x
    assert ours.amplitude0[0] == pytest.approx(ref[0], rel=1e-5)
    assert ours.peak[0] == pytest.approx(ref[1], rel=1e-5)
    assert ours.tau[0] == pytest.approx(ref[2], rel=1e-4)


def test_exact_curves_are_recovered_and_bounds_flagged():
    lags = np.array([0, 1, 2.0])
    truth = dog(OFFSETS[None], -2.0, 20.0) * np.exp(-lags[:, None] / 0.8)   # attractive
    fit = fit_decay(OFFSETS, lags, truth[None], np.ones(truth.shape))
    assert (fit.amplitude0[0], fit.peak[0], fit.tau[0]) == pytest.approx((-2.0, 20.0, 0.8), rel=1e-6)
    flat = dog(OFFSETS[None], 2.0, 20.0) * np.ones((3, 1))                  # no decay at all
    nodecay = fit_decay(OFFSETS, lags, flat[None], np.ones(flat.shape))
    assert nodecay.tau_at_bound[0] and nodecay.tau[0] == pytest.approx(1000.0)
    narrow = np.array([-15, -10, -5, 5, 10, 15.0])                          # peak beyond the range
    t = fit_tuning(narrow, dog(narrow, 2.0, 80.0)[None], np.ones(6))
    assert t.peak_at_bound[0] and t.peak[0] == pytest.approx(30.0)


def _correlated_shifts(rng, tau, lags, sd=0.5, shared=0.35):
    """Shifts of the decay model with errors that share a baseline term, and their covariance."""
    d = np.tile(OFFSETS, lags.size)
    k = np.repeat(lags, OFFSETS.size)
    cov = sd**2 * np.eye(d.size) + shared**2 * np.ones((d.size, d.size))
    y = dog(d, 3.0, 30.0) * np.exp(-k / tau) + rng.multivariate_normal(np.zeros(d.size), cov)
    return d, k, y, cov


def test_decay_profile_interval_equals_a_scipy_profile():
    # Reference: the profile of the generalised least-squares sum of squares computed with scipy's
    # least_squares (A and w free at each fixed tau, several starts) and the limits found with brentq;
    # the cut s^2 F(1, n - 3) with s^2 = S_min / (n - 3) is the profile interval of nonlinear least squares
    # with an unknown variance factor (Bates & Watts 1988, ch. 6; chapter from memory); chi2_1 is the cut with
    # the covariance known (the likelihood-ratio interval, Wilks 1938).
    rng = np.random.default_rng(5)
    lags = np.array([0, 1, 2, 3.0])
    d, k, y, cov = _correlated_shifts(rng, 1.5, lags)
    white = np.linalg.cholesky(np.linalg.inv(cov)).T            # W'W = V^-1

    def resid(p, tau):
        return white @ (y - dog(d, p[0], p[1]) * np.exp(-k / tau))

    def profile(tau):
        fits = [optimize.least_squares(resid, start, args=(tau,), bounds=([-np.inf, 7.5], [np.inf, 180.0]),
                                       xtol=1e-12, ftol=1e-12) for start in ([2.0, 15.0], [2.0, 40.0], [4.0, 90.0])]
        return min(2 * f.cost for f in fits)

    grid = np.geomspace(0.2, 50, 300)
    s_grid = np.array([profile(t) for t in grid])
    best = optimize.minimize_scalar(lambda lt: profile(np.exp(lt)), bracket=np.log(grid[s_grid.argmin() - 1:
                                                                                   s_grid.argmin() + 2]))
    s_min, n = best.fun, y.size
    estimate = fit_decay(OFFSETS, lags, y.reshape(lags.size, -1)[None], np.ones((lags.size, OFFSETS.size))).tau[0]
    # the covariance handed over is c V: the profile is S / c. Where the residuals scatter more than c V says
    # (c = 1/4) the estimated factor sets the cut; where less (c = 4) the cut stays at chi2_1, that of c V taken
    # as exact, so that chance small residuals do not shrink the interval (the floor of fit's default)
    for c, floored in ((0.25, False), (4.0, True)):
        cut = s_min / c + max(s_min / c / (n - 3) * stats.f.ppf(0.95, 1, n - 3), stats.chi2.ppf(0.95, 1))
        assert floored == (s_min / c / (n - 3) * stats.f.ppf(0.95, 1, n - 3) < stats.chi2.ppf(0.95, 1))
        ref_lo = optimize.brentq(lambda t: profile(t) / c - cut, grid[0], np.exp(best.x))
        ref_hi = optimize.brentq(lambda t: profile(t) / c - cut, np.exp(best.x), grid[-1])
        lo, hi = decay_profile_interval(d, k, y, c * cov, estimate, bounds=(7.5, 180.0))
        assert lo == pytest.approx(ref_lo, rel=0.02) and hi == pytest.approx(ref_hi, rel=0.02)
        assert lo <= estimate <= hi
    # without the floor the variance factor alone sets the cut: any multiple of the covariance gives the same
    # interval, the one of the estimated factor
    lo, hi = decay_profile_interval(d, k, y, 0.25 * cov, estimate, bounds=(7.5, 180.0))
    for c in (0.25, 4.0, 7.0):
        assert decay_profile_interval(d, k, y, c * cov, estimate, bounds=(7.5, 180.0),
                                      cut="factor") == pytest.approx((lo, hi))


def test_tuning_profile_interval_equals_a_scipy_profile():
    # Reference: the profile of one lag's generalised least-squares sum of squares over the amplitude A,
    # computed with scipy (the peak offset w minimised by minimize_scalar in log w from the best of a coarse
    # grid, at each fixed A), and the limits found with brentq; the cut s^2 F(1, n - 2) with
    # s^2 = S_min / (n - 2) is the profile interval of nonlinear least squares with an unknown variance factor
    # (Bates & Watts 1988, ch. 6; chapter from memory); chi2_1 the cut with the covariance known (Wilks 1938).
    rng = np.random.default_rng(8)
    d, _, y, cov = _correlated_shifts(rng, 1e6, np.array([0.0]), sd=0.8)
    white = np.linalg.cholesky(np.linalg.inv(cov)).T            # W'W = V^-1
    bounds = (7.5, 180.0)
    coarse = np.linspace(np.log(bounds[0]), np.log(bounds[1]), 60)

    def s_at(amplitude, log_w):
        r = white @ (y - dog(d, amplitude, np.exp(log_w)))
        return float(r @ r)

    def profile(amplitude):
        start = coarse[np.argmin([s_at(amplitude, g) for g in coarse])]
        lo_g, hi_g = max(start - 0.1, coarse[0]), min(start + 0.1, coarse[-1])
        fit = optimize.minimize_scalar(lambda g: s_at(amplitude, g), bounds=(lo_g, hi_g), method="bounded",
                                       options={"xatol": 1e-10})
        return min(fit.fun, s_at(amplitude, start))

    best = optimize.minimize_scalar(profile, bracket=(1.0, 3.0, 5.0))
    s_min, n = best.fun, y.size
    estimate = fit_tuning(d, y[None], np.ones(n), bounds).amplitude[0]
    factor = s_min / (n - 2) * stats.f.ppf(0.95, 1, n - 2)
    # the covariance handed over is c V: the profile is S / c and the estimated factor s^2 as well, so by
    # default (the factor alone sets the cut) every multiple gives one interval; floored at chi2_1 the cut of
    # c = 4 is the floor (s^2 F(1, n - 2) / c is below chi2_1 there), that of c = 1/4 the factor's; with the
    # covariance taken as known the cut is chi2_1 on S / c, so c = 4 widens the interval
    assert factor / 4.0 < stats.chi2.ppf(0.95, 1) < factor * 4.0
    for c, cut in ((1.0, "factor"), (0.25, "factor"), (4.0, "factor"), (0.25, "floored"), (4.0, "floored"),
                   (1.0, "known"), (4.0, "known")):
        rise = {"factor": factor / c, "floored": max(factor / c, stats.chi2.ppf(0.95, 1)),
                "known": stats.chi2.ppf(0.95, 1)}[cut]
        ref_lo = optimize.brentq(lambda a: profile(a) / c - s_min / c - rise, best.x - 20, best.x)
        ref_hi = optimize.brentq(lambda a: profile(a) / c - s_min / c - rise, best.x, best.x + 20)
        lo, hi = tuning_profile_interval(d, y, c * cov, estimate, bounds, cut=cut)
        assert lo == pytest.approx(ref_lo, abs=0.01) and hi == pytest.approx(ref_hi, abs=0.01)
        assert lo <= estimate <= hi
    with pytest.raises(ValueError, match="cut"):
        tuning_profile_interval(d, y, cov, estimate, bounds, cut="floor")
    # too few shifts, non-finite shifts, or a covariance that is not positive definite: no interval
    assert np.isnan(tuning_profile_interval(d[:2], y[:2], cov[:2, :2], estimate)).all()
    assert np.isnan(tuning_profile_interval(d, np.where(d > 50, np.nan, y), cov, estimate)).all()
    assert np.isnan(tuning_profile_interval(d, y, -cov, estimate)).all()


def test_decay_profile_interval_reaches_the_bound_when_nothing_decays():
    rng = np.random.default_rng(6)
    lags = np.array([0, 1, 2, 3.0])
    d, k, y, cov = _correlated_shifts(rng, 1e6, lags)            # no decay over 3 periods
    lo, hi = decay_profile_interval(d, k, y, cov, 50.0)
    assert hi == TAU_BOUNDS[1] and 0 < lo < 50.0
    # too few shifts, or a covariance that is not positive definite: no interval
    assert np.isnan(decay_profile_interval(d[:3], k[:3], y[:3], cov[:3, :3], 1.0)).all()
    assert np.isnan(decay_profile_interval(d, k, y, -cov, 1.0)).all()


def test_fit_writes_the_profile_intervals_of_its_own_shifts_and_covariance(tmp_path):
    # decay.csv and tuning.csv (default intervals) against decay_profile_interval and tuning_profile_interval
    # recomputed from what fit wrote beside them: the shifts of aftereffect.csv and their covariance in
    # aftereffect_covariance.csv (6 digits)
    log = ROOT / "results_demo" / "logs" / "sim01-s1.trials.csv"
    done = run_cli("fit", log, "--out", tmp_path, "--bootstrap", "300", "--no-figures", "--seed", "3")
    assert done.returncode == 0, done.stderr
    shifts = pd.read_csv(tmp_path / "aftereffect.csv").sort_values(["lag", "adapter_offset_deg"])
    lags, offsets = shifts["lag"].to_numpy(float), shifts["adapter_offset_deg"].to_numpy(float)
    cov, replicates = covariance_matrix(pd.read_csv(tmp_path / "aftereffect_covariance.csv"), "sim01",
                                        lags, offsets)[:2]
    assert replicates == 300
    decay = pd.read_csv(tmp_path / "decay.csv").iloc[0]
    lo, hi = decay_profile_interval(offsets, lags, shifts["pse_shift_deg"].to_numpy(float), cov,
                                    decay["decay_periods"])
    assert (decay["ci_low"], decay["ci_high"]) == pytest.approx((lo, hi), rel=2e-3)
    assert decay["ci_low"] < decay["decay_periods"] < decay["ci_high"]
    tuning = pd.read_csv(tmp_path / "tuning.csv")
    assert len(tuning) == np.unique(lags).size
    for _, row in tuning.iterrows():
        at = lags == row["lag"]
        lo, hi = tuning_profile_interval(offsets[at], shifts["pse_shift_deg"].to_numpy(float)[at],
                                         cov[np.ix_(at, at)], row["amplitude_deg"])
        assert (row["amplitude_ci_low"], row["amplitude_ci_high"]) == pytest.approx((lo, hi), rel=2e-3, abs=1e-3)
        assert row["amplitude_ci_low"] <= row["amplitude_deg"] <= row["amplitude_ci_high"]


def test_too_few_replicates_for_a_covariance_fall_back_to_bca_with_a_note(tmp_path):
    # 9 replicates cannot give a covariance of a lag's 8 shifts (nor of all 32): the amplitudes and the
    # decay keep BCa limits, and the summary says so for each
    log = ROOT / "results_demo" / "logs" / "sim01-s1.trials.csv"
    done = run_cli("fit", log, "--out", tmp_path, "--bootstrap", "9", "--no-figures", "--seed", "3")
    assert done.returncode == 0, done.stderr
    summary = (tmp_path / "summary.txt").read_text(encoding="utf-8")
    assert "tuning amplitude interval of lag 0, 1, 2, 3: BCa" in summary
    assert "decay interval: BCa" in summary
    tuning = pd.read_csv(tmp_path / "tuning.csv")
    assert np.isfinite(tuning[["amplitude_ci_low", "amplitude_ci_high"]].to_numpy()).all()


def test_a_lag_with_fewer_than_eight_shifts_takes_the_covariance_as_exact_with_a_note(tmp_path):
    # with fewer than 8 shifts a lag's amplitude profile is cut at chi2_1 with the replicates' covariance
    # taken as exact (the factor's s^2 F(1, n - 2) has too few degrees of freedom; benchmarks/README.md);
    # the summary says so, and tuning.csv holds that interval, recomputed from what fit wrote beside it
    trials = pd.read_csv(ROOT / "results_demo" / "logs" / "sim01-s1.trials.csv")
    cut = trials[~((trials["lag"] == 0) & trials["adapter_offset_deg"].isin([-90, 90]))]
    log = tmp_path / "cut.trials.csv"
    cut.to_csv(log, index=False)
    out = tmp_path / "fit"
    done = run_cli("fit", log, "--out", out, "--bootstrap", "200", "--no-figures", "--seed", "3")
    assert done.returncode == 0, done.stderr
    summary = (out / "summary.txt").read_text(encoding="utf-8")
    assert ("note: tuning amplitude interval of lag 0: profile with the shifts' replicate covariance taken as "
            "exact (fewer than 8 shifts to estimate its factor)\n") in summary
    shifts = pd.read_csv(out / "aftereffect.csv").sort_values(["lag", "adapter_offset_deg"])
    lags, offsets = shifts["lag"].to_numpy(float), shifts["adapter_offset_deg"].to_numpy(float)
    cov = covariance_matrix(pd.read_csv(out / "aftereffect_covariance.csv"), "sim01", lags, offsets)[0]
    tuning = pd.read_csv(out / "tuning.csv")
    for _, row in tuning.iterrows():
        at = lags == row["lag"]
        assert at.sum() == (6 if row["lag"] == 0 else 8)
        lo, hi = tuning_profile_interval(offsets[at], shifts["pse_shift_deg"].to_numpy(float)[at],
                                         cov[np.ix_(at, at)], row["amplitude_deg"],
                                         cut="known" if row["lag"] == 0 else "factor")
        assert (row["amplitude_ci_low"], row["amplitude_ci_high"]) == pytest.approx((lo, hi), rel=2e-3, abs=1e-3)


@pytest.mark.slow  # left out of the quick subset
def test_parameter_recovery_fast():
    # Simulated observers (README, Models; A = 3 deg, w = 30 deg, tau = 1.5
    # periods, staircases of 2 x 40 trials per condition) are fitted and the
    # 95 % intervals of tuning.csv (lag 0) and decay.csv must hold the
    # simulated values.  Fast version: 20 observers, 300 replicates, at least
    # 17 of 20 per parameter; the full check (50 observers, >= 90 %) is
    # benchmarks/bench_recovery.py.
    res = recovery_study(range(100, 120), n_boot=300)
    for name in ("amplitude", "peak_offset", "decay"):
        assert res[f"{name}_covered"].sum() >= 17, (name, res[f"{name}_covered"].mean())
    # and the estimates are centred on the truth (means of 20 fits)
    assert res["amplitude"].mean() == pytest.approx(3.0, abs=0.2)
    assert res["peak_offset"].mean() == pytest.approx(30.0, abs=2.0)
    assert res["decay"].mean() == pytest.approx(1.5, abs=0.2)


@pytest.mark.slow    # simulate and fit
def test_a_peak_offset_beyond_the_largest_adapter_offset_is_flagged(tmp_path):
    # adapters at +-15 and +-30 deg cannot place a peak at 60: the curve there is extrapolated, and its row
    # carried no flag
    from fitting import fit_logs
    from runner.launch import simulate
    from runner.observers import ObserverModel
    from runner.protocol import parse_protocol

    text = ("[design]\nadapter_offsets_deg = [-30.0, -15.0, 15.0, 30.0]\nlags = [0]\ntrials_per_track = 40\n"
            "practice_trials = 0\n")
    simulate(parse_protocol(text), "p.toml", text, tmp_path / "logs",
             ObserverModel(peak_offset_deg=60.0, amplitude_deg=4.0, spread_between_observers=0.0), 1, 3,
             progress=False)
    fit_logs([str(tmp_path / "logs")], str(tmp_path / "fit"), n_boot=50, seed=1, progress=False, figures=False)
    tuning = pd.read_csv(tmp_path / "fit" / "tuning.csv")
    row = tuning[tuning["observer"] == "sim01"].iloc[0]
    assert row["peak_offset_deg"] > 30 and "outside-tested" in row["flags"]
