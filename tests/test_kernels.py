"""The compiled routines in kernels/ against slow, obviously correct twins (plain loops).

Sources: the formulas in the kernels' own docstrings (kernels/statistics.py,
kernels/convolution.py); the references below are written independently, with mpmath
(50 digits) for the occupation functions and explicit Python loops for the convolutions.
"""

import math
from fractions import Fraction
import warnings

import mpmath
import numpy as np
import pytest
from hypothesis import given, settings, strategies as st
from hypothesis.extra import numpy as hnp

# pyproject turns warnings into errors; when a hypothesis test fails, hypothesis imports
# libcst, whose import of mypy_extensions.TypedDict warns (DeprecationWarning) and turns the
# failure report into a pytest INTERNALERROR. Import it once here with that warning muted.
with warnings.catch_warnings():
    warnings.simplefilter("ignore", DeprecationWarning)
    try:
        import libcst  # noqa: F401
    except ImportError:
        pass

from kernels import (SpectralConvolver, block_toeplitz_matrix, block_toeplitz_matvec,
                     occupation_terms)

EXTREMES = [-800.0, -745.0, -700.0, -36.7, -1.0, -1e-300, 0.0, 1e-300, 1.0, 36.7, 700.0, 745.0, 800.0]


# --------------------------------------------------------------------------------------
# occupation_terms
# --------------------------------------------------------------------------------------

def slow_occupation(eps, sign):
    """L and dL/deps element by element in 50-digit mpmath (kernels/statistics.py docstring):

    fermions: L = log(1 + e^{-eps}),  dL = -1/(1 + e^{eps})
    bosons:   L = -log(1 - e^{-eps}), dL = -1/(e^{eps} - 1) for eps > 0, NaN otherwise
    """
    L = np.empty(eps.shape)
    dL = np.empty(eps.shape)
    with mpmath.workdps(50):
        for idx, e in np.ndenumerate(eps):
            e = mpmath.mpf(float(e))
            if sign > 0:
                L[idx] = float(mpmath.log1p(mpmath.exp(-e)))
                dL[idx] = float(-1 / (1 + mpmath.exp(e)))
            elif e <= 0:
                L[idx] = dL[idx] = math.nan
            else:
                # both forms are exact in mpmath; each avoids forming 1 -/+ tiny in 50 digits
                if e < 1:
                    L[idx] = float(-mpmath.log(-mpmath.expm1(-e)))
                else:
                    L[idx] = float(-mpmath.log1p(-mpmath.exp(-e)))
                dL[idx] = float(-1 / mpmath.expm1(e))
    return L, dL


def run_occupation(eps, sign):
    eps = np.ascontiguousarray(eps, dtype=float)
    L = np.full(eps.shape, -123.0)
    dL = np.full(eps.shape, -123.0)
    bad = occupation_terms(eps, sign, L, dL)
    return L, dL, bad


def assert_close(got, want, rtol, atol=0.0):
    got, want = np.broadcast_arrays(got, want)
    assert np.array_equal(np.isnan(got), np.isnan(want))
    ok = ~np.isnan(want)
    g, w = got[ok], want[ok]
    same = g == w  # includes equal infinities (dL for subnormal eps overflows in both)
    with np.errstate(invalid="ignore"):
        err = np.where(same, 0.0, np.abs(g - w))
    tol = atol + (rtol if np.ndim(rtol) == 0 else rtol[ok]) * np.abs(w)
    assert np.all(err <= tol), (g[~(err <= tol)], w[~(err <= tol)])


def test_fermion_extremes():
    # kernels/statistics.py: "evaluated without overflow for any real eps (fermions)"
    eps = np.array(EXTREMES).reshape(1, -1)
    L, dL, bad = run_occupation(eps, +1)
    Lr, dLr = slow_occupation(eps, +1)
    assert bad == 0
    assert np.all(np.isfinite(L)) and np.all(np.isfinite(dL))
    assert_close(L, Lr, 1e-15, 1e-320)
    assert_close(dL, dLr, 1e-15, 1e-320)
    assert L[0, 6] == pytest.approx(math.log(2), rel=1e-16) and dL[0, 6] == -0.5





def test_boson_extremes():
    eps = np.array(EXTREMES).reshape(1, -1)
    L, dL, bad = run_occupation(eps, -1)
    Lr, dLr = slow_occupation(eps, -1)
    assert bad == int(np.sum(eps <= 0))  # documented: count of points with eps <= 0
    assert_close(dL, dLr, 1e-15, 1e-320)
    small = eps <= 2.0  # large eps: see test_boson_L_large_eps
    assert_close(L[small], Lr[small], 1e-15, 1e-320)


