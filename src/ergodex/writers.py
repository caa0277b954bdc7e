"""Write a :class:`~ergodex.series.Series` to CSV, NPZ, NetCDF or a dataset folder.

Every file is first written to a temporary file in the target folder and then moved into place
with :func:`os.replace`, so a reader never sees a half-written file and a crash leaves the old
file (if any) intact. The layouts are the ones :mod:`ergodex.readers` reads; with the default
``digits=None`` numbers are written in their shortest exact decimal form (Python ``repr``), so
that reading a written file gives back identical values and the same fingerprint.
"""

from __future__ import annotations

import io
import math
import os
import re
from collections.abc import Callable, Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any, cast

import numpy as np

from ergodex.exceptions import DataError, SettingsError, require
from ergodex.files import atomic_write_bytes, atomic_write_path, atomic_write_text
from ergodex.series import Series, split_runs

__all__ = ["write_csv", "write_npz", "write_netcdf", "write_dataset", "WRITERS"]

_MANIFEST = "dataset.toml"


def _savez_atomic(path: Path, arrays: Mapping[str, np.ndarray]) -> None:
    """``numpy.savez`` through :func:`ergodex.files.atomic_write_path`.

    Given a path, ``savez`` would append ``.npz`` to the temporary name, so it gets an open file.
    """

    def to_path(tmp: Path) -> None:
        with open(tmp, "wb") as fh:
            # numpy's stub lets **kwds reach allow_pickle: bool; our keys are array names
            np.savez(fh, **arrays)  # type: ignore[arg-type]

    atomic_write_path(path, to_path, make_folder=False)


def _formatter(digits: int | None) -> Callable[[float], str]:
    if digits is None:
        return repr
    if isinstance(digits, bool) or not isinstance(digits, int) or not 1 <= digits <= 17:
        raise SettingsError(f"digits must be None or an integer in 1..17, got {digits!r}")
    fmt = f"{{:.{digits}g}}"
    return fmt.format


def _time_text(i: int, dt: float) -> str:
    # Rounded to 12 significant digits so that 3 * 0.1 is written 0.3; the readers take dt from
    # a time column the same way (DT_SIGNIFICANT_DIGITS), so dt survives the round trip exactly.
    return repr(float(f"{i * dt:.12g}"))


def _check_label(label: str, series: Series) -> str:
    if (
        label != label.strip()
        or any(c in label for c in ',"')
        or not label.isprintable()
        or (not label)
    ):
        raise DataError(
            f"{series.source or 'series'}: run label {label!r} cannot be written to CSV "
            "(empty, surrounding white space, a comma, a quote or a control character)"
        )
    return label


def _csv_bytes(series: Series, *, time: bool, digits: int | None) -> bytes:
    fmt = _formatter(digits)
    with_run = series.n_runs > 1
    header = (["time"] if time else []) + (["run"] if with_run else []) + list(series.names)
    out = io.StringIO()
    out.write(",".join(header) + "\n")
    labels = series.run_labels or tuple(f"run-{i + 1}" for i in range(series.n_runs))
    for label, run in zip(labels, series.runs):
        prefix_run = _check_label(label, series) + "," if with_run else ""
        for i, row in enumerate(run.tolist()):
            prefix = (_time_text(i, series.dt) + ",") if time else ""
            out.write(prefix + prefix_run + ",".join(map(fmt, row)) + "\n")
    return out.getvalue().encode("utf-8")


def write_csv(
    path: str | os.PathLike, series: Series, *, time: bool = True, digits: int | None = None
) -> Path:
    """Write a Series as CSV: ``time`` (if asked), ``run`` (with several runs), then variables.

    Parameters
    ----------
    path : path-like
    series : Series
    time : bool, default True
        Write a ``time`` column restarting at 0 in every run (otherwise the reader needs ``dt``).
    digits : int, optional
        Significant digits per value; None writes the shortest exact form (lossless).

    Returns
    -------
    Path
        The path written.
    """
    path = Path(path)
    data = _csv_bytes(series, time=time, digits=digits)
    atomic_write_bytes(path, data, make_folder=False)
    return path


