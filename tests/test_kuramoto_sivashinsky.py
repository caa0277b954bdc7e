"""The Kuramoto–Sivashinsky generator against facts from outside the project."""

from __future__ import annotations

import numpy as np
import pytest

from ergodex import kuramoto_sivashinsky as ks
from ergodex.exceptions import SettingsError


def _state_on_attractor(seed: int, n_runs: int = 1) -> np.ndarray:
    """Final states after a spin-up of 200 time units at L = 22 (no sensor noise)."""
    data = ks.kuramoto_sivashinsky(seed=seed, n_runs=n_runs, duration=1.0, noise=0.0)
    return np.array([run[-1] for run in data.runs])


def test_spatial_mean_is_conserved_exactly():
    # Analytic: the k = 0 Fourier mode has no linear part (k^2 - k^4 = 0) and the nonlinear
    # term is a derivative (u u_x = (u^2 / 2)_x), so d/dt mean(u) = 0.
    rng = np.random.default_rng(3)
    u0 = 0.3 + rng.normal(scale=0.5, size=(2, 32))
    out = ks.ks_trajectories(u0, length=22.0, dt=0.5, n_out=200, step=0.125)
    drift = np.abs(out.mean(axis=-1) - u0.mean(axis=-1)[:, None]).max()
    assert drift < 1e-12


def test_energy_changes_at_the_rate_of_the_linear_terms_alone():
    # Analytic energy balance on a periodic domain: d/dt (1/2) mean(u^2)
    # = mean(u_x^2) - mean(u_xx^2), because mean(u^2 u_x) = mean((u^3 / 3)_x) = 0 (integration
    # by parts on a periodic domain: the nonlinear term only moves energy between wavenumbers).
    u0 = _state_on_attractor(seed=4)
    dt = 0.01
    out = ks.ks_trajectories(u0, length=22.0, dt=dt, n_out=2001, step=0.01)[0]
    energy = 0.5 * np.mean(out**2, axis=-1)
    rate = (energy[2:] - energy[:-2]) / (2 * dt)
    predicted = ks.ks_energy_production(out[1:-1], 22.0)
    scale = np.abs(predicted).max()
    assert scale > 0.05  # the balance is not trivially 0 = 0 on this stretch
    # central differences: error O(dt^2 * third derivative), well below 1 % here
    assert np.abs(rate - predicted).max() < 1e-2 * scale
    # the tendency itself: mean(u * rhs) is the production up to the grid's aliasing error
    production = np.mean(out * ks.ks_rhs(out, 22.0), axis=-1)
    assert np.abs(production - ks.ks_energy_production(out, 22.0)).max() < 1e-3 * scale


def test_etdrk4_converges_at_fourth_order():
    # ETDRK4 is fourth order for small steps (Cox & Matthews 2002; Kassam & Trefethen 2005,
    # their KS convergence figure); at larger steps the stiff modes reduce the observed order
    # (Hochbruck & Ostermann 2005), so the steps here are in the asymptotic range.
    u0 = _state_on_attractor(seed=5)[0]
    duration = 1.0
    fine = ks.ETDRK4(32, 22.0, duration / 3200).trajectories(u0[None], substeps=3200, n_out=2)
    errors = []
    for m in (100, 200, 400):
        coarse = ks.ETDRK4(32, 22.0, duration / m).trajectories(u0[None], substeps=m, n_out=2)
        errors.append(np.abs(coarse[0, -1] - fine[0, -1]).max())
    orders = np.log2(np.array(errors[:-1]) / np.array(errors[1:]))
    assert np.all(orders > 3.7) and np.all(orders < 4.3), orders


def test_matches_a_reference_solver_on_a_short_run():
    # scipy's implicit Radau (a reference library) on the same pseudo-spectral equations.
    from scipy.integrate import solve_ivp

    u0 = _state_on_attractor(seed=6)[0]
    reference = solve_ivp(
        lambda t, u: ks.ks_rhs(u, 22.0), (0.0, 5.0), u0, method="Radau", rtol=1e-10, atol=1e-12
    ).y[:, -1]
    ours = ks.ks_trajectories(u0[None], length=22.0, dt=5.0, n_out=2, step=0.01)[0, -1]
    assert np.abs(ours - reference).max() < 1e-7 * np.abs(reference).max()


def test_leading_lyapunov_exponent_at_length_22():
    # Cvitanović, Davidchack & Siminos (2010), SIAM J. Appl. Dyn. Syst. 9, 1-33: leading
    # Lyapunov exponent about 0.048 for L = 22 (from memory); other studies of L = 22 quote
    # 0.043-0.049 (from memory). Four estimates over 1000 time units each scatter with a
    # standard error of about 0.003 (measured while writing), so 0.048 ± 0.010 (about 3
    # standard errors) tests the generator, not the sampling.
    rng = np.random.default_rng(11)
    u0 = _state_on_attractor(seed=7, n_runs=4)
    estimates = ks.ks_lyapunov_exponent(u0, length=22.0, time=1000.0, step=0.25, rng=rng)
    assert abs(estimates.mean() - 0.048) < 0.010, estimates


def test_scenario_series_shape_noise_and_reproducibility():
    a = ks.kuramoto_sivashinsky(seed=1, n_runs=2, duration=20.0, spinup=50.0)
    b = ks.kuramoto_sivashinsky(seed=1, n_runs=2, duration=20.0, spinup=50.0)
    clean = ks.kuramoto_sivashinsky(seed=1, n_runs=2, duration=20.0, spinup=50.0, noise=0.0)
    assert a.names[0] == "u_01" and a.n_variables == 32 and len(a.runs) == 2
    assert a.runs[0].shape == (40, 32) and a.dt == 0.5
    np.testing.assert_array_equal(a.runs[0], b.runs[0])
    residual = np.concatenate([x - y for x, y in zip(a.runs, clean.runs)])
    assert residual.std() == pytest.approx(0.05, rel=0.05)  # 2560 draws: 1.4 % standard error


def test_bad_settings_are_refused():
    with pytest.raises(SettingsError, match="n_points"):
        ks.ETDRK4(31, 22.0, 0.1)
    with pytest.raises(SettingsError, match="duration"):
        ks.kuramoto_sivashinsky(seed=1, duration=-1.0)
