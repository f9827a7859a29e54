"""``tba models``: the built-in models, their names for --model, parameters, species, masses,
UV effective central charge (dilogarithm sum), whether massless, and their CDD spins.

Without names it lists the named models, A1-A8, D4-D8, E6-E8, T1-T4 and sine-Gordon N = 1..4;
every A<n>, D<n>, T<n> up to n = 40 and every N up to 40 is accepted as well (``tba models A12``,
``tba models sine-gordon --coupling 9``). ``--json``: one JSON object per line per model, with
the keys name, parameters, species, masses, c_eff, massless, spins.
"""

from fractions import Fraction

from tba.cli.common import UsageError, json_text

# the catalog is imported by the command, not to build the parser (tba --help stays fast)

_JSON_KEYS = ("name", "parameters", "species", "masses", "c_eff", "massless", "spins")


def _fraction(c):
    """'4/7 = 0.5714285714' when c is a simple fraction, else the number."""
    frac = Fraction(c).limit_denominator(200)
    if abs(float(frac) - c) <= 1e-11 and frac.denominator > 1:
        return f"{frac} = {c:.10g}"
    return f"{c:.10g}"


def _row(rec):
    name = rec["name"]
    params = rec["parameters"]
    if params:
        (key, p), = params.items()
        name = f"{name} {key}={p['value']}" if p["value"] is not None else name
        param = f"{key}: {p['range']}" if p["value"] is None else ""
    else:
        param = ""
    masses = ", ".join(f"{label}: {m:.6g}" for label, m in zip(rec["labels"], rec["masses"]))
    also = rec["algebra"] if rec["algebra"] not in (None, rec["name"]) else ""
    return (f"{name:<22} {also:<6} {param:<14} {rec['species']:>3}  "
            f"{_fraction(rec['c_eff']):<24} {rec['spins_text']:<45} {masses}")


def _massless_names():
    """'a, b and c': the massless models of the registry."""
    from tba.models.catalog import model_names, resolve

    names = [n for n in model_names() if resolve(n).massless]
    return ", ".join(names[:-1]) + " and " + names[-1] if len(names) > 1 else "".join(names)


def cmd_models(args, out):
    from tba.models.catalog import MAX_RANK, ModelError, model_summaries

    coupling = args.coupling
    if coupling is not None:
        try:
            coupling = float(coupling)
        except ValueError:
            raise UsageError(f"argument --coupling: not a number: {args.coupling!r}") from None
        if not args.names:
            raise UsageError("argument --coupling: give the model it belongs to (tba models "
                             "sine-gordon --coupling 9)")
    try:
        records = model_summaries(args.names or None, coupling)
    except ModelError as exc:
        raise UsageError(f"argument {'MODEL' if exc.argument == 'model' else '--coupling'}: "
                         f"{exc.reason}") from None
    if args.json:
        for rec in records:
            print(json_text({k: rec[k] for k in _JSON_KEYS}), file=out, flush=True)
        return 0
    print(f"{'name (--model)':<22} {'also':<6} {'parameter':<14} {'n':>3}  {'c_eff (R -> 0)':<24} "
          f"{'CDD spins':<45} masses (species: mass)", file=out)
    for rec in records:
        print(_row(rec), file=out, flush=True)
    if not args.names:
        print(f"\nAlso A<n> (n <= {MAX_RANK}), D<n> (4 <= n <= {MAX_RANK}), T<n> (n <= {MAX_RANK}) "
              f"and sine-gordon N <= {MAX_RANK}: tba models A12, tba models sine-gordon --coupling 9. "
              f"Algebra names (A4, E6, t2, ...) work with --model too.\n{_massless_names()} "
              f"are massless: their masses are the "
              f"scales M of the right (R) and left (L) movers. c_eff from the dilogarithm sum of "
              f"the plateau equations (sinh-gordon: the limit, reached logarithmically; massless "
              f"models: kink by kink). A conjugate pair is k, kbar.", file=out)
    return 0


def add_models_command(sub):
    """Register ``tba models`` on the subcommand parsers of ``tba``."""
    models = sub.add_parser("models", help="list the built-in models",
                            description="The built-in models: name for --model, parameters, "
                            "number of species, masses, UV c_eff (dilogarithm sum), massless or "
                            "not, and the allowed CDD spins (conserved charges).")
    models.add_argument("names", nargs="*", metavar="MODEL",
                        help="models to show (default: the list); any A<n>, D<n>, T<n>")
    models.add_argument("--coupling", metavar="V", help="the parameter of those named models "
                        "that have one (sinh-gordon B, sine-gordon N)")
    models.add_argument("--json", action="store_true",
                        help="one JSON object per line: name, parameters, species, masses, "
                        "c_eff, massless, spins")
    models.set_defaults(func=cmd_models)
