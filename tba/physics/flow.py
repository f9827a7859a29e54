"""The Burgers flow of CDD-deformed levels: predictions, the CFT closed form, branch points.

With S -> S exp(i alpha m_a m_b sinh t) every level obeys

    d/dalpha E = E dE/dR + P^2 / R,        P R = 2 pi k fixed.

Its solution by characteristics: the deformed level at (R, alpha) is the undeformed level
at the effective radius R~, seen from a frame boosted by the rapidity beta,

    tanh beta = alpha P~ / (R~ - alpha E~),    E~ = E(R~, 0),  P~ = 2 pi k / R~,
    E = E~ cosh beta + P~ sinh beta,           R = R~ cosh beta - alpha E.

For P = 0 this is R = R~ - alpha E(R~, 0), E(R, alpha) = E(R~, 0). (The boosted driving term
m (R + alpha E) cosh t - m alpha P sinh t = m R~ cosh(t - beta) is where it comes from.)

Ground-state branch point (alpha > 0): dR/dR~ = 1 - alpha E'(R~) vanishes at E'(R~_*) = 1/alpha;
R_c = R~_* - alpha E(R~_*); below R_c the two real solutions become a complex pair.
"""

import math
import numbers
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq

from tba.models.cdd import NO_DEFORMATION
from tba.solvers.result import SolveError
from tba.solvers.ground import energy_derivatives, require_model, solve_ground_state


# -- CFT closed form ---------------------------------------------------------------------------

def cft_energy(radius, alpha, c, delta=0.0, delta_bar=0.0):
    """Deformed CFT level: (R / 2 alpha) (sqrt(1 + 4 alpha E0 / R + 4 alpha^2 P^2 / R^2) - 1).

    E0 = 2 pi (delta + delta_bar - c/12) / R, P = 2 pi (delta - delta_bar) / R. Written without
    the cancellation at small alpha. NaN where the square root is imaginary (past the branch point).
    """
    R = float(radius)
    E0 = 2 * math.pi * (delta + delta_bar - c / 12.0) / R
    P = 2 * math.pi * (delta - delta_bar) / R
    x = 4 * alpha * E0 / R + 4 * alpha * alpha * P * P / (R * R)
    if 1 + x < 0:
        return math.nan
    return (2 * E0 + 2 * alpha * P * P / R) / (math.sqrt(1 + x) + 1)


def cft_branch_radius(c, alpha):
    """Ground-state branch radius of a deformed CFT: sqrt(2 pi c alpha / 3) (alpha > 0)."""
    for name, value in (("c", c), ("alpha", alpha)):
        if isinstance(value, bool) or not isinstance(value, numbers.Real):
            raise TypeError(f"{name} must be a real number, got {value!r}")
    if not (math.isfinite(c) and c > 0):
        raise ValueError(f"c must be finite and positive, got {c!r}")
    if not (math.isfinite(alpha) and alpha > 0):
        raise ValueError(f"alpha must be finite and positive (the ground state has no branch "
                         f"point for alpha <= 0), got {alpha!r}")
    return math.sqrt(2 * math.pi * c * alpha / 3)


# -- predictions from an undeformed level --------------------------------------------------------

@dataclass
class FlowPrediction:
    energy: float
    momentum: float
    effective_radius: float  # R~
    boost: float  # beta
    error: float


def _characteristic(level, k, alpha):
    """R~ -> (R, E, beta, error of E, dE~/dR~) along the characteristic through R~."""

    def radius_of(Rt):
        try:
            E_u, dE_u, err = level(Rt)
        except SolveError as exc:  # a radius where the level itself has no trusted value
            raise ValueError(str(exc)) from None
        P_u = 2 * math.pi * k / Rt
        beta = math.atanh(alpha * P_u / (Rt - alpha * E_u)) if k else 0.0
        E = E_u * math.cosh(beta) + P_u * math.sinh(beta)
        return Rt * math.cosh(beta) - alpha * E, E, beta, err, dE_u

    return radius_of


