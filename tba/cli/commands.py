"""Command line: ``tba solve``, ``tba run``, ``tba merge``, ``tba report``, ``tba plot``,
``tba export``, ``tba demo``, and (from ``tba.cli.flow``) ``tba branch-point`` and
``tba flow-check``.

Bad input (arguments, run files, output files of another run, shards that do not belong
together, a cluster that cannot be reached or a missing dask) prints one line on stderr
naming the argument, key or file and exits with code 2. ``tba solve`` prints points as
soon as they are solved; ``tba run`` writes each finished chunk to its HDF5 file, so an
interrupted run keeps what it has written and the same command resumes it (exit code 130
after Ctrl-C, 143 after SIGTERM; exit code 1 when some tasks failed, with everything else
saved).
"""

import argparse
import csv
import os
import signal
import sys
from pathlib import Path

from tba import __version__
from tba.cli.common import (CONVENTIONS, STATE_HEADER, TABLE_HEADER, Once, Parser, UsageError,
                            add_max_points_argument, add_model_arguments, add_output_argument,
                            add_progress_argument, progress_every,
                            add_tol_argument, build_model, check_deformation, coupling, json_text,
                            max_points, parse_alphas, parse_cdd, parse_factors, parse_radii,
                            parse_state_argument, plain, require_output, spelled, state_row,
                            table_row, too_many, tolerance, whole_number, writable_dir,
                            writable_file)
from tba.scans.limits import MAX_POINTS, MAX_SOLVE_POINTS
from tba.scans import interrupts

# Everything else (the solvers, numba, scipy, h5py, matplotlib, the scan driver) is imported
# by the command that needs it, so that tba --help and tba models start fast; tests/
# test_startup.py checks which libraries each command path loads.


def cmd_solve(args, out):
    model = build_model(args)
    limit = max_points(args, MAX_SOLVE_POINTS)
    radii = parse_radii(args.radius, limit)
    alphas = parse_alphas(args.alpha or ["0"], limit)
    if len(radii) * len(alphas) > limit:
        raise too_many("--alpha", len(radii) * len(alphas), limit, "points (radii x alphas)")
    factors = parse_factors(args.pole, args.resonance)
    deformations = []
    for alpha in alphas:
        deformation = parse_cdd(args.cdd, alpha, model)
        check_deformation(deformation, radii)
        deformations.append(deformation + factors)
    tol = tolerance(args.tol)
    state = (parse_state_argument(args.state, model, deformations[0]) if args.state is not None
             else "ground")
    for deformation in deformations[1:]:  # the level must exist at every alpha
        if state != "ground":
            parse_state_argument(args.state, model, deformation)
    if args.branch != "physical":  # beyond the branch point: tba.cli.branches
        from tba.cli.branches import solve_branch

        return solve_branch(args, out, model, radii, deformations, state, tol)
    from tba.solvers.levels import solve_level

    header, row = (TABLE_HEADER, table_row) if state == "ground" else (STATE_HEADER, state_row)
    if not args.json:
        print(header, file=out, flush=True)
    for deformation in deformations:  # one curve per alpha, radii in the order given
        start = None
        for R in radii:
            res = solve_level(model, R, state, deformation, tol=tol, start=start)
            if res.converged:
                start = res
            rec = res.as_record()
            if deformation.has_poles:  # F_sigma^power of every factor, sigma = sin u, and the sign
                rec["cdd_factors"] = {k: deformation.describe()[k] for k in ("factors", "sign")}
            print(json_text(rec) if args.json else row(rec), file=out, flush=True)
    return 0


#: worker processes on one machine: at most this many per core (os.cpu_count())
WORKERS_PER_CORE = 4


def _local_processes(name, n):
    cores = os.cpu_count() or 1
    if n > WORKERS_PER_CORE * cores:
        raise UsageError(f"argument {name}: {n} worker processes on a machine of {cores} cores "
                         f"(at most {WORKERS_PER_CORE} per core); for more, use --scheduler "
                         f"with a cluster, or --shard for a job array")
    return n


def _workers(text):
    if text is None:
        return None
    return _local_processes("--workers", whole_number("--workers", text,
                                                      what="a positive number of processes"))


