"""What can be saved from a store whose HDF5 structure is damaged: every chunk (and branch
point) whose stored values still match its checksum, read from the raw bytes.

A schema-4 store holds a recovery map (`tba.store.integrity`): the resolved run and the byte
offset, type and shape of every data set, found by its magic number anywhere in the file.
With it, `salvage` reads the done mask, the checksums and the values straight from the
bytes, without HDF5, and keeps what verifies: a truncated file keeps the chunks that lie
before the cut, a file with flipped bits all chunks but the hit ones. ``tba run`` rebuilds
the store from that (`tba.store.writer.recover_store`); readers say how much it would keep.
"""

import mmap
from dataclasses import dataclass, field

import numpy as np

from tba.scans.codes import BRANCH_VARIABLES, NOT_COMPUTED, POINT_VARIABLES
from tba.scans.runfile import RunFileError, parse_shard, resolve_run
from tba.store.hdf5 import (LEVEL_GROUP, SCHEMA_VERSION, STORED, branch_values, chunk_values,
                            key_checksum, shard_points)
from tba.store.integrity import chunk_checksum, decode_history_entry, find_recovery_map


@dataclass
class Salvage:
    """What a damaged store still holds: ``chunks`` maps chunk indices to (values in the stored
    types, invocation, seconds) for the chunks whose checksums verify, ``branch`` maps
    (model, alpha) (excited levels: (model, alpha, state)) to the values of the branch
    points that verify; ``marked`` counts the
    chunks the damaged file marks done."""

    run: object
    shard: object
    run_file: str
    package_version: str
    chunks: dict = field(default_factory=dict)
    branch: dict = field(default_factory=dict)
    history: list = field(default_factory=list)
    marked: int = 0


def _array(buffer, entry, dtype):
    """The data set described by a map entry, from the raw bytes; the bytes beyond the end
    of a truncated file read as zeros (they fail their checksums)."""
    offset, _, shape = entry
    dtype = np.dtype(dtype)
    n = int(np.prod(shape, dtype=np.int64))
    raw = np.zeros(n * dtype.itemsize, dtype="u1")
    if offset is not None and 0 <= offset < len(buffer):
        have = bytes(buffer[offset:offset + raw.size])
        raw[:len(have)] = np.frombuffer(have, dtype="u1")
    return raw.view(dtype).reshape(shape)


def salvage(path):
    """A `Salvage` of the store at ``path``, or None when it holds no intact recovery map of
    this schema (then nothing can be read without its HDF5 structure)."""
    try:
        with open(path, "rb") as fh:
            try:
                buffer = mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)
            except ValueError:  # an empty file
                return None
    except OSError:
        return None
    with buffer:
        content = find_recovery_map(buffer)
        if content is None or content.get("schema_version") != SCHEMA_VERSION:
            return None
        try:
            run_dict = content["run"]
            run = resolve_run(run_dict, name=run_dict.get("name", "run"))
            shard = parse_shard(content["shard"]) if content.get("shard") else None
            datasets = content["datasets"]
        except (KeyError, TypeError, ValueError, RunFileError):
            return None
        if run.run_id != content.get("run_id"):
            return None
        return _read(buffer, run, shard, datasets, str(content.get("run_file") or ""),
                     str(content.get("package_version")))


def _read(buffer, run, shard, datasets, run_file, version):
    def get(name, kind):
        return _array(buffer, datasets[name], STORED[kind]) if name in datasets else None

    out = Salvage(run=run, shard=shard, run_file=run_file, package_version=version)
    done, checksum = get("progress/done", "u1"), get("progress/checksum", "u8")
    invocation, seconds = get("progress/invocation", "i4"), get("progress/seconds", "f8")
    prefix = "" if shard is None else "shard_points/"
    points = {name: get(prefix + name, kind) for name, (kind, _, _) in POINT_VARIABLES.items()}
    if any(v is None for v in (done, checksum, invocation, seconds, *points.values())):
        return out
    offsets = shard_points(run, shard)[0] if shard is not None else None
    mine = run.chunks() if shard is None else shard.chunks(run)
    out.marked = int(sum(done[c.index] == 1 for c in mine))
    for c in mine:
        if done[c.index] != 1:
            continue
        values = {k: v.copy() for k, v in chunk_values(points, run, c, offsets).items()}
        if chunk_checksum(c.index, values, invocation[c.index], seconds[c.index]) == int(checksum[c.index]):
            out.chunks[c.index] = (values, invocation[c.index], seconds[c.index])
    for group in ("branch_points", LEVEL_GROUP):
        branch = {name: get(f"{group}/{name}", kind) for name, (kind, _, _) in BRANCH_VARIABLES.items()}
        bsum = get(f"{group}/checksum", "u8")
        if bsum is not None and all(v is not None for v in branch.values()):
            for key in zip(*np.nonzero(branch["status"] != NOT_COMPUTED)):
                values = branch_values(branch, *key)
                if key_checksum(key, values) == int(bsum[key]):
                    out.branch[tuple(int(i) for i in key)] = {k: np.array(v) for k, v in values.items()}
    entry = datasets.get("progress/history")
    for raw in _array(buffer, entry, np.dtype(entry[1])) if entry else ():
        try:
            item = decode_history_entry(raw)
        except ValueError:
            continue
        if item is not None:
            out.history.append(item)
    out.history.sort(key=lambda e: e["invocation"])
    return out
