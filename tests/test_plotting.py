"""The figures of a scan, checked through matplotlib's objects (panels, lines, labels, legends,
tick labels), not pixels: every curve must carry the stored numbers, every panel its units."""

import dataclasses
import io
import math

import numpy as np
import pytest
from matplotlib.colors import to_rgba

from tba.cli import main
from tba.output.labels import PANELS
from tba.output.plotting import LABELS, alpha_colors, plot_scan, plot_store
from tba.output.report import CONVERGED
from tba.scans.runfile import loads_run
from tba.store.driver import run_scan
from tba.store.hdf5 import BP_FOUND, create_store, read_store

# Lee-Yang and the free fermion, ground state and one-particle level "0". alpha = 0.5 at
# R = 0.3 lies past the ground state's branch point of both (CFT estimate sqrt(2 pi c alpha / 3)
# ~ 0.65-0.72, docs/physics.md section 4); alpha = 0 has no flow check, alpha = -0.2 has one and
# stops the one-particle levels (positive energy) between two radii.
RUN = """\
# plotting test
output = "plot.h5"
states = ["ground", "0"]

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
ALPHAS = [-0.2, 0.0, 0.5]


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    run = loads_run(RUN, base_dir=tmp_path_factory.mktemp("plot"))
    run_scan(run, workers=1, log=io.StringIO())
    return read_store(run.output)


def _panels(fig):
    """{(column title, panel): axes} of the panel grid; the column title is that of the
    column's first panel."""
    out, titles = {}, {}
    grid = [ax for ax in fig.axes if ax.get_label() != "branch"]
    for ax in grid:
        col = ax.get_subplotspec().colspan.start
        if ax.get_title():
            titles[col] = ax.get_title()
    for ax in grid:
        out[(titles[ax.get_subplotspec().colspan.start], ax.get_label())] = ax
    return out


TITLES = ["scaling Lee-Yang:\nground state", "scaling Lee-Yang:\none-particle level I = 0",
          "free Majorana fermion:\nground state", "free Majorana fermion:\none-particle level I = 0"]


def _lines(ax, **match):
    return [ln for ln in ax.get_lines()
            if all(getattr(ln, f"get_{k}")() == v for k, v in match.items())]


def test_columns_panels_titles_and_units(data):
    fig = plot_store(data)
    panels = _panels(fig)
    titles = [ax.get_title() for ax in fig.axes if ax.get_title()]
    assert titles == TITLES  # physics names, one column per (model, level)
    for title in TITLES:
        ground = "ground state" in title
        kinds = {k for t, k in panels if t == title}
        # c_eff only for the ground state, the gap only for excited levels
        assert kinds == {"energy", "residual", "collapse", "ceff" if ground else "gap"}
        energy = panels[(title, "energy")]
        assert energy.get_ylabel() == LABELS["energy"] and "[$m_1$]" in energy.get_ylabel()
        assert "[$m_1$]" in panels[(title, "residual")].get_ylabel()
        lowest = panels[(title, "ceff" if ground else "gap")]
        assert lowest.get_xlabel() == LABELS["radius"] and "m_1^{-1}" in lowest.get_xlabel()
        assert energy.get_xlabel() == "" and energy.get_xscale() == "log"  # radii span 10
        assert panels[(title, "collapse")].get_xlabel() == LABELS["collapse_x"]
    # the figure says what E is (bulk term excluded) and in which units
    note = [lg.get_title().get_text() for lg in fig.legends]
    assert any("without the bulk term" in t and "lightest mass" in t for t in note)


