"""CDD deformations of diagonal S-matrices: spin terms, pole and resonance factors.

Convention of the project (README, section Conventions): every S_ab is multiplied by

    Phi_ab(t) = prod_s exp(i alpha_s q_s^a q_s^b sinh(s t)) * eps * prod_j F_(sigma_j)(t)^(p_j)

Spin terms. q_1^a = m_a (spin 1 is the TTbar deformation with coupling alpha; alpha > 0 is the
side where the ground state meets a square-root branch point at finite radius, Hagedorn; with
massless species its phase is alpha (p_a e_b - e_a p_b), `DiagonalModel.ttbar_phase`, which is
alpha m_a m_b sinh t for massive pairs and vanishes between two right movers); for
s > 1, q_s^a are the model's conserved charges (`DiagonalModel.charges`, `tba.models.charges`):
only the spins the model has are accepted. They add to the kernel

    phi_ab -> phi_ab + sum_s alpha_s s q_s^a q_s^b cosh(s t),

separable, cosh(s(t - t')) = cosh(st) cosh(st') - sinh(st) sinh(st'), so the solver applies each
spin as two rank-one terms (`couplings`, `charges`).

Pole and resonance factors (`PoleFactor`): F_sigma(t) = (sinh t + i sigma) / (sinh t - i sigma)
with sigma = sin u (Camilo, Fleury, Lencses, Negro and Zamolodchikov, JHEP 2021):

* real u in (0, pi): 0 < sigma <= 1, F = f_(u/pi), poles at t = i u and i (pi - u) (on the
  imaginary axis: bound-state-like poles of S);
* sigma > 1 (u = pi/2 + i theta_0, whose conjugate u* = pi - u gives the same factor): poles at
  t = +-theta_0 + i pi/2, a resonance of rapidity theta_0 = arccosh(sigma); 1/F is the staircase
  factor of Al.B. Zamolodchikov (1991): free fermion x resonance(theta_0, -1) is his staircase
  model, kernel 1/cosh(t - theta_0) + 1/cosh(t + theta_0);
* complex sigma (any other complex u): real analyticity needs u* too, so the factor is
  F_sigma F_(sigma*): four poles, at t = +-Im u + i Re u and +-Im u + i (pi - Re u).

Their kernels -2 sigma cosh t / (sinh^2 t + sigma^2) (twice the real part for a pair) are not
separable: `kernel(model, t)` gives them (the same for every pair a, b), `singularity_distance`
their nearest singularity, `kernel_key` a hashable identity for caches. eps = prod_j F_j(0)^(p_j)
= +-1 (F_sigma(0) = -1 for real sigma, +1 for a pair) is included so that Phi(0) = +1: the factors
keep every S_ab(0), hence the statistics of the model (decision: a deformation never changes the
statistics; a product with an odd number of real factors carries eps = -1).

Scaling. `scaled(f)` multiplies the spin couplings by f and keeps the pole factors: the solver
switches a deformation on gradually through `scaled` (0 -> 1 at fixed R), and a pole factor has
no continuous path to 1 that stays a CDD factor (F_sigma -> 1 as sigma -> 0 only pointwise: its
kernel integral is -2 pi for every 0 < sigma <= 1). The base of such a continuation is the model
times `pole_part()`; continuation in a factor's parameters is done by rebuilding the factor.

The generalised flow of the ground state (P = 0; pole factors fixed). For the ground state L_b is
even, so the sinh-sinh half of each spin term drops out and the equations are

    eps_a(t) = m_a R cosh t - sum_b (phi_ab * L_b)(t) / 2 pi + sum_s s alpha_s E_s q_s^a cosh(s t),
    E_s = -(1/2 pi) sum_b q_s^b int cosh(s t) L_b(t) dt           (E_1 = E, the energy),

i.e. the undeformed generalised TBA with driving terms sum_r beta_r q_r^a cosh(r t),
beta_r = R delta_r1 + r alpha_r E_r. Write Ebar_r(beta) for its charges. Their response is
symmetric, d Ebar_r / d beta_s = d Ebar_s / d beta_r, since dL/d beta_s = -n (q_s cosh st)^dr with
n = dL/d(-eps) and the dressing is self-adjoint for the measure n dt (phi_ab(t - t') = phi_ba(t' - t)).
With J = d Ebar / d beta (symmetric) and D = diag(r alpha_r): dE/d alpha_s = s E_s
e_1^T J (1 - D J)^(-1) e_s and dE_s/dR = e_s^T J (1 - D J)^(-1) e_1, and J (1 - D J)^(-1)
= (J^(-1) - D)^(-1) is symmetric, hence

    d E / d alpha_s = s E_s dE_s / dR        (for s = 1: the Burgers equation dE/d alpha = E dE/dR).

Caution: the driving term s alpha_s E_s q_s^a cosh(s t) outgrows m_a R cosh t; where
s alpha_s E_s q_s^a < 0 it is unbounded below and the TBA has no solution on the whole line. A
single species has q_s = 1 and a good sign of alpha_s (alpha_s E_s > 0); for several species the
charges of s > 1 usually have mixed signs (q_s is orthogonal to the positive mass vector), and
then only the derivatives at alpha_s = 0 are meaningful.
"""

