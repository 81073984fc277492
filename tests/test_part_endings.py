"""How a session's part ends in its sidecar, and what `run` checks before it opens the display.

A part can end between a row's write and the update of its track (a signal
lands anywhere), on a disk that fills up, or by a refusal.  The sidecar must
then describe the log as it is: its rows, and the track states those rows
give when replayed (the resume contract in the README: a resume continues
exactly where the log ends).  The rules are common practice for crash-safe
logs, no source.  Full disks are real: a small tmpfs filled to the last byte.
"""

from __future__ import annotations

import argparse
import csv
import json
import os
import shutil
from pathlib import Path

import pytest

from conftest import PROTOCOLS
from fault_helpers import PILOT, cli, logs, one_line, tmpfs
from runner import cli as cli_module
from runner.light import light_plan
from runner.protocol import load_protocol, parse_protocol
from runner.session import BlockRun
from runner.session_lock import SessionLock
from runner.tracks import as_started
from runner.trial_log import TrialLog

NAME = "sim01-s1.trials.csv"
SIDE = "sim01-s1.session.json"
SIM = ["--observers", "1", "--seed", "5"]


def _stop_after_writing(monkeypatch, rows: int, then) -> None:
    """Call ``then()`` right after the ``rows``-th row of this process reached the log (before its track's update)."""
    real, count = TrialLog.append, {"n": 0}

    def append(self, row):
        real(self, row)
        count["n"] += 1
        if count["n"] == rows:
            then()

    monkeypatch.setattr(TrialLog, "append", append)


def _interrupt():
    raise KeyboardInterrupt


def _replayed_states(out: Path) -> dict:
    """The track states the log's rows give, replayed through the protocol and seed the sidecar records."""
    side = json.loads((out / SIDE).read_text())
    protocol = parse_protocol(side["protocol"]["text"], source=str(PILOT))
    with (out / NAME).open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    run = BlockRun(as_started(protocol, side, SIDE), side["session_seed"], "sim01", "s1")
    run.replay(rows, NAME)
    return run.track_states()


def test_an_interrupted_part_records_the_track_states_of_its_log(capsys, tmp_path, monkeypatch):
    # before: the first part's sidecar had no track_states at all, and after a resume stopped again they still
    # described the log as the first part left it (5 rows, while it held 9)
    out = tmp_path / "o"
    _stop_after_writing(monkeypatch, 5, _interrupt)
    assert cli(capsys, "simulate", PILOT, "--out", out, *SIM)[0] == 130
    side = json.loads((out / SIDE).read_text())
    assert side["rows_total"] == 5 and side["parts"][-1]["ended_by"] == "interrupted"
    assert side["track_states"] == _replayed_states(out)

    _stop_after_writing(monkeypatch, 4, _interrupt)
    assert cli(capsys, "simulate", PILOT, "--out", out, *SIM, "--resume")[0] == 130
    side = json.loads((out / SIDE).read_text())
    assert side["rows_total"] == 9 and [p["rows_added"] for p in side["parts"]] == [5, 4]
    assert side["track_states"] == _replayed_states(out)


def _fill(folder: Path) -> None:
    """Take every free byte of the file system holding ``folder``."""
    fd = os.open(folder.parent / "filler", os.O_WRONLY | os.O_CREAT | os.O_APPEND)
    try:
        while os.write(fd, b"\0" * 4096):
            pass
    except OSError:
        pass
    finally:
        os.close(fd)


def test_a_disk_that_fills_during_a_session_is_recorded_as_disk_full(capsys, tmp_path, monkeypatch):
    # before: the sidecar's last write needed space the full disk did not have; the part stayed `running`
    # without rows_total, and the next resume called it `vanished`
    small = tmp_path / "small"
    with tmpfs(small, "200k"):
        out = small / "f"
        _stop_after_writing(monkeypatch, 6, lambda: _fill(out))
        code, err = cli(capsys, "simulate", PILOT, "--out", out, *SIM)
        assert code == 2 and "disk is full" in one_line(err) and "--resume" in err
        side = json.loads((out / SIDE).read_text())
        rows = (out / NAME).read_bytes().count(b"\n") - 1     # the log's last page still took a few rows
        assert side["parts"][-1]["ended_by"] == "disk full" and side["rows_total"] == rows >= 6
        assert side["track_states"] == _replayed_states(out)
        assert not (out / (SIDE + ".tmp")).exists()      # the room kept for the sidecar is given back


