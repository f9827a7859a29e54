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

import enum
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
    ones included, and the Lee-Yang one-particle level (`tba.solvers.levels`)."""

    def __init__(self, model, state, tol=1e-13):
        from tba.solvers.levels import parse_level, unavailable

        self.model, self.state, self.tol = model, parse_level(state), tol
        why = "the ground state has its own curve" if self.state == "ground" else \
            unavailable(model, self.state)
        if why is not None:
            raise ValueError(f"state: {why}")
        self.momentum_number = sum(self.state)
        self._cache = {}
        self._slopes = {}
        self._last = None

    def __call__(self, radius):
        from tba.solvers.levels import solve_level

        R = float(radius)
        res = self._cache.get(R)
        if res is None:
            res = solve_level(self.model, R, self.state, tol=self.tol, start=self._last)
            res.raise_for_status()
            if isinstance(res._state, dict):  # the Lee-Yang one-particle level
                from tba.solvers.lee_yang import radius_derivative

                self._cache[R] = self._last = res
                self._slopes[R] = radius_derivative(res)
                return res.energy, self._slopes[R], res.error
            if getattr(res._state, "dE_dR", None) is None:
                raise ValueError(f"state: the solver of {self.model.name}'s level "
                                 f"{','.join(map(str, self.state))} gives no exact dE/dR")
            self._cache[R] = self._last = res
        if R in self._slopes:
            return res.energy, self._slopes[R], res.error
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

class BranchStatus(str, enum.Enum):
    """Outcome of a branch-point search. The members compare equal to their strings
    (``BranchStatus.FOUND == "found"``), which are part of the JSON and file contract: `found`
    and `none` (alpha <= 0) from `branch_point`, and in scan files also `not-applicable`
    (higher-spin factors), `failed` and `not-computed`."""

    FOUND = "found"
    NONE = "none"
    NOT_APPLICABLE = "not-applicable"
    FAILED = "failed"
    NOT_COMPUTED = "not-computed"

    def __str__(self):
        return self.value


#: deprecated JSON keys of a branch point, kept for one release beside the new ones
#: (old name -> new name; see README, "Renamed outputs")
DEPRECATED_BRANCH_KEYS = {"radius": "branch_radius", "radius_error": "branch_radius_error",
                          "energy": "branch_energy", "energy_error": "branch_energy_error",
                          "effective_radius": "branch_effective_radius"}


@dataclass
class BranchPoint:
    """Where a deformed level stops being real: the ground state (alpha > 0, `branch_point`)
    or an excited level (`excited_branch_point`): the branch radius R_c (``radius``), the
    energy there E(R_c) (``energy``; for the ground state E_0(R_c, alpha) = E_0(R~_*, 0)), the
    effective radius R~_* and their error estimates. ``status`` is a `BranchStatus` (a string
    given to the constructor is converted): "found", "none" (no branch point on this side, or
    none on the level's curve from large R down to the radius the message names) or "failed"
    (the undeformed level could not be solved on the way)."""

    model: str
    alpha: float
    status: BranchStatus  # FOUND, or NONE (alpha <= 0: no branch point on this side)
    radius: float = math.nan
    energy: float = math.nan
    effective_radius: float = math.nan
    radius_error: float = math.nan
    energy_error: float = math.nan
    message: str = ""
    #: the level: "ground" or its quantum numbers in canonical form ("-1/2,1/2")
    state: str = "ground"

    def __post_init__(self):
        self.status = BranchStatus(self.status)
        self.alpha = float(self.alpha)
        for name in ("radius", "energy", "effective_radius", "radius_error", "energy_error"):
            setattr(self, name, float(getattr(self, name)))  # plain floats, never numpy ones

    @property
    def found(self):
        return self.status is BranchStatus.FOUND

    @property
    def hagedorn_temperature(self):
        """T_H = 1/R_c of the ground state (NaN unless found; NaN for an excited level, whose
        fold is not a temperature: only the ground state's R_c bounds the thermal ensemble)."""
        ground = self.state == "ground"
        return 1.0 / self.radius if ground and self.found and self.radius > 0 else math.nan

    def as_record(self, deprecated=True):
        """The JSON-ready record (plain Python floats; None unless found): ``branch_radius``
        R_c, ``branch_energy`` E(R_c), ``branch_effective_radius`` R~_*, their errors and
        ``hagedorn_temperature``. ``deprecated``: also the keys of earlier versions (`radius`,
        `energy`, ...; `DEPRECATED_BRANCH_KEYS`), kept for one release."""
        ok = self.found
        value = lambda x: float(x) if ok and math.isfinite(x) else None  # noqa: E731
        rec = {"model": self.model, "alpha": float(self.alpha), "state": self.state,
               "status": self.status.value,
               "branch_radius": value(self.radius), "branch_radius_error": value(self.radius_error),
               "branch_energy": value(self.energy), "branch_energy_error": value(self.energy_error),
               "branch_effective_radius": value(self.effective_radius),
               "hagedorn_temperature": value(self.hagedorn_temperature), "message": self.message}
        if deprecated:
            rec.update({old: rec[new] for old, new in DEPRECATED_BRANCH_KEYS.items()})
        return rec

    def __repr__(self):
        """One line with every digit: ``BranchPoint(lee-yang, alpha = 0.1: found, R_c =
        0.39354557319965 +- 1.1e-14, E(R_c) = ... +- ..., T_H = ...)``."""
        level = "" if self.state == "ground" else f", state {self.state}"
        head = f"{self.model}{level}, alpha = {self.alpha!r}: {self.status.value}"
        if not self.found:
            return f"BranchPoint({head}, {self.message!r})"
        hagedorn = f", T_H = {self.hagedorn_temperature!r}" if self.state == "ground" else ""
        return (f"BranchPoint({head}, R_c = {self.radius!r} +- {self.radius_error:.2g}, "
                f"E(R_c) = {self.energy!r} +- {self.energy_error:.2g}{hagedorn})")

    def _repr_html_(self):
        """A two-column table for notebooks, like `SolveResult`'s."""
        import html

        rows = [("model", self.model), ("state", self.state), ("alpha", repr(self.alpha)),
                ("status", self.status.value)]
        if self.found:
            rows += [("R_c", f"{self.radius!r} +- {self.radius_error:.2g}"),
                     ("E(R_c)", f"{self.energy!r} +- {self.energy_error:.2g}"),
                     ("R~_*", repr(self.effective_radius))]
            if self.state == "ground":
                rows.append(("T_H = 1/R_c", repr(self.hagedorn_temperature)))
        rows.append(("message", self.message))
        body = "".join(f"<tr><th style='text-align:left'>{html.escape(k)}</th>"
                       f"<td style='text-align:left'>{html.escape(v)}</td></tr>" for k, v in rows)
        return f"<table><caption>BranchPoint</caption>{body}</table>"


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
        return BranchPoint(model.name, alpha, BranchStatus.NONE,
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
    return BranchPoint(model.name, alpha, BranchStatus.FOUND, radius=Rc, energy=E,
                       effective_radius=Rt, radius_error=alpha * err + 1e-15 * Rt, energy_error=err,
                       message=f"E_0'(R~) = 1/alpha at R~ = {Rt:.15g}")


# -- branch points of excited levels ------------------------------------------------------------

#: where the walk along an excited level's undeformed curve starts and how far down it goes
LEVEL_WALK_START = 20.0
LEVEL_WALK_END = 1e-3
#: free massless levels are E~ = C / R~: their fold lies at R~ = sqrt(-alpha C) (P = 0), so the
#: walk ends at this multiple of sqrt|alpha| (C >= 2.5e-3)
LEVEL_WALK_END_MASSLESS = 0.05
#: steps of the walk in log R~ (a fold is a sign change of `_fold_function` between two steps)
LEVEL_WALK_STEP = 0.2
#: the second curve, for the error estimate, is solved to this many times the tolerance
COARSE_FACTOR = 100.0


def _fold_function(level, k, alpha, Rt):
    """(g, R, E) along the characteristic through R~ of a level with P R = 2 pi k.

    R(R~)^2 = u^2 - v^2 with u = R~ - alpha E~(R~), v = 2 pi k alpha / R~ (the boosted frame of
    the module doc), so dR^2/dR~ = 2 g with g = u (1 - alpha E~'(R~)) + v^2 / R~: the fold in R
    at fixed alpha is a zero of g (for P = 0, alpha E~'(R~) = 1). E = (E~ u + P~ v) / R.
    Raises ValueError outside the boost's domain (u <= |v|) or where the level has no value."""
    try:
        E_u, dE_u, err = level(Rt)
    except SolveError as exc:
        raise ValueError(str(exc)) from None
    u = Rt - alpha * E_u
    v = 2 * math.pi * k * alpha / Rt
    if not u > abs(v):
        raise ValueError(f"R~ - alpha E~ = {u:.6g} <= |alpha P~| = {abs(v):.6g} at R~ = {Rt:.6g}")
    R = math.sqrt((u - v) * (u + v))
    P_u = 2 * math.pi * k / Rt
    E = (E_u * u + P_u * v) / R
    return u * (1 - alpha * dE_u) + v * v / Rt, R, E, err, u


def _fold_on(level, k, alpha, lo, hi):
    """The zero of g in log R~ between lo and hi (g(lo), g(hi) of opposite signs), by Brent's
    method on the exact dE~/dR~; returns (R~_*, R_c, E, error of E~, u)."""
    g = lambda x: _fold_function(level, k, alpha, math.exp(x))[0]  # noqa: E731
    x = brentq(g, lo, hi, xtol=1e-14, rtol=4 * np.finfo(float).eps, maxiter=200)
    Rt = math.exp(x)
    _, R, E, err, u = _fold_function(level, k, alpha, Rt)
    return Rt, R, E, err, u


def _dip(level, k, alpha, lo, hi, positive):
    """Where |g| dips between lo and hi (log R~) without a sign change on the walk's points:
    the minimum of +-g by Brent's bounded method; if g changes sign there, the bracket
    (x_min, hi) of the zero met first from large R~, else None."""
    from scipy.optimize import minimize_scalar

    sign = 1.0 if positive else -1.0

    def h(x):
        try:
            return sign * _fold_function(level, k, alpha, math.exp(x))[0]
        except ValueError:
            return math.inf

    best = minimize_scalar(h, bounds=(lo, hi), method="bounded", options={"xatol": 1e-6})
    return (best.x, hi) if best.fun < 0 else None


def excited_branch_point(model, state, alpha, tol=1e-12, curves=None):
    """R_c(alpha) of an excited level: the fold in R at fixed alpha, where the level's branch
    that comes from large R meets the other real branch and both turn into a complex pair.

    Located on the level's undeformed curve E~(R~) (exact dE~/dR~ from the linearised
    equations) through the characteristic: R(R~)^2 = (R~ - alpha E~)^2 - (2 pi k alpha / R~)^2
    (P R = 2 pi k), and the fold is the first zero of dR/dR~ met walking down from R~ = 20 in
    steps of 0.2 in log R~ (to 1e-3, or where the boost's domain ends), polished by Brent's
    method. For P = 0: alpha E~'(R~_*) = 1, R_c = R~_* - alpha E~(R~_*), E(R_c) = E~(R~_*).
    Where |dR/dR~| has a local minimum between the walk's points without a sign change, its
    minimum is located (Brent) in case two zeros lie within one step (a level at the edge of
    having a fold).

    The fold is located again on a second curve solved to ``COARSE_FACTOR`` times the
    tolerance; the differences of R_c and E(R_c) between the two, plus the propagated error
    of E~ and rounding, are the error estimates (values of the finer curve). ``state``: the
    level's name or quantum numbers (``"ground"``: `branch_point`). Returns a BranchPoint.
    ``curves``: optional (fine, coarse) ExcitedCurve objects to reuse.
    """
    from tba.solvers.levels import GROUND, level_name, parse_level

    alpha = float(alpha)
    if not math.isfinite(alpha):
        raise ValueError(f"alpha must be finite, got {alpha!r}")
    level = parse_level(state)
    if level == GROUND:
        return branch_point(model, alpha, tol)
    name = level_name(level)
    fine, coarse = curves or (ExcitedCurve(model, level, tol),
                              ExcitedCurve(model, level, min(COARSE_FACTOR * tol, 1e-8)))
    k = fine.momentum_number
    base = dict(model=model.name, alpha=alpha, state=name)
    if alpha == 0:
        return BranchPoint(**base, status="none", message="alpha = 0: the undeformed level has "
                           "no branch point")
    scale = math.sqrt(abs(alpha)) if model.is_massless else 1.0
    x = math.log(LEVEL_WALK_START * max(1.0, scale))
    x_end = math.log(LEVEL_WALK_END_MASSLESS * scale if model.is_massless else LEVEL_WALK_END)
    try:
        previous = _fold_function(fine, k, alpha, math.exp(x))[0]
    except ValueError as exc:
        return BranchPoint(**base, status="failed", message=f"at R~ = {math.exp(x):.6g}: {exc}")
    bracket = None
    older = None  # the value one step before ``previous``
    while x > x_end:
        x_new = x - LEVEL_WALK_STEP
        try:
            value = _fold_function(fine, k, alpha, math.exp(x_new))[0]
        except ValueError as exc:
            if "<= |alpha P~|" in str(exc):  # R -> 0 along the characteristic: no fold above
                return BranchPoint(**base, status="none", message=(
                    f"no fold: R(R~) falls to 0 without turning (R~ = {math.exp(x_new):.6g}, "
                    f"the end of the boost's domain)"))
            return BranchPoint(**base, status="failed",
                               message=f"walk down the undeformed level: {exc}")
        if (value > 0) != (previous > 0):
            bracket = (x_new, x)
            break
        if older is not None and abs(previous) < min(abs(older), abs(value)):
            # |g| has a local minimum near x: two zeros may lie within one step; look closer
            bracket = _dip(fine, k, alpha, x_new, x + LEVEL_WALK_STEP, previous > 0)
            if bracket is not None:
                break
        x, previous, older = x_new, value, previous
    if bracket is None:
        return BranchPoint(**base, status="none", message=(
            f"no fold: R(R~) is monotonic for R~ from {LEVEL_WALK_START * max(1.0, scale):.6g} "
            f"down to {math.exp(x):.6g}"))
    try:
        Rt, Rc, E, err, u = _fold_on(fine, k, alpha, *bracket)
        x_f = math.log(Rt)
        try:  # the coarse curve's zero lies within ~tol of the fine one's
            Rt_c, Rc_c, E_c, _, _ = _fold_on(coarse, k, alpha, x_f - 1e-3, x_f + 1e-3)
        except ValueError:
            Rt_c, Rc_c, E_c, _, _ = _fold_on(coarse, k, alpha, *bracket)
    except ValueError as exc:
        return BranchPoint(**base, status="failed", message=f"locating the fold: {exc}")
    eps = np.finfo(float).eps
    # R_c is stationary in R~_*: an error err of E~ moves it by |alpha| err u / R_c
    radius_error = abs(Rc - Rc_c) + abs(alpha) * err * u / Rc + 64 * eps * Rt
    energy_error = abs(E - E_c) + err * (u / Rc + abs(alpha * E / Rc)) + 64 * eps * max(abs(E), 1.0)
    return BranchPoint(**base, status="found", radius=Rc, energy=E, effective_radius=Rt,
                       radius_error=radius_error, energy_error=energy_error,
                       message=(f"dR/dR~ = 0 on the undeformed level at R~ = {Rt:.15g} "
                                f"(second curve: R~ = {Rt_c:.15g})"))


# -- the flow relation of excited levels and of higher spins ---------------------------------------

def _spin_charge(state, spin):
    """(E_s, dE_s/dR) of a ground-state solution on its grid: E_s = -(1/2 pi) sum_b q_s^b
    int cosh(s t) L_b (E_1 = E), dE_s/dR from the linearised equations (exact)."""
    disc = state.disc
    U, V = disc.ops.charge_rows(disc.deformation, spin)
    de = state.jacobian().solve(disc.nu / disc.radius, rtol=1e-13)
    weight = -V[0] / (2 * math.pi)
    return float(np.sum(weight * state.L)), float(np.sum(weight * state.dL * de))


def spin_flow_residual(result, spin):
    """The generalised flow of the ground state for a spin-s CDD coupling alpha_s,

        d E / d alpha_s = s E_s dE_s / dR,

    (derived in `tba.models.cdd`; s = 1 is the Burgers equation with P = 0) from exact
    derivatives on the final grid, with the error estimate from the next-coarser grid.
    Returns {"residual", "error", "scale" (= |s E_s dE_s/dR|), "dE_dalpha_s" (the derivative with
    respect to the spin-s coupling), "E_s", "dE_s_dR"}."""
    from tba.solvers.ground import State, energy_derivatives

    if not (result.converged and isinstance(result._state, State)):
        raise ValueError("result: the generalised flow needs a converged ground state")
    d = energy_derivatives(result, spins=(spin,))
    fine = result._state
    Es, dEs = _spin_charge(fine, spin)
    if fine.coarse is not None:
        Es_c, dEs_c = _spin_charge(fine.coarse, spin)
    else:
        Es_c, dEs_c = 0.0, 0.0
    eps = np.finfo(float).eps
    err_Es = abs(Es - Es_c) + 64 * eps * abs(Es)
    err_dEs = abs(dEs - dEs_c) + 64 * eps * abs(dEs) * math.sqrt(fine.eps.size)
    residual = d[f"dE_dalpha{spin}"] - spin * Es * dEs
    error = d[f"dE_dalpha{spin}_error"] + spin * (abs(Es) * err_dEs + abs(dEs) * err_Es)
    out = {"residual": residual, "error": error, "scale": abs(spin * Es * dEs),
           "dE_dalpha_s": d[f"dE_dalpha{spin}"], "dE_dalpha_s_error": d[f"dE_dalpha{spin}_error"],
           "E_s": Es, "dE_s_dR": dEs, "dE_dR": d["dE_dR"], "dE_dR_error": d["dE_dR_error"]}
    return {key: float(value) for key, value in out.items()}  # plain floats, never numpy ones


def level_flow_residual(result):
    """The Burgers equation of an excited level with real rapidities (`solve_excited`),

        d E / d alpha - E dE/dR - P^2 / R,      P = 2 pi sum I_k / R (exact),

    from exact derivatives (`tba.solvers.excited.excited_derivatives`) with its error estimate
    and the scale |E dE/dR| + P^2 / R. Returns the keys of `tba.flow_residual`."""
    from tba.solvers.excited import excited_derivatives

    d = excited_derivatives(result, spins=(1,))
    E, R = result.energy, result.radius
    P = 2 * math.pi * float(sum(result.state)) / R
    residual = d["dE_dalpha1"] - E * d["dE_dR"] - P * P / R
    error = (d["dE_dalpha1_error"] + abs(E) * d["dE_dR_error"] + result.error * abs(d["dE_dR"])
             + 8 * np.finfo(float).eps * P * P / R)
    out = {"residual": residual, "error": error, "scale": abs(E * d["dE_dR"]) + P * P / R, **d}
    return {key: float(value) for key, value in out.items()}  # plain floats, never numpy ones
