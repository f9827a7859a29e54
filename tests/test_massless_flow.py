"""The massless flow from the tricritical Ising model (c = 7/10) to the Ising model (c = 1/2):
its kernel, c_eff at both ends, and its TTbar deformation against the flow relation built from
its own undeformed curve.

S_RR = S_LL = -1, S_RL(t) = tanh(t/2 - i pi/4) (Al.B. Zamolodchikov, Nucl. Phys. B358 (1991) 524,
from memory); the kernel 1/cosh t and the c_eff values are derived in docs/physics.md section 9.
"""

import math

import mpmath
import numpy as np
import pytest
from scipy.integrate import quad

import tba
from tba.models.uv import ir_central_charge, uv_central_charge

FLOW = tba.tricritical_to_ising()


def c_eff(res):
    return -6 * res.radius * res.energy / math.pi, 6 * res.radius * res.error / math.pi


def test_kernel_is_the_log_derivative_of_s_rl():
    # phi_RL = -i d/dt log tanh(t/2 - i pi/4) (mpmath's numerical derivative) = 1 / cosh t;
    # no kernel within a chirality (S_RR = S_LL = -1)
    for t in (-2.3, -0.4, 0.0, 0.9, 3.1):
        s_rl = lambda u: mpmath.tanh(u / 2 - 1j * mpmath.pi / 4)  # noqa: E731
        phi = -1j * mpmath.diff(lambda u: mpmath.log(s_rl(u)), t)
        k = FLOW.kernel(np.array(t))
        assert float(mpmath.re(phi)) == pytest.approx(k[0, 1], rel=1e-13)
        assert abs(float(mpmath.im(phi))) < 1e-13
        assert k[0, 1] == pytest.approx(1 / math.cosh(t), rel=1e-14) and k[0, 0] == k[1, 1] == 0
    # its transform int e^{ikt} / cosh t dt = pi / cosh(pi k / 2) (scipy quad; Gradshteyn and
    # Ryzhik 3.981, from memory): what the band-limited weights use
    for k in (0.0, 0.8, 2.5):
        direct = quad(lambda t: math.cos(k * t) / math.cosh(t), -60, 60, limit=400)[0]
        assert FLOW.kernel_transform(np.array(k))[0, 1] == pytest.approx(direct, rel=1e-10)
        assert direct == pytest.approx(math.pi / math.cosh(math.pi * k / 2), rel=1e-10)


def test_dilogarithms_give_seven_tenths_and_one_half():
    # UV kinks: the inner plateau e^{-eps} = golden ratio (L(1/phi) = pi^2/10), the outer one a
    # free fermion (L(1/2) = pi^2/12): c = (6/pi^2)(2 pi^2/10 - pi^2/12) = 7/10; IR: two decoupled
    # free kinks, 1/2 (Rogers' dilogarithm with mpmath; docs/physics.md section 9)
    assert uv_central_charge(FLOW) == pytest.approx(0.7, rel=1e-14)
    assert ir_central_charge(FLOW) == pytest.approx(0.5, rel=1e-14)


@pytest.fixture(scope="module")
def curve():
    """The undeformed ground state at M R = 1e-6 .. 1e4 (shared: each point costs ~1 s)."""
    out, start = {}, None
    for R in (1e4, 300.0, 1.0, 1e-3, 1e-4, 1e-6):
        res = tba.solve_ground_state(FLOW, R, start=start)
        assert res.converged, res.message
        out[R] = start = res
    return out


def test_c_eff_in_the_ultraviolet(curve):
    # c_eff -> 7/10 with the corrections of conformal perturbation theory around the tricritical
    # Ising model by phi_13 (dimension 6/5, coupling of dimension 4/5): the first order vanishes
    # on the cylinder, the second gives (M R)^(8/5); the bulk energy gives (M R)^2 (common
    # practice, from memory). a and b of c_eff = 7/10 - a (M R)^(8/5) + b (M R)^2 from M R = 1e-4
    # and 1e-3 then predict the deviation at M R = 1e-6 (~1e-10) to 1e-12, the size of the
    # omitted (M R)^(16/5) terms there and of the solver's error
    radii = [1e-4, 1e-3]
    c = [c_eff(curve[R])[0] for R in radii]
    a, b = np.linalg.solve(np.array([[-R ** 1.6, R ** 2] for R in radii]), np.array(c) - 0.7)
    value, error = c_eff(curve[1e-6])
    assert a > 0 and error < 1e-13
    assert abs(value - (0.7 - a * 1e-6 ** 1.6 + b * 1e-12)) < 1e-12
    assert 0 < 0.7 - value < 1e-9


