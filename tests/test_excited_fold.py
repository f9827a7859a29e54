"""Branch points of excited levels (`excited_branch_point`, `tba branch-point --state`) and the
ground state beyond its fold from the command line (`tba solve --branch second|complex`)."""

import json
import math

import pytest

import tba
from tba.cli import main
from tba.physics.flow import ExcitedCurve, excited_branch_point


def cft_branch(alpha, D, Dbar, c):
    """Largest R where 1 + 4 alpha E0 / R + 4 alpha^2 P^2 / R^2 = 0 (E0 = 2 pi (D + Dbar - c/12)
    / R, P = 2 pi (D - Dbar) / R): the deformed CFT's closed form (docs/physics.md section 4;
    Smirnov and Zamolodchikov, Nucl. Phys. B915 (2017) 363). In x = 1 / R^2 the square root's
    argument is 1 + a x + b x^2; the branch of large R ends at its smallest positive zero."""
    n, d = D + Dbar - c / 12, D - Dbar
    a, b = 8 * math.pi * alpha * n, 16 * math.pi ** 2 * alpha ** 2 * d ** 2
    x = -1 / a if b == 0 else (-a - math.sqrt(a * a - 4 * b)) / (2 * b)
    return 1 / math.sqrt(x)


@pytest.mark.parametrize("model, state, alpha, D, Dbar, c", [
    (tba.massless_fermion(), "-1/2,1/2", -0.05, 0.5, 0.5, 0.5),    # P = 0, NS sector
    (tba.massless_bosons(24), "-1,-1,3", -0.05, 3, 2, 24),       # P = 2 pi / R: the boosted fold
    (tba.massless_bosons(1), "-1,2", -0.3, 2, 1, 1),              # P = 2 pi / R, c = 1
])
def test_free_massless_levels_fold_where_the_square_root_vanishes(model, state, alpha, D, Dbar, c):
    bp = excited_branch_point(model, state, alpha)
    assert bp.status == "found", bp.message
    Rc = cft_branch(alpha, D, Dbar, c)
    # closed form (above): R_c, and E(R_c) = -R_c / (2 alpha) where the square root is 0
    assert abs(bp.radius - Rc) <= 1e-10 * Rc
    assert abs(bp.radius - Rc) <= bp.radius_error
    assert abs(bp.energy + Rc / (2 * alpha)) <= max(bp.energy_error, 1e-10 * abs(bp.energy))
    assert bp.energy_error <= 1e-10 * abs(bp.energy)


def test_massive_free_fermion_level_closed_form():
    # the free fermion's two-particle level (-1/2, 1/2) in the NS sector (docs/physics.md
    # section 5; textbook, e.g. Mussardo, Statistical Field Theory, 2010): E(R, 0) = E_NS(R) +
    # 2 sqrt(1 + (pi / R)^2), E_NS(R) = -(1/pi) sum_k (-1)^(k+1) K_1(k R) / k (scipy.special);
    # the fold of the flow is alpha E'(R~) = 1, R_c = R~ - alpha E(R~) (docs/physics.md section 4)
    from scipy.optimize import brentq
    from scipy.special import k1, kvp

    ks = range(1, 200)
    E = lambda R: (-sum((-1) ** (k + 1) * k1(k * R) / k for k in ks) / math.pi  # noqa: E731
                   + 2 * math.sqrt(1 + (math.pi / R) ** 2))
    dE = lambda R: (-sum((-1) ** (k + 1) * kvp(1, k * R) for k in ks) / math.pi  # noqa: E731
                    - 2 * math.pi ** 2 / (R ** 3 * math.sqrt(1 + (math.pi / R) ** 2)))
    alpha = -0.5
    Rt = brentq(lambda R: alpha * dE(R) - 1, 0.3, 20, xtol=1e-15)
    bp = excited_branch_point(tba.free_fermion(), "-1/2,1/2", alpha)
    assert abs(bp.radius - (Rt - alpha * E(Rt))) <= bp.radius_error < 1e-11
    assert abs(bp.energy - E(Rt)) <= bp.energy_error < 1e-11