def test_one_alpha_key_ordered_diverging_with_a_neutral_zero(data):
    fig = plot_store(data)
    keys = [lg for lg in fig.legends if lg.get_title().get_text() == LABELS["alpha_key"]]
    assert len(keys) == 1  # one key for the figure, none per panel
    assert [t.get_text() for t in keys[0].get_texts()] == ["$-0.2$", "$0$", "$0.5$"]
    assert not any(ax.get_legend() for ax in fig.axes if ax.get_label() != "branch")
    colors = alpha_colors(ALPHAS)
    r, g, b, _ = colors[-0.2]
    assert b > r  # blue below zero
    r, g, b, _ = colors[0.5]
    assert r > b  # red above
    r, g, b, _ = colors[0.0]
    assert r == g == b  # neutral
    # darker further from zero, on both sides (luminance by rank)
    many = alpha_colors([-0.2, -0.1, -0.02, 0.02, 0.1, 0.2])
    lum = {a: 0.3 * c[0] + 0.6 * c[1] + 0.1 * c[2] for a, c in many.items()}
    assert lum[-0.2] < lum[-0.1] < lum[-0.02] and lum[0.2] < lum[0.1] < lum[0.02]
    # the curves use these colours; alpha = 0 dashed and beneath the deformed curves
    energy = _panels(fig)[(TITLES[0], "energy")]
    curves = [ln for ln in energy.get_lines() if ln.get_marker() == "o"]
    assert [to_rgba(ln.get_color()) for ln in curves] == [colors[a] for a in ALPHAS]
    assert curves[1].get_linestyle() == "--" and curves[1].get_zorder() < curves[0].get_zorder()


def test_energy_panel_carries_the_numbers_predictions_and_branch_points(data):
    fig = plot_store(data)
    panels = _panels(fig)
    for m, title in ((0, TITLES[0]), (1, TITLES[2])):
        ax = panels[(title, "energy")]
        curves = [ln for ln in ax.get_lines() if ln.get_marker() == "o"]
        for a, line in enumerate(curves):
            ok = data["status"][m, a, :, 0] == CONVERGED
            np.testing.assert_array_equal(line.get_ydata(), np.where(ok, data["energy"][m, a, :, 0], np.nan))
        # one set of predictions per deformed alpha (black crosses)
        assert len(_lines(ax, marker="x")) == 2
        # the branch point of alpha = 0.5: a diamond at (R_c, E(R_c)) on a dotted vertical
        # line at R_c, in the colour of its curve, between the last real radius and the next
        assert data.branch["status"][m, 2] == BP_FOUND
        Rc, Ec = data.branch["branch_radius"][m, 2], data.branch["energy"][m, 2]
        (diamond,) = _lines(ax, marker="D")
        assert list(diamond.get_xdata()) == [Rc] and list(diamond.get_ydata()) == [Ec]
        (vertical,) = [ln for ln in ax.get_lines() if ln.get_linestyle() == ":"]
        assert list(vertical.get_xdata()) == [Rc, Rc]
        assert diamond.get_color() == vertical.get_color() == curves[2].get_color()
        last = int(np.flatnonzero(data["status"][m, 2, :, 0] == CONVERGED)[0])
        assert data.radius[last - 1] < Rc <= data.radius[last]
        # the vertical range follows the deformed curves and the branch point, not alpha = 0
        deformed = np.concatenate([curves[0].get_ydata(), curves[2].get_ydata(), [Ec]])
        lo, hi = np.nanmin(deformed), np.nanmax(deformed)
        pad = 0.06 * (hi - lo)
        assert ax.get_ylim() == pytest.approx((lo - pad, hi + pad), rel=1e-12)
    # excited levels: the stored fold of alpha = -0.2 (/level_branch_points) is a diamond at
    # (R_c, E(R_c)) in place of the star the last real point gets without it (below)
    ax = panels[(TITLES[1], "energy")]
    assert data.levels["status"][0, 0, 1] == BP_FOUND
    (diamond,) = _lines(ax, marker="D")
    assert list(diamond.get_xdata()) == [data.levels["branch_radius"][0, 0, 1]]
    assert list(diamond.get_ydata()) == [data.levels["energy"][0, 0, 1]]
    assert not _lines(ax, marker="*")
    levels = {k: v.copy() for k, v in data.levels.items()}
    levels["status"][...] = -1  # a file without them (schema 4): the star, as before
    stars = _lines(_panels(plot_store(dataclasses.replace(data, levels=levels)))[(TITLES[1], "energy")],
                   marker="*")
    assert len(stars) == 1


