"""The inbox ledger: which file (name + sha256) was handled how, in SQLite beside the files.

One row per file *name + content*; :meth:`Ledger.claim` decides in one ``BEGIN IMMEDIATE``
transaction whether a watcher runs a file, leaves it to another live watcher, or skips it as
handled before, so two watchers on one folder never both run it. A rejection records its reason
(:data:`REASONS`) and the fingerprint of the settings it was rejected under, so that
:func:`should_retry` can tell a file worth trying again (the settings changed) from one that is
not (the same bad bytes). Used by :mod:`ergodex.watching`.
"""

from __future__ import annotations

import os
import socket
import sqlite3
from pathlib import Path
from typing import Any

from ergodex.processes import pid_alive
from ergodex.timestamps import utc_now

#: Attempts (including ones cut short by a crash) before a file is moved aside for good.
MAX_ATTEMPTS = 2
#: Why a file was rejected, and when it is tried again.
REASONS: dict[str, str] = {
    "data": "bad data: the file cannot be read as a dataset; this content is not retried",
    "settings": "does not fit the watcher's settings (model, holdout, fit or check settings, "
    "registry); retried when a watcher starts with other settings",
    "internal": "unexpected error; retried when a watcher starts with other settings",
    "interrupted": f"a crash cut the retrain short {MAX_ATTEMPTS} times; retried on request",
    "vanished": "the claimed copy disappeared; retried when the file is dropped again",
    "changed": "the file was still being written after it was claimed; it went back into the "
    "inbox to settle again",
}

_LEDGER_SCHEMA = """
CREATE TABLE IF NOT EXISTS inbox_files (
    file_name  TEXT NOT NULL,
    size       INTEGER NOT NULL,
    sha256     TEXT NOT NULL,
    model_name TEXT NOT NULL,
    state      TEXT NOT NULL CHECK (state IN ('processing', 'done', 'rejected')),
    attempts   INTEGER NOT NULL DEFAULT 0,
    outcome    TEXT,
    exit_code  INTEGER,
    error      TEXT,
    moved_to   TEXT,
    owner      TEXT,
    first_seen TEXT NOT NULL,
    updated    TEXT NOT NULL,
    reason     TEXT,
    settings_fingerprint TEXT,
    claimed_path TEXT,
    PRIMARY KEY (file_name, size, sha256)
)
"""
# The key is name + sha256 (the size follows from the bytes; it stays in the primary key so that
# ledgers written before need no rebuild).
#: Columns added after the first ledger format; an older ledger gains them when opened.
_ADDED_COLUMNS = {"reason": "TEXT", "settings_fingerprint": "TEXT", "claimed_path": "TEXT"}


