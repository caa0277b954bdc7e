"""Reading a gridded CF variable: (time, [member], [level], lat, lon) in NetCDF files → a Field.

What the CF conventions put in a file is honoured, never guessed: packed values
(``scale_factor``/``add_offset``) and ``_FillValue``/``missing_value`` are decoded by xarray;
times are decoded on the file's own calendar through cftime and kept with their unit
(:class:`~ergodex.fields.calendar.Clock`); land (points missing at every time) becomes the mask;
area weights come from the variable's ``cell_measures`` (``area: NAME``) when the file holds that
variable, else from cos(latitude). Several files of one variable are joined along time after
checking that they share a calendar and follow one another on one uniform clock. A member (or
realization) dimension becomes separate runs. With ``chunks`` the values stay a lazy dask array
until they are reduced, so a file larger than memory is read piece by piece.

Every refusal is a :class:`DataError` naming the file, the variable and the dimension.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from ergodex.exceptions import DataError, one_line, require
from ergodex.fields.calendar import Clock, clock_from_times, decode_times

__all__ = ["MEMBER_DIMS", "Box", "Field", "parse_box", "read_field"]

MEMBER_DIMS = ("member", "realization", "ensemble", "run", "number")
_LAT_NAMES = ("lat", "latitude", "nav_lat", "y")
_LON_NAMES = ("lon", "longitude", "nav_lon", "x")


@dataclass(frozen=True)
class Box:
    """A latitude–longitude box in degrees; ``lon0 > lon1`` crosses the date line."""

    lat0: float
    lat1: float
    lon0: float
    lon1: float

    def to_list(self) -> list[float]:
        return [self.lat0, self.lat1, self.lon0, self.lon1]

    def lat_index(self, lat: np.ndarray) -> np.ndarray:
        lo, hi = sorted((self.lat0, self.lat1))
        return np.flatnonzero((lat >= lo) & (lat <= hi))

    def lon_index(self, lon: np.ndarray) -> np.ndarray:
        width = (self.lon1 - self.lon0) % 360.0
        if width == 0 and self.lon1 != self.lon0:
            width = 360.0
        offset = (lon - self.lon0) % 360.0
        return np.flatnonzero(offset <= width + 1e-9)


def parse_box(text: str) -> Box:
    """``"LAT0,LAT1,LON0,LON1"`` → :class:`Box`; DataError saying the expected form."""
    parts = [p.strip() for p in str(text).split(",")]
    try:
        values = [float(p) for p in parts]
    except ValueError:
        values = []
    if len(values) != 4 or not all(np.isfinite(values)):
        raise DataError(f"--box {text!r}: expected four numbers LAT0,LAT1,LON0,LON1 in degrees")
    if not all(-90 <= v <= 90 for v in values[:2]):
        raise DataError(f"--box {text!r}: latitudes must lie in [-90, 90]")
    return Box(*values)


@dataclass(frozen=True)
class Field:
    """A gridded variable over time, restricted to its valid (unmasked) points.

    Attributes
    ----------
    values : ndarray or dask array, shape (n_members, n_time, n_points)
        The valid grid points in row-major (lat, lon) order, float32 or float64 as decoded from
        the file (a lazy dask array when read with ``chunks``); every computation on them is
        done in float64.
    lat, lon : ndarray (n_lat,), (n_lon,)
        Grid coordinates in degrees (latitude ascending).
    mask : ndarray (n_lat, n_lon) of bool
        True where the point holds data (not land or outside the domain).
    area : ndarray (n_points,)
        Area weight of each valid point (cell area, or cos latitude).
    area_source : str
        ``"cell_measures:NAME"`` or ``"cos(latitude)"``.
    clock : Clock
        Sampling on the model calendar; ``clock.step`` with ``clock.unit`` is the dt.
    steps : ndarray (n_time,) of int
        Sample index of each time relative to ``clock.origin`` (0, 1, 2, ... for one file).
    variable, units : str
        Variable name and its ``units`` attribute ("" when the file gives none).
    member_labels : tuple of str
    source : str
        The file(s) read, for messages and provenance.
    attrs : dict
        The variable's attributes (CF metadata written back on output).
    """

    values: Any
    lat: np.ndarray
    lon: np.ndarray
    mask: np.ndarray
    area: np.ndarray
    area_source: str
    clock: Clock
    steps: np.ndarray
    variable: str
    units: str = ""
    member_labels: tuple[str, ...] = ("0",)
    source: str = ""
    attrs: dict = field(default_factory=dict)
    names: dict = field(default_factory=dict)  # the file's dimension names (time, lat, lon, ...)
    level: float | None = None

    @property
    def n_members(self) -> int:
        return int(self.values.shape[0])

    @property
    def n_time(self) -> int:
        return int(self.values.shape[1])

    @property
    def n_points(self) -> int:
        return int(self.values.shape[2])

    @property
    def is_lazy(self) -> bool:
        return not isinstance(self.values, np.ndarray)

    def point_lat(self) -> np.ndarray:
        """Latitude of each valid point (n_points,)."""
        return np.broadcast_to(self.lat[:, None], self.mask.shape)[self.mask]

    def point_names(self) -> tuple[str, ...]:
        """A name per valid point, ``VAR_iLAT_iLON`` (grid indices), for data-space columns."""
        iy, ix = np.nonzero(self.mask)
        return tuple(f"{self.variable}_{a}_{b}" for a, b in zip(iy, ix))

    def to_grid(self, points: np.ndarray) -> np.ndarray:
        """(..., n_points) → (..., n_lat, n_lon) with NaN on masked points."""
        points = np.asarray(points)
        out = np.full(points.shape[:-1] + self.mask.shape, np.nan)
        out[..., self.mask] = points
        return out

    def select_members(self, indices) -> Field:
        """The same field restricted to some members (e.g. fit and held-out runs)."""
        from dataclasses import replace

        idx = [int(i) for i in indices]
        if not idx or min(idx) < 0 or max(idx) >= self.n_members:
            raise DataError(f"{self.source}: members {idx} out of range 0..{self.n_members - 1}")
        return replace(
            self, values=self.values[idx], member_labels=tuple(self.member_labels[i] for i in idx)
        )

    def loaded(self) -> Field:
        """The same field with its values in memory (computes a lazy array)."""
        if not self.is_lazy:
            return self
        from dataclasses import replace

        return replace(self, values=np.asarray(self.values.compute(), dtype=np.float64))


# --- helpers ------------------------------------------------------------------------------------
def _find_dim(da, names: Sequence[str], standard: str, units: Sequence[str]) -> str | None:
    for dim in da.dims:
        coord = da.coords.get(dim)
        attrs = {} if coord is None else coord.attrs
        if attrs.get("standard_name") == standard or attrs.get("units") in units:
            return str(dim)
    for dim in da.dims:
        if str(dim).lower() in names:
            return str(dim)
    return None


def _monotonic(values: np.ndarray, where: str) -> int:
    """+1 increasing, -1 decreasing; DataError otherwise."""
    d = np.diff(values)
    if d.size == 0 or np.all(d > 0):
        return 1
    if np.all(d < 0):
        return -1
    i = int(np.flatnonzero(np.sign(d) != np.sign(d[0]))[0]) + 1
    raise DataError(
        f"{where}: coordinate is not monotonic at index {i} "
        f"({values[i - 1]:g} then {values[i]:g}); sort it"
    )


@dataclass
class _Part:
    """One opened file: its variable (lazy), dates, and time encoding."""

    path: Path
    da: Any
    dates: np.ndarray
    units: str
    calendar: str
    ds: Any


def _open_part(xr, path: Path, variable: str, chunks) -> _Part:
    where = f"{path}"
    if not path.is_file():
        raise DataError(f"{path}: no such file (or not a regular file)")
    try:
        ds = xr.open_dataset(
            path, decode_times=False, mask_and_scale=True, chunks=chunks if chunks else None
        )
    except Exception as exc:  # noqa: BLE001 - each backend raises its own type
        raise DataError(f"{where}: cannot be read as NetCDF ({one_line(exc)})") from None
    if variable not in ds.data_vars:
        raise DataError(
            f"{where}: no variable {variable!r}; the file holds {sorted(map(str, ds.data_vars))}"
        )
    da = ds[variable]
    if da.dtype.kind not in "biuf":
        raise DataError(f"{where}: variable {variable!r} is not numeric ({da.dtype})")
    tdim = _find_dim(da, ("time", "t"), "time", ())
    if tdim is None:
        for dim in da.dims:
            c = ds.coords.get(dim)
            if c is not None and " since " in str(c.attrs.get("units", "")):
                tdim = str(dim)
    if tdim is None:
        raise DataError(
            f"{where}: variable {variable!r} has no time dimension (dimensions "
            f"{tuple(map(str, da.dims))}); a field needs one named 'time' or with CF "
            f"time units"
        )
    if tdim not in ds.coords:
        raise DataError(f"{where}: variable {variable!r}, dimension {tdim!r}: no time coordinate")
    tcoord = ds[tdim]
    units = tcoord.attrs.get("units")
    if not isinstance(units, str) or " since " not in units:
        raise DataError(
            f"{where}: variable {variable!r}, dimension {tdim!r}: the time coordinate "
            f"has no CF 'units' attribute (got {units!r}); add e.g. "
            f"units = 'days since 2000-01-01'"
        )
    calendar = str(tcoord.attrs.get("calendar", "standard")).lower()
    if calendar == "gregorian":
        calendar = "standard"
    numbers = np.asarray(tcoord.values, dtype=np.float64)
    dates = decode_times(
        numbers, units, calendar, where=f"{where}: variable {variable!r}, dimension {tdim!r}"
    )
    return _Part(path, da.rename({tdim: "time"}), dates, units, calendar, ds)


def _check_calendars(parts: list[_Part], variable: str) -> None:
    first = parts[0]
    for p in parts[1:]:
        if p.calendar != first.calendar:
            raise DataError(
                f"{p.path}: variable {variable!r}, dimension 'time': calendar "
                f"{p.calendar!r} differs from {first.calendar!r} in {first.path}; "
                f"files of one field must share a calendar"
            )


def read_field(
    paths: str | os.PathLike | Sequence[str | os.PathLike],
    variable: str,
    *,
    box: Box | None = None,
    level: float | None = None,
    chunks: int | None = None,
    min_samples: int = 2,
) -> Field:
    """Read one CF variable from one or more NetCDF files (joined along time) into a Field.

    Parameters
    ----------
    paths : path or sequence of paths
        Files of one variable, in any order (sorted by their first time).
    variable : str
        The data variable to read.
    box : Box, optional
        Keep only this latitude–longitude box.
    level : float, optional
        Value of a vertical (or other extra) coordinate to select (the nearest one).
    chunks : int, optional
        Read lazily through dask with this many time samples per chunk.
    min_samples : int, default 2

    Raises
    ------
    DataError
        Naming the file, the variable and the dimension: no time dimension, a missing time
        ``units``, non-monotonic coordinates, mixed calendars, non-uniform times, an all-missing
        field, points missing at some times only, an unselected extra dimension.
    """
    xr = require("xarray", "netcdf", "reading gridded NetCDF fields")
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    paths = [Path(p) for p in paths]
    if not paths:
        raise DataError("no field files given")
    if chunks is not None:
        require("dask", "dask", "reading fields lazily in chunks")
    parts = [_open_part(xr, Path(p), variable, {"time": chunks} if chunks else None) for p in paths]
    try:
        return _assemble(
            xr,
            parts,
            variable,
            box=box,
            level=level,
            lazy=chunks is not None,
            min_samples=min_samples,
        )
    finally:
        if chunks is None:
            for p in parts:
                p.ds.close()


def _assemble(xr, parts: list[_Part], variable: str, *, box, level, lazy, min_samples) -> Field:
    _check_calendars(parts, variable)
    parts.sort(key=lambda p: p.dates[0])
    source = ", ".join(str(p.path) for p in parts)
    first = parts[0]
    where = f"{first.path}: variable {variable!r}"
    da0 = first.da
    lat_dim = _find_dim(da0, _LAT_NAMES, "latitude", ("degrees_north", "degree_north"))
    lon_dim = _find_dim(da0, _LON_NAMES, "longitude", ("degrees_east", "degree_east"))
    for name, dim in (("latitude", lat_dim), ("longitude", lon_dim)):
        if dim is None:
            raise DataError(f"{where}: no {name} dimension among {tuple(map(str, da0.dims))}")
    member_dim = next((str(d) for d in da0.dims if str(d).lower() in MEMBER_DIMS), None)
    extra = [str(d) for d in da0.dims if str(d) not in ("time", lat_dim, lon_dim, member_dim)]
    das = []
    for p in parts:
        da = p.da
        dims = set(map(str, da.dims))
        if dims != set(map(str, da0.dims)):
            raise DataError(
                f"{p.path}: variable {variable!r} has dimensions "
                f"{tuple(map(str, da.dims))}, {first.path} has "
                f"{tuple(map(str, da0.dims))}"
            )
        for dim in extra:
            if da.sizes[dim] == 1:
                da = da.isel({dim: 0})
            elif level is None:
                raise DataError(
                    f"{p.path}: variable {variable!r}, dimension {dim!r} has "
                    f"{da.sizes[dim]} values; choose one with --level"
                )
            else:
                if dim not in da.coords:
                    raise DataError(
                        f"{p.path}: variable {variable!r}, dimension {dim!r} has no "
                        f"coordinate to select --level {level:g} from"
                    )
                da = da.sel({dim: level}, method="nearest")
        das.append(da)
    # grid: identical in every file, monotonic, latitude made ascending
    lat = np.asarray(das[0][lat_dim].values, dtype=np.float64)
    lon = np.asarray(das[0][lon_dim].values, dtype=np.float64)
    for p, da in zip(parts, das):
        for dim, ref in ((lat_dim, lat), (lon_dim, lon)):
            vals = np.asarray(da[dim].values, dtype=np.float64)
            if vals.shape != ref.shape or not np.allclose(vals, ref):
                raise DataError(
                    f"{p.path}: variable {variable!r}, dimension {dim!r}: grid "
                    f"differs from {first.path}"
                )
    if _monotonic(lat, f"{where}, dimension {lat_dim!r}") < 0:
        das = [da.isel({lat_dim: slice(None, None, -1)}) for da in das]
        lat = lat[::-1]
    _monotonic(lon, f"{where}, dimension {lon_dim!r}")
    if box is not None:
        iy, ix = box.lat_index(lat), box.lon_index(lon)
        if iy.size == 0 or ix.size == 0:
            raise DataError(
                f"{where}: the box {box.to_list()} holds no grid points (latitudes "
                f"{lat.min():g}..{lat.max():g}, longitudes "
                f"{lon.min():g}..{lon.max():g})"
            )
        das = [da.isel({lat_dim: iy, lon_dim: ix}) for da in das]
        lat, lon = lat[iy], lon[ix]
    # time: one clock across files
    dates = np.concatenate([p.dates for p in parts])
    clock = clock_from_times(
        dates,
        first.units,
        first.calendar,
        where=f"{source}: variable {variable!r}, dimension 'time'",
    )
    if len(dates) < min_samples:
        raise DataError(f"{where}, dimension 'time': {len(dates)} samples; need {min_samples}")
    steps = np.arange(len(dates), dtype=np.int64)
    order = (
        ["time", lat_dim, lon_dim] if member_dim is None else [member_dim, "time", lat_dim, lon_dim]
    )
    arrays = [da.transpose(*order).data for da in das]
    if lazy:
        import dask.array as dsa

        full = dsa.concatenate(arrays, axis=-3) if len(arrays) > 1 else arrays[0]
    elif len(arrays) == 1:
        full = np.asarray(arrays[0])
    else:
        full = np.concatenate([np.asarray(a) for a in arrays], axis=-3)
    if member_dim is None:
        full = full[None]
    labels = _member_labels(das[0], member_dim)
    mask, finite_count = _mask(full, lazy)
    n_time = full.shape[1]
    if not mask.any():
        raise DataError(
            f"{where}: every value is missing (NaN or _FillValue) in the selected "
            f"region; check the variable or the --box"
        )
    partial = (finite_count > 0) & (finite_count < n_time * full.shape[0])
    if partial.any():
        iy, ix = np.argwhere(partial)[0]
        raise DataError(
            f"{where}: the point at {lat_dim}={lat[iy]:g}, {lon_dim}={lon[ix]:g} is "
            f"missing at {n_time * full.shape[0] - int(finite_count[iy, ix])} of "
            f"{n_time * full.shape[0]} times (dimension 'time'); a field needs each "
            f"point present always or never: fill the gaps or choose a --box"
        )
    values = full.reshape(full.shape[:2] + (-1,))[..., mask.ravel()]
    if values.dtype not in (np.float32, np.float64):
        values = values.astype(np.float64)
    del full
    area, area_source = _area(first, das[0], lat, lon, lat_dim, lon_dim, mask, box)
    attrs = {
        str(k): v
        for k, v in da0.attrs.items()
        if isinstance(v, (str, int, float, np.number)) and k not in ("_FillValue",)
    }
    units = attrs.get("units", "")
    return Field(
        values=values,
        lat=lat,
        lon=lon,
        mask=mask,
        area=area,
        area_source=area_source,
        clock=clock,
        steps=steps,
        variable=variable,
        units=str(units),
        member_labels=labels,
        source=source,
        attrs=attrs,
        names={
            "time": "time",
            "lat": lat_dim,
            "lon": lon_dim,
            "member": member_dim or "",
            "time_units": first.units,
        },
        level=level,
    )


def _member_labels(da, member_dim: str | None) -> tuple[str, ...]:
    if member_dim is None:
        return ("0",)
    n = da.sizes[member_dim]
    if member_dim in da.coords:
        labels = [str(v) for v in np.asarray(da[member_dim].values).tolist()]
        if len(set(labels)) == n:
            return tuple(labels)
    return tuple(str(i) for i in range(n))


def _mask(full, lazy: bool) -> tuple[np.ndarray, np.ndarray]:
    """Valid-point mask and the count of finite values per grid point (n_lat, n_lon)."""
    finite = np.isfinite(full)
    count = finite.sum(axis=(0, 1))
    if lazy:
        count = count.compute()
    count = np.asarray(count)
    return count > 0, count


def _area(part: _Part, da, lat, lon, lat_dim, lon_dim, mask, box) -> tuple[np.ndarray, str]:
    """Cell areas named by ``cell_measures`` when the file has them, else cos(latitude)."""
    measures = str(part.da.attrs.get("cell_measures", ""))
    if "area:" in measures:
        name = measures.split("area:")[1].split()[0]
        if name in part.ds.variables:
            a = part.ds[name]
            if set(map(str, a.dims)) == {lat_dim, lon_dim}:
                a = a.transpose(lat_dim, lon_dim)
                a = a.sel({lat_dim: lat, lon_dim: lon})
                values = np.asarray(a.values, dtype=np.float64)[mask]
                if np.all(np.isfinite(values)) and np.all(values > 0):
                    return values, f"cell_measures:{name}"
    coslat = np.cos(np.deg2rad(lat))
    weights = np.broadcast_to(np.clip(coslat, 0.0, None)[:, None], mask.shape)[mask]
    return np.array(weights, dtype=np.float64), "cos(latitude)"
