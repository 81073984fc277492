"""``aftershift predict``: the channel-population model's shifts for a protocol's cells, as compare reads them."""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest

from conftest import PROTOCOLS
from fitting.compare import read_predictions
from fitting.population import ChannelModel, predict_table
from runner.cli import PREDICT_CHANNELS, PREDICT_OPTIONS, main


def test_the_options_default_to_the_models_own_values():
    defaults = ChannelModel()
    assert {name: spec[2] for name, spec in PREDICT_OPTIONS.items()} == \
        {f.name: getattr(defaults, f.name) for f in dataclasses.fields(defaults) if f.name != "n_channels"}
    assert PREDICT_CHANNELS == defaults.n_channels


@pytest.mark.parametrize("protocol, lags, offsets", [
    ("offset_by_lag.toml", None, None),
    ("stream_nback.toml", [0, 1, 2], [-150, -120, -90, -60, -30, 30, 60, 90, 120, 150]),
], ids=["adapt-test", "stream"])
def test_predictions_cover_the_protocols_cells_and_compare_reads_them(tmp_path, capsys, protocol, lags, offsets):
    # before: only the demo wrote such a table; a stream's cells (+-150 deg) could be predicted from Python only
    from runner.protocol import load_protocol

    out = tmp_path / "pred.csv"
    assert main(["predict", str(PROTOCOLS / protocol), "--out", str(out), "--adapt-strength", "0.3"]) == 0
    assert f"aftershift compare FIT_FOLDER {out}" in capsys.readouterr().out
    table = read_predictions(out)
    if lags is None:
        design = load_protocol(PROTOCOLS / protocol).design
        lags, offsets = design.lags, design.adapter_offsets_deg
    assert sorted(set(table["lag"])) == sorted(lags) and sorted(set(table["adapter_offset_deg"])) == sorted(offsets)
    expected = predict_table(ChannelModel(adapt_strength=0.3), offsets, lags)
    merged = table.merge(expected, on=["lag", "adapter_offset_deg"], suffixes=("", "_model"))
    assert len(merged) == len(table) and np.allclose(merged["pse_shift_deg"], merged["pse_shift_deg_model"], atol=1e-6)
    # the README's sign convention: a repulsive model shifts the PSE toward the adapter's side
    first = table[table["lag"] == min(lags)]
    assert (np.sign(first["pse_shift_deg"]) == np.sign(first["adapter_offset_deg"])).all()


@pytest.mark.parametrize("args, said", [
    (["--adapt-strength", "1.5"], "--adapt-strength: expected a number from 0 to 0.999, not 1.5"),
    (["--tuning-kappa", "nan"], "--tuning-kappa: expected a number from 0.001 to 1000, not nan"),
    (["--channels", "4"], "--channels: channels must be from 8 to 3,600, not 4"),
    (["--out", "{tmp}/notes.txt"], "--out: expected a .csv file name"),
    (["--out", "{tmp}/log.csv"], "--out: exists and is not a predictions table"),
], ids=["strength", "kappa", "channels", "not csv", "another file"])
def test_bad_predict_options_are_one_line_and_nothing_is_written(tmp_path, capsys, args, said):
    (tmp_path / "log.csv").write_text("observer,session\nP1,s1\n")
    args = [a.replace("{tmp}", str(tmp_path)) for a in args]
    out = [] if "--out" in args else ["--out", str(tmp_path / "pred.csv")]
    assert main(["predict", str(PROTOCOLS / "offset_by_lag.toml"), *out, *args]) == 2
    err = capsys.readouterr().err.strip()
    assert said in err and "\n" not in err
    assert (tmp_path / "log.csv").read_text() == "observer,session\nP1,s1\n" and not (tmp_path / "pred.csv").exists()


@pytest.mark.slow    # simulate, fit and compare a stream
def test_a_stream_fit_compares_with_its_predictions(tmp_path, capsys):
    # the demo's predictions stop at +-90 deg, and compare refused a stream's +-150 deg cells
    protocol = str(PROTOCOLS / "stream_nback.toml")
    assert main(["simulate", protocol, "--out", str(tmp_path / "logs"), "--seed", "3"]) == 0
    assert main(["fit", str(tmp_path / "logs"), "--out", str(tmp_path / "fit"), "--bootstrap", "50",
                 "--no-figures"]) == 0
    assert main(["predict", protocol, "--out", str(tmp_path / "pred.csv")]) == 0
    assert main(["compare", str(tmp_path / "fit"), str(tmp_path / "pred.csv"), "--out", str(tmp_path / "cmp")]) == 0
    table = pd.read_csv(tmp_path / "cmp" / "agreement.csv")
    assert (table["n_points"] > 0).all()


def test_a_model_that_reads_no_test_as_the_reference_is_refused_not_given_the_wrap(tmp_path, capsys):
    # broad tuning under strong adaptation reads every test more than 90 deg away; the root finder then landed
    # on the jump of the population vector's angle from +180 to -180 deg and wrote it as the shift, exit 0
    model = ChannelModel(tuning_kappa=0.5, adapt_strength=0.9, adapt_kappa=1.0)
    with pytest.raises(ValueError, match="no test offset within"):
        model.pse_shift_deg(15.0, 0)
    shift = ChannelModel().pse_shift_deg(15.0, 0)      # a genuine reading of the reference
    assert abs(ChannelModel().decoded_deg(shift, ChannelModel().gains(15.0, 0))[0]) < 1e-6
    args = ["--tuning-kappa", "0.5", "--adapt-strength", "0.9", "--adapt-kappa", "1"]
    assert main(["predict", str(PROTOCOLS / "offset_by_lag.toml"), "--out", str(tmp_path / "p.csv"), *args]) == 2
    err = capsys.readouterr().err.strip()
    assert "the model gives no PSE" in err and "\n" not in err and not (tmp_path / "p.csv").exists()


def test_predict_refuses_a_fifo_or_a_link_as_out(tmp_path, capsys):
    # a FIFO named *.csv blocked forever (its header was read); a link was replaced by a regular file
    import os

    os.mkfifo(tmp_path / "fifo.csv")
    (tmp_path / "link.csv").symlink_to(tmp_path / "elsewhere.csv")
    for name in ("fifo.csv", "link.csv"):
        assert main(["predict", str(PROTOCOLS / "offset_by_lag.toml"), "--out", str(tmp_path / name)]) == 2
        assert "is a link or not a regular file" in capsys.readouterr().err
    assert (tmp_path / "link.csv").is_symlink() and not (tmp_path / "elsewhere.csv").exists()
