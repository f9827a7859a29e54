"""The ultraviolet effective central charge of a model from the dilogarithm sum.

As R -> 0 the pseudo-energies of the ground-state TBA develop a plateau eps_a(t) -> eps_a
for |t| << log(2/R), where the convolution becomes a product with the kernel integrals:

    eps_a = sum_b N_ab log(1 + e^{-eps_b}),      N_ab = -(1/2 pi) int phi_ab(t) dt,

and E_0(R) -> -pi c_eff / (6 R) with

    c_eff = (6 / pi^2) sum_a Lr(1 / (1 + e^{eps_a})),      Lr(x) = Li_2(x) + log(x) log(1 - x) / 2

(Rogers' dilogarithm; Al.B. Zamolodchikov, Nucl. Phys. B342 (1990) 695; T.R. Klassen and
E. Melzer, Nucl. Phys. B338 (1990) 485). The plateau equations are solved by Newton's method in
double precision and the dilogarithms summed with mpmath. When the plateau runs off to
eps -> -infinity (sinh-Gordon, N = -1: no finite solution), the limit Lr(1) = pi^2/6 per species
is taken: c_eff = 1, reached only logarithmically in R.

Massless species (Al.B. Zamolodchikov, Nucl. Phys. B358 (1991) 524; T.R. Klassen and E. Melzer,
Nucl. Phys. B350 (1991) 635; from memory). The energy comes from kinks: where the driving terms
e^{+t} (right movers and massive species) or e^{-t} (left movers and massive species) switch
on, the pseudo-energies pass from an inner plateau eps^in to an outer one eps^out, and the
dilogarithm identity gives each kink

    c_kink = (6 / pi^2) sum_a g_a [Lr(x(eps_a^in)) - Lr(x(eps_a^out))],    E -> -pi (c_right + c_left) / (12 R),

summed over every species (also those without driving in the kink, which change across it), with
x(eps) = 1 / (1 + e^eps) for fermions and e^-eps for bosons (Lr(1) = pi^2/6: a free boson has
c = 1), and g_a the multiplicity. So c_eff = (c_right + c_left) / 2. As R -> 0 (`uv_central_charge`)
the inner plateau is that of all species; outside the right kink the species driven by e^{+t}
are gone (eps = +infinity, x = 0) and the left movers sit on the plateau of their own subsystem;
the left kink is the mirror image. As R -> infinity (`ir_central_charge`) massive species are
gone and the right movers' kink lies far to the left of the left movers': each chirality's
kink passes from the plateau of its own subsystem to nothing. Bosonic plateaus are solved only
without kernels (eps = 0).
"""

import math

import numpy as np

# mpmath is imported by the dilogarithm sums that use it: solving a model does not need it

_RUNAWAY = -50.0


def plateau(model, maxiter=200, species=None):
    """(eps_a, runaway): the plateau values and whether they run off to -infinity; with
    ``species`` (indices), the plateau of that subsystem alone (the others absent, L = 0)."""
    N = -np.asarray(model.kernel_integrals) / (2 * math.pi) * np.asarray(model.multiplicity)[None, :]
    if species is not None:
        N = N[np.ix_(species, species)]
    if model.statistics != "fermion":
        if np.any(N):
            raise ValueError("model: the dilogarithm sum of a bosonic TBA is implemented without "
                             "kernels only")
        return np.zeros(len(N)), False
    eps = np.zeros(len(N))
    for _ in range(maxiter):
        F = eps - N @ np.logaddexp(0.0, -eps)
        J = np.eye(len(eps)) + N / (1.0 + np.exp(eps))[None, :]
        step = np.linalg.solve(J, -F)
        if np.max(np.abs(step)) <= 1e-13 * max(1.0, np.max(np.abs(eps))):
            # a solution at eps -> -infinity shows up as a degenerate Jacobian (J ~ e^eps)
            return eps + step, bool(np.linalg.svd(J, compute_uv=False).min() < 1e-10)
        lam = 1.0
        while lam > 1e-6:  # backtracking keeps the residual decreasing
            trial = eps + lam * step
            if np.max(np.abs(trial - N @ np.logaddexp(0.0, -trial))) < np.max(np.abs(F)):
                break
            lam /= 2
        eps = trial
        if eps.min() < _RUNAWAY:
            return eps, True
    raise ValueError(f"model: the plateau equations of {model.name} did not converge")


