"""Property-based tests (hypothesis): random malformed argument lists and run files given to
the command line always end the same way: exit code 2, exactly one line on stderr (naming
the argument, or the run file), no traceback, nothing on stdout, no file created or changed.

Every example is built to be wrong (a valid command with one defect), so an input that the
command line wrongly accepts shows up as a solve or a written file, and fails the test.
The contract is the project's (README, "Command line"); no outside source.
"""

import contextlib
import io
import json
import math
import string
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tba.cli import main
from tba.models import MODELS
from tba.scans.limits import MAX_COUPLING, MAX_RADIUS, MIN_RADIUS

SETTINGS = dict(deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow])

GOOD_RUN = """\
# property tests: a valid run (2 points), made wrong in one place per example
output = "out/p.h5"
description = "tiny"

[[models]]
name = "sinh-gordon"
coupling = 0.6

[deformation]
alphas = [0.1]

[radii]
start = 1.0
stop = 2.0
count = 2

[solver]
tol = 1e-10

[scan]
chunk_size = 2
flow_check = true
sweep = "descending"
branch_points = false
"""


def is_float(text):
    try:
        float(text)
    except ValueError:
        return False
    return True


#: text that no numeric option accepts: no decimal digits at all (so no number, no range),
#: and not one of float()'s words
NOT_A_NUMBER = st.text(st.characters(blacklist_categories=("Nd", "Cs")), max_size=12).filter(
    lambda t: not is_float(t))
#: option names tba does not have (argparse accepts unambiguous prefixes of real ones)
UNKNOWN_OPTION = st.text(string.ascii_lowercase + "-", max_size=8).map(lambda t: "--zz" + t)


def _repr(x):
    return repr(float(x))


BAD_RADIUS = st.one_of(
    st.floats(max_value=0.0).map(_repr),
    st.floats(min_value=MAX_RADIUS, exclude_min=True).map(_repr),
    st.floats(min_value=0.0, max_value=MIN_RADIUS, exclude_min=True, exclude_max=True).map(_repr),
    NOT_A_NUMBER)
BAD_ALPHA = st.one_of(st.floats(min_value=MAX_COUPLING, exclude_min=True).map(_repr),
                      st.floats(max_value=-MAX_COUPLING, exclude_max=True).map(_repr),
                      st.sampled_from(["nan", "inf", "-inf", "1e400"]), NOT_A_NUMBER)
BAD_TOL = st.one_of(st.floats(max_value=1e-13, exclude_max=True).map(_repr),
                    st.floats(min_value=1e-2).map(_repr), NOT_A_NUMBER)
BAD_COUPLING = st.one_of(st.floats(max_value=0.0).map(_repr), st.floats(min_value=2.0).map(_repr),
                         NOT_A_NUMBER)
BAD_COUNT = st.one_of(st.integers(max_value=0), st.integers(min_value=100_001, max_value=10**18))

SOLVE = ["solve", "--model", "sinh-gordon", "--coupling", "0.6", "--radius", "1", "2"]


def _replace(argv, option, value):
    i = argv.index(option)
    return argv[:i + 1] + [value] + argv[i + 2:]


