"""Pseudo-arclength continuation of the deformed ground-state equations through their fold.

On a fixed grid the discretised equations F(eps; p) = 0 define a curve in (eps, p), with p
the radius R (at fixed couplings) or the TTbar coupling alpha (at fixed R). Where the
physical solution meets its square-root branch point the curve turns back (a fold): dp/ds
changes sign, the Jacobian dF/deps is singular, but the bordered matrix

    [[dF/deps, dF/dp], [tangent_eps^T, tangent_p]]

stays regular. The curve following itself (predictor, bordered corrector, turning points)
is `tba.solvers.arclength`, which the ground-state solver also uses next to branch points.

What this module gives:
* ``locate_fold``: the fold (branch radius R_c, or alpha_c at fixed R) by following the
  curve and solving dp/ds = 0 with the secant method, on two grids for an error estimate;
* ``second_branch``: the solution on the other side of the fold (real, unphysical branch);
* ``complex_pair``: past the fold, the complex-conjugate pair of solutions with complex
  pseudo-energies, started from the fold's null vector and solved by complex Newton.
"""

import math
from dataclasses import dataclass, field
from typing import Optional

import numpy as np
import scipy.linalg
import scipy.sparse.linalg

from tba.models.cdd import CDD
from tba.solvers import arclength
from tba.solvers.grid import choose_grid
from tba.solvers.result import Status
from tba.solvers.ground import require_deformation, require_model
from tba.solvers.ground import (Discretization, _interpolate, grid_masses, grid_pole_distance, newton,
                                solve_ground_state)

PARAMETERS = ("radius", "alpha")


@dataclass
class Fold:
    """A fold of the deformed ground state: where two real solutions merge."""

    parameter: str
    value: float  # R_c or alpha_c
    energy: float
    value_error: float
    energy_error: float
    second_derivative: float  # d^2 p / ds^2 at the fold (arclength on this grid)
    fold_indicator: float
    steps: int
    point: Optional[arclength.Point] = field(default=None, repr=False)
    family: Optional[arclength.Family] = field(default=None, repr=False)


#: without a TTbar coupling (alpha <= 0: a fold of the kernel's own equations, e.g. of pole
#: factors) the fold is sought from R = 1 outwards, and it is refused when the ground state is
#: real already at this radius
FOLD_PROBE_RADIUS = 1e-3


def _default_start(deformation):
    """Where the continuation in R starts (then doubled until the solution is real): twice the
    CFT estimate of R_c with c = 1 for alpha > 0, else R = 1 (no coupling scale)."""
    if deformation.alpha > 0:
        return 2.0 * math.sqrt(2 * math.pi * deformation.alpha / 3)
    return 1.0


def _refuse_without_fold(model, deformation, tol):
    """alpha <= 0 has no TTbar branch point; a fold of the kernel's own equations (pole factors,
    or a user kernel) can still exist. Refused only when the ground state is real at the small
    radius `FOLD_PROBE_RADIUS` (then no fold lies above it)."""
    res = solve_ground_state(model, FOLD_PROBE_RADIUS, deformation, tol=max(tol, 1e-10))
    if res.converged:
        raise ValueError(f"deformation: the ground state has no fold in R for alpha <= 0 (it is "
                         f"real at R = {FOLD_PROBE_RADIUS:g})")


def _design_radius(model, deformation, radius, parameter):
    """A safe (small) effective radius to design the grid of a continuation."""
    if parameter == "radius" and deformation.alpha <= 0:
        return FOLD_PROBE_RADIUS * radius
    alpha = max(abs(deformation.alpha), 1e-12)
    guess = 0.3 * math.sqrt(alpha)
    if parameter == "alpha":
        guess = min(guess, 0.3 * radius)
    return guess


