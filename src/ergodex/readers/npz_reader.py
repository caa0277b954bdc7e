"""Read an NPZ archive into a :class:`~ergodex.series.Series` (:func:`read_npz`).

NPZ layout
----------
``values``: float array, 2-D (n_samples, n_variables) for one run or 3-D
(n_runs, n_samples, n_variables); or 2-D stacked runs with ``lengths`` (1-D int, one per run);
``names``: 1-D string array; ``dt``: scalar (or pass ``dt=``); optional ``units`` and
``run_labels`` (1-D string arrays) and ``time_unit`` (one string, the unit of ``dt``). Loaded
with ``allow_pickle=False``.
"""

from __future__ import annotations

import os
import zipfile
from pathlib import Path

import numpy as np

from ergodex.exceptions import DataError, ErgodexError, one_line
from ergodex.readers.shared import (
    DT_HINTS,
    _check_dt_argument,
    _check_file,
    _check_min_samples,
    _DtMismatch,
    _finish,
    _Run,
)
from ergodex.series import Series, check_name


def _npz_strings(data, key: str, expected: int | None, source: str) -> list[str] | None:
    if key not in data:
        return None
    arr = data[key]
    if arr.dtype.kind not in "US" or arr.ndim != 1:
        raise DataError(
            f"{source}: '{key}' must be a 1-D array of strings, got dtype {arr.dtype} "
            f"shape {arr.shape}"
        )
    out = [x.decode("utf-8", "replace") if isinstance(x, bytes) else str(x) for x in arr.tolist()]
    if expected is not None and len(out) != expected:
        raise DataError(f"{source}: '{key}' has {len(out)} entries, expected {expected}")
    return out


def _check_npz_size(path: Path) -> None:
    """Refuse an archive whose members unpack to more than the file size limit (a zip bomb)."""
    from ergodex.limits import FILE_SIZE_ENV, file_size_limit, format_bytes

    try:
        with zipfile.ZipFile(path) as archive:
            total = sum(info.file_size for info in archive.infolist())
    except (zipfile.BadZipFile, OSError, ValueError, EOFError):
        return  # np.load words the error (a single .npy, a corrupt file)
    limit = file_size_limit()
    if total > limit:
        raise DataError(
            f"{path}: unpacks to {format_bytes(total)}, over the limit of "
            f"{format_bytes(limit)}; raise it with {FILE_SIZE_ENV}"
        )


