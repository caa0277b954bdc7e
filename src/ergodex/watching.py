"""Watch a folder for new dataset files and retrain a registered model on each one.

Data arrive in an inbox folder (an instrument's export, a simulation campaign's output drop). Each
new *settled* file triggers exactly one :func:`ergodex.retraining.retrain`; the file is then moved
to ``done/`` (with its decision record beside it) or, when it cannot be used, to ``rejected/``
(with a one-line ``<file>.error.txt``). Nothing is ever deleted.

Rules, and why:

1. **Settled files only.** Writers should write to a temporary name and rename into the inbox;
   names that look temporary are ignored: dotfiles, ``~`` backups and the suffixes in
   :data:`TEMPORARY_SUFFIXES` (``.part``, ``.tmp``, …). A file is taken only once its size,
   modification time and inode have stayed the same for a *quiet period* (``settle`` seconds,
   :data:`DEFAULT_SETTLE` by default), so a file still being written in place is left alone until
   its writer pauses for that long. Sub-folders are not looked into.
2. **Claimed before any work.** A settled file is renamed (atomically, on the same file system)
   out of the inbox into the watcher's own area :data:`CLAIMED_FOLDER`, hashed there (sha256), and
   kept as ``.ergodex-claimed/<sha256>/<name>``; the retrain reads that copy, never the inbox path.
   A file that changed after it looked settled, or while it was hashed, goes back into the inbox
   to settle again; one that disappeared is skipped. Because the inbox name is free again as soon
   as a file is claimed, a new file written under the same name (write-then-rename) is new data:
   it settles, is claimed and is retrained on its own.
3. **Each content once, even across restarts.** A ledger in SQLite,
   ``<inbox>/.ergodex-inbox.sqlite3`` (it lives in the inbox folder, so the memory travels with
   the folder whatever registry home is used), keys every file by *file name + sha256 of its
   bytes*. A file whose key is already done is moved to ``done/`` without a second retrain; the
   same bytes under a new name, or new bytes under an old name, are new data.
4. **Rejections say why, and some are retried.** Every rejection records a reason (see
   :data:`REASONS`): ``data`` (the bytes cannot be read as a dataset: that content stays rejected;
   send a corrected file), ``settings`` (the file reads but does not fit the watcher's settings:
   model name, holdout, fit or check settings, registry), ``internal``, ``interrupted``,
   ``vanished`` and ``changed`` (still being written after the claim: back into the inbox). The
   ledger keeps a fingerprint of the watcher's settings with each file; a file rejected for
   ``settings`` or ``internal`` is taken back from ``rejected/`` and retried when a watcher starts
   with different settings. ``retry_rejected=True`` (``--retry-rejected``) retries every rejected
   file still in ``rejected/``.
5. **One file never stops the queue.** Every step of every file is guarded: an error becomes a
   ledger state with a one-line message, never a traceback that ends the loop. A file removed
   from the work area mid-retrain is recorded (its decision stands when the retrain finished).
6. **Crash recovery.** A file claimed by a watcher that died (its ledger row still
   ``processing``, its owner ``host:pid`` gone) is retried from the work area at the next start,
   at most :data:`MAX_ATTEMPTS` times in all, then moved aside (``interrupted``); a watcher
   stopped with Ctrl-C gives its attempt back first, so stopping it is never counted. A file
   caught half-way through being claimed goes back into the inbox. A file another live watcher
   on this machine is retraining right now is left to it. Run one watcher per folder per process.
7. **One log line per step** through the standard :mod:`logging` module (logger
   ``ergodex.watching``); the command line sets the level with ``--log-level``.

A retrain that runs and finds no acceptable model (exit code 1) is a processed file, not a
failure: its decision record says so, and the registry holds the drift event.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import logging
import os
import socket
import sqlite3
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ergodex.exceptions import DataError, ErgodexError, SettingsError
from ergodex.watch_ledger import (  # noqa: F401 - part of this module's interface
    MAX_ATTEMPTS,
    REASONS,
    Ledger,
    claim_verdict,
    owner_is_alive_elsewhere,
    should_retry,
)

log = logging.getLogger(__name__)

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
#: Each rejection reason (:data:`REASONS`) in a few words, for the line printed per file.
_SHORT_REASON = {
    "data": "bad data",
    "settings": "settings",
    "internal": "internal error",
    "interrupted": "interrupted",
    "vanished": "vanished",
    "changed": "still being written",
}
#: Prefix of the folders that hold a file while it is being claimed (``.take-<pid>@<host>-<n>``).
_TAKE_PREFIX = ".take-"

Signature = tuple[int, int, int]  # (inode, size, mtime in ns)


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
        The one-line error of a rejected file (or the note on a done file whose copy vanished).
    moved_to : Path or None
        Where the file is now (``None`` when it disappeared from the work area).
    skipped : bool
        True when the ledger showed the file was already handled and no retrain ran.
    reason : str or None
        Why a file was rejected (a key of :data:`REASONS`).
    sha256 : str or None
        Hex sha256 of the file's bytes (the ledger key with the name).
    """

    file_name: str
    state: str
    outcome: str | None = None
    exit_code: int | None = None
    error: str | None = None
    moved_to: Path | None = None
    skipped: bool = False
    reason: str | None = None
    sha256: str | None = None
    decision: Any = field(default=None, repr=False)

    def line(self) -> str:
        """One line for a person: ``name: what happened[: error]``."""
        if self.state == "rejected":
            what = f"rejected ({_SHORT_REASON.get(self.reason or '', 'earlier')})"
        else:
            what = self.outcome or self.state
        if self.skipped:
            what = f"already {what}"
        extra = f": {self.error}" if self.error else ""
        where = f" -> {self.moved_to}" if self.moved_to is not None and not self.error else ""
        return f"{self.file_name}: {what}{where}{extra}"


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