@st.composite
def bad_argument_lists(draw):
    """A valid tba solve / flow-check / branch-point command with one defect."""
    kind = draw(st.sampled_from(["radius", "alpha", "tol", "coupling", "count", "unknown option",
                                 "model", "twice", "missing", "command", "positional", "state",
                                 "cdd", "run option", "output"]))
    if kind == "radius":
        return _replace(SOLVE, "--radius", draw(BAD_RADIUS))
    if kind == "alpha":
        command = draw(st.sampled_from([SOLVE, ["branch-point", "--model", "lee-yang", "--alpha", "0"],
                                        ["flow-check", "--model", "lee-yang", "--radius", "1",
                                         "--alpha", "0.1"]]))
        bad = draw(BAD_ALPHA)
        return command + [f"--alpha={bad}"] if command is SOLVE else _replace(command, "--alpha", bad)
    if kind == "tol":
        return SOLVE + ["--tol", draw(BAD_TOL)]
    if kind == "coupling":
        return _replace(SOLVE, "--coupling", draw(BAD_COUPLING))
    if kind == "count":
        return _replace(SOLVE, "--radius", f"0.5:2:{draw(BAD_COUNT)}")
    if kind == "unknown option":
        argv = list(SOLVE)
        argv.insert(draw(st.integers(1, len(argv))), draw(UNKNOWN_OPTION))
        return argv
    if kind == "model":
        name = draw(st.text(max_size=15).filter(lambda t: t not in MODELS))
        return _replace(SOLVE, "--model", name)
    if kind == "twice":
        # (solve --alpha takes several values, so it is not among the single-valued options)
        option, value = draw(st.sampled_from([("--tol", "1e-10"),
                                              ("--coupling", "0.5"), ("--model", "lee-yang"),
                                              ("--state", "1/2,-1/2")]))
        return SOLVE + [option, value, option, value]
    if kind == "missing":
        return draw(st.sampled_from([SOLVE[:5], ["solve", "--radius", "1"], ["solve"], [],
                                     ["flow-check", "--model", "lee-yang", "--radius", "1"],
                                     ["branch-point", "--model", "lee-yang"]]))
    if kind == "command":
        return [draw(st.text(max_size=10).filter(
            lambda t: t not in ("solve", "run", "merge", "report", "plot", "export", "demo",
                                "branch-point", "flow-check", "models")
            and not t.startswith("-")))] + SOLVE[1:]
    if kind == "positional":
        return SOLVE + [draw(st.text(string.ascii_letters, min_size=1, max_size=8))]
    if kind == "state":
        text = draw(NOT_A_NUMBER.filter(lambda t: t.strip() != "ground" and not t.startswith("-")))
        return SOLVE + ["--state", text]
    if kind == "cdd":
        if draw(st.booleans()):  # a higher spin on a model of several species
            return ["solve", "--model", "ising-e8", "--radius", "1", "--cdd", "3:0.01"]
        spin = draw(st.integers(-5, 40).filter(lambda s: s < 3 or s % 2 == 0))
        return SOLVE + ["--cdd", draw(st.sampled_from([f"{spin}:0.01", "3", "3:", "a:0.1",
                                                       "3:1e13", ":0.1"]))]
    if kind == "output":  # a directory as the file, or a path under a regular file
        target = draw(st.sampled_from(["DIR", "DIR/keep.h5/x.png", "DIR/keep.h5/sub/x.h5"]))
        return draw(st.sampled_from([["plot", "DIR/keep.h5", "-o", target],
                                     ["export", "--csv", "DIR/keep.h5", "-o", target],
                                     ["merge", "DIR/keep.h5", "--out", target],
                                     ["merge", "DIR/keep.h5", "-o", target],
                                     ["run", "RUNFILE", "--out", target],
                                     ["run", "RUNFILE", "--output", target],
                                     ["demo", "--out-dir", "DIR/keep.h5"],
                                     ["demo", "--output-dir", "DIR/keep.h5"]]))
    option, value = draw(st.sampled_from([("--workers", "0"), ("--workers", "-3"),
                                          ("--shard", "0/3"), ("--shard", "4/3"),
                                          ("--max-points", "0"), ("--cluster", "local:0"),
                                          ("--cluster", "remote:2"), ("--workers", "2.5")]))
    return ["run", "RUNFILE", "--dry-run", option, value]


def run_tba(argv):
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return code, out.getvalue(), err.getvalue()


def files(directory):
    return {p: (p.stat().st_mtime_ns, p.read_bytes()) for p in Path(directory).rglob("*") if p.is_file()}


def assert_one_line_error(argv, code, out, err):
    lines = err.splitlines()
    assert code == 2, (argv, code, err)
    assert len(lines) == 1 and lines[0].startswith("tba: error: "), (argv, err)
    assert "Traceback" not in err and out == "", (argv, out)
    return lines[0]


@pytest.fixture(scope="module")
def workdir(tmp_path_factory):
    d = tmp_path_factory.mktemp("props")
    (d / "good.toml").write_text(GOOD_RUN)
    (d / "keep.h5").write_bytes(b"results that must not be touched")
    return d


@pytest.mark.slow
@settings(max_examples=300, **SETTINGS)
@given(argv=bad_argument_lists())
def test_malformed_argument_lists(workdir, argv):
    argv = [str(workdir / "good.toml") if a == "RUNFILE" else a.replace("DIR", str(workdir))
            for a in argv]
    before = files(workdir)
    assert_one_line_error(argv, *run_tba(argv))
    assert files(workdir) == before


# -- run files ----------------------------------------------------------------------------------

def toml_value(kind):
    """TOML literals of one kind."""
    text = st.text(st.characters(blacklist_categories=("Cs", "Cc")), max_size=10)
    return {
        "string": text.map(json.dumps),
        "boolean": st.sampled_from(["true", "false"]),
        "integer": st.integers(-10**6, 10**6).map(str),
        "float": st.floats(allow_nan=False, allow_infinity=False).map(repr).filter(
            lambda t: "e" in t or "." in t),
        "array": st.sampled_from(["[]", "[1, 2]", '["a"]', "[[1], [2]]"]),
        "table": st.sampled_from(["{}", "{ a = 1 }", '{ start = "x" }']),
        "datetime": st.sampled_from(["1979-05-27T07:32:00Z", "1979-05-27", "07:32:00"]),
    }[kind]


KINDS = ["string", "boolean", "integer", "float", "array", "table", "datetime"]
#: (line in GOOD_RUN, the key's kinds that are valid there)
KEYS = {"coupling = 0.6": {"integer", "float"}, "alphas = [0.1]": {"array"},
        "start = 1.0": {"integer", "float"}, "stop = 2.0": {"integer", "float"},
        "count = 2": {"integer"}, "tol = 1e-10": {"integer", "float"},
        "chunk_size = 2": {"integer"}, "flow_check = true": {"boolean"},
        'sweep = "descending"': set(), "branch_points = false": {"boolean"},
        'name = "sinh-gordon"': set(), 'output = "out/p.h5"': {"string"},
        'description = "tiny"': {"string"}}
