"""Watch a folder for new dataset files and retrain a registered model on each one.

Data arrive in an inbox folder (an instrument's export, a simulation campaign's output drop). Each
new *complete* file triggers exactly one :func:`ergodex.retraining.retrain`; the file is then moved
to ``done/`` (with its decision record beside it) or, when it cannot be read, to ``rejected/``
(with a one-line ``<file>.error.txt``). Nothing is ever deleted.

Rules, and why:

1. **Complete files only.** Writers should write to a temporary name and rename into the inbox;
   names that look temporary are ignored: dotfiles, ``~`` backups and the suffixes in
   :data:`TEMPORARY_SUFFIXES` (``.part``, ``.tmp``, …). A file is taken only when its size and
   modification time are the same on two polls in a row, so a file still being copied in place is
   left for later. Sub-folders (``done/``, ``rejected/``, anything else) are not looked into.
2. **Each file once, even across restarts.** A ledger in SQLite, ``<inbox>/.ergodex-inbox.sqlite3``
   (it lives in the inbox folder, so the memory travels with the folder whatever registry home is
   used), keys every file by *file name + size + sha256 of its bytes*. A file whose key is already
   marked done is moved to ``done/`` without a second retrain; the same bytes under a new name, or
   new bytes under an old name, count as new data.
3. **Never retried forever, never blocking the next.** A file that fails (unreadable data, a
   variable mismatch, any error while retraining) is moved aside at once and the loop goes on.
   A file that was being processed when the watcher died is tried again on restart at most
   :data:`MAX_ATTEMPTS` times in all, then moved aside. A claim names its owner (``host:pid``):
   a file another live watcher on the same machine is retraining right now is left to it.
4. **One log line per step** through the standard :mod:`logging` module (logger
   ``ergodex.inbox``); the command line sets the level with ``--log-level``.

A retrain that runs and finds no acceptable model (exit code 1) is a processed file, not a
failure: its decision record says so, and the registry holds the drift event.
"""

from __future__ import annotations

import hashlib
import logging
import os
import socket
import sqlite3
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ergodex.exceptions import ErgodexError, SettingsError
from ergodex.host import pid_alive, utc_now

log = logging.getLogger(__name__)

