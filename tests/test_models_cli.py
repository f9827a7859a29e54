"""``tba models`` and the algebra names on the command line and in run files.

The listed numbers are checked against closed forms (c_eff = 2r/(h+2), Klassen and Melzer,
Nucl. Phys. B338 (1990) 485; the spins of E8 coprime to 30, A.B. Zamolodchikov, Int. J. Mod.
Phys. A4 (1989) 4235); the rest is the command-line contract of the README (common practice,
no outside source).
"""

import json
import math

import pytest

from tba.cli import main
from tba.scans.runfile import RunFileError, loads_run

KEYS = {"name", "parameters", "species", "masses", "c_eff", "massless", "spins"}


def records(capsys, *args):
    assert main(["models", *args, "--json"]) == 0
    return [json.loads(line) for line in capsys.readouterr().out.splitlines()]


def test_listing_json(capsys):
    recs = records(capsys)
    assert all(set(r) == KEYS for r in recs)
    by_name = {r["name"] + (f" N={r['parameters']['N']['value']}" if r["name"] == "sine-gordon" else ""): r
               for r in recs}
    for name in ("free-fermion", "sinh-gordon", "lee-yang", "ising-e8", "potts-3", "tricritical-ising",
                 "tricritical-potts-3", "A3", "A8", "D4", "D8", "T2", "T4", "sine-gordon N=1",
                 "sine-gordon N=4"):
        assert name in by_name, name
    # the massless models of issue 12, and only they (tests/test_massless.py checks them)
    assert {r["name"] for r in recs if r["massless"]} == {"massless-fermion", "massless-bosons",
                                                          "tricritical-to-ising"}
    # c_eff = 2r/(h+2): A_n 2n/(n+3), D_n 1; tadpoles 2n/(2n+3); sine-Gordon 1
    assert by_name["A5"]["c_eff"] == pytest.approx(10 / 8, rel=1e-13)
    assert by_name["D7"]["c_eff"] == pytest.approx(1.0, rel=1e-13)
    assert by_name["T3"]["c_eff"] == pytest.approx(6 / 9, rel=1e-13)
    assert by_name["tricritical-potts-3"]["c_eff"] == pytest.approx(6 / 7, rel=1e-13)
    assert by_name["sine-gordon N=3"]["species"] == 4 and by_name["sine-gordon N=3"]["c_eff"] == pytest.approx(1.0)
    e8 = by_name["ising-e8"]
    assert e8["species"] == 8 and e8["masses"][1] == pytest.approx(2 * math.cos(math.pi / 5), rel=1e-14)
    assert e8["spins"] == {"modulus": 30, "residues": [1, 7, 11, 13, 17, 19, 23, 29]}
    assert by_name["sinh-gordon"]["parameters"] == {"B": {"range": "0 < B < 2", "value": None}}
    assert by_name["free-fermion"]["spins"] == {"modulus": 2, "residues": [1]}


def test_named_models_of_any_rank(capsys):
    (a12,) = records(capsys, "A12")
    assert a12["species"] == 12 and a12["c_eff"] == pytest.approx(24 / 15, rel=1e-13)
    (sg,) = records(capsys, "sine-gordon", "--coupling", "9")
    assert sg["species"] == 10 and sg["parameters"]["N"]["value"] == 9
    assert [r["name"] for r in records(capsys, "e8", "T1", "a2")] == ["ising-e8", "lee-yang", "potts-3"]
    # --coupling goes to the named models that have a parameter
    mixed = records(capsys, "A3", "sine-gordon", "--coupling", "2")
    assert [(r["name"], r["species"]) for r in mixed] == [("A3", 3), ("sine-gordon", 3)]


def test_text_listing(capsys):
    assert main(["models"]) == 0
    out = capsys.readouterr().out
    assert "ising-e8               E8" in out and "1bar: 1" in out and "7/10 = 0.7" in out
    assert "s = 1, 7, 11, 13, 17, 19, 23, 29 (mod 30)" in out


