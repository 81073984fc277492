"""Fault injection, quick part: states a crash leaves, bad cells and sidecars, full and read-only disks.

States that a SIGKILL at an unlucky instant leaves behind (a header's
temporary file, a cut header, an empty log, a cut sidecar temporary file, a
torn or NUL-padded last line, a complete last row without its newline) are
made here directly, so each is met for certain; tests/test_faults_kill.py
kills real processes at random instants.  Every case checks the exit code,
one line on stderr without a traceback, and that the logs finally equal an
uninterrupted run with the same seed.  The rules themselves are common
practice for append-only logs, no source.
"""

from __future__ import annotations

import errno
import json
import os
import re
import shutil
import stat
import tempfile
from pathlib import Path

import pandas as pd
import pytest

from conftest import PROTOCOLS
from fault_helpers import PILOT, PILOT_ARGS, as_nobody, cli, leftovers, logs, one_line, resume_equals, tmpfs
from runner import trial_log
from runner.cli import main

NAME = "sim01-s1.trials.csv"
SIDE = "sim01-s1.session.json"


@pytest.fixture(scope="module")
def whole(tmp_path_factory) -> Path:
    """An uninterrupted simulation of the pilot protocol, two observers, seed 5."""
    out = tmp_path_factory.mktemp("whole")
    assert main(["simulate", str(PILOT), "--out", str(out), *PILOT_ARGS]) == 0
    return out


def _copy(whole: Path, out: Path, rows: int | None = None, extra: bytes = b"", sidecar: bool = True) -> Path:
    """sim01's log cut to ``rows`` rows (plus ``extra`` bytes), with its sidecar; sim02 absent."""
    out.mkdir(parents=True, exist_ok=True)
    data = (whole / NAME).read_bytes()
    if rows is not None:
        lines = data.splitlines(keepends=True)
        data = b"".join(lines[: rows + 1])
    (out / NAME).write_bytes(data + extra)
    if sidecar:
        (out / SIDE).write_bytes((whole / SIDE).read_bytes())
    return out


def _resume_equals_whole(capsys, out: Path, whole: Path) -> str:
    return resume_equals(capsys, PILOT, PILOT_ARGS, out, whole)


# --- what a kill leaves behind ----------------------------------------------------------------------------------


def test_kill_during_header_write_leaves_a_temporary_file_that_the_resume_removes(capsys, tmp_path, whole):
    out = tmp_path / "o"
    out.mkdir()
    (out / (NAME + ".tmp")).write_bytes(b"observer,session,tri")
    _resume_equals_whole(capsys, out, whole)


@pytest.mark.parametrize("content", [b"", b"observer,session,trial,cond"], ids=["empty", "cut header"])
def test_empty_or_cut_header_log_without_rows_is_repaired(capsys, tmp_path, whole, content):
    out = tmp_path / "o"
    out.mkdir()
    (out / NAME).write_bytes(content)
    err = _resume_equals_whole(capsys, out, whole)
    assert content == b"" or "header" in err


def test_cut_header_with_foreign_data_is_refused_and_kept(capsys, tmp_path):
    out = tmp_path / "o"
    out.mkdir()
    (out / NAME).write_bytes(b"these are my notes, not a log")
    code, err = cli(capsys, "simulate", PILOT, "--out", out, *PILOT_ARGS, "--resume")
    assert code == 2 and "line 1" in one_line(err)
    assert (out / NAME).read_bytes() == b"these are my notes, not a log"


def test_a_file_that_is_no_log_is_named_as_such(capsys, tmp_path, whole):
    # a picture named *.trials.csv was "torn (NUL bytes, as left by a power cut) ... resume the session", and a
    # sidecar given as the log was "line 2: expected 1 cells as in the header"
    picture = tmp_path / "x.trials.csv"
    picture.write_bytes(b"\x89PNG\r\n\x1a\n" + bytes(range(256)) * 4)
    side = tmp_path / "sim01-s1.session.json"
    side.write_bytes(next(whole.glob("*.session.json")).read_bytes())
    other = tmp_path / "t.trials.csv"
    other.write_text("a,b\n1,2\n")
    for path, hint in ((picture, " (not a text file)"), (side, " (a session sidecar: give the .trials.csv beside it)"),
                       (other, "")):
        code, err = cli(capsys, "fit", path, "--out", tmp_path / "fit", "--bootstrap", "0")
        assert code == 2 and one_line(err) == f"aftershift: {path}: line 1: not a trial log: its first line is not " \
                                             f"a log header{hint}"
    assert not (tmp_path / "fit").exists()


def test_kill_during_sidecar_write_leaves_a_cut_temporary_file(capsys, tmp_path, whole):
    out = _copy(whole, tmp_path / "o", rows=30)
    (out / (SIDE + ".tmp")).write_text('{"tool": "aftersh')
    _resume_equals_whole(capsys, out, whole)


def test_log_without_sidecar_and_no_rows_is_resumed(capsys, tmp_path, whole):
    out = _copy(whole, tmp_path / "o", rows=0, sidecar=False)
    _resume_equals_whole(capsys, out, whole)


@pytest.mark.parametrize("left", ["header only", "nothing"])
def test_resume_without_a_sidecar_needs_the_original_seed(capsys, tmp_path, whole, left):
    # killed before the sidecar was written: guessing seed 0 would replay another seed's trials without a word
    out = _copy(whole, tmp_path / "o", rows=0, sidecar=False) if left == "header only" else tmp_path / "o"
    before = logs(out)
    code, err = cli(capsys, "simulate", PILOT, "--out", out, "--observers", "2", "--resume")
    line = one_line(err)
    # with a log, the missing sidecar is named; with nothing at all, that there is nothing to resume
    assert code == 2 and (SIDE in line if left == "header only" else "to resume here" in line) and "--seed" in line
    assert logs(out) == before and not (out / SIDE).exists()
    _resume_equals_whole(capsys, out, whole)


def test_a_count_written_as_1_0_resumes_as_fit_reads_it(capsys, tmp_path, whole):
    # the shared cell rules take "1.0" (a log written back by pandas); the resume's tally took int() of it
    import csv
    import io

    out = _copy(whole, tmp_path / "o", rows=40)
    rows = list(csv.reader(io.StringIO((out / NAME).read_text())))
    rows[30][rows[0].index("dropped_frames")] = "1.0"
    (out / NAME).write_text("".join(",".join(r) + "\n" for r in rows))
    code, err = cli(capsys, "simulate", PILOT, "--out", out, "--observers", "2", "--resume")
    assert code == 0 and "Traceback" not in err, err
    assert cli(capsys, "fit", out, "--out", tmp_path / "fit", "--bootstrap", "0", "--no-figures")[0] == 0


def test_a_log_with_trials_whose_sidecar_is_gone_is_not_sent_after_a_seed(capsys, tmp_path, whole):
    # the advice was "resume with the original --seed", and with it the resume refused: no sidecar, no resume
    out = _copy(whole, tmp_path / "o", rows=40, sidecar=False)
    before = logs(out)
    for extra in ((), ("--seed", "5")):
        code, err = cli(capsys, "simulate", PILOT, "--out", out, "--observers", "2", "--resume", *extra)
        line = one_line(err)
        assert code == 2 and SIDE in line and "cannot be resumed" in line and "--seed" not in line.split(": ", 2)[2]
    assert logs(out) == before


def test_run_resume_without_a_sidecar_needs_a_seed_before_any_window(capsys, tmp_path, monkeypatch):
    monkeypatch.delenv("DISPLAY", raising=False)  # refused before the screen is opened
    (tmp_path / "P01-s1.trials.csv").write_text(",".join(trial_log.COLUMNS) + "\n")
    code, err = cli(capsys, "run", PILOT, "--observer", "P01", "--out", tmp_path, "--resume")
    line = one_line(err)
    assert code == 2 and "P01-s1.session.json" in line and "--seed" in line


