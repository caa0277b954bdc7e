"""What the registry returns to callers: a version's metadata, an event, a name's summary."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from ergodex.registry.names import format_ref

STATUSES = ("candidate", "accepted", "rejected", "retired")


@dataclass(frozen=True)
class VersionInfo:
    """What the index knows about one version.

    Attributes
    ----------
    name, version : str, int
        The version's reference is ``"name/version"`` (:attr:`ref`, e.g. ``"loop/3"``).
    status : str
        One of :data:`STATUSES`.
    created : str
        Registration time, UTC ISO 8601.
    artifacts : dict
        File name → sha256 hex digest of every file in the version folder.
    folder : pathlib.Path
        The version folder.
    note, parent : str, str or None
        Free text given at registration; the version it was retrained from (``"name/v"``).
    datasets : list of dict
        Data the version was fitted and checked on: ``{"role", "fingerprint", "source"}``.
    verdict : str or None
        The scorecard's verdict (``"pass"``/``"fail"``/``"inconclusive"``), None without a
        scorecard; only ``"pass"`` can be accepted without an override.
    data_fingerprint : str or None
        Fingerprint of the data the scorecard was computed on.
    model_fingerprint : str or None
        Fingerprint of the stored surrogate (``Surrogate.fingerprint()``).
    integrity : str or None
        ``"ok"`` when every file matched its recorded sha256 as this info was read, ``"failed"``
        when one did not (the status and verdict must then not be trusted), None when not checked
        (internal reads that verify the bytes they use).
    integrity_problems : list of str
        One line per changed or missing file: path, expected and actual sha256.
    """

    name: str
    version: int
    status: str
    created: str
    artifacts: dict[str, str]
    folder: Path
    note: str = ""
    parent: str | None = None
    datasets: list[dict[str, str]] = field(default_factory=list)
    verdict: str | None = None
    data_fingerprint: str | None = None
    model_fingerprint: str | None = None
    scorecard_model_fingerprint: str | None = None
    integrity: str | None = None
    integrity_problems: list[str] = field(default_factory=list)

    @property
    def ref(self) -> str:
        return format_ref(self.name, self.version)

    def __repr__(self) -> str:
        from ergodex.display import version_repr

        return version_repr(self)

    def _repr_html_(self) -> str:
        """A small table for notebooks: status, verdict, lineage, fingerprints, folder."""
        from ergodex.display import version_html

        return version_html(self)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict (the ``--json`` shape of ``ergodex models show NAME/V``)."""
        d = asdict(self)
        d["folder"] = str(self.folder)
        d["ref"] = self.ref
        return d


@dataclass(frozen=True)
class Event:
    """One line of a model's history."""

    id: int
    time: str
    name: str
    version: int
    event: str
    from_status: str | None
    to_status: str | None
    actor: str
    reason: str
    override: bool

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_row(cls, r: Any) -> Event:
        """The event of one row of the index's ``events`` table."""
        return cls(
            id=r["id"],
            time=r["time"],
            name=r["name"],
            version=r["version"],
            event=r["event"],
            from_status=r["from_status"],
            to_status=r["to_status"],
            actor=r["actor"],
            reason=r["reason"],
            override=bool(r["override"]),
        )


@dataclass(frozen=True)
class ModelSummary:
    """One registered name: how many versions, the newest, the one accepted, counts per status.

    ``integrity_failed`` lists the versions whose files no longer match their recorded sha256.
    """

    name: str
    versions: int
    latest: int
    accepted: int | None
    statuses: dict[str, int]
    integrity_failed: list[int] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)
