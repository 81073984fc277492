"""Simulation studies on local cores: in-memory sessions, same numbers on any number of workers,
results kept across Ctrl-C, one process per study folder, and `recover` against the Fisher information."""

from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from conftest import ROOT, run_cli
from fault_helpers import ended_by_interrupt
from fitting.errors import InputError
from fitting.tables import prepare_trials, read_logs
from runner.cli import main
from runner.launch import derive_seed, simulate, simulate_rows
from runner.observers import ObserverModel
from runner.planner import plan_design
from runner.protocol import parse_protocol
from runner.recovery import recover
from runner.study import StudySettings, expand_designs
from runner.workpool import LocalPool, TaskStore, available_cores, run_tasks
from test_planner import fisher_pse_half_width

SMALL = """
title = "study test: three offsets, one lag"
[design]
adapter_offsets_deg = [-30.0, 15.0, 45.0]
lags = [0]
trials_per_track = 16
practice_trials = 0
"""

# one adapter offset: only the baseline PSE is studied; constant stimuli at known levels
BASELINE = """
title = "study test: baseline PSE with constant stimuli"
[design]
adapter_offsets_deg = [30.0]
lags = [0]
trials_per_track = 60
practice_trials = 0
[procedure]
method = "constant"
levels_deg = [-4.5, -3.0, -1.5, 1.5, 3.0, 4.5]
"""

# four adapter offsets, six trials per track: sessions short enough to have every trial missed
TINY = """
title = "study test: short sessions"
[design]
adapter_offsets_deg = [-60.0, -30.0, 30.0, 60.0]
lags = [0]
trials_per_track = 6
practice_trials = 0
[procedure]
method = "updown"
bounds_deg = [-30.0, 30.0]
"""


