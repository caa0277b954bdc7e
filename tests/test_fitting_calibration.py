"""Ensemble Kalman inversion (ergodex.fitting.calibration) against analytic answers."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad

from ergodex.exceptions import SettingsError
from ergodex.fitting.calibrated import (
    piece_noise_covariance,
    statistics_vector,
    surrogate_statistics,
)
from ergodex.fitting.calibration import eki_update, ensemble_kalman_inversion
from ergodex.integrate import integrate_ensemble
from ergodex.surrogate import Surrogate, polynomial_terms


def test_one_update_gives_the_bayesian_posterior_of_a_linear_gaussian_problem():
    rng = np.random.default_rng(11)
    p, d, J = 2, 3, 4000
    A = rng.normal(size=(d, p))
    m0 = np.array([0.5, -1.0])
    C0 = np.array([[1.0, 0.3], [0.3, 0.5]])
    gamma = np.diag([0.2, 0.1, 0.3])
    y = np.array([1.0, 0.0, -0.5])
    # Exact posterior of θ ~ N(m0, C0), y = Aθ + η, η ~ N(0, Γ): the Kalman update
    # (Kalman 1960; e.g. Evensen, Data Assimilation: The Ensemble Kalman Filter, 2009, eq. 3.5)
    gain = C0 @ A.T @ np.linalg.inv(A @ C0 @ A.T + gamma)
    mean_post = m0 + gain @ (y - A @ m0)
    cov_post = C0 - gain @ A @ C0
    u = rng.multivariate_normal(m0, C0, size=J)
    updated = eki_update(u, u @ A.T, y, gamma, rng)
    # With perturbed observations the analysis ensemble samples the posterior (Burgers, van
    # Leeuwen & Evensen 1998); the Monte Carlo error of its mean is about sqrt(diag(C0) / J)
    # (gain estimated from the same J members), so allow 5 such standard errors.
    tolerance = 5.0 * np.sqrt(np.diag(C0) / J)
    assert np.all(np.abs(updated.mean(axis=0) - mean_post) < tolerance)
    # sample covariance of J draws: relative error about sqrt(2 / J) ≈ 2 %; allow 10 %
    assert np.allclose(np.cov(updated.T), cov_post, rtol=0.1, atol=0.1 * np.abs(cov_post).max())


def test_update_refuses_a_one_member_ensemble():
    rng = np.random.default_rng(0)
    with pytest.raises(SettingsError, match="at least 2 members"):
        eki_update(np.zeros((1, 2)), np.zeros((1, 1)), np.zeros(1), np.eye(1), rng)


def _simulated(build, starts, lags, dt=0.1, n_out=4000, seed=5):
    """Forward map: statistics of an integrated ensemble of the surrogate build(θ)."""

    def forward(thetas):
        return np.array(
            [
                surrogate_statistics(
                    build(theta),
                    starts,
                    dt=dt,
                    n_out=n_out,
                    spinup=5.0,
                    lags=lags,
                    seed=seed,
                    stiffness_states=np.linspace(-2, 2, 9)[:, None],
                )
                for theta in thetas
            ]
        )

    return forward


def _ou(theta):
    rate, amplitude = theta
    return Surrogate(
        ["x"],
        polynomial_terms(1, 1),
        np.array([[0.0, -rate]]),
        kind="linear-stochastic",
        noise=np.array([[amplitude**2]]),
    )


def test_eki_recovers_an_ornstein_uhlenbeck_process_from_its_statistics():
    rng = np.random.default_rng(3)
    rate, amplitude, dt, lags = 2.0, 1.0, 0.1, (2, 5)
    # Stationary OU statistics (Gardiner, Handbook of Stochastic Methods, sec. 3.8.4):
    # variance σ²/(2θ), Gaussian kurtosis 3, autocorrelation exp(−θτ).
    y = np.array(
        [amplitude**2 / (2 * rate), 3.0, np.exp(-rate * lags[0] * dt), np.exp(-rate * lags[1] * dt)]
    )
    starts = np.zeros((8, 1))
    forward = _simulated(_ou, starts, lags)
    # Γ: the forward map's own sampling noise, from pieces of one run at the prior's centre
    run = integrate_ensemble(_ou((1.0, 1.5)), starts, dt_out=dt, n_out=4000, spinup=5.0, seed=1)
    gamma = piece_noise_covariance(list(run.states), lags, 16) * 2.0
    prior = np.exp(rng.normal(np.log([1.0, 1.5]), 0.5, size=(30, 2)))
    result = ensemble_kalman_inversion(
        forward, y, gamma, prior, rng=rng, n_iterations=6, positive=np.array([True, True])
    )
    # 8 members × 400 time units, correlation time 0.5: the variance and autocorrelation are
    # sampled to about 2–3 %, so the parameters to well within 10 %
    assert result.parameters[0] == pytest.approx(rate, rel=0.1)
    assert result.parameters[1] == pytest.approx(amplitude, rel=0.1)
    assert result.misfit[-1] < result.misfit[0]


def test_eki_recovers_a_double_well_from_its_exact_stationary_density():
    rng = np.random.default_rng(8)
    a, b, sigma = 1.0, 1.0, 1.0

    # Stationary density of dx = (a x − b x³) dt + σ dW: p(x) ∝ exp(2 (a x²/2 − b x⁴/4) / σ²)
    # (Gardiner, Handbook of Stochastic Methods, sec. 5.2.2: potential solution in one dimension)
    def weight(x, k):
        return x**k * np.exp(2.0 * (a * x**2 / 2 - b * x**4 / 4) / sigma**2)

    z = quad(weight, -np.inf, np.inf, args=(0,))[0]
    m2 = quad(weight, -np.inf, np.inf, args=(2,))[0] / z
    m4 = quad(weight, -np.inf, np.inf, args=(4,))[0] / z
    y = np.array([m2, m4 / m2**2])

    def build(theta):
        return Surrogate(
            ["x"],
            polynomial_terms(1, 3),
            np.array([[0.0, theta[0], 0.0, -theta[1]]]),
            kind="polynomial-stochastic",
            noise=np.array([[sigma**2]]),
        )

    starts = rng.choice([-1.0, 1.0], size=(8, 1))
    simulate = _simulated(build, starts, (1,))

    def forward(thetas):
        return simulate(thetas)[:, :2]  # variance and kurtosis only: the density's statistics

    run = integrate_ensemble(build((0.5, 2.0)), starts, dt_out=0.1, n_out=4000, spinup=5.0, seed=2)
    gamma = np.diag(np.diag(piece_noise_covariance(list(run.states), (1,), 16))[:2]) * 2.0
    prior = np.exp(rng.normal(np.log([0.5, 2.0]), 0.5, size=(30, 2)))
    result = ensemble_kalman_inversion(
        forward, y, gamma, prior, rng=rng, n_iterations=8, positive=np.array([True, True])
    )
    # hops between the wells every few time units: over 8 × 400 time units the variance and
    # kurtosis are sampled to a few per cent, which the two parameters amplify about twofold
    assert result.parameters[0] == pytest.approx(a, rel=0.15)
    assert result.parameters[1] == pytest.approx(b, rel=0.15)


def test_statistics_vector_matches_numpy_on_one_run():
    rng = np.random.default_rng(4)
    x = rng.normal(size=(5000, 2)) * [1.0, 3.0]
    values = statistics_vector([x], (1,))
    centred = x - x.mean(axis=0)
    # variance and kurtosis as numpy computes them; lag-1 biased autocorrelation by its definition
    assert np.allclose(values[:2], x.var(axis=0))
    assert np.allclose(values[2:4], np.mean(centred**4, axis=0) / x.var(axis=0) ** 2)
    acf = np.sum(centred[1:] * centred[:-1], axis=0) / np.sum(centred**2, axis=0)
    assert np.allclose(values[4:], acf)


def test_failed_members_are_reset_not_fatal():
    rng = np.random.default_rng(6)

    def forward(thetas):
        g = 2.0 * thetas
        g[0] = np.nan  # the first member's run always "blows up"
        return g

    prior = rng.normal(0.0, 1.0, size=(20, 1))
    result = ensemble_kalman_inversion(
        forward, np.array([3.0]), np.eye(1) * 1e-4, prior, rng=rng, n_iterations=4
    )
    assert result.failed == [1] * 5
    # θ = y / 2 = 1.5 for the linear map, to within the noise √1e-4 / 2
    assert result.parameters[0] == pytest.approx(1.5, abs=0.01)


def test_calibrated_fitter_learns_the_light_tails_a_linear_model_cannot_make():
    from ergodex.fitting import make_fitter
    from ergodex.series import Series

    rng = np.random.default_rng(21)
    sigma = 1.0
    truth = Surrogate(
        ["x"],
        polynomial_terms(1, 3),
        np.array([[0.0, -1.0, 0.0, -1.0]]),
        kind="polynomial-stochastic",
        noise=np.array([[sigma**2]]),
    )
    data = integrate_ensemble(
        truth,
        rng.normal(size=(3, 1)),
        dt_out=0.05,
        n_out=4000,
        spinup=5.0,
        seed=int(rng.integers(2**31)),
    )
    series = Series.from_arrays(list(data.states), ("x",), 0.05)

    # Exact kurtosis of p(x) ∝ exp(2 (−x²/2 − x⁴/4) / σ²) (Gardiner, Handbook of Stochastic
    # Methods, sec. 5.2.2), by quadrature
    def weight(x, k):
        return x**k * np.exp(2.0 * (-(x**2) / 2 - x**4 / 4) / sigma**2)

    m2 = quad(weight, -np.inf, np.inf, args=(2,))[0] / quad(weight, -np.inf, np.inf, args=(0,))[0]
    m4 = quad(weight, -np.inf, np.inf, args=(4,))[0] / quad(weight, -np.inf, np.inf, args=(0,))[0]
    exact_kurtosis = m4 / m2**2
    assert exact_kurtosis < 2.8  # lighter tails than a Gaussian's 3 (the point of the test)

    seen = []
    fitter = make_fitter("calibrated-linear-inverse", {"members": 20, "iterations": 5}).fit(
        series, progress=lambda done, total: seen.append((done, total))
    )
    assert fitter.cubic_coefficients_[0] > 0
    surrogate = fitter.surrogate_
    assert surrogate.settings["method"] == "calibrated-linear-inverse"
    assert surrogate.settings["members"] == 20
    assert "calibration" in surrogate.provenance
    assert seen[-1][0] == seen[-1][1] and len(seen) > 3
    run = integrate_ensemble(
        surrogate, np.zeros((8, 1)), dt_out=0.05, n_out=8000, spinup=5.0, seed=3
    )
    kurtosis = statistics_vector(list(run.states), (1,))[1]
    # the linear model's kurtosis is 3; the calibrated one must close at least half of the gap
    # to the exact value (the fit runs' own kurtosis carries a few per cent of sampling noise)
    assert abs(kurtosis - exact_kurtosis) < 0.5 * (3.0 - exact_kurtosis)
    variance = statistics_vector(list(run.states), (1,))[0]
    assert variance == pytest.approx(m2, rel=0.1)  # 8 × 400 time units: ~3 % sampling error


def test_cyclic_rotations_make_the_covariance_circulant_with_fourier_modes():
    from ergodex.fitting.reduction import cyclic_rotations
    from ergodex.series import Series

    rng = np.random.default_rng(9)
    n = 8
    # stations with unequal variances: not homogeneous as sampled, circulant once rotated
    runs = [rng.normal(size=(500, n)) * np.linspace(0.5, 2.0, n) for _ in range(2)]
    rotated = cyclic_rotations(Series.from_arrays(runs, [f"s{j}" for j in range(n)], 0.1))
    assert rotated.n_runs == 2 * n
    C = np.cov(np.concatenate(rotated.runs).T)
    # circulant: every row is the previous one shifted by one (Gray, Toeplitz and Circulant
    # Matrices: A Review, 2006, sec. 3.1); the pooled mean is the same for every station
    for j in range(1, n):
        np.testing.assert_allclose(C[j], np.roll(C[j - 1], 1), atol=1e-10)
    # so its eigenvectors are the discrete Fourier vectors: the constant one is an eigenvector
    ones = np.ones(n) / np.sqrt(n)
    np.testing.assert_allclose(C @ ones, (ones @ C @ ones) * ones, atol=1e-10)


def test_homogeneous_setting_fits_on_rotations_and_records_it():
    from ergodex.fitting import make_fitter
    from ergodex.series import Series

    rng = np.random.default_rng(12)
    n = 6
    # a ring of stations coupled to their neighbours by a circulant drift (homogeneous by design)
    drift = -np.eye(n) + 0.3 * (np.roll(np.eye(n), 1, axis=1) - np.roll(np.eye(n), -1, axis=1))
    truth = Surrogate(
        [f"s{j}" for j in range(n)],
        polynomial_terms(n, 1),
        np.column_stack([np.zeros(n), drift]),
        kind="linear-stochastic",
        noise=0.5 * np.eye(n),
    )
    data = integrate_ensemble(
        truth,
        rng.normal(size=(2, n)),
        dt_out=0.1,
        n_out=2000,
        spinup=5.0,
        seed=int(rng.integers(2**31)),
    )
    series = Series.from_arrays(list(data.states), truth.variables, 0.1)
    fitter = make_fitter(
        "calibrated-linear-inverse",
        {
            "n_modes": 4,
            "homogeneous": True,
            "cubic_damping": False,
            "members": 12,
            "iterations": 2,
        },
    ).fit(series)
    assert fitter.surrogate_.settings["homogeneous"] is True

    # the modes come from the rotated runs: the circulant covariance's eigenvalues pair up
    # (wave numbers k and n − k; Gray 2006, sec. 3.1), so of the 4 leading modes two adjacent
    # ones share a variance to round-off; a PCA of the runs as sampled has no such pair
    def paired(v):
        return np.any(np.isclose(v[1:], v[:-1], rtol=1e-9))

    assert paired(fitter.surrogate_.transform.explained_variance_)
    plain = make_fitter("linear-inverse", {"n_modes": 4}).fit(series)
    assert not paired(plain.surrogate_.transform.explained_variance_)
    # and the two modes of a pair share their calibrated parameters (one wave, two phases)
    groups = fitter.parameter_groups_
    assert len(set(groups.tolist())) < len(groups)
    for label in set(groups.tolist()):
        members = np.flatnonzero(groups == label)
        assert np.all(fitter.drift_scale_[members] == fitter.drift_scale_[members[0]])
