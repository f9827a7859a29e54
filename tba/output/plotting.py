"""Figures of a scan (``tba plot``, `tba.plot_scan`), drawn on matplotlib's Agg canvas (no
pyplot, no global backend state).

One column per (model, level) that the model has, one row per panel, the radius axis shared
by the rows that use it. Units: R in 1/m_1, energies in m_1 (m_1 the lightest mass), alpha in
1/m_1^2; E is the TBA energy of the level without the bulk term f R. Colours stand for alpha
throughout: a diverging scale in the order of alpha, blue for alpha < 0, red for alpha > 0,
darker further from 0, and alpha = 0 neutral (grey, dashed), with one key for the figure.
Panels (``PANELS``):

``energy``
    E(R, alpha) per alpha; the flow prediction E_flow (from the same level undeformed at
    R~ = sqrt((R + alpha E)^2 - (alpha P)^2)) as black crosses; the stored branch point of the
    ground state for alpha > 0 as a diamond at (R_c, E(R_c)) on a dotted vertical line at R_c;
    where none is stored, the last real point of a curve whose next radius down has no real
    solution as a star (the branch point lies just below). The vertical range follows the
    deformed curves, so that the alpha = 0 curve (-pi c / 6R at small R) does not flatten them.
``residual``
    |E - E_flow| per deformed alpha on a log scale, with the sum of the two error estimates
    (dotted). Residuals that are exactly 0 (common: both energies agree to the last bit) are
    drawn as triangles on the bottom edge, never silently dropped.
``ceff``
    c_eff(R) = -6 R E_0 / pi, for the ground state only.
``gap``
    E_n(R, alpha) - E_0(R, alpha), for excited levels (it needs the ground state in the scan),
    with the number of particles times m_1, its limit at large R.
``collapse``
    The data collapse of the flow: each deformed point is moved to the effective radius R~
    and to the energy the undeformed level must have there, E_n(R~, 0) = (E R~ - alpha P^2 R /
    R~) / (R + alpha E) (for P = 0, simply (R + alpha E, E)); if the flow holds, every alpha
    falls on the undeformed curve E_n(R, 0) (drawn when alpha = 0 is in the scan).
``branch``
    R_c(alpha) of the ground state per model (left axis) and the Hagedorn temperature
    T_H = 1/R_c (right axis), next to the first rows.

``ceff`` and ``gap`` share a row: the ground state's column shows c_eff, an excited level's
the gap.
"""

import math
import re
import textwrap

import numpy as np
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

from tba.output.labels import (FORMATS, PANELS, column_title, is_massless, model_title, number,
                               particles)
from tba.output.report import CONVERGED, last_real_points
from tba.solvers.levels import GROUND, level_name
from tba.store.hdf5 import BP_FOUND, NOT_AVAILABLE

#: rows of the panel grid: ceff (ground state) and gap (excited levels) share the third
ROWS = (("energy",), ("residual",), ("ceff", "gap"), ("collapse",))
#: inches per panel column and row, and of the column of the branch panel
COLUMN_WIDTH, ROW_HEIGHT, SIDE_WIDTH = 4.0, 2.7, 3.4
#: the smallest sizes (inches) at which panels, titles and keys still fit
MIN_COLUMN, MIN_ROW, MIN_SIDE, MIN_EXTRA = 2.4, 1.5, 4.0, 1.8
#: about the width of the alpha key on the right
KEY_WIDTH = 0.9
NEUTRAL = (0.3, 0.3, 0.3, 1.0)

