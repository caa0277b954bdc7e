"""Tests of the ensemble integrator: order of accuracy, noise statistics, blow-ups, engines."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.linalg import solve_continuous_lyapunov

from ergodex.exceptions import SettingsError
from ergodex.integrate import (
    blowup_bound,
    choose_substep,
    integrate_ensemble,
    stability_limit,
)
from ergodex.scenarios import (
    lorenz63_rhs,
    lorenz63_surrogate,
    lorenz96_rhs,
    lorenz96_surrogate,
    ou_surrogate,
)
from ergodex.surrogate import Surrogate, Term, polynomial_terms


def lorenz63(extra_z2: float = 0.0) -> Surrogate:
    """The project's Lorenz-63 surrogate, optionally with a destabilising ``+ extra_z2 dT_up^2``."""
    truth = lorenz63_surrogate()
    if not extra_z2:
        return truth
    terms = truth.terms + (Term("monomial", (0, 0, 2)),)
    return Surrogate(
        truth.variables, terms, np.hstack([truth.coefficients, [[0.0], [0.0], [extra_z2]]])
    )


def lorenz63_ode(_t, y):
    return lorenz63_rhs(np.asarray(y))


def lorenz96() -> Surrogate:
    """The project's Lorenz-96 ring (40 sites, F = 8) spread over the full quadratic table."""
    truth = lorenz96_surrogate()
    terms = polynomial_terms(truth.n_variables, 2)
    index = {t.powers: k for k, t in enumerate(terms)}
    coef = np.zeros((truth.n_variables, len(terms)))
    coef[:, [index[t.powers] for t in truth.terms]] = truth.coefficients
    return Surrogate(truth.variables, terms, coef)


def attractor_states(m: int, rng: np.random.Generator) -> np.ndarray:
    x0 = rng.normal(size=(m, 3)) * 3.0 + [0.0, 0.0, 25.0]
    return integrate_ensemble(
        lorenz63(), x0, dt_out=1.0, n_out=1, spinup=5.0, substep=0.01
    ).last_finite


@pytest.mark.parametrize("engine", ["numba", "numpy"])
def test_rk4_converges_at_fourth_order(engine):
    x0 = np.array([-8.0, 7.0, 27.0])
    # Reference: scipy's DOP853 at rtol 1e-12, many orders below the RK4 errors measured here.
    ref = solve_ivp(lorenz63_ode, (0.0, 1.0), x0, method="DOP853", rtol=1e-12, atol=1e-12).y[:, -1]
    errors = []
    steps = (0.0025, 0.00125, 0.000625)
    for h in steps:
        res = integrate_ensemble(
            lorenz63(), x0[None, :], dt_out=1.0, n_out=2, substep=h, engine=engine
        )
        assert res.substep == h and res.status == "ok"
        errors.append(np.max(np.abs(res.states[0, -1] - ref)))
    ratios = np.array(errors[:-1]) / np.array(errors[1:])
    # Fourth order: halving h divides the global error by 2**4 = 16. The next term of the error
    # expansion makes the ratio 16 (1 + O(h)); measured here it is 18.5 and 17.7, shrinking
    # towards 16 as h halves. The reference's own error (1.7e-11, from comparing rtol 1e-12 with
    # 1e-13) is 2 % of the smallest RK4 error, so it cannot fake the ratio.
    np.testing.assert_allclose(ratios, 16.0, rtol=0.2)
    assert ratios[1] < ratios[0]
    order = np.polyfit(np.log(steps), np.log(errors), 1)[0]
    assert 3.8 < order < 4.3
    assert errors[-1] < 1e-6


