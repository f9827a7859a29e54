"""Job arrays without a scheduler: ``tba run --shard I/N`` and ``tba merge``. Shards 1/3, 2/3
and 3/3 merged equal the serial file; mismatched or inconsistent files are refused; a merge
of some shards says what is missing and plain ``tba run`` completes it; shards resume, and
report / plot / export say a shard is partial.

The serial run of the same resolved run file is the reference everywhere (a chunk is a pure
function of (run, chunk), so shards must reproduce its numbers bit for bit)."""

import io
import json
import shutil

import h5py
import numpy as np
import pytest

import tba.scans.backends
import tba.scans.points
from tba.cli import main
from tba.scans.runfile import Shard, load_run, parse_shard
from tba.store.driver import ScanInterrupted, run_scan
from tba.store.hdf5 import BRANCH_VARIABLES, NOT_COMPUTED, POINT_VARIABLES, read_store

from storetools import reseal

RUN = """\
# shard tests: free fermion and Lee-Yang, both signs of alpha, 7 radii in chunks of 2 (< 1 s)
output = "scan.h5"

[[models]]
name = "free-fermion"

[[models]]
name = "lee-yang"

[deformation]
alphas = [-0.2, 0.4]

[radii]
start = 0.3
stop = 2.0
count = 7

[solver]
tol = 1e-10

[scan]
chunk_size = 2
"""
TOTAL = 16  # chunks: 2 models x 2 alphas x 4 per curve
NUMBERS = [name for name, (kind, _, _) in POINT_VARIABLES.items() if kind != "str"]
BRANCH_NUMBERS = [name for name, (kind, _, _) in BRANCH_VARIABLES.items() if kind != "str"]
#: data sets that record how and when, not what: the rest must equal the serial file's
# provenance (and the checksums and maps that cover it): may differ between equal files
METADATA = {"progress/invocation", "progress/seconds", "message", "branch_points/message",
            "progress/checksum", "branch_points/checksum", "progress/history", "recovery/map",
            "level_branch_points/message", "level_branch_points/checksum"}


@pytest.fixture(scope="module")
def runfile(tmp_path_factory):
    path = tmp_path_factory.mktemp("shards") / "run.toml"
    path.write_text(RUN)
    return path


@pytest.fixture(scope="module")
def serial(runfile):
    """The serial run of the same resolved run file: the reference."""
    run = load_run(runfile).with_output(runfile.parent / "serial.h5")
    run_scan(run, workers=1, log=io.StringIO())
    return run.output


@pytest.fixture(scope="module")
def shards(runfile, tmp_path_factory):
    d = tmp_path_factory.mktemp("parts")
    paths = []
    for k in (1, 2, 3):
        path = d / f"part-{k}.h5"
        assert main(["run", str(runfile), "--shard", f"{k}/3", "-o", str(path), "--workers", "1"]) == 0
        paths.append(path)
    return paths


def _equal_to_serial(path, serial):
    """Every stored number of ``path`` equals the serial file's (serial run of the same
    resolved run file is the reference); history and timing may differ."""
    numeric = []

    def visit(name, obj):
        if isinstance(obj, h5py.Dataset) and name not in METADATA:
            numeric.append(name)

    with h5py.File(serial, "r") as ref, h5py.File(path, "r") as f:
        ref.visititems(visit)
        assert len(numeric) >= 28  # scales, points, chunk table, done mask, branch points
        for name in numeric:
            a, b = ref[name][...], f[name][...]
            assert a.dtype == b.dtype and a.shape == b.shape, name
            if a.dtype.kind == "f":
                assert np.array_equal(a, b, equal_nan=True), name
            else:
                assert np.array_equal(a, b), name
        assert f.attrs["run_id"] == ref.attrs["run_id"] and f.attrs["schema"] == ref.attrs["schema"]


