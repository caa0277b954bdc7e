"""The data model: runs of uniformly sampled states with named variables.

A :class:`Series` holds one or more *runs* (separate trajectories of the same system: ensemble
members, separate experiments) of the same state variables, all sampled every ``dt`` time units.
Every Series is valid by construction: values are finite float64, names are unique and usable in
every file format ergodex writes, ``dt`` is positive and no variable is constant. Readers build
Series through :meth:`Series.from_arrays`, so one set of rules (and one wording of the errors)
serves every format.

The module also holds the splits used to keep fitting data and checking data apart:
:func:`split_runs` (held-out runs) and :func:`split_blocks` (contiguous blocks of each run separated
by a gap of several decorrelation times, so that the blocks are close to independent samples).
"""

from __future__ import annotations

import hashlib
import math
import struct
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, cast

import numpy as np

from ergodex.exceptions import DataError

__all__ = [
    "Series",
    "RESERVED_NAMES",
    "FORBIDDEN_NAME_CHARACTERS",
    "check_name",
    "split_runs",
    "cut_blocks",
    "split_blocks",
    "format_dt",
]

#: Column names with a meaning of their own in CSV files; they cannot name a state variable.
RESERVED_NAMES = ("time", "run")

#: Characters a variable name may not contain. They would need quoting in CSV (``,`` ``"``),
#: are path separators or group separators in NetCDF (``/`` ``\``), or are control characters
#: that break one-line error messages. Keeping names plain lets the same Series go through every
#: format unchanged, which is what makes the fingerprint stable across formats.
FORBIDDEN_NAME_CHARACTERS = ',"/\\'

# Version tag of the byte encoding hashed by Series.fingerprint; change it only with the encoding.
_FINGERPRINT_TAG = b"ergodex-series-v1\x00"


def _where(source: str) -> str:
    return f"{source}: " if source else ""


def check_name(name: Any, *, what: str = "variable name", source: str = "") -> str:
    """Return ``name`` if it may name a variable, else raise :class:`DataError`.

    A name must be a non-empty string without leading or trailing white space, without control
    characters or any of ``, " / \\``, and must not be one of :data:`RESERVED_NAMES`.

    Parameters
    ----------
    name : object
        Candidate name.
    what : str
        How the name is described in the error message.
    source : str
        File or folder the name came from, for the message.

    Returns
    -------
    str
        The name, unchanged.
    """
    where = _where(source)
    if not isinstance(name, str):
        raise DataError(f"{where}{what} {name!r} is not a string; give every variable a text name")
    if name == "" or name.strip() == "":
        raise DataError(f"{where}{what} is empty; give every variable a name")
    if name != name.strip():
        raise DataError(f"{where}{what} {name!r} has leading or trailing white space; remove it")
    bad = [c for c in name if c in FORBIDDEN_NAME_CHARACTERS or not c.isprintable()]
    if bad:
        raise DataError(
            f"{where}{what} {name!r} contains the character {bad[0]!r}; names may not contain "
            f'control characters or any of , " / \\ (rename the variable)'
        )
    if name.lower() in RESERVED_NAMES:
        raise DataError(
            f"{where}{what} {name!r} is reserved (the columns 'time' and 'run' have a meaning of "
            "their own in CSV files); rename the variable"
        )
    return name


