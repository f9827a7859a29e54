"""The flow relation of excited levels and of higher spins from exact derivatives
(`level_flow_residual`, `spin_flow_residual`, `excited_derivatives`) and `tba flow-check --state`
/ `--cdd`."""

import json
import math

import pytest
from scipy.special import kv, kvp

import tba
from tba.cli import main
from tba.physics.flow import level_flow_residual, spin_flow_residual
from tba.solvers.excited import excited_derivatives


def fd4(f, x, h):
    """Fourth-order centred difference (common practice: truncation h^4 f^(5) / 30)."""
    return (8 * (f(x + h) - f(x - h)) - (f(x + 2 * h) - f(x - 2 * h))) / (12 * h)


@pytest.mark.parametrize("state, alpha", [("1/2,3/2", 0.1), ("-1/2,1/2", -0.1)])
def test_excited_derivatives_against_finite_differences(state, alpha):
    sg = tba.sinh_gordon(0.6)
    E = lambda R, a: tba.solve(sg, R, tba.ttbar(a), state=state, tol=1e-13).energy  # noqa: E731
    res = tba.solve(sg, 2.0, tba.ttbar(alpha), state=state, tol=1e-13)
    d = excited_derivatives(res)
    assert abs(d["dE_dR"] - fd4(lambda R: E(R, alpha), 2.0, 1e-3)) < 1e-9 * abs(d["dE_dR"])
    assert abs(d["dE_dalpha1"] - fd4(lambda a: E(2.0, a), alpha, 1e-3)) < 1e-7 * abs(d["dE_dalpha1"])
    # the Burgers equation with momentum, d_alpha E = E d_R E + P^2 / R, P R = 2 pi sum I_k
    # (docs/physics.md section 4; Smirnov and Zamolodchikov, Nucl. Phys. B915 (2017) 363)
    f = level_flow_residual(res)
    assert abs(f["residual"]) <= f["error"] < 1e-11 * f["scale"]


def test_free_fermion_spin_charges_closed_form():
    # free fermion, NS sector: E_s = -(1/pi) sum_k (-1)^(k+1) K_s(k R) / k from
    # log(1 + e^(-R cosh t)) expanded in e^(-k R cosh t) and int cosh(s t) e^(-x cosh t) = 2 K_s(x)
    # (textbook; scipy.special.kv); at alpha_s = 0 the generalised flow gives
    # dE/dalpha_s = s E_s dE_s/dR (derived in tba/models/cdd.py)
    R, s = 0.8, 3
    res = tba.solve(tba.free_fermion(), R, tol=1e-13)
    f = spin_flow_residual(res, s)
    ks = range(1, 80)
    Es = -sum((-1) ** (k + 1) * kv(s, k * R) / k for k in ks) / math.pi
    dEs = -sum((-1) ** (k + 1) * kvp(s, k * R) for k in ks) / math.pi
    assert abs(f["E_s"] - Es) < 1e-11 * abs(Es)
    assert abs(f["dE_s_dR"] - dEs) < 1e-10 * abs(dEs)
    assert abs(f["dE_dalpha_s"] - s * Es * dEs) < 1e-10 * abs(s * Es * dEs)


def test_sinh_gordon_spin_three_flow():
    # at alpha_3 != 0 (and with TTbar on as well): the residual of dE/dalpha_s = s E_s dE_s/dR
    # within its error, and dE/dalpha_3 against finite differences in alpha_3 (common practice)
    sg = tba.sinh_gordon(0.6)
    d = tba.ttbar(0.1) + tba.higher_spin(3, -0.01)
    res = tba.solve(sg, 1.0, d, tol=1e-13)
    for spin in (1, 3):
        f = spin_flow_residual(res, spin)
        assert abs(f["residual"]) <= f["error"] < 1e-11 * f["scale"]
    E3 = lambda a3: tba.solve(sg, 1.0, tba.ttbar(0.1) + tba.higher_spin(3, a3),  # noqa: E731
                              tol=1e-13).energy
    f = spin_flow_residual(res, 3)
    # h = 3e-5: E(alpha_3) bends fast here (h = 1e-3 is off by 6e-5 relative), h^4 truncation
    assert abs(f["dE_dalpha_s"] - fd4(E3, -0.01, 3e-5)) < 1e-8 * abs(f["dE_dalpha_s"])


def test_flow_check_state_cli(capsys):
    assert main(["flow-check", "--model", "sinh-gordon", "--coupling", "0.6", "--radius", "1", "2",
                 "--alpha", "-0.1", "--state=1/2,3/2", "--json"]) == 0
    recs = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert len(recs) == 2
    for r in recs:
        assert r["state"] == "1/2,3/2" and r["spin"] == 1 and r["status"] == "converged"
        # R P = 2 pi (1/2 + 3/2) (docs/physics.md section 5)
        assert abs(r["momentum"] * r["radius"] - 4 * math.pi) < 1e-9
        assert abs(r["residual"]) <= r["residual_error"] < 1e-10 * r["scale"]


def test_flow_check_cdd_cli(capsys):
    assert main(["flow-check", "--model", "sinh-gordon", "--coupling", "0.6", "--radius", "1",
                 "--alpha", "0.1", "--cdd", "3:-0.01"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].split()[:3] == ["R", "alpha", "spin"]
    rows = [line.split() for line in lines[1:]]
    assert [r[2] for r in rows] == ["1", "3"] and all(r[-1] == "converged" for r in rows)
    assert all(abs(float(r[6])) <= float(r[7]) < 1e-11 for r in rows)


@pytest.mark.parametrize("args, name", [
    (["--model", "lee-yang", "--state", "0"], "--state"),
    (["--model", "sinh-gordon", "--coupling", "0.6", "--state=-1/2,1/2", "--cdd", "3:-0.01"], "--cdd"),
    (["--model", "ising-e8", "--cdd", "3:-0.01"], "--cdd"),
    (["--model", "sinh-gordon", "--coupling", "0.6", "--state", "1,2"], "--state"),
])
def test_flow_check_bad_input(args, name, capsys):
    assert main(["flow-check", "--radius", "1", "--alpha", "0.1", *args]) == 2
    err = capsys.readouterr().err
    assert name in err and len(err.strip().splitlines()) == 1
