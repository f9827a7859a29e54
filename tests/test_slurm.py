"""The README's SLURM set-ups, run for real on a one-node SLURM cluster (`slurm_cluster.py`).

* the job-array script (``scan.sbatch``) through ``sbatch``, then the README's ``tba merge``:
  the merged file equals the serial run's in every stored number;
* one array element cancelled with ``scancel`` half-way (frozen with ``scontrol suspend``
  to check that it is half-way whatever the machine's speed, resumed, cancelled), then
  resubmitted alone with ``sbatch --array=I``: its shard resumes from the chunks it had
  written; no process of the cancelled element survives;
* the dask-jobqueue ``SLURMCluster`` script (``big_scan.py``) runs the scan on workers that
  are SLURM jobs and writes the serial file's numbers.

The scripts are taken from README.md and changed only where a 2-core test node needs it
(array size, cores, memory); each change must find its text exactly once, so that a README
that drifts fails here. Jobs run this Python (`sys.executable`) with this source tree on
PYTHONPATH, through a ``tba`` wrapper first on PATH. Where SLURM cannot be started (not root,
packages missing) the tests skip with the reason; with CI=true they fail instead.

The serial run of the same resolved run file is the reference (chunks are pure functions of
the run, so every executor must reproduce its bits).
"""

import os
import re
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from slurm_cluster import SlurmCluster, SlurmUnavailable
from tba.cli import main
from tba.store.hdf5 import load

REPO = Path(__file__).resolve().parent.parent

RUN = """\
# SLURM tests: Lee-Yang and E8, both signs of alpha, 24 radii, one radius per chunk
# (96 chunks; runtime about 5 s serial)
output = "out/big.h5"

[[models]]
name = "lee-yang"

[[models]]
name = "ising-e8"

[deformation]
alphas = [-0.1, 0.1]

[radii]
start = 0.5
stop = 3.0
count = 24

[solver]
tol = 1e-10

[scan]
chunk_size = 1
"""
SHARDS = 3
#: data sets that record how, when and where in the file, not what: the rest must equal the
#: serial file's. The chunk checksums cover each chunk's invocation and seconds too (reading
#: the file verifies them, `load(...).bad_chunks`); the recovery map holds byte offsets.
METADATA = {"progress/invocation", "progress/seconds", "progress/checksum", "progress/history",
            "message", "branch_points/message"}
METADATA_GROUPS = ("recovery/",)


def readme_block(marker):
    """The fenced code block of README.md that contains ``marker``."""
    blocks = re.findall(r"```[a-z]*\n(.*?)```", (REPO / "README.md").read_text(), flags=re.S)
    found = [b for b in blocks if marker in b]
    assert len(found) == 1, f"README.md: expected one code block with {marker!r}, found {len(found)}"
    return found[0]


def adapted(text, *changes):
    """``text`` with each (old, new) replaced; each old text must occur exactly once."""
    for old, new in changes:
        assert text.count(old) == 1, f"README script changed: {old!r} occurs {text.count(old)} times"
        text = text.replace(old, new)
    return text


@pytest.fixture(scope="session")
def slurm(tmp_path_factory):
    """A running one-node SLURM cluster for the session (stopped at the end)."""
    cluster = None
    try:
        cluster = SlurmCluster(tmp_path_factory.mktemp("slurm"))
        cluster.start()
    except SlurmUnavailable as exc:
        if cluster is not None:
            cluster.stop()
        if os.environ.get("CI", "").lower() == "true":
            pytest.fail(f"CI=true needs a SLURM cluster: {exc}")
        pytest.skip(f"no SLURM cluster here: {exc}")
    yield cluster
    cluster.stop()