def rogers(x):
    """Rogers' dilogarithm Lr(x) = Li_2(x) + log(x) log(1 - x) / 2, Lr(1) = pi^2/6 (mpmath)."""
    import mpmath

    x = mpmath.mpf(x)
    if x == 1:
        return mpmath.pi ** 2 / 6
    return mpmath.polylog(2, x) + mpmath.log(x) * mpmath.log(1 - x) / 2


def _occupation_dilog(model, eps):
    """sum_a g_a Lr(x(eps_a)) over the species of ``eps`` (a dict index -> eps; +inf: absent)."""
    import mpmath

    with mpmath.workdps(30):
        total = mpmath.mpf(0)
        for a, e in eps.items():
            if e == math.inf:
                continue
            e = mpmath.mpf(float(e))
            x = 1 / (1 + mpmath.exp(e)) if model.statistics == "fermion" else mpmath.exp(-e)
            total += model.multiplicity[a] * rogers(x)
        return total


def _subsystem(model, species):
    """{index: plateau eps} of the subsystem ``species`` (runaway plateaus are refused)."""
    if not species:
        return {}
    eps, runaway = plateau(model, species=list(species))
    if runaway:
        raise ValueError(f"model: the plateau of {model.name} runs off to -infinity")
    return dict(zip(species, eps))


def _kinks(model, inner, right_out, left_out):
    """c_eff = (c_right + c_left) / 2 from the plateaus around the two kinks (module docstring)."""
    import mpmath

    c = [_occupation_dilog(model, inner) - _occupation_dilog(model, out) for out in (right_out, left_out)]
    with mpmath.workdps(30):
        return float(3 * (c[0] + c[1]) / mpmath.pi ** 2)


def _massless_uv(model):
    n = model.n_species
    inner = _subsystem(model, tuple(range(n)))
    outer = {}
    for side, drive in (("right", "left"), ("left", "right")):
        # outside the kink of one side only the movers of the other chirality survive
        others = tuple(a for a in range(n) if model.chirality[a] == drive)
        out = {a: math.inf for a in range(n)}
        out.update(_subsystem(model, others))
        outer[side] = out
    return _kinks(model, inner, outer["right"], outer["left"])


def ir_central_charge(model):
    """c_eff as R -> infinity: 0 for a massive model; with massless species each chirality's
    kink from the plateau of its own subsystem to nothing (module docstring)."""
    n = model.n_species
    if not model.is_massless:
        return 0.0
    gone = {a: math.inf for a in range(n)}
    c = 0.0
    for kind in ("right", "left"):
        inner = dict(gone)
        inner.update(_subsystem(model, tuple(a for a in range(n) if model.chirality[a] == kind)))
        c += _kinks(model, inner, gone, inner)  # this kink alone: (c_kink + 0) / 2
    return c


def uv_central_charge(model):
    """c_eff as R -> 0: (6 / pi^2) sum_a Lr(1 / (1 + e^{eps_a})) for massive models; kink by kink
    with massless species (module docstring)."""
    import mpmath

    if model.is_massless:
        return _massless_uv(model)
    if model.statistics != "fermion" or model.has_multiplicity:
        return _kinks(model, _subsystem(model, tuple(range(model.n_species))),
                      {a: math.inf for a in range(model.n_species)},
                      {a: math.inf for a in range(model.n_species)})
    eps, runaway = plateau(model)
    if runaway:
        if model.n_species != 1:
            raise ValueError(f"model: the plateau of {model.name} runs off to -infinity")
        return 1.0
    with mpmath.workdps(30):
        total = mpmath.fsum(rogers(1 / (1 + mpmath.exp(mpmath.mpf(float(e))))) for e in eps)
        return float(6 * total / mpmath.pi ** 2)
