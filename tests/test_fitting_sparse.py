"""SparseODE (SINDy through pysindy): recovery of published equations, noise, ensembles, errors."""

from __future__ import annotations

import numpy as np
import pytest

from ergodex.exceptions import DataError, OptionalDependencyError
from ergodex.fitting import make_fitter
from ergodex.series import Series
from test_fitting_data import lorenz63, lorenz63_reference_series, lorenz63_true_coefficients

TRUE = lorenz63_true_coefficients()
ACTIVE = TRUE != 0


def max_relative_error(coefficients):
    return float(np.max(np.abs(coefficients[ACTIVE] - TRUE[ACTIVE]) / np.abs(TRUE[ACTIVE])))


def largest_spurious(coefficients):
    return float(np.max(np.abs(coefficients[~ACTIVE])))


@pytest.mark.parametrize("dt", [0.002, 0.01])
@pytest.mark.parametrize("differentiation", ["finite-difference", "weak"])
def test_clean_lorenz63_every_coefficient_within_one_percent(dt, differentiation):
    # Brunton, Proctor & Kutz (2016), PNAS 113, Fig. 1: SINDy recovers Lorenz-63 (σ=10, ρ=28,
    # β=8/3) from clean data. The 1 % tolerance is the issue's; order-4 differences err by ~1e-4
    # at dt = 0.01 (Taylor remainder), far inside it.
    series = lorenz63_reference_series(dt)
    fitter = make_fitter("sparse", {"differentiation": differentiation, "difference_order": 4}).fit(
        series
    )
    assert fitter.coefficients_.shape == (3, 10)
    assert max_relative_error(fitter.coefficients_) < 0.01
    assert largest_spurious(fitter.coefficients_) == 0.0
    assert fitter.n_terms_ == 7


def test_order_two_differences_bias_rho_at_coarse_step():
    # Central order-2 differences have truncation error dt²/6 x''' (Taylor); at dt = 0.01 this
    # biases ρ by a few tenths of a percent while order 4 does not (measured in the pysindy notes:
    # 0.7 % vs 0.01 %). The check: order 2 is clearly worse than order 4.
    series = lorenz63_reference_series(0.01)
    rho = {}
    for order in (2, 4):
        fitter = make_fitter(
            "sparse", {"differentiation": "finite-difference", "difference_order": order}
        ).fit(series)
        rho[order] = abs(fitter.coefficients_[1, 1] - 28.0) / 28.0
    assert rho[2] > 10 * rho[4]
    assert rho[2] > 1e-3


def test_surrogate_reproduces_the_true_right_hand_side():
    series = lorenz63_reference_series(0.01)
    surrogate = make_fitter("sparse", {}).fit(series).surrogate_
    assert surrogate.variables == series.names
    assert surrogate.n_terms == 5  # x, y, z, xy, xz: the only terms Lorenz-63 uses
    states = series.runs[0][::50]
    truth = np.array([lorenz63(0.0, s) for s in states])
    # every coefficient within 1 % → the tendency within 1 % of its typical size
    assert np.max(np.abs(surrogate.rhs(states) - truth)) < 0.01 * np.max(np.abs(truth))
    assert surrogate.settings["method"] == "sparse"
    assert surrogate.provenance["data_fingerprint"] == series.fingerprint()


