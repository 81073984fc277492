"""fit_logs / quick_shifts end to end: tables, files, determinism, bad input."""

import matplotlib.image
import numpy as np
import pandas as pd
import pytest

from fitting import InputError, fit_logs, quick_shifts
from fitting.synthetic import ObserverModel, simulate_trials, write_log

REQUIRED_COLUMNS = {  # README, "Output files"
    "pse.csv": ["observer", "condition", "adapter_offset_deg", "lag", "pse_deg", "pse_ci_low",
                "pse_ci_high", "spread_deg", "lapse", "n_trials"],
    "aftereffect.csv": ["observer", "lag", "adapter_offset_deg", "pse_shift_deg", "ci_low",
                        "ci_high", "n_trials"],
    "tuning.csv": ["observer", "lag", "amplitude_deg", "amplitude_ci_low", "amplitude_ci_high",
                   "peak_offset_deg", "peak_offset_ci_low", "peak_offset_ci_high"],
    "decay.csv": ["observer", "decay_periods", "ci_low", "ci_high"],
}
MODEL = ObserverModel(amplitude_deg=4.0, peak_offset_deg=25.0, decay_periods=1.2)


@pytest.fixture
def logs(tmp_path):
    folder = tmp_path / "logs"
    for obs, seed in (("P1", 1), ("P2", 2)):
        for session in ("1", "2"):
            df = simulate_trials(MODEL, offsets=(-60, -30, -15, 15, 30, 60), lags=(0, 1),
                                 trials_per_track=12, seed=[seed, int(session)], observer=obs,
                                 session=session, practice_trials=2, bad_timing_rate=0.05)
            (folder / obs).mkdir(parents=True, exist_ok=True)
            write_log(df, folder / obs / f"s{session}.trials.csv")
    return folder


def test_tables_have_exact_columns_group_rows_and_signs(logs, tmp_path):
    out = tmp_path / "out"
    report = fit_logs([str(logs)], str(out), n_boot=100, seed=3, figures=False, progress=False)
    for name, cols in REQUIRED_COLUMNS.items():
        table = pd.read_csv(out / name)
        assert list(table.columns) == cols + ["flags"]   # the README's required columns, then the flags
        assert set(table["observer"]) == {"P1", "P2", "group"}
    shifts = pd.read_csv(out / "aftereffect.csv")
    lag0 = shifts[(shifts["lag"] == 0) & (shifts["adapter_offset_deg"].abs() <= 30)]
    # repulsion (README, Conventions): the shift has the sign of the adapter offset
    assert (np.sign(lag0["pse_shift_deg"]) == np.sign(lag0["adapter_offset_deg"])).all()
    assert (shifts["ci_low"] <= shifts["pse_shift_deg"]).all()
    assert (shifts["pse_shift_deg"] <= shifts["ci_high"]).all()
    for extra in ("fit_details.csv", "model_tests.csv", "decay_detail.csv", "exclusions.csv",
                  "mixed_model.csv", "summary.txt"):
        assert (out / extra).exists()
    ex = pd.read_csv(out / "exclusions.csv").set_index("observer")
    assert (ex["practice_excluded"] == 4).all() and (ex["bad_timing_excluded"] > 0).all()
    detail = pd.read_csv(out / "decay_detail.csv").set_index("observer")
    assert detail.loc["P1", "decay_s"] == pytest.approx(detail.loc["P1", "decay_periods"] * 0.5)
    text = report.summary()
    assert "Observer P1" in text and "Group" in text and "tau" in text


