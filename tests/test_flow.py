"""The Burgers flow of CDD-deformed levels: CFT closed form, predictions by characteristics,
the flow equation from exact derivatives, the branch point R_c(alpha) and the command line
around it.

Convention (README, docs/physics.md section 4): S -> S exp(+i alpha m_a m_b sinh t), so
d/dalpha E = E dE/dR + P^2/R, and alpha > 0 is the Hagedorn side.
"""

import json
import math

import mpmath
import numpy as np
import pytest
from scipy.optimize import brentq

from reference import deformed_free_fermion_branch, deformed_free_fermion_energy
from tba import free_fermion, ising_e8, lee_yang, sinh_gordon, solve_ground_state, solve_radii, ttbar
from tba.cli import main as cli_main
from tba.physics.flow import (UndeformedCurve, branch_point, cft_branch_radius, cft_energy, predict,
                      predict_ground_state)
from tba.solvers.ground import energy_derivatives, flow_residual

FF = free_fermion()
SG = sinh_gordon(0.6)
LY = lee_yang()
E8 = ising_e8()


# --------------------------------------------------------------------------------------
# 1. CFT closed form = Nambu-Goto for c = 24; predictions by characteristics
# --------------------------------------------------------------------------------------

def nambu_goto_energy(radius, alpha, n, n_bar, dimension=26):
    """Closed-string light-cone (Nambu-Goto) level in D dimensions, minus the bulk term sigma R.

    Arvis, Phys. Lett. B127 (1983) 106 (light-cone quantisation of the Nambu string; closed-
    string form as quoted e.g. by Dubovsky, Flauger & Gorbenko, JHEP 09 (2013) 045, from memory):

        E_NG = sqrt( sigma^2 R^2 + 4 pi sigma (N + Ntilde - (D - 2)/12) + (2 pi (N - Ntilde)/R)^2 )

    Identification with the project's closed form (docs/physics.md section 4): string tension
    sigma = 1/(2 alpha); E_NG contains the bulk term sigma R, the TBA/CFT energy does not, so
    E = E_NG - sigma R; c = D - 2 = 24 transverse bosons, (N, Ntilde) = (Delta, Delta_bar).
    Evaluated with 40-digit mpmath, so the cancellation in E_NG - sigma R costs nothing.
    """
    with mpmath.workdps(40):
        sigma = 1 / (2 * mpmath.mpf(alpha))
        R = mpmath.mpf(radius)
        square = (sigma ** 2 * R ** 2 + 4 * mpmath.pi * sigma * (n + n_bar - mpmath.mpf(dimension - 2) / 12)
                  + (2 * mpmath.pi * (n - n_bar) / R) ** 2)
        return float(mpmath.sqrt(square) - sigma * R)


# (R, alpha, N, Ntilde): ground state, level-matched excited states and P != 0 states
NG_LEVELS = [(7.0, 0.3, 0, 0), (7.0, 0.3, 1, 1), (3.0, 0.05, 2, 0), (5.0, 0.2, 3, 1),
             (10.0, 1.0, 4, 2), (4.0, 0.01, 5, 3), (6.0, 0.5, 0, 1), (20.0, 2.0, 3, 0),
             (1.3, 0.0007, 1, 0)]


@pytest.mark.parametrize("radius, alpha, n, n_bar", NG_LEVELS)
def test_cft_closed_form_is_nambu_goto_for_c24(radius, alpha, n, n_bar):
    # Arvis 1983 (closed-string light-cone spectrum), D = 26, sigma = 1/(2 alpha): see
    # nambu_goto_energy. Scale for the relative comparison: the level's size or, for the
    # zero-energy level (N + Ntilde = 2, P = 0), the CFT gap 2 pi / R.
    E = cft_energy(radius, alpha, 24, n, n_bar)
    ng = nambu_goto_energy(radius, alpha, n, n_bar)
    scale = max(abs(ng), 2 * math.pi / radius)
    assert abs(E - ng) <= 1e-13 * scale, (E, ng)


