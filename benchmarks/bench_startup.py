"""Start-up of the command line: wall time of fresh processes, import time, numba compile.

    python benchmarks/bench_startup.py                 # medians of 5 runs each
    python benchmarks/bench_startup.py --source OLD --source NEW   # alternating, to compare

Times, in fresh processes running ``python -m tba`` from ``--source`` (default: this
checkout, put first on PYTHONPATH):

* ``tba --help``, ``tba models`` and ``tba solve`` (sinh-Gordon B = 0.6, alpha = 0.1, R = 1)
  with numba's cache warm (a shared NUMBA_CACHE_DIR, filled by one run first);
* the same ``tba solve`` with an empty NUMBA_CACHE_DIR (``--cold`` runs, each in its own
  empty directory): the first-run compile;
* the total import time that ``python -X importtime`` reports for that ``tba solve`` (the sum
  of its top-level imports) and for ``tba --help``.

Medians of wall time and of the process's CPU time (user + system, its children included),
since the machine is shared and the load varies: CPU time depends less on the load. No test
asserts on timings.
"""

import argparse
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

SOLVE = ["solve", "--model", "sinh-gordon", "--coupling", "0.6", "--alpha", "0.1", "--radius", "1"]
COMMANDS = {"tba --help": ["--help"], "tba models": ["models"], "tba solve": SOLVE}


def _env(source, cache):
    env = dict(os.environ, NUMBA_CACHE_DIR=str(cache), OMP_NUM_THREADS="1", NUMBA_NUM_THREADS="1")
    env["PYTHONPATH"] = os.pathsep.join([str(source), env.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    return env


def _wall(args, env, importtime=False):
    # run from the source tree: ``python -m`` puts the working directory first on sys.path
    cmd = [sys.executable] + (["-X", "importtime"] if importtime else []) + ["-m", "tba"] + args
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, env=env, capture_output=True, text=True, cwd=env["PYTHONPATH"].split(os.pathsep)[0])
    dt = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed: {proc.stderr[-2000:]}")
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return dt, proc.stderr, cpu


def import_seconds(stderr):
    """The sum of the top-level (cumulative) entries of ``-X importtime``, in seconds."""
    total = 0
    for line in stderr.splitlines():
        if not line.startswith("import time:") or "|" not in line:
            continue
        _, cumulative, name = line.split("|", 2)
        if cumulative.strip().isdigit() and name.startswith(" ") and not name.startswith("  "):
            total += int(cumulative)
    return total / 1e6


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--runs", type=int, default=5, help="warm runs per command (default 5)")
    ap.add_argument("--cold", type=int, default=5, help="cold (empty numba cache) runs (default 5)")
    ap.add_argument("--source", action="append", default=None,
                    help="checkout to run (default: this one); give it twice (before, after) "
                    "and the runs alternate between them, so that both see the same load")
    a = ap.parse_args()
    sources = a.source or [str(Path(__file__).resolve().parents[1])]
    caches = [tempfile.TemporaryDirectory() for _ in sources]
    envs = [_env(src, cache.name) for src, cache in zip(sources, caches)]
    for env in envs:
        _wall(SOLVE, env)  # fills the cache
    runs = {(i, label): [] for i in range(len(sources)) for label in COMMANDS}
    cpus = {(i, label): [] for i in range(len(sources)) for label in COMMANDS}
    imports = {(i, label): [] for i in range(len(sources)) for label in ("tba --help", "tba solve")}
    floor, cold = [], {i: [] for i in range(len(sources))}
    cold_cpu = {i: [] for i in range(len(sources))}
    for _ in range(a.runs):  # alternating: every round runs every source and command once
        floor.append(_floor())
        for i, env in enumerate(envs):
            for label, args in COMMANDS.items():
                wall, _, cpu = _wall(args, env)
                runs[i, label].append(wall)
                cpus[i, label].append(cpu)
                if (i, label) in imports:
                    imports[i, label].append(import_seconds(_wall(args, env, importtime=True)[1]))
    for _ in range(a.cold):
        for i, src in enumerate(sources):
            with tempfile.TemporaryDirectory() as empty:
                wall, _, cpu = _wall(SOLVE, _env(src, empty))
                cold[i].append(wall)
                cold_cpu[i].append(cpu)
    med = statistics.median
    for i, src in enumerate(sources):
        print(f"source {src}")
        for label in COMMANDS:
            print(f"  {label:<26} warm median {med(runs[i, label]):.2f} s wall, "
                  f"{med(cpus[i, label]):.2f} s CPU  "
                  f"(wall {', '.join(f'{r:.2f}' for r in runs[i, label])})")
        for label in ("tba --help", "tba solve"):
            print(f"  {label + ' imports':<26} median {med(imports[i, label]):.3f} s "
                  f"(-X importtime, top-level sum)")
        if cold[i]:
            print(f"  {'tba solve, empty cache':<26} median {med(cold[i]):.1f} s wall, "
                  f"{med(cold_cpu[i]):.1f} s CPU  (wall {', '.join(f'{r:.1f}' for r in cold[i])})")
    print(f"python -c pass: median {med(floor):.2f} s", flush=True)
    for cache in caches:
        cache.cleanup()


def _floor():
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", "pass"], check=True)
    return time.perf_counter() - t0


if __name__ == "__main__":
    main()
