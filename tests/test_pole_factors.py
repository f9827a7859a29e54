"""CDD pole and resonance factors in the solvers (issue 11, items 5 and 6).

F_u(t) = (sinh t + i sin u) / (sinh t - i sin u): the generalised CDD factors of Camilo, Fleury,
Lencses, Negro and Zamolodchikov (JHEP 2021); docs/physics.md section 8. Checks:
* a factor given as a deformation against the same S-matrix typed as a block model or as an
  explicit kernel callable (the solver's weights and energies);
* the turning point of S = -1 / (f_0.3 f_0.2) (the free fermion times two inverse factors),
  which the kernel produces and no TTbar term: R_* on two grids, the second branch and the
  complex pair beyond it, against a slow dense solve written here from the equations alone
  (trapezoid rule, the kernel evaluated pointwise, Newton with numpy's LU, the curve
  parametrised by eps(0); common practice, no source);
* the staircase (Al.B. Zamolodchikov, "Resonance factorized scattering and roaming
  trajectories", 1991): the free fermion times the resonance pair u = pi/2 +- i theta0 has
  c_eff plateaux at the unitary minimal-model values 1 - 6/(p(p+1));
* refusals: excited levels with pole factors, folds for alpha <= 0 with a real ground state;
* run files, the store, the report, `tba export` and `tba solve` with factors: the stored numbers
  against direct solves, the flow relation with the factors at alpha = 0, one-line errors.
"""

import math
from fractions import Fraction

import numpy as np
import pytest
import scipy.optimize

import tba
from tba.models.cdd import cdd_factor, resonance
from tba.solvers.operators import kernel_samples

FF = tba.free_fermion()
TWO_POLES = cdd_factor(0.3 * math.pi, -1) + cdd_factor(0.2 * math.pi, -1)


# -- (a) a factor as a deformation = the same S-matrix typed in ----------------------------------

def test_deformation_equals_the_block_model_and_the_kernel_callable():
    # 1 / (f_0.3 f_0.2): as the free fermion's deformation, as block content {3/10: -1, 1/5: -1},
    # as sinh-Gordon (B = 0.6: S = 1/f_0.3) times 1/f_0.2, and as a pointwise kernel callable
    blocks = tba.user_model(masses=[1], blocks={Fraction(3, 10): -1, Fraction(1, 5): -1})
    sg = tba.sinh_gordon(0.6)
    sigmas = (math.sin(0.3 * math.pi), math.sin(0.2 * math.pi))
    closed = lambda t: sum(2 * s * np.cosh(t) / (np.sinh(t) ** 2 + s * s) for s in sigmas)  # noqa: E731
    callable_model = tba.user_model(masses=[1], kernel=closed, pole_distance=0.2 * math.pi)
    for R in (0.75, 1.0, 2.0):
        a = tba.solve(FF, R, TWO_POLES)
        b = tba.solve(blocks, R)
        c = tba.solve(sg, R, cdd_factor(0.2 * math.pi, -1))
        k = tba.solve(callable_model, R)
        assert a.converged and b.converged and c.converged and k.converged
        # the same band-limited weights: equal to rounding
        assert abs(a.energy - b.energy) <= 1e-14 * abs(a.energy)
        assert abs(a.energy - c.energy) <= 1e-14 * abs(a.energy)
        np.testing.assert_allclose(kernel_samples(FF, a.grid, TWO_POLES), kernel_samples(blocks, a.grid),
                                   rtol=0, atol=1e-16)
        # another discretisation (pointwise kernel, finer grid): within both error estimates
        assert k.grid != a.grid
        assert abs(a.energy - k.energy) <= a.error + k.error
        assert a.error <= 1e-12 * abs(a.energy)


def test_resonance_deformation_equals_its_kernel():
    # the staircase factor: kernel 1/cosh(t - theta0) + 1/cosh(t + theta0) (Zamolodchikov 1991)
    theta0 = 16.0
    closed = lambda t: 1 / np.cosh(t - theta0) + 1 / np.cosh(t + theta0)  # noqa: E731
    model = tba.user_model(masses=[1], kernel=closed, pole_distance=math.pi / 2)
    for R in (math.exp(-4), math.exp(-12)):
        a, k = tba.solve(FF, R, resonance(theta0, -1)), tba.solve(model, R)
        assert a.converged and k.converged
        assert abs(a.energy - k.energy) <= a.error + k.error
        assert abs(a.energy - k.energy) <= 1e-14 * abs(a.energy)


