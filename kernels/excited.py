"""Newton's method for the excited-state equations with real rapidities, compiled.

The unknowns are the pseudo-energy eps on the grid (N values) and the rapidities t_k (Np):

    F_i = eps_i - nu_i - sum_j D(t_i - t_j) + (K L)_i + sum_r c_r (V_r . L) U_r,i
    Q_k = m R sinh t_k + sum_{j != k} delta(t_k - t_j) - (1/2pi) int psi(t_k - t') L(t') dt'
          - 2 pi I_k

with L = log(1 + sigma e^{-eps}). The scattering functions are those of a single-species
model given by full blocks f_x (parameters s = sin(pi x), multiplicities k) times the spin
CDD factors (spins, coefficients, signs (-1)^((s-1)/2)):

    D     = sum k log((cosh u - s)/(cosh u + s)) + sum a sign cosh(s u)
    psi   = D'        delta = sum -2 k arctan(sinh u / s) + sum a sinh(s u)
    delta' = phi      (the kernel: sum -2 k s sech u / (tanh^2 u + s^2 sech^2 u) + ...)

Poles of psi closer to the real axis than the caller's threshold (their distances ``na``,
multiplicities ``nk`` and their blocks' ``ns`` = sin(pi x)) are taken out of the trapezoid
rule and integrated exactly against the sinc interpolant of L; a Newton step then moves the
sharp sources with the rapidities.

Every formula, the stopping rule, the line search and the error terms are those of the numpy
iteration in tba.solvers.excited (`_newton_python`, `ExcitedEquations`, `NearPoles`), which
documents them and is the reference this one is tested against; the Jacobian is factored by
LAPACK (`kernels.lapack`), the same routine scipy calls.
"""

import math

import numba
import numpy as np

from kernels.lapack import PIVOT_TYPE, lu_factor, lu_solve, pivot_summary

#: status codes of `newton`
CONVERGED, OUTSIDE_DOMAIN, SINGULAR, LINE_SEARCH_FAILED, MAX_ITERATIONS = 0, 1, 2, 3, 4

_EPS = np.finfo(np.float64).eps
_JIT = dict(cache=True, nogil=True, error_model="numpy")


@numba.njit(**_JIT)
def _clip(u):
    if u > 700.0:
        return 700.0
    if u < -700.0:
        return -700.0
    return u


@numba.njit(**_JIT)
def _finite(x):
    return x if math.isfinite(x) else 0.0


# -- the scattering functions at one rapidity difference --------------------------------------

@numba.njit(**_JIT)
def _source(bs, bk, cs, ca, csg, u):
    """D at clip(u): sum k log((cosh u - s)/(cosh u + s)) + sum a sign cosh(s u)."""
    u = _clip(u)
    b = 0.0
    if bs.size:
        ch = math.cosh(u)
        for i in range(bs.size):
            b += bk[i] * math.log((ch - bs[i]) / (ch + bs[i]))
    c = 0.0
    for i in range(cs.size):
        c += ca[i] * csg[i] * 1.0 * math.cosh(cs[i] * u)
    return b + c


@numba.njit(**_JIT)
def _psi_parts(bs, bk, cs, ca, csg, u):
    """psi and psi' of the blocks and of the CDD terms at u, sharing the transcendental
    functions: (blocks' psi, blocks' psi', CDD psi, CDD psi')."""
    pb, dpb, pc, dpc = 0.0, 0.0, 0.0, 0.0
    if bs.size:
        ch = math.cosh(u)
        sech = 1.0 / ch
        th = math.tanh(u)
        for i in range(bs.size):
            s = bs[i]
            pb += bk[i] * (2.0 * s * th * sech / (1.0 - (s * sech) ** 2))
            dpb += bk[i] * (2.0 * s * sech * ((1 - s * s) * sech ** 2 - th ** 2)
                            / (1.0 - (s * sech) ** 2) ** 2)
    for i in range(cs.size):
        s = cs[i]
        pc += ca[i] * csg[i] * s * math.sinh(s * u)
        dpc += ca[i] * csg[i] * (s * s) * math.cosh(s * u)
    return pb, dpb, pc, dpc


@numba.njit(**_JIT)
def _block_psi(s, u):
    """psi of one block f_x, s = sin(pi x)."""
    sech = 1.0 / math.cosh(u)
    return 2.0 * s * math.tanh(u) * sech / (1.0 - (s * sech) ** 2)


@numba.njit(**_JIT)
def _psi(bs, bk, cs, ca, csg, u):
    """psi = D' at clip(u)."""
    pb, _, pc, _ = _psi_parts(bs, bk, cs, ca, csg, _clip(u))
    return pb + pc


