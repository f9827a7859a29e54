"""`tba export`: the stored flow check per point and `--branch-points`, checked against the
Dataset of the same file (`tba.open_scan`) and against the free fermion's closed form.

Flow relation (docs/physics.md section 4): E(R, alpha) = E_n(R + alpha E, 0) for P = 0, so the
stored flow_radius is R + alpha E and flow_prediction the undeformed level there. Free
Majorana fermion (no kernel; from memory, the textbook free-fermion TBA):
E_0(R) = -(1/2 pi) int dt cosh t log(1 + exp(-R cosh t)), bulk term excluded.
"""

import contextlib
import csv
import io
import json
import math

import numpy as np
import pytest
from scipy import integrate, optimize

import tba
from tba.cli import main
from tba.physics.flow import BranchPoint
from tba.scans.runfile import loads_run
from tba.store.driver import run_scan
from tba.store.hdf5 import BRANCH_RECORD_KEYS, FLOW_RECORD_KEYS

RUN = """\
# export test: free fermion, ground state and one-particle level
output = "exp.h5"
states = ["ground", "0"]

[[models]]
name = "free-fermion"

[deformation]
alphas = [-0.1, 0, 0.1]

[radii]
start = 1.0
stop = 2.0
count = 2

[solver]
tol = 1e-10
"""


def tba_main(*args):
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main([str(a) for a in args])
    return code, out.getvalue(), err.getvalue()


def free_e0(R):
    """Free Majorana fermion ground-state energy (closed form above, scipy quad)."""
    f = lambda t: math.cosh(t) * math.log1p(math.exp(-R * math.cosh(t)))  # noqa: E731
    return -integrate.quad(f, 0, 40, epsabs=1e-15, epsrel=1e-13, limit=200)[0] / math.pi


def free_e0_prime(R):
    def f(t):
        x = math.exp(-R * math.cosh(t))
        return math.cosh(t) ** 2 * x / (1 + x)

    return integrate.quad(f, 0, 40, epsabs=1e-15, epsrel=1e-13, limit=200)[0] / math.pi


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    run = loads_run(RUN, base_dir=tmp_path_factory.mktemp("export"))
    run_scan(run, workers=1, log=io.StringIO())
    return run.output


@pytest.fixture(scope="module")
def dataset(store):
    return tba.open_scan(store)


def _json_lines(*args):
    code, out, err = tba_main("export", "--json", *args)
    assert code == 0, err
    return [json.loads(line) for line in out.splitlines()]


def _at(ds, name, rec, *dims):
    return ds[name].sel({d: rec[d] for d in dims}).item()


def _same(value, stored):
    """An exported value against the Dataset's: None for NaN, else the same float."""
    return math.isnan(stored) if value is None else value == stored


def test_points_carry_the_stored_flow_check(store, dataset):
    recs = _json_lines(store)
    assert len(recs) == 3 * 2 * 2
    point = ("alpha", "radius", "state")
    for rec in recs:
        assert set(FLOW_RECORD_KEYS) <= set(rec)
        assert _same(rec["flow_radius"], _at(dataset, "flow_radius", rec, *point))
        if rec["alpha"] == 0:  # nothing to check at alpha = 0 (the relation is the identity)
            assert rec["flow_status"] == "not-applicable"
            assert rec["flow_prediction"] is rec["flow_residual"] is rec["flow_error"] is None
            assert rec["flow_radius"] is None
            continue
        assert rec["flow_status"] == "converged"
        for key in ("flow_prediction", "flow_error", "flow_residual"):
            assert rec[key] == _at(dataset, key, rec, *point), key
        # flow_residual = |energy - flow_prediction| (docs/physics.md section 4), to rounding
        diff = abs(rec["energy"] - rec["flow_prediction"])
        assert abs(rec["flow_residual"] - diff) <= 4 * np.finfo(float).eps * abs(rec["energy"])
        # the flow relation holds within the two error estimates
        assert rec["flow_residual"] <= rec["error"] + rec["flow_error"]
        # P = 0: R~ = R + alpha E (docs/physics.md section 4)
        assert rec["flow_radius"] == pytest.approx(rec["radius"] + rec["alpha"] * rec["energy"],
                                                   rel=1e-14)
        if rec["state"] == "ground":  # the prediction is E_0(R~, 0): the closed form above
            exact = free_e0(rec["flow_radius"])
            assert abs(rec["flow_prediction"] - exact) <= rec["flow_error"] + 1e-14