def _as_runs(runs: Any, source: str) -> list[np.ndarray]:
    """Turn a 2-D array, a 3-D array or a sequence of 2-D arrays into a list of 2-D arrays."""
    where = _where(source)
    if isinstance(runs, np.ndarray):
        if runs.ndim == 2:
            candidates = [runs]
        elif runs.ndim == 3:
            candidates = [runs[i] for i in range(runs.shape[0])]
        else:
            raise DataError(
                f"{where}values have {runs.ndim} dimensions; expected (n_samples, n_variables) "
                "for one run or (n_runs, n_samples, n_variables) for several"
            )
    elif isinstance(runs, (list, tuple)):
        candidates = list(runs)
    else:
        raise DataError(
            f"{where}runs must be an array or a sequence of arrays, got {type(runs).__name__}"
        )
    if not candidates:
        raise DataError(f"{where}no runs: a Series needs at least one run with samples")
    out = []
    for i, run in enumerate(candidates):
        try:
            arr = np.asarray(run)
        except (ValueError, TypeError) as exc:
            raise DataError(f"{where}run {i}: cannot be read as an array ({exc})") from None
        if arr.dtype.kind not in "biuf":
            raise DataError(
                f"{where}run {i}: values must be real numbers, got array of dtype {arr.dtype}"
            )
        if arr.ndim != 2:
            raise DataError(
                f"{where}run {i}: has shape {arr.shape}; each run must be 2-D "
                "(n_samples, n_variables)"
            )
        out.append(arr)
    return out


