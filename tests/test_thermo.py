"""Mirror-channel thermodynamics (tba.physics.thermo): f, s, u, c from the ground state at R = 1/T.

    f = T E(1/T) + f_bulk,  s = R E' - E,  u = E' + f_bulk,  c = -R^2 E''     (tba.physics.thermo docstring;
    docs/physics.md section 6)

checked against the exact free-fermion Bessel series, the bulk term against a fit of the
small-R expansion, and the Hagedorn bound T_H = 1/R_c for alpha > 0.
"""

import math

import numpy as np
import pytest
from scipy.special import kv, kvp

from reference import deformed_free_fermion_branch, deformed_free_fermion_energy
from tba import Status, free_fermion, ising_e8, lee_yang, sinh_gordon, solve_radii, ttbar
from tba.physics.flow import branch_point
from tba.physics.thermo import thermodynamics

FF = free_fermion()


def free_fermion_series(radius):
    """(E_NS, E_NS', E_NS'') from the Bessel series E_NS(R) = -(1/pi) sum_k (-1)^(k+1) K_1(kR)/k
    (docs/physics.md section 2; textbook, Mussardo 2010, from memory), differentiated term by term
    with scipy.special.kvp (d^n/dx^n K_1): E' = -(1/pi) sum (-1)^(k+1) K_1'(kR),
    E'' = -(1/pi) sum (-1)^(k+1) k K_1''(kR). About 60/R + 50 terms (tail < e^{-60});
    math.fsum for the sums."""
    k = np.arange(1, int(60.0 / radius) + 51, dtype=float)
    sign = (-1.0) ** (k + 1)
    E = -math.fsum((sign * kv(1, k * radius) / k).tolist()) / math.pi
    dE = -math.fsum((sign * kvp(1, k * radius, 1)).tolist()) / math.pi
    d2E = -math.fsum((sign * k * kvp(1, k * radius, 2)).tolist()) / math.pi
    return E, dE, d2E


TEMPERATURES = [0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 20.0]


def test_free_fermion_thermodynamics_against_bessel_series():
    # f = T E, s = R E' - E, u = E', c = -R^2 E'' with E the exact series (the free fermion has
    # no bulk term in the model: bulk_included is False and said so)
    points = thermodynamics(FF, TEMPERATURES, tol=1e-13)
    assert [p.temperature for p in points] == TEMPERATURES  # order of the input kept
    for T, p in zip(TEMPERATURES, points):
        assert p.status is Status.CONVERGED, p.message
        assert not p.bulk_included and "bulk" in p.message
        R = 1 / T
        E, dE, d2E = free_fermion_series(R)
        expected = {"free_energy": T * E, "entropy": R * dE - E, "energy_density": dE,
                    "specific_heat": -R * R * d2E}
        for name, value in expected.items():
            got = getattr(p, name)
            assert abs(got - value) <= 1e-11 * abs(value), (T, name, got, value)
            # the reported error bounds the true one (plus a rounding allowance for the series)
            assert abs(got - value) <= getattr(p, name + "_error") + 1e-15 * abs(value), (T, name)


def test_free_fermion_thermodynamics_high_temperature_limit():
    # T -> infinity: f -> -pi c T^2 / 6, s -> pi c T / 3, c_v -> pi c T / 3 with c = 1/2 (CFT,
    # E = -pi c/(6R); docs/physics.md section 3), corrections O(m^2 log T) relative to T^2
    T = 1e3
    (p,) = thermodynamics(FF, [T], tol=1e-13)
    c = 0.5
    assert p.free_energy == pytest.approx(-math.pi * c * T * T / 6, rel=1e-4)
    assert p.entropy == pytest.approx(math.pi * c * T / 3, rel=1e-4)
    assert p.specific_heat == pytest.approx(math.pi * c * T / 3, rel=1e-4)


