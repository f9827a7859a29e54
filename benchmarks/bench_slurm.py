"""What SLURM adds to a scan, on a real one-node cluster (tests/slurm_cluster.py: munged,
slurmctld and slurmd of the Debian packages, private configuration; needs root and
``apt-get install slurm-wlm munge``), for the README's "Tested on SLURM":

    python benchmarks/bench_slurm.py          # about a minute

  start-up     from starting munged until the node is idle (best and worst of 3 starts)
  array        an array of 8 empty tasks on the node's cores: from sbatch to the first
               task's start, and the spacing of the rounds in which the later tasks start
               (the scheduler's cycle)
  shard job    one ``tba run --shard 1/1`` of a small run as a batch job (best of 3): from
               sbatch to the job's start, the job's own run time, and from sbatch until
               squeue no longer lists it; against the same command run directly
  dask         dask-jobqueue's SLURMCluster: from scale(jobs=1) until the worker (a batch
               job) is connected, and the round trip of an empty task on it (median of 50)

Timer: time.perf_counter in this process, ``date +%s.%N`` inside jobs. Writes the key
"slurm" of benchmarks/results.json (other keys are kept), or --json PATH.
"""

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "tests"))

from slurm_cluster import SlurmCluster  # noqa: E402

RUN = """\
# bench_slurm: Lee-Yang, two alphas, 16 radii (a fraction of a second of computing)
output = "small.h5"
[[models]]
name = "lee-yang"
[deformation]
alphas = [-0.1, 0.1]
[radii]
start = 0.5
stop = 3.0
count = 16
"""


def start_up(root, rounds=3):
    times = []
    for k in range(rounds):
        c = SlurmCluster(Path(root) / f"start-{k}")
        try:
            times.append(c.start().start_seconds)
        finally:
            c.stop()
    return times


def array_of_empty_tasks(cluster, d, n=8):
    script = d / "empty.sh"
    script.write_text("#!/bin/bash\ndate +%s.%N\n")
    t0 = time.time()
    job = cluster.sbatch(script, f"--array=1-{n}", "--cpus-per-task=1", cwd=d)
    cluster.wait(job)
    total = time.time() - t0
    starts = sorted(float((d / f"slurm-{job}_{k}.out").read_text()) - t0 for k in range(1, n + 1))
    rounds = [starts[0]]  # tasks that start within half a second belong to one round
    for s in starts[1:]:
        if s - rounds[-1] > 0.5:
            rounds.append(s)
    return {"tasks": n, "first_start_s": starts[0], "all_done_s": total, "round_starts_s": rounds,
            "round_spacing_s": statistics.median(b - a for a, b in zip(rounds, rounds[1:]))
            if len(rounds) > 1 else None}


def shard_job(cluster, d, env):
    (d / "small.toml").write_text(RUN)
    command = [sys.executable, "-m", "tba", "run", "small.toml", "--shard", "1/1", "--workers", "1"]
    direct = []
    for k in range(3):
        t0 = time.perf_counter()
        subprocess.run(command + ["-o", f"direct-{k}.h5"], cwd=d, env=env, check=True,
                       capture_output=True)
        direct.append(time.perf_counter() - t0)
    through, latency, inside = [], [], []
    for k in range(3):
        script = d / f"shard-{k}.sh"
        script.write_text(f"#!/bin/bash\ndate +%s.%N > start-{k}\n"
                          + " ".join(command + ["-o", f"job-{k}.h5"])
                          + f"\ndate +%s.%N > end-{k}\n")
        t0, w0 = time.perf_counter(), time.time()
        job = cluster.sbatch(script, "--cpus-per-task=1", cwd=d, env=env)
        while job in cluster.squeue() or not (d / f"end-{k}").exists():
            time.sleep(0.02)
        through.append(time.perf_counter() - t0)
        start, end = (float((d / f"{w}-{k}").read_text()) for w in ("start", "end"))
        latency.append(start - w0)
        inside.append(end - start)
    return {"direct_s": min(direct), "through_slurm_s": min(through),
            "submit_to_start_s": min(latency), "job_run_s": min(inside)}


def dask_worker(cluster_env, log_dir):
    from dask_jobqueue import SLURMCluster
    from distributed import Client

    os.environ.update(cluster_env)
    with SLURMCluster(queue="compute", cores=1, processes=1, memory="1GB", walltime="00:10:00",
                      log_directory=str(log_dir)) as cluster, Client(cluster) as client:
        t0 = time.perf_counter()
        cluster.scale(jobs=1)
        client.wait_for_workers(1, timeout=120)
        up = time.perf_counter() - t0
        trips = []
        for _ in range(50):
            t = time.perf_counter()
            client.submit(int, 0, pure=False).result()
            trips.append(time.perf_counter() - t)
    return {"worker_up_s": up, "empty_task_round_trip_ms": 1e3 * statistics.median(trips)}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--json", default=str(HERE / "results.json"))
    args = ap.parse_args()
    repo = HERE.parent
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        results = {"host": platform.node(), "cores": os.cpu_count(),
                   "start_up_s": start_up(tmp)}
        cluster = SlurmCluster(tmp / "cluster").start()
        try:
            env = {**cluster.env, "PYTHONPATH": str(repo)}
            (tmp / "jobs").mkdir()
            results["array"] = array_of_empty_tasks(cluster, tmp / "jobs")
            results["shard_job"] = shard_job(cluster, tmp / "jobs", env)
            results["dask"] = dask_worker(env, tmp / "jobs")
        finally:
            cluster.stop()
    print(json.dumps(results, indent=1))
    path = Path(args.json)
    data = json.loads(path.read_text()) if path.exists() else {}
    data["slurm"] = results
    path.write_text(json.dumps(data, indent=1) + "\n")


if __name__ == "__main__":
    main()
