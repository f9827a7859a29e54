"""Scans as xarray Datasets: in memory (`scan`, `scan_run`) or read from a file (`open_scan`).

Both give the same Dataset, laid out like the HDF5 store (`tba.store.hdf5`):

* coordinates ``model`` ("sinh-gordon B=0.6"), ``alpha``, ``radius`` and ``state``;
* per point (model, alpha, radius, state): ``energy``, ``error``, ``momentum``, ``status``,
  ``iterations``, ``message`` (str), ``flow_radius``, ``flow_prediction``, ``flow_error``,
  ``flow_residual``, ``flow_status``; per model: ``model_name``, ``model_coupling``;
* the ground state's branch points per (model, alpha), which the file keeps in its group
  ``/branch_points``: ``branch_radius``, ``branch_radius_error``, ``branch_energy``,
  ``branch_energy_error``, ``branch_effective_radius``, ``branch_status``, ``branch_message``
  (the store's checksums and bookkeeping are verified when the file is read and left out);
* the excited levels' branch points (the fold in R at fixed alpha) per (model, alpha, state),
  from the group ``/level_branch_points``: ``level_branch_radius``,
  ``level_branch_radius_error``, ``level_branch_energy``, ``level_branch_energy_error``,
  ``level_branch_effective_radius``, ``level_branch_status``, ``level_branch_message``; the
  "ground" column is not computed there (it is ``branch_radius``), and a file written before
  schema 5 has them all "not computed" (status -1);
* the file's attributes (units, conventions, the resolved run as JSON, status legends) on the
  Dataset and on each variable (``status`` and ``flow_status`` carry CF ``flag_values`` and
  ``flag_meanings``).

A missing value is NaN with a status that says why, as in the file. States are labelled by
their canonical names: ``ds.sel(state="ground")``, ``ds.sel(state="-1/2,1/2")`` (sorted
fractions without spaces; ``tba.level_name("1/2, -1/2")`` gives the label of any spelling).
``ds.to_dataframe()`` gives one row per point for pandas.

The in-memory scan solves the chunks of a resolved run (`tba.scans.runfile`) with
`tba.scans.points.solve_chunk` on a local backend (the numbers are those of ``tba run`` bit for
bit); the layout comes from a store created in a temporary directory and read back, so that
it is the file's by construction.
"""

import json
import os
import tempfile
from pathlib import Path

import numpy as np
import xarray as xr

from tba.scans.backends import BranchDone, ChunkDone, TaskFailed, local_backend
from tba.scans.codes import (BRANCH_DIMS, BRANCH_VARIABLES, DIMS, LEVEL_BRANCH_ATTRS,
                             LEVEL_BRANCH_DIMS, NOT_COMPUTED, POINT_VARIABLES)
from tba.scans.runfile import RunFileError, RunSpec, Shard, load_run, resolve_run
from tba.store.hdf5 import StoreData, StoreError, create_store, full, level_shape, read_store

#: names in the Dataset of the variables of /branch_points (R_c already says what it is)
BRANCH_NAMES = {name: name if name.startswith("branch_") else f"branch_{name}"
                for name in BRANCH_VARIABLES}
#: names in the Dataset of the variables of /level_branch_points (excited levels)
LEVEL_BRANCH_NAMES = {name: f"level_{BRANCH_NAMES[name]}" for name in BRANCH_VARIABLES}
#: bookkeeping attributes of HDF5 dimension scales, not copied
_H5_ATTRS = {"DIMENSION_LIST", "REFERENCE_LIST", "CLASS", "NAME", "_Netcdf4Dimid",
             "_Netcdf4Coordinates"}
#: keyword arguments of `scan` -> the run-file key they fill (for error messages)
_ARGUMENTS = {"models": "models", "deformation.alphas": "alphas",
              "deformation.higher_spin": "higher_spin", "deformation.poles": "poles",
              "deformation.resonances": "resonances", "radii": "radii", "states": "states",
              "solver.tol": "tol", "description": "description"}


def open_scan(path):
    """The scan stored at ``path`` (a file written by ``tba run`` or ``tba merge``, or a shard)
    as an xarray Dataset, read into memory (the file is closed on return)."""
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"path must be a file name (str or os.PathLike), got {type(path).__name__} {path!r}")
    try:
        data = read_store(path)
    except StoreError as exc:
        if not Path(path).exists():
            raise FileNotFoundError(f"path: {exc}") from None
        raise ValueError(f"path: {exc}") from None
    return to_dataset(data, _variable_attributes(path))


