"""Tests for tba.models.ade (ADE minimal S-matrices from the Klassen-Melzer identity)."""
from fractions import Fraction as F

import numpy as np
import pytest

from tba.models.ade import (E8_COXETER, E8_INCIDENCE, TADPOLE_COXETER,
                            TADPOLE_INCIDENCE, ade_scattering, block_transform)
from tba.models.blocks import HalfBlock


def normalise(xs):
    """Block dict of a product of f_x, keys mapped to x <= 1/2."""
    out = {}
    for x in xs:
        x = min(x, 1 - x)
        out[x] = out.get(x, 0) + 1
    return out


def phit(blocks, k):
    n = len(blocks)
    return np.array([[sum(m * block_transform(float(x), k)
                          for x, m in blocks[a][b].items())
                      for b in range(n)] for a in range(n)])


@pytest.fixture(scope="module")
def e8():
    return ade_scattering(E8_INCIDENCE, E8_COXETER)


def test_e8_incidence_shape():
    assert E8_INCIDENCE.shape == (8, 8) and E8_INCIDENCE.sum() == 2 * 7
    assert sorted(E8_INCIDENCE.sum(axis=0)) == [1, 1, 1, 2, 2, 2, 2, 3]


def test_e8_masses(e8):
    # A.B. Zamolodchikov, Int. J. Mod. Phys. A4 (1989) 4235
    c = lambda x: np.cos(np.pi * x)
    m2 = 2 * c(1 / 5)
    expected = [1, m2, 2 * c(1 / 30), 2 * c(7 / 30) * m2, 2 * c(2 / 15) * m2,
                2 * c(1 / 30) * m2, 4 * c(1 / 5) * c(7 / 30) * m2,
                4 * c(1 / 5) * c(2 / 15) * m2]
    masses, _ = e8
    assert masses[0] == 1.0
    np.testing.assert_allclose(masses, expected, rtol=0, atol=1e-13)


def test_e8_s11_s12(e8):
    # A.B. Zamolodchikov, Int. J. Mod. Phys. A4 (1989) 4235
    _, blocks = e8
    assert blocks[0][0] == normalise([F(2, 3), F(2, 5), F(1, 15)])
    assert blocks[0][1] == normalise([F(4, 5), F(3, 5), F(7, 15), F(4, 15)])


def test_e8_blocks_well_formed(e8):
    _, blocks = e8
    for a in range(8):
        for b in range(8):
            assert blocks[a][b] == blocks[b][a]
            for x, m in blocks[a][b].items():
                assert isinstance(x, F) and 0 < x <= F(1, 2)
                assert (30 * x).denominator == 1
                assert isinstance(m, int) and m > 0


def test_tadpole_is_lee_yang():
    # Al.B. Zamolodchikov, Nucl. Phys. B342 (1990) 695: S = f_(2/3)
    masses, blocks = ade_scattering(TADPOLE_INCIDENCE, TADPOLE_COXETER)
    assert masses.tolist() == [1.0]
    assert blocks == (({F(1, 3): 1},),)


@pytest.mark.parametrize("inc,h", [(E8_INCIDENCE, E8_COXETER),
                                   (TADPOLE_INCIDENCE, TADPOLE_COXETER)])
def test_identity_at_random_k(inc, h):
    # T.R. Klassen and E. Melzer, Nucl. Phys. B338 (1990) 485:
    # (1 - phit/2pi)^(-1) = 1 - I / (2 cosh(pi k / h))
    masses, blocks = ade_scattering(inc, h)
    n = len(masses)
    recovered = []
    for k in np.random.default_rng(1).uniform(-3, 3, size=5):
        lhs = np.linalg.inv(np.eye(n) - phit(blocks, k) / (2 * np.pi))
        recovered.append((np.eye(n) - lhs) * 2 * np.cosh(np.pi * k / h))
    inc_perm = np.rint(recovered[0])
    for r in recovered:
        np.testing.assert_allclose(r, inc_perm, atol=1e-12)
    # the recovered (permuted) incidence has the masses as Perron-Frobenius
    # vector with eigenvalue 2 cos(pi/h), and is a relabelling of the input
    np.testing.assert_allclose(inc_perm @ masses,
                               2 * np.cos(np.pi / h) * masses, atol=1e-12)
    assert sorted(inc_perm.sum(axis=0)) == sorted(np.asarray(inc).sum(axis=0))


def test_block_transform_matches_numerical_fourier():
    # direct quadrature of phi_x(t) = -2 sin(pi x) cosh t / (sinh^2 t + sin^2 pi x)
    t = np.linspace(-40, 40, 400001)
    for x, k in [(1 / 3, 0.7), (1 / 15, 1.9), (0.5, 0.0)]:
        s = np.sin(np.pi * x)
        phi = -2 * s * np.cosh(t) / (np.sinh(t) ** 2 + s ** 2)
        num = np.trapezoid(np.cos(k * t) * phi, t)
        assert abs(num - block_transform(x, k)) < 1e-6
    assert block_transform(0.25, 1e4) == 0.0  # no overflow


def test_a1_free():
    # A_1 (Ising, S = -1): no rapidity dependence, hence no blocks
    masses, blocks = ade_scattering([[0]], 2)
    assert masses.tolist() == [1.0] and blocks == (({},),)


def test_a2_is_a_product_of_half_blocks():
    # A_2 = Z_3 (scaling 3-state Potts): S_11 = sinh(t/2 + i pi/3) / sinh(t/2 - i pi/3) = <2/3>
    # (R. Koberle and J.A. Swieca, Phys. Lett. B86 (1979) 209; A.B. Zamolodchikov, Int. J. Mod.
    # Phys. A3 (1988) 743), not a product of f_x blocks: it needs the half-block
    masses, blocks = ade_scattering([[0, 1], [1, 0]], 3)
    assert masses.tolist() == [1.0, 1.0]
    assert blocks[0][0] == {HalfBlock(F(2, 3)): 1} and blocks[0][1] == {HalfBlock(F(1, 3)): 1}


@pytest.mark.parametrize("inc,h,match", [
    ([[0, 1], [0, 0]], 3, "symmetric"),
    ([[0, -1], [-1, 0]], 3, "non-negative"),
    ([[0, 0.5], [0.5, 0]], 3, "integers"),
    ([1, 0], 3, "square"),
    ([["a"]], 3, "integers"),
    (np.zeros((2, 2)), 3, "connected"),
    (TADPOLE_INCIDENCE, 1, "coxeter"),
    (TADPOLE_INCIDENCE, 2.5, "coxeter"),
    (TADPOLE_INCIDENCE, True, "coxeter"),
    ([[0, 2], [2, 0]], 4, "spectral radius"),
    (E8_INCIDENCE, 29, "not a product"),
])
def test_bad_input(inc, h, match):
    with pytest.raises(ValueError, match=match):
        ade_scattering(inc, h)


def test_result_is_not_shared_between_calls(e8):
    masses, blocks = ade_scattering(E8_INCIDENCE, E8_COXETER)
    masses[0] = 7.0
    blocks[0][0].clear()
    assert ade_scattering(E8_INCIDENCE, E8_COXETER)[1][0][0] == e8[1][0][0] != {}
