"""Read time series files into a validated :class:`~ergodex.series.Series`.

:func:`read_series` chooses the reader by the path: ``.csv`` (:func:`read_csv`), ``.npz``
(:func:`read_npz`), ``.nc`` (:func:`read_netcdf`, needs the ``netcdf`` extra), or a folder holding
a ``dataset.toml`` manifest / the manifest itself (:func:`read_dataset`).

Readers validate and never guess silently. Every problem raises :class:`DataError` with one line
naming the file, the line (1-based, as an editor shows it) or run and row, the column and the
value found, and what to do. A reader returns a whole Series or nothing.

CSV layout
----------
A header row of column names; an optional ``time`` column (strictly increasing, uniform within
``time_tolerance`` of the step; ``dt`` is taken from it); an optional ``run`` column whose value
changes between trajectories (rows of one run are contiguous); every other column is a state
variable named by its header (``time`` and ``run`` are recognised in any letter case). Run labels
are the ``run`` cells' text as written. Cells are plain decimal numbers (``1.5``, ``-2e-3``,
``nan``); an empty cell is a missing value. Column names may be enclosed in double quotes; cells
may not. Values are the correctly rounded float64 of the decimal text (as Python's ``float``).

NPZ layout
----------
``values``: float array, 2-D (n_samples, n_variables) for one run or 3-D
(n_runs, n_samples, n_variables); or 2-D stacked runs with ``lengths`` (1-D int, one per run);
``names``: 1-D string array; ``dt``: scalar (or pass ``dt=``); optional ``units`` and
``run_labels`` (1-D string arrays) and ``time_unit`` (one string, the unit of ``dt``). Loaded
with ``allow_pickle=False``.

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

Dataset folder
--------------
A folder with ``dataset.toml``: ``name``, ``variables``, ``dt``, ``files`` (relative paths inside
the folder, any of the formats above), optional ``units``, ``description``, ``holdout`` (run
labels kept for validation) and a free-form ``[provenance]`` table.
"""

from __future__ import annotations

import math
import os
import re
import tomllib
import zipfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast

import numpy as np

from ergodex.exceptions import DataError, ErgodexError, require
from ergodex.limits import (
    MAX_NESTING,
    MAX_TEXT_FILE_SIZE,
    check_regular_file,
    nesting_depth,
)
from ergodex.series import Series, check_name, split_runs

__all__ = [
    "DEFAULT_TIME_TOLERANCE",
    "READERS",
    "Dataset",
    "read_series",
    "read_csv",
    "read_npz",
    "read_netcdf",
    "read_dataset",
]

#: Allowed deviation of each time step from ``dt``, relative to ``dt``. Times written with six
#: decimals at dt = 0.01 are off by up to 1e-6 per step (1e-4 relative); a real jitter of 0.1 %
#: changes long-run statistics far less than their sampling noise.
DEFAULT_TIME_TOLERANCE = 1e-3

#: ``dt`` taken from a time column is rounded to this many significant digits, so that times
#: written in decimal give back the ``dt`` they were written with (e.g. 0.01, not
#: 0.010000000000000002) and the fingerprint agrees with the same data read from NPZ.
DT_SIGNIFICANT_DIGITS = 12

_MANIFEST = "dataset.toml"

#: How to ask for a run to be split at a missing value, in Python and on the command line.
GAP_HINTS = {"python_hint": "(read with split_at_gaps=True)", "cli_hint": "(use --split-at-gaps)"}
#: How to give the sampling interval of a file that does not carry one.
DT_HINTS = {"python_hint": "(pass dt=...)", "cli_hint": "(use --dt DT)"}


class _DtMismatch(DataError):
    """A dt given by the caller disagrees with the file's own; ``own`` holds the file's."""

    def __init__(self, message: str, *, own: float) -> None:
        super().__init__(message)
        self.own = own


def _dt_from_steps(first: float, last: float, n_steps: int) -> float:
    dt = (last - first) / n_steps
    return float(f"{dt:.{DT_SIGNIFICANT_DIGITS}g}")


def _check_dt_argument(dt: Any, source: str) -> float | None:
    if dt is None:
        return None
    try:
        value = float(dt)
    except (TypeError, ValueError):
        raise DataError(f"{source}: dt must be a number, got {dt!r}") from None
    if not math.isfinite(value) or value <= 0:
        raise DataError(f"{source}: dt must be a finite number > 0, got {dt!r}")
    return value


def _check_min_samples(min_samples: Any) -> int:
    if (
        isinstance(min_samples, bool)
        or not isinstance(min_samples, (int, np.integer))
        or (min_samples < 1)
    ):
        raise DataError(f"min_samples must be an integer >= 1, got {min_samples!r}")
    return int(min_samples)


# --- shared: runs, gaps, lengths ----------------------------------------------------------------
@dataclass
class _Run:
    """A run's values plus what is needed to name its rows in messages."""

    values: np.ndarray  # (n, n_variables), may hold non-finite values before gap handling
    label: str
    where: Callable[[int], str]  # row index in the run -> "line 17" / "run 'a', row 3"


