"""``tba solve --branch second|complex``: the ground state off its physical branch.

Past the branch point R_c (alpha > 0, TTbar) the physical ground state has no real solution;
the fold of the deformed equations is located by pseudo-arclength continuation
(`tba.physics.continuation.locate_fold`), and from it

* ``--branch second``: at R > R_c the other real solution (the far side of the fold);
* ``--branch complex``: at R < R_c the complex-conjugate pair, printed as the member with
  Im E > 0 (its partner is the conjugate).

Each point is solved on two grids designed for its own effective radius (at the continuation's
fixed accuracy; a point whose error estimate exceeds --tol relative to max(|E|, 1) is
not-converged); ``error`` bounds
|E - exact| (for the pair, the modulus of the complex difference, so it bounds the real and
the imaginary part alike). A complex energy is never written where a real one is expected:
its records have ``energy`` null and the keys ``energy_real`` and ``energy_imag``.
"""

from tba.cli.common import UsageError, fmt, json_text

#: --branch values: the physical branch (the usual solve), the second real branch, the pair
BRANCHES = ("physical", "second", "complex")

BRANCH_HEADER = (f"{'R':>20} {'alpha':>12} {'branch':>8} {'Re E':>22} {'Im E':>22} {'error':>8}  "
                 "status")


def _check(model, deformation, state):
    if state != "ground":
        raise UsageError("argument --branch: the second branch and the complex pair are available "
                         "for the ground state only (no --state)")
    if not deformation.is_ttbar or not deformation.alpha > 0:
        raise UsageError("argument --branch: needs the TTbar factor alone with alpha > 0 (the side "
                         "where the ground state has its branch point); no --cdd")


def _record(model, R, deformation, branch, fold):
    return {"model": model.name, "coupling": model.coupling, "radius": R,
            "alpha": deformation.alpha,
            "cdd_couplings": {str(s): a for s, a in deformation.couplings.items()},
            "branch": branch, "status": None, "energy": None, "energy_real": None,
            "energy_imag": None, "error": None, "effective_radius_real": None,
            "effective_radius_imag": None, "branch_radius": fold.value,
            "branch_radius_error": fold.value_error, "message": ""}


def _point(rec, fold, R, branch, tol):
    from tba.physics.continuation import complex_pair, second_branch

    margin = fold.value_error
    if branch == "second" and not R > fold.value + margin:
        rec.update(status="no-real-solution", message=(
            f"R <= R_c = {fold.value:.15g} (+- {margin:.1e}): the second real branch lies above R_c"))
        return rec
    if branch == "complex" and not R < fold.value - margin:
        rec.update(status="not-available", message=(
            f"R >= R_c = {fold.value:.15g} (+- {margin:.1e}): two real solutions here, no "
            f"complex pair (--branch physical or second)"))
        return rec
    try:
        sol = second_branch(fold, R) if branch == "second" else complex_pair(fold, R)
    except RuntimeError as exc:
        rec.update(status="not-converged", message=str(exc))
        return rec
    E, r_eff = complex(sol.energy), complex(sol.effective_radius)
    if not sol.error <= tol * max(abs(E), 1.0):
        rec.update(status="not-converged", message=(
            f"error estimate {sol.error:.3g} above the tolerance {tol:g} (relative to max(|E|, 1))"))
        return rec
    rec.update(status="converged", energy_real=E.real, energy_imag=E.imag, error=sol.error,
               effective_radius_real=r_eff.real, effective_radius_imag=r_eff.imag)
    if branch == "second":
        rec.update(energy=E.real, energy_imag=0.0, effective_radius_imag=0.0,
                   message="second real branch (beyond the fold, unphysical)")
    else:
        rec.update(message="complex pair: this member has Im E > 0, its partner is the conjugate")
    return rec


def _row(rec):
    return (f"{rec['radius']:>20.15g} {rec['alpha']:>12.10g} {rec['branch']:>8} "
            f"{fmt(rec['energy_real'], '22.15g'):>22} {fmt(rec['energy_imag'], '22.15g'):>22} "
            f"{fmt(rec['error'], '8.1e'):>8}  {rec['status']}")


def solve_branch(args, out, model, radii, deformations, state, tol):
    """Print the points of ``--branch second|complex`` (one JSON line or table row each), one
    curve per alpha."""
    from tba.physics.continuation import locate_fold

    branch = args.branch
    for deformation in deformations:
        _check(model, deformation, state)
    if not args.json:
        print(BRANCH_HEADER, file=out, flush=True)
    for deformation in deformations:
        try:
            fold = locate_fold(model, deformation, tol=tol)
        except (RuntimeError, ValueError) as exc:
            raise UsageError(f"argument --branch: the fold could not be located: {exc}") from None
        if not args.json:
            print(f"# {model.name}, alpha = {deformation.alpha:.10g}: fold at R_c = "
                  f"{fold.value:.15g} +- {fold.value_error:.1e}, E(R_c) = {fold.energy:.15g} "
                  f"+- {fold.energy_error:.1e}", file=out)
        for R in radii:
            rec = _point(_record(model, R, deformation, branch, fold), fold, R, branch, tol)
            print(json_text(rec) if args.json else _row(rec), file=out, flush=True)
    return 0