def _load_run(path, limit=MAX_POINTS):
    from tba.scans.runfile import RunFileError, load_run

    try:
        return load_run(path, max_points=limit)
    except RunFileError as exc:
        raise UsageError(str(exc)) from None  # names the file and the key


def _scan(run, out_path, args, run_file, log, backend=None, shard=None):
    from tba.scans.cluster import ClusterError  # dask itself is imported only for a cluster
    from tba.store.driver import run_scan
    from tba.store.errors import StoreError

    workers = None if backend is not None else _workers(args.workers)
    every = progress_every(args) if getattr(args, "progress_every", None) is not None else None
    options = {} if every is None else {"progress_every": every}
    try:
        return run_scan(run, out_path, workers=workers, backend=backend, shard=shard,
                        force=args.force, log=log, run_file=run_file, **options)
    except (StoreError, ClusterError) as exc:
        raise UsageError(str(exc)) from None


def _shard(text):
    if text is None:
        return None
    from tba.scans.runfile import parse_shard

    try:
        return parse_shard(text)
    except ValueError as exc:
        raise UsageError(f"argument --shard: {exc}") from None


def _backend(args):
    """--scheduler ADDRESS or --cluster local:N: a `tba.scans.cluster.DaskBackend` (checks that dask
    can be imported, before any file is touched); None for local worker processes."""
    if args.scheduler is None and args.cluster is None:
        return None
    from tba.scans.cluster import ClusterError, DaskBackend, parse_cluster

    try:
        if args.cluster is not None:
            try:
                n = parse_cluster(args.cluster)
            except ValueError as exc:
                raise UsageError(f"argument --cluster: {exc}") from None
            return DaskBackend(local_workers=_local_processes("--cluster", n))
        if not args.scheduler.strip():
            raise UsageError("argument --scheduler: expected an address (tcp://host:port) or "
                             "a scheduler file")
        return DaskBackend(args.scheduler)
    except ClusterError as exc:
        raise UsageError(str(exc)) from None


def cmd_run(args, out):
    """Run a scan from a run file into its HDF5 store; resumes an interrupted one."""
    _workers(args.workers)  # checked with --dry-run too
    progress_every(args)
    run = _load_run(args.runfile, max_points(args, MAX_POINTS))
    shard = _shard(args.shard)
    if args.output:
        out_path = Path(args.output).expanduser().resolve()
    elif shard is not None:  # never the full store's name: a shard holds only its chunks
        full = Path(run.output)
        out_path = full.with_name(f"{full.stem}.part-{shard.index}-of-{shard.count}{full.suffix}")
    else:
        out_path = Path(run.output)
    if args.force or not out_path.is_file():  # an existing store: it says what it holds
        writable_file(f"argument {spelled(args, 'output', '-o/--output')}" if args.output
                      else f"{args.runfile}: output", out_path)
    run = run.with_output(out_path)
    backend = _backend(args)
    if args.dry_run:
        chunks = run.chunks()
        print(run.to_json(), file=out)
        print(f"{run.n_points} points in {len(chunks)} chunks of up to {run.chunk_size} radii; "
              f"output {out_path}", file=out)
        if shard is not None:
            mine = shard.chunks(run)
            pairs = len(shard.branch_keys(run)) if run.branch_points else 0
            print(f"shard {shard.label}: {len(mine)} chunks ({sum(c.size for c in mine)} points) "
                  f"and {pairs} branch points", file=out)
        return 0
    _scan(run, out_path, args, Path(args.runfile).resolve(), sys.stderr, backend, shard)
    return 0


def cmd_merge(args, out):
    """Combine shard files (or stores) of one run into a full store."""
    from tba.store.errors import StoreError
    from tba.store.merge import merge_stores

    output = require_output(args)
    writable_file(f"argument {spelled(args, 'output', '-o/--output')}", output)
    try:
        summary = merge_stores(args.files, output, force=args.force)
    except StoreError as exc:
        raise UsageError(str(exc)) from None
    s = summary
    branch = f" and {s.branch_present} of {s.branch_total} branch points" if s.branch_total else ""
    state = "complete" if s.complete else "incomplete"
    print(f"tba merge: wrote {s.path} from {len(s.files)} file(s): {s.chunks_present} of "
          f"{s.chunks_total} chunks{branch}; {state}", file=sys.stderr)
    for line in s.missing:
        print(f"tba merge: missing: {line}", file=sys.stderr)
    if not s.complete:
        print(f"tba merge: run tba run RUNFILE --output {s.path} to compute what is missing "
              f"(or merge the missing shards into it)", file=sys.stderr)
    return 0