def write_npz(path: str | os.PathLike, series: Series) -> Path:
    """Write a Series as an NPZ archive (``values`` stacked, ``lengths``, ``names``, ``dt``, …).

    Strings are stored as fixed-width unicode arrays, so the archive loads with
    ``allow_pickle=False``.
    """
    path = Path(path)
    arrays: dict[str, np.ndarray] = {
        "values": series.stacked(),
        "lengths": np.asarray(series.lengths, dtype=np.int64),
        "names": np.asarray(series.names, dtype=str),
        "dt": np.asarray(series.dt, dtype=np.float64),  # a 0-d array, as savez stores it
    }
    if series.units is not None:
        arrays["units"] = np.asarray(series.units, dtype=str)
    if series.run_labels is not None:
        arrays["run_labels"] = np.asarray(series.run_labels, dtype=str)
    if series.time_unit is not None:
        arrays["time_unit"] = np.asarray(series.time_unit, dtype=str)
    _savez_atomic(path, arrays)
    return path


def write_netcdf(path: str | os.PathLike, series: Series) -> Path:
    """Write a Series as NetCDF (``netcdf`` extra): dims ``(time,)`` or ``(member, time)``.

    All runs must have the same length for the ``member`` dimension. A known time unit goes to
    the ``time`` coordinate's ``units`` as a plain word (``"hours"``), which the reader keeps.
    """
    xr = require("xarray", "netcdf", "writing NetCDF files")
    engine = _netcdf_engine()
    path = Path(path)
    lengths = set(series.lengths)
    if len(lengths) != 1:
        raise DataError(
            f"{path}: NetCDF needs runs of one length for the member dimension, got lengths "
            f"{series.lengths}; write CSV or NPZ instead"
        )
    n = series.lengths[0]
    times = np.array([float(_time_text(i, series.dt)) for i in range(n)])
    data_vars: dict[str, tuple] = {}
    for k, name in enumerate(series.names):
        attrs = {"units": series.units[k]} if series.units is not None else {}
        if series.n_runs == 1:
            data_vars[name] = (("time",), series.runs[0][:, k], attrs)
        else:
            data_vars[name] = (("member", "time"), np.stack([r[:, k] for r in series.runs]), attrs)
    time_attrs = {"units": series.time_unit} if series.time_unit else {}
    coords: dict[str, Any] = {"time": ("time", times, time_attrs)}
    if series.n_runs > 1:
        labels = series.run_labels or tuple(str(i) for i in range(series.n_runs))
        coords["member"] = ("member", np.asarray(labels, dtype=str))
    ds = xr.Dataset(data_vars, coords=coords, attrs={"dt": series.dt})
    encoding = {name: {"_FillValue": None} for name in series.names}
    encoding["time"] = {"_FillValue": None}

    atomic_write_path(
        path, lambda tmp: ds.to_netcdf(tmp, engine=engine, encoding=encoding), make_folder=False
    )
    return path


def _netcdf_engine() -> str:
    """The first NetCDF-4 backend that works here: netCDF4, else h5netcdf (which needs h5py)."""
    import importlib.util

    if importlib.util.find_spec("netCDF4") is not None:
        return "netcdf4"
    if importlib.util.find_spec("h5netcdf") is not None and importlib.util.find_spec("h5py"):
        return "h5netcdf"
    require("h5py", "netcdf", "writing NetCDF files")  # raises with the install hint
    return "h5netcdf"  # pragma: no cover


#: Format name -> (extension, writer).
WRITERS = {"csv": (".csv", write_csv), "npz": (".npz", write_npz), "nc": (".nc", write_netcdf)}


# --- dataset folder -----------------------------------------------------------------------------
def _toml_string(s: str) -> str:
    out = ['"']
    for ch in s:
        if ch == '"':
            out.append('\\"')
        elif ch == "\\":
            out.append("\\\\")
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    out.append('"')
    return "".join(out)


def _toml_value(value: Any, key: str) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        if not math.isfinite(value):
            raise SettingsError(f"{key}: cannot write the non-finite number {value!r} to TOML")
        return repr(float(value))
    if isinstance(value, str):
        return _toml_string(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v, key) for v in value) + "]"
    raise SettingsError(f"{key}: cannot write a {type(value).__name__} to dataset.toml")


_SAFE_STEM = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,80}")


