"""Group random-effects combination, compare's covariance-aware chi-square, flags on degenerate logs."""

import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.meta_analysis import combine_effects

from fitting import fit_logs
from fitting.errors import InputError
from fitting.compare import agreement, gls_gain
from fitting.scores import normal_scores
from fitting.flags import condense, join
from fitting.meta import random_effects, variance_from_interval
from fitting.synthetic import ObserverModel, simulate_trials, write_log

# BCG vaccine trials (13 studies; tuberculosis cases / non-cases in the vaccinated and control arms):
# Colditz G.A. et al. (1994) JAMA 271, 698-702, the worked example of random-effects meta-analysis in
# Viechtbauer W. (2010) J. Stat. Softw. 36(3).
BCG = np.array([[4, 119, 11, 128], [6, 300, 29, 274], [3, 228, 11, 209], [62, 13536, 248, 12619],
                [33, 5036, 47, 5761], [180, 1361, 372, 1079], [8, 2537, 10, 619], [505, 87886, 499, 87892],
                [29, 7470, 45, 7232], [17, 1699, 65, 1600], [186, 50448, 141, 27197], [5, 2493, 3, 2338],
                [27, 16886, 29, 17825]], float)


def _log_risk_ratios():
    a, b, c, d = BCG.T
    return np.log(a / (a + b)) - np.log(c / (c + d)), 1 / a - 1 / (a + b) + 1 / c - 1 / (c + d)


@pytest.mark.filterwarnings("ignore:`use_t=True` requires")
def test_random_effects_reproduces_the_published_bcg_example_and_statsmodels():
    y, v = _log_risk_ratios()
    res = random_effects(y, v, floor=False)
    # DerSimonian-Laird on the BCG data: tau^2 = 0.3088, pooled log risk ratio -0.7141 (se 0.1787
    # without the Hartung-Knapp scaling), as tabulated for this example (Viechtbauer 2010; from memory)
    assert res.tau2 == pytest.approx(0.3088, abs=5e-5)
    assert res.estimate == pytest.approx(-0.7141, abs=5e-5)
    # reference library: statsmodels' combine_effects (DerSimonian-Laird), Hartung-Knapp ("wls") interval
    ref = combine_effects(y, v, method_re="dl", use_t=True)
    assert res.tau2 == pytest.approx(ref.tau2, rel=1e-10)
    assert res.estimate == pytest.approx(ref.mean_effect_re, rel=1e-10)
    assert res.se == pytest.approx(np.sqrt(ref.var_hksj_re), rel=1e-10)
    frame = ref.summary_frame()
    assert res.low == pytest.approx(frame.loc["random effect wls", "ci_low"], rel=1e-9)
    assert res.high == pytest.approx(frame.loc["random effect wls", "ci_upp"], rel=1e-9)


def test_three_agreeing_observers_cannot_shrink_the_group_interval_below_their_own():
    # the case: three observers, +-2 deg each, agreeing by chance to 0.05 deg
    y = np.array([1.00, 1.05, 1.02])
    v = variance_from_interval(y - 2.0, y + 2.0)
    res = random_effects(y, v)
    fixed_half = stats.norm.ppf(0.975) * np.sqrt(1 / np.sum(1 / v))
    plain = random_effects(y, v, floor=False)
    # plain Hartung-Knapp shrinks with the chance agreement (q << 1): narrower than the observers allow
    assert (plain.high - plain.low) / 2 < fixed_half
    assert (res.high - res.low) / 2 == pytest.approx(fixed_half)        # the floor holds it
    # Knapp & Hartung (2003) truncation q >= 1: t on 2 df times the fixed-effect standard error here
    trunc = random_effects(y, v, truncate=True)
    assert (trunc.high - trunc.low) / 2 == pytest.approx(stats.t.ppf(0.975, 2) * np.sqrt(1 / np.sum(1 / v)))
    # the old between-observer t interval (sd of three numbers) was far narrower still
    old_half = stats.t.ppf(0.975, 2) * np.std(y, ddof=1) / np.sqrt(3)
    assert old_half < 0.2 * fixed_half


def test_full_covariance_chi2_is_calibrated_where_the_diagonal_one_is_not():
    # shifts sharing one baseline: cov = s^2 I + b^2 J (correlation b^2 / (s^2 + b^2) = 0.4)
    rng = np.random.default_rng(7)
    n, s2, b2 = 8, 1.2, 0.8
    cov = s2 * np.eye(n) + b2 * np.ones((n, n))
    truth = np.linspace(-3, 3, n)
    half = stats.norm.ppf(0.975) * np.sqrt(np.diagonal(cov))
    rej_full = rej_diag = 0
    for _ in range(2000):
        m = rng.multivariate_normal(truth, cov)
        rej_full += agreement(m, m - half, m + half, truth, covariance=cov).chi2_p < 0.05
        rej_diag += agreement(m, m - half, m + half, truth).chi2_p < 0.05
    # with the true covariance, r' V^-1 r is chi-square on n df (scipy.stats.chi2): 5 % +- 1 % here
    assert 0.04 <= rej_full / 2000 <= 0.065
    assert rej_diag / 2000 > 0.08


def test_normal_scores_match_scipy_and_leave_infinite_dof_alone():
    x = np.array([-6.0, -1.5, 0.0, 0.7, 3.0, 9.0])
    # reference: scipy.stats, z = Phi^-1(F_t(x; nu)) computed directly
    assert normal_scores(x, 7) == pytest.approx(stats.norm.ppf(stats.t.cdf(x, 7)), rel=1e-9, abs=1e-12)
    assert np.array_equal(normal_scores(x, np.inf), x)
    mixed = normal_scores(x, [5, np.inf, 5, np.nan, 40, 40])
    assert mixed[1] == -1.5 and mixed[3] == 0.7
    assert mixed[5] == pytest.approx(stats.norm.isf(stats.t.sf(9.0, 40)), rel=1e-9)


