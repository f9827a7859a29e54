"""The HDF5 store of a scan: layout, creation, validated reading.

Layout (schema version 5; readable with plain h5py, and with xarray through
``xarray.open_dataset(path, engine="h5netcdf")`` or ``engine="netcdf4"``)::

    /                          root attributes: schema, schema_version, package,
                               package_version, git_commit, created, title, run (the
                               resolved run as JSON), run_id, run_file, models (JSON),
                               conventions, units, status_legend, flow_status_legend,
                               branch_point_status_legend, layout, header_checksum
    /model   (model)           dimension scale: label "name" or "name B=coupling"
    /alpha   (alpha)           dimension scale: TTbar coupling (sorted)
    /radius  (radius)          dimension scale: circumference R (sorted)
    /state   (state)           dimension scale: "ground" or Bethe quantum numbers ("-1/2,1/2")
    /model_name, /model_coupling (model)         the model axis split into name and B (NaN: none)
    /energy, /error, /momentum, /status, /iterations, /message,
    /flow_radius, /flow_prediction, /flow_error, /flow_residual, /flow_status
                               (model, alpha, radius, state), one value per point
    /progress/chunk (chunk)    dimension scale: chunk index
    /progress/{model_index, alpha_index, state_index, radius_start, radius_stop}
                               the chunk table (a pure function of the resolved run)
    /progress/done (chunk)     1 once the chunk's values are written (the resume mask)
    /progress/invocation (chunk)  which invocation of ``tba run`` computed it (0: not yet)
    /progress/seconds (chunk)  wall time of the chunk in its worker
    /progress/checksum (chunk) uint64 checksum of the chunk's stored values (`tba.store.integrity`)
    /progress/history (slot)   the last HISTORY_SLOTS invocations of tba run (and merges), one
                               JSON entry per slot (fixed length, with its own checksum);
                               invocation k lives in slot (k - 1) mod HISTORY_SLOTS
    /progress/slot (slot)      dimension scale of the history slots
    /recovery/map              a fixed-length ASCII string: the recovery map (byte offsets of
                               every data set and the resolved run, `tba.store.integrity`)
    /branch_points/{branch_radius, branch_radius_error, energy, energy_error,
                    effective_radius, status, message, checksum}
                               (model, alpha), attached to the /model and /alpha scales: the
                               ground state's branch point R_c(alpha), E(R_c), R~_* and their
                               errors (`tba.physics.flow.branch_point` at the run's tol); status 0
                               found, 1 none (alpha <= 0), 2 not-applicable (higher-spin
                               factors in the run), 3 failed (message: the exception),
                               -1 not computed
    /level_branch_points/{branch_radius, ..., status, message, checksum}
                               (model, alpha, state): the same variables for each excited
                               level, its fold in R at fixed alpha
                               (`tba.physics.flow.excited_branch_point` at the run's tol): the
                               level's R_c(alpha), E(R_c), R~_* and errors; status 0 found, 1
                               none (no fold on this side of alpha, or alpha = 0), 2
                               not-applicable (higher-spin or pole factors, or a level the
                               model lacks), 3 failed, -1 not computed (always for "ground": its
                               branch point is /branch_points)

``message`` is a fixed-length UTF-8 string (256 bytes): h5py's ``.asstr()`` and xarray's
netcdf4 engine give str, the h5netcdf engine gives bytes (``.astype(str)``).

The branch points with xarray: ``xarray.open_datatree(path, engine="h5netcdf")
["branch_points"]`` (the group inherits the model and alpha coordinates of the root), or
``xarray.open_dataset(path, engine="h5netcdf", group="branch_points")`` (dims model and
alpha, without their coordinate values).

A missing value is NaN (or "" / 0) together with a status code that says why
(``status_legend``, ``flow_status_legend`` and the CF ``flag_values``/``flag_meanings``
of the status variables).

Shard files (``tba run --shard I/N``, job arrays without a scheduler) have the schema
``"tba-flow scan shard"`` (so that a tba that does not know them refuses them with one line
instead of failing on a missing data set) and the same version and root attributes, plus
``shard`` ("I/N"), ``shard_index`` and ``shard_count``. They hold only their own points,
so that N shards of a large run take the disk of one full store, not N::

    /shard_points/{energy, error, ..., flow_status}   (point) the shard's points, chunk after
                               chunk in chunk-table order, radii ascending inside a chunk
    /shard_points/{model_index, alpha_index, radius_index, state_index}   (point) where each
                               point lies in the full (model, alpha, radius, state) grid
    /progress/owned (chunk)    1 for the chunks of this shard (`tba.scans.runfile.Shard`)

Everything else (scales, the full chunk table, done mask, /branch_points with the pairs of
other shards left not computed) is laid out as in a full store. `read_store` expands a
shard into full arrays (other shards' points "not computed"), so reports, plots and exports
work on it and say it is partial; `tba.store.merge` combines shards into a full store.

Schema history: 1 reserved ``/branch_points`` (empty); 2 fills it; 3 adds ``/momentum``,
excited states on the state axis and the status "not-available" (3) for the points of a state
that a model lacks (set when the file is created); 4 adds the checksums, the recovery map,
the history as fixed slots (instead of a ``/progress`` attribute ``history`` that grew with
every invocation) and HDF5's own metadata checksums (file format of HDF5 1.10); 5 adds
``/level_branch_points``. Files of schemas 1 to 4 are still read (branch points of schema 1
and excited-level branch points before schema 5 count as not computed, momentum before 3 is
NaN; no checksums to verify before 4) but never resumed.

How a store is written (`tba.store.writer`): the file is built complete in memory, every point
"not computed", and written under a temporary name, then renamed; the free space is checked
first. After that its HDF5 structure is never written again: every data set is contiguous and
allocated, and the scan driver overwrites only the bytes of values (through the offsets HDF5
reports), in an order that keeps every moment readable: a chunk's values, invocation, seconds
and checksum, then its ``done`` flag. So a kill, a full disk or a failed write loses at most
the chunk in flight, the file never grows, and readers see a consistent snapshot. Every read
(`read_store`, `check_store`, merges) validates the layout against the run and verifies the
checksums of the chunks marked done.
"""

import datetime
import json
import math
import os
import subprocess
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from tba.scans.codes import (  # noqa: F401 (re-exported: the layout of a store)
    NOT_COMPUTED, NOT_AVAILABLE, FLOW_OFF, FLOW_NOT_APPLICABLE, FLOW_NO_ENERGY, BP_FOUND,
    BP_NONE, BP_NOT_APPLICABLE, BP_FAILED, BP_CODES, STATUS_MEANINGS, FLOW_MEANINGS,
    BRANCH_MEANINGS, MESSAGE_BYTES, POINT_VARIABLES, DIMS, BRANCH_VARIABLES, BRANCH_DIMS,
    LEVEL_BRANCH_DIMS, LEVEL_BRANCH_ATTRS)
from tba.scans.points import describe_chunk
from tba.scans.runfile import RunFileError, RunSpec, Shard, differing_keys, resolve_run
from tba.store.errors import DamagedStore, StoreError, StoreWriteError  # noqa: F401 (re-exported)
from tba.store.integrity import (RECOVERY_MAGIC, branch_checksum, chunk_checksum,
                                 decode_history_entry, encode_history_entry, encode_recovery_map,
                                 header_checksum)
from tba.store.lock import holder, partial_path

SCHEMA = "tba-flow scan"
#: schema of a shard file (one shard of a run, `tba.scans.runfile.Shard`)
SHARD_SCHEMA = "tba-flow scan shard"
SCHEMA_VERSION = 5
#: schema versions `read_store` understands (only SCHEMA_VERSION is ever resumed)
READABLE_VERSIONS = (1, 2, 3, 4, 5)
#: the group of the excited levels' branch points (schema 5)
LEVEL_GROUP = "level_branch_points"
#: HDF5 file format of the stores: that of HDF5 1.10, whose metadata carries checksums
LIBVER = ("v110", "v110")
#: invocations kept in /progress/history, and the bytes of one entry
HISTORY_SLOTS = 128
HISTORY_BYTES = 1024
HISTORY_DTYPE = h5py.string_dtype("utf-8", HISTORY_BYTES)
#: free space asked for beyond the file itself (the lock file, the directory entry)
SPACE_MARGIN = 1 << 16
#: a reader that sees a store change under it (a writer holds the lock) reads it again, up
#: to this many times, this many seconds apart
READ_RETRIES, READ_RETRY_DELAY = 20, 0.1

