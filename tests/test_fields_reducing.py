"""Area-weighted EOFs, mode counts, seasonal cycle, trend, and the field-modes transform."""

from __future__ import annotations

import json

import numpy as np
import pytest

pytest.importorskip("xarray")
cftime = pytest.importorskip("cftime")

from ergodex.exceptions import DataError
from ergodex.fields import FieldModes, modes_series, read_field
from ergodex.fields.preparing import LinearTrend, SeasonalCycle
from ergodex.fields.reducing import north_mode_count, weighted_eof
from fields_support import eofs_example, noise_field, write_cf

LAT = np.array([-10.0, -5.0, 0.0, 5.0, 10.0, 15.0])
LON = np.arange(8) * 10.0 + 120.0


def test_variance_fractions_match_numpy_svd_and_the_eofs_solver():
    path = eofs_example()
    field = read_field(path, "sst")
    t = FieldModes(n_modes=5, climatology=None).fit(field)
    import xarray as xr

    with xr.open_dataset(path) as ds:
        sst = ds["sst"].values
        lat = ds["latitude"].values.astype(np.float64)  # stored as float32
    # independent reference 1: numpy SVD of time-centred anomalies weighted by sqrt(cos(lat))
    # (the usual area weighting for EOFs; von Storch & Zwiers 1999, ch. 13)
    valid = np.isfinite(sst).all(axis=0)
    w = np.sqrt(np.cos(np.deg2rad(lat)))[:, None] * np.ones(sst.shape[1:])
    a = (sst - sst.mean(axis=0))[:, valid] * w[valid]
    s = np.linalg.svd(a, compute_uv=False)
    np.testing.assert_allclose(t.variance_fraction_, (s**2 / np.sum(s**2))[:5], rtol=1e-10)
    # independent reference 2: the eofs library's solver (Dawson 2016, J. Open Res. Softw. 4:e14)
    from eofs.standard import Eof

    solver = Eof(np.ma.masked_invalid(sst), weights=w)
    np.testing.assert_allclose(t.variance_fraction_, solver.varianceFraction(5), rtol=1e-8)
    # the mode amplitudes are the eofs principal components up to sign
    pcs = solver.pcs(npcs=3)
    z = modes_series(t, field).runs[0][:, :3]
    for k in range(3):
        assert abs(np.corrcoef(z[:, k], pcs[:, k])[0, 1]) > 1 - 1e-10
        np.testing.assert_allclose(np.abs(z[:, k]), np.abs(pcs[:, k]), rtol=1e-8, atol=1e-8)


def test_north_rule_follows_the_published_sampling_error():
    # North et al. (1982) eq. 24: dλ = λ sqrt(2/n); with n = 100, dλ = 0.1414 λ.
    # 10 − 5 = 5 > 1.41 (separated); 5 − 4.9 = 0.1 < 0.707 (not): one mode.
    assert north_mode_count(np.array([10.0, 5.0, 4.9, 1.0]), 100) == 1
    # 10 − 5 > 1.41, 5 − 2 = 3 > 0.707, 2 − 1.9 = 0.1 < 0.283: two modes
    assert north_mode_count(np.array([10.0, 5.0, 2.0, 1.9]), 100) == 2


def test_randomized_solver_agrees_with_the_full_svd():
    rng = np.random.default_rng(11)
    x = noise_field(rng, 300, n_lat=20, n_lon=30).reshape(300, -1)
    x -= x.mean(axis=0)
    w = rng.uniform(0.5, 1.0, x.shape[1])
    full = weighted_eof(x, w, rule="count", n_modes=3, solver="full")
    rand = weighted_eof(x, w, rule="count", n_modes=3, solver="randomized", seed=3)
    assert rand.solver == "randomized"
    np.testing.assert_allclose(rand.variance_fraction, full.variance_fraction, rtol=1e-8)
    # patterns equal up to sign: |<u, v>| = 1 for orthonormal rows
    np.testing.assert_allclose(
        np.abs(np.sum(rand.components * full.components, axis=1)), 1.0, atol=1e-8
    )


