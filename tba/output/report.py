"""Text report of a scan store (``tba report``): progress, statuses, error estimates, flow
residuals and, on the alpha > 0 side, the ground state's branch points R_c (with E(R_c) and
the Hagedorn temperature 1/R_c) checked against the scan: the last radius with a real
solution must lie at or above R_c, and the next radius down, when it has no real solution,
below. The excited levels' branch points (their folds in R, /level_branch_points) are shown
and checked the same way; a file written before they were stored (schema < 5) shows the
bracket between two scan radii instead."""

import math
from dataclasses import dataclass

import numpy as np

from tba.output.labels import RADIUS_FORMAT, VALUE_FORMAT, is_massless, level_title, number
from tba.solvers.levels import GROUND
from tba.solvers.result import STATUS_CODES, Status
from tba.store.hdf5 import (BP_FOUND, BP_NONE, BRANCH_MEANINGS, FLOW_MEANINGS, NOT_AVAILABLE,
                         NOT_COMPUTED, STATUS_MEANINGS)

CONVERGED = STATUS_CODES[Status.CONVERGED]
NO_REAL = STATUS_CODES[Status.NO_REAL_SOLUTION]


@dataclass
class LastRealPoint:
    """The smallest radius with a real (converged) solution of one curve with alpha != 0.

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
    """One `LastRealPoint` per (model, alpha != 0, state) curve with a converged point (the
    ground state meets its branch point for alpha > 0, positive excited levels for alpha < 0)."""
    out = []
    status = data["status"]
    for m in range(len(data.model)):
        for a, alpha in enumerate(data.alpha):
            if alpha == 0:
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


@dataclass
class BranchCheck:
    """The stored branch point of one (model, alpha > 0) curve of the ground state (or of
    one (model, alpha, excited level): ``state``), and whether the scan agrees with it.

    ``consistent`` is True when every check that applies holds (the last real radius is
    >= R_c; the next radius down, if computed and without a real solution, is < R_c; both
    within ``radius_error``), False when one fails, None when nothing could be checked;
    ``why`` says what was (not) checked."""

    model: int
    alpha: int
    status: str
    radius: float = math.nan
    radius_error: float = math.nan
    energy: float = math.nan
    message: str = ""
    #: the state index of an excited level's branch point (None: the ground state's)
    state: int | None = None
    energy_error: float = math.nan
    #: converged points of the level below its fold on another branch (R~ < R~_*), left out
    #: of the last real radius
    other_branch: int = 0
    last_real: float = math.nan
    below: float = math.nan
    below_status: str = ""
    consistent: bool | None = None
    why: str = ""

    @property
    def hagedorn_temperature(self):
        return 1.0 / self.radius if self.radius > 0 else math.nan


def branch_checks(data, state="ground"):
    """One `BranchCheck` per (model, alpha > 0), for ``state`` (the branch points are those
    of the ground state). The last real radius and the one below it are filled in whether
    or not a branch point is stored."""
    names = {code: name for code, (name, _) in BRANCH_MEANINGS.items()}
    s = data.state.index(state) if state in data.state else None
    out = []
    for m in range(len(data.model)):
        for a, alpha in enumerate(data.alpha):
            code = int(data.branch["status"][m, a])
            if alpha <= 0 and code != BP_FOUND:  # found for alpha <= 0: a fold of pole factors
                continue
            c = _stored(data.branch, (m, a), names)
            out.append(c)
            if s is None:
                c.why = f"no {state} state in the scan"
                continue
            _against_scan(c, data, m, a, s)
    return out


def _stored(arrays, key, names):
    """The `BranchCheck` of the stored branch point ``key`` of ``arrays``."""
    code = int(arrays["status"][key])
    c = BranchCheck(key[0], key[1], names.get(code, str(code)), message=str(arrays["message"][key]),
                    state=key[2] if len(key) == 3 else None)
    if code == BP_FOUND:
        c.radius = float(arrays["branch_radius"][key])
        c.radius_error = float(arrays["branch_radius_error"][key])
        c.energy = float(arrays["energy"][key])
        c.energy_error = float(arrays["energy_error"][key])
    return c


def level_branch_checks(data):
    """One `BranchCheck` per (model, alpha != 0, excited level) whose branch point is stored
    (/level_branch_points), checked against the level's scan like the ground state's; [] for
    a file without them (schema < 5)."""
    if not data.has_level_branch_points or not data.levels:
        return []
    names = {code: name for code, (name, _) in BRANCH_MEANINGS.items()}
    out = []
    for m in range(len(data.model)):
        for a, alpha in enumerate(data.alpha):
            for s, state in enumerate(data.state):
                if state == "ground" or int(data.levels["status"][m, a, s]) == NOT_COMPUTED:
                    continue
                c = _stored(data.levels, (m, a, s), names)
                out.append(c)
                _against_scan(c, data, m, a, s)
    return out


def _against_scan(c, data, m, a, s):
    """Fill in the last real radius of curve (m, a, s), the one below it, and whether they
    agree with the branch point of ``c``."""
    point_names = {code: name for code, (name, _) in STATUS_MEANINGS.items()}
    code = BP_FOUND if c.status == "found" else None
    st = data["status"][m, a, :, s]
    real = st == CONVERGED
    if c.state is not None and code == BP_FOUND:
        # an excited level's curve R(R~) may turn again below its fold (sinh-Gordon's levels
        # at small R~, where E~ -> -pi c / (6 R~)): the scan can find real points there, on
        # another branch; those with R~ < R~_* are not the branch that comes from large R
        other = real & (_undeformed_radius(data, m, a, s) < float(data.levels["effective_radius"][m, a, s])
                        * (1 - 1e-9))
        c.other_branch = int(other.sum())
        real = real & ~other
        st = np.where(other, OTHER_BRANCH, st)
        point_names = {**point_names, OTHER_BRANCH: "converged, another branch"}
    ok = np.flatnonzero(real)
    computed = np.flatnonzero(st != NOT_COMPUTED)
    # the radius just below the smallest real one (the largest radius if none is real)
    if ok.size:
        c.last_real = float(data.radius[ok[0]])
        j = int(ok[0]) - 1
    else:
        j = len(data.radius) - 1 if computed.size else -1
    if j >= 0:
        c.below = float(data.radius[j])
        c.below_status = point_names.get(int(st[j]), str(int(st[j])))
    if code != BP_FOUND:
        c.why = "no branch point stored"
        return
    tol = c.radius_error if math.isfinite(c.radius_error) else 0.0
    checks, failures = [], []
    if ok.size:
        checks.append("last real R >= R_c")
        if c.last_real < c.radius - tol:
            failures.append(f"last real R = {c.last_real:{RADIUS_FORMAT}} < R_c")
    if j >= 0 and st[j] in (NO_REAL, OTHER_BRANCH):
        checks.append("next R down < R_c")
        if c.below >= c.radius + tol:
            failures.append(f"R = {c.below:{RADIUS_FORMAT}} has no real solution but is >= R_c")
    if failures:
        c.consistent, c.why = False, "; ".join(failures)
    elif checks:
        c.consistent, c.why = True, " and ".join(checks)
        if j < 0:
            c.why += " (real down to the smallest radius)"
    elif not computed.size:
        c.why = "no point of the curve computed yet"
    else:
        c.why = f"next R down is {c.below_status}"


#: a converged point of an excited level on another branch than the one from large R (reports only)
OTHER_BRANCH = -100


def _undeformed_radius(data, m, a, s):
    """R~ = sqrt((R + alpha E)^2 - (alpha P)^2) of the points of curve (m, a, s) (NaN where no
    energy): where on the level's undeformed curve each deformed point lies."""
    alpha = float(data.alpha[a])
    R = np.asarray(data.radius, dtype=float)
    E = np.asarray(data["energy"][m, a, :, s], dtype=float)
    P = np.nan_to_num(np.asarray(data["momentum"][m, a, :, s], dtype=float))
    with np.errstate(invalid="ignore"):
        return np.sqrt((R + alpha * E) ** 2 - (alpha * P) ** 2)


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