#: File name of the ledger inside the inbox folder (a dotfile, so the scan never picks it up).
LEDGER_NAME = ".ergodex-inbox.sqlite3"
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
#: Attempts (including ones cut short by a crash) before a file is moved aside for good.
MAX_ATTEMPTS = 2

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
    PRIMARY KEY (file_name, size, sha256)
)
"""


@dataclass
class InboxItem:
    """What happened to one inbox file.

    Attributes
    ----------
    file_name : str
        Name of the file as it arrived in the inbox.
    state : str
        ``"done"`` (retrained, or already done before), ``"rejected"`` (moved aside with its error).
    outcome : str or None
        The decision outcome (``"kept"``, ``"replaced"``, ``"first-accepted"``,
        ``"no-acceptable-model"``) for a file retrained now; ``None`` otherwise.
    exit_code : int or None
        The exit code the retrain would give on the command line (0, 1), or 2 when rejected.
    error : str or None
        The one-line error of a rejected file.
    moved_to : Path or None
        Where the file is now.
    skipped : bool
        True when the ledger showed the file was already handled and no retrain ran.
    """

    file_name: str
    state: str
    outcome: str | None = None
    exit_code: int | None = None
    error: str | None = None
    moved_to: Path | None = None
    skipped: bool = False
    decision: Any = field(default=None, repr=False)


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


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    if isinstance(exc, ErgodexError):
        return text or type(exc).__name__
    # Not an error we raise on purpose: say which kind, so a bug is recognisable as one.
    return f"internal error ({type(exc).__name__}): {text}"


def _unique_target(folder: Path, name: str) -> Path:
    """``folder/name``, or ``folder/<stem>.<n><suffix>`` when that name is taken (never overwrite)."""
    target = folder / name
    if not target.exists():
        return target
    stem, suffix = os.path.splitext(name)
    n = 2
    while True:
        target = folder / f"{stem}.{n}{suffix}"
        if not target.exists():
            return target
        n += 1


class Ledger:
    """The inbox's memory of which files were handled (SQLite, one row per file key).

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
        self._conn.execute(_LEDGER_SCHEMA)

    def close(self) -> None:
        self._conn.close()

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def get(self, file_name: str, size: int, sha256: str) -> sqlite3.Row | None:
        """The ledger row of a file key, or ``None`` if the file was never seen."""
        return self._conn.execute(
            "SELECT * FROM inbox_files WHERE file_name=? AND size=? AND sha256=?",
            (file_name, size, sha256),
        ).fetchone()

    def claim(self, file_name: str, size: int, sha256: str, model_name: str) -> sqlite3.Row | None:
        """Mark a file as being processed by this process and count the attempt.

        Returns the row as it was *before* the claim (``None`` for a new file) so the caller can
        see whether it was already done, rejected, interrupted earlier, or is being processed
        right now by another live watcher on this machine (``row["owner"]`` names it; such a
        file is not claimed). A file already done or rejected is not claimed again.
        """
        conn = self._conn
        me = _owner()
        conn.execute("BEGIN IMMEDIATE")
        try:
            row = self.get(file_name, size, sha256)
            now = utc_now()
            if row is None:
                conn.execute(
                    "INSERT INTO inbox_files (file_name, size, sha256, model_name, state, attempts,"
                    " owner, first_seen, updated) VALUES (?, ?, ?, ?, 'processing', 1, ?, ?, ?)",
                    (file_name, size, sha256, model_name, me, now, now),
                )
            elif row["state"] == "processing" and not owner_is_alive_elsewhere(row["owner"]):
                conn.execute(
                    "UPDATE inbox_files SET attempts=attempts+1, owner=?, updated=? "
                    "WHERE file_name=? AND size=? AND sha256=?",
                    (me, now, file_name, size, sha256),
                )
            conn.execute("COMMIT")
        except BaseException:
            conn.execute("ROLLBACK")
            raise
        return row

    def finish(
        self,
        file_name: str,
        size: int,
        sha256: str,
        *,
        state: str,
        outcome: str | None = None,
        exit_code: int | None = None,
        error: str | None = None,
        moved_to: str | None = None,
    ) -> None:
        """Record the final state of a file (``done`` or ``rejected``)."""
        self._conn.execute(
            "UPDATE inbox_files SET state=?, outcome=?, exit_code=?, error=?, moved_to=?, updated=?"
            " WHERE file_name=? AND size=? AND sha256=?",
            (state, outcome, exit_code, error, moved_to, utc_now(), file_name, size, sha256),
        )

    def rows(self) -> list[dict[str, Any]]:
        """Every row, oldest first (for inspection and tests)."""
        cursor = self._conn.execute("SELECT * FROM inbox_files ORDER BY first_seen, file_name")
        return [dict(row) for row in cursor.fetchall()]


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


def _scan(folder: Path) -> dict[str, tuple[int, int]]:
    """Candidate files in the inbox: name → (size, mtime in ns). Sub-folders are not entered."""
    found: dict[str, tuple[int, int]] = {}
    try:
        entries = list(os.scandir(folder))
    except FileNotFoundError:
        return found
    for entry in entries:
        if not is_candidate_name(entry.name):
            continue
        try:
            if not entry.is_file(follow_symlinks=False):
                continue
            st = entry.stat(follow_symlinks=False)
        except FileNotFoundError:  # renamed away between listing and stat
            continue
        found[entry.name] = (st.st_size, st.st_mtime_ns)
    return found


