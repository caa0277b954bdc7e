"""Accepting an uploaded dataset file: name and type checks, reading, storing, recording.

An upload is only kept when the same reader the command line uses accepts it. The server never
reads it itself: an NPZ archive's declared inflated size is checked on its zip directory first,
then the file is read in a short-lived child process under the job memory limit
(:mod:`ergodex.service.reader`), which returns the summary the record needs. Until then it
lives in a private staging folder that is removed whatever happens, so a refused upload leaves
nothing behind. Accepted files are stored under ``home/service/datasets/<id>/<file name>``, where
the id is the hex digest of the data's fingerprint: uploading the same data twice (even in another
format) names the same dataset.
"""

from __future__ import annotations

import hashlib
import logging
import os
import re
import secrets
import shutil
import threading
import zipfile
from pathlib import Path
from typing import Any

from ergodex.exceptions import one_line
from ergodex.service.errors import ApiError
from ergodex.service.limits import declared_inflated_size
from ergodex.service.reader import read_isolated
from ergodex.service.settings import ServiceSettings
from ergodex.service.store import JobStore
from ergodex.timestamps import utc_now

log = logging.getLogger(__name__)

#: File name suffix → format name. Folders with a dataset.toml cannot travel as one upload.
FORMATS = {".csv": "csv", ".npz": "npz", ".nc": "netcdf"}

#: A plain file name: no folder parts, no leading dot, nothing a shell or a path join would read
#: as special.
_SAFE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,127}$")

#: First bytes of each binary format (the NPZ zip local header; netCDF classic "CDF" or the
#: HDF5 signature of netCDF-4).
_MAGIC = {
    "npz": (b"PK\x03\x04",),
    "netcdf": (b"CDF\x01", b"CDF\x02", b"CDF\x05", b"\x89HDF\r\n\x1a\n"),
}


class UploadRefused(ApiError):
    """An upload broke a rule (bad name, wrong type, too large, unreadable); nothing was stored."""


def check_filename(filename: str | None) -> str:
    """The upload's format name, or :class:`UploadRefused` for a missing, path-like or foreign
    name."""
    if not filename:
        raise UploadRefused(400, "bad-filename", "the uploaded file has no file name")
    if any(part in filename for part in ("/", "\\", "..", "\x00", ":")):
        raise UploadRefused(
            400,
            "bad-filename",
            f"file name {filename[:80]!r} has folder parts; send a plain file name such as "
            "data.csv",
        )
    if not _SAFE_NAME.match(filename):
        raise UploadRefused(
            400,
            "bad-filename",
            f"file name {filename[:80]!r} must start with a letter or digit and use only "
            "letters, digits, '.', '_' and '-' (at most 128 characters)",
        )
    suffix = Path(filename).suffix.lower()
    if suffix not in FORMATS:
        raise UploadRefused(
            415,
            "unsupported-type",
            f"file name {filename!r} has type {suffix or '(none)'!r}; upload one of "
            f"{', '.join(sorted(FORMATS))}",
        )
    return FORMATS[suffix]


def check_content(filename: str, fmt: str, head: bytes) -> None:
    """Refuse content that cannot be of the declared format before any reader sees it."""
    if not head:
        raise UploadRefused(422, "invalid-dataset", f"{filename}: the file is empty")
    if fmt in _MAGIC and not head.startswith(_MAGIC[fmt]):
        raise UploadRefused(
            422, "invalid-dataset", f"{filename}: the content is not a {fmt} file (wrong signature)"
        )
    if fmt == "csv":
        try:
            head.decode("utf-8")
        except UnicodeDecodeError as exc:
            # A multi-byte character cut at the end of the sniffed head is fine.
            if exc.start < len(head) - 4:
                raise UploadRefused(
                    422,
                    "invalid-dataset",
                    f"{filename}: not UTF-8 text (byte {exc.start}); a CSV upload must be text",
                ) from None
        if b"\x00" in head:
            raise UploadRefused(
                422, "invalid-dataset", f"{filename}: a CSV file holds no NUL bytes"
            )