def read_npz(
    path: str | os.PathLike,
    *,
    dt: float | None = None,
    split_at_gaps: bool = False,
    min_samples: int = 2,
) -> Series:
    """Read an NPZ archive (see the module docstring for the keys).

    Parameters
    ----------
    path : path-like
    dt : float, optional
        Required when the archive has no ``dt``; must agree with it otherwise.
    split_at_gaps, min_samples
        As in :func:`read_csv`.
    """
    path = Path(path)
    source = str(path)
    dt_arg = _check_dt_argument(dt, source)
    min_samples = _check_min_samples(min_samples)
    _check_file(path, "an NPZ file")
    _check_npz_size(path)
    try:
        with np.load(path, allow_pickle=False) as archive:
            if not isinstance(archive, np.lib.npyio.NpzFile):
                raise DataError(f"{source}: is a single .npy array, expected an NPZ archive")
            data = {k: archive[k] for k in archive.files}
    except ErgodexError:
        raise
    except (OSError, ValueError, EOFError, zipfile.BadZipFile, KeyError, RuntimeError) as exc:
        raise DataError(f"{source}: cannot be read as an NPZ archive ({one_line(exc)})") from None
    except Exception as exc:  # noqa: BLE001 - zlib.error and friends from a corrupt archive
        raise DataError(f"{source}: cannot be read as an NPZ archive ({one_line(exc)})") from None

    for key, item in data.items():
        if not isinstance(item, np.ndarray):
            raise DataError(f"{source}: member {key!r} of the archive is not a NumPy array")
    if "values" not in data:
        raise DataError(
            f"{source}: no 'values' array; the archive holds {sorted(data) or 'nothing'}"
        )
    values = data["values"]
    if values.dtype.kind not in "biuf":
        raise DataError(f"{source}: 'values' must be numeric, got dtype {values.dtype}")
    names = _npz_strings(data, "names", None, source)
    if names is None:
        raise DataError(f"{source}: no 'names' array (one name per variable)")
    if dt_arg is None:
        if "dt" not in data:
            raise DataError(
                f"{source}: no 'dt' in the archive and none given; give the sampling interval",
                **DT_HINTS,
            )
        dt_arr = data["dt"]
        if dt_arr.dtype.kind not in "iuf" or dt_arr.size != 1:
            raise DataError(f"{source}: 'dt' must be one number, got {dt_arr!r}")
        dt_val = float(dt_arr.reshape(()))
        _check_dt_argument(dt_val, source)
    else:
        dt_val = dt_arg
        if "dt" in data and data["dt"].size == 1 and data["dt"].dtype.kind in "iuf":
            stored = float(data["dt"].reshape(()))
            if stored != dt_arg:
                raise _DtMismatch(
                    f"{source}: dt={dt_arg!r} was given but the archive has dt={stored!r}",
                    own=stored,
                )

    if values.ndim == 3:
        arrays = [values[i] for i in range(values.shape[0])]
        if "lengths" in data:
            raise DataError(f"{source}: 'lengths' goes with 2-D stacked 'values', not 3-D")
    elif values.ndim == 2:
        if "lengths" in data:
            lengths = data["lengths"]
            if lengths.dtype.kind not in "iu" or lengths.ndim != 1 or lengths.size == 0:
                raise DataError(f"{source}: 'lengths' must be a 1-D array of integers")
            if (lengths <= 0).any() or int(lengths.sum()) != values.shape[0]:
                raise DataError(
                    f"{source}: 'lengths' {lengths.tolist()} must be positive and add up to the "
                    f"{values.shape[0]} rows of 'values'"
                )
            cuts = np.cumsum(lengths)[:-1]
            arrays = np.split(values, cuts)
        else:
            arrays = [values]
    else:
        raise DataError(
            f"{source}: 'values' has shape {values.shape}; expected 2-D (n_samples, "
            "n_variables) or 3-D (n_runs, n_samples, n_variables)"
        )
    n_var = values.shape[-1]
    if len(names) != n_var:
        raise DataError(
            f"{source}: 'names' has {len(names)} entries but 'values' has {n_var} columns"
        )
    units = _npz_strings(data, "units", n_var, source)
    time_unit = None
    if "time_unit" in data:
        raw = np.asarray(data["time_unit"])
        if raw.ndim != 0 or raw.dtype.kind != "U":
            raise DataError(
                f"{source}: 'time_unit' must be one string such as 'hours', got an "
                f"array of shape {raw.shape} and dtype {raw.dtype}"
            )
        time_unit = str(raw[()])
    labels = _npz_strings(data, "run_labels", len(arrays), source)
    if labels is None:
        labels = [f"{path.stem}" if len(arrays) == 1 else str(i) for i in range(len(arrays))]
    if len(set(labels)) != len(labels):
        raise DataError(f"{source}: 'run_labels' must be unique, got {labels}")
    for k, name in enumerate(names):
        check_name(name, what=f"'names' entry {k}", source=source)
    if any(a.shape[0] == 0 for a in arrays):
        raise DataError(f"{source}: a run has no samples (shape {values.shape})")
    runs = [
        _Run(
            values=np.asarray(a, dtype=np.float64),
            label=lab,
            # mypy cannot infer the type of a lambda whose extra parameter has a default
            where=lambda r, i=i: f"run {i}, row {r + 1}",  # type: ignore[misc]
        )
        for i, (a, lab) in enumerate(zip(arrays, labels))
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
