"""Scans: a resolved run solved chunk by chunk, in parallel, written to a resumable store.

A run (`tba.runfile.RunSpec`) is cut into chunks by `RunSpec.chunks`: for every model,
alpha and state, the sorted radii in consecutive blocks of ``chunk_size``. A chunk is
solved as one chain (`solve_chunk`): each radius starts from the previous converged one
(``sweep = "descending"``: from the largest radius towards the branch point). A chain's
numbers depend on nothing but the chunk, so serial, parallel and resumed runs agree bit
for bit.

A chunk solves one level (`tba.levels`): the ground state, or an excited level named by its
Bethe quantum numbers; the states a model lacks have no chunks (`RunSpec.unavailable`).

Flow check (``flow_check = true``, the default): for each converged point with alpha != 0
and no higher-spin factor, the same level undeformed is solved at
R~ = sqrt((R + alpha E)^2 - (alpha P)^2) with the exact momentum P = 2 pi sum I_k / R; the
prediction E R~ = (R + alpha E) E_0(R~) + alpha P^2 R / R~ and the flow residual
|E(R, alpha) - prediction| are stored. With TTbar the deformed equations are the undeformed
ones at R~ in a boosted frame, so the relation is exact; for P = 0 it is
E(R, alpha) = E_0(R + alpha E, 0).

Branch points (``branch_points = true``, the default): the ground state's branch point
R_c(alpha) once per model and alpha (`solve_branch_point`: `tba.flow.branch_point` at the
run's tol, a few undeformed solves, 0.01-1 s each), each written as it is found. Local
backends compute them in the driver after the chunks; a dask cluster gets them as tasks
at a lower priority than the chunks. alpha <= 0 has none; with higher-spin factors they are not
applicable; an exception is stored as "failed" with its message and never loses the scan.
Each is a function of (model, alpha, tol) alone, computed from scratch, so resumed runs
agree bit for bit; stored ones are never computed again.

`run_scan` is the driver: the only writer of the store. Where the chunks are computed is a
`Backend`: `InProcess` (one worker), `ProcessPool` (local processes, one task per chunk) or
`tba.cluster.DaskBackend` (an existing dask.distributed cluster, or a local one); every
backend hands back results as they finish, and the driver writes and flushes each as it
arrives. A shard (`tba.runfile.Shard`, ``tba run --shard I/N``) computes every N-th chunk
into a shard file; `tba.merge` combines the shards.
"""

import contextlib
import math
import multiprocessing
import os
import signal
import sys
import threading
import time
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from tba.deformation import NO_DEFORMATION
from tba.flow import branch_point
from tba.levels import GROUND, parse_level, solve_level
from tba.result import STATUS_CODES
from tba.runfile import Chunk, Shard
from tba.storage import (BP_CODES, BP_FAILED, BP_FOUND, BP_NOT_APPLICABLE, FLOW_NO_ENERGY,
                         FLOW_NOT_APPLICABLE, FLOW_OFF, NOT_COMPUTED, POINT_VARIABLES,
                         open_store, prepare_store)

_MODEL_CACHE = {}


def _model(spec):
    """Models are cached per process: their kernel caches are reused along a scan."""
    model = _MODEL_CACHE.get(spec)
    if model is None:
        model = _MODEL_CACHE[spec] = spec.build()
    return model


def _empty(n):
    out = {}
    for name, (kind, fill, _) in POINT_VARIABLES.items():
        out[name] = np.full(n, fill, dtype=object if kind == "str" else kind)
    return out