def _solve_characteristic(radius_of, R, Rt, k, alpha):
    """Newton's method on R(R~) = R from R~ = Rt, staying where R~ > 0 and the boost exists."""
    for _ in range(200):
        R_of, E, beta, err, dE_u = radius_of(Rt)
        if k == 0:
            slope = 1 - alpha * dE_u
        else:  # numerical slope of R(R~); the boost makes the closed form long
            h = 1e-6 * Rt
            try:
                slope = (radius_of(Rt + h)[0] - radius_of(Rt - h)[0]) / (2 * h)
            except ValueError:  # next to the edge of the boost's domain: one-sided
                slope = (radius_of(Rt + h)[0] - R_of) / h
        step = (R_of - R) / slope
        while True:
            Rt_new = Rt - step
            try:
                if Rt_new > 0:
                    radius_of(Rt_new)
                    break
            except ValueError:
                pass
            step /= 2
            if abs(step) < 1e-14 * Rt:
                raise ValueError(f"no real flow prediction at R = {R}, alpha = {alpha}")
        Rt = Rt_new
        if abs(step) <= 1e-15 * Rt:
            return Rt
    raise ValueError(f"flow prediction did not converge at R = {R}, alpha = {alpha}")


def _slope(radius_of, Rt):
    """dR/dR~ along the characteristic (centred, or one-sided next to the boost's domain edge)."""
    h = 1e-6 * Rt
    try:
        return (radius_of(Rt + h)[0] - radius_of(Rt - h)[0]) / (2 * h)
    except ValueError:
        return (radius_of(Rt + h)[0] - radius_of(Rt)[0]) / h


def _bracket_characteristic(radius_of, R, Rt, alpha):
    """Fallback for Newton: the root of R(R~) = R nearest to Rt, bracketed on a log grid close
    to Rt (a root far away belongs to another branch)."""
    grid = Rt * np.exp(np.linspace(-0.3, 0.3, 121))
    values = []
    for x in grid:
        try:
            values.append(radius_of(x)[0] - R)
        except ValueError:
            values.append(np.nan)
    values = np.array(values)
    best = None
    for i in range(grid.size - 1):
        a, b = values[i], values[i + 1]
        if np.isfinite(a) and np.isfinite(b) and a * b <= 0:
            root = brentq(lambda x: radius_of(x)[0] - R, grid[i], grid[i + 1], xtol=1e-15 * grid[i],
                          rtol=4 * np.finfo(float).eps)
            if best is None or abs(math.log(root / Rt)) < abs(math.log(best / Rt)):
                best = root
    if best is None:
        raise ValueError(f"no real flow prediction at R = {R}, alpha = {alpha}")
    return best


def _require_curve(level):
    if not callable(level):
        raise TypeError(f"level must be a callable R -> (E, dE/dR, error of E), e.g. "
                        f"tba.physics.flow.ExcitedCurve(model, state) or UndeformedCurve(model), "
                        f"got {type(level).__name__} {level!r}")