import cmath
import math
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from tba.models.blocks import sigma_factor, sigma_kernel


def _integer_power(power):
    if isinstance(power, bool) or not isinstance(power, (int, np.integer)) or power == 0:
        raise ValueError(f"power must be a non-zero integer, got {power!r}")
    return int(power)


@dataclass(frozen=True)
class PoleFactor:
    """F_sigma(t)^power, F_sigma = (sinh t + i sigma) / (sinh t - i sigma); complex sigma stands
    for the pair F_sigma F_(sigma*). Canonical form: Re sigma > 0 (F_(-sigma) = 1 / F_sigma) and
    Im sigma >= 0; a real sigma is stored as a float."""

    sigma: complex
    power: int = 1

    def __post_init__(self):
        power = _integer_power(self.power)
        try:
            sigma = complex(self.sigma)
        except (TypeError, ValueError):
            raise TypeError(f"sigma must be a number, got {self.sigma!r}") from None
        if not (cmath.isfinite(sigma) and sigma != 0):
            raise ValueError(f"sigma must be finite and non-zero, got {self.sigma!r}")
        if abs(sigma.imag) <= 1e-15 * abs(sigma):
            sigma = complex(sigma.real, 0.0)
        if sigma.real < 0:
            sigma, power = -sigma, -power
        if sigma.real == 0:
            raise ValueError(f"sigma = {self.sigma!r} puts a pole of the factor on the real "
                             f"rapidity axis")
        sigma = sigma.conjugate() if sigma.imag < 0 else sigma
        object.__setattr__(self, "sigma", sigma.real if sigma.imag == 0 else sigma)
        object.__setattr__(self, "power", power)

    @property
    def is_pair(self):
        return isinstance(self.sigma, complex)

    @property
    def u(self):
        """u with sin u = sigma, 0 < Re u <= pi/2 (principal arcsin)."""
        return cmath.asin(self.sigma)

    @property
    def singularity_distance(self):
        """Distance of the kernel's nearest pole from the real axis: |Re arcsin(sigma)| (the
        poles sit at sinh t = +-i sigma, t = +-i u + 2 pi i k, +-(i pi - i u) + 2 pi i k)."""
        return abs(cmath.asin(self.sigma).real)

    def kernel(self, t):
        """-i d/dt log of the factor: power times -2 sigma cosh t / (sinh^2 t + sigma^2)
        (twice its real part for a pair); real."""
        k = sigma_kernel(self.sigma, t)
        return self.power * (2 * k.real if self.is_pair else k)

    def kernel_transform(self, k):
        """int e^{ikt} kernel(t) dt = power * (-2 pi cosh(k (pi/2 - u)) / cosh(pi k / 2)),
        sin u = sigma (the transform of the block f_(u/pi), continued to complex u; twice its
        real part for a pair); real and even in k."""
        k = np.asarray(k, dtype=float)
        u = cmath.asin(self.sigma)
        a = np.pi * np.abs(k)
        z = (np.pi / 2 - u) * np.abs(k)  # |Re z| < a / 2: the ratio decays like e^{-u_r |k|}
        with np.errstate(over="ignore"):
            ratio = (np.exp(z - a / 2) + np.exp(-z - a / 2)) / (1 + np.exp(-a))
        out = -2 * np.pi * ratio
        out = 2 * out.real if self.is_pair else out.real
        return self.power * out

    @property
    def oscillation(self):
        """|Im u|: the transform oscillates like cos(k Im u) (resonances at rapidity Im u)."""
        return abs(cmath.asin(self.sigma).imag)

    def value(self, t):
        """The factor at rapidity t (complex; t may be complex)."""
        f = sigma_factor(self.sigma, t)
        if self.is_pair:
            f = f * sigma_factor(self.sigma.conjugate(), t)
        return f ** self.power

    @property
    def at_zero(self):
        """The factor at t = 0: (-1)^power for real sigma, +1 for a pair."""
        return 1 if self.is_pair else (-1) ** (self.power % 2)

    @property
    def key(self):
        return (self.sigma.real, self.sigma.imag if self.is_pair else 0.0, self.power)

    def describe(self):
        if self.is_pair:
            return {"sigma": [self.sigma.real, self.sigma.imag], "power": self.power,
                    "pair": True}
        return {"sigma": self.sigma, "power": self.power, "pair": False}


