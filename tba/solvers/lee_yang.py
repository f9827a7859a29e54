"""The Lee-Yang zero-momentum one-particle state at every radius, optionally TTbar-deformed.

The state is the ground-state TBA continued to an excited sheet (Dorey & Tateo, Nucl. Phys.
B482 (1996) 639): no particle sits on the real axis; instead Y = e^eps has 1 + Y = 0 at points
off the axis, which add sources to the equations. S = f_(2/3) (s = sin(2 pi/3)), phi its kernel.

Large R (R > R* ~ 2.54). The points are +-i y with y in (pi/6, pi/3) (y -> pi/6 as R -> oo):

    eps(t) = R cosh t + log S(t - i y) - log S(t + i y) - (1/2pi) int phi(t - t') L(t') dt'

with eps(i y) = i pi and E = 2 sin y - (1/2pi) int cosh t L. Y then vanishes at t = +-i(pi/3 - y),
close to the axis, and as R falls to R* the two zeros pinch the axis at t = 0: y reaches pi/3
like sqrt(R - R*), together with the partner zeros of 1 + Y at +-i(2pi/3 - y) (the Y-system
Y(t + i pi/3) Y(t - i pi/3) = 1 + Y(t) pairs them). Below R* the four points move to
+-x +- i pi/3 and Y has simple zeros on the real axis at +-x, negative between them (the
plateau value Y = (1 - sqrt 5)/2 gives c_eff = -22/5 in the UV). The real-axis equations above
stop working at R*; the form used here works on both sides and through R*.

The zeros of Y near the axis are taken out explicitly, Y = Q e^eta with

    Q(t) = (sinh^2 t + sigma) / cosh^2 t,    sigma = sin^2(pi/3 - y) (R > R*),  -sinh^2 x (R < R*)

so that L = F - log Q with F = log(Q + e^-eta) real and smooth (Q + e^-eta > 0 on the axis).
The convolution of phi with log Q has a closed form (residues of the i pi-antiperiodic
integrand), and with zeta = -i arcsin(sqrt sigma) (= -i (pi/3 - y), or x) the equations become

    eta(t) = R cosh t + B(t) - (1/2pi) int phi(t - t') F(t') dt'
    B(t)   = log|S(t - i pi/3 - zeta)| + log|S(t - i pi/3 + zeta)| - log|Q(t)| - log|Q(t + i pi/3)|
             - log S(t - i pi/2)
    E      = sqrt(3) sqrt(1 - sigma) - 1 - (1/2pi) int cosh t F(t) dt

B is smooth on the axis (its logarithmic singularities cancel in pairs), and everything is
analytic in sigma through sigma = 0 (R = R*), where y and x themselves are not. The
quantisation condition is 1 + Y = 0 at c = i pi/3 + zeta (c = i y above R*, x + i pi/3 below):

    G = R cosh c - log S(2c) - (1/2) log Q(c + i pi/3) + (1/2) log S(i pi/3 + 2 zeta)
        - (1/2) log(8 i s tanh zeta) - log S(zeta - i pi/6) - (1/2pi) int phi(c - t') F(t') dt'

(the singular factors of log Q(c + 2i pi/3) and log S(c - zeta) are combined analytically). Above
R*, c = i y with y = pi/6 + tau and tau ~ e^(-sqrt(3) R / 2): S(2c) has a pole, S(zeta - i pi/6) a
zero and Q(c + i pi/3) a double pole at tau = 0, so tau is computed from v without cancellation
and those three factors in factored form (`Pair.singular_logs`); from pi/6 - arcsin(sqrt sigma)
they lost accuracy like 1e-16 / tau (3e-7 relative at R = 25, 0.1 at R = 40). G is
odd in arcsin sqrt(sigma): real above R* (Im G = -pi) and imaginary below (Re G = 0), so the
equation solved is G / sqrt|sigma| = 0 (Re above, Im below), analytic through R*, without the
trivial root sigma = 0. Where c approaches the axis (c - i pi/3 real below R*) the integral is
taken as the boundary value from below, the analytic continuation from R > R*: phi(c - t') =
i / sinh(zeta - t') - i / D(zeta - t'), D(v) = -(1/2) sinh v + i s cosh v, and the 1/(zeta - t')
part is integrated exactly against the sinc interpolant of F on the grid,
int sinc((t' - t_j)/h) / (zeta - t') dt' = (1 - exp(-i pi w)) / w, w = (zeta - t_j)/h.

The unknowns are eta on the grid and v = -log(1/4 - sigma) (sigma -> 1/4 exponentially at large R,
to -oo like -R^-2 at small R). The grid is uniform; eta is solved for |t| <= T, where e^-eta is
negligible beyond, and F = log Q is used out to T + 12 (the convolution) and further for the
energy. The CDD factor exp(i alpha sinh t) adds alpha E cosh t to the driving term (its sources
and its separable kernel, with the closed form of int cosh t log Q): R becomes R + alpha E in
eta's equation and in G, with E the energy being solved for. Higher-spin factors are not
available for this state (int cosh(3t) log Q diverges).
"""

