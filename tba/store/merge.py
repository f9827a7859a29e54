"""``tba merge``: combine the shard files of one run (``tba run --shard I/N``) -- and full or
partial stores of the same run -- into one full store.

Decisions:

* Only files of the same resolved run are merged: equal ``run_id`` (models, deformation,
  radii, states, solver, scan settings), this schema version and this tba version (the
  version a resumed store must have too). Anything else is refused with one line naming
  the file; nothing is written.
* A chunk (or branch point) done in several files must hold the same numbers in each, bit
  for bit (a chunk is a pure function of the run and the chunk): a shard run twice, or a
  partial full store next to shards, is fine; different numbers are refused, naming the
  file and the chunk. Messages are not compared (text, not numbers).
* The merged file is a full store, equal in every stored number to the file of a serial run;
  the ``/progress`` history lists every input's invocations (renumbered, with the file and
  shard they come from) and then the merge; ``/progress/invocation`` points into it.
* Every input is validated and its chunks' checksums verified (`tba.store.hdf5.load`): a
  damaged file, or a chunk that fails its checksum, is refused with one line naming the file
  and the chunk, even where no other input overlaps it.
* It is written complete under a temporary name and then renamed (holding the lock of
  ``--output``, like ``tba run``): an interrupted merge leaves no half-merged file. An existing ``--output`` of the same run is merged in as one more
  input (so shards that finish late can be added); one of another run, or a shard, is never
  overwritten unless ``force``.
* Chunks no input holds stay "not computed": the merge says which (per shard, when the inputs
  are shards of one split), and plain ``tba run RUNFILE --output MERGED`` computes just those.
"""

import platform
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from tba.scans.runfile import differing_keys
from tba.scans.points import describe_chunk
from tba.store.errors import StoreError
from tba.store.hdf5 import (BRANCH_VARIABLES, NOT_COMPUTED, POINT_VARIABLES, SCHEMA_VERSION,
                            SHARD_INDEX, check_store, create_store, damage_message, describe_branch,
                            empty_contents, level_shape,
                            git_commit, load_settled, now, package_version, shard_index)
from tba.store.lock import OutputLock

#: numbers compared between files (messages are text)
NUMBERS = [name for name, (kind, _, _) in POINT_VARIABLES.items() if kind != "str"]
BRANCH_NUMBERS = [name for name, (kind, _, _) in BRANCH_VARIABLES.items() if kind != "str"]


@dataclass
class MergeSummary:
    path: str
    files: list
    chunks_total: int
    chunks_present: int
    branch_total: int  # tasks expected, excited levels' included (0 with scan.branch_points = false)
    branch_present: int
    missing: list = field(default_factory=list)  # lines saying what is missing

    @property
    def complete(self):
        return self.chunks_present == self.chunks_total and self.branch_present >= self.branch_total


def _verified(snap):
    """``snap`` if its stored chunks and branch points all verify (else one line naming the
    file and the first chunk that fails)."""
    if snap.bad_chunks or snap.bad_branch:
        raise StoreError(f"{damage_message(snap)}; refusing to merge it")
    return snap


class _Merged:
    """The merged numbers, in memory, filled file by file."""

    def __init__(self, run):
        self.run = run
        self.chunks = run.chunks()
        self.contents = empty_contents(run)
        shape = (len(run.models), len(run.alphas))
        self.branch_source = np.full(shape, -1)
        self.level_source = np.full(level_shape(run), -1)
        self.source = np.full(len(self.chunks), -1)  # index of the file a chunk was taken from
        self.point_chunk = np.full(run.shape, -1, dtype="i4")  # -1: a state the model lacks
        for c in self.chunks:
            self.point_chunk[c.model, c.alpha, c.radius_start:c.radius_stop, c.state] = c.index
        self.files = []

    def add(self, path, snap):
        """Merge one validated file (already checked to be of the same run)."""
        merged, k = self.contents, len(self.files)
        self.files.append(str(path))
        offset = len(merged.history)
        for entry in snap.history:
            entry = dict(entry, invocation=offset + int(entry["invocation"]), file=str(path))
            if snap.shard is not None:
                entry.setdefault("shard", snap.shard.label)
            merged.history.append(entry)
        done = snap.done
        if snap.shard is None:
            where = np.nonzero((self.point_chunk >= 0) & done[self.point_chunk])
            values = {name: snap.points[name][where] for name in POINT_VARIABLES}
        else:
            index = shard_index(self.run, snap.shard)
            index = tuple(index[name] for name in SHARD_INDEX)
            sel = done[self.point_chunk[index]]
            where = tuple(i[sel] for i in index)
            values = {name: snap.points[name][sel] for name in POINT_VARIABLES}
        # chunks done here and already merged from an earlier file must agree bit for bit
        both = merged.done[self.point_chunk[where]]
        for name in NUMBERS:
            old, new = merged.points[name][where][both], values[name][both]
            same = (old == new) | (np.isnan(old) & np.isnan(new)) if old.dtype.kind == "f" else old == new
            if not same.all():
                bad = int(np.flatnonzero(~same)[0])
                point = tuple(int(i[both][bad]) for i in where)
                c = self.chunks[self.point_chunk[point]]
                raise StoreError(f"{path}: {describe_chunk(self.run, c)} holds other numbers "
                                 f"({name}) than in {self.files[self.source[c.index]]}; refusing "
                                 f"to merge inconsistent files")
        for name in POINT_VARIABLES:
            merged.points[name][where] = values[name]
        new_chunks = done & ~merged.done
        self.source[new_chunks] = k
        inv = snap.progress["invocation"][new_chunks]
        merged.invocation[new_chunks] = np.where(inv > 0, inv + offset, 0)
        merged.seconds[new_chunks] = snap.progress["seconds"][new_chunks]
        merged.done |= done
        # branch points: (model, alpha) -- and excited levels' (model, alpha, state) -- with a
        # status are stored
        for mine, theirs, source in ((merged.branch, snap.branch, self.branch_source),
                                     (merged.levels, snap.levels, self.level_source)):
            have = theirs["status"] != NOT_COMPUTED
            both = have & (source >= 0)
            for name in BRANCH_NUMBERS:
                old, new = mine[name][both], theirs[name][both]
                same = (old == new) | (np.isnan(old) & np.isnan(new)) if old.dtype.kind == "f" else old == new
                if not same.all():
                    key = tuple(int(x[~same][0]) for x in np.nonzero(both))
                    raise StoreError(f"{path}: {describe_branch(self.run, key)} differs ({name}) "
                                     f"from the one in {self.files[source[key]]}; refusing to "
                                     f"merge inconsistent files")
            new = have & (source < 0)
            for name in BRANCH_VARIABLES:
                mine[name][new] = theirs[name][new]
            source[new] = k

    @property
    def branch_merged(self):
        """Branch points taken from the inputs (ground state and excited levels)."""
        return int((self.branch_source >= 0).sum() + (self.level_source >= 0).sum())


