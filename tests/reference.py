"""Outside references for the TBA tests, computed without the ``tba`` solver.

Every helper names its source in its docstring. Nothing here imports ``tba``: the
helpers take plain numbers (masses, block multiplicities, kernel callables), so that a
bug in the package cannot leak into its own reference values.
"""

import math

import mpmath
import numpy as np
import scipy.linalg
from scipy.optimize import brentq
from scipy.special import expit, k0, k1

__all__ = [
    "free_fermion_ns_energy", "free_fermion_ns_energy_derivative", "free_fermion_ns_terms",
    "deformed_free_fermion_energy", "deformed_free_fermion_branch",
    "plateau_matrix", "plateau_solution", "rogers_dilog", "c_eff_dilogarithm",
    "leading_order_energy", "second_order_energy", "dense_tba_energy",
]


def free_fermion_ns_terms(radius, mass=1.0):
    """Number of terms used for the Bessel series at ``radius``: about 60/(m R) + 50.

    The series is alternating, (-1)^(k+1) K_1(k m R)/k, and for every k its terms decrease
    in modulus (K_1 is decreasing, so is 1/k). The truncation error is then at most the
    first omitted term (Leibniz), K_1(K m R)/(pi K) < e^{-60} times a power: far below
    double precision at every radius. (Common practice, no source.)
    """
    return int(60.0 / (mass * radius)) + 50


def free_fermion_ns_energy(radius, mass=1.0):
    """Free Majorana fermion ground state in the NS (antiperiodic) sector, bulk term excluded:

        E_NS(R) = -(m/pi) sum_{k>=1} (-1)^(k+1) K_1(k m R) / k

    Source: textbook, e.g.
    G. Mussardo, Statistical Field Theory (Oxford 2010), from memory. It is the expansion
    of log(1 + e^{-mR cosh t}) in powers of e^{-mR cosh t} integrated term by term with
    int cosh t e^{-x cosh t} dt = 2 K_1(x). K_1 is ``scipy.special.k1``; the terms are
    summed with ``math.fsum`` (exactly rounded sum of the float terms).
    """
    mR = mass * radius
    k = np.arange(1, free_fermion_ns_terms(radius, mass) + 1, dtype=float)
    terms = (-1.0) ** (k + 1) * k1(k * mR) / k
    return -(mass / math.pi) * math.fsum(terms.tolist())


def free_fermion_ns_energy_derivative(radius, mass=1.0):
    """dE_NS/dR from the same series, with K_1'(x) = -K_0(x) - K_1(x)/x.

    Source: the series of ``free_fermion_ns_energy``; the Bessel identity is standard
    (Abramowitz & Stegun 9.6.26, from memory). Used to locate the branch point of the
    TTbar-deformed free fermion: 1 - alpha E'(R') = 0 (docs/physics.md section 4).
    """
    mR = mass * radius
    k = np.arange(1, free_fermion_ns_terms(radius, mass) + 1, dtype=float)
    x = k * mR
    dk1 = -k0(x) - k1(x) / x
    # d/dR K_1(k m R) / k = m K_1'(k m R)
    terms = (-1.0) ** (k + 1) * dk1
    return -(mass * mass / math.pi) * math.fsum(terms.tolist())


def deformed_free_fermion_branch(alpha, mass=1.0):
    """Branch point of the TTbar-deformed free-fermion ground state, alpha > 0.

    Returns (R'_*, R_c) with E_NS'(R'_*) = 1/alpha and R_c = R'_* - alpha E_NS(R'_*)
    (docs/physics.md section 4: dR/dR' = 1 - alpha E'(R') vanishes there). E_NS' decreases
    monotonically from +inf (R -> 0) to 0, so the root is unique; found with
    ``scipy.optimize.brentq``.
    """
    if alpha <= 0:
        raise ValueError("the ground state has a branch point only for alpha > 0")
    f = lambda r: free_fermion_ns_energy_derivative(r, mass) - 1.0 / alpha
    lo, hi = 1e-3, 1.0
    while f(hi) > 0:
        hi *= 2
    while f(lo) < 0:
        lo /= 2
    r_star = brentq(f, lo, hi, xtol=1e-15, rtol=1e-15, maxiter=500)
    return r_star, r_star - alpha * free_fermion_ns_energy(r_star, mass)


