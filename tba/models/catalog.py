"""The built-in models, the registry of their names, and a constructor for user-defined ones.

Names (what ``--model`` and run files take), one canonical name per model:

* ``free-fermion`` (= A1), ``sinh-gordon`` (coupling B in (0, 2)), ``lee-yang`` (= T1),
  ``ising-e8`` (= E8), ``potts-3`` (= A2, scaling 3-state Potts), ``tricritical-ising``
  (= E7, thermal perturbation), ``tricritical-potts-3`` (= E6), ``sine-gordon`` (coupling N:
  the reflectionless point beta^2 = 8 pi / (N + 1), N = 1..40);
* massless models (`tba.models.massless`): ``massless-fermion`` (c = 1/2), ``massless-bosons``
  (coupling n: n free bosons, c = n, n = 1..1024), ``tricritical-to-ising`` (the massless flow
  from c = 7/10 to c = 1/2);
* the ADE families by their algebra names: ``A<n>`` (n = 1..40), ``D<n>`` (n = 4..40), ``E6``,
  ``E7``, ``E8`` and the tadpoles ``T<n>`` (n = 1..40), case-insensitive. An algebra name with a
  physical name (A1, A2, E6, E7, E8, T1) builds that model, which keeps its physical name.

`get_model` validates a name and a coupling and raises `ModelError` (a ValueError naming the
argument, ``model`` or ``coupling``); `model_names` lists what ``tba models`` shows; ``MODELS``
is a read-only view of the registry (``name in MODELS`` accepts every valid name, iterating gives
`model_names`); ``MODELS_WITH_COUPLING`` the canonical names that take a coupling.
"""

import functools
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from fractions import Fraction
from typing import Callable, Optional

import numpy as np

from tba.models import sine_gordon as _sg
from tba.models.ade import a_incidence, ade_theory, d_incidence, e_incidence, tadpole_incidence
from tba.models.base import DiagonalModel, bulk_energy_density
from tba.models.charges import ExplicitCharges, OddSpins
from tba.models.massless import MAX_BOSONS, massless_bosons, massless_fermion, tricritical_to_ising
from tba.models.uv import uv_central_charge

#: the largest rank of the infinite families A_n, D_n, T_n (generation is cheap; the TBA grid
#: grows like the number of species times the Coxeter number)
MAX_RANK = 40
#: the members of each infinite family that the listing shows (`model_names`)
LISTED_RANKS = {"A": range(1, 9), "D": range(4, 9), "T": range(1, 5)}


class ModelError(ValueError):
    """A bad model name or coupling; ``argument`` is "model" or "coupling"."""

    def __init__(self, argument, reason):
        super().__init__(f"{argument}: {reason}")
        self.argument, self.reason = argument, reason


def free_fermion():
    """Free Majorana fermion (Ising field theory, thermal perturbation; the A_1 theory):
    S = -1, phi = 0, c = 1/2.

    The TBA is solved in closed form: E_0(R) = -(1/pi) sum_k (-1)^(k+1) K_1(k R) / k.
    """
    return DiagonalModel(name="free-fermion", masses=[1.0], blocks=(({},),),
                         description="free Majorana fermion, S = -1 (A1)")


def sinh_gordon(B):
    """sinh-Gordon model with coupling B in (0, 2) (self-dual point B = 1).

    S(t) = (sinh t - i sin(pi B/2)) / (sinh t + i sin(pi B/2)) = 1 / f_(B/2)(t),
    phi(t) = 2 sin(pi B/2) cosh t / (sinh^2 t + sin^2(pi B/2)), invariant under B -> 2 - B.
    c_eff -> 1 as R -> 0, logarithmically slowly. Bulk energy density m^2 / (8 sin(pi B/2)).
    """
    B = _coupling_in_open_interval(B)
    # keep B/2 exact when B is a short decimal, so that B and 2 - B give the same block
    exact = Fraction(B).limit_denominator(10**12)
    x = exact / 2 if float(exact) == B else B / 2
    return DiagonalModel(name="sinh-gordon", masses=[1.0], blocks=(({x: -1},),), coupling=B,
                         bulk_energy_density=1.0 / (8.0 * math.sin(math.pi * B / 2)),
                         description=f"sinh-Gordon, B = {B!r}")


