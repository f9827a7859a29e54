"""End-to-end tests of the command-line contract (``tba solve``, ``tba demo``)."""

import json
import math
import subprocess
import sys

import pytest
from scipy.special import k1

from tba.cli import main
from tba.cli.common import parse_radii


def run(*args):
    """Run the installed entry point in a fresh process, as a user would."""
    return subprocess.run([sys.executable, "-m", "tba", *args], capture_output=True, text=True,
                          timeout=300)


def free_fermion_exact(R):
    # NS-sector ground state, -(1/pi) sum_k (-1)^(k+1) K_1(kR)/k (textbook; scipy.special.k1)
    return -sum((-1) ** (k + 1) * k1(k * R) / k for k in range(1, int(60 / R) + 50)) / math.pi


def test_json_contract_and_values():
    proc = run("solve", "--model", "free-fermion", "--radius", "0.5", "1:2:3", "--json")
    assert proc.returncode == 0, proc.stderr
    records = [json.loads(line) for line in proc.stdout.splitlines()]
    assert [r["radius"] for r in records] == [0.5, 1.0, 1.5, 2.0]
    for r in records:
        assert {"model", "coupling", "radius", "alpha", "energy", "error", "status", "iterations"} <= set(r)
        assert r["status"] == "converged" and r["model"] == "free-fermion" and r["coupling"] is None
        exact = free_fermion_exact(r["radius"])
        assert abs(r["energy"] - exact) <= r["error"] <= 1e-12 * abs(exact)


def test_no_real_solution_is_null():
    # alpha = 0.5 at R = 0.3 lies below the free fermion's branch point (CFT estimate
    # R_c ~ sqrt(2 pi c alpha / 3) = 0.72; docs/physics.md section 4)
    proc = run("solve", "--model", "free-fermion", "--radius", "0.3", "--alpha", "0.5", "--json")
    assert proc.returncode == 0, proc.stderr
    rec = json.loads(proc.stdout)
    assert rec["status"] == "no-real-solution"
    assert rec["energy"] is None and rec["error"] is None