@dataclass(frozen=True, eq=False)
class Series:
    """Runs of uniformly sampled states of named variables.

    Build one with :meth:`from_arrays`, which validates and copies the values; constructing the
    dataclass directly runs the same checks.

    Attributes
    ----------
    runs : tuple of numpy.ndarray
        Each run is a read-only float64 C-ordered array of shape (n_samples_i, n_variables).
    names : tuple of str
        Unique variable names, one per column.
    dt : float
        Sampling interval (time units, > 0), the same for every run.
    units : tuple of str or None
        Physical unit of each variable, if known.
    run_labels : tuple of str or None
        A label per run (e.g. the values of a CSV ``run`` column).
    source : str
        File or folder the data came from; used in error messages.
    time_unit : str or None
        Unit of ``dt`` and of every time derived from it (``"hours"``, ``"days"``,
        ``"seconds"``...), when the data say it: NetCDF times carry it, a CSV time column does
        not. Kept out of :meth:`fingerprint` on purpose: the fingerprint identifies the numbers,
        and the same numbers written to CSV or NPZ (which have no place for the unit) must keep
        the fingerprint that registered models and evidence files already record. The fitters
        record the unit beside the fingerprint in a model's provenance instead.
    """

    runs: tuple[np.ndarray, ...]
    names: tuple[str, ...]
    dt: float
    units: tuple[str, ...] | None = None
    run_labels: tuple[str, ...] | None = None
    source: str = ""
    time_unit: str | None = None

    def __post_init__(self) -> None:
        runs, names, dt, units, labels = _validate(
            self.runs, self.names, self.dt, self.units, self.run_labels, self.source
        )
        if self.time_unit is not None and (
            not isinstance(self.time_unit, str)
            or not self.time_unit.strip()
            or not self.time_unit.isprintable()
        ):
            raise DataError(
                f"{_where(self.source)}time_unit must be a non-empty word such as "
                f"'hours' or None, got {self.time_unit!r}"
            )
        object.__setattr__(self, "runs", runs)
        object.__setattr__(self, "names", names)
        object.__setattr__(self, "dt", dt)
        object.__setattr__(self, "units", units)
        object.__setattr__(self, "run_labels", labels)

    @classmethod
    def from_arrays(
        cls,
        runs: Any,
        names: Sequence[str],
        dt: float,
        *,
        units: Sequence[str] | None = None,
        run_labels: Sequence[str] | None = None,
        source: str = "",
        time_unit: str | None = None,
    ) -> Series:
        """Validate arrays and build a Series.

        Parameters
        ----------
        runs : array_like or sequence of array_like
            A 2-D array (n_samples, n_variables) for one run, a 3-D array
            (n_runs, n_samples, n_variables), or a sequence of 2-D arrays whose lengths may
            differ.
        names : sequence of str
            One unique name per variable (see :func:`check_name` for the rules).
        dt : float
            Sampling interval, > 0.
        units : sequence of str, optional
            One unit string per variable.
        run_labels : sequence of str, optional
            One unique label per run.
        source : str, optional
            Where the data came from, quoted in error messages.
        time_unit : str, optional
            Unit of ``dt`` (``"hours"``, ``"days"``...), printed beside it; not hashed.

        Returns
        -------
        Series

        Raises
        ------
        DataError
            On non-finite values, wrong shapes, empty, duplicate or unusable names, ``dt <= 0``
            or a constant variable. The message names the source, run, row and column and the
            value found.

        Examples
        --------
        >>> import numpy as np
        >>> s = Series.from_arrays(np.arange(6.0).reshape(3, 2), ["flow", "dT_up"], 0.5)
        >>> s.lengths, s.duration, s.column("dT_up")
        ((3,), (1.5,), 1)
        """
        return cls(
            runs=tuple(_as_runs(runs, source)),
            names=tuple(names) if not isinstance(names, str) else (names,),
            dt=dt,
            units=None if units is None else tuple(units),
            run_labels=None if run_labels is None else tuple(run_labels),
            source=source,
            time_unit=time_unit,
        )

    @classmethod
    def from_pandas(
        cls, frame: Any, *, dt: float | None = None, time_unit: str = "s", source: str = "DataFrame"
    ) -> Series:
        """A Series from a pandas DataFrame: a ``time`` column or time-like index, an optional
        ``run`` column, one column per variable (see :mod:`ergodex.frames`; datetimes give ``dt``
        in ``time_unit``, seconds by default)."""
        from ergodex.frames import from_pandas

        return from_pandas(frame, dt=dt, time_unit=time_unit, source=source)

    @classmethod
    def from_xarray(
        cls, data: Any, *, dt: float | None = None, time_unit: str = "s", source: str = "Dataset"
    ) -> Series:
        """A Series from an xarray Dataset or DataArray with dims ``(time,)`` or
        ``(member | run, time)`` (see :mod:`ergodex.frames`)."""
        from ergodex.frames import from_xarray

        return from_xarray(data, dt=dt, time_unit=time_unit, source=source)

    def to_xarray(self) -> Any:
        """The Series as an xarray Dataset with dims ``(run, time)`` (see
        :func:`ergodex.frames.to_xarray`); :meth:`from_xarray` gives back the same fingerprint."""
        from ergodex.frames import to_xarray

        return to_xarray(self)

    # --- sizes -------------------------------------------------------------------------------
    @property
    def n_variables(self) -> int:
        """Number of state variables (columns)."""
        return len(self.names)

    @property
    def n_runs(self) -> int:
        """Number of runs."""
        return len(self.runs)

    @property
    def lengths(self) -> tuple[int, ...]:
        """Number of samples in each run."""
        return tuple(int(r.shape[0]) for r in self.runs)

    @property
    def n_samples(self) -> int:
        """Total number of samples over all runs."""
        return sum(self.lengths)

    @property
    def duration(self) -> tuple[float, ...]:
        """Time covered by each run: ``n_samples_i * dt``.

        Each sample stands for one sampling interval, so ``duration / dt`` gives back the number
        of samples (the span from the first to the last sample is one ``dt`` shorter).
        """
        return tuple(n * self.dt for n in self.lengths)

    # --- access ------------------------------------------------------------------------------
    def column(self, name: str) -> int:
        """Index of the variable ``name``; :class:`DataError` listing the names if unknown."""
        try:
            return self.names.index(name)
        except ValueError:
            raise DataError(
                f"{_where(self.source)}no variable named {name!r}; the variables are "
                f"{', '.join(self.names)}"
            ) from None

    def stacked(self) -> np.ndarray:
        """All runs concatenated in order, shape (n_samples, n_variables) (a new array)."""
        return np.concatenate(self.runs, axis=0)

    def select_runs(self, indices: Sequence[int] | int) -> Series:
        """A Series with the chosen runs (by position, in the order given)."""
        if isinstance(indices, (int, np.integer)):
            indices = [int(indices)]
        idx = [int(i) for i in indices]
        if not idx:
            raise DataError(f"{_where(self.source)}select_runs needs at least one run index")
        for i in idx:
            if not -self.n_runs <= i < self.n_runs:
                raise DataError(
                    f"{_where(self.source)}run index {i} is out of range; the Series has "
                    f"{self.n_runs} runs"
                )
        labels = None if self.run_labels is None else tuple(self.run_labels[i] for i in idx)
        if labels is not None and len(set(labels)) != len(labels):
            raise DataError(f"{_where(self.source)}select_runs got the same run twice: {idx}")
        return Series(
            runs=tuple(self.runs[i] for i in idx),
            names=self.names,
            dt=self.dt,
            units=self.units,
            run_labels=labels,
            source=self.source,
            time_unit=self.time_unit,
        )

    # --- identity ----------------------------------------------------------------------------
    def fingerprint(self) -> str:
        """``"sha256:<hex>"`` identifying the exact values, ``dt`` and names.

        The hashed bytes are, in order (integers are unsigned 64-bit little-endian):

        1. the tag ``b"ergodex-series-v1\\x00"``;
        2. the number of runs and the number of variables;
        3. for each name: its UTF-8 byte length, then the UTF-8 bytes;
        4. ``dt`` as an IEEE-754 float64, little-endian;
        5. for each run in order: its number of samples, then its values as float64
           little-endian in C order (row by row), with ``-0.0`` written as ``0.0``.

        Every length is written before the bytes it counts, so no two different Series share an
        encoding. Units, the time unit, run labels and the source are not part of the data's
        identity and are not hashed. The same numbers read from CSV, NPZ or NetCDF give the same
        fingerprint.
        """
        h = hashlib.sha256()
        h.update(_FINGERPRINT_TAG)
        h.update(struct.pack("<QQ", self.n_runs, self.n_variables))
        for name in self.names:
            b = name.encode("utf-8")
            h.update(struct.pack("<Q", len(b)))
            h.update(b)
        h.update(struct.pack("<d", self.dt))
        for run in self.runs:
            h.update(struct.pack("<Q", run.shape[0]))
            # Adding 0.0 turns -0.0 into +0.0 (IEEE-754 round-to-nearest), the only two equal
            # floats with different bytes once non-finite values are excluded.
            canon = np.ascontiguousarray(run + 0.0, dtype="<f8")
            h.update(canon.data.cast("B"))
        return "sha256:" + h.hexdigest()

    def __repr__(self) -> str:
        return (
            f"Series(n_runs={self.n_runs}, lengths={self.lengths}, names={self.names}, "
            f"dt={self.dt!r}{', time_unit=' + repr(self.time_unit) if self.time_unit else ''}"
            f"{', source=' + repr(self.source) if self.source else ''})"
        )