def test_chi2_p_on_a_constructed_case_equals_scipy():
    # two points, known covariance, no replicates: chi2 = r' V^-1 r, p from scipy.stats.chi2 on 2 df
    cov = np.array([[1.0, 0.4], [0.4, 2.0]])
    m, p = np.array([1.0, -0.5]), np.array([0.0, 0.5])
    half = stats.norm.ppf(0.975) * np.sqrt(np.diagonal(cov))
    a = agreement(m, m - half, m + half, p, covariance=cov)
    r = m - p
    assert a.chi2 == pytest.approx(r @ np.linalg.solve(cov, r), rel=1e-12)
    assert a.chi2_p == pytest.approx(stats.chi2.sf(a.chi2, 2), rel=1e-12)
    # with 400 replicates the inverse is scaled by (400 - 2 - 2) / (400 - 1) (Hartlap et al. 2007, eq. 17)
    b = agreement(m, m - half, m + half, p, covariance=cov, replicates=400)
    assert b.chi2 == pytest.approx(a.chi2 * 396 / 399, rel=1e-12)


#: Eight shifts sharing a baseline (correlation 0.4), and their true values.
SHARED_BASELINE_COV = 1.2 * np.eye(8) + 0.8 * np.ones((8, 8))
SHIFTS_TRUE = np.linspace(-3, 3, 8)


def _rejected_shares(rng, draws: int, estimated_covariance, readings: list[dict]) -> np.ndarray:
    """Share of ``draws`` simulated shift sets whose χ² rejects the truth at 5 %, for each reading.

    Each draw takes shifts from N(truth, SHARED_BASELINE_COV), then a covariance estimate
    ``estimated_covariance(rng)``, and scores them with ``agreement`` (intervals from that estimate) and
    each reading's keywords.
    """
    rejected = np.zeros(len(readings))
    for _ in range(draws):
        m = rng.multivariate_normal(SHIFTS_TRUE, SHARED_BASELINE_COV)
        cov_hat = estimated_covariance(rng)
        half = stats.norm.ppf(0.975) * np.sqrt(np.diagonal(cov_hat))
        for i, kw in enumerate(readings):
            a = agreement(m, m - half, m + half, SHIFTS_TRUE, covariance=cov_hat, replicates=np.inf, **kw)
            rejected[i] += a.chi2_p < 0.05
    return rejected / draws


def test_t_scores_hold_the_level_when_each_standard_error_is_estimated():
    # Student (1908): N(0, 1) / sqrt(chi2_nu / nu) is t on nu df.  Shifts with a shared baseline
    # (correlation 0.4), each standard error estimated on nu = 10 df: reading the standardised
    # residuals as normal over-rejects, reading them against t on trials - 2 = 10 df holds 5 %.
    n, nu = 8, 10
    sd = np.sqrt(np.diagonal(SHARED_BASELINE_COV))
    corr = SHARED_BASELINE_COV / np.outer(sd, sd)

    def estimated(rng):
        sd_hat = sd * np.sqrt(rng.chisquare(nu, n) / nu)
        return corr * np.outer(sd_hat, sd_hat)

    t_reading, normal_reading = _rejected_shares(np.random.default_rng(11), 3000, estimated,
                                                 [dict(trials=np.full(n, nu + 2)), {}])
    # binomial MC SE at 5 % over 3,000 draws: 0.4 % (a slow test: tests/conftest.py SLOW_TESTS)
    assert 0.035 <= t_reading <= 0.07
    assert normal_reading > 0.09


def test_f_reading_holds_the_level_when_the_covariance_scales_with_an_estimated_spread():
    # Definition of Snedecor's F (scipy.stats.f): (U / n) / (W / nu) with U ~ chi2_n, W ~ chi2_nu
    # independent is F(n, nu).  Shifts with a shared baseline whose whole covariance is known up to a
    # factor estimated on nu df (the squared spread): r' V^-1 r / n is exactly F(n, nu), so the F reading
    # holds 5 %, while chi2_n (and t on trials - 2, given too, which the F reading must override) does not.
    n, nu = 8, 15
    f_reading, chi2_reading = _rejected_shares(
        np.random.default_rng(5), 1000, lambda rng: SHARED_BASELINE_COV * rng.chisquare(nu) / nu,
        [dict(spread_dof=nu, trials=np.full(n, 1000)), {}])
    # binomial MC SE at 5 % over 1,000 draws: 0.7 %; chi2_8 / 8 passes F(8, 15)'s 95 % point 12.8 % of the time
    assert 0.03 <= f_reading <= 0.075
    assert chi2_reading > 0.09
    half = np.full(n, 2.0)
    a = agreement(SHIFTS_TRUE, SHIFTS_TRUE - half, SHIFTS_TRUE + half, SHIFTS_TRUE + 0.5,
                  covariance=SHARED_BASELINE_COV, spread_dof=nu, trials=np.full(n, 1000))
    assert a.chi2_reference == f"F({n}, {nu:.1f})"


def test_a_covariance_of_lower_rank_gives_the_wald_statistic_of_its_parameters():
    # Shifts that are functions of r < n parameters (a stream fit: K amplitudes and a peak offset) have a
    # covariance J S J' of rank r.  Over its r leading directions, r' V+ r equals the Wald statistic
    # d' S^-1 d of the parameters themselves (the pseudo-inverse of J S J' with J of full column rank;
    # Rao 1973, Linear Statistical Inference and its Applications, ch. 1b, from memory), here recomputed
    # with numpy's solve; read on r degrees of freedom it holds 5 % (chi2_r: scipy.stats.chi2).
    rng = np.random.default_rng(8)
    n, r, draws = 30, 4, 1000
    jac = rng.normal(size=(n, r))
    s_par = np.diag([0.5, 0.3, 0.2, 0.1]) + 0.05
    cov = jac @ s_par @ jac.T
    truth = jac @ np.array([3.0, 1.8, 1.1, 0.5])
    rejected = 0
    for i in range(draws):
        d = rng.multivariate_normal(np.zeros(r), s_par)
        m = truth + jac @ d
        half = stats.norm.ppf(0.975) * np.sqrt(np.diagonal(cov))
        a = agreement(m, m - half, m + half, truth, covariance=cov, rank=r)
        if i == 0:
            assert a.dof == r and a.chi2_reference == f"chi2({r})"
            assert a.chi2 == pytest.approx(float(d @ np.linalg.solve(s_par, d)), rel=1e-6)
        rejected += a.chi2_p < 0.05
    assert 0.03 <= rejected / draws <= 0.075           # binomial MC SE at 5 % over 1,000 draws: 0.7 %