def test_csv_has_the_flow_columns_with_the_json_values(store):
    recs = _json_lines(store)
    code, out, err = tba_main("export", "--csv", store)
    assert code == 0, err
    rows = list(csv.DictReader(io.StringIO(out)))
    assert list(rows[0])[-5:] == list(FLOW_RECORD_KEYS)
    assert len(rows) == len(recs)
    for row, rec in zip(rows, recs):
        assert row["flow_status"] == rec["flow_status"]
        for key in FLOW_RECORD_KEYS[:-1]:
            assert (row[key] == "") if rec[key] is None else (float(row[key]) == rec[key]), key


def test_branch_points_equal_the_datasets(store, dataset):
    recs = _json_lines("--branch-points", store)
    # ground state per alpha, level "0" per alpha
    assert [(r["state"], r["alpha"]) for r in recs] == [(s, a) for s in ("ground", "0")
                                                        for a in (-0.1, 0.0, 0.1)]
    for rec in recs:
        assert list(rec) == list(BRANCH_RECORD_KEYS)
        prefix = "branch_" if rec["state"] == "ground" else "level_branch_"
        dims = ("alpha",) if rec["state"] == "ground" else ("alpha", "state")
        for key in ("radius", "radius_error", "energy", "energy_error", "effective_radius"):
            stored = _at(dataset, prefix + key, rec, *dims)
            value = rec[f"branch_{key}"]
            assert (value is None and rec["status"] != "found") or value == stored, key
        assert rec["message"] == _at(dataset, prefix + "message", rec, *dims)
    found = [r for r in recs if r["status"] == "found"]
    ground = [r for r in found if r["state"] == "ground"]
    assert [r["alpha"] for r in ground] == [0.1]  # alpha <= 0: no Hagedorn branch point
    # R_c = R~ - alpha E_0(R~) with E_0'(R~) = 1/alpha (docs/physics.md section 4), from the
    # closed form above
    rec = ground[0]
    r_star = optimize.brentq(lambda r: free_e0_prime(r) - 1 / rec["alpha"], 0.05, 1.0, xtol=1e-15)
    r_c = r_star - rec["alpha"] * free_e0(r_star)
    assert abs(rec["branch_radius"] - r_c) <= rec["branch_radius_error"] + 1e-12
    assert abs(rec["branch_energy"] - free_e0(r_star)) <= rec["branch_energy_error"] + 1e-12
    # the keys are those of tba branch-point --json (the derived T_H aside), plus coupling
    keys = set(BranchPoint("free-fermion", 0.1, "none").as_record(deprecated=False))
    assert set(BRANCH_RECORD_KEYS) == keys - {"hagedorn_temperature"} | {"coupling"}


def test_branch_points_csv(store):
    recs = _json_lines("--branch-points", store)
    code, out, err = tba_main("export", "--branch-points", "--csv", store)
    assert code == 0, err
    rows = list(csv.DictReader(io.StringIO(out)))
    assert list(rows[0]) == list(BRANCH_RECORD_KEYS) and len(rows) == len(recs)
    for row, rec in zip(rows, recs):
        assert row["status"] == rec["status"] and row["message"] == rec["message"]
        for key in ("branch_radius", "branch_energy", "branch_effective_radius"):
            assert (row[key] == "") if rec[key] is None else (float(row[key]) == rec[key]), key


def test_a_run_without_branch_points_says_so(tmp_path):
    text = (RUN.replace('states = ["ground", "0"]', "")
            .replace("alphas = [-0.1, 0, 0.1]", "alphas = [0.1]")
            .replace("stop = 2.0", "stop = 1.0").replace("count = 2", "count = 1")
            + "\n[scan]\nbranch_points = false\n")
    run = loads_run(text, base_dir=tmp_path)
    run_scan(run, workers=1, log=io.StringIO())
    code, out, err = tba_main("export", "--branch-points", "--json", run.output)
    assert code == 0 and out == "" and "scan.branch_points = false" in err
    code, out, err = tba_main("export", "--branch-points", "--csv", run.output)
    assert code == 0 and out.splitlines() == [",".join(BRANCH_RECORD_KEYS)]