def _finish(
    runs: list[_Run],
    names: Sequence[str],
    dt: float,
    *,
    source: str,
    split_at_gaps: bool,
    min_samples: int,
    units: Sequence[str] | None = None,
    time_unit: str | None = None,
) -> Series:
    """Gap handling, length checks and Series construction, shared by every reader."""
    out_values: list[np.ndarray] = []
    out_labels: list[str] = []
    for run in runs:
        bad_rows = ~np.isfinite(run.values).all(axis=1)
        if not bad_rows.any():
            pieces = [(0, run.values.shape[0])]
        elif not split_at_gaps:
            r = int(np.flatnonzero(bad_rows)[0])
            c = int(np.flatnonzero(~np.isfinite(run.values[r]))[0])
            raise DataError(
                f"{source}: {run.where(r)}, column {names[c]!r}: value "
                f"{_show(run.values[r, c])} is missing or not finite; fix or remove the row, or "
                "split the run there",
                **GAP_HINTS,
            )
        else:
            # Each maximal block of finite rows becomes a run; gap rows are never interpolated.
            good = np.concatenate([[False], ~bad_rows, [False]])
            edges = np.flatnonzero(np.diff(good.astype(np.int8)))
            pieces = list(zip(edges[0::2].tolist(), edges[1::2].tolist()))
        for k, (a, b) in enumerate(pieces):
            n = b - a
            if n < min_samples:
                span = run.where(a) if n == 1 else f"{run.where(a)} to {run.where(b - 1)}"
                what = "piece between gaps" if len(pieces) > 1 or bad_rows.any() else "run"
                raise DataError(
                    f"{source}: {span}: this {what} has {n} samples, fewer than "
                    f"min_samples={min_samples}; supply longer runs or lower min_samples"
                )
            out_values.append(run.values[a:b])
            out_labels.append(run.label if len(pieces) == 1 else f"{run.label}#{k + 1}")
    if not out_values:
        raise DataError(f"{source}: every row has a missing or non-finite value; no data left")
    return Series.from_arrays(
        out_values,
        names,
        dt,
        units=units,
        run_labels=out_labels,
        source=source,
        time_unit=time_unit,
    )


def _show(value: float) -> str:
    return repr(float(value))


# --- CSV ----------------------------------------------------------------------------------------
_NUMBER = re.compile(
    r"[+-]?(?:(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?|nan|inf|infinity)", re.IGNORECASE
)

#: Bodies smaller than this (4 MB) are parsed in Python; larger ones by the compiled scanner,
#: whose one-off cost (importing numba, loading the cached machine code) pays off on big files
#: only.
_FAST_PARSE_MIN_BYTES = 4 << 20


def _check_file(path: Path, expected: str) -> None:
    """Refuse a folder, a missing path, a device/pipe (even through a symlink) or a file over the
    size limit (:func:`ergodex.limits.file_size_limit`) before a reader library gets to word the
    error or to read forever."""
    check_regular_file(path, expected)


def _read_bytes(path: Path) -> bytes:
    _check_file(path, "a file")
    try:
        return path.read_bytes()
    except FileNotFoundError:
        raise DataError(f"{path}: file not found") from None
    except IsADirectoryError:
        raise DataError(f"{path}: is a folder, expected a file") from None
    except OSError as exc:
        raise DataError(f"{path}: cannot be read ({exc.strerror or exc})") from None


def _decode(raw: bytes, path: Path, line_offset: int = 0) -> str:
    """Decode UTF-8 (a leading BOM is dropped) and normalise line ends to ``\\n``."""
    try:
        text = raw.decode("utf-8-sig" if line_offset == 0 else "utf-8")
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start) + 1 + line_offset
        raise DataError(
            f"{path}: line {line}: byte {raw[exc.start : exc.start + 1]!r} is not UTF-8 text; "
            "save the file as UTF-8 CSV"
        ) from None
    if "\x00" in text:
        line = text.count("\n", 0, text.index("\x00")) + 1 + line_offset
        raise DataError(f"{path}: line {line}: contains a NUL byte; this is not a CSV text file")
    if "\r" in text:
        text = text.replace("\r\n", "\n").replace("\r", "\n")
    return text


def _parse_header(line: str, source: str) -> list[str]:
    names = []
    for k, cell in enumerate(line.split(",")):
        name = cell.strip()
        if len(name) >= 2 and name[0] == '"' and name[-1] == '"':
            name = name[1:-1].strip()
        if not name:
            raise DataError(
                f"{source}: line 1, column {k + 1}: the header cell is empty; "
                "every column needs a name"
            )
        names.append(name)
    seen: dict[str, int] = {}
    for k, name in enumerate(names):
        key = name.lower() if name.lower() in ("time", "run") else name
        if key in seen:
            raise DataError(
                f"{source}: line 1: column name {name!r} appears twice (columns "
                f"{seen[key] + 1} and {k + 1}); names must be unique"
            )
        seen[key] = k
    return names


