"""Excited levels of the free massless theories, TTbar-deformed (docs/physics.md section 9).

A level of a free massless model (one right-moving and one left-moving species, no kernel:
`tba.models.massless`) is named by its Bethe quantum numbers I_k as for massive models, their
sign giving the chirality: I_k > 0 a right mover of momentum 2 pi I_k / R, I_k < 0 a left mover
(I = 0 does not exist: a massless particle has no rest frame). Fermions (S = -1) follow the
massive rule: half-odd I for an even number of particles (the Neveu-Schwarz sector of both
chiralities), integers for an odd number (the Ramond sector: L = log(1 - e^-eps)), all distinct;
bosons (S = +1) have integer I, repeats allowed ("1,1" and "2" are the two states of level
(D, Dbar) = (2, 0)), and the colours of n bosons do not change the energy (`free_levels` counts
the states of each level).

The equations are the massive excited-state equations with S = -1 or +1 and the TTbar factor
(tba.solvers.excited), taken to the massless limit with e_a(t), p_a(t) of the species: the
sources of the particles and the integrals act only through the rank-one TTbar terms, so

    eps_a(t) = (R + alpha E) e_a(t) - alpha P p_a(t):   eps_R = A e_R(t),  eps_L = B e_L(t),
    A = R + alpha (E - P) = R + 2 alpha E_L,   B = R + alpha (E + P) = R + 2 alpha E_R,
    A e_R(t_k) = 2 pi I_k (right movers),      B e_L(t_k) = 2 pi |I_k| (left movers),
    E_R = sum_(k right) e_R(t_k) - (g_R / 2 pi) int e_R(t) L_R(t) dt,    E = E_R + E_L,  P = E_R - E_L

(E_L likewise), with L = log(1 + sigma e^-eps), sigma = (-1)^N for fermions, -log(1 - e^-eps)
for bosons, and g the multiplicity. On the grid the pseudo-energies are exactly A e_R(t_i) and
B e_L(t_i), so the discretised equations are the N + 2 equations above for (A, B, t_1..t_N),
with E_R and E_L the grid sums: solved by Newton's method, the coupling switched on at fixed R
from alpha = 0 (where A = B = R) by pseudo-arclength continuation in its scale lambda, which
stops at a fold (dlambda/ds = 0: the branch point, no real solution beyond it). The point is
then solved on grids of increasing resolution chosen for its own A and B; the difference of the
last two energies, plus the Newton iteration error, the rounding of the equations propagated to
E through the adjoint solution and the tails, is the error estimate. `tol` is relative to
max(|E|, 1/R) (E = 0 is a level of 24 bosons: (D, Dbar) = (1, 1)).
"""

import math
from dataclasses import dataclass, field
from fractions import Fraction
from itertools import combinations

import numpy as np

from kernels import occupation_terms
from tba.solvers.excited import parse_state
from tba.solvers.grid import choose_grid
from tba.solvers.result import SolveResult, Status

_EPS = np.finfo(float).eps
#: refinement levels tried before a point is declared not converged
MAX_LEVEL = 4
#: extra e-folds of every grid's cutoff: the continuation walks to smaller A, B than it starts at
CUTOFF_EXTRA = 4.0


# -- what can be solved here -------------------------------------------------------------------

def _species(model):
    """(index of the right mover, index of the left mover)."""
    return model.chirality.index("right"), model.chirality.index("left")


def model_refusal(model):
    """Why ``model`` has no excited levels here (one phrase), or None."""
    if not model.is_massless:
        return f"{model.name} is massive"
    if sorted(model.chirality) != ["left", "right"]:
        return ("excited levels of massless models need one right-moving and one left-moving "
                "species")
    if model.kernel_decay is not None:
        return (f"{model.name} is interacting: excited levels are solved for free massless "
                f"models only")
    if model.blocks is None:
        return "excited levels of massless models need a model given by block content"
    s = set(model.sign.ravel().tolist())
    if model.statistics == "fermion" and (s != {-1.0} or model.has_multiplicity):
        return "a free massless fermion here has S = -1 for every pair and multiplicity 1"
    if model.statistics == "boson" and s != {1.0}:
        return "free massless bosons here have S = +1 for every pair"
    return None