def test_a_disk_that_fills_with_the_last_row_still_records_the_completed_session(capsys, tmp_path, monkeypatch,
                                                                                  ):
    # before: every row was written but the sidecar's last write failed: "disk full" blamed on the sidecar,
    # the part left `running`, and the resume recorded it as `vanished` plus an empty `completed` part
    whole = tmp_path / "whole"
    assert cli(capsys, "simulate", PILOT, "--out", whole, *SIM)[0] == 0
    total = (whole / NAME).read_bytes().count(b"\n") - 1
    small = tmp_path / "small"
    with tmpfs(small, "200k"):
        out = small / "f"
        _stop_after_writing(monkeypatch, total, lambda: _fill(out))
        code, err = cli(capsys, "simulate", PILOT, "--out", out, *SIM)
        assert code == 0, err
        side = json.loads((out / SIDE).read_text())
        assert [(p["ended_by"], p["rows_added"]) for p in side["parts"]] == [("completed", total)]
        assert logs(out) == logs(whole)


def _screen_session(whole: Path, out: Path, rows: int, protocol_path: Path) -> None:
    """A person's session P01 as a run stopped after ``rows`` trials leaves it (made from a simulated one)."""
    out.mkdir(parents=True, exist_ok=True)
    side = json.loads((whole / SIDE).read_text())
    lines = (whole / NAME).read_bytes().replace(b"sim01,", b"P01,").splitlines(keepends=True)[: rows + 1]
    (out / "P01-s1.trials.csv").write_bytes(b"".join(lines))
    side.update(kind="screen", observer="P01", rows_total=rows)
    side["protocol"]["path"] = str(protocol_path)
    side["parts"] = [{**side["parts"][0], "ended_by": "interrupted", "rows_added": rows}]
    (out / "P01-s1.session.json").write_text(json.dumps(side))


