"""The validator with hidden variables: only the observed ones are compared, hidden ones start at 0.

The test system is an Ornstein–Uhlenbeck variable x driven by a hidden red-noise variable y
(the structure of a memory closure, Kravtsov, Kondrashov & Ghil 2005):

    dx = (−a x + y) dt,    dy = −b y dt + σ dW.

Its stationary covariance C solves the Lyapunov equation A C + C Aᵀ + Q = 0 (Gardiner, Stochastic
Methods, 4th ed., 2009, §4.5.6), computed here with ``scipy.linalg.solve_continuous_lyapunov``.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from ergodex.exceptions import DataError
from ergodex.integrate import integrate_ensemble
from ergodex.series import Series
from ergodex.surrogate import Surrogate, polynomial_terms
from ergodex.validation import CheckSpec, check

A_X, B_Y, SIGMA = 1.0, 0.5, 1.0
DT = 0.1


def _model(b=B_Y, sigma=SIGMA, observed=("x",)):
    terms = polynomial_terms(2, 1)  # 1, x, y
    coefficients = np.array([[0.0, -A_X, 1.0], [0.0, 0.0, -b]])
    noise = np.array([[0.0, 0.0], [0.0, sigma**2]])
    return Surrogate(
        ("x", "y"),
        terms,
        coefficients,
        kind="linear-stochastic",
        noise=noise,
        settings={"observed_variables": list(observed)},
    )


def _stationary_variance_of_x(b=B_Y, sigma=SIGMA):
    A = np.array([[-A_X, 1.0], [0.0, -b]])
    Q = np.array([[0.0, 0.0], [0.0, sigma**2]])
    return scipy.linalg.solve_continuous_lyapunov(A, -Q)[0, 0]


@pytest.fixture(scope="module")
def reference():
    # Four independent runs of x alone (y is never recorded), 400 time units each: about 130
    # decorrelation times per run (integrated ACF time of x ≈ 3 here).
    run = integrate_ensemble(
        _model(),
        np.zeros((4, 2)),
        dt_out=DT,
        n_out=4000,
        spinup=40.0,
        seed=np.random.default_rng(81),
        keep=[0],
    )
    assert run.status == "ok"
    return Series.from_arrays(list(run.states), ("x",), DT, source="hidden-level OU")


def test_reference_has_the_analytic_stationary_variance(reference):
    # Gardiner (2009): Var x from the Lyapunov equation (= 2/3 for a=1, b=0.5, σ=1). The sample
    # variance of 16000 samples with ACF time ≈ 3 (≈ 530 independent values) has a relative
    # standard error of about sqrt(2/530) ≈ 0.06; the bound is three of those.
    variance = reference.stacked().var()
    expected = _stationary_variance_of_x()
    assert abs(variance - expected) < 0.18 * expected


def test_true_model_with_hidden_level_passes_and_compares_only_x(reference):
    scorecard_result = check(_model(), reference, CheckSpec(seed=5))
    scorecard = scorecard_result.scorecard
    assert {row.variable for row in scorecard.rows} == {"x"}
    assert scorecard.settings["hidden_variables"] == ["y"]
    assert scorecard.settings["compared_in"] == "data space"
    assert scorecard.blowups["count"] == 0
    # hidden y started at 0 and was spun up: the members' x has the analytic variance
    # (Gardiner 2009); 2000 sampled states from 16 members, tolerance as above with fewer values
    sample = scorecard_result.evidence.sample_model[:, 0]
    assert abs(sample.var() - _stationary_variance_of_x()) < 0.25 * _stationary_variance_of_x()
    assert scorecard.passed, scorecard.table()


def test_wrong_hidden_level_fails(reference):
    # Halving σ quarters every covariance (the Lyapunov equation is linear in Q): the marginal of x
    # is half as wide, a difference far above the sampling noise of 16000 samples.
    scorecard = check(_model(sigma=0.5 * SIGMA), reference, CheckSpec(seed=5)).scorecard
    assert not scorecard.passed
    histogram = [r for r in scorecard.rows if r.statistic == "histogram"]
    assert histogram[0].ratio > scorecard.spec.tolerance


def test_observed_variable_the_model_lacks_is_a_data_error(reference):
    bad = _model(observed=("x", "z"))
    with pytest.raises(DataError, match="observed variables \\['z'\\]"):
        check(bad, reference, CheckSpec(seed=1))


@pytest.mark.slow
def test_true_ring_equations_in_pca_coordinates_pass_on_their_leading_modes():
    # The reduced-order contract: the exact dynamics, written in the PCA basis of the training
    # runs (all 40 modes, so the model is closed) with only the 10 leading modes observed, must
    # pass when the held-out runs are mapped through the same transform. Lorenz-96 (Lorenz 1996)
    # is quadratic, so in rotated coordinates it is quadratic again and least squares on random
    # points recovers it exactly (checked against scenarios.lorenz96_rhs to round-off).
    from pathlib import Path

    from ergodex import scenarios
    from ergodex.model_space import PCA
    from ergodex.readers import read_dataset

    folder = Path(__file__).resolve().parents[1] / "datasets" / "station-ring"
    if not folder.is_dir():
        pytest.skip("the committed station-ring sample is not present")
    fit_data, held_out = read_dataset(folder).split()
    transform = PCA(n_modes=40).fit(fit_data)
    names = transform.output_names
    terms = polynomial_terms(40, 2)
    rng = np.random.default_rng(82)
    Z = rng.normal(scale=5.0, size=(3000, 40))
    dZ = scenarios.lorenz96_rhs(transform.inverse(Z)) @ transform.components_.T
    theta = Surrogate(names, terms, np.zeros((40, len(terms)))).features(Z)
    coefficients = np.linalg.lstsq(theta, dZ, rcond=None)[0].T
    truth = Surrogate(
        names,
        terms,
        coefficients,
        transform=transform,
        settings={"observed_variables": list(names[:10])},
    )
    states = fit_data.stacked()[:200]
    exact = scenarios.lorenz96_rhs(states) @ transform.components_.T
    np.testing.assert_allclose(truth.rhs(transform.forward(states)), exact, atol=1e-8)

    scorecard = check(truth, held_out, CheckSpec(seed=2026)).scorecard
    assert scorecard.settings["compared_in"].startswith("model space")
    assert {r.variable for r in scorecard.rows} == set(names[:10])
    assert scorecard.settings["hidden_variables"] == list(names[10:])
    assert scorecard.passed, scorecard.table()