def test_run_resume_of_a_complete_session_says_so_before_any_window(capsys, tmp_path, whole, monkeypatch):
    # it opened the display, then reported "complete already"; no screen is needed to say that
    monkeypatch.delenv("DISPLAY", raising=False)
    out = tmp_path / "o"
    out.mkdir()
    side = json.loads((whole / SIDE).read_text())
    (out / "P01-s1.trials.csv").write_bytes((whole / NAME).read_bytes().replace(b"sim01,", b"P01,"))
    (out / "P01-s1.session.json").write_text(json.dumps({**side, "kind": "screen", "observer": "P01"}))
    before = logs(out)
    capsys.readouterr()
    assert main(["run", str(PILOT), "--observer", "P01", "--out", str(out), "--resume"]) == 0
    rows = (whole / NAME).read_bytes().count(b"\n") - 1
    assert capsys.readouterr().out == f"session complete already: {rows} trials in the log; nothing to resume\n"
    assert logs(out) == before


def test_log_with_rows_but_no_sidecar_is_refused(capsys, tmp_path, whole):
    out = _copy(whole, tmp_path / "o", rows=20, sidecar=False)
    before = logs(out)
    code, err = cli(capsys, "simulate", PILOT, "--out", out, *PILOT_ARGS, "--resume")
    assert code == 2 and "session.json" in one_line(err)
    assert logs(out) == before


# --- the tail of a log ------------------------------------------------------------------------------------------


def test_last_row_without_its_newline_is_torn_cut_and_rerun(capsys, tmp_path, whole):
    out = _copy(whole, tmp_path / "o", rows=40)
    out.joinpath(NAME).write_bytes(out.joinpath(NAME).read_bytes()[:-1])  # only the newline is missing
    err = _resume_equals_whole(capsys, out, whole)
    assert "torn line 41" in err and "no newline" in err
    sidecar = json.loads((out / SIDE).read_text())
    assert sidecar["parts"][-1]["log_repairs"][0]["kind"] == "torn"


STREAM = PROTOCOLS / "stream_nback.toml"
LIGHT_READINGS = PROTOCOLS / "light" / "example_readings.csv"


@pytest.fixture(scope="module")
def stream_whole(tmp_path_factory) -> Path:
    """An uninterrupted stream session (its last column is a ';'-list of offsets), seed 3."""
    out = tmp_path_factory.mktemp("stream")
    assert main(["simulate", str(STREAM), "--out", str(out), "--seed", "3"]) == 0
    return out


def test_stream_row_cut_inside_its_last_number_is_torn_for_resume_and_fit(capsys, tmp_path, stream_whole):
    lines = (stream_whole / NAME).read_bytes().splitlines(keepends=True)
    last = lines[300].rstrip(b"\n")
    assert re.search(rb"[0-9]{2}$", last)           # a cut of its last digit still reads as a number
    out = tmp_path / "o"
    out.mkdir()
    (out / NAME).write_bytes(b"".join(lines[:300]) + last[:-1])
    (out / SIDE).write_bytes((stream_whole / SIDE).read_bytes())
    code, err = cli(capsys, "fit", out / NAME, "--out", tmp_path / "fit", "--bootstrap", "2", "--no-figures")
    assert code == 0 and "line 301 left out" in err and "torn" in err
    assert pd.read_csv(tmp_path / "fit" / "exclusions.csv")["trials_read"].tolist() == [299]
    err = resume_equals(capsys, STREAM, ["--seed", "3"], out, stream_whole)
    assert "torn line 301" in err


@pytest.mark.parametrize("cut", [3, 17, 40, 60])
def test_torn_last_line_is_cut_reported_and_rerun(capsys, tmp_path, whole, cut):
    lines = (whole / NAME).read_bytes().splitlines(keepends=True)
    out = _copy(whole, tmp_path / "o", rows=50, extra=lines[51][:cut])
    err = _resume_equals_whole(capsys, out, whole)
    assert "torn line 52" in err
    repairs = json.loads((out / SIDE).read_text())["parts"][-1]["log_repairs"]
    assert repairs[0]["kind"] == "torn"


def test_nul_bytes_after_a_power_cut_are_cut(capsys, tmp_path, whole):
    out = _copy(whole, tmp_path / "o", rows=25, extra=b"\x00" * 300)
    err = _resume_equals_whole(capsys, out, whole)
    assert "NUL" in err


def test_nul_bytes_inside_a_log_are_refused_not_cut(capsys, tmp_path, whole):
    # NUL bytes in line 30 with complete rows after it: the tail rule cut every row from there (57 trials
    # of a 104-row log deleted and re-run); damage inside the file is refused by resume and fit alike
    out = _copy(whole, tmp_path / "o", rows=60)
    data = bytearray((out / NAME).read_bytes())
    start = sum(len(line) for line in data.splitlines(keepends=True)[:29])
    data[start + 10] = 0
    (out / NAME).write_bytes(bytes(data))
    before = logs(out)
    for args in (("simulate", PILOT, "--out", out, *PILOT_ARGS, "--resume"),
                 ("fit", out / NAME, "--out", tmp_path / "fit", "--bootstrap", "0")):
        code, err = cli(capsys, *args)
        assert code == 2 and one_line(err).startswith(f"aftershift: {out / NAME}: line 30: holds NUL bytes and "
                                                      "complete rows follow it"), err
    assert logs(out) == before


def test_torn_practice_row_is_never_counted_by_fit(capsys, tmp_path, whole):
    # a practice row cut right after its timing_ok cell parses in a CSV reader with "practice" empty
    lines = (whole / NAME).read_bytes().splitlines(keepends=True)
    row = lines[2]
    cut = row.index(b"true,") + len(b"true,")
    out = _copy(whole, tmp_path / "o", rows=1, extra=row[:cut])
    code, err = cli(capsys, "fit", out / NAME, "--out", tmp_path / "fit", "--bootstrap", "0", "--no-figures")
    assert code == 2
    assert "line 3" in one_line(err) and "torn" in err
    assert not (tmp_path / "fit" / "pse.csv").exists()


# --- corrupt cells and sidecars ---------------------------------------------------------------------------------


#: Cells a hostile edit may leave, each refused by fit and by a resume alike (fitting/logfile.py:check_rows).
BAD_CELLS = [("response_cw", "7"), ("timing_ok", "maybe"), ("dropped_frames", "-1"), ("test_offset_deg", "nan"),
             ("rt_s", "abc"), ("rt_s", "NaN"), ("rt_s", "1e999"), ("rt_s", "-5"), ("rt_s", "1e308"),
             ("rt_s", "0_5"), ("reference_deg", "north"), ("track", "x"), ("dropped_frames", "-3"),
             ("dropped_frames", "\u00b2"), ("dropped_frames", "9" * 5000), ("trial", "\u00b2"),
             ("test_offset_deg", "\uff11"), ("intervening_offsets_deg", "1;x"), ("period_s", "-1"),
             ("session", "s9"), ("observer", "sim02"), ("lag", ""), ("adapter_offset_deg", "")]   # line 11: adapt+30_lag2


@pytest.mark.parametrize("column,value", BAD_CELLS, ids=[f"{c}={v[:8]!a}" for c, v in BAD_CELLS])
def test_fit_and_resume_refuse_the_same_bad_cells(capsys, tmp_path, whole, column, value):
    out = _copy(whole, tmp_path / "o", rows=30)
    lines = (out / NAME).read_text().splitlines(keepends=True)
    cells = lines[10].rstrip("\n").split(",")
    cells[trial_log.COLUMNS.index(column)] = value
    lines[10] = ",".join(cells) + "\n"
    (out / NAME).write_text("".join(lines))
    before = logs(out)
    for args in (["fit", out / NAME, "--out", tmp_path / "fit", "--bootstrap", "0", "--no-figures"],
                 ["simulate", PILOT, "--out", out, *PILOT_ARGS, "--resume"]):
        code, err = cli(capsys, *args)
        line = one_line(err)
        assert code == 2 and NAME in line and "line 11" in line and f"column {column}" in line, (args[0], line)
        assert logs(out) == before
    assert not (tmp_path / "fit").exists()