def test_cft_branch_radius_is_string_hagedorn_and_closed_form_ends_there():
    # c = 24: R_c = sqrt(2 pi c alpha / 3) = sqrt(16 pi alpha) must be the inverse Hagedorn
    # temperature of the closed bosonic string, beta_H = 4 pi sqrt(alpha') with
    # alpha' = 1/(2 pi sigma), sigma = 1/(2 alpha) (Polchinski, String Theory vol. 1, from memory)
    for alpha in (0.01, 0.3, 2.0):
        sigma = 1 / (2 * alpha)
        beta_h = 4 * math.pi * math.sqrt(1 / (2 * math.pi * sigma))
        assert cft_branch_radius(24, alpha) == pytest.approx(beta_h, rel=1e-14)
        # the closed form's square root vanishes there (docs/physics.md section 4): real just above,
        # NaN just below, and E(R_c) = -R_c / (2 alpha) (the square root is zero)
        for c in (0.5, 24):
            Rc = cft_branch_radius(c, alpha)
            assert cft_energy(Rc * (1 + 1e-9), alpha, c) == pytest.approx(-Rc / (2 * alpha), rel=1e-4)
            assert math.isnan(cft_energy(Rc * (1 - 1e-9), alpha, c))
    # alpha -> 0 reproduces the undeformed CFT level 2 pi (D + Dbar - c/12)/R (no cancellation
    # in the closed form; common practice)
    assert cft_energy(2.0, 1e-300, 0.5, 1 / 16, 1 / 16) == pytest.approx(math.pi * (1 / 8 - 1 / 24), rel=1e-15)


def cft_level(c, delta, delta_bar):
    """Undeformed CFT level E(R) = 2 pi (D + Dbar - c/12)/R and dE/dR (docs/physics.md section 4)."""
    def level(Rt):
        E = 2 * math.pi * (delta + delta_bar - c / 12) / Rt
        return E, -E / Rt, 0.0
    return level


@pytest.mark.parametrize("radius, alpha, c, delta, delta_bar", [
    (2.0, 0.1, 0.5, 0, 0),            # ground state, Hagedorn side
    (1.0, -0.3, 0.5, 0, 0),           # ground state, other side
    (3.0, 0.2, 0.5, 1 / 2, 1 / 16),   # Ising primary with P != 0 (Delta - Delta_bar = 7/16)
    (2.5, -0.02, 24, 1, 0),           # k = 1
    (4.0, -0.01, 24, 2, 3),           # k = -1, negative alpha
    (5.0, 0.2, 24, 3, 1),             # k = 2
    (6.0, 0.5, 24, 0, 1),             # k = -1, positive alpha
    (1.5, 0.05, 1.0, 2.5, 0.5),       # k = 2, c = 1
])
def test_predict_reproduces_cft_closed_form(radius, alpha, c, delta, delta_bar):
    # the characteristics of the Burgers equation, applied to the undeformed CFT level, must
    # give the closed form (docs/physics.md section 4: both solve d_alpha E = E E' + P^2/R with
    # P R = 2 pi (Delta - Delta_bar) fixed)
    k = delta - delta_bar
    pred = predict(cft_level(c, delta, delta_bar), radius, alpha, k=k)
    exact = cft_energy(radius, alpha, c, delta, delta_bar)
    scale = max(abs(exact), 2 * math.pi / radius)
    assert abs(pred.energy - exact) <= 1e-13 * scale, (pred.energy, exact)
    assert pred.momentum == pytest.approx(2 * math.pi * k / radius, rel=1e-15)
    # the characteristic: R = R~ cosh(beta) - alpha E (flow module docstring)
    assert pred.effective_radius * math.cosh(pred.boost) - alpha * pred.energy == pytest.approx(radius, rel=1e-13)
    assert (pred.boost == 0.0) == (k == 0)


@pytest.mark.parametrize("radius, alpha", [(2.0, 0.2), (0.6, 0.2), (0.46, 0.2), (1.0, -0.5), (0.3, -1.0)])
def test_predict_ground_state_free_fermion_against_bessel(radius, alpha):
    # outside reference: E = E_NS(R + alpha E) solved with brentq on the Bessel series
    # (reference.deformed_free_fermion_energy; docs/physics.md sections 2 and 4)
    pred = predict_ground_state(FF, radius, alpha)
    exact = deformed_free_fermion_energy(radius, alpha)
    assert abs(pred.energy - exact) <= 1e-12 * abs(exact)
    assert abs(pred.energy - exact) <= pred.error + 4e-16 * abs(exact)  # the error estimate bounds it
    assert pred.effective_radius == pytest.approx(radius + alpha * exact, rel=1e-12)


def test_predict_ground_state_matches_direct_deformed_solve_sinh_gordon():
    # two routes to the same number: the flow prediction from the undeformed curve and the
    # deformed TBA solved directly (docs/physics.md section 4: E(R, alpha) = E(R + alpha E, 0))
    curve = UndeformedCurve(SG)
    for radius, alpha in [(0.6, 0.2), (1.0, 0.3), (2.0, -0.3), (0.5, -1.0)]:
        pred = predict_ground_state(SG, radius, alpha, curve=curve)
        res = solve_ground_state(SG, radius, ttbar(alpha), tol=1e-13)
        assert res.converged, res.message
        assert abs(pred.energy - res.energy) <= 1e-12 * abs(res.energy)
        assert abs(pred.energy - res.energy) <= pred.error + res.error