def sine_gordon(N):
    """Sine-Gordon at the reflectionless point N (beta^2 = 8 pi / (N + 1), N = 1, 2, ...):
    soliton, antisoliton and N - 1 breathers of masses 2 M sin(n pi / 2N), scattering diagonally
    (`tba.models.sine_gordon`). c_eff = 1. N = 1 is a free Dirac fermion."""
    N = _sg.check_point(N)
    masses, blocks, sign, conj, labels, _ = _sg.scattering(N)
    return DiagonalModel(name="sine-gordon", masses=masses, blocks=blocks, sign=sign,
                         antiparticle=conj, labels=labels, coupling=N,
                         charge_rule=_sg.charge_rule(N),
                         bulk_energy_density=_sg.bulk_energy_density(N),
                         description=f"sine-Gordon at the reflectionless point N = {N} "
                                     f"(beta^2 = 8 pi / {N + 1}), {N - 1} breathers")


#: algebra -> (canonical physical name, description)
_PHYSICAL = {
    "A1": ("free-fermion", "free Majorana fermion, S = -1 (A1)"),
    "A2": ("potts-3", "scaling 3-state Potts model (thermal perturbation), A2"),
    "E6": ("tricritical-potts-3", "tricritical 3-state Potts model (thermal perturbation), E6"),
    "E7": ("tricritical-ising", "tricritical Ising model, thermal perturbation, E7"),
    "E8": ("ising-e8", "E8 scaling Ising model, 8 particles"),
    "T1": ("lee-yang", "scaling Lee-Yang model, S = f_(2/3) (T1)"),
}
_INCIDENCE = {"A": a_incidence, "D": d_incidence, "E": e_incidence, "T": tadpole_incidence}
_FAMILY_TEXT = {
    "A": "A{n}: Z_{m} parafermions perturbed by their first thermal operator",
    "D": "D{n}: minimal D-series theory",
    "T": "T{n}: non-unitary minimal model M(2, {m}) perturbed by phi_13",
}


def _family_member(kind, n):
    """(algebra name, rank) check: A_n n >= 1, D_n n >= 4, E_6..8, T_n n >= 1, ranks <= MAX_RANK."""
    lo, hi = {"A": (1, MAX_RANK), "D": (4, MAX_RANK), "E": (6, 8), "T": (1, MAX_RANK)}[kind]
    if not lo <= n <= hi:
        raise ModelError("model", f"{kind}{n} does not exist here ({kind}<n> takes n = {lo}..{hi})")
    return f"{kind}{n}"


def ade_model(algebra):
    """The minimal purely elastic theory of a Dynkin diagram (A<n>, D<n>, E6, E7, E8) or tadpole
    (T<n>): masses, blocks, S_ab(0), antiparticles and charges from `tba.models.ade`. Models with
    a physical name (see ``_PHYSICAL``) carry it; the others are named by the algebra."""
    kind, n = _split_algebra(algebra)
    algebra = _family_member(kind, n)
    theory = ade_theory(_INCIDENCE[kind](n))
    name, description = _PHYSICAL.get(algebra, (algebra, None))
    if description is None:
        description = _FAMILY_TEXT[kind].format(n=n, m={"A": n + 1, "T": 2 * n + 3}.get(kind))
    blocks = tuple(tuple(dict(cell) for cell in row) for row in theory.blocks)
    labels = _pair_labels(theory.antiparticle)
    # one species (T1 = Lee-Yang) keeps every odd spin, q = 1, as every single-species model
    # (decision; its conserved charges are the spins 1, 5 mod 6 of the spectral rule)
    rule = OddSpins(1) if n == 1 else theory.charge_rule
    return DiagonalModel(name=name, masses=np.array(theory.masses), blocks=blocks,
                         sign=np.array(theory.sign), antiparticle=theory.antiparticle,
                         labels=labels, charge_rule=rule,
                         bulk_energy_density=bulk_energy_density(theory.masses, blocks),
                         description=description)