def _write(tmp_path, text, name="protocol.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_local_default_uses_the_cores_this_process_may_run_on():
    assert available_cores() == len(os.sched_getaffinity(0))


@pytest.mark.parametrize("workers", [1, 2])
def test_follow_up_tasks_join_the_queue_and_come_back(workers):
    # each first-round result adds one task, whose result adds none: four results in all
    pool = LocalPool(workers)
    seen = []

    def then(key, result):
        seen.append(key)
        return {f"{key}-root": (math.sqrt, result)} if not key.endswith("-root") else {}

    got = run_tasks(abs, {"a": -9, "b": -16}, pool, show=False, then=then)
    assert got == {"a": 9, "b": 16, "a-root": 3.0, "b-root": 4.0}
    assert sorted(seen) == ["a", "a-root", "b", "b-root"]


def test_stopping_local_workers_leaves_no_pool_thread_for_the_exit_hook():
    # A pool thread still running at exit raced the interpreter's exit hook of concurrent.futures
    # (CPython 3.11), which then printed an EBADF traceback after plan's "interrupted" line.
    results = LocalPool(2).map_unordered(time.sleep, {"quick": 0.0, "slow": 60.0})
    t0 = time.perf_counter()
    assert next(results)[0] == "quick"
    results.close()                      # as when Ctrl-C leaves the loop: the pool is stopped
    assert time.perf_counter() - t0 < 20
    left = [t.name for t in threading.enumerate() if type(t).__name__ == "_ExecutorManagerThread" and t.is_alive()]
    assert left == []


def test_a_session_in_memory_holds_the_rows_of_its_trial_log(tmp_path):
    protocol = parse_protocol(SMALL)
    model = ObserverModel(spread_between_observers=0.0)
    [log] = simulate(protocol, "p.toml", SMALL, tmp_path / "logs", model, 1, seed=9, progress=False)
    on_disk = read_logs([str(log)])
    in_memory = prepare_trials(pd.DataFrame(simulate_rows(protocol, model, derive_seed(9, 0))))
    columns = ["trial", "condition", "adapter_offset_deg", "lag", "track", "test_offset_deg", "response_cw"]
    pd.testing.assert_frame_equal(on_disk[columns], in_memory[columns])


def test_same_numbers_on_one_or_two_local_workers_and_reused_on_rerun(tmp_path):
    protocol = parse_protocol(SMALL)
    vary = ['procedure.method=["updown", "weighted"]']
    one = plan_design(protocol, ObserverModel(), StudySettings(runs=2, seed=3, n_boot=20, jobs=1, progress=False),
                      tmp_path / "one", vary, trial_factors=(1,))
    two = plan_design(protocol, ObserverModel(), StudySettings(runs=2, seed=3, n_boot=20, jobs=2, progress=False),
                      tmp_path / "two", vary, trial_factors=(1,))
    pd.testing.assert_frame_equal(one.runs, two.runs)
    assert len(list((tmp_path / "one" / "tasks").glob("*.json"))) == 4
    # a third design added to the grid: the four finished tasks are reused, two new ones run
    before = {p.name: p.stat().st_mtime_ns for p in (tmp_path / "one" / "tasks").glob("*.json")}
    three = plan_design(protocol, ObserverModel(), StudySettings(runs=2, seed=3, n_boot=20, jobs=1, progress=False),
                        tmp_path / "one", ['procedure.method=["updown", "weighted", "bayesian"]'], trial_factors=(1,))
    after = {p.name: p.stat().st_mtime_ns for p in (tmp_path / "one" / "tasks").glob("*.json")}
    assert len(after) == 6 and all(after[k] == v for k, v in before.items())
    kept = three.runs[three.runs["label"] != "trials_per_track=16, method=bayesian"].reset_index(drop=True)
    pd.testing.assert_frame_equal(kept.drop(columns="design"), one.runs.drop(columns="design"))


@pytest.mark.slow
def test_ctrl_c_keeps_finished_tasks_and_a_rerun_continues(tmp_path, capsys):
    path = _write(tmp_path, SMALL)
    out = tmp_path / "study"
    # 12 runs, so that the interrupt lands while tasks remain even on a loaded machine (with 6, CI once saw
    # the whole plan finish between the first task file and the signal)
    args = ["plan", str(path), "--runs", "12", "--bootstrap", "20", "--jobs", "1", "--vary",
            "design.trials_per_track=[16]"]
    proc = subprocess.Popen([sys.executable, "-m", "runner.cli", *args, "--out", str(out)], cwd=ROOT,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and not list(out.glob("tasks/*.json")):
        time.sleep(0.02)
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert ended_by_interrupt(proc.returncode), err
    assert len(err.strip().splitlines()) == 1 and "run the same command again to continue" in err, err
    kept = {p.name: p.stat().st_mtime_ns for p in out.glob("tasks/*.json")}
    assert 1 <= len(kept) < 12
    assert main([*args, "--out", str(out)]) == 0
    after = {p.name: p.stat().st_mtime_ns for p in out.glob("tasks/*.json")}
    assert len(after) == 12 and all(after[k] == v for k, v in kept.items())  # finished tasks not redone
    assert main([*args, "--out", str(tmp_path / "fresh")]) == 0
    assert (out / "plan_runs.csv").read_bytes() == (tmp_path / "fresh" / "plan_runs.csv").read_bytes()


def _children(pid: int) -> list[int]:
    """Processes whose parent is ``pid`` (from /proc)."""
    found = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[1]) == pid:
            found.append(int(stat.parent.name))
    return found


@pytest.mark.slow
def test_a_local_worker_killed_mid_study_is_one_line_and_a_rerun_gives_the_same_numbers(tmp_path):
    path = _write(tmp_path, SMALL)
    out = tmp_path / "study"
    args = ["recover", str(path), "--runs", "8", "--bootstrap", "20", "--jobs", "2"]
    proc = subprocess.Popen([sys.executable, "-m", "runner.cli", *args, "--out", str(out)], cwd=ROOT,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and not list(out.glob("tasks/*.json")):
        time.sleep(0.02)
    # the command's children: the forkserver; its children: the worker processes
    workers = [w for server in _children(proc.pid) for w in _children(server)]
    assert workers, "no local worker processes found"
    os.kill(workers[0], signal.SIGKILL)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 2 and err.count("\n") == 1 and "worker process died" in err, err
    assert 1 <= len(list(out.glob("tasks/*.json"))) < 8
    assert main([*args, "--out", str(out)]) == 0
    assert main([*args, "--out", str(tmp_path / "fresh")]) == 0
    assert (out / "recovery_runs.csv").read_bytes() == (tmp_path / "fresh" / "recovery_runs.csv").read_bytes()


def test_a_second_process_on_the_same_study_folder_is_refused(tmp_path):
    path = _write(tmp_path, SMALL)
    with TaskStore(tmp_path / "study" / "tasks"):
        busy = run_cli("recover", path, "--runs", "1", "--bootstrap", "20", "--out", tmp_path / "study")
    assert busy.returncode == 2
    assert busy.stderr.strip().count("\n") == 0 and "is in use by process" in busy.stderr, busy.stderr


def test_an_unreadable_task_file_is_redone(tmp_path):
    protocol = parse_protocol(SMALL)
    settings = StudySettings(runs=2, seed=1, n_boot=20, jobs=1, progress=False)
    first = recover(protocol, ObserverModel(), settings, tmp_path / "r")
    victim = sorted((tmp_path / "r" / "tasks").glob("*.json"))[0]
    victim.write_text('{"result": [', encoding="utf-8")  # as if torn by a crash
    (tmp_path / "r" / "tasks" / ".part-left-by-kill").write_text("x", encoding="utf-8")
    again = recover(protocol, ObserverModel(), settings, tmp_path / "r")
    pd.testing.assert_frame_equal(first.runs, again.runs)
    assert not list((tmp_path / "r" / "tasks").glob(".part-*"))


def test_vary_errors_name_the_option_and_field():
    protocol = parse_protocol(SMALL)
    model = ObserverModel()
    with pytest.raises(InputError, match="expected FIELD="):
        expand_designs(protocol, model, ["procedure.method"])
    with pytest.raises(InputError, match="--vary procedure.method.*not a TOML array"):
        expand_designs(protocol, model, ["procedure.method=[updown]"])
    with pytest.raises(InputError, match="--vary procedure.methd=updown: procedure.methd: unknown field"):
        expand_designs(protocol, model, ['procedure.methd=["updown"]'])
    with pytest.raises(InputError, match="design.trials_per_track.*multiple of the 8 levels"):
        expand_designs(protocol, model, ['procedure.method=["constant"]', "design.trials_per_track=[12]"])
    with pytest.raises(InputError, match="model.lapse"):
        expand_designs(protocol, model, ["model.lapse=[2.0]"])
    with pytest.raises(InputError, match="varied twice"):
        expand_designs(protocol, model, ["model.lapse=[0.0]", "model.lapse=[0.01]"])
    # every run simulates the model's own observer: the designs were labelled 0 and 5 and gave equal numbers
    with pytest.raises(InputError, match="--vary model.spread_between_observers: .* changes nothing"):
        expand_designs(protocol, model, ["model.spread_between_observers=[0, 5]"])
    with pytest.raises(InputError, match="unknown observer model key") as unknown:
        expand_designs(protocol, model, ["model.nonexistent=[1]"])
    assert "spread_between_observers" not in str(unknown.value)
    grid = expand_designs(protocol, model, ["design.trials_per_track=[8, 16]", "model.amplitude_deg=[1, 3]"])
    assert [(d.protocol.design.trials_per_track, d.model.amplitude_deg) for d in grid] == \
        [(8, 1.0), (8, 3.0), (16, 1.0), (16, 3.0)]
    assert all(d.model.spread_between_observers == 0 for d in grid)
    # the README's grid: a protocol that starts its up-down tracks at 20 deg was refused for the Bayesian designs
    written = parse_protocol(SMALL + "[procedure]\nstart_offset_deg = 20.0\n")
    methods = expand_designs(written, model, ['procedure.method=["updown", "bayesian", "weighted", "constant"]'])
    assert [d.protocol.procedure.start_offset_deg for d in methods if d.protocol.procedure.method in
            ("updown", "weighted")] == [20.0, 20.0]
    assert [d.protocol.procedure.method for d in methods] == ["updown", "bayesian", "weighted", "constant"]
    with pytest.raises(InputError, match="procedure.start_offset_deg: has no meaning with method"):   # asked for
        expand_designs(written, model, ['procedure.start_offset_deg=[10]', 'procedure.method=["bayesian"]'])


@pytest.mark.slow
def test_recover_baseline_pse_error_matches_the_fisher_information(tmp_path):
    protocol = parse_protocol(BASELINE)
    model = ObserverModel(pse_deg=0.5, spread_deg=3.0, lapse=0.0)
    settings = StudySettings(runs=40, seed=4, n_boot=20, lapse=0.0, jobs=2, progress=False)
    result = recover(protocol, model, settings, tmp_path / "recovery")
    row = result.table[result.table["quantity"] == "baseline_pse"].iloc[0]
    assert row["truth"] == 0.5 and row["runs_with_estimate"] == 40
    # baseline: 2 tracks x 60 trials over 6 levels = 20 trials per level; asymptotic SD of the
    # maximum-likelihood PSE = half-width / 1.96 (Fisher information of a binomial model, see
    # tests/test_planner.py::fisher_pse_half_width). 40 runs estimate an SD to about 11 %; 35 % = 3 SE.
    sd = fisher_pse_half_width(protocol.procedure.levels_deg, 20, 0.0, 3.0) / 1.959964
    assert row["rmse"] == pytest.approx(sd, rel=0.35), (row["rmse"], sd)
    assert abs(row["bias"]) < 3 * sd / math.sqrt(40)
    # coverage and its Monte Carlo SE from the per-run table (binomial SE; common practice, no source)
    runs = result.runs[result.runs["quantity"] == "baseline_pse"]
    share = float(((runs["ci_low"] <= 0.5) & (runs["ci_high"] >= 0.5)).mean())
    assert row["coverage"] == pytest.approx(share)
    assert row["coverage_se"] == pytest.approx(math.sqrt(share * (1 - share) / 40)) if 0 < share < 1 else \
        math.isnan(row["coverage_se"])
    files = result.write(tmp_path / "recovery")
    assert {f.name for f in files} == {"recovery.csv", "recovery_runs.csv", "recovery.png", "recovery.pdf"}


def test_scheduler_without_the_cluster_extra_is_one_line(tmp_path):
    path = _write(tmp_path, SMALL)
    code = ("import sys; sys.modules['distributed'] = None; from runner.cli import main; "
            f"sys.exit(main(['plan', {str(path)!r}, '--runs', '1', '--out', {str(tmp_path / 'p')!r}, "
            "'--scheduler', 'tcp://127.0.0.1:8786']))")
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert done.returncode == 2
    assert done.stderr.strip().count("\n") == 0 and "pip install 'aftershift[cluster]'" in done.stderr, done.stderr


def test_study_options_are_checked(tmp_path, capsys):
    path = _write(tmp_path, SMALL)
    for bad, option in ((["--runs", "0"], "--runs"), (["--bootstrap", "5"], "--bootstrap"),
                        (["--lapse", "0.7"], "--lapse"), (["--jobs", "0"], "--jobs"),
                        (["--jobs", "2", "--scheduler", "tcp://x:1"], "--scheduler")):
        assert main(["recover", str(path), "--out", str(tmp_path / "r"), *bad]) == 2
        err = capsys.readouterr().err
        assert option in err and err.count("\n") == 1, err
    assert not (tmp_path / "r").exists()


def test_stream_protocols_are_studied_with_the_nback_fit(tmp_path):
    from runner.planner import scaled_trials
    from runner.protocol import load_protocol, protocol_from_dict

    protocol = load_protocol(ROOT / "protocols" / "stream_nback.toml")
    for factor in (0.1, 0.33, 0.5, 2):  # every scaled trial count passes the schema's balance rule
        n = scaled_trials(protocol, factor)
        raw = protocol.model_dump(mode="json", exclude_none=True)
        raw["design"]["trials_per_track"] = n
        protocol_from_dict(raw, f"factor {factor}")
    settings = StudySettings(runs=2, seed=2, n_boot=20, jobs=1, progress=False)
    model = ObserverModel()
    result = recover(protocol, model, settings, tmp_path / "r", ["design.trials_per_track=[96]"])
    k = protocol.stream.nback_periods
    amp = result.table[result.table["quantity"] == "amplitude"]
    assert list(amp["lag"]) == list(range(k))
    # the README's stream observer: the n-th preceding period shifts by A·g(Δ)·exp(−(n − 1)/τ), lag = n − 1
    assert np.allclose(amp["truth"], model.amplitude_deg * np.exp(-np.arange(k) / model.decay_periods))
    assert set(result.table["quantity"]) == {"amplitude", "peak_offset", "decay", "baseline_pse"}
    assert result.table["runs_with_estimate"].min() == 2


def test_study_tasks_fit_with_the_pilot_that_reruns_the_tracks(monkeypatch):
    # plan and recover must predict the intervals `fit` computes, whose default pilot re-runs the tracks;
    # a simulated session in memory once gave track numbers as "1.0", and the pilot silently kept the
    # levels fixed instead (the note below says so when it happens)
    import dataclasses

    import runner.study as study
    from runner.protocol import load_protocol

    seen = []
    fit_trials = study.fit_trials

    def spy(*args, **kwargs):
        report = fit_trials(*args, **kwargs)
        seen.append((kwargs.get("track_use"), report.notes))
        return report

    monkeypatch.setattr(study, "fit_trials", spy)
    protocol = load_protocol(ROOT / "protocols" / "pilot_short.toml")
    study.run_session_task({"protocol": protocol.model_dump(mode="json", exclude_none=True, exclude_unset=True),
                            "model": dataclasses.asdict(ObserverModel()), "seed": 3, "n_boot": 50,
                            "lapse": "free"})
    (track_use, notes), = seen
    assert track_use == "pilot"
    assert not any("levels fixed" in n for ns in notes.values() for n in ns), notes


def test_a_killed_worker_starter_is_one_lost_worker_not_a_traceback(tmp_path, monkeypatch):
    # kill -9 of the forkserver while a pool asked it for a worker ended in a 52-line EOFError traceback
    import multiprocessing.forkserver as forkserver
    import threading
    from concurrent.futures import ProcessPoolExecutor

    from runner import workpool

    (tmp_path / "slow_to_import.py").write_text("import time\ntime.sleep(3)\n")
    monkeypatch.setenv("PYTHONPATH", os.pathsep.join([str(tmp_path), os.environ.get("PYTHONPATH", "")]))
    workpool._stop_server()                                 # a new server, which imports the slow module
    ctx = workpool._start_server(("slow_to_import",))      # the server is still importing when killed
    threading.Timer(0.5, os.kill, (forkserver._forkserver._forkserver_pid, signal.SIGKILL)).start()
    pool = ProcessPoolExecutor(1, mp_context=ctx)
    try:
        with pytest.raises(workpool.WorkerLost, match="the process that starts local workers died"):
            workpool._submit(pool, abs, -1)
    finally:
        pool.shutdown(wait=False, cancel_futures=True)


def test_plan_and_recover_run_on_the_bundled_protocol_in_cd_m2(tmp_path, capsys):
    # plan and recover once refused every protocol with [light]: the task's copy of the protocol held both
    # the resolved display.background and light.background_cd_m2, and was validated again
    import json

    import tomllib

    path = ROOT / "protocols" / "calibrated_luminance.toml"
    tiny = ["--runs", "1", "--bootstrap", "20", "--jobs", "1", "--vary", 'procedure.method=["updown"]']  # cheap tracks
    assert main(["plan", str(path), *tiny, "--vary", "design.trials_per_track=[12]", "--out", str(tmp_path / "plan")]) == 0
    vary = "light.background_cd_m2=[0.5, 2.0]"
    assert main(["recover", str(path), *tiny, "--vary", vary, "--out", str(tmp_path / "rec")]) == 0
    capsys.readouterr()
    assert (tmp_path / "plan" / "plan.csv").is_file() and (tmp_path / "rec" / "recovery.csv").is_file()
    # each design's task holds the grey level its luminance needs on the profile's display, by hand from the
    # gain-offset-gamma model L = black + amplitude * (gain * v + 1 - gain) ** gamma (Berns 1996; from memory)
    grey = tomllib.loads((path.parent / "light" / "example_profile.toml").read_text())["model"]["grey"]
    levels = {}
    for task_file in (tmp_path / "rec" / "tasks").glob("*.json"):
        task = json.loads(task_file.read_text())
        luminance = float(task["about"]["designs"][0].split(",")[-1].split("=")[1])
        frac = ((luminance - grey["black_cd_m2"]) / grey["amplitude_cd_m2"]) ** (1 / grey["gamma"])
        levels[luminance] = (frac - (1 - grey["gain"])) / grey["gain"]
    assert sorted(levels) == [0.5, 2.0]
    designs = expand_designs(parse_protocol(path.read_text(), str(path)), ObserverModel(), [vary])
    assert [d.protocol.display.background for d in designs] == pytest.approx([levels[0.5], levels[2.0]], rel=1e-9)


def test_sessions_without_usable_trials_are_failed_runs_not_the_end_of_the_study(tmp_path, capsys):
    # one session whose every trial was missed once ended the whole study with exit 2, naming no design
    path = _write(tmp_path, TINY)
    settings = ["--runs", "6", "--seed", "4", "--bootstrap", "20", "--jobs", "1"]
    assert main(["recover", str(path), *settings, "--vary", "model.miss_rate=[0.97, 0.9999]",
                 "--out", str(tmp_path / "r")]) == 0
    out = capsys.readouterr().out
    # count the sessions without an answered trial directly from the simulated sessions
    protocol = parse_protocol(TINY)
    failed = {}
    for miss in (0.97, 0.9999):
        model = ObserverModel(miss_rate=miss, spread_between_observers=0.0)
        failed[miss] = sum(not any(row["response_cw"] is not None and not row["practice"]
                                   for row in simulate_rows(protocol, model, derive_seed(4, r))) for r in range(6))
    assert 0 < failed[0.97] < 6 and failed[0.9999] == 6
    table = pd.read_csv(tmp_path / "r" / "recovery.csv")
    assert list(table.groupby("label", sort=False)["runs_without_trials"].max()) == [failed[0.97], 6]
    assert f"design miss_rate=0.97: {failed[0.97]} of 6 simulated sessions had no usable trial" in out
    assert "design miss_rate=0.9999: none of its 6 simulated sessions had a usable trial" in out
    runs = pd.read_csv(tmp_path / "r" / "recovery_runs.csv")
    assert runs.loc[runs["usable_trials"] == 0, "estimate"].isna().all()
    # plan counts them the same way
    assert main(["plan", str(path), *settings, "--vary", "model.miss_rate=[0.97]", "--vary",
                 "design.trials_per_track=[6]", "--out", str(tmp_path / "p")]) == 0
    plan = pd.read_csv(tmp_path / "p" / "plan.csv")
    assert set(plan["runs_without_trials"]) == {failed[0.97]}


def test_task_files_that_do_not_validate_are_redone_with_one_note(tmp_path):
    # a text where a number belongs once gave a 56-line traceback, 1e308 was averaged into the table (RMSE inf),
    # and another replicate's file copied over a task's was used as that task's result
    import json

    protocol = parse_protocol(TINY)
    settings = StudySettings(runs=4, seed=2, n_boot=20, jobs=1, progress=False)
    first = recover(protocol, ObserverModel(), settings, tmp_path / "r")
    assert not any("redone" in n for n in first.notes)
    files = {json.loads(f.read_text())["about"]["replicate"]: f for f in (tmp_path / "r" / "tasks").glob("*.json")}
    assert sorted(files) == [0, 1, 2, 3]

    def edit(replicate, change):
        stored = json.loads(files[replicate].read_text())
        change(stored["result"]["rows"][-1])
        files[replicate].write_text(json.dumps(stored))

    edit(0, lambda row: row.update(estimate="abc"))
    edit(1, lambda row: row.update(estimate=1e308))
    files[2].write_text(files[3].read_text())   # replicate 3's result under replicate 2's name
    again = recover(protocol, ObserverModel(), settings, tmp_path / "r")
    pd.testing.assert_frame_equal(first.runs, again.runs)
    assert [n for n in again.notes if "redone" in n] == \
        [f"3 task files in {tmp_path / 'r' / 'tasks'} could not be used (unreadable, damaged, or not the task named) "
         "and were redone"]
    # the files were written again and are used as they are from now on
    assert not any("redone" in n for n in recover(protocol, ObserverModel(), settings, tmp_path / "r").notes)


def test_study_and_output_options_refuse_what_would_misfire(tmp_path, capsys, monkeypatch):
    path = _write(tmp_path, TINY)
    work = tmp_path / "cwd"
    work.mkdir()
    monkeypatch.chdir(work)
    study = ["--runs", "1", "--bootstrap", "20", "--jobs", "1"]
    refused = [
        # an empty --out once wrote into the current folder
        (["plan", str(path), *study, "--out", ""], "argument: --out: is empty"),
        (["recover", str(path), *study, "--out", ""], "argument: --out: is empty"),
        (["simulate", str(path), "--out", " "], "argument: --out: is empty"),
        (["fit", str(tmp_path / "no-logs"), "--out", ""], "argument: --out: is empty"),
        (["compare", str(tmp_path / "no-fit"), str(tmp_path / "p.csv"), "--out", ""], "argument: --out: is empty"),
        # a target no interval reaches (1e-300 overflowed the trial counts to 0)
        (["plan", str(path), *study, "--target-half-width", "1e-300", "--out", "p"],
         "--target-half-width: expected at least 0.01 deg"),
        # a section the protocol lacks (it silently turned an adapt-test protocol into a stream)
        (["recover", str(path), *study, "--vary", "stream.period_frames=[6]", "--out", "r"],
         "--vary stream.period_frames: the protocol has no [stream] section"),
        # the seed limit of every other command
        (["recover", str(path), *study, "--seed", str(2**32), "--out", "r"], "--seed: a seed must be from 0 to"),
    ]
    for args, message in refused:
        assert main(args) == 2, args
        err = capsys.readouterr().err.strip()
        assert message in err and len(err.splitlines()) == 1, (args, err)
    assert not list(work.iterdir())


def test_a_named_pipe_as_the_protocol_is_refused_not_waited_on(tmp_path):
    fifo = tmp_path / "f.toml"
    os.mkfifo(fifo)
    done = run_cli("check", fifo, timeout=30)   # it used to wait for a writer for ever
    assert done.returncode == 2
    assert done.stderr.strip() == f"aftershift: {fifo}: file: is not a regular file (a pipe or a device?); " \
                                  "expected a protocol file (.toml)"


def test_task_files_follow_the_umask_as_other_outputs_do(tmp_path):
    old = os.umask(0o027)
    try:
        recover(parse_protocol(TINY), ObserverModel(), StudySettings(runs=1, seed=1, n_boot=20, jobs=1, progress=False),
                tmp_path / "r").write(tmp_path / "r")
    finally:
        os.umask(old)
    task, = (tmp_path / "r" / "tasks").glob("*.json")
    # 0666 & ~umask, the mode open(2) gives a new file (POSIX open(); the same rule as fitting.outputs)
    assert task.stat().st_mode & 0o777 == 0o640 == (tmp_path / "r" / "recovery.csv").stat().st_mode & 0o777