def format_dt(dt: float, unit: str | None) -> str:
    """The sampling interval as printed everywhere: ``"6 hours"``, or ``"0.01"`` without a unit.

    Examples
    --------
    >>> format_dt(6.0, "hours"), format_dt(0.01, None)
    ('6 hours', '0.01')
    """
    return f"{dt:g} {unit}" if unit else f"{dt:g}"


def _validate(runs, names, dt, units, labels, source):
    where = _where(source)
    run_list = _as_runs(list(runs) if isinstance(runs, tuple) else runs, source)

    if isinstance(names, str) or not isinstance(names, (list, tuple)):
        names = (names,) if isinstance(names, str) else tuple(names)
    names = tuple(names)
    if not names:
        raise DataError(f"{where}no variable names given")
    for k, name in enumerate(names):
        check_name(name, what=f"variable name in column {k + 1}", source=source)
    seen: dict[str, int] = {}
    for k, name in enumerate(names):
        if name in seen:
            raise DataError(
                f"{where}variable name {name!r} appears twice (columns {seen[name] + 1} and "
                f"{k + 1}); names must be unique"
            )
        seen[name] = k

    try:
        dt_f = float(dt)
    except (TypeError, ValueError):
        raise DataError(f"{where}dt must be a number, got {dt!r}") from None
    if not math.isfinite(dt_f) or dt_f <= 0:
        raise DataError(f"{where}dt must be a finite number > 0, got {dt!r}")

    n_var = len(names)
    frozen = []
    for i, run in enumerate(run_list):
        if run.shape[1] != n_var:
            raise DataError(
                f"{where}run {i}: has {run.shape[1]} columns but {n_var} variable names were given"
            )
        if run.shape[0] == 0:
            raise DataError(f"{where}run {i}: has no samples")
        if run.dtype == np.float64 and run.flags.c_contiguous and not run.flags.writeable:
            arr = run  # already frozen by an earlier validation (select_runs, cut_blocks)
        else:
            arr = np.array(run, dtype=np.float64, order="C", copy=True)
        finite = np.isfinite(arr)
        if not finite.all():
            r, c = np.argwhere(~finite)[0]
            raise DataError(
                f"{where}run {i}, row {r + 1}, column {names[c]!r}: value "
                f"{float(arr[r, c])!r} is not finite; remove it, or split the run there",
                python_hint="(read with split_at_gaps=True)",
                cli_hint="(use --split-at-gaps)",
            )
        if arr.flags.writeable:
            arr.setflags(write=False)
        frozen.append(arr)

    # A variable that never changes carries no dynamics and makes standardisation divide by 0.
    lo = np.min([a.min(axis=0) for a in frozen], axis=0)
    hi = np.max([a.max(axis=0) for a in frozen], axis=0)
    const = np.flatnonzero(lo == hi)
    if const.size:
        c = int(const[0])
        raise DataError(
            f"{where}column {names[c]!r}: every value is {float(lo[c])!r} (a constant variable); "
            "drop the column"
        )

    if units is not None:
        units = tuple(units)
        if len(units) != n_var or not all(isinstance(u, str) for u in units):
            raise DataError(
                f"{where}units must be {n_var} strings (one per variable), got {units!r}"
            )
    if labels is not None:
        labels = tuple(labels)
        if len(labels) != len(frozen) or not all(isinstance(x, str) for x in labels):
            raise DataError(
                f"{where}run_labels must be {len(frozen)} strings (one per run), got {labels!r}"
            )
        if len(set(labels)) != len(labels):
            raise DataError(f"{where}run labels must be unique, got {labels!r}")
    return tuple(frozen), names, dt_f, units, labels