@pytest.mark.parametrize("method", ["euler-maruyama", "heun"])
def test_ou_process_reaches_the_lyapunov_covariance(method):
    rng = np.random.default_rng(11)
    # The project's OU scenario (two variables, oscillatory decay, correlated noise).
    ou = ou_surrogate()
    drift = ou.coefficients[:, [ou.terms.index(Term("monomial", p)) for p in ((1, 0), (0, 1))]]
    q = np.asarray(ou.noise)
    # Analytic stationary covariance: A S + S A^T + Q = 0 (Gardiner, Handbook of Stochastic
    # Methods, sec. 4.4.6), solved by scipy.
    expected = solve_continuous_lyapunov(drift, -q)
    members = 3000
    res = integrate_ensemble(
        ou,
        np.zeros((members, 2)),
        dt_out=6.0,
        n_out=3,
        spinup=12.0,
        substep=0.004,
        method=method,
        seed=rng,
    )
    assert res.status == "ok" and res.seed is not None
    # The drift's eigenvalues have real part -0.75, so outputs 6 time units apart are
    # correlated by e^-4.5 ~ 1 % and the transient from the start is gone (e^-9).
    x = res.states.reshape(-1, 2)
    prods = x[:, :, None] * x[:, None, :]
    sample = prods.mean(axis=0)
    stderr = prods.std(axis=0) / np.sqrt(len(x))
    # Within 4 standard errors of the sampling distribution (about 6 % relative here); the
    # discretisation bias (relative ~ |lambda| h / 2 ~ 0.2 % for Euler-Maruyama, with the
    # drift's eigenvalue modulus |lambda| ~ 0.87) is well below that.
    assert np.all(np.abs(sample - expected) < 4.0 * stderr + 1e-12), (sample, expected, stderr)
    # Means are zero for a zero-mean OU process.
    assert np.all(np.abs(x.mean(axis=0)) < 4.0 * x.std(axis=0) / np.sqrt(len(x)))


def test_surrogate_with_an_added_z2_term_blows_up_every_member():
    rng = np.random.default_rng(12)
    x0 = attractor_states(24, rng)
    bad = lorenz63(extra_z2=1.0)
    res = integrate_ensemble(bad, x0, dt_out=0.01, n_out=500, substep=0.005)
    assert res.status == "all-blowup" and res.n_blown_up == 24
    assert np.all(res.blown_up) and np.all(np.isfinite(res.blowup_time))
    assert np.all((res.blowup_time > 0) & (res.blowup_time < res.times[-1]))
    assert np.all(np.isfinite(res.last_finite))
    assert "24 of 24 members blew up" in res.message
    for m in range(24):
        valid = res.valid(m)
        assert np.all(np.isfinite(res.states[m, valid]))
        assert np.all(np.isnan(res.states[m, valid.stop :]))
        # The output just before the blow-up is at most one output interval earlier.
        assert (
            res.times[valid.stop - 1]
            < res.blowup_time[m]
            <= res.times[valid.stop - 1] + 0.01 + 1e-12
        )
    summary = res.summary()
    assert summary["blown_up"] == 24 and len(summary["blowup_times"]) == 24


@pytest.mark.parametrize("engine", ["numba", "numpy"])
def test_blowup_time_matches_the_analytic_finite_time_singularity(engine):
    # dz/dt = z^2 has z(t) = z0 / (1 - z0 t): it crosses the bound B at t = 1/z0 - 1/B and is
    # singular at 1/z0 (analytic). z0 < 0 decays to 0 and never blows up.
    z0 = np.array([[-1.0], [0.5], [1.0], [2.0]])
    model = Surrogate(("z",), (Term("monomial", (2,)),), [[1.0]])
    h = 1e-3
    res = integrate_ensemble(
        model, z0, dt_out=0.01, n_out=300, substep=h, bound=[[-1e3, 1e3]], engine=engine
    )
    assert res.status == "blowup" and list(res.blown_up) == [False, True, True, True]
    expected = 1.0 / z0[1:, 0] - 1.0 / 1e3
    # Detected at the first substep whose state leaves the bound: within one or two substeps.
    assert np.all(np.abs(res.blowup_time[1:] - expected) <= 2 * h)
    assert np.isnan(res.blowup_time[0]) and np.all(np.isfinite(res.states[0]))
    # The last accepted state is inside the bound and close to it.
    assert np.all(np.abs(res.last_finite[1:, 0]) <= 1e3)
    # Every output before a member's blow-up follows the analytic solution, and none after it:
    # the members stop at outputs ~50, ~100 and ~200 of 300, so the compiled engine's outputs,
    # which it holds and copies in blocks, cross several blocks while columns are swapped.
    # RK4's relative error on z' = z^2 grows like (h z)^4 (from memory): below 1e-6 while
    # |z| < 30 at h = 1e-3 (measured: 1.4e-6 is reached only near |z| = 100).
    with np.errstate(divide="ignore"):
        exact = z0[:, 0][:, None] / (1.0 - z0[:, 0][:, None] * res.times[None, :])
    for m in range(4):
        valid = res.valid(m)
        calm = np.abs(exact[m, valid]) < 30.0
        np.testing.assert_allclose(res.states[m, valid, 0][calm], exact[m, valid][calm], rtol=1e-6)
        assert np.all(np.isnan(res.states[m, valid.stop :]))
    # Without a bound the member is stopped only when the state overflows.
    free = integrate_ensemble(model, z0[3:], dt_out=0.01, n_out=300, substep=h, engine=engine)
    assert free.blown_up[0] and free.blowup_time[0] >= res.blowup_time[3] - 1e-12


