"""The excited levels' branch points of a scan (/level_branch_points, schema 5): computed by
the scan, stored with their error estimates and statuses, verified by checksums, merged from
shards bit for bit, in the Dataset, the report and the plot; files written before (schema 4)
are still read and the report falls back to the scan's bracket."""

import io
import math
from pathlib import Path

import h5py
import numpy as np
import pytest

import tba
from tba.cli import main
from tba.output.dataset import open_scan
from tba.output.report import format_report, level_branch_checks
from tba.physics.flow import excited_branch_point
from tba.scans.codes import BP_FOUND, BP_NONE, NOT_COMPUTED
from tba.scans.runfile import load_run
from tba.solvers.result import STATUS_CODES, Status
from tba.store.driver import run_scan
from tba.store.hdf5 import StoreError, read_store
from tba.store.integrity import header_checksum

from storetools import data_offset, flip_bit

# sinh-Gordon B = 0.6, two-particle level (-1/2, 1/2) at rest: at alpha = -1 its branch from
# large R folds at R_c = 3.29468... (tests/test_excited_fold.py brackets it with the deformed
# solver); at alpha = +0.1 it has no fold. The radii put one scan radius on each side of R_c.
STATE = "-1/2,1/2"
RUN = """
description = "excited-level fold stored by the scan"
output = "scan.h5"
states = ["ground", "-1/2,1/2"]
radii = [3.1, 3.5, 4.5]

[[models]]
name = "sinh-gordon"
coupling = 0.6

[deformation]
alphas = [-1.0, 0.1]

[scan]
chunk_size = 2
"""


@pytest.fixture(scope="module")
def runfile(tmp_path_factory):
    path = tmp_path_factory.mktemp("levels") / "run.toml"
    path.write_text(RUN)
    return path


@pytest.fixture(scope="module")
def serial(runfile):
    run = load_run(runfile).with_output(runfile.parent / "serial.h5")
    run_scan(run, workers=1, log=io.StringIO())
    return Path(run.output)


def test_stored_fold_is_the_level_branch_point_and_lies_in_the_scan_bracket(serial):
    data = read_store(serial)
    assert data.has_level_branch_points and data.schema_version == 5
    s, a = data.state.index(STATE), list(data.alpha).index(-1.0)
    lv = data.levels
    assert lv["status"][0, a, s] == BP_FOUND
    Rc, err = float(lv["branch_radius"][0, a, s]), float(lv["branch_radius_error"][0, a, s])
    # the same number as tba.excited_branch_point at the run's tol, within its error estimate
    bp = excited_branch_point(tba.sinh_gordon(0.6), STATE, -1.0, tol=1e-12)
    assert bp.status == "found" and 0 < err < 1e-10
    assert abs(Rc - bp.radius) <= err + bp.radius_error
    assert abs(float(lv["energy"][0, a, s]) - bp.energy) <= float(lv["energy_error"][0, a, s]) \
        + bp.energy_error
    # independent route: the deformed solver itself (no flow relation) is real at the scan
    # radius above R_c; at the one below it is real too, but on another branch: its R~ = R +
    # alpha E lies below R~_*, where the level's undeformed curve R(R~) = R~ - alpha E~(R~)
    # turns again (E~ -> -pi c / (6 R~) as R~ -> 0 with c = 1; common practice, no source)
    st = data["status"][0, a, :, s]
    assert (st[1:] == 0).all()
    Rt = data.radius + -1.0 * data["energy"][0, a, :, s]
    Rt_star = float(lv["effective_radius"][0, a, s])
    assert Rt[0] < Rt_star < Rt[1]
    assert data.radius[0] < Rc <= data.radius[1]
    # the other side of alpha: status none, never a number; the ground column is the ground
    # state's, in /branch_points (not computed here)
    b = list(data.alpha).index(0.1)
    assert lv["status"][0, b, s] == BP_NONE and math.isnan(lv["branch_radius"][0, b, s])
    assert "no fold" in lv["message"][0, b, s]
    assert (lv["status"][:, :, data.state.index("ground")] == NOT_COMPUTED).all()
    checks = [c for c in level_branch_checks(data) if c.status == "found"]
    assert [c.consistent for c in checks] == [True] and checks[0].other_branch == 1
    assert checks[0].last_real == data.radius[1] and checks[0].below == data.radius[0]