def locate_fold(model, deformation, *, parameter="radius", radius=None, start=None, tol=1e-12):
    """The fold of the deformed ground state, by pseudo-arclength continuation.

    parameter="radius": at fixed couplings, the branch radius R_c; the curve is followed from
    ``start`` (a radius above R_c; default twice the CFT estimate with c = 1 for alpha > 0,
    R = 1 otherwise, doubled until it has a real solution: c = 24 has R_c = sqrt(16 pi alpha)).
    For alpha <= 0 a fold can only come from the kernel's own equations (pole factors, user
    kernels): refused with ValueError when the ground state is real at R = 1e-3.
    parameter="alpha": at fixed ``radius``, the TTbar coupling alpha_c where the fold lies.

    The fold is located on two grids of increasing resolution; their difference is the error
    estimate (plus rounding). Returns a `Fold` (values of the finer grid).
    """
    if parameter not in PARAMETERS:
        raise ValueError(f"parameter must be one of {PARAMETERS}, got {parameter!r}")
    require_model(model)
    deformation = require_deformation(deformation)
    if parameter == "radius":
        if deformation.alpha <= 0:
            _refuse_without_fold(model, deformation, tol)
        p0 = float(start) if start is not None else _default_start(deformation)
        r_ref, toward = p0, 0.0  # R decreases towards R_c
    else:
        if radius is None:
            raise ValueError("radius is required for parameter='alpha'")
        p0 = float(start) if start is not None else max(deformation.alpha, 1e-3)
        r_ref, toward = float(radius), math.inf  # alpha increases towards alpha_c
    r_design = _design_radius(model, deformation, r_ref, parameter)
    if parameter == "radius" and start is None:
        for _ in range(12):
            if solve_ground_state(model, p0, deformation, tol=tol).status is not Status.NO_REAL_SOLUTION:
                break
            p0 *= 2.0
    folds = []
    for level in (0, 1):
        min_mass, massless, kernel_decay = grid_masses(model)
        grid = choose_grid(grid_pole_distance(model, deformation), min_mass, r_design, tol, level,
                           cutoff_extra=4.0, max_spin=max(deformation.couplings, default=1),
                           massless=massless, kernel_decay=kernel_decay)
        fam = arclength.Family(model, deformation, radius, grid, parameter)
        if parameter == "radius":
            res = solve_ground_state(model, p0, deformation, tol=tol)
        else:
            res = solve_ground_state(model, radius, CDD({**deformation.couplings, 1: p0}), tol=tol)
        if not res.converged:
            raise RuntimeError(f"continuation start point did not converge: {res.message}")
        disc = fam.disc(p0)
        nt = newton(disc, disc.initial_guess(res._state), 1e-13)
        if not nt.ok:
            raise RuntimeError(f"continuation could not start at {parameter} = {p0}: {nt.message}")
        pt = arclength.point(fam, nt.e, p0, disc, nt.jacobian(), nt.L, direction=toward - p0)
        out = arclength.follow(fam, pt, toward, ds=0.05, ds_max=0.5, physical=False)
        if out.kind != "fold":
            raise RuntimeError(f"continuation met no fold: {out.message or out.kind}")
        folds.append((out.point, out.curvature, out.steps, fam))
    (c_pt, _, _, _), (f_pt, curvature, steps, fam) = folds
    eps64 = np.finfo(float).eps
    value_error = abs(f_pt.p - c_pt.p) + 64 * eps64 * abs(f_pt.p)
    energy_error = abs(f_pt.energy - c_pt.energy) + 64 * eps64 * abs(f_pt.energy)
    return Fold(parameter=parameter, value=f_pt.p, energy=f_pt.energy, value_error=value_error,
                energy_error=energy_error, second_derivative=curvature,
                fold_indicator=f_pt.fold_indicator, steps=steps, point=f_pt, family=fam)


# -- beyond the fold ------------------------------------------------------------------------------

@dataclass
class BranchSolution:
    """A solution off the physical branch, labelled as what it is.

    ``error`` bounds |energy - exact| (two grids designed for this point's own effective
    radius, as for physical points); ``effective_radius`` is R + alpha E (complex for the pair).
    """

    label: str  # "second-branch" or "complex-pair"
    radius: float
    energy: complex
    error: float
    effective_radius: complex
    fold_indicator: complex
    residual: float
    grid: object = field(repr=False, default=None)
    eps: np.ndarray = field(repr=False, default=None)

    @property
    def conjugate_energy(self):
        return np.conj(self.energy)


