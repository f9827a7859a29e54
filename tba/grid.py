"""Uniform rapidity grids and the rule that chooses them.

The trapezoid rule on a uniform grid converges exponentially for functions analytic in
a strip |Im t| < d: the error of int f dt behaves like exp(-2 pi d / h). Two effects set d:

* the kernels' nearest poles (``model.pole_distance``);
* the pseudo-energies: L = log(1 + e^{-eps}) is singular where eps = i pi (2k+1); for
  the driving term m R cosh t this first happens at |Im t| = pi/2.

At large radius the integrands are sharply peaked (width ~ 1/sqrt(m R)); the rule then
also asks h <= pi sqrt(2 / (m R X)). The cutoff Lambda is where m R (cosh Lambda - 1)
exceeds X, so that the neglected tails are e^{-X} relative to the peak.

X = log(1/tol) + margin grows with the refinement level. Spacings are taken from a fixed
geometric ladder h = 2^{-j/8} so that kernels can be cached and reused across radii.
"""

import math
from dataclasses import dataclass

import numpy as np

LADDER_STEPS_PER_OCTAVE = 8
#: extra digits asked of each refinement level, in units of e-folds
LEVEL_MARGIN = 4.0
#: N is rounded up to a multiple of this (plus one), so nearby radii share cached operators
N_QUANTUM = 16


@dataclass(frozen=True)
class Grid:
    """t_i = (i - (N - 1)/2) h, i = 0..N-1: symmetric about t = 0."""

    h: float
    N: int

    @property
    def t(self):
        return (np.arange(self.N) - (self.N - 1) / 2.0) * self.h

    @property
    def cutoff(self):
        return (self.N - 1) / 2.0 * self.h

    def describe(self):
        return {"spacing": self.h, "points": self.N, "cutoff": self.cutoff}


def ladder(h):
    """The largest ladder spacing 2^{-j/8} <= h."""
    j = math.ceil(-LADDER_STEPS_PER_OCTAVE * math.log2(h) - 1e-9)
    return 2.0 ** (-j / LADDER_STEPS_PER_OCTAVE)


def exponent(tol, level):
    """X: the number of e-folds the grid of refinement ``level`` resolves."""
    return math.log(1.0 / tol) + LEVEL_MARGIN * level


def choose_grid(pole_distance, min_mass, r_eff, tol, level=0, cutoff_extra=0.0):
    """The grid for a point with effective radius ``r_eff`` (> 0) at relative tolerance ``tol``.

    ``cutoff_extra`` widens the cutoff (in e-folds) when a solve found its tails too large.
    """
    X = exponent(tol, level)
    d = min(pole_distance, math.pi / 2)
    mr = min_mass * r_eff
    h = min(2 * math.pi * d / X, math.pi * math.sqrt(2.0 / (mr * X)))
    h = ladder(h)
    lam = math.acosh(1.0 + (X + 2.0 + cutoff_extra) / mr)
    half = math.ceil(lam / h)
    half = N_QUANTUM * math.ceil(half / N_QUANTUM)
    return Grid(h=h, N=2 * half + 1)
