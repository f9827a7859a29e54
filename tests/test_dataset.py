"""Scans as xarray Datasets: in memory (tba.scan, tba.scan_run) and from a file (tba.open_scan)
give the same variables and coordinates as the HDF5 store, read by xarray itself; the numbers
are checked against the free fermion's Bessel series."""

import io

import numpy as np
import pytest
import xarray as xr

import tba
from reference import deformed_free_fermion_branch, free_fermion_ns_energy
from tba.scans.runfile import loads_run
from tba.store.driver import run_scan
from tba.store.hdf5 import create_store

# the free fermion and Lee-Yang; "1/2,-1/2" is not available for Lee-Yang (its only excited
# level here is "0"), so those points are "not-available"; the free fermion's two-particle
# level has no real solution at R = 1.5 for alpha = -0.1 (a positive level's branch point)
RUN = """\
output = "ds.h5"
states = ["ground", "1/2,-1/2"]

[[models]]
name = "free-fermion"

[[models]]
name = "lee-yang"

[deformation]
alphas = [-0.1, 0, 0.8]

[radii]
start = 1.5
stop = 3.0
count = 4
spacing = "log"

[solver]
tol = 1e-11

[scan]
chunk_size = 2
"""
POINT = ["energy", "error", "momentum", "status", "iterations", "message", "flow_radius",
         "flow_prediction", "flow_error", "flow_residual", "flow_status"]
BRANCH = ["branch_radius", "branch_radius_error", "branch_energy", "branch_energy_error",
          "branch_effective_radius", "branch_status", "branch_message"]
#: the excited levels' branch points, from the group /level_branch_points (model, alpha, state)
LEVEL_BRANCH = [f"level_{name}" for name in BRANCH]


@pytest.fixture(scope="module")
def stored(tmp_path_factory):
    run = loads_run(RUN, base_dir=tmp_path_factory.mktemp("ds"))
    run_scan(run, workers=1, log=io.StringIO())
    return run


def _equal(a, b):
    a, b = np.asarray(a), np.asarray(b)
    if a.dtype.kind == "f":
        return np.array_equal(a, b, equal_nan=True)
    return np.array_equal(a.astype(str), b.astype(str))


def test_open_scan_has_the_layout_xarray_reads_from_the_file(stored):
    ds = tba.open_scan(stored.output)
    raw = xr.open_dataset(stored.output, engine="h5netcdf")
    group = xr.open_dataset(stored.output, engine="h5netcdf", group="branch_points")
    try:
        assert set(ds.coords) == set(raw.coords) == {"model", "alpha", "radius", "state"}
        assert set(ds.data_vars) == set(raw.data_vars) | set(BRANCH) | set(LEVEL_BRANCH)
        for name in raw.variables:
            assert ds[name].dims == raw[name].dims, name
            values = raw[name].values
            if values.dtype.kind == "S":  # h5netcdf gives the fixed-length messages as bytes
                values = np.char.decode(values, "utf-8")
            assert _equal(ds[name].values, values), name
            assert {k: v for k, v in raw[name].attrs.items()
                    if not k.startswith("_")}.keys() <= ds[name].attrs.keys(), name
        for name in group.variables:
            if name == "checksum":  # the store's integrity bookkeeping, not data of the scan
                continue
            mine = "branch_" + name if not name.startswith("branch_") else name
            values = group[name].values
            if values.dtype.kind == "S":
                values = np.char.decode(values, "utf-8")
            assert ds[mine].dims == ("model", "alpha") and _equal(ds[mine].values, values), name
        levels = xr.open_dataset(stored.output, engine="h5netcdf", group="level_branch_points")
        with levels:
            for name in levels.variables:
                if name == "checksum":
                    continue
                mine = "level_" + ("branch_" + name if not name.startswith("branch_") else name)
                values = levels[name].values
                if values.dtype.kind == "S":
                    values = np.char.decode(values, "utf-8")
                assert ds[mine].dims == ("model", "alpha", "state"), name
                assert _equal(ds[mine].values, values), name
        assert dict(ds.attrs).keys() == dict(raw.attrs).keys()
        assert ds.status.attrs["flag_meanings"].split()[1] == "converged"
        assert ds.message.dtype == object and isinstance(ds.message.values.flat[0], str)
    finally:
        raw.close()
        group.close()