def test_same_seed_same_bytes_and_nothing_else_touched(logs, tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    b.mkdir()
    (b / "keep.txt").write_text("mine")
    for out in (a, b):
        fit_logs([str(logs)], str(out), n_boot=60, seed=9, figures=False, progress=False)
    for name in list(REQUIRED_COLUMNS) + ["fit_details.csv", "model_tests.csv", "decay_detail.csv"]:
        assert (a / name).read_bytes() == (b / name).read_bytes(), name
    assert (b / "keep.txt").read_text() == "mine"
    c = tmp_path / "c"
    fit_logs([str(logs)], str(c), n_boot=60, seed=10, figures=False, progress=False)
    assert (a / "pse.csv").read_bytes() != (c / "pse.csv").read_bytes()


def test_figures_drawn_beside_the_fits_are_the_bytes_drawn_after_them(logs, tmp_path, monkeypatch):
    # with worker processes, each observer's figures are drawn while the other observer is fitted;
    # beyond EARLY_FIGURE_OBSERVERS they are drawn after the fits, as without workers
    import fitting.report
    from runner.workpool import FIT_MODULES, open_pool, task_mapper

    fit_logs([str(logs)], str(tmp_path / "after"), n_boot=40, seed=3, progress=False)
    pool = open_pool(workers=2, preload=FIT_MODULES)
    kinds = ("psychometric", "tracks", "aftereffect", "decay")
    beside = fit_logs([str(logs)], str(tmp_path / "beside"), n_boot=40, seed=3, progress=False,
                      map_tasks=task_mapper(pool, "fitting"))
    assert set(beside.side_results) == {("figure", f"{kind}_{obs}") for obs in ("P1", "P2") for kind in kinds}
    monkeypatch.setattr(fitting.report, "EARLY_FIGURE_OBSERVERS", 1)
    capped = fit_logs([str(logs)], str(tmp_path / "capped"), n_boot=40, seed=3, progress=False,
                      map_tasks=task_mapper(pool, "fitting"))
    assert len(capped.side_results) == len(kinds)
    names = sorted(p.name for p in (tmp_path / "after" / "figures").iterdir())
    assert len(names) == 10
    for out in ("beside", "capped"):
        assert names == sorted(p.name for p in (tmp_path / out / "figures").iterdir())
        for name in names:
            assert (tmp_path / "after" / "figures" / name).read_bytes() == \
                (tmp_path / out / "figures" / name).read_bytes(), (out, name)
    # one observer: fitted here, its figures drawn by the workers after the fit
    calls = []

    def recorded(fn, tasks, then=None, **kwargs):
        calls.append((fn.__name__, len(tasks), kwargs.get("label")))
        return task_mapper(pool, "fitting")(fn, tasks, then, **kwargs)

    fit_logs([str(logs / "P1")], str(tmp_path / "one_here"), n_boot=40, seed=3, progress=False)
    fit_logs([str(logs / "P1")], str(tmp_path / "one_workers"), n_boot=40, seed=3, progress=False,
             map_tasks=recorded)
    assert calls == [("draw_to_memory", 4, "drawing figures")]
    names = sorted(p.name for p in (tmp_path / "one_here" / "figures").iterdir())
    assert len(names) == 4 and names == sorted(p.name for p in (tmp_path / "one_workers" / "figures").iterdir())
    for name in names:
        assert (tmp_path / "one_here" / "figures" / name).read_bytes() == \
            (tmp_path / "one_workers" / "figures" / name).read_bytes(), name


def test_fixed_lapse_and_argument_errors(logs, tmp_path):
    report = fit_logs([str(logs)], str(tmp_path / "z"), n_boot=0, lapse=0.0, figures=False,
                      progress=False)
    own = report.pse[report.pse["observer"] != "group"]
    assert (own["lapse"] == 0).all() and own["pse_ci_low"].isna().all()   # no bootstrap, no CI
    for kwargs, field in (({"lapse": 0.7}, "--lapse"), ({"lapse": "often"}, "--lapse"),
                          ({"n_boot": -1}, "--bootstrap"), ({"seed": 1.5}, "--seed"),
                          ({"spread": "wide"}, "--spread")):
        with pytest.raises(InputError) as info:
            fit_logs([str(logs)], str(tmp_path / "never"), **kwargs)
        assert info.value.field == field
    assert not (tmp_path / "never").exists()


def test_bad_log_raises_before_anything_is_written(logs, tmp_path):
    bad = logs / "P1" / "s1.trials.csv"
    raw = pd.read_csv(bad, dtype=str, keep_default_na=False)
    raw.loc[5, "response_cw"] = "3"
    raw.to_csv(bad, index=False)
    with pytest.raises(InputError) as info:
        fit_logs([str(logs)], str(tmp_path / "out"), n_boot=10)
    assert info.value.source == str(bad) and "line 7" in info.value.field
    assert not (tmp_path / "out").exists()


def test_figures_are_written_as_png_and_pdf(tmp_path):
    df = simulate_trials(MODEL, offsets=(-30, -15, 15, 30), lags=(0, 1, 2), trials_per_track=10,
                         seed=4, observer="F1")
    write_log(df, tmp_path / "f.trials.csv")
    report = fit_logs([str(tmp_path / "f.trials.csv")], str(tmp_path / "out"), n_boot=50,
                      progress=False, figure_formats=("png", "pdf"))
    figs = tmp_path / "out" / "figures"
    for stem in ("psychometric_F1", "tracks_F1", "aftereffect_F1", "decay_F1"):
        assert (figs / f"{stem}.pdf").stat().st_size > 1000
        image = matplotlib.image.imread(figs / f"{stem}.png")
        assert image.shape[0] > 200 and image.std() > 0.01    # not blank
    assert sum(f.endswith(".png") for f in report.files) == 4


def test_quick_shifts_after_a_block():
    df = simulate_trials(MODEL, offsets=(-30, 30), lags=(0,), trials_per_track=20, seed=8)
    df.loc[3, "response_cw"] = pd.NA                     # a missed answer is left out
    out = quick_shifts(df, n_boot=40, seed=1)
    assert list(out.columns) == ["observer", "condition", "adapter_offset_deg", "lag", "pse_deg",
                                 "pse_shift_deg", "ci_low", "ci_high", "n_trials", "flags", "shift_flags"]
    base = out[out["condition"] == "baseline"].iloc[0]
    assert base["pse_shift_deg"] == 0.0
    plus = out[out["adapter_offset_deg"] == 30].iloc[0]
    minus = out[out["adapter_offset_deg"] == -30].iloc[0]
    assert plus["pse_shift_deg"] > 0 > minus["pse_shift_deg"]
    assert plus["ci_low"] < plus["pse_shift_deg"] < plus["ci_high"]
    assert out["n_trials"].sum() == 119
    no_base = quick_shifts(df[df["condition"] != "baseline"], n_boot=0)
    assert no_base["pse_shift_deg"].isna().all() and no_base["pse_deg"].notna().all()


def test_quick_fit_at_a_break_shows_no_interval_from_few_trials_and_states_exclusions():
    df = simulate_trials(MODEL, offsets=(-30, 30), lags=(0,), trials_per_track=20, seed=8)
    plus = df.index[df["condition"] == "adapt+30_lag0"]
    early = df.drop(plus[8:]).copy()                                    # +30 deg: 8 trials
    late = np.concatenate([early.index[early["condition"] == c][-n:]
                           for c, n in (("baseline", 15), ("adapt-30_lag0", 20))])
    early.loc[late, "timing_ok"] = False                                # 35 excluded for timing
    out = quick_shifts(early, n_boot=40, seed=1)
    few = out[out["adapter_offset_deg"] == 30].iloc[0]
    assert few["n_trials"] < 10 and "few-trials" in few["flags"]
    assert np.isnan(few["ci_low"]) and np.isnan(few["ci_high"])
    ok = out[out["adapter_offset_deg"] == -30].iloc[0]
    assert np.isfinite(ok["ci_low"]) and ok["flags"] == ""
    from fitting.report import exclusion_text
    text = exclusion_text(out.attrs["exclusions"])
    assert "35 bad timing" in text and f"{int(out['n_trials'].sum())} trials used of {len(early)}" in text


def test_quick_fit_keeps_a_conditions_own_flags_apart_from_its_shifts():
    # before, the baseline's flags were written into every condition's one flags cell, beside its own PSE: an
    # adapted condition with answers on both sides read "one-sided" because the baseline's were all clockwise
    df = simulate_trials(MODEL, offsets=(-30, 30), lags=(0,), trials_per_track=20, seed=8)
    df.loc[df["condition"] == "baseline", "response_cw"] = 1
    out = quick_shifts(df, n_boot=40, seed=1).set_index("condition")
    assert "one-sided" in out.loc["baseline", "flags"]
    for name in ("adapt-30_lag0", "adapt+30_lag0"):
        assert "one-sided" not in out.loc[name, "flags"] and "one-sided" in out.loc[name, "shift_flags"]
        assert np.isnan(out.loc[name, "ci_low"])        # the shift's interval: its baseline is not estimable


def test_notes_that_follow_from_the_protocol_are_said_once(tmp_path):
    # two adapter offsets per lag give nobody a tuning curve: one line for everyone, not one per observer
    folder = tmp_path / "logs"
    folder.mkdir()
    for obs, seed in (("P1", 1), ("P2", 2), ("P3", 3)):
        df = simulate_trials(MODEL, offsets=(-30, 30), lags=(0, 1), trials_per_track=12, seed=seed, observer=obs)
        write_log(df, folder / f"{obs}.trials.csv")
    report = fit_logs([str(folder)], str(tmp_path / "out"), n_boot=0, seed=3, figures=False, progress=False)
    text = report.summary()
    assert "Notes for every observer:" in text
    for lag in (0, 1):
        assert text.count(f"lag {lag}: fewer than 3 usable non-zero adapter offsets") == 1
    assert text.count("no decay fit") == 1
    page = (tmp_path / "out" / "report.html").read_text()
    assert page.count("every observer: lag 0: fewer than 3") == 1 and "P1: lag 0: fewer" not in page
    # an observer's own note stays with that observer
    report.notes["P2"] = report.notes["P2"] + ["a note of P2 alone"]
    text = report.summary()
    assert text.count("a note of P2 alone") == 1
    assert text.index("a note of P2 alone") > text.index("Observer P2")


def test_summary_shift_grid_keeps_columns_apart_for_offsets_with_many_digits():
    # offsets such as np.linspace(-96, 96, 34) ran together in the header ("-96-90.1818-84.3636")
    from fitting.report import _shift_grid

    offsets = [-157.5, -96.0, -90.1818, -84.3636, 2.90909, 180.0]
    shifts = pd.DataFrame({"lag": 0, "adapter_offset_deg": offsets, "pse_shift_deg": np.arange(6.0)})
    head, cols, row = _shift_grid(shifts)
    assert [float(v) for v in cols.split()[1:]] == pytest.approx(offsets, abs=0.005)
    assert len(cols) == len(row)                       # each label sits above its column