def test_boson_L_large_eps():
    # L = -log(1 - e^{-eps}) ~ e^{-eps}: must keep its relative accuracy (kernels docstring);
    # regression: an expm1-only form lost every digit for eps >~ 38
    eps = np.array([[4.0, 20.0, 36.7, 40.0, 700.0]])
    L, _, _ = run_occupation(eps, -1)
    Lr, _ = slow_occupation(eps, -1)
    assert_close(L, Lr, 1e-14, 1e-320)


@settings(max_examples=60, deadline=None)
@given(hnp.arrays(np.float64, st.tuples(st.integers(1, 3), st.integers(1, 40)),
                  elements=st.floats(-700, 700, allow_nan=False)))
def test_fermion_random(eps):
    # hypothesis: any real eps in [-700, 700], any shape (1..3, 1..40)
    L, dL, bad = run_occupation(eps, +1)
    Lr, dLr = slow_occupation(eps, +1)
    assert bad == 0
    assert_close(L, Lr, 1e-15, 1e-320)
    assert_close(dL, dLr, 1e-15, 1e-320)


@settings(max_examples=60, deadline=None)
@given(hnp.arrays(np.float64, st.tuples(st.integers(1, 3), st.integers(1, 40)),
                  elements=st.one_of(st.floats(0, 700, exclude_min=True), st.floats(-700, 0))))
def test_boson_random(eps):
    # hypothesis over eps in [-700, 700]: NaN and a count where eps <= 0; dL everywhere and
    # L for eps <= 2 to 1e-15 relative (L at larger eps: test_boson_L_large_eps)
    L, dL, bad = run_occupation(eps, -1)
    Lr, dLr = slow_occupation(eps, -1)
    assert bad == int(np.sum(eps <= 0))
    assert_close(dL, dLr, 2e-15, 1e-320)
    small = eps <= 2.0
    assert_close(L[small], Lr[small], 2e-15, 1e-320)


def test_boson_tiny_positive_eps():
    # docstring: "evaluated without overflow for ... eps > 0 (bosons)". Regression: at commit
    # f20d048 this raised ZeroDivisionError (1 - exp(-eps) == 0 for eps < 1.1e-16) and lost
    # ~log10(1/eps) digits for small eps
    eps = np.array([[1e-300, 1e-17, 1e-10, 1e-8, 1e-6]])
    L, dL, bad = run_occupation(eps, -1)
    Lr, dLr = slow_occupation(eps, -1)
    assert bad == 0
    assert_close(L, Lr, 1e-14)
    assert_close(dL, dLr, 1e-14)


# --------------------------------------------------------------------------------------
# block-Toeplitz convolution
# --------------------------------------------------------------------------------------

def slow_matvec(kern, f):
    """out[a, i] = sum_b sum_j kern[a, b, N - 1 + i - j] f[b, j] (kernels/convolution.py)."""
    n, N = f.shape
    out = np.zeros((n, N))
    for a in range(n):
        for i in range(N):
            acc = 0.0
            for b in range(n):
                for j in range(N):
                    acc += kern[a, b, N - 1 + i - j] * f[b, j]
            out[a, i] = acc
    return out


def slow_matrix(kern, N):
    n = kern.shape[0]
    M = np.zeros((n * N, n * N))
    for a in range(n):
        for b in range(n):
            for i in range(N):
                for j in range(N):
                    M[a * N + i, b * N + j] = kern[a, b, (N - 1) + (i - j)]
    return M


def random_problem(rng, n, N, scale=1.0):
    kern = rng.standard_normal((n, n, 2 * N - 1)) * scale
    f = rng.standard_normal((n, N))
    return np.ascontiguousarray(kern), np.ascontiguousarray(f)


def matvec_tolerance(kern, f):
    # rounding of a length-nN dot product: a few ulps of sum |kern| |f| (common practice)
    n, N = f.shape
    bound = np.abs(slow_matvec(np.abs(kern), np.abs(f)))
    return 1e-14 * bound + 1e-300


@settings(max_examples=40, deadline=None)
@given(st.integers(1, 4), st.integers(1, 30), st.integers(0, 2**32 - 1))
def test_matvec_random(n, N, seed):
    # hypothesis over shapes and data; out is filled in place and returned
    kern, f = random_problem(np.random.default_rng(seed), n, N)
    out = np.full((n, N), np.nan)
    ret = block_toeplitz_matvec(kern, f, out)
    want = slow_matvec(kern, f)
    assert np.all(np.abs(out - want) <= matvec_tolerance(kern, f))
    assert np.array_equal(ret, out)