def _parse_body_slow(
    body: str, n_cols: int, names: list[str], run_col: int | None, source: str
) -> tuple[np.ndarray, list[str] | None]:
    """Parse row by row in Python, reporting the first bad cell exactly.

    Returns the values (run column NaN) and the run column's text per row (or None).
    """
    lines = body.rstrip("\n").split("\n") if body.strip("\n") else []
    if not lines:
        raise DataError(f"{source}: has a header but no data rows")
    values = np.empty((len(lines), n_cols))
    run_values: list[str] | None = [] if run_col is not None else None
    for i, line in enumerate(lines):
        if n_cols > 1 and not line.strip():
            raise DataError(
                f"{source}: line {i + 2}: blank line inside the data; remove it (a missing "
                "sample is a row of empty cells)"
            )
        cells = line.split(",")
        if len(cells) != n_cols:
            lineno = i + 2
            if len(cells) < n_cols:
                missing = ", ".join(repr(n) for n in names[len(cells) :])
                raise DataError(
                    f"{source}: line {lineno}: has {len(cells)} cells, the header has {n_cols}; "
                    f"missing column {missing}"
                )
            raise DataError(
                f"{source}: line {lineno}: has {len(cells)} cells, the header has {n_cols}; "
                f"extra cell {cells[n_cols].strip()!r} after column {names[-1]!r}"
            )
        for c, cell in enumerate(cells):
            token = cell.strip()
            if c == run_col:
                run_values.append(token)  # type: ignore[union-attr]
                values[i, c] = np.nan
            elif token == "":
                values[i, c] = np.nan
            elif _NUMBER.fullmatch(token):
                values[i, c] = float(token)
            else:
                raise DataError(
                    f"{source}: line {i + 2}, column {names[c]!r}: {token!r} is not a number"
                )
    return values, run_values


# Powers of ten exactly representable as float64 (10**22 < 2**53 * 2**22 ... all exact up to 22).
_POW10 = np.array([10.0**k for k in range(23)])
_kernel_cache: list[Any] = []


