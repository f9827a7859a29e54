"""Resuming: a scan killed with SIGKILL (or interrupted with Ctrl-C) and run again ends with
the numbers of an uninterrupted run, and computes only the chunks (and branch points) that
were missing."""

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

import tba.scans.backends
import tba.scans.points
from tba.physics.flow import branch_point
from tba.scans.runfile import load_run, loads_run
from tba.store.driver import ScanInterrupted, run_scan
from tba.store.hdf5 import BP_FOUND, BP_NONE, BRANCH_VARIABLES, NOT_COMPUTED, POINT_VARIABLES, read_store

# Free fermion at alpha = 0.5 has no real ground state below R ~ 0.6 (docs/physics.md section 4,
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
BRANCH_NUMBERS = [name for name, (kind, _, _) in BRANCH_VARIABLES.items() if kind != "str"]


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
    for name in BRANCH_NUMBERS:
        assert np.array_equal(a.branch[name], b.branch[name], equal_nan=True), name
    assert list(a.branch["status"].ravel()) == [BP_NONE, BP_FOUND]  # alpha = -0.3, 0.5


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


# in-process runs: a tiny scan, two models, branch points at alpha = 0.4 and 0.6
SMALL = RUN.format(count=3).replace("alphas = [-0.3, 0.5]", "alphas = [-0.3, 0.4, 0.6]") \
    .replace("[deformation]", '[[models]]\nname = "lee-yang"\n\n[deformation]')


class _Counting:
    """tba.physics.flow.branch_point with a call log; raises KeyboardInterrupt on call ``interrupt``."""

    def __init__(self, interrupt=None):
        self.calls, self.interrupt = [], interrupt

    def __call__(self, model, alpha, tol):
        self.calls.append((model.name, alpha))
        if len(self.calls) == self.interrupt:
            raise KeyboardInterrupt
        return branch_point(model, alpha, tol=tol)


def test_branch_points_are_added_later_and_never_recomputed(tmp_path, monkeypatch):
    calls = _Counting()
    monkeypatch.setattr(tba.scans.points, "branch_point", calls)
    off = loads_run(SMALL + "branch_points = false\n", base_dir=tmp_path)
    log = io.StringIO()
    summary = run_scan(off, workers=1, log=log)
    assert summary.complete and summary.branch_points_computed == 0 and calls.calls == []
    assert "branch points off" in log.getvalue()
    first = read_store(off.output)
    assert (first.branch["status"] == NOT_COMPUTED).all() and np.isnan(first.branch["energy"]).all()
    # the same run with branch_points = true (same run_id): only the branch points are computed
    on = loads_run(SMALL, base_dir=tmp_path)
    assert on.run_id == off.run_id
    log = io.StringIO()
    summary = run_scan(on, workers=1, log=log)
    assert summary.chunks_computed == 0 and summary.branch_points_computed == 6
    assert "computed 0 chunks (12 were already done) and 6 branch points" in log.getvalue()
    assert sorted(calls.calls) == sorted((m, a) for m in ("free-fermion", "lee-yang")
                                         for a in (-0.3, 0.4, 0.6))
    data = read_store(on.output)
    for name in NUMBERS:  # the points are untouched
        assert np.array_equal(data[name], first[name], equal_nan=True), name
    assert (data.branch["status"][:, 0] == BP_NONE).all() and (data.branch["status"][:, 1:] == BP_FOUND).all()
    assert data.history[1]["branch_points_computed"] == 6 and data.history[1]["chunks_computed"] == 0
    # stored: never computed again (also with branch_points = false)
    before = Path(on.output).read_bytes()
    for run in (on, off):
        summary = run_scan(run, workers=1, log=io.StringIO())
        assert summary.chunks_computed == summary.branch_points_computed == 0
    assert len(calls.calls) == 6 and Path(on.output).read_bytes() == before


def test_interrupted_during_branch_points_resumes_the_rest(tmp_path, monkeypatch):
    reference = loads_run(SMALL, base_dir=tmp_path / "ref")
    run_scan(reference, workers=1, log=io.StringIO())
    calls = _Counting(interrupt=4)
    monkeypatch.setattr(tba.scans.points, "branch_point", calls)
    run = loads_run(SMALL, base_dir=tmp_path)
    with pytest.raises(ScanInterrupted, match="all 12 chunks and 3 of 6 pending branch points are saved"):
        run_scan(run, workers=1, log=io.StringIO())
    data = read_store(run.output)
    assert data.complete and (data.branch["status"] != NOT_COMPUTED).sum() == 3
    assert data.history[0].get("interrupted") is True
    calls.interrupt = None
    summary = run_scan(run, workers=1, log=io.StringIO())
    assert summary.chunks_computed == 0 and summary.branch_points_computed == 3
    assert len(calls.calls) == 7 and calls.calls[3] == calls.calls[4]  # the interrupted one again
    # the same numbers as an uninterrupted run: each branch point depends on (model, alpha, tol)
    ref = read_store(reference.output)
    data = read_store(run.output)
    for name in BRANCH_NUMBERS:
        assert np.array_equal(data.branch[name], ref.branch[name], equal_nan=True), name
