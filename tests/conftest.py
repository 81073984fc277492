"""Shared test helpers: running the command line in-process or as a process."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PROTOCOLS = ROOT / "protocols"


def run_cli(*args, timeout=300, **kwargs) -> subprocess.CompletedProcess:
    """Run ``aftershift ARGS`` as a separate process (as a user would)."""
    return subprocess.run(
        [sys.executable, "-m", "runner.cli", *map(str, args)],
        capture_output=True, text=True, timeout=timeout, cwd=ROOT, **kwargs,
    )


@pytest.fixture
def cli():
    """The command line as a separate process."""
    return run_cli