def factors_text(run):
    """One line naming the run's pole and resonance factors."""
    parts = [f"F_(pi x)^{p} with x = {x:.12g}" for x, p in run.poles]
    parts += [f"F^{p} with sin u = cosh({t:.12g})" for t, p in run.resonances]
    return ("CDD pole/resonance factors at every alpha (alpha = 0 is the model with them): "
            + ", ".join(parts))


def format_report(data):
    """The report as text (``data``: a `tba.store.hdf5.StoreData`)."""
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
                 f"({R.min():{RADIUS_FORMAT}} .. {R.max():{RADIUS_FORMAT}}) x {len(data.state)} state(s) = "
                 f"{run.n_points} points; tol {run.tol:g}")
    if run.higher_spin:  # the CDD couplings besides alpha, the same at every alpha
        lines.append("  CDD couplings at every alpha: " + ", ".join(
            f"alpha_{s} = {number(a)}" for s, a in run.higher_spin))
    if run.poles or run.resonances:
        lines.append("  " + factors_text(run))
    if any(m.poles or m.resonances for m in run.models):
        lines.append("  model entries with their own CDD pole/resonance factors (in their labels)")
    done = data.progress["done"].astype(bool)
    if data.shard is not None:
        owned = data.owned
        mine = int(owned.sum())
        state = ("all done" if done[owned].all() else
                 f"{int(done[owned].sum())} done: run the same tba run --shard again to resume")
        lines.append(f"  PARTIAL: shard {data.shard.label} of run {attrs.get('run_id', '')[:12]}; it "
                     f"holds only its {mine} of the run's {done.size} chunks ({state}) and its "
                     f"branch points; combine the shards with tba merge")
    lines.append(f"  chunks: {int(done.sum())} of {done.size} done"
                 + (" (complete)" if done.all() else
                    " (partial: a shard)" if data.shard is not None else
                    " (incomplete: run the same tba run again to resume)"))
    lines.append("")

    status = data["status"]
    counts = status_counts(status, STATUS_MEANINGS)
    lines.append("points per status:")
    lines.append(_table(["status", "points"], [[k, v] for k, v in counts.items()]))
    lines.append("")

    ok = status == CONVERGED
    if ok.any():
        err = np.where(ok, data["error"], -np.inf)
        rel = np.where(ok, data["error"] / _accuracy_scale(data), -np.inf)
        i = np.unravel_index(int(np.argmax(err)), err.shape)
        j = np.unravel_index(int(np.argmax(rel)), rel.shape)
        lines.append(f"worst error estimate: {err[i]:.3g} at {_where(data, i)}")
        lines.append(f"worst relative error estimate: {rel[j]:.3g} (tol {run.tol:g}, relative to "
                     f"|E|; excited levels max(|E|, m_1), massless ones max(|E|, 1/R)) at "
                     f"{_where(data, j)}")
    else:
        lines.append("worst error estimate: - (no converged point)")
    lines.append("")

    lines.append("flow residual |E - E_flow| (TTbar: E_flow from the same level undeformed at "
                 "R~ = sqrt((R + alpha E)^2 - (alpha P)^2); for P = 0, E_flow = E_n(R + alpha E, 0)):")
    rows = []
    flow = data["flow_status"]
    for m, label in enumerate(data.model):
        for a, alpha in enumerate(data.alpha):
            for s, state in enumerate(data.state):
                if np.all(status[m, a, :, s] == NOT_AVAILABLE):
                    continue
                fs = flow[m, a, :, s]
                res = data["flow_residual"][m, a, :, s]
                checked = fs == CONVERGED
                est = (data["error"][m, a, :, s] + data["flow_error"][m, a, :, s])
                if checked.any():
                    worst = int(np.nanargmax(np.where(checked, res, -np.inf)))
                    row = [label, number(alpha), int(checked.sum()), _g(float(res[worst])),
                           _g(float(res[worst] / abs(data['energy'][m, a, worst, s]))),
                           _g(float(np.max(res[checked] / est[checked]))), f"{R[worst]:{RADIUS_FORMAT}}"]
                else:
                    why = ", ".join(status_counts(fs, FLOW_MEANINGS)) or "-"
                    row = [label, number(alpha), 0, "-", "-", "-", why]
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

    lines.extend(_branch_section(data))
    lines.extend(_excited_section(data))
    return "\n".join(lines)