def state_refusal(model, state):
    """Why ``state`` (sorted Fractions) is not a level of the free massless ``model``, or None."""
    if any(n == 0 for n in state):
        return "a massless particle needs a non-zero quantum number (its sign is its chirality)"
    if model.statistics == "boson":
        bad = [n for n in state if n.denominator != 1]
        if bad:
            return f"bosons have integer quantum numbers, got {bad[0]}"
        return None
    try:
        parse_state(state)
    except ValueError as exc:
        return str(exc).split(": ", 1)[-1]
    return None


def refusal(model, state, deformation=None):
    """Why the level ``state`` of ``model`` with ``deformation`` cannot be solved here, or None."""
    why = model_refusal(model) or state_refusal(model, state)
    if why is None and deformation is not None and not (deformation.is_zero or deformation.is_ttbar):
        why = "excited levels of massless models take the TTbar factor (spin 1) only"
    return why


# -- the levels of a free massless model -------------------------------------------------------

@dataclass(frozen=True)
class FreeLevel:
    """A conformal level (D, Dbar) of a free massless model: its number of states
    (``degeneracy``, colours of n bosons included) and the names of the TBA states that carry it
    (quantum numbers; the colours are not part of a name)."""

    D: Fraction
    Dbar: Fraction
    degeneracy: int
    states: tuple

    @property
    def momentum_number(self):
        """k in R P = 2 pi k: D - Dbar."""
        return self.D - self.Dbar


def _partitions(n, largest=None):
    """Partitions of the integer n into positive parts (tuples, non-increasing)."""
    largest = n if largest is None else largest
    if n == 0:
        yield ()
        return
    for first in range(min(n, largest), 0, -1):
        for rest in _partitions(n - first, first):
            yield (first,) + rest


def _colourings(parts, n):
    """The number of ways to give n colours to the bosons of ``parts`` (a multiset of modes):
    prod over distinct modes of C(n + k - 1, k), k the mode's occupation."""
    out = 1
    for v in set(parts):
        k = parts.count(v)
        out *= math.comb(n + k - 1, k)
    return out


def _distinct_sums(values, total):
    """Sets of distinct ``values`` (Fractions) with the given sum."""
    out = []
    for r in range(len(values) + 1):
        out += [c for c in combinations(values, r) if sum(c, Fraction(0)) == total]
    return out


def _name(numbers):
    return ",".join(str(n) for n in sorted(numbers)) or "ground"


def free_levels(model, max_level):
    """The levels (D, Dbar) of a free massless model with D, Dbar <= ``max_level``, in order of
    D + Dbar, then D: a list of `FreeLevel`.

    Bosons (c = n): the oscillator modes of each chirality, D a sum of positive integers, with
    degeneracy p_n(D) p_n(Dbar), p_n(D) the coefficient of q^D in prod_m (1 - q^m)^(-n). The
    fermion (c = 1/2): Neveu-Schwarz levels (an even number of particles, distinct half-odd
    modes, D their sum) and Ramond levels (an odd number, distinct positive integer modes,
    D = 1/16 + their sum; the zero mode, and with it the Ramond ground state, is not a TBA level
    here)."""
    from tba.solvers.ground import require_model

    why = model_refusal(require_model(model))
    if why is not None:
        raise ValueError(f"model: {why}")
    if isinstance(max_level, bool) or not isinstance(max_level, (int, np.integer)) or max_level < 0:
        raise ValueError(f"max_level must be a non-negative integer, got {max_level!r}")
    r, l = _species(model)
    levels = []
    if model.statistics == "boson":
        n = model.multiplicity[r]
        for D in range(max_level + 1):
            for Db in range(max_level + 1):
                right, left = list(_partitions(D)), list(_partitions(Db))
                degeneracy = sum(_colourings(a, n) for a in right) * sum(_colourings(b, n) for b in left)
                states = tuple(_name([Fraction(p) for p in a] + [-Fraction(p) for p in b])
                               for a in right for b in left)
                levels.append(FreeLevel(Fraction(D), Fraction(Db), degeneracy, states))
    else:
        for offset, modes in ((Fraction(0), [Fraction(2 * j + 1, 2) for j in range(max_level)]),
                              (Fraction(1, 16), [Fraction(j) for j in range(1, max_level + 1)])):
            steps = sorted({sum(c, Fraction(0)) for r_ in range(len(modes) + 1)
                            for c in combinations(modes, r_) if sum(c, Fraction(0)) <= max_level - offset})
            for sR in steps:
                for sL in steps:
                    states = tuple(_name(list(a) + [-x for x in b])
                                   for a in _distinct_sums(modes, sR) for b in _distinct_sums(modes, sL)
                                   if (len(a) + len(b)) % 2 == (offset != 0))
                    if states:
                        levels.append(FreeLevel(offset + sR, offset + sL, len(states), states))
    return sorted(levels, key=lambda v: (v.D + v.Dbar, v.D))


