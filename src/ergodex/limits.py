"""Resource limits on what a user can hand ergodex: file kinds and sizes, nesting, memory.

A hostile or mistaken input must end in a one-line refusal, not in a machine out of memory or a
parser stuck for minutes. This module holds the limits and the checks that apply them:

- :func:`check_regular_file` — inputs are regular files (not devices, FIFOs or sockets, even
  through a symlink: ``/dev/zero`` never ends) no larger than a limit;
- :func:`read_text_file`, :func:`load_json_text`, :func:`load_toml_file` — UTF-8 text, JSON and
  TOML read with a size limit and a nesting limit (:data:`MAX_NESTING`);
- :func:`memory_limit`, :func:`check_memory` — refuse work whose estimated memory exceeds the
  limit: ``$ERGODEX_MAX_MEMORY`` (or ``--max-memory``) when set, else half of the memory
  available when the check runs.

Every refusal is an :class:`~ergodex.exceptions.ErgodexError` subclass (exit code 2 on the command
line) whose message names the file or setting, the value and the limit.
"""

from __future__ import annotations

import json
import math
import os
import re
import stat
import tomllib
from pathlib import Path
from typing import Any

from ergodex.exceptions import DataError, SettingsError

__all__ = [
    "FILE_SIZE_ENV",
    "MAX_NESTING",
    "MEMORY_ENV",
    "check_memory",
    "check_regular_file",
    "file_size_limit",
    "format_bytes",
    "load_json_text",
    "load_toml_file",
    "memory_limit",
    "nesting_depth",
    "parse_size",
    "read_text_file",
]

#: Environment variable: largest memory (bytes, or with a K/M/G/T suffix) a run may estimate.
MEMORY_ENV = "ERGODEX_MAX_MEMORY"
#: Environment variable: largest data file (bytes, or with a suffix) a reader opens.
FILE_SIZE_ENV = "ERGODEX_MAX_FILE_SIZE"
#: Default largest data file: 4 GiB.
DEFAULT_MAX_FILE_SIZE = 4 << 30
#: Largest small text file (model, regimes, settings, manifest, scorecard): 64 MiB.
MAX_TEXT_FILE_SIZE = 64 << 20
#: Deepest nesting of lists/tables accepted in JSON and TOML inputs (ours need fewer than 10).
MAX_NESTING = 64
#: Memory assumed available when the system does not say (8 GiB).
_FALLBACK_AVAILABLE = 8 << 30

_SIZE = re.compile(r"^\s*([0-9]+(?:\.[0-9]*)?|\.[0-9]+)\s*([kKmMgGtT]?)(?:i?[bB])?\s*$")
_UNITS = {"": 1, "k": 1 << 10, "m": 1 << 20, "g": 1 << 30, "t": 1 << 40}


def parse_size(text: Any, what: str = "size") -> int:
    """Bytes from ``"123"``, ``"512M"``, ``"2G"``, ``"1.5GiB"`` (binary units); > 0.

    Raises
    ------
    SettingsError
        Naming ``what`` when the text is not such a size.
    """
    if isinstance(text, bool):
        raise SettingsError(f"{what}: expected a size such as 512M or 2G, got {text!r}")
    if isinstance(text, (int, float)):
        value = float(text)
    else:
        match = _SIZE.match(str(text))
        if match is None:
            raise SettingsError(f"{what}: expected a size such as 512M or 2G, got {text!r}")
        value = float(match.group(1)) * _UNITS[match.group(2).lower()]
    if not (math.isfinite(value) and 1 <= value < 2.0**63):
        raise SettingsError(f"{what}: a size must be at least 1 byte and finite, got {text!r}")
    return int(value)


def format_bytes(n: float) -> str:
    """``1.5 GiB`` style text for messages."""
    for unit, size in (("TiB", 1 << 40), ("GiB", 1 << 30), ("MiB", 1 << 20), ("KiB", 1 << 10)):
        if n >= size:
            return f"{n / size:.3g} {unit}"
    return f"{int(n)} B"


