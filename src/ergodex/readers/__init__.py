"""Read time series files into a validated :class:`~ergodex.series.Series`.

:func:`read_series` chooses the reader by the path: ``.csv`` (:func:`read_csv`), ``.npz``
(:func:`read_npz`), ``.nc`` (:func:`read_netcdf`, needs the ``netcdf`` extra), or a folder holding
a ``dataset.toml`` manifest / the manifest itself (:func:`read_dataset`).

Readers validate and never guess silently. Every problem raises :class:`DataError` with one line
naming the file, the line (1-based, as an editor shows it) or run and row, the column and the
value found, and what to do. A reader returns a whole Series or nothing.

One module per format: :mod:`.csv_reader` (with :mod:`.csv_body`, the Python and compiled body
parsers), :mod:`.npz_reader`, :mod:`.netcdf_reader`, :mod:`.dataset_folder`; :mod:`.shared` holds
what they share (time-column rules, gap handling, length checks), :mod:`.formats` the readers by
extension and :mod:`.dispatch` :func:`read_series`. The layouts are in each format's module.
"""

from ergodex.readers.csv_reader import read_csv
from ergodex.readers.dataset_folder import Dataset, read_dataset
from ergodex.readers.dispatch import READERS, read_series
from ergodex.readers.netcdf_reader import member_dimension, read_netcdf
from ergodex.readers.npz_reader import read_npz
from ergodex.readers.shared import DEFAULT_TIME_TOLERANCE

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
