"""Start-up: what each command path imports (benchmarks/README.md, "Start-up").

``tba --help`` and ``tba models`` answer without numba, scipy or the solvers; ``tba solve`` loads
what solving needs (numpy, scipy.linalg, numba) and none of the scan, file or figure
libraries (dask, distributed, h5py, matplotlib, xarray, tqdm). Read from ``python -X
importtime`` of a fresh process, which lists every module imported, however indirectly.
Common practice (import-time budgets of command-line tools), no source.
"""

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

#: libraries of scans, files and figures: no solve or listing needs them
SCAN_AND_FIGURES = {"dask", "distributed", "h5py", "matplotlib", "xarray", "tqdm", "pandas"}
#: libraries of solving
SOLVING = {"numba", "llvmlite", "scipy"}


def imported(*args, code=None):
    """The top-level packages (and scipy's subpackages, as ``scipy.x``) that a fresh
    ``python -m tba ARGS`` (or ``python -c CODE``) imports."""
    env = dict(os.environ, OMP_NUM_THREADS="1", NUMBA_NUM_THREADS="1")
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), env.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    cmd = [sys.executable, "-X", "importtime"] + (["-c", code] if code else ["-m", "tba", *args])
    proc = subprocess.run(cmd, cwd=ROOT, env=env, capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    names = set()
    for line in proc.stderr.splitlines():
        if line.startswith("import time:") and line.count("|") == 2:
            name = line.rsplit("|", 1)[1].strip()
            parts = name.split(".")
            names.add(parts[0])
            if parts[0] == "scipy" and len(parts) > 1:
                names.add(".".join(parts[:2]))
    assert "tba" in names or code, proc.stderr[-3000:]  # the listing was read
    return names


def test_the_listing_is_read():
    # the check below would pass vacuously if nothing were recognised: numpy, imported on
    # purpose, must show up
    assert "numpy" in imported(code="import numpy")


def test_import_tba_is_light():
    names = imported(code="import tba, tba.cli")
    heavy = SCAN_AND_FIGURES | SOLVING | {"numpy", "mpmath"}
    assert not names & heavy, sorted(names & heavy)


def test_help_loads_no_solver():
    names = imported("--help")
    heavy = SCAN_AND_FIGURES | SOLVING | {"numpy", "mpmath"}
    assert not names & heavy, sorted(names & heavy)
    names = imported("run", "--help")
    assert not names & (SCAN_AND_FIGURES | SOLVING), sorted(names & (SCAN_AND_FIGURES | SOLVING))


def test_models_loads_no_solver():
    names = imported("models")
    assert not names & (SCAN_AND_FIGURES | SOLVING), sorted(names & (SCAN_AND_FIGURES | SOLVING))


@pytest.mark.parametrize("args", [
    ("solve", "--model", "sinh-gordon", "--coupling", "0.6", "--alpha", "0.1", "--radius", "1"),
    ("solve", "--model", "free-fermion", "--radius", "1", "--json"),
])
def test_solve_loads_no_scan_or_figure_library(args):
    # (an ADE model such as ising-e8 needs mpmath too: its S-matrix is checked in 60 digits)
    names = imported(*args)
    assert "numba" in names and "scipy.linalg" in names  # it did solve
    assert not names & SCAN_AND_FIGURES, sorted(names & SCAN_AND_FIGURES)
    assert "scipy.optimize" not in names  # root finding is for branch points
    assert "mpmath" not in names  # the dilogarithm sums and the ADE check are for tba models
