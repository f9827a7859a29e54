"""The HDF5 store of a scan: layout, creation, resumable chunk writes, reading back.

Layout (schema version 2; readable with plain h5py, and with xarray through
``xarray.open_dataset(path, engine="h5netcdf")`` or ``engine="netcdf4"``)::

    /                          root attributes: schema, schema_version, package,
                               package_version, git_commit, created, title, run (the
                               resolved run as JSON), run_id, run_file, models (JSON),
                               conventions, units, status_legend, flow_status_legend,
                               branch_point_status_legend, layout
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
    /progress attrs            history (JSON list, one entry per invocation of tba run,
                               written when it starts and when it ends)
    /branch_points/{branch_radius, branch_radius_error, energy, energy_error,
                    effective_radius, status, message}
                               (model, alpha), attached to the /model and /alpha scales: the
                               ground state's branch point R_c(alpha), E(R_c), R~_* and their
                               errors (`tba.physics.flow.branch_point` at the run's tol); status 0
                               found, 1 none (alpha <= 0), 2 not-applicable (higher-spin
                               factors in the run), 3 failed (message: the exception),
                               -1 not computed

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
that a model lacks (set when the file is created). Files of schemas 1 and 2 are still read
(branch points of schema 1 count as not computed, momentum is NaN) but never resumed.

Only the scan driver writes: it creates the file complete with every point "not
computed" (under a temporary name, then renamed), and writes each finished chunk's
values, flushes, sets its ``done`` flag and flushes again. After the last chunk it computes
the branch points (``scan.branch_points``), each written the same way: values, flush,
status, flush; a status other than -1 means stored, and is never computed again. Chunk and
branch-point writes overwrite bytes in place and never change the file's metadata, so a kill
loses at most the chunks (or the branch point) in flight.
"""

import datetime
import json
import math
import os
import platform
import subprocess
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from tba.scans.runfile import RunSpec, Shard, differing_keys, resolve_run
from tba.scans.codes import (  # noqa: F401 (re-exported: the layout of a store)
    NOT_COMPUTED, NOT_AVAILABLE, FLOW_OFF, FLOW_NOT_APPLICABLE, FLOW_NO_ENERGY, BP_FOUND,
    BP_NONE, BP_NOT_APPLICABLE, BP_FAILED, BP_CODES, STATUS_MEANINGS, FLOW_MEANINGS,
    BRANCH_MEANINGS, MESSAGE_BYTES, POINT_VARIABLES, DIMS, BRANCH_VARIABLES, BRANCH_DIMS)

SCHEMA = "tba-flow scan"
#: schema of a shard file (one shard of a run, `tba.scans.runfile.Shard`)
SHARD_SCHEMA = "tba-flow scan shard"
SCHEMA_VERSION = 3
#: schema versions `read_store` understands (only SCHEMA_VERSION is ever resumed)
READABLE_VERSIONS = (1, 2, 3)

CONVENTIONS = """\
Units: the lightest mass m_1 = 1; R is the circumference of the space circle; hbar = c = 1.
energy is the TBA energy E(R, alpha) of the state WITHOUT the bulk term f R; momentum its
total momentum P (R P is 2 pi times an integer). States: "ground", or an excited level named by
its Bethe quantum numbers I_k (m R sinh t_k + sum_j delta(t_k - t_j) = 2 pi I_k at large R;
for Lee-Yang, "0" is its one-particle state).
Deformation: S_ab(t) -> S_ab(t) exp(i alpha m_a m_b sinh t) (phi_ab += alpha m_a m_b cosh t),
higher odd spins s: exp(i alpha_s sinh(s t)) (single-species models).
Then d/dalpha E = E dE/dR + P^2/R. With TTbar alone the deformed level is the undeformed one
at R~ = sqrt((R + alpha E)^2 - (alpha P)^2), boosted: E R~ = (R + alpha E) E_0(R~) + alpha P^2 R / R~
(for P = 0: E(R, alpha) = E_0(R + alpha E, 0)). flow_radius is R~, flow_prediction that
expression with E_0 solved at R~ (the same level undeformed), flow_residual = |energy -
flow_prediction|, flow_error the error estimate of the prediction: the undeformed solve's
times (R + alpha E) / R~, plus for P != 0 |d prediction / dE| times the error of E.
alpha > 0 is the Hagedorn side: below a branch radius R_c there is no real ground state.
/branch_points: R_c(alpha) = R~ - alpha E_0(R~) where E_0'(R~) = 1/alpha (TTbar only);
energy there E(R_c, alpha) = E_0(R~); Hagedorn temperature T_H = 1/R_c.
error estimates |energy - exact| and is meant to bound it; tol is relative."""

