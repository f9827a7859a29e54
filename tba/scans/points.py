"""Scans: a resolved run solved chunk by chunk, in parallel, written to a resumable store.

A run (`tba.scans.runfile.RunSpec`) is cut into chunks by `RunSpec.chunks`: for every model,
alpha and state, the sorted radii in consecutive blocks of ``chunk_size``. A chunk is
solved as one chain (`solve_chunk`): each radius starts from the previous converged one
(``sweep = "descending"``: from the largest radius towards the branch point). A chain's
numbers depend on nothing but the chunk, so serial, parallel and resumed runs agree bit
for bit.

A chunk solves one level (`tba.solvers.levels`): the ground state, or an excited level named by its
Bethe quantum numbers; the states a model lacks have no chunks (`RunSpec.unavailable`).

A point whose solver raises (a defect, or a radius beyond what the grids can hold) never stops
its chunk: it is stored as not-converged with the exception as its message, and the chain
goes on from the last converged point. An exception in the flow check's undeformed solve
keeps the point's energy and marks the check not-converged. An interrupt is never taken
for a failing point (`tba.scans.interrupts.caused_by_interrupt`).

Flow check (``flow_check = true``, the default): for each converged point with alpha != 0
and no higher-spin factor, the same level undeformed is solved at
R~ = sqrt((R + alpha E)^2 - (alpha P)^2) with the exact momentum P = 2 pi sum I_k / R; the
prediction E R~ = (R + alpha E) E_n(R~, 0) + alpha P^2 R / R~ and the flow residual
|E(R, alpha) - prediction| are stored. With TTbar the deformed equations are the undeformed
ones at R~ in a boosted frame, so the relation is exact; for P = 0 it is
E(R, alpha) = E_n(R + alpha E, 0).

Branch points (``branch_points = true``, the default): the ground state's branch point
R_c(alpha) once per model and alpha (`solve_branch_point`: `tba.physics.flow.branch_point` at the
run's tol, a few undeformed solves, 0.01-1 s each), each written as it is found. Local
backends compute them in the driver after the chunks; a dask cluster gets them as tasks
at a lower priority than the chunks. alpha <= 0 has none; with higher-spin factors they are not
applicable; an exception is stored as "failed" with its message and never loses the scan.
Each is a function of (model, alpha, tol) alone, computed from scratch, so resumed runs
agree bit for bit; stored ones are never computed again. The same for every excited level
on the state axis (``solve_branch_point(run, m, a, s)``: its fold in R,
`tba.physics.flow.excited_branch_point`, up to seconds each): one task per (model, alpha,
state), in the local pool or on the cluster after the chunks; "none" where the level has no
fold on that side of alpha, "not-applicable" for a level the model lacks.

`tba.store.driver.run_scan` is the driver: the only writer of the store. Where the chunks are computed is a
`Backend`: `InProcess` (one worker), `ProcessPool` (local processes, one task per chunk) or
`tba.scans.cluster.DaskBackend` (an existing dask.distributed cluster, or a local one); every
backend hands back results as they finish, and the driver writes and flushes each as it
arrives. A shard (`tba.scans.runfile.Shard`, ``tba run --shard I/N``) computes every N-th chunk
into a shard file; `tba.store.merge` combines the shards.
"""

import math
import time

import numpy as np

from tba.models.cdd import NO_DEFORMATION
from tba.physics.flow import branch_point, excited_branch_point
from tba.solvers.excited import excited_derivatives
from tba.solvers.ground import energy_derivatives
from tba.solvers.levels import GROUND, parse_level, solve_level
from tba.solvers.result import STATUS_CODES, Status
from tba.scans.codes import (BP_CODES, BP_FAILED, BP_FOUND, BP_NONE, BP_NOT_APPLICABLE, FLOW_NO_ENERGY,
                             FLOW_NOT_APPLICABLE, FLOW_OFF, POINT_VARIABLES)
from tba.scans.interrupts import caused_by_interrupt

NOT_CONVERGED = STATUS_CODES[Status.NOT_CONVERGED]

_MODEL_CACHE = {}


def _model(spec):
    """Models are cached per process: their kernel caches are reused along a scan."""
    model = _MODEL_CACHE.get(spec)
    if model is None:
        model = _MODEL_CACHE[spec] = spec.build()
    return model


def _empty(n):
    out = {}
    for name, (kind, fill, _) in POINT_VARIABLES.items():
        out[name] = np.full(n, fill, dtype=object if kind == "str" else kind)
    return out