def predict(level, radius, alpha, k=0, guess=None, steps=4):
    """Deformed level at (R, alpha) from an undeformed one by characteristics.

    ``level(Rt)`` returns (E(Rt, 0), dE/dR(Rt, 0), error of E); ``k`` is the momentum
    quantum number (P R = 2 pi k). The root R~ is the one continuously connected to
    alpha = 0 (where R~ = R): alpha is switched on in ``steps`` steps (more when a step
    fails), each solved by Newton's method on R(R~) = radius from the previous R~.
    Raises ValueError where no real prediction exists.
    """
    _require_curve(level)
    R = float(radius)
    Rt = R if guess is None else float(guess)
    if guess is not None:
        steps = 1
    done, frac = 0.0, 1.0 / steps
    while done < 1.0:
        trial = min(1.0, done + frac)
        radius_of = _characteristic(level, k, alpha * trial)
        try:
            try:
                new = _solve_characteristic(radius_of, R, Rt, k, alpha * trial)
            except ValueError:  # Newton wandered (the boost's domain is narrow): bracket
                new = _bracket_characteristic(radius_of, R, Rt, alpha * trial)
            # the branch connected to alpha = 0 has dR/dR~ > 0 (= 1 there): a root with a
            # negative slope lies past a fold, on another branch
            if _slope(radius_of, new) <= 0:
                raise ValueError(f"no real flow prediction at R = {R}, alpha = {alpha}: fold")
            if abs(math.log(new / Rt)) > 0.25:  # a jump, not a continuation: another branch
                raise ValueError(f"no continuous flow prediction at R = {R}, alpha = {alpha}")
            Rt, done = new, trial
        except ValueError:
            frac /= 4
            if frac < 1e-6:
                raise
    R_of, E, beta, err, dE_u = _characteristic(level, k, alpha)(Rt)
    P = 2 * math.pi * k / R
    # an error err in E(R~) moves R~ by alpha err / slope and E by E' that amount
    slope = 1 - alpha * dE_u
    error = err * (1 + abs(alpha * dE_u / slope)) if slope != 0 else math.inf
    return FlowPrediction(energy=E, momentum=P, effective_radius=Rt, boost=beta, error=error)


class UndeformedCurve:
    """E_0(R, 0) of a model by TBA on demand, with exact derivatives, warm starts and a cache."""

    def __init__(self, model, tol=1e-13):
        self.model, self.tol = model, tol
        self._cache = {}
        self._last = None

    def solve(self, radius):
        R = float(radius)
        res = self._cache.get(R)
        if res is None:
            res = solve_ground_state(self.model, R, NO_DEFORMATION, tol=self.tol, start=self._last)
            res.raise_for_status()
            self._cache[R] = self._last = res
        return res

    def __call__(self, radius):
        res = self.solve(radius)
        d = energy_derivatives(res)
        return res.energy, d["dE_dR"], res.error

    def derivative(self, radius):
        return self(radius)[1]


def predict_ground_state(model, radius, alpha, tol=1e-13, curve=None):
    """Flow prediction E_0(R, alpha) from the model's undeformed ground state."""
    curve = curve or UndeformedCurve(model, tol)
    return predict(curve, radius, alpha)


class ExcitedCurve:
    """An undeformed excited level E_n(R, 0), named by its Bethe quantum numbers, by TBA on
    demand (warm starts, cache, exact dE/dR); any excited level with real rapidities, massless
    ones included (`tba.solvers.levels`)."""

    def __init__(self, model, state, tol=1e-13):
        from tba.solvers.levels import parse_level, unavailable

        self.model, self.state, self.tol = model, parse_level(state), tol
        why = "the ground state has its own curve" if self.state == "ground" else \
            unavailable(model, self.state)
        if why is not None:
            raise ValueError(f"state: {why}")
        self.momentum_number = sum(self.state)
        self._cache = {}
        self._last = None

    def __call__(self, radius):
        from tba.solvers.levels import solve_level

        R = float(radius)
        res = self._cache.get(R)
        if res is None:
            res = solve_level(self.model, R, self.state, tol=self.tol, start=self._last)
            res.raise_for_status()
            if getattr(res._state, "dE_dR", None) is None:
                raise ValueError(f"state: the solver of {self.model.name}'s level "
                                 f"{','.join(map(str, self.state))} gives no exact dE/dR")
            self._cache[R] = self._last = res
        return res.energy, res._state.dE_dR, res.error


