"""``display-test`` screens its protocol before any window opens, as ``check`` and ``run`` do.

``display-test`` drew a protocol that ``check`` refuses full screen for up to ``--seconds``; both its
timing mode and ``--frames`` (which plays two trials on the window to read their frames back) draw the
protocol's stimulus, so both are screened, and the timing report records the verdict. The on-screen
``measure-light`` draws only a grey patch, never the protocol's dots: it is not screened on them, and it
prints a caution about the patch before its window opens. Each command runs as a separate process on its
own Xvfb. The protocol refused is the 15 Hz on/off field of ``tests/test_safety.py`` (WCAG 2.x SC 2.3.1:
6 general flashes in one second, more than the 3 allowed).
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from pathlib import Path

import pytest
from conftest_display import DATA, find_window, own_x_server, require_xdotool, send_key  # noqa: F401

from runner import safety

pytestmark = [pytest.mark.display, pytest.mark.slow]

ROOT = Path(__file__).resolve().parent.parent
REFUSED = DATA / "safety_flicker_15hz.toml"
TINY = DATA / "display_tiny.toml"
CAUTION = "caution: flashes like these can trigger seizures in people with photosensitive epilepsy"


def start(args, env) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "runner.cli", *map(str, args)], cwd=ROOT, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


@pytest.mark.parametrize("command, written", [
    (["display-test", "--seconds", "20", "--windowed", "--report", "{tmp}/timing.json"], "timing.json"),
    (["display-test", "--windowed", "--frames", "{tmp}/frames"], "frames"),
])
def test_a_refused_protocol_is_refused_before_any_window(own_x_server, tmp_path, command, written):  # noqa: F811
    args = [part.replace("{tmp}", str(tmp_path)) for part in command]
    args.insert(1, str(REFUSED))
    process = start(args, own_x_server.env())
    out, err = process.communicate(timeout=60)
    assert process.returncode == 3, err
    assert err.startswith(f"aftershift: {REFUSED}: refused for safety: ") and len(err.strip().splitlines()) == 1, err
    assert err.strip().endswith(f"to run anyway after review, pass {safety.ACKNOWLEDGE_OPTION}")
    assert not (tmp_path / written).exists()      # nothing drawn, measured or captured


def test_display_test_prints_the_screening_and_caution_first(own_x_server, tmp_path):  # noqa: F811
    env = own_x_server.env()
    process = start(["display-test", REFUSED, "--seconds", "1", "--windowed", "--report", tmp_path / "t.json",
                     safety.ACKNOWLEDGE_OPTION], env)
    out, err = process.communicate(timeout=90)
    assert (tmp_path / "t.json").exists(), err
    lines = out.splitlines()
    assert lines[0] == "photosensitivity screening (WCAG 2.x SC 2.3.1): over the thresholds"
    assert lines[1] == f"photosensitivity: over the thresholds, acknowledged with {safety.ACKNOWLEDGE_OPTION}"
    assert lines[2].startswith(CAUTION) and "ethics board" in lines[2]
    assert lines[3].startswith("display test: ")
    # the report records the verdict and the acknowledgement, as a session sidecar does
    record = json.loads((tmp_path / "t.json").read_text(encoding="utf-8"))["safety"]
    assert record["verdict"] == "over the thresholds" and record["cleared"] is False
    assert record["acknowledged_with"] == safety.ACKNOWLEDGE_OPTION
    # a protocol that clears the screening still gets the usual caution, and no acknowledgement line
    process = start(["display-test", TINY, "--seconds", "1", "--windowed", "--report", tmp_path / "u.json"], env)
    out, err = process.communicate(timeout=90)
    lines = out.splitlines()
    assert lines[0].endswith(": passed"), out
    assert lines[1].startswith("caution: passing does not make a protocol safe for everyone"), out
    assert lines[2].startswith("display test: "), out
    record = json.loads((tmp_path / "u.json").read_text(encoding="utf-8"))["safety"]
    assert record["verdict"] == "passed" and record["cleared"] is True and record["acknowledged_with"] is None


def test_measure_light_is_not_screened_on_dots_it_never_shows(own_x_server, tmp_path):  # noqa: F811
    # It refused the 15 Hz protocol (exit 3) although its window shows only a grey patch on the background.
    require_xdotool()
    env = own_x_server.env()
    process = start(["measure-light", REFUSED, "--out", tmp_path / "lab.toml", "--windowed"], env)
    window = find_window("aftershift", env, process=process)
    deadline = time.monotonic() + 30
    while process.poll() is None and time.monotonic() < deadline:     # Escape before the first reading
        send_key(window, "escape", env)
        time.sleep(0.2)
    out, err = process.communicate(timeout=60)
    assert process.returncode == 0, err
    lines = out.splitlines()
    assert lines[0].startswith("caution: measure-light shows a steady 5° square patch at full level while"), out
    assert "never shows the protocol's dots" in lines[0] and "ethics board" in lines[0]
    assert "photosensitivity screening" not in out and safety.ACKNOWLEDGE_OPTION not in out
    assert "stopped before the first reading; nothing written" in out
    # the review option means nothing here, so the command does not take it
    process = start(["measure-light", REFUSED, "--out", tmp_path / "lab.toml", safety.ACKNOWLEDGE_OPTION], env)
    out, err = process.communicate(timeout=60)
    assert process.returncode == 2 and safety.ACKNOWLEDGE_OPTION in err, err
