"""Atomic file writes: a reader never sees half a file, and a crash leaves the old one in place.

Every file ergodex writes (models, scorecards, reports, datasets, decision records) goes through
:func:`atomic_write_path`: the content is written to a temporary file in the target folder,
flushed to disk, and moved over the target with :func:`os.replace`, which is atomic on POSIX and
Windows when both names are on one file system.
"""

from __future__ import annotations

import os
import stat
import tempfile
from collections.abc import Callable
from pathlib import Path

from ergodex.exceptions import DataError


def atomic_write_path(
    path: str | os.PathLike[str], write: Callable[[Path], object], *, make_folder: bool = True
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
    _refuse_special(target)
    try:
        if make_folder:
            folder.mkdir(parents=True, exist_ok=True)
        elif not folder.is_dir():
            raise DataError(f"{target}: the folder {folder} does not exist; create it first")
        fd, name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=folder)
    except OSError as exc:
        raise DataError(f"{target}: cannot write there ({exc.strerror or exc})") from None
    os.close(fd)
    tmp = Path(name)
    try:
        write(tmp)
        with open(tmp, "rb+") as handle:  # the content reaches the disk before the rename
            os.fsync(handle.fileno())
        os.chmod(tmp, 0o644)  # mkstemp makes owner-only files; give the result usual permissions
        os.replace(tmp, target)
    except OSError as exc:
        # a full disk or a vanished folder: the old file (if any) stays, the temporary one goes
        tmp.unlink(missing_ok=True)
        raise DataError(
            f"{target}: cannot write ({exc.strerror or exc}); nothing was changed"
        ) from None
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return target


def _refuse_special(target: Path) -> None:
    """An existing target must be a regular file (or a link): never replace a device or folder."""
    try:
        info = os.lstat(target)
    except (OSError, ValueError):
        return
    if stat.S_ISDIR(info.st_mode):
        raise DataError(f"{target}: is a folder; give a file name")
    if not (stat.S_ISREG(info.st_mode) or stat.S_ISLNK(info.st_mode)):
        raise DataError(f"{target}: is a device, pipe or socket; give a regular file name")


def check_writable(path: str | os.PathLike[str], what: str = "output") -> Path:
    """Refuse early an output that cannot be written, before hours of work are spent on it.

    The target must not be a folder or a special file, and a file must be creatable in its
    folder (or, when the folder is still to be made, in its nearest existing ancestor): a
    temporary probe file is created there and removed. Nothing is left behind.

    Raises
    ------
    DataError
        Naming ``what`` (e.g. ``--out``), the path and the reason.
    """
    target = Path(path)
    try:
        _refuse_special(target)
    except DataError as exc:
        raise DataError(f"{what} {exc}") from None
    if len(os.fsencode(target.name)) > 255:
        raise DataError(f"{what} {str(target)[:80]}...: the file name is longer than 255 bytes")
    probe = target.parent
    try:
        while not probe.exists() and probe != probe.parent:
            probe = probe.parent
        if not probe.is_dir():
            raise DataError(f"{what} {target}: {probe} is not a folder")
        fd, name = tempfile.mkstemp(prefix=f".{target.name[:100]}.", suffix=".probe", dir=probe)
    except (OSError, ValueError) as exc:
        reason = getattr(exc, "strerror", None) or exc
        raise DataError(f"{what} {target}: cannot write in {probe} ({reason})") from None
    os.close(fd)
    os.unlink(name)
    return target


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes, **kw) -> Path:
    """Write ``data`` to ``path`` atomically (see :func:`atomic_write_path`)."""
    return atomic_write_path(path, lambda tmp: tmp.write_bytes(data), **kw)


def atomic_write_text(path: str | os.PathLike[str], text: str, **kw) -> Path:
    """Write ``text`` as UTF-8 to ``path`` atomically (see :func:`atomic_write_path`)."""
    return atomic_write_bytes(path, text.encode("utf-8"), **kw)