@pytest.mark.parametrize("model, state, alpha", [
    # (D, Dbar) = (3, 2) of 24 bosons at alpha > 0: a x + b x^2 > 0 for x > 0
    (tba.massless_bosons(24), "-1,-1,3", 0.05),
    # one right mover (D, Dbar) = (2, 0), c = 1: a^2 - 4b < 0, the square root has no zero
    (tba.massless_bosons(1), "2", -0.3),
])
def test_free_massless_level_without_fold(model, state, alpha):
    # the closed form of cft_branch above has no real zero on the branch of large R
    bp = excited_branch_point(model, state, alpha)
    assert bp.status == "none" and bp.radius != bp.radius


SG_STATE, SG_ALPHA = "-1/2,1/2", -1.0


@pytest.fixture(scope="module")
def sg_fold():
    sg = tba.sinh_gordon(0.6)
    return sg, excited_branch_point(sg, SG_STATE, SG_ALPHA)


def test_sinh_gordon_fold_is_bracketed_by_the_deformed_solver(sg_fold):
    # the deformed two-particle level solved directly (no flow relation): real just above R_c,
    # no real solution just below (common practice, no source)
    sg, bp = sg_fold
    assert bp.status == "found" and bp.radius_error < 1e-12 and bp.energy_error < 1e-11
    above = tba.solve(sg, bp.radius * (1 + 1e-5), tba.ttbar(SG_ALPHA), state=SG_STATE)
    below = tba.solve(sg, bp.radius * (1 - 1e-5), tba.ttbar(SG_ALPHA), state=SG_STATE)
    assert above.status is tba.Status.CONVERGED
    assert below.status is tba.Status.NO_REAL_SOLUTION


def test_sinh_gordon_fold_square_root(sg_fold):
    # E(R) - E(R_c) ~ a sqrt(R - R_c) + b (R - R_c) at a fold (docs/physics.md section 4): from
    # the deformed solver at three distances, the exponent is 1/2 and the fit's constant
    # reproduces E(R_c) of the undeformed curve (independent routes to the same number)
    sg, bp = sg_fold
    ds = (1e-4, 4e-4, 1.6e-3)
    E = [tba.solve(sg, bp.radius + d, tba.ttbar(SG_ALPHA), state=SG_STATE, tol=1e-13).energy
         for d in ds]
    exponent = math.log((E[1] - bp.energy) / (E[0] - bp.energy)) / math.log(4)
    assert abs(exponent - 0.5) < 0.02
    # E = E_c + a s + b s^2 with s = sqrt(d) = 0.01, 0.02, 0.04: solve for E_c exactly
    s = [math.sqrt(d) for d in ds]
    det = lambda m: (m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1])  # noqa: E731
                     - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
                     + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0]))
    rows = [[1.0, x, x * x] for x in s]
    Ec = det([[E[i], rows[i][1], rows[i][2]] for i in range(3)]) / det(rows)
    assert abs(Ec - bp.energy) < 1e-4 * abs(bp.energy)  # the fit's truncation, ~s^3


def test_sinh_gordon_fold_on_two_tolerances_agrees(sg_fold):
    # the same fold on curves solved to 1e-9: the two agree within the looser one's estimate
    sg, bp = sg_fold
    loose = excited_branch_point(sg, SG_STATE, SG_ALPHA, tol=1e-9)
    assert abs(loose.radius - bp.radius) <= loose.radius_error + bp.radius_error
    assert abs(loose.energy - bp.energy) <= loose.energy_error + bp.energy_error


def test_sinh_gordon_small_alpha_has_no_fold():
    # at alpha = -0.1 the level exists at every R: 1 - alpha E'(R~) > 0 along the whole curve
    # (common practice: the deformed solver finds it at R = 0.3, far below the alpha = -1 fold)
    sg = tba.sinh_gordon(0.6)
    bp = excited_branch_point(sg, SG_STATE, -0.1)
    assert bp.status == "none"
    assert tba.solve(sg, 0.3, tba.ttbar(-0.1), state=SG_STATE).converged


def test_lee_yang_radius_derivative_and_fold():
    ly = tba.lee_yang()
    curve = ExcitedCurve(ly, "0", 1e-12)
    # exact dE/dR against a fourth-order centred difference of energies at tol 1e-13
    # (truncation h^4 f^(5) / 30 ~ 1e-11 here; common practice, no source)
    E = lambda R: tba.solve(ly, R, state="0", tol=1e-13).energy  # noqa: E731
    R, h = 1.5, 2e-3
    fd = (8 * (E(R + h) - E(R - h)) - (E(R + 2 * h) - E(R - 2 * h))) / (12 * h)
    assert abs(curve(R)[1] - fd) < 1e-9 * abs(fd)
    bp = excited_branch_point(ly, "0", -0.5, curves=(curve, ExcitedCurve(ly, "0", 1e-10)))
    assert bp.status == "found" and bp.radius_error < 1e-11
    # bracketed by the deformed Lee-Yang solver (common practice, no source)
    assert tba.solve(ly, bp.radius * (1 + 1e-4), tba.ttbar(-0.5), state="0").converged
    assert tba.solve(ly, bp.radius * (1 - 1e-4), tba.ttbar(-0.5), state="0").status \
        is tba.Status.NO_REAL_SOLUTION