# -- (b), (c) the turning point of the two-pole factor against a dense solve ----------------------

class DenseTBA:
    """The ground-state TBA of one fermion with kernel phi = sum 2 s cosh t / (sinh^2 t + s^2)
    (s = sin 0.3 pi, sin 0.2 pi), discretised by the trapezoid rule on [-cut, cut] with the kernel
    evaluated pointwise, every linear system solved densely. eps = R cosh t - (1/2pi) phi * L."""

    def __init__(self, h, cut):
        n = int(round(cut / h))
        t = h * np.arange(-n, n + 1)
        s = np.array([math.sin(0.3 * math.pi), math.sin(0.2 * math.pi)])
        u = t[:, None, None] - t[None, :, None]
        self.K = h / (2 * np.pi) * np.sum(2 * s * np.cosh(u) / (np.sinh(u) ** 2 + s * s), axis=-1)
        self.c, self.h, self.mid, self.N = np.cosh(t), h, n, t.size

    def L(self, e):
        return np.log1p(np.exp(-e))

    def F(self, e, R):
        return e - R * self.c + self.K @ self.L(e)

    def J(self, e):
        with np.errstate(over="ignore"):  # exp(eps) of the tails: 1 / inf = 0
            return np.eye(self.N) - self.K / (1 + np.exp(e))[None, :]

    def energy(self, e):
        return -self.h / (2 * np.pi) * np.sum(self.c * self.L(e))

    def bordered(self, e):
        """[[J, -cosh t], [e_mid, 0]]: the Jacobian of (F, eps(0) - x) in (eps, R)."""
        A = np.zeros((self.N + 1, self.N + 1))
        A[:-1, :-1], A[:-1, -1], A[-1, self.mid] = self.J(e), -self.c, 1.0
        return A

    def at(self, x, e, R):
        """(eps, R) with eps(0) = x, by Newton from (e, R)."""
        for _ in range(30):
            b = np.concatenate([self.F(e, R), [e[self.mid] - x]])
            d = np.linalg.solve(self.bordered(e), -b)
            e, R = e + d[:-1], R + d[-1]
            if np.max(np.abs(d)) < 1e-14:
                break
        return e, R

    def slope(self, e):
        """(d eps/dx, dR/dx) along the curve."""
        d = np.linalg.solve(self.bordered(e), np.concatenate([np.zeros(self.N), [1.0]]))
        return d[:-1], d[-1]

    def newton(self, e, R):
        for _ in range(40):
            d = np.linalg.solve(self.J(e), -self.F(e, R))
            e = e + d
            if np.max(np.abs(d)) < 1e-14:
                break
        assert np.max(np.abs(self.F(e, R)) / (1 + np.abs(e))) < 1e-13
        return e


@pytest.fixture(scope="module")
def dense():
    """The fold of the dense equations: x = eps(0) stepped from R = 1 until dR/dx changes sign,
    then dR/dx = 0 solved by Brent's method."""
    D = DenseTBA(0.06, 7.5)
    e = D.newton(D.c.astype(float), 1.0)
    x, R = e[D.mid], 1.0
    path = [(x, e, R)]
    while D.slope(path[-1][1])[1] > 0:  # R decreases with x until the fold
        x -= 0.2
        e, R = D.at(x, path[-1][1], path[-1][2])
        path.append((x, e, R))
    (xa, ea, Ra), (xb, eb, Rb) = path[-2], path[-1]
    near = {}

    def g(xx):
        ee, RR = D.at(xx, ea if abs(xx - xa) < abs(xx - xb) else eb, Ra)
        near[xx] = (ee, RR)
        return D.slope(ee)[1]

    x_star = scipy.optimize.brentq(g, xb, xa, xtol=1e-14, rtol=1e-15)
    e_star, R_star = near[x_star] if x_star in near else D.at(x_star, eb, Rb)
    return dict(D=D, x=x_star, e=e_star, R=R_star, E=D.energy(e_star))


