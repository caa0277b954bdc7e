"""Registration: stage the files, then number, move and index them in one write transaction."""

from __future__ import annotations

import functools
import json
import os
import shutil
import sqlite3
import sys
from collections.abc import Mapping
from dataclasses import replace
from pathlib import Path
from typing import Any

from ergodex.exceptions import ModelFileError, RegistryError
from ergodex.registry.index import RegistryIndex, _log_status, log
from ergodex.registry.names import format_ref, parse_ref, validate_name
from ergodex.registry.records import VersionInfo
from ergodex.registry.storage import (
    RECORD_FORMAT,
    _bare_hash,
    _check_npz,
    _fsync_dir,
    _now,
    _read_json_object,
    _write_file,
    sha256_hex,
)


def _refuse_foreign_scorecard(meta: Mapping[str, Any], what: str) -> None:
    """Refuse a scorecard whose model fingerprint names another model than the one stored."""
    named, actual = meta.get("scorecard_model_fingerprint"), meta.get("model_fingerprint")
    if named and actual and _bare_hash(str(named)) != _bare_hash(str(actual)):
        raise RegistryError(
            f"{what} was made for another model (it names model fingerprint {named}; the model "
            f"being registered has {actual}); validate this model and register its own scorecard"
        )


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


class RegistrationMixin(RegistryIndex):
    """Store a surrogate and its evidence as the next version of a name."""

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
            ``"name/v"`` of the version this one was retrained from (an int: that version of
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
            parent = format_ref(name, parent)  # a version number: a version of the same name
        if parent is not None:
            parent_name, parent_version = parse_ref(parent)
            if parent_version is None:
                raise RegistryError(f"parent {parent!r} must name a version: NAME/VERSION")
            parent_ref = format_ref(parent_name, parent_version)
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
                    "%s/%s is registered, but its status record could not be marked "
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