# -- the equations -----------------------------------------------------------------------------

class _Equations:
    """The N + 2 equations for z = (A, B, t_1..t_N) on one grid at coupling lambda * alpha."""

    def __init__(self, model, radius, state, alpha, grid):
        r, l = _species(model)
        self.radius, self.alpha, self.grid = radius, alpha, grid
        self.I = np.array([float(n) for n in state])
        self.right = self.I > 0
        e = model.energies(grid.t)
        self.eR, self.eL = e[r], e[l]
        g = model.multiplicity
        self.wR = -(grid.h / (2 * np.pi)) * g[r] * self.eR
        self.wL = -(grid.h / (2 * np.pi)) * g[l] * self.eL
        self.half_mass = np.where(self.right, model.masses[r], model.masses[l]) / 2
        self.boson = model.statistics == "boson"
        # fermions: sigma = (-1)^N; sigma = -1 gives L = log(1 - e^-eps) = -(the bosonic L)
        self.flip = not self.boson and len(state) % 2 == 1

    def occupation(self, eps):
        L, dL = np.empty_like(eps), np.empty_like(eps)
        bad = occupation_terms(np.ascontiguousarray(eps), 1 if not (self.boson or self.flip) else -1,
                               L, dL)
        if self.flip:
            L, dL = -L, -dL
        return L, dL, bad == 0

    def particle_energies(self, theta):
        """e(t_k): (M/2) e^{t_k} for right movers, (M/2) e^{-t_k} for left movers."""
        return self.half_mass * np.exp(np.where(self.right, theta, -theta))

    def evaluate(self, z, lam):
        """(G, J = dG/dz, dG/dlambda, E, P, dE/dz, parts) at z, or None outside the domain."""
        A, B, theta = z[0], z[1], z[2:]
        if not (A > 0 and B > 0) or not np.all(np.abs(theta) < 700):
            return None
        LR, dLR, okR = self.occupation(A * self.eR)
        LL, dLL, okL = self.occupation(B * self.eL)
        if not (okR and okL):
            return None
        ek = self.particle_energies(theta)
        ER = float(self.wR @ LR) + float(ek[self.right].sum())
        EL = float(self.wL @ LL) + float(ek[~self.right].sum())
        dER = float(self.wR @ (dLR * self.eR))
        dEL = float(self.wL @ (dLL * self.eL))
        a = lam * self.alpha
        n = theta.size
        G = np.empty(n + 2)
        G[0] = A - self.radius - 2 * a * EL
        G[1] = B - self.radius - 2 * a * ER
        G[2:] = np.where(self.right, A, B) * ek - 2 * np.pi * np.abs(self.I)
        J = np.zeros((n + 2, n + 2))
        J[0, 0] = J[1, 1] = 1.0
        J[0, 1] = -2 * a * dEL
        J[1, 0] = -2 * a * dER
        dek = np.where(self.right, ek, -ek)  # d e(t_k) / d t_k
        J[0, 2:] = np.where(self.right, 0.0, -2 * a * dek)
        J[1, 2:] = np.where(self.right, -2 * a * dek, 0.0)
        J[2:, 0] = np.where(self.right, ek, 0.0)
        J[2:, 1] = np.where(self.right, 0.0, ek)
        J[2 + np.arange(n), 2 + np.arange(n)] = np.where(self.right, A, B) * dek
        dG = np.zeros(n + 2)
        dG[0], dG[1] = -2 * self.alpha * EL, -2 * self.alpha * ER
        gradE = np.concatenate([[dER, dEL], dek])
        parts = dict(LR=LR, LL=LL, ek=ek, ER=ER, EL=EL)
        return G, J, dG, ER + EL, ER - EL, gradE, parts

    def scaled(self, G):
        """max |G| in the natural units of each equation (R; 2 pi |I_k|)."""
        return float(np.max(np.abs(G) / np.concatenate([[self.radius] * 2, 2 * np.pi * np.abs(self.I)])))


