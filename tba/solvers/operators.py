"""Discretised kernels and the other grid-dependent arrays of the TBA equations.

On a uniform grid t_i = (i - (N - 1)/2) h the convolution (1/2pi) int phi_ab(t - t') L_b(t') dt'
becomes sum_j w_ab(t_i - t_j) L_b(t_j), a block-Toeplitz product. Two rules give the weights:

* band-limited (models whose kernel transforms phit_ab(k) = int e^{ikt} phi_ab(t) dt are known in
  closed form: every block model): w(kh) = (h / 2pi) W(kh) with

      W(tau) = (1/2pi) int_{-pi/h}^{pi/h} phit(k) e^{-ik tau} dk,

  the kernel without its Fourier modes above the grid's Nyquist frequency pi/h. The discrete
  convolution then acts on the samples of L exactly as phi acts on their sinc interpolant: the
  kernel's poles drop out of the error, which is set by the analyticity strip of L alone (pi/2
  for the driving term m R cosh t). This is product integration with the sinc basis (Nystrom's
  method with the kernel integrated exactly against the interpolant). E8, whose nearest kernel
  pole lies at pi/30, runs at R = 1 and tol 1e-13 on h = 0.27 (level 0: 33 points per species)
  and h = 0.19 (level 1). Measured (tests/test_quadrature.py), against e^{-2 cosh t}: pointwise,
  the convolution is good to 4e-11 at h = 0.27 (2.5e-10 at h = 0.3) and 7e-15 at h = 0.19, since
  sinc interpolation converges at about half the trapezoid rule's rate; the energy, an
  integral against cosh t, recovers the full rate: on the level-0 grid alone it is within 1e-13
  of a fine-grid solve. The trapezoid rule with the same kernels is off by 2e-3 at h = 0.27 and
  needs h ~ 0.03 for 1e-13 (6e-17 at h = 0.025, 1e-12 at h = 0.05).
* trapezoid (kernel callables, whose transform is unknown): w(kh) = (h / 2pi) phi(kh); the
  kernels' pole distance then sets the spacing (``model.pole_distance``).

W is computed by Gauss-Legendre quadrature over [0, pi/h] in panels (the kernels are even, so
W(tau) = (1/pi) int_0^{pi/h} phit(k) cos(k tau) dk), to a few ulps of max |phi|; the tests
compare it with the closed form of the cut-off tail for a block.

The driving terms, energy and momentum weights come from the model's e_a(t), p_a(t) (m cosh t,
m sinh t for massive species; (M/2) e^{+-t} for massless ones), and so do the two rank-one terms
of the TTbar factor, whose kernel is e_a(t) e_b(t') - p_a(t) p_b(t') for every kind of pair
(docs/physics.md section 9). A species of multiplicity g_b counts g_b times wherever L_b is
summed over species: its kernel columns, its energy and momentum weights and the rank-one
scalars carry g_b.
"""

import functools
import math

import numpy as np

from kernels import SpectralConvolver, block_toeplitz_matrix

#: systems with n_species * N at or below this are solved densely (inverse of J0 reused along
#: a scan); larger ones use GMRES with FFT products
DENSE_LIMIT = 1600
#: massive models with at least MANY_SPECIES species are dense only up to n N =
#: MANY_SPECIES_DENSE_LIMIT: the dense cost grows like (n N)^3, GMRES's with n N log N, and
#: scans measured on this machine (1 BLAS thread, CPU time per point, radii 0.6-5, alpha
#: 0.05, tol 1e-12; DEVELOPERS.md) cross over near n N = 600 (E8, n N <= 456: dense 1.8x
#: faster; A12, 396-684: GMRES 1.3x; A16, 528-912: 2.2x; A24, 792-1368: 4.8x). Fewer species
#: and massless models keep DENSE_LIMIT (GMRES stalls on the plateaus of massless species).
MANY_SPECIES = 3
MANY_SPECIES_DENSE_LIMIT = 576
#: Gauss-Legendre nodes per panel of the band integral; a panel spans at most
#: PANEL_PHASE radians of cos(k tau) at the largest offset
PANEL_NODES = 24
PANEL_PHASE = 6 * math.pi


def use_dense(model, n, N):
    """True when the system of n species on N points is solved densely (the cost model of
    DENSE_LIMIT and MANY_SPECIES_DENSE_LIMIT)."""
    size = n * N
    if n >= MANY_SPECIES and not model.is_massless:
        return size <= min(DENSE_LIMIT, MANY_SPECIES_DENSE_LIMIT)
    return size <= DENSE_LIMIT