@pytest.fixture(scope="module")
def pilot_whole(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("pilot")
    assert cli_module.main(["simulate", str(PILOT), "--out", str(out), *SIM]) == 0
    return out


@pytest.mark.parametrize("change", ["protocol", "seed"])
def test_run_refuses_a_resume_its_sidecar_rules_out_before_any_window(capsys, tmp_path, monkeypatch, pilot_whole,
                                                                       change):
    # before: the window opened full screen and measured the refresh rate (a black flash, about a second) before
    # these refusals; the seed's said "started with --seed N" of a seed that was drawn at random
    monkeypatch.delenv("DISPLAY", raising=False)     # no screen: a window opened would fail the test
    protocol = tmp_path / "pilot.toml"
    protocol.write_text(PILOT.read_text() + ("# a comment added later\n" if change == "protocol" else ""))
    out = tmp_path / "o"
    _screen_session(pilot_whole, out, 20, protocol)
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    extra = ["--seed", "12345"] if change == "seed" else []
    code, err = cli(capsys, "run", protocol, "--observer", "P01", "--out", out, "--resume", *extra)
    line = one_line(err)
    assert code == 2 and "P01-s1.session.json" in line
    if change == "protocol":
        assert "protocol.sha256" in line
    else:
        seed = json.loads(before["P01-s1.session.json"])["seed"]
        assert f"seed is {seed}" in line and "not --seed 12345" in line and "with --seed" not in line
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before


@pytest.mark.slow    # simulates, and fits a profile again
def test_a_light_profile_is_compared_by_its_grey_levels(capsys, tmp_path):
    # before: any edit of the profile file, a comment too, was refused as "its grey levels would change"
    from runner.launch import check_resume

    folder = tmp_path / "protocols"
    shutil.copytree(PROTOCOLS / "light", folder / "light")
    protocol = folder / "calibrated_luminance.toml"
    shutil.copy(PROTOCOLS / "calibrated_luminance.toml", protocol)
    out = tmp_path / "o"
    assert cli_module.main(["simulate", str(protocol), "--out", str(out), *SIM]) == 0
    text = protocol.read_text()
    profile = folder / "light" / "example_profile.toml"
    original = profile.read_text()

    profile.write_text(original + "# re-read on a later day, nothing changed\n")
    check_resume(out, "sim01", "s1", text, light_plan(load_protocol(protocol)).sidecar(), None)
    assert "same grey levels" in one_line(capsys.readouterr().err)

    # the display measured again, 10 % dimmer (a gamma edited by hand is refused where the profile is read,
    # tests/test_light.py)
    readings = (PROTOCOLS / "light" / "example_readings.csv").read_text().splitlines()
    header = readings[0].split(",")
    at = header.index("luminance_cd_m2")
    dimmer = [",".join(f"{float(c) * 0.9:.4f}" if i == at else c for i, c in enumerate(line.split(",")))
              for line in readings[1:]]
    (tmp_path / "again.csv").write_text("\n".join([readings[0], *dimmer]) + "\n")
    assert cli_module.main(["measure-light", "--readings", str(tmp_path / "again.csv"), "--out", str(profile)]) == 0
    capsys.readouterr()
    with pytest.raises(cli_module.InputError) as refused:
        check_resume(out, "sim01", "s1", text, light_plan(load_protocol(protocol)).sidecar(), None)
    assert refused.value.field == "light.profile_sha256" and "other grey levels" in refused.value.message


def test_run_resume_of_a_session_that_never_existed_says_so(capsys, tmp_path, monkeypatch):
    # before: "seed: is missing, so the seed this session started with is unknown (the run stopped before writing
    # it); resume with --seed" for an observer who never had a session here
    monkeypatch.delenv("DISPLAY", raising=False)
    for extra in ([], ["--seed", "3"]):
        code, err = cli(capsys, "run", PILOT, "--observer", "NEW", "--out", tmp_path / "nothing", "--resume", *extra)
        line = one_line(err)
        assert code == 2 and "no session to resume here" in line and "NEW-s1.trials.csv" in line
    assert not (tmp_path / "nothing").exists()


def test_a_run_stopped_before_its_session_started_says_nothing_was_recorded(tmp_path, pilot_whole):
    # before: "every completed trial is in the log; continue with --resume", and that resume was refused
    # ("seed is missing ... resume with --seed")
    args = argparse.Namespace(command="run", protocol=str(PILOT), observer="P01", out=str(tmp_path / "o"),
                              session="s1", windowed=True, refresh_ack=False, flicker_ack=False)
    line = cli_module._interrupted_line(args, cli_module.Terminated())
    assert line.startswith("stopped by SIGTERM; the session had not started and nothing was recorded")
    assert "--resume" not in line
    _screen_session(pilot_whole, tmp_path / "o", 20, PILOT)
    line = cli_module._interrupted_line(args, KeyboardInterrupt())
    assert line.startswith("interrupted; every completed trial is in the log")
    assert line.endswith(f"aftershift run {PILOT} --observer P01 --out {tmp_path / 'o'} --windowed --resume")


def test_a_second_run_on_a_session_being_written_names_the_process(capsys, tmp_path, monkeypatch, pilot_whole):
    # before: "already holds this session; pass --resume to continue it", and with --resume the lock refused it
    monkeypatch.delenv("DISPLAY", raising=False)
    out = tmp_path / "o"
    _screen_session(pilot_whole, out, 20, PILOT)
    with SessionLock(out / "P01-s1.trials.csv"):
        for extra in ([], ["--resume"]):
            code, err = cli(capsys, "run", PILOT, "--observer", "P01", "--out", out, *extra)
            line = one_line(err)
            assert code == 2 and "another session is writing" in line and f"process {os.getpid()}" in line


def _complete_screen_session(tmp_path: Path, monkeypatch, pilot_whole: Path) -> tuple[Path, int]:
    """A person's session with every trial logged, and no display to open (a window would be an error)."""
    monkeypatch.delenv("DISPLAY", raising=False)
    out = tmp_path / "o"
    total = (pilot_whole / NAME).read_bytes().count(b"\n") - 1
    _screen_session(pilot_whole, out, total, PILOT)
    return out, total


def _resume_complete(capsys, out: Path, total: int) -> tuple[str, str]:
    """``run --resume`` of a complete session: exit 0, the one line that says so; returns (stdout, stderr)."""
    capsys.readouterr()
    assert cli_module.main(["run", str(PILOT), "--observer", "P01", "--out", str(out), "--resume"]) == 0
    out_text, err = capsys.readouterr()
    assert out_text == f"session complete already: {total} trials in the log; nothing to resume\n"
    return out_text, err


def test_a_complete_log_whose_last_part_was_never_closed_is_complete_before_any_window(capsys, tmp_path, monkeypatch,
                                                                                       pilot_whole):
    # before: the resume opened the display just to show the end screen and recorded the parts as
    # [vanished, completed with 0 trials] (a part whose every trial was written, then killed at its end screen or
    # refused its sidecar's last write by a full disk)
    out, total = _complete_screen_session(tmp_path, monkeypatch, pilot_whole)
    side = json.loads((out / "P01-s1.session.json").read_text())
    side["parts"][0].update(ended=None, ended_by="running", rows_added=0)
    del side["rows_total"], side["track_states"]
    (out / "P01-s1.session.json").write_text(json.dumps(side))
    log = (out / "P01-s1.trials.csv").read_bytes()
    out_text, err = _resume_complete(capsys, out, total)
    assert one_line(err).startswith("note: ") and "marked vanished" in err
    side = json.loads((out / "P01-s1.session.json").read_text())
    assert [(p["ended_by"], p["rows_added"]) for p in side["parts"]] == [("vanished", total)]
    assert side["rows_total"] == total
    assert side["track_states"] == json.loads((pilot_whole / SIDE).read_text())["track_states"]
    assert (out / "P01-s1.trials.csv").read_bytes() == log


def test_a_signal_while_a_new_session_opens_leaves_nothing_behind(tmp_path, monkeypatch):
    # before: a SIGTERM while the sidecar's record was prepared (reading package versions takes a moment) left
    # the header-only log and the lock's record behind; "run the same command again" was then refused as
    # "already holds this session"
    from runner import launch
    from runner.session import Console

    def interrupted():
        raise KeyboardInterrupt

    monkeypatch.setattr(launch, "package_versions", interrupted)
    with pytest.raises(KeyboardInterrupt):
        launch.run_on_screen(load_protocol(PILOT), str(PILOT), PILOT.read_text(), tmp_path, "P01", None, None, "",
                             Console(), {}, seed=3)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["P01-s1.lock"]
    assert (tmp_path / "P01-s1.lock").read_bytes() == b""     # released: no holder left on record


def test_a_complete_log_whose_last_part_was_interrupted_after_its_last_trial_is_complete(capsys, tmp_path, monkeypatch,
                                                                                        pilot_whole):
    # before: a Ctrl-C after the last trial (while the final quick fit ran) left the part `interrupted`, and the
    # resume opened the display for an end screen and added a `completed` part with 0 trials
    out, total = _complete_screen_session(tmp_path, monkeypatch, pilot_whole)
    _resume_complete(capsys, out, total)
    side = json.loads((out / "P01-s1.session.json").read_text())
    assert [(p["ended_by"], p["rows_added"]) for p in side["parts"]] == [("interrupted", total)]
    assert side["track_states"] == json.loads((pilot_whole / SIDE).read_text())["track_states"]


def _stop_in_the_last_summary(monkeypatch) -> None:
    """A Ctrl-C during the end-of-session summary, once every trial is logged (simulate's last sync)."""
    from runner.console import SimulationConsole

    real = SimulationConsole.block_done

    def block_done(self, rows):
        if len(rows) == self.bar.total:
            raise KeyboardInterrupt
        real(self, rows)

    monkeypatch.setattr(SimulationConsole, "block_done", block_done)


@pytest.mark.parametrize("when", ["after the last row's write", "during the summary"])
def test_a_stop_after_the_last_trial_leaves_the_session_complete(capsys, tmp_path, monkeypatch, pilot_whole, when):
    # before: the part was recorded `interrupted`, the stop line said "to continue: ... --resume", and the
    # sidecar never said the session was complete
    out = tmp_path / "o"
    total = (pilot_whole / NAME).read_bytes().count(b"\n") - 1
    if when == "during the summary":
        _stop_in_the_last_summary(monkeypatch)
    else:
        _stop_after_writing(monkeypatch, total, _interrupt)
    code, err = cli(capsys, "simulate", PILOT, "--out", out, *SIM)
    line = one_line(err)
    assert code == 130 and "--resume" not in line, line
    assert f"every session is complete: all {total} trials are saved in {out} (nothing to resume)" in line
    assert line.endswith(f"to fit them: aftershift fit {out} --out {out / 'fit'}")
    side = json.loads((out / SIDE).read_text())
    assert [(p["ended_by"], p["rows_added"]) for p in side["parts"]] == [("completed", total)]
    assert side["track_states"] == json.loads((pilot_whole / SIDE).read_text())["track_states"]
    assert logs(out) == logs(pilot_whole)

    monkeypatch.undo()
    code, err = cli(capsys, "simulate", PILOT, "--out", out, "--resume")
    assert code == 0 and one_line(err).endswith(f"the session is complete ({total} trials); nothing to resume")
    assert json.loads((out / SIDE).read_text())["parts"] == side["parts"]      # no empty part added