def _excited_section(data):
    """The excited levels' branch points (the fold in R at fixed alpha) as stored, with the
    scan's bracket as a cross-check; for a file without them (schema < 5), or a run that did
    not compute them, the levels that stop having a real solution between two radii."""
    if "ground" in data.state and len(data.state) == 1:
        return []
    checks = level_branch_checks(data)
    if not checks:
        return _bracket_section(data)
    lines = ["", "branch points of the excited levels: R_c where the level's branch from large R "
                 "meets another real branch (dR/dR~ = 0 on its undeformed curve; P = 0: alpha "
                 "E~'(R~) = 1), E(R_c) there; last real point per curve:"]
    found = [c for c in checks if c.status == "found"]
    rows = []
    for c in found:
        mark = {True: "yes", False: "NO", None: "-"}[c.consistent]
        below = "-" if math.isnan(c.below) else f"{c.below:{RADIUS_FORMAT}} ({c.below_status})"
        rows.append([data.model[c.model], number(data.alpha[c.alpha]), data.state[c.state],
                     f"{c.radius:{VALUE_FORMAT}}", f"{c.radius_error:.2g}",
                     f"{c.energy:{VALUE_FORMAT}}", f"{c.energy_error:.2g}",
                     _g(c.last_real, RADIUS_FORMAT), below, mark])
    if rows:
        lines.append(_table(["model", "alpha", "state", "R_c", "+- error", "E(R_c)", "+- error",
                             "last real R", "next R down", "consistent"], rows))
    else:
        lines.append("  (no excited level has a branch point in the run)")
    other = [c for c in found if c.other_branch]
    if other:
        lines.append(f"  (last real R: on the level's branch from large R, R~ >= R~_*; "
                     f"{sum(c.other_branch for c in other)} converged point(s) of "
                     f"{len(other)} curve(s) lie on another real branch, R~ < R~_*, where the "
                     f"level's undeformed curve R(R~) turns again)")
    none = [c for c in checks if c.status == "none"]
    if none:
        lines.append(f"  status none (no fold on this side of alpha; the message in the file says "
                     f"why) for {len(none)} (model, alpha, level) triple(s):")
        for m in sorted({c.model for c in none}):
            groups = {}
            for c in none:
                if c.model == m:
                    groups.setdefault(c.alpha, []).append(data.state[c.state])
            lines.append(f"    {data.model[m]}: " + "; ".join(
                f"alpha = {number(data.alpha[a])}: {' '.join(states)}" for a, states in groups.items()))
    for c in checks:
        if c.status not in ("found", "none"):
            lines.append(f"  {data.model[c.model]}, alpha = {number(data.alpha[c.alpha])}, state "
                         f"{data.state[c.state]}: {c.status}: {c.message}")
    lines += _consistency_lines(found, lambda c: f"{data.model[c.model]}, alpha = "
                                f"{number(data.alpha[c.alpha])}, state {data.state[c.state]}")
    return lines