# --------------------------------------------------------------------------------------
# 2. the flow equation from exact derivatives, and the derivatives against differences
# --------------------------------------------------------------------------------------

RADII = np.linspace(0.8, 4.0, 20)
ALPHAS = np.linspace(-0.3, 0.3, 20)


def _flow_residual_grid(model):
    worst = 0.0
    for alpha in ALPHAS:
        # towards small R (where the branch point is), each point warm-started from the last
        results = solve_radii(model, RADII[::-1], ttbar(alpha), tol=1e-13)
        for res in results:
            assert res.converged, (model.name, res.radius, alpha, res.message)
            fr = flow_residual(res)
            worst = max(worst, abs(fr["residual"]) / fr["scale"])
    return worst


def test_flow_residual_grid_sinh_gordon():
    # d_alpha E - E d_R E - P^2/R = 0 (docs/physics.md section 4; Smirnov & Zamolodchikov 2017,
    # Cavaglia et al. 2016, from memory) from the exact (linearised) derivatives, on a
    # 20 x 20 grid R in [0.8, 4], alpha in [-0.3, 0.3] (R_c(0.3) = 0.65 < 0.8: all real)
    assert _flow_residual_grid(SG) <= 1e-10


@pytest.mark.slow
def test_flow_residual_grid_e8():
    # as above for the eight-species E8 theory (R_c(0.3) = 0.56 < 0.8)
    assert _flow_residual_grid(E8) <= 1e-10


def _derivative(f, x, h):
    """Fourth-order centred difference (common practice): error h^4 f^(5)/30 + rounding / h."""
    return (8 * (f(x + h) - f(x - h)) - (f(x + 2 * h) - f(x - 2 * h))) / (12 * h)


@pytest.mark.parametrize("model", [SG, E8], ids=["sinh-gordon", "ising-e8"])
@pytest.mark.parametrize("radius, alpha", [(0.8, 0.3), (1.5, -0.3), (4.0, 0.1), (2.0, 0.0)])
def test_exact_derivatives_against_finite_differences(model, radius, alpha):
    # the linearised-equation derivatives dE/dR, dE/dalpha, d2E/dR2 against centred differences
    # of energies solved to 1e-13 (step 1e-4: truncation ~1e-16, rounding ~1e-9 relative)
    res = solve_ground_state(model, radius, ttbar(alpha), tol=1e-13)
    assert res.converged, res.message
    d = energy_derivatives(res, spins=(1,), second=True)

    def energy(R, a):
        r = solve_ground_state(model, R, ttbar(a), tol=1e-13, start=res)
        assert r.converged, r.message
        return r.energy

    h = 1e-4
    dR = _derivative(lambda R: energy(R, alpha), radius, h)
    da = _derivative(lambda a: energy(radius, a), alpha, h)
    d2R = (energy(radius + h, alpha) - 2 * res.energy + energy(radius - h, alpha)) / h ** 2
    assert abs(d["dE_dR"] - dR) <= 1e-7 * abs(d["dE_dR"])
    assert abs(d["dE_dalpha1"] - da) <= 1e-7 * abs(d["dE_dalpha1"])
    # second-order difference of the second derivative: truncation h^2 E''''/12, rounding
    # 4 * 1e-13 |E| / h^2 ~ 4e-5 |E|: checked to 1e-4 relative
    assert abs(d["d2E_dR2"] - d2R) <= 1e-4 * abs(d["d2E_dR2"])
    # the exact derivatives' error estimates are small (they bound the grid dependence)
    assert d["dE_dR_error"] <= 1e-10 * abs(d["dE_dR"])
    assert d["dE_dalpha1_error"] <= 1e-10 * abs(d["dE_dalpha1"])


# --------------------------------------------------------------------------------------
# 3. the branch point R_c(alpha)
# --------------------------------------------------------------------------------------

@pytest.mark.parametrize("alpha", [0.05, 0.2, 1.0])
def test_branch_point_free_fermion_against_bessel(alpha):
    # outside reference: E_NS'(R'_*) = 1/alpha by brentq on the Bessel series, R_c = R'_* -
    # alpha E_NS(R'_*) (reference.deformed_free_fermion_branch; docs/physics.md section 4)
    r_star, r_c = deformed_free_fermion_branch(alpha)
    bp = branch_point(FF, alpha)
    assert bp.status == "found"
    assert abs(bp.radius - r_c) <= 1e-12 * r_c
    assert abs(bp.radius - r_c) <= bp.radius_error  # the error estimate bounds the true error
    # R'_* is where dR/dR' = 1 - alpha E' vanishes: a square-root point, so R'_* itself is
    # only determined to ~sqrt(rounding); 1e-7 is what the stationarity allows
    assert bp.effective_radius == pytest.approx(r_star, rel=1e-7)
    assert bp.energy == pytest.approx((r_star - r_c) / alpha, rel=1e-7)


