"""What every reader shares: dt and sample-count checks, the time-column rules, gap handling.

:func:`_finish` turns the runs a reader found into a :class:`~ergodex.series.Series` (splitting at
gaps or refusing them, checking lengths); :func:`_check_time` takes ``dt`` from a time column (the
CSV and NetCDF readers and :mod:`ergodex.frames` use the same rules and messages).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ergodex.exceptions import DataError
from ergodex.limits import check_regular_file
from ergodex.series import Series

#: Allowed deviation of each time step from ``dt``, relative to ``dt``. Times written with six
#: decimals at dt = 0.01 are off by up to 1e-6 per step (1e-4 relative); a real jitter of 0.1 %
#: changes long-run statistics far less than their sampling noise.
DEFAULT_TIME_TOLERANCE = 1e-3

#: ``dt`` taken from a time column is rounded to this many significant digits, so that times
#: written in decimal give back the ``dt`` they were written with (e.g. 0.01, not
#: 0.010000000000000002) and the fingerprint agrees with the same data read from NPZ.
DT_SIGNIFICANT_DIGITS = 12

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


def _check_file(path: Path, expected: str) -> None:
    """Refuse a folder, a missing path, a device/pipe (even through a symlink) or a file over the
    size limit (:func:`ergodex.limits.file_size_limit`) before a reader library gets to word the
    error or to read forever."""
    check_regular_file(path, expected)


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
