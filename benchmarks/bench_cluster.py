"""Throughput of a scan (points per second) with the serial in-process driver, a dask
LocalCluster of 1 and of 2 worker processes, and the local process pool of 2 workers, all
measured in one run; the per-point cost and the dask overhead per task, for sizing runs on
a cluster (README, "Clusters").

    python benchmarks/bench_cluster.py            # two scans (below), about 4 minutes
    python benchmarks/bench_cluster.py --quick    # a small sinh-Gordon scan, one repetition

Scans: "balanced" (E8 at alpha = -0.05, 64 radii in 16 chunks of 4 that cost about the
same) and "demo" (benchmarks/demo_180.toml, the earlier demo run, 180 points: sinh-Gordon and E8 at three alphas, where one
E8 chunk next to a branch point takes about a third of the chunks' time, plus two E8
branch points of ~0.7 s: the uneven load of a real scan).

What is timed (time.perf_counter, best of --repeat rounds; the executors take turns inside
a round, so that all see the same load of the machine):
  serial      run_scan(run, workers=1): every chunk in the driver, then the branch points.
  dask-1/-2   run_scan(run, backend=DaskBackend(client=...)) on a LocalCluster of 1 / 2
              single-threaded worker processes (tba.scans.cluster.local_cluster, as tba run
              --cluster local:N starts it), started (and timed) once before the rounds;
              the pilot chunk, the transfers and the driver's writes are included.
  pool-2      run_scan(run, workers=2): the local process pool, whose worker start-up
              (spawn, imports) is part of every run.
Each timed run writes a fresh HDF5 file and starts from empty model caches (in the driver
and on the workers), so building the kernels is included; numba compilation is not (the
kernels are loaded from numba's on-disk cache, warmed up first).

Overhead per task: (dask-1 - serial) / number of tasks (chunks and branch points), and
directly: 400 empty tasks on the 1-worker cluster (submitted together: the scheduler's cost
per task), and 50 submit-and-wait round trips of one empty task (the latency).

Writes the key "cluster" of benchmarks/results.json (other keys are kept), or --json PATH.
"""

import argparse
import io
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

import tba.scans.points  # noqa: E402
from tba.scans.cluster import DaskBackend, local_cluster  # noqa: E402
from tba.scans.runfile import load_run, loads_run  # noqa: E402
from tba.store.driver import run_scan  # noqa: E402
from tba.store.hdf5 import read_store  # noqa: E402

BALANCED_RUN = """\
# bench_cluster balanced: E8 away from any branch point, 64 radii in 16 chunks of 4
output = "balanced.h5"
[[models]]
name = "ising-e8"
[deformation]
alphas = [-0.05]
[radii]
start = 0.5
stop = 4.0
count = 64
[solver]
tol = 1e-12
[scan]
chunk_size = 4
"""
QUICK_RUN = """\
# bench_cluster --quick: sinh-Gordon, both signs of alpha, 40 radii in chunks of 5
output = "quick.h5"
[[models]]
name = "sinh-gordon"
coupling = 0.6
[deformation]
alphas = [-0.1, 0.1]
[radii]
start = 0.3
stop = 4.0
count = 40
spacing = "log"
[solver]
tol = 1e-12
[scan]
chunk_size = 5
"""


def _clear_model_cache():
    tba.scans.points._MODEL_CACHE.clear()
    return os.getpid()


def _noop(i):
    return i


def time_scan(run, directory, label, **kwargs):
    path = Path(directory) / f"{label}-{time.monotonic_ns()}.h5"
    _clear_model_cache()
    t0 = time.perf_counter()
    summary = run_scan(run, path, log=io.StringIO(), progress=False, **kwargs)
    seconds = time.perf_counter() - t0
    assert summary.complete, label
    return seconds, path


def per_model_cost(path):
    """Seconds per point of each model, from the chunks' worker times in the store."""
    d = read_store(path)
    out = {}
    for m, label in enumerate(d.model):
        sel = d.progress["model_index"] == m
        points = int(np.sum(d.progress["radius_stop"][sel] - d.progress["radius_start"][sel]))
        out[label] = float(np.nansum(d.progress["seconds"][sel]) / points)
    return out