def _spin(s):
    if isinstance(s, bool) or not isinstance(s, (int, np.integer)) or s < 1:
        raise ValueError(f"spin must be a positive integer, got {s!r}")
    return int(s)


@dataclass(frozen=True)
class CDD:
    """A CDD deformation: spin couplings ``{spin: alpha_s}`` and pole/resonance factors.

    ``CDD({1: 0.1})`` is TTbar with alpha = 0.1; ``CDD({1: 0.1, 3: -0.02})`` adds a spin-3
    factor; ``CDD(factors=(PoleFactor(0.5),))`` the factor f_(1/6). Deformations add:
    ``ttbar(0.1) + higher_spin(3, -0.02) + resonance(20.0, -1)``.
    """

    couplings: Mapping[int, float] = field(default_factory=dict)
    factors: tuple = ()

    def __post_init__(self):
        clean = {}
        try:
            items = dict(self.couplings).items()
        except (TypeError, ValueError):
            raise TypeError(f"couplings must be a mapping {{spin: alpha}}, got {self.couplings!r}") from None
        for s, a in items:
            s = _spin(s)
            if isinstance(a, bool):
                raise TypeError(f"alpha_{s} must be a real number, got {a!r}")
            try:
                a = float(a)
            except (TypeError, ValueError):
                raise TypeError(f"alpha_{s} must be a real number, got {a!r}") from None
            if not np.isfinite(a):
                raise ValueError(f"alpha_{s} must be finite, got {a!r}")
            if a != 0.0:
                clean[s] = clean.get(s, 0.0) + a
        object.__setattr__(self, "couplings", dict(sorted(clean.items())))
        merged = {}
        for f in self.factors:
            if not isinstance(f, PoleFactor):
                raise TypeError(f"factors must be PoleFactor objects, got {type(f).__name__}")
            base = (f.sigma, f.is_pair)
            merged[base] = merged.get(base, 0) + f.power
        object.__setattr__(self, "factors", tuple(sorted(
            (PoleFactor(sigma, p) for (sigma, _), p in merged.items() if p),
            key=lambda f: f.key)))

    def __add__(self, other):
        if not isinstance(other, CDD):
            raise TypeError(f"deformation: cannot add {other!r} ({type(other).__name__}) to a CDD "
                            f"deformation; add ttbar(...), higher_spin(...), cdd_factor(...) or "
                            f"resonance(...)")
        merged = dict(self.couplings)
        for s, a in other.couplings.items():
            merged[s] = merged.get(s, 0.0) + a
        return CDD(merged, self.factors + other.factors)

    def __radd__(self, other):
        if isinstance(other, int) and not isinstance(other, bool) and other == 0:  # sum(...)
            return self
        return self.__add__(other)

    def scaled(self, factor):
        """The spin couplings multiplied by ``factor``; the pole factors unchanged (module
        docstring: a pole factor has no continuous path to 1)."""
        return CDD({s: factor * a for s, a in self.couplings.items()}, self.factors)

    def pole_part(self):
        """The pole and resonance factors alone (the base a continuation in the spins starts from)."""
        return CDD({}, self.factors)

    def spin_part(self):
        """The spin couplings alone."""
        return CDD(self.couplings)

    @property
    def alpha(self):
        """The TTbar coupling (spin 1), 0 if absent."""
        return self.couplings.get(1, 0.0)

    @property
    def is_zero(self):
        return not self.couplings and not self.factors

    @property
    def is_ttbar(self):
        """True when only spin 1 is present (then the flow relation is exact for P = 0)."""
        return set(self.couplings) <= {1} and not self.factors

    @property
    def has_poles(self):
        return bool(self.factors)

    @property
    def sign(self):
        """eps = prod_j F_j(0)^(p_j): included so that the factors are +1 at t = 0."""
        return math.prod(f.at_zero for f in self.factors)

    @property
    def singularity_distance(self):
        """Distance from the real axis of the nearest singularity of the pole factors' kernel
        (infinite without factors; the spin terms' effect on L is the solver's grid rule)."""
        return min((f.singularity_distance for f in self.factors), default=math.inf)

    @property
    def kernel_key(self):
        """A hashable identity of the non-separable kernel (None without factors)."""
        return tuple(f.key for f in self.factors) or None

    @property
    def max_spin(self):
        return max(self.couplings, default=1)

    def kernel(self, model, t):
        """The non-separable kernel the factors add, phi_ab(t), shape (n, n) + t.shape, the
        same for every pair; None without factors."""
        if not self.factors:
            return None
        t = np.asarray(t, dtype=float)
        phi = sum(f.kernel(t) for f in self.factors)
        n = model.n_species
        return np.broadcast_to(phi, (n, n) + t.shape).copy()

    def kernel_transform(self, model, k):
        """int e^{ikt} of `kernel`, shape (n, n) + k.shape; None without factors."""
        if not self.factors:
            return None
        k = np.asarray(k, dtype=float)
        phit = sum(f.kernel_transform(k) for f in self.factors)
        n = model.n_species
        return np.broadcast_to(phit, (n, n) + k.shape).copy()

    @property
    def oscillation(self):
        """The largest `PoleFactor.oscillation` (0 without factors)."""
        return max((f.oscillation for f in self.factors), default=0.0)

    def charges(self, model, spin):
        """q^a_s for every species of ``model`` (`DiagonalModel.charges`)."""
        return model.charges(spin)

    def check(self, model):
        """ValueError naming the first spin ``model`` has no charge for."""
        for s in self.couplings:
            model.charges(s)

    def value(self, model, t):
        """Phi_ab(t), shape (n, n) + t.shape (complex): the factor every S_ab is multiplied by."""
        t = np.asarray(t)
        n = model.n_species
        phase = np.zeros((n, n) + t.shape, dtype=complex)
        for s, a in self.couplings.items():
            if s == 1:  # p_a e_b - e_a p_b: m_a m_b sinh t, or its massless forms
                phase += a * model.ttbar_phase(t)
                continue
            q = self.charges(model, s)
            phase += a * np.multiply.outer(np.outer(q, q), np.sinh(s * t))
        out = np.exp(1j * phase) * self.sign
        for f in self.factors:
            out = out * f.value(t)
        return out

    def describe(self):
        return {"convention": "S -> S exp(i alpha_s q_a q_b sinh(s t)) eps prod F_sigma^p; "
                              "spin 1: q = m (TTbar); F_sigma = (sinh t + i sigma)/(sinh t - i sigma)",
                "couplings": {str(s): a for s, a in self.couplings.items()},
                "factors": [f.describe() for f in self.factors], "sign": self.sign}