def test_residual_panel_marks_exact_zeros(data):
    # the stored residuals, plus one set exactly to zero: it must be marked on the bottom
    # edge (a log axis cannot show it), not dropped
    values = {k: v.copy() for k, v in data.data.items()}
    checked = np.flatnonzero(values["flow_status"][0, 0, :, 0] == CONVERGED)
    values["flow_residual"][0, 0, checked[0], 0] = 0.0
    fig = plot_store(dataclasses.replace(data, data=values))
    ax = _panels(fig)[(TITLES[0], "residual")]
    assert ax.get_yscale() == "log"
    zeros = _lines(ax, marker="v")
    assert sum(len(ln.get_xdata()) for ln in zeros) == sum(
        int(np.count_nonzero((values["flow_status"][0, a, :, 0] == CONVERGED)
                             & (values["flow_residual"][0, a, :, 0] == 0))) for a in (0, 2))
    first = next(ln for ln in zeros if ln.get_color() == to_rgba(alpha_colors(ALPHAS)[-0.2]))
    assert data.radius[checked[0]] in list(first.get_xdata())
    assert list(first.get_ydata()) == [0.02] * len(first.get_xdata())  # axes fraction
    assert first.get_transform() == ax.get_xaxis_transform()
    fig_keys = [t.get_text() for lg in fig.legends for t in lg.get_texts()]
    assert LABELS["zero"] in fig_keys and LABELS["estimate"] in fig_keys
    # residual and estimate lines per deformed alpha, in the alpha colours
    solid = [ln for ln in ax.get_lines() if ln.get_marker() == "o"]
    dotted = [ln for ln in ax.get_lines() if ln.get_linestyle() == ":"]
    assert len(solid) == len(dotted) == 2
    est = data["error"][0, 0, :, 0] + data["flow_error"][0, 0, :, 0]
    ok = values["flow_status"][0, 0, :, 0] == CONVERGED
    np.testing.assert_array_equal(dotted[0].get_ydata(), np.where(ok, est, np.nan))


def test_gap_and_collapse_panels(data):
    fig = plot_store(data)
    panels = _panels(fig)
    # gap E_n - E_0 of the one-particle level per alpha, and its large-R limit N m_1 = 1
    ax = panels[(TITLES[1], "gap")]
    curves = [ln for ln in ax.get_lines() if ln.get_marker() == "o"]
    assert len(curves) == 3
    ok = (data["status"][0, 1, :, 1] == CONVERGED) & (data["status"][0, 1, :, 0] == CONVERGED)
    expected = np.where(ok, data["energy"][0, 1, :, 1] - data["energy"][0, 1, :, 0], np.nan)
    np.testing.assert_allclose(curves[1].get_ydata(), expected, rtol=0, atol=0)
    (threshold,) = [ln for ln in ax.get_lines() if ln.get_linestyle() == ":"]
    assert list(threshold.get_ydata()) == [1, 1]
    # at large R the gap approaches the mass (Luscher: corrections e^{-R}); here at R = 3
    assert expected[-1] == pytest.approx(1.0, abs=0.2)
    # collapse: every deformed point at (R~, E) (P = 0), on the undeformed curve E(R, 0)
    ax = panels[(TITLES[0], "collapse")]
    points = [ln for ln in ax.get_lines() if ln.get_linestyle() == "None"]
    assert len(points) == 2
    for line, a in zip(points, (0, 2)):
        ok = data["status"][0, a, :, 0] == CONVERGED
        np.testing.assert_array_equal(line.get_xdata(), data["flow_radius"][0, a, :, 0])
        np.testing.assert_allclose(line.get_ydata(), np.where(ok, data["energy"][0, a, :, 0], np.nan),
                                   rtol=1e-15, atol=0)
    (reference,) = [ln for ln in ax.get_lines() if ln.get_linestyle() == "--"]
    np.testing.assert_array_equal(reference.get_ydata(), data["energy"][0, 1, :, 0])
    # the collapse is real: the undeformed curve interpolated at R~ meets the moved points
    # (linear interpolation in log R on this coarse grid: to a few per cent)
    ok = np.isfinite(points[0].get_ydata()) & (points[0].get_xdata() > data.radius[0])
    interp = np.interp(np.log(points[0].get_xdata()[ok]), np.log(data.radius), reference.get_ydata())
    np.testing.assert_allclose(points[0].get_ydata()[ok], interp, rtol=0.05)