UNITS = ("radius, flow_radius, branch_points/{branch_radius, branch_radius_error, "
         "effective_radius}: 1/m_1; "
         "energy, error, flow_prediction, flow_error, flow_residual, "
         "branch_points/{energy, energy_error}: m_1; alpha: 1/m_1^2; m_1 = lightest mass = 1")

LAYOUT = ("data sets (model, alpha, radius, state): energy error momentum status iterations message "
          "flow_radius flow_prediction flow_error flow_residual flow_status; /progress: chunk "
          "table and done mask; /branch_points (model, alpha): branch_radius "
          "branch_radius_error energy energy_error effective_radius status message")

SHARD_LAYOUT = ("shard of a run: /shard_points (point): energy error status iterations message "
                "flow_radius flow_prediction flow_error flow_residual flow_status and "
                "model_index alpha_index radius_index state_index (the point's place in the "
                "full grid); /progress: chunk table, done mask, owned mask; /branch_points "
                "(model, alpha) as in a full store, this shard's pairs only")

#: messages are fixed-length UTF-8 strings (`MESSAGE_BYTES`): writing a chunk only overwrites
#: bytes at fixed places in the file and never changes its metadata (see `Store.write_chunk`)
MESSAGE_DTYPE = h5py.string_dtype("utf-8", MESSAGE_BYTES)

PROGRESS_FIELDS = ("model_index", "alpha_index", "state_index", "radius_start", "radius_stop")
#: index data sets of /shard_points: where each of a shard's points lies in the full grid
SHARD_INDEX = ("model_index", "alpha_index", "radius_index", "state_index")


def shard_points(run, shard):
    """{chunk index: offset of its first point in /shard_points} and the number of points
    of the shard: its chunks one after the other, in chunk-table order."""
    offsets, n = {}, 0
    for c in shard.chunks(run):
        offsets[c.index] = n
        n += c.size
    return offsets, n


class StoreError(Exception):
    """An output file that cannot be used as asked (one line, exit code 2 on the command line).

    ``foreign`` is true when the file exists but belongs to something else (another run,
    schema or package version, or not a store at all): ``force`` would replace it."""

    def __init__(self, message, foreign=False):
        super().__init__(message)
        self.foreign = foreign


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


def _now():
    return datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")


def _legend(meanings):
    return "; ".join(f"{code} {name}: {text}" for code, (name, text) in sorted(meanings.items()))


def _flags(meanings):
    codes = sorted(meanings)
    return {"flag_values": np.array(codes, dtype="i1"),
            "flag_meanings": " ".join(meanings[c][0] for c in codes),
            "legend": _legend(meanings)}


# -- writing ------------------------------------------------------------------------------------

def _encode(text):
    """UTF-8 bytes of at most MESSAGE_BYTES, cut at a character boundary ("..." marks a cut)."""
    raw = str(text).encode("utf-8")
    if len(raw) > MESSAGE_BYTES:
        raw = raw[:MESSAGE_BYTES - 3].decode("utf-8", "ignore").encode("utf-8") + b"..."
    return raw


def _full(shape, kind, fill):
    if kind == "str":
        return np.full(shape, _encode(fill), dtype=MESSAGE_DTYPE)
    return np.full(shape, fill, dtype=kind)


def _as_stored(kind, values):
    if kind == "str":
        return np.array([_encode(v) for v in np.ravel(values)], dtype=MESSAGE_DTYPE).reshape(np.shape(values))
    return np.asarray(values, dtype=kind)


