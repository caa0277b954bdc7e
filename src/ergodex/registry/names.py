"""Model names and references: what may become a folder under the home, and ``NAME/VERSION``."""

from __future__ import annotations

import re

from ergodex.exceptions import RegistryError
from ergodex.registry.records import VersionInfo
from ergodex.registry.storage import INDEX_FILE

MAX_NAME_LENGTH = 64

# A conservative name: letters, digits, '.', '_' and '-', starting with a letter or digit. No path
# separators, no '@' (it separates name from version), no spaces, nothing a shell or a filesystem
# treats specially.
_NAME_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")

# Names a Windows filesystem refuses as folder names, names of the index's own files, and the
# folder the HTTP service keeps under the home (ergodex.service.settings.SERVICE_DIR).
_RESERVED_NAMES = {
    "service",
    "con",
    "prn",
    "aux",
    "nul",
    *(f"com{i}" for i in range(1, 10)),
    *(f"lpt{i}" for i in range(1, 10)),
    INDEX_FILE,
    INDEX_FILE + "-wal",
    INDEX_FILE + "-shm",
    INDEX_FILE + "-journal",
}


def validate_name(name: object) -> str:
    """Return ``name`` if it is a safe model name, else raise :class:`RegistryError`.

    A name becomes a folder under the registry home, so it must not be able to escape it: 1 to
    64 characters from ``A-Z a-z 0-9 . _ -``, starting with a letter or digit, not ending with
    ``.``, no ``..``, and not a name a filesystem reserves (``con``, ``nul``, …), the index's own
    file name or the service's folder. Names are also unique regardless of letter case (checked
    when registering), so that case-insensitive filesystems cannot merge two models.
    """
    if not isinstance(name, str):
        raise RegistryError(f"model name must be a string, got {type(name).__name__}")
    shown = repr(name if len(name) <= 40 else name[:40] + "…")
    if not name:
        raise RegistryError("model name is empty; give a name such as 'convection-loop'")
    if "\x00" in name:
        raise RegistryError(f"model name {shown} contains a NUL byte; use letters, digits, . _ -")
    if len(name) > MAX_NAME_LENGTH:
        raise RegistryError(
            f"model name {shown} is {len(name)} characters long; the limit is {MAX_NAME_LENGTH}"
        )
    if "/" in name or "\\" in name:
        raise RegistryError(
            f"model name {shown} contains a path separator; use letters, digits, . _ -"
        )
    if ".." in name:
        raise RegistryError(f"model name {shown} contains '..'; use letters, digits, . _ -")
    # A trailing dot is dropped by Windows filesystems ("a." would share the folder of "a").
    if not _NAME_PATTERN.fullmatch(name) or name.endswith("."):
        raise RegistryError(
            f"model name {shown} is not allowed: use letters, digits, '.', '_' and '-', "
            "starting with a letter or digit and not ending with '.'"
        )
    if name.lower() in _RESERVED_NAMES or name.lower().split(".")[0] in _RESERVED_NAMES:
        raise RegistryError(f"model name {shown} is reserved; choose another")
    return name


def parse_ref(ref: object) -> tuple[str, int | None]:
    """Split ``"name"`` or ``"name@3"`` into ``(name, version or None)``; names are validated."""
    if isinstance(ref, VersionInfo):
        return ref.name, ref.version
    if not isinstance(ref, str):
        raise RegistryError(f"model reference must be 'NAME' or 'NAME@VERSION', got {ref!r}")
    name, sep, version_text = ref.partition("@")
    validate_name(name)
    if not sep:
        return name, None
    # length and ASCII first: int() refuses 5000 digits and digits such as '²' with ValueError
    if (
        len(version_text) > 9
        or not (version_text.isascii() and version_text.isdigit())
        or int(version_text) < 1
    ):
        shown = ref if len(ref) <= 80 else ref[:77] + "..."
        raise RegistryError(
            f"model reference {shown!r}: the version after '@' must be a positive whole number"
        )
    return name, int(version_text)