# --- splits ------------------------------------------------------------------------------------
def split_runs(series: Series, holdout: int | Sequence[int | str]) -> tuple[Series, Series]:
    """Split whole runs into a fitting Series and a checking Series.

    Parameters
    ----------
    series : Series
    holdout : int or sequence of int or str
        An ``int`` holds out that many runs from the end; a sequence names the held-out runs by
        position (``int``) or by run label (``str``).

    Returns
    -------
    (fit, check) : tuple of Series
        The remaining runs and the held-out runs, each in their original order.
    """
    where = _where(series.source)
    n = series.n_runs
    if isinstance(holdout, (int, np.integer)) and not isinstance(holdout, bool):
        k = int(holdout)
        if not 1 <= k < n:
            raise DataError(
                f"{where}cannot hold out {k} of {n} runs; hold out at least 1 and keep at least 1"
            )
        chosen = set(range(n - k, n))
    else:
        chosen = set()
        # a bool lands here only by mistake; iterating it raises TypeError, as before
        for item in cast("Sequence[int | str]", holdout):
            if isinstance(item, str):
                if series.run_labels is None or item not in series.run_labels:
                    raise DataError(
                        f"{where}no run labelled {item!r}; the labels are "
                        f"{', '.join(series.run_labels or ()) or '(none)'}"
                    )
                chosen.add(series.run_labels.index(item))
            else:
                i = int(item)
                if not -n <= i < n:
                    raise DataError(f"{where}held-out run {i} is out of range (0..{n - 1})")
                chosen.add(i % n)
        if not chosen or len(chosen) >= n:
            raise DataError(
                f"{where}hold out at least 1 and keep at least 1 of the {n} runs "
                f"(asked to hold out {sorted(chosen)})"
            )
    keep = [i for i in range(n) if i not in chosen]
    return series.select_runs(keep), series.select_runs(sorted(chosen))