def solve_chunk(run, chunk):
    """Solve one chunk; returns (chunk, values, seconds) with ``values`` a dict of arrays over
    the chunk's radii in ascending order (the names of `tba.storage.POINT_VARIABLES`).

    BLAS runs on one thread here whatever the executor: a multithreaded LU (scipy's, in the
    excited-state solvers) may round differently with another number of threads, and the
    numbers of a chunk must not depend on where it ran."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        return _solve_chunk(run, chunk)


def _solve_chunk(run, chunk):
    t0 = time.perf_counter()
    level = parse_level(run.states[chunk.state])
    model = _model(run.models[chunk.model])
    alpha = run.alphas[chunk.alpha]
    deformation = run.deformation(alpha)
    radii = run.radii[chunk.radius_start:chunk.radius_stop]
    order = range(len(radii) - 1, -1, -1) if run.sweep == "descending" else range(len(radii))
    values = _empty(len(radii))
    flow_applies = run.flow_check and alpha != 0 and run.ttbar_only
    # R P = 2 pi sum I_k exactly (the flow check uses the exact momentum)
    turns = 0 if level == GROUND else sum(level)
    start = start0 = None
    for i in order:
        R = radii[i]
        res = solve_level(model, R, level, deformation, tol=run.tol, start=start)
        if res.converged:
            start = res
            values["momentum"][i] = res.momentum
        values["energy"][i] = res.energy
        values["error"][i] = res.error
        values["status"][i] = STATUS_CODES[res.status]
        values["iterations"][i] = res.iterations
        values["message"][i] = res.message
        if not run.flow_check:
            values["flow_status"][i] = FLOW_OFF
        elif not flow_applies:
            values["flow_status"][i] = FLOW_NOT_APPLICABLE
        elif not res.converged:
            values["flow_status"][i] = FLOW_NO_ENERGY
        else:
            a_eff = R + alpha * res.energy
            boost = alpha * 2 * math.pi * float(turns) / R  # alpha P
            r_eff = a_eff if turns == 0 else math.sqrt(max(a_eff * a_eff - boost * boost, 0.0))
            values["flow_radius"][i] = r_eff
            if not (math.isfinite(r_eff) and r_eff > 0):
                values["flow_status"][i] = FLOW_NOT_APPLICABLE
                continue
            res0 = solve_level(model, r_eff, level, NO_DEFORMATION, tol=run.tol, start=start0)
            values["flow_status"][i] = STATUS_CODES[res0.status]
            if res0.converged:
                start0 = res0
                predicted, flow_error = res0.energy, res0.error
                if turns != 0:
                    predicted, flow_error = _boosted_prediction(model, level, R, alpha, a_eff,
                                                                boost, r_eff, res, res0, run.tol)
                values["flow_prediction"][i] = predicted
                values["flow_error"][i] = flow_error
                values["flow_residual"][i] = abs(res.energy - predicted)
    return chunk, values, time.perf_counter() - t0


def _boosted_prediction(model, level, R, alpha, a_eff, boost, r_eff, res, res0, tol):
    """The flow prediction of a level with P != 0 and its error estimate.

    E R~ = A E_0(R~) + alpha P^2 R / R~ with A = R + alpha E and R~ = sqrt(A^2 - (alpha P)^2)
    (E_0 = res0 at R~). The prediction depends on E through A and R~, so its error estimate is
    (A / R~) err(E_0) + |d prediction / dE| err(E), with E_0'(R~) from a second undeformed
    solve at R~ (1 + 1e-6); NaN if that solve fails."""
    e0 = res0.energy
    predicted = (a_eff * e0 + boost * boost * R / (alpha * r_eff)) / r_eff
    step = 1e-6 * r_eff
    res1 = solve_level(model, r_eff + step, level, NO_DEFORMATION, tol=tol, start=res0)
    if not res1.converged:
        return predicted, math.nan
    de0 = (res1.energy - e0) / step
    dr = alpha * a_eff / r_eff  # dR~/dE
    dpred = (alpha * e0 + a_eff * de0 * dr - boost * boost * R * dr / (alpha * r_eff ** 2)) / r_eff \
        - predicted * dr / r_eff
    return predicted, abs(a_eff) / r_eff * res0.error + abs(dpred) * res.error


def solve_branch_point(run, model_index, alpha_index):
    """The ground state's branch point of one (model, alpha) of the run, as the values of
    `tba.storage.BRANCH_VARIABLES` (scalars; the missing ones are left out). Never raises
    an Exception: a failure comes back with status "failed" and the error as message."""
    alpha = run.alphas[alpha_index]
    if not run.ttbar_only:
        spins = ", ".join(f"{s}" for s, _ in run.higher_spin)
        return {"status": BP_NOT_APPLICABLE,
                "message": f"higher-spin CDD factors (spin {spins}): R_c from E_0'(R~) = 1/alpha "
                           f"holds for TTbar alone"}
    try:
        bp = branch_point(_model(run.models[model_index]), alpha, tol=run.tol)
    except Exception as exc:  # noqa: BLE001 (stored, never lost: the scan's points are kept)
        text = str(exc).splitlines()[0] if str(exc) else ""
        return {"status": BP_FAILED, "message": f"{type(exc).__name__}: {text}".rstrip(": ")}
    code = BP_CODES.get(bp.status)
    if code is None:
        return {"status": BP_FAILED, "message": f"unexpected status {bp.status!r}: {bp.message}"}
    values = {"status": code, "message": bp.message}
    if code == BP_FOUND:
        values.update(branch_radius=bp.radius, branch_radius_error=bp.radius_error, energy=bp.energy,
                      energy_error=bp.energy_error, effective_radius=bp.effective_radius)
    return values


# -- worker processes ---------------------------------------------------------------------------

def _watch_parent(parent):
    while True:
        time.sleep(1.0)
        if os.getppid() != parent:  # the driver is gone (killed): nobody will read our results
            os._exit(1)


def _worker_init(parent):
    # Ctrl-C reaches the whole process group; the driver handles it and stops the workers
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    threading.Thread(target=_watch_parent, args=(parent,), daemon=True).start()


def _stop(executor):
    """Stop the pool now, running chunks included (their results would be lost anyway)."""
    terminate = getattr(executor, "terminate_workers", None)  # Python >= 3.14
    if terminate is not None:
        terminate()
        return
    processes = list((getattr(executor, "_processes", None) or {}).values())
    for p in processes:
        p.terminate()
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
    """A branch point, as `solve_branch_point` returns it."""

    model: int
    alpha: int
    values: dict


@dataclass
class TaskFailed:
    """A chunk whose task could not be completed (a cluster gave up on it); ``what`` names
    the chunk, ``error`` says why, on one line."""

    what: str
    error: str
    chunk: Chunk | None = None


def describe_chunk(run, chunk):
    """``chunk 5 (free-fermion, alpha = 0.5, R = 0.3 .. 0.42)``: for messages."""
    state = f", {run.states[chunk.state]}" if len(run.states) > 1 else ""
    return (f"chunk {chunk.index} ({run.models[chunk.model].label}, alpha = "
            f"{run.alphas[chunk.alpha]:g}, R = {run.radii[chunk.radius_start]:.6g} .. "
            f"{run.radii[chunk.radius_stop - 1]:.6g}{state})")


def one_line(exc):
    """``Type: first line of the message``."""
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
    return f"{type(exc).__name__}: {text}".rstrip(": ")


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


def _branch_points_here(run, pairs):
    for m, a in pairs:
        yield BranchDone(m, a, solve_branch_point(run, m, a))


class InProcess(Backend):
    """One chunk after the other in the driver's process, then the branch points."""

    def compute(self, run, chunks, branch_pairs):
        for chunk in chunks:
            yield ChunkDone(*solve_chunk(run, chunk))
        yield from _branch_points_here(run, branch_pairs)


