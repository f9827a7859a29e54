"""Checksums of everything tba reads back from a store, and its recovery map.

A store of schema 4 carries

* one checksum per chunk (``/progress/checksum``), over the chunk's stored values of every
  per-point variable (energy, error, ..., message, in the order of
  `tba.scans.codes.POINT_VARIABLES`), its ``invocation`` and ``seconds`` and its index;
* one per branch point (``/branch_points/checksum``), over the values of
  `tba.scans.codes.BRANCH_VARIABLES` of that (model, alpha) and the pair itself; the same
  per excited level (``/level_branch_points/checksum``, over (model, alpha, state));
* one over the root attributes (``header_checksum``), the resolved run among them;
* one inside each history slot (``/progress/history``, JSON text, a newline, 16 hex digits);
* a recovery map (``/recovery/map``): the byte offset, type and shape of every data set,
  with the resolved run, behind a magic number and a checksum of its own, so that the chunks
  can be read back and verified from the raw bytes of a file whose HDF5 structure is damaged.

A checksum is the 64-bit BLAKE2b digest (hashlib) of the stored bytes (little-endian
numbers, fixed-length UTF-8 messages padded with NUL bytes), so reader and writer hash the
same bytes. It detects damage (flipped bits, torn or truncated writes, edits with other
tools), not a deliberate forgery: whoever rewrites the values can rewrite the checksum.
"""

import hashlib
import json

import numpy as np

from tba.scans.codes import BRANCH_VARIABLES, POINT_VARIABLES

#: opens the recovery map in the raw bytes of a store (found by a linear search); the map is
#: ASCII text: this, its length and checksum (16 hex digits each), the JSON, space padding
RECOVERY_MAGIC = b"#tba-flow recovery map#"


def digest(*parts):
    """The 64-bit BLAKE2b digest of the byte strings ``parts`` as an int (stored as uint64)."""
    h = hashlib.blake2b(digest_size=8)
    for p in parts:
        h.update(p)
    return int.from_bytes(h.digest(), "little")


def _bytes(a):
    return np.ascontiguousarray(a).tobytes()


def chunk_checksum(index, values, invocation, seconds):
    """Checksum of chunk ``index``: ``values`` maps the names of `POINT_VARIABLES` to the
    chunk's arrays as stored (radii ascending); ``invocation`` and ``seconds`` are its
    /progress entries (numpy scalars or 0-d arrays of the stored types)."""
    return digest(np.array([index], "<i8").tobytes(), np.array([invocation], "<i4").tobytes(),
                  np.array([seconds], "<f8").tobytes(), *(_bytes(values[n]) for n in POINT_VARIABLES))


def branch_checksum(model, alpha, values, state=None):
    """Checksum of the branch point (model, alpha) (of an excited level: (model, alpha,
    state)): ``values`` maps the names of `BRANCH_VARIABLES` to its stored scalars (0-d
    arrays or numpy scalars)."""
    key = [model, alpha] if state is None else [model, alpha, state]
    return digest(np.array(key, "<i8").tobytes(),
                  *(_bytes(np.asarray(values[n])) for n in BRANCH_VARIABLES))


def _plain(value):
    """An attribute value in a form JSON writes the same way on every read."""
    if isinstance(value, bytes):
        return value.decode("utf-8", "surrogateescape")
    if isinstance(value, np.ndarray):
        return [_plain(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        return value.item()
    return value


def header_checksum(attrs):
    """Checksum of the root attributes (a mapping), ``header_checksum`` itself excluded."""
    plain = {k: _plain(v) for k, v in attrs.items() if k != "header_checksum"}
    return f"{digest(json.dumps(plain, sort_keys=True).encode()):016x}"


def encode_history_entry(entry, size):
    """One history slot: the entry as JSON, a newline and its checksum, at most ``size``
    bytes. An entry too long for the slot loses the tail of its longest lists first
    (``failed``, ``merge``: counted in ``*_omitted``) and then of its longest strings."""
    entry = dict(entry)
    while True:
        text = json.dumps(entry, separators=(",", ":"), allow_nan=False)
        raw = f"{text}\n{digest(text.encode()):016x}".encode()
        if len(raw) <= size:
            return raw
        lists = [k for k, v in entry.items() if isinstance(v, list) and v]
        if lists:
            key = max(lists, key=lambda k: len(json.dumps(entry[k])))
            entry[key] = entry[key][:-1]
            entry[f"{key}_omitted"] = entry.get(f"{key}_omitted", 0) + 1
            continue
        strings = [k for k, v in entry.items() if isinstance(v, str) and len(v) > 3]
        if not strings:
            raise ValueError(f"a history entry does not fit in {size} bytes")
        key = max(strings, key=lambda k: len(entry[k]))
        entry[key] = entry[key][:max(0, len(entry[key]) - (len(raw) - size) - 3)] + "..."


def decode_history_entry(raw):
    """The entry of a history slot; None for an empty slot; ValueError for a damaged one."""
    raw = bytes(raw).rstrip(b"\0")
    if not raw:
        return None
    text, sep, check = raw.decode("utf-8", "replace").rpartition("\n")
    if not sep or check != f"{digest(text.encode()):016x}":
        raise ValueError("fails its checksum")
    return json.loads(text)


def encode_recovery_map(content, size):
    """The recovery map (a JSON-ready dict) as ``size`` bytes of ASCII: magic, length and
    checksum of the JSON (16 hex digits each), the JSON, spaces."""
    text = json.dumps(content, separators=(",", ":")).encode("ascii")
    raw = RECOVERY_MAGIC + f"{len(text):016x}{digest(text):016x}".encode() + text
    if len(raw) > size:
        raise ValueError(f"recovery map of {len(raw)} bytes does not fit in {size}")
    return raw + b" " * (size - len(raw))


def find_recovery_map(buffer):
    """The recovery map in the raw bytes ``buffer`` of a store (bytes or mmap): the first
    intact one after a magic number, as a dict; None if there is none."""
    start = 0
    while True:
        at = buffer.find(RECOVERY_MAGIC, start)
        if at < 0:
            return None
        head = at + len(RECOVERY_MAGIC)
        try:
            n, check = int(buffer[head:head + 16], 16), int(buffer[head + 16:head + 32], 16)
        except ValueError:
            n = check = -1
        text = bytes(buffer[head + 32:head + 32 + n]) if n >= 0 else b""
        if n >= 0 and len(text) == n and digest(text) == check:
            try:
                return json.loads(text)
            except ValueError:
                pass
        start = at + 1
