"""Scans on a dask.distributed cluster: `DaskBackend` for `tba.store.driver.run_scan`
(``tba run RUNFILE --scheduler ADDRESS`` or ``--cluster local:N``).

dask is imported here only, and only when a cluster is asked for: ``import tba`` and a
plain ``tba run`` work without it, and a missing dask is one line naming the option.

Decisions:

* The unit of work stays `tba.scans.points.solve_chunk`: one task per chunk of consecutive radii,
  so each chunk keeps its warm starts, and a chunk is a pure function of (run, chunk) --
  any worker, any order, any number of retries gives the numbers of a serial run bit for
  bit. Results travel back to the driver, which alone writes the HDF5 file (as with local
  workers); workers never touch it, so it needs no shared file system.
* The resolved run goes to the cluster once, as a task of its own that the chunk tasks
  depend on (not once per task, not scattered): a worker fetches it once and keeps it,
  and if the worker holding it dies the scheduler recomputes it like any task.
* Compiling: the numba kernels are compiled on first use and cached on disk next to the
  sources (``cache=True``). The first chunk goes out alone (a pilot) and the others follow
  when it is done: on a fresh install the first worker compiles and writes the cache, and
  the others load it instead of all compiling at once -- on one machine (``local:N``) or
  on nodes that share the installation, which is the usual cluster set-up. Nodes that do
  not share it compile once each anyway. The pilot costs one chunk's latency when the
  cache is warm (measured in benchmarks/bench_cluster.py). The driver itself computes
  nothing: it may run on a login node.
* Worker death: the scheduler reschedules the tasks of a lost worker (a ``local:N``
  worker is restarted by its nanny); the driver just waits, and a recomputed chunk is the
  same pure function of (run, chunk). So is a result lost with its worker after the task
  finished but before the driver fetched it: the scheduler computes it again. A task that was on ``allowed-failures + 1`` workers
  that died (dask's ``distributed.scheduler.allowed-failures``, default 3) comes back as
  KilledWorker: the driver reports it, goes on writing everything else, and raises
  `tba.store.driver.ScanFailed` at the end, so running the same command again retries only what
  is missing. Any other exception in a task is handled the same way.
* Branch points (``scan.branch_points``) are tasks too, at a lower priority than the chunks
  (``priority=-1``; the scheduler may still start them early): a few undeformed solves
  each, in parallel with the chunks instead of one after the other at the end.
* Every task checks that its worker runs the driver's tba version: workers of another
  installation would give other numbers under the same run identity.
* Ctrl-C or an error in the driver cancels the scan's tasks on the cluster; a local
  cluster is shut down with the driver (its workers exit when the driver dies).
"""

import logging
import os
import time
import uuid

from tba.scans.backends import Backend, BranchDone, ChunkDone, TaskFailed, _children_ignore_ctrl_c
from tba.scans.points import describe_chunk, one_line, solve_branch_point, solve_chunk

#: pip extra that brings dask.distributed
INSTALL_HINT = "pip install 'tba-flow[cluster]' (or pip install 'dask[distributed]')"
#: seconds to wait for a scheduler to answer (``--scheduler``)
CONNECT_TIMEOUT = 30


class ClusterError(Exception):
    """A cluster that cannot be used as asked: one line naming the option (exit code 2 on the
    command line)."""


def require_dask(option="--scheduler"):
    """Import dask.distributed, or raise `ClusterError` naming ``option``."""
    try:
        import distributed
    except ImportError as exc:
        raise ClusterError(f"argument {option}: needs dask.distributed, which cannot be imported "
                           f"({exc}); {INSTALL_HINT}") from None
    return distributed


def parse_cluster(text):
    """``local:N`` -> N (worker processes on this machine); ValueError otherwise."""
    kind, sep, count = str(text).strip().partition(":")
    try:
        if kind != "local" or not sep:
            raise ValueError
        n = int(count)
        if n < 1:
            raise ValueError
    except ValueError:
        raise ValueError(f"expected local:N with N >= 1 worker processes, got {text!r}") from None
    return n


def local_cluster(n_workers):
    """The ``LocalCluster`` of ``--cluster local:N``: N single-threaded worker processes.

    * The workers ignore Ctrl-C from birth (the driver stops them), and exit when the
      driver dies.
    * One BLAS thread each (dask's ``distributed.nanny.pre-spawn-environ`` default), but
      without its ``MALLOC_TRIM_THRESHOLD_``: setting it switches off glibc's adaptive mmap
      threshold, and every larger numpy temporary then costs fresh pages; measured here,
      the solver ran about 35% slower with it (E8 scan of benchmarks/bench_cluster.py).
    * The scheduler's HTTP server (health checks; the dashboard if bokeh is installed)
      takes a free loopback port: never the fixed 8787 another cluster may hold, never
      reachable from other machines.
    """
    import dask
    from distributed import LocalCluster

    with dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None}), \
            _children_ignore_ctrl_c():
        return LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True,
                            dashboard_address="127.0.0.1:0", silence_logs=logging.ERROR)


#: statuses of a future that the driver acts on; any other ("lost", "pending") means wait
_DONE = ("finished", "error", "cancelled")


# -- the tasks (run on the workers) --------------------------------------------------------------