OUT_OF_RANGE = {
    "coupling = 0.6": st.one_of(st.floats(max_value=0.0), st.floats(min_value=2.0)),
    "start = 1.0": st.one_of(st.floats(max_value=0.0), st.floats(min_value=MAX_RADIUS, exclude_min=True)),
    "tol = 1e-10": st.one_of(st.floats(max_value=1e-13, exclude_max=True), st.floats(min_value=1e-2)),
    "count = 2": st.one_of(st.integers(max_value=1), st.integers(min_value=10**7, max_value=2**62)),
    "chunk_size = 2": st.integers(max_value=0),
    "alphas = [0.1]": st.floats(min_value=MAX_COUPLING, exclude_min=True),
}
TABLES = ["", "[[models]]", "[deformation]", "[radii]", "[solver]", "[scan]"]


def _set(line, literal):
    key = line.split(" = ")[0]
    return GOOD_RUN.replace(line, f"{key} = {literal}")


def _toml_float(x):
    return "nan" if math.isnan(x) else ("inf" if x > 0 else "-inf") if math.isinf(x) else repr(x)


@st.composite
def bad_run_files(draw):
    """GOOD_RUN (text or bytes) with one defect."""
    kind = draw(st.sampled_from(["type", "range", "unknown key", "syntax", "bytes", "missing",
                                 "duplicate", "model", "state", "spin"]))
    if kind == "type":
        line = draw(st.sampled_from(sorted(KEYS)))
        literal = draw(st.sampled_from([k for k in KINDS if k not in KEYS[line]]).flatmap(toml_value))
        return _set(line, literal)
    if kind == "range":
        line = draw(st.sampled_from(sorted(OUT_OF_RANGE)))
        value = draw(OUT_OF_RANGE[line])
        literal = _toml_float(value) if isinstance(value, float) else str(value)
        return _set(line, f"[{literal}]" if line.startswith("alphas") else literal)
    if kind == "unknown key":
        key = draw(st.text(string.ascii_lowercase + "_", min_size=1, max_size=10).filter(
            lambda k: k not in {"output", "description", "name", "models", "deformation", "radii",
                                "states", "solver", "scan", "coupling", "alphas", "higher_spin",
                                "start", "stop", "count", "spacing", "tol", "chunk_size",
                                "flow_check", "sweep", "branch_points"}))
        table = draw(st.sampled_from(TABLES))
        line = f"{key} = 1"
        return line + "\n" + GOOD_RUN if not table else GOOD_RUN.replace(table, f"{table}\n{line}")
    if kind == "syntax":
        payload = draw(st.text(st.characters(blacklist_categories=("Cs",), blacklist_characters="\n\r]"),
                               max_size=10))
        return draw(st.sampled_from([f"= {payload}\n", f"[{payload}\n"])) + GOOD_RUN
    if kind == "bytes":
        return b"\xff\xfe" + draw(st.binary(max_size=20)) + GOOD_RUN.encode()
    if kind == "missing":
        line = draw(st.sampled_from(["alphas = [0.1]", 'name = "sinh-gordon"', "coupling = 0.6",
                                     "count = 2", 'output = "out/p.h5"']))
        return GOOD_RUN.replace(line + "\n", "")
    if kind == "duplicate":
        line = draw(st.sampled_from(['output = "out/p.h5"', "count = 2", "tol = 1e-10"]))
        return GOOD_RUN.replace(line, f"{line}\n{line}")
    if kind == "model":
        name = draw(st.text(string.ascii_lowercase + "-", max_size=12).filter(lambda t: t not in MODELS))
        return GOOD_RUN.replace('name = "sinh-gordon"', f'name = "{name}"')
    if kind == "state":
        text = draw(st.text(string.ascii_letters + ",/ ", max_size=10).filter(lambda t: t.strip() != "ground"))
        return GOOD_RUN.replace('description = "tiny"', f'description = "tiny"\nstates = ["{text}"]')
    spin = draw(st.integers(-4, 30).filter(lambda s: s < 3 or s % 2 == 0))
    return GOOD_RUN.replace("alphas = [0.1]", f"alphas = [0.1]\nhigher_spin = {{ {spin} = 0.01 }}")


@pytest.mark.slow
@settings(max_examples=200, **SETTINGS)
@given(text=bad_run_files(), dry_run=st.booleans())
def test_malformed_run_files(workdir, text, dry_run):
    path = workdir / "bad.toml"
    path.write_bytes(text if isinstance(text, bytes) else text.encode())
    before = files(workdir)
    argv = ["run", str(path), *(["--dry-run"] if dry_run else [])]
    line = assert_one_line_error(argv, *run_tba(argv))
    assert "bad.toml" in line, line
    assert files(workdir) == before and not (workdir / "out").exists()