def test_report_shows_the_level_r_c_with_its_error(serial, capsys):
    assert main(["report", str(serial)]) == 0
    out = capsys.readouterr().out
    Rc = read_store(serial).levels["branch_radius"][0, 0, 1]
    section = out[out.index("branch points of the excited levels"):]
    assert f"{Rc:.12g}" in section and "+- error" in section
    assert "holds for all 1 checked curve(s)" in section
    assert "between two radii" not in out  # the bracket table is only the fallback


def test_dataset_carries_the_level_branch_points(serial):
    ds = open_scan(serial)
    r = ds["level_branch_radius"].sel(state=STATE, alpha=-1.0).item()
    assert r == read_store(serial).levels["branch_radius"][0, 0, 1]
    assert ds["level_branch_status"].dims == ("model", "alpha", "state")
    assert ds["level_branch_status"].sel(state=STATE, alpha=0.1).item() == BP_NONE
    assert "fold" in ds["level_branch_radius"].attrs["long_name"]


def test_shards_merged_equal_the_serial_file(runfile, serial, tmp_path):
    # three shards: the four level tasks (model, alpha, state) are split among them too
    parts = []
    for k in (1, 2, 3):
        part = tmp_path / f"part-{k}.h5"
        assert main(["run", str(runfile), "--shard", f"{k}/3", "-o", str(part), "--workers", "1"]) == 0
        parts.append(part)
    owned = [int((read_store(p).levels["status"] != NOT_COMPUTED).sum()) for p in parts]
    assert sum(owned) == 2 and max(owned) == 1  # (alpha, level) pairs, one each at most
    merged = tmp_path / "merged.h5"
    assert main(["merge", *map(str, parts), "-o", str(merged)]) == 0
    with h5py.File(serial, "r") as ref, h5py.File(merged, "r") as f:
        for name in ref["level_branch_points"]:  # every byte, checksums and messages included
            a, b = ref[f"level_branch_points/{name}"][...], f[f"level_branch_points/{name}"][...]
            assert a.dtype == b.dtype and a.tobytes() == b.tobytes(), name


def test_a_flipped_bit_in_a_level_branch_point_is_found_and_recomputed(runfile, serial, tmp_path):
    path = tmp_path / "flipped.h5"
    path.write_bytes(serial.read_bytes())
    itemsize = 8
    index = 0 * 2 * 2 + 0 * 2 + 1  # (model 0, alpha -1, state 1) in the (model, alpha, state) array
    flip_bit(path, data_offset(path, "level_branch_points/branch_radius") + index * itemsize, 3)
    with pytest.raises(StoreError, match=r"state -1/2,1/2.*fails its checksum"):
        read_store(path)
    assert main(["run", str(runfile), "-o", str(path), "--workers", "1"]) == 0
    assert read_store(path).levels["branch_radius"][0, 0, 1] == \
        read_store(serial).levels["branch_radius"][0, 0, 1]


def _as_schema_4(path):
    """What the files of schema 4 hold: the same, without /level_branch_points."""
    with h5py.File(path, "r+") as f:
        del f["level_branch_points"]
        f.attrs["schema_version"] = 4
        f.attrs["header_checksum"] = header_checksum(f.attrs)


