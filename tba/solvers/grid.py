"""Uniform rapidity grids and the rule that chooses them.

The trapezoid rule on a uniform grid converges exponentially for functions analytic in
a strip |Im t| < d: the error of int f dt behaves like exp(-2 pi d / h). Two effects set d:

* the kernels' nearest poles (``model.pole_distance``);
* the pseudo-energies: L = log(1 + e^{-eps}) is singular where eps = i pi (2k+1); for
  the driving term m R cosh t this first happens at |Im t| = pi/2.

At large radius the integrands are sharply peaked (width ~ 1/sqrt(m R)) and exponentially
small, so the strip bound is taken relative to e^{-m R} (``_large_radius_spacing``). The cutoff Lambda is where m R (cosh Lambda - 1)
exceeds X, so that the neglected tails are e^{-X} relative to the peak.

Massless species decay on one side only. A right mover (driving term (M R / 2) e^t) has
L ~ exp(-(M R / 2) e^t) on the right of its kink t_k = log(2 / (M R)), and a plateau on the
left, where the energy weight e^t makes the integrand decay like e^{t - t_k}; so its window is
[t_k - u - log u - 1, t_k + log u] with u = X + 2 (a left mover: the mirror image), ~X e-folds
wide on the plateau side (``_massless_extent``). With kernels a plateau also acts on the other
species: a left mover's L stays finite to the right of the right movers' kink t_k and feeds their
eps there through kernel tails ~ e^{-kappa |t - t'|}, so the grid reaches u / kappa + 1 beyond
the outermost kink on each side (missing that costs 1e-10 relative in the flow of
`tba.models.massless` at M R = 1e-3, unseen by the tail estimate). The shape of the kink does
not depend on R, so no large-radius spacing applies. Grids stay symmetric about t = 0 and cover
every species' window: for a model with both chiralities and parity that is their union; a
model of one chirality pays up to twice the points (decision: one grid for all species keeps
the kernels Toeplitz and cached per (h, N)).

X = log(1/tol) + margin grows with the refinement level. Spacings are taken from a fixed
geometric ladder h = 2^{-j/8} so that kernels can be cached and reused across radii.
"""

import functools
import math
from dataclasses import dataclass

import numpy as np

LADDER_STEPS_PER_OCTAVE = 8
#: ladder steps between refinement levels: h shrinks by 2^(-1/2) per level, so the error of
#: a level is about the 1.4th power of the previous one and their difference bounds it
LEVEL_STEPS = 4
#: extra digits asked of each refinement level, in units of e-folds
LEVEL_MARGIN = 4.0
#: e-folds beyond log(1/tol) asked of the coarsest level: without them a few per cent of
#: the points of a scan need a third level (measured on sinh-Gordon, E8 and Lee-Yang scans)
BASE_MARGIN = 2.0
#: the half-width (N - 1)/2 is rounded up to a multiple of this, so that nearby radii share
#: cached operators (the ground state also rounds the effective radius, see tba.solvers.ground)
N_QUANTUM = 4


@dataclass(frozen=True)
class Grid:
    """t_i = (i - (N - 1)/2) h, i = 0..N-1: symmetric about t = 0."""

    h: float
    N: int

    @property
    def t(self):
        return _points(self.h, self.N)

    @property
    def cutoff(self):
        return (self.N - 1) / 2.0 * self.h

    def describe(self):
        return {"spacing": self.h, "points": self.N, "cutoff": self.cutoff}


@functools.lru_cache(maxsize=1024)
def _points(h, N):
    t = (np.arange(N) - (N - 1) / 2.0) * h
    t.flags.writeable = False  # shared by every user of the grid
    return t


def ladder(h):
    """The largest ladder spacing 2^{-j/8} <= h."""
    j = math.ceil(-LADDER_STEPS_PER_OCTAVE * math.log2(h) - 1e-9)
    return 2.0 ** (-j / LADDER_STEPS_PER_OCTAVE)


def exponent(tol, level):
    """X: the number of e-folds the grid of refinement ``level`` resolves."""
    return math.log(1.0 / tol) + BASE_MARGIN + LEVEL_MARGIN * level


