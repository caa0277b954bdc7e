"""Grid checks: the true dynamics behind a field pass, dynamics twice as fast fail on the grid."""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("xarray")
pytest.importorskip("cftime")

from ergodex.fields import FieldModes, modes_series, read_field
from ergodex.fields.checking import _lag1, _weighted_rms, check_field
from ergodex.fields.modelling import attach_transform
from ergodex.surrogate import Surrogate, polynomial_terms
from ergodex.validation import CheckSpec
from fields_support import write_cf

LAT = np.array([-10.0, -5.0, 0.0, 5.0, 10.0, 15.0])
LON = np.arange(8) * 10.0 + 120.0
DRIFT = np.array([[-1.0, 0.5], [-0.5, -0.5]])  # ergodex.scenarios' default OU drift
NOISE = np.array([[1.0, 0.3], [0.3, 0.5]])


def test_lag_one_map_matches_statsmodels():
    from statsmodels.tsa.stattools import acf

    rng = np.random.default_rng(31)
    x = rng.standard_normal((200, 3)).cumsum(axis=0) * 0.1 + rng.standard_normal((200, 3))
    ours = _lag1(x)
    for j in range(3):  # reference: statsmodels' (biased) sample autocorrelation at lag 1
        assert ours[j] == pytest.approx(acf(x[:, j], nlags=1)[1], rel=1e-12)
    w = np.array([1.0, 2.0, 1.0])
    assert _weighted_rms(np.zeros(3), np.array([1.0, 1.0, 3.0]), w) == pytest.approx(
        np.sqrt((1 + 2 + 9) / 4)
    )  # definition: sqrt(Σ w d² / Σ w)


def _ou_file(tmp_path, seed, name, n_runs):
    from ergodex.scenarios import ornstein_uhlenbeck

    series = ornstein_uhlenbeck(seed=seed, n_runs=n_runs, duration=200.0, dt=0.25)
    q, _ = np.linalg.qr(np.random.default_rng(99).standard_normal((LAT.size * LON.size, 2)))
    x = np.stack([r @ q.T for r in series.runs]).reshape(n_runs, -1, LAT.size, LON.size)
    path = write_cf(
        tmp_path / name,
        x,
        lat=LAT,
        lon=LON,
        times=0.25 * np.arange(x.shape[1]),
        calendar="noleap",
        member="member",
    )
    return path, series


@pytest.mark.slow
def test_true_dynamics_pass_on_the_grid_and_faster_dynamics_fail(tmp_path):
    fit_path, fit_series = _ou_file(tmp_path, 1, "fit.nc", 2)
    check_path, _ = _ou_file(tmp_path, 2, "check.nc", 4)
    field = read_field(fit_path, "tas")
    t = FieldModes(n_modes=2, climatology=None).fit(field)
    # the modes are an affine image of the process's coordinates: z = x M + c (exactly, no
    # noise was added), recovered by least squares
    z = np.concatenate(modes_series(t, field).runs)
    x = np.concatenate(fit_series.runs)
    sol, *_ = np.linalg.lstsq(np.column_stack([x, np.ones(len(x))]), z, rcond=None)
    M, c = sol[:2], sol[2]
    hours = 0.25 / 6.0  # the file's clock counts hours; the process's time unit is 0.25 d = 6 h

    def model(scale: float):
        # dz = Mᵀ A M⁻ᵀ (z − c) dt + Mᵀ dW (linear change of variables of the OU process)
        a_z = M.T @ (scale * DRIFT) @ np.linalg.inv(M.T)
        coef = np.column_stack([-(a_z @ c), a_z]) * hours
        s = Surrogate(
            t.output_names,
            polynomial_terms(2, 1),
            coef,
            kind="linear-stochastic",
            noise=M.T @ (scale * NOISE) @ M * hours,
        )
        return attach_transform(s, t)

    spec = CheckSpec(seed=3, members=8)
    true = check_field(model(1.0), read_field(check_path, "tas"), spec)
    grid = {r.statistic: r for r in true.scorecard.rows}
    assert {"variance map", "lag-1 map", "variance captured"} <= set(grid)
    assert all(r.verdict == "pass" for r in true.scorecard.rows if r.statistic in grid)
    assert true.scorecard.passed
    # drift and noise doubled keep the stationary covariance (Gardiner 2009: A C + C Aᵀ + Q = 0
    # scales as a whole) but halve the correlation times: the lag-one map must catch it
    fast = check_field(model(2.0), read_field(check_path, "tas"), spec)
    lag1 = next(r for r in fast.scorecard.rows if r.statistic == "lag-1 map")
    assert lag1.verdict == "fail" and not fast.scorecard.passed
    assert any("lag-1 map" in reason for reason in fast.scorecard.reasons)
    assert set(fast.maps) == {
        "reference variance",
        "reference lag-1",
        "surrogate variance",
        "surrogate lag-1",
    }
