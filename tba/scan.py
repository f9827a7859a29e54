"""Scans: a resolved run solved chunk by chunk, in parallel, written to a resumable store.

A run (`tba.runfile.RunSpec`) is cut into chunks by `RunSpec.chunks`: for every model,
alpha and state, the sorted radii in consecutive blocks of ``chunk_size``. A chunk is
solved as one chain (`solve_chunk`): each radius starts from the previous converged one
(``sweep = "descending"``: from the largest radius towards the branch point). A chain's
numbers depend on nothing but the chunk, so serial, parallel and resumed runs agree bit
for bit.

Flow check (``flow_check = true``, the default): for each converged point with alpha != 0
and no higher-spin factor, the undeformed ground state is solved at R' = R + alpha E; the
prediction E_0(R', 0) and the flow residual |E(R, alpha) - E_0(R', 0)| are stored (the
relation E(R, alpha) = E_0(R + alpha E, 0) is exact for the TTbar-deformed ground state).

Branch points (``branch_points = true``, the default): after the chunks, the driver computes
the ground state's branch point R_c(alpha) once per model and alpha (`solve_branch_point`:
`tba.flow.branch_point` at the run's tol, a few undeformed solves, 0.01-1 s each) and
writes each as it is found. alpha <= 0 has none; with higher-spin factors they are not
applicable; an exception is stored as "failed" with its message and never loses the scan.
Each is a function of (model, alpha, tol) alone, computed from scratch, so resumed runs
agree bit for bit; stored ones are never computed again.

`run_scan` is the driver: the only writer of the store. Chunks go to a
``ProcessPoolExecutor`` (one task per chunk; in-process when one worker suffices); each
finished chunk is written and flushed as it arrives.
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
from dataclasses import dataclass

import numpy as np

from tba.deformation import NO_DEFORMATION
from tba.flow import branch_point
from tba.result import STATUS_CODES
from tba.solver import solve_ground_state
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
    the chunk's radii in ascending order (the names of `tba.storage.POINT_VARIABLES`)."""
    t0 = time.perf_counter()
    state = run.states[chunk.state]
    if state != "ground":  # the run file accepts only states the scan can compute
        raise ValueError(f"state {state!r} is not implemented")
    model = _model(run.models[chunk.model])
    alpha = run.alphas[chunk.alpha]
    deformation = run.deformation(alpha)
    radii = run.radii[chunk.radius_start:chunk.radius_stop]
    order = range(len(radii) - 1, -1, -1) if run.sweep == "descending" else range(len(radii))
    values = _empty(len(radii))
    flow_applies = run.flow_check and alpha != 0 and run.ttbar_only
    start = start0 = None
    for i in order:
        res = solve_ground_state(model, radii[i], deformation, tol=run.tol, start=start)
        if res.converged:
            start = res
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
            r_eff = radii[i] + alpha * res.energy
            values["flow_radius"][i] = r_eff
            if not (math.isfinite(r_eff) and r_eff > 0):
                values["flow_status"][i] = FLOW_NOT_APPLICABLE
                continue
            res0 = solve_ground_state(model, r_eff, NO_DEFORMATION, tol=run.tol, start=start0)
            values["flow_status"][i] = STATUS_CODES[res0.status]
            if res0.converged:
                start0 = res0
                values["flow_prediction"][i] = res0.energy
                values["flow_error"][i] = res0.error
                values["flow_residual"][i] = abs(res.energy - res0.energy)
    return chunk, values, time.perf_counter() - t0


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


# -- the driver ---------------------------------------------------------------------------------

@dataclass
class ScanSummary:
    path: str
    chunks_total: int
    chunks_before: int  # already done when this invocation started
    chunks_computed: int  # computed by this invocation
    points_total: int
    seconds: float
    workers: int
    branch_points_pending: int = 0  # to compute in this invocation (0 with branch_points = false)
    branch_points_computed: int = 0

    @property
    def chunks_complete(self):
        return self.chunks_before + self.chunks_computed == self.chunks_total

    @property
    def complete(self):
        return self.chunks_complete and self.branch_points_computed >= self.branch_points_pending


class ScanInterrupted(Exception):
    """Ctrl-C during a scan; the finished chunks are in the store."""

    def __init__(self, summary):
        self.summary = summary
        s = summary
        saved = f"{s.chunks_before + s.chunks_computed} of {s.chunks_total} chunks"
        if s.chunks_complete and s.branch_points_pending:
            saved = (f"all {s.chunks_total} chunks and {s.branch_points_computed} of "
                     f"{s.branch_points_pending} pending branch points")
        super().__init__(f"interrupted; {saved} are saved in {s.path}; run the same command "
                         f"again to resume")


def _progress_bar(total, desc, enabled):
    try:
        from tqdm import tqdm
    except ImportError:  # tqdm is a dependency; stay usable without it
        return None
    return tqdm(total=total, unit="pt", desc=desc, file=sys.stderr, leave=False,
                disable=None if enabled is None else not enabled, dynamic_ncols=True)


