"""``tba flow-check --state`` and ``--cdd``: the flow relation of excited levels and of higher spins.

* ``--state S`` (an excited level with real rapidities, `tba.solvers.excited`): the Burgers
  equation with momentum, dE/dalpha - E dE/dR - P^2/R with P = 2 pi sum I_k / R, from exact
  derivatives (`tba.physics.flow.level_flow_residual`).
* ``--cdd S:A`` (the ground state with higher-spin CDD factors): for spin 1 and every spin s of
  the deformation the generalised flow dE/dalpha_s - s E_s dE_s/dR, E_s the level's spin-s charge
  (derived in `tba.models.cdd`; `tba.physics.flow.spin_flow_residual`).

One JSON line (or table row) per point and spin; the residual and its error estimate both
absolute and relative to the scale (|E dE/dR| + P^2/R, or |s E_s dE_s/dR|), in the table and in
JSON (``residual``, ``residual_error``, ``relative_residual``, ``relative_error``, ``scale``), as
in the ground state's flow check. ``dE_dalpha_s`` is the derivative with respect to the row's
spin-s coupling (``dE_dalpha1`` for spin 1).
"""

import numpy as np

from tba.cli.common import (ENERGY_SPEC, R_SPEC, UsageError, check_deformation, fmt, json_text,
                            parse_cdd, parse_state_argument)
from tba.models.cdd import CDD

HEADER = (f"{'R':>16} {'alpha':>12} {'spin':>4} {'E':>22} {'dE/dR':>20} {'dE/dalpha_s':>20} "
          f"{'residual':>9} {'error':>8} {'relative':>9} {'rel. error':>10}  status")


def _setup(args, model):
    level = "ground"
    if args.state is not None:
        level = parse_state_argument(args.state, model, None)
    if level != "ground":
        if args.cdd:
            raise UsageError("argument --cdd: the generalised flow of higher spins is derived for "
                             "the ground state only (no --state)")
        if model.is_massless or model.name == "lee-yang":
            raise UsageError(f"argument --state: {model.name}: the flow check of excited levels "
                             "needs exact dE/dalpha, available for levels with real rapidities "
                             "of massive models (sinh-gordon, free-fermion, user models)")
    return level


def flow_check_levels(args, out, model, radii, alphas, tol):
    """Print the flow check of ``--state`` or ``--cdd`` over radii and alphas."""
    from tba.physics.flow import level_flow_residual, spin_flow_residual
    from tba.solvers.levels import level_name, solve_level

    level = _setup(args, model)
    extra = parse_cdd(args.cdd, 0.0, model)
    spins = [1] + sorted(s for s in extra.couplings if s != 1)
    for alpha in alphas:
        check_deformation(CDD({**extra.couplings, **({1: alpha} if alpha else {})}), radii)
    if not args.json:
        print(HEADER, file=out, flush=True)
    for alpha in alphas:
        deformation = CDD({**extra.couplings, **({1: alpha} if alpha else {})})
        start = None
        for R in radii:
            res = solve_level(model, R, level, deformation, tol=tol, start=start)
            base = {"model": model.name, "coupling": model.coupling, "radius": R, "alpha": alpha,
                    "cdd_couplings": {str(s): a for s, a in deformation.couplings.items()},
                    "state": level_name(level), "status": res.status.value,
                    "energy": res.energy if res.converged else None,
                    "error": res.error if res.converged else None,
                    "momentum": res.momentum if res.converged else None,
                    "message": res.message}
            if res.converged:
                start = res
            for spin in spins:
                rec = {**base, "spin": spin, "dE_dR": None, "dE_dalpha_s": None, "E_s": None,
                       "dE_s_dR": None, "residual": None, "residual_error": None,
                       "relative_residual": None, "relative_error": None, "scale": None}
                if res.converged:
                    try:
                        f = (spin_flow_residual(res, spin) if level == "ground"
                             else level_flow_residual(res))
                    except (ValueError, np.linalg.LinAlgError) as exc:  # the point keeps E
                        rec["message"] = f"{res.message}; derivatives failed: {exc}"
                        f = None
                    if f is not None and level == "ground":
                        rec.update(dE_dR=f["dE_dR"], dE_dalpha_s=f["dE_dalpha_s"], E_s=f["E_s"],
                                   dE_s_dR=f["dE_s_dR"])
                    elif f is not None:
                        rec.update(dE_dR=f["dE_dR"], dE_dalpha_s=f["dE_dalpha1"], E_s=res.energy,
                                   dE_s_dR=f["dE_dR"])
                    if f is not None:
                        rel = (lambda x: float(x / f["scale"]) if f["scale"] else None)  # noqa: E731
                        rec.update(residual=f["residual"], residual_error=f["error"],
                                   relative_residual=rel(f["residual"]),
                                   relative_error=rel(f["error"]), scale=f["scale"])
                    if spin == 1:
                        rec["dE_dalpha1"] = rec["dE_dalpha_s"]
                if args.json:
                    print(json_text(rec), file=out, flush=True)
                    continue
                print(f"{R:{R_SPEC}} {alpha:>12.10g} {spin:>4} "
                      f"{fmt(rec['energy'], ENERGY_SPEC):>22} {fmt(rec['dE_dR'], '20.15g'):>20} "
                      f"{fmt(rec['dE_dalpha_s'], '20.15g'):>20} {fmt(rec['residual'], '9.2e'):>9} "
                      f"{fmt(rec['residual_error'], '8.1e'):>8} "
                      f"{fmt(rec['relative_residual'], '9.2e'):>9} "
                      f"{fmt(rec['relative_error'], '10.1e'):>10}  {rec['status']}", file=out,
                      flush=True)
    return 0
