"""Options and helpers shared by several commands (registry home, JSON output, progress)."""

from __future__ import annotations

import argparse
import json
import os
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any


def add_home_option(parser: argparse.ArgumentParser) -> None:
    """Add ``--home DIR``: the registry home (default ``$ERGODEX_HOME``, else ``./models``)."""
    parser.add_argument(
        "--home",
        metavar="DIR",
        default=None,
        help="registry home (default: $ERGODEX_HOME, else ./models under the current folder)",
    )


def add_log_level_option(parser: argparse.ArgumentParser) -> None:
    """Add ``--log-level`` (standard ``logging`` level names)."""
    parser.add_argument(
        "--log-level",
        default="WARNING",
        choices=["DEBUG", "INFO", "WARNING", "ERROR"],
        help="logging level for progress lines on stderr (default: WARNING)",
    )


def resolve_home(home: str | os.PathLike[str] | None) -> Path:
    """The registry home: the argument, else ``$ERGODEX_HOME``, else ``./models``."""
    if home:
        return Path(home)
    env = os.environ.get("ERGODEX_HOME")
    if env:
        return Path(env)
    return Path.cwd() / "models"


def registry_from_args(args: argparse.Namespace):
    """Open the registry named by ``--home`` / ``ERGODEX_HOME`` (imported lazily: SQLite only)."""
    from ergodex.registry import Registry

    return Registry(resolve_home(getattr(args, "home", None)))


def write_json_atomic(path: str | os.PathLike[str], payload: dict[str, Any]) -> Path:
    """Write ``payload`` as indented JSON through a temporary file in the target folder."""
    from ergodex.files import atomic_write_text

    return atomic_write_text(path, json.dumps(payload, indent=2) + "\n")


def is_terminal() -> bool:
    """Progress bars only on an interactive terminal, never in scripts or CI logs."""
    return sys.stderr.isatty() and not os.environ.get("CI")


def show_progress(args: argparse.Namespace | None = None) -> bool:
    """The library's ``progress=`` for a command: a bar on stderr only on a terminal.

    Every command that does long work passes this on (see :mod:`ergodex.progress`); scripts, CI
    logs and ``--quiet`` get no bar.
    """
    return is_terminal() and not getattr(args, "quiet", False)


# --- models: one resolver for every command that takes a model --------------------------------
MODEL_HELP = (
    "a model file (ends in .json, or an existing file), else a registry reference: NAME/VERSION, "
    "or NAME or NAME/current for the accepted version"
)


def load_model(ref: str, home: str | os.PathLike[str] | None = None):
    """A Surrogate from a ``model.json`` path, or from the registry by ``NAME[/VERSION]``.

    The rule (:func:`is_model_file`): ``ref`` ending in ``.json``, or naming an existing file, is
    read as a model file; anything else is a reference looked up in the registry under ``home``
    (``NAME`` or ``NAME/current`` is the accepted version), hashes verified. A folder is never a
    model file, so ``loop/3`` stays a reference even inside the registry home, where the
    version folder ``loop/3/`` exists.
    """
    return load_model_info(ref, home)[0]


def load_model_info(ref: str, home: str | os.PathLike[str] | None = None):
    """:func:`load_model` plus the registry's ``VersionInfo`` (``None`` for a model file)."""
    from ergodex.exceptions import ModelFileError
    from ergodex.surrogate import Surrogate

    if is_model_file(ref):
        return Surrogate.from_json(Path(ref)), None
    if "@" in ref:  # the former NAME@VERSION form: say how to write it, registry or not
        from ergodex.registry import split_ref

        split_ref(ref)
    root = resolve_home(home)
    if not (root / "registry.sqlite3").exists():
        raise ModelFileError(
            f"{ref}: no such model file, and no registry at {root} to look it up in "
            "(give --home DIR or set ERGODEX_HOME)"
        )
    from ergodex.registry import Registry

    info, surrogate = resolve_registered(Registry(root), ref)
    return surrogate, info


def resolve_registered(registry: Any, ref: str):
    """``(VersionInfo, Surrogate)`` of ``NAME/VERSION``, or of NAME's accepted version."""
    info = registry.get(ref)
    return info, registry.load(info.ref)


