"""End to end on a real window: ``aftershift run --windowed`` answered by key presses.

Each command runs as a separate process on its own Xvfb; a driver finds the
window with ``xdotool search`` and sends keys to it with
``xdotool key --window`` — space past the screens, arrows as answers, Escape
in the middle of the session — then the session is resumed and must end with
as many trials as an uninterrupted one.  ``aftershift display-test`` is run
the same way.
"""

from __future__ import annotations

import csv
import itertools
import json
import subprocess
import sys
import time
from pathlib import Path

import pytest
from conftest_display import DATA, XServer, find_window, own_x_server, require_xdotool, send_key  # noqa: F401

from runner import safety
from runner.protocol import load_protocol

pytestmark = [pytest.mark.display, pytest.mark.slow]

ROOT = Path(__file__).resolve().parent.parent
TINY = DATA / "display_tiny.toml"

#: The required trial-log columns (README, Output files).
REQUIRED = (
    "observer session trial condition adapter_offset_deg lag track test_offset_deg "
    "response_cw rt_s dropped_frames timing_ok"
).split()


def start(args, env) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "runner.cli", *map(str, args)], cwd=ROOT, env=env,
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
    )


def rows_in(log: Path) -> list[dict]:
    if not log.exists():
        return []
    with log.open(newline="", encoding="utf-8") as f:
        return list(csv.DictReader(f))


def drive(process, env, log: Path, escape_after: int | None = None, timeout_s: float = 75.0):
    """Press keys like a patient observer until the program ends.

    Every 0.25 s the next of space, right, space, left is sent: spaces pass
    the screens, arrows answer; keys that do not fit the moment are ignored
    by the program.  With ``escape_after``, Escape is sent once the log holds
    that many trials.
    """
    window = find_window("aftershift", env, process=process)
    keys = itertools.cycle(["space", "right", "space", "left"])
    end = time.monotonic() + timeout_s
    while process.poll() is None:
        if time.monotonic() > end:
            process.kill()
            raise AssertionError(f"the session did not end within {timeout_s:g} s")
        if escape_after is not None and len(rows_in(log)) >= escape_after:
            send_key(window, "escape", env)
        else:
            send_key(window, next(keys), env)
        time.sleep(0.25)
    out, err = process.communicate()
    return process.returncode, out, err


def expected_trials(protocol) -> int:
    d = protocol.design
    conditions = 1 + len(d.adapter_offsets_deg) * len(d.lags)  # baseline + offsets x lags
    return d.practice_trials + conditions * d.tracks_per_condition * d.trials_per_track


def test_keyboard_session_escape_and_resume(own_x_server, tmp_path):  # noqa: F811
    require_xdotool()
    env = own_x_server.env()
    protocol = load_protocol(TINY)
    total = expected_trials(protocol)
    assert total == 7
    log = tmp_path / "kb01-s1.trials.csv"
    args = ["run", TINY, "--observer", "kb01", "--out", tmp_path, "--windowed", "--seed", "11",
            safety.REFRESH_OVERRIDE_OPTION]

    code, out, err = drive(start(args, env), env, log, escape_after=3)
    assert code == 0, err
    first = rows_in(log)
    assert 3 <= len(first) < total, "Escape should have ended the session early"
    assert "--resume" in out.splitlines()[-1], "after Escape the console should say how to continue"

    # The resume draws on a fresh X server: no window id, key event or window of the first process can
    # reach it.  (One CI run saw the resumed session end with exit 0 and no trial added; it did not recur
    # in 30 runs under load, and its cause was not found.  If it recurs, the message below shows what the
    # program printed.)
    second_server = XServer()
    try:
        env = second_server.env()
        code, out, err = drive(start([*args, "--resume"], env), env, log)
    finally:
        second_server.stop()
    assert code == 0, err
    rows = rows_in(log)
    assert len(rows) == total, f"the resumed session ended early; it printed:\n{out}\n{err}"
    assert rows[: len(first)] == first, "resuming changed trials already logged"
    assert [int(r["trial"]) for r in rows] == list(range(1, total + 1))
    for row in rows:
        assert set(REQUIRED) <= set(row)
        assert row["observer"] == "kb01"
        assert row["response_cw"] in ("0", "1"), row  # a key arrives every 0.5 s, the window is 4 s
        assert 0 < float(row["rt_s"]) < protocol.timing.test_s + protocol.timing.answer_window_s
        assert int(row["dropped_frames"]) >= 0
        assert row["timing_ok"] == ("true" if int(row["dropped_frames"]) == 0 else "false")
    assert rows[0]["practice"] == "1" and all(r["practice"] == "0" for r in rows[1:])

    sidecar = json.loads((tmp_path / "kb01-s1.session.json").read_text(encoding="utf-8"))
    timings = [part["timing"] for part in sidecar["parts"]]
    assert len(timings) == 2
    for timing in timings:
        assert timing["presenter"] == "screen" and timing["refresh_override"] is True
        assert timing["refresh_hz"] == 60.0 and timing["trials"] >= 1


