"""A versioned, content-checked registry of surrogates: an SQLite index plus one folder per version.

Downstream users load "the accepted surrogate for X" and must receive exactly the bytes that passed
the check, with the evidence beside them. Teams register from scripts and schedulers at the same
time. So the registry guarantees:

* **Immutability.** The files of a version folder ``<home>/<name>/<version>/`` are written once
  and never changed: ``model.json`` and ``record.json`` (always), and ``scorecard.json``,
  ``report.html``, ``fit-settings.json`` (or ``.toml``) and ``evidence.npz`` when given. Beside
  them, ``status.json`` is the folder's own status record (name, version, status, every event,
  the sha256 of ``record.json``, a ``committed`` flag); it is the one file that changes, replaced
  atomically inside the same write transaction as every status change or event.
* **Integrity.** The sha256 of every file is stored in the index (and in ``record.json``) and
  checked on every load; a changed byte raises :class:`~ergodex.exceptions.IntegrityError` naming
  the file, the expected and the actual hash. Reads that show a status or a verdict
  (:meth:`Registry.get`, :meth:`Registry.versions`, :meth:`Registry.list_models`) hash every file
  too and mark a changed version ``integrity="failed"`` instead of raising.
* **Concurrency.** Version numbers are handed out inside one ``BEGIN IMMEDIATE`` transaction, so
  several processes registering the same name at once receive 1, 2, 3, … with no gap or repeat.
* **Crash safety.** Files are first written (and fsynced) into ``<home>/.staging/<entry>/``; then,
  inside one write transaction, the next number is chosen, the staging folder is renamed to
  ``<home>/<name>/<version>/`` and the version is indexed; the commit is the moment the version
  exists, and the folder's ``status.json`` is then marked committed. A process killed before the
  commit leaves a staging entry or an uncommitted folder; neither is ever visible, and both are
  *moved* to ``<home>/.quarantine/`` when a :class:`Registry` is next opened.
* **Recovery, never deletion.** Opening a registry compares the index with the folders' own
  records. A committed folder the index lacks, or knows only in an older state (fewer events),
  is indexed again from ``record.json`` and ``status.json`` (a ``recovered`` event is added and a
  warning logged): this rebuilds a missing, emptied or older index, and a corrupt index file is
  moved to the quarantine and replaced by a rebuilt one. A numbered folder without a valid record
  under a model's folder is quarantined. Nothing under the home is ever deleted by a read.
* **One accepted version per name.** Accepting a version retires the previously accepted one in
  the same transaction (event ``retired``, reason ``replaced by version N``), so ``load(name)``
  has exactly one candidate to return.
* **No code execution.** Everything is JSON, HTML or NPZ without object arrays; nothing is
  unpickled, so a registry copied from someone else can be loaded safely.

The home must be on a local filesystem: SQLite's WAL mode needs shared memory between the
processes that open the index, which network filesystems do not provide reliably.

Version numbers
---------------
Version numbers are never reused or lost (docs/formats.md, "Registry home"). Here a number is
*taken* only by the commit that makes the version visible: the number, the rename and the index
rows are one transaction. A crashed registration therefore never consumed a number, and the next
registration receives the number the crashed one would have had — a number nobody ever saw.
Committed numbers are never deleted, so a number is never reused, and there are no gaps to explain.
The next number is one past both the index's highest and the highest numbered folder on disk, so
even a lost index cannot make a registration overwrite an existing version. (The alternative,
reserving a number before writing the files, would leave a gap for every crash and need a status
for reserved but abandoned numbers.)

Statuses (docs/formats.md)
--------------------------
``candidate`` → ``accepted`` | ``rejected``; ``accepted`` → ``retired`` (by hand, or when another
version of the name is accepted). Accepting needs a
passing scorecard computed on data whose fingerprint is recorded (and, when the scorecard names the
model's fingerprint, computed on this very model); otherwise it is refused unless
``override=True`` with a non-empty reason, and the override is marked in the history. Every status
change, and every :meth:`Registry.record_event`, is an event with time (UTC), actor (the
environment's user name) and reason.
"""

from __future__ import annotations

import os
import sqlite3
from pathlib import Path

from ergodex.registry.index import log
from ergodex.registry.recovery import RecoveryMixin
from ergodex.registry.status import StatusMixin
from ergodex.registry.storage import INDEX_FILE
from ergodex.registry.transfer import TransferMixin


class Registry(RecoveryMixin, StatusMixin, TransferMixin):
    """The registry at ``home``: list, register, load, promote and export surrogates.

    Parameters
    ----------
    home : str or path-like, optional
        The registry folder. Default: ``$ERGODEX_HOME`` if set, else ``./models`` relative to the
        current folder. Created on the first write; reading a missing home finds no models.

    Notes
    -----
    Opening a registry recovers (:meth:`sweep`): leftovers of killed registrations are moved to
    ``.quarantine/`` (nothing is ever deleted), and a missing, empty, corrupt or older index is
    rebuilt from the version folders' own records, with a warning. SQLite connections are kept
    per process and thread, so a ``Registry`` may be shared by threads and survives a fork.
    Versions are read through the index, which recovery keeps in step with the folders.
    """

    def __init__(self, home: str | os.PathLike[str] | None = None) -> None:
        if home is None:
            home = os.environ.get("ERGODEX_HOME") or "models"
        self.home = Path(home).expanduser().absolute()
        self.index_path = self.home / INDEX_FILE
        self._connections: dict[tuple[int, int], sqlite3.Connection] = {}
        if self.home.is_dir():
            try:
                self.sweep()
            except OSError as exc:  # e.g. a read-only copy of a registry: still readable
                log.warning(
                    "registry %s could not be checked against its folders: %s", self.home, exc
                )

    def __repr__(self) -> str:
        return f"Registry({str(self.home)!r})"