def deformed_free_fermion_energy(radius, alpha, mass=1.0):
    """Ground state of the TTbar-deformed free fermion from the flow relation, or None.

    Solves E = E_NS(R + alpha E) (docs/physics.md section 4: E_0(R, alpha) = E_0(R + alpha E_0, 0),
    Smirnov & Zamolodchikov 2017, Cavaglia et al. 2016, from memory) on the branch connected
    to alpha = 0, as an equation for R' = R + alpha E: g(R') = R' - alpha E_NS(R') - R = 0,
    solved with ``scipy.optimize.brentq``; then E = E_NS(R') (no cancellation in R' - R).
    alpha < 0: g increases, bracket [R, R + alpha E_NS(R)]. alpha > 0: g increases on
    [R'_*, R] (R'_* the branch point); no real solution when g(R'_*) > 0, returns None.
    """
    g = lambda r: r - alpha * free_fermion_ns_energy(r, mass) - radius
    if alpha == 0:
        return free_fermion_ns_energy(radius, mass)
    if alpha < 0:
        lo, hi = radius, radius + alpha * free_fermion_ns_energy(radius, mass)
    else:
        lo, hi = deformed_free_fermion_branch(alpha, mass)[0], radius
        if g(lo) > 0:
            return None
    if g(hi) == 0:
        return free_fermion_ns_energy(hi, mass)
    r_prime = brentq(g, lo, hi, xtol=1e-300, rtol=1e-15, maxiter=500)
    return free_fermion_ns_energy(r_prime, mass)


# --------------------------------------------------------------------------------------
# UV: constant (plateau) TBA and the Rogers dilogarithm
# --------------------------------------------------------------------------------------

def plateau_matrix(blocks):
    """N_ab = -(1/2pi) int phi_ab(t) dt from block content ``blocks[a][b] = {x: mult}``.

    Derivation (here): in the plateau region eps_a is t-independent, and
    eps_a = nu_a - (1/2pi) sum_b int phi_ab(t - t') L_b dt' with nu_a negligible gives
    eps_a = sum_b N_ab L_b. Every block has int phi_x dt = -2pi (docs/physics.md section 1),
    so each f_x with multiplicity n contributes +n to N_ab.
    """
    n = len(blocks)
    return np.array([[sum(int(m) for m in dict(blocks[a][b]).values()) for b in range(n)]
                     for a in range(n)], dtype=int)


def plateau_solution(N_ab, dps=40):
    """Solve y_a = prod_b (1 + 1/y_b)^{N_ab} (the plateau equations) with mpmath.

    In logarithms, eps_a = sum_b N_ab log(1 + e^{-eps_b}), y_a = e^{eps_a}. Damped
    fixed-point iteration in mpmath to a starting point, then ``mpmath.findroot``
    (Newton) to ``dps`` digits. Source: Al.B. Zamolodchikov, Nucl. Phys. B342 (1990) 695
    (from memory), as summarised in docs/physics.md section 3.
    """
    N_ab = np.asarray(N_ab, dtype=int)
    n = len(N_ab)
    with mpmath.workdps(dps + 10):
        eps = [mpmath.mpf(0)] * n
        for _ in range(200):
            L = [mpmath.log1p(mpmath.exp(-e)) for e in eps]
            new = [mpmath.fsum(int(N_ab[a, b]) * L[b] for b in range(n)) for a in range(n)]
            eps = [(e + f) / 2 for e, f in zip(eps, new)]

        def equations(*e):
            return [e[a] - mpmath.fsum(int(N_ab[a, b]) * mpmath.log1p(mpmath.exp(-e[b]))
                                       for b in range(n)) for a in range(n)]

        root = mpmath.findroot(equations, eps, tol=mpmath.mpf(10) ** (-2 * dps))
        root = [root[a] for a in range(n)] if isinstance(root, mpmath.matrix) else [root]
        residual = max(abs(v) for v in equations(*root))
        if residual > mpmath.mpf(10) ** (-dps):
            raise ArithmeticError(f"plateau equations not solved (residual {residual})")
        return [mpmath.exp(e) for e in root]


def rogers_dilog(x):
    """Rogers dilogarithm L(x) = Li_2(x) + (1/2) log(x) log(1 - x), 0 < x < 1.

    Source: standard definition (e.g. A.N. Kirillov, Prog. Theor. Phys. Suppl. 118 (1995) 61,
    from memory), normalised so that L(1) = pi^2/6; Li_2 is ``mpmath.polylog(2, x)``.
    """
    x = mpmath.mpf(x)
    return mpmath.polylog(2, x) + mpmath.log(x) * mpmath.log(1 - x) / 2