class ProcessPool(Backend):
    """A ``ProcessPoolExecutor`` of spawned processes on this machine (one task per chunk,
    one BLAS thread per worker); the branch points are computed in the driver after the
    chunks (a few undeformed solves each).

    The first chunk is still solved in the driver, before the pool starts: on a fresh
    install that compiles the numba kernels once and caches them on disk, instead of once
    per worker at the same time.
    """

    def __init__(self, workers):
        self.workers = int(workers)

    def compute(self, run, chunks, branch_pairs):
        if chunks:
            yield ChunkDone(*solve_chunk(run, chunks[0]))
        rest = chunks[1:]
        if rest:
            workers = min(self.workers, len(rest))
            executor = ProcessPoolExecutor(max_workers=workers,
                                           mp_context=multiprocessing.get_context("spawn"),
                                           initializer=_worker_init, initargs=(os.getpid(),))
            try:
                with _single_threaded_children(), _children_ignore_ctrl_c():  # workers start on submit
                    futures = {executor.submit(solve_chunk, run, chunk) for chunk in rest}
                while futures:
                    finished, futures = wait(futures, return_when=FIRST_COMPLETED)
                    for future in finished:
                        yield ChunkDone(*future.result())
            except BaseException:  # Ctrl-C, an error, or the generator closed early
                _stop(executor)
                raise
            executor.shutdown(wait=True)
        yield from _branch_points_here(run, branch_pairs)


def local_backend(workers, pending):
    """The backend for ``workers`` processes on this machine (None: the usable cores),
    never more than there are chunks to compute."""
    workers = default_workers() if workers is None else int(workers)
    workers = max(1, min(workers, pending))
    return InProcess() if workers == 1 else ProcessPool(workers)