import cmath
import math
from fractions import Fraction

import numpy as np
import scipy.linalg
from scipy.interpolate import CubicSpline

from tba.solvers.result import SolveResult, Status

_EPS = np.finfo(float).eps
_S = math.sin(2 * math.pi / 3)  # the block f_(2/3): S(u) = (sinh u + i s) / (sinh u - i s)
_I3 = 1j * math.pi / 3
#: where the state starts (its asymptotic form) before continuing to smaller R
START_RADIUS = 12.0
#: the width of the tails beyond the solved range (F = log Q there)
_TAIL = 12.0


def _S_of(u):
    sh = np.sinh(u)
    return (sh + 1j * _S) / (sh - 1j * _S)


def _log_abs_S(u):
    sh = np.sinh(u)
    return np.log(np.abs(sh + 1j * _S)) - np.log(np.abs(sh - 1j * _S))


def _phi(u):
    """The kernel phi(u) = -i d/du log S(u) = -2 s cosh u / (sinh^2 u + s^2)."""
    return -2 * _S * np.cosh(u) / (np.sinh(u) ** 2 + _S ** 2)


def _log_q(t, sigma):
    """log|Q(t)| for real t, accurate where Q -> 1 (large |t|)."""
    u = (sigma - 1.0) / np.cosh(np.clip(t, -350.0, 350.0)) ** 2
    return np.where(u > -0.5, np.log1p(np.maximum(u, -0.5)), np.log(np.abs(1.0 + u)))


def _q(t, sigma):
    """Q(t) for complex t."""
    return (np.sinh(t) ** 2 + sigma) / np.cosh(t) ** 2


