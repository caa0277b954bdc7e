"""The inbox folder on disk: its names, what counts as a dataset file, file signatures, and moves
that never overwrite (see the rules in :mod:`ergodex.watching`)."""

from __future__ import annotations

import hashlib
import itertools
import logging
import os
from pathlib import Path

log = logging.getLogger("ergodex.watching")  # one logger for the whole watcher (documented)

#: File name of the ledger inside the inbox folder (a dotfile, so the scan never picks it up).
LEDGER_NAME = ".ergodex-inbox.sqlite3"
#: The watcher's own work area inside the inbox: claimed files wait and are read here.
CLAIMED_FOLDER = ".ergodex-claimed"
#: Sub-folder for processed files and their decision records.
DONE_FOLDER = "done"
#: Sub-folder for files that could not be processed, each with ``<file>.error.txt``.
REJECTED_FOLDER = "rejected"
#: Name endings that mark a file still being written (ignored until renamed).
TEMPORARY_SUFFIXES: tuple[str, ...] = (
    ".part",
    ".partial",
    ".tmp",
    ".temp",
    ".crdownload",
    ".download",
    ".swp",
    ".lock",
    "~",
)
#: Seconds a file must stay unchanged before it is taken (a pause longer than a writer's
#: usual stall between two blocks; local copies and instrument exports stall far less).
DEFAULT_SETTLE = 5.0
#: Prefix of the folders that hold a file while it is being claimed (``.take-<pid>@<host>-<n>``).
_TAKE_PREFIX = ".take-"

Signature = tuple[int, int, int]  # (inode, size, mtime in ns)


def is_candidate_name(name: str) -> bool:
    """Whether a file name may be a finished dataset (not a dotfile, backup or temporary name)."""
    if not name or name.startswith((".", "~", "#")):
        return False
    lower = name.lower()
    return not lower.endswith(TEMPORARY_SUFFIXES)


def file_sha256(path: Path, chunk: int = 1 << 20) -> str:
    """Hex sha256 of a file's bytes, read in chunks so big files do not fill memory."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(chunk), b""):
            digest.update(block)
    return digest.hexdigest()


def _signature(st: os.stat_result) -> Signature:
    return (st.st_ino, st.st_size, st.st_mtime_ns)


def _unique_target(folder: Path, name: str) -> Path:
    """``folder/name``, or ``folder/<stem>.<n><suffix>`` when that name (or a record written beside
    it) is taken: nothing is ever overwritten."""
    stem, suffix = os.path.splitext(name)
    for n in itertools.count(1):
        target = folder / (name if n == 1 else f"{stem}.{n}{suffix}")
        beside = (target.with_name(target.name + end) for end in (".decision.json", ".error.txt"))
        if not target.exists() and not any(p.exists() for p in beside):
            return target
    raise AssertionError("unreachable")  # pragma: no cover


def _move_no_clobber(source: Path, folder: Path, name: str) -> Path | None:
    """Move ``source`` to a free name in ``folder`` (see :func:`_unique_target`).

    A hard link refuses an existing target, so two watchers can never overwrite each other's
    file; where links are not supported, a rename after the free-name check is used. Returns the
    new path, or ``None`` when ``source`` no longer exists.
    """
    folder.mkdir(parents=True, exist_ok=True)
    while True:
        target = _unique_target(folder, name)
        try:
            os.link(source, target)
        except FileExistsError:
            continue  # taken between the check and the link: pick the next free name
        except FileNotFoundError:
            return None
        except OSError:  # links not supported here
            try:
                os.rename(source, target)
            except FileNotFoundError:
                return None
            return target
        try:
            os.unlink(source)
        except FileNotFoundError:
            pass
        return target


def _remove_empty(folder: Path) -> None:
    try:
        folder.rmdir()
    except OSError:  # not empty, or gone already
        pass


def _take_owner(folder_name: str) -> str | None:
    """``host:pid`` from a take folder name ``.take-<pid>@<host>-<n>``."""
    body = folder_name[len(_TAKE_PREFIX) :].rpartition("-")[0]
    pid, _, host = body.partition("@")
    return f"{host}:{pid}" if pid.isdigit() and host else None


def _scan(folder: Path) -> dict[str, Signature]:
    """Candidate files in the inbox: name → (inode, size, mtime in ns); no sub-folders."""
    found: dict[str, Signature] = {}
    try:
        entries = list(os.scandir(folder))
    except OSError as exc:  # gone or unreadable for now: nothing to take this time
        log.warning("cannot list the inbox %s (%s); trying again at the next poll", folder, exc)
        return found
    for entry in entries:
        if not is_candidate_name(entry.name):
            continue
        try:
            if not entry.is_file(follow_symlinks=False):
                continue
            st = entry.stat(follow_symlinks=False)
        except OSError:  # renamed away between listing and stat, or not ours to read
            continue
        found[entry.name] = _signature(st)
    return found


def _changed(path: Path, sig: Signature) -> bool:
    """Whether a claimed file is no longer what was hashed (written to, or gone)."""
    try:
        return _signature(path.stat()) != sig
    except FileNotFoundError:
        return True


def _write_note(target: Path, error: str) -> None:
    try:
        target.with_name(target.name + ".error.txt").write_text(error + "\n", encoding="utf-8")
    except OSError as exc:
        log.error("could not write the error note beside %s: %s", target, exc)
