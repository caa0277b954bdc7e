"""ergodex.simulate: an ensemble in data space as an xarray Dataset, blow-ups as a status."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from ergodex.model_space import Standardise
from ergodex.surrogate import Surrogate, polynomial_terms

xr = pytest.importorskip("xarray")


def _linear_model(A, b, Q, *, dt=0.5, transform=None, names=("x", "y")):
    terms = polynomial_terms(len(b), 1)  # 1, x, y
    coefficients = np.column_stack([b, A])
    return Surrogate(
        names,
        terms,
        coefficients,
        kind="linear-stochastic",
        noise=Q,
        transform=transform,
        provenance={"dt": dt},
    )


def test_linear_model_matches_its_stationary_mean_and_covariance():
    import ergodex

    A = np.array([[-1.0, 0.6], [-0.4, -0.5]])
    b = np.array([0.5, -0.2])
    Q = np.array([[0.8, 0.1], [0.1, 0.4]])
    model = _linear_model(A, b, Q)
    calls = []
    ds = ergodex.simulate(
        model,
        members=100,
        duration=200.0,
        seed=3,
        spinup=20.0,
        progress=lambda d, t: calls.append((d, t)),
    )
    assert dict(ds.sizes) == {"member": 100, "time": 400}
    assert list(ds.data_vars) == ["x", "y"]
    assert ds.attrs["status"] == "ok" and ds.attrs["dt"] == 0.5
    assert ds.attrs["model_fingerprint"] == model.fingerprint()
    assert calls and calls[-1][0] == calls[-1][1] == 400
    x = np.stack([ds["x"].values.ravel(), ds["y"].values.ravel()], axis=1)
    # Ornstein-Uhlenbeck process dx = (A x + b) dt + dW, <dW dW^T> = Q dt: stationary mean
    # -A^{-1} b and covariance C with A C + C A^T + Q = 0 (Gardiner, Handbook of Stochastic
    # Methods, sec. 4.5.6; from memory), solved by scipy's Lyapunov solver.
    mean = -np.linalg.solve(A, b)
    C = scipy.linalg.solve_continuous_lyapunov(A, -Q)
    # 40 000 states, decorrelation time ~ 2 (slowest decay rate 0.75), output every 0.5: about
    # 10 000 effective samples, so the standard error of a variance is ~ 1.4 % and of a mean
    # ~ 0.01 sd; the stochastic Heun step adds a bias of order substep (well below 1 %).
    np.testing.assert_allclose(x.mean(axis=0), mean, atol=0.06 * np.sqrt(np.diag(C)).max())
    np.testing.assert_allclose(np.cov(x.T), C, rtol=0.08, atol=0.08 * np.abs(C).max())


def test_values_are_in_data_space_and_frames_read_the_result_back():
    import ergodex
    from ergodex.frames import as_series

    rng = np.random.default_rng(5)
    # the model lives in standardised units; the data have mean 10 and spread 3
    data = rng.normal(loc=10.0, scale=3.0, size=(500, 2))
    transform = Standardise().fit(data, names=("p", "q"))
    model = _linear_model(
        -np.eye(2), np.zeros(2), 0.5 * np.eye(2), dt=0.1, transform=transform, names=("z0", "z1")
    )
    ds = ergodex.simulate(model, members=20, steps=2000, seed=1, spinup=5.0)
    assert list(ds.data_vars) == ["p", "q"]
    # stationary model variance is Q/2 = 0.25 per unit (A = -I), so data sd = 3 * 0.5
    values = ds["p"].values.ravel()
    assert abs(values.mean() - 10.0) < 0.2
    assert abs(values.std() - 1.5) < 0.15
    series = as_series(ds)
    assert series.n_runs == 20 and series.dt == 0.1 and series.names == ("p", "q")


def test_blow_up_is_a_status_not_an_exception():
    import ergodex

    # dx/dt = 1 + x^2 from x(0) ~ 0 is tan(t): it leaves every bound before t = pi/2; the
    # recorded training range [-1, 1] bounds members at ten times that range (as the CLI does)
    terms = polynomial_terms(1, 2)  # 1, x, x^2
    model = Surrogate(
        ("x",),
        terms,
        np.array([[1.0, 0.0, 1.0]]),
        provenance={"dt": 0.1, "model_range": {"x": [-1.0, 1.0]}},
    )
    ds = ergodex.simulate(model, members=3, steps=40, seed=0, spinup=0.0)
    assert ds.attrs["status"] == "all-blowup" and ds.attrs["n_blown_up"] == 3
    assert bool(ds["blown_up"].all())
    assert np.all(ds["blowup_time"].values < np.pi / 2 + 0.1)
    assert np.isnan(ds["x"].values[:, -1]).all()


def test_a_simulated_dataframe_reads_back_as_the_models_variables_only():
    import ergodex
    from ergodex.frames import as_series

    model = _linear_model(-np.eye(2), np.zeros(2), 0.5 * np.eye(2), dt=0.1, names=("u", "v"))
    ds = ergodex.simulate(model, members=3, steps=50, seed=4, spinup=1.0)
    frame = ds.to_dataframe()
    # xarray writes the non-index coordinates as columns (xarray docs, Dataset.to_dataframe)
    assert {"blown_up", "blowup_time"} <= set(frame.columns)
    series = as_series(frame)
    assert series.names == ("u", "v") and series.n_runs == 3 and series.dt == pytest.approx(0.1)
    for m, run in enumerate(series.runs):
        np.testing.assert_array_equal(run, np.column_stack([ds["u"].values[m], ds["v"].values[m]]))
    # one member alone (scalar coordinates become constant columns) reads back the same way
    assert as_series(ds.isel(member=1).to_dataframe()).names == ("u", "v")
    # a column of that name that changes within a run is data, and is kept
    frame["blown_up"] = np.random.default_rng(0).normal(size=len(frame))
    assert as_series(frame).names == ("u", "v", "blown_up")