def _write_layout(f, run, run_file, models_info, shard=None):
    s = h5py.string_dtype()  # variable-length: coordinates and fixed metadata only
    f.attrs.update({
        "schema": SCHEMA if shard is None else SHARD_SCHEMA, "schema_version": SCHEMA_VERSION,
        "package": "tba-flow", "package_version": package_version(), "git_commit": git_commit(),
        "created": _now(), "title": run.description or run.name,
        "run": run.to_json(), "run_id": run.run_id, "run_file": str(run_file or ""),
        "models": json.dumps(models_info), "conventions": CONVENTIONS, "units": UNITS,
        "status_legend": _legend(STATUS_MEANINGS), "flow_status_legend": _legend(FLOW_MEANINGS),
        "branch_point_status_legend": _legend(BRANCH_MEANINGS), "layout": LAYOUT,
    })
    if shard is not None:
        f.attrs.update({"shard": shard.label, "shard_index": shard.index, "shard_count": shard.count,
                        "layout": SHARD_LAYOUT})
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
    shape = (len(run.models), len(run.alphas))
    for name, (kind, fill, attrs) in BRANCH_VARIABLES.items():
        ds = bp.create_dataset(name, data=_full(shape, kind, fill))
        ds.attrs.update(attrs)
        if name == "status":
            ds.attrs.update(_flags(BRANCH_MEANINGS))
        for i, dim in enumerate(BRANCH_DIMS):
            ds.dims[i].attach_scale(scales[dim])
    chunks = run.chunks()
    g = f.create_group("progress")
    g.attrs.update({"chunk_size": run.chunk_size, "n_chunks": len(chunks), "history": "[]",
                    "long_name": "scan bookkeeping: chunk table and resume mask"})
    scale = g.create_dataset("chunk", data=np.arange(len(chunks), dtype="i4"))
    scale.make_scale("chunk")
    table = {
        "model_index": [c.model for c in chunks], "alpha_index": [c.alpha for c in chunks],
        "state_index": [c.state for c in chunks], "radius_start": [c.radius_start for c in chunks],
        "radius_stop": [c.radius_stop for c in chunks],
    }
    for name, values in table.items():
        g.create_dataset(name, data=np.array(values, dtype="i4"))
    g.create_dataset("done", data=np.zeros(len(chunks), dtype="u1")).attrs["long_name"] = \
        "1 once the chunk's values are written"
    g.create_dataset("invocation", data=np.zeros(len(chunks), dtype="i4")).attrs["long_name"] = \
        "invocation of tba run that computed the chunk (index into history, from 1; 0: not yet)"
    g.create_dataset("seconds", data=np.full(len(chunks), np.nan)).attrs["long_name"] = \
        "wall time of the chunk in its worker"
    extra = ()
    if shard is not None:
        g.create_dataset("owned", data=np.array([shard.owns(c) for c in chunks], dtype="u1")) \
            .attrs["long_name"] = f"1 for the chunks of this shard ({shard.label})"
        extra = ("owned",)
    for name in (*table, "done", "invocation", "seconds", *extra):
        g[name].dims[0].attach_scale(scale)
        if name in table:
            g[name].attrs["long_name"] = f"chunk table: {name.replace('_', ' ')}"


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
        ds = f.create_dataset(name, data=_full(shape, kind, fill))
        ds.attrs.update(attrs)
        if name == "status":
            ds.attrs.update(_flags(STATUS_MEANINGS))
        elif name == "flow_status":
            ds.attrs.update(_flags(FLOW_MEANINGS))
        for i, dim in enumerate(dims):
            ds.dims[i].attach_scale(scales[dim])


def _write_shard_points(f, run, shard):
    """/shard_points: the shard's points only (see the module docstring)."""
    offsets, n = shard_points(run, shard)
    g = f.create_group("shard_points")
    g.attrs["long_name"] = (f"the points of shard {shard.label}: its chunks one after the other "
                            f"in chunk-table order, radii ascending inside a chunk")
    point = g.create_dataset("point", data=np.arange(n, dtype="i4"))
    point.make_scale("point")
    index = {name: np.zeros(n, dtype="i4") for name in SHARD_INDEX}
    for c in shard.chunks(run):
        sl = slice(offsets[c.index], offsets[c.index] + c.size)
        index["model_index"][sl] = c.model
        index["alpha_index"][sl] = c.alpha
        index["radius_index"][sl] = np.arange(c.radius_start, c.radius_stop)
        index["state_index"][sl] = c.state
    for name, values in index.items():
        ds = g.create_dataset(name, data=values)
        ds.attrs["long_name"] = f"{name.split('_')[0]} index of the point in the full grid"
        ds.dims[0].attach_scale(point)
    _write_points(g, (n,), {"point": point}, ("point",))