def test_a_log_with_a_byte_order_mark_is_read_alike_by_fit_and_resume(capsys, tmp_path, whole):
    out = _copy(whole, tmp_path / "o", rows=30)
    (out / NAME).write_bytes(b"\xef\xbb\xbf" + (out / NAME).read_bytes())   # as a spreadsheet program saves it
    code, err = cli(capsys, "fit", out / NAME, "--out", tmp_path / "fit", "--bootstrap", "0", "--no-figures")
    assert code == 0, err
    code, err = cli(capsys, "simulate", PILOT, "--out", out, *PILOT_ARGS, "--resume")
    assert code == 0, err
    assert (out / NAME).read_bytes() == b"\xef\xbb\xbf" + (whole / NAME).read_bytes()


@pytest.mark.parametrize("column,value", [("lag", "3"), ("adapter_offset_deg", "-30"), ("practice", "1"),
                                          ("intervening_offsets_deg", "45;135")])
def test_resume_refuses_a_row_whose_condition_cells_were_edited(capsys, tmp_path, whole, column, value):
    # before, the resume carried on past the edited row, and the log could then no longer be fitted
    out = _copy(whole, tmp_path / "o", rows=30)
    lines = (out / NAME).read_text().splitlines(keepends=True)
    cells = lines[10].rstrip("\n").split(",")      # line 11: a main trial of adapt+30_lag2
    assert cells[3] == "adapt+30_lag2" and cells[trial_log.COLUMNS.index("practice")] == "0"
    cells[trial_log.COLUMNS.index(column)] = value
    lines[10] = ",".join(cells) + "\n"
    (out / NAME).write_text("".join(lines))
    before = logs(out)
    code, err = cli(capsys, "simulate", PILOT, "--out", out, *PILOT_ARGS, "--resume")
    line = one_line(err)
    assert code == 2 and NAME in line and "line 11" in line and column in line and "adapt+30_lag2" in line, line
    assert logs(out) == before


#: Edits of line 11 (a main trial of adapt+30_lag2) that leave every cell plausible and the row at odds with itself,
#: and the column fit names: direction = reference - offset (README, Conventions: directions counter-clockwise from
#: rightward, offsets positive clockwise), one reference per session, procedure "practice" for practice rows only,
#: one intervening offset per period of the lag.
SELF_CONTRADICTIONS = [("test_offset_deg", lambda v: f"{float(v) + 1.5:g}", "test_direction_deg"),
                       ("test_direction_deg", lambda v: f"{float(v) + 360.5:g}", "test_direction_deg"),
                       ("reference_deg", lambda v: "91", "reference_deg"),
                       ("procedure", lambda v: "practice", "procedure"),
                       ("intervening_offsets_deg", lambda v: v.split(";")[0], "intervening_offsets_deg")]


@pytest.mark.parametrize("column,edit,named", SELF_CONTRADICTIONS, ids=[c[0] for c in SELF_CONTRADICTIONS])
def test_fit_refuses_a_row_that_disagrees_with_itself(capsys, tmp_path, whole, column, edit, named):
    # before (defect 7 of the hostile sweep): a test offset edited from -5 to -3.5 while test_direction_deg still
    # read 95 was fitted, exit 0, no note
    out = _copy(whole, tmp_path / "o", rows=30, sidecar=False)
    lines = (out / NAME).read_text().splitlines(keepends=True)
    cells = lines[10].rstrip("\n").split(",")
    assert cells[3] == "adapt+30_lag2" and cells[trial_log.COLUMNS.index("practice")] == "0"
    cells[trial_log.COLUMNS.index(column)] = edit(cells[trial_log.COLUMNS.index(column)])
    lines[10] = ",".join(cells) + "\n"
    (out / NAME).write_text("".join(lines))
    before = logs(out)
    code, err = cli(capsys, "fit", out / NAME, "--out", tmp_path / "fit", "--bootstrap", "0", "--no-figures")
    line = one_line(err)
    assert code == 2 and NAME in line and "line 11" in line and f"column {named}" in line, line
    assert logs(out) == before and not (tmp_path / "fit").exists()


def test_a_resume_without_observers_continues_every_observer_in_the_folder(capsys, tmp_path, whole):
    # before, "continue with --resume" (the stop line's advice) finished sim01 only and left sim02 cut short,
    # exit 0: --observers defaulted to 1
    out = _copy(whole, tmp_path / "o", rows=30)
    (out / "sim02-s1.trials.csv").write_bytes(b"".join((whole / "sim02-s1.trials.csv").read_bytes()
                                                       .splitlines(keepends=True)[:12]))
    (out / "sim02-s1.session.json").write_bytes((whole / "sim02-s1.session.json").read_bytes())
    code, err = cli(capsys, "simulate", PILOT, "--out", out, "--resume")
    assert code == 0, err
    assert logs(out) == logs(whole)


def test_an_edited_answer_is_named_as_a_possible_cause_where_the_log_parts_from_its_plan(capsys, tmp_path, whole):
    # an answer steers its track, so an edited one shows only at a later trial of that track; before, the line
    # named only a changed protocol
    out = _copy(whole, tmp_path / "o", rows=60)
    lines = (out / NAME).read_text().splitlines(keepends=True)
    column = trial_log.COLUMNS.index("response_cw")
    edited = next(i for i, line in enumerate(lines[1:], 1) if line.split(",")[column] in ("0", "1")
                  and line.split(",")[trial_log.COLUMNS.index("practice")] == "0")
    cells = lines[edited].split(",")
    cells[column] = "1" if cells[column] == "0" else "0"
    lines[edited] = ",".join(cells)
    (out / NAME).write_text("".join(lines))
    before = logs(out)
    code, err = cli(capsys, "simulate", PILOT, "--out", out, *PILOT_ARGS, "--resume")
    line = one_line(err)
    assert code == 2 and "or an earlier answer edited?" in line, line
    assert logs(out) == before


def test_a_complete_simulation_whose_last_part_was_never_closed_is_closed_without_an_empty_part(capsys, tmp_path,
                                                                                                 whole):
    # before, the resume added a `vanished` part and then an empty `completed` one (run --resume already did not)
    out = _copy(whole, tmp_path / "o")
    (out / "sim02-s1.trials.csv").write_bytes((whole / "sim02-s1.trials.csv").read_bytes())
    (out / "sim02-s1.session.json").write_bytes((whole / "sim02-s1.session.json").read_bytes())
    side = json.loads((out / SIDE).read_text())
    side["parts"][-1].update(ended=None, ended_by="running", rows_added=0)
    del side["rows_total"]
    (out / SIDE).write_text(json.dumps(side))
    code, err = cli(capsys, "simulate", PILOT, "--out", out, *PILOT_ARGS, "--resume")
    assert code == 0, err
    total = (whole / NAME).read_bytes().count(b"\n") - 1
    side = json.loads((out / SIDE).read_text())
    assert [(p["ended_by"], p["rows_added"]) for p in side["parts"]] == [("vanished", total)]
    assert side["rows_total"] == total and logs(out) == logs(whole)


def test_a_log_with_windows_line_endings_resumes_with_the_same_endings(capsys, tmp_path, whole):
    # before, the resumed rows ended in "\n" after rows in "\r\n": one file with two line endings
    out = _copy(whole, tmp_path / "o", rows=30)
    (out / NAME).write_bytes((out / NAME).read_bytes().replace(b"\n", b"\r\n"))   # saved by a Windows editor
    code, err = cli(capsys, "simulate", PILOT, "--out", out, *PILOT_ARGS, "--resume")
    assert code == 0, err
    assert (out / NAME).read_bytes() == (whole / NAME).read_bytes().replace(b"\n", b"\r\n")


@pytest.mark.parametrize("field,value", [("seed", -1), ("seed", 10**30), ("session_seed", -1)])
def test_a_sidecar_seed_out_of_range_names_the_sidecars_field(capsys, tmp_path, whole, field, value):
    out = _copy(whole, tmp_path / "o", rows=30)
    side = json.loads((out / SIDE).read_text())
    side[field] = value
    (out / SIDE).write_text(json.dumps(side))
    before = logs(out)
    code, err = cli(capsys, "simulate", PILOT, "--out", out, "--observers", "2", "--resume")
    line = one_line(err)
    assert code == 2 and f"{SIDE}: {field}: malformed sidecar" in line
    assert logs(out) == before