@pytest.fixture(scope="module")
def fold():
    return tba.locate_fold(FF, TWO_POLES)


def test_fold_of_the_kernel_on_two_grids_and_against_the_dense_solve(fold, dense):
    # no TTbar coupling: the continuation starts at R = 1 (continuation.py)
    assert fold.parameter == "radius"
    assert fold.value_error < 1e-13                    # the two grids agree
    assert abs(fold.value - dense["R"]) <= fold.value_error + 1e-14
    assert abs(fold.energy - dense["E"]) <= fold.energy_error + 1e-12
    assert fold.value == pytest.approx(0.7362886514175, abs=1e-12)
    # the same fold from another start
    assert tba.locate_fold(FF, TWO_POLES, start=2.0).value == pytest.approx(fold.value, abs=2e-14)
    # the solver: real just above, no-real-solution below, naming the turning point
    # (next to R_* rounding is amplified like dE/dR ~ (R - R_*)^(-1/2): a looser tol there)
    above = tba.solve(FF, fold.value * (1 + 1e-6), TWO_POLES, tol=1e-10)
    below = tba.solve(FF, fold.value * 0.99, TWO_POLES)
    assert above.converged and below.status is tba.Status.NO_REAL_SOLUTION
    assert "turns back at R = 0.73628865" in below.message
    # the physical branch above R_* against the dense solve
    D = dense["D"]
    e = D.newton(D.c.astype(float), 0.8)
    res = tba.solve(FF, 0.8, TWO_POLES)
    assert abs(res.energy - D.energy(e)) <= res.error + 1e-14


def test_second_branch_and_complex_pair_against_the_dense_solve(fold, dense):
    D, x_star, R_star = dense["D"], dense["x"], dense["R"]
    # second branch at R = 0.76: the dense curve beyond the fold (eps(0) < x_*) passes R again
    R = 0.76
    cache = {"e": dense["e"], "R": R_star}

    def gap(x):
        e, RR = D.at(x, cache["e"], cache["R"])
        return RR - R

    x2 = scipy.optimize.brentq(gap, x_star - 1.5, x_star - 1e-3, xtol=1e-14)
    e2, _ = D.at(x2, dense["e"], R_star)
    second = tba.second_branch(fold, R)
    assert second.fold_indicator < 0
    assert abs(second.energy - D.energy(e2)) <= second.error + 1e-13
    # the complex pair at R < R_*: R(x) = R_* + a (x - x_*)^2 near the fold, so x is complex there;
    # complex Newton at fixed R from eps_* + i s d eps/dx, s = sqrt((R_* - R) / a)
    v, _ = D.slope(dense["e"])
    h = 1e-3
    a = (D.slope(D.at(x_star + h, dense["e"], R_star)[0])[1]
         - D.slope(D.at(x_star - h, dense["e"], R_star)[0])[1]) / (4 * h)
    for R in (0.73, 0.7):
        s = math.sqrt((R_star - R) / a)
        e = D.newton(dense["e"] + 1j * s * v, R)
        E = D.energy(e)
        pair = tba.complex_pair(fold, R)
        assert abs(E.imag) > 0.05
        assert min(abs(pair.energy - E), abs(pair.energy - np.conj(E))) <= pair.error + 1e-13


