"""Progress in logs: when stderr is not a terminal, ``tba run``, ``tba flow-check`` and
``tba branch-point`` print a line every --progress-every seconds (what is done, the rate,
the time left) and a summary at the end; 0 turns them off; a terminal keeps the live bar.

The checks are of the lines' own arithmetic and order (common practice, no source): counts
never go down, percentages match the counts, the last line says complete and counts all.
"""

import fcntl
import io
import os
import pty
import re
import select
import struct
import subprocess
import sys
import termios
import time

import pytest

from tba.cli import main
from tba.scans.progress import ProgressLines, duration_text

RUN = """\
output = "scan.h5"

[[models]]
name = "free-fermion"

[deformation]
alphas = [0.0, 0.1]

[radii]
start = 0.5
stop = 3.0
count = 12

[solver]
tol = 1e-10

[scan]
chunk_size = 2
branch_points = false
"""
CHUNKS = 12  # 2 alphas x 12 radii in chunks of 2

COUNTED = re.compile(r"^(tba [a-z-]+): (\d+)/(\d+) (chunks|points) \((\d+)%\), ([0-9.e+-]+) points/s, "
                     r"(about (.+) left|time left not known yet|finishing|complete in (.+))$")
TIME = re.compile(r"^(\d+(\.\d)? s|\d+ min \d+ s|\d+ h \d+ min)$")


def _progress_lines(text, prefix):
    return [line for line in text.splitlines() if line.startswith(prefix + ": ")
            and COUNTED.match(line)]


def _check_counted(lines, unit, total):
    """Every line parses; counts never decrease; the last one says complete and counts all."""
    assert len(lines) >= 2, lines  # at least one periodic line and the summary
    seen = -1
    for line in lines:
        m = COUNTED.match(line)
        assert m, line
        done, of, pct = int(m[2]), int(m[3]), int(m[5])
        assert m[4] == unit and of == total, line
        assert done >= seen, f"count went down: {lines}"
        seen = done
        assert pct == (100 if done == of else min(round(100 * done / of), 99)), line
        assert float(m[6]) >= 0
        for t in (m[8], m[9]):
            if t is not None:
                assert TIME.match(t), line
    last = COUNTED.match(lines[-1])
    assert last[9] is not None and int(last[2]) == total, lines[-1]
    assert all(COUNTED.match(line)[9] is None for line in lines[:-1]), "complete before the end"


def test_duration_text():
    # common practice, no source: seconds, then minutes and seconds, then hours and minutes
    assert duration_text(0.42) == "0.4 s"
    assert duration_text(12.4) == "12 s"
    assert duration_text(135) == "2 min 15 s"
    assert duration_text(3 * 3600 + 5 * 60 + 7) == "3 h 5 min"


def test_lines_in_process():
    log = io.StringIO()
    with ProgressLines("tba test", 5, unit="points", every=0.01, log=log) as progress:
        for _ in range(5):
            time.sleep(0.03)
            progress.update()
    lines = log.getvalue().splitlines()
    _check_counted(lines, "points", 5)
    rates = [float(COUNTED.match(line)[6]) for line in lines]
    assert 0 < rates[-1] <= 5 / 0.15 * 1.01  # 5 points in at least 0.15 s (longer under load)
    # time left: the remaining points at the rate so far, e.g. 2 left at 20/s is about 0.1 s
    m = next(m for m in map(COUNTED.match, lines) if m[8] and re.fullmatch(r"[\d.]+ s", m[8]))
    left = int(m[3]) - int(m[2])
    assert float(m[8].split()[0]) == pytest.approx(left / float(m[6]), rel=0.05, abs=0.06)


def test_no_lines_before_the_first_interval():
    log = io.StringIO()
    with ProgressLines("tba test", 3, every=30, log=log) as progress:
        progress.update(3)
    assert log.getvalue() == ""  # short work: no line, and so no summary either


def test_stopped_and_unknown_total():
    log = io.StringIO()
    with pytest.raises(KeyboardInterrupt):
        with ProgressLines("tba test", None, every=0.01, log=log):
            time.sleep(0.05)
            raise KeyboardInterrupt
    lines = log.getvalue().splitlines()
    assert len(lines) >= 2
    assert all(re.fullmatch(r"tba test: working, \d+\.\d s elapsed", line) for line in lines[:-1])
    assert re.fullmatch(r"tba test: stopped after \d+\.\d s", lines[-1])


class _Ran:
    def __init__(self, returncode, stdout, stderr):
        self.returncode, self.stdout, self.stderr = returncode, stdout, stderr