def test_fit_with_a_sidecar_that_is_not_an_object_notes_it(capsys, tmp_path, whole):
    log = _copy(whole, tmp_path / "o") / NAME
    (log.parent / SIDE).write_text("[1, 2]")
    code, err = cli(capsys, "fit", log, "--out", tmp_path / "fit", "--bootstrap", "0", "--no-figures")
    assert code == 0 and "Traceback" not in err
    sessions = json.loads((tmp_path / "fit" / "report_data.json").read_text())["sessions"]
    assert "not a JSON object" in sessions[0]["problem"]


@pytest.mark.parametrize("content,field", [("[1, 2]", "file"), ('{"tool": 1}', "observer"), ("not json", "file"),
                                           (None, "seed")], ids=["list", "missing fields", "not json", "seed text"])
def test_sidecar_of_the_wrong_shape_is_reported_as_malformed(capsys, tmp_path, whole, content, field):
    out = _copy(whole, tmp_path / "o", rows=30)
    if content is None:
        side = json.loads((out / SIDE).read_text())
        side["seed"] = "five"
        content = json.dumps(side)
    (out / SIDE).write_text(content)
    before = logs(out)
    code, err = cli(capsys, "simulate", PILOT, "--out", out, "--observers", "2", "--resume")
    line = one_line(err)
    assert code == 2 and SIDE in line and field in line
    assert "protocol" not in line or "malformed" in line or "JSON" in line
    assert logs(out) == before


# --- the sidecar rules a resume ---------------------------------------------------------------------------------


@pytest.mark.parametrize("args,field", [(["--seed", "6"], "seed"), (["--model", "MODEL"], "base_model")])
def test_conflicting_seed_or_model_on_resume_is_refused(capsys, tmp_path, whole, args, field):
    out = _copy(whole, tmp_path / "o", rows=30)
    if "MODEL" in args:
        model = tmp_path / "other.toml"
        model.write_text("amplitude_deg = 9.0\n")
        args = ["--model", model]
    before = logs(out)
    code, err = cli(capsys, "simulate", PILOT, "--out", out, "--observers", "2", *args, "--resume")
    assert code == 2 and field in one_line(err)
    assert logs(out) == before


def test_resume_without_seed_takes_the_sidecars(capsys, tmp_path, whole):
    out = _copy(whole, tmp_path / "o", rows=30)
    code, err = cli(capsys, "simulate", PILOT, "--out", out, "--observers", "2", "--resume")
    assert code == 0, err
    assert logs(out) == logs(whole)


@pytest.mark.parametrize("session", ["../../x", "a/b", "", "x" * 65])
def test_session_label_is_validated_like_an_observer_id(capsys, tmp_path, session):
    code, err = cli(capsys, "simulate", PILOT, "--out", tmp_path / "o", "--session", session)
    assert code == 2 and "--session" in one_line(err)
    assert not (tmp_path / "x").exists() and not (tmp_path / "o").exists()


def test_a_part_left_running_by_a_kill_is_closed_by_the_resume(capsys, tmp_path, whole):
    out = _copy(whole, tmp_path / "o", rows=30)
    side = json.loads((out / SIDE).read_text())   # as kill -9 leaves it: the first part's opening record only
    side["parts"] = [{"started": side["parts"][0]["started"], "ended": None, "ended_by": "running", "rows_added": 0}]
    del side["rows_total"], side["track_states"]
    (out / SIDE).write_text(json.dumps(side))
    _resume_equals_whole(capsys, out, whole)
    parts = json.loads((out / SIDE).read_text())["parts"]
    assert [p["ended_by"] for p in parts] == ["vanished", "completed"]
    assert [p["rows_added"] for p in parts] == [30, (whole / NAME).read_bytes().count(b"\n") - 31]


def test_resuming_a_complete_session_adds_no_part(capsys, tmp_path, whole):
    out = tmp_path / "o"
    shutil.copytree(whole, out)
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    code, err = cli(capsys, "simulate", PILOT, "--out", out, *PILOT_ARGS, "--resume")
    assert code == 0 and err.count("the session is complete") == 2
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before


def test_lock_left_by_a_dead_process_is_taken_over_with_a_note(capsys, tmp_path, whole):
    out = _copy(whole, tmp_path / "o", rows=30)
    (out / "sim01-s1.lock").write_text(json.dumps({"pid": 2**22 + 17, "host": os.uname().nodename,
                                                   "started": "2026-01-01T00:00:00+00:00"}))
    err = _resume_equals_whole(capsys, out, whole)
    assert "took over the lock" in err and str(2**22 + 17) in err


# --- full disks, read-only and unreadable paths -----------------------------------------------------------------


@pytest.mark.parametrize("code_", [errno.ENOSPC, errno.EIO], ids=["ENOSPC", "EIO"])
def test_injected_enospc_cuts_back_to_the_last_row_and_resumes_exactly(capsys, tmp_path, whole, monkeypatch, code_):
    """A full disk (or a failing one) without mounting anything: the 60th row's write fails after a partial write."""
    out = tmp_path / "o"
    real_write, calls = os.write, {"n": 0}

    def failing_write(fd, data):
        if len(data) > 60 and data[:5] == b"sim01":
            calls["n"] += 1
            if calls["n"] == 60:
                real_write(fd, bytes(data[:25]))  # part of the row reaches the file, then the disk is full
                raise OSError(code_, os.strerror(code_))
        return real_write(fd, data)

    monkeypatch.setattr(trial_log.os, "write", failing_write)
    code, err = cli(capsys, "simulate", PILOT, "--out", out, *PILOT_ARGS)
    monkeypatch.undo()
    line = one_line(err)
    assert code == 2 and ("disk is full" in line or "I/O error" in line)
    # the whole command that continues (before: "continue with --resume", without seed or observers)
    assert line.endswith(f"continue: aftershift simulate {PILOT} --out {out} --observers 2 --seed 5 --resume"), line
    data = (out / NAME).read_bytes()
    assert data.endswith(b"\n") and data.count(b"\n") == 60  # header + 59 whole rows, no torn row
    ended = json.loads((out / SIDE).read_text())["parts"][-1]["ended_by"]
    assert ended == ("disk full" if code_ == errno.ENOSPC else "disk error")
    _resume_equals_whole(capsys, out, whole)


def test_full_tmpfs_during_simulate_and_fit(capsys, tmp_path, whole):
    small = tmp_path / "small"
    with tmpfs(small, "40k"):
        out = small / "logs"
        code, err = cli(capsys, "simulate", PILOT, "--out", out, *PILOT_ARGS)
        line = one_line(err)
        assert code == 2 and ("disk is full" in line or "No space" in line)
        for data in logs(out).values():
            assert data.endswith(b"\n")  # cut back to whole rows
        assert leftovers(out) == []
        # move to a roomier disk and continue: the same rows as an uninterrupted run
        roomy = tmp_path / "roomy"
        roomy.mkdir()
        for p in out.iterdir():
            if not p.name.endswith(".lock"):
                (roomy / p.name).write_bytes(p.read_bytes())
    _resume_equals_whole(capsys, roomy, whole)
    # a fit into a folder on a full disk: one line, and the earlier fit there is untouched
    with tmpfs(small, "400k"):
        fit_dir = small / "fit"
        assert cli(capsys, "fit", whole, "--out", fit_dir, "--bootstrap", "0", "--no-figures")[0] == 0
        before = {p.name: p.read_bytes() for p in fit_dir.iterdir()}
        (small / "filler").write_bytes(b"\0" * (os.statvfs(small).f_bavail * os.statvfs(small).f_frsize))
        code, err = cli(capsys, "fit", whole, "--out", fit_dir, "--bootstrap", "0")
        assert code == 2 and "No space" in one_line(err)
        assert ".staging" not in err and str(fit_dir) in err     # names the folder the user gave
        assert {p.name: p.read_bytes() for p in fit_dir.iterdir()} == before
        assert leftovers(fit_dir) == []