def solve_chunk(run, chunk):
    """Solve one chunk; returns (chunk, values, seconds) with ``values`` a dict of arrays over
    the chunk's radii in ascending order (the names of `tba.store.hdf5.POINT_VARIABLES`).

    BLAS runs on one thread here whatever the executor: a multithreaded LU (scipy's, in the
    excited-state solvers) may round differently with another number of threads, and the
    numbers of a chunk must not depend on where it ran."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        return _solve_chunk(run, chunk)


def _solve_chunk(run, chunk):
    t0 = time.perf_counter()
    level = parse_level(run.states[chunk.state])
    model = _model(run.models[chunk.model])
    alpha = run.alphas[chunk.alpha]
    deformation = run.deformation(alpha, chunk.model)
    radii = run.radii[chunk.radius_start:chunk.radius_stop]
    order = range(len(radii) - 1, -1, -1) if run.sweep == "descending" else range(len(radii))
    values = _empty(len(radii))
    flow_applies = run.flow_check and alpha != 0 and run.ttbar_only
    # R P = 2 pi sum I_k exactly (the flow check uses the exact momentum)
    turns = 0 if level == GROUND else sum(level)
    start = start0 = None
    for i in order:
        R = radii[i]
        try:
            res = solve_level(model, R, level, deformation, tol=run.tol, start=start)
        except Exception as exc:  # noqa: BLE001 (one point never stops a scan)
            _failed_point(values, i, exc, run)
            continue
        if res.converged:
            start = res
            values["momentum"][i] = res.momentum
        values["energy"][i] = res.energy
        values["error"][i] = res.error
        values["status"][i] = STATUS_CODES[res.status]
        values["iterations"][i] = res.iterations
        values["message"][i] = res.message
        if not run.flow_check:
            values["flow_status"][i] = FLOW_OFF
        elif not flow_applies:
            values["flow_status"][i] = FLOW_NOT_APPLICABLE
        elif not res.converged:
            values["flow_status"][i] = FLOW_NO_ENERGY
        else:
            a_eff = R + alpha * res.energy
            boost = alpha * 2 * math.pi * float(turns) / R  # alpha P
            r_eff = a_eff if turns == 0 else math.sqrt(max(a_eff * a_eff - boost * boost, 0.0))
            values["flow_radius"][i] = r_eff
            if not (math.isfinite(r_eff) and r_eff > 0):
                values["flow_status"][i] = FLOW_NOT_APPLICABLE
                continue
            try:
                res0 = solve_level(model, r_eff, level, run.base_deformation(chunk.model), tol=run.tol,
                                   start=start0)
                if res0.converged:
                    predicted, flow_error = _boosted_prediction(model, level, R, alpha, a_eff,
                                                                boost, r_eff, res, res0, run.tol)
            except Exception as exc:  # noqa: BLE001 (the point keeps its energy)
                if caused_by_interrupt(exc):
                    raise KeyboardInterrupt from None
                values["flow_status"][i] = NOT_CONVERGED
                values["message"][i] = f"{res.message}; flow check: the solver raised {one_line(exc)}"
                continue
            values["flow_status"][i] = STATUS_CODES[res0.status]
            if res0.converged:
                start0 = res0
                values["flow_prediction"][i] = predicted
                values["flow_error"][i] = flow_error
                values["flow_residual"][i] = abs(res.energy - predicted)
    return chunk, values, time.perf_counter() - t0


def _failed_point(values, i, exc, run):
    """Store a point whose solver raised as not-converged, with the exception as message (an
    interrupt that numba turned into another exception is raised again as what it was)."""
    if caused_by_interrupt(exc):
        raise KeyboardInterrupt from None
    values["status"][i] = NOT_CONVERGED
    values["message"][i] = f"the solver raised {one_line(exc)}; no energy stored"
    values["flow_status"][i] = FLOW_NO_ENERGY if run.flow_check else FLOW_OFF


def _boosted_prediction(model, level, R, alpha, a_eff, boost, r_eff, res, res0, tol):
    """The flow prediction of a level and its error estimate.

    E R~ = A E_n(R~, 0) + alpha P^2 R / R~ with A = R + alpha E and R~ = sqrt(A^2 - (alpha P)^2)
    (E_n(R~, 0) = res0, the level undeformed; for P = 0 the prediction is E_n(R + alpha E, 0)).
    The prediction depends on E through A and R~, so its error estimate is
    (A / R~) err(E_n(R~, 0)) + |d prediction / dE| err(E) (for P = 0: err(E_n) + |alpha
    E_n'(R~, 0)| err(E), the term that dominates where the level is steep), with E_n'(R~, 0)
    from `_slope`; NaN if it cannot be had."""
    e0 = res0.energy
    predicted = (a_eff * e0 + boost * boost * R / (alpha * r_eff)) / r_eff
    de0 = _slope(model, level, r_eff, res0, tol)
    if not math.isfinite(de0):
        return predicted, math.nan
    dr = alpha * a_eff / r_eff  # dR~/dE
    dpred = (alpha * e0 + a_eff * de0 * dr - boost * boost * R * dr / (alpha * r_eff ** 2)) / r_eff \
        - predicted * dr / r_eff
    return predicted, abs(a_eff) / r_eff * res0.error + abs(dpred) * res.error


def _slope(model, level, r_eff, res0, tol):
    """E_n'(R~, 0) of the undeformed level ``res0``, its magnitude raised by its error
    estimate (the sign kept): exact where the solver has derivatives (the ground state, excited
    levels with real rapidities), else from a second undeformed solve at R~ (1 + 1e-6); NaN if
    that fails."""
    try:
        d = energy_derivatives(res0) if level == GROUND else excited_derivatives(res0)
    except ValueError:  # no exact derivatives here (massless models, the Lee-Yang level)
        pass
    else:
        return d["dE_dR"] + math.copysign(d["dE_dR_error"], d["dE_dR"])
    step = 1e-6 * r_eff
    res1 = solve_level(model, r_eff + step, level, NO_DEFORMATION, tol=tol, start=res0)
    if not res1.converged:
        return math.nan
    return (res1.energy - res0.energy) / step


def solve_branch_point(run, model_index, alpha_index, state_index=None):
    """The ground state's branch point of one (model, alpha) of the run (with
    ``state_index``: the fold of that excited level, `tba.physics.flow.excited_branch_point`),
    as the values of `tba.store.hdf5.BRANCH_VARIABLES` (scalars; the missing ones are left
    out). Never raises an Exception: a failure comes back with status "failed" and the error
    as message."""
    alpha = run.alphas[alpha_index]
    level = None if state_index is None else run.states[state_index]
    if level == "ground":
        level = None
    if level is not None:
        why = run.why_unavailable(model_index, state_index)
        if why is not None:
            return {"status": BP_NOT_APPLICABLE, "message": f"the model lacks this level: {why}"}
    if not run.ttbar_only:
        spins = ", ".join(f"{s}" for s, _ in run.higher_spin)
        return {"status": BP_NOT_APPLICABLE,
                "message": f"higher-spin CDD factors (spin {spins}): R_c from E_0'(R~) = 1/alpha "
                           f"holds for TTbar alone"}
    from threadpoolctl import threadpool_limits

    if run.model_has_poles(model_index):
        if level is not None:  # the level's fold on its undeformed curve holds for TTbar alone
            return {"status": BP_NOT_APPLICABLE,
                    "message": "CDD pole/resonance factors: an excited level's fold is located "
                               "on its undeformed curve, which holds for TTbar alone"}
        return _kernel_fold(run, model_index, alpha)
    try:
        with threadpool_limits(limits=1, user_api="blas"):  # the same bits on every executor
            model = _model(run.models[model_index])
            bp = (branch_point(model, alpha, tol=run.tol) if level is None else
                  excited_branch_point(model, level, alpha, tol=run.tol))
    except Exception as exc:  # noqa: BLE001 (stored, never lost: the scan's points are kept)
        if caused_by_interrupt(exc):
            raise KeyboardInterrupt from None
        return {"status": BP_FAILED, "message": one_line(exc)}
    code = {**BP_CODES, "failed": BP_FAILED}.get(str(bp.status))
    if code is None:
        return {"status": BP_FAILED, "message": f"unexpected status {bp.status!r}: {bp.message}"}
    values = {"status": code, "message": bp.message}
    if code == BP_FOUND:
        values.update(branch_radius=bp.radius, branch_radius_error=bp.radius_error, energy=bp.energy,
                      energy_error=bp.energy_error, effective_radius=bp.effective_radius)
    return values


def _kernel_fold(run, model_index, alpha):
    """With pole or resonance factors the turning point comes from the full equations (the
    kernel's own fold, moved by alpha): `locate_fold` on two grids, for every alpha. Status
    none when the ground state is real down to R = 1e-3 (`locate_fold`'s refusal)."""
    from threadpoolctl import threadpool_limits

    from tba.physics.continuation import locate_fold

    deformation = run.deformation(alpha, model_index)
    try:
        with threadpool_limits(limits=1, user_api="blas"):
            fold = locate_fold(_model(run.models[model_index]), deformation, tol=run.tol)
    except ValueError as exc:
        return {"status": BP_NONE, "message": one_line(exc).split(": ", 1)[-1]}
    except Exception as exc:  # noqa: BLE001 (stored, never lost)
        if caused_by_interrupt(exc):
            raise KeyboardInterrupt from None
        return {"status": BP_FAILED, "message": one_line(exc)}
    return {"status": BP_FOUND, "message": "fold of the full equations with the pole factors "
                                           "(locate_fold, two grids)",
            "branch_radius": fold.value, "branch_radius_error": float(fold.value_error),
            "energy": fold.energy, "energy_error": float(fold.energy_error),
            "effective_radius": fold.value + alpha * fold.energy}


def describe_chunk(run, chunk):
    """``chunk 5 (free-fermion, alpha = 0.5, R = 0.3 .. 0.42)``, with ``, state 0`` or
    ``, ground state`` when the run has several states: for messages. Radii and alpha to 10
    significant digits, as in tables (docs/glossary.md)."""
    level = run.states[chunk.state]
    state = ("" if len(run.states) == 1 else
             ", ground state" if level == "ground" else f", state {level}")
    return (f"chunk {chunk.index} ({run.models[chunk.model].label}, alpha = "
            f"{run.alphas[chunk.alpha]:.10g}, R = {run.radii[chunk.radius_start]:.10g} .. "
            f"{run.radii[chunk.radius_stop - 1]:.10g}{state})")


def one_line(exc):
    """``Type: first line of the message``."""
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
    return f"{type(exc).__name__}: {text}".rstrip(": ")
