"""Reading trial logs: validation with one-line errors naming file and line or column."""

import numpy as np
import pandas as pd
import pytest

from fitting.errors import InputError
from fitting.synthetic import ObserverModel, simulate_trials, write_log
from fitting.tables import format_table, read_logs


def _log(tmp_path, name="S01/a.trials.csv", **kw):
    kw.setdefault("offsets", (-30, 30))
    kw.setdefault("lags", (0,))
    kw.setdefault("trials_per_track", 6)
    kw.setdefault("observer", "S01")
    df = simulate_trials(ObserverModel(), **kw)
    path = tmp_path / name
    path.parent.mkdir(parents=True, exist_ok=True)
    write_log(df, path)
    return path, df


def _error(paths) -> InputError:
    with pytest.raises(InputError) as info:
        read_logs(paths)
    err = info.value
    assert "\n" not in str(err)
    return err


def test_folder_is_searched_recursively_and_sessions_are_pooled(tmp_path):
    _log(tmp_path, "S01/one.trials.csv", seed=1, session="1", practice_trials=3,
         missed_rate=0.1, bad_timing_rate=0.1)
    _log(tmp_path, "S01/deeper/two.trials.csv", seed=2, session="2")
    _log(tmp_path, "S02/x.trials.csv", seed=3, observer="S02")
    (tmp_path / "notes.csv").write_text("not a log\n")
    trials = read_logs([str(tmp_path)])
    assert sorted(trials["observer"].unique()) == ["S01", "S02"]
    ex = trials.attrs["exclusions"].set_index("observer")
    assert ex.loc["S01", "files"] == 2 and ex.loc["S01", "practice_excluded"] == 3
    assert ex.loc["S01", "trials_used"] == (trials["observer"] == "S01").sum()
    assert (ex["trials_read"] == ex[["practice_excluded", "bad_timing_excluded", "missed_excluded",
                                     "trials_used"]].sum(axis=1)).all()
    assert ex.loc["S01", "bad_timing_excluded"] > 0 and ex.loc["S01", "missed_excluded"] > 0
    assert trials["response_cw"].isin([0, 1]).all() and trials["timing_ok"].all()


def test_bad_timing_can_be_kept(tmp_path):
    path, df = _log(tmp_path, seed=4, bad_timing_rate=0.3)
    kept = read_logs([str(path)], include_bad_timing=True)
    assert len(kept) == len(df)


def test_missing_column_names_file_and_column(tmp_path):
    path, df = _log(tmp_path)
    write_log(df.drop(columns="response_cw"), path)
    err = _error([str(path)])
    assert err.source == str(path) and "response_cw" in err.field


@pytest.mark.parametrize("column,value,message", [
    ("test_offset_deg", "abc", "not a finite number"),
    ("response_cw", "2", "not 1, 0 or empty"),
    ("response_cw", "yes", "not 1, 0 or empty"),
    ("timing_ok", "maybe", "not true or false"),
    ("lag", "1.5", "whole number"),
])
def test_bad_value_names_file_line_and_column(tmp_path, column, value, message):
    path, _ = _log(tmp_path)
    raw = pd.read_csv(path, dtype=str, keep_default_na=False)
    row = int(np.flatnonzero(raw["condition"] != "baseline")[2])
    raw.loc[row, column] = value
    raw.to_csv(path, index=False)
    err = _error([str(path)])
    assert err.source == str(path)
    assert f"line {row + 2}" in err.field and column in err.field    # header is line 1
    assert message in err.message


def test_empty_log_and_empty_file(tmp_path):
    header = tmp_path / "h.trials.csv"
    header.write_text(",".join(simulate_trials(offsets=(), lags=(), trials_per_track=1).columns) + "\n")
    assert "no trials" in _error([str(header)]).message
    empty = tmp_path / "e.trials.csv"
    empty.write_text("")
    assert "empty file" in _error([str(empty)]).message


def test_folder_without_logs_and_missing_path(tmp_path):
    (tmp_path / "other.csv").write_text("a,b\n1,2\n")
    err = _error([str(tmp_path)])
    assert err.source == str(tmp_path) and "no trial logs" in err.message
    assert "no such file" in _error([str(tmp_path / "nothing.trials.csv")]).message


def test_adapter_row_needs_offset_and_conditions_must_be_consistent(tmp_path):
    path, _ = _log(tmp_path)
    raw = pd.read_csv(path, dtype=str, keep_default_na=False)
    adapted = np.flatnonzero(raw["condition"] != "baseline")
    raw.loc[adapted[0], "adapter_offset_deg"] = ""
    raw.to_csv(path, index=False)
    assert "not the baseline" in _error([str(path)]).message
    raw.loc[adapted[0], "adapter_offset_deg"] = "45"
    raw.to_csv(path, index=False)
    err = _error([str(path)])
    assert "had adapter offset" in err.message or "both have adapter offset" in err.message


def test_format_table_is_plain_and_stable():
    df = pd.DataFrame({"a": [1.0, np.nan, -0.0], "b": pd.array([1, None, 3], dtype="Int64"),
                       "c": ["x", "y", "z"]})
    assert format_table(df) == "a,b,c\n1,1,x\n,,y\n0,3,z\n"


def test_floating_point_residue_is_written_as_zero_but_tiny_p_values_are_kept():
    # a PSE zero by symmetry came out as 2.74107e-16 with numpy's AVX-512 paths and 3.9933e-16 without them
    df = pd.DataFrame({"pse_deg": [2.74107e-16, -3.9933e-16, 1.5e-9, 2.24399],
                       "gof_p": [1e-87, 0.5, 2e-16, 1.0], "p_value": [3e-20, 0.01, 0.2, 1.0]})
    assert format_table(df) == ("pse_deg,gof_p,p_value\n0,1e-87,3e-20\n0,0.5,0.01\n"
                                "1.5e-09,2e-16,0.2\n2.24399,1,1\n")