CONVENTIONS = """\
Units: the lightest mass m_1 = 1; R is the circumference of the space circle; hbar = c = 1.
energy is the TBA energy E(R, alpha) of the state WITHOUT the bulk term f R; momentum its
total momentum P (R P is 2 pi times an integer). States: "ground", or an excited level named by
its Bethe quantum numbers I_k (m R sinh t_k + sum_j delta(t_k - t_j) = 2 pi I_k at large R;
for Lee-Yang, "0" is its one-particle state).
Deformation: S_ab(t) -> S_ab(t) exp(i alpha m_a m_b sinh t) (phi_ab += alpha m_a m_b cosh t),
higher odd spins s: exp(i alpha_s sinh(s t)) (single-species models).
Pole and resonance factors of the run (deformation.poles [x, p]: F_(pi x)^p; deformation.resonances
[theta0, p]: F^p with sin u = cosh theta0; F_u = (sinh t + i sin u) / (sinh t - i sin u)) multiply
every S_ab at every alpha (root attribute cdd_factors); alpha = 0 then means these factors alone.
Then d/dalpha E = E dE/dR + P^2/R. With TTbar alone the deformed level is the undeformed one
at R~ = sqrt((R + alpha E)^2 - (alpha P)^2), boosted: E R~ = (R + alpha E) E_n(R~, 0) + alpha P^2 R / R~
(for P = 0: E(R, alpha) = E_n(R + alpha E, 0)). flow_radius is R~, flow_prediction E_flow that
expression with E_n(R~, 0) solved at R~ (the same level undeformed), flow_residual = |energy -
flow_prediction|, flow_error the error estimate of the prediction: the undeformed solve's
times (R + alpha E) / R~, plus |d prediction / dE| times the error of E (for P = 0: |alpha
E_n'(R~, 0)| err(E), which dominates where the level is steep).
alpha > 0 is the Hagedorn side: below a branch radius R_c there is no real ground state.
/branch_points: R_c(alpha) = R~ - alpha E_0(R~, 0) where E_0'(R~, 0) = 1/alpha (TTbar only;
E_0 the ground state); energy there E(R_c) = E_0(R_c, alpha) = E_0(R~, 0) (read as
branch_energy); Hagedorn temperature T_H = 1/R_c.
/level_branch_points (model, alpha, state): an excited level's fold in R at fixed alpha, where
it meets another real branch and both turn complex: dR/dR~ = 0 along R^2 = (R~ - alpha E~)^2 -
(alpha P~)^2 on its undeformed curve E~(R~) (for P = 0: alpha E~'(R~_*) = 1); energy is E(R_c)
of the level. Names: docs/glossary.md.
error estimates |energy - exact| and is meant to bound it; tol is relative."""

UNITS = ("radius, flow_radius, branch_points/{branch_radius, branch_radius_error, "
         "effective_radius}: 1/m_1; "
         "energy, error, flow_prediction, flow_error, flow_residual, "
         "branch_points/{energy, energy_error}: m_1 (the same in /level_branch_points); alpha: 1/m_1^2; m_1 = lightest mass = 1")

LAYOUT = ("data sets (model, alpha, radius, state): energy error momentum status iterations message "
          "flow_radius flow_prediction flow_error flow_residual flow_status; /progress: chunk "
          "table, done mask, checksums, history, recovery map; /branch_points (model, alpha): "
          "branch_radius branch_radius_error energy energy_error effective_radius status message "
          "checksum; /level_branch_points (model, alpha, state): the same for excited levels")

SHARD_LAYOUT = ("shard of a run: /shard_points (point): energy error momentum status iterations "
                "message flow_radius flow_prediction flow_error flow_residual flow_status and "
                "model_index alpha_index radius_index state_index (the point's place in the "
                "full grid); /progress: chunk table, done mask, owned mask, checksums, history, "
                "recovery map; /branch_points (model, alpha) and /level_branch_points (model, "
                "alpha, state) as in a full store, this shard's ones only")

#: messages are fixed-length UTF-8 strings (`MESSAGE_BYTES`): writing a chunk only overwrites
#: bytes at fixed places in the file and never changes its metadata (see `tba.store.writer`)
MESSAGE_DTYPE = h5py.string_dtype("utf-8", MESSAGE_BYTES)

PROGRESS_FIELDS = ("model_index", "alpha_index", "state_index", "radius_start", "radius_stop")
#: index data sets of /shard_points: where each of a shard's points lies in the full grid
SHARD_INDEX = ("model_index", "alpha_index", "radius_index", "state_index")
#: the stored type of each kind of `POINT_VARIABLES` / `BRANCH_VARIABLES`
STORED = {"f8": np.dtype("<f8"), "i1": np.dtype("i1"), "i4": np.dtype("<i4"),
          "u1": np.dtype("u1"), "u8": np.dtype("<u8"), "str": np.dtype(f"S{MESSAGE_BYTES}")}


def shard_points(run, shard):
    """{chunk index: offset of its first point in /shard_points} and the number of points
    of the shard: its chunks one after the other, in chunk-table order."""
    offsets, n = {}, 0
    for c in shard.chunks(run):
        offsets[c.index] = n
        n += c.size
    return offsets, n


# -- provenance ---------------------------------------------------------------------------------

def git_commit():
    """``git rev-parse HEAD`` of the source tree the package runs from, else "unknown"."""
    root = Path(__file__).resolve().parents[2]  # the source tree: tba/store/hdf5.py
    if not (root / ".git").exists() or not (root / "pyproject.toml").is_file():
        return "unknown"
    try:
        out = subprocess.run(["git", "-C", str(root), "rev-parse", "HEAD"], capture_output=True,
                             text=True, timeout=10)
    except (OSError, subprocess.SubprocessError):
        return "unknown"
    commit = out.stdout.strip()
    return commit if out.returncode == 0 and commit else "unknown"


def package_version():
    from tba import __version__
    return __version__


def now():
    return datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")


def _legend(meanings):
    return "; ".join(f"{code} {name}: {text}" for code, (name, text) in sorted(meanings.items()))


def _flags(meanings):
    codes = sorted(meanings)
    return {"flag_values": np.array(codes, dtype="i1"),
            "flag_meanings": " ".join(meanings[c][0] for c in codes),
            "legend": _legend(meanings)}


# -- values as stored ---------------------------------------------------------------------------

def _encode(text):
    """UTF-8 bytes of at most MESSAGE_BYTES, cut at a character boundary ("..." marks a cut)."""
    raw = str(text).encode("utf-8")
    if len(raw) > MESSAGE_BYTES:
        raw = raw[:MESSAGE_BYTES - 3].decode("utf-8", "ignore").encode("utf-8") + b"..."
    return raw


def full(shape, kind, fill):
    """An array of ``shape`` filled with ``fill``, of the stored type of ``kind``."""
    if kind == "str":
        return np.full(shape, _encode(fill), dtype=STORED["str"])
    return np.full(shape, fill, dtype=STORED[kind])


def as_stored(kind, values):
    """``values`` in the stored type of ``kind`` (messages: UTF-8 bytes, cut to fit)."""
    if kind == "str":
        return np.array([_encode(v) for v in np.ravel(values)], dtype=STORED["str"]).reshape(np.shape(values))
    return np.asarray(values, dtype=STORED[kind])


def _decode(raw):
    """Stored messages (bytes) as str objects."""
    out = np.empty(raw.shape, dtype=object)
    out.ravel()[:] = [b.decode("utf-8", "replace") for b in raw.ravel()]
    return out


def chunk_slice(run, chunk, offsets=None):
    """Where the points of ``chunk`` lie in the point arrays: an index into (model, alpha,
    radius, state) arrays, or into /shard_points with ``offsets`` (`shard_points`)."""
    if offsets is None:
        return (chunk.model, chunk.alpha, slice(chunk.radius_start, chunk.radius_stop), chunk.state)
    return slice(offsets[chunk.index], offsets[chunk.index] + chunk.size)


def chunk_values(points, run, chunk, offsets=None):
    """{name: the chunk's values} from point arrays in the stored types."""
    sl = chunk_slice(run, chunk, offsets)
    return {name: points[name][sl] for name in POINT_VARIABLES}


def branch_values(branch, *key):
    """{name: 0-d array} of the branch point ``key`` = (m, a), or (m, a, s) in the arrays of
    the excited levels (0-d arrays keep the stored types)."""
    return {name: branch[name][(*key, ...)] for name in BRANCH_VARIABLES}


def key_checksum(key, values):
    """`branch_checksum` of a ground-state (m, a) or excited-level (m, a, s) branch point."""
    return branch_checksum(key[0], key[1], values, None if len(key) == 2 else key[2])


def key_group(key):
    """The HDF5 group of a branch-point key: /branch_points (m, a), /level_branch_points (m, a, s)."""
    return "branch_points" if len(key) == 2 else LEVEL_GROUP


