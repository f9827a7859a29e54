"""The command line against bad input, unwritable outputs, closed pipes, huge requests and
numbers at the edge of double precision: one line on stderr naming the argument (or key, or
file), exit code 2, no traceback, nothing touched and nothing computed lost.

The contract is the project's (README, "Command line" and "Limits"); the Unix conventions
are common practice, no source: a program whose reader went away stops quietly with the
status of a SIGPIPE death, 128 + 13 = 141; JSON has no NaN token (RFC 8259, section 6).
"""

import contextlib
import hashlib
import io
import json
import math
import os
import re
import signal
import subprocess
import sys
import tracemalloc
from pathlib import Path

import pytest

from tba.cli import main
from tba.cli.common import json_text
from tba.scans.limits import MAX_COUPLING, MAX_POINTS, MAX_RADIUS, MIN_RADIUS
from tba.scans.runfile import RunFileError, loads_run

REPO = Path(__file__).resolve().parent.parent

RUN = """\
# a tiny run: Lee-Yang, three alphas, 40 radii (under a second)
output = "out/tiny.h5"

[[models]]
name = "lee-yang"

[deformation]
alphas = [-0.1, 0, 0.1]

[radii]
start = 0.5
stop = 4.0
count = 40

[scan]
chunk_size = 10
"""


