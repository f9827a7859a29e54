"""Faults injected into scans and their files, for real: concurrent writers and readers (real
processes), full disks (a tmpfs when this runs as root; a file-size limit otherwise), damaged
bytes (truncation, flipped bits), Ctrl-C and SIGTERM at random moments (also inside compiled
code), a cluster that loses all its workers, a solver that raises at one point, stale
temporary files, and HDF5 files that are not what they claim.

Everywhere the expectation is the same: nothing computed is lost, a failure is one line
naming the file (and the chunk) with exit code 2 (1 for tasks that failed, 130/143 for
signals), never a traceback, and what is stored is either verified or refused. The numbers
that are compared come from an uninterrupted serial run of the same resolved run file (a
chunk is a pure function of (run, chunk)), or from the free fermion's Bessel series."""

import contextlib
import gc
import io
import json
import os
import random
import re
import resource
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

import tba
import tba.scans.backends
import tba.scans.points
from tba.cli import main
from tba.scans import interrupts
from tba.scans.codes import BP_FOUND, NOT_COMPUTED
from tba.scans.runfile import RunSpec, load_run, loads_run
from tba.solvers.levels import solve_level
from tba.solvers.result import STATUS_CODES, Status
from tba.store.driver import ScanFailed, ScanInterrupted, run_scan
from tba.store.errors import DamagedStore, StoreBusy
from tba.store.hdf5 import (BRANCH_VARIABLES, HISTORY_SLOTS, POINT_VARIABLES, read_store)
from tba.store.lock import OutputLock, holder, lock_path
from tba.store.writer import open_store, prepare_store

from reference import free_fermion_ns_energy
from storetools import data_offset, flip_bit, reseal

# Free fermion at alpha = 0.5 has no real ground state below R ~ 0.6 (docs/physics.md section 4):
# those points cost a continuation each (~0.1 s), which keeps a scan busy long enough.
RUN = """\
# fault tests: free fermion, both signs of alpha, {count} radii in chunks of 2 (1-3 s)
output = "scan.h5"

[[models]]
name = "free-fermion"

[deformation]
alphas = [-0.3, 0.5]

[radii]
start = 0.1
stop = 3.0
count = {count}
spacing = "log"

[solver]
tol = 1e-10

[scan]
chunk_size = 2
"""
COUNT = 16
NUMBERS = [name for name, (kind, _, _) in POINT_VARIABLES.items() if kind != "str"]
BRANCH_NUMBERS = [name for name, (kind, _, _) in BRANCH_VARIABLES.items() if kind != "str"]
CONVERGED = STATUS_CODES[Status.CONVERGED]
ROOT = os.geteuid() == 0


def _runfile(directory, count=COUNT):
    directory.mkdir(parents=True, exist_ok=True)
    path = directory / "run.toml"
    path.write_text(RUN.format(count=count))
    return path


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """The uninterrupted serial run, in this process."""
    run = load_run(_runfile(tmp_path_factory.mktemp("reference")))
    run_scan(run, workers=1, log=io.StringIO())
    return read_store(run.output)


def _same_numbers(data, ref):
    assert data.complete
    for name in NUMBERS:
        assert np.array_equal(data[name], ref[name], equal_nan=True), name
    for name in BRANCH_NUMBERS:
        assert np.array_equal(data.branch[name], ref.branch[name], equal_nan=True), name


def _partial(runfile, chunks, monkeypatch):
    """A store interrupted after ``chunks`` chunks (Ctrl-C inside the scan, in this process)."""
    solve = tba.scans.backends.solve_chunk
    calls = []

    def interrupted(run, chunk):
        if len(calls) == chunks:
            raise KeyboardInterrupt
        calls.append(chunk.index)
        return solve(run, chunk)

    monkeypatch.setattr(tba.scans.backends, "solve_chunk", interrupted)
    run = load_run(runfile)
    with pytest.raises(ScanInterrupted):
        run_scan(run, workers=1, log=io.StringIO())
    monkeypatch.setattr(tba.scans.backends, "solve_chunk", solve)
    assert int(read_store(run.output).progress["done"].sum()) == chunks
    return run


def _one_line(capsys, code, argv):
    """Run ``tba argv`` in this process: exit code ``code``, one line on stderr, no traceback."""
    capsys.readouterr()
    assert main([str(a) for a in argv]) == code
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("tba: error: ") and "Traceback" not in err[0], err
    return err[0]


def _tba(*argv, **kwargs):
    return subprocess.run([sys.executable, "-m", "tba", *map(str, argv)], capture_output=True,
                          text=True, timeout=300, **kwargs)


