"""Text report of a scan store (``tba report``): progress, statuses, error estimates, flow
residuals and, on the alpha > 0 side, the last radius with a real solution."""

import math
from dataclasses import dataclass

import numpy as np

from tba.result import STATUS_CODES, Status
from tba.storage import FLOW_MEANINGS, STATUS_MEANINGS

CONVERGED = STATUS_CODES[Status.CONVERGED]
NO_REAL = STATUS_CODES[Status.NO_REAL_SOLUTION]


@dataclass
class LastRealPoint:
    """The smallest radius with a real (converged) solution of one curve with alpha > 0.

    ``bracketed`` is true when the next smaller radius has no real solution, so that the
    branch point lies between ``below`` and ``radius``."""

    model: int
    alpha: int
    state: int
    index: int
    radius: float
    energy: float
    bracketed: bool
    below: float = math.nan


def last_real_points(data):
    """One `LastRealPoint` per (model, alpha > 0, state) curve with a converged point."""
    out = []
    status = data["status"]
    for m in range(len(data.model)):
        for a, alpha in enumerate(data.alpha):
            if alpha <= 0:
                continue
            for s in range(len(data.state)):
                st = status[m, a, :, s]
                ok = np.flatnonzero(st == CONVERGED)
                if ok.size == 0:
                    continue
                i = int(ok[0])
                bracketed = i > 0 and st[i - 1] == NO_REAL
                out.append(LastRealPoint(m, a, s, i, float(data.radius[i]),
                                         float(data["energy"][m, a, i, s]), bool(bracketed),
                                         float(data.radius[i - 1]) if bracketed else math.nan))
    return out


def status_counts(codes, meanings):
    """{name: count} of the codes present, in the order of the legend."""
    out = {}
    for code, (name, _) in sorted(meanings.items()):
        n = int(np.count_nonzero(codes == code))
        if n:
            out[name] = n
    return out


def _g(x, spec=".3g"):
    return "-" if x is None or (isinstance(x, float) and math.isnan(x)) else format(x, spec)


def _numeric(text):
    try:
        float(text)
    except ValueError:
        return text == "-"
    return True


def _table(header, rows):
    """Columns of numbers right-aligned, of words left-aligned."""
    widths = [max(len(str(c)) for c in col) for col in zip(header, *rows)]
    right = [all(_numeric(str(r[i])) for r in rows) for i in range(len(header))]
    return "\n".join(("  " + "  ".join(str(c).rjust(w) if right[i] else str(c).ljust(w)
                                        for i, (c, w) in enumerate(zip(line, widths)))).rstrip()
                      for line in [header, *rows])


def format_report(data):
    """The report as text (``data``: a `tba.storage.StoreData`)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return _format_report(data)


def _format_report(data):
    run, attrs = data.run, data.attrs
    lines = []
    lines.append(f"{data.path}: {attrs.get('title', run.name)}")
    commit = str(attrs.get("git_commit", "unknown"))
    lines.append(f"  written by tba {attrs.get('package_version')} (commit {commit[:12]}), "
                 f"created {attrs.get('created')}, {len(data.history)} invocation(s) of tba run")
    R = data.radius
    lines.append(f"  {len(data.model)} model(s) x {len(data.alpha)} alpha(s) x {len(R)} radii "
                 f"({R.min():.4g} .. {R.max():.4g}) x {len(data.state)} state(s) = "
                 f"{run.n_points} points; tol {run.tol:g}")
    done = data.progress["done"].astype(bool)
    lines.append(f"  chunks: {int(done.sum())} of {done.size} done"
                 + (" (complete)" if done.all() else " (incomplete: run the same tba run again "
                                                      "to resume)"))
    lines.append("")

    status = data["status"]
    counts = status_counts(status, STATUS_MEANINGS)
    lines.append("points per status:")
    lines.append(_table(["status", "points"], [[k, v] for k, v in counts.items()]))
    lines.append("")

    ok = status == CONVERGED
    if ok.any():
        err = np.where(ok, data["error"], -np.inf)
        rel = np.where(ok, data["error"] / np.abs(data["energy"]), -np.inf)
        i = np.unravel_index(int(np.argmax(err)), err.shape)
        j = np.unravel_index(int(np.argmax(rel)), rel.shape)
        lines.append(f"worst error estimate: {err[i]:.3g} at {_where(data, i)}")
        lines.append(f"worst relative error estimate: {rel[j]:.3g} (tol {run.tol:g}) at {_where(data, j)}")
    else:
        lines.append("worst error estimate: - (no converged point)")
    lines.append("")

    lines.append("flow residual |E(R, alpha) - E_0(R + alpha E, 0)| (TTbar flow relation, exact for "
                 "the ground state):")
    rows = []
    flow = data["flow_status"]
    for m, label in enumerate(data.model):
        for a, alpha in enumerate(data.alpha):
            for s, state in enumerate(data.state):
                fs = flow[m, a, :, s]
                res = data["flow_residual"][m, a, :, s]
                checked = fs == CONVERGED
                est = (data["error"][m, a, :, s] + data["flow_error"][m, a, :, s])
                if checked.any():
                    worst = int(np.nanargmax(np.where(checked, res, -np.inf)))
                    row = [label, f"{alpha:g}", int(checked.sum()), _g(float(res[worst])),
                           _g(float(res[worst] / abs(data['energy'][m, a, worst, s]))),
                           _g(float(np.max(res[checked] / est[checked]))), f"{R[worst]:.4g}"]
                else:
                    why = ", ".join(status_counts(fs, FLOW_MEANINGS)) or "-"
                    row = [label, f"{alpha:g}", 0, "-", "-", "-", why]
                if len(data.state) > 1:
                    row.insert(2, state)
                rows.append(row)
    header = ["model", "alpha", "checked", "max residual", "relative", "max res/err", "at R"]
    if len(data.state) > 1:
        header.insert(2, "state")
    lines.append(_table(header, rows))
    lines.append("  (res/err: residual over the sum of the two error estimates; at R: where the "
                 "residual is largest, or why nothing was checked)")
    lines.append("")

    lines.append("branch points (alpha > 0): not computed by this schema; last real point per curve:")
    rows = []
    for p in last_real_points(data):
        where = (f"between {p.below:.4g} and {p.radius:.4g}" if p.bracketed
                 else "not bracketed: real down to the smallest radius")
        rows.append([data.model[p.model], f"{data.alpha[p.alpha]:g}", f"{p.radius:.6g}",
                     f"{p.energy:.12g}", where])
    if rows:
        lines.append(_table(["model", "alpha", "last real R", "E there", "branch point"], rows))
    else:
        lines.append("  (no alpha > 0 curve with a converged point)")
    return "\n".join(lines)


def _where(data, index):
    m, a, r, s = index
    state = f", {data.state[s]}" if len(data.state) > 1 else ""
    return f"{data.model[m]}, alpha = {data.alpha[a]:g}, R = {data.radius[r]:.6g}{state}"


__all__ = ["format_report", "last_real_points", "LastRealPoint", "status_counts"]