class Pair:
    """The singular points for one value of the unknown v = -log(1/4 - sigma)."""

    def __init__(self, v):
        self.v = float(v)
        w = math.exp(-self.v)  # 1/4 - sigma, exact however close sigma is to 1/4
        self.sigma = 0.25 - w
        if self.sigma == 0.0:  # exactly at R*: nudge (G / sqrt|sigma| is continuous there)
            self.sigma = 1e-300
        self.above = self.sigma > 0  # R > R*: points at +-i y on the imaginary axis
        self.tau = math.nan
        if self.above:
            # y = pi/6 + tau with sin(tau) sin(pi/3 - tau) = w: tan(tau) is the small root of
            # (1 + 2w) u^2 - sqrt(3) u + 2w = 0, in the form without cancellation. tau -> 0
            # like e^(-sqrt(3) R / 2) at large R, and pi/6 - arcsin(sqrt(sigma)) would carry an
            # absolute error ~1e-16, i.e. a relative one ~1e-16 / tau
            disc = max(3.0 - 8.0 * w * (1.0 + 2.0 * w), 0.0)
            self.tau = math.atan(4.0 * w / (math.sqrt(3.0) + math.sqrt(disc)))
            self.zeta = complex(0.0, -(math.pi / 6 - self.tau))
        else:
            self.zeta = -1j * cmath.asin(cmath.sqrt(self.sigma))
        self.norm = math.sqrt(abs(self.sigma))

    @property
    def y(self):
        return math.pi / 6 + self.tau  # above R*

    @property
    def x(self):
        return self.zeta.real  # below R*

    @property
    def strip(self):
        """Distance from the real axis of the nearest singularity of F and B."""
        return self.y if self.above else math.pi / 3

    def describe(self):
        if self.above:
            return f"singularities at t = +-{self.y:.15g} i"
        return f"singularities at t = +-{self.x:.15g} +- i pi/3"

    def B(self, t):
        z = self.zeta
        return (_log_abs_S(t - _I3 - z) + _log_abs_S(t - _I3 + z) - _log_q(t, self.sigma)
                - np.log(np.abs(_q(t + _I3, self.sigma)))
                - np.log1p(-2 * _S / (np.cosh(t) + _S)))

    def singular_logs(self):
        """Above R*: log|S(2c)|, log|S(zeta - i pi/6)| and log|Q(c + i pi/3)| at c = i y,
        y = pi/6 + tau; the three numbers are real, S(2c) > 0 and the other two < 0. They have a
        pole, a zero and a double pole as tau -> 0, where the plain expressions subtract nearly
        equal numbers; here each difference is a product of sines (s = sin(pi/3)):

            sin 2y - s = 2 cos(pi/3 + tau) sin tau,   s - sin(pi/3 - tau) = 2 cos(pi/3 - tau/2) sin(tau/2),
            sigma - cos^2 tau = -s cos(pi/6 - 2 tau),  cosh^2(c + i pi/3) = sin^2 tau,

        and the logarithms are taken factor by factor (sin(tau)^2 underflows beyond R ~ 410)."""
        tau = self.tau
        log_sin = math.log(math.sin(tau))
        log_s_2c = (math.log(math.sin(math.pi / 3 + 2 * tau) + _S)
                    - math.log(2 * math.cos(math.pi / 3 + tau)) - log_sin)
        log_s_zero = (math.log(2 * math.cos(math.pi / 3 - tau / 2)) + math.log(math.sin(tau / 2))
                      - math.log(math.sin(math.pi / 3 - tau) + _S))
        log_q_pole = math.log(_S * math.cos(math.pi / 6 - 2 * tau)) - 2 * log_sin
        return log_s_2c, log_s_zero, log_q_pole

    def G_constant(self, r_eff):
        """The terms of G that do not involve the integral."""
        z, s = self.zeta, self.sigma
        if not self.above:
            c = _I3 + z
            return (r_eff * cmath.cosh(c) - cmath.log(_S_of(2 * c)) - 0.5 * cmath.log(_q(c + _I3, s))
                    + 0.5 * cmath.log(_S_of(_I3 + 2 * z)) - 0.5 * cmath.log(8j * _S * cmath.tanh(z))
                    - cmath.log(_S_of(z - 1j * math.pi / 6)))
        # above R* every factor is real (c = i y): the same sum from the factored forms, with
        # the principal logarithm (log x = log|x| + i pi for x < 0); S(2 i tau) < 0 and
        # 8 i s tanh(zeta) = 8 s tan(pi/6 - tau) > 0 have no cancellation
        tau = self.tau
        log_s_2c, log_s_zero, log_q_pole = self.singular_logs()
        log_s_small = math.log((_S + math.sin(2 * tau)) / (_S - math.sin(2 * tau)))
        real = (r_eff * math.cos(math.pi / 6 + tau) - log_s_2c - 0.5 * log_q_pole + 0.5 * log_s_small
                - 0.5 * math.log(8 * _S * math.tan(math.pi / 6 - tau)) - log_s_zero)
        # imaginary parts: -(0) - pi/2 + pi/2 - 0 - pi
        return complex(real, -math.pi)

    def G_weights(self, t, h):
        """w_j with (1/2pi) int phi(c - t') F(t') dt' = sum_j w_j F(t_j) (see the module doc)."""
        z = self.zeta
        w = (z - t) / h
        v = z - t
        small_w = np.abs(w) < 1e-3
        small_v = np.abs(v) < 1e-2
        with np.errstate(all="ignore"):
            k1 = np.where(small_w, 0.0, (1 - np.exp(-1j * np.pi * w)) / w)
            k2 = np.where(small_v, 0.0, 1 / np.sinh(v) - 1 / v)
        ws, vs = w[small_w], v[small_v]
        k1[small_w] = 1j * np.pi * (1 - 0.5j * np.pi * ws - (np.pi * ws) ** 2 / 6
                                    + 1j * (np.pi * ws) ** 3 / 24)
        k2[small_v] = -vs / 6 + 7 * vs ** 3 / 360 - 31 * vs ** 5 / 15120
        d = -0.5 * np.sinh(v) + 1j * _S * np.cosh(v)
        return (1j / (2 * np.pi)) * (k1 + h * k2 - h / d)

    def reduce(self, G):
        """The real quantisation equation and the part that must vanish by itself."""
        if self.above:
            return G.real / self.norm, math.remainder(G.imag + math.pi, 2 * math.pi)
        return G.imag / self.norm, G.real

    def energy_constant(self):
        return math.sqrt(3.0) * math.sqrt(1.0 - self.sigma) - 1.0