LABELS = {
    "energy": r"$E(R,\alpha)$ [$m_1$]",
    "residual": r"$|E - E_\mathrm{flow}|$ [$m_1$]",
    "ceff": r"$c_\mathrm{eff} = -6RE_0/\pi$",
    "gap": r"gap $E_n - E_0$ [$m_1$]",
    "radius": r"$R$ [$m_1^{-1}$]",
    "collapse_x": r"$\tilde R = R + \alpha E$ [$m_1^{-1}$]",
    "collapse_x_moving": r"$\tilde R = \sqrt{(R+\alpha E)^2 - (\alpha P)^2}$ [$m_1^{-1}$]",
    "collapse_y": r"$E(R,\alpha)$ at $\tilde R$ [$m_1$]",
    "collapse_y_moving": r"$(E\tilde R - \alpha P^2R/\tilde R)/(R+\alpha E)$ [$m_1$]",
    "branch_x": r"$\alpha$ [$m_1^{-2}$]",
    "branch_y": r"branch radius $R_c$ [$m_1^{-1}$]",
    "branch_t": r"Hagedorn temperature $T_H = 1/R_c$ [$m_1$]",
    "alpha_key": r"$\alpha$ [$m_1^{-2}$]",
    "prediction": r"flow prediction $E_\mathrm{flow}$ from $E_n(\tilde R, 0)$",
    "branch_point": r"branch point $(R_c, E(R_c))$",
    "last_real": "last real point (branch point below)",
    "estimate": "error estimates (sum)",
    "zero": "residual exactly 0",
    "threshold": r"$N m_1$ ($R \to \infty$, $N$ particles)",
    "undeformed": r"$E_n(\tilde R, 0)$ solved at $\tilde R$ (flow check)",
}
NOTE = ("E: energy of the level on a circle of circumference R, without the bulk term f R; "
        "units of the lightest mass m₁")


def alpha_colors(alphas):
    """{alpha: RGBA}: a diverging scale in the order of alpha (blues below 0, reds above,
    darker further from 0, spaced by rank so that neighbours differ), alpha = 0 neutral."""
    out = {}
    negative = sorted((a for a in alphas if a < 0), reverse=True)
    positive = sorted(a for a in alphas if a > 0)
    for side, name in ((negative, "Blues"), (positive, "Reds")):
        cmap = colormaps[name]
        for i, a in enumerate(side):
            out[a] = cmap(0.45 + 0.5 * (i + 1) / len(side))
    for a in alphas:
        if a == 0:
            out[a] = NEUTRAL
    return out


def _style(alpha):
    """Line style of a curve: alpha = 0 thin, dashed and beneath the deformed curves."""
    if alpha == 0:
        return {"ls": "--", "lw": 1.0, "zorder": 1.5}
    return {"ls": "-", "lw": 1.3, "zorder": 2.0}


class _Selection:
    """Which models, levels, alphas and panels a figure shows (indices into the store)."""

    def __init__(self, data, models=None, states=None, alphas=None, panels=None):
        self.models = _pick_models(data, _listed(models))
        self.alphas = _pick_alphas(data, _listed(alphas))
        self.panels = _pick_panels(_listed(panels))
        states = list(data.state) if states is None else [_state(data, s) for s in _listed(states)]
        self.ground = data.state.index(GROUND) if GROUND in data.state else None
        self.columns = []
        for m in self.models:
            for name in states:
                s = data.state.index(name)
                if np.all(data["status"][m, :, :, s] == NOT_AVAILABLE):
                    continue  # the model does not have this level
                kinds = {"energy", "residual", "collapse"} | ({"ceff"} if name == GROUND else {"gap"})
                if kinds & set(self.panels):
                    self.columns.append((m, s))
        if not self.columns and not self.side:
            raise ValueError("nothing to plot: no model of the selection has the selected levels "
                             "and panels")
        self.rows = [row for row in ROWS
                     if any(_kind(data, s, row) in self.panels for _, s in self.columns)]

    @property
    def side(self):
        return "branch" in self.panels


def _listed(wanted):
    """A selection as a list (None: everything); a single name or number is a list of one."""
    if wanted is None or isinstance(wanted, (list, tuple)):
        return wanted
    return [wanted] if isinstance(wanted, (str, int, float)) else list(wanted)


def _kind(data, s, row):
    """The panel of ``row`` for the level of column ``s`` (ceff or gap for the third row)."""
    if row != ("ceff", "gap"):
        return row[0]
    return "ceff" if data.state[s] == GROUND else "gap"


def _pick_models(data, wanted):
    if wanted is None:
        return list(range(len(data.model)))
    out = []
    for w in wanted:
        found = [m for m in range(len(data.model)) if w in (data.model[m], data.model_name[m])]
        if not found:
            raise ValueError(f"models: no model {w!r} in the scan (it has {', '.join(data.model)})")
        out += [m for m in found if m not in out]
    return out


def _pick_alphas(data, wanted):
    alphas = np.asarray(data.alpha, dtype=float)
    if wanted is None:
        return list(range(alphas.size))
    out = []
    for w in wanted:
        try:
            w = float(w)
        except (TypeError, ValueError):
            raise ValueError(f"alphas: expected numbers, got {w!r}") from None
        found = np.flatnonzero(np.isclose(alphas, w, rtol=1e-12, atol=1e-15))
        if not found.size:
            raise ValueError(f"alphas: no alpha = {number(w)} in the scan (it has "
                             f"{', '.join(number(a) for a in alphas)})")
        if int(found[0]) not in out:
            out.append(int(found[0]))
    return sorted(out)


