"""Half-blocks <x>: kernel, Fourier transform, pole distance, and their relation to f_x.

Checks against independent computations: mpmath's numerical derivative of the defining ratio of
sinh functions, scipy quadrature for the Fourier integrals, and the algebraic identity
f_x = -<x><1-x> (tba/models/blocks.py derives the formulas; the half-block
<x> = sinh(t/2 + i pi x/2) / sinh(t/2 - i pi x/2) is the building block of Braden, Corrigan,
Dorey and Sasaki, Nucl. Phys. B338 (1990) 689).
"""

import math
from fractions import Fraction as F

import mpmath
import numpy as np
import pytest
from scipy import integrate

from tba.models import blocks
from tba.models.blocks import HalfBlock


def half(x, t):
    """<x>(t) in mpmath, straight from the definition."""
    return mpmath.sinh(t / 2 + 1j * mpmath.pi * x / 2) / mpmath.sinh(t / 2 - 1j * mpmath.pi * x / 2)


@pytest.mark.parametrize("x", [0.1, 1 / 3, 0.5, 2 / 3, 0.93])
@pytest.mark.parametrize("t", [-2.3, -0.4, 0.0, 0.7, 3.1])
def test_half_block_kernel_is_the_log_derivative(x, t):
    # -i d/dt log <x> = -i <x>'/<x>, by mpmath's numerical differentiation of the definition
    with mpmath.workdps(30):
        expected = -1j * mpmath.diff(lambda s: half(x, s), t) / half(x, t)
    assert abs(complex(expected).imag) < 1e-20
    assert blocks.half_block_kernel(x, t) == pytest.approx(float(expected.real), rel=1e-13, abs=1e-15)


@pytest.mark.parametrize("x", [0.15, 0.4, 0.75])
@pytest.mark.parametrize("k", [0.0, 0.7, 2.3])
def test_half_block_transform_by_quadrature(x, k):
    # int e^{ikt} phi(t) dt by adaptive quadrature (the kernel is even: a cosine transform)
    value = 2 * integrate.quad(lambda t: math.cos(k * t) * float(blocks.half_block_kernel(x, t)),
                               0, 60, limit=400, epsabs=1e-13)[0]
    assert blocks.half_block_transform(x, k) == pytest.approx(value, rel=1e-10, abs=1e-12)
    # and the closed form -2 pi sinh(pi k (1 - x)) / sinh(pi k) itself
    closed = -2 * math.pi * (1 - x) if k == 0 else -2 * math.pi * math.sinh(math.pi * k * (1 - x)) / math.sinh(math.pi * k)
    assert blocks.half_block_transform(x, k) == pytest.approx(closed, rel=1e-14)


def test_half_block_transform_without_overflow():
    assert blocks.half_block_transform(0.3, 1e4) == 0.0
    assert np.isfinite(blocks.half_block_transform(0.3, np.array([0.0, 1e-300, 500.0]))).all()


@pytest.mark.parametrize("x", [0.2, 0.5, 0.7])
def test_full_block_is_minus_two_half_blocks(x):
    # f_x = -<x><1-x>, so the kernels and transforms add
    t = np.linspace(-4, 4, 17) + 0.01j
    assert np.allclose(blocks.block_s(x, t), -blocks.half_block_s(x, t) * blocks.half_block_s(1 - x, t),
                       rtol=1e-13, atol=0)
    tr = np.linspace(-6, 6, 25)
    assert np.allclose(blocks.block_kernel(x, tr),
                       blocks.half_block_kernel(x, tr) + blocks.half_block_kernel(1 - x, tr), rtol=1e-13)
    k = np.linspace(0, 5, 11)
    assert np.allclose(blocks.block_transform(x, k),
                       blocks.half_block_transform(x, k) + blocks.half_block_transform(1 - x, k), rtol=1e-13)


@pytest.mark.parametrize("x", [0.2, 0.6, 0.9])
def test_half_block_pole_distance(x):
    # the kernel's denominator cosh t - cos(pi x) vanishes at t = i pi x (mpmath root), nowhere
    # closer to the real axis: |kernel| along i y grows without bound as y -> pi x
    with mpmath.workdps(30):
        root = mpmath.findroot(lambda y: mpmath.cos(y) - mpmath.cos(mpmath.pi * x), 0.9 * math.pi * x)
    assert blocks.half_block_pole_distance(x) == pytest.approx(float(root), rel=1e-14)
    assert blocks.key_pole_distance(HalfBlock(x)) == pytest.approx(math.pi * x)


def test_half_block_crossing():
    # <x>(i pi - t) = -<1-x>(t): what makes a half-block describe particle-antiparticle pairs
    t = np.array([0.3 + 0.1j, -1.2 + 0.05j, 2.0 - 0.2j])
    for x in (0.25, 0.6):
        assert np.allclose(blocks.half_block_s(x, 1j * math.pi - t), -blocks.half_block_s(1 - x, t), rtol=1e-13)


def test_half_block_tail_and_integral():
    # phi(t) ~ -2 sin(pi x) e^{-|t|} and int phi = -2 pi (1 - x) (quadrature)
    x = 0.35
    t = 30.0
    assert blocks.half_block_kernel(x, t) / math.exp(-t) == pytest.approx(-blocks.block_tail(HalfBlock(x)), rel=1e-12)
    value = 2 * integrate.quad(lambda s: float(blocks.half_block_kernel(x, s)), 0, 60, epsabs=1e-14)[0]
    assert blocks.key_integral(HalfBlock(x)) == pytest.approx(value, rel=1e-11)


def test_keys_and_pairing():
    # f_x and half-blocks as dictionary keys; <x><1-x> pairs become f_x, <1/2>^2 becomes f_(1/2)
    assert blocks.block_key("<2/3>") == HalfBlock(F(2, 3)) != HalfBlock(F(1, 3))
    assert blocks.block_key("2/3") == F(1, 3) == blocks.block_key(F(2, 3))
    assert str(HalfBlock(F(1, 4))) == "<1/4>"
    half = blocks.half_content({F(1, 3): 1, HalfBlock(F(1, 2)): 3})
    assert half == {F(1, 3): 1, F(2, 3): 1, F(1, 2): 3}
    assert blocks.pair_half_blocks(half) == {F(1, 3): 1, F(1, 2): 1, HalfBlock(F(1, 2)): 1}
    assert blocks.pair_half_blocks({F(1, 5): -1, F(4, 5): -2}) == {F(1, 5): -1, HalfBlock(F(4, 5)): -1}
    with pytest.raises(ValueError, match="block"):
        blocks.block_key("<a>")
    with pytest.raises(ValueError, match="block"):
        HalfBlock(F(3, 2))
