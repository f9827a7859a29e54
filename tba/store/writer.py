"""Writing a store: create, resume or rebuild it, then write each result in place.

`prepare_store` makes sure the output is a store of the run, holding its lock
(`tba.store.lock.OutputLock`, taken by the driver): it checks an existing one (read-only),
creates a new one, or rebuilds a damaged one from the chunks whose checksums verify
(`recover_store`, automatic; the damaged file is kept next to it). `Store` then writes the
results of the scan driver into the file's bytes, at the offsets HDF5 reports for its
contiguous data sets: never its HDF5 structure, so the file never grows, a full disk cannot
hit it (the bytes are allocated already) and readers always find a readable file.

Order of the writes of one chunk: its values, invocation, seconds and checksum, then its
``done`` flag (a chunk that failed its checksum has the flag cleared first). A reader sees a
chunk either done with verified values, or not done; a kill, a failed write or a power loss
in between leaves a chunk that is not done, or one whose checksum fails and that the next
``tba run`` computes again. Branch points likewise, their status last. History entries are
slots of fixed size, one per invocation, written in place when it starts and when it ends.
"""

import os
import platform
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from tba.scans.codes import BRANCH_VARIABLES, NOT_COMPUTED, POINT_VARIABLES
from tba.scans.interrupts import deferred, signal_name
from tba.scans.points import describe_chunk
from tba.store.errors import DamagedStore, StoreError, StoreWriteError
from tba.store.hdf5 import (HISTORY_BYTES, HISTORY_DTYPE, HISTORY_SLOTS, Snapshot, as_stored,
                            describe_branch, key_checksum, key_group,
                            check_store, chunk_slice, create_store, empty_contents, git_commit,
                            load, now, package_version, shard_points, stored_scalar, write_all)
from tba.store.integrity import chunk_checksum, encode_history_entry
from tba.store.lock import clean_partials
from tba.store.recovery import salvage


@dataclass
class Prepared:
    """A store ready for `open_store`: its `Snapshot` (done mask without the chunks that fail
    their checksums), whether it was created now, and notes for the log."""

    snapshot: Snapshot
    created: bool
    notes: list = field(default_factory=list)


def prepare_store(path, run, force=False, run_file=None, shard=None):
    """Make sure ``path`` is a store of ``run`` (the shard layout with ``shard``): check an
    existing one (read-only), rebuild a damaged one of the same run, or create it. Call it
    holding the lock of ``path``. Returns a `Prepared`.

    An existing file of another run, another schema or package version, or a file that is
    not a store, is never overwritten unless ``force`` (`StoreError`); nor is a damaged file
    without a usable recovery map.
    """
    path = Path(path)
    if path.is_dir():
        raise StoreError(f"{path}: is a directory")
    notes = []
    removed = clean_partials(path)
    if removed:
        notes.append(f"removed {len(removed)} temporary file(s) that killed invocations left: "
                     f"{', '.join(p.name for p in removed)}")
    if path.exists() and not force:
        try:
            snap = check_store(path, run, shard)
        except DamagedStore as exc:
            snap = recover_store(path, run, shard, run_file, exc, notes)
        if snap.bad_chunks:
            c = run.chunks()[snap.bad_chunks[0]]
            more = f" and {len(snap.bad_chunks) - 1} more" if len(snap.bad_chunks) > 1 else ""
            notes.append(f"{path}: {describe_chunk(run, c)}{more} failed its checksum (the file "
                         f"was damaged there); computing it again")
        if snap.bad_branch:
            notes.append(f"{path}: {len(snap.bad_branch)} branch point(s) failed their checksums; "
                         f"computing them again")
        commit = str(snap.attrs.get("git_commit", "unknown"))
        if commit != git_commit():
            notes.append(f"{path} was started at commit {commit[:12]}, this is {git_commit()[:12]}; "
                         f"each invocation is recorded in the /progress/history")
        if not os.access(path, os.W_OK):
            raise StoreError(f"{path}: cannot be written (permission denied); {_safe(snap)}")
        return Prepared(snap, False, notes)
    create_store(path, run, run_file, shard)
    return Prepared(load(path), True, notes)


def _safe(snap):
    """``its 44 computed chunks are safe ...``: what to do with a store that cannot be written."""
    n = int(snap.done.sum())
    run_file = snap.attrs.get("run_file") or "RUNFILE"
    return (f"its {n} computed chunk{'s are' if n != 1 else ' is'} safe in it: copy it to a "
            f"writable place and resume the copy there (tba run {run_file} --output COPY)")


def unwritable_message(path, snap, reason):
    return f"{path}: cannot be written ({reason}); {_safe(snap)}"