def test_shards_split_the_run_exactly_once():
    run = load_run_text()
    for n in range(1, 6):
        owned = [c.index for k in range(1, n + 1) for c in Shard(k, n).chunks(run)]
        assert sorted(owned) == list(range(TOTAL))
        pairs = [p for k in range(1, n + 1) for p in Shard(k, n).branch_pairs(run)]
        assert sorted(pairs) == [(m, a) for m in range(2) for a in range(2)]
        # every branch-point task (excited levels' (m, a, s) included) in exactly one shard
        keys = [k for i in range(1, n + 1) for k in Shard(i, n).branch_keys(run)]
        assert sorted(keys) == sorted(run.branch_keys()) and len(set(keys)) == len(keys)
    from tba.scans.runfile import loads_run
    levels = loads_run(LEVELS)  # two states: (m, a, s) tasks for the excited one
    assert any(len(k) == 3 for k in levels.branch_keys())
    for n in range(1, 5):
        keys = [k for i in range(1, n + 1) for k in Shard(i, n).branch_keys(levels)]
        assert sorted(keys) == sorted(levels.branch_keys()) and len(set(keys)) == len(keys)
    assert parse_shard(" 2/3") == Shard(2, 3)
    for bad in ("0/3", "4/3", "3", "a/b", "1/0", "-1/3"):
        with pytest.raises(ValueError, match="I/N"):
            parse_shard(bad)


def load_run_text():
    from tba.scans.runfile import loads_run
    return loads_run(RUN)


def test_three_shards_merged_equal_the_serial_file(runfile, serial, shards, tmp_path, capsys):
    for k, path in enumerate(shards, start=1):
        d = read_store(path)
        assert d.shard == Shard(k, 3) and not d.complete
        owned = np.arange(TOTAL) % 3 == k - 1
        assert np.array_equal(d.owned, owned) and np.array_equal(d.progress["done"].astype(bool), owned)
        with h5py.File(path, "r") as f:  # only its own points are stored
            assert "energy" not in f and len(f["shard_points/energy"]) == sum(
                c.size for c in Shard(k, 3).chunks(load_run(runfile)))
        stored = d.branch["status"] != NOT_COMPUTED
        assert [p for p in zip(*np.nonzero(stored))] == [(m, a) for m in range(2) for a in range(2)
                                                        if (2 * m + a) % 3 == k - 1]
    merged = tmp_path / "merged.h5"
    capsys.readouterr()
    assert main(["merge", *map(str, shards), "-o", str(merged)]) == 0
    err = capsys.readouterr().err
    assert f"{TOTAL} of {TOTAL} chunks and 4 of 4 branch points; complete" in err and "missing" not in err
    _equal_to_serial(merged, serial)
    d = read_store(merged)
    assert d.shard is None and d.complete
    assert [h.get("shard") for h in d.history] == ["1/3", "2/3", "3/3", None] and d.history[-1]["merge"]
    # a merged file is a full store of the run: plain tba run finds nothing to do
    assert main(["run", str(runfile), "-o", str(merged)]) == 0
    assert "nothing to compute" in capsys.readouterr().err


