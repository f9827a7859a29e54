"""Pseudo-arclength continuation of the discretised ground-state equations on one grid.

The equations F(eps; p) = 0 at fixed grid define a curve in (eps, p), with p the radius R
(couplings fixed), the scale lambda of all CDD couplings (R fixed: lambda = 0 is the
undeformed theory, lambda = 1 the requested deformation), or the TTbar coupling alpha. Where
a real solution meets a square-root branch point the curve turns back (a fold): dp/ds changes
sign and dF/deps is singular, while the bordered matrix

    [[dF/deps, dF/dp], [theta t_eps^T, t_p]]

stays regular. Every bordered solve inverts only J0 = 1 + K diag(L') (well conditioned at the
fold) and the small capacitance matrix of the separable CDD terms (`tba.solvers.ground`).

`follow` walks the curve from a solved point towards a target value of p and reports what it
meets first: the target (then the point there, on the same branch) or a turning point (then
the fold, located by the secant method on dp/ds = 0). The ground-state solver uses it near
branch points instead of small natural-parameter steps with a nearly singular Jacobian;
`tba.physics.continuation` builds the fold location, the second branch and the complex pair
on it.
"""

import math
from dataclasses import dataclass

import numpy as np

from tba.models.cdd import CDD

PARAMETERS = ("radius", "scale", "alpha")


class Family:
    """The equations on one grid as a function of the continuation parameter p."""

    def __init__(self, model, deformation, radius, grid, parameter):
        from tba.solvers.ground import Discretization  # the two modules work together

        if parameter not in PARAMETERS:
            raise ValueError(f"parameter must be one of {PARAMETERS}, got {parameter!r}")
        self._Discretization = Discretization
        self.model, self.deformation, self.radius, self.grid = model, deformation, radius, grid
        self.parameter = parameter
        # weights of eps in the arclength norm: a change of eps by e_a(t) = m_a cosh t (what a
        # change of the effective radius does) counts as one unit, spread over the grid; massless
        # e_a(t) vanishes on one side: floored at the smallest scale there
        drive = np.maximum(model.energies(grid.t), float(np.min(model.masses)))
        self.theta = 1.0 / (drive * drive * drive.size)

    def deformation_at(self, p):
        if self.parameter == "scale":
            return self.deformation.scaled(p)
        if self.parameter == "alpha":
            return CDD({**self.deformation.couplings, 1: p})
        return self.deformation

    def disc(self, p):
        if self.parameter == "radius":
            return self._Discretization(self.model, self.deformation, p, self.grid)
        return self._Discretization(self.model, self.deformation_at(p), self.radius, self.grid)

    def dF_dp(self, disc, L):
        if self.parameter == "radius":
            return -disc.nu / disc.radius
        if self.parameter == "alpha":
            return disc.coupling_derivative(L, 1)
        # lambda scales every coupling: dF/dlambda = sum_s alpha_s dF/dalpha_s
        return sum(a * disc.coupling_derivative(L, s) for s, a in self.deformation.couplings.items())

    def norm(self, x, y):
        return math.sqrt(float(np.sum(self.theta * x * x)) + y * y)


@dataclass
class Point:
    """A solved point of the curve with its unit tangent (t_eps, t_p)."""

    eps: np.ndarray
    p: float
    tangent: tuple
    energy: float
    fold_indicator: float
    disc: object
    jac: object
    L: np.ndarray


def tangent(fam, disc, jac, L, previous=None, direction=1.0):
    """Unit tangent; with ``previous`` the one with positive overlap with it, else the one
    along which p moves in the sign of ``direction``."""
    f = fam.dF_dp(disc, L)
    if previous is None:
        x = -jac.solve(f)  # dp = 1: J x = -f
        n = fam.norm(x, 1.0)
        s = math.copysign(1.0, direction)
        return s * x / n, s / n
    te, tp = previous
    x, y = jac.bordered_solve(f, fam.theta * te, tp, np.zeros_like(te), 1.0)
    n = fam.norm(x, y)
    return x / n, y / n


