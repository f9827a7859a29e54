"""Run files: strict reading, resolution with defaults, identity; bad files on the command line."""

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from tba.cli import main
from tba.scans.runfile import RunFileError, demo_run_path, differing_keys, load_run, loads_run, resolve_run

REPO = Path(__file__).resolve().parent.parent

GOOD = """\
# a tiny run
output = "out/tiny.h5"

[[models]]
name = "sinh-gordon"
coupling = 0.6

[[models]]
name = "lee-yang"

[deformation]
alphas = [0.1, -0.1, 0]

[radii]
start = 0.5
stop = 2.0
count = 4
"""


RADII_TABLE = '[radii]\nstart = 0.5\nstop = 2.0\ncount = 4\n'


def with_radii(line):
    """GOOD with the [radii] table replaced by a top-level ``radii = ...`` line."""
    return line + "\n" + GOOD.replace(RADII_TABLE, "")


def test_defaults_are_filled_in_and_written_out(tmp_path):
    run = loads_run(GOOD, base_dir=tmp_path, name="tiny")
    d = run.to_dict()
    assert d["states"] == ["ground"]
    assert d["solver"] == {"tol": 1e-12}
    assert d["scan"] == {"chunk_size": 8, "flow_check": True, "sweep": "descending",
                         "branch_points": True}
    assert d["deformation"] == {"alphas": [-0.1, 0.0, 0.1], "higher_spin": {}}
    assert d["radii"] == [0.5, 1.0, 1.5, 2.0]
    assert d["models"] == [{"name": "sinh-gordon", "coupling": 0.6}, {"name": "lee-yang", "coupling": None}]
    assert d["output"] == str(tmp_path / "out" / "tiny.h5")  # relative to the run file's directory
    assert d["name"] == "tiny"
    # the resolved run is itself a valid run description, also after a JSON round trip
    assert resolve_run(json.loads(run.to_json())) == run


def test_radii_lists_ranges_sorted_and_merged():
    run = loads_run(with_radii('radii = [3.0, 0.5, {start = 1, stop = 2, count = 3}, 2.0, '
                               '{start = 0.1, stop = 10, count = 3, spacing = "log"}]'))
    assert run.radii == (0.1, 0.5, 1.0, 1.5, 2.0, 3.0, 10.0)
    assert loads_run(with_radii("radii = [1]")).radii == (1.0,)


def test_identity_ignores_output_description_and_branch_points_only():
    a = loads_run(GOOD)
    b = loads_run('description = "another text"\nname = "b"\n' + GOOD.replace('out/tiny.h5', 'b.h5'))
    assert a.run_id == b.run_id and a != b
    # scan.branch_points says whether branch points are computed, not what they are: a file
    # begun without them is resumed with them (tests/test_resume.py)
    c = loads_run(GOOD + "[scan]\nbranch_points = false\n")
    assert c.branch_points is False and a.branch_points is True
    assert c.run_id == a.run_id and c.to_dict()["scan"]["branch_points"] is False
    assert resolve_run(json.loads(c.to_json())) == c
    assert differing_keys(c.to_dict(), a.to_dict()) == []
    assert differing_keys(loads_run(GOOD + "[scan]\nchunk_size = 3\nbranch_points = false\n").to_dict(),
                          a.to_dict()) == ["scan"]
    for change in ['count = 4', 'count = 5'], ['alphas = [0.1, -0.1, 0]', 'alphas = [0.1]'], \
            ['coupling = 0.6', 'coupling = 0.7']:
        assert loads_run(GOOD.replace(*change)).run_id != a.run_id
    assert loads_run(GOOD + "[solver]\ntol = 1e-10\n").run_id != a.run_id
    assert loads_run(GOOD + "[scan]\nchunk_size = 3\n").run_id != a.run_id


def test_chunks_are_a_function_of_the_run():
    run = loads_run(GOOD + "[scan]\nchunk_size = 3\n")
    chunks = run.chunks()
    # 2 models x 3 alphas x 1 state, 4 radii in blocks of 3 -> 2 chunks each
    assert len(chunks) == 12 and [c.index for c in chunks] == list(range(12))
    assert [(c.radius_start, c.radius_stop) for c in chunks[:2]] == [(0, 3), (3, 4)]
    assert sum(c.size for c in chunks) == run.n_points == 24