class Grid:
    """Uniform grid t_j = j h on [-T - tail, T + tail]; eta is solved on |t| <= T."""

    def __init__(self, h, T):
        self.h = float(h)
        n_in = int(math.ceil(T / h))
        n = n_in + int(math.ceil(_TAIL / h))
        self.t_all = h * np.arange(-n, n + 1)
        self.inner = np.abs(np.arange(-n, n + 1)) <= n_in
        self.t = self.t_all[self.inner]
        self.N = self.t.size
        self.n_in = n_in
        self.K = (h / (2 * np.pi)) * _phi(self.t[:, None] - self.t_all[None, :])

    def __eq__(self, other):
        return isinstance(other, Grid) and (self.h, self.n_in) == (other.h, other.n_in)

    def outer_energy_sum(self, sigma):
        """sum over grid points beyond T of cosh t log Q (both sides)."""
        t_max = math.log(2 * abs(sigma - 1) + 2) + 46.0
        t = self.h * np.arange(self.n_in + 1, int(math.ceil(t_max / self.h)) + 1)
        return 2.0 * float(np.sum(np.cosh(t) * _log_q(t, sigma)))


def _grid(pair, r_eff, tol, level):
    # sinc interpolation (in G) converges like exp(-pi d / h), the trapezoid rule like
    # exp(-2 pi d / h): h for 1e-2 tol from the former
    h = 0.9 * math.pi * pair.strip / math.log(100.0 / tol) / 2 ** (level / 2)
    T = math.acosh(max(1.0, 42.0 / r_eff)) + 1.0
    if not pair.above:
        T = max(T, pair.x + 3.0)
    return Grid(h, T)