def test_run_without_override_is_refused_on_an_unsynced_display(own_x_server, tmp_path):  # noqa: F811
    """Xvfb flips without vsync, far from 60 Hz: the session is refused (exit 3) and nothing is written."""
    process = start(["run", TINY, "--observer", "kb02", "--out", tmp_path, "--windowed"], own_x_server.env())
    out, err = process.communicate(timeout=60)
    assert process.returncode == 3, err
    assert safety.REFRESH_OVERRIDE_OPTION in err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert err.startswith(f"aftershift: {TINY}: display.refresh_hz: "), err   # before, without the file
    assert not (tmp_path / "kb02-s1.trials.csv").exists()


def test_display_test_reports_timing(own_x_server, tmp_path):  # noqa: F811
    report_path = tmp_path / "timing" / "display.json"
    process = start(["display-test", "--seconds", "1", "--windowed", "--report", report_path, TINY], own_x_server.env())
    out, err = process.communicate(timeout=60)
    report = json.loads(report_path.read_text(encoding="utf-8"))
    assert process.returncode == (0 if report["verdict_ok"] else 3), err
    assert f"verdict: {report['verdict']}" in out
    protocol = load_protocol(TINY)
    assert report["n_dots"] == protocol.dots.n_dots and report["refresh_hz_protocol"] == 60.0
    assert report["frames"] > 0 and report["seconds_measured"] >= 1.0
    # the mean interval is the measured time over the frames shown
    assert report["frame_interval_mean_ms"] == pytest.approx(1e3 * report["seconds_measured"] / report["frames"], rel=1e-3)
    assert report["frame_interval_sd_ms"] <= report["frame_interval_max_ms"]
    mismatch = safety.check_refresh(report["refresh_hz_measured"], 60.0) is not None
    assert report["refresh_within_tolerance"] is (not mismatch)
    assert report["flips_unsynced"] is (report["refresh_hz_measured"] > 1.5 * 60.0)
    assert not (report["flips_unsynced"] and report["refresh_within_tolerance"])
    assert report["verdict_ok"] is (not mismatch and report["dropped_frames"] == 0)


def test_display_test_stopped_at_once_gives_no_verdict(own_x_server, tmp_path):  # noqa: F811
    # before, Escape after a few frames of a 20 s test printed "verdict: ok" and exit 0, without a word of the stop
    require_xdotool()
    env = own_x_server.env()
    report_path = tmp_path / "display.json"
    process = start(["display-test", "--seconds", "20", "--windowed", "--report", report_path, TINY], env)
    window = find_window("aftershift", env, process=process)
    deadline = time.monotonic() + 30
    while process.poll() is None and time.monotonic() < deadline:    # keys during the refresh measurement are
        send_key(window, "escape", env)                               # dropped: press until it stops
        time.sleep(0.1)
    out, err = process.communicate(timeout=60)
    report = json.loads(report_path.read_text(encoding="utf-8"))
    assert report["stopped_early"] is True and report["seconds_measured"] < 1.0, report
    assert report["verdict_ok"] is False and report["verdict"].startswith("no verdict: stopped by the quit key")
    assert process.returncode == 3, err