@pytest.mark.parametrize("dt", [0.002, 0.01])
def test_one_percent_noise_structure_recovered_by_weak_form_and_smoothing(dt):
    # With 1 % sensor noise (of each variable's std) the weak form (Messenger & Bortz 2021) and
    # Savitzky–Golay smoothing keep the structure of Brunton et al. (2016): no true term lost, no
    # spurious term above 0.05. Plain differences amplify the noise by ~1/dt: at this noise level
    # they still find the structure on this much data, but their coefficients are less accurate
    # than the weak form's (1.3x to 20x over seeds 4-8) and their tendency fit visibly degrades
    # (R² 0.70 at dt = 0.002, 0.98 at dt = 0.01, against > 0.999 for the weak form).
    series = lorenz63_reference_series(dt, noise=0.01, seed=4)
    fits = {
        d: make_fitter("sparse", {"differentiation": d}).fit(series)
        for d in ("finite-difference", "smoothed-finite-difference", "weak")
    }
    for name in ("smoothed-finite-difference", "weak"):
        c = fits[name].coefficients_
        assert np.all(c[ACTIVE] != 0), name
        assert largest_spurious(c) <= 0.05, name
        assert max_relative_error(c) < 0.02, name
    plain, weak = fits["finite-difference"], fits["weak"]
    assert max_relative_error(plain.coefficients_) > max_relative_error(weak.coefficients_)
    assert weak.score_ > 0.999
    assert plain.score_ < 0.99


def test_five_percent_noise_breaks_plain_differences_but_not_the_weak_form():
    # At 5 % noise and dt = 0.01 plain differences lose or badly misestimate a true term, while
    # the weak form still recovers every coefficient within 5 % (the demo's tolerance).
    series = lorenz63_reference_series(0.01, noise=0.05, seed=5)
    plain = make_fitter("sparse", {"differentiation": "finite-difference"}).fit(series)
    weak = make_fitter("sparse", {"differentiation": "weak"}).fit(series)
    assert max_relative_error(plain.coefficients_) > 0.2
    assert max_relative_error(weak.coefficients_) < 0.05
    assert largest_spurious(weak.coefficients_) <= 0.05


def test_runs_of_different_lengths_are_fitted_together():
    full = lorenz63_reference_series(0.01)
    runs = [full.runs[0][:1500], full.runs[1][:2500]]
    series = Series.from_arrays(runs, full.names, full.dt)
    fitter = make_fitter("sparse", {}).fit(series)
    assert max_relative_error(fitter.coefficients_) < 0.01
    one = make_fitter("sparse", {}).fit(Series.from_arrays(runs[:1], full.names, full.dt))
    assert fitter.n_rows_ > one.n_rows_


def test_sr3_with_l0_recovers_lorenz63():
    # SR3 (Zheng et al. 2019) with an L0 penalty λ: effective threshold sqrt(2 λ ν) = 0.1 for
    # λ=0.005.
    series = lorenz63_reference_series(0.01)
    fitter = make_fitter(
        "sparse", {"regression": "sr3", "penalty_weight": 0.005, "iterations": 200}
    ).fit(series)
    assert np.all(fitter.coefficients_[ACTIVE] != 0)
    assert max_relative_error(fitter.coefficients_) < 0.01
    assert largest_spurious(fitter.coefficients_) < 0.05


def test_ensemble_inclusion_probabilities_and_seed():
    # Ensemble-SINDy (Fasel et al. 2022): true terms appear in (nearly) every bagged fit; the
    # seed is recorded and repeating it repeats the result exactly.
    series = lorenz63_reference_series(0.01, noise=0.01, seed=6)
    settings = {"bootstrap": True, "resamples": 10, "seed": 3}
    a = make_fitter("sparse", settings).fit(series)
    b = make_fitter("sparse", settings).fit(series)
    c = make_fitter("sparse", {**settings, "seed": 4}).fit(series)
    assert a.inclusion_probabilities_.shape == (3, 10)
    assert a.ensemble_coefficients_.shape == (10, 3, 10)
    assert np.all(a.inclusion_probabilities_[ACTIVE] == 1.0)
    np.testing.assert_array_equal(a.coefficients_, b.coefficients_)
    assert not np.array_equal(a.ensemble_coefficients_, c.ensemble_coefficients_)
    assert a.surrogate_.settings["seed"] == 3
    assert max_relative_error(a.coefficients_) < 0.02


