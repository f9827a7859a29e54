"""Time the Newton solver (tba.solve_radii) against the plain dense fixed-point iteration
(benchmarks/plain_iteration.py) on the same radius scans, at the same accuracy 1e-12.

    python benchmarks/bench_scan.py            # the full benchmark (about 4 minutes on 2 cores)
    python benchmarks/bench_scan.py --quick    # a smoke run with fewer radii

Scans (deformation S -> S exp(+i alpha m_a m_b sinh t), phi_ab += alpha m_a m_b cosh t):
  (a) sinh-Gordon B = 0.6, alpha = 0.1, 400 radii evenly spaced in [0.6, 5]
  (b) E8 (ising_e8()), alpha = 0.05, 40 radii evenly spaced in [0.6, 5]

What is timed (time.perf_counter, best of --repeat runs, ours and baseline alternating so that
both see the same load of the machine):
  ours:     solve_radii(model, radii, ttbar(alpha), tol=1e-12) on a freshly built model
            (so its kernel cache starts empty: building the operators is included); numba
            compilation is excluded by a warm-up solve on a throwaway point and model.
  baseline: the warm-started fixed-point scan on its chosen grid (numpy, and the same iteration
            compiled with numba). Its one-off setup (choosing
            the grid by halving at R_min, building the dense matrix) is reported separately;
            the headline ratio excludes it, which favours the baseline.
Accuracy: max |E_ours - E_plain| / |E| over the scan, and at every radius (3 for E8 with
--quick) an independent reference (the plain iteration on the baseline's confirming grid h/2 with a wider cutoff and
a strict stopping rule) to check that the solver's error estimates bound its actual error.
Cold start: wall time of fresh processes (`tba solve ...` and `python -c ...`).

Writes benchmarks/results.json (--quick: benchmarks/results-quick.json; or --json PATH).
"""

import argparse
import json
import math
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import plain_iteration as plain  # noqa: E402
from tba import ising_e8, sinh_gordon, solve_ground_state, solve_radii, ttbar  # noqa: E402

TOL = 1e-12
#: the targets of the speed issue: ratio plain numpy / ours
TARGETS = {"sinh-gordon": 2.0, "ising-e8": 40.0}
#: project the plain scan from a pilot; above this many seconds time it on a subset of radii
PLAIN_BUDGET_S = 240.0


def scans(quick):
    return [
        dict(name="sinh-gordon", factory=lambda: sinh_gordon(0.6), label="sinh-Gordon B=0.6",
             alpha=0.1, radii=np.linspace(0.6, 5.0, 40 if quick else 400),
             n_reference=None),
        dict(name="ising-e8", factory=ising_e8, label="E8", alpha=0.05,
             radii=np.linspace(0.6, 5.0, 8 if quick else 40), n_reference=3 if quick else None),
    ]


# ---------------------------------------------------------------------------------------
def warm_up(factory, alpha):
    """Compile/load every numba kernel the scan will use, on a throwaway model and point."""
    model = factory()
    solve_ground_state(model, 1.7, ttbar(alpha), tol=TOL)
    solve_radii(model, [2.9, 2.95, 3.0, 3.05], ttbar(alpha), tol=TOL)  # also kernels.dense.solve_run


def time_both(factory, alpha, radii, repeat, choice, stride):
    """Alternate timed runs of ours and of the plain scan (so both see the same machine load);
    ours always on a freshly built model, the plain scan on its chosen grid."""
    sub = radii[::stride]
    t_ours, t_plain, t_numba, build, res, plain_out = [], [], [], None, None, None
    plain.scan_numba(factory(), alpha, sub[:2], choice.grid, choice.damping)  # compile
    for _ in range(repeat):
        model = factory()
        t0 = time.perf_counter()
        res = solve_radii(model, radii, ttbar(alpha), tol=TOL)
        t_ours.append(time.perf_counter() - t0)
        E, its, sec, build_s = plain.scan(factory(), alpha, sub, choice.grid, choice.damping)
        t_plain.append(sec)
        build = build_s if build is None else min(build, build_s)
        E_nb, its_nb, sec_nb, _ = plain.scan_numba(factory(), alpha, sub, choice.grid,
                                                   choice.damping)
        t_numba.append(sec_nb)
        plain_out = (E, its, E_nb)
    return t_ours, res, sub, t_plain, build, plain_out, t_numba