@pytest.fixture(scope="module")
def job_env(slurm, tmp_path_factory):
    """The environment jobs and README commands run in: ``tba`` is this Python with this
    source tree."""
    bin_dir = tmp_path_factory.mktemp("bin")
    wrapper = bin_dir / "tba"
    wrapper.write_text(f'#!/bin/sh\nexec "{sys.executable}" -m tba "$@"\n')
    wrapper.chmod(0o755)
    path = os.pathsep.join([str(bin_dir), os.environ.get("PATH", "")])
    pythonpath = os.pathsep.join(p for p in [str(REPO), os.environ.get("PYTHONPATH")] if p)
    return {**slurm.env, "PATH": path, "PYTHONPATH": pythonpath}


@pytest.fixture(scope="module")
def serial(tmp_path_factory):
    """The serial run of the run file: the reference."""
    d = tmp_path_factory.mktemp("serial")
    (d / "runs").mkdir()
    (d / "runs" / "big.toml").write_text(RUN)
    assert main(["run", str(d / "runs" / "big.toml"), "-o", str(d / "serial.h5"),
                 "--workers", "1"]) == 0
    return d / "serial.h5"


def scan_dir(tmp_path):
    """A working directory laid out as the README's examples expect: runs/big.toml and the
    job-array script."""
    (tmp_path / "runs").mkdir()
    (tmp_path / "runs" / "big.toml").write_text(RUN)
    script = adapted(readme_block("# scan.sbatch"), ("--array=1-100", f"--array=1-{SHARDS}"),
                     ("SHARDS=100", f"SHARDS={SHARDS}"), ("--cpus-per-task=32", "--cpus-per-task=1"))
    (tmp_path / "scan.sbatch").write_text(script)
    return tmp_path / "scan.sbatch"