def _pair_labels(conj):
    """Species numbered in mass order, a particle and its antiparticle sharing a number, the
    antiparticle marked "bar" (A_n: the Z_(n+1) charges 1, 1bar, 2, 2bar, ...)."""
    labels, number = [], 0
    for a, c in enumerate(conj):
        if c < a:
            labels.append(labels[c] + "bar")
        else:
            number += 1
            labels.append(str(number))
    return labels


def _split_algebra(text):
    match = re.fullmatch(r"([ADETadet])(\d+)", str(text).strip())
    if match is None:
        raise ModelError("model", f"not an algebra name: {text!r}")
    return match.group(1).upper(), int(match.group(2))


def lee_yang():
    """Scaling Lee-Yang model: S = f_(2/3), c_eff = 2/5 (the tadpole T1 of the ADE series).
    Bulk energy density -m^2 / (4 sqrt 3)."""
    return ade_model("T1")


def ising_e8():
    """Scaling Ising model in a magnetic field: the E8 theory, 8 particles, c = 1/2.

    Masses and S-matrices are generated from the ADE identity for the E8 diagram
    (see `tba.models.ade`), not typed in.
    """
    return ade_model("E8")


def user_model(masses, blocks=None, kernel=None, pole_distance=None, statistics="fermion",
               name="user", sign=None, antiparticle=None, charges=None, labels=None,
               chirality=None, multiplicity=None):
    """A user-defined diagonal model.

    Give either ``blocks`` ({key: multiplicity} per pair a, b; keys are numbers x for f_x and
    `HalfBlock` or "<x>" for half-blocks) or ``kernel`` (a callable t -> phi_ab(t) of shape
    (n, n) + t.shape) together with ``pole_distance`` (a number, or one per pair). For one
    species, ``blocks`` may be a single dict and ``kernel`` may return t.shape.
    ``antiparticle`` pairs species (half-blocks need it), ``charges`` = {spin: [q_1, ..., q_n]}
    gives a several-species model conserved charges for higher-spin CDD factors (one species:
    every odd spin with q = 1). ``chirality`` ("massive", "right" or "left" per species) declares
    massless species, whose entry of ``masses`` is their scale M; ``multiplicity`` the number of
    identical copies of each species.
    """
    try:
        masses = np.atleast_1d(np.asarray(masses, dtype=float))
    except (TypeError, ValueError):
        raise TypeError(f"masses must be a sequence of real numbers, got {masses!r}") from None
    if masses.ndim != 1 or masses.size == 0:
        raise ValueError(f"masses must be a non-empty 1-d sequence, got {masses.tolist()!r}")
    n = masses.size
    if blocks is not None and isinstance(blocks, dict):
        if n != 1:
            raise ValueError("blocks: a single dict only describes a one-species model")
        blocks = ((blocks,),)
    kernel_function = None
    if kernel is not None:
        if not callable(kernel):
            raise TypeError(f"kernel must be callable, got {type(kernel).__name__}")
        if pole_distance is None:
            raise ValueError("pole_distance is required with a kernel callable")
        if n == 1:
            kernel_function = lambda t: np.asarray(kernel(t), dtype=float).reshape((1, 1) + np.shape(t))
        else:
            kernel_function = kernel
    rule = None if charges is None else ExplicitCharges(charges, n)
    return DiagonalModel(name=name, masses=masses, blocks=blocks, kernel_function=kernel_function,
                         pole_distance=np.inf if pole_distance is None else pole_distance,
                         statistics=statistics, sign=sign, antiparticle=antiparticle,
                         charge_rule=rule, labels=labels, chirality=chirality,
                         multiplicity=multiplicity, description="user-defined model")


