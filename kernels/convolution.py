"""Discrete convolution of a translation-invariant kernel with functions on a uniform grid.

On a uniform grid t_i = t_0 + i h (i = 0..N-1) the trapezoid rule turns

    (K * f)(t_i) = sum_b int K_ab(t_i - t') f_b(t') dt'

into a block-Toeplitz product. The kernel is passed as samples on all offsets,
``kern[a, b, N - 1 + k] = h * K_ab(k h)`` for k = -(N-1)..(N-1), so that

    out[a, i] = sum_b sum_j kern[a, b, N - 1 + i - j] * f[b, j].

Three forms: the dense matrix (``block_toeplitz_matrix``, which the solver multiplies
and factorises for small systems), an FFT product (``SpectralConvolver``, O(N log N), for
large ones: the crossover ``DENSE_LIMIT`` in ``tba.solvers.ground`` was measured), and a direct
compiled loop (``block_toeplitz_matvec``), the plain reference the other two are tested
against.
"""

import numba
import numpy as np
from scipy import fft as _fft


@numba.njit(cache=True, parallel=True, nogil=True)
def block_toeplitz_matvec(kern, f, out):
    """``out[a, i] = sum_b sum_j kern[a, b, N-1+i-j] f[b, j]`` (direct summation)."""
    n, N = f.shape
    for ai in numba.prange(n * N):
        a = ai // N
        i = ai % N
        acc = 0.0
        for b in range(n):
            off = N - 1 + i
            for j in range(N):
                acc += kern[a, b, off - j] * f[b, j]
        out[a, i] = acc
    return out


@numba.njit(cache=True, nogil=True)
def block_toeplitz_matrix(kern, N):
    """The dense (n N) x (n N) matrix of ``block_toeplitz_matvec`` (row a*N + i, column b*N + j)."""
    n = kern.shape[0]
    M = np.empty((n * N, n * N))
    for a in range(n):
        for b in range(n):
            for i in range(N):
                for j in range(N):
                    M[a * N + i, b * N + j] = kern[a, b, N - 1 + i - j]
    return M


class SpectralConvolver:
    """Apply the block-Toeplitz product through real FFTs of length >= 2N - 1.

    The kernel spectra are computed once; each product then costs n forward and
    n inverse transforms plus an n x n complex matrix product per frequency.
    """

    def __init__(self, kern):
        n, n2, width = kern.shape
        if n != n2 or width % 2 != 1:
            raise ValueError("kern must have shape (n, n, 2N-1)")
        self.n = n
        self.N = (width + 1) // 2
        self.size = _fft.next_fast_len(width, real=True)
        spectra = _fft.rfft(kern, self.size, axis=-1)
        # (freq, a, b) layout makes the per-frequency product a batched matmul.
        self._spectra = np.ascontiguousarray(np.moveaxis(spectra, -1, 0))

    def __call__(self, f, out=None):
        F = _fft.rfft(f, self.size, axis=-1)  # (n, freq)
        G = np.matmul(self._spectra, F.T[:, :, None])[:, :, 0].T
        full = _fft.irfft(G, self.size, axis=-1)
        N = self.N
        if out is None:
            return np.ascontiguousarray(full[:, N - 1 : 2 * N - 1])
        out[...] = full[:, N - 1 : 2 * N - 1]
        return out