def _scan_kernel():
    """Compile (once; cached on disk by numba) the byte scanner used for large CSV bodies."""
    if _kernel_cache:
        return _kernel_cache[0]
    import numba

    @numba.njit(cache=True, nogil=True)
    def scan(
        buf,
        end,
        n_cols,
        text_col,
        dest,
        pow10,
        out,
        tout,
        slow_cell,
        slow_start,
        slow_end,
        run_row,
        run_start,
        run_end,
    ):  # pragma: no cover - compiled
        """Parse comma-separated decimal numbers from ``buf[:end]``.

        Returns (status, n_rows, n_slow, n_runs, n_ambiguous). status 0: parsed; 1: a row or cell
        is not plain numeric CSV (the Python parser takes over and reports it); 2: more cells
        than ``slow_cell`` can hold need Python's float().
        A value is computed here when that is provably the correctly rounded double; otherwise
        its cell index and byte span go to the ``slow_*`` arrays for Python's ``float``.
        """
        two53 = np.uint64(9007199254740992)
        split = 134217729.0  # 2**27 + 1, Dekker's splitting constant
        pos = 0
        row = 0
        col = 0
        n_slow = 0
        n_runs = 0
        prev_s = -1
        prev_e = -1
        cap = slow_cell.shape[0]
        n_rows_cap = out.shape[0]
        while pos < end:
            while pos < end and (buf[pos] == 32 or buf[pos] == 9):
                pos += 1
            start = pos
            if row >= n_rows_cap:
                return 1, row, n_slow, n_runs, 0
            if col == text_col:
                while pos < end and buf[pos] != 44 and buf[pos] != 10:
                    pos += 1
                fe = pos
                while fe > start and (buf[fe - 1] == 32 or buf[fe - 1] == 9 or buf[fe - 1] == 13):
                    fe -= 1
                same = prev_s >= 0 and (fe - start) == (prev_e - prev_s)
                if same:
                    for k in range(fe - start):
                        if buf[start + k] != buf[prev_s + k]:
                            same = False
                            break
                if not same:
                    run_row[n_runs] = row
                    run_start[n_runs] = start
                    run_end[n_runs] = fe
                    n_runs += 1
                    prev_s = start
                    prev_e = fe
            else:
                neg = False
                if pos < end and (buf[pos] == 45 or buf[pos] == 43):
                    neg = buf[pos] == 45
                    pos += 1
                m = np.uint64(0)
                nd = 0
                e10 = 0
                dropped = False
                any_digit = False
                while pos < end and 48 <= buf[pos] <= 57:
                    any_digit = True
                    d = buf[pos] - 48
                    if m == 0 and d == 0:
                        pass
                    elif nd < 19:
                        m = m * np.uint64(10) + np.uint64(d)
                        nd += 1
                    else:
                        e10 += 1
                        dropped = True
                    pos += 1
                if pos < end and buf[pos] == 46:
                    pos += 1
                    while pos < end and 48 <= buf[pos] <= 57:
                        any_digit = True
                        d = buf[pos] - 48
                        if m == 0 and d == 0:
                            e10 -= 1
                        elif nd < 19:
                            m = m * np.uint64(10) + np.uint64(d)
                            nd += 1
                            e10 -= 1
                        else:
                            dropped = True
                        pos += 1
                slow = False
                if not any_digit:
                    if pos == start and (
                        pos >= end or buf[pos] == 44 or buf[pos] == 10 or buf[pos] == 13
                    ):
                        dc = dest[col]
                        if dc >= 0:
                            out[row, dc] = np.nan  # empty cell: a missing value
                        elif dc == -1:
                            tout[row] = np.nan  # empty cell: a missing value
                        m = np.uint64(0)
                    else:
                        # nan, inf or text: let Python decide (and report) it
                        while pos < end and buf[pos] != 44 and buf[pos] != 10:
                            pos += 1
                        slow = True
                elif pos < end and (buf[pos] == 101 or buf[pos] == 69):
                    pos += 1
                    eneg = False
                    if pos < end and (buf[pos] == 45 or buf[pos] == 43):
                        eneg = buf[pos] == 45
                        pos += 1
                    if not (pos < end and 48 <= buf[pos] <= 57):
                        return 1, row, n_slow, n_runs, 0
                    ex = 0
                    while pos < end and 48 <= buf[pos] <= 57:
                        if ex < 100000:
                            ex = ex * 10 + (buf[pos] - 48)
                        pos += 1
                    e10 += -ex if eneg else ex
                fe = pos
                while pos < end and (buf[pos] == 32 or buf[pos] == 9 or buf[pos] == 13):
                    pos += 1
                if pos < end and buf[pos] != 44 and buf[pos] != 10:
                    return 1, row, n_slow, n_runs, 0
                if any_digit:
                    if m == 0:
                        v = 0.0
                    elif dropped:
                        slow = True
                        v = 0.0
                    elif m <= two53 and -22 <= e10 <= 22:
                        # Both operands exact: one correctly rounded operation (Clinger 1990).
                        v = float(m) * pow10[e10] if e10 >= 0 else float(m) / pow10[-e10]
                    elif -22 <= e10 < 0:
                        # m > 2**53: m = a + b exactly; m / P = q + (a - qP + b) / P with the
                        # residual a - qP computed exactly (Dekker's product, Sterbenz lemma).
                        hi = (m >> np.uint64(11)) << np.uint64(11)
                        a = float(hi)
                        b = float(m - hi)
                        P = pow10[-e10]
                        q = a / P
                        p = q * P
                        cq = split * q
                        qh = cq - (cq - q)
                        ql = q - qh
                        cp = split * P
                        ph = cp - (cp - P)
                        pl = P - ph
                        pe = ((qh * ph - p) + qh * pl + ql * ph) + ql * pl
                        r = (a - p) - pe
                        dcor = (r + b) / P
                        v = q + dcor
                        # dcor is off from the exact correction by far less than margin (a few
                        # roundings of |dcor| and of the residual, ~2**-52 ulp(q)). Rounding is
                        # monotonic, so if both ends of the interval round to the same double,
                        # so does the exact value; otherwise it is near a midpoint and Python
                        # decides.
                        margin = (abs(dcor) + abs(q) * 2.220446049250313e-16) * 2.8421709e-14
                        if q + (dcor - margin) != q + (dcor + margin):
                            slow = True
                    else:
                        slow = True
                        v = 0.0
                    if not slow:
                        dc = dest[col]
                        if dc >= 0:
                            out[row, dc] = -v if neg else v
                        elif dc == -1:
                            tout[row] = -v if neg else v
                if slow:
                    if n_slow >= cap:
                        return 2, row, n_slow, n_runs, 0
                    slow_cell[n_slow] = row * n_cols + col
                    slow_start[n_slow] = start
                    slow_end[n_slow] = fe
                    n_slow += 1
                    dc = dest[col]
                    if dc >= 0:
                        out[row, dc] = np.nan
                    elif dc == -1:
                        tout[row] = np.nan
            if pos < end and buf[pos] == 44:
                col += 1
                pos += 1
                if col >= n_cols:
                    return 1, row, n_slow, n_runs, 0
                if pos >= end:  # a trailing comma: one more, empty, cell
                    if col != n_cols - 1:
                        return 1, row, n_slow, n_runs, 0
                    dc = dest[col]
                    if dc >= 0:
                        out[row, dc] = np.nan
                    elif dc == -1:
                        tout[row] = np.nan
                    row += 1
                    col = 0
            else:
                if col != n_cols - 1:
                    return 1, row, n_slow, n_runs, 0
                row += 1
                col = 0
                pos += 1
        return 0, row, n_slow, n_runs, 0

    _kernel_cache.append(scan)
    return scan