def _grid(model, A, B, tol, level):
    """The grid for right movers at radius A and left movers at B: R~ = sqrt(A B) seen from a
    frame boosted by beta = log(B / A) / 2 (the windows move by beta)."""
    Rt = math.sqrt(A * B)
    q = 2.0 ** (math.floor(64 * math.log2(Rt)) / 64)  # shared grids for neighbouring radii
    return choose_grid(math.inf, None, q, tol, level, cutoff_extra=CUTOFF_EXTRA,
                       shift=0.5 * math.log(B / A), massless=model.massless_scales)


def _newton(eqs, z, lam, tol, maxiter=60):
    """Newton with backtracking at fixed lambda: (z, evaluation, iterations, iteration error)
    or None. Stops, without the step, once the step's energy change is below tol / 10 of the
    scale max(|E|, 1/R) and the step itself is small."""
    ev = eqs.evaluate(z, lam)
    if ev is None:
        return None
    r = eqs.scaled(ev[0])
    for it in range(maxiter + 1):
        G, J, _, E, _, gradE, _ = ev
        try:
            delta = np.linalg.solve(J, -G)
        except np.linalg.LinAlgError:
            return None
        if not np.all(np.isfinite(delta)):
            return None
        dE = abs(float(gradE @ delta))
        small = max(abs(delta[0]) / z[0], abs(delta[1]) / z[1],
                    float(np.max(np.abs(delta[2:]), initial=0.0))) < 1e-6 or r < 1e-15
        if small and dE <= max(0.1 * tol, 8 * _EPS) * max(abs(E), 1.0 / eqs.radius):
            return z, ev, it, dE
        if it == maxiter:
            return None
        step = 1.0
        while True:
            trial = eqs.evaluate(z + step * delta, lam)
            if trial is not None and (eqs.scaled(trial[0]) <= (1 - 0.25 * step) * r or r < 1e-15):
                break
            step *= 0.5
            if step < 1e-6:
                return None
        z, ev, r = z + step * delta, trial, eqs.scaled(trial[0])
    return None


# -- switching the coupling on: pseudo-arclength in lambda --------------------------------------

def _tangent(eqs, z, lam, weights, previous=None):
    """Unit tangent (dz, dlambda) of G(z, lambda) = 0 in the norm sum w dz^2 + dlambda^2, oriented
    along ``previous`` or, without it, towards growing lambda."""
    _, J, dG, *_ = eqs.evaluate(z, lam)
    n = z.size
    if previous is None:
        dz = -np.linalg.solve(J, dG)
        v = np.concatenate([dz, [1.0]])
    else:
        M = np.zeros((n + 1, n + 1))
        M[:n, :n], M[:n, n] = J, dG
        M[n, :n], M[n, n] = weights * previous[:n], previous[n]
        v = np.linalg.solve(M, np.concatenate([np.zeros(n), [1.0]]))
    return v / math.sqrt(float(np.sum(weights * v[:n] ** 2) + v[n] ** 2))


