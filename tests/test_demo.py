"""`aftershift demo` is deterministic: a fresh run equals the committed results_demo/."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from conftest import ROOT, run_cli

TABLES = ["fit/pse.csv", "fit/aftereffect.csv", "fit/tuning.csv", "fit/decay.csv", "compare/agreement.csv",
          "predictions_population_model.csv"]


@pytest.mark.slow
def test_demo_reproduces_the_committed_tables(tmp_path):
    out = tmp_path / "demo"
    done = run_cli("demo", "--out", out, timeout=600)
    assert done.returncode == 0, done.stderr
    assert (out / "report.html").exists()
    for name in TABLES:
        fresh = pd.read_csv(out / name)
        committed = pd.read_csv(ROOT / "results_demo" / name)
        assert list(fresh.columns) == list(committed.columns), name
        assert fresh.shape == committed.shape, name
        for col in fresh.columns:
            if pd.api.types.is_numeric_dtype(committed[col]):
                np.testing.assert_allclose(fresh[col], committed[col], rtol=0, atol=1e-6, equal_nan=True, err_msg=f"{name}:{col}")
            else:
                assert fresh[col].astype(str).tolist() == committed[col].astype(str).tolist(), f"{name}:{col}"
    # the same folder again: the demo replaces its own earlier output, and the logs are identical
    first = {p.name: p.read_bytes() for p in (out / "logs").glob("*.trials.csv")}
    again = run_cli("demo", "--out", out, timeout=600)
    assert again.returncode == 0, again.stderr
    assert {p.name: p.read_bytes() for p in (out / "logs").glob("*.trials.csv")} == first


def test_demo_refuses_a_folder_that_is_not_its_own(tmp_path):
    (tmp_path / "precious.csv").write_text("do not delete\n")
    done = run_cli("demo", "--out", tmp_path)
    assert done.returncode == 2 and "not empty" in done.stderr
    assert (tmp_path / "precious.csv").read_text() == "do not delete\n"