def test_fold_with_ttbar_against_the_dense_solve(dense):
    # alpha < 0 with the two-pole factor: the kernel's fold survives. With P = 0 the TTbar term only
    # shifts the radius, R = R' - alpha E(R', 0) (docs/physics.md section 4), so along the dense
    # undeformed curve (parametrised by x = eps(0)) the deformed fold is min_x R'(x) - alpha E(x)
    alpha = -0.05
    f = tba.locate_fold(FF, tba.ttbar(alpha) + TWO_POLES)
    assert f.value_error < 1e-13 and 0.6 < f.value < dense["R"]
    D, cache = dense["D"], {"e": dense["e"], "R": dense["R"]}

    def deformed_radius(x):
        e, R = D.at(x, cache["e"], cache["R"])
        cache["e"], cache["R"] = e, R
        return R - alpha * D.energy(e)

    xs = dense["x"] + np.arange(1.0, -1.01, -0.1)       # from the physical side, in small steps
    values = [deformed_radius(x) for x in xs]
    i = int(np.argmin(values))
    assert 0 < i < len(xs) - 1
    cache["e"], cache["R"] = D.at(xs[i], dense["e"], dense["R"])
    best = scipy.optimize.minimize_scalar(deformed_radius, bracket=(xs[i + 1], xs[i], xs[i - 1]), tol=1e-9)
    assert abs(f.value - best.fun) <= f.value_error + 1e-14


# -- the staircase -------------------------------------------------------------------------------

def test_staircase_plateaux():
    # c_eff(R) = -6 R E_0 / pi of S = (sinh t - i cosh theta0) / (sinh t + i cosh theta0) (the free
    # fermion times the resonance pair u = pi/2 +- i theta0, power -1): plateaux of width theta0/2
    # in log(1/R) centred at theta0/4 + (p - 3) theta0/2 at c_p = 1 - 6/(p(p+1)), p = 3..6, with
    # crossovers between them (Zamolodchikov 1991). Measured: 0.49992, 0.69986, 0.79977, 0.85683.
    theta0 = 16.0
    d = resonance(theta0, -1)
    c = {}
    for L in (4.0, 8.0, 12.0, 16.0, 20.0, 28.0):
        R = math.exp(-L)
        res = tba.solve(FF, R, d, tol=1e-10)
        assert res.converged, res.message
        c[L] = -6 * R * res.energy / math.pi
    for p, L in zip((3, 4, 5, 6), (4.0, 12.0, 20.0, 28.0)):
        assert c[L] == pytest.approx(1 - 6 / (p * (p + 1)), abs=5e-4)
    assert 0.52 < c[8.0] < 0.68 and 0.72 < c[16.0] < 0.78  # between plateaux
    values = [c[L] for L in sorted(c)]
    assert all(b > a for a, b in zip(values, values[1:]))


# -- refusals ------------------------------------------------------------------------------------

@pytest.mark.parametrize("model, state", [(tba.sinh_gordon(0.6), "1/2,-1/2"), (FF, "1/2,-1/2"),
                                          (tba.lee_yang(), "0")])
def test_excited_levels_refuse_pole_factors(model, state):
    # their sources and phases would need the factors: refused, not wrong numbers
    with pytest.raises(ValueError, match="pole and resonance factors: ground state only"):
        tba.solve(model, 2.0, TWO_POLES, state=state)
    assert tba.solvers.levels.unavailable(model, state, TWO_POLES) is not None
    assert tba.solvers.levels.unavailable(model, state, tba.ttbar(0.1)) is None


def test_bethe_yang_refuses_pole_factors():
    with pytest.raises(ValueError, match="deformation: excited levels take the spin CDD factors only"):
        tba.bethe_yang_energy(tba.sinh_gordon(0.6), 10.0, (0.5, -0.5), cdd_factor(0.5))


def test_fold_refusal_for_alpha_le_0_only_with_a_real_ground_state():
    sg = tba.sinh_gordon(0.6)
    with pytest.raises(ValueError, match="no fold in R for alpha <= 0 .it is real at R = 0.001"):
        tba.locate_fold(sg, tba.ttbar(-0.1) + cdd_factor(0.5))
    with pytest.raises(ValueError, match="no fold in R for alpha <= 0"):
        tba.locate_fold(sg, tba.ttbar(-0.1))


def test_thermodynamics_leaves_out_the_bulk_term_with_pole_factors():
    sg = tba.sinh_gordon(0.6)
    (p,) = tba.thermodynamics(sg, [0.5], cdd_factor(0.2 * math.pi, -1))
    assert p.status is tba.Status.CONVERGED and not p.bulk_included
    assert "with pole factors" in p.message
    (q,) = tba.thermodynamics(sg, [0.5])
    assert q.bulk_included