@numba.njit(**_JIT)
def _phase(bs, bk, cs, ca, csg, u):
    """delta at clip(u): sum -2 k arctan(sinh u / s) + sum a sinh(s u)."""
    u = _clip(u)
    b = 0.0
    if bs.size:
        sh = math.sinh(u)
        for i in range(bs.size):
            b += bk[i] * (-2.0 * math.atan(sh / bs[i]))
    c = 0.0
    for i in range(cs.size):
        c += ca[i] * 1.0 * 1.0 * math.sinh(cs[i] * u)
    return b + c


@numba.njit(**_JIT)
def _phase_slope(bs, bk, cs, ca, csg, u):
    """delta' = phi at clip(u): sum -2 k s sech u / (tanh^2 u + s^2 sech^2 u)
    + sum a s cosh(s u)."""
    u = _clip(u)
    b = 0.0
    if bs.size:
        sech = 1.0 / math.cosh(u)
        th = math.tanh(u)
        for i in range(bs.size):
            s = bs[i]
            b += bk[i] * (-2.0 * s * sech / (th ** 2 + (s * sech) ** 2))
    c = 0.0
    for i in range(cs.size):
        c += ca[i] * 1.0 * cs[i] * math.cosh(cs[i] * u)
    return b + c


@numba.njit(**_JIT)
def _pole_part(na, nk, u, derivative):
    out = 0.0
    for i in range(na.size):
        a, k = na[i], nk[i]
        if derivative:
            out += 2 * k * (a * a - u * u) / (u * u + a * a) ** 2
        else:
            out += 2 * k * u / (u * u + a * a)
    return out


@numba.njit(**_JIT)
def _smooth_psi(na, nk, ns, u, blocks_psi, cdd_psi):
    """psi minus the pole part of the near poles (expanded where |u| and a are below 1e-2),
    from the blocks' psi at u and the CDD terms' psi."""
    out = blocks_psi - _pole_part(na, nk, u, False)
    if abs(u) < 1e-2:
        tiny = False
        for i in range(na.size):
            tiny = tiny or na[i] < 1e-2
        if tiny:
            exact = out
            for i in range(na.size):
                a, k = na[i], nk[i]
                if not a < 1e-2:
                    continue
                direct = _block_psi(ns[i], u) - 2 * u / (u * u + a * a)
                s1m = u * u / 6 * (1 + u * u / 20 * (1 + u * u / 42))
                a1 = math.sin(a) / a if a else 1.0
                cos_minus = -a * a / 6 - a ** 4 / 360 + a ** 6 / 560
                n = (u * u * (1 + s1m) * (-2 * math.sin(a / 2) ** 2 - s1m)
                     + a * a * (cos_minus + math.cos(a) * s1m))
                f2 = 2 * u * n / ((u * u * (1 + s1m) ** 2 + a * a * a1 * a1) * (u * u + a * a))
                if u == 0:
                    f2 = 0.0
                exact = _finite(exact) - k * _finite(direct) + k * f2
            out = exact
    return out + cdd_psi


# -- the equations ----------------------------------------------------------------------------

@numba.njit(**_JIT)
def occupation(eps, sigma, L, dL):
    """L and dL/deps into the arrays; False where 1 + sigma e^{-eps} <= 0 (L not finite)."""
    ok = True
    for i in range(eps.size):
        e = eps[i]
        if sigma > 0:
            x = math.exp(-abs(e))
            if e > 0:
                L[i] = math.log1p(x)
                dL[i] = -x / (1 + x)
            else:
                L[i] = -e + math.log1p(x)
                dL[i] = -1 / (1 + x)
        else:
            x = math.exp(-e)
            L[i] = math.log1p(-x) if x <= 1.0 else np.nan
            dL[i] = x / (1 - x)
        if not math.isfinite(L[i]):
            ok = False
    return ok


@numba.njit(**_JIT)
def sources(tg, t, bs, bk, cs, ca, csg, out):
    """sum_j D(t_grid - t_j) into ``out`` (+inf, a particle on a grid point at B = 1: 700)."""
    for i in range(tg.size):
        v = 0.0
        for j in range(t.size):
            v += _source(bs, bk, cs, ca, csg, tg[i] - t[j])
        out[i] = 700.0 if v == np.inf else v
    return out


