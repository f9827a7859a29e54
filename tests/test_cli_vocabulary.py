"""One vocabulary across the command line, JSON, files and the report (docs/glossary.md):
the names of the outputs, their deprecated duplicates, the digits printed, several alphas in
``tba solve``, log ranges and the output options.

Values are checked against the free fermion's closed form (textbook: E_NS(R) = -(1/pi)
sum_k (-1)^(k+1) K_1(kR)/k, scipy.special), the TTbar flow E(R, alpha) = E_NS(R + alpha E)
(docs/physics.md section 4) and numpy's geomspace.
"""

import contextlib
import io
import json
import math

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.special import k1, kvp

import tba
from tba.cli import main
from tba.cli.common import parse_radii
from tba.output.report import format_report
from tba.scans.runfile import loads_run
from tba.store.driver import run_scan
from tba.store.hdf5 import read_store


def tba_main(*args):
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main([str(a) for a in args])
    return code, out.getvalue(), err.getvalue()


def one_line_error(result, *names):
    code, out, err = result
    lines = err.strip().splitlines()
    assert code == 2 and len(lines) == 1 and "Traceback" not in err, (code, err)
    for name in names:
        assert name in lines[0], (name, lines[0])


def e_ns(R):
    """The free fermion's NS ground state (textbook Bessel series; scipy.special.k1)."""
    return -sum((-1) ** (k + 1) * k1(k * R) / k for k in range(1, int(60 / R) + 50)) / math.pi


def de_ns(R):
    return -sum((-1) ** (k + 1) * kvp(1, k * R) for k in range(1, int(60 / R) + 50)) / math.pi


def deformed(R, alpha):
    """E(R, alpha) = E_NS(R + alpha E): the root on the branch of the undeformed level."""
    return brentq(lambda E: E - e_ns(R + alpha * E), -1.0 / max(R, 0.1), 0.0, xtol=1e-16)


# -- tba solve ---------------------------------------------------------------------------------

def test_solve_table_says_E_and_tells_close_radii_apart():
    code, out, _ = tba_main("solve", "--model", "free-fermion", "--radius", "0.3935456",
                            "0.39354558")
    assert code == 0
    header, *rows = out.splitlines()
    assert header.split()[4] == "E" and "E_0" not in header
    radii = [row.split()[2] for row in rows]
    assert radii == ["0.3935456", "0.39354558"]  # 6 digits would print both as 0.393546
    for row, R in zip(rows, (0.3935456, 0.39354558)):
        assert float(row.split()[4]) == pytest.approx(e_ns(R), rel=1e-13)  # 15 digits printed


def test_solve_takes_several_alphas_one_row_per_alpha_and_radius():
    code, out, _ = tba_main("solve", "--model", "free-fermion", "--radius", "1", "2",
                            "--alpha", "-0.1", "0.2", "--json")
    assert code == 0
    recs = [json.loads(line) for line in out.splitlines()]
    assert [(r["alpha"], r["radius"]) for r in recs] == [(-0.1, 1.0), (-0.1, 2.0), (0.2, 1.0),
                                                         (0.2, 2.0)]
    for r in recs:
        assert r["status"] == "converged"
        assert abs(r["energy"] - deformed(r["radius"], r["alpha"])) <= r["error"] + 1e-14
        # the CDD couplings under their new key, the deprecated one a duplicate for one release
        assert r["cdd_couplings"] == r["couplings"] == {"1": r["alpha"]}
        assert r["coupling"] is None  # the model's own parameter (the free fermion has none)
    code, out, _ = tba_main("solve", "--model", "free-fermion", "--radius", "1", "--alpha",
                            "0", "0.1", "--alpha", "0.2")
    assert code == 0 and len(out.splitlines()) == 1 + 3  # header and one row per alpha


