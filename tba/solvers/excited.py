"""Excited states with real particle rapidities (single-species models without bound states).

For a state of N particles with rapidities t_1..t_N (same conventions as the ground state):

    eps(t) = m R cosh t + sum_j D(t - t_j) - (1/2pi) int phi(t - t') L(t') dt'
    L(t)   = log(1 + sigma e^{-eps(t)}),      sigma = kappa^N
    m R sinh t_k + sum_{j != k} delta(t_k - t_j) - (1/2pi) int psi(t_k - t') L(t') dt' = 2 pi I_k
    E = sum_j m cosh t_j - (m/2pi) int cosh t L,   P = sum_j m sinh t_j - (m/2pi) int sinh t L

with log S(u - i pi/2) = log kappa + D(u) (kappa = +-1, D real), delta(u) = -i log(-S(u))
(odd, delta(0) = 0) and psi(u) = phi(u + i pi/2) / i = D'(u). These follow from
eps(t_j + i pi/2) = i pi (2 n_j + 1): the constant i pi of log S(0) = log(-1) per particle is
what makes I_k half-odd for even N and integer for odd N (I_k = n_k + (1 - N)/2). The sign
kappa is +1 for sinh-Gordon and -1 for the free fermion, whose sources are then i pi each: for
odd N they flip the sign inside the logarithm and give the periodic (Ramond) sector with
integer momenta; for even N the antiperiodic (Neveu-Schwarz) sector with half-odd ones. At
large R the equations reduce to the Bethe-Yang equations m R sinh t_k + sum delta = 2 pi I_k.

A CDD factor exp(i alpha_s q^2 sinh(s u)) adds alpha_s q^2 (-1)^((s-1)/2) cosh(s u) to D,
alpha_s q^2 sinh(s u) to delta and the separable kernel alpha_s s q^2 cosh(s(t - t')) to phi
(q = m for s = 1, q = 1 otherwise).

Requirements (checked): one species, S(0) = -1, block content with non-positive
multiplicities only (no pole in the physical strip, hence no bound states). The poles of psi at
u = +-i |pi/2 - pi x| come close to the real axis for sinh-Gordon near its self-dual point
B = 1 (and reach it there); closer than `POLE_SUBTRACTION` they are integrated exactly
(`NearPoles`), and Newton steps then move the sharp sources D(t - t_j) with the rapidities.
"""

import functools
import math
import numbers
from dataclasses import dataclass, field
from fractions import Fraction

import numpy as np
import scipy.linalg

from kernels import excited as _compiled
from kernels import lapack as _lapack
from tba.models.cdd import NO_DEFORMATION
from tba.solvers.grid import choose_grid
from tba.models.blocks import block_kernel_shifted
from tba.solvers.result import SolveResult, Status
from tba.solvers.ground import Discretization, _interpolate

_EPS = np.finfo(float).eps
#: radius where states start from the Bethe-Yang equations before continuing to smaller R
BETHE_YANG_RADIUS = 12.0
#: grid half-widths are rounded up to multiples of this many points: the continuations of
#: excited levels next to their branch points need the margin of a wider cutoff
EXCITED_QUANTUM = 16
#: excited levels with CDD pole or resonance factors are refused: their sources
#: log S(t - t_j - i pi/2) and the quantisation phases would need the factors too (and the
#: poles of a resonance factor sit at Im t = pi/2, on the line the sources are evaluated on)
POLE_REFUSAL = ("excited levels take the spin CDD factors only (pole and resonance factors: "
                "ground state only)")

#: blocks whose psi has poles closer to the real axis than this are integrated with the
#: poles taken out (see `NearPoles`)
POLE_SUBTRACTION = 0.25


def _pole_distance(x):
    """Distance a = |pi/2 - pi x| of the poles +-i a of psi_x from the real axis."""
    return abs(math.pi / 2 - math.pi * float(x))


@functools.lru_cache(maxsize=256)
def _block_poles(cell):
    """(the poles of psi nearer the axis than POLE_SUBTRACTION as (a, k, x), the distances of
    the others) for a single species' blocks ``cell`` ((x, k) pairs): once per model."""
    near = [(_pole_distance(x), float(k), x) for x, k in cell if _pole_distance(x) < POLE_SUBTRACTION]
    far = [_pole_distance(x) for x, _ in cell if _pole_distance(x) >= POLE_SUBTRACTION]
    return near, far


def _finite(x):
    """x with inf/NaN (a pole hit exactly: measure zero) set to 0, for Jacobian entries."""
    return np.where(np.isfinite(x), x, 0.0)


class NearPoles:
    """The poles of psi close to the real axis, integrated exactly against L.

    A block f_x contributes k psi_x to psi, with poles at u = +-i a, a = |pi/2 - pi x|, of
    residue k each: pole part k (1/(u - i a) + 1/(u + i a)) = 2 k u / (u^2 + a^2). Near the
    sinh-Gordon self-dual point (a = pi (1 - B) / 2 -> 0) they pinch the real axis, and the
    trapezoid rule would need a spacing far below a. L itself stays smooth there (e^-eps has
    zeros, not poles, at t_j +- i a), so psi - pole part is integrated by the trapezoid rule
    and the pole part exactly against the sinc interpolant of L on the grid:
    int sinc((t' - t_j)/h) / (zeta - t') dt' = (1 - exp(-i pi w)) / w, w = (zeta - t_j)/h, for
    Im zeta <= 0 (its limit on the axis is the principal value plus the half residue, so that
    a = 0, B = 1, is included). The sinc interpolant converges like exp(-pi d / h) (d: L's
    strip), half the rate of the trapezoid rule: the grid is chosen for half the strip."""

    def __init__(self, model):
        self.poles = _block_poles(tuple(model.blocks[0][0].items()))[0]

    def __bool__(self):
        return bool(self.poles)

    def part(self, u):
        """The pole part sum_k 2 k u / (u^2 + a^2) (psi minus it is smooth)."""
        out = np.zeros_like(u, dtype=float)
        for a, k, _ in self.poles:
            with np.errstate(divide="ignore", invalid="ignore"):
                out = out + 2 * k * u / (u * u + a * a)
        return out

    def part_derivative(self, u):
        out = np.zeros_like(u, dtype=float)
        for a, k, _ in self.poles:
            with np.errstate(divide="ignore", invalid="ignore"):
                out = out + 2 * k * (a * a - u * u) / (u * u + a * a) ** 2
        return out

    def smooth(self, model, u):
        """The blocks' psi minus the pole part; for |u| and a below 1e-2, where both are ~1/u,
        from an expanded form of their difference (no cancellation)."""
        with np.errstate(all="ignore"):
            out = model.shifted_kernel(u) - self.part(u)
        small = np.abs(u) < 1e-2
        tiny = [(a, k, x) for a, k, x in self.poles if a < 1e-2]
        if not (tiny and np.any(small)):
            return out
        us = u[small]
        with np.errstate(all="ignore"):
            exact = model.shifted_kernel(us) - self.part(us)
        for a, k, x in tiny:  # replace k (psi_x - pole part) by its expanded form
            with np.errstate(all="ignore"):
                direct = block_kernel_shifted(x, us) - 2 * us / (us * us + a * a)
            s1m = us * us / 6 * (1 + us * us / 20 * (1 + us * us / 42))  # sinh(u)/u - 1
            a1 = math.sin(a) / a if a else 1.0
            cos_minus = -a * a / 6 - a ** 4 / 360 + a ** 6 / 560  # cos a - (sin a / a)^2
            n = (us * us * (1 + s1m) * (-2 * math.sin(a / 2) ** 2 - s1m)
                 + a * a * (cos_minus + math.cos(a) * s1m))
            with np.errstate(all="ignore"):
                f2 = 2 * us * n / ((us * us * (1 + s1m) ** 2 + a * a * a1 * a1) * (us * us + a * a))
            f2 = np.where(us == 0, 0.0, f2)  # odd in u
            exact = np.where(np.isfinite(exact), exact, 0.0) \
                - k * np.where(np.isfinite(direct), direct, 0.0) + k * f2
        out[small] = exact
        return out

    def weights(self, zeta, grid):
        """int L(t') / (zeta - t') dt' = sum_j L_j * weights (zeta: Im <= 0), and d/dzeta."""
        h = grid.h
        w = (zeta - grid.t) / h
        small = np.abs(w) < 1e-3
        with np.errstate(all="ignore"):
            e = np.exp(-1j * np.pi * w)
            k1 = (1 - e) / w
            dk1 = (1j * np.pi * e / w - (1 - e) / (w * w)) / h
        ws = w[small]
        k1[small] = 1j * np.pi * (1 - 0.5j * np.pi * ws - (np.pi * ws) ** 2 / 6 + 1j * (np.pi * ws) ** 3 / 24)
        dk1[small] = 1j * np.pi * (-0.5j * np.pi - np.pi ** 2 * ws / 3 + 0.125j * np.pi ** 3 * ws ** 2) / h
        return k1, dk1

    def integral(self, tk, L, grid):
        """int (pole part)(tk - t') L(t') dt', its d/dtk and d/dL_j (real L)."""
        value, dvalue, dL = 0.0, 0.0, np.zeros(grid.N)
        for a, k, _ in self.poles:
            k1, dk1 = self.weights(tk - 1j * a, grid)
            # 1/(u - i a) + 1/(u + i a), u = tk - t': the second term is the conjugate for real L
            value += 2 * k * float(np.dot(k1.real, L))
            dvalue += 2 * k * float(np.dot(dk1.real, L))
            dL += 2 * k * k1.real
        return value, dvalue, dL


