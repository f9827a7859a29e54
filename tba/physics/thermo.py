"""Thermodynamics in the mirror channel.

Exchanging space and Euclidean time, the ground-state energy on a circle of circumference R
is the free energy of the theory on a line at temperature T = 1/R:

    f(T) = E(1/T) / R + f_bulk = T E(1/T) + f_bulk         free-energy density
    s(T) = -df/dT = R E'(R) - E(R)                         entropy density
    u(T) = f + T s = E'(R) + f_bulk                        energy density
    c(T) = du/dT = -R^2 E''(R)                             specific heat

with E the TBA energy (bulk term excluded) and f_bulk the model's bulk energy density when
it provides one (``model.bulk_energy_density``; otherwise it is left out and said so). The
derivatives are exact (linearised TBA equations), not finite differences. With a TTbar
deformation (alpha > 0) the free energy exists up to the Hagedorn temperature T_H = 1/R_c;
above it the point is reported as having no real solution.
"""

import math
from dataclasses import dataclass

import numpy as np

from tba.solvers.result import Status
from tba.solvers.ground import energy_derivatives, solve_ground_state


@dataclass
class ThermoPoint:
    temperature: float
    status: Status
    free_energy: float = math.nan
    entropy: float = math.nan
    energy_density: float = math.nan
    specific_heat: float = math.nan
    free_energy_error: float = math.nan
    entropy_error: float = math.nan
    energy_density_error: float = math.nan
    specific_heat_error: float = math.nan
    bulk_included: bool = False
    message: str = ""


def thermodynamics(model, temperatures, deformation=None, tol=1e-12):
    """Free energy, entropy, energy density and specific heat at each temperature (in order of
    decreasing temperature internally, so that warm starts go from large to small radius)."""
    from tba.solvers.ground import require_deformation, require_model

    require_model(model)
    deformation = require_deformation(deformation)
    temps = [float(T) for T in np.atleast_1d(temperatures)]
    for T in temps:
        if not (math.isfinite(T) and T > 0):
            raise ValueError(f"temperatures must be finite and positive, got {T!r}")
    # pole and resonance factors change the bulk term (it comes from the kernel's tails); the
    # model's own value would be wrong, so it is left out
    bulk = None if deformation.has_poles else model.bulk_energy_density
    out = {}
    start = None
    for T in sorted(set(temps)):  # increasing T = decreasing R: towards the branch point
        R = 1.0 / T
        res = solve_ground_state(model, R, deformation, tol=tol, start=start)
        if not res.converged:
            out[T] = ThermoPoint(T, res.status, message=res.message)
            continue
        start = res
        d = energy_derivatives(res, spins=(), second=True)
        E, dE, d2E = res.energy, d["dE_dR"], d["d2E_dR2"]
        eE, edE, ed2E = res.error, d["dE_dR_error"], d["d2E_dR2_error"]
        b = bulk or 0.0
        out[T] = ThermoPoint(
            temperature=T, status=Status.CONVERGED,
            free_energy=T * E + b, free_energy_error=T * eE,
            entropy=R * dE - E, entropy_error=R * edE + eE,
            energy_density=dE + b, energy_density_error=edE,
            specific_heat=-R * R * d2E, specific_heat_error=R * R * ed2E,
            bulk_included=bulk is not None,
            message="" if bulk is not None else
            "bulk term not known for this model" + (" with pole factors" if deformation.has_poles else "")
            + ": left out")
    return [out[T] for T in temps]