def point(fam, eps, p, disc, jac, L, previous_tangent=None, direction=1.0):
    tg = tangent(fam, disc, jac, L, previous_tangent, direction)
    return Point(eps=eps, p=p, tangent=tg, energy=disc.energy(L),
                 fold_indicator=jac.branch_indicator(), disc=disc, jac=jac, L=L)


def correct(fam, eps, p, pred_eps, pred_p, tg, A=None, maxiter=12, accuracy=1e-13):
    """Newton on [F(eps; p) = 0, theta t_eps . (eps - pred) + t_p (p - pred_p) = 0], until the
    relative change is below ``accuracy``. Returns (eps, p, disc, jac, L, iterations) or None."""
    te, tp = tg
    last = math.inf
    for it in range(maxiter):
        disc = fam.disc(p)
        L, dL, ok = disc.occupation(eps)
        if not ok:
            return None
        F = disc.residual(eps, L)
        g = float(np.sum(fam.theta * te * (eps - pred_eps))) + tp * (p - pred_p)
        jac = disc.jacobian(dL, A=A)
        A = getattr(jac, "A", None)
        try:
            dx, dp = jac.bordered_solve(fam.dF_dp(disc, L), fam.theta * te, tp, -F, -g)
        except np.linalg.LinAlgError:
            return None
        eps, p = eps + dx, p + dp
        if not (np.all(np.isfinite(eps)) and math.isfinite(p)) or (p <= 0 and fam.parameter == "radius"):
            return None
        change = float(np.max(np.abs(dx) / (1 + np.abs(eps))))
        if it >= 3 and change > 0.5 * last:  # not converging: let the caller shorten the step
            return None
        last = change
        if change < accuracy and abs(dp) < 0.1 * accuracy * max(1.0, abs(p)):
            disc = fam.disc(p)
            L, dL, ok = disc.occupation(eps)
            if not ok:
                return None
            return eps, p, disc, disc.jacobian(dL, A=A), L, it + 1
    return None


def step(fam, pt, ds, accuracy=1e-13):
    """One predictor-corrector step of arclength ``ds`` from ``pt``: (Point, iterations) or None.
    Intermediate points of a walk need less ``accuracy`` than folds and landing points."""
    te, tp = pt.tangent
    pred_eps, pred_p = pt.eps + ds * te, pt.p + ds * tp
    out = correct(fam, pred_eps, pred_p, pred_eps, pred_p, pt.tangent, A=getattr(pt.jac, "A", None),
                  accuracy=accuracy)
    if out is None:
        return None
    eps, p, disc, jac, L, its = out
    return point(fam, eps, p, disc, jac, L, pt.tangent), its


@dataclass
class Outcome:
    """What `follow` met: ``kind`` "target" (``point`` at p = target), "fold" (``point`` at
    the turning point, ``curvature`` = d^2 p / ds^2 there) or "failed" (``message``)."""

    kind: str
    point: Point = None
    curvature: float = math.nan
    steps: int = 0
    message: str = ""


def locate_turning_point(fam, before, after, ds, target=None):
    """Secant on t_p(s) = 0 between ``before`` (s = 0) and ``after`` (s = ds), until t_p is at
    rounding level or (with ``target``) the turning value is known far better than its
    distance from the target. Returns (Point, d^2 p / ds^2, steps)."""
    s0, f0 = 0.0, before.tangent[1]
    s1, f1 = ds, after.tangent[1]
    best, steps = after, 0
    for _ in range(60):
        if f1 == f0:
            break
        s2 = s1 - f1 * (s1 - s0) / (f1 - f0)
        out = step(fam, before, s2)
        steps += 1
        if out is None:
            break
        change = abs(out[0].p - best.p)
        best = out[0]
        f2 = best.tangent[1]
        s0, f0, s1, f1 = s1, f1, s2, f2
        if abs(f2) < 1e-14 or abs(s1 - s0) < 1e-15:
            break
        if target is not None and change < 1e-4 * abs(target - best.p):
            break
    curvature = (f1 - f0) / (s1 - s0) if s1 != s0 else math.nan
    return best, curvature, steps