def _corrector(eqs, x_pred, tangent, weights, maxiter=20):
    """Newton on [G(z, lambda) = 0, (x - x_pred) . tangent = 0] from the predictor."""
    x = x_pred.copy()
    n = x.size - 1
    for _ in range(maxiter):
        ev = eqs.evaluate(x[:n], x[n])
        if ev is None:
            return None
        G, J, dG = ev[:3]
        M = np.zeros((n + 1, n + 1))
        M[:n, :n], M[:n, n] = J, dG
        M[n, :n], M[n, n] = weights * tangent[:n], tangent[n]
        rhs = np.concatenate([-G, [-(float(np.sum(weights * tangent[:n] * (x[:n] - x_pred[:n])))
                                     + tangent[n] * (x[n] - x_pred[n]))]])
        try:
            dx = np.linalg.solve(M, rhs)
        except np.linalg.LinAlgError:
            return None
        x = x + dx
        if float(np.max(np.abs(dx) / (1 + np.abs(x)))) < 1e-13:
            return x if eqs.evaluate(x[:n], x[n]) is not None else None
    return None


@dataclass
class _Path:
    """Where switching the coupling on ended: ``kind`` "target" (z at lambda = 1), "fold" (the
    coupling scale ``fold`` of the turning point) or "failed" (``message``)."""

    kind: str
    z: np.ndarray = None
    fold: float = math.nan
    message: str = ""
    steps: int = 0


def _switch_on(model, radius, state, alpha, tol, z0):
    """Follow the level from lambda = 0 (z0) to lambda = 1 on level-0 grids designed for each
    point's A and B."""
    weights = np.concatenate([[1 / radius ** 2] * 2, np.ones(z0.size - 2)])

    def eqs_at(z):
        return _Equations(model, radius, state, alpha, _grid(model, z[0], z[1], tol, 0))

    x = np.concatenate([z0, [0.0]])
    n = z0.size
    tangent = _tangent(eqs_at(z0), z0, 0.0, weights)
    ds, steps = 0.25, 0
    while steps < 2000:
        steps += 1
        eqs = eqs_at(x[:n])
        if tangent[n] > 0 and x[n] + ds * tangent[n] >= 1.0:  # this step would reach lambda = 1
            out = _newton(eqs, x[:n] + (1.0 - x[n]) / tangent[n] * tangent[:n], 1.0, tol)
            if out is not None:
                return _Path("target", z=out[0], steps=steps)
            ds = 0.5 * (1.0 - x[n]) / tangent[n]
        new = _corrector(eqs, x + ds * tangent, tangent, weights)
        if new is None:
            ds *= 0.5
            if ds < 1e-12:
                return _Path("failed", message=f"continuation in the coupling stalled at "
                                               f"{x[n]:.9g} times alpha", steps=steps)
            continue
        new_tangent = _tangent(eqs, new[:n], new[n], weights, tangent)
        if new_tangent[n] <= 0 < tangent[n]:  # the branch turned back: a fold
            return _Path("fold", fold=_turning_point(eqs, x, tangent, new, new_tangent, weights),
                         steps=steps)
        x, tangent = new, new_tangent
        ds = min(2 * ds, 0.5)
    return _Path("failed", message="continuation in the coupling did not reach alpha", steps=steps)


def _turning_point(eqs, x0, t0, x1, t1, weights):
    """lambda at dlambda/ds = 0 between two points of the curve: secant in s along x0's tangent."""
    n = x0.size - 1
    s0, f0 = 0.0, t0[n]
    s1 = float(np.sqrt(np.sum(weights * (x1[:n] - x0[:n]) ** 2) + (x1[n] - x0[n]) ** 2))
    f1, best = t1[n], x1[n]
    for _ in range(40):
        if f1 == f0:
            break
        s2 = s1 - f1 * (s1 - s0) / (f1 - f0)
        x2 = _corrector(eqs, x0 + s2 * t0, t0, weights)
        if x2 is None:
            break
        f2 = _tangent(eqs, x2[:n], x2[n], weights, t0)[n]
        best = x2[n]
        s0, f0, s1, f1 = s1, f1, s2, f2
        if abs(f2) < 1e-13 or abs(s1 - s0) < 1e-15:
            break
    return float(best)


