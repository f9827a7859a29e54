"""CDD deformations of diagonal S-matrices.

Convention of the project (README, section Conventions):

    S_ab(t) -> S_ab(t) * prod_s exp(i alpha_s q^a_s q^b_s sinh(s t)),   s odd
    phi_ab  -> phi_ab + sum_s alpha_s s q^a_s q^b_s cosh(s t)

Spin 1 with q^a_1 = m_a is the TTbar deformation with coupling alpha; alpha > 0 is the
side where the ground state meets a square-root branch point at finite radius (Hagedorn).
Higher odd spins are offered for single-species models, with q_s = 1.

The added kernel is separable, cosh(s(t - t')) = cosh(st) cosh(st') - sinh(st) sinh(st'),
so the solver applies each spin as two rank-one terms: its cost does not depend on the
deformation.
"""

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np


@dataclass(frozen=True)
class CDD:
    """A sum of CDD factors, ``{spin: alpha_s}``.

    ``CDD({1: 0.1})`` is TTbar with alpha = 0.1; ``CDD({1: 0.1, 3: -0.02})`` adds a
    spin-3 factor. Deformations add: ``ttbar(0.1) + higher_spin(3, -0.02)``.
    """

    couplings: Mapping[int, float] = field(default_factory=dict)

    def __post_init__(self):
        clean = {}
        for s, a in dict(self.couplings).items():
            if isinstance(s, bool) or int(s) != s or s < 1 or s % 2 == 0:
                raise ValueError(f"spin must be a positive odd integer, got {s!r}")
            try:
                a = float(a)
            except (TypeError, ValueError):
                raise TypeError(f"alpha_{s} must be a real number, got {a!r}") from None
            if not np.isfinite(a):
                raise ValueError(f"alpha_{s} must be finite, got {a!r}")
            if a != 0.0:
                clean[int(s)] = clean.get(int(s), 0.0) + a
        object.__setattr__(self, "couplings", dict(sorted(clean.items())))

    def __add__(self, other):
        merged = dict(self.couplings)
        for s, a in other.couplings.items():
            merged[s] = merged.get(s, 0.0) + a
        return CDD(merged)

    def scaled(self, factor):
        """The same deformation with every coupling multiplied by ``factor``."""
        return CDD({s: factor * a for s, a in self.couplings.items()})

    @property
    def alpha(self):
        """The TTbar coupling (spin 1), 0 if absent."""
        return self.couplings.get(1, 0.0)

    @property
    def is_zero(self):
        return not self.couplings

    @property
    def is_ttbar(self):
        """True when only spin 1 is present (then the flow relation is exact for P = 0)."""
        return set(self.couplings) <= {1}

    def charges(self, model, spin):
        """q^a_s for every species of ``model``."""
        if spin == 1:
            return np.asarray(model.masses, dtype=float)
        if model.n_species != 1:
            raise ValueError(f"spin-{spin} CDD factors are only available for single-species models "
                             f"({model.name} has {model.n_species} species)")
        return np.ones(1)

    def describe(self):
        return {"convention": "S -> S exp(i alpha_s q_a q_b sinh(s t)); spin 1: q = m (TTbar)",
                "couplings": {str(s): a for s, a in self.couplings.items()}}


def ttbar(alpha):
    """The TTbar CDD factor exp(i alpha m_a m_b sinh t)."""
    return CDD({1: alpha})


def higher_spin(spin, alpha_s):
    """A spin-``spin`` CDD factor exp(i alpha_s sinh(spin t)) (single-species models)."""
    return CDD({spin: alpha_s})


NO_DEFORMATION = CDD({})
