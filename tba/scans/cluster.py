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
* A cluster without workers: the driver waits for them at most ``no_worker_timeout``
  seconds in a row (`NO_WORKER_TIMEOUT_LOCAL` = 60 s for ``local:N``, whose workers start in
  seconds; `NO_WORKER_TIMEOUT` = 15 min for an existing scheduler, whose workers may still
  sit in a batch queue; None waits for ever), then reports every task still pending as failed
  ("the cluster has had no workers for ...") and `tba.store.driver.ScanFailed` follows, with
  everything computed before saved. The driver never blocks on the cluster for longer than
  `POLL` seconds without looking at its workers (a result whose worker died after it was
  computed is waited for in the same way).
* Ctrl-C or an error in the driver cancels the scan's tasks on the cluster; a local
  cluster is shut down with the driver (its workers exit when the driver dies). A local
  cluster that cannot start (its workers die while starting) is one line, like a scheduler
  that cannot be reached; its workers' own logs are silenced below CRITICAL, since the
  driver reports what matters (tasks that failed, no workers left).
"""

import logging
import os
import time
import uuid

from tba.scans.backends import (Backend, ChunkDone, TaskFailed, _children_ignore_ctrl_c, branch_done,
                               branch_label)
from tba.scans.points import describe_chunk, one_line, solve_branch_point, solve_chunk

#: pip extra that brings dask.distributed
INSTALL_HINT = "pip install 'tba-flow[cluster]' (or pip install 'dask[distributed]')"
#: seconds to wait for a scheduler to answer (``--scheduler``)
CONNECT_TIMEOUT = 30
#: seconds a scan waits for workers on a cluster that has none (see the module docstring)
NO_WORKER_TIMEOUT_LOCAL = 60.0
NO_WORKER_TIMEOUT = 900.0
#: seconds between two looks at the cluster while the driver waits for results
POLL = 1.0


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

    _quiet_resource_tracker()
    with dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None}), \
            _children_ignore_ctrl_c():
        return LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True,
                            dashboard_address="127.0.0.1:0", silence_logs=logging.CRITICAL)


def _quiet_resource_tracker():
    """Start multiprocessing's resource tracker (shared by the local workers) with its stderr
    on /dev/null: when workers are killed it prints tracebacks about their semaphores
    (KeyError in its clean-up), which say nothing the driver does not report on one line."""
    from multiprocessing import resource_tracker

    if getattr(resource_tracker._resource_tracker, "_fd", None) is not None:
        return  # running already
    devnull = os.open(os.devnull, os.O_WRONLY)
    saved = os.dup(2)
    try:
        os.dup2(devnull, 2)
        resource_tracker.ensure_running()
    finally:
        os.dup2(saved, 2)
        os.close(saved)
        os.close(devnull)


#: statuses of a future that the driver acts on; any other ("lost", "pending") means wait
_DONE = ("finished", "error", "cancelled")
_DEFAULT = object()


class _Workers:
    """Whether a cluster still has workers, looked at every `POLL` seconds at most: ``lost``
    is true once it has had none for ``timeout`` seconds in a row."""

    def __init__(self, client, timeout):
        self.client, self.timeout = client, timeout
        self.checked = self.since = None

    @property
    def message(self):
        return (f"the cluster has had no workers for {self.timeout:g} s (all lost, or none "
                f"started); gave up waiting")

    def lost(self):
        if self.timeout is None:
            return False
        now = time.monotonic()
        if self.checked is not None and now - self.checked < POLL:
            return False
        self.checked = now
        try:
            n = len(self.client.nthreads())
        except Exception:  # noqa: BLE001 (the scheduler cannot be reached: no workers either)
            n = 0
        if n:
            self.since = None
            return False
        self.since = now if self.since is None else self.since
        return now - self.since >= self.timeout


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


def _branch_task(run, model, alpha, version, state=None):
    _check_version(version)
    return solve_branch_point(run, model, alpha, state)


# -- the backend ----------------------------------------------------------------------------------

def _failed(run, what, error):
    """`TaskFailed` for a chunk or a branch-point pair ``what``."""
    if isinstance(what, tuple):
        return TaskFailed(branch_label(run, what), error)
    return TaskFailed(describe_chunk(run, what), error, chunk=what)


class DaskBackend(Backend):
    """Chunks as tasks on a dask.distributed cluster: an existing one (``scheduler``: an
    address such as ``tcp://host:8786`` or a scheduler file; or an open ``client``), or a
    ``LocalCluster`` of ``local_workers`` single-threaded worker processes started here and
    shut down with the scan. See the module docstring for the decisions."""

    def __init__(self, scheduler=None, *, local_workers=None, client=None,
                 no_worker_timeout=_DEFAULT):
        given = [x is not None for x in (scheduler, local_workers, client)]
        if sum(given) != 1:
            raise ValueError("DaskBackend: give exactly one of scheduler, local_workers, client")
        self.option = "--cluster" if local_workers is not None else "--scheduler"
        require_dask(self.option)
        self.scheduler, self.local_workers, self.client = scheduler, local_workers, client
        self._owned_client = self._cluster = None
        self.threads = 0
        self._no_worker_timeout = no_worker_timeout

    @property
    def no_worker_timeout(self):
        """Seconds without workers after which the scan gives up (None: never)."""
        if self._no_worker_timeout is not _DEFAULT:
            return self._no_worker_timeout
        return NO_WORKER_TIMEOUT_LOCAL if self.local_workers is not None else NO_WORKER_TIMEOUT

    def start(self):
        from distributed import Client

        if self.client is None and self.local_workers is not None:
            try:
                self._cluster = local_cluster(self.local_workers)
                self.client = self._owned_client = Client(self._cluster)
            except Exception as exc:  # noqa: BLE001 (workers that die while starting, a port...)
                self.close()
                raise ClusterError(f"argument --cluster: the local cluster could not start: "
                                   f"{one_line(exc)}") from None
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
        from tba import __version__ as version

        client = self.client
        token = uuid.uuid4().hex[:10]  # keys of this invocation: never shared with another driver
        pending = {}
        workers = _Workers(client, self.no_worker_timeout)
        run_future = client.submit(_the_run, run, key=f"tba-run-{token}", pure=False)
        try:
            if chunks:  # the pilot: see the module docstring (numba cache)
                pilot = client.submit(_chunk_task, run_future, chunks[0], version, pure=False,
                                      key=f"tba-chunk-{chunks[0].index}-{token}")
                pending[pilot] = chunks[0]
                yield from self._results(run, pending, workers)
            if pending:  # the pilot waited in vain: the cluster has no workers
                for what in [*chunks[1:], *branch_pairs]:
                    yield _failed(run, what, workers.message)
                return
            for chunk in chunks[1:]:
                future = client.submit(_chunk_task, run_future, chunk, version, pure=False,
                                       key=f"tba-chunk-{chunk.index}-{token}")
                pending[future] = chunk
            for key in branch_pairs:  # (m, a), or (m, a, s) of an excited level
                state = key[2] if len(key) == 3 else None
                name = "-".join(str(i) for i in key)
                future = client.submit(_branch_task, run_future, key[0], key[1], version, state,
                                       pure=False, priority=-1, key=f"tba-branch-{name}-{token}")
                pending[future] = key
            yield from self._results(run, pending, workers)
        finally:
            left = list(pending) + [run_future]
            if any(f.status == "pending" for f in left):
                try:
                    client.cancel(left)
                except Exception:  # noqa: BLE001 (the scheduler may be gone; nothing to save)
                    pass
            for future in left:
                future.release()

    def _results(self, run, pending, workers):
        """The results of the futures in ``pending`` (removed as they are yielded), as they
        come; if the cluster has had no workers for ``no_worker_timeout`` seconds, every one
        still pending as `TaskFailed` (they stay in ``pending``, to be cancelled)."""
        from distributed import wait

        while pending:
            try:
                finished, _ = wait(list(pending), timeout=POLL, return_when="FIRST_COMPLETED")
            except TimeoutError:
                finished = ()
            got = False
            for future in finished:
                # finished, but its worker died before the result was fetched: the scheduler
                # computes it again (the future is still wanted); wait for that
                if future.status in _DONE:
                    item = self._collect(run, future, pending[future])
                    if item is not None:
                        del pending[future]
                        got = True
                        yield item
            if workers.lost():
                for what in pending.values():
                    yield _failed(run, what, workers.message)
                return
            if finished and not got:
                time.sleep(0.05)  # lost results, being computed again

    @staticmethod
    def _collect(run, future, what):
        """The result of a done future (None if it was lost meanwhile: to wait for again)."""
        if future.status == "finished":
            try:
                result = future.result(timeout=POLL)
            except TimeoutError:  # its data went with its worker: computed again
                return None
            except (KeyboardInterrupt, GeneratorExit):
                raise
            except BaseException as err:  # noqa: BLE001 (cancelled by the scheduler meanwhile)
                future.release()
                return _failed(run, what, one_line(err))
            future.release()
            if isinstance(what, tuple):
                return branch_done(what, result)
            return ChunkDone(*result)
        try:
            exc = future.exception(timeout=POLL)
        except (KeyboardInterrupt, GeneratorExit):
            raise
        except BaseException as err:  # noqa: BLE001 (cancelled: the scheduler dropped it)
            exc = err
        future.release()
        if exc is None:
            exc = RuntimeError(f"task {future.key} ended with status {future.status!r}")
        return _failed(run, what, one_line(exc))

    def close(self):
        client, cluster = self._owned_client, self._cluster
        self._owned_client = self._cluster = None
        if client is not None:
            self.client = None
            client.close()
        if cluster is not None:
            cluster.close()