def test_read_only_folder(capsys, tmp_path, whole):
    # measure-light: before (a hostile-user sweep), two chained tracebacks, exit 1 (the temporary file's removal
    # failed too, hiding the first error)
    ro = tmp_path / "ro"
    with tmpfs(ro, read_only=True):
        for args in (["simulate", PILOT, "--out", ro / "logs"], ["fit", whole, "--out", ro / "fit"],
                     ["compare", whole, PILOT, "--out", ro / "cmp"],
                     ["measure-light", "--readings", LIGHT_READINGS, "--out", ro / "lab.toml"]):
            code, err = cli(capsys, *args)
            assert code == 2 and "read-only" in one_line(err).lower()
            assert not list(ro.iterdir())


def test_a_light_profile_and_its_figure_are_written_together_or_not_at_all(capsys, tmp_path):
    # before (a hostile-user sweep): on a nearly full disk the profile was written, then drawing its figure ended in
    # three chained tracebacks, exit 1, the profile left without its figure and nothing said
    small = tmp_path / "small"
    with tmpfs(small, "40k"):
        code, err = cli(capsys, "measure-light", "--readings", LIGHT_READINGS, "--out", small / "lab.toml")
        assert code == 2 and one_line(err) == f"aftershift: {small / 'lab.toml'}: --out: cannot be written (No space " \
                                              "left on device)"
        assert not list(small.iterdir())
    with tmpfs(small, "800k"):           # room enough: profile and figure, and no staging folder left
        assert cli(capsys, "measure-light", "--readings", LIGHT_READINGS, "--out", small / "lab.toml")[0] == 0
        assert sorted(p.name for p in small.iterdir()) == ["lab.pdf", "lab.png", "lab.toml"]
        # a name of several dots keeps them all in its figure's (before: lab.display.png for both of these, the
        # second profile's figure replacing the first's)
        for version in ("v1", "v2"):
            assert cli(capsys, "measure-light", "--readings", LIGHT_READINGS, "--out",
                       small / f"lab.display.{version}.toml")[0] == 0
        assert {p.name for p in small.iterdir()} >= {f"lab.display.{v}.{e}" for v in ("v1", "v2")
                                                      for e in ("toml", "png", "pdf")}
        # a figure's name taken by a folder: refused before anything is written (before: the profile was
        # replaced, then "cannot be written")
        (small / "other.pdf").mkdir()
        code, err = cli(capsys, "measure-light", "--readings", LIGHT_READINGS, "--out", small / "other.toml")
        assert code == 2 and "other.pdf is a folder" in one_line(err)
        assert not (small / "other.toml").exists() and not (small / "other.png").exists()
        assert not [p for p in small.iterdir() if p.name.startswith(".")]


@pytest.mark.parametrize("command", ["simulate", "fit", "plan", "compare"])
def test_output_folder_under_a_regular_file(capsys, tmp_path, whole, command):
    blocker = tmp_path / "file"
    blocker.write_text("x")
    target = blocker / "sub"
    args = {"simulate": ["simulate", PILOT, "--out", target],
            "fit": ["fit", whole, "--out", target, "--bootstrap", "0"],
            "plan": ["plan", PILOT, "--out", target, "--runs", "2"],
            "compare": ["compare", whole, whole / NAME, "--out", target]}[command]
    if command == "compare":
        fit = tmp_path / "fit"
        assert cli(capsys, "fit", whole, "--out", fit, "--bootstrap", "0", "--no-figures")[0] == 0
        pred = tmp_path / "pred.csv"
        pred.write_text("lag,adapter_offset_deg,pse_shift_deg\n0,-30,-2\n0,30,2\n2,-30,-1\n2,30,1\n")
        args = ["compare", fit, pred, "--out", target]
    code, err = cli(capsys, *args)
    assert code == 2 and str(blocker) in one_line(err)
    assert blocker.read_text() == "x"


def test_unreadable_log_for_an_unprivileged_user(tmp_path, whole):
    import codecs

    import fitting.nback  # noqa: F401 - imported before dropping root
    import fitting.report  # noqa: F401
    import runner.workpool  # noqa: F401

    codecs.lookup("utf-8-sig")

    if os.geteuid() != 0:
        pytest.skip("needs root to drop to an unprivileged user")
    shared = Path(tempfile.mkdtemp(prefix="aftershift-faults-", dir="/tmp"))  # pytest's folders are root-only
    try:
        shared.chmod(0o777)
        log = shared / NAME
        log.write_bytes((whole / NAME).read_bytes())
        log.chmod(0)
        hidden = tmp_path / NAME  # inside a folder the user cannot enter
        hidden.write_bytes(log.read_bytes())
        for target in (log, hidden):
            code, err = as_nobody(["fit", str(target), "--out", str(shared / "fit"), "--bootstrap", "0",
                                   "--no-figures"])
            assert code == 2 and "Permission denied" in one_line(err) and NAME in err, err
            assert not (shared / "fit").exists()
    finally:
        shutil.rmtree(shared)


def test_a_colleagues_unreadable_fit_folder_is_one_line_for_compare(capsys, tmp_path, whole):
    import fitting.compare  # noqa: F401 - imported before dropping root
    import fitting.compare_figure  # noqa: F401
    import runner.workpool  # noqa: F401

    if os.geteuid() != 0:
        pytest.skip("needs root to drop to an unprivileged user")
    shared = Path(tempfile.mkdtemp(prefix="aftershift-faults-", dir="/tmp"))  # pytest's folders are root-only
    try:
        shared.chmod(0o777)
        fit = shared / "fit"
        assert cli(capsys, "fit", whole, "--out", fit, "--bootstrap", "0", "--no-figures")[0] == 0
        pred = shared / "pred.csv"
        pred.write_text("lag,adapter_offset_deg,pse_shift_deg\n0,-30,-2\n0,30,2\n2,-30,-1\n2,30,1\n")
        pred.chmod(0o644)
        for mode, table in ((0o711, 0o600), (0o700, 0o644)):   # a table it may not read; a folder it may not enter
            fit.chmod(mode)
            (fit / "aftereffect.csv").chmod(table)
            code, err = as_nobody(["compare", str(fit), str(pred), "--out", str(shared / "cmp")])
            assert code == 2 and "Permission denied" in one_line(err) and "aftereffect.csv" in err, err
            assert not (shared / "cmp").exists()
    finally:
        shutil.rmtree(shared)


# --- fit, compare and check refuse what they cannot use ---------------------------------------------------------


def test_fit_refuses_a_backup_copy_and_doubled_rows(capsys, tmp_path, whole):
    data = tmp_path / "data"
    (data / "backup").mkdir(parents=True)
    for folder in (data, data / "backup"):
        (folder / NAME).write_bytes((whole / NAME).read_bytes())
    code, err = cli(capsys, "fit", data, "--out", tmp_path / "fit", "--bootstrap", "0")
    line = one_line(err)
    assert code == 2 and "backup" in line and "trial 1 " in line
    lines = (whole / NAME).read_bytes().splitlines(keepends=True)
    (tmp_path / "doubled.trials.csv").write_bytes(b"".join(lines[:50] + lines[40:45] + lines[50:]))
    code, err = cli(capsys, "fit", tmp_path / "doubled.trials.csv", "--out", tmp_path / "fit", "--bootstrap", "0")
    assert code == 2 and "line 51" in one_line(err) and "line 41" in err


def test_fit_refuses_offsets_outside_the_bounds_the_sidecar_records(capsys, tmp_path, whole):
    text = (whole / NAME).read_text().splitlines(keepends=True)
    cells = text[30].split(",")
    cells[trial_log.COLUMNS.index("test_offset_deg")] = "31"  # pilot_short.toml: bounds_deg = [-30, 30]
    cells[trial_log.COLUMNS.index("test_direction_deg")] = "59"  # the row agrees with itself (reference 90)
    text[30] = ",".join(cells)
    (tmp_path / NAME).write_text("".join(text))
    (tmp_path / SIDE).write_bytes((whole / SIDE).read_bytes())
    code, err = cli(capsys, "fit", tmp_path / NAME, "--out", tmp_path / "fit", "--bootstrap", "0")
    assert code == 2 and "line 31" in one_line(err) and "[-30, 30]" in err