def test_branch_panel_with_hagedorn_axis(data):
    fig = plot_store(data)
    (ax,) = [ax for ax in fig.axes if ax.get_label() == "branch"]
    assert ax.get_xlabel() == LABELS["branch_x"] and ax.get_ylabel() == LABELS["branch_y"]
    assert [t.get_text() for t in ax.get_legend().get_texts()] == ["scaling Lee-Yang",
                                                                   "free Majorana fermion"]
    radii = [ln for ln in ax.get_lines() if ln.get_marker() in ("o", "s")]
    for m, line in enumerate(radii):
        assert list(line.get_xdata()) == [0.5]
        assert list(line.get_ydata()) == [data.branch["branch_radius"][m, 2]]
    (secondary,) = [c for c in ax.child_axes]
    assert secondary.get_ylabel() == LABELS["branch_t"]
    # T_H = 1/R_c: the right axis maps R_c to its inverse
    forward = secondary._functions[0]
    assert forward(np.array([0.5]))[0] == pytest.approx(2.0)


@pytest.mark.parametrize("widen", [1.0, 40.0])
def test_tick_labels_never_overlap(data, widen):
    fig = plot_store(data, size=(13.6, 7.8))  # the smallest size allowed: where collisions appear first
    # widen: a stored fold far below the scanned radii stretches the R axis (the ticks follow
    # the span drawn, not the radii: "0.010.0203" before)
    for ax in fig.axes:
        if ax.get_label() == "energy" and ax.get_xscale() == "log":
            lo, hi = ax.get_xlim()
            ax.set_xlim(lo / widen, hi)
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    for ax in fig.axes + [child for ax in fig.axes for child in ax.child_axes]:
        for axis in (ax.xaxis, ax.yaxis):
            boxes = [t.get_window_extent(renderer) for t in axis.get_ticklabels()
                     if t.get_visible() and t.get_text()]
            for a, b in zip(boxes, boxes[1:]):
                assert not a.overlaps(b), (ax.get_label(), [t.get_text() for t in axis.get_ticklabels()])


def test_choose_models_states_alphas_panels_and_size(data):
    fig = plot_store(data, models=["free-fermion"], states=["0"], alphas=[-0.2, 0.5],
                     panels=["energy", "gap"], size=(5, 4.8))
    assert tuple(fig.get_size_inches()) == (5, 4.8)
    panels = _panels(fig)
    assert set(panels) == {(TITLES[3], "energy"), (TITLES[3], "gap")}
    assert len([ln for ln in panels[(TITLES[3], "energy")].get_lines() if ln.get_marker() == "o"]) == 2
    keys = [lg for lg in fig.legends if lg.get_title().get_text() == LABELS["alpha_key"]]
    assert [t.get_text() for t in keys[0].get_texts()] == ["$-0.2$", "$0.5$"]
    # a level in any spelling; the branch panel alone
    fig = plot_store(data, states=["ground"], panels=["branch"])
    assert [ax.get_label() for ax in fig.axes] == ["branch"]
    for kwargs, word in ((dict(models=["ising-e8"]), "models"), (dict(states=["1/2,-1/2"]), "states"),
                         (dict(alphas=[0.1]), "alphas"), (dict(panels=["spectrum"]), "panels"),
                         (dict(size=(0, 3)), "size"), (dict(states=["0"], panels=["ceff"]), "nothing")):
        with pytest.raises(ValueError, match=word):
            plot_store(data, **kwargs)


