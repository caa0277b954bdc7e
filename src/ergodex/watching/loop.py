"""``watch``: the loop that runs one watcher over an inbox until it is told to stop, and
``read_ledger`` for what an inbox remembers."""

from __future__ import annotations

import logging
import os
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from ergodex.exceptions import SettingsError
from ergodex.watch_ledger import Ledger
from ergodex.watching.inbox import DEFAULT_SETTLE, LEDGER_NAME
from ergodex.watching.items import InboxItem, _one_line, settings_fingerprint
from ergodex.watching.watcher import _Watcher

log = logging.getLogger("ergodex.watching")  # one logger for the whole watcher (documented)


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
        The folder does not exist, an interval is out of range, the config cannot be read, or
        ``name`` holds a version (``NAME/VERSION``).
    RegistryError
        ``name`` is not a model name (the former ``NAME@VERSION`` form gets the form to write).
    """
    from ergodex.registry import split_ref

    bare, version, current = split_ref(name)  # refuses NAME@VERSION, saying how to write it
    if version is not None or current:
        raise SettingsError(
            f"watch retrains a name's accepted version (the incumbent); give {bare} without "
            "/VERSION"
        )
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
