"""Bad input raises ValueError or TypeError with a message naming the argument.

Source: the public API contract in the docstrings of tba/solvers/ground.py, tba/models/catalog.py,
tba/models/base.py and tba/models/cdd.py (common practice, no outside source).
"""

import math
from fractions import Fraction

import numpy as np
import pytest

from tba import (CDD, free_fermion, get_model, higher_spin, ising_e8, lee_yang, sinh_gordon,
                 solve_ground_state, solve_radii, ttbar, user_model)

FF = free_fermion()


@pytest.mark.parametrize("radius", [0.0, -1.0, -1e-300, math.nan, math.inf, -math.inf])
def test_radius_out_of_range(radius):
    with pytest.raises(ValueError, match="radius"):
        solve_ground_state(FF, radius)


@pytest.mark.parametrize("radius", [None, "abc", "1", True, 1j, [1.0]])
def test_radius_wrong_type(radius):
    with pytest.raises(TypeError, match="radius"):
        solve_ground_state(FF, radius)


def test_radius_in_scan_is_validated():
    with pytest.raises(ValueError, match="radius"):
        solve_radii(FF, [1.0, -2.0])


@pytest.mark.parametrize("tol", [0.0, -1e-12, 1e-16, 1e-14, 1e-2, 0.5, 1.0, math.nan, math.inf])
def test_tol_out_of_range(tol):
    # documented range [MIN_TOL = 1e-13, 1e-2) (the ValueError message of tba.solvers.ground._validate)
    with pytest.raises(ValueError, match="tol"):
        solve_ground_state(FF, 1.0, tol=tol)


@pytest.mark.parametrize("tol", [None, "tight", "1e-10", True])
def test_tol_wrong_type(tol):
    with pytest.raises(TypeError, match="tol"):
        solve_ground_state(FF, 1.0, tol=tol)


def test_tol_edges_accepted():
    # the edges of the documented range are accepted, and the tightest one is reached
    assert solve_ground_state(FF, 1.0, tol=1e-13).converged
    assert solve_ground_state(FF, 1.0, tol=0.00999).converged


@pytest.mark.parametrize("B", [0, 2, -1, 2.5, math.nan, math.inf, -0.0])
def test_sinh_gordon_coupling_out_of_range(B):
    # 0 < B < 2 (sinh_gordon docstring; docs/physics.md section 2)
    with pytest.raises(ValueError, match="B|coupling"):
        sinh_gordon(B)


@pytest.mark.parametrize("B", [None, "one"])
def test_sinh_gordon_coupling_wrong_type(B):
    with pytest.raises(TypeError, match="coupling"):
        sinh_gordon(B)


def test_get_model_unknown_name():
    with pytest.raises(ValueError, match="model"):
        get_model("sine-gordonn")


@pytest.mark.parametrize("name", ["free-fermion", "lee-yang", "ising-e8"])
def test_get_model_coupling_for_model_without_one(name):
    with pytest.raises(ValueError, match="coupling"):
        get_model(name, 0.5)


def test_get_model_coupling_required_and_checked():
    with pytest.raises(ValueError, match="coupling"):
        get_model("sinh-gordon")
    with pytest.raises(ValueError, match="coupling"):
        get_model("sinh-gordon", 3.0)
    assert get_model("sinh-gordon", 0.6).coupling == 0.6
    assert get_model("lee-yang").n_species == 1 and get_model("ising-e8").n_species == 8


@pytest.mark.parametrize("spin", [0, -1, -3, 1.5, True])
def test_cdd_bad_spin(spin):
    # spins are positive integers (tba/models/cdd.py)
    with pytest.raises(ValueError, match="spin"):
        CDD({spin: 0.1})


@pytest.mark.parametrize("model", [free_fermion(), sinh_gordon(0.6), lee_yang()])
def test_even_spin_refused_for_one_species(model):
    # one self-conjugate species: crossing sinh(s (i pi - t)) = -sinh(s t) for even s rules them
    # out (tba/models/charges.py); the solver refuses with the allowed spins named
    with pytest.raises(ValueError, match="spin 2.*allowed spins"):
        solve_ground_state(model, 1.0, higher_spin(2, -0.01))


@pytest.mark.parametrize("alpha", [math.nan, math.inf])
def test_cdd_bad_coupling_value(alpha):
    with pytest.raises(ValueError, match="alpha"):
        ttbar(alpha)


def test_cdd_bad_coupling_type():
    with pytest.raises(TypeError, match="alpha"):
        ttbar("small")