def _consistency_lines(checks, where):
    """The report's verdict on stored branch points against the scanned points (``where(c)``
    names a failing curve)."""
    checked = [c for c in checks if c.consistent is not None]
    failed = [c for c in checked if not c.consistent]
    rule = "last real R >= R_c, and the next R down < R_c where it has no real solution"
    if not checked:
        return [f"consistency with the scan ({rule}): nothing to check"]
    if not failed:
        return [f"consistency with the scan ({rule}): holds for all {len(checked)} "
                f"checked curve(s)"]
    return ([f"consistency with the scan ({rule}): FAILS for {len(failed)} of "
             f"{len(checked)} checked curve(s)"]
            + [f"  {where(c)}: {c.why}" for c in failed])


def _bracket_section(data):
    """Excited levels that stop having a real solution between two scan radii."""
    rows = [[data.model[p.model], number(data.alpha[p.alpha]), data.state[p.state],
             f"{p.radius:{RADIUS_FORMAT}}", f"{p.below:{RADIUS_FORMAT}}"]
            for p in last_real_points(data) if p.bracketed and data.state[p.state] != "ground"]
    why = ("this file was written before the excited levels' branch points were stored (schema "
           f"version {data.schema_version})" if not data.has_level_branch_points else
           "not computed: scan.branch_points = false, another shard, or tba run has not finished")
    note = (f"  (the exact R_c of the excited levels is not in the file: {why}; with its error: "
            f"tba branch-point --model M --alpha A --state=S)")
    if not rows:
        return [] if data.has_level_branch_points else ["", note]
    return ["", "excited levels meeting their branch point between two radii (no real solution "
                "below):", _table(["model", "alpha", "state", "last real R", "next R down"], rows),
            note]