@contextlib.contextmanager
def _tmpfs(path, size):
    """A tmpfs of ``size`` bytes mounted at ``path`` (root only; the test is skipped else)."""
    if not ROOT or shutil.which("mount") is None:
        pytest.skip("mounting a tmpfs needs root")
    path.mkdir()
    mounted = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path)],
                             capture_output=True, text=True)
    if mounted.returncode:
        pytest.skip(f"cannot mount a tmpfs here: {mounted.stderr.strip()}")
    try:
        yield path
    finally:
        subprocess.run(["umount", "-l", str(path)], capture_output=True)


def _fill(directory):
    """Fill the file system of ``directory`` to the last byte."""
    fd = os.open(directory / "filler", os.O_WRONLY | os.O_CREAT)
    try:
        for block in (1 << 16, 4096, 1):
            while True:
                try:
                    os.write(fd, b"\0" * block)
                except OSError:
                    break
    finally:
        os.close(fd)


def _done(path):
    try:
        with h5py.File(path, "r", locking=False) as f:
            return int(f["progress/done"][...].sum())
    except Exception:  # noqa: BLE001 (not created yet)
        return 0


def _wait_for_chunks(proc, path, n=1, timeout=120):
    t0 = time.monotonic()
    while _done(path) < n:
        if proc.poll() is not None:
            pytest.fail(f"tba run ended before it could be interrupted: {proc.communicate()}")
        if time.monotonic() - t0 > timeout:
            proc.kill()
            pytest.fail("no chunk was written in time")
        time.sleep(0.005)


# -- one writer per file -----------------------------------------------------------------------

def test_a_held_lock_refuses_a_second_writer_in_one_line(tmp_path, reference, capsys):
    runfile = _runfile(tmp_path)
    out = tmp_path / "scan.h5"
    with OutputLock(out, command="test writer"):
        assert holder(out)["command"] == "test writer"
        # another process, even with --force: refused on one line, nothing written
        r = _tba("run", runfile, "--workers", "1", "--force")
        assert r.returncode == 2 and "Traceback" not in r.stderr, r.stderr
        line = r.stderr.strip().splitlines()
        assert len(line) == 1 and "being written by test writer (pid" in line[0]
        assert not out.exists()
        # in this process too (open-file-description locks), and for a merge into it
        with pytest.raises(StoreBusy, match="being written by test writer"):
            run_scan(load_run(runfile), workers=1, log=io.StringIO())
        line = _one_line(capsys, 2, ["merge", reference.path, "-o", out])
        assert "being written by test writer" in line and not out.exists()
    assert holder(out) is None and not lock_path(out).exists()
    run_scan(load_run(runfile), workers=1, log=io.StringIO())
    _same_numbers(read_store(out), reference)


