"""Queries: resolve references, list, show, history, and reads verified against their hashes."""

from __future__ import annotations

import json
import sqlite3
from dataclasses import replace
from pathlib import Path
from typing import Any

from ergodex.exceptions import IntegrityError, RegistryError
from ergodex.registry.index import RegistryIndex
from ergodex.registry.names import CURRENT, REF_SEPARATOR, format_ref, split_ref, validate_name
from ergodex.registry.records import STATUSES, Event, ModelSummary, VersionInfo
from ergodex.registry.storage import _hash_file, sha256_hex


class QueriesMixin(RegistryIndex):
    """Read versions, summaries and histories; every read that shows a status hashes files."""

    def _resolve(self, conn, ref: Any, *, need_version: bool = False) -> sqlite3.Row:
        name, version, current = split_ref(ref)
        if need_version and version is None and not current:
            raise RegistryError(
                f"name a version for this change: {format_ref(name, 'VERSION')} "
                f"(or {format_ref(name, CURRENT)} for the accepted one)"
            )
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
                    f"'ergodex models accept {format_ref(name, 'VERSION')}' or load a version "
                    f"explicitly as {format_ref(name, 'VERSION')}"
                )
            return row
        row = self._row(conn, name, version)
        if row is None:
            latest = conn.execute(
                "SELECT MAX(version) FROM versions WHERE name = ?", (name,)
            ).fetchone()[0]
            raise RegistryError(
                f"{format_ref(name, version)} does not exist; versions of {name} run 1..{latest}"
            )
        return row

    def get(self, ref: str | VersionInfo) -> VersionInfo:
        """Metadata of ``"name/v"``, or of the accepted version (``"name"``, ``"name/current"``).

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
        """Hash every file of every version (of ``"name"``, or one ``"name/v"``); return them.

        Each returned info has ``integrity`` ``"ok"`` or ``"failed"``; nothing raises for a
        changed file, so that one damaged version does not hide the state of the others.
        """
        if ref is None:
            return [i for m in self.list_models() for i in self.versions(m.name)]
        name, version, current = split_ref(ref)
        return self.versions(name) if version is None and not current else [self.get(ref)]

    def _resolve_name(self, conn, name: str) -> None:
        validate_name(name)
        if REF_SEPARATOR in name:  # pragma: no cover - validate_name already refuses '/'
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

        ``"name/v"`` (or ``"name/current"``) gives the events of one version only.
        """
        with self._connect() as conn:
            base, version, current = split_ref(name)
            if version is None and not current:
                self._resolve_name(conn, base)
                conn = self._live(conn)  # _resolve_name raised if there is no index
                rows = conn.execute(
                    "SELECT * FROM events WHERE name = ? ORDER BY time, id", (base,)
                ).fetchall()
            else:
                row = self._resolve(conn, name)
                conn = self._live(conn)  # _resolve raised if there is no index
                rows = conn.execute(
                    "SELECT * FROM events WHERE name = ? AND version = ? ORDER BY time, id",
                    (base, row["version"]),
                ).fetchall()
            return [Event.from_row(r) for r in rows]

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
        """The surrogate of ``"name/v"``, or of the accepted version for ``"name"`` (at most one).

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
