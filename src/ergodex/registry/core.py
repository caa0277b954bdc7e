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

import contextlib
import functools
import getpass
import hashlib
import io
import json
import logging
import os
import re
import shutil
import socket
import sqlite3
import sys
import threading
import time
import uuid
import zipfile
from collections.abc import Iterator, Mapping
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

from ergodex import CAUTION
from ergodex.exceptions import IntegrityError, ModelFileError, RegistryError
from ergodex.host import pid_alive, utc_now

__all__ = [
    "CAUTION",
    "STATUSES",
    "Event",
    "ModelSummary",
    "Registry",
    "VersionInfo",
    "parse_ref",
    "validate_name",
]

log = logging.getLogger("ergodex.registry")

INDEX_FILE = "registry.sqlite3"
STAGING_DIR = ".staging"
# Where recovery moves what it cannot account for (never deleted): killed writers' leftovers,
# unknown numbered folders, a corrupt index file.
QUARANTINE_DIR = ".quarantine"
RECORD_FORMAT = "ergodex-record/1"
# Each version folder's own, mutable status record (status, events, committed flag); rewritten
# atomically with every status change so that a lost index can be rebuilt from the folders.
STATUS_FILE = "status.json"
STATUS_FORMAT = "ergodex-status/1"
EXPORT_FORMAT = "ergodex-export/1"
STATUSES = ("candidate", "accepted", "rejected", "retired")
# Allowed status changes (docs/formats.md, "Registry home"): from -> set of targets.
TRANSITIONS = {
    "candidate": {"accepted", "rejected"},
    "accepted": {"retired"},
    "rejected": set(),
    "retired": set(),
}
# Events that change a status, or that registration writes; record_event may not use these names.
RESERVED_EVENTS = {"registered", "imported", "accepted", "rejected", "retired", "recovered"}

MAX_NAME_LENGTH = 64
# A conservative name: letters, digits, '.', '_' and '-', starting with a letter or digit. No path
# separators, no '@' (it separates name from version), no spaces, nothing a shell or a filesystem
# treats specially.
_NAME_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]*")
_EVENT_PATTERN = re.compile(r"[a-z][a-z0-9-]{0,39}")
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
# Staging entries whose owner cannot be checked (another machine, a reused pid) are removed only
# when this old. No registration takes a day.
_STALE_STAGING_AGE = 24 * 3600.0
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
}
SCHEMA_VERSION = max(MIGRATIONS)


# --------------------------------------------------------------------------------------------
# Records returned to callers


@dataclass(frozen=True)
class VersionInfo:
    """What the index knows about one version.

    Attributes
    ----------
    name, version : str, int
        The version's reference is ``f"{name}@{version}"`` (:attr:`ref`).
    status : str
        One of :data:`STATUSES`.
    created : str
        Registration time, UTC ISO 8601.
    artifacts : dict
        File name → sha256 hex digest of every file in the version folder.
    folder : pathlib.Path
        The version folder.
    note, parent : str, str or None
        Free text given at registration; the version it was retrained from (``"name@v"``).
    datasets : list of dict
        Data the version was fitted and checked on: ``{"role", "fingerprint", "source"}``.
    verdict : str or None
        The scorecard's verdict (``"pass"``/``"fail"``/``"inconclusive"``), None without a
        scorecard; only ``"pass"`` can be accepted without an override.
    data_fingerprint : str or None
        Fingerprint of the data the scorecard was computed on.
    model_fingerprint : str or None
        Fingerprint of the stored surrogate (``Surrogate.fingerprint()``).
    integrity : str or None
        ``"ok"`` when every file matched its recorded sha256 as this info was read, ``"failed"``
        when one did not (the status and verdict must then not be trusted), None when not checked
        (internal reads that verify the bytes they use).
    integrity_problems : list of str
        One line per changed or missing file: path, expected and actual sha256.
    """

    name: str
    version: int
    status: str
    created: str
    artifacts: dict[str, str]
    folder: Path
    note: str = ""
    parent: str | None = None
    datasets: list[dict[str, str]] = field(default_factory=list)
    verdict: str | None = None
    data_fingerprint: str | None = None
    model_fingerprint: str | None = None
    scorecard_model_fingerprint: str | None = None
    integrity: str | None = None
    integrity_problems: list[str] = field(default_factory=list)

    @property
    def ref(self) -> str:
        return f"{self.name}@{self.version}"

    def __repr__(self) -> str:
        from ergodex.display import version_repr

        return version_repr(self)

    def _repr_html_(self) -> str:
        """A small table for notebooks: status, verdict, lineage, fingerprints, folder."""
        from ergodex.display import version_html

        return version_html(self)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict (the ``--json`` shape of ``ergodex models show NAME@V``)."""
        d = asdict(self)
        d["folder"] = str(self.folder)
        d["ref"] = self.ref
        return d


@dataclass(frozen=True)
class Event:
    """One line of a model's history."""

    id: int
    time: str
    name: str
    version: int
    event: str
    from_status: str | None
    to_status: str | None
    actor: str
    reason: str
    override: bool

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_row(cls, r: Any) -> Event:
        """The event of one row of the index's ``events`` table."""
        return cls(
            id=r["id"],
            time=r["time"],
            name=r["name"],
            version=r["version"],
            event=r["event"],
            from_status=r["from_status"],
            to_status=r["to_status"],
            actor=r["actor"],
            reason=r["reason"],
            override=bool(r["override"]),
        )


@dataclass(frozen=True)
class ModelSummary:
    """One registered name: how many versions, the newest, the one accepted, counts per status.

    ``integrity_failed`` lists the versions whose files no longer match their recorded sha256.
    """

    name: str
    versions: int
    latest: int
    accepted: int | None
    statuses: dict[str, int]
    integrity_failed: list[int] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


# --------------------------------------------------------------------------------------------
# Names and references


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