def test_deformation_wrong_type():
    with pytest.raises(TypeError, match="deformation"):
        solve_ground_state(FF, 1.0, 0.1)


def test_user_kernel_without_pole_distance():
    with pytest.raises(ValueError, match="pole_distance"):
        user_model(masses=[1], kernel=lambda t: np.zeros_like(t))


@pytest.mark.parametrize("d", [0.0, -1.0, math.nan, math.inf])
def test_user_kernel_bad_pole_distance(d):
    with pytest.raises(ValueError, match="pole_distance"):
        user_model(masses=[1], kernel=lambda t: np.zeros_like(t), pole_distance=d)


def test_user_kernel_not_callable():
    # regression: at commit f20d048 user_model wrapped a one-species kernel in a lambda before
    # the callable check, so kernel=5 was accepted and failed later inside the solver
    with pytest.raises(TypeError, match="kernel"):
        user_model(masses=[1], kernel=5, pole_distance=1.0)


def test_asymmetric_blocks():
    blocks = [[{Fraction(1, 3): 1}, {Fraction(1, 5): 1}],
              [{Fraction(1, 4): 1}, {Fraction(1, 3): 1}]]
    with pytest.raises(ValueError, match="blocks"):
        user_model(masses=[1, 2], blocks=blocks)


def test_symmetric_blocks_accepted():
    # the same structure made symmetric is fine (guards the test above against a model that
    # rejects every two-species input)
    blocks = [[{Fraction(1, 3): 1}, {Fraction(1, 5): 1}],
              [{Fraction(1, 5): 1}, {Fraction(1, 3): 1}]]
    m = user_model(masses=[1, 2], blocks=blocks)
    assert m.n_species == 2


@pytest.mark.parametrize("blocks", [{Fraction(3, 2): 1}, {Fraction(0): 1}, {Fraction(1, 3): 0.5}])
def test_bad_block_content(blocks):
    with pytest.raises(ValueError, match="block"):
        user_model(masses=[1], blocks=blocks)


def test_single_dict_blocks_for_several_species():
    with pytest.raises(ValueError, match="blocks"):
        user_model(masses=[1, 1.5], blocks={Fraction(1, 3): 1})


@pytest.mark.parametrize("masses", [[-1.0], [0.0], [math.nan], []])
def test_bad_masses(masses):
    with pytest.raises(ValueError, match="masses"):
        user_model(masses=masses, blocks={} if len(masses) == 1 else None)


def test_blocks_and_kernel_together():
    with pytest.raises(ValueError, match="blocks|kernel"):
        user_model(masses=[1], blocks={}, kernel=lambda t: np.zeros_like(t), pole_distance=1.0)


def test_bad_statistics():
    with pytest.raises(ValueError, match="statistics"):
        user_model(masses=[1], blocks={}, statistics="anyon")


def test_higher_spin_for_multi_species_model():
    with pytest.raises(ValueError, match="spin"):
        solve_ground_state(ising_e8(), 1.0, higher_spin(3, -0.01))


def test_valid_input_still_works():
    # the checks above must not reject good input
    assert solve_ground_state(lee_yang(), 1.0, ttbar(0.1), tol=1e-10).converged
    assert solve_ground_state(FF, np.float64(2.0)).converged


# --------------------------------------------------------------------------------------
# the models layer (blocks, kernels, the registry, deformations)
# --------------------------------------------------------------------------------------

def test_block_multiplicity_must_be_an_integer():
    with pytest.raises(TypeError, match=r"blocks\[0\]\[0\]: multiplicity of x=1/3 must be an integer, got 'a'"):
        user_model(masses=[1], blocks={Fraction(1, 3): "a"})


def test_empty_masses_are_named():
    with pytest.raises(ValueError, match="masses must be a non-empty"):
        user_model(masses=[], blocks={})
    with pytest.raises(TypeError, match="masses"):
        user_model(masses=["a"], blocks={})


@pytest.mark.parametrize("value", [np.nan, np.inf])
def test_kernel_callable_returning_non_finite_values(value):
    # caught when the model is built (the kernel is probed), naming the argument and where
    with pytest.raises(ValueError, match="kernel: the callable returned a non-finite value"):
        user_model(masses=[1], kernel=lambda t: np.where(t > 1, value, 0.0) + 0 * t, pole_distance=1.0)