def recover_store(path, run, shard, run_file, damage, notes):
    """Rebuild the damaged store at ``path`` from what `tba.store.recovery.salvage` verifies:
    a new store of ``run`` with those chunks, branch points and history entries (and an entry
    saying so), written atomically; the damaged file is kept as ``NAME.damaged-TIME``.
    Returns the new file's `Snapshot`; `DamagedStore` if nothing can be recovered."""
    found = salvage(path)
    if found is None:
        why = "it has no intact recovery map (written by an older tba, or damaged there too)"
    elif found.run.run_id != run.run_id or found.shard != shard:
        why = "its recovery map belongs to another run or shard"
    elif found.package_version != package_version():
        why = f"its chunks were computed by tba {found.package_version}, this is tba {package_version()}"
    else:
        why = None
    if why is not None:
        raise DamagedStore(f"{damage}; {why}, so nothing in it can be recovered; use --force "
                           f"to replace it, or --output")
    contents = empty_contents(run, shard)
    offsets = shard_points(run, shard)[0] if shard is not None else None
    chunks = run.chunks()
    for index, (values, invocation, seconds) in found.chunks.items():
        sl = chunk_slice(run, chunks[index], offsets)
        for name in POINT_VARIABLES:
            contents.points[name][sl] = values[name]
        contents.done[index] = True
        contents.invocation[index] = invocation
        contents.seconds[index] = seconds
    for key, values in found.branch.items():  # (m, a) and excited levels' (m, a, s)
        for name in BRANCH_VARIABLES:
            contents.branch_arrays(key)[name][key] = values[name]
    stamp = now().replace(":", "").replace("+0000", "Z")
    keep = path.with_name(f"{path.name}.damaged-{stamp}")
    last = max((e["invocation"] for e in found.history), default=0)
    contents.history = found.history + [{
        "invocation": last + 1, "started": now(), "finished": now(),
        "package_version": package_version(), "git_commit": git_commit(), "host": platform.node(),
        "recovered_from": keep.name, "damage": str(damage).split(": ", 1)[-1],
        "chunks_recovered": len(found.chunks), "branch_points_recovered": len(found.branch)}]
    create_store(path, run, run_file or found.run_file or None, shard, contents, keep=keep)
    notes.append(f"{damage}; rebuilt it from the {len(found.chunks)} of {found.marked} stored "
                 f"chunks (and {len(found.branch)} branch points) whose checksums verify; the "
                 f"damaged file is kept as {keep}")
    return check_store(path, run, shard)


def open_store(path, prepared, run):
    """Open a prepared store (`prepare_store`) for the in-place writes of the driver."""
    return Store(path, prepared.snapshot, run)


