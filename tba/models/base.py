"""Diagonal scattering theories: masses, S-matrices and TBA kernels.

A model is a physics statement and nothing more: it never iterates. For species
a, b = 1..n with masses m_a it provides

    S_ab(t)   = S_ab(0) prod_k (B_k(t) / B_k(0))^{n_ab(k)}     (block content), or a user callable
    phi_ab(t) = -i d/dt log S_ab(t)

over full blocks f_x and half-blocks <x> (`tba.models.blocks`; every block is -1 at t = 0, so
S_ab(0) = +-1 is kept separately as ``sign``), the statistics of the pseudo-energies (fermionic
for every built-in model), which species are each other's antiparticles, the conserved charges
that CDD factors may carry (`tba.models.charges`), and the distance of the kernels' nearest
singularity from the real axis, which sets the grid spacing the trapezoid rule needs.

Massive and massless species. Each species has a chirality: ``massive`` (energy and momentum
m cosh t, m sinh t), ``right`` or ``left`` (massless: (M/2) e^{+t} and +-(M/2) e^{+-t}, with M
the species' entry of ``masses``: a scale, arbitrary for free massless species). In light-cone
form e_a +- p_a = mu_a^+- e^{+-t} with (mu^+, mu^-) = (m, m), (M, 0) or (0, M): the energies
and momenta every solver uses (`energies`, `momenta`). A species may also stand for g_a
identical copies (``multiplicity``; n free bosons are one right and one left species with
g = n): L_b then counts g_b times in every sum over species.

Crossing, S_{a-bar b}(t) = S_ab(i pi - t), is checked for block content: f_x is invariant under
t -> i pi - t and <x> -> -<1-x>, so the half-block content of S_{a-bar b} must be that of S_ab with
x -> 1 - x, and S_{a-bar b}(0) = S_ab(0) (-1)^{N_ab} with N_ab the number of half-blocks (f_x
counting as two). A self-conjugate pair therefore has full blocks only (<x><1-x> = -f_x).
"""

import functools
from dataclasses import dataclass, field
from typing import Callable, Optional

import numpy as np

from tba.models import blocks as _blocks
from tba.models.charges import ExplicitCharges, OddSpins, SpinRule

STATISTICS = ("fermion", "boson")
CHIRALITIES = ("massive", "right", "left")
#: rapidities at which a user's kernel callable is probed when the model is built
_PROBE = np.array([-3.7, -1.1, -0.2, 0.0, 0.45, 1.9, 5.3])


def _finite_positive(name, value):
    if isinstance(value, bool):
        raise TypeError(f"{name} must be a real number, got {value!r}")
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise TypeError(f"{name} must be a real number, got {value!r}") from None
    if not np.isfinite(v) or v <= 0:
        raise ValueError(f"{name} must be finite and positive, got {value!r}")
    return v


def _multiplicity(where, x, mult):
    if isinstance(mult, bool) or not isinstance(mult, (int, np.integer, float, np.floating)):
        raise TypeError(f"{where}: multiplicity of x={x} must be an integer, got {mult!r}")
    if int(mult) != mult:
        raise ValueError(f"{where}: multiplicity of x={x} must be an integer, got {mult!r}")
    return int(mult)


def _content(where, cell):
    """Canonical block content of one S_ab: full blocks f_x (x <= 1/2) as far as the half-blocks
    pair up, the rest as half-blocks."""
    if not hasattr(cell, "items"):
        raise TypeError(f"{where}: expected a dict {{x: multiplicity}}, got {type(cell).__name__}")
    content = {}
    for key, mult in cell.items():
        try:
            k = _blocks.block_key(key)
        except (TypeError, ValueError) as exc:
            raise type(exc)(f"{where}: {exc}") from None
        content[k] = content.get(k, 0) + _multiplicity(where, key, mult)
    paired = _blocks.pair_half_blocks(_blocks.half_content(content))
    return dict(sorted(paired.items(), key=lambda kv: _blocks.key_order(kv[0])))


