"""`compare`: agreement metrics against hand computation and scipy."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from fitting.compare import agreement, compare_results
from fitting.population import ChannelModel, predict_table
from runner.cli import main

from conftest import ROOT

Z = stats.norm.ppf(0.975)


def _measured(tmp_path, rows):
    frame = pd.DataFrame(rows, columns=["observer", "lag", "adapter_offset_deg", "pse_shift_deg", "ci_low", "ci_high", "n_trials"])
    d = tmp_path / "results"
    d.mkdir(exist_ok=True)
    frame.to_csv(d / "aftereffect.csv", index=False)
    return d


def test_metrics_equal_hand_computation_and_scipy():
    m = np.array([1.0, 2.0, -1.5, 3.0])
    p = np.array([0.5, 2.5, -1.0, 2.0])
    half = np.array([1.0, 0.5, 2.0, 1.0])
    a = agreement(m, m - half, m + half, p)
    # hand computation: residuals 0.5, -0.5, -0.5, 1.0
    assert a.rmse_deg == pytest.approx(np.sqrt((0.25 + 0.25 + 0.25 + 1.0) / 4))
    # reference: scipy.stats.pearsonr
    assert a.pearson_r == pytest.approx(stats.pearsonr(m, p).statistic, abs=1e-12)
    se = half / Z
    w = 1 / se**2
    assert a.gain == pytest.approx(np.sum(w * m * p) / np.sum(w * p * p))
    chi2 = np.sum((m - p) ** 2 / se**2)
    assert a.chi2 == pytest.approx(chi2)
    # reference: scipy.stats.chi2 upper tail with one degree of freedom per point
    assert a.chi2_p == pytest.approx(stats.chi2.sf(chi2, 4))
    # predictions inside [m - half, m + half]: 0.5 in [0,2] yes; 2.5 in [1.5,2.5] yes; -1 in [-3.5,0.5] yes; 2 in [2,4] yes
    assert a.inside_ci_fraction == 1.0


def test_gain_ci_covers_the_true_gain_of_scaled_predictions():
    # measured = 0.6 x predicted + noise of known se: the 95 % CI of g should cover 0.6 about 95 % of the time
    rng = np.random.default_rng(4)
    p = np.linspace(-6, 6, 16)
    se = np.full_like(p, 0.5)
    covered = 0
    for _ in range(400):
        m = 0.6 * p + rng.normal(0, se)
        a = agreement(m, m - Z * se, m + Z * se, p)
        covered += a.gain_ci_low <= 0.6 <= a.gain_ci_high
    assert 0.92 <= covered / 400 <= 0.98


def test_prediction_sd_enters_the_chi2():
    m, p = np.array([1.0, 2.0, 3.0]), np.array([0.0, 2.0, 4.0])
    half = np.full(3, Z)  # se = 1
    without = agreement(m, m - half, m + half, p)
    with_sd = agreement(m, m - half, m + half, p, prediction_sd=np.ones(3))
    assert without.chi2 == pytest.approx(2.0)
    assert with_sd.chi2 == pytest.approx(1.0)


def test_compare_writes_agreement_per_lag_and_overall(tmp_path, capsys):
    rows = [("S1", lag, d, 0.0, -1.0, 1.0, 40) for lag in (0, 1) for d in (-30, 30)]
    results = _measured(tmp_path, rows)
    pred = pd.DataFrame({"lag": [0, 0, 1, 1], "adapter_offset_deg": [-30, 30, -30, 30], "pse_shift_deg": [-0.5, 0.5, -2, 2]})
    pred.to_csv(tmp_path / "pred.csv", index=False)
    out = tmp_path / "out"
    assert main(["compare", str(results), str(tmp_path / "pred.csv"), "--out", str(out)]) == 0
    table = pd.read_csv(out / "agreement.csv")
    assert list(table["lag"].astype(str)) == ["0", "1", "all"]
    assert table.loc[0, "inside_ci_fraction"] == 1.0 and table.loc[1, "inside_ci_fraction"] == 0.0
    assert (out / "comparison.png").exists() and (out / "comparison.pdf").exists()
    # given one table rather than the fit's folder there is no page to add the comparison to: it says so
    capsys.readouterr()
    assert main(["compare", str(results / "aftereffect.csv"), str(tmp_path / "pred.csv"), "--out", str(out)]) == 0
    assert "note: no report page: it is made when the fit's folder is given" in capsys.readouterr().out
    assert not (out / "report.html").exists()


def test_mismatched_grids_list_what_is_missing(tmp_path, capsys):
    rows = [("S1", 0, d, 0.0, -1.0, 1.0, 40) for d in (-30, 15, 30)] + [("S1", 2, 30, 0.0, -1.0, 1.0, 40)]
    results = _measured(tmp_path, rows)
    pred = pd.DataFrame({"lag": [0, 0], "adapter_offset_deg": [-30, 30], "pse_shift_deg": [-1, 1]})
    pred.to_csv(tmp_path / "pred.csv", index=False)
    code = main(["compare", str(results), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1
    assert "lag 0 offset +15" in err and "lag 2 offset +30" in err
    # interpolation over offsets fills +15 at lag 0 but never invents a lag
    code = main(["compare", str(results), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "o"), "--interpolate"])
    err = capsys.readouterr().err
    assert code == 2 and "lag 2 offset +30" in err and "offset +15" not in err


def test_unused_predictions_are_named_and_long_lists_are_cut(tmp_path, capsys):
    rows = [("S1", 0, d, 0.0, -1.0, 1.0, 40) for d in (-30, 30)]
    results = _measured(tmp_path, rows)
    pred = pd.DataFrame({"lag": [0, 0, 0, 7], "adapter_offset_deg": [-30, 30, 45, 30],
                         "pse_shift_deg": [-1, 1, 1.5, 0.2]})
    pred.to_csv(tmp_path / "pred.csv", index=False)
    assert main(["compare", str(results), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "o")]) == 0
    out = capsys.readouterr().out
    assert "note: 2 predicted points match no measured after-effect and are not used: lag 0 offset +45, " \
           "lag 7 offset +30" in out
    # a prediction table for another design: the one-line error names the first few points, not all
    rows = [("S1", lag, d, 0.0, -1.0, 1.0, 40) for lag in range(3) for d in (-60, -30, -15, 15, 30, 60)]
    results = _measured(tmp_path, rows)
    assert main(["compare", str(results), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "o2")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "lag 1 offset -30 and 10 more (or pass" in err, err


@pytest.mark.slow
def test_gain_and_chi2_are_left_out_when_the_covariance_rests_on_too_few_replicates(tmp_path, capsys):
    # 32 shifts need more than 34 replicates for a non-singular covariance (Hartlap et al. 2007, A&A 464, 399,
    # for the corrected inverse); with 20 the statistics were noise (chi2 -6.7e6, gain nan printed as numbers)
    logs = tmp_path / "logs"     # the demo's logs without their sidecars: a fixed-level bootstrap, quicker
    logs.mkdir()
    for log in (ROOT / "results_demo" / "logs").glob("*.trials.csv"):
        (logs / log.name).write_bytes(log.read_bytes())
    pred = ROOT / "results_demo" / "predictions_population_model.csv"
    for boot, left_out in (("20", True), ("40", False)):
        fit = tmp_path / f"fit{boot}"
        assert main(["fit", str(logs), "--out", str(fit), "--bootstrap", boot, "--no-figures"]) == 0
        capsys.readouterr()
        assert main(["compare", str(fit), str(pred), "--out", str(tmp_path / f"cmp{boot}")]) == 0
        out, err = capsys.readouterr()
        assert "Warning" not in err, err
        table = pd.read_csv(tmp_path / f"cmp{boot}" / "agreement.csv")
        assert table["chi2"].isna().all() == left_out and table["gain"].isna().all() == left_out
        assert table["gain_unweighted"].notna().all() and table["inside_ci_fraction"].notna().all()
        if left_out:
            assert "sim01, sim02, sim03: the shifts' covariance rests on 20 bootstrap replicates" in out
            assert out.count("no gain or chi2") == 4 and " nan" not in out
        else:
            assert (table["chi2"] > 0).all()
            assert "rests on 40 bootstrap replicates; chi2 and gain were checked with 1000" in out


def test_bad_prediction_files_are_one_line_errors(tmp_path, capsys):
    results = _measured(tmp_path, [("S1", 0, 30, 0.0, -1.0, 1.0, 40)])
    (tmp_path / "p.csv").write_text("lag,adapter_offset_deg\n0,30\n")
    assert main(["compare", str(results), str(tmp_path / "p.csv"), "--out", str(tmp_path / "o")]) == 2
    assert "pse_shift_deg" in capsys.readouterr().err
    (tmp_path / "p.csv").write_text("lag,adapter_offset_deg,pse_shift_deg\n0,30,abc\n")
    assert main(["compare", str(results), str(tmp_path / "p.csv"), "--out", str(tmp_path / "o")]) == 2
    assert "line 2" in capsys.readouterr().err
    # a shift of a direction lies within ±180° (an sd in [0, 180]): larger numbers are a damaged file
    # lags count whole motion periods from 0; an offset is a direction difference within ±180° too
    for text, field in (("0,30,1e300\n", "line 2: pse_shift_deg"), ("0,30,1.0,0.2\n0,-30,-1.0,-0.5\n", "line 3: sd_deg"),
                        ("0,30,1.0\n-1,30,1.0\n", "line 3: lag"), ("1.5,30,1.0\n", "line 2: lag"),
                        ("0,400,1.0\n", "line 2: adapter_offset_deg")):
        header = "lag,adapter_offset_deg,pse_shift_deg" + (",sd_deg" if "sd_deg" in field else "")
        (tmp_path / "p.csv").write_text(header + "\n" + text)
        assert main(["compare", str(results), str(tmp_path / "p.csv"), "--out", str(tmp_path / "o")]) == 2
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1 and field in err, err
    assert not (tmp_path / "o").exists()


def test_population_model_is_repulsive_odd_and_decays_with_lag():
    model = ChannelModel()
    table = predict_table(model, [-30, 30], [0, 1, 3])
    lag0 = table[table.lag == 0].set_index("adapter_offset_deg")["pse_shift_deg"]
    assert lag0[30.0] > 0 and lag0[-30.0] == pytest.approx(-lag0[30.0], abs=1e-9)
    by_lag = table[table.adapter_offset_deg == 30].set_index("lag")["pse_shift_deg"]
    assert by_lag[0] > by_lag[1] > by_lag[3] > 0
    # an unadapted population reads every test veridically (population vector of a symmetric code)
    assert model.decoded_deg([7.0], model.gains(None, 0))[0] == pytest.approx(7.0, abs=1e-9)


@pytest.mark.filterwarnings("ignore:`use_t=True` requires")
def test_group_gain_is_the_random_effects_combination_of_the_observers_gains(tmp_path):
    import statsmodels.api as sm
    from statsmodels.stats.meta_analysis import combine_effects

    rng = np.random.default_rng(8)
    offsets = np.array([-60.0, -30.0, -15.0, 15.0, 30.0, 60.0])
    predicted = 2.0 * np.sin(np.radians(offsets) * 2)
    rows, gains, variances = [], [], []
    for i, amp in enumerate((0.6, 1.0, 1.3, 1.7)):                    # observers differ in amplitude
        se = rng.uniform(0.3, 0.6, offsets.size)
        m = amp * predicted + rng.normal(0, se)
        rows += [[f"o{i}", 0, o, mi, mi - Z * s, mi + Z * s, 24] for o, mi, s in zip(offsets, m, se)]
        # reference: statsmodels GLS through the origin (scale estimated) for each observer's gain
        ref = sm.GLS(m, predicted[:, None], sigma=np.diag(se**2)).fit()
        gains.append(ref.params[0])
        variances.append(ref.bse[0] ** 2)
    rows += [["group", 0, o, p, p - 0.5, p + 0.5, 96] for o, p in zip(offsets, predicted)]
    results = _measured(tmp_path, rows)
    pd.DataFrame({"lag": 0, "adapter_offset_deg": offsets, "pse_shift_deg": predicted}).to_csv(
        tmp_path / "pred.csv", index=False)
    table = compare_results(results, tmp_path / "pred.csv", tmp_path / "cmp", figures=False).table
    row = table[(table["observer"] == "group") & (table["lag"] == "all")].iloc[0]
    # reference: statsmodels' combine_effects, DerSimonian-Laird with the Hartung-Knapp ("wls") interval
    frame = combine_effects(np.array(gains), np.array(variances), method_re="dl", use_t=True).summary_frame()
    assert row["gain"] == pytest.approx(frame.loc["random effect wls", "eff"], rel=1e-9)
    assert row["gain_ci_low"] == pytest.approx(frame.loc["random effect wls", "ci_low"], rel=1e-9)
    assert row["gain_ci_high"] == pytest.approx(frame.loc["random effect wls", "ci_upp"], rel=1e-9)
