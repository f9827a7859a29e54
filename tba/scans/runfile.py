"""Run files: what a scan computes, read from TOML, checked strictly, fully resolved.

A run file names the models, the deformation couplings, the radii, the states, the
solver tolerance, the output file and how the scan is cut into chunks::

    # What this run computes, and how long it takes.
    description = "sinh-Gordon with both signs of alpha"   # optional; also name = "..."
    output = "out/sinh-gordon.h5"       # relative to this file's directory

    [[models]]
    name = "sinh-gordon"                # free-fermion, sinh-gordon, lee-yang, ising-e8
    coupling = 0.6                      # sinh-gordon only, B in (0, 2)

    states = ["ground", "-1/2,1/2"]    # optional (default ["ground"]); excited levels by their
                                        # Bethe quantum numbers, e.g. "0" for Lee-Yang's particle

    [deformation]
    alphas = [-0.1, 0.05, 0.1]          # TTbar couplings (spin 1)
    higher_spin = { 3 = -0.01 }         # optional: odd spin >= 3 -> alpha_s, at every alpha
    poles = [[0.3, -1], [0.2, -1]]      # optional: CDD pole factors F_(pi x)^p as [x, p], at every alpha
    resonances = [[16.0, -1]]           # optional: resonance factors (sin u = cosh theta0) as [theta0, p]

    [radii]                             # or: radii = [0.5, 1.0, {start = 2, stop = 4, count = 3}]
    start = 0.3
    stop = 4.0
    count = 24
    spacing = "log"                     # "linear" (default) or "log"

    [solver]
    tol = 1e-12                         # relative accuracy of every energy

    [scan]
    chunk_size = 8                      # consecutive radii solved as one warm-started chain
    flow_check = true                   # undeformed solve at R + alpha E for every point
    sweep = "descending"                # order of the radii inside a chunk
    branch_points = true                # R_c(alpha) of the ground state, once per model and
                                        # alpha, and each excited level's fold in R

A state that a model does not have (excited states of E8, or a two-particle level of
Lee-Yang, whose only excited level here is its one-particle state "0") is not computed for
that model: `RunSpec.unavailable` says why, and the store marks those points "not-available".
A state that no model of the run has is refused.

Strict: an unknown key, a missing key, a value of the wrong type or out of range raises
`RunFileError` (a ValueError) whose message starts with the dotted key, for example
``models[0].coupling: expected a number, got a string ('0.6')`` (and with the file's name
when read by `load_run`). Run files are new input, so they are also held to the limits of
`tba.scans.limits`: radii and couplings inside the domain the solvers represent, and at most
``max_points`` points (models x alphas x radii x states), checked before any radius range
is allocated.

The resolved run (`RunSpec`) has every default filled in and the radii written out, sorted
and without duplicates (alphas likewise); models keep their order. ``RunSpec.to_dict()``
is itself a valid run description, so ``resolve_run(spec.to_dict())`` gives ``spec`` back.
Its `identity` (everything that changes the numbers: models, deformation, radii, states,
solver, scan) decides whether an existing output file belongs to the same run.
``scan.branch_points`` is not part of it: it says whether the branch points are computed,
not what they are (they depend on the models, alphas, higher-spin terms and tol only), so a
run resumed with ``branch_points = true`` adds them to a file begun without them.
"""

import hashlib
import json
import math
import os
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from tba.models.catalog import ModelError, canonical_name, get_model, model_label
from tba.models.cdd import CDD, pole_factors
from tba.scans.limits import (MAX_POINTS, coupling_problem, deformation_problem, radius_problem,
                              size_text)
from tba.solvers.ground import MIN_TOL

SWEEPS = ("descending", "ascending")
SPACINGS = ("linear", "log")
DEFAULTS = {
    "description": "",
    "states": ["ground"],
    "solver": {"tol": 1e-12},
    "scan": {"chunk_size": 8, "flow_check": True, "sweep": "descending", "branch_points": True},
}
#: top-level keys of the resolved run that change the numbers (the run's identity)
IDENTITY_KEYS = ("models", "deformation", "radii", "states", "solver", "scan")
#: keys of [scan] that say what is computed, not what the numbers are: not in the identity
NOT_IDENTITY_SCAN_KEYS = ("branch_points",)


