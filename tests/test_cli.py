"""The command line as a new user meets it: bare command, --version, errors, refusals before the display."""

from __future__ import annotations

import importlib.metadata
import os
import subprocess
import sys

import pytest

from conftest import PROTOCOLS, ROOT, run_cli


def test_bare_command_lists_the_commands():
    done = run_cli()
    assert done.returncode == 0, done.stderr
    for command in ("check", "simulate", "run", "fit", "compare", "demo", "plan", "display-test"):
        assert f"    {command}" in done.stdout, command


def test_version():
    done = run_cli("--version")
    assert done.returncode == 0
    try:
        expected = importlib.metadata.version("aftershift")
    except importlib.metadata.PackageNotFoundError:
        expected = (ROOT / "pyproject.toml").read_text().split('version = "')[1].split('"')[0]
    assert done.stdout.strip() == f"aftershift {expected}"


def test_argument_errors_are_one_line_with_one_prefix():
    done = run_cli("fit", "logs", "--out", "x", "--bootstrap", "many")
    assert done.returncode == 2
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].count("aftershift") == 2  # the prefix and the help hint
    assert lines[0].startswith("aftershift: fit: argument --bootstrap:") and "`aftershift fit --help`" in lines[0]


def test_check_says_under_a_minute_for_a_short_protocol(tmp_path):
    short = tmp_path / "short.toml"
    short.write_text((PROTOCOLS / "pilot_short.toml").read_text().replace("trials_per_track = 12",
                                                                          "trials_per_track = 1"))
    done = run_cli("check", short)
    assert done.returncode == 0, done.stderr
    assert "duration   under a minute" in done.stdout and "about 0 min" not in done.stdout


def _no_display() -> dict:
    return {k: v for k, v in os.environ.items() if k not in ("DISPLAY", "WAYLAND_DISPLAY")}


def test_run_refuses_an_existing_session_before_opening_the_display(tmp_path):
    # without a display, reaching the window would fail differently: the refusal must come first
    done = run_cli("simulate", PROTOCOLS / "pilot_short.toml", "--out", tmp_path)
    assert done.returncode == 0, done.stderr
    (tmp_path / "sim01-s1.trials.csv").rename(tmp_path / "p01-s1.trials.csv")
    before = (tmp_path / "p01-s1.trials.csv").read_bytes()
    done = run_cli("run", PROTOCOLS / "pilot_short.toml", "--observer", "p01", "--out", tmp_path, env=_no_display())
    assert done.returncode == 2
    assert "already holds this session" in done.stderr and "--resume" in done.stderr
    assert (tmp_path / "p01-s1.trials.csv").read_bytes() == before


@pytest.mark.slow    # commands in subprocesses
def test_run_and_check_refuse_a_bad_lab_text_before_opening_the_display(tmp_path):
    protocol = tmp_path / "p.toml"
    protocol.write_text((PROTOCOLS / "pilot_short.toml").read_text() + '\n[screens]\ninstructions_file = "nope.txt"\n')
    done = run_cli("run", protocol, "--observer", "p01", "--out", tmp_path / "data", env=_no_display())
    assert done.returncode == 2
    assert "screens.instructions_file" in done.stderr and "does not exist" in done.stderr
    assert not (tmp_path / "data").exists()
    # check reads the lab's texts as run will, so a protocol that passes check does not fail at the display
    done = run_cli("check", protocol)
    assert done.returncode == 2 and done.stderr.count("\n") == 1
    assert "screens.instructions_file" in done.stderr and "does not exist" in done.stderr
    (tmp_path / "caution.txt").write_text("Stop at any time with {no_such_key}.\n")
    protocol.write_text((PROTOCOLS / "pilot_short.toml").read_text() + '\n[safety]\ncaution_file = "caution.txt"\n')
    done = run_cli("check", protocol)
    assert done.returncode == 2 and "safety.caution_file" in done.stderr and "{no_such_key}" in done.stderr


def test_an_error_raised_by_a_ctrl_c_is_reported_as_the_ctrl_c(monkeypatch, capsys):
    # A compiled module that a Ctrl-C hits while it loads may turn the KeyboardInterrupt into an
    # ImportError of its own (seen with scipy.optimize: "initialization failed"); the command must still
    # end in the one "interrupted" line and exit 130, and other errors must stay errors.
    from runner import cli

    def loads_and_is_interrupted(args):
        try:
            raise KeyboardInterrupt
        except KeyboardInterrupt as exc:
            raise ImportError("initialization failed") from exc

    monkeypatch.setattr(cli, "cmd_check", loads_and_is_interrupted)
    assert cli.main(["check", str(PROTOCOLS / "pilot_short.toml")]) == 130
    assert capsys.readouterr().err.strip() == "aftershift check: interrupted"

    def fails(args):
        raise ImportError("a missing part")

    monkeypatch.setattr(cli, "cmd_check", fails)
    with pytest.raises(ImportError, match="a missing part"):
        cli.main(["check", str(PROTOCOLS / "pilot_short.toml")])


_BLOCK_A_PACKAGE = """
import importlib.abc, sys
class Missing(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path=None, target=None):
        if name.split('.')[0] == sys.argv[1]:
            raise ModuleNotFoundError(f"No module named {name!r}", name=name)
sys.meta_path.insert(0, Missing())
from runner.cli import main
sys.exit(main(sys.argv[2:]))
"""