class Equations:
    """The discretised equations at radius R and TTbar coupling alpha on one grid."""

    def __init__(self, grid, radius, alpha):
        self.grid = grid
        self.radius = radius
        self.alpha = alpha

    def parts(self, eta, v):
        """The residuals at (eta, v), or None outside the equations' domain."""
        try:
            with np.errstate(all="ignore"):
                p = self._parts(eta, v)
        except (ValueError, ZeroDivisionError, OverflowError):  # a log of 0 or a huge v
            return None
        if p is None or not (np.all(np.isfinite(p["res"])) and math.isfinite(p["g"])
                             and math.isfinite(p["E"])):
            return None
        return p

    def _parts(self, eta, v):
        g = self.grid
        pair = Pair(v)
        t = g.t
        q = 1.0 + (pair.sigma - 1.0) / np.cosh(t) ** 2
        em = np.exp(-eta)
        arg = q + em
        if not np.all(arg > 0):
            return None
        F = _log_q(g.t_all, pair.sigma)
        F[g.inner] = np.log(arg)
        dF = -em / arg
        E = pair.energy_constant() - (g.h / (2 * np.pi)) * (float(np.sum(np.cosh(t) * F[g.inner]))
                                                           + g.outer_energy_sum(pair.sigma))
        r_eff = self.radius + self.alpha * E
        B = pair.B(t)
        res = eta - r_eff * np.cosh(t) - B + g.K @ F
        weights = pair.G_weights(g.t_all, g.h)
        G = pair.G_constant(r_eff) - complex(np.dot(weights, F))
        gq, other = pair.reduce(G)
        # size of the terms of G, for its rounding error
        scale = (abs(r_eff * cmath.cosh(_I3 + pair.zeta)) + float(np.sum(np.abs(weights * F)))
                 + abs(G.real) + abs(G.imag) + 10.0) / pair.norm
        return dict(pair=pair, F=F, dF=dF, E=E, r_eff=r_eff, res=res, g=gq, other=other,
                    weights=weights, scale=scale, B=B)

    def jacobian(self, eta, v, p):
        g = self.grid
        N = g.N
        t = g.t
        pair = p["pair"]
        dF = p["dF"]
        dE = -(g.h / (2 * np.pi)) * np.cosh(t) * dF  # dE / d eta_j
        J = np.empty((N + 1, N + 1))
        J[:N, :N] = g.K[:, g.inner] * dF[None, :]
        J[:N, :N][np.diag_indices(N)] += 1.0
        if self.alpha:
            J[:N, :N] -= self.alpha * np.outer(np.cosh(t), dE)
        dG = -p["weights"][g.inner] * dF + self.alpha * cmath.cosh(_I3 + pair.zeta) * dE
        J[N, :N] = (dG.real if pair.above else dG.imag) / pair.norm
        step = 1e-6 * max(1.0, abs(v))
        q = self.parts(eta, v + step)
        if q is None:
            step = -step
            q = self.parts(eta, v + step)
        J[:N, N] = (q["res"] - p["res"]) / step
        J[N, N] = (q["g"] - p["g"]) / step
        return J, (q["E"] - p["E"]) / step, dE


def _norm(p):
    return max(float(np.max(np.abs(p["res"]))), abs(p["g"]))


def _newton(eqs, eta, v, tol, maxiter=60):
    """Newton with backtracking on (eta, v). Returns (solution dict or None, message, iterations)."""
    p = eqs.parts(eta, v)
    if p is None:
        return None, "initial guess outside the domain of F", 0
    g = eqs.grid
    N = g.N
    e_last = np.zeros(N + 1)
    e_last[N] = 1.0
    last_change = math.inf
    for it in range(1, maxiter + 1):
        J, dE_dv, dE = eqs.jacobian(eta, v, p)
        lu = scipy.linalg.lu_factor(J, check_finite=False)
        step = scipy.linalg.lu_solve(lu, -np.concatenate([p["res"], [p["g"]]]), check_finite=False)
        change = abs(float(np.dot(dE, step[:N])) + dE_dv * step[N])
        # rounding of the energy: of its sum, and of G (amplified by 1 / sqrt|sigma|) through dE/dG
        sens = scipy.linalg.lu_solve(lu, e_last, check_finite=False)
        dE_dG = float(np.dot(dE, sens[:N])) + dE_dv * sens[N]
        rounding = (8 * _EPS * (float(np.sum(np.abs(g.h / (2 * np.pi) * np.cosh(g.t) * p["F"][g.inner])))
                                + 2 * abs(p["pair"].energy_constant()) + 2.0)
                    + 8 * _EPS * p["scale"] * abs(dE_dG))
        floor = 64 * _EPS * max(p["scale"], float(np.max(np.abs(p["B"]))) + 1.0)
        if (float(np.max(np.abs(step))) < 1e-7
                and change <= max(1e-2 * tol * max(abs(p["E"]), 1.0), rounding)):
            if abs(p["other"]) > 1e-6:
                return None, (f"the solution is not of the expected form (the part of G that "
                              f"vanishes by symmetry is {p['other']:.3g})"), it
            diag = np.abs(np.diag(lu[0]))
            return dict(grid=g, eta=eta, v=v, energy=p["E"], r_eff=p["r_eff"], pair=p["pair"],
                        iteration_error=change, iterations=it, residual=_norm(p), rounding=rounding,
                        jac_scale=float(np.min(diag) / np.max(diag)),
                        det_sign=float(np.prod(np.sign(np.diag(lu[0])))
                                       * (-1) ** int(np.sum(lu[1] != np.arange(lu[1].size))))), \
                "converged", it
        lam = 1.0
        while True:
            q = eqs.parts(eta + lam * step[:N], v + lam * step[N])
            if q is not None and (_norm(q) <= (1 - 0.25 * lam) * _norm(p) or _norm(q) <= floor):
                break
            lam *= 0.5
            if lam < 0.01:  # a failing start: give up soon, the caller takes a smaller step
                return None, "line search failed", it
        eta, v, p = eta + lam * step[:N], v + lam * step[N], q
        last_change = change
    return None, f"no convergence in {maxiter} Newton steps (last change {last_change:.3g})", maxiter


