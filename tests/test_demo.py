"""`aftershift demo` leaves a clone clean: every committed file of results_demo/ comes back byte for byte.

The demo is run as a user runs it, from the root of a copy of the
repository's results (default ``--out results_demo``), and the copy is then
compared with what git holds: every tracked file must be byte-identical, and
every other file the demo writes must be one the repository ignores (the
sidecars, ``report_data.json`` and the report pages, which hold times and
package versions).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys

import pytest

from conftest import ROOT, run_cli


def _git(*args) -> subprocess.CompletedProcess:
    return subprocess.run(["git", "-C", str(ROOT), *args], capture_output=True, text=True)


def _tracked_demo_files() -> list[str]:
    if shutil.which("git") is None:
        pytest.skip("git is not installed: cannot tell which demo files are committed")
    done = _git("ls-files", "-z", "results_demo")
    if done.returncode != 0:
        pytest.skip(f"not a git checkout ({done.stderr.strip()}): cannot tell which demo files are committed")
    return [p for p in done.stdout.split("\0") if p]


@pytest.mark.slow
def test_the_demo_rewrites_the_committed_files_byte_for_byte(tmp_path):
    tracked = _tracked_demo_files()
    assert tracked, "results_demo/ holds no committed file"
    shutil.copytree(ROOT / "results_demo", tmp_path / "results_demo")
    done = subprocess.run([sys.executable, "-m", "runner.cli", "demo"], cwd=tmp_path, capture_output=True, text=True,
                          timeout=600, env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "results_demo" / "compare" / "report.html").is_file()
    changed = [p for p in tracked
               if not (tmp_path / p).is_file() or (tmp_path / p).read_bytes() != (ROOT / p).read_bytes()]
    assert changed == [], f"the demo changed committed files: {changed}"
    written = sorted(p.relative_to(tmp_path).as_posix() for p in (tmp_path / "results_demo").rglob("*") if p.is_file())
    untracked = [p for p in written if p not in set(tracked)]
    ignored = set(_git("check-ignore", "--no-index", *untracked).stdout.split()) if untracked else set()
    stray = [p for p in untracked if p not in ignored]
    assert stray == [], f"the demo writes files that are neither committed nor ignored: {stray}"
    assert ignored, "the sidecars and reports should be written and ignored"


def test_demo_refuses_a_folder_that_is_not_its_own(tmp_path):
    (tmp_path / "precious.csv").write_text("do not delete\n")
    done = run_cli("demo", "--out", tmp_path)
    assert done.returncode == 2 and "not empty" in done.stderr
    assert (tmp_path / "precious.csv").read_text() == "do not delete\n"
