"""Helpers of the store tests: deliberate edits that keep a store consistent, and bit flips."""

import h5py
import numpy as np

from tba.store.hdf5 import NOT_COMPUTED, branch_values, chunk_values, load, shard_points
from tba.store.integrity import branch_checksum, chunk_checksum, header_checksum


def reseal(path):
    """Recompute every checksum of the store at ``path`` after a deliberate edit with h5py:
    a file that is consistent but holds other numbers (what two different computations of
    the same chunk would give), as opposed to a damaged one."""
    with h5py.File(path, "r+") as f:
        f.attrs["header_checksum"] = header_checksum(f.attrs)
    snap = load(path, verify=False)
    run, shard = snap.run, snap.shard
    offsets = shard_points(run, shard)[0] if shard is not None else None
    with h5py.File(path, "r+") as f:
        for c in run.chunks() if shard is None else shard.chunks(run):
            if snap.done[c.index]:
                f["progress/checksum"][c.index] = chunk_checksum(
                    c.index, chunk_values(snap.points, run, c, offsets),
                    snap.progress["invocation"][c.index], snap.progress["seconds"][c.index])
        for m, a in zip(*np.nonzero(snap.branch["status"] != NOT_COMPUTED)):
            f["branch_points/checksum"][m, a] = branch_checksum(m, a, branch_values(snap.branch, m, a))
        if snap.version >= 5:  # the excited levels' branch points
            for m, a, s in zip(*np.nonzero(snap.levels["status"] != NOT_COMPUTED)):
                f["level_branch_points/checksum"][m, a, s] = branch_checksum(
                    m, a, branch_values(snap.levels, m, a, s), state=s)


def flip_bit(path, offset, bit=0):
    """Flip one bit of the file at byte ``offset``, in place."""
    with open(path, "r+b") as fh:
        fh.seek(offset)
        byte = fh.read(1)[0]
        fh.seek(offset)
        fh.write(bytes([byte ^ (1 << bit)]))


def data_offset(path, name):
    """Byte offset of the contiguous data set ``name`` in the file."""
    with h5py.File(path, "r", locking=False) as f:
        return f[name].id.get_offset()