def test_fit_leaves_out_the_line_a_running_session_is_writing(capsys, tmp_path, whole):
    from runner.session_lock import SessionLock

    lines = (whole / NAME).read_bytes().splitlines(keepends=True)
    (tmp_path / NAME).write_bytes(b"".join(lines[:80]) + lines[80][:30])
    with SessionLock(tmp_path / NAME):
        code, err = cli(capsys, "fit", tmp_path / NAME, "--out", tmp_path / "fit", "--bootstrap", "0", "--no-figures")
    assert code == 0, err
    assert "79 read" in (tmp_path / "fit" / "summary.txt").read_text()
    code, err = cli(capsys, "fit", tmp_path / NAME, "--out", tmp_path / "fit", "--bootstrap", "0", "--no-figures")
    assert code == 2 and "line 81" in one_line(err) and "torn" in err


def test_fit_refuses_absurd_offsets(capsys, tmp_path, whole):
    text = (whole / NAME).read_text().splitlines(keepends=True)
    cells = text[30].split(",")
    cells[trial_log.COLUMNS.index("test_offset_deg")] = "1e300"
    text[30] = ",".join(cells)
    (tmp_path / NAME).write_text("".join(text))
    code, err = cli(capsys, "fit", tmp_path / NAME, "--out", tmp_path / "fit", "--bootstrap", "0")
    assert code == 2 and "line 31" in one_line(err) and "test_offset_deg" in err


@pytest.mark.parametrize("args,option", [
    (["simulate", PILOT, "--out", "OUT", "--seed", "-1"], "--seed"),
    (["fit", "WHOLE", "--out", "OUT", "--bootstrap", "1000000000"], "--bootstrap"),
    (["simulate", PILOT, "--out", "OUT", "--observers", "100000"], "--observers"),
    (["plan", PILOT, "--out", "OUT", "--seed", str(2**40)], "--seed"),
    (["display-test", PILOT, "--seconds", "0.001"], "--seconds"),   # before, 1 frame got an "ok" verdict
    (["display-test", PILOT, "--seconds", "nan"], "--seconds"),
])
def test_absurd_numbers_on_the_command_line(capsys, tmp_path, whole, args, option):
    args = [tmp_path / "out" if a == "OUT" else whole if a == "WHOLE" else a for a in args]
    code, err = cli(capsys, *args)
    assert code == 2 and option in one_line(err)
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("value", ["1_0", "\uff12", "\u00b2"])
def test_whole_number_options_take_ascii_digits_only(capsys, tmp_path, value):
    code, err = cli(capsys, "simulate", PILOT, "--out", tmp_path / "o", "--observers", value)
    assert code == 2 and "--observers" in one_line(err) and "0-9" in err
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("command", ["simulate", "run"])
def test_out_that_is_empty_or_a_file_names_the_option(capsys, tmp_path, monkeypatch, command):
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("DISPLAY", raising=False)   # run refuses before opening a screen
    who = ["--observer", "P01"] if command == "run" else []
    afile = tmp_path / "afile"
    afile.write_text("x")
    for out, words in (("", "is empty"), (afile, "is a file")):
        code, err = cli(capsys, command, PILOT, *who, "--out", out)
        line = one_line(err)
        assert code == 2 and "--out" in line and words in line
    assert afile.read_text() == "x" and sorted(p.name for p in tmp_path.iterdir()) == ["afile"]


def test_an_existing_later_observer_is_refused_before_any_is_written(capsys, tmp_path, whole):
    out = tmp_path / "o"
    out.mkdir()
    for name in ("sim02-s1.trials.csv", "sim02-s1.session.json"):
        (out / name).write_bytes((whole / name).read_bytes())
    before = sorted(p.name for p in out.iterdir())
    code, err = cli(capsys, "simulate", PILOT, "--out", out, *PILOT_ARGS)
    assert code == 2 and "sim02-s1.trials.csv" in one_line(err)
    assert sorted(p.name for p in out.iterdir()) == before


def test_a_sidecar_model_value_that_is_not_a_number_names_its_field(capsys, tmp_path, whole):
    out = _copy(whole, tmp_path / "o", rows=30)
    side = json.loads((out / SIDE).read_text())
    side["base_model"]["spread_deg"] = "wide"
    (out / SIDE).write_text(json.dumps(side))
    code, err = cli(capsys, "simulate", PILOT, "--out", out, "--observers", "2", "--resume")
    line = one_line(err)
    assert code == 2 and f"{SIDE}: base_model.spread_deg: malformed sidecar" in line and "'wide'" in line


def test_check_prints_the_duration_and_refuses_a_40_million_trial_protocol(capsys, tmp_path):
    huge = tmp_path / "huge.toml"
    offsets = ", ".join(str(x) for x in range(-96, 97, 3) if x)
    huge.write_text(PILOT.read_text().split("[design]")[0] + f"""
[design]
adapter_offsets_deg = [{offsets}]
lags = [{", ".join(str(k) for k in range(32))}]
tracks_per_condition = 8
trials_per_track = 10000
""" + "[procedure]" + PILOT.read_text().split("[procedure]")[1])
    capsys.readouterr()
    code = main(["check", str(huge)])
    out, err = capsys.readouterr()
    assert code == 2 and "min" in out and "trials" in out
    assert "split" in one_line(err)
    code, err = cli(capsys, "simulate", huge, "--out", tmp_path / "o")
    assert code == 2 and "split" in one_line(err)


def test_offsets_that_would_share_a_condition_name_are_refused(capsys, tmp_path):
    text = PILOT.read_text()
    bad = tmp_path / "twins.toml"
    bad.write_text(re.sub(r"adapter_offsets_deg\s*=\s*\[[^\]]*\]", "adapter_offsets_deg = [30, 30.000000000000004]",
                          text))
    code, err = cli(capsys, "check", bad)
    assert code == 2 and "adapter_offsets_deg" in one_line(err)


def test_compare_refuses_a_missing_prediction_and_leaves_out_interval_statistics(capsys, tmp_path, whole):
    fit = tmp_path / "fit"
    assert cli(capsys, "fit", whole, "--out", fit, "--bootstrap", "0", "--no-figures")[0] == 0
    pred = tmp_path / "pred.csv"
    pred.write_text("lag,adapter_offset_deg,pse_shift_deg\n0,-30,-2\n0,30,nan\n2,-30,-1\n2,30,1\n")
    code, err = cli(capsys, "compare", fit, pred, "--out", tmp_path / "cmp")
    assert code == 2 and "line 3" in one_line(err) and "pse_shift_deg" in err
    pred.write_text("lag,adapter_offset_deg,pse_shift_deg\n0,-30,-2\n0,30,2\n2,-30,-1\n2,30,1\n")
    capsys.readouterr()
    code = main(["compare", str(fit), str(pred), "--out", str(tmp_path / "cmp")])
    out, err = capsys.readouterr()
    assert code == 0 and " 0% of" not in out and "left out" in out
    table = (tmp_path / "cmp" / "agreement.csv").read_text().splitlines()
    header = table[0].split(",")
    observers = [row.split(",") for row in table[1:] if not row.startswith("group")]
    assert observers and all(row[header.index("inside_ci_fraction")] == "" for row in observers)


# --- outputs written whole, as a set, readable by colleagues ----------------------------------------------------


