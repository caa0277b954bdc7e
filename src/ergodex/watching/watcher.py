"""One watcher's work on the inbox: see files settle, claim them, retrain on each once, move them
to ``done/`` or ``rejected/``, and recover what a watcher that died left claimed (the rules are in
:mod:`ergodex.watching`)."""

from __future__ import annotations

import itertools
import logging
import os
import socket
import sqlite3
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from ergodex.watch_ledger import Ledger
from ergodex.watching.inbox import (
    _TAKE_PREFIX,
    CLAIMED_FOLDER,
    DONE_FOLDER,
    LEDGER_NAME,
    REJECTED_FOLDER,
    Signature,
    _changed,
    _move_no_clobber,
    _remove_empty,
    _scan,
    _signature,
    _unique_target,
    _write_note,
    file_sha256,
)
from ergodex.watching.items import _SHORT_REASON, InboxItem, _one_line, _reason_of
from ergodex.watching.recovery import recover as recover_work_area

log = logging.getLogger("ergodex.watching")  # one logger for the whole watcher (documented)


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
        """Tidy up after a watcher that died; the files to (re)run before the scan (see
        :func:`ergodex.watching.recovery.recover`)."""
        return recover_work_area(self)
