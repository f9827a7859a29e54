"""The HDF5 store: layout read with plain h5py and with xarray, physics values against an
outside source, missing values, and protection of existing files."""

import hashlib
import importlib.util
import io
import json
import math
from pathlib import Path

import h5py
import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.special import k0, k1

import tba
from tba.solvers.result import STATUS_CODES, Status
from tba.scans.runfile import loads_run
from tba.store.driver import run_scan
from tba.output.report import format_report
from tba.store.hdf5 import (BP_FAILED, BP_FOUND, BP_NONE, BRANCH_VARIABLES, FLOW_NOT_APPLICABLE,
                         NOT_COMPUTED, POINT_VARIABLES, SCHEMA_VERSION, StoreError, check_store,
                         git_commit, read_store)

TINY = """\
# tiny store for the tests
description = "free fermion and Lee-Yang, tiny"
output = "tiny.h5"

[[models]]
name = "free-fermion"

[[models]]
name = "lee-yang"

[deformation]
alphas = [-0.2, 0, 0.5]

[radii]
start = 0.3
stop = 2.1
count = 4

[solver]
tol = 1e-10

[scan]
chunk_size = 3
"""
DIMS = ("model", "alpha", "radius", "state")


def free_fermion_ns(R):
    # NS-sector ground state of the free Majorana fermion, bulk term excluded:
    # E(R) = -(1/pi) sum_k (-1)^(k+1) K_1(k R)/k  (textbook, e.g. Mussardo, Statistical Field
    # Theory (2010); docs/physics.md section 2), with scipy.special.k1
    k = np.arange(1, int(60 / R) + 50)
    return -math.fsum(((-1.0) ** (k + 1) * k1(k * R) / k).tolist()) / math.pi


def free_fermion_ns_slope(R):
    # dE/dR of the series above, term by term: d/dR K_1(kR)/k = K_1'(kR) = -K_0(kR) - K_1(kR)/(kR)
    # (DLMF 10.29.2), with scipy.special.k0 and k1
    k = np.arange(1, int(60 / R) + 50)
    return math.fsum(((-1.0) ** (k + 1) * (k0(k * R) + k1(k * R) / (k * R))).tolist()) / math.pi


def free_fermion_branch_point(alpha):
    """Exact R_c of the TTbar-deformed free-fermion ground state from the Bessel series:
    E_0'(R~) = 1/alpha, R_c = R~ - alpha E_0(R~) (characteristics of the Burgers flow,
    docs/physics.md section 4; E_0 from Mussardo, Statistical Field Theory (2010))."""
    Rt = brentq(lambda R: free_fermion_ns_slope(R) - 1 / alpha, 0.02, 5.0, xtol=1e-15,
                rtol=4 * np.finfo(float).eps)
    return Rt - alpha * free_fermion_ns(Rt), free_fermion_ns(Rt), Rt


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    d = tmp_path_factory.mktemp("store")
    run = loads_run(TINY, base_dir=d, name="tiny")
    run_scan(run, workers=1, log=io.StringIO())
    return Path(run.output), run


def test_root_attributes_with_h5py(store):
    path, run = store
    with h5py.File(path, "r") as f:
        a = f.attrs
        assert a["schema"] == "tba-flow scan" and a["schema_version"] == SCHEMA_VERSION
        assert a["package_version"] == tba.__version__
        assert a["git_commit"] == git_commit()
        assert a["git_commit"] == "unknown" or len(a["git_commit"]) == 40
        assert json.loads(a["run"]) == run.to_dict()  # the fully resolved run, defaults included
        assert json.loads(a["run"])["scan"]["flow_check"] is True
        assert a["run_id"] == run.run_id
        assert "without the bulk term" in a["conventions"].replace("WITHOUT", "without")
        assert "exp(i alpha m_a m_b sinh t)" in a["conventions"]
        assert "m_1" in a["units"]
        assert "-1 not-computed" in a["status_legend"] and "0 converged" in a["status_legend"]
        for text in ("-1 not-computed", "0 found", "1 none", "2 not-applicable", "3 failed"):
            assert text in a["branch_point_status_legend"]
        assert [m["name"] for m in json.loads(a["models"])] == ["free-fermion", "lee-yang"]