def _available_memory() -> int:
    """Memory available to a new allocation now (Linux ``MemAvailable``, else free pages)."""
    try:
        with open("/proc/meminfo", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (AttributeError, OSError, ValueError):
        return _FALLBACK_AVAILABLE


def memory_limit(override: Any = None) -> int:
    """The memory limit in bytes: ``override``, else ``$ERGODEX_MAX_MEMORY``, else half available.

    Half of what is available leaves room for the interpreter, the libraries and the copies a
    command makes that the estimates do not count (common practice, no source).
    """
    if override is not None:
        return parse_size(override, "--max-memory")
    env = os.environ.get(MEMORY_ENV)
    if env:
        return parse_size(env, MEMORY_ENV)
    return max(1 << 28, _available_memory() // 2)


def check_memory(estimate: float, what: str, lower: str, override: Any = None) -> None:
    """Refuse work whose estimated memory ``estimate`` (bytes) exceeds :func:`memory_limit`.

    Parameters
    ----------
    estimate : float
        Bytes the work would allocate.
    what : str
        What needs it (``"an ensemble of 16 members x 1000 outputs x 3 variables"``).
    lower : str
        How to need less (``"use fewer members or outputs"``).
    override : size, optional
        Explicit limit (``--max-memory``).

    Raises
    ------
    SettingsError
        Saying the estimate, the limit, how to need less and how to raise the limit.
    """
    limit = memory_limit(override)
    if estimate > limit:
        raise SettingsError(
            f"{what} needs about {format_bytes(estimate)} of memory, over the limit of "
            f"{format_bytes(limit)}; {lower}, or raise the limit with --max-memory SIZE or "
            f"{MEMORY_ENV}"
        )


def file_size_limit() -> int:
    """Largest data file a reader opens: ``$ERGODEX_MAX_FILE_SIZE``, else 4 GiB."""
    env = os.environ.get(FILE_SIZE_ENV)
    return parse_size(env, FILE_SIZE_ENV) if env else DEFAULT_MAX_FILE_SIZE


def check_regular_file(
    path: str | os.PathLike[str],
    what: str,
    *,
    max_bytes: int | None = None,
    error: type[Exception] = DataError,
) -> os.stat_result:
    """Refuse a missing path, a folder, a non-regular file or one over ``max_bytes``.

    Symlinks are followed, so a ``.csv`` link to ``/dev/zero`` is refused as a device.
    ``max_bytes`` defaults to :func:`file_size_limit`.
    """
    path = Path(path)
    try:
        info = path.stat()
    except FileNotFoundError:
        raise error(f"{path}: file not found") from None
    except (OSError, ValueError) as exc:  # ValueError: a NUL byte in the name
        raise error(f"{path}: cannot be read ({getattr(exc, 'strerror', None) or exc})") from None
    if stat.S_ISDIR(info.st_mode):
        raise error(f"{path}: is a folder, expected {what}")
    if not stat.S_ISREG(info.st_mode):
        raise error(f"{path}: is not a regular file (a device, pipe or socket), expected {what}")
    limit = file_size_limit() if max_bytes is None else int(max_bytes)
    if info.st_size > limit:
        raise error(
            f"{path}: is {format_bytes(info.st_size)}, over the limit of {format_bytes(limit)} "
            f"for {what}; raise it with {FILE_SIZE_ENV}"
            if max_bytes is None
            else f"{path}: is {format_bytes(info.st_size)}, over the limit of "
            f"{format_bytes(limit)} for {what}"
        )
    return info


def read_text_file(
    path: str | os.PathLike[str],
    what: str,
    *,
    max_bytes: int = MAX_TEXT_FILE_SIZE,
    error: type[Exception] = DataError,
) -> str:
    """A small UTF-8 text file (BOM dropped), checked with :func:`check_regular_file`."""
    path = Path(path)
    check_regular_file(path, what, max_bytes=max_bytes, error=error)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise error(f"{path}: cannot be read ({exc.strerror or exc})") from None
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start) + 1
        raise error(
            f"{path}: line {line}: byte {raw[exc.start : exc.start + 1]!r} is not UTF-8 "
            "text; save the file as UTF-8"
        ) from None


def nesting_depth(value: Any) -> int:
    """Deepest nesting of lists/dicts in ``value`` (a scalar is 0), without recursion."""
    deepest = 0
    stack = [(value, 1)]
    while stack:
        item, depth = stack.pop()
        children: Any
        if isinstance(item, dict):
            children = item.values()
        elif isinstance(item, list):
            children = item
        else:
            continue
        deepest = max(deepest, depth)
        stack.extend((child, depth + 1) for child in children)
    return deepest


def _refuse_constant(name: str) -> float:
    raise ValueError(f"JSON constant {name} is not allowed (numbers must be finite)")


def load_json_text(
    text: str, source: str, *, error: type[Exception] = DataError, max_nesting: int = MAX_NESTING
) -> Any:
    """Parse JSON strictly: no NaN/Infinity, no integers beyond Python's digit limit, bounded
    nesting.

    Raises
    ------
    error
        ``"<source>: not valid JSON at line L, column C (...)"``, or naming the rule broken.
    """
    try:
        data = json.loads(text, parse_constant=_refuse_constant)
    except json.JSONDecodeError as exc:
        raise error(
            f"{source}: not valid JSON at line {exc.lineno}, column {exc.colno} ({exc.msg})"
        ) from None
    except RecursionError:
        raise error(
            f"{source}: lists or objects nested too deeply (the limit is {max_nesting} levels)"
        ) from None
    except ValueError as exc:  # NaN/Infinity, or an integer with thousands of digits
        message = " ".join(str(exc).split())
        if "integer string conversion" in message:
            message = "a number has more than 4300 digits; write numbers as floats"
        raise error(f"{source}: {message}") from None
    if nesting_depth(data) > max_nesting:
        raise error(
            f"{source}: lists or objects nested too deeply (the limit is {max_nesting} levels)"
        )
    return data


def load_toml_file(
    path: str | os.PathLike[str],
    what: str,
    *,
    error: type[Exception] = DataError,
    max_nesting: int = MAX_NESTING,
) -> dict[str, Any]:
    """Read a TOML file with the checks of :func:`read_text_file` and a nesting limit."""
    text = read_text_file(path, what, error=error)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        message = " ".join(str(exc).split())
        raise error(f"{path}: not valid TOML: {message}") from None
    except RecursionError:
        raise error(
            f"{path}: arrays or tables nested too deeply (the limit is {max_nesting} levels)"
        ) from None
    if nesting_depth(data) > max_nesting:
        raise error(
            f"{path}: arrays or tables nested too deeply (the limit is {max_nesting} levels)"
        )
    return data