def test_kernel_callable_with_the_wrong_shape():
    with pytest.raises(ValueError, match="kernel: the callable returned shape"):
        user_model(masses=[1, 2], kernel=lambda t: np.zeros((2,) + np.shape(t)), pole_distance=1.0)


def test_adding_something_else_to_a_deformation():
    with pytest.raises(TypeError, match="deformation: cannot add 'x' \\(str\\)"):
        ttbar(0.1) + "x"
    with pytest.raises(TypeError, match="deformation"):
        "x" + ttbar(0.1)


def test_half_blocks_need_antiparticles():
    # crossing S_(a-bar)b(t) = S_ab(i pi - t) (tba/models/base.py): an unpaired half-block on a
    # self-conjugate pair is refused; with the antiparticles of A_2 it is the Potts model
    from tba.models import HalfBlock

    A2 = [[{HalfBlock(Fraction(2, 3)): 1}, {"<1/3>": 1}], [{"<1/3>": 1}, {"<2/3>": 1}]]
    with pytest.raises(ValueError, match="crossing"):
        user_model(masses=[1, 1], blocks=A2)
    with pytest.raises(ValueError, match="sign: crossing requires S_21"):
        user_model(masses=[1, 1], blocks=A2, antiparticle=[1, 0])
    potts = user_model(masses=[1, 1], blocks=A2, antiparticle=[1, 0], sign=[[-1, 1], [1, -1]])
    t = np.linspace(-3, 3, 7)
    np.testing.assert_array_equal(potts.kernel(t), get_model("potts-3").kernel(t))
    with pytest.raises(ValueError, match="antiparticle: species 0 and 1 have different masses"):
        user_model(masses=[1, 2], blocks=A2, antiparticle=[1, 0])


@pytest.mark.parametrize("name, coupling, match", [
    ("A0", None, "model: A0 does not exist"), ("D3", None, "model: D3"), ("E9", None, "model: E9"),
    ("A41", None, "A<n> takes n = 1..40"), ("sine-gordon", None, "coupling: required for sine-gordon"),
    ("sine-gordon", 2.5, "coupling: N must be an integer"), ("sine-gordon", 0, "coupling: N"),
    ("E8", 1.0, "coupling: model ising-e8 has no coupling"), (7, None, "model: expected a model name"),
])
def test_registry_errors(name, coupling, match):
    with pytest.raises(ValueError, match=match):
        get_model(name, coupling)


def test_registry_names():
    # algebra names (any case) reach the models; physical names are canonical
    from tba.models import MODELS, MODELS_WITH_COUPLING, model_names
    from tba.models.catalog import canonical_name

    assert canonical_name("E8") == canonical_name("e8") == "ising-e8"
    assert canonical_name("A2") == "potts-3" and canonical_name("T1") == "lee-yang"
    assert canonical_name("a5") == "A5" and canonical_name("E7") == "tricritical-ising"
    assert "D17" in MODELS and "D3" not in MODELS and "nope" not in MODELS
    assert MODELS["A3"]().n_species == 3 and MODELS["sinh-gordon"](0.6).coupling == 0.6
    assert set(MODELS_WITH_COUPLING) == {"sinh-gordon", "sine-gordon", "massless-bosons"}
    names = model_names()
    assert names[:4] == ["free-fermion", "sinh-gordon", "lee-yang", "ising-e8"]
    assert "A1" not in names and "A3" in names and list(MODELS) == names


def test_per_pair_pole_distances():
    # pole_distances[a][b]: the nearest pole of phi_ab (pi min(x, 1-x) over f_x, pi x over <x>)
    e8 = ising_e8()
    d = e8.pole_distances
    assert d.shape == (8, 8) and np.array_equal(d, d.T) and d.min() == e8.pole_distance
    assert d[0, 0] == pytest.approx(np.pi / 15)  # S_11 = f_(2/3) f_(2/5) f_(1/15)
    assert get_model("potts-3").pole_distances[0, 1] == pytest.approx(np.pi / 3)  # <1/3>
    m = user_model(masses=[1, 2], kernel=lambda t: np.zeros((2, 2) + np.shape(t)),
                   pole_distance=[[0.5, 1.0], [1.0, 2.0]])
    assert m.pole_distance == 0.5 and m.pole_distances[1, 1] == 2.0
    with pytest.raises(ValueError, match="pole_distance must be symmetric"):
        user_model(masses=[1, 2], kernel=lambda t: np.zeros((2, 2) + np.shape(t)),
                   pole_distance=[[0.5, 1.0], [2.0, 2.0]])
