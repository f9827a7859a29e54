"""The figure of a scan, checked through matplotlib's objects (labels, legends, lines), not pixels."""

import dataclasses
import io

import numpy as np
import pytest

from tba.cli import main
from tba.output.plotting import LABELS, plot_store
from tba.output.report import CONVERGED
from tba.scans.runfile import loads_run
from tba.store.driver import run_scan
from tba.store.hdf5 import read_store

# Lee-Yang and the free fermion; alpha = 0.5 at R = 0.3 lies past the branch point of both
# (CFT estimate sqrt(2 pi c alpha / 3) ~ 0.65-0.72, PHYSICS.md section 4), alpha = 0 has no
# flow check, alpha = -0.2 has one.
RUN = """\
# plotting test
output = "plot.h5"

[[models]]
name = "lee-yang"

[[models]]
name = "free-fermion"

[deformation]
alphas = [-0.2, 0, 0.5]

[radii]
start = 0.3
stop = 3.0
count = 6
spacing = "log"

[solver]
tol = 1e-10

[scan]
chunk_size = 6
"""


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    run = loads_run(RUN, base_dir=tmp_path_factory.mktemp("plot"))
    run_scan(run, workers=1, log=io.StringIO())
    return read_store(run.output)


def _legend_texts(ax):
    legend = ax.get_legend()
    return [t.get_text() for t in legend.get_texts()] if legend else []


def test_panels_labels_legends_and_lines(data):
    fig = plot_store(data)
    axes = np.array(fig.axes).reshape(3, 2)
    assert [ax.get_title() for ax in axes[0]] == ["lee-yang", "free-fermion"]
    alphas = [r"$\alpha = -0.2$", r"$\alpha = 0$", r"$\alpha = 0.5$"]
    for m in range(2):
        ax_e, ax_r, ax_c = axes[:, m]
        assert ax_e.get_ylabel() == LABELS["energy"] and "E(R" in ax_e.get_ylabel()
        assert ax_r.get_ylabel() == LABELS["residual"] and "residual" in ax_r.get_ylabel()
        assert ax_c.get_ylabel() == LABELS["ceff"] and "c_" in ax_c.get_ylabel()
        assert ax_c.get_xlabel() == LABELS["radius"]
        assert ax_e.get_xscale() == ax_c.get_xscale() == "log"  # radii span a factor 10
        # energy: one line per alpha, one prediction per deformed alpha, and the branch point
        # of alpha = 0.5 (no real solution at R = 0.3, a real one further up): a dotted
        # vertical line at R_c and a diamond at (R_c, E(R_c)) in the colour of its curve
        assert _legend_texts(ax_e) == alphas + [LABELS["prediction"], LABELS["branch_point"]]
        assert len(ax_e.get_lines()) == 3 + 2 + 2
        Rc, Ec = data.branch["branch_radius"][m, 2], data.branch["energy"][m, 2]
        diamond = [ln for ln in ax_e.get_lines() if ln.get_marker() == "D"]
        assert len(diamond) == 1
        assert list(diamond[0].get_xdata()) == [Rc] and list(diamond[0].get_ydata()) == [Ec]
        vertical = [ln for ln in ax_e.get_lines() if ln.get_linestyle() == ":" and ln.get_marker() != "D"]
        assert len(vertical) == 1 and list(vertical[0].get_xdata()) == [Rc, Rc]
        curve = next(ln for ln in ax_e.get_lines() if ln.get_label() == alphas[2])
        assert vertical[0].get_color() == diamond[0].get_color() == curve.get_color()
        # between the last real point of the curve and the next radius down
        last = _last_real(data, m)
        assert data.radius[last - 1] < Rc <= data.radius[last]
        assert not [ln for ln in ax_e.get_lines() if ln.get_marker() == "*"]
        # residual on a log scale: residual and error estimate per deformed alpha
        assert ax_r.get_yscale() == "log"
        assert len(ax_r.get_lines()) == 2 * 2
        assert _legend_texts(ax_r) == ["residual", LABELS["estimate"]]
        # c_eff: one line per alpha
        assert _legend_texts(ax_c) == alphas
        assert len(ax_c.get_lines()) == 3
    # c_eff = -6 R E / pi of the first point of Lee-Yang at alpha = 0 (data check)
    line = axes[2, 0].get_lines()[1]
    E = data["energy"][0, 1, :, 0]
    np.testing.assert_allclose(line.get_ydata(), -6 * data.radius * E / np.pi)


def _last_real(data, m, a=2):
    """Index of the smallest radius with a real solution (alpha index a)."""
    return int(np.flatnonzero(data["status"][m, a, :, 0] == CONVERGED)[0])


def test_without_branch_points_the_last_real_point_is_marked(data):
    # a store whose branch points are not computed (scan.branch_points = false): the last real
    # point of the alpha = 0.5 curve (the branch point lies just below) gets an open star
    branch = {k: v.copy() for k, v in data.branch.items()}
    branch["status"][...] = -1
    fig = plot_store(dataclasses.replace(data, branch=branch))
    ax_e = np.array(fig.axes).reshape(3, 2)[0, 0]
    assert _legend_texts(ax_e)[-1] == LABELS["last_real"]
    star = [ln for ln in ax_e.get_lines() if ln.get_marker() == "*"]
    assert len(star) == 1 and star[0].get_xdata()[0] == data.radius[_last_real(data, 0)] > data.radius[0]
    assert not [ln for ln in ax_e.get_lines() if ln.get_marker() == "D"]


def test_plot_command_writes_png_and_pdf(data, tmp_path, capsys):
    for name in ("fig.png", "sub/fig.pdf"):
        out = tmp_path / name
        assert main(["plot", str(data.path), "-o", str(out)]) == 0
        assert out.stat().st_size > 1000
    assert (tmp_path / "fig.png").read_bytes()[:4] == b"\x89PNG"
    assert (tmp_path / "sub" / "fig.pdf").read_bytes()[:4] == b"%PDF"
    capsys.readouterr()
    assert main(["plot", str(data.path), "-o", str(tmp_path / "fig.jpeg")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "-o" in err[0]


def test_figure_without_flow_checks(tmp_path):
    run = loads_run(RUN.replace("alphas = [-0.2, 0, 0.5]", "alphas = [0]").replace("count = 6", "count = 2"),
                    base_dir=tmp_path)
    run_scan(run, workers=1, log=io.StringIO())
    fig = plot_store(read_store(run.output))
    ax_r = np.array(fig.axes).reshape(3, 2)[1, 0]
    assert ax_r.get_yscale() == "linear" and len(ax_r.get_lines()) == 0
    assert "no flow residuals" in ax_r.texts[0].get_text()
