"""Tables and labelled arrays in, :class:`~ergodex.series.Series` out (and back to xarray).

Every public entry point (fitting, checking, simulating from data, registering) calls
:func:`as_series` on the data it is given, so a pandas ``DataFrame``, an xarray ``Dataset`` or
``DataArray`` and a Series are accepted the same way everywhere, with the same rules and errors as
the file readers.

pandas ``DataFrame``
    One column per state variable. Time comes from a ``time`` column (any letter case) or from the
    index when it is a ``DatetimeIndex``, a ``TimedeltaIndex`` or an index named ``time``; without
    either, pass ``dt``. Runs come from a ``run`` (or ``member``) column, or an index level of that
    name (as ``Dataset.to_dataframe()`` writes); the rows of one run must be contiguous. The
    per-member coordinates of :func:`ergodex.simulate` (:data:`MEMBER_COORDINATES`), which
    ``to_dataframe()`` turns into columns, are not variables: a column of that name holding one
    value per run is left out.
xarray ``Dataset``
    Every data variable is a state variable over ``(time,)`` or ``(member, time)`` (the run
    dimension may also be called ``run``). Time comes from the ``time`` coordinate, else pass
    ``dt``. Rows at the end of a run where every variable is missing are padding (runs of unequal
    length, as :func:`to_xarray` writes them) and are dropped.
xarray ``DataArray``
    A named array over ``(time,)`` or ``(member, time)`` is one variable; an array with one more
    dimension (e.g. ``variable``) holds one variable per label of that dimension.

Times
-----
Numeric times are in the data's own unit, which the Series keeps as its ``time_unit`` when the
data name it (a ``time_unit`` attribute, or a plain ``units`` attribute such as ``"hours"`` on the
time coordinate). Datetimes and timedeltas are converted to ``time_unit`` (default seconds):
``dt`` is then the step in seconds unless told otherwise, and the Series' ``time_unit`` says
so. Steps must be uniform within ``time_tolerance`` of the step, as in the CSV reader.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ergodex.exceptions import DataError, require
from ergodex.series import Series, check_name

__all__ = ["as_series", "from_pandas", "from_xarray", "to_xarray", "TIME_UNITS"]

#: Units a datetime or timedelta time axis can be converted to, with their length in seconds.
TIME_UNITS = {"s": 1.0, "min": 60.0, "h": 3600.0, "D": 86400.0, "ms": 1e-3}
#: The word a Series keeps as its ``time_unit`` for each of :data:`TIME_UNITS`.
TIME_UNIT_WORDS = {
    "s": "seconds",
    "min": "minutes",
    "h": "hours",
    "D": "days",
    "ms": "milliseconds",
}

_RUN_NAMES = ("run", "member")
#: Per-member coordinates of a simulated ensemble (see :func:`ergodex.simulate`); not variables.
MEMBER_COORDINATES = ("blown_up", "blowup_time")


def _is_member_coordinate(frame: Any, column: str, run_col: str | None) -> bool:
    """Whether ``column`` is a simulated ensemble's bookkeeping: its name, one value per run."""
    if column not in MEMBER_COORDINATES:
        return False
    values = frame[column]
    if run_col is None:
        return values.nunique(dropna=False) <= 1
    return bool((values.groupby(frame[run_col], sort=False).nunique(dropna=False) <= 1).all())


def _kind(data: Any) -> str:
    """``"series"``, ``"pandas"``, ``"dataset"``, ``"dataarray"`` or ``""`` (not recognised)."""
    if isinstance(data, Series):
        return "series"
    module = type(data).__module__ or ""
    name = type(data).__name__
    if module.startswith("pandas") and name == "DataFrame":
        return "pandas"
    if module.startswith("xarray") and name == "Dataset":
        return "dataset"
    if module.startswith("xarray") and name == "DataArray":
        return "dataarray"
    return ""