def test_dimension_scales_with_h5py(store):
    path, run = store
    with h5py.File(path, "r") as f:
        assert list(f["model"].asstr()[...]) == ["free-fermion", "lee-yang"]
        assert list(f["alpha"][...]) == [-0.2, 0.0, 0.5]
        assert list(f["radius"][...]) == list(run.radii)
        assert list(f["state"].asstr()[...]) == ["ground"]
        for name in POINT_VARIABLES:
            ds = f[name]
            assert ds.shape == run.shape == (2, 3, 4, 1)
            assert [ds.dims[i].keys()[0] for i in range(4)] == list(DIMS)
        st = f["status"]
        codes = dict(zip(st.attrs["flag_meanings"].split(), st.attrs["flag_values"]))
        assert codes["not-computed"] == NOT_COMPUTED
        for status, code in STATUS_CODES.items():
            assert codes[status.value] == code
        assert f["progress/done"][...].all()
        assert f["progress"].attrs["n_chunks"] == len(run.chunks())


def test_readable_with_xarray_h5netcdf(store):
    xr = pytest.importorskip("xarray")
    pytest.importorskip("h5netcdf")
    path, run = store
    with xr.open_dataset(path, engine="h5netcdf") as ds:
        _check_xarray(ds, run)
    with xr.open_dataset(path, engine="h5netcdf", group="progress") as prog:
        assert prog["done"].dims == ("chunk",) and bool(prog["done"].all())


def test_readable_with_xarray_netcdf4(store):
    # netCDF4 is not a dependency; checked when installed (it reads our layout too)
    xr = pytest.importorskip("xarray")
    pytest.importorskip("netCDF4")
    path, run = store
    with xr.open_dataset(path, engine="netcdf4") as ds:
        _check_xarray(ds, run)


def _check_xarray(ds, run):
    assert dict(ds.sizes) == {"model": 2, "alpha": 3, "radius": 4, "state": 1}
    for name in POINT_VARIABLES:
        assert ds[name].dims == DIMS
    assert list(ds["model"].values) == ["free-fermion", "lee-yang"]
    assert list(ds["state"].values) == ["ground"]
    assert ds["alpha"].attrs["units"] == "1/m_1^2" and ds["energy"].attrs["units"] == "m_1"
    assert ds.attrs["schema_version"] == SCHEMA_VERSION
    assert json.loads(ds.attrs["run"])["radii"] == list(run.radii)
    assert ds["status"].dtype == np.int8  # not decoded to floats: no _FillValue
    e = ds["energy"].sel(model="free-fermion", alpha=0.0, state="ground")
    assert np.all(np.isfinite(e.values))
    # fixed-length UTF-8 messages: str with netcdf4, bytes with h5netcdf
    message = ds["message"].sel(model="free-fermion", alpha=0.0, state="ground").values[0]
    assert (message.decode() if isinstance(message, bytes) else message).startswith("converged")


def test_branch_points_with_h5py(store):
    path, run = store
    with h5py.File(path, "r") as f:
        g = f["branch_points"]
        assert set(g) == set(BRANCH_VARIABLES) | {"checksum"}
        for name in BRANCH_VARIABLES:
            ds = g[name]
            assert ds.shape == (2, 3)  # (model, alpha)
            assert [ds.dims[i].keys()[0] for i in range(2)] == ["model", "alpha"]
            assert ds.dims[0][0] == f["model"] and ds.dims[1][0] == f["alpha"]  # the root scales
        st = g["status"]
        assert st.dtype == np.int8
        codes = dict(zip(st.attrs["flag_meanings"].split(), st.attrs["flag_values"]))
        assert codes == {"not-computed": -1, "found": 0, "none": 1, "not-applicable": 2, "failed": 3}
        assert g["branch_radius"].attrs["units"] == "1/m_1" and g["energy"].attrs["units"] == "m_1"
        # alphas -0.2, 0: none (no branch point on this side), NaN; 0.5: found
        status = st[...]
        assert (status[:, :2] == BP_NONE).all() and (status[:, 2] == BP_FOUND).all()
        for name in ("branch_radius", "branch_radius_error", "energy", "energy_error",
                     "effective_radius"):
            assert np.isnan(g[name][:, :2]).all() and np.isfinite(g[name][:, 2]).all()
        messages = g["message"].asstr()[...]
        assert all("no branch point" in m for m in messages[:, :2].ravel())
        # stored fields agree with each other: R_c = R~ - alpha E_0(R~); within the scan's radii
        Rc, Rt, E = g["branch_radius"][:, 2], g["effective_radius"][:, 2], g["energy"][:, 2]
        assert np.array_equal(Rc, Rt - 0.5 * E)
        assert ((0.3 < Rc) & (Rc < 0.9)).all()  # R = 0.3 has no real solution, R = 0.9 has
        assert (g["branch_radius_error"][:, 2] <= 1e-10 * Rc).all()