def _read(path):
    from tba.store.hdf5 import StoreError, read_store

    try:
        return read_store(path)
    except StoreError as exc:
        raise UsageError(str(exc)) from None


def cmd_report(args, out):
    from tba.output.report import format_report

    print(format_report(_read(args.file)), file=out)
    return 0


def _figure_path(text):
    from tba.output.labels import FORMATS

    suffix = Path(text).suffix.lower().lstrip(".")
    if suffix not in FORMATS:
        raise UsageError(f"argument -o/--output: the figure name must end in "
                         f"{', '.join('.' + f for f in FORMATS)}, got {text!r}")
    return Path(text)


def _figure_size(text):
    try:
        width, height = (float(x) for x in text.split(","))
    except ValueError:
        raise UsageError(f"argument --size: expected WIDTH,HEIGHT in inches, got {text!r}") from None
    if not (0 < width <= 100 and 0 < height <= 100):
        raise UsageError(f"argument --size: width and height must lie in (0, 100] inches, got {text!r}")
    return width, height


def cmd_plot(args, out):
    from tba.output.plotting import plot_store

    path = writable_file(f"argument {spelled(args, 'output', '-o/--output')}",
                         _figure_path(require_output(args)), replace=False)
    size = _figure_size(args.size) if args.size is not None else None
    if args.dpi is not None and args.dpi <= 0:
        raise UsageError(f"argument --dpi: must be positive, got {args.dpi}")
    alphas = None if args.alpha is None else [coupling("--alpha", a) for a in args.alpha]
    data = _read(args.file)
    try:  # a selection the scan does not have fails before any file is touched
        fig = plot_store(data, models=args.model, states=args.state, alphas=alphas,
                         panels=args.panel, size=size)
    except ValueError as exc:  # "models: ..." names the keyword; the option is --model
        name, _, problem = str(exc).partition(": ")
        option = {"models": "--model", "states": "--state", "alphas": "--alpha",
                  "panels": "--panel", "size": "--size"}.get(name)
        raise UsageError(f"argument {option}: {problem}" if option else
                         f"arguments --model/--state/--panel: {exc}") from None
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=args.dpi or 150)
    print(f"wrote {path}", file=out)
    return 0


#: CSV columns; ``couplings`` is the deprecated name of ``cdd_couplings``, kept for one release;
#: then the stored flow check (`tba.store.hdf5.FLOW_RECORD_KEYS`)
EXPORT_KEYS = ["model", "coupling", "radius", "alpha", "cdd_couplings", "energy", "error",
               "momentum", "status", "iterations", "message", "state", "couplings",
               "flow_radius", "flow_prediction", "flow_error", "flow_residual", "flow_status"]


def cmd_export(args, out):
    import numpy as np

    from tba.store.hdf5 import NOT_COMPUTED

    if args.output:
        writable_file(f"argument {spelled(args, 'output', '-o/--output')}", args.output,
                      replace=False)
    data = _read(args.file)
    if args.branch_points:
        return _export_branch_points(args, data, out)
    records = list(data.records(flow=True))
    skipped = int(np.count_nonzero(data["status"] == NOT_COMPUTED))
    target = open(args.output, "w", newline="", encoding="utf-8") if args.output else out
    try:
        if args.json:
            for rec in records:
                print(json_text(rec), file=target)
        else:  # nulls (None, NaN) are empty cells
            # (cdd_factors, in the JSON lines of runs with pole factors, is no CSV column: the
            # model's label in tba report and the file's cdd_factors attribute name them)
            writer = csv.DictWriter(target, fieldnames=EXPORT_KEYS, lineterminator="\n",
                                    extrasaction="ignore")
            writer.writeheader()
            for rec in map(plain, records):
                writer.writerow({**rec, "cdd_couplings": json_text(rec["cdd_couplings"]),
                                 "couplings": json_text(rec["couplings"])})
    finally:
        if target is not out:
            target.close()
    if data.shard is not None:
        print(f"tba export: {args.file} is shard {data.shard.label} of a run (partial): only "
              f"its points; combine the shards with tba merge", file=sys.stderr)
    elif skipped:
        print(f"tba export: {skipped} points not computed yet were left out", file=sys.stderr)
    return 0


