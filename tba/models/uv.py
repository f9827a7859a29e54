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
"""

import math

import mpmath
import numpy as np

_RUNAWAY = -50.0


def plateau(model, maxiter=200):
    """(eps_a, runaway): the plateau values and whether they run off to -infinity."""
    if model.statistics != "fermion":
        raise ValueError("model: the dilogarithm sum is implemented for fermionic TBAs only")
    N = -np.asarray(model.kernel_integrals) / (2 * math.pi)
    eps = np.zeros(model.n_species)
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
    x = mpmath.mpf(x)
    if x == 1:
        return mpmath.pi ** 2 / 6
    return mpmath.polylog(2, x) + mpmath.log(x) * mpmath.log(1 - x) / 2


def uv_central_charge(model):
    """c_eff = (6 / pi^2) sum_a Lr(1 / (1 + e^{eps_a})) (module docstring)."""
    eps, runaway = plateau(model)
    if runaway:
        if model.n_species != 1:
            raise ValueError(f"model: the plateau of {model.name} runs off to -infinity")
        return 1.0
    with mpmath.workdps(30):
        total = mpmath.fsum(rogers(1 / (1 + mpmath.exp(mpmath.mpf(float(e))))) for e in eps)
        return float(6 * total / mpmath.pi ** 2)
