"""The 1-D NetCDF reader: CF times decoded on their calendar with dt kept in the file's unit,
``(time, station)`` layouts read as variables, one-line refusals for anything else."""

from __future__ import annotations

import datetime as dt_mod
import json

import numpy as np
import pytest

from ergodex.exceptions import DataError
from ergodex.readers import read_netcdf
from ergodex.series import Series
from ergodex.writers import write_netcdf

xr = pytest.importorskip("xarray")
cftime = pytest.importorskip("cftime")


def _write(path, values, times, time_attrs, dims=("time",), coords=None, name="u", attrs=None):
    ds = xr.Dataset(
        {name: (dims, values, attrs or {})},
        coords={"time": ("time", times, time_attrs), **(coords or {})},
    )
    ds.to_netcdf(path)
    return path


def _six_hourly(n):
    start = cftime.DatetimeGregorian(2001, 1, 1)
    return [start + dt_mod.timedelta(hours=6 * i) for i in range(n)]


@pytest.mark.parametrize("unit, expected", [("hours", 6.0), ("days", 0.25)])
def test_six_hourly_times_keep_the_files_unit(tmp_path, unit, expected):
    rng = np.random.default_rng(21)
    units = f"{unit} since 2001-01-01 00:00:00"
    times = cftime.date2num(_six_hourly(80), units, calendar="standard")
    # the step as cftime itself encodes six hours in this unit (source: cftime.date2num)
    assert np.allclose(np.diff(times), expected)
    path = _write(
        tmp_path / "six.nc", rng.normal(size=80), times, {"units": units, "calendar": "standard"}
    )
    series = read_netcdf(path)
    assert series.dt == pytest.approx(float(np.diff(times)[0]))
    assert series.time_unit == unit


