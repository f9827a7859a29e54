"""Backends: where the chunks and branch points of a scan are computed.

`tba.store.driver.run_scan` is the only writer of the store; a backend only computes and
hands results back, in any order, as `ChunkDone`, `BranchDone` or `TaskFailed`. Here:
`InProcess` (the driver's own process) and `ProcessPool` (spawned local processes);
`tba.scans.cluster.DaskBackend` runs them on dask.distributed.
"""

import contextlib
import multiprocessing
import os
import random
import signal
import threading
import time
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass

from tba.scans.interrupts import caused_by_interrupt
from tba.scans.points import describe_chunk, one_line, solve_branch_point, solve_chunk
from tba.scans.runfile import Chunk

# -- worker processes ---------------------------------------------------------------------------

def _watch_parent(parent):
    while True:
        time.sleep(1.0)
        if os.getppid() != parent:  # the driver is gone (killed): nobody will read our results
            os._exit(1)


def _worker_init(parent):
    # Ctrl-C and SIGTERM reach the whole process group (a terminal, a batch system); the
    # driver handles them, closes its history entry and stops the workers (SIGKILL)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    if hasattr(signal, "pthread_sigmask"):  # born with SIGINT blocked (`_children_block_ctrl_c`)
        signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT})
    threading.Thread(target=_watch_parent, args=(parent,), daemon=True).start()


def _stop(executor):
    """Stop the pool now, running chunks included (their results would be lost anyway)."""
    kill = getattr(executor, "kill_workers", None)  # Python >= 3.14
    if kill is not None:
        kill()
        return
    processes = list((getattr(executor, "_processes", None) or {}).values())
    for p in processes:
        p.kill()
    executor.shutdown(wait=True, cancel_futures=True)


#: thread-pool variables of the BLAS/OpenMP libraries numpy and scipy may load
_THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


@contextlib.contextmanager
def _single_threaded_children():
    """One BLAS thread per worker process (the workers already fill the cores), unless the
    user set these variables. Children read them when they import numpy."""
    saved = {k: os.environ.get(k) for k in _THREAD_VARIABLES}
    for k, v in saved.items():
        if v is None:
            os.environ[k] = "1"
    try:
        yield
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)


