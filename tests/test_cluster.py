"""Scans on a real dask.distributed LocalCluster (worker processes): the same numbers as a
serial run, a worker killed mid-scan, a task that keeps killing its workers, a driver
killed mid-scan and resumed, and the one-line errors of the cluster options.

Everywhere here the serial run of the same resolved run file is the reference: a chunk is
a pure function of (run, chunk), so any executor must give its numbers bit for bit."""

import io
import json
import os
import re
import signal
import subprocess
import sys
import threading
import time

import distributed  # the test extra installs it: these tests must run, never be skipped
import h5py
import numpy as np
import pytest

import tba.scans.cluster
from tba.cli import main
from tba.scans.cluster import DaskBackend, local_cluster
from tba.scans.runfile import load_run
from tba.store.driver import ScanFailed, run_scan
from tba.store.hdf5 import BRANCH_VARIABLES, POINT_VARIABLES, read_store

# E8 chunks take ~0.1 s each (long enough for a worker to die in the middle of one), the
# free fermion's a few ms; alpha = 0.05 has a branch point per model, -0.05 none.
RUN = """\
# cluster tests: free fermion and E8, both signs of alpha, 16 radii in chunks of 4 (about 2 s)
output = "scan.h5"

[[models]]
name = "free-fermion"

[[models]]
name = "ising-e8"

[deformation]
alphas = [-0.05, 0.05]

[radii]
start = 0.5
stop = 3.0
count = 16

[solver]
tol = 1e-10

[scan]
chunk_size = 4
"""
NUMBERS = [name for name, (kind, _, _) in POINT_VARIABLES.items() if kind != "str"]
BRANCH_NUMBERS = [name for name, (kind, _, _) in BRANCH_VARIABLES.items() if kind != "str"]
TOTAL = 16  # chunks


def _same_numbers(data, reference):
    # serial run of the same resolved run file is the reference
    assert data.complete
    for name in NUMBERS:
        assert np.array_equal(data[name], reference[name], equal_nan=True), name
    for name in BRANCH_NUMBERS:
        assert np.array_equal(data.branch[name], reference.branch[name], equal_nan=True), name


@pytest.fixture(scope="module")
def runfile(tmp_path_factory):
    path = tmp_path_factory.mktemp("cluster") / "run.toml"
    path.write_text(RUN)
    return path


@pytest.fixture(scope="module")
def reference(runfile):
    """The serial run, in this process."""
    run = load_run(runfile).with_output(runfile.parent / "serial.h5")
    run_scan(run, workers=1, log=io.StringIO())
    data = read_store(run.output)
    assert len(data.progress["done"]) == TOTAL and data.complete
    return data


@pytest.fixture(scope="module")
def cluster():
    """A LocalCluster of 2 single-threaded worker processes (each restarted by its nanny
    when killed) and a client."""
    with local_cluster(2) as lc, distributed.Client(lc) as client:
        yield lc, client


def _done(path):
    """Chunks marked done, read while the driver may be writing (0 if unreadable now)."""
    try:
        with h5py.File(path, "r", locking=False) as f:
            return int(f["progress/done"][...].sum())
    except (OSError, KeyError):
        return 0


def _two_workers(client):
    client.wait_for_workers(2, timeout=60)
    pids = client.run(os.getpid)
    assert len(pids) == 2
    return pids


def test_local_cluster_from_the_command_line_equals_serial(runfile, reference, tmp_path, capsys):
    out = tmp_path / "dask.h5"
    assert main(["run", str(runfile), "--cluster", "local:2", "-o", str(out)]) == 0
    err = capsys.readouterr().err
    assert "dask local cluster, 2 worker processes" in err
    assert f"computed {TOTAL} chunks (0 were already done) and 4 branch points" in err
    data = read_store(out)
    _same_numbers(data, reference)
    assert data.history[0]["workers"] == 2 and "dask" in data.history[0]["executor"]


def test_a_killed_worker_has_its_chunk_recomputed(runfile, reference, tmp_path, cluster):
    lc, client = cluster
    pids = _two_workers(client)
    victim, pid = sorted(pids.items())[0]
    out = tmp_path / "killed.h5"
    killed = []

    def kill_when_busy():
        # SIGKILL the victim as soon as the scheduler has given it a chunk of this scan
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and not killed:
            busy = client.processing(workers=[victim]).get(victim, ())
            if any(str(key).startswith("tba-chunk") for key in busy):
                os.kill(pid, signal.SIGKILL)
                killed.append(_done(out))
                return
            time.sleep(0.005)

    killer = threading.Thread(target=kill_when_busy, daemon=True)
    killer.start()
    summary = run_scan(load_run(runfile), out, backend=DaskBackend(client=client), log=io.StringIO())
    killer.join(5)
    assert killed, "the worker was never given a chunk"
    assert killed[0] < TOTAL, "the worker should die in the middle of the scan"
    assert summary.complete and summary.chunks_computed == TOTAL and not summary.failed
    _same_numbers(read_store(out), reference)
    # it really died (its nanny started a new process in its place)
    assert pid not in _two_workers(client).values()


