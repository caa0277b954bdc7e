"""Atomic file writes: a reader never sees half a file, and a crash leaves the old one in place.

Every file ergodex writes (models, scorecards, reports, datasets, decision records) goes through
:func:`atomic_write_path`: the content is written to a temporary file in the target folder,
flushed to disk, and moved over the target with :func:`os.replace`, which is atomic on POSIX and
Windows when both names are on one file system.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable
from pathlib import Path

from ergodex.exceptions import DataError


def atomic_write_path(
    path: str | os.PathLike[str], write: Callable[[Path], None], *, make_folder: bool = True
) -> Path:
    """Call ``write(tmp_path)`` for a temporary path beside ``path``, then move it into place.

    Parameters
    ----------
    path
        The file to create or replace.
    write
        Writes the whole content to the path it is given (e.g. ``numpy.savez``).
    make_folder
        Create missing parent folders; with ``False`` a missing folder is a :class:`DataError`.
    """
    target = Path(path)
    folder = target.parent
    if make_folder:
        folder.mkdir(parents=True, exist_ok=True)
    elif not folder.is_dir():
        raise DataError(f"{target}: the folder {folder} does not exist; create it first")
    fd, name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=folder)
    os.close(fd)
    tmp = Path(name)
    try:
        write(tmp)
        with open(tmp, "rb+") as handle:  # the content reaches the disk before the rename
            os.fsync(handle.fileno())
        os.chmod(tmp, 0o644)  # mkstemp makes owner-only files; give the result usual permissions
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return target


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes, **kw) -> Path:
    """Write ``data`` to ``path`` atomically (see :func:`atomic_write_path`)."""
    return atomic_write_path(path, lambda tmp: tmp.write_bytes(data), **kw)


def atomic_write_text(path: str | os.PathLike[str], text: str, **kw) -> Path:
    """Write ``text`` as UTF-8 to ``path`` atomically (see :func:`atomic_write_path`)."""
    return atomic_write_bytes(path, text.encode("utf-8"), **kw)