def test_merge_refuses_files_that_do_not_belong_together(runfile, shards, tmp_path, capsys):
    out = tmp_path / "out.h5"

    def refused(*files, name):
        assert main(["merge", *map(str, files), "-o", str(out)]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and err[0].startswith("tba: error: ") and str(name) in err[0], err
        assert not out.exists()
        return err[0]

    # a shard of another run (other radii)
    other_run = tmp_path / "other.toml"
    other_run.write_text(RUN.replace("count = 7", "count = 6"))
    other = tmp_path / "other-1.h5"
    assert main(["run", str(other_run), "--shard", "1/3", "-o", str(other), "--workers", "1"]) == 0
    capsys.readouterr()
    line = refused(shards[0], other, name=other)
    assert "different run" in line and "radii" in line
    # a tampered shard, alone (it overlaps nothing): its checksum fails, naming the chunk
    bad = tmp_path / "tampered.h5"
    shutil.copy(shards[0], bad)
    with h5py.File(bad, "r+") as f:
        f["shard_points/energy"][1] += 1e-12
    line = refused(bad, shards[1], name=bad)
    assert "chunk 0 (free-fermion, alpha = -0.2" in line and "fails its checksum" in line
    # the same chunk with other numbers in two consistent files: refused, naming the chunk
    reseal(bad)
    line = refused(shards[0], shards[1], bad, name=bad)
    assert "chunk 0 (free-fermion, alpha = -0.2" in line and "other numbers (energy)" in line
    # ... and a branch point
    shutil.copy(shards[0], bad)
    with h5py.File(bad, "r+") as f:
        f["branch_points/branch_radius"][1, 1] *= 1 + 1e-12
    assert "branch point of lee-yang at alpha = 0.4 fails its checksum" in refused(bad, name=bad)
    reseal(bad)
    assert "branch point of lee-yang at alpha = 0.4 differs" in refused(shards[0], bad, name=bad)
    # another tba version, and not a store at all
    shutil.copy(shards[1], bad)
    with h5py.File(bad, "r+") as f:
        f.attrs["package_version"] = "0.0.1"
    assert "root attributes fail their checksum" in refused(shards[0], bad, name=bad)
    reseal(bad)
    assert "mix versions" in refused(shards[0], bad, name=bad)
    bad.write_text("not hdf5")
    refused(shards[0], bad, name=bad)
    # an -o/--output that is a file of another run is not overwritten, unless --force
    shutil.copy(other, out)
    assert main(["merge", str(shards[0]), "-o", str(out)]) == 2
    err = capsys.readouterr().err
    assert "is shard 1/3 of a run, not a full store; refusing to overwrite it" in err and "--force" in err
    assert read_store(out).shard == Shard(1, 3) and len(read_store(out).radius) == 6
    assert main(["merge", str(shards[0]), "-o", str(out), "--force"]) == 0
    assert len(read_store(out).radius) == 7


def test_a_partial_merge_says_what_is_missing_and_tba_run_completes_it(runfile, serial, shards,
                                                                        tmp_path, capsys):
    merged = tmp_path / "merged.h5"
    capsys.readouterr()
    assert main(["merge", str(shards[0]), str(shards[2]), "-o", str(merged)]) == 0
    err = capsys.readouterr().err
    assert "11 of 16 chunks and 3 of 4 branch points; incomplete" in err
    assert "missing: shard 2/3: 5 of its 5 chunks missing" in err
    assert "missing: 1 of 4 branch points missing" in err and f"--output {merged}" in err
    assert main(["report", str(merged)]) == 0
    assert "11 of 16 done (incomplete" in capsys.readouterr().out
    assert main(["run", str(runfile), "-o", str(merged), "--workers", "1"]) == 0
    assert "computed 5 chunks (11 were already done) and 1 branch point" in capsys.readouterr().err
    _equal_to_serial(merged, serial)
    # a late shard merged into the complete file: it overlaps consistently
    assert main(["merge", str(shards[1]), "-o", str(merged)]) == 0
    assert "16 of 16 chunks and 4 of 4 branch points; complete" in capsys.readouterr().err
    _equal_to_serial(merged, serial)
    d = read_store(merged)
    assert sum("merge" in h for h in d.history) == 2


def test_a_shard_resumes_and_is_not_mistaken_for_another(runfile, serial, tmp_path, capsys,
                                                        monkeypatch):
    run = load_run(runfile)
    shard = Shard(2, 3)
    path = tmp_path / "part-2.h5"
    calls = []
    real = tba.scans.backends.solve_chunk

    def interrupt_third(run, chunk):
        calls.append(chunk.index)
        if len(calls) == 3:
            raise KeyboardInterrupt
        return real(run, chunk)

    monkeypatch.setattr(tba.scans.backends, "solve_chunk", interrupt_third)
    with pytest.raises(ScanInterrupted, match="2 of 5 chunks of shard 2/3 are saved"):
        run_scan(run, path, shard=shard, workers=1, log=io.StringIO())
    monkeypatch.setattr(tba.scans.backends, "solve_chunk", real)
    log = io.StringIO()
    summary = run_scan(run, path, shard=shard, workers=1, log=log)
    assert summary.chunks_before == 2 and summary.chunks_computed == 3 and summary.complete
    assert "(shard 2/3) is complete" in log.getvalue()
    d, ref = read_store(path), read_store(serial)
    mine = np.zeros(ref["status"].shape, dtype=bool)
    for c in shard.chunks(run):
        mine[c.model, c.alpha, c.radius_start:c.radius_stop, c.state] = True
    for name in NUMBERS:  # serial run of the same resolved run file is the reference
        assert np.array_equal(d[name][mine], ref[name][mine], equal_nan=True), name
    assert (d["status"][~mine] == NOT_COMPUTED).all()
    # a shard file is never resumed as another shard, nor as the full store
    for extra, words in ((["--shard", "1/3"], "is shard 2/3 of a run, not shard 1/3"),
                         ([], "is shard 2/3 of a run, not a full store")):
        assert main(["run", str(runfile), "-o", str(path), *extra]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and words in err[0], err
    for bad in ("0/3", "4/3", "x"):
        assert main(["run", str(runfile), "--shard", bad]) == 2
        assert "argument --shard" in capsys.readouterr().err
    # without -o/--output a shard gets its own name next to the run's output, never the full store's
    assert main(["run", str(runfile), "--shard", "3/3", "--dry-run"]) == 0
    out = capsys.readouterr().out
    assert "scan.part-3-of-3.h5" in out and "shard 3/3: 5 chunks (9 points) and 1 branch points" in out


def test_report_plot_and_export_of_a_shard_say_it_is_partial(shards, tmp_path, capsys):
    path = shards[1]
    assert main(["report", str(path)]) == 0
    out = capsys.readouterr().out
    assert "PARTIAL: shard 2/3 of run" in out and "tba merge" in out
    assert "the other shards compute the rest" in out
    assert main(["export", str(path), "--json"]) == 0
    captured = capsys.readouterr()
    records = [json.loads(line) for line in captured.out.splitlines()]
    assert len(records) == 9 and "shard 2/3 of a run (partial)" in captured.err
    figure = tmp_path / "part.png"
    assert main(["plot", str(path), "-o", str(figure)]) == 0
    assert figure.stat().st_size > 0


LEVELS = """\
description = "levels in shards"
output = "levels.h5"
radii = [1.0, 2.0, 3.0]
states = ["ground", "1/2,-1/2"]

[[models]]
name = "free-fermion"

[[models]]
name = "lee-yang"

[deformation]
alphas = [0.1]

[scan]
chunk_size = 2
"""


def test_shards_of_a_run_with_excited_levels_merged_equal_the_serial_file(tmp_path, capsys):
    # Lee-Yang has no two-particle level: those points belong to no chunk and no shard, and
    # the merged file must still mark them "not-available" like the serial one
    from tba.store.hdf5 import NOT_AVAILABLE

    path = tmp_path / "levels.toml"
    path.write_text(LEVELS)
    run = load_run(path)
    run_scan(run.with_output(tmp_path / "serial.h5"), workers=1, log=io.StringIO())
    parts = []
    for k in (1, 2):
        part = tmp_path / f"part-{k}.h5"
        assert main(["run", str(path), "--shard", f"{k}/2", "-o", str(part), "--workers", "1"]) == 0
        assert np.all(read_store(part)["status"][1, :, :, 1] == NOT_AVAILABLE)
        parts.append(part)
    merged = tmp_path / "merged.h5"
    assert main(["merge", *map(str, parts), "-o", str(merged)]) == 0
    _equal_to_serial(merged, tmp_path / "serial.h5")
    d = read_store(merged)
    assert d.complete and np.all(d["status"][1, :, :, 1] == NOT_AVAILABLE)
    assert np.all(d["status"][0, :, :, 1] == 0)
