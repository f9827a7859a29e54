"""What every command shares: conventions text, one-line usage errors, argument checks.

A bad argument raises `UsageError` with a message naming it; `tba.cli.commands.main` prints it on
one line and exits with code 2.
"""

import argparse
import math
from fractions import Fraction

import numpy as np

from tba.models.catalog import ModelError, get_model
from tba.models.cdd import CDD
from tba.solvers.ground import MIN_TOL

CONVENTIONS = """\
conventions:
  units: the lightest mass is 1; R is the circumference of the space circle.
  E is the TBA energy of the level (ground state unless --state) without the bulk term f R.
  deformation: S_ab(t) -> S_ab(t) exp(i alpha m_a m_b sinh t), so that
  d/dalpha E = E dE/dR + P^2/R and E(R, alpha) = E(R + alpha E, 0) for P = 0;
  alpha > 0 is the side where the ground state meets a branch point (Hagedorn),
  alpha < 0 the side where positive excited levels do.
  --cdd S:A adds exp(i A q_a q_b sinh(S t)) for a spin S >= 2 the model has
  (conserved charges q, 1 on the lightest species; tba models lists the spins).
  status: converged | no-real-solution | not-converged; energy and error are
  null unless converged. error estimates |E - exact| and is meant to bound it."""


class UsageError(Exception):
    """Bad command-line input: reported on one line, exit code 2."""


class Parser(argparse.ArgumentParser):
    def error(self, message):
        raise UsageError(message)


def finite(name, text):
    try:
        value = float(text)
    except ValueError:
        raise UsageError(f"argument {name}: not a number: {text!r}") from None
    if not math.isfinite(value):
        raise UsageError(f"argument {name}: must be finite, got {text!r}")
    return value


def parse_radii(tokens):
    """Numbers and START:STOP:COUNT ranges (evenly spaced, both ends included), in order."""
    radii = []
    for tok in tokens:
        if ":" in tok:
            parts = tok.split(":")
            if len(parts) != 3:
                raise UsageError(f"argument --radius: expected START:STOP:COUNT, got {tok!r}")
            start, stop = (finite("--radius", p) for p in parts[:2])
            try:
                count = int(parts[2])
            except ValueError:
                raise UsageError(f"argument --radius: COUNT must be an integer, got {parts[2]!r}") from None
            if count < 1 or (count == 1 and start != stop):
                raise UsageError(f"argument --radius: COUNT must be >= 2 for a range, got {count}")
            radii.extend(np.linspace(start, stop, count).tolist())
        else:
            radii.append(finite("--radius", tok))
    for R in radii:
        if R <= 0:
            raise UsageError(f"argument --radius: radii must be positive, got {R:g}")
    return radii


def parse_cdd(tokens, alpha, model=None):
    """--alpha and --cdd S:A as a CDD deformation; with ``model``, every spin must be one of its."""
    couplings = {1: alpha} if alpha else {}
    for tok in tokens or []:
        spin, sep, value = tok.partition(":")
        if not sep:
            raise UsageError(f"argument --cdd: expected SPIN:ALPHA, got {tok!r}")
        try:
            s = int(spin)
        except ValueError:
            raise UsageError(f"argument --cdd: spin must be an integer, got {spin!r}") from None
        if s < 2:
            raise UsageError(f"argument --cdd: spin must be >= 2 (use --alpha for spin 1), got {s}")
        couplings[s] = couplings.get(s, 0.0) + finite("--cdd", value)
    deformation = CDD(couplings)
    if model is not None:
        try:
            deformation.check(model)
        except ValueError as exc:
            raise UsageError(f"argument --cdd: {str(exc).split(': ', 1)[-1]}") from None
    return deformation


def tolerance(text):
    tol = finite("--tol", text)
    if not MIN_TOL <= tol < 1e-2:
        raise UsageError(f"argument --tol: must lie in [{MIN_TOL:g}, 1e-2), got {text}")
    return tol


def build_model(args):
    coupling = None if args.coupling is None else finite("--coupling", args.coupling)
    try:
        return get_model(args.model, coupling)
    except ModelError as exc:
        raise UsageError(f"argument --{exc.argument}: {exc.reason}") from None


def fmt(x, spec):
    return "-" if x is None or (isinstance(x, float) and math.isnan(x)) else format(x, spec)


TABLE_HEADER = f"{'model':<13} {'B':>5} {'R':>12} {'alpha':>9} {'E_0':>22} {'error':>8} {'it':>3}  status"


def table_row(rec):
    return (f"{rec['model']:<13} {fmt(rec['coupling'], '5.3g'):>5} {rec['radius']:>12.6g} "
            f"{rec['alpha']:>9.4g} {fmt(rec['energy'], '22.15g'):>22} {fmt(rec['error'], '8.1e'):>8} "
            f"{rec['iterations']:>3}  {rec['status']}")


STATE_HEADER = f"{'state':<16} {'R':>12} {'alpha':>9} {'E':>22} {'error':>8} {'P':>14}  status"


def state_row(rec):
    state = ",".join(str(Fraction(n)) for n in rec["state"])
    return (f"{state:<16} {rec['radius']:>12.6g} {rec['alpha']:>9.4g} "
            f"{fmt(rec['energy'], '22.15g'):>22} {fmt(rec['error'], '8.1e'):>8} "
            f"{fmt(rec['momentum'], '14.8g'):>14}  {rec['status']}")


def parse_state_argument(text, model, deformation):
    """--state N1,N2,...: Bethe quantum numbers (decimals or fractions like 1/2,-1/2), or ground."""
    from tba.solvers.levels import parse_level, unavailable

    try:
        level = parse_level(text)
        why = unavailable(model, level, deformation)
        if why is not None:
            raise ValueError(why)
        return level
    except (ValueError, TypeError) as exc:
        raise UsageError(f"argument --state: {str(exc).split(': ', 1)[-1]}") from None


def add_model_arguments(parser):
    """--model and --coupling, shared by every command that solves one model."""
    parser.add_argument("--model", required=True, metavar="NAME",
                        help="the S-matrix: free-fermion, sinh-gordon, lee-yang, ising-e8, "
                        "sine-gordon, ..., or an algebra name (A4, D5, E6, T2); tba models lists them")
    parser.add_argument("--coupling", metavar="V", help="the model's parameter: sinh-gordon B in "
                        "(0, 2), sine-gordon N (reflectionless point, integer >= 1), "
                        "massless-bosons n (the number of bosons)")


def add_tol_argument(parser):
    parser.add_argument("--tol", default="1e-12", metavar="T",
                        help="relative accuracy asked of each energy (default 1e-12)")