def test_refit_replaces_the_earlier_fit_as_a_set_and_keeps_other_files(capsys, tmp_path, whole):
    out = tmp_path / "fit"
    assert cli(capsys, "fit", whole / NAME, "--out", out, "--bootstrap", "0")[0] == 0
    first = {p.relative_to(out) for p in out.rglob("*") if p.is_file()}
    assert any(p.parts[0] == "figures" for p in first)
    (out / "my_notes.txt").write_text("keep me")
    assert cli(capsys, "fit", whole, "--out", out, "--bootstrap", "0", "--no-figures")[0] == 0
    second = {p.relative_to(out) for p in out.rglob("*") if p.is_file()}
    assert not (out / "figures").exists(), "a figure of the earlier fit survived"
    assert "sim02" in (out / "pse.csv").read_text()
    assert (out / "my_notes.txt").read_text() == "keep me"
    manifest = json.loads((out / "outputs.json").read_text())
    assert set(manifest["files"]) | {"outputs.json", "my_notes.txt"} == {str(p) for p in second}
    assert leftovers(out) == []
    # a manifest edited by hand cannot make a fit delete data
    (out / NAME).write_bytes((whole / NAME).read_bytes())
    (out / "outputs.json").write_text(json.dumps({"files": [NAME, "../x.txt", "pse.csv"]}))
    (tmp_path / "x.txt").write_text("outside")
    assert cli(capsys, "fit", whole / NAME, "--out", out, "--bootstrap", "0", "--no-figures")[0] == 0
    assert (out / NAME).exists() and (tmp_path / "x.txt").exists()


def test_a_folder_of_another_command_is_refused_and_kept(capsys, tmp_path, whole):
    # a set replaces the earlier set of its own command; written into another command's folder it would
    # remove that command's files with it (a comparison into the fit folder deleted the fit's tables)
    fit, cmp = tmp_path / "fit", tmp_path / "cmp"
    assert cli(capsys, "fit", whole, "--out", fit, "--bootstrap", "0", "--no-figures")[0] == 0
    pred = tmp_path / "pred.csv"
    pred.write_text("lag,adapter_offset_deg,pse_shift_deg\n0,-30,-2\n0,30,2\n2,-30,-1\n2,30,1\n")
    assert cli(capsys, "compare", fit, pred, "--out", cmp)[0] == 0
    files = lambda: {p: p.read_bytes() for p in (*fit.rglob("*"), *cmp.rglob("*")) if p.is_file()}  # noqa: E731
    before = files()          # the comparison holds its copy of the fit in cmp/fit/
    for args, folder, earlier in ((("compare", fit, pred), fit, "fit"),
                                  (("fit", whole, "--bootstrap", "0", "--no-figures"), cmp, "compare")):
        code, err = cli(capsys, *args, "--out", folder)
        assert code == 2 and f"holds the outputs of `aftershift {earlier}`" in one_line(err), err
    assert files() == before
    assert leftovers(fit) == [] and leftovers(cmp) == []
    # manifests written before plan and recover named themselves said "study": either may replace them
    from fitting.errors import InputError
    from fitting.outputs import check_out_dir

    legacy = tmp_path / "old"
    legacy.mkdir()
    (legacy / "outputs.json").write_text('{"command": "study", "files": []}')
    check_out_dir(legacy, "plan")
    check_out_dir(legacy, "recover")
    with pytest.raises(InputError, match="`aftershift plan` or `aftershift recover`"):
        check_out_dir(legacy, "fit")


def test_a_set_waits_for_the_folder_lock_and_lands_after_it(tmp_path, whole):
    # a second command moving its set into a folder waits while another holds the folder (here: this test,
    # as a reading compare or a committing fit would), then lands whole
    import fcntl
    import subprocess
    import sys

    out = tmp_path / "fit"
    out.mkdir()
    fd = os.open(out, os.O_RDONLY | os.O_DIRECTORY)
    fcntl.flock(fd, fcntl.LOCK_SH)
    try:
        proc = subprocess.Popen([sys.executable, "-m", "runner.cli", "fit", str(whole), "--out", str(out),
                                 "--bootstrap", "0", "--no-figures"], stdout=subprocess.DEVNULL,
                                stderr=subprocess.PIPE, text=True)
        line = proc.stderr.readline()
        assert line.strip() == f"aftershift: waiting for another command using {out}"
        assert proc.poll() is None and not (out / "outputs.json").exists()
    finally:
        os.close(fd)
    assert proc.wait(timeout=120) == 0 and proc.stderr.read() == ""
    assert (out / "outputs.json").exists() and leftovers(out) == []