def _parse_body_fast(
    body: bytes | memoryview,
    n_cols: int,
    var_cols: list[int],
    time_col: int | None,
    run_col: int | None,
) -> tuple[np.ndarray, np.ndarray | None, list[tuple[int, str]]] | None:
    """Parse a large numeric CSV body with the compiled scanner; None means "use Python".

    Returns the state-variable values (n_rows, len(var_cols)), the time column (or None) and,
    with a run column, the (first row, label) of each block of equal labels.
    """
    buf = np.frombuffer(body, dtype=np.uint8)
    end = buf.size
    while end > 0 and buf[end - 1] in (10, 13):
        end -= 1
    if end == 0:
        return None
    n_rows = int(np.count_nonzero(buf[:end] == 10)) + 1
    dest = np.full(n_cols, -2, dtype=np.int64)
    for j, c in enumerate(var_cols):
        dest[c] = j
    if time_col is not None:
        dest[time_col] = -1
    try:
        scan = _scan_kernel()
    except ImportError:  # pragma: no cover - numba is a dependency; Python still reads the file
        return None
    out = np.empty((n_rows, len(var_cols)))
    tout = np.empty(n_rows if time_col is not None else 0)
    text_col = -1 if run_col is None else run_col
    run_row = np.empty(n_rows if run_col is not None else 0, dtype=np.int64)
    run_start = np.empty_like(run_row)
    run_end = np.empty_like(run_row)
    for cap in (1 << 16, n_rows * n_cols):
        slow_cell = np.empty(cap, dtype=np.int64)
        slow_start = np.empty(cap, dtype=np.int64)
        slow_end = np.empty(cap, dtype=np.int64)
        status, rows, n_slow, n_runs, _ = scan(
            buf,
            end,
            n_cols,
            text_col,
            dest,
            _POW10,
            out,
            tout,
            slow_cell,
            slow_start,
            slow_end,
            run_row,
            run_start,
            run_end,
        )
        if status != 2:
            break
    if status != 0 or rows != n_rows:
        return None
    for k in range(n_slow):
        token = bytes(body[slow_start[k] : slow_end[k]]).decode("ascii", "replace").strip()
        if not _NUMBER.fullmatch(token):
            return None  # text in a numeric cell: the Python parser reports it
        row, col = divmod(int(slow_cell[k]), n_cols)
        if dest[col] >= 0:
            out[row, dest[col]] = float(token)
        elif dest[col] == -1:
            tout[row] = float(token)
    blocks: list[tuple[int, str]] = []
    for k in range(n_runs):
        try:
            label = bytes(body[run_start[k] : run_end[k]]).decode("utf-8")
        except UnicodeDecodeError:
            return None
        blocks.append((int(run_row[k]), label))
    return out, (tout if time_col is not None else None), blocks


def _blocks_from_labels(run_values: list[str]) -> list[tuple[int, str]]:
    blocks: list[tuple[int, str]] = []
    for i, label in enumerate(run_values):
        if not blocks or blocks[-1][1] != label:
            blocks.append((i, label))
    return blocks