# -- the driver ---------------------------------------------------------------------------------

@dataclass
class ScanSummary:
    path: str
    chunks_total: int  # of this file: the run's, or the shard's
    chunks_before: int  # already done when this invocation started
    chunks_computed: int  # computed by this invocation
    points_total: int
    seconds: float
    workers: int
    branch_points_pending: int = 0  # to compute in this invocation (0 with branch_points = false)
    branch_points_computed: int = 0
    shard: Shard | None = None
    failed: list = field(default_factory=list)  # TaskFailed of this invocation

    @property
    def chunks_complete(self):
        return self.chunks_before + self.chunks_computed == self.chunks_total

    @property
    def complete(self):
        return self.chunks_complete and self.branch_points_computed >= self.branch_points_pending

    def saved(self):
        """What the file holds, for messages: ``40 of 60 chunks``."""
        s = self
        text = f"{s.chunks_before + s.chunks_computed} of {s.chunks_total} chunks"
        if s.chunks_complete and s.branch_points_pending:
            text = (f"all {s.chunks_total} chunks and {s.branch_points_computed} of "
                    f"{s.branch_points_pending} pending branch points")
        elif s.branch_points_computed:
            text += f" and {s.branch_points_computed} of {s.branch_points_pending} pending branch points"
        return text + (f" of shard {s.shard.label}" if s.shard is not None else "")


class ScanInterrupted(Exception):
    """Ctrl-C during a scan; the finished chunks are in the store."""

    def __init__(self, summary):
        self.summary = summary
        super().__init__(f"interrupted; {summary.saved()} are saved in {summary.path}; run the "
                         f"same command again to resume")


class ScanFailed(Exception):
    """Tasks that failed (on a cluster: a chunk whose workers kept dying until the scheduler
    gave up on it, or an exception in a task). Everything else was computed and saved;
    running the same command again retries only what is missing."""

    def __init__(self, summary):
        self.summary = summary
        failed = summary.failed
        first = failed[0]
        more = f" (and {len(failed) - 1} more)" if len(failed) > 1 else ""
        super().__init__(f"{_count(len(failed), 'task')} failed: {first.what}: {first.error}{more}; "
                         f"{summary.saved()} are saved in {summary.path}; run the same command "
                         f"again to retry the missing ones")


def _progress_bar(total, desc, enabled):
    try:
        from tqdm import tqdm
    except ImportError:  # tqdm is a dependency; stay usable without it
        return None
    return tqdm(total=total, unit="pt", desc=desc, file=sys.stderr, leave=False,
                disable=None if enabled is None else not enabled, dynamic_ncols=True)