class RunFileError(ValueError):
    """A run file that cannot be run; the message starts with the file (if known), then the
    dotted key."""

    def __init__(self, key, problem, file=None):
        self.key, self.problem, self.file = key, problem, file
        text = f"{key}: {problem}" if key else problem
        super().__init__(f"{file}: {text}" if file is not None else text)


_MISSING = object()


def _kind(value):
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, int):
        return "an integer"
    if isinstance(value, float):
        return "a number"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, (list, tuple)):
        return "an array"
    if isinstance(value, dict):
        return "a table"
    if value is None:
        return "null"
    return f"a {type(value).__name__}"


def _got(value):
    text = repr(value)
    return f"{_kind(value)} ({text if len(text) <= 40 else text[:37] + '...'})"


def _number(key, value):
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise RunFileError(key, f"expected a number, got {_got(value)}")
    value = float(value)
    if not math.isfinite(value):
        raise RunFileError(key, f"must be finite, got {value!r}")
    return value


def _integer(key, value):
    if isinstance(value, bool) or not isinstance(value, int):
        raise RunFileError(key, f"expected an integer, got {_got(value)}")
    return value


def _string(key, value):
    if not isinstance(value, str):
        raise RunFileError(key, f"expected a string, got {_got(value)}")
    return value


def _boolean(key, value):
    if not isinstance(value, bool):
        raise RunFileError(key, f"expected a boolean (true or false), got {_got(value)}")
    return value


def _array(key, value):
    if not isinstance(value, (list, tuple)):
        raise RunFileError(key, f"expected an array, got {_got(value)}")
    return list(value)


class _Table:
    """Reads the keys of one table once each; `finish` rejects the keys nobody read."""

    def __init__(self, key, value):
        if not isinstance(value, dict):
            raise RunFileError(key, f"expected a table, got {_got(value)}")
        self.prefix = f"{key}." if key else ""
        self.data = value
        self.read = set()

    def key(self, name):
        return f"{self.prefix}{name}"

    def get(self, name, default=_MISSING):
        self.read.add(name)
        if name in self.data:
            return self.data[name]
        if default is _MISSING:
            raise RunFileError(self.key(name), "missing (required key)")
        return default

    def finish(self, allowed_hint=None):
        unknown = [k for k in self.data if k not in self.read]
        if unknown:
            allowed = ", ".join(sorted(self.read)) if allowed_hint is None else allowed_hint
            raise RunFileError(self.key(unknown[0]), f"unknown key (allowed here: {allowed})")


@dataclass(frozen=True)
class ModelSpec:
    """One model of the scan: a command-line model name and its coupling (or None)."""

    name: str
    coupling: float | None = None
    #: this entry's own CDD pole and resonance factors ((x, p), ...), ((theta0, p), ...): a scan
    #: over factor parameters is a list of entries of one model, like a scan over its coupling
    poles: tuple = ()
    resonances: tuple = ()

    @property
    def label(self):
        """Coordinate label in output files, e.g. ``sinh-gordon B=0.6``, with the entry's own
        factors: ``free-fermion poles=0.3:-1,0.2:-1``."""
        label = model_label(self.name, self.coupling)
        if self.poles:
            label += " poles=" + ",".join(f"{x:.12g}:{p}" for x, p in self.poles)
        if self.resonances:
            label += " resonances=" + ",".join(f"{t:.12g}:{p}" for t, p in self.resonances)
        return label

    def to_dict(self):
        d = {"name": self.name, "coupling": self.coupling}
        if self.poles:
            d["poles"] = [list(p) for p in self.poles]
        if self.resonances:
            d["resonances"] = [list(r) for r in self.resonances]
        return d

    def factors(self):
        return pole_factors(self.poles, self.resonances)

    def build(self):
        return get_model(self.name, self.coupling)


@dataclass(frozen=True)
class Chunk:
    """One task of a scan: radii ``radius_start:radius_stop`` (indices into the sorted radii)
    of one model, alpha and state, solved as one warm-started chain."""

    index: int
    model: int
    alpha: int
    state: int
    radius_start: int
    radius_stop: int

    @property
    def size(self):
        return self.radius_stop - self.radius_start