def radius_derivative(result):
    """Exact dE/dR (at fixed alpha) of a converged result of `solve_lee_yang_one_particle`.

    The linearised equations J dx/dR = -dF/dR at the final solution: dres/dR = -cosh t and
    dG/dR = cosh(i pi/3 + zeta) (reduced as the quantisation itself), E has no explicit R. The
    Jacobian's column in v is taken here by centred differences with Richardson extrapolation
    (truncation ~ s^4, s = 1e-3), not the one-sided difference Newton's steps use."""
    if not (isinstance(result, SolveResult) and result.converged and isinstance(result._state, dict)
            and "final" in result._state):
        raise ValueError("result: a converged Lee-Yang one-particle result is needed")
    sol = result._state["final"]
    g, N = sol["grid"], sol["grid"].N
    eqs = Equations(g, sol["radius"], sol["alpha"])
    eta, v = sol["eta"], sol["v"]
    p = eqs.parts(eta, v)
    J, _, dE = eqs.jacobian(eta, v, p)
    step = 1e-3 * max(1.0, abs(v))

    def centred(h):
        a, b = eqs.parts(eta, v + h), eqs.parts(eta, v - h)
        if a is None or b is None:
            raise ValueError("result: the v-derivative leaves the equations' domain")
        return ((a["res"] - b["res"]) / (2 * h), (a["g"] - b["g"]) / (2 * h),
                (a["E"] - b["E"]) / (2 * h))

    d1, d2 = centred(step), centred(2 * step)
    col, dg, dE_dv = ((4 * x - y) / 3 for x, y in zip(d1, d2))
    J[:N, N], J[N, N] = col, dg
    c = cmath.cosh(_I3 + p["pair"].zeta)
    pair = p["pair"]
    rhs = np.concatenate([np.cosh(g.t), [-((c.real if pair.above else c.imag) / pair.norm)]])
    dx = np.linalg.solve(J, rhs)
    return float(np.dot(dE, dx[:N]) + dE_dv * dx[N])


def _seed_values(seed, grid):
    """eta on ``grid`` from a solved seed: its smooth part eta - R_eff cosh t - B, interpolated."""
    old = seed["grid"]
    smooth = seed["eta"] - seed["r_eff"] * np.cosh(old.t) - seed["pair"].B(old.t)
    if old == grid:
        return smooth
    spline = CubicSpline(old.t, smooth)
    return spline(np.clip(grid.t, old.t[0], old.t[-1]))


def _solve(radius, alpha, tol, level, seed):
    """One grid: from ``seed`` (a solution nearby) or, with seed None, from the large-R form."""
    if seed is None:
        tau = math.sqrt(3) * math.exp(-radius * math.sqrt(3) / 2)  # y - pi/6 (the mu-term)
        v = -math.log(math.sin(tau) * math.sin(math.pi / 3 - tau))
        pair, r_eff, smooth = Pair(v), radius, None
    else:
        v, pair = seed["v"], seed["pair"]
        r_eff = radius + alpha * seed["energy"]
    if not (r_eff > 0):
        return None, f"the effective radius R + alpha E = {r_eff:.6g} is not positive", 0
    grid = _grid(pair, r_eff, tol, level)
    if grid.N > 2500:
        return None, f"grid of {grid.N} points: beyond the dense solver of this state", 0
    smooth = 0.0 if seed is None else _seed_values(seed, grid)
    eta = r_eff * np.cosh(grid.t) + pair.B(grid.t) + smooth
    return _newton(Equations(grid, radius, alpha), eta, v, tol)