class Store:
    """An open store, written by the scan driver only."""

    def __init__(self, path, f, run):
        self.path, self.f, self.run = Path(path), f, run
        self._history = json.loads(f["progress"].attrs["history"])
        self._invocation = None
        self.shard = _shard_of(f)
        self._offsets = shard_points(run, self.shard)[0] if self.shard else None

    @property
    def done(self):
        return self.f["progress/done"][...].astype(bool)

    @property
    def branch_status(self):
        """/branch_points/status (model, alpha); -1 where not computed yet."""
        return self.f["branch_points/status"][...]

    @property
    def history(self):
        return list(self._history)

    def begin_invocation(self, workers, pending, branch_points_pending=0, executor=None):
        entry = {"invocation": len(self._history) + 1, "started": _now(), "finished": None,
                 "package_version": package_version(), "git_commit": git_commit(),
                 "host": platform.node(), "workers": workers, "chunks_pending": pending,
                 "chunks_computed": 0, "branch_points_pending": branch_points_pending,
                 "branch_points_computed": 0}
        if executor is not None:
            entry["executor"] = executor
        if self.shard is not None:
            entry["shard"] = self.shard.label
        self._history.append(entry)
        self._invocation = entry
        self._save_history()
        return entry["invocation"]

    def end_invocation(self, interrupted=False, failed=None):
        if self._invocation is not None:
            self._invocation["finished"] = _now()
            if interrupted:
                self._invocation["interrupted"] = True
            if failed:
                self._invocation["failed"] = list(failed)
            self._save_history()

    def _save_history(self):
        self.f["progress"].attrs["history"] = json.dumps(self._history)
        self.f.flush()

    def write_chunk(self, chunk, values, seconds):
        """Write one finished chunk (arrays over its radii, ascending), flush, then mark it done
        and flush again.

        Every data set has a fixed size and type and was allocated when the file was created,
        so this overwrites bytes in place and leaves the file's metadata alone: a kill at any
        moment leaves a readable file in which this chunk is either done or not.
        """
        if self.shard is None:
            group = self.f
            sl = (chunk.model, chunk.alpha, slice(chunk.radius_start, chunk.radius_stop), chunk.state)
        else:
            if chunk.index not in self._offsets:
                raise ValueError(f"chunk {chunk.index} does not belong to shard {self.shard.label}")
            group = self.f["shard_points"]
            sl = slice(self._offsets[chunk.index], self._offsets[chunk.index] + chunk.size)
        for name, (kind, _, _) in POINT_VARIABLES.items():
            group[name][sl] = _as_stored(kind, values[name])
        g = self.f["progress"]
        g["invocation"][chunk.index] = self._invocation["invocation"] if self._invocation else 0
        g["seconds"][chunk.index] = seconds
        self.f.flush()
        g["done"][chunk.index] = 1
        self.f.flush()
        if self._invocation is not None:
            self._invocation["chunks_computed"] += 1  # saved with the history at the end

    def write_branch_point(self, model, alpha, values):
        """Write the branch point of (model index, alpha index): ``values`` maps the names of
        `BRANCH_VARIABLES` to scalars. Values first, flush, then the status (which marks it
        stored), flush: in place, like `write_chunk`."""
        g = self.f["branch_points"]
        for name, (kind, fill, _) in BRANCH_VARIABLES.items():
            if name != "status":
                g[name][model, alpha] = _as_stored(kind, values.get(name, fill))
        self.f.flush()
        g["status"][model, alpha] = values["status"]
        self.f.flush()
        if self._invocation is not None:
            self._invocation["branch_points_computed"] += 1

    def close(self):
        if self.f:
            self.f.close()
            self.f = None


def _open(path, mode):
    try:
        return h5py.File(path, mode)
    except OSError as exc:
        text = str(exc)
        if "lock" in text:
            raise StoreError(f"{path}: in use by another process (another tba run?)") from None
        raise StoreError(f"{path}: not a readable HDF5 file ({text.splitlines()[0]}); "
                         f"refusing to touch it (use --force to replace it)", foreign=True) from None


