"""Excited levels: higher-spin tails that leave no real solution, the one reading of a state's
name, and clear errors where an excited result cannot be used."""

import math
import re
import time
from fractions import Fraction

import numpy as np
import pytest

from tba import (Status, energy_derivatives, flow_residual, higher_spin, lee_yang, sinh_gordon,
                 solve_excited, solve_ground_state)
from tba.cli import main
from tba.solvers.excited import parse_state, state_items
from tba.solvers.levels import level_name, parse_level, solve_level

SG = sinh_gordon(1.0)
STATE = "1/2,-1/2"


def tail_coefficients(level, spin, alpha):
    """C_+- of eps(t) ~ C_+- e^(s|t|)/2 (t -> +-oo) for a solved level of sinh-Gordon (L > 0):
    the CDD factor exp(i alpha sinh(s u)) at u = t - t_j - i pi/2 is exp(alpha sin(s pi/2)
    cosh(s(t - t_j))) (sinh(x - i s pi/2) = -i sin(s pi/2) cosh x for odd s) and adds
    alpha s cosh(s(t - t')) to the kernel; expanding cosh(s(t - t')) at large |t| gives
    C_+- = alpha (sin(s pi/2) sum_j e^(-+s t_j) - (s/2pi) int e^(-+s t) L dt)
    (derived here, common practice, no source), from the undeformed level's own numbers."""
    t = level.rapidity_grid
    h = t[1] - t[0]
    L = np.log1p(np.exp(-level.pseudo_energies[0]))
    rap = np.array(level.rapidities)
    out = []
    for side in (1, -1):
        sea = spin / (2 * np.pi) * h * np.sum(np.exp(-side * spin * t) * L)
        out.append(alpha * (math.sin(spin * math.pi / 2) * np.sum(np.exp(-side * spin * rap)) - sea))
    return out


@pytest.mark.parametrize("R", [1.0, 2.0])
def test_spin_3_with_positive_coupling_has_no_real_level(R):
    # alpha_3 > 0: both the particles' sources and the sea push eps to -oo like e^(3|t|), at
    # every R, so no real solution (the solver said not-converged at R = 2 and gave a
    # cutoff-dependent "branch point" at R = 1 before); the verdict comes before any deformed
    # solve, in well under the time of a failing continuation
    undeformed = solve_excited(SG, R, STATE)
    assert undeformed.converged
    c_plus, c_minus = tail_coefficients(undeformed, 3, 1e-3)
    assert c_plus < 0 and c_minus < 0
    start = time.perf_counter()
    res = solve_excited(SG, R, STATE, higher_spin(3, 1e-3))
    elapsed = time.perf_counter() - start
    assert res.status is Status.NO_REAL_SOLUTION, res.message
    assert math.isnan(res.energy) and math.isnan(res.error)
    assert "spin-3" in res.message and "unbounded below" in res.message
    quoted = float(re.search(r"eps ~ (\S+) e\^", res.message).group(1))
    assert quoted == pytest.approx(c_plus, rel=2e-3)  # the message's 3 digits
    assert elapsed < 3.0
    # the opposite sign has bounded tails and a real level
    other = solve_excited(SG, R, STATE, higher_spin(3, -1e-3))
    assert other.converged, other.message
    assert all(c > 0 for c in tail_coefficients(undeformed, 3, -1e-3))


def test_spin_5_tails_depend_on_the_level():
    # s = 5: the sources enter with the sign of +alpha_5, the sea with -alpha_5; which wins
    # depends on R (the sea's int e^(5t) L grows as R falls). The verdict follows the computed
    # coefficient: R = 1 no real solution for alpha_5 > 0, R = 2 a converged level
    signs = {}
    for R in (1.0, 2.0):
        undeformed = solve_excited(SG, R, STATE)
        signs[R] = min(tail_coefficients(undeformed, 5, 1e-3)) > 0
        res = solve_excited(SG, R, STATE, higher_spin(5, 1e-3))
        assert (res.status is Status.CONVERGED) == signs[R], (R, res.message)
        if not signs[R]:
            assert res.status is Status.NO_REAL_SOLUTION and "spin-5" in res.message
    assert signs == {1.0: False, 2.0: True}


@pytest.mark.parametrize("R", ["1", "2"])
def test_cli_reports_no_real_solution(R, capsys):
    code = main(["solve", "--model", "sinh-gordon", "--coupling", "1", "--cdd", "3:0.001",
                 "--state", STATE, "--radius", R])
    out = capsys.readouterr().out
    assert code == 0
    assert "no-real-solution" in out and "not-converged" not in out


