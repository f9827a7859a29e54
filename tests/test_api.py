"""The public face of the package: names at the top of ``tba``, ``tba.solve`` for any level,
argument errors that name the argument, readable reprs. The energies are checked against the
free fermion's exact spectrum (Bessel series with scipy.special.k1)."""

import html
import json
import math
import subprocess
import sys

import numpy as np
import pytest
from scipy.special import k1

import tba
from reference import free_fermion_ns_energy


def free_fermion_r_energy(radius):
    """Periodic (Ramond) sector ground state E_R(R) = +(1/pi) sum_k K_1(k R) / k: the NS series
    with log(1 - e^{-R cosh t}) in place of log(1 + ...) (textbook, e.g. G. Mussardo,
    Statistical Field Theory, Oxford 2010, from memory)."""
    k = np.arange(1, int(60.0 / radius) + 51, dtype=float)
    return math.fsum((k1(k * radius) / k).tolist()) / math.pi


def test_every_public_name_resolves():
    for name in tba.__all__:
        assert getattr(tba, name) is not None, name
    assert set(tba.__all__) <= set(dir(tba))
    with pytest.raises(AttributeError, match="no attribute 'solve_everything'"):
        tba.solve_everything  # noqa: B018


def test_lazy_names_do_not_load_the_io_stack():
    # solvers and physics from the top of tba, without h5py, matplotlib or xarray
    code = ("import sys, tba; tba.solve_excited, tba.branch_point, tba.locate_fold, "
            "tba.thermodynamics, tba.level_name; heavy = [m for m in ('h5py', 'matplotlib', "
            "'xarray', 'dask', 'tqdm') if m in sys.modules]; print(','.join(heavy)); "
            "sys.exit(1 if heavy else 0)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stdout + out.stderr


def test_solve_any_level_of_the_free_fermion_against_the_exact_spectrum():
    # free fermion: E = E_sector(R) + sum_j cosh t_j with R sinh t_j = 2 pi I_j, the NS sector
    # for an even number of particles (half-odd I_j), R for an odd one (integer I_j)
    ff, R = tba.free_fermion(), 2.0
    ground = tba.solve(ff, R)
    assert ground.energy == pytest.approx(free_fermion_ns_energy(R), rel=1e-12, abs=1e-15)
    two = tba.solve(ff, R, state="1/2,-1/2")
    assert two.energy == pytest.approx(free_fermion_ns_energy(R) + 2 * math.hypot(1, math.pi / R),
                                       rel=1e-12)
    one = tba.solve(ff, R, state=["0"])
    assert one.energy == pytest.approx(free_fermion_r_energy(R) + 1.0, rel=1e-12)
    for res in (ground, two, one):
        assert res.converged and res.error < 1e-11
    # the same numbers as the level dispatcher and the ground-state solver
    assert tba.solve(ff, R, tba.ttbar(0.1)).energy == tba.solve_ground_state(ff, R, tba.ttbar(0.1)).energy
    assert tba.level_name(["1/2", "-1/2"]) == "-1/2,1/2"


def test_solve_names_its_arguments_in_errors():
    ff = tba.free_fermion()
    for bad in (3, None, 0.5, True):
        with pytest.raises(TypeError, match="state"):
            tba.solve(ff, 1.0, state=bad)
    with pytest.raises(ValueError, match="state"):
        tba.solve(tba.ising_e8(), 1.0, state="0")  # E8 has no excited levels here
    with pytest.raises(ValueError, match="radius"):
        tba.solve(ff, -1.0)
    with pytest.raises(ValueError, match="tol"):
        tba.solve(ff, 1.0, tol=0.5)


def test_reprs_show_the_point_in_full_precision():
    sg = tba.sinh_gordon(0.6)
    res = tba.solve(sg, 1.0, tba.ttbar(0.2))
    text = repr(res)
    assert text.startswith("SolveResult(sinh-gordon B=0.6, ground state, R = 1.0, alpha = 0.2: converged")
    # the energy as printed reads back to the same float
    printed = text.split("E = ")[1].split(" +- ")[0]
    assert float(printed) == res.energy
    table = res._repr_html_()
    assert table.startswith("<table>") and html.escape(res.message) in table and "<td" in table
    excited = tba.solve(sg, 2.0, tba.ttbar(-0.1), state="1/2,-1/2")
    assert "state -1/2,1/2" in repr(excited) and "rapidities = (" in repr(excited)
    failed = tba.solve(sg, 0.3, tba.ttbar(0.2))  # past the branch point (R_c ~ 0.54)
    assert "no-real-solution" in repr(failed) and failed.message[:20] in repr(failed)
    assert "E = " not in repr(failed)


def test_records_are_plain_python_values():
    res = tba.solve(tba.sinh_gordon(0.6), 2.0, tba.ttbar(np.float64(0.1)), state="1/2,-1/2")
    record = res.as_record()
    json.dumps(record)
    for key in ("radius", "alpha", "energy", "error", "momentum"):
        assert type(record[key]) is float, key
    assert all(type(v) is float for v in record["cdd_couplings"].values())