def ttbar(alpha):
    """The TTbar CDD factor exp(i alpha m_a m_b sinh t)."""
    return CDD({1: alpha})


def higher_spin(spin, alpha_s):
    """A spin-``spin`` CDD factor exp(i alpha_s q_s^a q_s^b sinh(spin t)); the model must have
    that conserved charge (single species: every odd spin, q = 1)."""
    return CDD({spin: alpha_s})


def cdd_factor(u, power=1):
    """F_u(t)^power with F_u = (sinh t + i sin u) / (sinh t - i sin u).

    Real u in (0, pi): poles at t = i u, i (pi - u) (F_(pi x) = f_x). Complex u: sin u real > 1
    (Re u = pi/2) is one resonance factor; any other complex u brings F_(u*) along (the pair)."""
    try:
        u = complex(u)
    except (TypeError, ValueError):
        raise TypeError(f"u must be a number, got {u!r}") from None
    if u.imag == 0:
        if not 0 < u.real < math.pi:
            raise ValueError(f"a real u must lie in (0, pi), got {u.real!r}")
        u = min(u.real, math.pi - u.real)  # F_u = F_(pi - u): one representative
    return CDD(factors=(PoleFactor(cmath.sin(u), power),))


def resonance(theta0, power=1):
    """F^power with sin u = cosh(theta0): poles of F at t = +-theta0 + i pi/2. With power = -1,
    the staircase factor (Al.B. Zamolodchikov 1991): kernel 1/cosh(t - theta0) + 1/cosh(t + theta0)."""
    if isinstance(theta0, bool):
        raise TypeError(f"theta0 must be a real number, got {theta0!r}")
    try:
        theta0 = float(theta0)
    except (TypeError, ValueError):
        raise TypeError(f"theta0 must be a real number, got {theta0!r}") from None
    if not (math.isfinite(theta0) and theta0 > 0):
        raise ValueError(f"theta0 must be finite and positive, got {theta0!r}")
    return CDD(factors=(PoleFactor(math.cosh(theta0), power),))


