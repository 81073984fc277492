"""Group rows of ``fit`` with observers whose rows are not usable, odd IDs, and designs that differ.

The observers are simulated (fitting.synthetic) and fitted for real; the
random-effects combination itself is checked against statsmodels in
test_inference.py.
"""

import html
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from fitting import fit_logs
from fitting.aftereffect import TAU_BOUNDS, peak_bounds
from fitting.errors import InputError
from fitting.group import group_aftereffect, group_curves
from fitting.meta import random_effects, variance_from_interval
from fitting.synthetic import ObserverModel, simulate_trials, write_log

MODEL = ObserverModel(amplitude_deg=3.0, peak_offset_deg=30.0, decay_periods=2.0)
OFFSETS = (-60, -30, 30, 60)


def _observer(name: str, seed: int, **kw) -> pd.DataFrame:
    return simulate_trials(MODEL, offsets=kw.pop("offsets", OFFSETS), lags=(0, 2), trials_per_track=15, seed=seed,
                           observer=name, **kw)


def _fit(folder: Path, **kw):
    return fit_logs([str(folder)], str(folder / "out"), n_boot=200, seed=1, figures=False, progress=False, **kw)


@pytest.fixture(scope="module")
def odd_group(tmp_path_factory):
    """Three ordinary observers, one who answered clockwise on every trial, one with 4-5 trials per condition."""
    folder = tmp_path_factory.mktemp("odd_group")
    for i, name in enumerate(("O1", "O2", "O3")):
        write_log(_observer(name, 10 + i), folder / f"{name}.trials.csv")
    cw = _observer("O4", 20)
    cw["response_cw"] = 1
    write_log(cw, folder / "O4.trials.csv")
    few = _observer("O5", 21)
    write_log(few.groupby("condition").head(5), folder / "O5.trials.csv")
    return _fit(folder)


def _observers(table: pd.DataFrame, names) -> pd.DataFrame:
    return table[table["observer"].isin(names)]


def test_group_shifts_leave_out_rows_that_are_not_estimable_or_have_too_few_trials(odd_group):
    # Before, O4's shifts (every answer clockwise: PSEs not estimable, "intervals" a ten-thousandth of a
    # degree wide) entered the random-effects combination at face value and pinned the group's shift to
    # them, unflagged; O5's (5 trials) entered the group curve.
    r = odd_group
    ae = r.aftereffect
    assert ae.loc[ae["observer"] == "O4", "flags"].str.contains("not-estimable").all()
    assert ae.loc[ae["observer"] == "O5", "flags"].str.contains("few-trials").all()
    group = ae[ae["observer"] == "group"].reset_index(drop=True)
    usable = _observers(ae, ["O1", "O2", "O3"])
    expected = group_aftereffect(usable, 0.95)
    assert len(group) == 8
    assert np.allclose(group[["pse_shift_deg", "ci_low", "ci_high"]], expected[["pse_shift_deg", "ci_low", "ci_high"]])
    assert (group["n_trials"].to_numpy() == expected["n_trials"].to_numpy()).all()
    assert (group["flags"] == "partial").all()
    # the group interval is never narrower than the fixed-effect combination of the three (the floor)
    wide = usable.pivot_table(index="observer", columns=["lag", "adapter_offset_deg"], values="pse_shift_deg")
    var = usable.assign(v=variance_from_interval(usable["ci_low"], usable["ci_high"])).pivot_table(
        index="observer", columns=["lag", "adapter_offset_deg"], values="v")
    fixed = random_effects(wide.to_numpy(), var.to_numpy()).fixed_se
    # (1.959: just below z(0.975) = 1.95996, common practice, no source)
    assert ((group["ci_high"] - group["ci_low"]).to_numpy() >= 2 * 1.959 * fixed).all()
    notes = " | ".join(r.notes["group"])
    assert "group shifts leave out the observers' rows that are not usable: O4 (8 of 8: one-sided " in notes
    assert "O5 (8 of 8: " in notes and "few-trials" in notes
    assert "Group (5 observers, usable shifts from 3; random-effects intervals" in r.summary()