def tba_main(*args):
    """(exit code, stdout, stderr) of ``tba ARGS`` in this process."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main([str(a) for a in args])
    return code, out.getvalue(), err.getvalue()


def assert_usage_error(result, *names):
    """Exit code 2 and one line on stderr, naming each of ``names``."""
    code, out, err = result
    lines = err.strip().splitlines()
    assert code == 2 and len(lines) == 1 and lines[0].startswith("tba: error: "), (code, err)
    assert "Traceback" not in err
    for name in names:
        assert name in lines[0], (name, lines[0])
    return lines[0]


def snapshot(directory):
    """Path -> (size, mtime_ns, sha256) of every file below ``directory``."""
    files = {}
    for p in sorted(Path(directory).rglob("*")):
        if p.is_file():
            files[p] = (p.stat().st_size, p.stat().st_mtime_ns, hashlib.sha256(p.read_bytes()).hexdigest())
    return files


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """A complete store of `RUN`."""
    d = tmp_path_factory.mktemp("store")
    (d / "tiny.toml").write_text(RUN)
    code, _, err = tba_main("run", d / "tiny.toml", "--workers", "1")
    assert code == 0, err
    return d / "out" / "tiny.h5"


#: what the message says about `read_only_dir`
READ_ONLY = "read-only file system" if os.geteuid() == 0 else "not writable"


@pytest.fixture
def read_only_dir(tmp_path):
    """A directory on a read-only file system (a read-only tmpfs as root; a directory
    without write permission otherwise)."""
    d = tmp_path / "ro"
    d.mkdir()
    if os.geteuid() != 0:
        d.chmod(0o555)
        yield d
        d.chmod(0o755)
        return
    mount = subprocess.run(["mount", "-t", "tmpfs", "-o", "ro,size=1m", "tmpfs", str(d)],
                           capture_output=True, text=True)
    if mount.returncode != 0:
        pytest.skip(f"cannot mount a read-only tmpfs here: {mount.stderr.strip()}")
    try:
        yield d
    finally:
        subprocess.run(["umount", str(d)], check=True)


# -- outputs that cannot be written -----------------------------------------------------------

def _unwritable(kind, tmp_path, read_only_dir, suffix):
    """An output path of the given kind, and the text the message must contain."""
    if kind == "read-only file system":
        return read_only_dir / f"sub/x{suffix}", READ_ONLY
    if kind == "a directory":
        d = tmp_path / f"dir{suffix}"
        d.mkdir()
        return d, "is a directory"
    regular = tmp_path / "regular"
    regular.write_text("a file")
    return regular / f"x{suffix}", "is a file, not a directory"


KINDS = ["read-only file system", "a directory", "under a regular file"]


@pytest.mark.parametrize("kind", KINDS)
def test_run_refuses_an_unwritable_output_before_any_work(kind, tmp_path, read_only_dir):
    (tmp_path / "tiny.toml").write_text(RUN)
    target, why = _unwritable(kind, tmp_path, read_only_dir, ".h5")
    before = snapshot(tmp_path)
    assert_usage_error(tba_main("run", tmp_path / "tiny.toml", "--out", target), "--out", why)
    assert snapshot(tmp_path) == before
    # the same path as the run file's own output: named by its key
    (tmp_path / "tiny.toml").write_text(RUN.replace('"out/tiny.h5"', json.dumps(str(target))))
    assert_usage_error(tba_main("run", tmp_path / "tiny.toml"), "tiny.toml: output", why)
    assert_usage_error(tba_main("run", tmp_path / "tiny.toml", "--dry-run"), "output", why)


@pytest.mark.parametrize("kind", KINDS)
def test_merge_plot_export_demo_refuse_unwritable_outputs(kind, store, tmp_path, read_only_dir):
    before = snapshot(store.parent)
    target, why = _unwritable(kind, tmp_path, read_only_dir, ".h5")
    assert_usage_error(tba_main("merge", store, "--out", target), "--out", why)
    target, why = _unwritable(kind, tmp_path, read_only_dir, ".png")
    assert_usage_error(tba_main("plot", store, "-o", target), "-o", why)
    target, why = _unwritable(kind, tmp_path, read_only_dir, ".csv")
    assert_usage_error(tba_main("export", "--csv", store, "-o", target), "-o", why)
    assert snapshot(store.parent) == before  # the store itself is never touched
    if kind == "a directory":
        target, why = tmp_path / "regular-file", "is a file, not a directory"
        target.write_text("x")
    else:
        target = target.parent / "demo-out"
    assert_usage_error(tba_main("demo", "--out-dir", target), "--out-dir", why)


def test_resuming_a_store_on_a_read_only_file_system_keeps_it(store, tmp_path, read_only_dir):
    # nothing computed is lost: a store that cannot be written to is reported, not opened
    if os.geteuid() != 0:
        pytest.skip("needs a read-only mount (root)")
    subprocess.run(["mount", "-o", "remount,rw", str(read_only_dir)], check=True)
    copy = read_only_dir / "tiny.h5"
    copy.write_bytes(store.read_bytes())
    (tmp_path / "tiny.toml").write_text(RUN)
    subprocess.run(["mount", "-o", "remount,ro", str(read_only_dir)], check=True)
    assert_usage_error(tba_main("run", tmp_path / "tiny.toml", "--out", copy, "--force"),
                       "--out", "read-only file system")
    assert copy.read_bytes() == store.read_bytes()
    code, out, _ = tba_main("report", copy)  # and it is still readable
    assert code == 0 and "lee-yang" in out


def test_an_output_under_etc_passwd_is_refused(tmp_path):
    # the example, literally: output = "/etc/passwd/x.h5" (a path under a regular file)
    (tmp_path / "x.toml").write_text(RUN.replace('"out/tiny.h5"', '"/etc/passwd/x.h5"'))
    assert_usage_error(tba_main("run", tmp_path / "x.toml"), "x.toml: output", "/etc/passwd")


# -- pipes --------------------------------------------------------------------------------------

def _popen(*args):
    return subprocess.Popen([sys.executable, "-m", "tba", *map(str, args)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, cwd=REPO,
                            env={**os.environ, "PYTHONPATH": str(REPO)})


def _reader_gone(proc):
    """Close our end of the process's stdout; (exit code, stderr) once it has finished."""
    proc.stdout.close()
    with proc.stderr:
        err = proc.stderr.read().decode()
    return proc.wait(timeout=300), err


def test_solve_into_head_stops_quietly():
    # tba solve ... | head -2: read two lines, then the reader goes away
    proc = _popen("solve", "--model", "lee-yang", "--radius", "0.5:5:400")
    lines = [proc.stdout.readline() for _ in range(2)]
    code, err = _reader_gone(proc)
    assert code == 128 + signal.SIGPIPE
    assert lines[0].split()[:3] == [b"model", b"coupling", b"R"] and b"converged" in lines[1]
    assert err == "", err