def create_store(path, run, run_file=None, shard=None, fill=None):
    """Write a new store with every point 'not computed' (atomically: temporary file, rename;
    an existing file at ``path`` is replaced). With ``shard`` (a `tba.scans.runfile.Shard`), the
    shard layout. ``fill(f)``, if given, writes into the new file before it is renamed (the
    merge uses it, so that a merged file appears complete or not at all)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    models_info = [m.build().describe() for m in run.models]
    tmp = path.with_name(f".{path.name}.partial-{os.getpid()}")
    try:
        with h5py.File(tmp, "w") as f:
            _write_layout(f, run, run_file, models_info, shard)
            if fill is not None:
                fill(f)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def _shard_of(f):
    """The `Shard` a file is (None for a full store)."""
    if f.attrs.get("schema") != SHARD_SCHEMA:
        return None
    return Shard(int(f.attrs["shard_index"]), int(f.attrs["shard_count"]))


def _shard_words(shard):
    return "a full store" if shard is None else f"shard {shard.label}"


def check_store(path, run, shard=None):
    """Read-only check that ``path`` is a store of the same run (and of this schema version:
    files of other versions are refused), and the same shard of it (None: a full store).
    Returns (done mask, git commit, branch-point status array (model, alpha))."""
    with _open(path, "r") as f:
        if f.attrs.get("schema") in (SCHEMA, SHARD_SCHEMA):
            found = _shard_of(f)
            if found != shard:
                hint = ("merge the shards with tba merge, or resume it with --shard "
                        f"{found.label}" if found is not None and shard is None else
                        "use --out for another file, or --force to replace it")
                raise StoreError(f"{path}: is {_shard_words(found)} of a run, not "
                                 f"{_shard_words(shard)}; {hint}", foreign=True)
        if f.attrs.get("schema") not in (SCHEMA, SHARD_SCHEMA):
            raise StoreError(f"{path}: exists and is not a tba-flow scan file; refusing to "
                             f"overwrite it (use --force to replace it, or --out)", foreign=True)
        version = int(f.attrs.get("schema_version", -1))
        if version != SCHEMA_VERSION:
            raise StoreError(f"{path}: schema version {version}, this tba writes "
                             f"{SCHEMA_VERSION} and cannot resume it; use --force to replace it, "
                             f"or --out", foreign=True)
        if f.attrs.get("run_id") != run.run_id:
            old = json.loads(f.attrs["run"])
            keys = differing_keys(old, run.to_dict()) or ["run_id"]
            raise StoreError(f"{path}: written by a different run (differs in: {', '.join(keys)}); "
                             f"refusing to overwrite it (use --force to replace it, or --out)", foreign=True)
        stored = f.attrs.get("package_version")
        if stored != package_version():
            raise StoreError(f"{path}: written by tba {stored}, this is tba {package_version()}; "
                             f"resuming would mix versions (use --force to start again, or --out)", foreign=True)
        g = f["progress"]
        table = np.stack([g[name][...] for name in PROGRESS_FIELDS], axis=1)
        expected = np.array([[c.model, c.alpha, c.state, c.radius_start, c.radius_stop]
                             for c in run.chunks()], dtype=table.dtype).reshape(table.shape)
        if table.shape != expected.shape or not np.array_equal(table, expected):
            raise StoreError(f"{path}: its chunk table does not match the run; use --force or --out", foreign=True)
        status = f["branch_points/status"][...] if "branch_points/status" in f else None
        if status is None or status.shape != (len(run.models), len(run.alphas)):
            raise StoreError(f"{path}: its /branch_points do not match the run; use --force or --out",
                             foreign=True)
        return g["done"][...].astype(bool), str(f.attrs.get("git_commit", "unknown")), status


def prepare_store(path, run, force=False, run_file=None, shard=None):
    """Make sure ``path`` is a store of ``run`` (the shard layout with ``shard``): check an
    existing one (read-only) or create it. Returns (done mask, created, note, branch-point
    status (model, alpha)). Nothing is written to an existing file here.

    An existing file of another run, another schema or another package version, or a file
    that is not a store, is never overwritten unless ``force`` (`StoreError`).
    """
    path = Path(path)
    if path.is_dir():
        raise StoreError(f"{path}: is a directory")
    if path.exists() and not force:
        done, commit, branch_status = check_store(path, run, shard)
        note = None
        if commit != git_commit():
            note = (f"{path} was started at commit {commit[:12]}, this is {git_commit()[:12]}; "
                    f"each invocation is recorded in the /progress history attribute")
        return done, False, note, branch_status
    create_store(path, run, run_file, shard)
    return (np.zeros(len(run.chunks()), dtype=bool), True, None,
            np.full((len(run.models), len(run.alphas)), NOT_COMPUTED, dtype="i1"))


def open_store(path, run):
    """Open a checked store for writing (`prepare_store` first)."""
    return Store(path, _open(path, "r+"), run)


# -- reading ------------------------------------------------------------------------------------

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
    history: list = field(default_factory=list)
    #: /branch_points arrays (model, alpha), names of `BRANCH_VARIABLES` (schema 1: not computed)
    branch: dict = field(default_factory=dict)
    schema_version: int = SCHEMA_VERSION
    #: the `tba.scans.runfile.Shard` of a shard file (its points only; the rest "not computed")
    shard: Shard | None = None

    def __getitem__(self, name):
        return self.data[name]

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

    def records(self, include_not_computed=False):
        """One dict per point with the keys of ``tba solve --json`` plus ``state``."""
        st = self.data["status"]
        names = {code: name for code, (name, _) in STATUS_MEANINGS.items()}
        for m in range(len(self.model)):
            for a, alpha in enumerate(self.alpha):
                couplings = dict(self.run.deformation(float(alpha)).couplings)
                for r, R in enumerate(self.radius):
                    for s, state in enumerate(self.state):
                        i = (m, a, r, s)
                        code = int(st[i])
                        if code in (NOT_COMPUTED, NOT_AVAILABLE) and not include_not_computed:
                            continue
                        ok = names.get(code) == "converged"
                        yield {
                            "model": self.model_name[m],
                            "coupling": self.model_coupling[m],
                            "radius": float(R),
                            "alpha": float(alpha),
                            "couplings": {str(k): v for k, v in couplings.items()},
                            "energy": float(self.data["energy"][i]) if ok else None,
                            "error": float(self.data["error"][i]) if ok else None,
                            "momentum": float(self.data["momentum"][i]) if ok else None,
                            "status": names.get(code, str(code)),
                            "iterations": int(self.data["iterations"][i]),
                            "message": self.data["message"][i],
                            "state": state,
                        }


def _strings(ds):
    return np.array(ds.asstr()[...], dtype=object)


def read_store(path):
    """Read a whole store (any tba-flow scan file of a `READABLE_VERSIONS` schema) into a
    `StoreData`; a schema-1 file has no branch points (all "not computed")."""
    path = Path(path)
    if not path.exists():
        raise StoreError(f"{path}: no such file")
    try:
        f = h5py.File(path, "r", locking=False)
    except OSError as exc:
        raise StoreError(f"{path}: not a readable HDF5 file ({str(exc).splitlines()[0]})") from None
    with f:
        if f.attrs.get("schema") not in (SCHEMA, SHARD_SCHEMA):
            raise StoreError(f"{path}: not a tba-flow scan file")
        shard = _shard_of(f)
        version = int(f.attrs.get("schema_version", -1))
        if version not in READABLE_VERSIONS:
            raise StoreError(f"{path}: schema version {version}; this tba reads "
                             f"{', '.join(map(str, READABLE_VERSIONS))}")
        attrs = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in f.attrs.items()}
        run = resolve_run(json.loads(attrs["run"]), name=json.loads(attrs["run"]).get("name", "run"))
        data = {}
        if shard is None:
            for name, (kind, fill, _) in POINT_VARIABLES.items():
                if name not in f:  # schema < 3: no momentum
                    data[name] = np.full(run.shape, fill, dtype=kind)
                else:
                    data[name] = _strings(f[name]) if kind == "str" else f[name][...]
        else:  # the shard's points into full arrays; the other shards' points "not computed"
            g = f["shard_points"]
            where = tuple(g[name][...] for name in SHARD_INDEX)
            for name, (kind, fill, _) in POINT_VARIABLES.items():
                full = np.full(run.shape, fill, dtype=object if kind == "str" else kind)
                full[where] = _strings(g[name]) if kind == "str" else g[name][...]
                data[name] = full
            mark_unavailable(data, run)
        g = f["progress"]
        names = (*PROGRESS_FIELDS, "done", "invocation", "seconds") + (("owned",) if shard else ())
        progress = {name: g[name][...] for name in names}
        couplings = [None if math.isnan(c) else float(c) for c in f["model_coupling"][...]]
        shape = (len(run.models), len(run.alphas))
        branch = {}
        for name, (kind, fill, _) in BRANCH_VARIABLES.items():
            key = f"branch_points/{name}"
            if key in f:
                branch[name] = _strings(f[key]) if kind == "str" else f[key][...]
            else:  # schema 1: the group was reserved, empty
                branch[name] = np.full(shape, fill, dtype=object if kind == "str" else kind)
        return StoreData(path=path, attrs=attrs, run=run, model=list(_strings(f["model"])),
                         model_name=list(_strings(f["model_name"])), model_coupling=couplings,
                         alpha=f["alpha"][...], radius=f["radius"][...],
                         state=list(_strings(f["state"])), data=data, progress=progress,
                         history=json.loads(g.attrs["history"]), branch=branch,
                         schema_version=version, shard=shard)
