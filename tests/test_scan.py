"""Scans: chunks, determinism (serial = parallel), flow checks, and the run / report / export /
demo commands end to end."""

import csv
import io
import json
import subprocess
import sys

import h5py
import numpy as np
import pytest

import tba.cli.commands
import tba.scans.runfile
from tba.cli import main
from tba.solvers.result import STATUS_CODES, Status
from tba.scans.runfile import loads_run
from tba.scans.points import solve_branch_point, solve_chunk
from tba.store.driver import run_scan
from reference import free_fermion_ns_energy_derivative
from tba.store.hdf5 import (BP_FOUND, BP_NONE, BP_NOT_APPLICABLE, BRANCH_VARIABLES, FLOW_NOT_APPLICABLE,
                         FLOW_OFF, POINT_VARIABLES, read_store)

RUN = """\
# tiny scan for the tests: Lee-Yang and the free fermion, a few radii
description = "tiny scan"
output = "scan.h5"

[[models]]
name = "lee-yang"

[[models]]
name = "free-fermion"

[deformation]
alphas = [-0.1, 0.3]

[radii]
start = 0.4
stop = 2.0
count = 5

[solver]
tol = 1e-10

[scan]
chunk_size = 2
"""
NUMBERS = [name for name, (kind, _, _) in POINT_VARIABLES.items() if kind != "str"]
SOLVE_KEYS = {"model", "coupling", "radius", "alpha", "cdd_couplings", "energy", "error", "status",
              "iterations", "message", "couplings"}  # couplings: deprecated, one release
#: tba export: the solve keys (without rapidities, not stored) plus state, momentum and the
#: stored flow check
EXPORT_KEYS = SOLVE_KEYS | {"state", "momentum", "flow_radius", "flow_prediction", "flow_error",
                            "flow_residual", "flow_status"}


