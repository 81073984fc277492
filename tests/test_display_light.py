"""On a real window (Xvfb): the measurement screen typed at with xdotool, and frame capture.

``aftershift measure-light`` runs as a separate process on its own Xvfb; the
driver reads the console, sees which patch is shown, and types the reading a
simulated display would give there (with one Backspace correction), stops
with Escape half way, resumes, and finishes.  The profile written must equal
a fit of the same readings from the CSV file, and the readings must be the
ones typed.  ``display-test --frames`` is checked on the pictures it writes.
"""

from __future__ import annotations

import csv
import re
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from conftest_display import (DATA, find_window, own_x_server, require_xdotool, send_key,  # noqa: F401
                             wait_until_no_window)
from PIL import Image

from fitting.display_model import GainOffsetGamma
from runner.light_profile import load_profile, readings_arrays

pytestmark = [pytest.mark.display, pytest.mark.slow]

ROOT = Path(__file__).resolve().parent.parent
PROBE = DATA / "display_probe.toml"
CAPTURE = DATA / "display_capture.toml"

#: The display the typist pretends to measure.
DISPLAY_MODEL = GainOffsetGamma(0.45, 119.55, 1.03, 2.2)
PROMPT = re.compile(r"reading (\d+)/(\d+): grey level ([0-9.]+)")


class Console:
    """Collects a child's standard output as it comes (the prompt has no newline)."""

    def __init__(self, process: subprocess.Popen):
        self.text = ""
        self._thread = threading.Thread(target=self._read, args=(process.stdout,), daemon=True)
        self._thread.start()

    def _read(self, pipe):
        for chunk in iter(lambda: pipe.read1(256), b""):
            self.text += chunk.decode("utf-8", "replace")

    def wait_for(self, pattern, process, timeout_s: float = 60.0):
        end = time.monotonic() + timeout_s
        while time.monotonic() < end:
            found = pattern(self.text)
            if found:
                return found
            if process.poll() is not None:
                time.sleep(0.2)
                found = pattern(self.text)
                if found:
                    return found
                raise AssertionError(f"the program ended (exit {process.returncode}): {self.text[-1500:]}")
            time.sleep(0.05)
        raise AssertionError(f"timed out; console so far: {self.text[-1500:]}")


def start(args, env) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "runner.cli", *map(str, args)], cwd=ROOT, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def type_text(window: str, text: str, env) -> None:
    for ch in text:
        send_key(window, "period" if ch == "." else ch, env)


def drive(process, env, stop_after: int | None = None) -> tuple[dict[int, float], str]:
    """Type readings until the program ends (or Escape after ``stop_after`` readings); the readings and the console."""
    console = Console(process)
    window = find_window("aftershift", env, process=process)
    console.wait_for(lambda t: "aim the photometer" in t, process)
    send_key(window, "Return", env)
    typed: dict[int, float] = {}
    while True:
        prompts = console.wait_for(lambda t: [m for m in PROMPT.finditer(t) if int(m.group(1)) not in typed]
                                   or (process.poll() is not None and ["end"]), process)
        if prompts == ["end"]:   # the program ended before asking for every reading: say what it said
            err = process.stderr.read().decode("utf-8", "replace") if process.stderr else ""
            raise AssertionError(f"the program ended (exit {process.returncode}) after {len(typed)} readings; "
                                 f"console: {console.text[-1500:]!r}; stderr: {err[-1500:]!r}")
        m = prompts[0]
        order, total, level = int(m.group(1)), int(m.group(2)), float(m.group(3))
        if stop_after is not None and len(typed) == stop_after:
            send_key(window, "Escape", env)
            break
        value = round(float(DISPLAY_MODEL.luminance(level)) * (1 + 0.004 * np.sin(7 * order)), 3)
        if order % 3 == 0:  # a slip, corrected with Backspace
            type_text(window, "9", env)
            send_key(window, "BackSpace", env)
        type_text(window, f"{value:.3f}", env)
        send_key(window, "Return", env)
        typed[order] = value
        console.wait_for(lambda t: f"-> {value:g} cd/m2" in t, process)
        if order == total:
            break
    process.wait(timeout=60)
    return typed, console.text


