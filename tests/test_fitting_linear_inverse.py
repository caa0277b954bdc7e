"""LinearInverseModel: recovery of an OU process, the tau test, stability and noise checks."""

from __future__ import annotations

import numpy as np
import pytest

from ergodex.exceptions import DataError, SettingsError
from ergodex.fitting import make_fitter
from ergodex.fitting.linear_inverse import lim_operators
from ergodex.series import Series
from test_fitting_data import lorenz63_reference_series, ou_drift_and_noise, ou_runs


@pytest.fixture(scope="module")
def ou_case():
    A, Q = ou_drift_and_noise()
    runs, C = ou_runs(np.random.default_rng(21), A, Q, n_runs=4, n_samples=20000, dt=0.1)
    return A, Q, C, Series.from_arrays(runs, ("a", "b", "c"), 0.1)


def test_operators_of_an_exact_covariance_pair_return_the_drift():
    # C(τ) = expm(A τ) C(0) for an OU process (Gardiner, Stochastic Methods §4.5.6), so the
    # formulas of Penland & Sardeshmukh (1995) must return A and Q to round-off.
    from scipy.linalg import expm, solve_continuous_lyapunov

    A, Q = ou_drift_and_noise()
    C0 = solve_continuous_lyapunov(A, -Q)
    G, L, Qhat = lim_operators(C0, expm(A * 0.7) @ C0, 0.7)
    np.testing.assert_allclose(L, A, atol=1e-10)
    np.testing.assert_allclose(Qhat, Q, atol=1e-10)


def test_ou_drift_and_noise_within_sampling_error(ou_case):
    # The sampling error is measured, not assumed: the spread of the estimates from the 4 runs
    # fitted one at a time gives the standard error of the pooled estimate (÷ √4); the pooled
    # estimate must lie within 4 standard errors of the true A and Q (plus 1e-3 for entries whose
    # spread happens to be tiny).
    A, Q, _, series = ou_case
    fitter = make_fitter("linear-inverse", {"tau0": 0.5}).fit(series)
    singles = [
        make_fitter("linear-inverse", {"tau0": 0.5}).fit(series.select_runs([k])) for k in range(4)
    ]
    se_L = np.std([f.L_ for f in singles], axis=0, ddof=1) / 2.0
    se_Q = np.std([f.noise_covariance_ for f in singles], axis=0, ddof=1) / 2.0
    assert np.all(np.abs(fitter.L_ - A) <= 4 * se_L + 1e-3)
    assert np.all(np.abs(fitter.noise_covariance_ - Q) <= 4 * se_Q + 1e-3)
    assert fitter.stable_
    assert np.all(fitter.L_eigenvalues_.real < 0)
    assert "positive semi-definite" in fitter.noise_report_


def test_ou_surrogate_is_linear_stochastic(ou_case):
    _, _, _, series = ou_case
    fitter = make_fitter("linear-inverse", {"tau0": 0.5}).fit(series)
    surrogate = fitter.surrogate_
    assert surrogate.kind == "linear-stochastic"
    assert surrogate.is_stochastic
    np.testing.assert_allclose(surrogate.noise, fitter.noise_covariance_)
    # drift at the mean is zero: the constant column holds −L μ
    np.testing.assert_allclose(surrogate.rhs(fitter.mean_[None, :]), 0.0, atol=1e-12)


def test_tau_test_is_flat_for_ou(ou_case):
    # For a linear Markov process L does not depend on the lag (Penland & Sardeshmukh 1995, §2).
    _, _, _, series = ou_case
    fitter = make_fitter("linear-inverse", {"tau0": 0.5}).fit(series)
    assert fitter.tau_test_flat_
    assert len(fitter.tau_test_["lags"]) >= 3
    assert max(fitter.tau_test_["relative_change"]) < 0.15


def test_tau_test_is_not_flat_for_lorenz63():
    # Lorenz-63 is nonlinear: the best linear fit changes with the lag (or G stops having a real
    # logarithm at longer lags), so the test must not call it flat.
    series = lorenz63_reference_series(0.01)
    fitter = make_fitter("linear-inverse", {"tau0": 0.05}).fit(series)
    assert not fitter.tau_test_flat_
    assert max(fitter.tau_test_["relative_change"]) > 0.15 or fitter.tau_test_["problems"]


def test_default_tau0_is_a_whole_number_of_samples(ou_case):
    _, _, _, series = ou_case
    fitter = make_fitter("linear-inverse", {}).fit(series)
    assert fitter.tau0_ > 0
    assert abs(fitter.tau0_ / 0.1 - round(fitter.tau0_ / 0.1)) < 1e-9


def test_tau0_longer_than_the_data_allow():
    rng = np.random.default_rng(22)
    A, Q = ou_drift_and_noise()
    runs, _ = ou_runs(rng, A, Q, n_runs=1, n_samples=100, dt=0.1)
    series = Series.from_arrays(runs, ("a", "b", "c"), 0.1)
    with pytest.raises(
        DataError, match=r"tau0 = 8 \(80 samples\) is longer than the data allow.*at most 5"
    ):
        make_fitter("linear-inverse", {"tau0": 8.0}).fit(series)


def test_tau0_must_be_whole_samples(ou_case):
    _, _, _, series = ou_case
    with pytest.raises(SettingsError, match=r"'tau0' = 0.25 must be a whole number"):
        make_fitter("linear-inverse", {"tau0": 0.25}).fit(series)


def test_negative_noise_eigenvalues_are_reported_and_clipped():
    # On Lorenz-63 at τ₀ = 0.1 the linear-plus-white-noise assumption breaks: Q has a negative
    # eigenvalue. The fitter says so and keeps only Q's positive semi-definite part.
    series = lorenz63_reference_series(0.01)
    fitter = make_fitter("linear-inverse", {"tau0": 0.1}).fit(series)
    assert fitter.noise_eigenvalues_.min() < 0
    assert "negative eigenvalue" in fitter.noise_report_ and "set to zero" in fitter.noise_report_
    assert (
        np.linalg.eigvalsh(fitter.noise_covariance_).min()
        >= -1e-9 * np.abs(fitter.noise_covariance_).max()
    )
    with pytest.raises(DataError, match="negative eigenvalue"):
        make_fitter("linear-inverse", {"tau0": 0.1, "negative_noise": "refuse"}).fit(series)


@pytest.mark.slow  # the first PCA imports scikit-learn (seconds on a loaded machine)
def test_pca_space(ou_case):
    _, _, _, series = ou_case
    fitter = make_fitter("linear-inverse", {"tau0": 0.5, "n_modes": 2}).fit(series)
    surrogate = fitter.surrogate_
    assert surrogate.variables == ("mode_1", "mode_2")
    assert surrogate.transform is not None
    assert fitter.L_.shape == (2, 2)
    with pytest.raises(SettingsError, match="'n_modes' = 5 exceeds the 3 variables"):
        make_fitter("linear-inverse", {"n_modes": 5}).fit(series)