def cut_blocks(series: Series, n_blocks: int, gap: float) -> Series:
    """Cut every run into ``n_blocks`` equal contiguous blocks separated by ``gap`` time units.

    The samples inside each gap are left out, so that blocks are separated by several
    decorrelation times when ``gap`` is chosen that way and behave as near-independent samples.
    Each block becomes its own run, labelled ``"<run label>/<block>"``.

    Parameters
    ----------
    series : Series
    n_blocks : int
        Blocks per run, >= 1.
    gap : float
        Time left out between consecutive blocks (>= 0), rounded up to whole samples.

    Returns
    -------
    Series
        ``n_runs * n_blocks`` runs, ordered run by run.
    """
    where = _where(series.source)
    if isinstance(n_blocks, bool) or not isinstance(n_blocks, (int, np.integer)) or n_blocks < 1:
        raise DataError(f"{where}n_blocks must be an integer >= 1, got {n_blocks!r}")
    gap = float(gap)
    if not math.isfinite(gap) or gap < 0:
        raise DataError(f"{where}gap must be a finite time >= 0, got {gap!r}")
    gap_samples = int(math.ceil(gap / series.dt - 1e-9))
    labels = series.run_labels or tuple(str(i) for i in range(series.n_runs))
    blocks, block_labels = [], []
    for run, label in zip(series.runs, labels):
        usable = run.shape[0] - (n_blocks - 1) * gap_samples
        size = usable // n_blocks
        if size < 2:
            raise DataError(
                f"{where}run {label!r} has {run.shape[0]} samples: too short for {n_blocks} "
                f"blocks separated by gaps of {gap_samples} samples ({gap} time units)"
            )
        for b in range(n_blocks):
            start = b * (size + gap_samples)
            blocks.append(run[start : start + size])
            block_labels.append(f"{label}/{b}")
    return Series(
        runs=tuple(blocks),
        names=series.names,
        dt=series.dt,
        units=series.units,
        run_labels=tuple(block_labels),
        source=series.source,
        time_unit=series.time_unit,
    )


def split_blocks(
    series: Series, n_blocks: int, gap: float, *, check_blocks: int = 1
) -> tuple[Series, Series]:
    """Split each run into blocks for fitting and blocks for checking, with gaps between them.

    Every run is cut by :func:`cut_blocks`; the last ``check_blocks`` blocks of each run go to
    the checking Series, the others to the fitting Series. Use it when there are too few runs to
    hold whole runs out.

    Parameters
    ----------
    series : Series
    n_blocks : int
        Blocks per run, >= 2.
    gap : float
        Time left out between consecutive blocks, e.g. several decorrelation times.
    check_blocks : int, optional
        Blocks per run given to the checking Series (1 <= check_blocks < n_blocks).

    Returns
    -------
    (fit, check) : tuple of Series
        Each block is a separate run (labels ``"<run label>/<block>"``).
    """
    if not isinstance(n_blocks, (int, np.integer)) or isinstance(n_blocks, bool) or n_blocks < 2:
        raise DataError(
            f"{_where(series.source)}split_blocks needs n_blocks >= 2, got {n_blocks!r}"
        )
    if not 1 <= check_blocks < n_blocks:
        raise DataError(
            f"{_where(series.source)}check_blocks must be between 1 and n_blocks - 1 = "
            f"{n_blocks - 1}, got {check_blocks!r}"
        )
    cut = cut_blocks(series, n_blocks, gap)
    fit_idx: list[int] = []
    check_idx: list[int] = []
    for r in range(series.n_runs):
        for b in range(n_blocks):
            (check_idx if b >= n_blocks - check_blocks else fit_idx).append(r * n_blocks + b)
    return cut.select_runs(fit_idx), cut.select_runs(check_idx)