def uses_band_limited_kernels(model):
    """True when the model's kernels are discretised band-limited (their transform is known)."""
    return bool(getattr(model, "has_kernel_transform", False))


@functools.lru_cache(maxsize=4)
def _gauss_legendre(nodes):
    x, w = np.polynomial.legendre.leggauss(nodes)
    x.flags.writeable = w.flags.writeable = False
    return x, w


def band_limited_samples(transform, h, N, oscillation=0.0):
    """W(kh) for k = 0 .. N-1 of the even kernel(s) whose transform is ``transform(k)``
    (returning shape S + k.shape): shape S + (N,). ``oscillation``: the transform's own
    oscillation frequency in k (a kernel centred at +-theta has cos(k theta) in it)."""
    omega_max = math.pi / h
    tau = h * np.arange(N)
    span = (tau[-1] if N > 1 else 0.0) + oscillation
    panels = max(1, math.ceil(omega_max * span / PANEL_PHASE))
    x, w = _gauss_legendre(PANEL_NODES)
    edges = np.linspace(0.0, omega_max, panels + 1)
    half = 0.5 * (edges[1:] - edges[:-1])
    nodes = (half[:, None] * x[None, :] + 0.5 * (edges[1:] + edges[:-1])[:, None]).ravel()
    weights = (half[:, None] * w[None, :]).ravel()
    values = np.asarray(transform(nodes), dtype=float)
    return (values * weights) @ np.cos(np.outer(nodes, tau)) / math.pi


def kernel_samples(model, grid, deformation=None):
    """Convolution weights w_ab(kh) for k = -(N-1) .. N-1, shape (n, n, 2N - 1): the layout of
    `kernels.convolution` (``kern[a, b, N - 1 + k]``). With ``deformation``, the kernel of its
    pole and resonance factors (`tba.models.cdd.CDD.kernel`) is included, band-limited from its
    transform like the model's."""
    N, h = grid.N, grid.h
    factors = deformation is not None and deformation.has_poles
    if (model.blocks is not None and not factors
            and not any(cell for row in model.blocks for cell in row)):
        full = np.zeros((model.n_species, model.n_species, 2 * N - 1))  # free particles
    elif uses_band_limited_kernels(model):
        if factors:
            transform = lambda k: model.kernel_transform(k) + deformation.kernel_transform(model, k)  # noqa: E731
        else:
            transform = model.kernel_transform
        half = band_limited_samples(transform, h, N,
                                    deformation.oscillation if factors else 0.0)  # k = 0 .. N-1
        full = np.concatenate([half[..., :0:-1], half], axis=-1)
    else:
        offsets = h * np.arange(-(N - 1), N)
        full = model.kernel(offsets)
        if factors:
            full = full + deformation.kernel(model, offsets)
    return np.ascontiguousarray(full * (h / (2 * np.pi)))