def parse_ref(ref: object) -> tuple[str, int | None]:
    """Split ``"name"`` or ``"name@3"`` into ``(name, version or None)``; names are validated."""
    if isinstance(ref, VersionInfo):
        return ref.name, ref.version
    if not isinstance(ref, str):
        raise RegistryError(f"model reference must be 'NAME' or 'NAME@VERSION', got {ref!r}")
    name, sep, version_text = ref.partition("@")
    validate_name(name)
    if not sep:
        return name, None
    # length and ASCII first: int() refuses 5000 digits and digits such as '²' with ValueError
    if (
        len(version_text) > 9
        or not (version_text.isascii() and version_text.isdigit())
        or int(version_text) < 1
    ):
        shown = ref if len(ref) <= 80 else ref[:77] + "..."
        raise RegistryError(
            f"model reference {shown!r}: the version after '@' must be a positive whole number"
        )
    return name, int(version_text)


# --------------------------------------------------------------------------------------------
# Small file helpers (every write: temporary file, fsync, checked, renamed)


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


class _CorruptIndex(Exception):
    """The index file is not a readable SQLite database (recovery moves it aside)."""


def _is_corruption(exc: sqlite3.DatabaseError) -> bool:
    text = str(exc).lower()
    if isinstance(exc, sqlite3.OperationalError) and ("locked" in text or "busy" in text):
        return False
    return "not a database" in text or "malformed" in text or "corrupt" in text


def _bare_hash(fingerprint: str) -> str:
    return fingerprint.split(":", 1)[-1].strip().lower()


def _refuse_foreign_scorecard(meta: Mapping[str, Any], what: str) -> None:
    """Refuse a scorecard whose model fingerprint names another model than the one stored."""
    named, actual = meta.get("scorecard_model_fingerprint"), meta.get("model_fingerprint")
    if named and actual and _bare_hash(str(named)) != _bare_hash(str(actual)):
        raise RegistryError(
            f"{what} was made for another model (it names model fingerprint {named}; the model "
            f"being registered has {actual}); validate this model and register its own scorecard"
        )


def _log_status(name: str, version: int, old: str | None, new: str, reason: str) -> None:
    """One line on the ``ergodex.registry`` logger per committed status decision."""
    log.info("%s@%s: %s -> %s (%s)", name, version, old or "new", new, reason or "no reason given")


def _now() -> str:
    return utc_now("milliseconds").replace("+00:00", "Z")


def _actor() -> str:
    try:
        return getpass.getuser() or "unknown"
    except Exception:  # getuser raises when no user name can be found at all
        return "unknown"


@functools.lru_cache(maxsize=1)
def _package_versions() -> dict[str, str]:
    from importlib import metadata

    found = {"python": sys.version.split()[0]}
    for package in ("ergodex", "numpy", "scipy", "pysindy", "scikit-learn"):
        try:
            found[package] = metadata.version(package)
        except metadata.PackageNotFoundError:
            continue
    return found


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
                and candidate.get("format") == RECORD_FORMAT
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


# --------------------------------------------------------------------------------------------
# The registry