@pytest.mark.slow    # two fits in subprocesses
def test_of_two_fits_into_one_folder_at_once_the_later_says_it_replaced_the_other(capsys, tmp_path, whole):
    # both said "written to", and the folder held the set of the one that moved in last, unannounced (a
    # hostile-user sweep found it); now the later one says so in a note. Both wait at the folder (held
    # here) so that both have started before either moves in.
    import fcntl
    import subprocess
    import sys

    out = tmp_path / "fit"
    out.mkdir()
    fd = os.open(out, os.O_RDONLY | os.O_DIRECTORY)
    fcntl.flock(fd, fcntl.LOCK_SH)
    try:
        fits = [subprocess.Popen([sys.executable, "-m", "runner.cli", "fit", str(whole), "--out", str(out),
                                  "--bootstrap", "0", "--lapse", lapse, "--no-figures"],
                                 stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
                for lapse in ("0.01", "0.02")]
        for proc in fits:
            assert proc.stderr.readline().strip() == f"aftershift: waiting for another command using {out}"
    finally:
        os.close(fd)
    said = [proc.communicate(timeout=120)[1] for proc in fits]
    assert [proc.returncode for proc in fits] == [0, 0]
    noted = [i for i, err in enumerate(said) if "moved its outputs into this folder while this one ran" in err]
    assert len(noted) == 1
    later = [line for line in said[noted[0]].splitlines() if not line.startswith("aftershift: waiting for")]
    assert len(later) == 1 and later[0].startswith(f"note: {out}: another `aftershift fit` moved its outputs")
    assert f"lapse fixed at 0.0{noted[0] + 1}," in (out / "summary.txt").read_text()   # the noting one's set
    # a fit after an earlier one has ended replaces it without the note
    assert cli(capsys, "fit", whole, "--out", out, "--bootstrap", "0", "--no-figures")[0] == 0
    assert "while this one ran" not in capsys.readouterr().err


def test_tables_follow_the_umask(capsys, tmp_path, whole):
    old = os.umask(0o022)
    try:
        assert cli(capsys, "fit", whole, "--out", tmp_path / "fit", "--bootstrap", "0", "--no-figures")[0] == 0
    finally:
        os.umask(old)
    for p in (tmp_path / "fit").iterdir():
        assert stat.S_IMODE(p.stat().st_mode) == 0o644, p


def test_interrupted_fit_leaves_the_earlier_fit_untouched(capsys, tmp_path, whole, monkeypatch):
    out = tmp_path / "fit"
    assert cli(capsys, "fit", whole, "--out", out, "--bootstrap", "0", "--no-figures")[0] == 0
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    from fitting import tables

    real = tables.write_csv
    calls = {"n": 0}

    def interrupted(*a, **k):
        calls["n"] += 1
        if calls["n"] == 3:
            raise KeyboardInterrupt
        return real(*a, **k)

    monkeypatch.setattr("fitting.report.write_csv", interrupted)
    code, err = cli(capsys, "fit", whole, "--out", out, "--bootstrap", "0", "--no-figures", "--seed", "3")
    assert code == 130 and one_line(err).startswith("aftershift fit: interrupted")
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
    assert leftovers(out) == []


def test_run_refuses_a_held_session_before_opening_any_window(capsys, tmp_path, monkeypatch):
    from runner.session_lock import SessionLock

    monkeypatch.delenv("DISPLAY", raising=False)  # the lock is checked first, so no screen is needed to see it
    log = tmp_path / "P01-s1.trials.csv"
    with SessionLock(log):
        code, err = cli(capsys, "run", PILOT, "--observer", "P01", "--out", tmp_path)
    assert code == 2 and "another session is writing" in one_line(err) and f"process {os.getpid()}" in err


def test_staging_folder_of_a_killed_fit_is_removed_by_the_next(capsys, tmp_path, whole):
    out = tmp_path / "fit"
    left = out / f".staging-{2**22 + 23}-abc"  # as a fit killed with SIGKILL mid-write leaves it
    (left / "figures").mkdir(parents=True)
    (left / "pse.csv").write_text("observer,cond")
    assert cli(capsys, "fit", whole, "--out", out, "--bootstrap", "0", "--no-figures")[0] == 0
    assert not left.exists() and leftovers(out) == []


_MOVE_DRIVER = """
import os, signal, sys
import fitting.outputs as o
from runner.cli import console
how, after = sys.argv[1], int(sys.argv[2])
real, done = o.os.replace, [0]
def replace(src, dst):
    real(src, dst)
    done[0] += "/.staging-" in str(src) and "/.staging-" not in str(dst)    # a staged file moved in
    if done[0] == after:
        if how == "kill":
            os._exit(137)                        # as kill -9 leaves it: no clean-up at all
        os.kill(os.getpid(), signal.SIGTERM)     # SIGTERM in the middle of the move
o.os.replace = replace
sys.argv = ["aftershift"] + sys.argv[3:]
sys.exit(console())
"""


def _files(folder: Path) -> dict:
    return {str(p.relative_to(folder)): p.read_bytes() for p in folder.rglob("*") if p.is_file()}


_MOVE_FIT = ["--bootstrap", "0", "--no-figures", "--out", "fit"]


@pytest.fixture(scope="module")
def earlier_and_clean_fits(tmp_path_factory, whole) -> tuple[Path, Path]:
    """``whole`` fitted with seed 1 (the earlier fit a new one replaces) and with seed 2 (that new fit, clean)."""
    import subprocess
    import sys

    folders = tmp_path_factory.mktemp("earlier") / "fit", tmp_path_factory.mktemp("clean") / "fit"
    for folder, seed in zip(folders, ("1", "2")):       # one name, "fit": the pages name the folder
        assert subprocess.run([sys.executable, "-m", "runner.cli", "fit", str(whole), *_MOVE_FIT, "--seed", seed],
                              cwd=folder.parent, capture_output=True).returncode == 0
    return folders


def _fit_moved_with(how: str, tmp_path: Path, whole: Path, earlier_and_clean_fits: tuple[Path, Path]):
    """Fit ``whole`` with seed 2 over a copy of the earlier fit, stopped (``how``) after 4 files moved in."""
    import subprocess
    import sys

    earlier, clean = earlier_and_clean_fits
    out = tmp_path / "moved" / "fit"
    shutil.copytree(earlier, out, symlinks=True)
    proc = subprocess.run([sys.executable, "-c", _MOVE_DRIVER, how, "4", "fit", str(whole), *_MOVE_FIT, "--seed",
                           "2"], cwd=out.parent, capture_output=True, text=True)
    return proc, out, clean


@pytest.mark.slow    # fits in subprocesses
def test_a_fit_killed_while_moving_its_set_in_is_finished_by_the_next_reader(capsys, tmp_path, whole,
                                                                              earlier_and_clean_fits, monkeypatch):
    # kill -9 between two renames left a mix of the earlier and the new fit's tables (a hostile-user sweep
    # found it); the journal lets compare (or the next fit) finish the move, so the folder is the new set
    from fitting.outputs import PENDING

    proc, out, clean = _fit_moved_with("kill", tmp_path, whole, earlier_and_clean_fits)
    assert proc.returncode == 137 and (out / PENDING).exists()
    assert _files(out) != _files(clean) | {PENDING: (out / PENDING).read_bytes()}    # a mix, until settled
    gone = tmp_path / "gone" / "fit"
    shutil.copytree(out, gone, symlinks=True)
    # after a power cut and a reboot another process may have the dead one's pid (here: 1, always alive);
    # under the folder's lock no command is moving a set in, so the move is finished all the same
    journal = json.loads((out / PENDING).read_text())
    (out / journal["stage"]).rename(out / ".staging-1-reused")
    (out / PENDING).write_text(json.dumps({**journal, "stage": ".staging-1-reused"}))
    pred = tmp_path / "pred.csv"
    pred.write_text("lag,adapter_offset_deg,pse_shift_deg\n0,-30,-2\n0,30,2\n2,-30,-1\n2,30,1\n")
    assert cli(capsys, "compare", out, pred, "--out", tmp_path / "cmp")[0] == 0
    assert _files(out) == _files(clean) and leftovers(out) == []       # no staging folder left either
    # with its staging folder gone the move cannot be finished: a reader refuses in one line, a new fit replaces
    out = gone
    for stage in out.glob(".staging-*"):
        shutil.rmtree(stage)
    code, err = cli(capsys, "compare", out, pred, "--out", tmp_path / "cmp2")
    assert code == 2 and PENDING in one_line(err) and "run that command again" in err
    monkeypatch.chdir(out.parent)
    assert cli(capsys, "fit", whole, "--out", "fit", "--bootstrap", "0", "--no-figures", "--seed", "2")[0] == 0
    assert _files(out) == _files(clean) and leftovers(out) == []


@pytest.mark.slow    # fits in subprocesses
def test_sigterm_while_a_set_is_moved_in_waits_for_the_whole_set(tmp_path, whole, earlier_and_clean_fits):
    from fitting.outputs import PENDING

    proc, out, clean = _fit_moved_with("term", tmp_path, whole, earlier_and_clean_fits)
    assert proc.returncode == 130, proc.stderr
    assert one_line(proc.stderr) == "aftershift fit: stopped by SIGTERM after its outputs were written in full to fit"
    assert _files(out) == _files(clean) and not (out / PENDING).exists() and leftovers(out) == []


@pytest.mark.slow    # three fits
def test_a_manifest_or_journal_cannot_reach_files_through_a_linked_folder(capsys, tmp_path, whole):
    out, victim = tmp_path / "fit", tmp_path / "victim"
    victim.mkdir()
    (victim / "notes.txt").write_text("not the fit's")
    assert cli(capsys, "fit", whole, "--out", out, "--bootstrap", "0", "--no-figures")[0] == 0
    (out / "lnk").symlink_to(victim)
    manifest = json.loads((out / "outputs.json").read_text())
    (out / "outputs.json").write_text(json.dumps({**manifest, "files": manifest["files"] + ["lnk/notes.txt"]}))
    assert cli(capsys, "fit", whole, "--out", out, "--bootstrap", "0", "--no-figures")[0] == 0
    assert (victim / "notes.txt").read_text() == "not the fit's"
    # nor can a journal whose staging folder is a link move files in from outside (the next fit then
    # overwrote them); a journal whose own writing was cut short leaves nothing behind the next command
    from fitting.outputs import PENDING

    (victim / "pse.csv").write_text("precious")
    (out / ".staging-999999-x").symlink_to(victim)
    (out / PENDING).write_text(json.dumps({"stage": ".staging-999999-x", "files": ["pse.csv"], "previous": []}))
    (out / f".{PENDING}.cut").write_text('{"stage": ".stag')
    assert cli(capsys, "fit", whole, "--out", out, "--bootstrap", "0", "--no-figures")[0] == 0
    assert (victim / "pse.csv").read_text() == "precious" and (victim / "notes.txt").exists()
    assert not (out / PENDING).exists() and leftovers(out) == []


def test_replicates_that_would_not_fit_in_memory_are_refused():
    from fitting.bootstrap import check_replicate_memory
    from fitting.errors import InputError

    check_replicate_memory(100_000, 33, memory_bytes=24 * 2**30)  # one observer of the default protocol fits
    with pytest.raises(InputError, match="--bootstrap.*at most 64,424"):
        check_replicate_memory(100_000, 1000, memory_bytes=24 * 2**30)  # 1,000 conditions: 18.6 GiB


def test_a_simulate_stopped_before_any_log_says_nothing_was_recorded(tmp_path):
    # before: "every completed trial is in the log; continue with --resume", where no log existed and that
    # resume was refused for want of a seed
    from types import SimpleNamespace

    from runner.cli import Terminated, _interrupted_line

    args = SimpleNamespace(command="simulate", protocol=str(PILOT), out=str(tmp_path / "none"), session="s1",
                           observers=2, seed=None, model=None, resume=False, flicker_ack=False)
    assert _interrupted_line(args, Terminated()) == "stopped by SIGTERM; nothing was recorded; run the same command again"