def check_inflated_size(path: Path, filename: str, fmt: str, limit: int) -> None:
    """Refuse an NPZ archive whose members declare more than ``limit`` bytes once inflated.

    Only the zip directory is read (see :func:`~ergodex.service.limits.declared_inflated_size`),
    so a compression bomb is refused before any of it is inflated. CSV is stored as sent, and
    NetCDF has no cheap directory of sizes: both are bounded by the reader process's memory
    limit instead.
    """
    if fmt != "npz":
        return
    try:
        declared = declared_inflated_size(path)
    except (zipfile.BadZipFile, OSError, ValueError, EOFError) as exc:
        raise UploadRefused(
            422, "invalid-dataset", one_line(f"{filename}: not a readable NPZ (zip) archive: {exc}")
        ) from None
    if declared > limit:
        raise UploadRefused(
            413,
            "dataset-too-large",
            f"{filename} declares {declared} bytes of arrays once inflated, over this server's "
            f"limit of {limit} bytes (--max-dataset-mb); send less data per file",
        )


#: Uploads read at the same time, each in its own process (the rest wait their turn).
_READERS = threading.BoundedSemaphore(2)


def store_upload(
    settings: ServiceSettings,
    store: JobStore,
    filename: str | None,
    source,
    *,
    options: dict[str, Any] | None = None,
) -> tuple[dict[str, Any], bool]:
    """Check, read and store one uploaded file; return ``(record, created)``.

    Parameters
    ----------
    source
        A binary file object positioned at the start of the upload.
    options
        Reader options given with the upload (``dt`` for a CSV file without a time column);
        stored with the record so that jobs read the file exactly as it was checked.

    Raises
    ------
    UploadRefused
        For every problem with the upload itself; nothing is stored then.
    """
    fmt = check_filename(filename)
    assert filename is not None
    options = {k: v for k, v in (options or {}).items() if v is not None}
    settings.datasets_dir.mkdir(parents=True, exist_ok=True)
    staging: Path | None  # None once the folder has moved into place
    staging = settings.datasets_dir / f".staging-{secrets.token_hex(8)}"
    staging.mkdir()
    try:
        path = staging / filename
        digest = hashlib.sha256()
        size = 0
        head = b""
        with open(path, "wb") as out:
            while chunk := source.read(1 << 20):
                size += len(chunk)
                if size > settings.max_upload_bytes:
                    raise UploadRefused(
                        413,
                        "upload-too-large",
                        f"{filename} is larger than this server's limit of "
                        f"{settings.max_upload_bytes} bytes",
                    )
                if len(head) < 4096:
                    head += chunk[: 4096 - len(head)]
                digest.update(chunk)
                out.write(chunk)
        check_content(filename, fmt, head)
        assert settings.max_dataset_bytes is not None  # ServiceSettings fills it in when None
        check_inflated_size(path, filename, fmt, settings.max_dataset_bytes)
        if not _READERS.acquire(timeout=settings.parse_time_limit):
            raise UploadRefused(
                503,
                "server-busy",
                f"{filename}: other uploads are being read; send it again in a minute",
                headers={"Retry-After": "60"},
            )
        try:
            summary = read_isolated(
                path,
                filename,
                options,
                memory_bytes=settings.job_memory_bytes,
                timeout=settings.parse_time_limit,
            )
        finally:
            _READERS.release()
        log.info("upload %s read by process %s", filename, summary.pop("reader_pid", "?"))
        fingerprint = summary["fingerprint"]
        dataset_id = fingerprint.split(":", 1)[-1]
        record = {
            "id": dataset_id,
            "fingerprint": fingerprint,
            "filename": filename,
            "format": fmt,
            "size_bytes": size,
            "sha256": digest.hexdigest(),
            "variables": list(summary["variables"]),
            "dt": float(summary["dt"]),
            "runs": int(summary["runs"]),
            "samples": int(summary["samples"]),
            "options": options,
            "created": utc_now(),
        }
        existing = store.get_dataset(dataset_id)
        if existing is not None:
            return existing, False
        target = settings.datasets_dir / dataset_id
        try:
            os.rename(staging, target)  # atomic: the folder appears whole or not at all
        except OSError:
            # The same data arrived concurrently (or a folder without a record survives a crash):
            # the folder holding these values already exists, record it if it is not yet.
            pass
        else:
            staging = None
        if not store.add_dataset(record):
            return store.get_dataset(dataset_id) or record, False
        if staging is not None:  # the existing folder must hold a file of our name
            existing_file = target / filename
            if not existing_file.exists():
                shutil.copyfile(path, existing_file)
        return record, True
    finally:
        if staging is not None:
            shutil.rmtree(staging, ignore_errors=True)
