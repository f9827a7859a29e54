"""Time and check ground-state solves next to the branch point, R = R_c (1 + d), alpha = 0.1.

    python benchmarks/bench_fold.py            # sinh-Gordon B = 0.6 and E8, d = 1e-2 .. 1e-12
    python benchmarks/bench_fold.py --quick    # smoke run: d = 1e-2, 1e-8, one timed run

R_c comes from `tba.branch_point` (the undeformed curve: E_0'(R~) = 1/alpha), not from the
deformed solver. At each d and each tolerance (--tol, default 1e-12, 1e-10 and 1e-8):

  time:      `tba.solve(model, R, ttbar(0.1), tol=tol)` on a freshly built model (its kernel
             cache empty, so building the operators counts), numba compiled beforehand by a
             throwaway solve; time.perf_counter, --repeat runs (default 3), median quoted and
             best kept; one BLAS thread (threadpoolctl), as in scans.
  status:    what the solve says (converged / not-converged / no-real-solution).
  error:     |E - E_ref| against a reference: the same equations on grids forced finer and
             wider (every grid level asked for REFERENCE_MARGIN more e-folds), at the smallest
             tolerance of REFERENCE_TOLS at which that reference converges (next to the fold
             rounding amplified by dE/dR limits every solve: the reference's own estimate is
             reported beside it).
  estimate:  the solve's error estimate; "bounded" means |E - E_ref| <= estimate.

Writes benchmarks/results-fold.json (--json PATH) and prints the markdown tables of
benchmarks/README.md.
"""

import argparse
import contextlib
import json
import os
import platform
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent

import tba  # noqa: E402
import tba.solvers.grid as grid_rule  # noqa: E402
import tba.solvers.ground as ground  # noqa: E402
import tba.solvers.operators as operators  # noqa: E402

ALPHA = 0.1
DISTANCES = (1e-2, 1e-4, 1e-6, 1e-8, 1e-10, 1e-12)
TOLS = (1e-12, 1e-10, 1e-8)
REFERENCE_MARGIN = 16.0
REFERENCE_TOLS = (1e-13, 1e-12, 1e-11, 1e-10, 1e-9, 1e-8, 1e-7)
MODELS = {
    "sinh-gordon": ("sinh-Gordon B=0.6", lambda: tba.sinh_gordon(0.6)),
    "ising-e8": ("E8", tba.ising_e8),
}


#: the reference's systems (E8: 8 species, up to ~100 points each) are all solved densely
REFERENCE_DENSE_LIMIT = 4000


@contextlib.contextmanager
def finer_grids(extra=REFERENCE_MARGIN):
    """Every grid resolves ``extra`` more e-folds (finer and wider), and every system is solved
    densely, so that the extended-precision polish applies (as in tests/test_fold.py: a Krylov
    level's iteration error next to the fold is limited by double-precision rounding and
    depends on the BLAS thread count)."""
    old = grid_rule.BASE_MARGIN, operators.DENSE_LIMIT, operators.MANY_SPECIES_DENSE_LIMIT
    grid_rule.BASE_MARGIN = old[0] + extra
    operators.DENSE_LIMIT = operators.MANY_SPECIES_DENSE_LIMIT = REFERENCE_DENSE_LIMIT
    ground._cached_grid.cache_clear()
    try:
        yield
    finally:
        grid_rule.BASE_MARGIN, operators.DENSE_LIMIT, operators.MANY_SPECIES_DENSE_LIMIT = old
        ground._cached_grid.cache_clear()


def reference(factory, radius):
    """(energy, its error estimate, tol asked) of the finer-grid solve, or Nones."""
    model = factory()
    with finer_grids():
        for tol in REFERENCE_TOLS:
            ref = tba.solve(model, radius, tba.ttbar(ALPHA), tol=tol)
            if ref.converged:
                return ref.energy, ref.error, tol
    return None, None, None