def plain_stride(factory, alpha, radii, requested, choice):
    """1 unless a pilot of the plain scan projects more than PLAIN_BUDGET_S seconds."""
    if requested:
        return requested, None
    model = factory()
    pilot = radii[:3]
    _, _, sec, _ = plain.scan(model, alpha, pilot, choice.grid, choice.damping)
    projected = sec / len(pilot) * len(radii)
    if projected <= PLAIN_BUDGET_S:
        return 1, projected
    stride = max(1, min(4, len(radii) // 10))
    return stride, projected


def reference(factory, alpha, radii, choice, idx):
    """Independent reference energies at radii[idx]: the plain iteration on the confirming
    grid (spacing h/2) with the cutoff R_eff cosh(Lambda) = 60 and a strict stopping rule
    (iterate until the change is below 1e-13, then 40 more steps)."""
    model = factory()
    r_eff = choice.r_eff_min
    Lambda = math.acosh(60.0 / (float(np.min(model.masses)) * r_eff))
    h = choice.grid.h / 2
    grid = plain.Grid(Lambda, int(round(2 * Lambda / h)) + 1)
    tba = plain.PlainTBA(model, alpha, grid)
    w = choice.damping
    out, eps = [], None
    for i in idx:
        R = radii[i]
        nu = R * tba.ch
        eps = nu.copy() if eps is None else eps
        g = nu - eps
        extra = None
        for it in range(200_000):
            L = np.log1p(np.exp(-eps))
            g_new = tba.K @ L
            change = float(np.max(np.abs(g_new - g)))
            g = (1 - w) * g + w * g_new
            eps = nu - g
            if extra is None and w * change < 1e-13:
                extra = 40
            if extra is not None:
                extra -= 1
                if extra == 0:
                    break
        else:
            raise RuntimeError(f"reference did not converge at R = {R}")
        out.append(tba.energy(eps))
    return np.array(out), grid


def run_scan(cfg, repeat, stride_req):
    name, factory, alpha, radii = cfg["name"], cfg["factory"], cfg["alpha"], cfg["radii"]
    print(f"\n== {cfg['label']}, alpha = {alpha}, {len(radii)} radii in [{radii[0]}, {radii[-1]}]",
          flush=True)
    warm_up(factory, alpha)
    choice = plain.choose_grid(factory(), alpha, radii[0], tol=TOL)
    print(f"  plain grid: N = {choice.grid.N} (h = {choice.grid.h:.4g}), chosen in {choice.seconds:.2f} s",
          flush=True)
    stride, projected = plain_stride(factory, alpha, radii, stride_req, choice)
    if stride > 1:
        print(f"  plain: projected {projected:.0f} s for all radii: timing every {stride}th radius",
              flush=True)
    t_ours, res, sub, t_plain, build, (E_plain, its_plain, E_numba), t_numba = time_both(
        factory, alpha, radii, repeat, choice, stride)
    bad = [r for r in res if not r.converged]
    if bad:
        raise RuntimeError(f"{len(bad)} points did not converge, first: {bad[0].radius} {bad[0].message}")
    E_ours = np.array([r.energy for r in res])
    err_ours = np.array([r.error for r in res])
    Ns = sorted({r.grid.N for r in res})
    hs = sorted({r.grid.h for r in res})
    its_ours = np.array([r.iterations for r in res])
    print(f"  ours:  best {min(t_ours):.3f} s of {repeat} ({', '.join(f'{t:.3f}' for t in t_ours)})",
          flush=True)
    print(f"  plain: best {min(t_plain):.3f} s of {repeat} ({', '.join(f'{t:.3f}' for t in t_plain)}), "
          f"matrix {build:.3f} s", flush=True)
    print(f"  plain numba: best {min(t_numba):.3f} s of {repeat} "
          f"({', '.join(f'{t:.3f}' for t in t_numba)})", flush=True)

    sel = np.arange(0, len(radii), stride)
    rel = np.abs(E_ours[sel] - E_plain) / np.abs(E_ours[sel])
    mismatch = np.abs(E_ours[sel] - E_plain)
    within = mismatch <= err_ours[sel]

    n_ref = cfg["n_reference"] or len(radii)           # None: every radius of the scan
    idx = np.unique(np.linspace(0, len(radii) - 1, n_ref).round().astype(int))
    t0 = time.perf_counter()
    E_ref, ref_grid = reference(factory, alpha, radii, choice, idx)
    t_ref = time.perf_counter() - t0
    ours_vs_ref = np.abs(E_ours[idx] - E_ref)
    pos = {int(i): k for k, i in enumerate(sel)}
    plain_vs_ref = np.array([abs(E_plain[pos[int(i)]] - E_ref[k]) if int(i) in pos else np.nan
                             for k, i in enumerate(idx)])

    # sensitivity: the same plain scan on the confirming grid (h/2), the other common reading
    # of "halve until the change is below 1e-12" (informational, not the headline)
    fine_sub = radii[::max(stride, 4)]
    fine_grid = plain.Grid(choice.grid.Lambda, choice.confirm_N)
    _, its_fine, sec_fine, _ = plain.scan(factory(), alpha, fine_sub, fine_grid, choice.damping)

    ms_ours = 1e3 * min(t_ours) / len(radii)
    ms_plain = 1e3 * min(t_plain) / len(sub)
    ms_plain_setup = 1e3 * (min(t_plain) + choice.seconds + build) / len(sub)
    ms_numba = 1e3 * min(t_numba) / len(sub)
    out = {
        "model": name, "label": cfg["label"], "alpha": alpha, "tol": TOL,
        "radii": {"count": len(radii), "min": float(radii[0]), "max": float(radii[-1])},
        "ours": {
            "ms_per_point": ms_ours, "seconds_runs": t_ours,
            "ms_per_point_median": 1e3 * statistics.median(t_ours) / len(radii),
            "grid_N": Ns, "grid_h": hs,
            "newton_iterations_mean": float(its_ours.mean()),
            "error_estimate_max_rel": float(np.max(err_ours / np.abs(E_ours))),
        },
        "plain": {
            "ms_per_point": ms_plain, "ms_per_point_with_setup": ms_plain_setup,
            "ms_per_point_median": 1e3 * statistics.median(t_plain) / len(sub),
            "seconds_runs": t_plain, "points_timed": len(sub), "stride": stride,
            "grid_N": choice.grid.N, "grid_h": choice.grid.h, "cutoff": choice.grid.Lambda,
            "confirm_N": choice.confirm_N, "r_eff_min": choice.r_eff_min,
            "damping": choice.damping, "grid_choice_seconds": choice.seconds,
            "matrix_build_seconds": build, "matrix_size": int(len(factory().masses) * choice.grid.N),
            "iterations_mean": float(np.mean(its_plain)),
            "grid_history": [{"h": h, "N": N, "E_Rmin": E} for h, N, E in choice.history],
        },
        "plain_numba": {
            "ms_per_point": ms_numba, "seconds_runs": t_numba, "points_timed": len(sub),
            "ms_per_point_median": 1e3 * statistics.median(t_numba) / len(sub),
            "max_abs_difference_from_plain": float(np.max(np.abs(E_numba - E_plain))),
            "ratio": ms_numba / ms_ours,
        },
        "plain_on_confirming_grid": {
            "grid_N": choice.confirm_N, "points_timed": len(fine_sub),
            "ms_per_point": 1e3 * sec_fine / len(fine_sub),
            "iterations_mean": float(np.mean(its_fine)),
            "ratio": 1e3 * sec_fine / len(fine_sub) / ms_ours,
        },
        "ratio": ms_plain / ms_ours,
        "ratio_of_medians": statistics.median(t_plain) / len(sub) / (statistics.median(t_ours) / len(radii)),
        "ratio_with_plain_setup": ms_plain_setup / ms_ours,
        "target": TARGETS[name],
        "target_met": bool(ms_plain / ms_ours >= TARGETS[name]),
        "accuracy": {
            "max_rel_mismatch": float(np.max(rel)),
            "median_rel_mismatch": float(np.median(rel)),
            "points_compared": int(len(sel)),
            "mismatch_within_our_error_estimate": int(np.sum(within)),
            "max_mismatch_over_our_estimate": float(np.max(mismatch / err_ours[sel])),
            "reference": {
                "radii": [float(radii[i]) for i in idx],
                "grid_N": ref_grid.N, "grid_h": ref_grid.h, "cutoff": ref_grid.Lambda,
                "seconds": t_ref,
                "ours_abs_error": ours_vs_ref.tolist(),
                "ours_error_estimate": err_ours[idx].tolist(),
                "ours_estimate_bounds_error": bool(np.all(ours_vs_ref <= err_ours[idx])),
                "points_bounded": int(np.sum(ours_vs_ref <= err_ours[idx])),
                "max_error_over_estimate": float(np.max(ours_vs_ref / err_ours[idx])),
                "ours_max_rel_error": float(np.max(ours_vs_ref / np.abs(E_ref))),
                "plain_abs_error": [None if np.isnan(x) else float(x) for x in plain_vs_ref],
                "plain_max_rel_error": float(np.nanmax(plain_vs_ref / np.abs(E_ref))),
            },
        },
    }
    return out


# ---------------------------------------------------------------------------------------
CLI_ARGS = ["solve", "--model", "sinh-gordon", "--coupling", "0.6", "--radius", "1"]
PY_SNIPPET = "import tba; tba.solve_ground_state(tba.sinh_gordon(0.6), 1.0)"


def _wall(cmd, env):
    t0 = time.perf_counter()
    p = subprocess.run(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                       cwd=tempfile.gettempdir())
    dt = time.perf_counter() - t0
    if p.returncode != 0:
        raise RuntimeError(f"{cmd} failed ({p.returncode}): {p.stderr.strip()[-400:]}")
    return dt


def cold_start(n_warm):
    """Fresh-process wall times. 'first' and 'second' run in a fresh NUMBA_CACHE_DIR (so the
    first compiles and writes numba's cache, the second loads it); 'warm' is the median of
    n_warm further runs with that cache."""
    out = {}
    tba_cli = shutil.which("tba")
    commands = {}
    if tba_cli:
        commands["tba solve (PATH: " + tba_cli + ")"] = [tba_cli] + CLI_ARGS
        # the console script itself, without a version-manager shim in front of it
        direct = Path(sys.executable).with_name("tba")
        if direct.exists() and str(direct) != tba_cli:
            commands[f"tba solve ({direct})"] = [str(direct)] + CLI_ARGS
    commands["python -c (import tba; solve_ground_state)"] = [sys.executable, "-c", PY_SNIPPET]
    floors = {"python -c pass": [sys.executable, "-c", "pass"],
              "python -c 'import numpy, scipy.linalg'": [sys.executable, "-c", "import numpy, scipy.linalg"],
              "python -c 'import numba'": [sys.executable, "-c", "import numba"]}
    for label, cmd in commands.items():
        with tempfile.TemporaryDirectory() as cache:
            env = dict(os.environ, NUMBA_CACHE_DIR=cache)
            first = _wall(cmd, env)
            second = _wall(cmd, env)
            warm = [_wall(cmd, env) for _ in range(n_warm)]
        out[label] = {"first": first, "second": second, "warm_median": statistics.median(warm),
                      "warm_min": min(warm), "warm_runs": warm}
        print(f"  {label}: first {first:.2f} s, second {second:.2f} s, "
              f"warm median {statistics.median(warm):.2f} s", flush=True)
    for label, cmd in floors.items():
        runs = [_wall(cmd, dict(os.environ)) for _ in range(max(3, n_warm))]
        out[label] = {"warm_median": statistics.median(runs), "warm_min": min(runs), "warm_runs": runs}
        print(f"  {label}: median {statistics.median(runs):.2f} s", flush=True)
    return {"cli_found": bool(tba_cli), "cli_path": tba_cli, "times": out}


# ---------------------------------------------------------------------------------------
def print_table(rows, cold):
    print("\n" + "=" * 100)
    print(f"{'scan':<22}{'pts':>5}{'ours ms/pt':>12}{'plain ms/pt':>13}{'ratio':>8}{'target':>8}"
          f"{'met':>5}{'N ours':>16}{'N plain':>9}{'max rel dE':>12}")
    for r in rows:
        o, p = r["ours"], r["plain"]
        nours = f"{o['grid_N'][0]}-{o['grid_N'][-1]}" if len(o["grid_N"]) > 1 else str(o["grid_N"][0])
        pts = f"{r['radii']['count']}" + (f"/{p['points_timed']}" if p["stride"] > 1 else "")
        print(f"{r['label'] + ', a=' + str(r['alpha']):<22}{pts:>5}{o['ms_per_point']:>12.3f}"
              f"{p['ms_per_point']:>13.3f}{r['ratio']:>8.2f}{r['target']:>7.0f}x"
              f"{'yes' if r['target_met'] else 'no':>5}{nours:>16}{p['grid_N']:>9}"
              f"{r['accuracy']['max_rel_mismatch']:>12.1e}")
    for r in rows:
        p, a = r["plain"], r["accuracy"]
        print(f"  {r['label']}: plain n*N = {p['matrix_size']} (h = {p['grid_h']:.4g}, Lambda = "
              f"{p['cutoff']:.3f}, confirmed on N = {p['confirm_N']}, damping {p['damping']}), "
              f"{p['iterations_mean']:.1f} iterations/pt; setup {p['grid_choice_seconds']:.2f} s grid "
              f"choice + {p['matrix_build_seconds']:.3f} s matrix -> ratio with setup "
              f"{r['ratio_with_plain_setup']:.2f}")
        nb = r["plain_numba"]
        print(f"  {r['label']}: plain numba {nb['ms_per_point']:.4f} ms/pt (median "
              f"{nb['ms_per_point_median']:.4f}) -> ratio plain numba / ours {nb['ratio']:.2f}; "
              f"ratio of medians plain numpy / ours {r['ratio_of_medians']:.2f}; numba vs numpy "
              f"max |dE| {nb['max_abs_difference_from_plain']:.1e}")
        f = r["plain_on_confirming_grid"]
        print(f"  {r['label']}: (sensitivity) plain on its confirming grid N = {f['grid_N']}: "
              f"{f['ms_per_point']:.3f} ms/pt on {f['points_timed']} radii -> ratio {f['ratio']:.2f}")
        if p["stride"] > 1:
            print(f"  {r['label']}: plain timed on every {p['stride']}th radius "
                  f"({p['points_timed']} points); the comparison is per point")
        ref = a["reference"]
        print(f"  {r['label']}: ours {r['ours']['newton_iterations_mean']:.1f} Newton its/pt; "
              f"|dE| <= our error estimate at {a['mismatch_within_our_error_estimate']}/"
              f"{a['points_compared']} points (max |dE|/estimate {a['max_mismatch_over_our_estimate']:.2g}); "
              f"vs reference (N = {ref['grid_N']}, {len(ref['radii'])} radii): ours max rel err "
              f"{ref['ours_max_rel_error']:.1e}, estimate bounds it at {ref['points_bounded']}/"
              f"{len(ref['radii'])} (max err/estimate {ref['max_error_over_estimate']:.2g}); plain max rel err "
              f"{ref['plain_max_rel_error']:.1e}")
    if cold:
        print("cold start (fresh process; 'first' with an empty numba cache):")
        for label, t in cold["times"].items():
            if "first" in t:
                print(f"  {label:<60} first {t['first']:.2f} s  second {t['second']:.2f} s  "
                      f"warm median {t['warm_median']:.2f} s (min {t['warm_min']:.2f})")
            else:
                print(f"  {label:<60} median {t['warm_median']:.2f} s (min {t['warm_min']:.2f})")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="fewer radii, one run each (smoke test)")
    ap.add_argument("--repeat", type=int, default=None, help="timed runs per scan (default 5, quick 1)")
    ap.add_argument("--plain-stride", type=int, default=0,
                    help="time the plain scan on every k-th radius (default: 1 unless too slow)")
    ap.add_argument("--only", choices=["sinh-gordon", "ising-e8"], default=None,
                    help="run only this scan")
    ap.add_argument("--no-cold-start", action="store_true", help="skip the fresh-process timings")
    ap.add_argument("--json", default=None,
                    help="output file (default benchmarks/results.json, with --quick results-quick.json)")
    args = ap.parse_args(argv)
    repeat = args.repeat or (1 if args.quick else 5)
    if args.json is None:
        args.json = str(HERE / ("results-quick.json" if args.quick else "results.json"))

    info = {"python": sys.version.split()[0], "numpy": np.__version__, "platform": platform.platform(),
            "cpus": os.cpu_count(), "quick": args.quick, "repeat": repeat,
            "loadavg_start": os.getloadavg(), "date": time.strftime("%Y-%m-%d %H:%M:%S")}
    try:
        import numba
        import scipy
        info.update(numba=numba.__version__, scipy=scipy.__version__)
    except ImportError:
        pass
    try:
        info["git_head"] = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=HERE,
                                          capture_output=True, text=True).stdout.strip()
        info["modified_vs_head"] = subprocess.run(
            ["git", "status", "--porcelain", "--untracked-files=no", "--", "tba", "kernels"],
            cwd=HERE, capture_output=True, text=True).stdout.split("\n")[:-1]
    except OSError:
        pass
    import hashlib
    root = HERE.parent
    info["source_sha256"] = {str(f.relative_to(root)): hashlib.sha256(f.read_bytes()).hexdigest()[:12]
                             for f in sorted(list((root / "tba").rglob("*.py"))
                                             + list((root / "kernels").rglob("*.py")))}

    # one BLAS thread for both sides, as in scans (a second BLAS thread only spins on this
    # machine's 2 shared cores: a 392 x 392 inverse took 84 ms of CPU instead of 7)
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        rows = [run_scan(cfg, repeat, args.plain_stride) for cfg in scans(args.quick)
                if args.only in (None, cfg["name"])]
    cold = None
    if not args.no_cold_start:
        print("\n== cold start", flush=True)
        cold = cold_start(1 if args.quick else 7)
    info["loadavg_end"] = os.getloadavg()
    print_table(rows, cold)
    kept = {}  # keys other benchmarks write into the same file (bench_cluster.py: "cluster")
    if os.path.exists(args.json):
        with open(args.json) as f:
            kept = {k: v for k, v in json.load(f).items() if k not in ("info", "scans", "cold_start")}
    with open(args.json, "w") as f:
        json.dump({"info": info, "scans": rows, "cold_start": cold, **kept}, f, indent=1)
    print(f"\nwrote {args.json}")


if __name__ == "__main__":
    main()