def test_a_task_that_keeps_killing_workers_fails_clearly_and_the_rest_is_saved(
        runfile, reference, tmp_path, cluster, monkeypatch):
    lc, client = cluster
    _two_workers(client)
    target = TOTAL - 1
    real = tba.scans.cluster._chunk_task

    def poisoned(run, chunk, version):  # sent by value: kills any worker that runs chunk `target`
        if chunk.index == target:
            os.kill(os.getpid(), signal.SIGKILL)
        return real(run, chunk, version)

    monkeypatch.setattr(tba.scans.cluster, "_chunk_task", poisoned)
    monkeypatch.setattr(lc.scheduler, "allowed_failures", 1)  # give up after two dead workers
    out = tmp_path / "poison.h5"
    log = io.StringIO()
    with pytest.raises(ScanFailed) as info:
        run_scan(load_run(runfile), out, backend=DaskBackend(client=client), log=log)
    message = str(info.value)
    assert "\n" not in message and "KilledWorker" in message and str(out) in message
    failed = {f.chunk.index for f in info.value.summary.failed if f.chunk is not None}
    assert target in failed
    assert f"chunk {target} (ising-e8, alpha = 0.05" in log.getvalue()
    data = read_store(out)
    done = data.progress["done"].astype(bool)
    assert not done[target] and done.sum() == TOTAL - len(failed)  # everything else is saved
    assert data.history[0]["failed"] and data.history[0]["finished"]

    # the same command again (the chunk no longer kills): only the missing ones are computed
    monkeypatch.setattr(tba.scans.cluster, "_chunk_task", real)
    monkeypatch.setattr(lc.scheduler, "allowed_failures", 3)
    _two_workers(client)
    summary = run_scan(load_run(runfile), out, backend=DaskBackend(client=client), log=io.StringIO())
    assert summary.chunks_computed == len(failed) and summary.complete
    _same_numbers(read_store(out), reference)


def test_a_killed_driver_is_resumed_from_its_file(runfile, reference, tmp_path, cluster):
    lc, client = cluster
    _two_workers(client)
    out = tmp_path / "driver.h5"
    args = ["run", str(runfile), "--scheduler", lc.scheduler_address, "-o", str(out)]
    proc = subprocess.Popen([sys.executable, "-m", "tba", *args], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and proc.poll() is None and not _done(out):
        time.sleep(0.005)
    proc.kill()
    proc.communicate()
    assert proc.returncode == -signal.SIGKILL, "the driver should be killed mid-scan"
    saved = int(read_store(out).progress["done"].sum())  # readable after kill -9
    assert 1 <= saved < TOTAL

    # resumed through a scheduler file (as dask scheduler --scheduler-file writes it)
    scheduler_file = tmp_path / "scheduler.json"
    scheduler_file.write_text(json.dumps({"address": lc.scheduler_address}))
    args[args.index("--scheduler") + 1] = str(scheduler_file)
    log = io.StringIO()
    sys_err, sys.stderr = sys.stderr, log
    try:
        assert main(args) == 0
    finally:
        sys.stderr = sys_err
    m = re.search(r"computed (\d+) chunks \((\d+) were already done\)", log.getvalue())
    assert m and int(m.group(2)) == saved and int(m.group(1)) == TOTAL - saved, log.getvalue()
    _same_numbers(read_store(out), reference)


def test_cluster_options_fail_on_one_line(runfile, tmp_path, capsys, monkeypatch):
    out = tmp_path / "x.h5"
    cases = [(["--cluster", "local:0"], "--cluster"), (["--cluster", "slurm"], "--cluster"),
             (["--cluster", "local:2", "--workers", "2"], "--workers"),
             (["--scheduler", "tcp://x:1", "--cluster", "local:2"], "--cluster")]
    for extra, option in cases:
        assert main(["run", str(runfile), "-o", str(out), *extra]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and err[0].startswith("tba: error: ") and option in err[0], err
    # nobody listens there: one line naming --scheduler, and no file is created
    monkeypatch.setattr(tba.scans.cluster, "CONNECT_TIMEOUT", 1)
    assert main(["run", str(runfile), "-o", str(out), "--scheduler", "tcp://127.0.0.1:9"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--scheduler" in err[0] and "127.0.0.1:9" in err[0], err
    assert not out.exists()
    # without dask: one line naming the option, and plain tba run still works
    monkeypatch.setitem(sys.modules, "distributed", None)
    for option, value in (("--scheduler", "tcp://127.0.0.1:8786"), ("--cluster", "local:2")):
        assert main(["run", str(runfile), "-o", str(out), option, value]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and option in err[0] and "tba-flow[cluster]" in err[0], err
        assert not out.exists()


def test_import_tba_and_plain_run_do_not_import_dask(runfile, tmp_path):
    code = ("import sys, tba, tba.cli, tba.store.driver, tba.scans.cluster, tba.store.merge; "
            "sys.exit(1 if 'distributed' in sys.modules or 'dask' in sys.modules else 0)")
    assert subprocess.run([sys.executable, "-c", code], timeout=120).returncode == 0