def follow(fam, start, target, ds=0.1, max_steps=400, ds_max=1.0, physical=True):
    """Follow the curve from ``start`` (a `Point` whose tangent points towards ``target``) until
    p reaches ``target`` or the curve turns back (a fold). See `Outcome`.

    ``physical``: the walk is on the branch connected to the undeformed theory (positive fold
    indicator); whenever the next step would reach the target, Newton at the target is tried
    first, and accepted on that branch."""
    pt, steps = start, 0
    sign0 = math.copysign(1.0, pt.tangent[1])
    toward = math.copysign(1.0, target - pt.p)
    while steps < max_steps:
        if physical and pt.tangent[1] * toward > 0 \
                and (pt.p + ds * pt.tangent[1] - target) * toward >= 0:
            # this step would reach the target: try to land there directly (natural Newton
            # from the predictor), which also settles a target just before a fold
            ds_land = (target - pt.p) / pt.tangent[1]
            landed = land_at(fam, pt.eps + ds_land * pt.tangent[0], target, pt)
            steps += 1
            if landed is not None and landed.fold_indicator > 0:
                return Outcome("target", landed, steps=steps)
        out = step(fam, pt, ds, accuracy=1e-9)
        steps += 1
        if out is None:
            ds *= 0.5
            if ds < 1e-12:
                return Outcome("failed", pt, steps=steps, message="continuation stalled")
            continue
        new, its = out
        turned = math.copysign(1.0, new.tangent[1]) != sign0
        passed = (new.p - target) * toward >= 0
        if turned:
            fold, curvature, extra = locate_turning_point(fam, pt, new, ds,
                                                          target if physical else None)
            return Outcome("fold", fold, curvature, steps + extra)
        if passed:
            return Outcome("target", _land(fam, pt, new, target), steps=steps)
        pt = new
        ds = min(ds * (2.0 if its <= 3 else 1.0 if its <= 5 else 0.7), ds_max)
    return Outcome("failed", pt, steps=steps, message=f"no target or fold within {max_steps} steps")


def _land(fam, before, after, target):
    """The point at p = target between two points of the curve: secant in s, then a corrector
    at fixed p (the last natural-parameter Newton from a close start)."""
    w = (target - before.p) / (after.p - before.p) if after.p != before.p else 1.0
    eps = before.eps + w * (after.eps - before.eps)
    return land_at(fam, eps, target, after)


def land_at(fam, eps, target, near):
    """Newton at fixed p = target from ``eps``; the tangent of ``near`` orients the result."""
    from tba.solvers.ground import newton  # the two modules work together

    disc = fam.disc(target)
    nt = newton(disc, eps, 1e-14, A=getattr(near.jac, "A", None))
    if not nt.ok:
        return None
    return point(fam, nt.e, target, disc, nt.jacobian(), nt.L, near.tangent)


def land_near_fold(fam, fold, target, curvature, side=-1.0):
    """The solution at p = target next to a turning point at p_c (the target lies between the
    incoming points and p_c). Along the curve p(s) ~ p_c + curvature s^2 / 2, so the point lies
    near s = side * sqrt(2 (target - p_c) / curvature) (side -1: back along the incoming branch).
    Newton in s on p(s) = target, each p(s) a regular bordered corrector from the fold, then
    Newton at fixed p from the point found."""
    if not (curvature * (target - fold.p) > 0):
        return None
    s = side * math.sqrt(2 * (target - fold.p) / curvature)
    pt = None
    for _ in range(20):
        out = step(fam, fold, s)
        if out is None:
            return None
        pt = out[0]
        miss = pt.p - target
        if abs(miss) <= 1e-13 * max(1.0, abs(target)) or pt.tangent[1] == 0:
            break
        # dp/ds along the curve is the tangent's p component (the tangent is unit in the norm)
        s_new = s - miss / pt.tangent[1]
        if s_new * s <= 0:  # never cross the fold onto the other branch
            s_new = 0.5 * s
        s = s_new
    return land_at(fam, pt.eps, target, pt)