@pytest.mark.parametrize("command", [
    ["export", "--csv", "STORE"], ["export", "--json", "STORE"], ["report", "STORE"],
    ["solve", "--model", "free-fermion", "--radius", "1", "2", "--json"],
    ["flow-check", "--model", "free-fermion", "--radius", "1", "--alpha", "-0.1", "0.1"],
    ["branch-point", "--model", "free-fermion", "--alpha", "0.2", "--json"],
    ["run", "RUNFILE", "--dry-run"], ["solve", "--help"], ["--version"],
], ids=lambda c: " ".join(c[:2]))
def test_every_printing_command_into_a_closed_pipe(command, store, tmp_path):
    # the reader is gone before the first line: every write fails with EPIPE
    (tmp_path / "tiny.toml").write_text(RUN)
    args = [str(store) if a == "STORE" else str(tmp_path / "tiny.toml") if a == "RUNFILE" else a
            for a in command]
    code, err = _reader_gone(_popen(*args))
    # argparse prints --help and --version itself and ignores a failed write: exit 0
    assert code == (0 if command[-1] in ("--help", "--version") else 128 + signal.SIGPIPE), err
    assert "Traceback" not in err and "BrokenPipe" not in err and "Exception ignored" not in err, err


@pytest.mark.skipif(not Path("/dev/full").exists(), reason="needs /dev/full (Linux)")
@pytest.mark.parametrize("command", [["solve", "--model", "free-fermion", "--radius", "1"],
                                     ["export", "--csv", "STORE"]])
def test_a_full_disk_is_one_line(command, store):
    # /dev/full fails every write with ENOSPC: the disk filled up after the checks passed
    args = [str(store) if a == "STORE" else a for a in command]
    with open("/dev/full", "w") as full:
        proc = subprocess.run([sys.executable, "-m", "tba", *args], stdout=full,
                              stderr=subprocess.PIPE, text=True, cwd=REPO, timeout=300,
                              env={**os.environ, "PYTHONPATH": str(REPO)})
    assert proc.returncode == 2 and proc.stderr.count("\n") == 1, proc.stderr
    assert "No space left on device" in proc.stderr and "Traceback" not in proc.stderr


def test_export_into_a_shell_pipeline_with_head(store):
    # the example through a real shell: tba export --csv F.h5 | head
    script = f'"{sys.executable}" -m tba export --csv "{store}" | head -3; echo "status ${{PIPESTATUS[0]}}" >&2'
    proc = subprocess.run(["bash", "-c", script], capture_output=True, text=True, cwd=REPO,
                          env={**os.environ, "PYTHONPATH": str(REPO)}, timeout=300)
    assert proc.stdout.splitlines()[0].startswith("model,coupling,radius")
    assert len(proc.stdout.splitlines()) == 3
    assert "Traceback" not in proc.stderr and re.search(r"status (0|141)$", proc.stderr.strip())


def test_a_closed_stderr_during_a_scan_keeps_what_was_written(tmp_path):
    # tba run ... 2>&1 | head -1: the log's reader goes away; the store stays readable and a
    # second run resumes or finds it complete
    (tmp_path / "tiny.toml").write_text(RUN)
    proc = subprocess.Popen([sys.executable, "-m", "tba", "run", str(tmp_path / "tiny.toml"),
                             "--workers", "1"], stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                            env={**os.environ, "PYTHONPATH": str(REPO)})
    first = proc.stdout.readline()
    proc.stdout.close()
    assert proc.wait(timeout=300) in (0, 128 + signal.SIGPIPE)  # 0: finished before we closed
    assert first.startswith(b"tba run: writing")
    code, _, err = tba_main("run", tmp_path / "tiny.toml", "--workers", "1")
    assert code == 0 and "is complete" in err, err


# -- huge requests ------------------------------------------------------------------------------

def _peak_bytes(*args):
    tracemalloc.start()
    try:
        result = tba_main(*args)
        return result, tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


@pytest.mark.parametrize("dry_run", [True, False])
def test_a_huge_run_file_is_refused_before_allocating(tmp_path, dry_run):
    (tmp_path / "huge.toml").write_text(RUN.replace("count = 40", "count = 100000000"))
    result, peak = _peak_bytes("run", tmp_path / "huge.toml", *(["--dry-run"] if dry_run else []))
    line = assert_usage_error(result, "huge.toml: radii.count", "300,000,000 points",
                              f"{MAX_POINTS:,}", "--max-points", "run files")
    assert "GB" in line
    assert peak < 20e6  # 10^8 radii would be 800 MB as an array, 3 GB as a list
    assert not (tmp_path / "out").exists()