# -- the point solve ---------------------------------------------------------------------------

@dataclass
class MasslessState:
    """A solved level on one grid: what warm starts and derivatives need."""

    grid: object
    radius: float
    state: tuple
    z: np.ndarray
    energy: float
    momentum: float
    iteration_error: float
    rounding_error: float
    tail_error: float
    residual: float
    #: exact dE/dR and dE/dalpha at fixed quantum numbers (linearised equations)
    dE_dR: float
    dE_dalpha: float
    det_sign: float
    #: eps_R and eps_L on the grid
    eps: np.ndarray = field(default=None, repr=False)


def _state(eqs, z, ev, state, iteration_error):
    G, J, dG, E, P, gradE, parts = ev
    # rounding: every equation carries a few ulps of its terms, propagated to E by J^-T gradE
    lam_adj = np.linalg.solve(J.T, gradE)
    sizes = np.concatenate([[z[0] + eqs.radius + 2 * abs(eqs.alpha * parts["EL"]),
                             z[1] + eqs.radius + 2 * abs(eqs.alpha * parts["ER"])],
                            np.abs(np.where(eqs.right, z[0], z[1]) * parts["ek"])])
    terms = (np.sum(np.abs(eqs.wR * parts["LR"])) + np.sum(np.abs(eqs.wL * parts["LL"]))
             + np.sum(parts["ek"]))
    rounding = 4 * _EPS * (float(np.sum(np.abs(lam_adj) * sizes)) + float(terms))
    tail = 0.0
    for w, L, eps in ((eqs.wR, parts["LR"], z[0] * eqs.eR), (eqs.wL, parts["LL"], z[1] * eqs.eL)):
        for i, j in ((0, 1), (-1, -2)):
            rate = max(abs(eps[i] - eps[j]), abs(math.log(abs(w[i] / w[j]))), 1e-300)
            tail += abs(w[i] * L[i]) / rate
    zeros = np.zeros(z.size - 2)
    dz_R = np.linalg.solve(J, np.concatenate([[1.0, 1.0], zeros]))  # J dz/dR = -dG/dR
    dz_a = np.linalg.solve(J, np.concatenate([[2 * parts["EL"], 2 * parts["ER"]], zeros]))
    sign, _ = np.linalg.slogdet(J)
    return MasslessState(grid=eqs.grid, radius=eqs.radius, state=state, z=z.copy(), energy=E,
                         momentum=P, iteration_error=iteration_error, rounding_error=rounding,
                         tail_error=tail, residual=eqs.scaled(G), dE_dR=float(gradE @ dz_R),
                         dE_dalpha=float(gradE @ dz_a), det_sign=float(sign),
                         eps=np.stack([z[0] * eqs.eR, z[1] * eqs.eL]))


def _free_start(state, radius, model):
    """z at alpha = 0: A = B = R and e(t_k) = 2 pi |I_k| / R (exact)."""
    r, l = _species(model)
    I = np.array([float(n) for n in state])
    M = np.where(I > 0, model.masses[r], model.masses[l])
    u = np.log(4 * np.pi * np.abs(I) / (M * radius))  # (M/2) e^{+-t} R = 2 pi |I|
    return np.concatenate([[radius, radius], np.where(I > 0, u, -u)])