def test_free_fermion_branch_point_against_bessel_series(store):
    # exact R_c from the Bessel series (free_fermion_branch_point above), to 1e-10
    path, run = store
    data = read_store(path)
    Rc, E, Rt = free_fermion_branch_point(0.5)
    assert data.branch["status"][0, 2] == BP_FOUND
    assert abs(data.branch["branch_radius"][0, 2] - Rc) <= 1e-10
    assert abs(data.branch["energy"][0, 2] - E) <= 1e-10
    assert abs(data.branch["effective_radius"][0, 2] - Rt) <= 1e-8  # R_c is stationary in R~
    assert abs(data.branch["branch_radius"][0, 2] - Rc) <= data.branch["branch_radius_error"][0, 2]
    assert Rc == pytest.approx(0.6933232406401, abs=1e-12)  # the value from the series, once


def test_branch_points_with_xarray(store):
    xr = pytest.importorskip("xarray")
    pytest.importorskip("h5netcdf")
    path, run = store
    # netCDF4 is not a dependency; checked when installed
    engines = ["h5netcdf"] + (["netcdf4"] if importlib.util.find_spec("netCDF4") else [])
    for engine in engines:
        with xr.open_dataset(path, engine=engine, group="branch_points") as ds:
            assert dict(ds.sizes) == {"model": 2, "alpha": 3}
            for name in BRANCH_VARIABLES:
                assert ds[name].dims == ("model", "alpha")
            assert ds["status"].dtype == np.int8
            assert np.isnan(ds["branch_radius"].values[:, :2]).all()
    if hasattr(xr, "open_datatree"):  # the group inherits the root's model and alpha coordinates
        with xr.open_datatree(path, engine="h5netcdf") as tree:
            bp = tree["branch_points"]
            assert list(bp["model"].values) == ["free-fermion", "lee-yang"]
            assert bp["branch_radius"].dims == ("model", "alpha")
            Rc = bp["branch_radius"].sel(model="free-fermion", alpha=0.5).item()
        assert Rc == read_store(path).branch["branch_radius"][0, 2]


def test_free_fermion_energies_against_bessel_series(store):
    path, run = store
    data = read_store(path)
    a0 = list(data.alpha).index(0.0)
    for r, R in enumerate(data.radius):
        E, err = data["energy"][0, a0, r, 0], data["error"][0, a0, r, 0]
        exact = free_fermion_ns(R)
        assert data["status"][0, a0, r, 0] == STATUS_CODES[Status.CONVERGED]
        assert abs(E - exact) <= max(err, 1e-15) and err <= 1e-10 * abs(exact), (R, E, exact, err)