def test_compiled_rhs_equals_numpy_rhs_to_round_off():
    kernels = pytest.importorskip("ergodex.kernels")
    rng = np.random.default_rng(13)
    model = lorenz96()
    x = rng.normal(scale=4.0, size=(33, 40))
    tables = model.term_tables()
    args = tuple(kernels.build_program(tables, model.n_variables))
    compiled = kernels.rhs_columns(x, *args)
    np.testing.assert_allclose(compiled, model.rhs(x), rtol=1e-13, atol=1e-12)
    # Both against the hand-written Lorenz (1996) equations.
    np.testing.assert_allclose(compiled, lorenz96_rhs(x), rtol=1e-13, atol=1e-12)
    # Only the active terms are in the table: 1 constant + 40 linear + 80 quadratic of 861.
    assert len(tables["active"]) == 121 and len(tables["coef_value"]) == 160

    terms = polynomial_terms(3, 3) + (
        Term("sin", variable=1, frequency=2.0),
        Term("cos", variable=2, frequency=0.5),
    )
    coef = rng.normal(size=(3, len(terms))) * (rng.random((3, len(terms))) < 0.5)
    mixed = Surrogate(("a", "b", "c"), terms, coef)
    t = mixed.term_tables()
    y = rng.normal(size=(17, 3))
    got = kernels.rhs_columns(y, *kernels.build_program(t, 3))
    np.testing.assert_allclose(got, mixed.rhs(y), rtol=1e-12, atol=1e-12)


def test_every_pass_shape_and_long_equations_follow_solve_ivp():
    # One model whose equations take each loop body of the compiled kernel (two linear terms; one
    # linear and one quadratic; two and one; two and two) and one long equation with a constant,
    # a cubic, a sine and a cosine, which is split into partial passes. Reference: scipy's DOP853
    # at rtol 1e-12; RK4 at h = 1e-3 over half a time unit of these mild dynamics is accurate to
    # well below 1e-8 (fourth order, see test_rk4_converges_at_fourth_order).
    kernels = pytest.importorskip("ergodex.kernels")
    terms = polynomial_terms(5, 3) + (
        Term("sin", variable=1, frequency=2.0),
        Term("cos", variable=2, frequency=0.5),
    )
    col = {t.powers: k for k, t in enumerate(terms[:-2])}
    coef = np.zeros((5, len(terms)))
    # equation: (powers of a..e, coefficient) for each term
    table = {
        0: [((1, 0, 0, 0, 0), -1.0), ((0, 1, 0, 0, 0), 0.5)],
        1: [((0, 1, 0, 0, 0), -1.0), ((1, 0, 1, 0, 0), 0.3)],
        2: [((0, 0, 1, 0, 0), -1.0), ((0, 0, 0, 1, 0), 0.2), ((1, 1, 0, 0, 0), 0.4)],
        3: [
            ((0, 0, 0, 1, 0), -1.0),
            ((1, 0, 0, 0, 0), 0.1),
            ((0, 1, 1, 0, 0), 0.3),
            ((1, 0, 0, 1, 0), -0.2),
        ],
        4: [
            ((0, 0, 0, 0, 0), 0.05),
            ((0, 0, 0, 0, 1), -1.0),
            ((1, 0, 0, 0, 0), 0.2),
            ((0, 1, 0, 0, 0), -0.1),
            ((3, 0, 0, 0, 0), 0.1),
            ((0, 2, 0, 0, 0), -0.2),
            ((0, 0, 1, 1, 0), 0.1),
            ((1, 0, 0, 0, 1), 0.15),
        ],
    }
    for eq, entries in table.items():
        for powers, value in entries:
            coef[eq, col[powers]] = value
    coef[4, -2] = 0.2
    coef[4, -1] = 0.1
    model = Surrogate(("a", "b", "c", "d", "e"), terms, coef)
    program = kernels.build_program(model.term_tables(), 5)
    shapes, finals = program[7], program[8]
    assert set(shapes[finals == 1].tolist()) == {0, 1, 2, 3} and np.any(finals == 0)

    rng = np.random.default_rng(21)
    x0 = rng.uniform(-1.0, 1.0, size=(7, 5))
    res = integrate_ensemble(model, x0, dt_out=0.005, n_out=100, substep=1e-3, engine="numba")
    assert res.status == "ok"
    for m in range(7):
        ref = solve_ivp(
            lambda _t, y: model.rhs(y[None, :])[0],
            (0.0, res.times[-1]),
            x0[m],
            method="DOP853",
            t_eval=res.times,
            rtol=1e-12,
            atol=1e-12,
        )
        np.testing.assert_allclose(res.states[m], ref.y.T, rtol=0, atol=1e-8)