def settings_fingerprint(name: str, registry: Any, retrain_kwargs: dict[str, Any]) -> str:
    """Short sha256 of the settings a retrain depends on (model, registry, fit, check, holdout).

    Stored with every file in the ledger: a file rejected because it did not fit the settings is
    retried when a watcher starts with a different fingerprint.
    """
    from ergodex.jsonable import jsonable
    from ergodex.retraining import DEFAULT_HOLDOUT

    spec: Any = retrain_kwargs.get("spec")
    if callable(getattr(spec, "to_dict", None)):
        spec = spec.to_dict()
    payload = {
        "model": name,
        "registry": str(getattr(registry, "home", "")),
        "config": retrain_kwargs.get("config"),
        "spec": spec,
        "seed": retrain_kwargs.get("seed"),
        "holdout": retrain_kwargs.get("holdout", DEFAULT_HOLDOUT),
    }
    text = json.dumps(jsonable(payload), sort_keys=True, default=repr)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    if isinstance(exc, ErgodexError):
        return text or type(exc).__name__
    # Not an error we raise on purpose: say which kind, so a bug is recognisable as one.
    return f"internal error ({type(exc).__name__}): {text}"


def _reason_of(exc: BaseException, *, reading: bool) -> str:
    """``data`` for a file that cannot be read; ``settings`` for a readable file that does not
    fit the watcher's settings (or environment); ``internal`` for anything unexpected."""
    if not isinstance(exc, ErgodexError):
        return "internal"
    return "data" if reading and isinstance(exc, DataError) else "settings"


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