def test_solve_alpha_range_and_point_limit():
    code, out, _ = tba_main("solve", "--model", "free-fermion", "--radius", "1", "--alpha",
                            "-0.2:0.2:5", "--json")
    assert code == 0
    assert [json.loads(line)["alpha"] for line in out.splitlines()] == pytest.approx(
        np.linspace(-0.2, 0.2, 5).tolist(), abs=1e-17)
    one_line_error(tba_main("solve", "--model", "free-fermion", "--radius", "1:2:10",
                            "--alpha", "0:0.1:11", "--max-points", "100"), "--alpha", "110")


def test_excited_level_table_and_json_names():
    code, out, _ = tba_main("solve", "--model", "free-fermion", "--radius", "2", "--state", "1",
                            "--alpha", "-0.05", "0.05")
    assert code == 0
    header, *rows = out.splitlines()
    assert header.split()[:4] == ["state", "R", "alpha", "E"] and len(rows) == 2


# -- ranges ------------------------------------------------------------------------------------

def test_log_ranges_are_geometric_with_exact_ends():
    assert parse_radii(["1:100:3:log"]) == [1.0, pytest.approx(10.0, rel=1e-15), 100.0]
    got = parse_radii(["0.3:4:7:LOG", "5"])
    assert got[:7] == pytest.approx(np.geomspace(0.3, 4, 7).tolist(), rel=1e-15)
    assert got[0] == 0.3 and got[6] == 4.0 and got[7] == 5.0
    assert parse_radii(["1:2:3"]) == [1.0, 1.5, 2.0]  # linear as before


@pytest.mark.parametrize("command, token", [
    ("solve", "0.1:-1:3:log"), ("solve", "0:1:3:log"), ("solve", "1:2:3:lin"),
    ("solve", "1:2:3:log:5"), ("flow-check", "1:2:x:log"), ("flow-check", "2:1:1:log"),
])
def test_bad_ranges_are_one_line_errors(command, token):
    extra = ["--alpha", "0.1"] if command == "flow-check" else []
    one_line_error(tba_main(command, "--model", "free-fermion", "--radius", token, *extra),
                   "--radius")


def test_log_alpha_range_needs_positive_ends():
    one_line_error(tba_main("solve", "--model", "free-fermion", "--radius", "1", "--alpha",
                            "-0.1:-0.01:3:log"), "--alpha", "START > 0")
    code, out, _ = tba_main("flow-check", "--model", "free-fermion", "--radius", "1",
                            "--alpha", "0.01:0.1:2:log", "--json")
    assert code == 0 and [json.loads(x)["alpha"] for x in out.splitlines()] == [0.01, 0.1]


# -- flow-check --------------------------------------------------------------------------------

def test_flow_check_gives_absolute_and_relative_in_json_and_table():
    code, out, _ = tba_main("flow-check", "--model", "free-fermion", "--radius", "1",
                            "--alpha", "0.1", "--json")
    assert code == 0
    rec = json.loads(out)
    E, R, a = rec["energy"], 1.0, 0.1
    # dE/dalpha1 = E dE/dR from the closed form: E(R, a) = E_NS(R + a E), so
    # dE/dR = E'/(1 - a E'), dE/da = E E'/(1 - a E') with E' = E_NS'(R + a E)
    d = de_ns(R + a * E)
    assert rec["dE_dR"] == pytest.approx(d / (1 - a * d), rel=1e-10)
    assert rec["dE_dalpha1"] == pytest.approx(E * d / (1 - a * d), rel=1e-10)
    assert rec["dE_dalpha"] == rec["dE_dalpha1"]  # deprecated duplicate, one release
    assert rec["relative_residual"] == pytest.approx(rec["residual"] / rec["scale"], rel=1e-12)
    assert rec["relative_error"] == pytest.approx(rec["residual_error"] / rec["scale"], rel=1e-12)
    assert abs(rec["residual"]) <= rec["residual_error"] < 1e-10
    code, out, _ = tba_main("flow-check", "--model", "free-fermion", "--radius", "1",
                            "--alpha", "0.1")
    header, row = out.splitlines()
    names = header.split()
    for name in ("dE/dalpha1", "residual", "error", "relative"):
        assert name in names
    cells = dict(zip(["R", "alpha", "E", "dE/dR", "dE/dalpha1", "residual", "error", "relative"],
                     row.split()))
    assert float(cells["residual"]) == pytest.approx(rec["residual"], rel=1e-2, abs=1e-30)
    assert float(cells["relative"]) == pytest.approx(rec["relative_residual"], rel=1e-2, abs=1e-30)
    assert float(cells["E"]) == pytest.approx(E, rel=1e-14)