class Registry:
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

    # ---------------------------------------------------------------- connection and schema

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

    def __enter__(self) -> Registry:
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

    # ---------------------------------------------------------------- recovery (never deletes)

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
                            reindexed.append(f"{f.name}@{f.version}")
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
                record.get("parent"),
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

    def _staging_entry(self) -> Path:
        """A new, unique path under ``.staging`` that names its owner (pid, host) for the sweep."""
        staging_root = self.home / STAGING_DIR
        staging_root.mkdir(exist_ok=True)
        return staging_root / f"{os.getpid()}.{uuid.uuid4().hex}.{socket.gethostname()}"

    def _discard(self, folder: Path) -> None:
        """Remove this process's own failed registration (its caller receives the error).

        It is first renamed into ``.staging`` (one atomic step), then deleted: a process killed
        while deleting leaves a staging entry that the next sweep quarantines, never a
        half-deleted folder in a version's place.
        """
        trash = self._staging_entry()
        try:
            os.rename(folder, trash)
        except FileNotFoundError:
            return
        shutil.rmtree(trash, ignore_errors=True)

    @staticmethod
    def _max_folder_version(name_dir: Path) -> int:
        """The highest numbered folder under ``name_dir`` (0 if none): numbers are never reused."""
        if not name_dir.is_dir():
            return 0
        numbers = [int(p.name) for p in name_dir.iterdir() if p.name.isdigit()]
        return max(numbers, default=0)

    # ---------------------------------------------------------------- registering

    def register(
        self,
        name: str,
        surrogate: Any,
        *,
        scorecard: Any = None,
        report_html: str | os.PathLike[str] | None = None,
        evidence_path: str | os.PathLike[str] | None = None,
        fit_settings: Mapping[str, Any] | str | os.PathLike[str] | None = None,
        note: str | None = None,
        parent: str | int | VersionInfo | None = None,
        datasets: Any = None,
    ) -> VersionInfo:
        """Store a surrogate and its evidence as the next version of ``name`` (status candidate).

        Parameters
        ----------
        name : str
            Model name (see :func:`validate_name`).
        surrogate : Surrogate or path-like
            A :class:`ergodex.surrogate.Surrogate` (anything with ``to_json()``) or the path of a
            ``model.json`` file; its bytes are stored unchanged.
        scorecard : Scorecard, path-like or dict, optional
            The check's result: an object with ``to_json()``, a ``scorecard.json`` path, or a
            dict shaped like one (``verdict``, ``data_fingerprint``, ``model_fingerprint``, …).
        report_html : str or path-like, optional
            The HTML report: its text (a ``str`` containing ``<``) or a file path.
        evidence_path : path-like, optional
            An ``.npz`` of numeric arrays (no object arrays).
        fit_settings : dict or path-like, optional
            The fitter's settings: a dict (stored as ``fit-settings.json``) or a ``.json``/``.toml``
            file stored under ``fit-settings.<suffix>``.
        note : str, optional
            Free text shown in listings.
        parent : str or int, optional
            ``"name@v"`` of the version this one was retrained from (an int: that version of
            ``name``); must exist.
        datasets : mapping or list, optional
            Fingerprints of the data the model was fitted and checked on: ``{"fit": fp, …}``
            (role → fingerprint, or role → ``{"fingerprint", "source"}``), or a list of
            ``{"role", "fingerprint", "source"}``. The scorecard's data fingerprint is added as
            role ``"check"`` when not given.

        Returns
        -------
        VersionInfo
            The new version, status ``candidate``.
        """
        validate_name(name)
        files, meta = self._prepare(
            surrogate, scorecard, report_html, evidence_path, fit_settings, datasets
        )
        parent_ref = None
        if isinstance(parent, int) and not isinstance(parent, bool):
            parent = f"{name}@{parent}"  # a version number: a version of the same name
        if parent is not None:
            parent_name, parent_version = parse_ref(parent)
            if parent_version is None:
                raise RegistryError(f"parent {parent!r} must name a version: NAME@VERSION")
            parent_ref = f"{parent_name}@{parent_version}"
        return self._commit_version(
            name, files, meta, note=note or "", parent=parent_ref, event="registered", reason=""
        )

    def _prepare(self, surrogate, scorecard, report_html, evidence_path, fit_settings, datasets):
        """Turn the caller's inputs into ``{filename: bytes}`` plus index metadata.

        Writes nothing.
        """
        files: dict[str, bytes] = {}
        meta: dict[str, Any] = {}

        if hasattr(surrogate, "to_json"):
            model_bytes = surrogate.to_json().encode("utf-8")
            what = "the surrogate's JSON"
        elif isinstance(surrogate, (str, os.PathLike)):
            model_bytes = self._read_input(surrogate, "model file")
            what = f"model file {surrogate}"
        else:
            raise RegistryError(
                f"surrogate must be a Surrogate or the path of a model.json, got "
                f"{type(surrogate).__name__}"
            )
        model_dict = _read_json_object(model_bytes, what)
        files["model.json"] = model_bytes
        meta["model_fingerprint"] = self._model_fingerprint(model_bytes, what)

        card: dict[str, Any] = {}
        if scorecard is not None:
            if hasattr(scorecard, "to_json"):
                card_bytes = scorecard.to_json().encode("utf-8")
                what = "the scorecard's JSON"
            elif isinstance(scorecard, Mapping):
                card_bytes = (json.dumps(dict(scorecard), indent=2, sort_keys=True) + "\n").encode()
                what = "the scorecard dict"
            elif isinstance(scorecard, (str, os.PathLike)):
                card_bytes = self._read_input(scorecard, "scorecard file")
                what = f"scorecard file {scorecard}"
            else:
                raise RegistryError(
                    "scorecard must be a Scorecard, a dict or a path, "
                    f"got {type(scorecard).__name__}"
                )
            card = _read_json_object(card_bytes, what)
            verdict = card.get("verdict")
            if verdict not in ("pass", "fail", "inconclusive"):
                raise ModelFileError(
                    f"{what}: 'verdict' must be 'pass', 'fail' or 'inconclusive', found {verdict!r}"
                )
            files["scorecard.json"] = card_bytes
        meta["verdict"] = card.get("verdict")
        meta["data_fingerprint"] = card.get("data_fingerprint") or None
        meta["scorecard_model_fingerprint"] = card.get("model_fingerprint") or None
        _refuse_foreign_scorecard(meta, what)

        if report_html is not None:
            if isinstance(report_html, str) and "<" in report_html:
                files["report.html"] = report_html.encode("utf-8")
            elif isinstance(report_html, (str, os.PathLike)):
                files["report.html"] = self._read_input(report_html, "report file")
            else:
                raise RegistryError("report_html must be HTML text or the path of an HTML file")

        if evidence_path is not None:
            data = self._read_input(evidence_path, "evidence file")
            _check_npz(data, f"evidence file {evidence_path}")
            files["evidence.npz"] = data

        if fit_settings is not None:
            if isinstance(fit_settings, Mapping):
                try:
                    text = json.dumps(dict(fit_settings), indent=2, sort_keys=True, allow_nan=False)
                except (TypeError, ValueError) as exc:
                    raise RegistryError(f"fit_settings cannot be written as JSON: {exc}") from exc
                files["fit-settings.json"] = (text + "\n").encode()
            elif isinstance(fit_settings, (str, os.PathLike)):
                suffix = Path(fit_settings).suffix.lower()
                if suffix not in (".json", ".toml"):
                    raise RegistryError(
                        f"fit settings file {fit_settings} must end in .json or .toml"
                    )
                files[f"fit-settings{suffix}"] = self._read_input(fit_settings, "fit settings file")
            else:
                raise RegistryError("fit_settings must be a dict or the path of a .json/.toml file")

        meta["datasets"] = self._normalise_datasets(datasets, model_dict, meta["data_fingerprint"])
        return files, meta

    @staticmethod
    def _read_input(path: str | os.PathLike[str], what: str) -> bytes:
        from ergodex.limits import check_regular_file

        if os.path.lexists(path):  # a device or pipe (e.g. /dev/zero) would be read forever
            check_regular_file(path, what, error=RegistryError)
        try:
            return Path(path).read_bytes()
        except FileNotFoundError:
            raise RegistryError(f"{what} {path} does not exist") from None
        except OSError as exc:
            raise RegistryError(f"{what} {path} cannot be read: {exc}") from exc

    @staticmethod
    def _model_fingerprint(model_bytes: bytes, what: str) -> str | None:
        """Fingerprint by the surrogate's own rule, checking on the way that the model loads."""
        try:
            from ergodex.surrogate import Surrogate
        except ImportError:  # pragma: no cover - only while the package is being assembled
            return None
        try:
            return Surrogate.from_json(model_bytes.decode("utf-8")).fingerprint()
        except ModelFileError:
            raise
        except Exception as exc:
            raise ModelFileError(f"{what} is not a loadable surrogate: {exc}") from exc

    @staticmethod
    def _normalise_datasets(datasets: Any, model_dict: dict, check_fp: str | None) -> list[dict]:
        entries: list[dict[str, str]] = []
        if datasets is None:
            pass
        elif isinstance(datasets, Mapping):
            for role, value in datasets.items():
                if isinstance(value, Mapping):
                    entries.append(
                        {
                            "role": str(role),
                            "fingerprint": str(value.get("fingerprint", "")),
                            "source": str(value.get("source", "")),
                        }
                    )
                else:
                    entries.append({"role": str(role), "fingerprint": str(value), "source": ""})
        elif isinstance(datasets, (list, tuple)):
            for item in datasets:
                if not isinstance(item, Mapping) or "fingerprint" not in item:
                    raise RegistryError(
                        "each dataset entry must be a dict with 'role', 'fingerprint' and "
                        f"optionally 'source', got {item!r}"
                    )
                entries.append(
                    {
                        "role": str(item.get("role", "")),
                        "fingerprint": str(item["fingerprint"]),
                        "source": str(item.get("source", "")),
                    }
                )
        else:
            raise RegistryError(f"datasets must be a dict or a list of dicts, got {datasets!r}")
        fingerprints = {e["fingerprint"] for e in entries}
        # The model file's provenance may carry the fitting data's fingerprint.
        provenance = model_dict.get("provenance")
        if isinstance(provenance, Mapping):
            fit_fp = provenance.get("data_fingerprint") or provenance.get("fit_data_fingerprint")
            if isinstance(fit_fp, str) and fit_fp and fit_fp not in fingerprints:
                entries.append({"role": "fit", "fingerprint": fit_fp, "source": "model provenance"})
                fingerprints.add(fit_fp)
        if check_fp and check_fp not in fingerprints:
            entries.append({"role": "check", "fingerprint": check_fp, "source": "scorecard"})
        return entries

    def _commit_version(
        self,
        name: str,
        files: dict[str, bytes],
        meta: dict[str, Any],
        *,
        note: str,
        parent: str | None,
        event: str,
        reason: str,
        record_extra: Mapping[str, Any] | None = None,
    ) -> VersionInfo:
        """Stage the files, then number, move and index them in one write transaction."""
        created = _now()
        record = {
            "format": RECORD_FORMAT,
            "name": name,
            "created": created,
            "note": note,
            "parent": parent,
            "datasets": meta["datasets"],
            "model_fingerprint": meta["model_fingerprint"],
            "scorecard": {
                "verdict": meta["verdict"],
                "data_fingerprint": meta["data_fingerprint"],
                "model_fingerprint": meta["scorecard_model_fingerprint"],
            },
            "packages": dict(_package_versions()),
            "files": {fn: sha256_hex(data) for fn, data in sorted(files.items())},
        }
        if record_extra:
            record.update(record_extra)
        files = dict(files)
        files["record.json"] = (json.dumps(record, indent=2, sort_keys=True) + "\n").encode()
        hashes = {fn: sha256_hex(data) for fn, data in files.items()}

        with self._connect(create=True) as conn:
            conn = self._live(conn)  # create=True always yields a connection
            # The entry names its owner (pid, host) so that a sweep can tell a live one from a
            # leftover without any lock.
            stage = self._staging_entry()
            stage.mkdir()
            final: Path | None = None
            try:
                for filename, data in files.items():
                    _write_file(stage / filename, data)
                _fsync_dir(stage)

                with self._write(conn):
                    if parent is not None:
                        pn, pv = parse_ref(parent)
                        if not self._row(conn, pn, pv):
                            raise RegistryError(
                                f"parent {parent} is not in the registry at {self.home}"
                            )
                    self._claim_name(conn, name, created)
                    row = conn.execute(
                        "SELECT COALESCE(MAX(version), 0) FROM versions WHERE name = ?", (name,)
                    ).fetchone()
                    name_dir = self.home / name
                    # Folders count too: a number is never handed out twice, even when the
                    # index lost track of a version.
                    version = max(int(row[0]), self._max_folder_version(name_dir)) + 1
                    new_name_dir = not name_dir.exists()
                    name_dir.mkdir(exist_ok=True)
                    final = name_dir / str(version)
                    conn.execute(
                        """INSERT INTO versions (name, version, status, created, note, parent,
                               datasets, verdict, data_fingerprint, model_fingerprint,
                               scorecard_model_fingerprint)
                           VALUES (?, ?, 'candidate', ?, ?, ?, ?, ?, ?, ?, ?)""",
                        (
                            name,
                            version,
                            created,
                            note,
                            parent,
                            json.dumps(meta["datasets"]),
                            meta["verdict"],
                            meta["data_fingerprint"],
                            meta["model_fingerprint"],
                            meta["scorecard_model_fingerprint"],
                        ),
                    )
                    conn.executemany(
                        "INSERT INTO artifacts (name, version, filename, sha256, size) "
                        "VALUES (?, ?, ?, ?, ?)",
                        [(name, version, fn, hashes[fn], len(files[fn])) for fn in sorted(files)],
                    )
                    self._insert_event(conn, name, version, event, None, "candidate", reason, False)
                    # The folder's own status record; "committed" is set once the index commit
                    # is done, so that recovery can tell a killed registration from a lost index.
                    self._write_status(conn, name, version, committed=False, folder=stage)
                    os.rename(stage, final)
                    _fsync_dir(name_dir)
                    if new_name_dir:
                        _fsync_dir(self.home)
            except BaseException:
                if final is not None and final.exists() and not stage.exists():
                    # The transaction rolled back after the move: nothing indexed, remove it.
                    self._discard(final)
                raise
            finally:
                if stage.exists():
                    shutil.rmtree(stage, ignore_errors=True)
            try:
                with self._write(conn):
                    self._write_status(conn, name, version, committed=True)
            except (OSError, sqlite3.Error, RegistryError) as exc:
                # The version exists (committed); the next sweep marks its folder.
                log.warning(
                    "%s@%s is registered, but its status record could not be marked "
                    "committed (%s); the next open of the registry does it",
                    name,
                    version,
                    exc,
                )
            _log_status(
                name,
                version,
                None,
                "candidate",
                f"{event}; scorecard verdict {meta['verdict'] or 'none'}",
            )
            # Every file was read back and compared while writing.
            return replace(self._info(conn, name, version), integrity="ok")

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

    # ---------------------------------------------------------------- reading

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
            raise RegistryError(f"{name}@{version} is not in the registry at {self.home}")
        return self._info_from_row(conn, row)

    def _resolve(self, conn, ref: Any, *, need_version: bool = False) -> sqlite3.Row:
        name, version = parse_ref(ref)
        if need_version and version is None:
            raise RegistryError(f"name a version for this change: {name}@VERSION")
        if (
            conn is None
            or conn.execute("SELECT 1 FROM models WHERE name = ?", (name,)).fetchone() is None
        ):
            known = (
                []
                if conn is None
                else [r[0] for r in conn.execute("SELECT name FROM models ORDER BY name")]
            )
            hint = f"registered: {', '.join(known[:10])}" if known else "the registry is empty"
            raise RegistryError(f"no model named {name!r} in the registry at {self.home} ({hint})")
        if version is None:
            row = conn.execute(
                "SELECT * FROM versions WHERE name = ? AND status = 'accepted' "
                "ORDER BY version DESC LIMIT 1",
                (name,),
            ).fetchone()
            if row is None:
                counts = dict(
                    conn.execute(
                        "SELECT status, COUNT(*) FROM versions WHERE name = ? GROUP BY status",
                        (name,),
                    ).fetchall()
                )
                listing = ", ".join(f"{n} {s}" for s, n in sorted(counts.items()))
                raise RegistryError(
                    f"{name} has no accepted version ({listing}); accept one with "
                    f"'ergodex models accept {name}@VERSION' or load a version explicitly as "
                    f"{name}@VERSION"
                )
            return row
        row = self._row(conn, name, version)
        if row is None:
            latest = conn.execute(
                "SELECT MAX(version) FROM versions WHERE name = ?", (name,)
            ).fetchone()[0]
            raise RegistryError(
                f"{name}@{version} does not exist; versions of {name} run 1..{latest}"
            )
        return row

    def get(self, ref: str | VersionInfo) -> VersionInfo:
        """Metadata of ``"name@v"``, or of the accepted version for ``"name"``.

        Every file is hashed on the way: ``integrity`` is ``"ok"`` or ``"failed"`` (with
        ``integrity_problems``), so a status or verdict is never shown for changed bytes unmarked.
        """
        return self._checked(self._get(ref))

    def _get(self, ref: str | VersionInfo) -> VersionInfo:
        """Metadata without hashing the files (for callers that verify what they read)."""
        with self._connect() as conn:
            return self._info_from_row(conn, self._resolve(conn, ref))

    def versions(self, name: str) -> list[VersionInfo]:
        """Every version of ``name``, oldest first, each with its files' integrity checked."""
        with self._connect() as conn:
            self._resolve_name(conn, name)
            conn = self._live(conn)  # _resolve_name raised if there is no index
            rows = conn.execute(
                "SELECT * FROM versions WHERE name = ? ORDER BY version", (name,)
            ).fetchall()
            infos = [self._info_from_row(conn, r) for r in rows]
        return [self._checked(i) for i in infos]

    def _checked(self, info: VersionInfo) -> VersionInfo:
        problems = self._integrity_problems(info)
        return replace(info, integrity="failed" if problems else "ok", integrity_problems=problems)

    @staticmethod
    def _integrity_problems(info: VersionInfo) -> list[str]:
        """One line per file of ``info`` that is missing or whose sha256 changed."""
        problems = []
        for filename, expected in sorted(info.artifacts.items()):
            path = info.folder / filename
            try:
                actual = _hash_file(path)
            except FileNotFoundError:
                problems.append(f"{path}: missing (expected sha256 {expected})")
                continue
            except OSError as exc:
                problems.append(f"{path}: cannot be read ({exc}; expected sha256 {expected})")
                continue
            if actual != expected:
                problems.append(f"{path}: expected sha256 {expected}, actual {actual}")
        return problems

    def check_integrity(self, ref: str | None = None) -> list[VersionInfo]:
        """Hash every file of every version (of ``"name"``, or one ``"name@v"``); return them.

        Each returned info has ``integrity`` ``"ok"`` or ``"failed"``; nothing raises for a
        changed file, so that one damaged version does not hide the state of the others.
        """
        if ref is None:
            return [i for m in self.list_models() for i in self.versions(m.name)]
        name, version = parse_ref(ref)
        return self.versions(name) if version is None else [self.get(ref)]

    def _resolve_name(self, conn, name: str) -> None:
        validate_name(name)
        if "@" in name:  # pragma: no cover - validate_name already refuses '@'
            raise RegistryError(f"expected a model name, got the reference {name!r}")
        if (
            conn is None
            or conn.execute("SELECT 1 FROM models WHERE name = ?", (name,)).fetchone() is None
        ):
            self._resolve(conn, name)  # raises with the hint

    def list_models(self) -> list[ModelSummary]:
        """One summary per registered name, sorted by name; empty for a missing registry."""
        with self._connect() as conn:
            if conn is None:
                return []
            out = []
            # Hash every file: the summary shows statuses, which changed bytes must not hide.
            failed: dict[str, list[int]] = {}
            for row in conn.execute("SELECT * FROM versions ORDER BY name, version").fetchall():
                if self._integrity_problems(self._info_from_row(conn, row)):
                    failed.setdefault(row["name"], []).append(int(row["version"]))
            for (name,) in conn.execute("SELECT name FROM models ORDER BY name").fetchall():
                counts = dict(
                    conn.execute(
                        "SELECT status, COUNT(*) FROM versions WHERE name = ? GROUP BY status",
                        (name,),
                    ).fetchall()
                )
                latest = conn.execute(
                    "SELECT MAX(version) FROM versions WHERE name = ?", (name,)
                ).fetchone()[0]
                accepted = conn.execute(
                    "SELECT MAX(version) FROM versions WHERE name = ? AND status = 'accepted'",
                    (name,),
                ).fetchone()[0]
                out.append(
                    ModelSummary(
                        name=name,
                        versions=int(sum(counts.values())),
                        latest=int(latest or 0),
                        accepted=None if accepted is None else int(accepted),
                        statuses={s: int(counts.get(s, 0)) for s in STATUSES},
                        integrity_failed=failed.get(name, []),
                    )
                )
            return out

    def history(self, name: str) -> list[Event]:
        """Every event of every version of ``name``, oldest first.

        ``"name@v"`` gives the events of one version only.
        """
        with self._connect() as conn:
            base, version = parse_ref(name)
            if version is None:
                self._resolve_name(conn, base)
                conn = self._live(conn)  # _resolve_name raised if there is no index
                rows = conn.execute(
                    "SELECT * FROM events WHERE name = ? ORDER BY time, id", (base,)
                ).fetchall()
            else:
                self._resolve(conn, name)
                conn = self._live(conn)  # _resolve raised if there is no index
                rows = conn.execute(
                    "SELECT * FROM events WHERE name = ? AND version = ? ORDER BY time, id",
                    (base, version),
                ).fetchall()
            return [Event.from_row(r) for r in rows]

    # ---------------------------------------------------------------- verified reading

    def verify(self, ref: str | VersionInfo) -> VersionInfo:
        """Check every artifact of a version against its recorded sha256; return its info.

        Raises
        ------
        IntegrityError
            A file is missing or its hash differs; the message names the file, both hashes and
            the likely cause.
        """
        info = self._get(ref)
        for filename in info.artifacts:
            self._verified_bytes(info, filename)
        return replace(info, integrity="ok")

    def _verified_bytes(self, info: VersionInfo, filename: str) -> bytes:
        if filename not in info.artifacts:
            raise RegistryError(
                f"{info.ref} has no file {filename!r}; it holds {', '.join(sorted(info.artifacts))}"
            )
        path = info.folder / filename
        expected = info.artifacts[filename]
        try:
            data = path.read_bytes()
        except FileNotFoundError:
            raise IntegrityError(
                f"{path}: file of {info.ref} is missing (expected sha256 {expected}); the version "
                "folder was changed by hand or by another program — versions are immutable"
            ) from None
        actual = sha256_hex(data)
        if actual != expected:
            raise IntegrityError(
                f"{path}: sha256 mismatch for {info.ref}: expected {expected}, actual {actual}; "
                "the file was changed after it was registered (edited by hand, damaged by a disk "
                "or copy fault, or replaced) — register a new version instead of editing one"
            )
        return data

    def artifact(self, ref: str | VersionInfo, filename: str) -> bytes:
        """The bytes of one file of a version, checked against its recorded sha256."""
        return self._verified_bytes(self._get(ref), filename)

    def artifact_path(self, ref: str | VersionInfo, filename: str) -> Path:
        """The path of one file of a version, after checking its sha256.

        The file may be changed after this returns; read it with :meth:`artifact` when the bytes
        themselves matter.
        """
        info = self._get(ref)
        self._verified_bytes(info, filename)
        return info.folder / filename

    def load(self, ref: str | VersionInfo):
        """The surrogate of ``"name@v"``, or of the accepted version for ``"name"`` (at most one).

        Every artifact of the version is checked against its sha256 first, so the surrogate
        returned is exactly the one registered, with its evidence intact.
        """
        from ergodex.surrogate import Surrogate

        info = self.verify(ref)
        text = self._verified_bytes(info, "model.json").decode("utf-8")
        return Surrogate.from_json(text)

    def scorecard(self, ref: str | VersionInfo) -> dict | None:
        """The stored scorecard as a dict (verified), or None if the version has none."""
        info = self._get(ref)
        if "scorecard.json" not in info.artifacts:
            return None
        return json.loads(self._verified_bytes(info, "scorecard.json").decode("utf-8"))

    # ---------------------------------------------------------------- status changes

    def accept(
        self, ref: str | VersionInfo, *, reason: str = "", override: bool = False
    ) -> VersionInfo:
        """Promote a candidate to ``accepted``: downstream ``load(name)`` then returns it.

        A name has at most one accepted version: the one accepted before is retired in the same
        transaction, with its own ``retired`` event (reason ``"replaced by version N"``).

        Refused (RegistryError) unless the version has a passing scorecard computed on data whose
        fingerprint is recorded, and computed on this model (when the scorecard names the model's
        fingerprint). ``override=True`` with a non-empty ``reason`` accepts anyway and marks the
        event as an override in the history.
        """
        name, version = parse_ref(ref)
        if version is None:
            raise RegistryError(f"name a version to accept: {name}@VERSION")
        info = self.verify(ref)  # accept exactly the bytes that were checked
        problems = self._acceptance_problems(info)
        if problems and not override:
            raise RegistryError(
                f"{info.ref} cannot be accepted: {'; '.join(problems)}. Check it again, or accept "
                "by override with a reason, which the history records",
                python_hint="(override=True, reason=...)",
                cli_hint="(use --override --reason TEXT)",
            )
        if problems and not (reason and reason.strip()):
            raise RegistryError(f"accepting {info.ref} by override needs a non-empty reason")
        return self._change_status(info.ref, "accepted", reason, override=bool(problems))

    @staticmethod
    def _acceptance_problems(info: VersionInfo) -> list[str]:
        problems = []
        if info.verdict is None:
            problems.append("it has no scorecard")
        elif info.verdict != "pass":
            problems.append(f"its scorecard's verdict is {info.verdict!r}")
        if info.verdict is not None and not info.data_fingerprint:
            problems.append("its scorecard does not record the fingerprint of the data it checked")
        if (
            info.scorecard_model_fingerprint
            and info.model_fingerprint
            and _bare_hash(info.scorecard_model_fingerprint) != _bare_hash(info.model_fingerprint)
        ):
            problems.append(
                f"its scorecard was computed on another model (scorecard names "
                f"{info.scorecard_model_fingerprint}, the stored model is {info.model_fingerprint})"
            )
        return problems

    def reject(self, ref: str | VersionInfo, *, reason: str) -> VersionInfo:
        """Mark a candidate ``rejected`` (a reason is required)."""
        return self._change_status(ref, "rejected", reason, require_reason=True)

    def retire(self, ref: str | VersionInfo, *, reason: str) -> VersionInfo:
        """Take an accepted version out of use (``retired``; a reason is required)."""
        return self._change_status(ref, "retired", reason, require_reason=True)

    def _change_status(
        self, ref, target: str, reason: str, *, override: bool = False, require_reason: bool = False
    ) -> VersionInfo:
        if require_reason and not (reason and reason.strip()):
            raise RegistryError(f"marking {ref} {target} needs a non-empty reason")
        with self._connect() as conn:
            if conn is None:
                self._resolve(conn, ref)
            conn = self._live(conn)  # _resolve raised if there is no index
            with self._write(conn):
                row = self._resolve(conn, ref, need_version=True)
                current = row["status"]
                if target not in TRANSITIONS[current]:
                    allowed = ", ".join(sorted(TRANSITIONS[current])) or "none (final status)"
                    raise RegistryError(
                        f"{row['name']}@{row['version']} is {current}; it cannot become {target} "
                        f"(allowed from {current}: {allowed})"
                    )
                if target == "accepted":
                    problems = self._acceptance_problems(self._info_from_row(conn, row))
                    override = override and bool(problems)
                    if problems and not override:  # the scorecard cannot change, but be strict
                        raise RegistryError(f"{row['name']}@{row['version']} cannot be accepted")
                conn.execute(
                    "UPDATE versions SET status = ? WHERE name = ? AND version = ?",
                    (target, row["name"], row["version"]),
                )
                self._insert_event(
                    conn, row["name"], row["version"], target, current, target, reason, override
                )
                touched = [int(row["version"])]
                if target == "accepted":
                    touched += self._retire_others(conn, row["name"], int(row["version"]))
                for number in touched:
                    self._write_status(conn, row["name"], number, committed=True)
            _log_status(
                row["name"],
                row["version"],
                current,
                target,
                ("override: " if override else "") + (reason or ""),
            )
            for number in touched[1:]:
                _log_status(
                    row["name"],
                    number,
                    "accepted",
                    "retired",
                    f"replaced by version {row['version']}",
                )
            return self._checked(self._info(conn, row["name"], int(row["version"])))

    def _retire_others(self, conn: sqlite3.Connection, name: str, version: int) -> list[int]:
        """Retire every other accepted version of ``name`` (inside the caller's transaction)."""
        others = [
            int(r[0])
            for r in conn.execute(
                "SELECT version FROM versions "
                "WHERE name = ? AND status = 'accepted' AND version != ?",
                (name, version),
            )
        ]
        for number in others:
            conn.execute(
                "UPDATE versions SET status = 'retired' WHERE name = ? AND version = ?",
                (name, number),
            )
            self._insert_event(
                conn,
                name,
                number,
                "retired",
                "accepted",
                "retired",
                f"replaced by version {version}",
                False,
            )
        return others

    def record_event(self, ref: str | VersionInfo, event: str, reason: str = "") -> Event:
        """Record an event that does not change the status (e.g. ``"drift-detected"``)."""
        if not isinstance(event, str) or not _EVENT_PATTERN.fullmatch(event):
            raise RegistryError(
                f"event name {event!r} must be 1-40 lowercase letters, digits or '-', "
                "starting with a letter"
            )
        if event in RESERVED_EVENTS:
            raise RegistryError(
                f"event name {event!r} is reserved for status changes; use accept/reject/retire"
            )
        with self._connect() as conn:
            if conn is None:
                self._resolve(conn, ref)
            conn = self._live(conn)  # _resolve raised if there is no index
            with self._write(conn):
                row = self._resolve(conn, ref, need_version=True)
                self._insert_event(
                    conn,
                    row["name"],
                    row["version"],
                    event,
                    row["status"],
                    row["status"],
                    reason,
                    False,
                )
                event_id = conn.execute("SELECT last_insert_rowid()").fetchone()[0]
                self._write_status(conn, row["name"], int(row["version"]), committed=True)
            r = conn.execute("SELECT * FROM events WHERE id = ?", (event_id,)).fetchone()
            return Event.from_row(r)

    # ---------------------------------------------------------------- export and import

    def export(self, ref: str | VersionInfo, to_dir: str | os.PathLike[str]) -> Path:
        """Write a self-contained folder for someone without ergodex; return its path.

        The folder holds the version's files (verified), a ``README.md`` with the equations, the
        hashes and the caution, and ``manifest.json`` (name, version, status, sha256 of every
        file) that :meth:`import_folder` checks. ``to_dir`` must not exist or be empty.
        """
        info = self.verify(ref)
        target = Path(to_dir).expanduser().absolute()
        if target.exists() and (not target.is_dir() or any(target.iterdir())):
            raise RegistryError(
                f"export folder {target} exists and is not empty; choose a new folder"
            )
        contents = {fn: self._verified_bytes(info, fn) for fn in info.artifacts}
        contents["README.md"] = self._readme(info, contents).encode("utf-8")
        manifest = {
            "format": EXPORT_FORMAT,
            "name": info.name,
            "version": info.version,
            "status": info.status,
            "verdict": info.verdict,
            "created": info.created,
            "exported": _now(),
            "parent": info.parent,
            "datasets": info.datasets,
            "files": {fn: sha256_hex(data) for fn, data in sorted(contents.items())},
        }
        contents["manifest.json"] = (json.dumps(manifest, indent=2, sort_keys=True) + "\n").encode()

        target.parent.mkdir(parents=True, exist_ok=True)
        stage = target.parent / f".{target.name}.{os.getpid()}.{uuid.uuid4().hex[:8]}.partial"
        stage.mkdir()
        try:
            for fn, data in contents.items():
                _write_file(stage / fn, data, read_only=False)
            _fsync_dir(stage)
            if target.exists():
                target.rmdir()  # empty, checked above
            os.rename(stage, target)
            _fsync_dir(target.parent)
        finally:
            if stage.exists():
                shutil.rmtree(stage, ignore_errors=True)
        return target

    @staticmethod
    def _readme(info: VersionInfo, contents: Mapping[str, bytes]) -> str:
        equations: list[str] = []
        variables: list[str] = []
        try:
            from ergodex.surrogate import Surrogate

            surrogate = Surrogate.from_json(contents["model.json"].decode("utf-8"))
            equations = list(surrogate.equations())
            variables = list(surrogate.variables)
        except Exception as exc:  # the README is still useful without the equation listing
            equations = [f"(equations could not be listed: {exc})"]
        lines = [
            f"# {info.name}, version {info.version}",
            "",
            f"Status in the registry it came from: **{info.status}**. "
            f"Scorecard verdict: **{info.verdict or 'none'}**. Registered {info.created}.",
        ]
        if info.note:
            lines += ["", f"Note: {info.note}"]
        lines += [
            "",
            "## Equations",
            "",
            "Derived from `model.json` (the source of truth); "
            + (f"variables: {', '.join(variables)}." if variables else ""),
            "",
            "```",
        ]
        lines += equations
        lines += ["```", "", "## Files", "", "| file | sha256 |", "|---|---|"]
        lines += [f"| `{fn}` | `{sha256_hex(data)}` |" for fn, data in sorted(contents.items())]
        lines += [
            "",
            "`model.json` is plain JSON: the variable names, the term table (monomials as integer "
            "power vectors), the coefficient matrix (one row per variable), the optional noise "
            "covariance per unit time and the optional transform from data space to model space. "
            "`scorecard.json` lists every statistic compared, its distance to the data, the "
            "data's own noise floor, their ratio and the verdict. `record.json` holds the data "
            "fingerprints, package versions and lineage. `manifest.json` lists every file's "
            "sha256; check them before use (e.g. `sha256sum model.json`).",
        ]
        if info.parent or info.datasets:
            lines += ["", "## Lineage", ""]
            if info.parent:
                lines.append(f"- retrained from {info.parent}")
            for d in info.datasets:
                source = f" ({d['source']})" if d.get("source") else ""
                lines.append(f"- {d['role']} data: `{d['fingerprint']}`{source}")
        lines += ["", "## Caution", "", CAUTION, ""]
        return "\n".join(lines)

    def import_folder(self, path: str | os.PathLike[str], name: str | None = None) -> VersionInfo:
        """Register an exported folder as a new candidate version, after checking every hash.

        The imported version starts as ``candidate`` whatever its status was where it came from:
        accepting is a decision of this registry's users. ``name`` defaults to the exported name.
        """
        folder = Path(path)
        manifest_path = folder / "manifest.json"
        if not manifest_path.is_file():
            raise RegistryError(
                f"{folder} has no manifest.json; import reads folders written by "
                "'ergodex models export' (register a bare model.json with 'ergodex register')"
            )
        manifest = _read_json_object(manifest_path.read_bytes(), f"{manifest_path}")
        if manifest.get("format") != EXPORT_FORMAT or not isinstance(manifest.get("files"), dict):
            raise ModelFileError(
                f"{manifest_path}: format {manifest.get('format')!r} is not {EXPORT_FORMAT!r}"
            )
        contents: dict[str, bytes] = {}
        for filename, expected in sorted(manifest["files"].items()):
            if (
                not isinstance(filename, str)
                or Path(filename).name != filename
                or filename in ("", ".", "..")
            ):
                raise RegistryError(f"{manifest_path} lists an unsafe file name {filename!r}")
            file_path = folder / filename
            if os.path.lexists(file_path):  # never read a device or pipe (e.g. /dev/zero) forever
                from ergodex.limits import check_regular_file

                check_regular_file(file_path, "an exported file", error=RegistryError)
            try:
                data = file_path.read_bytes()
            except FileNotFoundError:
                raise IntegrityError(
                    f"{file_path}: listed in manifest.json (sha256 {expected}) but missing; the "
                    "exported folder is incomplete"
                ) from None
            actual = sha256_hex(data)
            if actual != expected:
                raise IntegrityError(
                    f"{file_path}: sha256 mismatch: expected {expected}, actual {actual}; the "
                    "file was changed after export (edited, damaged in transfer, or replaced)"
                )
            contents[filename] = data
        if "model.json" not in contents:
            raise RegistryError(f"{folder}: the manifest lists no model.json")
        new_name = validate_name(name if name is not None else manifest.get("name", ""))
        origin = f"{manifest.get('name')}@{manifest.get('version')}"

        files = {
            fn: contents[fn]
            for fn in contents
            if fn not in ("README.md", "manifest.json", "record.json")
        }
        model_dict = _read_json_object(files["model.json"], f"{folder / 'model.json'}")
        card = None
        if "scorecard.json" in files:
            card = _read_json_object(files["scorecard.json"], f"{folder / 'scorecard.json'}")
        if "evidence.npz" in files:
            _check_npz(files["evidence.npz"], f"{folder / 'evidence.npz'}")
        meta = {
            "model_fingerprint": self._model_fingerprint(
                files["model.json"], str(folder / "model.json")
            ),
            "verdict": card.get("verdict") if card else None,
            "data_fingerprint": (card.get("data_fingerprint") or None) if card else None,
            "scorecard_model_fingerprint": (card.get("model_fingerprint") or None)
            if card
            else None,
        }
        if meta["verdict"] not in (None, "pass", "fail"):
            raise ModelFileError(
                f"{folder / 'scorecard.json'}: unknown verdict {meta['verdict']!r}"
            )
        _refuse_foreign_scorecard(meta, str(folder / "scorecard.json"))
        datasets = manifest.get("datasets") if isinstance(manifest.get("datasets"), list) else None
        meta["datasets"] = self._normalise_datasets(datasets, model_dict, meta["data_fingerprint"])
        extra = {
            "imported_from": {
                "ref": origin,
                "status": manifest.get("status"),
                "folder": str(folder.absolute()),
                "parent": manifest.get("parent"),
            }
        }
        return self._commit_version(
            new_name,
            files,
            meta,
            note=f"imported from {origin}",
            parent=None,
            event="imported",
            reason=f"from {folder.absolute()} ({origin}, {manifest.get('status')})",
            record_extra=extra,
        )