def run_scan(run, path=None, *, workers=None, force=False, progress=None, log=None,
             run_file=None):
    """Compute every chunk of ``run`` not yet in the store at ``path`` (default ``run.output``),
    then the branch points not yet stored (``run.branch_points``).

    Resumes an existing store of the same run; never overwrites the file of another run
    unless ``force`` (`tba.storage.StoreError`). ``workers`` defaults to the usable cores;
    ``progress`` None shows a bar on a terminal only. Lines about what is done go to ``log``
    (default stderr). Returns a `ScanSummary`; Ctrl-C raises `ScanInterrupted`.

    Workers are spawned processes: a script calling this with ``workers > 1`` needs the
    usual ``if __name__ == "__main__":`` guard.
    """
    log = sys.stderr if log is None else log
    path = run.output if path is None else path
    if path is None:
        raise ValueError("no output path: give one in the run file or as an argument")
    t0 = time.perf_counter()
    done, created, note, branch_status = prepare_store(path, run, force=force, run_file=run_file)
    if note:
        print(f"tba run: note: {note}", file=log)
    chunks = run.chunks()
    pending = [c for c in chunks if not done[c.index]]
    branch_pending = []
    if run.branch_points:
        branch_pending = [(m, a) for m in range(len(run.models)) for a in range(len(run.alphas))
                          if branch_status[m, a] == NOT_COMPUTED]
    workers = default_workers() if workers is None else int(workers)
    workers = max(1, min(workers, len(pending)))
    summary = ScanSummary(str(path), len(chunks), len(chunks) - len(pending), 0, run.n_points,
                          0.0, workers, len(branch_pending))
    if not pending and not branch_pending:
        print(f"tba run: {path} is complete ({len(chunks)} chunks); nothing to compute", file=log)
        return summary
    verb = "writing" if created else "resuming"
    if pending:
        print(f"tba run: {verb} {path}: {len(pending)} of {len(chunks)} chunks to compute, "
              f"{workers} worker{'s' if workers > 1 else ''}", file=log, flush=True)
    else:
        print(f"tba run: {verb} {path}: all {len(chunks)} chunks are done; "
              f"{_count(len(branch_pending), 'branch point')} to compute", file=log, flush=True)
    store = open_store(path, run)
    bar = None
    try:
        store.begin_invocation(workers, len(pending), len(branch_pending))
        try:
            if pending:
                bar = _progress_bar(sum(c.size for c in pending), run.name, progress)
                results = _results(run, pending, workers)
                try:
                    for chunk, values, seconds in results:
                        store.write_chunk(chunk, values, seconds)
                        summary.chunks_computed += 1
                        if bar is not None:
                            bar.update(chunk.size)
                finally:
                    results.close()  # stops the worker pool if we leave early
                if bar is not None:
                    bar.close()
                    bar = None
            for m, a in branch_pending:
                values = solve_branch_point(run, m, a)
                store.write_branch_point(m, a, values)
                summary.branch_points_computed += 1
                if values["status"] == BP_FAILED:
                    print(f"tba run: branch point of {run.models[m].label} at alpha = "
                          f"{run.alphas[a]:g} failed (stored as failed): {values['message']}",
                          file=log, flush=True)
        except KeyboardInterrupt:
            store.end_invocation(interrupted=True)
            summary.seconds = time.perf_counter() - t0
            raise ScanInterrupted(summary) from None
        store.end_invocation()
    finally:
        if bar is not None:
            bar.close()
        store.close()
    summary.seconds = time.perf_counter() - t0
    extra = ""
    if summary.branch_points_computed:
        extra = f" and {_count(summary.branch_points_computed, 'branch point')}"
    off = "" if run.branch_points else " (branch points off: scan.branch_points = false)"
    print(f"tba run: computed {summary.chunks_computed} chunks ({summary.chunks_before} were "
          f"already done){extra} in {summary.seconds:.1f} s; {path} is complete{off}",
          file=log, flush=True)
    return summary


def _count(n, word):
    return f"{n} {word}{'' if n == 1 else 's'}"


def _results(run, pending, workers):
    """Yield (chunk, values, seconds) as chunks finish.

    With several workers the first chunk is still solved here, before the pool starts: on a
    fresh install that compiles the numba kernels once and caches them on disk, instead of
    once per worker at the same time.
    """
    if workers == 1 or len(pending) == 1:
        for chunk in pending:
            yield solve_chunk(run, chunk)
        return
    yield solve_chunk(run, pending[0])
    pending = pending[1:]
    workers = min(workers, len(pending))
    executor = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                                   initializer=_worker_init, initargs=(os.getpid(),))
    try:
        with _single_threaded_children(), _children_ignore_ctrl_c():  # workers start on submit
            futures = {executor.submit(solve_chunk, run, chunk) for chunk in pending}
        while futures:
            finished, futures = wait(futures, return_when=FIRST_COMPLETED)
            for future in finished:
                yield future.result()
    except BaseException:
        _stop(executor)
        raise
    executor.shutdown(wait=True)