def test_monthly_means_on_a_noleap_calendar_give_dt_in_months(tmp_path):
    rng = np.random.default_rng(22)
    units = "days since 2001-01-01"
    dates = [cftime.datetime(2001 + m // 12, m % 12 + 1, 15, calendar="noleap") for m in range(36)]
    times = cftime.date2num(dates, units, calendar="noleap")
    # on the noleap calendar months are 28, 30 or 31 days apart (source: cftime.date2num)
    assert set(np.diff(times).tolist()) == {28.0, 30.0, 31.0}
    path = _write(
        tmp_path / "monthly.nc", rng.normal(size=36), times, {"units": units, "calendar": "noleap"}
    )
    series = read_netcdf(path)
    assert (series.dt, series.time_unit) == (1.0, "months")
    with pytest.raises(
        DataError,
        match=r"monthly\.nc: dt=2\.0 was given but the times are 1 "
        r"months apart \(noleap calendar\)",
    ):
        read_netcdf(path, dt=2.0)


def test_monthly_samples_on_a_360_day_calendar_are_uniform_in_days(tmp_path):
    rng = np.random.default_rng(23)
    units = "days since 1850-01-01"
    dates = [cftime.datetime(1850 + m // 12, m % 12 + 1, 16, calendar="360_day") for m in range(30)]
    times = cftime.date2num(dates, units, calendar="360_day")
    step = np.diff(times)
    # every month of the 360_day calendar lasts 30 days (source: cftime.date2num)
    assert np.all(step == step[0])
    path = _write(
        tmp_path / "m360.nc", rng.normal(size=30), times, {"units": units, "calendar": "360_day"}
    )
    series = read_netcdf(path)
    assert (series.dt, series.time_unit) == (float(step[0]), "days")


def test_daily_noleap_times_run_across_the_end_of_february_without_a_gap(tmp_path):
    rng = np.random.default_rng(24)
    units = "days since 2004-01-01"
    dates = [
        cftime.datetime(2004, 2, 20, calendar="noleap") + dt_mod.timedelta(days=i)
        for i in range(20)
    ]
    times = cftime.date2num(dates, units, calendar="noleap")
    # 2004 is a leap year on the standard calendar, but noleap has no 29 February
    # (source: cftime, the date after 2004-02-28 on noleap)
    assert str(dates[9]).startswith("2004-03-01")
    path = _write(
        tmp_path / "daily.nc", rng.normal(size=20), times, {"units": units, "calendar": "noleap"}
    )
    assert (read_netcdf(path).dt, read_netcdf(path).time_unit) == (1.0, "days")


def test_unreadable_or_non_elapsed_time_units_are_refused_naming_the_time(tmp_path):
    rng = np.random.default_rng(25)
    bad = _write(
        tmp_path / "bad.nc",
        rng.normal(size=10),
        np.arange(10.0),
        {"units": "days since the flood", "calendar": "standard"},
    )
    with pytest.raises(
        DataError,
        match=r"bad\.nc: time: cannot decode times with units "
        r"'days since the flood'",
    ):
        read_netcdf(bad)


def test_months_since_decode_on_360_day_only(tmp_path):
    rng = np.random.default_rng(32)
    values = rng.normal(size=12)
    ok = _write(
        tmp_path / "m.nc",
        values,
        np.arange(12.0),
        {"units": "months since 1900-01-01", "calendar": "360_day"},
    )
    # cftime decodes 'months since' on the 360_day calendar (equal 30-day months) only
    # (source: cftime.num2date, which refuses it on other calendars)
    assert cftime.num2date(1.0, "months since 1900-01-01", calendar="360_day").month == 2
    assert (read_netcdf(ok).dt, read_netcdf(ok).time_unit) == (1.0, "months")
    bad = _write(
        tmp_path / "g.nc",
        values,
        np.arange(12.0),
        {"units": "months since 1900-01-01", "calendar": "standard"},
    )
    with pytest.raises(
        DataError,
        match=r"g\.nc: time: cannot decode times with units "
        r"'months since 1900-01-01' and calendar 'standard'",
    ):
        read_netcdf(bad)
    weeks = _write(
        tmp_path / "w.nc",
        values,
        np.arange(12.0),
        {"units": "weeks since 1900-01-01", "calendar": "standard"},
    )
    with pytest.raises(DataError, match=r"w\.nc: time"):
        read_netcdf(weeks)


def test_plain_time_units_are_kept_and_no_units_leave_dt_unitless(tmp_path):
    rng = np.random.default_rng(26)
    plain = _write(
        tmp_path / "plain.nc", rng.normal(size=10), np.arange(10.0) * 0.5, {"units": "hours"}
    )
    assert (read_netcdf(plain).dt, read_netcdf(plain).time_unit) == (0.5, "hours")
    bare = _write(tmp_path / "bare.nc", rng.normal(size=10), np.arange(10.0) * 0.5, {})
    assert read_netcdf(bare).time_unit is None


def test_series_written_with_a_time_unit_reads_back_with_it(tmp_path):
    rng = np.random.default_rng(27)
    series = Series.from_arrays(rng.normal(size=(3, 40, 2)), ("u", "v"), 6.0, time_unit="hours")
    back = read_netcdf(write_netcdf(tmp_path / "s.nc", series))
    assert back.time_unit == "hours" and back.fingerprint() == series.fingerprint()


def test_npz_keeps_the_time_unit_and_refuses_a_malformed_one(tmp_path):
    from ergodex.readers import read_npz
    from ergodex.writers import write_npz

    rng = np.random.default_rng(33)
    series = Series.from_arrays(rng.normal(size=(2, 30, 2)), ("u", "v"), 0.25, time_unit="days")
    back = read_npz(write_npz(tmp_path / "s.npz", series))
    assert back.time_unit == "days" and back.fingerprint() == series.fingerprint()
    np.savez(
        tmp_path / "bad.npz",
        values=rng.normal(size=(30, 2)),
        names=np.array(["u", "v"]),
        dt=0.25,
        time_unit=np.array(["days", "hours"]),
    )
    with pytest.raises(DataError, match=r"bad\.npz: 'time_unit' must be one string"):
        read_npz(tmp_path / "bad.npz")


def test_dataset_folder_keeps_the_unit_its_files_share(tmp_path):
    from ergodex.readers import read_dataset
    from ergodex.writers import write_dataset

    rng = np.random.default_rng(34)
    series = Series.from_arrays(
        rng.normal(size=(2, 30, 2)), ("u", "v"), 6.0, run_labels=("a", "b"), time_unit="hours"
    )
    write_dataset(tmp_path / "ds", series, name="six", fmt="nc")
    assert read_dataset(tmp_path / "ds").series.time_unit == "hours"
    write_dataset(tmp_path / "csv", series, name="six", fmt="csv")
    assert read_dataset(tmp_path / "csv").series.time_unit is None  # CSV has no place for it


def test_station_dimension_becomes_one_variable_per_station(tmp_path):
    rng = np.random.default_rng(28)
    values = rng.normal(size=(50, 3))
    stations = np.array(["north", "south", "east"])
    path = tmp_path / "ring.nc"
    xr.Dataset(
        {
            "temp": (("time", "station"), values, {"units": "K"}),
            "time_bnds": (("time", "nv"), np.zeros((50, 2))),
        },
        coords={
            "time": (
                "time",
                np.arange(50.0),
                {"units": "hours since 2001-01-01", "bounds": "time_bnds"},
            ),
            "station": ("station", stations),
        },
    ).to_netcdf(path)
    series = read_netcdf(path)
    assert series.names == ("north", "south", "east") and series.units == ("K",) * 3
    np.testing.assert_array_equal(series.runs[0], values)
    assert (series.dt, series.time_unit) == (1.0, "hours")


def test_several_station_variables_and_members_are_named_variable_station(tmp_path):
    rng = np.random.default_rng(29)
    temp, wind = rng.normal(size=(2, 30, 2)), rng.normal(size=(2, 30, 2))
    path = tmp_path / "ens.nc"
    xr.Dataset(
        {"temp": (("member", "time", "site"), temp), "wind": (("member", "time", "site"), wind)},
        coords={
            "time": ("time", np.arange(30.0)),
            "site": ("site", ["a", "b"]),
            "member": ("member", ["m1", "m2"]),
        },
    ).to_netcdf(path)
    series = read_netcdf(path)
    assert series.names == ("temp_a", "temp_b", "wind_a", "wind_b")
    assert series.run_labels == ("m1", "m2")
    np.testing.assert_array_equal(series.runs[1][:, 2:], wind[1])


def test_gridded_variable_is_refused_naming_variable_dimension_and_the_option(tmp_path):
    rng = np.random.default_rng(30)
    path = tmp_path / "grid.nc"
    xr.Dataset(
        {"sst": (("time", "lat", "lon"), rng.normal(size=(10, 3, 4)))},
        coords={"time": ("time", np.arange(10.0))},
    ).to_netcdf(path)
    with pytest.raises(DataError) as info:
        read_netcdf(path)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith(
        f"{path}: variable 'sst' has dimensions ('time', 'lat', 'lon'): "
        "dimension 'lon' is one too many"
    )
    assert message.endswith("pass --variable sst")


def test_cli_fit_prints_dt_with_its_unit_and_the_model_records_it(tmp_path, capsys):
    from ergodex.cli import main

    rng = np.random.default_rng(31)
    # a damped rotation with noise, sampled every 6 hours (any stationary signal would do)
    a = np.array([[0.95, 0.1], [-0.1, 0.95]])
    x = np.zeros((400, 2))
    for t in range(1, 400):
        x[t] = a @ x[t - 1] + rng.normal(scale=0.1, size=2)
    units = "hours since 2001-01-01"
    times = cftime.date2num(_six_hourly(400), units, calendar="standard")
    path = tmp_path / "six.nc"
    xr.Dataset(
        {"u": ("time", x[:, 0]), "v": ("time", x[:, 1])},
        coords={"time": ("time", times, {"units": units})},
    ).to_netcdf(path)
    out = tmp_path / "model.json"
    assert main(["fit", str(path), "--method", "linear-inverse", "--out", str(out)]) == 0
    assert "data: dt 6 hours" in capsys.readouterr().out
    provenance = json.loads(out.read_text())["provenance"]
    assert provenance["time_unit"] == "hours" and provenance["dt"] == 6.0
    grid = tmp_path / "grid.nc"
    xr.Dataset(
        {"sst": (("time", "lat", "lon"), rng.normal(size=(10, 3, 4)))},
        coords={"time": ("time", np.arange(10.0))},
    ).to_netcdf(grid)
    assert (
        main(["fit", str(grid), "--method", "linear-inverse", "--out", str(tmp_path / "g.json")])
        == 2
    )
    err = capsys.readouterr().err
    assert "dimension 'lon' is one too many" in err and "--variable sst" in err
    assert not (tmp_path / "g.json").exists()