def read_csv(
    path: str | os.PathLike,
    *,
    dt: float | None = None,
    split_at_gaps: bool = False,
    min_samples: int = 2,
    time_tolerance: float = DEFAULT_TIME_TOLERANCE,
) -> Series:
    """Read a CSV file (see the module docstring for the layout).

    Parameters
    ----------
    path : path-like
    dt : float, optional
        Sampling interval; required without a ``time`` column, checked against it with one.
    split_at_gaps : bool, default False
        Split a run at every row holding a missing or non-finite value instead of refusing it.
        Gap rows are dropped, never interpolated; the pieces of run ``r`` are labelled ``r#1``,
        ``r#2``, ...
    min_samples : int, default 2
        Shortest run (or piece between gaps) accepted.
    time_tolerance : float, default 1e-3
        Largest allowed ``|step - typical step| / typical step`` of the time column.

    Returns
    -------
    Series

    Raises
    ------
    DataError
        Naming the file, line, column and value.

    Notes
    -----
    Numbers are converted to the correctly rounded float64 (as Python's ``float`` does), so a
    file written with :func:`ergodex.writers.write_csv` reads back bit for bit. Large files go
    through a compiled scanner that computes a value itself only when exactness is guaranteed
    (Clinger's fast path, or an exact residual with a rounding-midpoint check) and hands the
    rest to ``float``.

    References
    ----------
    .. [1] W. D. Clinger, "How to read floating point numbers accurately", Proc. ACM SIGPLAN
       PLDI (1990), 92-101.
    .. [2] T. J. Dekker, "A floating-point technique for extending the available precision",
       Numer. Math. 18, 224-242 (1971).
    """
    path = Path(path)
    source = str(path)
    dt_arg = _check_dt_argument(dt, source)
    min_samples = _check_min_samples(min_samples)
    raw = _read_bytes(path)
    # The header ends at the first line break: \n, \r\n or a lone \r.
    ends = [i for i in (raw.find(b"\n"), raw.find(b"\r")) if i >= 0]
    header_end = min(ends) if ends else -1
    body_start = header_end + (2 if raw[header_end : header_end + 2] == b"\r\n" else 1)
    header = _decode(raw if header_end < 0 else raw[:header_end], path)
    if not header.strip():
        raise DataError(
            f"{source}: line 1: the file is empty or starts with a blank line; "
            "expected a header row of column names"
        )
    names = _parse_header(header.rstrip("\n"), source)
    body_view = memoryview(raw)[body_start:] if header_end >= 0 else memoryview(b"")
    lower = [n.lower() for n in names]
    time_col = lower.index("time") if "time" in lower else None
    run_col = lower.index("run") if "run" in lower else None
    var_cols = [k for k in range(len(names)) if k not in (time_col, run_col)]
    if not var_cols:
        raise DataError(f"{source}: line 1: no state-variable columns (only time/run)")
    var_names = [names[k] for k in var_cols]
    for k in var_cols:
        check_name(names[k], what=f"line 1: column {k + 1} name", source=source)

    parsed = None
    if len(body_view) >= _FAST_PARSE_MIN_BYTES:
        parsed = _parse_body_fast(body_view, len(names), var_cols, time_col, run_col)
    if parsed is None:
        body = _decode(bytes(body_view), path, line_offset=1)
        values, run_values = _parse_body_slow(body, len(names), names, run_col, source)
        blocks = _blocks_from_labels(run_values) if run_values is not None else [(0, None)]
        times = values[:, time_col] if time_col is not None else None
        values = values[:, var_cols]  # a new C-ordered array
    else:
        values, times, blocks = parsed
        if run_col is None:
            blocks = [(0, None)]
    n_rows = values.shape[0]
    values.setflags(write=False)  # so Series takes slices of it without another copy

    # Runs: maximal blocks of equal run labels; a label may not come back later.
    bounds = []
    seen: dict[str, int] = {}
    for k, (start, label) in enumerate(blocks):
        stop = blocks[k + 1][0] if k + 1 < len(blocks) else n_rows
        if label is not None:
            assert run_col is not None  # labelled blocks come only from a run column
            if label == "":
                raise DataError(
                    f"{source}: line {start + 2}, column {names[run_col]!r}: the run label is empty"
                )
            if label in seen:
                raise DataError(
                    f"{source}: line {start + 2}, column {names[run_col]!r}: run {label!r} "
                    f"appears again after other runs (first at line {seen[label] + 2}); "
                    "rows of one run must be contiguous"
                )
            seen[label] = start
        bounds.append((start, stop, label))

    dt_final = _check_time(
        times,
        bounds,
        names[time_col] if time_col is not None else "time",
        dt_arg,
        time_tolerance,
        source,
        lambda i: f"line {i + 2}",
    )

    if not split_at_gaps:
        bad = ~np.isfinite(values)
        if bad.any():
            r, c = (int(i) for i in np.argwhere(bad)[0])
            file_col = var_cols[c]
            body_text = _decode(bytes(body_view), path, line_offset=1)
            parts = body_text.split("\n", r + 1)
            cells = parts[r].split(",") if r < len(parts) else []
            text = cells[file_col].strip() if file_col < len(cells) else ""
            found = "is empty (a missing value)" if text == "" else f"{text!r} is not finite"
            raise DataError(
                f"{source}: line {r + 2}, column {var_names[c]!r}: the cell {found}; fix or "
                "remove the row, or split the run there",
                **GAP_HINTS,
            )

    runs = []
    for a, b, label in bounds:
        runs.append(
            _Run(
                values=values[a:b],
                label=label if label is not None else path.stem,
                # mypy cannot infer the type of a lambda whose extra parameter has a default
                where=lambda r, a=a: f"line {a + r + 2}",  # type: ignore[misc]
            )
        )
    return _finish(
        runs,
        var_names,
        dt_final,
        source=source,
        split_at_gaps=split_at_gaps,
        min_samples=min_samples,
    )


def _check_time(t, bounds, tname, dt_arg, tol, source, where) -> float:
    """dt from a time column (strictly increasing, uniform within ``tol``), or ``dt_arg``.

    ``t`` is the time of every row (or None), ``bounds`` the (start, stop, label) rows of each
    run, ``where(i)`` names row ``i`` in messages.
    """
    if not (isinstance(tol, (int, float)) and math.isfinite(tol) and 0 <= tol < 1):
        raise DataError(f"time_tolerance must be a number in [0, 1), got {tol!r}")
    if t is None:
        if dt_arg is None:
            raise DataError(
                f"{source}: there is no 'time' column and no dt was given; add a time column "
                "or give the sampling interval",
                **DT_HINTS,
            )
        return dt_arg
    bad = np.flatnonzero(~np.isfinite(t))
    if bad.size:
        i = int(bad[0])
        raise DataError(
            f"{source}: {where(i)}, column {tname!r}: time {_show(t[i])} is missing or not "
            "finite; every row needs a time"
        )
    # The steps of each run with at least two rows, computed once: (first row, steps).
    run_steps = [(a, np.diff(t[a:b])) for a, b, _ in bounds if b - a >= 2]
    for a, d in run_steps:
        nonpos = np.flatnonzero(d <= 0)
        if nonpos.size:
            i = a + int(nonpos[0]) + 1
            raise DataError(
                f"{source}: {where(i)}, column {tname!r}: time {_show(t[i])} does not "
                f"increase (previous {_show(t[i - 1])}); times must increase strictly"
            )
    if not run_steps:
        if dt_arg is None:
            raise DataError(
                f"{source}: every run has a single row, so the time column gives no dt; give "
                "the sampling interval",
                **DT_HINTS,
            )
        return dt_arg
    steps_total = sum(d.size for _, d in run_steps)
    span_total = sum(float(t[a + d.size] - t[a]) for a, d in run_steps)
    # The median step is the reference: one odd step is then reported as the odd one.
    typical = float(np.median(np.concatenate([d for _, d in run_steps])))
    for a, d in run_steps:
        off = np.flatnonzero(np.abs(d - typical) > tol * typical)
        if off.size:
            i = a + int(off[0]) + 1
            raise DataError(
                f"{source}: {where(i)}, column {tname!r}: step {_show(d[off[0]])} from "
                f"time {_show(t[i - 1])} to {_show(t[i])} differs from the typical step "
                f"{typical!r} by more than the tolerance ({tol:g} of the step); sampling "
                "must be uniform (resample the data, or split it into runs)"
            )
    dt_time = _dt_from_steps(0.0, span_total, steps_total)
    if dt_arg is not None and abs(dt_arg - dt_time) > tol * dt_time:
        raise _DtMismatch(
            f"{source}: dt={dt_arg!r} was given but the time column has dt={dt_time!r}",
            own=dt_time,
        )
    return dt_time