def as_series(
    data: Any,
    *,
    dt: float | None = None,
    time_unit: str = "s",
    time_tolerance: float | None = None,
    what: str = "data",
    source: str = "",
) -> Series:
    """``data`` as a :class:`Series`: a Series unchanged, a table or labelled array converted.

    Parameters
    ----------
    data : Series, pandas.DataFrame, xarray.Dataset or xarray.DataArray
        See the module docstring for the layouts accepted.
    dt : float, optional
        Sampling interval when the data carry no times (must agree with the times when they do).
        Ignored for a Series.
    time_unit : {"s", "min", "h", "D", "ms"}, default "s"
        Unit of ``dt`` when times are datetimes or timedeltas.
    time_tolerance : float, optional
        Allowed deviation of each step from ``dt`` relative to ``dt`` (default: the readers').
    what : str
        How the error message names the argument (``"reference"``, ``"fit data"`` ...).
    source : str
        Where the data came from, for messages (default: ``"<what> (<type>)"``).

    Raises
    ------
    DataError
        For an unsupported type or a table that breaks the rules (the message names the column,
        row or dimension).
    """
    kind = _kind(data)
    if kind == "series":
        return data
    options: dict[str, Any] = {
        "dt": dt,
        "time_unit": time_unit,
        "time_tolerance": time_tolerance,
        "source": source or f"{what} ({type(data).__name__})",
    }
    if kind == "pandas":
        return from_pandas(data, **options)
    if kind in ("dataset", "dataarray"):
        return from_xarray(data, **options)
    raise DataError(
        f"{what}: expected an ergodex Series, a pandas DataFrame or an xarray Dataset/DataArray; "
        f"got {type(data).__name__} (for plain arrays use Series.from_arrays(runs, names, dt))"
    )


# --- times -------------------------------------------------------------------------------------
def _unit_seconds(time_unit: str) -> float:
    if time_unit not in TIME_UNITS:
        raise DataError(f"time_unit must be one of {', '.join(TIME_UNITS)}; got {time_unit!r}")
    return TIME_UNITS[time_unit]


def _times_as_numbers(values: Any, time_unit: str, source: str, column: str) -> np.ndarray:
    """Times as float64: numbers as they are, datetimes/timedeltas in ``time_unit`` since the
    first."""
    t = np.asarray(values)
    if t.dtype.kind in "iuf":
        return t.astype(np.float64)
    if t.dtype.kind == "M":
        # time zone-aware pandas columns arrive as objects; numpy datetimes as "M"
        t = t.astype("datetime64[ns]")
        if np.isnat(t).any():
            i = int(np.flatnonzero(np.isnat(t))[0])
            raise DataError(f"{source}: row {i + 1}, {column!r}: missing time; every row needs one")
        t = t - t[0]
    if t.dtype.kind == "m":
        t = t.astype("timedelta64[ns]")
        if np.isnat(t).any():
            i = int(np.flatnonzero(np.isnat(t))[0])
            raise DataError(f"{source}: row {i + 1}, {column!r}: missing time; every row needs one")
        return t.astype(np.int64).astype(np.float64) / (1e9 * _unit_seconds(time_unit))
    raise DataError(
        f"{source}: {column!r} holds {t.dtype} values; times must be numbers, datetimes or "
        "timedeltas"
    )


def _unit_word(values: Any, time_unit: str, stored: Any) -> str | None:
    """The Series' ``time_unit``: the conversion unit for datetimes/timedeltas, else a plain
    unit the data state (an attribute such as ``units = "hours"``), else None."""
    kind = np.asarray(values).dtype.kind
    if kind in "Mm":
        return TIME_UNIT_WORDS.get(time_unit)
    if isinstance(stored, str) and stored.strip() and " since " not in stored:
        return stored.strip()
    return None


def _finish_frame(
    values,
    names,
    times,
    bounds,
    *,
    dt,
    time_tolerance,
    source,
    column,
    where,
    units=None,
    trim_padding=False,
    dt_is_hint=False,
    time_unit=None,
):
    """dt from the times (the CSV reader's rules), then the runs through the readers' checks."""
    from ergodex.readers import shared

    tol = shared.DEFAULT_TIME_TOLERANCE if time_tolerance is None else time_tolerance
    dt_arg = shared._check_dt_argument(dt, source)
    try:
        dt_final = shared._check_time(times, bounds, column, dt_arg, tol, source, where)
    except shared._DtMismatch as exc:
        if not dt_is_hint:
            raise
        dt_final = exc.own
    else:
        # a dt given (or recorded) and agreeing with the times is taken exactly: times written
        # as i * dt lose the last digits of an interval such as 1/3
        dt_final = dt_arg if dt_arg is not None else dt_final
    runs = []
    for a, b, label in bounds:
        block = values[a:b]
        if trim_padding:
            finite_rows = np.flatnonzero(np.isfinite(block).any(axis=1))
            block = block[: finite_rows[-1] + 1] if finite_rows.size else block[:0]
            if not len(block):
                raise DataError(f"{source}: run {label!r} has no values (every row is missing)")
        runs.append(shared._Run(values=block, label=label, where=lambda r, a=a: where(a + r)))
    return shared._finish(
        runs,
        names,
        dt_final,
        source=source,
        split_at_gaps=False,
        min_samples=2,
        units=units,
        time_unit=time_unit,
    )