def test_files_written_before_are_read_and_the_report_shows_the_bracket(serial, tmp_path):
    path = tmp_path / "old.h5"
    path.write_bytes(serial.read_bytes())
    _as_schema_4(path)
    data = read_store(path)
    assert data.schema_version == 4 and not data.has_level_branch_points
    assert (data.levels["status"] == NOT_COMPUTED).all()
    np.testing.assert_array_equal(data["energy"], read_store(serial)["energy"])
    text = format_report(data)
    assert "branch points of the excited levels" not in text
    # no bracket either: the point below R_c is real, on another branch (see the first test)
    assert "not in the file: this file was written before" in text and "schema version 4" in text
    # where the scan does bracket the fold (no real solution at the radius below), the old
    # file's report shows that bracket, as before
    data["status"][0, 0, 0, 1] = STATUS_CODES[Status.NO_REAL_SOLUTION]
    text = format_report(data)
    assert "between two radii" in text and "3.1" in text.split("between two radii")[1]
    ds = open_scan(path)
    assert (ds["level_branch_status"].values == NOT_COMPUTED).all()
    from tba.output.dataset import store_data
    assert level_branch_checks(store_data(ds)) == []


def test_plot_marks_the_level_fold_like_the_ground_state_branch_point(serial):
    # the level's panel: a diamond at (R_c, E(R_c)) on a dotted vertical line, as for the
    # ground state (tests/test_plotting.py), and no "last real point" star in its place
    from tba.output.plotting import plot_store

    data = read_store(serial)
    fig = plot_store(data)
    (ax,) = [ax for ax in fig.axes if ax.get_label() == "energy" and "two-particle" in ax.get_title()]
    Rc, Ec = data.levels["branch_radius"][0, 0, 1], data.levels["energy"][0, 0, 1]
    (diamond,) = [ln for ln in ax.get_lines() if ln.get_marker() == "D"]
    assert list(diamond.get_xdata()) == [Rc] and list(diamond.get_ydata()) == [Ec]
    assert [list(ln.get_xdata()) for ln in ax.get_lines() if ln.get_linestyle() == ":"] == [[Rc, Rc]]
    assert not [ln for ln in ax.get_lines() if ln.get_marker() == "*"]


def test_a_broken_superblock_is_rebuilt_with_the_level_branch_points(runfile, serial, tmp_path,
                                                                     monkeypatch):
    # the recovery map vouches for the levels' branch points too: the rebuilt file has them
    # bit for bit, and tba run computes none of them again
    import tba.scans.points

    path = tmp_path / "broken.h5"
    path.write_bytes(serial.read_bytes())
    with open(path, "r+b") as fh:  # the HDF5 signature and superblock
        fh.write(b"\0" * 64)

    def refuse(*args, **kwargs):
        raise AssertionError("a branch point was computed again")

    monkeypatch.setattr(tba.scans.points, "excited_branch_point", refuse)
    log = io.StringIO()
    summary = run_scan(load_run(runfile).with_output(path), workers=1, log=log)
    assert "rebuilt it from the" in log.getvalue() and summary.branch_points_computed == 0
    a, b = read_store(serial).levels, read_store(path).levels
    for name in a:
        same = (a[name] == b[name]).all() if a[name].dtype == object else \
            a[name].tobytes() == b[name].tobytes()
        assert same, name


def test_a_chunk_whose_done_flag_is_lost_but_whose_checksum_verifies_is_read_as_done(serial,
                                                                                      tmp_path):
    # the done flag is a chunk's last write (tba.store.writer): a kill just before it, or a
    # flipped bit in it, must not lose the verified values (common practice, no source)
    path = tmp_path / "flag.h5"
    path.write_bytes(serial.read_bytes())
    with h5py.File(path, "r+") as f:
        f["progress/done"][0] = 0
    data = read_store(path)
    assert data.complete
    np.testing.assert_array_equal(data["energy"], read_store(serial)["energy"])
    with h5py.File(path, "r+") as f:  # a chunk being rewritten: its old checksum fails
        f["progress/checksum"][0] ^= 1
    assert not read_store(path).progress["done"][0]