def test_spread_dof_recovers_the_degrees_of_freedom_of_a_chi_squared_variance():
    # A variance on nu df is sigma^2 chi2_nu / nu; Var(log chi2_nu) is the trigamma function at nu / 2
    # (the log-gamma distribution's variance; scipy.special.polygamma), close to 2 / nu (Satterthwaite 1946).
    from scipy import special

    from fitting.covariance import spread_dof

    rng = np.random.default_rng(2)
    for nu in (6.0, 20.0, 60.0):
        log_spread = 0.5 * np.log(4.0 * rng.chisquare(nu, 40000) / nu)        # log s, s^2 ~ 4 chi2_nu / nu
        assert spread_dof(log_spread) == pytest.approx(2.0 / float(special.polygamma(1, nu / 2)), rel=0.03)
        assert spread_dof(log_spread) == pytest.approx(nu, rel=0.15)
        assert spread_dof(np.append(log_spread, np.nan)) == spread_dof(log_spread)   # a failed refit skipped
    assert np.isnan(spread_dof(np.zeros(100))) and np.isnan(spread_dof([0.1, 0.2]))  # no spread to measure


def test_gain_with_estimated_scale_equals_statsmodels_gls_and_holds_its_level():
    import statsmodels.api as sm

    rng = np.random.default_rng(5)
    n = 16
    p = np.linspace(-6, 6, n)
    cov = 0.3 * np.eye(n) + 0.2 * np.ones((n, n))
    m = 0.8 * p + rng.multivariate_normal(np.zeros(n), cov)
    g, se, dof = gls_gain(m, p, np.linalg.inv(cov))
    # reference: statsmodels GLS through the origin, scale estimated from the residuals (its default)
    ref = sm.GLS(m, p[:, None], sigma=cov).fit()
    assert g == pytest.approx(ref.params[0], rel=1e-10)
    assert se == pytest.approx(ref.bse[0], rel=1e-10)
    assert dof == ref.df_resid
    # compare's interval: statsmodels' GLS interval (t on n - 1), never narrower than the one with the covariance
    # known (statsmodels' fixed-scale fit, normal quantile): residuals closer to the line than the covariance
    # says are chance, not a smaller error.  Residuals 2 and 1/3 times those drawn: each rule in its turn.
    half = stats.norm.ppf(0.975) * np.sqrt(np.diagonal(cov))
    for factor, free_wider in ((2.0, True), (1 / 3, False)):
        shown = g * p + (m - g * p) * factor
        a = agreement(shown, shown - half, shown + half, p, covariance=cov)
        free = sm.GLS(shown, p[:, None], sigma=cov).fit()
        known = sm.GLS(shown, p[:, None], sigma=cov).fit(cov_type="fixed scale")
        assert (free.conf_int(0.05)[0][1] - free.params[0] > stats.norm.ppf(0.975) * known.bse[0]) == free_wider
        ref = free if free_wider else known
        assert (a.gain_ci_low, a.gain_ci_high) == (pytest.approx(ref.conf_int(0.05)[0][0], rel=1e-9),
                                                   pytest.approx(ref.conf_int(0.05)[0][1], rel=1e-9))
        assert a.gain_se == pytest.approx(ref.bse[0], rel=1e-9)
    # the covariance given is 1.6 times too small: the interval with V known undercovers, the one with
    # the scale estimated holds 95 % (t on n - 1 df; exact for Gaussian errors)
    held_known = held_free = 0
    for _ in range(1000):
        m = 0.8 * p + rng.multivariate_normal(np.zeros(n), 1.6 * cov)
        g, se, dof = gls_gain(m, p, np.linalg.inv(cov))
        held_free += abs(g - 0.8) <= stats.t.ppf(0.975, dof) * se
        g, se, _ = gls_gain(m, p, np.linalg.inv(cov), free_scale=False)
        held_known += abs(g - 0.8) <= stats.norm.ppf(0.975) * se
    # binomial MC SE at 95 % over 1,000 draws: 0.7 %
    assert 0.93 <= held_free / 1000 <= 0.97
    assert held_known / 1000 < 0.91


def _degenerate_logs(folder):
    model = ObserverModel(amplitude_deg=3.0, peak_offset_deg=25.0, decay_periods=2.0)
    df = simulate_trials(model, offsets=(-30, 30), lags=(0,), trials_per_track=15, seed=3, observer="D1")
    one = df["condition"] == "adapt+30_lag0"
    df.loc[one, "response_cw"] = 1                                   # all answers on one side
    few = df.index[df["condition"] == "adapt-30_lag0"][6:]
    df = df.drop(few)                                                # 6 trials: too few for an interval
    write_log(df, folder / "d1.trials.csv")
    rnd = simulate_trials(model, offsets=(-30, 30), lags=(0,), trials_per_track=15, seed=4, observer="R1")
    rnd["response_cw"] = np.random.default_rng(5).integers(0, 2, len(rnd))   # random answers
    write_log(rnd, folder / "r1.trials.csv")


