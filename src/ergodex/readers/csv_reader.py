"""Read a CSV file into a :class:`~ergodex.series.Series` (:func:`read_csv`).

CSV layout
----------
A header row of column names; an optional ``time`` column (strictly increasing, uniform within
``time_tolerance`` of the step; ``dt`` is taken from it); an optional ``run`` column whose value
changes between trajectories (rows of one run are contiguous); every other column is a state
variable named by its header (``time`` and ``run`` are recognised in any letter case). Run labels
are the ``run`` cells' text as written. Cells are plain decimal numbers (``1.5``, ``-2e-3``,
``nan``); an empty cell is a missing value. Column names may be enclosed in double quotes; cells
may not. Values are the correctly rounded float64 of the decimal text (as Python's ``float``).
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from ergodex.exceptions import DataError
from ergodex.readers.csv_body import _blocks_from_labels, _parse_body_fast, _parse_body_slow
from ergodex.readers.shared import (
    DEFAULT_TIME_TOLERANCE,
    GAP_HINTS,
    _check_dt_argument,
    _check_file,
    _check_min_samples,
    _check_time,
    _finish,
    _Run,
)
from ergodex.series import Series, check_name

#: Bodies smaller than this (4 MB) are parsed in Python; larger ones by the compiled scanner,
#: whose one-off cost (importing numba, loading the cached machine code) pays off on big files
#: only.
_FAST_PARSE_MIN_BYTES = 4 << 20


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