def _pick_panels(wanted):
    if wanted is None:
        return list(PANELS)
    wanted = list(wanted)
    for p in wanted:
        if p not in PANELS:
            raise ValueError(f"panels: unknown panel {p!r} (choose from {', '.join(PANELS)})")
    return [p for p in PANELS if p in wanted]


def _state(data, text):
    try:
        name = level_name(text)
    except (TypeError, ValueError):
        name = text
    if name not in data.state:
        raise ValueError(f"states: no state {text!r} in the scan (it has {', '.join(data.state)})")
    return name


def plot_store(data, *, models=None, states=None, alphas=None, panels=None, size=None):
    """The figure of a `tba.store.hdf5.StoreData` as a matplotlib `Figure`.

    ``models``: labels ("sinh-gordon B=0.6") or names ("lee-yang") to show (default all);
    ``states``: level names ("ground", "-1/2,1/2"; default all); ``alphas``: values among the
    scan's (default all); ``panels``: names from `PANELS` (default all); ``size``: (width,
    height) in inches (default: from the number of columns and rows). ValueError names the
    argument that selects nothing the scan has.
    """
    sel = _Selection(data, models, states, alphas, panels)
    n_cols, n_rows = len(sel.columns), max(len(sel.rows), 1)
    width = COLUMN_WIDTH * max(n_cols, 1) + (SIDE_WIDTH if sel.side else 0.0)
    height = ROW_HEIGHT * n_rows + 1.6
    if size is not None:
        width, height = _size(size, n_cols, n_rows, sel.side)
    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    alphas = [float(data.alpha[a]) for a in sel.alphas]
    colors = alpha_colors(alphas)
    main, side = fig, None
    side_width = width * SIDE_WIDTH / (COLUMN_WIDTH * n_cols + SIDE_WIDTH) if sel.side else 0.0
    if sel.side and sel.columns:
        main, side = fig.subfigures(1, 2, width_ratios=[COLUMN_WIDTH * n_cols, SIDE_WIDTH])
    elif sel.side:
        side = fig
    used = set()
    if sel.columns:
        grid = main.add_gridspec(n_rows, n_cols)
        for col, (m, s) in enumerate(sel.columns):
            radius_axes = None
            for row, kinds in enumerate(sel.rows):
                kind = _kind(data, s, kinds)
                if kind not in sel.panels:
                    continue
                ax = main.add_subplot(grid[row, col],
                                      sharex=radius_axes if kind != "collapse" else None)
                if kind != "collapse" and radius_axes is None:
                    radius_axes = ax
                used |= _PANEL[kind](ax, data, sel, m, s, colors)
                if row == 0:
                    ax.set_title(_column_title(data, m, s, (width - side_width - KEY_WIDTH) / n_cols - 0.5),
                                 fontsize="medium")
            _radius_labels(main, col)
    if side is not None:
        # the branch panel takes the upper part of its column (up to two panel rows)
        rows = min(2, n_rows) if sel.columns else 1
        grid = side.add_gridspec(max(n_rows, 1), 1)
        _branch_panel(side.add_subplot(grid[0:rows, 0]), data, sel)
    _keys(fig, alphas, colors, used, width)
    title = data.attrs.get("title", data.run.name)
    if data.shard is not None:
        title += f" (shard {data.shard.label}: partial, its points only)"
    fig.suptitle(_wrap(title, width - 1.5), fontsize="medium")
    return fig


def _column_title(data, m, s, inches):
    """The model on one line, the level on the next (each wrapped to the column's width,
    never inside "I = (...)" or "P = ...")."""
    model, _, level = column_title(data.model_name[m], data.model_coupling[m],
                                   data.state[s]).partition(": ")
    keep = re.sub(r"[IP] = (\([^)]*\)|\S+)", lambda g: g[0].replace(" ", "\xa0"), level)
    return f"{_wrap(model + ':', inches)}\n{_wrap(keep, inches).replace(chr(0xa0), ' ')}"


def _wrap(text, inches):
    """Lines that fit ``inches`` at the size of titles (about 13 characters per inch)."""
    return textwrap.fill(text, width=max(int(13 * inches), 20))


