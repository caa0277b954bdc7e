"""Writing gridded values back as a CF NetCDF variable on the model's own grid and calendar.

Used by ``ergodex simulate`` for a field model (surrogate output mapped back to the grid) and by
the basin demo scenario. The land mask is written as ``_FillValue``; the time coordinate keeps the
original units and calendar; global attributes name the model, its version and ergodex's. The
file goes through a temporary file in the target folder and ``os.replace``.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from ergodex.exceptions import require
from ergodex.fields.calendar import Clock

__all__ = ["write_field"]

_FILL = np.float32(1e20)


def write_field(
    path: str | os.PathLike,
    values: np.ndarray,
    *,
    variable: str,
    lat: np.ndarray,
    lon: np.ndarray,
    mask: np.ndarray,
    clock: Clock,
    steps: np.ndarray,
    time_units: str,
    units: str = "",
    attrs: Mapping[str, Any] | None = None,
    member_dim: str = "member",
    global_attrs: Mapping[str, Any] | None = None,
    dims: Mapping[str, str] | None = None,
    packing: Mapping[str, Any] | None = None,
) -> Path:
    """Write ``values`` (n_members, n_time, n_points) as a CF variable (member, time, lat, lon).

    Parameters
    ----------
    values : ndarray (n_members, n_time, n_points)
        Values of the valid points (``mask`` order); masked points are written as missing.
    clock, steps, time_units
        Sample indices placed on the clock and written as numbers in ``time_units`` on the
        clock's calendar.
    packing : mapping, optional
        Encoding of the variable (e.g. ``dtype="int16", scale_factor=..., add_offset=...``).
    """
    xr = require("xarray", "netcdf", "writing gridded NetCDF files")
    from ergodex import __version__
    from ergodex.files import atomic_write_path
    from ergodex.writers import _netcdf_engine

    dims = dict(dims or {})
    lat_dim, lon_dim = dims.get("lat", "lat"), dims.get("lon", "lon")
    values = np.asarray(values, dtype=np.float64)
    n_members, n_time = values.shape[:2]
    grid = np.full((n_members, n_time) + mask.shape, np.nan, dtype=np.float32)
    grid[:, :, mask] = values
    times = clock.numbers_at(np.asarray(steps), time_units)
    var_attrs = {
        k: v
        for k, v in dict(attrs or {}).items()
        if k not in ("_FillValue", "missing_value", "scale_factor", "add_offset", "cell_measures")
    }
    if units:
        var_attrs["units"] = units
    ds = xr.Dataset(
        {variable: ((member_dim, "time", lat_dim, lon_dim), grid, var_attrs)},
        coords={
            "time": (
                "time",
                times,
                {
                    "units": time_units,
                    "calendar": clock.calendar,
                    "standard_name": "time",
                    "axis": "T",
                },
            ),
            lat_dim: (
                lat_dim,
                np.asarray(lat, dtype=np.float64),
                {"units": "degrees_north", "standard_name": "latitude", "axis": "Y"},
            ),
            lon_dim: (
                lon_dim,
                np.asarray(lon, dtype=np.float64),
                {"units": "degrees_east", "standard_name": "longitude", "axis": "X"},
            ),
            member_dim: (member_dim, np.arange(n_members, dtype=np.int32)),
        },
        attrs={
            "Conventions": "CF-1.8",
            "ergodex_version": __version__,
            **{str(k): v for k, v in dict(global_attrs or {}).items() if v is not None},
        },
    )
    encoding: dict[str, Any] = {
        "time": {"dtype": "float64", "_FillValue": None},
        lat_dim: {"_FillValue": None},
        lon_dim: {"_FillValue": None},
    }
    if packing:
        encoding[variable] = dict(packing)
    else:
        encoding[variable] = {"dtype": "float32", "_FillValue": _FILL}
    path = Path(path)
    atomic_write_path(
        path,
        lambda tmp: ds.to_netcdf(tmp, engine=_netcdf_engine(), encoding=encoding),
        make_folder=False,
    )
    return path