def _large_radius_spacing(mr, X):
    """Largest h whose trapezoid error for int cosh t e^{-mr cosh t} dt is e^{-X} relative.

    The error is bounded by exp(mr (1 - cos y) - 2 pi y / h) for any strip half-width
    0 < y <= pi/2: y = pi/2 gives h = pi^2 / (X + mr); the saddle point sin y = 2 pi / (h mr)
    does better at large mr. Both bounds are valid; the larger h is kept.
    """
    h = math.pi ** 2 / (X + mr)

    def excess(h):  # min over y of the exponent, plus X (<= 0 means h is fine)
        s = 2 * math.pi / (h * mr)
        if s >= 1:
            return mr - math.pi ** 2 / h + X
        y = math.asin(s)
        return mr * (1 - math.cos(y)) - 2 * math.pi * y / h + X

    lo, hi = h, 4.0
    if excess(hi) <= 0:
        return hi
    for _ in range(32):  # relative 1e-9: far finer than the ladder that rounds h afterwards
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if excess(mid) <= 0 else (lo, mid)
    return lo


def _massless_extent(scales, radius, decay_radius, u, kernel_decay, min_mass):
    """Half-width covering the windows of the massless species (module docstring).

    ``scales``: (mu^+, mu^-) per massless species (one of them zero). The driving side's end,
    where (mu R / 2) e^|t| = u, uses the decay radius (Re R for a complex radius); the plateau
    side's end, u + log u + 1 e-folds before the kink, uses |R| (the larger: a longer plateau).
    With a kernel (``kernel_decay`` kappa) the grid reaches u / kappa + 1 beyond the outermost
    kink, massive species' kinks (log(2 / m R), or 0) included."""
    half, kink = 0.0, -math.inf
    for mu_plus, mu_minus in scales:
        mu = mu_plus or mu_minus
        drive_end = math.log(2 * u / (mu * decay_radius))
        plateau_end = u + math.log(u) + 1.0 - math.log(2 / (mu * radius))
        half = max(half, drive_end, plateau_end)
        kink = max(kink, math.log(2 / (mu * radius)))
    if kernel_decay is not None:
        if min_mass is not None:
            kink = max(kink, math.log(2 / (min_mass * radius)), 0.0)
        half = max(half, kink + u / kernel_decay + 1.0)
    return half


def choose_grid(pole_distance, min_mass, r_eff, tol, level=0, cutoff_extra=0.0, max_spin=1,
                strip=math.pi / 2, shift=0.0, decay_radius=None, quantum=None, massless=(),
                kernel_decay=None):
    """The grid for a point with effective radius ``r_eff`` (> 0) at relative tolerance ``tol``.

    Level 0 resolves log(1/tol) e-folds; every further level is LEVEL_STEPS ladder steps
    finer (h / sqrt 2) and cuts off LEVEL_MARGIN e-folds further out, so that successive
    levels always differ and the coarser one's error dominates their difference.
    ``cutoff_extra`` widens the cutoff (in e-folds) when a solve found its tails too large.
    ``max_spin`` is the highest CDD spin: a cosh(s t) term brings the singularities of L to
    |Im t| = pi / 2s. ``strip`` is where L's singularities lie for the driving term alone:
    pi/2 for a real radius, pi/2 - |arg R| for a complex one. ``shift`` widens the grid by a
    boost rapidity: states with momentum have a driving term m R~ cosh(t - beta).
    ``decay_radius`` (default ``r_eff``) sets the cutoff: for a complex radius R the integrands
    decay like e^{-Re(R) cosh t}, so pass |R| as ``r_eff`` and Re R here. ``quantum``
    (default N_QUANTUM) is what the half-width in points is rounded up to. ``massless``:
    (mu^+, mu^-) of each massless species (`DiagonalModel.massless_scales`); ``min_mass`` is then
    the smallest mass of the massive species, None if there are none, and ``kernel_decay`` the
    model's `DiagonalModel.kernel_decay`.
    """
    X0 = exponent(tol, 0)
    d = min(pole_distance, strip / max_spin)
    # strip bound e^{-2 pi d / h} times the integrand's size near the strip edge, which grows
    # like 2 pi e / h when the best half-width d - h / 2pi is used
    h = 2 * math.pi * d / X0
    for _ in range(3):
        h = 2 * math.pi * d / (X0 + math.log(2 * math.pi * math.e / h))
    if min_mass is not None:
        h = min(h, _large_radius_spacing(min_mass * r_eff, X0))
    h = ladder(h) * 2.0 ** (-LEVEL_STEPS * level / LADDER_STEPS_PER_OCTAVE)
    X = exponent(tol, level)
    decay = r_eff if decay_radius is None else decay_radius
    u = X + 2.0 + cutoff_extra
    lam = 0.0 if min_mass is None else math.acosh(1.0 + u / (min_mass * decay))
    if massless:
        lam = max(lam, _massless_extent(massless, r_eff, decay, u, kernel_decay, min_mass))
    lam += abs(shift)
    half = math.ceil(lam / h)
    q = N_QUANTUM if quantum is None else quantum
    half = q * math.ceil(half / q)
    return Grid(h=h, N=2 * half + 1)