def test_a_huge_radius_range_on_the_command_line_is_refused_before_allocating():
    result, peak = _peak_bytes("solve", "--model", "lee-yang", "--radius", "0.5:2:100000000")
    assert_usage_error(result, "--radius", "100,000,000 radii", "--max-points", "tba run")
    assert peak < 20e6
    # every spelling of the count; many small ranges add up
    assert_usage_error(tba_main("solve", "--model", "lee-yang", "--radius", "0.5:2:1e8"), "--radius")
    assert_usage_error(tba_main("solve", "--model", "lee-yang", "--radius",
                                *["1:2:60000"] * 2), "120,000 radii")


def test_the_limit_is_raised_with_max_points(tmp_path):
    text = RUN.replace("count = 40", "count = 400")  # 1200 points
    (tmp_path / "r.toml").write_text(text)
    assert_usage_error(tba_main("run", tmp_path / "r.toml", "--dry-run", "--max-points", "1000"),
                       "1,200 points", "1,000")
    code, out, _ = tba_main("run", tmp_path / "r.toml", "--dry-run", "--max-points", "1e4")
    assert code == 0 and "1200 points" in out
    with pytest.raises(RunFileError, match=r"^radii\.count: 1,200 points"):
        loads_run(text, max_points=1000)
    assert_usage_error(tba_main("solve", "--model", "free-fermion", "--radius", "1:2:3",
                                "--max-points", "2"), "--radius", "3 radii")
    code, out, _ = tba_main("solve", "--model", "free-fermion", "--radius", "1:2:3",
                            "--max-points", "3", "--json")
    assert code == 0 and len(out.splitlines()) == 3
    for bad in ("0", "-5", "1.5", "many"):
        assert_usage_error(tba_main("run", tmp_path / "r.toml", "--dry-run", "--max-points", bad),
                           "--max-points")


def test_workers_must_be_a_sensible_number(tmp_path):
    (tmp_path / "tiny.toml").write_text(RUN)
    for bad in ("0", "-1", "two", "1.5", str(4 * (os.cpu_count() or 1) + 1)):
        # checked with --dry-run too, and before anything is written
        assert_usage_error(tba_main("run", tmp_path / "tiny.toml", "--dry-run", "--workers", bad),
                           "--workers")
        assert_usage_error(tba_main("demo", "--workers", bad, "--out-dir", tmp_path / "d"), "--workers")
    assert not (tmp_path / "out").exists() and not (tmp_path / "d").exists()
    code, out, _ = tba_main("run", tmp_path / "tiny.toml", "--dry-run", "--workers", "2")
    assert code == 0


# -- numbers ----------------------------------------------------------------------------------

@pytest.mark.parametrize("spelling", ["-1e-3", "-1E-3", "-0.001", "-.001", "-10e-4", "-1_0e-4",
                                      "-0.01e-1", "-1.0E-03", "-1e-0003"])
def test_negative_alpha_in_every_spelling(spelling):
    # argparse took "-1e-3" for an option ("expected one argument"); now every float()
    # spelling is a value, as --alpha=-1e-3 always was
    code, out, err = tba_main("solve", "--model", "free-fermion", "--radius", "1", "--alpha",
                              spelling, "--json")
    assert code == 0, err
    assert json.loads(out)["alpha"] == -0.001
    code, out2, _ = tba_main("solve", "--model", "free-fermion", "--radius", "1",
                             f"--alpha={spelling}", "--json")
    assert json.loads(out2)["energy"] == json.loads(out)["energy"]