BAD = [
    # (what, replace this, with this, key named in the message)
    ("unknown top-level key", 'output =', 'outptu = "x"\noutput =', "outptu"),
    ("unknown nested key", '[radii]', '[solver]\ntolerance = 1e-10\n\n[radii]', "solver.tolerance"),
    ("unknown model key", 'name = "lee-yang"', 'name = "lee-yang"\nmass = 2', "models[1].mass"),
    ("missing key", 'alphas = [0.1, -0.1, 0]', '', "deformation.alphas"),
    ("missing table", RADII_TABLE, '', "radii"),
    ("missing model name", 'name = "lee-yang"', 'coupling = 1.0', "models[1].name"),
    ("missing coupling", 'coupling = 0.6', '', "models[0].coupling"),
    ("wrong type", 'coupling = 0.6', 'coupling = "0.6"', "models[0].coupling"),
    ("wrong type in array", 'alphas = [0.1, -0.1, 0]', 'alphas = [0.1, "a"]', "deformation.alphas[1]"),
    ("wrong type count", 'count = 4', 'count = 4.0', "radii.count"),
    ("boolean is not a number", 'start = 0.5', 'start = true', "radii.start"),
    ("negative radius", 'start = 0.5', 'start = -0.5', "radii.start"),
    ("zero radius in list", RADII_TABLE, '', "radii[1]"),
    ("unknown model", 'name = "lee-yang"', 'name = "lee-yangg"', "models[1].name"),
    ("coupling out of range", 'coupling = 0.6', 'coupling = 2.5', "models[0].coupling"),
    ("coupling for a model without one", 'name = "lee-yang"', 'name = "lee-yang"\ncoupling = 1.0',
     "models[1].coupling"),
    ("non-finite", 'alphas = [0.1, -0.1, 0]', 'alphas = [nan]', "deformation.alphas[0]"),
    ("even spin", 'alphas = [0.1, -0.1, 0]', 'alphas = [0.1]\nhigher_spin = { 2 = 0.1 }',
     "deformation.higher_spin.2"),
    ("higher spin with two species", 'name = "lee-yang"', 'name = "ising-e8"', None),
    ("unknown state", 'output =', 'states = ["excited"]\noutput =', "states[0]"),
    ("bad tolerance", '[radii]', '[solver]\ntol = 0.5\n\n[radii]', "solver.tol"),
    ("bad chunk size", '[radii]', '[scan]\nchunk_size = 0\n\n[radii]', "scan.chunk_size"),
    ("bad flow check", '[radii]', '[scan]\nflow_check = "yes"\n\n[radii]', "scan.flow_check"),
    ("bad branch points", '[radii]', '[scan]\nbranch_points = 1\n\n[radii]', "scan.branch_points"),
]


@pytest.mark.parametrize("what, old, new, key", BAD, ids=[b[0] for b in BAD])
def test_bad_run_files_name_the_key(what, old, new, key):
    text = GOOD.replace(old, new)
    if what == "zero radius in list":
        text = with_radii("radii = [1.0, 0.0]")
    if what == "higher spin with two species":
        text = text.replace("alphas = [0.1, -0.1, 0]", "alphas = [0.1]\nhigher_spin = { 3 = 0.01 }")
        key = "deformation.higher_spin.3"  # E8 has no spin-3 charge
    assert text != GOOD
    with pytest.raises(RunFileError) as info:
        loads_run(text)
    assert str(info.value).startswith(f"{key}:"), str(info.value)
    assert "\n" not in str(info.value)


def test_toml_syntax_error():
    with pytest.raises(RunFileError, match="not valid TOML"):
        loads_run("output = x")