class _Watcher:
    """State of one :func:`watch` call: what each file looked like and since when, the ledger.

    ``clock`` (monotonic seconds) times the quiet period; tests may pass their own.
    """

    def __init__(
        self,
        folder: Path,
        name: str,
        registry: Any,
        retrain_kwargs: dict[str, Any],
        *,
        settle: float = 0.0,
        retry_rejected: bool = False,
        fingerprint: str | None = None,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.folder = Path(folder)
        self.name = name
        self.registry = registry
        self.retrain_kwargs = retrain_kwargs
        self.settle = settle
        self.retry_rejected = retry_rejected
        self.fingerprint = fingerprint
        self.clock = clock
        self.done_dir = self.folder / DONE_FOLDER
        self.rejected_dir = self.folder / REJECTED_FOLDER
        self.claimed_root = self.folder / CLAIMED_FOLDER
        #: name → (signature, clock time it was first seen with that signature)
        self.seen: dict[str, tuple[Signature, float]] = {}
        self._takes = itertools.count(1)
        self.ledger = Ledger(self.folder / LEDGER_NAME)

    # --- noticing settled files ----------------------------------------------------------------
    def stable_files(self) -> list[str]:
        """Scan once; return the files unchanged for at least ``settle`` seconds (oldest first).

        A file must be seen on two scans at least; with ``settle=0`` that is all it needs.
        """
        now = self.clock()
        current = _scan(self.folder)
        stable = []
        for n, sig in current.items():
            before = self.seen.get(n)
            if before is None or before[0] != sig:
                self.seen[n] = (sig, now)
                log.debug("seen %s (%d bytes); waiting for it to settle", n, sig[1])
            elif now - before[1] >= self.settle:
                stable.append(n)
        for n in set(self.seen) - set(current):
            del self.seen[n]
        stable.sort(key=lambda n: (current[n][2], n))
        return stable

    # --- claiming ------------------------------------------------------------------------------
    def _new_take_dir(self) -> Path:
        """A fresh folder ``.take-<pid>@<host>-<n>`` naming this process as the claimer."""
        while True:
            label = f"{_TAKE_PREFIX}{os.getpid()}@{socket.gethostname()}-{next(self._takes)}"
            folder = self.claimed_root / label
            try:
                folder.mkdir(parents=True)
            except FileExistsError:  # left by an earlier process that had the same pid
                continue
            return folder

    def _put_back(self, path: Path, name: str) -> Path | None:
        """Return a file to the inbox (under a free name) to settle again; never overwrite."""
        self.seen.pop(name, None)
        target = _move_no_clobber(path, self.folder, name)
        if target is not None and target.name != name:
            log.info("%s went back into the inbox as %s (the name was taken)", name, target.name)
        if path.parent.name.startswith(_TAKE_PREFIX):
            _remove_empty(path.parent)
        return target

    def take(self, file_name: str) -> InboxItem | None:
        """Claim a settled inbox file and handle it; ``None`` if it was not taken after all."""
        expected = self.seen.pop(file_name, (None, 0.0))[0]
        take_dir = self._new_take_dir()
        held = take_dir / file_name
        try:
            os.rename(self.folder / file_name, held)
        except FileNotFoundError:
            log.info("%s disappeared before it could be claimed; skipped", file_name)
            _remove_empty(take_dir)
            return None
        except OSError as exc:  # e.g. no permission to move it: try again once it settles again
            log.warning("could not claim %s (%s); trying again later", file_name, exc)
            _remove_empty(take_dir)
            return None
        return self.handle(file_name, held, expected=expected)

    def handle(
        self, file_name: str, path: Path, *, expected: Signature | None = None
    ) -> InboxItem | None:
        """Hash a file held in the work area, ask the ledger, and run, skip or set it aside."""
        try:
            sig = _signature(path.stat())
            if expected is not None and sig != expected:
                log.info("%s changed after it looked settled; back to the inbox", file_name)
                self._put_back(path, file_name)
                return None
            sha = file_sha256(path)
            if _signature(path.stat()) != sig:
                log.info("%s changed while it was hashed; back to the inbox", file_name)
                self._put_back(path, file_name)
                return None
            final = self.claimed_root / sha / file_name
            verdict, before = self.ledger.claim(
                file_name,
                sig[1],
                sha,
                self.name,
                settings_fingerprint=self.fingerprint,
                claimed_path=str(final),
                retry_rejected=self.retry_rejected,
            )
        except FileNotFoundError:
            log.info("%s disappeared from %s while it was claimed; skipped", file_name, path.parent)
            if path.parent.name.startswith(_TAKE_PREFIX):
                _remove_empty(path.parent)
            return None
        except (OSError, sqlite3.Error) as exc:  # unreadable, or the ledger is locked or full
            log.warning("could not claim %s (%s); back to the inbox to try again", file_name, exc)
            self._put_back(path, file_name)
            return None
        if verdict == "busy":
            assert before is not None  # "busy" is only said of an existing ledger row
            log.info("%s is being retrained by %s; leaving it", file_name, before["owner"])
            if path != final:
                self._put_back(path, file_name)
            return None
        if verdict in ("done", "rejected"):
            return self._already(file_name, path, sha, before)
        if verdict == "exhausted":
            assert before is not None  # "exhausted" is only said of an existing ledger row
            error = (
                f"processing of {file_name} was interrupted {before['attempts']} times "
                "(the watcher stopped mid-retrain); moved aside instead of trying again"
            )
            return self._reject(file_name, path, sha, error, "interrupted")
        if path != final:
            final.parent.mkdir(parents=True, exist_ok=True)
            try:
                os.replace(path, final)  # a leftover at ``final`` holds these very bytes
            except FileNotFoundError:
                return self._vanished(file_name, path, sha)
            if path.parent.name.startswith(_TAKE_PREFIX):
                _remove_empty(path.parent)
        if before is not None and before["state"] == "rejected":
            log.info("retrying %s (rejected earlier: %s)", file_name, before["error"])
        return self._run(file_name, final, sig, sha)

    def _already(self, file_name: str, path: Path, sha: str, before: Any) -> InboxItem:
        """Same name and bytes as a file handled before: never twice; file it beside the first."""
        state = before["state"]
        folder = self.done_dir if state == "done" else self.rejected_dir
        target = _move_no_clobber(path, folder, file_name)
        if target is not None and state == "rejected" and before["error"]:
            _write_note(target, before["error"])
        _remove_empty(path.parent)
        log.info(
            "%s was already %s earlier; moved to %s without retraining", file_name, state, target
        )
        return InboxItem(
            file_name,
            state,
            exit_code=before["exit_code"],
            error=before["error"],
            moved_to=target,
            skipped=True,
            reason=before["reason"],
            sha256=sha,
        )

    # --- running -------------------------------------------------------------------------------
    def _run(self, file_name: str, claimed: Path, sig: Signature, sha: str) -> InboxItem:
        """Read the claimed copy and retrain on it; every failure becomes a ledger state."""
        from ergodex.readers import read_series
        from ergodex.retraining import retrain

        log.info(
            "retraining %s on %s (%d bytes, sha256 %s…)", self.name, file_name, sig[1], sha[:12]
        )
        shown = str(self.folder / file_name)
        reading = True
        try:
            series = read_series(claimed)
            reading = False
            if claimed.exists() and _changed(claimed, sig):
                return self._still_written(file_name, claimed, sha)
            decision = retrain(self.registry, self.name, series, **self.retrain_kwargs)
        except Exception as exc:  # one bad file must never stop the inbox
            if not claimed.exists():
                return self._vanished(file_name, claimed, sha)
            reason = _reason_of(exc, reading=reading)
            if reason == "internal":  # the trace, for a bug report, only at DEBUG level
                log.debug("unexpected error while retraining on %s", file_name, exc_info=True)
            error = _one_line(exc).replace(str(claimed), shown)
            return self._reject(file_name, claimed, sha, error, reason)
        except KeyboardInterrupt:
            # Ctrl-C is how a person stops the watcher: not a crash, so the attempt is given
            # back and the file runs again from the work area at the next start.
            self.ledger.release(file_name, sha)
            log.info("stopped during the retrain on %s; it runs again at the next start", file_name)
            raise
        return self._done(file_name, claimed, sig, sha, decision)

    def _done(
        self, file_name: str, claimed: Path, sig: Signature, sha: str, decision: Any
    ) -> InboxItem:
        code, outcome = decision.exit_code, decision.outcome
        planned = _unique_target(self.done_dir, file_name)
        # The ledger first: a crash before the move leaves a done row whose file the next
        # start files into done/, never a second retrain.
        self.ledger.finish(
            file_name, sha, state="done", outcome=outcome, exit_code=code, moved_to=str(planned)
        )
        note = None
        if _changed(claimed, sig) and claimed.exists():
            # Written to during the retrain: the decision is about the bytes claimed; the
            # grown file is new data and goes back into the inbox to be claimed afresh.
            self._put_back(claimed, file_name)
            target = None
            note = (
                f"{file_name}: was written to during the retrain; the decision stands for "
                "the bytes claimed and the grown file went back into the inbox"
            )
        else:
            target = _move_no_clobber(claimed, self.done_dir, file_name)
            if target is None:
                note = (
                    f"{file_name}: the claimed copy {claimed} was removed during the "
                    f"retrain; the decision stands (recorded in {planned.name}.decision.json)"
                    " but the data file is not in done/"
                )
        _remove_empty(claimed.parent)
        record = target if target is not None else planned
        if note is not None:
            log.warning("%s", note)
        if target != planned:
            self.ledger.finish(
                file_name,
                sha,
                state="done",
                outcome=outcome,
                exit_code=code,
                moved_to=None if target is None else str(target),
                error=note,
            )
        try:
            decision.to_json(record.with_name(record.name + ".decision.json"))
        except OSError as exc:
            log.error("could not write the decision record of %s: %s", file_name, exc)
        log.info("%s: %s (exit code %d); moved to %s", file_name, outcome, code, target)
        return InboxItem(
            file_name,
            "done",
            outcome=outcome,
            exit_code=code,
            error=note,
            moved_to=target,
            sha256=sha,
            decision=decision,
        )

    def _reject(self, file_name: str, path: Path, sha: str, error: str, reason: str) -> InboxItem:
        planned = _unique_target(self.rejected_dir, file_name)
        self.ledger.finish(
            file_name,
            sha,
            state="rejected",
            exit_code=2,
            error=error,
            moved_to=str(planned),
            reason=reason,
        )
        target = _move_no_clobber(path, self.rejected_dir, file_name)
        _remove_empty(path.parent)
        if target is None:
            return self._vanished(file_name, path, sha)
        if target != planned:
            self.ledger.finish(
                file_name,
                sha,
                state="rejected",
                exit_code=2,
                error=error,
                moved_to=str(target),
                reason=reason,
            )
        _write_note(target, error)
        log.warning(
            "rejected %s (%s): %s (moved to %s)", file_name, _SHORT_REASON[reason], error, target
        )
        return InboxItem(
            file_name,
            "rejected",
            exit_code=2,
            error=error,
            moved_to=target,
            reason=reason,
            sha256=sha,
        )

    def _still_written(self, file_name: str, claimed: Path, sha: str) -> InboxItem:
        """A claimed file that grew before the retrain: back to the inbox, nothing retrained."""
        error = (
            f"{file_name}: was still being written after it was claimed; it went back into "
            "the inbox to settle again (writers should write to a temporary name and "
            "rename, or the quiet period --settle should be longer than their pauses)"
        )
        self.ledger.finish(
            file_name, sha, state="rejected", exit_code=2, error=error, reason="changed"
        )
        target = self._put_back(claimed, file_name)
        _remove_empty(claimed.parent)
        log.warning("%s", error)
        return InboxItem(
            file_name,
            "rejected",
            exit_code=2,
            error=error,
            reason="changed",
            moved_to=target,
            sha256=sha,
        )

    def _vanished(self, file_name: str, path: Path, sha: str) -> InboxItem:
        error = (
            f"{file_name}: the claimed copy {path} disappeared before the retrain could "
            "finish; drop the file into the inbox again to retry it"
        )
        self.ledger.finish(
            file_name, sha, state="rejected", exit_code=2, error=error, reason="vanished"
        )
        _remove_empty(path.parent)
        log.warning("%s", error)
        return InboxItem(
            file_name, "rejected", exit_code=2, error=error, reason="vanished", sha256=sha
        )

    # --- at start ------------------------------------------------------------------------------
    def recover(self) -> list[tuple[str, Path]]:
        """Tidy up after a watcher that died, and collect files to (re)run before the scan.

        Files caught half-way through a claim go back into the inbox; claimed files whose
        retrain was interrupted are queued (their attempt is counted when they run); files whose
        row is final but which were not moved yet are filed; rejected files that are to be
        retried (see :func:`should_retry`) are taken back from ``rejected/``.
        """
        queue: list[tuple[str, Path]] = []
        root = self.claimed_root
        for folder in sorted(root.iterdir()) if root.is_dir() else []:
            if not folder.is_dir():
                continue
            if folder.name.startswith(_TAKE_PREFIX):
                if owner_is_alive_elsewhere(_take_owner(folder.name)):
                    continue  # another watcher is claiming this file right now
                for path in sorted(folder.iterdir()):
                    log.info(
                        "%s was being claimed when a watcher stopped; back to the inbox", path.name
                    )
                    self._put_back(path, path.name)
                _remove_empty(folder)
                continue
            for path in sorted(p for p in folder.iterdir() if p.is_file()):
                row = self.ledger.get(path.name, folder.name)
                state = None if row is None else row["state"]
                if state in ("done", "rejected"):
                    home = self.done_dir if state == "done" else self.rejected_dir
                    target = _move_no_clobber(path, home, path.name)
                    log.info(
                        "%s was left in the work area after it was %s; moved to %s",
                        path.name,
                        state,
                        target,
                    )
                elif row is None or not owner_is_alive_elsewhere(row["owner"]):
                    log.info(
                        "%s was claimed by a watcher that stopped; running it again", path.name
                    )
                    queue.append((path.name, path))
            _remove_empty(folder)
        queued = {str(path) for _, path in queue}
        for entry in self.ledger.rows():
            claimed = entry["claimed_path"]
            if (
                entry["state"] == "processing"
                and claimed
                and claimed not in queued
                and not owner_is_alive_elsewhere(entry["owner"])
                and not Path(claimed).exists()
            ):
                self._vanished(entry["file_name"], Path(claimed), entry["sha256"])
            elif (
                entry["state"] == "rejected"
                and entry["moved_to"]
                and should_retry(entry, self.fingerprint, self.retry_rejected)
            ):
                taken = self._take_back(entry)
                if taken is not None:
                    queue.append((entry["file_name"], taken))
        return queue

    def _take_back(self, row: Any) -> Path | None:
        """Move a rejected file from ``rejected/`` into a take folder to be tried again."""
        source = Path(row["moved_to"])
        if not source.is_file():
            return None
        take_dir = self._new_take_dir()
        held = take_dir / row["file_name"]
        try:
            os.rename(source, held)
        except FileNotFoundError:
            _remove_empty(take_dir)
            return None
        source.with_name(source.name + ".error.txt").unlink(missing_ok=True)
        log.info(
            "taking %s back from %s to retry it (%s)",
            row["file_name"],
            source,
            "--retry-rejected" if self.retry_rejected else "the settings changed",
        )
        return held


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
    settle: float = DEFAULT_SETTLE,
    retry_rejected: bool = False,
    once: bool = False,
    max_files: int | None = None,
    stop_event: threading.Event | None = None,
    echo: Callable[[str], None] | None = None,
    progress: Callable[[str], None] | None = None,
) -> list[InboxItem]:
    """Retrain model ``name`` once on every new settled dataset file that lands in ``folder``.

    Parameters
    ----------
    folder : path-like
        The inbox. ``done/``, ``rejected/``, the work area ``.ergodex-claimed/`` and the ledger
        ``.ergodex-inbox.sqlite3`` are created inside it.
    name : str
        Registry name of the model to retrain.
    registry : ergodex.registry.Registry
        The registry to read the incumbent from and register refits in.
    config : path-like, optional
        Fit settings TOML for the refit (see :func:`ergodex.retraining.retrain`); read once
        here so that a broken config fails at start instead of rejecting every file.
    spec, seed, holdout, report, progress
        Passed on to :func:`ergodex.retraining.retrain` unchanged.
    poll_interval : float
        Seconds between scans.
    settle : float
        Quiet period: seconds a file's size, modification time and inode must stay the same
        before it is claimed (0: the same on two scans in a row).
    retry_rejected : bool
        Take every file still in ``rejected/`` back and try it again (and retry a rejected file
        dropped again), whatever the reason it was rejected.
    once : bool
        Run what recovery queued, scan, wait one quiet period (at least ``poll_interval``),
        handle every file that settled, and return.
    max_files : int, optional
        Return after this many files were handled (done or rejected).
    stop_event : threading.Event, optional
        Return at the next poll once this event is set (another thread, a signal handler).
    echo : callable, optional
        Called with one line saying what is watched at the start, then one line per file handled.

    Returns
    -------
    list of InboxItem
        What happened to each file handled by this call, in order.

    Raises
    ------
    SettingsError
        The folder does not exist, an interval is out of range, or the config cannot be read.
    """
    inbox = Path(folder)
    if not inbox.is_dir():
        raise SettingsError(
            f"inbox folder {inbox} does not exist or is not a folder; create it first"
        )
    if not poll_interval > 0:
        raise SettingsError(f"poll interval must be > 0 seconds, got {poll_interval!r}")
    if not settle >= 0:
        raise SettingsError(f"quiet period (settle) must be >= 0 seconds, got {settle!r}")
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
    fingerprint = settings_fingerprint(name, registry, retrain_kwargs)
    if progress is not None:
        retrain_kwargs["progress"] = progress

    watcher = _Watcher(
        inbox,
        name,
        registry,
        retrain_kwargs,
        settle=settle,
        retry_rejected=retry_rejected,
        fingerprint=fingerprint,
    )
    handled: list[InboxItem] = []
    start_line = (
        f"watching {inbox} for new files to retrain {name} on: a file is taken once unchanged "
        f"for {settle:g} s (checked every {poll_interval:g} s) and claimed into "
        f"{watcher.claimed_root}; processed files go to {watcher.done_dir}, rejected ones to "
        f"{watcher.rejected_dir}; ledger {watcher.ledger.path}"
    )
    log.info("%s", start_line)
    if echo is not None:
        echo(start_line)

    def run_one(step: Callable[..., InboxItem | None], *args: Any) -> bool:
        """Run one file's step, guarded; True when the call should return now."""
        try:
            item = step(*args)
        except Exception as exc:  # a bug or a broken disk must not end the loop
            log.error(
                "unexpected error while handling %s (%s); going on with the next file",
                args[0],
                _one_line(exc),
            )
            log.debug("the trace of that error", exc_info=True)
            item = None
        if item is not None:
            handled.append(item)
            if echo is not None:
                echo(item.line())
        limit = max_files is not None and len(handled) >= max_files
        return limit or (stop_event is not None and stop_event.is_set())

    try:
        try:
            queue = watcher.recover()
        except Exception as exc:  # recovery is tidying; the inbox still works without it
            log.error(
                "could not recover the work area %s (%s)", watcher.claimed_root, _one_line(exc)
            )
            log.debug("the trace of that error", exc_info=True)
            queue = []
        for file_name, path in queue:
            if run_one(watcher.handle, file_name, path):
                return handled
        watcher.stable_files()  # first look: nothing can be stable before a second one
        wait = max(poll_interval, settle) if once else poll_interval
        while True:
            if _wait(stop_event, wait):
                log.info("stop requested; leaving %s", inbox)
                break
            for file_name in watcher.stable_files():
                if run_one(watcher.take, file_name):
                    return handled
            if once:
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