def same_numbers(a, b):
    da, db = read_store(a), read_store(b)
    names = ("energy", "error", "status", "flow_prediction", "flow_residual")
    return all(np.array_equal(da[n], db[n], equal_nan=True) for n in names) and all(
        np.array_equal(da.branch[n], db.branch[n], equal_nan=True)
        for n in ("branch_radius", "energy", "status"))


def task_overhead(client, n_batch=400, n_latency=50):
    futures = client.map(_noop, range(5), pure=False)  # warm the path
    client.gather(futures)
    t0 = time.perf_counter()
    futures = client.map(_noop, range(n_batch), pure=False)
    client.gather(futures)
    batch = (time.perf_counter() - t0) / n_batch
    del futures
    lat = []
    for i in range(n_latency):
        t0 = time.perf_counter()
        client.submit(_noop, i, pure=False).result()
        lat.append(time.perf_counter() - t0)
    return {"batch_seconds_per_task": batch, "round_trip_seconds_median": float(np.median(lat)),
            "round_trip_seconds_min": float(np.min(lat)), "tasks_in_batch": n_batch}


def bench_scan(name, run, tmp, clusters, repeat):
    """Time one scan with every executor; returns its results dict."""
    n_tasks = len(run.chunks()) + (len(run.models) * len(run.alphas) if run.branch_points else 0)
    print(f"\n== {name}: {run.n_points} points in {len(run.chunks())} chunks of up to "
          f"{run.chunk_size} radii, {n_tasks} tasks with the branch points", flush=True)
    times = {"serial": [], "dask-1": [], "dask-2": [], "pool-2": []}
    paths = {}
    for r in range(repeat):
        order = list(times) if r % 2 == 0 else list(reversed(times))
        for label in order:
            if label == "serial":
                sec, path = time_scan(run, tmp, label, workers=1)
            elif label == "pool-2":
                sec, path = time_scan(run, tmp, label, workers=2)
            else:
                client = clusters[int(label[-1])][1]
                client.run(_clear_model_cache)
                sec, path = time_scan(run, tmp, label, backend=DaskBackend(client=client))
            times[label].append(sec)
            paths.setdefault(label, path)
            print(f"  round {r + 1}: {label:<7} {sec:7.2f} s  {run.n_points / sec:7.1f} points/s",
                  flush=True)
    best = {k: min(v) for k, v in times.items()}
    rows = {k: {"seconds_best": best[k], "seconds_runs": times[k],
                "points_per_second": run.n_points / best[k],
                "ratio_to_serial": best["serial"] / best[k],
                "numbers_equal_serial": same_numbers(paths["serial"], paths[k])} for k in times}
    d = read_store(paths["serial"])
    chunk_seconds = d.progress["seconds"]
    return {
        "points": run.n_points, "chunks": len(run.chunks()), "tasks": n_tasks,
        "chunk_size": run.chunk_size, "executors": rows,
        "serial_seconds_per_point": best["serial"] / run.n_points,
        "serial_seconds_per_point_by_model": per_model_cost(paths["serial"]),
        "chunk_seconds_max": float(np.nanmax(chunk_seconds)),
        "chunk_seconds_sum": float(np.nansum(chunk_seconds)),
        "dask_overhead_per_task_seconds_from_scan": (best["dask-1"] - best["serial"]) / n_tasks,
    }


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="small scan, one repetition")
    ap.add_argument("--repeat", type=int, default=None, help="rounds (default 3, quick 1)")
    ap.add_argument("--json", default=None, help="results file (default benchmarks/results.json, "
                    "with --quick benchmarks/results-quick.json); the key 'cluster' is replaced")
    args = ap.parse_args(argv)
    repeat = args.repeat or (1 if args.quick else 3)
    target = Path(args.json or HERE / ("results-quick.json" if args.quick else "results.json"))

    import logging

    import dask
    import distributed

    logging.getLogger("distributed").setLevel(logging.ERROR)
    if args.quick:
        scans = {"quick": loads_run(QUICK_RUN, name="quick")}
    else:
        scans = {"balanced": loads_run(BALANCED_RUN, name="balanced"),
                 "demo": load_run(HERE / "demo_180.toml")}

    with tempfile.TemporaryDirectory() as tmp:
        # numba's on-disk cache and the imports, once, in the driver and on the workers
        warm = [loads_run(QUICK_RUN.replace("count = 40", "count = 3"), name="warm"),
                loads_run(BALANCED_RUN.replace("count = 64", "count = 2"), name="warm-e8")]
        for k, w in enumerate(warm):
            run_scan(w, Path(tmp) / f"warm{k}.h5", workers=1, log=io.StringIO(), progress=False)
        clusters, startup = {}, {}
        for n in (1, 2):
            t0 = time.perf_counter()
            cluster = local_cluster(n)  # as tba run --cluster local:N starts it
            client = distributed.Client(cluster)
            startup[n] = time.perf_counter() - t0
            for k, w in enumerate(warm):
                run_scan(w, Path(tmp) / f"warm{k}-{n}.h5", backend=DaskBackend(client=client),
                         log=io.StringIO(), progress=False)
            clusters[n] = (cluster, client)
            print(f"LocalCluster({n} workers) started in {startup[n]:.2f} s", flush=True)
        results = {name: bench_scan(name, run, tmp, clusters, repeat) for name, run in scans.items()}
        overhead = task_overhead(clusters[1][1])
        for cluster, client in clusters.values():
            client.close()
            cluster.close()

    result = {
        "repeat": repeat, "scans": results,
        "local_cluster_startup_seconds": {str(k): v for k, v in startup.items()},
        "dask_empty_tasks": overhead,
        "info": {"python": sys.version.split()[0], "numpy": np.__version__, "dask": dask.__version__,
                 "distributed": distributed.__version__, "platform": platform.platform(),
                 "cpus": os.cpu_count(), "loadavg_end": os.getloadavg(),
                 "date": time.strftime("%Y-%m-%d %H:%M:%S"),
                 "git_head": subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=HERE,
                                            capture_output=True, text=True).stdout.strip()},
    }

    print("\n" + "=" * 86)
    print(f"{'scan':<10}{'executor':<10}{'best s':>9}{'points/s':>11}{'x serial':>10}  same numbers as serial")
    for name, r in results.items():
        for k, row in r["executors"].items():
            print(f"{name:<10}{k:<10}{row['seconds_best']:>9.2f}{row['points_per_second']:>11.1f}"
                  f"{row['ratio_to_serial']:>10.2f}  {row['numbers_equal_serial']}")
    for name, r in results.items():
        print(f"{name}: serial cost per point (flow check included) "
              f"{1e3 * r['serial_seconds_per_point']:.1f} ms; "
              + ", ".join(f"{k}: {1e3 * v:.1f} ms" for k, v in r["serial_seconds_per_point_by_model"].items())
              + f"; longest chunk {r['chunk_seconds_max']:.2f} s of {r['chunk_seconds_sum']:.2f} s; "
              f"(dask-1 - serial) / tasks = {1e3 * r['dask_overhead_per_task_seconds_from_scan']:.1f} ms")
    print(f"dask, empty tasks: {1e3 * overhead['batch_seconds_per_task']:.2f} ms each in a batch of "
          f"{overhead['tasks_in_batch']}, round trip {1e3 * overhead['round_trip_seconds_median']:.1f} ms")
    print("LocalCluster start-up: " + ", ".join(f"{k} worker(s) {v:.2f} s" for k, v in startup.items()))

    data = json.loads(target.read_text()) if target.exists() else {}
    data["cluster"] = result
    target.write_text(json.dumps(data, indent=1))
    print(f"\nwrote the key 'cluster' of {target}")


if __name__ == "__main__":
    main()
