"""Lyapunov exponents of the true Lorenz-63 equations against published values."""

from __future__ import annotations

import numpy as np
import pytest

from ergodex import integrate, lyapunov, scenarios
from ergodex.exceptions import SettingsError

# Published exponents of Lorenz-63 at σ=10, ρ=28, β=8/3: 0.9056, 0, −14.5723
# (Sprott, Chaos and Time-Series Analysis, Oxford 2003, table of Lyapunov exponents).
SPROTT_LARGEST = 0.9056


def _starts(rng, m):
    return rng.normal(0.0, 5.0, (m, 3)) + np.array([0.0, 0.0, 25.0])


@pytest.mark.slow
def test_lorenz63_spectrum_matches_published_values():
    rng = np.random.default_rng(20)
    sur = scenarios.lorenz63_surrogate()
    res = lyapunov.lyapunov_spectrum(sur, _starts(rng, 50), time=40.0, transient=20.0, step=0.01)
    # Tolerance 0.02 (the figure): with 50 trajectories × 40 time units the standard error
    # measured here is ≈ 0.006, and finite-time averaging biases the estimate low by roughly
    # 0.7/T (measured: −0.004 at T=200), so 0.02 leaves about two standard errors beyond the bias.
    assert res.exponents[0] == pytest.approx(SPROTT_LARGEST, abs=0.02)
    assert res.standard_error[0] < 0.01
    # the exponent along the flow is zero for any bounded non-fixed-point trajectory (Haken 1983)
    assert res.exponents[1] == pytest.approx(0.0, abs=0.02)
    # sum of exponents = mean trace of the Jacobian = −(σ + 1 + β) exactly for Lorenz-63
    # (Lorenz 1963: constant volume contraction); only RK4 round-off separates them
    assert res.exponents.sum() == pytest.approx(-(10.0 + 1.0 + 8.0 / 3.0), abs=1e-3)
    assert res.n_blown_up == 0


def test_two_trajectory_agrees_with_published_value():
    rng = np.random.default_rng(21)
    sur = scenarios.lorenz63_surrogate()
    res = lyapunov.largest_lyapunov(
        sur, _starts(rng, 30), method="two-trajectory", time=30.0, transient=20.0, step=0.01
    )
    # Sprott (2003) 0.9056; 30 trajectories × 30 time units: measured sd per trajectory ≈ 0.04,
    # standard error ≈ 0.008, so 0.03 is about three standard errors plus the finite-time bias
    assert res.exponents[0] == pytest.approx(SPROTT_LARGEST, abs=0.03)


def test_default_step_is_integrate_choice_and_keeps_published_value():
    # The default step comes from integrate.choose_substep (one rule for the RK4 step in ergodex),
    # at a tenth of the RK4 stability limit.
    rng = np.random.default_rng(24)
    sur = scenarios.lorenz63_surrogate()
    starts = _starts(rng, 30)
    res = lyapunov.lyapunov_spectrum(sur, starts, time=30.0, transient=20.0)
    two = lyapunov.largest_lyapunov(sur, starts, method="two-trajectory", time=30.0, transient=20.0)
    # RK4's stability boundary on the negative real axis is h|λ| ≈ 2.785 (Hairer & Wanner,
    # Solving ODEs II, sec. IV.2); a tenth of it at the fastest rate of the starting states
    rho = np.max(np.abs(np.linalg.eigvals(sur.jacobian(starts))))
    assert res.step == two.step == integrate.choose_substep(sur, starts, 30.0, safety=0.1)
    assert res.step <= 0.2785 / rho
    # the averaging time is a whole number of steps
    assert res.time == pytest.approx(30.0, rel=1e-12)
    # Sprott (2003) 0.9056; 30 trajectories × 30 time units: standard error measured ≈ 0.009,
    # so 0.03 is about three standard errors plus the finite-time bias (≈ 0.7/T)
    assert res.exponents[0] == pytest.approx(SPROTT_LARGEST, abs=0.03)
    assert two.exponents[0] == pytest.approx(SPROTT_LARGEST, abs=0.03)
    # sum = −(σ + 1 + β) (Lorenz 1963), only RK4 truncation separates them at this step
    assert res.exponents.sum() == pytest.approx(-(10.0 + 1.0 + 8.0 / 3.0), abs=1e-2)


def test_fixed_point_dynamics_have_negative_exponents():
    # ρ = 22 < ρ_H ≈ 24.74: C± are stable (Lorenz 1963; Sparrow 1982), every exponent negative
    rng = np.random.default_rng(22)
    sur = scenarios.lorenz63_surrogate(rho=22.0)
    start = scenarios.lorenz63_fixed_points(22.0)[:1] + rng.normal(0, 0.5, (4, 3))
    res = lyapunov.lyapunov_spectrum(sur, start, time=10.0, transient=20.0)
    assert res.exponents[0] < -0.01


def test_field_is_the_compiled_term_program():
    # The exponents step the surrogate's compiled term program (ergodex.kernels.evaluate, the
    # evaluator the ensemble kernel runs). Reference: the Lorenz (1996) equations written out
    # by hand (scenarios.lorenz96_rhs); the two differ by round-off only (fused multiply-add).
    rng = np.random.default_rng(23)
    sur = scenarios.lorenz96_surrogate(n=6)
    x = rng.normal(size=(7, 6))
    np.testing.assert_allclose(
        lyapunov._field(sur)(x), scenarios.lorenz96_rhs(x), rtol=1e-13, atol=1e-12
    )


def test_bad_settings():
    sur = scenarios.lorenz63_surrogate()
    with pytest.raises(SettingsError, match="method"):
        lyapunov.largest_lyapunov(sur, np.ones((1, 3)), method="wolf")
    with pytest.raises(SettingsError, match="n_exponents"):
        lyapunov.lyapunov_spectrum(sur, np.ones((1, 3)), n_exponents=4)