def _sha(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


@pytest.mark.parametrize("old, new, key", [
    ('name = "lee-yang"', 'name = "lee-yang"\nbogus = 1', "models[1].bogus"),
    ('alphas = [0.1, -0.1, 0]', '', "deformation.alphas"),
    ('coupling = 0.6', 'coupling = "B"', "models[0].coupling"),
    ('start = 0.5', 'start = -1.0', "radii.start"),
    ('name = "lee-yang"', 'name = "potts"', "models[1].name"),
])
def test_bad_run_file_on_the_command_line_leaves_files_alone(tmp_path, capsys, old, new, key):
    # an existing output file (any bytes) at the run's output path must not be touched
    out = tmp_path / "out" / "tiny.h5"
    out.parent.mkdir()
    out.write_bytes(b"precious results" * 100)
    before = _sha(out)
    runfile = tmp_path / "bad.toml"
    runfile.write_text(GOOD.replace(old, new))
    assert main(["run", str(runfile)]) == 2
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and key in lines[0] and "Traceback" not in err, err
    assert _sha(out) == before


def test_bad_run_file_in_a_fresh_process(tmp_path):
    runfile = tmp_path / "bad.toml"
    runfile.write_text(GOOD.replace('coupling = 0.6', 'coupling = [0.6]'))
    proc = subprocess.run([sys.executable, "-m", "tba", "run", str(runfile)], capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1 and "models[0].coupling" in proc.stderr, proc.stderr
    assert not (tmp_path / "out").exists()


def test_missing_run_file(tmp_path, capsys):
    assert main(["run", str(tmp_path / "nope.toml")]) == 2
    assert "no such run file" in capsys.readouterr().err


def test_dry_run_prints_the_resolved_run(tmp_path, capsys):
    runfile = tmp_path / "tiny.toml"
    runfile.write_text(GOOD)
    assert main(["run", str(runfile), "--dry-run"]) == 0
    out = capsys.readouterr().out
    resolved = json.loads(out[:out.rindex("}") + 1])
    assert resolved["radii"] == [0.5, 1.0, 1.5, 2.0]
    assert "24 points in 6 chunks" in out
    assert not (tmp_path / "out").exists()


RUN_FILES = sorted((REPO / "runs").glob("*.toml"))


@pytest.mark.parametrize("path", RUN_FILES, ids=[p.name for p in RUN_FILES])
def test_shipped_run_files_resolve_and_say_what_they_do(path):
    text = path.read_text()
    header = []
    for line in text.splitlines():
        if not line.startswith("#"):
            break
        header.append(line)
    assert header, f"{path.name} must start with a comment"
    assert "untime" in " ".join(header), f"{path.name}: the header should give the runtime"
    run = load_run(path)
    assert run.output.startswith(str(path.parent))
    assert np.all(np.diff(run.radii) > 0)


def test_demo_run_file_is_shipped_in_the_package():
    # tba demo must work without the source tree: tba/data/demo.toml is a copy of runs/demo.toml
    packaged = REPO / "tba" / "data" / "demo.toml"
    assert packaged.read_bytes() == (REPO / "runs" / "demo.toml").read_bytes()
    path, in_repo = demo_run_path()
    assert in_repo and path == REPO / "runs" / "demo.toml"


def test_states_by_quantum_numbers_and_the_states_a_model_lacks():
    # a state is "ground" or Bethe quantum numbers, written canonically (sorted fractions);
    # E8 has no excited states here and Lee-Yang only its one-particle state "0", so those
    # points are left out of the chunks, with the reason kept
    text = with_radii("radii = [1.0, 2.0]").replace(
        'output =', 'states = ["ground", "0.5, -1/2", "0"]\noutput =')
    text = text.replace('name = "lee-yang"', 'name = "lee-yang"\n\n[[models]]\nname = "ising-e8"')
    run = loads_run(text)
    assert run.states == ("ground", "-1/2,1/2", "0")
    labels = [m.name for m in run.models]
    missing = {(labels[m], run.states[s]) for m, s, _ in run.unavailable}
    assert missing == {("lee-yang", "-1/2,1/2"), ("ising-e8", "-1/2,1/2"), ("ising-e8", "0")}
    assert "one-particle" in run.why_unavailable(labels.index("lee-yang"), 1)
    assert "single-species" in run.why_unavailable(labels.index("ising-e8"), 2)
    assert run.why_unavailable(0, 1) is None
    chunks = run.chunks()
    assert {(c.model, c.state) for c in chunks}.isdisjoint({(m, s) for m, s, _ in run.unavailable})
    assert len(chunks) == len(run.alphas) * (3 + 2 + 1)  # one chunk per curve (2 radii)
    assert resolve_run(run.to_dict()) == run
    # repeated after canonical form, or a state no model has: refused, naming the entry
    with pytest.raises(RunFileError, match=r"^states\[2\]: repeats '-1/2,1/2' \(as '1/2,-1/2'\)"):
        loads_run(text.replace('"0"]', '"1/2,-1/2"]'))
    only_e8 = text.replace('name = "sinh-gordon"\ncoupling = 0.6\n\n[[models]]\n', '')
    only_e8 = only_e8.replace('name = "lee-yang"\n\n[[models]]\n', '')
    with pytest.raises(RunFileError, match=r"^states\[1\]: no model of the run has state"):
        loads_run(only_e8)