@pytest.mark.slow
def test_two_runs_racing_for_a_new_file_never_leave_missing_chunks(tmp_path):
    # the defect: both printed "... is complete" and left 16/54 chunks. Now one computes, the
    # other fails on one line or finds the file complete; the file always is complete.
    runfile = _runfile(tmp_path, count=48)
    procs = [subprocess.Popen([sys.executable, "-m", "tba", "run", str(runfile), "--workers", "1"],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for _ in range(2)]
    results = [p.communicate(timeout=300) + (p.returncode,) for p in procs]
    computed = [err for _, err, code in results if code == 0 and "computed 48 chunks" in err]
    assert len(computed) == 1, results
    for _, err, code in results:
        assert "Traceback" not in err
        assert code == 0 or (code == 2 and "being written by tba run" in err), err
    data = read_store(tmp_path / "scan.h5")
    assert data.complete and (data["status"] != NOT_COMPUTED).all()


@pytest.mark.slow
def test_readers_see_consistent_snapshots_while_a_scan_writes(tmp_path):
    runfile = _runfile(tmp_path, count=48)
    run = load_run(runfile)
    out = Path(run.output)
    proc = subprocess.Popen([sys.executable, "-m", "tba", "run", str(runfile), "--workers", "1"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    snapshots = 0
    while True:
        finished = proc.poll() is not None
        if out.exists():
            data = read_store(out)  # never a raw OSError, never a checksum failure
            done = data.progress["done"].astype(bool)
            for c in run.chunks():
                status = data["status"][c.model, c.alpha, c.radius_start:c.radius_stop, c.state]
                assert (status != NOT_COMPUTED).all() == done[c.index], c
            snapshots += 1
        if finished:
            break
    _, err = proc.communicate()
    assert proc.returncode == 0, err
    assert snapshots >= 1 and read_store(out).complete


def test_a_reader_racing_a_branch_point_write_sees_it_whole_or_not_yet(tmp_path, monkeypatch):
    # The torn read once seen beside a running scan: R_c read before the writer put it there,
    # the status ("found") after, and the file refused as damaged. Here the writer's whole
    # write lands before each data set the reader reads in turn (common practice for
    # lock-free readers: the writer publishes a flag last, the reader reads it first).
    import tba.store.hdf5 as hdf5

    run = load_run(_runfile(tmp_path))
    pristine = tmp_path / "pristine.h5"
    prepare_store(pristine, run)
    key = (0, 1)  # free fermion, alpha = 0.5
    values = {"branch_radius": 0.625, "branch_radius_error": 1e-12, "energy": -0.75,
              "energy_error": 1e-12, "effective_radius": 0.95, "status": BP_FOUND, "message": ""}
    require, reads = hdf5._require, []
    monkeypatch.setattr(hdf5, "_require", lambda *a, **k: reads.append(a[2]) or require(*a, **k))
    hdf5.load(pristine)
    assert "branch_points/status" in reads and "branch_points/branch_radius" in reads
    seen = set()
    for k in range(len(reads)):
        path = tmp_path / f"race-{k}.h5"
        shutil.copyfile(pristine, path)
        store, calls = open_store(path, prepare_store(path, run), run), []

        def racing(*a, **kw):
            if len(calls) == k:
                store.write_branch_point(*key, values)
            calls.append(a[2])
            return require(*a, **kw)

        monkeypatch.setattr(hdf5, "_require", racing)
        snap = hdf5.load(path)  # never DamagedStore
        status = int(snap.branch["status"][key])
        seen.add(status)
        if status == BP_FOUND:
            assert snap.branch["branch_radius"][key] == 0.625 and snap.branch["energy"][key] == -0.75
        else:
            assert status == NOT_COMPUTED and np.isnan(snap.branch["branch_radius"][key])
    assert seen == {NOT_COMPUTED, BP_FOUND}


# -- full disks and failed writes ----------------------------------------------------------------

def test_creation_checks_the_free_space_first(tmp_path):
    with _tmpfs(tmp_path / "small", 64 * 1024) as fs:
        runfile = _runfile(fs)
        r = _tba("run", runfile, "--workers", "1")
        assert r.returncode == 2 and "Traceback" not in r.stderr
        assert re.fullmatch(r"tba: error: \S+scan\.h5: needs [\d.]+ KB of disk space and its file "
                            r"system has [\d.]+ KB free; free some space or write the file "
                            r"elsewhere \(--output\)\n", r.stderr), r.stderr
        assert sorted(os.listdir(fs)) == ["run.toml"]  # no file, no temporary file, no lock


def test_a_failed_write_at_creation_changes_nothing(tmp_path, monkeypatch, capsys):
    # before: tracebacks, then a segmentation fault (HDF5 in a failed state). Now the file is
    # built in memory and written with plain writes: the space check is fooled here.
    import tba.store.hdf5

    monkeypatch.setattr(tba.store.hdf5, "free_space", lambda directory: 1 << 40)
    with _tmpfs(tmp_path / "small", 64 * 1024) as fs:
        runfile = _runfile(fs)
        line = _one_line(capsys, 2, ["run", runfile, "--workers", "1"])
        assert line.endswith("scan.h5: could not be written (No space left on device); nothing "
                             "was changed")
        assert sorted(os.listdir(fs)) == ["run.toml"]


def test_a_resume_on_a_full_disk_completes(tmp_path, reference, monkeypatch):
    # before: "Unable to synchronously flush file ... errno = 28", then every command refused
    # the file. The history is written in place like the chunks: nothing needs new space.
    with _tmpfs(tmp_path / "small", 1024 * 1024) as fs:
        run = _partial(_runfile(fs), 5, monkeypatch)
        size = os.path.getsize(run.output)
        _fill(fs)
        assert os.statvfs(fs).f_bavail == 0
        summary = run_scan(run, workers=1, log=io.StringIO())
        assert summary.chunks_before == 5 and summary.complete
        assert os.path.getsize(run.output) == size
        data = read_store(run.output)
        _same_numbers(data, reference)
        assert [h["invocation"] for h in data.history] == [1, 2]
        assert data.history[0]["interrupted"] and data.history[1]["finished"]


def test_a_write_that_fails_mid_scan_loses_nothing(tmp_path, reference, monkeypatch):
    # a file-size limit (no root needed): every write past it fails with EFBIG, as a full disk
    # or an I/O error would; the chunks written before stay, the next run completes
    run = _partial(_runfile(tmp_path), 3, monkeypatch)
    limit = data_offset(run.output, "energy")
    r = subprocess.run([sys.executable, "-m", "tba", "run", str(tmp_path / "run.toml"), "--workers", "1"],
                       capture_output=True, text=True, timeout=300,
                       preexec_fn=lambda: resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit)))
    assert r.returncode == 2 and "Traceback" not in r.stderr, r.stderr
    line = r.stderr.strip().splitlines()[-1]
    assert re.search(r"scan\.h5: writing .*failed \(File too large\); the 3 chunks written before "
                     r"are safe: run the same command again once that is fixed$", line), line
    assert int(read_store(run.output).progress["done"].sum()) == 3
    assert run_scan(run, workers=1, log=io.StringIO()).complete
    _same_numbers(read_store(run.output), reference)


def test_a_read_only_file_system_says_the_chunks_are_safe(tmp_path, monkeypatch, capsys):
    # before: the message suggested --force, which would have destroyed the computed chunks
    with _tmpfs(tmp_path / "ro", 1024 * 1024) as fs:
        run = _partial(_runfile(fs), 4, monkeypatch)
        before = Path(run.output).read_bytes()
        subprocess.run(["mount", "-o", "remount,ro", str(fs)], check=True)
        line = _one_line(capsys, 2, ["run", fs / "run.toml", "--workers", "1"])
        assert "cannot be written (Read-only file system); its 4 computed chunks are safe" in line
        assert "--output COPY" in line and "--force" not in line
        assert main(["report", str(run.output)]) == 0
        assert Path(run.output).read_bytes() == before


# -- damaged bytes ---------------------------------------------------------------------------

def test_a_truncated_file_is_rebuilt_from_its_verified_chunks(tmp_path, reference, monkeypatch,
                                                              capsys):
    # before: "in use by another process" (the HDF5 text contains "sblock"), and no way back
    run = _partial(_runfile(tmp_path), 6, monkeypatch)
    out = Path(run.output)
    os.truncate(out, int(out.stat().st_size * 0.6))
    damaged = out.read_bytes()
    line = _one_line(capsys, 2, ["report", out])
    assert "damaged HDF5 file (" in line and "truncated file" in line and "in use" not in line
    assert "rebuilds it from the 6 of 6 stored chunks whose checksums verify" in line
    for cmd in (["export", "--json", out], ["plot", out, "-o", tmp_path / "f.png"]):
        assert "damaged HDF5 file" in _one_line(capsys, 2, cmd)
    log = io.StringIO()
    summary = run_scan(run, workers=1, log=log)
    assert summary.chunks_before == 6 and summary.complete
    assert "rebuilt it from the 6 of 6 stored chunks" in log.getvalue()
    kept = [p for p in tmp_path.iterdir() if p.name.startswith("scan.h5.damaged-")]
    assert len(kept) == 1 and kept[0].read_bytes() == damaged  # never deleted
    data = read_store(out)
    _same_numbers(data, reference)
    assert [h.get("chunks_recovered") for h in data.history] == [None, 6, None]


def test_a_damaged_file_of_another_tba_version_is_not_rebuilt(tmp_path, monkeypatch):
    import tba.store.writer

    run = _partial(_runfile(tmp_path), 2, monkeypatch)
    os.truncate(run.output, os.path.getsize(run.output) // 2)
    damaged = Path(run.output).read_bytes()
    monkeypatch.setattr(tba.store.writer, "package_version", lambda: "9.9")
    with pytest.raises(DamagedStore, match=f"its chunks were computed by tba {re.escape(tba.__version__)}, "
                                           f"this is tba 9.9, so nothing in it can be recovered"):
        run_scan(run, workers=1, log=io.StringIO())
    assert Path(run.output).read_bytes() == damaged


def test_a_file_with_a_broken_superblock_is_rebuilt(tmp_path, reference, monkeypatch):
    run = _partial(_runfile(tmp_path), 4, monkeypatch)
    with open(run.output, "r+b") as fh:  # the HDF5 signature and superblock
        fh.write(b"\0" * 64)
    with pytest.raises(DamagedStore, match="damaged HDF5 file .no HDF5 signature left.; tba run "
                       ".* rebuilds it from the 4 of 4 stored chunks"):
        read_store(run.output)
    assert run_scan(run, workers=1, log=io.StringIO()).chunks_before == 4
    _same_numbers(read_store(run.output), reference)


def test_a_flipped_bit_in_a_chunk_is_named_and_computed_again(tmp_path, reference, capsys):
    runfile = _runfile(tmp_path)
    run = load_run(runfile)
    run_scan(run, workers=1, log=io.StringIO(), run_file=runfile)
    out = Path(run.output)
    # /energy is (model, alpha, radius, state) = (1, 2, 16, 1): radius 9 of alpha 0.5 is in chunk 12
    flip_bit(out, data_offset(out, "energy") + 8 * (16 + 9) + 3, bit=5)
    line = _one_line(capsys, 2, ["export", "--csv", out])
    assert line == (f"tba: error: {out}: chunk 12 (free-fermion, alpha = 0.5, R = 0.6134766008 .. "
                    f"0.7696136341) fails its checksum (the file is damaged there); tba run {runfile} "
                    f"--output {out} recomputes it")
    assert "chunk 12 (free-fermion" in _one_line(capsys, 2, ["merge", out, "-o", tmp_path / "m.h5"])
    log = io.StringIO()
    summary = run_scan(run, workers=1, log=log)
    assert summary.chunks_computed == 1 and "chunk 12 (free-fermion" in log.getvalue()
    _same_numbers(read_store(out), reference)


FLIPS = r"""
import contextlib, io, json, random, shutil, sys, traceback
import h5py
from tba.cli import main
src, tmp, n, seed = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4])

def run(path, argv):
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = main(argv)
        except BaseException:
            code = "raised"
            traceback.print_exc(file=err)
    return code, out.getvalue().replace(path, src), err.getvalue()

commands = [["export", "--json"], ["export", "--csv"], ["report"]]
refs = [run(src, c + [src]) for c in commands]
with open(src, "rb") as fh:
    size = len(fh.read())
raw = []
with h5py.File(src, "r") as f:
    f.visititems(lambda name, o: raw.append((o.id.get_offset(), o.id.get_storage_size()))
                 if isinstance(o, h5py.Dataset) and o.id.get_offset() else None)
metadata = [i for i in range(size) if not any(a <= i < a + s for a, s in raw)]
rng = random.Random(seed)
where = [rng.randrange(size) for _ in range(n)] + [rng.choice(metadata) for _ in range(n)] \
    + [a + rng.randrange(s) for a, s in raw]
counts = {}
for k, offset in enumerate(where):
    shutil.copy(src, tmp)
    with open(tmp, "r+b") as fh:
        fh.seek(offset)
        byte = fh.read(1)[0]
        fh.seek(offset)
        fh.write(bytes([byte ^ (1 << rng.randrange(8))]))
    for c, ref in zip(commands, refs):
        code, out, err = run(tmp, c + [tmp])
        lines = err.strip().splitlines()
        if code == 0 and out == ref[1]:
            kind = "unchanged"
        elif code == 2 and len(lines) == 1 and "Traceback" not in err:
            kind = "one-line error"
        else:
            kind = f"BAD at byte {offset}: {code} {err[-300:]!r}"
        counts[kind] = counts.get(kind, 0) + 1
print(json.dumps(counts))
"""


@pytest.mark.slow
def test_flipped_bits_anywhere_never_change_what_is_read(tmp_path, reference):
    # before, 120 single-bit flips: 52 silently changed exported numbers, 15 tracebacks, 0
    # clean errors. Now: the output is unchanged (the bit was unused) or one line, exit 2.
    # In a process of its own, so that a crash inside HDF5 would fail the test, not the suite.
    src = tmp_path / "scan.h5"
    shutil.copy(reference.path, src)
    r = subprocess.run([sys.executable, "-c", FLIPS, str(src), str(tmp_path / "flipped.h5"), "40", "7"],
                       capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr[-2000:]
    counts = json.loads(r.stdout.strip().splitlines()[-1])
    assert set(counts) <= {"unchanged", "one-line error"}, counts
    assert counts["one-line error"] >= 40, counts  # the raw data of every data set is covered


def test_damaged_files_without_a_recovery_map_are_never_touched(tmp_path, monkeypatch, capsys):
    run = _partial(_runfile(tmp_path), 3, monkeypatch)
    out = Path(run.output)
    data = bytearray(out.read_bytes())
    data[data.find(b"#tba-flow recovery map#")] ^= 1  # the map, and the superblock
    data[:64] = b"\0" * 64
    out.write_bytes(bytes(data))
    line = _one_line(capsys, 2, ["run", tmp_path / "run.toml", "--workers", "1"])
    assert "not an HDF5 file" in line and "--force" in line
    assert out.read_bytes() == bytes(data)


# -- files that are not what they claim (issue: every bad input a one-line error) ----------------

def _as_schema_3(path):
    """The same store as schema 3 wrote it (no checksums; history in an attribute)."""
    history = read_store(path).history
    with h5py.File(path, "r+") as f:
        f.attrs["schema_version"] = 3
        del f.attrs["header_checksum"]
        for name in ("recovery", "progress/checksum", "progress/history", "progress/slot",
                     "branch_points/checksum"):
            del f[name]
        f["progress"].attrs["history"] = json.dumps(history)


@pytest.mark.parametrize("edit, message", [
    ("run-not-json", "its run attribute is not valid JSON"),
    ("run-not-a-run", "its run attribute is not a valid run"),
    ("energy-missing", "data set /energy is missing"),
    ("energy-shape", "data set /energy has shape (1, 2, 15, 1), its run needs (1, 2, 16, 1)"),
    ("converged-nan", "holds a converged point without a finite energy and error estimate"),
    ("radius-edited", "its /radius coordinate does not match its run"),
    ("status-code", "holds a point status that is not a known code"),
])
@pytest.mark.parametrize("schema", [3, 4])
def test_foreign_or_edited_files_are_one_line_errors(tmp_path, reference, capsys, edit, message,
                                                     schema):
    # before: JSONDecodeError, IndexError, KeyError in merge, and report/plot/export running on
    # and exporting status=converged with energy nan
    path = tmp_path / "scan.h5"
    shutil.copy(reference.path, path)
    if schema == 3:
        _as_schema_3(path)
    with h5py.File(path, "r+") as f:
        if edit == "run-not-json":
            f.attrs["run"] = "{not json"
        elif edit == "run-not-a-run":
            f.attrs["run"] = json.dumps({"models": "x"})
        elif edit == "energy-missing":
            del f["energy"]
        elif edit == "energy-shape":
            energy = f["energy"][:, :, 1:, :]
            del f["energy"]
            f["energy"] = energy
        elif edit == "converged-nan":
            i = tuple(np.argwhere(f["status"][...] == CONVERGED)[0])
            f["energy"][i] = np.nan
        elif edit == "radius-edited":
            f["radius"][3] *= 1 + 1e-15
        elif edit == "status-code":
            f["status"][0, 0, 0, 0] = 7
    if schema == 4:
        if edit in ("run-not-json", "run-not-a-run"):  # the header checksum sees that first
            message = "damaged (its root attributes fail their checksum)"
        elif edit not in ("energy-missing", "energy-shape", "radius-edited"):
            message = "fails its checksum"  # edits of values break their chunk's checksum
        assert message in _one_line(capsys, 2, ["report", path])
        if edit in ("converged-nan", "status-code"):  # the same edit, checksums made to match
            reseal(path)
            message = {"converged-nan": "a converged point without a finite energy",
                       "status-code": "a point status that is not a known code"}[edit]
    before = path.read_bytes()
    for argv in (["report", path], ["export", "--json", path], ["export", "--csv", path],
                 ["plot", path, "-o", tmp_path / "fig.png"],
                 ["merge", path, "-o", tmp_path / "merged.h5"]):
        line = _one_line(capsys, 2, argv)
        assert str(path) in line and message in line, (argv, line)
    assert path.read_bytes() == before and not (tmp_path / "merged.h5").exists()


# -- signals -------------------------------------------------------------------------------------

def test_ctrl_c_inside_compiled_code_is_a_clean_interrupt():
    # before: "SystemError: CPUDispatcher(...) returned a result with an exception set" about 1
    # time in 3 (numba builds exceptions through a Python callback the interrupt hits).
    # Real SIGINTs at random moments of solves, with the handlers of the command line.
    # Also before: an interrupt raised inside a garbage-collector callback (dask.distributed
    # registers one) was swallowed by Python and lost, and the scan went on (a test run
    # hung here); a callback of that kind is registered below, with frequent collections.
    model = tba.sinh_gordon(0.6)
    solve_level(model, 1.0, "ground", tba.ttbar(0.05), tol=1e-10)
    rng = random.Random(3)
    outcomes = []
    seen = []

    def gc_callback(phase, info):  # Python work inside the collector, as dask's has
        seen.append(sum(range(50)))

    previous = signal.signal(signal.SIGALRM, lambda s, f: signal.raise_signal(signal.SIGINT))
    thresholds = gc.get_threshold()
    gc.callbacks.append(gc_callback)
    gc.set_threshold(50)
    try:
        with interrupts.installed():
            for _ in range(60):
                signal.setitimer(signal.ITIMER_REAL, rng.uniform(0.001, 0.03))
                deadline = time.monotonic() + 20  # a lost interrupt fails, never hangs
                try:
                    while time.monotonic() < deadline:
                        solve_level(model, rng.uniform(0.5, 3), "ground", tba.ttbar(0.05), tol=1e-10)
                    outcomes.append("lost")
                except KeyboardInterrupt as exc:
                    outcomes.append(interrupts.signal_number(exc))
                except Exception as exc:  # noqa: BLE001 (what the defect gave)
                    outcomes.append(repr(exc))
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)
        gc.callbacks.remove(gc_callback)
        gc.set_threshold(*thresholds)
    assert outcomes == [signal.SIGINT] * 60
    assert seen  # the collector's callback did run


@pytest.mark.slow
@pytest.mark.parametrize("sig, workers", [(signal.SIGINT, 1), (signal.SIGTERM, 1), (signal.SIGTERM, 2)])
def test_signals_exit_cleanly_and_close_the_history(tmp_path, sig, workers):
    # before: SIGTERM exited -15 with the history entry unfinished
    runfile = _runfile(tmp_path, count=48)
    out = tmp_path / "scan.h5"
    proc = subprocess.Popen([sys.executable, "-m", "tba", "run", str(runfile), "--workers",
                             str(workers)], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    _wait_for_chunks(proc, out)
    time.sleep(random.Random(sig * 10 + workers).uniform(0, 0.3))  # at a random moment
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=120)
    if "is complete" in err:  # the scan finished first: nothing to check
        return
    assert proc.returncode == 128 + sig and "Traceback" not in err, err
    last = err.strip().splitlines()[-1]
    how = "interrupted" if sig == signal.SIGINT else "terminated (SIGTERM)"
    assert last.startswith(f"tba: {how}; ") and last.endswith("run the same command again to resume")
    entry = read_store(out).history[-1]
    assert entry["finished"] and entry["interrupted"] and entry["signal"] == signal.Signals(sig).name
    assert _tba("run", runfile, "--workers", "1").returncode == 0
    assert read_store(out).complete


# -- clusters ----------------------------------------------------------------------------------

@pytest.mark.slow
def test_a_cluster_that_loses_all_its_workers_fails_clearly(tmp_path, reference):
    # before: workers killed over and over for 40 s left the driver waiting for ever in
    # Future.result. A cluster scaled to no workers mid-scan: the driver gives up after the
    # deadline, keeps what it has, and the next run completes the file.
    import distributed

    from tba.scans.cluster import DaskBackend, local_cluster

    run = load_run(_runfile(tmp_path))
    with local_cluster(2) as cluster, distributed.Client(cluster) as client:
        client.wait_for_workers(2, timeout=60)

        def lose_workers():
            while _done(run.output) < 1:
                time.sleep(0.01)
            cluster.scale(0)

        threading.Thread(target=lose_workers, daemon=True).start()
        log = io.StringIO()
        with pytest.raises(ScanFailed) as info:
            run_scan(run, backend=DaskBackend(client=client, no_worker_timeout=3), log=log)
    message = str(info.value)
    assert "the cluster has had no workers for 3 s" in message and "\n" not in message
    saved = int(read_store(run.output).progress["done"].sum())
    assert saved >= 1 and f"{saved} of 16 chunks are saved" in message
    assert run_scan(run, workers=1, log=io.StringIO()).chunks_before == saved
    _same_numbers(read_store(run.output), reference)


def test_a_scheduler_without_workers_is_a_clear_failure(tmp_path):
    import distributed

    from tba.scans.cluster import DaskBackend

    run = load_run(_runfile(tmp_path))
    with distributed.LocalCluster(n_workers=0, dashboard_address="127.0.0.1:0") as cluster, \
            distributed.Client(cluster) as client:
        with pytest.raises(ScanFailed) as info:
            run_scan(run, backend=DaskBackend(client=client, no_worker_timeout=1), log=io.StringIO())
    # every chunk and branch point reported, none computed, the file readable
    assert str(info.value).startswith("18 tasks failed: chunk 0 (free-fermion, alpha = -0.3")
    assert "the cluster has had no workers for 1 s" in str(info.value)
    assert int(read_store(run.output).progress["done"].sum()) == 0


def test_a_local_cluster_that_cannot_start_is_one_line(tmp_path, capsys, monkeypatch):
    # before: "RuntimeError: Nanny failed to start." with a traceback, when workers died while
    # the cluster started
    import tba.scans.cluster

    def dying(n_workers):
        raise RuntimeError("Nanny failed to start.")

    monkeypatch.setattr(tba.scans.cluster, "local_cluster", dying)
    runfile = _runfile(tmp_path)
    line = _one_line(capsys, 2, ["run", runfile, "--cluster", "local:2"])
    assert line == ("tba: error: argument --cluster: the local cluster could not start: "
                    "RuntimeError: Nanny failed to start.")
    assert not (tmp_path / "scan.h5").exists()


def _children(pid):
    out = []
    for task in Path(f"/proc/{pid}/task").glob("*"):
        try:
            out += [int(p) for p in (task / "children").read_text().split()]
        except OSError:
            pass
    return out


@pytest.mark.slow
@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_a_pool_worker_that_dies_fails_its_tasks_and_keeps_the_rest(tmp_path):
    runfile = _runfile(tmp_path, count=32)
    out = tmp_path / "scan.h5"
    proc = subprocess.Popen([sys.executable, "-m", "tba", "run", str(runfile), "--workers", "2"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    _wait_for_chunks(proc, out, n=2)  # the first in the driver, then the pool's
    workers = [p for p in _children(proc.pid) if b"spawn_main" in Path(f"/proc/{p}/cmdline").read_bytes()]
    if workers:
        os.kill(workers[0], signal.SIGKILL)  # as the out-of-memory killer would
    _, err = proc.communicate(timeout=300)
    if proc.returncode == 0:  # the pool was done already
        return
    assert proc.returncode == 1 and "Traceback" not in err, err
    last = err.strip().splitlines()[-1]
    assert re.match(r"tba: error: \d+ tasks? failed: chunk \d+ .*BrokenProcessPool", last), last
    saved = int(read_store(out).progress["done"].sum())
    assert f"{saved} of 32 chunks" in last and "run the same command again" in last
    assert _tba("run", runfile, "--workers", "1").returncode == 0 and read_store(out).complete


# -- one failing point, stale files, bounded history ----------------------------------------------

def test_one_failing_point_never_stops_a_scan(tmp_path):
    # before: one radius of 1e300 stopped a local scan after 4-5 of 12 chunks
    base = loads_run(RUN.format(count=5), base_dir=tmp_path)
    run = RunSpec(**{**base.__dict__, "radii": (0.5, 1.0, 2.0, 3.0, 4.0, 1e300)})  # not validated
    summary = run_scan(run, workers=2, log=io.StringIO())
    assert summary.complete and summary.chunks_computed == 6
    data = read_store(run.output)
    failed = data["status"][0, :, 5, 0]
    assert (failed == STATUS_CODES[Status.NOT_CONVERGED]).all() and np.isnan(data["energy"][0, :, 5, 0]).all()
    assert data["message"][0, 0, 5, 0].startswith("the solver raised ")
    # the others, against the free fermion's Bessel series (Mussardo, Statistical Field
    # Theory (2010); tests/reference.py) at alpha = -0.3 via E = E_NS(R + alpha E)
    for r, R in enumerate(run.radii):
        if r != 5:
            E, err = data["energy"][0, 0, r, 0], data["error"][0, 0, r, 0]
            assert abs(E - free_fermion_ns_energy(R - 0.3 * E)) <= 10 * err + 1e-12, R


def test_a_solver_exception_is_stored_with_its_reason(tmp_path, monkeypatch):
    solve = tba.scans.points.solve_level

    def broken(model, radius, *args, **kwargs):
        if radius == 1.0:
            raise FloatingPointError("overflow in the kernel\nsecond line")
        return solve(model, radius, *args, **kwargs)

    monkeypatch.setattr(tba.scans.points, "solve_level", broken)
    base = loads_run(RUN.format(count=5), base_dir=tmp_path)
    run = RunSpec(**{**base.__dict__, "radii": (0.5, 1.0, 2.0)})
    run_scan(run, workers=1, log=io.StringIO())
    data = read_store(run.output)
    assert data["message"][0, 0, 1, 0] == ("the solver raised FloatingPointError: overflow in the "
                                           "kernel; no energy stored")
    assert (data["status"][0, 0, [0, 2], 0] == CONVERGED).all()  # alpha = -0.3, the other radii


def test_stale_temporary_files_of_dead_writers_are_removed(tmp_path, reference):
    import platform

    runfile = _runfile(tmp_path)
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    host = platform.node()
    stale = [tmp_path / f".scan.h5.partial-{host}-{dead.pid}", tmp_path / f".scan.h5.partial-{dead.pid}"]
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    alive = [tmp_path / f".scan.h5.partial-{host}-{sleeper.pid}",  # a live process: kept
             tmp_path / f".scan.h5.partial-otherhost-{dead.pid}",  # another machine: kept
             tmp_path / f".other.h5.partial-{host}-{dead.pid}"]  # another output: kept
    for p in stale + alive:
        p.write_bytes(b"x" * 1000)
    log = io.StringIO()
    try:
        run_scan(load_run(runfile), workers=1, log=log)
    finally:
        sleeper.kill()
        sleeper.wait()
    assert "removed 2 temporary file(s) that killed invocations left" in log.getvalue()
    assert not any(p.exists() for p in stale) and all(p.exists() for p in alive)


def test_the_history_is_bounded_and_the_file_never_grows(tmp_path, reference):
    # before: 2000 invocations took a file from 140 KB to 1.35 GB (each history rewrite left
    # its old copy behind)
    run = load_run(_runfile(tmp_path))
    out = Path(run.output)
    shutil.copy(reference.path, out)
    size = out.stat().st_size
    prepared = prepare_store(out, run)
    for _ in range(HISTORY_SLOTS + 72):
        store = open_store(out, prepared, run)
        store.begin_invocation(1, 0)
        store.end_invocation(interrupted=True, signum=signal.SIGTERM)
        store.close()
        prepared.snapshot.invocations += 1
    assert out.stat().st_size == size
    data = read_store(out)
    assert data.invocations == HISTORY_SLOTS + 73 and len(data.history) == HISTORY_SLOTS
    assert [h["invocation"] for h in data.history] == list(range(74, HISTORY_SLOTS + 74))
    _same_numbers(data, reference)
