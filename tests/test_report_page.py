"""report.html, opened in headless Chromium as a reader would, along a new user's whole path.

The path: ``check`` → ``simulate`` → ``fit`` → open the fit's report →
``compare`` → open the report with the comparison; each step is the real
command in its own process.  In the browser (Debian's Chromium, driven over
its DevTools protocol; see ``tests/browser.py``) every image must load, the
console must stay free of errors, the page must render to PDF and PNG, and
every table tagged with a CSV file must hold that file's numbers, all of
them.  Without Chromium these tests skip and say so; ``setup.sh test``
installs it.
"""

from __future__ import annotations

import math
import shutil
from pathlib import Path

import pandas as pd
import pytest

from browser import find_chromium, open_page
from conftest import PROTOCOLS, run_cli
from fitting.population import ChannelModel, predict_table

needs_browser = pytest.mark.skipif(find_chromium() is None,
                                   reason="no Chromium on this machine (Debian package chromium; "
                                          "`./setup.sh test` installs it)")
#: The page shows numbers to 4 significant digits (fitting.page.DIGITS).
REL_TOL = 5.1e-4


def _same(shown: str, stored) -> bool:
    if pd.isna(stored):
        return shown == ""
    if isinstance(stored, str):
        return shown == stored
    if isinstance(stored, bool):
        return shown == ("true" if stored else "false")
    try:
        value = float(shown)
    except ValueError:
        return False
    return math.isclose(value, float(stored), rel_tol=REL_TOL, abs_tol=1e-12)


def check_tables_hold_the_csv_numbers(page: Path, view) -> dict:
    """Every tagged table's header is its CSV's, and each row is one of its rows; return rows seen per CSV."""
    seen: dict[Path, set] = {}
    assert view.tables, "the page shows no table tagged with its CSV file"
    for table in view.tables:
        csv = (page.parent / table["csv"]).resolve()
        stored = pd.read_csv(csv, keep_default_na=True, dtype={"observer": str, "condition": str,
                                                                 "flags": str, "lag": str})
        assert table["header"] == list(stored.columns), csv.name
        records = stored.to_dict("records")
        for row in table["rows"]:
            matches = [i for i, rec in enumerate(records)
                       if all(_same(cell, _typed(rec[c])) for cell, c in zip(row, stored.columns))]
            assert matches, f"{csv.name}: the page shows a row that is not in the file: {row}"
            seen.setdefault(csv, set()).update(matches)
    return seen


def _typed(value):
    """CSV text columns read as text may still hold numbers (``lag``): compare those as numbers."""
    if isinstance(value, str):
        try:
            return float(value)
        except ValueError:
            return value
    return value


def check_page(page: Path):
    view = open_page(page)
    assert view.errors == [], view.errors
    assert view.images, "no figures on the page"
    broken = [i["src"] for i in view.images if not (i["complete"] and i["width"] > 0)]
    assert broken == []
    assert view.pdf.startswith(b"%PDF") and len(view.pdf) > 10_000
    assert view.png.startswith(b"\x89PNG\r\n\x1a\n")
    return view


def _predictions(path: Path) -> Path:
    table = predict_table(ChannelModel(tuning_kappa=4.0, adapt_strength=0.25, adapt_kappa=6.0,
                                       recovery_periods=2.0), [-30.0, 30.0], [0, 2])
    table.to_csv(path, index=False)
    return path


