"""CDD factors with poles and resonances as deformations (tba/models/cdd.py, model side).

F_sigma(t) = (sinh t + i sigma) / (sinh t - i sigma), sigma = sin u (Camilo, Fleury, Lencses,
Negro and Zamolodchikov, JHEP 2021). Checks: the kernels against mpmath's numerical derivative
of log F, the pole positions against mpmath root finding, unitarity, crossing and real
analyticity of the factors, the staircase kernel 1/cosh(t - theta0) + 1/cosh(t + theta0) and its
c_eff plateaux at the unitary minimal-model values 1 - 6/(p(p+1)) (Al.B. Zamolodchikov, "Resonance
factorized scattering and roaming trajectories", 1991; the solver through a kernel callable here;
tests/test_pole_factors.py hands the deformation itself to the solver), composition and validation.
"""

import cmath
import math
from fractions import Fraction

import mpmath
import numpy as np
import pytest

from tba import solve_ground_state, user_model
from tba.models import free_fermion, get_model
from tba.models.blocks import block_kernel
from tba.models.cdd import CDD, PoleFactor, cdd_factor, higher_spin, resonance, ttbar

FF = free_fermion()


def F(sigma, t):
    return (mpmath.sinh(t) + 1j * sigma) / (mpmath.sinh(t) - 1j * sigma)


@pytest.mark.parametrize("sigma", [0.3, 1.0, math.cosh(2.0), 0.7 + 0.4j, 2.0 - 1.5j])
@pytest.mark.parametrize("power", [1, -2])
def test_kernel_is_the_log_derivative(sigma, power):
    # -i d/dt log of the factor (with F_(sigma*) for complex sigma), numerically (mpmath)
    factor = PoleFactor(sigma, power)
    sigmas = [sigma] + ([complex(sigma).conjugate()] if isinstance(sigma, complex) else [])
    for t in (-1.7, 0.0, 0.45, 3.2):
        with mpmath.workdps(30):
            expected = power * sum(-1j * mpmath.diff(lambda s: F(sg, s), t) / F(sg, t) for sg in sigmas)
        assert abs(complex(expected).imag) < 1e-20
        assert factor.kernel(np.array(t)) == pytest.approx(float(expected.real), rel=1e-12, abs=1e-14)


@pytest.mark.parametrize("sigma", [0.3, 0.999, math.cosh(2.0), 0.7 + 0.4j, 0.1 + 3j])
def test_singularity_distance_is_the_nearest_pole(sigma):
    # poles where sinh t = +-i sigma (and +-i sigma* for a pair): mpmath roots from many starts,
    # the nearest |Im t| among them
    factor = PoleFactor(sigma)
    sigmas = [sigma, -sigma] + ([complex(sigma).conjugate(), -complex(sigma).conjugate()]
                                if isinstance(sigma, complex) else [])
    roots = []
    with mpmath.workdps(30):
        for sg in sigmas:
            for start in (0.1j, 1.5j, 2.8j, 3 + 1.5j, -3 + 1.5j, 1 - 1j):
                try:
                    roots.append(complex(mpmath.findroot(lambda z: mpmath.sinh(z) - 1j * sg, start)))
                except (ValueError, ZeroDivisionError):
                    pass
    nearest = min(abs(z.imag) for z in roots)
    assert factor.singularity_distance == pytest.approx(nearest, rel=1e-12)


@pytest.mark.parametrize("d", [cdd_factor(0.9), cdd_factor(2.0, -1), resonance(3.0, -1),
                               cdd_factor(1.2 + 0.3j), resonance(1.0) + cdd_factor(0.4) + ttbar(0.1)])
def test_unitarity_crossing_and_sign(d):
    # Phi(t) Phi(-t) = 1, |Phi| = 1 on the real axis (real analyticity), Phi(i pi - t) = Phi(t)
    # (crossing for self-conjugate pairs), and Phi(0) = +1: the overall sign keeps S(0)
    t = np.array([-2.1, -0.3, 0.8, 4.0])
    phi = d.value(FF, t)[0, 0]
    np.testing.assert_allclose(np.abs(phi), 1.0, rtol=1e-13)
    np.testing.assert_allclose(phi * d.value(FF, -t)[0, 0], 1.0, rtol=1e-13)
    z = t + 0.2j
    np.testing.assert_allclose(d.value(FF, 1j * np.pi - z)[0, 0], d.value(FF, z)[0, 0], rtol=1e-11)
    assert d.value(FF, np.zeros(1))[0, 0, 0] == pytest.approx(1.0, abs=1e-14)


def test_real_u_is_a_full_block():
    # F_(pi x) = f_x: the kernel of cdd_factor(pi x) is the block kernel (tba/models/blocks.py)
    t = np.linspace(-5, 5, 21)
    for x in (0.1, 0.3, 0.5):
        np.testing.assert_allclose(cdd_factor(math.pi * x).kernel(FF, t)[0, 0], block_kernel(x, t),
                                   rtol=1e-14)
    # S = 1 / (f_0.3 f_0.2) as the free fermion times two inverse factors has the kernel of the
    # block model with multiplicities -1
    d = cdd_factor(0.3 * math.pi, -1) + cdd_factor(0.2 * math.pi, -1)
    blocks = user_model(masses=[1], blocks={Fraction(3, 10): -1, Fraction(1, 5): -1})
    np.testing.assert_allclose(d.kernel(FF, t)[0, 0], blocks.kernel(t)[0, 0], rtol=1e-13)
    assert d.singularity_distance == pytest.approx(blocks.pole_distance)
    assert d.sign == 1   # two factors, each -1 at t = 0


