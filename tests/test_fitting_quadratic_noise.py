"""QuadraticNoiseModel: polynomial drift by least squares plus a white or AR(1) noise closure."""

from __future__ import annotations

import numpy as np
import pytest

from ergodex.fitting import make_fitter
from ergodex.fitting.quadratic_noise import ridge_regression
from ergodex.series import Series


@pytest.fixture(scope="module")
def double_well_series():
    from ergodex.scenarios import double_well

    # Many short runs rather than a few long ones: the generator steps all runs at once, so the
    # cost is set by the duration. 10 substeps (h = 0.005) keep the Euler–Maruyama bias of the
    # stationary density well under 1 % (Kloeden & Platen 1992, weak order 1).
    return double_well(seed=31, n_runs=16, duration=100.0, dt=0.05, substeps=10)


def test_ridge_regression_matches_least_squares_without_ridge():
    # With ridge = 0 the solution is ordinary least squares (numpy.linalg.lstsq, reference).
    rng = np.random.default_rng(30)
    Theta = rng.normal(size=(200, 4)) * [1.0, 10.0, 0.1, 3.0]
    Y = rng.normal(size=(200, 2))
    expected = np.linalg.lstsq(Theta, Y, rcond=None)[0].T
    np.testing.assert_allclose(ridge_regression(Theta, Y, 0.0), expected, rtol=1e-10, atol=1e-12)
    shrunk = ridge_regression(Theta, Y, 1.0)
    assert np.linalg.norm(shrunk * np.sqrt(np.mean(Theta**2, axis=0))) < np.linalg.norm(
        expected * np.sqrt(np.mean(Theta**2, axis=0))
    )


def test_double_well_drift_and_noise(double_well_series):
    # Truth: dx = (x − x³) dt + 0.7 dW (the scenario's Langevin equation; wells at ±1, noise
    # variance 0.49 per unit time). One-step differences at dt = 0.05 carry the first-order
    # Itô–Taylor bias (dt/2)(f f' + σ²/2 f'') (Kloeden & Platen 1992, §5.5), about 0.1 on the
    # cubic coefficient here; the tolerances allow for it, and the wells (roots of the drift) are
    # far less affected.
    fitter = make_fitter("quadratic-noise", {"degree": 3}).fit(double_well_series)
    coef = dict(zip(fitter.feature_names_, fitter.coefficients_[0]))
    assert abs(coef["x"] - 1.0) < 0.2
    assert abs(coef["x^3"] + 1.0) < 0.2
    assert abs(coef["1"]) < 0.05 and abs(coef["x^2"]) < 0.05
    well = np.sqrt(-coef["x"] / coef["x^3"])
    assert abs(well - 1.0) < 0.05
    assert abs(fitter.noise_covariance_[0, 0] - 0.49) < 0.1 * 0.49
    surrogate = fitter.surrogate_
    assert surrogate.kind == "polynomial-stochastic" and surrogate.is_stochastic
    np.testing.assert_allclose(surrogate.noise, fitter.noise_covariance_)


def test_central_differences_cancel_the_drift_of_a_reversible_process(double_well_series):
    # For a reversible diffusion the backward increment has the opposite conditional mean, so
    # central differences lose the drift (why "forward" is the default; Kloeden & Platen 1992).
    central = make_fitter(
        "quadratic-noise", {"degree": 3, "differentiation": "finite-difference"}
    ).fit(double_well_series)
    forward = make_fitter("quadratic-noise", {"degree": 3}).fit(double_well_series)
    assert abs(central.coefficients_[0, 1]) < 0.5 * abs(forward.coefficients_[0, 1])


def test_ar1_level_recovers_the_eigenvalues_of_a_red_noise_system():
    # dx = (−x + r) dt, dr = −0.5 r dt + dW: x driven by red noise. The two-level model
    # (Kravtsov, Kondrashov & Ghil 2005) sees x only; its hidden variable is r up to a linear change
    # of variables, which leaves the eigenvalues of the linear system, −1 and −0.5, unchanged.
    # Sampling error of a decay rate θ from T time units is about √(2θ/T) ≈ 0.02 for T = 2000
    # (common practice, no source); the tolerance 0.12 adds the O(dt) bias of one-step differences.
    rng = np.random.default_rng(32)
    dt, n_steps, n_runs = 0.02, 25000, 4
    x = np.zeros(n_runs)
    r = rng.normal(size=n_runs)
    out = np.empty((n_steps, n_runs))
    shocks = rng.normal(size=(n_steps, n_runs)) * np.sqrt(dt)
    for k in range(n_steps):
        x, r = x + (-x + r) * dt, r - 0.5 * r * dt + shocks[k]
        out[k] = x
    series = Series.from_arrays([out[:, j : j + 1] for j in range(n_runs)], ("x",), dt)
    fitter = make_fitter("quadratic-noise", {"degree": 1, "noise": "ar1"}).fit(series)
    surrogate = fitter.surrogate_
    assert surrogate.variables == ("x", "r_x")
    assert surrogate.settings["hidden_variables"] == ["r_x"]
    assert surrogate.noise[0, 0] == 0.0 and surrogate.noise[1, 1] > 0
    jac = surrogate.jacobian(np.zeros((1, 2)))[0]
    eigenvalues = np.sort(np.linalg.eigvals(jac).real)
    np.testing.assert_allclose(eigenvalues, [-1.0, -0.5], atol=0.12)