@needs_browser
@pytest.mark.slow
def test_a_new_users_path_ends_in_a_report_that_holds_the_csv_numbers(tmp_path):
    protocol = PROTOCOLS / "pilot_short.toml"
    done = run_cli("check", protocol)
    assert done.returncode == 0, done.stderr
    assert "duration" in done.stdout
    done = run_cli("simulate", protocol, "--out", tmp_path / "logs", "--observers", "2", "--seed", "4",
                   "--model", PROTOCOLS / "observers" / "typical.toml")
    assert done.returncode == 0, done.stderr
    fit = tmp_path / "fit"
    done = run_cli("fit", tmp_path / "logs", "--out", fit, "--bootstrap", "200", "--seed", "1")
    assert done.returncode == 0, done.stderr
    assert "report.html" in done.stdout and done.stderr == ""  # not a terminal: no progress lines

    view = check_page(fit / "report.html")
    seen = check_tables_hold_the_csv_numbers(fit / "report.html", view)
    for name in ("pse.csv", "aftereffect.csv", "tuning.csv", "decay.csv", "exclusions.csv", "fit_details.csv"):
        rows = len(pd.read_csv(fit / name))
        assert len(seen.get((fit / name).resolve(), ())) == rows, f"{name}: not every row is on the page"
    assert "Observer sim01" in view.text and "Observer sim02" in view.text and "Group" in view.text
    sha = (tmp_path / "logs" / "sim01-s1.session.json").read_text()
    assert any(line.strip().startswith('"sha256"') and line.split('"')[3] in view.text
               for line in sha.splitlines()), "the protocol's SHA-256 is not on the page"
    assert "conditions" in view.text  # the plan, as check prints it

    compared = tmp_path / "compare"
    done = run_cli("compare", fit, _predictions(tmp_path / "predictions.csv"), "--out", compared)
    assert done.returncode == 0, done.stderr
    page = compared / "report.html"
    view = check_page(page)
    seen = check_tables_hold_the_csv_numbers(page, view)
    assert len(seen[(compared / "agreement.csv").resolve()]) == len(pd.read_csv(compared / "agreement.csv"))
    # the fit's tables are shown from compare's copy of the fit (fitting/fit_copy.py)
    assert len(seen.get((compared / "fit" / "tuning.csv").resolve(), ())) == len(pd.read_csv(fit / "tuning.csv"))
    assert "Comparison with predictions" in view.text


@needs_browser
@pytest.mark.slow
def test_the_checks_catch_a_missing_figure_and_a_wrong_number(tmp_path):
    # negative controls: the browser checks above can fail
    fit = tmp_path / "fit"
    done = run_cli("simulate", PROTOCOLS / "pilot_short.toml", "--out", tmp_path / "logs", "--seed", "2")
    assert done.returncode == 0, done.stderr
    done = run_cli("fit", tmp_path / "logs", "--out", fit, "--bootstrap", "0")
    assert done.returncode == 0, done.stderr
    figure = next((fit / "figures").glob("tracks_*.png"))
    shutil.move(figure, tmp_path / "moved.png")
    view = open_page(fit / "report.html")
    assert [i["src"] for i in view.images if i["width"] == 0] == [f"figures/{figure.name}"]
    assert any("ERR_FILE_NOT_FOUND" in e for e in view.errors), view.errors
    pse = pd.read_csv(fit / "pse.csv")
    pse.loc[0, "pse_deg"] += 0.01
    pse.to_csv(fit / "pse.csv", index=False)
    with pytest.raises(AssertionError, match="pse.csv"):
        check_tables_hold_the_csv_numbers(fit / "report.html", view)


@needs_browser
@pytest.mark.slow
def test_a_stream_fit_gets_the_same_report(tmp_path):
    done = run_cli("simulate", PROTOCOLS / "stream_nback.toml", "--out", tmp_path / "logs", "--seed", "3")
    assert done.returncode == 0, done.stderr
    fit = tmp_path / "fit"
    done = run_cli("fit", tmp_path / "logs", "--out", fit, "--bootstrap", "100")
    assert done.returncode == 0, done.stderr
    view = check_page(fit / "report.html")
    seen = check_tables_hold_the_csv_numbers(fit / "report.html", view)
    for name in ("tuning.csv", "decay.csv", "exclusions.csv"):
        assert len(seen.get((fit / name).resolve(), ())) == len(pd.read_csv(fit / name)), name
    assert "n-back amplitudes" in view.text