def describe_branch(run, key):
    """``the branch point of lee-yang at alpha = -0.1`` (``, state 0`` for a level)."""
    state = "" if len(key) == 2 else f", state {run.states[key[2]]}"
    return (f"the branch point of {run.models[key[0]].label} at alpha = "
            f"{run.alphas[key[1]]:.10g}{state}")


def stored_scalar(kind, value):
    """One value as a 0-d array of the stored type of ``kind``."""
    return full((), kind, value) if kind == "str" else np.array(value, dtype=STORED[kind])


# -- creation -----------------------------------------------------------------------------------

def _recovery_bytes(run):
    """Room for the recovery map: the resolved run, and an entry per data set."""
    return len(json.dumps(run.to_dict(), separators=(",", ":"))) + 16384


def cdd_factors_attribute(run):
    """The run's pole and resonance factors, self-describing: what each entry means and the
    factors F_sigma^power the solver uses (sigma = sin u)."""
    def entry(poles, resonances, deformation):
        return {"poles": [{"x": x, "power": p} for x, p in poles],
                "resonances": [{"theta0": t, "power": p} for t, p in resonances],
                "factors": deformation.describe()["factors"], "sign": deformation.sign}

    out = {"convention": "S_ab -> S_ab * sign * prod F_sigma^power, F_sigma = (sinh t + i sigma) / "
                         "(sinh t - i sigma); poles [x, p]: sigma = sin(pi x); resonances "
                         "[theta0, p]: sigma = cosh(theta0); sign keeps S_ab(0). Top level: the "
                         "factors of every model entry ([deformation]); 'models': per entry, "
                         "those and its own",
           **entry(run.poles, run.resonances, run.base_deformation())}
    out["models"] = [{"label": m.label, **entry(m.poles, m.resonances, run.base_deformation(i))}
                     for i, m in enumerate(run.models)]
    return out


def _write_layout(f, run, run_file, models_info, shard=None):
    s = h5py.string_dtype()  # variable-length: coordinates and fixed metadata only
    f.attrs.update({
        "schema": SCHEMA if shard is None else SHARD_SCHEMA, "schema_version": SCHEMA_VERSION,
        "package": "tba-flow", "package_version": package_version(), "git_commit": git_commit(),
        "created": now(), "title": run.description or run.name,
        "run": run.to_json(), "run_id": run.run_id, "run_file": str(run_file or ""),
        "models": json.dumps(models_info), "conventions": CONVENTIONS, "units": UNITS,
        "status_legend": _legend(STATUS_MEANINGS), "flow_status_legend": _legend(FLOW_MEANINGS),
        "branch_point_status_legend": _legend(BRANCH_MEANINGS), "layout": LAYOUT,
    })
    if run.has_poles:
        f.attrs["cdd_factors"] = json.dumps(cdd_factors_attribute(run))
    if shard is not None:
        f.attrs.update({"shard": shard.label, "shard_index": shard.index, "shard_count": shard.count,
                        "layout": SHARD_LAYOUT})
    # first, so that its bytes lie near the start of the file (a truncated file keeps it)
    size = _recovery_bytes(run)
    f.create_group("recovery").create_dataset(
        "map", data=np.array(b" " * size, dtype=f"S{size}")).attrs["long_name"] = \
        "recovery map: byte offsets of the data sets and the resolved run (tba.store.integrity)"
    g = f.create_group("progress")
    scales = {
        "model": f.create_dataset("model", data=np.array([m.label for m in run.models], dtype=object),
                                  dtype=s),
        "alpha": f.create_dataset("alpha", data=np.array(run.alphas, dtype="f8")),
        "radius": f.create_dataset("radius", data=np.array(run.radii, dtype="f8")),
        "state": f.create_dataset("state", data=np.array(run.states, dtype=object), dtype=s),
    }
    scales["model"].attrs["long_name"] = "model and coupling"
    scales["alpha"].attrs.update({"long_name": "TTbar coupling alpha (spin-1 CDD factor)",
                                  "units": "1/m_1^2"})
    scales["radius"].attrs.update({"long_name": "circumference R of the space circle",
                                   "units": "1/m_1"})
    scales["state"].attrs["long_name"] = ("state: ground, or an excited level named by its "
                                          "Bethe quantum numbers")
    for name, ds in scales.items():
        ds.make_scale(name)
    names = f.create_dataset("model_name", data=np.array([m.name for m in run.models], dtype=object),
                             dtype=s)
    couplings = f.create_dataset("model_coupling", data=np.array(
        [np.nan if m.coupling is None else m.coupling for m in run.models], dtype="f8"))
    names.attrs["long_name"] = "model name (tba solve --model)"
    couplings.attrs["long_name"] = "model coupling (sinh-Gordon B; NaN: the model has none)"
    for ds in (names, couplings):
        ds.dims[0].attach_scale(scales["model"])
    if shard is None:
        _write_points(f, run.shape, scales, DIMS)
        mark_unavailable(f, run)
    else:
        _write_shard_points(f, run, shard)
    bp = f.create_group("branch_points")
    bp.attrs.update({
        "long_name": "branch point R_c(alpha) of the ground state (tba.physics.flow.branch_point)",
        "method": "E_0'(R~) = 1/alpha on the undeformed TBA curve (Brent's method on the exact "
                  "derivative); R_c = R~ - alpha E_0(R~); at the run's tol",
        "legend": _legend(BRANCH_MEANINGS),
    })
    _write_branch_group(bp, (len(run.models), len(run.alphas)), BRANCH_DIMS, scales)
    lp = f.create_group(LEVEL_GROUP)
    lp.attrs.update({
        "long_name": "branch points R_c(alpha) of the excited levels: the fold in R at fixed "
                     "alpha (tba.physics.flow.excited_branch_point)",
        "method": "the first zero of dR/dR~ along the characteristic R(R~) on the level's "
                  "undeformed curve, walking down from R~ = 20 (Brent); errors from a second "
                  "curve at a coarser tolerance; at the run's tol. The ground column is not "
                  "computed: see /branch_points",
        "legend": _legend(BRANCH_MEANINGS),
    })
    _write_branch_group(lp, level_shape(run), LEVEL_BRANCH_DIMS, scales, LEVEL_BRANCH_ATTRS)
    chunks = run.chunks()
    g.attrs.update({"chunk_size": run.chunk_size, "n_chunks": len(chunks),
                    "long_name": "scan bookkeeping: chunk table, resume mask, checksums, history"})
    scale = g.create_dataset("chunk", data=np.arange(len(chunks), dtype="i4"))
    scale.make_scale("chunk")
    table = {
        "model_index": [c.model for c in chunks], "alpha_index": [c.alpha for c in chunks],
        "state_index": [c.state for c in chunks], "radius_start": [c.radius_start for c in chunks],
        "radius_stop": [c.radius_stop for c in chunks],
    }
    for name, values in table.items():
        g.create_dataset(name, data=np.array(values, dtype="i4"))
    n = len(chunks)
    g.create_dataset("done", data=np.zeros(n, dtype="u1")).attrs["long_name"] = \
        "1 once the chunk's values are written"
    g.create_dataset("invocation", data=np.zeros(n, dtype="i4")).attrs["long_name"] = \
        "invocation of tba run that computed the chunk (see history; 0: not yet)"
    g.create_dataset("seconds", data=np.full(n, np.nan)).attrs["long_name"] = \
        "wall time of the chunk in its worker"
    g.create_dataset("checksum", data=np.zeros(n, dtype="<u8")).attrs["long_name"] = \
        "checksum of the chunk's stored values, invocation and seconds (tba.store.integrity)"
    extra = ()
    if shard is not None:
        g.create_dataset("owned", data=np.array([shard.owns(c) for c in chunks], dtype="u1")) \
            .attrs["long_name"] = f"1 for the chunks of this shard ({shard.label})"
        extra = ("owned",)
    for name in (*table, "done", "invocation", "seconds", "checksum", *extra):
        g[name].dims[0].attach_scale(scale)
        if name in table:
            g[name].attrs["long_name"] = f"chunk table: {name.replace('_', ' ')}"
    slot = g.create_dataset("slot", data=np.arange(HISTORY_SLOTS, dtype="i4"))
    slot.make_scale("slot")
    history = g.create_dataset("history", data=np.zeros(HISTORY_SLOTS, dtype=HISTORY_DTYPE))
    history.attrs["long_name"] = (
        f"the last {HISTORY_SLOTS} invocations of tba run (and merges): one JSON entry per slot, "
        f"invocation k in slot (k - 1) mod {HISTORY_SLOTS}, followed by a newline and its checksum")
    history.dims[0].attach_scale(slot)


def level_shape(run):
    return (len(run.models), len(run.alphas), len(run.states))


