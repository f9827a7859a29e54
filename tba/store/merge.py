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
* It is written complete under a temporary name and then renamed: an interrupted merge
  leaves no half-merged file. An existing ``--out`` of the same run is merged in as one more
  input (so shards that finish late can be added); one of another run, or a shard, is never
  overwritten unless ``force``.
* Chunks no input holds stay "not computed": the merge says which (per shard, when the inputs
  are shards of one split), and plain ``tba run RUNFILE --out MERGED`` computes just those.
"""

import json
import platform
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from tba.scans.runfile import differing_keys, resolve_run
from tba.scans.points import describe_chunk
from tba.store.hdf5 import (BRANCH_VARIABLES, MESSAGE_DTYPE, NOT_COMPUTED, POINT_VARIABLES,
                         SCHEMA, SCHEMA_VERSION, SHARD_INDEX, SHARD_SCHEMA, StoreError, _now,
                         _shard_of, check_store, create_store, git_commit, mark_unavailable,
                         package_version)

#: numbers compared between files (messages are text)
NUMBERS = [name for name, (kind, _, _) in POINT_VARIABLES.items() if kind != "str"]
BRANCH_NUMBERS = [name for name, (kind, _, _) in BRANCH_VARIABLES.items() if kind != "str"]


@dataclass
class MergeSummary:
    path: str
    files: list
    chunks_total: int
    chunks_present: int
    branch_total: int  # pairs expected (0 with scan.branch_points = false)
    branch_present: int
    missing: list = field(default_factory=list)  # lines saying what is missing

    @property
    def complete(self):
        return self.chunks_present == self.chunks_total and self.branch_present >= self.branch_total


def _read_file(path):
    try:
        return h5py.File(path, "r", locking=False)
    except FileNotFoundError:
        raise StoreError(f"{path}: no such file") from None
    except OSError as exc:
        raise StoreError(f"{path}: not a readable HDF5 file ({str(exc).splitlines()[0]})") from None


def _attr(f, name):
    v = f.attrs.get(name)
    return v.decode() if isinstance(v, bytes) else v


class _Merged:
    """The merged numbers, in memory, filled file by file."""

    def __init__(self, run):
        self.run = run
        self.chunks = run.chunks()
        self.data = {name: np.full(run.shape, fill, dtype=MESSAGE_DTYPE if kind == "str" else kind)
                     for name, (kind, fill, _) in POINT_VARIABLES.items()}
        self.data["message"][...] = b""
        shape = (len(run.models), len(run.alphas))
        self.branch = {name: np.full(shape, fill, dtype=MESSAGE_DTYPE if kind == "str" else kind)
                       for name, (kind, fill, _) in BRANCH_VARIABLES.items()}
        self.branch["message"][...] = b""
        self.branch_source = np.full(shape, -1)
        n = len(self.chunks)
        self.done = np.zeros(n, dtype=bool)
        self.source = np.full(n, -1)  # index of the file a chunk was taken from
        self.invocation = np.zeros(n, dtype="i4")
        self.seconds = np.full(n, np.nan)
        self.point_chunk = np.full(run.shape, -1, dtype="i4")  # -1: a state the model lacks
        for c in self.chunks:
            self.point_chunk[c.model, c.alpha, c.radius_start:c.radius_stop, c.state] = c.index
        mark_unavailable(self.data, run)
        self.history = []
        self.files = []

    def add(self, path, f):
        """Merge one open file (already checked to be of the same run)."""
        k = len(self.files)
        self.files.append(str(path))
        shard = _shard_of(f)
        g = f["progress"]
        done = g["done"][...].astype(bool)
        offset = len(self.history)
        for entry in json.loads(g.attrs["history"]):
            entry = dict(entry, invocation=offset + int(entry["invocation"]), file=str(path))
            if shard is not None:
                entry.setdefault("shard", shard.label)
            self.history.append(entry)
        if shard is None:
            where = np.nonzero((self.point_chunk >= 0) & done[self.point_chunk])
            values = {name: f[name][...][where] for name in POINT_VARIABLES}
        else:
            p = f["shard_points"]
            index = tuple(p[name][...] for name in SHARD_INDEX)
            chunk_of = self.point_chunk[index]
            sel = done[chunk_of]
            where = tuple(i[sel] for i in index)
            values = {name: p[name][...][sel] for name in POINT_VARIABLES}
        # chunks done here and already merged from an earlier file must agree bit for bit
        both = self.done[self.point_chunk[where]]
        for name in NUMBERS:
            old, new = self.data[name][where][both], values[name][both]
            same = (old == new) | (np.isnan(old) & np.isnan(new)) if old.dtype.kind == "f" else old == new
            if not same.all():
                bad = int(np.flatnonzero(~same)[0])
                point = tuple(int(i[both][bad]) for i in where)
                c = self.chunks[self.point_chunk[point]]
                raise StoreError(f"{path}: {describe_chunk(self.run, c)} holds other numbers "
                                 f"({name}) than in {self.files[self.source[c.index]]}; refusing "
                                 f"to merge inconsistent files")
        for name in POINT_VARIABLES:
            self.data[name][where] = values[name]
        new_chunks = done & ~self.done
        self.source[new_chunks] = k
        self.invocation[new_chunks] = np.where(g["invocation"][...][new_chunks] > 0,
                                               g["invocation"][...][new_chunks] + offset, 0)
        self.seconds[new_chunks] = g["seconds"][...][new_chunks]
        self.done |= done
        # branch points: (model, alpha) with a status are stored
        b = f["branch_points"]
        status = b["status"][...]
        have = status != NOT_COMPUTED
        both = have & (self.branch_source >= 0)
        for name in BRANCH_NUMBERS:
            old, new = self.branch[name][both], b[name][...][both]
            same = (old == new) | (np.isnan(old) & np.isnan(new)) if old.dtype.kind == "f" else old == new
            if not same.all():
                m, a = (int(x[~same][0]) for x in np.nonzero(both))
                raise StoreError(f"{path}: the branch point of {self.run.models[m].label} at alpha = "
                                 f"{self.run.alphas[a]:g} differs ({name}) from the one in "
                                 f"{self.files[self.branch_source[m, a]]}; refusing to merge "
                                 f"inconsistent files")
        new = have & (self.branch_source < 0)
        for name in BRANCH_VARIABLES:
            self.branch[name][new] = b[name][...][new]
        self.branch_source[new] = k

    def write(self, f, merge_entry):
        for name in POINT_VARIABLES:
            f[name][...] = self.data[name]
        for name in BRANCH_VARIABLES:
            f["branch_points"][name][...] = self.branch[name]
        g = f["progress"]
        g["invocation"][...] = self.invocation
        g["seconds"][...] = self.seconds
        g["done"][...] = self.done.astype("u1")
        g.attrs["history"] = json.dumps(self.history + [merge_entry])


def _check(path, f, first, first_path):
    """The file is a store of this schema and tba version, of the same run as ``first``."""
    schema = _attr(f, "schema")
    if schema not in (SCHEMA, SHARD_SCHEMA):
        raise StoreError(f"{path}: not a tba-flow scan file")
    version = int(f.attrs.get("schema_version", -1))
    if version != SCHEMA_VERSION:
        raise StoreError(f"{path}: schema version {version}, this tba merges {SCHEMA_VERSION}")
    stored = _attr(f, "package_version")
    if stored != package_version():
        raise StoreError(f"{path}: written by tba {stored}, this is tba {package_version()}; "
                         f"merging would mix versions")
    if first is not None and _attr(f, "run_id") != _attr(first, "run_id"):
        keys = differing_keys(json.loads(_attr(first, "run")), json.loads(_attr(f, "run"))) or ["run_id"]
        raise StoreError(f"{path}: from a different run than {first_path} (differs in: "
                         f"{', '.join(keys)}); refusing to merge")


def merge_stores(paths, out, force=False):
    """Merge the stores ``paths`` (shards, or full stores, of one run) into the full store
    ``out``; returns a `MergeSummary`. `StoreError` (one line, naming the file) for files of
    different runs or versions, inconsistent overlaps, or an ``out`` that would be
    overwritten (another run's file, a shard) without ``force``."""
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
    started = _now()
    files = [_read_file(p) for p in inputs]
    try:
        for p, f in zip(inputs, files):
            _check(p, f, files[0], inputs[0])
        run_dict = json.loads(_attr(files[0], "run"))
        run = resolve_run(run_dict, name=run_dict.get("name", "run")).with_output(out)
        for p, f in zip(inputs, files):
            table = np.stack([f["progress"][n][...] for n in ("model_index", "alpha_index",
                              "state_index", "radius_start", "radius_stop")], axis=1)
            expected = np.array([[c.model, c.alpha, c.state, c.radius_start, c.radius_stop]
                                 for c in run.chunks()], dtype=table.dtype).reshape(table.shape)
            if table.shape != expected.shape or not np.array_equal(table, expected):
                raise StoreError(f"{p}: its chunk table does not match its run; refusing to merge")
        if out.exists() and not force and out not in seen:
            try:  # a full store of the same run is merged in; anything else is left alone
                check_store(out, run)
            except StoreError as exc:
                raise StoreError(f"{str(exc).split('; ')[0]}; refusing to overwrite it with the "
                                 f"merge (use --force to replace it, or another --out)") from None
            files.insert(0, _read_file(out))
            inputs.insert(0, out)
        merged = _Merged(run)
        for p, f in zip(inputs, files):
            merged.add(p, f)
        run_file = _attr(files[0], "run_file") or None
        shard_counts = sorted({s.count for s in map(_shard_of, files) if s is not None})
    finally:
        for f in files:
            f.close()
    entry = {"invocation": len(merged.history) + 1, "started": started, "finished": _now(),
             "package_version": package_version(), "git_commit": git_commit(),
             "host": platform.node(), "merge": [str(p) for p in inputs],
             "chunks_merged": int(merged.done.sum()),
             "branch_points_merged": int((merged.branch_source >= 0).sum())}
    create_store(out, run, run_file, fill=lambda f: merged.write(f, entry))
    return _summary(run, out, inputs, merged, shard_counts)


def _summary(run, out, inputs, merged, shard_counts):
    chunks = merged.chunks
    n_pairs = len(run.models) * len(run.alphas) if run.branch_points else 0
    s = MergeSummary(str(out), [str(p) for p in inputs], len(chunks), int(merged.done.sum()), n_pairs,
                     int((merged.branch_source >= 0).sum()) if n_pairs else 0)
    missing = np.flatnonzero(~merged.done)
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