@dataclass(frozen=True, eq=False)
class DiagonalModel:
    """An integrable theory with diagonal (reflectionless) two-body scattering.

    Parameters
    ----------
    name : str
        Short identifier, used in output files (the name ``--model`` takes).
    masses : sequence of float
        Particle masses; the lightest sets the unit (it should be 1).
    blocks : n x n nested sequence of {key: multiplicity}, optional
        Block content of S_ab: keys are numbers x in (0, 1) for f_x and `HalfBlock` (or
        strings ``"<x>"``) for half-blocks; integer multiplicities (negative ones allowed, e.g.
        sinh-Gordon is 1 / f_(B/2)). Stored in canonical form: <x><1-x> pairs become f_x.
    kernel_function : callable, optional
        Instead of ``blocks``: ``kernel_function(t)`` returning phi_ab(t) with shape
        (n, n) + t.shape. Requires ``pole_distance``.
    pole_distance : float or n x n array, optional
        Distance from the real axis of the nearest singularity of phi_ab (one number for all
        pairs, or one per pair). Computed from the blocks when they are given; required with
        ``kernel_function``. After construction ``pole_distance`` is the smallest one and
        ``pole_distances`` the n x n array.
    sign : n x n array of +-1, optional
        S_ab(0). Default -1 for every pair (true of every block, f_x(0) = -1, and of
        the free fermion). Only excited-state quantisation and `s_matrix` depend on it.
    statistics : "fermion" or "boson"
    coupling : float or None
        The model's own parameter (sinh-Gordon B, sine-Gordon N), recorded in output files.
    bulk_energy_density : float or None
        The vacuum energy per unit length f that the TBA energy E leaves out (the energy
        with the bulk term is E + f R), where it is known; None otherwise.
    description : str
    labels : sequence of str, optional
        A name per species (default "1", "2", ...).
    antiparticle : sequence of int, optional
        ``antiparticle[a]`` is the index of the antiparticle of species a (default: every
        species is its own antiparticle).
    charge_rule : `tba.models.charges.SpinRule`, optional
        The conserved charges CDD factors of spin s > 1 may carry. Default: every odd spin with
        q_s = 1 for one species, spin 1 only for several. Models with massless species take
        spin 1 (TTbar) only.
    chirality : sequence of "massive", "right", "left", optional
        Per species (default: all massive). A massless species' entry of ``masses`` is its
        scale M: driving term (M R / 2) e^{+-t}.
    multiplicity : sequence of positive int, optional
        Identical copies per species (default 1 each).
    """

    name: str
    masses: np.ndarray
    blocks: Optional[tuple] = None
    kernel_function: Optional[Callable] = None
    pole_distance: object = np.inf
    sign: Optional[np.ndarray] = None
    statistics: str = "fermion"
    coupling: Optional[float] = None
    bulk_energy_density: Optional[float] = None
    description: str = ""
    labels: Optional[tuple] = None
    antiparticle: Optional[tuple] = None
    charge_rule: Optional[SpinRule] = None
    chirality: Optional[tuple] = None
    multiplicity: Optional[tuple] = None
    pole_distances: np.ndarray = field(default=None, init=False, repr=False)
    #: (mu^+, mu^-) per species, shape (n, 2): the light-cone masses
    light_cone_masses: np.ndarray = field(default=None, init=False, repr=False)
    #: kappa in |phi_ab(t)| <~ e^{-kappa |t|} for models with massless species and a kernel
    #: (None without a kernel): how far a massless plateau acts through the kernels
    kernel_decay: Optional[float] = field(default=None, init=False, repr=False)
    _massless: bool = field(default=False, init=False, repr=False, compare=False)
    _kernel_cache: dict = field(default_factory=dict, repr=False, compare=False)

    def __post_init__(self):
        try:
            masses = np.atleast_1d(np.asarray(self.masses, dtype=float))
        except (TypeError, ValueError):
            raise TypeError(f"masses must be a sequence of real numbers, got {self.masses!r}") from None
        if masses.ndim != 1 or masses.size == 0:
            raise ValueError("masses must be a non-empty 1-d sequence")
        for m in masses:
            _finite_positive("masses", m)
        n = masses.size
        object.__setattr__(self, "masses", masses)
        if self.statistics not in STATISTICS:
            raise ValueError(f"statistics must be one of {STATISTICS}, got {self.statistics!r}")
        self._set_species(n)
        self._set_chirality(n)
        if (self.blocks is None) == (self.kernel_function is None):
            raise ValueError("give exactly one of blocks and kernel_function")
        sign = -np.ones((n, n)) if self.sign is None else np.asarray(self.sign, dtype=float)
        if sign.shape != (n, n) or not np.all(np.abs(sign) == 1) or not np.array_equal(sign, sign.T):
            raise ValueError(f"sign must be a symmetric {n} x {n} array of +1/-1")
        object.__setattr__(self, "sign", sign)
        if self.blocks is not None:
            self._set_blocks(n)
        else:
            if not callable(self.kernel_function):
                raise TypeError("kernel_function must be callable")
            self._set_pole_distances(n, self.pole_distance)
            self.kernel(_PROBE)  # shape and finiteness, now rather than in the middle of a solve
        if self.is_massless:
            object.__setattr__(self, "kernel_decay", self._kernel_decay())
        rule = self.charge_rule
        if rule is None:
            rule = OddSpins(1) if n == 1 and not self.is_massless else ExplicitCharges({}, n)
        elif not isinstance(rule, SpinRule):
            raise TypeError(f"charge_rule must be a SpinRule, got {type(rule).__name__}")
        elif self.is_massless and rule.as_dict() != ExplicitCharges({}, n).as_dict():
            raise ValueError("charge_rule: models with massless species take spin 1 (TTbar) only")
        object.__setattr__(self, "charge_rule", rule)

    def _set_chirality(self, n):
        kinds = ("massive",) * n if self.chirality is None else tuple(self.chirality)
        if len(kinds) != n:
            raise ValueError(f"chirality: expected {n} entries, got {len(kinds)}")
        for kind in kinds:
            if kind not in CHIRALITIES:
                raise ValueError(f"chirality: each entry must be one of {CHIRALITIES}, got {kind!r}")
        object.__setattr__(self, "chirality", kinds)
        object.__setattr__(self, "_massless", any(k != "massive" for k in kinds))
        if self.multiplicity is None:
            mult = (1,) * n
        else:
            try:
                mult = tuple(self.multiplicity)
            except TypeError:
                raise TypeError(f"multiplicity must be a sequence of positive integers, got "
                                f"{self.multiplicity!r}") from None
            if len(mult) != n or any(isinstance(g, bool) or not isinstance(g, (int, np.integer))
                                     or g < 1 for g in mult):
                raise ValueError(f"multiplicity must list {n} positive integers, got {mult!r}")
            mult = tuple(int(g) for g in mult)
        object.__setattr__(self, "multiplicity", mult)
        m = self.masses
        mu = np.array([[m[a] * (k != "left"), m[a] * (k != "right")] for a, k in enumerate(kinds)])
        mu.setflags(write=False)
        object.__setattr__(self, "light_cone_masses", mu)
        for a, c in enumerate(self.antiparticle):
            if kinds[a] != kinds[c]:
                raise ValueError(f"antiparticle: species {a} and {c} have different chiralities")

    def _set_species(self, n):
        labels = tuple(str(a + 1) for a in range(n)) if self.labels is None else tuple(map(str, self.labels))
        if len(labels) != n:
            raise ValueError(f"labels: expected {n} labels, got {len(labels)}")
        object.__setattr__(self, "labels", labels)
        if self.antiparticle is None:
            conj = tuple(range(n))
        else:
            try:
                conj = tuple(int(c) for c in self.antiparticle)
            except (TypeError, ValueError):
                raise TypeError(f"antiparticle must be a sequence of species indices, got "
                                f"{self.antiparticle!r}") from None
            if len(conj) != n or any(not 0 <= c < n for c in conj):
                raise ValueError(f"antiparticle must list {n} species indices in 0..{n - 1}")
            for a, c in enumerate(conj):
                if conj[c] != a:
                    raise ValueError(f"antiparticle: the antiparticle of species {c} must be {a}")
                if self.masses[c] != self.masses[a]:
                    raise ValueError(f"antiparticle: species {a} and {c} have different masses")
        object.__setattr__(self, "antiparticle", conj)

    def _set_blocks(self, n):
        rows = self.blocks
        try:
            ok = len(rows) == n and all(len(r) == n for r in rows)
        except TypeError:
            ok = False
        if not ok:
            raise ValueError(f"blocks must be an {n} x {n} nested sequence of dicts")
        content = tuple(tuple(_content(f"blocks[{a}][{b}]", rows[a][b]) for b in range(n))
                        for a in range(n))
        for a in range(n):
            for b in range(n):
                if content[a][b] != content[b][a]:
                    raise ValueError(f"blocks must be symmetric: S_{a+1}{b+1} != S_{b+1}{a+1}")
        self._check_crossing(content)
        object.__setattr__(self, "blocks", content)
        dist = np.array([[min((_blocks.key_pole_distance(k) for k in cell), default=np.inf)
                          for cell in row] for row in content])
        self._set_pole_distances(n, dist)

    def _check_crossing(self, content):
        conj = self.antiparticle
        n = len(content)
        full = lambda cell: {k: m for k, m in cell.items() if not isinstance(k, _blocks.HalfBlock)}  # noqa: E731
        for a in range(n):
            for b in range(n):
                if self.chirality[a] != "massive" or self.chirality[b] != "massive":
                    continue  # massless crossing is not t -> i pi - t (docs/physics.md section 9)
                cell, other = content[a][b], content[conj[a]][b]
                crossed = {1 - k.x: m for k, m in cell.items() if isinstance(k, _blocks.HalfBlock)}
                halves = {k.x: m for k, m in other.items() if isinstance(k, _blocks.HalfBlock)}
                if full(cell) != full(other) or crossed != halves:
                    what = ("species are their own antiparticles unless antiparticle= says "
                            "otherwise, so half-blocks <x> must come with <1-x>"
                            if conj[a] == a else f"S_{conj[a]+1}{b+1} must be S_{a+1}{b+1} with x -> 1 - x")
                    raise ValueError(f"blocks: S_{a+1}{b+1} violates crossing S_(a-bar)b(t) = "
                                     f"S_ab(i pi - t): {what}")
                parity = (-1) ** int(sum(halves.values()))  # f_x counts twice: even
                if self.sign[conj[a], b] != self.sign[a, b] * parity:
                    raise ValueError(f"sign: crossing requires S_{conj[a]+1}{b+1}(0) = "
                                     f"{int(self.sign[a, b] * parity):+d} given S_{a+1}{b+1}(0) = "
                                     f"{int(self.sign[a, b]):+d}")

    def _set_pole_distances(self, n, value):
        if np.ndim(value) == 0:
            d = np.full((n, n), _finite_positive("pole_distance", value) if self.blocks is None
                        else float(value))
        else:
            try:
                d = np.asarray(value, dtype=float)
            except (TypeError, ValueError):
                raise TypeError("pole_distance must be a number or an n x n array of numbers") from None
            if d.shape != (n, n):
                raise ValueError(f"pole_distance must be a number or an {n} x {n} array")
            for v in d.ravel():
                if self.blocks is None:
                    _finite_positive("pole_distance", v)
            if not np.array_equal(d, d.T):
                raise ValueError("pole_distance must be symmetric")
        d.setflags(write=False)
        object.__setattr__(self, "pole_distances", d)
        object.__setattr__(self, "pole_distance", float(d.min()))

    @property
    def n_species(self):
        return self.masses.size

    def _kernel_decay(self):
        """1 for block content (every block decays like e^{-|t|}); for a kernel callable the
        rate measured between t = 8 and 16, at most 1; None when every kernel vanishes."""
        if self.blocks is not None:
            return 1.0 if any(cell for row in self.blocks for cell in row) else None
        near, far = np.abs(self.kernel(np.array([8.0, 16.0]))).transpose(2, 0, 1)
        if not np.any(near) and not np.any(far):
            return None
        with np.errstate(divide="ignore"):
            rates = np.log(near[near > 0] / np.maximum(far[near > 0], 1e-300)) / 8.0
        return float(np.clip(rates.min(), 1e-2, 1.0)) if rates.size else 1.0

    # -- energies and momenta of the species ---------------------------------------------------
    @property
    def is_massless(self):
        """True when some species is massless (right or left mover)."""
        return self._massless

    @property
    def massive_mass(self):
        """The smallest mass of the massive species (None if there is none)."""
        m = [self.masses[a] for a, k in enumerate(self.chirality) if k == "massive"]
        return float(min(m)) if m else None

    @property
    def massless_scales(self):
        """((mu^+, mu^-), ...) of the massless species: what the grid rule needs of them."""
        return tuple((float(p), float(q)) for (p, q), k in zip(self.light_cone_masses, self.chirality)
                     if k != "massive")

    @property
    def has_multiplicity(self):
        return any(g != 1 for g in self.multiplicity)

    def energies(self, t):
        """e_a(t): m_a cosh t, (M_a / 2) e^t (right), (M_a / 2) e^{-t} (left); shape (n,) + t.shape."""
        return self._light_cone(t, +1)

    def momenta(self, t):
        """p_a(t): m_a sinh t, (M_a / 2) e^t (right), -(M_a / 2) e^{-t} (left)."""
        return self._light_cone(t, -1)

    def _light_cone(self, t, sign):
        t = np.asarray(t, dtype=float)
        if not self.is_massless:  # m cosh t, m sinh t exactly as the massive solvers always had
            return np.multiply.outer(self.masses, np.cosh(t) if sign > 0 else np.sinh(t))
        mu = self.light_cone_masses
        ep, em = 0.5 * np.exp(t), 0.5 * np.exp(-t)
        out = np.empty((self.n_species,) + t.shape)
        for a, kind in enumerate(self.chirality):
            if kind == "massive":
                out[a] = self.masses[a] * (np.cosh(t) if sign > 0 else np.sinh(t))
            else:
                out[a] = mu[a, 0] * ep + sign * mu[a, 1] * em
        return out

    def ttbar_phase(self, t):
        """The TTbar phase per unit coupling, p_a e_b - e_a p_b at rapidity difference t,
        = (mu_a^+ mu_b^- e^t - mu_a^- mu_b^+ e^{-t}) / 2: m_a m_b sinh t for massive pairs,
        (M_a M_b / 2) e^t for a right mover a and a left mover b, 0 for two right movers
        (docs/physics.md section 9). Shape (n, n) + t.shape; complex t continues it."""
        t = np.asarray(t)
        t = t if np.iscomplexobj(t) else t.astype(float)
        if not self.is_massless:
            return np.multiply.outer(np.outer(self.masses, self.masses), np.sinh(t))
        mu = self.light_cone_masses
        return 0.5 * (np.multiply.outer(np.outer(mu[:, 0], mu[:, 1]), np.exp(t))
                      - np.multiply.outer(np.outer(mu[:, 1], mu[:, 0]), np.exp(-t)))

    # -- kernels and S-matrices --------------------------------------------------------------
    def kernel(self, t):
        """phi_ab(t), shape (n, n) + t.shape."""
        t = np.asarray(t, dtype=float)
        n = self.n_species
        if self.kernel_function is not None:
            try:
                out = np.asarray(self.kernel_function(t), dtype=float)
            except (TypeError, ValueError) as exc:
                raise ValueError(f"kernel: the callable failed on a float array: {exc}") from None
            except ArithmeticError as exc:  # ZeroDivisionError, OverflowError, ...
                raise ValueError(f"kernel: the callable raised {type(exc).__name__} on a float "
                                 f"array: {exc}") from None
            if out.shape != (n, n) + t.shape:
                raise ValueError(f"kernel: the callable returned shape {out.shape}, expected "
                                 f"{(n, n) + t.shape}")
            bad = ~np.isfinite(out)
            if bad.any():
                where = t[tuple(np.nonzero(bad)[2:])][0] if t.ndim else float(t)
                raise ValueError(f"kernel: the callable returned a non-finite value "
                                 f"({out[bad][0]}) at t = {where:.6g}")
            return out
        # each distinct block once, combined with the multiplicity matrix of every pair
        keys = sorted({k for row in self.blocks for c in row for k in c}, key=_blocks.key_order)
        out = np.zeros((n, n) + t.shape)
        for key in keys:
            mult = np.array([[c.get(key, 0) for c in row] for row in self.blocks], dtype=float)
            out += mult.reshape((n, n) + (1,) * t.ndim) * _blocks.key_kernel(key, t)
        return out

    @property
    def kernel_integrals(self):
        """int phi_ab(t) dt, n x n (exact for blocks, adaptive quadrature for a kernel callable)."""
        if self.blocks is not None:
            return np.array([[sum(m * _blocks.key_integral(k) for k, m in cell.items())
                              for cell in row] for row in self.blocks], dtype=float)
        from scipy import integrate  # only for kernel callables: keeps import tba light

        n = self.n_species
        out = np.empty((n, n))
        for a in range(n):
            for b in range(a, n):
                value = sum(integrate.quad(lambda t: float(self.kernel(np.array([t]))[a, b, 0]),
                                           lo, hi, limit=400)[0]
                            for lo, hi in ((-np.inf, 0.0), (0.0, np.inf)))
                out[a, b] = out[b, a] = value
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
        out = np.zeros((n, n) + k.shape)
        for key, mult in self._block_table:
            out += mult.reshape((n, n) + (1,) * k.ndim) * _blocks.key_transform(key, k)
        return out

    @functools.cached_property
    def _block_table(self):
        """((key, multiplicity matrix), ...) over the distinct blocks, in canonical order:
        built once (hashing the Fraction keys of every cell cost more than the transforms)."""
        n = self.n_species
        table = {}
        for a, row in enumerate(self.blocks):
            for b, cell in enumerate(row):
                for key, m in cell.items():
                    mult = table.get(key)
                    if mult is None:
                        mult = table[key] = np.zeros((n, n))
                    mult[a, b] += m
        return tuple((key, table[key]) for key in sorted(table, key=_blocks.key_order))

    def s_matrix(self, t):
        """S_ab(t) for block models, shape (n, n) + t.shape (complex); t may be complex."""
        if self.blocks is None:
            raise NotImplementedError("s_matrix is only available for models given by blocks")
        if self.is_massless:
            raise NotImplementedError("s_matrix: the blocks of a massless pair fix S up to a "
                                      "constant phase (only the kernel is used); see the model's "
                                      "description")
        t = np.asarray(t)
        n = self.n_species
        out = np.ones((n, n) + t.shape, dtype=complex)
        for a in range(n):
            for b in range(n):
                nblocks = sum(abs(k) for k in self.blocks[a][b].values())
                # each block is -1 at t = 0; sign_ab fixes S_ab(0) overall
                out[a, b] = self.sign[a, b] * (-1) ** nblocks
                for key, mult in self.blocks[a][b].items():
                    out[a, b] *= _blocks.key_s(key, t) ** mult
        return out

    # -- conserved charges ---------------------------------------------------------------------
    def charges(self, spin):
        """q_s^a for every species: the masses for s = 1; for s > 1 the eigenvalues of the
        spin-s conserved charge (`tba.models.charges`: built-in rules normalise them to 1 on
        the lightest species that carries the charge).

        Raises ValueError naming the allowed spins when the model has no such charge."""
        if isinstance(spin, bool) or not isinstance(spin, (int, np.integer)) or spin < 1:
            raise ValueError(f"spin must be a positive integer, got {spin!r}")
        if spin == 1:
            return self.masses.copy()
        why = self.charge_rule.refusal(int(spin))
        if why is not None:
            raise ValueError(f"spin {spin}: {self.name} has no spin-{spin} charge; {why}")
        return np.array(self.charge_rule.vector(int(spin)), dtype=float)

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
             "bulk_energy_density": self.bulk_energy_density, "labels": list(self.labels),
             "antiparticle": list(self.antiparticle), "spins": self.charge_rule.describe()}
        if self.blocks is not None:
            d["blocks"] = [[{str(x): k for x, k in c.items()} for c in row] for row in self.blocks]
            d["sign"] = self.sign.astype(int).tolist()
        if self.is_massless or self.has_multiplicity:
            d["chirality"] = list(self.chirality)
            d["multiplicity"] = list(self.multiplicity)
        return d


