"""Massless models: free massless theories (conformal) and the tricritical-Ising-to-Ising flow.

A massless species is a right mover (energy = momentum = (M/2) e^t) or a left mover (energy =
-momentum = (M/2) e^{-t}); `DiagonalModel` carries the chirality per species and M as the
species' entry of ``masses``. Its ground-state TBA is

    eps_a(t) = (M R / 2) e^{+-t} - sum_b (1/2 pi) int phi_ab(t - t') L_b(t') dt',
    E = -sum_a g_a (M / 4 pi) int e^{+-t} L_a(t) dt,

with L = log(1 + e^-eps) (fermions) or -log(1 - e^-eps) (bosons) and g_a the multiplicity
(docs/physics.md section 9). The models here:

* ``massless_fermion``: the massless free Majorana fermion, one right and one left species,
  S_RR = S_LL = S_RL = -1 (the m -> 0 limit of the free Majorana fermion, S = -1), c = 1/2.
  E(R) = -pi / (12 R) exactly, the Neveu-Schwarz sector of both chiralities.
* ``massless_bosons(n)``: n free massless bosons, S = +1, bosonic statistics: one right and
  one left species of multiplicity n, c = n. E(R) = -pi n / (6 R). n = 24 with TTbar is the
  light-cone spectrum of the Nambu-Goto string in D = 26 (J.F. Arvis, Phys. Lett. B127 (1983)
  106, from memory).
* ``tricritical_to_ising``: the massless flow from the tricritical Ising model (c = 7/10) to
  the Ising model (c = 1/2), perturbed by the phi_13 operator with the sign that has no mass gap
  (Al.B. Zamolodchikov, Nucl. Phys. B358 (1991) 524, from memory): one right and one left
  Majorana-like species with S_RR = S_LL = -1 and S_RL(t) = tanh(t/2 - i pi/4), t = t_R - t_L.
  d/dt log tanh(z) = 2 / sinh(2 z), so d/dt log S_RL = 1 / sinh(t - i pi/2) = i / cosh t and
  the kernel between the chiralities is phi_RL = -i d/dt log S_RL = 1 / cosh t, positive and
  even, with int phi_RL = pi; parity (t -> -t, R <-> L) gives phi_LR(t) = phi_RL(-t), the
  same function. As block
  content tanh(t/2 - i pi/4) = i / <1/2>(t) (the half-block <x> of `tba.models.blocks` at
  x = 1/2; the constant i drops out of the kernel), so the pair carries {<1/2>: -1}, whose
  transform pi / cosh(pi k / 2) the solver uses for band-limited weights. M is the crossover
  scale: c_eff(R) goes from 7/10 at M R -> 0 to 1/2 at M R -> infinity.

The TTbar factor needs nothing model-specific: its kernel e_a(t) e_b(t') - p_a(t) p_b(t') is
built from the energies and momenta, and vanishes between two right movers.
"""

from fractions import Fraction

from tba.models.base import DiagonalModel
from tba.models.blocks import HalfBlock

#: the largest number of free bosons a built-in model offers (one species of multiplicity n
#: per chirality: the cost does not depend on n)
MAX_BOSONS = 1024


def _scale(scale):
    if isinstance(scale, bool):
        raise TypeError(f"scale must be a real number, got {scale!r}")
    try:
        value = float(scale)
    except (TypeError, ValueError):
        raise TypeError(f"scale must be a real number, got {scale!r}") from None
    if not (value > 0 and value < float("inf")):
        raise ValueError(f"scale must be finite and positive, got {scale!r}")
    return value


def massless_fermion(scale=1.0):
    """The massless free Majorana fermion (c = 1/2): a right and a left mover of scale M =
    ``scale`` (arbitrary: no physical quantity depends on it), S = -1 for every pair."""
    M = _scale(scale)
    return DiagonalModel(name="massless-fermion", masses=[M, M], blocks=(({}, {}), ({}, {})),
                         chirality=("right", "left"), labels=("R", "L"), bulk_energy_density=0.0,
                         description="massless free Majorana fermion, S = -1, c = 1/2")


def _boson_number(n):
    if isinstance(n, bool):
        raise TypeError(f"coupling n must be a positive integer, got {n!r}")
    try:
        value = float(n)
    except (TypeError, ValueError):
        raise TypeError(f"coupling n must be a positive integer, got {n!r}") from None
    if not (value.is_integer() and 1 <= value <= MAX_BOSONS):
        raise ValueError(f"coupling n must be an integer in 1..{MAX_BOSONS}, got {n!r}")
    return int(value)


def massless_bosons(n, scale=1.0):
    """n free massless bosons (c = n): a right and a left species of multiplicity n, S = +1,
    bosonic statistics. n = 24 with TTbar: the Nambu-Goto string in 26 dimensions."""
    n = _boson_number(n)
    M = _scale(scale)
    return DiagonalModel(name="massless-bosons", masses=[M, M], blocks=(({}, {}), ({}, {})),
                         sign=[[1, 1], [1, 1]], statistics="boson", chirality=("right", "left"),
                         multiplicity=(n, n), labels=("R", "L"), coupling=n,
                         bulk_energy_density=0.0,
                         description=f"{n} free massless boson{'s' if n > 1 else ''}, S = 1, c = {n}")


def tricritical_to_ising(scale=1.0):
    """The massless flow tricritical Ising (c = 7/10) -> Ising (c = 1/2): S_RR = S_LL = -1,
    S_RL = tanh(t/2 - i pi/4), kernel 1 / cosh t between the chiralities (module docstring).
    ``scale`` is the crossover scale M (the unit of energy of this model)."""
    M = _scale(scale)
    rl = {HalfBlock(Fraction(1, 2)): -1}
    return DiagonalModel(name="tricritical-to-ising", masses=[M, M], blocks=(({}, rl), (rl, {})),
                         chirality=("right", "left"), labels=("R", "L"),
                         description="massless flow tricritical Ising -> Ising, S_RR = S_LL = -1, "
                                     "S_RL = tanh(t/2 - i pi/4); c = 7/10 -> 1/2")
