"""Recovery at a watcher's start: what a watcher that died (or was stopped) left in the work
area goes back into the inbox, is filed, or is queued to run again; rejected files that are to be
retried are taken back (rule 6 in :mod:`ergodex.watching`)."""

from __future__ import annotations

import logging
import os
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ergodex.watch_ledger import owner_is_alive_elsewhere, should_retry
from ergodex.watching.inbox import _TAKE_PREFIX, _move_no_clobber, _remove_empty, _take_owner

if TYPE_CHECKING:
    from ergodex.watching.watcher import _Watcher

log = logging.getLogger("ergodex.watching")  # one logger for the whole watcher (documented)


def recover(watcher: _Watcher) -> list[tuple[str, Path]]:
    """Tidy up after a watcher that died, and collect the files ``watcher`` is to (re)run before
    its first scan.

    Files caught half-way through a claim go back into the inbox; claimed files whose
    retrain was interrupted are queued (their attempt is counted when they run); files whose
    row is final but which were not moved yet are filed; rejected files that are to be
    retried (see :func:`should_retry`) are taken back from ``rejected/``.
    """
    queue: list[tuple[str, Path]] = []
    root = watcher.claimed_root
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
                watcher._put_back(path, path.name)
            _remove_empty(folder)
            continue
        for path in sorted(p for p in folder.iterdir() if p.is_file()):
            row = watcher.ledger.get(path.name, folder.name)
            state = None if row is None else row["state"]
            if state in ("done", "rejected"):
                home = watcher.done_dir if state == "done" else watcher.rejected_dir
                target = _move_no_clobber(path, home, path.name)
                log.info(
                    "%s was left in the work area after it was %s; moved to %s",
                    path.name,
                    state,
                    target,
                )
            elif row is None or not owner_is_alive_elsewhere(row["owner"]):
                log.info("%s was claimed by a watcher that stopped; running it again", path.name)
                queue.append((path.name, path))
        _remove_empty(folder)
    queued = {str(path) for _, path in queue}
    for entry in watcher.ledger.rows():
        claimed = entry["claimed_path"]
        if (
            entry["state"] == "processing"
            and claimed
            and claimed not in queued
            and not owner_is_alive_elsewhere(entry["owner"])
            and not Path(claimed).exists()
        ):
            watcher._vanished(entry["file_name"], Path(claimed), entry["sha256"])
        elif (
            entry["state"] == "rejected"
            and entry["moved_to"]
            and should_retry(entry, watcher.fingerprint, watcher.retry_rejected)
        ):
            taken = _take_back(watcher, entry)
            if taken is not None:
                queue.append((entry["file_name"], taken))
    return queue


def _take_back(watcher: _Watcher, row: Any) -> Path | None:
    """Move a rejected file from ``rejected/`` into a take folder to be tried again."""
    source = Path(row["moved_to"])
    if not source.is_file():
        return None
    take_dir = watcher._new_take_dir()
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
        "--retry-rejected" if watcher.retry_rejected else "the settings changed",
    )
    return held
