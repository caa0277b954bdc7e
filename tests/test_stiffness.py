"""The sparse Jacobian and the spectral-radius estimate behind the automatic substep."""

from __future__ import annotations

import numpy as np
import pytest

from ergodex import integrate, stiffness
from ergodex.scenarios import lorenz96_surrogate
from ergodex.surrogate import Surrogate, Term, polynomial_terms


def _random_sparse_model(n: int, rng: np.random.Generator, per_equation: int = 4) -> Surrogate:
    """A quadratic model with a few random terms per equation and a damping diagonal."""
    terms = polynomial_terms(n, 2)
    coef = np.zeros((n, len(terms)))
    for i in range(n):
        picks = rng.choice(len(terms), size=per_equation, replace=False)
        coef[i, picks] = rng.normal(size=per_equation)
        coef[i, 1 + i] = -2.0 * abs(rng.normal())  # the linear term of x_i (pysindy's order)
    return Surrogate(tuple(f"x{i}" for i in range(n)), terms, coef)


def _true_radius(model: Surrogate, states: np.ndarray) -> np.ndarray:
    # reference: all eigenvalues of the dense Jacobian from numpy.linalg (LAPACK geev)
    return np.abs(np.linalg.eigvals(model.jacobian(states))).max(axis=1)


def test_sparse_jacobian_matches_central_differences_with_trigonometric_terms():
    rng = np.random.default_rng(3)
    terms = (
        *polynomial_terms(3, 3),
        Term("sin", variable=1, frequency=2.0),
        Term("cos", variable=2, frequency=0.5),
    )
    coef = rng.normal(size=(3, len(terms))) * (rng.random((3, len(terms))) < 0.5)
    model = Surrogate(("a", "b", "c"), terms, coef)
    x = rng.normal(size=(5, 3))
    jac = stiffness.SparseJacobian(model)
    dense = jac.dense(jac.values(x))
    # reference: central differences of the right-hand side, error O(eps^2) (analytic result)
    eps = 1e-5
    numeric = np.stack(
        [(model.rhs(x + eps * e) - model.rhs(x - eps * e)) / (2 * eps) for e in np.eye(3)], axis=2
    )
    np.testing.assert_allclose(dense, numeric, rtol=1e-6, atol=1e-6)
    v = rng.normal(size=(5, 3))
    np.testing.assert_allclose(
        jac.matvec(jac.values(x), v), np.einsum("mik,mk->mi", dense, v), rtol=1e-12, atol=1e-12
    )


def test_small_models_get_the_exact_radius():
    rng = np.random.default_rng(4)
    model = _random_sparse_model(12, rng)
    x = rng.normal(size=(20, 12))
    assert stiffness.spectral_radius(model, x) == pytest.approx(
        _true_radius(model, x).max(), rel=1e-10
    )


@pytest.mark.parametrize("n, seed", [(60, 0), (60, 1), (150, 2)])
def test_krylov_estimate_is_at_least_the_true_radius_at_every_state(n, seed):
    rng = np.random.default_rng(seed)
    model = _random_sparse_model(n, rng)
    x = rng.normal(size=(6, n))
    true = _true_radius(model, x)
    jac = stiffness.SparseJacobian(model)
    bound = jac.norm_bound(jac.values(x))
    assert np.all(bound >= true * (1 - 1e-12))  # Gershgorin: any induced norm bounds the radius
    estimate = np.array([stiffness.spectral_radius(model, x[m : m + 1]) for m in range(len(x))])
    # Stated safety factor: the estimate is never below the true radius (RITZ_MARGIN 1.15 over
    # Ritz values that reached at least 0.93 of it), and never above the Gershgorin bound.
    assert np.all(estimate >= true)
    assert np.all(estimate <= bound * (1 + 1e-12))
    # ... and not wastefully large: within the margin (plus 5 % for non-normal Ritz values)
    assert np.all(estimate <= stiffness.RITZ_MARGIN * 1.05 * true)


def test_substep_of_a_large_ring_is_stable_and_cheap_in_states():
    # Lorenz-96 ring of 120 stations at F = 8: the eigenvalues of the Jacobian at states of the
    # attractor's size (mean 2.3, spread 3.6; from memory) set the RK4 limit.
    model = lorenz96_surrogate(120)
    rng = np.random.default_rng(5)
    x = rng.normal(2.3, 3.6, size=(300, 120))
    dt_out = 0.5
    h = integrate.choose_substep(model, x, dt_out)
    assert dt_out / h == pytest.approx(round(dt_out / h))
    true = _true_radius(model, x[::10]).max()
    # well inside the stability region of RK4 (|h lambda| <= 2.785, Hairer & Wanner IV.2)
    assert h * true <= integrate.SAFETY * integrate.stability_limit("rk4")
    assert stiffness.states_to_measure(120) < 256
    run = integrate.integrate_ensemble(model, x[:2], dt_out=dt_out, n_out=40, stiffness_states=x)
    assert run.status == "ok" and run.substep * true <= integrate.SAFETY * 2.785
