"""Recovery: rebuild the index from the version folders' own records, quarantine leftovers."""

from __future__ import annotations

import contextlib
import json
import socket
import sqlite3
import time
from dataclasses import dataclass
from pathlib import Path

from ergodex.exceptions import RegistryError
from ergodex.processes import pid_alive
from ergodex.registry.index import RegistryIndex, _log_status, log
from ergodex.registry.names import format_ref, upgrade_ref, validate_name
from ergodex.registry.records import STATUSES
from ergodex.registry.storage import (
    OLD_RECORD_FORMATS,
    RECORD_FORMAT,
    STAGING_DIR,
    STATUS_FILE,
    STATUS_FORMAT,
    _now,
    sha256_hex,
)

# Staging entries whose owner cannot be checked (another machine, a reused pid) are removed only
# when this old. No registration takes a day.
_STALE_STAGING_AGE = 24 * 3600.0


@dataclass
class _FolderState:
    """What one numbered folder says about itself: its ``record.json`` and ``status.json``."""

    name: str
    version: int
    folder: Path
    record: dict | None
    record_bytes: bytes | None
    status: dict | None

    @property
    def events(self) -> list[dict]:
        events = (self.status or {}).get("events")
        return [e for e in events if isinstance(e, dict)] if isinstance(events, list) else []

    @classmethod
    def read(cls, name: str, version: int, folder: Path) -> _FolderState:
        record = status = record_bytes = None
        with contextlib.suppress(OSError, ValueError):
            record_bytes = (folder / "record.json").read_bytes()
            candidate = json.loads(record_bytes)
            if (
                isinstance(candidate, dict)
                and candidate.get("format") in (RECORD_FORMAT, *OLD_RECORD_FORMATS)
                and candidate.get("name") == name
            ):
                record = candidate
        with contextlib.suppress(OSError, ValueError):
            candidate = json.loads((folder / STATUS_FILE).read_bytes())
            if (
                isinstance(candidate, dict)
                and candidate.get("format") == STATUS_FORMAT
                and candidate.get("name") == name
                and candidate.get("version") == version
            ):
                status = candidate
        return cls(name, version, folder, record, record_bytes, status)