def _check_version(version):
    from tba import __version__
    if __version__ != version:
        raise RuntimeError(f"this worker runs tba {__version__}, the driver tba {version}: "
                           f"install the same version on the workers")


def _the_run(run):
    return run


def _chunk_task(run, chunk, version):
    _check_version(version)
    return solve_chunk(run, chunk)


def _branch_task(run, model, alpha, version):
    _check_version(version)
    return solve_branch_point(run, model, alpha)


# -- the backend ----------------------------------------------------------------------------------

class DaskBackend(Backend):
    """Chunks as tasks on a dask.distributed cluster: an existing one (``scheduler``: an
    address such as ``tcp://host:8786`` or a scheduler file; or an open ``client``), or a
    ``LocalCluster`` of ``local_workers`` single-threaded worker processes started here and
    shut down with the scan. See the module docstring for the decisions."""

    def __init__(self, scheduler=None, *, local_workers=None, client=None):
        given = [x is not None for x in (scheduler, local_workers, client)]
        if sum(given) != 1:
            raise ValueError("DaskBackend: give exactly one of scheduler, local_workers, client")
        self.option = "--cluster" if local_workers is not None else "--scheduler"
        require_dask(self.option)
        self.scheduler, self.local_workers, self.client = scheduler, local_workers, client
        self._owned_client = self._cluster = None
        self.threads = 0

    def start(self):
        from distributed import Client

        if self.client is None and self.local_workers is not None:
            self._cluster = local_cluster(self.local_workers)
            self.client = self._owned_client = Client(self._cluster)
        elif self.client is None:
            where = self.scheduler
            try:
                if os.path.isfile(where):
                    self.client = Client(scheduler_file=where, timeout=CONNECT_TIMEOUT)
                else:
                    self.client = Client(where, timeout=CONNECT_TIMEOUT)
            except (OSError, ValueError, TypeError) as exc:  # TimeoutError is an OSError
                raise ClusterError(f"argument --scheduler: cannot reach a dask scheduler at "
                                   f"{where!r}: {one_line(exc)}") from None
            self._owned_client = self.client
        threads = self.client.nthreads()
        self.workers, self.threads = len(threads), sum(threads.values())

    def describe(self):
        if self._cluster is not None:
            return f"dask local cluster, {self.workers} worker processes"
        where = self.scheduler or getattr(self.client, "scheduler", None)
        where = getattr(where, "address", where)
        threads = f", {self.threads} threads" if self.threads != self.workers else ""
        return f"dask scheduler {where} ({self.workers} workers{threads} so far)"

    def compute(self, run, chunks, branch_pairs):
        from distributed import as_completed, wait

        from tba import __version__ as version

        client = self.client
        token = uuid.uuid4().hex[:10]  # keys of this invocation: never shared with another driver
        pending = {}
        run_future = client.submit(_the_run, run, key=f"tba-run-{token}", pure=False)
        try:
            if chunks:  # the pilot: see the module docstring (numba cache)
                pilot = client.submit(_chunk_task, run_future, chunks[0], version, pure=False,
                                      key=f"tba-chunk-{chunks[0].index}-{token}")
                pending[pilot] = chunks[0]
                wait([pilot])
                while pilot.status not in _DONE:  # lost with its worker: computed again
                    time.sleep(0.05)
                    wait([pilot])
                yield self._collect(run, pilot, pending.pop(pilot))
            for chunk in chunks[1:]:
                future = client.submit(_chunk_task, run_future, chunk, version, pure=False,
                                       key=f"tba-chunk-{chunk.index}-{token}")
                pending[future] = chunk
            for m, a in branch_pairs:
                future = client.submit(_branch_task, run_future, m, a, version, pure=False,
                                       priority=-1, key=f"tba-branch-{m}-{a}-{token}")
                pending[future] = (m, a)
            done = as_completed(list(pending))
            for future in done:
                if future.status not in _DONE:
                    # finished, but its worker died before the result was fetched: the
                    # scheduler computes it again (the future is still wanted); wait for that
                    done.add(future)
                    continue
                yield self._collect(run, future, pending.pop(future))
        finally:
            left = list(pending) + [run_future]
            if any(f.status == "pending" for f in left):
                try:
                    client.cancel(left)
                except Exception:  # noqa: BLE001 (the scheduler may be gone; nothing to save)
                    pass
            for future in left:
                future.release()

    @staticmethod
    def _collect(run, future, what):
        if future.status == "finished":
            result = future.result()
            future.release()
            if isinstance(what, tuple):
                return BranchDone(*what, result)
            return ChunkDone(*result)
        try:
            exc = future.exception()
        except (KeyboardInterrupt, GeneratorExit):
            raise
        except BaseException as err:  # noqa: BLE001 (cancelled: the scheduler dropped it)
            exc = err
        future.release()
        if exc is None:
            exc = RuntimeError(f"task {future.key} ended with status {future.status!r}")
        if isinstance(what, tuple):
            m, a = what
            return TaskFailed(f"branch point of {run.models[m].label} at alpha = {run.alphas[a]:g}",
                              one_line(exc))
        return TaskFailed(describe_chunk(run, what), one_line(exc), chunk=what)

    def close(self):
        client, cluster = self._owned_client, self._cluster
        self._owned_client = self._cluster = None
        if client is not None:
            self.client = None
            client.close()
        if cluster is not None:
            cluster.close()