def _write(tmp_path, text=RUN, name="scan.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


def _same_numbers(a, b):
    for name in NUMBERS:
        assert np.array_equal(a[name], b[name], equal_nan=True), name
    for name, (kind, _, _) in BRANCH_VARIABLES.items():
        if kind != "str":
            assert np.array_equal(a.branch[name], b.branch[name], equal_nan=True), name


def test_a_chunk_is_deterministic(tmp_path):
    run = loads_run(RUN, base_dir=tmp_path)
    chunk = run.chunks()[1]
    _, first, _ = solve_chunk(run, chunk)
    _, again, _ = solve_chunk(run, chunk)
    for name in NUMBERS:
        assert np.array_equal(first[name], again[name], equal_nan=True)
    assert first["status"].shape == (chunk.size,)


def test_parallel_equals_serial(tmp_path):
    run = loads_run(RUN, base_dir=tmp_path)
    serial = run_scan(run, tmp_path / "serial.h5", workers=1, log=io.StringIO())
    parallel = run_scan(run, tmp_path / "parallel.h5", workers=2, log=io.StringIO())
    assert serial.complete and parallel.complete and parallel.workers == 2
    _same_numbers(read_store(tmp_path / "serial.h5"), read_store(tmp_path / "parallel.h5"))


def test_flow_residuals_are_small_and_statuses_say_why(tmp_path):
    run = loads_run(RUN, base_dir=tmp_path)
    run_scan(run, workers=1, log=io.StringIO())
    d = read_store(run.output)
    ok = d["flow_status"] == STATUS_CODES[Status.CONVERGED]
    assert ok.sum() >= 15
    # E(R, alpha) = E_0(R + alpha E, 0) exactly for the TTbar ground state (docs/physics.md section 4):
    # the residual must lie within the error estimates of both solves; the prediction's
    # estimate carries the propagated error of E, |alpha E_0'(R~)| err(E), with E_0' here
    # from the free fermion's Bessel series (Mussardo, Statistical Field Theory (2010);
    # tests/reference.py), not from the solver
    assert np.all(d["flow_residual"][ok] <= (d["error"] + d["flow_error"])[ok] + 1e-15)
    alphas = np.asarray(run.alphas)[None, :, None, None]
    slope = np.vectorize(free_fermion_ns_energy_derivative)(np.where(ok, d["flow_radius"], 1.0))
    assert np.all(d["flow_error"][ok] >= (np.abs(alphas * slope) * d["error"])[ok])
    # higher-spin factors: the relation is not exact, so not applicable; flow_check = false: off
    hs = loads_run(RUN.replace("alphas = [-0.1, 0.3]", "alphas = [0.1]\nhigher_spin = { 3 = 0.01 }")
                   .replace('name = "free-fermion"', 'name = "sinh-gordon"\ncoupling = 1.0'),
                   base_dir=tmp_path)
    _, values, _ = solve_chunk(hs, hs.chunks()[0])
    assert (values["flow_status"] == FLOW_NOT_APPLICABLE).all()
    # ... and so is the branch point from the undeformed curve (nothing is solved for it)
    bp = solve_branch_point(hs, 1, 0)
    assert bp["status"] == BP_NOT_APPLICABLE and "spin 3" in bp["message"] and "branch_radius" not in bp
    off = loads_run(RUN + "flow_check = false\n", base_dir=tmp_path)
    _, values, _ = solve_chunk(off, off.chunks()[0])
    assert (values["flow_status"] == FLOW_OFF).all() and np.isnan(values["flow_residual"]).all()


def test_sweep_direction_changes_nothing_physical(tmp_path):
    down = loads_run(RUN, base_dir=tmp_path)
    up = loads_run(RUN + 'sweep = "ascending"\n', base_dir=tmp_path)
    assert up.run_id != down.run_id
    _, a, _ = solve_chunk(down, down.chunks()[0])
    _, b, _ = solve_chunk(up, up.chunks()[0])
    assert np.allclose(a["energy"], b["energy"], rtol=1e-10, atol=0)


def test_run_report_export_end_to_end(tmp_path, capsys):
    runfile = _write(tmp_path)
    assert main(["run", str(runfile), "--workers", "1"]) == 0
    err = capsys.readouterr().err
    assert "computed 12 chunks (0 were already done) and 4 branch points" in err
    h5 = tmp_path / "scan.h5"
    assert h5.exists()
    # again: a complete file is not recomputed
    assert main(["run", str(runfile)]) == 0
    assert "nothing to compute" in capsys.readouterr().err

    assert main(["report", str(h5)]) == 0
    report = capsys.readouterr().out
    assert "converged" in report and "12 of 12 done (complete)" in report
    assert "flow residual" in report and "worst error estimate" in report
    # branch points at alpha = 0.3 (R_c ~ 0.48 for Lee-Yang, 0.53 for the free fermion, by
    # the CFT estimate sqrt(2 pi c alpha / 3), docs/physics.md section 4), with T_H = 1/R_c and the
    # check against the scan's last real point
    assert "branch points of the ground state" in report and "last real point" in report
    assert "T_H = 1/R_c" in report
    d = read_store(h5)
    assert (d.branch["status"][:, 0] == BP_NONE).all() and (d.branch["status"][:, 1] == BP_FOUND).all()
    lines = report.splitlines()
    table = lines.index(next(ln for ln in lines if ln.startswith("branch points of the ground state")))
    for m, label in enumerate(d.model):
        row = next(ln for ln in lines[table:] if ln.strip().startswith(label)).split()
        Rc = d.branch["branch_radius"][m, 1]
        assert row[1:3] == ["0.3", "found"] and float(row[3]) == pytest.approx(Rc, rel=1e-11)
        assert float(row[5]) == pytest.approx(d.branch["energy"][m, 1], rel=1e-11)
        assert float(row[6]) == pytest.approx(1 / Rc, rel=1e-5)
        assert row[-1] == "yes"
    assert ("consistency with the scan (last real R >= R_c, and the next R down < R_c where it has "
            "no real solution): holds for all 2 checked curve(s)") in report
    # the check can fail: an R_c above the last real radius, or below the next one down
    from tba.output.report import format_report
    real = d["status"][:, 1, :, 0] == STATUS_CODES[Status.CONVERGED]
    last = [d.radius[np.flatnonzero(r)[0]] for r in real]
    d.branch["branch_radius"][0, 1] = last[0] * 1.01
    d.branch["branch_radius"][1, 1] = 0.5 * d.radius[0]
    bad = format_report(d)
    assert "FAILS for 2 of 2 checked curve(s)" in bad
    assert f"lee-yang, alpha = 0.3: last real R = {last[0]:.6g} < R_c" in bad
    assert not real[1, 0]  # the free fermion at R = 0.4 < R_c: no real solution, so it must lie below R_c
    assert f"free-fermion, alpha = 0.3: R = {d.radius[0]:.6g} has no real solution but is >= R_c" in bad
    for line in report.splitlines():
        if line.strip().startswith("lee-yang") and "checked" not in line:
            assert "-0.1" in line or "0.3" in line

    assert main(["export", str(h5), "--json"]) == 0
    records = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert len(records) == 20
    assert all(set(r) == EXPORT_KEYS for r in records)
    assert {r["status"] for r in records} <= {"converged", "no-real-solution"}

    out = tmp_path / "scan.csv"
    assert main(["export", str(h5), "--csv", "-o", str(out)]) == 0
    with out.open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 20 and set(rows[0]) == EXPORT_KEYS
    for rec, row in zip(records, rows):
        assert row["energy"] == ("" if rec["energy"] is None else repr(rec["energy"]))
        assert float(row["radius"]) == rec["radius"] and json.loads(row["cdd_couplings"]) == rec["cdd_couplings"]


def test_export_matches_tba_solve_for_the_same_chain(tmp_path, capsys):
    # one chunk holding all radii, swept downwards, is the chain `tba solve` runs when given
    # the radii in decreasing order: the numbers agree bit for bit and the keys are the same
    text = RUN.replace("chunk_size = 2", "chunk_size = 5").replace("alphas = [-0.1, 0.3]", "alphas = [0.3]")
    runfile = _write(tmp_path, text)
    assert main(["run", str(runfile), "--workers", "1"]) == 0
    capsys.readouterr()
    assert main(["export", str(tmp_path / "scan.h5"), "--json"]) == 0
    exported = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    radii = sorted({r["radius"] for r in exported}, reverse=True)
    assert main(["solve", "--model", "lee-yang", "--alpha", "0.3", "--tol", "1e-10", "--json",
                 "--radius", *map(repr, radii)]) == 0
    solved = {r["radius"]: r for r in map(json.loads, capsys.readouterr().out.splitlines())}
    for rec in (r for r in exported if r["model"] == "lee-yang"):
        ref = solved[rec["radius"]]
        assert set(ref) == set(rec) - (EXPORT_KEYS - SOLVE_KEYS)
        for key in SOLVE_KEYS - {"message"}:
            assert rec[key] == ref[key], key


def test_out_option_and_bad_workers(tmp_path, capsys):
    runfile = _write(tmp_path, RUN.replace("count = 5", "count = 2"))
    assert main(["run", str(runfile), "--workers", "0"]) == 2
    assert "--workers" in capsys.readouterr().err
    other = tmp_path / "sub" / "elsewhere.h5"
    assert main(["run", str(runfile), "-o", str(other), "--workers", "1"]) == 0
    assert other.exists() and not (tmp_path / "scan.h5").exists()
    # a different run into the same file: refused, exit 2, one line; --force replaces it
    runfile2 = _write(tmp_path, RUN.replace("count = 5", "count = 3"), "other.toml")
    capsys.readouterr()
    assert main(["run", str(runfile2), "-o", str(other)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "different run" in err[0] and "radii" in err[0]
    assert main(["run", str(runfile2), "-o", str(other), "--force", "--workers", "1"]) == 0
    assert len(read_store(other).radius) == 3


def test_report_and_export_reject_bad_files(tmp_path, capsys):
    bad = tmp_path / "x.h5"
    bad.write_text("nope")
    for args in (["report", str(bad)], ["export", str(bad), "--json"], ["report", str(tmp_path / "none.h5")]):
        assert main(args) == 2
        assert len(capsys.readouterr().err.strip().splitlines()) == 1


DEMO_LIKE = RUN.replace('output = "scan.h5"', 'output = "out/demo.h5"')


def test_demo_code_path_with_a_tiny_run(tmp_path, capsys, monkeypatch):
    # `tba demo` with its run file swapped for a tiny one: same code path, seconds instead of ~10 s
    runfile = _write(tmp_path, DEMO_LIKE, "demo.toml")
    # tba demo imports demo_run_path from tba.scans.runfile when it runs
    monkeypatch.setattr(tba.scans.runfile, "demo_run_path", lambda: (runfile, False))
    monkeypatch.chdir(tmp_path)
    assert main(["demo", "--workers", "1"]) == 0
    out = capsys.readouterr().out
    # outside the source tree the demo writes to ./tba-demo-out/
    h5, png = tmp_path / "tba-demo-out" / "demo.h5", tmp_path / "tba-demo-out" / "demo.png"
    assert h5.exists() and png.exists() and str(png) in out
    assert "points per status" in out and "flow residual" in out
    with h5py.File(h5, "r") as f:
        assert f.attrs["run_file"] == str(runfile)
        assert json.loads(f.attrs["run"])["output"] == str(h5)
        assert f["energy"].dims[2].keys() == ["radius"]
    xr = pytest.importorskip("xarray")
    pytest.importorskip("h5netcdf")
    with xr.open_dataset(h5, engine="h5netcdf") as ds:
        assert dict(ds.sizes) == {"model": 2, "alpha": 2, "radius": 5, "state": 1}
        assert ds.attrs["package_version"] and "conventions" in ds.attrs
    # a second demo reuses the complete file; one from another run is replaced, with a note
    assert main(["demo"]) == 0
    assert "nothing to compute" in capsys.readouterr().err
    runfile.write_text(DEMO_LIKE.replace("count = 5", "count = 3"))
    assert main(["demo", "--workers", "1"]) == 0
    assert "replacing it" in capsys.readouterr().err
    assert len(read_store(h5).radius) == 3


def test_demo_in_a_fresh_process_help():
    proc = subprocess.run([sys.executable, "-m", "tba", "demo", "--help"], capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 0 and "runs/demo.toml" in proc.stdout


LEVELS_RUN = """\
# excited levels in a scan: sinh-Gordon (two-particle levels with P = 0 and P != 0, the
# one-particle level) and Lee-Yang (its one-particle state "0"; no two-particle levels here)
description = "levels"
output = "levels.h5"
radii = [0.8, 1.5, 3.0]
states = ["ground", "1/2,-1/2", "0", "1/2,3/2"]

[[models]]
name = "sinh-gordon"
coupling = 0.6

[[models]]
name = "lee-yang"

[deformation]
alphas = [-0.1, 0.1]

[scan]
chunk_size = 2
"""


@pytest.fixture(scope="module")
def levels_store(tmp_path_factory):
    path = _write(tmp_path_factory.mktemp("levels"), LEVELS_RUN, "levels.toml")
    run = loads_run(LEVELS_RUN, base_dir=path.parent)
    run_scan(run, workers=1, log=io.StringIO())
    return run, read_store(run.output)


def test_scan_of_excited_levels(levels_store):
    from threadpoolctl import threadpool_limits

    from tba.solvers.levels import solve_level
    from tba.store.hdf5 import NOT_AVAILABLE

    run, d = levels_store
    assert d.state == ["ground", "-1/2,1/2", "0", "1/2,3/2"]
    sg, ly = 0, 1
    st = d["status"]
    # Lee-Yang has no two-particle levels here: not computed, and the file says why
    for s in (1, 3):
        assert np.all(st[ly, :, :, s] == NOT_AVAILABLE)
        assert all("one-particle" in m for m in d["message"][ly, :, :, s].ravel())
    # P R = 2 pi sum I_k (momentum quantisation, docs/physics.md section 5): 2 pi * 2 for 1/2,3/2
    ok = st[sg, :, :, 3] == STATUS_CODES[Status.CONVERGED]
    assert ok.all()
    P = d["momentum"][sg, :, :, 3]
    assert np.allclose(P * d.radius[None, :], 4 * np.pi, rtol=1e-12, atol=0)
    assert np.all(d["momentum"][sg, :, :, :3][d["status"][sg, :, :, :3] == 0] == pytest.approx(0, abs=1e-12))
    # the flow relation, boosted for P != 0, is exact: residual within the error estimates
    # (docs/physics.md section 4; the deformed driving term (R + alpha E) cosh t - alpha P sinh t,
    # section 5)
    checked = d["flow_status"] == STATUS_CODES[Status.CONVERGED]
    assert checked[sg, :, :, 3].all() and checked[ly, :, :, 2].sum() >= 5
    res, est = d["flow_residual"][checked], (d["error"] + d["flow_error"])[checked]
    assert np.all(res <= est)
    # Lee-Yang's one-particle level for alpha = -0.1 meets its branch point near R = 0.97
    # (tests/test_lee_yang_state.py): no real solution at R = 0.8
    assert st[ly, 0, 0, 2] == STATUS_CODES[Status.NO_REAL_SOLUTION]
    assert st[ly, 0, 1, 2] == STATUS_CODES[Status.CONVERGED]
    # a chunk is the chain tba.solvers.levels.solve_level runs, downwards from its largest radius
    # (with one BLAS thread, as in every chunk), bit for bit
    model = run.models[sg].build()
    with threadpool_limits(limits=1, user_api="blas"):
        first = solve_level(model, 1.5, "1/2,3/2", run.deformation(0.1), tol=run.tol)
        second = solve_level(model, 0.8, "1/2,3/2", run.deformation(0.1), tol=run.tol, start=first)
    assert d["energy"][sg, 1, 1, 3] == first.energy and d["energy"][sg, 1, 0, 3] == second.energy


def test_excited_levels_in_parallel_equal_serial(levels_store, tmp_path):
    # the serial run of the same resolved run is the reference: worker processes (one BLAS
    # thread each) give the same bits
    run, d = levels_store
    parallel = run.with_output(tmp_path / "parallel.h5")
    run_scan(parallel, workers=2, log=io.StringIO())
    _same_numbers(d, read_store(parallel.output))


def test_plot_and_report_of_excited_levels(levels_store, tmp_path):
    from tba.output.plotting import plot_store
    from tba.output.report import format_report

    run, d = levels_store
    fig = plot_store(d)
    titles = [ax.get_title() for ax in fig.axes if ax.get_title()]
    # one column per (model, state) the model has: 4 for sinh-Gordon, 2 for Lee-Yang
    assert len(titles) == 6 and "scaling Lee-Yang:\none-particle level I = 0" in titles
    report = format_report(d)
    assert "not-available" in report
    # the level's stored fold (its R_c +- error), between the scan's last real radius and the
    # next one down, which has no real solution (tests/test_lee_yang_state.py: near R = 0.97)
    section = report[report.index("branch points of the excited levels"):]
    row = next(ln for ln in section.splitlines() if ln.strip().startswith("lee-yang"))
    cells = row.split()
    assert cells[1:3] == ["-0.1", "0"] and cells[-1] == "yes"
    assert 0.8 < float(cells[3]) < 1.5 and float(cells[4]) < 1e-9