def state_items(state):
    """The quantum numbers of ``state`` as a list of items, not yet checked: the one reading
    of a level's name shared by `solve_excited`, `solve_level`, scans and ``tba solve --state``.
    A string is split at commas ("1/2,-1/2", " -0.5 , 0.5", "0"); a single real number is a
    one-particle state; any other iterable gives its elements."""
    if isinstance(state, str):
        if state.strip() == "ground":
            raise ValueError("state: 'ground' names the ground state (solve_ground_state or "
                             "solve_level), not an excited level")
        items = [part.strip() for part in state.split(",")]
        if any(not part for part in items):
            raise ValueError(f"state: an empty quantum number in {state!r} (write e.g. '1/2,-1/2')")
        return items
    if isinstance(state, bool):
        raise TypeError(f"state: quantum numbers must be real numbers, got {state!r}")
    if isinstance(state, (numbers.Real, Fraction)):
        return [state]
    try:
        return list(state)
    except TypeError:
        raise TypeError(f"state must be quantum numbers, a string like '1/2,-1/2' or a sequence "
                        f"of numbers, got {type(state).__name__} {state!r}") from None


def parse_state(numbers_):
    """Quantum numbers from a name like "1/2,-1/2" or from ints, floats, Fractions or strings
    like "1/2" and "-3/2" (see `state_items`)."""
    # names and parsed states (tuples of Fractions) come back at every point of a scan: kept
    # (other inputs are read each time: 1 == True == 1.0 would share a cache entry)
    if type(numbers_) is str or (type(numbers_) is tuple
                                 and all(type(n) is Fraction for n in numbers_)):
        return _parsed_state(numbers_)
    return _parse_state(numbers_)


@functools.lru_cache(maxsize=1024)
def _parsed_state(numbers_):
    return _parse_state(numbers_)


def _parse_state(numbers_):
    out = []
    for n in state_items(numbers_):
        if isinstance(n, str):
            try:
                n = Fraction(n.strip())
            except ValueError:
                raise ValueError(f"state: not a number or fraction: {n!r}") from None
        elif isinstance(n, bool) or not isinstance(n, (numbers.Real, Fraction)):
            raise TypeError(f"state: quantum numbers must be real numbers, got {n!r}")
        elif not math.isfinite(n):
            raise ValueError(f"state: quantum numbers must be finite, got {n!r}")
        out.append(Fraction(n).limit_denominator(1000))
    if not out:
        raise ValueError("state: at least one quantum number is needed (the ground state has none)")
    N = len(out)
    for n in out:
        if N % 2 == 0 and n.denominator != 2:
            raise ValueError(f"state: with {N} particles the quantum numbers are half-odd, got {n}")
        if N % 2 == 1 and n.denominator != 1:
            raise ValueError(f"state: with {N} particle(s) the quantum numbers are integers, got {n}")
    if len(set(out)) != N:
        raise ValueError("state: quantum numbers must be distinct (S(0) = -1 excludes equal ones)")
    return tuple(sorted(out))


def check_model(model):
    from tba.solvers.ground import require_model

    require_model(model)
    if model.is_massless or model.has_multiplicity:
        raise ValueError("model: real-rapidity excited states need one massive species of "
                         "multiplicity 1 (free massless models: tba.solvers.massless)")
    if model.n_species != 1:
        raise ValueError(f"model: excited states need a single-species model ({model.name} has "
                         f"{model.n_species})")
    if model.blocks is None:
        raise ValueError("model: excited states need a model given by block content")
    if model.sign[0, 0] != -1:
        raise ValueError("model: excited states need S(0) = -1")
    if model.has_bound_states:
        raise ValueError(f"model: {model.name} has bound states (a block with positive "
                         f"multiplicity); real-rapidity excited states do not apply")