def test_scan_in_memory_equals_the_stored_run(stored):
    on_disk = tba.open_scan(stored.output)
    in_memory = tba.scan_run(stored)
    by_keywords = tba.scan([tba.free_fermion(), "lee-yang"], np.geomspace(1.5, 3.0, 4),
                           alphas=[-0.1, 0, 0.8], states=["ground", "1/2,-1/2"], tol=1e-11,
                           chunk_size=2)
    for ds in (in_memory, by_keywords):
        assert list(ds.coords) == list(on_disk.coords)
        assert set(ds.data_vars) == set(on_disk.data_vars)
        for name in ds.variables:
            if name not in ("message", "branch_message"):  # messages carry timings
                assert _equal(ds[name].values, on_disk[name].values), name
        assert ds.attrs.keys() == on_disk.attrs.keys()
        assert ds.attrs["run_id"] == on_disk.attrs["run_id"]  # the same resolved run


def test_numbers_select_by_label_and_frame(stored):
    ds = tba.open_scan(stored.output)
    # the free fermion's ground state is the NS Bessel series (Mussardo 2010, from memory)
    ground = ds.energy.sel(model="free-fermion", alpha=0.0, state="ground")
    expected = [free_fermion_ns_energy(R) for R in ds.radius.values]
    np.testing.assert_allclose(ground.values, expected, rtol=1e-11)
    assert (np.abs(ground.values - expected) <= ds.error.sel(model="free-fermion", alpha=0.0,
                                                           state="ground").values + 1e-16).all()
    # states by their canonical names, any spelling through tba.level_name
    two = ds.sel(state=tba.level_name("1/2, -1/2"))
    assert two.state.item() == "-1/2,1/2"
    # Lee-Yang lacks that level: not-available (status 3), no energy, the reason as message
    ly = two.sel(model="lee-yang")
    assert (ly.status == 3).all() and ly.energy.isnull().all()
    assert "one-particle state" in str(ly.message.values.flat[0])
    # the branch point of alpha = 0.8 against the Bessel series (R_c = R'_* - alpha E_NS(R'_*))
    Rc = ds.branch_radius.sel(model="free-fermion", alpha=0.8).item()
    assert Rc == pytest.approx(deformed_free_fermion_branch(0.8)[1], rel=1e-10)
    assert ds.branch_status.sel(model="free-fermion", alpha=-0.1).item() == 1  # none
    # pandas: one row per point, every variable a column
    frame = ds.to_dataframe()
    assert len(frame) == ds.sizes["model"] * ds.sizes["alpha"] * ds.sizes["radius"] * ds.sizes["state"]
    row = frame.loc[("free-fermion", 0.0, ds.radius.values[0], "ground")]
    assert row["energy"] == ground.values[0] and "branch_radius" in frame.columns


def test_a_store_not_computed_yet_is_read_as_such(tmp_path):
    run = loads_run(RUN, base_dir=tmp_path)
    create_store(run.output, run)
    ds = tba.open_scan(run.output)
    assert (ds.status.sel(model="free-fermion") == -1).all()  # not computed
    assert (ds.status.sel(model="lee-yang", state="-1/2,1/2") == 3).all()  # not available
    assert ds.energy.isnull().all() and (ds.branch_status == -1).all()


def test_errors_name_the_argument(tmp_path, stored):
    ff = tba.free_fermion()
    cases = [(dict(models=[ff], radii=[1.0], alphas=["x"]), "alphas"),
             (dict(models=[ff], radii=[-1.0]), "radii"),
             (dict(models=[ff], radii=[1.0], states=["1/2"]), "states"),
             (dict(models=[ff], radii=[1.0], tol=0.5), "tol"),
             (dict(models=[ff], radii=[1.0], chunk_size=0), "chunk_size"),
             (dict(models=[tba.user_model([1.0], {0.3: -1})], radii=[1.0]), "models"),
             (dict(models=["no-such-model"], radii=[1.0]), "models")]
    for kwargs, word in cases:
        with pytest.raises(ValueError, match=f"^{word}"):
            tba.scan(**kwargs)
    with pytest.raises(TypeError, match="run"):
        tba.scan_run(42)
    with pytest.raises(FileNotFoundError, match="path"):
        tba.open_scan(tmp_path / "missing.h5")
    (tmp_path / "not.h5").write_text("text")
    with pytest.raises(ValueError, match="path"):
        tba.open_scan(tmp_path / "not.h5")


@pytest.mark.slow
def test_scan_on_two_worker_processes_gives_the_same_numbers(stored):
    serial = tba.open_scan(stored.output)
    parallel = tba.scan_run(stored, workers=2)
    for name in POINT + BRANCH:
        if "message" not in name:
            assert _equal(parallel[name].values, serial[name].values), name