def c_eff_dilogarithm(blocks, dps=40):
    """c_eff = (6/pi^2) sum_a L(1/(1 + y_a)) from the plateau solution of ``blocks``.

    Source: docs/physics.md section 3 (Zamolodchikov 1990, Klassen & Melzer 1990, from memory).
    Returns an mpmath number.
    """
    with mpmath.workdps(dps + 10):
        ys = plateau_solution(plateau_matrix(blocks), dps)
        total = mpmath.fsum(rogers_dilog(1 / (1 + y)) for y in ys)
        return 6 * total / mpmath.pi ** 2


# --------------------------------------------------------------------------------------
# IR: iterating the TBA around the driving term
# --------------------------------------------------------------------------------------

def leading_order_energy(masses, radius):
    """E_LO = -sum_a (m_a/pi) K_1(m_a R): first iteration of the TBA, first Bessel term.

    Source: docs/physics.md section 3 ("common practice").
    """
    m = np.asarray(masses, dtype=float)
    return float(-np.sum(m * k1(m * radius)) / math.pi)


def second_order_energy(masses, kernel, radius, h=0.01, x_max=50.0):
    """E through O(e^{-2 m_1 R}): the Bessel k = 1, 2 terms plus one kernel iteration.

    Derivation (here; common practice, no source): with nu_a = m_a R cosh t,
    eps_a = nu_a + delta_a, delta_a = -(1/2pi) sum_b phi_ab * L_b, and
    L(eps) = L(nu) - delta e^{-nu} / (1 + e^{-nu}) + O(delta^2), so to this order

        E = -sum_a (m_a/pi) [K_1(m_a R) - K_1(2 m_a R)/2]
            - (1/(2pi)^2) sum_ab m_a int int cosh t e^{-m_a R cosh t} phi_ab(t - t') e^{-m_b R cosh t'} dt dt'

    (the k = 2 Bessel term comes from the e^{-2 nu}/2 term of log(1 + e^{-nu})). The
    neglected terms are O(e^{-3 m_1 R}) (every one carries at least three Boltzmann
    factors: K_1(k m R) with k >= 3, delta^2 e^{-nu}, delta e^{-2 nu}, and the e^{-2 nu}
    part of L_b inside delta). Note the minus sign in front of the kernel term: a negative
    (attractive, e.g. Lee-Yang) kernel raises the energy.

    ``kernel(t)`` returns phi_ab(t) of shape (n, n) + t.shape. The double integral uses
    the trapezoid rule on a uniform grid of spacing ``h`` that covers m_1 R (cosh t - 1) <=
    ``x_max``: the integrands are analytic in a strip, so the rule converges exponentially
    (common practice); ``h`` must be small against the kernel's pole distance.
    """
    m = np.asarray(masses, dtype=float)
    n = m.size
    lam = math.acosh(1.0 + x_max / (m.min() * radius))
    t = np.arange(-math.ceil(lam / h), math.ceil(lam / h) + 1) * h
    N = t.size
    boltz = np.exp(-np.outer(m, np.cosh(t)) * radius)           # (n, N)
    offsets = h * np.arange(-(N - 1), N)
    kern = np.asarray(kernel(offsets), dtype=float).reshape((n, n, 2 * N - 1))
    # inner[a, i] = h sum_b sum_j phi_ab(t_i - t_j) e^{-nu_b(t_j)}  (plain discrete convolution)
    inner = np.zeros((n, N))
    for a in range(n):
        for b in range(n):
            inner[a] += h * np.convolve(kern[a, b], boltz[b])[N - 1:2 * N - 1]
    double = float(np.sum(m[:, None] * np.cosh(t)[None, :] * boltz * inner) * h)
    bessel = -float(np.sum(m * (k1(m * radius) - k1(2 * m * radius) / 2))) / math.pi
    return bessel - double / (2 * math.pi) ** 2


# --------------------------------------------------------------------------------------
# a plain dense solve of the ground-state TBA
# --------------------------------------------------------------------------------------