def _size(size, n_cols, n_rows, side):
    """(width, height) in inches, refused when the panels would not fit (matplotlib would
    shrink them to nothing)."""
    try:
        width, height = (float(x) for x in size)
    except (TypeError, ValueError):
        raise ValueError(f"size: expected (width, height) in inches, got {size!r}") from None
    min_width = MIN_COLUMN * n_cols + (MIN_SIDE if side else 0.0)
    min_height = MIN_ROW * n_rows + MIN_EXTRA
    if not (min_width <= width <= 100 and min_height <= height <= 100):
        raise ValueError(f"size: {number(width)} x {number(height)} inches does not fit {n_cols} "
                         f"column(s) and {n_rows} row(s) of panels: give at least "
                         f"{min_width:.3g} x {min_height:.3g} (at most 100 x 100)")
    return width, height


def _radius_labels(fig, col):
    """x labels only under the lowest panel of each radius-sharing group of a column."""
    axes = [ax for ax in fig.axes if ax.get_subplotspec() is not None
            and ax.get_subplotspec().colspan.start == col]
    shared = [ax for ax in axes if ax.get_label() != "collapse"]
    if shared:
        lowest = max(shared, key=lambda ax: ax.get_subplotspec().rowspan.start)
        for ax in shared:
            if ax is not lowest:
                ax.tick_params(labelbottom=False)
        lowest.set_xlabel(LABELS["radius"])


# -- panels: each returns the set of symbol-key entries it drew ------------------------------

def _curve(data, name, m, a, s):
    """Values of a variable along R where the point converged (NaN elsewhere)."""
    ok = data["status"][m, a, :, s] == CONVERGED
    return np.where(ok, data[name][m, a, :, s], np.nan)


def _energy_panel(ax, data, sel, m, s, colors):
    R = np.asarray(data.radius, dtype=float)
    used, deformed = set(), []
    for a in sel.alphas:
        alpha = float(data.alpha[a])
        E = _curve(data, "energy", m, a, s)
        ax.plot(R, E, marker="o", ms=2.5, color=colors[alpha], **_style(alpha))
        if alpha != 0:
            deformed.append(E)
            pred = np.where(data["flow_status"][m, a, :, s] == CONVERGED,
                            data["flow_prediction"][m, a, :, s], np.nan)
            if np.isfinite(pred).any():
                ax.plot(R, pred, ls="none", marker="x", ms=3.5, mew=0.7, color="k", zorder=3)
                used.add("prediction")
    # the stored branch points: the ground state's (/branch_points), an excited level's fold
    # (/level_branch_points, absent from files before schema 5: then the scan's bracket below)
    ground = data.state[s] == GROUND
    arrays = data.branch if ground else (data.levels or None)
    found = np.zeros(len(data.alpha), dtype=bool)
    if arrays is not None:
        found = np.array([int(arrays["status"][(m, a) if ground else (m, a, s)]) == BP_FOUND
                          for a in range(len(data.alpha))], dtype=bool)
    if found.any():
        for a in sel.alphas:
            if found[a]:
                alpha = float(data.alpha[a])
                key = (m, a) if ground else (m, a, s)
                Rc, Ec = float(arrays["branch_radius"][key]), float(arrays["energy"][key])
                ax.axvline(Rc, ls=":", lw=1.0, color=colors[alpha], zorder=1)
                ax.plot([Rc], [Ec], ls="none", marker="D", ms=5, mfc="none", mew=1.2,
                        color=colors[alpha], zorder=3)
                deformed.append(np.array([Ec]))
                used.add("branch_point")
    for p in last_real_points(data):
        if p.model == m and p.state == s and p.bracketed and p.alpha in sel.alphas and not found[p.alpha]:
            ax.plot([p.radius], [p.energy], ls="none", marker="*", ms=10, mfc="none", mew=1.1,
                    color=colors[float(data.alpha[p.alpha])], zorder=3)
            used.add("last_real")
    _limits_from(ax, deformed)
    _radius_axis(ax, R)
    ax.set_ylabel(LABELS["energy"])
    ax.set_label("energy")
    _no_data(ax, deformed or [_curve(data, "energy", m, a, s) for a in sel.alphas])
    return used


