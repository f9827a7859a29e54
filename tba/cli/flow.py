"""Command-line subcommands about the flow: ``tba branch-point`` and ``tba flow-check``.

Registered by ``tba.cli.commands.build_parser``; they use the argument checks of ``tba.cli.common`` (one-line errors,
exit code 2).
"""

import argparse
import contextlib
import sys

from tba.cli.common import (ENERGY_SPEC, R_SPEC, Once, UsageError, add_max_points_argument,
                            add_model_arguments, add_progress_argument, add_tol_argument,
                            build_model, check_deformation, coupling, fmt, json_text, max_points,
                            parse_alphas, parse_radii, parse_state_argument, progress_every,
                            too_many, tolerance)
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


def _excited_branch_point(args, out, model, alpha, level):
    """tba branch-point --state: the fold of an excited level (`excited_branch_point`)."""
    from tba.output.labels import level_title, number
    from tba.physics.flow import excited_branch_point
    from tba.solvers.levels import level_name

    if args.method != "curve":
        raise UsageError("argument --method: continuation locates the ground state's fold only; "
                         "excited levels use the undeformed curve (--method curve)")
    tol = tolerance(args.tol)
    bp = excited_branch_point(model, level, alpha, tol=tol)
    rec = {"model": model.name, "coupling": model.coupling, **bp.as_record(), "method": "curve"}
    if args.json:
        print(json_text(rec), file=out)
        return 0
    where = (f"{_model_words(model)}, state {level_name(level)} ({level_title(level)}), "
             f"alpha = {number(alpha)}")
    if bp.status == "found":
        print(f"{where}: branch point at R_c = {bp.radius:.15g} +- {bp.radius_error:.1e}, "
              f"E(R_c) = {bp.energy:.15g} +- {bp.energy_error:.1e}; status {bp.status}", file=out)
    else:
        print(f"{where}: status {bp.status}: {bp.message}", file=out)
    return 0


def cmd_branch_point(args, out):
    from tba.models.cdd import ttbar
    from tba.output.labels import number
    from tba.physics.flow import BranchPoint, branch_point

    model = build_model(args)
    alpha = coupling("--alpha", args.alpha)
    if args.state is not None:
        level = parse_state_argument(args.state, model, ttbar(alpha) if alpha else None)
        if level != "ground":
            return _excited_branch_point(args, out, model, alpha, level)
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
    elif bp.found:
        print(f"{_model_words(model)}, alpha = {number(alpha)}: branch point at "
              f"R_c = {bp.radius:.15g} +- {bp.radius_error:.1e}, E(R_c) = {bp.energy:.15g} "
              f"+- {bp.energy_error:.1e} (T_H = {bp.hagedorn_temperature:.12g}); status "
              f"{bp.status.value}", file=out)
    else:
        print(f"{_model_words(model)}, alpha = {number(alpha)}: status {bp.status.value}: "
              f"{bp.message}", file=out)
    return 0


def _model_words(model):
    """``sinh-gordon B=0.6`` (the model label of files and figures), or the name."""
    from tba.models.catalog import model_label

    return model.name if model.coupling is None else model_label(model.name, model.coupling)


FLOW_HEADER = (f"{'R':>16} {'alpha':>12} {'E':>22} {'dE/dR':>20} {'dE/dalpha1':>20} "
               f"{'residual':>9} {'error':>8} {'relative':>9} {'rel. error':>10}  status")