def _coupling_in_open_interval(B):
    if isinstance(B, bool):
        raise TypeError(f"coupling must be a real number, got {B!r}")
    try:
        B = float(B)
    except (TypeError, ValueError):
        raise TypeError(f"coupling must be a real number, got {B!r}") from None
    if not (np.isfinite(B) and 0.0 < B < 2.0):
        raise ValueError(f"coupling B must lie in (0, 2), got {B!r}")
    return B


# -- the registry --------------------------------------------------------------------------

#: parameters that are integers (written without a decimal point in labels)
INTEGER_PARAMETERS = ("N", "n")


@dataclass(frozen=True)
class Entry:
    """A built-in model: its canonical name, its constructor, its parameter (if any)."""

    name: str
    build: Callable
    parameter: Optional[str] = None       # "B", "N", "n"
    parameter_range: str = ""
    algebra: Optional[str] = None
    #: the model has massless species (known without building it: figures ask)
    massless: bool = False

    def make(self, coupling=None):
        if self.parameter is None:
            if coupling is not None:
                raise ModelError("coupling", f"model {self.name} has no coupling")
            return self.build()
        if coupling is None:
            raise ModelError("coupling", f"required for {self.name} ({self.parameter}: "
                                         f"{self.parameter_range})")
        try:
            return self.build(coupling)
        except (TypeError, ValueError) as exc:
            raise ModelError("coupling", str(exc).removeprefix("coupling ")) from None

    def label(self, coupling=None):
        """``name`` or ``name B=0.6`` / ``name N=3``: the coordinate label in output files."""
        if self.parameter is None or coupling is None:
            return self.name
        value = int(coupling) if self.parameter in INTEGER_PARAMETERS else coupling
        return f"{self.name} {self.parameter}={value!r}"


_NAMED = {e.name: e for e in [
    Entry("free-fermion", free_fermion, algebra="A1"),
    Entry("sinh-gordon", sinh_gordon, "B", "0 < B < 2"),
    Entry("lee-yang", lee_yang, algebra="T1"),
    Entry("ising-e8", ising_e8, algebra="E8"),
    Entry("potts-3", lambda: ade_model("A2"), algebra="A2"),
    Entry("tricritical-ising", lambda: ade_model("E7"), algebra="E7"),
    Entry("tricritical-potts-3", lambda: ade_model("E6"), algebra="E6"),
    Entry("sine-gordon", sine_gordon, "N", f"integer, 1 <= N <= {_sg.MAX_N}"),
    Entry("massless-fermion", massless_fermion, massless=True),
    Entry("massless-bosons", massless_bosons, "n", f"integer, 1 <= n <= {MAX_BOSONS}", massless=True),
    Entry("tricritical-to-ising", tricritical_to_ising, massless=True),
]}
_BY_ALGEBRA = {e.algebra: e for e in _NAMED.values() if e.algebra}


def resolve(name):
    """The registry entry of a model name (canonical, algebra name, any case for algebras)."""
    if not isinstance(name, str):
        raise ModelError("model", f"expected a model name (a string), got {name!r}")
    if name in _NAMED:
        return _NAMED[name]
    try:
        kind, n = _split_algebra(name)
    except ModelError:
        raise ModelError("model", f"unknown model {name!r} (choose from {known_names()})") from None
    algebra = _family_member(kind, n)
    if algebra in _BY_ALGEBRA:
        return _BY_ALGEBRA[algebra]
    return Entry(algebra, lambda: ade_model(algebra), algebra=algebra)


def known_names():
    """One line naming every model and family, for error messages."""
    return (", ".join(_NAMED) + f", A<n> (n = 1..{MAX_RANK}), D<n> (n = 4..{MAX_RANK}), E6, E7, "
            f"E8, T<n> (n = 1..{MAX_RANK}); tba models lists them")


def canonical_name(name):
    """The name a model is stored under (``E8`` -> ``ising-e8``, ``a4`` -> ``A4``)."""
    return resolve(name).name


