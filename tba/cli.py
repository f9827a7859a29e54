"""Command line: ``tba solve`` and ``tba demo``.

Bad input prints one line on stderr naming the argument and exits with code 2. Points are
printed as soon as they are solved, so an interrupted run keeps what it has shown.
"""

import argparse
import json
import math
import sys

import numpy as np

from tba import __version__
from tba.deformation import CDD
from tba.models import MODELS, MODELS_WITH_COUPLING, get_model
from tba.solver import solve_ground_state

CONVENTIONS = """\
conventions:
  units: the lightest mass is 1; R is the circumference of the space circle.
  E is the TBA ground-state energy without the bulk term f R.
  deformation: S_ab(t) -> S_ab(t) exp(i alpha m_a m_b sinh t), so that
  d/dalpha E = E dE/dR + P^2/R and E(R, alpha) = E(R + alpha E, 0) for P = 0;
  alpha > 0 is the side where the ground state meets a branch point (Hagedorn).
  --cdd S:A adds exp(i A sinh(S t)) for odd spin S >= 3 (single-species models).
  status: converged | no-real-solution | not-converged; energy and error are
  null unless converged. error estimates |E - exact| and is meant to bound it."""


class UsageError(Exception):
    """Bad command-line input: reported on one line, exit code 2."""


class _Parser(argparse.ArgumentParser):
    def error(self, message):
        raise UsageError(message)


def _finite(name, text):
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
            start, stop = (_finite("--radius", p) for p in parts[:2])
            try:
                count = int(parts[2])
            except ValueError:
                raise UsageError(f"argument --radius: COUNT must be an integer, got {parts[2]!r}") from None
            if count < 1 or (count == 1 and start != stop):
                raise UsageError(f"argument --radius: COUNT must be >= 2 for a range, got {count}")
            radii.extend(np.linspace(start, stop, count).tolist())
        else:
            radii.append(_finite("--radius", tok))
    for R in radii:
        if R <= 0:
            raise UsageError(f"argument --radius: radii must be positive, got {R:g}")
    return radii


def parse_cdd(tokens, alpha):
    couplings = {1: alpha} if alpha else {}
    for tok in tokens or []:
        spin, sep, value = tok.partition(":")
        if not sep:
            raise UsageError(f"argument --cdd: expected SPIN:ALPHA, got {tok!r}")
        try:
            s = int(spin)
        except ValueError:
            raise UsageError(f"argument --cdd: spin must be an odd integer, got {spin!r}") from None
        if s < 3 or s % 2 == 0:
            raise UsageError(f"argument --cdd: spin must be odd and >= 3 (use --alpha for spin 1), got {s}")
        couplings[s] = couplings.get(s, 0.0) + _finite("--cdd", value)
    return CDD(couplings)


def _build_model(args):
    if args.model not in MODELS:
        raise UsageError(f"argument --model: unknown model {args.model!r} (choose from {', '.join(MODELS)})")
    coupling = None
    if args.coupling is not None:
        if args.model not in MODELS_WITH_COUPLING:
            raise UsageError(f"argument --coupling: model {args.model} has no coupling")
        coupling = _finite("--coupling", args.coupling)
        if not 0 < coupling < 2:
            raise UsageError(f"argument --coupling: B must lie in (0, 2), got {args.coupling}")
    elif args.model in MODELS_WITH_COUPLING:
        raise UsageError(f"argument --coupling: required for model {args.model}")
    return get_model(args.model, coupling)


def _fmt(x, spec):
    return "-" if x is None or (isinstance(x, float) and math.isnan(x)) else format(x, spec)


TABLE_HEADER = f"{'model':<13} {'B':>5} {'R':>12} {'alpha':>9} {'E_0':>22} {'error':>8} {'it':>3}  status"


def table_row(rec):
    return (f"{rec['model']:<13} {_fmt(rec['coupling'], '5.3g'):>5} {rec['radius']:>12.6g} "
            f"{rec['alpha']:>9.4g} {_fmt(rec['energy'], '22.15g'):>22} {_fmt(rec['error'], '8.1e'):>8} "
            f"{rec['iterations']:>3}  {rec['status']}")