# --- NPZ ----------------------------------------------------------------------------------------
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
        raise DataError(f"{source}: cannot be read as an NPZ archive ({_one_line(exc)})") from None
    except Exception as exc:  # noqa: BLE001 - zlib.error and friends from a corrupt archive
        raise DataError(f"{source}: cannot be read as an NPZ archive ({_one_line(exc)})") from None

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


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split()) or type(exc).__name__


# --- NetCDF -------------------------------------------------------------------------------------
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
        raise DataError(f"{source}: cannot be read as NetCDF ({_one_line(exc)})") from None

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


# --- dataset folder -----------------------------------------------------------------------------
_MANIFEST_KEYS = {
    "name",
    "description",
    "variables",
    "units",
    "dt",
    "files",
    "holdout",
    "provenance",
}


@dataclass(frozen=True)
class Dataset:
    """A dataset folder: its Series plus what the manifest says about it.

    Attributes
    ----------
    series : Series
        All runs of all files, in the order of ``files``.
    name : str
    description : str
    holdout : tuple of str
        Labels of the runs kept for validation.
    manifest_path : Path
    provenance : dict
    """

    series: Series
    name: str
    description: str = ""
    holdout: tuple[str, ...] = ()
    manifest_path: Path | None = None
    provenance: dict = field(default_factory=dict)

    def split(self) -> tuple[Series, Series]:
        """``(fit, check)``: the runs not held out, and the held-out runs."""
        if not self.holdout:
            raise DataError(f"{self.manifest_path}: the manifest names no held-out runs")
        return split_runs(self.series, list(self.holdout))


def _manifest_error(path: Path, msg: str) -> DataError:
    return DataError(f"{path}: {msg}")


def _string_list(value: Any, key: str, path: Path) -> list[str]:
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        raise _manifest_error(path, f"'{key}' must be a list of strings, got {value!r}")
    return list(value)