def test_flow_prediction_of_the_free_fermion(store):
    # the flow prediction is the undeformed energy at R' = R + alpha E: for the free fermion
    # that is the Bessel series at R' (docs/physics.md section 2 and 4)
    path, run = store
    data = read_store(path)
    checked = 0
    for a, alpha in enumerate(data.alpha):
        for r, R in enumerate(data.radius):
            if data["flow_status"][0, a, r, 0] != STATUS_CODES[Status.CONVERGED]:
                continue
            E, Rp = data["energy"][0, a, r, 0], data["flow_radius"][0, a, r, 0]
            assert Rp == R + alpha * E
            assert data["flow_prediction"][0, a, r, 0] == pytest.approx(free_fermion_ns(Rp), rel=1e-10, abs=0)
            assert data["flow_residual"][0, a, r, 0] == abs(E - data["flow_prediction"][0, a, r, 0])
            assert data["flow_residual"][0, a, r, 0] <= 1e-10 * abs(E)
            checked += 1
    assert checked >= 6


def test_missing_values_are_nan_with_a_status(store):
    path, run = store
    data = read_store(path)
    status = data["status"]
    no_real = status == STATUS_CODES[Status.NO_REAL_SOLUTION]
    # alpha = 0.5 at R = 0.3 lies past the branch point (CFT estimate sqrt(2 pi c alpha/3),
    # docs/physics.md section 4: 0.72 for the free fermion, 0.65 for Lee-Yang)
    assert no_real[:, 2, 0, 0].all()
    assert np.isnan(data["energy"][no_real]).all() and np.isnan(data["error"][no_real]).all()
    assert (data["flow_status"][no_real] == 12).all()  # no-energy
    assert np.isnan(data["flow_prediction"][no_real]).all()
    ok = status == STATUS_CODES[Status.CONVERGED]
    assert np.isfinite(data["energy"][ok]).all() and ok.sum() + no_real.sum() == status.size
    # alpha = 0: nothing to check
    assert (data["flow_status"][:, 1] == FLOW_NOT_APPLICABLE).all()
    assert np.isnan(data["flow_residual"][:, 1]).all()


def test_records_have_the_solve_json_keys(store):
    path, run = store
    recs = list(read_store(path).records())
    assert len(recs) == run.n_points
    keys = {"model", "coupling", "radius", "alpha", "cdd_couplings", "energy", "error", "momentum",
            "status", "iterations", "message", "state", "couplings"}  # couplings: deprecated
    assert all(set(r) == keys for r in recs)
    nr = [r for r in recs if r["status"] == "no-real-solution"]
    assert nr and all(r["energy"] is None and r["error"] is None for r in nr)
    assert recs[0]["cdd_couplings"] == recs[0]["couplings"] == {"1": -0.2}
    assert all(set(r) == keys - {"couplings"} for r in read_store(path).records(deprecated=False))
    assert all(isinstance(r["message"], str) and r["message"] for r in recs)


