"""The time unit on a Series: kept by every derived Series and converter, out of the fingerprint,
recorded in a fitted model's provenance, and printed beside dt by one helper."""

from __future__ import annotations

import numpy as np
import pytest

from ergodex.exceptions import DataError
from ergodex.series import Series, format_dt, split_blocks, split_runs


def _series(rng, time_unit="hours", n_runs=3, n=120):
    runs = [rng.normal(size=(n, 2)).cumsum(axis=0) * 0.1 for _ in range(n_runs)]
    return Series.from_arrays(
        runs,
        ("u", "v"),
        6.0,
        run_labels=[f"m{i}" for i in range(n_runs)],
        source="test",
        time_unit=time_unit,
    )


def test_time_unit_survives_select_runs_and_both_splits():
    rng = np.random.default_rng(11)
    series = _series(rng)
    assert series.select_runs([2, 0]).time_unit == "hours"
    fit, check = split_runs(series, 1)
    assert fit.time_unit == check.time_unit == "hours"
    fit, check = split_blocks(series, 3, gap=12.0)
    assert fit.time_unit == check.time_unit == "hours"
    assert "time_unit='hours'" in repr(series)


def test_time_unit_is_not_part_of_the_fingerprint():
    # the same numbers written to CSV (no place for a unit) must keep their fingerprint
    rng = np.random.default_rng(12)
    with_unit = _series(rng)
    without = Series.from_arrays(
        with_unit.runs, with_unit.names, with_unit.dt, run_labels=with_unit.run_labels
    )
    assert without.time_unit is None
    assert with_unit.fingerprint() == without.fingerprint()


@pytest.mark.parametrize("bad", ["", "   ", 6, "ho\nurs"])
def test_unusable_time_unit_is_refused_by_name(bad):
    rng = np.random.default_rng(13)
    with pytest.raises(DataError, match=r"test: time_unit must be a non-empty word"):
        _series(rng, time_unit=bad)


def test_format_dt_writes_the_unit_only_when_known():
    assert format_dt(6.0, "hours") == "6 hours"
    assert format_dt(0.25, "days") == "0.25 days"
    assert format_dt(0.01, None) == "0.01"


def test_xarray_round_trip_keeps_the_time_unit():
    pytest.importorskip("xarray")
    rng = np.random.default_rng(14)
    series = _series(rng, time_unit="days")
    ds = series.to_xarray()
    assert ds["time"].attrs["units"] == "days"
    back = Series.from_xarray(ds)
    assert back.time_unit == "days" and back.fingerprint() == series.fingerprint()


def test_datetimes_give_dt_in_the_conversion_unit_and_say_so():
    pd = pytest.importorskip("pandas")
    rng = np.random.default_rng(15)
    index = pd.date_range("2001-03-01", periods=50, freq="6h")
    frame = pd.DataFrame({"u": rng.normal(size=50)}, index=index)
    series = Series.from_pandas(frame, time_unit="h")
    # 6-hourly stamps are 6 hours apart (pandas' own Timedelta as the reference)
    assert series.dt == pd.Timedelta("6h") / pd.Timedelta("1h")
    assert series.time_unit == "hours"
    assert Series.from_pandas(frame).time_unit == "seconds"


def test_numeric_times_without_a_unit_give_no_time_unit():
    pd = pytest.importorskip("pandas")
    rng = np.random.default_rng(16)
    frame = pd.DataFrame({"time": np.arange(30) * 0.5, "u": rng.normal(size=30)})
    assert Series.from_pandas(frame).time_unit is None


def test_fitters_record_the_time_unit_in_the_provenance():
    from ergodex.cli.fields import time_unit_note
    from ergodex.fitting import make_fitter

    rng = np.random.default_rng(17)
    # a damped linear system sampled every 6 hours (any data with a unit would do)
    a = np.array([[0.9, 0.1], [-0.1, 0.9]])
    runs = []
    for _ in range(3):
        x = np.zeros((300, 2))
        for t in range(1, 300):
            x[t] = a @ x[t - 1] + rng.normal(scale=0.1, size=2)
        runs.append(x)
    series = Series.from_arrays(runs, ("u", "v"), 6.0, time_unit="hours")
    model = make_fitter("linear-inverse", {}).fit(series).surrogate_
    assert model.provenance["time_unit"] == "hours" and model.provenance["dt"] == 6.0
    assert time_unit_note(model).startswith("time unit: hours (dt = 6 hours)")
    plain = (
        make_fitter("linear-inverse", {}).fit(Series.from_arrays(runs, ("u", "v"), 6.0)).surrogate_
    )
    assert "time_unit" not in plain.provenance and time_unit_note(plain) is None