def test_fourier_library_recovers_a_damped_pendulum():
    # Damped pendulum θ' = ω, ω' = −sin θ − 0.2 ω (Newton's second law for a pendulum with linear
    # friction, common practice, no source); integrated with scipy at tight tolerance.
    from scipy.integrate import solve_ivp

    rng = np.random.default_rng(7)
    runs = []
    for _ in range(6):
        start = [rng.uniform(-2.5, 2.5), rng.uniform(-1.5, 1.5)]
        t = np.arange(0.0, 20.0, 0.01)
        sol = solve_ivp(
            lambda _, s: [s[1], -np.sin(s[0]) - 0.2 * s[1]],
            (0, t[-1]),
            start,
            t_eval=t,
            rtol=1e-10,
            atol=1e-10,
        )
        runs.append(sol.y.T)
    series = Series.from_arrays(runs, ("angle", "rate"), 0.01)
    fitter = make_fitter(
        "sparse", {"terms": "polynomial+fourier", "degree": 1, "prune_below": 0.05}
    ).fit(series)
    names = fitter.feature_names_
    coef = dict(zip(names, fitter.coefficients_[1]))
    assert abs(coef["sin(angle)"] + 1.0) < 0.01
    assert abs(coef["rate"] + 0.2) < 0.01
    assert abs(dict(zip(names, fitter.coefficients_[0]))["rate"] - 1.0) < 0.01
    assert fitter.n_terms_ == 3
    np.testing.assert_allclose(
        fitter.surrogate_.rhs(runs[0][:5]),
        np.column_stack([runs[0][:5, 1], -np.sin(runs[0][:5, 0]) - 0.2 * runs[0][:5, 1]]),
        rtol=0.02,
        atol=1e-3,
    )


def test_too_few_samples_says_how_many_are_needed():
    rng = np.random.default_rng(8)
    series = Series.from_arrays([rng.normal(size=(15, 3))], ("a", "b", "c"), 0.1)
    with pytest.raises(
        DataError, match=r"library has 20 terms but only \d+ usable samples; at least 20"
    ):
        make_fitter("sparse", {"degree": 3, "differentiation": "finite-difference"}).fit(series)


def test_short_run_for_the_weak_window_is_refused():
    rng = np.random.default_rng(9)
    series = Series.from_arrays([rng.normal(size=(30, 2))], ("a", "b"), 0.1)
    with pytest.raises(
        DataError, match=r"run 0 has 30 samples; differentiation 'weak' needs at least 41"
    ):
        make_fitter("sparse", {}).fit(series)


def test_rank_deficient_library_names_the_dependent_terms():
    rng = np.random.default_rng(10)
    a = np.cumsum(rng.normal(size=500))
    series = Series.from_arrays([np.column_stack([a, 2.0 * a + 1.0])], ("level", "gauge"), 0.1)
    with pytest.raises(
        DataError, match=r"rank-deficient \(rank \d+ of 6 terms\).*'level'.*'gauge'"
    ):
        make_fitter("sparse", {"differentiation": "finite-difference"}).fit(series)


def test_bounded_quadratic_without_cvxpy_names_the_package():
    try:
        import cvxpy  # noqa: F401
    except ImportError:
        pass
    else:
        pytest.skip("cvxpy is installed; the missing-package message cannot be seen")
    series = lorenz63_reference_series(0.01)
    with pytest.raises(OptionalDependencyError, match=r"'cvxpy'"):
        make_fitter("sparse", {"bounded_quadratic": True}).fit(series)


def test_demo_scenario_with_default_settings():
    # The demo's data: the convection loop (Lorenz-63, σ=10, ρ=28, β=8/3; Lorenz 1963) with the
    # scenario's sensor noise, 4 runs × 60 time units at dt = 0.01. With the default settings every
    # true coefficient is recovered within 5 % and no spurious term exceeds 0.05 (the structure of
    # Brunton, Proctor & Kutz 2016).
    from ergodex.scenarios import convection_loop

    fitter = make_fitter("sparse", {}).fit(convection_loop(seed=80))
    assert max_relative_error(fitter.coefficients_) < 0.05
    assert largest_spurious(fitter.coefficients_) <= 0.05
    assert np.all(fitter.coefficients_[ACTIVE] != 0)
