"""Small CF NetCDF files for the field tests (xarray + cftime; files only under tmp_path)."""

from __future__ import annotations

from pathlib import Path

import numpy as np

EOFS_FILE = "sst_ndjfm_anom.nc"


def eofs_example(name: str = EOFS_FILE) -> Path:
    """A CF example file shipped inside the installed ``eofs`` package (skips without it)."""
    import pytest

    eofs = pytest.importorskip("eofs")
    path = Path(eofs.__file__).parent / "examples" / "example_data" / name
    if not path.is_file():
        pytest.skip(f"{name} is not shipped with this eofs installation")
    return path


def write_cf(
    path: Path,
    values: np.ndarray,
    *,
    lat,
    lon,
    times,
    units="days since 2000-01-01",
    calendar="standard",
    variable="tas",
    member: str | None = None,
    encoding=None,
    time_attrs: dict | None = None,
    var_attrs: dict | None = None,
    extra=None,
) -> Path:
    """Write ``values`` (time, lat, lon) or (member, time, lat, lon) as a CF variable."""
    import xarray as xr

    dims = ("time", "lat", "lon") if member is None else (member, "time", "lat", "lon")
    t_attrs = {"units": units, "calendar": calendar, "standard_name": "time"}
    if time_attrs is not None:
        t_attrs = time_attrs
    coords = {
        "time": ("time", np.asarray(times, dtype=np.float64), t_attrs),
        "lat": (
            "lat",
            np.asarray(lat, dtype=np.float64),
            {"units": "degrees_north", "standard_name": "latitude"},
        ),
        "lon": (
            "lon",
            np.asarray(lon, dtype=np.float64),
            {"units": "degrees_east", "standard_name": "longitude"},
        ),
    }
    if member is not None:
        coords[member] = (member, np.arange(values.shape[0]))
    attrs = {"units": "K"} if var_attrs is None else var_attrs
    ds = xr.Dataset({variable: (dims, values, attrs)}, coords=coords)
    if extra:
        for k, v in extra.items():
            ds[k] = v
    enc = {"time": {"dtype": "float64"}}
    if encoding:
        enc[variable] = encoding
    ds.to_netcdf(path, encoding=enc)
    return path


def noise_field(rng, n_time, n_lat=6, n_lon=8, n_modes=3):
    """Low-rank signal plus small noise on a grid: (time, lat, lon)."""
    patterns = rng.standard_normal((n_modes, n_lat * n_lon))
    amps = rng.standard_normal((n_time, n_modes)) * np.array([3.0, 2.0, 1.0][:n_modes])
    x = amps @ patterns + 0.1 * rng.standard_normal((n_time, n_lat * n_lon))
    return x.reshape(n_time, n_lat, n_lon)
