"""Read a dataset folder: a ``dataset.toml`` manifest and the files it lists (:func:`read_dataset`).

Dataset folder
--------------
A folder with ``dataset.toml``: ``name``, ``variables``, ``dt``, ``files`` (relative paths inside
the folder, each a CSV, NPZ or NetCDF file), optional ``units``, ``description``, ``holdout`` (run
labels kept for validation) and a free-form ``[provenance]`` table.
"""

from __future__ import annotations

import math
import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast

import numpy as np

from ergodex.exceptions import DataError, one_line
from ergodex.limits import MAX_NESTING, MAX_TEXT_FILE_SIZE, check_regular_file, nesting_depth
from ergodex.readers.formats import _FILE_READERS, _reader_kwargs
from ergodex.readers.shared import DEFAULT_TIME_TOLERANCE, _DtMismatch
from ergodex.series import Series, check_name, split_runs

_MANIFEST = "dataset.toml"

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
        raise _manifest_error(manifest, f"is not valid TOML ({one_line(exc)})") from None
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


def _read_with_dt(reader, target: Path, dt: float, kwargs: dict, manifest: Path) -> Series:
    """Read one listed file with the manifest's dt; a different own dt is a mixed-dt error."""
    try:
        return reader(target, dt=dt, **kwargs)
    except _DtMismatch as exc:
        raise DataError(
            f"{target}: mixed dt: {manifest.name} says dt={dt!r} but the file has "
            f"dt={exc.own!r}; all files of a dataset must share one dt"
        ) from None