@pytest.fixture
def tba(capsys):
    """``tba ARGS`` in this process, stdout and stderr captured (so not a terminal)."""
    def run(*args):
        capsys.readouterr()
        code = main(list(args))
        out, err = capsys.readouterr()
        return _Ran(code, out, err)
    return run


@pytest.fixture
def runfile(tmp_path):
    path = tmp_path / "run.toml"
    path.write_text(RUN)
    return path


def test_run_prints_lines_to_a_log(tba, runfile):
    r = tba("run", str(runfile), "--workers", "1", "--progress-every", "0.01")
    assert r.returncode == 0, r.stderr
    _check_counted(_progress_lines(r.stderr, "tba run"), "chunks", CHUNKS)
    assert "is complete" in r.stderr.splitlines()[-1]  # the driver's own closing line stays


def test_complete_store_prints_no_progress(tba, runfile):
    assert tba("run", str(runfile), "--workers", "1", "--progress-every", "0").returncode == 0
    again = tba("run", str(runfile), "--workers", "1", "--progress-every", "0.01")
    assert again.returncode == 0, again.stderr
    assert not _progress_lines(again.stderr, "tba run")  # nothing computed: no progress lines
    assert "nothing to compute" in again.stderr


def test_run_disabled(tba, runfile):
    r = tba("run", str(runfile), "--workers", "1", "--progress-every", "0")
    assert r.returncode == 0, r.stderr
    assert not re.search(r"chunks \(\d+%\)", r.stderr), r.stderr


def test_run_on_a_terminal_keeps_the_bar(runfile):
    """stderr on a pseudo-terminal: tqdm's bar (carriage returns), no progress lines."""
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, 100, 0, 0))  # tqdm needs a width
    env = dict(os.environ, OMP_NUM_THREADS="1", NUMBA_NUM_THREADS="1")
    proc = subprocess.Popen([sys.executable, "-m", "tba", "run", str(runfile), "--workers", "1",
                             "--progress-every", "0.01"], stdout=subprocess.DEVNULL,
                            stderr=slave, env=env)
    os.close(slave)
    out = b""
    while True:
        ready, _, _ = select.select([master], [], [], 1.0)
        if ready:
            try:
                data = os.read(master, 65536)
            except OSError:  # the terminal closed: the process has ended
                break
            if not data:
                break
            out += data
        elif proc.poll() is not None:
            break
    proc.wait(timeout=300)
    os.close(master)
    text = out.decode(errors="replace")
    assert proc.returncode == 0, text
    assert "\r" in text and "pt/s]" in text, text  # tqdm redraws its line; unit "pt"
    assert not re.search(r"\d+/\d+ chunks \(\d+%\)", text), text


def test_flow_check_lines(tba, tmp_path):
    # 60 points take more than a millisecond even with every grid and kernel cached by
    # earlier tests (12 points once took less than the 0.01 s asked: no line at all)
    r = tba("flow-check", "--model", "sinh-gordon", "--coupling", "0.6", "--radius", "0.8:2:30",
             "--alpha", "0", "0.05", "--progress-every", "0.001")
    assert r.returncode == 0, r.stderr
    _check_counted(_progress_lines(r.stderr, "tba flow-check"), "points", 60)
    assert len(r.stdout.splitlines()) == 1 + 60  # the table is untouched: header and 60 rows
    quiet = tba("flow-check", "--model", "sinh-gordon", "--coupling", "0.6", "--radius", "1",
                 "--alpha", "0", "--progress-every", "0")
    assert quiet.returncode == 0 and quiet.stderr == "", quiet.stderr


def test_branch_point_lines(tba):
    r = tba("branch-point", "--model", "sinh-gordon", "--coupling", "0.6", "--alpha", "0.1",
             "--progress-every", "0.001")
    assert r.returncode == 0, r.stderr
    lines = r.stderr.splitlines()
    assert lines, "the branch point took more than a millisecond: expected lines"
    assert all(re.fullmatch(r"tba branch-point: working, \d+(\.\d)? s elapsed", line)
               for line in lines[:-1]), lines
    assert re.fullmatch(r"tba branch-point: complete after \d+(\.\d)? s", lines[-1]), lines
    assert "branch point at" in r.stdout


@pytest.mark.parametrize("value", ["-1", "soon"])
def test_bad_interval(tba, value, runfile):
    for args in (["run", str(runfile)], ["flow-check", "--model", "free-fermion", "--radius", "1",
                                         "--alpha", "0"],
                 ["branch-point", "--model", "free-fermion", "--alpha", "0.1"]):
        r = tba(*args, f"--progress-every={value}")
        assert r.returncode == 2, (args, r.stderr)
        assert r.stderr.startswith("tba: error: argument --progress-every:"), r.stderr
        assert len(r.stderr.splitlines()) == 1
