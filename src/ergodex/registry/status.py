"""Status changes: allowed transitions, acceptance rules, events, one accepted version per name."""

from __future__ import annotations

import re
import sqlite3

from ergodex.exceptions import RegistryError
from ergodex.registry.index import _log_status
from ergodex.registry.names import format_ref, parse_ref
from ergodex.registry.queries import QueriesMixin
from ergodex.registry.records import Event, VersionInfo
from ergodex.registry.storage import _bare_hash

# Allowed status changes (docs/formats.md, "Registry home"): from -> set of targets.
TRANSITIONS = {
    "candidate": {"accepted", "rejected"},
    "accepted": {"retired"},
    "rejected": set(),
    "retired": set(),
}

# Events that change a status, or that registration writes; record_event may not use these names.
RESERVED_EVENTS = {"registered", "imported", "accepted", "rejected", "retired", "recovered"}

_EVENT_PATTERN = re.compile(r"[a-z][a-z0-9-]{0,39}")


class StatusMixin(QueriesMixin):
    """Accept, reject, retire and record events; each change is one event in one transaction."""

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
            raise RegistryError(f"name a version to accept: {format_ref(name, 'VERSION')}")
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
                        f"{format_ref(row['name'], row['version'])} is {current}; it cannot become "
                        f"{target} "
                        f"(allowed from {current}: {allowed})"
                    )
                if target == "accepted":
                    problems = self._acceptance_problems(self._info_from_row(conn, row))
                    override = override and bool(problems)
                    if problems and not override:  # the scorecard cannot change, but be strict
                        raise RegistryError(
                            f"{format_ref(row['name'], row['version'])} cannot be accepted"
                        )
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