def test_engines_agree_and_seeds_reproduce():
    rng = np.random.default_rng(14)
    x0 = attractor_states(6, rng)
    model = lorenz63()
    a = integrate_ensemble(model, x0, dt_out=0.05, n_out=21, substep=0.01, engine="numba")
    b = integrate_ensemble(model, x0, dt_out=0.05, n_out=21, substep=0.01, engine="numpy")
    # One time unit of chaos amplifies round-off by about e^0.9 (largest Lyapunov exponent 0.906,
    # Sprott 2003): differences stay near 1e-12.
    np.testing.assert_allclose(a.states, b.states, rtol=0, atol=1e-9)
    noisy = model.with_noise(np.diag([0.5, 0.5, 0.2]))
    c = integrate_ensemble(noisy, x0, dt_out=0.05, n_out=21, substep=0.01, seed=5, engine="numba")
    d = integrate_ensemble(noisy, x0, dt_out=0.05, n_out=21, substep=0.01, seed=5, engine="numpy")
    e = integrate_ensemble(noisy, x0, dt_out=0.05, n_out=21, substep=0.01, seed=5, engine="numba")
    f = integrate_ensemble(noisy, x0, dt_out=0.05, n_out=21, substep=0.01, seed=6, engine="numba")
    assert c.method == "heun" and c.seed == 5
    np.testing.assert_allclose(c.states, d.states, rtol=0, atol=1e-9)
    np.testing.assert_array_equal(c.states, e.states)
    assert np.max(np.abs(c.states[:, -1] - f.states[:, -1])) > 1e-3
    # A Generator as seed: the integer drawn from it is recorded and reproduces the run.
    g = integrate_ensemble(
        noisy, x0, dt_out=0.05, n_out=5, substep=0.01, seed=np.random.default_rng(1)
    )
    again = integrate_ensemble(noisy, x0, dt_out=0.05, n_out=5, substep=0.01, seed=g.seed)
    np.testing.assert_array_equal(g.states, again.states)


def test_spinup_keep_and_output_layout():
    rng = np.random.default_rng(15)
    x0 = attractor_states(5, rng)
    model = lorenz63()
    full = integrate_ensemble(model, x0, dt_out=0.02, n_out=101, substep=0.01)
    part = integrate_ensemble(
        model, x0, dt_out=0.02, n_out=51, spinup=1.0, substep=0.01, keep=["dT_up", 0]
    )
    assert part.states.shape == (5, 51, 2) and part.variables == ("dT_up", "flow")
    assert part.spinup == pytest.approx(1.0) and part.times[0] == 0.0
    np.testing.assert_allclose(part.times, np.arange(51) * 0.02)
    # Output 0 after one time unit of spin-up is the full run's state at t = 1.
    np.testing.assert_allclose(part.states[:, :, 0], full.states[:, 50:, 2], rtol=0, atol=1e-9)
    np.testing.assert_allclose(part.states[:, :, 1], full.states[:, 50:, 0], rtol=0, atol=1e-9)
    np.testing.assert_allclose(full.states[:, 0], x0)
    np.testing.assert_allclose(part.last_finite, full.last_finite, rtol=0, atol=1e-9)