# -- run files, the store and the command line ---------------------------------------------------

RUN = """
output = "poles.h5"
[[models]]
name = "free-fermion"
[deformation]
alphas = [0, 0.05]
poles = [[0.3, -1], [0.2, -1]]
{extra}
[radii]
start = 0.7
stop = 1.0
count = 4
"""


def _tba(*args):
    import contextlib
    import io

    from tba.cli import main

    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main([str(a) for a in args])
    return code, out.getvalue(), err.getvalue()


def test_run_file_factors_resolve_store_and_report(tmp_path):
    import json

    import h5py

    from tba.scans.runfile import loads_run, resolve_run

    run = loads_run(RUN.format(extra="resonances = [[16.0, -1]]"), base_dir=tmp_path)
    assert run.poles == ((0.3, -1), (0.2, -1)) and run.resonances == ((16.0, -1),)
    assert resolve_run(run.to_dict()) == run                      # the resolved run round-trips
    d = run.deformation(0.05)
    assert d.couplings == {1: 0.05} and d.factors == (TWO_POLES + resonance(16.0, -1)).factors
    # a run without factors keeps its identity (no new keys in its resolved form)
    plain = loads_run(RUN.replace("poles = [[0.3, -1], [0.2, -1]]", "").format(extra=""))
    assert "poles" not in plain.to_dict()["deformation"] and not plain.has_poles
    # a small scan: the energies are the solver's (warm-started differently: within both error
    # estimates), the flow check solves at alpha = 0 with the factors
    path = tmp_path / "poles.toml"
    path.write_text(RUN.format(extra=""))
    code, out, err = _tba("run", path, "--workers", 1)
    assert code == 0, err
    with h5py.File(tmp_path / "poles.h5") as f:
        attrs = json.loads(f.attrs["cdd_factors"])
        assert attrs["poles"] == [{"x": 0.3, "power": -1}, {"x": 0.2, "power": -1}]
        assert json.loads(f.attrs["run"])["deformation"]["poles"] == [[0.3, -1], [0.2, -1]]
        energy, error = f["energy"][0, :, :, 0], f["error"][0, :, :, 0]
        flow = f["flow_residual"][0, 1, :, 0]
    for a, alpha in enumerate((0.0, 0.05)):
        for r, R in enumerate(np.linspace(0.7, 1.0, 4)):
            res = tba.solve(FF, R, tba.ttbar(alpha) + TWO_POLES)
            assert (np.isnan(energy[a, r]) if not res.converged
                    else abs(energy[a, r] - res.energy) <= error[a, r] + res.error)
    assert np.nanmax(flow) < 1e-13                                # E(R, a) = E(R + a E, 0), factors kept
    code, out, err = _tba("report", tmp_path / "poles.h5")
    assert code == 0 and "F_(pi x)^-1 with x = 0.3, F_(pi x)^-1 with x = 0.2" in out
    # the turning points of the scan: locate_fold at every alpha, consistent with the points
    assert "the fold of the full equations" in out and "holds for all 2 checked curve(s)" in out
    with h5py.File(tmp_path / "poles.h5") as f:
        radius = f["branch_points/branch_radius"][0]
    assert radius[0] == pytest.approx(0.7362886514175, abs=1e-12)
    assert radius[1] == pytest.approx(tba.locate_fold(FF, tba.ttbar(0.05) + TWO_POLES).value, abs=1e-13)
    code, out, err = _tba("export", "--json", tmp_path / "poles.h5")
    records = [json.loads(line) for line in out.splitlines()]
    assert code == 0 and len(records) == 8
    assert all([f["power"] for f in r["cdd_factors"]["factors"]] == [-1, -1] for r in records)