def test_plot_command_writes_png_pdf_svg_and_refuses_bad_options(data, tmp_path, capsys):
    for name, magic in (("fig.png", b"\x89PNG"), ("sub/fig.pdf", b"%PDF"), ("fig.svg", b"<?xml")):
        out = tmp_path / name
        assert main(["plot", str(data.path), "-o", str(out), "--panel", "energy", "residual",
                     "--state", "ground", "--alpha", "-0.2", "0.5", "--size", "8,5"]) == 0
        assert out.read_bytes()[:len(magic)] == magic
    assert b"<path" in (tmp_path / "fig.svg").read_bytes()  # vector output
    capsys.readouterr()
    for args, word in ((["-o", str(tmp_path / "fig.jpeg")], "-o"),
                       (["-o", str(tmp_path / "x.png"), "--model", "ising-e8"], "--model"),
                       (["-o", str(tmp_path / "x.png"), "--state", "1/2,-1/2"], "--state"),
                       (["-o", str(tmp_path / "x.png"), "--alpha", "0.1"], "--alpha"),
                       (["-o", str(tmp_path / "x.png"), "--alpha", "nan"], "--alpha"),
                       (["-o", str(tmp_path / "x.png"), "--panel", "spectrum"], "--panel"),
                       (["-o", str(tmp_path / "x.png"), "--state", "0", "--panel", "ceff"], "nothing"),
                       (["-o", str(tmp_path / "x.png"), "--size", "8"], "--size"),
                       (["-o", str(tmp_path / "x.png"), "--dpi", "0"], "--dpi")):
        assert main(["plot", str(data.path), *args]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and word in err[0] and "Traceback" not in err[0]
    assert not (tmp_path / "x.png").exists()  # nothing written for a bad selection


def test_figure_without_flow_checks_or_branch_points(tmp_path):
    run = loads_run(RUN.replace("alphas = [-0.2, 0, 0.5]", "alphas = [0]").replace("count = 6", "count = 2")
                    .replace('states = ["ground", "0"]', ""), base_dir=tmp_path)
    run_scan(run, workers=1, log=io.StringIO())
    fig = plot_store(read_store(run.output))
    ax = _panels(fig)[("scaling Lee-Yang:\nground state", "residual")]
    assert ax.get_yscale() == "linear" and len(ax.get_lines()) == 0
    assert "no flow check" in ax.texts[0].get_text()
    (branch,) = [ax for ax in fig.axes if ax.get_label() == "branch"]
    assert "no branch points stored" in branch.texts[0].get_text()


def test_without_branch_points_the_last_real_point_is_marked(data):
    # a store whose branch points are not computed (scan.branch_points = false): the last real
    # point of the alpha = 0.5 curve (the branch point lies just below) gets an open star
    branch = {k: v.copy() for k, v in data.branch.items()}
    branch["status"][...] = -1
    fig = plot_store(dataclasses.replace(data, branch=branch))
    ax = _panels(fig)[(TITLES[0], "energy")]
    (star,) = _lines(ax, marker="*")
    first = int(np.flatnonzero(data["status"][0, 2, :, 0] == CONVERGED)[0])
    assert star.get_xdata()[0] == data.radius[first] > data.radius[0]
    assert not _lines(ax, marker="D")


def test_not_computed_store_plots(tmp_path):
    # a store created but not computed yet (every point not-computed): panels say so
    run = loads_run(RUN, base_dir=tmp_path)
    create_store(run.output, run)
    fig = plot_store(read_store(run.output))
    ax = _panels(fig)[(TITLES[0], "energy")]
    assert ax.texts and ax.texts[0].get_text() == "no converged point"


def test_plot_scan_from_a_file_and_from_a_dataset(data):
    from tba import open_scan

    by_path = plot_scan(data.path, panels=["energy"])
    ds = open_scan(data.path)
    by_dataset = plot_scan(ds.sel(alpha=[0.0, 0.5]), panels=["energy"])
    a = _panels(by_path)[(TITLES[0], "energy")]
    b = _panels(by_dataset)[(TITLES[0], "energy")]
    curves_a = [ln for ln in a.get_lines() if ln.get_marker() == "o"]
    curves_b = [ln for ln in b.get_lines() if ln.get_marker() == "o"]
    assert len(curves_a) == 3 and len(curves_b) == 2
    np.testing.assert_array_equal(curves_b[1].get_ydata(), curves_a[2].get_ydata())
    with pytest.raises(ValueError, match="dropped"):
        plot_scan(ds.sel(alpha=0.5))
    with pytest.raises(TypeError, match="source"):
        plot_scan(42)


def test_panel_names_are_the_documented_ones():
    assert PANELS == ("energy", "residual", "ceff", "gap", "collapse", "branch")
    assert math.isclose(alpha_colors([0.0])[0.0][0], 0.3)
