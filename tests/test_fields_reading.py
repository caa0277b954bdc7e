"""Reading CF gridded variables: calendars, packing, masks, members, boxes, files, bad input."""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("xarray")
cftime = pytest.importorskip("cftime")

from ergodex.exceptions import DataError
from ergodex.fields import Box, parse_box, read_field
from fields_support import eofs_example, noise_field, write_cf

LAT = np.array([-10.0, -5.0, 0.0, 5.0, 10.0, 15.0])
LON = np.arange(8) * 10.0 + 120.0


def test_eofs_example_is_read_with_its_land_mask_and_calendar():
    path = eofs_example()
    field = read_field(path, "sst")
    import xarray as xr

    with xr.open_dataset(path) as ds:  # xarray's own decoding is the reference
        sst = ds["sst"].values
        ref_times = ds["time"].values
    valid = np.isfinite(sst).all(axis=0)
    assert field.mask.sum() == valid.sum() and np.array_equal(field.mask, valid)
    np.testing.assert_array_equal(field.values[0], sst[:, valid])
    # NDJFM means once a year: a yearly clock, on the file's (gregorian = standard) calendar
    assert (field.clock.unit, field.clock.step, field.clock.calendar) == ("years", 1.0, "standard")
    dates = field.clock.dates_at(field.steps)
    assert [d.year for d in dates] == [
        t.year for t in ref_times.astype("datetime64[Y]").astype(object)
    ]


@pytest.mark.parametrize(
    "calendar, step_days, unit, step",
    [
        ("noleap", 1.0, "days", 1.0),
        ("360_day", 0.25, "hours", 6.0),
        ("standard", 0.25, "hours", 6.0),
    ],
)
def test_clock_keeps_the_time_unit(tmp_path, calendar, step_days, unit, step):
    rng = np.random.default_rng(1)
    n = 40
    times = 100.0 + step_days * np.arange(n)
    path = write_cf(
        tmp_path / "f.nc", noise_field(rng, n), lat=LAT, lon=LON, times=times, calendar=calendar
    )
    field = read_field(path, "tas")
    assert (field.clock.unit, field.clock.step) == (unit, pytest.approx(step))
    assert field.clock.dt_text == f"{step:g} {unit}"
    # dates of the clock agree with cftime's own decoding of the stored numbers (reference)
    expected = cftime.num2date(times, "days since 2000-01-01", calendar=calendar)
    got = field.clock.dates_at(field.steps)
    assert all(abs((a - b).total_seconds()) < 1 for a, b in zip(got, expected))