@numba.njit(**_JIT)
def _psi_integrals(tg, h, t, L, bs, bk, cs, ca, csg, na, nk, ns, value, slope, grad):
    """(1/2pi) int psi(t_k - t') L(t') dt', its d/dt_k and its gradient in L, for every k."""
    N = tg.size
    near = na.size > 0
    c = h / (2 * np.pi)
    for k in range(t.size):
        tk = t[k]
        v = 0.0
        dv = 0.0
        for i in range(N):
            u = tk - tg[i]
            uc = _clip(u)
            pb, dpb, pc, dpc = _psi_parts(bs, bk, cs, ca, csg, uc)
            if near:  # the blocks' psi at u itself (as the numpy path), the rest at clip(u)
                pu = pb if u == uc else _psi_parts(bs, bk, cs, ca, csg, u)[0]
                w = _smooth_psi(na, nk, ns, u, pu, pc)
                dw = _finite((dpb + dpc) - _pole_part(na, nk, u, True))
            else:
                w = pb + pc
                dw = dpb + dpc
            v += w * L[i]
            dv += dw * L[i]
            grad[k, i] = c * w
        value[k] = c * v
        slope[k] = c * dv
        if near:
            pv, pdv = 0.0, 0.0
            for p in range(na.size):
                a, kp = na[p], nk[p]
                sv, sdv = 0.0, 0.0
                # exp(-i pi w) on the grid, w = (t_k - t_i - i a) / h: the value at t_0 times
                # (-1)^i (t_i = t_0 + i h), one complex exponential per particle and pole
                e = np.exp(-1j * np.pi * (complex(tk - tg[0], -a) / h))
                for i in range(N):
                    w = complex(tk - tg[i], -a) / h
                    if abs(w) < 1e-3:
                        pw = np.pi * w
                        k1 = 1j * np.pi * (1 - 0.5j * pw - pw * pw / 6 + 1j * (pw * pw * pw) / 24)
                        dk1 = 1j * np.pi * (-0.5j * np.pi - np.pi * pw / 3
                                            + 0.125j * np.pi * (pw * pw)) / h
                    else:
                        k1 = (1 - e) / w
                        dk1 = (1j * np.pi * e / w - (1 - e) / (w * w)) / h
                    e = -e
                    sv += k1.real * L[i]
                    sdv += dk1.real * L[i]
                    grad[k, i] += 2 * kp * k1.real / (2 * np.pi)
                pv += 2 * kp * sv
                pdv += 2 * kp * sdv
            value[k] += pv / (2 * np.pi)
            slope[k] += pdv / (2 * np.pi)


@numba.njit(**_JIT)
def _unclipped(t):
    """No entry of t is changed by `_clip`."""
    for v in t:
        if v > 700.0 or v < -700.0:
            return False
    return True


@numba.njit(**_JIT)
def _track(big, x):
    """max(big, |x|) with NaN kept (numpy's max of |F| and |Q|)."""
    a = abs(x)
    if a > big or a != a:
        return a
    return big


@numba.njit(**_JIT)
def _residual(eps, t, L, tg, h, nu, K, trivial, c, U, V, m, R, I, bs, bk, cs, ca, csg,
              na, nk, ns, tc, src, ready, S, F, Q, value, slope, grad):
    """F and Q into their arrays (t clipped into ``tc``); max |F|, |Q|. ``ready``: ``src``
    holds the sources at ``tc`` already."""
    N, Np = tg.size, t.size
    for k in range(Np):
        tc[k] = _clip(t[k])
    if not ready:
        sources(tg, tc, bs, bk, cs, ca, csg, src)
    for r in range(c.size):
        s = 0.0
        for i in range(N):
            s += V[r, i] * L[i]
        S[r] = s
    big = 0.0
    for i in range(N):
        conv = 0.0
        if not trivial:
            for j in range(N):
                conv += K[i, j] * L[j]
        sep = 0.0
        for r in range(c.size):
            sep += c[r] * S[r] * U[r, i]
        F[i] = eps[i] - nu[i] - src[i] + conv + sep
        big = _track(big, F[i])
    _psi_integrals(tg, h, tc, L, bs, bk, cs, ca, csg, na, nk, ns, value, slope, grad)
    for k in range(Np):
        d = 0.0
        for j in range(Np):
            if j != k:
                d += _phase(bs, bk, cs, ca, csg, tc[k] - tc[j])
        Q[k] = m * R * math.sinh(tc[k]) + d - value[k] - 2 * np.pi * I[k]
        big = _track(big, Q[k])
    return big