@pytest.mark.parametrize("args, name, words", [
    (["solve", "--model", "free-fermion", "--radius", "1", "--tol", "-1e-10"], "--tol", "[1e-13"),
    (["solve", "--model", "sinh-gordon", "--coupling", "-0.5", "--radius", "1"], "--coupling", "(0, 2)"),
    (["solve", "--model", "free-fermion", "--radius", "-1e-3"], "--radius", "positive"),
    (["solve", "--model", "free-fermion", "--radius", "-1:2:3"], "--radius", "positive"),
    (["solve", "--model", "free-fermion", "--radius", "1", "--alpha", "-inf"], "--alpha", "finite"),
    (["solve", "--model", "free-fermion", "--radius", "1", "--alpha", "-nan"], "--alpha", "finite"),
    (["solve", "--model", "free-fermion", "--radius", "1", "--alpha", "1e400"], "--alpha", "finite"),
    (["solve", "--model", "free-fermion", "--radius", "1e300"], "--radius", "largest radius 700"),
    (["solve", "--model", "free-fermion", "--radius", "701"], "--radius", "largest radius"),
    (["solve", "--model", "free-fermion", "--radius", "1e-200"], "--radius", "smallest radius"),
    (["solve", "--model", "lee-yang", "--radius", "1", "--alpha", "1e200"], "--alpha", "1e+12"),
    (["solve", "--model", "lee-yang", "--radius", "1", "--alpha=-1e200"], "--alpha", "1e+12"),
    (["solve", "--model", "lee-yang", "--radius", "1", "--alpha", "-1e200"], "--alpha", "1e+12"),
    (["solve", "--model", "lee-yang", "--radius", "1e-60", "--alpha", "0.1"], "--alpha", "double precision"),
    (["solve", "--model", "lee-yang", "--radius", "1", "--cdd", "3:1e13"], "--cdd", "1e+12"),
    (["solve", "--model", "lee-yang", "--radius", "1", "--cdd", "3:-1e13"], "--cdd", "1e+12"),
    (["solve", "--model", "lee-yang", "--radius", "1", "--cdd", "31:0.01"], "--cdd", "spin-31"),
    (["solve", "--model", "lee-yang", "--radius", "1", "--cdd", "3:7e11", "--cdd", "3:7e11"],
     "--cdd", "spin 3"),
    (["solve", "--model", "ising-e8", "--radius", "1", "--cdd", "3:0.01"], "--cdd", "allowed spins"),
    (["branch-point", "--model", "lee-yang", "--alpha", "-1e200"], "--alpha", "1e+12"),
    (["flow-check", "--model", "lee-yang", "--radius", "1", "--alpha", "-0.1", "1e13"], "--alpha", "1e+12"),
    (["flow-check", "--model", "lee-yang", "--radius", "1e300", "--alpha", "-0.1"], "--radius", "700"),
    (["branch-point", "--model", "lee-yang", "--alpha", "0.1", "--alpha", "0.2"],
     "--alpha", "given twice"),
    (["solve", "--model", "lee-yang", "--model", "free-fermion", "--radius", "1"], "--model", "twice"),
    (["solve", "--model", "lee-yang", "--radius", "1", "--tol", "1e-10", "--tol", "1e-11"], "--tol", "twice"),
    (["solve", "--model", "lee-yang", "--radius", "1", "--state", "1"], "--state",
     "lee-yang has one excited level here: its one-particle state 0"),
])
def test_numbers_and_options_give_one_clear_line(args, name, words):
    line = assert_usage_error(tba_main(*args), name)
    assert words in line, line


def test_repeated_radius_options_add_up():
    # decision (README): options that take lists accumulate, single-valued ones refuse a repeat
    code, out, err = tba_main("solve", "--model", "free-fermion", "--radius", "1", "--radius", "2",
                              "3:4:2", "--json")
    assert code == 0, err
    assert [json.loads(line)["radius"] for line in out.splitlines()] == [1.0, 2.0, 3.0, 4.0]
    code, out, _ = tba_main("flow-check", "--model", "free-fermion", "--radius", "1", "--radius",
                            "2", "--alpha", "-0.1", "--alpha", "0.1", "--json")
    assert code == 0 and len(out.splitlines()) == 4


def test_the_domain_edges_are_accepted():
    # inside the limits the solvers answer with a status, never an exception or a warning
    # (warnings are errors in the tests)
    for args in (["--radius", str(MAX_RADIUS)], ["--radius", "1", "--alpha", str(-MAX_COUPLING)],
                 ["--radius", "1", "--alpha", str(MAX_COUPLING)]):
        code, out, err = tba_main("solve", "--model", "free-fermion", *args, "--json")
        assert code == 0, err
        assert json.loads(out)["status"] in ("converged", "no-real-solution", "not-converged")
    # at R = 700 the energy ~ -e^-700 is still a normal double with an error bound
    rec = json.loads(tba_main("solve", "--model", "free-fermion", "--radius", "700", "--json")[1])
    assert rec["status"] == "converged" and 0 < -rec["energy"] < 1e-300 and rec["error"] > 0
    assert MIN_RADIUS == 1e-100