def test_variance_rule_keeps_the_fewest_modes_reaching_the_share():
    rng = np.random.default_rng(12)
    x = noise_field(rng, 200).reshape(200, -1)
    x -= x.mean(axis=0)
    w = np.ones(x.shape[1])
    res = weighted_eof(x, w, rule="variance", variance=0.9)
    s = np.linalg.svd(x, compute_uv=False)
    cum = np.cumsum(s**2) / np.sum(s**2)  # reference: numpy SVD
    assert res.n_modes == int(np.searchsorted(cum, 0.9) + 1)


def test_monthly_climatology_equals_xarray_groupby_means(tmp_path):
    import xarray as xr

    rng = np.random.default_rng(13)
    dates = [cftime.datetime(2000 + m // 12, m % 12 + 1, 16, calendar="noleap") for m in range(60)]
    x = rng.standard_normal((60, 4))
    cycle = SeasonalCycle("month").fit(x, np.array(dates), "noleap")
    # reference: xarray's groupby over the decoded month (its own implementation)
    da = xr.DataArray(x, dims=("time", "p"), coords={"time": dates})
    ref = da.groupby("time.month").mean().values
    np.testing.assert_allclose(cycle.coefficients_, ref, rtol=1e-12)
    np.testing.assert_allclose(cycle.evaluate(np.array(dates[:12])), ref)


def test_daily_cycle_recovers_an_exact_annual_harmonic():
    # analytic: a pure annual sinusoid over whole 360-day years is fitted exactly
    dates = np.array(
        [
            cftime.datetime(2001, 1, 1, calendar="360_day")
            + __import__("datetime").timedelta(days=d)
            for d in range(720)
        ]
    )
    frac = np.array([(d.dayofyr - 1) / 360.0 for d in dates])
    x = (3.0 + 2.0 * np.cos(2 * np.pi * frac) - 0.5 * np.sin(4 * np.pi * frac))[:, None]
    cycle = SeasonalCycle("day").fit(x, dates, "360_day")
    np.testing.assert_allclose(cycle.evaluate(dates), x, atol=1e-10)


def test_trend_matches_scipy_linregress():
    from scipy.stats import linregress

    rng = np.random.default_rng(14)
    steps = np.arange(50)
    x = 0.3 * steps[:, None] + rng.standard_normal((50, 3))
    trend = LinearTrend().fit(x, steps)
    for j in range(3):
        ref = linregress(steps, x[:, j])  # reference: scipy
        assert trend.slope_[j] == pytest.approx(ref.slope, rel=1e-12)
        assert trend.intercept_[j] == pytest.approx(ref.intercept, rel=1e-10, abs=1e-12)


def _monthly_file(tmp_path, rng, n=48, calendar="noleap", trend=0.0):
    dates = [cftime.datetime(2000 + m // 12, m % 12 + 1, 15, calendar=calendar) for m in range(n)]
    times = cftime.date2num(dates, "days since 2000-01-01", calendar=calendar)
    season = 5.0 * np.cos(2 * np.pi * np.arange(n) / 12.0)[:, None, None]
    x = 280.0 + season + trend * np.arange(n)[:, None, None] + noise_field(rng, n)
    x[:, 0, 0] = np.nan
    return write_cf(tmp_path / "m.nc", x, lat=LAT, lon=LON, times=times, calendar=calendar), x


def test_round_trip_grid_modes_grid(tmp_path):
    rng = np.random.default_rng(15)
    path, _ = _monthly_file(tmp_path, rng, trend=0.05)
    field = read_field(path, "tas")
    every = FieldModes(n_modes=field.n_points, detrend=True).fit(field)
    z = every.forward(field.values[0])
    np.testing.assert_allclose(every.inverse(z), field.values[0], atol=1e-9)
    # with k modes, the weighted squared error left is the variance share of the dropped modes
    # (Eckart–Young: the truncated SVD is the best rank-k approximation)
    t = FieldModes(n_modes=3, detrend=True).fit(field)
    back = t.inverse(t.forward(field.values[0]))
    anom = t.anomalies_at(field.values[0], field.steps)
    lost = np.sum((field.values[0] - back) ** 2 * t.area_) / np.sum(anom**2 * t.area_)
    assert lost == pytest.approx(1 - t.variance_fraction_.sum(), rel=1e-8)


def test_transform_survives_the_model_file(tmp_path):
    from ergodex.surrogate import Surrogate, polynomial_terms

    rng = np.random.default_rng(16)
    path, _ = _monthly_file(tmp_path, rng)
    field = read_field(path, "tas")
    t = FieldModes(variance=0.8, climatology="month").fit(field)
    k = t.n_modes_
    model = Surrogate(t.output_names, polynomial_terms(k, 1), -np.eye(k, k + 1, 1), transform=t)
    again = Surrogate.from_json(model.to_json())
    assert isinstance(again.transform, FieldModes)
    x = field.values[0][5:17]
    steps = np.arange(5, 17)
    np.testing.assert_array_equal(again.transform.forward_at(x, steps), t.forward_at(x, steps))
    assert json.loads(model.to_json())["transform"]["clock"]["calendar"] == "noleap"


def test_data_after_the_record_gets_its_own_season(tmp_path):
    rng = np.random.default_rng(17)
    path, x = _monthly_file(tmp_path, rng, n=48)
    field = read_field(path, "tas")
    t = FieldModes(n_modes=field.n_points).fit(field)
    later = write_cf(
        tmp_path / "later.nc",
        x[7:31],
        lat=LAT,
        lon=LON,
        times=cftime.date2num(
            [
                cftime.datetime(2000 + m // 12, m % 12 + 1, 15, calendar="noleap")
                for m in range(7, 31)
            ],
            "days since 1990-01-01",
            calendar="noleap",
        ),
        units="days since 1990-01-01",
        calendar="noleap",
    )
    series = modes_series(t, read_field(later, "tas"))
    np.testing.assert_allclose(series.runs[0], modes_series(t, field).runs[0][7:31], atol=1e-9)
    other = write_cf(tmp_path / "o.nc", x[:, :, :4], lat=LAT, lon=LON[:4], times=np.arange(48.0))
    with pytest.raises(DataError, match="does not match the model"):
        modes_series(t, read_field(other, "tas"))


def test_lazy_fit_matches_in_memory_fit(tmp_path):
    pytest.importorskip("dask")
    rng = np.random.default_rng(18)
    path, _ = _monthly_file(tmp_path, rng, trend=0.02)
    eager = FieldModes(n_modes=3, detrend=True).fit(read_field(path, "tas"))
    lazy_field = read_field(path, "tas", chunks=10)
    lazy = FieldModes(n_modes=3, detrend=True).fit(lazy_field)
    assert lazy.eof_solver_ == "streamed-randomized"
    np.testing.assert_allclose(lazy.variance_fraction_, eager.variance_fraction_, rtol=1e-6)
    a = modes_series(lazy, lazy_field).runs[0]
    b = modes_series(eager, read_field(path, "tas")).runs[0]
    np.testing.assert_allclose(np.abs(a), np.abs(b), rtol=1e-5, atol=1e-6)


def test_north_rule_on_the_eofs_example_matches_numpy_eigenvalues():
    path = eofs_example()
    field = read_field(path, "sst")
    t = FieldModes(north=True, climatology=None).fit(field)
    import xarray as xr

    with xr.open_dataset(path) as ds:
        sst = ds["sst"].values
        lat = ds["latitude"].values.astype(np.float64)
    valid = np.isfinite(sst).all(axis=0)
    w = np.sqrt(np.cos(np.deg2rad(lat)))[:, None] * np.ones(sst.shape[1:])
    s = np.linalg.svd((sst - sst.mean(axis=0))[:, valid] * w[valid], compute_uv=False)
    lam = s**2 / (sst.shape[0] - 1)
    # North et al. (1982): keep modes while λ_k − λ_{k+1} > λ_k sqrt(2/n), reference by hand
    err = lam * np.sqrt(2.0 / sst.shape[0])
    k = 0
    while lam[k] - lam[k + 1] > err[k]:
        k += 1
    assert t.n_modes_ == max(1, k) and t.rule == "north"
