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

# The package's parts, each with one job: inbox (the folder on disk), items (what happened to a
# file), watcher (settle, claim, retrain, move), recovery (what a stopped watcher left) and loop
# (watch). Every name below was importable
# from ergodex.watching when it was one module, and stays so.
from ergodex.watch_ledger import (  # noqa: F401 - part of this package's interface
    MAX_ATTEMPTS,
    REASONS,
    Ledger,
    claim_verdict,
    owner_is_alive_elsewhere,
    should_retry,
)
from ergodex.watching.inbox import (  # noqa: F401
    CLAIMED_FOLDER,
    DEFAULT_SETTLE,
    DONE_FOLDER,
    LEDGER_NAME,
    REJECTED_FOLDER,
    TEMPORARY_SUFFIXES,
    Signature,
    file_sha256,
    is_candidate_name,
)
from ergodex.watching.items import InboxItem, _one_line, settings_fingerprint  # noqa: F401
from ergodex.watching.loop import read_ledger, watch  # noqa: F401
from ergodex.watching.watcher import _Watcher  # noqa: F401
