"""Resuming: a scan killed with SIGKILL (or interrupted with Ctrl-C) and run again ends with
the numbers of an uninterrupted run, and computes only the chunks that were missing."""

import io
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from tba.runfile import load_run
from tba.scan import run_scan
from tba.storage import POINT_VARIABLES, read_store

# Free fermion at alpha = 0.5 has no real ground state below R ~ 0.6 (PHYSICS.md section 4,
# CFT estimate 0.72): each of those points costs the solver a continuation (~0.1 s), which
# keeps the scan running long enough to be killed half-way.
RUN = """\
# resume test: free fermion, both signs of alpha, {count} radii in chunks of 2 (about 2 s)
output = "scan.h5"

[[models]]
name = "free-fermion"

[deformation]
alphas = [-0.3, 0.5]

[radii]
start = 0.1
stop = 3.0
count = {count}
spacing = "log"

[solver]
tol = 1e-10

[scan]
chunk_size = 2
"""
NUMBERS = [name for name, (kind, _, _) in POINT_VARIABLES.items() if kind != "str"]


def _start(runfile, workers):
    return subprocess.Popen([sys.executable, "-m", "tba", "run", str(runfile), "--workers", str(workers)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _done(path):
    """Chunks marked done, read while another process may be writing (None if unreadable now)."""
    try:
        with h5py.File(path, "r", locking=False) as f:
            return int(f["progress/done"][...].sum())
    except Exception:  # the writer may be half-way through a flush: try again
        return None


def _wait_for_first_chunk(proc, path, timeout=120):
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        if proc.poll() is not None:
            pytest.fail(f"tba run ended before it could be interrupted: {proc.communicate()}")
        if path.exists() and (_done(path) or 0) >= 1:
            return
        time.sleep(0.005)
    proc.kill()
    pytest.fail("no chunk was written in time")


COUNT = 32


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """The same scan, uninterrupted, in this process."""
    d = tmp_path_factory.mktemp("reference")
    (d / "run.toml").write_text(RUN.format(count=COUNT))
    run = load_run(d / "run.toml")
    run_scan(run, workers=1, log=io.StringIO())
    return read_store(run.output)


def _same_numbers(a, b):
    for name in NUMBERS:
        assert np.array_equal(a[name], b[name], equal_nan=True), name


def test_sigkill_then_rerun_gives_the_uninterrupted_numbers(tmp_path, reference):
    runfile = tmp_path / "run.toml"
    runfile.write_text(RUN.format(count=COUNT))
    path = tmp_path / "scan.h5"
    total = len(load_run(runfile).chunks())

    proc = _start(runfile, workers=1)
    _wait_for_first_chunk(proc, path)
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate()
    assert proc.returncode == -signal.SIGKILL
    killed = read_store(path)  # the file is readable after kill -9
    saved = int(killed.progress["done"].sum())
    assert 1 <= saved < total, "the kill should land half-way through the scan"

    rerun = subprocess.run([sys.executable, "-m", "tba", "run", str(runfile), "--workers", "1"],
                           capture_output=True, text=True, timeout=300)
    assert rerun.returncode == 0, rerun.stderr
    m = re.search(r"computed (\d+) chunks \((\d+) were already done\)", rerun.stderr)
    assert m, rerun.stderr
    computed, before = int(m.group(1)), int(m.group(2))
    assert before == saved and computed == total - saved  # finished chunks are not recomputed

    data = read_store(path)
    assert data.complete
    inv = data.progress["invocation"]
    assert (inv == 1).sum() == saved and (inv == 2).sum() == total - saved
    assert [h["invocation"] for h in data.history] == [1, 2]
    assert data.history[0]["finished"] is None and data.history[1]["chunks_computed"] == computed
    # chunks kept from the killed run are untouched, and everything equals an uninterrupted run
    kept = killed.progress["done"].astype(bool)
    assert np.array_equal(data.progress["seconds"][kept], killed.progress["seconds"][kept])
    _same_numbers(data, reference)


def _children(pid):
    try:
        text = Path(f"/proc/{pid}/task/{pid}/children").read_text()
    except OSError:
        return []
    return [int(p) for p in text.split()]


def _alive(pid):
    try:
        state = Path(f"/proc/{pid}/status").read_text()
    except OSError:
        return False
    return "\nState:\tZ" not in state


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_ctrl_c_with_workers_saves_and_resumes(tmp_path, reference):
    runfile = tmp_path / "run.toml"
    runfile.write_text(RUN.format(count=COUNT))
    path = tmp_path / "scan.h5"
    total = len(load_run(runfile).chunks())

    proc = _start(runfile, workers=2)
    _wait_for_first_chunk(proc, path)  # solved by the driver itself, before the pool starts
    time.sleep(0.3)  # the pool has started: its workers are importing or solving
    workers = _children(proc.pid)
    assert workers, "the driver should have started its worker processes"
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    lines = err.strip().splitlines()
    assert "interrupted" in lines[-1] and "run the same command again to resume" in lines[-1]
    assert "Traceback" not in err, err
    # the worker processes are gone too
    deadline = time.monotonic() + 10
    while any(_alive(p) for p in workers) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert not any(_alive(p) for p in workers)
    saved = int(read_store(path).progress["done"].sum())
    assert 1 <= saved < total

    rerun = subprocess.run([sys.executable, "-m", "tba", "run", str(runfile), "--workers", "1"],
                           capture_output=True, text=True, timeout=300)
    assert rerun.returncode == 0, rerun.stderr
    assert f"computed {total - saved} chunks ({saved} were already done)" in rerun.stderr
    _same_numbers(read_store(path), reference)
