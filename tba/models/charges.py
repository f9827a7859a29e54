"""Conserved charges of the models: which CDD spins they allow, and the eigenvalues q_s^a.

A spin-s CDD factor multiplies S_ab(t) by exp(i alpha_s q_s^a q_s^b sinh(s t)), where q_s^a is the
eigenvalue of the spin-s conserved charge on a one-particle state of species a (I_s |t>_a =
q_s^a e^{st} |t>_a). Such a factor keeps the S-matrix consistent (unitarity, crossing and the
bootstrap) exactly when q_s is a conserved charge of the theory:

* crossing, S_{a-bar b}(t) = S_ab(i pi - t), with sinh(s(i pi - t)) = (-1)^(s+1) sinh(s t) needs
  q_s^{a-bar} = (-1)^(s+1) q_s^a; so a single self-conjugate species has odd spins only;
* the bootstrap: a bound state c of a and b (a at t + i alpha, b at t - i beta) has
  q_s^c = q_s^a e^{i s alpha} + q_s^b e^{-i s beta}.

Rules (`SpinRule`):

* `OddSpins`: one species (free fermion, sinh-Gordon, user models): every odd s, q_s = 1.
* `SpectralCharges` (ADE and tadpole theories, incidence matrix I, Coxeter number h): the
  driving term q^a cosh(s t) of a spin-s factor survives the Y-system
  Y_a(t + i pi/h) Y_a(t - i pi/h) = prod_b (1 + Y_b)^{I_ab} only if
  q^a cosh(s(t + i pi/h)) + q^a cosh(s(t - i pi/h)) = sum_b I_ab q^b cosh(s t), that is
  I q_s = 2 cos(pi s / h) q_s: the spins are those s with 2 cos(pi s / h) an eigenvalue of I (the
  exponents of the algebra, repeated with period 2h), and q_s is that eigenvector (Braden,
  Corrigan, Dorey and Sasaki, Nucl. Phys. B338 (1990) 689; Klassen and Melzer, Nucl. Phys. B338
  (1990) 485). A doubly degenerate eigenvalue (the exponent h/2 of D_n, n even) has two
  independent charges; that spin is not offered.
* `SineGordonCharges`: sine-Gordon at its reflectionless points: odd spins; q_s = 1 on the
  soliton and the antisoliton, q_s = 2 (-1)^((s-1)/2) sin(n s pi / 2N) on the breather B_n, the
  bound state of soliton and antisoliton at t = +-i u_n/2, u_n = pi (1 - n/N), by the rule above.
* `ExplicitCharges`: user models with several species: spin 1 and the charges the user gives.

Normalisation (decision): q_1 = masses; for s > 1 the built-in rules set q_s = 1 on the first
species (in mass order) that carries the charge: species 1 in almost every case, the spinor of
D_n for the spin-(n-1) charge of D_odd (zero on the vector particles). User charges are taken
as given.
"""

import math

import numpy as np

#: two eigenvalues of an incidence matrix closer than this are one eigenvalue
_EIGEN_TOL = 1e-9


def _normalised(q):
    """q / q_a for the first a with q_a != 0 (relative to the largest component)."""
    q = np.asarray(q, dtype=float)
    first = np.flatnonzero(np.abs(q) > 1e-12 * np.max(np.abs(q)))[0]
    out = q / q[first]
    out[np.abs(out) <= 1e-12] = 0.0
    return out


class SpinRule:
    """Which spins s a model's CDD factors may have, and the charge vectors."""

    #: spins are allowed when s mod modulus is in residues (modulus None: exactly `residues`)
    modulus = None
    residues = (1,)

    def allows(self, spin):
        if self.modulus is None:
            return spin in self.residues
        return spin % self.modulus in self.residues

    def vector(self, spin):
        """The charge vector q_s (one entry per species)."""
        raise NotImplementedError

    def refusal(self, spin):
        """Why ``spin`` is not allowed (one phrase), or None."""
        return None if self.allows(spin) else f"allowed spins are {self.describe()}"

    def describe(self):
        """The allowed spins in words, e.g. ``s = 1, 7, 11, 13, 17, 19, 23, 29 (mod 30)``."""
        listed = ", ".join(map(str, self.residues))
        if self.modulus is None:
            return f"s = {listed}"
        if self.modulus == 2:
            return "odd s"
        return f"s = {listed} (mod {self.modulus})"

    def as_dict(self):
        return {"modulus": self.modulus, "residues": list(self.residues)}