def test_c_eff_in_the_infrared_is_ising_deformed_by_ttbar(curve):
    # S_RL(t) = -exp(2 i e^t + O(e^{3t})) as t -> -infinity, and the TTbar factor between a right
    # and a left mover is exp(i alpha (M^2/2) e^t): the infrared is the Ising model (c = 1/2)
    # deformed by TTbar with alpha = 4 / M^2, corrections of order e^{3t} (derived,
    # docs/physics.md section 9); the closed form of the deformed CFT, tba.cft_energy, then
    # holds to 1e-12 from M R = 300 on, and c_eff -> 1/2 like (pi / 6) / (M R)^2
    t = -9.0
    expansion = -np.exp(2j * math.exp(t))
    assert abs(complex(mpmath.tanh(t / 2 - 1j * mpmath.pi / 4)) - expansion) < 10 * math.exp(3 * t)
    for R in (1e4, 300.0):
        res = curve[R]
        exact = tba.cft_energy(R, 4.0, 0.5)
        assert abs(res.energy - exact) <= 1e-12 * abs(exact) and res.error <= 1e-12 * abs(exact)
    assert c_eff(curve[1e4])[0] - 0.5 == pytest.approx(math.pi / 6 * 1e-8, rel=1e-4)


def test_c_eff_decreases_along_the_flow(curve):
    # between the fixed points c_eff falls monotonically (Zamolodchikov's c-theorem, from memory)
    values = [c_eff(curve[R])[0] for R in sorted(curve)]
    assert 0.7 > values[0] and all(a > b for a, b in zip(values, values[1:])) and values[-1] > 0.5


@pytest.mark.slow
@pytest.mark.parametrize("R, alpha", [(1.0, 0.3), (2.0, -0.5)])
def test_ttbar_deformed_flow_against_its_own_undeformed_curve(R, alpha):
    # no closed form: the deformed TBA against the flow relation E(R, alpha) = E(R + alpha E, 0),
    # built by characteristics from the undeformed curve (tba.predict_ground_state;
    # Smirnov and Zamolodchikov 2017, Cavaglià et al. 2016, from memory), and the Burgers
    # equation from exact derivatives
    res = tba.solve_ground_state(FLOW, R, tba.ttbar(alpha), tol=1e-11)
    assert res.converged, res.message
    pred = tba.predict_ground_state(FLOW, R, alpha, tol=1e-11)
    assert abs(res.energy - pred.energy) <= res.error + pred.error <= 1e-11 * abs(res.energy)
    b = tba.flow_residual(res)
    assert abs(b["residual"]) <= b["error"] <= 1e-10 * b["scale"]


def test_branch_point_of_the_deformed_flow():
    # alpha > 0: R_c from the undeformed curve (E_0'(R~) = 1/alpha, docs/physics.md section 4):
    # the deformed TBA converges just above it and has no real solution below it; R_c lies
    # between the CFT values sqrt(2 pi c alpha / 3) of the two ends of the flow, c = 1/2 and 7/10
    # (a tolerance of 1e-9 is ample for the verdicts)
    alpha = 0.3
    bp = tba.branch_point(FLOW, alpha, tol=1e-10)
    assert bp.radius_error < 1e-9 * bp.radius
    assert math.sqrt(2 * math.pi * 0.5 * alpha / 3) < bp.radius < math.sqrt(2 * math.pi * 0.7 * alpha / 3)
    above = tba.solve_ground_state(FLOW, bp.radius * (1 + 1e-3), tba.ttbar(alpha), tol=1e-9)
    assert above.converged, above.message
    below = tba.solve_ground_state(FLOW, 0.5 * bp.radius, tba.ttbar(alpha), tol=1e-9)
    assert below.status is tba.Status.NO_REAL_SOLUTION, below.message