def test_choose_substep_follows_the_rk4_stability_limit():
    # The stability polynomial of RK4, R(z) = 1 + z + z^2/2 + z^3/6 + z^4/24 (Hairer & Wanner),
    # has |R| = 1 on the negative real axis at about -2.785.
    roots = np.roots([1 / 24, 1 / 6, 1 / 2, 1.0, 0.0])  # R(z) - 1 = 0 -> z = 0 and z = -2.785...
    boundary = float(min(r.real for r in roots if abs(r.imag) < 1e-9))
    assert stability_limit("rk4") == pytest.approx(-boundary, abs=2e-3)
    lam = 200.0
    stiff = Surrogate(
        ("u", "v"), polynomial_terms(2, 1, include_bias=False), [[-lam, 0.0], [0.0, -1.0]]
    )
    h = choose_substep(stiff, np.ones((4, 2)), 0.1)
    assert h <= 0.25 * 2.785 / lam and 0.1 / h == pytest.approx(round(0.1 / h))
    ok = integrate_ensemble(stiff, np.ones((1, 2)), dt_out=0.1, n_out=20)
    assert (
        ok.status == "ok"
        and ok.substep == pytest.approx(h)
        and ok.spectral_radius == pytest.approx(lam)
    )
    assert "spectral radius 200" in ok.message
    # Just outside the region the same system diverges: a blow-up status, not an exception.
    unstable = integrate_ensemble(
        stiff,
        np.ones((1, 2)),
        dt_out=0.1,
        n_out=200,
        substep=1.05 * 2.785 / lam,
        bound=[[-10, 10], [-10, 10]],
    )
    assert unstable.status == "all-blowup"
    # x' = -x^3 is calm at its start 0 (Jacobian -3 x^2 = 0) but stiff where the run may go:
    # |J| = 300 at x = 10. States given for the stiffness set the substep by the same bound.
    cubic = Surrogate(("x",), (Term("monomial", (3,)),), [[-1.0]])
    calm = integrate_ensemble(cubic, np.zeros((2, 1)), dt_out=0.1, n_out=3)
    assert calm.substep == pytest.approx(0.1)
    wary = integrate_ensemble(
        cubic, np.zeros((2, 1)), dt_out=0.1, n_out=3, stiffness_states=[[10.0]]
    )
    assert wary.spectral_radius == pytest.approx(300.0)
    assert wary.substep <= 0.25 * 2.785 / 300.0 and wary.substep == pytest.approx(
        choose_substep(cubic, [[10.0]], 0.1)
    )
    with pytest.raises(SettingsError, match="stiffness_states"):
        integrate_ensemble(
            cubic, np.zeros((2, 1)), dt_out=0.1, n_out=3, stiffness_states=[[1.0, 2.0]]
        )


def test_blowup_bound_widens_the_reference_range():
    ref = np.array([[0.0, -2.0, 5.0], [4.0, 2.0, 5.0]])
    b = blowup_bound(ref, factor=10.0)
    np.testing.assert_allclose(b, [[-18.0, 22.0], [-20.0, 20.0], [-45.0, 55.0]])
    with pytest.raises(SettingsError, match="factor"):
        blowup_bound(ref, factor=-1)


def test_bad_settings_are_refused_naming_them():
    model = lorenz63()
    x0 = np.ones((2, 3))
    with pytest.raises(SettingsError, match="initial_states"):
        integrate_ensemble(model, np.ones((2, 4)), dt_out=0.1, n_out=3)
    with pytest.raises(SettingsError, match="member 1"):
        integrate_ensemble(model, [[1.0, 1, 1], [np.nan, 1, 1]], dt_out=0.1, n_out=3)
    with pytest.raises(SettingsError, match="dt_out"):
        integrate_ensemble(model, x0, dt_out=0.0, n_out=3)
    with pytest.raises(SettingsError, match="n_out"):
        integrate_ensemble(model, x0, dt_out=0.1, n_out=0)
    with pytest.raises(SettingsError, match="method"):
        integrate_ensemble(model, x0, dt_out=0.1, n_out=3, method="leapfrog")
    with pytest.raises(SettingsError, match="ignores the surrogate's noise"):
        integrate_ensemble(model.with_noise(np.eye(3)), x0, dt_out=0.1, n_out=3, method="rk4")
    with pytest.raises(SettingsError, match="keep"):
        integrate_ensemble(model, x0, dt_out=0.1, n_out=3, keep=["pressure"])
    with pytest.raises(SettingsError, match="bound"):
        integrate_ensemble(model, x0, dt_out=0.1, n_out=3, bound=[[1, 0]] * 3)
    with pytest.raises(SettingsError, match="seed"):
        integrate_ensemble(model.with_noise(np.eye(3)), x0, dt_out=0.1, n_out=3, seed=-4)