def test_deformed_free_fermion_thermodynamics_from_the_flow_relation():
    # alpha > 0 below the Hagedorn temperature: E(R) = E_NS(R'), R' = R + alpha E (docs/physics.md
    # section 4, reference.deformed_free_fermion_energy), so u = dE/dR = E_NS'(R') / (1 - alpha E_NS'(R'))
    # (chain rule, derived here); E_NS' from the series above
    alpha = 0.2
    temps = [0.5, 1.0, 2.0]
    points = thermodynamics(FF, temps, ttbar(alpha), tol=1e-13)
    for T, p in zip(temps, points):
        assert p.status is Status.CONVERGED, p.message
        R = 1 / T
        E = deformed_free_fermion_energy(R, alpha)
        dE0 = free_fermion_series(R + alpha * E)[1]
        u = dE0 / (1 - alpha * dE0)
        assert p.free_energy == pytest.approx(T * E, rel=1e-11)
        assert p.energy_density == pytest.approx(u, rel=1e-10)
        assert p.entropy == pytest.approx(R * u - E, rel=1e-10)


# --------------------------------------------------------------------------------------
# the bulk term, from a fit of R E_0(R) at small R
# --------------------------------------------------------------------------------------

def _r_times_energy(model, radii):
    """R E_0(R) from TBA energies to 1e-13, warm-started towards small R."""
    results = solve_radii(model, radii[::-1], tol=1e-13)[::-1]
    assert all(r.converged for r in results)
    return np.array([r.radius * r.energy for r in results])


def _small_r_fit(radii, y, exponent, degree):
    """Least-squares fit y = R E_0(R) = a + b R^2 + sum_{n=1..degree} c_n R^(n exponent); returns
    (a, b, c, max residual) (numpy.linalg.lstsq)."""
    A = np.stack([np.ones_like(radii), radii ** 2] + [radii ** (n * exponent) for n in range(1, degree + 1)], 1)
    coef = np.linalg.lstsq(A, y, rcond=None)[0]
    return coef[0], coef[1], coef[2:], float(np.max(np.abs(A @ coef - y)))


def test_lee_yang_bulk_term_from_small_r_fit():
    # Conformal perturbation theory (from memory): R E_exact(R) = -pi c/6 + sum_n a_n R^(12n/5),
    # analytic in lambda R^(2 - 2h) with h = -1/5, and E_TBA = E_exact - f R (the TBA energy has
    # no bulk term, README), so R E_TBA = -pi c/6 - f R^2 + sum_n a_n R^(12n/5): the R^2
    # coefficient is -bulk_energy_density. No R^(12n/5) equals R^2, so the fit separates them.
    ly = lee_yang()
    # -m^2/(4 sqrt 3) (Al.B. Zamolodchikov, Nucl. Phys. B342 (1990) 695, from memory)
    assert ly.bulk_energy_density == pytest.approx(-1 / (4 * math.sqrt(3)), rel=1e-15)
    radii = np.geomspace(0.02, 1.0, 40)
    a, b, c, residual = _small_r_fit(radii, _r_times_energy(ly, radii), 12 / 5, 8)
    assert residual <= 1e-13  # the fit describes the data to rounding: the form is right
    assert abs(b + ly.bulk_energy_density) <= 1e-9 * abs(ly.bulk_energy_density)
    assert a == pytest.approx(-math.pi * 0.4 / 6, rel=1e-12)  # c_eff = 2/5
    # and the bulk term makes thermo's f = T E + f_bulk, u = E' + f_bulk (bulk_included)
    (p,) = thermodynamics(ly, [2.0], tol=1e-13)
    assert p.bulk_included
    assert p.free_energy == pytest.approx(2.0 * solve_radii(ly, [0.5], tol=1e-13)[0].energy + ly.bulk_energy_density,
                                          rel=1e-12)