class OddSpins(SpinRule):
    """One self-conjugate species: every odd spin, q_s = 1."""

    modulus = 2
    residues = (1,)

    def __init__(self, n_species=1):
        self.n = n_species

    def vector(self, spin):
        return np.ones(self.n)


class ExplicitCharges(SpinRule):
    """Spin 1 plus the charges a user gives, ``{spin: [q_1, ..., q_n]}``."""

    def __init__(self, charges, n_species):
        clean = {}
        for spin, q in dict(charges).items():
            if isinstance(spin, bool) or not isinstance(spin, (int, np.integer)) or spin < 2:
                raise ValueError(f"charges: spins must be integers >= 2 (spin 1 is the masses), "
                                 f"got {spin!r}")
            try:
                vec = np.asarray(q, dtype=float)
            except (TypeError, ValueError):
                raise TypeError(f"charges[{spin}]: expected {n_species} real numbers, got {q!r}") from None
            if vec.shape != (n_species,) or not np.all(np.isfinite(vec)):
                raise ValueError(f"charges[{spin}]: expected {n_species} finite numbers, got {q!r}")
            clean[int(spin)] = vec
        self.charges = clean
        self.residues = tuple(sorted({1, *clean}))

    def vector(self, spin):
        return self.charges[spin]


class SpectralCharges(SpinRule):
    """ADE and tadpole theories: q_s is the eigenvector of the incidence matrix with eigenvalue
    2 cos(pi s / h); the species are the rows of ``incidence``."""

    def __init__(self, incidence, coxeter):
        self.h = int(coxeter)
        self.evals, self.evecs = np.linalg.eigh(np.asarray(incidence, dtype=float))
        allowed, self.degenerate = [], []
        for r in range(1, 2 * self.h):
            count = self._matches(r).size
            if count == 1:
                allowed.append(r)
            elif count > 1:
                self.degenerate.append(r)
        # bipartite diagrams have a spectrum symmetric about 0: the residues repeat after h
        shifted = {(r + self.h) % (2 * self.h) for r in allowed}
        if shifted == set(allowed):
            self.modulus = self.h
            allowed = sorted({r % self.h for r in allowed})
        else:
            self.modulus = 2 * self.h
        self.residues = tuple(allowed)

    def _matches(self, spin):
        return np.flatnonzero(np.abs(self.evals - 2 * math.cos(math.pi * spin / self.h)) < _EIGEN_TOL)

    def refusal(self, spin):
        if self.allows(spin):
            return None
        if spin % (2 * self.h) in self.degenerate:
            return (f"there are two independent spin-{spin} charges (a doubly degenerate "
                    f"exponent), so a CDD factor of that spin is not offered; allowed spins are "
                    f"{self.describe()}")
        return f"allowed spins are {self.describe()}"

    def vector(self, spin):
        (k,) = self._matches(spin)
        return _normalised(self.evecs[:, k])


class SineGordonCharges(SpinRule):
    """Sine-Gordon at the reflectionless point N: odd spins; ``breathers[a]`` is n for the
    breather B_n and 0 for the soliton and the antisoliton."""

    modulus = 2
    residues = (1,)

    def __init__(self, N, breathers):
        self.N = int(N)
        self.breathers = tuple(int(n) for n in breathers)

    def vector(self, spin):
        sign = (-1) ** ((spin - 1) // 2)
        return _normalised([1.0 if n == 0 else 2 * sign * math.sin(n * spin * math.pi / (2 * self.N))
                            for n in self.breathers])