def _limits_from(ax, curves, axis="y", log=False):
    """The range of the deformed curves (with a margin; in log x for a log axis), when there
    are any."""
    values = np.concatenate([np.ravel(c) for c in curves]) if curves else np.array([])
    values = values[np.isfinite(values) & ((values > 0) if log else True)]
    if not values.size:
        return
    if log:
        values = np.log(values)
    lo, hi = values.min(), values.max()
    pad = 0.06 * (hi - lo) if hi > lo else 0.05 * max(abs(hi), 1e-3)
    lo, hi = lo - pad, hi + pad
    if log:
        lo, hi = math.exp(lo), math.exp(hi)
    (ax.set_ylim if axis == "y" else ax.set_xlim)(lo, hi)


def _no_data(ax, curves):
    if not any(np.isfinite(c).any() for c in curves):
        ax.text(0.5, 0.5, "no converged point", transform=ax.transAxes, ha="center",
                va="center", fontsize="small")


def _residual_panel(ax, data, sel, m, s, colors):
    R = np.asarray(data.radius, dtype=float)
    used, any_positive, any_checked = set(), False, False
    bottom = ax.get_xaxis_transform()  # x in data, y in axes fraction
    for a in sel.alphas:
        alpha = float(data.alpha[a])
        checked = data["flow_status"][m, a, :, s] == CONVERGED
        if alpha == 0 or not checked.any():
            continue
        any_checked = True
        res = np.where(checked, data["flow_residual"][m, a, :, s], np.nan)
        est = np.where(checked, data["error"][m, a, :, s] + data["flow_error"][m, a, :, s], np.nan)
        positive = res > 0
        any_positive |= bool(positive.any())
        ax.plot(R, np.where(positive, res, np.nan), marker="o", ms=2.5, lw=1.0, color=colors[alpha])
        ax.plot(R, est, ls=":", lw=1.0, color=colors[alpha])
        used.add("estimate")
        zero = checked & (res == 0)
        if zero.any():
            ax.plot(R[zero], np.full(zero.sum(), 0.02), ls="none", marker="v", ms=4,
                    color=colors[alpha], transform=bottom, clip_on=False, zorder=3)
            used.add("zero")
    if any_positive:
        ax.set_yscale("log")
        ax.yaxis.set_major_locator(LogLocator(numticks=6))
        ax.yaxis.set_minor_formatter(NullFormatter())
    elif not any_checked:
        ax.text(0.5, 0.5, "no flow check\n(alpha = 0, flow_check off, higher spins,\nor no energies)",
                transform=ax.transAxes, ha="center", va="center", fontsize="small")
    _radius_axis(ax, R)
    ax.set_ylabel(LABELS["residual"])
    ax.set_label("residual")
    return used


def _ceff_panel(ax, data, sel, m, s, colors):
    R = np.asarray(data.radius, dtype=float)
    curves = []
    for a in sel.alphas:
        alpha = float(data.alpha[a])
        c = -6 * R * _curve(data, "energy", m, a, s) / math.pi
        curves.append(c)
        ax.plot(R, c, marker="o", ms=2.5, color=colors[alpha], **_style(alpha))
    _radius_axis(ax, R)
    ax.set_ylabel(LABELS["ceff"])
    ax.set_label("ceff")
    _no_data(ax, curves)
    return set()


def _gap_panel(ax, data, sel, m, s, colors):
    R = np.asarray(data.radius, dtype=float)
    _radius_axis(ax, R)
    ax.set_ylabel(LABELS["gap"])
    ax.set_label("gap")
    if sel.ground is None:
        ax.text(0.5, 0.5, "the gap needs the ground state in the scan", transform=ax.transAxes,
                ha="center", va="center", fontsize="small")
        return set()
    curves = []
    for a in sel.alphas:
        alpha = float(data.alpha[a])
        gap = _curve(data, "energy", m, a, s) - _curve(data, "energy", m, a, sel.ground)
        curves.append(gap)
        ax.plot(R, gap, marker="o", ms=2.5, color=colors[alpha], **_style(alpha))
    _no_data(ax, curves)
    if is_massless(data.model_name[m]):  # a conformal gap 2 pi (D + Dbar) / R: no threshold
        return set()
    ax.axhline(particles(data.state[s]), ls=":", lw=1.0, color="0.5", zorder=1)
    return {"threshold"}