def test_e8_bulk_term_from_small_r_fit():
    # As for Lee-Yang with the magnetic perturbation of Ising, h = 1/16, 2 - 2h = 15/8 (from
    # memory). The spin flip sigma -> -sigma maps the coupling to minus itself and leaves E_0
    # unchanged, so only even powers of R^(15/8) occur: fitted in R^(15/4) (the fit in R^(15/8)
    # below confirms the odd coefficients vanish). f = -m_1^2 / (8 (sin(pi/3) + sin(2pi/5) +
    # sin(pi/15))) (Fateev 1994, from memory) is what the model carries.
    e8 = ising_e8()
    f = e8.bulk_energy_density
    expected = -1 / (8 * (math.sin(math.pi / 3) + math.sin(2 * math.pi / 5) + math.sin(math.pi / 15)))
    assert f == pytest.approx(expected, rel=1e-14)
    radii = np.geomspace(0.05, 1.0, 20)  # R >= 0.05: the smallest radii are the slow E8 solves
    y = _r_times_energy(e8, radii)
    a, b, c, residual = _small_r_fit(radii, y, 15 / 4, 4)
    assert residual <= 1e-12
    assert abs(b + f) <= 1e-9 * abs(f)
    assert a == pytest.approx(-math.pi * 0.5 / 6, rel=1e-12)
    # the same data fitted in R^(15/8): the first (odd) coefficient is ~0 against the second
    # (-7.8e-3), and the R^2 coefficient agrees less tightly (more free parameters)
    _, b8, c8, _ = _small_r_fit(radii, y, 15 / 8, 6)
    assert abs(c8[0]) <= 1e-5 * abs(c8[1])
    assert abs(b8 + f) <= 1e-6 * abs(f)


# --------------------------------------------------------------------------------------
# the Hagedorn temperature
# --------------------------------------------------------------------------------------

def test_no_real_solution_above_hagedorn_temperature_sinh_gordon():
    # T_H = 1/R_c (docs/physics.md section 6), R_c from the undeformed curve (branch_point)
    sg = sinh_gordon(0.6)
    alpha = 0.2
    t_h = 1 / branch_point(sg, alpha).radius
    temps = [0.5 * t_h, t_h * (1 - 1e-4), t_h * (1 + 1e-4), 2 * t_h, 10 * t_h]
    points = thermodynamics(sg, temps, ttbar(alpha))
    statuses = [p.status for p in points]
    assert statuses == [Status.CONVERGED] * 2 + [Status.NO_REAL_SOLUTION] * 3, [p.message for p in points]
    for p in points[2:]:
        assert math.isnan(p.free_energy) and math.isnan(p.specific_heat)
    # approaching T_H from below: E ~ E_c + const sqrt(R - R_c) at a square-root branch point
    # (docs/physics.md section 4), so u = E' ~ (T_H - T)^(-1/2) and c = -R^2 E'' ~ (T_H - T)^(-3/2)
    # (derived here): a factor 100 in T_H - T multiplies them by ~10 and ~1000
    (near,) = thermodynamics(sg, [t_h * (1 - 1e-6)], ttbar(alpha))
    assert near.energy_density / points[1].energy_density == pytest.approx(10, rel=0.05)
    assert near.specific_heat / points[1].specific_heat == pytest.approx(1000, rel=0.05)


def test_no_real_solution_above_hagedorn_temperature_free_fermion():
    # T_H = 1/R_c with R_c from the Bessel series (reference.deformed_free_fermion_branch)
    alpha = 1.0
    t_h = 1 / deformed_free_fermion_branch(alpha)[1]
    points = thermodynamics(FF, [t_h * (1 - 1e-5), t_h * (1 + 1e-5)], ttbar(alpha))
    assert [p.status for p in points] == [Status.CONVERGED, Status.NO_REAL_SOLUTION]


def test_negative_alpha_has_no_hagedorn_temperature():
    # alpha < 0: no branch point for the ground state (README), real at every temperature
    points = thermodynamics(sinh_gordon(0.6), [0.5, 5.0, 50.0], ttbar(-0.2))
    assert all(p.status is Status.CONVERGED for p in points)


def test_thermodynamics_rejects_bad_temperatures():
    for bad in (0.0, -1.0, math.inf, math.nan):
        with pytest.raises(ValueError):
            thermodynamics(FF, [1.0, bad])