@numba.njit(**_JIT)
def _jacobian_t(tc, L, dL, tg, KT, trivial, c, U, V, m, R, bs, bk, cs, ca, csg, slope, grad, at):
    """The Jacobian of (F, Q) in (eps, t), stored transposed in ``at`` (LAPACK's order)."""
    N, Np = tg.size, tc.size
    for j in range(N):  # column j of J0 = row j of at (KT: K transposed)
        d = dL[j]
        for i in range(N):
            at[j, i] = KT[j, i] * d if not trivial else 0.0
        at[j, j] += 1.0
        for r in range(c.size):
            f = c[r] * (V[r, j] * d)
            for i in range(N):
                at[j, i] += f * U[r, i]
        for k in range(Np):
            at[j, N + k] = -grad[k, j] * d
    for q in range(Np):
        for i in range(N):
            at[N + q, i] = _finite(_psi(bs, bk, cs, ca, csg, tg[i] - tc[q]))
        for k in range(Np):
            if k == q:
                d = 0.0
                for j in range(Np):
                    if j != k:
                        d += _phase_slope(bs, bk, cs, ca, csg, tc[k] - tc[j])
                at[N + q, N + k] = m * R * math.cosh(tc[k]) + d - slope[k]
            else:
                at[N + q, N + k] = -_phase_slope(bs, bk, cs, ca, csg, tc[k] - tc[q])


@numba.njit(**_JIT)
def _max_abs(x):
    out = 0.0
    for v in x:
        out = max(out, abs(v))
    return out