def _sha(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def test_a_different_run_never_overwrites(store, tmp_path):
    path, run = store
    before = _sha(path)
    other = loads_run(TINY.replace("count = 4", "count = 5"), base_dir=tmp_path)
    with pytest.raises(StoreError, match="different run.*radii"):
        run_scan(other, path, workers=1)
    with pytest.raises(StoreError, match="different run"):
        check_store(path, other)
    assert _sha(path) == before
    # a complete file is not recomputed (and not even opened for writing)
    summary = run_scan(run, path, workers=1, log=io.StringIO())
    assert summary.chunks_computed == 0 and summary.complete
    assert _sha(path) == before


def test_not_a_store_is_never_overwritten(tmp_path):
    path = tmp_path / "tiny.h5"
    path.write_text("not hdf5")
    run = loads_run(TINY, base_dir=tmp_path)
    with pytest.raises(StoreError, match="not an HDF5 file; refusing to overwrite it"):
        run_scan(run, workers=1)
    assert path.read_text() == "not hdf5"
    with h5py.File(tmp_path / "other.h5", "w") as f:
        f["x"] = 1
    before = _sha(tmp_path / "other.h5")
    with pytest.raises(StoreError, match="not a tba-flow scan file"):
        run_scan(run, tmp_path / "other.h5", workers=1)
    assert _sha(tmp_path / "other.h5") == before


def test_partial_store_reads_and_reports_not_computed(tmp_path):
    from tba.store.hdf5 import create_store
    run = loads_run(TINY, base_dir=tmp_path)
    create_store(run.output, run)
    data = read_store(run.output)
    assert (data["status"] == NOT_COMPUTED).all() and np.isnan(data["energy"]).all()
    assert list(data.records()) == [] and not data.complete
    assert len(list(data.records(include_not_computed=True))) == run.n_points


def test_long_messages_are_cut_at_a_character_boundary():
    from tba.store.hdf5 import MESSAGE_BYTES, _encode
    raw = _encode("é" * 300)
    assert len(raw) <= MESSAGE_BYTES and raw.endswith(b"...")
    assert raw.decode("utf-8").startswith("éé")
    assert _encode("converged in 0.01 s") == b"converged in 0.01 s"


def _as_schema_1(path):
    """Turn a store into what schema 1 wrote: version 1, an empty reserved /branch_points,
    no momentum, the history as a /progress attribute, no checksums."""
    history = read_store(path).history
    with h5py.File(path, "r+") as f:
        f.attrs["schema_version"] = 1
        del f.attrs["header_checksum"]
        for name in ("branch_points", "momentum", "recovery", "progress/checksum",
                     "progress/history", "progress/slot"):
            del f[name]
        f.create_group("branch_points")
        f["progress"].attrs["history"] = json.dumps(history)


def test_schema_1_files_are_refused_for_resume_but_read(tmp_path, capsys):
    from tba.cli import main
    run = loads_run(TINY.replace("count = 4", "count = 2"), base_dir=tmp_path)
    run_scan(run, workers=1, log=io.StringIO())
    _as_schema_1(run.output)
    before = _sha(run.output)
    with pytest.raises(StoreError, match=f"schema version 1, this tba writes {SCHEMA_VERSION}") as info:
        run_scan(run, workers=1, log=io.StringIO())
    assert info.value.foreign and "\n" not in str(info.value)
    runfile = tmp_path / "tiny.toml"
    runfile.write_text(TINY.replace("count = 4", "count = 2"))
    capsys.readouterr()
    assert main(["run", str(runfile), "--workers", "1"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "schema version 1" in err[0] and "--force" in err[0]
    assert _sha(run.output) == before
    # still readable: report and plot work, the branch points count as not computed
    data = read_store(run.output)
    assert data.schema_version == 1 and (data.branch["status"] == NOT_COMPUTED).all()
    assert "schema version 1, which stored no branch points" in format_report(data)
    assert _sha(run.output) == before
    # --force starts again with this schema
    assert main(["run", str(runfile), "--workers", "1", "--force"]) == 0
    assert read_store(run.output).schema_version == SCHEMA_VERSION


def test_a_failing_branch_point_is_stored_and_keeps_the_scan(tmp_path, monkeypatch):
    import tba.physics.flow
    import tba.scans.points

    def broken(model, alpha, tol):
        if model.name == "lee-yang":
            raise RuntimeError("no luck\nsecond line")
        return tba.physics.flow.branch_point(model, alpha, tol=tol)

    monkeypatch.setattr(tba.scans.points, "branch_point", broken)
    run = loads_run(TINY.replace("count = 4", "count = 2").replace("alphas = [-0.2, 0, 0.5]",
                                                                  "alphas = [0.5]"), base_dir=tmp_path)
    log = io.StringIO()
    summary = run_scan(run, workers=1, log=log)
    assert summary.complete and summary.branch_points_computed == 2
    assert "failed (stored as failed): RuntimeError: no luck" in log.getvalue()
    data = read_store(run.output)
    assert data.complete and (data["status"] != NOT_COMPUTED).all()
    assert list(data.branch["status"][:, 0]) == [BP_FOUND, BP_FAILED]
    assert data.branch["message"][1, 0] == "RuntimeError: no luck"
    assert np.isnan(data.branch["branch_radius"][1, 0])
    report = format_report(data)
    assert "lee-yang, alpha = 0.5: failed: RuntimeError: no luck" in report
    # a failure is stored, hence not tried again on the next run
    summary = run_scan(run, workers=1, log=io.StringIO())
    assert summary.chunks_computed == 0 and summary.branch_points_computed == 0
