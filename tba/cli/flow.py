"""Command-line subcommands about the flow: ``tba branch-point`` and ``tba flow-check``.

Registered by ``tba.cli.commands.build_parser``; they use the argument checks of ``tba.cli.common`` (one-line errors,
exit code 2).
"""

import argparse
import contextlib
import sys

from tba.cli.common import (Once, UsageError, add_max_points_argument, add_model_arguments,
                            add_progress_argument, add_tol_argument, build_model,
                            check_deformation, coupling, fmt, json_text, max_points, parse_radii,
                            progress_every, too_many, tolerance)
from tba.scans.limits import MAX_SOLVE_POINTS

# the models, solvers and physics are imported by the commands (tba --help stays fast)


def _progress(args, prefix, total=None):
    """Periodic lines on stderr when it is not a terminal (`tba.scans.progress`), as a
    context manager giving the `ProgressLines` (None when there are to be no lines)."""
    from tba.scans.progress import ProgressLines, lines_wanted

    every = progress_every(args)
    if not lines_wanted(every):
        return contextlib.nullcontext(None)
    return ProgressLines(prefix, total, unit="points", every=every, log=sys.stderr)


def cmd_branch_point(args, out):
    from tba.models.cdd import ttbar
    from tba.physics.flow import BranchPoint, branch_point

    model = build_model(args)
    alpha = coupling("--alpha", args.alpha)
    tol = tolerance(args.tol)
    with _progress(args, "tba branch-point"):  # one computation: the time it has taken
        if args.method == "continuation":
            from tba.physics.continuation import locate_fold

            if alpha <= 0:
                bp = branch_point(model, alpha, tol)  # status "none" with its reason
            else:
                try:
                    fold = locate_fold(model, ttbar(alpha), tol=tol)
                except RuntimeError as exc:
                    raise UsageError(f"argument --method: continuation failed: {exc}") from None
                bp = BranchPoint(
                    model.name, alpha, "found", radius=fold.value, energy=fold.energy,
                    radius_error=fold.value_error, energy_error=fold.energy_error,
                    message=f"fold located by pseudo-arclength continuation in {fold.steps} steps")
        else:
            bp = branch_point(model, alpha, tol)
    rec = {"model": model.name, "coupling": model.coupling, **bp.as_record(), "method": args.method}
    if args.json:
        print(json_text(rec), file=out)
    elif bp.status == "found":
        name = model.name if model.coupling is None else f"{model.name} (B = {model.coupling:g})"
        print(f"{name}, alpha = {alpha:g}: branch point at "
              f"R_c = {bp.radius:.15g} +- {bp.radius_error:.1e}, E_0(R_c) = {bp.energy:.15g} "
              f"+- {bp.energy_error:.1e} (T_H = {1 / bp.radius:.12g}); status {bp.status}", file=out)
    else:
        print(f"{model.name}, alpha = {alpha:g}: status {bp.status}: {bp.message}", file=out)
    return 0


FLOW_HEADER = (f"{'R':>10} {'alpha':>8} {'E':>22} {'dE/dR':>14} {'dE/dalpha':>14} "
               f"{'residual/|E E_R|':>16} {'error/|E E_R|':>13}  status")


def cmd_flow_check(args, out):
    from tba.models.cdd import ttbar
    from tba.solvers.ground import flow_residual, solve_ground_state

    model = build_model(args)
    limit = max_points(args, MAX_SOLVE_POINTS)
    radii = parse_radii(args.radius, limit)
    alphas = [coupling("--alpha", a) for a in args.alpha]
    if len(radii) * len(alphas) > limit:
        raise too_many("--alpha", len(radii) * len(alphas), limit, "points (radii x alphas)")
    for alpha in alphas:
        check_deformation(ttbar(alpha), radii)
    tol = tolerance(args.tol)
    lines = _progress(args, "tba flow-check", len(radii) * len(alphas))
    if not args.json:
        print(FLOW_HEADER, file=out, flush=True)
    with lines as progress:
        for alpha in alphas:
            start = None
            for R in radii:
                res = solve_ground_state(model, R, ttbar(alpha), tol=tol, start=start)
                if progress is not None:
                    progress.update()
                rec = {"model": model.name, "coupling": model.coupling, "radius": R, "alpha": alpha,
                       "status": res.status.value, "energy": None, "dE_dR": None, "dE_dalpha": None,
                       "residual": None, "residual_error": None, "scale": None}
                if res.converged:
                    start = res
                    f = flow_residual(res)
                    rec.update(energy=res.energy, dE_dR=f["dE_dR"], dE_dalpha=f["dE_dalpha1"],
                               residual=f["residual"], residual_error=f["error"], scale=f["scale"])
                if args.json:
                    print(json_text(rec), file=out, flush=True)
                    continue
                rel = (lambda k: rec[k] / rec["scale"] if rec[k] is not None and rec["scale"] else None)
                print(f"{R:>10.6g} {alpha:>8.4g} {fmt(rec['energy'], '22.15g'):>22} "
                      f"{fmt(rec['dE_dR'], '14.8g'):>14} {fmt(rec['dE_dalpha'], '14.8g'):>14} "
                      f"{fmt(rel('residual'), '16.2e'):>16} {fmt(rel('residual_error'), '13.1e'):>13}"
                      f"  {rec['status']}", file=out, flush=True)
    return 0


def add_flow_commands(sub, conventions):
    """Register the subcommands on the ``tba`` subparsers object."""
    fmt = argparse.RawDescriptionHelpFormatter
    bp = sub.add_parser("branch-point", help="the ground state's branch point R_c(alpha)",
                        description="Radius where the deformed ground state stops being real "
                        "(alpha > 0): E_0'(R~) = 1/alpha on the undeformed curve, or the fold "
                        "of the deformed equations by continuation.",
                        epilog=conventions, formatter_class=fmt)
    add_model_arguments(bp)
    bp.add_argument("--alpha", required=True, action=Once, metavar="A", help="TTbar coupling")
    bp.add_argument("--method", choices=("curve", "continuation"), default="curve", action=Once,
                    help="undeformed curve (default) or pseudo-arclength continuation")
    add_tol_argument(bp)
    bp.add_argument("--json", action="store_true", help="one JSON object")
    add_progress_argument(bp, "on a terminal, none")
    bp.set_defaults(func=cmd_branch_point)

    fc = sub.add_parser("flow-check", help="Burgers-flow residuals over radii and alphas",
                        description="For each radius and alpha: E, the exact derivatives dE/dR and "
                        "dE/dalpha from the linearised TBA, and the flow residual "
                        "dE/dalpha - E dE/dR (P = 0) relative to |E dE/dR|.",
                        epilog=conventions, formatter_class=fmt)
    add_model_arguments(fc)
    fc.add_argument("--radius", required=True, nargs="+", action="extend", metavar="R",
                    help="radii: numbers and/or START:STOP:COUNT (repeated options add up)")
    fc.add_argument("--alpha", required=True, nargs="+", action="extend", metavar="A",
                    help="TTbar couplings (repeated options add up)")
    add_tol_argument(fc)
    fc.add_argument("--json", action="store_true", help="one JSON object per line per point")
    add_max_points_argument(fc, MAX_SOLVE_POINTS, "points (radii x alphas)")
    add_progress_argument(fc, "on a terminal, none (the rows show it)")
    fc.set_defaults(func=cmd_flow_check)