def is_model_file(ref: str) -> bool:
    """True when ``ref`` is a model file: it ends in ``.json`` or names an existing file.

    Anything else (a folder included) is a registry reference, ``NAME[/VERSION]``.
    """
    return ref.endswith(".json") or Path(ref).is_file()


# --- data: hold-outs honoured, the same way for every command -----------------------------------
HOLDOUT_HELP = (
    "which runs are held out for checking: a run count from the end (2), comma-separated run "
    "labels (run-3,run-4), or 'none' (use every run); default: the dataset.toml 'holdout' list, "
    "else none"
)


def add_data_options(parser: argparse.ArgumentParser, *, holdout: bool = True) -> None:
    """Add ``--dt``, ``--split-at-gaps`` and (with ``holdout``) ``--holdout H``."""
    parser.add_argument(
        "--dt",
        type=float,
        default=None,
        help="sampling interval when DATA has no time column or manifest",
    )
    parser.add_argument(
        "--split-at-gaps",
        action="store_true",
        help="split a run at rows with missing or non-finite values instead of refusing the file",
    )
    if holdout:
        parser.add_argument("--holdout", metavar="H", default=None, help=HOLDOUT_HELP)


@dataclass
class DataChoice:
    """The runs a command works on, and the parts it could have chosen (for the own-data warning).

    ``series`` is the chosen part; ``whole`` every run read; ``fit`` and ``check`` the two sides
    of the hold-out split (``None`` without one); ``note`` says in one line what was chosen.
    """

    series: Any
    whole: Any
    fit: Any = None
    check: Any = None
    note: str = ""

    @property
    def held_out(self) -> Any:
        """The runs held out from a fit on :attr:`series` (``None`` when it uses every run)."""
        return self.check if self.fit is not None and self.series is self.fit else None


def parse_holdout_option(text: str | None) -> int | list[str] | None:
    """``--holdout``: ``None`` (not given), ``0`` for ``none``, a run count, or run labels."""
    from ergodex.exceptions import SettingsError

    if text is None:
        return None
    text = text.strip()
    if not text:
        raise SettingsError("--holdout is empty; give a run count, run labels or 'none'")
    if text.lower() in ("none", "0"):
        return 0
    try:
        count = int(text)
    except ValueError:
        return [part.strip() for part in text.split(",") if part.strip()]
    if count < 0:
        raise SettingsError(f"--holdout must be a run count >= 0, run labels or 'none'; got {text}")
    return count


def read_data(
    path: str,
    *,
    part: str,
    holdout: str | None = None,
    dt: float | None = None,
    split_at_gaps: bool = False,
) -> DataChoice:
    """Read DATA and keep the runs a command should use: ``part="fit"`` or ``part="check"``.

    The hold-out comes from ``--holdout`` (:func:`parse_holdout_option`), else from the dataset
    manifest's ``holdout`` list; :func:`ergodex.series.split_runs` splits. ``fit`` keeps the
    runs not held out, ``check`` the held-out ones; with no hold-out both use every run.
    """
    from ergodex.exceptions import DataError
    from ergodex.readers import read_dataset, read_series
    from ergodex.series import split_runs

    if part not in ("fit", "check"):
        raise ValueError(f"part must be 'fit' or 'check', got {part!r}")
    chosen = parse_holdout_option(holdout)
    p = Path(path)
    manifest_holdout: tuple[str, ...] = ()
    is_dataset = (p.is_dir() and (p / "dataset.toml").exists()) or p.suffix.lower() == ".toml"
    if is_dataset and dt is None:
        dataset = read_dataset(p, split_at_gaps=split_at_gaps)
        whole, manifest_holdout = dataset.series, tuple(dataset.holdout)
    else:
        whole = read_series(p, dt=dt, split_at_gaps=split_at_gaps)
    if chosen is None and manifest_holdout:
        chosen, origin = list(manifest_holdout), "held out by its dataset.toml"
    else:
        origin = "held out by --holdout"
    if chosen is None or chosen == 0:
        why = "--holdout none" if chosen == 0 else "no hold-out"
        # the manifest's split still tells the own-data warning what a fit would have used
        fit_part, check_part = (
            split_runs(whole, list(manifest_holdout)) if manifest_holdout else (None, None)
        )
        note = f"using all {whole.n_runs} runs of {path} ({why})"
        return DataChoice(whole, whole, fit_part, check_part, note=note)
    if whole.n_runs < 2:
        raise DataError(
            f"{path}: has a single run, so no run can be held out; give --holdout none "
            "to use it whole, or more runs"
        )
    fit_part, check_part = split_runs(whole, chosen)
    series = fit_part if part == "fit" else check_part
    labels = _labels(check_part)
    if part == "fit":
        note = (
            f"fitting on {fit_part.n_runs} of {whole.n_runs} runs of {path}; {labels} "
            f"{origin} for checking (--holdout none to fit on every run)"
        )
    else:
        note = (
            f"checking on the {check_part.n_runs} runs {origin} ({labels}) of {path}; "
            "--holdout none to check on every run"
        )
    return DataChoice(series, whole, fit_part, check_part, note)


