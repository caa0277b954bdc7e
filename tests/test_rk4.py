"""The one RK4 of ergodex, in its numpy form (ergodex.rk4) and compiled (ergodex.kernels)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from ergodex import scenarios
from ergodex.rk4 import rk4_step


def _van_der_pol(states: np.ndarray, mu: float = 1.5) -> np.ndarray:
    x, y = states[..., 0], states[..., 1]
    return np.stack([y, mu * (1.0 - x * x) * y - x], axis=-1)


def _steps(x0: np.ndarray, h: float, t_end: float) -> np.ndarray:
    x = x0.copy()
    for _ in range(round(t_end / h)):
        x = rk4_step(_van_der_pol, x, h)
    return x


def test_numpy_rk4_has_fourth_order_against_solve_ivp():
    # Reference: scipy's DOP853 at rtol = atol = 1e-13 on the van der Pol oscillator (mu = 1.5),
    # from three starting states at once (the step acts on every row). Classical RK4's global
    # error falls as h**4 (Hairer, Norsett & Wanner, Solving ODEs I, sec. II.1 and II.3), so
    # halving h divides it by 16 up to a factor 1 + O(h); 13-20 leaves room for that term
    # (measured 16.5 and 16.3 here) and fails for a wrong stage weight (third order or less: <= 8).
    rng = np.random.default_rng(7)
    x0 = rng.uniform(-2.0, 2.0, size=(3, 2))
    t_end = 2.0
    ref = np.array(
        [
            solve_ivp(
                lambda _t, u: _van_der_pol(u),
                (0.0, t_end),
                x,
                method="DOP853",
                rtol=1e-13,
                atol=1e-13,
            ).y[:, -1]
            for x in x0
        ]
    )
    errors = [np.max(np.abs(_steps(x0, h, t_end) - ref)) for h in (0.02, 0.01, 0.005)]
    ratios = np.array(errors[:-1]) / np.array(errors[1:])
    assert np.all((ratios > 13.0) & (ratios < 20.0)), ratios
    assert errors[-1] < 1e-7


def test_compiled_step_does_numpys_arithmetic():
    # The compiled step (kernels.rk4_stepper around a compiled right-hand side, members as columns,
    # no fused multiply-add) does the numpy step's operations in the same order: the scenario
    # generators built on it reproduce rk4_trajectories exactly, for Lorenz-63 and Lorenz-96.
    pytest.importorskip("numba")
    rng = np.random.default_rng(8)
    x0 = rng.normal([0.0, 0.0, 25.0], 8.0, size=(3, 3))
    np.testing.assert_array_equal(
        scenarios.lorenz63_trajectories(x0, dt=0.01, n_out=101, substeps=4),
        scenarios.rk4_trajectories(scenarios.lorenz63_rhs, x0, dt=0.01, n_out=101, substeps=4),
    )
    y0 = 8.0 + rng.normal(size=(2, 12))
    np.testing.assert_array_equal(
        scenarios.lorenz96_trajectories(y0, dt=0.05, n_out=41, substeps=5),
        scenarios.rk4_trajectories(scenarios.lorenz96_rhs, y0, dt=0.05, n_out=41, substeps=5),
    )


def test_compiled_step_around_a_new_rhs_follows_solve_ivp():
    # kernels.rk4_stepper takes any compiled right-hand side: here the van der Pol oscillator on
    # the members-inner layout. Reference: DOP853 at 1e-13 as above; RK4 at h = 0.005 over two
    # time units errs by below 1e-7 (fourth order; measured 1.4e-9).
    nb = pytest.importorskip("numba")
    from ergodex.kernels import rk4_stepper

    @nb.njit
    def van_der_pol_columns(mu, x, out):
        for c in range(x.shape[1]):
            out[0, c] = x[1, c]
            out[1, c] = mu * (1.0 - x[0, c] * x[0, c]) * x[1, c] - x[0, c]

    step = rk4_stepper(van_der_pol_columns)
    rng = np.random.default_rng(9)
    x0 = rng.uniform(-2.0, 2.0, size=(4, 2))
    x = np.ascontiguousarray(x0.T)
    work = (np.empty_like(x), np.empty((4,) + x.shape))
    for _ in range(400):
        step(1.5, x, 0.005, work)
    np.testing.assert_array_equal(x.T, _steps(x0, 0.005, 2.0))
    for m in range(4):
        ref = solve_ivp(
            lambda _t, u: _van_der_pol(u),
            (0.0, 2.0),
            x0[m],
            method="DOP853",
            rtol=1e-13,
            atol=1e-13,
        ).y[:, -1]
        np.testing.assert_allclose(x[:, m], ref, atol=1e-7)