def test_branch_point_state_cli(capsys):
    # closed form of cft_branch above for the massless fermion's (1/2, 1/2) level
    assert main(["branch-point", "--model", "massless-fermion", "--alpha", "-0.05",
                 "--state=-1/2,1/2", "--json"]) == 0
    rec = json.loads(capsys.readouterr().out)
    assert rec["state"] == "-1/2,1/2" and rec["status"] == "found"
    assert abs(rec["radius"] - cft_branch(-0.05, 0.5, 0.5, 0.5)) <= 1e-10
    assert main(["branch-point", "--model", "massless-fermion", "--alpha", "-0.05",
                 "--state=-1/2,1/2"]) == 0
    assert "branch point at R_c = 1.09739563689" in capsys.readouterr().out


@pytest.mark.parametrize("args, name", [
    (["--state", "1,2"], "--state"),
    (["--state=-1/2,1/2", "--method", "continuation"], "--method"),
])
def test_branch_point_state_bad_input(args, name, capsys):
    code = main(["branch-point", "--model", "sinh-gordon", "--coupling", "0.6", "--alpha", "-1",
                 *args])
    assert code == 2
    err = capsys.readouterr().err
    assert name in err and len(err.strip().splitlines()) == 1


def test_solve_branches_of_24_bosons(capsys):
    # closed form E = (R / 2 alpha)(+-sqrt(1 + 4 alpha E0 / R) - 1), E0 = -4 pi / R (c = 24),
    # continued below R_c = sqrt(16 pi alpha) to the pair -R/(2 alpha) +- i (R/(2 alpha))
    # sqrt(|...|) (docs/physics.md sections 4 and 7)
    alpha = 0.05
    exact = lambda R, root: (R / (2 * alpha)) * (root(1 - 16 * math.pi * alpha / R ** 2) - 1)  # noqa: E731
    assert main(["solve", "--model", "massless-bosons", "--coupling", "24", "--alpha", "0.05",
                 "--radius", "1.4", "1.7", "--branch", "complex", "--json"]) == 0
    pair, above = (json.loads(line) for line in capsys.readouterr().out.splitlines())
    assert pair["status"] == "converged" and pair["energy"] is None
    z = exact(1.4, lambda x: 1j * math.sqrt(-x))
    assert abs(complex(pair["energy_real"], pair["energy_imag"]) - z) <= pair["error"] < 1e-11
    assert above["status"] == "not-available" and above["energy_real"] is None
    assert abs(pair["branch_radius"] - math.sqrt(16 * math.pi * alpha)) <= 1e-12
    assert main(["solve", "--model", "massless-bosons", "--coupling", "24", "--alpha", "0.05",
                 "--radius", "1.5", "2.0", "--branch", "second", "--json"]) == 0
    below, second = (json.loads(line) for line in capsys.readouterr().out.splitlines())
    assert below["status"] == "no-real-solution" and below["energy"] is None
    assert second["status"] == "converged" and second["energy_imag"] == 0.0
    assert abs(second["energy"] - exact(2.0, lambda x: -math.sqrt(x))) <= second["error"] < 1e-11


@pytest.mark.parametrize("args", [
    ["--alpha", "-0.1", "--branch", "second"],
    ["--alpha", "0.1", "--branch", "complex", "--state=-1/2,1/2"],
    ["--alpha", "0.1", "--branch", "complex", "--cdd", "3:0.01"],
    ["--alpha", "0.1", "--branch", "third"],
])
def test_solve_branch_bad_input(args, capsys):
    assert main(["solve", "--model", "sinh-gordon", "--coupling", "0.6", "--radius", "0.5",
                 *args]) == 2
    err = capsys.readouterr().err
    assert "--branch" in err and len(err.strip().splitlines()) == 1