# --------------------------------------------------------------------------------------
# one parser for a level's name
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("name", ["1/2,-1/2", " -0.5 , 0.5 ", ["1/2", "-1/2"], (0.5, -0.5),
                                  [Fraction(-1, 2), Fraction(1, 2)], np.array([0.5, -0.5])])
def test_every_spelling_names_the_same_level(name):
    assert parse_state(name) == (Fraction(-1, 2), Fraction(1, 2))
    assert parse_level(name) == parse_state(name)
    assert level_name(name) == "-1/2,1/2"


def test_solve_excited_and_solve_level_accept_the_same_strings():
    # solve_excited rejected "1/2,-1/2", which solve_level and --state accept
    a = solve_excited(SG, 2.0, STATE)
    b = solve_level(SG, 2.0, STATE)
    c = solve_excited(SG, 2.0, (-0.5, 0.5))
    assert a.converged and a.energy == b.energy == c.energy


@pytest.mark.parametrize("state, error, match", [
    ("1/2,,-1/2", ValueError, "state: an empty quantum number"),
    ("", ValueError, "state: an empty quantum number"),
    ("x", ValueError, "state: not a number"),
    ("ground", ValueError, "state: 'ground' names the ground state"),
    (None, TypeError, "state must be quantum numbers"),
    (float("nan"), ValueError, "state: quantum numbers must be finite"),
    (["1/2", None], TypeError, "state: quantum numbers must be real numbers"),
    (True, TypeError, "state: quantum numbers must be real numbers"),
    ("1/2", ValueError, "state: with 1 particle"),
])
def test_bad_states_name_the_argument(state, error, match):
    with pytest.raises(error, match=match):
        solve_excited(SG, 2.0, state)
    if state not in ("ground", "1/2"):  # a name made of half-integers is the model's to refuse
        with pytest.raises(error, match=match):
            parse_level(state)


def test_state_items_splits_strings_only():
    assert state_items("0") == ["0"]
    assert state_items(3) == [3]
    assert state_items((1, 2)) == [1, 2]


# --------------------------------------------------------------------------------------
# clear errors of the Python API
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("fn", [energy_derivatives, flow_residual])
def test_derivatives_of_an_excited_level_are_refused_clearly(fn):
    # excited levels carry no linearised equations: a ValueError naming the argument, not an
    # AttributeError from inside
    for res in (solve_excited(SG, 2.0, STATE), solve_level(lee_yang(), 2.0, "0")):
        assert res.converged
        with pytest.raises(ValueError, match="result: derivatives are available for ground states only"):
            fn(res)
    with pytest.raises(TypeError, match="result must be a SolveResult"):
        fn(3)


def test_model_given_by_name_is_refused_clearly():
    with pytest.raises(TypeError, match="model must be a DiagonalModel"):
        solve_ground_state("sinh-gordon", 1)
    with pytest.raises(TypeError, match="model"):
        solve_excited("sinh-gordon", 1.0, STATE)


@pytest.mark.parametrize("call, error, match", [
    (lambda: solve_level("sinh-gordon", 1.0, STATE), TypeError, "model must be a DiagonalModel"),
    (lambda: solve_level(SG, 1.0, STATE, "x"), TypeError, "deformation must be a CDD"),
    (lambda: solve_level(lee_yang(), 1.0, "0", "x"), TypeError, "deformation must be a CDD"),
    (lambda: solve_excited(SG, 1.0, STATE, 0.1), TypeError, "deformation must be a CDD"),
])
def test_solver_arguments_are_named(call, error, match):
    with pytest.raises(error, match=match):
        call()


