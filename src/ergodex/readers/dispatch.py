"""Choose the reader by the path: :func:`read_series` and the :data:`READERS` table."""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

from ergodex.exceptions import DataError
from ergodex.readers.dataset_folder import _MANIFEST, read_dataset
from ergodex.readers.formats import _FILE_READERS, _reader_kwargs
from ergodex.readers.shared import DEFAULT_TIME_TOLERANCE
from ergodex.series import Series

#: Extension (or kind) -> reader; ``"folder"`` is a dataset folder or its ``dataset.toml``.
READERS: dict[str, Callable[..., Any]] = {
    **_FILE_READERS,
    ".toml": read_dataset,
    "folder": read_dataset,
}


def read_series(
    path: str | os.PathLike,
    *,
    dt: float | None = None,
    split_at_gaps: bool = False,
    min_samples: int = 2,
    time_tolerance: float = DEFAULT_TIME_TOLERANCE,
) -> Series:
    """Read any supported file or dataset folder into a Series, choosing the reader by the path.

    Parameters
    ----------
    path : path-like
        ``.csv``, ``.npz``, ``.nc`` file, a folder holding ``dataset.toml``, or that manifest.
    dt : float, optional
        Sampling interval when the file does not carry one (not allowed for a dataset, whose
        manifest states it).
    split_at_gaps : bool, default False
        Split runs at rows with missing or non-finite values instead of refusing them.
    min_samples : int, default 2
        Shortest run (or piece between gaps) accepted.
    time_tolerance : float, default 1e-3
        Allowed relative deviation of time steps from ``dt``.

    Returns
    -------
    Series

    Raises
    ------
    DataError
        For an unknown extension (listing the known ones) and for every problem in the data.
    """
    p = Path(path)
    ext = p.suffix.lower()
    if p.is_dir() or ext == ".toml":
        if p.is_dir() and not (p / _MANIFEST).exists():
            raise DataError(f"{p}: is a folder without a {_MANIFEST}; cannot read it as a dataset")
        if dt is not None:
            raise DataError(
                f"{p}: dt comes from {_MANIFEST}; do not give the sampling interval for a dataset",
                python_hint="(drop dt=)",
                cli_hint="(drop --dt)",
            )
        return read_dataset(
            p, split_at_gaps=split_at_gaps, min_samples=min_samples, time_tolerance=time_tolerance
        ).series
    if ext not in _FILE_READERS:
        raise DataError(
            f"{p}: unknown file type {ext or '(no extension)'!r}; known: "
            f"{', '.join(sorted(_FILE_READERS))}, a folder with {_MANIFEST}, or {_MANIFEST} itself"
        )
    return _FILE_READERS[ext](
        p, dt=dt, **_reader_kwargs(ext, split_at_gaps, min_samples, time_tolerance)
    )