#: the largest |power| and theta0 that `pole_factors` accepts (cosh theta0 stays finite)
MAX_POWER, MAX_THETA0 = 64, 700.0


def pole_factors(poles=(), resonances=()):
    """The CDD deformation prod_j F_(pi x_j)^(p_j) prod_k F_(sigma_k)^(q_k), sigma_k = cosh theta_k,
    from pairs ``poles = [(x, p), ...]`` (x = u/pi in (0, 1): F_(pi x) = f_x, the block notation)
    and ``resonances = [(theta0, q), ...]`` (`resonance`): the form run files and the command line
    use. Powers are nonzero integers, |p| <= 64; 0 < theta0 <= 700. ValueError naming the entry
    (``poles[1]: ...``) for anything else."""
    out = NO_DEFORMATION
    for name, items, build in (("poles", poles, _pole_entry), ("resonances", resonances, _resonance_entry)):
        for i, item in enumerate(items):
            try:
                value, power = item
            except (TypeError, ValueError):
                raise ValueError(f"{name}[{i}]: expected a pair [value, power], got {item!r}") from None
            try:
                out = out + build(value, _power(power))
            except (TypeError, ValueError) as exc:
                raise ValueError(f"{name}[{i}]: {exc}") from None
    return out


def _power(p):
    if isinstance(p, bool) or not isinstance(p, (int, float)) or p != int(p) or p == 0 \
            or abs(p) > MAX_POWER:
        raise ValueError(f"the power must be a nonzero integer of size <= {MAX_POWER}, got {p!r}")
    return int(p)


def _pole_entry(x, power):
    if isinstance(x, bool) or not isinstance(x, (int, float)) or not 0 < x < 1:
        raise ValueError(f"x must be a number in (0, 1) (u = pi x), got {x!r}")
    return cdd_factor(math.pi * float(x), power)


def _resonance_entry(theta0, power):
    if isinstance(theta0, bool) or not isinstance(theta0, (int, float)) \
            or not (math.isfinite(theta0) and 0 < theta0 <= MAX_THETA0):
        raise ValueError(f"theta0 must be a number in (0, {MAX_THETA0:g}], got {theta0!r}")
    return resonance(theta0, power)


NO_DEFORMATION = CDD({})