def _collapse_panel(ax, data, sel, m, s, colors):
    """Deformed points at (R~, E_n(R~, 0) implied by E) on the undeformed curve E_n(R, 0): the
    scan's alpha = 0 curve, or else the undeformed solves of the flow check at R~."""
    R = np.asarray(data.radius, dtype=float)
    moving, used = False, set()
    reference_x, reference_y, points_x, points_y = [], [], [], []
    for a in sel.alphas:
        alpha = float(data.alpha[a])
        if alpha == 0:
            continue
        E, P = _curve(data, "energy", m, a, s), _curve(data, "momentum", m, a, s)
        Rt = data["flow_radius"][m, a, :, s]
        checked = data["flow_status"][m, a, :, s] == CONVERGED
        pred = np.where(checked, data["flow_prediction"][m, a, :, s], np.nan)
        y = _undeformed(E, E, P, R, Rt, alpha)
        ax.plot(Rt, y, ls="none", marker="o", ms=3.5, mfc="none", mew=1.0, color=colors[alpha],
                zorder=3)
        points_x.append(Rt)
        points_y.append(y)
        reference_x.append(Rt[checked])
        reference_y.append(_undeformed(pred, E, P, R, Rt, alpha)[checked])
        moving |= bool(np.any(np.abs(P[np.isfinite(P)]) > 1e-9))
    zero = [a for a in range(len(data.alpha)) if data.alpha[a] == 0]
    if zero:  # the undeformed curve, whether or not alpha = 0 is among the selected alphas
        ax.plot(R, _curve(data, "energy", m, zero[0], s), color=NEUTRAL, **_style(0.0))
    elif reference_x:
        x, y = np.concatenate(reference_x), np.concatenate(reference_y)
        order = np.argsort(x)
        ax.plot(x[order], y[order], color=NEUTRAL, **_style(0.0))
        used.add("undeformed")
    _radius_axis(ax, R)
    _limits_from(ax, points_y)  # the reference curve may run further: the points set the view
    _limits_from(ax, points_x, axis="x", log=ax.get_xscale() == "log")
    ax.set_xlabel(LABELS["collapse_x_moving" if moving else "collapse_x"])
    ax.set_ylabel(LABELS["collapse_y_moving" if moving else "collapse_y"])
    ax.set_label("collapse")
    return used