def test_measurement_screen_typed_readings_give_the_csv_fit(own_x_server, tmp_path):  # noqa: F811
    require_xdotool()
    env = own_x_server.env()
    out = tmp_path / "lab.toml"
    args = ["measure-light", PROBE, "--out", out, "--levels", "6", "--repeats", "1", "--windowed", "--seed", "4"]
    first, _ = drive(start(args, env), env, stop_after=2)
    readings_file = tmp_path / "lab.readings.csv"
    with readings_file.open(newline="", encoding="utf-8") as f:
        assert len(list(csv.DictReader(f))) == 2  # Escape kept both readings
    assert not out.exists()
    wait_until_no_window("aftershift", env)      # not the first run's window, still closing, for the second
    second, said = drive(start([*args, "--resume"], env), env)
    typed = {**first, **second}
    assert len(typed) == 6
    profile = load_profile(out)
    table = readings_arrays(out)
    assert sorted(table["luminance_cd_m2"]) == pytest.approx(sorted(typed.values()))
    # the same readings fitted from the CSV file without a screen
    again = tmp_path / "again.toml"
    done = subprocess.run([sys.executable, "-m", "runner.cli", "measure-light", "--readings", readings_file,
                           "--out", again], cwd=ROOT, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    csv_fit = load_profile(again)
    for name in ("black_cd_m2", "amplitude_cd_m2", "gain", "gamma"):
        assert getattr(profile.grey, name) == pytest.approx(getattr(csv_fit.grey, name), rel=1e-9)
    # ... and it finds the display typed in, within the 0.4 % ripple added to the readings
    assert profile.max_cd_m2 == pytest.approx(DISPLAY_MODEL.max_cd_m2, rel=0.01)
    assert profile.screen_px == [800, 600]
    # a refresh rate that is not the protocol's (here Xvfb's, without vsync: hundreds of flips per second) is said
    # and not recorded; before, the profile recorded 1,234 Hz as the display's (a hostile-user sweep)
    rate = float(re.search(r"display: ([0-9.]+) Hz measured", said).group(1))
    if abs(rate / 60.0 - 1) > 0.01:          # display_probe.toml: 60 Hz; runner.safety.REFRESH_TOLERANCE: 1 %
        assert profile.refresh_hz is None and f"warning: {rate:.2f} Hz is not the protocol's 60 Hz" in said, said
        assert "# refresh_hz: not measured" in out.read_text(encoding="utf-8")
    else:
        assert profile.refresh_hz == pytest.approx(rate, abs=0.01)


def test_frame_capture_writes_each_period_type(own_x_server, tmp_path):  # noqa: F811
    env = own_x_server.env()
    out = tmp_path / "frames"
    done = subprocess.run([sys.executable, "-m", "runner.cli", "display-test", CAPTURE, "--windowed",
                           "--frames", out, "--frames-per-period", "2"], cwd=ROOT, env=env,
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    with (out / "frames.csv").open(newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    assert {r["period"] for r in rows} == {"adapter", "intervening", "gap", "test", "baseline"}
    for row in rows:
        grey = np.asarray(Image.open(out / row["file"]).convert("L"), dtype=float)
        h, w = grey.shape
        corner = grey[h - 20:, :20].mean()  # inside the 2-deg (80 px) photodiode patch
        centre = grey[h // 2 - 150:h // 2 + 150, w // 2 - 150:w // 2 + 150]
        assert corner == pytest.approx(255.0 if row["patch_on"] == "1" else 0.0, abs=1), row
        if row["look"] == "blank":
            assert centre.max() < 0.3 * 255, row  # the fixation mark only
        else:
            assert centre.max() == pytest.approx(255 * 0.8, abs=2), row  # dots at dots.level 0.8
        if row["period"] == "test" and row["trial"] == "adapted":
            assert float(row["direction_deg"]) == pytest.approx(80.0)  # 90 - the +10 deg start offset
