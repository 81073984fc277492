"""Studies and fits on a real Dask cluster: a scheduler and two worker processes on 127.0.0.1 only.

The cluster is started the way the README tells users to (``dask scheduler`` and ``dask worker``),
as separate processes listening on the loopback address; no traffic goes anywhere else. The tests
compare the cluster's numbers with a local run, byte for byte, and kill a worker during a study.
The worker-kill test runs last: it leaves one worker.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import pytest

from conftest import ROOT, run_cli
from runner.cli import main
from runner.launch import simulate
from runner.observers import ObserverModel
from runner.protocol import parse_protocol

pytestmark = pytest.mark.slow
pytest.importorskip("distributed", reason="the cluster extra (dask, distributed) is not installed: "
                                          "pip install -e '.[cluster]'")

LOOPBACK = "127.0.0.1"
SMALL = """
title = "cluster test: three offsets, one lag"
[design]
adapter_offsets_deg = [-30.0, 15.0, 45.0]
lags = [0]
trials_per_track = 16
practice_trials = 0
"""


def _start(args: list[str]) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", *args], cwd=ROOT, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, env={**os.environ, "PYTHONPATH": str(ROOT)})


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    """A scheduler and two single-thread workers on the loopback address; yields (address, worker processes)."""
    info = tmp_path_factory.mktemp("cluster") / "scheduler.json"
    scheduler = _start(["distributed.cli.dask_scheduler", "--host", LOOPBACK, "--port", "0", "--no-dashboard",
                        "--scheduler-file", str(info)])
    started = [scheduler]
    try:
        deadline = time.monotonic() + 60
        while not info.exists() and time.monotonic() < deadline:
            time.sleep(0.1)
        address = json.loads(info.read_text())["address"]
        assert address.startswith(f"tcp://{LOOPBACK}:")
        workers = [_start(["distributed.cli.dask_worker", address, "--host", LOOPBACK, "--nthreads", "1",
                           "--no-nanny", "--no-dashboard"]) for _ in range(2)]
        started += workers
        yield address, workers
    finally:
        for process in started:
            process.kill()
            process.wait(timeout=30)


@pytest.fixture(scope="module")
def protocol_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("protocol") / "small.toml"
    path.write_text(SMALL, encoding="utf-8")
    return path


def _plan_args(protocol_file, runs: int) -> list[str]:
    return ["plan", str(protocol_file), "--runs", str(runs), "--bootstrap", "20", "--vary",
            "design.trials_per_track=[8, 16]"]


@pytest.fixture(scope="module")
def local_study(protocol_file, tmp_path_factory):
    """The study of the worker-kill test, run locally in this process: the reference numbers."""
    out = tmp_path_factory.mktemp("local")
    assert main([*_plan_args(protocol_file, 4), "--out", str(out), "--jobs", "1"]) == 0
    return out


def test_plan_on_the_cluster_gives_the_local_numbers(cluster, protocol_file, local_study, tmp_path):
    address, _ = cluster
    on_cluster = run_cli(*_plan_args(protocol_file, 2), "--out", tmp_path, "--scheduler", address)
    assert on_cluster.returncode == 0, on_cluster.stderr
    # each task's result file is named by the task's identity: the same task gives the same bytes
    files = sorted(tmp_path.glob("tasks/*.json"))
    assert len(files) == 4
    for f in files:
        assert f.read_bytes() == (local_study / "tasks" / f.name).read_bytes(), f.name


def test_fit_of_several_observers_on_the_cluster_gives_the_local_tables_and_figures(cluster, tmp_path):
    # the cluster's workers also draw each observer's figures while the others are fitted
    address, _ = cluster
    protocol = parse_protocol(SMALL)
    simulate(protocol, "small.toml", SMALL, tmp_path / "logs", ObserverModel(), 3, seed=5, progress=False)
    on_cluster = run_cli("fit", tmp_path / "logs", "--out", tmp_path / "cluster", "--bootstrap", "50",
                         "--scheduler", address)
    assert on_cluster.returncode == 0, on_cluster.stderr
    assert main(["fit", str(tmp_path / "logs"), "--out", str(tmp_path / "local"), "--bootstrap", "50",
                 "--jobs", "1"]) == 0
    for name in ("pse.csv", "aftereffect.csv", "tuning.csv", "fit_details.csv"):
        assert (tmp_path / "cluster" / name).read_bytes() == (tmp_path / "local" / name).read_bytes(), name
    figures = sorted(p.name for p in (tmp_path / "local" / "figures").iterdir())
    assert len(figures) >= 9 and figures == sorted(p.name for p in (tmp_path / "cluster" / "figures").iterdir())
    for name in figures:
        assert (tmp_path / "cluster" / "figures" / name).read_bytes() == \
            (tmp_path / "local" / "figures" / name).read_bytes(), name


def test_an_unreachable_scheduler_is_one_line(tmp_path, capsys, monkeypatch):
    # a port on the loopback address that nothing listens on; Dask retries a refused connection until
    # its timeout, so a short one keeps the test short (the message does not depend on it)
    import socket

    from runner import workpool

    monkeypatch.setattr(workpool, "CONNECT_TIMEOUT_S", 1)

    with socket.socket() as probe:
        probe.bind((LOOPBACK, 0))
        port = probe.getsockname()[1]
    code = main(["recover", str(tmp_path / "none.toml"), "--runs", "1", "--out", str(tmp_path / "r"),
                 "--scheduler", f"tcp://{LOOPBACK}:{port}"])
    assert code == 2  # the missing protocol is named before any connection is tried
    (tmp_path / "p.toml").write_text(SMALL, encoding="utf-8")
    capsys.readouterr()
    code = main(["recover", str(tmp_path / "p.toml"), "--runs", "1", "--out", str(tmp_path / "r"),
                 "--scheduler", f"tcp://{LOOPBACK}:{port}"])
    err = capsys.readouterr().err
    assert code == 2 and "cannot reach a Dask scheduler" in err and err.count("\n") == 1, err


def test_a_tls_address_without_tls_settings_is_one_line_at_once(tmp_path):
    # Dask's client needs an SSL context for tls:// (its configuration's distributed.comm.tls.* files);
    # without it, Dask itself raised a TypeError and then hung 20 s closing the half-made client
    (tmp_path / "p.toml").write_text(SMALL, encoding="utf-8")
    clean = {k: v for k, v in os.environ.items() if not k.startswith("DASK_")}
    done = run_cli("plan", tmp_path / "p.toml", "--runs", "1", "--out", tmp_path / "r",
                   "--scheduler", f"tls://{LOOPBACK}:1", env=clean, timeout=120)
    lines = done.stderr.strip().splitlines()
    assert done.returncode == 2 and len(lines) == 1, done.stderr[-600:]
    assert "TLS address" in lines[0] and "distributed.comm.tls" in lines[0], lines[0]
    # settings that name a missing file, or a file that holds no certificate: Python's ssl module refuses them
    for named in (tmp_path / "missing.pem", tmp_path / "p.toml"):
        tls = {f"DASK_DISTRIBUTED__COMM__TLS__{key}": str(named) for key in ("CA_FILE", "CLIENT__CERT", "CLIENT__KEY")}
        done = run_cli("plan", tmp_path / "p.toml", "--runs", "1", "--out", tmp_path / "r",
                       "--scheduler", f"tls://{LOOPBACK}:1", env={**clean, **tls}, timeout=120)
        lines = done.stderr.strip().splitlines()
        assert done.returncode == 2 and len(lines) == 1, done.stderr[-600:]
        assert "cannot be used" in lines[0] and str(named) in lines[0], lines[0]


def test_losing_a_worker_mid_study_changes_no_number(cluster, protocol_file, local_study, tmp_path):
    address, workers = cluster
    out = tmp_path / "cluster"
    study = subprocess.Popen([sys.executable, "-m", "runner.cli", *_plan_args(protocol_file, 4), "--out", str(out),
                              "--scheduler", address], cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                             text=True)
    deadline = time.monotonic() + 120
    while not list(out.glob("tasks/*.json")) and time.monotonic() < deadline and study.poll() is None:
        time.sleep(0.02)
    finished_before = len(list(out.glob("tasks/*.json")))
    assert study.poll() is None, "the study ended before a worker could be lost"
    os.kill(workers[0].pid, signal.SIGKILL)  # a worker we started, busy with a task of the study
    _, err = study.communicate(timeout=240)
    assert study.returncode == 0, err
    assert 1 <= finished_before < 8
    for name in ("plan_runs.csv", "plan.csv"):
        assert (out / name).read_bytes() == (local_study / name).read_bytes(), name
