"""Model names and references: what may become a folder under the home, and ``NAME/VERSION``."""

from __future__ import annotations

import re

from ergodex.exceptions import RegistryError
from ergodex.registry.storage import INDEX_FILE

MAX_NAME_LENGTH = 64

# A conservative name: letters, digits, '.', '_' and '-', starting with a letter or digit. No path
# separators ('/' separates name from version in a reference), no '@', no spaces, nothing a shell
# or a filesystem treats specially.
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


#: The word that names a model's accepted version in a reference: ``loop/current``.
CURRENT = "current"
#: The one separator of name and version in a reference (``loop/3``); never part of a name.
REF_SEPARATOR = "/"


def format_ref(name: str, version: int | str) -> str:
    """The reference of one version: ``format_ref("loop", 3) == "loop/3"``."""
    return f"{name}{REF_SEPARATOR}{version}"


def split_ref(ref: object) -> tuple[str, int | None, bool]:
    """Split a reference into ``(name, version or None, named_current)``; names are validated.

    ``"loop"`` and ``"loop/current"`` both mean the accepted version (``version`` None); the
    third item tells them apart (a status change needs a version, and ``current`` names one).
    A reference in the former ``NAME@VERSION`` form is refused with the form to write instead.
    """
    if not isinstance(ref, str) and hasattr(ref, "name") and hasattr(ref, "version"):
        # a VersionInfo (records.py builds its ref with format_ref, so it cannot be imported here)
        return validate_name(ref.name), int(ref.version), False
    if not isinstance(ref, str):
        raise RegistryError(
            f"model reference must be 'NAME', 'NAME/VERSION' or 'NAME/{CURRENT}', got {ref!r}"
        )
    shown = ref if len(ref) <= 80 else ref[:77] + "..."
    if "@" in ref:
        name, _, version_text = ref.partition("@")
        now = format_ref(name, CURRENT if version_text == "accepted" else version_text)
        now = now if len(now) <= 80 else now[:77] + "..."
        raise RegistryError(
            f"model reference {shown!r} is in the former NAME@VERSION form: write {now}, not "
            f"{shown} (NAME/VERSION, or NAME/{CURRENT} for the accepted version)"
        )
    name, sep, version_text = ref.partition(REF_SEPARATOR)
    validate_name(name)
    if not sep:
        return name, None, False
    if version_text == CURRENT:
        return name, None, True
    # length and ASCII first: int() refuses 5000 digits and digits such as '²' with ValueError
    if (
        len(version_text) > 9
        or not (version_text.isascii() and version_text.isdigit())
        or int(version_text) < 1
    ):
        raise RegistryError(
            f"model reference {shown!r}: the version after '/' must be a positive whole number "
            f"or '{CURRENT}'"
        )
    return name, int(version_text), False


def parse_ref(ref: object) -> tuple[str, int | None]:
    """Split ``"name"``, ``"name/3"`` or ``"name/current"`` into ``(name, version or None)``.

    None stands for the accepted version; names are validated (see :func:`split_ref`).
    """
    name, version, _ = split_ref(ref)
    return name, version


def upgrade_ref(value: object, source: str, *, old_form: bool) -> str | None:
    """A reference read from a stored file, in today's ``NAME/VERSION`` form.

    Files of a format version from before the rename (``old_form``) wrote ``NAME@VERSION``: that
    is read as ``NAME/VERSION``. A file of today's version that still holds the ``@`` form is
    refused, naming ``source``.
    """
    if value is None:
        return None
    text = str(value)
    if "@" not in text:
        return text
    if not old_form:
        raise RegistryError(
            f"{source}: holds the reference {text!r} in the former NAME@VERSION form, which its "
            "format version no longer uses; write NAME/VERSION"
        )
    name, _, version = text.partition("@")
    return format_ref(name, version)