def dense_tba_energy(masses, kernel, radius, h, x_max=50.0):
    """E_0 from a deliberately plain discretisation of the ground-state TBA (docs/physics.md section 1).

    Uniform grid t_k = k h covering m_1 R (cosh t - 1) <= ``x_max``, full dense matrix
    (h/2pi) phi_ab(t_i - t_j), Newton's method with numpy.linalg.solve from eps = nu until
    the step is at rounding level, E = -sum_a (m_a/2pi) sum_k h cosh t_k L_a(t_k). The
    trapezoid rule converges like exp(-2 pi d / h) with d the distance of the nearest
    singularity (common practice, no source); callers pick ``h`` well below d / 5.
    """
    m = np.asarray(masses, dtype=float)
    n = m.size
    lam = math.acosh(1.0 + x_max / (m.min() * radius))
    t = np.arange(-math.ceil(lam / h), math.ceil(lam / h) + 1) * h
    N = t.size
    phi = np.asarray(kernel(t[:, None] - t[None, :]), dtype=float).reshape(n, n, N, N)
    K = (h / (2 * math.pi)) * phi.transpose(0, 2, 1, 3).reshape(n * N, n * N)
    nu = radius * np.outer(m, np.cosh(t)).reshape(-1)
    eps = nu.copy()
    for _ in range(100):
        L = np.logaddexp(0.0, -eps)
        dL = -0.5 * (1.0 - np.tanh(eps / 2))  # -1/(1 + e^eps), overflow-free
        F = eps - nu + K @ L
        step = np.linalg.solve(np.eye(n * N) + K * dL[None, :], -F)
        eps = eps + step
        # at rounding level, entry by entry (eps can be large where L is negligible)
        if np.max(np.abs(step) / np.maximum(1.0, np.abs(eps))) <= 1e-14:
            break
    else:
        raise ArithmeticError("dense TBA Newton did not converge")
    L = np.logaddexp(0.0, -eps).reshape(n, N)
    return -float(np.sum(m[:, None] * np.cosh(t)[None, :] * L)) * h / (2 * math.pi)


# --------------------------------------------------------------------------------------
# complex radius: the other roots of R' = R + alpha E_0(R') (flow tests)
# --------------------------------------------------------------------------------------

def free_fermion_ns_energy_complex(radius, mass=1.0):
    """(E_NS(z), dE_NS/dz) for complex z with Re z > 0: the Bessel series continued.

    E_NS(z) = -(m/pi) sum_k (-1)^(k+1) K_1(k m z) / k, dE/dz = -(m^2/pi) sum_k (-1)^(k+1) K_1'(k m z).
    Source: docs/physics.md section 2 (textbook, Mussardo 2010, from memory). Each term is analytic
    in Re z > 0 and decays like e^{-k m Re z}, so the series is the analytic continuation of the
    real one; ``scipy.special.kv`` and ``kvp`` accept complex arguments. About 60/(m Re z) + 50
    terms: the tail is below e^{-60} (common practice, no source).
    """
    from scipy.special import kv, kvp
    z = complex(radius) * mass
    if not z.real > 0:
        raise ValueError("the series needs Re z > 0")
    k = np.arange(1, int(60.0 / z.real) + 51, dtype=float)
    sign = (-1.0) ** (k + 1)
    E = -(mass / math.pi) * np.sum(sign * kv(1, k * z) / k)
    dE = -(mass * mass / math.pi) * np.sum(sign * kvp(1, k * z, 1))
    return complex(E), complex(dE)


def _complex_log1p(x):
    """log(1 + x), principal branch, accurate for tiny complex x (numpy's complex log1p
    drops the real part when |x| is below about 1e-16: np.log1p(1e-20 + 1e-20j) = 1e-20j).
    Below |x| = 1e-3 the Taylor series to x^6 (remainder < 2e-19 |x|) is used."""
    x = np.asarray(x, dtype=complex)
    small = np.abs(x) < 1e-3
    series = x * (1 - x * (1 / 2 - x * (1 / 3 - x * (1 / 4 - x * (1 / 5 - x / 6)))))
    return np.where(small, series, np.log(1 + np.where(small, 0, x)))


def _lu_solve(A, b):
    """A^{-1} b by scipy's LU (numpy.linalg.solve is ~100 times slower for complex systems
    of this size with the OpenBLAS build here: measured 160 ms against 1 ms at n = 127)."""
    return scipy.linalg.lu_solve(scipy.linalg.lu_factor(A, check_finite=False), b, check_finite=False)