def solve_massless_level(model, radius, state, deformation=None, *, tol=1e-12, start=None):
    """The level named by ``state`` of a free massless model at radius R (module docstring).

    Switches the TTbar coupling on at fixed R (pseudo-arclength in its scale); status
    NO_REAL_SOLUTION when the level meets its branch point on the way, with the coupling scale
    of the fold in the message. ``start``: a converged result of the same level and coupling
    (a neighbouring radius), whose A / R, B / R and rapidities start Newton directly."""
    from tba.solvers.ground import _validate, require_deformation, require_model, require_start
    from tba.solvers.levels import parse_level

    require_model(model)
    radius, tol = _validate(radius, tol)
    deformation = require_deformation(deformation)
    require_start(start)
    level = parse_level(state)
    if level == "ground":
        raise ValueError("state: the ground state is solved by tba.solve_ground_state")
    why = refusal(model, level, deformation)
    if why is not None:
        raise ValueError(f"state: {why}")
    alpha = deformation.alpha
    base = dict(model=model.name, radius=radius, couplings=dict(deformation.couplings),
                coupling=model.coupling, state=level)
    iterations = 0
    z = None
    if (isinstance(start, SolveResult) and start.converged and tuple(start.state) == level
            and isinstance(start._state, MasslessState) and start.couplings == base["couplings"]):
        old = start._state.z
        guess = _free_start(level, radius, model)
        guess[:2] = old[:2] * (radius / start.radius)
        out = _newton(_Equations(model, radius, level, alpha, _grid(model, *guess[:2], tol, 0)),
                      guess, 1.0, tol)
        if out is not None and np.linalg.slogdet(out[1][1])[0] == _physical_sign(level):
            z = out[0]
            iterations += out[2]
    if z is None:
        z0 = _free_start(level, radius, model)
        if alpha == 0:
            z = z0
        else:
            path = _switch_on(model, radius, level, alpha, tol, z0)
            iterations += path.steps
            if path.kind == "fold":
                margin = abs(1.0 - path.fold)
                if margin > max(1e-6, 1e4 * tol):
                    return SolveResult(**base, status=Status.NO_REAL_SOLUTION, iterations=iterations,
                                       message=f"no real solution: the level meets its branch point "
                                               f"at {path.fold:.9g} times the requested coupling")
                return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                                   message=f"the branch point lies at {path.fold:.12g} times the "
                                           f"coupling: too close to decide")
            if path.kind != "target":
                return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                                   message=path.message)
            z = path.z
    return _refine(model, radius, level, alpha, tol, z, base, iterations)


def _physical_sign(level):
    """sign det J on the branch connected to alpha = 0: there J is triangular with the
    quantisation conditions' diagonal A e_R > 0 (right movers) and -B e_L < 0 (left movers)."""
    return (-1.0) ** sum(1 for n in level if n < 0)


def _refine(model, radius, level, alpha, tol, z, base, iterations):
    """Solve on grids of increasing resolution from ``z`` until two agree within ``tol``."""
    states, error = [], math.nan
    for lev in range(MAX_LEVEL + 1):
        eqs = _Equations(model, radius, level, alpha, _grid(model, z[0], z[1], tol, lev))
        out = _newton(eqs, z, 1.0, tol)
        if out is None:
            return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                               message=f"refinement level {lev}: Newton did not converge")
        z, ev, its, dE = out
        iterations += its
        st = _state(eqs, z, ev, level, dE)
        if st.det_sign != _physical_sign(level):
            return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                               message="the solution left the branch connected to alpha = 0")
        states.append(st)
        if len(states) >= 2:
            fine, coarse = states[-1], states[-2]
            error = (abs(fine.energy - coarse.energy) + fine.iteration_error + coarse.iteration_error
                     + fine.rounding_error + fine.tail_error)
            scale = max(abs(fine.energy), 1.0 / radius)
            if error <= tol * scale:
                theta = z[2:]
                return SolveResult(**base, status=Status.CONVERGED, energy=fine.energy, error=error,
                                   momentum=fine.momentum, message="converged",
                                   iterations=iterations, residual=fine.residual,
                                   effective_radius=math.sqrt(z[0] * z[1]), grid=fine.grid,
                                   rapidity_grid=fine.grid.t, pseudo_energies=fine.eps,
                                   rapidities=tuple(float(t) for t in theta), _state=fine)
    return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                       message=f"error estimate {error:.3g} above the tolerance after "
                               f"{MAX_LEVEL} refinements")