def scan(models, radii, alphas=(0.0,), states=("ground",), *, higher_spin=None, poles=(),
         resonances=(), tol=1e-12,
         flow_check=True, branch_points=True, chunk_size=8, sweep="descending", description="",
         workers=1, backend=None):
    """Solve a scan in memory and return it as an xarray Dataset (the layout of `open_scan`).

    ``models``: a built-in model (``tba.sinh_gordon(0.6)``), its name (``"lee-yang"``) or a
    list of them; ``radii`` and ``alphas``: numbers (sorted, duplicates merged); ``states``:
    "ground" and excited levels by their quantum numbers ("-1/2,1/2"); ``higher_spin``:
    {odd spin >= 3: alpha_s}, added at every alpha; ``poles`` [(x, p), ...] and ``resonances``
    [(theta0, p), ...]: CDD pole and resonance factors F_(pi x)^p, at every alpha. ``tol``, ``flow_check``,
    ``branch_points``, ``chunk_size`` and ``sweep`` are the run-file settings of the same
    names (README, "Scans"). ``workers`` > 1 solves the chunks in that many local processes
    (scripts then need the ``if __name__ == "__main__":`` guard); ``backend`` takes a
    `tba.scans.backends.Backend` instead (e.g. a `tba.scans.cluster.DaskBackend`).

    User-defined models cannot be scanned this way (a scan names its models so that any
    worker can rebuild them): solve them with `tba.solve`.
    """
    spec = {
        "description": description,
        "output": None,
        "models": [_model_entry(m) for m in (models if isinstance(models, (list, tuple)) else [models])],
        "deformation": {"alphas": _numbers(alphas),
                        "higher_spin": {str(s): a for s, a in dict(higher_spin or {}).items()},
                        **({"poles": [list(p) for p in poles]} if poles else {}),
                        **({"resonances": [list(r) for r in resonances]} if resonances else {})},
        "radii": _numbers(radii),
        "states": list(states) if isinstance(states, (list, tuple)) else [states],
        "solver": {"tol": tol},
        "scan": {"chunk_size": chunk_size, "flow_check": flow_check, "sweep": sweep,
                 "branch_points": branch_points},
    }
    try:
        run = resolve_run(spec, name="scan")
    except RunFileError as exc:
        argument = next((arg for key, arg in _ARGUMENTS.items() if exc.key.startswith(key)),
                        exc.key.split(".")[-1])
        raise ValueError(f"{argument}: {exc}") from None
    return scan_run(run, workers=workers, backend=backend)


def scan_run(run, *, workers=1, backend=None):
    """Solve a whole run in memory: ``run`` is a run file (path), a run description (a dict
    as read from TOML) or a resolved `tba.scans.runfile.RunSpec`. Returns the Dataset that
    ``tba run`` followed by `open_scan` would give (the run's ``output`` is not written)."""
    if isinstance(run, (str, Path)):
        run = load_run(run)
    elif isinstance(run, dict):
        run = resolve_run({"output": None, **run})
    elif not isinstance(run, RunSpec):
        raise TypeError(f"run: expected a run file, a dict or a RunSpec, got {type(run).__name__}")
    if backend is not None and workers != 1:
        raise ValueError("workers: give either workers or backend, not both")
    with tempfile.TemporaryDirectory(prefix="tba-scan-") as tmp:
        path = Path(tmp) / "scan.h5"
        create_store(path, run)
        data = read_store(path)
        attrs = _variable_attributes(path)
    chunks = run.chunks()
    pairs = run.branch_keys() if run.branch_points else []
    backend = local_backend(workers, len(chunks)) if backend is None else backend
    failed = []
    if chunks or pairs:
        backend.start()
        try:
            for item in backend.compute(run, chunks, pairs):
                if isinstance(item, ChunkDone):
                    _fill_chunk(data, item)
                elif isinstance(item, BranchDone):
                    arrays = data.branch if item.state is None else data.levels
                    for name, (_, fill, _) in BRANCH_VARIABLES.items():
                        arrays[name][item.key] = item.values.get(name, fill)
                elif isinstance(item, TaskFailed):
                    failed.append(f"{item.what}: {item.error}")
        finally:
            backend.close()
    ds = to_dataset(data, attrs)
    if failed:
        error = RuntimeError(f"{len(failed)} task(s) failed, their points are not computed: "
                             f"{failed[0]}" + (f" (and {len(failed) - 1} more)" if len(failed) > 1 else ""))
        error.dataset = ds  # everything else, computed
        raise error
    return ds


def _fill_chunk(data, item):
    c = item.chunk
    where = (c.model, c.alpha, slice(c.radius_start, c.radius_stop), c.state)
    for name in POINT_VARIABLES:
        data.data[name][where] = item.values[name]
    data.progress["done"][c.index] = 1


def _model_entry(model):
    """A run file's model entry from a model object, a name or a {name, coupling} dict."""
    if isinstance(model, str):
        return {"name": model}
    if isinstance(model, dict):
        return model
    from tba.models import MODELS

    name = getattr(model, "name", None)
    if name not in MODELS:
        raise ValueError(f"models: {name or type(model).__name__!r} is not a built-in model "
                         f"({', '.join(MODELS)}); solve user-defined models with tba.solve")
    return {"name": name} if model.coupling is None else {"name": name, "coupling": model.coupling}


def _numbers(values):
    """A list of Python numbers from a number, a sequence or an array (numpy scalars become
    floats; anything else is left for the run's checks to name)."""
    if isinstance(values, np.ndarray):
        items = values.ravel().tolist()
    elif isinstance(values, (list, tuple, range)):
        items = list(values)
    else:
        items = [values]
    return [v.item() if isinstance(v, np.generic) else v for v in items]


