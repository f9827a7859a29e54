"""The massless models on the command line (tba models, tba solve), in run files and scans
(tba.scan: the same chunks as tba run, written to a store and read back), in the report and in
figures. Values against the closed form of deformed conformal levels (docs/physics.md sections 4
and 9; Smirnov and Zamolodchikov, Nucl. Phys. B915 (2017) 363, from memory).
"""

import json
import math

import numpy as np
import pytest

import tba
from tba.cli import main
from tba.scans.runfile import RunFileError, loads_run


def closed_form(R, alpha, c, D=0.0, Dbar=0.0):
    E0 = 2 * math.pi * (D + Dbar - c / 12) / R
    P = 2 * math.pi * (D - Dbar) / R
    x = 4 * alpha * E0 / R + 4 * alpha ** 2 * P ** 2 / R ** 2
    return (2 * E0 + 2 * alpha * P * P / R) / (math.sqrt(1 + x) + 1)


def lines(capsys):
    return [json.loads(line) for line in capsys.readouterr().out.splitlines()]


def test_models_json_lists_the_massless_models(capsys):
    # c = 1/2, n and 7/10 from the dilogarithm sums (Rogers' dilogarithm; docs/physics.md section 9)
    assert main(["models", "--json", "massless-fermion", "massless-bosons", "tricritical-to-ising",
                 "--coupling", "24"]) == 0
    recs = {r["name"]: r for r in lines(capsys)}
    assert all(r["massless"] for r in recs.values())
    assert recs["massless-fermion"]["c_eff"] == pytest.approx(0.5, rel=1e-14)
    assert recs["massless-bosons"]["c_eff"] == pytest.approx(24.0, rel=1e-14)
    assert recs["massless-bosons"]["parameters"] == {"n": {"range": "integer, 1 <= n <= 1024",
                                                           "value": 24}}
    assert recs["tricritical-to-ising"]["c_eff"] == pytest.approx(0.7, rel=1e-14)
    assert recs["tricritical-to-ising"]["spins"] == {"modulus": None, "residues": [1]}


def test_solve_json_for_a_level_of_the_string(capsys):
    # 24 bosons, (D, Dbar) = (2, 1): the Nambu-Goto level (Arvis, Phys. Lett. B127 (1983) 106)
    assert main(["solve", "--model", "massless-bosons", "--coupling", "24", "--radius", "3", "2",
                 "--alpha", "0.05", "--state", "1,1,-1", "--json"]) == 0
    recs = lines(capsys)
    for r in recs:
        assert r["status"] == "converged" and r["state"] == [-1, 1, 1] and r["coupling"] == 24
        exact = closed_form(r["radius"], 0.05, 24, 2, 1)
        assert abs(r["energy"] - exact) <= r["error"] <= 1e-12 * max(abs(exact), 1 / r["radius"])
        assert r["momentum"] == pytest.approx(2 * math.pi / r["radius"], rel=1e-13)


@pytest.mark.parametrize("args, name", [
    (["--model", "massless-fermion", "--radius", "1", "--state", "0"], "--state"),
    (["--model", "massless-bosons", "--coupling", "1", "--radius", "1", "--state", "1/2"], "--state"),
    (["--model", "tricritical-to-ising", "--radius", "1", "--state", "-1/2,1/2"], "--state"),
    (["--model", "massless-bosons", "--radius", "1"], "--coupling"),
    (["--model", "massless-bosons", "--coupling", "0", "--radius", "1"], "--coupling"),
    (["--model", "massless-fermion", "--radius", "1", "--cdd", "3:0.1"], "--cdd"),
])
def test_bad_input_one_line_exit_2(args, name, capsys):
    assert main(["solve", *args]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and name in err[0], err


def test_run_file_states_and_models():
    text = """
output = "out.h5"
states = ["ground", "1", "1,1", "-1/2,1/2"]
[[models]]
name = "massless-bosons"
coupling = 24
[[models]]
name = "massless-fermion"
[deformation]
alphas = [0.05]
[radii]
start = 1.0
stop = 2.0
count = 2
"""
    run = loads_run(text)
    assert [m.label for m in run.models] == ["massless-bosons n=24", "massless-fermion"]
    assert run.states == ("ground", "1", "1,1", "-1/2,1/2")
    missing = {(run.models[m].name, run.states[s]) for m, s, _ in run.unavailable}
    # bosons take integers (repeats too), the fermion half-odd numbers for an even number
    assert missing == {("massless-bosons", "-1/2,1/2"), ("massless-fermion", "1,1")}
    with pytest.raises(RunFileError, match=r"^models\[0\]\.coupling"):
        loads_run(text.replace("coupling = 24", "coupling = 2.5"))


def test_scan_flow_check_branch_points_and_figure():
    # the scan's own flow check (the same level undeformed at R~, boosted for P != 0) and the
    # branch radius R_c = sqrt(2 pi c alpha / 3) of the deformed CFT (docs/physics.md section 4)
    # (24 bosons at alpha = 0.05: R_c = 1.585, so R = 1.5 has no real ground state)
    ds = tba.scan([tba.massless_fermion(), tba.massless_bosons(24)], radii=[1.5, 3.0],
                  alphas=[-0.05, 0.05], states=["ground", "1"], chunk_size=2)
    below = ds.sel(model="massless-bosons n=24", alpha=0.05, radius=1.5, state="ground")
    assert int(below.status) == 1  # no-real-solution
    ok = ds.status.values == 0
    assert ok.sum() == ok.size - 1 and (ds.flow_status.values[ok] == 0).all()
    assert (ds.flow_residual.values[ok] <= (ds.flow_error.values + ds.error.values)[ok]).all()
    c = {"massless-fermion": 0.5, "massless-bosons n=24": 24.0}
    # (D, Dbar): state "1" is one right mover, (1, 0) for bosons and the Ramond (17/16, 1/16)
    # for the fermion (an odd number of particles)
    D = {("massless-fermion", "1"): (17 / 16, 1 / 16), ("massless-bosons n=24", "1"): (1, 0)}
    for model in ds.model.values:
        for alpha in (-0.05, 0.05):
            for R in (1.5, 3.0):
                for state in ("ground", "1"):
                    d, db = D.get((model, state), (0, 0))
                    if (model, alpha, R, state) == ("massless-bosons n=24", 0.05, 1.5, "ground"):
                        continue
                    point = ds.sel(model=model, alpha=alpha, radius=R, state=state)
                    exact = closed_form(R, alpha, c[model], d, db)
                    assert abs(float(point.energy) - exact) <= float(point.error)
        R_c = float(ds.branch_radius.sel(model=model, alpha=0.05))
        assert R_c == pytest.approx(math.sqrt(2 * math.pi * c[model] * 0.05 / 3), rel=1e-12)
    fig = tba.plot_scan(ds, panels=["energy", "gap"])
    titles = [ax.get_title() for ax in fig.axes if ax.get_title()]
    assert any("free massless bosons, n = 24" in t for t in titles), titles
    # the gap of a massless level falls like 2 pi (D + Dbar) / R: no N m_1 threshold line
    gap_axes = [ax for ax in fig.axes if ax.get_label() == "gap"]
    assert len(gap_axes) == 2
    for ax in gap_axes:  # every line is a curve over the scan's radii (an axhline spans x = 0..1)
        assert all(list(np.atleast_1d(line.get_xdata())) == [1.5, 3.0] for line in ax.lines)
