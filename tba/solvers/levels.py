"""Levels by name: the ground state, or an excited state named by its Bethe quantum numbers.

One place that turns a level's name into the right solver, shared by `tba solve --state` and by
scans (run files' ``states``). Names:

* ``"ground"``: `tba.solvers.ground.solve_ground_state` (every model, every deformation);
* quantum numbers, e.g. ``"-1/2,1/2"`` or ``"0"``: real-rapidity excited states
  (`tba.solvers.excited.solve_excited`: single-species models without bound states), for the
  Lee-Yang model its zero-momentum one-particle state ``"0"``
  (`tba.solvers.lee_yang.solve_lee_yang_one_particle`, TTbar factor only), and for the free
  massless models right movers (I > 0) and left movers (I < 0)
  (`tba.solvers.massless.solve_massless_level`; bosons take repeated integers, "1,1").

`level_name` writes a level in canonical form (quantum numbers sorted, as fractions), so that
"1/2,-1/2", "-0.5, 0.5" and ["1/2", "-1/2"] name the same level. Names are parsed without a
model: the rules of the massive excited states (half-odd numbers for an even number of
particles, integers for an odd one, distinct) are applied there, and a name that breaks them
but is made of integers and half-integers (a bosonic "1,1" or "-1,1") is kept for the model to
accept or refuse (`unavailable`).
"""

from fractions import Fraction

from tba.solvers.excited import POLE_REFUSAL, check_model, parse_state, solve_excited, state_items
from tba.solvers.ground import require_deformation, require_model, solve_ground_state

GROUND = "ground"


def parse_level(text):
    """``"ground"`` or a tuple of Fractions (sorted) from a name like ``"1/2,-1/2"``."""
    if isinstance(text, str) and text.strip() == GROUND:
        return GROUND
    text = state_items(text)
    try:
        return parse_state(text)
    except ValueError:
        numbers = _half_integers(text)
        if numbers is None:
            raise
        return numbers


def _half_integers(items):
    """The sorted quantum numbers of ``items`` if each is an integer or half-integer, else None."""
    out = []
    for n in items:
        try:
            value = Fraction(n.strip()) if isinstance(n, str) else Fraction(n)
        except (TypeError, ValueError):
            return None
        if value.denominator > 2:
            return None
        out.append(value)
    return tuple(sorted(out)) if out else None


def level_name(level):
    """The canonical name of a level: ``"ground"`` or the sorted quantum numbers, e.g. "-1/2,1/2"."""
    level = parse_level(level)
    return GROUND if level == GROUND else ",".join(str(Fraction(n)) for n in level)


def unavailable(model, level, deformation=None):
    """Why ``level`` cannot be computed for ``model`` (with ``deformation``), or None."""
    require_model(model)
    level = parse_level(level)
    if level == GROUND:
        return None
    if model.is_massless:  # the TTbar factor only, said in the massless solver's words
        from tba.solvers.massless import refusal

        return refusal(model, level, deformation)
    if deformation is not None and deformation.has_poles:
        return POLE_REFUSAL
    if model.name == "lee-yang":
        if level != (0,):
            return "lee-yang has one excited level here: its one-particle state 0"
        if deformation is not None and not deformation.is_zero and not deformation.is_ttbar:
            return "the lee-yang one-particle state takes the TTbar factor (spin 1) only"
        return None
    try:
        check_model(model)
        parse_state(level)
    except ValueError as exc:
        return str(exc).split(": ", 1)[-1]
    return None


def solve_level(model, radius, level, deformation=None, *, tol=1e-12, start=None):
    """Solve ``level`` (a name or quantum numbers) of ``model`` at ``radius``: a SolveResult.
    Raises ValueError when the level does not exist for the model (see `unavailable`)."""
    level = parse_level(level)
    if level == GROUND:
        return solve_ground_state(model, radius, deformation, tol=tol, start=start)
    deformation = require_deformation(deformation)
    why = unavailable(model, level, deformation)
    if why is not None:
        raise ValueError(f"state: {why}")
    if model.is_massless:
        from tba.solvers.massless import solve_massless_level

        return solve_massless_level(model, radius, level, deformation, tol=tol, start=start)
    if model.name == "lee-yang":
        from tba.solvers.lee_yang import solve_lee_yang_one_particle

        return solve_lee_yang_one_particle(radius, deformation, tol=tol, start=start)
    return solve_excited(model, radius, level, deformation, tol=tol, start=start)
