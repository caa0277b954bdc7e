"""The registry of surrogates: an SQLite index plus one folder per version (see :mod:`.core`)."""

from ergodex.registry.core import (
    CAUTION,
    EXPORT_FORMAT,
    INDEX_FILE,
    MIGRATIONS,
    QUARANTINE_DIR,
    RECORD_FORMAT,
    SCHEMA_VERSION,
    STAGING_DIR,
    STATUS_FILE,
    STATUS_FORMAT,
    STATUSES,
    TRANSITIONS,
    Event,
    ModelSummary,
    Registry,
    VersionInfo,
    parse_ref,
    sha256_hex,
    validate_name,
)

__all__ = [
    "CAUTION",
    "STATUSES",
    "Event",
    "ModelSummary",
    "Registry",
    "VersionInfo",
    "parse_ref",
    "validate_name",
]