def _fold_ahead(history):
    """Where the continuation parameter reaches a fold, extrapolated from the last two points:
    near a fold the smallest pivot ratio of the Jacobian vanishes like sqrt(p_c - p)."""
    (p1, s1), (p2, s2) = history[-2], history[-1]
    slope = (s2 * s2 - s1 * s1) / (p2 - p1)
    return p2 - s2 * s2 / slope if slope < 0 else math.inf


def _follow(alpha_target, radius_target, tol, seed, parameter, min_step=1e-9):
    """Continue ``seed`` in log R (at its alpha) or in the coupling scale lambda (at its R) on
    level-0 grids, giving up when the step falls below ``min_step``; in lambda, also as soon
    as a failed step reached past a fold that clearly lies before lambda = 1 (the verdict is
    then no real solution). Returns (solution or None, message, iterations)."""
    from tba.solvers.excited import _stalled

    its_total = 0
    if parameter == "radius":
        now, target = math.log(seed["radius"]), math.log(radius_target)
        step = (target - now) / 4
    else:
        now, target, step = 0.0, 1.0, 0.25
    history = [(now, seed["jac_scale"])]
    while now != target:
        trial = target if abs(target - now) <= abs(step) else now + step
        R = math.exp(trial) if parameter == "radius" else seed["radius"]
        alpha = seed["alpha"] if parameter == "radius" else trial * alpha_target
        new, msg, its = _solve(R, alpha, tol, 0, seed)
        its_total += its
        if new is not None and new["det_sign"] != seed["det_sign"]:
            new, msg = None, "the solution left the branch (det J changed sign)"
        if new is not None:
            new.update(radius=R, alpha=alpha)
            seed, now = new, trial
            history.append((now, new["jac_scale"]))
            step *= 1.5
            continue
        step *= 0.5
        if parameter == "coupling" and len(history) >= 3:
            p_c = _fold_ahead(history)
            if p_c <= trial and p_c < target and p_c - now < 0.05 * (target - p_c):
                return None, _stalled("coupling", history, target, now, msg), its_total
        if abs(step) < min_step:
            if parameter == "radius":
                return None, f"continuation in R stalled at {math.exp(now):.12g}: {msg}", its_total
            return None, _stalled("coupling", history, target, now, msg), its_total
    return seed, "converged", its_total