def test_physics_arguments_are_named():
    import tba

    cases = [
        (lambda: tba.thermodynamics("sinh-gordon", 1.0), TypeError, "model must be a DiagonalModel"),
        (lambda: tba.thermodynamics(SG, 1.0, "x"), TypeError, "deformation must be a CDD"),
        (lambda: tba.solve_massless_level("massless-fermion", 1.0, STATE), TypeError, "model must be"),
        (lambda: tba.free_levels("massless-fermion", 2), TypeError, "model must be"),
        (lambda: tba.predict("sinh-gordon", 1.0, 0.1), TypeError, "level must be a callable"),
        (lambda: tba.level_branch_point("sinh-gordon", 0.1), TypeError, "level must be a callable"),
        (lambda: tba.branch_point(SG, "a"), TypeError, "alpha must be a real number"),
        (lambda: tba.branch_point("sinh-gordon", 0.1), TypeError, "model must be"),
        (lambda: tba.locate_fold(SG, 0.1), TypeError, "deformation must be a CDD"),
        (lambda: tba.complex_pair("x", 1.0), TypeError, "fold must be a Fold"),
        (lambda: tba.second_branch("x", 1.0), TypeError, "fold must be a Fold"),
        (lambda: tba.cft_branch_radius(0.5, -0.1), ValueError, "alpha must be finite and positive"),
        (lambda: tba.cft_branch_radius("c", 0.1), TypeError, "c must be a real number"),
        (lambda: tba.open_scan(3), TypeError, "path must be a file name"),
        (lambda: tba.solve(SG, 1.0, start="a"), TypeError, "start must be a SolveResult"),
        (lambda: tba.solve(SG, 1.0, state=STATE, start="a"), TypeError, "start must be a SolveResult"),
        (lambda: tba.solve(lee_yang(), 1.0, state="0", start=1), TypeError, "start must be"),
        (lambda: tba.user_model(masses=[1.0], kernel=lambda t: 1 / 0, pole_distance=1.0),
         ValueError, "kernel: the callable raised ZeroDivisionError"),
    ]
    for call, error, match in cases:
        with pytest.raises(error, match=match):
            call()


def test_derivative_options_are_checked():
    res = solve_ground_state(SG, 1.0)
    with pytest.raises(TypeError, match="spins must be a sequence"):
        energy_derivatives(res, spins=3)
    with pytest.raises(TypeError, match="second must be True or False"):
        energy_derivatives(res, second="x")
    assert set(energy_derivatives(res, spins=[1, 3])) >= {"dE_dR", "dE_dalpha1", "dE_dalpha3"}


@pytest.mark.parametrize("R", [1.0, 2.0])
def test_ground_state_with_positive_spin_3_has_no_real_solution(R):
    # the ground state's spin-3 term 3 alpha_3 E_3 cosh(3t) with E_3 = -(1/2pi) int cosh(3t) L < 0
    # (L > 0, tba/models/cdd.py): unbounded below for alpha_3 > 0 however small; the verdict
    # used to be a "fold" at a fraction of the coupling set by the grid's cutoff
    undeformed = solve_ground_state(SG, R)
    t = undeformed.rapidity_grid
    L = np.log1p(np.exp(-undeformed.pseudo_energies[0]))
    E3 = -(t[1] - t[0]) / (2 * np.pi) * float(np.sum(np.cosh(3 * t) * L))
    assert E3 < 0
    for alpha in (1e-3, 1e-12):
        res = solve_ground_state(SG, R, higher_spin(3, alpha))
        assert res.status is Status.NO_REAL_SOLUTION and math.isnan(res.energy)
        assert "spin-3" in res.message and "unbounded below" in res.message
    assert solve_ground_state(SG, R, higher_spin(3, -1e-3)).converged


def test_ground_state_one_sign_charges_of_several_species():
    # potts-3 at s = 5: q_5 = (1, 1) (tba/models/charges.py), so the same sign rule
    from tba import get_model

    model = get_model("potts-3")
    assert np.all(np.asarray(model.charges(5)) > 0)
    assert solve_ground_state(model, 1.0, higher_spin(5, 1e-9)).status is Status.NO_REAL_SOLUTION
    assert solve_ground_state(model, 1.0, higher_spin(5, -1e-9)).converged


@pytest.mark.parametrize("threads", [1, 2])
def test_spin_5_fold_of_a_level_is_found_and_brackets_the_level(threads):
    # R = 1, alpha_5 < 0: the tails are bounded (the sea beats the particles), but the level
    # folds at alpha_5 ~ -2.7e-7. Switching on -1e-3 used to end as not-converged when det J
    # changed sign right at the fold, and with one BLAS thread (as scan workers run) when the
    # last trial's line search failed there instead; the fold it reports must bracket the
    # level: a real level just before it, none just after (common practice, no source)
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=threads, user_api="blas"):
        res = solve_excited(SG, 1.0, STATE, higher_spin(5, -1e-3))
    assert res.status is Status.NO_REAL_SOLUTION, res.message
    a_c = float(re.search(r"at about (\S+) times", res.message).group(1)) * -1e-3
    assert -3e-7 < a_c < -2.5e-7  # measured here: -2.711e-7 (regression value, no source)
    assert solve_excited(SG, 1.0, STATE, higher_spin(5, 0.99 * a_c)).converged
    assert solve_excited(SG, 1.0, STATE, higher_spin(5, 1.01 * a_c)).status is Status.NO_REAL_SOLUTION
