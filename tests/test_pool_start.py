"""When a scan with the default number of workers starts its local process pool: only for work
that repays the pool's start-up (tba.scans.backends.ProcessPool, ``adaptive``), and always
when a number of workers is asked for. The rule is common practice (no source): a pool is
worth starting when the work divided among its workers saves more than the start-up costs."""

import io
from concurrent.futures import Future

import numpy as np
import pytest

import tba

from tba.scans import backends
from tba.scans.runfile import loads_run
from tba.store.driver import run_scan

# the free fermion's ground state: quick chunks (a few ms each)
RUN = """\
output = "pool.h5"

[[models]]
name = "free-fermion"

[deformation]
alphas = [0, 0.1]

[radii]
start = 1.0
stop = 3.0
count = 8

[scan]
chunk_size = 2
"""


class RecordingPool:
    """A stand-in for ProcessPoolExecutor that runs each task when it is submitted."""

    made = []

    def __init__(self, max_workers, **kwargs):
        self.max_workers, self.submitted = max_workers, []
        RecordingPool.made.append(self)

    def submit(self, fn, *args):
        self.submitted.append(args[1])
        future = Future()
        future.set_result(fn(*args))
        return future

    def shutdown(self, wait=True, cancel_futures=False):
        pass


@pytest.fixture
def pool(monkeypatch):
    RecordingPool.made = []
    monkeypatch.setattr(backends, "ProcessPoolExecutor", RecordingPool)
    monkeypatch.setattr(backends, "default_workers", lambda: 4)
    return RecordingPool


def _scan(tmp_path, workers):
    run = loads_run(RUN, base_dir=tmp_path)
    log = io.StringIO()
    summary = run_scan(run, workers=workers, log=log)
    return run, summary, log.getvalue()


def test_a_short_scan_with_the_default_workers_is_solved_in_the_driver(tmp_path, pool):
    run, summary, log = _scan(tmp_path, None)
    assert pool.made == []  # no pool: 8 chunks of a few ms never repay 1.5 s of start-up
    assert "up to 4 workers" in log
    assert summary.chunks_computed == 8 and not summary.failed
    assert np.all(np.isfinite(tba.open_scan(run.output)["energy"].values))


def test_work_that_repays_the_start_up_goes_to_the_pool(tmp_path, pool, monkeypatch):
    monkeypatch.setattr(backends, "POOL_START_UP", 0.0)
    run, summary, _ = _scan(tmp_path, None)
    # the first chunk (it may compile) and one measured chunk in the driver, the rest in the pool
    assert len(pool.made) == 1
    assert len(pool.made[0].submitted) == 6
    assert summary.chunks_computed == 8 and not summary.failed


def test_workers_asked_for_always_get_a_pool(tmp_path, pool):
    _, summary, log = _scan(tmp_path, 2)
    assert len(pool.made) == 1 and pool.made[0].max_workers == 2
    assert len(pool.made[0].submitted) == 7  # all but the first chunk
    assert "2 workers" in log and "up to" not in log


def test_the_first_chunk_of_each_state_is_solved_before_the_pool_starts(tmp_path, pool):
    # on a fresh install that chunk compiles its solver's kernels once, in the driver, instead
    # of in every worker at the same time
    run = loads_run(RUN.replace('output = "pool.h5"', 'output = "pool.h5"\nstates = ["ground", '
                                '"1/2,-1/2"]'), base_dir=tmp_path)
    chunks = run.chunks()
    firsts = {c.state: c.index for c in reversed(chunks)}
    summary = run_scan(run, workers=2, log=io.StringIO())
    submitted = {c.index for c in pool.made[0].submitted if not isinstance(c, tuple)}  # folds
    assert set(firsts.values()).isdisjoint(submitted)
    assert submitted == {c.index for c in chunks} - set(firsts.values())
    assert summary.chunks_computed == len(chunks) == 16 and not summary.failed


def test_a_ctrl_c_while_the_pool_starts_is_handled_once_it_has_started():
    # before: SIGINT was ignored in the driver while it created the workers, and a Ctrl-C
    # pressed then was lost. Blocked instead, it stays pending and is raised when the block
    # ends (POSIX signal masks, common practice); the workers inherit the blocked mask and
    # ignore SIGINT before unblocking it
    import signal
    import subprocess
    import sys

    reached = False
    with pytest.raises(KeyboardInterrupt):
        with backends._children_block_ctrl_c():
            signal.raise_signal(signal.SIGINT)
            child = subprocess.run(
                [sys.executable, "-c", "import signal; "
                 "print(signal.SIGINT in signal.pthread_sigmask(signal.SIG_BLOCK, []))"],
                capture_output=True, text=True, timeout=60)
            reached = True
    assert reached  # not interrupted inside the block
    assert child.stdout.strip() == "True"  # born with SIGINT blocked
    assert signal.SIGINT not in signal.pthread_sigmask(signal.SIG_BLOCK, [])