def _variable_attributes(path):
    """{name: attributes} of every data set of a store (``branch_points/...`` for the group),
    without HDF5's dimension-scale bookkeeping."""
    import h5py

    out = {}

    def visit(name, obj):
        if isinstance(obj, h5py.Dataset):
            out[name] = {k: (v.decode() if isinstance(v, bytes) else v)
                         for k, v in obj.attrs.items() if k not in _H5_ATTRS}

    with h5py.File(path, "r", locking=False) as f:
        f.visititems(visit)
    return out


def to_dataset(data, attributes=None):
    """The Dataset of a `tba.store.hdf5.StoreData` (``attributes``: {data set: attrs} as in
    the file; default: those of the current layout)."""
    attributes = attributes or {}

    def attrs(name, default):
        return dict(attributes.get(name, default))

    coords = {"model": ("model", np.array(data.model, dtype=object), attrs("model", {})),
              "alpha": ("alpha", np.asarray(data.alpha, dtype=float), attrs("alpha", {})),
              "radius": ("radius", np.asarray(data.radius, dtype=float), attrs("radius", {})),
              "state": ("state", np.array(data.state, dtype=object), attrs("state", {}))}
    variables = {
        "model_name": ("model", np.array(data.model_name, dtype=object), attrs("model_name", {})),
        "model_coupling": ("model", np.array([np.nan if c is None else c for c in data.model_coupling],
                                             dtype=float), attrs("model_coupling", {})),
    }
    for name, (kind, _, default) in POINT_VARIABLES.items():
        values = data[name]
        values = np.asarray(values, dtype=object) if kind == "str" else np.asarray(values)
        variables[name] = (DIMS, values, attrs(name, default))
    for name, (kind, _, default) in BRANCH_VARIABLES.items():
        values = data.branch[name]
        values = np.asarray(values, dtype=object) if kind == "str" else np.asarray(values)
        variables[BRANCH_NAMES[name]] = (BRANCH_DIMS, values, attrs(f"branch_points/{name}", default))
    for name, (kind, fill, default) in BRANCH_VARIABLES.items():
        values = data.levels.get(name) if data.levels else None
        if values is None:  # a file written before schema 5
            values = full(level_shape(data.run), kind, fill)
            if kind == "str":
                values = values.astype(str)
        values = np.asarray(values, dtype=object) if kind == "str" else np.asarray(values)
        level_attrs = dict(attributes.get(f"level_branch_points/{name}",
                                          LEVEL_BRANCH_ATTRS.get(name, default)))
        variables[LEVEL_BRANCH_NAMES[name]] = (LEVEL_BRANCH_DIMS, values, level_attrs)
    return xr.Dataset(variables, coords=coords, attrs=dict(data.attrs))


def store_data(ds):
    """A `tba.store.hdf5.StoreData` of a Dataset of this layout (for `tba.output.plotting`
    and `tba.output.report`), e.g. after ``ds.sel(alpha=[0.05, 0.1])``: every dimension must
    remain (select with lists, not scalars)."""
    missing = [d for d in DIMS if d not in ds.dims]
    if missing:
        raise ValueError(f"ds: dimension {missing[0]!r} was dropped; select with a list "
                         f"(ds.sel({missing[0]}=[...])) to keep it")
    if "run" not in ds.attrs:
        raise ValueError("ds: not a tba-flow scan (no 'run' attribute)")
    run_dict = json.loads(ds.attrs["run"])
    run = resolve_run(run_dict, name=run_dict.get("name", "run"))
    data = {name: ds[name].transpose(*DIMS).values for name in POINT_VARIABLES}
    branch = {name: ds[BRANCH_NAMES[name]].transpose(*BRANCH_DIMS).values
              for name in BRANCH_VARIABLES}
    if LEVEL_BRANCH_NAMES["status"] in ds:
        levels = {name: ds[LEVEL_BRANCH_NAMES[name]].transpose(*LEVEL_BRANCH_DIMS).values
                  for name in BRANCH_VARIABLES}
    else:
        shape = tuple(ds.sizes[d] for d in LEVEL_BRANCH_DIMS)
        levels = {name: np.full(shape, NOT_COMPUTED if name == "status" else
                                ("" if kind == "str" else fill), dtype=object if kind == "str" else None)
                  for name, (kind, fill, _) in BRANCH_VARIABLES.items()}
    couplings = [None if np.isnan(c) else float(c) for c in ds["model_coupling"].values]
    shard = ds.attrs.get("shard")
    return StoreData(path=None, attrs=dict(ds.attrs), run=run, model=list(ds["model"].values),
                     model_name=list(ds["model_name"].values), model_coupling=couplings,
                     alpha=ds["alpha"].values, radius=ds["radius"].values,
                     state=list(ds["state"].values), data=data, branch=branch, levels=levels,
                     schema_version=int(ds.attrs.get("schema_version", 0)),
                     shard=Shard(*map(int, shard.split("/"))) if shard else None)