@pytest.mark.parametrize("extra, key", [
    ("resonances = [[-1.0, -1]]", "deformation.resonances[0]: theta0"),
    ("resonances = [[16.0, 0]]", "deformation.resonances[0]: the power"),
    ("resonances = [16.0]", "deformation.resonances[0]: expected a pair"),
    ("resonances = [[16.0, -1.0]]", "deformation.resonances[0][1]"),
    ("resonances = 3", "deformation.resonances: expected an array"),
])
def test_run_file_factors_are_checked(tmp_path, extra, key):
    path = tmp_path / "bad.toml"
    path.write_text(RUN.format(extra=extra))
    code, out, err = _tba("run", path)
    lines = err.strip().splitlines()
    assert code == 2 and len(lines) == 1 and key in lines[0] and "Traceback" not in err


def test_solve_command_line_factors():
    import json

    code, out, err = _tba("solve", "--model", "free-fermion", "--radius", 0.7, 1.0, "--pole", "0.3:-1",
                          "--pole", "0.2:-1", "--json")
    assert code == 0, err
    below, above = (json.loads(line) for line in out.splitlines())
    assert below["status"] == "no-real-solution" and below["energy"] is None
    assert above["energy"] == pytest.approx(tba.solve(FF, 1.0, TWO_POLES).energy, abs=1e-13)
    assert [f["power"] for f in above["cdd_factors"]["factors"]] == [-1, -1]
    for args, name in ((("--pole", "1.5:-1"), "--pole"), (("--pole", "0.3"), "--pole"),
                       (("--resonance", "16:x"), "--resonance"),
                       (("--pole", "0.3:-1", "--state", "1/2,-1/2"), "--state")):
        code, out, err = _tba("solve", "--model", "sinh-gordon", "--coupling", 0.6, "--radius", 1, *args)
        lines = err.strip().splitlines()
        assert code == 2 and len(lines) == 1 and name in lines[0], err


def test_a_scan_over_factor_parameters_is_a_list_of_model_entries(tmp_path):
    # like a scan over a model's coupling: one [[models]] entry per value, on the model axis
    from tba.scans.runfile import loads_run, resolve_run

    text = """
output = "scan.h5"
[[models]]
name = "free-fermion"
poles = [[0.3, -1], [0.2, -1]]
[[models]]
name = "free-fermion"
poles = [[0.3, -1], [0.1, -1]]
[deformation]
alphas = [0]
[radii]
start = 0.8
stop = 1.0
count = 2
"""
    run = loads_run(text)
    assert [m.label for m in run.models] == ["free-fermion poles=0.3:-1,0.2:-1",
                                             "free-fermion poles=0.3:-1,0.1:-1"]
    assert resolve_run(run.to_dict()) == run
    assert run.deformation(0.0, 1) == cdd_factor(0.3 * math.pi, -1) + cdd_factor(0.1 * math.pi, -1)
    ds = tba.scan_run(run)
    for m, x in enumerate((0.2, 0.1)):
        d = cdd_factor(0.3 * math.pi, -1) + cdd_factor(x * math.pi, -1)
        for r, R in enumerate((0.8, 1.0)):
            res = tba.solve(FF, R, d)
            point = ds.isel(model=m, alpha=0, radius=r, state=0)
            if not res.converged:  # x = 0.1 turns back at R_* = 0.818 > 0.8
                assert (m, r) == (1, 0) and int(point.status) == 1 and np.isnan(float(point.energy))
                continue
            assert abs(float(point.energy) - res.energy) <= float(point.error) + res.error
    with pytest.raises(ValueError, match=r"models\[1\].poles\[0\]: x must be a number in \(0, 1\)"):
        loads_run(text.replace("[[0.3, -1], [0.1, -1]]", "[[1.3, -1]]"))
    with pytest.raises(ValueError, match=r"models\[1\]: repeats models\[0\]"):
        loads_run(text.replace("[[0.3, -1], [0.1, -1]]", "[[0.3, -1], [0.2, -1]]"))


def test_example_run_files_load():
    from pathlib import Path

    from tba.scans.runfile import load_run

    runs = Path(__file__).resolve().parent.parent / "runs"
    poles = load_run(runs / "cdd-poles.toml")
    assert [m.poles for m in poles.models] == [((0.3, -1), (0.2, -1)), ((0.3, -1), (0.1, -1))]
    staircase = load_run(runs / "staircase.toml")
    assert staircase.models[0].resonances == ((16.0, -1),)