def test_flow_residual_returns_plain_floats():
    res = tba.solve(tba.free_fermion(), 1.0, tba.ttbar(0.1))
    f = tba.flow_residual(res)
    assert all(type(v) is float for v in f.values()), {k: type(v) for k, v in f.items()}
    assert {"residual", "error", "scale", "relative_residual", "relative_error", "dE_dR",
            "dE_dalpha1"} <= set(f)
    d = tba.energy_derivatives(res, spins=(1, 3), second=True)
    assert all(type(v) is float for v in d.values())


# -- branch-point ------------------------------------------------------------------------------

def test_branch_point_names_and_deprecated_keys():
    code, out, _ = tba_main("branch-point", "--model", "free-fermion", "--alpha", "0.2", "--json")
    assert code == 0
    rec = json.loads(out)
    # R_c from the exact curve: E_NS'(R~) = 1/alpha, R_c = R~ - alpha E_NS(R~) (docs/physics.md 4)
    Rt = brentq(lambda R: de_ns(R) - 5.0, 0.05, 5.0, xtol=1e-15)
    assert rec["branch_radius"] == pytest.approx(Rt - 0.2 * e_ns(Rt), rel=1e-11)
    assert rec["branch_energy"] == pytest.approx(e_ns(Rt), rel=1e-11)
    assert rec["branch_effective_radius"] == pytest.approx(Rt, rel=1e-11)
    assert rec["hagedorn_temperature"] == pytest.approx(1 / rec["branch_radius"], rel=1e-15)
    for old, new in (("radius", "branch_radius"), ("energy", "branch_energy"),
                     ("radius_error", "branch_radius_error"),
                     ("energy_error", "branch_energy_error"),
                     ("effective_radius", "branch_effective_radius")):
        assert rec[old] == rec[new]
    code, out, _ = tba_main("branch-point", "--model", "free-fermion", "--alpha", "0.2")
    assert "E(R_c) = " in out and "E_0" not in out and "R_c = " in out


def test_branch_status_is_an_enum_equal_to_its_string():
    bp = tba.branch_point(tba.free_fermion(), 0.2)
    assert bp.status is tba.BranchStatus.FOUND and bp.status == "found" and bp.found
    assert {"found": 1}[bp.status] == 1  # dict lookups by the string still work
    assert tba.branch_point(tba.free_fermion(), -0.2).status == tba.BranchStatus.NONE == "none"
    assert tba.BranchPoint("x", 0.1, "failed").status is tba.BranchStatus.FAILED
    with pytest.raises(ValueError):
        tba.BranchPoint("x", 0.1, "lost")
    text = repr(bp)
    assert text.startswith("BranchPoint(free-fermion, alpha = 0.2: found, R_c = ")
    assert repr(bp.radius) in text and repr(bp.energy) in text and "np.float" not in text
    table = bp._repr_html_()
    assert "<caption>BranchPoint</caption>" in table and "E(R_c)" in table and repr(bp.radius) in table
    rec = bp.as_record(deprecated=False)
    assert "radius" not in rec and all(type(rec[k]) is float for k in
                                       ("branch_radius", "branch_energy", "hagedorn_temperature"))


# -- files: export, report, output options ----------------------------------------------------