def test_flags_on_hand_made_degenerate_logs(tmp_path):
    _degenerate_logs(tmp_path)
    fit_logs([str(tmp_path)], str(tmp_path / "out"), n_boot=200, seed=1, figures=False,
                      progress=False)
    pse = pd.read_csv(tmp_path / "out" / "pse.csv", keep_default_na=False).set_index(["observer", "condition"])
    assert "one-sided" in pse.loc[("D1", "adapt+30_lag0"), "flags"]
    assert "few-trials" in pse.loc[("D1", "adapt-30_lag0"), "flags"]
    assert pse.loc[("D1", "adapt-30_lag0"), "pse_ci_low"] == ""          # no interval below the minimum
    # nor for a PSE that is not estimable (before: an interval about the bound, 0.0001 deg wide, printed)
    assert pse.loc[("D1", "adapt+30_lag0"), ["pse_ci_low", "pse_ci_high"]].tolist() == ["", ""]
    assert pse.loc[("D1", "baseline"), "flags"] == ""
    # random answers: a flat function whose PSEs leave the tested range
    r1 = pse.loc["R1"]
    assert r1["flags"].str.contains("outside-tested|on-bound").any()
    shifts = pd.read_csv(tmp_path / "out" / "aftereffect.csv", keep_default_na=False)
    d1 = shifts[shifts["observer"] == "D1"].set_index("adapter_offset_deg")
    assert "one-sided" in d1.loc[30, "flags"] and "few-trials" in d1.loc[-30, "flags"]
    assert d1[["ci_low", "ci_high"]].eq("").all().all()                # neither shift has an interval
    # two observers: group rows are descriptive; D1's shifts are not usable (one-sided: not estimable; six
    # trials: no interval), so no group shift stands on one observer (before, the one-sided shift entered
    # the combination at face value), and the notes say whose rows were left out
    assert "not-estimable" in d1.loc[30, "flags"]
    assert not (shifts["observer"] == "group").any()
    group = pse.loc["group"]
    assert list(group.index) == ["baseline"] and group["flags"].str.contains("descriptive").all()
    text = (tmp_path / "out" / "summary.txt").read_text()
    assert ("group shifts leave out the observers' rows that are not usable: D1 (2 of 2: one-sided not-estimable "
            "few-trials)") in text
    first_observer = text.index("Observer D1")
    assert "Flagged rows" in text and text.index("D1 PSE adapt+30_lag0: one-sided") < first_observer
    mm = pd.read_csv(tmp_path / "out" / "mixed_model.csv")
    assert "converged" in mm.columns and "flags" in mm.columns


def test_every_estimate_outside_its_own_interval_is_flagged(tmp_path):
    # three replicates leave degenerate intervals ([3.26, 3.26] around an amplitude of 2.97 was printed unflagged)
    model = ObserverModel(amplitude_deg=3.0, peak_offset_deg=25.0, decay_periods=2.0)
    df = simulate_trials(model, offsets=(-45, -15, 15, 45), lags=(0, 1, 2), trials_per_track=12, seed=3,
                         observer="F1")
    write_log(df, tmp_path / "f1.trials.csv")
    fit_logs([str(tmp_path / "f1.trials.csv")], str(tmp_path / "out"), n_boot=3, seed=1, figures=False,
             progress=False)
    columns = {"pse.csv": [("pse_deg", "pse_ci_low", "pse_ci_high")],
               "aftereffect.csv": [("pse_shift_deg", "ci_low", "ci_high")],
               "tuning.csv": [("amplitude_deg", "amplitude_ci_low", "amplitude_ci_high"),
                              ("peak_offset_deg", "peak_offset_ci_low", "peak_offset_ci_high")],
               "decay.csv": [("decay_periods", "ci_low", "ci_high")]}
    off = 0
    for name, triples in columns.items():
        table = pd.read_csv(tmp_path / "out" / name, dtype={"flags": str})
        flags = table["flags"].fillna("")
        for est, low, high in triples:
            outside = (table[est] < table[low]) | (table[est] > table[high])
            assert flags[outside].str.contains("off-interval").all(), (name, table[outside])
            off += int(outside.sum())
    assert off > 0     # three replicates do leave estimates outside their intervals
    text = (tmp_path / "out" / "summary.txt").read_text()
    assert "3 parametric bootstrap replicates" in text and "too few to resolve the 2.5% tails (at least 40" in text


def test_a_fit_without_degrees_of_freedom_reports_no_goodness_of_fit(tmp_path):
    # one trial: the deviance had -2 df and a bootstrap "goodness-of-fit p = 0.020" was printed
    df = simulate_trials(ObserverModel(), offsets=(30,), lags=(0,), trials_per_track=4, seed=3, observer="O1")
    write_log(df.iloc[:1], tmp_path / "o1.trials.csv")
    fit_logs([str(tmp_path / "o1.trials.csv")], str(tmp_path / "out"), n_boot=50, seed=1, figures=False,
             progress=False)
    tests = pd.read_csv(tmp_path / "out" / "model_tests.csv")
    assert tests.loc[0, "dof"] <= 0 and np.isnan(tests.loc[0, "gof_p"])
    text = (tmp_path / "out" / "summary.txt").read_text()
    assert "no goodness of fit (no more cells of trials than fitted parameters)" in text and "-2 df" not in text


def test_flag_words_and_condensed_messages():
    assert join("steep on-bound", ["one-sided"], "") == "one-sided on-bound steep"
    with pytest.raises(ValueError):
        join(["bogus"])
    lines = condense(["Maximum likelihood optimization failed to converge.\nCheck mle_retvals",
                      "Maximum likelihood optimization failed to converge.", "Hessian not positive"])
    assert lines == ["Maximum likelihood optimization failed to converge. (x2)", "Hessian not positive"]