def dense_tba_complex(masses, kernel, radius, h, x_max=50.0):
    """(E_0(R), dE_0/dR) of the undeformed ground-state TBA at a complex radius R.

    The plain dense discretisation of ``dense_tba_energy`` with complex pseudo-energies:
    F = eps - R m cosh t + K L(eps) with K = (h/2pi) phi(t_i - t_j), L = log(1 + e^{-eps})
    on the principal branch (|e^{-eps}| stays away from the cut for the radii used here),
    complex Newton from eps = nu. The derivative solves the linearised equations
    (1 + K diag(L')) de/dR = m cosh t, L' = -1/(1 + e^{eps}), and dE/dR = -(1/2pi) sum m cosh t L' de h:
    the complex derivative, since every step is holomorphic in R. Derivation here
    (docs/physics.md section 1 equations continued to complex R; common practice, no source).
    The grid covers m_1 Re(R) (cosh t - 1) <= ``x_max``.
    """
    m = np.asarray(masses, dtype=float)
    n = m.size
    R = complex(radius)
    lam = math.acosh(1.0 + x_max / (m.min() * R.real))
    t = np.arange(-math.ceil(lam / h), math.ceil(lam / h) + 1) * h
    N = t.size
    phi = np.asarray(kernel(t[:, None] - t[None, :]), dtype=float).reshape(n, n, N, N)
    K = (h / (2 * math.pi)) * phi.transpose(0, 2, 1, 3).reshape(n * N, n * N)
    drive = np.outer(m, np.cosh(t)).reshape(-1)
    eps = R * drive
    for _ in range(100):
        x = np.exp(-eps)
        L = _complex_log1p(x)
        dL = -x / (1 + x)
        F = eps - R * drive + K @ L
        step = _lu_solve(np.eye(n * N) + K * dL[None, :], -F)
        eps = eps + step
        if np.max(np.abs(step)) <= 1e-14 * max(1.0, float(np.max(np.abs(eps[np.abs(eps) < 50])))):
            break
    else:
        raise ArithmeticError("complex dense TBA Newton did not converge")
    x = np.exp(-eps)
    L = _complex_log1p(x)
    dL = -x / (1 + x)
    de = _lu_solve(np.eye(n * N) + K * dL[None, :], drive.astype(complex))
    w = -(h / (2 * math.pi)) * drive
    return complex(np.sum(w * L)), complex(np.sum(w * dL * de))


def flow_root(energy_and_derivative, radius, alpha, guess, tol=1e-14, maxiter=60):
    """A root R' of R' - alpha E_0(R') = R (complex Newton from ``guess``); returns (R', E_0(R')).

    ``energy_and_derivative(z)`` returns (E_0(z), dE_0/dz). Stops when the Newton step is below
    ``tol |R'|`` (near the fold 1 - alpha E_0' is small, so rounding alone makes steps of a few
    1e-16 |R'|: 1e-14 leaves room for that). docs/physics.md section 4: every
    solution of the deformed ground-state equations at radius R has the effective radius
    R' = R + alpha E and energy E_0(R'); the physical one is the root continuously connected to
    R' = R, the others are the second branch (real) and, past R_c, a complex-conjugate pair.
    """
    z = complex(guess)
    for _ in range(maxiter):
        E, dE = energy_and_derivative(z)
        step = (z - alpha * E - radius) / (1 - alpha * dE)
        z -= step
        if abs(step) <= tol * abs(z):
            return z, energy_and_derivative(z)[0]
    raise ArithmeticError(f"flow_root: no convergence from {guess}")


__all__ += ["free_fermion_ns_energy_complex", "dense_tba_complex", "flow_root"]


# --------------------------------------------------------------------------------------
# the bootstrap, and a dense solve with higher-spin charges
# --------------------------------------------------------------------------------------