def _write_branch_group(group, shape, dims, scales, overrides=None):
    for name, (kind, fill, attrs) in {**BRANCH_VARIABLES, "checksum": (
            "u8", 0, {"long_name": "checksum of the branch point (tba.store.integrity)"})}.items():
        ds = group.create_dataset(name, data=full(shape, kind, fill))
        ds.attrs.update((overrides or {}).get(name, attrs))
        if name == "status":
            ds.attrs.update(_flags(BRANCH_MEANINGS))
        for i, dim in enumerate(dims):
            ds.dims[i].attach_scale(scales[dim])


def mark_unavailable(arrays, run):
    """Set the points of the states a model does not have (`RunSpec.unavailable`) to status
    "not-available" with the reason as message, in ``arrays`` (an HDF5 group or a dict of
    arrays of shape (model, alpha, radius, state))."""
    for m, s, why in run.unavailable:
        arrays["status"][m, :, :, s] = NOT_AVAILABLE
        arrays["flow_status"][m, :, :, s] = FLOW_NOT_APPLICABLE
        message = arrays["message"]  # str objects in memory (read_store), else UTF-8 bytes
        text = why if isinstance(message, np.ndarray) and message.dtype == object else _encode(why)
        message[m, :, :, s] = text


def _write_points(f, shape, scales, dims):
    for name, (kind, fill, attrs) in POINT_VARIABLES.items():
        ds = f.create_dataset(name, data=full(shape, kind, fill))
        ds.attrs.update(attrs)
        if name == "status":
            ds.attrs.update(_flags(STATUS_MEANINGS))
        elif name == "flow_status":
            ds.attrs.update(_flags(FLOW_MEANINGS))
        for i, dim in enumerate(dims):
            ds.dims[i].attach_scale(scales[dim])


def shard_index(run, shard):
    """The /shard_points index arrays (`SHARD_INDEX`) of a shard."""
    offsets, n = shard_points(run, shard)
    index = {name: np.zeros(n, dtype="i4") for name in SHARD_INDEX}
    for c in shard.chunks(run):
        sl = slice(offsets[c.index], offsets[c.index] + c.size)
        index["model_index"][sl] = c.model
        index["alpha_index"][sl] = c.alpha
        index["radius_index"][sl] = np.arange(c.radius_start, c.radius_stop)
        index["state_index"][sl] = c.state
    return index


def _write_shard_points(f, run, shard):
    """/shard_points: the shard's points only (see the module docstring)."""
    index = shard_index(run, shard)
    n = len(index["model_index"])
    g = f.create_group("shard_points")
    g.attrs["long_name"] = (f"the points of shard {shard.label}: its chunks one after the other "
                            f"in chunk-table order, radii ascending inside a chunk")
    point = g.create_dataset("point", data=np.arange(n, dtype="i4"))
    point.make_scale("point")
    for name, values in index.items():
        ds = g.create_dataset(name, data=values)
        ds.attrs["long_name"] = f"{name.split('_')[0]} index of the point in the full grid"
        ds.dims[0].attach_scale(point)
    _write_points(g, (n,), {"point": point}, ("point",))


@dataclass
class Contents:
    """What a new store holds beyond "not computed" (a merge, a recovery): point arrays in the
    stored types (full or shard layout), the done mask, invocation and seconds per chunk,
    branch-point arrays (ground state; excited levels) and history entries. Checksums are
    computed when written."""

    points: dict
    done: np.ndarray
    invocation: np.ndarray
    seconds: np.ndarray
    branch: dict
    history: list
    levels: dict = None

    def branch_arrays(self, key):
        return self.branch if len(key) == 2 else self.levels


def empty_contents(run, shard=None):
    """`Contents` with every point and branch point "not computed" (the not-available points
    of a full store marked), to fill in."""
    shape = run.shape if shard is None else (shard_points(run, shard)[1],)
    points = {name: full(shape, kind, fill) for name, (kind, fill, _) in POINT_VARIABLES.items()}
    if shard is None:
        mark_unavailable(points, run)
    n = len(run.chunks())
    bshape = (len(run.models), len(run.alphas))
    return Contents(points=points, done=np.zeros(n, dtype=bool), invocation=np.zeros(n, dtype="<i4"),
                    seconds=np.full(n, np.nan), history=[],
                    branch={name: full(bshape, kind, fill) for name, (kind, fill, _) in BRANCH_VARIABLES.items()},
                    levels={name: full(level_shape(run), kind, fill)
                            for name, (kind, fill, _) in BRANCH_VARIABLES.items()})


def _write_contents(f, run, shard, contents):
    group = f if shard is None else f["shard_points"]
    for name in POINT_VARIABLES:
        group[name][...] = contents.points[name]
    g = f["progress"]
    offsets = shard_points(run, shard)[0] if shard is not None else None
    checksum = np.zeros(len(contents.done), dtype="<u8")
    for c in run.chunks():
        if contents.done[c.index]:
            checksum[c.index] = chunk_checksum(c.index, chunk_values(contents.points, run, c, offsets),
                                               contents.invocation[c.index], contents.seconds[c.index])
    g["done"][...] = contents.done.astype("u1")
    g["invocation"][...] = contents.invocation
    g["seconds"][...] = contents.seconds
    g["checksum"][...] = checksum
    for group, arrays in (("branch_points", contents.branch), (LEVEL_GROUP, contents.levels)):
        if arrays is None:
            continue
        status = arrays["status"]
        bsum = np.zeros(status.shape, dtype="<u8")
        for key in zip(*np.nonzero(status != NOT_COMPUTED)):
            bsum[key] = key_checksum(key, branch_values(arrays, *key))
        for name in BRANCH_VARIABLES:
            f[group][name][...] = arrays[name]
        f[group]["checksum"][...] = bsum
    write_history(f, contents.history)


def write_history(f, entries):
    """History entries into the slots of a new file: the last HISTORY_SLOTS by invocation."""
    slots = np.zeros(HISTORY_SLOTS, dtype=HISTORY_DTYPE)
    for entry in sorted(entries, key=lambda e: e["invocation"])[-HISTORY_SLOTS:]:
        slots[(entry["invocation"] - 1) % HISTORY_SLOTS] = encode_history_entry(entry, HISTORY_BYTES)
    f["progress/history"][...] = slots


def _seal(f, run, shard):
    """The recovery map and the header checksum: the last writes of a new file."""
    datasets = {}

    def visit(name, obj):
        if isinstance(obj, h5py.Dataset) and name != "recovery/map":
            datasets[name] = [obj.id.get_offset(), obj.dtype.str, list(obj.shape)]

    f.visititems(visit)
    content = {"schema_version": SCHEMA_VERSION, "run_id": run.run_id,
               "shard": None if shard is None else shard.label, "run": run.to_dict(),
               "run_file": str(f.attrs.get("run_file", "")),
               "package_version": str(f.attrs.get("package_version", "")), "datasets": datasets}
    ds = f["recovery/map"]
    ds[()] = np.array(encode_recovery_map(content, ds.dtype.itemsize), dtype=ds.dtype)
    f.attrs["header_checksum"] = header_checksum(f.attrs)


def store_image(run, run_file=None, shard=None, contents=None):
    """The bytes of a new store (built in memory; nothing touches the disk)."""
    models_info = [m.build().describe() for m in run.models]
    with h5py.File(f"tba-image-{uuid.uuid4().hex}.h5", "w", driver="core", backing_store=False,
                   libver=LIBVER) as f:
        _write_layout(f, run, run_file, models_info, shard)
        if contents is not None:
            _write_contents(f, run, shard, contents)
        _seal(f, run, shard)
        f.flush()
        return f.id.get_file_image()


def _size(n):
    for unit in ("bytes", "KB", "MB", "GB"):
        if n < 1000 or unit == "GB":
            return f"{n:.0f} {unit}" if unit == "bytes" else f"{n:.1f} {unit}"
        n /= 1000
    return f"{n:.1f} TB"


def free_space(directory):
    """Bytes available to this user in the file system of ``directory`` (None if unknown)."""
    try:
        st = os.statvfs(directory)
    except OSError:
        return None
    return st.f_bavail * st.f_frsize