def cmd_flow_check(args, out):
    from tba.models.cdd import ttbar
    from tba.solvers.ground import flow_residual, solve_ground_state

    model = build_model(args)
    limit = max_points(args, MAX_SOLVE_POINTS)
    radii = parse_radii(args.radius, limit)
    alphas = parse_alphas(args.alpha, limit)
    if len(radii) * len(alphas) > limit:
        raise too_many("--alpha", len(radii) * len(alphas), limit, "points (radii x alphas)")
    for alpha in alphas:
        check_deformation(ttbar(alpha), radii)
    tol = tolerance(args.tol)
    if args.state is not None or args.cdd:  # excited levels, higher spins: tba.cli.flowlevels
        from tba.cli.flowlevels import flow_check_levels

        return flow_check_levels(args, out, model, radii, alphas, tol)
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
                rec = {"model": model.name, "coupling": model.coupling, "radius": R,
                       "alpha": alpha, "status": res.status.value, "energy": None, "dE_dR": None,
                       "dE_dalpha1": None, "residual": None, "residual_error": None,
                       "relative_residual": None, "relative_error": None, "scale": None}
                if res.converged:
                    start = res
                    f = flow_residual(res)
                    rec.update(energy=res.energy, dE_dR=f["dE_dR"], dE_dalpha1=f["dE_dalpha1"],
                               residual=f["residual"], residual_error=f["error"],
                               relative_residual=f["relative_residual"],
                               relative_error=f["relative_error"], scale=f["scale"])
                rec["dE_dalpha"] = rec["dE_dalpha1"]  # deprecated name, kept for one release
                if args.json:
                    print(json_text(rec), file=out, flush=True)
                    continue
                print(f"{R:{R_SPEC}} {alpha:>12.10g} {fmt(rec['energy'], ENERGY_SPEC):>22} "
                      f"{fmt(rec['dE_dR'], '20.15g'):>20} {fmt(rec['dE_dalpha1'], '20.15g'):>20} "
                      f"{fmt(rec['residual'], '9.2e'):>9} {fmt(rec['residual_error'], '8.1e'):>8} "
                      f"{fmt(rec['relative_residual'], '9.2e'):>9} "
                      f"{fmt(rec['relative_error'], '10.1e'):>10}  {rec['status']}", file=out,
                      flush=True)
    return 0


def add_flow_commands(sub, conventions):
    """Register the subcommands on the ``tba`` subparsers object."""
    fmt = argparse.RawDescriptionHelpFormatter
    bp = sub.add_parser("branch-point", help="a level's branch point R_c(alpha)",
                        description="Radius where the deformed ground state stops being real "
                        "(alpha > 0): E_0'(R~) = 1/alpha on the undeformed curve, or the fold "
                        "of the deformed equations by continuation. With --state, the fold in R "
                        "of an excited level (dR/dR~ = 0 on its undeformed curve).",
                        epilog=conventions, formatter_class=fmt)
    add_model_arguments(bp)
    bp.add_argument("--alpha", required=True, action=Once, metavar="A", help="TTbar coupling")
    bp.add_argument("--method", choices=("curve", "continuation"), default="curve", action=Once,
                    help="undeformed curve (default) or pseudo-arclength continuation")
    bp.add_argument("--state", action=Once, metavar="STATE",
                    help="the level (as tba solve --state; default ground): an excited level's "
                    "fold in R at fixed alpha, on its undeformed curve")
    add_tol_argument(bp)
    bp.add_argument("--json", action="store_true", help="one JSON object")
    add_progress_argument(bp, "on a terminal, none")
    bp.set_defaults(func=cmd_branch_point)

    fc = sub.add_parser("flow-check", help="Burgers-flow residuals over radii and alphas",
                        description="For each radius and alpha: E, the exact derivatives dE/dR and "
                        "dE/dalpha1 from the linearised TBA, and the Burgers residual "
                        "dE/dalpha1 - E dE/dR (P = 0) with its error estimate, absolute and "
                        "relative to |E dE/dR|. With --state, an excited level's "
                        "dE/dalpha1 - E dE/dR - P^2/R; with --cdd, the generalised flow "
                        "dE/dalpha_s - s E_s dE_s/dR per spin.",
                        epilog=conventions, formatter_class=fmt)
    add_model_arguments(fc)
    fc.add_argument("--radius", required=True, nargs="+", action="extend", metavar="R",
                    help="radii: numbers and/or START:STOP:COUNT ranges (START:STOP:COUNT:log "
                    "for geometric spacing; repeated options add up)")
    fc.add_argument("--alpha", required=True, nargs="+", action="extend", metavar="A",
                    help="TTbar couplings: numbers and/or ranges (repeated options add up)")
    fc.add_argument("--state", action=Once, metavar="STATE",
                    help="an excited level with real rapidities (as tba solve --state): "
                    "dE/dalpha - E dE/dR - P^2/R")
    fc.add_argument("--cdd", action="append", metavar="S:A",
                    help="higher-spin CDD factor (as tba solve --cdd; repeatable): the "
                    "generalised flow dE/dalpha_s - s E_s dE_s/dR for spin 1 and each S")
    add_tol_argument(fc)
    fc.add_argument("--json", action="store_true", help="one JSON object per line per point")
    add_max_points_argument(fc, MAX_SOLVE_POINTS, "points (radii x alphas)")
    add_progress_argument(fc, "on a terminal, none (the rows show it)")
    fc.set_defaults(func=cmd_flow_check)