def test_matvec_asymmetric_kernel_orientation():
    # a kernel that is non-zero at a single offset k shifts f by k: out[i] = f[i - k]
    N = 7
    for k in [-3, 0, 2]:
        kern = np.zeros((1, 1, 2 * N - 1))
        kern[0, 0, N - 1 + k] = 1.0
        f = np.arange(1.0, N + 1).reshape(1, N)
        out = block_toeplitz_matvec(kern, f, np.empty((1, N)))
        want = np.array([f[0, i - k] if 0 <= i - k < N else 0.0 for i in range(N)])
        assert np.array_equal(out[0], want)


@pytest.mark.parametrize("n, N", [(1, 1), (1, 17), (2, 9), (3, 5), (8, 6)])
def test_matrix_equals_loops(n, N):
    kern, f = random_problem(np.random.default_rng(n * 100 + N), n, N)
    M = block_toeplitz_matrix(kern, N)
    assert M.shape == (n * N, n * N)
    assert np.array_equal(M, slow_matrix(kern, N))  # pure copying: exact
    y = (M @ f.reshape(-1)).reshape(n, N)
    assert np.all(np.abs(y - slow_matvec(kern, f)) <= matvec_tolerance(kern, f))


@pytest.mark.parametrize("n, N", [(1, 1), (1, 2), (1, 33), (2, 16), (3, 50), (8, 65)])
def test_spectral_convolver_equals_loops(n, N):
    rng = np.random.default_rng(7 * n + N)
    kern, f = random_problem(rng, n, N)
    # add a kernel of very different magnitudes (like TBA kernels with decaying tails)
    kern *= np.exp(-np.abs(np.arange(-(N - 1), N)) * 0.5)[None, None, :]
    conv = SpectralConvolver(kern)
    want = slow_matvec(kern, f)
    # FFT rounding: ~eps log2(size) relative to sum |kern| |f| (common practice)
    tol = 1e-13 * np.abs(kern).sum(axis=(1, 2)).max() * np.abs(f).max()
    got = conv(f)
    assert got.shape == (n, N)
    assert np.max(np.abs(got - want)) <= tol
    out = np.full((n, N), np.nan)
    ret = conv(f, out=out)
    assert ret is out
    assert np.max(np.abs(out - want)) <= tol
    # reusable: a second function with the same convolver
    g = rng.standard_normal((n, N))
    assert np.max(np.abs(conv(g) - slow_matvec(kern, g))) <= 1e-13 * np.abs(kern).sum(axis=(1, 2)).max() * np.abs(g).max()


def test_spectral_convolver_rejects_bad_shapes():
    with pytest.raises(ValueError):
        SpectralConvolver(np.zeros((2, 2, 6)))  # even width
    with pytest.raises(ValueError):
        SpectralConvolver(np.zeros((2, 3, 5)))  # not square in species


# --------------------------------------------------------------------------------------
# compiled dense Newton iteration
# --------------------------------------------------------------------------------------


def slow_newton(K, nu, U, V, c, e):
    """Obviously correct Newton iteration (numpy, dense Jacobian built in full, no Woodbury)."""
    for _ in range(100):
        L = np.log1p(np.exp(-e))
        dL = -1.0 / (1.0 + np.exp(e))
        F = e - nu + K @ L + U.T @ (c * (V @ L))
        J = np.eye(e.size) + K * dL[None, :] + (U.T * c) @ (V * dL[None, :])
        delta = np.linalg.solve(J, -F)
        e = e + delta
        if np.max(np.abs(delta)) < 1e-14:
            break
    return e


def _tba_like_system(alpha, R=0.7, N=41, h=0.3):
    # a TBA-like system: Lee-Yang kernel phi(t) = -2 sin(2pi/3) cosh t / (sinh^2 t + 3/4)
    # and a TTbar-like rank-2 term (common practice, no source)
    t = h * (np.arange(N) - (N - 1) / 2)
    d = t[:, None] - t[None, :]
    s = math.sin(2 * math.pi / 3)
    K = h / (2 * math.pi) * (-2 * s * np.cosh(d) / (np.sinh(d) ** 2 + s * s))
    nu = R * np.cosh(t)
    U = np.stack([np.cosh(t), np.sinh(t)])
    V = h * U
    c = np.array([alpha, -alpha]) / (2 * math.pi)
    wE = -(h / (2 * math.pi)) * np.cosh(t)
    return K, nu, U, V, c, wE


