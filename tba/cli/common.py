"""What every command shares: conventions text, one-line usage errors, argument checks.

A bad argument raises `UsageError` with a message naming it; `tba.cli.commands.main` prints it on
one line and exits with code 2. Checks that need no computing (numbers and their domain,
`tba.scans.limits`; sizes; output paths that cannot be written) run before any work.
"""

import argparse
import errno
import json
import math
import os
import sys
import tempfile
from fractions import Fraction
from pathlib import Path

from tba.scans.limits import (MAX_SOLVE_POINTS, coupling_problem, deformation_problem,
                              radius_problem, size_text)

# numpy, the models and the solvers are imported where they are used, so that building the
# parser (tba --help, tba models) stays fast; tests/test_startup.py checks what is imported

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
  null unless converged. error estimates |E - exact| and is meant to bound it.
  domain: 1e-100 <= R <= 700, |alpha| <= 1e12 (see README, "Limits")."""


class UsageError(Exception):
    """Bad command-line input: reported on one line, exit code 2."""


class _NegativeNumbers:
    """What argparse takes for a value although it starts with "-". argparse's own pattern
    knows -1 and -.5 only, so ``--alpha -1e-3`` was read as an option; here every spelling
    Python's float() reads (-1e-3, -1E+5, -1_000.5, -inf) and ranges such as -1:2:3 are
    values (and then checked by the option: -1 is no radius). No option of tba looks like
    a negative number, so nothing is lost."""

    @staticmethod
    def match(text):
        if not text.startswith("-") or text.startswith("--"):
            return False
        try:
            float(text.split(":", 1)[0])
        except ValueError:
            return False
        return True


class Parser(argparse.ArgumentParser):
    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self._negative_number_matcher = _NegativeNumbers()

    def error(self, message):
        raise UsageError(message)


class Once(argparse.Action):
    """A single-valued option: giving it twice is an error, never a silent override of the
    first value. (Options that take lists, --radius and flow-check's --alpha, accumulate.)"""

    def __call__(self, parser, namespace, values, option_string=None):
        given = vars(namespace).setdefault("_given_once", {})
        if self.dest in given:
            raise argparse.ArgumentError(self, f"given twice ({given[self.dest]!r} and {values!r}); "
                                               f"it takes one value")
        given[self.dest] = values
        vars(namespace).setdefault("_spelled", {})[self.dest] = option_string
        setattr(namespace, self.dest, values)


def spelled(args, dest, default):
    """The option string the user wrote for ``dest`` (an alias such as --out for -o/--output
    is named as written), ``default`` if it was not given."""
    return getattr(args, "_spelled", {}).get(dest) or default


def add_output_argument(parser, metavar, help, required=False, directory=False):
    """``-o/--output FILE`` (``--output-dir DIR`` with ``directory``), with the earlier
    spelling ``--out`` (``--out-dir``) as a hidden alias kept for old scripts. ``required`` is
    checked by `require_output` (argparse cannot require one of two spellings)."""
    if directory:
        parser.add_argument("--output-dir", dest="output_dir", action=Once, metavar=metavar, help=help)
        parser.add_argument("--out-dir", dest="output_dir", action=Once, help=argparse.SUPPRESS)
    else:
        parser.add_argument("-o", "--output", dest="output", action=Once, metavar=metavar,
                            help=help + (" (required)" if required else ""))
        parser.add_argument("--out", dest="output", action=Once, help=argparse.SUPPRESS)


def require_output(args):
    if args.output is None:
        raise UsageError("the following arguments are required: -o/--output")
    return args.output


def finite(name, text):
    """A float in any spelling Python reads (1e-3, -1E+5, 1_000.5, .5); finite."""
    try:
        value = float(text)
    except ValueError:
        raise UsageError(f"argument {name}: not a number: {text!r}") from None
    if not math.isfinite(value):
        raise UsageError(f"argument {name}: must be finite, got {text!r}")
    return value


def whole_number(name, text, minimum=1, what="a whole number"):
    """A whole number >= ``minimum``; integral floats (1e6, 8.0) are accepted too."""
    try:
        n = int(text)
    except ValueError:
        try:
            value = float(text)
        except ValueError:
            value = math.nan
        if not (math.isfinite(value) and value.is_integer()):
            raise UsageError(f"argument {name}: expected {what}, got {text!r}") from None
        n = int(value)
    if n < minimum:
        raise UsageError(f"argument {name}: expected {what} >= {minimum}, got {text!r}")
    return n


def coupling(name, text):
    """A CDD coupling: finite and inside the domain (`tba.scans.limits.MAX_COUPLING`)."""
    value = finite(name, text)
    why = coupling_problem(value)
    if why is not None:
        raise UsageError(f"argument {name}: {why}")
    return value


def _radius(text):
    R = finite("--radius", text)
    if R <= 0:
        raise UsageError(f"argument --radius: radii must be positive, got {text!r}")
    why = radius_problem(R)
    if why is not None:
        raise UsageError(f"argument --radius: {why}")
    return R


def too_many(name, n, limit, what):
    return UsageError(f"argument {name}: {n:,} {what} ({size_text(n)} of results), above the "
                      f"limit of {limit:,}: use a run file and tba run (parallel, resumable, "
                      f"shards for job arrays), or raise the limit with --max-points N")


RANGE_SYNTAX = "START:STOP:COUNT (evenly spaced) or START:STOP:COUNT:log (geometric)"


def parse_range(name, tok, value):
    """One range token of an option: ``START:STOP:COUNT`` (evenly spaced) or
    ``START:STOP:COUNT:log`` (geometric spacing, START and STOP > 0), both ends included.
    ``value(text)`` reads and checks one end. Returns (start, stop, count, log)."""
    parts = tok.split(":")
    log = len(parts) == 4 and parts[3].strip().lower() == "log"
    if len(parts) != 3 and not log:
        raise UsageError(f"argument {name}: expected a number or {RANGE_SYNTAX}, got {tok!r}")
    start, stop = (value(p) for p in parts[:2])
    n = whole_number(name, parts[2], what="COUNT to be a whole number")
    if n == 1 and start != stop:
        raise UsageError(f"argument {name}: COUNT must be >= 2 for a range, got {n}")
    if log and not (start > 0 and stop > 0):
        raise UsageError(f"argument {name}: a log range needs START > 0 and STOP > 0, got {tok!r}")
    return start, stop, n, log


def range_values(start, stop, n, log):
    """The values of a parsed range, both ends exactly as given."""
    import numpy as np

    values = (np.geomspace(start, stop, n) if log else np.linspace(start, stop, n)).tolist()
    values[0], values[-1] = start, stop
    return values


def parse_values(name, tokens, value, max_points=MAX_SOLVE_POINTS, what="values"):
    """Numbers and ranges (`parse_range`), in order, each read by ``value(text)``. The count
    is checked against ``max_points`` before any range is allocated."""
    items, total = [], 0
    for tok in tokens:
        if ":" in tok:
            items.append(parse_range(name, tok, value))
            n = items[-1][2]
        else:
            items.append(value(tok))
            n = 1
        total += n
        if total > max_points:
            raise too_many(name, total, max_points, what)
    out = []
    for item in items:
        out.extend(range_values(*item) if isinstance(item, tuple) else [item])
    return out


def parse_radii(tokens, max_points=MAX_SOLVE_POINTS):
    """--radius: numbers and ranges (`parse_range`: linear or log), in order."""
    return parse_values("--radius", tokens, _radius, max_points, "radii")


def parse_alphas(tokens, max_points=MAX_SOLVE_POINTS):
    """--alpha (solve, flow-check): TTbar couplings, numbers and ranges, in order; a value
    given twice is solved once."""
    alphas = parse_values("--alpha", tokens, lambda t: coupling("--alpha", t), max_points, "alphas")
    return list(dict.fromkeys(alphas))


def parse_cdd(tokens, alpha, model=None):
    """The deformation of --alpha A and --cdd S:A (repeatable, same spins add up); with
    ``model``, every spin must be one of its."""
    from tba.models.cdd import CDD

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
        couplings[s] = couplings.get(s, 0.0) + coupling("--cdd", value)
    for s, a in couplings.items():
        why = coupling_problem(a)
        if why is not None:  # several --cdd of one spin add up
            raise UsageError(f"argument --cdd: spin {s}: {why}")
    deformation = CDD(couplings)
    if model is not None:
        try:
            deformation.check(model)
        except ValueError as exc:
            raise UsageError(f"argument --cdd: {str(exc).split(': ', 1)[-1]}") from None
    return deformation


def parse_factors(poles, resonances):
    """The pole and resonance factors of --pole X:P and --resonance THETA0:P (repeatable):
    F_(pi x)^P and F^P with sin u = cosh theta0 (`tba.models.cdd.pole_factors`)."""
    from tba.models.cdd import CDD, pole_factors

    out = CDD({})
    for option, tokens, builder in (("--pole", poles, "poles"), ("--resonance", resonances, "resonances")):
        for tok in tokens or []:
            value, sep, power = tok.partition(":")
            if not sep:
                what = "X:POWER" if option == "--pole" else "THETA0:POWER"
                raise UsageError(f"argument {option}: expected {what}, got {tok!r}")
            v = finite(option, value)
            try:
                p = int(power)
            except ValueError:
                raise UsageError(f"argument {option}: the power must be a nonzero integer, got {power!r}") from None
            try:
                out = out + pole_factors(**{builder: [(v, p)]})
            except ValueError as exc:
                raise UsageError(f"argument {option}: {str(exc).split(': ', 1)[-1]}") from None
    return out


def check_deformation(deformation, radii):
    """Refuse couplings whose kernel terms overflow at the smallest radius
    (`tba.scans.limits.deformation_problem`), naming --alpha or --cdd."""
    smallest = min(radii)
    for s, a in sorted(deformation.couplings.items()):
        why = deformation_problem(s, a, smallest)
        if why is not None:
            raise UsageError(f"argument {'--alpha' if s == 1 else '--cdd'}: {why}")


def tolerance(text):
    from tba.solvers.ground import MIN_TOL

    tol = finite("--tol", text)
    if not MIN_TOL <= tol < 1e-2:
        raise UsageError(f"argument --tol: must lie in [{MIN_TOL:g}, 1e-2), got {text}")
    return tol


def build_model(args):
    from tba.models.catalog import ModelError, get_model

    coupling = None if args.coupling is None else finite("--coupling", args.coupling)
    try:
        return get_model(args.model, coupling)
    except ModelError as exc:
        raise UsageError(f"argument --{exc.argument}: {exc.reason}") from None


# -- output ---------------------------------------------------------------------------------

def plain(x):
    """``x`` with every non-finite float replaced by None (JSON null, an empty CSV cell),
    numpy scalars as Python numbers."""
    np = sys.modules.get("numpy")  # no numpy scalar without numpy
    if np is not None and isinstance(x, np.generic):
        x = x.item()
    if isinstance(x, float):
        return x if math.isfinite(x) else None
    if isinstance(x, dict):
        return {k: plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [plain(v) for v in x]
    return x


def json_text(record):
    """One record as strict JSON: NaN and infinities are null (never the NaN token, which
    JSON parsers other than Python's refuse)."""
    return json.dumps(plain(record), allow_nan=False)


def _read_only(path):
    try:
        return bool(os.statvfs(path).f_flag & os.ST_RDONLY)
    except OSError:
        return False


def _check_directory(name, target, where):
    """``where`` (an existing path) must be a directory we can create files in. Tried for
    real with an unnamed temporary file (O_TMPFILE on Linux: no name appears in the
    directory), since permission bits say nothing for root, /proc or /sys."""
    if not where.is_dir():
        raise UsageError(f"{name}: cannot write {target}: {where} is a file, not a directory")
    try:
        with tempfile.TemporaryFile(dir=where):
            pass
    except OSError as exc:
        why = ("on a read-only file system" if exc.errno == errno.EROFS or _read_only(where)
               else f"not writable ({exc.strerror or exc})")
        raise UsageError(f"{name}: cannot write {target}: {where} is {why}") from None


def _existing_ancestor(path):
    """The nearest ancestor of ``path`` that exists (``path`` itself excluded)."""
    p = path.parent
    while not p.exists() and p != p.parent:
        p = p.parent
    return p


def writable_file(name, path, replace=True):
    """Refuse an output file that cannot be written, before any work: a directory given as
    the file, a path under a regular file, a read-only file system, a file or directory we
    may not write. ``replace``: the file is written beside itself and renamed into place
    (HDF5 stores), so its directory must be writable even when the file exists. ``name``
    names the argument or key in the message. Returns the path."""
    path = Path(path).expanduser()
    if path.is_dir():
        raise UsageError(f"{name}: {path} is a directory; give a file name")
    if path.exists():
        if not os.access(path, os.W_OK):
            why = "is on a read-only file system" if _read_only(path) else "is not writable"
            raise UsageError(f"{name}: {path} {why}")
        if replace:
            _check_directory(name, path, path.parent)
    else:
        _check_directory(name, path, _existing_ancestor(path))
    return path


def writable_dir(name, path):
    """Refuse an output directory that cannot be created or written in (see `writable_file`)."""
    path = Path(path).expanduser()
    if path.exists() and not path.is_dir():
        raise UsageError(f"{name}: {path} is a file, not a directory")
    _check_directory(name, path, path if path.exists() else _existing_ancestor(path))
    return path


def fmt(x, spec):
    return "-" if x is None or (isinstance(x, float) and math.isnan(x)) else format(x, spec)


#: digits in tables: radii and alphas to 10 significant digits (0.3935456 and 0.39354558 stay
#: apart), energies to 15; JSON carries every digit (shortest round trip)
R_SPEC, ALPHA_SPEC, ENERGY_SPEC = "16.10g", "16.10g", "22.15g"

TABLE_HEADER = (f"{'model':<20} {'coupling':>8} {'R':>16} {'alpha':>16} {'E':>22} {'error':>8} "
                f"{'it':>3}  status")


def table_row(rec):
    return (f"{rec['model']:<20} {fmt(rec['coupling'], '.10g'):>8} {rec['radius']:{R_SPEC}} "
            f"{rec['alpha']:{ALPHA_SPEC}} {fmt(rec['energy'], ENERGY_SPEC):>22} "
            f"{fmt(rec['error'], '8.1e'):>8} {rec['iterations']:>3}  {rec['status']}")


STATE_HEADER = f"{'state':<16} {'R':>16} {'alpha':>16} {'E':>22} {'error':>8} {'P':>18}  status"


def state_row(rec):
    state = ",".join(str(Fraction(n)) for n in rec["state"])
    return (f"{state:<16} {rec['radius']:{R_SPEC}} {rec['alpha']:{ALPHA_SPEC}} "
            f"{fmt(rec['energy'], ENERGY_SPEC):>22} {fmt(rec['error'], '8.1e'):>8} "
            f"{fmt(rec['momentum'], '18.12g'):>18}  {rec['status']}")


def parse_state_argument(text, model, deformation):
    """--state N1,N2,...: Bethe quantum numbers (decimals or fractions like 1/2,-1/2), or ground."""
    from tba.solvers.levels import parse_level, unavailable

    try:
        level = parse_level(text)
    except (ValueError, TypeError) as exc:
        raise UsageError(f"argument --state: {str(exc).removeprefix('state: ')}") from None
    why = unavailable(model, level, deformation)
    if why is not None:
        raise UsageError(f"argument --state: {text!r}: {why}")
    return level


def add_model_arguments(parser):
    """--model and --coupling, shared by every command that solves one model."""
    parser.add_argument("--model", required=True, action=Once, metavar="NAME",
                        help="the S-matrix: free-fermion, sinh-gordon, lee-yang, ising-e8, "
                        "sine-gordon, ..., or an algebra name (A4, D5, E6, T2); tba models lists them")
    parser.add_argument("--coupling", action=Once, metavar="V", help="the model's parameter: "
                        "sinh-gordon B in (0, 2), sine-gordon N (reflectionless point, integer >= 1), "
                        "massless-bosons n (the number of bosons)")


def add_tol_argument(parser):
    parser.add_argument("--tol", default="1e-12", action=Once, metavar="T",
                        help="relative accuracy asked of each energy (default 1e-12)")


def add_max_points_argument(parser, default, what):
    parser.add_argument("--max-points", default=None, action=Once, metavar="N",
                        help=f"refuse more than N {what} (default {default:,}; see README, "
                        f"\"Limits\")")


def max_points(args, default):
    return default if args.max_points is None else whole_number("--max-points", args.max_points)


def add_progress_argument(parser, terminal="a terminal shows a bar instead"):
    """--progress-every SECONDS: periodic progress lines on stderr when it is not a terminal."""
    parser.add_argument("--progress-every", default=None, action=Once, metavar="SECONDS",
                        help="when stderr is not a terminal (a log file, a batch job), print a "
                        "line on it with what is done, the rate and the time left every "
                        f"SECONDS (default 30; 0: none); {terminal}")


def progress_every(args):
    """The --progress-every interval in seconds (>= 0; 0: no lines)."""
    from tba.scans.progress import DEFAULT_EVERY

    if args.progress_every is None:
        return DEFAULT_EVERY
    every = finite("--progress-every", args.progress_every)
    if every < 0:
        raise UsageError(f"argument --progress-every: must be >= 0 seconds (0: no progress "
                         f"lines), got {args.progress_every!r}")
    return every
