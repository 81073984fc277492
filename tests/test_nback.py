"""The n-back regression of stream logs (fitting/nback.py)."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from fitting import fit_trials, read_logs
from fitting.compare import compare_results
from fitting.errors import InputError
from fitting.nback import (StreamTrials, bootstrap_nback, fit_nback, fit_stream_logs, is_stream_log,
                           read_stream_logs, solve)
from runner.headless import HeadlessPresenter
from runner.launch import screen_texts, simulate
from runner.observers import ObserverModel
from runner.protocol import load_protocol, parse_protocol, read_protocol_text
from runner.stream import StreamObserver, StreamRun

from conftest import PROTOCOLS, ROOT

BUNDLED = PROTOCOLS / "stream_nback.toml"


def stream_trials(protocol, model, seed, observer="sim"):
    """Run the real stream loop headless with a simulated observer; keep the rows in memory."""
    run = StreamRun(protocol, seed, observer, "s1")
    rows = []
    run.run(HeadlessPresenter(protocol.display.refresh_hz), StreamObserver(model, (seed, 5), protocol.display.refresh_hz),
            rows.append, [], screen_texts(protocol, ""))
    rows = [r for r in rows if r["response_cw"] is not None]
    return StreamTrials(observer, np.array([r["test_offset_deg"] for r in rows]),
                        np.array([r["response_cw"] for r in rows], dtype=float),
                        np.array([r["preceding_offsets_deg"] for r in rows], dtype=float))


def test_with_lapse_zero_and_w_held_the_fit_is_the_statsmodels_probit_glm():
    # Reference: statsmodels' binomial GLM with probit link (lapse fixed at 0).
    # With w held, mu = mu0 + sum a_n g(D_n; w) makes Phi((x - mu)/sigma) a probit GLM in
    # (1, x, g_1..g_K) with coefficients (-mu0/sigma, 1/sigma, -a_n/sigma).
    tr = stream_trials(load_protocol(BUNDLED), ObserverModel(lapse=0.0, spread_between_observers=0), 3)
    w = 30.0
    u = tr.preceding_offsets_deg / w
    g = u * np.exp(0.5 - 0.5 * u * u)
    design = np.column_stack([np.ones(tr.n_trials), tr.test_offset_deg, g])
    glm = sm.GLM(tr.response_cw, design, family=sm.families.Binomial(sm.families.links.Probit())).fit()
    b = glm.params
    k = tr.n_back
    lo = np.array([-50, np.log(0.01), 0.0, np.log(w)] + [-np.inf] * k)
    hi = np.array([50, np.log(100), 0.0, np.log(w)] + [np.inf] * k)
    start = np.r_[0.0, np.log(3.0), 0.0, np.log(w), np.zeros(k)]
    sol = solve(start, lo, hi, tr.test_offset_deg, tr.preceding_offsets_deg, tr.response_cw[None], "per_n")
    theta = sol.theta[0]
    sigma = np.exp(theta[1])
    assert sol.converged[0]
    np.testing.assert_allclose([-theta[0] / sigma, 1 / sigma, *(-theta[4:] / sigma)], b, rtol=1e-6, atol=1e-8)
    assert sol.loglik[0] == pytest.approx(glm.llf, abs=1e-7)


@pytest.mark.slow  # left out of the quick subset
def test_fast_recovery_of_amplitudes_and_decay_on_simulated_streams():
    # The 30-run version with more replicates is benchmarks/bench_stream_recovery.py.
    protocol = load_protocol(BUNDLED)
    model = ObserverModel(spread_between_observers=0)
    truth = model.amplitude_deg * np.exp(-np.arange(3) / model.decay_periods)
    hits = np.zeros(4, dtype=int)
    runs = 8
    for seed in range(runs):
        boot = bootstrap_nback(fit_nback(stream_trials(protocol, model, 100 + seed)), 150,
                               np.random.default_rng(seed))
        lo, hi = boot.amplitude_ci
        t_lo, t_hi = boot.decay_ci
        hits += np.r_[(lo <= truth) & (truth <= hi), t_lo <= model.decay_periods <= t_hi]
    assert (hits >= runs - 1).all(), hits


def test_stream_and_discrete_analyses_agree_when_only_the_1_back_period_matters(tmp_path):
    model = ObserverModel(decay_periods=0.05, spread_between_observers=0)  # exp(-1/0.05): n >= 2 adds nothing
    stream = parse_protocol(
        "[stream]\ndirection_step_deg = 30\nnback_periods = 2\n"
        "[design]\npractice_trials = 0\ntrials_per_track = 300\n"
        "[procedure]\nstart_offset_deg = 10.0\nbounds_deg = [-30.0, 30.0]\nsteps_deg = [4.0, 2.0, 1.0]\n",
        "stream.toml")
    boot = bootstrap_nback(fit_nback(stream_trials(stream, model, 21)), 300, np.random.default_rng(5))
    discrete_text = (
        "[design]\nadapter_offsets_deg = [-120, -90, -60, -30, 30, 60, 90, 120]\nlags = [0]\n"
        "trials_per_track = 30\npractice_trials = 0\n"
        "[procedure]\nstart_offset_deg = 10.0\nbounds_deg = [-30.0, 30.0]\nsteps_deg = [4.0, 2.0, 1.0]\n")
    discrete = parse_protocol(discrete_text, "discrete.toml")
    simulate(discrete, "discrete.toml", discrete_text, tmp_path, model, 1, 21, progress=False)
    tuning = fit_trials(read_logs(tmp_path), n_boot=300, seed=5, progress=False).tuning
    row = tuning[(tuning["observer"] == "sim01") & (tuning["lag"] == 0)].iloc[0]
    a_lo, a_hi = boot.amplitude_ci
    w_lo, w_hi = boot.peak_offset_ci
    # agreement = overlapping 95 % intervals (two independent estimates of the same quantity)
    assert a_lo[0] <= row["amplitude_ci_high"] and row["amplitude_ci_low"] <= a_hi[0]
    assert w_lo <= row["peak_offset_ci_high"] and row["peak_offset_ci_low"] <= w_hi
    assert a_lo[1] <= 0.0 <= a_hi[1]  # the 2-back amplitude is nil


def test_fit_stream_logs_writes_the_tables_compare_reads(tmp_path):
    protocol, text = load_protocol(BUNDLED), read_protocol_text(BUNDLED)
    (log,) = simulate(protocol, str(BUNDLED), text, tmp_path / "logs", ObserverModel(), 1, 2, progress=False)
    assert is_stream_log(log)
    report = fit_stream_logs(tmp_path / "logs", tmp_path / "out", n_boot=50, seed=1)
    after = pd.read_csv(tmp_path / "out" / "aftereffect.csv")
    tuning = pd.read_csv(tmp_path / "out" / "tuning.csv")
    decay = pd.read_csv(tmp_path / "out" / "decay.csv")
    assert list(after.columns) == ["observer", "lag", "adapter_offset_deg", "pse_shift_deg", "ci_low", "ci_high",
                                   "n_trials", "flags"]
    assert list(tuning.columns) == ["observer", "lag", "amplitude_deg", "amplitude_ci_low", "amplitude_ci_high",
                                    "peak_offset_deg", "peak_offset_ci_low", "peak_offset_ci_high", "flags"]
    assert list(decay.columns) == ["observer", "decay_periods", "ci_low", "ci_high", "flags"]
    pse = pd.read_csv(tmp_path / "out" / "pse.csv")    # same layout as adapt-test fits
    assert list(pse.columns) == ["observer", "condition", "adapter_offset_deg", "lag", "pse_deg", "pse_ci_low",
                                 "pse_ci_high", "spread_deg", "lapse", "n_trials", "flags"]
    assert pse.loc[0, "pse_ci_low"] < pse.loc[0, "pse_deg"] < pse.loc[0, "pse_ci_high"]
    assert (tuning["peak_offset_ci_low"] < tuning["peak_offset_ci_high"]).all()
    assert (tmp_path / "out" / "summary.txt").read_text().startswith("stream n-back fits")
    assert sorted(tuning["lag"]) == [0, 1, 2] and sorted(after["lag"].unique()) == [0, 1, 2]
    assert set(after["n_trials"]) == {50} and len(after) == 3 * 10
    assert (after["ci_low"] <= after["pse_shift_deg"]).all() and (after["pse_shift_deg"] <= after["ci_high"]).all()
    figs = tmp_path / "out" / "figures"
    assert (figs / "nback_sim01.png").stat().st_size > 0 and (figs / "nback_sim01.pdf").exists()
    assert "decay" in report.summary()
    # compare reads the shifts on as many degrees of freedom as the parameters behind them: a_n and w per
    # lag, a_1..a_3 and w over all lags (their covariance has that rank, not 30)
    cov = pd.read_csv(tmp_path / "out" / "aftereffect_covariance.csv")
    assert set(cov["shift_parameters"]) == {"a1 w", "a2 w", "a3 w"} and cov["spread_dof"].gt(1).all()
    after[["lag", "adapter_offset_deg"]].assign(pse_shift_deg=0.8 * after["pse_shift_deg"]).to_csv(
        tmp_path / "pred.csv", index=False)
    compared = compare_results(tmp_path / "out", tmp_path / "pred.csv", tmp_path / "cmp", figures=False)
    table = compared.table
    assert list(table["dof"]) == [2, 2, 2, 4] and table["chi2"].gt(0).all() and table["chi2_p"].lt(1).all()
    assert list(table["chi2_reference"].str[:4]) == ["F(2,", "F(2,", "F(2,", "F(4,"]
    assert any("a curve of few fitted parameters" in n for n in compared.notes)
    # a prediction 0.01 deg off the measured curve at one far cell (where the shifts' variance is ~1e-12 deg^2)
    # cannot be rejected (common practice, no source); the full-rank inverse gave one chi2 = 4e4 (p = 0)
    near = after[["lag", "adapter_offset_deg", "pse_shift_deg"]].copy()
    near.loc[0, "pse_shift_deg"] += 0.01
    near.to_csv(tmp_path / "near.csv", index=False)
    table = compare_results(tmp_path / "out", tmp_path / "near.csv", tmp_path / "cmp2", figures=False).table
    assert (table["chi2_p"] > 0.5).all()
    # the same log with every answer clockwise: flagged, and no interval pretends to be informative
    raw = pd.read_csv(log, dtype=str, keep_default_na=False)
    raw.loc[raw["response_cw"] != "", "response_cw"] = "1"
    (tmp_path / "one").mkdir()
    raw.to_csv(tmp_path / "one" / "x.trials.csv", index=False)
    fit_stream_logs(tmp_path / "one", tmp_path / "out1", n_boot=30, seed=1, figures=False)
    for name in ("pse", "aftereffect", "tuning", "decay"):
        t = pd.read_csv(tmp_path / "out1" / f"{name}.csv")
        assert t["flags"].str.contains("one-sided").all(), name
        limits = [c for c in t.columns if "ci_" in c]
        assert t[limits].isna().all().all(), name
    assert "Flagged rows" in (tmp_path / "out1" / "summary.txt").read_text()
    # fewer than two replicates: one line before any work (it was a traceback), as `fit --bootstrap 0` gives it
    for n in (0, 1):
        with pytest.raises(InputError, match="--bootstrap: a stream fit needs at least 2 replicates"):
            fit_stream_logs(tmp_path / "one", tmp_path / "out0", n_boot=n, seed=1, figures=False)
    assert not (tmp_path / "out0").exists()


def test_discrete_logs_are_not_stream_logs(tmp_path):
    p = parse_protocol("[design]\nadapter_offsets_deg = [30]\nlags = [0]\ntrials_per_track = 2\npractice_trials = 0\n")
    (log,) = simulate(p, "d.toml", "", tmp_path, ObserverModel(), 1, 0, progress=False)
    assert not is_stream_log(log)
    with pytest.raises(InputError, match="no usable stream tests"):
        read_stream_logs(log)


def test_a_bad_value_in_a_stream_log_names_file_line_and_column(tmp_path):
    protocol, text = load_protocol(BUNDLED), read_protocol_text(BUNDLED)
    (log,) = simulate(protocol, str(BUNDLED), text, tmp_path, ObserverModel(), 1, 0, progress=False)
    lines = log.read_text().splitlines()
    lines[3] = lines[3].rsplit(",", 1)[0] + ",30;x;60"
    log.write_text("\n".join(lines) + "\n")
    with pytest.raises(InputError) as err:
        read_stream_logs(log)
    assert str(log) in str(err.value) and "line 4" in str(err.value) and "preceding_offsets_deg" in str(err.value)


@pytest.mark.parametrize("column,edit,named", [
    ("test_offset_deg", lambda v: f"{float(v) + 1.5:g}", "test_direction_deg"),
    ("reference_deg", lambda v: "91", "reference_deg"),
    ("procedure", lambda v: "practice", "procedure"),
], ids=["offset", "reference", "procedure"])
def test_a_stream_row_that_disagrees_with_itself_is_refused(tmp_path, column, edit, named):
    # the row checks of adapt-test logs (fitting.tables.check_row_agreement) on a stream log: direction =
    # reference - offset (README, Conventions), one reference per session, procedure "practice" for practice rows
    # only; before they were tried on stream logs by hand only
    protocol, text = load_protocol(BUNDLED), read_protocol_text(BUNDLED)
    (log,) = simulate(protocol, str(BUNDLED), text, tmp_path, ObserverModel(), 1, 0, progress=False)
    lines = log.read_text().splitlines()
    header = lines[0].split(",")
    read_stream_logs(log)                                   # as written: read
    cells = lines[3].split(",")
    assert cells[header.index("block")] == "stream" and cells[header.index("practice")] == "0"
    cells[header.index(column)] = edit(cells[header.index(column)])
    lines[3] = ",".join(cells)
    log.write_text("\n".join(lines) + "\n")
    with pytest.raises(InputError) as err:
        read_stream_logs(log)
    said = str(err.value)
    assert str(log) in said and "line 4" in said and f"column {named}" in said and "edited cell" in said, said


def test_nback_imports_neither_runner_nor_psychopy():
    code = "import sys, fitting.nback; bad = [m for m in sys.modules if m.split('.')[0] in ('runner', 'psychopy')]; print(bad)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, check=True)
    assert out.stdout.strip() == "[]"


def _tiny_stream_logs(tmp_path, tests_per_track: int = 6, seed: int = 5, model: ObserverModel | None = None):
    """Logs of a stream of ``2 * tests_per_track`` tests, simulated by the real engine."""
    text = read_protocol_text(BUNDLED).replace("trials_per_track = 300", f"trials_per_track = {tests_per_track}")
    text = text.replace("break_every = 150", f"break_every = {tests_per_track}")
    protocol = parse_protocol(text, "tiny.toml")
    simulate(protocol, "tiny.toml", text, tmp_path / "logs", model or ObserverModel(), 1, seed, progress=False)
    return tmp_path / "logs"


@pytest.mark.slow    # simulates and fits a stream
def test_a_stream_too_small_to_pin_its_amplitudes_gets_no_interval_and_its_figure(tmp_path):
    # 12 tests, 7 parameters: the answers are separated, every bootstrap refit lands where the fit did, and
    # the tables printed "4.43 [4.43, 4.43]"; the figure then failed ("'yerr' must not contain negative
    # values", exit 1, no tables).
    report = fit_stream_logs(_tiny_stream_logs(tmp_path), tmp_path / "out", n_boot=100, seed=1)
    tuning = pd.read_csv(tmp_path / "out" / "tuning.csv")
    assert tuning["flags"].str.contains("not-estimable").all()
    assert tuning[["amplitude_ci_low", "amplitude_ci_high", "peak_offset_ci_low"]].isna().all().all()
    assert pd.read_csv(tmp_path / "out" / "aftereffect.csv")["ci_low"].isna().all()
    line = next(s for s in report.summary().splitlines() if s.startswith("sim01:"))
    assert "(no interval)" in line and "[" not in line      # the summary shows what the tables hold
    assert (tmp_path / "out" / "figures" / "nback_sim01.png").stat().st_size > 0
    # compare leaves such points out with a note (it refused the fit: "a measured point has zero variance")
    after = pd.read_csv(tmp_path / "out" / "aftereffect.csv")
    pred = after[["lag", "adapter_offset_deg"]].assign(pse_shift_deg=1.0)
    pred.to_csv(tmp_path / "pred.csv", index=False)
    comparison = compare_results(tmp_path / "out", tmp_path / "pred.csv", tmp_path / "cmp")
    assert any("every measured point is flagged not-estimable" in n for n in comparison.notes)


@pytest.mark.slow    # simulates and fits a stream
def test_stream_fits_take_the_level_and_check_the_options_as_adapt_test_fits_do(tmp_path):
    # --level, --lapse and --lapse-max went unchecked or unused for stream logs: --level 0.5 gave the 95 %
    # tables byte for byte, --lapse 1.5 an amplitude of -35,463 deg with exit 0
    logs = _tiny_stream_logs(tmp_path, 60, seed=2)
    widths = {}
    for level in (0.5, 0.95):
        fit_stream_logs(logs, tmp_path / f"out{level}", n_boot=200, seed=1, figures=False, level=level)
        t = pd.read_csv(tmp_path / f"out{level}" / "tuning.csv")
        widths[level] = (t["amplitude_ci_high"] - t["amplitude_ci_low"]).to_numpy()
    assert (widths[0.5] < widths[0.95]).all()
    for option, value, said in (("lapse", 1.5, "--lapse: a fixed lapse must be in [0, 0.5)"),
                                ("lapse", -1.0, "--lapse: a fixed lapse must be in [0, 0.5)"),
                                ("lapse_max", -0.1, "--lapse-max: must be in (0, 0.5)"),
                                ("level", 1.5, "--level: a confidence level in [0.5, 1)")):
        with pytest.raises(InputError, match=said.replace("(", r"\(").replace(")", r"\)").replace("[", r"\[")):
            fit_stream_logs(logs, tmp_path / "bad", n_boot=10, figures=False, **{option: value})
    assert not (tmp_path / "bad").exists()


@pytest.mark.slow    # simulates and fits a stream
def test_rows_of_another_block_in_a_stream_log_are_refused_naming_the_line(tmp_path):
    # they were dropped without a word and left out of trials_read
    logs = _tiny_stream_logs(tmp_path, 12)
    log = next(logs.glob("*.trials.csv"))
    lines = log.read_text().splitlines(keepends=True)
    header = lines[0].rstrip("\n").split(",")
    cells = lines[5].rstrip("\n").split(",")
    cells[header.index("block")] = ""
    lines[5] = ",".join(cells) + "\n"
    log.write_text("".join(lines))
    with pytest.raises(InputError, match="line 6, column block: '' in a stream log"):
        read_stream_logs(logs)


@pytest.mark.slow    # simulates and fits a stream
def test_fit_options_that_do_not_apply_to_streams_are_refused(tmp_path, capsys):
    from runner.cli import main

    logs = _tiny_stream_logs(tmp_path)
    for option in (["--function", "logistic"], ["--spread", "per_condition"], ["--rerun-tracks"]):
        assert main(["fit", str(logs), "--out", str(tmp_path / "out"), "--bootstrap", "10", *option]) == 2
        line = capsys.readouterr().err.strip()
        assert line == f"aftershift: argument: {option[0]}: " + line.split(f"{option[0]}: ", 1)[1]
        assert "does not apply to stream logs" in line and "\n" not in line
    assert not (tmp_path / "out").exists()


@pytest.mark.slow    # simulates and fits a stream
def test_a_peak_offset_beyond_the_largest_tested_offset_is_flagged(tmp_path):
    # a stream of directions 90 deg apart measures shifts at +-90 only; a fitted peak of 102 deg [82, 124]
    # went unflagged (and the peak could reach 300 deg, beyond the opposite direction)
    text = read_protocol_text(BUNDLED).replace("direction_step_deg = 30", "direction_step_deg = 90")
    text = text.replace("trials_per_track = 300", "trials_per_track = 200")
    protocol = parse_protocol(text, "step90.toml")
    simulate(protocol, "step90.toml", text, tmp_path / "logs", ObserverModel(peak_offset_deg=100.0, amplitude_deg=4.0,
             spread_between_observers=0.0), 1, 4, progress=False)
    fit_stream_logs(tmp_path / "logs", tmp_path / "out", n_boot=100, seed=1, figures=False)
    tuning = pd.read_csv(tmp_path / "out" / "tuning.csv")
    assert (tuning["peak_offset_deg"] > 90).all() and tuning["flags"].str.contains("outside-tested").all()
    assert (tuning["peak_offset_ci_high"] <= 180).all()


@pytest.mark.slow    # simulates and fits a stream
def test_one_period_back_writes_no_decay_row_and_says_why(tmp_path):
    # K = 1 wrote a decay row with no number and an empty flags cell (which reads "nothing unusual")
    text = read_protocol_text(BUNDLED).replace("nback_periods = 3", "nback_periods = 1")
    text = text.replace("trials_per_track = 300", "trials_per_track = 60")
    simulate(parse_protocol(text, "k1.toml"), "k1.toml", text, tmp_path / "logs", ObserverModel(), 1, 4,
             progress=False)
    report = fit_stream_logs(tmp_path / "logs", tmp_path / "out", n_boot=50, seed=1, figures=False)
    assert pd.read_csv(tmp_path / "out" / "decay.csv").empty
    assert "one period back only (K = 1): no decay fit" in report.summary()


@pytest.mark.slow    # simulates and fits a stream
def test_compare_refuses_a_stream_fit_whose_labels_or_rows_were_edited(tmp_path):
    # shift_parameters set the chi2's degrees of freedom (edited, chi2/30 was read on 30 df instead of 4),
    # and a row deleted from aftereffect.csv silently dropped its point
    fit_stream_logs(_tiny_stream_logs(tmp_path, 60, seed=2), tmp_path / "out", n_boot=100, seed=1, figures=False)
    after = pd.read_csv(tmp_path / "out" / "aftereffect.csv")
    after[["lag", "adapter_offset_deg"]].assign(pse_shift_deg=1.0).to_csv(tmp_path / "pred.csv", index=False)
    compare_results(tmp_path / "out", tmp_path / "pred.csv", tmp_path / "cmp")     # as written: read
    cov_path = tmp_path / "out" / "aftereffect_covariance.csv"
    kept = cov_path.read_text()
    cov_path.write_text(kept.replace(",a1 w", ",a1 a2 a3 a4 w"))
    with pytest.raises(InputError, match="shift_parameters: sim01, lag 0: 'a1 a2 a3 a4 w', not 'a1 w'"):
        compare_results(tmp_path / "out", tmp_path / "pred.csv", tmp_path / "cmp2")
    # the column emptied (or dropped): the covariance's rank still tells a stream fit's (it was read on 30 df)
    table = pd.read_csv(cov_path)
    for edited in (table.assign(shift_parameters=""), table.drop(columns="shift_parameters")):
        edited.to_csv(cov_path, index=False)
        with pytest.raises(InputError, match=r"shift_parameters: sim01: empty, but the shifts' covariance has rank "
                                             r"\d+ for \d+ cells"):
            compare_results(tmp_path / "out", tmp_path / "pred.csv", tmp_path / "cmp2")
    cov_path.write_text(kept)
    after.drop(index=3).to_csv(tmp_path / "out" / "aftereffect.csv", index=False)
    with pytest.raises(InputError, match=r"aftereffect.csv: observer: sim01, lag 0, offset [-+]\d+: in "
                                         "aftereffect_covariance.csv but not here"):
        compare_results(tmp_path / "out", tmp_path / "pred.csv", tmp_path / "cmp3")


@pytest.mark.slow    # simulates and fits a stream
@pytest.mark.parametrize("column, value", [("preceding_offsets_deg", "nan;60;90"), ("preceding_offsets_deg", ""),
                                           ("test_offset_deg", "")], ids=["nan offset", "empty list", "empty test"])
def test_a_damaged_stream_cell_is_named_by_its_own_column(tmp_path, capsys, column, value):
    # a nan among the preceding offsets was blamed on the sidecar ("the sidecar is another session's"), an
    # empty cell named two columns
    from runner.cli import main

    logs = _tiny_stream_logs(tmp_path, 12)
    log = next(logs.glob("*.trials.csv"))
    lines = log.read_text().splitlines()
    header = lines[0].split(",")
    cells = lines[4].split(",")
    cells[header.index(column)] = value
    lines[4] = ",".join(cells)
    log.write_text("\n".join(lines) + "\n")
    assert main(["fit", str(logs), "--out", str(tmp_path / "out"), "--bootstrap", "10", "--no-figures"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith(f"aftershift: {log}: line 5, column {column}: ") and "\n" not in err


@pytest.mark.slow    # simulates and fits a stream
def test_a_stream_lapse_on_its_bound_is_said(tmp_path):
    # adapt-test fits note a lapse on its bound; stream fits printed "lapse 0.060" without a word
    logs = _tiny_stream_logs(tmp_path, 60, seed=3, model=ObserverModel(lapse=0.2))
    report = fit_stream_logs(logs, tmp_path / "out", n_boot=20, seed=1, figures=False, lapse_max=0.01)
    line = next(s for s in report.summary().splitlines() if s.startswith("sim01:"))
    assert "lapse 0.010 (on its bound" in line
    report = fit_stream_logs(logs, tmp_path / "fixed", n_boot=20, seed=1, figures=False, lapse=1e-4)
    assert "on its bound" not in report.summary()       # a fixed lapse is not on a bound


@pytest.mark.slow    # simulates and fits a stream
def test_the_same_tests_in_another_row_order_give_the_same_tables(tmp_path):
    # the bootstrap's draws followed the rows' order: a shuffled copy of a log gave other intervals
    logs = _tiny_stream_logs(tmp_path, 60, seed=2)
    log = next(logs.glob("*.trials.csv"))
    fit_stream_logs(logs, tmp_path / "a", n_boot=50, seed=1, figures=False)
    lines = log.read_text().splitlines()
    rows = lines[1:]
    np.random.default_rng(0).shuffle(rows)
    log.write_text("\n".join([lines[0], *rows]) + "\n")
    fit_stream_logs(logs, tmp_path / "b", n_boot=50, seed=1, figures=False)
    for name in ("pse.csv", "tuning.csv", "aftereffect.csv", "decay.csv"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name


@pytest.mark.slow    # simulates and fits a stream
def test_a_stream_log_copied_under_another_name_is_named_in_a_note(tmp_path):
    # adapt-test fits said so; a stream fit counted the copy as a second observer without a word
    logs = _tiny_stream_logs(tmp_path, 60, seed=2)
    log = next(logs.glob("*.trials.csv"))
    (logs / "copy").mkdir()
    (logs / "copy" / "simXX-s1.trials.csv").write_text(log.read_text().replace("\nsim01,", "\nsimXX,"))
    report = fit_stream_logs(logs, tmp_path / "out", n_boot=20, seed=1, figures=False)
    assert "hold the same trials row for row" in report.summary()