def _branch_section(data):
    lines = ["branch points of the ground state (alpha > 0): R_c from E_0'(R~, 0) = 1/alpha, "
             "E(R_c) = E_0(R_c, alpha) = E_0(R~, 0), Hagedorn temperature T_H = 1/R_c; last real "
             "point per curve:"]
    if data.run.has_poles:
        lines[0] = lines[0][:-1] + (" (models with CDD pole factors: the fold of the full equations "
                                    "by locate_fold, at every alpha):")
    checks = branch_checks(data)
    if not checks:
        lines.append("  (no alpha > 0 in the run)")
    else:
        rows = []
        for c in checks:
            found = c.status == "found"
            mark = {True: "yes", False: "NO", None: "-"}[c.consistent]
            below = "-" if math.isnan(c.below) else f"{c.below:{RADIUS_FORMAT}} ({c.below_status})"
            rows.append([data.model[c.model], number(data.alpha[c.alpha]), c.status,
                         f"{c.radius:{VALUE_FORMAT}}" if found else "-",
                         f"{c.radius_error:.2g}" if found else "-",
                         f"{c.energy:{VALUE_FORMAT}}" if found else "-",
                         f"{c.hagedorn_temperature:{RADIUS_FORMAT}}" if found else "-",
                         _g(c.last_real, RADIUS_FORMAT), below, mark])
        lines.append(_table(["model", "alpha", "status", "R_c", "+- error", "E(R_c)", "T_H",
                             "last real R", "next R down", "consistent"], rows))
        for c in checks:
            if c.status not in ("found", "not-computed"):
                lines.append(f"  {data.model[c.model]}, alpha = {number(data.alpha[c.alpha])}: "
                             f"{c.status}: {c.message}")
        none = int(np.count_nonzero(data.branch["status"] == BP_NONE))
        if none:
            lines.append(f"  (alpha <= 0: no branch point on this side; status none for {none} "
                         f"(model, alpha) pair(s))")
        missing = sum(c.status == "not-computed" for c in checks)
        if missing:
            why = ("this file has schema version 1, which stored no branch points"
                   if data.schema_version < 2 else
                   f"this is shard {data.shard.label}: the other shards compute the rest"
                   if data.shard is not None else
                   "scan.branch_points = false, or tba run has not finished: run it again "
                   "with branch_points = true to add them")
            lines.append(f"  {missing} branch point(s) not computed ({why})")
        lines += _consistency_lines(checks, lambda c: f"{data.model[c.model]}, alpha = "
                                    f"{number(data.alpha[c.alpha])}")
    return lines


def _accuracy_scale(data):
    """What the tolerance of each point is relative to (dims model, alpha, radius, state): |E|
    for the ground state, max(|E|, m_1) for excited levels, max(|E|, 1/R) for excited levels of
    massless models (whose energies pass through zero, tba.solvers.massless)."""
    E = np.abs(np.asarray(data["energy"], dtype=float))
    R = np.asarray(data.radius, dtype=float)[None, None, :, None]
    massless = np.array([is_massless(name) for name in data.model_name])[:, None, None, None]
    excited = np.array([state != GROUND for state in data.state])[None, None, None, :]
    floor = np.where(massless, 1.0 / R, 1.0)
    return np.where(excited, np.maximum(E, floor), E)


def _where(data, index):
    """``lee-yang, alpha = -0.1, R = 2.646110032, state 0 (one-particle level I = 0)``, or
    ``..., ground state``."""
    m, a, r, s = index
    state = data.state[s]
    level = "ground state" if state == "ground" else f"state {state} ({level_title(state)})"
    return f"{data.model[m]}, alpha = {number(data.alpha[a])}, R = {data.radius[r]:{RADIUS_FORMAT}}, {level}"


__all__ = ["format_report", "last_real_points", "LastRealPoint", "branch_checks", "BranchCheck",
           "level_branch_checks",
           "status_counts"]