def solve_lee_yang_one_particle(radius, deformation=None, *, tol=1e-12, start=None):
    """E_1(R) of the Lee-Yang zero-momentum one-particle state, at any R > 0 (see the module
    doc), with the TTbar CDD factor if given. With ``start`` a converged result of this
    function at the same alpha (the previous point of a scan), its level is refined at R
    directly, unless a grid's solution changes the sign of det J. Otherwise the state is
    followed in R (from ``start``, or undeformed from R = 12), the coupling is then switched on
    at fixed R, and the point is solved on two grids for the error estimate.
    Status NO_REAL_SOLUTION when the level meets its branch point before the requested
    coupling (alpha < 0). Returns a SolveResult with state (0,) and no particle rapidities."""
    from tba.solvers.ground import _validate, require_deformation, require_start

    radius, tol = _validate(radius, tol)
    deformation = require_deformation(deformation)
    require_start(start)
    base = dict(model="lee-yang", radius=radius, couplings=dict(deformation.couplings),
                coupling=None, state=(Fraction(0),))
    if not deformation.is_zero and not deformation.is_ttbar:
        raise ValueError("deformation: the Lee-Yang one-particle state takes the TTbar CDD "
                         "factor (spin 1) only")
    alpha = deformation.alpha if not deformation.is_zero else 0.0
    iterations = 0
    prev = start._state if (isinstance(start, SolveResult) and start.converged
                            and start.model == "lee-yang" and tuple(start.state) == (0,)) else None
    seed = None
    if prev is not None and prev["final"]["alpha"] == alpha and prev["final"]["radius"] != radius:
        # along a scan: the previous point's level refined at this R directly (two grid solves),
        # kept unless a grid's solution leaves its branch (det J changes sign)
        direct = _two_grids(base, radius, alpha, tol, prev["final"], prev["undeformed"],
                            iterations, det_sign=prev["final"]["det_sign"])
        if direct.converged:
            return direct
        iterations = direct.iterations
    if prev is not None and prev["final"]["alpha"] == alpha:
        # a fold on the way ends this quickly: the path below then gives the verdict
        seed, msg, its = _follow(alpha, radius, tol, prev["final"], "radius",
                                 min_step=1e-3 if alpha else 1e-9)
        iterations += its
    undeformed = None
    if seed is None:
        # the undeformed level at R: from the large-R form, continued in R
        undeformed = prev["undeformed"] if prev is not None else None
        if undeformed is None:
            R0 = max(radius, START_RADIUS)
            undeformed, msg, its = _solve(R0, 0.0, tol, 0, None)
            iterations += its
            if undeformed is None:
                return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                                   message=f"start at R = {R0:g}: {msg}")
            undeformed.update(radius=R0, alpha=0.0)
        undeformed, msg, its = _follow(0.0, radius, tol, undeformed, "radius")
        iterations += its
        if undeformed is None:
            return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations, message=msg)
        seed = undeformed
        if alpha:
            seed, msg, its = _follow(alpha, radius, tol, seed, "coupling")
            iterations += its
            if seed is None:
                status = Status.NO_REAL_SOLUTION if msg.startswith("no real") else Status.NOT_CONVERGED
                return SolveResult(**base, status=status, iterations=iterations, message=msg)
    elif prev is not None:
        undeformed = prev["undeformed"]
    return _two_grids(base, radius, alpha, tol, seed, undeformed, iterations)


def _two_grids(base, radius, alpha, tol, seed, undeformed, iterations, det_sign=None):
    """The point on grids of increasing resolution from ``seed`` until two agree within tol (a
    SolveResult; with ``det_sign``, not-converged as soon as a grid's solution has another sign
    of det J: it left the seed's branch)."""
    levels = []
    error = math.nan
    for level in (0, 1, 2, 3):
        new, msg, its = _solve(radius, alpha, tol, level, seed)
        iterations += its
        if new is not None and det_sign is not None and new["det_sign"] != det_sign:
            new, msg = None, "the solution left the branch (det J changed sign)"
        if new is None:
            return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                               message=f"refinement level {level}: {msg}")
        new.update(radius=radius, alpha=alpha)
        levels.append(new)
        seed = new
        if len(levels) >= 2:
            fine, coarse = levels[-1], levels[-2]
            error = (abs(fine["energy"] - coarse["energy"]) + fine["iteration_error"]
                     + coarse["iteration_error"] + fine["rounding"])
            if error <= tol * max(abs(fine["energy"]), 1.0):
                grid = fine["grid"]
                eps = np.log(np.abs(1.0 + (fine["pair"].sigma - 1.0) / np.cosh(grid.t) ** 2)) + fine["eta"]
                return SolveResult(**base, status=Status.CONVERGED, energy=fine["energy"],
                                   error=error, momentum=0.0, iterations=iterations,
                                   residual=fine["residual"], effective_radius=fine["r_eff"],
                                   message=f"converged; {fine['pair'].describe()}",
                                   grid=grid, rapidity_grid=grid.t, pseudo_energies=eps[None, :],
                                   _state={"final": fine, "undeformed": undeformed})
    return SolveResult(**base, status=Status.NOT_CONVERGED, iterations=iterations,
                       message=f"error estimate {error:.3g} above the tolerance after 4 levels")