def test_group_curves_and_mixed_model_use_the_observers_whose_shifts_are_usable(odd_group):
    r = odd_group
    ae = r.aftereffect
    own = ["O1", "O2", "O3"]
    tuning, decay, _, _ = group_curves(_observers(ae, own), 0.95, [], _observers(r.tuning, own),
                                       _observers(r.decay, own))
    got = r.tuning[r.tuning["observer"] == "group"].reset_index(drop=True)
    cols = ["amplitude_deg", "amplitude_ci_low", "amplitude_ci_high", "peak_offset_deg"]
    assert len(got) == 2 and np.allclose(got[cols].to_numpy(float), tuning[cols].to_numpy(float))
    assert got["flags"].str.contains("partial").all()
    g_decay = r.decay[r.decay["observer"] == "group"]
    assert np.allclose(g_decay["decay_periods"].to_numpy(float), decay["decay_periods"].to_numpy(float))
    # the group's lag-0 amplitude lies among the observers' own (before: far above all of them)
    amps = r.tuning[(r.tuning["lag"] == 0) & r.tuning["observer"].isin(own)]["amplitude_deg"]
    assert amps.min() - 1 <= got.loc[got["lag"] == 0, "amplitude_deg"].iloc[0] <= amps.max() + 1
    assert any(n.startswith("group curves leave out O4, O5: not every shift of theirs is usable")
               for n in r.notes["group"])
    assert "the mixed model leaves out the same shifts as the group rows" in r.notes["group"]


def test_group_curve_floors_read_limits_on_a_bound_as_open(odd_group):
    # The observers' own intervals set the floor of the group's.  Before, an own interval spanning the whole
    # bounded range counted as a finite one (a lag-2 peak offset of 120 [104.2, 120] from observers whose
    # intervals were all [15, 120]), and with no own decay there was no floor at all (1000 [962, 1000]).
    r = odd_group
    own = ["O1", "O2", "O3"]
    shifts = _observers(r.aftereffect, own)
    prange = peak_bounds(np.array(OFFSETS, float))
    tuning = _observers(r.tuning, own).assign(peak_offset_ci_low=prange[0], peak_offset_ci_high=prange[1])
    decay = _observers(r.decay, own).assign(ci_low=TAU_BOUNDS[0], ci_high=TAU_BOUNDS[1])
    t, d, _, _ = group_curves(shifts, 0.95, [], tuning, decay)
    assert np.allclose(t[["peak_offset_ci_low", "peak_offset_ci_high"]].to_numpy(float), [prange, prange])
    assert t["flags"].str.contains("on-bound").all()
    assert np.allclose(d[["ci_low", "ci_high"]].to_numpy(float), [TAU_BOUNDS])
    notes = []
    _, d, detail, curves = group_curves(shifts, 0.95, notes, _observers(r.tuning, own), decay.iloc[:0])
    assert d.empty and detail.empty and "decay" not in curves
    assert "no group decay: no observer used has a decay fit of their own" in notes


def test_tables_keep_their_number_format_when_an_observer_has_no_shifts(tmp_path):
    # One observer ran only baseline trials.  Before, the empty tables of that observer turned the number
    # columns into text: aftereffect.csv, tuning.csv and decay.csv were written with every digit of the
    # floats, and the mixed model failed with "endog has evaluated to an array with multiple columns".
    import statsmodels.formula.api as smf

    for i, name in enumerate(("O1", "O2", "O3")):
        write_log(_observer(name, 60 + i), tmp_path / f"{name}.trials.csv")
    base = _observer("O4", 63)
    write_log(base[base["condition"] == "baseline"], tmp_path / "O4.trials.csv")
    report = _fit(tmp_path)
    for name in ("aftereffect", "tuning", "decay", "pse"):
        table = pd.read_csv(tmp_path / "out" / f"{name}.csv", dtype=str, keep_default_na=False)
        numbers = table.drop(columns=[c for c in ("observer", "condition", "flags") if c in table])
        digits = numbers.map(lambda v: len(v.lstrip("-").split("e")[0].replace(".", "").lstrip("0")))
        assert digits.to_numpy().max() <= 6, name
    # the mixed model is statsmodels' MixedLM (REML; the outside reference) on the three observers' shifts
    mm = pd.read_csv(tmp_path / "out" / "mixed_model.csv").set_index("term")
    rows = report.aftereffect[report.aftereffect["observer"] != "group"].astype({"lag": float})
    ref = smf.mixedlm("pse_shift_deg ~ adapter_offset_deg * lag", rows, groups=rows["observer"]).fit(reml=True)
    assert np.allclose(mm.loc[ref.fe_params.index, "estimate"], ref.fe_params, rtol=1e-5, atol=1e-6)
    assert not any("mixed model failed" in n for n in report.notes["group"])


