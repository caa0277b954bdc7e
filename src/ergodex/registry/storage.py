"""Where things live under a registry home, and the small file helpers every write goes through.

Every file of a version is written to a new file, fsynced, read back and compared by sha256 before
it is moved into place; folders are fsynced after a rename so the rename survives a power cut.
"""

from __future__ import annotations

import getpass
import hashlib
import io
import os
import zipfile
from pathlib import Path

from ergodex.exceptions import IntegrityError, ModelFileError
from ergodex.timestamps import utc_now

INDEX_FILE = "registry.sqlite3"
STAGING_DIR = ".staging"
# Where recovery moves what it cannot account for (never deleted): killed writers' leftovers,
# unknown numbered folders, a corrupt index file.
QUARANTINE_DIR = ".quarantine"

# Version 2 writes references (``parent``, ``imported_from``) as NAME/VERSION; the versions before
# it, still read, wrote NAME@VERSION.
RECORD_FORMAT = "ergodex-record/2"
OLD_RECORD_FORMATS = ("ergodex-record/1",)
# Each version folder's own, mutable status record (status, events, committed flag); rewritten
# atomically with every status change so that a lost index can be rebuilt from the folders.
STATUS_FILE = "status.json"
STATUS_FORMAT = "ergodex-status/1"
# The export manifest's versions, on the same rule as the record's.
EXPORT_FORMAT = "ergodex-export/2"
OLD_EXPORT_FORMATS = ("ergodex-export/1",)


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _hash_file(path: Path) -> str:
    """sha256 of a file, read in chunks (evidence files may be large)."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _fsync_dir(path: Path) -> None:
    # A rename is durable only once the folder holding the entry is synced (POSIX).
    if os.name != "posix":  # pragma: no cover - Windows cannot open folders
        return
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_file(path: Path, data: bytes, *, read_only: bool = True) -> None:
    """Write ``data`` to a new file ``path`` (read-only), fsync it, read it back, compare hashes."""
    with open(path, "xb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    if read_only:  # versions are immutable; an editor then warns before changing one
        os.chmod(path, 0o444)
    if sha256_hex(path.read_bytes()) != sha256_hex(data):  # pragma: no cover - disk fault
        raise IntegrityError(
            f"{path}: the bytes read back differ from the bytes written; the disk or filesystem "
            "is faulty or full"
        )


def _bare_hash(fingerprint: str) -> str:
    return fingerprint.split(":", 1)[-1].strip().lower()


def _now() -> str:
    return utc_now("milliseconds").replace("+00:00", "Z")


def _actor() -> str:
    try:
        return getpass.getuser() or "unknown"
    except Exception:  # getuser raises when no user name can be found at all
        return "unknown"


def _read_json_object(data: bytes, what: str) -> dict:
    from ergodex.limits import load_json_text

    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ModelFileError(f"{what} is not valid UTF-8 JSON: {exc}") from exc
    # strict parse: bounded nesting, no NaN/Infinity, no integers of thousands of digits
    obj = load_json_text(text, what, error=ModelFileError)
    if not isinstance(obj, dict):
        raise ModelFileError(f"{what} must hold a JSON object, found {type(obj).__name__}")
    return obj


def _check_npz(data: bytes, what: str) -> None:
    """Refuse an evidence file that is not a plain NPZ (object arrays would need pickle)."""
    import numpy as np

    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as npz:
            for key in npz.files:
                npz[key]
    except (ValueError, OSError, zipfile.BadZipFile, EOFError) as exc:
        raise ModelFileError(
            f"{what} is not a plain NPZ file of numeric arrays (object arrays are refused "
            f"because reading them would run pickle): {exc}"
        ) from exc