def _file_stems(series: Series) -> list[str]:
    labels = series.run_labels
    if labels is not None and all(_SAFE_STEM.fullmatch(x) for x in labels):
        lowered = [x.lower() for x in labels]
        if len(set(lowered)) == len(lowered):  # distinct even on case-insensitive file systems
            return list(labels)
    return [f"run-{i + 1}" for i in range(series.n_runs)]


def write_dataset(
    folder: str | os.PathLike,
    series: Series,
    *,
    name: str,
    units: Sequence[str] | None = None,
    holdout: int | Iterable[int | str] | None = None,
    fmt: str = "csv",
    description: str = "",
    provenance: Mapping[str, Any] | None = None,
    digits: int | None = None,
) -> Path:
    """Write a dataset folder: one file per run plus ``dataset.toml``.

    Files are named after the run labels when those are safe file names (else ``run-<k>``); the
    manifest is written last, so a folder whose manifest exists is complete.

    Parameters
    ----------
    folder : path-like
        Created if missing.
    series : Series
    name : str
        Dataset name recorded in the manifest.
    units : sequence of str, optional
        Units per variable (default: the Series' own, if any).
    holdout : int or iterable of int or str, optional
        Runs kept for validation, as in :func:`ergodex.series.split_runs` (a count from the
        end, run positions, or run labels); recorded as labels.
    fmt : {"csv", "npz", "nc"}, default "csv"
    description : str, optional
    provenance : mapping, optional
        Flat table of strings, numbers, booleans or lists (e.g. generator and seed).
    digits : int, optional
        Significant digits for CSV values (None: exact).

    Returns
    -------
    Path
        The manifest path.
    """
    if fmt not in WRITERS:
        raise SettingsError(f"fmt must be one of {', '.join(WRITERS)}, got {fmt!r}")
    if not isinstance(name, str) or not name.strip():
        raise SettingsError(f"name must be a non-empty string, got {name!r}")
    folder = Path(folder)
    units = tuple(units) if units is not None else series.units
    if units is not None and len(units) != series.n_variables:
        raise SettingsError(
            f"units has {len(units)} entries, the series has {series.n_variables} variables"
        )
    stems = _file_stems(series)
    # Relabel so that the labels the reader produces (file stems) are the ones recorded.
    labelled = Series.from_arrays(
        list(series.runs),
        series.names,
        series.dt,
        units=units,
        run_labels=stems,
        source=series.source,
        time_unit=series.time_unit,
    )
    held: list[str] = []
    if holdout is not None:
        hold_arg = holdout
        if not isinstance(holdout, (int, np.integer)):
            # Labels refer to the caller's labels; map them to file stems.
            hold_arg = []
            for item in holdout:
                if isinstance(item, str) and series.run_labels and item in series.run_labels:
                    hold_arg.append(series.run_labels.index(item))
                else:
                    hold_arg.append(item)
        # a holdout that is not an integer was turned into a list above
        _, check = split_runs(labelled, cast("int | Sequence[int | str]", hold_arg))
        held = list(check.run_labels or ())

    ext, writer = WRITERS[fmt]
    folder.mkdir(parents=True, exist_ok=True)
    files = []
    for i, stem in enumerate(stems):
        one = labelled.select_runs([i])
        target = folder / f"{stem}{ext}"
        if fmt == "csv":
            write_csv(target, one, digits=digits)
        else:
            writer(target, one)
        files.append(target.name)

    lines = [
        f"name = {_toml_string(name)}",
        f"description = {_toml_string(description)}",
        f"dt = {_toml_value(series.dt, 'dt')}",
        f"variables = {_toml_value(list(series.names), 'variables')}",
    ]
    if units is not None:
        lines.append(f"units = {_toml_value(list(units), 'units')}")
    lines.append(f"files = {_toml_value(files, 'files')}")
    lines.append(f"holdout = {_toml_value(held, 'holdout')}")
    if provenance:
        lines.append("")
        lines.append("[provenance]")
        for key, value in provenance.items():
            if not isinstance(key, str) or not re.fullmatch(r"[A-Za-z0-9_-]+", key):
                raise SettingsError(f"provenance key {key!r} must be letters, digits, _ or -")
            lines.append(f"{key} = {_toml_value(value, f'provenance.{key}')}")
    text = "\n".join(lines) + "\n"
    manifest = folder / _MANIFEST
    atomic_write_text(manifest, text, make_folder=False)
    return manifest