class Scattering:
    """The functions of a rapidity difference u that excited states need, CDD terms included:
    the source D(u) (real part of log S(u - i pi/2)), psi = D', psi', the phase delta(u) =
    -i log(-S(u)) and delta' = phi."""

    def __init__(self, model, deformation):
        if deformation.has_poles:
            raise ValueError(f"deformation: {POLE_REFUSAL}")
        self.model = model
        m = float(model.masses[0])
        self.cdd = [(s, a * (m * m if s == 1 else 1.0)) for s, a in deformation.couplings.items()]

    def arrays(self):
        """The CDD terms for `kernels.excited`: spins, coefficients, signs (-1)^((s-1)/2)."""
        return (np.array([float(s) for s, _ in self.cdd]), np.array([a for _, a in self.cdd]),
                np.array([float((-1) ** ((s - 1) // 2)) for s, _ in self.cdd]))

    def _cdd(self, u, fn, power, odd_sign):
        out = 0.0
        for s, a in self.cdd:
            sign = (-1) ** ((s - 1) // 2) if odd_sign else 1
            out = out + a * sign * s ** power * fn(s * u)
        return out

    def D(self, u):
        u = np.clip(u, -700.0, 700.0)
        return self.model.source(u) + self._cdd(u, np.cosh, 0, True)

    def psi(self, u):  # = D'
        u = np.clip(u, -700.0, 700.0)
        return self.model.shifted_kernel(u) + self._cdd(u, np.sinh, 1, True)

    def dpsi(self, u):
        u = np.clip(u, -700.0, 700.0)
        return self.model.shifted_kernel_derivative(u) + self._cdd(u, np.cosh, 2, True)

    def delta(self, u):
        u = np.clip(u, -700.0, 700.0)
        return self.model.phase(u) + self._cdd(u, np.sinh, 0, False)

    def ddelta(self, u):
        u = np.clip(u, -700.0, 700.0)
        return self.model.kernel(u)[0, 0] + self._cdd(u, np.cosh, 1, False)


def _pseudo_energy_jacobian(disc, dL):
    """d(eps equations)/d eps for one species on a dense grid: 1 + (K + CDD terms) diag(L')."""
    J = np.eye(disc.shape[1])
    if not disc.ops.trivial:
        J += disc.ops.matrix * dL[None, :]
    for k in range(disc.c.size):
        J += disc.c[k] * np.outer(disc.U[k, 0], disc.V[k, 0] * dL)
    return J


class ExcitedEquations:
    """The discretised excited-state equations for fixed quantum numbers."""

    def __init__(self, model, deformation, radius, grid, state):
        self.model, self.deformation, self.radius, self.grid = model, deformation, radius, grid
        self.state = state
        self.I = np.array([float(n) for n in state])
        self.Np = len(state)
        self.disc = Discretization(model, deformation, radius, grid)
        self.m = float(model.masses[0])
        self.sigma = model.source_sign ** self.Np
        self.N = grid.N
        sc = Scattering(model, deformation)
        self.D, self.psi, self.dpsi, self.delta, self.ddelta = sc.D, sc.psi, sc.dpsi, sc.delta, sc.ddelta
        self.psi_full = sc.psi  # D' itself (self.psi may be its pole-subtracted part)
        self.near = NearPoles(model)
        self._integrals = None  # (t, L, psi integrals) of the last `residual`, for `jacobian`
        self._scattering = sc
        self._arguments = self._functions = None  # of the compiled kernels, made on first use
        if self.near:  # psi = smooth part (trapezoid rule) + poles near the axis (exact)
            self.psi = lambda u: self.near.smooth(model, u) + sc._cdd(np.clip(u, -700.0, 700.0),
                                                                      np.sinh, 1, True)
            self.dpsi = lambda u: _finite(self._quiet(sc.dpsi, u) - self.near.part_derivative(u))

    @staticmethod
    def _quiet(fn, u):
        with np.errstate(divide="ignore", invalid="ignore"):
            return fn(u)

    def psi_integral(self, tk, L):
        """(1/2pi) int psi(tk - t') L(t') dt', its d/dtk and its gradient in L on the grid."""
        h, tg = self.grid.h, self.grid.t
        w = self.psi(tk - tg)
        with np.errstate(over="ignore", invalid="ignore"):  # a wild trial: Newton rejects it
            value = (h / (2 * np.pi)) * float(np.dot(w, L))
            slope = (h / (2 * np.pi)) * float(np.dot(self.dpsi(tk - tg), L))
        grad = (h / (2 * np.pi)) * w
        if self.near:
            v, dv, g = self.near.integral(tk, L, self.grid)
            value += v / (2 * np.pi)
            slope += dv / (2 * np.pi)
            grad = grad + g / (2 * np.pi)
        return value, slope, grad

    # -- the equations ------------------------------------------------------------------------
    def occupation(self, eps):
        """L = log(1 + sigma e^{-eps}) and dL/deps; finite only where 1 + sigma e^{-eps} > 0."""
        with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
            if self.sigma > 0:
                x = np.exp(-np.abs(eps))
                L = np.where(eps > 0, np.log1p(x), -eps + np.log1p(x))
                dL = np.where(eps > 0, -x / (1 + x), -1 / (1 + x))
            else:
                x = np.exp(-eps)
                L = np.log1p(-x)
                dL = x / (1 - x)
        ok = bool(np.all(np.isfinite(L)))
        return L, dL, ok

    def sources(self, t):
        """sum_j D(t_grid - t_j) on the grid. At B = 1 a particle on a grid point makes
        D(0) = +inf there (e^-eps has a double zero at t_j on the axis): such a value is set to
        700, where e^-700 leaves L unchanged."""
        if COMPILED:
            tg, functions = self.compiled_functions()
            return _compiled.sources(tg, np.ascontiguousarray(t, dtype=float), *functions,
                                     np.empty(self.N))
        tg = self.grid.t
        with np.errstate(divide="ignore", invalid="ignore"):
            out = sum((self.D(tg - tj) for tj in t), np.zeros(self.N))
        return np.where(out == np.inf, 700.0, out)

    def source_slopes(self, t, dt):
        """-(d sources / dt) . dt = sum_j psi(t_grid - t_j) dt_j."""
        tg = self.grid.t
        with np.errstate(divide="ignore", invalid="ignore"):  # B = 1: psi(0) is a pole
            return sum((_finite(self.psi_full(tg - tj)) * d for tj, d in zip(t, dt)), np.zeros(self.N))

    def residual(self, eps, t, L):
        t = np.clip(t, -700.0, 700.0)  # a wild Newton trial must not overflow
        d = self.disc
        F = eps - d.nu[0] - self.sources(t) + d.ops.convolve(L[None, :])[0] + d.separable(L[None, :])[1][0]
        Q = np.empty(self.Np)
        integrals = [self.psi_integral(tk, L) for tk in t]
        for k in range(self.Np):
            others = np.delete(t, k)
            Q[k] = (self.m * self.radius * math.sinh(t[k]) + np.sum(self.delta(t[k] - others))
                    - integrals[k][0] - 2 * np.pi * self.I[k])
        # the Jacobian at an accepted iterate needs the same integrals: kept for it
        self._integrals = (t, L, integrals)
        return F, Q

    def compiled_arguments(self):
        """The arguments of `kernels.excited` after the unknowns (eps, t) and before tol.
        The blocks of one species are full blocks f_x (crossing pairs half-blocks into them:
        see `tba.models.base`)."""
        if self._arguments is None:
            d, N = self.disc, self.N
            K, KT = (d.ops.matrix, d.ops.matrix_transposed) if not d.ops.trivial else (_NONE, _NONE)
            r = d.c.size
            tg, functions = self.compiled_functions()
            poles = self.near.poles
            self._arguments = (
                tg, float(self.grid.h), np.ascontiguousarray(d.nu[0], dtype=float), K, KT,
                bool(d.ops.trivial), np.ascontiguousarray(d.c, dtype=float),
                np.ascontiguousarray(d.U_flat, dtype=float).reshape(r, N),
                np.ascontiguousarray(d.V_flat, dtype=float).reshape(r, N),
                np.ascontiguousarray(d.wE[0], dtype=float), np.ascontiguousarray(d.wP[0], dtype=float),
                self.m, float(self.radius), np.ascontiguousarray(self.I, dtype=float),
                float(self.sigma), *functions,
                np.array([a for a, _, _ in poles]), np.array([k for _, k, _ in poles]),
                np.array([math.sin(math.pi * float(x)) for _, _, x in poles]))
        return self._arguments

    def compiled_functions(self):
        """(grid points, (block parameters sin(pi x), multiplicities, CDD spins, coefficients,
        signs)): what `kernels.excited` needs to evaluate D, psi and delta."""
        if self._functions is None:
            cell = self.model.blocks[0][0]
            self._functions = (np.ascontiguousarray(self.grid.t, dtype=float), (
                np.array([math.sin(math.pi * float(x)) for x in cell]),
                np.array([float(k) for k in cell.values()]), *self._scattering.arrays()))
        return self._functions

    def _compiled(self, eps, t, factor):
        """(F, Q, dL, at, ipiv) of `kernels.excited.newton`'s linearisation at (eps, t)
        (``factor``: with the Jacobian factored), or None (COMPILED off, or eps outside the
        domain of L: the numpy path then gives what it always gave)."""
        if not COMPILED:
            return None
        out = _compiled.newton(np.ascontiguousarray(eps, dtype=float),
                               np.ascontiguousarray(t, dtype=float), *self.compiled_arguments(),
                               0.0, -2 if factor else -1)
        return out[7:] if out[0] == _compiled.CONVERGED else None

    def equations(self, eps, t):
        """(F, Q) at (eps, t)."""
        out = self._compiled(eps, t, False)
        if out is not None:
            return out[:2]
        return self.residual(eps, t, self.occupation(eps)[0])

    def linearised(self, eps, t):
        """(F, Q, L', solve) at (eps, t): the equations, dL/deps and a solver of J x = b."""
        out = self._compiled(eps, t, True)
        if out is not None:
            F, Q, dL, at, ipiv = out
            return F, Q, dL, lambda b: _lapack.lu_solve(at, ipiv, np.array(b, dtype=float))
        L, dL, _ = self.occupation(eps)
        F, Q = self.residual(eps, t, L)
        lu = scipy.linalg.lu_factor(self.jacobian(eps, t, L, dL), check_finite=False)
        return F, Q, dL, lambda b: scipy.linalg.lu_solve(lu, b, check_finite=False)

    def _psi_integrals(self, t, L):
        """`psi_integral` at each rapidity of (clipped) ``t``: those of the last `residual`
        when it was evaluated at the same t and the same array L."""
        kept = self._integrals
        if kept is not None and kept[1] is L and np.array_equal(kept[0], t):
            return kept[2]
        return [self.psi_integral(tk, L) for tk in t]

    def jacobian(self, eps, t, L, dL):
        t = np.clip(t, -700.0, 700.0)
        d = self.disc
        N, Np = self.N, self.Np
        tg = self.grid.t
        J = np.zeros((N + Np, N + Np))
        J[:N, :N] = _pseudo_energy_jacobian(d, dL)
        for j in range(Np):
            with np.errstate(divide="ignore", invalid="ignore"):  # B = 1: psi(0) is a pole
                J[:N, N + j] = _finite(self.psi_full(tg - t[j]))  # d/dt_j of -D(t - t_j)
        integrals = self._psi_integrals(t, L)
        for k in range(Np):
            _, slope, grad = integrals[k]
            J[N + k, :N] = -grad * dL
            others = np.delete(np.arange(Np), k)
            J[N + k, N + k] = (self.m * self.radius * math.cosh(t[k])
                               + np.sum(self.ddelta(t[k] - t[others])) - slope)
            for j in others:
                J[N + k, N + j] = -self.ddelta(t[k] - t[j])
        return J

    def energy(self, t, L):
        t = np.clip(t, -700.0, 700.0)
        d = self.disc
        E = self.m * float(np.sum(np.cosh(t))) + float(np.sum(d.wE[0] * L))
        P = self.m * float(np.sum(np.sinh(t))) + float(np.sum(d.wP[0] * L))
        return E, P

    def initial_guess(self, t, from_state=None):
        """eps from a solved neighbour (interpolating its kernel part) or from sources alone."""
        eps = self.disc.nu[0] + self.sources(t)
        if from_state is not None:
            eps = eps + self._dressing_of(from_state)
            if self.disc.c.size and from_state.scalars.size == self.disc.c.size:
                eps -= np.einsum("r,ri->i", self.disc.c * from_state.scalars, self.disc.U[:, 0])
        return eps

    def _dressing_of(self, solved):
        """The kernel part of a solved neighbour's eps on this grid (interpolated)."""
        g = solved.dressing
        if solved.grid != self.grid:
            g = _interpolate(solved.grid, g[None, :], self.grid.t)[0]
        return g

    def extrapolated_guess(self, s1, s2, w=None):
        """(rapidities, eps) extrapolated linearly from the solutions ``s1`` and ``s2`` of the
        same level (rapidities, kernel part and separable scalars): x_1 + w (x_1 - x_2), by
        default in R (s1 at R_1, s2 at R_2, the same couplings: w = (R - R_1) / (R_1 - R_2));
        None where that is not an interpolation or a modest extrapolation (|w| <= 2)."""
        if w is None:
            R, R1, R2 = self.radius, s1.radius, s2.radius
            w = (R - R1) / (R1 - R2) if R1 != R2 else math.inf
        if not abs(w) <= 2 or s1.rapidities.shape != s2.rapidities.shape:
            return None
        t = s1.rapidities + w * (s1.rapidities - s2.rapidities)
        g1, g2 = self._dressing_of(s1), self._dressing_of(s2)
        eps = self.disc.nu[0] + self.sources(t) + g1 + w * (g1 - g2)
        c = self.disc.c
        if c.size and s1.scalars.size == c.size == s2.scalars.size:
            scalars = s1.scalars + w * (s1.scalars - s2.scalars)
            eps = eps - np.einsum("r,ri->i", c * scalars, self.disc.U[:, 0])
        return t, eps


@dataclass
class ExcitedState:
    """A solved excited state on one grid."""

    grid: object
    radius: float
    state: tuple
    eps: np.ndarray
    rapidities: np.ndarray
    dressing: np.ndarray
    scalars: np.ndarray
    energy: float
    momentum: float
    iteration_error: float
    residual: float
    iterations: int
    rounding_error: float
    #: exact dE/dR at fixed couplings and quantum numbers (linearised equations)
    dE_dR: float
    #: sign of det J: constant along a branch, flips at a fold
    det_sign: float
    #: smallest over largest LU pivot of the Jacobian: vanishes at a fold
    jac_scale: float = field(default=np.nan)
    #: the same level undeformed at this radius (warm starts for neighbours)
    undeformed: object = field(default=None, repr=False)
    #: the final solution at the previous radius of a scan this one was refined from (same
    #: couplings; one deep): with it the next radius starts from a linear extrapolation in R
    previous: object = field(default=None, repr=False)
    #: the model, the deformation and the next-coarser grid's solution of a final result (for
    #: `excited_derivatives`; None on intermediate solutions)
    model: object = field(default=None, repr=False)
    deformation: object = field(default=None, repr=False)
    coarse: object = field(default=None, repr=False)

    def derivatives(self, spins=(1,)):
        """Exact dE/dR and dE/dalpha_s on this grid: J dx/dp = -d(F, Q)/dp with the Jacobian of
        (pseudo-energy, rapidities) at the solution. The equations are affine in each alpha_s
        (`Scattering` and the separable terms), so d(F, Q)/dalpha_s is the difference of the
        residuals at alpha_s + 1 and alpha_s, exact up to rounding; E has no explicit R or alpha."""
        from tba.models.cdd import CDD

        eqs = ExcitedEquations(self.model, self.deformation, self.radius, self.grid, self.state)
        N, t = eqs.N, self.rapidities
        F0, Q0, dL, solve = eqs.linearised(self.eps, t)

        def response(rhs):
            dx = solve(rhs)
            return eqs.m * float(np.dot(np.sinh(t), dx[N:])) + float(np.sum(eqs.disc.wE[0] * dL * dx[:N]))

        out = {"dE_dR": response(np.concatenate([eqs.disc.nu[0] / eqs.radius, -eqs.m * np.sinh(t)]))}
        for spin in spins:
            couplings = dict(self.deformation.couplings)
            couplings[spin] = couplings.get(spin, 0.0) + 1.0
            shifted = ExcitedEquations(self.model, CDD(couplings, self.deformation.factors),
                                       self.radius, self.grid, self.state)
            F1, Q1 = shifted.equations(self.eps, t)
            out[f"dE_dalpha{spin}"] = response(-np.concatenate([F1 - F0, Q1 - Q0]))
        return out


_NONE = np.zeros((1, 1))  # the kernel matrix of a free model

#: solve with the compiled iteration (`kernels.excited`); tests set it False to run the numpy
#: iteration it is checked against
COMPILED = True

_FAILURES = {_compiled.OUTSIDE_DOMAIN: "initial guess outside the domain of L",
             _compiled.SINGULAR: "singular Jacobian",
             _compiled.LINE_SEARCH_FAILED: "line search failed"}


def _newton(eqs, eps, t, tol, maxiter=60):
    """Newton's method with backtracking on (eps, rapidities), compiled (`kernels.excited`;
    `_newton_python` with COMPILED off). Returns (ExcitedState | None, message, Newton steps)."""
    if not COMPILED:
        return _newton_python(eqs, eps, t, tol, maxiter)
    args = eqs.compiled_arguments()
    status, it, eps, t, dressing, S, out, *_ = _compiled.newton(
        np.ascontiguousarray(eps, dtype=float), np.ascontiguousarray(t, dtype=float), *args,
        float(tol), int(maxiter))
    if status == _compiled.MAX_ITERATIONS:
        return None, f"no convergence in {maxiter} Newton steps", maxiter
    if status != _compiled.CONVERGED:
        return None, _FAILURES[status], it
    E, P, dE, r, rounding, dE_dR, det_sign, jac_scale = (float(v) for v in out)
    return ExcitedState(grid=eqs.grid, radius=eqs.radius, state=eqs.state, eps=eps, dE_dR=dE_dR,
                        rapidities=t, dressing=dressing, scalars=S, energy=E, momentum=P,
                        iteration_error=dE, residual=r, iterations=it, rounding_error=rounding,
                        det_sign=det_sign, jac_scale=jac_scale), "converged", it


def _newton_python(eqs, eps, t, tol, maxiter=60):
    """Newton's method with backtracking on (eps, rapidities) in numpy: the reference the
    compiled iteration is tested against (the formulas are written out here)."""
    N = eqs.N
    L, dL, ok = eqs.occupation(eps)
    if not ok:
        return None, "initial guess outside the domain of L", 0
    F, Q = eqs.residual(eps, t, L)
    r = max(np.max(np.abs(F)), np.max(np.abs(Q)))
    floor = 64 * _EPS * max(1.0, float(np.max(np.abs(eqs.disc.nu))))
    dE = np.inf
    for it in range(maxiter + 1):
        J = eqs.jacobian(eps, t, L, dL)
        try:
            lu = scipy.linalg.lu_factor(J, check_finite=False)
        except (ValueError, np.linalg.LinAlgError) as exc:
            return None, f"linear solve failed: {exc}", it
        step = scipy.linalg.lu_solve(lu, -np.concatenate([F, Q]), check_finite=False)
        if not np.all(np.isfinite(step)):
            return None, "singular Jacobian", it
        de, dt = step[:N], step[N:]
        E, P = eqs.energy(t, L)
        dE_last = dE
        dE = abs(eqs.m * float(np.dot(np.sinh(t), dt)) + float(np.sum(eqs.disc.wE[0] * dL * de)))
        small = max(np.max(np.abs(de)), np.max(np.abs(dt), initial=0.0)) < 1e-6 or r <= floor
        # next to a branch point rounding of the residual is amplified in the step: once the
        # residual is at rounding level and the steps stop shrinking, they are that noise, and
        # the step's energy change is kept as the iteration error
        stagnant = r <= 1e3 * floor and dE > 0.5 * dE_last and dE <= 1e-6 * max(abs(E), eqs.m)
        if (small and dE <= max(1e-2 * tol, 8 * _EPS) * max(abs(E), eqs.m)) or stagnant:
            d = eqs.disc
            S, _ = d.separable(L[None, :])
            diag = np.abs(np.diag(lu[0]))
            rounding = 4 * _EPS * (float(np.sum(np.abs(d.wE[0] * L)))
                                   + float(np.sum(np.abs(d.wE[0] * dL * eps)))
                                   + eqs.m * float(np.sum(np.cosh(t))))
            # exact dE/dR from the linearised equations: J dx/dR = -(dF/dR, dQ/dR)
            dx = scipy.linalg.lu_solve(lu, -np.concatenate([-eqs.disc.nu[0] / eqs.radius,
                                                            eqs.m * np.sinh(t)]), check_finite=False)
            dE_dR = eqs.m * float(np.dot(np.sinh(t), dx[N:])) + float(np.sum(eqs.disc.wE[0] * dL * dx[:N]))
            return ExcitedState(grid=eqs.grid, radius=eqs.radius, state=eqs.state, eps=eps,
                                dE_dR=dE_dR,
                                rapidities=t.copy(), dressing=-d.ops.convolve(L[None, :])[0],
                                scalars=S, energy=E, momentum=P, iteration_error=dE, residual=r,
                                iterations=it, rounding_error=rounding,
                                det_sign=float(np.prod(np.sign(np.diag(lu[0])))
                                               * (-1) ** int(np.sum(lu[1] != np.arange(lu[1].size)))),
                                jac_scale=float(np.min(np.abs(diag)) / np.max(np.abs(diag)))), "converged", it
        if it == maxiter:
            break
        lam = 1.0
        while True:
            eps_new, t_new = eps + lam * de, t + lam * dt
            if eqs.near:  # steps in (eps - sources, t): the sharp sources move with t exactly
                eps_new = eps_new + eqs.sources(t_new) - eqs.sources(t) + lam * eqs.source_slopes(t, dt)
            L_new, dL_new, ok = eqs.occupation(eps_new)
            if ok:
                F_new, Q_new = eqs.residual(eps_new, t_new, L_new)
                r_new = max(np.max(np.abs(F_new)), np.max(np.abs(Q_new)))
                if r_new <= (1 - 0.25 * lam) * r or r_new <= floor:
                    break
            lam *= 0.5
            if lam < 1e-4:
                return None, "line search failed", it
        eps, t, L, dL, F, Q, r = eps_new, t_new, L_new, dL_new, F_new, Q_new, r_new
    return None, f"no convergence in {maxiter} Newton steps", maxiter


def bethe_yang(model, radius, state, deformation=NO_DEFORMATION):
    """Rapidities from m R sinh t_k + sum_{j != k} delta(t_k - t_j) = 2 pi I_k (large-R limit)."""
    check_model(model)
    I = np.array([float(n) for n in parse_state(state)])
    sc = Scattering(model, deformation)
    m, R, Np = float(model.masses[0]), float(radius), I.size
    t = np.arcsinh(2 * np.pi * I / (m * R))
    for _ in range(100):
        Q = np.array([m * R * math.sinh(t[k]) + np.sum(sc.delta(t[k] - np.delete(t, k)))
                      - 2 * np.pi * I[k] for k in range(Np)])
        J = np.zeros((Np, Np))
        for k in range(Np):
            others = np.delete(np.arange(Np), k)
            J[k, k] = m * R * math.cosh(t[k]) + np.sum(sc.ddelta(t[k] - t[others]))
            for j in others:
                J[k, j] = -sc.ddelta(t[k] - t[j])
        step = np.linalg.solve(J, -Q)
        t = t + step
        if np.max(np.abs(step)) < 1e-15 * max(1.0, float(np.max(np.abs(t)))):
            break
    return t


def bethe_yang_energy(model, radius, state, deformation=NO_DEFORMATION):
    """E and P of the Bethe-Yang solution (no finite-size corrections beyond the phases)."""
    t = bethe_yang(model, radius, state, deformation)
    m = float(model.masses[0])
    return m * float(np.sum(np.cosh(t))), m * float(np.sum(np.sinh(t)))


def _grid(model, deformation, r_eff, tol, level):
    """Grid for a driving term m R~ cosh(t - beta): r_eff = (R~, beta)."""
    strip = min(math.pi / 2, model.excited_strip)
    near, far = _block_poles(tuple(model.blocks[0][0].items()))
    if near:  # L's strip, halved for the sinc interpolation (see NearPoles)
        strip = min([math.pi / 4] + far)
    Rt, beta = r_eff
    return choose_grid(model.pole_distance, float(model.masses[0]), max(Rt, 1e-3), tol, level,
                       cutoff_extra=4.0, max_spin=max(deformation.couplings, default=1),
                       strip=strip, shift=beta, quantum=EXCITED_QUANTUM)


def _solve_level(model, deformation, radius, state, tol, level, seed, r_eff, previous=None,
                 weight=None):
    """Newton on one grid from ``seed`` (or the Bethe-Yang rapidities); with ``previous``, the
    solution before ``seed`` along a scan or a continuation, first from the linear
    extrapolation of the two (`ExcitedEquations.extrapolated_guess`, in R or with ``weight``;
    kept if it lands on the seed's branch and is not spurious; else the plain start)."""
    grid = _grid(model, deformation, r_eff, tol, level)
    eqs = ExcitedEquations(model, deformation, radius, grid, state)
    if not eqs.disc.ops.dense:
        return None, f"grid of {grid.N} points: beyond the dense excited-state solver", 0
    its = 0
    guess = eqs.extrapolated_guess(seed, previous, weight) \
        if seed is not None and previous is not None else None
    if guess is not None:
        new, msg, its = _newton(eqs, guess[1], guess[0], tol)
        if new is not None and new.det_sign == seed.det_sign \
                and not _unbounded(deformation, radius, state, new.energy):
            return new, msg, its
    t0 = seed.rapidities if seed is not None else bethe_yang(model, radius, state, deformation)
    new, msg, more = _newton(eqs, eqs.initial_guess(t0, seed), t0, tol)
    return new, msg, its + more


def _unbounded(deformation, radius, state, energy):
    """Why a TTbar-deformed solution is spurious, or None: its driving term
    m (R + alpha E) cosh t - m alpha P sinh t must grow on both sides (with the exact momentum
    R P = 2 pi sum I_k); otherwise L grows with the grid's cutoff and the numbers mean nothing."""
    if not deformation.is_ttbar:
        return None
    c = radius + deformation.alpha * energy
    b = deformation.alpha * 2 * math.pi * float(sum(state)) / radius
    if c > abs(b):
        return None
    return (f"R + alpha E = {c:.6g} <= |alpha P| = {abs(b):.6g}: the driving term is unbounded "
            f"below, no solution of this form")


def _spin_tails(model, deformation, level, undeformed=False):
    """Why the highest CDD spin s > 1 leaves no real solution near ``level`` (a solved state,
    usually the undeformed one at the same R), or None.

    Beyond the driving term's reach the spin-s terms decide eps: with sign_s = (-1)^((s-1)/2),
    the source alpha_s sign_s cosh(s(t - t_j)) and the kernel term alpha_s s cosh(s(t - t'))
    give eps(t) ~ C_+- e^(s|t|) / 2 as t -> +-oo, with

        C_+- = alpha_s (sign_s sum_j e^(-+s t_j) - (s / 2pi) int e^(-+s t') L(t') dt').

    Where C_+ or C_- < 0 eps is unbounded below, L grows like e^(s|t|) and the integrals
    diverge: no real solution on the whole line, whatever the radius. A finite grid hides this
    (the tail only takes over at |t| ~ log(m R / |C|) / (s - 1)), so the check is made here,
    before any deformed solve. For sinh-Gordon (L > 0) and s = 3, 7, ... both terms have the
    sign of -alpha_s: alpha_s > 0 never has a real solution, for any state; for s = 5, 9, ...
    the particles and the sea compete and the level decides."""
    spins = [s for s, a in deformation.couplings.items() if s > 1 and a]
    if not spins:
        return None
    s = max(spins)
    a = float(deformation.couplings[s])
    sign = (-1) ** ((s - 1) // 2)
    grid, t = level.grid, np.asarray(level.rapidities, dtype=float)
    kappa = model.source_sign ** len(t)
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        L = np.log1p(kappa * np.exp(-level.eps))
        tails = []
        for side in (1, -1):
            sea = (s / (2 * np.pi)) * grid.h * float(np.sum(np.exp(-side * s * grid.t) * L))
            tails.append(a * (sign * float(np.sum(np.exp(-side * s * t))) - sea))
    bad = [(name, c) for name, c in zip(("+", "-"), tails) if not c > 0]
    if not bad:
        return None
    name, c = bad[0]
    where = (f"already for any small alpha_{s} of this sign" if undeformed
             else "reached on the way from alpha_s = 0")
    return (f"no real solution: the spin-{s} CDD term makes eps ~ {c:.3g} e^({s}|t|)/2 as "
            f"t -> {name}oo, unbounded below, so L and the integrals diverge (alpha_{s} = {a:g}: "
            f"{where})")


def _effective_radius(deformation, radius, E, P=0.0):
    """(R~, beta) of the driving term m (R + alpha E) cosh t - m alpha P sinh t = m R~ cosh(t - beta)
    (TTbar only; other deformations keep R)."""
    if not deformation.is_ttbar:
        return radius, 0.0
    a = deformation.alpha
    c, s = radius + a * E, a * P
    if c <= abs(s):
        return max(c, 1e-3), 0.0  # no real solution nearby: let the solve fail cleanly
    return math.sqrt(c * c - s * s), math.atanh(s / c)


def solve_excited(model, radius, state, deformation=None, *, tol=1e-12, start=None):
    """The excited level named by ``state`` (Bethe quantum numbers I_k) at radius R.

    With ``start`` a converged result of the same state and couplings at another radius (the
    previous point of a scan), its solution is refined at R directly; a change of branch (det
    J changes sign) or a spurious solution is refused. Otherwise, and where that fails, the
    undeformed level is followed in R from the Bethe-Yang solution at large R (or from
    ``start``'s undeformed level); the deformation is then switched on at fixed R, as the flow
    in alpha does. The point is solved on two grids for the error
    estimate. Status NO_REAL_SOLUTION when the level meets its branch point before the
    requested coupling (positive levels for alpha < 0). A moving level (P != 0) that cannot
    be reached that way is taken from large R at fixed alpha (`_or_from_large_radius`).
    """
    from tba.solvers.ground import _validate, require_deformation, require_start

    check_model(model)
    state = parse_state(state)
    radius, tol = _validate(radius, tol)
    deformation = require_deformation(deformation)
    require_start(start)
    if deformation.has_poles:
        raise ValueError(f"deformation: {POLE_REFUSAL}")
    base = dict(model=model.name, radius=radius, couplings=dict(deformation.couplings),
                coupling=model.coupling, state=state)
    prev = start._state if (isinstance(start, SolveResult) and start.converged
                            and tuple(start.state) == state) else None
    iterations = 0
    # -- along a scan: the previous point's level, same couplings, one step in R ------------------
    if prev is not None and prev.radius != radius and prev.deformation == deformation:
        result = _refine(model, deformation, radius, state, tol, prev, prev.undeformed, base, 0)
        if result.converged:
            return result
        iterations = result.iterations  # e.g. past the level's fold: the paths below decide
        if "unbounded below" in result.message:
            # one step landed on a spurious solution (a strongly boosted level changing fast):
            # the same path in steps
            seed, _, its = _follow(model, deformation, state, tol, prev, "radius", radius)
            iterations += its
            if seed is not None:
                result = _refine(model, deformation, radius, state, tol, seed, prev.undeformed,
                                 base, iterations)
                if result.converged:
                    return result
                iterations = result.iterations
    # -- the undeformed level at R: continuation in R ---------------------------------------------
    seed = prev.undeformed if prev is not None else None
    if seed is None:
        R0 = max(radius, BETHE_YANG_RADIUS / float(model.masses[0]))
        seed, msg, its = _solve_level(model, NO_DEFORMATION, R0, state, tol, 0, None, (R0, 0.0))
        iterations += its
        if seed is None:
            return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                               message=f"no start from the Bethe-Yang solution at R = {R0:g}: {msg}")
    seed, msg, its = _follow(model, NO_DEFORMATION, state, tol, seed, "radius", radius)
    iterations += its
    if seed is None:
        return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations, message=msg)
    undeformed = seed
    # -- switch the deformation on at fixed R ------------------------------------------------------
    tails = _spin_tails(model, deformation, undeformed, undeformed=True)
    if tails is not None:
        return SolveResult(**base, status=Status.NO_REAL_SOLUTION, iterations=iterations,
                           message=tails)
    if not deformation.is_zero:
        seed, msg, its = _follow(model, deformation, state, tol, seed, "coupling", 1.0)
        iterations += its
        if seed is None:
            status = Status.NO_REAL_SOLUTION if msg.startswith("no real") else Status.NOT_CONVERGED
            result = SolveResult(**base, status=status, iterations=iterations, message=msg)
            return _or_from_large_radius(model, deformation, radius, state, tol, result, undeformed)
    result = _refine(model, deformation, radius, state, tol, seed, undeformed, base, iterations)
    if result.status is Status.NOT_CONVERGED:
        return _or_from_large_radius(model, deformation, radius, state, tol, result, undeformed)
    return result


def _refine(model, deformation, radius, state, tol, seed, undeformed, base, iterations):
    """Solve on grids of increasing resolution from ``seed`` until two agree within ``tol``."""
    states = []
    error = math.nan
    # along a scan (``seed`` the previous radius's final solution, the same couplings): level 0
    # starts from the extrapolation through the seed and the one before it
    first = seed if seed.radius != radius and seed.deformation == deformation else None
    previous = first.previous if first is not None else None
    if previous is not None and previous.deformation != deformation:
        previous = None
    for level in (0, 1, 2, 3):
        r_eff = _effective_radius(deformation, radius, seed.energy, seed.momentum)
        new, msg, its = _solve_level(model, deformation, radius, state, tol, level, seed, r_eff,
                                     previous if level == 0 else None)
        iterations += its
        if new is not None and new.det_sign != seed.det_sign:
            new, msg = None, "the solution left the branch (det J changed sign)"
        if new is not None and _unbounded(deformation, radius, state, new.energy):
            new, msg = None, _unbounded(deformation, radius, state, new.energy)
        if new is not None and _spin_tails(model, deformation, new):
            return SolveResult(**base, status=Status.NO_REAL_SOLUTION, iterations=iterations,
                               message=_spin_tails(model, deformation, new))
        if new is None:
            return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                               message=f"refinement level {level}: {msg}")
        states.append(new)
        seed = new
        if len(states) >= 2:
            fine, coarse = states[-1], states[-2]
            error = (abs(fine.energy - coarse.energy) + fine.iteration_error + coarse.iteration_error
                     + fine.rounding_error)
            if error <= tol * max(abs(fine.energy), float(model.masses[0])):
                fine.undeformed = undeformed
                fine.model = coarse.model = model
                fine.deformation = coarse.deformation = deformation
                fine.coarse = coarse
                if first is not None:  # one deep: the chain along a scan is not kept
                    fine.previous, first.previous = first, None
                return SolveResult(**base, status=Status.CONVERGED, energy=fine.energy, error=error,
                                   momentum=fine.momentum, message="converged",
                                   iterations=iterations, residual=fine.residual,
                                   effective_radius=_effective_radius(
                                       deformation, radius, fine.energy, fine.momentum)[0],
                                   grid=fine.grid, rapidity_grid=fine.grid.t,
                                   pseudo_energies=fine.eps[None, :],
                                   rapidities=tuple(float(t) for t in fine.rapidities), _state=fine)
    return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                       message=f"error estimate {error:.3g} above the tolerance after 4 levels")


def _or_from_large_radius(model, deformation, radius, state, tol, result, undeformed):
    """A moving level (P != 0) that could not be reached by switching TTbar on at fixed R: the
    path in alpha can meet R~ = sqrt((R + alpha E)^2 - (alpha P)^2) -> 0 while the level exists
    at (R, alpha), on the branch that comes from large R. Try that path: switch the coupling on
    at large R, then follow the level in R at fixed alpha. Returns ``result`` (its message
    extended) if that fails too; a fold on this path is not a verdict on the level."""
    if not (deformation.is_ttbar and deformation.alpha and sum(state) != 0):
        return result
    R0 = max(2 * radius, BETHE_YANG_RADIUS / float(model.masses[0]))
    its_total = result.iterations
    seed, msg, its = _solve_level(model, NO_DEFORMATION, R0, state, tol, 0, None, (R0, 0.0))
    its_total += its
    if seed is not None:
        seed, msg, its = _follow(model, deformation, state, tol, seed, "coupling", 1.0)
        its_total += its
    if seed is not None:
        seed, msg, its = _follow(model, deformation, state, tol, seed, "radius", radius)
        its_total += its
    if seed is not None:
        base = dict(model=model.name, radius=radius, couplings=dict(deformation.couplings),
                    coupling=model.coupling, state=state)
        other = _refine(model, deformation, radius, state, tol, seed, undeformed, base, its_total)
        if other.converged:
            other.message = "converged (the coupling switched on at large R, then followed in R)"
            return other
        msg = other.message
    result.message = f"{result.message}; from large R at fixed alpha: {msg}"
    result.iterations = its_total
    return result


def _follow(model, deformation, state, tol, seed, parameter, target):
    """Continue a solved level in R (parameter="radius", deformation fixed) or in the scale
    lambda of the deformation's couplings (parameter="coupling", from seed at lambda = 0 to
    ``target``), on level-0 grids. Steps that change the sign of det J (crossing a fold) are
    refused. Returns (state or None, message, Newton iterations)."""
    its_total = 0
    if parameter == "radius":
        now = seed.radius
        value = lambda p: (deformation, p)  # noqa: E731
    else:
        now = 0.0
        value = lambda p: (deformation.scaled(p), seed.radius)  # noqa: E731
    step = (target - now) / 4 if parameter == "radius" else 0.25
    history = [(now, seed.jac_scale)]
    spurious = False
    before = None  # the solution before ``seed`` on the path, at parameter ``history[-2][0]``
    while now != target:
        trial = target if abs(target - now) <= abs(step) else now + step
        defo, R = value(trial)
        r_eff = _effective_radius(defo, R, seed.energy, seed.momentum)
        # each step starts from the extrapolation through the last two solutions on the path
        w = (trial - now) / (now - history[-2][0]) if before is not None else None
        new, msg, its = _solve_level(model, defo, R, state, tol, 0, seed, r_eff, before, w)
        its_total += its
        if new is not None and new.det_sign != seed.det_sign:
            new, msg = None, "the solution left the branch (det J changed sign)"
        if new is not None and _unbounded(defo, R, state, new.energy):
            new, msg = None, _unbounded(defo, R, state, new.energy)
            spurious = True
        if new is not None and parameter == "coupling" and _spin_tails(model, defo, new):
            # the tail coefficient of the top spin passed through zero on the way
            return None, _spin_tails(model, defo, new), its_total
        if new is not None:
            before, seed, now = seed, new, trial
            history.append((now, new.jac_scale))
            step *= 1.5
            continue
        step *= 0.5
        if abs(step) < 1e-9 * max(abs(now), 1e-3):
            if spurious:  # the path meets R~ -> 0, not a fold: no verdict on real solutions
                return None, f"continuation stalled at {now:.12g}: {msg}", its_total
            if parameter == "coupling" and msg.startswith("the solution left the branch"):
                # det J changes sign within a step of ~1e-9 of the coupling scale: J is
                # singular there, the level's fold, whether or not the pivots' trend showed it
                return None, (f"no real solution: the level meets its branch point at about "
                              f"{now:.6g} times the requested couplings (det J changes sign "
                              f"there)"), its_total
            if parameter == "coupling" and _collapsed(history):
                # Newton from a solution fails ~1e-9 of the scale away, where the pivots of J
                # have fallen by four orders of magnitude or more on the way: J is singular
                # there (whether the last trial's rounding shows det J changing sign or a
                # failed line search, which depends on the BLAS's order of operations)
                return None, (f"no real solution: the level meets its branch point at about "
                              f"{now:.6g} times the requested couplings (J is singular there: "
                              f"its pivot ratio fell from {history[0][1]:.1e} to "
                              f"{history[-1][1]:.1e})"), its_total
            return None, _stalled(parameter, history, target, now, msg), its_total
    return seed, "converged", its_total


#: a continuation that stalls where the Jacobian's pivot ratio has fallen by this factor from
#: its start has met a singular J (`_follow`)
COLLAPSE = 1e-4


def _collapsed(history):
    """The pivot ratio (smallest over largest LU pivot) at the last solution of a continuation
    is `COLLAPSE` or less times the one at its start."""
    first, last = history[0][1], history[-1][1]
    return math.isfinite(first) and first > 0 and last <= COLLAPSE * first


def _stalled(parameter, history, target, now, msg):
    """Why a continuation could not go on: a fold (branch point) or a failure."""
    if len(history) >= 2 and parameter == "coupling":
        (p1, s1), (p2, s2) = history[-2], history[-1]
        # near a fold the smallest pivot ratio of the Jacobian vanishes like sqrt(p_c - p)
        slope = (s2 * s2 - s1 * s1) / (p2 - p1)
        p_c = p2 - s2 * s2 / slope if slope < 0 else math.nan
        if math.isfinite(p_c) and p_c < target:
            return (f"no real solution: the level meets its branch point at about {p_c:.6g} "
                    f"times the requested couplings")
    name = "R" if parameter == "radius" else "the coupling scale"
    return f"continuation in {name} stalled at {now:.12g}: {msg}"


def excited_derivatives(result, spins=(1,)):
    """Exact derivatives of a converged excited level with real rapidities (`solve_excited`),
    with error estimates: ``dE_dR`` and ``dE_dalpha{s}`` for each spin in ``spins`` (also at
    alpha_s = 0), and for each key a ``<key>_error``: the difference from the same derivative
    on the next-coarser grid plus a rounding allowance (the rule of the energy)."""
    if not isinstance(result, SolveResult):
        raise TypeError(f"result must be a SolveResult, got {type(result).__name__}")
    if not result.converged:
        raise ValueError(f"result: derivatives need a converged point, got status {result.status.value}")
    fine = result._state
    if not isinstance(fine, ExcitedState) or fine.model is None:
        raise ValueError("result: excited_derivatives needs a level solved by solve_excited")
    d_fine = fine.derivatives(spins)
    d_coarse = fine.coarse.derivatives(spins) if fine.coarse is not None else None
    out = dict(d_fine)
    for key, value in d_fine.items():
        floor = 64 * _EPS * abs(value) * np.sqrt(fine.eps.size)
        out[key + "_error"] = (abs(value - d_coarse[key]) if d_coarse else abs(value)) + floor
    return out
