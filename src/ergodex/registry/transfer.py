"""Export and import: a verified, self-describing folder per version, checked again on import."""

from __future__ import annotations

import json
import os
import shutil
import uuid
from collections.abc import Mapping
from pathlib import Path

from ergodex import CAUTION
from ergodex.exceptions import IntegrityError, ModelFileError, RegistryError
from ergodex.registry.names import format_ref, upgrade_ref, validate_name
from ergodex.registry.queries import QueriesMixin
from ergodex.registry.records import VersionInfo
from ergodex.registry.registration import RegistrationMixin, _refuse_foreign_scorecard
from ergodex.registry.storage import (
    EXPORT_FORMAT,
    OLD_EXPORT_FORMATS,
    _check_npz,
    _fsync_dir,
    _now,
    _read_json_object,
    _write_file,
    sha256_hex,
)


class TransferMixin(RegistrationMixin, QueriesMixin):
    """Export a version as a self-contained folder; import such a folder as a new candidate."""

    def export(self, ref: str | VersionInfo, to_dir: str | os.PathLike[str]) -> Path:
        """Write a self-contained folder for someone without ergodex; return its path.

        The folder holds the version's files (verified), a ``README.md`` with the equations, the
        hashes and the caution, and ``manifest.json`` (name, version, status, sha256 of every
        file) that :meth:`import_folder` checks. ``to_dir`` must not exist or be empty.
        """
        info = self.verify(ref)
        target = Path(to_dir).expanduser().absolute()
        if target.exists() and (not target.is_dir() or any(target.iterdir())):
            raise RegistryError(
                f"export folder {target} exists and is not empty; choose a new folder"
            )
        contents = {fn: self._verified_bytes(info, fn) for fn in info.artifacts}
        contents["README.md"] = self._readme(info, contents).encode("utf-8")
        manifest = {
            "format": EXPORT_FORMAT,
            "name": info.name,
            "version": info.version,
            "status": info.status,
            "verdict": info.verdict,
            "created": info.created,
            "exported": _now(),
            "parent": info.parent,
            "datasets": info.datasets,
            "files": {fn: sha256_hex(data) for fn, data in sorted(contents.items())},
        }
        contents["manifest.json"] = (json.dumps(manifest, indent=2, sort_keys=True) + "\n").encode()

        target.parent.mkdir(parents=True, exist_ok=True)
        stage = target.parent / f".{target.name}.{os.getpid()}.{uuid.uuid4().hex[:8]}.partial"
        stage.mkdir()
        try:
            for fn, data in contents.items():
                _write_file(stage / fn, data, read_only=False)
            _fsync_dir(stage)
            if target.exists():
                target.rmdir()  # empty, checked above
            os.rename(stage, target)
            _fsync_dir(target.parent)
        finally:
            if stage.exists():
                shutil.rmtree(stage, ignore_errors=True)
        return target

    @staticmethod
    def _readme(info: VersionInfo, contents: Mapping[str, bytes]) -> str:
        equations: list[str] = []
        variables: list[str] = []
        try:
            from ergodex.surrogate import Surrogate

            surrogate = Surrogate.from_json(contents["model.json"].decode("utf-8"))
            equations = list(surrogate.equations())
            variables = list(surrogate.variables)
        except Exception as exc:  # the README is still useful without the equation listing
            equations = [f"(equations could not be listed: {exc})"]
        lines = [
            f"# {info.name}, version {info.version}",
            "",
            f"Status in the registry it came from: **{info.status}**. "
            f"Scorecard verdict: **{info.verdict or 'none'}**. Registered {info.created}.",
        ]
        if info.note:
            lines += ["", f"Note: {info.note}"]
        lines += [
            "",
            "## Equations",
            "",
            "Derived from `model.json` (the source of truth); "
            + (f"variables: {', '.join(variables)}." if variables else ""),
            "",
            "```",
        ]
        lines += equations
        lines += ["```", "", "## Files", "", "| file | sha256 |", "|---|---|"]
        lines += [f"| `{fn}` | `{sha256_hex(data)}` |" for fn, data in sorted(contents.items())]
        lines += [
            "",
            "`model.json` is plain JSON: the variable names, the term table (monomials as integer "
            "power vectors), the coefficient matrix (one row per variable), the optional noise "
            "covariance per unit time and the optional transform from data space to model space. "
            "`scorecard.json` lists every statistic compared, its distance to the data, the "
            "data's own noise floor, their ratio and the verdict. `record.json` holds the data "
            "fingerprints, package versions and lineage. `manifest.json` lists every file's "
            "sha256; check them before use (e.g. `sha256sum model.json`).",
        ]
        if info.parent or info.datasets:
            lines += ["", "## Lineage", ""]
            if info.parent:
                lines.append(f"- retrained from {info.parent}")
            for d in info.datasets:
                source = f" ({d['source']})" if d.get("source") else ""
                lines.append(f"- {d['role']} data: `{d['fingerprint']}`{source}")
        lines += ["", "## Caution", "", CAUTION, ""]
        return "\n".join(lines)

    def import_folder(self, path: str | os.PathLike[str], name: str | None = None) -> VersionInfo:
        """Register an exported folder as a new candidate version, after checking every hash.

        The imported version starts as ``candidate`` whatever its status was where it came from:
        accepting is a decision of this registry's users. ``name`` defaults to the exported name.
        """
        folder = Path(path)
        manifest_path = folder / "manifest.json"
        if not manifest_path.is_file():
            raise RegistryError(
                f"{folder} has no manifest.json; import reads folders written by "
                "'ergodex models export' (register a bare model.json with 'ergodex register')"
            )
        manifest = _read_json_object(manifest_path.read_bytes(), f"{manifest_path}")
        fmt = manifest.get("format")
        if fmt not in (EXPORT_FORMAT, *OLD_EXPORT_FORMATS) or not isinstance(
            manifest.get("files"), dict
        ):
            raise ModelFileError(
                f"{manifest_path}: format {fmt!r} is not {EXPORT_FORMAT!r} (or an earlier "
                f"{', '.join(OLD_EXPORT_FORMATS)})"
            )
        parent = upgrade_ref(
            manifest.get("parent"), str(manifest_path), old_form=fmt in OLD_EXPORT_FORMATS
        )
        contents: dict[str, bytes] = {}
        for filename, expected in sorted(manifest["files"].items()):
            if (
                not isinstance(filename, str)
                or Path(filename).name != filename
                or filename in ("", ".", "..")
            ):
                raise RegistryError(f"{manifest_path} lists an unsafe file name {filename!r}")
            file_path = folder / filename
            if os.path.lexists(file_path):  # never read a device or pipe (e.g. /dev/zero) forever
                from ergodex.limits import check_regular_file

                check_regular_file(file_path, "an exported file", error=RegistryError)
            try:
                data = file_path.read_bytes()
            except FileNotFoundError:
                raise IntegrityError(
                    f"{file_path}: listed in manifest.json (sha256 {expected}) but missing; the "
                    "exported folder is incomplete"
                ) from None
            actual = sha256_hex(data)
            if actual != expected:
                raise IntegrityError(
                    f"{file_path}: sha256 mismatch: expected {expected}, actual {actual}; the "
                    "file was changed after export (edited, damaged in transfer, or replaced)"
                )
            contents[filename] = data
        if "model.json" not in contents:
            raise RegistryError(f"{folder}: the manifest lists no model.json")
        new_name = validate_name(name if name is not None else manifest.get("name", ""))
        origin = format_ref(str(manifest.get("name")), str(manifest.get("version")))

        files = {
            fn: contents[fn]
            for fn in contents
            if fn not in ("README.md", "manifest.json", "record.json")
        }
        model_dict = _read_json_object(files["model.json"], f"{folder / 'model.json'}")
        card = None
        if "scorecard.json" in files:
            card = _read_json_object(files["scorecard.json"], f"{folder / 'scorecard.json'}")
        if "evidence.npz" in files:
            _check_npz(files["evidence.npz"], f"{folder / 'evidence.npz'}")
        meta = {
            "model_fingerprint": self._model_fingerprint(
                files["model.json"], str(folder / "model.json")
            ),
            "verdict": card.get("verdict") if card else None,
            "data_fingerprint": (card.get("data_fingerprint") or None) if card else None,
            "scorecard_model_fingerprint": (card.get("model_fingerprint") or None)
            if card
            else None,
        }
        if meta["verdict"] not in (None, "pass", "fail"):
            raise ModelFileError(
                f"{folder / 'scorecard.json'}: unknown verdict {meta['verdict']!r}"
            )
        _refuse_foreign_scorecard(meta, str(folder / "scorecard.json"))
        datasets = manifest.get("datasets") if isinstance(manifest.get("datasets"), list) else None
        meta["datasets"] = self._normalise_datasets(datasets, model_dict, meta["data_fingerprint"])
        extra = {
            "imported_from": {
                "ref": origin,
                "status": manifest.get("status"),
                "folder": str(folder.absolute()),
                "parent": parent,
            }
        }
        return self._commit_version(
            new_name,
            files,
            meta,
            note=f"imported from {origin}",
            parent=None,
            event="imported",
            reason=f"from {folder.absolute()} ({origin}, {manifest.get('status')})",
            record_extra=extra,
        )