class _Watcher:
    """State of one :func:`watch` call (the previous scan, the ledger, counters)."""

    def __init__(self, folder: Path, name: str, registry: Any, retrain_kwargs: dict[str, Any]):
        self.folder = folder
        self.name = name
        self.registry = registry
        self.retrain_kwargs = retrain_kwargs
        self.done_dir = folder / DONE_FOLDER
        self.rejected_dir = folder / REJECTED_FOLDER
        self.previous: dict[str, tuple[int, int]] = {}
        self.ledger = Ledger(folder / LEDGER_NAME)

    def stable_files(self) -> list[str]:
        """Scan once; return files whose size and mtime match the previous scan (oldest first)."""
        current = _scan(self.folder)
        stable = [n for n, sig in current.items() if self.previous.get(n) == sig]
        for n, sig in current.items():
            if n not in stable:
                log.debug("seen %s (%d bytes); waiting for a stable size", n, sig[0])
        self.previous = current
        stable.sort(key=lambda n: (current[n][1], n))
        return stable

    def _move(self, source: Path, folder: Path) -> Path:
        folder.mkdir(exist_ok=True)
        target = _unique_target(folder, source.name)
        os.replace(source, target)
        return target

    def _reject(self, path: Path, size: int, sha: str, error: str) -> InboxItem:
        target = self._move(path, self.rejected_dir)
        note = target.with_name(target.name + ".error.txt")
        note.write_text(error + "\n", encoding="utf-8")
        self.ledger.finish(
            path.name, size, sha, state="rejected", exit_code=2, error=error, moved_to=str(target)
        )
        log.warning("rejected %s: %s (moved to %s)", path.name, error, target)
        return InboxItem(path.name, "rejected", exit_code=2, error=error, moved_to=target)

    def process(self, file_name: str) -> InboxItem | None:
        """Handle one stable file; ``None`` if it vanished meanwhile (another watcher took it)."""
        path = self.folder / file_name
        try:
            size = path.stat().st_size
            sha = file_sha256(path)
        except FileNotFoundError:
            return None
        before = self.ledger.claim(file_name, size, sha, self.name)
        if (before is not None and before["state"] == "processing"
                and owner_is_alive_elsewhere(before["owner"])):
            log.info("%s is being retrained by %s; leaving it", file_name, before["owner"])
            return None
        if before is not None and before["state"] in ("done", "rejected"):
            # Same name, size and bytes as a file handled before (e.g. a restart after a crash
            # between the retrain and the move, or the same file dropped twice): never twice.
            folder = self.done_dir if before["state"] == "done" else self.rejected_dir
            target = self._move(path, folder)
            log.info("%s was already %s earlier; moved to %s without retraining",
                     file_name, before["state"], target)
            return InboxItem(file_name, before["state"], exit_code=before["exit_code"],
                             error=before["error"], moved_to=target, skipped=True)
        if before is not None and before["attempts"] >= MAX_ATTEMPTS:
            error = (f"processing of {file_name} was interrupted {before['attempts']} times "
                     "(the watcher stopped mid-retrain); moved aside instead of trying again")
            return self._reject(path, size, sha, error)

        from ergodex.retraining import retrain

        log.info("retraining %s on %s (%d bytes, sha256 %s…)", self.name, file_name, size, sha[:12])
        try:
            decision = retrain(self.registry, self.name, path, **self.retrain_kwargs)
        except Exception as exc:  # noqa: BLE001 - one bad file must never stop the inbox
            error = _one_line(exc)
            if not isinstance(exc, ErgodexError):
                log.exception("unexpected error while retraining on %s", file_name)
            return self._reject(path, size, sha, error)

        target = self._move(path, self.done_dir)
        decision.to_json(target.with_name(target.name + ".decision.json"))
        code = decision.exit_code
        self.ledger.finish(file_name, size, sha, state="done", outcome=decision.outcome,
                           exit_code=code, moved_to=str(target))
        log.info("%s: %s (exit code %d); moved to %s", file_name, decision.outcome, code, target)
        return InboxItem(file_name, "done", outcome=decision.outcome, exit_code=code,
                         moved_to=target, decision=decision)