class Operators:
    """Kernel weights, the dense matrix or FFT convolution, and the grid-dependent arrays of
    one model on one grid (cached per model, see `operators`)."""

    def __init__(self, model, grid, deformation=None):
        n, N = model.n_species, grid.N
        kern = kernel_samples(model, grid, deformation)
        g = np.asarray(model.multiplicity, dtype=float) if model.has_multiplicity else None
        if g is not None:
            kern = np.ascontiguousarray(kern * g[None, :, None])
        self.n, self.N = n, N
        self.model, self.grid = model, grid
        self.trivial = not np.any(kern)
        self.dense = use_dense(model, n, N)
        if self.trivial:
            self.matrix = np.zeros((1, 1))
        elif self.dense:
            self.matrix = block_toeplitz_matrix(kern, N)
        else:
            self.matrix = None
            self._spectral = SpectralConvolver(kern)
            self._kern = kern
            self._spectral_t = self._spectral_abs = None
        t, h = grid.t, grid.h
        self.drive = model.energies(t)
        self.momentum = model.momenta(t)
        self.weight = h if g is None else h * g[:, None]  # measure of the sums over species
        self.wE = -(h / (2 * np.pi)) * self.drive
        self.wP = -(h / (2 * np.pi)) * self.momentum
        if g is not None:
            self.wE, self.wP = self.wE * g[:, None], self.wP * g[:, None]
        self.drive_flat = np.ascontiguousarray(self.drive.reshape(-1))
        self.wE_flat = np.ascontiguousarray(self.wE.reshape(-1))
        self.wP_flat = np.ascontiguousarray(self.wP.reshape(-1))
        self.no_terms = np.zeros((0, n, N))
        self._spin = {}
        self._terms = {}
        self.t = t

    def charge_rows(self, deformation, spin):
        """(U, V) of a spin-s CDD factor, U = [q_a cosh(st), q_a sinh(st)] on the grid (spin 1:
        [e_a(t), p_a(t)], which is the same for massive species) and V = weight * U: the kernel
        coefficient q_a q_b (cosh(st) cosh(st') - sinh(st) sinh(st')) is U_0 V_0 - U_1 V_1."""
        if spin == 1:
            key = 1
        else:
            q = deformation.charges(self.model, spin)
            key = (spin, tuple(q))
        UV = self._spin.get(key)
        if UV is None:
            if spin == 1:
                U = np.stack([self.drive, self.momentum])
            else:
                t = self.grid.t
                ch, sh = np.cosh(spin * t), np.sinh(spin * t)
                U = np.stack([np.outer(q, ch), np.outer(q, sh)])
            UV = self._spin[key] = (U, self.weight * U)
        return UV

    def separable(self, deformation, spin):
        """(U, V, c) of the two rank-one terms of a spin-s CDD factor (`charge_rows`)."""
        alpha = deformation.couplings[spin]
        U, V = self.charge_rows(deformation, spin)
        coef = alpha * spin / (2 * np.pi)
        return U, V, np.array([coef, -coef])

    def terms(self, deformation):
        """(U, V, c, U_flat, V_flat) of every separable CDD term of ``deformation`` (cached:
        they do not depend on the radius)."""
        key = tuple(deformation.couplings.items())
        out = self._terms.get(key)
        if out is None:
            n, N = self.n, self.N
            parts = [self.separable(deformation, s) for s in deformation.couplings]
            if parts:
                U = np.concatenate([u for u, v, c in parts])
                V = np.concatenate([v for u, v, c in parts])
                c = np.concatenate([c for u, v, c in parts])
            else:
                U = V = self.no_terms
                c = np.zeros(0)
            r = c.size
            out = (U, V, c, np.ascontiguousarray(U.reshape(r, n * N)),
                   np.ascontiguousarray(V.reshape(r, n * N)))
            if len(self._terms) > 64:
                self._terms.clear()
            self._terms[key] = out
        return out

    @functools.cached_property
    def matrix_transposed(self):
        """The dense kernel matrix transposed, in C order (its columns as rows)."""
        return np.ascontiguousarray(self.matrix.T)

    def convolve(self, f):
        """sum_b sum_j w_ab(t_i - t_j) f_b(t_j) for f of shape (n, N)."""
        if self.trivial:
            return np.zeros_like(f)
        if self.dense:
            return (self.matrix @ f.reshape(-1)).reshape(f.shape)
        return self._spectral(f)

    def convolve_transposed(self, f):
        """K^T f (the adjoint product: sum_a sum_i w_ab(t_i - t_j) f_a(t_i)), Krylov path only."""
        if self.trivial:
            return np.zeros_like(f)
        if self._spectral_t is None:
            kern_t = np.ascontiguousarray(np.swapaxes(self._kern, 0, 1)[..., ::-1])
            self._spectral_t = SpectralConvolver(kern_t)
        return self._spectral_t(f)

    def convolve_abs(self, f):
        """sum_b sum_j |w_ab(t_i - t_j)| f_b(t_j) for f >= 0 (the size of the terms of the
        convolution, for rounding bounds; FFT rounding on positive data is relative to the
        result), Krylov path only."""
        if self.trivial:
            return np.zeros_like(f)
        if self._spectral_abs is None:
            self._spectral_abs = SpectralConvolver(np.abs(self._kern))
        return np.abs(self._spectral_abs(f))


def operators(model, grid, deformation=None):
    """The cached `Operators` of ``model`` on ``grid`` (with the pole factors of
    ``deformation`` in the kernel, if it has any)."""
    cache = model._kernel_cache
    factors = deformation.kernel_key if deformation is not None else None
    key = (grid.h, grid.N, factors)
    ops = cache.get(key)
    if ops is None:
        if len(cache) > 64:
            cache.clear()
        ops = cache[key] = Operators(model, grid, deformation if factors is not None else None)
    return ops