class RecoveryMixin(RegistryIndex):
    """Bring the index and the version folders into agreement (never deletes anything)."""

    def sweep(self) -> list[Path]:
        """Bring the index and the version folders into agreement; return what was quarantined.

        Nothing is ever deleted. Staging entries of dead writers (their process, named in the
        entry, is gone on this machine, or the entry is a day old) and version folders the
        registry cannot account for are *moved* to ``<home>/.quarantine/``. A version folder whose
        own record says it was committed but that the index lacks (or knows only an older state
        of) is indexed again from that record, with a warning: the index was lost, emptied,
        restored from an older copy or replaced after corruption.
        """
        moved: list[Path] = []
        staging = self.home / STAGING_DIR
        if staging.is_dir():
            host = socket.gethostname()
            for entry in staging.iterdir():
                pid_text, _, rest = entry.name.partition(".")
                _, _, entry_host = rest.partition(".")
                try:
                    pid = int(pid_text)
                except ValueError:
                    pid = -1
                try:
                    # No registration takes a day; this also covers a pid reused by another
                    # program and entries written by another machine sharing the folder.
                    stale = time.time() - entry.stat().st_mtime > _STALE_STAGING_AGE
                except OSError:  # moved meanwhile
                    continue
                if stale or (entry_host == host and pid > 0 and not pid_alive(pid)):
                    target = self._quarantine(entry, "staging")
                    if target is not None:
                        log.info(
                            "moved the leftover of a killed registration %s to %s", entry, target
                        )
                        moved.append(target)
        moved.extend(self._reconcile())
        return moved

    def recover(self) -> list[Path]:
        """Public name of :meth:`sweep`: repair the index from the folders' own records."""
        return self.sweep()

    def _scan_folders(self) -> list[_FolderState]:
        """Every numbered folder under every folder that looks like a model name (no lock)."""
        found: list[_FolderState] = []
        if not self.home.is_dir():
            return found
        for name_dir in sorted(self.home.iterdir()):
            if name_dir.name.startswith(".") or not name_dir.is_dir():
                continue
            try:
                validate_name(name_dir.name)
            except RegistryError:
                continue
            for version_dir in sorted(name_dir.iterdir(), key=lambda p: (len(p.name), p.name)):
                text = version_dir.name
                if not text.isdigit() or text != str(int(text)) or not version_dir.is_dir():
                    continue
                found.append(_FolderState.read(name_dir.name, int(text), version_dir))
        return found

    def _index_state(self, conn: sqlite3.Connection) -> dict[tuple[str, int], tuple[str, int]]:
        """(name, version) -> (status, number of events) for every indexed version."""
        counts = {
            (r[0], int(r[1])): int(r[2])
            for r in conn.execute(
                "SELECT name, version, COUNT(*) FROM events GROUP BY name, version"
            )
        }
        rows = conn.execute("SELECT name, version, status FROM versions").fetchall()
        return {
            (r["name"], int(r["version"])): (
                r["status"],
                counts.get((r["name"], int(r["version"])), 0),
            )
            for r in rows
        }

    def _plan(
        self, conn: sqlite3.Connection, folders: list[_FolderState]
    ) -> list[tuple[str, _FolderState]]:
        """What each folder needs: 'reindex', 'mark' (write its status record) or 'quarantine'."""
        indexed = self._index_state(conn)
        names = {r[0] for r in conn.execute("SELECT name FROM models")}
        ours = names | {f.name for f in folders if f.record is not None}
        plan = []
        for f in folders:
            known = indexed.get((f.name, f.version))
            if f.record is None:
                # Not written by this registry (or its record is gone): never indexed from here.
                if known is None and f.name in ours:
                    plan.append(("quarantine", f))
                continue
            if f.status is None:  # written before folders carried a status record
                plan.append(("mark", f) if known else ("reindex", f))
            elif known is None:
                plan.append(("reindex", f) if f.status.get("committed") else ("quarantine", f))
            elif len(f.events) > known[1]:
                plan.append(("reindex", f))  # the index is older than the folder
            elif (
                not f.status.get("committed")
                or len(f.events) < known[1]
                or f.status.get("status") != known[0]
            ):
                plan.append(("mark", f))  # the folder lags: a writer died after its commit
        return plan

    def _reconcile(self) -> list[Path]:
        folders = self._scan_folders()
        if not folders:
            return []
        with self._connect(create=True) as conn:
            conn = self._live(conn)  # create=True always yields a connection
            if not self._plan(conn, folders):
                return []
            moved: list[Path] = []
            reindexed: list[str] = []
            recovered: list[tuple[str, int, dict]] = []
            # Seen without the lock, a folder may belong to a registration about to commit:
            # look again while holding the write lock.
            with self._write(conn):
                for action, f in self._plan(conn, self._scan_folders()):
                    if action == "mark":
                        self._write_status(conn, f.name, f.version, committed=True)
                    elif action == "reindex":
                        try:
                            self._reindex(conn, f)
                        except RegistryError as exc:
                            log.warning("%s cannot be indexed (%s); quarantining it", f.folder, exc)
                            action = "quarantine"
                        else:
                            reindexed.append(format_ref(f.name, f.version))
                            recovered.append((f.name, f.version, f.status or {}))
                    if action == "quarantine":
                        target = self._quarantine(f.folder, f"{f.name}-{f.version}")
                        if target is not None:
                            why = (
                                "an unfinished registration (killed before its commit)"
                                if f.record is not None
                                else "not written by this registry"
                            )
                            log.warning(
                                "moved %s (%s) to %s; nothing was deleted", f.folder, why, target
                            )
                            moved.append(target)
            for name, version, status in recovered:
                current = status.get("status", "candidate")
                _log_status(
                    name,
                    version,
                    current,
                    current,
                    "recovered: indexed again from the version folder's own records",
                )
            if reindexed:
                log.warning(
                    "registry index %s was missing, empty, older than the version folders or "
                    "corrupt: rebuilt %s from the folders' own records (hashes are checked on "
                    "every read; run 'ergodex models verify')",
                    self.index_path,
                    ", ".join(reindexed),
                )
            return moved

    def _reindex(self, conn: sqlite3.Connection, f: _FolderState) -> None:
        """Replace the index rows of one version with what its folder's records say."""
        record = f.record or {}
        status = f.status or {}
        current = status.get("status", "candidate")
        if current not in STATUSES:
            raise RegistryError(f"its status record names an unknown status {current!r}")
        files = record.get("files")
        if not isinstance(files, dict):
            raise RegistryError("its record.json lists no files")
        hashes = {str(k): str(v) for k, v in files.items()}
        record_hash = status.get("record_sha256") or sha256_hex(f.record_bytes or b"")
        hashes["record.json"] = str(record_hash)
        scorecard = record.get("scorecard")
        card = scorecard if isinstance(scorecard, dict) else {}
        created = str(record.get("created") or _now())
        self._claim_name(conn, f.name, created)
        key = (f.name, f.version)
        conn.execute("DELETE FROM events WHERE name = ? AND version = ?", key)
        conn.execute("DELETE FROM artifacts WHERE name = ? AND version = ?", key)
        conn.execute("DELETE FROM versions WHERE name = ? AND version = ?", key)
        conn.execute(
            """INSERT INTO versions (name, version, status, created, note, parent, datasets,
                   verdict, data_fingerprint, model_fingerprint, scorecard_model_fingerprint)
               VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)""",
            (
                f.name,
                f.version,
                current,
                created,
                str(record.get("note") or ""),
                upgrade_ref(
                    record.get("parent"),
                    str(f.folder / "record.json"),
                    old_form=record.get("format") in OLD_RECORD_FORMATS,
                ),
                json.dumps(record.get("datasets") or []),
                card.get("verdict"),
                card.get("data_fingerprint"),
                record.get("model_fingerprint"),
                card.get("model_fingerprint"),
            ),
        )
        sizes = {}
        for fn in hashes:
            try:
                sizes[fn] = (f.folder / fn).stat().st_size
            except OSError:
                sizes[fn] = 0
        conn.executemany(
            "INSERT INTO artifacts (name, version, filename, sha256, size) VALUES (?, ?, ?, ?, ?)",
            [(f.name, f.version, fn, hashes[fn], sizes[fn]) for fn in sorted(hashes)],
        )
        events = f.events or [
            {
                "time": created,
                "event": "registered",
                "from_status": None,
                "to_status": "candidate",
                "actor": "unknown",
                "reason": "",
                "override": False,
            }
        ]
        for e in events:
            conn.execute(
                """INSERT INTO events (time, name, version, event, from_status, to_status, actor,
                       reason, override) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)""",
                (
                    str(e.get("time", "")),
                    f.name,
                    f.version,
                    str(e.get("event", "")),
                    e.get("from_status"),
                    e.get("to_status"),
                    str(e.get("actor", "unknown")),
                    str(e.get("reason", "")),
                    int(bool(e.get("override"))),
                ),
            )
        self._insert_event(
            conn,
            f.name,
            f.version,
            "recovered",
            current,
            current,
            "indexed again from the version folder's own records",
            False,
        )
        self._write_status(conn, f.name, f.version, committed=True)
