"""Tests of the scenario generators against analytic results and reference solvers."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import quad, solve_ivp
from scipy.linalg import solve_continuous_lyapunov

from ergodex import scenarios as sc
from ergodex.exceptions import SettingsError


def test_rk4_matches_solve_ivp_lorenz63():
    # Reference: scipy DOP853 at rtol=atol=1e-12. Our RK4 step is 0.0025 (local error ~h^5);
    # over 2 time units (about 1.8 Lyapunov times, so errors grow ~6x) we measured ~2e-6,
    # and 1e-4 leaves a wide margin while still failing for a wrong coefficient or step.
    rng = np.random.default_rng(1)
    x0 = rng.normal([0, 0, 25], 8, size=(3, 3))
    ours = sc.rk4_trajectories(sc.lorenz63_rhs, x0, dt=0.01, n_out=201, substeps=4)
    compiled = sc.lorenz63_trajectories(x0, dt=0.01, n_out=201, substeps=4)
    # the compiled loop does the same arithmetic; only rounding may differ
    np.testing.assert_allclose(compiled, ours, atol=1e-9, rtol=0)
    t = np.linspace(0, 2, 201)
    for m in range(3):
        ref = solve_ivp(
            lambda _t, u: sc.lorenz63_rhs(u),
            (0, 2),
            x0[m],
            method="DOP853",
            rtol=1e-12,
            atol=1e-12,
            t_eval=t,
        )
        np.testing.assert_allclose(ours[m], ref.y.T, atol=1e-4, rtol=0)


def test_rk4_matches_solve_ivp_lorenz96():
    # Reference: scipy DOP853 at rtol=atol=1e-13. station_ring's RK4 step 0.01 (the step
    # commonly used for Lorenz-96, common practice, no source) errs by ~5e-4 after 0.5 time units
    # on states of size ~10 (measured); allowed 2e-3. The error must also fall 16-fold when the
    # step halves: fourth order, which a wrong stage weight would break.
    rng = np.random.default_rng(2)
    x0 = 8.0 + rng.normal(0, 1, size=(1, 40))
    t = np.linspace(0, 0.5, 11)
    ref = solve_ivp(
        lambda _t, u: sc.lorenz96_rhs(u),
        (0, 0.5),
        x0[0],
        method="DOP853",
        rtol=1e-13,
        atol=1e-13,
        t_eval=t,
    ).y.T
    errors = []
    for substeps in (5, 10):
        ours = sc.rk4_trajectories(sc.lorenz96_rhs, x0, dt=0.05, n_out=11, substeps=substeps)
        compiled = sc.lorenz96_trajectories(x0, dt=0.05, n_out=11, substeps=substeps)
        np.testing.assert_allclose(compiled, ours, atol=1e-9, rtol=0)
        errors.append(np.abs(compiled[0] - ref).max())
    assert errors[0] < 2e-3
    assert 12 < errors[0] / errors[1] < 20


def test_true_surrogates_match_the_equations():
    pytest.importorskip("ergodex.surrogate")
    rng = np.random.default_rng(3)
    X = rng.normal(0, 10, size=(50, 3))
    np.testing.assert_allclose(
        sc.lorenz63_surrogate().rhs(X), sc.lorenz63_rhs(X), rtol=1e-13, atol=1e-10
    )
    Y = rng.normal(2, 4, size=(20, 40))
    np.testing.assert_allclose(
        sc.lorenz96_surrogate(40, 8.0).rhs(Y), sc.lorenz96_rhs(Y, 8.0), rtol=1e-13, atol=1e-10
    )
    w = sc.double_well_surrogate(0.5)
    x = rng.normal(size=(30, 1))
    np.testing.assert_allclose(w.rhs(x), x - x**3, atol=1e-12)
    np.testing.assert_allclose(w.noise, [[0.25]])
    A = [[-1.0, 0.5], [-0.5, -0.5]]
    ou = sc.ou_surrogate(A, [[1.0, 0.3], [0.3, 0.5]])
    Z = rng.normal(size=(10, 2))
    np.testing.assert_allclose(ou.rhs(Z), Z @ np.array(A).T, atol=1e-12)
    assert ou.is_stochastic and ou.variables == ("x1", "x2")


def test_convection_loop_reproducible_noise_and_regimes():
    a = sc.convection_loop(seed=7, n_runs=2, duration=30.0)
    b = sc.convection_loop(seed=7, n_runs=2, duration=30.0)
    c = sc.convection_loop(seed=8, n_runs=2, duration=30.0)
    clean = sc.convection_loop(seed=7, n_runs=2, duration=30.0, noise=0.0)
    assert a.fingerprint() == b.fingerprint() != c.fingerprint()
    assert a.names == ("flow", "dT_across", "dT_up") and a.lengths == (3000, 3000)
    # Sensor noise: N(0, 0.05^2) per reading; 18,000 readings give the std to ~0.5 %.
    resid = (a.stacked() - clean.stacked()).ravel()
    assert abs(resid.std() / 0.05 - 1) < 0.03
    # Fixed points C+- of Lorenz-63 (Lorenz 1963): the vector field vanishes there.
    for p in sc.lorenz63_fixed_points():
        np.testing.assert_allclose(sc.lorenz63_rhs(p), 0, atol=1e-12)
    regimes = sc.convection_loop_regimes()["regime"]
    assert [r["name"] for r in regimes] == ["clockwise", "counter-clockwise", "reversal"]
    centres = [np.array(list(r["centre"].values())) for r in regimes]
    radii = [r["radius"] for r in regimes]
    for i in range(3):
        for j in range(i + 1, 3):
            assert np.linalg.norm(centres[i] - centres[j]) > radii[i] + radii[j]  # disjoint
    # Every regime is visited in a few tens of time units (runs start on the attractor).
    X = clean.stacked()
    for centre, radius in zip(centres, radii):
        share = np.mean(np.linalg.norm(X - centre, axis=1) < radius)
        assert share > 0.03
    # On the attractor after spin-up: the classic butterfly has z in (0, 50) (from memory).
    assert 0 < X[:, 2].min() and X[:, 2].max() < 50


def test_ou_covariance_matches_lyapunov_and_acf_matches_exponential():
    # Analytic: stationary covariance C solves A C + C A^T + Q = 0 (Gardiner, Stochastic
    # Methods); for a diagonal drift -theta the autocorrelation is exp(-theta tau).
    A = np.array([[-1.0, 0.5], [-0.5, -0.5]])
    Q = np.array([[1.0, 0.3], [0.3, 0.5]])
    s = sc.ornstein_uhlenbeck(seed=5, drift=A, noise=Q, n_runs=24, duration=300.0, dt=0.05)
    C = solve_continuous_lyapunov(A, -Q)
    np.testing.assert_allclose(sc.ou_stationary_covariance(A, Q), C, rtol=1e-12)
    per_run = np.array([np.cov(r.T, bias=True) for r in s.runs])
    est = per_run.mean(axis=0)
    se = per_run.std(axis=0, ddof=1) / math.sqrt(len(per_run))
    # 4 standard errors (from the spread of independent runs): fails with probability ~1e-4.
    assert np.all(np.abs(est - C) < 4 * se), (est, C, se)

    theta = 0.7
    s1 = sc.ornstein_uhlenbeck(
        seed=6, drift=[[-theta]], noise=[[2 * theta]], n_runs=24, duration=300.0, dt=0.1
    )
    from statsmodels.tsa.stattools import acf

    lags = np.arange(0, 31)  # up to 3 time units
    acfs = np.array([acf(r[:, 0], nlags=30, fft=True) for r in s1.runs])
    est = acfs.mean(axis=0)
    se = acfs.std(axis=0, ddof=1) / math.sqrt(len(acfs))
    expect = np.exp(-theta * lags * 0.1)
    # The sample ACF is biased low by O(1/(theta T)) ~ 0.5 % here; allowed on top of 4 SE.
    assert np.all(np.abs(est - expect) < 4 * se + 0.01)
    # and the analytic helper agrees with the formula
    np.testing.assert_allclose(
        sc.ou_autocovariance(lags * 0.1, [[-theta]], [[2 * theta]])[:, 0, 0], expect, rtol=1e-10
    )


def test_double_well_moments_match_stationary_density():
    # Stationary density p ~ exp(-2V/s^2), V = x^4/4 - x^2/2 (Risken, The Fokker-Planck
    # Equation): E[x^2] and E[x^4] by quadrature vs the sample, within 4 standard errors from
    # the spread of independent runs plus 2 % for the Euler-Maruyama O(h) bias (h = 0.005).
    noise = 0.7
    s = sc.double_well(seed=9, n_runs=12, duration=300.0, dt=0.05, noise=noise, substeps=10)
    assert quad(lambda u: sc.double_well_density(u, noise), -np.inf, np.inf)[0] == pytest.approx(1)
    for k in (2, 4):
        exact = quad(lambda u, k=k: u**k * sc.double_well_density(u, noise), -np.inf, np.inf)[0]
        per_run = np.array([np.mean(r[:, 0] ** k) for r in s.runs])
        se = per_run.std(ddof=1) / math.sqrt(len(per_run))
        assert abs(per_run.mean() - exact) < 4 * se + 0.02 * exact
    x = s.stacked()[:, 0]
    assert 0.3 < np.mean(x > 0) < 0.7  # both wells visited


def test_station_ring_names_and_settings_errors():
    s = sc.station_ring(seed=1, n_runs=1, duration=5.0)
    assert s.names[0] == "station_01" and s.names[-1] == "station_40" and s.lengths == (100,)
    with pytest.raises(SettingsError, match="n_runs"):
        sc.convection_loop(seed=1, n_runs=0)
    with pytest.raises(SettingsError, match="stable"):
        sc.ornstein_uhlenbeck(seed=1, drift=[[0.1]], noise=[[1.0]])
    with pytest.raises(SettingsError, match="fewer than 2 samples"):
        sc.convection_loop(seed=1, duration=0.01)


def test_committed_sample_datasets_match_their_generator():
    from pathlib import Path

    from ergodex.readers import read_dataset

    root = Path(__file__).resolve().parents[1] / "datasets"
    if not (root / "convection-loop" / "dataset.toml").exists():
        pytest.skip("sample datasets not present")
    for name, make in (("convection-loop", sc.convection_loop), ("station-ring", sc.station_ring)):
        d = read_dataset(root / name)
        fresh = make(seed=d.provenance["seed"])
        assert d.series.names == fresh.names and d.series.dt == fresh.dt
        assert d.series.lengths == fresh.lengths and d.holdout == ("run-3", "run-4")
        # written with 7 significant digits: relative error at most 5e-7 of each value
        np.testing.assert_allclose(d.series.stacked(), fresh.stacked(), rtol=5.1e-7, atol=1e-300)
