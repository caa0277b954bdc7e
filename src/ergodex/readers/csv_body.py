"""Parse the body of a CSV file: row by row in Python, or with a compiled byte scanner.

The Python parser reports the first bad cell exactly; the scanner (numba, compiled once and cached
on disk) reads large numeric bodies and hands back ``None`` whenever the Python parser should have
the last word (text in a numeric cell, a ragged row), so both give the same values and messages.
"""

from __future__ import annotations

import re
from typing import Any

import numpy as np

from ergodex.exceptions import DataError

_NUMBER = re.compile(
    r"[+-]?(?:(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?|nan|inf|infinity)", re.IGNORECASE
)


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