@contextlib.contextmanager
def _children_ignore_ctrl_c():
    """Start worker processes with SIGINT ignored from birth (an ignored signal stays ignored
    across exec, and Python then installs no KeyboardInterrupt handler), so that a Ctrl-C on
    the terminal, which reaches the whole process group, cannot hit a worker half-way through
    its start-up. The driver handles Ctrl-C and stops the workers; one pressed during these
    few milliseconds of process creation is ignored."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous if previous is not None else signal.default_int_handler)


@contextlib.contextmanager
def _children_block_ctrl_c():
    """Start the local pool's workers with SIGINT blocked from birth (a process inherits the
    signal mask across fork and exec): a Ctrl-C on the terminal, which reaches the whole
    process group, stays pending in a worker until its initializer ignores SIGINT (which
    discards it) and unblocks it. In the driver it stays pending too, and is handled as soon
    as the block ends: none is lost, however long process creation takes on a loaded machine
    (ignoring SIGINT in the driver meanwhile, as `_children_ignore_ctrl_c` does for dask's
    processes, lost one pressed then)."""
    if threading.current_thread() is not threading.main_thread() \
            or not hasattr(signal, "pthread_sigmask"):
        with _children_ignore_ctrl_c():
            yield
        return
    previous = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
    try:
        yield
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, previous)


#: seconds a local pool takes to be ready (spawning its workers, their imports, loading the
#: compiled kernels from numba's cache): 1.2-1.5 s measured on this project's 2-core machine
#: (benchmarks/README.md); a default-sized pool starts only for work that repays it
POOL_START_UP = 1.5


def default_workers():
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


# -- backends: where chunks are computed -------------------------------------------------------

@dataclass
class ChunkDone:
    """A solved chunk, as `solve_chunk` returns it."""

    chunk: Chunk
    values: dict
    seconds: float


@dataclass
class BranchDone:
    """A branch point, as `solve_branch_point` returns it (``state``: the state index of an
    excited level, None for the ground state's)."""

    model: int
    alpha: int
    values: dict
    state: int | None = None

    @property
    def key(self):
        return (self.model, self.alpha) if self.state is None else (self.model, self.alpha, self.state)


def branch_done(key, values):
    """`BranchDone` of the task ``key`` ((m, a) or (m, a, s), `RunSpec.branch_keys`)."""
    return BranchDone(key[0], key[1], values, key[2] if len(key) == 3 else None)


def solve_branch_task(run, key):
    """`solve_branch_point` of a task key."""
    return solve_branch_point(run, key[0], key[1], key[2] if len(key) == 3 else None)


@dataclass
class TaskFailed:
    """A chunk whose task could not be completed (a cluster gave up on it, its worker process
    died, or it raised); ``what`` names the chunk, ``error`` says why, on one line."""

    what: str
    error: str
    chunk: Chunk | None = None


def branch_label(run, key):
    """``branch point of lee-yang at alpha = -0.1`` (``, state 0`` for an excited level)."""
    state = "" if len(key) == 2 else f", state {run.states[key[2]]}"
    return f"branch point of {run.models[key[0]].label} at alpha = {run.alphas[key[1]]:.10g}{state}"


def chunk_failed(run, chunk, exc):
    return TaskFailed(describe_chunk(run, chunk), one_line(exc), chunk=chunk)


def level_failed(run, key, exc):
    return TaskFailed(branch_label(run, key), one_line(exc))


class Backend:
    """Where the chunks (and branch points) of a scan are computed.

    `run_scan` stays the only writer of the store; a backend only computes and hands the
    results back in any order, as `ChunkDone`, `BranchDone` or `TaskFailed`. Any backend
    gives the same numbers, because a chunk is a pure function of (run, chunk) and a branch
    point of (run, model, alpha). Life cycle: `start` (only when there is something to
    compute), `compute` (a generator, closed early on Ctrl-C), `close` (always).
    """

    #: worker processes (for the log line and the store's history), known after `start`
    workers = 1

    def start(self):
        pass

    def describe(self):
        return f"{self.workers} worker{'s' if self.workers != 1 else ''}"

    def compute(self, run, chunks, branch_pairs):
        raise NotImplementedError

    def close(self):
        pass


def _branch_points_here(run, keys):
    for key in keys:
        yield branch_done(key, solve_branch_task(run, key))


def _here(run, chunk):
    """A chunk solved in this process, as a result (`TaskFailed` if it raised: points are
    isolated in `solve_chunk`, so that is a defect, reported without losing the scan)."""
    try:
        return ChunkDone(*solve_chunk(run, chunk))
    except Exception as exc:  # noqa: BLE001
        if caused_by_interrupt(exc):
            raise KeyboardInterrupt from None
        return chunk_failed(run, chunk, exc)


def _timed(seconds, solve, run, task):
    """``solve(run, task)``, its duration appended to ``seconds``."""
    start = time.perf_counter()
    done = solve(run, task)
    seconds.append(time.perf_counter() - start)
    return done


def _level_here(run, key):
    """An excited level's fold solved in this process, as the pool would report it."""
    try:
        return branch_done(key, solve_branch_task(run, key))
    except Exception as exc:  # noqa: BLE001
        if caused_by_interrupt(exc):
            raise KeyboardInterrupt from None
        return level_failed(run, key, exc)


class InProcess(Backend):
    """One chunk after the other in the driver's process, then the branch points."""

    def compute(self, run, chunks, branch_pairs):
        for chunk in chunks:
            yield _here(run, chunk)
        yield from _branch_points_here(run, branch_pairs)


class ProcessPool(Backend):
    """A ``ProcessPoolExecutor`` of spawned processes on this machine (one task per chunk,
    one BLAS thread per worker); the ground state's branch points are computed in the driver
    after the chunks (a few undeformed solves each), the excited levels' folds (up to seconds
    each) are tasks of the pool after the chunks, one per (model, alpha, state).

    The first chunk of each state (the ground state, each excited level) is still solved in
    the driver, before the pool starts: on a fresh install that compiles the numba kernels
    its solver needs once and caches them on disk, instead of once per worker at the same
    time.

    ``adaptive`` (the default number of workers, not one asked for): the driver goes on
    solving chunks itself, picked at random, and then the excited levels' folds, as long as
    the work left, estimated from the mean time of those it solved after the first of each
    state (which may have compiled), is too little to repay the pool's start-up
    (`POOL_START_UP`) with the workers it would add; the pool starts for the rest as soon as
    it is worth it.
    """

    def __init__(self, workers, adaptive=False):
        self.workers = int(workers)
        self.adaptive = adaptive

    def describe(self):
        return f"up to {super().describe()}" if self.adaptive else super().describe()

    def _worth_a_pool(self, seconds, left):
        """Whether ``left`` tasks of the mean duration of ``seconds`` take longer in the
        driver alone than with the pool, start-up included."""
        if not seconds:
            return False  # nothing measured yet: one task here first
        alone = sum(seconds) / len(seconds) * left
        return alone - alone / min(self.workers, left) > POOL_START_UP

    def compute(self, run, chunks, branch_pairs):
        first = {}
        for chunk in chunks:
            first.setdefault(chunk.state, chunk)
        for chunk in first.values():
            yield _here(run, chunk)
        rest = [chunk for chunk in chunks if first[chunk.state] is not chunk]
        levels = [k for k in branch_pairs if len(k) == 3]
        branch_pairs = [k for k in branch_pairs if len(k) == 2]
        if self.adaptive:
            # chunks picked at random: a run's chunks come in curves of like cost (cheap ground
            # states first, say), and the mean of the first few would be no estimate
            pick = random.Random(len(chunks))
            seconds = []
            while rest and not self._worth_a_pool(seconds, len(rest) + len(levels)):
                yield _timed(seconds, _here, run, rest.pop(pick.randrange(len(rest))))
            seconds = []  # a fold is not a chunk: measured afresh
            while levels and not rest and not self._worth_a_pool(seconds, len(levels)):
                yield _timed(seconds, _level_here, run, levels.pop(0))
        if rest or levels:
            workers = min(self.workers, len(rest) + len(levels))
            executor = ProcessPoolExecutor(max_workers=workers,
                                           mp_context=multiprocessing.get_context("spawn"),
                                           initializer=_worker_init, initargs=(os.getpid(),))
            try:
                with _single_threaded_children(), _children_block_ctrl_c():  # workers start on submit
                    futures = {executor.submit(solve_chunk, run, chunk): chunk for chunk in rest}
                    futures.update({executor.submit(solve_branch_task, run, key): key
                                    for key in levels})
                pending = set(futures)
                broken = False
                while pending:
                    finished, pending = wait(pending, return_when=FIRST_COMPLETED)
                    for future in finished:
                        exc = future.exception()
                        broken = broken or isinstance(exc, BrokenProcessPool)
                        what = futures[future]
                        # a worker that died (killed, out of memory) breaks the pool: its
                        # chunks and those still queued come back failed, the rest is saved
                        if isinstance(what, tuple):
                            yield (branch_done(what, future.result()) if exc is None else
                                   level_failed(run, what, exc))
                        else:
                            yield (ChunkDone(*future.result()) if exc is None else
                                   chunk_failed(run, what, exc))
            except BaseException:  # Ctrl-C, an error, or the generator closed early
                _stop(executor)
                raise
            if broken:
                # the dead worker may have held the lock of the result queue: the others then
                # wait for it forever, and so would shutdown (CPython 3.11-3.13); stop them
                _stop(executor)
            else:
                executor.shutdown(wait=True)
        yield from _branch_points_here(run, branch_pairs)


def local_backend(workers, pending):
    """The backend for ``workers`` processes on this machine, never more than there are
    chunks to compute; None: up to the usable cores, the pool started only for work that
    repays its start-up (`ProcessPool`, ``adaptive``)."""
    adaptive = workers is None
    workers = default_workers() if workers is None else int(workers)
    workers = max(1, min(workers, pending))
    return InProcess() if workers == 1 else ProcessPool(workers, adaptive=adaptive)