class Store:
    """An open store, written in place by the scan driver only (which holds its lock)."""

    def __init__(self, path, snap, run):
        self.path, self.run, self.shard = Path(path), run, snap.shard
        try:
            self.fd = os.open(self.path, os.O_RDWR | os.O_CLOEXEC)
        except OSError as exc:
            raise StoreError(unwritable_message(self.path, snap, exc.strerror)) from None
        self.offsets = snap.offsets
        self._dims = run.shape
        self._shard_offsets = shard_points(run, self.shard)[0] if self.shard is not None else None
        self._prefix = "" if self.shard is None else "shard_points/"
        self._file_done = snap.progress["done"].astype(bool)  # as in the file: bad chunks 1 still
        self._bad_branch = set(snap.bad_branch)
        self._history = list(snap.history)
        self._next = snap.invocations + 1
        self._invocation = None

    @property
    def history(self):
        return list(self._history)

    # -- raw writes -----------------------------------------------------------------------------

    def _write(self, name, start, values, stride=1):
        """Elements ``start, start + stride, ...`` of the flattened data set ``name``."""
        offset, dtype, _ = self.offsets[name]
        data = np.ascontiguousarray(np.atleast_1d(values), dtype=dtype)
        at = offset + start * dtype.itemsize
        if stride == 1:
            write_all(self.fd, data.tobytes(), at)
            return
        span = ((data.size - 1) * stride + 1) * dtype.itemsize
        buf = bytearray(os.pread(self.fd, span, at))
        if len(buf) != span:
            raise OSError(0, f"short read of /{name}")
        np.frombuffer(buf, dtype=dtype)[::stride] = data
        write_all(self.fd, buf, at)

    def _failed(self, what, exc):
        done = int(self._file_done.sum())
        return StoreWriteError(f"{self.path}: writing {what} failed ({exc.strerror or exc}); the "
                               f"{done} chunk{'s' if done != 1 else ''} written before {'are' if done != 1 else 'is'} "
                               f"safe: run the same command again once that is fixed")

    def _points_at(self, chunk):
        """(first flat index, stride) of a chunk's points in the point data sets."""
        if self.shard is not None:
            if chunk.index not in self._shard_offsets:
                raise ValueError(f"chunk {chunk.index} does not belong to shard {self.shard.label}")
            return self._shard_offsets[chunk.index], 1
        _, A, R, S = self._dims
        return ((chunk.model * A + chunk.alpha) * R + chunk.radius_start) * S + chunk.state, S

    # -- what the driver writes ---------------------------------------------------------------

    def write_chunk(self, chunk, values, seconds):
        """Write one finished chunk (arrays over its radii, ascending) and mark it done."""
        start, stride = self._points_at(chunk)
        stored = {name: as_stored(kind, values[name]) for name, (kind, _, _) in POINT_VARIABLES.items()}
        invocation = np.int32(self._invocation["invocation"] if self._invocation else 0)
        seconds = np.float64(seconds)
        checksum = np.uint64(chunk_checksum(chunk.index, stored, invocation, seconds))
        i = chunk.index
        try:
            with deferred():
                if self._file_done[i]:  # a damaged chunk computed again
                    self._write("progress/done", i, np.uint8(0))
                    self._file_done[i] = False
                for name, array in stored.items():
                    self._write(self._prefix + name, start, array, stride)
                self._write("progress/invocation", i, invocation)
                self._write("progress/seconds", i, seconds)
                self._write("progress/checksum", i, checksum)
                self._write("progress/done", i, np.uint8(1))
        except OSError as exc:
            raise self._failed(describe_chunk(self.run, chunk), exc) from None
        self._file_done[i] = True
        if self._invocation is not None:
            self._invocation["chunks_computed"] += 1  # saved with the history at the end

    def write_branch_point(self, model, alpha, values, state=None):
        """Write the branch point of (model index, alpha index) (with ``state``, a state
        index: of that excited level, in /level_branch_points): ``values`` maps the names of
        `BRANCH_VARIABLES` to scalars (the missing ones take their fill values)."""
        stored = {name: stored_scalar(kind, values.get(name, fill))
                  for name, (kind, fill, _) in BRANCH_VARIABLES.items()}
        key = (model, alpha) if state is None else (model, alpha, state)
        checksum = np.uint64(key_checksum(key, stored))
        group = key_group(key)
        _, A, _, S = self._dims
        k = model * A + alpha if state is None else (model * A + alpha) * S + state
        try:
            with deferred():
                if key in self._bad_branch:
                    self._write(f"{group}/status", k, stored_scalar("i1", NOT_COMPUTED))
                    self._bad_branch.discard(key)
                for name, value in stored.items():
                    if name != "status":
                        self._write(f"{group}/{name}", k, value)
                self._write(f"{group}/checksum", k, checksum)
                self._write(f"{group}/status", k, stored["status"])
        except OSError as exc:
            raise self._failed(describe_branch(self.run, key), exc) from None
        if self._invocation is not None:
            self._invocation["branch_points_computed"] += 1

    def begin_invocation(self, workers, pending, branch_points_pending=0, executor=None):
        entry = {"invocation": self._next, "started": now(), "finished": None,
                 "package_version": package_version(), "git_commit": git_commit(),
                 "host": platform.node(), "workers": workers, "chunks_pending": pending,
                 "chunks_computed": 0, "branch_points_pending": branch_points_pending,
                 "branch_points_computed": 0}
        if executor is not None:
            entry["executor"] = executor
        if self.shard is not None:
            entry["shard"] = self.shard.label
        self._next += 1
        self._invocation = entry
        self._save(entry)
        return entry["invocation"]

    def end_invocation(self, interrupted=False, failed=None, signum=None):
        """Close the history entry of this invocation (``interrupted``: by Ctrl-C or a
        signal, ``signum``), and sync the file to disk."""
        entry = self._invocation
        if entry is None:
            return
        entry["finished"] = now()
        if interrupted:
            entry["interrupted"] = True
            if signum is not None:
                entry["signal"] = signal_name(signum)
        if failed:
            entry["failed"] = list(failed)
        self._save(entry)
        try:
            os.fsync(self.fd)
        except OSError as exc:
            raise self._failed("to disk (fsync)", exc) from None

    def _save(self, entry):
        raw = encode_history_entry(entry, HISTORY_BYTES)
        try:
            with deferred():
                self._write("progress/history", (entry["invocation"] - 1) % HISTORY_SLOTS,
                            np.array([raw], dtype=HISTORY_DTYPE))
        except OSError as exc:
            raise self._failed(f"history entry {entry['invocation']}", exc) from None
        self._history = [e for e in self._history
                         if (e["invocation"] - entry["invocation"]) % HISTORY_SLOTS != 0] + [entry]

    def close(self):
        if self.fd is not None:
            os.close(self.fd)
            self.fd = None