def _export_branch_points(args, data, out):
    """``tba export --branch-points``: one record per stored branch point."""
    from tba.store.hdf5 import BRANCH_RECORD_KEYS

    every = list(data.branch_records(include_not_computed=True))
    records = [rec for rec in every if rec["status"] != "not-computed"]
    target = open(args.output, "w", newline="", encoding="utf-8") if args.output else out
    try:
        if args.json:
            for rec in records:
                print(json_text(rec), file=target)
        else:
            writer = csv.DictWriter(target, fieldnames=list(BRANCH_RECORD_KEYS),
                                    lineterminator="\n")
            writer.writeheader()
            for rec in map(plain, records):
                writer.writerow(rec)
    finally:
        if target is not out:
            target.close()
    if data.shard is not None:
        print(f"tba export: {args.file} is shard {data.shard.label} of a run (partial): only "
              f"its branch points; combine the shards with tba merge", file=sys.stderr)
    elif not data.has_level_branch_points and len(data.state) > 1:
        print(f"tba export: {args.file} (schema {data.schema_version}) has no excited-level "
              f"branch points (stored from schema 5 on)", file=sys.stderr)
    if not data.run.branch_points:
        print(f"tba export: {args.file} has no branch points (scan.branch_points = false in "
              f"its run)", file=sys.stderr)
    elif data.shard is None and len(every) > len(records):
        print(f"tba export: {len(every) - len(records)} branch points not computed yet were "
              f"left out", file=sys.stderr)
    return 0


def cmd_demo(args, out):
    """The built-in demonstration: runs/demo.toml into runs/out/ (or ./tba-demo-out/)."""
    from tba.output.plotting import save_figure
    from tba.output.report import format_report
    from tba.scans.runfile import demo_run_path
    from tba.store.driver import run_scan
    from tba.store.errors import StoreError

    workers = _workers(args.workers)
    run_file, in_repo = demo_run_path()
    run = _load_run(run_file)
    name = f"argument {spelled(args, 'output_dir', '--output-dir')}"
    if args.output_dir:
        out_dir = writable_dir(name, Path(args.output_dir).expanduser().resolve())
    else:
        out_dir = writable_dir("tba demo: output directory (choose one with --output-dir)",
                               run_file.parent / "out" if in_repo else Path.cwd() / "tba-demo-out")
    h5, figure = out_dir / "demo.h5", out_dir / "demo.png"
    for path in (h5, figure):
        writable_file(name, path, replace=path == h5)
    run = run.with_output(h5)
    print(f"tba demo: {run.description}\n"
          f"  run file {run_file}; output {h5} and {figure}\n"
          f"  (the ground state's smallest radii lie past its branch point on the alpha > 0 "
          f"side, an excited level's on the alpha < 0 side: no real solution there)\n",
          file=out, flush=True)
    try:
        run_scan(run, h5, workers=workers, force=args.force, run_file=run_file)
    except StoreError as exc:
        if not exc.foreign:
            raise UsageError(str(exc)) from None
        # the demo owns its output file: one from another run or version is replaced
        print(f"tba demo: note: {exc}; replacing it", file=sys.stderr)
        _scan(run, h5, argparse.Namespace(workers=args.workers, force=True), run_file, None)
    data = _read(h5)
    save_figure(data, figure)
    print(format_report(data), file=out)
    print(f"\nfigure: {figure}", file=out)
    return 0


