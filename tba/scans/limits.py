"""What a point and a run may ask for: the domain the solvers represent in double precision,
and the size of a scan that fits in memory. Run files (`tba.scans.runfile`) and the command
line (`tba.cli`) check these before anything is allocated or solved.

Domain (units of the lightest mass m_1 = 1):

* radii ``MIN_RADIUS <= R <= MAX_RADIUS``. The ground-state energy falls like
  e^{-m_1 R}: at m_1 R ~ 708 it leaves the normal range of double precision (e^{-745} is
  zero), so a larger radius would come back as an energy 0 with error 0, a bound that no
  longer bounds anything. At the small end the grid's cutoff Lambda ~ log(120 / R) grows
  without bound; below 1e-100 the UV (conformal) limit is reached to every digit anyway.
* CDD couplings ``|alpha_s| <= MAX_COUPLING`` for every spin. The deformed driving term
  m (R + alpha E) cosh t has the effective radius R + alpha E, and grids at large effective
  radius are sized by the peak's width 1/sqrt(m (R + alpha E)). Excited levels have E of
  order m, so at alpha ~ 1e20 their grids would need petabytes (measured: 700 PiB asked
  for at alpha = 1e20); up to 1e12 they return a status. (The ground state's branch point
  grows only like log alpha, E_0'(R~) = 1/alpha with E_0' ~ e^{-m R~}: R_c = 26 at alpha =
  1e12 for Lee-Yang, so large couplings are not empty of real solutions.)
* the deformation's rank-one terms: a spin-s factor adds alpha_s s cosh(s t) cosh(s t') to
  the kernel, largest at the grid's cutoff, t = t' = Lambda(R). Products of two such terms
  must stay inside double precision (1e308), so

      |alpha_s| s cosh(s Lambda(R))^2 <= MAX_DEFORMATION_TERM = 1e100,

  with Lambda(R) = acosh(1 + CUTOFF_EXPONENT / R), an upper bound on the cutoff the grid
  rule (`tba.solvers.grid.choose_grid`) takes at the tightest tolerance. This is what
  keeps high spins from small radii: at alpha_s = 0.01, spin 3 needs R >~ 1e-15, spin 9
  R >~ 3e-4, spin 31 R >~ 3, spin 99 R >~ 80; TTbar at |alpha| = 1e12 needs R >~ 6e-43.
  Inside these limits the solvers return a status (possibly not-converged), never an
  overflow.

Size: a run of ``n`` points holds about ``BYTES_PER_POINT * n`` bytes in memory (the store's
arrays, with a fixed-length 256-byte message per point; `tba merge` holds the merged
arrays) and about as much on disk. ``MAX_POINTS`` per run and ``MAX_SOLVE_POINTS`` per
``tba solve`` are the defaults; the command line raises them with ``--max-points N``.
"""

import math

MIN_RADIUS = 1e-100
MAX_RADIUS = 700.0
MAX_COUPLING = 1e12
MAX_DEFORMATION_TERM = 1e100
#: e-folds resolved by the finest grid at the tightest tolerance (log(1e13) + 4 levels x 4,
#: plus the tail margin and headroom): the cutoff solves m R (cosh Lambda - 1) = this
CUTOFF_EXPONENT = 60.0

MAX_POINTS = 10_000_000
MAX_SOLVE_POINTS = 100_000
#: store arrays per point: 7 float64, 2 int8, 1 int32, a 256-byte message, chunk table share
BYTES_PER_POINT = 400


def radius_problem(R):
    """Why radius ``R`` (a finite positive float) lies outside the domain, or None."""
    if R > MAX_RADIUS:
        return (f"{R:g} is above the largest radius {MAX_RADIUS:g} (m_1 R beyond ~708 puts "
                f"the ground-state energy ~ e^(-m_1 R) below double precision)")
    if R < MIN_RADIUS:
        return f"{R:g} is below the smallest radius {MIN_RADIUS:g}"
    return None


def coupling_problem(alpha):
    """Why a CDD coupling (finite float) lies outside the domain, or None."""
    if abs(alpha) > MAX_COUPLING:
        return (f"|alpha| = {abs(alpha):g} is above the limit {MAX_COUPLING:g} (in units of "
                f"1/m_1^2: the grids at the effective radius R + alpha E would not fit in "
                f"memory)")
    return None


def _log10_deformation_term(spin, alpha, radius):
    """log10 of |alpha_s| s cosh(s Lambda(R))^2 (in logs: the term itself may overflow)."""
    lam = math.acosh(1.0 + CUTOFF_EXPONENT / radius)
    x = spin * lam
    log_cosh = x + math.log1p(math.exp(-2 * x)) - math.log(2.0)
    return math.log10(abs(alpha)) + math.log10(spin) + 2 * log_cosh / math.log(10.0)


def deformation_problem(spin, alpha, radius):
    """Why a spin-``spin`` coupling ``alpha`` cannot be represented at ``radius`` (the
    smallest radius it is used at), or None. Assumes radius and coupling are in the domain."""
    if alpha == 0:
        return None
    log_term = _log10_deformation_term(spin, alpha, radius)
    if log_term <= math.log10(MAX_DEFORMATION_TERM):
        return None
    return (f"a spin-{spin} coupling {alpha:g} at R = {radius:g} makes the kernel term "
            f"|alpha_s| s cosh(s Lambda)^2 ~ 1e{log_term:.0f} at the grid's cutoff, beyond "
            f"what double precision represents (limit 1e{math.log10(MAX_DEFORMATION_TERM):.0f}); "
            f"use larger radii or a smaller coupling")


def size_text(n_points):
    """``about 4.0 GB``: the memory of a run of ``n_points`` points."""
    n = n_points * BYTES_PER_POINT
    for unit, scale in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= scale:
            value = n / scale
            return f"about {value:,.0f} {unit}" if value >= 10 else f"about {value:.1f} {unit}"
    return f"about {n} bytes"