@pytest.mark.parametrize("alpha", [0.0, 0.3, -0.4])
def test_dense_newton_equals_slow_newton(alpha):
    # the compiled Newton iteration against the plain numpy one above (they must agree)
    from kernels.dense import CONVERGED, newton

    K, nu, U, V, c, wE = _tba_like_system(alpha)
    N = nu.size
    out = newton(K, nu, U, V, c, wE, nu.copy(), 1, 1e-13, 60, np.zeros((1, 1)), False, False)
    e, L, dL, it, res, dE, status, fold, rounding, A, inversions = out
    assert status == CONVERGED
    want = slow_newton(K, nu, U, V, c, nu.copy())
    assert np.max(np.abs(e - want)) < 1e-12
    # the fold indicator is det J / det J0 (Woodbury capacitance); with a chord inverse from an
    # earlier iterate it is accurate to the chord's rate away from folds (kernels/dense.py,
    # REFINE_FOLD), exact next to them
    J = np.eye(N) + K * dL[None, :]
    full = J + (U.T * c) @ (V * dL[None, :])
    exact = np.linalg.det(full) / np.linalg.det(J)
    assert fold == pytest.approx(exact, rel=1e-10 if abs(exact) < 0.2 else 1e-2)
    # A is the inverse of J0 at the iterate where it was last inverted (at least once)
    assert inversions >= 1 and A.shape == (N, N)
    assert 0 < rounding < 1e-13


@pytest.mark.parametrize("alpha", [0.0, 0.3])
def test_chord_steps_from_a_neighbours_inverse_reach_the_same_solution(alpha):
    # chord iteration: the inverse of J0 from a solve at R = 0.7 reused at R = 0.75 gives the
    # solution of the slow Newton iteration there, with fewer inversions than iterations
    from kernels.dense import CONVERGED, newton

    K, nu, U, V, c, wE = _tba_like_system(alpha)
    first = newton(K, nu, U, V, c, wE, nu.copy(), 1, 1e-13, 60, np.zeros((1, 1)), False, False)
    K2, nu2, U2, V2, c2, wE2 = _tba_like_system(alpha, R=0.75)
    e_start = first[0] + (nu2 - nu)
    out = newton(K2, nu2, U2, V2, c2, wE2, e_start, 1, 1e-13, 60, first[9], True, False)
    assert out[6] == CONVERGED
    assert out[10] == 0  # converged on the neighbour's inverse alone
    want = slow_newton(K2, nu2, U2, V2, c2, nu2.copy())
    assert np.max(np.abs(out[0] - want)) < 1e-12


def test_refined_solves_with_a_stale_inverse_are_exact():
    # solve_linear (Woodbury + iterative refinement) with the inverse of J0 at another point
    # solves J x = b of this point to rounding (numpy's dense solve as the reference)
    from kernels.dense import jacobian0, solve_j0, solve_linear

    K, nu, U, V, c, wE = _tba_like_system(0.3)
    rng = np.random.default_rng(3)
    dL_old = -1 / (1 + np.exp(nu))
    dL = -1 / (1 + np.exp(0.9 * nu))
    A = np.ascontiguousarray(np.linalg.inv(jacobian0(K, dL_old, False)))
    b = rng.standard_normal(nu.size)
    J0 = np.eye(nu.size) + K * dL[None, :]
    J = J0 + (U.T * c) @ (V * dL[None, :])
    x, ok = solve_linear(K, U, V, c, dL, A, b, False, 30)
    assert ok and np.max(np.abs(x - np.linalg.solve(J, b))) < 1e-13 * np.max(np.abs(x))
    x0, ok0, sweeps = solve_j0(K, dL, A, b, False, 30)
    assert ok0 and np.max(np.abs(x0 - np.linalg.solve(J0, b))) < 1e-13 * np.max(np.abs(x0))


@pytest.mark.parametrize("x", [Fraction(1, 30), Fraction(3, 10), Fraction(1, 2)])
@pytest.mark.parametrize("h", [0.3, 0.1])
def test_band_limited_samples_equal_the_closed_form(x, h):
    # W(tau) = phi(tau) - (1/pi) int_{pi/h}^inf phit(k) cos(k tau) dk, with the transform of
    # f_x written as a sum of exponentials e^{-a k} (a = pi (x + n), pi (1 - x + n)) whose tail
    # integrals are elementary: e^{-a K} (a cos(K tau) - tau sin(K tau)) / (a^2 + tau^2)
    # (derived here; common practice, no source)
    from tba.models.blocks import block_kernel, block_transform
    from tba.solvers.operators import band_limited_samples

    N = 200
    got = band_limited_samples(lambda k: block_transform(x, k), h, N)
    tau = h * np.arange(N)
    omega = math.pi / h
    tail = np.zeros(N)
    for n in range(8):
        for a in (math.pi * (float(x) + n), math.pi * (1 - float(x) + n)):
            tail += (-1) ** n * (-2 * math.pi) * math.exp(-a * omega) * (
                a * np.cos(tau * omega) - tau * np.sin(tau * omega)) / (a * a + tau * tau)
    want = block_kernel(x, tau) - tail / math.pi
    assert np.max(np.abs(got - want)) <= 1e-13 * np.max(np.abs(want))


