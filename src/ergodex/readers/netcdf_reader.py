"""Read a NetCDF file into a :class:`~ergodex.series.Series` (:func:`read_netcdf`).

NetCDF layout
-------------
A ``time`` dimension with a numeric ``time`` coordinate (or pass ``dt=``), every data variable a
state variable over ``(time,)`` or ``(member, time)`` (the member dimension may also be called
``run``), or a set of state variables over ``(time, station)`` / ``(member, time, station)``:
one more dimension of any name whose coordinate labels name the variables (the label alone when
the file holds one data variable, ``<variable>_<label>`` otherwise). A ``units`` attribute per
variable is kept. CF times (``units = "hours since 2001-01-01 00:00"``, ``calendar``) are decoded
on their calendar: dt is in the file's own unit (seconds, minutes, hours or days) or, for samples
a calendar month apart, in months, and the Series keeps that unit as ``time_unit``; a plain
``units = "hours"`` is kept as the unit of the stored numbers. Gridded variables (latitude and
longitude) are read with ``--variable`` (:mod:`ergodex.fields`).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np

from ergodex.exceptions import DataError, ErgodexError, one_line, require
from ergodex.readers.shared import (
    DEFAULT_TIME_TOLERANCE,
    DT_HINTS,
    _check_dt_argument,
    _check_file,
    _check_min_samples,
    _check_time,
    _DtMismatch,
    _finish,
    _Run,
)
from ergodex.series import Series, check_name

_MEMBER_DIMS = ("member", "run")


def member_dimension(ds: Any, source: str) -> str | None:
    """The run dimension of an xarray Dataset (``member`` or ``run``, or None), after checking
    that it has a ``time`` dimension: the one rule for NetCDF files and in-memory Datasets."""
    if "time" not in ds.dims:
        raise DataError(
            f"{source}: no 'time' dimension; dimensions are {sorted(map(str, ds.dims))}"
        )
    member_dims = [d for d in _MEMBER_DIMS if d in ds.dims]
    if len(member_dims) > 1:
        raise DataError(f"{source}: both 'member' and 'run' dimensions; use one")
    return member_dims[0] if member_dims else None


#: Spellings of CF/UDUNITS time units → the word a Series keeps as its ``time_unit``.
_TIME_UNIT_WORDS = {
    "seconds": "seconds",
    "second": "seconds",
    "secs": "seconds",
    "sec": "seconds",
    "s": "seconds",
    "minutes": "minutes",
    "minute": "minutes",
    "mins": "minutes",
    "min": "minutes",
    "hours": "hours",
    "hour": "hours",
    "hrs": "hours",
    "hr": "hours",
    "h": "hours",
    "days": "days",
    "day": "days",
    "d": "days",
    # cftime decodes "months since" on the 360_day calendar only, where months are equal
    "months": "months",
    "month": "months",
}


def _netcdf_columns(ds, source: str, member: str | None):
    """``(names, units, blocks)``: one column per ``(time,)`` / ``(member, time)`` variable, and
    one per label of the extra dimension of a ``(time, station)`` / ``(member, time, station)``
    variable; each block is (n_members, n_time, n_columns)."""
    # CF cell bounds of time (``time:bounds``) are metadata, not a state variable
    bounds = ds["time"].attrs.get("bounds") if "time" in ds.variables else None
    data_names = [str(v) for v in ds.data_vars if str(v) != bounds]
    if not data_names:
        raise DataError(f"{source}: no data variables")
    n_time = ds.sizes["time"]
    n_members = ds.sizes[member] if member else 1
    names: list[str] = []
    units: list[Any] = []
    blocks: list[np.ndarray] = []
    for name in data_names:
        da = ds[name]
        dims = tuple(map(str, da.dims))
        extra = [d for d in dims if d != "time" and d != member]
        if "time" not in dims or len(extra) > 1:
            where = (
                f"dimension {extra[1]!r} is one too many"
                if len(extra) > 1
                else "it has no 'time' dimension"
            )
            raise DataError(
                f"{source}: variable {name!r} has dimensions {dims}: {where}; expected (time,)"
                + (f", ({member}, time)" if member else "")
                + " or (time, station) whose station labels name the variables; for a gridded "
                f"field pass --variable {name}"
            )
        if da.dtype.kind not in "biuf":
            raise DataError(f"{source}: variable {name!r} is not numeric ({da.dtype})")
        order = ([member] if member and member in dims else []) + ["time"] + extra
        values = np.asarray(da.transpose(*order).values, dtype=np.float64)
        if not (member and member in dims):
            # a variable without the member dimension is the same in every member
            values = np.broadcast_to(values[None], (n_members,) + values.shape)
        if not extra:
            names.append(check_name(name, what=f"variable {name!r}", source=source))
            blocks.append(values.reshape(n_members, n_time, 1))
            units.append(da.attrs.get("units"))
            continue
        dim = extra[0]
        if dim in ds.coords:
            labels = [str(x) for x in np.asarray(ds[dim].values).tolist()]
        else:
            labels = [str(i) for i in range(ds.sizes[dim])]
        single = len(data_names) == 1
        for label in labels:
            column = label if single else f"{name}_{label}"
            names.append(
                check_name(
                    column,
                    what=f"variable {name!r}, {dim} {label!r} (a column name)",
                    source=source,
                )
            )
        blocks.append(values)
        units.extend([da.attrs.get("units")] * len(labels))
    return names, units, blocks


def _netcdf_dt(
    ds, source: str, n_time: int, dt_arg: float | None, tol: float
) -> tuple[float, str | None]:
    """``(dt, time_unit)`` from the ``time`` coordinate.

    CF units (``"hours since 2001-01-01"`` with a ``calendar``) are decoded through cftime: dt is
    the step in the file's own unit (a 6-hourly file in hours gives 6 hours, in days 0.25 days);
    samples a calendar month apart (monthly means, whose lengths in days differ) give dt in
    months. A plain unit (``"hours"``) is kept as it is; no unit leaves the numbers unitless.
    """
    if "time" not in ds.coords:
        if dt_arg is None:
            raise DataError(
                f"{source}: no time coordinate and no dt given; give the sampling interval",
                **DT_HINTS,
            )
        return dt_arg, None
    t = np.asarray(ds["time"].values)
    if t.dtype.kind not in "iuf":
        raise DataError(f"{source}: the time coordinate is not numeric ({t.dtype})")
    t = t.astype(np.float64)
    attrs = ds["time"].attrs
    units = attrs.get("units")

    def elapsed() -> float:
        return _check_time(
            t, [(0, n_time, None)], "time", dt_arg, tol, source, lambda i: f"time index {i}"
        )

    if not isinstance(units, str) or not units.strip():
        return elapsed(), None
    if " since " not in units:
        return elapsed(), units.strip()
    from ergodex.fields.calendar import decode_times

    word = units.partition(" since ")[0].strip().lower()
    unit = _TIME_UNIT_WORDS.get(word)
    calendar = str(attrs.get("calendar", "standard")).strip().lower() or "standard"
    dates = decode_times(t, units, calendar, where=f"{source}: time")
    if unit is None:
        raise DataError(
            f"{source}: time units {units!r}: {word!r} is not a unit ergodex reads;"
            " write the times in seconds, minutes, hours or days since a date"
        )
    try:
        return elapsed(), unit
    except _DtMismatch:
        raise
    except DataError as exc:
        # monthly (or yearly) means: equal steps in calendar months, unequal in days
        months = np.array([12 * d.year + d.month - 1 for d in dates], dtype=np.int64)
        steps = np.diff(months)
        if n_time < 2 or not (np.all(steps == steps[0]) and steps[0] > 0):
            raise exc from None
        dt_months, unit = (
            (float(steps[0] // 12), "years") if steps[0] % 12 == 0 else (float(steps[0]), "months")
        )
        if dt_arg is not None and abs(dt_arg - dt_months) > tol * dt_months:
            raise DataError(
                f"{source}: dt={dt_arg!r} was given but the times are "
                f"{dt_months:g} {unit} apart ({calendar} calendar)"
            ) from None
        return dt_months, unit


def read_netcdf(
    path: str | os.PathLike,
    *,
    dt: float | None = None,
    split_at_gaps: bool = False,
    min_samples: int = 2,
    time_tolerance: float = DEFAULT_TIME_TOLERANCE,
) -> Series:
    """Read a NetCDF file through xarray (``netcdf`` extra; layout in the module docstring).

    CF times (``units = "<unit> since <date>"`` with a ``calendar``) are decoded through cftime
    and dt is kept with its unit as the Series' ``time_unit`` (see :func:`_netcdf_dt`).
    """
    xr = require("xarray", "netcdf", "reading NetCDF files")
    path = Path(path)
    source = str(path)
    dt_arg = _check_dt_argument(dt, source)
    min_samples = _check_min_samples(min_samples)
    _check_file(path, "a NetCDF file")
    try:
        with xr.open_dataset(path, decode_times=False, mask_and_scale=True) as ds:
            ds = ds.load()
    except ErgodexError:
        raise
    except Exception as exc:  # noqa: BLE001 - every backend raises its own error type
        raise DataError(f"{source}: cannot be read as NetCDF ({one_line(exc)})") from None

    member = member_dimension(ds, source)
    names, unit_list, blocks = _netcdf_columns(ds, source, member)
    seen: dict[str, int] = {}
    for k, name in enumerate(names):
        if name in seen:
            raise DataError(
                f"{source}: two columns are named {name!r} (columns {seen[name] + 1} "
                f"and {k + 1}); rename a variable or a station"
            )
        seen[name] = k
    n_time = ds.sizes["time"]
    n_members = ds.sizes[member] if member else 1
    stacked = np.concatenate(blocks, axis=2)
    dt_val, time_unit = _netcdf_dt(ds, source, n_time, dt_arg, time_tolerance)

    units = unit_list if all(isinstance(u, str) for u in unit_list) else None
    if member and member in ds.coords:
        labels = [str(x) for x in np.asarray(ds[member].values).tolist()]
        if len(set(labels)) != len(labels):
            labels = [str(i) for i in range(n_members)]
    else:
        labels = [str(i) for i in range(n_members)] if member else [path.stem]
    runs = [
        _Run(
            values=stacked[i],
            label=labels[i],
            # mypy cannot infer the type of a lambda whose extra parameter has a default
            where=(lambda r, i=i: f"{member} {labels[i]!r}, time index {r}")  # type: ignore[misc]
            if member
            else (lambda r: f"time index {r}"),
        )
        for i in range(n_members)
    ]
    return _finish(
        runs,
        names,
        dt_val,
        source=source,
        split_at_gaps=split_at_gaps,
        min_samples=min_samples,
        units=units,
        time_unit=time_unit,
    )