def test_monthly_means_on_real_and_360_day_calendars(tmp_path):
    rng = np.random.default_rng(2)
    n = 30
    # mid-month dates on the standard calendar are 28..31 days apart: a calendar-month clock
    dates = [cftime.datetime(2001 + m // 12, m % 12 + 1, 15, calendar="standard") for m in range(n)]
    times = cftime.date2num(dates, "days since 2000-01-01", calendar="standard")
    f1 = read_field(
        write_cf(tmp_path / "a.nc", noise_field(rng, n), lat=LAT, lon=LON, times=times), "tas"
    )
    assert (f1.clock.unit, f1.clock.step) == ("months", 1.0)
    # on the 360_day calendar every month has 30 days (cftime), so the clock is 30 days
    d360 = [cftime.datetime(2001 + m // 12, m % 12 + 1, 15, calendar="360_day") for m in range(n)]
    t360 = cftime.date2num(d360, "days since 2000-01-01", calendar="360_day")
    assert np.allclose(np.diff(t360), 30.0)
    f2 = read_field(
        write_cf(
            tmp_path / "b.nc", noise_field(rng, n), lat=LAT, lon=LON, times=t360, calendar="360_day"
        ),
        "tas",
    )
    assert (f2.clock.unit, f2.clock.step) == ("days", 30.0)
    back = f1.clock.dates_at(np.arange(n))
    assert [(d.year, d.month) for d in back] == [(d.year, d.month) for d in dates]


def test_packed_values_and_fill_are_decoded(tmp_path):
    rng = np.random.default_rng(3)
    x = 280.0 + noise_field(rng, 20)
    x[:, 0, :3] = np.nan  # land
    enc = {"dtype": "int16", "scale_factor": 0.01, "add_offset": 280.0, "_FillValue": -32767}
    path = write_cf(tmp_path / "p.nc", x, lat=LAT, lon=LON, times=np.arange(20.0), encoding=enc)
    field = read_field(path, "tas")
    assert field.mask.sum() == x[0].size - 3 and not field.mask[0, :3].any()
    # packing rounds to the scale factor: half of 0.01 at most
    np.testing.assert_allclose(field.values[0], x[:, field.mask], atol=0.005 + 1e-9)


def test_member_dimension_becomes_runs_and_box_selects(tmp_path):
    rng = np.random.default_rng(4)
    x = np.stack([noise_field(rng, 15), noise_field(rng, 15)])
    path = write_cf(
        tmp_path / "m.nc", x, lat=LAT, lon=LON, times=np.arange(15.0), member="realization"
    )
    field = read_field(path, "tas", box=Box(-5, 5, 130, 150))
    assert field.n_members == 2 and field.member_labels == ("0", "1")
    assert list(field.lat) == [-5.0, 0.0, 5.0] and list(field.lon) == [130.0, 140.0, 150.0]
    np.testing.assert_array_equal(field.values[1], x[1][:, 1:4, 1:4].reshape(15, -1))


def test_box_across_the_date_line():
    lon = np.arange(0.0, 360.0, 30.0)
    assert list(lon[Box(0, 1, 300, 60).lon_index(lon)]) == [0.0, 30.0, 60.0, 300.0, 330.0]
    assert parse_box("-5, 5, 300, 60") == Box(-5.0, 5.0, 300.0, 60.0)
    with pytest.raises(DataError, match="four numbers"):
        parse_box("1,2,3")


def test_decreasing_latitude_is_flipped_and_cell_areas_are_used(tmp_path):
    import xarray as xr

    rng = np.random.default_rng(5)
    x = noise_field(rng, 12)
    area = xr.DataArray(rng.uniform(1, 2, (6, 8)), dims=("lat", "lon"))
    path = write_cf(
        tmp_path / "d.nc",
        x[:, ::-1],
        lat=LAT[::-1],
        lon=LON,
        times=np.arange(12.0),
        var_attrs={"units": "K", "cell_measures": "area: areacella"},
        extra={"areacella": area},
    )
    field = read_field(path, "tas")
    assert list(field.lat) == sorted(LAT)
    np.testing.assert_array_equal(field.values[0], x.reshape(12, -1))
    assert field.area_source == "cell_measures:areacella"
    np.testing.assert_allclose(field.area, area.values[::-1].ravel())


def test_several_files_join_along_time(tmp_path):
    rng = np.random.default_rng(6)
    x = noise_field(rng, 30)
    one = read_field(
        write_cf(tmp_path / "all.nc", x, lat=LAT, lon=LON, times=np.arange(30.0)), "tas"
    )
    a = write_cf(tmp_path / "b.nc", x[15:], lat=LAT, lon=LON, times=np.arange(15.0, 30.0))
    # the first half counts hours from another origin: decoded on the calendar, then joined
    b = write_cf(
        tmp_path / "a.nc",
        x[:15],
        lat=LAT,
        lon=LON,
        times=24.0 * (1 + np.arange(15.0)),
        units="hours since 1999-12-31",
    )
    joined = read_field([a, b], "tas")
    np.testing.assert_array_equal(joined.values, one.values)
    assert joined.clock.dt_text == "1 days"


@pytest.mark.parametrize(
    "case, pattern",
    [
        ("no-time", r"variable 'tas' has no time dimension"),
        ("no-units", r"variable 'tas', dimension 'time'.*no CF 'units'"),
        ("lat-order", r"variable 'tas', dimension 'lat'.*not monotonic"),
        ("all-nan", r"variable 'tas'.*every value is missing"),
        ("partial-nan", r"variable 'tas'.*missing at 1 of 10 times"),
        ("calendars", r"variable 'tas', dimension 'time'.*calendar 'noleap' differs"),
        ("missing-var", r"no variable 'tas'"),
        ("uneven", r"variable 'tas', dimension 'time'.*not uniform"),
    ],
)
def test_bad_input_names_variable_and_dimension(tmp_path, case, pattern):
    import xarray as xr

    rng = np.random.default_rng(7)
    x = noise_field(rng, 10)
    t = np.arange(10.0)
    kw = {}
    paths = None
    if case == "no-time":
        path = tmp_path / "f.nc"
        xr.Dataset({"tas": (("lat", "lon"), x[0])}, coords={"lat": LAT, "lon": LON}).to_netcdf(path)
        paths = path
    elif case == "no-units":
        kw["time_attrs"] = {"standard_name": "time"}
    elif case == "lat-order":
        kw["lat"] = LAT[[0, 2, 1, 3, 4, 5]]
    elif case == "all-nan":
        x[:] = np.nan
    elif case == "partial-nan":
        x[3, 2, 2] = np.nan
    elif case == "calendars":
        a = write_cf(tmp_path / "a.nc", x, lat=LAT, lon=LON, times=t)
        b = write_cf(tmp_path / "b.nc", x, lat=LAT, lon=LON, times=t + 10, calendar="noleap")
        paths = [a, b]
    elif case == "missing-var":
        kw["variable"] = "pr"
    elif case == "uneven":
        t = np.array([0, 1, 2, 3, 5, 6, 7, 8, 9, 10.0])
    if paths is None:
        args = {"lat": LAT, "lon": LON, "times": t, **kw}
        paths = write_cf(tmp_path / "f.nc", x, **args)
    with pytest.raises(DataError, match=pattern):
        read_field(paths, "tas")


def test_extra_level_dimension_needs_a_choice(tmp_path):
    import xarray as xr

    rng = np.random.default_rng(8)
    x = rng.standard_normal((10, 3, 6, 8))
    ds = xr.Dataset(
        {"ta": (("time", "plev", "lat", "lon"), x, {"units": "K"})},
        coords={
            "time": ("time", np.arange(10.0), {"units": "days since 2000-01-01"}),
            "plev": [1000.0, 850.0, 500.0],
            "lat": LAT,
            "lon": LON,
        },
    )
    path = tmp_path / "l.nc"
    ds.to_netcdf(path)
    with pytest.raises(DataError, match=r"variable 'ta', dimension 'plev' has 3 values"):
        read_field(path, "ta")
    field = read_field(path, "ta", level=850.0)
    np.testing.assert_array_equal(field.values[0], x[:, 1].reshape(10, -1))


def test_lazy_read_matches_the_in_memory_read(tmp_path):
    pytest.importorskip("dask")
    rng = np.random.default_rng(9)
    x = noise_field(rng, 40)
    x[:, 1, 1] = np.nan
    path = write_cf(tmp_path / "z.nc", x, lat=LAT, lon=LON, times=np.arange(40.0))
    lazy = read_field(path, "tas", chunks=7)
    assert lazy.is_lazy
    np.testing.assert_array_equal(lazy.loaded().values, read_field(path, "tas").values)


def test_clock_places_dates_and_refuses_off_grid_ones():
    from ergodex.fields.calendar import clock_from_times

    dates = np.array([cftime.datetime(2000 + y, 1, 16, calendar="360_day") for y in range(5)])
    clock = clock_from_times(dates, "days since 1990-01-01", "360_day", where="f.nc")
    assert clock.dt_text == "360 days"  # 360_day years are 360 days long (cftime)
    later = np.array([cftime.datetime(2007, 1, 16, calendar="360_day")])
    assert clock.steps_of(later, where="g.nc").tolist() == [7]
    # numbers written back equal cftime's own encoding of the same dates (reference)
    np.testing.assert_allclose(
        clock.numbers_at(np.arange(5), "days since 1990-01-01"),
        cftime.date2num(list(dates), "days since 1990-01-01", calendar="360_day"),
    )
    off = np.array([cftime.datetime(2003, 7, 1, calendar="360_day")])
    with pytest.raises(DataError, match="falls between the model's samples every 360 days"):
        clock.steps_of(off, where="g.nc")


def test_written_field_reads_back_with_mask_packing_and_calendar(tmp_path):
    from ergodex.fields.calendar import Clock
    from ergodex.fields.writing import write_field

    rng = np.random.default_rng(10)
    mask = np.ones((LAT.size, LON.size), bool)
    mask[2, 3:5] = False
    values = 20.0 + rng.standard_normal((2, 24, mask.sum()))
    clock = Clock("months", 1.0, 12.0 * 2001, "days since 2000-01-01", "noleap", 15.0)
    path = write_field(
        tmp_path / "w.nc",
        values,
        variable="tos",
        lat=LAT,
        lon=LON,
        mask=mask,
        clock=clock,
        steps=np.arange(24),
        time_units="days since 2000-01-01",
        units="degC",
        packing={
            "dtype": "int16",
            "scale_factor": 0.001,
            "add_offset": 20.0,
            "_FillValue": np.int16(-32767),
        },
    )
    field = read_field(path, "tos")
    assert np.array_equal(field.mask, mask) and field.n_members == 2 and field.units == "degC"
    assert (field.clock.unit, field.clock.calendar) == ("months", "noleap")
    np.testing.assert_allclose(field.values, values, atol=0.0005 + 1e-9)  # half the scale factor
