"""Compiled inner loops of the TBA solver.

Plain numba routines on numpy arrays. This package imports nothing from ``tba``:
it knows grids, arrays and kernels, not models or physics conventions.
Every routine is compiled with ``cache=True`` so that a second process loads it
from disk instead of recompiling, and each has a slow numpy twin in
``tests/test_kernels.py``.
"""

from kernels.statistics import occupation_terms
from kernels.convolution import (
    block_toeplitz_matrix,
    block_toeplitz_matvec,
    SpectralConvolver,
)

__all__ = [
    "occupation_terms",
    "block_toeplitz_matrix",
    "block_toeplitz_matvec",
    "SpectralConvolver",
]