def watch(
    folder: str | os.PathLike[str],
    name: str,
    *,
    registry: Any,
    config: str | os.PathLike[str] | None = None,
    spec: Any = None,
    seed: int = 0,
    holdout: Any = None,
    report: bool = True,
    poll_interval: float = 2.0,
    once: bool = False,
    max_files: int | None = None,
    stop_event: threading.Event | None = None,
) -> list[InboxItem]:
    """Retrain model ``name`` once on every new complete dataset file that lands in ``folder``.

    Parameters
    ----------
    folder : path-like
        The inbox. ``done/`` and ``rejected/`` sub-folders and the ledger
        ``.ergodex-inbox.sqlite3`` are created inside it.
    name : str
        Registry name of the model to retrain.
    registry : ergodex.registry.Registry
        The registry to read the champion from and register challengers in.
    config : path-like, optional
        Fit settings TOML for the challenger (see :func:`ergodex.retraining.retrain`); read once
        here so that a broken config fails at start instead of rejecting every file.
    spec, seed, holdout, report
        Passed on to :func:`ergodex.retraining.retrain` unchanged.
    poll_interval : float
        Seconds between scans. A file must look the same on two scans in a row to be taken.
    once : bool
        Scan twice (``poll_interval`` apart), handle every file that was stable, and return.
    max_files : int, optional
        Return after this many files were handled (done or rejected).
    stop_event : threading.Event, optional
        Return at the next poll once this event is set (another thread, a signal handler).

    Returns
    -------
    list of InboxItem
        What happened to each file handled by this call, in order.

    Raises
    ------
    SettingsError
        The folder does not exist, the interval is not positive, or the config cannot be read.
    """
    inbox = Path(folder)
    if not inbox.is_dir():
        raise SettingsError(f"inbox folder {inbox} does not exist or is not a folder; create it first")
    if not poll_interval > 0:
        raise SettingsError(f"poll interval must be > 0 seconds, got {poll_interval!r}")
    if max_files is not None and max_files < 1:
        raise SettingsError(f"max_files must be at least 1, got {max_files!r}")
    retrain_kwargs: dict[str, Any] = {"seed": seed, "report": report}
    if config is not None:
        from ergodex.fitting import load_fit_settings

        retrain_kwargs["config"] = load_fit_settings(config)  # fails now, not once per file
    if spec is not None:
        retrain_kwargs["spec"] = spec
    if holdout is not None:
        retrain_kwargs["holdout"] = holdout

    watcher = _Watcher(inbox, name, registry, retrain_kwargs)
    handled: list[InboxItem] = []
    log.info("watching %s for %s (poll every %.3g s, ledger %s)", inbox, name, poll_interval,
             watcher.ledger.path)
    try:
        watcher.stable_files()  # first look: nothing can be stable before a second one
        while True:
            if _wait(stop_event, poll_interval):
                log.info("stop requested; leaving %s", inbox)
                break
            for file_name in watcher.stable_files():
                item = watcher.process(file_name)
                if item is not None:
                    handled.append(item)
                if max_files is not None and len(handled) >= max_files:
                    break
                if stop_event is not None and stop_event.is_set():
                    break
            if once or (max_files is not None and len(handled) >= max_files):
                break
    finally:
        watcher.ledger.close()
    return handled


def _wait(stop_event: threading.Event | None, seconds: float) -> bool:
    """Sleep ``seconds``; return True at once if a stop was requested."""
    if stop_event is None:
        time.sleep(seconds)
        return False
    return stop_event.wait(seconds)


def read_ledger(folder: str | os.PathLike[str]) -> list[dict[str, Any]]:
    """Every ledger row of an inbox folder (empty when nothing was ever handled there)."""
    path = Path(folder) / LEDGER_NAME
    if not path.exists():
        return []
    with Ledger(path) as ledger:
        return ledger.rows()