@numba.njit(**_JIT)
def newton(eps0, t0, tg, h, nu, K, KT, trivial, c, U, V, wE, wP, m, R, I, sigma,
           bs, bk, cs, ca, csg, na, nk, ns, tol, maxiter):
    """Newton with backtracking on (eps, t) from (eps0, t0), as `_newton` in
    tba.solvers.excited. Returns (status, iterations, eps, t, dressing, scalars, out, F, Q,
    dL, at, ipiv) with out = [E, P, iteration error, residual, rounding error, dE/dR, sign of
    det J, pivot ratio].

    ``maxiter`` < 0 linearises instead (one compiled function for both: each entry point
    costs seconds of compilation on a fresh install): -1 evaluates the equations F, Q and dL
    at (eps0, t0), -2 also the Jacobian, factored by `kernels.lapack.lu_factor` into
    (at, ipiv); status OUTSIDE_DOMAIN where eps0 is outside the domain of L."""
    N, Np, nr = tg.size, t0.size, c.size
    n = N + Np
    eps = eps0.copy()
    t = t0.copy()
    L, dL = np.empty(N), np.empty(N)
    Ln, dLn = np.empty(N), np.empty(N)
    tc, src, S = np.empty(Np), np.empty(N), np.empty(nr)
    F, Q, Fn, Qn = np.empty(N), np.empty(Np), np.empty(N), np.empty(Np)
    value, slope, grad = np.empty(Np), np.empty(Np), np.empty((Np, N))
    valuen, slopen, gradn = np.empty(Np), np.empty(Np), np.empty((Np, N))
    at = np.empty((n, n))
    ipiv = np.empty(n, dtype=PIVOT_TYPE)
    step = np.empty(n)
    eps_new, t_new = np.empty(N), np.empty(Np)
    src_t, src_new, slopes_dt = np.empty(N), np.empty(N), np.empty(N)
    out = np.full(8, np.nan)
    dressing = np.zeros(N)
    near = na.size > 0
    have_src_t = False
    if not occupation(eps, sigma, L, dL):
        return OUTSIDE_DOMAIN, 0, eps, t, dressing, S, out, F, Q, dL, at, ipiv
    r = _residual(eps, t, L, tg, h, nu, K, trivial, c, U, V, m, R, I, bs, bk, cs, ca, csg,
                  na, nk, ns, tc, src, False, S, F, Q, value, slope, grad)
    if maxiter < 0:
        if maxiter == -2:
            _jacobian_t(tc, L, dL, tg, KT, trivial, c, U, V, m, R, bs, bk, cs, ca, csg, slope,
                        grad, at)
            lu_factor(at, ipiv)
        return CONVERGED, 0, eps, t, dressing, S, out, F, Q, dL, at, ipiv
    floor = 64 * _EPS * max(1.0, _max_abs(nu))
    dE = np.inf
    for it in range(maxiter + 1):
        for k in range(Np):
            tc[k] = _clip(t[k])
        _jacobian_t(tc, L, dL, tg, KT, trivial, c, U, V, m, R, bs, bk, cs, ca, csg, slope, grad, at)
        lu_factor(at, ipiv)
        for i in range(N):
            step[i] = -F[i]
        for k in range(Np):
            step[N + k] = -Q[k]
        lu_solve(at, ipiv, step)
        for v in step:
            if not math.isfinite(v):
                return SINGULAR, it, eps, t, dressing, S, out, F, Q, dL, at, ipiv
        # E, P and the energy change the step would make
        E = 0.0
        for k in range(Np):
            E += math.cosh(tc[k])
        E *= m
        P = 0.0
        for k in range(Np):
            P += math.sinh(tc[k])
        P *= m
        eL, pL = 0.0, 0.0
        for i in range(N):
            eL += wE[i] * L[i]
            pL += wP[i] * L[i]
        E += eL
        P += pL
        dE_last = dE
        st, se = 0.0, 0.0
        for k in range(Np):
            st += math.sinh(t[k]) * step[N + k]
        for i in range(N):
            se += wE[i] * dL[i] * step[i]
        dE = abs(m * st + se)
        small = max(_max_abs(step[:N]), _max_abs(step[N:])) < 1e-6 or r <= floor
        stagnant = r <= 1e3 * floor and dE > 0.5 * dE_last and dE <= 1e-6 * max(abs(E), m)
        if (small and dE <= max(1e-2 * tol, 8 * _EPS) * max(abs(E), m)) or stagnant:
            a1, a2, a3 = 0.0, 0.0, 0.0
            for i in range(N):
                a1 += abs(wE[i] * L[i])
                a2 += abs(wE[i] * dL[i] * eps[i])
            for k in range(Np):
                a3 += math.cosh(t[k])
            rounding = 4 * _EPS * (a1 + a2 + m * a3)
            for i in range(N):
                step[i] = nu[i] / R
            for k in range(Np):
                step[N + k] = -(m * math.sinh(t[k]))
            lu_solve(at, ipiv, step)
            st, se = 0.0, 0.0
            for k in range(Np):
                st += math.sinh(t[k]) * step[N + k]
            for i in range(N):
                se += wE[i] * dL[i] * step[i]
            if not trivial:
                for i in range(N):
                    conv = 0.0
                    for j in range(N):
                        conv += K[i, j] * L[j]
                    dressing[i] = -conv
            sign, scale = pivot_summary(at, ipiv)
            out[0], out[1], out[2], out[3] = E, P, dE, r
            out[4], out[5], out[6], out[7] = rounding, m * st + se, sign, scale
            return CONVERGED, it, eps, t, dressing, S, out, F, Q, dL, at, ipiv
        if it == maxiter:
            break
        if near:  # steps in (eps - sources, t): the sharp sources move with t exactly
            if not have_src_t:  # later: those of the accepted trial
                sources(tg, t, bs, bk, cs, ca, csg, src_t)
                have_src_t = True
            for i in range(N):
                v = 0.0
                for k in range(Np):
                    v += _finite(_psi(bs, bk, cs, ca, csg, tg[i] - t[k])) * step[N + k]
                slopes_dt[i] = v
        lam = 1.0
        while True:
            for i in range(N):
                eps_new[i] = eps[i] + lam * step[i]
            for k in range(Np):
                t_new[k] = t[k] + lam * step[N + k]
            if near:
                sources(tg, t_new, bs, bk, cs, ca, csg, src_new)
                for i in range(N):
                    eps_new[i] = eps_new[i] + src_new[i] - src_t[i] + lam * slopes_dt[i]
            if occupation(eps_new, sigma, Ln, dLn):
                # the trial's sources serve its residual too where no rapidity is clipped
                ready = near and _unclipped(t_new)
                buffer = src_new if ready else src
                r_new = _residual(eps_new, t_new, Ln, tg, h, nu, K, trivial, c, U, V, m, R, I,
                                  bs, bk, cs, ca, csg, na, nk, ns, tc, buffer, ready, S, Fn, Qn,
                                  valuen, slopen, gradn)
                if r_new <= (1 - 0.25 * lam) * r or r_new <= floor:
                    break
            lam *= 0.5
            if lam < 1e-4:
                return LINE_SEARCH_FAILED, it, eps, t, dressing, S, out, F, Q, dL, at, ipiv
        eps, eps_new = eps_new, eps
        t, t_new = t_new, t
        L, Ln = Ln, L
        dL, dLn = dLn, dL
        F, Fn = Fn, F
        Q, Qn = Qn, Q
        value, valuen = valuen, value
        slope, slopen = slopen, slope
        grad, gradn = gradn, grad
        src_t, src_new = src_new, src_t
        r = r_new
    return MAX_ITERATIONS, maxiter, eps, t, dressing, S, out, F, Q, dL, at, ipiv