def build_parser():
    parser = Parser(prog="tba", description="TBA energies (ground state and excited levels) of "
                     "integrable S-matrices with CDD (TTbar) deformations.", epilog=CONVENTIONS,
                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"tba {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=Parser)
    solve = sub.add_parser("solve", help="energy of a level at one or more radii",
                           description="Solve the TBA of the ground state (or of the level given "
                           "by --state) at the given radii (in order, each warm-started from the "
                           "previous one).", epilog=CONVENTIONS,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
    add_model_arguments(solve)
    solve.add_argument("--radius", required=True, nargs="+", action="extend", metavar="R",
                       help="radii: numbers and/or START:STOP:COUNT ranges (evenly spaced, both "
                       "ends included; START:STOP:COUNT:log for geometric spacing); repeated "
                       "--radius options add up")
    solve.add_argument("--alpha", nargs="+", action="extend", metavar="A",
                       help="TTbar couplings (default 0): numbers and/or ranges, one curve per "
                       "alpha; repeated --alpha options add up")
    solve.add_argument("--cdd", action="append", metavar="S:A",
                       help="extra CDD factor of odd spin S >= 3 with coupling A (repeatable)")
    solve.add_argument("--pole", action="append", metavar="X:P",
                       help="CDD pole factor F_(pi x)^P, F_u = (sinh t + i sin u) / (sinh t - i sin "
                       "u), 0 < x < 1, P a nonzero integer (repeatable; e.g. --pole 0.3:-1 --pole "
                       "0.2:-1 for 1 / (f_0.3 f_0.2)); ground state only")
    solve.add_argument("--resonance", action="append", metavar="THETA0:P",
                       help="CDD resonance factor F^P with sin u = cosh THETA0 (poles at +-THETA0 + "
                       "i pi/2; 16:-1 with free-fermion is the staircase model); repeatable; "
                       "ground state only")
    add_tol_argument(solve)
    solve.add_argument("--state", action=Once, metavar="N1,N2,...",
                       help="an excited level by its Bethe quantum numbers (half-odd for an even "
                       "number of particles, integers for an odd one; e.g. 1/2,-1/2 or 0): "
                       "single-species models without bound states, lee-yang's "
                       "one-particle state 0, and the free massless models (the sign is the "
                       "chirality; bosons take repeated integers, e.g. 1,1)")
    solve.add_argument("--branch", choices=("physical", "second", "complex"), default="physical",
                       action=Once, help="ground state with alpha > 0: the physical branch "
                       "(default), the second real branch above R_c, or the complex pair below R_c "
                       "(Re E, Im E; JSON energy_real, energy_imag)")
    solve.add_argument("--json", action="store_true", help="one JSON object per line per point")
    add_max_points_argument(solve, MAX_SOLVE_POINTS, "points (radii x alphas)")
    solve.set_defaults(func=cmd_solve)
    run = sub.add_parser("run", help="run a scan from a TOML run file (resumable)",
                         description="Solve every point of a run file and write them to an HDF5 "
                         "file, chunk by chunk, in parallel. Running the same command again after "
                         "an interruption computes only the missing chunks; a complete file is "
                         "not recomputed; the file of a different run is never overwritten "
                         "(exit 2) unless --force.", epilog=CONVENTIONS,
                         formatter_class=argparse.RawDescriptionHelpFormatter)
    run.add_argument("runfile", metavar="RUNFILE", help="TOML run file (see runs/)")
    add_output_argument(run, "FILE", "HDF5 output (default: the run file's output, relative to "
                        "the run file's directory; with --shard I/N that name with .part-I-of-N "
                        "before the suffix)")
    where = run.add_mutually_exclusive_group()
    where.add_argument("--workers", action=Once, metavar="N",
                       help="worker processes on this machine (default: up to the usable cores, "
                            "started only when the work repays their start-up)")
    where.add_argument("--scheduler", action=Once, metavar="ADDRESS",
                       help="run the chunks on an existing dask.distributed cluster: the "
                       "scheduler's address (tcp://host:8786) or its scheduler file; needs "
                       "the cluster extra (pip install 'tba-flow[cluster]')")
    where.add_argument("--cluster", action=Once, metavar="local:N",
                       help="start a dask LocalCluster of N single-threaded worker processes "
                       "for this run (needs the cluster extra)")
    run.add_argument("--shard", action=Once, metavar="I/N",
                     help="compute only shard I of N (every N-th chunk, 1 <= I <= N) into a shard "
                     "file, for job arrays; combine the shards with tba merge")
    run.add_argument("--force", action="store_true",
                     help="replace an output file written by a different run or version")
    run.add_argument("--dry-run", action="store_true",
                     help="print the resolved run and the number of chunks, compute nothing")
    add_max_points_argument(run, MAX_POINTS, "points (models x alphas x radii x states)")
    add_progress_argument(run)
    run.set_defaults(func=cmd_run)
    merge = sub.add_parser("merge", help="combine the shards of a run into one file",
                           description="Merge shard files of one run (tba run --shard I/N), or "
                           "partial stores of it, into a full store. Files of different runs or "
                           "tba versions, and chunks stored twice with different numbers, are "
                           "refused (exit 2). An existing --output of the same run is merged in; "
                           "what is still missing is listed, and tba run RUNFILE --output FILE "
                           "computes it.")
    merge.add_argument("files", nargs="+", metavar="FILE", help="shard files (or stores) of one run")
    add_output_argument(merge, "FILE", "the merged HDF5 file", required=True)
    merge.add_argument("--force", action="store_true",
                       help="replace an --output that is a file of another run, or a shard")
    merge.set_defaults(func=cmd_merge)
    report = sub.add_parser("report", help="summary of a scan file",
                            description="Progress, points per status, worst error estimate, "
                            "flow residuals and the last real point per alpha > 0.")
    report.add_argument("file", metavar="FILE", help="HDF5 file written by tba run")
    report.set_defaults(func=cmd_report)
    plot = sub.add_parser("plot", help="figure of a scan file",
                          description="One column per model and level, one row per panel: "
                          "E(R, alpha) with the flow prediction and the branch points, the flow "
                          "residual |E - E_flow| (log scale), c_eff = -6 R E_0 / pi (ground state) "
                          "or the gap E_n - E_0 (excited levels), the flow collapse (every alpha "
                          "at its effective radius R~ on the undeformed curve), and R_c(alpha) "
                          "with T_H = 1/R_c. Colours: alpha (blue < 0, grey 0, red > 0). Units: R "
                          "in 1/m_1, E in m_1; E without the bulk term f R.")
    plot.add_argument("file", metavar="FILE", help="HDF5 file written by tba run")
    add_output_argument(plot, "FIG", "figure file: .png, or .pdf / .svg (vector graphics)",
                        required=True)
    plot.add_argument("--model", nargs="+", action="extend", metavar="M",
                      help="models to show, by label (\"sinh-gordon B=0.6\") or name (default all)")
    plot.add_argument("--state", nargs="+", action="extend", metavar="S",
                      help="levels to show: ground, or quantum numbers in any order, e.g. "
                      "1/2,-1/2 (default all; a level written with a leading minus goes after "
                      "=: --state ground --state=-1/2,1/2; repeatable, like every selection)")
    plot.add_argument("--alpha", nargs="+", action="extend", metavar="A",
                      help="alphas to show, among the scan's (default all)")
    from tba.output.labels import PANELS

    plot.add_argument("--panel", nargs="+", action="extend", metavar="P", choices=PANELS,
                      help=f"panels, of {', '.join(PANELS)} (default all)")
    plot.add_argument("--size", metavar="W,H", help="figure size in inches (default: from the "
                      "number of panels)")
    plot.add_argument("--dpi", type=int, metavar="N", help="resolution of a .png (default 150)")
    plot.set_defaults(func=cmd_plot)
    export = sub.add_parser("export", help="one record per point, JSON lines or CSV",
                            description="The keys of tba solve --json plus state and the "
                            "stored flow check (flow_radius, flow_prediction, flow_error, "
                            "flow_residual, flow_status); points not computed yet are left "
                            "out. With --branch-points: one record per stored branch point "
                            "instead, with the keys of tba branch-point --json.")
    fmt = export.add_mutually_exclusive_group(required=True)
    fmt.add_argument("--json", action="store_true", help="one JSON object per line")
    fmt.add_argument("--csv", action="store_true", help="CSV with a header line")
    export.add_argument("--branch-points", action="store_true",
                        help="the stored branch points (ground state per model and alpha, "
                        "excited levels per model, alpha and state) instead of the points")
    export.add_argument("file", metavar="FILE", help="HDF5 file written by tba run")
    add_output_argument(export, "OUT", "write here instead of stdout")
    export.set_defaults(func=cmd_export)
    demo = sub.add_parser("demo", help="run the built-in demonstration scan",
                          description="Runs runs/demo.toml (sinh-Gordon B = 0.6 and E8, alpha in "
                          "{-0.1, 0.05, 0.1}) into runs/out/ when run from the source tree, else "
                          "into ./tba-demo-out/; writes demo.h5 and demo.png and prints the report. "
                          "A complete demo.h5 is reused; one from another run is replaced.")
    demo.add_argument("--workers", action=Once, metavar="N",
                      help="worker processes (default: up to the usable cores, started only when "
                           "the work repays their start-up)")
    demo.add_argument("--force", action="store_true", help="recompute from scratch")
    add_output_argument(demo, "DIR", "write demo.h5 and demo.png here", directory=True)
    demo.set_defaults(func=cmd_demo)
    from tba.cli.flow import add_flow_commands
    from tba.cli.models import add_models_command

    add_flow_commands(sub, CONVENTIONS)
    add_models_command(sub)
    return parser


def main(argv=None):
    """The ``tba`` command: exit code 0, 2 for bad input or an output that cannot be written
    (one line on stderr), 1 when a cluster gave up on tasks, 130 after Ctrl-C, 141 when the
    reader of a pipe went away."""
    try:
        return _main(argv)
    except BrokenPipeError:
        # stdout (or stderr) is a pipe whose reader has gone (tba export --csv F.h5 | head):
        # stop quietly, as a program killed by SIGPIPE would, with the status a shell shows
        # for one. What was computed is saved already (stores are written chunk by chunk).
        _detach_stdout()
        return 128 + signal.SIGPIPE
    except OSError as exc:
        # an output that failed after the checks passed (a full disk, /dev/full, a file
        # removed meanwhile): one line naming it where the error does
        _detach_stdout()
        what = exc.filename if exc.filename is not None else "input/output failed"
        print(f"tba: error: {what}: {' '.join(str(exc.strerror or exc).split())}", file=sys.stderr)
        return 2


def _detach_stdout():
    """Point stdout at /dev/null, so that Python's final flush of what is left in its
    buffer cannot fail a second time (and print a traceback after our one line)."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError):  # stdout without a file descriptor (tests, embedding)
        pass


def _main(argv):
    parser = build_parser()
    try:
        # Ctrl-C and SIGTERM raised at safe points only (exit 130 / 143); the caller's
        # handlers are back when main returns (main called from Python, tests)
        with interrupts.installed():
            args = parser.parse_args(argv)
            return args.func(args, sys.stdout)
    except UsageError as exc:
        print(f"tba: error: {' '.join(str(exc).split())}", file=sys.stderr)
        return 2
    except Exception as exc:
        code = _scan_stopped(exc)
        if code is None:
            raise
        return code
    except KeyboardInterrupt as exc:
        signum = interrupts.signal_number(exc)
        how = "interrupted" if signum == signal.SIGINT else f"terminated ({interrupts.signal_name(signum)})"
        print(f"tba: {how}; the points printed above are complete", file=sys.stderr)
        return 128 + signum


def _scan_stopped(exc):
    """The exit code of a scan that was interrupted (128 + signal) or whose tasks failed (1),
    after its one line; None for any other exception. The scan driver is looked up only if
    it was imported: otherwise no scan ran, and it need not be loaded to say so."""
    driver = sys.modules.get("tba.store.driver")
    if driver is None:
        return None
    if isinstance(exc, driver.ScanInterrupted):
        print(f"tba: {exc}", file=sys.stderr)
        return 128 + exc.signum
    if isinstance(exc, driver.ScanFailed):
        print(f"tba: error: {exc}", file=sys.stderr)
        return 1
    return None


if __name__ == "__main__":
    sys.exit(main())