@pytest.mark.parametrize("old, new, key, words", [
    ("alphas = [-0.1, 0, 0.1]", "alphas = [-0.1, 1e308]", "deformation.alphas[1]", "1e+12"),
    ("alphas = [-0.1, 0, 0.1]", "alphas = [-1e200]", "deformation.alphas[0]", "1e+12"),
    ("alphas = [-0.1, 0, 0.1]", "alphas = [0.1]\nhigher_spin = { 3 = 1e13 }",
     "deformation.higher_spin.3", "1e+12"),
    ("alphas = [-0.1, 0, 0.1]", "alphas = [0.1]\nhigher_spin = { 31 = 0.01 }",
     "deformation.higher_spin.31", "spin-31"),
    ("start = 0.5", "start = 1e-60", "deformation.alphas[0]", "double precision"),
    ("stop = 4.0", "stop = 1e300", "radii.stop", "largest radius"),
    ("start = 0.5", "start = 1e-300", "radii.start", "smallest radius"),
    ("count = 40", "count = 100000000", "radii.count", "points"),
])
def test_run_files_are_held_to_the_same_limits(old, new, key, words, tmp_path):
    text = RUN.replace(old, new)
    assert text != RUN
    with pytest.raises(RunFileError) as info:
        loads_run(text)
    assert str(info.value).startswith(f"{key}:") and words in str(info.value), str(info.value)
    (tmp_path / "x.toml").write_text(text)
    assert_usage_error(tba_main("run", tmp_path / "x.toml", "--dry-run"), f"x.toml: {key}", words)
    assert not (tmp_path / "out").exists()


def test_a_list_of_radii_is_checked_one_by_one():
    text = "radii = [1.0, 1e300]\n" + RUN.replace("[radii]\nstart = 0.5\nstop = 4.0\ncount = 40\n", "")
    with pytest.raises(RunFileError, match=r"^radii\[1\]: 1e\+300 is above"):
        loads_run(text)


# -- JSON ---------------------------------------------------------------------------------------

def _strict(text):
    """Parse JSON as a strict parser would: NaN, Infinity and -Infinity are not JSON."""
    def refuse(token):
        raise ValueError(f"not JSON: {token}")
    return json.loads(text, parse_constant=refuse)


def test_json_text_has_no_nan_token():
    import numpy as np

    rec = {"a": math.nan, "b": [math.inf, -math.inf, 1.5], "c": {"d": np.float64("nan"),
           "e": np.float32(2.5), "f": np.int64(3)}, "g": None, "h": "nan"}
    assert _strict(json_text(rec)) == {"a": None, "b": [None, None, 1.5],
                                       "c": {"d": None, "e": 2.5, "f": 3}, "g": None, "h": "nan"}


def test_branch_point_by_continuation_prints_strict_json():
    # the case printed "effective_radius": NaN (E8 there; Lee-Yang goes the same way)
    code, out, err = tba_main("branch-point", "--model", "lee-yang", "--alpha", "0.1",
                              "--method", "continuation", "--json")
    assert code == 0, err
    rec = _strict(out)
    assert rec["status"] == "found" and rec["branch_effective_radius"] is None and rec["branch_radius"] > 0


def test_every_json_and_export_path_is_strict(store):
    code, out, _ = tba_main("export", "--json", store)
    records = [_strict(line) for line in out.splitlines()]
    assert len(records) == 120 and all(r["coupling"] is None for r in records)
    code, out, _ = tba_main("export", "--csv", store)
    assert code == 0 and not re.search(r"(^|,)(nan|inf|-inf)(,|$)", out, flags=re.I | re.M)
    for args in (["solve", "--model", "free-fermion", "--radius", "0.1", "--alpha", "0.5", "--json"],
                 ["flow-check", "--model", "free-fermion", "--radius", "0.1", "--alpha", "0.5", "--json"],
                 ["branch-point", "--model", "free-fermion", "--alpha", "-0.2", "--json"]):
        code, out, err = tba_main(*args)
        assert code == 0, err
        for line in out.splitlines():
            _strict(line)


def test_no_json_is_written_around_the_strict_helper():
    # every JSON line of the command line goes through tba.cli.common.json_text
    for path in (REPO / "tba" / "cli").glob("*.py"):
        text = path.read_text()
        calls = re.findall(r"json\.dumps\(", text)
        assert len(calls) == (1 if path.name == "common.py" else 0), path