def write_atomically(path, image, keep=None):
    """Write ``image`` to ``path``: free space checked first, then a temporary file next to it,
    synced, renamed over ``path``. With ``keep``, an existing file at ``path`` is kept under
    that name. `StoreError` (nothing changed) if the space is missing or a write fails."""
    path = Path(path)
    free = free_space(path.parent)
    if free is not None and free < len(image) + SPACE_MARGIN:
        raise StoreError(f"{path}: needs {_size(len(image) + SPACE_MARGIN)} of disk space and its "
                         f"file system has {_size(free)} free; free some space or write the file "
                         f"elsewhere (--output)")
    tmp = partial_path(path)
    try:
        if tmp.exists():  # ours (this host and pid), left by a dead process of the same pid
            tmp.unlink()
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_CLOEXEC, 0o666)
        try:
            write_all(fd, image, 0)
            os.fsync(fd)
        finally:
            os.close(fd)
        if keep is not None:
            os.rename(path, keep)
        os.replace(tmp, path)
    except OSError as exc:
        raise StoreWriteError(f"{path}: could not be written ({exc.strerror or exc}); "
                              f"nothing was changed") from None
    finally:
        try:
            tmp.unlink()
        except FileNotFoundError:
            pass
    try:  # the rename itself on disk
        dfd = os.open(path.parent, os.O_RDONLY)
        try:
            os.fsync(dfd)
        finally:
            os.close(dfd)
    except OSError:
        pass


def write_all(fd, data, offset):
    """``os.pwrite`` until every byte of ``data`` is written at ``offset``."""
    view = memoryview(data)
    while view:
        n = os.pwrite(fd, view, offset)
        view, offset = view[n:], offset + n


def create_store(path, run, run_file=None, shard=None, contents=None, keep=None):
    """Write a new store with every point 'not computed' (the shard layout with ``shard``; the
    values of ``contents``, a `Contents`, if given), atomically: an existing file at ``path``
    is replaced (or kept as ``keep``). Call it holding the lock of ``path``."""
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StoreError(f"{path}: cannot create its directory ({exc.strerror})") from None
    write_atomically(path, store_image(run, run_file, shard, contents), keep=keep)


# -- reading and validation ---------------------------------------------------------------------

@dataclass
class Snapshot:
    """A store as read and validated (`load`): arrays in the stored types, consistent with
    the done mask (points of chunks not done are "not computed").

    ``points`` are full (model, alpha, radius, state) arrays, or /shard_points arrays for a
    shard (``shard``); ``done`` is the mask of chunks whose values are stored and verified;
    ``bad_chunks`` / ``bad_branch`` list what is marked stored but fails its checksum
    (``bad_branch``: keys (m, a) of /branch_points, (m, a, s) of /level_branch_points);
    ``levels`` holds the /level_branch_points arrays (model, alpha, state);
    ``offsets`` maps data-set names to (byte offset, dtype, shape) for in-place writes
    (schema 4 only)."""

    path: Path
    version: int
    attrs: dict
    run: RunSpec
    shard: Shard | None
    points: dict
    progress: dict
    branch: dict
    history: list
    invocations: int
    done: np.ndarray
    bad_chunks: list = field(default_factory=list)
    bad_branch: list = field(default_factory=list)
    offsets: dict = field(default_factory=dict)
    levels: dict = field(default_factory=dict)

    def branch_arrays(self, key):
        return self.branch if len(key) == 2 else self.levels


def _hdf5_signature(path):
    """True if ``path`` has the HDF5 signature where HDF5 looks for it (0, 512, 1024, ...)."""
    try:
        size = os.path.getsize(path)
        with open(path, "rb") as fh:
            at = 0
            while at < size:
                fh.seek(at)
                if fh.read(8) == b"\x89HDF\r\n\x1a\n":
                    return True
                at = 512 if at == 0 else 2 * at
    except OSError:
        pass
    return False


def _has_recovery_map(path):
    """True if the raw bytes of ``path`` hold the magic number of a recovery map."""
    import mmap

    try:
        with open(path, "rb") as fh, mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ) as buffer:
            return buffer.find(RECOVERY_MAGIC) >= 0
    except (OSError, ValueError):
        return False


def _first_line(exc):
    text = str(exc).strip().splitlines()
    line = text[0] if text else type(exc).__name__
    for noise in ("Unable to synchronously ", "Unable to "):
        line = line.replace(noise, "")
    return line[:160]


def open_hdf5(path):
    """Open ``path`` read-only for a reader (no HDF5 file locking: the writer never changes
    the HDF5 structure of a store). One-line `StoreError` if it is not an HDF5 file,
    `DamagedStore` if it is one that HDF5 cannot open."""
    path = Path(path)
    if not path.exists():
        raise StoreError(f"{path}: no such file")
    if path.is_dir():
        raise StoreError(f"{path}: is a directory")
    try:
        try:
            return h5py.File(path, "r", locking=False)
        except OSError as exc:
            if "file locking" not in str(exc):
                raise
            # open in this process already, with HDF5's file locking (h5py's default): HDF5
            # shares one handle per file and wants the same setting
            return h5py.File(path, "r")
    except OSError as exc:
        if isinstance(exc, PermissionError):
            raise StoreError(f"{path}: cannot be read (permission denied)") from None
        if _hdf5_signature(path):
            raise DamagedStore(f"{path}: damaged HDF5 file ({_first_line(exc)})") from None
        if _has_recovery_map(path):
            raise DamagedStore(f"{path}: damaged HDF5 file (no HDF5 signature left)") from None
        raise StoreError(f"{path}: not an HDF5 file", foreign=True) from None


#: what h5py raises when a file's structure is damaged in ways its open did not notice
_READ_ERRORS = (OSError, KeyError, ValueError, TypeError, RuntimeError, IndexError, AttributeError,
                UnicodeDecodeError)


def _attr(f, name):
    v = f.attrs.get(name)
    return v.decode("utf-8", "replace") if isinstance(v, bytes) else v


def load(path, verify=True):
    """Read and validate the store at ``path`` (any `READABLE_VERSIONS`): a `Snapshot`.

    Refuses with one line (`StoreError`, naming the file and the problem): files that are
    not HDF5 or not tba-flow scans, unknown schema versions, a run attribute that is not a
    run, missing data sets or data sets of the wrong shape or type, coordinates or a chunk
    table that do not match the run. `DamagedStore`: HDF5 cannot read the structure, or (schema
    4) the root attributes fail their checksum, or a chunk marked done holds values no solve
    gives (an unknown status, "converged" without a finite energy). Chunks marked done whose
    values fail their checksum are listed in ``bad_chunks`` (not refused here). ``verify``
    False reads what is there, neither checksums nor values checked."""
    path = Path(path)
    f = open_hdf5(path)
    with f:
        try:
            return _load(path, f, verify)
        except StoreError:
            raise
        except _READ_ERRORS as exc:
            raise DamagedStore(f"{path}: damaged HDF5 file ({_first_line(exc)})") from None


def _require(path, f, name, shape, kinds, exact=None):
    """Data set ``name`` of ``shape`` whose dtype kind is one of ``kinds`` (and equal to
    ``exact`` when given); its values."""
    if name not in f:
        raise StoreError(f"{path}: data set /{name} is missing (not a complete tba-flow store)",
                         foreign=True)
    ds = f[name]
    if not isinstance(ds, h5py.Dataset):
        raise StoreError(f"{path}: /{name} is not a data set", foreign=True)
    if tuple(ds.shape) != tuple(shape):
        raise StoreError(f"{path}: data set /{name} has shape {tuple(ds.shape)}, its run needs "
                         f"{tuple(shape)}", foreign=True)
    if ds.dtype.kind not in kinds or (exact is not None and ds.dtype != exact):
        raise StoreError(f"{path}: data set /{name} has type {ds.dtype}, expected "
                         f"{exact or kinds}", foreign=True)
    return ds


def _kinds(kind):
    return "S" if kind == "str" else STORED[kind].kind


