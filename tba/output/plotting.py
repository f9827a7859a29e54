"""Figures of a scan store (``tba plot``), drawn with matplotlib's Agg canvas (no pyplot, no
global backend state).

One column per model and state (the states a model lacks are left out), three rows sharing
the radius axis:

1. E(R, alpha) per alpha (lines with dots), the flow prediction (E_0(R + alpha E, 0) for
   P = 0) overlaid (black crosses), and the stored branch point of each alpha > 0 curve (open
   diamond at (R_c, E(R_c)) on a vertical dotted line at R_c, in the curve's colour); where
   no branch point is stored, the last real point of a curve whose next smaller radius has
   no real solution (open star: the branch point lies just below);
2. the flow residual |E - E_0(R + alpha E, 0)| per alpha on a log scale (solid; residuals
   that are exactly zero cannot be shown there), with the sum of the two error estimates
   (dotted);
3. c_eff(R) = -6 R E / pi per alpha.
"""

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter

from tba.output.report import CONVERGED, last_real_points
from tba.store.hdf5 import BP_FOUND, NOT_AVAILABLE

LABELS = {
    "energy": r"energy $E(R,\alpha)$",
    "residual": r"flow residual $|E(R,\alpha) - E_\mathrm{flow}|$",
    "ceff": r"$c_\mathrm{eff} = -6RE/\pi$",
    "radius": r"radius $R$",
    "prediction": r"flow prediction from $E_0$",
    "last_real": "last real point (branch point below)",
    "branch_point": r"branch point $(R_c, E(R_c))$",
    "estimate": "error estimates (sum)",
}
FORMATS = ("png", "pdf", "svg")


def _alpha_label(alpha):
    return rf"$\alpha = {alpha:g}$"


def plot_store(data, states=None):
    """Build the figure of a `tba.store.hdf5.StoreData` for ``states`` (names; default all);
    returns a matplotlib `Figure`."""
    states = data.state if states is None else list(states)
    columns = [(m, data.state.index(st)) for m in range(len(data.model)) for st in states
               if not np.all(data["status"][m, :, :, data.state.index(st)] == NOT_AVAILABLE)]
    fig = Figure(figsize=(5.2 * max(len(columns), 1), 10.0), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(3, max(len(columns), 1), sharex="col", squeeze=False)
    R = np.asarray(data.radius, dtype=float)
    log_r = R.size > 1 and R.max() / R.min() >= 5
    for col, (m, s) in enumerate(columns):
        _plot_column(data, axes[:, col], m, s, R, log_r, several=len(data.state) > 1)
    title = data.attrs.get("title", data.run.name)
    if data.shard is not None:
        title += f" (shard {data.shard.label}: partial, its points only)"
    fig.suptitle(title, fontsize="medium")
    return fig


def _plot_column(data, axes, m, s, R, log_r, several):
    label = data.model[m]
    state = data.state[s]
    last = [p for p in last_real_points(data) if p.state == s and p.bracketed]
    found = (data.branch["status"] == BP_FOUND) if state == "ground" else \
        np.zeros((len(data.model), len(data.alpha)), dtype=bool)
    ax_e, ax_r, ax_c = axes
    ax_e.set_title(f"{label}, state {state}" if several else label)
    predicted = False
    for a, alpha in enumerate(data.alpha):
        color = f"C{a % 10}"
        ok = data["status"][m, a, :, s] == CONVERGED
        E = np.where(ok, data["energy"][m, a, :, s], np.nan)
        ax_e.plot(R, E, "o-", ms=3, lw=1.2, color=color, label=_alpha_label(alpha))
        ax_c.plot(R, -6 * R * E / np.pi, "o-", ms=3, lw=1.2, color=color,
                  label=_alpha_label(alpha))
        pred = data["flow_prediction"][m, a, :, s]
        if np.isfinite(pred).any():
            ax_e.plot(R, pred, ls="none", marker="x", ms=5, color="k", mew=0.8,
                      label=LABELS["prediction"] if not predicted else "_nolegend_")
            predicted = True
            res = data["flow_residual"][m, a, :, s]
            est = data["error"][m, a, :, s] + data["flow_error"][m, a, :, s]
            ax_r.plot(R, np.where(res > 0, res, np.nan), "o-", ms=3, lw=1.0, color=color,
                      label=_alpha_label(alpha))
            ax_r.plot(R, est, ":", lw=1.0, color=color, label="_nolegend_")
    marked = False
    for p in last:
        if p.model != m or found[m, p.alpha]:
            continue
        ax_e.plot([p.radius], [p.energy], ls="none", marker="*", ms=13, mfc="none",
                  mew=1.3, color=f"C{p.alpha % 10}",
                  label=LABELS["last_real"] if not marked else "_nolegend_")
        marked = True
    marked = False
    for a in np.flatnonzero(found[m]):
        color = f"C{a % 10}"
        Rc, Ec = float(data.branch["branch_radius"][m, a]), float(data.branch["energy"][m, a])
        ax_e.axvline(Rc, ls=":", lw=1.0, color=color, label="_nolegend_")
        # a one-point line with the dotted style: the legend shows marker and dotted line
        ax_e.plot([Rc], [Ec], ls=":", lw=1.0, marker="D", ms=6, mfc="none", mew=1.3,
                  color=color, label=LABELS["branch_point"] if not marked else "_nolegend_")
        marked = True
    ax_e.set_ylabel(LABELS["energy"])
    handles, labels = ax_e.get_legend_handles_labels()
    order = sorted(range(len(labels)), key=lambda i: not labels[i].startswith(r"$\alpha"))
    ax_e.legend([handles[i] for i in order], [labels[i] for i in order], fontsize="small")
    ax_r.set_ylabel(LABELS["residual"])
    positive = [ln for ln in ax_r.get_lines() if np.any(np.asarray(ln.get_ydata()) > 0)]
    if positive:
        ax_r.set_yscale("log")
        handles = [Line2D([], [], color="0.3", marker="o", ms=3, lw=1.0, label="residual"),
                   Line2D([], [], color="0.3", ls=":", lw=1.0, label=LABELS["estimate"])]
        ax_r.legend(handles=handles, fontsize="small")
    else:
        ax_r.text(0.5, 0.5, "no flow residuals\n(alpha = 0, flow_check off, or no energies)",
                  transform=ax_r.transAxes, ha="center", va="center", fontsize="small")
    ax_c.set_ylabel(LABELS["ceff"])
    ax_c.set_xlabel(LABELS["radius"])
    ax_c.legend(fontsize="small")
    for ax in (ax_e, ax_r, ax_c):
        if log_r:
            ax.set_xscale("log")
            plain = FuncFormatter(lambda x, _: f"{x:g}")
            ax.xaxis.set_major_formatter(plain)
            ax.xaxis.set_minor_formatter(FuncFormatter(
                lambda x, _: f"{x:g}" if f"{x:.0e}"[0] in "235" else ""))
        ax.grid(True, alpha=0.3)


def save_figure(data, path):
    """Draw and write the figure; the format follows the extension (png, pdf or svg)."""
    fig = plot_store(data)
    fig.savefig(path, dpi=120)
    return fig