RUN = """\
# vocabulary test: free fermion, ground state and one-particle level
output = "voc.h5"
states = ["ground", "0"]

[[models]]
name = "free-fermion"

[deformation]
alphas = [-0.1, 0.1]

[radii]
start = 1.0
stop = 2.0
count = 2

[solver]
tol = 1e-10
"""


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    run = loads_run(RUN, base_dir=tmp_path_factory.mktemp("voc"))
    run_scan(run, workers=1, log=io.StringIO())
    return run.output


def test_export_names_and_old_output_spelling(store, tmp_path):
    target = tmp_path / "a.jsonl"
    code, _, err = tba_main("export", "--json", store, "--out", target)  # hidden alias
    assert code == 0, err
    recs = [json.loads(line) for line in target.read_text().splitlines()]
    assert recs and all(r["cdd_couplings"] == r["couplings"] == {"1": r["alpha"]} for r in recs)
    code, out, _ = tba_main("export", "--csv", store)
    header = out.splitlines()[0].split(",")
    assert "cdd_couplings" in header and header.index("cdd_couplings") == 4
    records = list(read_store(store).records())
    assert all(type(r["radius"]) is float and r["coupling"] is None for r in records)


def test_report_names_the_level_and_prints_digits(store):
    text = format_report(read_store(store))
    worst = [line for line in text.splitlines() if line.startswith("worst")]
    assert len(worst) == 2
    for line in worst:
        assert line.rstrip().endswith(("ground state", "state 0 (one-particle level I = 0)")), line


def test_output_options_spelled_one_way_old_spellings_hidden(store, tmp_path, capsys):
    for command, new, old in (("run", "-o FILE, --output FILE", "--out "),
                              ("merge", "-o FILE, --output FILE", "--out "),
                              ("export", "-o OUT, --output OUT", "--out "),
                              ("plot", "-o FIG, --output FIG", "--out "),
                              ("demo", "--output-dir DIR", "--out-dir")):
        with pytest.raises(SystemExit):
            main([command, "--help"])
        text = capsys.readouterr().out
        assert new in text and old not in text, command
    one_line_error(tba_main("merge", store), "-o/--output")
    merged = tmp_path / "merged.h5"
    code, _, err = tba_main("merge", store, "--output", merged)
    assert code == 0, err and merged.is_file()
    # an error names the spelling that was used
    one_line_error(tba_main("export", "--json", store, "--out", tmp_path), "--out")
    one_line_error(tba_main("export", "--json", store, "-o", tmp_path), "-o")
    one_line_error(tba_main("run", "x.toml", "--out", "a.h5", "--output", "b.h5"), "given twice")


def test_chunk_messages_name_the_level_and_print_ten_digits(tmp_path):
    from tba.scans.points import describe_chunk

    run = loads_run(RUN.replace("start = 1.0", "start = 0.39354558").replace("stop = 2.0",
                                                                          "stop = 0.3935456"),
                    base_dir=tmp_path)
    texts = [describe_chunk(run, c) for c in run.chunks()]
    assert any(t.endswith(", state 0)") for t in texts)
    assert any(t.endswith(", ground state)") for t in texts)
    assert all("R = 0.39354558 .. 0.3935456" in t for t in texts), texts


def test_report_names_the_cdd_couplings(tmp_path):
    text = RUN.replace("alphas = [-0.1, 0.1]", "alphas = [0.1]\nhigher_spin = { 3 = -0.01 }")
    run = loads_run(text.replace('states = ["ground", "0"]', "").replace("count = 2", "count = 1")
                    .replace("stop = 2.0", "stop = 1.0"), base_dir=tmp_path)
    run_scan(run, workers=1, log=io.StringIO())
    report = format_report(read_store(run.output))
    assert "CDD couplings at every alpha: alpha_3 = -0.01" in report
    recs = list(read_store(run.output).records())
    assert recs[0]["cdd_couplings"] == {"1": 0.1, "3": -0.01}