def _load(path, f, verify):
    schema = _attr(f, "schema")
    if schema not in (SCHEMA, SHARD_SCHEMA):
        raise StoreError(f"{path}: not a tba-flow scan file", foreign=True)
    try:
        version = int(f.attrs.get("schema_version", -1))
    except (TypeError, ValueError):
        version = -1
    if version not in READABLE_VERSIONS:
        raise StoreError(f"{path}: schema version {version}; this tba reads "
                         f"{', '.join(map(str, READABLE_VERSIONS))}", foreign=True)
    if version >= 4 and _attr(f, "header_checksum") != header_checksum(f.attrs):
        raise DamagedStore(f"{path}: damaged (its root attributes fail their checksum)")
    attrs = {k: (v.decode("utf-8", "replace") if isinstance(v, bytes) else v) for k, v in f.attrs.items()}
    try:
        run_dict = json.loads(attrs["run"])
        run = resolve_run(run_dict, name=run_dict.get("name", "run"))
    except KeyError:
        raise StoreError(f"{path}: has no run attribute (not a complete tba-flow store)",
                         foreign=True) from None
    except (ValueError, AttributeError, TypeError) as exc:  # JSON, or RunFileError
        what = "not a valid run" if isinstance(exc, RunFileError) else "not valid JSON"
        raise StoreError(f"{path}: its run attribute is {what} ({_first_line(exc)})",
                         foreign=True) from None
    if version >= 4 and attrs.get("run_id") != run.run_id:
        raise DamagedStore(f"{path}: damaged (its run_id does not match its run)")
    shard = _shard_of(f, path)
    _check_coordinates(path, f, run)
    exact = version >= 4  # schema 4 is written in place: exact little-endian types
    chunks = run.chunks()
    n = len(chunks)
    names = (*PROGRESS_FIELDS, "done", "invocation", "seconds") + (("owned",) if shard else ()) \
        + (("checksum",) if version >= 4 else ())
    kinds = {"seconds": ("f", "f8"), "checksum": ("u", "u8"), "done": ("u", "u1"),
             "owned": ("u", "u1")}
    progress = {}
    for name in names:
        k, stored = kinds.get(name, ("i", "i4"))
        progress[name] = _require(path, f, f"progress/{name}", (n,), k,
                                  STORED[stored] if exact else None)[...]
    table = np.stack([progress[name] for name in PROGRESS_FIELDS], axis=1)
    expected = np.array([[c.model, c.alpha, c.state, c.radius_start, c.radius_stop] for c in chunks],
                        dtype=table.dtype).reshape(table.shape)
    if not np.array_equal(table, expected):
        raise StoreError(f"{path}: its chunk table does not match its run", foreign=True)
    if shard is not None and not np.array_equal(progress["owned"].astype(bool),
                                                [shard.owns(c) for c in chunks]):
        raise StoreError(f"{path}: its /progress/owned mask does not match shard {shard.label}",
                         foreign=True)
    done_flags = progress["done"]
    if not np.isin(done_flags, (0, 1)).all():
        raise DamagedStore(f"{path}: damaged (/progress/done holds values other than 0 and 1)")
    offsets = shard_points(run, shard)[0] if shard is not None else None
    mine = chunks if shard is None else shard.chunks(run)
    stray = done_flags.astype(bool) & ~np.isin(np.arange(n), [c.index for c in mine])
    if stray.any():
        raise DamagedStore(f"{path}: damaged (chunk {int(np.flatnonzero(stray)[0])} is marked done "
                           f"but does not belong to shard {shard.label})")
    # the points, read after the done mask: a chunk marked done has its values already
    if shard is None:
        group, shape = f, run.shape
    else:
        group, shape = f["shard_points"], (shard_points(run, shard)[1],)
        index = shard_index(run, shard)
        for name in SHARD_INDEX:
            if not np.array_equal(_require(path, group, name, shape, "i")[...], index[name]):
                raise StoreError(f"{path}: /shard_points/{name} does not match shard {shard.label}",
                                 foreign=True)
    points = {}
    for name, (kind, fill, _) in POINT_VARIABLES.items():
        if name == "momentum" and version < 3:
            points[name] = full(shape, kind, fill)
            continue
        ds = _require(path, group, name, shape, _kinds(kind), STORED[kind] if exact else None)
        if kind == "str" and ds.dtype.itemsize != MESSAGE_BYTES:
            raise StoreError(f"{path}: data set /{ds.name.lstrip('/')} holds strings of "
                             f"{ds.dtype.itemsize} bytes, expected {MESSAGE_BYTES}", foreign=True)
        points[name] = ds[...].astype(STORED[kind], copy=False)
    bshape = (len(run.models), len(run.alphas))
    branch = {}
    # the status first, then the values and the checksum: a writer puts the status last, so
    # an entry read as found has its values already
    for name, (kind, fill, _) in _status_first(BRANCH_VARIABLES):
        if version < 2:  # schema 1: the group was reserved, empty
            branch[name] = full(bshape, kind, fill)
            continue
        ds = _require(path, f, f"branch_points/{name}", bshape, _kinds(kind),
                      STORED[kind] if exact else None)
        branch[name] = ds[...].astype(STORED[kind], copy=False)
    bsum = (_require(path, f, "branch_points/checksum", bshape, "u", STORED["u8"])[...]
            if version >= 4 else None)
    lshape = level_shape(run)
    levels, lsum = {}, None
    for name, (kind, fill, _) in _status_first(BRANCH_VARIABLES):
        if version < 5:  # before schema 5: no excited-level branch points
            levels[name] = full(lshape, kind, fill)
            continue
        ds = _require(path, f, f"{LEVEL_GROUP}/{name}", lshape, _kinds(kind), STORED[kind])
        levels[name] = ds[...].astype(STORED[kind], copy=False)
    branch = {name: branch[name] for name in BRANCH_VARIABLES}
    levels = {name: levels[name] for name in BRANCH_VARIABLES}
    if version >= 5:
        lsum = _require(path, f, f"{LEVEL_GROUP}/checksum", lshape, "u", STORED["u8"])[...]
    history, invocations = _history(path, f, version)
    snap = Snapshot(path=path, version=version, attrs=attrs, run=run, shard=shard, points=points,
                    progress=progress, branch=branch, history=history, invocations=invocations,
                    done=done_flags.astype(bool), levels=levels)
    if version >= 4:
        snap.offsets = _offsets(path, f)
        if verify:
            _verify(snap, mine, offsets, bsum, lsum)
    if verify:
        _check_values(snap, mine, offsets)
    _consistent(snap, offsets)
    return snap


def _status_first(variables):
    """The items of ``variables`` with "status" first (the order a reader reads them in)."""
    return sorted(variables.items(), key=lambda item: item[0] != "status")


def _shard_of(f, path=None):
    """The `Shard` a file is (None for a full store)."""
    if _attr(f, "schema") != SHARD_SCHEMA:
        return None
    try:
        return Shard(int(f.attrs["shard_index"]), int(f.attrs["shard_count"]))
    except (KeyError, TypeError, ValueError):
        raise StoreError(f"{path}: a shard file without a valid shard_index and shard_count",
                         foreign=True) from None


def _check_coordinates(path, f, run):
    """The coordinates are those of the run (exported numbers come from them)."""
    strings = lambda ds: [s.decode("utf-8", "replace") if isinstance(s, bytes) else s  # noqa: E731
                          for s in ds[...].tolist()]
    expected = {
        "model": [m.label for m in run.models], "alpha": list(run.alphas),
        "radius": list(run.radii), "state": list(run.states),
        "model_name": [m.name for m in run.models],
        "model_coupling": [math.nan if m.coupling is None else m.coupling for m in run.models],
    }
    for name, values in expected.items():
        kinds = "f" if name in ("alpha", "radius", "model_coupling") else "SO"
        ds = _require(path, f, name, (len(values),), kinds)
        found = ds[...].tolist() if "f" in kinds else strings(ds)
        same = all(a == b or (isinstance(a, float) and math.isnan(a) and math.isnan(b))
                   for a, b in zip(found, values))
        if not same:
            raise StoreError(f"{path}: its /{name} coordinate does not match its run "
                             f"(damaged or edited)", foreign=True)


def _history(path, f, version):
    """(entries, number of invocations) of a file: the slots of schema 4, the /progress
    attribute of older schemas. An entry whose slot fails its checksum is replaced by one that
    says so; a damaged slot that held no entry (invocation numbers run 1, 2, ... and fill the
    slots in turn) is left out."""
    if version < 4:
        try:
            entries = json.loads(f["progress"].attrs["history"])
        except (KeyError, ValueError):
            raise StoreError(f"{path}: its /progress history attribute is missing or not JSON",
                             foreign=True) from None
        return entries, max((int(e.get("invocation", 0)) for e in entries), default=0)
    slots = _require(path, f, "progress/history", (HISTORY_SLOTS,), "S", HISTORY_DTYPE)[...]
    entries, damaged = [], []
    for k, raw in enumerate(slots):
        try:
            entry = decode_history_entry(raw)
        except ValueError:
            damaged.append(k)
            continue
        if entry is not None:
            entries.append(entry)
    last = max((e["invocation"] for e in entries), default=0)
    for k in damaged:
        invocation = last - (last - (k + 1)) % HISTORY_SLOTS  # the latest one in slot k
        if 1 <= invocation <= last:
            entries.append({"invocation": invocation, "damaged": "this history entry fails its "
                                                                  "checksum"})
    entries.sort(key=lambda e: e["invocation"])
    return entries, last


def _offsets(path, f):
    """{data-set name: (byte offset, dtype, shape)} of the data sets written in place."""
    out = {}

    def visit(name, obj):
        if isinstance(obj, h5py.Dataset) and obj.dtype.kind in "fiuS" and obj.size:
            offset = obj.id.get_offset()
            if offset is None:  # not contiguous, or never allocated: rewritten by another tool
                raise StoreError(f"{path}: data set /{name} is not stored contiguously (rewritten "
                                 f"by another tool?); tba cannot write it in place", foreign=True)
            out[name] = (offset, obj.dtype, tuple(obj.shape))

    f.visititems(visit)
    return out