def test_ar1_level_on_ring_modes_fits_saves_and_validates(tmp_path):
    # The hidden AR(1) level beside a PCA transform (empirical model reduction on leading modes,
    # Kravtsov, Kondrashov & Ghil 2005): the model has 2k variables, the transform feeds the k
    # observed ones, the file round trip is exact and the validator runs it to a verdict in the
    # modes' space (pass or fail is a finding here, not the point; a crash would be the bug).
    from pathlib import Path

    from ergodex.readers import read_dataset
    from ergodex.surrogate import Surrogate
    from ergodex.validation import CheckSpec, check

    dataset = Path(__file__).resolve().parents[1] / "datasets" / "station-ring"
    if not dataset.is_dir():
        pytest.skip("the committed station-ring sample is not present")
    fit_data, held_out = read_dataset(dataset).split()
    fitter = make_fitter("quadratic-noise", {"noise": "ar1", "n_modes": 4}).fit(fit_data)
    surrogate = fitter.surrogate_
    modes = ("mode_1", "mode_2", "mode_3", "mode_4")
    assert surrogate.variables == modes + tuple(f"r_{m}" for m in modes)
    assert surrogate.transform.output_names == modes
    assert surrogate.observed_variables == modes
    path = tmp_path / "model.json"
    surrogate.to_json(path)
    back = Surrogate.from_json(path)
    assert back.coefficients.tobytes() == surrogate.coefficients.tobytes()
    assert back.fingerprint() == surrogate.fingerprint()
    card = check(back, held_out, CheckSpec(seed=5)).scorecard
    assert card.verdict in ("pass", "fail")
    assert {row.variable for row in card.rows} <= set(modes) | {"all regimes"}
    assert any(row.variable == "mode_1" for row in card.rows)
    assert card.settings["hidden_variables"] == [f"r_{m}" for m in modes]


@pytest.mark.slow
def test_double_well_closure_passes_and_linear_inverse_model_fails(double_well_series):
    # The stationary density of dx = (x − x³) dt + 0.7 dW is bimodal, p ∝ exp(−2V/σ²) with
    # V = x⁴/4 − x²/2 (Risken, The Fokker–Planck Equation, §5.2). A cubic drift with white noise
    # can reproduce it; a linear inverse model's stationary law is Gaussian and cannot. Both are
    # checked on held-out runs by the validator against the data's own noise floor.
    from ergodex.scenarios import double_well
    from ergodex.validation import CheckSpec, validate

    held_out = double_well(seed=32, n_runs=8, duration=100.0, dt=0.05, substeps=10)
    spec = CheckSpec(seed=5)
    closure = make_fitter("quadratic-noise", {"degree": 3}).fit(double_well_series)
    linear = make_fitter("linear-inverse", {}).fit(double_well_series)
    closure_card = validate(closure.surrogate_, held_out, spec)
    linear_card = validate(linear.surrogate_, held_out, spec)
    # the closure must not fail; on these 800 time units the check resolves a change of the
    # hopping time scale only from about ×1.75 and may say so (inconclusive, not a pass)
    assert closure_card.verdict in ("pass", "inconclusive"), closure_card.reasons
    assert all(row.verdict == "pass" for row in closure_card.rows)
    assert linear_card.verdict == "fail"
    assert linear_card.largest_ratio > 3 * closure_card.largest_ratio


def _lorenz63_series(rng: np.random.Generator, *, noise: float) -> Series:
    from ergodex.scenarios import lorenz63_trajectories

    x0 = rng.normal(scale=5.0, size=(3, 3)) + [0.0, 0.0, 25.0]
    spun = lorenz63_trajectories(x0, dt=0.01, n_out=501, substeps=4)[:, -1]
    runs = lorenz63_trajectories(spun, dt=0.01, n_out=2000, substeps=4)
    runs = runs + rng.normal(scale=noise, size=runs.shape) if noise else runs
    return Series.from_arrays(list(runs), ["x", "y", "z"], 0.01)