@pytest.mark.parametrize("args, name", [
    (["models", "A0"], "MODEL"), (["models", "nope"], "MODEL"), (["models", "--coupling", "3"], "--coupling"),
    (["models", "A3", "--coupling", "3"], "--coupling"),
    (["models", "sine-gordon", "--coupling", "x"], "--coupling"),
    (["models", "sine-gordon", "--coupling", "2.5"], "--coupling"),
    (["solve", "--model", "A41", "--radius", "1"], "--model"),
    (["solve", "--model", "E8", "--radius", "1", "--cdd", "3:0.1"], "--cdd"),
    (["solve", "--model", "lee-yang", "--radius", "1", "--cdd", "2:0.1"], "--cdd"),
    (["solve", "--model", "sine-gordon", "--radius", "1"], "--coupling"),
    (["solve", "--model", "sine-gordon", "--coupling", "0", "--radius", "1"], "--coupling"),
])
def test_bad_input_one_line_exit_2(args, name, capsys):
    assert main(args) == 2
    captured = capsys.readouterr()
    err = captured.err.strip().splitlines()
    assert len(err) == 1 and name in err[0], err
    assert "Traceback" not in captured.err and captured.out == ""


def test_spin_refusal_names_the_allowed_spins(capsys):
    assert main(["solve", "--model", "E8", "--radius", "1", "--cdd", "3:0.1"]) == 2
    assert "allowed spins are s = 1, 7, 11, 13, 17, 19, 23, 29 (mod 30)" in capsys.readouterr().err


@pytest.mark.parametrize("args, name, species", [
    (["--model", "A4"], "A4", 4), (["--model", "e6"], "tricritical-potts-3", 6),
    (["--model", "T2"], "T2", 2), (["--model", "D5"], "D5", 5),
    (["--model", "sine-gordon", "--coupling", "3"], "sine-gordon", 4),
])
def test_solve_with_algebra_names(args, name, species, capsys):
    assert main(["solve", *args, "--radius", "1e-4", "2", "--json"]) == 0
    recs = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert [r["status"] for r in recs] == ["converged", "converged"]
    assert all(r["model"] == name for r in recs)
    # R -> 0: -6 R E / pi near c_eff (2r/(h+2), tadpoles 2n/(2n+3), sine-Gordon 1), to 1e-6
    expected = {"A4": 8 / 7, "tricritical-potts-3": 6 / 7, "T2": 4 / 7, "D5": 1.0, "sine-gordon": 1.0}[name]
    assert -6 * 1e-4 * recs[0]["energy"] / math.pi == pytest.approx(expected, abs=1e-6)


def test_higher_spin_on_the_command_line(capsys):
    # potts-3 has a spin-5 charge (same sign on both species): a real ground state for alpha_5 < 0
    assert main(["solve", "--model", "A2", "--radius", "1", "--cdd", "5:-1e-9", "--json"]) == 0
    (rec,) = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert rec["status"] == "converged" and rec["cdd_couplings"] == {"5": -1e-9}


RUN = """\
output = "scan.h5"

[[models]]
name = "E8"

[[models]]
name = "a4"

[[models]]
name = "sine-gordon"
coupling = 3

[deformation]
alphas = [0, 0.1]

[radii]
start = 1.0
stop = 2.0
count = 2
"""


def test_run_files_take_algebra_names(tmp_path):
    run = loads_run(RUN, base_dir=tmp_path)
    assert [m.name for m in run.models] == ["ising-e8", "A4", "sine-gordon"]
    assert [m.label for m in run.models] == ["ising-e8", "A4", "sine-gordon N=3"]
    # the same model under two names is one model
    with pytest.raises(RunFileError, match="models\\[1\\]: repeats models\\[0\\]"):
        loads_run(RUN.replace('name = "a4"', 'name = "ising-e8"'), base_dir=tmp_path)
    with pytest.raises(RunFileError, match="models\\[2\\].coupling: N must be an integer"):
        loads_run(RUN.replace("coupling = 3", "coupling = 3.5"), base_dir=tmp_path)
    with pytest.raises(RunFileError, match="models\\[1\\].name: A0 does not exist"):
        loads_run(RUN.replace('name = "a4"', 'name = "A0"'), base_dir=tmp_path)
    # spins: each model must have them: 5 is no spin of E8 (gcd(5, 30) = 5); 11 is one of E8,
    # of A4 (11 = 1 mod 5) and, odd, of sine-Gordon
    text = RUN.replace("alphas = [0, 0.1]", "alphas = [0, 0.1]\nhigher_spin = { 5 = -1e-20 }")
    with pytest.raises(RunFileError, match="deformation.higher_spin.5: ising-e8 has no spin-5 charge"):
        loads_run(text, base_dir=tmp_path)
    ok = loads_run(text.replace("{ 5 = -1e-20 }", "{ 11 = -1e-20 }"), base_dir=tmp_path)
    assert ok.higher_spin == ((11, -1e-20),)
