"""Reference trajectories for the fitter tests, made with scipy (independent of ergodex's
integrator).

Lorenz-63 is integrated with scipy's DOP853 at tight tolerances; the Ornstein–Uhlenbeck process is
sampled exactly through its transition density. The tests below check the generators themselves
against analytic facts, so a fitter test that fails points at the fitter.
"""

from __future__ import annotations

import functools

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.linalg import expm, solve_continuous_lyapunov

from ergodex.series import Series

LORENZ_NAMES = ("flow", "dT_across", "dT_up")


def lorenz63(t, s, sigma=10.0, rho=28.0, beta=8.0 / 3.0):
    x, y, z = s
    return [sigma * (y - x), x * (rho - z) - y, x * y - beta * z]


def lorenz63_true_coefficients() -> np.ndarray:
    """Lorenz-63 (σ=10, ρ=28, β=8/3) on the degree-2 library 1, x, y, z, x², xy, xz, y², yz, z².

    Source: Lorenz (1963), the system recovered in Brunton, Proctor & Kutz (2016), PNAS 113, Fig. 1.
    """
    c = np.zeros((3, 10))
    c[0, 1], c[0, 2] = -10.0, 10.0
    c[1, 1], c[1, 2], c[1, 6] = 28.0, -1.0, -1.0
    c[2, 3], c[2, 5] = -8.0 / 3.0, 1.0
    return c


def lorenz63_runs(rng, *, n_runs=3, duration=60.0, dt=0.01, noise=0.0, spinup=5.0):
    """Runs on the attractor; ``noise`` is sensor noise as a fraction of each variable's std."""
    out = []
    for _ in range(n_runs):
        x0 = rng.normal(size=3) * 5.0 + np.array([0.0, 0.0, 25.0])
        n = int(round(duration / dt)) + 1
        t_eval = spinup + np.arange(n) * dt
        sol = solve_ivp(
            lorenz63, (0.0, t_eval[-1]), x0, t_eval=t_eval, method="DOP853", rtol=1e-10, atol=1e-10
        )
        X = sol.y.T
        if noise:
            X = X + noise * X.std(axis=0) * rng.normal(size=X.shape)
        out.append(X)
    return out


@functools.lru_cache(maxsize=4)
def lorenz63_reference_runs(n_runs: int = 2, duration: float = 40.0, seed: int = 11) -> tuple:
    """Clean runs at dt = 0.002, computed once per test session (read-only arrays)."""
    runs = lorenz63_runs(np.random.default_rng(seed), n_runs=n_runs, duration=duration, dt=0.002)
    for run in runs:
        run.setflags(write=False)
    return tuple(runs)


def lorenz63_reference_series(
    dt: float, *, noise: float = 0.0, seed: int = 0, n_runs: int = 2, duration: float = 40.0
) -> Series:
    """Clean reference runs sampled every ``dt`` (a multiple of 0.002), with optional sensor
    noise."""
    every = int(round(dt / 0.002))
    assert abs(every * 0.002 - dt) < 1e-12
    rng = np.random.default_rng(seed)
    runs = []
    for run in lorenz63_reference_runs(n_runs, duration):
        X = run[::every]
        if noise:
            X = X + noise * X.std(axis=0) * rng.normal(size=X.shape)
        runs.append(X)
    return Series.from_arrays(runs, LORENZ_NAMES, dt)


def lorenz63_series(rng, **kwargs) -> Series:
    dt = kwargs.get("dt", 0.01)
    return Series.from_arrays(lorenz63_runs(rng, **kwargs), LORENZ_NAMES, dt)


def ou_drift_and_noise():
    """A stable, non-normal 3-variable OU process dx = A x dt + dW, Cov(dW) = Q dt."""
    A = np.array([[-1.0, 0.5, 0.0], [-0.5, -0.8, 0.3], [0.0, -0.2, -0.5]])
    Q = np.array([[1.0, 0.2, 0.0], [0.2, 0.6, 0.1], [0.0, 0.1, 0.4]])
    return A, Q


def ou_runs(rng, A, Q, *, n_runs=4, n_samples=20000, dt=0.1):
    """Exact OU sampling: x_{k+1} = e^{A dt} x_k + η, Cov(η) = C − e^{A dt} C e^{Aᵀ dt}.

    C solves A C + C Aᵀ + Q = 0 (the stationary Lyapunov equation; Gardiner, Handbook of
    Stochastic Methods, §4.5.6). Runs start from the stationary law, so no spin-up is needed.
    """
    C = solve_continuous_lyapunov(A, -Q)
    G = expm(A * dt)
    step_cov = C - G @ C @ G.T
    L_step = np.linalg.cholesky(step_cov)
    L_stat = np.linalg.cholesky(C)
    runs = []
    for _ in range(n_runs):
        X = np.empty((n_samples, A.shape[0]))
        X[0] = L_stat @ rng.normal(size=A.shape[0])
        shocks = rng.normal(size=(n_samples, A.shape[0])) @ L_step.T
        for k in range(1, n_samples):
            X[k] = G @ X[k - 1] + shocks[k]
        runs.append(X)
    return runs, C


def test_lorenz_generator_obeys_the_equations():
    # The finite-difference tendency of clean data matches the true right-hand side to the
    # order-4 stencil's truncation error, O(dt^4 |x^(5)|) ≈ 1e-3 relative at dt = 0.002.
    rng = np.random.default_rng(1)
    X = lorenz63_runs(rng, n_runs=1, duration=2.0, dt=0.002)[0]
    dt = 0.002
    d = (X[:-4] - 8 * X[1:-3] + 8 * X[3:-1] - X[4:]) / (12 * dt)
    f = np.array([lorenz63(0, s) for s in X[2:-2]])
    assert np.max(np.abs(d - f)) < 1e-3 * np.max(np.abs(f))


def test_ou_generator_has_the_lyapunov_covariance():
    # Stationary covariance C from A C + C Aᵀ + Q = 0 (Gardiner §4.5.6); the sample covariance of
    # 4 × 20000 samples (integrated autocorrelation time ~ a few samples at dt = 0.1) agrees to a
    # few percent of the largest entry.
    rng = np.random.default_rng(2)
    A, Q = ou_drift_and_noise()
    runs, C = ou_runs(rng, A, Q)
    sample = np.cov(np.concatenate(runs).T)
    assert np.max(np.abs(sample - C)) < 0.05 * np.max(np.abs(C))


@pytest.mark.parametrize("seed", [3])
def test_lorenz_series_has_requested_shape(seed):
    s = lorenz63_series(np.random.default_rng(seed), n_runs=2, duration=1.0, dt=0.01)
    assert s.n_runs == 2 and s.lengths == (101, 101) and s.names == LORENZ_NAMES