def _verify(snap, mine, offsets, bsum, lsum=None):
    """Checksums of the chunks and branch points marked stored: the failing ones into
    ``bad_chunks`` / ``bad_branch`` (and out of the done mask)."""
    run, progress = snap.run, snap.progress
    for c in mine:
        # the done flag is a chunk's last write: a chunk not marked done whose checksum (its
        # second-to-last write) verifies its values is complete (a kill between the two, or a
        # flipped bit in the flag, loses nothing); before the checksum it is 0 or the old one
        if not snap.done[c.index] and int(progress["checksum"][c.index]) != 0:
            found = chunk_checksum(c.index, chunk_values(snap.points, run, c, offsets),
                                   progress["invocation"][c.index], progress["seconds"][c.index])
            snap.done[c.index] = found == int(progress["checksum"][c.index])
    for c in mine:
        if snap.done[c.index]:
            found = chunk_checksum(c.index, chunk_values(snap.points, run, c, offsets),
                                   progress["invocation"][c.index], progress["seconds"][c.index])
            if found != int(progress["checksum"][c.index]):
                snap.bad_chunks.append(c.index)
    snap.done[snap.bad_chunks] = False
    for arrays, sums in ((snap.branch, bsum), (snap.levels, lsum)):
        if sums is None:
            continue
        for key in zip(*np.nonzero(arrays["status"] != NOT_COMPUTED)):
            if key_checksum(key, branch_values(arrays, *key)) != int(sums[key]):
                snap.bad_branch.append(tuple(int(i) for i in key))


_POINT_CODES = set(STATUS_MEANINGS) - {NOT_COMPUTED, NOT_AVAILABLE}


def _check_values(snap, mine, offsets):
    """What a chunk marked done must hold: statuses and flow statuses of known codes, and a
    finite energy with a finite error estimate >= 0 at every converged point (so that no
    reader ever shows "converged" without a number)."""
    converged = [c for c, (name, _) in STATUS_MEANINGS.items() if name == "converged"][0]
    bad = set(snap.bad_chunks)
    for c in mine:
        if not snap.done[c.index] or c.index in bad:
            continue
        v = chunk_values(snap.points, snap.run, c, offsets)
        ok = v["status"] == converged
        problem = None
        if not set(np.unique(v["status"]).tolist()) <= _POINT_CODES:
            problem = "a point status that is not a known code"
        elif not set(np.unique(v["flow_status"]).tolist()) <= set(FLOW_MEANINGS):
            problem = "a flow status that is not a known code"
        elif not (np.isfinite(v["energy"][ok]).all() and np.isfinite(v["error"][ok]).all()
                  and (v["error"][ok] >= 0).all()):
            problem = "a converged point without a finite energy and error estimate"
        if problem:
            raise DamagedStore(f"{snap.path}: {describe_chunk(snap.run, c)} holds {problem} "
                               f"(damaged or edited)")
    codes = set(BRANCH_MEANINGS)
    for group, arrays in (("branch_points", snap.branch), (LEVEL_GROUP, snap.levels)):
        found = arrays["status"]
        if not set(np.unique(found).tolist()) <= codes:
            raise DamagedStore(f"{snap.path}: /{group}/status holds a value that is not a known code")
        ok = found == BP_FOUND
        if not (np.isfinite(arrays["branch_radius"][ok]).all()
                and np.isfinite(arrays["energy"][ok]).all()):
            raise DamagedStore(f"{snap.path}: a branch point marked found in /{group} has no "
                               f"finite R_c and energy")


def _consistent(snap, offsets):
    """Points of chunks that are not done (or failed their checksum) read as not computed,
    whatever bytes a writer may have put there already; so do branch points that fail
    their checksum or whose status (read before their values) says not computed."""
    run = snap.run
    mine = run.chunks() if snap.shard is None else snap.shard.chunks(run)
    for c in mine:
        if not snap.done[c.index]:
            sl = chunk_slice(run, c, offsets)
            for name, (kind, fill, _) in POINT_VARIABLES.items():
                snap.points[name][sl] = full((), kind, fill)
    for key in snap.bad_branch:
        for name, (kind, fill, _) in BRANCH_VARIABLES.items():
            snap.branch_arrays(key)[name][key] = full((), kind, fill)
    for arrays in (snap.branch, snap.levels):  # read as not computed: values not yet marked
        pending = arrays["status"] == NOT_COMPUTED
        if pending.any():
            for name, (kind, fill, _) in BRANCH_VARIABLES.items():
                arrays[name][pending] = full((), kind, fill)


def load_settled(path, verify=True):
    """`load`, read again while a writer holds the lock of ``path`` and the file looks
    damaged or fails checksums (a writer at work may be half-way through a chunk)."""
    for attempt in range(READ_RETRIES + 1):
        try:
            snap = load(path, verify)
        except DamagedStore:
            if attempt == READ_RETRIES or holder(path) is None:
                raise
        else:
            if not (snap.bad_chunks or snap.bad_branch) or attempt == READ_RETRIES \
                    or holder(path) is None:
                return snap
        time.sleep(READ_RETRY_DELAY)
    raise AssertionError("unreachable")


def damage_message(snap):
    """One line for a store whose chunks (or branch points) fail their checksums."""
    path, run = snap.path, snap.run
    what = []
    if snap.bad_chunks:
        c = run.chunks()[snap.bad_chunks[0]]
        more = f" (and {len(snap.bad_chunks) - 1} more chunks)" if len(snap.bad_chunks) > 1 else ""
        what.append(f"{describe_chunk(run, c)}{more}")
    if snap.bad_branch:
        more = f" (and {len(snap.bad_branch) - 1} more)" if len(snap.bad_branch) > 1 else ""
        what.append(f"{describe_branch(run, snap.bad_branch[0])}{more}")
    run_file = snap.attrs.get("run_file") or "RUNFILE"
    shard = f" --shard {snap.shard.label}" if snap.shard is not None else ""
    return (f"{path}: {' and '.join(what)} fails its checksum (the file is damaged there); "
            f"tba run {run_file}{shard} --output {path} recomputes it")


def check_store(path, run, shard=None):
    """Read-only check that ``path`` is a store of the same run (and of this schema version:
    files of other versions are refused), and the same shard of it (None: a full store).
    Returns its `Snapshot`, whose done mask leaves out the chunks that fail their checksum
    (``bad_chunks``: to compute again)."""
    try:
        snap = load_settled(path)
    except DamagedStore:
        raise
    except StoreError as exc:
        if not exc.foreign or "--force" in str(exc):
            raise
        raise StoreError(f"{exc}; refusing to overwrite it (use --force to replace it, or --output)",
                         foreign=True) from None
    found = snap.shard
    if found != shard:
        hint = ("merge the shards with tba merge, or resume it with --shard "
                f"{found.label}" if found is not None and shard is None else
                "use --output for another file, or --force to replace it")
        raise StoreError(f"{path}: is {_shard_words(found)} of a run, not "
                         f"{_shard_words(shard)}; {hint}", foreign=True)
    if snap.version != SCHEMA_VERSION:
        raise StoreError(f"{path}: schema version {snap.version}, this tba writes "
                         f"{SCHEMA_VERSION} and cannot resume it; use --force to replace it, "
                         f"or --output", foreign=True)
    if snap.attrs.get("run_id") != run.run_id:
        keys = differing_keys(snap.run.to_dict(), run.to_dict()) or ["run_id"]
        raise StoreError(f"{path}: written by a different run (differs in: {', '.join(keys)}); "
                         f"refusing to overwrite it (use --force to replace it, or --output)", foreign=True)
    stored = snap.attrs.get("package_version")
    if stored != package_version():
        raise StoreError(f"{path}: written by tba {stored}, this is tba {package_version()}; "
                         f"resuming would mix versions (use --force to start again, or --output)",
                         foreign=True)
    return snap


def _shard_words(shard):
    return "a full store" if shard is None else f"shard {shard.label}"


# -- reading for reports, plots, exports --------------------------------------------------------