def read_dataset(
    path: str | os.PathLike,
    *,
    split_at_gaps: bool = False,
    min_samples: int = 2,
    time_tolerance: float = DEFAULT_TIME_TOLERANCE,
) -> Dataset:
    """Read a dataset folder (or its ``dataset.toml``) into a :class:`Dataset`.

    Every file listed is read with the manifest's ``dt``; a file whose own time column gives a
    different ``dt`` is refused (mixed dt), as is a file whose variables differ from the
    manifest's. Columns are put in the manifest's order. Run labels are the file's stem for a
    single-run file, ``"<stem>/<label>"`` for each run of a multi-run file.
    """
    path = Path(path)
    manifest = path / _MANIFEST if path.is_dir() else path
    folder = manifest.parent
    if not os.path.lexists(manifest):
        raise DataError(f"{manifest}: not found; a dataset folder needs a {_MANIFEST}")
    check_regular_file(manifest, "a dataset manifest", max_bytes=MAX_TEXT_FILE_SIZE)
    try:
        raw = manifest.read_bytes()
    except FileNotFoundError:
        raise DataError(f"{manifest}: not found; a dataset folder needs a {_MANIFEST}") from None
    except OSError as exc:
        raise DataError(f"{manifest}: cannot be read ({exc.strerror or exc})") from None
    try:
        doc = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise _manifest_error(manifest, "is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise _manifest_error(manifest, f"is not valid TOML ({_one_line(exc)})") from None
    except RecursionError:
        raise _manifest_error(manifest, "nests arrays or tables too deeply") from None
    if nesting_depth(doc) > MAX_NESTING:
        raise _manifest_error(manifest, "nests arrays or tables too deeply")
    unknown = sorted(set(doc) - _MANIFEST_KEYS)
    if unknown:
        raise _manifest_error(
            manifest,
            f"unknown key(s) {', '.join(unknown)}; allowed: {', '.join(sorted(_MANIFEST_KEYS))}",
        )
    for key in ("name", "variables", "dt", "files"):
        if key not in doc:
            raise _manifest_error(manifest, f"missing required key '{key}'")
    name = doc["name"]
    if not isinstance(name, str) or not name.strip():
        raise _manifest_error(manifest, f"'name' must be a non-empty string, got {name!r}")
    description = doc.get("description", "")
    if not isinstance(description, str):
        raise _manifest_error(manifest, "'description' must be a string")
    variables = _string_list(doc["variables"], "variables", manifest)
    if not variables:
        raise _manifest_error(manifest, "'variables' is empty")
    for k, v in enumerate(variables):
        check_name(v, what=f"'variables' entry {k + 1}", source=str(manifest))
    if len(set(variables)) != len(variables):
        raise _manifest_error(manifest, f"'variables' has duplicates: {variables}")
    units = None
    if "units" in doc:
        units = _string_list(doc["units"], "units", manifest)
        if len(units) != len(variables):
            raise _manifest_error(
                manifest, f"'units' has {len(units)} entries, 'variables' has {len(variables)}"
            )
    dt = doc["dt"]
    if isinstance(dt, bool) or not isinstance(dt, (int, float)) or not math.isfinite(dt) or dt <= 0:
        raise _manifest_error(manifest, f"'dt' must be a number > 0, got {dt!r}")
    dt = float(dt)
    files = _string_list(doc["files"], "files", manifest)
    if not files:
        raise _manifest_error(manifest, "'files' is empty")
    holdout = _string_list(doc.get("holdout", []), "holdout", manifest)
    provenance = doc.get("provenance", {})
    if not isinstance(provenance, dict):
        raise _manifest_error(manifest, "'provenance' must be a table")

    root = folder.resolve()
    run_arrays: list[np.ndarray] = []
    labels: list[str] = []
    time_units: set[str | None] = set()
    for entry in files:
        rel = Path(entry)
        if rel.is_absolute() or ".." in rel.parts or entry.strip() == "":
            raise _manifest_error(
                manifest, f"file {entry!r} must be a relative path inside the dataset folder"
            )
        target = folder / rel
        try:
            target.resolve().relative_to(root)
        except ValueError:
            raise _manifest_error(
                manifest, f"file {entry!r} points outside the dataset folder"
            ) from None
        ext = target.suffix.lower()
        if ext not in _FILE_READERS:
            raise _manifest_error(
                manifest,
                f"file {entry!r} has extension {ext or '(none)'!r}; known: "
                f"{', '.join(sorted(_FILE_READERS))}",
            )
        kwargs = _reader_kwargs(ext, split_at_gaps, min_samples, time_tolerance)
        part = _read_with_dt(_FILE_READERS[ext], target, dt, kwargs, manifest)
        if set(part.names) != set(variables):
            missing = [v for v in variables if v not in part.names]
            extra = [v for v in part.names if v not in variables]
            raise DataError(
                f"{target}: variables differ from {manifest.name}"
                + (f"; missing {missing}" if missing else "")
                + (f"; not in the manifest {extra}" if extra else "")
            )
        order = [part.names.index(v) for v in variables]
        time_units.add(part.time_unit)
        stem = rel.with_suffix("").as_posix()
        for r, arr in enumerate(part.runs):
            run_arrays.append(arr[:, order])
            # the readers label every run of a file that holds several
            labels.append(stem if part.n_runs == 1 else f"{stem}/{cast(tuple, part.run_labels)[r]}")
    if len(set(labels)) != len(labels):
        raise _manifest_error(manifest, f"run labels collide across files: {labels}")
    unknown_holdout = [h for h in holdout if h not in labels]
    if unknown_holdout:
        raise _manifest_error(
            manifest,
            f"held-out run(s) {unknown_holdout} not found; the runs are {', '.join(labels)}",
        )
    # the files' time unit, when every file names the same one (the manifest's dt has none)
    time_unit = next(iter(time_units)) if len(time_units) == 1 else None
    series = Series.from_arrays(
        run_arrays,
        variables,
        dt,
        units=units,
        run_labels=labels,
        source=str(folder),
        time_unit=time_unit,
    )
    return Dataset(
        series=series,
        name=name,
        description=description,
        holdout=tuple(holdout),
        manifest_path=manifest,
        provenance=provenance,
    )


def _reader_kwargs(
    ext: str, split_at_gaps: bool, min_samples: int, time_tolerance: float
) -> dict[str, Any]:
    """Keyword arguments for the reader of ``ext`` (NPZ has no time column, so no tolerance)."""
    kwargs: dict[str, Any] = {"split_at_gaps": split_at_gaps, "min_samples": min_samples}
    if ext in (".csv", ".nc"):
        kwargs["time_tolerance"] = time_tolerance
    return kwargs


def _read_with_dt(reader, target: Path, dt: float, kwargs: dict, manifest: Path) -> Series:
    """Read one listed file with the manifest's dt; a different own dt is a mixed-dt error."""
    try:
        return reader(target, dt=dt, **kwargs)
    except _DtMismatch as exc:
        raise DataError(
            f"{target}: mixed dt: {manifest.name} says dt={dt!r} but the file has "
            f"dt={exc.own!r}; all files of a dataset must share one dt"
        ) from None


# --- dispatch -----------------------------------------------------------------------------------
_FILE_READERS: dict[str, Callable[..., Series]] = {
    ".csv": read_csv,
    ".npz": read_npz,
    ".nc": read_netcdf,
}

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
