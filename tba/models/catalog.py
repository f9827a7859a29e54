"""The built-in models and a constructor for user-defined ones.

Each function returns a `DiagonalModel`; ``MODELS`` maps command-line names to them.
"""

import math
from fractions import Fraction

import numpy as np

from tba.models.ade import E8_COXETER, E8_INCIDENCE, TADPOLE_COXETER, TADPOLE_INCIDENCE, ade_scattering
from tba.models.base import DiagonalModel


def free_fermion():
    """Free Majorana fermion (Ising field theory, thermal perturbation): S = -1, phi = 0, c = 1/2.

    The TBA is solved in closed form: E_0(R) = -(1/pi) sum_k (-1)^(k+1) K_1(k R) / k.
    """
    return DiagonalModel(name="free-fermion", masses=[1.0], blocks=(({},),),
                         description="free Majorana fermion, S = -1")


def sinh_gordon(B):
    """sinh-Gordon model with coupling B in (0, 2) (self-dual point B = 1).

    S(t) = (sinh t - i sin(pi B/2)) / (sinh t + i sin(pi B/2)) = 1 / f_(B/2)(t),
    phi(t) = 2 sin(pi B/2) cosh t / (sinh^2 t + sin^2(pi B/2)), invariant under B -> 2 - B.
    c_eff -> 1 as R -> 0, logarithmically slowly. Bulk energy density m^2 / (8 sin(pi B/2)).
    """
    B = _coupling_in_open_interval(B)
    # keep B/2 exact when B is a short decimal, so that B and 2 - B give the same block
    exact = Fraction(B).limit_denominator(10**12)
    x = exact / 2 if float(exact) == B else B / 2
    return DiagonalModel(name="sinh-gordon", masses=[1.0], blocks=(({x: -1},),), coupling=B,
                         bulk_energy_density=1.0 / (8.0 * math.sin(math.pi * B / 2)),
                         description=f"sinh-Gordon, B = {B!r}")


def _ade_bulk(blocks):
    """Bulk energy density of an ADE theory from the lightest particle's S-matrix:
    f = -m_1^2 / (8 sum_x n_11(x) sin(pi x)). Formula from memory; checked in
    tests/test_thermo.py by fitting R E_0(R) at small R (Lee-Yang, E8)."""
    return -1.0 / (8.0 * sum(k * math.sin(math.pi * float(x)) for x, k in blocks[0][0].items()))


def lee_yang():
    """Scaling Lee-Yang model: S = f_(2/3), c_eff = 2/5 (the A_1 tadpole of the ADE series).
    Bulk energy density -m^2 / (4 sqrt 3)."""
    masses, blocks = ade_scattering(TADPOLE_INCIDENCE, TADPOLE_COXETER)
    return DiagonalModel(name="lee-yang", masses=masses, blocks=blocks,
                         bulk_energy_density=_ade_bulk(blocks),
                         description="scaling Lee-Yang model, S = f_(2/3)")


def ising_e8():
    """Scaling Ising model in a magnetic field: the E8 theory, 8 particles, c = 1/2.

    Masses and S-matrices are generated from the ADE identity for the E8 diagram
    (see `tba.models.ade`), not typed in.
    """
    masses, blocks = ade_scattering(E8_INCIDENCE, E8_COXETER)
    return DiagonalModel(name="ising-e8", masses=masses, blocks=blocks,
                         bulk_energy_density=_ade_bulk(blocks),
                         description="E8 scaling Ising model, 8 particles")


def user_model(masses, blocks=None, kernel=None, pole_distance=None, statistics="fermion",
               name="user", sign=None):
    """A user-defined diagonal model.

    Give either ``blocks`` ({x: multiplicity} per pair a, b) or ``kernel`` (a callable
    t -> phi_ab(t) of shape (n, n) + t.shape) together with ``pole_distance``.
    For one species, ``blocks`` may be a single dict and ``kernel`` may return t.shape.
    """
    masses = np.atleast_1d(np.asarray(masses, dtype=float))
    n = masses.size
    if blocks is not None and isinstance(blocks, dict):
        if n != 1:
            raise ValueError("blocks: a single dict only describes a one-species model")
        blocks = ((blocks,),)
    kernel_function = None
    if kernel is not None:
        if not callable(kernel):
            raise TypeError(f"kernel must be callable, got {type(kernel).__name__}")
        if pole_distance is None:
            raise ValueError("pole_distance is required with a kernel callable")
        if n == 1:
            kernel_function = lambda t: np.asarray(kernel(t), dtype=float).reshape((1, 1) + np.shape(t))
        else:
            kernel_function = kernel
    return DiagonalModel(name=name, masses=masses, blocks=blocks, kernel_function=kernel_function,
                         pole_distance=np.inf if pole_distance is None else pole_distance,
                         statistics=statistics, sign=sign, description="user-defined model")


def _coupling_in_open_interval(B):
    try:
        B = float(B)
    except (TypeError, ValueError):
        raise TypeError(f"coupling must be a real number, got {B!r}") from None
    if not (np.isfinite(B) and 0.0 < B < 2.0):
        raise ValueError(f"coupling B must lie in (0, 2), got {B!r}")
    return B


MODELS = {
    "free-fermion": free_fermion,
    "sinh-gordon": sinh_gordon,
    "lee-yang": lee_yang,
    "ising-e8": ising_e8,
}
MODELS_WITH_COUPLING = {"sinh-gordon"}


def get_model(name, coupling=None):
    """Build a built-in model by its command-line name; ``coupling`` only for models that have one."""
    if name not in MODELS:
        raise ValueError(f"model must be one of {', '.join(MODELS)}, got {name!r}")
    if name in MODELS_WITH_COUPLING:
        if coupling is None:
            raise ValueError(f"coupling is required for {name}")
        return MODELS[name](coupling)
    if coupling is not None:
        raise ValueError(f"coupling: model {name} has no coupling")
    return MODELS[name]()