def level_branch_point(level, alpha, radius_range=(1e-2, 20.0)):
    """Branch radius of a deformed level with P = 0 from its undeformed curve: the minimum
    over R~ of R(R~) = R~ - alpha E(R~) (alpha < 0 for positive levels, alpha > 0 for the
    ground state). R(R~) is stationary there, so R_c is insensitive to the position of R~_*.
    (With P != 0 the boost's domain ends where R(R~) -> 0 and there is no such minimum.)
    Returns (R_c, E(R_c), R~_*)."""
    from scipy.optimize import minimize_scalar

    _require_curve(level)
    radius_of = _characteristic(level, 0, alpha)

    def R_of(x):
        try:
            return radius_of(math.exp(x))[0]
        except ValueError:
            return math.inf

    lo, hi = (math.log(r) for r in radius_range)
    # walk down from the large-R end until R(R~) turns up again: that brackets the minimum
    xs, values = [hi], [R_of(hi)]
    while True:
        x = xs[-1] - 0.25
        if x < lo:
            raise ValueError("the level has no branch point inside radius_range")
        xs.append(x)
        values.append(R_of(x))
        if len(values) >= 3 and values[-1] > values[-2] < values[-3]:
            break
    best = minimize_scalar(R_of, bracket=(xs[-1], xs[-2], xs[-3]), method="brent", tol=1e-10)
    Rt = math.exp(best.x)
    R_c, E, beta, err, dE = radius_of(Rt)
    return R_c, E, Rt


# -- the ground state's branch point ---------------------------------------------------------------

@dataclass
class BranchPoint:
    """Where the deformed ground state stops being real (alpha > 0)."""

    model: str
    alpha: float
    status: str  # "found" or "none" (alpha <= 0: no branch point on this side)
    radius: float = math.nan
    energy: float = math.nan
    effective_radius: float = math.nan
    radius_error: float = math.nan
    energy_error: float = math.nan
    message: str = ""

    def as_record(self):
        ok = self.status == "found"
        return {"model": self.model, "alpha": self.alpha, "status": self.status,
                "radius": self.radius if ok else None, "energy": self.energy if ok else None,
                "effective_radius": self.effective_radius if ok else None,
                "radius_error": self.radius_error if ok else None,
                "energy_error": self.energy_error if ok else None, "message": self.message}


def branch_point(model, alpha, tol=1e-13, curve=None):
    """R_c(alpha) of the ground state from the undeformed curve: E_0'(R~_*) = 1/alpha.

    E_0 is increasing and concave, so E_0' falls monotonically from +inf (R -> 0) to 0 and the
    root is unique; it is bracketed from the CFT estimate and polished with Brent's method on
    the exact derivative. R_c = R~_* - alpha E_0(R~_*) is stationary in R~_*, so its error is
    dominated by alpha times the error of E_0.
    """
    require_model(model)
    if isinstance(alpha, bool) or not isinstance(alpha, numbers.Real):
        raise TypeError(f"alpha must be a real number, got {alpha!r}")
    alpha = float(alpha)
    if not math.isfinite(alpha):
        raise ValueError(f"alpha must be finite, got {alpha!r}")
    if alpha <= 0:
        return BranchPoint(model.name, alpha, "none",
                           message="the ground state has no branch point for alpha <= 0")
    curve = curve or UndeformedCurve(model, tol)
    g = lambda x: curve.derivative(math.exp(x)) - 1.0 / alpha  # noqa: E731 (monotone in x = log R~)
    x0 = 0.5 * math.log(math.pi * 0.5 * alpha / 6)  # CFT with c = 1/2: E' = pi c / (6 R^2)
    lo, hi = x0 - 0.5, x0 + 0.5
    while g(lo) < 0:
        lo -= 1.0
    while g(hi) > 0:
        hi += 1.0
    x = brentq(g, lo, hi, xtol=1e-14, rtol=4 * np.finfo(float).eps, maxiter=200)
    Rt = math.exp(x)
    E, dE, err = curve(Rt)
    Rc = Rt - alpha * E
    return BranchPoint(model.name, alpha, "found", radius=Rc, energy=E, effective_radius=Rt,
                       radius_error=alpha * err + 1e-15 * Rt, energy_error=err,
                       message=f"E_0'(R~) = 1/alpha at R~ = {Rt:.15g}")
