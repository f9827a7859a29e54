"""TBA energy levels of integrable S-matrices with CDD (TTbar) deformations.

The public API: every name below is importable from ``tba`` and stays stable. Each is
imported on first use (models, solvers and physics; scans and figures with xarray, h5py,
matplotlib only when asked for), so ``import tba`` itself loads nothing heavy::

    import tba
    res = tba.solve(tba.sinh_gordon(0.6), 2.0, tba.ttbar(-0.1), state="-1/2,1/2")
    res.energy, res.error, res.status

Models          free_fermion, sinh_gordon, lee_yang, ising_e8, sine_gordon, user_model,
                massless_fermion, massless_bosons, tricritical_to_ising (massless),
                get_model, model_names, DiagonalModel, HalfBlock
Deformations    ttbar, higher_spin, cdd_factor, resonance, CDD, NO_DEFORMATION
Levels          solve (any level by name), solve_ground_state, solve_radii, solve_excited,
                solve_lee_yang_one_particle, bethe_yang_energy, level_name,
                solve_massless_level, free_levels (the levels of free massless models)
Derivatives     energy_derivatives, flow_residual, excited_derivatives (real-rapidity levels)
Flow            predict, predict_ground_state, cft_energy, cft_branch_radius, branch_point,
                level_branch_point, excited_branch_point (an excited level's fold in R),
                level_flow_residual (Burgers with momentum), spin_flow_residual (higher spins)
Continuation    locate_fold, second_branch, complex_pair
Thermodynamics  thermodynamics
Scans           scan, scan_run (in memory), open_scan (a file): xarray Datasets;
                plot_scan (a matplotlib Figure)
Results         SolveResult, Status, SolveError, BranchPoint, BranchStatus
"""

import importlib

__version__ = "0.1.0"

#: names imported on first use: name -> module. Nothing is imported with the package itself,
#: so that ``python -m tba --help`` and ``tba models`` do not load numba, scipy or the solvers.
_LAZY = {
    **dict.fromkeys(["CDD", "NO_DEFORMATION", "cdd_factor", "higher_spin", "resonance", "ttbar"],
                    "tba.models.cdd"),
    **dict.fromkeys(["DiagonalModel", "HalfBlock", "free_fermion", "get_model", "ising_e8",
                     "lee_yang", "massless_bosons", "massless_fermion", "model_names",
                     "sine_gordon", "sinh_gordon", "tricritical_to_ising", "user_model"],
                    "tba.models"),
    **dict.fromkeys(["SolveError", "SolveResult", "Status"], "tba.solvers.result"),
    **dict.fromkeys(["energy_derivatives", "flow_residual", "solve_ground_state", "solve_radii"],
                    "tba.solvers.ground"),
    "solve_excited": "tba.solvers.excited",
    "bethe_yang_energy": "tba.solvers.excited",
    "solve_lee_yang_one_particle": "tba.solvers.lee_yang",
    "level_name": "tba.solvers.levels",
    "solve_massless_level": "tba.solvers.massless",
    "free_levels": "tba.solvers.massless",
    "predict": "tba.physics.flow",
    "predict_ground_state": "tba.physics.flow",
    "cft_energy": "tba.physics.flow",
    "cft_branch_radius": "tba.physics.flow",
    "branch_point": "tba.physics.flow",
    "level_branch_point": "tba.physics.flow",
    "BranchPoint": "tba.physics.flow",
    "BranchStatus": "tba.physics.flow",
    "excited_branch_point": "tba.physics.flow",
    "level_flow_residual": "tba.physics.flow",
    "spin_flow_residual": "tba.physics.flow",
    "excited_derivatives": "tba.solvers.excited",
    "locate_fold": "tba.physics.continuation",
    "second_branch": "tba.physics.continuation",
    "complex_pair": "tba.physics.continuation",
    "thermodynamics": "tba.physics.thermo",
    "scan": "tba.output.dataset",
    "scan_run": "tba.output.dataset",
    "open_scan": "tba.output.dataset",
    "plot_scan": "tba.output.plotting",
}


def solve(model, radius, deformation=None, *, state="ground", tol=1e-12, start=None):
    """Solve one level of ``model`` at circumference ``radius``: a `SolveResult`.

    ``state`` names the level: ``"ground"``, or its Bethe quantum numbers I_k as a string
    (``"-1/2,1/2"``, ``"0"``) or a sequence (``["1/2", "-1/2"]``); half-odd numbers for an
    even number of particles, integers for an odd one (free massless models: the sign is the
    chirality, and bosons take repeated integers, ``"1,1"``). ``deformation`` is a `CDD` (default:
    none), ``tol`` the relative accuracy asked of the energy, ``start`` a solved neighbour
    to start from. Raises ValueError when the model does not have the level (E8 has no
    excited levels here; Lee-Yang only its one-particle level "0").
    """
    from tba.solvers.levels import solve_level

    if isinstance(state, (bool, int, float)) or not isinstance(state, (str, list, tuple)):
        raise TypeError(f"state: expected \"ground\" or Bethe quantum numbers (a string such as "
                        f"\"-1/2,1/2\", or a sequence), got {state!r}")
    return solve_level(model, radius, state, deformation, tol=tol, start=start)


#: the subpackages, reachable as attributes (``tba.solvers.ground``) as when they were
#: imported with the package
_SUBPACKAGES = {"models", "solvers", "physics", "scans", "store", "output", "cli"}


def __getattr__(name):
    module = _LAZY.get(name)
    if module is None and name in _SUBPACKAGES:
        return importlib.import_module(f"tba.{name}")
    if module is None:
        raise AttributeError(f"module 'tba' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_LAZY))


__all__ = ["solve", *_LAZY]