@dataclass
class StoreData:
    """A store read into memory (plain numpy arrays), for reports, plots and exports."""

    path: Path
    attrs: dict
    run: RunSpec
    model: list
    model_name: list
    model_coupling: list
    alpha: np.ndarray
    radius: np.ndarray
    state: list
    data: dict = field(default_factory=dict)
    progress: dict = field(default_factory=dict)
    #: the retained history entries (the last HISTORY_SLOTS of schema 4), oldest first
    history: list = field(default_factory=list)
    #: /branch_points arrays (model, alpha), names of `BRANCH_VARIABLES` (schema 1: not computed)
    branch: dict = field(default_factory=dict)
    schema_version: int = SCHEMA_VERSION
    #: /level_branch_points arrays (model, alpha, state): the excited levels' branch points
    #: (before schema 5: not computed; see `has_level_branch_points`)
    levels: dict = field(default_factory=dict)
    #: the `tba.scans.runfile.Shard` of a shard file (its points only; the rest "not computed")
    shard: Shard | None = None
    #: invocations recorded in all (more than ``len(history)`` once old entries were dropped)
    invocations: int = 0

    def __getitem__(self, name):
        return self.data[name]

    @property
    def has_level_branch_points(self):
        """The file has /level_branch_points (schema 5 on); older ones only a bracket."""
        return self.schema_version >= 5

    @property
    def n_chunks(self):
        return len(self.progress["done"])

    @property
    def complete(self):
        """Every chunk of the run is done (never for a shard of N > 1)."""
        return bool(np.all(self.progress["done"]))

    @property
    def owned(self):
        """Mask of the chunks this file is responsible for (all of them in a full store)."""
        return self.progress.get("owned", np.ones(self.n_chunks, dtype="u1")).astype(bool)

    def records(self, include_not_computed=False, deprecated=True, flow=False):
        """One dict per point with the keys of ``tba solve --json`` plus ``state``
        (``deprecated``: with the earlier key ``couplings`` beside ``cdd_couplings``;
        ``flow``: also the stored flow check `FLOW_RECORD_KEYS`, None where not computed and
        ``flow_status`` by its name, as in /flow_status's legend)."""
        st = self.data["status"]
        names = {code: name for code, (name, _) in STATUS_MEANINGS.items()}
        flow_names = {code: name for code, (name, _) in FLOW_MEANINGS.items()}
        for m in range(len(self.model)):
            for a, alpha in enumerate(self.alpha):
                deformation = self.run.deformation(float(alpha), m)
                cdd = {str(k): float(v) for k, v in deformation.couplings.items()}
                factors = ({k: deformation.describe()[k] for k in ("factors", "sign")}
                           if deformation.has_poles else None)
                for r, R in enumerate(self.radius):
                    for s, state in enumerate(self.state):
                        i = (m, a, r, s)
                        code = int(st[i])
                        if code in (NOT_COMPUTED, NOT_AVAILABLE) and not include_not_computed:
                            continue
                        ok = names.get(code) == "converged"
                        extra = {} if factors is None else {"cdd_factors": factors}  # as tba solve
                        rec = {
                            "model": self.model_name[m],
                            "coupling": _model_coupling(self.model_coupling[m]),
                            "radius": float(R),
                            "alpha": float(alpha),
                            "cdd_couplings": dict(cdd),
                            "energy": float(self.data["energy"][i]) if ok else None,
                            "error": float(self.data["error"][i]) if ok else None,
                            "momentum": float(self.data["momentum"][i]) if ok else None,
                            "status": names.get(code, str(code)),
                            "iterations": int(self.data["iterations"][i]),
                            "message": self.data["message"][i],
                            "state": state,
                            **extra,
                        }
                        if flow:  # a prediction only from a converged undeformed solve
                            code = int(self.data["flow_status"][i])
                            checked = flow_names.get(code) == "converged"
                            rec["flow_radius"] = _finite(self.data["flow_radius"][i])
                            for key in ("flow_prediction", "flow_error", "flow_residual"):
                                rec[key] = _finite(self.data[key][i]) if checked else None
                            rec["flow_status"] = flow_names.get(code, str(code))
                        if deprecated:
                            rec["couplings"] = dict(cdd)
                        yield rec

    def branch_records(self, include_not_computed=False):
        """One dict per stored branch point: the ground state's of /branch_points per
        (model, alpha), then the excited levels' of /level_branch_points per (model, alpha,
        state), with the keys `BRANCH_RECORD_KEYS` (those of ``tba branch-point --json``
        without the derived ``hagedorn_temperature``); values None unless found, ``status``
        by its name. Not computed ones (always the "ground" column of the levels, every level
        before schema 5) are left out unless ``include_not_computed``."""
        names = {code: name for code, (name, _) in BRANCH_MEANINGS.items()}
        keyed = []
        if self.branch:
            keyed += [(self.branch, (m, a), "ground") for m in range(len(self.model))
                      for a in range(len(self.alpha))]
        if self.levels:
            keyed += [(self.levels, (m, a, s), state) for m in range(len(self.model))
                      for a in range(len(self.alpha)) for s, state in enumerate(self.state)
                      if state != "ground"]
        for arrays, i, state in keyed:
            code = int(arrays["status"][i])
            if code == NOT_COMPUTED and not include_not_computed:
                continue
            # stored name -> record name (`tba.physics.flow.BranchPoint.as_record`)
            values = {f"branch_{name}" if not name.startswith("branch_") else name:
                      _finite(arrays[name][i]) if code == BP_FOUND else None
                      for name in ("branch_radius", "branch_radius_error", "energy",
                                   "energy_error", "effective_radius")}
            m, a = i[0], i[1]
            yield {"model": self.model_name[m], "coupling": _model_coupling(self.model_coupling[m]),
                   "alpha": float(self.alpha[a]), "state": state,
                   "status": names.get(code, str(code)), **values,
                   "message": arrays["message"][i]}


#: the flow-check keys of `StoreData.records` (``flow=True``), in CSV column order
FLOW_RECORD_KEYS = ("flow_radius", "flow_prediction", "flow_error", "flow_residual", "flow_status")
#: the keys of `StoreData.branch_records`, in CSV column order
BRANCH_RECORD_KEYS = ("model", "coupling", "alpha", "state", "status", "branch_radius",
                      "branch_radius_error", "branch_energy", "branch_energy_error",
                      "branch_effective_radius", "message")


def _finite(value):
    """A stored float as a plain float, None for NaN (not computed)."""
    value = float(value)
    return value if math.isfinite(value) else None


def _model_coupling(value):
    """A model's coupling as a plain float, None for none (NaN in the file)."""
    return None if value is None or math.isnan(float(value)) else float(value)


def read_store(path):
    """Read a whole store (any tba-flow scan file of a `READABLE_VERSIONS` schema) into a
    `StoreData`: validated (`load`), checksums verified, consistent with its done mask even
    while `tba run` writes it. One-line `StoreError` for a damaged file (saying what `tba
    run` can recover) or a chunk that fails its checksum (naming it)."""
    path = Path(path)
    try:
        snap = load_settled(path)
    except DamagedStore as exc:
        from tba.store.recovery import salvage  # the raw bytes: only when HDF5 cannot read them

        found = salvage(path)
        if found is None:
            raise
        where = f" --shard {found.shard.label}" if found.shard is not None else ""
        run_file = found.run_file or "RUNFILE"
        raise DamagedStore(f"{exc}; tba run {run_file}{where} --output {path} rebuilds it from the "
                           f"{len(found.chunks)} of {found.marked} stored chunks whose checksums "
                           f"verify", recoverable=len(found.chunks)) from None
    if snap.bad_chunks or snap.bad_branch:
        raise StoreError(damage_message(snap))
    return store_data(snap)


def store_data(snap):
    """The `StoreData` of a `Snapshot` (messages decoded; a shard expanded to full arrays)."""
    run = snap.run
    data = {}
    if snap.shard is None:
        for name, (kind, _, _) in POINT_VARIABLES.items():
            data[name] = _decode(snap.points[name]) if kind == "str" else snap.points[name]
    else:  # the shard's points into full arrays; the other shards' points "not computed"
        where = tuple(shard_index(run, snap.shard)[name] for name in SHARD_INDEX)
        for name, (kind, fill, _) in POINT_VARIABLES.items():
            values = _decode(snap.points[name]) if kind == "str" else snap.points[name]
            arr = np.full(run.shape, fill, dtype=object if kind == "str" else STORED[kind])
            arr[where] = values
            data[name] = arr
        mark_unavailable(data, run)
    branch = {name: _decode(v) if BRANCH_VARIABLES[name][0] == "str" else v
              for name, v in snap.branch.items()}
    levels = {name: _decode(v) if BRANCH_VARIABLES[name][0] == "str" else v
              for name, v in snap.levels.items()}
    progress = dict(snap.progress, done=snap.done.astype("u1"))
    return StoreData(path=snap.path, attrs=snap.attrs, run=run, model=[m.label for m in run.models],
                     model_name=[m.name for m in run.models],
                     model_coupling=[m.coupling for m in run.models],
                     alpha=np.array(run.alphas), radius=np.array(run.radii),
                     state=list(run.states), data=data, progress=progress, history=snap.history,
                     branch=branch, levels=levels, schema_version=snap.version, shard=snap.shard,
                     invocations=snap.invocations)