def _undeformed(value, E, P, R, Rt, alpha):
    """The undeformed energy at R~ that a deformed energy ``value`` implies (the boosted flow
    relation solved for E_n(R~, 0)): (value R~ - alpha P^2 R / R~) / (R + alpha E)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return (value * Rt - alpha * P * P * R / Rt) / (R + alpha * E)


_PANEL = {"energy": _energy_panel, "residual": _residual_panel, "ceff": _ceff_panel,
          "gap": _gap_panel, "collapse": _collapse_panel}

_MARKERS = ("o", "s", "^", "v", "D", "P", "X", "<", ">")


def _branch_panel(ax, data, sel):
    """R_c(alpha) per model for the ground state, T_H = 1/R_c on the right axis."""
    alphas = np.asarray(data.alpha, dtype=float)
    shown = False
    for i, m in enumerate(sel.models):
        found = (data.branch["status"][m] == BP_FOUND) & np.isin(np.arange(alphas.size), sel.alphas)
        if not found.any():
            continue
        shown = True
        ax.errorbar(alphas[found], data.branch["branch_radius"][m][found],
                    yerr=data.branch["branch_radius_error"][m][found], color="0.15", lw=1.0,
                    marker=_MARKERS[i % len(_MARKERS)], ms=4.5, mfc="white", capsize=2,
                    label=model_title(data.model_name[m], data.model_coupling[m]))
    ax.set_xlabel(LABELS["branch_x"])
    ax.set_ylabel(LABELS["branch_y"])
    ax.set_label("branch")
    ax.grid(True, alpha=0.3)
    if not shown:
        ax.text(0.5, 0.5, "no branch points stored\n(alpha > 0, TTbar only, scan.branch_points)",
                transform=ax.transAxes, ha="center", va="center", fontsize="small")
        return
    radii = data.branch["branch_radius"][sel.models][:, sel.alphas]
    radii = radii[np.isfinite(radii)]
    lo, hi = radii.min(), radii.max()
    ax.set_ylim(0.8 * lo, 1.1 * hi if hi > lo else 1.25 * hi)  # R_c > 0: T_H stays finite
    ax.set_xlim(0, 1.1 * alphas[sel.alphas].max())
    ax.ticklabel_format(useOffset=False)
    inverse = (lambda x: 1 / np.where(x > 0, x, np.nan))  # noqa: E731 (T_H = 1/R_c both ways)
    ax.secondary_yaxis("right", functions=(inverse, inverse)).set_ylabel(LABELS["branch_t"])
    ax.legend(fontsize="x-small", loc="best", title="ground state", title_fontsize="x-small")


class _RadiusTicks(LogLocator):
    """Log ticks whose subdivision follows the span the axis shows when it is drawn (a
    stored fold outside the scanned radii widens it): decades only beyond 2.5 decades,
    1-2-5 below, 1-2-3-5 below one decade, so that the labels cannot collide."""

    def tick_values(self, vmin, vmax):
        lo, hi = sorted((vmin, vmax))
        decades = math.log10(hi / lo) if lo > 0 else math.inf
        self.set_params(subs=(1.0,) if decades > 2.5 else (1.0, 2.0, 5.0) if decades > 1.0
                        else (1.0, 2.0, 3.0, 5.0))
        return super().tick_values(vmin, vmax)


def _radius_axis(ax, R):
    """Log scale when the radii span a factor 5 or more, with `_RadiusTicks`."""
    ax.grid(True, alpha=0.3)
    if not (R.size > 1 and R.max() / R.min() >= 5):
        return
    ax.set_xscale("log")
    ax.xaxis.set_major_locator(_RadiusTicks())
    ax.xaxis.set_major_formatter(FuncFormatter(lambda x, _: f"{x:g}"))
    ax.xaxis.set_minor_locator(LogLocator(subs=np.arange(2, 10)))
    ax.xaxis.set_minor_formatter(NullFormatter())


def _keys(fig, alphas, colors, used, width):
    """One alpha key for the figure (on the right), and at the bottom the key of the symbols
    under what E means (`NOTE`)."""
    handles = [Line2D([], [], color=colors[a], marker="o", ms=3, **{k: v for k, v in _style(a).items()
                                                                     if k != "zorder"})
               for a in alphas]
    fig.legend(handles, [f"${number(a)}$" for a in alphas], loc="outside right upper",
               title=LABELS["alpha_key"], fontsize="small", title_fontsize="small", frameon=False)
    symbols = {
        "prediction": Line2D([], [], ls="none", marker="x", ms=3.5, mew=0.7, color="k"),
        "branch_point": Line2D([], [], ls=":", lw=1.0, marker="D", ms=5, mfc="none", color="0.3"),
        "last_real": Line2D([], [], ls="none", marker="*", ms=9, mfc="none", color="0.3"),
        "estimate": Line2D([], [], ls=":", lw=1.0, color="0.3"),
        "zero": Line2D([], [], ls="none", marker="v", ms=4, color="0.3"),
        "threshold": Line2D([], [], ls=":", lw=1.0, color="0.5"),
        "undeformed": Line2D([], [], color=NEUTRAL, **{k: v for k, v in _style(0.0).items()
                                                        if k != "zorder"}),
    }
    keys = [k for k in symbols if k in used]
    fig.legend([symbols[k] for k in keys], [LABELS[k] for k in keys], loc="outside lower center",
               ncols=max(min(len(keys), 3, int(width // 3.2)), 1), fontsize="small",
               title=_wrap(NOTE, width - 0.5), title_fontsize="small", frameon=False)


def plot_scan(source, **options):
    """The figure of a scan: ``source`` is a file written by ``tba run`` (path), an xarray
    Dataset of `tba.open_scan` / `tba.scan` (selected with lists, so that every dimension
    remains), or a `tba.store.hdf5.StoreData`. ``options`` as for `plot_store`."""
    from pathlib import Path

    from tba.store.hdf5 import StoreData, read_store

    if isinstance(source, (str, Path)):
        data = read_store(source)
    elif isinstance(source, StoreData):
        data = source
    elif hasattr(source, "data_vars"):
        from tba.output.dataset import store_data

        data = store_data(source)
    else:
        raise TypeError(f"source: expected a scan file, a Dataset or StoreData, got "
                        f"{type(source).__name__}")
    return plot_store(data, **options)


def save_figure(data, path, dpi=150, **options):
    """Draw and write the figure; the format follows the extension (png, pdf or svg; pdf and
    svg are vector graphics, ``dpi`` applies to png)."""
    fig = plot_store(data, **options)
    fig.savefig(path, dpi=dpi)
    return fig