def run_model(name, distances, tols, repeat):
    label, factory = MODELS[name]
    tba.solve(factory(), 1.3, tba.ttbar(ALPHA))  # compile or load every numba kernel
    t0 = time.perf_counter()
    bp = tba.branch_point(factory(), ALPHA)
    t_bp = time.perf_counter() - t0
    print(f"== {label}: R_c = {bp.radius!r} +- {bp.radius_error:.1e} ({t_bp:.2f} s)", flush=True)
    rows = []
    for d in distances:
        radius = bp.radius * (1 + d)
        e_ref, err_ref, tol_ref = reference(factory, radius)
        for tol in tols:
            times, res = [], None
            for _ in range(repeat):
                model = factory()
                t0 = time.perf_counter()
                res = tba.solve(model, radius, tba.ttbar(ALPHA), tol=tol)
                times.append(time.perf_counter() - t0)
            row = dict(model=name, d=d, tol=tol, radius=radius, times=times,
                       median_s=statistics.median(times), best_s=min(times),
                       status=res.status.value, message=res.message,
                       energy=res.energy if res.converged else None,
                       estimate=res.error if res.converged else None,
                       reference=e_ref, reference_error=err_ref, reference_tol=tol_ref)
            if res.converged and e_ref is not None:
                row["error"] = abs(res.energy - e_ref)
                row["bounded"] = bool(row["error"] <= res.error)
            rows.append(row)
            print(f"  d={d:.0e} tol={tol:.0e}: {row['status']:<16} median {row['median_s']:.3f} s"
                  f"  error {row.get('error', float('nan')):.1e}  estimate "
                  f"{row['estimate'] if row['estimate'] is not None else float('nan'):.1e}"
                  f"  ref +- {err_ref if err_ref is not None else float('nan'):.1e}"
                  f"  {'' if res.converged else res.message[:90]}", flush=True)
    return dict(model=name, label=label, branch_radius=bp.radius,
                branch_radius_error=bp.radius_error, branch_point_s=t_bp, rows=rows)


def _fmt(x, spec=".1e"):
    return "-" if x is None else format(x, spec)


def print_tables(results, tols):
    for tol in tols:
        print(f"\n### tol = {tol:.0e}\n")
        print("| model | d | time (median) | status | \\|E - E_ref\\| | estimate | bounded | "
              "reference +- |")
        print("|---|---|---|---|---|---|---|---|")
        for res in results:
            for r in res["rows"]:
                if r["tol"] != tol:
                    continue
                bounded = {True: "yes", False: "**no**"}.get(r.get("bounded"), "-")
                if r.get("bounded") and r["reference_error"] > r["estimate"]:
                    bounded = "yes*"  # within the reference's own accuracy only
                t = r["median_s"]
                time_s = f"{t * 1e3:.1f} ms" if t < 1 else f"{t:.2f} s"
                print(f"| {res['label']} | {r['d']:.0e} | {time_s} | {r['status']} | "
                      f"{_fmt(r.get('error'))} | {_fmt(r['estimate'])} | {bounded} | "
                      f"{_fmt(r['reference_error'])} |")


def tables_from(path):
    with open(path) as f:
        data = json.load(f)
    results = data["models"]
    tols = sorted({r["tol"] for res in results for r in res["rows"]})
    print_tables(results, tols)
    print("\n* the reference's own error estimate exceeds the solve's: the check is only as good"
          " as the reference")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="two distances, one run (smoke test)")
    ap.add_argument("--repeat", type=int, default=None, help="timed runs per point (default 3)")
    ap.add_argument("--model", action="append", choices=sorted(MODELS), default=None)
    ap.add_argument("--tol", action="append", type=float, default=None)
    ap.add_argument("--json", default=None, help="output file (default benchmarks/results-fold.json)")
    ap.add_argument("--tables", metavar="JSON", default=None,
                    help="print the tables of an earlier run's results file and exit")
    args = ap.parse_args(argv)
    if args.tables:
        tables_from(args.tables)
        return
    repeat = args.repeat or (1 if args.quick else 3)
    distances = (1e-2, 1e-8) if args.quick else DISTANCES
    tols = tuple(args.tol) if args.tol else TOLS
    names = args.model or list(MODELS)
    out = Path(args.json) if args.json else HERE / ("results-fold-quick.json" if args.quick
                                                   else "results-fold.json")
    info = {"python": sys.version.split()[0], "numpy": np.__version__,
            "platform": platform.platform(), "cpus": os.cpu_count(), "repeat": repeat,
            "loadavg_start": os.getloadavg(), "date": time.strftime("%Y-%m-%d %H:%M:%S")}
    try:
        info["git_head"] = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=HERE,
                                          capture_output=True, text=True).stdout.strip()
    except OSError:
        pass
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        results = [run_model(name, distances, tols, repeat) for name in names]
    info["loadavg_end"] = os.getloadavg()
    print_tables(results, tols)
    print("\n* the reference's own error estimate exceeds the solve's: the check is only as good"
          " as the reference")
    with open(out, "w") as f:
        json.dump({"info": info, "models": results}, f, indent=1)
    print(f"\nwrote {out}")


if __name__ == "__main__":
    main()