def test_staircase_factor():
    # 1/F with sigma = cosh theta0: kernel 1/cosh(t - theta0) + 1/cosh(t + theta0); with the free
    # fermion (S = -1) the S-matrix (sinh t - i cosh theta0) / (sinh t + i cosh theta0)
    # (Zamolodchikov 1991)
    theta0 = 7.5
    d = resonance(theta0, -1)
    t = np.linspace(-15, 15, 31)
    np.testing.assert_allclose(d.kernel(FF, t)[0, 0], 1 / np.cosh(t - theta0) + 1 / np.cosh(t + theta0),
                               rtol=1e-13)
    s_matrix = FF.s_matrix(t) * d.value(FF, t)
    ch = math.cosh(theta0)
    np.testing.assert_allclose(s_matrix[0, 0], (np.sinh(t) - 1j * ch) / (np.sinh(t) + 1j * ch), rtol=1e-13)
    assert d.sign == -1 and d.singularity_distance == pytest.approx(math.pi / 2)
    assert d.factors[0].u == pytest.approx(cmath.asin(ch))


@pytest.mark.slow
def test_staircase_plateaux():
    # c_eff(R) = -6 R E_0 / pi of the staircase model passes the unitary minimal-model values
    # c_p = 1 - 6 / (p (p+1)), p = 3, 4, 5, 6, on plateaux of width theta0/2 in log(1/R), centred
    # at log(1/R) = theta0/4 + (p - 3) theta0/2 (Zamolodchikov 1991). The model side: the
    # kernel of resonance(theta0, -1) handed to the solver as a user kernel (the deformation
    # itself: tests/test_pole_factors.py).
    theta0 = 16.0
    d = resonance(theta0, -1)
    model = user_model(masses=[1.0], kernel=lambda t: d.kernel(FF, t)[0, 0],
                       pole_distance=d.singularity_distance, name="staircase")
    c = {}
    for L in np.arange(4.0, 29.0, 4.0):
        res = solve_ground_state(model, math.exp(-L), tol=1e-10)
        assert res.converged, res.message
        c[L] = -6 * math.exp(-L) * res.energy / math.pi
    for p, L in zip(range(3, 7), (4.0, 12.0, 20.0, 28.0)):
        assert c[L] == pytest.approx(1 - 6 / (p * (p + 1)), abs=5e-4)
    # between the plateaux c_eff crosses over, monotonically upwards
    values = [c[L] for L in sorted(c)]
    assert all(b > a for a, b in zip(values, values[1:]))
    assert 0.52 < c[8.0] < 0.68 and 0.72 < c[16.0] < 0.78


def test_composition_and_the_solver_facing_members():
    d = ttbar(0.1) + higher_spin(3, -0.02) + resonance(10.0, -1) + cdd_factor(0.5)
    assert d.couplings == {1: 0.1, 3: -0.02}
    assert d.has_poles and not d.is_ttbar and not d.is_zero and d.alpha == 0.1
    assert len(d.factors) == 2 and d.sign == 1
    e8 = get_model("E8")
    k = d.kernel(e8, np.linspace(-2, 2, 5))
    assert k.shape == (8, 8, 5) and np.all(k == k[0, 0])      # the same factor on every pair
    assert ttbar(0.1).kernel(e8, np.zeros(3)) is None and ttbar(0.1).kernel_key is None
    assert math.isinf(ttbar(0.1).singularity_distance)
    assert d.singularity_distance == pytest.approx(0.5)  # sigma = sin(0.5): poles at 0.5 i, (pi - 0.5) i
    # scaling: the spin couplings only; the pole factors are kept (cdd.py docstring)
    half = d.scaled(0.5)
    assert half.couplings == {1: 0.05, 3: -0.01} and half.factors == d.factors
    assert half.kernel_key == d.kernel_key and hash(half.kernel_key) == hash(d.kernel_key)
    assert d.pole_part().couplings == {} and d.pole_part().factors == d.factors
    assert d.spin_part() == ttbar(0.1) + higher_spin(3, -0.02)
    # equal factors merge, inverse ones cancel; sum() works
    assert (cdd_factor(0.5) + cdd_factor(0.5, -1)).is_zero
    assert cdd_factor(0.5) + cdd_factor(0.5) == cdd_factor(0.5, 2)
    assert sum([ttbar(0.1), cdd_factor(0.5)]) == ttbar(0.1) + cdd_factor(0.5)
    assert cdd_factor(math.pi - 0.5).kernel_key == cdd_factor(0.5).kernel_key  # sin u = sin(pi - u)
    assert d.charges(e8, 7).tolist() == pytest.approx(e8.charges(7).tolist())


@pytest.mark.parametrize("bad, error, match", [
    (lambda: ttbar(0.1) + "x", TypeError, "deformation: cannot add 'x'"),
    (lambda: ttbar(0.1) + 0.5, TypeError, "deformation"),
    (lambda: cdd_factor(4.0), ValueError, "u must lie in"),
    (lambda: cdd_factor("a"), TypeError, "u must be a number"),
    (lambda: cdd_factor(0.5, 0), ValueError, "power"),
    (lambda: cdd_factor(0.5, 1.5), ValueError, "power"),
    (lambda: PoleFactor(2j), ValueError, "real rapidity axis"),
    (lambda: PoleFactor(math.nan), ValueError, "sigma"),
    (lambda: resonance(-1.0), ValueError, "theta0"),
    (lambda: resonance(None), TypeError, "theta0"),
    (lambda: CDD(factors=(0.3,)), TypeError, "factors"),
    (lambda: CDD({1: "a"}), TypeError, "alpha_1"),
])
def test_bad_input_names_the_argument(bad, error, match):
    with pytest.raises(error, match=match):
        bad()