def bound_states(masses, s_matrix, pole_orders, tol=1e-9):
    """Every simple pole with positive residue, read as a bound state, checked by the bootstrap.

    For a unitary theory a simple pole of S_ab(t) at t = i u (0 < u < pi) with -i Res > 0 is
    a bound state c, m_c^2 = m_a^2 + m_b^2 + 2 m_a m_b cos u, and for every d
    S_cd(t) = S_ad(t + i alpha) S_bd(t - i beta), alpha + beta = u, m_a sin alpha = m_b sin beta
    (A.B. Zamolodchikov, Int. J. Mod. Phys. A4 (1989) 4235; Braden, Corrigan, Dorey and Sasaki,
    Nucl. Phys. B338 (1990) 689). ``s_matrix(t)`` returns S_ab(t), shape (n, n) + t.shape, for
    complex t; ``pole_orders[a][b]`` maps y to the order of the pole at t = i pi y. The residue
    sign is read from -i delta S(i u + delta), delta = 1e-7. Returns (fusions, unmatched):
    (a, b, c, alpha, beta) for poles with a c that passes the bootstrap at two rapidities, and
    (a, b, y) for those without one.
    """
    m = np.asarray(masses, dtype=float)
    n = m.size
    t = np.array([0.37, -0.81 + 0.02j])
    S_t = s_matrix(t)
    fusions, unmatched = [], []
    for a in range(n):
        for b in range(n):
            for y, order in pole_orders[a][b].items():
                u = math.pi * float(y)
                if order != 1 or (-1j * 1e-7 * s_matrix(np.array(1j * u + 1e-7))[a, b]).real <= 0:
                    continue
                mc = math.sqrt(m[a] ** 2 + m[b] ** 2 + 2 * m[a] * m[b] * math.cos(u))
                alpha = math.atan2(m[b] * math.sin(u), m[a] + m[b] * math.cos(u))
                fused = s_matrix(t + 1j * alpha)[a] * s_matrix(t - 1j * (u - alpha))[b]
                found = [c for c in range(n)
                         if abs(m[c] - mc) < tol and np.max(np.abs(S_t[c] - fused)) < tol]
                if found:
                    fusions += [(a, b, c, alpha, u - alpha) for c in found]
                else:
                    unmatched.append((a, b, y))
    return fusions, unmatched


def dense_spin_response(masses, kernel, charges, spin, radius, h, x_max=50.0):
    """(E_0, E_s, dE_0/dalpha_s at alpha_s = 0) from a plain dense solve of the ground-state TBA.

    The grid, kernel matrix and Newton iteration of ``dense_tba_energy`` (from a damped
    fixed-point start); then
    E_s = -(1/2pi) sum_a q^a int cosh(s t) L_a dt and the linearised equations
    (1 + K diag(L')) deps = -dF with dF_a(t) = (s/2pi) q^a int cosh(s(t - t')) sum_b q^b L_b(t') dt'
    = -s E_s q^a cosh(s t) (the sinh(st) sinh(st') half integrates to zero against the even L),
    dE/dalpha_s = -(1/2pi) sum_a m_a int cosh t L'_a deps_a dt. Derivation here (the spin-s
    kernel alpha_s s q^a q^b cosh(s(t - t')) of the README's conventions differentiated at 0; common
    practice, no source). A few dense LUs of size n N.
    """
    m = np.asarray(masses, dtype=float)
    q = np.asarray(charges, dtype=float)
    n = m.size
    lam = math.acosh(1.0 + x_max / (m.min() * radius))
    t = np.arange(-math.ceil(lam / h), math.ceil(lam / h) + 1) * h
    N = t.size
    phi = np.asarray(kernel(t[:, None] - t[None, :]), dtype=float).reshape(n, n, N, N)
    K = (h / (2 * math.pi)) * phi.transpose(0, 2, 1, 3).reshape(n * N, n * N)
    nu = radius * np.outer(m, np.cosh(t)).reshape(-1)
    eps = nu.copy()
    for _ in range(500):  # damped fixed point to a good start, then Newton (an LU per step)
        new = nu - K @ np.logaddexp(0.0, -eps)
        change = float(np.max(np.abs(new - eps)))
        eps = 0.5 * (eps + new)
        if change <= 1e-6:
            break
    for _ in range(20):
        dL = -expit(-eps)  # -1/(1 + e^eps), accurate also where e^-eps is tiny
        step = _lu_solve(np.eye(n * N) + K * dL[None, :], -(eps - nu + K @ np.logaddexp(0.0, -eps)))
        eps = eps + step
        if np.max(np.abs(step) / np.maximum(1.0, np.abs(eps))) <= 1e-14:
            break
    else:
        raise ArithmeticError("dense TBA Newton did not converge")
    L = np.logaddexp(0.0, -eps)
    dL = -expit(-eps)  # (1 - tanh(eps/2))/2 would lose e^-eps at large t, where cosh(st) is large
    w = np.outer(q, np.cosh(spin * t)).reshape(-1)
    E_s = -(h / (2 * math.pi)) * float(w @ L)
    deps = _lu_solve(np.eye(n * N) + K * dL[None, :], spin * E_s * w)
    wE = -(h / (2 * math.pi)) * nu / radius
    return float(wE @ L), E_s, float(wE @ (dL * deps))


__all__ += ["bound_states", "dense_spin_response"]