def _require_fold(fold):
    if not isinstance(fold, Fold):
        raise TypeError(f"fold must be a Fold (from locate_fold), got {type(fold).__name__} {fold!r}")


def second_branch(fold, radius):
    """The real solution at ``radius`` (> R_c) on the far side of the fold (radius folds only).

    The curve is followed past the fold until it passes ``radius`` again, and the point is
    then corrected at fixed radius by Newton's method.
    """
    _require_fold(fold)
    if fold.parameter != "radius":
        raise ValueError("fold: second_branch needs a fold in the radius")
    if not radius > fold.value:
        raise ValueError(f"radius must exceed R_c = {fold.value:.12g}, got {radius}")
    fam = fold.family
    point = fold.point
    ds = 0.02
    steps = 0
    while point.p < radius:
        out = arclength.step(fam, point, ds, accuracy=1e-11)
        steps += 1
        if out is None:
            ds *= 0.5
            if ds < 1e-10 or steps > 2000:
                raise RuntimeError("continuation along the second branch stalled")
            continue
        new, its = out
        if new.p > radius:
            break
        point = new
        ds = min(ds * 1.5, 0.5)
    disc = fam.disc(radius)
    nt = newton(disc, point.eps, 1e-13)
    if not nt.ok:
        raise RuntimeError(f"second-branch point did not converge: {nt.message}")
    return _polish("second-branch", fam, radius, disc, nt.e)


def _transfer(disc_from, eps, disc_to):
    """eps on another grid: interpolate the kernel part, rebuild driving and CDD terms."""
    L = (ComplexEquations(disc_from).occupation(eps)[0] if np.iscomplexobj(eps)
         else disc_from.occupation(eps)[0])
    S = np.einsum("rij,ij->r", disc_from.V, L)
    sep = np.einsum("r,rij->ij", disc_from.c * S, disc_from.U)
    g = eps - disc_from.nu - sep
    g_to = _interpolate(disc_from.grid, g.real, disc_to.grid.t)
    if np.iscomplexobj(g):
        g_to = g_to + 1j * _interpolate(disc_from.grid, g.imag, disc_to.grid.t)
    return disc_to.nu + g_to + np.einsum("r,rij->ij", disc_to.c * S, disc_to.U)


def _polish(label, fam, radius, disc, eps):
    """Re-solve an off-branch solution on two grids designed for its own effective radius.

    The continuation's grid was designed near the fold; away from it the effective radius
    R + alpha E shrinks (second branch) or turns complex (the pair), which asks for a wider
    cutoff or a finer spacing. The two levels give the error estimate, as for physical points.
    """
    is_complex = np.iscomplexobj(eps)
    eqs = ComplexEquations(disc) if is_complex else None
    L = eqs.occupation(eps)[0] if is_complex else disc.occupation(eps)[0]
    E = complex(np.sum(disc.wE * L)) if is_complex else disc.energy(L)
    alpha = fam.deformation.alpha
    r_eff = radius + alpha * E if fam.deformation.is_ttbar else complex(radius)
    strip = math.pi / 2 - abs(np.angle(r_eff))
    if strip <= 0.05:
        raise RuntimeError(f"effective radius {r_eff:.6g} too far from the real axis to resolve")
    model, deformation = fam.model, fam.deformation
    energies, out = [], None
    for level in (0, 1):
        min_mass, massless, kernel_decay = grid_masses(model)
        grid = choose_grid(grid_pole_distance(model, deformation), min_mass, abs(r_eff),
                           1e-12, level, cutoff_extra=4.0, max_spin=max(deformation.couplings, default=1),
                           strip=strip, decay_radius=min(abs(r_eff), r_eff.real) if r_eff.real > 0
                           else abs(r_eff), massless=massless, kernel_decay=kernel_decay)
        new = Discretization(model, deformation, radius, grid)
        e0 = _transfer(disc, eps, new)
        if is_complex:
            eqs = ComplexEquations(new)
            e1, L1, dL1, res, ok = eqs.newton(e0)
            if not ok:
                raise RuntimeError(f"{label} point did not converge on the refined grid")
            energy, fold = eqs.energy(L1), complex(np.nan)
        else:
            nt = newton(new, e0, 1e-13)
            if not nt.ok:
                raise RuntimeError(f"{label} point did not converge on the refined grid: {nt.message}")
            e1, L1, res, energy = nt.e, nt.L, nt.residual, new.energy(nt.L)
            fold = nt.jacobian().branch_indicator()
        energies.append(energy)
        disc, eps = new, e1
        out = (energy, fold, res, grid, e1)
    energy, fold, res, grid, e1 = out
    scale = float(np.sum(np.abs(disc.wE * (ComplexEquations(disc).occupation(e1)[0] if is_complex
                                             else disc.occupation(e1)[0]))))
    error = abs(energies[1] - energies[0]) + 64 * np.finfo(float).eps * scale
    if not is_complex and fold > 0:
        raise RuntimeError("the refined solution fell back onto the physical branch")
    r_eff = radius + alpha * energy if deformation.is_ttbar else radius
    return BranchSolution(label, radius, energy, error, r_eff, fold, res, grid, e1)