@pytest.mark.slow
def test_a_package_missing_from_the_set_up_is_one_line_naming_it():
    # a set-up that stopped half-way (the package list is pyproject.toml's): the late imports are where it shows
    import subprocess
    import sys

    done = subprocess.run([sys.executable, "-c", _BLOCK_A_PACKAGE, "threadpoolctl", "check",
                           str(PROTOCOLS / "pilot_short.toml")], capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert done.returncode == 1, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and "'threadpoolctl' is missing" in lines[0] and "./setup.sh" in lines[0], done.stderr


@pytest.mark.slow
def test_a_name_too_long_for_the_file_system_is_one_line_naming_it(tmp_path):
    # ext4, XFS and tmpfs allow 255 bytes per name (NAME_MAX in POSIX limits.h; common practice, no source)
    long_name = "n" * 300
    protocol = tmp_path / "p.toml"
    protocol.write_text(f'[safety]\ncaution_file = "{long_name}.txt"\n')
    cases = {
        ("check", tmp_path / f"{long_name}.toml"): "name: too long for the file system",
        ("check", protocol): "safety.caution_file: file",
        ("simulate", PROTOCOLS / "pilot_short.toml", "--out", tmp_path / long_name): "name: too long",
    }
    for args, expected in cases.items():
        done = run_cli(*args)
        lines = done.stderr.strip().splitlines()
        assert done.returncode == 2 and len(lines) == 1, (args[0], done.stderr[-400:])
        assert expected in lines[0] and "Traceback" not in done.stderr, lines[0]
    assert list(tmp_path.iterdir()) == [protocol]  # nothing half-made


def test_commands_that_do_not_fit_start_without_the_fitting_libraries(tmp_path):
    # check and simulate load no pandas, scipy.optimize, scipy.stats, matplotlib or statsmodels: each of those
    # costs 0.2-1 s at every start (simulate went from 1.6 s to 0.7 s when they were made lazy)
    heavy = ("pandas", "scipy.optimize", "scipy.stats", "matplotlib", "statsmodels", "psychopy")
    protocol = PROTOCOLS / "pilot_short.toml"
    for args in (["check", str(protocol)], ["simulate", str(protocol), "--out", str(tmp_path), "--seed", "1"]):
        code = ("import sys; from runner.cli import main; code = main(sys.argv[1:]); "
                f"print(sorted(m for m in {heavy!r} if m in sys.modules)); sys.exit(code)")
        done = subprocess.run([sys.executable, "-c", code, *args], cwd=ROOT, capture_output=True, text=True,
                              timeout=120)
        assert done.returncode == 0, done.stderr
        assert done.stdout.strip().splitlines()[-1] == "[]", (args[0], done.stdout[-300:])


#: Loads numpy's and scipy's OpenBLAS (each its own library, loaded on first import) inside ``one_blas_thread``
#: and in a child process started there; prints what each saw, then the environment after the block.
_BLAS_THREADS_INSIDE_THE_RULE = """
import os, subprocess, sys
from fitting.threads import THREAD_VARIABLES, one_blas_thread
SEEN = ("from threadpoolctl import threadpool_info; import numpy, scipy.linalg; "
        "print(sorted((l['filepath'].rsplit('/', 1)[-1].split('-')[0], l['num_threads']) for l in threadpool_info()))")
with one_blas_thread():
    exec(SEEN)
    print(subprocess.run([sys.executable, "-c", SEEN], capture_output=True, text=True).stdout.strip())
print([os.environ.get(name) for name in THREAD_VARIABLES])
"""


@pytest.mark.slow
@pytest.mark.skipif(len(os.sched_getaffinity(0)) < 2,
                    reason="one core: BLAS starts one thread anyway, so the test could not fail here")
def test_blas_libraries_loaded_inside_the_one_thread_rule_and_its_child_processes_run_one_thread():
    # fitting/threads.py: every command runs with one BLAS thread.  The rule limited only the libraries already
    # loaded; numpy and scipy each load an OpenBLAS of their own when first imported, and one loaded later ran as
    # many threads as cores (2 here): the tests, which call the library in their own process, ran so, and a re-run
    # pilot took 2x the time on busy cores
    outside = {name: "3" for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")}
    env = {**{k: v for k, v in os.environ.items() if k not in outside}, "OMP_NUM_THREADS": "3"}
    done = subprocess.run([sys.executable, "-c", _BLAS_THREADS_INSIDE_THE_RULE], cwd=ROOT, env=env,
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    here, child, after = done.stdout.strip().splitlines()
    one_each = str([("libscipy_openblas", 1), ("libscipy_openblas64_", 1)])
    assert here == one_each and child == one_each, done.stdout
    assert after == str([None, "3", None]), after   # the caller's environment is given back


def test_display_test_refuses_what_frame_capture_cannot_do_before_the_screening(tmp_path):
    # before: --frames-per-period 0 and a --frames that names a file were refused only after the screening and the
    # caution had been printed (and a file was "cannot be made (File exists)"); a stream protocol likewise
    (tmp_path / "a_file").write_text("x")
    cases = [
        ((PROTOCOLS / "pilot_short.toml", "--frames", tmp_path / "f", "--frames-per-period", "0"),
         "aftershift: argument: --frames-per-period: expected 1 to 100, got 0"),
        ((PROTOCOLS / "pilot_short.toml", "--frames", tmp_path / "a_file"),
         f"aftershift: {tmp_path / 'a_file'}: --frames: is a file, not a folder; name a folder for the frames"),
        ((PROTOCOLS / "stream_nback.toml", "--frames", tmp_path / "f"),
         "aftershift: argument: --frames: frame capture covers adapt-test trials only; this protocol is a stream "
         "block"),
    ]
    for args, line in cases:
        done = run_cli("display-test", *args, env=_no_display())
        assert done.returncode == 2 and done.stderr.strip() == line, done.stderr
        assert done.stdout == "", done.stdout      # no screening, no caution printed before the refusal
    assert not (tmp_path / "f").exists()