def get_model(name, coupling=None):
    """Build a built-in model by name; ``coupling`` only for models that have one.

    Raises `ModelError` (a ValueError) naming ``model`` or ``coupling``."""
    return resolve(name).make(coupling)


def model_label(name, coupling=None):
    return resolve(name).label(coupling)


def model_names():
    """The canonical names ``tba models`` lists: the named models, then A_n, D_n, E_n, T_n up to
    the listed ranks (every rank up to MAX_RANK is accepted)."""
    names = list(_NAMED)
    algebras = ([f"A{n}" for n in LISTED_RANKS["A"]] + [f"D{n}" for n in LISTED_RANKS["D"]]
                + ["E6", "E7", "E8"] + [f"T{n}" for n in LISTED_RANKS["T"]])
    names += [a for a in algebras if a not in _BY_ALGEBRA]
    return names


class _Registry(Mapping):
    """name -> constructor for every valid name; iterating gives `model_names`."""

    def __getitem__(self, name):
        if name not in self:
            raise KeyError(name)
        return functools.partial(get_model, name)

    def __contains__(self, name):
        try:
            resolve(name)
        except ModelError:
            return False
        return True

    def __iter__(self):
        return iter(model_names())

    def __len__(self):
        return len(model_names())


MODELS = _Registry()
MODELS_WITH_COUPLING = frozenset(e.name for e in _NAMED.values() if e.parameter)


#: the sine-Gordon points the listing shows (every N up to the maximum is accepted)
LISTED_SINE_GORDON = range(1, 5)
#: the values of each integer parameter that the listing shows without a coupling: sine-Gordon
#: N = 1..4, one boson and the 24 of the Nambu-Goto string
LISTED_VALUES = {"sine-gordon": LISTED_SINE_GORDON, "massless-bosons": (1, 24)}


def model_summary(name, coupling=None):
    """What ``tba models`` shows of one model: a dict with the JSON keys ``name``, ``parameters``,
    ``species``, ``masses``, ``c_eff``, ``massless``, ``spins`` (and, for the text listing,
    ``algebra``, ``labels``, ``spins_text`` and ``description``).

    ``parameters`` maps the model's parameter to {"range": ..., "value": ...}; a parameter-free
    model has {}. sinh-Gordon without a coupling is summarised at B = 1 with value None (its
    masses, c_eff and spins do not depend on B)."""
    entry = resolve(name)
    parameters = {}
    if entry.parameter is not None:
        parameters = {entry.parameter: {"range": entry.parameter_range, "value": None}}
        if coupling is None and entry.parameter == "B":
            model = entry.make(1.0)
        else:
            model = entry.make(coupling)
            parameters[entry.parameter]["value"] = model.coupling
    else:
        model = entry.make(coupling)
    return {"name": entry.name, "parameters": parameters, "species": model.n_species,
            "masses": model.masses.tolist(), "c_eff": uv_central_charge(model),
            "massless": model.is_massless,
            "spins": model.charge_rule.as_dict(),
            "algebra": entry.algebra, "labels": list(model.labels),
            "spins_text": model.charge_rule.describe(), "description": model.description}


def model_summaries(names=None, coupling=None):
    """Summaries of ``names`` (default: `model_names`). ``coupling`` applies to the named models
    that have a parameter (ModelError if none has one); a model with an integer parameter and no
    coupling is summarised at its listed values (`LISTED_VALUES`: sine-Gordon N = 1..4,
    massless-bosons n = 1 and 24)."""
    entries = [resolve(name) for name in (model_names() if names is None else names)]
    if coupling is not None and not any(e.parameter for e in entries):
        raise ModelError("coupling", "none of the models named has a parameter")
    out = []
    for entry in entries:
        if entry.name in LISTED_VALUES and coupling is None:
            out.extend(model_summary(entry.name, v) for v in LISTED_VALUES[entry.name])
        else:
            out.append(model_summary(entry.name, coupling if entry.parameter else None))
    return out
