"""The scan driver: computes what a store lacks on a backend and writes it as it arrives.

`run_scan` is the only writer of the store for every backend (`tba.scans.backends`,
`tba.scans.cluster`): it takes the output's lock (`tba.store.lock`), creates, resumes or
rebuilds the file (`tba.store.writer`), hands the pending chunks and branch points to the
backend and writes each result in place as it arrives.
"""

import signal
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

from tba.scans.backends import BranchDone, ChunkDone, local_backend
from tba.scans.codes import BP_FAILED, NOT_COMPUTED
from tba.scans.interrupts import installed, signal_name, signal_number
from tba.scans.progress import DEFAULT_EVERY, ProgressLines, lines_wanted
from tba.scans.runfile import Shard
from tba.store.errors import StoreError, StoreWriteError
from tba.store.hdf5 import check_store, describe_branch
from tba.store.lock import OutputLock
from tba.store.writer import open_store, prepare_store, unwritable_message

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
    """Ctrl-C (or SIGTERM: ``signum``) during a scan; the finished chunks are in the store."""

    def __init__(self, summary, signum=signal.SIGINT):
        self.summary, self.signum = summary, signum
        how = "interrupted" if signum == signal.SIGINT else f"terminated ({signal_name(signum)})"
        super().__init__(f"{how}; {summary.saved()} are saved in {summary.path}; run the "
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


def _progress_lines(run, summary, pending, branch_pending, progress, every, log):
    """Periodic lines on ``log`` (`tba.scans.progress`) where no bar is shown: ``progress``
    None and stderr not a terminal, ``every`` > 0."""
    if progress is not None or not lines_wanted(every):
        return None
    extra = None
    if branch_pending:
        extra = lambda: f"{summary.branch_points_computed}/{len(branch_pending)} branch points"  # noqa: E731
    return ProgressLines("tba run", summary.chunks_total, unit="chunks", done=summary.chunks_before,
                         points=sum(c.size for c in pending), every=every, log=log, extra=extra)


def run_scan(run, path=None, *, workers=None, backend=None, shard=None, force=False,
             progress=None, log=None, run_file=None, progress_every=DEFAULT_EVERY):
    """Compute every chunk of ``run`` not yet in the store at ``path`` (default ``run.output``),
    then the branch points not yet stored (``run.branch_points``).

    Resumes an existing store of the same run (computing again the chunks that fail their
    checksums; a damaged store is rebuilt from what verifies, `tba.store.writer.recover_store`);
    never overwrites the file of another run unless ``force`` (`tba.store.hdf5.StoreError`).
    Holds the output's lock throughout: a second writer of the same file fails at once
    (`tba.store.errors.StoreBusy`). Where the chunks are computed: ``backend`` (a `Backend`,
    e.g. `tba.scans.cluster.DaskBackend`), else ``workers`` processes on this machine (default:
    up to the usable cores, the pool started only for work that repays its start-up). ``shard`` (a `tba.scans.runfile.Shard`) computes only that shard's
    chunks and branch points into a shard file. ``progress`` None shows a bar on a terminal
    and, where stderr is not a terminal (a log file), one line every ``progress_every``
    seconds (0: none) on ``log`` with the chunks done, the rate and the time left
    (`tba.scans.progress`); True always the bar, False neither. Lines about what is done go
    to ``log`` (default stderr). Returns a `ScanSummary`;
    Ctrl-C or SIGTERM raises `ScanInterrupted` (the history entry closed), chunks a cluster
    gave up on `ScanFailed` (after everything else is saved).

    Local workers are spawned processes: a script calling this with ``workers > 1`` needs
    the usual ``if __name__ == "__main__":`` guard.
    """
    log = sys.stderr if log is None else log
    path = run.output if path is None else path
    if path is None:
        raise ValueError("no output path: give one in the run file or as an argument")
    if backend is not None and workers is not None:
        raise ValueError("workers: give either workers or backend, not both")
    path = Path(path)
    if path.is_dir():
        raise StoreError(f"{path}: is a directory")
    if not path.parent.is_dir():
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise StoreError(f"{path}: cannot create its directory ({exc.strerror})") from None
    with installed():  # signals raised at safe points: never in compiled code or mid-write
        lock = OutputLock(path)
        try:
            lock.acquire()
        except StoreError:  # busy, or a directory that takes no lock file (read-only)
            if lock.unwritable is None or not path.exists():
                raise
            return _read_only(run, path, shard, lock.unwritable, log)
        try:
            return _scan(run, path, workers, backend, shard, force, (progress, progress_every),
                         log, run_file)
        finally:
            lock.release()


def _pending(run, shard, snap):
    """The chunks and branch-point pairs a store still lacks."""
    mine = run.chunks() if shard is None else shard.chunks(run)
    pending = [c for c in mine if not snap.done[c.index]]
    branch_pending = []
    if run.branch_points:  # (m, a) of the ground state, (m, a, s) of the excited levels
        keys = run.branch_keys() if shard is None else shard.branch_keys(run)
        branch_pending = [k for k in keys if snap.branch_arrays(k)["status"][k] == NOT_COMPUTED]
    return mine, pending, branch_pending


def _read_only(run, path, shard, error, log):
    """A store whose directory cannot be written (no lock can be taken there): fine if it is
    complete; else one line saying that its chunks are safe and how to go on."""
    snap = check_store(path, run, shard)
    mine, pending, branch_pending = _pending(run, shard, snap)
    if pending or branch_pending:
        raise StoreError(unwritable_message(path, snap, error.strerror or str(error)))
    what = "" if shard is None else f" (shard {shard.label})"
    print(f"tba run: {path}{what} is complete ({len(mine)} chunks); nothing to compute", file=log)
    return ScanSummary(str(path), len(mine), len(mine), 0, sum(c.size for c in mine), 0.0, 0,
                       shard=shard)


def _scan(run, path, workers, backend, shard, force, progress, log, run_file):
    t0 = time.perf_counter()
    started, summary = False, None
    try:
        if backend is not None and (force or not path.exists()):
            # a new file: reach the cluster first, so that a wrong address leaves no file behind
            backend.start()
            started = True
        prepared = prepare_store(path, run, force=force, run_file=run_file, shard=shard)
        for note in prepared.notes:
            print(f"tba run: note: {note}", file=log)
        mine, pending, branch_pending = _pending(run, shard, prepared.snapshot)
        if backend is None:  # excited levels' folds are pool tasks too (tba.scans.backends)
            backend = local_backend(workers, len(pending) + sum(len(k) == 3 for k in branch_pending))
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
        verb = "writing" if prepared.created else "resuming"
        if pending:
            print(f"tba run: {verb} {path}{what}: {len(pending)} of {len(mine)} chunks to compute, "
                  f"{backend.describe()}", file=log, flush=True)
        else:
            print(f"tba run: {verb} {path}{what}: all {len(mine)} chunks are done; "
                  f"{_count(len(branch_pending), 'branch point')} to compute", file=log, flush=True)
        _drive(run, path, prepared, backend, pending, branch_pending, summary, progress, log)
    except KeyboardInterrupt as exc:
        if summary is None:  # before anything was computed
            raise
        summary.seconds = time.perf_counter() - t0
        raise ScanInterrupted(summary, signal_number(exc)) from None
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


def _drive(run, path, prepared, backend, pending, branch_pending, summary, progress, log):
    """Write what ``backend`` computes as it arrives: the driver is the only writer."""
    store = open_store(path, prepared, run)
    bar = lines = None
    progress, every = progress
    try:
        store.begin_invocation(summary.workers, len(pending), len(branch_pending),
                               executor=backend.describe())
        try:
            bar = _progress_bar(sum(c.size for c in pending), run.name, progress) if pending else None
            lines = _progress_lines(run, summary, pending, branch_pending, progress, every, log)
            if lines is not None:
                lines.start()
            results = backend.compute(run, pending, branch_pending)
            try:
                for item in results:
                    if isinstance(item, ChunkDone):
                        store.write_chunk(item.chunk, item.values, item.seconds)
                        summary.chunks_computed += 1
                        if bar is not None:
                            bar.update(item.chunk.size)
                        if lines is not None:
                            lines.update(1, item.chunk.size)
                    elif isinstance(item, BranchDone):
                        values = item.values
                        store.write_branch_point(item.model, item.alpha, values, state=item.state)
                        summary.branch_points_computed += 1
                        if values["status"] == BP_FAILED:
                            print(f"tba run: {describe_branch(run, item.key)[4:]} failed (stored "
                                  f"as failed): {values['message']}", file=log, flush=True)
                    else:
                        summary.failed.append(item)
                        if len(summary.failed) <= _FAILURES_SHOWN:
                            print(f"tba run: {item.what} failed: {item.error}", file=log, flush=True)
                        elif len(summary.failed) == _FAILURES_SHOWN + 1:
                            print("tba run: more tasks failed (counted at the end)", file=log,
                                  flush=True)
            finally:
                results.close()  # stops the workers if we leave early
        except KeyboardInterrupt as exc:
            store.end_invocation(interrupted=True, signum=signal_number(exc))
            raise
        except StoreWriteError:
            try:  # the history entry too, if the file still takes writes
                store.end_invocation(failed=["writing to the file failed"])
            except StoreError:
                pass
            raise
        store.end_invocation(failed=[f"{f.what}: {f.error}" for f in summary.failed])
        if lines is not None:
            lines.stop("complete" if not summary.failed else "incomplete")
    finally:
        if lines is not None:  # after an exception: the thread stops, the line says so
            lines.stop("stopped")
        if bar is not None:
            bar.close()
        store.close()


#: failures printed as they happen (a broken worker installation fails every task)
_FAILURES_SHOWN = 5


def _count(n, word):
    return f"{n} {word}{'' if n == 1 else 's'}"
