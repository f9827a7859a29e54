"""Diagonal scattering theories: masses, S-matrices and TBA kernels.

A model is a physics statement and nothing more: it never iterates. For species
a, b = 1..n with masses m_a it provides

    S_ab(t)   = sign_ab * prod_x f_x(t)^{n_ab(x)}        (block content), or a user callable
    phi_ab(t) = -i d/dt log S_ab(t)

the statistics of the pseudo-energies (fermionic for every built-in model) and the
distance of the kernels' nearest singularity from the real axis, which sets the grid
spacing the trapezoid rule needs.
"""

from dataclasses import dataclass, field
from fractions import Fraction
from typing import Callable, Mapping, Optional

import numpy as np

from tba.models import blocks as _blocks

STATISTICS = ("fermion", "boson")


def _finite_positive(name, value):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise TypeError(f"{name} must be a real number, got {value!r}") from None
    if not np.isfinite(v) or v <= 0:
        raise ValueError(f"{name} must be finite and positive, got {value!r}")
    return v


@dataclass(frozen=True, eq=False)
class DiagonalModel:
    """An integrable theory with diagonal (reflectionless) two-body scattering.

    Parameters
    ----------
    name : str
        Short identifier, used in output files.
    masses : sequence of float
        Particle masses; the lightest sets the unit (it should be 1).
    blocks : n x n nested sequence of {x: multiplicity}, optional
        Block content of S_ab = sign_ab prod_x f_x^{n_ab(x)}; x in (0, 1), integer
        multiplicities (negative ones allowed, e.g. sinh-Gordon is 1 / f_(B/2)).
    kernel_function : callable, optional
        Instead of ``blocks``: ``kernel_function(t)`` returning phi_ab(t) with shape
        (n, n) + t.shape. Requires ``pole_distance``.
    pole_distance : float, optional
        Distance from the real axis of the nearest singularity of any phi_ab. Computed
        from the blocks when they are given; required with ``kernel_function``.
    sign : n x n array of +-1, optional
        S_ab(0). Default -1 for every pair (true of every block, f_x(0) = -1, and of
        the free fermion). Only the excited-state quantisation depends on it.
    statistics : "fermion" or "boson"
    coupling : float or None
        The model's own coupling (sinh-Gordon B), recorded in output files.
    bulk_energy_density : float or None
        The vacuum energy per unit length that the TBA energy E_0 leaves out (E = E_0 + f R),
        where it is known; None otherwise.
    description : str
    """

    name: str
    masses: np.ndarray
    blocks: Optional[tuple] = None
    kernel_function: Optional[Callable] = None
    pole_distance: float = np.inf
    sign: Optional[np.ndarray] = None
    statistics: str = "fermion"
    coupling: Optional[float] = None
    bulk_energy_density: Optional[float] = None
    description: str = ""
    _kernel_cache: dict = field(default_factory=dict, repr=False, compare=False)

    def __post_init__(self):
        masses = np.atleast_1d(np.asarray(self.masses, dtype=float))
        if masses.ndim != 1 or masses.size == 0:
            raise ValueError("masses must be a non-empty 1-d sequence")
        for m in masses:
            _finite_positive("masses", m)
        n = masses.size
        object.__setattr__(self, "masses", masses)
        if self.statistics not in STATISTICS:
            raise ValueError(f"statistics must be one of {STATISTICS}, got {self.statistics!r}")
        if (self.blocks is None) == (self.kernel_function is None):
            raise ValueError("give exactly one of blocks and kernel_function")
        if self.blocks is not None:
            rows = []
            if len(self.blocks) != n or any(len(r) != n for r in self.blocks):
                raise ValueError(f"blocks must be an {n} x {n} nested sequence of dicts")
            for a in range(n):
                row = []
                for b in range(n):
                    content = {}
                    for x, mult in dict(self.blocks[a][b]).items():
                        if int(mult) != mult:
                            raise ValueError(f"blocks[{a}][{b}]: multiplicity of x={x} must be an integer")
                        key = _blocks.normalise_x(x)
                        content[key] = content.get(key, 0) + int(mult)
                    row.append({x: k for x, k in content.items() if k != 0})
                rows.append(tuple(row))
            for a in range(n):
                for b in range(n):
                    if rows[a][b] != rows[b][a]:
                        raise ValueError(f"blocks must be symmetric: S_{a+1}{b+1} != S_{b+1}{a+1}")
            object.__setattr__(self, "blocks", tuple(rows))
            xs = [x for r in rows for c in r for x in c]
            object.__setattr__(self, "pole_distance",
                               min((_blocks.pole_distance(x) for x in xs), default=np.inf))
        else:
            if not callable(self.kernel_function):
                raise TypeError("kernel_function must be callable")
            _finite_positive("pole_distance", self.pole_distance)
        sign = -np.ones((n, n)) if self.sign is None else np.asarray(self.sign, dtype=float)
        if sign.shape != (n, n) or not np.all(np.abs(sign) == 1):
            raise ValueError(f"sign must be an {n} x {n} array of +1/-1")
        object.__setattr__(self, "sign", sign)

    @property
    def n_species(self):
        return self.masses.size

    def kernel(self, t):
        """phi_ab(t), shape (n, n) + t.shape."""
        t = np.asarray(t, dtype=float)
        n = self.n_species
        if self.kernel_function is not None:
            out = np.asarray(self.kernel_function(t), dtype=float)
            if out.shape != (n, n) + t.shape:
                raise ValueError(f"kernel_function returned shape {out.shape}, expected {(n, n) + t.shape}")
            return out
        # each distinct block once, combined with the multiplicity matrix of every pair
        xs = sorted({x for row in self.blocks for c in row for x in c}, key=float)
        out = np.zeros((n, n) + t.shape)
        for x in xs:
            mult = np.array([[c.get(x, 0) for c in row] for row in self.blocks], dtype=float)
            out += mult.reshape((n, n) + (1,) * t.ndim) * _blocks.block_kernel(x, t)
        return out

    @property
    def has_kernel_transform(self):
        """True when `kernel_transform` is known in closed form (block models)."""
        return self.blocks is not None

    def kernel_transform(self, k):
        """int e^{ikt} phi_ab(t) dt, shape (n, n) + k.shape (real: the kernels are even).

        Known in closed form for block models; the solvers use it to discretise the kernels
        band-limited, so that their poles do not set the grid spacing. Raises
        NotImplementedError for a kernel callable."""
        if not self.has_kernel_transform:
            raise NotImplementedError("kernel_transform: not known for a kernel callable")
        k = np.asarray(k, dtype=float)
        n = self.n_species
        xs = sorted({x for row in self.blocks for c in row for x in c}, key=float)
        out = np.zeros((n, n) + k.shape)
        for x in xs:
            mult = np.array([[c.get(x, 0) for c in row] for row in self.blocks], dtype=float)
            out += mult.reshape((n, n) + (1,) * k.ndim) * _blocks.block_transform(x, k)
        return out

    def s_matrix(self, t):
        """S_ab(t) for block models, shape (n, n) + t.shape (complex)."""
        if self.blocks is None:
            raise NotImplementedError("s_matrix is only available for models given by blocks")
        t = np.asarray(t, dtype=float)
        n = self.n_species
        out = np.ones((n, n) + t.shape, dtype=complex)
        for a in range(n):
            for b in range(n):
                nblocks = sum(abs(k) for k in self.blocks[a][b].values())
                # each block is -1 at t = 0; sign_ab fixes S_ab(0) overall
                out[a, b] = self.sign[a, b] * (-1) ** nblocks
                for x, mult in self.blocks[a][b].items():
                    out[a, b] *= _blocks.block_s(x, t) ** mult
        return out

    # -- what excited states with real rapidities need (single species, block models) ----
    def _block_sum(self, fn, u):
        u = np.asarray(u, dtype=float)
        out = np.zeros(u.shape)
        for x, mult in self.blocks[0][0].items():
            out += mult * fn(x, u)
        return out

    def source(self, u):
        """Real part of log S(u - i pi/2) (the constant log S(-i pi/2 + ...) sign is separate)."""
        return self._block_sum(_blocks.block_source, u)

    def shifted_kernel(self, u):
        """psi(u) = phi(u + i pi/2) / i = d/du of `source`."""
        return self._block_sum(_blocks.block_kernel_shifted, u)

    def shifted_kernel_derivative(self, u):
        return self._block_sum(_blocks.block_kernel_shifted_derivative, u)

    def phase(self, u):
        """delta(u) = -i log(-S(u)): odd, delta(0) = 0 (models with S(0) = -1), delta' = phi."""
        return self._block_sum(_blocks.block_phase, u)

    @property
    def source_sign(self):
        """kappa = S(u - i pi/2) / exp(source(u)) = S(0) (-1)^(number of blocks): +1 or -1."""
        nblocks = sum(abs(k) for k in self.blocks[0][0].values())
        return int(self.sign[0, 0]) * (-1) ** nblocks

    @property
    def has_bound_states(self):
        """A block with positive multiplicity puts a pole of S in the physical strip."""
        return any(k > 0 for row in self.blocks for c in row for k in c.values())

    @property
    def excited_strip(self):
        """Distance from the real axis of the nearest singularity of psi and of the sources:
        pi/2 - pi x over the blocks (x <= 1/2); infinite without blocks."""
        xs = [float(x) for x in self.blocks[0][0]]
        return min((np.pi / 2 - np.pi * x for x in xs), default=np.inf)

    def describe(self):
        """A JSON-ready summary written into output files."""
        d = {"name": self.name, "masses": self.masses.tolist(), "statistics": self.statistics,
             "pole_distance": float(self.pole_distance), "coupling": self.coupling,
             "bulk_energy_density": self.bulk_energy_density}
        if self.blocks is not None:
            d["blocks"] = [[{str(x): k for x, k in c.items()} for c in row] for row in self.blocks]
        return d