def test_rerun_tracks_bootstrap_replays_the_logged_procedure(tmp_path):
    # the real engine writes a log and sidecar; the bootstrap re-runs its tracks (runner.tracks) per replicate
    from runner.cli import main
    from runner.replay import track_factories

    proto = tmp_path / "p.toml"
    proto.write_text("[design]\nadapter_offsets_deg = [-30, 30]\nlags = [0]\ntrials_per_track = 12\n"
                     "practice_trials = 0\n")
    assert main(["simulate", str(proto), "--out", str(tmp_path / "logs"), "--seed", "3"]) == 0
    logs = sorted(str(p) for p in (tmp_path / "logs").glob("*.trials.csv"))
    factory = track_factories(logs)["sim01"]
    track = factory("baseline", "1")
    from runner.protocol import ProcedureSettings

    start = ProcedureSettings().start_offset_deg      # the default the protocol leaves in place
    assert track.next_level() == -start               # track 1 starts on the counter-clockwise side
    fixed = fit_logs(logs, str(tmp_path / "a"), n_boot=120, seed=2, figures=False, progress=False)
    rerun = fit_logs(logs, str(tmp_path / "b"), n_boot=120, seed=2, figures=False, progress=False,
                     tracks=track_factories(logs))
    assert np.allclose(fixed.pse["pse_deg"], rerun.pse["pse_deg"])          # same point fit
    assert not np.allclose(fixed.pse["pse_ci_low"], rerun.pse["pse_ci_low"])  # other replicates
    boot = rerun.analyses[0].boot
    assert boot.converged.mean() > 0.95 and np.isfinite(rerun.pse["pse_ci_low"]).all()
    assert main(["fit", *logs, "--out", str(tmp_path / "c"), "--bootstrap", "60", "--rerun-tracks",
                 "--no-figures"]) == 0


