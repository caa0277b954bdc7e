"""Options and helpers shared by several commands (registry home, JSON output, progress)."""

from __future__ import annotations

import argparse
import json
import os
import sys
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


def add_limit_options(parser: argparse.ArgumentParser, *, time_limit: float | None) -> None:
    """Add ``--time-limit SECONDS`` (default ``time_limit``; none when None) and ``--max-memory``."""
    default = "none" if time_limit is None else f"{time_limit:g} s"
    parser.add_argument(
        "--time-limit", type=float, default=time_limit, metavar="SECONDS",
        help=f"wall-clock budget of the integration (default: {default}); a surrogate that needs "
             "longer fails (exit 1) instead of running for hours")
    parser.add_argument(
        "--max-memory", default=None, metavar="SIZE",
        help="refuse (exit 2) a run whose estimated memory exceeds SIZE, e.g. 512M or 4G "
             "(default: $ERGODEX_MAX_MEMORY, else half the memory available)")


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
