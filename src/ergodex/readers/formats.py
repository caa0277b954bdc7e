"""The file readers by extension, and the settings each one takes.

Shared by :func:`~ergodex.readers.read_series` and the dataset folder, whose manifest may list any
of these files.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from ergodex.readers.csv_reader import read_csv
from ergodex.readers.netcdf_reader import read_netcdf
from ergodex.readers.npz_reader import read_npz
from ergodex.series import Series

_FILE_READERS: dict[str, Callable[..., Series]] = {
    ".csv": read_csv,
    ".npz": read_npz,
    ".nc": read_netcdf,
}


def _reader_kwargs(
    ext: str, split_at_gaps: bool, min_samples: int, time_tolerance: float
) -> dict[str, Any]:
    """Keyword arguments for the reader of ``ext`` (NPZ has no time column, so no tolerance)."""
    kwargs: dict[str, Any] = {"split_at_gaps": split_at_gaps, "min_samples": min_samples}
    if ext in (".csv", ".nc"):
        kwargs["time_tolerance"] = time_tolerance
    return kwargs