def test_energy_constraint_holds_to_rounding_on_random_states():
    # Analytic identity the option enforces: Σᵢ xᵢ Qᵢ(x) = 0 for every x (Schlegel & Noack
    # 2015, J. Fluid Mech. 765, their energy-preservation condition on the quadratic terms).
    from ergodex.fitting.energy import quadratic_energy_rate

    rng = np.random.default_rng(41)
    data = _lorenz63_series(rng, noise=0.5)
    states = rng.normal(scale=10.0, size=(500, 3))
    free = make_fitter("quadratic-noise", {"ridge": 0.0}).fit(data)
    tied = make_fitter("quadratic-noise", {"ridge": 0.0, "conserve_energy": True}).fit(data)
    scale = np.mean(np.linalg.norm(states, axis=1) ** 3)
    tied_rate = quadratic_energy_rate(tied.coefficients_, tied.terms_, states)
    free_rate = quadratic_energy_rate(free.coefficients_, free.terms_, states)
    assert np.abs(tied_rate).max() < 1e-10 * scale
    assert np.abs(free_rate).max() > 1e-6 * scale  # without the option the noise breaks it
    # the same holds in a reduced space with the hidden AR(1) level
    emr = make_fitter(
        "quadratic-noise", {"n_modes": 2, "noise": "ar1", "conserve_energy": True}
    ).fit(data)
    rate = quadratic_energy_rate(emr.coefficients_, emr.terms_, states[:, :2])
    assert np.abs(rate).max() < 1e-10 * np.mean(np.linalg.norm(states[:, :2], axis=1) ** 3)


def test_energy_preserving_fit_recovers_lorenz63():
    # Lorenz (1963): the quadratic terms -x z (in dy/dt) and x y (in dz/dt) conserve
    # x² + y² + z² (y·(-xz) + z·(xy) = 0), so the constrained fit can match the truth; on
    # clean data with order-4 central differences (dt = 0.01, RK4 step 0.0025) the tendency
    # error is ~1e-5 relative, so the coefficients must agree to 1e-3.
    from ergodex.scenarios import lorenz63_surrogate

    rng = np.random.default_rng(42)
    data = _lorenz63_series(rng, noise=0.0)
    fitter = make_fitter(
        "quadratic-noise",
        {"ridge": 0.0, "conserve_energy": True, "differentiation": "finite-difference"},
    ).fit(data)
    truth = lorenz63_surrogate()
    expected = np.zeros_like(fitter.coefficients_)
    index = {tuple(t.powers): k for k, t in enumerate(fitter.terms_)}
    for k, term in enumerate(truth.terms):
        expected[:, index[tuple(term.powers)]] = truth.coefficients[:, k]
    np.testing.assert_allclose(fitter.coefficients_, expected, atol=1e-3 * 28.0)


def test_energy_preserving_regression_solves_the_kkt_system():
    # Reference: the constrained minimum of Σᵢ‖yᵢ − Θ ξᵢ‖² subject to A vec(Ξ) = 0 solves the
    # Karush–Kuhn–Tucker system [[2H, Aᵀ], [A, 0]] [vec Ξ; λ] = [2 b; 0] (Golub & Van Loan
    # 2013, §6.2; H block-diagonal with ΘᵀΘ), solved here directly by numpy.
    from ergodex.fitting.energy import energy_constraints, energy_preserving_regression
    from ergodex.surrogate import polynomial_terms

    rng = np.random.default_rng(43)
    terms = polynomial_terms(3, 2)
    X = rng.normal(size=(400, 3))
    Theta = np.column_stack([np.prod(X ** np.asarray(t.powers), axis=1) for t in terms])
    Y = rng.normal(size=(400, 3))
    ours = energy_preserving_regression(Theta, Y, terms, 0.0)
    A = energy_constraints(terms)
    # each of the 10 cubic monomials in 3 variables gives one constraint
    assert A.shape == (10, 3 * len(terms))
    H = np.kron(np.eye(3), Theta.T @ Theta)
    b = (Theta.T @ Y).T.ravel()
    kkt = np.block([[2 * H, A.T], [A, np.zeros((len(A), len(A)))]])
    solution = np.linalg.solve(kkt, np.concatenate([2 * b, np.zeros(len(A))]))
    np.testing.assert_allclose(ours.ravel(), solution[: H.shape[0]], rtol=1e-8, atol=1e-10)
