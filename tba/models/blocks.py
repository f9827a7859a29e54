"""The building block of diagonal S-matrices and its kernel.

    f_x(t)   = (sinh t + i sin(pi x)) / (sinh t - i sin(pi x)),      0 < x < 1,  f_x = f_(1-x)
    phi_x(t) = -i d/dt log f_x(t) = -2 sin(pi x) cosh t / (sinh^2 t + sin^2(pi x))
    int phi_x(t) dt = -2 pi
    int e^{ikt} phi_x(t) dt = -2 pi cosh(pi k (1/2 - x)) / cosh(pi k / 2)

phi_x is analytic in the strip |Im t| < pi min(x, 1 - x); that distance sets the
grid spacing the trapezoid rule needs.
"""

from fractions import Fraction

import numpy as np


def normalise_x(x):
    """Return the representative of f_x with 0 < x <= 1/2 (f_x == f_(1-x)), as a Fraction when exact."""
    if isinstance(x, (int, Fraction)):
        x = Fraction(x)
    if not 0 < x < 1:
        raise ValueError(f"block parameter x must lie in (0, 1), got {x}")
    return min(x, 1 - x)


def block_s(x, t):
    """f_x(t), complex."""
    s = np.sin(np.pi * float(x))
    sh = np.sinh(np.asarray(t, dtype=float))
    return (sh + 1j * s) / (sh - 1j * s)


def block_kernel(x, t):
    """phi_x(t) = -i d/dt log f_x(t), real."""
    s = np.sin(np.pi * float(x))
    t = np.asarray(t, dtype=float)
    with np.errstate(over="ignore"):  # cosh overflows to inf for |t| > 710: the kernel is 0 there
        sech = 1.0 / np.cosh(t)
    return -2.0 * s * sech / (np.tanh(t) ** 2 + (s * sech) ** 2)


def block_kernel_shifted(x, u):
    """psi_x(u) defined by phi_x(u + i pi/2) = i psi_x(u): 2 sin(pi x) sinh u / (cosh^2 u - sin^2(pi x)).

    It is also d/du log f_x(u - i pi/2): the derivative of `block_source`.
    """
    s = np.sin(np.pi * float(x))
    u = np.asarray(u, dtype=float)
    with np.errstate(over="ignore"):
        sech = 1.0 / np.cosh(u)
    return 2.0 * s * np.tanh(u) * sech / (1.0 - (s * sech) ** 2)  # no overflow at large |u|


def block_kernel_shifted_derivative(x, u):
    """d psi_x / du = 2 sin(pi x) cosh u (1 - sin^2(pi x) - sinh^2 u) / (cosh^2 u - sin^2(pi x))^2."""
    s = np.sin(np.pi * float(x))
    u = np.asarray(u, dtype=float)
    with np.errstate(over="ignore"):
        sech = 1.0 / np.cosh(u)
    tanh = np.tanh(u)
    return 2.0 * s * sech * ((1 - s * s) * sech ** 2 - tanh ** 2) / (1.0 - (s * sech) ** 2) ** 2


def block_source(x, u):
    """log f_x(u - i pi/2) = log((cosh u - sin(pi x)) / (cosh u + sin(pi x))), real for real u."""
    s = np.sin(np.pi * float(x))
    u = np.asarray(u, dtype=float)
    with np.errstate(divide="ignore"):
        return np.log((np.cosh(u) - s) / (np.cosh(u) + s))


def block_phase(x, u):
    """delta_x(u) = -i log(-f_x(u)) = -2 arctan(sinh u / sin(pi x)): odd, delta_x(0) = 0,
    d delta_x / du = phi_x(u)."""
    s = np.sin(np.pi * float(x))
    return -2.0 * np.arctan(np.sinh(np.asarray(u, dtype=float)) / s)


def block_transform(x, k):
    """Fourier transform of the kernel of the block f_x.

    Parameters
    ----------
    x : float or array_like
        Block parameter, 0 < x < 1.
    k : float or array_like
        Fourier variable (broadcast against `x`).

    Returns
    -------
    numpy.ndarray or float
        ``-2 pi cosh(pi k (1/2 - x)) / cosh(pi k / 2)``, evaluated in an
        overflow-free form.
    """
    x = np.asarray(x, dtype=float)
    a = np.pi * np.abs(np.asarray(k, dtype=float))
    return -2 * np.pi * (np.exp(-a * x) + np.exp(-a * (1 - x))) / (1 + np.exp(-a))


def pole_distance(x):
    """Distance from the real axis of the nearest pole of phi_x: pi min(x, 1 - x)."""
    x = float(x)
    return np.pi * min(x, 1.0 - x)
