"""What the display package does to its surroundings: imports, home folder, no display."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest
from conftest_display import DATA, own_x_server  # noqa: F401

ROOT = Path(__file__).resolve().parent.parent


def _python(code: str, env: dict) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env, capture_output=True, text=True, timeout=120)


def test_importing_the_display_package_loads_no_psychopy():
    code = "import runner.display, runner.display.framestats, runner.session, sys; print('psychopy' in sys.modules)"
    out = _python(code, dict(os.environ))
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "False"


@pytest.mark.slow  # left out of the quick subset
def test_preference_folders_of_processes_that_ended_without_cleaning_up_are_removed(tmp_path):
    # before: every process killed with SIGKILL, or ended by Xlib when its X server went away, left its temporary
    # psychopy folder in /tmp (142 in a day of test runs here); the next import removes those whose process is gone
    prefix = "aftershift-psychopy-"        # runner/display/_psychopy.py: aftershift-psychopy-<pid>-<random>
    ended = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    dead, alive = tmp_path / f"{prefix}{ended.stdout.strip()}-x1", tmp_path / f"{prefix}{os.getpid()}-x2"
    other = tmp_path / f"{prefix}nopid"                  # not one of ours by its name: kept
    for folder in (dead, alive, other):
        (folder / ".psychopy3").mkdir(parents=True)
    env = {**{k: v for k, v in os.environ.items() if k != "DISPLAY"}, "TMPDIR": str(tmp_path)}
    out = _python("import runner.display._psychopy", env)       # no display: refused, after the clean-up
    assert "DISPLAY" in out.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted([alive.name, other.name])   # its own removed at exit


@pytest.mark.slow  # left out of the quick subset
def test_no_display_is_a_one_line_error(tmp_path):
    env = {k: v for k, v in os.environ.items() if k != "DISPLAY"}
    out = subprocess.run([sys.executable, "-m", "runner.cli", "display-test", "--seconds", "1", "--report",
                          tmp_path / "r.json", DATA / "display_tiny.toml"], cwd=ROOT, env=env,
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 2
    assert len(out.stderr.strip().splitlines()) == 1 and "DISPLAY" in out.stderr
    assert not (tmp_path / "r.json").exists()


@pytest.mark.display
def test_psychopy_writes_nothing_into_the_home_folder(own_x_server, tmp_path):  # noqa: F811
    """psychopy makes ~/.psychopy3 and a monitor file on import; ours go to a temporary folder."""
    home = tmp_path / "home"
    home.mkdir()
    code = (
        "from runner import display\n"
        "from runner.protocol import load_protocol\n"
        f"p = load_protocol({str(DATA / 'display_probe.toml')!r})\n"
        "screen, _ = display.open_screen(p, True, True, None)\n"
        "from runner.display import _psychopy\n"
        "print(_psychopy.PREFS_HOME)\n"
        "screen.close()\n"
    )
    out = _python(code, {**own_x_server.env(), "HOME": str(home)})
    assert out.returncode == 0, out.stderr
    assert list(home.iterdir()) == []
    assert not Path(out.stdout.strip()).exists(), "the temporary preference folder was not removed"
