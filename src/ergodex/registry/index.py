"""The SQLite index of a registry home: schema and forward migrations, connections, WAL, writes.

One connection is kept per process and thread; a forked child opens its own (SQLite forbids
using a connection across fork). Every write is one ``BEGIN IMMEDIATE`` transaction.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import socket
import sqlite3
import threading
import time
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Self

from ergodex.exceptions import RegistryError
from ergodex.registry.names import format_ref
from ergodex.registry.records import VersionInfo
from ergodex.registry.storage import (
    INDEX_FILE,
    QUARANTINE_DIR,
    STAGING_DIR,
    STATUS_FILE,
    STATUS_FORMAT,
    _actor,
    _fsync_dir,
    _now,
)

# One logger for every registry decision, whichever module takes it.
log = logging.getLogger("ergodex.registry")


BUSY_TIMEOUT_MS = 60_000

_WAL_SWITCH_SECONDS = 30.0

# Index connections inherited through fork, kept alive so that they are never closed in the child.
_INHERITED_CONNECTIONS: list[sqlite3.Connection] = []


# Forward migrations: schema version -> statements. Applied in order inside one write transaction;
# never edit a published entry, append a new one.
MIGRATIONS: dict[int, tuple[str, ...]] = {
    1: (
        "CREATE TABLE IF NOT EXISTS schema_version (version INTEGER NOT NULL)",
        """CREATE TABLE models (
               name TEXT PRIMARY KEY,
               folded TEXT NOT NULL UNIQUE,
               created TEXT NOT NULL)""",
        """CREATE TABLE versions (
               name TEXT NOT NULL REFERENCES models(name),
               version INTEGER NOT NULL CHECK (version >= 1),
               status TEXT NOT NULL
                   CHECK (status IN ('candidate', 'accepted', 'rejected', 'retired')),
               created TEXT NOT NULL,
               note TEXT NOT NULL DEFAULT '',
               parent TEXT,
               datasets TEXT NOT NULL DEFAULT '[]',
               verdict TEXT,
               data_fingerprint TEXT,
               model_fingerprint TEXT,
               scorecard_model_fingerprint TEXT,
               PRIMARY KEY (name, version))""",
        """CREATE TABLE artifacts (
               name TEXT NOT NULL,
               version INTEGER NOT NULL,
               filename TEXT NOT NULL,
               sha256 TEXT NOT NULL,
               size INTEGER NOT NULL,
               PRIMARY KEY (name, version, filename),
               FOREIGN KEY (name, version) REFERENCES versions(name, version))""",
        """CREATE TABLE events (
               id INTEGER PRIMARY KEY AUTOINCREMENT,
               time TEXT NOT NULL,
               name TEXT NOT NULL,
               version INTEGER NOT NULL,
               event TEXT NOT NULL,
               from_status TEXT,
               to_status TEXT,
               actor TEXT NOT NULL,
               reason TEXT NOT NULL DEFAULT '',
               override INTEGER NOT NULL DEFAULT 0)""",
        "CREATE INDEX events_by_version ON events (name, version)",
    ),
    # References became NAME/VERSION: rewrite the parents stored as NAME@VERSION (a name never
    # holds '@' or '/', so the one '@' of a reference is its separator).
    2: ("UPDATE versions SET parent = replace(parent, '@', '/') WHERE parent LIKE '%@%'",),
}

SCHEMA_VERSION = max(MIGRATIONS)


class _CorruptIndex(Exception):
    """The index file is not a readable SQLite database (recovery moves it aside)."""


def _is_corruption(exc: sqlite3.DatabaseError) -> bool:
    text = str(exc).lower()
    if isinstance(exc, sqlite3.OperationalError) and ("locked" in text or "busy" in text):
        return False
    return "not a database" in text or "malformed" in text or "corrupt" in text


def _log_status(name: str, version: int, old: str | None, new: str, reason: str) -> None:
    """One line on the ``ergodex.registry`` logger per committed status decision."""
    log.info(
        "%s: %s -> %s (%s)",
        format_ref(name, version),
        old or "new",
        new,
        reason or "no reason given",
    )


class RegistryIndex:
    """The index of a registry home: its SQLite connections, schema, write lock and row helpers.

    The other parts of :class:`~ergodex.registry.Registry` (recovery, registration, queries,
    status changes, export and import) build on these; ``status.json`` is written here because
    it mirrors the index rows of one version and changes inside the same write transaction.
    """

    home: Path
    index_path: Path
    _connections: dict[tuple[int, int], sqlite3.Connection]

    def _reconcile(self) -> list[Path]:
        """Index version folders that the index lacks (provided by the recovery part)."""
        raise NotImplementedError

    @contextlib.contextmanager
    def _connect(self, *, create: bool = False) -> Iterator[sqlite3.Connection | None]:
        """Yield a connection (autocommit mode; callers open transactions), or None if no index.

        One connection is kept per process and thread (closing the last connection to a WAL
        index checkpoints it, which would cost every call several milliseconds); a forked child
        opens its own, as SQLite requires.
        """
        key = (os.getpid(), threading.get_ident())
        conn = self._connections.get(key)
        if conn is None:
            self._drop_inherited()
            new_index = not self.index_path.exists()
            if new_index:
                if not create:
                    yield None
                    return
                if self.home.exists() and not self.home.is_dir():
                    raise RegistryError(f"registry home {self.home} exists and is not a folder")
                self.home.mkdir(parents=True, exist_ok=True)
            try:
                conn = self._open()
            except _CorruptIndex as exc:
                self._quarantine_index(str(exc))
                new_index = True
                conn = self._open()
            self._connections[key] = conn
            if new_index:
                # A new index beside existing version folders: index them from their records.
                self._reconcile()
        try:
            yield conn
        except sqlite3.DatabaseError as exc:
            raise RegistryError(
                f"registry index {self.index_path} cannot be used: {exc}; if another program "
                "wrote this file it is not an ergodex registry"
            ) from exc

    @staticmethod
    def _live(conn: sqlite3.Connection | None) -> sqlite3.Connection:
        """The connection of an index known to exist (created, or checked by the caller)."""
        assert conn is not None, "registry index is not open"
        return conn

    def _open(self) -> sqlite3.Connection:
        conn = sqlite3.connect(
            self.index_path,
            timeout=BUSY_TIMEOUT_MS / 1000,
            isolation_level=None,
            check_same_thread=False,
        )
        try:
            conn.row_factory = sqlite3.Row
            conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
            self._set_wal(conn)
            # FULL: a committed version survives a power cut, not only a process crash.
            conn.execute("PRAGMA synchronous = FULL")
            conn.execute("PRAGMA foreign_keys = ON")
            self._migrate(conn)
            if conn.execute("PRAGMA quick_check").fetchone()[0] != "ok":
                raise sqlite3.DatabaseError("database disk image is malformed (quick_check)")
        except sqlite3.DatabaseError as exc:
            conn.close()
            if _is_corruption(exc):
                raise _CorruptIndex(str(exc)) from exc
            raise RegistryError(
                f"registry index {self.index_path} cannot be used: {exc}; if another program "
                "wrote this file it is not an ergodex registry"
            ) from exc
        except BaseException:
            conn.close()
            raise
        return conn

    def _quarantine_index(self, problem: str) -> None:
        """Move a corrupt index (and its WAL files) aside; the folders rebuild a new one."""
        for suffix in ("-wal", "-shm", "-journal", ""):
            path = self.home / (INDEX_FILE + suffix)
            if path.exists():
                target = self._quarantine(path, INDEX_FILE + suffix)
                log.warning(
                    "registry index file %s is corrupt (%s): moved to %s; a new index "
                    "is built from the version folders",
                    path,
                    problem,
                    target,
                )

    def _drop_inherited(self) -> None:
        # Connections made by the parent of a fork must be neither used nor closed here: closing
        # one would drop this process's POSIX locks on the index (SQLite documentation, "How To
        # Corrupt An SQLite Database File": carrying a connection across fork). Keep them
        # referenced for the life of the process instead.
        pid = os.getpid()
        for key in [k for k in self._connections if k[0] != pid]:
            _INHERITED_CONNECTIONS.append(self._connections.pop(key))

    def close(self) -> None:
        """Close this process's open index connections (they are reopened when needed)."""
        pid = os.getpid()
        for key in [k for k in self._connections if k[0] == pid]:
            self._connections.pop(key).close()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    @staticmethod
    def _set_wal(conn: sqlite3.Connection) -> None:
        # Switching to WAL needs a moment of exclusive access; busy_timeout does not always cover
        # it when many processes open a new index at once, so retry briefly, with a short wait
        # per try and an overall deadline (an index emptied or replaced while another process
        # holds it open stays locked: say so instead of waiting for ever).
        deadline = time.monotonic() + _WAL_SWITCH_SECONDS
        conn.execute("PRAGMA busy_timeout = 500")
        try:
            attempt = 0
            while True:
                try:
                    mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
                    if mode.lower() == "wal":
                        return
                except sqlite3.OperationalError as exc:
                    if "locked" not in str(exc) and "busy" not in str(exc):
                        raise
                if time.monotonic() > deadline:
                    break
                time.sleep(0.01 * (1 + attempt % 10))
                attempt += 1
        finally:
            conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
        raise RegistryError(
            "could not switch the registry index to WAL mode: the index is busy. If it was "
            "emptied or replaced while another process (e.g. 'ergodex serve') had it open, stop "
            "that process and try again"
        )

    def _migrate(self, conn: sqlite3.Connection) -> None:
        current = self._schema_version(conn)
        if current == SCHEMA_VERSION:
            return
        if current > SCHEMA_VERSION:
            raise RegistryError(
                f"registry index {self.index_path} has schema version {current}, newer than this "
                f"ergodex understands ({SCHEMA_VERSION}); upgrade ergodex"
            )
        with self._write(conn):
            current = self._schema_version(conn)  # another process may have migrated meanwhile
            for target in sorted(v for v in MIGRATIONS if v > current):
                for statement in MIGRATIONS[target]:
                    conn.execute(statement)
                conn.execute("DELETE FROM schema_version")
                conn.execute("INSERT INTO schema_version (version) VALUES (?)", (target,))

    @staticmethod
    def _schema_version(conn: sqlite3.Connection) -> int:
        has_table = conn.execute(
            "SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = 'schema_version'"
        ).fetchone()
        if not has_table:
            return 0
        row = conn.execute("SELECT MAX(version) FROM schema_version").fetchone()
        return int(row[0] or 0)

    @staticmethod
    @contextlib.contextmanager
    def _write(conn: sqlite3.Connection) -> Iterator[None]:
        """One write transaction: BEGIN IMMEDIATE takes the write lock at once (no upgrade race)."""
        conn.execute("BEGIN IMMEDIATE")
        try:
            yield
        except BaseException:
            conn.execute("ROLLBACK")
            raise
        else:
            conn.execute("COMMIT")

    def _quarantine(self, path: Path, label: str) -> Path | None:
        """Move ``path`` to ``<home>/.quarantine/<UTC time>-<label>``; None if it vanished."""
        root = self.home / QUARANTINE_DIR
        root.mkdir(exist_ok=True)
        stamp = _now().replace(":", "").replace("-", "")
        target = root / f"{stamp}-{label}"
        suffix = 1
        while target.exists():
            suffix += 1
            target = root / f"{stamp}-{label}.{suffix}"
        try:
            os.rename(path, target)
        except FileNotFoundError:
            return None
        _fsync_dir(root)
        return target

    def _staging_entry(self) -> Path:
        """A new, unique path under ``.staging`` that names its owner (pid, host) for the sweep."""
        staging_root = self.home / STAGING_DIR
        staging_root.mkdir(exist_ok=True)
        return staging_root / f"{os.getpid()}.{uuid.uuid4().hex}.{socket.gethostname()}"

    def _status_bytes(
        self, conn: sqlite3.Connection, name: str, version: int, *, committed: bool
    ) -> bytes:
        row = self._row(conn, name, version)
        assert row is not None, "a status is written only for an indexed version"
        record_hash = conn.execute(
            "SELECT sha256 FROM artifacts WHERE name = ? AND version = ? AND filename = ?",
            (name, version, "record.json"),
        ).fetchone()
        events = [
            {
                "time": r["time"],
                "event": r["event"],
                "from_status": r["from_status"],
                "to_status": r["to_status"],
                "actor": r["actor"],
                "reason": r["reason"],
                "override": bool(r["override"]),
            }
            for r in conn.execute(
                "SELECT * FROM events WHERE name = ? AND version = ? ORDER BY time, id",
                (name, version),
            )
        ]
        payload = {
            "format": STATUS_FORMAT,
            "name": name,
            "version": version,
            "status": row["status"],
            "committed": committed,
            "record_sha256": record_hash[0] if record_hash else None,
            "events": events,
        }
        return (json.dumps(payload, indent=2, sort_keys=True) + "\n").encode()

    def _write_status(
        self,
        conn: sqlite3.Connection,
        name: str,
        version: int,
        *,
        committed: bool,
        folder: Path | None = None,
    ) -> None:
        """Atomically replace the folder's ``status.json`` with the index's view of the version.

        Called while holding the write lock, so the folder and the index change together.
        """
        folder = folder or self.home / name / str(version)
        data = self._status_bytes(conn, name, version, committed=committed)
        temp = self._staging_entry()
        with open(temp, "xb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        try:
            os.replace(temp, folder / STATUS_FILE)
        except BaseException:
            with contextlib.suppress(OSError):
                os.unlink(temp)
            raise
        _fsync_dir(folder)

    @staticmethod
    def _claim_name(conn: sqlite3.Connection, name: str, created: str) -> None:
        # Names differing only in case would share one folder on case-insensitive filesystems.
        row = conn.execute(
            "SELECT name FROM models WHERE folded = ?", (name.casefold(),)
        ).fetchone()
        if row is None:
            conn.execute(
                "INSERT INTO models (name, folded, created) VALUES (?, ?, ?)",
                (name, name.casefold(), created),
            )
        elif row["name"] != name:
            raise RegistryError(
                f"model name {name!r} differs only in letter case from the registered "
                f"{row['name']!r}; use {row['name']!r} or a distinct name"
            )

    @staticmethod
    def _insert_event(conn, name, version, event, from_status, to_status, reason, override) -> None:
        conn.execute(
            """INSERT INTO events (time, name, version, event, from_status, to_status, actor,
                   reason, override) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)""",
            (
                _now(),
                name,
                version,
                event,
                from_status,
                to_status,
                _actor(),
                reason or "",
                int(bool(override)),
            ),
        )

    @staticmethod
    def _row(conn, name: str, version: int | None) -> sqlite3.Row | None:
        return conn.execute(
            "SELECT * FROM versions WHERE name = ? AND version = ?", (name, version)
        ).fetchone()

    def _info_from_row(self, conn, row: sqlite3.Row) -> VersionInfo:
        artifacts = {
            r["filename"]: r["sha256"]
            for r in conn.execute(
                "SELECT filename, sha256 FROM artifacts WHERE name = ? AND version = ? "
                "ORDER BY filename",
                (row["name"], row["version"]),
            )
        }
        return VersionInfo(
            name=row["name"],
            version=int(row["version"]),
            status=row["status"],
            created=row["created"],
            artifacts=artifacts,
            folder=self.home / row["name"] / str(row["version"]),
            note=row["note"],
            parent=row["parent"],
            datasets=json.loads(row["datasets"]),
            verdict=row["verdict"],
            data_fingerprint=row["data_fingerprint"],
            model_fingerprint=row["model_fingerprint"],
            scorecard_model_fingerprint=row["scorecard_model_fingerprint"],
        )

    def _info(self, conn, name: str, version: int) -> VersionInfo:
        row = self._row(conn, name, version)
        if row is None:  # pragma: no cover - callers check first
            raise RegistryError(
                f"{format_ref(name, version)} is not in the registry at {self.home}"
            )
        return self._info_from_row(conn, row)