def run_scan(run, path=None, *, workers=None, backend=None, shard=None, force=False,
             progress=None, log=None, run_file=None):
    """Compute every chunk of ``run`` not yet in the store at ``path`` (default ``run.output``),
    then the branch points not yet stored (``run.branch_points``).

    Resumes an existing store of the same run; never overwrites the file of another run
    unless ``force`` (`tba.storage.StoreError`). Where the chunks are computed: ``backend``
    (a `Backend`, e.g. `tba.cluster.DaskBackend`), else ``workers`` processes on this
    machine (default: the usable cores). ``shard`` (a `tba.runfile.Shard`) computes only
    that shard's chunks and branch points into a shard file. ``progress`` None shows a bar
    on a terminal only. Lines about what is done go to ``log`` (default stderr). Returns a
    `ScanSummary`; Ctrl-C raises `ScanInterrupted`, chunks a cluster gave up on
    `ScanFailed` (after everything else is saved).

    Local workers are spawned processes: a script calling this with ``workers > 1`` needs
    the usual ``if __name__ == "__main__":`` guard.
    """
    log = sys.stderr if log is None else log
    path = run.output if path is None else path
    if path is None:
        raise ValueError("no output path: give one in the run file or as an argument")
    if backend is not None and workers is not None:
        raise ValueError("workers: give either workers or backend, not both")
    t0 = time.perf_counter()
    started, summary = False, None
    try:
        if backend is not None and (force or not Path(path).exists()):
            # a new file: reach the cluster first, so that a wrong address leaves no file behind
            backend.start()
            started = True
        done, created, note, branch_status = prepare_store(path, run, force=force,
                                                           run_file=run_file, shard=shard)
        if note:
            print(f"tba run: note: {note}", file=log)
        mine = run.chunks() if shard is None else shard.chunks(run)
        pending = [c for c in mine if not done[c.index]]
        branch_pending = []
        if run.branch_points:
            pairs = ([(m, a) for m in range(len(run.models)) for a in range(len(run.alphas))]
                     if shard is None else shard.branch_pairs(run))
            branch_pending = [(m, a) for m, a in pairs if branch_status[m, a] == NOT_COMPUTED]
        if backend is None:
            backend = local_backend(workers, len(pending))
        points = sum(c.size for c in mine)
        summary = ScanSummary(str(path), len(mine), len(mine) - len(pending), 0, points, 0.0,
                              backend.workers, len(branch_pending), shard=shard)
        what = "" if shard is None else f" (shard {shard.label})"
        if not pending and not branch_pending:
            print(f"tba run: {path}{what} is complete ({len(mine)} chunks); nothing to compute",
                  file=log)
            return summary
        if not started:
            backend.start()
            started = True
        summary.workers = backend.workers
        verb = "writing" if created else "resuming"
        if pending:
            print(f"tba run: {verb} {path}{what}: {len(pending)} of {len(mine)} chunks to compute, "
                  f"{backend.describe()}", file=log, flush=True)
        else:
            print(f"tba run: {verb} {path}{what}: all {len(mine)} chunks are done; "
                  f"{_count(len(branch_pending), 'branch point')} to compute", file=log, flush=True)
        _drive(run, path, backend, pending, branch_pending, summary, progress, log)
    except KeyboardInterrupt:
        if summary is None:  # before anything was computed
            raise
        summary.seconds = time.perf_counter() - t0
        raise ScanInterrupted(summary) from None
    finally:
        if started:
            backend.close()
    summary.seconds = time.perf_counter() - t0
    if summary.failed:
        raise ScanFailed(summary)
    extra = ""
    if summary.branch_points_computed:
        extra = f" and {_count(summary.branch_points_computed, 'branch point')}"
    off = "" if run.branch_points else " (branch points off: scan.branch_points = false)"
    merge = "" if shard is None else "; combine the shards with tba merge"
    print(f"tba run: computed {summary.chunks_computed} chunks ({summary.chunks_before} were "
          f"already done){extra} in {summary.seconds:.1f} s; {path}{what} is complete{off}{merge}",
          file=log, flush=True)
    return summary


def _drive(run, path, backend, pending, branch_pending, summary, progress, log):
    """Write what ``backend`` computes as it arrives: the driver is the only writer."""
    store = open_store(path, run)
    bar = None
    try:
        store.begin_invocation(summary.workers, len(pending), len(branch_pending),
                               executor=backend.describe())
        try:
            bar = _progress_bar(sum(c.size for c in pending), run.name, progress) if pending else None
            results = backend.compute(run, pending, branch_pending)
            try:
                for item in results:
                    if isinstance(item, ChunkDone):
                        store.write_chunk(item.chunk, item.values, item.seconds)
                        summary.chunks_computed += 1
                        if bar is not None:
                            bar.update(item.chunk.size)
                    elif isinstance(item, BranchDone):
                        m, a, values = item.model, item.alpha, item.values
                        store.write_branch_point(m, a, values)
                        summary.branch_points_computed += 1
                        if values["status"] == BP_FAILED:
                            print(f"tba run: branch point of {run.models[m].label} at alpha = "
                                  f"{run.alphas[a]:g} failed (stored as failed): "
                                  f"{values['message']}", file=log, flush=True)
                    else:
                        summary.failed.append(item)
                        if len(summary.failed) <= _FAILURES_SHOWN:
                            print(f"tba run: {item.what} failed: {item.error}", file=log, flush=True)
                        elif len(summary.failed) == _FAILURES_SHOWN + 1:
                            print("tba run: more tasks failed (counted at the end)", file=log,
                                  flush=True)
            finally:
                results.close()  # stops the workers if we leave early
        except KeyboardInterrupt:
            store.end_invocation(interrupted=True)
            raise
        store.end_invocation(failed=[f"{f.what}: {f.error}" for f in summary.failed])
    finally:
        if bar is not None:
            bar.close()
        store.close()


#: failures printed as they happen (a broken worker installation fails every task)
_FAILURES_SHOWN = 5


def _count(n, word):
    return f"{n} {word}{'' if n == 1 else 's'}"
