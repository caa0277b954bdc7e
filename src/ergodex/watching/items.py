"""What happened to one inbox file and why: the item returned per file, the rejection reasons'
short words and one-line messages, and the fingerprint of the settings a retrain depends on."""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ergodex.exceptions import DataError, ErgodexError, one_line

#: Each rejection reason (:data:`~ergodex.watch_ledger.REASONS`) in a few words, for the line
#: printed per file.
_SHORT_REASON = {
    "data": "bad data",
    "settings": "settings",
    "internal": "internal error",
    "interrupted": "interrupted",
    "vanished": "vanished",
    "changed": "still being written",
}


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
    """:func:`~ergodex.exceptions.one_line`, marked as an internal error when ``exc`` is not one
    ergodex raises on purpose: the ledger and the error notes of rejected files keep the mark, so
    a bug is recognisable as one there."""
    if isinstance(exc, ErgodexError):
        return one_line(exc)
    return f"internal error ({type(exc).__name__}): {one_line(str(exc))}"


def _reason_of(exc: BaseException, *, reading: bool) -> str:
    """``data`` for a file that cannot be read; ``settings`` for a readable file that does not
    fit the watcher's settings (or environment); ``internal`` for anything unexpected."""
    if not isinstance(exc, ErgodexError):
        return "internal"
    return "data" if reading and isinstance(exc, DataError) else "settings"