def kernel_tails(blocks):
    """C_ab in phi_ab(t) ~ -C_ab e^{-|t|} at large |t|, from block content (n x n)."""
    return np.array([[sum(m * _blocks.block_tail(k) for k, m in cell.items()) for cell in row]
                     for row in blocks], dtype=float)


def bulk_energy_density(masses, blocks):
    """The bulk energy density the TBA leaves out, from the kernels' tails.

    When every kernel decays like phi_ab(t) ~ -C_ab e^{-|t|} with C_ab = kappa m_a m_b (the pole
    of phit_ab(k) at k = +-i has a residue proportional to m_a m_b), the ground-state TBA energy
    at small R contains -f R with f = -1 / (2 kappa), i.e. f = -m_1^2 / (2 C_11)
    (Al.B. Zamolodchikov, Nucl. Phys. B342 (1990) 695 for Lee-Yang, f = -m^2 / (4 sqrt 3); from
    memory). Returns None when the tails vanish (free particles: f R is not linear in R) or are
    not proportional to m_a m_b.
    """
    masses = np.asarray(masses, dtype=float)
    kappa = kernel_tails(blocks) / np.outer(masses, masses)
    if not np.all(kappa > 0) or np.ptp(kappa) > 1e-9 * kappa.max():
        return None
    return float(-1.0 / (2.0 * kappa[0, 0]))