# --------------------------------------------------------------------------------------
# solve_run: consecutive points of a scan in one compiled call
# --------------------------------------------------------------------------------------

def _chain(model, radii, deformation, tol):
    """The same scan one point at a time (`solve_ground_state`, each started from the last
    converged point): the path that takes every decision in Python."""
    from tba import solve_ground_state

    out, start = [], None
    for R in radii:
        res = solve_ground_state(model, R, deformation, tol=tol, start=start)
        start = res if res.converged else start
        out.append(res)
    return out


SCANS = {  # (model, radii, alpha, tol): the two signs of alpha, both directions, no deformation
    "sinh-gordon": ("sinh_gordon", list(np.linspace(0.6, 5.0, 150)), 0.1, 1e-12),
    "sinh-gordon-down": ("sinh_gordon", list(np.linspace(5.0, 0.3, 90)), -0.2, 1e-10),
    "undeformed": ("sinh_gordon", list(np.geomspace(0.05, 20.0, 120)), 0.0, 1e-12),
    # the free fermion (no kernel matrix) towards its branch point R_c = 0.577... at alpha = 0.5
    # (docs/physics.md section 4), an int radius in the middle taken by the point-by-point path
    "free-fermion": ("free_fermion", [*np.linspace(3.0, 1.0, 40), 1, *np.linspace(0.98, 0.58, 40)],
                     0.5, 1e-12),
}


@pytest.mark.parametrize("name", sorted(SCANS))
def test_a_scan_in_one_compiled_call_equals_the_point_by_point_path(name, monkeypatch):
    # solve_radii takes runs of points on unchanged grids in one call of kernels.dense.solve_run
    # (the same compiled level solve from the same starts): every number must be the one of
    # the point-by-point path, bit for bit, and so must the derivatives (common practice for
    # a fast path, no source); the compiled run must really take most points
    import kernels.dense
    import tba
    from tba.solvers.ground import energy_derivatives, solve_radii

    factory, radii, alpha, tol = SCANS[name]
    model = getattr(tba, factory)(0.6) if factory == "sinh_gordon" else getattr(tba, factory)()
    deformation = tba.ttbar(alpha) if alpha else None
    taken, run = [], kernels.dense.solve_run

    def counted(*args):
        out = run(*args)
        taken.append(out[0])
        return out

    monkeypatch.setattr(kernels.dense, "solve_run", counted)
    fast = solve_radii(model, radii, deformation, tol=tol)
    monkeypatch.setattr(kernels.dense, "solve_run", run)
    slow = _chain(getattr(tba, factory)(0.6) if factory == "sinh_gordon" else getattr(tba, factory)(),
                  radii, deformation, tol)
    assert sum(taken) >= 0.6 * len(radii), taken
    for a, b in zip(fast, slow, strict=True):
        assert (a.status, a.iterations, a.radius) == (b.status, b.iterations, b.radius)
        assert np.array_equal([a.energy, a.error, a.momentum, a.residual, a.effective_radius,
                               a.fold_indicator], [b.energy, b.error, b.momentum, b.residual,
                                                   b.effective_radius, b.fold_indicator],
                              equal_nan=True), a.radius
        if a.converged:
            assert a.grid == b.grid and np.array_equal(a.pseudo_energies, b.pseudo_energies)
    for k in (1, len(radii) // 2, len(radii) - 1):
        if fast[k].converged:
            assert energy_derivatives(fast[k], spins=(1,), second=True) == \
                energy_derivatives(slow[k], spins=(1,), second=True)
    if factory == "free_fermion":
        # against the closed form (tests/reference.py: E = E_NS(R + alpha E)): the error
        # estimates of the compiled run bound the true errors
        from reference import deformed_free_fermion_energy

        for res in fast:
            exact = deformed_free_fermion_energy(res.radius, alpha)
            assert res.converged == (exact is not None)
            if res.converged:
                assert abs(res.energy - exact) <= res.error, res.radius