def cmd_solve(args, out):
    model = _build_model(args)
    radii = parse_radii(args.radius)
    alpha = _finite("--alpha", args.alpha)
    deformation = parse_cdd(args.cdd, alpha)
    tol = _finite("--tol", args.tol)
    if not 1e-15 <= tol < 1e-2:
        raise UsageError(f"argument --tol: must lie in [1e-15, 1e-2), got {args.tol}")
    if not args.json:
        print(TABLE_HEADER, file=out, flush=True)
    start = None
    for R in radii:
        res = solve_ground_state(model, R, deformation, tol=tol, start=start)
        if res.converged:
            start = res
        rec = res.as_record()
        print(json.dumps(rec) if args.json else table_row(rec), file=out, flush=True)
    return 0


DEMO_POINTS = [  # (model, coupling, alpha, radii): a small scan of our own
    ("sinh-gordon", 0.6, 0.1, "0.3:3:10"),
    ("sinh-gordon", 0.6, -0.1, "0.3:3:10"),
    ("ising-e8", None, 0.05, "0.2:3:8"),
    ("ising-e8", None, -0.05, "0.2:3:8"),
]


def cmd_demo(args, out):
    """A built-in scan: two interacting models, both signs of alpha, printed as a table."""
    print("Ground-state energies of sinh-Gordon (B = 0.6) and the E8 theory with a TTbar CDD\n"
          "factor of both signs; on the alpha > 0 side the smallest radii lie past the branch\n"
          "point and have no real solution.\n", file=out)
    print(TABLE_HEADER, file=out, flush=True)
    for model, coupling, alpha, radii in DEMO_POINTS:
        ns = argparse.Namespace(model=model, coupling=None if coupling is None else str(coupling),
                                radius=[radii], alpha=str(alpha), cdd=None, tol="1e-12", json=False)
        model_obj = _build_model(ns)
        start = None
        for R in parse_radii(ns.radius):
            res = solve_ground_state(model_obj, R, parse_cdd(None, alpha), tol=1e-12, start=start)
            start = res if res.converged else start
            print(table_row(res.as_record()), file=out, flush=True)
    return 0


def build_parser():
    parser = _Parser(prog="tba", description="TBA ground-state energies of integrable S-matrices "
                     "with CDD (TTbar) deformations.", epilog=CONVENTIONS,
                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"tba {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)
    solve = sub.add_parser("solve", help="ground-state energy at one or more radii",
                           description="Solve the ground-state TBA at the given radii (in order, "
                           "each warm-started from the previous one).", epilog=CONVENTIONS,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
    solve.add_argument("--model", required=True, metavar="{" + ",".join(MODELS) + "}",
                       help="the S-matrix")
    solve.add_argument("--coupling", metavar="B", help="sinh-Gordon coupling B in (0, 2)")
    solve.add_argument("--radius", required=True, nargs="+", metavar="R",
                       help="radii: numbers and/or START:STOP:COUNT (both ends included)")
    solve.add_argument("--alpha", default="0", metavar="A", help="TTbar coupling (default 0)")
    solve.add_argument("--cdd", action="append", metavar="S:A",
                       help="extra CDD factor of odd spin S >= 3 with coupling A (repeatable)")
    solve.add_argument("--tol", default="1e-12", metavar="T",
                       help="relative accuracy asked of each energy (default 1e-12)")
    solve.add_argument("--json", action="store_true", help="one JSON object per line per point")
    solve.set_defaults(func=cmd_solve)
    demo = sub.add_parser("demo", help="run the built-in demonstration scan",
                          description="Sinh-Gordon (B = 0.6) and the E8 theory at both signs of alpha.")
    demo.set_defaults(func=cmd_demo)
    return parser


def main(argv=None):
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
        return args.func(args, sys.stdout)
    except UsageError as exc:
        print(f"tba: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("tba: interrupted; the points printed above are complete", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
