"""`compare`: agreement metrics against hand computation and scipy."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from fitting.compare import agreement, compare_results
from fitting.population import ChannelModel, predict_table
from runner.cli import main

from conftest import ROOT, run_cli

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
        # reference: statsmodels GLS through the origin (scale estimated) for each observer's gain, its standard
        # error never below the one with the covariance known (statsmodels' fixed-scale fit)
        ref = sm.GLS(m, predicted[:, None], sigma=np.diag(se**2)).fit()
        known = sm.GLS(m, predicted[:, None], sigma=np.diag(se**2)).fit(cov_type="fixed scale")
        gains.append(ref.params[0])
        variances.append(max(ref.bse[0], known.bse[0]) ** 2)
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


# --- hostile inputs: damaged tables, unestimable shifts, null predictions ------------------------------------------


def _fit_folder(tmp_path, observers=("S1", "S2", "S3"), flags=None, half=1.0):
    """A fit-like folder: aftereffect.csv (8 shifts per observer) and its covariance (diagonal, as fit's long form)."""
    from fitting.covariance import long_table

    offsets = [-60.0, -30.0, 30.0, 60.0]
    rows, covs = [], []
    for i, observer in enumerate(observers):
        for lag in (0, 2):
            for o in offsets:
                m = 0.05 * o * (1 + 0.1 * i) - 0.02 * lag * np.sign(o)
                rows.append((observer, lag, o, m, m - half, m + half, 24,
                             (flags or {}).get((observer, lag, o), "")))
        cells = [(lag, o) for lag in (0, 2) for o in offsets]
        covs.append(long_table(observer, [c[0] for c in cells], [c[1] for c in cells],
                               np.eye(len(cells)) * (half / Z) ** 2, 1000, np.nan, 30.0))
    d = tmp_path / "fit"
    d.mkdir(exist_ok=True)
    pd.DataFrame(rows, columns=["observer", "lag", "adapter_offset_deg", "pse_shift_deg", "ci_low", "ci_high",
                                "n_trials", "flags"]).to_csv(d / "aftereffect.csv", index=False)
    pd.concat(covs).to_csv(d / "aftereffect_covariance.csv", index=False)
    pd.DataFrame({"lag": np.repeat([0, 2], 4), "adapter_offset_deg": offsets * 2,
                  "pse_shift_deg": [0.05 * o for o in offsets] * 2}).to_csv(tmp_path / "pred.csv", index=False)
    return d


def _cell(line: int, column: str, value: str):
    """An edit of a CSV text: the cell of ``column`` on file line ``line`` set to ``value``."""
    def edit(text: str) -> str:
        lines = text.split("\n")
        header, cells = lines[0].split(","), lines[line - 1].split(",")
        cells[header.index(column)] = value
        lines[line - 1] = ",".join(cells)
        return "\n".join(lines)
    return edit


def _short_row(text: str) -> str:
    lines = text.split("\n")
    lines[4] = ",".join(lines[4].split(",")[:6])
    return "\n".join(lines)


@pytest.mark.parametrize("edit, says", [
    # before: exit 0, the observers after the cut left out silently and the cut row read with a cut number
    (lambda t: t[:-8], "line 25: the file ends inside this row"),
    (lambda t: t.rstrip("\n"), "line 25: the file ends inside this row"),        # cut inside the last number only
    # before: accepted; 1e300 leaked overflow warnings and printed RMSE inf, a repeated row counted twice
    (_cell(11, "pse_shift_deg", "1e300"), "line 11: pse_shift_deg: expected a value in [-1080, 1080] deg"),
    (_cell(3, "adapter_offset_deg", "-60"), "line 3: a second row for the same observer, lag and adapter offset"),
    (_short_row, "line 5: 6 cells where the header has 8"),
    (_cell(21, "ci_low", "100"), "line 21: ci_low: above ci_high"),
    (_cell(5, "lag", "0.5"), "line 5: lag: expected a whole number"),
])
def test_a_cut_absurd_or_repeated_measured_table_is_one_line_and_loses_nothing(tmp_path, capsys, edit, says):
    fit = _fit_folder(tmp_path)
    out = tmp_path / "cmp"
    compare_results(fit, tmp_path / "pred.csv", out, figures=False)
    before = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    table = fit / "aftereffect.csv"
    text = table.read_text()
    assert edit(text) != text
    table.write_text(edit(text))
    assert main(["compare", str(fit), str(tmp_path / "pred.csv"), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "aftereffect.csv" in err and says in err, err
    assert before == {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}      # the earlier comparison kept


@pytest.mark.parametrize("edit, says", [
    (lambda t: t[:-5], "line 193: the file ends inside this row"),
    (lambda t: t + t.splitlines()[5] + "\n", "line 194: a second row for the same observer and pair of cells"),
    # a copy cut at a line end: S3's rows stop short, or S3 is in the covariance but gone from aftereffect.csv
    (lambda t: "\n".join(t.splitlines()[:-3]) + "\n", "S3: 61 rows, not one per pair of its 8 cells"),
    (lambda t: t.replace("\nS3,", "\nS4,"), "S4: in aftereffect_covariance.csv but not here"),
    (lambda t: t.replace(",1000,", ",999.5,", 1), "line 2: replicates: expected a whole number"),
])
def test_a_cut_or_repeated_covariance_table_is_one_line(tmp_path, capsys, edit, says):
    fit = _fit_folder(tmp_path)
    table = fit / "aftereffect_covariance.csv"
    text = table.read_text()
    table.write_text(edit(text))
    assert main(["compare", str(fit), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "cmp")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and says in err, err
    assert not (tmp_path / "cmp").exists()


@pytest.mark.filterwarnings("error")      # before: a RuntimeWarning (sqrt of a negative) reached the console
def test_shifts_flagged_not_estimable_are_left_out_with_a_note(tmp_path, capsys):
    # S2 answered clockwise on every trial: every shift one-sided, with a near-zero interval (before: chi2 1.6e15 and
    # a gain of [nan, nan] went into the table); one of S3's conditions had too few trials for an interval (before:
    # all of S3's interval statistics were left out, "a fit without --bootstrap?")
    flags = {("S2", lag, o): "one-sided outside-tested" for lag in (0, 2) for o in (-60.0, -30.0, 30.0, 60.0)}
    flags[("S3", 2, 30.0)] = "few-trials"
    fit = _fit_folder(tmp_path, flags=flags)
    shifts = pd.read_csv(fit / "aftereffect.csv")
    shifts.loc[shifts["observer"] == "S2", ["pse_shift_deg", "ci_low", "ci_high"]] = [0.004, 0.0041, 0.0042]
    shifts.loc[shifts["flags"].fillna("").str.contains("few-trials"), ["ci_low", "ci_high"]] = np.nan
    shifts.to_csv(fit / "aftereffect.csv", index=False)
    assert main(["compare", str(fit), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "cmp")]) == 0
    out, err = capsys.readouterr()
    assert err == ""
    table = pd.read_csv(tmp_path / "cmp" / "agreement.csv")
    assert "chi2/7 read against F(7, 30.0)" in out        # (a sweep saw "chi2/7.0" once such rows were there)
    s2 = table[table["observer"] == "S2"]      # every row judged on nothing, each saying how many points it had
    assert list(s2["lag"]) == ["0", "2", "all"] and list(s2["n_points"]) == [0, 0, 0]
    assert list(s2["points_left_out"]) == [4, 4, 8] and s2[["rmse_deg", "gain", "chi2"]].isna().all(axis=None)
    assert ("note: S2: every measured point is flagged one-sided (every answer on one side, so the PSE is not "
            "estimable); the observer is left out") in out
    assert "note: S3: 1 of 8 measured points are flagged few-trials (fewer than 10 trials, so no interval) and " \
           "left out of chi2, gain and the other agreement statistics: lag 2 offset +30" in out
    s3 = table[(table["observer"] == "S3") & (table["lag"] == "all")].iloc[0]
    kept = shifts[(shifts["observer"] == "S3") & shifts["ci_low"].notna()]
    pred = 0.05 * kept["adapter_offset_deg"]
    se = (kept["ci_high"] - kept["ci_low"]) / (2 * Z)
    # the diagonal covariance with spread_dof 30: chi2 / n read against F(n, 30) (scipy.stats.f) on the 7 kept points
    chi2 = float(np.sum(((kept["pse_shift_deg"] - pred) / se) ** 2)) * (1000 - 7 - 2) / (1000 - 1)  # Hartlap factor
    assert s3["n_points"] == 7 and s3["chi2"] == pytest.approx(chi2, rel=1e-5)
    assert s3["chi2_p"] == pytest.approx(stats.f.sf(chi2 / 7, 7, 30.0), rel=1e-4)


@pytest.mark.slow
def test_points_left_out_of_the_statistics_are_drawn_hollow_and_off_the_scale_at_its_edge(tmp_path):
    # Before, the overlay drew S2's one-sided point (its PSE on a bound, -40 deg) and S3's few-trials point filled,
    # like every point in chi2 and gain, and the -40 deg set the vertical scale of every panel.
    import matplotlib.image as mpimg

    from fitting.compare_figure import BEYOND_LABEL, LEFT_OUT_LABEL, overlay_canvas
    from fitting.figures import GRID_DPI

    fit = _fit_folder(tmp_path, flags={("S2", 2, 30.0): "one-sided on-bound", ("S3", 0, -60.0): "few-trials"})
    shifts = pd.read_csv(fit / "aftereffect.csv")
    shifts.loc[(shifts["observer"] == "S2") & (shifts["lag"] == 2) & (shifts["adapter_offset_deg"] == 30),
               ["pse_shift_deg", "ci_low", "ci_high"]] = [-40.0, -40.0, -39.9999]
    shifts.loc[shifts["flags"].fillna("").str.contains("few-trials"), ["ci_low", "ci_high"]] = np.nan
    shifts.to_csv(fit / "aftereffect.csv", index=False)
    compare_results(fit, tmp_path / "pred.csv", tmp_path / "cmp")
    points = pd.read_csv(tmp_path / "cmp" / "comparison_points.csv")
    out = points[~points["in_statistics"]]
    assert out[["observer", "lag", "adapter_offset_deg"]].values.tolist() == [["S2", 2, 30.0], ["S3", 0, -60.0]]
    canvas = overlay_canvas(points)
    assert -40.0 < canvas.ylim[0] < -2.0                  # the scale is the kept points' and the predictions'
    image = mpimg.imread(tmp_path / "cmp" / "comparison.png")
    assert image.shape[0] == round(canvas.height * GRID_DPI)

    def pixel(panel: int, x: float, y: float) -> np.ndarray:
        cx, cy = canvas.to_canvas(panel, x, y)            # inches; images count rows from the top
        return image[int(round((canvas.height - float(cy)) * GRID_DPI)), int(round(float(cx) * GRID_DPI)), :3]

    nudge = 0.012 * 60.0                                  # the two lags sit side by side (compare_figure.py)
    white = np.ones(3)
    # hollow: a white centre inside its lag's ring (S2's at the panel's lower edge: off the scale)
    assert np.allclose(pixel(1, 30.0 + nudge / 2, canvas.ylim[0]), white, atol=0.02)
    s3 = points[(points["observer"] == "S3") & (points["lag"] == 0) & (points["adapter_offset_deg"] == -60)]
    assert np.allclose(pixel(2, -60.0 - nudge / 2, float(s3["pse_shift_deg"].iloc[0])), white, atol=0.02)
    # a point in the statistics is filled with its lag's colour
    s1 = points[(points["observer"] == "S1") & (points["lag"] == 0) & (points["adapter_offset_deg"] == 60)]
    assert not np.allclose(pixel(0, 60.0 - nudge / 2, float(s1["pse_shift_deg"].iloc[0])), white, atol=0.2)
    labels = [t.get_text() for t in canvas.ax.texts]
    assert LEFT_OUT_LABEL + BEYOND_LABEL in labels
    # and the report says what the hollow points are, beside the figure and in the points table
    page = (tmp_path / "cmp" / "report.html").read_text()
    assert ("hollow points (one-sided, too few trials for an interval, or a group cell of fewer than three "
            "observers) are left out of") in page
    assert "in_statistics" in page
    # without a left-out point the figure is as before: no hollow point, no such legend entry
    kept = overlay_canvas(points[points["in_statistics"]])
    assert not any(key[1] is False for key in kept.marks)


@pytest.mark.parametrize("edit, field", [
    # before: KeyError: 'log', AttributeError, AttributeError, TypeError, each a traceback with exit 1
    (lambda d: d.update(sessions=[{"observer": "S1"}]), "sessions[0].log: expected a text, found nothing"),
    (lambda d: d.update(sessions="x"), "sessions: expected a list, found a text"),
    (lambda d: d.update(protocols=[{"path": "p.toml"}]), "protocols: expected an object, found a list"),
    (lambda d: d.update(notes=5), "notes: expected an object, found a number"),
    (lambda d: d.update(notes={"S1": "one note"}), "notes.S1: expected a list, found a text"),
    (lambda d: d["protocols"]["ab12"].update(plan=[3]), "protocols.ab12.plan[0]: expected a text, found a number"),
])
def test_report_data_of_the_wrong_shape_is_one_line(tmp_path, capsys, edit, field):
    import json

    fit = _fit_folder(tmp_path)
    data = {"kind": "adapt-test", "options": "", "notes": {"S1": []}, "software": {"python": "3"},
            "protocols": {"ab12": {"path": "p.toml", "text": "", "plan": []}},
            "sessions": [{"log": "S1-1.trials.csv", "observer": "S1", "protocol_sha256": "ab12", "packages": {}}]}
    (fit / "report_data.json").write_text(json.dumps(data))
    compare_results(fit, tmp_path / "pred.csv", tmp_path / "ok", figures=False)        # the shape fit writes
    edit(data)
    (fit / "report_data.json").write_text(json.dumps(data))
    assert main(["compare", str(fit), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "cmp")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and err.endswith("run fit again") and f"report_data.json: {field}" in err, err
    assert not (tmp_path / "cmp").exists()


def test_a_null_prediction_prints_its_chi2_and_the_promised_note(tmp_path, capsys):
    # predicting no after-effect at all: the gain is undefined but chi2 is not (before: "no gain or chi2 ... see
    # note", with no such note, while agreement.csv held chi2 and p)
    fit = _fit_folder(tmp_path, observers=("S1",))
    pd.DataFrame({"lag": np.repeat([0, 2], 4), "adapter_offset_deg": [-60, -30, 30, 60] * 2,
                  "pse_shift_deg": 0.0}).to_csv(tmp_path / "zeros.csv", index=False)
    assert main(["compare", str(fit), str(tmp_path / "zeros.csv"), "--out", str(tmp_path / "cmp")]) == 0
    out = capsys.readouterr().out
    row = pd.read_csv(tmp_path / "cmp" / "agreement.csv").set_index("lag").loc["all"]
    shifts = pd.read_csv(fit / "aftereffect.csv")
    # reference: sum of squared standardised shifts, Hartlap-scaled, read against F(8, 30) (scipy.stats.f)
    chi2 = float(np.sum((shifts["pse_shift_deg"] / (1.0 / Z)) ** 2)) * (1000 - 8 - 2) / (1000 - 1)
    assert row["chi2"] == pytest.approx(chi2, rel=1e-5) and np.isnan(row["gain"])
    line = next(x for x in out.splitlines() if x.strip().startswith("S1:"))
    assert "gain undefined (see note)" in line and f"chi2 {chi2:.1f}" in line
    assert f"(p {stats.f.sf(chi2 / 8, 8, 30.0):.3g})" in line
    assert "note: S1: every prediction over all lags is 0 (no after-effect), so the gain" in out


def test_compare_writes_true_and_false_as_fit_tables_do(tmp_path):
    # fit's tables write booleans as true/false (fitting.tables.format_table); agreement.csv wrote False/True
    fit = _fit_folder(tmp_path, observers=("S1", "S2", "group"))
    compare_results(fit, tmp_path / "pred.csv", tmp_path / "cmp", figures=False)
    points = pd.read_csv(tmp_path / "cmp" / "comparison_points.csv", dtype=str)
    assert set(points["in_statistics"]) == {"true"}


def test_a_chi2_read_against_an_f_with_a_spread_of_few_degrees_of_freedom_is_said_to_have_no_power(tmp_path, capsys):
    # before (a hostile-user sweep): an observer of 6 trials per track printed "chi2/2.0 read against F(2, 0.6)
    # (p 0.652)" with no word that at F(2, 0.63) no chi2 below 8,500 rejects at 5 %
    fit = _fit_folder(tmp_path)
    cov = pd.read_csv(fit / "aftereffect_covariance.csv")
    cov.loc[cov["observer"] == "S1", "spread_dof"] = 0.63
    cov.to_csv(fit / "aftereffect_covariance.csv", index=False)
    assert main(["compare", str(fit), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "cmp")]) == 0
    out = capsys.readouterr().out
    # the 5 % point of chi2 / 8 under F(8, 0.63) (scipy.stats.f) against that of chi2(8) (scipy.stats.chi2)
    needed, usual = 8 * stats.f.ppf(0.95, 8, 0.63), stats.chi2.ppf(0.95, 8)
    assert (f"note: S1: its spread rests on 0.6 degrees of freedom, so its chi2 would have to exceed {needed:,.0f} "
            f"(chi2(8): {usual:.1f}) to reject at 5 %: the test can hardly reject") in out
    assert "S2: its spread rests on" not in out and "S3: its spread rests on" not in out      # 30 df: no note


@pytest.mark.slow
def test_group_cells_of_fewer_than_three_observers_are_left_out_of_the_group_statistics(tmp_path, capsys):
    # before (defect 5 of the hostile sweep): every group cell entered the group's gain, chi2 and "inside the CIs"
    # (in_statistics true), two-observer cells with intervals of +-25 deg among them, and the group's line read
    # "descriptive only (fewer than 3 observers)" for a group of 15
    import statsmodels.api as sm

    from fitting.compare import combine_gains

    few = {("group", 2, o): "descriptive" for o in (-60.0, -30.0, 30.0, 60.0)}
    fit = _fit_folder(tmp_path, observers=("S1", "S2", "S3", "group"), flags=few)
    shifts = pd.read_csv(fit / "aftereffect.csv")
    wide = shifts["flags"].fillna("").str.contains("descriptive")
    shifts.loc[wide, ["pse_shift_deg", "ci_low", "ci_high"]] = [10.0, -15.0, 35.0]   # far off, and wide
    noise = np.random.default_rng(1).normal(0.0, 0.3, len(shifts)) * (shifts["observer"] != "group")
    shifts[["pse_shift_deg", "ci_low", "ci_high"]] += noise.to_numpy()[:, None]   # gains with an error
    shifts.to_csv(fit / "aftereffect.csv", index=False)
    assert main(["compare", str(fit), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "cmp")]) == 0
    line = next(x for x in capsys.readouterr().out.splitlines() if x.strip().startswith("group:"))
    assert line.endswith("; 4 of 8 cells left out (descriptive: fewer than 3 observers; see note)"), line
    points = pd.read_csv(tmp_path / "cmp" / "comparison_points.csv")
    out = points[~points["in_statistics"]]
    assert out[["observer", "lag"]].drop_duplicates().values.tolist() == [["group", 2]] and len(out) == 4
    table = pd.read_csv(tmp_path / "cmp" / "agreement.csv").set_index(["observer", "lag"])
    group = table.loc[("group", "all")]
    assert group["n_points"] == 4 and group["points_left_out"] == 4
    # the lag whose every group cell is left out keeps its row, judged on nothing (before, a sweep found the row
    # missing from agreement.csv: a reader could not tell a lag left out from a lag not measured)
    lag2 = table.loc[("group", "2")]
    assert lag2["n_points"] == 0 and lag2["points_left_out"] == 4
    assert lag2[["rmse_deg", "gain", "chi2", "chi2_p", "inside_ci_fraction"]].isna().all()
    assert table.loc[("group", "0"), "n_points"] == 4 and table.loc[("group", "0"), "points_left_out"] == 0
    # the group's chi2, RMSE and fraction inside the CIs are those of the group without those cells
    shifts[~wide].to_csv(fit / "aftereffect.csv", index=False)
    cov = pd.read_csv(fit / "aftereffect_covariance.csv")       # and their covariance (a row alone is refused)
    cov[~((cov["observer"] == "group") & ((cov["lag_a"] == 2) | (cov["lag_b"] == 2)))].to_csv(
        fit / "aftereffect_covariance.csv", index=False)
    without = compare_results(fit, tmp_path / "pred.csv", tmp_path / "cmp2", figures=False).table
    alone = without.set_index(["observer", "lag"]).loc[("group", "all")]
    for column in ("chi2", "chi2_p", "rmse_deg", "inside_ci_fraction"):
        assert group[column] == pytest.approx(alone[column], rel=1e-5), column
    # its gain combines the observers' gains over the group's remaining cells (lag 0): each a weighted least
    # squares fit through the origin with the variances as weights (statsmodels' WLS; the covariance is diagonal)
    lag0 = points[(points["observer"] != "group") & (points["lag"] == 0)]
    gains, ses = [], []
    for _, rows in lag0.groupby("observer"):
        se = (rows["ci_high"] - rows["ci_low"]) / (2 * Z)
        wls = sm.WLS(rows["pse_shift_deg"].to_numpy(), rows[["predicted_deg"]].to_numpy(), weights=1 / se**2)
        gains.append(wls.fit().params[0])
        ses.append(max(wls.fit().bse[0], wls.fit(cov_type="fixed scale").bse[0]))   # never below V known
    g, low, high = combine_gains(gains, ses)
    assert [group["gain"], group["gain_ci_low"], group["gain_ci_high"]] == pytest.approx([g, low, high], rel=1e-5)
    # every group cell of fewer than three observers (a group of two): its statistics are kept, labelled
    # descriptive only, as issue 12 asks; none of its cells is left out
    shifts.assign(flags=np.where(shifts["observer"] == "group", "descriptive", shifts["flags"])).to_csv(
        fit / "aftereffect.csv", index=False)
    assert main(["compare", str(fit), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "cmp3")]) == 0
    out = capsys.readouterr().out
    line = next(x for x in out.splitlines() if x.strip().startswith("group:"))
    assert line.endswith("; descriptive only (fewer than 3 observers)") and "left out" not in line, line
    assert "group: every cell rest on fewer than 3 observers" not in out            # (grammar of the note below)
    assert "note: group: every cell rests on fewer than 3 observers" in out
    described = pd.read_csv(tmp_path / "cmp3" / "agreement.csv").set_index(["observer", "lag"]).loc[("group", "all")]
    assert described["points_left_out"] == 0 and np.isfinite(described["chi2"])
    # and the table says so too (before, only the console and the page did; a sweep found agreement.csv unmarked)
    assert described["descriptive"] and not group["descriptive"]


def test_dense_prediction_tables_are_matched_as_the_scalar_rule_does_and_in_linear_time(tmp_path):
    import time

    from fitting.compare import match_predictions, read_predictions, unused_predictions

    rng = np.random.default_rng(3)
    measured = pd.DataFrame({"observer": "S1", "lag": np.repeat([0, 1, 3], 5),
                             "adapter_offset_deg": np.tile([-45.0, -20.0, 0.0, 20.000001, 90.0], 3)})
    grid = np.round(np.arange(-180, 180, 0.005), 4)
    pred = pd.DataFrame({"lag": np.repeat([0, 1, 2], grid.size), "adapter_offset_deg": np.tile(grid, 3)})
    pred["pse_shift_deg"] = rng.normal(0, 2, len(pred))
    pred.to_csv(tmp_path / "dense.csv", index=False)
    start = time.perf_counter()
    pred = read_predictions(tmp_path / "dense.csv")
    reading = time.perf_counter() - start
    start = time.perf_counter()
    with pytest.raises(Exception, match="no prediction for lag 3 offset -45"):
        match_predictions(measured, pred, "dense.csv", interpolate=False)
    points = match_predictions(measured[measured["lag"] < 3], pred, "dense.csv", interpolate=False)
    note = unused_predictions(measured, pred, interpolate=False)
    matching = time.perf_counter() - start
    # the scalar rule it replaces (np.isclose of every prediction against the measured offsets of its lag)
    for row in points.itertuples():
        same = pred[(pred["lag"] == row.lag) & np.isclose(pred["adapter_offset_deg"], row.adapter_offset_deg)]
        assert row.predicted_deg == same["pse_shift_deg"].iloc[0]
    used = sum(np.isclose(pred.loc[pred["lag"] == lag, "adapter_offset_deg"].to_numpy()[:, None],
                          measured.loc[measured["lag"] == lag, "adapter_offset_deg"].to_numpy()[None, :]).any(1).sum()
               for lag in (0, 1))
    assert note[0].startswith(f"{len(pred) - used} predicted points match no measured")
    # before: 0.2 M predictions took about 10 s to match (scalar np.isclose per pair), far more than reading them
    assert matching < 2 * reading, (matching, reading)


def test_the_order_of_the_measured_rows_changes_no_number(tmp_path):
    # before, the group's simulated p followed the rows' order: the same table shuffled moved p at lag 1 from
    # 0.0420 to 0.0365
    import random

    demo = ROOT / "results_demo"
    for name, shuffle in (("plain", False), ("shuffled", True)):
        folder = tmp_path / name
        folder.mkdir()
        (folder / "aftereffect_covariance.csv").write_bytes((demo / "fit" / "aftereffect_covariance.csv").read_bytes())
        head, *rows = (demo / "fit" / "aftereffect.csv").read_text().splitlines(keepends=True)
        if shuffle:
            random.Random(1).shuffle(rows)
        (folder / "aftereffect.csv").write_text(head + "".join(rows))
        compare_results(folder, demo / "predictions_population_model.csv", folder / "cmp", figures=False)
    for table in ("agreement.csv", "comparison_points.csv"):
        assert (tmp_path / "plain" / "cmp" / table).read_bytes() == (tmp_path / "shuffled" / "cmp" / table).read_bytes()


# --- the page of a comparison: one fit's state, and a damaged fit folder ----------------------------------------------


class _PageParts:
    """The tables (``data-csv`` and the text of each row's cells) and the link targets of a report page."""

    def __init__(self, page):
        from html.parser import HTMLParser

        self.tables, self.links = [], []
        parts = self

        class Reader(HTMLParser):
            cell = None

            def handle_starttag(self, tag, attrs):
                attrs = dict(attrs)
                if tag == "table":
                    parts.tables.append((attrs.get("data-csv"), []))
                elif tag == "tr":
                    parts.tables[-1][1].append([])
                elif tag == "td":
                    self.cell = ""
                elif tag in ("img", "a") and (attrs.get("src") or attrs.get("href") or "#")[0] != "#":
                    parts.links.append(attrs.get("src") or attrs.get("href"))

            def handle_data(self, data):
                if self.cell is not None:
                    self.cell += data

            def handle_endtag(self, tag):
                if tag == "td":
                    parts.tables[-1][1][-1].append(self.cell)
                    self.cell = None

        Reader().feed(page.read_text(encoding="utf-8"))
        self.links += [csv for csv, _ in self.tables if csv]


def _same_cell(shown: str, stored: str) -> bool:
    """The page shows numbers to 4 significant digits (fitting.page.DIGITS), empty for a missing value."""
    if stored == "" or shown == stored:
        return shown == stored
    try:
        return float(shown) == pytest.approx(float(stored), rel=5.1e-4, abs=1e-12)
    except ValueError:
        return False


def _rows_are_their_files(page) -> None:
    """Every row of every table tagged with a CSV file is a row of that file."""
    import csv as csv_module

    for source, rows in _PageParts(page).tables:
        if source is None:
            continue
        with open(page.parent / source, newline="", encoding="utf-8") as fh:
            stored = list(csv_module.reader(fh))[1:]
        for row in (r for r in rows if r):
            assert any(len(s) == len(row) and all(map(_same_cell, row, s)) for s in stored), (source, row)


@pytest.fixture(scope="module")
def real_fit(tmp_path_factory):
    """A real fit (one simulated observer, figures drawn) and predictions of the population model."""
    from fitting import fit_logs
    from fitting.synthetic import ObserverModel, simulate_trials, write_log

    root = tmp_path_factory.mktemp("real_fit")
    (root / "logs").mkdir()
    write_log(simulate_trials(ObserverModel(amplitude_deg=4.0), offsets=(-30, -15, 15, 30), lags=(0, 2),
                              trials_per_track=12, seed=6), root / "logs" / "sim01-s1.trials.csv")
    fit_logs([str(root / "logs")], str(root / "fit"), n_boot=40, seed=1, progress=False)
    predict_table(ChannelModel(), [-30.0, -15.0, 15.0, 30.0], [0, 2]).to_csv(root / "pred.csv", index=False)
    return root


def _copy_of(real_fit, tmp_path):
    import shutil

    shutil.copytree(real_fit / "logs", tmp_path / "logs")
    shutil.copytree(real_fit / "fit", tmp_path / "fit")
    return tmp_path / "fit", real_fit / "pred.csv"


@pytest.mark.slow
def test_the_comparison_page_keeps_showing_the_fit_it_compared_after_a_refit(real_fit, tmp_path):
    # before: the page held the first fit's numbers while its tables' data-csv, its download links and its
    # figures pointed into the fit folder, which a second fit into that folder had changed; nothing warned
    from fitting import fit_logs

    fit, pred = _copy_of(real_fit, tmp_path)
    out = tmp_path / "cmp"
    compare_results(fit, pred, out, progress=False)
    page = out / "report.html"
    shown = _PageParts(page)
    linked = {link: (out / link).read_bytes() for link in shown.links}
    assert any(link.endswith("aftereffect.csv") for link in linked)
    assert any(link.endswith(".png") and "aftereffect_sim01" in link for link in linked)
    _rows_are_their_files(page)
    first = (fit / "aftereffect.csv").read_bytes()

    fit_logs([str(tmp_path / "logs")], str(fit), n_boot=40, seed=2, lapse=0.0, progress=False)
    assert (fit / "aftereffect.csv").read_bytes() != first          # the re-fit changed the fit folder

    for link in shown.links:                                        # every file the page shows is compare's own
        target = (out / link).resolve()
        assert out.resolve() in target.parents, link
        assert target.read_bytes() == linked[link], link
    _rows_are_their_files(page)
    assert "this page shows the copy of that fit" in page.read_text(encoding="utf-8")     # and says so


@pytest.mark.slow
@pytest.mark.parametrize("damage, code, says", [
    # before: exit 0, and the page left the figure or the table out without a word
    (lambda fit: (fit / "figures" / "aftereffect_sim01.png").unlink(), 0,
     "aftereffect_sim01.png: listed in outputs.json but missing; the report shows the fit without it"),
    (lambda fit: (fit / "figures" / "tracks_sim01.png").write_bytes(
        (fit / "figures" / "tracks_sim01.png").read_bytes()[:4000]), 0,
     "tracks_sim01.png: not a whole PNG file (cut or damaged)"),
    (lambda fit: (fit / "tuning.csv").write_text("garbage,,\n"), 2, "tuning.csv: line 1, column 2: a column without"),
    (lambda fit: (fit / "tuning.csv").unlink(), 2, "tuning.csv: file: listed in outputs.json but missing"),
    (lambda fit: (fit / "pse.csv").write_text(_cell(3, "lapse", "0.01,7")((fit / "pse.csv").read_text())), 2,
     "pse.csv: line 3: 12 cells where the header has 11"),
    (lambda fit: (fit / "pse.csv").write_bytes((fit / "pse.csv").read_bytes()[:-3]), 2,
     "pse.csv: line 10: the file ends inside this row"),
    (lambda fit: (fit / "fit_details.csv").write_text((fit / "fit_details.csv").read_text().replace("observer,", "who,")),
     2, "fit_details.csv: observer: column missing"),
    # before: exit 0, /etc/passwd copied into compare's folder and shown on the page
    (lambda fit: ((fit / "summary.txt").unlink(), (fit / "summary.txt").symlink_to("/etc/passwd")), 2,
     "summary.txt: file: is a link to /etc/passwd, outside the fit folder"),
    # before: a MemoryError traceback (read_bytes of an endless file)
    (lambda fit: ((fit / "figures" / "tracks_sim01.png").unlink(),
                  (fit / "figures" / "tracks_sim01.png").symlink_to("/dev/zero")), 2,
     "tracks_sim01.png: file: is a link to /dev/zero, outside the fit folder"),
    # before: "outside the fit folder ... (a hand edit?)", which does not say that the folder is a link
    (lambda fit: ((fit / "figures").rename(fit.parent / "shared"), (fit / "figures").symlink_to(fit.parent / "shared")),
     2, "figures: file: is a link to "),
    (lambda fit: (fit / "figures" / "tracks_sim01.png").unlink() or (fit / "figures" / "tracks_sim01.png").mkdir(), 2,
     "tracks_sim01.png: file: is a folder, not a file fit writes"),
    # before: exit 0, and the page showed the cell as it was
    (lambda fit: (fit / "tuning.csv").write_text(_cell(2, "amplitude_deg", "GARBAGE")((fit / "tuning.csv").read_text())),
     2, "tuning.csv: line 2: amplitude_deg: expected a number, found 'GARBAGE'"),
    (lambda fit: (fit / "pse.csv").write_text(_cell(3, "lapse", "inf")((fit / "pse.csv").read_text())),
     2, "pse.csv: line 3: lapse: expected a number, found 'inf'"),
    # the decay constant is fitted within fitting.aftereffect.TAU_BOUNDS, so its CIs are too
    (lambda fit: (fit / "decay.csv").write_text(_cell(2, "decay_periods", "-1e308")((fit / "decay.csv").read_text())),
     2, "decay.csv: line 2: decay_periods: expected a value in [0.01, 1000] periods"),
])
def test_a_damaged_fit_folder_is_one_line_or_a_note_on_the_page(real_fit, tmp_path, capsys, damage, code, says):
    fit, pred = _copy_of(real_fit, tmp_path)
    out = tmp_path / "cmp"
    compare_results(fit, pred, out, progress=False)
    before = {p: p.read_bytes() for p in out.rglob("*") if p.is_file()}
    capsys.readouterr()
    damage(fit)
    assert main(["compare", str(fit), str(pred), "--out", str(out)]) == code
    printed, err = capsys.readouterr()
    if code == 2:
        assert len(err.strip().splitlines()) == 1 and says in err, err
        assert before == {p: p.read_bytes() for p in out.rglob("*") if p.is_file()}    # the earlier comparison kept
        return
    assert err == "" and f"note: {fit / 'figures'}" in printed and says in printed, printed
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "Left out of this report" in page and says in page
    name = says.split(":")[0]
    assert name not in " ".join(_PageParts(out / "report.html").links)
    assert not (out / "fit" / "figures" / name).exists()


@pytest.mark.slow
def test_a_fifo_in_the_fit_folder_is_one_line_not_a_hang(real_fit, tmp_path):
    # before: compare opened the FIFO for reading and waited for a writer forever
    import os

    fit, pred = _copy_of(real_fit, tmp_path)
    (fit / "figures" / "tracks_sim01.png").unlink()
    os.mkfifo(fit / "figures" / "tracks_sim01.png")
    done = run_cli("compare", str(fit), str(pred), "--out", str(tmp_path / "cmp"), timeout=60)
    assert done.returncode == 2 and len(done.stderr.strip().splitlines()) == 1, done.stderr
    assert "tracks_sim01.png: file: is a FIFO (named pipe)" in done.stderr
    assert not (tmp_path / "cmp").exists()


@pytest.mark.slow
def test_the_demo_fit_without_its_record_is_compared_with_a_note(tmp_path, capsys):
    # before: exit 2 "report_data.json: listed in outputs.json but missing"; the file is git-ignored (it records
    # times and versions), so a fresh clone could not compare the committed demo fit
    import shutil

    demo = ROOT / "results_demo"
    fit = tmp_path / "fit"
    shutil.copytree(demo / "fit", fit, ignore=shutil.ignore_patterns("report_data.json", "report.html"))
    out = tmp_path / "cmp"
    assert main(["compare", str(fit), str(demo / "predictions_population_model.csv"), "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    says = f"{fit / 'report_data.json'}: listed in outputs.json but missing; the report shows the fit without the "
    assert says in printed
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "Left out of this report" in page and "sessions, protocols and software" in page
    assert "report_data.json is missing" in page and ".staging" not in page     # the copy's name, not a temporary one
    assert (out / "fit" / "aftereffect.csv").read_bytes() == (demo / "fit" / "aftereffect.csv").read_bytes()


@pytest.mark.slow
def test_a_huge_file_in_the_fit_folder_is_one_line_not_read_into_memory(real_fit, tmp_path):
    # before: compare read every listed file whole into memory (a 20 GB summary.txt would have been read)
    from fitting.fit_copy import MAX_FILE_BYTES

    fit, pred = _copy_of(real_fit, tmp_path)
    with open(fit / "summary.txt", "r+b") as fh:    # sparse: no disk space taken
        fh.truncate(MAX_FILE_BYTES + 1)
    done = run_cli("compare", str(fit), str(pred), "--out", str(tmp_path / "cmp"), timeout=60)
    assert done.returncode == 2 and len(done.stderr.strip().splitlines()) == 1, done.stderr
    assert "summary.txt: file: is 256 MB, larger than any file fit writes" in done.stderr, done.stderr
    assert not (tmp_path / "cmp").exists()


def test_the_rank_check_passes_over_a_cell_that_did_not_vary():
    # a covariance without shift_parameters must have full rank (a stream fit's has not); a cell whose shift
    # was the same in every replicate (a point on a bound) has a zero row and is left to compare's own rules
    from pathlib import Path

    from fitting.compare import _check_full_rank
    from fitting.errors import InputError

    shared = np.array([[1.0, 0.6, 0.0], [0.6, 1.0, 0.0], [0.0, 0.0, 0.0]])
    _check_full_rank(shared, 100.0, Path("c.csv"), "S1")
    _check_full_rank(np.ones((3, 3)), 3.0, Path("c.csv"), "S1")      # 3 replicates: singular by nature
    with pytest.raises(InputError, match="c.csv: shift_parameters: S1: empty, but the shifts' covariance has "
                                         "rank 1 for 2 cells"):
        _check_full_rank(np.array([[1.0, 1.0, 0.0], [1.0, 1.0, 0.0], [0.0, 0.0, 0.0]]), 100.0, Path("c.csv"), "S1")