@pytest.mark.parametrize("model, c, alphas, tol_smallest", [
    (FF, 0.5, (1e-2, 1e-3, 1e-4), 5e-5),
    (LY, 0.4, (1e-2, 1e-3, 1e-4), 1e-5),
], ids=["free-fermion", "lee-yang"])
def test_branch_radius_small_alpha_tends_to_cft(model, c, alphas, tol_smallest):
    # R_c -> sqrt(2 pi c alpha / 3) as alpha -> 0 (docs/physics.md section 4, the CFT closed form with
    # E_0 -> -pi c/(6R)). The corrections: for Lee-Yang the bulk term -f R of the TBA energy
    # gives R_c/R_cft - 1 = alpha f / 2 = -0.072 alpha at leading order (derived here from
    # E = -pi c/(6R) - f R; the next term, R^(7/5) in E, corrects it by ~alpha^(1/5) relative);
    # for the free fermion the R log R term of E_NS gives ~alpha log alpha. Tolerances: a few
    # times those estimates at alpha = 1e-4.
    deviations = [abs(branch_point(model, a).radius / cft_branch_radius(c, a) - 1) for a in alphas]
    assert all(d1 > d2 for d1, d2 in zip(deviations, deviations[1:])), deviations
    assert deviations[-1] <= tol_smallest, deviations
    if model is LY:
        assert deviations[-1] / alphas[-1] == pytest.approx(0.25 / math.sqrt(3) / 2, rel=0.15)


def test_branch_point_none_for_non_positive_alpha():
    # alpha <= 0: the ground state has no branch point (README, Conventions)
    for alpha in (0.0, -0.1):
        bp = branch_point(SG, alpha)
        assert bp.status == "none" and math.isnan(bp.radius)
        assert bp.as_record()["radius"] is None


# --------------------------------------------------------------------------------------
# 6. the command line around R_c
# --------------------------------------------------------------------------------------

def _cli_solve(capsys, radius, alpha, tol="1e-12"):
    code = cli_main(["solve", "--model", "sinh-gordon", "--coupling", "0.6", "--radius", repr(radius),
                     "--alpha", repr(alpha), "--tol", tol, "--json"])
    out = capsys.readouterr().out.strip().splitlines()
    assert code == 0 and len(out) == 1
    return json.loads(out[0])


def test_cli_converges_just_above_rc_and_reports_no_real_solution_below(capsys):
    # R_c from the undeformed curve (branch_point); the README promises "converged" where a
    # real solution exists and "no-real-solution" past the branch point (alpha > 0). At
    # 1e-6 above R_c rounding is amplified ~1e3 times (dE/dR ~ (R - R_c)^(-1/2)): tol 1e-12 is
    # refused with the accuracy the conditioning allows, tol 1e-10 converges.
    alpha = 0.2
    bp = branch_point(SG, alpha)
    strict = _cli_solve(capsys, bp.radius * (1 + 1e-6), alpha)
    assert strict["status"] in ("converged", "not-converged"), strict["message"]
    if strict["status"] == "not-converged":
        assert "conditioning limits the relative accuracy" in strict["message"]
        assert strict["energy"] is None
    above = _cli_solve(capsys, bp.radius * (1 + 1e-6), alpha, tol="1e-10")
    assert above["status"] == "converged", above["message"]
    # its energy is E_0(R') at the root R' > R'_* of R' - alpha E_0(R') = R (docs/physics.md
    # section 4; g increases on [R'_*, R], brentq). Near the square-root point the root is
    # ill-conditioned (g' ~ 1e-3 there), hence 1e-9 rather than 1e-12.
    curve = UndeformedCurve(SG)
    R = above["radius"]
    r_prime = brentq(lambda r: r - alpha * curve(r)[0] - R, bp.effective_radius, R, xtol=1e-15, rtol=1e-15)
    expected = curve(r_prime)[0]
    assert abs(above["energy"] - expected) <= 1e-9 * abs(expected)
    assert above["energy"] > bp.energy  # the physical branch: R' > R'_*, E increasing
    below = _cli_solve(capsys, bp.radius * (1 - 1e-6), alpha)
    assert below["status"] == "no-real-solution", below["message"]
    assert below["energy"] is None and below["error"] is None
