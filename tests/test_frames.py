"""pandas and xarray in, Series out: as_series, Series.from_pandas/from_xarray/to_xarray."""

from __future__ import annotations

import numpy as np
import pytest

from ergodex.exceptions import DataError
from ergodex.frames import as_series
from ergodex.series import Series

pd = pytest.importorskip("pandas")
xr = pytest.importorskip("xarray")


def _series(rng, lengths=(40, 25), dt=0.25, labels=("a", "b")):
    runs = [rng.normal(size=(n, 2)) for n in lengths]
    return Series.from_arrays(runs, ("flow", "dT"), dt, run_labels=labels, units=("m/s", "K"))


def test_xarray_round_trip_keeps_the_fingerprint_with_unequal_runs_and_an_awkward_dt():
    rng = np.random.default_rng(1)
    series = _series(rng, dt=1 / 3)  # 1/3 has no short decimal form: times i*dt lose digits
    ds = series.to_xarray()
    assert dict(ds.sizes) == {"run": 2, "time": 40}
    assert list(ds["run"].values) == ["a", "b"]
    assert np.isnan(ds["flow"].values[1, 25:]).all()  # the shorter run is padded
    back = Series.from_xarray(ds)
    assert back.fingerprint() == series.fingerprint()
    assert back.lengths == (40, 25) and back.units == ("m/s", "K")
    assert back.run_labels == ("a", "b")


def test_dataframe_with_time_and_run_columns_gives_runs_and_dt():
    rng = np.random.default_rng(2)
    series = _series(rng, dt=0.5)
    rows = []
    for label, run in zip(series.run_labels, series.runs):
        t = np.arange(run.shape[0]) * 0.5 + 100.0  # a time origin other than 0
        rows.append(pd.DataFrame({"run": label, "time": t, "flow": run[:, 0], "dT": run[:, 1]}))
    frame = pd.concat(rows, ignore_index=True)
    back = as_series(frame)
    assert back.fingerprint() == series.fingerprint()
    assert back.run_labels == ("a", "b")
    # the same table with (run, time) as index levels, as Dataset.to_dataframe() writes it
    assert as_series(frame.set_index(["run", "time"])).fingerprint() == series.fingerprint()


def test_datetime_index_gives_dt_in_seconds_or_the_unit_asked():
    rng = np.random.default_rng(3)
    index = pd.date_range("2026-01-01", periods=30, freq="10min")
    frame = pd.DataFrame(rng.normal(size=(30, 2)), columns=["p", "q"], index=index)
    assert as_series(frame).dt == 600.0  # 10 minutes = 600 s
    assert as_series(frame, time_unit="h").dt == pytest.approx(1 / 6, rel=1e-12)


def test_dataframe_without_times_needs_dt():
    rng = np.random.default_rng(4)
    frame = pd.DataFrame(rng.normal(size=(20, 2)), columns=["p", "q"])
    with pytest.raises(DataError, match="no dt was given"):
        as_series(frame)
    assert as_series(frame, dt=0.1).dt == 0.1


def test_bad_tables_name_the_row_and_column():
    rng = np.random.default_rng(5)
    frame = pd.DataFrame(
        {"time": np.arange(10.0), "p": rng.normal(size=10), "q": rng.normal(size=10)}
    )
    frame.loc[4, "q"] = np.nan
    with pytest.raises(DataError, match=r"row 5, column 'q'"):
        as_series(frame)
    uneven = frame.fillna(0.0)
    uneven.loc[6, "time"] = 6.5
    with pytest.raises(DataError, match=r"row 7, column 'time'.*uniform"):
        as_series(uneven)
    split = pd.DataFrame(
        {
            "run": ["x", "x", "y", "y", "x", "x"],
            "time": [0, 1, 0, 1, 2, 3.0],
            "p": rng.normal(size=6),
        }
    )
    with pytest.raises(DataError, match="row 5.*contiguous"):
        as_series(split)
    with pytest.raises(DataError, match="expected an ergodex Series"):
        as_series(np.zeros((3, 2)))


def test_dataset_and_dataarray_layouts():
    rng = np.random.default_rng(6)
    values = rng.normal(size=(3, 50))
    ds = xr.Dataset(
        {"flow": (("member", "time"), values)},
        coords={"time": np.arange(50) * 0.2, "member": [10, 11, 12]},
    )
    series = as_series(ds)
    assert series.n_runs == 3 and series.dt == 0.2 and series.run_labels == ("10", "11", "12")
    np.testing.assert_array_equal(series.runs[1][:, 0], values[1])
    # one DataArray with a dimension of variables
    da = xr.DataArray(
        rng.normal(size=(50, 2)),
        dims=("time", "variable"),
        coords={"time": np.arange(50) * 0.2, "variable": ["u", "v"]},
    )
    assert as_series(da).names == ("u", "v")
    with pytest.raises(DataError, match="no 'time' dimension"):
        as_series(xr.Dataset({"u": (("t",), rng.normal(size=5))}))
