"""TBA solver for integrable S-matrices with CDD (TTbar) deformations.

Public names::

    from tba import ising_e8, ttbar, solve_ground_state
    result = solve_ground_state(ising_e8(), 1.0, ttbar(0.05), tol=1e-12)
    result.energy, result.error, result.status
"""

from tba.models.cdd import CDD, NO_DEFORMATION, cdd_factor, higher_spin, resonance, ttbar
from tba.models import (
    DiagonalModel,
    HalfBlock,
    free_fermion,
    get_model,
    ising_e8,
    lee_yang,
    model_names,
    sine_gordon,
    sinh_gordon,
    user_model,
)
from tba.solvers.result import SolveError, SolveResult, Status
from tba.solvers.ground import solve_ground_state, solve_radii

__version__ = "0.1.0"

__all__ = [
    "CDD", "NO_DEFORMATION", "cdd_factor", "higher_spin", "resonance", "ttbar",
    "DiagonalModel", "HalfBlock", "free_fermion", "get_model", "ising_e8", "lee_yang", "model_names",
    "sine_gordon", "sinh_gordon", "user_model",
    "SolveError", "SolveResult", "Status",
    "solve_ground_state", "solve_radii",
]