def test_compare_uses_the_covariance_file_and_refuses_a_corrupt_one(tmp_path, capsys):
    from runner.cli import main

    _degenerate_logs(tmp_path)
    # D1's shifts are not usable for the group, so two ordinary observers make a group of three, whose cells are
    # not descriptive (compare leaves a group cell of fewer than three observers out of its statistics)
    model = ObserverModel(amplitude_deg=3.0, peak_offset_deg=25.0, decay_periods=2.0)
    for seed, observer in ((6, "N1"), (7, "N2")):
        write_log(simulate_trials(model, offsets=(-30, 30), lags=(0,), trials_per_track=15, seed=seed,
                                  observer=observer), tmp_path / f"{observer.lower()}.trials.csv")
    fit_logs([str(tmp_path)], str(tmp_path / "out"), n_boot=100, seed=1, figures=False, progress=False)
    pd.DataFrame({"lag": [0, 0], "adapter_offset_deg": [-30, 30], "pse_shift_deg": [-1.0, 1.0]}).to_csv(
        tmp_path / "pred.csv", index=False)
    assert main(["compare", str(tmp_path / "out"), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "c")]) == 0
    table = pd.read_csv(tmp_path / "c" / "agreement.csv")
    assert set(table.loc[table["n_points"] > 0, "covariance"]) == {"full"}
    # observers: chi2 / n read against F(n, spread_dof) (scipy.stats.f); the group: from groups simulated from
    # R1, N1 and N2, the observers whose shifts are usable (D1's, one-sided and few-trials, are left out)
    written = pd.read_csv(tmp_path / "out" / "aftereffect_covariance.csv")
    assert (table.loc[table["observer"] == "D1", "n_points"] == 0).all()      # its rows judged on nothing
    for row in table[(table["lag"] == "all") & table["chi2"].notna()].itertuples():
        nu = written.loc[written["observer"] == row.observer, "spread_dof"].iloc[0]
        if row.observer == "group":
            assert np.isnan(nu) and row.chi2_reference.startswith("simulated (")
        else:
            assert nu > 1 and row.chi2_reference == f"F({int(row.dof)}, {nu:.1f})"
            assert row.chi2_p == pytest.approx(stats.f.sf(row.chi2 / row.dof, row.dof, nu), rel=1e-4)
    assert (table.set_index("observer").loc["group", "points_left_out"] == 0).all()      # three observers
    assert "left out" not in next(x for x in capsys.readouterr().out.splitlines() if x.strip().startswith("group:"))
    cov = tmp_path / "out" / "aftereffect_covariance.csv"
    lines = cov.read_text().splitlines()
    cells = lines[1].split(",")
    cells[1] = "x"                                                            # lag_a of the first pair
    cov.write_text("\n".join([lines[0], ",".join(cells)] + lines[2:]) + "\n")
    assert main(["compare", str(tmp_path / "out"), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "d")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "aftereffect_covariance.csv" in err and "line 2" in err


def test_compare_says_when_the_group_p_cannot_be_simulated(tmp_path):
    """An observer's covariance rows gone: the group's p falls back to chi2(n) (scipy.stats), with a note."""
    from fitting.compare import compare_results

    _degenerate_logs(tmp_path)
    # D1's shifts are not usable for the group, so two ordinary observers make a group of three, whose cells are
    # not descriptive (compare leaves a group cell of fewer than three observers out of its statistics)
    model = ObserverModel(amplitude_deg=3.0, peak_offset_deg=25.0, decay_periods=2.0)
    for seed, observer in ((6, "N1"), (7, "N2")):
        write_log(simulate_trials(model, offsets=(-30, 30), lags=(0,), trials_per_track=15, seed=seed,
                                  observer=observer), tmp_path / f"{observer.lower()}.trials.csv")
    fit_logs([str(tmp_path)], str(tmp_path / "out"), n_boot=100, seed=1, figures=False, progress=False)
    pd.DataFrame({"lag": [0, 0], "adapter_offset_deg": [-30, 30], "pse_shift_deg": [-1.0, 1.0]}).to_csv(
        tmp_path / "pred.csv", index=False)
    path = tmp_path / "out" / "aftereffect_covariance.csv"
    written = pd.read_csv(path)
    written[written["observer"] != "N1"].to_csv(path, index=False)          # an observer the group uses
    result = compare_results(tmp_path / "out", tmp_path / "pred.csv", tmp_path / "c", figures=False)
    row = result.table[(result.table["observer"] == "group") & (result.table["lag"] == "all")].iloc[0]
    assert row.chi2_reference == f"chi2({int(row.dof)})"
    assert row.chi2_p == pytest.approx(stats.chi2.sf(row.chi2, row.dof), rel=1e-9)
    assert any(n.startswith("group: the observers' own rows or their covariances") for n in result.notes)


@pytest.fixture(scope="module")
def fit_with_a_group_of_two(tmp_path_factory):
    """The degenerate logs and an ordinary observer, fitted, with predictions (each test edits a copy)."""
    folder = tmp_path_factory.mktemp("group_of_two")
    _degenerate_logs(folder)
    # D1's shifts are not usable for the group, so an ordinary observer makes the group's second one
    model = ObserverModel(amplitude_deg=3.0, peak_offset_deg=25.0, decay_periods=2.0)
    write_log(simulate_trials(model, offsets=(-30, 30), lags=(0,), trials_per_track=15, seed=6, observer="N1"),
              folder / "n1.trials.csv")
    fit_logs([str(folder)], str(folder / "out"), n_boot=100, seed=1, figures=False, progress=False)
    pd.DataFrame({"lag": [0, 0], "adapter_offset_deg": [-30, 30], "pse_shift_deg": [-1.0, 1.0]}).to_csv(
        folder / "pred.csv", index=False)
    return folder


@pytest.mark.parametrize("column, value, says", [
    ("covariance_deg2", "1e308", "covariance_deg2: expected a value in"),   # a number, but beyond what fit writes
    ("covariance_deg2", "1e5", "not symmetric positive semi-definite"),
    ("covariance_deg2", "-5", "not symmetric positive semi-definite"),
    ("covariance_deg2", "inf", "found 'inf'"),
    ("replicates", "lots", "replicates: expected a number, found 'lots'"),
    ("spread_dof", "-4", "spread_dof: degrees of freedom must be positive"),
    ("spread_dof", "many", "spread_dof: expected a number, found 'many'"),
    ("spread_dof", "7", "observer D1: differs between rows"),
    ("shift_parameters", "a1 w", "observer D1, lag_a 0, adapter_offset_a_deg -30: differs between rows"),
])
def test_compare_refuses_a_covariance_cell_no_fit_writes(fit_with_a_group_of_two, tmp_path, capsys, column, value,
                                                        says):
    from runner.cli import main

    shutil.copytree(fit_with_a_group_of_two, tmp_path, dirs_exist_ok=True)
    path = tmp_path / "out" / "aftereffect_covariance.csv"
    table = pd.read_csv(path, dtype=str, keep_default_na=False)
    off = table.index[(table["adapter_offset_a_deg"] != table["adapter_offset_b_deg"])][0]
    table.loc[off if column == "covariance_deg2" else 0, column] = value     # one off-diagonal cell
    table.to_csv(path, index=False)
    before = {f.name: f.read_bytes() for f in (tmp_path / "out").iterdir() if f.is_file()}
    assert main(["compare", str(tmp_path / "out"), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "c")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "aftereffect_covariance.csv" in err and says in err
    assert not (tmp_path / "c").exists()
    assert before == {f.name: f.read_bytes() for f in (tmp_path / "out").iterdir() if f.is_file()}


def test_rerun_tracks_falls_back_with_a_note_when_tracks_cannot_be_rebuilt(tmp_path):
    _degenerate_logs(tmp_path)                     # hand-made logs: no sidecars
    logs = sorted(str(p) for p in tmp_path.glob("*.trials.csv"))
    from runner.replay import track_factories

    notes = []
    assert track_factories(logs, notes=notes) == {}
    assert notes == [f"{len(logs)} logs (first {logs[0]}): no sidecar beside the log; the bootstrap keeps the "
                     "presented levels of these sessions fixed"]
    from runner.protocol import parse_protocol
    from runner.tracks import new_track

    proto = parse_protocol("[design]\nadapter_offsets_deg = [-30, 30]\nlags = [0]\n")
    report = fit_logs(logs, str(tmp_path / "o"), n_boot=50, seed=1, figures=False, progress=False,
                      tracks={"D1": lambda condition, track: new_track(proto, int(track))})
    assert not any("kept the levels fixed" in n for n in report.notes["D1"])
    assert any("no single protocol" in n for n in report.notes["R1"])
    assert np.isfinite(report.pse.set_index(["observer", "condition"]).loc[("D1", "baseline"), "pse_ci_low"])


def test_an_unreadable_sidecar_fixes_the_levels_of_its_observer_only(tmp_path):
    # fit's default pilot (strict=False): one observer's broken sidecar must not cost the others their re-run
    from conftest import PROTOCOLS, run_cli
    from runner.replay import track_factories

    done = run_cli("simulate", PROTOCOLS / "pilot_short.toml", "--out", tmp_path, "--observers", "2", "--seed", "5")
    assert done.returncode == 0, done.stderr
    logs = sorted(str(p) for p in tmp_path.glob("*.trials.csv"))
    assert set(track_factories(logs)) == {"sim01", "sim02"}
    side = tmp_path / (Path(logs[0]).name[: -len(".trials.csv")] + ".session.json")
    side.write_text(side.read_text()[:-7])                  # cut short, as by a full disk
    notes = []
    assert set(track_factories(logs, strict=False, notes=notes)) == {"sim02"}
    assert len(notes) == 1 and notes[0].startswith(f"{side}: protocol: cannot be read")
    assert notes[0].endswith("observer sim01's bootstrap keeps the presented levels fixed")
    with pytest.raises(InputError, match=f"^{side}: protocol: cannot read"):
        track_factories(logs)
    # a folder where the sidecar belongs is an unreadable sidecar, not "no sidecar beside the log"
    side.unlink()
    side.mkdir()
    notes = []
    assert set(track_factories(logs, strict=False, notes=notes)) == {"sim02"}
    assert len(notes) == 1 and notes[0].startswith(f"{side}: protocol: cannot be read") and "Is a directory" in notes[0]
    from fitting.provenance import _session_record

    assert "cannot be read" in _session_record(Path(logs[0]))[0]["problem"]
    # a log with no trial row (a session stopped before its first trial): nothing of it to re-run, and every
    # observer keeps their re-run
    Path(logs[0]).write_text(Path(logs[0]).read_text().splitlines()[0] + "\n")
    notes = []
    assert set(track_factories(logs, strict=False, notes=notes)) == {"sim02"}
    assert len(notes) == 1 and notes[0].endswith("names no observer in a first row, so it adds no trials")


def test_mixed_model_writes_a_boundary_observer_variance_as_zero_and_flags_it():
    # statsmodels' MixedLM (REML) is the reference. Three observers with no true observer effect
    # (8 offsets x 4 lags each, as in the demo); with this seed REML's observer variance sits on its
    # bound 0 and statsmodels returns round-off there (about 1e-10, digits set by the BLAS): the
    # table writes 0 with "on-bound" and keeps statsmodels' fixed effects
    import statsmodels.formula.api as smf

    from fitting.group import ZERO_VARIANCE, mixed_model

    rng = np.random.default_rng(1)
    noise = rng.normal(0.0, 1.0, (3, 32))
    offsets = np.array([-90.0, -60.0, -30.0, -15.0, 15.0, 30.0, 60.0, 90.0])
    shifts = pd.DataFrame([{"observer": f"O{o}", "lag": float(lag), "adapter_offset_deg": x,
                            "pse_shift_deg": 0.02 * x + noise[o, i + 8 * lag]}
                           for o in range(3) for lag in range(4) for i, x in enumerate(offsets)])
    ref = smf.mixedlm("pse_shift_deg ~ adapter_offset_deg * lag", shifts,
                      groups=shifts["observer"]).fit(reml=True)
    table = mixed_model(shifts, []).set_index("term")
    assert float(ref.cov_re.iloc[0, 0]) <= ZERO_VARIANCE * float(ref.scale)
    assert table.loc["observer intercept variance", "estimate"] == 0.0
    assert "on-bound" in table.loc["observer intercept variance", "flags"]
    assert table.loc["residual variance", "flags"] == ""
    assert np.allclose(table.loc[ref.fe_params.index, "estimate"], ref.fe_params, rtol=1e-6)
    assert np.isclose(table.loc["residual variance", "estimate"], ref.scale)


def _one_simulated_fit(tmp_path, method_lines: str, trials_per_track: int):
    """A real simulated session (pilot_short.toml with another procedure), its fit and its track factory."""
    import re

    from conftest import PROTOCOLS, run_cli
    from fitting.psychometric import fit_cells, Cells
    from runner.replay import track_factories

    text = (PROTOCOLS / "pilot_short.toml").read_text()
    text = re.sub(r"(?s)\[procedure\].*?(?=\n\[|\Z)", "[procedure]\n" + method_lines + "\n", text)
    text = re.sub(r"(?m)^trials_per_track\s*=.*$", f"trials_per_track = {trials_per_track}", text)
    proto = tmp_path / "p.toml"
    proto.write_text(text)
    done = run_cli("simulate", proto, "--out", tmp_path / "logs", "--seed", "3")
    assert done.returncode == 0, done.stderr
    logs = sorted(str(p) for p in (tmp_path / "logs").glob("*.trials.csv"))
    trials = pd.concat([pd.read_csv(p) for p in logs])
    trials = trials[trials["practice"] == 0].assign(track=lambda t: t["track"].astype(int).astype(str))
    names = sorted(trials["condition"].unique())
    code = trials["condition"].map({n: i for i, n in enumerate(names)}).to_numpy()
    cells = Cells.from_trials(trials["test_offset_deg"].to_numpy(float), trials["response_cw"].to_numpy(float),
                              code, len(names))
    fit = fit_cells(cells, names)
    schedule = list(zip(code.tolist(), trials["track"]))        # as fitting.observer builds it
    factory = next(iter(track_factories(logs).values()))
    return fit, schedule, factory


def test_rerun_sessions_share_evidence_as_the_real_session_did(tmp_path):
    # The default Bayesian tracks share spread and lapse evidence (runner/shared_evidence.py); the bootstrap
    # re-runs whole sessions in the log's order, each lending only to itself (fitting/replay.py). Fed the
    # logged answers, a re-run session from the fit's factory must propose the levels the real session
    # presented (copies stepped together: up to near-ties of single-precision entropies,
    # runner/adaptive_batch.py), which needs the same evidence at every step
    from fitting.replay import _plan, _session

    fit, schedule, factory = _one_simulated_fit(tmp_path, 'method = "bayesian"', 12)
    copies, shared = _session(factory, 2)
    assert shared and all(len(tracks) == 2 for tracks in _plan(schedule, len(fit.conditions)))
    logs = sorted((tmp_path / "logs").glob("*.trials.csv"))
    trials = pd.concat([pd.read_csv(p) for p in logs])
    trials = trials[trials["practice"] == 0]
    tracks, differ = {}, 0
    for (c, track), x, r in zip(schedule, trials["test_offset_deg"], trials["response_cw"]):
        if (c, track) not in tracks:
            tracks[(c, track)] = copies(fit.conditions[c], track)
        proposed = tracks[(c, track)].next_levels()
        if (proposed != x).any():           # only where the logged level ties the proposed one in single precision
            entropies, levels = tracks[(c, track)].expected_entropies(), tracks[(c, track)].grid.level_values()
            chosen = entropies[:, np.searchsorted(levels, proposed)].diagonal()
            np.testing.assert_allclose(entropies[:, np.searchsorted(levels, x)], chosen, rtol=1e-6)
            differ += 1
        tracks[(c, track)].update([x, x], [r, r])
    assert differ <= 0.02 * len(schedule)
    (tmp_path / "alone").mkdir()
    alone = _one_simulated_fit(tmp_path / "alone", 'method = "bayesian"\nbayes_share_spread = false', 12)[2]
    assert not _session(alone, 2)[1]      # tracks that learnt alone run alone in the re-run too
    # a sidecar written before the tracks could share (no SHARING_KEY): its tracks ran alone, and are re-run so;
    # one written before the Gaussian PSE prior became the default (no PRIOR_KEY) is re-run with a uniform prior
    import json
    from runner.replay import track_factories
    from runner.tracks import PRIOR_KEY, SHARING_KEY
    assert factory.protocol.procedure.bayes_pse_prior_sd_deg == 6.0
    for side in (tmp_path / "logs").glob("*.session.json"):
        meta = json.loads(side.read_text())
        del meta[SHARING_KEY], meta[PRIOR_KEY]
        side.write_text(json.dumps(meta))
    old = next(iter(track_factories([str(p) for p in logs]).values()))
    assert old.protocol.procedure.bayes_share_spread is False and not _session(old, 2)[1]
    assert old.protocol.procedure.bayes_pse_prior_sd_deg == 0.0
    # a mistyped record: refused naming the sidecar and key, or (fit's default pilot) a note and fixed levels
    side = next((tmp_path / "logs").glob("*.session.json"))
    side.write_text(json.dumps({**json.loads(side.read_text()), PRIOR_KEY: "6"}))
    with pytest.raises(InputError, match=f"^{side}: {PRIOR_KEY}: malformed sidecar"):
        track_factories([str(p) for p in logs])
    notes = []
    assert track_factories([str(p) for p in logs], strict=False, notes=notes) == {}
    assert len(notes) == 1 and notes[0].startswith(f"{side}: {PRIOR_KEY}") and "levels fixed" in notes[0]


def _pilot_spreads(tmp_path, method_lines: str, trials_per_track: int, pilot: int):
    """Generating spread of the re-run pilot and of the fixed-level pilot for one simulated session, and its fit."""
    from fitting.bootstrap import generating_parameters
    from fitting.progress import ProgressBar
    from fitting.replay import rerun_generating_parameters

    fit, schedule, factory = _one_simulated_fit(tmp_path, method_lines, trials_per_track)
    with ProgressBar(1, "", show=False) as bar:
        rerun = rerun_generating_parameters(fit, schedule, factory, pilot, np.random.default_rng(1), bar)
        fixed = generating_parameters([fit], pilot, np.random.default_rng(2), 500, bar)[0]
    return rerun, fixed, fit


def test_a_pilot_that_reruns_constant_stimuli_matches_the_fixed_level_pilot(tmp_path):
    # Constant stimuli present the same levels the same number of times whatever the answers, so re-running
    # the tracks samples exactly the fixed-level bootstrap's distribution (Wichmann & Hill 2001, II: the
    # parametric bootstrap at the observed levels): both pilots must find the same spread bias, within
    # Monte Carlo error
    rerun, fixed, fit = _pilot_spreads(tmp_path, 'method = "constant"\nlevels_deg = [-8, -4, -2, 2, 4, 8]', 24, 600)
    s = fit.layout.spread_index[0]
    assert abs(rerun[s] - fixed[s]) < 0.04 * fit.theta[s]
    assert np.allclose(rerun[fit.layout.pse_index], fit.pse)        # PSEs stay at their estimates


def test_a_pilot_that_reruns_up_down_tracks_widens_the_generating_spread(tmp_path):
    # Short adaptive tracks bias the fitted spread low (slope bias of adaptive data, Kaernbach 2001, from
    # memory; measured 0.77 of the truth at 24 up-down trials per condition in benchmarks/README.md), a bias
    # a fixed-level pilot does not see: the re-run pilot must generate at a clearly larger spread
    rerun, fixed, fit = _pilot_spreads(tmp_path, 'method = "updown"\nstart_offset_deg = 2\nsteps_deg = [4, 2, 1]',
                                       12, 300)
    s = fit.layout.spread_index[0]
    assert rerun[s] > 1.1 * fixed[s]


def test_a_pilot_that_reruns_bayesian_tracks_widens_the_generating_spread(tmp_path):
    # The same slope bias with Bayesian tracks (measured 0.79 of the truth at 24 trials per condition in
    # benchmarks/README.md); their copies are stepped together (runner/adaptive_batch.py), and the re-run
    # pilot must see the bias as it does with up-down tracks
    rerun, fixed, fit = _pilot_spreads(tmp_path, 'method = "bayesian"', 12, 200)
    s = fit.layout.spread_index[0]
    assert rerun[s] > 1.1 * fixed[s]
    assert np.allclose(rerun[fit.layout.pse_index], fit.pse)


def test_tracks_that_stop_by_reversals_are_rerun_until_they_stop(tmp_path):
    # A track with max_reversals stops by its own rule, so a re-run copy may stop before the logged track
    # did; it must then simply run no more trials (this once ended the default fit in a traceback)
    from fitting.replay import _plan, replay_bootstrap

    fit, schedule, factory = _one_simulated_fit(
        tmp_path, 'method = "updown"\nstart_offset_deg = 2\nsteps_deg = [4, 2, 1]\nmax_reversals = 3', 12)
    assert any(m < 12 for tracks in _plan(schedule, len(fit.conditions)) for _, m in tracks)   # some stopped early
    boot = replay_bootstrap(fit, schedule, factory, 40, np.random.default_rng(0), progress=False, pilot=20)
    assert np.isfinite(boot.theta).all() and boot.converged.mean() > 0.9