def merge_as_in_readme(cwd, env):
    commands = readme_block("tba merge parts/part-*.h5")
    proc = subprocess.run(["bash", "-euc", commands], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert f"{SHARDS} file(s)" in proc.stderr and "; complete" in proc.stderr, proc.stderr
    return cwd / "scan.h5"


def assert_same_numbers(path, serial):
    """Every stored number of ``path`` equals the serial file's, bit for bit (NaN where NaN);
    history and timings may differ."""
    names = []

    def visit(name, obj):
        if (isinstance(obj, h5py.Dataset) and name not in METADATA
                and not name.startswith(METADATA_GROUPS)):
            names.append(name)

    with h5py.File(serial, "r") as ref, h5py.File(path, "r") as f:
        ref.visititems(visit)
        assert len(names) >= 28  # scales, points, flow check, chunk table, branch points
        for name in names:
            a, b = ref[name][...], f[name][...]
            assert a.dtype == b.dtype and a.shape == b.shape, name
            assert np.array_equal(a, b, equal_nan=a.dtype.kind == "f"), name
        assert f.attrs["run_id"] == ref.attrs["run_id"]
        assert int(f["progress/done"][...].sum()) == len(f["progress/done"])
    assert not load(path).bad_chunks  # every chunk passes its own checksum


def _done(path):
    """Chunks marked done in a file a job may be writing (0 while unreadable)."""
    try:
        with h5py.File(path, "r", locking=False) as f:
            return int(f["progress/done"][...].sum())
    except (OSError, KeyError):
        return 0


@pytest.mark.slow
def test_job_array_from_the_readme_then_merge_equals_serial(slurm, job_env, serial, tmp_path):
    script = scan_dir(tmp_path)
    t0 = time.perf_counter()
    job = slurm.sbatch(script, cwd=tmp_path, env=job_env)
    states = slurm.wait(job, timeout=240)
    seconds = time.perf_counter() - t0
    logs = "".join(p.read_text() for p in sorted(tmp_path.glob("slurm-*.out")))
    assert states == {k: "COMPLETED" for k in range(1, SHARDS + 1)}, logs
    for k in range(1, SHARDS + 1):
        assert f"(shard {k}/{SHARDS}) is complete" in logs, logs
    assert_same_numbers(merge_as_in_readme(tmp_path, job_env), serial)
    print(f"job array of {SHARDS} shards: {seconds:.1f} s from sbatch to the last element's end")


@pytest.mark.slow
def test_a_cancelled_element_resubmitted_alone_resumes_its_shard(slurm, job_env, serial, tmp_path):
    script = scan_dir(tmp_path)
    job = slurm.sbatch(script, cwd=tmp_path, env=job_env)
    k = 2
    part = tmp_path / "parts" / f"part-{k}.h5"
    owned = len(range(k - 1, 4 * 24, SHARDS))  # chunks of shard k (chunk i -> (i mod N) + 1)
    deadline = time.monotonic() + 180
    while _done(part) < 2:  # a chunk or two written: freeze the element mid-run
        assert time.monotonic() < deadline, f"shard {k} wrote nothing: {slurm.states(job)}"
        assert slurm.states(job).get(k) in (None, "PENDING", "RUNNING"), slurm.states(job)
        time.sleep(0.02)
    slurm.scontrol("suspend", f"{job}_{k}")
    assert _done(part) < owned, f"shard {k} finished before it could be suspended"
    # cancelled while running: a suspended job's processes would stay stopped and keep the
    # file open, since their SIGTERM waits for a SIGCONT that scancel does not send
    slurm.scontrol("resume", f"{job}_{k}")
    slurm.scancel(f"{job}_{k}")
    states = slurm.wait(job, timeout=240)
    assert states[k] == "CANCELLED" and all(states[i] == "COMPLETED" for i in (1, 3)), states
    deadline = time.monotonic() + 30
    while slurm.processes(job):  # the element's processes are gone, not merely marked
        assert time.monotonic() < deadline, f"processes of job {job} left: {slurm.processes(job)}"
        time.sleep(0.1)
    before = _done(part)  # what the cancelled element left in its file (a chunk may have
    assert 2 <= before < owned, before  # landed between resume and SIGTERM)

    again = slurm.sbatch(script, f"--array={k}", cwd=tmp_path, env=job_env)
    states = slurm.wait(again, timeout=240)
    log = (tmp_path / f"slurm-{again}_{k}.out").read_text()
    assert states == {k: "COMPLETED"}, log
    assert f"resuming {part} (shard {k}/{SHARDS}): {owned - before} of {owned} chunks" in log, log
    with h5py.File(part, "r") as f:
        mine = f["progress/owned"][...].astype(bool)
        invocations = f["progress/invocation"][...][mine]
    # the cancelled element's chunks were kept, the resubmitted one computed only the rest
    assert np.count_nonzero(invocations == 1) == before and set(invocations.tolist()) == {1, 2}
    assert_same_numbers(merge_as_in_readme(tmp_path, job_env), serial)


@pytest.mark.slow
def test_dask_jobqueue_script_from_the_readme_equals_serial(slurm, job_env, serial, tmp_path):
    pytest.importorskip("dask_jobqueue", reason="the cluster extra installs dask-jobqueue")
    (tmp_path / "runs").mkdir()
    (tmp_path / "runs" / "big.toml").write_text(RUN)
    text = adapted(readme_block("from dask_jobqueue import SLURMCluster"),
                   ('cores=32, processes=32, memory="64GB"', 'cores=1, processes=1, memory="1GB"'),
                   ("cluster.scale(jobs=100)", "cluster.scale(jobs=2)"))
    (tmp_path / "big_scan.py").write_text(text)
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "big_scan.py"], cwd=tmp_path, env=job_env,
                          capture_output=True, text=True, timeout=300)
    seconds = time.perf_counter() - t0
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "is complete" in proc.stderr and "dask" in proc.stderr, proc.stderr[-3000:]
    assert_same_numbers(tmp_path / "runs" / "out" / "big.h5", serial)
    deadline = time.monotonic() + 60  # leaving the script's with-block cancelled the jobs
    while slurm.squeue():
        assert time.monotonic() < deadline, f"worker jobs left behind: {slurm.squeue()}"
        time.sleep(0.2)
    print(f"dask-jobqueue scan: {seconds:.1f} s for the whole script")
