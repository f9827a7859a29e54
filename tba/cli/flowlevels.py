"""``tba flow-check --state`` and ``--cdd``: the flow relation of excited levels and of higher spins.

* ``--state S`` (an excited level with real rapidities, `tba.solvers.excited`): the Burgers
  equation with momentum, dE/dalpha - E dE/dR - P^2/R with P = 2 pi sum I_k / R, from exact
  derivatives (`tba.physics.flow.level_flow_residual`).
* ``--cdd S:A`` (the ground state with higher-spin CDD factors): for spin 1 and every spin s of
  the deformation the generalised flow dE/dalpha_s - s E_s dE_s/dR, E_s the level's spin-s charge
  (derived in `tba.models.cdd`; `tba.physics.flow.spin_flow_residual`).

One JSON line (or table row) per point and spin; residual and its error estimate relative to the
scale (|E dE/dR| + P^2/R, or |s E_s dE_s/dR|) in the table, absolute in JSON (with "scale").
"""

import numpy as np

from tba.cli.common import (UsageError, check_deformation, fmt, json_text, parse_cdd,
                            parse_state_argument)
from tba.models.cdd import CDD

HEADER = (f"{'R':>14} {'alpha':>8} {'spin':>4} {'E':>22} {'dE/dR':>14} {'dE/dalpha_s':>14} "
          f"{'residual/scale':>14} {'error/scale':>11}  status")


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
                    "couplings": {str(s): a for s, a in deformation.couplings.items()},
                    "state": level_name(level), "status": res.status.value,
                    "energy": res.energy if res.converged else None,
                    "error": res.error if res.converged else None,
                    "momentum": res.momentum if res.converged else None,
                    "message": res.message}
            if res.converged:
                start = res
            for spin in spins:
                rec = {**base, "spin": spin, "dE_dR": None, "dE_dalpha": None, "E_s": None,
                       "dE_s_dR": None, "residual": None, "residual_error": None, "scale": None}
                if res.converged:
                    try:
                        f = (spin_flow_residual(res, spin) if level == "ground"
                             else level_flow_residual(res))
                    except (ValueError, np.linalg.LinAlgError) as exc:  # the point keeps E
                        rec["message"] = f"{res.message}; derivatives failed: {exc}"
                        f = None
                    if f is not None and level == "ground":
                        rec.update(dE_dR=f["dE_dR"], dE_dalpha=f["dE_dalpha"], E_s=f["E_s"],
                                   dE_s_dR=f["dE_s_dR"])
                    elif f is not None:
                        rec.update(dE_dR=f["dE_dR"], dE_dalpha=f["dE_dalpha1"], E_s=res.energy,
                                   dE_s_dR=f["dE_dR"])
                    if f is not None:
                        rec.update(residual=f["residual"], residual_error=f["error"],
                                   scale=f["scale"])
                if args.json:
                    print(json_text(rec), file=out, flush=True)
                    continue
                rel = (lambda k: rec[k] / rec["scale"] if rec[k] is not None and rec["scale"]
                       else None)
                print(f"{R:>14.10g} {alpha:>8.4g} {spin:>4} {fmt(rec['energy'], '22.15g'):>22} "
                      f"{fmt(rec['dE_dR'], '14.8g'):>14} {fmt(rec['dE_dalpha'], '14.8g'):>14} "
                      f"{fmt(rel('residual'), '14.2e'):>14} {fmt(rel('residual_error'), '11.1e'):>11}"
                      f"  {rec['status']}", file=out, flush=True)
    return 0