class Ledger:
    """The inbox's memory of which files were handled (SQLite, one row per name + content).

    Parameters
    ----------
    path : path-like
        The SQLite file, normally ``<inbox>/.ergodex-inbox.sqlite3``.
    """

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.path = Path(path)
        # isolation_level=None: we open our own transactions (BEGIN IMMEDIATE) so that two
        # watchers on one folder cannot both claim a file.
        self._conn = sqlite3.connect(self.path, timeout=30.0, isolation_level=None)
        self._conn.row_factory = sqlite3.Row
        self._conn.execute("BEGIN IMMEDIATE")
        try:
            self._conn.execute(_LEDGER_SCHEMA)
            have = {row["name"] for row in self._conn.execute("PRAGMA table_info(inbox_files)")}
            for column, kind in _ADDED_COLUMNS.items():
                if column not in have:  # a ledger written before these columns existed
                    self._conn.execute(f"ALTER TABLE inbox_files ADD COLUMN {column} {kind}")
            self._conn.execute("COMMIT")
        except BaseException:
            self._conn.execute("ROLLBACK")
            self._conn.close()
            raise

    def close(self) -> None:
        self._conn.close()

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def get(self, file_name: str, sha256: str) -> sqlite3.Row | None:
        """The ledger row of a file key (name + content), or ``None`` if it was never seen."""
        return self._conn.execute(
            "SELECT * FROM inbox_files WHERE file_name=? AND sha256=?", (file_name, sha256)
        ).fetchone()

    def claim(
        self,
        file_name: str,
        size: int,
        sha256: str,
        model_name: str,
        *,
        settings_fingerprint: str | None = None,
        claimed_path: str | None = None,
        retry_rejected: bool = False,
    ) -> tuple[str, sqlite3.Row | None]:
        """Decide, in one transaction, what to do with a file, and claim it when it is to be run.

        Returns ``(verdict, row before)``; the verdict is one of ``"go"`` (claimed by this
        process, attempt counted), ``"busy"`` (another live watcher on this machine is running
        it), ``"done"`` or ``"rejected"`` (handled before: not run again), ``"exhausted"``
        (interrupted :data:`MAX_ATTEMPTS` times already).
        """
        conn = self._conn
        me = _owner()
        conn.execute("BEGIN IMMEDIATE")
        try:
            row = self.get(file_name, sha256)
            verdict = claim_verdict(row, settings_fingerprint, retry_rejected)
            now = utc_now()
            if verdict == "go" and row is None:
                conn.execute(
                    "INSERT INTO inbox_files (file_name, size, sha256, model_name, state, attempts,"
                    " owner, first_seen, updated, settings_fingerprint, claimed_path)"
                    " VALUES (?, ?, ?, ?, 'processing', 1, ?, ?, ?, ?, ?)",
                    (
                        file_name,
                        size,
                        sha256,
                        model_name,
                        me,
                        now,
                        now,
                        settings_fingerprint,
                        claimed_path,
                    ),
                )
            elif verdict == "go":
                assert row is not None  # the branch above took the new file
                # A retried rejection starts its attempts afresh; a crashed attempt counts.
                attempts = 1 if row["state"] == "rejected" else row["attempts"] + 1
                conn.execute(
                    "UPDATE inbox_files SET state='processing', attempts=?, owner=?, model_name=?,"
                    " settings_fingerprint=?, claimed_path=?, outcome=NULL, exit_code=NULL,"
                    " error=NULL, reason=NULL, moved_to=NULL, updated=?"
                    " WHERE file_name=? AND sha256=?",
                    (
                        attempts,
                        me,
                        model_name,
                        settings_fingerprint,
                        claimed_path,
                        now,
                        file_name,
                        sha256,
                    ),
                )
            conn.execute("COMMIT")
        except BaseException:
            conn.execute("ROLLBACK")
            raise
        return verdict, row

    def release(self, file_name: str, sha256: str) -> None:
        """Give back this process's claim on a file it stopped working on (not counted)."""
        self._conn.execute(
            "UPDATE inbox_files SET attempts=MAX(attempts-1, 0), owner=NULL, updated=?"
            " WHERE file_name=? AND sha256=? AND state='processing' AND owner=?",
            (utc_now(), file_name, sha256, _owner()),
        )

    def finish(
        self,
        file_name: str,
        sha256: str,
        *,
        state: str,
        outcome: str | None = None,
        exit_code: int | None = None,
        error: str | None = None,
        moved_to: str | None = None,
        reason: str | None = None,
    ) -> None:
        """Record the final state of a file (``done`` or ``rejected``)."""
        self._conn.execute(
            "UPDATE inbox_files SET state=?, outcome=?, exit_code=?, error=?, moved_to=?, reason=?,"
            " updated=? WHERE file_name=? AND sha256=?",
            (state, outcome, exit_code, error, moved_to, reason, utc_now(), file_name, sha256),
        )

    def rows(self) -> list[dict[str, Any]]:
        """Every row, oldest first (for inspection and tests)."""
        cursor = self._conn.execute("SELECT * FROM inbox_files ORDER BY first_seen, file_name")
        return [dict(row) for row in cursor.fetchall()]


def should_retry(row: Any, fingerprint: str | None, retry_rejected: bool = False) -> bool:
    """Whether a rejected file is tried again (see :data:`REASONS`)."""
    if retry_rejected:
        return True
    reason = row["reason"]
    if reason in ("vanished", "changed"):
        return True
    if reason in ("settings", "internal"):
        return fingerprint is not None and row["settings_fingerprint"] != fingerprint
    return False  # bad data, interrupted too often, or a rejection from an older ledger


def claim_verdict(row: Any, fingerprint: str | None, retry_rejected: bool = False) -> str:
    """What a watcher does with a file whose ledger row is ``row`` (see :meth:`Ledger.claim`)."""
    if row is None:
        return "go"
    if row["state"] == "processing":
        if owner_is_alive_elsewhere(row["owner"]):
            return "busy"
        return "exhausted" if row["attempts"] >= MAX_ATTEMPTS else "go"
    if row["state"] == "rejected" and should_retry(row, fingerprint, retry_rejected):
        return "go"
    return row["state"]


def _owner() -> str:
    """``host:pid`` of this process, stored with a claim."""
    return f"{socket.gethostname()}:{os.getpid()}"


def owner_is_alive_elsewhere(owner: str | None) -> bool:
    """Whether ``owner`` (``host:pid``) is another process on this host that is still running.

    A claim by a live process elsewhere means another watcher is retraining on that file now;
    a claim by a dead process (or by this one, from a loop that stopped mid-file) is stale.
    Claims from other hosts cannot be checked and count as stale.
    """
    if not owner or ":" not in owner:
        return False
    host, _, pid_text = owner.rpartition(":")
    if host != socket.gethostname() or not pid_text.isdigit():
        return False
    pid = int(pid_text)
    if pid == os.getpid():
        return False
    return pid_alive(pid)