# --- pandas ------------------------------------------------------------------------------------
def from_pandas(
    frame: Any,
    *,
    dt: float | None = None,
    time_unit: str = "s",
    time_tolerance: float | None = None,
    source: str = "DataFrame",
) -> Series:
    """Build a Series from a pandas DataFrame (layout in the module docstring).

    Examples
    --------
    >>> import pandas as pd
    >>> frame = pd.DataFrame({"time": [0.0, 0.5, 1.0], "flow": [1.0, 2.0, 0.5]})
    >>> from_pandas(frame).dt
    0.5
    """
    pd = require("pandas", "netcdf", "reading pandas DataFrames")
    if not isinstance(frame, pd.DataFrame):
        raise DataError(f"{source}: expected a pandas DataFrame, got {type(frame).__name__}")
    index = frame.index
    index_names = [str(n).lower() if n is not None else None for n in index.names]
    time_like = isinstance(index, (pd.DatetimeIndex, pd.TimedeltaIndex))
    time_in_index = time_like or "time" in index_names
    run_in_index = any(n in _RUN_NAMES for n in index_names if n)
    if time_in_index or run_in_index:
        if isinstance(index, (pd.DatetimeIndex, pd.TimedeltaIndex)) and index.name is None:
            frame = frame.rename_axis("time")
        frame = frame.reset_index()
    columns = list(frame.columns)
    for c in columns:
        if not isinstance(c, str):
            raise DataError(f"{source}: column name {c!r} is not a string; name every column")
    lower = [c.lower() for c in columns]
    time_col = columns[lower.index("time")] if "time" in lower else None
    run_matches = [columns[k] for k, c in enumerate(lower) if c in _RUN_NAMES]
    if len(run_matches) > 1:
        raise DataError(
            f"{source}: both {run_matches[0]!r} and {run_matches[1]!r} columns; keep one"
        )
    run_col = run_matches[0] if run_matches else None
    var_cols = [
        c
        for c in columns
        if c not in (time_col, run_col) and not _is_member_coordinate(frame, c, run_col)
    ]
    if not var_cols:
        raise DataError(f"{source}: no state-variable columns (only time/run)")
    for c in var_cols:
        check_name(c, what=f"column {c!r}", source=source)
        if frame[c].dtype.kind not in "biuf":
            raise DataError(
                f"{source}: column {c!r} holds {frame[c].dtype} values; state variables must be "
                "numbers"
            )
    values = frame[var_cols].to_numpy(dtype=np.float64)
    n = values.shape[0]
    if n == 0:
        raise DataError(f"{source}: the table has no rows")

    if run_col is None:
        bounds = [(0, n, "0")]
    else:
        labels = [str(x) for x in frame[run_col].tolist()]
        bounds = []
        seen: dict[str, int] = {}
        for i, label in enumerate(labels):
            if bounds and bounds[-1][2] == label:
                continue
            if label in seen:
                raise DataError(
                    f"{source}: row {i + 1}, column {run_col!r}: run {label!r} appears again after "
                    f"other runs (first at row {seen[label] + 1}); rows of one run must be "
                    "contiguous (sort by run, then time)"
                )
            seen[label] = i
            if bounds:
                bounds[-1] = (bounds[-1][0], i, bounds[-1][2])
            bounds.append((i, n, label))
    times, unit_word = None, None
    if time_col is not None:
        column = frame[time_col]
        if isinstance(column.dtype, pd.DatetimeTZDtype):
            column = column.dt.tz_convert("UTC").dt.tz_localize(None)
        unit_word = _unit_word(column.to_numpy(), time_unit, frame.attrs.get("time_unit"))
        times = _times_as_numbers(column.to_numpy(), time_unit, source, time_col)
    return _finish_frame(
        values,
        var_cols,
        times,
        bounds,
        dt=dt,
        time_tolerance=time_tolerance,
        source=source,
        column=time_col or "time",
        where=lambda i: f"row {i + 1}",
        time_unit=unit_word,
    )