class ComplexEquations:
    """The discretised equations with complex pseudo-energies (and, optionally, complex radius).

    L(eps) = log(1 + e^{-eps}) continued from the real axis (principal branch of
    log1p in the variable e^{-|Re eps|}), or -log(1 - e^{-eps}) for bosons (Re eps > 0); the
    real kernel operators act on real and imaginary parts separately.
    """

    def __init__(self, disc, radius=None):
        self.disc = disc
        self.nu = disc.nu if radius is None else disc.nu * (radius / disc.radius)

    def occupation(self, e):
        if self.disc.sign < 0:  # bosons, as the real kernels.statistics: log1p where e^-eps is
            # small (exactly 0 far out), expm1 where eps is small (every digit of 1 - e^-eps)
            far = e.real > math.log(2.0)
            x = np.exp(-np.where(far, e, 1.0))
            near = np.where(far, 1.0, e)
            L = np.where(far, -np.log1p(-x), -np.log(-np.expm1(-near)))
            dL = np.where(far, -x / (1 - x), -1 / np.expm1(near))
            return L, dL
        pos = e.real >= 0
        x = np.exp(np.where(pos, -e, e))
        # numpy's complex log1p drops the real part of tiny arguments: series there
        small = np.abs(x) < 1e-4
        log1p = np.where(small, x * (1 - x * (1 / 2 - x * (1 / 3 - x * (1 / 4 - x / 5)))),
                         np.log1p(np.where(small, 0, x)))
        L = np.where(pos, log1p, -e + log1p)
        dL = np.where(pos, -x / (1 + x), -1 / (1 + x))
        return L, dL

    def _conv(self, f):
        ops = self.disc.ops
        return ops.convolve(np.ascontiguousarray(f.real)) + 1j * ops.convolve(np.ascontiguousarray(f.imag))

    def residual(self, e, L):
        d = self.disc
        S = np.einsum("rij,ij->r", d.V, L)
        return e - self.nu + self._conv(L) + np.einsum("r,rij->ij", d.c * S, d.U)

    def solve_linear(self, dL, rhs):
        d = self.disc
        n, N = d.shape
        r = d.c.size
        Uf = d.U.reshape(r, n * N)
        CVd = d.c[:, None] * (d.V * dL).reshape(r, n * N)
        if d.ops.dense:
            # J = J0 + U^T CVd by the Woodbury formula, as for real solutions: J0 = 1 + K diag(L')
            # is well conditioned, while the rank-one terms span many orders of magnitude on a
            # massless grid (e_a(t) ~ e^|t| at the far ends)
            b = rhs.reshape(-1)
            if d.ops.trivial:
                y, Z = b.astype(complex), Uf.T.astype(complex)
            else:
                lu = scipy.linalg.lu_factor(np.eye(n * N) + d.ops.matrix * dL.reshape(1, -1),
                                            check_finite=False)
                y = scipy.linalg.lu_solve(lu, b, check_finite=False)
                Z = scipy.linalg.lu_solve(lu, Uf.T, check_finite=False) if r else None
            if r:
                y = y - Z @ np.linalg.solve(np.eye(r) + CVd @ Z, CVd @ y)
            return y.reshape(d.shape)

        def matvec(x):
            x = np.asarray(x).reshape(d.shape)
            y = x + self._conv(dL * x)
            return y.reshape(-1) + ((CVd @ x.reshape(-1)) @ Uf if r else 0)

        op = scipy.sparse.linalg.LinearOperator((n * N, n * N), matvec=matvec, dtype=complex)
        x, info = scipy.sparse.linalg.gmres(op, rhs.reshape(-1), rtol=1e-13, atol=0.0, restart=80,
                                            maxiter=30)
        if info != 0:
            raise np.linalg.LinAlgError(f"complex GMRES did not converge (info={info})")
        return x.reshape(d.shape)

    def energy(self, L):
        return complex(np.sum(self.disc.wE * L))

    def newton(self, e, maxiter=60):
        e = np.asarray(e, dtype=complex)
        for it in range(maxiter):
            L, dL = self.occupation(e)
            F = self.residual(e, L)
            delta = self.solve_linear(dL, -F)
            if self.disc.sign < 0:  # bosons: keep Re eps > 0, where L is defined
                lam = 1.0
                while np.any((e + lam * delta).real <= 0) and lam > 1e-6:
                    lam *= 0.5
                delta = lam * delta
            e = e + delta
            # converged when the step is at rounding level everywhere: relative to |eps| where
            # that is large (the far ends of a massless grid), else to the scale of eps at t = 0
            scale = max(1.0, float(np.max(np.abs(e.real[:, e.shape[1] // 2]))))
            if float(np.max(np.abs(delta) / np.maximum(scale, np.abs(e)))) < 1e-13:
                L, dL = self.occupation(e)
                return e, L, dL, float(np.max(np.abs(self.residual(e, L)))), True
            if not np.all(np.isfinite(e)):
                break
        return e, None, None, math.inf, False

    def derivative_radius(self, L, dL):
        """dE/dR of a complex solution (exact, linearised equations)."""
        de = self.solve_linear(dL, self.nu / (self.nu.flat[0] / self.disc.nu.flat[0] * self.disc.radius))
        return complex(np.sum(self.disc.wE * dL * de))


def complex_pair(fold, radius):
    """The complex-conjugate pair of solutions at ``radius`` < R_c (radius folds only).

    Near the fold R(s) = R_c + R'' s^2 / 2 along the real curve; continuing s to imaginary
    values gives the start eps_c + s t_eps with s = i sqrt(2 (R_c - R) / R''), which complex
    Newton polishes. Returns the member with Im E > 0; its partner is the conjugate.
    """
    _require_fold(fold)
    if fold.parameter != "radius":
        raise ValueError("fold: complex_pair needs a fold in the radius")
    if not 0 < radius < fold.value:
        raise ValueError(f"radius must lie in (0, R_c = {fold.value:.12g}), got {radius}")
    fam = fold.family
    curvature = fold.second_derivative
    if not (curvature > 0):
        raise RuntimeError("fold curvature not available")
    s = 1j * math.sqrt(2 * (fold.value - radius) / curvature)
    e0 = fold.point.eps + s * fold.point.tangent[0]
    disc = fam.disc(radius)
    eqs = ComplexEquations(disc)
    e, L, dL, res, ok = eqs.newton(e0)
    if not ok:
        raise RuntimeError(f"complex Newton did not converge at R = {radius}")
    if eqs.energy(L).imag < 0:
        e = np.conj(e)
    return _polish("complex-pair", fam, radius, disc, e)
