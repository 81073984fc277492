"""`aftershift demo` rewrites every committed file of results_demo/: tables byte for byte, figures as the same picture.

The demo is run as a user runs it, from the root of a copy of the
repository's results (default ``--out results_demo``), and the copy is then
compared with what git holds: every tracked table and text must be
byte-identical, every tracked figure the same picture, and every other file
the demo writes must be one the repository ignores (the sidecars,
``report_data.json`` and the report pages, which hold times and package
versions).

A figure is the same picture when at most 0.1 % of its pixels differ and
each that does lies, within one level, between the darkest and lightest
pixel around the same place (3 x 3) in the other picture: an edge moved by
less than a pixel, nothing added, removed or moved by more.  numpy and
OpenBLAS choose vectorised code by CPU and it rounds differently in the last
bits; a bootstrap band's edge then moves by a fraction of a pixel.  Seen:
11 of 3 million pixels of one decay figure, by 1/255, on one AMD EPYC, and
204 pixels by up to 6/255 along the edge of the same figure's band on
another, while every table came back byte for byte.  On the machine that
wrote them the figures come back byte for byte as well.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys

from pathlib import Path

import numpy as np
import pytest
from PIL import Image

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


def _same_file(written: Path, committed: Path) -> bool:
    """Byte for byte; for a PNG, the same picture up to edges moved by less than a pixel (see above)."""
    if not written.is_file():
        return False
    if written.read_bytes() == committed.read_bytes():
        return True
    if committed.suffix != ".png":
        return False
    with Image.open(written) as a, Image.open(committed) as b:
        if a.size != b.size or a.mode != b.mode:
            return False
        a, b = np.asarray(a, dtype=int), np.asarray(b, dtype=int)
    differs = (a != b).reshape(a.shape[0], a.shape[1], -1).any(axis=2)
    return (np.count_nonzero(differs) <= 0.001 * differs.size
            and _within_neighbours(a, b) and _within_neighbours(b, a))


def _within_neighbours(a: np.ndarray, b: np.ndarray) -> bool:
    """Every value of ``a`` within one level of the range of ``b`` over the 3 x 3 pixels around it."""
    padded = np.pad(b, [(1, 1), (1, 1)] + [(0, 0)] * (b.ndim - 2), mode="edge")
    rows, cols = b.shape[:2]
    around = np.stack([padded[i:i + rows, j:j + cols] for i in range(3) for j in range(3)])
    return bool(np.all((a >= around.min(axis=0) - 1) & (a <= around.max(axis=0) + 1)))


def test_a_figure_that_differs_by_more_than_a_shade_is_a_changed_file(tmp_path):
    picture = np.full((40, 50, 3), 200, dtype=np.uint8)
    Image.fromarray(picture).save(tmp_path / "a.png")
    shade = picture.copy()
    shade[3, 4] += 1                                     # one pixel one level lighter: the same figure
    Image.fromarray(shade).save(tmp_path / "b.png")
    moved = picture.copy()
    moved[3, 4] += 2                                     # two levels: a changed figure
    Image.fromarray(moved).save(tmp_path / "c.png")
    spread = picture.copy()
    spread[:5] += 1                                      # 10 % of the pixels: a changed figure
    Image.fromarray(spread).save(tmp_path / "d.png")
    assert _same_file(tmp_path / "b.png", tmp_path / "a.png")
    assert not _same_file(tmp_path / "c.png", tmp_path / "a.png")
    assert not _same_file(tmp_path / "d.png", tmp_path / "a.png")
    assert not _same_file(tmp_path / "missing.png", tmp_path / "a.png")


@pytest.mark.slow
def test_an_edge_moved_by_less_than_a_pixel_is_the_same_figure_and_one_moved_by_more_is_not(tmp_path):
    # matplotlib's own anti-aliasing draws the pictures compared: a faint band, a line and a title, at the
    # size of the demo's decay figure; shifts are in pixels (seen across CPUs: a band's edge, about 0.2 px)
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot as plt

    def draw(name, band_px=0.0, line_px=0.0, label="tau = 2.31"):
        fig, ax = plt.subplots(figsize=(7.6, 4.4), dpi=300)
        ax.set_xlim(-0.2, 4)
        ax.set_ylim(-0.5, 9)                             # as the figures' limits: set by the data, not moved here
        per_px = 4.2 / ax.get_window_extent().width
        x = np.linspace(0, 4, 200)
        ax.fill_between(x, 0, 2.5 * np.exp(-(x - band_px * per_px) / 1.2), color="tab:red", alpha=0.15, lw=0)
        ax.plot(x, 2 * np.exp(-(x - line_px * per_px) / 1.5), color="k", lw=1.2)
        ax.set_title(label)
        fig.savefig(tmp_path / name)
        plt.close(fig)
        return tmp_path / name

    original = draw("original.png")
    assert _same_file(draw("shifted.png", band_px=0.2), original)
    assert not _same_file(draw("moved.png", band_px=2), original)
    assert not _same_file(draw("line.png", line_px=1), original)
    assert not _same_file(draw("label.png", label="tau = 2.32"), original)


@pytest.mark.slow
def test_the_demo_rewrites_the_committed_tables_and_figures(tmp_path):
    tracked = _tracked_demo_files()
    assert tracked, "results_demo/ holds no committed file"
    shutil.copytree(ROOT / "results_demo", tmp_path / "results_demo")
    done = subprocess.run([sys.executable, "-m", "runner.cli", "demo"], cwd=tmp_path, capture_output=True, text=True,
                          timeout=600, env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "results_demo" / "compare" / "report.html").is_file()
    changed = [p for p in tracked if not _same_file(tmp_path / p, ROOT / p)]
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


# -- the output folder: one line and exit 2 for every refusal, nothing of an earlier demo lost ------------------


def test_demo_refuses_an_out_that_is_a_file_in_one_line(capsys, tmp_path):
    # before: a traceback (NotADirectoryError, exit 1) from the check for an earlier demo
    from fault_helpers import cli, one_line

    blocker = tmp_path / "afile"
    blocker.write_text("x\n")
    code, err = cli(capsys, "demo", "--out", blocker)
    assert code == 2 and "--out" in one_line(err) and str(blocker) in err
    assert blocker.read_text() == "x\n"


def test_demo_refuses_a_read_only_out_in_one_line(capsys, tmp_path):
    # before: a traceback (OSError, read-only file system, exit 1)
    from fault_helpers import cli, one_line, tmpfs

    with tmpfs(tmp_path / "ro", read_only=True) as ro:
        code, err = cli(capsys, "demo", "--out", ro / "d")
        assert code == 2 and "read-only" in one_line(err) and "--out" in err
        assert not list(ro.iterdir())


def test_a_full_disk_during_the_demo_does_not_advise_an_option_the_demo_lacks(capsys, tmp_path, monkeypatch):
    # before: the simulation's line ended "free some space, then continue with --resume", and `demo` has no --resume
    import errno

    from fault_helpers import cli, one_line
    from runner import trial_log

    real_write, calls = os.write, {"n": 0}

    def failing_write(fd, data):
        if data[:5] == b"sim01":
            calls["n"] += 1
            if calls["n"] == 40:
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_write(fd, data)

    monkeypatch.setattr(trial_log.os, "write", failing_write)
    out = tmp_path / "d"
    code, err = cli(capsys, "demo", "--out", out)
    line = one_line(err)
    assert code == 2 and "disk is full" in line and "--resume" not in line and "run the demo again" in line
    assert line.startswith(f"aftershift: {out}: --out:")


def _earlier_demo(folder: Path) -> None:
    """What an earlier demo leaves: the mark, its folders and files."""
    from runner.demo import DEMO_MARK

    (folder / "logs").mkdir(parents=True)
    (folder / "logs" / "sim01-s1.trials.csv").write_text("old\n")
    (folder / "logs" / "sim02-s1.session.json.tmp").write_text("{")            # a demo killed mid-write
    (folder / "predictions_population_model.csv").write_text("old\n")
    (folder / "fit" / "figures").mkdir(parents=True)
    for name in ("pse.csv", "figures/decay_sim01.png"):
        (folder / "fit" / name).write_text("old\n")
    (folder / "fit" / "outputs.json").write_text('{"command": "fit", "files": ["pse.csv", "figures/decay_sim01.png", '
                                                 '"report_data.json"]}')
    (folder / "fit" / ".staging-123-ab12cd34").mkdir()                                # a fit killed before its move
    (folder / "fit" / ".staging-123-ab12cd34" / "tuning.csv").write_text("new\n")
    (folder / "compare").mkdir()
    (folder / "compare" / "outputs.json").write_text('{"command": "compare", "files": ["predictions_source.txt"]}')
    (folder / "compare" / ".outputs-pending.json").write_text('{"stage": ".staging-9-x", "files": ["agreement.csv"]}')
    (folder / "fit" / "..outputs-pending.json.k3x9a1zz").write_text('{"sta')     # killed while its journal was written
    (folder / "compare" / "agreement.csv").write_text("moved in before a kill\n")
    (folder / DEMO_MARK).write_text("mark\n")


@pytest.mark.parametrize("theirs", ["logs/P01-s1.trials.csv", "logs/sim01-s2.trials.csv", "mine/notes.txt",
                                    "fit/notes.txt", "fit/figures/mine.png", "compare/fit/mine.csv", "logs/linked"])
def test_a_file_no_demo_writes_in_an_earlier_demos_folder_is_refused_and_kept(capsys, tmp_path, theirs):
    # before: the demo emptied any folder marked as an earlier demo's: a user's own fit, notes and sessions were
    # deleted without a word, and the log of a session `run` was still writing into logs/ went on receiving trials
    # in a deleted file (a hostile-user sweep); only what a demo writes may be replaced
    from fault_helpers import cli, one_line

    out = tmp_path / "d"
    _earlier_demo(out)
    path = out / theirs
    path.parent.mkdir(parents=True, exist_ok=True)
    if theirs.endswith("linked"):
        path.symlink_to(tmp_path)
    else:
        path.write_text("theirs\n")
    before = {p: p.read_bytes() for p in out.rglob("*") if p.is_file() and p.name != ".lock"}
    code, err = cli(capsys, "demo", "--out", out)
    named = theirs if theirs.split("/")[0] in ("logs", "fit", "compare") else theirs.split("/")[0]   # "mine"
    assert code == 2 and f"and {named}, which is not the demo's" in one_line(err) and "--out" in err
    assert {p: p.read_bytes() for p in out.rglob("*") if p.is_file() and p.name != ".lock"} == before


#: Files of one's own that look like a demo's, and what the refusal names.
LOOKALIKES = {
    "a fit of other logs": ("fit/report_data.json", '{"sessions": [{"log": "mine/P01-s1.trials.csv", '
                                                    '"observer": "P01", "session": "s1", "seed": 11}]}'),
    "notes beside the logs": ("logs/sim02-s1.notes.txt", "notes\n"),
    "a copy of a log": ("logs/sim01-s1.trials.csv.orig", "observer\n"),
    "a folder named like a staging one": ("fit/.staging-mine/a.csv", "a\n"),
    "... or more like one": ("fit/.staging-1-mine/notes.txt", "a\n"),
    "a file named like a manifest's copy": ("fit/.outputs.json.bak", "{}\n"),
    "a fit of other logs of the same names": ("fit/report_data.json",
                                              '{"sessions": [{"log": "pilot/logs/sim01-s1.trials.csv", '
                                              '"observer": "sim01", "session": "s1", "seed": 7}]}'),
    "a comparison of such a fit": ("compare/fit/report_data.json",
                                   '{"sessions": [{"log": "pilot/logs/sim01-s1.trials.csv", "observer": "sim01", '
                                   '"session": "s1", "seed": 7}]}'),
    "a comparison with other predictions": ("compare/predictions_source.txt", "../../mine.csv\n"),
}


@pytest.mark.parametrize("what", LOOKALIKES)
def test_files_that_only_look_like_the_demos_are_refused_and_kept(capsys, tmp_path, what):
    # before: a fit of the user's written into OUT/fit (whose manifest looks like the demo's), notes and copies
    # beside the logs named like the demo's, and a folder named like fit's staging were deleted without a word
    # (a hostile-user sweep)
    from fault_helpers import cli, one_line

    out = tmp_path / "d"
    _earlier_demo(out)
    (out / "compare" / "predictions_source.txt").write_text("../predictions_population_model.csv\n")
    (out / "fit" / "report_data.json").write_text('{"sessions": [{"log": "d/logs/sim01-s1.trials.csv", '
                                                  '"observer": "sim01", "session": "s1", "seed": 11}]}')
    (out / "logs" / "sim01-s1.session.json").write_text('{"observer": "sim01", "session": "s1", "session_seed": 11}')
    (out / "compare" / "outputs.json").write_text('{"command": "compare", "files": ["predictions_source.txt", '
                                                  '"fit/report_data.json"]}')
    name, text = LOOKALIKES[what]
    (out / name).parent.mkdir(parents=True, exist_ok=True)
    (out / name).write_text(text)
    before = {p: p.read_bytes() for p in out.rglob("*") if p.is_file() and p.name != ".lock"}
    code, err = cli(capsys, "demo", "--out", out)
    assert code == 2 and f"and {name}, which is not the demo's" in one_line(err), err
    assert {p: p.read_bytes() for p in out.rglob("*") if p.is_file() and p.name != ".lock"} == before


def test_an_earlier_demo_with_its_own_records_is_replaced(tmp_path):
    # the positive control of the test above: the demo's own record and predictions source pass
    from runner.demo import DEMO_MARK, _claimed

    out = tmp_path / "d"
    _earlier_demo(out)
    (out / "compare" / "predictions_source.txt").write_text("../predictions_population_model.csv\n")
    (out / "fit" / "report_data.json").write_text('{"sessions": [{"log": "d/logs/sim01-s1.trials.csv"}]}')
    with _claimed(out):
        assert sorted(p.name for p in out.iterdir()) == [".lock", DEMO_MARK]


def test_a_demo_stopped_while_it_empties_the_earlier_one_can_be_run_again(tmp_path, monkeypatch):
    # before: the earlier output was removed with rmtree, which may remove fit/outputs.json before the files it
    # lists; a demo killed just then left files no manifest listed, and every later demo refused the folder
    # (a hostile-user sweep)
    from runner.demo import _claimed, _refuse_foreign

    removed = []
    real = os.unlink

    def stop_after(n):
        def unlink(path, *args, **kwargs):
            if len(removed) == n:
                raise KeyboardInterrupt      # as a kill at that instant leaves the folder
            removed.append(Path(path).name)
            return real(path, *args, **kwargs)
        return unlink

    n = 0
    while True:
        out = tmp_path / f"d{n}"
        _earlier_demo(out)
        removed.clear()
        monkeypatch.setattr(os, "unlink", stop_after(n))
        try:
            with _claimed(out):
                pass
            finished = True
        except KeyboardInterrupt:
            finished = False
        monkeypatch.setattr(os, "unlink", real)
        _refuse_foreign(out)                 # replaceable after the first n removals
        if finished:
            break
        n += 1
    assert n > 5 and removed.index("outputs.json") > removed.index("pse.csv")


def test_an_out_linked_to_an_earlier_demo_is_replaced_through_the_link(tmp_path):
    # before: "OSError: Cannot call rmtree on a symbolic link" (exit 1); the linked folder is now the one replaced,
    # as a real folder holding an earlier demo is
    from runner.demo import DEMO_MARK, _claimed

    target = tmp_path / "elsewhere" / "demo"
    _earlier_demo(target)
    link = tmp_path / "link"
    link.symlink_to(target)
    with _claimed(link):
        assert sorted(p.name for p in target.iterdir()) == [".lock", DEMO_MARK]
    assert link.is_symlink()


def test_a_second_demo_into_a_folder_in_use_is_refused_naming_the_process(capsys, tmp_path):
    # before: the second demo deleted the folder while the first was simulating into it; the first stopped with
    # "sim02-s1.session.json: file: cannot be written (No such file or directory)"
    from fault_helpers import cli, one_line
    from runner.folder_claim import FolderClaim

    out = tmp_path / "d"
    _earlier_demo(out)
    before = {p: p.read_bytes() for p in out.rglob("*") if p.is_file() and p.name != ".lock"}
    with FolderClaim(out):                    # what a running demo holds
        code, err = cli(capsys, "demo", "--out", out)
    assert code == 2 and f"is in use by process {os.getpid()}" in one_line(err) and "--out" in err
    assert {p: p.read_bytes() for p in out.rglob("*") if p.is_file() and p.name != ".lock"} == before


@pytest.mark.parametrize("kind", ["link to a file", "folder"])
def test_a_claim_file_that_is_a_link_or_a_folder_is_refused_and_nothing_outside_is_touched(capsys, tmp_path, kind):
    # before, a .lock linked to a file outside the folder was followed and truncated: the file was emptied
    from fault_helpers import cli, one_line

    out = tmp_path / "d"
    out.mkdir()
    precious = tmp_path / "precious.csv"
    precious.write_text("precious,data\n1,2\n")
    if kind == "folder":
        (out / ".lock").mkdir()
    else:
        (out / ".lock").symlink_to(precious)
    code, err = cli(capsys, "demo", "--out", out)
    assert code == 2 and ".lock" in one_line(err) and "--out" in err
    assert precious.read_text() == "precious,data\n1,2\n"
    assert sorted(p.name for p in out.iterdir()) == [".lock"]