def _labels(series: Any) -> str:
    labels = series.run_labels or tuple(str(i) for i in range(series.n_runs))
    return ", ".join(labels)


def own_data_warning(surrogate: Any, choice: DataChoice) -> str | None:
    """A warning when a check would run on data the model was fitted on, else ``None``.

    The model's ``provenance.data_fingerprint`` (written by every ergodex fitter) is compared
    with the checked runs and with the other parts of the data that was read.
    """
    fitted_on = (getattr(surrogate, "provenance", None) or {}).get("data_fingerprint")
    if not fitted_on:
        return None
    checked = choice.series.fingerprint()
    if fitted_on == checked:
        return (
            "the check data are exactly the data the model was fitted on; a check on training "
            "data says little about new data: hold runs out at fit time and check on those "
            "(--holdout), or check on other data"
        )
    parts = [choice.whole] + [s for s in (choice.fit, choice.check) if s is not None]
    for part in parts:
        if part is choice.series or part.fingerprint() != fitted_on:
            continue
        if part is choice.whole or choice.series is choice.whole:
            return (
                "the model was fitted on runs that this check uses (its data fingerprint "
                "matches part of these data); check on runs it was not fitted on (--holdout)"
            )
    return None


def add_limit_options(parser: argparse.ArgumentParser, *, time_limit: float | None) -> None:
    """Add ``--time-limit SECONDS`` and ``--max-memory``.

    ``--time-limit`` defaults to ``time_limit`` (none when None).
    """
    default = "none" if time_limit is None else f"{time_limit:g} s"
    parser.add_argument(
        "--time-limit",
        type=float,
        default=time_limit,
        metavar="SECONDS",
        help=f"wall-clock budget of the integration (default: {default}); a surrogate that needs "
        "longer fails (exit 1) instead of running for hours",
    )
    parser.add_argument(
        "--max-memory",
        default=None,
        metavar="SIZE",
        help="refuse (exit 2) a run whose estimated memory exceeds SIZE, e.g. 512M or 4G "
        "(default: $ERGODEX_MAX_MEMORY, else half the memory available)",
    )


def add_workers_option(parser: argparse.ArgumentParser, *, scope: str = "") -> None:
    """Add ``--workers N``: threads for a check's statistics (same numbers for any N)."""
    parser.add_argument(
        "--workers",
        type=int,
        default=None,
        metavar="N",
        help=f"{scope}threads for the check's statistics (default: every core; the numbers "
        "are the same for any N)",
    )


def check_limit_options(args: argparse.Namespace) -> None:
    """Refuse a non-positive or non-finite ``--time-limit`` and a malformed ``--max-memory``."""
    import math

    from ergodex.exceptions import SettingsError
    from ergodex.limits import parse_size

    limit = getattr(args, "time_limit", None)
    if limit is not None and not (math.isfinite(limit) and limit > 0):
        raise SettingsError(f"--time-limit must be a positive number of seconds, got {limit}")
    if getattr(args, "max_memory", None) is not None:
        parse_size(args.max_memory, "--max-memory")
    workers = getattr(args, "workers", None)
    if workers is not None and workers < 1:
        raise SettingsError(f"--workers must be a positive number of threads, got {workers}")