@dataclass(frozen=True)
class RunSpec:
    """A fully resolved run: every default filled in, radii and alphas sorted and unique."""

    models: tuple
    alphas: tuple
    radii: tuple
    higher_spin: tuple = ()  # ((spin, alpha_s), ...) sorted by spin
    poles: tuple = ()        # ((x, power), ...) in the order given: F_(pi x)^power
    resonances: tuple = ()   # ((theta0, power), ...): F^power with sin u = cosh theta0
    states: tuple = ("ground",)
    tol: float = 1e-12
    chunk_size: int = 8
    flow_check: bool = True
    sweep: str = "descending"
    branch_points: bool = True
    name: str = "run"
    description: str = ""
    output: str | None = None
    #: ((model index, state index, why), ...): the states a model does not have (derived
    #: from models, states and deformation, so not part of `to_dict`)
    unavailable: tuple = ()

    def why_unavailable(self, model, state):
        """Why state ``state`` is not computed for model ``model`` (indices), or None."""
        for m, s, why in self.unavailable:
            if (m, s) == (model, state):
                return why
        return None

    @property
    def shape(self):
        """(models, alphas, radii, states): the shape of every data set in the store."""
        return (len(self.models), len(self.alphas), len(self.radii), len(self.states))

    @property
    def n_points(self):
        return math.prod(self.shape)

    def deformation(self, alpha, model=None):
        """The CDD factor at TTbar coupling ``alpha`` (with the run's higher-spin terms, its
        pole and resonance factors and those of model entry ``model``, an index)."""
        couplings = {1: alpha} if alpha else {}
        couplings.update(dict(self.higher_spin))
        return CDD(couplings) + self.base_deformation(model)

    def base_deformation(self, model=None):
        """The pole and resonance factors alone (the run's, and model entry ``model``'s): the
        'undeformed' theory of the flow check, E(R, alpha) = E(R + alpha E, 0 with them)."""
        own = self.models[model].factors() if model is not None else CDD({})
        return pole_factors(self.poles, self.resonances) + own

    def model_has_poles(self, model):
        return self.base_deformation(model).has_poles

    @property
    def ttbar_only(self):
        """True without higher-spin terms: then E(R, alpha) = E(R + alpha E, 0) is exact (the
        pole factors, if any, in both)."""
        return not self.higher_spin

    @property
    def has_poles(self):
        """Pole or resonance factors anywhere in the run (for all models or for one)."""
        return bool(self.poles or self.resonances) or any(m.poles or m.resonances for m in self.models)

    def to_dict(self):
        """The resolved run as a JSON-ready dict (also a valid input of `resolve_run`)."""
        return {
            "name": self.name,
            "description": self.description,
            "output": self.output,
            "models": [m.to_dict() for m in self.models],
            "deformation": self._deformation_dict(),
            "radii": list(self.radii),
            "states": list(self.states),
            "solver": {"tol": self.tol},
            "scan": {"chunk_size": self.chunk_size, "flow_check": self.flow_check,
                     "sweep": self.sweep, "branch_points": self.branch_points},
        }

    def _deformation_dict(self):
        d = {"alphas": list(self.alphas), "higher_spin": {str(s): a for s, a in self.higher_spin}}
        # only when present, so that the identity of runs without factors is unchanged
        if self.poles:
            d["poles"] = [list(p) for p in self.poles]
        if self.resonances:
            d["resonances"] = [list(r) for r in self.resonances]
        return d

    def to_json(self):
        return json.dumps(self.to_dict(), indent=1, allow_nan=False)

    def identity(self):
        """The part of the resolved run that determines the numbers (``scan.branch_points``
        excluded: it decides whether branch points are computed, not their values)."""
        return identity_of(self.to_dict())

    @property
    def run_id(self):
        """sha256 of the identity (canonical JSON): equal ids mean the same numbers."""
        text = json.dumps(self.identity(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode()).hexdigest()

    def chunks(self):
        """The scan's tasks: for every (model, alpha, state), the radii cut into consecutive
        blocks of ``chunk_size``. A pure function of the resolved run (never of the number
        of workers), so that resumed and parallel runs give the numbers of a serial one."""
        out = []
        n = len(self.radii)
        skip = {(m, s) for m, s, _ in self.unavailable}
        for m in range(len(self.models)):
            for a in range(len(self.alphas)):
                for s in range(len(self.states)):
                    if (m, s) in skip:
                        continue
                    for start in range(0, n, self.chunk_size):
                        out.append(Chunk(len(out), m, a, s, start, min(start + self.chunk_size, n)))
        return out

    def branch_keys(self):
        """The branch-point tasks of the run (with ``branch_points = true``): (model, alpha)
        of the ground state, then (model, alpha, state) of every excited level on the state
        axis (one task each: an excited level's fold takes up to seconds)."""
        M, A, S = len(self.models), len(self.alphas), len(self.states)
        excited = [s for s in range(S) if self.states[s] != "ground"]
        return ([(m, a) for m in range(M) for a in range(A)]
                + [(m, a, s) for m in range(M) for a in range(A) for s in excited])

    def with_output(self, output):
        return RunSpec(**{**self.__dict__, "output": None if output is None else str(output)})


@dataclass(frozen=True)
class Shard:
    """Shard ``index`` of ``count`` (1 <= index <= count) of a run, for job arrays without a
    scheduler: it owns every ``count``-th chunk, starting with chunk ``index - 1``, and the
    (model, alpha) branch points whose row-major number ``model * len(alphas) + alpha`` is
    ``index - 1`` modulo ``count``, and the excited levels' (model, alpha, state) ones whose
    row-major number ``(model * len(alphas) + alpha) * len(states) + state`` is.

    Round robin rather than contiguous blocks: chunks of one curve lie next to each other in
    the chunk table, and neighbouring curves cost about the same, so every shard gets a
    fair share of the cheap and the expensive curves (E8 next to the free fermion, points
    past a branch point next to easy ones). Like the chunks, the split is a pure function of
    the resolved run and (index, count), so the shards of one run never overlap and together
    hold every chunk and every branch point exactly once."""

    index: int
    count: int

    def __post_init__(self):
        if not (isinstance(self.index, int) and isinstance(self.count, int)
                and 1 <= self.index <= self.count):
            raise ValueError(f"shard: expected I/N with 1 <= I <= N, got {self.index}/{self.count}")

    @property
    def label(self):
        return f"{self.index}/{self.count}"

    def owns(self, chunk):
        return chunk.index % self.count == self.index - 1

    def chunks(self, run):
        """The chunks of ``run`` that belong to this shard, in chunk-table order."""
        return [c for c in run.chunks() if self.owns(c)]

    def owns_pair(self, run, model, alpha):
        return (model * len(run.alphas) + alpha) % self.count == self.index - 1

    def branch_pairs(self, run):
        return [(m, a) for m in range(len(run.models)) for a in range(len(run.alphas))
                if self.owns_pair(run, m, a)]

    def owns_branch(self, run, key):
        """Whether this shard computes the branch-point task ``key`` (`RunSpec.branch_keys`)."""
        if len(key) == 2:
            return self.owns_pair(run, *key)
        m, a, s = key
        return ((m * len(run.alphas) + a) * len(run.states) + s) % self.count == self.index - 1

    def branch_keys(self, run):
        """This shard's branch-point tasks, in the order of `RunSpec.branch_keys`."""
        return [k for k in run.branch_keys() if self.owns_branch(run, k)]


def parse_shard(text):
    """``I/N`` (the form of ``tba run --shard``) -> `Shard`; ValueError naming the problem."""
    index, sep, count = str(text).strip().partition("/")
    try:
        if not sep:
            raise ValueError
        return Shard(int(index), int(count))
    except ValueError:
        raise ValueError(f"expected I/N with integers 1 <= I <= N (shard I of N), got {text!r}") from None


def identity_of(d):
    """The identity part of a resolved-run dict (`RunSpec.identity`)."""
    out = {k: d.get(k) for k in IDENTITY_KEYS}
    if isinstance(out.get("scan"), dict):
        out["scan"] = {k: v for k, v in out["scan"].items() if k not in NOT_IDENTITY_SCAN_KEYS}
    return out


def differing_keys(a, b):
    """Top-level identity keys in which two resolved-run dicts differ."""
    a, b = identity_of(a), identity_of(b)
    return [k for k in IDENTITY_KEYS if a.get(k) != b.get(k)]


# -- reading ------------------------------------------------------------------------------------

def load_run(path, *, max_points=MAX_POINTS):
    """Read and resolve a TOML run file; relative ``output`` paths are taken from its
    directory. Errors (`RunFileError`) name the file and the key."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise RunFileError("", "no such run file", file=path) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise RunFileError("", f"cannot read it ({exc})", file=path) from None
    try:
        return loads_run(text, base_dir=path.parent, name=path.stem, max_points=max_points)
    except RunFileError as exc:
        raise RunFileError(exc.key, exc.problem, file=path) from None


def loads_run(text, base_dir=None, name="run", *, max_points=MAX_POINTS):
    """Resolve the text of a run file, held to the limits (`resolve_run` with ``limits``)."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RunFileError("", f"not valid TOML: {exc}") from None
    return resolve_run(data, base_dir=base_dir, name=name, limits=True, max_points=max_points)


def resolve_run(data, base_dir=None, name="run", *, limits=False, max_points=MAX_POINTS):
    """Check a run description (a dict as read from TOML) and fill in the defaults.

    ``limits``: also refuse radii and couplings outside the solvers' domain and runs of more
    than ``max_points`` points (`tba.scans.limits`), before any radius range is allocated.
    Off by default: that is for runs read back from stores, which were checked as run files
    when they were written; run files go through `loads_run` / `load_run`, which check."""
    top = _Table("", data)
    description = _string("description", top.get("description", DEFAULTS["description"]))
    name = _string("name", top.get("name", name))
    output = top.get("output")
    if output is not None:
        output = _string("output", output)
        if not output.strip():
            raise RunFileError("output", "must not be empty")
        output = Path(output).expanduser()
        if not output.is_absolute() and base_dir is not None:
            output = Path(base_dir) / output
        output = os.path.abspath(output)
    models = _models(top.get("models"))
    alphas, higher_spin, keys, poles, resonances = _deformation(top.get("deformation"), models, limits)
    states = _states(top.get("states", DEFAULTS["states"]))
    per_radius = len(models) * len(alphas) * len(states)
    size = _Size(per_radius, max_points, models, alphas, states) if limits else None
    radii = _radii(top.get("radii"), size)
    if limits:
        for (spin, alpha), key in zip([(1, a) for a in alphas] + list(higher_spin), keys):
            why = deformation_problem(spin, alpha, radii[0])
            if why is not None:
                raise RunFileError(key, why)
    solver = _Table("solver", top.get("solver", {}))
    tol = _number("solver.tol", solver.get("tol", DEFAULTS["solver"]["tol"]))
    min_tol = MIN_TOL  # the solver's own limit
    if not min_tol <= tol < 1e-2:
        raise RunFileError("solver.tol", f"must lie in [{min_tol:g}, 1e-2), got {tol!r}")
    solver.finish()
    scan = _Table("scan", top.get("scan", {}))
    d = DEFAULTS["scan"]
    chunk_size = _integer("scan.chunk_size", scan.get("chunk_size", d["chunk_size"]))
    if chunk_size < 1:
        raise RunFileError("scan.chunk_size", f"must be at least 1, got {chunk_size}")
    flow_check = _boolean("scan.flow_check", scan.get("flow_check", d["flow_check"]))
    sweep = _string("scan.sweep", scan.get("sweep", d["sweep"]))
    if sweep not in SWEEPS:
        raise RunFileError("scan.sweep", f"must be one of {', '.join(SWEEPS)}, got {sweep!r}")
    branch_points = _boolean("scan.branch_points", scan.get("branch_points", d["branch_points"]))
    scan.finish()
    top.finish()
    factors = [pole_factors(poles, resonances) + m.factors() for m in models]
    return RunSpec(models=models, alphas=alphas, radii=radii, higher_spin=higher_spin,
                   poles=poles, resonances=resonances,
                   states=states, unavailable=_unavailable(models, states, higher_spin, factors), tol=tol, chunk_size=chunk_size, flow_check=flow_check,
                   sweep=sweep, branch_points=branch_points, name=name, description=description,
                   output=output)


def _models(value):
    items = _array("models", value)
    if not items:
        raise RunFileError("models", "needs at least one model")
    specs = []
    for i, item in enumerate(items):
        key = f"models[{i}]"
        t = _Table(key, item)
        name = _string(t.key("name"), t.get("name"))
        coupling = t.get("coupling", None)
        if coupling is not None:
            coupling = _number(t.key("coupling"), coupling)
        try:
            get_model(name, coupling)  # checks the name and the coupling
        except ModelError as exc:
            raise RunFileError(t.key("name" if exc.argument == "model" else "coupling"),
                               exc.reason) from None
        name = canonical_name(name)
        poles, resonances = _factor_list(t, "poles", key), _factor_list(t, "resonances", key)
        _check_factors(poles, resonances, key)
        t.finish()
        spec = ModelSpec(name, coupling, poles, resonances)
        if spec in specs:
            raise RunFileError(key, f"repeats models[{specs.index(spec)}] ({spec.label})")
        specs.append(spec)
    return tuple(specs)


def _coupling(key, value, limits):
    a = _number(key, value) + 0.0  # -0.0 is 0
    why = coupling_problem(a) if limits else None
    if why is not None:
        raise RunFileError(key, why)
    return a


def _deformation(value, models, limits):
    """(sorted alphas, ((spin, alpha_s), ...), the key of each alpha then of each spin)."""
    if value is None:
        _missing("deformation")
    t = _Table("deformation", value)
    raw = _array("deformation.alphas", t.get("alphas"))
    if not raw:
        raise RunFileError("deformation.alphas", "needs at least one value (0 for undeformed)")
    first_key = {}
    for i, a in enumerate(raw):
        first_key.setdefault(_coupling(f"deformation.alphas[{i}]", a, limits), f"deformation.alphas[{i}]")
    alphas = tuple(sorted(first_key))
    hs = _Table("deformation.higher_spin", t.get("higher_spin", {}))
    higher = {}
    for spin_text, a in hs.data.items():
        key = hs.key(spin_text)
        hs.read.add(spin_text)
        try:
            spin = int(spin_text)
        except ValueError:
            raise RunFileError(key, "spin must be an integer >= 2") from None
        if spin < 2 or str(spin) != spin_text.strip():
            raise RunFileError(key, f"spin must be an integer >= 2 (spin 1 is alphas), got {spin_text!r}")
        a = _coupling(key, a, limits)
        if a != 0.0:
            higher[spin] = a
        for i, m in enumerate(models):
            try:
                CDD({spin: 1.0}).check(m.build())
            except ValueError as exc:
                raise RunFileError(key, str(exc).split(": ", 1)[-1]) from None
    poles = _factor_list(t, "poles", "deformation")
    resonances = _factor_list(t, "resonances", "deformation")
    _check_factors(poles, resonances, "deformation")
    t.finish()
    higher = tuple(sorted(higher.items()))
    keys = [first_key[a] for a in alphas] + [hs.key(str(s)) for s, _ in higher]
    return alphas, higher, keys, poles, resonances


def _check_factors(poles, resonances, prefix):
    try:
        pole_factors(poles, resonances)
    except ValueError as exc:
        entry, problem = str(exc).split(": ", 1)
        raise RunFileError(f"{prefix}.{entry}", problem) from None


def _factor_list(table, name, prefix):
    """``poles`` or ``resonances`` of the table at ``prefix``: an array of [value, power] pairs,
    as a tuple of tuples (values as floats, powers as ints; checked by `pole_factors`)."""
    raw = _array(f"{prefix}.{name}", table.get(name, []))
    out = []
    for i, item in enumerate(raw):
        key = f"{prefix}.{name}[{i}]"
        if not isinstance(item, (list, tuple)) or len(item) != 2:
            raise RunFileError(key, f"expected a pair [value, power], got {_got(item)}")
        value = _number(f"{key}[0]", item[0])
        power = item[1]
        if isinstance(power, bool) or not isinstance(power, int):
            raise RunFileError(f"{key}[1]", f"the power must be a nonzero integer, got {_got(power)}")
        out.append((float(value), int(power)))
    return tuple(out)


def _missing(key):
    raise RunFileError(key, "missing (required key)")


class _Size:
    """The running count of radii against ``max_points``, checked before each radius range
    is allocated (a count of 10^8 must be refused, not computed)."""

    def __init__(self, per_radius, max_points, models, alphas, states):
        self.per_radius, self.max_points = per_radius, max_points
        self.shape = (f"{len(models)} model(s) x {len(alphas)} alpha(s) x {{}} radii x "
                      f"{len(states)} state(s)")
        self.radii = 0

    def add(self, key, n):
        self.radii += n
        points = self.radii * self.per_radius
        if points > self.max_points:
            raise RunFileError(key, f"{points:,} points ({self.shape.format(f'{self.radii:,}')}; "
                                    f"{size_text(points)} in memory and about as much on disk) "
                                    f"exceed the limit of {self.max_points:,} points per run: "
                                    f"split the scan into several run files (by alpha or radius "
                                    f"range), or raise the limit with tba run --max-points N")


def _radius(key, value, size=None):
    R = _number(key, value)
    if R <= 0:
        raise RunFileError(key, f"radius must be positive, got {R!r}")
    why = radius_problem(R) if size is not None else None
    if why is not None:
        raise RunFileError(key, why)
    return R


def _range(key, value, size=None):
    t = _Table(key, value)
    start = _radius(t.key("start"), t.get("start"), size)
    stop = _radius(t.key("stop"), t.get("stop"), size)
    count = _integer(t.key("count"), t.get("count"))
    spacing = _string(t.key("spacing"), t.get("spacing", "linear"))
    t.finish()
    if spacing not in SPACINGS:
        raise RunFileError(t.key("spacing"), f"must be one of {', '.join(SPACINGS)}, got {spacing!r}")
    if count < 1 or (count == 1 and start != stop):
        raise RunFileError(t.key("count"), f"must be >= 2 for a range (1 only if start == stop), got {count}")
    if size is not None:
        size.add(t.key("count"), count)
    values = np.geomspace(start, stop, count) if spacing == "log" else np.linspace(start, stop, count)
    return [float(v) for v in values]


def _radii(value, size=None):
    """The sorted, merged radii; ``size`` (a `_Size`) checks the domain and the count."""
    if value is None:
        _missing("radii")
    if isinstance(value, dict):
        values = _range("radii", value, size)
    else:
        items = _array("radii", value)
        if not items:
            raise RunFileError("radii", "needs at least one radius")
        values = []
        for i, item in enumerate(items):
            key = f"radii[{i}]"
            if isinstance(item, dict):
                values.extend(_range(key, item, size))
            else:
                values.append(_radius(key, item, size))
                if size is not None:
                    size.add(key, 1)
    return tuple(sorted(set(values)))


def _states(value):
    from tba.solvers.levels import level_name

    items = _array("states", value)
    if not items:
        raise RunFileError("states", "needs at least one state")
    states = []
    for i, s in enumerate(items):
        s = _string(f"states[{i}]", s)
        try:
            name = level_name(s)
        except (ValueError, TypeError) as exc:
            raise RunFileError(f"states[{i}]", f"{str(exc).split(': ', 1)[-1]} (a state is "
                                               f'"ground" or quantum numbers like "1/2,-1/2")') from None
        if name in states:
            raise RunFileError(f"states[{i}]", f"repeats {name!r}" + (f" (as {s!r})" if s != name else ""))
        states.append(name)
    return tuple(states)


def _unavailable(models, states, higher_spin, factors=None):
    """((model, state, why), ...) for the states a model does not have; a state that no
    model has is an error of the run file. ``factors``: the pole and resonance factors of each
    model entry (a list), or None."""
    from tba.solvers.levels import GROUND, unavailable

    out = []
    spins = CDD(dict(higher_spin)) if higher_spin else None
    for s, state in enumerate(states):
        if state == GROUND:
            continue
        reasons = []
        for m, spec in enumerate(models):
            deformation = spins
            if factors is not None and factors[m].has_poles:
                deformation = factors[m] if spins is None else spins + factors[m]
            why = unavailable(spec.build(), state, deformation)
            if why is not None:
                out.append((m, s, why))
                reasons.append(f"{spec.label}: {why}")
        if len(reasons) == len(models):
            raise RunFileError(f"states[{s}]", f"no model of the run has state {state!r} "
                                               f"({'; '.join(reasons)})")
    return tuple(out)


def demo_run_path():
    """The demo run file: ``runs/demo.toml`` of the source tree when the package runs from
    it (editable install, or the repository on sys.path), else the copy shipped in the
    package (``tba/data/demo.toml``). Returns (path, in_repository)."""
    package = Path(__file__).resolve().parents[1]  # tba/
    repo_file = package.parent / "runs" / "demo.toml"
    if repo_file.is_file() and (package.parent / "pyproject.toml").is_file():
        return repo_file, True
    return package / "data" / "demo.toml", False