def test_table_output_lists_every_radius(capsys):
    assert main(["solve", "--model", "sinh-gordon", "--coupling", "0.6", "--radius", "1", "2"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].split()[:3] == ["model", "coupling", "R"]
    assert len(lines) == 3 and all("converged" in line for line in lines[1:])


@pytest.mark.parametrize("args, name", [
    (["--model", "nope", "--radius", "1"], "--model"),
    (["--model", "lee-yang", "--radius", "0"], "--radius"),
    (["--model", "lee-yang", "--radius", "-2"], "--radius"),
    (["--model", "lee-yang", "--radius", "nan"], "--radius"),
    (["--model", "lee-yang", "--radius", "1", "--alpha", "inf"], "--alpha"),
    (["--model", "lee-yang", "--radius", "1", "--coupling", "1"], "--coupling"),
    (["--model", "sinh-gordon", "--radius", "1", "--coupling", "2"], "--coupling"),
    (["--model", "sinh-gordon", "--radius", "1", "--coupling", "0"], "--coupling"),
    (["--model", "sinh-gordon", "--radius", "1"], "--coupling"),
    (["--model", "lee-yang", "--radius", "1", "--tol", "1"], "--tol"),
    (["--model", "lee-yang", "--radius", "1:2"], "--radius"),
    (["--model", "lee-yang", "--radius", "1", "--cdd", "2:0.1"], "--cdd"),
])
def test_bad_input_one_line_exit_2(args, name, capsys):
    assert main(["solve", *args]) == 2
    captured = capsys.readouterr()
    err = captured.err.strip().splitlines()
    assert len(err) == 1 and name in err[0], err
    assert "Traceback" not in captured.err and captured.out == ""


def test_bad_input_in_a_fresh_process():
    proc = run("solve", "--model", "lee-yang", "--radius", "-1")
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1 and "--radius" in proc.stderr


def test_radius_ranges_include_both_ends():
    assert parse_radii(["1:2:5"]) == [1.0, 1.25, 1.5, 1.75, 2.0]
    assert parse_radii(["3", "0.5:1:2"]) == [3.0, 0.5, 1.0]


def test_help_states_conventions():
    proc = run("solve", "--help")
    assert proc.returncode == 0
    assert "alpha > 0" in proc.stdout and "bulk" in proc.stdout and "exp(i alpha m_a m_b sinh t)" in proc.stdout


def test_demo_runs_and_shows_both_statuses(capsys):
    assert main(["demo"]) == 0
    out = capsys.readouterr().out
    assert "converged" in out and "no-real-solution" in out
    assert "not-converged" not in out


def test_state_option_json_contract():
    # free fermion, R sector (one particle, integer n): E = E_R(R) + cosh t, R sinh t = 2 pi n
    # (textbook; E_R = (1/pi) sum_k K_1(kR)/k, scipy.special.k1)
    proc = run("solve", "--model", "free-fermion", "--radius", "2", "--state", "1", "--json")
    assert proc.returncode == 0, proc.stderr
    rec = json.loads(proc.stdout)
    assert rec["status"] == "converged" and rec["state"] == [1]
    e_r = sum(k1(k * 2.0) / k for k in range(1, 200)) / math.pi
    exact = e_r + math.cosh(math.asinh(math.pi))
    assert abs(rec["energy"] - exact) <= rec["error"] <= 1e-12 * exact
    assert rec["momentum"] == pytest.approx(math.pi, rel=1e-12)
    assert rec["rapidities"] == pytest.approx([math.asinh(math.pi)], rel=1e-12)


@pytest.mark.parametrize("args, name", [
    (["--model", "free-fermion", "--radius", "1", "--state", "1/2"], "--state"),
    (["--model", "lee-yang", "--radius", "1", "--state", "1"], "--state"),
    (["--model", "ising-e8", "--radius", "1", "--state", "0"], "--state"),
    (["--model", "free-fermion", "--radius", "1", "--state", "a,b"], "--state"),
])
def test_bad_state_one_line_exit_2(args, name, capsys):
    assert main(["solve", *args]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and name in err[0], err


def test_branch_point_json():
    # free fermion at alpha = 0.2: R_c from the exact curve E_NS'(R~) = 1/alpha,
    # R_c = R~ - alpha E_NS(R~) (docs/physics.md section 4; Bessel series via scipy.special.k1)
    proc = run("branch-point", "--model", "free-fermion", "--alpha", "0.2", "--json")
    assert proc.returncode == 0, proc.stderr
    rec = json.loads(proc.stdout)
    assert rec["status"] == "found"
    from scipy.optimize import brentq
    from scipy.special import kvp

    def dE(R):
        return -sum((-1) ** (k + 1) * kvp(1, k * R) for k in range(1, int(60 / R) + 50)) / math.pi
    Rt = brentq(lambda R: dE(R) - 5.0, 0.05, 5.0, xtol=1e-15)
    R_c = Rt - 0.2 * free_fermion_exact(Rt)
    assert rec["branch_radius"] == pytest.approx(R_c, rel=1e-11)
    assert rec["branch_energy"] == pytest.approx(free_fermion_exact(Rt), rel=1e-11)
    proc = run("branch-point", "--model", "free-fermion", "--alpha", "-0.2", "--json")
    assert json.loads(proc.stdout)["status"] == "none"


def test_flow_check_residuals_are_small(capsys):
    # the Burgers equation d_alpha E = E d_R E holds for the ground state (docs/physics.md section 4)
    assert main(["flow-check", "--model", "lee-yang", "--radius", "1", "2", "--alpha", "-0.1",
                 "0.2", "--json"]) == 0
    recs = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert len(recs) == 4
    for r in recs:
        assert r["status"] == "converged"
        assert abs(r["residual"]) <= 1e-10 * r["scale"]