def test_an_observer_id_of_group_is_refused_by_fit_and_run(tmp_path, capsys):
    # Before, a log of observer "group" was fitted: its rows and the group's shared the name in every table
    # (16 "group" rows in aftereffect.csv) and their figures overwrote each other.
    from runner.cli import main
    from runner.trial_log import check_identifier

    write_log(_observer("O1", 40), tmp_path / "O1.trials.csv")
    write_log(_observer("Group", 41), tmp_path / "g.trials.csv")
    with pytest.raises(InputError) as e:
        _fit(tmp_path)
    assert e.value.source.endswith("g.trials.csv") and "column observer" in e.value.field
    assert main(["fit", str(tmp_path), "--out", str(tmp_path / "fit"), "--bootstrap", "20"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "g.trials.csv" in err and "column observer" in err
    assert not (tmp_path / "fit" / "aftereffect.csv").exists()
    with pytest.raises(InputError, match="names the group rows"):
        check_identifier("GROUP", "--observer")
    assert check_identifier("group", "--session") == "group"          # a session may be called so
    assert main(["run", "protocols/pilot_short.toml", "--observer", "group", "--out", str(tmp_path / "run")]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--observer" in err and not (tmp_path / "run").exists()


def test_designs_that_differ_say_why_the_group_has_no_curves(tmp_path):
    # Before, the group tuning and decay vanished without a word when one observer had measured fewer
    # offsets than the others (the group curves keep only the cells every observer measured).
    for i, name in enumerate(("O1", "O2")):
        write_log(_observer(name, 50 + i), tmp_path / f"{name}.trials.csv")
    write_log(_observer("P1", 52, offsets=(-30, 30)), tmp_path / "P1.trials.csv")
    report = _fit(tmp_path)
    assert not (report.tuning["observer"] == "group").any() and not (report.decay["observer"] == "group").any()
    notes = report.notes["group"]
    assert ("group curves use the 4 of 8 (lag, adapter offset) cells that every observer measured: the observers' "
            "designs differ") in notes
    assert "no group tuning at lag 0: fewer than 3 non-zero adapter offsets measured by every observer" in notes
    assert "no group decay: fewer than 2 lags with a group tuning curve" in notes
    assert "no group decay" in report.summary()


@pytest.mark.slow
def test_sessions_of_different_protocols_are_named_in_the_summary(tmp_path, capsys):
    # Before, "the observers ran different protocols" was said only on the report page.
    from runner.cli import main

    text = Path("protocols/pilot_short.toml").read_text()
    wide = text.replace("adapter_offsets_deg = [-30, 30]", "adapter_offsets_deg = [-60, -30, 30, 60]")
    assert wide != text
    (tmp_path / "wide.toml").write_text(wide)
    assert main(["simulate", "protocols/pilot_short.toml", "--out", str(tmp_path / "logs"), "--seed", "1"]) == 0
    assert main(["simulate", str(tmp_path / "wide.toml"), "--out", str(tmp_path / "wide"), "--observers", "3",
                 "--seed", "2"]) == 0
    for p in (tmp_path / "wide").glob("sim01-*"):
        p.unlink()                        # sim01 is the pilot_short observer
    capsys.readouterr()
    assert main(["fit", str(tmp_path / "logs"), str(tmp_path / "wide"), "--out", str(tmp_path / "fit"),
                 "--bootstrap", "50", "--fixed-level-pilot", "--no-figures"]) == 0
    out = capsys.readouterr().out
    line = next(n for n in out.splitlines() if "different protocols" in n)
    assert "pilot_short.toml): sim01;" in line and "wide.toml): sim02, sim03)" in line
    assert line.endswith("compare them before pooling")
    assert line.strip() in (tmp_path / "fit" / "summary.txt").read_text()


def test_fit_details_flags_use_the_words_of_the_other_tables(odd_group):
    # Before, fit_details.csv said "complete separation" / "all clockwise; PSE on its bound" where every
    # other table (and the README's list) says "separated" / "one-sided on-bound".
    r = odd_group
    details = r.extras["fit_details"].set_index(["observer", "condition"])["flags"]
    pse = r.pse[r.pse["observer"] != "group"].set_index(["observer", "condition"])["flags"]
    assert details.to_dict() == pse.to_dict()
    assert details.str.contains("one-sided").any()


def test_a_stream_fit_of_several_observers_says_it_has_no_group_rows(tmp_path):
    # Before, nothing said why a stream fit of several observers had no group rows, while the README
    # promised them for every fit of several observers.
    from fitting.nback import NO_GROUP_NOTE, fit_stream_logs
    from runner.launch import simulate
    from runner.observers import ObserverModel as SimulatedObserver
    from runner.protocol import load_protocol, read_protocol_text

    bundled = Path(__file__).resolve().parent.parent / "protocols" / "stream_nback.toml"
    simulate(load_protocol(bundled), str(bundled), read_protocol_text(bundled), tmp_path / "logs",
             SimulatedObserver(), 2, 2, progress=False)
    report = fit_stream_logs(tmp_path / "logs", tmp_path / "out", n_boot=20, seed=1, figures=False)
    assert report.summary().splitlines()[-1] == f"note: {NO_GROUP_NOTE}"
    assert not (pd.read_csv(tmp_path / "out" / "aftereffect.csv")["observer"] == "group").any()
    assert html.escape(NO_GROUP_NOTE) in (tmp_path / "out" / "report.html").read_text()


def test_an_observer_with_an_unusable_cell_leaves_the_group_curves_whole_not_cell_by_cell():
    # Noise-free shifts on the curve fit_tuning / fit_decay model (DoG tuning, exponential decay over lags), so the
    # group curve's parameters are known exactly. The observer with the largest after-effect (8 deg) loses the
    # peak cells of lag 0 as one-sided, as a shift past the tested range does. Averaging each cell over whoever
    # is usable there mixed observers from cell to cell: lag 0 came out weaker than lag 1 and the decay went to
    # its bound (4.5 periods against 2 for every observer). Leaving that observer out of the curves keeps the
    # curves those of one set of observers, with a note naming who was left out.
    offsets = [-90, -60, -30, -15, 0, 15, 30, 60, 90]

    def dog(x, width=20.0):
        return (x / width) * np.exp(0.5 - 0.5 * (x / width) ** 2)        # peak 1 at x = width

    rows = []
    for observer, amplitude in (("o1", 8.0), ("o2", 1.5), ("o3", 2.5)):
        for lag in (0, 1, 2, 3):
            for offset in offsets:
                shift = amplitude * np.exp(-lag / 2.0) * dog(offset)
                flags = "one-sided" if observer == "o1" and lag == 0 and abs(offset) in (15, 30) else ""
                rows.append(dict(observer=observer, lag=lag, adapter_offset_deg=offset, pse_shift_deg=shift,
                                 ci_low=shift - 1, ci_high=shift + 1, n_trials=40, flags=flags))
    shifts = pd.DataFrame(rows)
    notes = []
    tuning, decay, _, _ = group_curves(shifts, 0.95, notes)
    alone_notes = []
    alone, alone_decay, _, _ = group_curves(shifts[shifts["observer"] != "o1"], 0.95, alone_notes)
    assert np.allclose(tuning["amplitude_deg"], alone["amplitude_deg"])
    assert np.allclose(tuning["amplitude_deg"], 2.0 * np.exp(-tuning["lag"] / 2.0), atol=1e-3)
    assert decay["decay_periods"].iloc[0] == pytest.approx(2.0, abs=1e-3) == alone_decay["decay_periods"].iloc[0]
    assert all("partial" in f for f in tuning["flags"]) and any("leave out o1" in n for n in notes)


def test_the_group_figure_marks_the_means_its_curves_are_fitted_to():
    # before: the group figure drew the random-effects rows as points beside curves fitted to the equal-weight
    # mean of the observers the curves use, a different set of numbers (and of observers) that it did not show
    from fitting import figures

    rng = np.random.default_rng(3)
    rows = []
    for observer in ("o1", "o2", "o3"):
        for lag in (0, 1):
            for offset in (-60, -30, -15, 15, 30, 60):
                shift = rng.normal(np.sign(offset) * 2.0, 1.0)
                flags = "one-sided" if observer == "o3" and (lag, offset) == (1, 60) else ""
                rows.append(dict(observer=observer, lag=lag, adapter_offset_deg=offset, pse_shift_deg=shift,
                                 ci_low=shift - 2, ci_high=shift + 2, n_trials=40, flags=flags))
    shifts = pd.DataFrame(rows)
    tuning, _, _, curves = group_curves(shifts, 0.95, [])
    assert len(tuning) == 2 and curves["observers"] == ["o1", "o2"]      # o3 left out for its one-sided cell
    expected = (shifts[shifts["observer"].isin(["o1", "o2"])]
                .groupby(["lag", "adapter_offset_deg"])["pse_shift_deg"].mean().reset_index())
    got = curves["means"].sort_values(["lag", "adapter_offset_deg"]).reset_index(drop=True)
    assert np.allclose(got[["lag", "adapter_offset_deg", "mean_shift_deg"]].to_numpy(float), expected.to_numpy(float))
    group_rows = group_aftereffect(shifts[shifts["flags"] == ""], 0.95)
    fig = figures.aftereffect_figure("group", group_rows, tuning, None, curves["means"], len(curves["observers"]))
    crosses = [ln for ln in fig.axes[0].get_lines() if ln.get_marker() == "x" and len(ln.get_ydata())]
    assert np.allclose(np.sort(np.concatenate([ln.get_ydata() for ln in crosses])), np.sort(expected["pse_shift_deg"]))
    legend = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert "mean of the 2 observers\nthe lines are fitted to" in legend
    figures.pyplot().close("all")


def _with_sidecar(table: pd.DataFrame, folder: Path, protocol_text: str) -> None:
    """Write an observer's log and a sidecar naming the protocol its session ran (what fit reads of it)."""
    import hashlib
    import json

    observer, session = table["observer"].iloc[0], table["session"].iloc[0]
    write_log(table, folder / f"{observer}-{session}.trials.csv")
    sha = hashlib.sha256(protocol_text.encode("utf-8")).hexdigest()
    (folder / f"{observer}-{session}.session.json").write_text(json.dumps(
        {"observer": observer, "session": session, "kind": "simulation",
         "protocol": {"path": f"{sha[:6]}.toml", "sha256": sha, "text": protocol_text}}))


#: Two protocols' texts as sidecars record them: other motion periods (their comments alone would not count).
A, B = "# protocol A\n[timing]\nperiod_s = 0.5\n", "# protocol B\n[timing]\nperiod_s = 0.0083\n"


def _assert_every_group_row_flagged_protocols_differ(r) -> None:
    """Every group row, curve and mixed-model term of fit ``r`` is flagged protocols-differ; no observer's row is."""
    group = [t[t["observer"] == "group"] for t in (r.pse, r.aftereffect, r.tuning, r.decay)]
    assert all(len(t) for t in group) and len(r.extras["mixed_model"])
    for t in group + [r.extras["mixed_model"]]:
        assert t["flags"].str.split().map(lambda w: "protocols-differ" in w).all()
    for t in (r.pse, r.aftereffect):
        assert not t.loc[t["observer"] != "group", "flags"].str.contains("protocols-differ").any()


@pytest.mark.slow
def test_group_rows_over_observers_of_different_protocols_are_flagged(tmp_path):
    # Defect 4 of the hostile sweep. Before: group rows pooled observers of 0.5 s and 8.3 ms periods as one
    # cell, unflagged; only a note said "compare them before pooling".
    for i, name in enumerate(("O1", "O2", "P1")):
        _with_sidecar(_observer(name, 60 + i), tmp_path, A if name[0] == "O" else B)
    r = fit_logs([str(tmp_path)], str(tmp_path / "out"), n_boot=20, seed=1, figures=False, progress=False)
    _assert_every_group_row_flagged_protocols_differ(r)
    assert any("different protocols" in n for n in r.notes["group"])          # the note stays
    assert "protocols-differ" in (tmp_path / "out" / "aftereffect.csv").read_text()
    # a cell that only observers of one protocol measured is not flagged; one they share is
    _with_sidecar(_observer("P1", 62, offsets=(-30, 30)), tmp_path, B)
    _with_sidecar(_observer("P2", 63, offsets=(-30, 30)), tmp_path, B)
    r = fit_logs([str(tmp_path)], str(tmp_path / "out"), n_boot=20, seed=1, figures=False, progress=False)
    g = r.aftereffect[r.aftereffect["observer"] == "group"].set_index("adapter_offset_deg")["flags"]
    assert g.loc[[-30.0, 30.0]].str.contains("protocols-differ").all()
    assert not g.loc[[-60.0, 60.0]].str.contains("protocols-differ").any()


def test_a_cell_with_one_usable_observer_gets_no_group_row_and_a_note_says_so():
    # before (a hostile-user sweep): a group whose second observer answered on one side printed its heading and
    # no row, and nothing said why
    rows = [[o, 0, offset, shift, shift - 1.0, shift + 1.0, 24, ""] for o, shift in (("O1", 1.0), ("O2", 2.0))
            for offset in (-30.0, 30.0)]
    rows += [["O1", 0, 60.0, 3.0, 2.0, 4.0, 24, ""], ["O2", 0, 60.0, 9.0, 9.0, 9.0, 24, "one-sided not-estimable"]]
    shifts = pd.DataFrame(rows, columns=["observer", "lag", "adapter_offset_deg", "pse_shift_deg", "ci_low",
                                         "ci_high", "n_trials", "flags"])
    notes: list = []
    group = group_aftereffect(shifts, 0.95, notes)
    assert list(group["adapter_offset_deg"]) == [-30.0, 30.0]
    assert "no group shift where fewer than 2 observers have a usable row: 1 of 3 cells (lag 0 offset +60)" in notes


def test_a_mixed_model_that_does_not_converge_is_one_note():
    # before (a hostile-user sweep): seven notes of statsmodels' optimiser chatter ("Retrying MixedLM optimization
    # with lbfgs", "|grad| = 1.66", ...) and then "mixed model did not converge".  Three observers with the same
    # shifts leave no variance between observers, where statsmodels' MixedLM (REML) does not converge
    from fitting.group import mixed_model

    shift = dict(zip([(0, -30.0), (0, 30.0), (2, -30.0), (2, 30.0)], np.random.default_rng(0).normal(0, 2, 4)))
    shifts = pd.DataFrame([(o, lag, offset, v, "") for o in ("O1", "O2", "O3") for (lag, offset), v in shift.items()],
                          columns=["observer", "lag", "adapter_offset_deg", "pse_shift_deg", "flags"])
    notes: list = []
    with warnings.catch_warnings():
        warnings.simplefilter("error")      # none reaches the console (before, a RuntimeWarning of its sqrt did)
        table = mixed_model(shifts, notes)
    assert len(table) and not table["converged"].any() and table["flags"].str.contains("model-not-converged").all()
    assert len(notes) == 1 and notes[0].startswith("mixed model did not converge (its rows are flagged "
                                                   "model-not-converged); statsmodels warned "), notes


@pytest.mark.slow
@pytest.mark.parametrize("setting", [{"period_s": 1.0}, {"reference_deg": 0.0}], ids=["period", "reference"])
def test_group_rows_over_logs_of_other_periods_or_references_are_flagged_without_sidecars(tmp_path, setting):
    # before (a hostile-user sweep): with no sidecars, observers of 0.5 s and 1 s periods (or of references 90 and
    # 0 deg) were pooled into group rows unflagged, a group decay of "0.91 periods" meaning two durations at once;
    # every log row holds period_s and reference_deg
    for i, name in enumerate(("O1", "O2", "P1", "P2")):
        write_log(_observer(name, 70 + i, **(setting if name[0] == "P" else {})), tmp_path / f"{name}.trials.csv")
    r = fit_logs([str(tmp_path)], str(tmp_path / "out"), n_boot=20, seed=1, figures=False, progress=False)
    _assert_every_group_row_flagged_protocols_differ(r)
    # and a note says who logged what (before: nine flagged rows, and nothing named P1, P2 or their setting)
    shown = ("motion periods 0.5 s (O1, O2); 1 s (P1, P2)" if "period_s" in setting
             else "reference directions 0 deg (P1, P2); 90 deg (O1, O2)")
    assert (f"the observers' logs show different {shown}: group rows that pool them are flagged protocols-differ"
            in r.notes["group"]), r.notes["group"]
    # the same logs with one setting throughout: nothing flagged
    for name in ("P1", "P2"):
        write_log(_observer(name, 70 + ("O1", "O2", "P1", "P2").index(name)), tmp_path / f"{name}.trials.csv")
    r = fit_logs([str(tmp_path)], str(tmp_path / "out2"), n_boot=20, seed=1, figures=False, progress=False)
    assert not any(t["flags"].str.contains("protocols-differ").any() for t in (r.pse, r.aftereffect, r.tuning))
    assert not any("logs show different" in n for n in r.notes["group"])


def test_one_observers_sessions_of_other_reference_directions_are_refused(tmp_path):
    # as for the motion period (tests/test_sidecar_match.py): the log's own reference_deg says another protocol
    write_log(_observer("O1", 80), tmp_path / "O1-s1.trials.csv")
    write_log(_observer("O1", 81, reference_deg=0.0, session="s2"), tmp_path / "O1-s2.trials.csv")
    with pytest.raises(InputError) as err:
        fit_logs([str(tmp_path)], str(tmp_path / "out"), n_boot=0, figures=False, progress=False)
    said = str(err.value)
    assert "O1-s2.trials.csv" in said and "column reference_deg: 0 deg, but observer O1's line 2 of" in said, said
    assert "90 deg: sessions of protocols with other reference directions would be pooled" in said
    # 450 deg is 90 deg (a sweep found them refused as two references)
    write_log(_observer("O1", 81, reference_deg=450.0, session="s2"), tmp_path / "O1-s2.trials.csv")
    fit_logs([str(tmp_path)], str(tmp_path / "out"), n_boot=0, figures=False, progress=False)


@pytest.mark.slow
def test_observers_named_alike_but_for_case_and_copied_logs_are_named_in_the_notes(tmp_path):
    # Defect 6 of the hostile sweep. Before: a copy of O1's log renamed o1 was counted as a twelfth observer,
    # the group interval narrowed, and nothing said so.
    from fitting.same_person import name_key

    o1 = _observer("O1", 70)
    write_log(o1, tmp_path / "O1.trials.csv")
    write_log(o1.assign(observer="o1"), tmp_path / "o1.trials.csv")
    write_log(_observer("O2", 71), tmp_path / "O2.trials.csv")
    r = fit_logs([str(tmp_path)], str(tmp_path / "out"), n_boot=20, seed=1, figures=False, progress=False)
    summary = (tmp_path / "out" / "summary.txt").read_text()
    case = "observers O1 and o1 are one name when case is ignored: they are counted as 2 people"
    copy = (f"logs {tmp_path / 'O1.trials.csv'} (O1) and {tmp_path / 'o1.trials.csv'} (o1) hold the same trials row "
            "for row")
    assert case in summary and copy in summary and case in r.summary()
    assert "O2" not in next(n for n in r.notes["group"] if "case is ignored" in n)
    assert name_key("\uff33\uff29\uff2d\uff10\uff12") == name_key("sim02")        # NFKC: full-width letters