# --- xarray ------------------------------------------------------------------------------------
def from_xarray(
    data: Any,
    *,
    dt: float | None = None,
    time_unit: str = "s",
    time_tolerance: float | None = None,
    source: str = "Dataset",
) -> Series:
    """Build a Series from an xarray Dataset or DataArray (layout in the module docstring)."""
    xr = require("xarray", "netcdf", "reading xarray data")
    if isinstance(data, xr.DataArray):
        data = _dataarray_to_dataset(data, source)
    if not isinstance(data, xr.Dataset):
        raise DataError(
            f"{source}: expected an xarray Dataset or DataArray, got {type(data).__name__}"
        )
    ds = data
    from ergodex.readers import member_dimension

    member = member_dimension(ds, source)
    names = [str(v) for v in ds.data_vars]
    if not names:
        raise DataError(f"{source}: no data variables")
    allowed = {("time",)} | ({(member, "time"), ("time", member)} if member else set())
    for name in names:
        dims = tuple(map(str, ds[name].dims))
        if dims not in allowed:
            raise DataError(
                f"{source}: variable {name!r} has dimensions {dims}; expected ('time',)"
                + (f" or ({member!r}, 'time')" if member else "")
            )
        if ds[name].dtype.kind not in "biuf":
            raise DataError(f"{source}: variable {name!r} is not numeric ({ds[name].dtype})")
        check_name(name, what=f"variable {name!r}", source=source)
    n_time = ds.sizes["time"]
    n_runs = ds.sizes[member] if member else 1
    cube = np.empty((n_runs, n_time, len(names)))
    for k, name in enumerate(names):
        da = ds[name]
        cube[:, :, k] = (
            da.transpose(member, "time").values
            if member and member in da.dims
            else np.asarray(da.values)[None, :]
        )
    if member and member in ds.coords:
        labels = [str(x) for x in np.asarray(ds[member].values).tolist()]
    else:
        labels = [str(i) for i in range(n_runs)]
    times, unit_word = None, None
    if "time" in ds.coords:
        stored = ds.attrs.get("time_unit") or ds["time"].attrs.get("units")
        unit_word = _unit_word(ds["time"].values, time_unit, stored)
        one = _times_as_numbers(ds["time"].values, time_unit, source, "time")
        times = np.tile(one, n_runs)
    bounds = [(i * n_time, (i + 1) * n_time, labels[i]) for i in range(n_runs)]
    unit_list = [ds[n].attrs.get("units") for n in names]
    units = unit_list if all(isinstance(u, str) for u in unit_list) else None

    def where(i: int) -> str:
        run, row = divmod(i, n_time)
        return f"{member} {labels[run]!r}, time index {row}" if member else f"time index {row}"

    recorded = ds.attrs.get("dt")
    hint = dt is None and isinstance(recorded, (int, float, np.floating)) and recorded > 0
    return _finish_frame(
        cube.reshape(n_runs * n_time, len(names)),
        names,
        times,
        bounds,
        dt=float(recorded) if hint else dt,
        time_tolerance=time_tolerance,
        source=source,
        column="time",
        where=where,
        units=units,
        trim_padding=True,
        dt_is_hint=hint,
        time_unit=unit_word,
    )


def _dataarray_to_dataset(da: Any, source: str) -> Any:
    extra = [d for d in map(str, da.dims) if d != "time" and d not in _RUN_NAMES]
    if not extra:
        if da.name is None:
            raise DataError(f"{source}: the DataArray has no name; name it (da.rename('flow'))")
        return da.to_dataset(name=str(da.name))
    if len(extra) > 1:
        raise DataError(
            f"{source}: the DataArray has dimensions {tuple(map(str, da.dims))}; expected time, an "
            "optional member/run dimension and at most one dimension of variables"
        )
    return da.to_dataset(dim=extra[0])


def to_xarray(series: Series) -> Any:
    """The Series as an xarray Dataset with dims ``(run, time)``, one data variable per variable.

    ``time`` holds ``i * dt``; ``run`` the run labels (``"0"``, ``"1"`` ... without labels);
    shorter runs are padded with NaN at the end (dropped again by :func:`from_xarray`). Units go
    to each variable's ``units`` attribute, ``dt`` and the source to the Dataset's attributes,
    the time unit (when known) to the ``time`` coordinate's ``units`` and the ``time_unit``
    attribute, so :func:`from_xarray` gives it back.
    """
    xr = require("xarray", "netcdf", "converting to xarray")
    n_time = max(series.lengths)
    labels = series.run_labels or tuple(str(i) for i in range(series.n_runs))
    cube = np.full((series.n_runs, n_time, series.n_variables), np.nan)
    for i, run in enumerate(series.runs):
        cube[i, : run.shape[0]] = run
    data_vars = {}
    for k, name in enumerate(series.names):
        attrs: dict[str, Any] = {"units": series.units[k]} if series.units is not None else {}
        data_vars[name] = (("run", "time"), cube[:, :, k], attrs)
    time_attrs = {"units": series.time_unit} if series.time_unit else {}
    coords = {
        "run": ("run", np.asarray(labels, dtype=str)),
        "time": ("time", np.arange(n_time) * series.dt, time_attrs),
    }
    attrs = {"dt": series.dt, "source": series.source, "data_fingerprint": series.fingerprint()}
    if series.time_unit:
        attrs["time_unit"] = series.time_unit
    return xr.Dataset(data_vars, coords=coords, attrs=attrs)