def _check(path, snap, first, first_path):
    """The file is a store of this schema and tba version, of the same run as ``first``."""
    if snap.version != SCHEMA_VERSION:
        raise StoreError(f"{path}: schema version {snap.version}, this tba merges {SCHEMA_VERSION}")
    stored = snap.attrs.get("package_version")
    if stored != package_version():
        raise StoreError(f"{path}: written by tba {stored}, this is tba {package_version()}; "
                         f"merging would mix versions")
    if snap.attrs.get("run_id") != first.attrs.get("run_id"):
        keys = differing_keys(first.run.to_dict(), snap.run.to_dict()) or ["run_id"]
        raise StoreError(f"{path}: from a different run than {first_path} (differs in: "
                         f"{', '.join(keys)}); refusing to merge")


def merge_stores(paths, out, force=False):
    """Merge the stores ``paths`` (shards, or full stores, of one run) into the full store
    ``out``; returns a `MergeSummary`. `StoreError` (one line, naming the file) for files of
    different runs or versions, damaged files or chunks that fail their checksums,
    inconsistent overlaps, an ``out`` another process is writing, or an ``out`` that would
    be overwritten (another run's file, a shard) without ``force``."""
    out = Path(out).resolve()
    inputs, seen = [], set()
    for p in paths:
        key = Path(p).resolve()
        if key not in seen:
            seen.add(key)
            inputs.append(Path(p))
    if not inputs:
        raise StoreError("no files to merge")
    if out.is_dir():
        raise StoreError(f"{out}: is a directory")
    started = now()
    first = _verified(load_settled(inputs[0]))
    _check(inputs[0], first, first, inputs[0])
    run = first.run.with_output(out)
    with OutputLock(out, command="tba merge"):
        merged = _Merged(run)
        sources = []
        if out.exists() and not force and out not in seen:
            try:  # a full store of the same run is merged in; anything else is left alone
                existing = check_store(out, run)
            except StoreError as exc:
                raise StoreError(f"{str(exc).split('; ')[0]}; refusing to overwrite it with the "
                                 f"merge (use --force to replace it, or another --output)") from None
            merged.add(out, _verified(existing))
            sources.append(out)
        shard_counts = set()
        for k, p in enumerate(inputs):  # one at a time: the merged arrays, and one input
            snap = first if k == 0 else _verified(load_settled(p))
            _check(p, snap, first, inputs[0])
            merged.add(p, snap)
            sources.append(p)
            if snap.shard is not None:
                shard_counts.add(snap.shard.count)
            snap.points = None
        entry = {"invocation": len(merged.contents.history) + 1, "started": started,
                 "finished": now(), "package_version": package_version(),
                 "git_commit": git_commit(), "host": platform.node(),
                 "merge": [str(p) for p in sources],
                 "chunks_merged": int(merged.contents.done.sum()),
                 "branch_points_merged": merged.branch_merged}
        merged.contents.history.append(entry)
        create_store(out, run, first.attrs.get("run_file") or None, contents=merged.contents)
    inputs, shard_counts = sources, sorted(shard_counts)
    return _summary(run, out, inputs, merged, shard_counts)


def _summary(run, out, inputs, merged, shard_counts):
    chunks = merged.chunks
    done = merged.contents.done
    n_pairs = len(run.branch_keys()) if run.branch_points else 0
    s = MergeSummary(str(out), [str(p) for p in inputs], len(chunks), int(done.sum()), n_pairs,
                     merged.branch_merged if n_pairs else 0)
    missing = np.flatnonzero(~done)
    if missing.size:
        if len(shard_counts) == 1:  # shards of one split: say which shard lacks what
            n = shard_counts[0]
            for k in range(1, n + 1):
                mine = [i for i in missing if i % n == k - 1]
                if mine:
                    owned = sum(1 for c in chunks if c.index % n == k - 1)
                    s.missing.append(f"shard {k}/{n}: {len(mine)} of its {owned} chunks missing "
                                     f"(first: {describe_chunk(run, chunks[mine[0]])})")
        else:
            shown = ", ".join(str(i) for i in missing[:10]) + (", ..." if missing.size > 10 else "")
            s.missing.append(f"{missing.size} chunks missing: {shown}")
    if n_pairs and s.branch_present < n_pairs:
        s.missing.append(f"{n_pairs - s.branch_present} of {n_pairs} branch points missing")
    return s
