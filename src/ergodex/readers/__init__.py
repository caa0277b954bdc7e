"""Read time series files into a validated :class:`~ergodex.series.Series` (one module per format).

Split out of a single module; this first step keeps everything in :mod:`.csv_reader`.
"""

from ergodex.readers.csv_reader import (
    DEFAULT_TIME_TOLERANCE,
    READERS,
    Dataset,
    member_dimension,
    read_csv,
    read_dataset,
    read_netcdf,
    read_npz,
    read_series,
)

__all__ = [
    "DEFAULT_TIME_TOLERANCE",
    "READERS",
    "Dataset",
    "read_series",
    "read_csv",
    "read_npz",
    "read_netcdf",
    "read_dataset",
    "member_dimension",
]
